//! Seeded training/validation split.

use rand::seq::SliceRandom;

use crate::error::{Error, Result};
use crate::util::rng::generator;

/// Splits `0..n` into `(training, validation)` indices by a seeded shuffle; the validation
/// set has `round(n · fraction)` rows (at least 1 when `fraction > 0`): block `block` of the
/// shuffle, the rows at positions `block · n_val` to `(block + 1) · n_val`, wrapping around
/// at its end. Both lists are sorted.
///
/// # Errors
/// [`Error::InvalidConfig`] for a fraction outside `[0, 1)` or a split that leaves no
/// training rows.
pub(crate) fn split_rows(
    n: usize,
    fraction: f64,
    seed: u64,
    block: usize,
) -> Result<(Vec<usize>, Vec<usize>)> {
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
    // Rotating the shuffle puts the block first; u128 keeps a hostile block from overflowing.
    let start = ((block as u128 * n_val as u128) % n.max(1) as u128) as usize;
    idx.rotate_left(start);
    let mut val = idx[..n_val].to_vec();
    let mut train = idx[n_val..].to_vec();
    val.sort_unstable();
    train.sort_unstable();
    Ok((train, val))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blocks_of_one_shuffle_are_disjoint_and_cover_every_row() {
        // Five blocks of a fifth each partition the rows (k-fold splitting; common practice,
        // no source), and each block's training rows are the rest.
        let n = 103;
        let mut seen = vec![0; n];
        for b in 0..5 {
            let (train, val) = split_rows(n, 0.2, 7, b).unwrap();
            assert_eq!(val.len(), 21);
            assert_eq!(train.len() + val.len(), n);
            assert!(val.iter().all(|v| train.binary_search(v).is_err()));
            for &v in &val {
                seen[v] += 1;
            }
        }
        // 5 × 21 = 105 positions wrap around past the 103 rows: two rows are held out twice.
        assert!(seen.iter().all(|&c| c >= 1));
        assert_eq!(seen.iter().sum::<usize>(), 105);
        // Another seed shuffles differently; a hostile block number wraps without overflow.
        assert_ne!(
            split_rows(n, 0.2, 8, 0).unwrap().1,
            split_rows(n, 0.2, 7, 0).unwrap().1
        );
        assert_eq!(split_rows(n, 0.2, 7, usize::MAX).unwrap().1.len(), 21);
    }
}
