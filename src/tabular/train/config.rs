//! Training settings.

use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};

/// Settings of a [`crate::Trainer`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct TrainConfig {
    /// Maximum number of passes over the training rows.
    pub epochs: usize,
    /// Rows per minibatch.
    pub batch_size: usize,
    /// Smallest number of optimiser steps per epoch: on small tables an epoch makes several
    /// passes over the rows (each freshly shuffled), so early stopping and the schedule see
    /// comparable amounts of training whatever the table size.
    pub min_steps_per_epoch: usize,
    /// Peak learning rate of AdamW.
    pub learning_rate: f64,
    /// Steps of linear warm-up from 0 to the peak learning rate.
    pub warmup_steps: usize,
    /// The learning rate decays (cosine) to this fraction of the peak by the last epoch.
    pub final_lr_fraction: f64,
    /// Decoupled weight decay of AdamW.
    pub weight_decay: f64,
    /// Gradient-norm clipping threshold.
    pub max_grad_norm: f64,
    /// Share of the rows held out for validation (early stopping); 0 trains on all rows and
    /// stops on the training ELBO.
    pub validation_fraction: f64,
    /// Posterior paths per validation row (the validation ELBO averages them).
    pub validation_paths: usize,
    /// Epochs without a better validation ELBO before stopping.
    pub patience: usize,
    /// Smallest gain in validation ELBO per row that counts as better (nats).
    pub min_improvement: f64,
    /// Stop after this many seconds of training (`None`: no limit).
    pub time_budget_secs: Option<f64>,
    /// Non-finite steps tolerated (each restores the last good state and halves the
    /// learning rate) before training stops with an error.
    pub max_failures: usize,
    /// Seed of every random draw (split, minibatches, weights, noise).
    pub seed: u64,
}

impl Default for TrainConfig {
    fn default() -> Self {
        Self {
            epochs: 300,
            batch_size: 64,
            min_steps_per_epoch: 50,
            learning_rate: 3e-3,
            warmup_steps: 50,
            final_lr_fraction: 0.05,
            weight_decay: 0.0,
            max_grad_norm: 10.0,
            validation_fraction: 0.2,
            validation_paths: 4,
            patience: 30,
            min_improvement: 1e-3,
            time_budget_secs: None,
            max_failures: 5,
            seed: 0,
        }
    }
}

impl TrainConfig {
    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        if self.epochs == 0 {
            return Err(Error::config("epochs", 0, "train for at least 1 epoch"));
        }
        if self.batch_size == 0 {
            return Err(Error::config(
                "batch_size",
                0,
                "use at least 1 row per batch",
            ));
        }
        if self.min_steps_per_epoch == 0 {
            return Err(Error::config(
                "min_steps_per_epoch",
                0,
                "use at least 1 step per epoch",
            ));
        }
        check_positive("learning_rate", self.learning_rate)?;
        if !(self.final_lr_fraction > 0.0 && self.final_lr_fraction <= 1.0) {
            return Err(Error::config(
                "final_lr_fraction",
                self.final_lr_fraction,
                "must lie in (0, 1]",
            ));
        }
        if !(self.weight_decay >= 0.0 && self.weight_decay.is_finite()) {
            return Err(Error::config(
                "weight_decay",
                self.weight_decay,
                "must be finite and >= 0",
            ));
        }
        check_positive("max_grad_norm", self.max_grad_norm)?;
        if !(0.0..1.0).contains(&self.validation_fraction) {
            return Err(Error::config(
                "validation_fraction",
                self.validation_fraction,
                "must lie in [0, 1)",
            ));
        }
        if self.validation_paths == 0 {
            return Err(Error::config(
                "validation_paths",
                0,
                "use at least 1 path per row",
            ));
        }
        if !(self.min_improvement >= 0.0 && self.min_improvement.is_finite()) {
            return Err(Error::config(
                "min_improvement",
                self.min_improvement,
                "must be finite and >= 0",
            ));
        }
        if let Some(t) = self.time_budget_secs {
            check_positive("time_budget_secs", t)?;
        }
        Ok(())
    }

    /// Learning rate at optimiser step `step` (0-based) of `total` planned steps: linear
    /// warm-up, then cosine decay to `final_lr_fraction` of the peak (Loshchilov & Hutter,
    /// *SGDR*, ICLR 2017, cosine annealing).
    pub fn learning_rate_at(&self, step: u64, total: u64) -> f64 {
        let peak = self.learning_rate;
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
