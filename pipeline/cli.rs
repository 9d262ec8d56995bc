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
