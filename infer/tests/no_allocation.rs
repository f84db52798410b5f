//! The prediction path allocates nothing once its buffers are warm (counted by dhat's heap
//! statistics; one test in this binary, since dhat allows one profiler per process).

#![allow(clippy::unwrap_used)] // reason: test code, where a panic is the failure report

use holdfast_infer::Workspace;

mod common;
use common::{advisor, snapshot, unit_trip};

#[global_allocator]
static ALLOCATOR: dhat::Alloc = dhat::Alloc;

#[test]
fn prediction_allocates_nothing_once_warm() {
    let advisor = advisor();
    let snap = snapshot(advisor.grid());
    let dist = unit_trip(advisor.grid()).resolve(advisor.grid()).unwrap();
    let mut ws = Workspace::default();
    // Buffers swap roles between layers: a few passes let each reach its largest size.
    for _ in 0..4 {
        advisor.predict(&snap, &dist, &mut ws).unwrap();
    }
    let _profiler = dhat::Profiler::builder().testing().build();
    let before = dhat::HeapStats::get().total_blocks;
    for _ in 0..100 {
        advisor.predict(&snap, &dist, &mut ws).unwrap();
    }
    let after = dhat::HeapStats::get().total_blocks;
    assert_eq!(after - before, 0, "allocations in 100 warm predictions");
    let total: f64 = ws.shed_pu().iter().sum();
    assert!(total.is_finite() && total >= 0.0);
    for (p, s) in ws.shed_pu().iter().zip(ws.sheddable_pu()) {
        assert!(*p >= 0.0 && *p <= *s + 1e-12, "{p} > {s}");
    }
}
