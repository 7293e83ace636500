//! AdamW with a state that can be saved and restored (for exact resumption).
//!
//! candle-nn's AdamW keeps its moment estimates private, so a checkpoint could not resume it
//! exactly; this implementation follows the same decoupled-weight-decay update (Loshchilov &
//! Hutter, *Decoupled Weight Decay Regularization*, ICLR 2019, Algorithm 2, with Adam's bias
//! corrections from Kingma & Ba, *Adam*, ICLR 2015, Algorithm 1) and exposes its state.

use std::collections::HashMap;

use candle_core::backprop::GradStore;
use candle_core::{DType, Tensor, Var};
use candle_nn::VarMap;
use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::params::sorted_vars;

/// AdamW hyper-parameters.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct AdamWConfig {
    /// Learning rate.
    pub learning_rate: f64,
    /// Decay of the first-moment estimate.
    pub beta1: f64,
    /// Decay of the second-moment estimate.
    pub beta2: f64,
    /// Added to the root of the second moment.
    pub eps: f64,
    /// Decoupled weight decay per unit learning rate.
    pub weight_decay: f64,
}

impl Default for AdamWConfig {
    fn default() -> Self {
        Self {
            learning_rate: 1e-3,
            beta1: 0.9,
            beta2: 0.999,
            eps: 1e-8,
            weight_decay: 0.0,
        }
    }
}

impl AdamWConfig {
    /// Checks the hyper-parameters.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        check_positive("learning_rate", self.learning_rate)?;
        check_positive("eps", self.eps)?;
        for (f, b) in [("beta1", self.beta1), ("beta2", self.beta2)] {
            if !(0.0..1.0).contains(&b) {
                return Err(Error::config(f, b, "must lie in [0, 1)"));
            }
        }
        if !(self.weight_decay >= 0.0 && self.weight_decay.is_finite()) {
            return Err(Error::config(
                "weight_decay",
                self.weight_decay,
                "must be finite and >= 0",
            ));
        }
        Ok(())
    }
}

/// Most steps AdamW takes (its bias corrections raise β to the step count as an `i32`).
const MAX_STEPS: u64 = i32::MAX as u64;

/// What one optimiser step did.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepStats {
    /// Global gradient norm before clipping.
    pub grad_norm: f64,
    /// Whether the gradient was scaled down by clipping.
    pub clipped: bool,
}

/// AdamW over all variables of a `VarMap`, in name order.
pub struct AdamW {
    vars: Vec<(String, Var)>,
    m: Vec<Tensor>,
    v: Vec<Tensor>,
    steps: u64,
    cfg: AdamWConfig,
}

impl std::fmt::Debug for AdamW {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("AdamW")
            .field("params", &self.vars.len())
            .field("steps", &self.steps)
            .field("cfg", &self.cfg)
            .finish()
    }
}

impl AdamW {
    /// An optimiser for every variable currently in `varmap`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for bad hyper-parameters.
    pub fn new(varmap: &VarMap, cfg: AdamWConfig) -> Result<Self> {
        cfg.validate()?;
        let vars = sorted_vars(varmap)?;
        let mut m = Vec::with_capacity(vars.len());
        for (_, var) in &vars {
            m.push(var.as_tensor().zeros_like()?);
        }
        let v = m.clone();
        Ok(Self {
            vars,
            m,
            v,
            steps: 0,
            cfg,
        })
    }

    /// The current learning rate.
    pub fn learning_rate(&self) -> f64 {
        self.cfg.learning_rate
    }

    /// Sets the learning rate (for schedules).
    pub fn set_learning_rate(&mut self, lr: f64) {
        self.cfg.learning_rate = lr;
    }

    /// Number of steps taken.
    pub fn steps(&self) -> u64 {
        self.steps
    }

    /// Global L2 norm of the gradients of this optimiser's variables.
    ///
    /// # Errors
    /// [`Error::Candle`] on tensor errors.
    pub fn grad_norm(&self, grads: &GradStore) -> Result<f64> {
        norm_of(&self.gradients(grads))
    }

    /// One update from `grads`, after scaling the gradient to norm at most `max_norm`
    /// (`None`: no clipping). Variables without a gradient are left unchanged.
    ///
    /// # Errors
    /// [`Error::NonFinite`] (and no update) when the gradient norm is not finite.
    pub fn step(&mut self, grads: &GradStore, max_norm: Option<f64>) -> Result<StepStats> {
        let grads = self.gradients(grads);
        self.step_with(&grads, max_norm)
    }

    /// The gradient of each variable, in the optimiser's (name) order, detached from the
    /// graph. candle does not detach the gradients of Vars: a weight gradient hᵀg still
    /// references the forward graph through h, and would keep it alive.
    pub(crate) fn gradients(&self, grads: &GradStore) -> Vec<Option<Tensor>> {
        self.vars
            .iter()
            .map(|(_, var)| grads.get(var.as_tensor()).map(Tensor::detach))
            .collect()
    }

    /// The variables' shapes and dtypes, in the optimiser's order.
    pub(crate) fn var_tensors(&self) -> impl Iterator<Item = &Tensor> {
        self.vars.iter().map(|(_, v)| v.as_tensor())
    }

    /// [`AdamW::step`] from gradients in the optimiser's order ([`AdamW::gradients`]).
    pub(crate) fn step_with(
        &mut self,
        grads: &[Option<Tensor>],
        max_norm: Option<f64>,
    ) -> Result<StepStats> {
        let norm = norm_of(grads)?;
        if !norm.is_finite() {
            return Err(Error::NonFinite {
                what: "gradient".into(),
                detail: format!(
                    "norm {norm} at optimiser step {}; the update was skipped",
                    self.steps + 1
                ),
            });
        }
        let scale = match max_norm {
            Some(c) if norm > c => c / norm,
            _ => 1.0,
        };
        if self.steps >= MAX_STEPS {
            return Err(Error::Training(format!(
                "AdamW has taken {} steps, the most it supports",
                self.steps
            )));
        }
        self.steps += 1;
        let c = &self.cfg;
        let t = self.steps as i32;
        let bc1 = 1.0 - c.beta1.powi(t);
        let bc2 = 1.0 - c.beta2.powi(t);
        for (i, (_, var)) in self.vars.iter().enumerate() {
            let Some(g) = grads.get(i).and_then(Option::as_ref) else {
                continue;
            };
            let g = g.affine(scale, 0.0)?;
            let m = ((&self.m[i] * c.beta1)? + (&g * (1.0 - c.beta1))?)?;
            let v = ((&self.v[i] * c.beta2)? + (g.sqr()? * (1.0 - c.beta2))?)?;
            let step = ((&m * (1.0 / bc1))? / ((&v * (1.0 / bc2))?.sqrt()? + c.eps)?)?;
            let theta = var.as_tensor();
            let next =
                ((theta * (1.0 - c.learning_rate * c.weight_decay))? - (step * c.learning_rate)?)?;
            var.set(&next)?;
            self.m[i] = m;
            self.v[i] = v;
        }
        Ok(StepStats {
            grad_norm: norm,
            clipped: scale < 1.0,
        })
    }

    /// The moment estimates as named tensors (`m.{name}`, `v.{name}`) for a checkpoint.
    pub fn state_tensors(&self) -> Vec<(String, Tensor)> {
        let mut out = Vec::with_capacity(2 * self.vars.len());
        for (i, (name, _)) in self.vars.iter().enumerate() {
            out.push((format!("m.{name}"), self.m[i].clone()));
            out.push((format!("v.{name}"), self.v[i].clone()));
        }
        out
    }

    /// Restores the moments and the step count saved by [`AdamW::state_tensors`].
    ///
    /// # Errors
    /// [`Error::Shape`] naming a missing or mis-shaped moment; [`Error::InvalidConfig`] for
    /// a step count above 2³¹ − 1 (the bias corrections' exponent).
    pub fn load_state(&mut self, tensors: &HashMap<String, Tensor>, steps: u64) -> Result<()> {
        if steps > MAX_STEPS {
            return Err(Error::config(
                "optimizer_steps",
                steps,
                format!("at most {MAX_STEPS} AdamW steps are supported"),
            ));
        }
        let mut m = Vec::with_capacity(self.vars.len());
        let mut v = Vec::with_capacity(self.vars.len());
        for (name, var) in &self.vars {
            for (prefix, out) in [("m", &mut m), ("v", &mut v)] {
                let key = format!("{prefix}.{name}");
                let t = tensors.get(&key).ok_or_else(|| {
                    Error::shape(format!("optimiser moment {key}"), var.dims(), "missing")
                })?;
                if t.dims() != var.dims() {
                    return Err(Error::shape(
                        format!("optimiser moment {key}"),
                        var.dims(),
                        t.dims(),
                    ));
                }
                out.push(t.to_dtype(var.dtype())?);
            }
        }
        self.m = m;
        self.v = v;
        self.steps = steps;
        Ok(())
    }
}

/// Global L2 norm of a list of gradients (missing ones count as zero).
fn norm_of(grads: &[Option<Tensor>]) -> Result<f64> {
    let mut sq = 0.0;
    for g in grads.iter().flatten() {
        sq += g
            .sqr()?
            .sum_all()?
            .to_dtype(DType::F64)?
            .to_scalar::<f64>()?;
    }
    Ok(sq.sqrt())
}
