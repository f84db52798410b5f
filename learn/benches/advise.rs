//! Serving benchmark (the inference crate, measured here because the cases come from the
//! study generator and the sample-to-snapshot conversion of this crate):
//! - forward pass (features, network, margin) p50 and p99 on the small and the large demo
//!   grid, one core, warm buffers;
//! - model load time (read, check, unpack, grid context);
//! - advise with re-check p50 and p99 on the small demo grid, with the paths taken.
//!
//! Run: `cargo bench -p holdfast-learn --bench advise`. The small grid uses the shipped model
//! (`models/quillmoor.hfmodel`) when present; both grids are also timed with a model of the
//! same shape and fixed pseudo-random weights, so the two grids compare like with like.

#![allow(clippy::unwrap_used, clippy::expect_used, clippy::print_stdout)] // reason: a benchmark binary: panics report failure, figures go to stdout

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use holdfast_infer::model::{Array, ModelFile, Normalisation};
use holdfast_infer::{AdvicePath, Advisor, Architecture, Budget, Disturbance, Snapshot, Workspace};
use holdfast_learn::data::{disturbance_of, snapshot_of_point};
use holdfast_learn::train::recheck_settings;
use holdfast_sim::dataset::PointRecord;
use holdfast_sim::generate::Generator;

/// A case: the state before the contingency, the contingency, the action delay.
struct Case {
    snapshot: Snapshot,
    disturbance: Disturbance,
    delay_s: f64,
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// The first `n` accepted operating points of a study with their contingencies.
fn cases(generator: &Generator, n: usize) -> Vec<Case> {
    let mut out = Vec::new();
    let mut index = 0;
    while out.len() < n {
        if let (_, Some(Ok(p))) = generator.prepare(index) {
            out.push(Case {
                snapshot: snapshot_of_point(
                    &generator.grid,
                    &generator.study,
                    &PointRecord::of(&p.op),
                ),
                disturbance: disturbance_of(&p.contingency),
                delay_s: p.delay_s,
            });
        }
        index += 1;
    }
    out
}

/// GraphSAGE of the default training shape (hidden 64, 2 bus layers, 1 branch layer) with
/// fixed pseudo-random weights.
fn fixed_model(generator: &Generator) -> ModelFile {
    let arch = Architecture::Sage {
        hidden: 64,
        bus_layers: 2,
        branch_layers: 1,
    };
    let mut state = 7_u64;
    let weights = arch
        .parameters()
        .into_iter()
        .map(|(name, shape)| {
            let n = shape.iter().product::<usize>();
            let data = (0..n)
                .map(|_| {
                    state = state
                        .wrapping_mul(6_364_136_223_846_793_005)
                        .wrapping_add(1);
                    ((state >> 40) as f32 / (1u64 << 24) as f32 - 0.5) * 0.3
                })
                .collect();
            Array { name, shape, data }
        })
        .collect();
    ModelFile::new(
        arch,
        Normalisation::identity(),
        weights,
        generator.fingerprint,
        generator.grid.name.clone(),
        recheck_settings(&generator.study),
    )
}

fn percentile(sorted: &[f64], q: f64) -> f64 {
    let k = ((sorted.len() as f64 - 1.0) * q).round() as usize;
    sorted[k.min(sorted.len() - 1)]
}

/// p50 and p99 of the forward pass over the cases, us.
fn forward_figures(advisor: &Advisor, cases: &[Case], rounds: usize) -> (f64, f64) {
    let mut ws = Workspace::default();
    for c in cases.iter().take(5) {
        advisor
            .predict(&c.snapshot, &c.disturbance, &mut ws)
            .unwrap();
    }
    let mut us = Vec::with_capacity(rounds * cases.len());
    for _ in 0..rounds {
        for c in cases {
            let t = Instant::now();
            advisor
                .predict(&c.snapshot, &c.disturbance, &mut ws)
                .unwrap();
            us.push(t.elapsed().as_secs_f64() * 1e6);
        }
    }
    us.sort_by(f64::total_cmp);
    (percentile(&us, 0.5), percentile(&us, 0.99))
}

fn load_ms(model_path: &Path, grid_path: &Path) -> f64 {
    let mut ms: Vec<f64> = (0..20)
        .map(|_| {
            let t = Instant::now();
            let a = Advisor::open(model_path, grid_path).unwrap();
            std::hint::black_box(&a);
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    ms.sort_by(f64::total_cmp);
    percentile(&ms, 0.5)
}

fn main() {
    let small = Generator::open(&root().join("scenarios/quillmoor-study.toml")).unwrap();
    let large = Generator::open(&root().join("scenarios/vellmark-study.toml")).unwrap();
    let small_cases = cases(&small, 200);
    let large_cases = cases(&large, 100);
    let tmp = std::env::temp_dir().join(format!("holdfast-bench-{}", std::process::id()));
    std::fs::create_dir_all(&tmp).unwrap();

    println!("forward pass (features + network + margin), one core, warm buffers:");
    for (name, generator, cases, grid_file) in [
        (
            "small demo grid",
            &small,
            &small_cases,
            "scenarios/quillmoor.toml",
        ),
        (
            "large demo grid",
            &large,
            &large_cases,
            "scenarios/vellmark.toml",
        ),
    ] {
        let model = fixed_model(generator);
        let path = tmp.join(format!("{}.hfmodel", generator.grid.name.replace(' ', "-")));
        model.write(&path).unwrap();
        let advisor = Advisor::open(&path, &root().join(grid_file)).unwrap();
        let (p50, p99) = forward_figures(&advisor, cases, 20);
        println!(
            "  {name} ({} buses, {} branches), fixed-weight model: p50 {p50:.1} us, p99 {p99:.1} us \
             ({} cases x 20)",
            generator.grid.n_buses(),
            generator.grid.branches.len(),
            cases.len()
        );
        println!(
            "  {name}: model load (read, check, unpack, grid context) median {:.2} ms ({} bytes)",
            load_ms(&path, &root().join(grid_file)),
            std::fs::metadata(&path).unwrap().len()
        );
    }

    let shipped = root().join("models/quillmoor.hfmodel");
    let grid_file = root().join("scenarios/quillmoor.toml");
    let advisor = if shipped.exists() {
        let a = Advisor::open(&shipped, &grid_file).unwrap();
        let (p50, p99) = forward_figures(&a, &small_cases, 20);
        println!("  small demo grid, shipped model: p50 {p50:.1} us, p99 {p99:.1} us");
        println!(
            "  shipped model load median {:.2} ms",
            load_ms(&shipped, &grid_file)
        );
        a
    } else {
        println!(
            "  (no shipped model at {}: advise uses the fixed-weight one)",
            shipped.display()
        );
        let path = tmp.join("small.hfmodel");
        fixed_model(&small).write(&path).unwrap();
        Advisor::open(&path, &grid_file).unwrap()
    };

    println!("advise with re-check on the small demo grid (default budget), one core:");
    let mut ms = Vec::new();
    let mut paths = [0usize; 3];
    let mut sims = 0;
    for c in &small_cases {
        let t = Instant::now();
        let a = advisor
            .advise_disturbance(
                &c.snapshot,
                &c.disturbance,
                Some(c.delay_s),
                Budget::default(),
            )
            .unwrap();
        ms.push(t.elapsed().as_secs_f64() * 1e3);
        sims += a.checks.len();
        paths[match a.path {
            AdvicePath::Model => 0,
            AdvicePath::Escalated => 1,
            AdvicePath::Conservative => 2,
        }] += 1;
    }
    let mut sorted = ms.clone();
    sorted.sort_by(f64::total_cmp);
    println!(
        "  {} cases: p50 {:.1} ms, p99 {:.1} ms, max {:.1} ms; {:.2} re-check runs per case; \
         paths: model {}, escalated {}, conservative {}",
        ms.len(),
        percentile(&sorted, 0.5),
        percentile(&sorted, 0.99),
        sorted[sorted.len() - 1],
        sims as f64 / ms.len() as f64,
        paths[0],
        paths[1],
        paths[2]
    );
    let one_check: Vec<f64> = small_cases
        .iter()
        .map(|c| {
            let t = Instant::now();
            advisor
                .advise_disturbance(
                    &c.snapshot,
                    &c.disturbance,
                    Some(c.delay_s),
                    Budget {
                        time: Duration::from_secs(10),
                        max_simulations: 1,
                    },
                )
                .unwrap();
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    let mut sorted = one_check;
    sorted.sort_by(f64::total_cmp);
    println!(
        "  the model's action checked once (no escalation): p50 {:.1} ms, p99 {:.1} ms",
        percentile(&sorted, 0.5),
        percentile(&sorted, 0.99)
    );
    let _ = std::fs::remove_dir_all(&tmp);
}
