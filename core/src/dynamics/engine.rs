//! The time-domain engine: the grid as a differential-algebraic system, integrated by the
//! implicit trapezoidal rule with one Newton iteration over all states and bus voltages.
//!
//! # Formulation
//! Unknowns are the states `x` of every device (generating units, loads, wind plants) and the
//! bus voltages `V = Vr + j Vi`. Each device at bus `k` has `dx/dt = f(x, V_k)` and injects a
//! current `I(x, V_k)`; the network equations are `sum of device currents - (Y V)_k = 0` at every
//! bus (DOMAIN.md 6.1-6.2, current-injection form). A step solves, for `x_{n+1}` and `V_{n+1}`,
//!
//! ```text
//! x_{n+1} - x_n - h/2 (f(x_{n+1}, V_{n+1}) + f(x_n, V_n)) = 0
//! I(x_{n+1}, V_{n+1}) - Y V_{n+1} = 0
//! ```
//!
//! by Newton's method on the whole system. Every device's state equations touch only its own
//! bus voltage, so their rows are eliminated device by device (a small dense Schur complement
//! per device) and the sparse solve is the network's, in 2x2 real blocks per bus, on a block LU
//! whose ordering and fill are analysed once per run. This is the simultaneous scheme exactly,
//! not a partitioned approximation.
//!
//! The Jacobian (device blocks by finite differences, then the sparse factors) is kept while
//! the iteration converges quickly and rebuilt when a step needs more than
//! [`SimulationOptions::refresh_after_iterations`] iterations, when the residual grows, when
//! the step length changes and after every event ("very dishonest" Newton, DOMAIN.md 6.2).
//!
//! # Events
//! Steps are shortened to land exactly on event times. At an event the states are kept and the
//! voltages re-solved with the new network, so both sides of the jump are recorded. Relays and
//! control modes inside devices (ride-through, motor under-voltage trips, converter fault
//! mode) act at step boundaries the same way.
//!
//! A step whose Newton iteration fails is retried with half the step, up to
//! [`MAX_STEP_HALVINGS`] times; a run that still fails ends with the verdict "numerical
//! failure".

use crate::blocklu::{BlockLu, Slot as LuSlot};
use crate::dynamics::events::{Event, Scenario, TimedEvent};
use crate::dynamics::load::{LoadDevice, LoadSettings};
use crate::dynamics::unit::{MachineModelChoice, Unit};
use crate::dynamics::verdict::{LoadBus, Monitor, StabilityCriteria, Trip, TripCause, Verdict};
use crate::dynamics::wind::WindDevice;
use crate::model::{BusIdx, Grid, Outages};
use crate::powerflow::PowerFlowSolution;
use crate::ybus::{AdmittanceMatrix, branch_admittance};
use crate::{Complex, Error};

/// How many times a failing step is retried with half the step length.
pub const MAX_STEP_HALVINGS: usize = 4;

/// Options of a dynamic simulation.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SimulationOptions {
    /// Integration step, s; `None` means half a cycle of the grid's nominal frequency.
    pub step_s: Option<f64>,
    /// Length of the run, s.
    pub duration_s: f64,
    /// Machine models to use.
    pub machine_model: MachineModelChoice,
    /// Newton tolerance on the largest residual (pu current on the system base, or state
    /// units), default 1e-5. Common practice is about 1e-6 (DOMAIN.md 6.2); on the demo
    /// grid's three contingencies 1e-6 moved no margin by more than 4e-6 of its value and took
    /// 10-30 % more iterations, and every reference check in the suite gives the same figures
    /// at both. The step's own error is far larger: 0.2 degrees over a swing at the default
    /// step in the step-halving check.
    pub tolerance: f64,
    /// Most Newton iterations in one step before the step is declared failed.
    pub max_iterations: usize,
    /// Iterations after which a step that has not rebuilt the Jacobian yet rebuilds it (a step
    /// also rebuilds it when the residual falls by less than a factor of four in an iteration).
    pub refresh_after_iterations: usize,
    /// Steps after which the Jacobian is rebuilt even if it still converges (default 32: on
    /// the demo grid this cut iterations per step from 3.1 to 2.5 for 30 more rebuilds).
    pub refresh_every_steps: usize,
    /// Share of a load's initial voltage below which its constant-current and constant-power
    /// parts become constant impedance (default 0.7; common practice, DOMAIN.md 4.1).
    pub load_to_impedance_below: f64,
    /// Time constant of the bus-frequency measurement used by frequency-dependent loads, s
    /// (default 0.05; common practice, DOMAIN.md 6.6).
    pub frequency_filter_s: f64,
    /// Stability criteria; `None` means the defaults for the grid's nominal frequency.
    pub criteria: Option<StabilityCriteria>,
    /// Stop as soon as a criterion has failed (the outcome is then certain).
    pub early_stop: bool,
    /// Record a trajectory (rotor angles, bus voltages, frequency) at every step.
    pub record: bool,
}

impl Default for SimulationOptions {
    fn default() -> Self {
        SimulationOptions {
            step_s: None,
            duration_s: 10.0,
            machine_model: MachineModelChoice::Detailed,
            tolerance: 1e-5,
            max_iterations: 20,
            refresh_after_iterations: 3,
            refresh_every_steps: 32,
            load_to_impedance_below: 0.7,
            frequency_filter_s: 0.05,
            criteria: None,
            early_stop: true,
            record: false,
        }
    }
}

/// Work counters of a run.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct RunStats {
    /// Accepted steps.
    pub steps: usize,
    /// Newton iterations, all steps.
    pub iterations: usize,
    /// Jacobian rebuilds (each with a sparse factorisation).
    pub factorisations: usize,
    /// Most iterations taken by one step.
    pub max_iterations_in_step: usize,
    /// Steps retried with a shorter step after a failed iteration.
    pub retries: usize,
}

/// Signals recorded along a run.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Trajectory {
    /// Time of each sample, s (an event time appears twice: before and after the jump).
    pub time_s: Vec<f64>,
    /// Machine ids, in the order of `angle_deg`.
    pub machines: Vec<String>,
    /// Per machine, rotor angle from its island's centre of inertia, degrees (NaN once
    /// tripped).
    pub angle_deg: Vec<Vec<f64>>,
    /// Bus numbers, in the order of `voltage_pu`.
    pub buses: Vec<u32>,
    /// Per bus, voltage magnitude, pu.
    pub voltage_pu: Vec<Vec<f64>>,
    /// Centre-of-inertia frequency of the island with the most inertia, Hz.
    pub frequency_hz: Vec<f64>,
    /// Times of the scenario's events, s.
    pub event_times_s: Vec<f64>,
}

/// The result of a run.
#[derive(Clone, Debug, PartialEq)]
pub struct SimulationResult {
    /// Stable or not, why, and the margins.
    pub verdict: Verdict,
    /// Work counters.
    pub stats: RunStats,
    /// Recorded signals, if asked for.
    pub trajectory: Option<Trajectory>,
}

#[derive(Clone, Debug)]
enum Device {
    Unit(Unit),
    Load(LoadDevice),
    Wind(WindDevice),
}

impl Device {
    fn evaluate(&self, x: &[f64], v: Complex, dx: &mut [f64]) -> Complex {
        match self {
            Device::Unit(u) => u.evaluate(x, v, dx),
            Device::Load(l) => l.evaluate(x, v, dx),
            Device::Wind(w) => w.evaluate(x, v, dx),
        }
    }
}

#[derive(Clone, Debug)]
struct Slot {
    device: Device,
    /// Element index in its table (machine, load or wind plant).
    element: usize,
    bus: usize,
    offset: usize,
    n: usize,
    active: bool,
}

/// The eliminated Jacobian of one device: `A^-1` (stored column by column, so that products
/// with it are sums of independent columns), `A^-1 B`, `C` and the Schur block `D - C A^-1 B`
/// (row-major).
#[derive(Clone, Debug, Default)]
struct DeviceJacobian {
    a_inv: Vec<f64>,
    a_inv_b: Vec<f64>,
    c: Vec<f64>,
    schur: [f64; 4],
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum Mode {
    /// States and voltages together (a time step).
    Step,
    /// Voltages only, states held (after an event).
    Algebraic,
}

/// A dynamic simulation in progress. It can be cloned to keep a snapshot and continue several
/// ways from it (e.g. trying shed amounts from a common pre-action state).
///
/// Method: the grid is a differential-algebraic system of device states and bus voltages,
/// integrated by the implicit trapezoidal rule with one Newton iteration over everything; each
/// device's state rows are eliminated locally, so the sparse solve is the network's block LU.
/// The Jacobian is reused while the iteration converges fast; steps land exactly on events; a
/// failing step is retried with half the step up to [`MAX_STEP_HALVINGS`] times.
#[derive(Clone, Debug)]
pub struct Simulation<'g> {
    grid: &'g Grid,
    opts: SimulationOptions,
    h: f64,
    t: f64,
    y: AdmittanceMatrix,
    branch_on: Vec<bool>,
    fault_y: Vec<Complex>,
    slots: Vec<Slot>,
    jac: Vec<DeviceJacobian>,
    lu: BlockLu,
    y_lu_slots: Vec<LuSlot>,
    diag_lu_slots: Vec<LuSlot>,
    /// Jacobian state: the step length and mode it was built for (NaN: stale).
    jac_h: f64,
    jac_mode: Mode,
    /// Steps taken on the current Jacobian.
    jac_age: usize,
    x: Vec<f64>,
    v: Vec<Complex>,
    f: Vec<f64>,
    x_new: Vec<f64>,
    v_new: Vec<Complex>,
    f_new: Vec<f64>,
    /// Voltages and derivatives at the previous accepted point and the step that led from it
    /// (0: none, after an event), for the predictor; `v_prev2` and `h_prev2` one step earlier.
    v_prev: Vec<Complex>,
    f_prev: Vec<f64>,
    h_prev: f64,
    v_prev2: Vec<Complex>,
    h_prev2: f64,
    residual: Vec<f64>,
    a_inv_r: Vec<f64>,
    rhs: Vec<f64>,
    inj: Vec<Complex>,
    yv: Vec<Complex>,
    scratch: Vec<[f64; 2]>,
    fd_f: Vec<f64>,
    fd_fx: Vec<f64>,
    fd_a: Vec<f64>,
    fd_b: Vec<f64>,
    fd_inv: Vec<f64>,
    vmag: Vec<f64>,
    events: Vec<TimedEvent>,
    next_event: usize,
    faults_on: usize,
    /// Island of each bus (a representative bus index), for the centres of inertia.
    island: Vec<usize>,
    monitor: Monitor,
    stats: RunStats,
    trajectory: Option<Trajectory>,
    /// Rotor angles from the centre of inertia, degrees, per unit slot (damping signals).
    angles_deg: Vec<f64>,
    wind_trips: Vec<Trip>,
    motor_trips: Vec<Trip>,
    stopped: bool,
}

/// Runs a scenario from a converged power flow to the end (or to an early verdict).
pub fn simulate(
    grid: &Grid,
    outages: &Outages,
    pf: &PowerFlowSolution,
    scenario: &Scenario,
    options: &SimulationOptions,
) -> Result<SimulationResult, Error> {
    let mut sim = Simulation::new(grid, outages, pf, scenario, options)?;
    sim.run_to(options.duration_s);
    Ok(sim.finish())
}

impl<'g> Simulation<'g> {
    /// Sets up a run: every model initialised from the power flow `pf` of `grid` with
    /// `outages`, and the scenario's events scheduled.
    pub fn new(
        grid: &'g Grid,
        outages: &Outages,
        pf: &PowerFlowSolution,
        scenario: &Scenario,
        options: &SimulationOptions,
    ) -> Result<Simulation<'g>, Error> {
        let nb = grid.n_buses();
        if pf.v_pu.len() != nb {
            return Err(Error::Dynamics(
                "the power-flow solution belongs to another grid".to_string(),
            ));
        }
        let f0 = grid.frequency_hz;
        let h = options.step_s.unwrap_or(0.5 / f0);
        if !(h > 0.0 && h.is_finite() && options.duration_s.is_finite()) {
            return Err(Error::Dynamics(format!(
                "step {h} s and duration {} s must be positive and finite",
                options.duration_s
            )));
        }
        let v: Vec<Complex> = (0..nb).map(|i| pf.voltage(BusIdx(i as u32))).collect();
        let mut slots = Vec::new();
        let mut x = Vec::new();
        let mut push = |device: Device, element: usize, bus: usize, states: Vec<f64>| {
            slots.push(Slot {
                device,
                element,
                bus,
                offset: x.len(),
                n: states.len(),
                active: true,
            });
            x.extend(states);
        };
        let mut missing = Vec::new();
        for (k, m) in grid.machines.iter().enumerate() {
            let idx = crate::model::MachineIdx(k as u32);
            let bus = m.bus.get();
            if !outages.machine_in_service(grid, idx) || !pf.energised[bus] {
                continue;
            }
            if m.dynamics.is_none() {
                missing.push(format!("machine \"{}\"", m.id));
                continue;
            }
            let s = Complex::new(pf.machine_p_pu[k], pf.machine_q_pu[k]);
            let (unit, states) =
                Unit::new(grid, k, options.machine_model, v[bus], s).map_err(Error::Dynamics)?;
            push(Device::Unit(unit), k, bus, states);
        }
        let settings = LoadSettings {
            v_threshold: options.load_to_impedance_below,
            t_filter_s: options.frequency_filter_s,
            w_s: 2.0 * std::f64::consts::PI * f0,
        };
        for (k, l) in grid.loads.iter().enumerate() {
            let bus = l.bus.get();
            if !l.in_service || !pf.energised[bus] {
                continue;
            }
            let (dev, states) = LoadDevice::new(l, v[bus], settings).map_err(Error::Dynamics)?;
            push(Device::Load(dev), k, bus, states);
        }
        for (k, w) in grid.wind_plants.iter().enumerate() {
            let bus = w.bus.get();
            if !outages.wind_in_service(grid, crate::model::WindIdx(k as u32)) || !pf.energised[bus]
            {
                continue;
            }
            let Some(d) = &w.dynamics else {
                missing.push(format!("wind plant \"{}\"", w.id));
                continue;
            };
            let (dev, states) =
                WindDevice::new(d, w.rating_pu, v[bus], Complex::new(w.p_pu, w.q_pu));
            push(Device::Wind(dev), k, bus, states);
        }
        if !missing.is_empty() {
            return Err(Error::Dynamics(format!(
                "no dynamic data for {}",
                missing.join(", ")
            )));
        }

        let mut y = AdmittanceMatrix::build(grid, outages);
        // Buses without voltage in the power flow are isolated; a unit conductance keeps
        // their rows regular (their voltage stays zero).
        for i in 0..nb {
            if !pf.energised[i] {
                let p = y.diag_pos[i];
                y.values[p] += Complex::new(1.0, 0.0);
            }
        }
        let lu = BlockLu::new(nb, &y.row_ptr, &y.col_idx);
        let y_lu_slots = (0..nb)
            .flat_map(|i| (y.row_ptr[i]..y.row_ptr[i + 1]).map(move |p| (i, p)))
            .map(|(i, p)| lu.slot(i, y.col_idx[p]))
            .collect();
        let diag_lu_slots = (0..nb).map(|i| lu.slot(i, i)).collect();
        let branch_on = (0..grid.branches.len())
            .map(|k| outages.branch_in_service(grid, crate::model::BranchIdx(k as u32)))
            .collect();

        let mut events = scenario.events.clone();
        events.sort_by(|a, b| a.t_s.total_cmp(&b.t_s));
        check_events(grid, &events)?;

        let load_buses = load_buses(grid, pf);
        let criteria = options
            .criteria
            .unwrap_or_else(|| StabilityCriteria::for_frequency(f0));
        let nx = x.len();
        let jac = slots
            .iter()
            .map(|s| DeviceJacobian {
                a_inv: vec![0.0; s.n * s.n],
                a_inv_b: vec![0.0; s.n * 2],
                c: vec![0.0; 2 * s.n],
                schur: [0.0; 4],
            })
            .collect();
        let max_n = slots.iter().map(|s| s.n).max().unwrap_or(0);
        let mut sim = Simulation {
            grid,
            opts: options.clone(),
            h,
            t: 0.0,
            y,
            branch_on,
            fault_y: vec![Complex::new(0.0, 0.0); nb],
            slots,
            jac,
            lu,
            y_lu_slots,
            diag_lu_slots,
            jac_h: f64::NAN,
            jac_mode: Mode::Step,
            jac_age: 0,
            x: x.clone(),
            v: v.clone(),
            f: vec![0.0; nx],
            x_new: x,
            v_prev: v.clone(),
            v_prev2: v.clone(),
            h_prev2: 0.0,
            f_prev: vec![0.0; nx],
            h_prev: 0.0,
            v_new: v,
            f_new: vec![0.0; nx],
            residual: vec![0.0; nx],
            a_inv_r: vec![0.0; nx],
            rhs: vec![0.0; 2 * nb],
            inj: vec![Complex::new(0.0, 0.0); nb],
            yv: vec![Complex::new(0.0, 0.0); nb],
            scratch: Vec::with_capacity(nb),
            fd_f: vec![0.0; max_n],
            fd_fx: vec![0.0; max_n],
            fd_a: vec![0.0; max_n * max_n],
            fd_b: vec![0.0; max_n * 2],
            fd_inv: vec![0.0; max_n * max_n],
            vmag: vec![0.0; nb],
            events,
            next_event: 0,
            faults_on: 0,
            island: Vec::new(),
            monitor: Monitor::new(criteria, f0, load_buses),
            stats: RunStats::default(),
            trajectory: None,
            angles_deg: Vec::new(),
            wind_trips: Vec::new(),
            motor_trips: Vec::new(),
            stopped: false,
        };
        let units: Vec<String> = sim
            .slots
            .iter()
            .filter(|s| matches!(s.device, Device::Unit(_)))
            .map(|s| format!("machine \"{}\"", grid.machines[s.element].id))
            .collect();
        sim.angles_deg = vec![f64::NAN; units.len()];
        sim.monitor
            .record_damping_signals(options.duration_s, units);
        sim.update_islands();
        sim.check_initial_rest()?;
        if options.record {
            sim.trajectory = Some(Trajectory {
                machines: sim
                    .slots
                    .iter()
                    .filter(|s| matches!(s.device, Device::Unit(_)))
                    .map(|s| grid.machines[s.element].id.clone())
                    .collect(),
                buses: grid.buses.iter().map(|b| b.number).collect(),
                angle_deg: Vec::new(),
                voltage_pu: vec![Vec::new(); nb],
                event_times_s: sim.events.iter().map(|e| e.t_s).collect(),
                ..Trajectory::default()
            });
            if let Some(tr) = &mut sim.trajectory {
                tr.angle_deg = vec![Vec::new(); tr.machines.len()];
            }
        }
        sim.observe();
        Ok(sim)
    }

    /// Simulated time reached, s.
    pub fn time_s(&self) -> f64 {
        self.t
    }

    /// True once the run has stopped (end reached by [`Self::finish`], or an early verdict).
    pub fn stopped(&self) -> bool {
        self.stopped
    }

    /// Adds events (e.g. a shed action to try from a snapshot); they must not lie before the
    /// current time.
    pub fn add_events(&mut self, events: &[TimedEvent]) -> Result<(), Error> {
        if let Some(e) = events.iter().find(|e| e.t_s < self.t - 1e-12) {
            return Err(Error::Dynamics(format!(
                "event at {} s lies before the simulation time {} s",
                e.t_s, self.t
            )));
        }
        check_events(self.grid, events)?;
        let mut pending: Vec<TimedEvent> = self.events.drain(self.next_event..).collect();
        pending.extend_from_slice(events);
        pending.sort_by(|a, b| a.t_s.total_cmp(&b.t_s));
        self.events.extend(pending);
        if let Some(tr) = &mut self.trajectory {
            tr.event_times_s.extend(events.iter().map(|e| e.t_s));
        }
        Ok(())
    }

    /// Advances to `t_end_s` (or until a criterion fails, with early stop on).
    pub fn run_to(&mut self, t_end_s: f64) {
        while !self.stopped {
            self.apply_due_events();
            if self.stopped {
                break;
            }
            let remaining = t_end_s - self.t;
            if remaining <= 1e-9 {
                break;
            }
            let to_event = self
                .events
                .get(self.next_event)
                .map_or(f64::INFINITY, |e| e.t_s - self.t);
            let step = self.h.min(remaining).min(to_event.max(0.0));
            if step <= 1e-12 {
                continue;
            }
            self.advance(step);
        }
    }

    /// Ends the run: final checks, verdict, counters and the trajectory.
    pub fn finish(mut self) -> SimulationResult {
        let reached_end = self.t >= self.opts.duration_s - 1e-9;
        let f_final = self
            .centres()
            .iter()
            .max_by(|a, b| a.h.total_cmp(&b.h))
            .map_or(self.grid.frequency_hz, |c| c.speed * self.grid.frequency_hz);
        self.refresh_vmag();
        self.monitor
            .finish(self.t, reached_end, f_final, &self.vmag);
        let early = self.monitor.failed() && !reached_end;
        SimulationResult {
            verdict: Verdict {
                failure: self.monitor.failure.clone(),
                margins: self.monitor.margins.clone(),
                end_time_s: self.t,
                stopped_early: early,
                wind_trips: self.wind_trips,
                motor_trips: self.motor_trips,
            },
            stats: self.stats,
            trajectory: self.trajectory,
        }
    }

    /// The largest state derivative, for checks of initialisation.
    pub fn max_derivative(&self) -> f64 {
        self.f.iter().fold(0.0, |m, d| m.max(d.abs()))
    }

    /// The current value of every state, device by device (for checks).
    pub fn states(&self) -> &[f64] {
        &self.x
    }

    /// Bus voltages, pu.
    pub fn voltages(&self) -> &[Complex] {
        &self.v
    }

    fn check_initial_rest(&mut self) -> Result<(), Error> {
        // Make the voltages consistent with the device models, then look at the derivatives.
        if !self.solve_algebraic() {
            return Err(Error::Dynamics(
                "the network equations do not converge at the initial point".to_string(),
            ));
        }
        let tol = 1e-6;
        for s in &self.slots {
            for j in 0..s.n {
                let d = self.f[s.offset + j];
                if d.abs() > tol {
                    return Err(Error::Dynamics(format!(
                        "{} does not start at rest (state {j} moves at {d:.3e} per s); \
                         its data do not fit the operating point",
                        self.slot_name(s)
                    )));
                }
            }
        }
        Ok(())
    }

    fn slot_name(&self, s: &Slot) -> String {
        match s.device {
            Device::Unit(_) => format!("machine \"{}\"", self.grid.machines[s.element].id),
            Device::Load(_) => format!("load \"{}\"", self.grid.loads[s.element].id),
            Device::Wind(_) => format!("wind plant \"{}\"", self.grid.wind_plants[s.element].id),
        }
    }

    /// Evaluates every device at (`x`, `v`): derivatives into `f`, bus injections into `inj`.
    fn evaluate_all(&mut self, which: Which) {
        let (x, v, f) = match which {
            Which::Accepted => (&self.x, &self.v, &mut self.f),
            Which::Trial => (&self.x_new, &self.v_new, &mut self.f_new),
        };
        self.inj.fill(Complex::new(0.0, 0.0));
        for s in &self.slots {
            let r = s.offset..s.offset + s.n;
            if !s.active {
                f[r].fill(0.0);
                continue;
            }
            self.inj[s.bus] += s.device.evaluate(&x[r.clone()], v[s.bus], &mut f[r]);
        }
        self.y.multiply(v, &mut self.yv);
    }

    /// Rebuilds the device Jacobians and the sparse factors at the trial point.
    fn refresh_jacobian(&mut self, h: f64, mode: Mode) -> bool {
        self.stats.factorisations += 1;
        let a = 0.5 * h;
        for (k, s) in self.slots.iter().enumerate() {
            let jac = &mut self.jac[k];
            if !s.active {
                jac.schur = [0.0; 4];
                continue;
            }
            let n = s.n;
            let r = s.offset..s.offset + n;
            let x = &mut self.x_new[r.clone()];
            let v = self.v_new[s.bus];
            let f0 = &mut self.fd_f[..n];
            let i0 = s.device.evaluate(x, v, f0);
            let fx = &mut self.fd_fx[..n];
            // Columns for the states: A = I - a f_x, C = I_x.
            let a_mat = &mut self.fd_a[..n * n];
            for j in 0..n {
                let eps = 1e-7 * x[j].abs().max(1.0);
                let keep = x[j];
                x[j] += eps;
                let i1 = s.device.evaluate(x, v, fx);
                x[j] = keep;
                for i in 0..n {
                    a_mat[i * n + j] = -a * (fx[i] - f0[i]) / eps;
                }
                a_mat[j * n + j] += 1.0;
                jac.c[j] = (i1.re - i0.re) / eps;
                jac.c[n + j] = (i1.im - i0.im) / eps;
            }
            // Columns for the voltage: B = -a f_V, D = I_V.
            let b_mat = &mut self.fd_b[..n * 2];
            let mut d = [0.0; 4];
            let eps = 1e-7 * v.norm().max(1.0);
            for (col, dv) in [(0, Complex::new(eps, 0.0)), (1, Complex::new(0.0, eps))] {
                let i1 = s.device.evaluate(x, v + dv, fx);
                for i in 0..n {
                    b_mat[i * 2 + col] = -a * (fx[i] - f0[i]) / eps;
                }
                d[col] = (i1.re - i0.re) / eps;
                d[2 + col] = (i1.im - i0.im) / eps;
            }
            if mode == Mode::Algebraic || n == 0 {
                jac.schur = d;
                continue;
            }
            let inverse = &mut self.fd_inv[..n * n];
            if !invert(a_mat, inverse, n) {
                return false;
            }
            // Row-major inverse to columns.
            for (m, column) in jac.a_inv.chunks_exact_mut(n).enumerate() {
                for (i, entry) in column.iter_mut().enumerate() {
                    *entry = inverse[i * n + m];
                }
            }
            for i in 0..n {
                for col in 0..2 {
                    jac.a_inv_b[i * 2 + col] = (0..n)
                        .map(|m| inverse[i * n + m] * b_mat[m * 2 + col])
                        .sum();
                }
            }
            let mut schur = d;
            for row in 0..2 {
                for col in 0..2 {
                    schur[row * 2 + col] -= (0..n)
                        .map(|m| jac.c[row * n + m] * jac.a_inv_b[m * 2 + col])
                        .sum::<f64>();
                }
            }
            jac.schur = schur;
        }
        self.lu.clear();
        for (p, &slot) in self.y_lu_slots.iter().enumerate() {
            let y = self.y.values[p];
            self.lu.set(slot, [-y.re, y.im, -y.im, -y.re]);
        }
        for (k, s) in self.slots.iter().enumerate() {
            if s.active {
                self.lu.add(self.diag_lu_slots[s.bus], self.jac[k].schur);
            }
        }
        if self.lu.factor().is_err() {
            return false;
        }
        self.jac_h = h;
        self.jac_mode = mode;
        self.jac_age = 0;
        true
    }

    /// Newton iteration for the trial point (`x_new`, `v_new`). In `Step` mode it solves the
    /// trapezoidal step of length `h` from the accepted point; in `Algebraic` mode it solves
    /// the network with the states held. Returns false if it does not converge.
    fn newton(&mut self, h: f64, mode: Mode) -> bool {
        let a = 0.5 * h;
        let mut since_refresh = usize::MAX;
        let mut last_norm = f64::INFINITY;
        for it in 0..=self.opts.max_iterations {
            self.evaluate_all(Which::Trial);
            let mut norm = 0.0_f64;
            if mode == Mode::Step {
                for s in self.slots.iter().filter(|s| s.active) {
                    let r = s.offset..s.offset + s.n;
                    let states = self.x_new[r.clone()].iter().zip(&self.x[r.clone()]);
                    let slopes = self.f_new[r.clone()].iter().zip(&self.f[r.clone()]);
                    for (res, ((x1, x0), (f1, f0))) in
                        self.residual[r].iter_mut().zip(states.zip(slopes))
                    {
                        *res = x1 - x0 - a * (f1 + f0);
                        norm = norm.max(res.abs());
                    }
                }
            }
            for ((rhs, inj), yv) in self.rhs.chunks_exact_mut(2).zip(&self.inj).zip(&self.yv) {
                let m = inj - yv;
                rhs[0] = -m.re;
                rhs[1] = -m.im;
                norm = norm.max(m.re.abs()).max(m.im.abs());
            }
            if !norm.is_finite() {
                return false;
            }
            self.stats.iterations += 1;
            if norm < self.opts.tolerance {
                self.stats.max_iterations_in_step = self.stats.max_iterations_in_step.max(it);
                return true;
            }
            if it == self.opts.max_iterations {
                return false;
            }
            // Rebuild when the Jacobian belongs to another step length or mode, when it has
            // served many steps (it drifts as rotors turn and voltages move), when the residual
            // falls by less than a factor of four, or after a few iterations on it.
            let stale = (it == 0 && self.jac_age >= self.opts.refresh_every_steps)
                || self.jac_h.is_nan()
                || self.jac_h != h
                || self.jac_mode != mode;
            let slow = since_refresh > 0
                && (norm > 0.25 * last_norm
                    || (since_refresh == usize::MAX && it >= self.opts.refresh_after_iterations));
            if stale || slow {
                if !self.refresh_jacobian(h, mode) {
                    return false;
                }
                since_refresh = 0;
            }
            if since_refresh != usize::MAX {
                since_refresh += 1;
            }
            last_norm = norm;
            // Reduced right-hand side: -F + sum C A^-1 R.
            if mode == Mode::Step {
                for (s, jac) in self.slots.iter().zip(&self.jac) {
                    if !s.active || s.n == 0 {
                        continue;
                    }
                    let n = s.n;
                    let r = &self.residual[s.offset..s.offset + n];
                    let out = &mut self.a_inv_r[s.offset..s.offset + n];
                    out.fill(0.0);
                    for (column, rm) in jac.a_inv.chunks_exact(n).zip(r) {
                        for (o, a) in out.iter_mut().zip(column) {
                            *o += a * rm;
                        }
                    }
                    let (c_re, c_im) = jac.c.split_at(n);
                    let (cr, ci) = out
                        .iter()
                        .zip(c_re.iter().zip(c_im))
                        .fold((0.0, 0.0), |(cr, ci), (o, (c0, c1))| {
                            (cr + c0 * o, ci + c1 * o)
                        });
                    self.rhs[2 * s.bus] += cr;
                    self.rhs[2 * s.bus + 1] += ci;
                }
            }
            self.lu.solve_in_place(&mut self.rhs, &mut self.scratch);
            for (v, dv) in self.v_new.iter_mut().zip(self.rhs.chunks_exact(2)) {
                *v += Complex::new(dv[0], dv[1]);
            }
            if mode == Mode::Step {
                for (s, jac) in self.slots.iter().zip(&self.jac) {
                    if !s.active || s.n == 0 {
                        continue;
                    }
                    let (dvr, dvi) = (self.rhs[2 * s.bus], self.rhs[2 * s.bus + 1]);
                    let r = s.offset..s.offset + s.n;
                    let corrections = self.a_inv_r[r.clone()]
                        .iter()
                        .zip(jac.a_inv_b.chunks_exact(2));
                    for (x, (air, ab)) in self.x_new[r].iter_mut().zip(corrections) {
                        *x -= air + ab[0] * dvr + ab[1] * dvi;
                    }
                }
            }
        }
        false
    }

    /// Solves the network with the states held and makes `f` consistent; true on success.
    /// Frequency measurements ride through the phase jump (see `LoadDevice::follow_phase_jump`).
    fn solve_algebraic(&mut self) -> bool {
        self.x_new.copy_from_slice(&self.x);
        self.v_new.copy_from_slice(&self.v);
        // The measurements follow the phase jump, which changes the loads a little, which moves
        // the voltages a little: a few passes settle it.
        for _ in 0..4 {
            if !self.newton(self.h, Mode::Algebraic) {
                return false;
            }
            let mut largest = 0.0_f64;
            for s in self.slots.iter().filter(|s| s.active) {
                if let Device::Load(l) = &s.device {
                    let x = &mut self.x_new[s.offset..s.offset + s.n];
                    largest = largest.max(l.follow_phase_jump(x, self.v[s.bus], self.v_new[s.bus]));
                }
            }
            self.v.copy_from_slice(&self.v_new);
            if largest < 1e-9 {
                break;
            }
        }
        self.x.copy_from_slice(&self.x_new);
        self.evaluate_all(Which::Accepted);
        // The next step needs a Jacobian for its own mode, and no extrapolation across a jump.
        self.jac_h = f64::NAN;
        self.h_prev = 0.0;
        true
    }

    /// One step of length `step` (retried with halves on failure).
    fn advance(&mut self, step: f64) {
        let mut h = step;
        for attempt in 0..=MAX_STEP_HALVINGS {
            // Predictor, when the previous step was smooth (no event since): second-order
            // Adams-Bashforth for the states, and for the voltages quadratic extrapolation
            // after two equal steps, linear otherwise. Right after an event: explicit Euler
            // and the voltages held. (Third-order Adams-Bashforth for the states was tried:
            // 4 % fewer iterations, but runs with no event no longer stayed flat to 1e-14.)
            if self.h_prev > 0.0 {
                let r = h / self.h_prev;
                for i in 0..self.x.len() {
                    let slope = self.f[i] + 0.5 * r * (self.f[i] - self.f_prev[i]);
                    self.x_new[i] = self.x[i] + h * slope;
                }
                if self.h_prev2 == self.h_prev && h == self.h_prev {
                    // Two equal steps behind: quadratic extrapolation of the voltages.
                    for k in 0..self.v.len() {
                        self.v_new[k] = self.v[k] * 3.0 - self.v_prev[k] * 3.0 + self.v_prev2[k];
                    }
                } else {
                    for k in 0..self.v.len() {
                        self.v_new[k] = self.v[k] + (self.v[k] - self.v_prev[k]) * r;
                    }
                }
            } else {
                for i in 0..self.x.len() {
                    self.x_new[i] = self.x[i] + h * self.f[i];
                }
                self.v_new.copy_from_slice(&self.v);
            }
            if self.newton(h, Mode::Step) {
                self.accept(h);
                return;
            }
            if attempt < MAX_STEP_HALVINGS {
                self.stats.retries += 1;
                self.jac_h = f64::NAN;
                h *= 0.5;
            }
        }
        self.monitor.numerical_failure(
            self.t,
            format!("Newton iteration did not converge even with a {h:.2e}-s step"),
        );
        self.stopped = true;
    }

    fn accept(&mut self, h: f64) {
        self.stats.steps += 1;
        self.jac_age += 1;
        self.t += h;
        std::mem::swap(&mut self.v_prev2, &mut self.v_prev);
        self.v_prev.copy_from_slice(&self.v);
        self.h_prev2 = self.h_prev;
        self.f_prev.copy_from_slice(&self.f);
        self.h_prev = h;
        std::mem::swap(&mut self.x, &mut self.x_new);
        std::mem::swap(&mut self.v, &mut self.v_new);
        std::mem::swap(&mut self.f, &mut self.f_new);
        // Limiters and relays act at the step boundary.
        let (mut clamped, mut switched, mut tripped) = (false, false, false);
        let t = self.t;
        for s in &mut self.slots {
            if !s.active {
                continue;
            }
            let x = &mut self.x[s.offset..s.offset + s.n];
            let v = self.v[s.bus];
            match &mut s.device {
                Device::Unit(u) => clamped |= u.after_step(x, v),
                Device::Load(l) => {
                    if l.after_step(x, v, t) {
                        (switched, tripped) = (true, true);
                        self.motor_trips.push(Trip {
                            id: self.grid.loads[s.element].id.clone(),
                            time_s: t,
                            cause: TripCause::LowVoltage,
                        });
                    }
                }
                Device::Wind(w) => {
                    if w.after_step(x, t) {
                        switched = true;
                        if let Some(cause) = w.trip_cause {
                            tripped = true;
                            self.wind_trips.push(Trip {
                                id: self.grid.wind_plants[s.element].id.clone(),
                                time_s: t,
                                cause,
                            });
                        }
                    }
                }
            }
        }
        if tripped {
            // A trip is an event of its own: its transient is kept out of the damping window.
            self.monitor.note_event(t);
        }
        if switched {
            if !self.solve_algebraic() {
                self.monitor
                    .numerical_failure(t, "network did not converge after a relay action".into());
                self.stopped = true;
                return;
            }
        } else if clamped {
            self.evaluate_all(Which::Accepted);
        }
        self.observe();
    }

    fn apply_due_events(&mut self) {
        let mut applied = false;
        while let Some(e) = self.events.get(self.next_event) {
            if e.t_s > self.t + 1e-9 {
                break;
            }
            let e = e.clone();
            self.next_event += 1;
            // The state just before the jump was recorded at the end of the step that landed
            // here (or at the start of the run).
            self.apply(&e.event);
            self.monitor.note_event(self.t);
            applied = true;
        }
        if applied {
            self.jac_h = f64::NAN;
            if !self.solve_algebraic() {
                self.monitor.numerical_failure(
                    self.t,
                    "network did not converge after an event".to_string(),
                );
                self.stopped = true;
                return;
            }
            self.observe();
        }
    }

    fn y_add(&mut self, i: usize, j: usize, value: Complex) {
        let row = self.y.row_ptr[i]..self.y.row_ptr[i + 1];
        if let Ok(p) = self.y.col_idx[row.clone()].binary_search(&j) {
            self.y.values[row.start + p] += value;
        }
    }

    fn apply(&mut self, event: &Event) {
        match *event {
            Event::Fault { bus, r_pu, x_pu } => {
                let b = bus.get();
                let y = Complex::new(1.0, 0.0) / Complex::new(r_pu, x_pu);
                self.y_add(b, b, y);
                self.fault_y[b] += y;
                self.faults_on += 1;
                self.monitor.suspend_voltage_checks();
            }
            Event::ClearFault { bus } => {
                let b = bus.get();
                let y = self.fault_y[b];
                if y != Complex::new(0.0, 0.0) {
                    self.y_add(b, b, -y);
                    self.fault_y[b] = Complex::new(0.0, 0.0);
                    self.faults_on = self.faults_on.saturating_sub(1);
                }
                if self.faults_on == 0 {
                    self.monitor.start_voltage_clock(self.t);
                }
            }
            Event::TripBranch(k) => {
                let k = k.get();
                if self.branch_on[k] {
                    self.branch_on[k] = false;
                    let br = &self.grid.branches[k];
                    let [ff, ft, tf, tt] = branch_admittance(
                        br.r_pu,
                        br.x_pu,
                        br.b_pu,
                        br.tap_ratio,
                        br.phase_shift_rad,
                    );
                    let (f, t) = (br.from.get(), br.to.get());
                    self.y_add(f, f, -ff);
                    self.y_add(f, t, -ft);
                    self.y_add(t, f, -tf);
                    self.y_add(t, t, -tt);
                    self.update_islands();
                }
                self.start_clock_if_quiet();
            }
            Event::TripMachine(m) => {
                self.deactivate(|s| matches!(s.device, Device::Unit(_)) && s.element == m.get());
                self.start_clock_if_quiet();
            }
            Event::TripWind(w) => {
                self.deactivate(|s| matches!(s.device, Device::Wind(_)) && s.element == w.get());
                self.start_clock_if_quiet();
            }
            Event::LoadStep { bus, p_pu } => {
                self.scale_loads(bus.get(), p_pu);
                self.start_clock_if_quiet();
            }
            Event::Shed { bus, p_pu } => self.scale_loads(bus.get(), -p_pu),
        }
    }

    /// Starts the voltage clock at a non-fault disturbance if no fault is on and it has not
    /// started.
    fn start_clock_if_quiet(&mut self) {
        if self.faults_on == 0 && !self.monitor.voltage_clock_running() {
            self.monitor.start_voltage_clock(self.t);
        }
    }

    fn deactivate(&mut self, which: impl Fn(&Slot) -> bool) {
        for s in self.slots.iter_mut().filter(|s| which(s)) {
            s.active = false;
        }
    }

    /// Changes the demand at `bus` by `delta_p` (pu), scaling its loads together.
    fn scale_loads(&mut self, bus: usize, delta_p: f64) {
        let total: f64 = self
            .slots
            .iter()
            .filter(|s| s.bus == bus && s.active)
            .filter_map(|s| match &s.device {
                Device::Load(l) => Some(l.nominal_p()),
                _ => None,
            })
            .sum();
        if total <= 0.0 {
            return;
        }
        let factor = ((total + delta_p) / total).max(0.0);
        for s in self.slots.iter_mut().filter(|s| s.bus == bus && s.active) {
            if let Device::Load(l) = &mut s.device {
                l.scale *= factor;
            }
        }
    }

    fn update_islands(&mut self) {
        let nb = self.grid.n_buses();
        let mut parent: Vec<usize> = (0..nb).collect();
        fn find(p: &mut [usize], mut i: usize) -> usize {
            while p[i] != i {
                p[i] = p[p[i]];
                i = p[i];
            }
            i
        }
        for (k, br) in self.grid.branches.iter().enumerate() {
            if self.branch_on[k] {
                let (a, b) = (
                    find(&mut parent, br.from.get()),
                    find(&mut parent, br.to.get()),
                );
                if a != b {
                    parent[a.max(b)] = a.min(b);
                }
            }
        }
        self.island = (0..nb).map(|i| find(&mut parent, i)).collect();
    }

    /// The centre of inertia of each island that has machines in service.
    fn centres(&self) -> Vec<Centre> {
        let mut acc: Vec<Centre> = Vec::new();
        for s in self.slots.iter().filter(|s| s.active) {
            if let Device::Unit(u) = &s.device {
                let island = self.island[s.bus];
                let (d, w) = (self.x[s.offset], self.x[s.offset + 1]);
                let c = match acc.iter_mut().position(|a| a.island == island) {
                    Some(k) => &mut acc[k],
                    None => {
                        acc.push(Centre {
                            island,
                            h: 0.0,
                            angle: 0.0,
                            speed: 0.0,
                        });
                        let last = acc.len() - 1;
                        &mut acc[last]
                    }
                };
                c.h += u.h_s;
                c.angle += u.h_s * d;
                c.speed += u.h_s * w;
            }
        }
        for c in &mut acc {
            c.angle /= c.h;
            c.speed /= c.h;
        }
        acc
    }

    fn refresh_vmag(&mut self) {
        for (m, v) in self.vmag.iter_mut().zip(&self.v) {
            *m = v.norm_sqr().sqrt();
        }
    }

    /// Applies the criteria at the current point and records it.
    fn observe(&mut self) {
        let t = self.t;
        let acc = self.centres();
        let (mut worst, mut who) = (0.0_f64, usize::MAX);
        for s in self.slots.iter().filter(|s| s.active) {
            if let Device::Unit(_) = &s.device {
                let isl = self.island[s.bus];
                if let Some(c) = acc.iter().find(|c| c.island == isl) {
                    let sep = (self.x[s.offset] - c.angle).abs().to_degrees();
                    if sep > worst {
                        (worst, who) = (sep, s.element);
                    }
                }
            }
        }
        if who != usize::MAX {
            self.monitor
                .check_angle(t, worst, &self.grid.machines[who].id);
        }
        for c in &acc {
            let f_hz = self.grid.frequency_hz * c.speed;
            let bus = self.grid.buses[c.island].number;
            self.monitor.check_frequency(t, f_hz, || {
                format!("centre of inertia of the island of bus {bus}")
            });
        }
        self.refresh_vmag();
        self.monitor.check_voltages(t, &self.vmag);
        let damping_signals = self.monitor.wants_signals(t, self.h);
        if damping_signals || self.trajectory.is_some() {
            self.unit_angles(&acc);
        }
        if damping_signals {
            self.monitor.record_signals(t, &self.angles_deg, &self.vmag);
        }
        self.record(&acc);
        if self.monitor.failed() && self.opts.early_stop {
            self.stopped = true;
        }
    }

    /// Each unit's rotor angle from its island's centre of inertia (`acc`), degrees, into
    /// `angles_deg` (NaN for a unit out of service).
    fn unit_angles(&mut self, acc: &[Centre]) {
        let units = self
            .slots
            .iter()
            .filter(|s| matches!(s.device, Device::Unit(_)));
        for (angle, s) in self.angles_deg.iter_mut().zip(units) {
            *angle = acc
                .iter()
                .find(|c| c.island == self.island[s.bus])
                .filter(|_| s.active)
                .map_or(f64::NAN, |c| (self.x[s.offset] - c.angle).to_degrees());
        }
    }

    /// Records the current point in the trajectory, if one is kept (`unit_angles` filled).
    fn record(&mut self, acc: &[Centre]) {
        let Some(tr) = &mut self.trajectory else {
            return;
        };
        tr.time_s.push(self.t);
        for (series, angle) in tr.angle_deg.iter_mut().zip(&self.angles_deg) {
            series.push(*angle);
        }
        for (k, v) in self.v.iter().enumerate() {
            tr.voltage_pu[k].push(v.norm());
        }
        let main = acc.iter().max_by(|a, b| a.h.total_cmp(&b.h));
        tr.frequency_hz
            .push(main.map_or(f64::NAN, |c| self.grid.frequency_hz * c.speed));
    }
}

/// Centre of inertia of one island: total inertia (s, system base), mean angle (rad) and
/// mean speed (pu), inertia-weighted.
struct Centre {
    island: usize,
    h: f64,
    angle: f64,
    speed: f64,
}

#[derive(Clone, Copy)]
enum Which {
    Accepted,
    Trial,
}

/// Load buses for the voltage criteria: buses with in-service, energised demand, with their
/// pre-contingency voltage.
fn load_buses(grid: &Grid, pf: &PowerFlowSolution) -> Vec<LoadBus> {
    grid.load_buses()
        .into_iter()
        .map(BusIdx::get)
        .filter(|&b| pf.energised[b])
        .map(|b| LoadBus {
            idx: b,
            number: grid.buses[b].number,
            v_pre: pf.v_pu[b],
        })
        .collect()
}

/// Every event must name elements of this grid, at a finite time; shed and load-step amounts
/// must fit the load at their bus.
fn check_events(grid: &Grid, events: &[TimedEvent]) -> Result<(), Error> {
    for e in events {
        let fits = match e.event {
            Event::Fault { bus, r_pu, x_pu } => {
                bus.get() < grid.n_buses()
                    && r_pu >= 0.0
                    && x_pu >= 0.0
                    && r_pu + x_pu > 0.0
                    && (r_pu + x_pu).is_finite()
            }
            Event::ClearFault { bus } => bus.get() < grid.n_buses(),
            Event::LoadStep { bus, p_pu } | Event::Shed { bus, p_pu } => {
                bus.get() < grid.n_buses() && p_pu.is_finite()
            }
            Event::TripBranch(k) => k.get() < grid.branches.len(),
            Event::TripMachine(k) => k.get() < grid.machines.len(),
            Event::TripWind(k) => k.get() < grid.wind_plants.len(),
        };
        if !fits || !e.t_s.is_finite() {
            return Err(Error::Dynamics(format!(
                "event at {} s does not fit this grid: {:?}",
                e.t_s, e.event
            )));
        }
    }
    for e in events {
        let (bus, p, shed) = match e.event {
            Event::Shed { bus, p_pu } => (bus, p_pu, true),
            Event::LoadStep { bus, p_pu } => (bus, p_pu, false),
            _ => continue,
        };
        let at_bus: f64 = grid
            .loads
            .iter()
            .filter(|l| l.in_service && l.bus == bus && l.p_pu > 0.0)
            .map(|l| l.p_pu)
            .sum();
        let number = grid.buses[bus.get()].number;
        let mw = |x: f64| x * grid.s_base_mva;
        if at_bus <= 0.0 {
            return Err(Error::Dynamics(format!(
                "event at {} s changes the load at bus {number}, which has none",
                e.t_s
            )));
        }
        if (shed && p > at_bus * (1.0 + 1e-9)) || (!shed && at_bus + p < 0.0) {
            return Err(Error::Dynamics(format!(
                "event at {} s removes {:.3} MW at bus {number}, which has {:.3} MW of load",
                e.t_s,
                mw(p.abs()),
                mw(at_bus)
            )));
        }
    }
    Ok(())
}

/// Inverts the `n x n` row-major matrix `a` (destroyed) into `out` by Gauss-Jordan elimination
/// with partial pivoting; false if singular.
fn invert(a: &mut [f64], out: &mut [f64], n: usize) -> bool {
    out.fill(0.0);
    for i in 0..n {
        out[i * n + i] = 1.0;
    }
    for col in 0..n {
        let pivot = (col..n)
            .max_by(|&p, &q| a[p * n + col].abs().total_cmp(&a[q * n + col].abs()))
            .unwrap_or(col);
        let pv = a[pivot * n + col];
        if pv.abs() < 1e-300 || !pv.is_finite() {
            return false;
        }
        if pivot != col {
            for j in 0..n {
                a.swap(pivot * n + j, col * n + j);
                out.swap(pivot * n + j, col * n + j);
            }
        }
        let inv = 1.0 / pv;
        for j in 0..n {
            a[col * n + j] *= inv;
            out[col * n + j] *= inv;
        }
        for r in 0..n {
            if r != col {
                let factor = a[r * n + col];
                if factor != 0.0 {
                    for j in 0..n {
                        a[r * n + j] -= factor * a[col * n + j];
                        out[r * n + j] -= factor * out[col * n + j];
                    }
                }
            }
        }
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dense_inverse_times_matrix_is_identity() {
        let m = [4.0, 1.0, 0.0, 2.0, 0.0, 3.0, 1.0, 1.0, 5.0];
        let mut a = m;
        let mut inv = [0.0; 9];
        assert!(invert(&mut a, &mut inv, 3));
        for i in 0..3 {
            for j in 0..3 {
                let p: f64 = (0..3).map(|k| m[i * 3 + k] * inv[k * 3 + j]).sum();
                assert!((p - f64::from(u8::from(i == j))).abs() < 1e-12);
            }
        }
        let mut singular = [1.0, 2.0, 2.0, 4.0];
        assert!(!invert(&mut singular, &mut [0.0; 4], 2));
    }
}
