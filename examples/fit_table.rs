//! The library end to end: fit a table, evaluate held-out rows, generate rows.
//!
//! Run with `cargo run --release --example fit_table`.

use neural_sde::{builtin_demo, EvalOptions, LatentConfig, TrainConfig, Trainer};

fn main() -> neural_sde::Result<()> {
    // The built-in synthetic demo table; hold out every fifth row for an honest evaluation.
    let table = builtin_demo()?;
    let train_rows: Vec<usize> = (0..table.n_rows()).filter(|i| i % 5 != 4).collect();
    let test_rows: Vec<usize> = (0..table.n_rows()).filter(|i| i % 5 == 4).collect();
    let (train, test) = (table.take_rows(&train_rows)?, table.take_rows(&test_rows)?);

    let cfg = TrainConfig {
        epochs: 60,
        seed: 1,
        ..TrainConfig::default()
    };
    let mut trainer = Trainer::new(&train, LatentConfig::default(), cfg)?;
    let report = trainer.fit()?;
    println!(
        "{} epochs, stopped: {:?}, kept epoch {}",
        report.epochs, report.termination, report.best_epoch
    );
    let model = trainer.into_model();

    for k in [1, 16, 128] {
        let e = model.evaluate(&test, EvalOptions::new(k, 0))?;
        println!(
            "held-out, K = {k:3}: ELBO/dim {:8.4}   log-likelihood/dim {:8.4}",
            e.elbo_per_dim, e.loglik_per_dim
        );
    }
    let rows = model.generate(5, 42)?;
    println!("{}", rows.columns().join(", "));
    for i in 0..rows.n_rows() {
        let r: Vec<String> = rows.row(i).iter().map(|v| format!("{v:.2}")).collect();
        println!("{}", r.join(", "));
    }
    Ok(())
}
