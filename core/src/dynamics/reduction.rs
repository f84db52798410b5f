//! Classical-model initial conditions, loads as constant admittances, and reduction of the
//! network to the machines' internal nodes: the textbook route to transient stability, kept for
//! checks against published examples (the time-domain engine works on the full network).

use faer::Mat;
use faer::prelude::Solve;

use crate::model::{BusIdx, Grid, MachineIdx, Outages};
use crate::powerflow::PowerFlowSolution;
use crate::ybus::AdmittanceMatrix;
use crate::{Complex, Error};

/// Initial state of a machine in the classical model, system base.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ClassicalInitialState {
    /// The machine.
    pub machine: MachineIdx,
    /// Magnitude of the voltage behind transient reactance, pu.
    pub e_prime_pu: f64,
    /// Rotor angle (angle of that voltage), rad, in the power flow's reference frame.
    pub delta_rad: f64,
    /// Mechanical power, equal to the electrical output at the start, pu.
    pub pm_pu: f64,
    /// Transient reactance on the system base, pu.
    pub xd_transient_sys_pu: f64,
}

/// The classical-model initial state of every in-service machine that has dynamic data:
/// `I = conj(S / V)`, `E' = V + j x'_d I` (DOMAIN.md 2.4; Anderson & Fouad Example 2.6).
pub fn classical_initial_states(
    grid: &Grid,
    outages: &Outages,
    sol: &PowerFlowSolution,
) -> Vec<ClassicalInitialState> {
    grid.machines
        .iter()
        .enumerate()
        .filter_map(|(k, m)| {
            let idx = MachineIdx(k as u32);
            let d = m.dynamics?;
            if !outages.machine_in_service(grid, idx) || !sol.energised[m.bus.get()] {
                return None;
            }
            let v = sol.voltage(m.bus);
            let s = Complex::new(sol.machine_p_pu[k], sol.machine_q_pu[k]);
            let current = (s / v).conj();
            let x = d.xd_transient_pu * grid.s_base_mva / m.rating_mva;
            let e = v + Complex::new(0.0, x) * current;
            Some(ClassicalInitialState {
                machine: idx,
                e_prime_pu: e.norm(),
                delta_rad: e.arg(),
                pm_pu: sol.machine_p_pu[k],
                xd_transient_sys_pu: x,
            })
        })
        .collect()
}

/// Each bus's load as a constant admittance at its solved voltage, `y = (P - jQ) / |V|^2`, pu
/// (zero at buses without load or without voltage).
pub fn load_admittances(grid: &Grid, sol: &PowerFlowSolution) -> Vec<Complex> {
    let mut y = vec![Complex::new(0.0, 0.0); grid.n_buses()];
    for l in grid.loads.iter().filter(|l| l.in_service) {
        let v = sol.v_pu[l.bus.get()];
        if v > 0.0 {
            y[l.bus.get()] += Complex::new(l.p_pu, -l.q_pu) / (v * v);
        }
    }
    y
}

/// A network reduced to the internal nodes of the classical machines.
#[derive(Clone, Debug, PartialEq)]
pub struct ReducedNetwork {
    /// The machines, in the order of the matrix rows.
    pub machines: Vec<MachineIdx>,
    /// Row-major `m x m` admittance matrix between the internal nodes, pu.
    pub y_pu: Vec<Complex>,
}

impl ReducedNetwork {
    /// Entry (`row`, `col`) by position in [`Self::machines`].
    pub fn get(&self, row: usize, col: usize) -> Complex {
        self.y_pu[row * self.machines.len() + col]
    }
}

/// Reduces the network to the machines' internal nodes (Kron reduction): loads as constant
/// admittances at the pre-disturbance solution, each machine's transient reactance between its
/// internal node and its bus, `outages` applied, and `bolted_fault` (if any) tying a bus to
/// ground. `Y_red = Y_gg - Y_gb Y_bb^-1 Y_bg`.
///
/// Dense algebra: meant for the few-hundred-bus grids of studies and for checks.
pub fn reduce_to_internal_nodes(
    grid: &Grid,
    outages: &Outages,
    prefault: &PowerFlowSolution,
    machines: &[ClassicalInitialState],
    bolted_fault: Option<BusIdx>,
) -> Result<ReducedNetwork, Error> {
    let y = AdmittanceMatrix::build(grid, outages);
    let loads = load_admittances(grid, prefault);
    // Keep energised buses, less the faulted one (held at zero voltage).
    let kept: Vec<usize> = (0..grid.n_buses())
        .filter(|&i| prefault.energised[i] && Some(BusIdx(i as u32)) != bolted_fault)
        .collect();
    let mut local = vec![usize::MAX; grid.n_buses()];
    for (pos, &i) in kept.iter().enumerate() {
        local[i] = pos;
    }
    let (nb, m) = (kept.len(), machines.len());
    let mut ybb = Mat::<Complex>::zeros(nb, nb);
    for &i in &kept {
        for p in y.row_ptr[i]..y.row_ptr[i + 1] {
            let k = y.col_idx[p];
            if local[k] != usize::MAX {
                ybb[(local[i], local[k])] += y.values[p];
            }
        }
        ybb[(local[i], local[i])] += loads[i];
    }
    let mut ybg = Mat::<Complex>::zeros(nb, m);
    let mut ygg = Mat::<Complex>::zeros(m, m);
    for (g, state) in machines.iter().enumerate() {
        let bus = grid.machines[state.machine.get()].bus.get();
        let ym = Complex::new(1.0, 0.0) / Complex::new(0.0, state.xd_transient_sys_pu);
        ygg[(g, g)] += ym;
        if local[bus] != usize::MAX {
            ybb[(local[bus], local[bus])] += ym;
            ybg[(local[bus], g)] -= ym;
        }
    }
    let x = ybb.partial_piv_lu().solve(&ybg);
    let mut y_pu = Vec::with_capacity(m * m);
    for r in 0..m {
        for c in 0..m {
            // Y_gb = Y_bg^T for this construction (machine branches are symmetric).
            let mut acc = ygg[(r, c)];
            for b in 0..nb {
                acc -= ybg[(b, r)] * x[(b, c)];
            }
            if !(acc.re.is_finite() && acc.im.is_finite()) {
                return Err(Error::Singular(
                    "the bus admittance matrix of the kept buses".to_string(),
                ));
            }
            y_pu.push(acc);
        }
    }
    Ok(ReducedNetwork {
        machines: machines.iter().map(|s| s.machine).collect(),
        y_pu,
    })
}
