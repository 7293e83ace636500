//! Real open data: the latent-diffusion model at default settings against a full-covariance
//! Gaussian fitted by maximum likelihood on the same training rows.
#[path = "support/baseline.rs"]
mod baseline;

use neural_sde::{EvalOptions, LatentConfig, TrainConfig, Trainer};

/// Trains at default settings on the "mod5" training rows and returns the held-out
/// log-likelihood per dimension (data units) of the model and of the Gaussian, and the
/// paired comparison: the mean over held-out rows of (model − Gaussian) per dimension with
/// its standard error (both evaluated on the same rows, so row-to-row spread cancels).
fn compare(table: &neural_sde::Table, train_cfg: TrainConfig) -> Comparison {
    compare_seeds(table, train_cfg, &[None])
}

/// As [`compare`], for the mean over fits with each seed of `seeds` (`None`: the config's
/// own) of the per-row held-out log-likelihood: the gain of the default model averaged over
/// training randomness, with its standard error over held-out rows.
fn compare_seeds(
    table: &neural_sde::Table,
    train_cfg: TrainConfig,
    seeds: &[Option<u64>],
) -> Comparison {
    let (train, test) = baseline::split_mod5(table);
    let gauss_rows = baseline::gaussian_test_loglik_rows(&train, &test);
    let mut model_rows = vec![0.0; gauss_rows.len()];
    let mut d = 0.0;
    let mut model_per_dim = 0.0;
    for seed in seeds {
        let cfg = TrainConfig {
            seed: seed.unwrap_or(train_cfg.seed),
            ..train_cfg.clone()
        };
        let mut trainer = Trainer::new(&train, LatentConfig::default(), cfg).unwrap();
        trainer.fit().unwrap();
        let model = trainer.into_model();
        let eval = model.evaluate(&test, EvalOptions::new(128, 11)).unwrap();
        d = eval.dims as f64;
        model_per_dim += eval.loglik_per_dim / seeds.len() as f64;
        for (m, r) in model_rows.iter_mut().zip(&eval.loglik_rows) {
            *m += r / seeds.len() as f64;
        }
    }
    let diff: Vec<f64> = model_rows
        .iter()
        .zip(&gauss_rows)
        .map(|(m, g)| (m - g) / d)
        .collect();
    let n = diff.len() as f64;
    let gain = diff.iter().sum::<f64>() / n;
    let var = diff.iter().map(|x| (x - gain).powi(2)).sum::<f64>() / (n - 1.0);
    let c = Comparison {
        model: model_per_dim,
        gaussian: gauss_rows.iter().sum::<f64>() / n / d,
        gain,
        gain_se: (var / n).sqrt(),
    };
    eprintln!("{c:?}");
    c
}

#[derive(Debug)]
struct Comparison {
    model: f64,
    gaussian: f64,
    gain: f64,
    gain_se: f64,
}

#[test]
fn iris_beats_full_covariance_gaussian() {
    // Fisher's iris as shipped by linfa-datasets. Baseline computed independently with numpy (standardised space,
    // split mod5): full-covariance Gaussian test log-likelihood per dimension
    // −0.8330767812, with Σ log sd / d = −0.1753928495.
    let t = baseline::iris();
    let (train, test) = baseline::split_mod5(&t);
    let g = baseline::gaussian_test_loglik_per_dim(&train, &test);
    let sd = baseline::mean_log_sd(&train);
    assert!(
        (g + sd - (-0.8330767812)).abs() < 1e-8,
        "baseline {}",
        g + sd
    );
    assert!((sd - (-0.1753928495)).abs() < 1e-8);
    // 30 held-out rows make one fit's gain noisy (measured over seeds 0–5: 1.9 to 5.7
    // standard errors), so the claim is made for the default model averaged over three
    // training seeds.
    let c = compare_seeds(&t, TrainConfig::default(), &[Some(0), Some(1), Some(2)]);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
}

#[test]
fn red_wine_quality_beats_full_covariance_gaussian() {
    // Cortez et al. 2009 red wine quality (11 features) from linfa-datasets. Baseline computed independently with numpy
    // baseline: full-covariance Gaussian test log-likelihood per dimension −1.2685403688
    // (standardised space, split mod5), Σ log sd / d = −0.8816458030.
    let t = baseline::winequality();
    let (train, test) = baseline::split_mod5(&t);
    let g = baseline::gaussian_test_loglik_per_dim(&train, &test);
    let sd = baseline::mean_log_sd(&train);
    assert!(
        (g + sd - (-1.2685403688)).abs() < 1e-8,
        "baseline {}",
        g + sd
    );
    // Capped at 60 epochs to bound the suite's run time; the default (300, with early
    // stopping) only does better.
    let cfg = TrainConfig {
        epochs: 60,
        ..TrainConfig::default()
    };
    let c = compare(&t, cfg);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
}

#[test]
fn demo_table_beats_full_covariance_gaussian() {
    // The built-in synthetic demo table (two regimes, nonlinear dependence, skew): the
    // Gaussian is fitted in closed form on the same training rows. Capped at 40 epochs to
    // bound the suite's run time.
    let t = neural_sde::builtin_demo().unwrap();
    let cfg = TrainConfig {
        epochs: 40,
        ..TrainConfig::default()
    };
    let c = compare(&t, cfg);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
}
