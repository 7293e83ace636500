//! Per-epoch training history.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::Result;

/// One epoch's figures (ELBO terms are means per row, in nats, standardised units).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EpochRecord {
    /// Epoch number, from 1.
    pub epoch: usize,
    /// Optimiser steps taken so far.
    pub step: u64,
    /// Mean training ELBO per row over the epoch's minibatches (NaN when the epoch was cut
    /// before its first step; stored as `null`).
    #[serde(with = "crate::util::text::nan_as_null")]
    pub train_elbo: f64,
    /// Validation ELBO per row of the running average of the weights
    /// ([`crate::TrainConfig::weight_average`]; the current weights when it is 0), at the
    /// end of the epoch (`None` without validation rows).
    pub val_elbo: Option<f64>,
    /// Mean control cost per row (training).
    pub control_cost: f64,
    /// Mean reconstruction term `−log p(y | Z_T)` per row (training).
    pub reconstruction: f64,
    /// Learning rate at the end of the epoch.
    pub learning_rate: f64,
    /// Mean gradient norm before clipping.
    pub grad_norm: f64,
    /// Wall-clock seconds of the epoch.
    pub seconds: f64,
}

/// All epochs so far.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct History {
    /// Records in order.
    pub epochs: Vec<EpochRecord>,
}

/// Wall-clock timings, kept apart from everything else in a checkpoint header (its field
/// `timing`), so that the same training gives the same header apart from this field.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct Timing {
    /// Seconds of each epoch of the history.
    pub epoch_seconds: Vec<f64>,
    /// Seconds of training over every run (trainer checkpoints only).
    pub training_seconds: Option<f64>,
}

impl History {
    /// The history with every epoch's seconds set to 0, and those seconds.
    pub(crate) fn split_timing(&self) -> (History, Timing) {
        let mut h = self.clone();
        let epoch_seconds = h
            .epochs
            .iter_mut()
            .map(|r| std::mem::take(&mut r.seconds))
            .collect();
        let timing = Timing {
            epoch_seconds,
            training_seconds: None,
        };
        (h, timing)
    }

    /// Puts the seconds of `timing` back into the epochs (when there is one per epoch).
    pub(crate) fn merge_timing(&mut self, timing: &Timing) {
        if timing.epoch_seconds.len() == self.epochs.len() {
            for (r, s) in self.epochs.iter_mut().zip(&timing.epoch_seconds) {
                r.seconds = *s;
            }
        }
    }

    /// CSV text with a header line.
    pub fn to_csv(&self) -> String {
        let mut s = String::from(
            "epoch,step,train_elbo,val_elbo,control_cost,reconstruction,learning_rate,grad_norm,seconds\n",
        );
        for r in &self.epochs {
            let val = r.val_elbo.map(|v| v.to_string()).unwrap_or_default();
            s.push_str(&format!(
                "{},{},{},{},{},{},{},{},{}\n",
                r.epoch,
                r.step,
                r.train_elbo,
                val,
                r.control_cost,
                r.reconstruction,
                r.learning_rate,
                r.grad_norm,
                r.seconds
            ));
        }
        s
    }

    /// Writes CSV (atomically).
    ///
    /// # Errors
    /// [`crate::Error::Io`] if the file cannot be written.
    pub fn write_csv(&self, path: impl AsRef<Path>) -> Result<()> {
        crate::util::fs::write_atomic(path.as_ref(), self.to_csv().as_bytes())
    }

    /// The histories of an ensemble's models as one CSV table: [`History::to_csv`]'s
    /// columns after a first column `model` (its number in the file, from 1); with one
    /// model, that model's own table.
    pub fn members_csv(histories: &[&History]) -> String {
        if let [one] = histories {
            return one.to_csv();
        }
        let mut out = String::new();
        for (m, h) in histories.iter().enumerate() {
            for (i, line) in h.to_csv().lines().enumerate() {
                match (i, m) {
                    (0, 0) => out.push_str(&format!("model,{line}\n")),
                    (0, _) => {}
                    _ => out.push_str(&format!("{},{line}\n", m + 1)),
                }
            }
        }
        out
    }

    /// Writes [`History::members_csv`] (atomically).
    ///
    /// # Errors
    /// [`crate::Error::Io`] if the file cannot be written.
    pub fn write_members_csv(histories: &[&History], path: impl AsRef<Path>) -> Result<()> {
        crate::util::fs::write_atomic(path.as_ref(), Self::members_csv(histories).as_bytes())
    }

    /// Writes JSON (atomically).
    ///
    /// # Errors
    /// [`crate::Error::Io`] if the file cannot be written.
    pub fn write_json(&self, path: impl AsRef<Path>) -> Result<()> {
        crate::util::fs::write_atomic(
            path.as_ref(),
            serde_json::to_string_pretty(self)?.as_bytes(),
        )
    }
}
