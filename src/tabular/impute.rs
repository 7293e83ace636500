//! Filling in missing cells and generating rows under conditions, from the model's
//! conditional distribution given each row's observed cells.
//!
//! Method (self-normalised importance sampling; Owen, *Monte Carlo theory, methods and
//! examples*, 2013, ch. 9): for a row with observed cells `y_o`, `K` posterior paths are drawn
//! with the amortised control and weighted by `w_k ∝ p(y_o | Z_T^k) dP/dQ(Z^k)` (the Girsanov
//! weight of the Euler–Maruyama path law). The pairs `(Z_T^k, w̄_k)` approximate
//! `p(Z_T | y_o)`; a draw picks a path `k` with probability `w̄_k`, then draws the missing
//! continuous cells from the Gaussian conditional `y_m | y_o, Z_T^k` and each missing
//! categorical cell from its softmax at `Z_T^k` (cells are independent given `Z_T` except
//! within the continuous block). The result is exact for the model only as `K` grows; the
//! effective sample size `1 / Σ w̄_k²` (Kong 1992) says how many paths carried the estimate,
//! and a small one (a row unlike the training rows, or conditions the model finds unlikely)
//! means the draws may not represent the conditional well.

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::tabular::fitted::TabularModel;
use crate::tabular::model::init::conditional_map;
use crate::tabular::model::{pick, softmax};
use crate::tabular::table::Table;
use crate::util::rng::{key2, keyed_generator, standard_normals, streams, uniform};

/// Settings of [`TabularModel::impute`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct ImputeOptions {
    /// Posterior paths per row `K`.
    pub paths: usize,
    /// Completed copies of the table to draw (multiple imputation).
    pub draws: usize,
    /// Seed of the paths and draws.
    pub seed: u64,
}

impl Default for ImputeOptions {
    fn default() -> Self {
        Self {
            paths: 256,
            draws: 1,
            seed: 0,
        }
    }
}

impl ImputeOptions {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for 0 paths or draws, or more than the crate's limits.
    pub fn validate(&self) -> Result<()> {
        use crate::util::limits::{at_most, MAX_BATCH};
        if self.paths == 0 {
            return Err(Error::config(
                "paths",
                0,
                "use at least 1 posterior path per row",
            ));
        }
        if self.draws == 0 {
            return Err(Error::config("draws", 0, "draw at least 1 completed table"));
        }
        at_most("paths", self.paths, MAX_BATCH, "posterior paths per row")?;
        at_most("draws", self.draws, 10_000, "completed tables")
    }
}

/// The model's estimate for one missing cell.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CellEstimate {
    /// Row of the table.
    pub row: usize,
    /// Column of the table.
    pub column: usize,
    /// Conditional mean of a continuous cell (data units).
    pub mean: Option<f64>,
    /// Conditional standard deviation of a continuous cell (data units).
    pub sd: Option<f64>,
    /// Conditional probability of each level of a categorical cell.
    pub probabilities: Option<Vec<f64>>,
}

/// What [`TabularModel::impute`] returns.
#[derive(Debug, Clone)]
pub struct Imputation {
    /// `draws` completed copies of the table: observed cells unchanged, missing cells drawn.
    pub tables: Vec<Table>,
    /// The estimate of every missing cell, row by row.
    pub cells: Vec<CellEstimate>,
    /// Effective sample size of each row's importance weights (between 1 and `paths`).
    pub ess: Vec<f64>,
}

/// Refuses an imputation of `draws` copies whose draws would hold `cells` cells (those of
/// `what`) in memory, more than [`crate::limits::MAX_IMPUTED_VALUES`].
///
/// # Errors
/// [`Error::InvalidConfig`] naming `draws`.
pub(crate) fn check_imputed_cells(
    draws: usize,
    cells: usize,
    what: impl FnOnce() -> String,
) -> Result<()> {
    let max = crate::util::limits::MAX_IMPUTED_VALUES;
    if cells > max {
        return Err(Error::config(
            "draws",
            draws,
            format!(
                "{} would hold {cells} cells in memory, more than the {max} allowed; draw fewer copies or impute the table in parts",
                what()
            ),
        ));
    }
    Ok(())
}

/// Per-row work of imputation on the standardised scale.
struct RowPlan {
    /// Missing continuous cells (positions among the continuous columns).
    missing: Vec<usize>,
    observed: Vec<usize>,
    /// `Σ_mo Σ_oo⁻¹` and the Cholesky factor of `Σ_mm − Σ_mo Σ_oo⁻¹ Σ_om`.
    gain: Vec<f64>,
    chol: Vec<f64>,
    /// `Σ_oo⁻¹` and `log |Σ_oo|` (the observed cells' density, for a component's
    /// responsibility).
    oo_inv: Vec<f64>,
    oo_log_det: f64,
}

/// One component of the continuous cells' observation noise (standardised units).
struct NoiseComponent {
    log_weight: f64,
    offset: Vec<f64>,
    covariance: Vec<f64>,
}

impl TabularModel {
    /// Fills every missing cell of `table` by draws from the model's conditional distribution
    /// given the row's observed cells (see the module docs of the method and its limits), and
    /// estimates each missing cell (continuous: conditional mean and standard deviation;
    /// categorical: level probabilities). Rows are handled in chunks; the result depends on
    /// the seed and the table, not on the chunking.
    ///
    /// # Errors
    /// As [`TabularModel::evaluate`] for the table; [`Error::InvalidConfig`] for bad options,
    /// or more than [`crate::limits::MAX_IMPUTED_VALUES`] cells in all the draws.
    ///
    /// # Example
    /// ```
    /// use neural_sde::{ImputeOptions, LatentConfig, Table, TrainConfig, Trainer};
    /// // A tiny synthetic table (demo data, not a check).
    /// let rows: Vec<Vec<f64>> = (0..80).map(|i| { let x = i as f64 / 40.0 - 1.0; vec![x, 2.0 * x + 0.1 * (i % 7) as f64] }).collect();
    /// let table = Table::new(vec!["x".into(), "y".into()], rows)?;
    /// let train = TrainConfig { epochs: 2, batch_size: 32, ..Default::default() };
    /// let mut trainer = Trainer::new(&table, LatentConfig::default(), train)?;
    /// trainer.fit()?;
    /// let model = trainer.into_model();
    /// let holes = table.take_rows(&[0, 1])?.with_missing(&[(0, 1), (1, 0)])?;
    /// let filled = model.impute(&holes, ImputeOptions { paths: 32, ..Default::default() })?;
    /// assert!(filled.tables[0].values().iter().all(|v| v.is_finite()));
    /// assert_eq!(filled.cells.len(), 2);
    /// # Ok::<(), neural_sde::Error>(())
    /// ```
    pub fn impute(&self, table: &Table, options: ImputeOptions) -> Result<Imputation> {
        Ok(self.impute_with_evidence(table, options)?.0)
    }

    /// As [`TabularModel::impute`], also returning each row's estimate of `log p(y_o)`, the
    /// log-density of its observed cells (data units; the log of the mean importance weight
    /// of its paths), which weighs the members of an [`crate::Ensemble`] given the row.
    pub(crate) fn impute_with_evidence(
        &self,
        table: &Table,
        options: ImputeOptions,
    ) -> Result<(Imputation, Vec<f64>)> {
        options.validate()?;
        let table = self.matching(table)?;
        let d = self.columns.len();
        check_imputed_cells(
            options.draws,
            options.draws.saturating_mul(table.values().len()),
            || {
                format!(
                    "{} draws of {} rows × {d} columns",
                    options.draws,
                    table.n_rows()
                )
            },
        )?;
        let layout = self.coder.layout().clone();
        let dc = layout.continuous;
        let components = self.noise_components()?;
        let m_count = components.len();
        let k = options.paths;
        let chunk = self
            .model
            .config()
            .chunk_rows(&layout, k, (8192 / k).max(1))
            .max(1);
        let mut tables = vec![table.values().to_vec(); options.draws];
        let mut cells = Vec::new();
        let mut ess = Vec::with_capacity(table.n_rows());
        let mut evidence = Vec::with_capacity(table.n_rows());
        let cont = self.coder.continuous().to_vec();
        let cat = self.coder.categorical().to_vec();
        let ow = layout.output_width();
        let mut start = 0;
        while start < table.n_rows() {
            let end = (start + chunk).min(table.n_rows());
            let mut coded = Vec::with_capacity((end - start) * layout.coded_width());
            for i in start..end {
                self.coder
                    .encode_into(table.row(i), &self.scaler, &mut coded);
            }
            let keys: Vec<u64> = (start as u64..end as u64).collect();
            let terms = self.model.posterior_terms_stream(
                &coded,
                k,
                options.seed,
                streams::IMPUTE_PATHS,
                &keys,
            )?;
            for i in start..end {
                let row = table.row(i);
                let at = (i - start) * k;
                let lw = &terms.log_weight[at..at + k];
                let max = lw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let mut w: Vec<f64> = lw.iter().map(|l| (l - max).exp()).collect();
                let total: f64 = w.iter().sum();
                if !(total.is_finite() && total > 0.0) {
                    return Err(Error::NonFinite {
                        what: format!("importance weights of row {}", i + 1),
                        detail: "every posterior path has zero or non-finite weight; the row may lie far outside the training data".into(),
                    });
                }
                // The observed continuous cells' Jacobian from standardised to data units.
                let jacobian: f64 = cont
                    .iter()
                    .enumerate()
                    .filter(|(_, &j)| !row[j].is_nan())
                    .map(|(c, _)| self.scaler.scale[c].ln())
                    .sum();
                evidence.push(max + (total / k as f64).ln() - jacobian);
                w.iter_mut().for_each(|x| *x /= total);
                ess.push(1.0 / w.iter().map(|x| x * x).sum::<f64>());
                let outs = &terms.outputs[at * ow..(at + k) * ow];
                let plans = components
                    .iter()
                    .map(|c| self.plan(row, &cont, &c.covariance, dc))
                    .collect::<Result<Vec<_>>>()?;
                // Standardised observed continuous values.
                let y: Vec<f64> = cont
                    .iter()
                    .enumerate()
                    .map(|(c, &j)| (row[j] - self.scaler.mean[c]) / self.scaler.scale[c])
                    .collect();
                // Per path and component: the missing cells' conditional means, and the
                // weight of the pair (the path's weight times the component's
                // responsibility for the observed cells on that path).
                let mut cond = Vec::with_capacity(k * m_count);
                let mut pair_w = Vec::with_capacity(k * m_count);
                for (p, wp) in w.iter().enumerate() {
                    let mean = &outs[p * ow..p * ow + dc];
                    let mut logr = Vec::with_capacity(m_count);
                    for (comp, plan) in components.iter().zip(&plans) {
                        let shifted: Vec<f64> =
                            mean.iter().zip(&comp.offset).map(|(a, b)| a + b).collect();
                        cond.push(plan.conditional_mean(&shifted, &y));
                        logr.push(if m_count == 1 {
                            0.0
                        } else {
                            comp.log_weight + plan.observed_log_density(&shifted, &y)
                        });
                    }
                    let r = softmax(&logr);
                    pair_w.extend(r.iter().map(|r| wp * r));
                }
                self.estimates(
                    (i, row),
                    &plans,
                    &cond,
                    (&w, &pair_w),
                    outs,
                    &cat,
                    &layout,
                    &mut cells,
                );
                for (draw, t) in tables.iter_mut().enumerate() {
                    let mut rng = keyed_generator(
                        options.seed,
                        streams::IMPUTE_DRAWS,
                        key2(i as u64, draw as u64),
                    );
                    let pair = pick(&pair_w, uniform(&mut rng));
                    let (p, plan) = (pair / m_count, &plans[pair % m_count]);
                    let eps = standard_normals(&mut rng, plan.missing.len());
                    let q = plan.missing.len();
                    for (a, &c) in plan.missing.iter().enumerate() {
                        let noise: f64 = (0..=a).map(|b| plan.chol[a * q + b] * eps[b]).sum();
                        let z = cond[pair][a] + noise;
                        t[i * d + cont[c]] = z * self.scaler.scale[c] + self.scaler.mean[c];
                    }
                    let mut off = dc;
                    for (&j, &levels) in cat.iter().zip(&layout.levels) {
                        if row[j].is_nan() {
                            let probs = softmax(&outs[p * ow + off..p * ow + off + levels]);
                            t[i * d + j] = pick(&probs, uniform(&mut rng)) as f64;
                        }
                        off += levels;
                    }
                }
            }
            start = end;
        }
        let tables = tables
            .into_iter()
            .map(|v| self.table_of(v))
            .collect::<Result<Vec<_>>>()?;
        Ok((Imputation { tables, cells, ess }, evidence))
    }

    /// Draws `rows` rows from the model conditioned on the cells `given` (column name and
    /// the cell's text: a number for a continuous column, a level for a categorical one): the
    /// other cells are treated as missing and imputed (see [`TabularModel::impute`]), each
    /// row from its own posterior paths. The result's `ess` says how well the paths carried
    /// each row.
    ///
    /// # Errors
    /// [`Error::Data`] naming an unknown column, a column given twice, a value that is not a
    /// number of a continuous column, or a level the model has not seen;
    /// [`Error::InvalidConfig`] for bad options or no rows.
    pub fn generate_given(
        &self,
        rows: usize,
        given: &[(String, String)],
        options: ImputeOptions,
    ) -> Result<Imputation> {
        self.impute(&self.given_table(rows, given)?, options)
    }

    /// `rows` copies of the row holding the cells `given` (see
    /// [`TabularModel::generate_given`]), every other cell missing.
    pub(crate) fn given_table(&self, rows: usize, given: &[(String, String)]) -> Result<Table> {
        let bad = |reason: String| Error::Data {
            path: std::path::PathBuf::from("--given"),
            reason,
        };
        if rows == 0 {
            return Err(Error::config("rows", 0, "generate at least 1 row"));
        }
        crate::util::limits::at_most(
            "rows",
            rows,
            Self::KEPT_ROWS * 100,
            "conditioned rows per call",
        )?;
        let d = self.columns.len();
        let mut row = vec![f64::NAN; d];
        for (name, text) in given {
            let clip = crate::util::text::clip;
            let j = self.columns.iter().position(|c| c == name).ok_or_else(|| {
                bad(format!(
                    "unknown column '{}'; the model's columns are: {}",
                    clip(name),
                    clip(&self.columns.join(", "))
                ))
            })?;
            if !row[j].is_nan() {
                return Err(bad(format!("column '{}' is given twice", clip(name))));
            }
            let kind = &self.schema.kinds[j];
            row[j] = match kind.levels() {
                None => match text.trim().parse::<f64>() {
                    Ok(v) if v.is_finite() => v,
                    _ => {
                        return Err(bad(format!(
                            "column '{}' is continuous; '{}' is not a finite number",
                            clip(name),
                            clip(text)
                        )))
                    }
                },
                Some(levels) => kind.level_of(text.trim()).ok_or_else(|| {
                    bad(format!(
                        "level '{}' of column '{}' was not seen in training (the levels are: {})",
                        clip(text),
                        clip(name),
                        clip(&levels.join(", "))
                    ))
                })? as f64,
            };
        }
        let mut values = Vec::with_capacity(rows * d);
        for _ in 0..rows {
            values.extend_from_slice(&row);
        }
        self.table_of(values)
    }

    /// The components of the continuous cells' observation noise (one, with offset zero,
    /// when the noise is a single Gaussian `N(0, P⁻¹P⁻ᵀ)`).
    fn noise_components(&self) -> Result<Vec<NoiseComponent>> {
        let dc = self.coder.layout().continuous;
        if let Some(mix) = self.model.noise_mixture()? {
            let dd = dc * dc;
            return Ok((0..mix.log_weights.len())
                .map(|k| NoiseComponent {
                    log_weight: mix.log_weights[k],
                    offset: mix.offsets[k * dc..(k + 1) * dc].to_vec(),
                    covariance: mix.covariances[k * dd..(k + 1) * dd].to_vec(),
                })
                .collect());
        }
        let f = self.model.noise_factor()?;
        let mut cov = vec![0.0; dc * dc];
        for i in 0..dc {
            for j in 0..dc {
                cov[i * dc + j] = (0..dc).map(|k| f[i * dc + k] * f[j * dc + k]).sum();
            }
        }
        Ok(vec![NoiseComponent {
            log_weight: 0.0,
            offset: vec![0.0; dc],
            covariance: cov,
        }])
    }

    fn plan(&self, row: &[f64], cont: &[usize], cov: &[f64], dc: usize) -> Result<RowPlan> {
        let missing: Vec<usize> = (0..dc).filter(|&c| row[cont[c]].is_nan()).collect();
        let observed: Vec<usize> = (0..dc).filter(|&c| !row[cont[c]].is_nan()).collect();
        let (gain, cc) =
            conditional_map(cov, dc, &observed, &missing).ok_or_else(|| Error::NonFinite {
                what: "observation covariance".into(),
                detail: "it is not positive definite; the model file may be damaged".into(),
            })?;
        let q = missing.len();
        let mut ridge = cc;
        for a in 0..q {
            ridge[a * q + a] += 1e-12;
        }
        let chol = crate::util::linalg::cholesky(&ridge, q).unwrap_or_else(|| {
            // Keep the diagonal when rounding made the conditional covariance indefinite.
            let mut c = vec![0.0; q * q];
            for a in 0..q {
                c[a * q + a] = ridge[a * q + a].max(0.0).sqrt();
            }
            c
        });
        let (oo_inv, oo_log_det) = if observed.is_empty() {
            (Vec::new(), 0.0)
        } else {
            let (inv, l) =
                crate::util::linalg::block_inverse(cov, dc, &observed).ok_or_else(|| {
                    Error::NonFinite {
                        what: "observation covariance".into(),
                        detail: "it is not positive definite; the model file may be damaged".into(),
                    }
                })?;
            let ld = crate::util::linalg::log_det_from_cholesky(&l, observed.len());
            (inv, ld)
        };
        Ok(RowPlan {
            missing,
            observed,
            gain,
            chol,
            oo_inv,
            oo_log_det,
        })
    }

    /// The estimates of row `i`'s missing cells: for a continuous cell the mixture moments
    /// over every (path, component) pair (`pair_w`, `cond`, and each component's `plans`),
    /// for a categorical one the path-weighted (`w`) level probabilities.
    #[allow(clippy::too_many_arguments)]
    fn estimates(
        &self,
        (i, row): (usize, &[f64]),
        plans: &[RowPlan],
        cond: &[Vec<f64>],
        (w, pair_w): (&[f64], &[f64]),
        outs: &[f64],
        cat: &[usize],
        layout: &crate::tabular::model::RowLayout,
        cells: &mut Vec<CellEstimate>,
    ) {
        let m_count = plans.len();
        let q = plans[0].missing.len();
        let ow = layout.output_width();
        let cont = self.coder.continuous();
        // Mixture moments: mean Σ w μ; variance Σ w (C + μ²) − mean².
        for (a, &c) in plans[0].missing.iter().enumerate() {
            let mut m = 0.0;
            let mut second = 0.0;
            for (pair, (wp, mu)) in pair_w.iter().zip(cond).enumerate() {
                let chol = &plans[pair % m_count].chol;
                let cvar: f64 = (0..=a).map(|b| chol[a * q + b].powi(2)).sum();
                m += wp * mu[a];
                second += wp * (cvar + mu[a] * mu[a]);
            }
            let var = (second - m * m).max(0.0);
            cells.push(CellEstimate {
                row: i,
                column: cont[c],
                mean: Some(m * self.scaler.scale[c] + self.scaler.mean[c]),
                sd: Some(var.sqrt() * self.scaler.scale[c]),
                probabilities: None,
            });
        }
        let mut off = layout.continuous;
        for (&j, &levels) in cat.iter().zip(&layout.levels) {
            if row[j].is_nan() {
                let mut probs = vec![0.0; levels];
                for (p, wp) in w.iter().enumerate() {
                    let s = softmax(&outs[p * ow + off..p * ow + off + levels]);
                    probs.iter_mut().zip(&s).for_each(|(a, b)| *a += wp * b);
                }
                cells.push(CellEstimate {
                    row: i,
                    column: j,
                    mean: None,
                    sd: None,
                    probabilities: Some(probs),
                });
            }
            off += levels;
        }
    }
}

impl RowPlan {
    /// `log N(y_o; mean_o, Σ_oo)` (0 when no cell is observed).
    fn observed_log_density(&self, mean: &[f64], y: &[f64]) -> f64 {
        let k = self.observed.len();
        if k == 0 {
            return 0.0;
        }
        let r: Vec<f64> = self.observed.iter().map(|&o| y[o] - mean[o]).collect();
        let quad: f64 = (0..k)
            .map(|a| r[a] * (0..k).map(|b| self.oo_inv[a * k + b] * r[b]).sum::<f64>())
            .sum();
        -0.5 * (quad + self.oo_log_det + k as f64 * (2.0 * std::f64::consts::PI).ln())
    }

    /// `m_m + Σ_mo Σ_oo⁻¹ (y_o − m_o)` for means `mean` and standardised values `y`.
    fn conditional_mean(&self, mean: &[f64], y: &[f64]) -> Vec<f64> {
        let k = self.observed.len();
        let r: Vec<f64> = self.observed.iter().map(|&o| y[o] - mean[o]).collect();
        self.missing
            .iter()
            .enumerate()
            .map(|(a, &m)| mean[m] + (0..k).map(|b| self.gain[a * k + b] * r[b]).sum::<f64>())
            .collect()
    }
}
