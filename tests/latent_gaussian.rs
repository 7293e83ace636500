//! Likelihood estimates of a linear-Gaussian latent model against its closed form.
#![allow(clippy::needless_range_loop)] // index loops mirror the textbook formulas
mod common;
#[path = "support/dense.rs"]
mod linalg;

use common::*;
use neural_sde::*;

/// A table drawn from N(μ, Σ) in 3-D with a fixed generator (demo data for the check; the
/// check itself is against the closed form below).
fn gaussian_table(n: usize) -> Table {
    let l = [[1.0, 0.0, 0.0], [0.6, 0.8, 0.0], [-0.3, 0.5, 0.7]];
    let mu = [2.0, -1.0, 0.5];
    let z = standard_normals(&mut generator(42, 0), n * 3);
    let rows = z
        .chunks_exact(3)
        .map(|e| {
            (0..3)
                .map(|i| mu[i] + (0..3).map(|k| l[i][k] * e[k]).sum::<f64>())
                .collect()
        })
        .collect();
    Table::new(vec!["a".into(), "b".into(), "c".into()], rows).unwrap()
}

/// Closed form: with zero prior drift Euler–Maruyama is exact, Z_T ~ N(0, σ²T I), so
/// y ~ N(b, σ²T W Wᵀ + (PᵀP)⁻¹) in standardised units (Gaussian marginalisation, e.g.
/// Bishop 2006, PRML §2.3.3), plus the Jacobian −Σ log scale_j for the data's units.
fn exact_loglik(m: &TabularModel, y: &[f64]) -> f64 {
    let d = 3;
    let w = param(m, "decoder.linear.weight");
    let b = param(m, "decoder.linear.bias");
    let lower = param(m, "decoder.precision_lower");
    let logd = param(m, "decoder.precision_log_diag");
    let mut p = vec![0.0; 9];
    for i in 0..d {
        for j in 0..i {
            p[i * d + j] = lower[i * d + j];
        }
        p[i * d + i] = logd[i].exp();
    }
    let pinv = linalg::lower_triangular_inverse(&p, d).unwrap();
    let mut cov = vec![0.0; 9];
    for i in 0..d {
        for j in 0..d {
            for k in 0..d {
                cov[i * d + j] += w[i * d + k] * w[j * d + k] + pinv[i * d + k] * pinv[j * d + k];
            }
        }
    }
    let l = linalg::cholesky(&cov, d).unwrap();
    let prec = linalg::cholesky_inverse(&l, d);
    let s = m.scaler();
    let z: Vec<f64> = (0..d)
        .map(|j| (y[j] - s.mean[j]) / s.scale[j] - b[j])
        .collect();
    let mut q = 0.0;
    for i in 0..d {
        for j in 0..d {
            q += z[i] * prec[i * d + j] * z[j];
        }
    }
    -0.5 * (q + linalg::log_det_from_cholesky(&l, d) + d as f64 * (2.0 * std::f64::consts::PI).ln())
        + s.log_jacobian()
}

#[test]
fn importance_weighted_estimate_tightens_to_closed_form() {
    let table = gaussian_table(400);
    let cfg = TrainConfig {
        validation_fraction: 0.0,
        ..Default::default()
    };
    let trainer = Trainer::new(&table, LatentConfig::default(), cfg).unwrap();
    let model = trainer.into_model();
    // Make the control suboptimal (its score gain far too small), so the ELBO is loose.
    {
        let map = model.latent().varmap().data().lock().unwrap();
        let v = &map["control.score_gain_a"];
        v.set(&v.as_tensor().affine(0.0, 2.0).unwrap()).unwrap();
    }
    let rows = table.take_rows(&(0..40).collect::<Vec<_>>()).unwrap();
    let exact: f64 = (0..40)
        .map(|i| exact_loglik(&model, rows.row(i)))
        .sum::<f64>()
        / 40.0;
    let mut last_gap = f64::INFINITY;
    let mut last = f64::NEG_INFINITY;
    for (k, seed) in [(1, 1), (8, 2), (64, 3), (1024, 4)] {
        let e = model.evaluate(&rows, EvalOptions::new(k, seed)).unwrap();
        // ELBO ≤ IWAE bound ≤ log p (Burda, Grosse & Salakhutdinov 2016, Theorem 1),
        // within Monte Carlo error.
        assert!(
            e.elbo_per_row <= e.loglik_per_row + 1e-9,
            "K={k}: ELBO above the IW estimate"
        );
        assert!(
            e.loglik_per_row <= exact + 4.0 * e.loglik_se / (40f64).sqrt() + 0.02,
            "K={k}: {} above exact {exact}",
            e.loglik_per_row
        );
        let gap = exact - e.loglik_per_row;
        assert!(
            gap < last_gap,
            "K={k}: the gap {gap} did not shrink (was {last_gap})"
        );
        assert!(e.loglik_per_row > last);
        last_gap = gap;
        last = e.loglik_per_row;
    }
    // At K = 1024 the estimate is within 0.05 nats per row of the closed form (the
    // remaining gap is the IW bias, O(1/K), plus float32 rounding).
    assert!(last_gap.abs() < 0.05, "gap at K = 1024: {last_gap}");
}

#[test]
fn initial_model_is_the_gaussian_fit_and_its_control_is_near_optimal() {
    // The untrained model's marginal is the ML Gaussian of the training rows and its
    // control is the exact optimal one, so the ELBO equals the log-likelihood up to the
    // Euler–Maruyama error of the control cost (small at 20 steps).
    let table = gaussian_table(300);
    let cfg = TrainConfig {
        validation_fraction: 0.0,
        ..Default::default()
    };
    let model = Trainer::new(&table, LatentConfig::default(), cfg)
        .unwrap()
        .into_model();
    let rows = table.take_rows(&(0..50).collect::<Vec<_>>()).unwrap();
    let exact_rows: Vec<f64> = (0..50).map(|i| exact_loglik(&model, rows.row(i))).collect();
    let exact = exact_rows.iter().sum::<f64>() / 50.0;
    let e = model.evaluate(&rows, EvalOptions::new(64, 9)).unwrap();
    // Per-row differences: Monte Carlo noise plus the O(1/K) bias of a log of a mean, which
    // is below 0.01 nats here at K = 64 (the ELBO gap bounds the weight variance).
    let diff: Vec<f64> = e
        .loglik_rows
        .iter()
        .zip(&exact_rows)
        .map(|(a, b)| a - b)
        .collect();
    let (dm, dse) = mean_se(&diff);
    assert_within("IW estimate − exact", dm, 0.0, dse, 4.0, 0.01);
    assert!(
        (e.elbo_per_row - exact).abs() < 0.1,
        "ELBO {} vs exact {exact}",
        e.elbo_per_row
    );
    // And the closed form is the ML Gaussian: compare with a direct fit of all rows
    // (the scaler and model were fitted on all 300 rows here).
    let d = 3;
    let n = table.n_rows() as f64;
    let mean: Vec<f64> = (0..d)
        .map(|j| table.column(j).iter().sum::<f64>() / n)
        .collect();
    let mut cov = vec![0.0; 9];
    for i in 0..table.n_rows() {
        let r = table.row(i);
        for a in 0..d {
            for b in 0..d {
                cov[a * d + b] += (r[a] - mean[a]) * (r[b] - mean[b]) / n;
            }
        }
    }
    let l = linalg::cholesky(&cov, d).unwrap();
    let prec = linalg::cholesky_inverse(&l, d);
    let ml: f64 = (0..50)
        .map(|i| {
            let r = rows.row(i);
            let z: Vec<f64> = (0..d).map(|j| r[j] - mean[j]).collect();
            let q: f64 = (0..d)
                .flat_map(|a| (0..d).map(move |b| (a, b)))
                .map(|(a, b)| z[a] * prec[a * d + b] * z[b])
                .sum();
            -0.5 * (q
                + linalg::log_det_from_cholesky(&l, d)
                + d as f64 * (2.0 * std::f64::consts::PI).ln())
        })
        .sum::<f64>()
        / 50.0;
    assert_rel("model marginal vs ML Gaussian", exact, ml, 1e-4);
}
