//! Outputs never destroy what the user has: run as a user would, on the command line.
#[path = "support/cli.rs"]
mod cli;

use cli::*;
use std::path::{Path, PathBuf};

fn table(d: &Path) -> PathBuf {
    let p = d.join("data.csv");
    let body: String = (0..120)
        .map(|i| format!("{}.5,{}.25\n", i % 17, (i * 7) % 13))
        .collect();
    std::fs::write(&p, format!("a,b\n{body}")).unwrap();
    p
}

fn fit_model(d: &Path, data: &Path) -> PathBuf {
    let m = d.join("m.safetensors");
    let o = bin()
        .arg("fit")
        .arg(data)
        .args(["--epochs", "1", "--out"])
        .arg(&m)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    m
}

#[test]
fn an_output_that_is_an_input_or_another_output_is_refused_before_any_work() {
    let d = dir("same");
    let data = table(&d);
    let before = std::fs::read(&data).unwrap();
    // The input table as the model.
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(&data)
        .output()
        .unwrap();
    assert_input_error(&o, &["--out", "same file as the data file"]);
    // Through another name of the same file (a hard link), not only the same string.
    let alias = d.join("alias.csv");
    std::fs::hard_link(&data, &alias).unwrap();
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(&alias)
        .output()
        .unwrap();
    assert_input_error(&o, &["same file"]);
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(d.join("m.safetensors"))
        .arg("--history")
        .arg(d.join("./data.csv"))
        .output()
        .unwrap();
    assert_input_error(&o, &["--history", "same file"]);
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(d.join("m.safetensors"))
        .arg("--plot")
        .arg(d.join("m.safetensors"))
        .output()
        .unwrap();
    assert_input_error(&o, &["--plot", "--out", "same file"]);
    assert_eq!(std::fs::read(&data).unwrap(), before);
    assert!(!d.join("m.safetensors").exists());
    // The model as the samples' file.
    let m = fit_model(&d, &data);
    let model_bytes = std::fs::read(&m).unwrap();
    let o = bin()
        .arg("sample")
        .arg(&m)
        .args(["--rows", "5", "--out"])
        .arg(&m)
        .output()
        .unwrap();
    assert_input_error(&o, &["same file as the model"]);
    // The checkpoint resumed from is an input too.
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--resume")
        .arg(&m)
        .arg("--out")
        .arg(&m)
        .output()
        .unwrap();
    assert_input_error(&o, &["same file as the checkpoint to resume"]);
    assert_eq!(std::fs::read(&m).unwrap(), model_bytes);
}

#[test]
fn outputs_that_are_not_regular_files_are_refused_and_links_are_written_through() {
    let d = dir("kinds");
    let data = table(&d);
    // A folder, and a device (run as root, the old atomic save replaced /dev/null).
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(&d)
        .output()
        .unwrap();
    assert_input_error(&o, &["a folder"]);
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--out", "/dev/null"])
        .output()
        .unwrap();
    assert_input_error(&o, &["/dev/null", "not a regular file"]);
    {
        use std::os::unix::fs::FileTypeExt;
        let t = std::fs::metadata("/dev/null").unwrap().file_type();
        assert!(t.is_char_device(), "/dev/null is no longer a device");
    }
    // A missing or unwritable folder is found before training.
    let t0 = std::time::Instant::now();
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args([
            "--epochs",
            "300",
            "--out",
            "/proc/neural-sde-model.safetensors",
        ])
        .output()
        .unwrap();
    assert_input_error(&o, &["/proc", "cannot write in the folder"]);
    assert!(t0.elapsed().as_secs() < 20, "it trained first");
    let o = bin()
        .arg("fit")
        .arg(&data)
        .arg("--out")
        .arg(d.join("no/such/m.safetensors"))
        .output()
        .unwrap();
    assert_input_error(&o, &["does not exist"]);
    // A symbolic link: the link stays, its target gets the model.
    let target = d.join("real.safetensors");
    std::fs::write(&target, b"old").unwrap();
    let link = d.join("link.safetensors");
    std::os::unix::fs::symlink(&target, &link).unwrap();
    let o = bin()
        .arg("fit")
        .arg(&data)
        .args(["--epochs", "1", "--out"])
        .arg(&link)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::symlink_metadata(&link)
        .unwrap()
        .file_type()
        .is_symlink());
    assert_ne!(std::fs::read(&target).unwrap(), b"old");
    let o = bin().arg("inspect").arg(&link).output().unwrap();
    assert!(o.status.success());
}

#[test]
fn temporary_files_of_killed_saves_are_cleaned_up() {
    let d = dir("stale");
    let data = table(&d);
    // Left by a killed save (no such process) and by a live one (this test process).
    let stale = d.join(".m.safetensors.tmp-999999999");
    let live = d.join(format!(".m.safetensors.tmp-{}", std::process::id()));
    let other = d.join(".other.csv.tmp-999999999");
    for p in [&stale, &live, &other] {
        std::fs::write(p, vec![0u8; 1000]).unwrap();
    }
    fit_model(&d, &data);
    assert!(!stale.exists(), "the stale temporary file was left");
    assert!(live.exists(), "a live writer's temporary file was removed");
    assert!(
        other.exists(),
        "another output's temporary file was removed"
    );
}

#[test]
fn samples_stream_to_the_file_and_match_the_library() {
    let d = dir("stream");
    let data = table(&d);
    let m = fit_model(&d, &data);
    let out = d.join("s.csv");
    let o = bin()
        .arg("sample")
        .arg(&m)
        .args(["--rows", "9000", "--seed", "3", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    // The default fit's file holds an ensemble: four members (the default for 120 rows),
    // and beside each its fit from one Gaussian when that has a share of the weight.
    let model = neural_sde::Ensemble::load(&m).unwrap();
    assert!((4..=8).contains(&model.members().len()));
    let whole = d.join("whole.csv");
    model.generate(9000, 3).unwrap().write_csv(&whole).unwrap();
    assert_eq!(std::fs::read(&out).unwrap(), std::fs::read(&whole).unwrap());
}
