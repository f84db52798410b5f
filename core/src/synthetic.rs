//! Synthetic meshed grids of any size, for benchmarks and scale tests.
//!
//! The grid is a square lattice of 230 kV buses with every row joined and about half of the
//! vertical links kept (about 1.5 branches per bus, typical of transmission networks), lines of
//! typical impedance, a voltage-regulating machine on every fifth bus and a load on most others.
//! It is deterministic for a given `(n_buses, seed)`. It is not meant to look like any real grid.

use crate::model::*;

/// A small deterministic generator (SplitMix64), so that `core` needs no random-number crate.
struct SplitMix(u64);

impl SplitMix {
    fn next_f64(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^= z >> 31;
        (z >> 11) as f64 / (1u64 << 53) as f64
    }

    fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.next_f64()
    }
}

/// Builds a synthetic meshed grid of about `n_buses` buses (rounded to a full lattice row).
pub fn meshed_grid(n_buses: usize, seed: u64) -> Grid {
    let side = (n_buses.max(4) as f64).sqrt().ceil() as usize;
    let rows = n_buses.max(4).div_ceil(side);
    let n = rows * side;
    let mut rng = SplitMix(seed);
    let idx = |r: usize, c: usize| BusIdx((r * side + c) as u32);
    let buses: Vec<Bus> = (0..n)
        .map(|i| Bus {
            number: i as u32 + 1,
            name: format!("Synthetic {}", i + 1),
            base_kv: 230.0,
            v_min_pu: 0.9,
            v_max_pu: 1.1,
            area: 1 + (i / side / 10) as u32,
            is_reference: i == 0,
            angle_set_rad: 0.0,
            stored_solution: None,
        })
        .collect();
    let mut branches = Vec::new();
    let mut add_line = |rng: &mut SplitMix, from: BusIdx, to: BusIdx| {
        // Typical 230 kV line of 30-80 km on 100 MVA: x about 0.03-0.07 pu, X/R about 10.
        let x = rng.uniform(0.03, 0.07);
        branches.push(Branch {
            id: format!("L{}-{}", from.0 + 1, to.0 + 1),
            kind: BranchKind::Line,
            from,
            to,
            r_pu: x / 10.0,
            x_pu: x,
            b_pu: x * 1.2,
            tap_ratio: 1.0,
            phase_shift_rad: 0.0,
            rating_mva: 400.0,
            emergency_rating_mva: 480.0,
            in_service: true,
        });
    };
    for r in 0..rows {
        for c in 0..side {
            if c + 1 < side {
                add_line(&mut rng, idx(r, c), idx(r, c + 1));
            }
            if r + 1 < rows && (c == 0 || rng.next_f64() < 0.5) {
                add_line(&mut rng, idx(r, c), idx(r + 1, c));
            }
        }
    }
    let mut loads = Vec::new();
    let mut machines = Vec::new();
    let mut total_load = 0.0;
    for i in 0..n {
        let bus = BusIdx(i as u32);
        if i % 5 == 0 {
            machines.push(SyncMachine {
                id: format!("G{}", i + 1),
                bus,
                p_pu: 0.0,
                q_pu: 0.0,
                v_set_pu: Some(rng.uniform(1.0, 1.03)),
                q_min_pu: -1.0,
                q_max_pu: 2.0,
                p_min_pu: 0.0,
                p_max_pu: 5.0,
                rating_mva: 400.0,
                dynamics: None,
                exciter: None,
                governor: None,
                in_service: true,
            });
        } else if rng.next_f64() < 0.8 {
            let p = rng.uniform(0.1, 0.3);
            total_load += p;
            loads.push(Load {
                id: format!("D{}", i + 1),
                bus,
                p_pu: p,
                q_pu: p * 0.33,
                voltage_dependence: VoltageDependence::CONSTANT_POWER,
                frequency_dependence: FrequencyDependence::default(),
                motor_share: 0.0,
                motor: MotorData::TYPICAL,
                sheddable_fraction: 0.0,
                priority: 0,
                in_service: true,
            });
        }
    }
    // Dispatch 97 % of the load evenly; the reference covers the rest and the losses.
    let share = 0.97 * total_load / machines.len() as f64;
    for m in machines.iter_mut().skip(1) {
        m.p_pu = share;
    }
    Grid::assemble(
        format!("synthetic meshed grid, {n} buses, seed {seed}"),
        100.0,
        60.0,
        buses,
        branches,
        Vec::new(),
        loads,
        machines,
        Vec::new(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::powerflow::{PowerFlowOptions, solve};

    #[test]
    fn synthetic_grid_is_connected_and_solves() {
        let grid = meshed_grid(400, 7);
        assert_eq!(
            crate::topology::islands(&grid, &Outages::none())
                .members
                .len(),
            1
        );
        let ratio = grid.branches.len() as f64 / grid.n_buses() as f64;
        assert!((1.3..1.7).contains(&ratio), "branches per bus {ratio}");
        let sol = solve(&grid, &Outages::none(), &PowerFlowOptions::default())
            .converged()
            .unwrap();
        assert!(sol.iterations <= 8);
    }
}
