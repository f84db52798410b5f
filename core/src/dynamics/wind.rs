//! A full-converter wind plant as a controlled current source (DOMAIN.md 5.2, our own generic
//! formulation): measured voltage, active and reactive current lags, a current limit with
//! reactive priority during voltage dips, reactive current injection in proportion to the dip,
//! a ramp limit on active-current recovery, and low- and high-voltage ride-through monitors that
//! trip the plant. No inertia; the phase-locked loop is ideal (the current follows the terminal
//! voltage angle), so weak-grid converter instability is out of reach of this model.

use crate::Complex;
use crate::dynamics::verdict::TripCause;
use crate::model::{RideThroughPoint, WindDynamics};

/// Voltage measurement time constant, s (common practice, DOMAIN.md 5.2).
const T_MEASURE_S: f64 = 0.02;
/// Around and below this terminal voltage the current's magnitude is scaled down with the
/// voltage (smoothly), so the injection stays continuous and differentiable through a bolted
/// fault.
const V_ANGLE_FLOOR_PU: f64 = 0.05;
/// Smallest measured voltage used to turn power orders into current orders, pu.
const V_ORDER_FLOOR_PU: f64 = 0.01;

/// Terminal voltages between which the active current is scaled back, pu: none below the
/// first, all of it above the second (the low-voltage active-current management of generic
/// converter models; values of common practice, DOMAIN.md 5.2).
const ACTIVE_CURRENT_ZERO_BELOW_PU: f64 = 0.4;
const ACTIVE_CURRENT_FULL_ABOVE_PU: f64 = 0.8;

/// Share of the active current a converter delivers at terminal voltage `v`: 0 below 0.4 pu, 1
/// above 0.8 pu, a smooth step between (continuously differentiable, for Newton). Without it
/// an ideal current source would push active current into a short circuit, a state the
/// phasor equations have no solution for.
fn low_voltage_active_share(v: f64) -> f64 {
    let x = ((v - ACTIVE_CURRENT_ZERO_BELOW_PU)
        / (ACTIVE_CURRENT_FULL_ABOVE_PU - ACTIVE_CURRENT_ZERO_BELOW_PU))
        .clamp(0.0, 1.0);
    x * x * (3.0 - 2.0 * x)
}

/// A wind plant device, currents in pu of the plant's rating.
#[derive(Clone, Debug)]
pub(crate) struct WindDevice {
    data: WindDynamics,
    /// Plant rating, system pu (converts plant-pu currents to system pu).
    rating: f64,
    p_ref: f64,
    q_ref: f64,
    iq0: f64,
    /// Control branches, chosen at each step boundary and held through the step so that the
    /// Newton iteration sees smooth equations (a limit engages at the next boundary):
    /// fault mode (measured voltage below the dip threshold), which current limit binds, and
    /// whether the active-current ramp limit binds.
    fault_mode: bool,
    ip_capped: bool,
    iq_capped: bool,
    ramp_limited: bool,
    /// Why the plant tripped, once it has.
    pub(crate) trip_cause: Option<TripCause>,
    /// Time each low-voltage ride-through level was first undershot in the current excursion
    /// (NaN: above).
    below_since_s: Vec<f64>,
    /// Time each high-voltage level was first exceeded in the current excursion (NaN: below).
    above_since_s: Vec<f64>,
}

impl WindDevice {
    /// Builds the device at output `s` (system pu) and terminal voltage `v`; returns its
    /// states `[v_measured, i_active, i_reactive]`.
    pub(crate) fn new(
        data: &WindDynamics,
        rating: f64,
        v: Complex,
        s: Complex,
    ) -> (WindDevice, Vec<f64>) {
        let v0 = v.norm();
        let (p, q) = (s.re / rating, s.im / rating);
        let dev = WindDevice {
            data: data.clone(),
            rating,
            p_ref: p,
            q_ref: q,
            iq0: q / v0.max(V_ORDER_FLOOR_PU),
            fault_mode: false,
            ip_capped: false,
            iq_capped: false,
            ramp_limited: false,
            trip_cause: None,
            below_since_s: vec![f64::NAN; data.ride_through.len()],
            above_since_s: vec![f64::NAN; data.high_voltage_ride_through.len()],
        };
        let x = vec![
            v0,
            p / v0.max(V_ORDER_FLOOR_PU),
            q / v0.max(V_ORDER_FLOOR_PU),
        ];
        (dev, x)
    }

    /// Current orders `(ip, iq)` at measured voltage `vm`, with the limits chosen at the last
    /// step boundary.
    fn orders(&self, vm: f64) -> (f64, f64) {
        let d = &self.data;
        let vm = vm.max(V_ORDER_FLOOR_PU);
        let i_max = d.i_max_pu;
        if self.fault_mode {
            // Reactive priority: reactive current in proportion to the dip.
            let raw = self.iq0 + d.k_reactive_current * (d.v_dip_pu - vm);
            let iq = if self.iq_capped {
                i_max.copysign(raw)
            } else {
                raw
            };
            let room = (i_max * i_max - iq * iq).max(0.0).sqrt();
            (
                if self.ip_capped {
                    room
                } else {
                    self.p_ref / vm
                },
                iq,
            )
        } else {
            let ip = if self.ip_capped {
                i_max
            } else {
                self.p_ref / vm
            };
            let room = (i_max * i_max - ip * ip).max(0.0).sqrt();
            let raw = self.q_ref / vm;
            (
                ip,
                if self.iq_capped {
                    room.copysign(raw)
                } else {
                    raw
                },
            )
        }
    }

    /// Chooses the control branches for the next step from the state at a step boundary.
    fn choose_branches(&mut self, x: &[f64]) {
        let d = &self.data;
        let vm = x[0].max(V_ORDER_FLOOR_PU);
        let i_max = d.i_max_pu;
        self.fault_mode = x[0] < d.v_dip_pu;
        if self.fault_mode {
            let raw = self.iq0 + d.k_reactive_current * (d.v_dip_pu - vm);
            self.iq_capped = raw.abs() > i_max;
            let iq = raw.clamp(-i_max, i_max);
            self.ip_capped = self.p_ref / vm > (i_max * i_max - iq * iq).max(0.0).sqrt();
        } else {
            self.ip_capped = self.p_ref / vm > i_max;
            let ip = (self.p_ref / vm).min(i_max);
            self.iq_capped = (self.q_ref / vm).abs() > (i_max * i_max - ip * ip).max(0.0).sqrt();
        }
        let (ip_cmd, _) = self.orders(x[0]);
        self.ramp_limited = (ip_cmd - x[1]) / d.t_current_s > d.p_recovery_pu_per_s;
    }

    /// Derivatives into `dx`; returns the injected current, system pu.
    pub(crate) fn evaluate(&self, x: &[f64], v: Complex, dx: &mut [f64]) -> Complex {
        if self.trip_cause.is_some() {
            dx[..3].fill(0.0);
            return Complex::new(0.0, 0.0);
        }
        let vmag = v.norm_sqr().sqrt();
        let (vm, ip, iq) = (x[0], x[1], x[2]);
        dx[0] = (vmag - vm) / T_MEASURE_S;
        let (ip_cmd, iq_cmd) = self.orders(vm);
        let t = self.data.t_current_s;
        dx[1] = if self.ramp_limited {
            self.data.p_recovery_pu_per_s
        } else {
            (ip_cmd - ip) / t
        };
        dx[2] = (iq_cmd - iq) / t;
        // The current follows the voltage's angle, v / |v|; below the floor a, v (2a - |v|) / a^2,
        // which meets it with the same value and slope at a, so the injection is continuously
        // differentiable through a close fault (a kink there made Newton cycle).
        let a = V_ANGLE_FLOOR_PU;
        let unit = if vmag >= a {
            v / vmag
        } else {
            v * ((2.0 * a - vmag) / (a * a))
        };
        Complex::new(ip * low_voltage_active_share(vmag), -iq) * unit * self.rating
    }

    /// After an accepted step at time `t_s`: updates the control mode and the ride-through
    /// monitors. Returns true if the equations changed (mode switch or trip).
    pub(crate) fn after_step(&mut self, x: &[f64], t_s: f64) -> bool {
        if self.trip_cause.is_some() {
            return false;
        }
        let vm = x[0];
        let before = (
            self.fault_mode,
            self.ip_capped,
            self.iq_capped,
            self.ramp_limited,
        );
        self.choose_branches(x);
        let changed = before
            != (
                self.fault_mode,
                self.ip_capped,
                self.iq_capped,
                self.ramp_limited,
            );
        let low = outside_too_long(&self.data.ride_through, &mut self.below_since_s, t_s, |v| {
            vm < v
        });
        let high = outside_too_long(
            &self.data.high_voltage_ride_through,
            &mut self.above_since_s,
            t_s,
            |v| vm > v,
        );
        if low || high {
            self.trip_cause = Some(if low {
                TripCause::LowVoltage
            } else {
                TripCause::HighVoltage
            });
            return true;
        }
        changed
    }
}

/// Ride-through monitor: for each point of `curve`, starts a timer in `since_s` when
/// `beyond(v_pu)` holds and clears it when not; true once a timer has run longer than its point
/// allows.
fn outside_too_long(
    curve: &[RideThroughPoint],
    since_s: &mut [f64],
    t_s: f64,
    beyond: impl Fn(f64) -> bool,
) -> bool {
    let mut trip = false;
    for (p, since) in curve.iter().zip(since_s.iter_mut()) {
        if beyond(p.v_pu) {
            if since.is_nan() {
                *since = t_s;
            }
            trip |= t_s - *since > p.t_s + 1e-9;
        } else {
            *since = f64::NAN;
        }
    }
    trip
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ride_through_timers_trip_beyond_the_envelope_only() {
        // NERC PRC-024-2 Attachment 2 high-voltage envelope (DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH,
        // from memory): 1.16 pu may last 0.5 s; 1.21 pu trips at once.
        let curve = crate::model::DEFAULT_HIGH_VOLTAGE_RIDE_THROUGH;
        let run = |v: f64, lasting_s: f64| {
            let mut since = [f64::NAN; 4];
            let mut t = 0.0;
            let mut tripped_at = None;
            while t <= lasting_s + 1e-9 && tripped_at.is_none() {
                if outside_too_long(&curve, &mut since, t, |level| v > level) {
                    tripped_at = Some(t);
                }
                t += 0.01;
            }
            tripped_at
        };
        assert_eq!(run(1.16, 0.45), None);
        let t = run(1.16, 2.0).unwrap();
        assert!((t - 0.51).abs() < 1e-9, "{t}");
        assert!(run(1.21, 1.0).unwrap() < 0.015);
        assert_eq!(run(1.09, 10.0), None);
    }

    #[test]
    fn active_current_share_is_a_smooth_step() {
        assert_eq!(low_voltage_active_share(0.3), 0.0);
        assert_eq!(low_voltage_active_share(0.9), 1.0);
        assert!((low_voltage_active_share(0.6) - 0.5).abs() < 1e-12);
        // Zero slope at both ends (continuously differentiable).
        let slope =
            |v: f64| (low_voltage_active_share(v + 1e-7) - low_voltage_active_share(v)) / 1e-7;
        assert!(slope(0.4).abs() < 1e-5 && slope(0.8 - 1e-7).abs() < 1e-5);
    }
}
