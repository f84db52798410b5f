//! The advisor as an integrator embeds it: shared across threads, and no panic on any input (random and damaged model files, mutated
//! JSON requests, non-finite snapshot values).
//!
//! The grid is the bundled demo grid (fictional, `scenarios/quillmoor.toml`); the model has
//! fixed pseudo-random weights, since these checks are about the serving code, not the
//! advice's quality (that is checked against the evaluation in `learn/tests/training.rs`).

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test code, where a panic is the failure report

use std::path::Path;
use std::time::Duration;

use holdfast_core::Outages;
use holdfast_infer::{
    AdviseError, Advisor, Budget, ContingencySpec, ModelError, ModelFile, Request, Snapshot,
    answer_json_line,
};
use proptest::prelude::*;

mod common;
use common::{advisor, grid, model, snapshot, unit_trip};

#[test]
fn one_advisor_serves_many_threads_with_the_same_answers() {
    fn shared<T: Send + Sync>(_: &T) {}
    let advisor = advisor();
    shared(&advisor);
    let request = Request {
        id: Some("t".into()),
        snapshot: snapshot(advisor.grid()),
        contingency: unit_trip(advisor.grid()),
        action_delay_s: None,
        budget_ms: Some(60_000.0),
        max_simulations: Some(3),
    };
    let answers: Vec<_> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..3)
            .map(|_| scope.spawn(|| advisor.advise(&request).unwrap()))
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    for a in &answers[1..] {
        assert_eq!(a.shed, answers[0].shed);
        assert_eq!(a.path, answers[0].path);
        assert_eq!(a.outcome, answers[0].outcome);
    }
    assert_eq!(answers[0].id.as_deref(), Some("t"));
    assert!(!answers[0].checks.is_empty());
}

#[test]
fn a_model_for_another_grid_is_refused() {
    let g = grid();
    let mut other = g.clone();
    other.branches[0].x_pu *= 1.1;
    let e = Advisor::new(&model(&g), Path::new("m.hfmodel"), other).unwrap_err();
    assert!(
        matches!(e, AdviseError::Model(ModelError::Grid { .. })),
        "{e}"
    );
    assert!(
        e.to_string()
            .starts_with("m.hfmodel: the model was trained on grid")
    );
}

#[test]
fn non_finite_and_impossible_snapshot_values_are_refused_naming_the_field() {
    let advisor = advisor();
    let good = snapshot(advisor.grid());
    let dist = unit_trip(advisor.grid()).resolve(advisor.grid()).unwrap();
    let budget = Budget {
        time: Duration::from_secs(10),
        max_simulations: 1,
    };
    type Field = fn(&mut Snapshot) -> &mut Vec<f64>;
    let fields: [(&str, Field); 8] = [
        ("bus_v_pu", |s| &mut s.bus_v_pu),
        ("bus_angle_deg", |s| &mut s.bus_angle_deg),
        ("load_p_mw", |s| &mut s.load_p_mw),
        ("load_q_mvar", |s| &mut s.load_q_mvar),
        ("load_sheddable_mw", |s| &mut s.load_sheddable_mw),
        ("machine_p_mw", |s| &mut s.machine_p_mw),
        ("machine_q_mvar", |s| &mut s.machine_q_mvar),
        ("wind_p_mw", |s| &mut s.wind_p_mw),
    ];
    for (name, field) in fields {
        for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
            let mut snap = good.clone();
            field(&mut snap)[0] = bad;
            let e = advisor
                .advise_disturbance(&snap, &dist, None, budget)
                .unwrap_err()
                .to_string();
            assert!(
                e.starts_with(&format!("snapshot: snapshot field `{name}`, entry 0")),
                "{name}: {e}"
            );
        }
        let mut snap = good.clone();
        field(&mut snap).pop();
        let e = advisor
            .advise_disturbance(&snap, &dist, None, budget)
            .unwrap_err()
            .to_string();
        assert!(e.contains(&format!("`{name}` has")), "{name}: {e}");
    }
    let mut snap = good.clone();
    snap.load_sheddable_mw[0] = snap.load_p_mw[0] + 1.0;
    let e = advisor
        .advise_disturbance(&snap, &dist, None, budget)
        .unwrap_err();
    assert!(e.to_string().contains("above the load's load_p_mw"), "{e}");
}

#[test]
fn a_contingency_that_splits_the_grid_is_refused() {
    let advisor = advisor();
    let grid = advisor.grid();
    // A radial branch: tripping it leaves its far bus alone (found by topology, not assumed).
    let radial = (0..grid.branches.len())
        .find(|&k| {
            let mut o = Outages::none();
            o.branches.push(holdfast_core::BranchIdx(k as u32));
            holdfast_core::topology::islands(grid, &o).members.len() > 1
        })
        .expect("the demo grid has radial step-up transformers");
    let b = &grid.branches[radial];
    let spec = ContingencySpec {
        fault_bus: Some(grid.buses[b.from.get()].number),
        trip: vec![b.id.clone()],
    };
    let request = Request {
        id: None,
        snapshot: snapshot(grid),
        contingency: spec,
        action_delay_s: None,
        budget_ms: None,
        max_simulations: None,
    };
    let e = advisor.advise(&request).unwrap_err().to_string();
    assert!(e.contains("splits the grid into 2 islands"), "{e}");
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn random_bytes_never_panic_the_model_loader(bytes in proptest::collection::vec(any::<u8>(), 0..4096)) {
        prop_assert!(ModelFile::decode(&bytes, Path::new("random.hfmodel")).is_err());
    }

    #[test]
    fn a_random_prefix_with_a_valid_header_never_panics(cut in 0usize..2000, flip in 0usize..2000) {
        let bytes = model(&grid()).encode();
        let mut damaged = bytes[..cut.min(bytes.len())].to_vec();
        if let Some(b) = damaged.get_mut(flip) {
            *b ^= 0x5a;
        }
        prop_assert!(ModelFile::decode(&damaged, Path::new("cut.hfmodel")).is_err());
    }
}

/// One valid request line, for mutation.
fn request_line(advisor: &Advisor) -> String {
    serde_json::to_string(&Request {
        id: Some("r1".into()),
        snapshot: snapshot(advisor.grid()),
        contingency: unit_trip(advisor.grid()),
        action_delay_s: None,
        budget_ms: Some(1.0),
        max_simulations: Some(0),
    })
    .unwrap()
}

#[test]
fn mutated_request_lines_always_get_one_json_answer() {
    let advisor = advisor();
    let line = request_line(&advisor);
    let answer: serde_json::Value =
        serde_json::from_str(&answer_json_line(&advisor, &line)).unwrap();
    assert_eq!(answer["id"], "r1", "{answer}");
    assert!(answer.get("path").is_some(), "{answer}");
    let mut runner = proptest::test_runner::TestRunner::new(ProptestConfig::with_cases(200));
    let edits = proptest::collection::vec((0..line.len(), any::<u8>()), 1..6);
    runner
        .run(&edits, |edits| {
            let mut bytes = line.clone().into_bytes();
            for (at, b) in edits {
                bytes[at] = b;
            }
            let text = String::from_utf8_lossy(&bytes);
            let out = answer_json_line(&advisor, &text);
            let v: serde_json::Value = serde_json::from_str(&out).unwrap();
            prop_assert!(
                v.get("error").is_some() || v.get("path").is_some(),
                "{}",
                out
            );
            prop_assert!(!out.contains('\n'));
            Ok(())
        })
        .unwrap();
}

#[test]
fn out_of_range_budgets_and_delays_are_refused() {
    let advisor = advisor();
    let base = Request {
        id: None,
        snapshot: snapshot(advisor.grid()),
        contingency: unit_trip(advisor.grid()),
        action_delay_s: None,
        budget_ms: None,
        max_simulations: Some(0),
    };
    for (budget_ms, delay_s, needle) in [
        (Some(1e300), None, "at most 3600000 ms"),
        (Some(-5.0), None, "budget_ms -5"),
        (None, Some(-0.1), "action_delay_s -0.1"),
        (None, Some(1e9), "action_delay_s 1000000000"),
    ] {
        let request = Request {
            budget_ms,
            action_delay_s: delay_s,
            ..base.clone()
        };
        let e = advisor.advise(&request).unwrap_err().to_string();
        assert!(e.starts_with("request: ") && e.contains(needle), "{e}");
    }
}
