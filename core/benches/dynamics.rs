//! Dynamic-simulation benchmark: median wall time of a 10-s run with a fault, per case, one
//! thread, and the time per simulated second. Printed as a table.
//!
//! Run with `cargo bench -p holdfast-core --bench dynamics`. Grids, power flows and scenarios
//! are built outside the timed region; each timed run sets up the simulation (model
//! initialisation included) and integrates to the end at a half-cycle step.

#![allow(
    clippy::print_stdout,
    clippy::print_stderr,
    clippy::unwrap_used,
    clippy::expect_used
)] // reason: a bench binary reports on the terminal; setup failures are bugs

#[path = "../tests/common/mod.rs"]
mod common;

use std::hint::black_box;
use std::path::Path;
use std::time::{Duration, Instant};

use holdfast_core::dynamics::{
    Event, MachineModelChoice, Scenario, SimulationOptions, TimedEvent, read_scenario, simulate,
};
use holdfast_core::powerflow::{PowerFlowOptions, PowerFlowSolution, solve};
use holdfast_core::{
    BranchIdx, BusIdx, ExciterData, Grid, MachineDynamics, Outages, format, synthetic,
};

struct Case {
    name: String,
    grid: Grid,
    pf: PowerFlowSolution,
    scenario: Scenario,
    options: SimulationOptions,
}

fn case(name: &str, grid: Grid, scenario: Scenario, model: MachineModelChoice) -> Case {
    let pf = solve(&grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .unwrap_or_else(|e| panic!("{name}: {e}"));
    Case {
        name: name.to_string(),
        grid,
        pf,
        scenario,
        options: SimulationOptions {
            machine_model: model,
            duration_s: 10.0,
            // Time the whole window, as a stable labelling run would.
            early_stop: false,
            ..SimulationOptions::default()
        },
    }
}

/// Typical round-rotor data (DOMAIN.md 2.2 ranges) and a static exciter for the synthetic
/// grids, whose generators carry no dynamic data; output shared evenly.
fn give_dynamics(mut grid: Grid) -> Grid {
    let (load, _) = grid.total_load_mw_mvar();
    let n = grid.machines.len() as f64;
    for m in &mut grid.machines {
        m.p_pu = load / grid.s_base_mva / n;
        m.dynamics = Some(MachineDynamics {
            h_s: 5.0,
            damping_pu: 0.0,
            ra_pu: 0.003,
            xd_pu: 1.8,
            xq_pu: 1.7,
            xd_transient_pu: 0.3,
            xq_transient_pu: 0.55,
            xl_pu: 0.15,
            td0_transient_s: 7.0,
            tq0_transient_s: 0.7,
            subtransient: None,
        });
        m.exciter = Some(ExciterData::St1a {
            t_measure_s: 0.02,
            t_lead_s: 1.0,
            t_lag_s: 10.0,
            gain: 200.0,
            t_amplifier_s: 0.02,
            field_max_pu: 6.0,
            field_min_pu: -5.0,
        });
    }
    grid
}

fn fault_and_trip(grid: &Grid, bus: BusIdx) -> Scenario {
    let branch = grid
        .branches
        .iter()
        .position(|b| b.from == bus || b.to == bus)
        .unwrap();
    let clear = 0.1 + 5.0 / grid.frequency_hz;
    Scenario {
        name: "fault".into(),
        events: vec![
            TimedEvent {
                t_s: 0.1,
                event: Event::Fault {
                    bus,
                    r_pu: 0.0,
                    x_pu: 1e-4,
                },
            },
            TimedEvent {
                t_s: clear,
                event: Event::ClearFault { bus },
            },
            TimedEvent {
                t_s: clear,
                event: Event::TripBranch(BranchIdx(branch as u32)),
            },
        ],
    }
}

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let mut cases = Vec::new();
    let (_, wscc9, _) = common::wscc9();
    let bus7 = wscc9.bus_idx(7).unwrap();
    let s = fault_and_trip(&wscc9, bus7);
    cases.push(case(
        "WSCC 9-bus, classical",
        wscc9.clone(),
        s.clone(),
        MachineModelChoice::Classical,
    ));
    cases.push(case(
        "WSCC 9-bus, two-axis",
        wscc9,
        s,
        MachineModelChoice::Detailed,
    ));
    let demo = format::load_grid(&root.join("scenarios/quillmoor.toml")).unwrap();
    let s = read_scenario(&root.join("scenarios/quillmoor-fault.toml"), &demo).unwrap();
    cases.push(case(
        "Quillmoor demo, all models",
        demo,
        s,
        MachineModelChoice::Detailed,
    ));
    for n in [500, 2000] {
        let g = give_dynamics(synthetic::meshed_grid(n, 1));
        let mid = BusIdx((g.n_buses() / 2) as u32);
        let s = fault_and_trip(&g, mid);
        let name = format!("synthetic {} buses", g.n_buses());
        cases.push(case(&name, g, s, MachineModelChoice::Detailed));
    }
    println!(
        "{:<30} {:>6} {:>8} {:>7} {:>7} {:>12} {:>16}",
        "case (10 s, fault)", "buses", "devices", "steps", "iters", "median run", "per simulated s"
    );
    for c in &cases {
        let run = || simulate(&c.grid, &Outages::none(), &c.pf, &c.scenario, &c.options);
        let first = run().unwrap_or_else(|e| panic!("{}: {e}", c.name));
        let mut times = Vec::new();
        let started = Instant::now();
        while times.len() < 5 || (started.elapsed() < Duration::from_secs(3) && times.len() < 200) {
            let t = Instant::now();
            black_box(run().unwrap());
            times.push(t.elapsed());
        }
        times.sort();
        let median = times[times.len() / 2].as_secs_f64();
        let devices = c.grid.machines.len() + c.grid.loads.len() + c.grid.wind_plants.len();
        println!(
            "{:<30} {:>6} {:>8} {:>7} {:>7} {:>9.2} ms {:>13.2} ms   ({}, {} runs)",
            c.name,
            c.grid.n_buses(),
            devices,
            first.stats.steps,
            first.stats.iterations,
            median * 1e3,
            median * 1e3 / first.verdict.end_time_s.max(1e-9),
            if first.verdict.is_stable() {
                "stable"
            } else {
                "unstable"
            },
            times.len()
        );
    }
}
