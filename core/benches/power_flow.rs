//! Power-flow benchmark: median solve time per case, one thread, printed as a table.
//!
//! Run with `cargo bench -p holdfast-core --bench power_flow`. Inputs are built outside the
//! timed region; each case is solved repeatedly from a flat start and the median is reported.

#![allow(clippy::print_stdout, clippy::print_stderr)] // reason: a bench binary reports on the terminal

use std::hint::black_box;
use std::path::Path;
use std::time::{Duration, Instant};

use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Grid, Outages, cdf, format, synthetic};

fn median_time(grid: &Grid, min_runs: usize, budget: Duration) -> (Duration, usize) {
    let options = PowerFlowOptions::default();
    let none = Outages::none();
    // Warm-up, and a check that the case converges at all.
    let sol = solve(grid, &none, &options)
        .converged()
        .unwrap_or_else(|e| panic!("{}: {e}", grid.name));
    let mut times = Vec::new();
    let started = Instant::now();
    while times.len() < min_runs || (started.elapsed() < budget && times.len() < 10_000) {
        let t = Instant::now();
        black_box(solve(black_box(grid), &none, &options));
        times.push(t.elapsed());
    }
    times.sort();
    (times[times.len() / 2], sol.iterations)
}

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let ieee14 = cdf::load_cdf(&root.join("tests/data/ieee14cdf.txt")).map(|i| i.grid);
    let ieee30 = cdf::load_cdf(&root.join("tests/data/ieee30cdf.txt")).map(|i| i.grid);
    let demo = format::load_grid(&root.join("scenarios/quillmoor.toml"));
    let mut cases: Vec<(String, Grid)> = Vec::new();
    for (name, grid) in [
        ("IEEE 14-bus", ieee14),
        ("IEEE 30-bus", ieee30),
        ("Quillmoor demo", demo),
    ] {
        match grid {
            Ok(g) => cases.push((name.to_string(), g)),
            Err(e) => eprintln!("skipping {name}: {e}"),
        }
    }
    for n in [500, 2000] {
        let g = synthetic::meshed_grid(n, 1);
        cases.push((format!("synthetic {} buses", g.n_buses()), g));
    }
    println!(
        "{:<28} {:>6} {:>9} {:>6} {:>14}",
        "case", "buses", "branches", "iters", "median solve"
    );
    for (name, grid) in &cases {
        let (median, iterations) = median_time(grid, 20, Duration::from_secs(2));
        println!(
            "{:<28} {:>6} {:>9} {:>6} {:>11.1} us",
            name,
            grid.n_buses(),
            grid.branches.len(),
            iterations,
            median.as_secs_f64() * 1e6
        );
    }
}
