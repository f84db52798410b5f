//! Human-readable and JSON reports of a solved grid. Engineering units appear only here.

use std::io::{self, Write};

use holdfast_core::powerflow::{PowerFlowSolution, QLimit};
use holdfast_core::{BranchIdx, BusIdx, Grid, Outages, WindIdx};
use serde::Serialize;

/// The caution shown wherever Holdfast speaks of shedding load.
pub(crate) use holdfast_infer::CAUTION;

/// Branch loading above which a branch is listed as a limit hit, % of its rating.
const LOADING_LIMIT_PCT: f64 = 100.0;

fn deg(rad: f64) -> f64 {
    rad.to_degrees()
}

/// Bus results in engineering units.
#[derive(Serialize)]
pub(crate) struct BusResult {
    id: u32,
    name: String,
    base_kv: f64,
    energised: bool,
    v_pu: f64,
    v_kv: f64,
    angle_deg: f64,
}

/// Machine results.
#[derive(Serialize)]
pub(crate) struct MachineResult {
    id: String,
    bus: u32,
    p_mw: f64,
    q_mvar: f64,
    /// "upper", "lower" or null.
    at_q_limit: Option<&'static str>,
}

/// Branch results; each end's flow is measured from its bus into the branch.
#[derive(Serialize)]
pub(crate) struct BranchResult {
    id: String,
    from: u32,
    to: u32,
    in_service: bool,
    p_from_mw: f64,
    q_from_mvar: f64,
    p_to_mw: f64,
    q_to_mvar: f64,
    loss_mw: f64,
    /// Largest end apparent power as % of the normal rating; null if unrated.
    loading_pct: Option<f64>,
}

/// The whole JSON answer of `holdfast grid solve --json`.
#[derive(Serialize)]
pub(crate) struct SolveReport {
    grid: String,
    s_base_mva: f64,
    iterations: usize,
    max_mismatch_mva: f64,
    energised_islands: usize,
    dead_buses: Vec<u32>,
    buses: Vec<BusResult>,
    machines: Vec<MachineResult>,
    branches: Vec<BranchResult>,
}

fn q_limit_of(sol: &PowerFlowSolution, bus: BusIdx) -> Option<&'static str> {
    sol.q_limited
        .iter()
        .find(|(b, _)| *b == bus)
        .map(|(_, l)| match l {
            QLimit::Upper => "upper",
            QLimit::Lower => "lower",
        })
}

impl SolveReport {
    pub(crate) fn new(grid: &Grid, sol: &PowerFlowSolution, outages: &Outages) -> SolveReport {
        let s = grid.s_base_mva;
        let number = |b: BusIdx| grid.bus(b).number;
        SolveReport {
            grid: grid.name.clone(),
            s_base_mva: s,
            iterations: sol.iterations,
            max_mismatch_mva: sol.max_mismatch_pu * s,
            energised_islands: sol.islands.len(),
            dead_buses: sol
                .dead_islands
                .iter()
                .flat_map(|i| i.buses.iter().map(|&b| number(b)))
                .collect(),
            buses: grid
                .buses
                .iter()
                .enumerate()
                .map(|(i, b)| BusResult {
                    id: b.number,
                    name: b.name.clone(),
                    base_kv: b.base_kv,
                    energised: sol.energised[i],
                    v_pu: sol.v_pu[i],
                    v_kv: sol.v_pu[i] * b.base_kv,
                    angle_deg: deg(sol.angle_rad[i]),
                })
                .collect(),
            machines: grid
                .machines
                .iter()
                .enumerate()
                .map(|(k, m)| MachineResult {
                    id: m.id.clone(),
                    bus: number(m.bus),
                    p_mw: sol.machine_p_pu[k] * s,
                    q_mvar: sol.machine_q_pu[k] * s,
                    at_q_limit: if m.v_set_pu.is_some() {
                        q_limit_of(sol, m.bus)
                    } else {
                        None
                    },
                })
                .collect(),
            branches: grid
                .branches
                .iter()
                .enumerate()
                .map(|(k, b)| {
                    let f = sol.branch_flows[k];
                    BranchResult {
                        id: b.id.clone(),
                        from: number(b.from),
                        to: number(b.to),
                        in_service: outages.branch_in_service(grid, BranchIdx(k as u32)),
                        p_from_mw: f.p_from_pu * s,
                        q_from_mvar: f.q_from_pu * s,
                        p_to_mw: f.p_to_pu * s,
                        q_to_mvar: f.q_to_pu * s,
                        loss_mw: (f.p_from_pu + f.p_to_pu) * s,
                        loading_pct: (b.rating_mva > 0.0)
                            .then(|| 100.0 * f.s_max_pu() * s / b.rating_mva),
                    }
                })
                .collect(),
        }
    }
}

/// Bus, machine and branch tables.
pub(crate) fn tables(
    out: &mut impl Write,
    grid: &Grid,
    sol: &PowerFlowSolution,
    outages: &Outages,
) -> io::Result<()> {
    let r = SolveReport::new(grid, sol, outages);
    writeln!(
        out,
        "Grid: {}   converged in {} iterations, largest mismatch {:.2e} MVA",
        r.grid, r.iterations, r.max_mismatch_mva
    )?;
    writeln!(out)?;
    writeln!(
        out,
        "{:>6}  {:<22} {:>8} {:>8} {:>9} {:>9}",
        "bus", "name", "base kV", "V pu", "V kV", "angle deg"
    )?;
    for b in &r.buses {
        if b.energised {
            writeln!(
                out,
                "{:>6}  {:<22} {:>8.1} {:>8.4} {:>9.2} {:>9.3}",
                b.id, b.name, b.base_kv, b.v_pu, b.v_kv, b.angle_deg
            )?;
        } else {
            writeln!(
                out,
                "{:>6}  {:<22} {:>8.1} {:>8} {:>9} {:>9}",
                b.id, b.name, b.base_kv, "dead", "-", "-"
            )?;
        }
    }
    writeln!(out)?;
    writeln!(
        out,
        "{:<24} {:>6} {:>9} {:>9}  reactive limit",
        "machine", "bus", "P MW", "Q Mvar"
    )?;
    for m in &r.machines {
        writeln!(
            out,
            "{:<24} {:>6} {:>9.2} {:>9.2}  {}",
            m.id,
            m.bus,
            m.p_mw,
            m.q_mvar,
            m.at_q_limit.unwrap_or("")
        )?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "{:<24} {:>6} {:>6} {:>9} {:>9} {:>9} {:>9} {:>8} {:>8}",
        "branch", "from", "to", "P from", "Q from", "P to", "Q to", "loss MW", "load %"
    )?;
    for b in &r.branches {
        let loading = b.loading_pct.map_or("-".to_string(), |l| format!("{l:.1}"));
        writeln!(
            out,
            "{:<24} {:>6} {:>6} {:>9.2} {:>9.2} {:>9.2} {:>9.2} {:>8.3} {:>8}",
            b.id,
            b.from,
            b.to,
            b.p_from_mw,
            b.q_from_mvar,
            b.p_to_mw,
            b.q_to_mvar,
            b.loss_mw,
            loading
        )?;
    }
    writeln!(out)?;
    writeln!(
        out,
        "Flows in MW and Mvar, each end measured from its bus into the branch."
    )?;
    Ok(())
}

/// The readable summary printed by `grid check` and `demo`.
pub(crate) fn summary(
    out: &mut impl Write,
    grid: &Grid,
    sol: &PowerFlowSolution,
    outages: &Outages,
    source: &str,
    load_scale: f64,
) -> io::Result<()> {
    let s = grid.s_base_mva;
    writeln!(out, "Grid \"{}\" from {source}", grid.name)?;
    if load_scale != 1.0 {
        writeln!(
            out,
            "  loads scaled x{load_scale}, change re-dispatched over the regulating machines by rating"
        )?;
    }
    let mut levels: Vec<f64> = grid.buses.iter().map(|b| b.base_kv).collect();
    levels.sort_by(|a, b| b.total_cmp(a));
    levels.dedup();
    let levels: Vec<String> = levels.iter().map(|kv| format!("{kv} kV")).collect();
    writeln!(
        out,
        "  {} buses ({}), {} branches, {} machines, {} wind plants, {} loads, {} shunts",
        grid.buses.len(),
        levels.join(", "),
        grid.branches.len(),
        grid.machines.len(),
        grid.wind_plants.len(),
        grid.loads.len(),
        grid.shunts.len()
    )?;
    let dead: usize = sol.dead_islands.iter().map(|i| i.buses.len()).sum();
    let refs: Vec<String> = sol
        .islands
        .iter()
        .filter_map(|i| i.reference)
        .map(|b| grid.bus(b).number.to_string())
        .collect();
    writeln!(
        out,
        "  islands: {} energised (reference bus {}), {} dead ({} buses)",
        sol.islands.len(),
        refs.join(", "),
        sol.dead_islands.len(),
        dead
    )?;
    writeln!(
        out,
        "  power flow: converged in {} Newton iterations, largest mismatch {:.1e} MVA",
        sol.iterations,
        sol.max_mismatch_pu * s
    )?;

    let sync_p: f64 = sol.machine_p_pu.iter().sum::<f64>() * s;
    let sync_q: f64 = sol.machine_q_pu.iter().sum::<f64>() * s;
    let (wind_p, wind_q) = grid
        .wind_plants
        .iter()
        .enumerate()
        .filter(|(k, _)| outages.wind_in_service(grid, WindIdx(*k as u32)))
        .map(|(_, w)| w)
        .fold((0.0, 0.0), |(p, q), w| (p + w.p_pu * s, q + w.q_pu * s));
    let (load_p, load_q) = grid.total_load_mw_mvar();
    let shunt_p: f64 = grid
        .shunts
        .iter()
        .filter(|x| x.in_service)
        .map(|x| x.g_pu * sol.v_pu[x.bus.get()].powi(2) * s)
        .sum();
    let shunt_q: f64 = grid
        .shunts
        .iter()
        .filter(|x| x.in_service)
        .map(|x| x.b_pu * sol.v_pu[x.bus.get()].powi(2) * s)
        .sum();
    let losses = sol.branch_losses_pu() * s;
    writeln!(
        out,
        "  generation: synchronous {sync_p:.1} MW / {sync_q:.1} Mvar, wind {wind_p:.1} MW / {wind_q:.1} Mvar"
    )?;
    if load_p > 0.0 {
        writeln!(
            out,
            "  wind share of load: {:.1} %",
            100.0 * wind_p / load_p
        )?;
    }
    writeln!(
        out,
        "  load: {load_p:.1} MW / {load_q:.1} Mvar; shunts: {shunt_p:.1} MW consumed, net {shunt_q:+.1} Mvar produced (capacitors +, reactors -)"
    )?;
    writeln!(
        out,
        "  branch losses: {losses:.2} MW ({:.2} % of load)",
        if load_p > 0.0 {
            100.0 * losses / load_p
        } else {
            0.0
        }
    )?;

    let energised: Vec<usize> = (0..grid.n_buses()).filter(|&i| sol.energised[i]).collect();
    if let (Some(&lo), Some(&hi)) = (
        energised
            .iter()
            .min_by(|&&a, &&b| sol.v_pu[a].total_cmp(&sol.v_pu[b])),
        energised
            .iter()
            .max_by(|&&a, &&b| sol.v_pu[a].total_cmp(&sol.v_pu[b])),
    ) {
        writeln!(
            out,
            "  voltage range: {:.4} pu at bus {} to {:.4} pu at bus {}",
            sol.v_pu[lo], grid.buses[lo].number, sol.v_pu[hi], grid.buses[hi].number
        )?;
    }

    let mut hits = Vec::new();
    for &(bus, limit) in &sol.q_limited {
        let which = if limit == QLimit::Upper {
            "upper"
        } else {
            "lower"
        };
        let ids: Vec<&str> = grid
            .machines
            .iter()
            .filter(|m| m.bus == bus && m.v_set_pu.is_some() && m.in_service)
            .map(|m| m.id.as_str())
            .collect();
        hits.push(format!(
            "bus {} held at its {which} reactive limit ({})",
            grid.bus(bus).number,
            ids.join(", ")
        ));
    }
    for &i in &energised {
        let b = &grid.buses[i];
        if sol.v_pu[i] < b.v_min_pu || sol.v_pu[i] > b.v_max_pu {
            hits.push(format!(
                "bus {} voltage {:.4} pu outside its band {:.2}-{:.2} pu",
                b.number, sol.v_pu[i], b.v_min_pu, b.v_max_pu
            ));
        }
    }
    for (k, b) in grid.branches.iter().enumerate() {
        if b.rating_mva > 0.0 {
            let pct = 100.0 * sol.branch_flows[k].s_max_pu() * s / b.rating_mva;
            if pct > LOADING_LIMIT_PCT {
                hits.push(format!(
                    "branch {} loaded {pct:.1} % of its {} MVA rating",
                    b.id, b.rating_mva
                ));
            }
        }
    }
    for (k, m) in grid.machines.iter().enumerate() {
        let p = sol.machine_p_pu[k];
        let q = sol.machine_q_pu[k];
        if m.v_set_pu.is_some() && (q > m.q_max_pu + 1e-6 || q < m.q_min_pu - 1e-6) {
            hits.push(format!(
                "machine {} at {:.1} Mvar outside its reactive limits",
                m.id,
                q * s
            ));
        }
        if m.in_service && (p > m.p_max_pu + 1e-9 || p < m.p_min_pu - 1e-9) {
            hits.push(format!(
                "machine {} at {:.1} MW outside its active limits",
                m.id,
                p * s
            ));
        }
    }
    if !sol.q_limits_settled {
        hits.push("reactive limits did not settle within the switching rounds; some machines may be outside them".to_string());
    }
    if hits.is_empty() {
        writeln!(out, "  limits hit: none")?;
    } else {
        writeln!(out, "  limits hit: {}", hits.len())?;
        for h in hits {
            writeln!(out, "    - {h}")?;
        }
    }
    Ok(())
}
