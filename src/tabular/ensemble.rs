//! An ensemble of fitted models of one table: the mixture density `Σ_m w_m p_m(y)`.

use std::path::Path;

use rand::RngCore;

use crate::error::{Error, Result};
use crate::tabular::ensemble_file;
use crate::tabular::evaluation::{EvalOptions, EvalSums, Evaluation};
use crate::tabular::fitted::TabularModel;
use crate::tabular::mixture::log_sum_exp;
use crate::tabular::model::pick;
use crate::tabular::table::Table;
use crate::util::rng::{generator, streams, uniform};

/// Several fitted models of the same columns, combined as the mixture of their densities
/// `p(y) = Σ_m w_m p_m(y)` (weights `w_m > 0` summing to 1).
///
/// Averaging the densities of models trained from different random starts is the deep
/// ensemble of Lakshminarayanan, Pritzel & Blundell, *Simple and Scalable Predictive
/// Uncertainty Estimation using Deep Ensembles*, NeurIPS 2017. On the crate's open tables two
/// fits of different seeds, each with half the epochs and time budget, gave a higher
/// held-out likelihood together than one fit with the whole of them (benchmarks document).
///
/// ```
/// use neural_sde::{builtin_demo, EvalOptions, Ensemble, LatentConfig, TrainConfig, Trainer};
///
/// let table = builtin_demo()?.take_rows(&(0..200).collect::<Vec<_>>())?;
/// let fit = |seed| -> neural_sde::Result<_> {
///     let cfg = TrainConfig { epochs: 1, seed, ..TrainConfig::default() };
///     let mut t = Trainer::new(&table, LatentConfig::default(), cfg)?;
///     t.fit()?;
///     Ok(t.into_model())
/// };
/// let ensemble = Ensemble::new(vec![fit(0)?, fit(1)?])?;
/// let e = ensemble.evaluate(&table, EvalOptions::new(8, 0))?;
/// assert!(e.loglik_per_dim.is_finite());
/// assert_eq!(ensemble.generate(5, 0)?.n_rows(), 5);
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Debug)]
pub struct Ensemble {
    members: Vec<TabularModel>,
    weights: Vec<f64>,
}

impl Ensemble {
    /// The equal-weight ensemble of `members`.
    ///
    /// # Errors
    /// As [`Ensemble::with_weights`].
    pub fn new(members: Vec<TabularModel>) -> Result<Self> {
        let weights = vec![1.0; members.len()];
        Self::with_weights(members, &weights)
    }

    /// The ensemble of `members` with weights proportional to `weights`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for no member, a weight count that differs from the member
    /// count, a weight that is not finite and positive, or weights whose sum overflows;
    /// [`Error::Data`] naming the first member whose columns or column types differ from
    /// the first member's ([`TabularModel::same_columns_as`]).
    pub fn with_weights(members: Vec<TabularModel>, weights: &[f64]) -> Result<Self> {
        let Some(first) = members.first() else {
            return Err(Error::config(
                "members",
                0,
                "an ensemble needs at least one fitted model",
            ));
        };
        if weights.len() != members.len() {
            return Err(Error::config(
                "weights",
                weights.len(),
                format!("give one weight per member ({} members)", members.len()),
            ));
        }
        if let Some(w) = weights.iter().find(|w| !(w.is_finite() && **w > 0.0)) {
            return Err(Error::config(
                "weights",
                w,
                "every weight must be finite and positive",
            ));
        }
        for (m, model) in members.iter().enumerate().skip(1) {
            if !model.same_columns_as(first) {
                return Err(Error::Data {
                    path: "<ensemble>".into(),
                    reason: format!(
                        "member {m} models the columns {} where member 0 models {}; an ensemble combines models of the same columns and column types",
                        crate::util::text::clip(&model.columns().join(", ")),
                        crate::util::text::clip(&first.columns().join(", "))
                    ),
                });
            }
        }
        let total: f64 = weights.iter().sum();
        if !total.is_finite() {
            return Err(Error::config(
                "weights",
                total,
                "the weights' sum overflows; scale them down (only their ratios matter)",
            ));
        }
        Ok(Self {
            weights: weights.iter().map(|w| w / total).collect(),
            members,
        })
    }

    /// The members, in the order given.
    pub fn members(&self) -> &[TabularModel] {
        &self.members
    }

    /// The members, in the order given, without their weights.
    pub fn into_members(self) -> Vec<TabularModel> {
        self.members
    }

    /// Loads a model file: an ensemble's file written by `neural-sde fit`,
    /// [`Ensemble::save`] or [`crate::EnsembleTrainer::save`], or a single model's file (an
    /// ensemble of one).
    ///
    /// # Errors
    /// [`Error::Checkpoint`] naming what is wrong with the file (and the member).
    pub fn load(path: impl AsRef<Path>) -> Result<Self> {
        let path = path.as_ref();
        let raw = crate::nn::checkpoint::read_raw(path)?;
        if raw.format != ensemble_file::ENSEMBLE_FORMAT {
            let stored = raw.single(path, crate::tabular::fitted::FORMAT)?;
            return Self::new(vec![TabularModel::read_stored(stored, None)?.0]);
        }
        let header = ensemble_file::read_header(path, &raw)?;
        let members = ensemble_file::read_members(path, &raw, &header, |stored| {
            Ok(TabularModel::read_stored(stored, None)?.0)
        })?;
        Self::with_weights(members, &header.weights).map_err(|e| Error::Checkpoint {
            path: path.to_path_buf(),
            reason: e.to_string(),
        })
    }

    /// Saves the members' models (no training state) and weights atomically: an ensemble's
    /// file, or with one member that member's own file ([`TabularModel::save`]).
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        let path = path.as_ref();
        if let [one] = self.members.as_slice() {
            return one.save(path);
        }
        let parts = self
            .members
            .iter()
            .map(|m| {
                Ok(ensemble_file::MemberParts {
                    tensors: m.tensors()?,
                    header: serde_json::value::to_raw_value(&m.header())?,
                })
            })
            .collect::<Result<Vec<_>>>()?;
        ensemble_file::write(
            path,
            parts,
            &self.weights,
            crate::nn::checkpoint::parses_as::<crate::tabular::fitted::ModelHeader>,
        )
    }

    /// The members' weights (summing to 1).
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// The ensemble's ELBO and importance-weighted log-likelihood of each row of `table`
    /// (data units): `log Σ_m w_m exp(ℓ_m)` of the members' figures `ℓ_m`, each as
    /// [`TabularModel::evaluate`] computes it with `options`. The log-likelihood's estimate
    /// is consistent in the paths per row; the ELBO's, `log Σ_m w_m exp(ELBO_m)`, is a lower
    /// bound on the ensemble's log-likelihood since each member's ELBO bounds its own.
    ///
    /// # Errors
    /// As [`TabularModel::evaluate`] for each member.
    pub fn evaluate(&self, table: &Table, options: EvalOptions) -> Result<Evaluation> {
        let figures = self
            .members
            .iter()
            .map(|m| m.row_figures(table, options))
            .collect::<Result<Vec<_>>>()?;
        let log_w: Vec<f64> = self.weights.iter().map(|w| w.ln()).collect();
        let mut sums = EvalSums::default();
        let rows = figures[0].len();
        let (mut elbo_rows, mut loglik_rows) = (Vec::with_capacity(rows), Vec::with_capacity(rows));
        let mut terms = Vec::with_capacity(self.members.len());
        for r in 0..rows {
            let mut mix = |pick: fn(&(f64, f64, usize)) -> f64| {
                terms.clear();
                terms.extend(figures.iter().zip(&log_w).map(|(f, lw)| lw + pick(&f[r])));
                log_sum_exp(&terms)
            };
            let (e, l) = (mix(|f| f.0), mix(|f| f.1));
            sums.add(e, l, figures[0][r].2);
            elbo_rows.push(e);
            loglik_rows.push(l);
        }
        sums.finish(
            self.members[0].columns().len(),
            options.paths,
            Some((elbo_rows, loglik_rows)),
        )
    }

    /// Generates `rows` new rows in the data's units: each row's member is drawn with
    /// probability its weight, then each member generates its rows as
    /// [`TabularModel::generate`] does, with seeds drawn from `seed` (in batches of
    /// [`Ensemble::BATCH_ROWS`] rows, the same as [`Ensemble::generate_csv`]'s).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `rows == 0` or more than 100 ×
    /// [`TabularModel::KEPT_ROWS`]; as [`TabularModel::generate`].
    pub fn generate(&self, rows: usize, seed: u64) -> Result<Table> {
        crate::tabular::fitted::check_memory_rows(rows)?;
        let mut out = Vec::new();
        self.batches(rows, seed, |batch| {
            out.extend_from_slice(batch);
            Ok(())
        })?;
        self.members[0].table_of(out)
    }

    /// Generates `rows` new rows like [`Ensemble::generate`] (the same rows for the same
    /// seed) and streams them to a CSV file at `path` (atomically), so memory does not grow
    /// with `rows`. Returns the first rows, at most [`TabularModel::KEPT_ROWS`].
    ///
    /// # Errors
    /// As [`TabularModel::generate_csv`].
    pub fn generate_csv(&self, path: impl AsRef<Path>, rows: usize, seed: u64) -> Result<Table> {
        crate::tabular::fitted::check_streamed_rows(rows)?;
        self.members[0].stream_csv(path.as_ref(), |sink| self.batches(rows, seed, sink))
    }

    /// Rows drawn together: each batch draws its rows' members, then each member's rows.
    pub const BATCH_ROWS: usize = 10_000;

    /// Calls `each` with the generated rows (data units, row-major) of each batch in turn.
    fn batches(
        &self,
        rows: usize,
        seed: u64,
        mut each: impl FnMut(&[f64]) -> Result<()>,
    ) -> Result<()> {
        if rows == 0 {
            return Err(Error::config("rows", 0, "generate at least 1 row"));
        }
        let d = self.members[0].columns().len();
        let mut rng = generator(seed, streams::ENSEMBLE);
        let mut done = 0;
        while done < rows {
            let n = Self::BATCH_ROWS.min(rows - done);
            let owner: Vec<usize> = (0..n)
                .map(|_| pick(&self.weights, uniform(&mut rng)))
                .collect();
            let mut drawn = Vec::with_capacity(self.members.len());
            for (m, model) in self.members.iter().enumerate() {
                let member_seed = rng.next_u64();
                let count = owner.iter().filter(|&&o| o == m).count();
                drawn.push(if count == 0 {
                    Vec::new()
                } else {
                    model.generate(count, member_seed)?.values().to_vec()
                });
            }
            let mut next = vec![0; self.members.len()];
            let mut out = Vec::with_capacity(n * d);
            for &m in &owner {
                out.extend_from_slice(&drawn[m][next[m] * d..(next[m] + 1) * d]);
                next[m] += 1;
            }
            each(&out)?;
            done += n;
        }
        Ok(())
    }
}
