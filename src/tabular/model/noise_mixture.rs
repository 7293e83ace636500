//! Observation noise that is a Gaussian mixture: `y_c = m(z) + ε` with
//! `ε ~ Σ_k π_k N(δ_k, (P_kᵀP_k)⁻¹)`.
//!
//! With the prior drift at zero and a linear decoder the model's marginal is then the
//! Gaussian mixture `Σ_k π_k N(b + δ_k, σ²T WWᵀ + Σ_k)`, so the family contains every
//! full-covariance Gaussian mixture whose covariances lie above `σ²T WWᵀ`, and the trainer
//! starts from one fitted by EM to the training rows (see
//! [`super::LatentModel::init_from_mixture`]). The mixture density network (Bishop, *Mixture
//! Density Networks*, Aston University report NCRG/94/004, 1994) is the same construction
//! with a network choosing the parameters; here the latent path moves the means and the
//! components stay fixed in shape.

use candle_core::{DType, Device, Tensor, D};

use crate::error::{Error, Result};
use crate::nn::params::{Param, ParamBuilder};

/// The mixture's parameters (under the decoder's prefix): `noise_offsets` `(M, D)`,
/// `noise_logits` `(M)`, `noise_lower` `(M, D, D)` (strictly lower part used) and
/// `noise_log_diag` `(M, D)`, so `P_k = tril(A_k, −1) + diag(exp(c_k))`.
#[derive(Clone)]
pub(crate) struct NoiseMixture {
    offsets: Param,
    logits: Param,
    lower: Param,
    log_diag: Param,
    mask: Tensor,
    eye: Tensor,
    components: usize,
    dim: usize,
}

/// A mixture's values in f64 (standardised units), for sampling and conditioning.
#[derive(Debug, Clone)]
pub(crate) struct MixtureValues {
    /// `log π_k`.
    pub(crate) log_weights: Vec<f64>,
    /// `δ_k`, `M × D`.
    pub(crate) offsets: Vec<f64>,
    /// `Σ_k = P_k⁻¹P_k⁻ᵀ`, `M × D × D`.
    pub(crate) covariances: Vec<f64>,
    /// `P_k⁻¹` (lower triangular), `M × D × D`.
    pub(crate) factors: Vec<f64>,
}

impl NoiseMixture {
    pub(crate) fn new(components: usize, dim: usize, pb: &ParamBuilder) -> Result<Self> {
        let offsets = pb.zeros(&[components, dim], "noise_offsets")?;
        let logits = pb.zeros(&[components], "noise_logits")?;
        let lower = pb.zeros(&[components, dim, dim], "noise_lower")?;
        let log_diag = pb.zeros(&[components, dim], "noise_log_diag")?;
        let mask: Vec<f64> = (0..dim * dim)
            .map(|k| if k % dim < k / dim { 1.0 } else { 0.0 })
            .collect();
        let mask = Tensor::from_vec(mask, (1, dim, dim), pb.device())?.to_dtype(pb.dtype())?;
        let eye = Tensor::eye(dim, pb.dtype(), pb.device())?.unsqueeze(0)?;
        Ok(Self {
            offsets,
            logits,
            lower,
            log_diag,
            mask,
            eye,
            components,
            dim,
        })
    }

    /// Number of free parameters of `components` components over `dim` cells.
    pub(crate) fn parameter_count(components: usize, dim: usize) -> Option<u64> {
        let (m, d) = (components as u64, dim as u64);
        m.checked_mul(d.checked_mul(d)?.checked_add(2 * d + 1)?)
    }

    /// The precision factors `P_k`, `(M, D, D)`.
    fn factors(&self) -> candle_core::Result<Tensor> {
        let diag = self
            .eye
            .broadcast_mul(&self.log_diag.exp()?.unsqueeze(1)?)?;
        self.lower.tensor().broadcast_mul(&self.mask)? + diag
    }

    /// `log π_k + log|P_k| − (D/2) log 2π`, `(M, 1)`.
    fn log_constants(&self) -> candle_core::Result<Tensor> {
        let half_log_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        let lw = candle_nn::ops::log_softmax(self.logits.tensor(), 0)?;
        (lw + self.log_diag.sum(1)?)?
            .affine(1.0, -(self.dim as f64) * half_log_2pi)?
            .unsqueeze(1)
    }

    /// `−log Σ_k π_k N(r; δ_k, Σ_k)` per row of residuals `r = y − m(z)` `(n, D)`.
    pub(crate) fn nll(&self, r: &Tensor) -> candle_core::Result<Tensor> {
        let n = r.dim(0)?;
        // (M, n, D): each component's centred residual, whitened by its factor.
        let centred = r.unsqueeze(0)?.broadcast_sub(&self.offsets.unsqueeze(1)?)?;
        let p_t = self.factors()?.transpose(1, 2)?.contiguous()?;
        let e = centred.contiguous()?.matmul(&p_t)?;
        let quad = e.sqr()?.sum(D::Minus1)?; // (M, n)
        let logp = self
            .log_constants()?
            .broadcast_sub(&quad.affine(0.5, 0.0)?)?;
        debug_assert_eq!(logp.dims(), &[self.components, n]);
        logp.log_sum_exp(0)?.neg()
    }

    /// As [`NoiseMixture::nll`] over the observed cells `observed` (row-major, `true`
    /// observed) only: each component's Gaussian is marginalised as in
    /// [`super::marginal::masked_gaussian_nll`].
    pub(crate) fn masked_nll(&self, r: &Tensor, observed: &[bool]) -> candle_core::Result<Tensor> {
        let factors = self.factors()?;
        let lw = candle_nn::ops::log_softmax(self.logits.tensor(), 0)?;
        let mut rows = Vec::with_capacity(self.components);
        for k in 0..self.components {
            let centred = r.broadcast_sub(&self.offsets.get(k)?.unsqueeze(0)?)?;
            let nll_k = super::marginal::masked_gaussian_nll(
                &factors.get(k)?,
                &centred,
                observed.to_vec(),
            )?;
            rows.push(nll_k.neg()?.broadcast_add(&lw.get(k)?)?);
        }
        Tensor::stack(&rows, 0)?.log_sum_exp(0)?.neg()
    }

    /// The mixture in f64.
    pub(crate) fn values(&self) -> Result<MixtureValues> {
        let (m, d) = (self.components, self.dim);
        let f = |t: &Tensor| -> Result<Vec<f64>> {
            Ok(t.to_dtype(DType::F64)?.flatten_all()?.to_vec1::<f64>()?)
        };
        let logits = f(self.logits.tensor())?;
        let max = logits.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let lse = max + logits.iter().map(|l| (l - max).exp()).sum::<f64>().ln();
        let p = f(&self.factors()?)?;
        let mut factors = Vec::with_capacity(m * d * d);
        let mut covariances = Vec::with_capacity(m * d * d);
        for pk in p.chunks_exact(d * d) {
            let (cov, inv) = super::marginal::covariance(pk, d).map_err(|_| Error::NonFinite {
                what: "observation noise mixture".into(),
                detail:
                    "a component's precision factor is singular; retrain with a lower learning rate"
                        .into(),
            })?;
            covariances.extend(cov);
            factors.extend(inv);
        }
        Ok(MixtureValues {
            log_weights: logits.iter().map(|l| l - lse).collect(),
            offsets: f(self.offsets.tensor())?,
            covariances,
            factors,
        })
    }

    /// Sets the mixture from weights, offsets and covariances (f64, standardised units).
    pub(crate) fn set(
        &self,
        varmap: &candle_nn::VarMap,
        prefix: &str,
        weights: &[f64],
        offsets: &[f64],
        covariances: &[f64],
    ) -> Result<()> {
        let (m, d) = (self.components, self.dim);
        let mut lower = Vec::with_capacity(m * d * d);
        let mut log_diag = Vec::with_capacity(m * d);
        for c in covariances.chunks_exact(d * d) {
            let l = crate::util::linalg::cholesky(c, d).ok_or_else(|| Error::NonFinite {
                what: "observation noise mixture".into(),
                detail: "a component's covariance is not positive definite".into(),
            })?;
            let p = crate::util::linalg::lower_triangular_inverse(&l, d).ok_or_else(|| {
                Error::NonFinite {
                    what: "observation noise mixture".into(),
                    detail: "a component's covariance is singular".into(),
                }
            })?;
            lower.extend((0..d * d).map(|k| if k % d < k / d { p[k] } else { 0.0 }));
            log_diag.extend((0..d).map(|i| p[i * d + i].ln()));
        }
        let logits: Vec<f64> = weights.iter().map(|w| w.max(1e-300).ln()).collect();
        let map = varmap
            .data()
            .lock()
            .map_err(|_| Error::Training("parameter map lock poisoned by a panic".into()))?;
        let dev = Device::Cpu;
        let put = |name: &str, v: Vec<f64>, shape: &[usize]| -> Result<()> {
            let var = map.get(&format!("{prefix}.{name}")).ok_or_else(|| {
                Error::shape(format!("parameter {prefix}.{name}"), shape, "missing")
            })?;
            var.set(&Tensor::from_vec(v, shape, &dev)?.to_dtype(var.dtype())?)?;
            Ok(())
        };
        put("noise_offsets", offsets.to_vec(), &[m, d])?;
        put("noise_logits", logits, &[m])?;
        put("noise_lower", lower, &[m, d, d])?;
        put("noise_log_diag", log_diag, &[m, d])?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    //! The untrained model started at a known two-component mixture against that mixture's
    //! closed forms: its density (Bishop, *Pattern Recognition and Machine Learning*, 2006,
    //! eq. 9.7), the marginal of a subset of cells (§2.3.2: each component's sub-covariance),
    //! its moments, and the conditional of a missing cell (per component, eqs. 2.81–2.82,
    //! weighted by the components' responsibilities for the observed cell, eq. 9.13).
    use crate::tabular::model::{LatentConfig, LatentModel};
    use crate::util::rng::generator;

    const W: [f64; 2] = [0.3, 0.7];
    const MU: [f64; 4] = [1.0, -1.0, -0.5, 0.4];
    // One wide component and one thin in the first cell.
    const C: [f64; 8] = [1.5, 0.3, 0.3, 1.0, 0.05, 0.02, 0.02, 0.5];

    fn log_normal(x: &[f64], mean: &[f64], cov: &[f64]) -> f64 {
        let d = x.len();
        let l = crate::util::linalg::cholesky(cov, d).unwrap();
        let inv = crate::util::linalg::cholesky_inverse(&l, d);
        let r: Vec<f64> = (0..d).map(|i| x[i] - mean[i]).collect();
        let q: f64 = (0..d)
            .map(|i| r[i] * (0..d).map(|j| inv[i * d + j] * r[j]).sum::<f64>())
            .sum();
        let ld = crate::util::linalg::log_det_from_cholesky(&l, d);
        -0.5 * (q + ld + d as f64 * (2.0 * std::f64::consts::PI).ln())
    }

    fn log_mixture(y: &[f64]) -> f64 {
        let p: f64 = (0..2)
            .map(|k| W[k] * log_normal(y, &MU[2 * k..2 * k + 2], &C[4 * k..4 * k + 4]).exp())
            .sum();
        p.ln()
    }

    fn model() -> LatentModel {
        let cfg = LatentConfig {
            noise_components: Some(2),
            precision: crate::util::precision::Precision::F64,
            ..LatentConfig::default()
        };
        let m = LatentModel::new(&cfg, 2, 5).unwrap();
        m.init_from_mixture(&[0.0, 0.0, 1.0, 1.0], &W, &MU, &C)
            .unwrap();
        m
    }

    /// `log mean exp` of each row's `k` log-weights, with the delta-method standard error.
    fn iw(lw: &[f64], k: usize) -> Vec<(f64, f64)> {
        lw.chunks_exact(k)
            .map(|l| {
                let max = l.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let w: Vec<f64> = l.iter().map(|v| (v - max).exp()).collect();
                let mean = w.iter().sum::<f64>() / k as f64;
                let var = w.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (k - 1) as f64;
                (max + mean.ln(), (var / k as f64).sqrt() / mean)
            })
            .collect()
    }

    #[test]
    fn the_untrained_model_is_the_mixture() {
        let m = model();
        let rows = [0.9, -0.8, -0.5, 0.5, 0.2, 0.0, -1.2, 1.1];
        let k = 2000;
        let t = m.posterior_terms(&rows, k, &mut generator(1, 0)).unwrap();
        for (r, (est, se)) in rows.chunks_exact(2).zip(iw(&t.log_weight, k)) {
            let exact = log_mixture(r);
            assert!(
                (est - exact).abs() < 4.0 * se + 2e-3,
                "row {r:?}: {est} ± {se} against {exact}"
            );
        }
        // The second cell missing (coded rows: values, then the mask).
        let coded = [0.9, 0.0, 1.0, 0.0, -0.5, 0.0, 1.0, 0.0];
        let t = m
            .posterior_terms_coded(&coded, k, &mut generator(2, 0))
            .unwrap();
        for (r, (est, se)) in coded.chunks_exact(4).zip(iw(&t.log_weight, k)) {
            let exact: f64 = (0..2)
                .map(|c| {
                    W[c] * log_normal(&r[..1], &MU[2 * c..2 * c + 1], &C[4 * c..4 * c + 1]).exp()
                })
                .sum::<f64>()
                .ln();
            assert!(
                (est - exact).abs() < 4.0 * se + 2e-3,
                "row {r:?}: {est} ± {se} against {exact}"
            );
        }
    }

    #[test]
    fn generated_rows_have_the_mixture_moments() {
        let n = 40_000;
        let y = model().generate(n, &mut generator(3, 0)).unwrap();
        for j in 0..2 {
            let mean: f64 = (0..2).map(|k| W[k] * MU[2 * k + j]).sum();
            let second: f64 = (0..2)
                .map(|k| W[k] * (C[4 * k + 3 * j] + MU[2 * k + j].powi(2)))
                .sum();
            let var = second - mean * mean;
            let col: Vec<f64> = y.iter().skip(j).step_by(2).copied().collect();
            let m = col.iter().sum::<f64>() / n as f64;
            let v = col.iter().map(|x| (x - m).powi(2)).sum::<f64>() / n as f64;
            let m4 = col.iter().map(|x| (x - m).powi(4)).sum::<f64>() / n as f64;
            assert!(
                (m - mean).abs() < 4.0 * (var / n as f64).sqrt(),
                "mean {j}: {m} vs {mean}"
            );
            let se_v = ((m4 - v * v) / n as f64).sqrt();
            assert!((v - var).abs() < 4.0 * se_v, "variance {j}: {v} vs {var}");
        }
    }

    #[test]
    fn imputed_cells_follow_the_mixture_conditional() {
        use crate::tabular::coding::RowCoder;
        use crate::tabular::fitted::TabularModel;
        use crate::tabular::scaler::Standardizer;
        use crate::tabular::schema::Schema;
        let schema = Schema::continuous(2);
        let fitted = TabularModel {
            model: model(),
            scaler: Standardizer {
                mean: vec![0.0, 0.0],
                scale: vec![1.0, 1.0],
            },
            columns: vec!["a".into(), "b".into()],
            history: Default::default(),
            coder: RowCoder::new(&schema.kinds, false),
            schema,
        };
        let y0 = [0.9, -0.3, -1.0];
        let rows = y0.iter().map(|&v| vec![v, 0.0]).collect();
        let table = crate::Table::new(vec!["a".into(), "b".into()], rows)
            .unwrap()
            .with_missing(&[(0, 1), (1, 1), (2, 1)])
            .unwrap();
        let options = crate::ImputeOptions {
            paths: 4000,
            draws: 1,
            seed: 4,
        };
        let out = fitted.impute(&table, options).unwrap();
        for (cell, &y) in out.cells.iter().zip(&y0) {
            // Responsibilities from the observed cell, then each component's conditional.
            let lr: Vec<f64> = (0..2)
                .map(|k| W[k].ln() + log_normal(&[y], &MU[2 * k..2 * k + 1], &C[4 * k..4 * k + 1]))
                .collect();
            let r = crate::tabular::model::softmax(&lr);
            let (mut mean, mut second) = (0.0, 0.0);
            for k in 0..2 {
                let c = &C[4 * k..4 * k + 4];
                let m = MU[2 * k + 1] + c[2] / c[0] * (y - MU[2 * k]);
                let v = c[3] - c[2] * c[2] / c[0];
                mean += r[k] * m;
                second += r[k] * (v + m * m);
            }
            let sd = (second - mean * mean).sqrt();
            let (got_m, got_sd) = (cell.mean.unwrap(), cell.sd.unwrap());
            // Self-normalised importance sampling over 4,000 paths: a few hundredths of a
            // standard deviation (2,000 paths gave errors up to 0.03).
            assert!(
                (got_m - mean).abs() < 0.05 * sd,
                "y0 {y}: mean {got_m} vs {mean}"
            );
            assert!(
                (got_sd / sd - 1.0).abs() < 0.05,
                "y0 {y}: sd {got_sd} vs {sd}"
            );
        }
    }
}
