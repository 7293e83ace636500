//! Neural-network building blocks on top of candle: seeded parameters (with a frozen mode
//! for inference), activations and fast custom operations with their backward passes, the
//! AdamW optimiser with its schedule, the gradient step and non-finite recovery both trainers
//! share, the running average of the weights, and the checkpoint file format (named tensors
//! and a versioned JSON header).

pub(crate) mod average;
pub(crate) mod checkpoint;
pub(crate) mod descent;
pub mod ops;
pub(crate) mod optim;
pub(crate) mod params;
pub(crate) mod recovery;
pub(crate) mod schedule;
pub(crate) mod termination;
