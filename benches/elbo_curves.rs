//! Reproducible ELBO curves: fixed, seeded configurations trained for a fixed number of
//! epochs. Writes `target/elbo-curves/NAME.csv` and `NAME.svg` and prints the final figures.
//!
//! `cargo bench --bench elbo_curves`

#[path = "../tests/support/baseline.rs"]
mod baseline;

use std::path::PathBuf;
use std::sync::Arc;

use neural_sde::*;

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn out_dir() -> PathBuf {
    let d = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("target")
        .join("elbo-curves");
    std::fs::create_dir_all(&d).expect("cannot create target/elbo-curves");
    d
}

fn table_curve(name: &str, table: &Table, epochs: usize) -> Result<()> {
    let (train, test) = baseline::split_mod5(table);
    let gauss = baseline::gaussian_test_loglik_per_dim(&train, &test);
    let cfg = TrainConfig {
        epochs,
        patience: epochs,
        ..TrainConfig::default()
    };
    let t0 = std::time::Instant::now();
    let mut trainer = Trainer::new(&train, LatentConfig::default(), cfg)?;
    trainer.fit()?;
    let secs = t0.elapsed().as_secs_f64();
    let d = out_dir();
    trainer.history().write_csv(d.join(format!("{name}.csv")))?;
    plot::elbo_curve_svg(
        trainer.history(),
        table.n_cols(),
        d.join(format!("{name}.svg")),
    )?;
    let model = trainer.into_model();
    let e = model.evaluate(&test, EvalOptions::new(128, 0))?;
    println!(
        "{}",
        serde_json::json!({
            "name": name, "rows": table.n_rows(), "dims": table.n_cols(), "epochs": epochs, "seconds": secs,
            "test_elbo_per_dim": e.elbo_per_dim, "test_loglik_per_dim": e.loglik_per_dim,
            "gaussian_test_loglik_per_dim": gauss,
        })
    );
    Ok(())
}

fn sampler_curve() -> Result<()> {
    let target = GaussianMixture::ring_2d().with_log_scale(1.5);
    let cfg = SamplerConfig {
        iterations: 1500,
        ..SamplerConfig::default()
    };
    let mut s = Sampler::new(Arc::new(target.clone()), cfg)?;
    let mut csv = String::from("iteration,free_energy,log_z\n");
    let (mut fe, mut lz) = (Vec::new(), Vec::new());
    let t0 = std::time::Instant::now();
    for block in 1..=30 {
        s.set_iterations(block as usize * 50);
        s.fit()?;
        let est = s.estimate(EstimateOptions::new(1024, block))?;
        let it = (block * 50) as f64;
        csv.push_str(&format!("{it},{},{}\n", est.free_energy, est.log_z));
        fe.push((it, -est.free_energy));
        lz.push((it, est.log_z));
    }
    let d = out_dir();
    std::fs::write(d.join("sampler_ring.csv"), csv.as_bytes())?;
    plot::curves_svg(
        "four-mode ring: −free energy and log Z estimate (true log Z = 1.5)",
        "iteration",
        "nats",
        &[
            ("−free energy (lower bound)", fe),
            ("importance-weighted log Z", lz),
        ],
        d.join("sampler_ring.svg"),
    )?;
    let est = s.estimate(EstimateOptions::new(8192, 999))?;
    println!(
        "{}",
        serde_json::json!({
            "name": "sampler_ring", "iterations": 1500, "seconds": t0.elapsed().as_secs_f64(),
            "free_energy": est.free_energy, "log_z": est.log_z, "log_z_se": est.log_z_se,
            "true_log_z": target.log_z(), "ess_fraction": est.ess / est.paths as f64,
        })
    );
    Ok(())
}

fn main() -> Result<()> {
    if std::env::var_os("RAYON_NUM_THREADS").is_none() {
        std::env::set_var("RAYON_NUM_THREADS", "1");
    }
    table_curve("demo", &builtin_demo()?, 60)?;
    table_curve("iris", &baseline::iris(), 60)?;
    table_curve("winequality", &baseline::winequality(), 30)?;
    sampler_curve()?;
    Ok(())
}
