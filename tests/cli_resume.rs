//! Exact resume and deterministic checkpoints, on the command line as a user runs them.
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Output;

fn table(d: &Path) -> PathBuf {
    let p = d.join("data.csv");
    let body: String = (0..150)
        .map(|i| {
            let x = (i as f64 * 0.37).sin();
            format!(
                "{x},{},{}\n",
                x * x + 0.1 * ((i * 7) % 5) as f64,
                (i % 11) as f64 * 0.3
            )
        })
        .collect();
    std::fs::write(&p, format!("a,b,c\n{body}")).unwrap();
    p
}

fn fit(data: &Path, out: &Path, extra: &[&str]) -> Output {
    ok(bin()
        .arg("fit")
        .arg(data)
        .args(["--batch-size", "32", "--out"])
        .arg(out)
        .args(extra)
        .output()
        .unwrap())
}

/// `fit DATA --resume FROM --out OUT`, which must succeed.
fn resume(data: &Path, from: &Path, out: &Path) -> Output {
    ok(bin()
        .arg("fit")
        .arg(data)
        .arg("--resume")
        .arg(from)
        .arg("--out")
        .arg(out)
        .output()
        .unwrap())
}

/// Every tensor's bytes by name, and the header with its `timing` field removed.
fn contents(p: &Path) -> (BTreeMap<String, Vec<u8>>, serde_json::Value) {
    let bytes = std::fs::read(p).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let tensors = st
        .tensors()
        .into_iter()
        .map(|(n, v)| (n, v.data().to_vec()))
        .collect();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let meta = md.metadata().clone().unwrap();
    assert_eq!(
        meta.len(),
        1,
        "one metadata entry keeps the bytes deterministic"
    );
    let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
    let header = c["header"].as_object_mut().unwrap();
    // The default fit's file is an ensemble: each member's header has its own timing.
    match header.get_mut("members") {
        Some(members) => {
            for m in members.as_array_mut().unwrap() {
                let m = m.as_object_mut().unwrap();
                assert!(m.remove("timing").is_some(), "no timing field");
            }
        }
        None => assert!(header.remove("timing").is_some(), "no timing field"),
    }
    (tensors, c)
}

#[test]
fn stopping_and_resuming_gives_the_model_of_one_run() {
    let d = dir("exact");
    let data = table(&d);
    let full = d.join("full.safetensors");
    fit(&data, &full, &["--epochs", "4"]);
    // Two epochs of the same four-epoch plan, then resumed to its end.
    let half = d.join("half.safetensors");
    fit(&data, &half, &["--epochs", "4", "--stop-after", "2"]);
    let resumed = d.join("resumed.safetensors");
    resume(&data, &half, &resumed);
    assert_eq!(contents(&resumed), contents(&full));
    // One epoch at a time.
    let mut prev = d.join("e1.safetensors");
    fit(&data, &prev, &["--epochs", "4", "--stop-after", "1"]);
    for e in 2..=4 {
        let next = d.join(format!("e{e}.safetensors"));
        ok(bin()
            .arg("fit")
            .arg(&data)
            .arg("--resume")
            .arg(&prev)
            .args(["--stop-after", &e.to_string(), "--out"])
            .arg(&next)
            .output()
            .unwrap());
        prev = next;
    }
    assert_eq!(contents(&prev), contents(&full));
    // The same fit again: the same file apart from the timing field.
    let again = d.join("again.safetensors");
    fit(&data, &again, &["--epochs", "4"]);
    assert_eq!(contents(&again), contents(&full));
}

#[test]
fn resuming_past_the_plan_says_how_the_schedule_continues() {
    let d = dir("extend");
    let data = table(&d);
    let two = d.join("two.safetensors");
    fit(&data, &two, &["--epochs", "2"]);
    let four = d.join("four.safetensors");
    let o = ok(bin()
        .arg("fit")
        .arg(&data)
        .arg("--resume")
        .arg(&two)
        .args(["--epochs", "4", "--out"])
        .arg(&four)
        .output()
        .unwrap());
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("planned over 2 epochs") && e.contains("epochs 3 to 4 run at its final"),
        "{e}"
    );
    let s = neural_sde::inspect_checkpoint(&four).unwrap();
    assert_eq!(s.history.epochs.len(), 4);
    // The schedule ended its cosine decay with epoch 2; epochs 3 and 4 run at its final rate,
    // 0.05 of the default peak 3e-3 (`--help`; TrainConfig's defaults), times the factor of a
    // fit from a mixture when the trainer chose one for this table (1/3, `--help`).
    let factor = if s.model_config.noise_components.unwrap_or(1) > 1 {
        1.0 / 3.0
    } else {
        1.0
    };
    let lr = |k: usize| s.history.epochs[k].learning_rate;
    assert_eq!(lr(2), lr(3));
    assert!(
        (lr(3) - 0.05 * 3e-3 * factor).abs() < 1e-15,
        "{} (factor {factor})",
        lr(3)
    );
    assert!(lr(1) > lr(2));
}

#[test]
fn a_fit_stopped_by_its_time_budget_continues_when_resumed() {
    let d = dir("budget");
    let data = table(&d);
    let cut = d.join("cut.safetensors");
    fit(&data, &cut, &["--epochs", "5", "--time-budget", "0.000001"]);
    let s = neural_sde::inspect_checkpoint(&cut).unwrap();
    assert_eq!(s.state.as_ref().unwrap().step, 0);
    let more = d.join("more.safetensors");
    let o = ok(bin()
        .arg("fit")
        .arg(&data)
        .arg("--resume")
        .arg(&cut)
        .arg("--out")
        .arg(&more)
        .output()
        .unwrap());
    assert!(String::from_utf8_lossy(&o.stdout).contains("ran all planned epochs"));
    let s = neural_sde::inspect_checkpoint(&more).unwrap();
    assert_eq!(s.history.epochs.len(), 5);
    assert!(s.state.unwrap().step > 0);
}

#[test]
fn a_table_with_categories_and_missing_cells_resumes_exactly() {
    let d = dir("exact-mixed");
    let data = d.join("mixed.csv");
    let body: String = (0..150)
        .map(|i| {
            let x = (i as f64 * 0.37).sin();
            let y = if i % 9 == 4 {
                "?".to_string()
            } else {
                format!("{}", x * x + 0.01 * i as f64)
            };
            let g = ["north", "south", "east"][i % 3];
            let g = if i % 13 == 6 { "" } else { g };
            format!("{x},{y},{g},{}\n", i % 4)
        })
        .collect();
    std::fs::write(&data, format!("a,b,region,grade\n{body}")).unwrap();
    // With the refit on every row: the checkpoint keeps the choice, so the resumed fit
    // refits too.
    let opts = ["--missing-marker", "?", "--continuous", "grade", "--refit"];
    let full = d.join("full.safetensors");
    fit(&data, &full, &[&["--epochs", "3"][..], &opts].concat());
    let half = d.join("half.safetensors");
    fit(
        &data,
        &half,
        &[&["--epochs", "3", "--stop-after", "1"][..], &opts].concat(),
    );
    // Resuming reads the table with the checkpoint's column types and markers.
    let resumed = d.join("resumed.safetensors");
    resume(&data, &half, &resumed);
    assert_eq!(contents(&resumed), contents(&full));
    let info = neural_sde::inspect_checkpoint(&full).unwrap();
    // The file holds the refit on every row.
    assert_eq!(info.train_config.as_ref().unwrap().validation_fraction, 0.0);
    assert!(info.schema.kinds[2].is_categorical());
    assert!(!info.schema.kinds[3].is_categorical());
    assert_eq!(info.schema.missing_markers, vec!["?".to_string()]);
}
