//! A load as a dynamic device: a static voltage- and frequency-dependent part, an optional
//! induction-motor share (first-order slip model with stalling and an under-voltage trip) and
//! the shunt that reconciles the motor's reactive draw with the power-flow value.

use crate::Complex;
use crate::model::{Load, MotorData, VoltageDependence};

/// Below this share of its initial voltage a load's frequency measurement is frozen: the
/// angle of a collapsed voltage carries no frequency information (common practice for
/// measurement loops, no single source).
const FREQUENCY_BLIND_BELOW: f64 = 0.1;

#[derive(Clone, Debug)]
struct Motor {
    data: MotorData,
    /// Motor rating, system pu.
    rating: f64,
    /// Load-torque coefficient `T0` of `T0 (1 - s)^m`, motor pu.
    t0: f64,
    offset: usize,
    tripped: bool,
    below_since_s: f64,
}

/// A load device at one bus, system pu.
#[derive(Clone, Debug)]
pub(crate) struct LoadDevice {
    /// Static active power at the initial voltage, pu.
    p0: f64,
    /// Static reactive power at the initial voltage, pu.
    q0: f64,
    /// Initial voltage magnitude, pu.
    v0: f64,
    zip: VoltageDependence,
    k_pf: f64,
    k_qf: f64,
    /// Share of `v0` below which constant-current and constant-power parts become constant
    /// impedance.
    v_threshold: f64,
    /// Frequency-measurement filter, s (its state is the filtered angle), if the load depends
    /// on frequency.
    t_filter_s: Option<f64>,
    w_s: f64,
    motor: Option<Motor>,
    /// Reconciling shunt susceptance, pu at 1 pu voltage (capacitive if positive).
    b_comp: f64,
    /// Share of the load still connected (1 until shed or stepped).
    pub(crate) scale: f64,
}

/// Settings the loads take from the simulation options.
#[derive(Clone, Copy, Debug)]
pub(crate) struct LoadSettings {
    pub(crate) v_threshold: f64,
    pub(crate) t_filter_s: f64,
    pub(crate) w_s: f64,
}

impl LoadDevice {
    /// Builds the device for `load` at initial voltage `v` (system pu) and returns its states.
    pub(crate) fn new(
        load: &Load,
        v: Complex,
        settings: LoadSettings,
    ) -> Result<(LoadDevice, Vec<f64>), String> {
        let v0 = v.norm();
        let mut x = Vec::new();
        let fd = load.frequency_dependence;
        let t_filter_s = (fd.p_pu_per_pu != 0.0 || fd.q_pu_per_pu != 0.0).then(|| {
            x.push(v.arg());
            settings.t_filter_s
        });
        let share = if load.p_pu > 0.0 {
            load.motor_share
        } else {
            0.0
        };
        let (mut motor, mut b_comp) = (None, 0.0);
        if share > 0.0 {
            let data = load.motor;
            let p_motor = share * load.p_pu;
            let rating = p_motor / data.loading_factor;
            let slip = initial_slip(&data, v0).ok_or_else(|| {
                format!(
                    "load \"{}\": its motor cannot carry {:.0} % of its rating at {v0:.3} pu \
                     (past the breakdown torque)",
                    load.id,
                    100.0 * data.loading_factor
                )
            })?;
            let (te, _) = air_gap(&data, slip, Complex::new(v0, 0.0));
            let z = impedance(&data, slip);
            let q_motor = (Complex::new(v0 * v0, 0.0) / z.conj()).im * rating;
            b_comp = (q_motor - share * load.q_pu) / (v0 * v0);
            motor = Some(Motor {
                data,
                rating,
                t0: te / (1.0 - slip).powf(data.torque_exponent),
                offset: x.len(),
                tripped: false,
                below_since_s: f64::NAN,
            });
            x.push(slip);
        }
        let dev = LoadDevice {
            p0: (1.0 - share) * load.p_pu,
            q0: (1.0 - share) * load.q_pu,
            v0,
            zip: load.voltage_dependence,
            k_pf: fd.p_pu_per_pu,
            k_qf: fd.q_pu_per_pu,
            v_threshold: settings.v_threshold,
            t_filter_s,
            w_s: settings.w_s,
            motor,
            b_comp,
            scale: 1.0,
        };
        Ok((dev, x))
    }

    /// Active power drawn at the initial voltage and frequency, scale included, pu.
    pub(crate) fn nominal_p(&self) -> f64 {
        let motor = self
            .motor
            .as_ref()
            .filter(|m| !m.tripped)
            .map_or(0.0, |m| m.rating * m.data.loading_factor);
        self.scale * (self.p0 + motor)
    }

    /// Derivatives into `dx`; returns the current injected into the bus (negative of the load
    /// current), system pu.
    pub(crate) fn evaluate(&self, x: &[f64], v: Complex, dx: &mut [f64]) -> Complex {
        let ratio = v.norm_sqr().sqrt() / self.v0;
        let df = match self.t_filter_s {
            Some(t) => {
                if ratio > FREQUENCY_BLIND_BELOW {
                    let err = wrap_angle(v.arg() - x[0]);
                    dx[0] = err / t;
                    err / (self.w_s * t)
                } else {
                    dx[0] = 0.0;
                    0.0
                }
            }
            None => 0.0,
        };
        // Static part as an admittance: P / |V|^2 and Q / |V|^2, which stay finite as the
        // voltage collapses because every part is constant impedance below the threshold.
        let vt = self.v_threshold;
        let z = &self.zip;
        let (gp, gq) = if ratio >= vt {
            let r2 = ratio * ratio;
            (
                (z.p_z * r2 + z.p_i * ratio + z.p_p) / r2,
                (z.q_z * r2 + z.q_i * ratio + z.q_p) / r2,
            )
        } else {
            (
                z.p_z + z.p_i / vt + z.p_p / (vt * vt),
                z.q_z + z.q_i / vt + z.q_p / (vt * vt),
            )
        };
        let v02 = self.v0 * self.v0;
        let g = self.p0 * gp * (1.0 + self.k_pf * df) / v02;
        let b = self.q0 * gq * (1.0 + self.k_qf * df) / v02;
        // The load draws (g - j b) V and the reconciling capacitor draws j b_comp V.
        let mut current = -Complex::new(g, self.b_comp - b) * v;
        if let Some(m) = &self.motor {
            let k = m.offset;
            if m.tripped {
                dx[k] = 0.0;
            } else {
                let slip = x[k];
                let (te, i_motor) = air_gap(&m.data, slip, v);
                let speed = (1.0 - slip).max(0.0);
                let e = m.data.torque_exponent;
                let tl = m.t0
                    * if e == 0.0 {
                        1.0
                    } else if e == 2.0 {
                        speed * speed
                    } else {
                        speed.powf(e)
                    };
                // A stalled motor stays at standstill: slip is held at 1.
                dx[k] = non_windup_upper(slip, (tl - te) / (2.0 * m.data.h_s), 1.0);
                current -= i_motor * m.rating;
            }
        }
        current * self.scale
    }

    /// Moves the frequency measurement's angle state by the phase jump of the bus voltage at
    /// a switching instant, so that the jump is not read as a frequency excursion: the
    /// measurement is taken to be immune to phase jumps, as frequency relays are designed to
    /// be (common practice, no single source). Without this, every fault and clearing would
    /// throw a spurious frequency spike into frequency-dependent loads.
    /// Returns the size of the jump followed, rad.
    pub(crate) fn follow_phase_jump(&self, x: &mut [f64], before: Complex, after: Complex) -> f64 {
        if self.t_filter_s.is_some() && before.norm() > 0.0 && after.norm() > 0.0 {
            let jump = wrap_angle(after.arg() - before.arg());
            x[0] += jump;
            jump.abs()
        } else {
            0.0
        }
    }

    /// After an accepted step of length `h_s`: clamps the slip and runs the motor's
    /// under-voltage relay. Returns true if the device's equations changed (a trip).
    pub(crate) fn after_step(&mut self, x: &mut [f64], v: Complex, t_s: f64) -> bool {
        let Some(m) = &mut self.motor else {
            return false;
        };
        if m.tripped {
            return false;
        }
        x[m.offset] = x[m.offset].min(1.0);
        let Some(trip) = m.data.under_voltage_trip else {
            return false;
        };
        if v.norm_sqr().sqrt() < trip.v_pu {
            if m.below_since_s.is_nan() {
                m.below_since_s = t_s;
            }
            if t_s - m.below_since_s >= trip.delay_s - 1e-9 {
                m.tripped = true;
                return true;
            }
        } else {
            m.below_since_s = f64::NAN;
        }
        false
    }
}

fn non_windup_upper(x: f64, dx: f64, hi: f64) -> f64 {
    if x >= hi && dx > 0.0 { 0.0 } else { dx }
}

/// Wraps an angle difference into `(-pi, pi]`.
pub(crate) fn wrap_angle(a: f64) -> f64 {
    use std::f64::consts::{PI, TAU};
    if (-PI..=PI).contains(&a) {
        // The usual case (a small measurement error): no division needed.
        return a;
    }
    let w = a.rem_euclid(TAU);
    if w > PI { w - TAU } else { w }
}

/// Input impedance of the motor's equivalent circuit at `slip`, motor pu. The rotor branch is
/// written as an admittance `s / (Rr + j s Xr)` so that zero slip is finite.
fn impedance(m: &MotorData, slip: f64) -> Complex {
    let y_rotor = Complex::new(slip, 0.0) / Complex::new(m.rr_pu, slip * m.xr_pu);
    let y_mag = Complex::new(0.0, -1.0 / m.xm_pu);
    Complex::new(m.rs_pu, m.xs_pu) + (y_mag + y_rotor).inv()
}

/// Electrical torque (air-gap power, motor pu) and the motor's current (motor pu, motor
/// convention) at `slip` and terminal voltage `v` (Kundur 7.2, steady-state circuit).
fn air_gap(m: &MotorData, slip: f64, v: Complex) -> (f64, Complex) {
    let i = v / impedance(m, slip);
    let e = v - Complex::new(m.rs_pu, m.xs_pu) * i;
    let te = e.norm_sqr() * slip * m.rr_pu / (m.rr_pu * m.rr_pu + slip * slip * m.xr_pu * m.xr_pu);
    (te, i)
}

/// The slip at which the motor draws `loading_factor` of its rating at voltage `v0`, on the
/// stable side of the breakdown point; `None` if the load is past breakdown.
fn initial_slip(m: &MotorData, v0: f64) -> Option<f64> {
    let target = m.loading_factor;
    let power = |s: f64| v0 * v0 * impedance(m, s).inv().re;
    // Scan up to the peak of the input power, then bisect the bracket.
    let (mut lo, mut hi) = (0.0, f64::NAN);
    let mut s = 0.0;
    let mut last = power(0.0);
    while s < 1.0 {
        let next = s + 1e-3;
        let p = power(next);
        if p >= target {
            hi = next;
            break;
        }
        if p < last {
            return None;
        }
        (lo, last, s) = (next, p, next);
    }
    if hi.is_nan() {
        return None;
    }
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if power(mid) < target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    Some(0.5 * (lo + hi))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn motor_at_its_initial_slip_draws_its_loading_and_balances_torque() {
        // Closed form: the steady-state equivalent circuit (Kundur 7.2) gives input power
        // |V|^2 Re(1/Z) and air-gap power |E|^2 s Rr / (Rr^2 + s^2 Xr^2); with zero stator
        // resistance the two are equal.
        let m = MotorData {
            rs_pu: 0.0,
            ..MotorData::TYPICAL
        };
        let s = initial_slip(&m, 1.0).unwrap();
        assert!(s > 0.001 && s < 0.1, "slip {s}");
        let p_in = impedance(&m, s).inv().re;
        assert!((p_in - 0.75).abs() < 1e-9);
        let (te, _) = air_gap(&m, s, Complex::new(1.0, 0.0));
        assert!((te - p_in).abs() < 1e-9, "te {te} p_in {p_in}");
    }

    #[test]
    fn composite_load_draws_its_power_flow_value_at_the_initial_voltage() {
        // Definition of the initialisation: static part, motor and reconciling shunt together
        // draw exactly P + jQ at the power-flow voltage, S = V conj(I_load).
        let load = Load {
            id: "L".into(),
            bus: crate::BusIdx(0),
            p_pu: 1.2,
            q_pu: 0.4,
            voltage_dependence: crate::VoltageDependence {
                p_z: 0.4,
                p_i: 0.3,
                p_p: 0.3,
                q_z: 0.6,
                q_i: 0.2,
                q_p: 0.2,
            },
            frequency_dependence: crate::FrequencyDependence {
                p_pu_per_pu: 1.5,
                q_pu_per_pu: -1.0,
            },
            motor_share: 0.4,
            motor: MotorData::TYPICAL,
            sheddable_fraction: 0.0,
            priority: 0,
            in_service: true,
        };
        let v = Complex::from_polar(0.97, 0.3);
        let settings = LoadSettings {
            v_threshold: 0.7,
            t_filter_s: 0.05,
            w_s: 377.0,
        };
        let (dev, x) = LoadDevice::new(&load, v, settings).unwrap();
        let mut dx = vec![0.0; x.len()];
        let drawn = v * (-dev.evaluate(&x, v, &mut dx)).conj();
        assert!((drawn - Complex::new(1.2, 0.4)).norm() < 1e-12, "{drawn}");
        assert!(dx.iter().all(|d| d.abs() < 1e-12), "{dx:?}");
    }

    #[test]
    fn overloaded_motor_has_no_initial_slip() {
        let m = MotorData {
            loading_factor: 1.0,
            ..MotorData::TYPICAL
        };
        assert!(initial_slip(&m, 0.3).is_none());
    }

    #[test]
    fn angle_wrap() {
        use std::f64::consts::PI;
        assert!((wrap_angle(3.0 * PI / 2.0) + PI / 2.0).abs() < 1e-12);
        assert!((wrap_angle(-0.1) + 0.1).abs() < 1e-12);
    }
}
