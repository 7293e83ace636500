//! Hostile checkpoint headers: a seeded fuzzer replaces header values with out-of-range,
//! absurd or mistyped ones. Loading, resuming, inspecting, evaluating and generating must
//! return errors (or work), never panic or abort, and memory must stay bounded.
use std::path::{Path, PathBuf};

use neural_sde::*;
use rand::Rng;
use serde_json::Value;

/// Mutations per test: 300 by default (the suite), more with `NEURAL_SDE_FUZZ_MUTATIONS=N`.
fn mutations(default: usize) -> usize {
    std::env::var("NEURAL_SDE_FUZZ_MUTATIONS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn table() -> Table {
    // Demo rows (a fixture, not a check value).
    let z = standard_normals(&mut generator(5, 0), 120 * 3);
    let rows = z
        .chunks_exact(3)
        .map(|e| vec![e[0], e[0] * 0.5 + e[1], e[2] - e[0]])
        .collect();
    Table::new(vec!["a".into(), "b".into(), "c".into()], rows).unwrap()
}

fn dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("neural-sde-fuzz-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Every path to a leaf (number, string, bool, null) of `v`.
fn leaves(v: &Value, at: &mut Vec<String>, out: &mut Vec<Vec<String>>) {
    match v {
        Value::Object(m) => {
            for (k, x) in m {
                at.push(k.clone());
                leaves(x, at, out);
                at.pop();
            }
        }
        Value::Array(a) => {
            // A few elements of long arrays are enough.
            for (i, x) in a.iter().enumerate().take(3) {
                at.push(i.to_string());
                leaves(x, at, out);
                at.pop();
            }
        }
        _ => out.push(at.clone()),
    }
}

fn slot<'a>(v: &'a mut Value, path: &[String]) -> &'a mut Value {
    path.iter().fold(v, |v, k| match v {
        Value::Array(a) => &mut a[k.parse::<usize>().unwrap()],
        _ => &mut v[k.as_str()],
    })
}

fn hostile(rng: &mut impl Rng) -> Value {
    let big = [
        0.0,
        -1.0,
        1.0,
        2f64.powi(31),
        2f64.powi(32),
        2f64.powi(53),
        1e18,
        1e300,
        -1e300,
        0.5,
        1e-320,
    ];
    match rng.random_range(0..8) {
        0 => Value::from(u64::MAX),
        1 => Value::from(1u64 << 31),
        2 => Value::from(big[rng.random_range(0..big.len())]),
        3 => Value::Null,
        4 => Value::from("x".repeat(rng.random_range(0..3000))),
        5 => Value::Bool(true),
        6 => Value::from(-(rng.random_range(1..1000) as i64)),
        _ => Value::from(rng.random_range(0..1_000_000u64)),
    }
}

fn rewrite(src: &Path, dst: &Path, header: &Value) {
    let bytes = std::fs::read(src).unwrap();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let mut meta = md.metadata().clone().unwrap();
    let mut c: Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
    c["header"] = header.clone();
    meta.insert("neural-sde".into(), c.to_string());
    let tensors: Vec<(String, candle_core::Tensor)> =
        candle_core::safetensors::load_buffer(&bytes, &candle_core::Device::Cpu)
            .unwrap()
            .into_iter()
            .collect();
    safetensors::tensor::serialize_to_file(tensors, Some(meta), dst).unwrap();
}

/// Peak resident memory of this process, in MiB (Linux).
fn peak_rss_mib() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<f64>().ok())
        })
        .map_or(0.0, |kb| kb / 1024.0)
}

/// Everything a user can do with a checkpoint; errors are fine, panics are not.
fn exercise(p: &Path, t: &Table) {
    let _ = inspect_checkpoint(p);
    if let Ok(m) = TabularModel::load(p) {
        let _ = m.evaluate(t, EvalOptions::new(2, 0));
        let _ = m.generate(3, 0);
    }
    if let Ok(mut tr) = Trainer::resume(p, t) {
        let _ = tr.step();
    }
}

#[test]
fn hostile_header_values_are_errors_not_crashes() {
    let t = table();
    let model_cfg = LatentConfig {
        solver: SolverConfig {
            n_steps: 4,
            ..Default::default()
        },
        prior: MlpConfig {
            width: 8,
            ..Default::default()
        },
        control: MlpConfig {
            width: 8,
            ..Default::default()
        },
        ..Default::default()
    };
    let train = TrainConfig {
        epochs: 1,
        min_steps_per_epoch: 1,
        batch_size: 16,
        validation_paths: 2,
        ..Default::default()
    };
    let mut tr = Trainer::new(&t, model_cfg, train).unwrap();
    tr.fit().unwrap();
    let d = dir("model");
    let good = d.join("good.safetensors");
    tr.save(&good).unwrap();
    let bytes = std::fs::read(&good).unwrap();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let meta = md.metadata().clone().unwrap();
    let container: Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
    let header = container["header"].clone();
    let mut paths = Vec::new();
    leaves(&header, &mut Vec::new(), &mut paths);
    assert!(paths.len() > 50, "{} leaves", paths.len());
    // The fields that size allocations, mutated more often than the rest.
    let sizes: Vec<Vec<String>> = paths
        .iter()
        .filter(|p| {
            let last = p.last().map(String::as_str).unwrap_or("");
            [
                "width",
                "depth",
                "latent_dim",
                "n_steps",
                "data_dim",
                "batch_size",
                "validation_paths",
                "epochs",
                "min_steps_per_epoch",
                "planned_steps",
                "scale",
                "mean",
                "lr_scale",
                "t_end",
                "sigma",
            ]
            .contains(&last)
                || p.iter().any(|k| k == "scale" || k == "mean")
        })
        .cloned()
        .collect();
    assert!(sizes.len() >= 10, "{sizes:?}");
    let mut rng = generator(2026, 12);
    let bad = d.join("bad.safetensors");
    let mut accepted = 0;
    let runs = mutations(300);
    for i in 0..runs {
        let mut h = header.clone();
        let n = 1 + rng.random_range(0..3);
        for _ in 0..n {
            let pool = if rng.random_bool(0.6) { &sizes } else { &paths };
            let p = &pool[rng.random_range(0..pool.len())];
            *slot(&mut h, p) = hostile(&mut rng);
        }
        rewrite(&good, &bad, &h);
        let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| exercise(&bad, &t)));
        assert!(outcome.is_ok(), "mutation {i} panicked: {h}");
        if TabularModel::load(&bad).is_ok() {
            accepted += 1;
        }
    }
    // Most mutations must be refused; the rest (harmless values) load.
    assert!(accepted < runs, "no mutation was refused");
    let peak = peak_rss_mib();
    assert!(peak < 4096.0, "peak memory {peak:.0} MiB");
}

#[test]
fn hostile_sampler_headers_are_errors_not_crashes() {
    let target: std::sync::Arc<dyn LogDensity> =
        std::sync::Arc::new(GaussianMixture::new(vec![vec![0.5, 0.0]], 1.0).unwrap());
    let cfg = SamplerConfig {
        batch_size: 8,
        iterations: 2,
        control: MlpConfig {
            width: 8,
            ..Default::default()
        },
        solver: SolverConfig {
            n_steps: 4,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut s = Sampler::new(target.clone(), cfg).unwrap();
    s.fit().unwrap();
    let d = dir("sampler");
    let good = d.join("good.safetensors");
    s.save(&good).unwrap();
    let bytes = std::fs::read(&good).unwrap();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let c: Value = serde_json::from_str(&md.metadata().clone().unwrap()["neural-sde"]).unwrap();
    let header = c["header"].clone();
    let mut paths = Vec::new();
    leaves(&header, &mut Vec::new(), &mut paths);
    let mut rng = generator(2026, 13);
    let bad = d.join("bad.safetensors");
    for i in 0..mutations(300) / 2 {
        let mut h = header.clone();
        let p = &paths[rng.random_range(0..paths.len())];
        *slot(&mut h, p) = hostile(&mut rng);
        rewrite(&good, &bad, &h);
        let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            if let Ok(mut s) = Sampler::load(&bad, target.clone()) {
                let _ = s.step();
                let _ = s.estimate(EstimateOptions::new(4, 0));
            }
        }));
        assert!(outcome.is_ok(), "mutation {i} panicked: {h}");
    }
    let peak = peak_rss_mib();
    assert!(peak < 4096.0, "peak memory {peak:.0} MiB");
}

#[test]
fn every_built_in_configuration_loads_back() {
    // The parameter count checked before building must match what is built, for each
    // decoder kind, latent dimension and depth.
    let t = table();
    let d = dir("configs");
    for (kind, latent, depth) in [
        (DecoderKind::Linear, None, 1),
        (DecoderKind::Mlp, Some(2), 3),
        (DecoderKind::Mlp, Some(5), 1),
        (DecoderKind::Linear, Some(4), 2),
    ] {
        let mut m = LatentConfig {
            latent_dim: latent,
            prior: MlpConfig {
                width: 6,
                depth,
                ..Default::default()
            },
            ..Default::default()
        };
        m.decoder.kind = kind;
        m.solver.n_steps = 3;
        let c = TrainConfig {
            epochs: 1,
            min_steps_per_epoch: 1,
            batch_size: 16,
            ..Default::default()
        };
        let tr = Trainer::new(&t, m, c).unwrap();
        let p = d.join(format!("cfg-{kind:?}-{latent:?}-{depth}.safetensors"));
        tr.save(&p).unwrap();
        TabularModel::load(&p).unwrap();
        Trainer::resume(&p, &t).unwrap();
    }
}
