//! Real open data: the latent-diffusion model at default settings, with the `fit` command's
//! protocol (an ensemble of four members of seeds `seed` to `seed + 3`, each from the
//! Gaussian mixture whose component count is the larger of BIC's on its training rows and
//! its validation rows' choice, and when that is a mixture also from one Gaussian, the two
//! weighed by their likelihood on its validation rows), against classical models fitted to
//! the same training rows: the full-covariance Gaussian by maximum likelihood, and the best
//! of the Gaussian mixtures with diagonal and with full covariances whose component counts
//! BIC chooses (Schwarz 1978, *Estimating the dimension of a model*, Ann. Stat. 6(2)), the
//! best judged on the held-out rows themselves, which favours the mixture.
#[path = "support/baseline.rs"]
mod baseline;

use neural_sde::{
    Covariance, Ensemble, EnsembleTrainer, EvalOptions, LatentConfig, MixtureModel, MixtureOptions,
    Table, TrainConfig,
};

/// The `fit` command's default members for these tables (four for tables of up to 1,600
/// rows; every training table here has at most 1,600).
const MEMBERS: usize = 4;

/// The `fit` command's default epochs for each member.
const EPOCHS: usize = 150;

/// The `fit` command's default protocol on `train` (see the module docs), with no time
/// budget.
fn default_fit(train: &Table, cfg: TrainConfig) -> Ensemble {
    let mut trainer = EnsembleTrainer::new(train, LatentConfig::default(), cfg, MEMBERS).unwrap();
    trainer.fit().unwrap();
    trainer.compare_starts(train, None, Ok).unwrap();
    trainer.into_ensemble().unwrap()
}

/// Held-out log-density per row of the BIC-chosen Gaussian mixtures with full and with
/// diagonal covariances fitted on `train`.
fn mixture_rows(train: &Table, test: &Table) -> [Vec<f64>; 2] {
    let options = MixtureOptions::default();
    [Covariance::Full, Covariance::Diagonal].map(|c| {
        MixtureModel::select(train, c, &options)
            .unwrap()
            .log_density_rows(test)
            .unwrap()
    })
}

/// The default protocol with `train_cfg`, trained on the rows outside each fold of `folds`
/// and scored on the fold's rows (fold `f`: the rows with `i % 5 == f`; fold 4 is the "mod5"
/// split), every held-out row of every fold pooled: the model's held-out log-likelihood per
/// dimension (data units) against the Gaussian and the best mixture, each fitted to the same
/// training rows as the model, as the paired mean over held-out rows of (model − baseline)
/// per dimension with its standard error (row-to-row spread cancels).
fn compare_folds(table: &neural_sde::Table, train_cfg: TrainConfig, folds: &[usize]) -> Comparison {
    let (mut model_rows, mut gauss_rows) = (Vec::new(), Vec::new());
    let (mut full_rows, mut diagonal_rows) = (Vec::new(), Vec::new());
    let mut d = 0.0;
    for &fold in folds {
        let (train, test) = baseline::split_fold(table, fold);
        gauss_rows.extend(baseline::gaussian_test_loglik_rows(&train, &test));
        let [full, diagonal] = mixture_rows(&train, &test);
        full_rows.extend(full);
        diagonal_rows.extend(diagonal);
        let model = default_fit(&train, train_cfg.clone());
        let eval = model.evaluate(&test, EvalOptions::new(128, 11)).unwrap();
        d = eval.dims as f64;
        model_rows.extend(eval.loglik_rows);
    }
    let sum = |v: &[f64]| v.iter().sum::<f64>();
    // The better of the two on these very rows.
    let best_rows = if sum(&full_rows) >= sum(&diagonal_rows) {
        &full_rows
    } else {
        &diagonal_rows
    };
    let paired = |base: &[f64]| -> (f64, f64) {
        let diff: Vec<f64> = model_rows
            .iter()
            .zip(base)
            .map(|(m, g)| (m - g) / d)
            .collect();
        let n = diff.len() as f64;
        let gain = diff.iter().sum::<f64>() / n;
        let var = diff.iter().map(|x| (x - gain).powi(2)).sum::<f64>() / (n - 1.0);
        (gain, (var / n).sqrt())
    };
    let n = gauss_rows.len() as f64;
    let (gain, gain_se) = paired(&gauss_rows);
    let (full_gain, full_se) = paired(&full_rows);
    let (best_gain, best_se) = paired(best_rows);
    let c = Comparison {
        model: sum(&model_rows) / n / d,
        gaussian: sum(&gauss_rows) / n / d,
        gain,
        gain_se,
        full_mixture: sum(&full_rows) / n / d,
        full_gain,
        full_se,
        best_mixture: sum(best_rows) / n / d,
        best_gain,
        best_se,
    };
    eprintln!("{c:?}");
    c
}

/// [`compare_folds`] on the "mod5" split alone.
fn compare(table: &neural_sde::Table, train_cfg: TrainConfig) -> Comparison {
    compare_folds(table, train_cfg, &[4])
}

/// The `fit` command's default training settings for each member of its ensemble.
fn defaults() -> TrainConfig {
    TrainConfig {
        epochs: EPOCHS,
        ..TrainConfig::default()
    }
}

#[derive(Debug)]
#[allow(dead_code)] // fields are read through Debug in failure messages
struct Comparison {
    model: f64,
    gaussian: f64,
    gain: f64,
    gain_se: f64,
    full_mixture: f64,
    full_gain: f64,
    full_se: f64,
    best_mixture: f64,
    best_gain: f64,
    best_se: f64,
}

#[test]
fn iris_beats_full_covariance_gaussian_and_the_best_mixture() {
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
    // The mod5 split holds out 30 rows, too few to show a lead of a few hundredths per
    // dimension (measured there: +0.056 ± 0.030 over the best mixture, 1.9 standard errors).
    // Fivefold cross-validation (common practice, no source) scores every one of the 150
    // rows once, each by the default protocol fitted to the other 120 (fold 4 is the mod5
    // split), against the Gaussian and the mixtures fitted to the same 120. The family
    // contains the full-covariance mixtures and the fit can start from one (BIC chooses two
    // components in four folds and eight in fold 3): measured +0.090 ± 0.023 per dimension
    // over the full-covariance mixture BIC chooses, also the best (folds 0–4: +0.211,
    // +0.036, +0.022, +0.117, +0.054); with the start's count by BIC alone +0.083, and with
    // two members +0.003 ± 0.035 (benchmarks document).
    let c = compare_folds(&t, defaults(), &[0, 1, 2, 3, 4]);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
    assert!(c.full_gain > 2.0 * c.full_se, "{c:?}");
    assert!(c.best_gain > 2.0 * c.best_se, "{c:?}");
    assert!(
        (c.model - c.full_mixture - c.full_gain).abs() < 1e-9,
        "{c:?}"
    );
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
    // Capped at 40 epochs per member to bound the suite's run time (measured +0.065 ± 0.008
    // over the best mixture, 8.1 standard errors; with the start's count by BIC alone: +0.044
    // ± 0.007; two members: +0.037 ± 0.007); the default (150 per member, with early
    // stopping) only does better.
    let cfg = TrainConfig {
        epochs: 40,
        ..TrainConfig::default()
    };
    let c = compare(&t, cfg);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
    // And the best mixture (five full-covariance components by BIC) by two standard errors.
    assert!(c.best_gain > 2.0 * c.best_se, "{c:?}");
}

#[test]
fn diabetes_beats_full_covariance_gaussian_and_the_best_mixture() {
    // Diabetes (Efron et al. 2004) as linfa-datasets loads it (441 rows × 10). Its `sex`
    // column takes two values, on which a mixture puts near-point components: most of the
    // mixtures' lead over the Gaussian (2.020 per dimension; the full-covariance mixture BIC
    // chooses, four components, 2.780, is the best). The default protocol starts from such
    // a mixture and trains it at a third of the learning rate, keeping the running average
    // of its weights; the default ensemble of four such fits is ahead of the mixture by more
    // than two standard errors, the benchmarks document's target (measured +0.244 ± 0.020
    // per dimension, 12.4 standard errors; with the start's count by BIC alone: +0.235 ±
    // 0.016; two members: +0.151 ± 0.028; the mean of two single fits' figures was +0.132 ±
    // 0.046).
    let t = baseline::diabetes();
    let c = compare(&t, defaults());
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    // Against the full-covariance mixture and against the better of full and diagonal on
    // these very rows (the same model here), as the test's name says.
    assert!(c.full_gain > 2.0 * c.full_se, "{c:?}");
    assert!(c.best_gain > 2.0 * c.best_se, "{c:?}");
    assert!(
        (c.model - c.full_mixture - c.full_gain).abs() < 1e-9,
        "{c:?}"
    );
}

#[test]
fn demo_table_beats_full_covariance_gaussian() {
    // The built-in synthetic demo table (two regimes, nonlinear dependence, skew): the
    // Gaussian is fitted in closed form on the same training rows. Capped at 25 epochs per
    // member to bound the suite's run time.
    let t = neural_sde::builtin_demo().unwrap();
    let cfg = TrainConfig {
        epochs: 25,
        ..TrainConfig::default()
    };
    let c = compare(&t, cfg);
    assert!(c.gain > 2.0 * c.gain_se, "{c:?}");
    assert!((c.model - c.gaussian - c.gain).abs() < 1e-9, "{c:?}");
    // The mixture start brings the night-time spike of `light_klux` that the Gaussian start
    // cannot reach (−2.87 per dimension before it). The members' validation rows choose 5 to
    // 10 components where BIC on their training rows chooses 4 to 6, and the fit beats the
    // full-covariance mixture BIC chooses on all the training rows (−2.568, also the best
    // mixture) by two standard errors, the benchmarks document's target: measured +0.022 ±
    // 0.005, 4.0 standard errors (with the start's count by BIC alone it was +0.010 ± 0.005,
    // and the test asserted only "not behind"; the full defaults are ahead in every seed of
    // the benchmarks document).
    assert!(c.full_gain > 2.0 * c.full_se, "{c:?}");
    assert!(c.best_gain > 2.0 * c.best_se, "{c:?}");
}
