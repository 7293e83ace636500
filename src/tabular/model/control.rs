//! The amortised posterior control `u(z, t; y)` of the latent model.

use std::sync::Arc;

use candle_core::Tensor;
use rand::RngCore;

use super::layout::RowLayout;
use super::observation::FullGaussian;
use crate::error::Result;
use crate::nn::params::{Param, ParamBuilder};
use crate::sde::drift::{Drift, FusedForm, LinearFeedback, MlpConfig, Sealed, TimeMlp};

/// `u(z, t; y) = MLP(z, t, y) + g(t) ⊙ s(z, y)` with the score of the decoder's linear part
/// `s = Wᵀ PᵀP (y − W z − b) = ∇_z log p(y | z)` and a learned per-dimension gain
/// `g(t) = σ² / (exp(a) + exp(b) (1 − t/T))`.
///
/// The optimal control is `σ² ∇_z log E[p(y | Z_T) | Z_t = z]` (Hopf–Cole transform; Fleming
/// & Soner 2006, *Controlled Markov Processes and Viscosity Solutions*, ch. VI, from memory).
/// For the initial model (zero prior drift, linear decoder with `W Wᵀ σ² T = (1 − α) Σ`,
/// noise covariance `α Σ`) it equals `s(z, y) σ² / (1 + ((1 − α)/α)(1 − t/T))` exactly, so
/// with `a = 0`, `b = log((1 − α)/α)` and the network's output layer at zero the control
/// starts at the optimum and training learns only the remainder. Feeding a score to the
/// control network follows Zhang & Chen, *Path Integral Sampler*, ICLR 2022.
#[derive(Clone)]
pub(crate) struct ScoreControl {
    mlp: TimeMlp,
    observation: FullGaussian,
    layout: Arc<RowLayout>,
    gain_a: Param,
    gain_b: Param,
    sigma2: f64,
    t_end: f64,
}

impl ScoreControl {
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn new(
        cfg: &MlpConfig,
        latent_dim: usize,
        layout: Arc<RowLayout>,
        observation: FullGaussian,
        (sigma, t_end, alpha): (f64, f64, f64),
        pb: &ParamBuilder,
        rng: &mut dyn RngCore,
    ) -> Result<Self> {
        let mlp = TimeMlp::new(cfg, latent_dim, layout.context_width(), pb, rng)?;
        let gain_a = pb.zeros(&[latent_dim], "score_gain_a")?;
        let gain_b = pb.constant(&[latent_dim], "score_gain_b", ((1.0 - alpha) / alpha).ln())?;
        Ok(Self {
            mlp,
            observation,
            layout,
            gain_a,
            gain_b,
            sigma2: sigma * sigma,
            t_end,
        })
    }
}

impl ScoreControl {
    /// The gain `g(t) = σ² / (exp(a) + exp(b) (1 − t/T))` at each of `times`, `(n, d)`.
    fn gains(&self, times: &[f64]) -> candle_core::Result<Tensor> {
        let rest: Vec<f64> = times.iter().map(|t| 1.0 - t / self.t_end).collect();
        let rest = Tensor::from_vec(rest, (times.len(), 1), self.gain_a.device())?
            .to_dtype(self.gain_a.dtype())?;
        let a = self.gain_a.exp()?.unsqueeze(0)?;
        let b = self.gain_b.exp()?.unsqueeze(0)?;
        a.broadcast_add(&rest.broadcast_mul(&b)?)?
            .recip()?
            .affine(self.sigma2, 0.0)
    }

    /// The continuous cells of context rows `y`.
    fn continuous(&self, y: &Tensor) -> candle_core::Result<Tensor> {
        let dc = self.layout.continuous;
        if y.dim(1)? == dc {
            Ok(y.clone())
        } else {
            y.narrow(1, 0, dc)
        }
    }

    /// This control for the whole coded rows `y` (mask included) of which some continuous
    /// cells are missing (see [`MaskedControl`]).
    pub(crate) fn masked(&self, y: &Tensor) -> candle_core::Result<MaskedControl<'_>> {
        let l = &self.layout;
        let dc = l.continuous;
        let n = y.dim(0)?;
        let mask = y
            .narrow(1, l.output_width(), dc)?
            .to_dtype(candle_core::DType::F64)?
            .flatten_all()?
            .to_vec1::<f64>()?;
        let p = self
            .observation
            .factor()?
            .to_dtype(candle_core::DType::F64)?
            .flatten_all()?
            .to_vec1::<f64>()?;
        let cov = crate::util::linalg::lower_triangular_inverse(&p, dc)
            .map(|pinv| {
                let mut c = vec![0.0; dc * dc];
                for i in 0..dc {
                    for j in 0..dc {
                        c[i * dc + j] = (0..dc).map(|k| pinv[i * dc + k] * pinv[j * dc + k]).sum();
                    }
                }
                c
            })
            .ok_or_else(|| {
                candle_core::Error::Msg("the observation precision factor is singular".into())
            })?;
        let mut cache: std::collections::HashMap<Vec<bool>, Vec<f64>> = Default::default();
        let mut q = Vec::with_capacity(n * dc * dc);
        for row in mask.chunks_exact(dc) {
            let pattern: Vec<bool> = row.iter().map(|&m| m > 0.5).collect();
            if !cache.contains_key(&pattern) {
                let block = observed_precision(&cov, dc, &pattern).ok_or_else(|| {
                    candle_core::Error::Msg(
                        "the observed cells' noise covariance is singular".into(),
                    )
                })?;
                cache.insert(pattern.clone(), block);
            }
            q.extend_from_slice(&cache[&pattern]);
        }
        let q = Tensor::from_vec(q, (n, dc, dc), y.device())?.to_dtype(y.dtype())?;
        Ok(MaskedControl {
            control: self,
            precision: q,
        })
    }
}

/// The score term is affine in `z`: with `M = PᵀP` and the decoder's linear part `W z + b`,
/// `s(z, y) = (y − b) M W − z WᵀMW`, so `g(t) ⊙ s = G ⊙ (C − z A)` with `C = (y − b) M W`
/// and `A = WᵀMW`, computed once per path instead of once per step.
impl LinearFeedback for ScoreControl {
    fn terms(&self, y: &Tensor, times: &[f64]) -> candle_core::Result<(Tensor, Tensor, Tensor)> {
        let p = self.observation.factor()?;
        let pw = p.matmul(&self.observation.linear_weight_c()?)?;
        let a = pw.t()?.matmul(&pw)?;
        let c = self
            .continuous(y)?
            .broadcast_sub(&self.observation.linear_bias_c()?.unsqueeze(0)?)?
            .matmul(&p.t()?)?
            .matmul(&pw)?;
        Ok((c, a, self.gains(times)?))
    }
}

impl Drift for ScoreControl {
    fn dim(&self) -> usize {
        self.mlp.dim()
    }

    fn fused_form(&self, _token: Sealed) -> Option<FusedForm<'_>> {
        Some(FusedForm {
            network: self.mlp.parts(),
            feedback: Some(self),
        })
    }

    fn context_dim(&self) -> usize {
        self.mlp.context_dim()
    }

    fn forward(&self, z: &Tensor, t: f64, y: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let y = y.ok_or_else(|| {
            candle_core::Error::Msg("the posterior control needs the observed row".into())
        })?;
        let score = self
            .observation
            .whitened_back(z, &self.continuous(y)?)?
            .matmul(&self.observation.linear_weight_c()?)?;
        let gain = self.gains(&[t])?;
        self.mlp.forward(z, t, Some(y))? + score.broadcast_mul(&gain)?
    }
}

/// `E_o Σ_oo⁻¹ E_oᵀ`: the inverse of the observed cells' block of `cov`, embedded in a
/// `D × D` matrix with zeros on the missing cells' rows and columns.
fn observed_precision(cov: &[f64], d: usize, observed: &[bool]) -> Option<Vec<f64>> {
    let o: Vec<usize> = (0..d).filter(|&j| observed[j]).collect();
    let k = o.len();
    let mut out = vec![0.0; d * d];
    if k == 0 {
        return Some(out);
    }
    let (inv, _) = crate::util::linalg::block_inverse(cov, d, &o)?;
    for (a, &i) in o.iter().enumerate() {
        for (b, &j) in o.iter().enumerate() {
            out[i * d + j] = inv[a * k + b];
        }
    }
    Some(out)
}

/// The control for whole coded rows (mask included) of which some continuous cells are
/// missing. The network reads the row's first [`RowLayout::context_width`] values; the score
/// term is that of the observed cells' marginal, `s = W_oᵀ Σ_oo⁻¹ (y_o − W_o z − b_o)` with
/// the noise covariance `Σ = (PᵀP)⁻¹`. For the initial model this makes the control the exact
/// optimal one for every missingness pattern, as for complete rows (the marginal of `y_o`
/// given `Z_t` is Gaussian with covariance `Σ_oo + σ²(T − t) W_o W_oᵀ ∝ Σ_oo`). The matrix
/// `E_o Σ_oo⁻¹ E_oᵀ` is computed per pattern when the control is made and is not
/// differentiated (any control gives a valid bound; training still adjusts `P` through the
/// likelihood). It has no fused form: the affine part differs between rows.
pub(crate) struct MaskedControl<'a> {
    control: &'a ScoreControl,
    /// `E_o Σ_oo⁻¹ E_oᵀ` per row, `(n, D_c, D_c)`.
    precision: Tensor,
}

impl Drift for MaskedControl<'_> {
    fn dim(&self) -> usize {
        self.control.dim()
    }

    fn context_dim(&self) -> usize {
        self.control.layout.coded_width()
    }

    fn forward(&self, z: &Tensor, t: f64, y: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let c = self.control;
        let y = y.ok_or_else(|| {
            candle_core::Error::Msg("the posterior control needs the observed row".into())
        })?;
        let l = &c.layout;
        let y_c = y.narrow(1, 0, l.continuous)?;
        let r = (y_c - c.observation.gaussian_linear_mean(z)?)?;
        let score = r
            .unsqueeze(1)?
            .matmul(&self.precision)?
            .squeeze(1)?
            .matmul(&c.observation.linear_weight_c()?)?;
        let gain = c.gains(&[t])?;
        let context = y.narrow(1, 0, l.context_width())?;
        c.mlp.forward(z, t, Some(&context))? + score.broadcast_mul(&gain)?
    }
}
