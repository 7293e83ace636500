//! Why a training run ended, for both trainers.

use serde::{Deserialize, Serialize};

/// Why training ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Termination {
    /// All planned epochs (for the sampler: all planned steps) ran.
    MaxEpochs,
    /// The validation ELBO stopped improving for `patience` epochs.
    EarlyStopped,
    /// The time budget ran out.
    TimeBudget,
    /// An observer asked training to stop.
    Requested,
}

impl std::fmt::Display for Termination {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Termination::MaxEpochs => "ran all planned epochs",
            Termination::EarlyStopped => "stopped early (validation ELBO no longer improving)",
            Termination::TimeBudget => "stopped at the time budget",
            Termination::Requested => "stopped at an observer's request",
        })
    }
}
