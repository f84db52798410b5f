//! How the labels of a study changed against an earlier labelling: for every sample of an
//! older CSV export (`holdfast dataset export --format csv`, columns `index`, `outcome`,
//! `total_shed_mw`), label it again with this build and, where the label moved, simulate the
//! old label's action with this build's criteria to name the criterion that now fails it.
//!
//! Run with `cargo run --release -p holdfast-sim --example label_changes -- STUDY OLD.csv`.
//! Prints a table of old outcome -> new outcome and, for each, the criteria that failed the
//! old action.

#![allow(
    clippy::print_stdout,
    clippy::print_stderr,
    clippy::unwrap_used,
    clippy::expect_used
)] // reason: a one-off report on the terminal; bad input is a usage error

use std::collections::BTreeMap;
use std::path::Path;

use holdfast_sim::dataset::SampleBody;
use holdfast_sim::generate::Generator;
use holdfast_sim::label::{Outcome, ShedOracle};
use rayon::prelude::*;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [study, old] = &args[..] else {
        eprintln!("usage: label_changes STUDY.toml OLD.csv");
        std::process::exit(2);
    };
    let generator = Generator::open(Path::new(study)).unwrap();
    let text = std::fs::read_to_string(old).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let column = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let (ci, co, ct) = (column("index"), column("outcome"), column("total_shed_mw"));
    let rows: Vec<(u64, String, f64)> = lines
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (
                f[ci].parse().unwrap(),
                f[co].to_string(),
                f[ct].parse().unwrap_or(0.0),
            )
        })
        .collect();
    let base = generator.grid.s_base_mva;
    let changes: Vec<(String, String, String)> = rows
        .par_iter()
        .filter_map(|(index, old_outcome, old_mw)| {
            let (_, prepared) = generator.prepare(*index);
            let p = prepared?.ok()?;
            let new = match generator.sample(*index).body {
                SampleBody::Labelled(l) => l.label,
                _ => return Some((old_outcome.clone(), "not labelled".into(), String::new())),
            };
            let new_outcome = match new.outcome {
                Outcome::NoShedNeeded => "no_shed",
                Outcome::Shed => "shed",
                Outcome::Unsavable => "unsavable",
            };
            let same = new_outcome == old_outcome
                && (new.total_mw - old_mw).abs() <= new.tolerance_mw + 1e-6;
            if same {
                return None;
            }
            let why = if old_outcome == "unsavable" {
                "was unsavable".to_string()
            } else {
                let mut oracle = generator.oracle(&p).ok()?;
                let v = oracle.run(old_mw / base).ok()?;
                match v.failure {
                    Some(f) => f.criterion.to_string(),
                    None => "old action still stable".to_string(),
                }
            };
            let direction = match (old_outcome.as_str(), new_outcome) {
                (o, n) if o == n && new.total_mw > *old_mw => format!("{n}, more shed"),
                (o, n) if o == n => format!("{n}, less shed"),
                (_, n) => n.to_string(),
            };
            Some((old_outcome.clone(), direction, why))
        })
        .collect();
    let mut table: BTreeMap<(String, String), BTreeMap<String, usize>> = BTreeMap::new();
    for (old, new, why) in &changes {
        *table
            .entry((old.clone(), new.clone()))
            .or_default()
            .entry(why.clone())
            .or_default() += 1;
    }
    println!(
        "{} of {} samples changed label (beyond the bisection tolerance)",
        changes.len(),
        rows.len()
    );
    for ((old, new), whys) in &table {
        let n: usize = whys.values().sum();
        let list: Vec<String> = whys.iter().map(|(w, k)| format!("{w}: {k}")).collect();
        println!(
            "  {old} -> {new}: {n} (old action fails by {})",
            list.join(", ")
        );
    }
}
