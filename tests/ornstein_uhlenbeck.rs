//! Ornstein–Uhlenbeck: moments of Euler–Maruyama and SRA1 against their exact recursions and
#![allow(clippy::needless_range_loop)] // index loops mirror the textbook formulas
//! the continuous solution, and observed strong orders against the orders proved in the literature.
mod common;

use candle_core::{DType, Device, Tensor};
use common::*;
use neural_sde::*;

const THETA: f64 = 1.0;

fn ou_drift(
) -> FnDrift<impl Fn(&Tensor, f64, Option<&Tensor>) -> candle_core::Result<Tensor> + Send + Sync> {
    FnDrift::new(1, |x, _t, _c| x.affine(-THETA, 0.0))
}

fn simulate_ou(
    scheme: Scheme,
    n: usize,
    paths: usize,
    seed: u64,
) -> (Vec<f64>, BrownianIncrements) {
    let dev = Device::Cpu;
    let cfg = SolverConfig {
        n_steps: n,
        scheme,
        ..Default::default()
    };
    let noise = cfg
        .sample_noise(&mut generator(seed, 0), paths, 1, DType::F64, &dev)
        .unwrap();
    let sigma = Diffusion::constant(1.0).unwrap();
    let drift = ou_drift();
    let sde = Sde::new(&sigma).with_prior(&drift);
    let x0 = Tensor::ones((paths, 1), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    (column(&p.end, 0), noise)
}

/// EM on dX = −θX dt + σ dW is the AR(1) recursion X_{k+1} = (1 − θh) X_k + σ ΔW_k, so
/// E X_n = x0 rⁿ and Var X_n = σ² h (1 − r²ⁿ)/(1 − r²), r = 1 − θh (Kloeden & Platen 1992,
/// *Numerical Solution of SDEs*, §4.4 for the continuous solution, from memory; the AR(1)
/// geometric sum is common practice, no source).
fn em_moments(n: usize) -> (f64, f64) {
    let h = 1.0 / n as f64;
    let r: f64 = 1.0 - THETA * h;
    (
        r.powi(n as i32),
        h * (1.0 - r.powi(2 * n as i32)) / (1.0 - r * r),
    )
}

#[test]
fn euler_maruyama_matches_ar1_moments() {
    // Reference values computed independently in float64 (x0 = 1, θ = σ = T = 1): EM n = 10 mean 0.3486784401,
    // var 0.462328076531279 — our closed form reproduces them first.
    let (m10, v10) = em_moments(10);
    assert_rel("EM mean n=10", m10, 0.3486784401, 1e-10);
    assert_rel("EM var n=10", v10, 0.462328076531279, 1e-12);
    let (x, _) = simulate_ou(Scheme::EulerMaruyama, 10, 200_000, 11);
    let (m, se) = mean_se(&x);
    assert_within("EM mean", m, m10, se, 4.0, 0.0);
    let (v, vse) = var_se(&x);
    assert_within("EM variance", v, v10, vse, 4.0, 0.0);
    // The EM bias at n = 10 (0.03 in the variance) is far above the SE: the test can tell
    // the discrete value from the continuous one, σ²(1 − e^{−2θ})/(2θ) = 0.432332358.
    assert!((v - 0.432332358381694).abs() > 10.0 * vse);
}

#[test]
fn fine_grids_approach_the_continuous_solution() {
    // Continuous OU (Kloeden & Platen 1992, §4.4, from memory):
    // E X_1 = e^{−θ}, Var X_1 = (1 − e^{−2θ})/(2θ).
    let (x, _) = simulate_ou(Scheme::EulerMaruyama, 200, 100_000, 12);
    let (m, se) = mean_se(&x);
    let (v, vse) = var_se(&x);
    // EM bias at h = 1/200 is about 1e-3 in the mean and 7e-4 in the variance (O(h)).
    assert_within("mean", m, (-THETA).exp(), se, 4.0, 2e-3);
    assert_within(
        "variance",
        v,
        (1.0 - (-2.0 * THETA).exp()) / (2.0 * THETA),
        vse,
        4.0,
        2e-3,
    );
    let (x, _) = simulate_ou(Scheme::Sra1, 20, 100_000, 13);
    let (m, se) = mean_se(&x);
    let (v, vse) = var_se(&x);
    // SRA1 at n = 20: mean bias (1 − θh + θ²h²/2)ⁿ − e^{−θ} ≈ 3e-5, variance bias ≈ 1e-4.
    assert_within("SRA1 mean", m, (-THETA).exp(), se, 4.0, 1e-4);
    assert_within(
        "SRA1 variance",
        v,
        (1.0 - (-2.0 * THETA).exp()) / (2.0 * THETA),
        vse,
        4.0,
        5e-4,
    );
}

#[test]
fn sra1_matches_its_linear_recursion() {
    // On a linear drift SRA1 is X' = R X + σ(ΔW − θ ΔZ) with R = 1 − θh + θ²h²/2 and per-step
    // noise variance σ²(h − θh² + θ²h³/3) (derived from the scheme; Rößler 2010 for SRA1,
    // Var ΔZ = h³/3 and Cov(ΔW, ΔZ) = h²/2 from Kloeden & Platen 1992, §10.4, from memory).
    // Reference value computed independently in float64 for n = 10: SRA1 var 0.431352606744827.
    let n = 10;
    let h = 0.1;
    let big_r: f64 = 1.0 - THETA * h + THETA * THETA * h * h / 2.0;
    let q = h - THETA * h * h + THETA * THETA * h.powi(3) / 3.0;
    let mean = big_r.powi(n);
    let var = q * (1.0 - big_r.powi(2 * n)) / (1.0 - big_r * big_r);
    assert_rel("SRA1 var n=10", var, 0.431352606744827, 1e-12);
    let (x, _) = simulate_ou(Scheme::Sra1, n as usize, 200_000, 14);
    let (m, se) = mean_se(&x);
    let (v, vse) = var_se(&x);
    assert_within("SRA1 mean", m, mean, se, 4.0, 0.0);
    assert_within("SRA1 variance", v, var, vse, 4.0, 0.0);
}

/// RMS error at T = 1 of `scheme` against the exact OU solution driven by the same
/// Brownian path (noise drawn with ΔZ, so both schemes see identical ΔW).
///
/// The exact step is X' = e^{−θh} X + σ J, J = ∫ e^{−θ(h−s)} dW_s, jointly Gaussian with ΔW
/// and ΔZ: Var J = (1 − e^{−2θh})/(2θ), Cov(J, ΔW) = (1 − e^{−θh})/θ,
/// Cov(J, ΔZ) = (1 − e^{−θh}(1 + θh))/θ² (Itô isometry; common practice, no source). J is
/// drawn from its conditional law given (ΔW, ΔZ).
fn strong_error(scheme: Scheme, n: usize, paths: usize) -> f64 {
    let dev = Device::Cpu;
    let area_cfg = SolverConfig {
        n_steps: n,
        scheme: Scheme::Sra1,
        ..Default::default()
    };
    let noise = area_cfg
        .sample_noise(
            &mut generator(100 + n as u64, 0),
            paths,
            1,
            DType::F64,
            &dev,
        )
        .unwrap();
    let cfg = SolverConfig {
        n_steps: n,
        scheme,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let drift = ou_drift();
    let sde = Sde::new(&sigma).with_prior(&drift);
    let x0 = Tensor::ones((paths, 1), DType::F64, &dev).unwrap();
    let approx = column(&simulate(&sde, &cfg, &x0, &noise, None).unwrap().end, 0);

    let h = 1.0 / n as f64;
    let e = (-THETA * h).exp();
    let (vw, vz, cwz) = (h, h.powi(3) / 3.0, h * h / 2.0);
    let vj = (1.0 - e * e) / (2.0 * THETA);
    let (cjw, cjz) = (
        (1.0 - e) / THETA,
        (1.0 - e * (1.0 + THETA * h)) / (THETA * THETA),
    );
    let det = vw * vz - cwz * cwz;
    let a = (vz * cjw - cwz * cjz) / det;
    let b = (vw * cjz - cwz * cjw) / det;
    let resid = (vj - (a * cjw + b * cjz)).max(0.0).sqrt();
    let mut rng = generator(999, n as u64);
    let mut x = vec![1.0; paths];
    for k in 0..n {
        let dw = column(&noise.dw()[k], 0);
        let dz = column(&noise.dz().expect("noise drawn with ΔZ")[k], 0);
        let xi = standard_normals(&mut rng, paths);
        for i in 0..paths {
            x[i] = e * x[i] + a * dw[i] + b * dz[i] + resid * xi[i];
        }
    }
    let mse = x
        .iter()
        .zip(&approx)
        .map(|(a, b)| (a - b).powi(2))
        .sum::<f64>()
        / paths as f64;
    mse.sqrt()
}

#[test]
fn observed_strong_orders_match_proven_orders() {
    let ns = [4usize, 8, 16, 32, 64];
    let hs: Vec<f64> = ns.iter().map(|&n| 1.0 / n as f64).collect();
    let em: Vec<f64> = ns
        .iter()
        .map(|&n| strong_error(Scheme::EulerMaruyama, n, 10_000))
        .collect();
    let sra: Vec<f64> = ns
        .iter()
        .map(|&n| strong_error(Scheme::Sra1, n, 10_000))
        .collect();
    // Exact RMS errors for this problem, derived from the joint Gaussian law above (x0 = 1,
    // θ = σ = T = 1): EM 9.645621e-2 at N = 4 and 5.530227e-3 at N = 64; SRA1 9.891276e-3 at
    // N = 4. The relative SE of an RMS estimate from P paths is about 0.71/√P = 0.7 %.
    assert_within(
        "EM rms N=4",
        em[0],
        9.645621e-2,
        0.0071 * 9.645621e-2,
        4.0,
        0.0,
    );
    assert_within(
        "EM rms N=64",
        em[4],
        5.530227e-3,
        0.0071 * 5.530227e-3,
        4.0,
        0.0,
    );
    assert_within(
        "SRA1 rms N=4",
        sra[0],
        9.891276e-3,
        0.0071 * 9.891276e-3,
        4.0,
        0.0,
    );
    let p_em = log_log_slope(&hs, &em);
    let p_sra = log_log_slope(&hs, &sra);
    // EM: strong order 1 for additive noise (Kloeden & Platen 1992, §10.2–10.3, from memory).
    assert!(
        (0.85..1.2).contains(&p_em),
        "EM strong order {p_em}, errors {em:?}"
    );
    // SRA1: strong order 1.5 (Rößler 2010, SIAM J. Numer. Anal. 48(3)); on a linear drift
    // it converges faster still.
    assert!(p_sra > 1.35, "SRA1 strong order {p_sra}, errors {sra:?}");
    assert!(sra.iter().zip(&em).all(|(s, e)| s < e));
}
