//! Checkpoints: round trip, exact resumption, interrupted saves, corrupt files, and plain
//! safetensors compatibility.
use std::collections::HashMap;
use std::path::PathBuf;

use neural_sde::*;

fn table() -> Table {
    // Demo rows from a fixed generator (the checks compare the code with itself across a
    // save/load boundary, not with a reference value).
    let z = standard_normals(&mut generator(3, 0), 300 * 3);
    let rows = z
        .chunks_exact(3)
        .map(|e| vec![e[0], e[0] * e[0] + 0.3 * e[1], e[2] - 0.5 * e[0]])
        .collect();
    Table::new(vec!["a".into(), "b".into(), "c".into()], rows).unwrap()
}

fn cfg() -> (LatentConfig, TrainConfig) {
    let m = LatentConfig {
        solver: SolverConfig {
            n_steps: 8,
            ..Default::default()
        },
        ..Default::default()
    };
    let t = TrainConfig {
        epochs: 4,
        patience: 100,
        min_steps_per_epoch: 5,
        batch_size: 32,
        ..Default::default()
    };
    (m, t)
}

fn dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("neural-sde-ck-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn weights(m: &TabularModel) -> Vec<(String, Vec<u32>)> {
    sorted_vars(m.latent().varmap())
        .unwrap()
        .into_iter()
        .map(|(n, v)| {
            (
                n,
                v.as_tensor()
                    .flatten_all()
                    .unwrap()
                    .to_vec1::<f32>()
                    .unwrap()
                    .iter()
                    .map(|x| x.to_bits())
                    .collect(),
            )
        })
        .collect()
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter().map(|x| x.to_bits()).collect()
}

#[test]
fn round_trip_gives_identical_outputs() {
    let t = table();
    let (m, c) = cfg();
    let mut tr = Trainer::new(&t, m, TrainConfig { epochs: 2, ..c }).unwrap();
    tr.fit().unwrap();
    let d = dir("roundtrip");
    let p = d.join("model.safetensors");
    tr.save(&p).unwrap();
    let before = tr.into_model();
    let after = TabularModel::load(&p).unwrap();
    assert_eq!(weights(&before), weights(&after));
    assert_eq!(before.columns(), after.columns());
    assert_eq!(before.scaler(), after.scaler());
    assert_eq!(before.history(), after.history());
    let e1 = before.evaluate(&t, EvalOptions::new(4, 5)).unwrap();
    let e2 = after.evaluate(&t, EvalOptions::new(4, 5)).unwrap();
    assert_eq!(bits(&e1.loglik_rows), bits(&e2.loglik_rows));
    let g1 = before.generate(50, 9).unwrap();
    let g2 = after.generate(50, 9).unwrap();
    assert_eq!(bits(g1.values()), bits(g2.values()));
    // A model saved without training state loads too, and cannot be resumed.
    let p2 = d.join("inference.safetensors");
    after.save(&p2).unwrap();
    assert_eq!(weights(&TabularModel::load(&p2).unwrap()), weights(&after));
    let e = Trainer::resume(&p2, &t).unwrap_err().to_string();
    assert!(e.contains("no training state"), "{e}");
}

#[test]
fn resuming_continues_the_same_loss_sequence_bit_for_bit() {
    let t = table();
    let (m, c) = cfg();
    let mut full = Trainer::new(&t, m.clone(), c.clone()).unwrap();
    full.fit().unwrap();
    let mut first = Trainer::new(&t, m, c).unwrap();
    first.run_epoch().unwrap();
    first.run_epoch().unwrap();
    let d = dir("resume");
    let p = d.join("ck.safetensors");
    first.save(&p).unwrap();
    drop(first);
    let mut resumed = Trainer::resume(&p, &t).unwrap();
    resumed.fit().unwrap();
    let a = &full.history().epochs;
    let b = &resumed.history().epochs;
    assert_eq!(a.len(), 4);
    assert_eq!(a.len(), b.len());
    for (x, y) in a.iter().zip(b) {
        assert_eq!(
            x.train_elbo.to_bits(),
            y.train_elbo.to_bits(),
            "epoch {}",
            x.epoch
        );
        assert_eq!(
            x.val_elbo.map(f64::to_bits),
            y.val_elbo.map(f64::to_bits),
            "epoch {}",
            x.epoch
        );
        assert_eq!(x.grad_norm.to_bits(), y.grad_norm.to_bits());
        assert_eq!(x.learning_rate.to_bits(), y.learning_rate.to_bits());
    }
    assert_eq!(weights(full.model()), weights(resumed.model()));
    // Resuming on another table is refused.
    let other = t.take_rows(&(0..299).collect::<Vec<_>>()).unwrap();
    let e = Trainer::resume(&p, &other).unwrap_err().to_string();
    assert!(e.contains("not the table"), "{e}");
}

/// Child side of the interrupted-save test: saves a different model over and over until
/// killed. Ignored in normal runs; the parent test runs it with `--ignored`.
#[test]
#[ignore = "helper process of a_save_killed_midway_leaves_a_complete_file"]
fn child_saver() {
    let path = std::env::var("NEURAL_SDE_CHILD_SAVE").expect("run by the parent test only");
    let t = table();
    let (m, c) = cfg();
    // One Gaussian start: the mixture's EM would take longer than the kill delays below.
    let m = LatentConfig {
        control: MlpConfig {
            width: 256,
            ..Default::default()
        },
        noise_components: Some(1),
        ..m
    };
    let tr = Trainer::new(&t, m, TrainConfig { seed: 77, ..c }).unwrap();
    loop {
        tr.save(&path).unwrap();
    }
}

#[test]
fn a_save_killed_midway_leaves_a_complete_file() {
    let t = table();
    let (m, c) = cfg();
    // One Gaussian start: the mixture's EM would take longer than the kill delays below.
    let m = LatentConfig {
        control: MlpConfig {
            width: 256,
            ..Default::default()
        },
        noise_components: Some(1),
        ..m
    };
    let d = dir("kill");
    let p = d.join("ck.safetensors");
    let old = Trainer::new(&t, m.clone(), c.clone()).unwrap();
    old.save(&p).unwrap();
    let old_w = weights(old.model());
    let new_w = weights(
        Trainer::new(&t, m, TrainConfig { seed: 77, ..c })
            .unwrap()
            .model(),
    );
    let exe = std::env::current_exe().unwrap();
    let mut saw_new = 0;
    for delay_ms in [30u64, 55, 80, 120, 170] {
        let mut child = std::process::Command::new(&exe)
            .args([
                "--exact",
                "child_saver",
                "--ignored",
                "--nocapture",
                "--test-threads",
                "1",
            ])
            .env("NEURAL_SDE_CHILD_SAVE", &p)
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(delay_ms));
        child.kill().unwrap(); // SIGKILL: no cleanup runs
        child.wait().unwrap();
        let loaded = TabularModel::load(&p).expect("the checkpoint must stay loadable");
        let w = weights(&loaded);
        assert!(
            w == old_w || w == new_w,
            "the file holds neither the old nor the new model"
        );
        saw_new += usize::from(w == new_w);
    }
    // The child did write (otherwise the test would prove nothing).
    assert!(saw_new > 0, "the child never completed a save");
}

fn rewrite(
    src: &std::path::Path,
    dst: &std::path::Path,
    edit: impl Fn(&mut HashMap<String, String>, &mut Vec<(String, candle_core::Tensor)>),
) {
    let bytes = std::fs::read(src).unwrap();
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let mut meta = md.metadata().clone().unwrap();
    let mut tensors: Vec<(String, candle_core::Tensor)> =
        candle_core::safetensors::load_buffer(&bytes, &candle_core::Device::Cpu)
            .unwrap()
            .into_iter()
            .collect();
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    edit(&mut meta, &mut tensors);
    safetensors::tensor::serialize_to_file(tensors, Some(meta), dst).unwrap();
}

#[test]
fn bad_files_are_errors_that_say_what_is_wrong() {
    let t = table();
    let (m, c) = cfg();
    let tr = Trainer::new(&t, m, TrainConfig { epochs: 1, ..c }).unwrap();
    let d = dir("bad");
    let good = d.join("good.safetensors");
    tr.save(&good).unwrap();
    let bytes = std::fs::read(&good).unwrap();
    let check = |name: &str, data: &[u8], want: &str| {
        let p = d.join(name);
        std::fs::write(&p, data).unwrap();
        let e = TabularModel::load(&p).unwrap_err();
        assert!(matches!(e, Error::Checkpoint { .. }), "{name}: {e}");
        assert!(e.to_string().contains(want), "{name}: {e}");
    };
    check("truncated", &bytes[..bytes.len() / 2], "truncated");
    check("short", &bytes[..5], "truncated");
    check(
        "garbage",
        b"this is not a model at all, just some text",
        "not a valid safetensors",
    );
    check("empty", b"", "not a valid safetensors");
    let missing = TabularModel::load(d.join("nope.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(missing.contains("not found"), "{missing}");

    let p = d.join("version.safetensors");
    rewrite(&good, &p, |meta, _| {
        let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        c["format_version"] = "99".into();
        meta.insert("neural-sde".into(), c.to_string());
    });
    let e = TabularModel::load(&p).unwrap_err().to_string();
    assert!(
        e.contains("\"99\"") && e.contains("versions 1 and 2"),
        "{e}"
    );

    // A scaler whose scale is not finite and positive would mirror or collapse a column.
    for (name, bad) in [
        ("negative", serde_json::json!(-1.0)),
        ("zero", serde_json::json!(0.0)),
        ("null", serde_json::Value::Null),
    ] {
        let p = d.join(format!("scale-{name}.safetensors"));
        rewrite(&good, &p, |meta, _| {
            let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
            c["header"]["scaler"]["scale"][1] = bad.clone();
            meta.insert("neural-sde".into(), c.to_string());
        });
        let e = TabularModel::load(&p).unwrap_err().to_string();
        assert!(
            e.contains("scale") || e.contains("not valid"),
            "{name}: {e}"
        );
        assert!(inspect_checkpoint(&p).is_err(), "{name}");
    }

    let p = d.join("foreign.safetensors");
    rewrite(&good, &p, |meta, _| {
        meta.remove("neural-sde");
    });
    assert!(TabularModel::load(&p)
        .unwrap_err()
        .to_string()
        .contains("not written by neural-sde"));

    let p = d.join("shape.safetensors");
    rewrite(&good, &p, |_, ts| {
        let i = ts
            .iter()
            .position(|(n, _)| n == "decoder.linear.bias")
            .unwrap();
        ts[i].1 = candle_core::Tensor::zeros(5, candle_core::DType::F32, &candle_core::Device::Cpu)
            .unwrap();
    });
    let e = TabularModel::load(&p).unwrap_err().to_string();
    assert!(
        e.contains("decoder.linear.bias") && e.contains("[5]") && e.contains("[3]"),
        "{e}"
    );

    let p = d.join("dtype.safetensors");
    rewrite(&good, &p, |_, ts| {
        let i = ts.iter().position(|(n, _)| n == "prior.out.bias").unwrap();
        ts[i].1 = ts[i].1.to_dtype(candle_core::DType::F64).unwrap();
    });
    let e = TabularModel::load(&p).unwrap_err().to_string();
    assert!(e.contains("prior.out.bias") && e.contains("F64"), "{e}");

    let p = d.join("missing.safetensors");
    rewrite(&good, &p, |_, ts| {
        ts.retain(|(n, _)| n != "prior.layer0.weight")
    });
    let e = TabularModel::load(&p).unwrap_err().to_string();
    assert!(e.contains("prior.layer0.weight is missing"), "{e}");

    let p = d.join("extra.safetensors");
    rewrite(&good, &p, |_, ts| {
        ts.push((
            "stray".into(),
            candle_core::Tensor::zeros(2, candle_core::DType::F32, &candle_core::Device::Cpu)
                .unwrap(),
        ))
    });
    let e = TabularModel::load(&p).unwrap_err().to_string();
    assert!(e.contains("unexpected tensor stray"), "{e}");
}

#[test]
fn other_safetensors_readers_read_the_file() {
    let t = table();
    let (m, c) = cfg();
    let tr = Trainer::new(&t, m, TrainConfig { epochs: 1, ..c }).unwrap();
    let d = dir("plain");
    let p = d.join("m.safetensors");
    tr.save(&p).unwrap();
    // The reference reader of the format (the `safetensors` crate) and candle's loader.
    let bytes = std::fs::read(&p).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let names = st.names();
    assert!(names.contains(&"decoder.linear.weight"));
    assert!(names.contains(&"optim.m.decoder.linear.weight"));
    assert!(names.contains(&"best.decoder.linear.weight"));
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let meta = md.metadata().clone().unwrap();
    let container: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
    assert_eq!(container["format"], "neural-sde-model");
    assert_eq!(container["format_version"], "2");
    let header = &container["header"];
    assert_eq!(header["columns"], serde_json::json!(["a", "b", "c"]));
    assert!(header["state"]["data_rng"].is_object());
    let loaded = candle_core::safetensors::load(&p, &candle_core::Device::Cpu).unwrap();
    assert_eq!(loaded["decoder.linear.weight"].dims(), &[3, 3]);
}

#[test]
fn files_of_format_version_1_still_load_and_non_finite_weights_are_never_written() {
    let t = table();
    let (m, c) = cfg();
    let tr = Trainer::new(&t, m, TrainConfig { epochs: 1, ..c }).unwrap();
    let d = dir("legacy");
    let p = d.join("v2.safetensors");
    tr.save(&p).unwrap();
    // Version 1 kept format, format_version, crate_version and header as four entries.
    let v1 = d.join("v1.safetensors");
    rewrite(&p, &v1, |meta, _| {
        let c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        meta.clear();
        meta.insert("format".into(), c["format"].as_str().unwrap().into());
        meta.insert("format_version".into(), "1".into());
        meta.insert("crate_version".into(), "0.1.0".into());
        meta.insert("header".into(), c["header"].to_string());
    });
    let a = TabularModel::load(&p).unwrap();
    let b = TabularModel::load(&v1).unwrap();
    assert_eq!(weights(&a), weights(&b));
    assert_eq!(
        Trainer::resume(&v1, &t).unwrap().state(),
        Trainer::resume(&p, &t).unwrap().state()
    );
    // Files written before the start's count looked at the validation rows name the flag of a
    // chosen mixture start `mixture_by_bic`; they read the same.
    let older = d.join("mixture_by_bic.safetensors");
    rewrite(&p, &older, |meta, _| {
        let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        let state = c["header"]["state"].as_object_mut().unwrap();
        assert!(state.remove("mixture_chosen").is_some());
        state.insert("mixture_by_bic".into(), true.into());
        meta.insert("neural-sde".into(), c.to_string());
    });
    let resumed = Trainer::resume(&older, &t).unwrap();
    assert!(resumed.state().mixture_chosen);
    // A NaN weight: saving refuses and writes nothing.
    let var = &sorted_vars(tr.model().latent().varmap()).unwrap()[0].1;
    let nan = (var.as_tensor() * f64::NAN).unwrap();
    var.set(&nan).unwrap();
    let out = d.join("nan.safetensors");
    let e = tr.save(&out).unwrap_err();
    assert!(matches!(e, Error::NonFinite { .. }), "{e}");
    assert!(!out.exists());
    let e = tr.model().save(&out).unwrap_err();
    assert!(matches!(e, Error::NonFinite { .. }), "{e}");
    assert!(!out.exists());
}

/// Rewrites the checkpoint `src` to `dst` with `edit` applied to its JSON header.
fn rewrite_header(
    src: &std::path::Path,
    dst: &std::path::Path,
    edit: impl Fn(&mut serde_json::Value),
) {
    rewrite(src, dst, |meta, _| {
        let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        edit(&mut c["header"]);
        meta.insert("neural-sde".into(), c.to_string());
    });
}

/// The test table and a checkpoint of a one-epoch fit with `components` noise components,
/// saved in a fresh folder named after `name`.
fn one_epoch_checkpoint(components: usize, name: &str) -> (Table, PathBuf) {
    let t = table();
    let (m, c) = cfg();
    let m = LatentConfig {
        noise_components: Some(components),
        ..m
    };
    let tr = Trainer::new(&t, m, TrainConfig { epochs: 1, ..c }).unwrap();
    let good = dir(name).join("good.safetensors");
    tr.save(&good).unwrap();
    (t, good)
}

#[test]
fn a_header_with_a_bad_noise_component_count_is_refused() {
    // Zero components, more than the limit, and a count whose parameters the file lacks are
    // errors that name what is wrong, never a panic or a huge allocation.
    let (_, good) = one_epoch_checkpoint(1, "noise");
    for (name, count, want) in [
        ("zero", 0u64, "noise_components"),
        ("huge", 1 << 40, "noise_components"),
        ("absent", 3, "noise_"),
    ] {
        let p = good.with_file_name(format!("noise-{name}.safetensors"));
        rewrite_header(&good, &p, |h| {
            h["model_config"]["noise_components"] = count.into();
        });
        let e = TabularModel::load(&p).unwrap_err().to_string();
        assert!(e.contains(want), "{name}: {e}");
    }
}

#[test]
fn a_hostile_mixture_learning_rate_scale_is_refused_and_an_older_checkpoint_resumes_at_one() {
    // The factor on a mixture fit's learning rate comes from the file on resume: out of
    // (0, 1] it is an error naming the field; a header written before the field existed
    // resumes at the factor it was trained with, 1.
    let (t, good) = one_epoch_checkpoint(2, "mixture-rate");
    for (name, value, want) in [
        (
            "zero",
            serde_json::json!(0.0),
            "mixture_learning_rate_scale",
        ),
        (
            "big",
            serde_json::json!(1e300),
            "mixture_learning_rate_scale",
        ),
        ("text", serde_json::json!("fast"), "header is not valid"),
    ] {
        let p = good.with_file_name(format!("rate-{name}.safetensors"));
        rewrite_header(&good, &p, |h| {
            h["train_config"]["mixture_learning_rate_scale"] = value.clone();
        });
        let e = Trainer::resume(&p, &t).unwrap_err().to_string();
        assert!(e.contains(want), "{name}: {e}");
    }
    let p = good.with_file_name("rate-absent.safetensors");
    rewrite_header(&good, &p, |h| {
        h["train_config"]
            .as_object_mut()
            .unwrap()
            .remove("mixture_learning_rate_scale");
    });
    let resumed = Trainer::resume(&p, &t).unwrap();
    assert_eq!(resumed.config().mixture_learning_rate_scale, 1.0);
    assert_eq!(
        Trainer::resume(&good, &t)
            .unwrap()
            .config()
            .mixture_learning_rate_scale,
        1.0 / 3.0
    );
}

#[test]
fn the_weight_average_is_checked_on_resume_and_an_older_checkpoint_resumes_without_one() {
    // The running average of the weights is training state like the optimiser's moments:
    // a file with some of its tensors missing, one of the wrong shape, or averaged weights
    // beside a decay of 0, is refused with an error naming it; a file written before the average existed (no `average.*`
    // tensors, no `weight_average` in the header) resumes without averaging, as it trained.
    let t = table();
    let (m, c) = cfg();
    let mut tr = Trainer::new(&t, m, TrainConfig { epochs: 2, ..c }).unwrap();
    tr.run_epoch().unwrap();
    let d = dir("average");
    let good = d.join("good.safetensors");
    tr.save(&good).unwrap();
    let names = |p: &std::path::Path| -> Vec<String> {
        let bytes = std::fs::read(p).unwrap();
        let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        st.names().into_iter().map(str::to_string).collect()
    };
    let averaged = names(&good)
        .into_iter()
        .filter(|n| n.starts_with("average."))
        .count();
    let vars = sorted_vars(tr.model().latent().varmap()).unwrap().len();
    assert_eq!(averaged, vars, "one averaged tensor per weight");

    let p = d.join("some-missing.safetensors");
    rewrite(&good, &p, |_, ts| {
        ts.retain(|(n, _)| n != "average.prior.layer0.weight")
    });
    let e = Trainer::resume(&p, &t).unwrap_err().to_string();
    assert!(e.contains("some average.* weights missing"), "{e}");

    let p = d.join("average-shape.safetensors");
    rewrite(&good, &p, |_, ts| {
        let i = ts
            .iter()
            .position(|(n, _)| n == "average.decoder.linear.bias")
            .unwrap();
        ts[i].1 = candle_core::Tensor::zeros(5, candle_core::DType::F32, &candle_core::Device::Cpu)
            .unwrap();
    });
    let e = Trainer::resume(&p, &t).unwrap_err().to_string();
    assert!(
        e.contains("average.decoder.linear.bias") && e.contains("[5]"),
        "{e}"
    );

    // Averaged weights with a decay of 0, which never updates them: refused.
    let p = d.join("stale.safetensors");
    rewrite(&good, &p, |meta, _| {
        let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        c["header"]["train_config"]["weight_average"] = 0.0.into();
        meta.insert("neural-sde".into(), c.to_string());
    });
    let e = Trainer::resume(&p, &t).unwrap_err().to_string();
    assert!(e.contains("weight_average 0"), "{e}");

    let p = d.join("older.safetensors");
    rewrite(&good, &p, |meta, ts| {
        ts.retain(|(n, _)| !n.starts_with("average."));
        let mut c: serde_json::Value = serde_json::from_str(&meta["neural-sde"]).unwrap();
        c["header"]["train_config"]
            .as_object_mut()
            .unwrap()
            .remove("weight_average");
        meta.insert("neural-sde".into(), c.to_string());
    });
    let mut older = Trainer::resume(&p, &t).unwrap();
    assert_eq!(older.config().weight_average, 0.0);
    assert_eq!(
        Trainer::resume(&good, &t).unwrap().config().weight_average,
        0.99
    );
    // It trains on without an average, and its checkpoints hold none.
    older.run_epoch().unwrap();
    let out = d.join("older-after.safetensors");
    older.save(&out).unwrap();
    assert!(!names(&out).iter().any(|n| n.starts_with("average.")));
}
