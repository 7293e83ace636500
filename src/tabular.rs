//! A fitted latent-diffusion model of a table: evaluation and generation in the data's units.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::data::{Standardizer, Table};
use crate::error::{Error, Result};
use crate::latent::LatentModel;
use crate::rng::{generator, streams};
use crate::train::History;

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

/// A latent-diffusion model of a table, with its standardisation and column names.
///
/// Produced by [`crate::Trainer`]; saved and loaded as one `.safetensors` file.
#[derive(Debug)]
pub struct TabularModel {
    pub(crate) model: LatentModel,
    pub(crate) scaler: Standardizer,
    pub(crate) columns: Vec<String>,
    pub(crate) history: History,
}

impl TabularModel {
    /// The latent model (standardised units).
    pub fn latent(&self) -> &LatentModel {
        &self.model
    }

    /// The standardisation fitted on the training rows.
    pub fn scaler(&self) -> &Standardizer {
        &self.scaler
    }

    /// Column names, in order.
    pub fn columns(&self) -> &[String] {
        &self.columns
    }

    /// Training history (empty for a model that was never trained).
    pub fn history(&self) -> &History {
        &self.history
    }

    /// Saves the model alone (no training state), atomically.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        crate::checkpoint::write(path.as_ref(), self, None)
    }

    /// Loads a model saved by [`crate::Trainer::save`] or [`TabularModel::save`].
    ///
    /// # Errors
    /// [`Error::Checkpoint`] naming what is wrong with the file.
    pub fn load(path: impl AsRef<Path>) -> Result<Self> {
        Ok(crate::checkpoint::read(path.as_ref(), None)?.model)
    }

    /// Loads a model whose prior drift was built by `prior` (see
    /// [`crate::Trainer::with_prior`]); pass the same builder.
    ///
    /// # Errors
    /// [`Error::Checkpoint`] naming what is wrong with the file.
    pub fn load_with_prior(
        path: impl AsRef<Path>,
        prior: &crate::latent::PriorFactory,
    ) -> Result<Self> {
        Ok(crate::checkpoint::read(path.as_ref(), Some(prior))?.model)
    }

    /// The table's columns in the model's order.
    fn matching(&self, table: &Table) -> Result<Table> {
        if table.columns() == self.columns.as_slice() {
            return Ok(table.clone());
        }
        table.select(&self.columns).map_err(|_| Error::Data {
            path: table.source().to_path_buf(),
            reason: format!(
                "the model was trained on columns [{}] but the table has [{}]; pass a table with those columns",
                self.columns.join(", "),
                table.columns().join(", ")
            ),
        })
    }

    /// ELBO and importance-weighted log-likelihood from `paths` posterior paths per row,
    /// streamed in chunks (memory does not grow with the number of rows).
    ///
    /// # Errors
    /// [`Error::Data`] if the table lacks the model's columns; [`Error::InvalidConfig`] for
    /// `paths == 0`.
    pub fn evaluate(&self, table: &Table, paths: usize, seed: u64) -> Result<Evaluation> {
        if paths == 0 {
            return Err(Error::config(
                "paths",
                0,
                "use at least 1 posterior path per row",
            ));
        }
        let table = self.matching(table)?;
        let z = self.scaler.transform(&table);
        let d = self.columns.len();
        let mut rng = generator(seed, streams::EVAL);
        let chunk_rows = (8192 / paths).max(1);
        let (mut elbo_rows, mut loglik_rows) = (Vec::new(), Vec::new());
        let jac = self.scaler.log_jacobian();
        for chunk in z.chunks(chunk_rows * d) {
            let r = chunk.len() / d;
            let terms = self.model.posterior_terms(chunk, paths, &mut rng)?;
            for i in 0..r {
                let lw = &terms.log_weight[i * paths..(i + 1) * paths];
                let el = &terms.elbo[i * paths..(i + 1) * paths];
                let max = lw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let lse = max + lw.iter().map(|l| (l - max).exp()).sum::<f64>().ln();
                loglik_rows.push(lse - (paths as f64).ln() + jac);
                elbo_rows.push(el.iter().sum::<f64>() / paths as f64 + jac);
            }
        }
        let n = elbo_rows.len() as f64;
        let elbo = elbo_rows.iter().sum::<f64>() / n;
        let ll = loglik_rows.iter().sum::<f64>() / n;
        if !ll.is_finite() || !elbo.is_finite() {
            return Err(Error::NonFinite {
                what: "evaluation".into(),
                detail: format!("ELBO {elbo}, log-likelihood {ll}; the rows may lie far outside the training data"),
            });
        }
        let var = if n > 1.0 {
            loglik_rows.iter().map(|v| (v - ll).powi(2)).sum::<f64>() / (n - 1.0)
        } else {
            0.0
        };
        Ok(Evaluation {
            rows: elbo_rows.len(),
            dims: d,
            paths,
            elbo_per_row: elbo,
            elbo_per_dim: elbo / d as f64,
            loglik_per_row: ll,
            loglik_per_dim: ll / d as f64,
            loglik_se: (var / n).sqrt(),
            elbo_rows,
            loglik_rows,
        })
    }

    /// Generates `rows` new rows in the data's units (seeded, in batches, no autodiff graph).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `rows == 0`.
    pub fn generate(&self, rows: usize, seed: u64) -> Result<Table> {
        if rows == 0 {
            return Err(Error::config("rows", 0, "generate at least 1 row"));
        }
        let mut rng = generator(seed, streams::EVAL);
        let mut out = Vec::with_capacity(rows);
        let d = self.columns.len();
        let mut left = rows;
        while left > 0 {
            let n = left.min(4096);
            let z = self.model.generate(n, &mut rng)?;
            let y = self.scaler.inverse(&z);
            out.extend(y.chunks_exact(d).map(<[f64]>::to_vec));
            left -= n;
        }
        Table::new(self.columns.clone(), out)
    }
}
