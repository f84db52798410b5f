//! End-to-end tests of `holdfast train`, `evaluate`, `compare`, `advise`, `serve` and `demo` on
//! the demo study (fictional demo grid). Run with `--release`: training is slow unoptimised.

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
    assert!(out.contains("shards held in memory"), "{out}");
    // With nothing held in memory every pass reads the shards again: the same model.
    let from_disk = dir.join("from-disk.hfmodel");
    let out = ok(&[
        "train",
        s(data()),
        "-o",
        s(&from_disk),
        "--epochs",
        "3",
        "--memory-mb",
        "0",
        "--quiet",
    ]);
    assert!(out.contains("0 of "), "{out}");
    assert!(out.contains("read from disk on every pass"), "{out}");
    assert_eq!(
        std::fs::read(&from_disk).unwrap(),
        std::fs::read(&model).unwrap()
    );

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

#[test]
fn the_demo_runs_the_whole_pipeline_on_a_small_dataset() {
    let dir = temp("demo");
    let out = ok(&[
        "demo",
        "--samples",
        "300",
        "--epochs",
        "3",
        "--out",
        s(&dir),
        "--quiet",
    ]);
    for needle in [
        "fictional",
        "=== 1. the grid at nominal load",
        "=== 2. labelled dataset: 300 samples",
        "GraphSAGE / averse",
        "MLP / neutral",
        "=== 4. one advised action",
        "labelled minimum shed",
        "Advice: shed",
        "Re-check runs:",
        "not a protection scheme",
        "licensed engineers",
    ] {
        assert!(out.contains(needle), "`{needle}` missing:\n{out}");
    }
    for file in [
        "advice.svg",
        "request.json",
        "snapshot.json",
        "models/sage-averse.hfmodel",
    ] {
        assert!(dir.join(file).exists(), "{file} missing");
    }
    // A second run resumes the dataset instead of building it again.
    let again = ok(&[
        "demo",
        "--samples",
        "300",
        "--epochs",
        "1",
        "--out",
        s(&dir),
        "--quiet",
    ]);
    assert!(
        again.contains("2 shards (2 kept from an earlier run)"),
        "{again}"
    );
    // The request the demo wrote is answered by `serve`.
    let request = std::fs::read_to_string(dir.join("request.json")).unwrap();
    let answer = serve(&dir.join("models/sage-averse.hfmodel"), &request);
    assert!(answer.contains("\"path\""), "{answer}");
}

/// Runs `holdfast serve MODEL scenarios/quillmoor.toml` with `input` on stdin; returns stdout.
fn serve(model: &Path, input: &str) -> String {
    use std::io::Write;
    let mut child = Command::new(env!("CARGO_BIN_EXE_holdfast"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(["serve", s(model), "scenarios/quillmoor.toml"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The bundled example request (a case of the demo study) and the contingency it names, in the
/// command-line form.
fn bundled_request() -> (String, String) {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/quillmoor-request.json"),
    )
    .unwrap();
    let request: holdfast_infer::Request = serde_json::from_str(&text).unwrap();
    let contingency = request.contingency.text();
    (text, contingency)
}

#[test]
fn the_shipped_model_advises_on_the_bundled_case_from_the_command_line_and_the_service() {
    let model = Path::new("models/quillmoor.hfmodel");
    let (request, contingency) = bundled_request();
    let advise = |extra: &[&str]| {
        let mut args = vec![
            "advise",
            s(model),
            "scenarios/quillmoor.toml",
            "--snapshot",
            "scenarios/quillmoor-snapshot.json",
            "--contingency",
            &contingency,
        ];
        args.extend_from_slice(extra);
        ok(&args)
    };
    let out = advise(&[]);
    assert!(out.contains("Advice: shed"), "{out}");
    assert!(out.contains("-> STABLE"), "{out}");
    assert!(out.contains("licensed engineers"), "{out}");
    // The request's own action delay, so the two surfaces answer the same question.
    let delay: serde_json::Value = serde_json::from_str(&request).unwrap();
    let delay = delay["action_delay_s"].as_f64().unwrap().to_string();
    let json = advise(&["--action-delay", &delay, "--json"]);
    let advice: serde_json::Value = serde_json::from_str(json.trim()).unwrap();
    assert_eq!(advice["outcome"], "stable", "{advice}");

    // Two requests and a broken line: three answers, in order, the broken one an error.
    let input = format!(
        "{}\n{{\"id\": \"x\", \"snapshot\": 1}}\n{}\n",
        request.trim(),
        request.trim()
    );
    let answers: Vec<serde_json::Value> = serve(model, &input)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(answers.len(), 3);
    assert_eq!(answers[0]["shed"], advice["shed"]);
    assert_eq!(answers[1]["id"], "x");
    assert!(
        answers[1]["error"].as_str().unwrap().contains("snapshot"),
        "{}",
        answers[1]
    );
    assert_eq!(answers[2]["shed"], advice["shed"]);
}

#[test]
fn a_bad_snapshot_file_is_named_with_the_field() {
    let dir = temp("bad-snapshot");
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/quillmoor-snapshot.json"),
    )
    .unwrap();
    let mut v: serde_json::Value = serde_json::from_str(&text).unwrap();
    v["load_p_mw"][2] = serde_json::json!("lots");
    let bad = dir.join("snapshot.json");
    std::fs::write(&bad, serde_json::to_string_pretty(&v).unwrap()).unwrap();
    let (_, contingency) = bundled_request();
    let out = holdfast(&[
        "advise",
        "models/quillmoor.hfmodel",
        "scenarios/quillmoor.toml",
        "--snapshot",
        s(&bad),
        "--contingency",
        &contingency,
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("snapshot.json: field `load_p_mw[2]`: invalid type: string \"lots\"")
            && err.contains("line "),
        "{err}"
    );
}
