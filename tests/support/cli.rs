//! Running the command-line tool as a user would, for the CLI tests.
#![allow(dead_code)]

use std::path::PathBuf;
use std::process::{Command, Output};

/// The built `neural-sde` binary, one thread.
pub fn bin() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_neural-sde"));
    c.env("RAYON_NUM_THREADS", "1");
    c
}

/// A fresh, empty folder for test `name` of this process.
pub fn dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("neural-sde-cli-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Runs `c` to the end.
pub fn run(c: &mut Command) -> Output {
    c.output().unwrap()
}

/// What the command printed on stderr.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// The command succeeded (else fail with its stderr).
pub fn ok(o: Output) -> Output {
    assert!(o.status.success(), "{}", stderr(&o));
    o
}

/// Exit status 2, a single short `error:` line naming each of `contains`, no panic or
/// backtrace.
pub fn assert_input_error(o: &Output, contains: &[&str]) {
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(2), "stderr: {e}");
    let lines: Vec<&str> = e.lines().filter(|l| !l.trim().is_empty()).collect();
    assert_eq!(lines.len(), 1, "expected one line, got: {e}");
    assert!(lines[0].starts_with("error:"), "{e}");
    assert!(!e.contains("panicked") && !e.contains("backtrace"), "{e}");
    assert!(e.len() < 2500, "a {}-byte message", e.len());
    for c in contains {
        assert!(e.contains(c), "missing '{c}' in: {e}");
    }
}
