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
                stabiliser: None,
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

/// Plant types of the regional grid, each taking its dynamic data from a template machine.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PlantKind {
    /// Hydro unit.
    Hydro,
    /// Steam (thermal) unit with reheat.
    Steam,
    /// Combined-cycle gas unit.
    CombinedCycle,
    /// Fast gas peaker.
    Peaker,
}

/// Template elements for [`regional_grid`]: dynamic data and load and converter models are
/// copied from them (per unit on each element's own rating, so they scale with size).
#[derive(Clone, Debug)]
pub struct Templates {
    /// One machine per plant kind.
    pub hydro: SyncMachine,
    /// Steam unit.
    pub steam: SyncMachine,
    /// Combined-cycle unit.
    pub combined_cycle: SyncMachine,
    /// Peaker.
    pub peaker: SyncMachine,
    /// A load (voltage and frequency dependence, motor model).
    pub load: Load,
    /// A wind plant (converter data).
    pub wind: WindPlant,
}

/// One area of the regional grid.
#[derive(Clone, Debug)]
pub struct AreaPlan {
    /// Descriptive name.
    pub name: String,
    /// Centre, km (x east, y north).
    pub centre_km: (f64, f64),
    /// 230 kV buses.
    pub buses: usize,
    /// Total load at nominal, MW.
    pub load_mw: f64,
    /// Plants: kind and size, MW.
    pub plants: Vec<(PlantKind, f64)>,
    /// Wind plants: nameplate, MW.
    pub wind_mw: Vec<f64>,
}

fn line_between(
    id: String,
    from: BusIdx,
    to: BusIdx,
    km: f64,
    kv: f64,
    s_base: f64,
    rating_mva: f64,
) -> Branch {
    // Typical positive-sequence parameters at 60 Hz (the demo grid's header): 345 kV
    // r 0.037, x 0.367 ohm/km, b 4.518 uS/km; 230 kV r 0.050, x 0.488 ohm/km, b 3.371 uS/km.
    let (r, x, b) = if kv > 300.0 {
        (0.037, 0.367, 4.518e-6)
    } else {
        (0.050, 0.488, 3.371e-6)
    };
    let z_base = kv * kv / s_base;
    Branch {
        id,
        kind: BranchKind::Line,
        from,
        to,
        r_pu: r * km / z_base,
        x_pu: x * km / z_base,
        b_pu: b * km * z_base,
        tap_ratio: 1.0,
        phase_shift_rad: 0.0,
        rating_mva,
        emergency_rating_mva: 1.2 * rating_mva,
        in_service: true,
    }
}

fn transformer(
    id: String,
    from: BusIdx,
    to: BusIdx,
    x_on_rating: f64,
    rating_mva: f64,
    s_base: f64,
) -> Branch {
    let x = x_on_rating * s_base / rating_mva;
    Branch {
        id,
        kind: BranchKind::Transformer,
        from,
        to,
        r_pu: x / 40.0,
        x_pu: x,
        b_pu: 0.0,
        tap_ratio: 1.0,
        phase_shift_rad: 0.0,
        rating_mva,
        emergency_rating_mva: 1.2 * rating_mva,
        in_service: true,
    }
}

/// A multi-area regional grid: per area a 345 kV hub and a 230 kV mesh of substations placed at
/// random around the area's centre, each joined to its nearest neighbours (about 1.4 branches
/// per bus); hubs of neighbouring areas joined by double 345 kV circuits; plants behind step-up
/// transformers at 20 kV; wind plants at 230 kV buses; loads at power factor 0.95 on about two
/// thirds of the 230 kV buses. Line parameters per km are typical (see the demo grid's header);
/// lengths follow the positions. Deterministic for a given seed. The largest steam unit is the
/// reference. Long 345 kV circuits get line reactors (60 % of their charging); other shunt
/// compensation is left to the caller (it depends on the load levels to hold).
pub fn regional_grid(
    name: &str,
    areas: &[AreaPlan],
    adjacency: &[(usize, usize)],
    t: &Templates,
    seed: u64,
) -> Grid {
    let s_base = 100.0;
    let mut rng = SplitMix(seed);
    let mut buses: Vec<Bus> = Vec::new();
    let mut pos: Vec<(f64, f64)> = Vec::new();
    let mut branches: Vec<Branch> = Vec::new();
    let mut loads: Vec<Load> = Vec::new();
    let mut machines: Vec<SyncMachine> = Vec::new();
    let mut wind_plants: Vec<WindPlant> = Vec::new();
    let mut hubs = Vec::new();
    // A bus of area `area` (1-based), numbered area * 1000 + its place in the area.
    let add_bus = |buses: &mut Vec<Bus>, area: u32, name: String, base_kv: f64| {
        let number = area * 1000 + buses.iter().filter(|b| b.area == area).count() as u32 + 1;
        buses.push(Bus {
            number,
            name,
            base_kv,
            v_min_pu: 0.95,
            v_max_pu: 1.05,
            area,
            is_reference: false,
            angle_set_rad: 0.0,
            stored_solution: None,
        });
        BusIdx(buses.len() as u32 - 1)
    };
    let dist = |a: (f64, f64), b: (f64, f64)| ((a.0 - b.0).powi(2) + (a.1 - b.1).powi(2)).sqrt();
    let mut steam_biggest: Option<(usize, f64)> = None;
    for (a, plan) in areas.iter().enumerate() {
        let area = a as u32 + 1;
        // The 345 kV hub at the centre.
        let hub = add_bus(&mut buses, area, format!("{} 345", plan.name), 345.0);
        pos.push(plan.centre_km);
        hubs.push(hub);
        // 230 kV substations spread over a square of 180 km around the centre.
        let first = buses.len();
        for k in 0..plan.buses {
            let p = (
                plan.centre_km.0 + rng.uniform(-90.0, 90.0),
                plan.centre_km.1 + rng.uniform(-90.0, 90.0),
            );
            add_bus(
                &mut buses,
                area,
                format!("{} 230 #{}", plan.name, k + 1),
                230.0,
            );
            pos.push(p);
        }
        let local: Vec<usize> = (first..buses.len()).collect();
        // Each substation to its two nearest neighbours; then join the pieces.
        let mut links: Vec<(usize, usize)> = Vec::new();
        for &i in &local {
            let mut near: Vec<usize> = local.iter().copied().filter(|&j| j != i).collect();
            near.sort_by(|&x, &y| dist(pos[i], pos[x]).total_cmp(&dist(pos[i], pos[y])));
            for &j in near.iter().take(2) {
                let pair = (i.min(j), i.max(j));
                if !links.contains(&pair) {
                    links.push(pair);
                }
            }
        }
        // Union-find over the links; join components by their closest pair.
        loop {
            let mut comp: Vec<usize> = (0..buses.len()).collect();
            fn root(c: &mut [usize], mut i: usize) -> usize {
                while c[i] != i {
                    c[i] = c[c[i]];
                    i = c[i];
                }
                i
            }
            for &(x, y) in &links {
                let (rx, ry) = (root(&mut comp, x), root(&mut comp, y));
                comp[rx] = ry;
            }
            let r0 = root(&mut comp, local[0]);
            let (inside, outside): (Vec<usize>, Vec<usize>) = local
                .iter()
                .partition(|&&i| root(&mut comp.clone(), i) == r0);
            if outside.is_empty() {
                break;
            }
            let mut best = (inside[0], outside[0], f64::INFINITY);
            for &i in &inside {
                for &j in &outside {
                    let d = dist(pos[i], pos[j]);
                    if d < best.2 {
                        best = (i, j, d);
                    }
                }
            }
            links.push((best.0.min(best.1), best.0.max(best.1)));
        }
        for &(i, j) in &links {
            let km = dist(pos[i], pos[j]).max(10.0) * 1.15; // routes are longer than the crow flies
            branches.push(line_between(
                format!("{} {}-{}", plan.name, buses[i].number, buses[j].number),
                BusIdx(i as u32),
                BusIdx(j as u32),
                km,
                230.0,
                s_base,
                600.0,
            ));
        }
        // Three autotransformers from the hub to the three substations nearest the centre.
        let mut by_centre = local.clone();
        by_centre.sort_by(|&x, &y| {
            dist(pos[x], plan.centre_km).total_cmp(&dist(pos[y], plan.centre_km))
        });
        for (k, &j) in by_centre.iter().take(3).enumerate() {
            branches.push(transformer(
                format!("{} 345/230 #{}", plan.name, k + 1),
                hub,
                BusIdx(j as u32),
                0.10,
                900.0,
                s_base,
            ));
        }
        // Loads on about two thirds of the substations, sizes spread around the mean.
        let hosts: Vec<usize> = local
            .iter()
            .copied()
            .filter(|_| rng.next_f64() < 0.67)
            .collect();
        let weights: Vec<f64> = hosts.iter().map(|_| rng.uniform(0.4, 1.6)).collect();
        let wsum: f64 = weights.iter().sum();
        for (&i, w) in hosts.iter().zip(&weights) {
            let p_mw = plan.load_mw * w / wsum;
            let mut l = t.load.clone();
            l.id = format!("{} load", buses[i].name.replace(" 230", ""));
            l.bus = BusIdx(i as u32);
            l.p_pu = p_mw / s_base;
            l.q_pu = p_mw * 0.3287 / s_base; // power factor 0.95 lagging
            l.motor_share = (rng.uniform(0.2, 0.6) * 20.0).round() / 20.0;
            l.sheddable_fraction = (rng.uniform(0.1, 0.5) * 20.0).round() / 20.0;
            l.priority = 0;
            loads.push(l);
        }
        // Plants on their own 20 kV terminals, stepped up to a substation away from the hub.
        for (k, &(kind, size_mw)) in plan.plants.iter().enumerate() {
            let host = local[(k * 7 + 3) % local.len()];
            let kind_name = match kind {
                PlantKind::Hydro => "Hydro",
                PlantKind::Steam => "Steam",
                PlantKind::CombinedCycle => "Combined Cycle",
                PlantKind::Peaker => "Peaker",
            };
            let id = format!("{} {} {}", plan.name, kind_name, k + 1);
            let term = add_bus(&mut buses, area, format!("{id} 20"), 20.0);
            pos.push(pos[host]);
            let template = match kind {
                PlantKind::Hydro => &t.hydro,
                PlantKind::Steam => &t.steam,
                PlantKind::CombinedCycle => &t.combined_cycle,
                PlantKind::Peaker => &t.peaker,
            };
            let rating_mva = size_mw / 0.9;
            let mut m = template.clone();
            m.id = id.clone();
            m.bus = term;
            m.rating_mva = rating_mva;
            m.p_max_pu = size_mw / s_base;
            m.p_min_pu = template.p_min_pu / template.p_max_pu * size_mw / s_base;
            m.q_max_pu = 0.6 * size_mw / s_base;
            m.q_min_pu = -0.3 * size_mw / s_base;
            m.v_set_pu = Some((rng.uniform(1.02, 1.04) * 200.0).round() / 200.0);
            m.in_service = true;
            if kind == PlantKind::Steam && steam_biggest.is_none_or(|(_, s)| size_mw > s) {
                steam_biggest = Some((machines.len(), size_mw));
            }
            machines.push(m);
            branches.push(transformer(
                format!("{id} step-up"),
                term,
                BusIdx(host as u32),
                0.13,
                1.1 * rating_mva,
                s_base,
            ));
        }
        // Wind plants at substations at the area's edge.
        let mut by_edge = local.clone();
        by_edge.sort_by(|&x, &y| {
            dist(pos[y], plan.centre_km).total_cmp(&dist(pos[x], plan.centre_km))
        });
        for (k, &mw) in plan.wind_mw.iter().enumerate() {
            let mut w = t.wind.clone();
            w.id = format!("{} Wind {}", plan.name, k + 1);
            w.bus = BusIdx(by_edge[k % by_edge.len()] as u32);
            w.rating_pu = mw / s_base;
            w.p_pu = 0.4 * mw / s_base;
            w.q_pu = 0.0;
            w.in_service = true;
            wind_plants.push(w);
        }
    }
    // Double 345 kV circuits between neighbouring areas' hubs, each with shunt reactors at
    // both ends compensating 60 % of its charging (common practice on long EHV lines).
    let mut shunts = Vec::new();
    for &(a, b) in adjacency {
        let km = dist(pos[hubs[a].get()], pos[hubs[b].get()]) * 1.1;
        for c in 1..=2 {
            let line = line_between(
                format!("{} - {} 345 #{c}", areas[a].name, areas[b].name),
                hubs[a],
                hubs[b],
                km,
                345.0,
                s_base,
                1100.0,
            );
            for (end, hub) in [("A", hubs[a]), ("B", hubs[b])] {
                shunts.push(Shunt {
                    id: format!("{} reactor {end}", line.id),
                    bus: hub,
                    g_pu: 0.0,
                    b_pu: -0.6 * line.b_pu / 2.0,
                    in_service: true,
                });
            }
            branches.push(line);
        }
    }
    // Dispatch: wind at 40 % of nameplate, machines share the rest equally by size.
    let load: f64 = loads.iter().map(|l| l.p_pu).sum();
    let wind: f64 = wind_plants.iter().map(|w| w.p_pu).sum();
    let capacity: f64 = machines.iter().map(|m| m.p_max_pu).sum();
    let share = ((load - wind) / capacity).clamp(0.0, 0.95);
    for m in &mut machines {
        m.p_pu = (share * m.p_max_pu).max(m.p_min_pu);
    }
    let reference = steam_biggest.map_or(0, |(k, _)| k);
    if let Some(m) = machines.get(reference) {
        buses[m.bus.get()].is_reference = true;
    }
    Grid::assemble(
        name.to_string(),
        s_base,
        60.0,
        buses,
        branches,
        shunts,
        loads,
        machines,
        wind_plants,
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
