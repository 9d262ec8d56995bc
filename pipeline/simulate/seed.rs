//! Seeds derived from names, never from thread order or time, so that a
//! simulated study is the same bytes whatever `--jobs` says.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use sha2::{Digest, Sha256};

/// A generator seeded by the master seed and a path of names.
pub(crate) fn rng_for(master: u64, names: &[&str]) -> ChaCha8Rng {
    let mut h = Sha256::new();
    h.update(master.to_le_bytes());
    for n in names {
        h.update((n.len() as u64).to_le_bytes());
        h.update(n.as_bytes());
    }
    let d = h.finalize();
    let mut seed = [0u8; 32];
    seed.copy_from_slice(&d[..32]);
    ChaCha8Rng::from_seed(seed)
}
