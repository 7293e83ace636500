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

/// Eigenvalues and eigenvectors of a symmetric matrix `a` (`n × n`, row-major) by cyclic
/// Jacobi rotations (Golub & Van Loan, *Matrix Computations*, 4th ed., 2013, §8.5.3): the
/// values, and the vectors as the columns of an `n × n` row-major matrix, so
/// `a = V diag(λ) Vᵀ`.
pub(crate) fn symmetric_eigen(a: &[f64], n: usize) -> (Vec<f64>, Vec<f64>) {
    let mut m = a.to_vec();
    let mut v = vec![0.0; n * n];
    for i in 0..n {
        v[i * n + i] = 1.0;
    }
    let norm: f64 = m.iter().map(|x| x * x).sum::<f64>().sqrt();
    for _sweep in 0..100 {
        let off: f64 = (0..n)
            .flat_map(|i| (0..n).filter(move |&j| j != i).map(move |j| (i, j)))
            .map(|(i, j)| m[i * n + j] * m[i * n + j])
            .sum::<f64>()
            .sqrt();
        if off <= 1e-15 * norm || off == 0.0 {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = m[p * n + q];
                if apq == 0.0 {
                    continue;
                }
                let theta = (m[q * n + q] - m[p * n + p]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let (mkp, mkq) = (m[k * n + p], m[k * n + q]);
                    m[k * n + p] = c * mkp - s * mkq;
                    m[k * n + q] = s * mkp + c * mkq;
                }
                for k in 0..n {
                    let (mpk, mqk) = (m[p * n + k], m[q * n + k]);
                    m[p * n + k] = c * mpk - s * mqk;
                    m[q * n + k] = s * mpk + c * mqk;
                }
                for k in 0..n {
                    let (vkp, vkq) = (v[k * n + p], v[k * n + q]);
                    v[k * n + p] = c * vkp - s * vkq;
                    v[k * n + q] = s * vkp + c * vkq;
                }
            }
        }
    }
    ((0..n).map(|i| m[i * n + i]).collect(), v)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `[[2, 1], [1, 2]]` has eigenvalues 1 and 3 with eigenvectors `(1, ∓1)/√2` (the
    /// characteristic polynomial `(2 − λ)² − 1`; textbook), and a larger symmetric matrix is
    /// rebuilt from its decomposition with orthonormal vectors.
    #[test]
    fn jacobi_eigen_decomposes() {
        let (mut vals, _) = symmetric_eigen(&[2.0, 1.0, 1.0, 2.0], 2);
        vals.sort_by(f64::total_cmp);
        assert!((vals[0] - 1.0).abs() < 1e-14 && (vals[1] - 3.0).abs() < 1e-14);
        let n = 6;
        let a: Vec<f64> = (0..n * n)
            .map(|k| {
                let (i, j) = (k / n, k % n);
                ((i * j) as f64).sin() + ((i + j) as f64).cos() + if i == j { 3.0 } else { 0.0 }
            })
            .collect();
        let (vals, v) = symmetric_eigen(&a, n);
        for i in 0..n {
            for j in 0..n {
                let back: f64 = (0..n).map(|k| v[i * n + k] * vals[k] * v[j * n + k]).sum();
                assert!((back - a[i * n + j]).abs() < 1e-12, "A[{i}{j}]");
                let dot: f64 = (0..n).map(|k| v[k * n + i] * v[k * n + j]).sum();
                assert!((dot - if i == j { 1.0 } else { 0.0 }).abs() < 1e-12);
            }
        }
    }
}
