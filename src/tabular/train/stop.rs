//! When training ends: the planned epochs, patience, the time budget, or an observer's
//! request.

use super::config::TrainConfig;
use super::state::TrainState;
use crate::nn::termination::Termination;

/// The stop rule of a [`TrainConfig`].
#[derive(Debug, Clone, Copy)]
pub(crate) struct StopRule<'a>(pub(crate) &'a TrainConfig);

impl StopRule<'_> {
    /// Before a minibatch: whether this run's time budget is spent after `run_seconds`.
    pub(crate) fn before_step(&self, run_seconds: f64) -> Option<Termination> {
        match self.0.time_budget_secs {
            Some(budget) if run_seconds > budget => Some(Termination::TimeBudget),
            _ => None,
        }
    }

    /// Whether an epoch's validation (or training) ELBO `score` counts as better than the
    /// best so far: by more than `min_improvement` nats per row.
    pub(crate) fn improves(&self, state: &TrainState, score: f64) -> bool {
        score.is_finite()
            && state
                .best_elbo
                .is_none_or(|b| score > b + self.0.min_improvement)
    }

    /// After an epoch (with `state.epochs_since_best` updated): patience, then the planned
    /// epochs.
    pub(crate) fn after_epoch(&self, state: &TrainState) -> Option<Termination> {
        if state.epochs_since_best >= self.0.patience && state.epochs_since_best > 0 {
            Some(Termination::EarlyStopped)
        } else if state.epoch >= self.0.epochs {
            Some(Termination::MaxEpochs)
        } else {
            None
        }
    }
}
