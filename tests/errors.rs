//! Every invalid input is a typed error whose message names the bad value.
use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use neural_sde::*;

fn dev() -> Device {
    Device::Cpu
}

#[test]
fn non_positive_sigma_and_steps_are_rejected() {
    for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
        let e = Diffusion::constant(bad).unwrap_err();
        assert!(
            matches!(e, Error::InvalidConfig { field: "sigma", .. }),
            "{e}"
        );
        assert!(e.to_string().contains(&bad.to_string()), "{e}");
    }
    let e = Diffusion::per_dim(&[1.0, -0.5]).unwrap_err();
    assert!(e.to_string().contains("-0.5"), "{e}");
    let e = SolverConfig {
        n_steps: 0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(
        matches!(
            e,
            Error::InvalidConfig {
                field: "n_steps",
                ..
            }
        ),
        "{e}"
    );
    let e = SolverConfig {
        t_end: -2.0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(e.to_string().contains("t_end = -2"), "{e}");
    let e = MlpConfig {
        width: 0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(matches!(e, Error::InvalidConfig { field: "width", .. }));
    let e = SamplerConfig {
        batch_size: 0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(matches!(
        e,
        Error::InvalidConfig {
            field: "batch_size",
            ..
        }
    ));
    let e = SamplerConfig {
        solver: SolverConfig {
            scheme: Scheme::Sra1,
            ..Default::default()
        },
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(e.to_string().contains("Euler"), "{e}");
    let e = AdamWConfig {
        beta1: 1.0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(matches!(e, Error::InvalidConfig { field: "beta1", .. }));
}

#[test]
fn drift_output_of_wrong_shape_is_named() {
    let cfg = SolverConfig {
        n_steps: 3,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    // Declares dimension 2 but returns 3 columns.
    let bad = FnDrift::new(2, |x, _t, _c| Tensor::cat(&[x, &x.narrow(1, 0, 1)?], 1));
    let noise = cfg
        .sample_noise(&mut generator(0, 0), 4, 2, DType::F32, &dev())
        .unwrap();
    let x0 = Tensor::zeros((4, 2), DType::F32, &dev()).unwrap();
    let e = simulate(
        &Sde::new(&sigma).with_control(&bad),
        &cfg,
        &x0,
        &noise,
        None,
    )
    .unwrap_err();
    assert!(matches!(e, Error::Shape { .. }), "{e}");
    let msg = e.to_string();
    assert!(
        msg.contains("control output") && msg.contains("[4, 2]") && msg.contains("[4, 3]"),
        "{msg}"
    );
}

#[test]
fn mismatched_state_noise_and_drift_dimensions_are_named() {
    let cfg = SolverConfig {
        n_steps: 3,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let u = FnDrift::new(3, |x, _t, _c| x.zeros_like());
    let noise = cfg
        .sample_noise(&mut generator(0, 0), 4, 2, DType::F32, &dev())
        .unwrap();
    let x0 = Tensor::zeros((4, 2), DType::F32, &dev()).unwrap();
    let e = simulate(&Sde::new(&sigma).with_control(&u), &cfg, &x0, &noise, None).unwrap_err();
    assert!(
        e.to_string()
            .contains("control dimension vs state: expected 2, got 3"),
        "{e}"
    );
    let x_bad = Tensor::zeros((5, 2), DType::F32, &dev()).unwrap();
    let e = simulate(&Sde::new(&sigma), &cfg, &x_bad, &noise, None).unwrap_err();
    assert!(e.to_string().contains("noise vs x0"), "{e}");
    let other = SolverConfig {
        n_steps: 4,
        ..Default::default()
    };
    let e = simulate(&Sde::new(&sigma), &other, &x0, &noise, None).unwrap_err();
    assert!(e.to_string().contains("the noise has 3 steps"), "{e}");
    let sra = SolverConfig {
        n_steps: 3,
        scheme: Scheme::Sra1,
        ..Default::default()
    };
    let e = simulate(&Sde::new(&sigma), &sra, &x0, &noise, None).unwrap_err();
    assert!(e.to_string().contains("ΔZ"), "{e}");
    let per_dim = Diffusion::per_dim(&[1.0, 1.0, 1.0]).unwrap();
    let e = simulate(&Sde::new(&per_dim), &cfg, &x0, &noise, None).unwrap_err();
    assert!(
        e.to_string()
            .contains("sigma (one value per dimension): expected 2, got 3"),
        "{e}"
    );
}

#[test]
fn missing_context_is_named() {
    let vm = candle_nn::VarMap::new();
    let pb = ParamBuilder::new(&vm, DType::F32, &dev());
    let u = TimeMlp::new(&MlpConfig::default(), 2, 3, &pb, &mut generator(0, 0)).unwrap();
    let cfg = SolverConfig {
        n_steps: 2,
        ..Default::default()
    };
    let sigma = Diffusion::constant(1.0).unwrap();
    let noise = cfg
        .sample_noise(&mut generator(0, 0), 4, 2, DType::F32, &dev())
        .unwrap();
    let x0 = Tensor::zeros((4, 2), DType::F32, &dev()).unwrap();
    let e = simulate(&Sde::new(&sigma).with_control(&u), &cfg, &x0, &noise, None).unwrap_err();
    assert!(e.to_string().contains("needs a context"), "{e}");
    let ctx = Tensor::zeros((4, 2), DType::F32, &dev()).unwrap();
    let e = simulate(
        &Sde::new(&sigma).with_control(&u),
        &cfg,
        &x0,
        &noise,
        Some(&ctx),
    )
    .unwrap_err();
    assert!(e.to_string().contains("expected (4, 3), got [4, 2]"), "{e}");
}

#[test]
fn non_finite_objective_is_reported_and_not_applied() {
    // A target whose log-density is NaN everywhere.
    let target = Arc::new(FnDensity::new(2, |x| x.sum(1)?.affine(0.0, f64::NAN)));
    let cfg = SamplerConfig {
        batch_size: 8,
        solver: SolverConfig {
            n_steps: 4,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut s = Sampler::new(target, cfg).unwrap();
    let before: Vec<f32> = sorted_vars(s.varmap()).unwrap()[0]
        .1
        .as_tensor()
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    let e = s.step().unwrap_err();
    assert!(matches!(e, Error::NonFinite { .. }), "{e}");
    assert!(e.to_string().contains("free energy"), "{e}");
    let after: Vec<f32> = sorted_vars(s.varmap()).unwrap()[0]
        .1
        .as_tensor()
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    assert_eq!(before, after);
}

#[test]
fn bad_target_and_terminal_inputs_are_named() {
    let e = GaussianMixture::new(vec![], 1.0).unwrap_err();
    assert!(e.to_string().contains("centers"), "{e}");
    let e = GaussianDensity::new(vec![0.0, 0.0], vec![1.0, 2.0, 2.0, 1.0]).unwrap_err();
    assert!(e.to_string().contains("positive definite"), "{e}");
    let e = GaussianNll::fixed(&[1.0, 0.0], DType::F32, &dev()).unwrap_err();
    assert!(matches!(e, Error::InvalidConfig { field: "scale", .. }));
    let nll = GaussianNll::fixed(&[1.0], DType::F32, &dev()).unwrap();
    let x = Tensor::zeros((2, 1), DType::F32, &dev()).unwrap();
    let e = nll.cost(&x, None).unwrap_err().to_string();
    assert!(e.contains("needs an observation"), "{e}");
}

/// Asking for the fused kernel where it cannot run is an error that says why; `Auto` falls
/// back to the generic path and `Generic` never fuses.
#[test]
fn fused_kernel_where_it_cannot_run_says_why() {
    let sigma = Diffusion::constant(1.0).unwrap();
    let custom = FnDrift::new(2, |x, _t, _c| x.affine(-1.0, 0.0));
    let x0 = Tensor::zeros((4, 2), DType::F32, &dev()).unwrap();
    let run = |kernel: Kernel, scheme: Scheme, drift: &dyn Drift| {
        let cfg = SolverConfig {
            n_steps: 3,
            kernel,
            scheme,
            ..Default::default()
        };
        let noise = cfg
            .sample_noise(&mut generator(0, 0), 4, 2, DType::F32, &dev())
            .unwrap();
        simulate(
            &Sde::new(&sigma).with_control(drift),
            &cfg,
            &x0,
            &noise,
            None,
        )
    };
    let e = run(Kernel::Fused, Scheme::EulerMaruyama, &custom).unwrap_err();
    assert!(
        matches!(
            e,
            Error::InvalidConfig {
                field: "kernel",
                ..
            }
        ),
        "{e}"
    );
    assert!(e.to_string().contains("built-in network"), "{e}");
    assert!(run(Kernel::Auto, Scheme::EulerMaruyama, &custom).is_ok());
    assert!(run(Kernel::Generic, Scheme::EulerMaruyama, &custom).is_ok());

    let vm = candle_nn::VarMap::new();
    let pb = ParamBuilder::new(&vm, DType::F32, &dev());
    let net = TimeMlp::new(&MlpConfig::default(), 2, 0, &pb, &mut generator(0, 1)).unwrap();
    let e = run(Kernel::Fused, Scheme::Sra1, &net).unwrap_err();
    assert!(e.to_string().contains("Euler–Maruyama"), "{e}");
    assert!(run(Kernel::Fused, Scheme::EulerMaruyama, &net).is_ok());
}
