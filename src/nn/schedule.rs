//! The optimiser settings both trainers share: AdamW, a learning-rate schedule and gradient
//! clipping.

use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::optim::AdamWConfig;

/// AdamW with linear warm-up, cosine decay and gradient-norm clipping: the settings of
/// [`crate::Trainer`] (flattened into [`crate::TrainConfig`]) and of [`crate::Sampler`].
///
/// The learning rate at step `k` of `K` planned steps is
/// [`OptimizerConfig::learning_rate_at`]; `adamw.learning_rate` is its peak.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct OptimizerConfig {
    /// AdamW's hyper-parameters (`learning_rate` is the schedule's peak).
    #[serde(flatten)]
    pub adamw: AdamWConfig,
    /// Steps of linear warm-up from 0 to the peak learning rate.
    pub warmup_steps: usize,
    /// The learning rate decays (cosine) to this fraction of the peak by the last planned
    /// step; 1 keeps it constant.
    pub final_lr_fraction: f64,
    /// Gradient-norm clipping threshold (`None`: no clipping).
    pub max_grad_norm: Option<f64>,
}

impl Default for OptimizerConfig {
    fn default() -> Self {
        Self {
            adamw: AdamWConfig {
                learning_rate: 3e-3,
                ..AdamWConfig::default()
            },
            warmup_steps: 50,
            final_lr_fraction: 0.05,
            max_grad_norm: Some(10.0),
        }
    }
}

impl OptimizerConfig {
    /// A constant learning rate `lr` with no warm-up, clipped at gradient norm 10.
    pub fn constant(lr: f64) -> Self {
        Self {
            adamw: AdamWConfig {
                learning_rate: lr,
                ..AdamWConfig::default()
            },
            warmup_steps: 0,
            final_lr_fraction: 1.0,
            max_grad_norm: Some(10.0),
        }
    }

    /// The peak learning rate.
    pub fn learning_rate(&self) -> f64 {
        self.adamw.learning_rate
    }

    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        self.adamw.validate()?;
        if !(self.final_lr_fraction > 0.0 && self.final_lr_fraction <= 1.0) {
            return Err(Error::config(
                "final_lr_fraction",
                self.final_lr_fraction,
                "must lie in (0, 1]",
            ));
        }
        if let Some(c) = self.max_grad_norm {
            check_positive("max_grad_norm", c)?;
        }
        Ok(())
    }

    /// Learning rate at optimiser step `step` (0-based) of `total` planned steps: linear
    /// warm-up, then cosine decay to `final_lr_fraction` of the peak (Loshchilov & Hutter,
    /// *SGDR*, ICLR 2017, cosine annealing). Past `total` it stays at the final value.
    ///
    /// # Example
    /// ```
    /// use neural_sde::OptimizerConfig;
    /// let c = OptimizerConfig { warmup_steps: 10, final_lr_fraction: 0.1, ..Default::default() };
    /// let peak = c.learning_rate();
    /// assert_eq!(c.learning_rate_at(9, 110), peak); // end of warm-up
    /// assert!((c.learning_rate_at(60, 110) - 0.55 * peak).abs() < 1e-12); // half-way
    /// assert!((c.learning_rate_at(110, 110) - 0.1 * peak).abs() < 1e-12);
    /// ```
    pub fn learning_rate_at(&self, step: u64, total: u64) -> f64 {
        let peak = self.adamw.learning_rate;
        let w = self.warmup_steps as u64;
        if step < w {
            return peak * (step + 1) as f64 / w as f64;
        }
        let span = total.saturating_sub(w).max(1) as f64;
        let p = ((step - w) as f64 / span).min(1.0);
        let lo = peak * self.final_lr_fraction;
        lo + 0.5 * (peak - lo) * (1.0 + (std::f64::consts::PI * p).cos())
    }
}
