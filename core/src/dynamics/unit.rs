//! A synchronous generating unit: the machine (classical, two-axis or sub-transient), with an
//! optional exciter and turbine-governor, as one device at one bus.
//!
//! Machine equations follow DOMAIN.md 2.2-2.4 (Sauer and Pai's form, q axis at the rotor angle,
//! generator convention); torque is taken equal to power (`T = P`, the usual choice for angle
//! studies, and the one the swing-equation checks assume). Everything here is per unit on the
//! system base: reactances, inertia and damping are converted from the machine's rating once.

use crate::Complex;
use crate::model::{ExciterData, GovernorData, Grid, Saturation, StabiliserData};

/// Which machine model a simulation uses.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum MachineModelChoice {
    /// Constant voltage behind transient reactance for every machine (exciters ignored).
    Classical,
    /// The most detailed model each machine's data allow: sub-transient (sixth order) where
    /// sub-transient data are given, else two-axis (fourth order).
    #[default]
    Detailed,
}

/// The machine model of one unit.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MachineModel {
    /// Second order: angle and speed, constant `E'` behind `x'd`.
    Classical,
    /// Fourth order: angle, speed, `E'q`, `E'd`.
    TwoAxis,
    /// Sixth order: two-axis plus `E"q`, `E"d`.
    Subtransient,
}

/// A non-windup limit on a first-order lag `T dx/dt = drive - x`, engaged and released at step
/// boundaries and held through each step, so that the Newton iteration sees smooth equations
/// (IEEE Std 421.5 Annex E behaviour, resolved to the step).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
enum HeldLimit {
    #[default]
    Free,
    AtUpper,
    AtLower,
}

impl HeldLimit {
    /// Derivative and output of the lag inside a step.
    fn apply(self, x: f64, free_derivative: f64, lo: f64, hi: f64) -> (f64, f64) {
        match self {
            HeldLimit::Free => (free_derivative, x),
            HeldLimit::AtUpper => (0.0, hi),
            HeldLimit::AtLower => (0.0, lo),
        }
    }

    /// At a step boundary: engages when the state has crossed a limit, releases when the drive
    /// points back inside; pins the state at an engaged limit. True if anything changed.
    fn update(&mut self, x: &mut f64, drive: f64, lo: f64, hi: f64) -> bool {
        let before = (*self, *x);
        *self = match *self {
            HeldLimit::AtUpper if drive >= hi => HeldLimit::AtUpper,
            HeldLimit::AtLower if drive <= lo => HeldLimit::AtLower,
            _ if *x > hi => HeldLimit::AtUpper,
            _ if *x < lo => HeldLimit::AtLower,
            _ => HeldLimit::Free,
        };
        match *self {
            HeldLimit::AtUpper => *x = hi,
            HeldLimit::AtLower => *x = lo,
            HeldLimit::Free => *x = x.clamp(lo, hi),
        }
        before != (*self, *x)
    }
}

/// A windup limit on an output (IEEE Std 421.5 Annex E): the value is clipped and whatever
/// produces it runs on unchecked. Engaged and released at step boundaries like [`HeldLimit`],
/// so that a step sees smooth equations; while engaged the output follows the limit, which
/// may move within the step (a ceiling proportional to the terminal voltage).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
enum HeldClamp {
    #[default]
    Free,
    AtUpper,
    AtLower,
}

impl HeldClamp {
    /// The output inside a step.
    fn apply(self, value: f64, lo: f64, hi: f64) -> f64 {
        match self {
            HeldClamp::Free => value,
            HeldClamp::AtUpper => hi,
            HeldClamp::AtLower => lo,
        }
    }

    /// At a step boundary: engaged while the unclipped value lies outside the limits. True if
    /// it changed.
    fn update(&mut self, value: f64, lo: f64, hi: f64) -> bool {
        let before = *self;
        *self = if value > hi {
            HeldClamp::AtUpper
        } else if value < lo {
            HeldClamp::AtLower
        } else {
            HeldClamp::Free
        };
        before != *self
    }
}

#[derive(Clone, Debug)]
struct Exciter {
    data: ExciterData,
    v_ref: f64,
    offset: usize,
    /// Non-windup limit on the lag state: the ST1A amplifier's range, or the first-order
    /// exciter's limits.
    state_limit: HeldLimit,
    /// Windup limit on the output: the ST1A bridge ceiling and floor (with an algebraic
    /// amplifier, its range too).
    output_clamp: HeldClamp,
}

impl Exciter {
    /// At a step boundary, at terminal voltage `vt` and stabiliser signal `vs`: engages or
    /// releases the state limit, then the output clamp on the output the next step starts
    /// from. `dx` is scratch. True if anything changed.
    fn after_step(&mut self, x: &mut [f64], vt: f64, vs: f64, dx: &mut [f64]) -> bool {
        let mut changed = false;
        let mut out = exciter_evaluate(self, x, vt, vs, dx);
        if let Some((lo, hi)) = state_limits(&self.data) {
            let k = self.offset + exciter_n_states(&self.data) - 1;
            if self.state_limit.update(&mut x[k], out.drive, lo, hi) {
                changed = true;
                out = exciter_evaluate(self, x, vt, vs, dx);
            }
        }
        let (lo, hi) = output_limits(&self.data, vt);
        changed | self.output_clamp.update(out.amplified, lo, hi)
    }
}

#[derive(Clone, Debug)]
struct Stabiliser {
    data: StabiliserData,
    offset: usize,
    output_clamp: HeldClamp,
}

impl Stabiliser {
    /// At a step boundary: engages or releases the output clamp (rotor speed `x[1]`). True if
    /// it changed.
    fn after_step(&mut self, x: &[f64], dx: &mut [f64]) -> bool {
        let unclipped = stabiliser_evaluate(self, x, x[1], dx).1;
        let d = self.data;
        self.output_clamp
            .update(unclipped, d.output_min_pu, d.output_max_pu)
    }
}

#[derive(Clone, Debug)]
struct Governor {
    data: GovernorData,
    limit: HeldLimit,
    p_ref: f64,
    /// Machine rating over system base: machine pu to system pu.
    scale: f64,
    offset: usize,
}

/// A generating unit, system base.
#[derive(Clone, Debug)]
pub(crate) struct Unit {
    pub(crate) model: MachineModel,
    /// Inertia constant on the system base, s.
    pub(crate) h_s: f64,
    damping: f64,
    ra: f64,
    xd: f64,
    xq: f64,
    xd1: f64,
    xq1: f64,
    xd2: f64,
    xq2: f64,
    td0_1: f64,
    tq0_1: f64,
    td0_2: f64,
    tq0_2: f64,
    saturation: Option<Saturation>,
    e_classical: f64,
    pm0: f64,
    efd0: f64,
    w_s: f64,
    exciter: Option<Exciter>,
    stabiliser: Option<Stabiliser>,
    governor: Option<Governor>,
}

impl Unit {
    /// Builds the unit of machine `k` at its power-flow operating point (`v` terminal voltage,
    /// `s` output, system pu) and returns it with its initial states.
    pub(crate) fn new(
        grid: &Grid,
        k: usize,
        choice: MachineModelChoice,
        v: Complex,
        s: Complex,
    ) -> Result<(Unit, Vec<f64>), String> {
        let m = &grid.machines[k];
        let d = m
            .dynamics
            .ok_or_else(|| format!("machine \"{}\" has no dynamic data", m.id))?;
        let z = grid.s_base_mva / m.rating_mva;
        let sub = d.subtransient;
        let model = match (choice, sub) {
            (MachineModelChoice::Classical, _) => MachineModel::Classical,
            (MachineModelChoice::Detailed, Some(_)) => MachineModel::Subtransient,
            (MachineModelChoice::Detailed, None) => MachineModel::TwoAxis,
        };
        let (ra, xd, xq, xd1) = (d.ra_pu * z, d.xd_pu * z, d.xq_pu * z, d.xd_transient_pu * z);
        let xq1 = if model == MachineModel::Classical {
            xd1
        } else {
            d.xq_transient_pu * z
        };
        let (xd2, xq2, td0_2, tq0_2) = match sub {
            Some(x) => (x.xd_pu * z, x.xq_pu * z, x.td0_s, x.tq0_s),
            None => (xd1, xq1, 0.0, 0.0),
        };
        let saturation = if model == MachineModel::Classical {
            None
        } else {
            d.saturation
        };
        let current = (s / v).conj();
        // Rotor angle: the angle of the voltage behind (ra + j xq), or behind x'd for the
        // classical model (DOMAIN.md 2.4).
        let x_angle = if model == MachineModel::Classical {
            xd1
        } else {
            xq
        };
        let e_angle = v + Complex::new(ra, x_angle) * current;
        let delta = e_angle.arg();
        let (vd, vq) = to_dq(v, delta);
        let (id, iq) = to_dq(current, delta);
        let e1q = vq + ra * iq + xd1 * id;
        let e1d = vd + ra * id - xq1 * iq;
        let e2q = e1q - (xd1 - xd2) * id;
        let e2d = e1d + (xq1 - xq2) * iq;
        let flux = match model {
            MachineModel::Subtransient => (e2q, e2d),
            _ => (e1q, e1d),
        };
        let efd0 = e1q + (xd - xd1) * id + saturation_term(saturation, flux.0, flux.1);
        let pm0 = vd * id + vq * iq + ra * (id * id + iq * iq);
        let w_s = 2.0 * std::f64::consts::PI * grid.frequency_hz;
        let mut x = match model {
            MachineModel::Classical => vec![delta, 1.0],
            MachineModel::TwoAxis => vec![delta, 1.0, e1q, e1d],
            MachineModel::Subtransient => vec![delta, 1.0, e1q, e1d, e2q, e2d],
        };
        let vt = v.norm();
        let exciter = match (model, m.exciter) {
            (MachineModel::Classical, _) | (_, None) => None,
            (_, Some(data)) => {
                let offset = x.len();
                let v_ref = init_exciter(&data, vt, efd0, &mut x)
                    .map_err(|e| format!("machine \"{}\": {e}", m.id))?;
                Some(Exciter {
                    data,
                    v_ref,
                    offset,
                    state_limit: HeldLimit::Free,
                    output_clamp: HeldClamp::Free,
                })
            }
        };
        let stabiliser = match (&exciter, m.stabiliser) {
            (Some(_), Some(data)) => {
                let offset = x.len();
                // At rest every stage's input and state are zero.
                x.extend(std::iter::repeat_n(0.0, stabiliser_n_states(&data)));
                Some(Stabiliser {
                    data,
                    offset,
                    output_clamp: HeldClamp::Free,
                })
            }
            _ => None,
        };
        let scale = m.rating_mva / grid.s_base_mva;
        let governor = match m.governor {
            None => None,
            Some(data) => {
                let pm_machine = pm0 / scale;
                let slack = 1e-6;
                if pm_machine > data.valve_max_pu + slack || pm_machine < data.valve_min_pu - slack
                {
                    return Err(format!(
                        "machine \"{}\": its initial mechanical power {:.4} pu of rating lies \
                         outside the governor's valve limits [{}, {}]",
                        m.id, pm_machine, data.valve_min_pu, data.valve_max_pu
                    ));
                }
                let offset = x.len();
                x.push(pm_machine);
                if data.t_reheat_s > 0.0 {
                    x.push(pm_machine);
                }
                Some(Governor {
                    data,
                    limit: HeldLimit::Free,
                    p_ref: pm_machine,
                    scale,
                    offset,
                })
            }
        };
        let unit = Unit {
            model,
            h_s: d.h_s / z,
            damping: d.damping_pu / z,
            ra,
            xd,
            xq,
            xd1,
            xq1,
            xd2,
            xq2,
            td0_1: d.td0_transient_s,
            tq0_1: d.tq0_transient_s,
            td0_2,
            tq0_2,
            saturation,
            e_classical: e_angle.norm(),
            pm0,
            efd0,
            w_s,
            exciter,
            stabiliser,
            governor,
        };
        Ok((unit, x))
    }

    /// Writes the state derivatives into `dx` and returns the current injected into the bus
    /// (generator convention, system pu).
    pub(crate) fn evaluate(&self, x: &[f64], v: Complex, dx: &mut [f64]) -> Complex {
        let (delta, w) = (x[0], x[1]);
        let (sin, cos) = delta.sin_cos();
        let vd = v.re * sin - v.im * cos;
        let vq = v.re * cos + v.im * sin;
        let (eq, ed, xdd, xqq) = match self.model {
            MachineModel::Classical => (self.e_classical, 0.0, self.xd1, self.xd1),
            MachineModel::TwoAxis => (x[2], x[3], self.xd1, self.xq1),
            MachineModel::Subtransient => (x[4], x[5], self.xd2, self.xq2),
        };
        // Stator: E"q = Vq + Ra Iq + X"d Id, E"d = Vd + Ra Id - X"q Iq, solved for Id, Iq.
        let ra = self.ra;
        let det = ra * ra + xdd * xqq;
        let id = (ra * (ed - vd) + xqq * (eq - vq)) / det;
        let iq = (ra * (eq - vq) - xdd * (ed - vd)) / det;
        let pe = vd * id + vq * iq + ra * (id * id + iq * iq);
        // Magnitude by sqrt of the square: hypot's overflow care costs time and is not needed.
        let vt = v.norm_sqr().sqrt();
        let vs = match &self.stabiliser {
            Some(p) => stabiliser_evaluate(p, x, w, dx).0,
            None => 0.0,
        };
        let efd = match &self.exciter {
            Some(e) => exciter_evaluate(e, x, vt, vs, dx).efd,
            None => self.efd0,
        };
        let pm = match &self.governor {
            Some(g) => governor_evaluate(g, x, w, dx).0,
            None => self.pm0,
        };
        dx[0] = self.w_s * (w - 1.0);
        dx[1] = (pm - pe - self.damping * (w - 1.0)) / (2.0 * self.h_s);
        if self.model != MachineModel::Classical {
            let saturated = saturation_term(self.saturation, eq, ed);
            dx[2] = (-x[2] - (self.xd - self.xd1) * id - saturated + efd) / self.td0_1;
            // Without a q-axis transient circuit, E'd keeps its initial value.
            dx[3] = if self.tq0_1 > 0.0 {
                (-x[3] + (self.xq - self.xq1) * iq) / self.tq0_1
            } else {
                0.0
            };
        }
        if self.model == MachineModel::Subtransient {
            dx[4] = (-x[4] + x[2] - (self.xd1 - self.xd2) * id) / self.td0_2;
            dx[5] = (-x[5] + x[3] + (self.xq1 - self.xq2) * iq) / self.tq0_2;
        }
        Complex::new(id * sin + iq * cos, iq * sin - id * cos)
    }

    /// At a step boundary: engages or releases the exciter's, stabiliser's and governor's
    /// limits for the next step. True if a state or a limit changed.
    pub(crate) fn after_step(&mut self, x: &mut [f64], v: Complex) -> bool {
        let mut scratch = [0.0; MAX_UNIT_STATES];
        let dx = &mut scratch[..x.len().min(MAX_UNIT_STATES)];
        let mut changed = false;
        let vt = v.norm();
        let mut vs = 0.0;
        if let Some(p) = &mut self.stabiliser {
            changed |= p.after_step(x, dx);
            vs = stabiliser_evaluate(p, x, x[1], dx).0;
        }
        if let Some(e) = &mut self.exciter {
            changed |= e.after_step(x, vt, vs, dx);
        }
        if let Some(g) = &mut self.governor {
            let (_, target) = governor_evaluate(g, x, x[1], dx);
            let d = g.data;
            changed |= g
                .limit
                .update(&mut x[g.offset], target, d.valve_min_pu, d.valve_max_pu);
        }
        changed
    }
}

/// Most states a unit can have: six machine states, three exciter states, four stabiliser
/// states, two governor states.
const MAX_UNIT_STATES: usize = 15;

/// Rotates a phasor of the network frame into the machine's d-q frame (q axis at `delta`).
fn to_dq(p: Complex, delta: f64) -> (f64, f64) {
    let (sin, cos) = delta.sin_cos();
    (p.re * sin - p.im * cos, p.re * cos + p.im * sin)
}

/// The saturation term of the field equation: the extra field voltage the open-circuit curve
/// asks beyond the air-gap line, `S(psi) psi_d`, with `psi` the magnitude of the voltage behind
/// the model's innermost reactance `(eq, ed)` and `psi_d = eq` its d-axis flux. At open circuit
/// (`eq = v`, `ed = 0`) the field needs `v (1 + S(v))`: the curve through the two given points.
fn saturation_term(saturation: Option<Saturation>, eq: f64, ed: f64) -> f64 {
    match saturation {
        Some(s) => s.factor((eq * eq + ed * ed).sqrt()) * eq,
        None => 0.0,
    }
}

fn exciter_n_states(data: &ExciterData) -> usize {
    match *data {
        ExciterData::St1a {
            t_measure_s,
            t_lag_s,
            t_amplifier_s,
            ..
        } => {
            usize::from(t_measure_s > 0.0)
                + usize::from(t_lag_s > 0.0)
                + usize::from(t_amplifier_s > 0.0)
        }
        ExciterData::FirstOrder { t_measure_s, .. } => 1 + usize::from(t_measure_s > 0.0),
    }
}

/// The non-windup limits of the exciter's last state, if it has one that is limited.
fn state_limits(data: &ExciterData) -> Option<(f64, f64)> {
    match *data {
        ExciterData::St1a {
            t_amplifier_s,
            amplifier_max_pu,
            amplifier_min_pu,
            ..
        } => (t_amplifier_s > 0.0).then_some((amplifier_min_pu, amplifier_max_pu)),
        ExciterData::FirstOrder {
            field_max_pu,
            field_min_pu,
            ..
        } => Some((field_min_pu, field_max_pu)),
    }
}

/// The windup limits of the exciter's output at terminal voltage `vt`.
fn output_limits(data: &ExciterData, vt: f64) -> (f64, f64) {
    match *data {
        // The bus-fed ceiling and floor scale with the terminal voltage (IEEE 421.5 ST1A); an
        // algebraic amplifier's own range clips its output as well.
        ExciterData::St1a {
            t_amplifier_s,
            amplifier_max_pu,
            amplifier_min_pu,
            field_max_pu,
            field_min_pu,
            ..
        } => {
            let (lo, hi) = (vt * field_min_pu, vt * field_max_pu);
            if t_amplifier_s > 0.0 {
                (lo, hi)
            } else {
                let hi = hi.min(amplifier_max_pu);
                (lo.max(amplifier_min_pu).min(hi), hi)
            }
        }
        ExciterData::FirstOrder { .. } => (f64::NEG_INFINITY, f64::INFINITY),
    }
}

/// Initial exciter states (appended to `x`) for field voltage `efd0`; returns the reference.
fn init_exciter(data: &ExciterData, vt: f64, efd0: f64, x: &mut Vec<f64>) -> Result<f64, String> {
    let (out_lo, out_hi) = output_limits(data, vt);
    let (lo, hi) = match state_limits(data) {
        Some((s_lo, s_hi)) => (out_lo.max(s_lo), out_hi.min(s_hi)),
        None => (out_lo, out_hi),
    };
    if efd0 > hi + 1e-9 || efd0 < lo - 1e-9 {
        return Err(format!(
            "its initial field voltage {efd0:.4} pu lies outside the exciter's limits \
             [{lo:.4}, {hi:.4}] at terminal voltage {vt:.4} pu"
        ));
    }
    match *data {
        ExciterData::St1a {
            t_measure_s,
            t_lag_s,
            gain,
            t_amplifier_s,
            ..
        } => {
            if t_measure_s > 0.0 {
                x.push(vt);
            }
            let y0 = efd0 / gain;
            if t_lag_s > 0.0 {
                x.push(y0);
            }
            if t_amplifier_s > 0.0 {
                x.push(efd0);
            }
            Ok(vt + y0)
        }
        ExciterData::FirstOrder {
            t_measure_s, gain, ..
        } => {
            if t_measure_s > 0.0 {
                x.push(vt);
            }
            x.push(efd0);
            Ok(vt + efd0 / gain)
        }
    }
}

/// A first-order measurement `T dm/dt = input - m` at state `x[*k]` (advancing `k`), or the
/// input itself when `t_s` is 0.
fn lag(x: &[f64], dx: &mut [f64], k: &mut usize, input: f64, t_s: f64) -> f64 {
    if t_s > 0.0 {
        let m = x[*k];
        dx[*k] = (input - m) / t_s;
        *k += 1;
        m
    } else {
        input
    }
}

/// A lead-lag `(1 + s t_lead) / (1 + s t_lag)` with its state at `x[*k]` (advancing `k`), or
/// the input itself when `t_lag_s` is 0.
fn lead_lag(
    x: &[f64],
    dx: &mut [f64],
    k: &mut usize,
    input: f64,
    t_lead_s: f64,
    t_lag_s: f64,
) -> f64 {
    if t_lag_s > 0.0 {
        let state = x[*k];
        dx[*k] = (input - state) / t_lag_s;
        *k += 1;
        let r = t_lead_s / t_lag_s;
        r * input + (1.0 - r) * state
    } else {
        input
    }
}

/// What the exciter computes at one point.
struct ExciterOutput {
    /// Field voltage applied to the machine, pu.
    efd: f64,
    /// The amplifier's drive: gain times its input, the value its output moves towards.
    drive: f64,
    /// The amplifier's output before the output clamp.
    amplified: f64,
}

/// Exciter derivatives into `dx`, with stabiliser signal `vs` added to its input.
fn exciter_evaluate(e: &Exciter, x: &[f64], vt: f64, vs: f64, dx: &mut [f64]) -> ExciterOutput {
    let mut k = e.offset;
    match e.data {
        ExciterData::St1a {
            t_measure_s,
            t_lead_s,
            t_lag_s,
            gain,
            t_amplifier_s,
            amplifier_max_pu,
            amplifier_min_pu,
            ..
        } => {
            let u = e.v_ref - lag(x, dx, &mut k, vt, t_measure_s) + vs;
            let drive = gain * lead_lag(x, dx, &mut k, u, t_lead_s, t_lag_s);
            let amplified = if t_amplifier_s > 0.0 {
                let (d, out) = e.state_limit.apply(
                    x[k],
                    (drive - x[k]) / t_amplifier_s,
                    amplifier_min_pu,
                    amplifier_max_pu,
                );
                dx[k] = d;
                out
            } else {
                drive
            };
            let (lo, hi) = output_limits(&e.data, vt);
            ExciterOutput {
                efd: e.output_clamp.apply(amplified, lo, hi),
                drive,
                amplified,
            }
        }
        ExciterData::FirstOrder {
            t_measure_s,
            gain,
            t_s,
            field_max_pu,
            field_min_pu,
        } => {
            let u = e.v_ref - lag(x, dx, &mut k, vt, t_measure_s) + vs;
            let drive = gain * u;
            let (d, efd) =
                e.state_limit
                    .apply(x[k], (drive - x[k]) / t_s, field_min_pu, field_max_pu);
            dx[k] = d;
            ExciterOutput {
                efd,
                drive,
                amplified: efd,
            }
        }
    }
}

fn stabiliser_n_states(d: &StabiliserData) -> usize {
    usize::from(d.t_transducer_s > 0.0)
        + 1
        + usize::from(d.t_lag_1_s > 0.0)
        + usize::from(d.t_lag_2_s > 0.0)
}

/// Stabiliser derivatives into `dx` at rotor speed `w` (pu); returns its output (clamped as
/// held for the step) and the output before the clamp.
fn stabiliser_evaluate(p: &Stabiliser, x: &[f64], w: f64, dx: &mut [f64]) -> (f64, f64) {
    let d = &p.data;
    let mut k = p.offset;
    let measured = lag(x, dx, &mut k, w - 1.0, d.t_transducer_s);
    // Gain and washout: K s Tw / (1 + s Tw) = K u - (a lag of K u).
    let scaled = d.gain * measured;
    let washed = scaled - x[k];
    dx[k] = washed / d.t_washout_s;
    k += 1;
    let stage_1 = lead_lag(x, dx, &mut k, washed, d.t_lead_1_s, d.t_lag_1_s);
    let stage_2 = lead_lag(x, dx, &mut k, stage_1, d.t_lead_2_s, d.t_lag_2_s);
    (
        p.output_clamp
            .apply(stage_2, d.output_min_pu, d.output_max_pu),
        stage_2,
    )
}

/// Governor derivatives into `dx`; returns the mechanical power (system pu) and the valve's
/// target position.
fn governor_evaluate(g: &Governor, x: &[f64], w: f64, dx: &mut [f64]) -> (f64, f64) {
    let d = &g.data;
    let k = g.offset;
    let target = g.p_ref - (w - 1.0) / d.droop_pu;
    let (dv, valve) = g.limit.apply(
        x[k],
        (target - x[k]) / d.t_valve_s,
        d.valve_min_pu,
        d.valve_max_pu,
    );
    dx[k] = dv;
    let pm = if d.t_reheat_s > 0.0 {
        let reheat = x[k + 1];
        dx[k + 1] = (valve - reheat) / d.t_reheat_s;
        d.hp_fraction * valve + (1.0 - d.hp_fraction) * reheat
    } else {
        valve
    };
    (pm * g.scale, target)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dq_rotation_puts_a_phasor_at_the_rotor_angle_on_the_q_axis() {
        // Sauer-Pai convention (DOMAIN.md 2.3): a phasor at angle delta is pure q.
        let delta = 0.7;
        let (d, q) = to_dq(Complex::from_polar(1.3, delta), delta);
        assert!(d.abs() < 1e-12 && (q - 1.3).abs() < 1e-12);
    }

    /// An exciter at field voltage `efd0` and terminal voltage 1.0, integrated alone (forward
    /// Euler, 0.1-ms steps, limits updated after every step as the engine does) while the
    /// terminal voltage dips to 0.5 pu for 0.5 s and comes back; returns the field voltage at
    /// `times`.
    fn field_voltage_through_a_dip(data: ExciterData, efd0: f64, times: &[f64]) -> Vec<f64> {
        let mut x = Vec::new();
        let v_ref = init_exciter(&data, 1.0, efd0, &mut x).unwrap();
        let mut e = Exciter {
            data,
            v_ref,
            offset: 0,
            state_limit: HeldLimit::Free,
            output_clamp: HeldClamp::Free,
        };
        let vt = |t: f64| if t < 0.5 { 0.5 } else { 1.0 };
        let (dt, mut t) = (1e-4, 0.0);
        let mut dx = vec![0.0; x.len()];
        e.after_step(&mut x, vt(0.0), 0.0, &mut dx);
        let mut out = Vec::new();
        for &at in times {
            while t < at - 1e-9 {
                exciter_evaluate(&e, &x, vt(t), 0.0, &mut dx);
                for (s, d) in x.iter_mut().zip(&dx) {
                    *s += dt * d;
                }
                t += dt;
                e.after_step(&mut x, vt(t), 0.0, &mut dx);
            }
            out.push(exciter_evaluate(&e, &x, vt(t), 0.0, &mut dx).efd);
        }
        out
    }

    fn st1a(t_amplifier_s: f64, amplifier: (f64, f64)) -> ExciterData {
        ExciterData::St1a {
            t_measure_s: 0.0,
            t_lead_s: 0.0,
            t_lag_s: 0.0,
            gain: 50.0,
            t_amplifier_s,
            amplifier_min_pu: amplifier.0,
            amplifier_max_pu: amplifier.1,
            field_max_pu: 5.0,
            field_min_pu: -2.0,
        }
    }

    #[test]
    fn non_windup_and_windup_limits_release_as_ieee_421_5_defines_them() {
        // IEEE Std 421.5 Annex E (from memory): a non-windup limit stops the lag's state, which
        // leaves the limit as soon as its input turns back; a windup limit clips the output
        // while the state runs on, so the output stays at the limit until the state has come
        // back. Closed forms for a lag T dx/dt = K u - x with K = 50, T = 0.2 s, from
        // x = 2 at 1.0 pu (reference 1.04): during the dip to 0.5 pu the drive is 27; after it,
        // 2.0 again.
        let at = [0.3, 0.6, 0.8, 1.0];
        let nonwindup = 2.0 + 3.0 * (-0.5_f64).exp(); // 0.1 s after leaving the limit at 5
        // First-order exciter: its state limits are non-windup.
        let first_order = ExciterData::FirstOrder {
            t_measure_s: 0.0,
            gain: 50.0,
            t_s: 0.2,
            field_max_pu: 5.0,
            field_min_pu: -2.0,
        };
        let f = field_voltage_through_a_dip(first_order, 2.0, &at);
        assert!((f[0] - 5.0).abs() < 1e-9, "{f:?}");
        assert!((f[1] - nonwindup).abs() < 5e-3, "{f:?} vs {nonwindup}");
        // ST1A, amplifier range [-2, 5] (non-windup): the same release; during the dip the
        // bridge ceiling 0.5 * 5 = 2.5 (windup, at the output) is what the machine gets.
        let f = field_voltage_through_a_dip(st1a(0.2, (-2.0, 5.0)), 2.0, &at);
        assert!((f[0] - 2.5).abs() < 1e-9, "{f:?}");
        assert!((f[1] - nonwindup).abs() < 5e-3, "{f:?} vs {nonwindup}");
        // ST1A, amplifier range wide: the amplifier winds up behind the clipped output, to
        // a(0.5) = 27 - 25 e^-2.5, and the output stays at the 5-pu ceiling until
        // a = 2 + (a(0.5) - 2) e^-((t - 0.5)/0.2) falls to 5: t = 0.5 + 0.2 ln((a(0.5) - 2)/3).
        let wound = 27.0 - 25.0 * (-2.5_f64).exp();
        let release = 0.5 + 0.2 * ((wound - 2.0) / 3.0).ln();
        assert!((release - 0.9069).abs() < 1e-3, "{release}");
        let f = field_voltage_through_a_dip(st1a(0.2, (-100.0, 100.0)), 2.0, &at);
        assert!((f[0] - 2.5).abs() < 1e-9, "{f:?}");
        assert!(
            (f[1] - 5.0).abs() < 1e-9 && (f[2] - 5.0).abs() < 1e-9,
            "{f:?}"
        );
        let expected = 2.0 + (wound - 2.0) * (-2.5_f64).exp();
        assert!((f[3] - expected).abs() < 5e-3, "{f:?} vs {expected}");
        // ST1A with no amplifier lag: algebraic, clipped at once by the smaller of its range
        // and the bridge ceiling, back to the drive as soon as it returns.
        let f = field_voltage_through_a_dip(st1a(0.0, (-2.0, 5.0)), 2.0, &at);
        assert!(
            (f[0] - 2.5).abs() < 1e-9 && (f[1] - 2.0).abs() < 1e-9,
            "{f:?}"
        );
    }

    #[test]
    fn held_limit_engages_past_the_limit_and_releases_when_the_drive_returns() {
        // Non-windup behaviour (IEEE Std 421.5 Annex E): the state stops at the limit and
        // leaves it as soon as its input points back inside.
        let mut l = HeldLimit::Free;
        let mut x = 1.2;
        assert!(l.update(&mut x, 3.0, 0.0, 1.0));
        assert_eq!((l, x), (HeldLimit::AtUpper, 1.0));
        assert_eq!(l.apply(x, 5.0, 0.0, 1.0), (0.0, 1.0));
        assert!(
            !l.update(&mut x, 2.0, 0.0, 1.0),
            "still driven upwards: held"
        );
        assert!(l.update(&mut x, 0.5, 0.0, 1.0));
        assert_eq!(l, HeldLimit::Free);
    }
}
