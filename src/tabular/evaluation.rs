//! What an evaluation reports, and how it is asked for.

use serde::{Deserialize, Serialize};

/// How [`crate::TabularModel::evaluate`] estimates: posterior paths per row and the seed of
/// their noise.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct EvalOptions {
    /// Posterior paths per row `K` (≥ 1); the importance-weighted bound tightens as it grows.
    pub paths: usize,
    /// Seed of the paths' noise.
    pub seed: u64,
}

impl Default for EvalOptions {
    fn default() -> Self {
        Self {
            paths: 128,
            seed: 0,
        }
    }
}

impl EvalOptions {
    /// `paths` posterior paths per row with noise from `seed`.
    pub fn new(paths: usize, seed: u64) -> Self {
        Self { paths, seed }
    }
}

/// Log-likelihood figures of a model on some rows, in nats and in the data's own units
/// (the standardisation Jacobian `−Σ_j log scale_j` included).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Evaluation {
    /// Number of rows.
    pub rows: usize,
    /// Number of columns `D`.
    pub dims: usize,
    /// Posterior paths per row `K`.
    pub paths: usize,
    /// Mean ELBO per row.
    pub elbo_per_row: f64,
    /// Mean ELBO per row divided by `D`.
    pub elbo_per_dim: f64,
    /// Mean importance-weighted log-likelihood per row, `log (1/K) Σ_k w_k`: a lower bound on
    /// `log p(y)` in expectation that tightens as `K` grows (Burda, Grosse & Salakhutdinov,
    /// *Importance Weighted Autoencoders*, ICLR 2016, Theorem 1).
    pub loglik_per_row: f64,
    /// Mean importance-weighted log-likelihood per row divided by `D`.
    pub loglik_per_dim: f64,
    /// Standard error (over rows) of `loglik_per_row`.
    pub loglik_se: f64,
    /// ELBO of each row.
    pub elbo_rows: Vec<f64>,
    /// Importance-weighted log-likelihood of each row.
    pub loglik_rows: Vec<f64>,
}

impl std::fmt::Display for Evaluation {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(
            f,
            "rows {}, columns {}, posterior paths per row {}",
            self.rows, self.dims, self.paths
        )?;
        writeln!(
            f,
            "ELBO                      {:10.4} per row  {:8.4} per dimension",
            self.elbo_per_row, self.elbo_per_dim
        )?;
        writeln!(
            f,
            "log-likelihood (IW, K={}) {:10.4} per row  {:8.4} per dimension  (± {:.4} per row)",
            self.paths, self.loglik_per_row, self.loglik_per_dim, self.loglik_se
        )?;
        write!(f, "nats, in the data's own units")
    }
}
