//! Stability criteria, the monitor that applies them while a run proceeds, and the verdict.
//!
//! A verdict is a policy decision, not physics (DOMAIN.md 7): every threshold is a field of
//! [`StabilityCriteria`], and the margins are kept so that a run can be judged again under
//! other thresholds without simulating it again.

use std::fmt;

/// Thresholds of the stability verdict. Voltages are shares of each bus's pre-contingency
/// voltage; frequencies are in Hz.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StabilityCriteria {
    /// Largest allowed angle between a machine's rotor and its island's centre of inertia,
    /// degrees. Default 180 (the usual screening rule; common practice, no single source).
    pub max_angle_deg: f64,
    /// Level every load bus must recover to after the last fault clears, share of its
    /// pre-contingency voltage. Default 0.80 (WECC TPL-001-WECC-CRT-3.2, from memory).
    pub recovery_level: f64,
    /// Time allowed below the recovery level, counted from the clearing, s. Default 2.0: the
    /// WECC criterion's limit on time below 80 % (from memory), applied from the clearing,
    /// which is stricter than its 20-s allowance for the first recovery and suits 10-s runs.
    pub recovery_time_s: f64,
    /// Floor a recovered load bus must not stay under, share of pre-contingency. Default 0.70
    /// (same WECC criterion).
    pub floor_level: f64,
    /// Longest time allowed under the floor after recovery, s. Default 0.5 (30 cycles at
    /// 60 Hz; same criterion).
    pub floor_time_s: f64,
    /// Lowest allowed centre-of-inertia frequency, Hz. Default: the first under-frequency
    /// load-shedding stage plus 0.1 Hz, so that the action pre-empts it: 59.2 Hz at 60 Hz
    /// (WECC first stage 59.1 Hz), 49.1 Hz at 50 Hz (Continental Europe 49.0 Hz).
    pub nadir_hz: f64,
    /// Highest allowed centre-of-inertia frequency, Hz. Default 61.7 Hz at 60 Hz (NERC PRC-024
    /// instantaneous trip), 51.5 Hz at 50 Hz (EU generator ride-through limit).
    pub zenith_hz: f64,
    /// Largest deviation from nominal allowed at the end of the run, Hz. Default 0.5 Hz at
    /// 60 Hz (common practice), 0.2 Hz at 50 Hz (EU SOGL steady-state limit, from memory).
    pub final_band_hz: f64,
}

impl StabilityCriteria {
    /// The defaults for a grid of nominal frequency `f0_hz` (values for 50 and 60 Hz as
    /// documented on each field; other frequencies scale the 60-Hz values).
    pub fn for_frequency(f0_hz: f64) -> StabilityCriteria {
        let (nadir, zenith, band) = if (f0_hz - 50.0).abs() < 1e-9 {
            (49.1, 51.5, 0.2)
        } else {
            let k = f0_hz / 60.0;
            (59.2 * k, 61.7 * k, 0.5 * k)
        };
        StabilityCriteria {
            max_angle_deg: 180.0,
            recovery_level: 0.80,
            recovery_time_s: 2.0,
            floor_level: 0.70,
            floor_time_s: 0.5,
            nadir_hz: nadir,
            zenith_hz: zenith,
            final_band_hz: band,
        }
    }
}

/// The criterion a run failed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Criterion {
    /// A rotor swung too far from its island's centre of inertia.
    AngleSeparation,
    /// A load bus did not recover in time after the clearing.
    VoltageRecovery,
    /// A recovered load bus stayed under the floor too long.
    VoltageFloor,
    /// Frequency fell below the nadir limit.
    FrequencyNadir,
    /// Frequency rose above the zenith limit.
    FrequencyZenith,
    /// Frequency ended outside the final band.
    FrequencyFinal,
    /// The numerical solution failed (no convergence even with smaller steps).
    NumericalFailure,
}

impl fmt::Display for Criterion {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Criterion::AngleSeparation => "rotor-angle separation",
            Criterion::VoltageRecovery => "voltage recovery",
            Criterion::VoltageFloor => "voltage floor",
            Criterion::FrequencyNadir => "frequency nadir",
            Criterion::FrequencyZenith => "frequency zenith",
            Criterion::FrequencyFinal => "final frequency",
            Criterion::NumericalFailure => "numerical failure",
        })
    }
}

/// Why a run is unstable: which criterion, when and where.
#[derive(Clone, Debug, PartialEq)]
pub struct Failure {
    /// The criterion.
    pub criterion: Criterion,
    /// Simulated time at which it failed, s.
    pub time_s: f64,
    /// Where: a machine, a bus, or the centre of inertia of an island.
    pub location: String,
    /// The value that crossed the limit, in the criterion's unit (deg, pu share, Hz).
    pub value: f64,
}

/// Margins of a run, kept whatever the outcome.
#[derive(Clone, Debug, PartialEq)]
pub struct Margins {
    /// Largest rotor angle from its island's centre of inertia, degrees.
    pub max_angle_deg: f64,
    /// Lowest load-bus voltage after the last clearing, share of pre-contingency.
    pub min_voltage_after_clearing: f64,
    /// Longest time a load bus took to get back above the recovery level, s after clearing.
    pub slowest_recovery_s: f64,
    /// Lowest centre-of-inertia frequency, Hz.
    pub nadir_hz: f64,
    /// Highest centre-of-inertia frequency, Hz.
    pub zenith_hz: f64,
    /// Centre-of-inertia frequency at the end, Hz (of the island with the most inertia).
    pub final_frequency_hz: f64,
}

/// The outcome of a run.
#[derive(Clone, Debug, PartialEq)]
pub struct Verdict {
    /// The first criterion that failed, if any; `None` means stable.
    pub failure: Option<Failure>,
    /// Margins measured up to the end of the run.
    pub margins: Margins,
    /// Simulated time reached, s.
    pub end_time_s: f64,
    /// True if the run stopped before its end because the outcome was certain.
    pub stopped_early: bool,
    /// Wind plants that tripped on their ride-through curve, by id, with the time.
    pub wind_trips: Vec<(String, f64)>,
    /// Load motor shares that tripped on under-voltage, by load id, with the time.
    pub motor_trips: Vec<(String, f64)>,
}

impl Verdict {
    /// True if no criterion failed.
    pub fn is_stable(&self) -> bool {
        self.failure.is_none()
    }
}

/// Tracks the criteria step by step.
#[derive(Clone, Debug)]
pub(crate) struct Monitor {
    pub(crate) criteria: StabilityCriteria,
    f0_hz: f64,
    /// Load buses: (bus index, bus number, pre-contingency voltage).
    load_buses: Vec<(usize, u32, f64)>,
    /// Start of the voltage checks (first event, or the latest clearing), s; NaN until then.
    clock_s: f64,
    /// Per load bus: recovered since the clock started.
    recovered: Vec<bool>,
    below_level_since: Vec<f64>,
    below_floor_since: Vec<f64>,
    pub(crate) margins: Margins,
    pub(crate) failure: Option<Failure>,
}

impl Monitor {
    pub(crate) fn new(
        criteria: StabilityCriteria,
        f0_hz: f64,
        load_buses: Vec<(usize, u32, f64)>,
    ) -> Monitor {
        let n = load_buses.len();
        Monitor {
            criteria,
            f0_hz,
            load_buses,
            clock_s: f64::NAN,
            recovered: vec![false; n],
            below_level_since: vec![f64::NAN; n],
            below_floor_since: vec![f64::NAN; n],
            margins: Margins {
                max_angle_deg: 0.0,
                min_voltage_after_clearing: f64::INFINITY,
                slowest_recovery_s: 0.0,
                nadir_hz: f0_hz,
                zenith_hz: f0_hz,
                final_frequency_hz: f0_hz,
            },
            failure: None,
        }
    }

    /// (Re)starts the voltage clock: at the first event, and at every fault clearing.
    pub(crate) fn start_voltage_clock(&mut self, t_s: f64) {
        self.clock_s = t_s;
        self.recovered.fill(false);
        self.below_level_since.fill(f64::NAN);
        self.below_floor_since.fill(f64::NAN);
    }

    /// True once the voltage checks have started (and no fault has suspended them).
    pub(crate) fn voltage_clock_running(&self) -> bool {
        !self.clock_s.is_nan()
    }

    /// Suspends the voltage checks while a fault is on.
    pub(crate) fn suspend_voltage_checks(&mut self) {
        self.clock_s = f64::NAN;
    }

    fn fail(&mut self, criterion: Criterion, time_s: f64, location: String, value: f64) {
        if self.failure.is_none() {
            self.failure = Some(Failure {
                criterion,
                time_s,
                location,
                value,
            });
        }
    }

    /// Angle check: `angle_deg` is the largest rotor angle from its centre of inertia, at
    /// machine `who`.
    pub(crate) fn check_angle(&mut self, t_s: f64, angle_deg: f64, who: &str) {
        self.margins.max_angle_deg = self.margins.max_angle_deg.max(angle_deg);
        if angle_deg > self.criteria.max_angle_deg {
            self.fail(
                Criterion::AngleSeparation,
                t_s,
                format!("machine \"{who}\""),
                angle_deg,
            );
        }
    }

    /// Frequency check on a centre-of-inertia frequency in Hz.
    /// `island` names the island; it is only called when the check fails.
    pub(crate) fn check_frequency(&mut self, t_s: f64, f_hz: f64, island: impl FnOnce() -> String) {
        let m = &mut self.margins;
        m.nadir_hz = m.nadir_hz.min(f_hz);
        m.zenith_hz = m.zenith_hz.max(f_hz);
        if f_hz < self.criteria.nadir_hz {
            self.fail(Criterion::FrequencyNadir, t_s, island(), f_hz);
        } else if f_hz > self.criteria.zenith_hz {
            self.fail(Criterion::FrequencyZenith, t_s, island(), f_hz);
        }
    }

    /// Voltage checks at the load buses, `v_pu` indexed by bus.
    pub(crate) fn check_voltages(&mut self, t_s: f64, v_pu: &[f64]) {
        if self.clock_s.is_nan() {
            return;
        }
        let c = self.criteria;
        let since_clock = t_s - self.clock_s;
        for k in 0..self.load_buses.len() {
            let (bus, number, v_pre) = self.load_buses[k];
            let share = v_pu[bus] / v_pre;
            self.margins.min_voltage_after_clearing =
                self.margins.min_voltage_after_clearing.min(share);
            if share < c.recovery_level {
                if self.below_level_since[k].is_nan() {
                    self.below_level_since[k] = t_s;
                }
                let start = if self.recovered[k] {
                    self.below_level_since[k]
                } else {
                    self.clock_s
                };
                if t_s - start > c.recovery_time_s + 1e-9 {
                    self.fail(
                        Criterion::VoltageRecovery,
                        t_s,
                        format!("bus {number}"),
                        share,
                    );
                }
            } else {
                if !self.recovered[k] {
                    self.recovered[k] = true;
                    self.margins.slowest_recovery_s =
                        self.margins.slowest_recovery_s.max(since_clock);
                }
                self.below_level_since[k] = f64::NAN;
            }
            if self.recovered[k] && share < c.floor_level {
                if self.below_floor_since[k].is_nan() {
                    self.below_floor_since[k] = t_s;
                }
                if t_s - self.below_floor_since[k] > c.floor_time_s + 1e-9 {
                    self.fail(Criterion::VoltageFloor, t_s, format!("bus {number}"), share);
                }
            } else {
                self.below_floor_since[k] = f64::NAN;
            }
        }
    }

    /// End-of-run checks: the final frequency band, and buses never recovered.
    pub(crate) fn finish(&mut self, t_s: f64, f_final_hz: f64, v_pu: &[f64]) {
        self.margins.final_frequency_hz = f_final_hz;
        if (f_final_hz - self.f0_hz).abs() > self.criteria.final_band_hz {
            self.fail(
                Criterion::FrequencyFinal,
                t_s,
                "centre of inertia".to_string(),
                f_final_hz,
            );
        }
        if !self.clock_s.is_nan() {
            for k in 0..self.load_buses.len() {
                if !self.recovered[k] {
                    let (bus, number, v_pre) = self.load_buses[k];
                    self.margins.slowest_recovery_s = f64::INFINITY;
                    if t_s - self.clock_s > self.criteria.recovery_time_s {
                        self.fail(
                            Criterion::VoltageRecovery,
                            t_s,
                            format!("bus {number}"),
                            v_pu[bus] / v_pre,
                        );
                    }
                }
            }
        }
    }

    pub(crate) fn numerical_failure(&mut self, t_s: f64, message: String) {
        self.fail(Criterion::NumericalFailure, t_s, message, f64::NAN);
    }

    pub(crate) fn failed(&self) -> bool {
        self.failure.is_some()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn monitor() -> Monitor {
        Monitor::new(
            StabilityCriteria::for_frequency(60.0),
            60.0,
            vec![(0, 7, 1.0)],
        )
    }

    #[test]
    fn slow_recovery_fails_at_the_deadline_and_names_the_bus() {
        let mut m = monitor();
        m.start_voltage_clock(0.1);
        for k in 0..300 {
            let t = 0.1 + k as f64 * 0.01;
            m.check_voltages(t, &[0.75]);
            if m.failed() {
                break;
            }
        }
        let f = m.failure.unwrap();
        assert_eq!(f.criterion, Criterion::VoltageRecovery);
        assert_eq!(f.location, "bus 7");
        assert!((f.time_s - 2.11).abs() < 1e-9, "{}", f.time_s);
    }

    #[test]
    fn recovered_bus_may_dip_below_the_floor_briefly() {
        let mut m = monitor();
        m.start_voltage_clock(0.0);
        m.check_voltages(0.0, &[0.9]);
        for k in 1..=40 {
            m.check_voltages(k as f64 * 0.01, &[0.65]);
        }
        assert!(!m.failed(), "0.4 s under the floor is allowed");
        for k in 41..=60 {
            m.check_voltages(k as f64 * 0.01, &[0.65]);
        }
        assert_eq!(m.failure.unwrap().criterion, Criterion::VoltageFloor);
    }

    #[test]
    fn defaults_follow_the_nominal_frequency() {
        let c50 = StabilityCriteria::for_frequency(50.0);
        assert_eq!(
            (c50.nadir_hz, c50.zenith_hz, c50.final_band_hz),
            (49.1, 51.5, 0.2)
        );
        let c60 = StabilityCriteria::for_frequency(60.0);
        assert!((c60.nadir_hz - 59.2).abs() < 1e-12);
    }
}
