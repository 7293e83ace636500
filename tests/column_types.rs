//! Column types and missing cells as a user meets them: how a table's columns are typed,
//! which inputs are refused and with what message, and that nothing is written on failure.
//! The rules checked here are the crate's documented ones (common practice, no source).
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use neural_sde::{ColumnKind, ColumnRules, HeaderLine, Table};
use std::path::{Path, PathBuf};

fn write(d: &Path, name: &str, text: &str) -> PathBuf {
    let p = d.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn typed(p: &Path, rules: &ColumnRules) -> neural_sde::Result<Table> {
    Table::from_csv_typed(p, None, HeaderLine::Auto, rules)
}

/// A table of `n` rows: a continuous column, a text column, a small integer code, a wide
/// integer count, with a few missing cells (demo data).
fn mixed_text(n: usize) -> String {
    let mut s = String::from("x,colour,code,count\n");
    for i in 0..n {
        let x = if i % 17 == 3 {
            String::new()
        } else {
            format!("{}", (i as f64 * 0.37).sin() + i as f64 * 0.01)
        };
        let colour = ["red", "green", "blue"][i % 3];
        let colour = if i % 23 == 5 { "NA" } else { colour };
        s += &format!("{x},{colour},{},{}\n", i % 4 + 1, i * 3 % 97);
    }
    s
}

#[test]
fn columns_are_typed_by_the_documented_rules() {
    let d = dir("types");
    let p = write(&d, "t.csv", &mixed_text(120));
    let t = typed(&p, &ColumnRules::default()).unwrap();
    assert_eq!(t.kinds()[0], ColumnKind::Continuous);
    assert_eq!(t.kinds()[1].levels().unwrap(), ["blue", "green", "red"]);
    // Integers with at most 20 distinct values are categorical, levels in numeric order.
    assert_eq!(t.kinds()[2].levels().unwrap(), ["1", "2", "3", "4"]);
    // 97 distinct integers: continuous.
    assert_eq!(t.kinds()[3], ColumnKind::Continuous);
    // Empty cells and NA are missing.
    assert!(t.row(3)[0].is_nan());
    assert!(t.row(5)[1].is_nan());
    assert_eq!(t.row(0)[1], 2.0); // red
    assert_eq!(t.row(0)[2], 0.0); // code 1
                                  // Declarations override the guess.
    let rules = ColumnRules {
        categorical: vec!["count".into()],
        continuous: vec!["code".into()],
        ..Default::default()
    };
    let t = typed(&p, &rules).unwrap();
    assert_eq!(t.kinds()[2], ColumnKind::Continuous);
    assert_eq!(t.kinds()[3].levels().unwrap().len(), 97);
    // Extra missing markers.
    let q = write(&d, "q.csv", "a,b\n1.5,x\n?,y\n2.5,?\n3.25,x\n");
    let rules = ColumnRules {
        missing_markers: vec!["?".into()],
        ..Default::default()
    };
    let t = typed(&q, &rules).unwrap();
    assert!(t.row(1)[0].is_nan() && t.row(2)[1].is_nan());
    assert_eq!(t.kinds()[1].levels().unwrap(), ["x", "y"]);
    // A written table reads back the same (labels and empty cells).
    let back = d.join("back.csv");
    t.write_csv(&back).unwrap();
    let again = Table::from_csv_schema(
        &back,
        t.columns(),
        HeaderLine::Auto,
        &neural_sde::Schema {
            kinds: t.kinds().to_vec(),
            missing_markers: vec![],
        },
    )
    .unwrap();
    for (a, b) in t.values().iter().zip(again.values()) {
        assert!((a.is_nan() && b.is_nan()) || a == b);
    }
}

#[test]
fn bad_columns_are_refused_with_the_column_and_a_remedy() {
    let d = dir("refuse");
    let rules = ColumnRules::default();
    let msg = |p: &Path, r: &ColumnRules| typed(p, r).unwrap_err().to_string();
    let one = write(&d, "one.csv", "a,b\n1.5,x\n2.5,x\n3.5,\n");
    let m = msg(&one, &rules);
    assert!(
        m.contains("column 'b'") && m.contains("one level") && m.contains("leave it out"),
        "{m}"
    );
    let many: String = (0..250).map(|i| format!("{}.5,id{i}\n", i)).collect();
    let many = write(&d, "many.csv", &format!("a,b\n{many}"));
    let m = msg(&many, &rules);
    assert!(
        m.contains("column 'b'") && m.contains("more than 200") && m.contains("--continuous"),
        "{m}"
    );
    let empty = write(&d, "empty.csv", "a,b\n1.5,\n2.5,NA\n3.5,\n");
    let m = msg(&empty, &rules);
    assert!(
        m.contains("column 'b'") && m.contains("no observed cell"),
        "{m}"
    );
    let two = write(&d, "two.csv", "a,b\n1.5,x\n2.5,y\n");
    let r = ColumnRules {
        categorical: vec!["zz".into()],
        ..Default::default()
    };
    let m = msg(&two, &r);
    assert!(
        m.contains("'zz'") && m.contains("not among the columns"),
        "{m}"
    );
    let r = ColumnRules {
        continuous: vec!["b".into()],
        ..Default::default()
    };
    let m = msg(&two, &r);
    assert!(
        m.contains("declared continuous") && m.contains("line 2") && m.contains("'x'"),
        "{m}"
    );
    for lit in ["NaN", "inf", "-Infinity"] {
        let p = write(&d, "nan.csv", &format!("a,b\n1.5,2.5\n{lit},3.5\n"));
        let m = msg(&p, &rules);
        assert!(
            m.contains("line 3") && m.contains("column 'a'") && m.contains("--missing-marker"),
            "{m}"
        );
    }
    let both = ColumnRules {
        categorical: vec!["a".into()],
        continuous: vec!["a".into()],
        ..Default::default()
    };
    assert!(msg(&two, &both).contains("both categorical and continuous"));
}

#[test]
fn the_command_line_refuses_bad_tables_and_unseen_levels_and_writes_nothing() {
    let d = dir("refuse-cli");
    let out = d.join("m.safetensors");
    let fit = |args: &[&str]| {
        let mut c = bin();
        c.arg("fit").args(args).arg("--out").arg(&out);
        run(&mut c)
    };
    let one = write(&d, "one.csv", "a,b,c\n1.5,x,0.1\n2.5,x,0.7\n3.5,x,0.2\n");
    assert_input_error(&fit(&[one.to_str().unwrap()]), &["column 'b'", "one level"]);
    let nan = write(&d, "nan.csv", "a,b\n1.5,2.5\nNaN,3.5\n");
    assert_input_error(
        &fit(&[nan.to_str().unwrap()]),
        &["line 3", "'NaN'", "--missing-marker"],
    );
    assert_input_error(
        &fit(&[nan.to_str().unwrap(), "--categorical", "zz"]),
        &["'zz'", "not among the columns"],
    );
    assert!(!out.exists(), "a failed fit left {}", out.display());
    // A fitted model refuses a level it has not seen, naming the line, column and value.
    let train = write(&d, "train.csv", &mixed_text(200));
    ok(run(bin()
        .arg("fit")
        .arg(&train)
        .args(["--epochs", "2", "--out"])
        .arg(&out)));
    let other = write(
        &d,
        "other.csv",
        "x,colour,code,count\n0.5,red,1,3\n0.25,purple,2,5\n",
    );
    let filled = d.join("filled.csv");
    for cmd in [
        vec!["evaluate".to_string()],
        vec![
            "impute".to_string(),
            "--out".into(),
            filled.to_str().unwrap().into(),
        ],
    ] {
        let o = run(bin().arg(&cmd[0]).arg(&out).arg(&other).args(&cmd[1..]));
        assert_input_error(
            &o,
            &[
                "line 3",
                "column 'colour'",
                "'purple'",
                "not seen in training",
            ],
        );
    }
    assert!(!filled.exists());
    let o = run(bin()
        .args(["sample"])
        .arg(&out)
        .args(["--rows", "3", "--given", "colour=purple", "--out"])
        .arg(&filled));
    assert_input_error(&o, &["colour", "'purple'", "not seen in training"]);
    let o = run(bin()
        .args(["sample"])
        .arg(&out)
        .args(["--rows", "3", "--given", "nope=1", "--out"])
        .arg(&filled));
    assert_input_error(&o, &["unknown column 'nope'"]);
    // Copies that would not fit in memory are refused before any work: 10,000 draws of
    // 7,000 rows × 4 columns are 2.8e8 cells.
    let big = write(&d, "big.csv", &mixed_text(7000));
    let o = run(bin()
        .arg("impute")
        .arg(&out)
        .arg(&big)
        .args(["--draws", "10000", "--out"])
        .arg(&filled));
    assert_input_error(&o, &["draws", "in memory"]);
    assert!(!filled.exists());
}

#[test]
fn impute_fills_only_missing_cells_and_numbers_its_draws() {
    let d = dir("impute-cli");
    let train = write(&d, "train.csv", &mixed_text(200));
    let model = d.join("m.safetensors");
    ok(run(bin()
        .arg("fit")
        .arg(&train)
        .args(["--epochs", "3", "--out"])
        .arg(&model)));
    let info = ok(run(bin().arg("inspect").arg(&model)));
    let text = String::from_utf8_lossy(&info.stdout);
    assert!(
        text.contains("categorical") && text.contains("blue, green, red"),
        "{text}"
    );
    let filled = d.join("filled.csv");
    let o = ok(run(bin()
        .arg("impute")
        .arg(&model)
        .arg(&train)
        .args(["--draws", "3", "--paths", "32", "--out"])
        .arg(&filled)));
    assert!(String::from_utf8_lossy(&o.stdout).contains("effective sample size"));
    let input: Vec<String> = std::fs::read_to_string(&train)
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect();
    let output: Vec<String> = std::fs::read_to_string(&filled)
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect();
    assert_eq!(output[0], format!("draw,{}", input[0]));
    assert_eq!(output.len(), 1 + 3 * (input.len() - 1));
    for (k, line) in output[1..].iter().enumerate() {
        let src = &input[1 + k % (input.len() - 1)];
        let cells: Vec<&str> = line.split(',').collect();
        assert_eq!(cells[0], format!("{}", k / (input.len() - 1) + 1));
        for (a, b) in src.split(',').zip(&cells[1..]) {
            assert!(!b.is_empty() && *b != "NA", "a cell left missing: {line}");
            if !a.is_empty() && a != "NA" {
                // Observed cells are copied as they read: same number or label.
                let same = a == *b || a.parse::<f64>().ok() == b.parse::<f64>().ok();
                assert!(same, "observed cell {a} became {b}");
            }
        }
    }
    // Generated rows against the data: every statistic, named, in the JSON output.
    let o = ok(run(bin()
        .arg("evaluate")
        .arg(&model)
        .arg("--against")
        .arg(&train)
        .arg("--json")));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let c = &v["against"];
    assert_eq!(c["columns"].as_array().unwrap().len(), 4);
    assert_eq!(c["columns"][1]["statistic"], "tv");
    assert_eq!(c["columns"][0]["statistic"], "ks");
    let p = c["energy_p_value"].as_f64().unwrap();
    assert!(p > 0.0 && p <= 1.0);
    assert!(c["max_correlation_difference"].as_f64().unwrap() >= 0.0);
    // Categorical columns are drawn as bar charts of level frequencies, labelled.
    let svg = d.join("s.svg");
    ok(run(bin()
        .arg("sample")
        .arg(&model)
        .args(["--rows", "50", "--out"])
        .arg(d.join("s.csv"))
        .arg("--plot")
        .arg(&svg)
        .arg("--data")
        .arg(&train)));
    let text = std::fs::read_to_string(&svg).unwrap();
    assert!(
        text.lines().any(|l| l.trim() == "green") && text.contains("<rect"),
        "no labelled bars"
    );
    // The filled table reads back with the model's types.
    let single = d.join("one.csv");
    ok(run(bin()
        .arg("impute")
        .arg(&model)
        .arg(&train)
        .args(["--paths", "16", "--out"])
        .arg(&single)));
    ok(run(bin()
        .arg("evaluate")
        .arg(&model)
        .arg(&single)
        .args(["--paths", "4"])));
}
