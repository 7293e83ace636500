//! Data sets from `linfa-datasets` and the full-covariance Gaussian baseline.
#![allow(dead_code, clippy::needless_range_loop)]

use neural_sde::Table;

#[path = "dense.rs"]
mod linalg;

/// iris (Fisher 1936, Ann. Eugenics 7:179–188), 150 × 4, as shipped by linfa-datasets.
pub fn iris() -> Table {
    let ds = linfa_datasets::iris();
    to_table(
        ds.records(),
        &["sepal_length", "sepal_width", "petal_length", "petal_width"],
    )
}

/// Red wine quality (Cortez et al. 2009, Decision Support Systems 47(4):547–553), 1599 × 11.
pub fn winequality() -> Table {
    let ds = linfa_datasets::winequality();
    let names: Vec<String> = (0..ds.records().ncols()).map(|j| format!("x{j}")).collect();
    let refs: Vec<&str> = names.iter().map(String::as_str).collect();
    to_table(ds.records(), &refs)
}

/// Diabetes (Efron, Hastie, Johnstone, Tibshirani 2004, Ann. Stat. 32(2)), 441 × 10.
pub fn diabetes() -> Table {
    let ds = linfa_datasets::diabetes();
    let names: Vec<String> = (0..ds.records().ncols()).map(|j| format!("x{j}")).collect();
    let refs: Vec<&str> = names.iter().map(String::as_str).collect();
    to_table(ds.records(), &refs)
}

fn to_table(x: &ndarray::Array2<f64>, names: &[&str]) -> Table {
    let rows = x.outer_iter().map(|r| r.to_vec()).collect();
    Table::new(names.iter().map(|s| s.to_string()).collect(), rows).unwrap()
}

/// Split "mod5": row i is held out iff i % 5 == 4.
pub fn split_mod5(t: &Table) -> (Table, Table) {
    split_fold(t, 4)
}

/// Fold `fold` of five (common practice, no source): the rows with `i % 5 != fold` for
/// training and those with `i % 5 == fold` held out ([`split_mod5`] is fold 4).
pub fn split_fold(t: &Table, fold: usize) -> (Table, Table) {
    let train: Vec<usize> = (0..t.n_rows()).filter(|i| i % 5 != fold).collect();
    let test: Vec<usize> = (0..t.n_rows()).filter(|i| i % 5 == fold).collect();
    (t.take_rows(&train).unwrap(), t.take_rows(&test).unwrap())
}

/// Mean held-out log-density per dimension, in the data's units, of the maximum-likelihood
/// full-covariance Gaussian fitted on `train` (closed form: sample mean, covariance with
/// divisor n; e.g. Bishop 2006, *Pattern Recognition and Machine Learning*, §2.3.4).
pub fn gaussian_test_loglik_per_dim(train: &Table, test: &Table) -> f64 {
    let rows = gaussian_test_loglik_rows(train, test);
    rows.iter().sum::<f64>() / rows.len() as f64 / train.n_cols() as f64
}

/// Held-out log-density of each row of `test` (data units) under the maximum-likelihood
/// full-covariance Gaussian fitted on `train` (same closed form).
pub fn gaussian_test_loglik_rows(train: &Table, test: &Table) -> Vec<f64> {
    let d = train.n_cols();
    let n = train.n_rows() as f64;
    let mut mean = vec![0.0; d];
    for i in 0..train.n_rows() {
        for j in 0..d {
            mean[j] += train.row(i)[j] / n;
        }
    }
    let mut cov = vec![0.0; d * d];
    for i in 0..train.n_rows() {
        let r = train.row(i);
        for a in 0..d {
            for b in 0..d {
                cov[a * d + b] += (r[a] - mean[a]) * (r[b] - mean[b]) / n;
            }
        }
    }
    let l = linalg::cholesky(&cov, d).unwrap();
    let prec = linalg::cholesky_inverse(&l, d);
    let logdet = linalg::log_det_from_cholesky(&l, d);
    let c = -0.5 * (d as f64 * (2.0 * std::f64::consts::PI).ln() + logdet);
    let mut out = Vec::with_capacity(test.n_rows());
    for i in 0..test.n_rows() {
        let r = test.row(i);
        let diff: Vec<f64> = (0..d).map(|j| r[j] - mean[j]).collect();
        let mut q = 0.0;
        for a in 0..d {
            for b in 0..d {
                q += diff[a] * prec[a * d + b] * diff[b];
            }
        }
        out.push(c - 0.5 * q);
    }
    out
}

/// Σ_j log sd_j / d of the training rows (population sd), to convert standardised
/// per-dimension values to data units.
pub fn mean_log_sd(train: &Table) -> f64 {
    let d = train.n_cols();
    (0..d)
        .map(|j| {
            let c = train.column(j);
            let m = c.iter().sum::<f64>() / c.len() as f64;
            (c.iter().map(|v| (v - m).powi(2)).sum::<f64>() / c.len() as f64)
                .sqrt()
                .ln()
        })
        .sum::<f64>()
        / d as f64
}
