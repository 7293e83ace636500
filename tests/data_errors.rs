//! Each bad input is a typed error naming the file, row and column and what to do; nothing
//! is written.
use std::path::{Path, PathBuf};

use neural_sde::{Error, LatentConfig, Table, TrainConfig, Trainer};

fn tmpdir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!(
        "neural-sde-data-errors-{name}-{}",
        std::process::id()
    ));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn files_in(d: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(d)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

/// Writes `content`, loads it, and returns the error message (asserting the kind and that
/// the folder holds only the input afterwards).
fn load_err(name: &str, content: &str) -> String {
    let d = tmpdir(name);
    let p = d.join("in.csv");
    std::fs::write(&p, content).unwrap();
    let e = Table::from_csv(&p, None).unwrap_err();
    assert!(matches!(e, Error::Data { .. }), "{e}");
    let msg = e.to_string();
    assert!(
        msg.contains("in.csv"),
        "message does not name the file: {msg}"
    );
    assert_eq!(files_in(&d), vec!["in.csv".to_string()]);
    msg
}

#[test]
fn missing_file() {
    let e = Table::from_csv("/nonexistent/dir/x.csv", None).unwrap_err();
    assert!(matches!(e, Error::Data { .. }));
    assert!(
        e.to_string().contains("/nonexistent/dir/x.csv") && e.to_string().contains("not found"),
        "{e}"
    );
}

#[test]
fn empty_file_and_header_only() {
    assert!(load_err("empty", "").contains("empty"));
    assert!(load_err("blank", "  \n\n").contains("empty"));
    assert!(load_err("header", "a,b,c\n").contains("no data rows"));
}

#[test]
fn ragged_rows() {
    let m = load_err("ragged", "a,b,c\n1,2,3\n4,5\n");
    assert!(
        m.contains("line 3") && m.contains("2 fields") && m.contains("3 columns"),
        "{m}"
    );
}

#[test]
fn non_numeric_cells() {
    let m = load_err("text", "a,b\n1,2\n3,abc\n");
    assert!(
        m.contains("line 3") && m.contains("column 'b'") && m.contains("'abc'"),
        "{m}"
    );
    let m = load_err("blankcell", "a,b\n1,\n");
    assert!(m.contains("line 2") && m.contains("column 'b'"), "{m}");
}

#[test]
fn non_finite_values() {
    for (i, bad) in ["NaN", "inf", "-inf", "1e999"].iter().enumerate() {
        let m = load_err(&format!("nonfinite{i}"), &format!("a,b\n1,2\n{bad},3\n"));
        assert!(
            m.contains("line 3") && m.contains("column 'a'") && m.contains("not finite"),
            "{m}"
        );
    }
}

#[test]
fn duplicate_and_unknown_column_names() {
    let m = load_err("dup", "a,b,a\n1,2,3\n");
    assert!(
        m.contains("'a' appears twice") && m.contains("columns 1 and 3"),
        "{m}"
    );
    let d = tmpdir("unknown");
    let p = d.join("in.csv");
    std::fs::write(&p, "a,b\n1,2\n").unwrap();
    let e = Table::from_csv(&p, Some(&["z".to_string()]))
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("unknown column 'z'") && e.contains("a, b"),
        "{e}"
    );
    // Selecting columns skips non-numeric columns that are not selected.
    std::fs::write(&p, "name,x,y\nfoo,1,2\nbar,3,5\n").unwrap();
    let t = Table::from_csv(&p, Some(&["y".to_string(), "x".to_string()])).unwrap();
    assert_eq!(t.columns(), &["y".to_string(), "x".to_string()]);
    assert_eq!(t.row(1), &[5.0, 3.0]);
}

#[test]
fn constant_column_cannot_be_standardised() {
    let rows: Vec<Vec<f64>> = (0..100)
        .map(|i| vec![i as f64, 2.5, (i * i) as f64])
        .collect();
    let t = Table::new(vec!["a".into(), "flat".into(), "c".into()], rows).unwrap();
    let e = Trainer::new(&t, LatentConfig::default(), TrainConfig::default()).unwrap_err();
    assert!(matches!(e, Error::Data { .. }));
    let m = e.to_string();
    assert!(
        m.contains("column 'flat' is constant") && m.contains("2.5"),
        "{m}"
    );
}

#[test]
fn fewer_rows_than_the_batch_needs() {
    let rows: Vec<Vec<f64>> = (0..50).map(|i| vec![i as f64, (i % 7) as f64]).collect();
    let t = Table::new(vec!["a".into(), "b".into()], rows).unwrap();
    let e = Trainer::new(&t, LatentConfig::default(), TrainConfig::default()).unwrap_err();
    let m = e.to_string();
    assert!(
        m.contains("40 training rows") && m.contains("batch size 64"),
        "{m}"
    );
}

#[test]
fn in_memory_tables_are_checked_too() {
    let e = Table::new(vec!["a".into()], vec![vec![1.0], vec![f64::NAN]])
        .unwrap_err()
        .to_string();
    assert!(e.contains("row 2") && e.contains("column 'a'"), "{e}");
    let e = Table::new(vec!["a".into(), "b".into()], vec![vec![1.0]])
        .unwrap_err()
        .to_string();
    assert!(e.contains("row 1 has 1 values"), "{e}");
}
