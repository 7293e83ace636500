//! Gaussian mixtures fitted by expectation–maximisation: the classical baseline a latent
//! diffusion should beat on a table (Dempster, Laird & Rubin 1977, "Maximum likelihood from
//! incomplete data via the EM algorithm", JRSS B 39(1); the updates as in Bishop 2006,
//! *Pattern Recognition and Machine Learning*, §9.2.2), with the number of components chosen
//! by the Bayesian information criterion (Schwarz 1978, "Estimating the dimension of a
//! model", Annals of Statistics 6(2)).

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::tabular::scaler::Standardizer;
use crate::tabular::table::Table;
use crate::util::linalg::cholesky;
use crate::util::rng::generator;

/// The shape of each component's covariance.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Covariance {
    /// Independent columns within a component.
    Diagonal,
    /// Any positive-definite covariance.
    Full,
}

impl std::fmt::Display for Covariance {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Covariance::Diagonal => "diagonal",
            Covariance::Full => "full",
        })
    }
}

/// How mixtures are fitted and selected.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct MixtureOptions {
    /// Largest number of components tried by [`MixtureModel::select`] and
    /// [`MixtureModel::fit_counts`].
    pub max_components: usize,
    /// EM runs from different seeded starts per component count; the best is kept.
    pub restarts: usize,
    /// Most EM iterations per run.
    pub max_iterations: usize,
    /// A run stops when the mean log-likelihood per row improves by less than this.
    pub tolerance: f64,
    /// Added to each covariance's diagonal (in standardised units), so that no component
    /// collapses onto a point.
    pub regularisation: f64,
    /// Seed of the starts.
    pub seed: u64,
}

impl Default for MixtureOptions {
    fn default() -> Self {
        Self {
            max_components: 10,
            restarts: 3,
            max_iterations: 300,
            tolerance: 1e-7,
            regularisation: 1e-6,
            seed: 0,
        }
    }
}

impl MixtureOptions {
    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        use crate::util::limits::at_most;
        for (field, v) in [
            ("max_components", self.max_components),
            ("restarts", self.restarts),
            ("max_iterations", self.max_iterations),
        ] {
            if v == 0 {
                return Err(Error::config(field, 0, "must be at least 1"));
            }
        }
        at_most("max_components", self.max_components, 1000, "components")?;
        at_most("restarts", self.restarts, 1000, "restarts")?;
        at_most(
            "max_iterations",
            self.max_iterations,
            1_000_000,
            "iterations",
        )?;
        if !(self.tolerance >= 0.0 && self.tolerance.is_finite()) {
            return Err(Error::config(
                "tolerance",
                self.tolerance,
                "must be finite and >= 0",
            ));
        }
        crate::error::check_positive("regularisation", self.regularisation)
    }
}

/// A Gaussian mixture fitted to a table's rows by EM.
///
/// The rows are standardised first (means and scales of the rows fitted on); densities are
/// reported in the data's own units.
///
/// # Example
/// ```
/// use neural_sde::{Covariance, MixtureModel, MixtureOptions, Table};
/// // Two clouds (demo data, not a check).
/// let rows: Vec<Vec<f64>> = (0..200)
///     .map(|i| { let s = if i % 2 == 0 { -3.0 } else { 3.0 }; let e = (i as f64 * 0.7).sin(); vec![s + e, s - e] })
///     .collect();
/// let t = Table::new(vec!["x".into(), "y".into()], rows)?;
/// let m = MixtureModel::select(&t, Covariance::Full, &MixtureOptions::default())?;
/// assert!(m.components() >= 2);
/// let ll = m.log_density_rows(&t)?;
/// assert_eq!(ll.len(), 200);
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Debug, Clone)]
pub struct MixtureModel {
    covariance: Covariance,
    columns: Vec<String>,
    scaler: Standardizer,
    weights: Vec<f64>,
    /// `k × d`, standardised units.
    means: Vec<f64>,
    /// Lower Cholesky factor of each covariance, `k × d × d` (diagonal only for
    /// [`Covariance::Diagonal`]).
    chol: Vec<f64>,
    /// Total log-likelihood of the rows fitted on (standardised units).
    train_loglik: f64,
    train_rows: usize,
}

impl MixtureModel {
    /// Fits `components` components to the rows of `table` (the best of
    /// `options.restarts` seeded EM runs).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for bad options or more components than rows;
    /// [`Error::Data`] for a constant column.
    pub fn fit(
        table: &Table,
        components: usize,
        covariance: Covariance,
        options: &MixtureOptions,
    ) -> Result<Self> {
        options.validate()?;
        let n = table.n_rows();
        if components == 0 || components > n {
            return Err(Error::config(
                "components",
                components,
                format!("use between 1 and the number of rows ({n})"),
            ));
        }
        let scaler = Standardizer::fit(table)?;
        let z = scaler.transform(table);
        let d = table.n_cols();
        let mut best: Option<Em> = None;
        for restart in 0..options.restarts {
            let stream = 0x6d69_7800 + (components as u64) * 1000 + restart as u64;
            let mut rng = generator(options.seed, stream);
            let run = Em::run(&z, d, components, covariance, options, &mut rng)?;
            if best.as_ref().is_none_or(|b| run.loglik > b.loglik) {
                best = Some(run);
            }
            if components == 1 {
                break; // one component has one optimum
            }
        }
        let em = best.ok_or_else(|| Error::Training("no EM run finished".into()))?;
        Ok(Self {
            covariance,
            columns: table.columns().to_vec(),
            scaler,
            weights: em.weights,
            means: em.means,
            chol: em.chol,
            train_loglik: em.loglik,
            train_rows: n,
        })
    }

    /// The mixture with the lowest BIC among 1 to `options.max_components` components (the
    /// count stops before a mixture would have as many free parameters as the table has
    /// values).
    ///
    /// # Errors
    /// As [`MixtureModel::fit`].
    pub fn select(table: &Table, covariance: Covariance, options: &MixtureOptions) -> Result<Self> {
        let fits = Self::fit_counts(table, covariance, options)?;
        let best = lowest_bic(&fits);
        fits.into_iter().nth(best).ok_or_else(|| Error::Data {
            path: table.source().to_path_buf(),
            reason: "too few rows for even one Gaussian component; add rows".into(),
        })
    }

    /// The mixtures of 1, 2, … up to `options.max_components` components (as
    /// [`MixtureModel::select`] considers them: the count stops before a mixture would have
    /// as many free parameters as the table has values), in that order; empty when the
    /// table is too small for one component.
    ///
    /// # Errors
    /// As [`MixtureModel::fit`].
    pub fn fit_counts(
        table: &Table,
        covariance: Covariance,
        options: &MixtureOptions,
    ) -> Result<Vec<Self>> {
        options.validate()?;
        let values = table.n_rows() * table.n_cols();
        let mut fits = Vec::new();
        for k in 1..=options.max_components.min(table.n_rows()) {
            if parameter_count(k, table.n_cols(), covariance) >= values {
                break;
            }
            fits.push(Self::fit(table, k, covariance, options)?);
        }
        Ok(fits)
    }

    /// Weights, means (`k × d`) and covariances (`k × d × d`) in the units of the table
    /// fitted on (full covariances; a diagonal fit gives diagonal matrices).
    pub(crate) fn in_table_units(&self) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let d = self.columns.len();
        let s = &self.scaler.scale;
        let mut means = Vec::with_capacity(self.means.len());
        let mut covs = Vec::with_capacity(self.components() * d * d);
        for (m, l) in self
            .means
            .chunks_exact(d)
            .zip(self.chol.chunks_exact(d * d))
        {
            means.extend(self.scaler.inverse(m));
            for i in 0..d {
                for j in 0..d {
                    let c: f64 = (0..d).map(|k| l[i * d + k] * l[j * d + k]).sum();
                    covs.push(c * s[i] * s[j]);
                }
            }
        }
        (self.weights.clone(), means, covs)
    }

    /// The components' weights.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// The components' means, in the data's units.
    pub fn means(&self) -> Vec<Vec<f64>> {
        let d = self.columns.len();
        self.means
            .chunks_exact(d)
            .map(|m| self.scaler.inverse(m))
            .collect()
    }

    /// Number of components.
    pub fn components(&self) -> usize {
        self.weights.len()
    }

    /// The covariance shape.
    pub fn covariance(&self) -> Covariance {
        self.covariance
    }

    /// Free parameters: `k − 1` weights, `k·d` means, and `k·d` (diagonal) or `k·d(d+1)/2`
    /// (full) covariance entries.
    pub fn parameters(&self) -> usize {
        parameter_count(self.components(), self.columns.len(), self.covariance)
    }

    /// Mean log-likelihood per row of the rows fitted on, in the data's units.
    pub fn train_loglik_per_row(&self) -> f64 {
        self.train_loglik / self.train_rows as f64 + self.scaler.log_jacobian()
    }

    /// Bayesian information criterion `−2 log L + p log n` on the rows fitted on (lower is
    /// better; Schwarz 1978). The data's units shift `log L` by the same constant for every
    /// component count, so the choice does not depend on them.
    pub fn bic(&self) -> f64 {
        -2.0 * self.train_loglik + self.parameters() as f64 * (self.train_rows as f64).ln()
    }

    /// Log-density of each row of `table` (the model's columns, by name), in the data's
    /// units.
    ///
    /// # Errors
    /// [`Error::Data`] if the table lacks one of the columns fitted on.
    pub fn log_density_rows(&self, table: &Table) -> Result<Vec<f64>> {
        let t = if table.columns() == self.columns.as_slice() {
            table.clone()
        } else {
            table.select(&self.columns)?
        };
        let z = self.scaler.transform(&t);
        let d = self.columns.len();
        let jac = self.scaler.log_jacobian();
        let mut out = Vec::with_capacity(t.n_rows());
        let mut lp = vec![0.0; self.components()];
        for row in z.chunks_exact(d) {
            for (k, l) in lp.iter_mut().enumerate() {
                *l = self.weights[k].ln()
                    + log_normal(
                        row,
                        &self.means[k * d..(k + 1) * d],
                        &self.chol[k * d * d..(k + 1) * d * d],
                        d,
                    );
            }
            out.push(log_sum_exp(&lp) + jac);
        }
        Ok(out)
    }
}

/// The index of the mixture with the lowest BIC in `fits` (the first of equals; 0 when
/// empty).
pub(crate) fn lowest_bic(fits: &[MixtureModel]) -> usize {
    let mut best = 0;
    for (i, m) in fits.iter().enumerate() {
        if m.bic() < fits[best].bic() {
            best = i;
        }
    }
    best
}

/// Free parameters of a mixture (see [`MixtureModel::parameters`]).
fn parameter_count(k: usize, d: usize, covariance: Covariance) -> usize {
    let cov = match covariance {
        Covariance::Diagonal => d,
        Covariance::Full => d * (d + 1) / 2,
    };
    (k - 1) + k * d + k * cov
}

/// `log N(x; μ, L Lᵀ)` by forward substitution with the lower factor `l` (`d × d`).
fn log_normal(x: &[f64], mean: &[f64], l: &[f64], d: usize) -> f64 {
    let mut y = vec![0.0; d];
    let mut q = 0.0;
    let mut log_det = 0.0;
    for i in 0..d {
        let mut s = x[i] - mean[i];
        for j in 0..i {
            s -= l[i * d + j] * y[j];
        }
        y[i] = s / l[i * d + i];
        q += y[i] * y[i];
        log_det += l[i * d + i].ln();
    }
    -0.5 * (q + d as f64 * (2.0 * std::f64::consts::PI).ln()) - log_det
}

/// `log Σ exp(v)` without overflow (`−∞` for no term or all terms `−∞`).
pub(crate) fn log_sum_exp(v: &[f64]) -> f64 {
    let m = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + v.iter().map(|x| (x - m).exp()).sum::<f64>().ln()
}

/// One EM run.
struct Em {
    weights: Vec<f64>,
    means: Vec<f64>,
    chol: Vec<f64>,
    loglik: f64,
}

impl Em {
    fn run(
        z: &[f64],
        d: usize,
        k: usize,
        covariance: Covariance,
        options: &MixtureOptions,
        rng: &mut crate::util::rng::Generator,
    ) -> Result<Self> {
        let n = z.len() / d;
        // Start: k-means++ centres (Arthur & Vassilvitskii 2007, "k-means++: the advantages of
        // careful seeding", SODA), each row given wholly to its nearest centre.
        let centres = kmeans_pp(z, d, k, rng);
        let mut resp = vec![0.0; n * k];
        for (i, row) in z.chunks_exact(d).enumerate() {
            let nearest = (0..k)
                .min_by(|&a, &b| {
                    sq_dist(row, &centres[a * d..(a + 1) * d])
                        .total_cmp(&sq_dist(row, &centres[b * d..(b + 1) * d]))
                })
                .unwrap_or(0);
            resp[i * k + nearest] = 1.0;
        }
        let mut em = Self {
            weights: vec![0.0; k],
            means: vec![0.0; k * d],
            chol: vec![0.0; k * d * d],
            loglik: f64::NEG_INFINITY,
        };
        em.maximise(z, d, &resp, covariance, options.regularisation)?;
        let mut previous = f64::NEG_INFINITY;
        for _ in 0..options.max_iterations {
            em.loglik = em.expect(z, d, &mut resp);
            if !em.loglik.is_finite() {
                return Err(Error::NonFinite {
                    what: "Gaussian mixture log-likelihood".into(),
                    detail: "an EM step diverged; raise the regularisation".into(),
                });
            }
            if (em.loglik - previous) / (n as f64) < options.tolerance {
                break;
            }
            previous = em.loglik;
            em.maximise(z, d, &resp, covariance, options.regularisation)?;
        }
        Ok(em)
    }

    /// E-step: responsibilities; returns the total log-likelihood.
    fn expect(&self, z: &[f64], d: usize, resp: &mut [f64]) -> f64 {
        let k = self.weights.len();
        let mut total = 0.0;
        let mut lp = vec![0.0; k];
        for (i, row) in z.chunks_exact(d).enumerate() {
            for (c, l) in lp.iter_mut().enumerate() {
                *l = self.weights[c].ln()
                    + log_normal(
                        row,
                        &self.means[c * d..(c + 1) * d],
                        &self.chol[c * d * d..(c + 1) * d * d],
                        d,
                    );
            }
            let lse = log_sum_exp(&lp);
            total += lse;
            for c in 0..k {
                resp[i * k + c] = (lp[c] - lse).exp();
            }
        }
        total
    }

    /// M-step: weights, means and (regularised) covariances from responsibilities.
    fn maximise(
        &mut self,
        z: &[f64],
        d: usize,
        resp: &[f64],
        covariance: Covariance,
        reg: f64,
    ) -> Result<()> {
        let k = self.weights.len();
        let n = z.len() / d;
        for c in 0..k {
            let nk: f64 = (0..n).map(|i| resp[i * k + c]).sum::<f64>().max(1e-12);
            self.weights[c] = nk / n as f64;
            let mean = &mut self.means[c * d..(c + 1) * d];
            mean.iter_mut().for_each(|m| *m = 0.0);
            for (i, row) in z.chunks_exact(d).enumerate() {
                let r = resp[i * k + c];
                for (m, v) in mean.iter_mut().zip(row) {
                    *m += r * v / nk;
                }
            }
            let mut cov = vec![0.0; d * d];
            for (i, row) in z.chunks_exact(d).enumerate() {
                let r = resp[i * k + c];
                if r == 0.0 {
                    continue;
                }
                for a in 0..d {
                    let da = row[a] - mean[a];
                    match covariance {
                        Covariance::Diagonal => cov[a * d + a] += r * da * da / nk,
                        Covariance::Full => {
                            for b in 0..=a {
                                cov[a * d + b] += r * da * (row[b] - mean[b]) / nk;
                            }
                        }
                    }
                }
            }
            for a in 0..d {
                for b in 0..a {
                    cov[b * d + a] = cov[a * d + b];
                }
                cov[a * d + a] += reg;
            }
            let l = cholesky(&cov, d).ok_or_else(|| Error::NonFinite {
                what: "Gaussian mixture covariance".into(),
                detail: "a component's covariance is not positive definite; raise the regularisation or remove collinear columns".into(),
            })?;
            self.chol[c * d * d..(c + 1) * d * d].copy_from_slice(&l);
        }
        Ok(())
    }
}

fn sq_dist(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// k-means++ seeding: the first centre uniformly, each next one with probability
/// proportional to the squared distance to the nearest centre so far.
fn kmeans_pp(z: &[f64], d: usize, k: usize, rng: &mut crate::util::rng::Generator) -> Vec<f64> {
    use rand::Rng;
    let n = z.len() / d;
    let mut centres = Vec::with_capacity(k * d);
    let first = rng.random_range(0..n);
    centres.extend_from_slice(&z[first * d..(first + 1) * d]);
    let mut dist: Vec<f64> = z
        .chunks_exact(d)
        .map(|r| sq_dist(r, &centres[..d]))
        .collect();
    for _ in 1..k {
        let total: f64 = dist.iter().sum();
        let pick = if total > 0.0 {
            let mut u = rng.random::<f64>() * total;
            let mut pick = n - 1;
            for (i, w) in dist.iter().enumerate() {
                if u < *w {
                    pick = i;
                    break;
                }
                u -= w;
            }
            pick
        } else {
            rng.random_range(0..n)
        };
        let c = z[pick * d..(pick + 1) * d].to_vec();
        for (dv, r) in dist.iter_mut().zip(z.chunks_exact(d)) {
            *dv = dv.min(sq_dist(r, &c));
        }
        centres.extend(c);
    }
    centres
}
