//! The stage runner: runs each stage of a study only when something it
//! depends on changed, says why it ran, keeps every finished item on disk
//! as soon as it is done (so an interrupted run resumes where it stopped),
//! and records what it did in the run's manifest.
//!
//! A stage's key covers its name and version, its canonical settings, the
//! content hashes of the files it reads and the keys of the stages it
//! depends on (see [`key`]). Stages that work capture by capture also keep
//! one cache entry per item, keyed the same way, so a change to one capture
//! recomputes that capture only.

pub mod cache;
pub mod key;
pub mod manifest;
pub mod progress;

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Instant;

use anyhow::Result;
use serde::Serialize;
use serde::de::DeserializeOwned;

use crate::console::Printer;
use cache::{Lookup, StageRecord, Store};
use key::{Key, KeyBuilder, hash_file};
use progress::Progress;

/// What a stage's key is made of.
pub struct Parts {
    pub settings: Key,
    pub inputs: Key,
    /// (stage name, key) of each stage this one reads.
    pub upstream: Vec<(&'static str, Key)>,
}

impl Parts {
    fn named(&self) -> Vec<(String, Key)> {
        let mut v = vec![
            ("settings".to_string(), self.settings),
            ("inputs".to_string(), self.inputs),
        ];
        v.extend(self.upstream.iter().map(|(n, k)| (n.to_string(), *k)));
        v
    }

    fn key(&self, stage: &str, version: u32) -> Key {
        let mut k = KeyBuilder::new(stage, version);
        for (n, p) in self.named() {
            k.key(&n, &p);
        }
        k.finish()
    }
}

/// One stage's entry in the manifest.
#[derive(Debug, Clone, serde::Serialize)]
pub struct StageLog {
    pub stage: String,
    /// `ran` or `up to date`.
    pub status: String,
    pub reason: String,
    pub detail: String,
    pub seconds: f64,
    pub key: String,
}

/// One part of a study's per-capture work, for runs spread over several
/// processes or machines (`satstep run --shard I/N`). An item belongs to
/// shard `I` when its content key, read as a number, leaves `I - 1` over
/// `N`: the partition needs no list of items and no coordination, shards
/// never overlap, and the same item falls in the same shard on every run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// 1-based.
    pub index: usize,
    pub count: usize,
}

impl Shard {
    /// Reads `I/N` with 1 ≤ I ≤ N.
    pub fn parse(text: &str) -> std::result::Result<Shard, String> {
        let bad = || {
            format!(
                "`--shard {text}` is not a shard: write `I/N` with 1 ≤ I ≤ N, e.g. `--shard 2/4` for the second of four"
            )
        };
        let (i, n) = text.split_once('/').ok_or_else(bad)?;
        let (index, count): (usize, usize) = (
            i.trim().parse().map_err(|_| bad())?,
            n.trim().parse().map_err(|_| bad())?,
        );
        if count == 0 || index == 0 || index > count {
            return Err(bad());
        }
        Ok(Shard { index, count })
    }

    /// Whether the item with this content key is this shard's.
    pub fn holds(&self, key: &Key) -> bool {
        let mut head = [0u8; 8];
        head.copy_from_slice(&key.0[..8]);
        (u64::from_le_bytes(head) % self.count as u64) as usize == self.index - 1
    }
}

impl std::fmt::Display for Shard {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

pub struct Runner<'a> {
    pub store: Store,
    pub printer: &'a Printer,
    output: PathBuf,
    force: BTreeSet<String>,
    /// When set, only this shard's items are computed, and the run writes
    /// nothing but item cache entries (see [`Shard`]).
    shard: Option<Shard>,
    log: Mutex<Vec<StageLog>>,
    pub warnings: Mutex<Vec<String>>,
}

impl<'a> Runner<'a> {
    pub fn new(output: &Path, printer: &'a Printer, force: &[String]) -> Self {
        Runner {
            store: Store::new(output),
            printer,
            output: output.to_path_buf(),
            force: force.iter().cloned().collect(),
            shard: None,
            log: Mutex::new(vec![]),
            warnings: Mutex::new(vec![]),
        }
    }

    /// A runner that computes only `shard`'s items (see [`Shard`]).
    pub fn sharded(mut self, shard: Shard) -> Self {
        self.shard = Some(shard);
        self
    }

    pub fn shard(&self) -> Option<Shard> {
        self.shard
    }

    fn forced(&self, stage: &str) -> bool {
        self.force.contains(stage) || self.force.contains("all")
    }

    pub fn warn(&self, msg: String) {
        self.printer.warn(&msg);
        self.warnings.lock().expect("not poisoned").push(msg);
    }

    /// What each stage did so far, in order.
    pub fn log(&self) -> Vec<StageLog> {
        self.log.lock().expect("not poisoned").clone()
    }

    /// Runs `stage` unless its last result has the same key and its output
    /// files are intact. `compute` returns the result and a line of detail;
    /// `write` writes the result's tables and returns their paths.
    pub fn stage<T, C, W>(
        &self,
        stage: &str,
        version: u32,
        parts: Parts,
        compute: C,
        write: W,
    ) -> Result<(T, Key)>
    where
        T: Serialize + DeserializeOwned,
        C: FnOnce(&Self) -> Result<(T, String)>,
        W: Fn(&T, &Self) -> Result<Vec<PathBuf>>,
    {
        let t0 = Instant::now();
        let key = parts.key(stage, version);
        let area = format!("results/{stage}");
        let previous = self.store.record(stage);
        let mut reason = None;
        if self.forced(stage) {
            reason = Some("forced with --force".to_string());
        } else if let Some(rec) = previous
            .as_ref()
            .filter(|r| r.key == key.hex() && self.shard.is_none())
        {
            match self.store.get::<T>(&area, &key) {
                Lookup::Hit(value) => {
                    let changed: Vec<&String> = rec
                        .outputs
                        .iter()
                        .filter(|(p, h)| {
                            hash_file(&self.output.join(p))
                                .map(|k| k.hex() != *h)
                                .unwrap_or(true)
                        })
                        .map(|(p, _)| p)
                        .collect();
                    let detail = if changed.is_empty() {
                        String::new()
                    } else {
                        let paths = write(&value, self)?;
                        self.record(stage, &key, &parts, &paths)?;
                        format!(
                            "rewrote {} missing or altered output files from the cache",
                            changed.len()
                        )
                    };
                    self.finish(stage, "up to date", String::new(), detail, t0, &key);
                    return Ok((value, key));
                }
                Lookup::Corrupt { path, reason: why } => {
                    self.warn(format!(
                        "cache entry `{}` is unusable ({why}); recomputing `{stage}`",
                        path.display()
                    ));
                    reason = Some("its cached result was unusable".into());
                }
                Lookup::Miss => reason = Some("its cached result is missing".into()),
            }
        }
        let reason = reason.unwrap_or_else(|| explain(previous.as_ref(), &parts));
        let (value, detail) = compute(self)?;
        if let Some(shard) = self.shard {
            // A shard's stage result covers its own items only: it is
            // neither cached nor written, so that shards sharing a folder
            // never write the same file and the final run builds the whole.
            self.finish(
                stage,
                &format!("ran for shard {shard}"),
                reason,
                detail,
                t0,
                &key,
            );
            return Ok((value, key));
        }
        self.store.put(&area, &key, &value)?;
        let paths = write(&value, self)?;
        self.record(stage, &key, &parts, &paths)?;
        self.finish(stage, "ran", reason, detail, t0, &key);
        Ok((value, key))
    }

    fn record(&self, stage: &str, key: &Key, parts: &Parts, paths: &[PathBuf]) -> Result<()> {
        let mut outputs = Vec::new();
        for p in paths {
            let rel = p
                .strip_prefix(&self.output)
                .unwrap_or(p)
                .to_string_lossy()
                .replace('\\', "/");
            outputs.push((rel, hash_file(p)?.hex()));
        }
        let rec = StageRecord {
            key: key.hex(),
            parts: parts
                .named()
                .into_iter()
                .map(|(n, k)| (n, k.hex()))
                .collect(),
            outputs,
        };
        self.store.put_record(stage, &rec)
    }

    fn finish(
        &self,
        stage: &str,
        status: &str,
        reason: String,
        detail: String,
        t0: Instant,
        key: &Key,
    ) {
        let seconds = t0.elapsed().as_secs_f64();
        let mut line = format!("{stage:<13} {status}");
        if !reason.is_empty() {
            line.push_str(&format!(" ({reason})"));
        }
        if !detail.is_empty() {
            line.push_str(&format!(": {detail}"));
        }
        line.push_str(&format!(" [{seconds:.1} s]"));
        self.printer.info(line);
        self.log.lock().expect("not poisoned").push(StageLog {
            stage: stage.into(),
            status: status.into(),
            reason,
            detail,
            seconds,
            key: key.hex(),
        });
    }

    /// A finished item of stage `area`, read back from the cache (stages
    /// stream their items from disk rather than hold them all in memory).
    pub fn item<T: DeserializeOwned>(&self, area: &str, key: &Key) -> Result<T> {
        match self.store.get::<T>(&format!("items/{area}"), key) {
            Lookup::Hit(v) => Ok(v),
            Lookup::Miss => anyhow::bail!(
                "an item of `{area}` is missing from the cache under `{}`; run again with `--force {area}`",
                self.store.root().display()
            ),
            Lookup::Corrupt { path, reason } => anyhow::bail!(
                "cache entry `{}` is unusable ({reason}); run again with `--force {area}`",
                path.display()
            ),
        }
    }

    /// A per-item cache for one stage's items; `area` is the stage's name.
    pub fn items(&self, area: &str, len: usize, what: &str) -> Items<'_> {
        Items {
            runner: self,
            area: format!("items/{area}"),
            bypass: self.forced(area),
            hits: AtomicUsize::new(0),
            computed: AtomicUsize::new(0),
            failed_write: Mutex::new(None),
            bar: Progress::new(self.printer, len, what),
        }
    }
}

/// Why a stage with an earlier record must run again.
fn explain(previous: Option<&StageRecord>, parts: &Parts) -> String {
    let Some(rec) = previous else {
        return "no earlier result".into();
    };
    let changed: Vec<String> = parts
        .named()
        .into_iter()
        .filter(|(n, k)| {
            rec.parts
                .iter()
                .find(|(m, _)| m == n)
                .is_none_or(|(_, h)| *h != k.hex())
        })
        .map(|(n, _)| match n.as_str() {
            "settings" => "settings changed".to_string(),
            "inputs" => "input files changed".to_string(),
            up => format!("`{up}` changed"),
        })
        .collect();
    if changed.is_empty() {
        "stage version changed".into()
    } else {
        changed.join(", ")
    }
}

/// Item-level cache of one stage: finished items are stored at once, so an
/// interrupted run loses at most the items in flight.
pub struct Items<'r> {
    runner: &'r Runner<'r>,
    area: String,
    /// A forced stage recomputes its items (and refreshes their entries).
    bypass: bool,
    hits: AtomicUsize,
    computed: AtomicUsize,
    failed_write: Mutex<Option<anyhow::Error>>,
    bar: Progress,
}

impl Items<'_> {
    /// The cached item, if there is a usable one (a forced stage has none).
    fn cached<T: DeserializeOwned>(&self, key: &Key) -> Option<T> {
        if self.bypass {
            return None;
        }
        match self.runner.store.get::<T>(&self.area, key) {
            Lookup::Hit(v) => {
                self.hits.fetch_add(1, Ordering::Relaxed);
                self.bar.inc();
                Some(v)
            }
            Lookup::Corrupt { path, reason } => {
                self.runner.warn(format!(
                    "cache entry `{}` is unusable ({reason}); recomputing it",
                    path.display()
                ));
                None
            }
            Lookup::Miss => None,
        }
    }

    /// Whether the item with this key is computed by this run: every item,
    /// unless the run is one shard of several.
    pub fn holds(&self, key: &Key) -> bool {
        self.runner.shard.is_none_or(|s| s.holds(key))
    }

    fn computed_one(&self) {
        self.computed.fetch_add(1, Ordering::Relaxed);
        self.bar.inc();
    }

    pub fn get_or_compute<T: Serialize + DeserializeOwned>(
        &self,
        key: &Key,
        compute: impl FnOnce() -> T,
    ) -> T {
        if let Some(v) = self.cached(key) {
            return v;
        }
        let v = compute();
        if let Err(e) = self.runner.store.put(&self.area, key, &v) {
            self.failed_write
                .lock()
                .expect("not poisoned")
                .get_or_insert(e);
        }
        self.computed_one();
        v
    }

    /// As [`Items::get_or_compute`] for a computation that can fail; a
    /// failure is returned and nothing is stored.
    pub fn try_get_or_compute<T: Serialize + DeserializeOwned>(
        &self,
        key: &Key,
        compute: impl FnOnce() -> Result<T>,
    ) -> Result<T> {
        if let Some(v) = self.cached(key) {
            return Ok(v);
        }
        let v = compute()?;
        self.runner.store.put(&self.area, key, &v)?;
        self.computed_one();
        Ok(v)
    }

    /// Ends the stage's items: an error if the cache could not be written,
    /// else a line such as "48 captures: 3 computed, 45 from the cache".
    pub fn finish(self, what: &str) -> Result<String> {
        self.bar.finish();
        if let Some(e) = self.failed_write.into_inner().expect("not poisoned") {
            return Err(e.context(format!(
                "writing the cache under `{}`",
                self.runner.store.root().display()
            )));
        }
        let (h, c) = (self.hits.into_inner(), self.computed.into_inner());
        Ok(format!(
            "{} {what}: {c} computed, {h} from the cache",
            h + c
        ))
    }
}
