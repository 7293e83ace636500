//! The starting point that makes the untrained model a given Gaussian mixture.
//!
//! With the prior drift at zero, `Z_T ~ N(0, σ²T I)`; with the linear decoder `W z + b` and
//! noise `Σ_k π_k N(δ_k, Σ_k)` the marginal is `Σ_k π_k N(b + δ_k, σ²T WWᵀ + Σ_k)`. To equal
//! the mixture `Σ_k π_k N(μ_k, C_k)` take `b = Σ_k π_k μ_k`, `δ_k = μ_k − b` and
//! `Σ_k = C_k − σ²T WWᵀ`, which needs `σ²T WWᵀ` below every `C_k` (in the Loewner order).
//! The latent part is a share `1 − α` of a common floor `F` under all the covariances: the
//! weighted harmonic mean `H = (Σ_k π_k C_k⁻¹)⁻¹`, which follows the components' shared thin
//! directions, with its eigenvalues relative to each `C_k` in turn clipped at 1 (our own
//! construction; no source).

use crate::util::linalg::{cholesky, cholesky_inverse, lower_triangular_inverse, symmetric_eigen};

/// `A X Aᵀ` for `a` and `x`, both `d × d`.
fn sandwich(a: &[f64], x: &[f64], d: usize) -> Vec<f64> {
    let mut ax = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            ax[i * d + j] = (0..d).map(|k| a[i * d + k] * x[k * d + j]).sum();
        }
    }
    let mut out = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            out[i * d + j] = (0..d).map(|k| ax[i * d + k] * a[j * d + k]).sum();
        }
    }
    out
}

/// The decoder and noise of the start (standardised units).
pub(crate) struct MixtureStart {
    /// `W`, `D × d` row-major (only the continuous cells' rows).
    pub(crate) weight: Vec<f64>,
    /// `b`, `D`.
    pub(crate) bias: Vec<f64>,
    /// `δ_k`, `M × D`.
    pub(crate) offsets: Vec<f64>,
    /// `Σ_k`, `M × D × D`.
    pub(crate) covariances: Vec<f64>,
    /// The noise's overall covariance `Σ_k π_k (Σ_k + δ_k δ_kᵀ)`, `D × D` (it sets the
    /// control's score term).
    pub(crate) pooled: Vec<f64>,
}

/// The start for mixture `weights`, `means` (`M × D`) and `covariances` (`M × D × D`) with
/// latent dimension `d`, latent scale `σ²T` and latent share `1 − alpha` of the floor. `None`
/// if a covariance is not positive definite.
pub(crate) fn mixture_start(
    weights: &[f64],
    means: &[f64],
    covariances: &[f64],
    (dim, latent): (usize, usize),
    sigma2_t: f64,
    alpha: f64,
) -> Option<MixtureStart> {
    let (m, d) = (weights.len(), dim);
    let dd = d * d;
    // H = (Σ π_k C_k⁻¹)⁻¹.
    let mut h_inv = vec![0.0; dd];
    for (k, c) in covariances.chunks_exact(dd).enumerate() {
        let inv = cholesky_inverse(&cholesky(c, d)?, d);
        h_inv
            .iter_mut()
            .zip(&inv)
            .for_each(|(a, b)| *a += weights[k] * b);
    }
    let h = cholesky_inverse(&cholesky(&h_inv, d)?, d);
    // Clip H under each C_k in turn: with C_k = L Lᵀ and L⁻¹ F L⁻ᵀ = V diag(μ) Vᵀ, the new
    // floor L V diag(min(μ, 1)) Vᵀ Lᵀ is below both F and C_k, so after the last component it
    // is below every one, and it shrinks only the directions where some component is thinner.
    let mut floor = h;
    for c in covariances.chunks_exact(dd) {
        let l = cholesky(c, d)?;
        let li = lower_triangular_inverse(&l, d)?;
        let m_k = sandwich(&li, &floor, d);
        let (mu, v) = symmetric_eigen(&m_k, d);
        let mut clipped = vec![0.0; dd];
        for i in 0..d {
            for j in 0..d {
                clipped[i * d + j] = (0..d)
                    .map(|k| v[i * d + k] * mu[k].min(1.0) * v[j * d + k])
                    .sum();
            }
        }
        floor = sandwich(&l, &clipped, d);
    }
    // A margin keeps every component's noise covariance safely positive definite.
    floor.iter_mut().for_each(|v| *v *= 0.99);
    let l = cholesky(&floor, d)?;
    let scale = ((1.0 - alpha) / sigma2_t).sqrt();
    let mut weight = vec![0.0; d * latent];
    for i in 0..d {
        for j in 0..latent.min(d) {
            weight[i * latent + j] = l[i * d + j] * scale;
        }
    }
    // σ²T WWᵀ.
    let mut latent_cov = vec![0.0; dd];
    for i in 0..d {
        for j in 0..d {
            latent_cov[i * d + j] = sigma2_t
                * (0..latent)
                    .map(|c| weight[i * latent + c] * weight[j * latent + c])
                    .sum::<f64>();
        }
    }
    let bias: Vec<f64> = (0..d)
        .map(|i| (0..m).map(|k| weights[k] * means[k * d + i]).sum())
        .collect();
    let mut offsets = Vec::with_capacity(m * d);
    let mut noise = Vec::with_capacity(m * dd);
    let mut pooled = vec![0.0; dd];
    for k in 0..m {
        let delta: Vec<f64> = (0..d).map(|i| means[k * d + i] - bias[i]).collect();
        for i in 0..d {
            for j in 0..d {
                let s = covariances[k * dd + i * d + j] - latent_cov[i * d + j];
                noise.push(s);
                pooled[i * d + j] += weights[k] * (s + delta[i] * delta[j]);
            }
        }
        offsets.extend(delta);
    }
    Some(MixtureStart {
        weight,
        bias,
        offsets,
        covariances: noise,
        pooled,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The start's marginal covariances `σ²T WWᵀ + Σ_k` and means `b + δ_k` give back the
    /// mixture (the construction above; checked by hand algebra, no source).
    #[test]
    fn start_reproduces_the_mixture() {
        let weights = [0.3, 0.7];
        let means = [1.0, -1.0, -0.5, 0.4];
        // One wide component and one thin in the first direction.
        let covs = [2.0, 0.3, 0.3, 1.0, 0.01, 0.0, 0.0, 0.5];
        let s = mixture_start(&weights, &means, &covs, (2, 3), 0.8, 0.5).unwrap();
        for k in 0..2 {
            for i in 0..2 {
                assert!((s.bias[i] + s.offsets[k * 2 + i] - means[k * 2 + i]).abs() < 1e-12);
                for j in 0..2 {
                    let lat: f64 = 0.8
                        * (0..3)
                            .map(|c| s.weight[i * 3 + c] * s.weight[j * 3 + c])
                            .sum::<f64>();
                    let got = lat + s.covariances[k * 4 + i * 2 + j];
                    assert!((got - covs[k * 4 + i * 2 + j]).abs() < 1e-12);
                }
            }
            let noise = &s.covariances[k * 4..k * 4 + 4];
            assert!(cholesky(noise, 2).is_some(), "component {k} noise not PD");
        }
        // The latent part is not empty.
        assert!(s.weight.iter().any(|w| w.abs() > 1e-3));
    }
}
