//! The candidate buses of a study and their shed-able load; the placement of a total over them
//! lives in `holdfast_core::shed` (the advice re-check uses it too).

use holdfast_core::{BusIdx, Grid};

use crate::study::Study;
pub use holdfast_core::shed::{Candidate, DISTANCE_FLOOR_PU, Placement, place};

/// Shed-able active load per load, pu, under the study's shedding settings, with the loads
/// at `load_p_pu` (a load out of service, or not consuming, sheds nothing).
pub fn sheddable_per_load(grid: &Grid, study: &Study, load_p_pu: &[f64]) -> Vec<f64> {
    grid.loads
        .iter()
        .zip(load_p_pu)
        .map(|(l, &p)| {
            let allowed = study.shedding.buses.is_empty()
                || study
                    .shedding
                    .buses
                    .contains(&grid.buses[l.bus.get()].number);
            if l.in_service && p > 0.0 && allowed {
                p * study.sheddable_fraction(l)
            } else {
                0.0
            }
        })
        .collect()
}

/// The candidate buses of a grid (at its own load level) under the study's shedding settings,
/// in bus order; buses with nothing to shed are left out.
pub fn candidates(grid: &Grid, study: &Study) -> Vec<Candidate> {
    let own: Vec<f64> = grid.loads.iter().map(|l| l.p_pu).collect();
    let mut per_bus = vec![0.0; grid.n_buses()];
    for (l, s) in grid.loads.iter().zip(sheddable_per_load(grid, study, &own)) {
        per_bus[l.bus.get()] += s;
    }
    per_bus
        .iter()
        .enumerate()
        .filter(|(_, s)| **s > 1e-9)
        .map(|(k, &s)| Candidate {
            bus: BusIdx(k as u32),
            sheddable_pu: s,
        })
        .collect()
}
