//! Which clearing times of a fault keep the machines in step: a scan over clearing times (first
//! swing, rotor angle from the centre of inertia only) and the critical clearing time found by
//! bisection below the first unstable one.
//!
//! `cargo run --release -p holdfast-core --example clearing_scan -- GRID.toml BUS BRANCH
//! [STEP_S [FROM_S TO_S EVERY_S]]`: a bolted fault at bus BUS from 0.1 s, cleared by opening
//! branch BRANCH; clearing times 0.05-0.60 s every 10 ms (or as given), then the critical time
//! to 1 ms below the first unstable one. 5-s runs, half-cycle steps unless STEP_S is given (0:
//! half a cycle).

#![allow(
    clippy::print_stdout,
    clippy::print_stderr,
    clippy::unwrap_used,
    clippy::expect_used
)] // reason: a one-off report on the terminal; bad input is a usage error

use std::path::Path;

use holdfast_core::Element;
use holdfast_core::dynamics::{
    BOLTED_FAULT_X_PU, Event, Scenario, SimulationOptions, StabilityCriteria, TimedEvent, simulate,
};
use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Outages, format};

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let grid = format::load_grid(Path::new(&args[0])).unwrap();
    let bus = grid.bus_idx(args[1].parse().unwrap()).unwrap();
    let Some(Element::Branch(branch)) = grid.element(&args[2]) else {
        panic!("no branch \"{}\"", args[2]);
    };
    let step_s = args
        .get(3)
        .map(|s| s.parse::<f64>().unwrap())
        .filter(|&h| h > 0.0);
    let range: Vec<f64> = args[4.min(args.len())..]
        .iter()
        .map(|s| s.parse().unwrap())
        .collect();
    let (from, to, every) = match range[..] {
        [a, b, c] => (a, b, c),
        _ => (0.05, 0.60, 0.01),
    };
    let pf = solve(&grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .unwrap();
    // Rotor angle only: the frequency, voltage and damping checks off.
    let mut criteria = StabilityCriteria::for_frequency(grid.frequency_hz);
    for (name, value) in [
        ("nadir_hz", 0.0),
        ("zenith_hz", 2.0 * grid.frequency_hz),
        ("final_band_hz", grid.frequency_hz),
        ("recovery_level", 0.0),
        ("floor_level", 0.0),
        ("over_voltage_pu", 3.0),
        ("sustained_over_voltage_pu", 3.0),
        ("final_voltage_min_pu", 0.0),
        ("final_voltage_max_pu", 3.0),
        ("damping_window_s", 0.0),
    ] {
        criteria.set_field(name, value, grid.frequency_hz).unwrap();
    }
    let options = SimulationOptions {
        duration_s: 5.0,
        step_s,
        criteria: Some(criteria),
        ..SimulationOptions::default()
    };
    let stable = |clearing_s: f64| {
        let scenario = Scenario {
            name: "fault".into(),
            events: vec![
                TimedEvent {
                    t_s: 0.1,
                    event: Event::Fault {
                        bus,
                        r_pu: 0.0,
                        x_pu: BOLTED_FAULT_X_PU,
                    },
                },
                TimedEvent {
                    t_s: 0.1 + clearing_s,
                    event: Event::ClearFault { bus },
                },
                TimedEvent {
                    t_s: 0.1 + clearing_s,
                    event: Event::TripBranch(branch),
                },
            ],
        };
        let out = simulate(&grid, &Outages::none(), &pf, &scenario, &options).unwrap();
        out.verdict.is_stable()
    };
    let n = ((to - from) / every).round() as usize;
    let times: Vec<f64> = (0..=n).map(|k| from + k as f64 * every).collect();
    let scan: String = times
        .iter()
        .map(|&t| if stable(t) { 'S' } else { 'U' })
        .collect();
    println!(
        "clearing {from:.3}-{to:.3} s every {:.0} ms (S stable, U unstable): {scan}",
        every * 1e3
    );
    let Some(first) = scan.find('U') else {
        println!("stable at every clearing time scanned");
        return;
    };
    if first == 0 {
        println!("unstable at every clearing time scanned");
        return;
    }
    let (mut lo, mut hi) = (times[first - 1], times[first]);
    while hi - lo > 1e-3 {
        let mid = 0.5 * (lo + hi);
        if stable(mid) {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let later = scan[first..].contains('S');
    println!(
        "critical clearing time {:.3} s{}",
        0.5 * (lo + hi),
        if later {
            " (stable again at some longer clearing times)"
        } else {
            ""
        }
    );
}
