//! AC power flow by Newton-Raphson in polar coordinates on a sparse LU.
//!
//! Unknowns are the voltage angles of every energised non-reference bus and the magnitudes of
//! every PQ bus; equations are the matching active and reactive mismatches (DOMAIN.md 1.4-1.5).
//! The Jacobian keeps one sparsity pattern for a given set of bus types, so its symbolic LU is
//! computed once and only the numeric factorisation repeats.
//!
//! Islands: each island with an in-service voltage-regulating machine is solved with its own
//! reference bus (the one flagged in the grid, or else the bus of its largest regulating machine);
//! islands without one are dead and reported. All energised islands share one sparse system.
//!
//! Reactive limits: after convergence, a PV bus whose machines would exceed their summed limits
//! is clamped to the limit and treated as PQ; a clamped bus whose voltage has moved to the side
//! where it could release reactive power returns to PV. Rounds repeat until nothing switches
//! (at most [`PowerFlowOptions::max_limit_rounds`]). The reference machines balance their island
//! and are not held to their limits; callers compare their output with the limits and report.

use std::fmt;

use crate::blocklu::{Block, BlockLu, Slot};

use crate::model::{BusIdx, Grid, MachineIdx, Outages};
use crate::topology::{Islands, islands};
use crate::ybus::{AdmittanceMatrix, branch_admittance};
use crate::{BranchIdx, Complex, Error, WindIdx};

/// Default convergence tolerance on the largest power mismatch, pu (1e-8 pu is 1e-6 MW on a
/// 100 MVA base; DOMAIN.md 1.5, common practice).
pub const MISMATCH_TOL_PU: f64 = 1e-8;

/// Settings of a power-flow solve.
#[derive(Clone, Debug, PartialEq)]
pub struct PowerFlowOptions {
    /// Convergence tolerance on the largest active or reactive mismatch, pu.
    pub tolerance_pu: f64,
    /// Newton iterations allowed per reactive-limit round.
    pub max_iterations: usize,
    /// Whether machine reactive limits are enforced.
    pub enforce_q_limits: bool,
    /// Rounds of PV/PQ switching allowed before giving up on the limits.
    pub max_limit_rounds: usize,
}

impl Default for PowerFlowOptions {
    fn default() -> Self {
        PowerFlowOptions {
            tolerance_pu: MISMATCH_TOL_PU,
            max_iterations: 30,
            enforce_q_limits: true,
            max_limit_rounds: 10,
        }
    }
}

/// Why a power flow did not converge, with the place to look first.
#[derive(Clone, Debug, PartialEq)]
pub struct Divergence {
    /// Newton iterations done in all rounds.
    pub iterations: usize,
    /// The bus with the largest mismatch at the last iterate (external number).
    pub worst_bus: u32,
    /// That mismatch, pu (NaN if the iterate blew up).
    pub worst_mismatch_pu: f64,
    /// A short description of what went wrong.
    pub reason: String,
}

impl fmt::Display for Divergence {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "power flow did not converge after {} iterations ({}); largest mismatch {:.3e} pu at bus {}",
            self.iterations, self.reason, self.worst_mismatch_pu, self.worst_bus
        )
    }
}

/// Which reactive limit a bus was held at.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum QLimit {
    /// The machines' upper reactive limit (over-excited).
    Upper,
    /// The machines' lower reactive limit (under-excited).
    Lower,
}

/// An energised or dead island in the solution.
#[derive(Clone, Debug, PartialEq)]
pub struct IslandReport {
    /// Its buses.
    pub buses: Vec<BusIdx>,
    /// Its reference bus, if energised.
    pub reference: Option<BusIdx>,
}

/// Flows at both ends of one branch, pu; each measured from its bus into the branch.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub struct BranchFlow {
    /// Active power entering at the from end, pu.
    pub p_from_pu: f64,
    /// Reactive power entering at the from end, pu.
    pub q_from_pu: f64,
    /// Active power entering at the to end, pu.
    pub p_to_pu: f64,
    /// Reactive power entering at the to end, pu.
    pub q_to_pu: f64,
}

impl BranchFlow {
    /// The larger apparent power of the two ends, pu.
    pub fn s_max_pu(&self) -> f64 {
        self.p_from_pu
            .hypot(self.q_from_pu)
            .max(self.p_to_pu.hypot(self.q_to_pu))
    }
}

/// A converged power flow.
#[derive(Clone, Debug, PartialEq)]
pub struct PowerFlowSolution {
    /// Voltage magnitude of each bus, pu (0 on dead buses).
    pub v_pu: Vec<f64>,
    /// Voltage angle of each bus, rad (0 on dead buses).
    pub angle_rad: Vec<f64>,
    /// Whether each bus is energised.
    pub energised: Vec<bool>,
    /// Active output of each machine, pu (0 if out of service or dead).
    pub machine_p_pu: Vec<f64>,
    /// Reactive output of each machine, pu.
    pub machine_q_pu: Vec<f64>,
    /// Buses held at a reactive limit.
    pub q_limited: Vec<(BusIdx, QLimit)>,
    /// Energised islands, each with its reference.
    pub islands: Vec<IslandReport>,
    /// Dead islands (no regulating machine).
    pub dead_islands: Vec<IslandReport>,
    /// Flows of each branch (zero for branches out of service).
    pub branch_flows: Vec<BranchFlow>,
    /// Newton iterations done in all rounds.
    pub iterations: usize,
    /// Largest mismatch at the solution, pu.
    pub max_mismatch_pu: f64,
    /// False if reactive-limit switching was still changing bus types when the round limit was
    /// reached: the solution satisfies the network equations but some machines may sit outside
    /// their reactive limits.
    pub q_limits_settled: bool,
}

impl PowerFlowSolution {
    /// Complex voltage of a bus, pu.
    pub fn voltage(&self, bus: BusIdx) -> Complex {
        Complex::from_polar(self.v_pu[bus.get()], self.angle_rad[bus.get()])
    }

    /// Total active losses of the branches, pu.
    pub fn branch_losses_pu(&self) -> f64 {
        self.branch_flows
            .iter()
            .map(|f| f.p_from_pu + f.p_to_pu)
            .sum()
    }
}

/// The result of a solve: non-convergence is an outcome to count, not an exceptional error.
#[derive(Clone, Debug, PartialEq)]
pub enum PowerFlowOutcome {
    /// The solve converged.
    Converged(PowerFlowSolution),
    /// The solve did not converge.
    Diverged(Divergence),
}

impl PowerFlowOutcome {
    /// The solution, or [`Error::Diverged`].
    pub fn converged(self) -> Result<PowerFlowSolution, Error> {
        match self {
            PowerFlowOutcome::Converged(s) => Ok(s),
            PowerFlowOutcome::Diverged(d) => Err(Error::Diverged(d)),
        }
    }
}

/// Solves the power flow of `grid` under `outages`, starting flat (1 pu, or the set-point at
/// regulated buses; angles zero).
pub fn solve(grid: &Grid, outages: &Outages, options: &PowerFlowOptions) -> PowerFlowOutcome {
    Solver::new(grid, outages).run(options, None)
}

/// Solves like [`solve`], starting from the given bus voltages (pu, one per bus), e.g. the
/// solution of a nearby operating point. Regulated buses still start at their set-points and
/// the reference at its angle; a start of the wrong length, or with non-finite or zero entries at
/// energised buses, falls back to the flat start for those buses.
pub fn solve_from(
    grid: &Grid,
    outages: &Outages,
    options: &PowerFlowOptions,
    start_v_pu: &[Complex],
) -> PowerFlowOutcome {
    Solver::new(grid, outages).run(options, Some(start_v_pu))
}

/// A change of bus type at a reactive limit.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Switch {
    /// PV to PQ, held at this limit (pu).
    Clamp(QLimit, f64),
    /// Back from a limit to PV.
    Release,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum BusType {
    Dead,
    Reference,
    Pv,
    Pq,
}

struct Solver<'a> {
    grid: &'a Grid,
    outages: &'a Outages,
    y: AdmittanceMatrix,
    isl: Islands,
    island_reference: Vec<Option<BusIdx>>,
    bus_type: Vec<BusType>,
    /// Scheduled injection at each bus (generation less load), pu; Q part only used at PQ buses.
    s_spec: Vec<Complex>,
    /// Reactive output of the non-regulating sources at each bus, pu.
    q_fixed: Vec<f64>,
    q_min: Vec<f64>,
    q_max: Vec<f64>,
    v_set: Vec<f64>,
    clamped: Vec<Option<QLimit>>,
    /// Buses released from a limit once already; a second clamp keeps them clamped, which stops
    /// the clamp-release cycling that a weak grid can otherwise fall into.
    released_once: Vec<bool>,
    /// In-service machines at each bus.
    machines_at: Vec<Vec<MachineIdx>>,
    /// In-service voltage-regulating machines at each bus.
    regulating_at: Vec<Vec<MachineIdx>>,
    /// Where each admittance entry's Jacobian block goes in the block LU.
    slots: Vec<Slot>,
}

impl<'a> Solver<'a> {
    fn new(grid: &'a Grid, outages: &'a Outages) -> Solver<'a> {
        let n = grid.n_buses();
        let y = AdmittanceMatrix::build(grid, outages);
        let isl = islands(grid, outages);
        let mut bus_type = vec![BusType::Pq; n];
        let mut v_set = vec![1.0; n];
        let mut q_min = vec![0.0; n];
        let mut q_max = vec![0.0; n];
        let mut best_machine: Vec<Option<(f64, BusIdx)>> = vec![None; isl.members.len()];
        let mut flagged: Vec<Option<BusIdx>> = vec![None; isl.members.len()];
        let mut machines_at: Vec<Vec<MachineIdx>> = vec![Vec::new(); n];
        for (k, m) in grid.machines.iter().enumerate() {
            let idx = MachineIdx(k as u32);
            if outages.machine_in_service(grid, idx) {
                machines_at[m.bus.get()].push(idx);
            }
        }
        let regulating_at: Vec<Vec<MachineIdx>> = machines_at
            .iter()
            .map(|ms| {
                ms.iter()
                    .copied()
                    .filter(|m| grid.machines[m.get()].v_set_pu.is_some())
                    .collect()
            })
            .collect();
        for i in 0..n {
            let bus = BusIdx(i as u32);
            let mut any = false;
            for &m in &regulating_at[i] {
                let mach = &grid.machines[m.get()];
                any = true;
                v_set[i] = mach.v_set_pu.unwrap_or(1.0);
                q_min[i] += mach.q_min_pu;
                q_max[i] += mach.q_max_pu;
                let island = isl.of_bus[i];
                if best_machine[island].is_none_or(|(r, _)| mach.rating_mva > r) {
                    best_machine[island] = Some((mach.rating_mva, bus));
                }
            }
            if any {
                bus_type[i] = BusType::Pv;
                if grid.bus(bus).is_reference {
                    flagged[isl.of_bus[i]] = Some(bus);
                }
            }
        }
        let island_reference: Vec<Option<BusIdx>> = (0..isl.members.len())
            .map(|k| flagged[k].or(best_machine[k].map(|(_, b)| b)))
            .collect();
        for (k, members) in isl.members.iter().enumerate() {
            match island_reference[k] {
                Some(r) => bus_type[r.get()] = BusType::Reference,
                None => {
                    for b in members {
                        bus_type[b.get()] = BusType::Dead;
                    }
                }
            }
        }
        let mut s_spec = vec![Complex::new(0.0, 0.0); n];
        let mut q_fixed = vec![0.0; n];
        for (k, m) in grid.machines.iter().enumerate() {
            if !outages.machine_in_service(grid, MachineIdx(k as u32)) {
                continue;
            }
            let i = m.bus.get();
            s_spec[i].re += m.p_pu;
            if m.v_set_pu.is_none() {
                s_spec[i].im += m.q_pu;
                q_fixed[i] += m.q_pu;
            }
        }
        for (k, w) in grid.wind_plants.iter().enumerate() {
            if !outages.wind_in_service(grid, WindIdx(k as u32)) {
                continue;
            }
            let i = w.bus.get();
            s_spec[i] += Complex::new(w.p_pu, w.q_pu);
            q_fixed[i] += w.q_pu;
        }
        for l in grid.loads.iter().filter(|l| l.in_service) {
            let i = l.bus.get();
            s_spec[i] -= Complex::new(l.p_pu, l.q_pu);
            q_fixed[i] -= l.q_pu;
        }
        Solver {
            grid,
            outages,
            y,
            isl,
            island_reference,
            bus_type,
            s_spec,
            q_fixed,
            q_min,
            q_max,
            v_set,
            clamped: vec![None; n],
            released_once: vec![false; n],
            machines_at,
            regulating_at,
            slots: Vec::new(),
        }
    }

    fn run(mut self, options: &PowerFlowOptions, start: Option<&[Complex]>) -> PowerFlowOutcome {
        let n = self.grid.n_buses();
        let start = start.filter(|s| s.len() == n);
        let mut v: Vec<Complex> = (0..n)
            .map(|i| {
                let given = start
                    .map(|s| s[i])
                    .filter(|x| x.re.is_finite() && x.im.is_finite() && x.norm() > 0.0);
                match self.bus_type[i] {
                    BusType::Dead => Complex::new(0.0, 0.0),
                    BusType::Reference => {
                        Complex::from_polar(self.v_set[i], self.grid.buses[i].angle_set_rad)
                    }
                    BusType::Pv => {
                        Complex::from_polar(self.v_set[i], given.map_or(0.0, |x| x.arg()))
                    }
                    BusType::Pq => given.unwrap_or(Complex::new(1.0, 0.0)),
                }
            })
            .collect();
        let mut lu = BlockLu::new(n, &self.y.row_ptr, &self.y.col_idx);
        self.slots = (0..self.y.n)
            .flat_map(|i| (self.y.row_ptr[i]..self.y.row_ptr[i + 1]).map(move |p| (i, p)))
            .map(|(i, p)| lu.slot(i, self.y.col_idx[p]))
            .collect();
        let mut total_iterations = 0;
        let mut rounds = 0;
        let mut settled = true;
        loop {
            match self.newton(&mut v, &mut lu, options) {
                Ok(it) => total_iterations += it,
                Err(mut d) => {
                    d.iterations += total_iterations;
                    return PowerFlowOutcome::Diverged(d);
                }
            }
            if !options.enforce_q_limits {
                break;
            }
            let switches = self.limit_switches(&v);
            if switches.is_empty() {
                break;
            }
            if rounds >= options.max_limit_rounds {
                settled = false;
                break;
            }
            rounds += 1;
            self.apply_switches(&switches);
        }
        let mut solution = self.finish(&v, total_iterations);
        solution.q_limits_settled = settled;
        PowerFlowOutcome::Converged(solution)
    }

    /// Reactive generation the regulating machines at bus `i` must supply at voltages `v`.
    fn q_regulated(&self, v: &[Complex], i: usize) -> f64 {
        let s = self.injection(v, i);
        s.im - self.q_fixed[i]
    }

    /// Complex power injected by the network solution at bus `i`: `V_i conj((Y V)_i)`.
    fn injection(&self, v: &[Complex], i: usize) -> Complex {
        let mut current = Complex::new(0.0, 0.0);
        for p in self.y.row_ptr[i]..self.y.row_ptr[i + 1] {
            current += self.y.values[p] * v[self.y.col_idx[p]];
        }
        v[i] * current.conj()
    }

    /// The PV/PQ switches the solution `v` calls for, without making them.
    fn limit_switches(&self, v: &[Complex]) -> Vec<(usize, Switch)> {
        const Q_TOL_PU: f64 = 1e-6;
        let mut switches = Vec::new();
        for i in 0..self.grid.n_buses() {
            match (self.bus_type[i], self.clamped[i]) {
                (BusType::Pv, _) => {
                    let q = self.q_regulated(v, i);
                    if q > self.q_max[i] + Q_TOL_PU {
                        switches.push((i, Switch::Clamp(QLimit::Upper, self.q_max[i])));
                    } else if q < self.q_min[i] - Q_TOL_PU {
                        switches.push((i, Switch::Clamp(QLimit::Lower, self.q_min[i])));
                    }
                }
                (BusType::Pq, Some(which)) if !self.released_once[i] => {
                    // Back to PV if the voltage moved to where the machine could relax.
                    let vm = v[i].norm();
                    let release = match which {
                        QLimit::Upper => vm > self.v_set[i] + 1e-9,
                        QLimit::Lower => vm < self.v_set[i] - 1e-9,
                    };
                    if release {
                        switches.push((i, Switch::Release));
                    }
                }
                _ => {}
            }
        }
        switches
    }

    /// Makes the switches found by [`Self::limit_switches`].
    fn apply_switches(&mut self, switches: &[(usize, Switch)]) {
        for &(i, switch) in switches {
            match switch {
                Switch::Clamp(which, q_lim) => {
                    self.bus_type[i] = BusType::Pq;
                    self.clamped[i] = Some(which);
                    self.s_spec[i].im = self.q_fixed[i] + q_lim;
                }
                Switch::Release => {
                    self.bus_type[i] = BusType::Pv;
                    self.clamped[i] = None;
                    self.released_once[i] = true;
                }
            }
        }
    }

    /// Newton iterations to convergence for the current bus types; returns the iteration count.
    fn newton(
        &self,
        v: &mut [Complex],
        lu: &mut BlockLu,
        options: &PowerFlowOptions,
    ) -> Result<usize, Divergence> {
        let n = self.grid.n_buses();
        // Restore set-points at regulated buses (they may have drifted while clamped).
        for i in 0..n {
            if matches!(self.bus_type[i], BusType::Pv | BusType::Reference) {
                let vm = v[i].norm();
                if vm > 0.0 {
                    v[i] *= self.v_set[i] / vm;
                } else {
                    v[i] = Complex::new(self.v_set[i], 0.0);
                }
            }
        }
        if !self
            .bus_type
            .iter()
            .any(|t| matches!(t, BusType::Pv | BusType::Pq))
        {
            return Ok(0);
        }
        let mut rhs = vec![0.0; 2 * n];
        let mut scratch = Vec::with_capacity(n);
        let mut s_calc = vec![Complex::new(0.0, 0.0); n];
        let mut vm = vec![0.0; n];
        let mut va = vec![0.0; n];
        for it in 0..=options.max_iterations {
            let mut worst = 0.0_f64;
            for i in 0..n {
                vm[i] = v[i].norm();
                va[i] = v[i].arg();
                let (dp, dq) = match self.bus_type[i] {
                    BusType::Dead | BusType::Reference => {
                        s_calc[i] = Complex::new(0.0, 0.0);
                        (0.0, 0.0)
                    }
                    BusType::Pv => {
                        s_calc[i] = self.injection(v, i);
                        ((s_calc[i] - self.s_spec[i]).re, 0.0)
                    }
                    BusType::Pq => {
                        s_calc[i] = self.injection(v, i);
                        let d = s_calc[i] - self.s_spec[i];
                        (d.re, d.im)
                    }
                };
                rhs[2 * i] = dp;
                rhs[2 * i + 1] = dq;
                worst = worst.max(dp.abs()).max(dq.abs());
            }
            if !worst.is_finite() {
                return Err(self.divergence(v, it, "the iterate became non-finite".to_string()));
            }
            if worst < options.tolerance_pu {
                return Ok(it);
            }
            if it == options.max_iterations {
                break;
            }
            self.fill_jacobian(lu, v, &vm, &s_calc);
            lu.factor().map_err(|e| {
                let bus = self.grid.buses.get(e.0).map_or(0, |b| b.number);
                self.divergence(v, it, format!("singular Jacobian block at bus {bus}"))
            })?;
            lu.solve_in_place(&mut rhs, &mut scratch);
            if rhs.iter().any(|x| !x.is_finite()) {
                return Err(self.divergence(v, it, "singular Jacobian".to_string()));
            }
            for i in 0..n {
                match self.bus_type[i] {
                    BusType::Pv => v[i] = Complex::from_polar(vm[i], va[i] - rhs[2 * i]),
                    BusType::Pq => {
                        v[i] = Complex::from_polar(vm[i] - rhs[2 * i + 1], va[i] - rhs[2 * i])
                    }
                    BusType::Dead | BusType::Reference => {}
                }
            }
        }
        Err(self.divergence(
            v,
            options.max_iterations,
            "iteration limit reached".to_string(),
        ))
    }

    /// Loads the Jacobian for the current bus types into `lu`, with identity rows and columns
    /// for the unknowns a bus does not have.
    fn fill_jacobian(&self, lu: &mut BlockLu, v: &[Complex], vm: &[f64], s_calc: &[Complex]) {
        lu.clear();
        let y = &self.y;
        for i in 0..y.n {
            let row = self.bus_type[i];
            for p in y.row_ptr[i]..y.row_ptr[i + 1] {
                let k = y.col_idx[p];
                let col = self.bus_type[k];
                let block = match row {
                    BusType::Dead | BusType::Reference => {
                        if i == k {
                            [1.0, 0.0, 0.0, 1.0]
                        } else {
                            [0.0; 4]
                        }
                    }
                    BusType::Pv | BusType::Pq => {
                        let mut d = match col {
                            BusType::Dead | BusType::Reference => [0.0; 4],
                            _ => jacobian_block(y.values[p], i, k, v, vm, s_calc),
                        };
                        if col != BusType::Pq {
                            d[1] = 0.0;
                            d[3] = 0.0;
                        }
                        if row == BusType::Pv {
                            d[2] = 0.0;
                            d[3] = 0.0;
                        }
                        if i == k && row == BusType::Pv {
                            d[3] = 1.0;
                        }
                        d
                    }
                };
                lu.set(self.slots[p], block);
            }
        }
    }

    fn divergence(&self, v: &[Complex], iterations: usize, reason: String) -> Divergence {
        let mut worst = (0usize, f64::NAN);
        for i in 0..self.grid.n_buses() {
            let d = match self.bus_type[i] {
                BusType::Dead | BusType::Reference => continue,
                BusType::Pv => (self.injection(v, i) - self.s_spec[i]).re.abs(),
                BusType::Pq => (self.injection(v, i) - self.s_spec[i]).norm(),
            };
            if worst.1.is_nan() || d > worst.1 || d.is_nan() {
                worst = (i, d);
            }
        }
        Divergence {
            iterations,
            worst_bus: self.grid.buses.get(worst.0).map_or(0, |b| b.number),
            worst_mismatch_pu: worst.1,
            reason,
        }
    }

    fn finish(&self, v: &[Complex], iterations: usize) -> PowerFlowSolution {
        let grid = self.grid;
        let n = grid.n_buses();
        let mut machine_p = vec![0.0; grid.machines.len()];
        let mut machine_q = vec![0.0; grid.machines.len()];
        let mut max_mismatch = 0.0_f64;
        for i in 0..n {
            if self.bus_type[i] == BusType::Dead {
                continue;
            }
            let s = self.injection(v, i);
            let d = s - self.s_spec[i];
            match self.bus_type[i] {
                BusType::Pq => max_mismatch = max_mismatch.max(d.re.abs()).max(d.im.abs()),
                BusType::Pv => max_mismatch = max_mismatch.max(d.re.abs()),
                _ => {}
            }
            let regulating = &self.regulating_at[i];
            // Fixed outputs first.
            for &k in &self.machines_at[i] {
                let m = &grid.machines[k.get()];
                machine_p[k.get()] = m.p_pu;
                if m.v_set_pu.is_none() {
                    machine_q[k.get()] = m.q_pu;
                }
            }
            // The reference balances P among its regulating machines in proportion to rating.
            if self.bus_type[i] == BusType::Reference {
                let p_needed = s.re
                    - (self.s_spec[i].re
                        - regulating
                            .iter()
                            .map(|m| grid.machines[m.get()].p_pu)
                            .sum::<f64>());
                let total_rating: f64 = regulating
                    .iter()
                    .map(|m| grid.machines[m.get()].rating_mva)
                    .sum();
                for m in regulating {
                    machine_p[m.get()] =
                        p_needed * grid.machines[m.get()].rating_mva / total_rating;
                }
            }
            // Reactive output shared in proportion to each machine's reactive range (or rating).
            let q_needed = s.im - self.q_fixed[i];
            let weights: Vec<f64> = regulating
                .iter()
                .map(|m| {
                    let mach = &grid.machines[m.get()];
                    let range = mach.q_max_pu - mach.q_min_pu;
                    if range.is_finite() && range > 0.0 {
                        range
                    } else {
                        mach.rating_mva
                    }
                })
                .collect();
            let total: f64 = weights.iter().sum();
            for (m, w) in regulating.iter().zip(&weights) {
                machine_q[m.get()] = q_needed * w / total;
            }
        }
        let mut branch_flows = vec![BranchFlow::default(); grid.branches.len()];
        for (k, br) in grid.branches.iter().enumerate() {
            if !self.outages.branch_in_service(grid, BranchIdx(k as u32)) {
                continue;
            }
            let [ff, ft, tf, tt] =
                branch_admittance(br.r_pu, br.x_pu, br.b_pu, br.tap_ratio, br.phase_shift_rad);
            let (vf, vt) = (v[br.from.get()], v[br.to.get()]);
            let s_from = vf * (ff * vf + ft * vt).conj();
            let s_to = vt * (tf * vf + tt * vt).conj();
            branch_flows[k] = BranchFlow {
                p_from_pu: s_from.re,
                q_from_pu: s_from.im,
                p_to_pu: s_to.re,
                q_to_pu: s_to.im,
            };
        }
        let mut islands = Vec::new();
        let mut dead_islands = Vec::new();
        for (k, members) in self.isl.members.iter().enumerate() {
            let report = IslandReport {
                buses: members.clone(),
                reference: self.island_reference[k],
            };
            if report.reference.is_some() {
                islands.push(report);
            } else {
                dead_islands.push(report);
            }
        }
        PowerFlowSolution {
            v_pu: v.iter().map(|x| x.norm()).collect(),
            angle_rad: v
                .iter()
                .map(|x| if x.norm() > 0.0 { x.arg() } else { 0.0 })
                .collect(),
            energised: self.bus_type.iter().map(|t| *t != BusType::Dead).collect(),
            machine_p_pu: machine_p,
            machine_q_pu: machine_q,
            q_limited: self
                .clamped
                .iter()
                .enumerate()
                .filter_map(|(i, c)| c.map(|w| (BusIdx(i as u32), w)))
                .collect(),
            islands,
            dead_islands,
            branch_flows,
            iterations,
            max_mismatch_pu: max_mismatch,
            q_limits_settled: true,
        }
    }
}

/// The four partial derivatives of bus `i`'s injection with respect to bus `k`'s voltage
/// angle and magnitude, `[dP_i/dθ_k, dP_i/d|V|_k, dQ_i/dθ_k, dQ_i/d|V|_k]`, for admittance
/// entry `y_ik`, complex voltages `v` with magnitudes `vm`, and computed injections `s_calc`
/// (the polar formulas of DOMAIN.md 1.5).
fn jacobian_block(
    y_ik: Complex,
    i: usize,
    k: usize,
    v: &[Complex],
    vm: &[f64],
    s_calc: &[Complex],
) -> Block {
    let (g, b) = (y_ik.re, y_ik.im);
    if i == k {
        let (pi, qi, vi) = (s_calc[i].re, s_calc[i].im, vm[i]);
        [
            -qi - b * vi * vi,
            pi / vi + g * vi,
            pi - g * vi * vi,
            qi / vi - b * vi,
        ]
    } else {
        // e = V_i conj(V_k) = |V_i||V_k| (cos θ_ik + j sin θ_ik): the polar formulas without trigonometry.
        let e = v[i] * v[k].conj();
        let vk = vm[k];
        [
            g * e.im - b * e.re,
            (g * e.re + b * e.im) / vk,
            -(g * e.re + b * e.im),
            (g * e.im - b * e.re) / vk,
        ]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Checks every Jacobian entry against central finite differences of the injections.
    #[test]
    fn jacobian_matches_finite_differences() {
        // A 3-bus ring with a phase shifter so that the matrix is unsymmetric; made up for the test.
        let mut entries = Vec::new();
        for (f, t, r, x, b, tap, shift) in [
            (0, 1, 0.02, 0.1, 0.04, 1.0, 0.0),
            (1, 2, 0.01, 0.08, 0.0, 0.97, 0.05),
            (0, 2, 0.03, 0.2, 0.02, 1.0, 0.0),
        ] {
            let [ff, ft, tf, tt] = branch_admittance(r, x, b, tap, shift);
            entries.extend([(f, f, ff), (f, t, ft), (t, f, tf), (t, t, tt)]);
        }
        entries.push((2, 2, Complex::new(0.0, 0.3)));
        let y = AdmittanceMatrix::from_entries(3, entries);
        let injections = |state: &[f64; 6]| -> Vec<Complex> {
            let v: Vec<Complex> = (0..3)
                .map(|i| Complex::from_polar(state[3 + i], state[i]))
                .collect();
            let mut cur = vec![Complex::new(0.0, 0.0); 3];
            y.multiply(&v, &mut cur);
            (0..3).map(|i| v[i] * cur[i].conj()).collect()
        };
        let state = [0.0, -0.05, -0.1, 1.04, 1.02, 0.97]; // angles, then magnitudes
        let s_calc = injections(&state);
        let h = 1e-6;
        for i in 0..3 {
            for p in y.row_ptr[i]..y.row_ptr[i + 1] {
                let k = y.col_idx[p];
                let v: Vec<Complex> = (0..3)
                    .map(|m| Complex::from_polar(state[3 + m], state[m]))
                    .collect();
                let block = jacobian_block(y.values[p], i, k, &v, &state[3..], &s_calc);
                for (var, state_idx) in [(0, k), (1, 3 + k)] {
                    let (mut up, mut down) = (state, state);
                    up[state_idx] += h;
                    down[state_idx] -= h;
                    let d = (injections(&up)[i] - injections(&down)[i]) / (2.0 * h);
                    assert!(
                        (block[var] - d.re).abs() < 1e-6,
                        "dP{i}/dx{k}[{var}]: {} vs {}",
                        block[var],
                        d.re
                    );
                    assert!(
                        (block[2 + var] - d.im).abs() < 1e-6,
                        "dQ{i}/dx{k}[{var}]: {} vs {}",
                        block[2 + var],
                        d.im
                    );
                }
            }
        }
    }
}
