//! End-to-end tests of the `holdfast` binary. Reference data and sources: `tests/data/SOURCES.md`.

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test helpers, where a panic is the failure report

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn holdfast(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_holdfast"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("run holdfast")
}

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data")
        .join(name)
}

/// A fresh folder for one test.
fn temp_dir(test: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("holdfast-cli-{test}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

#[test]
fn import_then_solve_reproduces_the_published_ieee14_solution() {
    // IEEE 14-bus, UW archive: every bus within 0.002 pu and 0.05 deg of the file's solution.
    let dir = temp_dir("ieee14");
    let toml = dir.join("ieee14.toml");
    let out = holdfast(&[
        "grid",
        "import",
        data("ieee14cdf.txt").to_str().unwrap(),
        "-o",
        toml.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("14 buses"));

    let out = holdfast(&["grid", "solve", toml.to_str().unwrap(), "--json"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let json: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let grid = holdfast_core::cdf::load_cdf(&data("ieee14cdf.txt"))
        .unwrap()
        .grid;
    let buses = json["buses"].as_array().unwrap();
    assert_eq!(buses.len(), 14);
    for b in buses {
        let idx = grid.bus_idx(b["id"].as_u64().unwrap() as u32).unwrap();
        let published = grid.bus(idx).stored_solution.unwrap();
        assert!((b["v_pu"].as_f64().unwrap() - published.v_pu).abs() < 0.002);
        assert!((b["angle_deg"].as_f64().unwrap() - published.angle_rad.to_degrees()).abs() < 0.05);
    }
    // Energy conservation (closed form): generation = load (259.0 MW, the file's bus cards) +
    // branch losses; the 14-bus case has no shunt conductance.
    let generation: f64 = json["machines"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m["p_mw"].as_f64().unwrap())
        .sum();
    let losses: f64 = json["branches"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b["loss_mw"].as_f64().unwrap())
        .sum();
    assert!(
        (generation - 259.0 - losses).abs() < 1e-4,
        "generation {generation}, losses {losses}"
    );

    let out = holdfast(&["grid", "check", toml.to_str().unwrap()]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let summary = text(&out.stdout);
    assert!(
        summary.contains("14 buses")
            && summary.contains("voltage range")
            && summary.contains("limits hit"),
        "{summary}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn bad_grid_file_names_file_line_field_and_value_and_exits_2() {
    let dir = temp_dir("bad");
    let bad = dir.join("bad.toml");
    std::fs::write(
        &bad,
        "format_version = 1\nname = \"bad\"\ns_base_mva = 100.0\nfrequency_hz = 50.0\n\
         [[bus]]\nid = 1\nbase_kv = 110.0\nreference = true\n\
         [[line]]\nid = \"L1\"\nfrom = 1\nto = 9\nx_pu = 0.1\n",
    )
    .unwrap();
    let out = holdfast(&["grid", "check", bad.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("bad.toml")
            && err.contains("line 12")
            && err.contains("`to` = 9")
            && err.contains("no bus"),
        "{err}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn help_shows_examples_and_the_caution() {
    let out = holdfast(&["--help"]);
    assert!(out.status.success());
    let s = text(&out.stdout);
    assert!(
        s.contains("grid") && s.contains("demo") && s.contains("licensed engineers"),
        "{s}"
    );
    let out = holdfast(&["grid", "check", "--help"]);
    assert!(text(&out.stdout).contains("holdfast grid check scenarios/quillmoor.toml"));
}

#[test]
fn outages_split_islands_and_unknown_ids_are_errors() {
    // Opening the step-up transformer of a plant leaves its terminal bus as an island of its own
    // (topology, by construction of the demo grid); the rest is solved with another reference.
    let out = holdfast(&[
        "grid",
        "check",
        "scenarios/quillmoor.toml",
        "--outage",
        "Fenmouth Peaker step-up",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    assert!(s.contains("islands: 2 energised"), "{s}");
    let out = holdfast(&[
        "grid",
        "check",
        "scenarios/quillmoor.toml",
        "--outage",
        "no such line",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("\"no such line\""));
}

#[test]
fn simulate_reports_a_verdict_and_writes_signals_and_plots() {
    let dir = temp_dir("simulate");
    let (csv, svg, png) = (
        dir.join("run.csv"),
        dir.join("run.svg"),
        dir.join("run.png"),
    );
    let out = holdfast(&[
        "simulate",
        "scenarios/quillmoor.toml",
        "--scenario",
        "scenarios/quillmoor-fault.toml",
        "--out",
        csv.to_str().unwrap(),
        "--plot",
        svg.to_str().unwrap(),
    ]);
    let stdout = text(&out.stdout);
    assert!(out.status.success(), "{stdout}{}", text(&out.stderr));
    assert!(stdout.contains("Verdict: "), "{stdout}");
    assert!(stdout.contains("not a protection scheme"), "{stdout}");
    let table = std::fs::read_to_string(&csv).unwrap();
    let header = table.lines().next().unwrap();
    assert!(
        header.starts_with("time_s,frequency_hz,angle_deg:"),
        "{header}"
    );
    assert!(table.lines().count() > 100);
    assert!(std::fs::read_to_string(&svg).unwrap().contains("<svg"));
    // PNG from one-line events, and JSON output.
    let out = holdfast(&[
        "simulate",
        "scenarios/quillmoor.toml",
        "--event",
        "0.1 fault 303",
        "--event",
        "0.1833 clear 303",
        "--duration",
        "2",
        "--bus",
        "221",
        "--bus",
        "303",
        "--out",
        csv.to_str().unwrap(),
        "--plot",
        png.to_str().unwrap(),
        "--json",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let header = std::fs::read_to_string(&csv).unwrap();
    assert!(
        header
            .lines()
            .next()
            .unwrap()
            .ends_with(",v_pu:221,v_pu:303"),
        "{header}"
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(v["stable"].is_boolean() && v["max_angle_deg"].as_f64().unwrap() > 0.0);
    assert_eq!(&std::fs::read(&png).unwrap()[1..4], b"PNG");
}

#[test]
fn simulate_leaves_out_the_margins_a_stopped_run_did_not_reach() {
    // The breaker-failure scenario loses synchronism in the first swing: the run stops there,
    // so the end-of-window margins are absent (null in JSON, "not reached" in text), not
    // nominal values.
    let args = [
        "simulate",
        "scenarios/quillmoor.toml",
        "--scenario",
        "scenarios/quillmoor-breaker-failure.toml",
    ];
    let out = holdfast(&[&args[..], &["--json"]].concat());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["stopped_early"], true, "{v}");
    assert_eq!(v["failed_criterion"], "rotor-angle separation");
    for margin in [
        "final_frequency_hz",
        "final_voltage_min_pu",
        "final_voltage_max_pu",
        "damping",
        "slowest_recovery_s",
    ] {
        assert!(v[margin].is_null(), "{margin}: {}", v[margin]);
    }
    assert!(v["max_angle_deg"].as_f64().unwrap() > 180.0);
    let out = holdfast(&args);
    let stdout = text(&out.stdout);
    assert!(
        stdout.contains("final frequency") && stdout.contains("not reached (the run stopped at"),
        "{stdout}"
    );
    assert!(!stdout.contains("60.000 Hz (band"), "{stdout}");
}

#[test]
fn simulate_takes_criteria_by_name_and_refuses_unknown_ones() {
    // The fault scenario runs to the end: every margin is reported, the damping analysis
    // included, and a criterion changed on the command line is the one applied.
    let out = holdfast(&[
        "simulate",
        "scenarios/quillmoor.toml",
        "--scenario",
        "scenarios/quillmoor-fault.toml",
        "--criterion",
        "final_voltage_min_pu=0.99",
        "--json",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["stopped_early"], false);
    assert!(
        v["final_frequency_hz"].as_f64().is_some() && v["damping"].is_object(),
        "{v}"
    );
    let lowest = v["final_voltage_min_pu"].as_f64().unwrap();
    assert!(lowest < 0.99, "{v}");
    assert_eq!(v["failed_criterion"], "final voltage", "{v}");
    let out = holdfast(&[
        "simulate",
        "scenarios/quillmoor.toml",
        "--criterion",
        "damping_ratio=0.05",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("damping_ratio=0.05") && err.contains("min_damping_ratio"),
        "{err}"
    );
}

#[test]
fn simulate_names_a_bad_event() {
    let out = holdfast(&[
        "simulate",
        "scenarios/quillmoor.toml",
        "--event",
        "0.1 fault 9999",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("0.1 fault 9999") && err.contains("no bus"),
        "{err}"
    );
}
