//! The amortised posterior control `u(z, t; y)` of the latent model.

use std::sync::Arc;

use candle_core::Tensor;
use rand::RngCore;

use super::decoder::Decoder;
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
    decoder: Arc<Decoder>,
    observation: FullGaussian,
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
        data_dim: usize,
        decoder: Arc<Decoder>,
        observation: FullGaussian,
        (sigma, t_end, alpha): (f64, f64, f64),
        pb: &ParamBuilder,
        rng: &mut dyn RngCore,
    ) -> Result<Self> {
        let mlp = TimeMlp::new(cfg, latent_dim, data_dim, pb, rng)?;
        let gain_a = pb.zeros(&[latent_dim], "score_gain_a")?;
        let gain_b = pb.constant(&[latent_dim], "score_gain_b", ((1.0 - alpha) / alpha).ln())?;
        Ok(Self {
            mlp,
            decoder,
            observation,
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
}

/// The score term is affine in `z`: with `M = PᵀP` and the decoder's linear part `W z + b`,
/// `s(z, y) = (y − b) M W − z WᵀMW`, so `g(t) ⊙ s = G ⊙ (C − z A)` with `C = (y − b) M W`
/// and `A = WᵀMW`, computed once per path instead of once per step.
impl LinearFeedback for ScoreControl {
    fn terms(&self, y: &Tensor, times: &[f64]) -> candle_core::Result<(Tensor, Tensor, Tensor)> {
        let p = self.observation.factor()?;
        let pw = p.matmul(self.decoder.linear_weight())?;
        let a = pw.t()?.matmul(&pw)?;
        let c = y
            .broadcast_sub(&self.decoder.linear_bias().unsqueeze(0)?)?
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
            .whitened_back(z, y)?
            .matmul(self.decoder.linear_weight())?;
        let gain = self.gains(&[t])?;
        self.mlp.forward(z, t, Some(y))? + score.broadcast_mul(&gain)?
    }
}
