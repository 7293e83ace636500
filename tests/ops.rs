//! The fast kernels against candle's own ops (a general-purpose reference library): values
//! and gradients.
use candle_core::{DType, Device, Tensor, Var};
use neural_sde::ops::{bias_add, linear};
use neural_sde::{generator, standard_normals, Activation};

fn reference(a: Activation, x: &Tensor) -> Tensor {
    match a {
        Activation::Tanh => x.tanh().unwrap(),
        Activation::Silu => x.silu().unwrap(),
        Activation::Relu => x.relu().unwrap(),
    }
}

fn max_abs_diff(a: &Tensor, b: &Tensor) -> f64 {
    (a - b)
        .unwrap()
        .abs()
        .unwrap()
        .flatten_all()
        .unwrap()
        .max(0)
        .unwrap()
        .to_dtype(DType::F64)
        .unwrap()
        .to_scalar::<f64>()
        .unwrap()
}

#[test]
fn activations_and_gradients_match_candle() {
    let dev = Device::Cpu;
    let v: Vec<f64> = standard_normals(&mut generator(1, 0), 64 * 33)
        .iter()
        .map(|z| 4.0 * z)
        .collect();
    for (dtype, tol) in [(DType::F64, 1e-14), (DType::F32, 2e-6)] {
        for a in [Activation::Tanh, Activation::Silu, Activation::Relu] {
            let x = Var::from_tensor(
                &Tensor::from_vec(v.clone(), (64, 33), &dev)
                    .unwrap()
                    .to_dtype(dtype)
                    .unwrap(),
            )
            .unwrap();
            let w = Tensor::from_vec(
                standard_normals(&mut generator(2, 0), 64 * 33),
                (64, 33),
                &dev,
            )
            .unwrap()
            .to_dtype(dtype)
            .unwrap();
            let fast = a.apply(x.as_tensor()).unwrap();
            let slow = reference(a, x.as_tensor());
            assert!(max_abs_diff(&fast, &slow) < tol, "{a:?} {dtype:?} value");
            let gf = (fast * &w).unwrap().sum_all().unwrap().backward().unwrap();
            let gs = (slow * &w).unwrap().sum_all().unwrap().backward().unwrap();
            let d = max_abs_diff(
                gf.get(x.as_tensor()).unwrap(),
                gs.get(x.as_tensor()).unwrap(),
            );
            assert!(d < 10.0 * tol, "{a:?} {dtype:?} gradient differs by {d}");
        }
    }
}

#[test]
fn dense_layer_gradients_match_candle() {
    let dev = Device::Cpu;
    let mut rng = generator(3, 0);
    let mut t = |r, c| {
        Var::from_tensor(
            &Tensor::from_vec(standard_normals(&mut rng, r * c), (r, c), &dev).unwrap(),
        )
        .unwrap()
    };
    let x = t(17, 5);
    let w = t(9, 5);
    let b = Var::from_tensor(
        &Tensor::from_vec(standard_normals(&mut generator(4, 0), 9), 9, &dev).unwrap(),
    )
    .unwrap();
    let g = Tensor::from_vec(
        standard_normals(&mut generator(5, 0), 17 * 9),
        (17, 9),
        &dev,
    )
    .unwrap();
    let fast = linear(x.as_tensor(), w.as_tensor(), Some(b.as_tensor())).unwrap();
    let slow = candle_nn::Linear::new(w.as_tensor().clone(), Some(b.as_tensor().clone()));
    let slow = candle_core::Module::forward(&slow, x.as_tensor()).unwrap();
    assert!(max_abs_diff(&fast, &slow) < 1e-13);
    let gf = (fast * &g).unwrap().sum_all().unwrap().backward().unwrap();
    let gs = (slow * &g).unwrap().sum_all().unwrap().backward().unwrap();
    for v in [&x, &w, &b] {
        assert!(
            max_abs_diff(
                gf.get(v.as_tensor()).unwrap(),
                gs.get(v.as_tensor()).unwrap()
            ) < 1e-12
        );
    }
    // bias_add rejects mismatched shapes with a message naming both shapes.
    let err = bias_add(x.as_tensor(), b.as_tensor())
        .unwrap_err()
        .to_string();
    assert!(err.contains("[17, 5]") && err.contains("[9]"), "{err}");
}

#[test]
fn fused_bias_activation_matches_generic_ops() {
    // The fused fast path must give the generic autodiff path's values and gradients
    // (within 1e-5 relative in f32; to rounding in f64).
    use neural_sde::ops::bias_act;
    let dev = Device::Cpu;
    for (dtype, tol) in [(DType::F64, 1e-12), (DType::F32, 1e-5)] {
        for a in [Activation::Tanh, Activation::Silu, Activation::Relu] {
            let mk = |seed, r, c| {
                Var::from_tensor(
                    &Tensor::from_vec(
                        standard_normals(&mut generator(seed, 0), r * c),
                        (r, c),
                        &dev,
                    )
                    .unwrap()
                    .affine(2.0, 0.0)
                    .unwrap()
                    .to_dtype(dtype)
                    .unwrap(),
                )
                .unwrap()
            };
            let x = mk(11, 37, 19);
            let b = Var::from_tensor(&mk(12, 1, 19).as_tensor().reshape(19).unwrap()).unwrap();
            let g = mk(13, 37, 19);
            let fused = bias_act(x.as_tensor(), b.as_tensor(), a).unwrap();
            let generic = reference(a, &x.as_tensor().broadcast_add(b.as_tensor()).unwrap());
            let scale = |t: &Tensor| max_abs_diff(t, &t.zeros_like().unwrap()).max(1.0);
            assert!(
                max_abs_diff(&fused, &generic) <= tol * scale(&generic),
                "{a:?} {dtype:?} value"
            );
            let gf = (fused * g.as_tensor())
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            let gg = (generic * g.as_tensor())
                .unwrap()
                .sum_all()
                .unwrap()
                .backward()
                .unwrap();
            for v in [&x, &b] {
                let (f, r) = (
                    gf.get(v.as_tensor()).unwrap(),
                    gg.get(v.as_tensor()).unwrap(),
                );
                assert!(
                    max_abs_diff(f, r) <= tol * scale(r),
                    "{a:?} {dtype:?} gradient differs by {}",
                    max_abs_diff(f, r)
                );
            }
        }
    }
}
