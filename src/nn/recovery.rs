//! Recovery from non-finite optimiser steps, shared by both trainers.
//!
//! A step whose loss or gradient is not finite is not applied. The trainer then goes back to
//! its last good point (the weights and AdamW moments saved there), halves the learning rate
//! scale, and carries on; after `max_failures` such steps it gives up with an error and the
//! caller restores its best weights. Common practice, no source.

use candle_core::Tensor;
use candle_nn::VarMap;

use crate::error::{Error, Result};
use crate::nn::optim::AdamW;
use crate::nn::params::sorted_vars;

/// Named copies of every variable of a `VarMap`, in name order.
pub(crate) type Snapshot = Vec<(String, Tensor)>;

/// Copies the current values of every variable in `varmap`.
pub(crate) fn snapshot(varmap: &VarMap) -> Result<Snapshot> {
    sorted_vars(varmap)?
        .into_iter()
        // Detached, so that the copy holds no link to the live variable.
        .map(|(n, v)| Ok((n, v.as_tensor().copy()?.detach())))
        .collect()
}

/// Writes `snap` back into `varmap`'s variables.
///
/// # Errors
/// [`Error::Training`] if the names differ.
pub(crate) fn restore(varmap: &VarMap, snap: &Snapshot) -> Result<()> {
    let vars = sorted_vars(varmap)?;
    if vars.len() != snap.len() {
        return Err(Error::Training(format!(
            "a snapshot of {} tensors cannot restore {} variables",
            snap.len(),
            vars.len()
        )));
    }
    for ((name, var), (sname, t)) in vars.iter().zip(snap) {
        if name != sname {
            return Err(Error::Training(format!(
                "snapshot holds {sname} where the model has {name}"
            )));
        }
        var.set(t)?;
    }
    Ok(())
}

/// The weights and optimiser state at the last good point.
#[derive(Debug)]
pub(crate) struct GoodPoint {
    weights: Snapshot,
    moments: Vec<(String, Tensor)>,
    steps: u64,
}

impl GoodPoint {
    /// Records the current weights and optimiser state.
    pub(crate) fn take(varmap: &VarMap, optimizer: &AdamW) -> Result<Self> {
        Ok(Self {
            weights: snapshot(varmap)?,
            moments: optimizer.state_tensors(),
            steps: optimizer.steps(),
        })
    }

    /// Puts the weights and optimiser state back.
    pub(crate) fn restore(&self, varmap: &VarMap, optimizer: &mut AdamW) -> Result<()> {
        restore(varmap, &self.weights)?;
        let moments = self.moments.iter().cloned().collect();
        optimizer.load_state(&moments, self.steps)
    }
}

/// What the recovery rule keeps between steps (stored in checkpoints).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RecoveryState {
    /// Non-finite steps so far.
    pub failures: usize,
    /// Multiplier of the scheduled learning rate (halved at each failure).
    pub lr_scale: f64,
}

impl Default for RecoveryState {
    fn default() -> Self {
        Self {
            failures: 0,
            lr_scale: 1.0,
        }
    }
}

impl RecoveryState {
    /// Handles one non-finite step: goes back to `good`, halves the learning-rate scale and
    /// counts the failure.
    ///
    /// # Errors
    /// [`Error::Training`] once more than `max_failures` steps have failed (`what` and
    /// `detail` describe the last one); the caller should then restore its best weights.
    pub(crate) fn recover(
        &mut self,
        good: &GoodPoint,
        varmap: &VarMap,
        optimizer: &mut AdamW,
        max_failures: usize,
        (what, detail): (&str, &str),
    ) -> Result<()> {
        self.failures = self.failures.saturating_add(1);
        good.restore(varmap, optimizer)?;
        self.lr_scale *= 0.5;
        if self.failures > max_failures {
            return Err(Error::Training(format!(
                "{} non-finite steps (last: {what}: {detail})",
                self.failures
            )));
        }
        Ok(())
    }
}
