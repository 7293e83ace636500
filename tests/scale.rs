//! Big tables: streamed loading and evaluation, bounded work per epoch, and results that do
//! not depend on the thread count.
#[path = "support/cli.rs"]
mod cli;

use std::path::Path;

use cli::*;
use neural_sde::*;

/// A deterministic table written as CSV (demo data, not a check): row i holds values whose
/// decimal text round-trips exactly (Rust's shortest representation of f64).
fn write_rows(path: &Path, rows: usize) -> Vec<f64> {
    let mut text = String::from("a,b,c\n");
    let mut values = Vec::with_capacity(rows * 3);
    for i in 0..rows {
        let x = (i as f64 * 0.37).sin();
        let row = [
            x,
            x * x + 0.1 * ((i * 7) % 5) as f64,
            (i % 11) as f64 * 0.3 - 1.0,
        ];
        text.push_str(&format!("{},{},{}\n", row[0], row[1], row[2]));
        if i % 50_000 == 17 {
            text.push('\n'); // blank lines are skipped
        }
        values.extend_from_slice(&row);
    }
    std::fs::write(path, text).unwrap();
    values
}

#[test]
fn a_big_csv_file_streams_into_the_table_it_holds() {
    let d = dir("scale-load");
    let p = d.join("big.csv");
    let expected = write_rows(&p, 200_000);
    let mut calls: Vec<(u64, u64)> = Vec::new();
    let t = Table::from_csv_reporting(&p, None, HeaderLine::Auto, &mut |at, all| {
        calls.push((at, all))
    })
    .unwrap();
    assert_eq!((t.n_rows(), t.n_cols()), (200_000, 3));
    // Exact: the decimal text parses back to the same f64 (IEEE 754 round-trip).
    assert!(t.values() == expected.as_slice());
    // Progress every 65,536 rows, never backwards, ending at the file's size.
    let size = std::fs::metadata(&p).unwrap().len();
    assert!(calls.len() >= 4, "{calls:?}");
    assert!(calls.windows(2).all(|w| w[0].0 <= w[1].0));
    assert_eq!(*calls.last().unwrap(), (size, size));
    // A selection streams too.
    let b = Table::from_csv(&p, Some(&["c".to_string(), "a".to_string()])).unwrap();
    assert_eq!(b.row(5), &[expected[17], expected[15]]);
}

fn small_model(table: &Table) -> TabularModel {
    let cfg = TrainConfig {
        epochs: 1,
        min_steps_per_epoch: 5,
        batch_size: 64,
        ..Default::default()
    };
    let model = LatentConfig {
        solver: SolverConfig {
            n_steps: 8,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut t = Trainer::new(table, model, cfg).unwrap();
    t.fit().unwrap();
    t.into_model()
}

#[test]
fn evaluating_a_file_in_chunks_gives_the_figures_of_the_loaded_table() {
    let d = dir("scale-eval");
    let p = d.join("rows.csv");
    write_rows(&p, 3_000);
    let table = Table::from_csv(&p, None).unwrap();
    let model = small_model(&table);
    let opts = EvalOptions::new(8, 3);
    let whole = model.evaluate(&table, opts).unwrap();
    let streamed = model.evaluate_csv(&p, HeaderLine::Auto, opts).unwrap();
    assert_eq!(streamed.rows, 3_000);
    assert_eq!(streamed.elbo_per_row, whole.elbo_per_row);
    assert_eq!(streamed.loglik_per_row, whole.loglik_per_row);
    // Welford's running variance against the two-pass one over the kept rows.
    let n = whole.loglik_rows.len() as f64;
    let var = whole
        .loglik_rows
        .iter()
        .map(|v| (v - whole.loglik_per_row).powi(2))
        .sum::<f64>()
        / (n - 1.0);
    assert!(((var / n).sqrt() - streamed.loglik_se).abs() < 1e-9 * streamed.loglik_se);
    assert!(streamed.loglik_rows.is_empty());
    assert_eq!(whole.loglik_rows.len(), 3_000);
}

#[test]
fn big_tables_end_epochs_after_a_fixed_number_of_steps_and_validate_on_a_subset() {
    let d = dir("scale-epochs");
    let p = d.join("rows.csv");
    write_rows(&p, 6_000);
    let table = Table::from_csv(&p, None).unwrap();
    let model = LatentConfig {
        solver: SolverConfig {
            n_steps: 6,
            ..Default::default()
        },
        ..Default::default()
    };
    let cfg = |max_validation_rows| TrainConfig {
        epochs: 2,
        batch_size: 16,
        min_steps_per_epoch: 10,
        max_steps_per_epoch: 20,
        max_validation_rows,
        ..Default::default()
    };
    // 4,800 training rows are 300 minibatches: each epoch stops after 20 of them.
    let mut t = Trainer::new(&table, model.clone(), cfg(2048)).unwrap();
    t.fit().unwrap();
    let steps: Vec<u64> = t.history().epochs.iter().map(|r| r.step).collect();
    assert_eq!(steps, vec![20, 40]);
    // All 1,200 held-out rows (the bound is above it) against a seeded subset of 100: the
    // subset's mean ELBO is a sample mean of the same rows' ELBOs, within 4 standard errors.
    let all = Trainer::new(&table, model.clone(), cfg(2048)).unwrap();
    let sub = Trainer::new(&table, model, cfg(100)).unwrap();
    let (ea, es) = (
        all.state().best_elbo.unwrap(),
        sub.state().best_elbo.unwrap(),
    );
    assert_ne!(ea, es);
    let rows = all
        .model()
        .evaluate(&table, EvalOptions::new(4, 0))
        .unwrap();
    let sd = rows
        .elbo_rows
        .iter()
        .map(|v| (v - rows.elbo_per_row).powi(2))
        .sum::<f64>()
        .sqrt()
        / (rows.rows as f64).sqrt();
    // (In standardised units the ELBO differs from the data's by the scaler's Jacobian, a
    // constant, so the spread is the same.)
    assert!(
        (ea - es).abs() < 4.0 * sd / 100f64.sqrt(),
        "{ea} vs {es}, sd {sd}"
    );
}

#[test]
fn the_thread_count_does_not_change_the_model() {
    let d = dir("scale-threads");
    let p = d.join("rows.csv");
    write_rows(&p, 1_200);
    let fit = |threads: &str, out: &str| {
        ok(run(bin()
            .args(["--threads", threads, "fit"])
            .arg(&p)
            .args([
                "--batch-size",
                "300",
                "--epochs",
                "2",
                "--steps",
                "10",
                "--out",
            ])
            .arg(d.join(out))))
    };
    fit("1", "one.safetensors");
    fit("2", "two.safetensors");
    let tensors = |name: &str| {
        let bytes = std::fs::read(d.join(name)).unwrap();
        let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        let mut v: Vec<(String, Vec<u8>)> = st
            .tensors()
            .into_iter()
            .map(|(n, t)| (n, t.data().to_vec()))
            .collect();
        v.sort();
        v
    };
    // Bit for bit: rows are split into blocks whose results are combined in a fixed order.
    let (a, b) = (tensors("one.safetensors"), tensors("two.safetensors"));
    assert_eq!(a.len(), b.len());
    for ((na, ta), (nb, tb)) in a.iter().zip(&b) {
        assert_eq!(na, nb);
        assert!(ta == tb, "tensor {na} differs between 1 and 2 threads");
    }
}

#[test]
fn impossible_thread_counts_and_mpi_launches_without_the_feature_are_refused() {
    let d = dir("scale-refused");
    let out = d.join("m.safetensors");
    let o = run(bin()
        .args(["--threads", "5000", "fit", "--demo", "--out"])
        .arg(&out));
    assert_input_error(&o, &["threads", "5000"]);
    let o = run(bin()
        .args(["--threads", "0", "fit", "--demo", "--out"])
        .arg(&out));
    assert_eq!(o.status.code(), Some(2));
    assert!(!out.exists());
    // One of several copies started by mpirun, in a build without the `mpi` feature, would
    // fit alone and race the others to the same files.
    if cfg!(not(feature = "mpi")) {
        let o = run(bin()
            .args(["fit", "--demo", "--out"])
            .arg(&out)
            .env("OMPI_COMM_WORLD_SIZE", "2"));
        assert_input_error(&o, &["2 MPI processes", "--features mpi"]);
        assert!(!out.exists());
    }
}
