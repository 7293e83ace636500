//! Progress reporting: the library prints nothing; observers receive plain numbers.

use std::ops::ControlFlow;

use super::history::EpochRecord;
use crate::error::Result;

/// Where training is, passed to [`Observer::on_step`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepInfo {
    /// Current epoch, from 1.
    pub epoch: usize,
    /// Planned epochs.
    pub epochs: usize,
    /// Minibatch within the epoch, from 1.
    pub batch: usize,
    /// Minibatches per epoch.
    pub batches: usize,
    /// Minibatch loss (negative ELBO per row).
    pub loss: f64,
    /// Seconds since training (this run) started.
    pub elapsed: f64,
}

/// Receives training progress. Every method has a default that lets training continue.
///
/// Return `Ok(ControlFlow::Break(()))` to stop training normally: the epoch ends there, the
/// best weights are kept and the report says [`crate::Termination::Requested`]. An `Err`
/// stops training with that error.
pub trait Observer: Send {
    /// After every optimiser step.
    fn on_step(&mut self, _info: &StepInfo) -> Result<ControlFlow<()>> {
        Ok(ControlFlow::Continue(()))
    }
    /// After every epoch.
    fn on_epoch(&mut self, _record: &EpochRecord) -> Result<ControlFlow<()>> {
        Ok(ControlFlow::Continue(()))
    }
}
