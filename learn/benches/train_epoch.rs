//! Training-throughput benchmark: seconds per epoch over 20,000 samples of the small demo grid
//! (32 buses, 51 branches), with both towers on, on burn's CPU backend of this build.
//!
//! Run with `cargo bench -p holdfast-learn --bench train_epoch [-- DATASET [SAMPLES]]`.
//! Without a dataset folder it labels 300 samples of the demo study once (into
//! `target/bench-data/`) and repeats their examples up to SAMPLES (default 20,000) training
//! samples: the cost of an epoch depends on the graphs' sizes, not on the label values.
//! Each row runs three epochs and reports the median time of the training steps (batches,
//! forward, backward, Adam; not validation) and the ratio to 3.3 s, the time quoted for a
//! comparable single-tower epoch of a widely used Python GNN library on one core of this
//! machine (39-node graphs, 3 layers, hidden 64, batch 256).

#![allow(
    clippy::print_stdout,
    clippy::print_stderr,
    clippy::unwrap_used,
    clippy::expect_used
)] // reason: a bench binary reports on the terminal; setup failures are bugs

use std::path::PathBuf;

use holdfast_infer::model::Architecture;
use holdfast_learn::data::{Split, SplitRule, read_dataset};
use holdfast_learn::loss::Loss;
use holdfast_learn::train::{Silent, TrainConfig, TrainRun, backend_name, train};
use holdfast_sim::generate::{BuildOptions, Generator, Quiet, build};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

const REFERENCE_S: f64 = 3.3;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..");
    let dir = match args.first() {
        Some(d) => PathBuf::from(d),
        None => {
            let dir = root.join("target/bench-data/quillmoor-300");
            if !dir.join("study.toml").is_file() {
                eprintln!(
                    "labelling 300 samples of the demo study into {} ...",
                    dir.display()
                );
                let generator =
                    Generator::open(&root.join("scenarios/quillmoor-study.toml")).unwrap();
                let _ = std::fs::remove_dir_all(&dir);
                let opts = BuildOptions {
                    samples: 300,
                    out: dir.clone(),
                    jobs: std::thread::available_parallelism().map_or(1, |n| n.get()),
                    part: (1, 1),
                    resume: false,
                };
                build(&generator, &opts, &Quiet).unwrap();
            }
            dir
        }
    };
    let samples: usize = args.get(1).map_or(20_000, |s| s.parse().unwrap());
    let split = SplitRule {
        seed: 1,
        shares: [0.1, 0.0, 0.0],
    };
    let data = read_dataset(&dir, None, split).unwrap();
    let all = data.collect(None).unwrap();
    let originals: Vec<_> = all.iter().filter(|e| e.split == Split::Train).collect();
    let validation = all.iter().filter(|e| e.split == Split::Validation).cloned();
    let repeated = (0..samples)
        .map(|k| {
            let mut e = originals[k % originals.len()].clone();
            e.index = k as u64;
            e
        })
        .chain(validation)
        .collect();
    let data = data.with_examples(repeated);
    let n_bus = data.grid().n_buses();
    let n_branch = data.grid().branches.len();
    println!(
        "training throughput: {samples} samples of {} ({n_bus} buses, {n_branch} branches), backend {}, {} threads",
        data.grid().name,
        backend_name(),
        rayon::current_num_threads()
    );
    println!(
        "{:<44} {:>8} {:>12} {:>12} {:>10}",
        "configuration", "batch", "epoch s", "samples/s", "vs 3.3 s"
    );
    let rows = [
        ("both towers, 2+1 layers, hidden 64 (default)", 2, 1, 128),
        ("both towers, 2+1 layers, hidden 64", 2, 1, 256),
        ("both towers, 2+2 layers, hidden 64", 2, 2, 128),
        ("both towers, 2+2 layers, hidden 64", 2, 2, 256),
        ("both towers, 3+3 layers, hidden 64", 3, 3, 256),
        ("bus tower only, 3 layers, hidden 64", 3, 0, 256),
    ];
    for (name, bus_layers, branch_layers, batch) in rows {
        let config = TrainConfig {
            architecture: Architecture::Sage {
                hidden: 64,
                bus_layers,
                branch_layers,
            },
            loss: Loss::Averse { under_weight: 4.0 },
            epochs: 3,
            batch,
            learning_rate: 3e-3,
            patience: 100,
            seed: 1,
            neighbours: Some(8),
            split,
            target_under_rate: 0.05,
            shuffle_window: TrainConfig::SHUFFLE_WINDOW,
        };
        let trained = train(&data, &config, &TrainRun::default(), &Silent).unwrap();
        let mut s = trained.step_seconds.clone();
        s.sort_by(f64::total_cmp);
        let median = s[s.len() / 2];
        println!(
            "{name:<44} {batch:>8} {median:>12.2} {:>12.0} {:>9.2}x",
            samples as f64 / median,
            median / REFERENCE_S
        );
    }
    println!(
        "(epoch s: median of 3 epochs, training steps only; vs 3.3 s: ratio of times, below 1 is faster)"
    );
}
