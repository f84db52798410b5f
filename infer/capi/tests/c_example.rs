//! Compiles the C example (`examples/advise.c`) against the shared library and the header
//! with the system C compiler, and runs it: a served answer, a refused request and a model
//! that cannot be opened.

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test code, where a panic is the failure report

use std::path::{Path, PathBuf};
use std::process::Command;

#[path = "../../tests/common/mod.rs"]
mod common;
use common::{grid, model, snapshot, unit_trip};
use holdfast_infer::Request;

/// The folder holding `libholdfast.so`: the profile folder above this test's `deps`. Cargo
/// builds only the Rust library for tests, so the shared library is built here, with the
/// same cargo, profile and target folder.
fn library_dir() -> PathBuf {
    let exe = std::env::current_exe().unwrap();
    let profile_dir = exe.parent().unwrap().parent().unwrap().to_path_buf();
    let target_dir = profile_dir.parent().unwrap();
    let release = profile_dir.file_name().is_some_and(|n| n == "release");
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".to_string());
    let mut build = Command::new(&cargo);
    build
        .args([
            "build",
            "-p",
            "holdfast-infer-capi",
            "--lib",
            "--target-dir",
        ])
        .arg(target_dir)
        .current_dir(env!("CARGO_MANIFEST_DIR"));
    if release {
        build.arg("--release");
    }
    let status = build
        .status()
        .unwrap_or_else(|e| panic!("cannot run `{cargo}`: {e}"));
    assert!(status.success(), "building libholdfast failed");
    profile_dir
}

fn compile_example(out: &Path) {
    let here = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let lib = library_dir();
    assert!(
        lib.join("libholdfast.so").exists(),
        "{} has no libholdfast.so",
        lib.display()
    );
    let cc = std::env::var("CC").unwrap_or_else(|_| "cc".to_string());
    let status = Command::new(&cc)
        .arg(here.join("examples/advise.c"))
        .arg("-I")
        .arg(here.join("include"))
        .arg("-L")
        .arg(&lib)
        .arg("-lholdfast")
        .arg(format!("-Wl,-rpath,{}", lib.display()))
        .args(["-Wall", "-Wextra", "-Werror", "-std=c99", "-o"])
        .arg(out)
        .status()
        .unwrap_or_else(|e| panic!("cannot run the C compiler `{cc}`: {e}"));
    assert!(status.success(), "the C example does not compile");
}

#[test]
fn the_c_example_compiles_links_and_advises() {
    let tmp = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("capi");
    std::fs::create_dir_all(&tmp).unwrap();
    let exe = tmp.join("advise");
    compile_example(&exe);

    let g = grid();
    let model_path = tmp.join("demo.hfmodel");
    model(&g).write(&model_path).unwrap();
    let grid_path =
        PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../scenarios/quillmoor.toml");
    let request = Request {
        id: Some("from C".into()),
        snapshot: snapshot(&g),
        contingency: unit_trip(&g),
        action_delay_s: None,
        budget_ms: Some(60_000.0),
        max_simulations: Some(2),
    };
    let request_path = tmp.join("request.json");
    std::fs::write(&request_path, serde_json::to_string(&request).unwrap()).unwrap();

    let run = |model: &Path, request: &Path| {
        Command::new(&exe)
            .arg(model)
            .arg(&grid_path)
            .arg(request)
            .output()
            .unwrap()
    };
    let out = run(&model_path, &request_path);
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stdout}\n{stderr}");
    let answer: serde_json::Value = serde_json::from_str(stdout.trim()).unwrap();
    assert_eq!(answer["id"], "from C");
    assert!(
        answer["path"].is_string() && answer["checks"].is_array(),
        "{answer}"
    );
    assert!(stderr.contains("not a protection scheme"), "{stderr}");

    // A request naming a unit the grid does not have: refused, with the reason.
    let mut bad = request.clone();
    bad.contingency.trip = vec!["No Such Unit".into()];
    let bad_path = tmp.join("bad-request.json");
    std::fs::write(&bad_path, serde_json::to_string(&bad).unwrap()).unwrap();
    let out = run(&model_path, &bad_path);
    assert_eq!(out.status.code(), Some(1));
    let answer: serde_json::Value =
        serde_json::from_str(String::from_utf8_lossy(&out.stdout).trim()).unwrap();
    assert!(
        answer["error"]
            .as_str()
            .unwrap()
            .contains("trip `No Such Unit`"),
        "{answer}"
    );

    // A damaged model file: the advisor is not opened, and the message names the file.
    let damaged = tmp.join("damaged.hfmodel");
    let mut bytes = std::fs::read(&model_path).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0x01;
    std::fs::write(&damaged, bytes).unwrap();
    let out = run(&damaged, &request_path);
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("cannot open the advisor") && stderr.contains("damaged.hfmodel"),
        "{stderr}"
    );
}
