//! Training-step benchmark on the two reference workloads (see DEVELOPERS.md):
//!
//! * `latent`: y ∈ R^D, z ∈ R^D, z_0 = 0; prior drift b([z,t]) D+1→H→H→D, control
//!   u([z,t,y]) 2D+1→H→H→D (SiLU), decoder Linear(D→D) with a learned log-scale per
//!   dimension; loss ½ h Σ_k |u_k|² − log N(y; dec(z_N), diag s²).
//! * `sampler`: control u([x,t]) D+1→H→H→D; loss ½ h Σ_k |u_k|² + log N(x_N; 0, I) −
//!   log π(x_N), π the equal mixture of N(±2e₁, I), N(±2e₂, I).
//!
//! One step = draw noise, simulate, loss, backward, one AdamW step (lr 1e-3), all through the
//! public API. Prints one JSON line per workload.
//!
//! `cargo bench --bench train_step -- [--workload latent|sampler] [--dim 8] [--hidden 64]
//! [--batch 256] [--steps 50] [--iters 20] [--threads 1]`

use std::sync::Arc;
use std::time::Instant;

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;
use neural_sde::*;

#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

struct Args {
    workload: Option<String>,
    dim: usize,
    hidden: usize,
    batch: usize,
    steps: usize,
    iters: usize,
    threads: usize,
}

fn parse() -> Args {
    let mut a = Args {
        workload: None,
        dim: 8,
        hidden: 64,
        batch: 256,
        steps: 50,
        iters: 20,
        threads: 1,
    };
    let argv: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < argv.len() {
        let val = || argv.get(i + 1).cloned().unwrap_or_default();
        let num = |s: String| -> usize {
            s.parse()
                .unwrap_or_else(|_| panic!("{} needs a whole number", argv[i]))
        };
        match argv[i].as_str() {
            "--bench" => {
                i += 1;
                continue;
            }
            "--workload" => a.workload = Some(val()),
            "--dim" => a.dim = num(val()),
            "--hidden" => a.hidden = num(val()),
            "--batch" => a.batch = num(val()),
            "--steps" => a.steps = num(val()),
            "--iters" => a.iters = num(val()),
            "--threads" => a.threads = num(val()),
            other => panic!("unknown flag {other}"),
        }
        i += 2;
    }
    a
}

fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .map(str::to_string)
        })
        .and_then(|l| {
            l.split_whitespace()
                .nth(1)
                .and_then(|v| v.parse::<f64>().ok())
        })
        .map(|kb| kb / 1024.0)
        .unwrap_or(f64::NAN)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    v[v.len() / 2]
}

fn mlp(h: usize) -> MlpConfig {
    MlpConfig {
        width: h,
        depth: 2,
        activation: Activation::Silu,
        zero_output: false,
    }
}

/// Floating-point operations of the MLP matrix products in one training step
/// (forward 2·B·Σ in·out per layer and call; backward twice that).
fn flops(a: &Args, nets: &[(usize, usize)]) -> f64 {
    let (b, h, d) = (a.batch as f64, a.hidden as f64, a.dim as f64);
    let per_call: f64 = nets
        .iter()
        .map(|&(inp, _)| 2.0 * b * (inp as f64 * h + h * h + h * d))
        .sum();
    3.0 * per_call * a.steps as f64
}

/// Bytes of activations backpropagation keeps per solver step (inputs, pre- and
/// post-activations and outputs of each network, plus the state and noise), f32.
fn activation_bytes_per_step(a: &Args, nets: &[(usize, usize)]) -> f64 {
    let (b, h, d) = (a.batch as f64, a.hidden as f64, a.dim as f64);
    let per_net: f64 = nets
        .iter()
        .map(|&(inp, _)| b * (inp as f64 + 4.0 * h + d))
        .sum();
    4.0 * (per_net + 4.0 * b * d)
}

fn latent(a: &Args) -> Result<(Vec<f64>, f64)> {
    let dev = Device::Cpu;
    let d = a.dim;
    let vm = VarMap::new();
    let pb = ParamBuilder::new(&vm, DType::F32, &dev);
    let mut rng = generator(0, 1);
    let prior = TimeMlp::new(&mlp(a.hidden), d, 0, &pb.pp("prior"), &mut rng)?;
    let control = TimeMlp::new(&mlp(a.hidden), d, d, &pb.pp("control"), &mut rng)?;
    let decoder = Arc::new(Decoder::new(
        &DecoderConfig::default(),
        d,
        d,
        &pb.pp("decoder"),
        &mut rng,
    )?);
    let nll = GaussianNll::learned(&pb.pp("decoder"), &vec![1.0; d])?.with_mean_map(decoder);
    let sigma = Diffusion::constant(1.0)?;
    let cfg = SolverConfig {
        n_steps: a.steps,
        ..Default::default()
    };
    let mut opt = AdamW::new(
        &vm,
        AdamWConfig {
            learning_rate: 1e-3,
            ..Default::default()
        },
    )?;
    let y = Tensor::from_vec(standard_normals(&mut rng, a.batch * d), (a.batch, d), &dev)?
        .to_dtype(DType::F32)?;
    let mut noise_rng = generator(0, 2);
    let mut times = Vec::new();
    let mut last = 0.0;
    for i in 0..a.iters + 3 {
        let t0 = Instant::now();
        let noise = cfg.sample_noise(&mut noise_rng, a.batch, d, DType::F32, &dev)?;
        let sde = Sde::new(&sigma).with_prior(&prior).with_control(&control);
        last = run_deep(|| -> Result<f64> {
            let x0 = Tensor::zeros((a.batch, d), DType::F32, &dev)?;
            let p = simulate(&sde, &cfg, &x0, &noise, Some(&y))?;
            let fe = FreeEnergy::new(&p, &nll, Some(&y))?;
            let v = fe.values()?.loss;
            opt.step(&fe.loss.backward()?, None)?;
            Ok(v)
        })??;
        if i >= 3 {
            times.push(t0.elapsed().as_secs_f64() * 1e3);
        }
    }
    Ok((times, last))
}

fn sampler(a: &Args) -> Result<(Vec<f64>, f64)> {
    let d = a.dim;
    let mut centers = vec![vec![0.0; d]; 4];
    centers[0][0] = 2.0;
    centers[1][0] = -2.0;
    centers[2][1.min(d - 1)] = 2.0;
    centers[3][1.min(d - 1)] = -2.0;
    let target = Arc::new(GaussianMixture::new(centers, 1.0)?);
    let cfg = SamplerConfig {
        solver: SolverConfig {
            n_steps: a.steps,
            ..Default::default()
        },
        control: mlp(a.hidden),
        batch_size: a.batch,
        optimizer: OptimizerConfig {
            max_grad_norm: None,
            ..OptimizerConfig::constant(1e-3)
        },
        iterations: a.iters + 3,
        ..Default::default()
    };
    let mut s = Sampler::new(target, cfg)?;
    let mut times = Vec::new();
    let mut last = 0.0;
    for i in 0..a.iters + 3 {
        let t0 = Instant::now();
        last = s.step()?.loss;
        if i >= 3 {
            times.push(t0.elapsed().as_secs_f64() * 1e3);
        }
    }
    Ok((times, last))
}

/// Single-precision matrix-multiply rate of this machine through candle (GFLOP/s), on a
/// [1024, 1024] × [1024, 1024] product, best of 10.
fn sgemm_gflops() -> f64 {
    let dev = Device::Cpu;
    let n = 1024;
    let a = Tensor::ones((n, n), DType::F32, &dev).unwrap();
    let mut best = f64::INFINITY;
    for _ in 0..10 {
        let t0 = Instant::now();
        let c = a.matmul(&a).unwrap();
        let _ = c.sum_all().unwrap().to_scalar::<f32>().unwrap();
        best = best.min(t0.elapsed().as_secs_f64());
    }
    2.0 * (n as f64).powi(3) / best / 1e9
}

fn main() {
    let a = parse();
    std::env::set_var("RAYON_NUM_THREADS", a.threads.to_string());
    let workloads: Vec<String> = match &a.workload {
        Some(w) => vec![w.clone()],
        None => vec!["latent".into(), "sampler".into()],
    };
    let peak_gemm = sgemm_gflops();
    for w in workloads {
        let (d, h) = (a.dim, a.hidden);
        let (result, nets) = match w.as_str() {
            "latent" => (latent(&a), vec![(d + 1, h), (2 * d + 1, h)]),
            "sampler" => (sampler(&a), vec![(d + 1, h)]),
            other => panic!("unknown workload {other} (use latent or sampler)"),
        };
        let (times, loss) = result.unwrap_or_else(|e| panic!("{w}: {e}"));
        let ms = median(times);
        let gflops = flops(&a, &nets) / (ms / 1e3) / 1e9;
        println!(
            "{}",
            serde_json::json!({
                "impl": "neural-sde",
                "workload": w,
                "dim": a.dim,
                "hidden": a.hidden,
                "batch": a.batch,
                "steps": a.steps,
                "threads": a.threads,
                "ms_per_step_median": ms,
                "peak_rss_mb": peak_rss_mb(),
                "activation_mb_per_solver_step": activation_bytes_per_step(&a, &nets) / 1048576.0,
                "matmul_gflops_achieved": gflops,
                "sgemm_gflops_peak": peak_gemm,
                "loss": loss,
            })
        );
    }
}
