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
    let logpdf = ml_gaussian_logpdf(&table);
    let ml: f64 = (0..50).map(|i| logpdf(rows.row(i))).sum::<f64>() / 50.0;
    assert_rel("model marginal vs ML Gaussian", exact, ml, 1e-4);
}

/// The log-density of the maximum-likelihood Gaussian of `t`'s rows (mean and covariance
/// with divisor n), by Cholesky factors from nalgebra (`support/dense.rs`).
fn ml_gaussian_logpdf(t: &Table) -> impl Fn(&[f64]) -> f64 {
    let (d, n) = (t.n_cols(), t.n_rows() as f64);
    let mean: Vec<f64> = (0..d)
        .map(|j| t.column(j).iter().sum::<f64>() / n)
        .collect();
    let mut cov = vec![0.0; d * d];
    for i in 0..t.n_rows() {
        let r = t.row(i);
        for a in 0..d {
            for b in 0..d {
                cov[a * d + b] += (r[a] - mean[a]) * (r[b] - mean[b]) / n;
            }
        }
    }
    let l = linalg::cholesky(&cov, d).unwrap();
    let prec = linalg::cholesky_inverse(&l, d);
    let log_det = linalg::log_det_from_cholesky(&l, d);
    move |y: &[f64]| {
        let z: Vec<f64> = (0..d).map(|j| y[j] - mean[j]).collect();
        let q: f64 = (0..d)
            .flat_map(|a| (0..d).map(move |b| (a, b)))
            .map(|(a, b)| z[a] * prec[a * d + b] * z[b])
            .sum();
        -0.5 * (q + log_det + d as f64 * (2.0 * std::f64::consts::PI).ln())
    }
}

/// The untrained model of `t` from one Gaussian, trained on every row: the ML Gaussian of
/// the rows with its optimal control (the test above).
fn untrained(t: &Table) -> TabularModel {
    let model = LatentConfig {
        noise_components: Some(1),
        ..LatentConfig::default()
    };
    let cfg = TrainConfig {
        validation_fraction: 0.0,
        batch_size: 32,
        ..Default::default()
    };
    Trainer::new(t, model, cfg).unwrap().into_model()
}

/// iris's setosa rows (0–49) and the other two species' rows (50–149).
fn iris_groups() -> (Table, Table, Table) {
    // iris (Fisher 1936, Ann. Eugenics 7:179–188), 150 × 4, as linfa-datasets ships it.
    let x = linfa_datasets::iris().records().clone();
    let rows = x.outer_iter().map(|r| r.to_vec()).collect();
    let names = ["sepal_length", "sepal_width", "petal_length", "petal_width"];
    let iris = Table::new(names.iter().map(|s| s.to_string()).collect(), rows).unwrap();
    let a = iris.take_rows(&(0..50).collect::<Vec<_>>()).unwrap();
    let b = iris.take_rows(&(50..150).collect::<Vec<_>>()).unwrap();
    (iris, a, b)
}

#[test]
fn an_ensemble_of_untrained_models_is_the_mixture_of_their_gaussians() {
    // Each member is the ML Gaussian of its rows, so the ensemble with weights 1/4 and 3/4
    // is the two-component mixture ¼ N(μ₁, Σ₁) + ¾ N(μ₂, Σ₂) (mixture density: Bishop
    // 2006, PRML eq. 9.7), computed here in closed form on iris (Fisher 1936) rows of all
    // three species.
    let (iris, a, b) = iris_groups();
    let ensemble = Ensemble::with_weights(vec![untrained(&a), untrained(&b)], &[1.0, 3.0]).unwrap();
    assert_eq!(ensemble.weights(), &[0.25, 0.75]);
    let rows = iris
        .take_rows(&(0..150).step_by(3).collect::<Vec<_>>())
        .unwrap();
    let (pa, pb) = (ml_gaussian_logpdf(&a), ml_gaussian_logpdf(&b));
    let exact: Vec<f64> = (0..rows.n_rows())
        .map(|i| {
            let (la, lb) = (
                0.25f64.ln() + pa(rows.row(i)),
                0.75f64.ln() + pb(rows.row(i)),
            );
            let top = la.max(lb);
            top + ((la - top).exp() + (lb - top).exp()).ln()
        })
        .collect();
    let e = ensemble.evaluate(&rows, EvalOptions::new(64, 9)).unwrap();
    assert_eq!(e.loglik_rows.len(), 50);
    let diff: Vec<f64> = e
        .loglik_rows
        .iter()
        .zip(&exact)
        .map(|(a, b)| a - b)
        .collect();
    // Row by row the estimate is near the closed form (Monte Carlo noise plus the O(1/K)
    // bias of a log of a mean, as in the test above); checked apart on the setosa rows and
    // on the others, so that a wrong weight on either member shows (it shifts the two
    // groups' figures in opposite directions).
    for (group, setosa) in [("setosa", true), ("other species", false)] {
        let d: Vec<f64> = (0..50)
            .filter(|i| (3 * i < 50) == setosa)
            .map(|i| diff[i])
            .collect();
        let (dm, dse) = mean_se(&d);
        assert_within(
            &format!("ensemble IW estimate − exact mixture, {group} rows"),
            dm,
            0.0,
            dse,
            4.0,
            0.01,
        );
    }
    // Each member's ELBO bounds its log-likelihood, so the ensemble's ELBO bounds its own.
    assert!(e.elbo_per_row <= e.loglik_per_row + 1e-9);
    // The mixture beats each member alone on rows of all species (setosa rows lie far
    // in the tail of the other species' Gaussian and the reverse).
    for m in ensemble.members() {
        let alone = m.evaluate(&rows, EvalOptions::new(64, 9)).unwrap();
        assert!(e.loglik_per_row > alone.loglik_per_row + 1.0);
    }
}

#[test]
fn an_ensemble_of_one_model_twice_is_that_model() {
    // log(½ p + ½ p) = log p, row by row (algebra; no source needed).
    let (_, a, _) = iris_groups();
    let one = || untrained(&a);
    let ensemble = Ensemble::new(vec![one(), one()]).unwrap();
    let alone = one().evaluate(&a, EvalOptions::new(16, 3)).unwrap();
    let both = ensemble.evaluate(&a, EvalOptions::new(16, 3)).unwrap();
    for (x, y) in alone.loglik_rows.iter().zip(&both.loglik_rows) {
        assert!((x - y).abs() < 1e-9, "{x} vs {y}");
    }
    for (x, y) in alone.elbo_rows.iter().zip(&both.elbo_rows) {
        assert!((x - y).abs() < 1e-9, "{x} vs {y}");
    }
    assert_eq!(both.observed_cells, alone.observed_cells);
}

#[test]
fn an_ensemble_generates_from_each_member_in_proportion_to_its_weight() {
    // The mean of a mixture is the weighted mean of its components' means (Bishop 2006,
    // PRML eq. 9.7 integrated against y); each untrained member's mean is its rows' mean.
    let (_, a, b) = iris_groups();
    let ensemble = Ensemble::with_weights(vec![untrained(&a), untrained(&b)], &[1.0, 3.0]).unwrap();
    let g = ensemble.generate(20_000, 5).unwrap();
    assert_eq!(g.columns(), a.columns());
    assert_eq!(g.n_rows(), 20_000);
    for j in 0..4 {
        let mean = |t: &Table| t.column(j).iter().sum::<f64>() / t.n_rows() as f64;
        let want = 0.25 * mean(&a) + 0.75 * mean(&b);
        let (gm, gse) = mean_se(&g.column(j));
        assert_within(&format!("mean of column {j}"), gm, want, gse, 4.0, 0.0);
    }
    // Petal length (column 2) separates setosa (below 2.5 cm) from the rest: the share of
    // generated rows below it is the first weight, within 4 binomial standard errors.
    let share = g.column(2).iter().filter(|&&v| v < 2.5).count() as f64 / 20_000.0;
    let se = (0.25f64 * 0.75 / 20_000.0).sqrt();
    assert!((share - 0.25).abs() < 4.0 * se + 0.005, "share {share}");
    // Seeded.
    assert_eq!(
        ensemble.generate(50, 5).unwrap().values(),
        ensemble.generate(50, 5).unwrap().values()
    );
    assert_ne!(
        ensemble.generate(50, 5).unwrap().values(),
        ensemble.generate(50, 6).unwrap().values()
    );
    // The file gets the rows `generate` returns, and the call returns them too.
    let path = std::env::temp_dir().join(format!("ensemble-{}.csv", std::process::id()));
    let kept = ensemble.generate_csv(&path, 50, 5).unwrap();
    assert_eq!(kept.values(), ensemble.generate(50, 5).unwrap().values());
    let back = Table::from_csv(&path, None).unwrap();
    std::fs::remove_file(&path).unwrap();
    assert_eq!(back.n_rows(), 50);
    for (x, y) in back.values().iter().zip(kept.values()) {
        assert!((x - y).abs() <= 1e-12 * y.abs().max(1.0), "{x} vs {y}");
    }
}

#[test]
fn an_ensemble_refuses_bad_members_and_weights() {
    let (_, a, _) = iris_groups();
    let short = a.select(&a.columns()[..3]).unwrap();
    let bad = |r: Result<Ensemble>, what: &str| {
        let msg = r.unwrap_err().to_string();
        assert!(msg.contains(what), "{msg}");
    };
    bad(Ensemble::new(Vec::new()), "at least one fitted model");
    bad(
        Ensemble::with_weights(vec![untrained(&a)], &[1.0, 1.0]),
        "one weight per member",
    );
    for w in [0.0, -1.0, f64::NAN, f64::INFINITY] {
        bad(
            Ensemble::with_weights(vec![untrained(&a), untrained(&a)], &[1.0, w]),
            "finite and positive",
        );
    }
    bad(
        Ensemble::with_weights(vec![untrained(&a), untrained(&a)], &[f64::MAX, f64::MAX]),
        "overflows",
    );
    bad(
        Ensemble::new(vec![untrained(&a), untrained(&short)]),
        "member 1 models the columns",
    );
}

#[test]
fn generating_in_memory_is_bounded_the_same_way_for_a_model_and_an_ensemble() {
    // Common practice, no source: a row count that would not fit in memory is a typed
    // error naming the count and the streaming alternative, not an allocation failure.
    let (_, a, _) = iris_groups();
    let model = untrained(&a);
    let ensemble = Ensemble::new(vec![untrained(&a), untrained(&a)]).unwrap();
    let too_many = TabularModel::KEPT_ROWS * 100 + 1;
    for e in [
        model.generate(too_many, 0).unwrap_err(),
        ensemble.generate(too_many, 0).unwrap_err(),
    ] {
        assert!(
            matches!(e, Error::InvalidConfig { field: "rows", .. }),
            "{e}"
        );
        let msg = e.to_string();
        assert!(msg.contains(&too_many.to_string()), "{msg}");
        assert!(msg.contains("generate_csv"), "{msg}");
    }
    for e in [
        model.generate(0, 0).unwrap_err(),
        ensemble.generate(0, 0).unwrap_err(),
    ] {
        assert!(e.to_string().contains("at least 1 row"), "{e}");
    }
    // A count inside the bound generates.
    assert_eq!(ensemble.generate(1, 0).unwrap().n_rows(), 1);
}

#[test]
fn an_ensemble_file_reads_back_as_the_same_mixture() {
    // Round trip of the file format: the loaded ensemble has the same weights and gives the
    // same figures, row by row, as the one saved (whose figures the closed-form test above
    // checks); a single model's reader refuses the file and says what reads it.
    let (iris, a, b) = iris_groups();
    let ensemble = Ensemble::with_weights(vec![untrained(&a), untrained(&b)], &[1.0, 3.0]).unwrap();
    let dir = std::env::temp_dir().join(format!("ensemble-file-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("pair.safetensors");
    ensemble.save(&path).unwrap();
    let back = Ensemble::load(&path).unwrap();
    assert_eq!(back.weights(), ensemble.weights());
    let options = EvalOptions::new(16, 5);
    let (x, y) = (
        ensemble.evaluate(&iris, options).unwrap(),
        back.evaluate(&iris, options).unwrap(),
    );
    assert_eq!(x.loglik_rows, y.loglik_rows);
    assert_eq!(x.elbo_rows, y.elbo_rows);
    let msg = TabularModel::load(&path).unwrap_err().to_string();
    assert!(
        msg.contains("ensemble") && msg.contains("Ensemble::load"),
        "{msg}"
    );
    let members = inspect_members(&path).unwrap();
    assert_eq!(members.len(), 2);
    assert_eq!((members[0].weight, members[1].weight), (0.25, 0.75));
    // One member: a single model's file, which both readers read.
    let one = Ensemble::new(vec![untrained(&a)]).unwrap();
    let single = dir.join("one.safetensors");
    one.save(&single).unwrap();
    TabularModel::load(&single).unwrap();
    assert_eq!(Ensemble::load(&single).unwrap().members().len(), 1);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Mean and covariance (divisor n) of `t`'s rows.
fn ml_moments(t: &Table) -> (Vec<f64>, nalgebra::DMatrix<f64>) {
    let (d, n) = (t.n_cols(), t.n_rows() as f64);
    let mean: Vec<f64> = (0..d)
        .map(|j| t.column(j).iter().sum::<f64>() / n)
        .collect();
    let mut cov = nalgebra::DMatrix::zeros(d, d);
    for i in 0..t.n_rows() {
        let r = t.row(i);
        for a in 0..d {
            for b in 0..d {
                cov[(a, b)] += (r[a] - mean[a]) * (r[b] - mean[b]) / n;
            }
        }
    }
    (mean, cov)
}

#[test]
fn an_ensemble_imputes_from_the_mixture_conditional() {
    // Members: the ML Gaussians of iris's setosa rows and of the other rows, weights ¼ and
    // ¾. Given a row's other three cells y_o, its petal length's conditional under the
    // mixture is Σ_m r_m N(μ_m|o, σ²_m|o) with responsibilities r_m ∝ w_m N(y_o; μ_m,o,
    // Σ_m,oo) (Bishop 2006, PRML eq. 9.13) and each component's Gaussian conditional
    // μ_m|o = μ_m,p + Σ_m,po Σ_m,oo⁻¹ (y_o − μ_m,o), σ²_m|o = Σ_m,pp − Σ_m,po Σ_m,oo⁻¹
    // Σ_m,op (PRML eqs. 2.81–2.82), computed here with nalgebra.
    let (iris, a, b) = iris_groups();
    let ensemble = Ensemble::with_weights(vec![untrained(&a), untrained(&b)], &[1.0, 3.0]).unwrap();
    // Every fifth iris row, and three query points on the segment between the two groups'
    // means, where both members carry weight.
    let (ma, mb) = (ml_moments(&a).0, ml_moments(&b).0);
    let mut queries: Vec<Vec<f64>> = (0..150).step_by(5).map(|r| iris.row(r).to_vec()).collect();
    for t in [0.3, 0.4, 0.5] {
        queries.push((0..4).map(|j| (1.0 - t) * ma[j] + t * mb[j]).collect());
    }
    let holes: Vec<(usize, usize)> = (0..queries.len()).map(|i| (i, 2)).collect();
    let table = Table::new(iris.columns().to_vec(), queries.clone())
        .unwrap()
        .with_missing(&holes)
        .unwrap();
    let options = ImputeOptions {
        paths: 256,
        draws: 2,
        seed: 4,
    };
    let result = ensemble.impute(&table, options).unwrap();
    assert_eq!(result.cells.len(), queries.len());
    let (obs, p) = ([0usize, 1, 3], 2usize);
    let members: Vec<_> = [(&a, 0.25f64), (&b, 0.75)]
        .into_iter()
        .map(|(t, w)| (ml_moments(t), w))
        .collect();
    let mut errors = Vec::new();
    let mut mixed = 0;
    for (i, y) in queries.iter().enumerate() {
        let r = i;
        // Per member: log w + log N(y_o), conditional mean and variance.
        let parts: Vec<(f64, f64, f64)> = members
            .iter()
            .map(|((mean, cov), w)| {
                let soo = nalgebra::DMatrix::from_fn(3, 3, |x, z| cov[(obs[x], obs[z])]);
                let spo = nalgebra::DMatrix::from_fn(1, 3, |_, z| cov[(p, obs[z])]);
                let e = nalgebra::DVector::from_fn(3, |x, _| y[obs[x]] - mean[obs[x]]);
                let chol = nalgebra::Cholesky::new(soo.clone()).unwrap();
                let inv = chol.inverse();
                let quad = (e.transpose() * &inv * &e)[(0, 0)];
                let log_det = 2.0 * chol.l().diagonal().iter().map(|v| v.ln()).sum::<f64>();
                let log_n = -0.5 * (quad + log_det + 3.0 * (2.0 * std::f64::consts::PI).ln());
                let mu = mean[p] + (&spo * &inv * &e)[(0, 0)];
                let var = cov[(p, p)] - (&spo * &inv * spo.transpose())[(0, 0)];
                (w.ln() + log_n, mu, var)
            })
            .collect();
        let top = parts.iter().map(|t| t.0).fold(f64::NEG_INFINITY, f64::max);
        let z: f64 = parts.iter().map(|t| (t.0 - top).exp()).sum();
        let resp: Vec<f64> = parts.iter().map(|t| (t.0 - top).exp() / z).collect();
        let mean: f64 = resp.iter().zip(&parts).map(|(r, t)| r * t.1).sum();
        let second: f64 = resp
            .iter()
            .zip(&parts)
            .map(|(r, t)| r * (t.2 + t.1 * t.1))
            .sum();
        let sd = (second - mean * mean).sqrt();
        let cell = &result.cells[i];
        assert_eq!((cell.row, cell.column), (i, 2));
        let (got_mean, got_sd) = (cell.mean.unwrap(), cell.sd.unwrap());
        if resp.iter().all(|&x| x > 0.05) {
            mixed += 1;
        }
        // Importance sampling with 256 paths per member: the error measured on these rows is
        // about 0.035 of the conditional's spread; 0.15 is over four times that.
        assert!(
            (got_mean - mean).abs() < 0.15 * sd,
            "row {r}: mean {got_mean} vs {mean} (sd {sd}, responsibilities {resp:?})"
        );
        assert!(
            (got_sd - sd).abs() < 0.15 * sd,
            "row {r}: sd {got_sd} vs {sd}"
        );
        errors.push((got_mean - mean) / sd);
        // Observed cells are copied; the drawn cell is finite.
        for t in &result.tables {
            let drawn = t.row(i);
            assert_eq!([drawn[0], drawn[1], drawn[3]], [y[0], y[1], y[3]]);
            assert!(drawn[2].is_finite());
        }
    }
    // The query points between the groups weigh both members.
    assert!(mixed >= 1, "no query point weighs both members");
    // No bias: the standardised errors average to zero within four standard errors.
    let (em, ese) = mean_se(&errors);
    assert!(em.abs() < 4.0 * ese, "mean error {em} ± {ese}");
    // Pooled paths of two members: an effective sample size up to twice the paths.
    assert!(result.ess.iter().all(|&e| e > 1.0 && e <= 512.0 + 1e-9));
    // Seeded: the same draws again.
    let again = ensemble.impute(&table, options).unwrap();
    assert_eq!(again.tables[1].values(), result.tables[1].values());
}
