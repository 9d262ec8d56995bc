//! The on-disk cache under `<output>/cache/`: one file per entry, named by
//! its key, written atomically. An entry starts with a magic, the cache
//! format, its own key and the SHA-256 of its payload, so that a truncated
//! or altered file, or one copied under another key's name, is recognised
//! and recomputed instead of trusted.
//!
//! Layout: `cache/<area>/<key>.bin` for results (area = stage or item kind)
//! and `cache/stages/<stage>.json` for each stage's last record (its key
//! parts and the hashes of the files it wrote), which is what lets a run
//! say why a stage ran.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use serde::Serialize;
use serde::de::DeserializeOwned;
use sha2::{Digest, Sha256};

use super::key::{CACHE_FORMAT, Key};
use crate::tables::create_folder;
use crate::tables::write_bytes_atomic;

const MAGIC: &[u8; 8] = b"satstep\x01";

/// Magic, format, key, payload checksum.
const HEADER: usize = 8 + 4 + 32 + 32;

pub struct Store {
    root: PathBuf,
}

/// What a lookup found.
pub enum Lookup<T> {
    Hit(T),
    Miss,
    /// The entry exists but cannot be trusted; it has been removed.
    Corrupt {
        path: PathBuf,
        reason: String,
    },
}

impl Store {
    pub fn new(output: &Path) -> Self {
        Store {
            root: output.join("cache"),
        }
    }

    pub fn root(&self) -> &Path {
        &self.root
    }

    fn entry(&self, area: &str, key: &Key) -> PathBuf {
        self.root.join(area).join(format!("{}.bin", key.hex()))
    }

    pub fn get<T: DeserializeOwned>(&self, area: &str, key: &Key) -> Lookup<T> {
        let path = self.entry(area, key);
        let Ok(bytes) = std::fs::read(&path) else {
            return Lookup::Miss;
        };
        match decode(&bytes, key) {
            Ok(v) => Lookup::Hit(v),
            Err(reason) => {
                let _ = std::fs::remove_file(&path);
                Lookup::Corrupt {
                    path,
                    reason: reason.to_string(),
                }
            }
        }
    }

    pub fn put<T: Serialize>(&self, area: &str, key: &Key, value: &T) -> Result<()> {
        let payload = postcard::to_stdvec(value).context("encoding a cache entry")?;
        let mut bytes = Vec::with_capacity(payload.len() + HEADER);
        bytes.extend_from_slice(MAGIC);
        bytes.extend_from_slice(&CACHE_FORMAT.to_le_bytes());
        bytes.extend_from_slice(&key.0);
        bytes.extend_from_slice(&Sha256::digest(&payload));
        bytes.extend_from_slice(&payload);
        let path = self.entry(area, key);
        create_folder(path.parent().expect("entry has a folder"))?;
        Ok(write_bytes_atomic(&path, &bytes)?)
    }

    fn record_path(&self, stage: &str) -> PathBuf {
        self.root.join("stages").join(format!("{stage}.json"))
    }

    /// The stage's last record, if one can be read.
    pub fn record(&self, stage: &str) -> Option<StageRecord> {
        let text = std::fs::read(self.record_path(stage)).ok()?;
        serde_json::from_slice(&text).ok()
    }

    pub fn put_record(&self, stage: &str, rec: &StageRecord) -> Result<()> {
        let path = self.record_path(stage);
        create_folder(path.parent().expect("record has a folder"))?;
        let mut text = serde_json::to_vec_pretty(rec)?;
        text.push(b'\n');
        Ok(write_bytes_atomic(&path, &text)?)
    }
}

/// Why a cache entry cannot be used (it is then recomputed).
#[derive(Debug, thiserror::Error)]
enum EntryError {
    #[error("not a satstep cache entry (bad header)")]
    Header,
    #[error("cache format {0}, this version reads {CACHE_FORMAT}")]
    Format(u32),
    #[error("checksum mismatch (truncated or altered)")]
    Checksum,
    #[error("it holds the entry of another key (copied or renamed)")]
    OtherKey,
    #[error("cannot decode: {0}")]
    Decode(#[from] postcard::Error),
}

fn decode<T: DeserializeOwned>(bytes: &[u8], key: &Key) -> std::result::Result<T, EntryError> {
    if bytes.len() < 12 || &bytes[..8] != MAGIC {
        return Err(EntryError::Header);
    }
    let format = u32::from_le_bytes(bytes[8..12].try_into().expect("4 bytes"));
    if format != CACHE_FORMAT {
        return Err(EntryError::Format(format));
    }
    if bytes.len() < HEADER {
        return Err(EntryError::Header);
    }
    if bytes[12..44] != key.0 {
        return Err(EntryError::OtherKey);
    }
    let payload = &bytes[HEADER..];
    if Sha256::digest(payload).as_slice() != &bytes[44..HEADER] {
        return Err(EntryError::Checksum);
    }
    Ok(postcard::from_bytes(payload)?)
}

/// What a stage recorded the last time it finished: its key and the parts
/// the key was made of, and the files it wrote with their hashes.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StageRecord {
    pub key: String,
    /// (part name, hash) in order: settings, inputs, each upstream stage.
    pub parts: Vec<(String, String)>,
    /// (path relative to the output folder, SHA-256).
    pub outputs: Vec<(String, String)>,
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::runner::key::KeyBuilder;

    #[test]
    fn round_trip_and_corruption() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = KeyBuilder::new("t", 1).finish();
        let value = (vec![1.5_f64, f64::NAN, -0.0], "x".to_string(), Some(3_i64));
        store.put("area", &key, &value).unwrap();
        let Lookup::Hit(back): Lookup<(Vec<f64>, String, Option<i64>)> = store.get("area", &key)
        else {
            panic!("expected a hit")
        };
        assert_eq!(back.0[0].to_bits(), 1.5_f64.to_bits());
        assert!(back.0[1].is_nan());
        assert_eq!(back.0[2].to_bits(), (-0.0_f64).to_bits());
        // Flip one payload byte: the checksum catches it and the entry goes.
        let path = store.entry("area", &key);
        let mut bytes = std::fs::read(&path).unwrap();
        let last = bytes.len() - 1;
        bytes[last] ^= 0xff;
        std::fs::write(&path, &bytes).unwrap();
        assert!(matches!(
            store.get::<(Vec<f64>, String, Option<i64>)>("area", &key),
            Lookup::Corrupt { .. }
        ));
        assert!(!path.exists());
        assert!(matches!(
            store.get::<(Vec<f64>, String, Option<i64>)>("area", &key),
            Lookup::Miss
        ));
    }

    #[test]
    fn an_entry_under_another_keys_name_is_rejected() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let (a, b) = (
            KeyBuilder::new("a", 1).finish(),
            KeyBuilder::new("b", 1).finish(),
        );
        store.put("area", &a, &1_i64).unwrap();
        store.put("area", &b, &2_i64).unwrap();
        // A's entry copied over B's: intact, checksummed, and wrong.
        std::fs::copy(store.entry("area", &a), store.entry("area", &b)).unwrap();
        match store.get::<i64>("area", &b) {
            Lookup::Corrupt { reason, .. } => {
                assert!(reason.contains("another key"), "{reason}")
            }
            _ => panic!("an entry under another key's name was trusted"),
        }
        assert!(matches!(store.get::<i64>("area", &a), Lookup::Hit(1)));
    }
}
