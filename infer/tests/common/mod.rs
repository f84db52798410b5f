//! Fixtures shared by the serving tests: the demo grid (fictional, `scenarios/quillmoor.toml`),
//! its solved state as a snapshot, and a model with fixed pseudo-random weights.

#![allow(dead_code, clippy::unwrap_used, clippy::expect_used)] // reason: shared by several test binaries, each using a part; test code

use std::path::{Path, PathBuf};

use holdfast_core::dynamics::{ContingencyTiming, SimulationOptions};
use holdfast_core::format::{grid_fingerprint, load_grid};
use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::shed::Placement;
use holdfast_core::{Grid, Outages};
use holdfast_infer::model::{Array, Normalisation};
use holdfast_infer::{
    Advisor, Architecture, ContingencySpec, ModelFile, RecheckSettings, Snapshot,
};

/// The workspace root: the nearest folder above this crate holding `scenarios/`.
pub(crate) fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .ancestors()
        .find(|p| p.join("scenarios").is_dir())
        .expect("the workspace holds scenarios/")
        .to_path_buf()
}

pub(crate) fn grid() -> Grid {
    load_grid(&root().join("scenarios/quillmoor.toml")).unwrap()
}

/// The grid's own state: its loads and dispatch, solved.
pub(crate) fn snapshot(grid: &Grid) -> Snapshot {
    let pf = solve(grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .unwrap();
    let s = grid.s_base_mva;
    Snapshot {
        bus_v_pu: pf.v_pu.clone(),
        bus_angle_deg: pf.angle_rad.iter().map(|a| a.to_degrees()).collect(),
        load_p_mw: grid.loads.iter().map(|l| l.p_pu * s).collect(),
        load_q_mvar: grid.loads.iter().map(|l| l.q_pu * s).collect(),
        load_sheddable_mw: grid
            .loads
            .iter()
            .map(|l| l.p_pu * l.sheddable_fraction * s)
            .collect(),
        machine_on: grid.machines.iter().map(|m| m.in_service).collect(),
        machine_p_mw: pf.machine_p_pu.iter().map(|p| p * s).collect(),
        machine_q_mvar: pf.machine_q_pu.iter().map(|q| q * s).collect(),
        wind_p_mw: grid.wind_plants.iter().map(|w| w.p_pu * s).collect(),
        branch_closed: grid.branches.iter().map(|b| b.in_service).collect(),
    }
}

/// Re-check settings of a typical study (common practice, no single source): event at
/// 0.1 s, five-cycle clearing, bolted fault, action 0.1-0.3 s after.
pub(crate) fn recheck() -> RecheckSettings {
    RecheckSettings {
        timing: ContingencyTiming {
            event_at_s: 0.1,
            clearing_time_s: 0.083,
            fault_x_pu: 1e-4,
        },
        action_delay_min_s: 0.1,
        action_delay_max_s: 0.3,
        placement: Placement::DistanceWeighted,
        simulation: SimulationOptions::default(),
    }
}

/// A GraphSAGE model for the grid with fixed pseudo-random weights.
pub(crate) fn model(grid: &Grid) -> ModelFile {
    let arch = Architecture::Sage {
        hidden: 16,
        bus_layers: 2,
        branch_layers: 1,
    };
    let mut state = 99_u64;
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
                    ((state >> 40) as f32 / (1u64 << 24) as f32 - 0.5) * 0.4
                })
                .collect();
            Array { name, shape, data }
        })
        .collect();
    ModelFile::new(
        arch,
        Normalisation::identity(),
        weights,
        grid_fingerprint(grid).unwrap(),
        grid.name.clone(),
        recheck(),
    )
}

pub(crate) fn advisor() -> Advisor {
    let g = grid();
    Advisor::new(&model(&g), Path::new("test.hfmodel"), g).unwrap()
}

/// A machine trip of the demo grid's largest unit.
pub(crate) fn unit_trip(grid: &Grid) -> ContingencySpec {
    let m = grid
        .machines
        .iter()
        .max_by(|a, b| a.p_pu.total_cmp(&b.p_pu))
        .unwrap();
    ContingencySpec {
        fault_bus: None,
        trip: vec![m.id.clone()],
    }
}
