//! What every stage of `run` is: the [`Stage`] contract, and the [`Run`]
//! it reads from and adds to. A stage reads the loaded study and the
//! results of the stages before it; the runner decides whether it runs
//! (see [`crate::runner`]).

use std::any::Any;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::Result;
use serde::Serialize;
use serde::de::DeserializeOwned;

use crate::config::study::Study;
use crate::runner::Runner;
use crate::runner::key::{Key, hash_file_or_missing};

/// One stage of `run`. Its name is the folder it writes under `results/`,
/// the name the console prints and the value `--force` takes.
pub trait Stage: Sync {
    const NAME: &'static str;
    /// Version of the stage's computation; bump when its results change.
    const VERSION: u32;
    /// One line for the help text.
    const SUMMARY: &'static str;
    /// The stages whose results this one reads (their keys enter its key).
    const UPSTREAM: &'static [&'static str];
    type Output: Serialize + DeserializeOwned + Send + Sync + 'static;
    /// Whether the stage works on the whole cohort at once. A shard of a
    /// run (`--shard I/N`) stops before the first such stage: everything
    /// before it is per capture and cached item by item.
    const COHORT_LEVEL: bool = false;

    /// The study settings the stage's results depend on, and nothing else.
    fn settings(study: &Study) -> Key;
    /// The content of the files the stage reads itself.
    fn inputs(_run: &Run) -> Key {
        crate::runner::key::combine("none", [])
    }
    /// Computes the result and a line of detail for the console.
    fn build(run: &Run, runner: &Runner) -> Result<(Self::Output, String)>;
    /// Writes the result's tables; returns every file written.
    fn write(output: &Self::Output, run: &Run, runner: &Runner) -> Result<Vec<PathBuf>>;
    /// What to say once the stage is done, from cache or not (warnings,
    /// the contrasts); nothing by default.
    fn report(_run: &Run, _runner: &Runner) {}
    /// The stage's paragraph of the methods text, from the study's settings
    /// (and its own result where the text counts something).
    fn describe(run: &Run) -> Option<String>;
}

/// A run in progress: the loaded study, the input files' content hashes,
/// and each finished stage's result and key. Results are kept by stage
/// name and read back typed ([`Run::output`]), so that this file needs to
/// know no stage and each stage knows only the stages it reads.
pub struct Run<'a> {
    pub study: &'a Study,
    /// Every file the run reads, in a fixed order, with its SHA-256 and
    /// size (`None` when it cannot be read).
    pub inputs: Vec<(PathBuf, Option<(Key, u64)>)>,
    hashes: BTreeMap<PathBuf, Key>,
    keys: BTreeMap<&'static str, Key>,
    outputs: BTreeMap<&'static str, Box<dyn Any + Send + Sync>>,
    /// The methods text, one paragraph per stage, refreshed before each
    /// stage runs (the report prints it).
    pub methods: Vec<String>,
}

impl<'a> Run<'a> {
    pub fn new(study: &'a Study, inputs: Vec<(PathBuf, Option<(Key, u64)>)>) -> Self {
        let hashes = inputs
            .iter()
            .filter_map(|(p, h)| h.map(|(k, _)| (p.clone(), k)))
            .collect();
        Run {
            study,
            inputs,
            hashes,
            keys: BTreeMap::new(),
            outputs: BTreeMap::new(),
            methods: Vec::new(),
        }
    }

    /// Where the run writes.
    pub fn out(&self) -> &Path {
        &self.study.output
    }

    /// Content hash of an input file (hashed once at the start of the run).
    pub fn hash(&self, p: &Path) -> Key {
        self.hashes
            .get(p)
            .copied()
            .unwrap_or_else(|| hash_file_or_missing(p))
    }

    pub fn hashes(&self) -> &BTreeMap<PathBuf, Key> {
        &self.hashes
    }

    /// The key of a finished stage.
    pub fn key(&self, stage: &str) -> Key {
        *self.keys.get(stage).unwrap_or_else(|| {
            panic!("stage `{stage}` has not run; the stage list is out of order")
        })
    }

    pub(super) fn set_key(&mut self, stage: &'static str, key: Key) {
        self.keys.insert(stage, key);
    }

    /// The result of stage `S`, which must have run.
    pub fn output<S: Stage>(&self) -> &S::Output {
        self.try_output::<S>().unwrap_or_else(|| {
            panic!(
                "stage `{}` has not run; the stage list is out of order",
                S::NAME
            )
        })
    }

    /// The result of stage `S`, if it has run.
    pub fn try_output<S: Stage>(&self) -> Option<&S::Output> {
        self.outputs.get(S::NAME).and_then(|b| b.downcast_ref())
    }

    pub(super) fn keep<S: Stage>(&mut self, output: S::Output) {
        self.outputs.insert(S::NAME, Box::new(output));
    }
}
