//! Train a control that samples a 2-D four-mode density given only up to its normalising
//! constant, then estimate log Z by importance weighting.
//!
//! Run with `cargo run --release --example sample_ring`; it also writes
//! `target/sample_ring.svg`: the weighted samples over the density.

use std::sync::Arc;

use candle_core::{Device, Tensor};
use neural_sde::{EstimateOptions, GaussianMixture, LogDensity, Sampler, SamplerConfig};

fn main() -> neural_sde::Result<()> {
    // Four Gaussian bumps on a ring, multiplied by e^{1.5}: the true log Z is 1.5.
    let target = GaussianMixture::ring_2d().with_log_scale(1.5);
    let log_z_true = target.log_z();
    let cfg = SamplerConfig {
        iterations: 1500,
        ..SamplerConfig::default()
    };
    let mut sampler = Sampler::new(Arc::new(target.clone()), cfg)?;
    let report = sampler.fit()?;
    for r in sampler.history().iter().filter(|r| r.step % 250 == 1) {
        println!(
            "step {:5}  free energy {:8.4}  control cost {:7.4}",
            r.step, r.loss, r.control_cost
        );
    }
    println!("{report}");
    let est = sampler.estimate(EstimateOptions::new(8192, 7))?;
    println!(
        "log Z estimate  {:.4} ± {:.4}  (true {log_z_true})",
        est.log_z, est.log_z_se
    );
    println!(
        "free energy     {:.4} ± {:.4}  (upper bound on −log Z = {})",
        est.free_energy, est.free_energy_se, -log_z_true
    );
    println!("effective sample size {:.0} of {}", est.ess, est.paths);
    // Share of weighted samples nearest each mode (1/4 each for the target).
    let mut share = vec![0.0; target.centers().len()];
    let max = est
        .log_weights
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max);
    let mut total = 0.0;
    for (x, lw) in est.samples.iter().zip(&est.log_weights) {
        let w = (lw - max).exp();
        let nearest = target
            .centers()
            .iter()
            .enumerate()
            .map(|(i, c)| (i, (x[0] - c[0]).powi(2) + (x[1] - c[1]).powi(2)))
            .fold((0, f64::INFINITY), |a, b| if b.1 < a.1 { b } else { a })
            .0;
        share[nearest] += w;
        total += w;
    }
    let share: Vec<String> = share.iter().map(|s| format!("{:.3}", s / total)).collect();
    println!("weighted share per mode: [{}]", share.join(", "));

    let density = |x: f64, y: f64| -> f64 {
        Tensor::new(&[[x, y]], &Device::Cpu)
            .and_then(|p| target.log_density(&p))
            .and_then(|v| v.to_vec1::<f64>())
            .map(|v| v[0])
            .unwrap_or(f64::NEG_INFINITY)
    };
    let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("target")
        .join("sample_ring.svg");
    neural_sde::plot::density_samples_svg(
        &density,
        &est.samples,
        &est.log_weights,
        (-4.0, 4.0),
        "weighted samples (blue) over the target density (orange)",
        &out,
    )?;
    println!("plot written to {}", out.display());
    Ok(())
}
