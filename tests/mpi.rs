//! Data-parallel training over MPI, run as a user runs it: `mpirun -np P neural-sde fit …`.
//! Needs the `mpi` feature and Open MPI's `mpirun` (`.ci/run` installs both):
//! `cargo test --features mpi --test mpi`.
//!
//! Every run is bounded by `timeout`, so a hang fails the test instead of blocking CI.
#![cfg(feature = "mpi")]
#[path = "support/cli.rs"]
mod cli;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use cli::*;

/// `mpirun -np p` running the tool with `args`, through a wrapper script when given.
fn mpirun(p: usize, wrapper: Option<&Path>, args: &[&str]) -> Output {
    let mut c = Command::new("timeout");
    c.args([
        "120",
        "mpirun",
        "--allow-run-as-root",
        "--oversubscribe",
        "-np",
    ])
    .arg(p.to_string());
    if let Some(w) = wrapper {
        c.arg("sh").arg(w);
    }
    c.arg(env!("CARGO_BIN_EXE_neural-sde"))
        .args(args)
        .env("RAYON_NUM_THREADS", "1")
        .env("OMPI_MCA_btl", "self,vader,tcp")
        .output()
        .unwrap()
}

fn table(d: &Path, name: &str, rows: usize) -> PathBuf {
    let p = d.join(name);
    let body: String = (0..rows)
        .map(|i| {
            let x = (i as f64 * 0.37).sin();
            format!("{x},{}\n", x * x + 0.1 * ((i * 7) % 5) as f64)
        })
        .collect();
    std::fs::write(&p, format!("a,b\n{body}")).unwrap();
    p
}

/// Every tensor of a model file, as f64 values by name.
fn tensors(p: &Path) -> BTreeMap<String, Vec<f64>> {
    let bytes = std::fs::read(p).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    st.tensors()
        .into_iter()
        .map(|(n, v)| {
            let vals = match v.dtype() {
                safetensors::Dtype::F32 => v
                    .data()
                    .chunks_exact(4)
                    .map(|b| f64::from(f32::from_le_bytes(b.try_into().unwrap())))
                    .collect(),
                _ => v
                    .data()
                    .chunks_exact(8)
                    .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
                    .collect(),
            };
            (n, vals)
        })
        .collect()
}

/// The largest difference between the models' weights, relative to the largest weight.
fn weight_difference(a: &Path, b: &Path) -> f64 {
    let (ta, tb) = (tensors(a), tensors(b));
    let (mut diff, mut scale) = (0.0f64, 0.0f64);
    // The default fit's file is an ensemble: a member's tensors are named `member{i}.…`.
    let weights = |n: &&String| {
        let own = match n.strip_prefix("member") {
            Some(rest) => rest.split_once('.').map_or(rest, |(_, name)| name),
            None => n.as_str(),
        };
        !["optim.", "best.", "last.", "average."]
            .iter()
            .any(|p| own.starts_with(p))
    };
    for (name, va) in ta.iter().filter(|(n, _)| weights(n)) {
        let vb = &tb[name];
        for (x, y) in va.iter().zip(vb) {
            diff = diff.max((x - y).abs());
            scale = scale.max(x.abs());
        }
    }
    diff / scale
}

/// The error lines the job printed (Open MPI adds its own notes around them).
fn error_lines(o: &Output) -> Vec<String> {
    stderr(o)
        .lines()
        .filter(|l| l.starts_with("error"))
        .map(str::to_string)
        .collect()
}

const FIT: [&str; 6] = [
    "--epochs",
    "3",
    "--batch-size",
    "32",
    "--time-budget",
    "100",
];

#[test]
fn two_processes_train_the_model_one_process_trains_and_resume_with_another_count() {
    let d = dir("mpi-same");
    let data = table(&d, "data.csv", 400);
    let data = data.to_str().unwrap();
    let one = d.join("one.safetensors");
    let two = d.join("two.safetensors");
    let mut args = vec!["fit", data, "--out", one.to_str().unwrap()];
    args.extend(FIT);
    let o = mpirun(1, None, &args);
    assert!(o.status.success(), "{}", stderr(&o));
    args[3] = two.to_str().unwrap();
    let o = mpirun(2, None, &args);
    assert!(o.status.success(), "{}", stderr(&o));
    // Printed once, by process 0.
    assert_eq!(
        String::from_utf8_lossy(&o.stdout).matches("fitted").count(),
        1
    );
    // The same model up to the rounding of the split sums (measured: 5e-6 relative on the
    // demo table after 150 steps).
    let diff = weight_difference(&one, &two);
    assert!(diff < 1e-3, "P = 1 and P = 2 differ by {diff}");

    // Stop after 2 epochs with 2 processes, resume to the end with 1.
    let half = d.join("half.safetensors");
    let mut args = vec![
        "fit",
        data,
        "--out",
        half.to_str().unwrap(),
        "--stop-after",
        "2",
    ];
    args.extend(FIT);
    let o = mpirun(2, None, &args);
    assert!(o.status.success(), "{}", stderr(&o));
    let done = d.join("done.safetensors");
    let o = mpirun(
        1,
        None,
        &[
            "fit",
            data,
            "--resume",
            half.to_str().unwrap(),
            "--out",
            done.to_str().unwrap(),
        ],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let diff = weight_difference(&one, &done);
    assert!(diff < 1e-3, "resumed with another process count: {diff}");
}

/// A wrapper script that gives process 1 the data file `alt` (the arguments start with
/// `fit DATA`).
fn wrapper(d: &Path, alt: &str) -> PathBuf {
    let w = d.join("wrap.sh");
    std::fs::write(
        &w,
        format!(
            "bin=$1; shift\nif [ \"$OMPI_COMM_WORLD_RANK\" = 1 ]; then shift 2; set -- fit '{alt}' \"$@\"; fi\nexec \"$bin\" \"$@\"\n"
        ),
    )
    .unwrap();
    w
}

#[test]
fn a_process_with_another_table_or_no_table_ends_the_job_with_one_message() {
    let d = dir("mpi-faults");
    let data = table(&d, "data.csv", 400);
    let other = table(&d, "other.csv", 401);
    let out = d.join("m.safetensors");
    let args = [
        "fit",
        data.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--epochs",
        "1",
    ];
    // Process 1 reads a table with one more row.
    let w = wrapper(&d, other.to_str().unwrap());
    let o = mpirun(2, Some(&w), &args);
    assert!(!o.status.success());
    assert_ne!(o.status.code(), Some(124), "the job hung");
    let errors = error_lines(&o);
    assert_eq!(errors.len(), 1, "{}", stderr(&o));
    assert!(errors[0].contains("process(es) 1 of 2"), "{}", errors[0]);
    assert!(errors[0].contains("different table"), "{}", errors[0]);
    assert!(!out.exists());

    // Process 1's file is missing: it says so, and every process stops.
    let w = wrapper(&d, d.join("missing.csv").to_str().unwrap());
    let o = mpirun(2, Some(&w), &args);
    assert!(!o.status.success());
    assert_ne!(o.status.code(), Some(124), "the job hung");
    let errors = error_lines(&o);
    assert_eq!(errors.len(), 1, "{}", stderr(&o));
    assert!(errors[0].contains("missing.csv"), "{}", errors[0]);
    assert!(errors[0].contains("not found"), "{}", errors[0]);
    assert!(!out.exists());
}

#[test]
fn more_processes_than_training_rows_are_refused() {
    let d = dir("mpi-too-many");
    let data = table(&d, "tiny.csv", 3);
    let out = d.join("m.safetensors");
    let o = mpirun(
        4,
        None,
        &[
            "fit",
            data.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--batch-size",
            "1",
            "--validation-fraction",
            "0",
            "--epochs",
            "1",
        ],
    );
    assert!(!o.status.success());
    let errors = error_lines(&o);
    assert_eq!(errors.len(), 1, "{}", stderr(&o));
    assert!(
        errors[0].contains("4 processes for 3 training rows"),
        "{}",
        errors[0]
    );
    assert!(!out.exists());
}
