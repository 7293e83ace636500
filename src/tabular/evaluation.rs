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
    /// Number of observed cells (`rows × D` when none is missing).
    pub observed_cells: usize,
    /// Posterior paths per row `K`.
    pub paths: usize,
    /// Mean ELBO per row.
    pub elbo_per_row: f64,
    /// Total ELBO divided by the number of observed cells (the mean ELBO per row divided by
    /// `D` when no cell is missing).
    pub elbo_per_dim: f64,
    /// Mean importance-weighted log-likelihood per row, `log (1/K) Σ_k w_k`: a lower bound on
    /// `log p(y)` in expectation that tightens as `K` grows (Burda, Grosse & Salakhutdinov,
    /// *Importance Weighted Autoencoders*, ICLR 2016, Theorem 1).
    pub loglik_per_row: f64,
    /// Total importance-weighted log-likelihood divided by the number of observed cells.
    pub loglik_per_dim: f64,
    /// Standard error (over rows) of `loglik_per_row`.
    pub loglik_se: f64,
    /// ELBO of each row (empty for a streamed evaluation of a file).
    pub elbo_rows: Vec<f64>,
    /// Importance-weighted log-likelihood of each row (empty for a streamed evaluation of a
    /// file).
    pub loglik_rows: Vec<f64>,
}

impl std::fmt::Display for Evaluation {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(
            f,
            "rows {}, columns {}, observed cells {}, posterior paths per row {}",
            self.rows, self.dims, self.observed_cells, self.paths
        )?;
        writeln!(
            f,
            "ELBO                      {:10.4} per row  {:8.4} per observed cell",
            self.elbo_per_row, self.elbo_per_dim
        )?;
        writeln!(
            f,
            "log-likelihood (IW, K={}) {:10.4} per row  {:8.4} per observed cell  (± {:.4} per row)",
            self.paths, self.loglik_per_row, self.loglik_per_dim, self.loglik_se
        )?;
        write!(
            f,
            "nats, in the data's own units (categorical cells: log-probabilities)"
        )
    }
}

/// Running sums of per-row figures (Welford's update for the variance; Welford 1962,
/// "Note on a method for calculating corrected sums of squares and products",
/// Technometrics 4(3)), so an evaluation streamed over many rows keeps nothing per row.
#[derive(Debug, Default)]
pub(crate) struct EvalSums {
    rows: usize,
    cells: usize,
    elbo_sum: f64,
    loglik_mean: f64,
    loglik_m2: f64,
    loglik_sum: f64,
}

impl EvalSums {
    /// Adds one row's ELBO, importance-weighted log-likelihood and observed cells.
    pub(crate) fn add(&mut self, elbo: f64, loglik: f64, cells: usize) {
        self.rows += 1;
        self.cells += cells;
        self.elbo_sum += elbo;
        self.loglik_sum += loglik;
        let delta = loglik - self.loglik_mean;
        self.loglik_mean += delta / self.rows as f64;
        self.loglik_m2 += delta * (loglik - self.loglik_mean);
    }

    /// Whether no row was added.
    #[cfg_attr(not(feature = "csv"), allow(dead_code))]
    pub(crate) fn is_empty(&self) -> bool {
        self.rows == 0
    }

    /// The evaluation of the rows added, with `per_row` figures when they were kept.
    ///
    /// # Errors
    /// [`crate::Error::NonFinite`] when a mean is not finite (callers refuse zero rows).
    pub(crate) fn finish(
        &self,
        dims: usize,
        paths: usize,
        per_row: Option<(Vec<f64>, Vec<f64>)>,
    ) -> crate::error::Result<Evaluation> {
        let n = self.rows.max(1) as f64;
        let elbo = self.elbo_sum / n;
        let ll = self.loglik_sum / n;
        if !ll.is_finite() || !elbo.is_finite() {
            return Err(crate::error::Error::NonFinite {
                what: "evaluation".into(),
                detail: format!("ELBO {elbo}, log-likelihood {ll}; the rows may lie far outside the training data"),
            });
        }
        let var = if self.rows > 1 {
            self.loglik_m2 / (n - 1.0)
        } else {
            0.0
        };
        let (elbo_rows, loglik_rows) = per_row.unwrap_or_default();
        Ok(Evaluation {
            rows: self.rows,
            dims,
            observed_cells: self.cells,
            paths,
            elbo_per_row: elbo,
            elbo_per_dim: self.elbo_sum / self.cells.max(1) as f64,
            loglik_per_row: ll,
            loglik_per_dim: self.loglik_sum / self.cells.max(1) as f64,
            loglik_se: (var / n).sqrt(),
            elbo_rows,
            loglik_rows,
        })
    }
}
