//! Sampling an unnormalised density with a learned control (the free-energy route).
//!
//! With reference `dX = σ dW` on `[0, T]` from `X_0 = 0` (terminal law `ν = N(0, σ²T I)`)
//! and terminal cost `g = log ν − log π̃`, the free energy of a control `u` is
//! `J(u) = E[½ Σ_k |u_k/σ|² h + g(X_N)] ≥ −log Z`, with equality when `X_T ~ π`
//! (Zhang & Chen, *Path Integral Sampler*, ICLR 2022; for σ = T = 1 the optimum is the
//! Föllmer drift). Training minimises `J` by stochastic gradients; [`Sampler::estimate`]
//! then reports the importance-weighted `log Z`, which is unbiased for `Z` under the
//! Euler–Maruyama discretisation for any control, since Euler–Maruyama is exact for the
//! reference Brownian motion.

mod config;
mod follmer;
mod log_z;
pub(crate) mod ratio;
pub(crate) mod target;
mod training;

pub use config::SamplerConfig;
pub use follmer::FollmerDrift;
pub use log_z::{estimate_log_z, EstimateOptions, LogZEstimate};
pub use training::{Sampler, SamplerObserver, SamplerRecord, SamplerReport, SamplerState};
