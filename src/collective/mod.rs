//! Reductions across the processes that train one model together (data parallelism).
//!
//! Each process computes the gradient of its share of a global minibatch; [`Collective`]
//! sums those gradients (and the loss figures) over every process, so each one applies the
//! same AdamW update and holds the same weights. [`SingleProcess`] is the group of one; with
//! the `mpi` feature, `MpiGroup` runs the same reductions over MPI between processes started
//! by `mpirun`, on one machine or many.
//!
//! Research code that trains its own model data-parallel does the same: split each
//! minibatch by [`share`], sum the gradient buffer with [`Collective::sum_f32`] (or `_f64`),
//! then step.

mod agree;
#[cfg(feature = "mpi")]
mod mpi;
mod reduce;
mod single;

pub(crate) use agree::check_group;
pub use agree::{check_same, failed_ranks, on_root, share};
#[cfg(feature = "mpi")]
pub use mpi::MpiGroup;
pub use reduce::Collective;
pub use single::SingleProcess;
