//! Operating-point sampling: load level and area factors, wind through the power curve,
//! commitment and dispatch, power flow, acceptance. A draw is a pure function of the study and
//! the random stream it is given.

use holdfast_core::powerflow::{PowerFlowOptions, PowerFlowSolution, solve};
use holdfast_core::{Grid, MachineIdx, Outages};
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::study::{Study, WindSampling};

/// Why a drawn operating point was not kept.
#[derive(
    Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
pub enum Rejection {
    /// The committed plants cannot cover the net load.
    GenerationShort,
    /// The power flow did not converge.
    PowerFlowDiverged,
    /// A bus voltage outside the acceptance band.
    VoltageOutOfBand,
    /// A branch loaded above the acceptance limit.
    BranchOverloaded,
    /// The reference machine, which takes up the losses, ends outside its active limits.
    ReferenceOutOfLimits,
}

impl Rejection {
    /// Every kind, in a fixed order (for counters).
    pub const ALL: [Rejection; 5] = [
        Rejection::GenerationShort,
        Rejection::PowerFlowDiverged,
        Rejection::VoltageOutOfBand,
        Rejection::BranchOverloaded,
        Rejection::ReferenceOutOfLimits,
    ];

    /// Short description.
    pub fn describe(self) -> &'static str {
        match self {
            Rejection::GenerationShort => "committed plants short of the net load",
            Rejection::PowerFlowDiverged => "power flow did not converge",
            Rejection::VoltageOutOfBand => "bus voltage outside the acceptance band",
            Rejection::BranchOverloaded => "branch above the loading limit",
            Rejection::ReferenceOutOfLimits => "reference machine outside its limits",
        }
    }
}

/// A sampled and solved operating point.
#[derive(Clone, Debug)]
pub struct OperatingPoint {
    /// The grid at this point: loads, dispatch and wind output as sampled.
    pub grid: Grid,
    /// Machines not committed (masked, not removed).
    pub outages: Outages,
    /// Its power flow.
    pub pf: PowerFlowSolution,
    /// The drawn parameters.
    pub draw: Draw,
}

/// The random parameters behind an operating point.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Draw {
    /// System load level, share of the grid file's load.
    pub load_level: f64,
    /// Factor of each area, in the order of `areas`.
    pub area_factors: Vec<f64>,
    /// Area numbers.
    pub areas: Vec<u32>,
    /// Hub-height wind speed per wind plant, m/s.
    pub wind_speed_m_s: Vec<f64>,
    /// Wind output curtailed to keep committed plants above their minimum, MW.
    pub wind_curtailed_mw: f64,
}

/// Normal CDF, via the complementary error function (Numerical Recipes' Chebyshev fit,
/// fractional error below 1.2e-7 everywhere).
pub fn normal_cdf(z: f64) -> f64 {
    0.5 * erfc(-z / std::f64::consts::SQRT_2)
}

fn erfc(x: f64) -> f64 {
    let z = x.abs();
    let t = 1.0 / (1.0 + 0.5 * z);
    let poly = -z * z - 1.265_512_23
        + t * (1.000_023_68
            + t * (0.374_091_96
                + t * (0.096_784_18
                    + t * (-0.186_288_06
                        + t * (0.278_868_07
                            + t * (-1.135_203_98
                                + t * (1.488_515_87 + t * (-0.822_152_23 + t * 0.170_872_77))))))));
    let r = t * poly.exp();
    if x >= 0.0 { r } else { 2.0 - r }
}

/// Weibull quantile: the speed with cumulative probability `p` (inverse CDF,
/// `c (-ln(1-p))^(1/k)`).
pub fn weibull_quantile(p: f64, shape: f64, scale: f64) -> f64 {
    scale * (-(1.0 - p).ln()).powf(1.0 / shape)
}

/// Output of a plant per unit of its available rating at wind speed `u` (cubic from cut-in to
/// rated, flat to cut-out, zero beyond: DOMAIN.md 5.5).
pub fn power_curve(u: f64, w: &WindSampling) -> f64 {
    if u < w.cut_in_m_s || u >= w.cut_out_m_s {
        0.0
    } else if u >= w.rated_m_s {
        1.0
    } else {
        let ci3 = w.cut_in_m_s.powi(3);
        (u.powi(3) - ci3) / (w.rated_m_s.powi(3) - ci3)
    }
}

/// Standard normals with the same correlation `rho` between any two (a shared factor plus an
/// own one: `sqrt(rho) z0 + sqrt(1 - rho) e_i`).
fn equicorrelated<R: Rng>(rng: &mut R, n: usize, rho: f64) -> Vec<f64> {
    let common: f64 = StandardNormal.sample(rng);
    (0..n)
        .map(|_| {
            let own: f64 = StandardNormal.sample(rng);
            rho.sqrt() * common + (1.0 - rho).sqrt() * own
        })
        .collect()
}

/// Hub-height wind speeds of `n` plants, m/s: Weibull marginals joined by a Gaussian copula
/// with the study's common correlation (normal scores mapped through the normal CDF and the
/// Weibull quantile).
pub fn wind_speeds<R: Rng>(rng: &mut R, n: usize, w: &WindSampling) -> Vec<f64> {
    equicorrelated(rng, n, w.correlation)
        .into_iter()
        .map(|z| {
            // Keep p away from 1 so the quantile stays finite.
            let p = normal_cdf(z).clamp(1e-12, 1.0 - 1e-12);
            weibull_quantile(p, w.weibull_shape, w.weibull_scale_m_s)
        })
        .collect()
}

/// Draws one operating point and solves it. The commitment rule: machines with active power
/// range (not synchronous condensers) are switched on in the study's order, then by falling
/// rating, until their maximum output covers the net load times `1 + reserve_share`; the
/// reference machine is always on. Dispatch: every committed plant at the same share of its
/// range above minimum; the reference machine then takes the losses.
pub fn draw_operating_point<R: Rng>(
    base: &Grid,
    study: &Study,
    rng: &mut R,
) -> (Draw, Result<OperatingPoint, Rejection>) {
    let ls = &study.load;
    let z: f64 = StandardNormal.sample(rng);
    let level = (ls.level_mean + ls.level_sd * z).clamp(ls.level_min, ls.level_max);
    let mut areas: Vec<u32> = base.buses.iter().map(|b| b.area).collect();
    areas.sort_unstable();
    areas.dedup();
    let area_factors: Vec<f64> = equicorrelated(rng, areas.len(), ls.area_correlation)
        .into_iter()
        .map(|z| (1.0 + ls.area_sd * z).max(0.05))
        .collect();
    let speeds = wind_speeds(rng, base.wind_plants.len(), &study.wind);
    let mut draw = Draw {
        load_level: level,
        area_factors,
        areas,
        wind_speed_m_s: speeds,
        wind_curtailed_mw: 0.0,
    };
    let result = build(base, study, &mut draw);
    (
        draw.clone(),
        result.map(|(grid, outages, pf)| OperatingPoint {
            grid,
            outages,
            pf,
            draw,
        }),
    )
}

fn build(
    base: &Grid,
    study: &Study,
    draw: &mut Draw,
) -> Result<(Grid, Outages, PowerFlowSolution), Rejection> {
    let mut grid = base.clone();
    for load in grid.loads.iter_mut().filter(|l| l.in_service) {
        let area = grid.buses[load.bus.get()].area;
        let k = draw.areas.binary_search(&area).unwrap_or(0);
        let factor = draw.load_level * draw.area_factors.get(k).copied().unwrap_or(1.0);
        load.p_pu *= factor;
        load.q_pu *= factor;
        load.sheddable_fraction = study.sheddable_fraction(load);
    }
    let mut wind_pu = 0.0;
    for (plant, &u) in grid.wind_plants.iter_mut().zip(&draw.wind_speed_m_s) {
        plant.p_pu = plant.rating_pu * study.wind.availability * power_curve(u, &study.wind);
        if plant.in_service {
            wind_pu += plant.p_pu;
        }
    }
    let load_pu: f64 = grid
        .loads
        .iter()
        .filter(|l| l.in_service)
        .map(|l| l.p_pu)
        .sum();
    let mut net = load_pu - wind_pu;
    // Commitment order: the reference machine, the study's list, then by falling rating.
    let reference: Vec<bool> = grid
        .machines
        .iter()
        .map(|m| grid.buses[m.bus.get()].is_reference)
        .collect();
    let is_reference = |k: usize| reference[k];
    let producers: Vec<usize> = (0..grid.machines.len())
        .filter(|&k| grid.machines[k].in_service && grid.machines[k].p_max_pu > 1e-9)
        .collect();
    let mut order: Vec<usize> = producers
        .iter()
        .copied()
        .filter(|&k| is_reference(k))
        .collect();
    for id in &study.commitment.order {
        if let Some(k) = producers
            .iter()
            .copied()
            .find(|&k| &grid.machines[k].id == id)
            && !order.contains(&k)
        {
            order.push(k);
        }
    }
    let mut rest: Vec<usize> = producers
        .iter()
        .copied()
        .filter(|k| !order.contains(k))
        .collect();
    rest.sort_by(|&a, &b| {
        grid.machines[b]
            .rating_mva
            .total_cmp(&grid.machines[a].rating_mva)
            .then(a.cmp(&b))
    });
    order.extend(rest);
    // Highest dispatch: the active limit or the governor's valve limit, less a margin of 1 %
    // of rating for stator losses and regulation (a unit at its valve limit cannot start at
    // rest).
    let cap: Vec<f64> = grid
        .machines
        .iter()
        .map(|m| dispatch_cap(m, grid.s_base_mva))
        .collect();
    let need = net.max(0.0) * (1.0 + study.commitment.reserve_share);
    let mut committed = Vec::new();
    let mut capacity = 0.0;
    for &k in &order {
        if capacity >= need && !committed.is_empty() {
            break;
        }
        committed.push(k);
        capacity += cap[k];
    }
    if capacity < net {
        return Err(Rejection::GenerationShort);
    }
    let p_min: f64 = committed.iter().map(|&k| grid.machines[k].p_min_pu).sum();
    if net < p_min {
        // Too much wind for the plants that must run: curtail wind evenly.
        let cut = p_min - net;
        let scale = if wind_pu > 0.0 {
            (1.0 - cut / wind_pu).max(0.0)
        } else {
            1.0
        };
        for plant in grid.wind_plants.iter_mut() {
            plant.p_pu *= scale;
        }
        draw.wind_curtailed_mw = cut.min(wind_pu) * grid.s_base_mva;
        net = p_min;
    }
    let range: f64 = committed
        .iter()
        .map(|&k| (cap[k] - grid.machines[k].p_min_pu).max(0.0))
        .sum();
    let dispatch = |grid: &mut Grid, target: f64| {
        let share = if range > 0.0 {
            ((target - p_min) / range).clamp(0.0, 1.0)
        } else {
            0.0
        };
        for &k in &committed {
            let m = &mut grid.machines[k];
            m.p_pu = m.p_min_pu + share * (cap[k] - m.p_min_pu).max(0.0);
        }
    };
    dispatch(&mut grid, net);
    let mut outages = Outages::none();
    outages.machines = producers
        .iter()
        .copied()
        .filter(|k| !committed.contains(k))
        .map(|k| MachineIdx(k as u32))
        .collect();
    let solve_point = |grid: &Grid| {
        solve(grid, &outages, &PowerFlowOptions::default())
            .converged()
            .map_err(|_| Rejection::PowerFlowDiverged)
    };
    // The reference machine took up the losses; share them out by the same rule and solve
    // again (a one-round distributed slack).
    let first = solve_point(&grid)?;
    let scheduled: f64 = committed.iter().map(|&k| grid.machines[k].p_pu).sum();
    let produced: f64 = committed.iter().map(|&k| first.machine_p_pu[k]).sum();
    dispatch(&mut grid, net + (produced - scheduled));
    let pf = solve_point(&grid)?;
    let acc = &study.acceptance;
    for (k, &v) in pf.v_pu.iter().enumerate() {
        if pf.energised[k] && !(v >= acc.v_min_pu && v <= acc.v_max_pu) {
            return Err(Rejection::VoltageOutOfBand);
        }
    }
    for (b, flow) in grid.branches.iter().zip(&pf.branch_flows) {
        if b.in_service && b.rating_mva > 0.0 {
            let loading = flow.s_max_pu() * grid.s_base_mva / b.rating_mva;
            if loading > acc.max_branch_loading {
                return Err(Rejection::BranchOverloaded);
            }
        }
    }
    for &k in committed.iter().filter(|&&k| is_reference(k)) {
        let m = &grid.machines[k];
        let p = pf.machine_p_pu[k];
        let hard = cap[k] + 0.005 * m.rating_mva / grid.s_base_mva;
        if p < m.p_min_pu - 1e-6 || p > hard {
            return Err(Rejection::ReferenceOutOfLimits);
        }
    }
    Ok((grid, outages, pf))
}

/// The highest output a machine is dispatched to, pu: its active limit or its governor's valve
/// limit, whichever is lower, less 1 % of its rating.
fn dispatch_cap(m: &holdfast_core::SyncMachine, s_base_mva: f64) -> f64 {
    let rating_pu = m.rating_mva / s_base_mva;
    let valve = m
        .governor
        .as_ref()
        .map_or(f64::INFINITY, |g| g.valve_max_pu * rating_pu);
    (m.p_max_pu.min(valve) - 0.01 * rating_pu).max(m.p_min_pu)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_cdf_matches_tabulated_values() {
        // Standard normal table (Abramowitz & Stegun, Table 26.1): Phi(0) = 0.5,
        // Phi(1) = 0.841344746, Phi(1.96) = 0.975002105, Phi(-2.5) = 0.006209665.
        for (z, p) in [
            (0.0, 0.5),
            (1.0, 0.841_344_746),
            (1.96, 0.975_002_105),
            (-2.5, 0.006_209_665),
        ] {
            assert!((normal_cdf(z) - p).abs() < 2e-7 * p.max(1e-3) + 1e-9, "{z}");
        }
    }

    #[test]
    fn power_curve_has_its_corners() {
        let w = WindSampling {
            weibull_shape: 2.0,
            weibull_scale_m_s: 9.6,
            correlation: 0.0,
            cut_in_m_s: 3.0,
            rated_m_s: 12.0,
            cut_out_m_s: 25.0,
            availability: 1.0,
        };
        assert_eq!(power_curve(2.9, &w), 0.0);
        assert_eq!(power_curve(3.0, &w), 0.0);
        assert_eq!(power_curve(12.0, &w), 1.0);
        assert_eq!(power_curve(24.9, &w), 1.0);
        assert_eq!(power_curve(25.0, &w), 0.0);
        // Halfway in u^3 between cut-in and rated.
        let u_half = ((27.0 + 1728.0) / 2.0_f64).cbrt();
        assert!((power_curve(u_half, &w) - 0.5).abs() < 1e-12);
    }
}
