//! Scale benchmark: loading a big CSV table, and training throughput (rows per second) of the
//! default model on it with 1 and 2 threads and, when the tool was built with the `mpi`
//! feature and `mpirun` exists, with P = 1 and P = 2 MPI processes of one thread each.
//!
//! `cargo bench --bench scale [--features mpi] -- [--rows 1000000] [--cols 20]
//! [--seconds 40] [--rounds 2]`
//!
//! The table is synthetic (a seeded nonlinear mix of Gaussians, demo data) and is written
//! once to `target/scale-bench/`. Loading runs in a child process so that its peak memory
//! (VmHWM) is the load's alone. Throughput is read from the fit's history: optimiser steps
//! × batch rows / seconds of the epochs (validation included), at the default batch of a big
//! table (1024 rows). A one-thread run at 256 rows per batch gives the fixed cost per step
//! `a_ms` and the cost per row `c_us` that `benches/scaling_model.py` takes.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use neural_sde::{generator, standard_normals, Table};

struct Args {
    rows: usize,
    cols: usize,
    seconds: f64,
    rounds: usize,
    load_only: Option<PathBuf>,
}

fn parse() -> Args {
    let mut a = Args {
        rows: 1_000_000,
        cols: 20,
        seconds: 40.0,
        rounds: 2,
        load_only: None,
    };
    let argv: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < argv.len() {
        let val = argv.get(i + 1).cloned().unwrap_or_default();
        match argv[i].as_str() {
            "--bench" => {
                i += 1;
                continue;
            }
            "--rows" => a.rows = val.parse().expect("--rows needs a whole number"),
            "--cols" => a.cols = val.parse().expect("--cols needs a whole number"),
            "--seconds" => a.seconds = val.parse().expect("--seconds needs a number"),
            "--rounds" => a.rounds = val.parse().expect("--rounds needs a whole number"),
            "--load-only" => a.load_only = Some(PathBuf::from(val)),
            other => panic!("unknown option {other}"),
        }
        i += 2;
    }
    a
}

/// Peak resident memory of this process in bytes (Linux `VmHWM`).
fn peak_rss() -> Option<u64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = s.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}

fn write_table(path: &Path, rows: usize, cols: usize) {
    use std::io::Write;
    let mut g = generator(2026, 9);
    let mix = standard_normals(&mut g, cols * cols);
    let mut f = std::io::BufWriter::new(std::fs::File::create(path).unwrap());
    let names: Vec<String> = (0..cols).map(|j| format!("x{j}")).collect();
    writeln!(f, "{}", names.join(",")).unwrap();
    let mut line = String::new();
    for _ in 0..rows {
        let z = standard_normals(&mut g, cols);
        line.clear();
        for j in 0..cols {
            let a: f64 =
                (0..cols).map(|k| mix[j * cols + k] * z[k]).sum::<f64>() / (cols as f64).sqrt();
            let v = 3.0 * a.tanh() + 0.5 * z[cols - 1 - j];
            if j > 0 {
                line.push(',');
            }
            line.push_str(&format!("{v:.6}"));
        }
        writeln!(f, "{line}").unwrap();
    }
}

/// Steps × batch / seconds from a history CSV written by `fit --history`.
fn throughput(history: &Path, batch: f64) -> f64 {
    let text = std::fs::read_to_string(history).unwrap();
    let mut lines = text.lines();
    let head: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |n: &str| head.iter().position(|h| *h == n).unwrap();
    let (step, secs) = (col("step"), col("seconds"));
    let (mut last, mut total) = (0.0, 0.0);
    for l in lines {
        let f: Vec<&str> = l.split(',').collect();
        last = f[step].parse::<f64>().unwrap();
        total += f[secs].parse::<f64>().unwrap();
    }
    last * batch / total
}

fn main() {
    let a = parse();
    if let Some(p) = &a.load_only {
        let t0 = Instant::now();
        let t = Table::from_csv(p, None).unwrap();
        let secs = t0.elapsed().as_secs_f64();
        let f32_bytes = (t.n_rows() * t.n_cols() * 4) as f64;
        println!(
            "{{\"load_seconds\":{secs:.3},\"rows\":{},\"cols\":{},\"peak_rss_mb\":{:.1},\"values_f32_mb\":{:.1}}}",
            t.n_rows(),
            t.n_cols(),
            peak_rss().unwrap_or(0) as f64 / 1e6,
            f32_bytes / 1e6
        );
        return;
    }
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/scale-bench");
    std::fs::create_dir_all(&dir).unwrap();
    let table = dir.join(format!("table-{}x{}.csv", a.rows, a.cols));
    if !table.exists() {
        eprintln!("writing {} …", table.display());
        write_table(&table, a.rows, a.cols);
    }
    // Loading, in a child process.
    let me = std::env::current_exe().unwrap();
    for _ in 0..a.rounds {
        let o = Command::new(&me)
            .arg("--load-only")
            .arg(&table)
            .output()
            .unwrap();
        print!("{}", String::from_utf8_lossy(&o.stdout));
    }
    // Throughput.
    let bin = env!("CARGO_BIN_EXE_neural-sde");
    let budget = a.seconds.to_string();
    let fit = |launcher: &[&str], threads: &str, name: &str, batch: usize| -> Option<f64> {
        let history = dir.join(format!("{name}.csv"));
        let _ = std::fs::remove_file(&history);
        let mut c = Command::new(launcher.first().copied().unwrap_or(bin));
        if !launcher.is_empty() {
            c.args(&launcher[1..]).arg(bin);
        }
        let o = c
            .args(["--threads", threads, "fit"])
            .arg(&table)
            .args([
                "--time-budget",
                &budget,
                "--batch-size",
                &batch.to_string(),
                "--out",
            ])
            .arg(dir.join(format!("{name}.safetensors")))
            .arg("--history")
            .arg(&history)
            .output()
            .ok()?;
        if !o.status.success() {
            let e = String::from_utf8_lossy(&o.stderr);
            eprintln!(
                "{name}: {}",
                e.lines().find(|l| l.starts_with("error")).unwrap_or("")
            );
            return None;
        }
        Some(throughput(&history, batch as f64))
    };
    let mpirun = |np: &'static str| {
        [
            "mpirun",
            "--allow-run-as-root",
            "--oversubscribe",
            "-np",
            np,
        ]
    };
    for round in 0..a.rounds {
        let t1 = fit(&[], "1", "threads1", 1024);
        let t2 = fit(&[], "2", "threads2", 1024);
        let p1 = fit(&mpirun("1"), "1", "mpi1", 1024);
        let p2 = fit(&mpirun("2"), "1", "mpi2", 1024);
        // One thread at a quarter of the batch: with the time per step a + c·B, two batch
        // sizes give the fixed cost a and the cost per row c (for the scaling model).
        let small = fit(&[], "1", "threads1_small", 256);
        let cost = match (t1, small) {
            (Some(big), Some(small)) => {
                let (s1, s2) = (1024.0 / big, 256.0 / small);
                let c = (s1 - s2) / 768.0;
                format!("{:.3},\"c_us\":{:.2}", (s1 - 1024.0 * c) * 1e3, c * 1e6)
            }
            _ => "null,\"c_us\":null".to_string(),
        };
        let show = |x: Option<f64>| x.map_or("null".to_string(), |v| format!("{v:.0}"));
        let ratio = |a: Option<f64>, b: Option<f64>| match (a, b) {
            (Some(a), Some(b)) => format!("{:.2}", b / a),
            _ => "null".to_string(),
        };
        println!(
            "{{\"round\":{round},\"rows_per_s_threads_1\":{},\"rows_per_s_threads_2\":{},\"threads_speedup\":{},\"rows_per_s_mpi_1\":{},\"rows_per_s_mpi_2\":{},\"mpi_speedup\":{},\"a_ms\":{cost}}}",
            show(t1),
            show(t2),
            ratio(t1, t2),
            show(p1),
            show(p2),
            ratio(p1, p2)
        );
    }
}
