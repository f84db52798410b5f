//! Architecture invariants, as tests: the dependency direction between our crates, and what the
//! lean inference crate must never pull in. See DEVELOPERS.md, "Architecture".

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test helpers, where a panic is the failure report

use std::collections::HashMap;
use std::process::Command;

/// The host target, so that metadata needs no other platform's crates (and no network).
fn host_triple() -> String {
    let out = Command::new("rustc")
        .arg("-vV")
        .output()
        .expect("run rustc -vV");
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .find_map(|l| l.strip_prefix("host: ").map(str::to_string))
        .expect("rustc -vV names the host")
}

fn metadata() -> serde_json::Value {
    let out = Command::new(env!("CARGO"))
        .args([
            "metadata",
            "--format-version",
            "1",
            "--offline",
            "--filter-platform",
            &host_triple(),
        ])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("run cargo metadata");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Normal (non-dev, non-build) dependency edges, by package name.
fn normal_edges(meta: &serde_json::Value) -> HashMap<String, Vec<String>> {
    let names: HashMap<&str, &str> = meta["packages"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| (p["id"].as_str().unwrap(), p["name"].as_str().unwrap()))
        .collect();
    let mut edges = HashMap::new();
    for node in meta["resolve"]["nodes"].as_array().unwrap() {
        let from = names[node["id"].as_str().unwrap()].to_string();
        let to: Vec<String> = node["deps"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|d| {
                d["dep_kinds"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .any(|k| k["kind"].is_null())
            })
            .map(|d| names[d["pkg"].as_str().unwrap()].to_string())
            .collect();
        edges.entry(from).or_insert_with(Vec::new).extend(to);
    }
    edges
}

#[test]
fn crate_dependencies_point_one_way() {
    let edges = normal_edges(&metadata());
    let ours = |p: &str| -> Vec<String> {
        edges[p]
            .iter()
            .filter(|d| d.starts_with("holdfast"))
            .cloned()
            .collect::<Vec<_>>()
    };
    assert!(
        ours("holdfast-core").is_empty(),
        "core depends on {:?}",
        ours("holdfast-core")
    );
    for (krate, allowed) in [
        ("holdfast-sim", &["holdfast-core"][..]),
        ("holdfast-infer", &["holdfast-core"][..]),
        ("holdfast-infer-capi", &["holdfast-infer"][..]),
        (
            "holdfast-learn",
            &["holdfast-core", "holdfast-sim", "holdfast-infer"][..],
        ),
    ] {
        for dep in ours(krate) {
            assert!(
                allowed.contains(&dep.as_str()),
                "{krate} must not depend on {dep}"
            );
        }
    }
}

/// The packages `holdfast-infer` pulls in when built on its own, as an integrator builds it. (The
/// workspace-wide metadata unifies features across members: there burn switches on rayon in
/// shared numeric crates, which an embedding of infer alone never sees.)
fn infer_tree() -> Vec<String> {
    let out = Command::new(env!("CARGO"))
        .args([
            "tree",
            "-p",
            "holdfast-infer",
            "-e",
            "normal",
            "--prefix",
            "none",
            "--offline",
        ])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("run cargo tree");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut names: Vec<String> = String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter_map(|l| l.split_whitespace().next().map(str::to_string))
        .collect();
    names.sort();
    names.dedup();
    names
}

#[test]
fn infer_stays_lean() {
    let tree = infer_tree();
    let forbidden: Vec<&String> = tree
        .iter()
        .filter(|p| {
            p.starts_with("burn")
                || ["rayon", "indicatif", "holdfast-sim", "holdfast-learn"].contains(&p.as_str())
        })
        .collect();
    assert!(forbidden.is_empty(), "holdfast-infer reaches {forbidden:?}");
}
