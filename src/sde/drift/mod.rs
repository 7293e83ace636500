//! Drift (and control) networks: the [`Drift`] trait and ready-made implementations.
//!
//! A drift maps a batch of states `x` of shape `(batch, d)`, a time `t` and an optional
//! per-path context (for instance the observed row that an amortised control conditions on)
//! to a tensor of shape `(batch, d)`. The same trait serves the prior drift `b` and the
//! control `u` of the solver.

mod adapters;
mod base;
mod mlp;

pub use adapters::{FnDrift, ModuleDrift};
pub use base::Drift;
pub(crate) use base::{FusedForm, LinearFeedback, Sealed};
pub use mlp::{MlpConfig, TimeMlp};
