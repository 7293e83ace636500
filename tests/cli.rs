//! The command-line tool, run as a user would: on the demo data and on bad inputs.
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use std::path::Path;

fn files(d: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(d)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn fit_evaluate_sample_inspect_on_the_demo() {
    let d = dir("demo");
    let model = d.join("demo.safetensors");
    let o = run(bin()
        .args(["fit", "--demo", "--epochs", "2", "--out"])
        .arg(&model)
        .arg("--history")
        .arg(d.join("h.csv"))
        .arg("--plot")
        .arg(d.join("curve.svg")));
    assert!(o.status.success(), "{}", stderr(&o));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("best validation ELBO per dimension") && out.contains("model written to"),
        "{out}"
    );
    // Three members (the default for the demo's 2,000 rows); each also keeps its fit from
    // one Gaussian when the stacking weight gives it a share (the line that says so names
    // its place in the file).
    assert!(
        out.contains("an ensemble of 3 members (seeds 0 to 2)"),
        "{out}"
    );
    let beside = out.matches("kept both").count();
    assert!(beside <= 3, "{out}");
    assert_eq!(out.matches("of the file)").count(), beside, "{out}");
    assert_eq!(files(&d), vec!["curve.svg", "demo.safetensors", "h.csv"]);
    assert!(std::fs::read_to_string(d.join("curve.svg"))
        .unwrap()
        .starts_with("<svg"));

    let o = run(bin()
        .arg("evaluate")
        .arg(&model)
        .args(["--demo", "--paths", "4", "--json"]));
    assert!(o.status.success(), "{}", stderr(&o));
    let line = String::from_utf8_lossy(&o.stdout);
    assert_eq!(line.trim().lines().count(), 1);
    let v: serde_json::Value = serde_json::from_str(line.trim()).unwrap();
    for k in [
        "rows",
        "dims",
        "paths",
        "elbo_per_row",
        "elbo_per_dim",
        "loglik_per_row",
        "loglik_per_dim",
    ] {
        assert!(v.get(k).is_some(), "missing {k}");
    }
    assert_eq!(v["rows"], 2000);
    assert_eq!(v["dims"], 5);
    assert_eq!(v["paths"], 4);
    assert!(v["loglik_per_row"].as_f64().unwrap() >= v["elbo_per_row"].as_f64().unwrap() - 1e-9);

    let samples = d.join("s.csv");
    let o = run(bin()
        .arg("sample")
        .arg(&model)
        .args(["--rows", "300", "--seed", "5", "--demo", "--out"])
        .arg(&samples)
        .arg("--plot")
        .arg(d.join("pairs.svg")));
    assert!(o.status.success(), "{}", stderr(&o));
    let csv = std::fs::read_to_string(&samples).unwrap();
    assert!(csv.starts_with("light_klux,temperature_c,humidity_pct,co2_ppm,growth_um_h\n"));
    assert_eq!(csv.lines().count(), 301);
    // The same seed gives the same rows.
    let again = d.join("s2.csv");
    assert!(run(bin()
        .arg("sample")
        .arg(&model)
        .args(["--rows", "300", "--seed", "5", "--out"])
        .arg(&again))
    .status
    .success());
    assert_eq!(csv, std::fs::read_to_string(&again).unwrap());

    let o = run(bin().arg("inspect").arg(&model));
    assert!(o.status.success());
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("co2_ppm") && out.contains("best ELBO") && out.contains("2 epochs"),
        "{out}"
    );

    // Resume from the checkpoint for one more epoch.
    let more = d.join("more.safetensors");
    let o = run(bin()
        .args(["fit", "--demo", "--epochs", "3", "--resume"])
        .arg(&model)
        .arg("--out")
        .arg(&more));
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(
        String::from_utf8_lossy(&run(bin().arg("inspect").arg(&more)).stdout).contains("3 epochs")
    );

    // The ensemble of a model with itself is that model, row by row (log(½p + ½p) = log p).
    let evaluate = |first: &Path, with: &[&Path]| -> serde_json::Value {
        let mut c = bin();
        c.arg("evaluate")
            .arg(first)
            .args(["--demo", "--paths", "4", "--json"]);
        for w in with {
            c.arg("--with").arg(w);
        }
        let o = run(&mut c);
        assert!(o.status.success(), "{}", stderr(&o));
        serde_json::from_str(String::from_utf8_lossy(&o.stdout).trim()).unwrap()
    };
    let ll = |v: &serde_json::Value| v["loglik_per_row"].as_f64().unwrap();
    // The default fit is an ensemble of three members (one file), with the fits it reported
    // kept beside them.
    let alone = evaluate(&model, &[]);
    assert_eq!(alone["models"], 3 + beside);
    let twice = evaluate(&model, &[&model]);
    assert_eq!(twice["models"], 2 * (3 + beside));
    assert!((ll(&twice) - ll(&alone)).abs() < 1e-9, "{twice} vs {alone}");
    // With the resumed fit: each row's log(½a + ½b) is at least the mean of the two logs
    // (Jensen's inequality) and at least the larger one minus log 2, so the means obey
    // the same bounds (each member's rows are scored with the same paths either way).
    let other = ll(&evaluate(&more, &[]));
    let both = evaluate(&model, &[&more]);
    assert!(ll(&both) >= 0.5 * (ll(&alone) + other) - 1e-9, "{both}");
    assert!(
        ll(&both) >= ll(&alone).max(other) - 2f64.ln() - 1e-9,
        "{both}"
    );
    assert!(ll(&both) != ll(&alone) && ll(&both) != other, "{both}");

    // Rows from the ensemble: seeded, and never written over a member's file.
    let sample = |out: &Path, extra: &[&str]| {
        run(bin()
            .arg("sample")
            .arg(&model)
            .arg("--with")
            .arg(&more)
            .args(["--rows", "300", "--seed", "5"])
            .args(extra)
            .arg("--out")
            .arg(out))
    };
    let (e1, e2) = (d.join("e1.csv"), d.join("e2.csv"));
    assert!(sample(&e1, &[]).status.success());
    assert!(sample(&e2, &[]).status.success());
    let rows = std::fs::read_to_string(&e1).unwrap();
    assert_eq!(rows.lines().count(), 301);
    assert_eq!(rows, std::fs::read_to_string(&e2).unwrap());
    let before = std::fs::read(&more).unwrap();
    assert_input_error(&sample(&more, &[]), &["--with model", "--out"]);
    assert_eq!(before, std::fs::read(&more).unwrap());
    // Conditioned rows from the ensemble (its conditional: see `Ensemble::impute`).
    let e3 = d.join("e3.csv");
    let o = sample(&e3, &["--given", "co2_ppm=500", "--paths", "16"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let given = std::fs::read_to_string(&e3).unwrap();
    assert_eq!(given.lines().count(), 301);
    assert!(given
        .lines()
        .skip(1)
        .all(|l| l.split(',').nth(3) == Some("500")));
}

#[test]
fn bad_inputs_exit_2_with_one_line_and_write_nothing() {
    let d = dir("bad");
    let out = d.join("m.safetensors");
    let fit = |args: &[&str]| {
        let mut c = bin();
        c.arg("fit").args(args).arg("--out").arg(&out);
        run(&mut c)
    };
    assert_input_error(
        &fit(&["/no/such/file.csv"]),
        &["/no/such/file.csv", "not found"],
    );
    std::fs::write(d.join("text.csv"), "a,b\n1,2\n3,x\n").unwrap();
    // A text cell makes a column categorical, unless it is declared continuous.
    assert_input_error(
        &fit(&[d.join("text.csv").to_str().unwrap(), "--continuous", "b"]),
        &["line 3", "column 'b'", "declared continuous", "'x'"],
    );
    std::fs::write(
        d.join("ok.csv"),
        (0..200)
            .map(|i| format!("{},{}.5\n", i, (i * 7) % 13))
            .fold("a,b\n".to_string(), |s, l| s + &l),
    )
    .unwrap();
    let ok = d.join("ok.csv");
    assert_input_error(
        &fit(&[ok.to_str().unwrap(), "--columns", "a,zz"]),
        &["unknown column 'zz'"],
    );
    assert_input_error(&fit(&[]), &["--demo"]);
    assert_input_error(&fit(&["--demo", ok.to_str().unwrap()]), &["not both"]);
    for (opt, val) in [
        ("--epochs", "0"),
        ("--learning-rate", "-1"),
        ("--validation-fraction", "1.5"),
        ("--mixture-learning-rate-scale", "1.5"),
        ("--mixture-learning-rate-scale", "0"),
        ("--weight-average", "1"),
        ("--weight-average", "-0.5"),
        ("--steps", "abc"),
        ("--time-budget", "0"),
    ] {
        assert_input_error(&fit(&["--demo", opt, val]), &[opt, "--help"]);
    }
    assert_input_error(
        &fit(&[ok.to_str().unwrap(), "--batch-size", "500"]),
        &["batch size 500"],
    );
    // Output into a folder that does not exist.
    let o = run(bin().args(["fit", "--demo", "--out", "/no/such/dir/m.safetensors"]));
    assert_input_error(&o, &["does not exist"]);
    assert_eq!(
        files(&d),
        vec!["ok.csv", "text.csv"],
        "an output file was left behind"
    );

    // A model, then evaluation on data without its columns, and corrupt checkpoints.
    let model = d.join("good.safetensors");
    assert!(run(bin()
        .arg("fit")
        .arg(&ok)
        .args(["--epochs", "1", "--out"])
        .arg(&model))
    .status
    .success());
    std::fs::write(d.join("other.csv"), "x,y\n1,2\n3,4\n").unwrap();
    let o = run(bin().arg("evaluate").arg(&model).arg(d.join("other.csv")));
    assert_input_error(&o, &["unknown column 'a'"]);
    let bytes = std::fs::read(&model).unwrap();
    std::fs::write(d.join("cut.safetensors"), &bytes[..bytes.len() / 3]).unwrap();
    let o = run(bin()
        .arg("evaluate")
        .arg(d.join("cut.safetensors"))
        .arg(&ok));
    assert_input_error(&o, &["cut.safetensors", "truncated"]);
    // An ensemble refuses a member that is not a whole model, or one of other columns.
    let o = run(bin()
        .arg("evaluate")
        .arg(&model)
        .arg(&ok)
        .arg("--with")
        .arg(d.join("cut.safetensors")));
    assert_input_error(&o, &["cut.safetensors", "truncated"]);
    let narrow = d.join("narrow.safetensors");
    assert!(run(bin()
        .arg("fit")
        .arg(&ok)
        .args(["--columns", "a", "--epochs", "1", "--out"])
        .arg(&narrow))
    .status
    .success());
    let o = run(bin()
        .arg("evaluate")
        .arg(&model)
        .arg(&ok)
        .arg("--with")
        .arg(&narrow));
    assert_input_error(
        &o,
        &[
            "--with",
            "narrow.safetensors",
            "columns",
            "1 columns against 2",
        ],
    );
    let o = run(bin().arg("inspect").arg(d.join("text.csv")));
    assert_input_error(&o, &["not a valid safetensors"]);
    let samples = d.join("s.csv");
    let o = run(bin()
        .arg("sample")
        .arg(d.join("cut.safetensors"))
        .args(["--rows", "5", "--out"])
        .arg(&samples));
    assert_input_error(&o, &["truncated"]);
    let o = run(bin()
        .arg("sample")
        .arg(&model)
        .args(["--rows", "0", "--out"])
        .arg(&samples));
    assert_input_error(&o, &["--rows"]);
    assert!(!samples.exists());
}

#[test]
fn every_command_explains_its_options_and_defaults() {
    for (cmd, must) in [
        (
            "fit",
            vec![
                "--time-budget",
                "[default: 180]",
                "--members",
                "--learning-rate",
                "[default: 0.003]",
                "--demo",
                "synthetic",
            ],
        ),
        (
            "evaluate",
            vec!["--paths", "[default: 128]", "--json", "--with"],
        ),
        (
            "sample",
            vec!["--rows", "--seed", "[default: 0]", "--plot", "--with"],
        ),
        ("inspect", vec!["Model written by"]),
    ] {
        let o = run(bin().args([cmd, "--help"]));
        assert!(o.status.success());
        let h = String::from_utf8_lossy(&o.stdout);
        for m in must {
            assert!(h.contains(m), "{cmd} --help lacks {m}: {h}");
        }
    }
}

#[test]
fn a_killed_fit_resumes_from_its_periodic_checkpoint() {
    let d = dir("periodic");
    let model = d.join("m.safetensors");
    let mut child = bin()
        .args([
            "fit",
            "--demo",
            "--epochs",
            "1000",
            "--checkpoint-every",
            "2",
        ])
        .arg("--out")
        .arg(&model)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let t0 = std::time::Instant::now();
    while !model.exists() {
        assert!(
            t0.elapsed().as_secs() < 120,
            "no periodic checkpoint appeared"
        );
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    std::thread::sleep(std::time::Duration::from_millis(300));
    child.kill().unwrap();
    child.wait().unwrap();
    // What the kill left is a complete checkpoint at an even epoch.
    let table = neural_sde::builtin_demo().unwrap();
    let at = neural_sde::EnsembleTrainer::resume(&model, &table).unwrap();
    // The default fit's three members train in turn, and the file is written once all have
    // trained the epoch.
    assert_eq!(at.members().len(), 3);
    let e = at.members()[0].state().epoch;
    assert!(e >= 2 && e.is_multiple_of(2), "epoch {e}");
    assert!(at.members().iter().all(|m| m.state().epoch == e));
    let resumed = d.join("resumed.safetensors");
    let o = run(bin()
        .args([
            "fit",
            "--demo",
            "--epochs",
            &(e + 2).to_string(),
            "--resume",
        ])
        .arg(&model)
        .arg("--out")
        .arg(&resumed));
    assert!(o.status.success(), "{}", stderr(&o));
    let done = neural_sde::EnsembleTrainer::resume(&resumed, &table).unwrap();
    for (now, then) in done.members().iter().zip(at.members()) {
        let h = &now.history().epochs;
        assert_eq!(h.len(), e + 2);
        assert_eq!(&h[..e], &then.history().epochs[..]);
    }
}
