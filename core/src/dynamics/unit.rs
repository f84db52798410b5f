//! A synchronous generating unit: the machine (classical, two-axis or sub-transient), with an
//! optional exciter and turbine-governor, as one device at one bus.
//!
//! Machine equations follow DOMAIN.md 2.2-2.4 (Sauer and Pai's form, q axis at the rotor angle,
//! generator convention); torque is taken equal to power (`T = P`, the usual choice for angle
//! studies, and the one the swing-equation checks assume). Everything here is per unit on the
//! system base: reactances, inertia and damping are converted from the machine's rating once.

use crate::Complex;
use crate::model::{ExciterData, GovernorData, Grid};

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

#[derive(Clone, Debug)]
struct Exciter {
    data: ExciterData,
    v_ref: f64,
    offset: usize,
    limit: HeldLimit,
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
    e_classical: f64,
    pm0: f64,
    efd0: f64,
    w_s: f64,
    exciter: Option<Exciter>,
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
        let efd0 = e1q + (xd - xd1) * id;
        let e2q = e1q - (xd1 - xd2) * id;
        let e2d = e1d + (xq1 - xq2) * iq;
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
                    limit: HeldLimit::Free,
                })
            }
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
            e_classical: e_angle.norm(),
            pm0,
            efd0,
            w_s,
            exciter,
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
        let efd = match &self.exciter {
            Some(e) => exciter_evaluate(e, x, vt, dx).0,
            None => self.efd0,
        };
        let pm = match &self.governor {
            Some(g) => governor_evaluate(g, x, w, dx).0,
            None => self.pm0,
        };
        dx[0] = self.w_s * (w - 1.0);
        dx[1] = (pm - pe - self.damping * (w - 1.0)) / (2.0 * self.h_s);
        if self.model != MachineModel::Classical {
            dx[2] = (-x[2] - (self.xd - self.xd1) * id + efd) / self.td0_1;
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

    /// At a step boundary: engages or releases the exciter's and governor's limits for the
    /// next step. True if a state or a limit changed.
    pub(crate) fn after_step(&mut self, x: &mut [f64], v: Complex) -> bool {
        let mut scratch = [0.0; MAX_UNIT_STATES];
        let dx = &mut scratch[..x.len().min(MAX_UNIT_STATES)];
        let mut changed = false;
        let vt = v.norm();
        if let Some(e) = &mut self.exciter {
            let (_, drive) = exciter_evaluate(e, x, vt, dx);
            let (lo, hi) = exciter_limits(&e.data, vt);
            let k = e.offset + exciter_n_states(&e.data) - 1;
            changed |= e.limit.update(&mut x[k], drive, lo, hi);
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

/// Most states a unit can have: six machine states, three exciter states, two governor states.
const MAX_UNIT_STATES: usize = 11;

/// Rotates a phasor of the network frame into the machine's d-q frame (q axis at `delta`).
fn to_dq(p: Complex, delta: f64) -> (f64, f64) {
    let (sin, cos) = delta.sin_cos();
    (p.re * sin - p.im * cos, p.re * cos + p.im * sin)
}

fn exciter_n_states(data: &ExciterData) -> usize {
    match *data {
        ExciterData::St1a {
            t_measure_s,
            t_lag_s,
            ..
        } => 1 + usize::from(t_measure_s > 0.0) + usize::from(t_lag_s > 0.0),
        ExciterData::FirstOrder { t_measure_s, .. } => 1 + usize::from(t_measure_s > 0.0),
    }
}

fn exciter_limits(data: &ExciterData, vt: f64) -> (f64, f64) {
    match *data {
        // The bus-fed ceiling scales with the terminal voltage (IEEE 421.5 ST1A).
        ExciterData::St1a {
            field_max_pu,
            field_min_pu,
            ..
        } => (vt * field_min_pu, vt * field_max_pu),
        ExciterData::FirstOrder {
            field_max_pu,
            field_min_pu,
            ..
        } => (field_min_pu, field_max_pu),
    }
}

/// Initial exciter states (appended to `x`) for field voltage `efd0`; returns the reference.
fn init_exciter(data: &ExciterData, vt: f64, efd0: f64, x: &mut Vec<f64>) -> Result<f64, String> {
    let (lo, hi) = exciter_limits(data, vt);
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
            ..
        } => {
            if t_measure_s > 0.0 {
                x.push(vt);
            }
            let y0 = efd0 / gain;
            if t_lag_s > 0.0 {
                x.push(y0);
            }
            x.push(efd0);
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

/// Exciter derivatives into `dx`; returns the field voltage applied to the machine and the
/// amplifier's drive (the value its output lags towards).
fn exciter_evaluate(e: &Exciter, x: &[f64], vt: f64, dx: &mut [f64]) -> (f64, f64) {
    let mut k = e.offset;
    let measured = |t: f64, dx: &mut [f64], k: &mut usize| {
        if t > 0.0 {
            let vm = x[*k];
            dx[*k] = (vt - vm) / t;
            *k += 1;
            vm
        } else {
            vt
        }
    };
    let (lo, hi) = exciter_limits(&e.data, vt);
    let (drive, t_out) = match e.data {
        ExciterData::St1a {
            t_measure_s,
            t_lead_s,
            t_lag_s,
            gain,
            t_amplifier_s,
            ..
        } => {
            let u = e.v_ref - measured(t_measure_s, dx, &mut k);
            let y = if t_lag_s > 0.0 {
                let xl = x[k];
                dx[k] = (u - xl) / t_lag_s;
                k += 1;
                let r = t_lead_s / t_lag_s;
                r * u + (1.0 - r) * xl
            } else {
                u
            };
            (gain * y, t_amplifier_s)
        }
        ExciterData::FirstOrder {
            t_measure_s,
            gain,
            t_s,
            ..
        } => {
            let u = e.v_ref - measured(t_measure_s, dx, &mut k);
            (gain * u, t_s)
        }
    };
    let (d, efd) = e.limit.apply(x[k], (drive - x[k]) / t_out, lo, hi);
    dx[k] = d;
    (efd, drive)
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
