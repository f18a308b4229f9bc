//! Random streams of the replicates: one ChaCha8 stream per replicate, keyed by the cell.
//!
//! Key = SHA-256 over `b"demefix/ensemble/v1"`, the job seed (`u64` little endian), the bits
//! of the variant fitness `r = 1 + s` as stored by the model (`f64::to_bits`, little endian),
//! the start (tag byte 0 = deme, 1 = uniform, 2 = at birth, then the deme index as `u64`
//! little endian, 0 unless a deme), the rule tag byte (0 death-birth, 1 birth-death,
//! 2 Wright-Fisher) and the scope tag byte (0 deme, 1 neighbourhood, 255 for birth-death,
//! where the scope does not apply). Replicate `q` uses `ChaCha8Rng::from_seed(key)` with
//! `set_stream(q)`, so it draws from nothing but its own stream.

use crate::model::{Model, Rule, Scope};
use crate::start::Start;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use sha2::{Digest, Sha256};

/// Domain tag of the key derivation; change it (and `METHOD_VERSION`) if the recipe changes.
pub const DOMAIN_TAG: &[u8] = b"demefix/ensemble/v1";

/// The 32-byte ChaCha key of one cell (seed, fitness, start, rule, scope).
pub fn cell_key(seed: u64, model: &Model, start: Start) -> [u8; 32] {
    let mut h = Sha256::new();
    h.update(DOMAIN_TAG);
    h.update(seed.to_le_bytes());
    h.update(model.fitness().to_bits().to_le_bytes());
    let (tag, deme) = match start {
        Start::Deme(i) => (0u8, i as u64),
        Start::Uniform => (1, 0),
        Start::AtBirth => (2, 0),
    };
    h.update([tag]);
    h.update(deme.to_le_bytes());
    let rule = match model.rule() {
        Rule::DeathBirth => 0u8,
        Rule::BirthDeath => 1,
        Rule::WrightFisher => 2,
    };
    let scope = match (model.rule(), model.scope()) {
        (Rule::BirthDeath, _) => 255u8,
        (_, Scope::Deme) => 0,
        (_, Scope::Neighbourhood) => 1,
    };
    h.update([rule, scope]);
    h.finalize().into()
}

/// The stream of replicate `q` of the cell with `key`.
pub(crate) fn replicate_rng(key: &[u8; 32], q: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::from_seed(*key);
    rng.set_stream(q);
    rng
}

const SCALE: f64 = 1.0 / (1u64 << 53) as f64;

/// Uniform on `[0, 1)` from the top 53 bits of one 64-bit word.
#[inline(always)]
pub(crate) fn uniform<R: Rng>(rng: &mut R) -> f64 {
    (rng.next_u64() >> 11) as f64 * SCALE
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_of_different_replicates_differ_and_repeat() {
        let key = [7u8; 32];
        let a: Vec<u64> = (0..4).map(|_| replicate_rng(&key, 3).next_u64()).collect();
        assert!(a.windows(2).all(|w| w[0] == w[1]));
        assert_ne!(
            replicate_rng(&key, 3).next_u64(),
            replicate_rng(&key, 4).next_u64()
        );
        let mut r = replicate_rng(&key, 0);
        for _ in 0..1000 {
            let u = uniform(&mut r);
            assert!((0.0..1.0).contains(&u));
        }
    }
}
