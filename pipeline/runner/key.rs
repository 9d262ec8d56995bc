//! Cache keys: SHA-256 over labelled, length-prefixed parts, so that two
//! different sequences of parts can never produce the same byte stream.
//! Settings enter as canonical JSON of the resolved values (not the YAML
//! text), so reformatting a study file does not invalidate anything.

use std::fmt;
use std::io::Read;
use std::path::Path;

use serde::Serialize;
use sha2::{Digest, Sha256};

/// Bumped when the layout of cache entries or keys changes.
pub(crate) const CACHE_FORMAT: u32 = 2;

#[derive(
    Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize,
)]
pub struct Key(pub [u8; 32]);

impl Key {
    pub fn hex(&self) -> String {
        self.0.iter().map(|b| format!("{b:02x}")).collect()
    }

    /// The first 12 hex digits, for messages.
    pub fn short(&self) -> String {
        self.hex()[..12].to_string()
    }
}

impl fmt::Debug for Key {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Key({})", self.short())
    }
}

pub(crate) struct KeyBuilder(Sha256);

impl KeyBuilder {
    /// Every key starts from the cache format, the stage's name and its version.
    pub fn new(stage: &str, version: u32) -> Self {
        let mut k = KeyBuilder(Sha256::new());
        k.bytes("cache-format", &CACHE_FORMAT.to_le_bytes());
        k.bytes("stage", stage.as_bytes());
        k.bytes("version", &version.to_le_bytes());
        k
    }

    pub fn bytes(&mut self, label: &str, b: &[u8]) -> &mut Self {
        for part in [label.as_bytes(), b] {
            self.0.update((part.len() as u64).to_le_bytes());
            self.0.update(part);
        }
        self
    }

    pub fn key(&mut self, label: &str, k: &Key) -> &mut Self {
        self.bytes(label, &k.0)
    }

    /// A settings value, as canonical JSON (struct fields in declaration order).
    pub fn value<T: Serialize + ?Sized>(&mut self, label: &str, v: &T) -> &mut Self {
        let json = serde_json::to_vec(v).expect("settings serialise to JSON");
        self.bytes(label, &json)
    }

    pub fn finish(&self) -> Key {
        Key(self.0.clone().finalize().into())
    }
}

/// Hash of a list of keys (a stage's items, in order).
pub(crate) fn combine(label: &str, keys: impl IntoIterator<Item = Key>) -> Key {
    let mut k = KeyBuilder::new(label, 0);
    for (i, key) in keys.into_iter().enumerate() {
        k.key(&i.to_string(), &key);
    }
    k.finish()
}

/// Content hash of a file, streamed.
pub(crate) fn hash_file(path: &Path) -> std::io::Result<Key> {
    let mut f = std::fs::File::open(path)?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let n = f.read(&mut buf)?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(Key(h.finalize().into()))
}

/// Content hash of a file, or a fixed marker key for a file that cannot be
/// read (the stage that reads it reports the error; the key still changes
/// once the file appears).
pub(crate) fn hash_file_or_missing(path: &Path) -> Key {
    hash_file(path).unwrap_or_else(|e| {
        let mut k = KeyBuilder::new("unreadable-file", 0);
        k.bytes("error", format!("{:?}", e.kind()).as_bytes());
        k.finish()
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_are_length_prefixed() {
        let a = KeyBuilder::new("s", 1)
            .bytes("x", b"ab")
            .bytes("y", b"c")
            .finish();
        let b = KeyBuilder::new("s", 1)
            .bytes("x", b"a")
            .bytes("y", b"bc")
            .finish();
        assert_ne!(a, b);
        let c = KeyBuilder::new("s", 2)
            .bytes("x", b"ab")
            .bytes("y", b"c")
            .finish();
        assert_ne!(a, c);
        assert_eq!(
            a,
            KeyBuilder::new("s", 1)
                .bytes("x", b"ab")
                .bytes("y", b"c")
                .finish()
        );
    }

    #[test]
    fn file_hash_is_sha256() {
        // SHA-256("abc"), FIPS 180-2 appendix B.1.
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("abc");
        std::fs::write(&p, b"abc").unwrap();
        assert_eq!(
            hash_file(&p).unwrap().hex(),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}
