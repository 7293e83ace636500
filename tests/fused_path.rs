//! The fused whole-path kernel for built-in networks against the generic autodiff path:
//! same values and the same gradients (parameters, initial state, context) to 1e-5 relative
//! in f32 and to 1e-10 in f64.
//!
//! Reference: the generic path is candle's own reverse-mode autodiff over the Euler–Maruyama
//! recursion (a general-purpose library's result, not the code under test); the recursion
//! itself is checked against closed forms in `ornstein_uhlenbeck.rs` and `girsanov.rs`.

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarMap;
use neural_sde::*;

struct Case {
    dtype: DType,
    batch: usize,
    d: usize,
    c: usize,
    depth: usize,
    act: Activation,
    prior: bool,
    control: bool,
    sigma: Vec<f64>,
    n_steps: usize,
}

/// Values (end, cost, log-weight) and gradients (every parameter, x0, context) flattened.
fn run(case: &Case, fused: bool) -> (Vec<f64>, Vec<(String, Vec<f64>)>) {
    let dev = Device::Cpu;
    let vm = VarMap::new();
    let pb = ParamBuilder::new(&vm, case.dtype, &dev);
    let mut rng = generator(11, 1);
    let mlp = MlpConfig {
        width: 16,
        depth: case.depth,
        activation: case.act,
        zero_output: false,
    };
    let prior = TimeMlp::new(&mlp, case.d, 0, &pb.pp("prior"), &mut rng).unwrap();
    let control = TimeMlp::new(&mlp, case.d, case.c, &pb.pp("control"), &mut rng).unwrap();
    let randn = |rng: &mut Generator, r: usize, c: usize| {
        Tensor::from_vec(standard_normals(rng, r * c), (r, c), &dev)
            .unwrap()
            .to_dtype(case.dtype)
            .unwrap()
    };
    let x0 = Var::from_tensor(&randn(&mut rng, case.batch, case.d)).unwrap();
    let ctx = Var::from_tensor(&randn(&mut rng, case.batch, case.c.max(1))).unwrap();
    let sigma = Diffusion::per_dim(&case.sigma).unwrap();
    let mut sde = Sde::new(&sigma);
    if case.prior {
        sde = sde.with_prior(&prior);
    }
    if case.control {
        sde = sde.with_control(&control);
    }
    let cfg = SolverConfig {
        n_steps: case.n_steps,
        t_end: 0.8,
        kernel: if fused {
            Kernel::Fused
        } else {
            Kernel::Generic
        },
        ..Default::default()
    };
    let noise = cfg
        .sample_noise(&mut generator(11, 2), case.batch, case.d, case.dtype, &dev)
        .unwrap();
    let context = (case.control && case.c > 0).then(|| ctx.as_tensor().clone());
    let p = simulate(&sde, &cfg, x0.as_tensor(), &noise, context.as_ref()).unwrap();
    // A loss that weighs every output differently: Σ sin(x_N)·a + 0.3 cost − 0.7 log w.
    let a = randn(&mut generator(11, 3), case.batch, case.d);
    let loss = ((p.end.sin().unwrap() * &a).unwrap().sum_all().unwrap()
        + (p.control_cost.affine(0.3, 0.0).unwrap() - p.log_weight.affine(0.7, 0.0).unwrap())
            .unwrap()
            .sum_all()
            .unwrap())
    .unwrap();
    let grads = loss.backward().unwrap();
    let flat = |t: &Tensor| -> Vec<f64> {
        t.flatten_all()
            .unwrap()
            .to_dtype(DType::F64)
            .unwrap()
            .to_vec1()
            .unwrap()
    };
    let mut values = flat(&p.end);
    values.extend(flat(&p.control_cost));
    values.extend(flat(&p.log_weight));
    let mut g = Vec::new();
    for (name, v) in sorted_vars(&vm).unwrap() {
        if let Some(t) = grads.get(v.as_tensor()) {
            g.push((name, flat(t)));
        }
    }
    for (name, v) in [("x0", &x0), ("context", &ctx)] {
        if let Some(t) = grads.get(v.as_tensor()) {
            g.push((name.to_string(), flat(t)));
        }
    }
    (values, g)
}

fn rel(a: &[f64], b: &[f64]) -> f64 {
    let diff: f64 = a.iter().zip(b).map(|(x, y)| (x - y).powi(2)).sum();
    let norm: f64 = b.iter().map(|y| y * y).sum();
    (diff / norm.max(1e-300)).sqrt()
}

fn compare(case: Case, tol: f64) {
    let (v_fast, g_fast) = run(&case, true);
    let (v_gen, g_gen) = run(&case, false);
    assert_eq!(v_fast.len(), v_gen.len());
    let r = rel(&v_fast, &v_gen);
    assert!(r < tol, "values differ: relative {r:e}");
    let names = |g: &[(String, Vec<f64>)]| g.iter().map(|x| x.0.clone()).collect::<Vec<_>>();
    assert_eq!(
        names(&g_fast),
        names(&g_gen),
        "different parameters got gradients"
    );
    assert!(!g_gen.is_empty());
    for ((name, a), (_, b)) in g_fast.iter().zip(&g_gen) {
        let r = rel(a, b);
        assert!(r < tol, "{name}: gradients differ, relative {r:e}");
    }
    // The kernel rounds differently from the generic ops (another order of operations in the
    // update and the sums), so bit-identical results would mean it did not run at all.
    let bits = |v: &[f64], g: &[(String, Vec<f64>)]| -> Vec<u64> {
        v.iter()
            .chain(g.iter().flat_map(|x| &x.1))
            .map(|x| x.to_bits())
            .collect()
    };
    assert_ne!(
        bits(&v_fast, &g_fast),
        bits(&v_gen, &g_gen),
        "the fused kernel was not used"
    );
}

fn base(dtype: DType) -> Case {
    Case {
        dtype,
        // 300 rows: two full blocks of the kernel and a partial one.
        batch: 300,
        d: 3,
        c: 2,
        depth: 2,
        act: Activation::Silu,
        prior: true,
        control: true,
        sigma: vec![0.7, 1.0, 1.3],
        n_steps: 12,
    }
}

#[test]
fn latent_shape_f64_matches_generic_autodiff() {
    compare(base(DType::F64), 1e-10);
}

#[test]
fn latent_shape_f32_matches_generic_autodiff() {
    compare(base(DType::F32), 1e-5);
}

#[test]
fn control_only_tanh_deep_matches() {
    compare(
        Case {
            prior: false,
            c: 0,
            depth: 3,
            act: Activation::Tanh,
            ..base(DType::F64)
        },
        1e-10,
    );
    compare(
        Case {
            prior: false,
            c: 0,
            depth: 3,
            act: Activation::Tanh,
            ..base(DType::F32)
        },
        1e-5,
    );
}

#[test]
fn prior_only_relu_single_layer_matches() {
    compare(
        Case {
            control: false,
            depth: 1,
            act: Activation::Relu,
            sigma: vec![1.0; 3],
            ..base(DType::F64)
        },
        1e-10,
    );
}

/// The tabular model's free energy (prior network, control network plus the decoder-score
/// feedback term, full-covariance Gaussian observation) and its gradient for every parameter.
fn latent_model_run(precision: Precision, fused: bool) -> (f64, Vec<(String, Vec<f64>)>) {
    let (rows, d) = (200, 3);
    let cfg = LatentConfig {
        prior: MlpConfig {
            width: 16,
            zero_output: false,
            ..Default::default()
        },
        control: MlpConfig {
            width: 16,
            activation: Activation::Tanh,
            zero_output: false,
            ..Default::default()
        },
        solver: SolverConfig {
            n_steps: 10,
            kernel: if fused {
                Kernel::Fused
            } else {
                Kernel::Generic
            },
            ..Default::default()
        },
        sigma: 0.9,
        precision,
        ..Default::default()
    };
    let model = LatentModel::new(&cfg, d, 4).unwrap();
    // Correlated rows so the fitted decoder, precision factor and gains are all non-trivial.
    let z = standard_normals(&mut generator(4, 7), rows * d);
    let data: Vec<f64> = z
        .chunks_exact(d)
        .flat_map(|r| [r[0], 0.6 * r[0] + 0.8 * r[1], r[2] - 0.3 * r[1]])
        .collect();
    model.init_from_data(&data).unwrap();
    let dev = Device::Cpu;
    let y = Tensor::from_vec(data, (rows, d), &dev)
        .unwrap()
        .to_dtype(model.dtype())
        .unwrap();
    let fe = model.free_energy(&y, &mut generator(4, 8)).unwrap();
    let loss = fe
        .loss
        .to_dtype(DType::F64)
        .unwrap()
        .to_scalar::<f64>()
        .unwrap();
    let grads = fe.loss.backward().unwrap();
    let mut g = Vec::new();
    for (name, v) in sorted_vars(model.varmap()).unwrap() {
        if let Some(t) = grads.get(v.as_tensor()) {
            let t = t.flatten_all().unwrap().to_dtype(DType::F64).unwrap();
            g.push((name, t.to_vec1().unwrap()));
        }
    }
    (loss, g)
}

#[test]
fn tabular_model_with_score_feedback_matches_generic_autodiff() {
    for (precision, tol) in [(Precision::F64, 1e-10), (Precision::F32, 1e-5)] {
        let (l_fast, g_fast) = latent_model_run(precision, true);
        let (l_gen, g_gen) = latent_model_run(precision, false);
        assert!(
            ((l_fast - l_gen) / l_gen).abs() < tol,
            "{precision:?}: loss {l_fast} vs {l_gen}"
        );
        let names: Vec<_> = g_gen.iter().map(|x| x.0.clone()).collect();
        assert_eq!(
            g_fast.iter().map(|x| x.0.clone()).collect::<Vec<_>>(),
            names
        );
        // The gains, decoder and precision factor reach the loss through the feedback term.
        for must in [
            "control.score_gain_a",
            "control.score_gain_b",
            "decoder.linear.weight",
        ] {
            assert!(
                names.iter().any(|n| n == must),
                "no gradient for {must}: {names:?}"
            );
        }
        for ((name, a), (_, b)) in g_fast.iter().zip(&g_gen) {
            let r = rel(a, b);
            assert!(
                r < tol,
                "{precision:?} {name}: gradients differ, relative {r:e}"
            );
        }
        // Other rounding: identical bits would mean the fused kernel did not run.
        let bits = |g: &[(String, Vec<f64>)]| -> Vec<u64> {
            g.iter().flat_map(|x| &x.1).map(|x| x.to_bits()).collect()
        };
        assert_ne!(
            bits(&g_fast),
            bits(&g_gen),
            "{precision:?}: fused kernel not used"
        );
    }
}

#[test]
fn fused_results_do_not_depend_on_the_thread_count() {
    // Blocks of rows run in parallel and their gradients are summed in block order, so the
    // values and gradients are bit-identical on any number of threads (common practice for
    // reproducible parallel reductions, no source).
    let case = || Case {
        n_steps: 6,
        ..base(DType::F32)
    };
    let on = |threads: usize| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| run(&case(), true))
    };
    let bits = |r: (Vec<f64>, Vec<(String, Vec<f64>)>)| -> Vec<u64> {
        let mut v: Vec<u64> = r.0.iter().map(|x| x.to_bits()).collect();
        for (_, g) in r.1 {
            v.extend(g.iter().map(|x| x.to_bits()));
        }
        v
    };
    let one = bits(on(1));
    assert_eq!(one, bits(on(3)));
    assert!(one.len() > 300 * 3);
}
