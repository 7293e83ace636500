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

/// `n` independent standard normal draws.
pub fn standard_normals(rng: &mut dyn RngCore, n: usize) -> Vec<f64> {
    (0..n)
        .map(|_| {
            let z: f64 = StandardNormal.sample(rng);
            z
        })
        .collect()
}

/// Streams used by the library, so that one seed gives independent draws per purpose.
pub(crate) mod streams {
    /// Initial weights.
    pub const INIT: u64 = 1;
    /// Brownian increments during training.
    pub const NOISE: u64 = 2;
    /// Minibatch order.
    pub const DATA: u64 = 3;
    /// Training/validation split.
    pub const SPLIT: u64 = 5;
    /// Evaluation and generation draws.
    pub const EVAL: u64 = 4;
}
