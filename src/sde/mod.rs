//! The SDE core: drifts, the diffusion coefficient, Brownian increments, terminal costs,
//! the free-energy objective and the solver (with the fused whole-path kernel beneath it).

pub(crate) mod diffusion;
pub(crate) mod drift;
pub(crate) mod noise;
pub(crate) mod objective;
pub(crate) mod solver;
pub(crate) mod terminal;
