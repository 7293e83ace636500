//! Small dense f64 linear algebra (row-major) for closed-form baselines and targets.

/// Lower Cholesky factor `L` with `A = L Lᵀ`, or `None` if `A` is not positive definite.
pub(crate) fn cholesky(a: &[f64], n: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..=i {
            let mut s = a[i * n + j];
            for k in 0..j {
                s -= l[i * n + k] * l[j * n + k];
            }
            if i == j {
                if s.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) || !s.is_finite() {
                    return None;
                }
                l[i * n + i] = s.sqrt();
            } else {
                l[i * n + j] = s / l[j * n + j];
            }
        }
    }
    Some(l)
}

/// `A⁻¹` from the Cholesky factor `L` of `A`.
pub(crate) fn cholesky_inverse(l: &[f64], n: usize) -> Vec<f64> {
    // Solve L Lᵀ X = I column by column.
    let mut inv = vec![0.0; n * n];
    for c in 0..n {
        let mut y = vec![0.0; n];
        for i in 0..n {
            let mut s = if i == c { 1.0 } else { 0.0 };
            for k in 0..i {
                s -= l[i * n + k] * y[k];
            }
            y[i] = s / l[i * n + i];
        }
        for i in (0..n).rev() {
            let mut s = y[i];
            for k in i + 1..n {
                s -= l[k * n + i] * inv[k * n + c];
            }
            inv[i * n + c] = s / l[i * n + i];
        }
    }
    inv
}

/// `log det A` from its Cholesky factor.
pub(crate) fn log_det_from_cholesky(l: &[f64], n: usize) -> f64 {
    2.0 * (0..n).map(|i| l[i * n + i].ln()).sum::<f64>()
}

/// Inverse of a lower-triangular matrix (forward substitution); `None` if a diagonal entry
/// is zero or not finite.
pub(crate) fn lower_triangular_inverse(l: &[f64], n: usize) -> Option<Vec<f64>> {
    let mut inv = vec![0.0; n * n];
    for c in 0..n {
        for i in c..n {
            let mut s = if i == c { 1.0 } else { 0.0 };
            for k in c..i {
                s -= l[i * n + k] * inv[k * n + c];
            }
            let d = l[i * n + i];
            if d == 0.0 || !d.is_finite() {
                return None;
            }
            inv[i * n + c] = s / d;
        }
    }
    Some(inv)
}

/// The block of `a` (`n × n`, row-major) on rows and columns `idx`, its inverse and its
/// Cholesky factor (both `k × k` for `k = idx.len()`), or `None` if the block is not positive
/// definite.
pub(crate) fn block_inverse(a: &[f64], n: usize, idx: &[usize]) -> Option<(Vec<f64>, Vec<f64>)> {
    let k = idx.len();
    let mut s = vec![0.0; k * k];
    for (p, &i) in idx.iter().enumerate() {
        for (q, &j) in idx.iter().enumerate() {
            s[p * k + q] = a[i * n + j];
        }
    }
    let l = cholesky(&s, k)?;
    Some((cholesky_inverse(&l, k), l))
}
