//! How close generated rows are to real ones: per-column two-sample statistics, the largest
//! difference of correlations, and a multivariate two-sample test.

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::tabular::table::Table;
use crate::util::rng::{generator, uniform};

/// Settings of [`compare_samples`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct CompareOptions {
    /// Permutations of the energy-distance test.
    pub permutations: usize,
    /// Rows of each table the energy distance uses at most (a seeded subset beyond).
    pub max_rows: usize,
    /// Seed of the subsets and permutations.
    pub seed: u64,
}

impl Default for CompareOptions {
    fn default() -> Self {
        Self {
            permutations: 199,
            max_rows: 500,
            seed: 0,
        }
    }
}

impl CompareOptions {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for 0 permutations, fewer than 2 rows, or more than the
    /// crate allows (100,000 permutations, 20,000 rows).
    pub fn validate(&self) -> Result<()> {
        if self.permutations == 0 || self.max_rows < 2 {
            return Err(Error::config(
                "permutations / max_rows",
                format!("{} / {}", self.permutations, self.max_rows),
                "use at least 1 permutation and 2 rows",
            ));
        }
        crate::util::limits::at_most("permutations", self.permutations, 100_000, "permutations")?;
        crate::util::limits::at_most("max_rows", self.max_rows, 20_000, "rows")
    }
}

/// One column's two-sample statistic.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ColumnComparison {
    /// Column name.
    pub column: String,
    /// `"ks"` (continuous: the two-sample Kolmogorov–Smirnov statistic, the largest gap
    /// between the two empirical distribution functions) or `"tv"` (categorical: the total
    /// variation distance of the level frequencies, half the sum of absolute differences).
    pub statistic: String,
    /// Its value, in `[0, 1]`: 0 for identical marginals.
    pub value: f64,
}

/// What [`compare_samples`] reports (see the field docs for each figure).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SampleComparison {
    /// Rows of the first table (generated).
    pub rows_generated: usize,
    /// Rows of the second table (data).
    pub rows_data: usize,
    /// Per column: Kolmogorov–Smirnov or total variation.
    pub columns: Vec<ColumnComparison>,
    /// The largest absolute difference between the two tables' Pearson correlation matrices
    /// of the continuous columns (rows with those cells observed; `NaN` for fewer than two
    /// continuous columns).
    pub max_correlation_difference: f64,
    /// The energy distance `2E|X−Y| − E|X−X'| − E|Y−Y'|` between the rows (continuous cells
    /// in units of the data's standard deviations, categorical cells one-hot over √2; rows
    /// with every cell observed): 0 exactly when the two distributions agree (Székely &
    /// Rizzo 2013, "Energy statistics: a class of statistics based on distances", J. Stat.
    /// Planning and Inference 143(8)).
    pub energy_distance: f64,
    /// Permutation p-value of the energy distance: the share of random relabellings of the
    /// pooled rows with a distance at least as large, `(1 + count) / (1 + permutations)`.
    /// Small values say the generated rows are distinguishable from the data.
    pub energy_p_value: f64,
    /// Permutations behind the p-value.
    pub permutations: usize,
}

impl std::fmt::Display for SampleComparison {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(
            f,
            "generated rows ({}) against data rows ({}):",
            self.rows_generated, self.rows_data
        )?;
        for c in &self.columns {
            let what = if c.statistic == "ks" {
                "Kolmogorov–Smirnov (largest gap of the two CDFs)"
            } else {
                "total variation (half the summed gaps of level frequencies)"
            };
            writeln!(f, "  {:<24} {:7.4}  {what}", c.column, c.value)?;
        }
        writeln!(
            f,
            "  largest correlation gap  {:7.4}  max |corr(generated) − corr(data)| over continuous pairs",
            self.max_correlation_difference
        )?;
        write!(
            f,
            "  energy distance          {:7.4}  p = {:.3} by {} permutations (small p: the rows are told apart)",
            self.energy_distance, self.energy_p_value, self.permutations
        )
    }
}

/// Two-sample Kolmogorov–Smirnov statistic `sup_x |F_a(x) − F_b(x)|` of two samples.
pub(crate) fn ks_statistic(a: &[f64], b: &[f64]) -> f64 {
    let mut a = a.to_vec();
    let mut b = b.to_vec();
    a.sort_by(f64::total_cmp);
    b.sort_by(f64::total_cmp);
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let (mut i, mut j, mut d) = (0, 0, 0.0f64);
    while i < a.len() && j < b.len() {
        let x = a[i].min(b[j]);
        while i < a.len() && a[i] <= x {
            i += 1;
        }
        while j < b.len() && b[j] <= x {
            j += 1;
        }
        d = d.max((i as f64 / na - j as f64 / nb).abs());
    }
    d
}

fn observed(t: &Table, j: usize) -> Vec<f64> {
    t.column(j).into_iter().filter(|v| !v.is_nan()).collect()
}

fn correlations(t: &Table, cols: &[usize]) -> Vec<f64> {
    let rows: Vec<Vec<f64>> = (0..t.n_rows())
        .map(|i| cols.iter().map(|&j| t.row(i)[j]).collect::<Vec<f64>>())
        .filter(|r| r.iter().all(|v| !v.is_nan()))
        .collect();
    let k = cols.len();
    let n = rows.len().max(1) as f64;
    let mean: Vec<f64> = (0..k)
        .map(|a| rows.iter().map(|r| r[a]).sum::<f64>() / n)
        .collect();
    let mut c = vec![0.0; k * k];
    for r in &rows {
        for a in 0..k {
            for b in 0..k {
                c[a * k + b] += (r[a] - mean[a]) * (r[b] - mean[b]);
            }
        }
    }
    let mut out = vec![0.0; k * k];
    for a in 0..k {
        for b in 0..k {
            out[a * k + b] = c[a * k + b] / (c[a * k + a] * c[b * k + b]).sqrt();
        }
    }
    out
}

/// Compares generated rows with data rows of the same columns and types (see
/// [`SampleComparison`]).
///
/// # Errors
/// [`Error::Data`] if the tables' columns or types differ, or a column has no observed cell
/// in one of them; [`Error::InvalidConfig`] for bad options ([`CompareOptions::validate`]).
///
/// # Example
/// ```
/// use neural_sde::{compare_samples, CompareOptions, Table};
/// let a = Table::new(vec!["x".into()], (0..40).map(|i| vec![i as f64]).collect())?;
/// let b = Table::new(vec!["x".into()], (0..40).map(|i| vec![i as f64 + 100.0]).collect())?;
/// let c = compare_samples(&a, &b, CompareOptions::default())?;
/// assert_eq!(c.columns[0].value, 1.0); // the two CDFs never overlap
/// assert!(c.energy_p_value < 0.01); // told apart
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub fn compare_samples(
    generated: &Table,
    data: &Table,
    options: CompareOptions,
) -> Result<SampleComparison> {
    options.validate()?;
    if generated.columns() != data.columns() || generated.kinds() != data.kinds() {
        return Err(Error::Data {
            path: data.source().to_path_buf(),
            reason: "the generated rows and the data have different columns or column types".into(),
        });
    }
    let d = data.n_cols();
    let mut columns = Vec::with_capacity(d);
    let mut cont = Vec::new();
    for j in 0..d {
        let (a, b) = (observed(generated, j), observed(data, j));
        if a.is_empty() || b.is_empty() {
            return Err(Error::Data {
                path: data.source().to_path_buf(),
                reason: format!(
                    "column '{}' has no observed cell in one of the tables",
                    crate::util::text::clip(&data.columns()[j])
                ),
            });
        }
        let (statistic, value) = match data.kinds()[j].levels() {
            None => {
                cont.push(j);
                ("ks", ks_statistic(&a, &b))
            }
            Some(levels) => {
                let freq = |v: &[f64]| -> Vec<f64> {
                    let mut f = vec![0.0; levels.len()];
                    for &x in v {
                        if let Some(c) = f.get_mut(x as usize) {
                            *c += 1.0 / v.len() as f64;
                        }
                    }
                    f
                };
                let (fa, fb) = (freq(&a), freq(&b));
                (
                    "tv",
                    0.5 * fa.iter().zip(&fb).map(|(x, y)| (x - y).abs()).sum::<f64>(),
                )
            }
        };
        columns.push(ColumnComparison {
            column: data.columns()[j].clone(),
            statistic: statistic.into(),
            value,
        });
    }
    let max_correlation_difference = if cont.len() < 2 {
        f64::NAN
    } else {
        let (ca, cb) = (correlations(generated, &cont), correlations(data, &cont));
        ca.iter()
            .zip(&cb)
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f64::max)
    };
    let (energy_distance, energy_p_value) = energy_test(generated, data, &cont, options)?;
    Ok(SampleComparison {
        rows_generated: generated.n_rows(),
        rows_data: data.n_rows(),
        columns,
        max_correlation_difference,
        energy_distance,
        energy_p_value,
        permutations: options.permutations,
    })
}

/// Feature vectors of the complete rows of `t` (at most `max` of them, a seeded subset).
fn features(t: &Table, cont: &[usize], sd: &[f64], max: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rows: Vec<usize> = (0..t.n_rows())
        .filter(|&i| t.row(i).iter().all(|v| !v.is_nan()))
        .collect();
    if rows.len() > max {
        let mut rng = generator(seed, 11);
        let last = rows.len() - 1;
        for k in 0..max {
            let pick = k + (uniform(&mut rng) * (rows.len() - k) as f64) as usize;
            rows.swap(k, pick.min(last));
        }
        rows.truncate(max);
    }
    rows.iter()
        .map(|&i| {
            let r = t.row(i);
            let mut f = Vec::new();
            for (j, kind) in t.kinds().iter().enumerate() {
                match kind.levels() {
                    None => {
                        let c = cont.iter().position(|&x| x == j).unwrap_or(0);
                        f.push(r[j] / sd[c]);
                    }
                    Some(levels) => {
                        for l in 0..levels.len() {
                            f.push(if r[j] as usize == l {
                                std::f64::consts::FRAC_1_SQRT_2
                            } else {
                                0.0
                            });
                        }
                    }
                }
            }
            f
        })
        .collect()
}

fn energy_test(
    generated: &Table,
    data: &Table,
    cont: &[usize],
    options: CompareOptions,
) -> Result<(f64, f64)> {
    let sd: Vec<f64> = cont
        .iter()
        .map(|&j| {
            let v = observed(data, j);
            let m = v.iter().sum::<f64>() / v.len() as f64;
            let s = (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / v.len() as f64).sqrt();
            if s > 0.0 {
                s
            } else {
                1.0
            }
        })
        .collect();
    let a = features(generated, cont, &sd, options.max_rows, options.seed);
    let b = features(data, cont, &sd, options.max_rows, options.seed ^ 1);
    if a.len() < 2 || b.len() < 2 {
        return Err(Error::Data {
            path: data.source().to_path_buf(),
            reason: "fewer than 2 rows with every cell observed in one of the tables; the energy distance needs complete rows".into(),
        });
    }
    let pooled: Vec<&Vec<f64>> = a.iter().chain(&b).collect();
    let n = pooled.len();
    let mut dist = vec![0.0; n * n];
    for i in 0..n {
        for j in i + 1..n {
            let v = pooled[i]
                .iter()
                .zip(pooled[j])
                .map(|(x, y)| (x - y).powi(2))
                .sum::<f64>()
                .sqrt();
            dist[i * n + j] = v;
            dist[j * n + i] = v;
        }
    }
    let na = a.len();
    let energy = |label: &[bool]| -> f64 {
        let (mut xy, mut xx, mut yy) = (0.0, 0.0, 0.0);
        for i in 0..n {
            for j in 0..n {
                let v = dist[i * n + j];
                match (label[i], label[j]) {
                    (true, true) => xx += v,
                    (false, false) => yy += v,
                    _ => xy += v,
                }
            }
        }
        let nb = (n - na) as f64;
        let na = na as f64;
        2.0 * (xy / 2.0) / (na * nb) - xx / (na * na) - yy / (nb * nb)
    };
    let mut label: Vec<bool> = (0..n).map(|i| i < na).collect();
    let observed_e = energy(&label);
    let mut rng = generator(options.seed, 12);
    let mut above = 0usize;
    for _ in 0..options.permutations {
        for k in (1..n).rev() {
            let j = ((uniform(&mut rng) * (k + 1) as f64) as usize).min(k);
            label.swap(k, j);
        }
        if energy(&label) >= observed_e {
            above += 1;
        }
    }
    Ok((
        observed_e,
        (1 + above) as f64 / (1 + options.permutations) as f64,
    ))
}
