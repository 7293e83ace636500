//! The batched tensor solver against a plain scalar f64 loop on the same noise, step by step
#![allow(clippy::needless_range_loop)] // index loops mirror the textbook formulas
//! (common practice, no source: an independent re-implementation of the documented formulas,
//! the EM and SRA1 steps and the control-cost and Girsanov sums).
mod common;

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;
use common::*;
use neural_sde::*;

/// A scalar re-implementation of `TimeMlp` from its documented parameter layout.
struct ScalarMlp {
    layers: Vec<(Vec<Vec<f64>>, Vec<f64>)>,
    weight_t: Vec<f64>,
    weight_c: Option<Vec<Vec<f64>>>,
    act: Activation,
}

fn get2(vm: &VarMap, name: &str) -> Vec<Vec<f64>> {
    let map = vm.data().lock().unwrap();
    map[name].as_tensor().to_vec2::<f64>().unwrap()
}

fn get1(vm: &VarMap, name: &str) -> Vec<f64> {
    let map = vm.data().lock().unwrap();
    map[name].as_tensor().to_vec1::<f64>().unwrap()
}

impl ScalarMlp {
    fn load(vm: &VarMap, prefix: &str, depth: usize, act: Activation, context: bool) -> Self {
        let mut layers = Vec::new();
        for i in 0..depth {
            layers.push((
                get2(vm, &format!("{prefix}.layer{i}.weight")),
                get1(vm, &format!("{prefix}.layer{i}.bias")),
            ));
        }
        layers.push((
            get2(vm, &format!("{prefix}.out.weight")),
            get1(vm, &format!("{prefix}.out.bias")),
        ));
        Self {
            layers,
            weight_t: get1(vm, &format!("{prefix}.layer0.weight_t")),
            weight_c: context.then(|| get2(vm, &format!("{prefix}.layer0.weight_c"))),
            act,
        }
    }

    fn eval(&self, x: &[f64], t: f64, c: Option<&[f64]>) -> Vec<f64> {
        let mut h = x.to_vec();
        let n = self.layers.len();
        for (li, (w, b)) in self.layers.iter().enumerate() {
            let mut out: Vec<f64> = (0..w.len())
                .map(|i| b[i] + w[i].iter().zip(&h).map(|(a, b)| a * b).sum::<f64>())
                .collect();
            if li == 0 {
                for i in 0..out.len() {
                    out[i] += t * self.weight_t[i];
                    if let (Some(wc), Some(c)) = (&self.weight_c, c) {
                        out[i] += wc[i].iter().zip(c).map(|(a, b)| a * b).sum::<f64>();
                    }
                }
            }
            if li + 1 < n {
                out = out.iter().map(|&v| self.act.eval_f64(v)).collect();
            }
            h = out;
        }
        h
    }
}

#[test]
fn tensor_solver_matches_scalar_loop() {
    let dev = Device::Cpu;
    let (batch, d, n) = (5, 3, 16);
    let vm = VarMap::new();
    let pb = ParamBuilder::new(&vm, DType::F64, &dev);
    let mut rng = generator(2, 1);
    let mcfg = MlpConfig {
        width: 7,
        depth: 3,
        activation: Activation::Tanh,
        zero_output: false,
    };
    let prior = TimeMlp::new(&mcfg, d, 0, &pb.pp("prior"), &mut rng).unwrap();
    let ccfg = MlpConfig {
        activation: Activation::Silu,
        ..mcfg.clone()
    };
    let control = TimeMlp::new(&ccfg, d, 2, &pb.pp("control"), &mut rng).unwrap();
    let sp = ScalarMlp::load(&vm, "prior", 3, Activation::Tanh, false);
    let sc = ScalarMlp::load(&vm, "control", 3, Activation::Silu, true);
    let sig = [0.6, 1.0, 1.7];
    let sigma = Diffusion::per_dim(&sig).unwrap();
    let ctx_rows: Vec<Vec<f64>> = (0..batch)
        .map(|i| vec![i as f64 * 0.3 - 0.5, 1.0 - i as f64 * 0.1])
        .collect();
    let ctx = Tensor::new(ctx_rows.clone(), &dev).unwrap();
    let x0_rows: Vec<Vec<f64>> = (0..batch)
        .map(|i| vec![0.1 * i as f64, -0.2, 0.3])
        .collect();
    let x0 = Tensor::new(x0_rows.clone(), &dev).unwrap();

    for scheme in [Scheme::EulerMaruyama, Scheme::Sra1] {
        let cfg = SolverConfig {
            n_steps: n,
            scheme,
            t_end: 1.5,
            keep_path: true,
            kernel: Kernel::Generic,
        };
        let noise = cfg
            .sample_noise(&mut generator(9, 0), batch, d, DType::F64, &dev)
            .unwrap();
        let sde = Sde::new(&sigma).with_prior(&prior).with_control(&control);
        let p = simulate(&sde, &cfg, &x0, &noise, Some(&ctx)).unwrap();
        let path = p.path.as_ref().unwrap();
        let h = cfg.t_end / n as f64;
        let dw: Vec<Vec<Vec<f64>>> = noise
            .dw()
            .iter()
            .map(|t| t.to_vec2::<f64>().unwrap())
            .collect();
        let dz: Option<Vec<Vec<Vec<f64>>>> = noise
            .dz()
            .map(|z| z.iter().map(|t| t.to_vec2::<f64>().unwrap()).collect());
        let costs = vec1(&p.control_cost);
        let logw = vec1(&p.log_weight);
        for i in 0..batch {
            let mut x = x0_rows[i].clone();
            let c = ctx_rows[i].as_slice();
            let (mut cost, mut stoch) = (0.0, 0.0);
            for k in 0..n {
                let t = k as f64 * h;
                let f = |x: &[f64], t: f64| -> (Vec<f64>, Vec<f64>) {
                    let b = sp.eval(x, t, None);
                    let u = sc.eval(x, t, Some(c));
                    (
                        (0..d).map(|j| b[j] + u[j]).collect(),
                        (0..d).map(|j| u[j] / sig[j]).collect(),
                    )
                };
                let (f1, v1) = f(&x, t);
                match scheme {
                    Scheme::EulerMaruyama => {
                        for j in 0..d {
                            cost += 0.5 * h * v1[j] * v1[j];
                            stoch += v1[j] * dw[k][i][j];
                            x[j] += h * f1[j] + sig[j] * dw[k][i][j];
                        }
                    }
                    Scheme::Sra1 => {
                        let z = &dz.as_ref().unwrap()[k][i];
                        let stage: Vec<f64> = (0..d)
                            .map(|j| x[j] + 0.75 * h * f1[j] + 1.5 * sig[j] * z[j] / h)
                            .collect();
                        let (f2, v2) = f(&stage, t + 0.75 * h);
                        for j in 0..d {
                            cost += 0.5 * h * (v1[j] * v1[j] / 3.0 + 2.0 * v2[j] * v2[j] / 3.0);
                            stoch += v1[j] * dw[k][i][j];
                            x[j] += h * (f1[j] / 3.0 + 2.0 * f2[j] / 3.0) + sig[j] * dw[k][i][j];
                        }
                    }
                }
                let got = path[k + 1].to_vec2::<f64>().unwrap();
                for j in 0..d {
                    assert!(
                        (got[i][j] - x[j]).abs() < 1e-12,
                        "{scheme:?} step {k} path {i} dim {j}: {} vs {}",
                        got[i][j],
                        x[j]
                    );
                }
            }
            assert_rel("control cost", costs[i], cost, 1e-12);
            assert_rel("log weight", logw[i], -stoch - cost, 1e-12);
        }
        if scheme == Scheme::EulerMaruyama {
            // The fused kernel for built-in networks against the same checked values.
            let fused_cfg = SolverConfig {
                keep_path: false,
                kernel: Kernel::Fused,
                ..cfg.clone()
            };
            let q = simulate(&sde, &fused_cfg, &x0, &noise, Some(&ctx)).unwrap();
            let end = path[n].to_vec2::<f64>().unwrap();
            let q_end = q.end.to_vec2::<f64>().unwrap();
            let (q_cost, q_logw) = (vec1(&q.control_cost), vec1(&q.log_weight));
            for i in 0..batch {
                for j in 0..d {
                    assert!((q_end[i][j] - end[i][j]).abs() < 1e-12, "fused end {i} {j}");
                }
                assert_rel("fused control cost", q_cost[i], costs[i], 1e-12);
                assert_rel("fused log weight", q_logw[i], logw[i], 1e-12);
            }
        }
    }
}

#[test]
fn same_seed_same_paths_bit_for_bit() {
    let dev = Device::Cpu;
    let run = || {
        let vm = VarMap::new();
        let pb = ParamBuilder::new(&vm, DType::F32, &dev);
        let u = TimeMlp::new(
            &MlpConfig {
                zero_output: false,
                ..Default::default()
            },
            3,
            0,
            &pb,
            &mut generator(4, 1),
        )
        .unwrap();
        let cfg = SolverConfig::default();
        let noise = cfg
            .sample_noise(&mut generator(4, 2), 8, 3, DType::F32, &dev)
            .unwrap();
        let sigma = Diffusion::constant(1.0).unwrap();
        let x0 = Tensor::zeros((8, 3), DType::F32, &dev).unwrap();
        let p = simulate(&Sde::new(&sigma).with_control(&u), &cfg, &x0, &noise, None).unwrap();
        (
            p.end.to_vec2::<f32>().unwrap(),
            p.log_weight.to_vec1::<f32>().unwrap(),
        )
    };
    let (a, b) = (run(), run());
    assert_eq!(
        a.0.iter()
            .flatten()
            .map(|v| v.to_bits())
            .collect::<Vec<_>>(),
        b.0.iter()
            .flatten()
            .map(|v| v.to_bits())
            .collect::<Vec<_>>()
    );
    assert_eq!(
        a.1.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
        b.1.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
    );
}
