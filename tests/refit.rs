//! The default model-selection protocol: fit with rows held out for early stopping, then
//! train the final model on every row for the number of epochs validation chose (common
//! practice, no source; e.g. the "refit" of cross-validated model selection).
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use neural_sde::{LatentConfig, Table, TrainConfig, Trainer};
use std::path::Path;

/// A small table (demo data for the check).
fn table(n: usize) -> Table {
    let rows = (0..n)
        .map(|i| {
            let x = (i as f64 * 0.37).sin();
            vec![x, x * x + 0.1 * ((i * 7) % 5) as f64 + 0.01 * i as f64]
        })
        .collect();
    Table::new(vec!["a".into(), "b".into()], rows).unwrap()
}

fn quick() -> TrainConfig {
    TrainConfig {
        epochs: 6,
        batch_size: 32,
        min_steps_per_epoch: 5,
        refit: true,
        ..TrainConfig::default()
    }
}

#[test]
fn refit_trains_on_every_row_for_the_validated_epochs() {
    let t = table(200);
    let mut first = Trainer::new(&t, LatentConfig::default(), quick()).unwrap();
    first.fit().unwrap();
    let best = first.state().best_epoch.max(1);
    let mut r = first
        .refit(&t)
        .unwrap()
        .expect("a finished fit with held-out rows refits");
    assert_eq!(r.config().epochs, best);
    assert_eq!(r.config().validation_fraction, 0.0);
    assert!(!r.config().refit);
    let report = r.fit().unwrap();
    assert_eq!(report.epochs, best);
    // The final model's standardisation is fitted on all 200 rows (population sd).
    let col = t.column(1);
    let m = col.iter().sum::<f64>() / 200.0;
    assert!((r.model().scaler().mean[1] - m).abs() < 1e-12);
    // A refitted trainer, a fit without held-out rows, one that is switched off, and a paused
    // one do not refit.
    assert!(r.refit(&t).unwrap().is_none());
    let mut none = Trainer::new(
        &t,
        LatentConfig::default(),
        TrainConfig {
            validation_fraction: 0.0,
            ..quick()
        },
    )
    .unwrap();
    none.fit().unwrap();
    assert!(none.refit(&t).unwrap().is_none());
    let mut off = Trainer::new(
        &t,
        LatentConfig::default(),
        TrainConfig {
            refit: false,
            ..quick()
        },
    )
    .unwrap();
    off.fit().unwrap();
    assert!(off.refit(&t).unwrap().is_none());
    let mut paused = Trainer::new(&t, LatentConfig::default(), quick()).unwrap();
    paused.set_epochs(2);
    paused.fit().unwrap();
    assert!(paused.refit(&t).unwrap().is_none());
}

/// `fit DATA ARGS --out OUT` (which must succeed): what it printed, and the training
/// settings stored in OUT.
fn fit(data: &Path, out: &Path, args: &[&str]) -> (String, TrainConfig) {
    let o = ok(run(bin()
        .arg("fit")
        .arg(data)
        .args(args)
        .arg("--out")
        .arg(out)));
    let tc = neural_sde::inspect_checkpoint(out)
        .unwrap()
        .train_config
        .unwrap();
    (String::from_utf8_lossy(&o.stdout).into_owned(), tc)
}

#[test]
fn fit_refits_when_asked_and_keeps_the_validated_model_by_default() {
    let d = dir("refit");
    let data = d.join("t.csv");
    let t = table(150);
    t.write_csv(&data).unwrap();
    let out = d.join("m.safetensors");
    let (text, tc) = fit(&data, &out, &["--epochs", "3", "--refit"]);
    assert!(text.contains("refitted on all 150 rows for"), "{text}");
    assert_eq!(tc.validation_fraction, 0.0);
    assert!(tc.epochs <= 3 && tc.epochs >= 1);
    let (text, tc) = fit(&data, &out, &["--epochs", "3"]);
    assert!(!text.contains("refitted"));
    assert_eq!(tc.validation_fraction, 0.2);
    assert_eq!(tc.epochs, 3);
    // A fit ended by its time budget is not refitted: its best epoch says little.
    let args = ["--epochs", "300", "--refit", "--time-budget", "0.05"];
    let (text, tc) = fit(&data, &out, &args);
    assert!(text.contains("time budget"));
    assert!(!text.contains("refitted"));
    assert_eq!(tc.validation_fraction, 0.2);
}
