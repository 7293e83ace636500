//! Seeded random numbers owned by the library.
//!
//! candle's CPU generator cannot be seeded, so every random draw in this crate (initial
//! weights, Brownian increments, minibatch order) comes from a [`Generator`]: the ChaCha
//! stream cipher with 8 rounds, whose output is portable across platforms and whose full
//! state (seed, stream, word position) can be saved and restored.

use rand::RngCore;
use rand_distr::{Distribution, StandardNormal};

/// The library's seeded random generator (ChaCha with 8 rounds).
pub type Generator = rand_chacha::ChaCha8Rng;

/// A generator for `seed`, on an independent `stream` (use one stream per purpose).
pub fn generator(seed: u64, stream: u64) -> Generator {
    use rand::SeedableRng;
    let mut g = Generator::seed_from_u64(seed);
    g.set_stream(stream);
    g
}

/// SplitMix64's output function (Steele, Lea & Flood 2014, "Fast splittable pseudorandom
/// number generators", OOPSLA): a bijective mixer of 64-bit words.
pub(crate) fn mix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// One key from two indices (a row and a step, say).
pub(crate) fn key2(a: u64, b: u64) -> u64 {
    mix64(mix64(a) ^ b.rotate_left(29))
}

/// The generator of draw `key` (a row or path index, mixed with the step with
/// [`key2`]) for purpose `stream` under `seed`. Each key has its own ChaCha stream, so a
/// row's draws are the same however the rows are split between threads, processes or
/// minibatch chunks: the basis of results that do not depend on the process count.
pub(crate) fn keyed_generator(seed: u64, stream: u64, key: u64) -> Generator {
    use rand::SeedableRng;
    let mut g = Generator::seed_from_u64(seed);
    g.set_stream(key2(stream, key) | (1 << 63));
    g
}

/// `n` independent standard normal draws.
pub fn standard_normals(rng: &mut dyn RngCore, n: usize) -> Vec<f64> {
    (0..n)
        .map(|_| {
            let z: f64 = StandardNormal.sample(rng);
            z
        })
        .collect()
}

/// A uniform draw in `[0, 1)` with 53 random bits.
pub(crate) fn uniform(rng: &mut dyn RngCore) -> f64 {
    (rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
}

/// Streams used by the library, so that one seed gives independent draws per purpose.
pub(crate) mod streams {
    /// Initial weights.
    pub const INIT: u64 = 1;
    // 2: retired (the sequential training noise of earlier versions; not reused).
    /// Minibatch order.
    pub const DATA: u64 = 3;
    /// Training/validation split.
    pub const SPLIT: u64 = 5;
    /// Evaluation and generation draws.
    pub const EVAL: u64 = 4;
    /// Brownian increments of training rows, keyed by (step, row).
    pub const NOISE_ROWS: u64 = 6;
    /// Brownian increments of validation rows, keyed by (row, path).
    pub const EVAL_ROWS: u64 = 7;
    /// Validation subset of big tables.
    pub const VALIDATION_SUBSET: u64 = 8;
    /// Posterior paths of imputation and conditional generation, keyed by (row, path).
    pub const IMPUTE_PATHS: u64 = 9;
    /// Resampling and cell draws of imputation, keyed by row.
    pub const IMPUTE_DRAWS: u64 = 10;
    /// Which member of an ensemble generates each row, and the members' seeds.
    pub const ENSEMBLE: u64 = 11;
    /// Member of an ensemble that completes each row of each imputed draw.
    pub const ENSEMBLE_IMPUTE: u64 = 12;
}
