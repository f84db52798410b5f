//! No panic on any input: random, truncated and mutated grid files and CDF files, and power
//! flows on perturbed grids (property tests with proptest; bounded sizes).

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test helpers, where a panic is the failure report

use std::path::Path;

use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Outages, cdf, format};
use proptest::prelude::*;

const DEMO: &str = include_str!("../../scenarios/quillmoor.toml");
const IEEE14: &str = include_str!("../../tests/data/ieee14cdf.txt");
const DEMO_FAULT: &str = include_str!("../../scenarios/quillmoor-fault.toml");

/// Replaces the byte at `pos` (if any) with `b`, keeping the text valid UTF-8 where possible.
fn mutate(text: &str, pos: usize, b: u8) -> String {
    let mut bytes = text.as_bytes().to_vec();
    if !bytes.is_empty() {
        let p = pos % bytes.len();
        bytes[p] = b;
    }
    String::from_utf8_lossy(&bytes).into_owned()
}

/// Cuts the text at a char boundary near `pos`.
fn truncate(text: &str, pos: usize) -> &str {
    let mut p = pos % (text.len() + 1);
    while !text.is_char_boundary(p) {
        p -= 1;
    }
    &text[..p]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn scenario_parsers_never_panic(s in "\\PC{0,200}", pos in 0usize..2000, b in any::<u8>()) {
        let grid = format::parse_grid(DEMO, Path::new("demo.toml")).unwrap();
        let _ = holdfast_core::dynamics::parse_scenario(&s, Path::new("random.toml"), &grid);
        let _ = holdfast_core::dynamics::parse_event_line(&grid, &s);
        let mutated = mutate(DEMO_FAULT, pos, b);
        let _ = holdfast_core::dynamics::parse_scenario(&mutated, Path::new("m.toml"), &grid);
        let _ = holdfast_core::dynamics::parse_scenario(truncate(DEMO_FAULT, pos), Path::new("t.toml"), &grid);
    }

    #[test]
    fn grid_loader_never_panics_on_random_text(s in "\\PC{0,400}") {
        let _ = format::parse_grid(&s, Path::new("random.toml"));
    }

    #[test]
    fn grid_loader_never_panics_on_truncated_files(pos in 0usize..100_000) {
        let _ = format::parse_grid(truncate(DEMO, pos), Path::new("truncated.toml"));
    }

    #[test]
    fn grid_loader_and_solver_never_panic_on_mutated_files(
        edits in proptest::collection::vec((0usize..100_000, prop::sample::select(b"0123456789.-+e=[]\"nai x\n".to_vec())), 1..6)
    ) {
        let mut text = DEMO.to_string();
        for (pos, b) in edits {
            text = mutate(&text, pos, b);
        }
        if let Ok(grid) = format::parse_grid(&text, Path::new("mutated.toml")) {
            // Whatever loads must solve or report divergence, never panic.
            let _ = solve(&grid, &Outages::none(), &PowerFlowOptions::default());
        }
    }

    #[test]
    fn cdf_reader_never_panics(pos in 0usize..100_000, b in any::<u8>(), cut in 0usize..100_000) {
        let mutated = mutate(IEEE14, pos, b);
        let _ = cdf::parse_cdf(&mutated, Path::new("mutated.cdf"));
        let _ = cdf::parse_cdf(truncate(IEEE14, cut), Path::new("truncated.cdf"));
    }

    #[test]
    fn cdf_reader_never_panics_on_random_text(s in "\\PC{0,300}") {
        let _ = cdf::parse_cdf(&s, Path::new("random.cdf"));
    }

    #[test]
    fn solver_never_panics_on_extreme_loads(scale in 0.0f64..20.0, branch in 0usize..51) {
        let grid = format::parse_grid(DEMO, Path::new("demo.toml")).unwrap().with_load_scaled(scale);
        let outages = Outages { branches: vec![holdfast_core::BranchIdx(branch as u32)], ..Outages::default() };
        let _ = solve(&grid, &outages, &PowerFlowOptions::default());
    }
}

/// The demo grid with its bus records in the given order.
fn demo_with_bus_order(order: &[usize]) -> holdfast_core::Grid {
    let mut doc: toml::Value = toml::from_str(DEMO).unwrap();
    let buses = doc["bus"].as_array().unwrap().clone();
    let shuffled: Vec<toml::Value> = order.iter().map(|&k| buses[k].clone()).collect();
    doc["bus"] = toml::Value::Array(shuffled);
    format::parse_grid(&toml::to_string(&doc).unwrap(), Path::new("shuffled.toml")).unwrap()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    /// Equivariance (a property of the equations, not of our code): numbering the buses in
    /// another order permutes the solution and changes nothing else.
    #[test]
    fn bus_order_does_not_change_the_solution(order in Just((0..DEMO.matches("[[bus]]").count()).collect::<Vec<usize>>()).prop_shuffle()) {
        let options = PowerFlowOptions::default();
        let base = demo_with_bus_order(&(0..order.len()).collect::<Vec<_>>());
        let shuffled = demo_with_bus_order(&order);
        let a = solve(&base, &Outages::none(), &options).converged().unwrap();
        let b = solve(&shuffled, &Outages::none(), &options).converged().unwrap();
        for (i, bus) in base.buses.iter().enumerate() {
            let j = shuffled.bus_idx(bus.number).unwrap().get();
            prop_assert!((a.v_pu[i] - b.v_pu[j]).abs() < 1e-9);
            prop_assert!((a.angle_rad[i] - b.angle_rad[j]).abs() < 1e-9);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    /// Simulations of random faults and trips on the demo grid end with a verdict (stable,
    /// unstable or numerical failure), never a panic.
    #[test]
    fn simulation_never_panics_on_random_contingencies(
        bus in 0usize..32,
        x_pu in prop_oneof![Just(1e-6), 1e-4f64..0.5],
        clear_s in 0.11f64..0.6,
        branch in 0usize..51,
        shed_share in 0.0f64..1.0,
    ) {
        use holdfast_core::dynamics::{Event, Scenario, SimulationOptions, TimedEvent, simulate};
        let grid = format::parse_grid(DEMO, Path::new("demo.toml")).unwrap();
        let pf = solve(&grid, &Outages::none(), &PowerFlowOptions::default()).converged().unwrap();
        let bus = holdfast_core::BusIdx((bus % grid.n_buses()) as u32);
        let branch = holdfast_core::BranchIdx((branch % grid.branches.len()) as u32);
        let mut events = vec![
            TimedEvent { t_s: 0.1, event: Event::Fault { bus, r_pu: 0.0, x_pu } },
            TimedEvent { t_s: clear_s, event: Event::ClearFault { bus } },
            TimedEvent { t_s: clear_s, event: Event::TripBranch(branch) },
        ];
        for l in &grid.loads {
            events.push(TimedEvent {
                t_s: clear_s + 0.1,
                event: Event::Shed { bus: l.bus, p_pu: shed_share * l.p_pu },
            });
        }
        let options = SimulationOptions { duration_s: 1.5, ..SimulationOptions::default() };
        let scenario = Scenario { name: "random".into(), events };
        let result = simulate(&grid, &Outages::none(), &pf, &scenario, &options);
        prop_assert!(result.is_ok(), "{:?}", result.err());
        // Events built by hand with indices from another grid are an error, not a panic.
        let foreign = Scenario {
            name: "foreign".into(),
            events: vec![TimedEvent { t_s: 0.1, event: Event::ClearFault { bus: holdfast_core::BusIdx(9999) } }],
        };
        prop_assert!(simulate(&grid, &Outages::none(), &pf, &foreign, &options).is_err());
    }
}
