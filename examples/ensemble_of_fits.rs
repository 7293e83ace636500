//! The held-out log-likelihood of an equal-weight ensemble of fitted models: the density
//! `p(y) = (1/M) Σ_m p_m(y)` of `M` models of the same columns (for instance `fit` run with
//! different `--seed`s), with `neural_sde::Ensemble`, from each row's importance-weighted
//! log-likelihood under each model.
//!
//! Run with
//! `cargo run --release --example ensemble_of_fits -- TEST.csv MODEL.safetensors MODEL2.safetensors ...`.
//!
//! Averaging the densities of models trained from different random starts is the deep
//! ensemble of Lakshminarayanan, Pritzel & Blundell, *Simple and Scalable Predictive
//! Uncertainty Estimation using Deep Ensembles*, NeurIPS 2017. Each row's figure is an
//! estimate of `log p_m(y)` whose exponential is unbiased for `p_m(y)` (Burda, Grosse &
//! Salakhutdinov 2016, importance-weighted bound), so the mixture's estimate below is a
//! consistent (in the paths per row) estimate of `log p(y)`.

use neural_sde::{Ensemble, EvalOptions, Table, TabularModel};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let Some((test, paths)) = args.split_first().filter(|(_, m)| !m.is_empty()) else {
        return Err(
            "usage: ensemble_of_fits TEST.csv MODEL.safetensors [MODEL2.safetensors ...]".into(),
        );
    };
    let table = Table::from_csv(test, None)?;
    let options = EvalOptions::new(128, 0);
    let mut members = Vec::with_capacity(paths.len());
    for path in paths {
        let model = TabularModel::load(path)?;
        let e = model.evaluate(&table, options)?;
        println!("{path}: {:.4} nats per dimension", e.loglik_per_dim);
        members.push(model);
    }
    let e = Ensemble::new(members)?.evaluate(&table, options)?;
    println!(
        "ensemble of {}: {:.4} nats per dimension (± {:.4} standard error over {} rows)",
        paths.len(),
        e.loglik_per_dim,
        e.loglik_se / e.dims as f64,
        e.rows
    );
    Ok(())
}
