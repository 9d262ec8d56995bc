//! The run manifest: what was run, on what, with which settings, and what
//! came out. Written at the end of every run as `<output>/manifest.json`
//! and kept as `<output>/manifests/<UTC time>.json`. It is the one output
//! that differs between identical runs (times and durations).

use std::collections::BTreeMap;
use std::path::Path;

use anyhow::Result;

use super::StageLog;
use crate::tables::create_folder;
use crate::tables::write_bytes_atomic;

#[derive(Debug, Clone, serde::Serialize)]
pub(crate) struct InputFile {
    pub path: String,
    pub sha256: String,
    pub bytes: u64,
}

impl InputFile {
    /// A run's input files as the manifest lists them.
    pub fn list(inputs: &[(std::path::PathBuf, Option<(super::key::Key, u64)>)]) -> Vec<InputFile> {
        inputs
            .iter()
            .map(|(p, h)| InputFile {
                path: p.display().to_string(),
                sha256: h.map(|x| x.0.hex()).unwrap_or_else(|| "unreadable".into()),
                bytes: h.map(|x| x.1).unwrap_or(0),
            })
            .collect()
    }
}

/// The time a manifest is finished, UTC to the millisecond.
pub(crate) fn utc_now() -> String {
    chrono::Utc::now()
        .format("%Y-%m-%dT%H:%M:%S%.3fZ")
        .to_string()
}

#[derive(Debug, Clone, Default, serde::Serialize)]
pub(crate) struct CaptureCounts {
    pub listed: usize,
    /// Captures whose SO2 entered the statistics (steady, read, registered, fitted).
    pub used: usize,
    /// Not used, by reason (status from the epochs or transmissions stage).
    pub not_used: BTreeMap<String, usize>,
}

#[derive(Debug, Clone, serde::Serialize)]
pub(crate) struct Manifest {
    pub tool: &'static str,
    pub version: &'static str,
    pub cache_format: u32,
    pub finished_utc: String,
    pub command: Vec<String>,
    pub study_file: String,
    /// The study as resolved (defaults filled in, paths resolved).
    pub study: serde_json::Value,
    pub inputs: Vec<InputFile>,
    /// Seeds: the analysis draws no random numbers; a simulated study's
    /// scenario seed is recorded when `truth/` is present.
    pub seeds: BTreeMap<String, String>,
    pub stages: Vec<StageLog>,
    pub captures: CaptureCounts,
    pub warnings: Vec<String>,
    pub exit_status: i32,
}

impl Manifest {
    pub fn write(&self, output: &Path) -> Result<()> {
        let mut text = serde_json::to_vec_pretty(self)?;
        text.push(b'\n');
        write_bytes_atomic(&output.join("manifest.json"), &text)?;
        let stamp = self.finished_utc.replace([':', '-', '.'], "");
        let dir = output.join("manifests");
        create_folder(&dir)?;
        Ok(write_bytes_atomic(
            &dir.join(format!("{stamp}.json")),
            &text,
        )?)
    }
}
