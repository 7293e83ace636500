//! Settings of a [`crate::Sampler`].

use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::schedule::OptimizerConfig;
use crate::sde::drift::MlpConfig;
use crate::sde::solver::{Scheme, SolverConfig};
use crate::util::precision::Precision;

/// Settings of a [`crate::Sampler`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SamplerConfig {
    /// Time grid (the scheme must be Euler–Maruyama for exact importance weights).
    pub solver: SolverConfig,
    /// Noise scale σ of the reference process.
    pub sigma: f64,
    /// Shape of the control network.
    pub control: MlpConfig,
    /// Paths per training step.
    pub batch_size: usize,
    /// AdamW, its schedule over [`SamplerConfig::iterations`] and gradient clipping (the
    /// same settings as the tabular trainer's). The default is a constant learning rate.
    pub optimizer: OptimizerConfig,
    /// Planned optimiser steps: what [`crate::Sampler::fit`] runs and the horizon of the
    /// learning-rate schedule.
    pub iterations: usize,
    /// Stop [`crate::Sampler::fit`] after this many seconds (`None`: no limit).
    pub time_budget_secs: Option<f64>,
    /// Non-finite steps tolerated (each goes back to the last good point and halves the
    /// learning rate) before training stops with an error.
    pub max_failures: usize,
    /// Seed of every random draw (weights and noise).
    pub seed: u64,
    /// Tensor precision.
    pub precision: Precision,
}

impl Default for SamplerConfig {
    fn default() -> Self {
        Self {
            solver: SolverConfig::default(),
            sigma: 1.0,
            control: MlpConfig::default(),
            batch_size: 256,
            optimizer: OptimizerConfig::constant(3e-3),
            iterations: 1000,
            time_budget_secs: None,
            max_failures: 5,
            seed: 0,
            precision: Precision::F32,
        }
    }
}

impl SamplerConfig {
    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        self.solver.validate()?;
        if self.solver.scheme != Scheme::EulerMaruyama {
            return Err(Error::config(
                "scheme",
                format!("{:?}", self.solver.scheme),
                "the sampler's importance weights need Euler–Maruyama",
            ));
        }
        check_positive("sigma", self.sigma)?;
        self.control.validate()?;
        if self.batch_size == 0 {
            return Err(Error::config(
                "batch_size",
                0,
                "use at least 1 path per step",
            ));
        }
        self.optimizer.validate()?;
        crate::util::limits::at_most(
            "batch_size",
            self.batch_size,
            crate::util::limits::MAX_BATCH,
            "paths per step",
        )?;
        if let Some(t) = self.time_budget_secs {
            check_positive("time_budget_secs", t)?;
        }
        Ok(())
    }
}
