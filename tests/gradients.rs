//! Pathwise gradients: against central finite differences with common random numbers, and
//! against a closed-form derivative of the discretised loss.
mod common;

use std::sync::Arc;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarMap;
use common::*;
use neural_sde::*;

/// Loss of a latent model in f64 with every kind of parameter: an MLP prior drift, an MLP
/// control with context, a learned σ and a learned Gaussian scale.
struct Model {
    vm: VarMap,
    prior: TimeMlp,
    control: TimeMlp,
    sigma: Diffusion,
    nll: GaussianNll,
}

fn model() -> Model {
    let dev = Device::Cpu;
    let vm = VarMap::new();
    let pb = ParamBuilder::new(&vm, DType::F64, &dev);
    let mut rng = generator(5, 1);
    let cfg = MlpConfig {
        width: 8,
        depth: 2,
        activation: Activation::Tanh,
        zero_output: false,
    };
    let prior = TimeMlp::new(&cfg, 2, 0, &pb.pp("prior"), &mut rng).unwrap();
    let cfg = MlpConfig {
        activation: Activation::Silu,
        ..cfg
    };
    let control = TimeMlp::new(&cfg, 2, 2, &pb.pp("control"), &mut rng).unwrap();
    let sigma = Diffusion::learned(&pb.pp("diffusion"), &[0.8, 1.2]).unwrap();
    let nll = GaussianNll::learned(&pb.pp("decoder"), &[0.7, 1.1]).unwrap();
    Model {
        vm,
        prior,
        control,
        sigma,
        nll,
    }
}

fn loss(m: &Model, scheme: Scheme, noise: &BrownianIncrements, y: &Tensor) -> Tensor {
    let cfg = SolverConfig {
        n_steps: noise.n_steps(),
        scheme,
        ..Default::default()
    };
    let sde = Sde::new(&m.sigma)
        .with_prior(&m.prior)
        .with_control(&m.control);
    let x0 = Tensor::zeros(y.dims(), DType::F64, y.device()).unwrap();
    let p = simulate(&sde, &cfg, &x0, noise, Some(y)).unwrap();
    FreeEnergy::new(&p, &m.nll, Some(y)).unwrap().loss
}

fn scalar(t: &Tensor) -> f64 {
    t.to_scalar::<f64>().unwrap()
}

#[test]
fn gradients_match_central_differences() {
    // Central differences with common random numbers (the same noise in every evaluation):
    // error O(ε²) (common practice, no source).
    let dev = Device::Cpu;
    let y = Tensor::new(&[[0.5f64, -1.0], [1.5, 0.2], [-0.3, 0.9]], &dev).unwrap();
    for scheme in [Scheme::EulerMaruyama, Scheme::Sra1] {
        let m = model();
        let cfg = SolverConfig {
            n_steps: 12,
            scheme,
            ..Default::default()
        };
        let noise = cfg
            .sample_noise(&mut generator(8, 0), 3, 2, DType::F64, &dev)
            .unwrap();
        let grads = loss(&m, scheme, &noise, &y).backward().unwrap();
        let vars = sorted_vars(&m.vm).unwrap();
        assert!(vars.len() >= 12);
        for (name, var) in &vars {
            let g = grads
                .get(var.as_tensor())
                .unwrap_or_else(|| panic!("no gradient for {name}"));
            let g = g.flatten_all().unwrap().to_vec1::<f64>().unwrap();
            let base = var
                .as_tensor()
                .flatten_all()
                .unwrap()
                .to_vec1::<f64>()
                .unwrap();
            // Probe up to three entries of each parameter.
            for idx in [0, base.len() / 2, base.len() - 1] {
                let eps = 1e-5;
                let eval = |delta: f64| {
                    let mut v = base.clone();
                    v[idx] += delta;
                    var.set(&Tensor::from_vec(v, var.dims(), &dev).unwrap())
                        .unwrap();
                    scalar(&loss(&m, scheme, &noise, &y))
                };
                let fd = (eval(eps) - eval(-eps)) / (2.0 * eps);
                var.set(&Tensor::from_vec(base.clone(), var.dims(), &dev).unwrap())
                    .unwrap();
                assert!(
                    (fd - g[idx]).abs() <= 1e-6 * fd.abs().max(1.0),
                    "{scheme:?} {name}[{idx}]: autodiff {} vs finite difference {fd}",
                    g[idx]
                );
            }
        }
    }
}

#[test]
fn ou_parameter_gradient_matches_discrete_closed_form() {
    // d/dθ E[X_N²] for EM on dX = −θX dt + dW, X_0 = 1, N = 10, θ = 0.7:
    // E X_N² = r²ᴺ + h(1 − r²ᴺ)/(1 − r²), r = 1 − θh, whose derivative is −0.911236338164
    // (value computed independently in float64 from that closed form; "discretise-then-optimise" is exact for the discrete loss,
    // cf. Li, Wong, Chen, Duvenaud 2020, AISTATS, from memory).
    let dev = Device::Cpu;
    let theta = Var::new(&[0.7f64], &dev).unwrap();
    let th = theta.as_tensor().clone();
    let drift = FnDrift::new(1, move |x, _t, _c| x.broadcast_mul(&th)?.neg());
    let sigma = Diffusion::constant(1.0).unwrap();
    let sde = Sde::new(&sigma).with_prior(&drift);
    let cfg = SolverConfig {
        n_steps: 10,
        ..Default::default()
    };
    let mut rng = generator(0, 0);
    let mut estimates = Vec::new();
    for _ in 0..20 {
        let paths = 50_000;
        let noise = cfg
            .sample_noise(&mut rng, paths, 1, DType::F64, &dev)
            .unwrap();
        let x0 = Tensor::ones((paths, 1), DType::F64, &dev).unwrap();
        let p = simulate(&sde, &cfg, &x0, &noise, None).unwrap();
        let l = p.end.sqr().unwrap().mean_all().unwrap();
        let g = l.backward().unwrap();
        estimates.push(g.get(theta.as_tensor()).unwrap().to_vec1::<f64>().unwrap()[0]);
    }
    let (m, se) = mean_se(&estimates);
    assert_within("dE[X²]/dθ", m, -0.911236338164, se, 4.0, 0.0);
}

#[test]
fn sampler_gradient_reaches_every_control_parameter() {
    let target = Arc::new(GaussianMixture::ring_2d());
    let cfg = SamplerConfig {
        batch_size: 16,
        solver: SolverConfig {
            n_steps: 5,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut s = Sampler::new(target, cfg).unwrap();
    let values = |s: &Sampler| -> Vec<Vec<f32>> {
        sorted_vars(s.varmap())
            .unwrap()
            .iter()
            .map(|(_, v)| {
                v.as_tensor()
                    .flatten_all()
                    .unwrap()
                    .to_vec1::<f32>()
                    .unwrap()
            })
            .collect()
    };
    let before = values(&s);
    // The zero-initialised output layer gets a gradient at the first step; the hidden layers
    // at the second.
    s.step().unwrap();
    s.step().unwrap();
    let after = values(&s);
    for (i, (a, b)) in before.iter().zip(&after).enumerate() {
        assert_ne!(a, b, "parameter {i} did not move");
    }
}
