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
    Event, MachineModelChoice, Scenario, SimulationOptions, StabilityCriteria, TimedEvent,
    read_scenario, simulate,
};
use holdfast_core::powerflow::{PowerFlowOptions, PowerFlowSolution, solve};
use holdfast_core::{
    BranchIdx, BusIdx, ExciterData, Grid, MachineDynamics, Outages, VoltageDependence, format,
    synthetic,
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
            saturation: None,
        });
        m.exciter = Some(static_exciter());
    }
    grid
}

/// A static exciter with typical settings (DOMAIN.md 2.3 ranges).
fn static_exciter() -> ExciterData {
    ExciterData::St1a {
        t_measure_s: 0.02,
        t_lead_s: 1.0,
        t_lag_s: 10.0,
        gain: 200.0,
        t_amplifier_s: 0.02,
        amplifier_max_pu: 6.0,
        amplifier_min_pu: -5.0,
        field_max_pu: 6.0,
        field_min_pu: -5.0,
    }
}

fn fault_and_trip(grid: &Grid, bus: BusIdx) -> Scenario {
    // Trip a line at the faulted bus, not a machine's own connection (on WSCC 9-bus at bus 7:
    // line 5-7, as in the published case).
    let has_machine = |b: BusIdx| grid.machines.iter().any(|m| m.bus == b);
    let branch = grid
        .branches
        .iter()
        .position(|b| {
            (b.from == bus && !has_machine(b.to)) || (b.to == bus && !has_machine(b.from))
        })
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
    // WSCC 9-bus as in the published case: constant-impedance loads, no frequency control
    // (so the rotor-angle criterion alone judges it).
    let (_, mut wscc9, _) = common::wscc9();
    for l in &mut wscc9.loads {
        l.voltage_dependence = VoltageDependence {
            p_z: 1.0,
            p_i: 0.0,
            p_p: 0.0,
            q_z: 1.0,
            q_i: 0.0,
            q_p: 0.0,
        };
    }
    let bus7 = wscc9.bus_idx(7).unwrap();
    let s = fault_and_trip(&wscc9, bus7);
    // Two-axis machines with constant field voltage lose synchronism on this fault (the field
    // flux decays; see the issue notes), and a fast static exciter on undamped machines drives
    // growing oscillations (no stabiliser): the bench gives the two-axis run the static
    // exciter and a typical damping of 2 pu.
    let mut wscc9_excited = wscc9.clone();
    for m in &mut wscc9_excited.machines {
        m.exciter = Some(static_exciter());
        if let Some(d) = m.dynamics.as_mut() {
            d.damping_pu = 2.0;
        }
    }
    for (name, grid, model) in [
        (
            "WSCC 9-bus, classical",
            &wscc9,
            MachineModelChoice::Classical,
        ),
        (
            "WSCC 9-bus, two-axis, ST1A",
            &wscc9_excited,
            MachineModelChoice::Detailed,
        ),
    ] {
        let mut c = case(name, grid.clone(), s.clone(), model);
        c.options.criteria = Some(StabilityCriteria {
            nadir_hz: 0.0,
            zenith_hz: f64::INFINITY,
            final_band_hz: f64::INFINITY,
            ..StabilityCriteria::for_frequency(wscc9.frequency_hz)
        });
        cases.push(c);
    }
    let demo = format::load_grid(&root.join("scenarios/quillmoor.toml")).unwrap();
    let s = read_scenario(&root.join("scenarios/quillmoor-fault.toml"), &demo).unwrap();
    let demo_case = case(
        "Quillmoor demo, all models",
        demo,
        s,
        MachineModelChoice::Detailed,
    );
    // The same run at the stricter common-practice Newton tolerance, to show its cost.
    let mut strict = case(
        "Quillmoor demo, tolerance 1e-6",
        demo_case.grid.clone(),
        demo_case.scenario.clone(),
        MachineModelChoice::Detailed,
    );
    strict.options.tolerance = 1e-6;
    // The same run with the stabilisers taken out, to separate their cost from the solver's.
    let mut bare_grid = demo_case.grid.clone();
    for m in &mut bare_grid.machines {
        m.stabiliser = None;
    }
    let bare = case(
        "Quillmoor demo, no stabilisers",
        bare_grid,
        demo_case.scenario.clone(),
        MachineModelChoice::Detailed,
    );
    cases.push(demo_case);
    cases.push(strict);
    cases.push(bare);
    for n in [500, 2000] {
        let g = give_dynamics(synthetic::meshed_grid(n, 1));
        let mid = BusIdx((g.n_buses() / 2) as u32);
        let s = fault_and_trip(&g, mid);
        let name = format!("synthetic {} buses", g.n_buses());
        cases.push(case(&name, g, s, MachineModelChoice::Detailed));
    }
    // `cargo bench --bench dynamics -- demo` runs only the cases whose name holds "demo".
    let filters: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .map(|a| a.to_lowercase())
        .collect();
    cases.retain(|c| {
        filters.is_empty() || filters.iter().any(|f| c.name.to_lowercase().contains(f))
    });
    println!(
        "{:<30} {:>6} {:>8} {:>7} {:>7} {:>7} {:>12} {:>16}",
        "case (10 s, fault)",
        "buses",
        "devices",
        "steps",
        "iters",
        "jacobs",
        "median run",
        "per simulated s"
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
            "{:<30} {:>6} {:>8} {:>7} {:>7} {:>7} {:>9.2} ms {:>13.2} ms   ({}, {} runs)",
            c.name,
            c.grid.n_buses(),
            devices,
            first.stats.steps,
            first.stats.iterations,
            first.stats.factorisations,
            median * 1e3,
            median * 1e3 / first.verdict.end_time_s.max(1e-9),
            first
                .verdict
                .failure
                .as_ref()
                .map_or("stable".to_string(), |f| format!("{:?}", f.criterion)),
            times.len()
        );
    }
}
