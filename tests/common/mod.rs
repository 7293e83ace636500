//! Helpers shared by the integration tests (statistics and small closed forms).
#![allow(dead_code)]

use candle_core::{DType, Tensor};

/// Sample mean and its standard error.
pub fn mean_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
    (m, (var / n).sqrt())
}

/// Sample variance and the standard error of the sample variance (normal-theory
/// approximation `Var·√(2/(n−1))`, plus the fourth-moment form for robustness).
pub fn var_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let c: Vec<f64> = v.iter().map(|x| (x - m).powi(2)).collect();
    let (var, se_mean_sq) = mean_se(&c);
    (var * n / (n - 1.0), se_mean_sq)
}

/// `|got − want| ≤ k·se + slack`, with a readable failure message.
pub fn assert_within(what: &str, got: f64, want: f64, se: f64, k: f64, slack: f64) {
    let tol = k * se + slack;
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got}, want {want} (|diff| = {} > {k}·SE {se} + {slack})",
        (got - want).abs()
    );
}

/// Relative closeness `|a − b| ≤ tol·max(1, |b|)`.
pub fn assert_rel(what: &str, got: f64, want: f64, tol: f64) {
    assert!(
        (got - want).abs() <= tol * want.abs().max(1.0),
        "{what}: got {got}, want {want} (rel tol {tol})"
    );
}

/// Column of a `(batch, d)` tensor as f64.
pub fn column(t: &Tensor, j: usize) -> Vec<f64> {
    t.to_dtype(DType::F64)
        .unwrap()
        .to_vec2::<f64>()
        .unwrap()
        .into_iter()
        .map(|r| r[j])
        .collect()
}

/// A tabular model's parameter `name`, flattened, as f64.
pub fn param(m: &neural_sde::TabularModel, name: &str) -> Vec<f64> {
    let map = m.latent().varmap().data().lock().unwrap();
    map[name]
        .as_tensor()
        .to_dtype(DType::F64)
        .unwrap()
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap()
}

/// A `(batch,)` tensor as f64.
pub fn vec1(t: &Tensor) -> Vec<f64> {
    t.to_dtype(DType::F64).unwrap().to_vec1::<f64>().unwrap()
}

/// Least-squares slope of log(err) against log(h).
pub fn log_log_slope(h: &[f64], err: &[f64]) -> f64 {
    let x: Vec<f64> = h.iter().map(|v| v.ln()).collect();
    let y: Vec<f64> = err.iter().map(|v| v.ln()).collect();
    let n = x.len() as f64;
    let mx = x.iter().sum::<f64>() / n;
    let my = y.iter().sum::<f64>() / n;
    let sxy: f64 = x.iter().zip(&y).map(|(a, b)| (a - mx) * (b - my)).sum();
    let sxx: f64 = x.iter().map(|a| (a - mx).powi(2)).sum();
    sxy / sxx
}

/// The closed-form Föllmer drift for a Gaussian target `N(m, diag s)` against `N(0, I)`:
/// `u*(x, t) = (m + (s − 1) x) / (1 + (s − 1) t)` per coordinate.
/// Source: derived from Föllmer's representation `u* = ∇ log Q_{1−t}(dπ/dγ)`
/// (H. Föllmer 1985, from memory; J. Lehec 2013, *Representation formula for the entropy and
/// functional inequalities*, Ann. IHP, from memory).
pub fn follmer_gaussian_diag(m: &[f64], s: &[f64], x: &[f64], t: f64) -> Vec<f64> {
    (0..m.len())
        .map(|i| (m[i] + (s[i] - 1.0) * x[i]) / (1.0 + (s[i] - 1.0) * t))
        .collect()
}

/// Demo rows from a fixed generator (not a check): a correlated Gaussian in two columns,
/// `x = 10 + 2 e₁`, `y = −3 + 0.5 (0.8 e₁ + 0.6 e₂)`.
pub fn correlated_table(n: usize) -> neural_sde::Table {
    use neural_sde::{generator, standard_normals};
    let z = standard_normals(&mut generator(8, 0), n * 2);
    let rows = z
        .chunks_exact(2)
        .map(|e| vec![10.0 + 2.0 * e[0], -3.0 + 0.5 * (0.8 * e[0] + 0.6 * e[1])])
        .collect();
    neural_sde::Table::new(vec!["x".into(), "y".into()], rows).unwrap()
}
