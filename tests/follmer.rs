//! Föllmer drift for Gaussian targets: closed form, marginals, cost = KL(π‖γ), and a control
//! trained from scratch.
mod common;

use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use common::*;
use neural_sde::*;

// Example A: π = N(m, diag s), m = (1, −0.5), s = (0.5, 2).
const M: [f64; 2] = [1.0, -0.5];
const S: [f64; 2] = [0.5, 2.0];

/// KL(N(m, S) ‖ N(0, I)) = ½(tr S + |m|² − d − log det S) (Kingma & Welling 2014,
/// *Auto-Encoding Variational Bayes*, App. B, diagonal case). For example A it is 0.875.
fn kl_to_standard(m: &[f64], s: &[f64]) -> f64 {
    0.5 * m
        .iter()
        .zip(s)
        .map(|(m, s)| s + m * m - 1.0 - s.ln())
        .sum::<f64>()
}

fn follmer_a(
) -> FnDrift<impl Fn(&Tensor, f64, Option<&Tensor>) -> candle_core::Result<Tensor> + Send + Sync> {
    FnDrift::new(2, |x, t, _c| {
        let xs = x.to_vec2::<f64>()?;
        let out: Vec<f64> = xs
            .iter()
            .flat_map(|r| follmer_gaussian_diag(&M, &S, r, t))
            .collect();
        Tensor::from_vec(out, x.dims(), x.device())
    })
}

fn target_a(log_z: f64) -> Arc<GaussianDensity> {
    Arc::new(
        GaussianDensity::new(M.to_vec(), vec![S[0], 0.0, 0.0, S[1]])
            .unwrap()
            .with_log_scale(log_z),
    )
}

#[test]
fn closed_form_drift_matches_reference_values() {
    assert_rel("KL A", kl_to_standard(&M, &S), 0.875, 1e-14);
    // Check values for example A (u*((0.3, −0.2), 0.4) = (1.0625, −0.5),
    // u*((1, −1), 0.9) = (0.9090909091, −0.7894736842)).
    let u = follmer_gaussian_diag(&M, &S, &[0.3, -0.2], 0.4);
    assert_rel("u1", u[0], 1.0625, 1e-12);
    assert_rel("u2", u[1], -0.5, 1e-12);
    let u = follmer_gaussian_diag(&M, &S, &[1.0, -1.0], 0.9);
    assert_rel("u1", u[0], 0.9090909091, 1e-9);
    assert_rel("u2", u[1], -0.7894736842, 1e-9);
}

#[test]
fn monte_carlo_follmer_drift_matches_closed_form() {
    // The log-space Monte Carlo estimator (Huang et al. 2021, arXiv 2106.10880) against
    // the closed form at x = (0.3, −0.2), t = 0.4: (1.0625, −0.5). Independent seeds give a
    // standard error; the O(1/M) ratio bias is below 1e-3 at M = 4000.
    let x = Tensor::new(&[[0.3f64, -0.2]], &Device::Cpu).unwrap();
    let mut est = [Vec::new(), Vec::new()];
    for seed in 0..10 {
        let drift = FollmerDrift::new(target_a(3.0), 4000, seed).unwrap();
        let u = drift
            .forward(&x, 0.4, None)
            .unwrap()
            .to_vec2::<f64>()
            .unwrap();
        est[0].push(u[0][0]);
        est[1].push(u[0][1]);
    }
    let (m0, se0) = mean_se(&est[0]);
    let (m1, se1) = mean_se(&est[1]);
    assert_within("û1", m0, 1.0625, se0, 4.0, 1e-3);
    assert_within("û2", m1, -0.5, se1, 4.0, 1e-3);
    // Near t = 1 the estimator tends to ∇log f(x) = (m + (s − 1)x)/s: at x = (1, −1), t = 1
    // the closed form gives (1, −0.75).
    let x = Tensor::new(&[[1.0f64, -1.0]], &Device::Cpu).unwrap();
    let drift = FollmerDrift::new(target_a(0.0), 100, 0).unwrap();
    let u = drift
        .forward(&x, 1.0, None)
        .unwrap()
        .to_vec2::<f64>()
        .unwrap();
    assert_rel("û(t=1)1", u[0][0], 1.0, 1e-10);
    assert_rel("û(t=1)2", u[0][1], -0.75, 1e-10);
}

#[test]
fn follmer_process_has_bridge_marginals_and_kl_cost() {
    // X_t ~ N(t m, t² S + t(1 − t) I) under the Föllmer drift (Brownian bridge mixed over
    // X_1 ~ π; derived from Föllmer's construction), and E[½∫|u*|² dt] = KL(π‖γ).
    let dev = Device::Cpu;
    let n = 200;
    let cfg = SolverConfig {
        n_steps: n,
        keep_path: true,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let u = follmer_a();
    let sde = Sde::new(&sigma).with_control(&u);
    let paths = 40_000;
    let noise = cfg
        .sample_noise(&mut generator(21, 0), paths, 2, DType::F64, &dev)
        .unwrap();
    let x0 = Tensor::zeros((paths, 2), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    let path = p.path.as_ref().unwrap();
    for (k, t) in [(n / 2, 0.5), (n, 1.0)] {
        for j in 0..2 {
            let xs = column(&path[k], j);
            let (m, se) = mean_se(&xs);
            let (v, vse) = var_se(&xs);
            // EM bias at h = 1/200 is below 2e-3 here (0.0019 at most, from the exact EM
            // moments at N = 100 and 1000, computed independently by the moment recursion).
            assert_within(&format!("mean t={t} j={j}"), m, t * M[j], se, 4.0, 2e-3);
            let want = t * t * S[j] + t * (1.0 - t);
            assert_within(&format!("var t={t} j={j}"), v, want, vse, 4.0, 0.01);
        }
    }
    let (c, cse) = mean_se(&vec1(&p.control_cost));
    // Exact EM expected cost (moment recursion, computed independently): 0.8718822915 at
    // N = 100, 0.8746875729 at N = 1000;
    // so at N = 200 the EM bias is below 0.003.
    assert_within("cost vs KL", c, 0.875, cse, 4.0, 0.003);
}

#[test]
fn trained_control_reaches_minus_log_z_and_kl() {
    // A control trained from scratch on an unnormalised 2-D Gaussian with known Z.
    // Example B: m = (0.3, −0.7), S = [[1, .5], [.5, 2]], KL(π‖γ) = 0.5101921060322887
    // (Rasmussen & Williams 2006, GPML App. A.5, general Gaussian KL, from memory).
    let m = vec![0.3, -0.7];
    let cov = vec![1.0, 0.5, 0.5, 2.0];
    let log_z = 2.0;
    let target = Arc::new(
        GaussianDensity::new(m.clone(), cov.clone())
            .unwrap()
            .with_log_scale(log_z),
    );
    let kl = {
        let det: f64 = 1.0 * 2.0 - 0.25;
        0.5 * (3.0 + 0.09 + 0.49 - 2.0 - det.ln())
    };
    assert_rel("KL B", kl, 0.5101921060322887, 1e-12);
    // 600 steps, the learning rate decaying (cosine) from 3e-3 to 1e-3.
    let cfg = SamplerConfig {
        seed: 3,
        iterations: 600,
        optimizer: OptimizerConfig {
            final_lr_fraction: 1.0 / 3.0,
            ..OptimizerConfig::constant(3e-3)
        },
        ..Default::default()
    };
    let mut sampler = Sampler::new(target, cfg).unwrap();
    assert_eq!(sampler.fit().unwrap().termination, Termination::MaxEpochs);
    let est = sampler.estimate(EstimateOptions::new(8192, 99)).unwrap();
    // Objective within 0.05 nats of −log Z, control cost within 0.1 nats of KL.
    assert!(
        (est.free_energy + log_z).abs() < 0.05,
        "free energy {} ± {} vs −log Z = {}",
        est.free_energy,
        est.free_energy_se,
        -log_z
    );
    assert!(
        (est.control_cost - kl).abs() < 0.1,
        "control cost {} vs KL {kl}",
        est.control_cost
    );
    // The importance-weighted estimate recovers log Z.
    assert_within("log Z", est.log_z, log_z, est.log_z_se, 4.0, 0.0);
}

#[test]
fn monte_carlo_follmer_sampler_hits_the_target() {
    // The training-free sampler: X_1 mean should be m (π's mean) up to MC and EM error.
    let dev = Device::Cpu;
    let cfg = SolverConfig {
        n_steps: 25,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let drift = FollmerDrift::new(target_a(0.0), 500, 1).unwrap();
    let sde = Sde::new(&sigma).with_control(&drift);
    let paths = 2000;
    let noise = cfg
        .sample_noise(&mut generator(5, 0), paths, 2, DType::F64, &dev)
        .unwrap();
    let x0 = Tensor::zeros((paths, 2), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    for j in 0..2 {
        let xs = column(&p.end, j);
        let (mean, se) = mean_se(&xs);
        let (v, vse) = var_se(&xs);
        // EM is exact in the mean for the exact drift; M = 500 adds an O(1/M) bias.
        assert_within(&format!("mean {j}"), mean, M[j], se, 4.0, 0.02);
        // EM variance bias at N = 25 is below 0.1 (exact EM values at N = 10: 0.539, 1.856).
        assert_within(&format!("var {j}"), v, S[j], vse, 4.0, 0.1);
    }
}
