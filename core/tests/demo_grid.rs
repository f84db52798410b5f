//! The bundled demo grid meets the acceptance checks of a planning base case (common practice,
//! no single source; the shared domain notes list them): it solves from a flat start at light,
//! nominal and peak load with every voltage in its 0.95-1.05 pu band and no branch above its
//! rating, wind carries at least 30 % of the load, and every single-branch outage still solves.

#![allow(clippy::unwrap_used, clippy::expect_used)] // reason: test helpers, where a panic is the failure report

use std::path::Path;

use holdfast_core::powerflow::{PowerFlowOptions, PowerFlowSolution, solve};
use holdfast_core::{BranchIdx, Grid, Outages, format};

fn scenario_grid(file: &str) -> Grid {
    format::load_grid(
        &Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("../scenarios")
            .join(file),
    )
    .unwrap()
}

fn demo() -> Grid {
    scenario_grid("quillmoor.toml")
}

/// Solves a load level and checks every bus voltage is inside its band.
fn solve_in_band(grid: &Grid, scale: f64) -> PowerFlowSolution {
    let sol = solve(grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .unwrap();
    for (i, bus) in grid.buses.iter().enumerate() {
        assert!(
            (bus.v_min_pu..=bus.v_max_pu).contains(&sol.v_pu[i]),
            "x{scale}: bus {} at {} pu",
            bus.number,
            sol.v_pu[i]
        );
    }
    sol
}

/// Checks no branch is loaded above its normal rating.
fn assert_within_ratings(grid: &Grid, sol: &PowerFlowSolution, scale: f64) {
    for (k, br) in grid.branches.iter().enumerate() {
        let s_mva = sol.branch_flows[k].s_max_pu() * grid.s_base_mva;
        assert!(
            s_mva <= br.rating_mva,
            "x{scale}: {} at {s_mva:.0} of {} MVA",
            br.id,
            br.rating_mva
        );
    }
}

#[test]
fn base_case_is_sound_at_light_nominal_and_peak_load() {
    let base = demo();
    for scale in [0.6, 1.0, 1.15] {
        let grid = base.with_load_scaled(scale);
        let sol = solve_in_band(&grid, scale);
        assert_within_ratings(&grid, &sol, scale);
        assert!(sol.q_limited.is_empty(), "x{scale}: {:?}", sol.q_limited);
        let wind: f64 = grid.wind_plants.iter().map(|w| w.p_pu).sum();
        let load: f64 = grid.loads.iter().map(|l| l.p_pu).sum();
        assert!(
            wind >= 0.3 * load,
            "x{scale}: wind {wind} pu of load {load} pu"
        );
    }
}

#[test]
fn every_single_branch_outage_solves() {
    let grid = demo();
    for k in 0..grid.branches.len() {
        let outages = Outages {
            branches: vec![BranchIdx(k as u32)],
            ..Outages::default()
        };
        let sol = solve(&grid, &outages, &PowerFlowOptions::default())
            .converged()
            .unwrap_or_else(|e| panic!("outage of {}: {e}", grid.branches[k].id));
        let worst = sol
            .v_pu
            .iter()
            .zip(&sol.energised)
            .filter(|(_, e)| **e)
            .map(|(v, _)| *v)
            .fold(f64::INFINITY, f64::min);
        // N-1 band of common planning practice: 0.90-1.10 pu.
        assert!(
            worst >= 0.90,
            "outage of {}: lowest voltage {worst}",
            grid.branches[k].id
        );
    }
}

mod contingencies {
    //! A design requirement of the demo grid (fictional, ours), not a physics check: its
    //! bundled contingencies include one that is stable, one a modest shed saves and one that
    //! no shed saves, so that the dataset and the advisor have all three kinds to learn from.

    use holdfast_core::dynamics::{
        Event, Scenario, SimulationOptions, TimedEvent, read_scenario, simulate,
    };
    use holdfast_core::powerflow::{PowerFlowOptions, solve};
    use holdfast_core::{Grid, Outages, format};
    use std::path::Path;

    fn scenario(grid: &Grid, name: &str) -> Scenario {
        read_scenario(
            &Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("../scenarios")
                .join(name),
            grid,
        )
        .unwrap()
    }

    fn stable(grid: &Grid, s: &Scenario) -> bool {
        let pf = solve(grid, &Outages::none(), &PowerFlowOptions::default())
            .converged()
            .unwrap();
        simulate(
            grid,
            &Outages::none(),
            &pf,
            s,
            &SimulationOptions::default(),
        )
        .unwrap()
        .verdict
        .is_stable()
    }

    /// `s` with `share` of every load's shed-able power removed at `t_s`.
    fn with_shed(grid: &Grid, s: &Scenario, t_s: f64, share: f64) -> Scenario {
        let mut s = s.clone();
        for l in grid.loads.iter().filter(|l| l.sheddable_fraction > 0.0) {
            s.events.push(TimedEvent {
                t_s,
                event: Event::Shed {
                    bus: l.bus,
                    p_pu: share * l.sheddable_fraction * l.p_pu,
                },
            });
        }
        s
    }

    #[test]
    fn demo_contingencies_are_stable_savable_and_unsavable() {
        let grid = format::load_grid(
            &Path::new(env!("CARGO_MANIFEST_DIR")).join("../scenarios/quillmoor.toml"),
        )
        .unwrap();
        let fault = scenario(&grid, "quillmoor-fault.toml");
        assert!(
            stable(&grid, &fault),
            "the City North fault is meant to be stable"
        );

        let wind = scenario(&grid, "quillmoor-wind-loss.toml");
        assert!(
            !stable(&grid, &wind),
            "losing Windrise is meant to need action"
        );
        // A modest shed: a quarter of the shed-able load (about 170 MW of 2,400) at 0.35 s.
        assert!(stable(&grid, &with_shed(&grid, &wind, 0.35, 0.25)));

        let stuck = scenario(&grid, "quillmoor-breaker-failure.toml");
        assert!(!stable(&grid, &stuck));
        for share in [0.25, 0.5, 1.0] {
            assert!(
                !stable(&grid, &with_shed(&grid, &stuck, 0.5, share)),
                "no shed saves the breaker-failure case (share {share})"
            );
        }
    }
}

fn large() -> Grid {
    scenario_grid("vellmark.toml")
}

#[test]
fn large_demo_grid_is_a_real_test_of_scale_and_a_sound_base_case() {
    // Issue 4: 150-300 buses, several areas, enough machines and wind plants. The same planning
    // checks as the small grid (common practice), at light, nominal and its stated peak (x1.1):
    // every voltage inside its band, no branch above its rating at light and nominal load.
    let base = large();
    let mut areas: Vec<u32> = base.buses.iter().map(|b| b.area).collect();
    areas.sort_unstable();
    areas.dedup();
    assert!(
        (150..=300).contains(&base.n_buses()),
        "{} buses",
        base.n_buses()
    );
    assert!(areas.len() >= 5, "{} areas", areas.len());
    assert!(base.machines.len() >= 20 && base.wind_plants.len() >= 6);
    for scale in [0.6, 1.0, 1.1] {
        let grid = base.with_load_scaled(scale);
        let sol = solve_in_band(&grid, scale);
        if scale <= 1.0 {
            assert_within_ratings(&grid, &sol, scale);
        }
    }
}
