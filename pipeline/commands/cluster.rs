//! `satstep cluster slurm`: writes the batch scripts that spread a study's
//! per-capture work over a cluster's nodes. A job array runs one shard of
//! the study per task (`satstep run STUDY --shard I/N`, each writing its
//! items into the study's shared cache), and a second job, started only
//! when every task has succeeded, runs the study plainly: it finds every
//! item in the cache and computes the cohort-level stages.
//!
//! Nothing here talks to the scheduler; the scripts are plain files the
//! researcher can read, edit and submit. Another scheduler is another
//! [`Scheduler`] with its own three templates.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};

use super::Exit;
use crate::config::study::{MethodKind, Study};
use crate::console::Printer;
use crate::study::{load_study, resolve_study_path};

/// What a researcher asks of the cluster; `None` fields are derived from
/// the study's size ([`Estimate`]).
#[derive(Debug, Clone)]
pub struct ClusterArgs {
    pub study: PathBuf,
    pub shards: usize,
    pub partition: Option<String>,
    /// Wall time per job, as the scheduler writes it (e.g. `01:30:00`).
    pub time: Option<String>,
    /// Memory per job, as the scheduler writes it (e.g. `4G`).
    pub mem: Option<String>,
    pub cpus: usize,
    /// Where the scripts go (default: `<output>/cluster`).
    pub out: Option<PathBuf>,
    /// The satstep the nodes run (default: this one).
    pub binary: Option<PathBuf>,
}

/// Seconds of one core per megapixel-band of a capture through the
/// transmissions stage: `cargo bench --bench images` measured about 0.9 s
/// per 1024 × 1024 × 8-band capture on the development machine (README,
/// "Benchmarks"), i.e. 0.11 s per megapixel-band.
const SECONDS_PER_MEGAPIXEL_BAND: f64 = 0.11;
/// Seconds of one core per joint multiband segment fit (`cargo bench
/// --bench engine`: about 80 ms).
const SECONDS_PER_JOINT_FIT: f64 = 0.08;
/// Time requests are this many times the estimate, plus a fixed margin
/// for start-up and a slow node: a job that runs out of time is lost work.
const TIME_SAFETY: f64 = 3.0;
const TIME_MARGIN_S: f64 = 600.0;

/// The size of a study's jobs, from its captures, image size and methods.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub captures: usize,
    pub width: usize,
    pub height: usize,
    pub bands: usize,
    pub segments_per_capture: f64,
    pub joint_methods: usize,
}

impl Estimate {
    pub fn of(study: &Study) -> Estimate {
        let (width, height) = study
            .subjects
            .iter()
            .flat_map(|s| &s.sessions)
            .flat_map(|s| &s.captures)
            .find_map(|c| {
                let (w, h) = tiff_size(&c.path)?;
                // A tiled frame holds every band: the size of one is a tile's.
                match study
                    .instrument
                    .layout
                    .rectangles(study.instrument.bands.len(), w, h)
                {
                    None => Some((w, h)),
                    Some(Ok(r)) => Some((r[0][2], r[0][3])),
                    Some(Err(_)) => None,
                }
            })
            .unwrap_or((0, 0));
        let eyes: Vec<usize> = study
            .subjects
            .iter()
            .flat_map(|s| &s.sessions)
            .flat_map(|s| s.vessels.values().map(Vec::len))
            .collect();
        let segments_per_capture = if eyes.is_empty() {
            0.0
        } else {
            eyes.iter().sum::<usize>() as f64 / eyes.len() as f64
        };
        Estimate {
            captures: study.capture_count(),
            width,
            height,
            bands: study.instrument.bands.len(),
            segments_per_capture,
            joint_methods: study
                .methods
                .iter()
                .filter(|m| matches!(m.kind, MethodKind::Multiband { .. }))
                .count(),
        }
    }

    /// Seconds of one core for one capture's transmissions and fits.
    fn capture_seconds(&self) -> f64 {
        let megapixel_bands = (self.width * self.height * self.bands) as f64 / 1e6;
        megapixel_bands * SECONDS_PER_MEGAPIXEL_BAND
            + self.segments_per_capture * self.joint_methods as f64 * SECONDS_PER_JOINT_FIT
    }

    /// Wall time to request for one of `shards` shard jobs on `cpus` cores.
    pub fn shard_seconds(&self, shards: usize, cpus: usize) -> f64 {
        let per_shard = self.captures.div_ceil(shards.max(1)) as f64;
        per_shard * self.capture_seconds() / cpus.max(1) as f64 * TIME_SAFETY + TIME_MARGIN_S
    }

    /// Wall time to request for the final run: reading every item back
    /// (a small fraction of computing it), the statistics and the report.
    pub fn final_seconds(&self, cpus: usize, power: bool) -> f64 {
        let reading = self.captures as f64 * self.capture_seconds() * 0.05 / cpus.max(1) as f64;
        // The power stage simulates whole studies: allow it an hour.
        let planning = if power { 3600.0 } else { 0.0 };
        (reading + 300.0) * TIME_SAFETY + planning + TIME_MARGIN_S
    }

    /// Memory to request, in MiB: a base for the program and the cohort's
    /// tables, plus per worker thread a capture, the eye's reference and
    /// registration buffers (four images of f32 bands).
    pub fn memory_mib(&self, cpus: usize) -> usize {
        let capture = (self.width * self.height * self.bands * 4) as f64 / (1 << 20) as f64;
        let tables = self.captures as f64 * self.segments_per_capture * 0.02;
        (512.0 + tables + cpus.max(1) as f64 * capture * 4.0).ceil() as usize
    }
}

/// A TIFF's first page's size, without decoding it.
fn tiff_size(path: &Path) -> Option<(usize, usize)> {
    let f = std::fs::File::open(path).ok()?;
    let mut dec = tiff::decoder::Decoder::new(std::io::BufReader::new(f)).ok()?;
    dec.dimensions().ok().map(|(w, h)| (w as usize, h as usize))
}

/// `D-HH:MM:SS` (Slurm's form), rounded up to whole minutes.
pub fn slurm_time(seconds: f64) -> String {
    let minutes = (seconds / 60.0).ceil().max(1.0) as u64;
    let (d, h, m) = (minutes / 1440, minutes / 60 % 24, minutes % 60);
    if d > 0 {
        format!("{d}-{h:02}:{m:02}:00")
    } else {
        format!("{h:02}:{m:02}:00")
    }
}

/// A batch scheduler's script templates.
trait Scheduler {
    /// The job-array script: one shard per task.
    fn shards(&self, job: &Job) -> String;
    /// The final run.
    fn finish(&self, job: &Job) -> String;
    /// Submits both, the second after every task of the first succeeded.
    fn submit(&self, job: &Job) -> String;
}

/// What every template needs.
struct Job {
    name: String,
    binary: String,
    study: String,
    dir: String,
    shards: usize,
    cpus: usize,
    partition: Option<String>,
    shard_time: String,
    final_time: String,
    mem: String,
}

struct Slurm;

impl Slurm {
    fn header(job: &Job, name: &str, time: &str, log: &str) -> String {
        let mut h = format!(
            "#!/bin/bash\n#SBATCH --job-name={name}\n#SBATCH --cpus-per-task={}\n#SBATCH --mem={}\n#SBATCH --time={time}\n#SBATCH --output={}/logs/{log}\n",
            job.cpus, job.mem, job.dir
        );
        if let Some(p) = &job.partition {
            h.push_str(&format!("#SBATCH --partition={p}\n"));
        }
        h
    }
}

/// Quotes a value for a POSIX shell.
fn sh(text: &str) -> String {
    format!("'{}'", text.replace('\'', "'\\''"))
}

impl Scheduler for Slurm {
    fn shards(&self, job: &Job) -> String {
        let mut s = Self::header(
            job,
            &format!("{}-shards", job.name),
            &job.shard_time,
            "shard-%a.out",
        );
        s.push_str(&format!(
            "#SBATCH --array=1-{n}\n\
             # One shard of the study's per-capture work per task; each writes\n\
             # its captures' items into the study's cache, on the shared file\n\
             # system, and nothing else.\n\
             set -euo pipefail\n\
             exec {bin} --no-progress --jobs \"${{SLURM_CPUS_PER_TASK:-1}}\" run {study} --shard \"${{SLURM_ARRAY_TASK_ID}}/{n}\"\n",
            n = job.shards,
            bin = sh(&job.binary),
            study = sh(&job.study),
        ));
        s
    }

    fn finish(&self, job: &Job) -> String {
        let mut s = Self::header(
            job,
            &format!("{}-finish", job.name),
            &job.final_time,
            "finish.out",
        );
        s.push_str(&format!(
            "# The plain run: every capture's items are in the cache, so this\n\
             # computes the cohort-level stages and writes every table.\n\
             set -euo pipefail\n\
             exec {bin} --no-progress --jobs \"${{SLURM_CPUS_PER_TASK:-1}}\" run {study}\n",
            bin = sh(&job.binary),
            study = sh(&job.study),
        ));
        s
    }

    fn submit(&self, job: &Job) -> String {
        format!(
            "#!/bin/sh\n\
             # Submits the shards, then the final run to start once every shard\n\
             # has succeeded. Prints the two job ids.\n\
             set -eu\n\
             mkdir -p {dir}/logs\n\
             shards=$(sbatch --parsable {dir}/shards.sbatch)\n\
             shards=${{shards%%;*}}\n\
             final=$(sbatch --parsable --dependency=afterok:\"$shards\" {dir}/finish.sbatch)\n\
             final=${{final%%;*}}\n\
             echo \"shards: job $shards ({n} tasks); final run: job $final, after every shard succeeds\"\n\
             echo \"$shards $final\" > {dir}/jobs\n",
            dir = sh(&job.dir),
            n = job.shards,
        )
    }
}

/// Writes the Slurm scripts for a study and says how to submit them.
pub fn slurm(args: &ClusterArgs, printer: &Printer) -> Result<Exit> {
    if args.shards == 0 {
        printer.error("`--shards` must be at least 1");
        return Ok(Exit::Problem);
    }
    if args.cpus == 0 {
        printer.error("`--cpus` must be at least 1");
        return Ok(Exit::Problem);
    }
    let path = resolve_study_path(&args.study);
    let (study, findings) = load_study(&path);
    printer.findings(&findings);
    let Some(study) = study else {
        printer.error(format!(
            "`{}` has {} errors; no scripts were written",
            path.display(),
            findings.error_count()
        ));
        return Ok(Exit::Problem);
    };
    let absolute =
        |p: &Path| -> PathBuf { std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf()) };
    let dir = absolute(
        &args
            .out
            .clone()
            .unwrap_or_else(|| study.output.join("cluster")),
    );
    let binary = match &args.binary {
        Some(b) => absolute(b),
        None => std::env::current_exe().context("finding this program's path")?,
    };
    let est = Estimate::of(&study);
    let job = Job {
        name: format!("satstep-{}", study.id),
        binary: binary.display().to_string(),
        study: absolute(&path).display().to_string(),
        dir: dir.display().to_string(),
        shards: args.shards,
        cpus: args.cpus,
        partition: args.partition.clone(),
        shard_time: args
            .time
            .clone()
            .unwrap_or_else(|| slurm_time(est.shard_seconds(args.shards, args.cpus))),
        final_time: args
            .time
            .clone()
            .unwrap_or_else(|| slurm_time(est.final_seconds(args.cpus, study.power.is_some()))),
        mem: args
            .mem
            .clone()
            .unwrap_or_else(|| format!("{}M", est.memory_mib(args.cpus))),
    };
    let scheduler = Slurm;
    std::fs::create_dir_all(dir.join("logs"))
        .with_context(|| format!("creating `{}`", dir.display()))?;
    for (name, text) in [
        ("shards.sbatch", scheduler.shards(&job)),
        ("finish.sbatch", scheduler.finish(&job)),
        ("submit.sh", scheduler.submit(&job)),
    ] {
        let file = dir.join(name);
        crate::tables::write_bytes_atomic(&file, text.as_bytes())?;
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            std::fs::set_permissions(&file, std::fs::Permissions::from_mode(0o755))
                .with_context(|| format!("making `{}` executable", file.display()))?;
        }
    }
    printer.info(format!(
        "study `{}`: {} captures of {} × {} px × {} bands, {:.1} segments per capture, {} joint methods",
        study.id,
        est.captures,
        est.width,
        est.height,
        est.bands,
        est.segments_per_capture,
        est.joint_methods
    ));
    printer.info(format!(
        "wrote `{}`: {} shard tasks of {} cores, {} and {} each; a final run of {}",
        dir.display(),
        job.shards,
        job.cpus,
        job.shard_time,
        job.mem,
        job.final_time
    ));
    printer.data(format!(
        "submit with:\n  sh {}/submit.sh\nor by hand:\n  sbatch --parsable {}/shards.sbatch   # prints the array's job id, J\n  sbatch --dependency=afterok:J {}/finish.sbatch\n",
        job.dir, job.dir, job.dir
    ));
    Ok(Exit::Ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slurm_times_round_up_to_minutes() {
        assert_eq!(slurm_time(1.0), "00:01:00");
        assert_eq!(slurm_time(61.0), "00:02:00");
        assert_eq!(slurm_time(3600.0), "01:00:00");
        assert_eq!(slurm_time(90_000.0), "1-01:00:00");
    }

    #[test]
    fn requests_grow_with_the_work_and_shrink_with_shards() {
        let e = Estimate {
            captures: 1000,
            width: 1024,
            height: 1024,
            bands: 8,
            segments_per_capture: 10.0,
            joint_methods: 1,
        };
        // 1000 captures × (0.92 + 0.8) s = 1 720 s of one core.
        let one = e.shard_seconds(1, 1);
        assert!((one - (1720.0 * 3.0 + 600.0)).abs() < 10.0, "{one}");
        assert!(e.shard_seconds(10, 1) < one / 5.0);
        assert!(e.shard_seconds(1, 4) < one / 3.0);
        // Four images of 32 MiB per worker over the 512 MiB base.
        assert_eq!(e.memory_mib(2), 512 + 200 + 256);
    }

    #[test]
    fn shell_quoting_survives_quotes() {
        assert_eq!(sh("a b"), "'a b'");
        assert_eq!(sh("it's"), "'it'\\''s'");
    }
}
