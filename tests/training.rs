//! End-to-end tests of `holdfast train`, `evaluate` and `compare` on a small dataset of the demo
//! study (fictional demo grid). Run with `--release`: training is slow unoptimised.

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test code, where a panic is the failure report

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::OnceLock;

fn holdfast(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_holdfast"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(args)
        .output()
        .expect("run holdfast")
}

fn ok(args: &[&str]) -> String {
    let out = holdfast(args);
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success(),
        "holdfast {args:?} failed:\n{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    stdout
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// 240 samples of the demo study, built once for this file's tests.
fn data() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("cli-train-240");
        let _ = std::fs::remove_dir_all(&dir);
        ok(&[
            "dataset",
            "build",
            "scenarios/quillmoor-study.toml",
            "-n",
            "240",
            "-o",
            s(&dir),
            "--quiet",
        ]);
        dir
    })
}

fn temp(name: &str) -> PathBuf {
    let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join(format!("cli-train-{name}"));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[test]
fn train_then_evaluate_with_resimulation_and_a_plot() {
    let dir = temp("evaluate");
    let model = dir.join("m.hfmodel");
    let out = ok(&[
        "train",
        s(data()),
        "-o",
        s(&model),
        "--epochs",
        "3",
        "--quiet",
    ]);
    assert!(out.contains("GraphSAGE trained with the averse"), "{out}");
    assert!(out.contains("safety margin:"), "{out}");
    assert!(model.is_file());
    // The checkpoint goes once the model is written.
    assert!(!dir.join("m.hfmodel.checkpoint").exists());

    let plot = dir.join("eval.svg");
    let out = ok(&[
        "evaluate",
        s(&model),
        s(data()),
        "--plot",
        s(&plot),
        "--quiet",
    ]);
    assert!(out.contains("(test split)"), "{out}");
    let all = out
        .lines()
        .find(|l| l.starts_with("all "))
        .expect("a row for all kinds");
    // Re-simulated: the success column holds a number, not "-".
    let cols: Vec<&str> = all.split_whitespace().collect();
    assert!(cols[6].parse::<f64>().is_ok(), "{all}");
    assert!(out.contains("not a protection scheme"), "{out}");
    let svg = std::fs::read_to_string(&plot).unwrap();
    assert!(svg.contains("<svg") && svg.contains("Advised vs labelled"));

    // Another dataset's test split is not defined: the whole set, or a clear refusal.
    let out = holdfast(&[
        "evaluate",
        s(&model),
        s(data()),
        "--split",
        "all",
        "--no-simulate",
    ]);
    assert!(out.status.success());
    assert!(String::from_utf8_lossy(&out.stdout).contains("(every split)"));
}

#[test]
fn bad_model_files_and_mismatched_grids_are_named() {
    let dir = temp("bad");
    let model = dir.join("m.hfmodel");
    ok(&[
        "train",
        s(data()),
        "-o",
        s(&model),
        "--epochs",
        "1",
        "--model",
        "mlp",
        "--quiet",
    ]);
    let mut bytes = std::fs::read(&model).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 1;
    let broken = dir.join("broken.hfmodel");
    std::fs::write(&broken, &bytes).unwrap();
    let out = holdfast(&["evaluate", s(&broken), s(data())]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("broken.hfmodel: checksum mismatch"), "{err}");

    // A dataset of another grid: the large demo grid's study, a handful of samples.
    let other = dir.join("other");
    ok(&[
        "dataset",
        "build",
        "scenarios/vellmark-study.toml",
        "-n",
        "4",
        "-o",
        s(&other),
        "--quiet",
    ]);
    let out = holdfast(&["evaluate", s(&model), s(&other), "--no-simulate"]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("was trained on grid"), "{err}");

    // An existing checkpoint is not silently overwritten.
    let ck = dir.join("c.hfmodel.checkpoint");
    std::fs::write(&ck, b"junk").unwrap();
    let out = holdfast(&[
        "train",
        s(data()),
        "-o",
        s(&dir.join("c.hfmodel")),
        "--epochs",
        "1",
        "--quiet",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("pass --resume"));
}

#[test]
fn compare_prints_one_table_of_four_rows() {
    let dir = temp("compare");
    let out = ok(&[
        "compare",
        s(data()),
        "--epochs",
        "2",
        "--no-simulate",
        "--quiet",
        "--models",
        s(&dir),
    ]);
    for row in [
        "GraphSAGE / neutral",
        "GraphSAGE / averse",
        "MLP / neutral",
        "MLP / averse",
    ] {
        assert!(
            out.lines().any(|l| l.starts_with(row)),
            "{row} missing:\n{out}"
        );
    }
    assert_eq!(std::fs::read_dir(&dir).unwrap().count(), 4);
}
