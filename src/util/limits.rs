//! Sizes the crate accepts. Every configuration is checked against these before anything is
//! allocated, so a mistyped option or a hostile checkpoint header is an error that says what
//! is allowed, never an abort or an exhausted memory.

/// Most hidden units per layer of a network.
pub const MAX_WIDTH: usize = 16_384;
/// Most hidden layers of a network.
pub const MAX_DEPTH: usize = 64;
/// Most solver steps of a path.
pub const MAX_STEPS: usize = 100_000;
/// Largest latent dimension.
pub const MAX_LATENT_DIM: usize = 4_096;
/// Most components of a tabular model's observation-noise mixture.
pub const MAX_NOISE_COMPONENTS: usize = 32;
/// Most columns a tabular model fits (its full-covariance decoder grows with their square).
pub const MAX_COLUMNS: usize = 1_000;
/// Most parameters of one model (200 MB in f32; a checkpoint also keeps two optimiser
/// moments and the best weights).
pub const MAX_PARAMETERS: u64 = 50_000_000;
/// Most rows per minibatch, posterior paths per row or paths per estimate.
pub const MAX_BATCH: usize = 1_000_000;
/// Most rows one `generate_csv` call writes.
pub const MAX_GENERATED_ROWS: usize = 100_000_000;
/// Most cells one imputation call holds in memory: draws × rows × columns (2 GiB of f64).
pub const MAX_IMPUTED_VALUES: usize = 1 << 28;
/// Most values (f32 or f64) one training step may keep for backpropagation, or one
/// inference chunk may draw as noise: 2³⁰ values (4 GiB in f32).
pub const MAX_STEP_VALUES: u64 = 1 << 30;

use crate::error::{Error, Result};

/// Checks `value <= max` for the setting `field`.
pub(crate) fn at_most(field: &'static str, value: usize, max: usize, what: &str) -> Result<()> {
    if value > max {
        return Err(Error::config(
            field,
            value,
            format!("at most {max} {what} are supported"),
        ));
    }
    Ok(())
}

/// Checks a model's parameter count (`None`: it overflowed) against [`MAX_PARAMETERS`].
pub(crate) fn parameters(count: Option<u64>) -> Result<()> {
    match count {
        Some(n) if n <= MAX_PARAMETERS => Ok(()),
        n => Err(Error::config(
            "width",
            n.map_or("more than 2^64 parameters".to_string(), |n| format!("{n} parameters")),
            format!(
                "at most {MAX_PARAMETERS} parameters are supported; lower the width, depth, latent dimension or number of columns"
            ),
        )),
    }
}
