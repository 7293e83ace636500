//! The differentiable fixed-grid solver for additive-noise SDEs.
//!
//! It integrates `dX = (b(X,t) + u(X,t[,c])) dt + σ dW` on `[0, T]` from `X_0 = x0` on the
//! grid `t_k = k h`, `h = T/N`, for a batch of paths, with ordinary candle ops so that the
//! autodiff graph reaches every parameter of `b`, `u` and σ (the pathwise, reparameterised
//! gradient).
//!
//! # Control cost and Girsanov log-weight
//!
//! Along each path the solver accumulates, with `v_k = u(X_k, t_k)/σ` (per dimension),
//!
//! * the **control cost** `C = ½ Σ_k |v_k|² h`, whose expectation under the controlled law
//!   is the KL divergence between the controlled and the uncontrolled (`u = 0`) path laws;
//! * the **Girsanov log-weight** `log w = −Σ_k v_k·ΔW_k − C`, with `ΔW_k` the increment that
//!   generated the step.
//!
//! With Euler–Maruyama, `log w` is exactly `log dP/dQ` of the discretised paths: the
//! log-ratio of the uncontrolled transition densities `N(x_k + h b_k, σ²h)` to the controlled
//! ones `N(x_k + h(b_k + u_k), σ²h)`. Hence `E_Q[w] = 1` and `E_Q[w F(X)] = E_P[F(X)]` for
//! every N (an importance weight that turns controlled paths into uncontrolled ones).
//! With [`Scheme::Sra1`] the cost uses the scheme's own stage weights and the stochastic sum
//! uses the left-point control: a consistent approximation, not an exact density ratio, so
//! importance-sampling estimators in this crate use Euler–Maruyama.

mod config;
pub(crate) mod fused;
mod simulate;
mod step;
mod system;

pub use config::{Kernel, Scheme, SolverConfig};
pub use simulate::simulate;
pub use system::{Paths, Sde};
