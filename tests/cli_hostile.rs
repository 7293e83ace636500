//! Absurd values, odd tables and broken files on the command line: clear errors (exit 2, one
//! short line) or a working model, never a crash, an exhausted memory or a file that cannot
//! be read back.
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use std::path::{Path, PathBuf};

fn write_csv(d: &Path, name: &str, header: &str, rows: impl Iterator<Item = String>) -> PathBuf {
    let p = d.join(name);
    let body: String = rows.map(|r| r + "\n").collect();
    std::fs::write(&p, format!("{header}\n{body}")).unwrap();
    p
}

fn small(d: &Path) -> PathBuf {
    write_csv(
        d,
        "small.csv",
        "a,b",
        (0..100).map(|i| format!("{}.5,{}.25", i % 13, (i * 7) % 11)),
    )
}

#[test]
fn absurd_sizes_on_the_command_line_are_assert_input_error() {
    let d = dir("sizes");
    let data = small(&d);
    let out = d.join("m.safetensors");
    for (opt, val) in [
        ("--hidden", "1000000000"),
        ("--hidden", "18446744073709551615"),
        ("--depth", "1000000000"),
        ("--steps", "1000000000"),
        ("--latent-dim", "18446744073709551615"),
        ("--batch-size", "18446744073709551615"),
        ("--epochs", "18446744073709551615"),
    ] {
        let o = bin()
            .arg("fit")
            .arg(&data)
            .args([opt, val, "--out"])
            .arg(&out)
            .output()
            .unwrap();
        assert_input_error(&o, &["at most"]);
    }
    // Within each limit, but too many parameters together.
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--hidden", "16000", "--depth", "60", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert_input_error(&o, &["parameters"]);
    assert!(!out.exists());
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--epochs", "1", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    for args in [
        vec!["evaluate", "--paths", "1000000000"],
        vec!["evaluate", "--paths", "18446744073709551615"],
    ] {
        let o = bin()
            .args(&args[..1])
            .arg(&out)
            .arg(&data)
            .args(&args[1..])
            .output()
            .unwrap();
        assert_input_error(&o, &["at most"]);
    }
    for rows in ["1000000000", "18446744073709551615"] {
        let o = bin()
            .arg("sample")
            .arg(&out)
            .args(["--rows", rows, "--out"])
            .arg(d.join("s.csv"))
            .output()
            .unwrap();
        assert_input_error(&o, &["at most"]);
    }
    assert!(!d.join("s.csv").exists());
}

#[test]
fn odd_tables_are_refused_or_warned_about() {
    let d = dir("tables");
    let out = d.join("m.safetensors");
    let fit = |data: &Path, extra: &[&str]| {
        bin()
            .arg("fit")
            .arg(data)
            .args(["--epochs", "1"])
            .args(extra)
            .arg("--out")
            .arg(&out)
            .output()
            .unwrap()
    };
    // No more rows than columns.
    let cols: Vec<String> = (0..40).map(|j| format!("x{j}")).collect();
    let wide = write_csv(
        &d,
        "wide.csv",
        &cols.join(","),
        (0..30).map(|i| {
            (0..40)
                .map(|j| format!("{}.5", (i * 31 + j * 17) % 23))
                .collect::<Vec<_>>()
                .join(",")
        }),
    );
    assert_input_error(
        &fit(&wide, &[]),
        &["more training rows than columns", "at least 41"],
    );
    // Thousands of columns: refused up front, with what to do.
    let cols: Vec<String> = (0..5000).map(|j| format!("x{j}")).collect();
    let huge = write_csv(
        &d,
        "huge.csv",
        &cols.join(","),
        (0..3).map(|i| vec![format!("{i}.5"); 5000].join(",")),
    );
    let t0 = std::time::Instant::now();
    assert_input_error(&fit(&huge, &[]), &["at most 1000 columns", "--columns"]);
    assert!(t0.elapsed().as_secs() < 30);
    // A few rows: it fits, with a warning.
    let tiny = write_csv(
        &d,
        "tiny.csv",
        "a,b",
        (0..8).map(|i| format!("{i}.5,{}.25", (i * 3) % 5)),
    );
    let o = fit(&tiny, &["--batch-size", "1"]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("warning: only 6 training rows"),
        "{}",
        stderr(&o)
    );
    // A numbers-only first line.
    let numeric = write_csv(
        &d,
        "numeric.csv",
        "1.5,2",
        (0..100).map(|i| format!("{}.5,{}.25", i % 13, (i * 7) % 11)),
    );
    assert_input_error(
        &fit(&numeric, &[]),
        &["only numbers", "--no-header", "--header"],
    );
    let o = fit(&numeric, &["--no-header"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let s = neural_sde::inspect_checkpoint(&out).unwrap();
    assert_eq!(s.columns, vec!["c1", "c2"]);
    let o = fit(&numeric, &["--header"]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(
        neural_sde::inspect_checkpoint(&out).unwrap().columns,
        vec!["1.5", "2"]
    );
    assert_input_error(&fit(&numeric, &["--header", "--no-header"]), &["not both"]);
}

#[test]
fn huge_and_nearly_constant_columns() {
    let d = dir("scale");
    let out = d.join("m.safetensors");
    // Values around 1e200: their squares overflow; the scale is computed in units of the
    // largest magnitude, so the model is written with a finite scaler and reads back.
    let big = write_csv(
        &d,
        "big.csv",
        "a,b",
        (0..100).map(|i| format!("{}e200,{}", 1 + i % 13, (i * 7) % 11)),
    );
    // (Whole numbers with few values would be guessed categorical: declare them.)
    let o = bin()
        .arg("fit")
        .arg(&big)
        .args(["--continuous", "a,b"])
        .args(["--epochs", "1", "--validation-fraction", "0", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let s = neural_sde::inspect_checkpoint(&out).unwrap();
    assert!(s.scaler.scale.iter().all(|v| v.is_finite() && *v > 0.0));
    // Population sd of 1..13 cycling over the 100 rows (all trained on), times 1e200.
    let col: Vec<f64> = (0..100).map(|i| (1 + i % 13) as f64).collect();
    let m = col.iter().sum::<f64>() / 100.0;
    let sd = (col.iter().map(|v| (v - m).powi(2)).sum::<f64>() / 100.0).sqrt();
    assert!(
        (s.scaler.scale[0] / 1e200 - sd).abs() < 1e-9 * sd,
        "{} vs {sd}e200",
        s.scaler.scale[0]
    );
    let o = bin().arg("evaluate").arg(&out).arg(&big).output().unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let o = bin()
        .arg("sample")
        .arg(&out)
        .args(["--rows", "5", "--out"])
        .arg(d.join("s.csv"))
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    // Varies by 1e-9 around 1e6: not constant, but too little to standardise.
    let flat = write_csv(
        &d,
        "flat.csv",
        "a,b",
        (0..100).map(|i| format!("{},{}", 1e6 + 1e-9 * (i % 2) as f64, i as f64 % 7.0 + 0.5)),
    );
    let o = bin()
        .arg("fit")
        .arg(&flat)
        .arg("--out")
        .arg(d.join("flat.safetensors"))
        .output()
        .unwrap();
    assert_input_error(
        &o,
        &["column 'a' varies by less than 1e-12 relative to its size"],
    );
}

#[test]
fn long_cells_and_names_are_clipped_in_messages() {
    let d = dir("clip");
    let cell = "y".repeat(1_000_000);
    let bad = write_csv(
        &d,
        "bad.csv",
        "a,b",
        (0..10).map(|i| {
            if i == 5 {
                format!("1,{cell}")
            } else {
                format!("{i},2")
            }
        }),
    );
    let o = bin()
        .arg("fit")
        .arg(&bad)
        .arg("--out")
        .arg(d.join("m.safetensors"))
        .output()
        .unwrap();
    assert_input_error(&o, &["line 7", "more characters"]);
    let name = "n".repeat(100_000);
    let bad = write_csv(
        &d,
        "name.csv",
        &format!("{name},{name}"),
        (0..3).map(|i| format!("{i},{i}")),
    );
    let o = bin()
        .arg("fit")
        .arg(&bad)
        .arg("--out")
        .arg(d.join("m.safetensors"))
        .output()
        .unwrap();
    assert_input_error(&o, &["appears twice", "more characters"]);
}

#[test]
fn a_failed_fit_says_so_once_and_keeps_the_best_model() {
    let d = dir("failed");
    let data = small(&d);
    let out = d.join("m.safetensors");
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--learning-rate", "1e30", "--epochs", "50", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    let e = stderr(&o);
    assert_eq!(o.status.code(), Some(1), "{e}");
    assert_eq!(e.matches("training failed").count(), 1, "{e}");
    assert!(e.contains("best model so far was written"), "{e}");
    let o = bin().arg("evaluate").arg(&out).arg(&data).output().unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
}

#[test]
fn resuming_from_weights_with_nan_is_assert_input_error() {
    let d = dir("nan");
    let data = small(&d);
    let good = d.join("good.safetensors");
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--epochs", "1", "--out"])
        .arg(&good)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    // Put a NaN into one weight with the reference safetensors writer.
    let bytes = std::fs::read(&good).unwrap();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let meta = md.metadata().clone();
    let mut tensors: Vec<(String, candle_core::Tensor)> =
        candle_core::safetensors::load_buffer(&bytes, &candle_core::Device::Cpu)
            .unwrap()
            .into_iter()
            .collect();
    let t = &mut tensors
        .iter_mut()
        .find(|(n, _)| n.ends_with("decoder.linear.bias"))
        .unwrap()
        .1;
    *t = (&*t * f64::NAN).unwrap();
    let bad = d.join("bad.safetensors");
    safetensors::tensor::serialize_to_file(tensors, meta, &bad).unwrap();
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--resume")
        .arg(&bad)
        .arg("--out")
        .arg(d.join("more.safetensors"))
        .output()
        .unwrap();
    assert_input_error(&o, &["decoder.linear.bias", "NaN"]);
    assert!(!d.join("more.safetensors").exists());
}

#[test]
fn hostile_ensemble_headers_are_refused_by_every_reader() {
    let d = dir("ensemble-header");
    let data = small(&d);
    let good = d.join("good.safetensors");
    let o = bin()
        .arg("fit")
        .arg(&data)
        // One Gaussian start: no second fit beside the members, so the file holds two models.
        .args([
            "--epochs",
            "1",
            "--members",
            "2",
            "--noise-components",
            "1",
            "--out",
        ])
        .arg(&good)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let bytes = std::fs::read(&good).unwrap();
    let tensors: Vec<(String, candle_core::Tensor)> =
        candle_core::safetensors::load_buffer(&bytes, &candle_core::Device::Cpu)
            .unwrap()
            .into_iter()
            .collect();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let entry: serde_json::Value =
        serde_json::from_str(&md.metadata().clone().unwrap()["neural-sde"]).unwrap();
    assert_eq!(entry["format"], "neural-sde-ensemble");
    // Rewrites the header (and optionally the tensors) with the reference safetensors writer.
    let write = |name: &str,
                 edit: &dyn Fn(&mut serde_json::Value),
                 extra: Option<(&str, candle_core::Tensor)>| {
        let mut e = entry.clone();
        edit(&mut e["header"]);
        let meta = std::collections::HashMap::from([("neural-sde".to_string(), e.to_string())]);
        let mut t = tensors.clone();
        if let Some((n, x)) = extra {
            t.push((n.to_string(), x));
        }
        let p = d.join(name);
        safetensors::tensor::serialize_to_file(t, Some(meta), &p).unwrap();
        p
    };
    let member = entry["header"]["members"][0].clone();
    let cases: Vec<(PathBuf, &[&str])> = vec![
        (
            write(
                "many.safetensors",
                &|h| h["members"] = serde_json::Value::Array(vec![member.clone(); 33]),
                None,
            ),
            &["33 members", "1 to 32"],
        ),
        (
            write(
                "weights.safetensors",
                &|h| h["weights"] = serde_json::json!([1.0]),
                None,
            ),
            &["1 weights for 2 members"],
        ),
        (
            write(
                "negative.safetensors",
                &|h| h["weights"] = serde_json::json!([1.0, -2.0]),
                None,
            ),
            &["weight -2", "finite and positive"],
        ),
        (
            write(
                "stray.safetensors",
                &|_| {},
                Some((
                    "other.x",
                    candle_core::Tensor::zeros(
                        3,
                        candle_core::DType::F64,
                        &candle_core::Device::Cpu,
                    )
                    .unwrap(),
                )),
            ),
            &["other.x", "none of the 2 members"],
        ),
        (
            write(
                "huge.safetensors",
                &|h| {
                    h["members"][1]["model_config"]["prior"]["width"] =
                        serde_json::json!(1u64 << 40)
                },
                None,
            ),
            &["member 2 of 2"],
        ),
        (
            write(
                "columns.safetensors",
                &|h| h["members"][1]["columns"] = serde_json::json!(["a", "z"]),
                None,
            ),
            &["columns"],
        ),
    ];
    for (file, says) in &cases {
        for args in [
            vec![
                "evaluate".to_string(),
                file.display().to_string(),
                data.display().to_string(),
            ],
            vec!["inspect".to_string(), file.display().to_string()],
            vec![
                "fit".to_string(),
                data.display().to_string(),
                "--resume".to_string(),
                file.display().to_string(),
                "--out".to_string(),
                d.join("out.safetensors").display().to_string(),
            ],
        ] {
            let o = bin().args(&args).output().unwrap();
            // `inspect` reads headers and builds no model: it can describe the members of
            // the last two cases.
            let described = ["columns.safetensors", "huge.safetensors"];
            if args[0] == "inspect" && described.iter().any(|n| file.ends_with(n)) {
                assert!(o.status.success(), "{}", stderr(&o));
                continue;
            }
            assert_input_error(&o, says);
        }
    }
    assert!(!d.join("out.safetensors").exists());
}
