//! What training has done so far: the resumable state, the end reason and the report.

use serde::{Deserialize, Serialize};

use crate::nn::recovery::RecoveryState;
use crate::nn::termination::Termination;
use crate::util::rng::Generator;

/// Everything needed to continue training exactly where it stopped.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainState {
    /// Completed epochs.
    pub epoch: usize,
    /// Optimiser steps taken (including skipped ones).
    pub step: u64,
    /// Generator of minibatch order. (The training noise needs no state: each row's noise
    /// at each step comes from a generator keyed by the step and the row.)
    pub data_rng: Generator,
    /// Best validation (or training) ELBO per row so far.
    pub best_elbo: Option<f64>,
    /// Epoch of the best ELBO.
    pub best_epoch: usize,
    /// Epochs since the best ELBO.
    pub epochs_since_best: usize,
    /// Non-finite steps so far and the learning-rate scale they left (flattened: the fields
    /// `failures` and `lr_scale`).
    #[serde(flatten)]
    pub recovery: RecoveryState,
    /// Set when training has ended.
    pub finished: Option<Termination>,
    /// Number of rows of the table trained on.
    pub table_rows: usize,
    /// Fingerprint of the table's values (to refuse resuming on other data).
    pub table_fingerprint: u64,
    /// Seconds of training so far, over every run (the only timing in the state).
    #[serde(default)]
    pub seconds: f64,
    /// Optimiser steps the learning-rate schedule is planned over, fixed when training
    /// starts (`epochs × minibatches per epoch` of the first configuration), so that a
    /// resumed run continues the same schedule. `None` in files written before it was
    /// stored: then the configuration's epochs are used.
    #[serde(default)]
    pub planned_steps: Option<u64>,
    /// Set when the trainer chose the start's component count (the model's
    /// `noise_components` was not given) and chose a mixture: [`crate::Trainer::gaussian_start`]
    /// then offers the fit from one Gaussian to compare with. (Named `mixture_by_bic` in
    /// files written before the count also looked at the validation rows; they read the
    /// same.)
    #[serde(default, alias = "mixture_by_bic")]
    pub mixture_chosen: bool,
    /// Set on a member's fits once [`crate::EnsembleTrainer::compare_starts`] has weighed
    /// them against each other (or [`crate::Trainer::keep_better`] kept one), so that a
    /// resumed fit does not train another start.
    #[serde(default)]
    pub starts_weighed: bool,
}

/// Summary returned by [`crate::Trainer::fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainReport {
    /// Epochs completed.
    pub epochs: usize,
    /// Epoch whose weights were kept.
    pub best_epoch: usize,
    /// Best validation (or training) ELBO per row, standardised units.
    pub best_elbo: Option<f64>,
    /// Why training ended.
    pub termination: Termination,
    /// Seconds spent in this run.
    pub seconds: f64,
}

impl std::fmt::Display for TrainReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} after {} epochs in {:.1} s; kept epoch {}",
            self.termination, self.epochs, self.seconds, self.best_epoch
        )?;
        if let Some(b) = self.best_elbo {
            write!(f, " (ELBO {b:.4} per row, standardised units)")?;
        }
        Ok(())
    }
}
