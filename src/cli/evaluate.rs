//! `neural-sde evaluate`.

use std::path::PathBuf;

use clap::Args;
use neural_sde::{EvalOptions, TabularModel};

use super::models::Scored;

use super::{positive_usize, Failure};

#[derive(Debug, Args)]
pub struct EvaluateArgs {
    /// Model written by `neural-sde fit`.
    model: PathBuf,
    /// CSV file with (at least) the model's columns.
    data: Option<PathBuf>,
    /// The CSV file's first line names the columns, even if the names are numbers.
    #[arg(long)]
    header: bool,
    /// The CSV file has no header line (its columns are named c1, c2, …).
    #[arg(long)]
    no_header: bool,
    /// Evaluate on the built-in demo table instead of a file.
    #[arg(long)]
    demo: bool,
    /// Posterior paths per row for the importance-weighted estimate (more: tighter).
    #[arg(long, default_value_t = 128, value_parser = positive_usize)]
    paths: usize,
    /// Seed of the posterior paths.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Print one JSON object on one line instead of text.
    #[arg(long)]
    json: bool,
    /// Also fit classical models to these training rows (CSV with the model's columns) and
    /// report them on the same rows beside the model: the full-covariance Gaussian, and
    /// Gaussian mixtures with diagonal and with full covariances whose component counts (1 to
    /// 10) are chosen by BIC, each with the model's gain per dimension and its standard error
    /// over rows.
    #[arg(long)]
    baseline: Option<PathBuf>,
    /// Also generate rows from the model and compare them with these rows (held-out data,
    /// CSV with the model's columns): per continuous column the Kolmogorov–Smirnov statistic,
    /// per categorical column the total variation distance, the largest gap between the
    /// correlation matrices, and an energy-distance test with a permutation p-value.
    #[arg(long)]
    against: Option<PathBuf>,
    /// Rows to generate for --against [default: as many as it has].
    #[arg(long, value_parser = positive_usize)]
    rows: Option<usize>,
    /// Evaluate the ensemble of the model and this one (a model file of the same columns, e.g.
    /// fitted with another --seed), each file weighing the same: the mixture of their
    /// densities, which --against and --baseline then also use. Repeat for more models.
    #[arg(long = "with", value_name = "MODEL")]
    with: Vec<PathBuf>,
}

pub fn run(a: EvaluateArgs) -> Result<(), Failure> {
    let scored = Scored::load(&a.model, &a.with)?;
    let model = scored.first();
    let header = super::header_line(a.header, a.no_header)?;
    let against = match &a.against {
        Some(p) => Some(compare_with(&scored, p, header, &a)?),
        None => None,
    };
    if a.data.is_none() && !a.demo {
        if let Some(c) = against {
            if a.json {
                println!("{}", serde_json::json!({ "against": c }));
            } else {
                println!("{c}");
            }
            return Ok(());
        }
    }
    let options = EvalOptions::new(a.paths, a.seed);
    let mut baselines = Vec::new();
    let e = match (&a.data, a.demo) {
        // A file is read a chunk of rows at a time: memory does not grow with its length.
        (Some(path), false) if a.baseline.is_none() && scored.count() == 1 => {
            model.evaluate_csv(path, header, options)?
        }
        _ => {
            let table = super::load_table_with(
                a.data.as_deref(),
                a.demo,
                Some(model.columns()),
                header,
                super::Reading::Schema(model.schema()),
            )?;
            let e = scored.evaluate(&table, options)?;
            if let Some(train) = &a.baseline {
                baselines = compare_with_baselines(model, train, header, &table, &e)?;
            }
            e
        }
    };
    if a.json {
        let v = serde_json::json!({
            "rows": e.rows,
            "dims": e.dims,
            "observed_cells": e.observed_cells,
            "paths": e.paths,
            "elbo_per_row": e.elbo_per_row,
            "elbo_per_dim": e.elbo_per_dim,
            "loglik_per_row": e.loglik_per_row,
            "loglik_per_dim": e.loglik_per_dim,
            "loglik_se_per_row": e.loglik_se,
            "baselines": baselines,
            "against": against,
            "models": scored.count(),
        });
        println!("{v}");
    } else {
        if scored.count() > 1 {
            println!(
                "an ensemble of {} models (the mixture of their densities)",
                scored.count()
            );
        }
        println!("{e}");
        if let Some(c) = &against {
            println!("{c}");
        }
        if !baselines.is_empty() {
            println!("classical models fitted to the --baseline rows, on the same rows (nats per dimension; gain = model − baseline, ± standard error over rows):");
            for b in &baselines {
                println!(
                    "  {:<44} {:8.4}   gain {:+.4} ± {:.4}",
                    b.name, b.loglik_per_dim, b.gain_per_dim, b.gain_se
                );
            }
        }
    }
    Ok(())
}

/// Generates rows from the model and compares them with the rows of `path`.
fn compare_with(
    scored: &Scored,
    path: &std::path::Path,
    header: neural_sde::HeaderLine,
    a: &EvaluateArgs,
) -> Result<neural_sde::SampleComparison, Failure> {
    let model = scored.first();
    let data = super::load_table_with(
        Some(path),
        false,
        Some(model.columns()),
        header,
        super::Reading::Schema(model.schema()),
    )?;
    let generated = scored.generate(a.rows.unwrap_or(data.n_rows()), a.seed)?;
    let options = neural_sde::CompareOptions {
        seed: a.seed,
        ..Default::default()
    };
    Ok(neural_sde::compare_samples(&generated, &data, options)?)
}

/// One classical model's figures beside the model's.
#[derive(serde::Serialize)]
struct Baseline {
    name: String,
    components: usize,
    parameters: usize,
    loglik_per_row: f64,
    loglik_per_dim: f64,
    /// Mean over rows of (model − baseline) per dimension.
    gain_per_dim: f64,
    gain_se: f64,
}

/// Fits the Gaussian and the BIC-selected mixtures on the rows of `train` and scores them on
/// `table` beside the model's per-row figures.
fn compare_with_baselines(
    model: &TabularModel,
    train: &std::path::Path,
    header: neural_sde::HeaderLine,
    table: &neural_sde::Table,
    e: &neural_sde::Evaluation,
) -> Result<Vec<Baseline>, Failure> {
    use neural_sde::{Covariance, MixtureModel, MixtureOptions};
    if !model.schema().all_continuous() || table.has_missing() {
        return Err(Failure::input(
            "--baseline fits Gaussian mixtures, which need continuous columns without missing cells; leave it out for this table",
        ));
    }
    let train = neural_sde::Table::from_csv_with_header(train, Some(model.columns()), header)?;
    let options = MixtureOptions::default();
    let fits = [
        (
            "Gaussian (full covariance)",
            MixtureModel::fit(&train, 1, Covariance::Full, &options)?,
        ),
        (
            "Gaussian mixture, diagonal covariances",
            MixtureModel::select(&train, Covariance::Diagonal, &options)?,
        ),
        (
            "Gaussian mixture, full covariances",
            MixtureModel::select(&train, Covariance::Full, &options)?,
        ),
    ];
    let d = e.dims as f64;
    let mut out = Vec::new();
    for (name, m) in fits {
        let rows = m.log_density_rows(table)?;
        let n = rows.len() as f64;
        let diff: Vec<f64> = e
            .loglik_rows
            .iter()
            .zip(&rows)
            .map(|(a, b)| (a - b) / d)
            .collect();
        let gain = diff.iter().sum::<f64>() / n;
        let var = if n > 1.0 {
            diff.iter().map(|x| (x - gain).powi(2)).sum::<f64>() / (n - 1.0)
        } else {
            0.0
        };
        let ll = rows.iter().sum::<f64>() / n;
        let label = if m.components() > 1 || name.starts_with("Gaussian mixture") {
            format!("{name}, K = {} by BIC", m.components())
        } else {
            name.to_string()
        };
        out.push(Baseline {
            name: label,
            components: m.components(),
            parameters: m.parameters(),
            loglik_per_row: ll,
            loglik_per_dim: ll / d,
            gain_per_dim: gain,
            gain_se: (var / n).sqrt(),
        });
    }
    Ok(out)
}
