//! Training-free Monte Carlo estimate of the Föllmer drift.

use std::sync::Arc;

use candle_core::{DType, Tensor, Var};

use crate::error::{Error, Result};
use crate::sampler::target::LogDensity;
use crate::sde::drift::Drift;
use crate::util::rng::{generator, standard_normals};

/// The Föllmer drift `u*(x, t) = ∇ log Q_{1−t} f(x)`, `f = π̃/γ`, estimated by Monte Carlo.
///
/// With `y_j = x + √(1−t) Z_j` for `M` standard normals `Z_j` and
/// `ℓ_j = log π̃(y_j) + |y_j|²/2` (that is `log f(y_j)` up to a constant), the estimate is
/// `û = Σ_j ω_j ∇ℓ(y_j)` with `ω = softmax(ℓ)`: the ratio `E[∇f(y)]/E[f(y)]` computed in log
/// space, with gradients by autodiff (Huang, Jiao, Kang, Liao, Liu, Liu, *Schrödinger–Föllmer
/// sampler*, arXiv 2106.10880, 2021). The same `M` normals are used at every `(x, t)`, so the
/// estimate is a smooth deterministic function; its bias is O(1/M). Used with σ = 1 on
/// `[0, 1]` from `X_0 = 0`, `X_1` follows the target approximately. It is a reference sampler
/// for small dimensions (cost `M` target evaluations per path and step).
pub struct FollmerDrift {
    target: Arc<dyn LogDensity>,
    normals: Vec<f64>,
    samples: usize,
}

impl std::fmt::Debug for FollmerDrift {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FollmerDrift")
            .field("dim", &self.target.dim())
            .field("samples", &self.samples)
            .finish()
    }
}

impl FollmerDrift {
    /// An estimator with `samples` normals drawn from seed `seed`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `samples == 0`.
    pub fn new(target: Arc<dyn LogDensity>, samples: usize, seed: u64) -> Result<Self> {
        if samples == 0 {
            return Err(Error::config(
                "samples",
                samples,
                "use at least 1 Monte Carlo sample",
            ));
        }
        let d = target.dim();
        let normals = standard_normals(&mut generator(seed, 0), samples * d);
        Ok(Self {
            target,
            normals,
            samples,
        })
    }
}

impl Drift for FollmerDrift {
    fn dim(&self) -> usize {
        self.target.dim()
    }

    fn forward(
        &self,
        x: &Tensor,
        t: f64,
        _context: Option<&Tensor>,
    ) -> candle_core::Result<Tensor> {
        let (b, d) = x.dims2()?;
        let m = self.samples;
        let dtype = x.dtype();
        let s = (1.0 - t).max(0.0).sqrt();
        let z =
            Tensor::from_vec(self.normals.clone(), (1, m, d), x.device())?.to_dtype(DType::F64)?;
        let x64 = x.detach().to_dtype(DType::F64)?;
        let y = x64
            .unsqueeze(1)?
            .broadcast_add(&z.affine(s, 0.0)?)?
            .reshape((b * m, d))?;
        let y = Var::from_tensor(&y)?;
        let half_sq = y.as_tensor().sqr()?.sum(1)?.affine(0.5, 0.0)?;
        let ell = (self
            .target
            .log_density(&y.as_tensor().to_dtype(dtype)?)?
            .to_dtype(DType::F64)?
            + half_sq)?;
        let grads = ell.sum_all()?.backward()?;
        let grad = grads
            .get(y.as_tensor())
            .ok_or_else(|| {
                candle_core::Error::Msg("the target's log-density does not depend on x".into())
            })?
            .reshape((b, m, d))?;
        let ell = ell.detach().reshape((b, m))?;
        let w = candle_nn::ops::softmax(&ell, 1)?.unsqueeze(2)?;
        grad.broadcast_mul(&w)?.sum(1)?.to_dtype(dtype)
    }
}
