//! The Gaussian-mixture baseline: EM against closed forms and its known properties.
#[path = "support/baseline.rs"]
mod baseline;

use neural_sde::*;

#[test]
fn one_full_component_is_the_maximum_likelihood_gaussian() {
    // The MLE Gaussian has a closed form (sample mean, covariance with divisor n; Bishop 2006,
    // §2.3.4), computed independently in tests/support/baseline.rs. EM with one component
    // reaches it in one M-step; the ridge on the diagonal is set negligible here (the
    // default 1e-6 in standardised units moves far-out rows of iris by up to 3e-4).
    let t = baseline::iris();
    let (train, test) = baseline::split_mod5(&t);
    let g = baseline::gaussian_test_loglik_rows(&train, &test);
    let o = MixtureOptions {
        regularisation: 1e-12,
        ..Default::default()
    };
    let m = MixtureModel::fit(&train, 1, Covariance::Full, &o).unwrap();
    let rows = m.log_density_rows(&test).unwrap();
    for (a, b) in rows.iter().zip(&g) {
        assert!((a - b).abs() < 1e-7, "{a} vs {b}");
    }
    assert_eq!(m.parameters(), 4 + 10);
}

#[test]
fn one_diagonal_component_is_a_product_of_column_gaussians() {
    // Independent normals per column with the MLE mean and variance (divisor n).
    let t = baseline::iris();
    let (train, test) = baseline::split_mod5(&t);
    let o = MixtureOptions {
        regularisation: 1e-12,
        ..Default::default()
    };
    let m = MixtureModel::fit(&train, 1, Covariance::Diagonal, &o).unwrap();
    let rows = m.log_density_rows(&test).unwrap();
    let stats: Vec<(f64, f64)> = (0..4)
        .map(|j| {
            let c = train.column(j);
            let n = c.len() as f64;
            let mean = c.iter().sum::<f64>() / n;
            (mean, c.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n)
        })
        .collect();
    for (i, r) in rows.iter().enumerate() {
        let x = test.row(i);
        let exact: f64 = stats
            .iter()
            .zip(x)
            .map(|((m, v), x)| -0.5 * ((2.0 * std::f64::consts::PI * v).ln() + (x - m).powi(2) / v))
            .sum();
        assert!((r - exact).abs() < 1e-7, "{r} vs {exact}");
    }
}

/// Rows from a known two-component mixture in 2-D: weight 0.3 on N((−2, 0), diag(0.5, 1))
/// and 0.7 on N((2, 1), [[1, 0.6], [0.6, 1]]).
fn two_clouds(n: usize) -> Table {
    let mut g = generator(31, 0);
    let z = standard_normals(&mut g, 3 * n);
    let rows = (0..n)
        .map(|i| {
            let (u, a, b) = (z[3 * i], z[3 * i + 1], z[3 * i + 2]);
            // The component from a normal draw: P(Φ(u) < 0.3) = 0.3 (u < −0.5244).
            if u < -0.524_400_5 {
                vec![-2.0 + 0.5f64.sqrt() * a, b]
            } else {
                vec![2.0 + a, 1.0 + 0.6 * a + 0.8 * b]
            }
        })
        .collect();
    Table::new(vec!["x".into(), "y".into()], rows).unwrap()
}

#[test]
fn em_recovers_a_known_mixture_and_bic_chooses_its_two_components() {
    // Maximum likelihood is consistent for a finite mixture with separated components
    // (Redner & Walker 1984, "Mixture densities, maximum likelihood and the EM algorithm",
    // SIAM Review 26(2), §4); BIC selects the true count in the limit (Keribin 2000,
    // "Consistent estimation of the order of mixture models", Sankhyā A 62(1)).
    let n = 4000;
    let t = two_clouds(n);
    let m = MixtureModel::select(&t, Covariance::Full, &MixtureOptions::default()).unwrap();
    assert_eq!(m.components(), 2, "BIC chose {}", m.components());
    let (w, means) = (m.weights().to_vec(), m.means());
    let first = if means[0][0] < means[1][0] { 0 } else { 1 };
    let se_w = (0.3f64 * 0.7 / n as f64).sqrt();
    assert!((w[first] - 0.3).abs() < 4.0 * se_w, "weight {}", w[first]);
    // Means: standard error sd/sqrt(n_k) per coordinate.
    let (n1, n2) = (0.3 * n as f64, 0.7 * n as f64);
    let checks = [
        (means[first][0], -2.0, (0.5 / n1).sqrt()),
        (means[first][1], 0.0, (1.0 / n1).sqrt()),
        (means[1 - first][0], 2.0, (1.0 / n2).sqrt()),
        (means[1 - first][1], 1.0, (1.0 / n2).sqrt()),
    ];
    for (got, want, se) in checks {
        assert!((got - want).abs() < 4.0 * se, "{got} vs {want} (se {se})");
    }
}

#[test]
fn em_never_lowers_the_likelihood() {
    // Each EM iteration does not decrease the likelihood (Dempster, Laird & Rubin 1977,
    // Theorem 1): runs cut after more iterations from the same start fit at least as well.
    let t = two_clouds(600);
    let mut last = f64::NEG_INFINITY;
    for iterations in [1, 2, 3, 5, 10, 50] {
        let o = MixtureOptions {
            max_iterations: iterations,
            restarts: 1,
            tolerance: 0.0,
            ..Default::default()
        };
        let m = MixtureModel::fit(&t, 3, Covariance::Full, &o).unwrap();
        let ll = m.train_loglik_per_row();
        assert!(ll >= last - 1e-12, "{iterations} iterations: {ll} < {last}");
        last = ll;
    }
}

#[test]
fn bad_mixture_settings_are_refused() {
    let t = two_clouds(50);
    let e = MixtureModel::fit(&t, 0, Covariance::Full, &MixtureOptions::default()).unwrap_err();
    assert!(e.to_string().contains("components"), "{e}");
    let e = MixtureModel::fit(&t, 51, Covariance::Full, &MixtureOptions::default()).unwrap_err();
    assert!(e.to_string().contains("(50)"), "{e}");
    let o = MixtureOptions {
        regularisation: 0.0,
        ..Default::default()
    };
    assert!(MixtureModel::fit(&t, 2, Covariance::Full, &o).is_err());
}

#[path = "support/cli.rs"]
mod cli;

#[test]
fn evaluate_reports_the_classical_baselines_beside_the_model() {
    // On iris, on the command line: the Gaussian row must be the closed-form maximum-
    // likelihood Gaussian of the training rows (Bishop 2006, §2.3.4; tests/support), and the
    // gains the paired differences with the model's own per-row figures.
    use cli::*;
    let d = dir("mixture-evaluate");
    let t = baseline::iris();
    let (train, test) = baseline::split_mod5(&t);
    let (train_csv, test_csv) = (d.join("train.csv"), d.join("test.csv"));
    train.write_csv(&train_csv).unwrap();
    test.write_csv(&test_csv).unwrap();
    let m = d.join("m.safetensors");
    ok(run(bin()
        .arg("fit")
        .arg(&train_csv)
        .args(["--epochs", "2", "--out"])
        .arg(&m)));
    let o = ok(run(bin()
        .arg("evaluate")
        .arg(&m)
        .arg(&test_csv)
        .arg("--baseline")
        .arg(&train_csv)
        .args(["--json", "--paths", "16"])));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let b = v["baselines"].as_array().unwrap();
    assert_eq!(b.len(), 3);
    let g = baseline::gaussian_test_loglik_per_dim(&train, &test);
    let gauss = b[0]["loglik_per_dim"].as_f64().unwrap();
    // The 1e-6 ridge of the default options moves the mean by less than 1e-4 here.
    assert!((gauss - g).abs() < 1e-4, "{gauss} vs {g}");
    let model = v["loglik_per_dim"].as_f64().unwrap();
    for x in b {
        let gain = x["gain_per_dim"].as_f64().unwrap();
        let ll = x["loglik_per_dim"].as_f64().unwrap();
        assert!((gain - (model - ll)).abs() < 1e-9, "{x}");
        assert!(x["gain_se"].as_f64().unwrap() > 0.0);
    }
    assert!(b[2]["name"].as_str().unwrap().contains("by BIC"));
    // The text form names each baseline on its own line.
    let o = ok(run(bin()
        .arg("evaluate")
        .arg(&m)
        .arg(&test_csv)
        .arg("--baseline")
        .arg(&train_csv)
        .args(["--paths", "16"])));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("Gaussian mixture, full covariances, K ="),
        "{text}"
    );
}
