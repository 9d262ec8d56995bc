//! Command-line interface: parses the arguments and hands them to the verb
//! in [`crate::commands`].

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::commands::{self, Exit};
use crate::console::{Level, Printer};

#[derive(Parser, Debug)]
#[command(name = "satstep", version, about = "Breathing-challenge retinal oximetry studies: from protocol and captures to per-vessel SO2, statistics and report.", long_about = None)]
pub(crate) struct Cli {
    #[command(flatten)]
    pub global: Global,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Args, Debug, Clone)]
pub(crate) struct Global {
    /// Print only errors.
    #[arg(short, long, global = true, conflicts_with = "verbose")]
    pub quiet: bool,
    /// Print more about each step.
    #[arg(short, long, global = true)]
    pub verbose: bool,
    /// Worker threads for parallel stages (default: all cores). Results do not depend on it.
    #[arg(long, global = true, value_name = "N")]
    pub jobs: Option<usize>,
    /// Never draw progress bars.
    #[arg(long, global = true)]
    pub no_progress: bool,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Validate a study and everything it names; writes nothing.
    Check {
        /// The study file, or a folder holding `study.yaml`.
        study: PathBuf,
    },
    /// Work with protocol files.
    Protocol {
        #[command(subcommand)]
        action: ProtocolAction,
    },
    /// Run a study: validate it, place captures in epochs, and write the results.
    /// A folder with a `scenario.yaml` and no data yet is simulated first.
    Run {
        /// The study file, or a folder holding `study.yaml`.
        study: PathBuf,
        /// Run this stage even if it is up to date (repeatable; `all` for every stage).
        #[arg(long, value_name = "STAGE", value_parser = stage_names())]
        force: Vec<String>,
        /// Compute only shard I of N of the per-capture work into the
        /// output's cache, and stop before the cohort-level stages; a plain
        /// `run` afterwards completes the study from the cache.
        #[arg(long, value_name = "I/N", value_parser = crate::runner::Shard::parse)]
        shard: Option<crate::runner::Shard>,
    },
    /// Plan the next study: power and sample size by simulation, from a
    /// pilot's variance components or stated ones.
    Power {
        /// A study (its protocol, statistics settings and finished run's
        /// variance components), a scenario or a protocol file.
        input: PathBuf,
        /// The effect to detect, in SO2 points, for one of the protocol's
        /// contrasts (repeatable), e.g. `--effect "low-15 - air=-4"`.
        #[arg(long = "effect", value_name = "CONTRAST=POINTS")]
        effects: Vec<String>,
        /// Subjects to try: a list `6,8,10`, a range `6..30` (every 2) or `6..30/4`.
        #[arg(long, default_value = "6..30/4", value_name = "LIST")]
        subjects: String,
        /// Steady captures per epoch (and eye and session) to try.
        #[arg(long, default_value = "5", value_name = "LIST")]
        captures: String,
        /// Vessel segments per eye to try (per vessel kind).
        #[arg(long, default_value = "4", value_name = "LIST")]
        segments: String,
        /// Eyes per subject to try (1, 2 or `1,2`).
        #[arg(long, default_value = "1", value_name = "LIST")]
        eyes: String,
        /// Sessions per subject to try (1, 2 or `1,2`).
        #[arg(long, default_value = "1", value_name = "LIST")]
        sessions: String,
        /// A `variance_components` table (CSV or Parquet) from a statistics
        /// stage; default: the study's own results.
        #[arg(long, value_name = "FILE")]
        variances: Option<PathBuf>,
        /// State or override a variance component's SD in SO2 points:
        /// subject, session, eye, segment, residual, response (every epoch)
        /// or response:EPOCH (repeatable), e.g. `--sd eye=1.5`.
        #[arg(long = "sd", value_name = "GROUP=SD")]
        sd: Vec<String>,
        /// Only this method (repeatable; default: every method in the table).
        #[arg(long = "method", value_name = "LABEL")]
        methods: Vec<String>,
        /// Only this vessel kind (repeatable).
        #[arg(long = "kind", value_name = "KIND", value_parser = ["arteriole", "venule"])]
        kinds: Vec<String>,
        /// The power the smallest design must reach.
        #[arg(long, default_value_t = 0.8)]
        target: f64,
        /// Simulated studies per design, or `auto` (1 000, more near the target).
        #[arg(long, default_value = "auto", value_name = "N|auto")]
        simulations: String,
        /// Seed of the simulations (the same seed gives the same bytes).
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Output folder (default: `power` in the current folder).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
    },
    /// SO2 error from a 1 % transmission error per band, for veils 0–0.9.
    Sensitivity {
        /// A study file (its `instrument:` is used) or an instrument file.
        file: PathBuf,
        /// Operating point: SO2 in percent.
        #[arg(long, default_value_t = 95.0)]
        so2: f64,
        /// Operating point: vessel diameter in µm.
        #[arg(long, default_value_t = 120.0)]
        diameter: f64,
        /// Operating point: hemoglobin in g/L.
        #[arg(long, default_value_t = 150.0)]
        hb: f64,
        /// Operating point: fraction of light crossing the vessel twice.
        #[arg(long, default_value_t = 0.3)]
        double_pass: f64,
        /// The method whose unknowns are linearised: `multiband` (veil shared
        /// along the segment) or `multiband-pointwise` (veil at each position).
        #[arg(long, default_value = "multiband", value_parser = ["multiband", "multiband-pointwise"])]
        method: String,
        /// Only these instrument bands, by name (comma-separated); all when not given.
        #[arg(long, value_name = "NAME,…", value_delimiter = ',')]
        bands: Vec<String>,
        /// Folder for `sensitivity.csv` and the figure.
        #[arg(long, value_name = "DIR", default_value = "sensitivity")]
        out: PathBuf,
    },
    /// Fit a linear mixed model to an exported table (REML, Satterthwaite tests).
    Mixed {
        /// CSV table with a header line.
        #[arg(long, value_name = "FILE.csv")]
        data: PathBuf,
        /// Response column.
        #[arg(long, value_name = "COL")]
        response: String,
        /// Fixed-effect column (text columns are factors, numbers covariates); repeat for more.
        #[arg(long, value_name = "COL")]
        fixed: Vec<String>,
        /// Random intercept per group: `subject`, nested `subject:eye`; random slopes `Subject@Days`.
        #[arg(long, value_name = "GROUP[:GROUP…][@SLOPE]", required = true)]
        random: Vec<String>,
        /// Reference level of a factor, `COL=LEVEL` (default: the first level in sorted order).
        #[arg(long, value_name = "COL=LEVEL")]
        reference: Vec<String>,
        /// A contrast of factor levels, e.g. "hypoxia - recovery"; repeat for more (Holm-adjusted).
        #[arg(long, value_name = "\"LEVEL_A - LEVEL_B\"")]
        contrast: Vec<String>,
        /// Keep only the rows whose column equals the value, e.g. `method=multiband`; repeat to combine (all must hold).
        #[arg(long = "where", value_name = "COL=VALUE")]
        filters: Vec<String>,
        /// Maximum likelihood instead of REML.
        #[arg(long)]
        ml: bool,
        /// Folder for fixed_effects.csv, contrasts.csv, variance_components.csv and fit.csv.
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
    },
    /// Write batch scripts that run a study on a cluster, shard by shard.
    Cluster {
        #[command(subcommand)]
        scheduler: ClusterScheduler,
    },
    /// One analysis of a multi-site study from the sites' own runs (their
    /// tables, not their images), with the site as a term of the epoch model.
    Pool {
        /// Each site's results folder (`DIR`, named by its study id, or `NAME=DIR`).
        #[arg(required = true, num_args = 2.., value_name = "[NAME=]RESULTS")]
        sites: Vec<String>,
        /// Folder for the pooled results.
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// The pooled study's id.
        #[arg(long, value_name = "ID")]
        id: Option<String>,
    },
    /// Write a study skeleton from a folder of captures: the study file
    /// (instrument, subjects, sessions, methods, commented), a protocol and
    /// the capture lists, with capture times from the files or their names.
    Init {
        /// The study's folder (`study.yaml` is written there).
        dir: PathBuf,
        /// The folder holding one folder of captures per subject (default: DIR).
        #[arg(long, value_name = "FOLDER")]
        captures: Option<PathBuf>,
        /// A ready protocol (step-down-hypoxia, alternating-low-oxygen,
        /// hyperoxia, simulated-altitude) or a protocol file; a commented
        /// template when not given.
        #[arg(long, value_name = "NAME|FILE")]
        protocol: Option<String>,
        /// An instrument file (`name`, `pixel_size_um`, `bands`, as a
        /// study's `instrument:`); a placeholder to fill in when not given.
        #[arg(long, value_name = "FILE")]
        instrument: Option<PathBuf>,
        /// Where capture times come from: the TIFF `DateTime` tag, or the
        /// file name read with `--name-pattern`.
        #[arg(long, default_value = "metadata", value_parser = ["metadata", "name"])]
        time_from: String,
        /// A chrono pattern for the whole file name without its extension,
        /// e.g. `capture_%Y%m%d_%H%M%S` (with `--time-from name`).
        #[arg(long, value_name = "PATTERN")]
        name_pattern: Option<String>,
        /// The camera clock's offset from UTC (file times carry none).
        #[arg(
            long,
            default_value = "+00:00",
            value_name = "±HH:MM",
            allow_hyphen_values = true
        )]
        utc_offset: String,
        /// The eye of captures whose folder or name says neither `OD` nor `OS`.
        #[arg(long, default_value = "OD", value_parser = ["OD", "OS"])]
        eye: String,
        /// A new session starts after a gap of more than this many hours.
        #[arg(long, default_value_t = 3.0, value_name = "HOURS")]
        session_gap: f64,
        /// Replace an existing `study.yaml` (and the files `init` writes beside it).
        #[arg(long)]
        force: bool,
    },
    /// Print shell completions for satstep (bash, zsh, fish, elvish, powershell).
    Completions {
        #[arg(value_parser = clap::value_parser!(clap_complete::Shell))]
        shell: clap_complete::Shell,
    },
    /// Write satstep's manual pages (roff), one per command, into a folder.
    Manual {
        /// The folder for `satstep.1`, `satstep-run.1`, ….
        #[arg(long, value_name = "DIR", default_value = "man")]
        out: PathBuf,
    },
    /// Print a JSON Schema of a satstep input file, for editors.
    Schema {
        /// Which file: the study, a protocol, or an eye's segment file.
        #[arg(value_parser = ["study", "protocol", "segments"])]
        file: String,
    },
    /// Work with a study's vessel segment files.
    Segments {
        #[command(subcommand)]
        action: SegmentsAction,
    },
    /// Write a synthetic study with known truth from a scenario file.
    Simulate {
        /// The scenario file.
        scenario: PathBuf,
        /// Folder to write the study into (created if needed).
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
    },
}

#[derive(Subcommand, Debug)]
pub enum ClusterScheduler {
    /// Slurm: a job array of shards and a final run that waits for them
    /// (`--dependency=afterok`), with a script that submits both.
    Slurm {
        /// The study file, or a folder holding `study.yaml`.
        study: PathBuf,
        /// How many shards (array tasks) to split the captures into.
        #[arg(long, value_name = "N")]
        shards: usize,
        /// The partition to submit to (default: the cluster's).
        #[arg(long, value_name = "NAME")]
        partition: Option<String>,
        /// Wall time per job, e.g. `02:00:00` (default: estimated from the study).
        #[arg(long, value_name = "TIME")]
        time: Option<String>,
        /// Memory per job, e.g. `8G` (default: estimated from the study).
        #[arg(long, value_name = "SIZE")]
        mem: Option<String>,
        /// Cores per job.
        #[arg(long, value_name = "N", default_value_t = 2)]
        cpus: usize,
        /// Folder for the scripts (default: `cluster` in the study's output).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
        /// The satstep the nodes run, on a path they see (default: this one).
        #[arg(long, value_name = "PATH")]
        binary: Option<PathBuf>,
    },
}

#[derive(Subcommand, Debug)]
pub enum SegmentsAction {
    /// Propose each eye's vessel segments from its reference capture:
    /// centre lines traced in the band with the most vessel contrast,
    /// kinds from the ODR, written as segment files marked `proposed:`
    /// with an overlay image to review.
    Propose {
        /// The study file, or a folder holding `study.yaml`.
        study: PathBuf,
        /// Only this eye: `OD`, `V01/OD` or `V01/s1/OD` (repeatable; a
        /// subject id alone takes all its eyes).
        #[arg(long = "eye", value_name = "[SUBJECT/[SESSION/]]EYE")]
        eyes: Vec<String>,
        /// Replace segment files even if they were edited (or made by hand).
        #[arg(long)]
        force: bool,
        /// Smallest vessel diameter proposed, µm.
        #[arg(long, default_value_t = 40.0, value_name = "UM")]
        min_diameter: f64,
        /// Largest vessel diameter proposed, µm.
        #[arg(long, default_value_t = 250.0, value_name = "UM")]
        max_diameter: f64,
        /// Shortest segment proposed, µm.
        #[arg(long, default_value_t = 300.0, value_name = "UM")]
        min_length: f64,
        /// The optic-disc centre in the reference capture, px (for `--ring`).
        #[arg(long, value_name = "X,Y", value_parser = pair)]
        disc: Option<(f64, f64)>,
        /// Keep only vessels between these distances from the disc centre, µm.
        #[arg(long, value_name = "INNER,OUTER", value_parser = pair)]
        ring: Option<(f64, f64)>,
    },
}

/// Two numbers `A,B`.
fn pair(s: &str) -> Result<(f64, f64), String> {
    let (a, b) = s
        .split_once(',')
        .ok_or_else(|| format!("`{s}` is not two numbers `A,B`"))?;
    let num = |t: &str| {
        t.trim()
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| format!("`{t}` is not a number"))
    };
    Ok((num(a)?, num(b)?))
}

#[derive(Subcommand, Debug)]
pub enum ProtocolAction {
    /// Print a protocol's timeline: cumulative times, gas, equivalent altitude.
    Show {
        /// The protocol file.
        file: PathBuf,
    },
}

/// `--force` takes the stages' names from the one stage list, in order,
/// each with its summary for the help text.
fn stage_names() -> clap::builder::PossibleValuesParser {
    use clap::builder::PossibleValue;
    let stages = crate::stages::STAGES
        .iter()
        .map(|s| PossibleValue::new(s.name()).help(s.summary()));
    clap::builder::PossibleValuesParser::new(
        stages.chain([PossibleValue::new("all").help("every stage")]),
    )
}

impl Global {
    pub fn printer(&self) -> Printer {
        let level = if self.quiet {
            Level::Quiet
        } else if self.verbose {
            Level::Verbose
        } else {
            Level::Normal
        };
        Printer::new(level, self.no_progress)
    }
}

/// Parses the arguments and runs the verb.
pub fn main_with_args(args: impl IntoIterator<Item = std::ffi::OsString>) -> Exit {
    let cli = match Cli::try_parse_from(args) {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() {
                Exit::Problem
            } else {
                Exit::Ok
            };
        }
    };
    let printer = cli.global.printer();
    if let Some(n) = cli.global.jobs {
        if n == 0 {
            printer.error("`--jobs` must be at least 1");
            return Exit::Problem;
        }
        // Only fails if a pool already exists, which cannot happen here.
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global();
    }
    let result = match cli.command {
        Command::Check { study } => commands::check::check(&study, &printer),
        Command::Protocol {
            action: ProtocolAction::Show { file },
        } => commands::protocol::show_protocol(&file, &printer),
        Command::Run {
            study,
            force,
            shard,
        } => commands::run::run(&study, &force, shard, &printer),
        Command::Cluster {
            scheduler:
                ClusterScheduler::Slurm {
                    study,
                    shards,
                    partition,
                    time,
                    mem,
                    cpus,
                    out,
                    binary,
                },
        } => commands::cluster::slurm(
            &commands::cluster::ClusterArgs {
                study,
                shards,
                partition,
                time,
                mem,
                cpus,
                out,
                binary,
            },
            &printer,
        ),
        Command::Pool { sites, out, id } => {
            commands::pool::pool(&commands::pool::PoolArgs { sites, out, id }, &printer)
        }
        Command::Init {
            dir,
            captures,
            protocol,
            instrument,
            time_from,
            name_pattern,
            utc_offset,
            eye,
            session_gap,
            force,
        } => {
            let time = match (time_from.as_str(), name_pattern) {
                ("name", Some(p)) => commands::init::TimeSource::Name(p),
                ("name", None) => {
                    printer.error("`--time-from name` needs `--name-pattern PATTERN`, e.g. `capture_%Y%m%d_%H%M%S`");
                    return Exit::Problem;
                }
                _ => commands::init::TimeSource::Metadata,
            };
            let utc_offset = match commands::init::parse_offset(&utc_offset) {
                Ok(o) => o,
                Err(e) => {
                    printer.error(format!("`--utc-offset`: {e}"));
                    return Exit::Problem;
                }
            };
            commands::init::init(
                &commands::init::InitArgs {
                    dir,
                    captures,
                    protocol,
                    instrument,
                    time,
                    utc_offset,
                    eye: crate::config::eye::Eye::from_name(&eye)
                        .unwrap_or(crate::config::eye::Eye::OD),
                    session_gap_s: session_gap * 3600.0,
                    force,
                },
                &printer,
            )
        }
        Command::Completions { shell } => {
            let mut cmd = <Cli as clap::CommandFactory>::command();
            let mut out = Vec::new();
            clap_complete::generate(shell, &mut cmd, "satstep", &mut out);
            printer.data(String::from_utf8_lossy(&out));
            Ok(Exit::Ok)
        }
        Command::Manual { out } => {
            commands::manual::write_pages(<Cli as clap::CommandFactory>::command(), &out, &printer)
        }
        Command::Schema { file } => {
            printer.data(commands::schema::schema(&file));
            Ok(Exit::Ok)
        }
        Command::Segments {
            action:
                SegmentsAction::Propose {
                    study,
                    eyes,
                    force,
                    min_diameter,
                    max_diameter,
                    min_length,
                    disc,
                    ring,
                },
        } => commands::segments::propose(
            &commands::segments::ProposeArgs {
                study,
                eyes,
                force,
                min_diameter_um: min_diameter,
                max_diameter_um: max_diameter,
                min_length_um: min_length,
                disc,
                ring_um: ring,
            },
            &printer,
        ),
        Command::Simulate { scenario, out } => {
            commands::simulate::simulate(&scenario, &out, &printer)
        }
        Command::Mixed {
            data,
            response,
            fixed,
            random,
            reference,
            contrast,
            filters,
            ml,
            out,
        } => {
            let args = commands::mixed::MixedArgs {
                data,
                response,
                fixed,
                random,
                reference,
                contrasts: contrast,
                filters,
                ml,
                out,
            };
            commands::mixed::mixed(&args, &printer)
        }
        Command::Power {
            input,
            effects,
            subjects,
            captures,
            segments,
            eyes,
            sessions,
            variances,
            sd,
            methods,
            kinds,
            target,
            simulations,
            seed,
            out,
        } => commands::power::power(
            &commands::power::PowerArgs {
                input,
                effects,
                subjects,
                captures,
                segments,
                eyes,
                sessions,
                variances,
                sd,
                methods,
                kinds,
                target,
                simulations,
                seed,
                out,
            },
            &printer,
        ),
        Command::Sensitivity {
            file,
            so2,
            diameter,
            hb,
            double_pass,
            method,
            bands,
            out,
        } => {
            use crate::oximetry::sensitivity::{OperatingPoint, Unknowns};
            let op = OperatingPoint {
                so2: so2 / 100.0,
                diameter_um: diameter,
                hb_g_per_l: hb,
                double_pass,
            };
            let unknowns = if method == "multiband-pointwise" {
                Unknowns::VeilPerPosition
            } else {
                Unknowns::VeilShared
            };
            commands::sensitivity::sensitivity(&file, &op, unknowns, &bands, &out, &printer)
        }
    };
    match result {
        Ok(exit) => exit,
        Err(e) => {
            printer.error(format!("{e}"));
            for cause in e.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            Exit::Internal
        }
    }
}
