//! Labelling benchmark: labelled samples per hour on one core, and the share of the time spent
//! in simulation (the rest: drawing and solving operating points, contingency draw, placement).
//!
//! Run with `cargo bench -p holdfast-sim --bench labels [-- STUDY [SAMPLES]]`; default: the demo
//! study, 200 samples. Samples are labelled one after another on one thread; the figures are
//! the median over blocks of 20 samples, so a slow block (unsavable cases, long bisections)
//! shows as spread rather than hiding in a mean.

#![allow(
    clippy::print_stdout,
    clippy::print_stderr,
    clippy::unwrap_used,
    clippy::expect_used
)] // reason: a bench binary reports on the terminal; setup failures are bugs

use std::path::PathBuf;
use std::time::Instant;

use holdfast_sim::generate::Generator;
use holdfast_sim::label::Outcome;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..");
    let study = args
        .first()
        .map_or(root.join("scenarios/quillmoor-study.toml"), PathBuf::from);
    let samples: u64 = args.get(1).map_or(200, |s| s.parse().unwrap());
    let generator = Generator::open(&study).unwrap();
    let block = 20;
    let mut per_hour = Vec::new();
    let mut sim_share = Vec::new();
    let (mut total_s, mut sim_s) = (0.0, 0.0);
    let (mut sims, mut shed, mut labelled) = (0u64, 0u64, 0u64);
    let mut i = 0;
    while i < samples {
        let (mut block_total, mut block_sim) = (0.0, 0.0);
        let n = block.min(samples - i);
        for index in i..i + n {
            let t0 = Instant::now();
            let (_, prepared) = generator.prepare(index);
            let t1 = Instant::now();
            if let Some(Ok(p)) = prepared
                && let Ok(l) = generator.label(&p)
            {
                labelled += 1;
                sims += u64::from(l.label.simulations);
                shed += u64::from(l.label.outcome == Outcome::Shed);
            }
            let t2 = Instant::now();
            block_total += (t2 - t0).as_secs_f64();
            block_sim += (t2 - t1).as_secs_f64();
        }
        per_hour.push(n as f64 * 3600.0 / block_total);
        sim_share.push(block_sim / block_total);
        total_s += block_total;
        sim_s += block_sim;
        i += n;
    }
    per_hour.sort_by(f64::total_cmp);
    sim_share.sort_by(f64::total_cmp);
    let median = |v: &[f64]| v[v.len() / 2];
    println!(
        "{} ({} buses): {samples} samples, {labelled} labelled ({:.0} % need shed), {:.2} \
         simulations per labelled sample",
        study.display(),
        generator.grid.n_buses(),
        100.0 * shed as f64 / labelled.max(1) as f64,
        sims as f64 / labelled.max(1) as f64
    );
    println!(
        "samples per hour on one core: median of blocks of {block} {:.0} (range {:.0} to {:.0}); \
         overall {:.0}",
        median(&per_hour),
        per_hour[0],
        per_hour[per_hour.len() - 1],
        samples as f64 * 3600.0 / total_s
    );
    println!(
        "share of time in labelling simulations: median {:.1} %, overall {:.1} %",
        100.0 * median(&sim_share),
        100.0 * sim_s / total_s
    );
}
