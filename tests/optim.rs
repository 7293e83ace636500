//! AdamW against candle-nn's implementation (a general-purpose reference library), and the
//! state it keeps.
use candle_core::{DType, Device, Tensor, Var};
use candle_nn::{Optimizer, ParamsAdamW, VarMap};
use neural_sde::{generator, standard_normals, AdamW, AdamWConfig};

#[test]
fn matches_candle_adamw() {
    let dev = Device::Cpu;
    let init = standard_normals(&mut generator(1, 0), 12);
    let vm = VarMap::new();
    let ours_var =
        Var::from_tensor(&Tensor::from_vec(init.clone(), (3, 4), &dev).unwrap()).unwrap();
    vm.data()
        .lock()
        .unwrap()
        .insert("w".into(), ours_var.clone());
    let theirs_var = Var::from_tensor(&Tensor::from_vec(init, (3, 4), &dev).unwrap()).unwrap();
    let cfg = AdamWConfig {
        learning_rate: 0.05,
        weight_decay: 0.1,
        ..Default::default()
    };
    let mut ours = AdamW::new(&vm, cfg.clone()).unwrap();
    let mut theirs = candle_nn::AdamW::new(
        vec![theirs_var.clone()],
        ParamsAdamW {
            lr: cfg.learning_rate,
            beta1: cfg.beta1,
            beta2: cfg.beta2,
            eps: cfg.eps,
            weight_decay: cfg.weight_decay,
        },
    )
    .unwrap();
    let target =
        Tensor::from_vec(standard_normals(&mut generator(2, 0), 12), (3, 4), &dev).unwrap();
    for _ in 0..25 {
        let l1 = (ours_var.as_tensor() - &target)
            .unwrap()
            .sqr()
            .unwrap()
            .sum_all()
            .unwrap();
        ours.step(&l1.backward().unwrap(), None).unwrap();
        let l2 = (theirs_var.as_tensor() - &target)
            .unwrap()
            .sqr()
            .unwrap()
            .sum_all()
            .unwrap();
        theirs.backward_step(&l2).unwrap();
    }
    let a = ours_var
        .as_tensor()
        .flatten_all()
        .unwrap()
        .to_vec1::<f64>()
        .unwrap();
    let b = theirs_var
        .as_tensor()
        .flatten_all()
        .unwrap()
        .to_vec1::<f64>()
        .unwrap();
    for (x, y) in a.iter().zip(&b) {
        assert!((x - y).abs() < 1e-12, "{x} vs {y}");
    }
}

#[test]
fn moments_hold_no_autodiff_graph_and_clipping_scales() {
    // A weight gradient hᵀg computed by candle still references the forward graph; the
    // optimiser must not keep it alive (this leaked every step's graph before).
    let dev = Device::Cpu;
    let vm = VarMap::new();
    let w = Var::from_tensor(&Tensor::ones((4, 3), DType::F64, &dev).unwrap()).unwrap();
    vm.data().lock().unwrap().insert("w".into(), w.clone());
    let x = Var::from_tensor(&Tensor::ones((5, 4), DType::F64, &dev).unwrap()).unwrap();
    let h = x.as_tensor().exp().unwrap();
    let loss = h
        .matmul(w.as_tensor())
        .unwrap()
        .sqr()
        .unwrap()
        .sum_all()
        .unwrap();
    let grads = loss.backward().unwrap();
    let mut opt = AdamW::new(&vm, AdamWConfig::default()).unwrap();
    let stats = opt.step(&grads, Some(1.0)).unwrap();
    assert!(stats.clipped && stats.grad_norm > 1.0);
    for (name, t) in opt.state_tensors() {
        assert!(!t.track_op(), "moment {name} keeps an autodiff graph");
    }
}
