//! Girsanov log-weights: unbiasedness of the importance weights on the EM path measure.
mod common;

use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use common::*;
use neural_sde::*;

/// For any adapted control evaluated at the left point, E_Q[exp(log w)] = 1 exactly for the
/// Euler–Maruyama transitions (ratio of Gaussian transition densities; Girsanov's theorem
/// in discrete time, e.g. Kloeden & Platen 1992, §4.8 for the continuous version, from
/// memory). Here with a prior drift, per-dimension σ and a nonlinear control.
#[test]
fn importance_weights_have_mean_one() {
    let dev = Device::Cpu;
    let cfg = SolverConfig {
        n_steps: 20,
        ..Default::default()
    };
    let sigma = Diffusion::per_dim(&[0.7, 1.3]).unwrap();
    let prior = FnDrift::new(2, |x, _t, _c| x.affine(-1.0, 0.0));
    let control = FnDrift::new(2, |x, t, _c| x.sin()?.affine(0.8, 0.5 * t));
    let sde = Sde::new(&sigma).with_prior(&prior).with_control(&control);
    let paths = 200_000;
    let noise = cfg
        .sample_noise(&mut generator(3, 0), paths, 2, DType::F64, &dev)
        .unwrap();
    let x0 = Tensor::zeros((paths, 2), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    let w: Vec<f64> = vec1(&p.log_weight).iter().map(|l| l.exp()).collect();
    let (m, se) = mean_se(&w);
    assert_within("E[w]", m, 1.0, se, 4.0, 0.0);
    // The control cost is the mean of −log w minus a zero-mean martingale term, so
    // E[−log w] = E[C] (the KL divergence of the path laws), which is positive here.
    let c = vec1(&p.control_cost);
    let nl: Vec<f64> = vec1(&p.log_weight).iter().map(|l| -l).collect();
    let diff: Vec<f64> = nl.iter().zip(&c).map(|(a, b)| a - b).collect();
    let (dm, dse) = mean_se(&diff);
    assert_within("E[Σ v·ΔW]", dm, 0.0, dse, 4.0, 0.0);
}

/// Marginal likelihood of the discretised OU prior dZ = −Z dt + dW, y | Z_1 ~ N(Z_1, 0.25),
/// y = 1, N = 10: p_N(y) = N(y; 0, V_EM + s²) with V_EM = h(1 − r²ⁿ)/(1 − r²), r = 1 − h
/// (AR(1) variance; common practice). Reference value (computed independently in float64) log p_N(y) = −1.451253944606073.
/// The weighted estimator E_Q[w · p(y | X_N)] is unbiased for p_N(y) under any control.
#[test]
fn weighted_likelihood_recovers_discrete_marginal() {
    let n = 10;
    let h = 0.1f64;
    let r = 1.0 - h;
    let v_em = h * (1.0 - r.powi(2 * n)) / (1.0 - r * r);
    let s2 = 0.25;
    let log_p = -0.5 * (2.0 * std::f64::consts::PI * (v_em + s2)).ln() - 0.5 / (v_em + s2);
    assert_rel("log p_N(y)", log_p, -1.451253944606073, 1e-12);

    let dev = Device::Cpu;
    let cfg = SolverConfig {
        n_steps: n as usize,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let prior = FnDrift::new(1, |x, _t, _c| x.affine(-1.0, 0.0));
    let control = FnDrift::new(1, |x, _t, _c| x.affine(0.0, 0.8));
    let sde = Sde::new(&sigma).with_prior(&prior).with_control(&control);
    let paths = 200_000;
    let noise = cfg
        .sample_noise(&mut generator(7, 0), paths, 1, DType::F64, &dev)
        .unwrap();
    let x0 = Tensor::zeros((paths, 1), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    let nll = GaussianNll::fixed(&[0.5], DType::F64, &dev).unwrap();
    let y = Tensor::ones((paths, 1), DType::F64, &dev).unwrap();
    let g = nll.cost(&p.end, Some(&y)).unwrap();
    let lw = vec1(&(&p.log_weight - &g).unwrap());
    let w: Vec<f64> = lw.iter().map(|l| l.exp()).collect();
    let (m, se) = mean_se(&w);
    assert_within("p_N(y)", m, log_p.exp(), se, 4.0, 0.0);
    // A flipped sign of the stochastic term (+u·ΔW) would bias this by many SE: check the
    // estimator is sensitive by computing it.
    let stoch: Vec<f64> = lw
        .iter()
        .zip(vec1(&p.control_cost))
        .zip(vec1(&g))
        .map(|((l, c), g)| -(l + c + g))
        .collect(); // = Σ v·ΔW
    let flipped: Vec<f64> = lw
        .iter()
        .zip(&stoch)
        .map(|(l, s)| (l + 2.0 * s).exp())
        .collect();
    let (fm, fse) = mean_se(&flipped);
    assert!(
        (fm - log_p.exp()).abs() > 10.0 * fse,
        "flipped-sign estimator is not distinguishable"
    );
}

/// The importance-weighted log Z of an unnormalised Gaussian with known Z = 5.
/// E[w] = Z for every control and N because EM is exact for Brownian motion
/// (Zhang & Chen, *Path Integral Sampler*, ICLR 2022, from the abstract and memory).
#[test]
fn weighted_log_z_recovers_known_constant() {
    let m = vec![1.0, -0.5];
    let s = vec![0.5, 2.0];
    let target = Arc::new(
        GaussianDensity::new(m.clone(), vec![s[0], 0.0, 0.0, s[1]])
            .unwrap()
            .with_log_scale(5f64.ln()),
    );
    let terminal = LogDensityRatio::new(target, 1.0).unwrap();
    let sigma = Diffusion::constant(1.0).unwrap();
    let cfg = SolverConfig {
        n_steps: 50,
        ..Default::default()
    };
    // Closed-form Föllmer drift: the near-optimal control.
    let (m2, s2) = (m.clone(), s.clone());
    let follmer = FnDrift::new(2, move |x, t, _c| {
        let xs = x.to_vec2::<f64>()?;
        let out: Vec<f64> = xs
            .iter()
            .flat_map(|r| follmer_gaussian_diag(&m2, &s2, r, t))
            .collect();
        Tensor::from_vec(out, x.dims(), x.device())
    });
    let sde = Sde::new(&sigma).with_control(&follmer);
    let est = estimate_log_z(
        &sde,
        &terminal,
        &cfg,
        DType::F64,
        EstimateOptions::new(20_000, 5),
    )
    .unwrap();
    assert_within(
        "log Z (Föllmer)",
        est.log_z,
        5f64.ln(),
        est.log_z_se,
        4.0,
        0.0,
    );
    assert!(
        est.ess > 0.9 * est.paths as f64,
        "ESS {} of {}",
        est.ess,
        est.paths
    );
    // The zero control: unbiased too, but far noisier.
    let zero = FnDrift::new(2, |x, _t, _c| x.zeros_like());
    let sde0 = Sde::new(&sigma).with_control(&zero);
    let est0 = estimate_log_z(
        &sde0,
        &terminal,
        &cfg,
        DType::F64,
        EstimateOptions::new(20_000, 6),
    )
    .unwrap();
    assert_within(
        "log Z (u = 0)",
        est0.log_z,
        5f64.ln(),
        est0.log_z_se,
        4.0,
        0.0,
    );
    assert!(est0.ess < est.ess);
    // ELBO with u = 0 is log Z − KL(γ‖π) = 0.2969379124 for every N (closed form).
    assert_within(
        "−J(0)",
        -est0.free_energy,
        0.2969379124,
        est0.free_energy_se,
        4.0,
        0.0,
    );
}

/// Noise supplied by the caller: increments of a fine grid summed in pairs give the coarse
/// grid's increments (independent Gaussian increments add; common practice, no source). With
/// a constant control `u = c` and σ per dimension, Euler–Maruyama is exact:
/// `X_T = c T + σ ⊙ W_T`, and the Girsanov log-weight of a constant drift `v = c/σ` is
/// `−v·W_T − ½|v|² T` (Øksendal, *Stochastic Differential Equations*, 6th ed., Thm 8.6.4,
/// from memory), both from the fine grid's sum `W_T`.
#[test]
fn caller_supplied_increments_from_a_finer_grid() {
    let dev = Device::Cpu;
    let (paths, n, t_end) = (500, 8, 1.5);
    let fine = SolverConfig {
        n_steps: 2 * n,
        t_end,
        ..Default::default()
    }
    .sample_noise(&mut generator(12, 0), paths, 2, DType::F64, &dev)
    .unwrap();
    let coarse_dw: Vec<Tensor> = fine
        .dw()
        .chunks(2)
        .map(|p| (&p[0] + &p[1]).unwrap())
        .collect();
    let w_t = fine
        .dw()
        .iter()
        .skip(1)
        .fold(fine.dw()[0].clone(), |a, b| (a + b).unwrap());
    let noise =
        BrownianIncrements::from_tensors(coarse_dw.clone(), None, t_end / n as f64).unwrap();
    let cfg = SolverConfig {
        n_steps: n,
        t_end,
        ..Default::default()
    };
    let (c, s) = ([0.4, -1.1], [0.7, 1.3]);
    let sigma = Diffusion::per_dim(&s).unwrap();
    let control = FnDrift::new(2, move |x, _t, _c| {
        Tensor::new(&[c], x.device())?
            .broadcast_as(x.shape())?
            .to_dtype(x.dtype())
    });
    let sde = Sde::new(&sigma).with_control(&control);
    let x0 = Tensor::zeros((paths, 2), DType::F64, &dev).unwrap();
    let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
    let end: Vec<Vec<f64>> = p.end.to_vec2().unwrap();
    let w: Vec<Vec<f64>> = w_t.to_vec2().unwrap();
    let lw = vec1(&p.log_weight);
    let v = [c[0] / s[0], c[1] / s[1]];
    for i in 0..paths {
        let mut want_lw = -0.5 * (v[0] * v[0] + v[1] * v[1]) * t_end;
        for j in 0..2 {
            let want = c[j] * t_end + s[j] * w[i][j];
            assert!((end[i][j] - want).abs() < 1e-12, "X_T[{i}][{j}]");
            want_lw -= v[j] * w[i][j];
        }
        assert!((lw[i] - want_lw).abs() < 1e-12, "log w[{i}]");
    }
    // A grid that does not match the increments is refused, as are ragged increments.
    let other = SolverConfig {
        n_steps: 2 * n,
        t_end,
        ..Default::default()
    };
    assert!(simulate(&sde, &other, &x0, &noise, None).is_err());
    let mut ragged = coarse_dw;
    ragged[3] = ragged[3].narrow(0, 0, 10).unwrap();
    let e = BrownianIncrements::from_tensors(ragged, None, 0.1).unwrap_err();
    assert!(matches!(e, Error::Shape { .. }), "{e}");
    let e = BrownianIncrements::from_tensors(Vec::new(), None, 0.1).unwrap_err();
    assert!(matches!(e, Error::InvalidConfig { .. }), "{e}");
}
