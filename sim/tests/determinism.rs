//! Sample i depends only on (study seed, i): the same study gives byte-identical shards and
//! manifests whatever the thread count or the split into parts (issue 4, determinism).

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test code

mod common;

use holdfast_sim::generate::{BuildOptions, Generator, Quiet, build};
use holdfast_sim::report::merge;

const SAMPLES: u64 = 24;

fn build_into(generator: &Generator, dir: &std::path::Path, jobs: usize, part: (u32, u32)) {
    let opts = BuildOptions {
        samples: SAMPLES,
        out: dir.to_path_buf(),
        jobs,
        part,
        resume: false,
    };
    build(generator, &opts, &Quiet).unwrap();
}

#[test]
fn threads_and_parts_give_byte_identical_datasets() {
    let base = common::fresh_dir("determinism");
    let study = common::demo_study(&base, 5);
    let generator = Generator::open(&study).unwrap();

    let one_thread = base.join("jobs1");
    build_into(&generator, &one_thread, 1, (1, 1));
    let two_threads = base.join("jobs2");
    build_into(&generator, &two_threads, 2, (1, 1));
    let reference = common::folder_bytes(&one_thread);
    // 24 samples in shards of 5: five shards, manifest, grid and the study copy.
    assert_eq!(
        reference.len(),
        8,
        "{:?}",
        reference.iter().map(|f| &f.0).collect::<Vec<_>>()
    );
    assert_eq!(reference, common::folder_bytes(&two_threads));

    // Three parts of a split build in their own folders, merged.
    let parts: Vec<_> = (1..=3)
        .map(|k| {
            let dir = base.join(format!("part{k}"));
            build_into(&generator, &dir, 1, (k, 3));
            dir
        })
        .collect();
    let merged = base.join("merged");
    let report = merge(&parts, &merged).unwrap();
    assert_eq!(report.shards, 5);
    assert!(report.missing.is_empty());
    assert_eq!(reference, common::folder_bytes(&merged));

    // A part alone is a dataset with shards missing, which merge reports.
    let partial = base.join("partial");
    let report = merge(&parts[..1], &partial).unwrap();
    assert_eq!(report.missing, vec![1, 2, 4]);
    std::fs::remove_dir_all(&base).unwrap();
}
