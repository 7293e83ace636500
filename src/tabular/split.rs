//! Seeded training/validation split.

use rand::seq::SliceRandom;

use crate::error::{Error, Result};
use crate::util::rng::generator;

/// Splits `0..n` into `(training, validation)` indices by a seeded shuffle; the validation
/// set has `round(n · fraction)` rows (at least 1 when `fraction > 0`). Both lists are sorted.
///
/// # Errors
/// [`Error::InvalidConfig`] for a fraction outside `[0, 1)` or a split that leaves no
/// training rows.
pub(crate) fn split_rows(n: usize, fraction: f64, seed: u64) -> Result<(Vec<usize>, Vec<usize>)> {
    if !(0.0..1.0).contains(&fraction) {
        return Err(Error::config(
            "validation_fraction",
            fraction,
            "must lie in [0, 1)",
        ));
    }
    let mut idx: Vec<usize> = (0..n).collect();
    idx.shuffle(&mut generator(seed, crate::util::rng::streams::SPLIT));
    let n_val = if fraction > 0.0 {
        ((n as f64 * fraction).round() as usize).max(1)
    } else {
        0
    };
    if n_val >= n {
        return Err(Error::config(
            "validation_fraction",
            fraction,
            format!("leaves no training rows out of {n}; lower it"),
        ));
    }
    let mut val = idx[..n_val].to_vec();
    let mut train = idx[n_val..].to_vec();
    val.sort_unstable();
    train.sort_unstable();
    Ok((train, val))
}
