//! Stability criteria, the monitor that applies them while a run proceeds, and the verdict.
//!
//! A verdict is a policy decision, not physics (DOMAIN.md 7): every threshold is a field of
//! [`StabilityCriteria`], and the margins are kept so that a run can be judged again under
//! other thresholds without simulating it again. A margin the run did not reach (it stopped
//! early, or never came to the point where the margin is measured) is `None`, never a nominal
//! value.
//!
//! The criteria, in the order a run meets them:
//! - rotor angle from the island's centre of inertia;
//! - frequency of each island's centre of inertia: nadir and zenith;
//! - load-bus voltage after the last clearing: recovery to a share of pre-contingency within a
//!   time, then no long stay under a floor;
//! - load-bus over-voltage after the first event: above a high level for longer than a short
//!   time, or above a lower level for longer than a longer time;
//! - at the end of the window: the frequency in its band, every load-bus voltage in its band,
//!   and no oscillation mode above its amplitude floor damped less than a minimum (the modes
//!   are estimated from rotor angles and load-bus voltages over the last part of the window,
//!   see [`modes`](super::modes)); these need the run to reach the end, so they cost nothing in
//!   runs that stop early.

use std::fmt;

use crate::dynamics::modes::{Mode, PencilOptions, estimate_modes};

/// Thresholds of the stability verdict.
///
/// Recovery levels are shares of each bus's pre-contingency voltage; over-voltage levels and
/// the final band are in pu of the bus's nominal voltage (equipment ratings are absolute);
/// frequencies are in Hz. The names of the fields are the keys of a study's `[criteria]` table
/// and of `holdfast simulate --criterion NAME=VALUE` ([`StabilityCriteria::FIELDS`]).
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
    /// High over-voltage level at load buses, pu of nominal. Default 1.20: above it generating
    /// plants may trip at once (NERC PRC-024-2 high-voltage ride-through, from memory).
    pub over_voltage_pu: f64,
    /// Longest time a load bus may stay above [`Self::over_voltage_pu`], s. Default 0.1 (six
    /// cycles at 60 Hz, for switching transients to pass; common practice, no single source).
    pub over_voltage_time_s: f64,
    /// Sustained over-voltage level at load buses, pu of nominal. Default 1.10: keep sustained
    /// voltages at or below it (common practice; DOMAIN.md 7.2).
    pub sustained_over_voltage_pu: f64,
    /// Longest time a load bus may stay above [`Self::sustained_over_voltage_pu`], s. Default
    /// 1.0 (the time the PRC-024-2 ride-through envelope allows above 1.10 pu, from memory).
    pub sustained_over_voltage_time_s: f64,
    /// Lowest load-bus voltage allowed at the end of the window, pu of nominal. Default 0.90
    /// (the emergency band of common planning practice, DOMAIN.md 7.2).
    pub final_voltage_min_pu: f64,
    /// Highest load-bus voltage allowed at the end of the window, pu of nominal. Default 1.10
    /// (same band).
    pub final_voltage_max_pu: f64,
    /// Smallest damping ratio allowed for an oscillation mode above its amplitude floor at the
    /// end of the window. Default 0.03 (3 %; planning practice asks 3-5 %, common practice,
    /// DOMAIN.md 7.1). Dimensionless; a negative value accepts decaying and sustained modes
    /// and fails only growing ones below it.
    pub min_damping_ratio: f64,
    /// Length of the window's last part over which modes are estimated, s; 0 turns the damping
    /// criterion off. Default 5.0 (the second half of a 10-s run; our choice).
    pub damping_window_s: f64,
    /// Amplitude below which a mode in a rotor angle is not judged, degrees. Default 1.0
    /// (common practice, no single source).
    pub damping_angle_floor_deg: f64,
    /// Amplitude below which a mode in a load-bus voltage is not judged, pu. Default 0.01
    /// (common practice, no single source).
    pub damping_voltage_floor_pu: f64,
}

/// Why a criteria field cannot take a value.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum CriteriaFieldError {
    /// No criteria field has this name.
    #[error("no criterion is named `{name}` (criteria: {})", StabilityCriteria::FIELDS.join(", "))]
    Unknown {
        /// The name given.
        name: String,
    },
    /// The value lies outside the field's range.
    #[error("must be between {min} and {max}")]
    OutOfRange {
        /// Smallest accepted value.
        min: f64,
        /// Largest accepted value.
        max: f64,
    },
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
            over_voltage_pu: 1.20,
            over_voltage_time_s: 0.1,
            sustained_over_voltage_pu: 1.10,
            sustained_over_voltage_time_s: 1.0,
            final_voltage_min_pu: 0.90,
            final_voltage_max_pu: 1.10,
            min_damping_ratio: 0.03,
            damping_window_s: 5.0,
            damping_angle_floor_deg: 1.0,
            damping_voltage_floor_pu: 0.01,
        }
    }

    /// The names of the adjustable fields, as in a study's `[criteria]` table.
    pub const FIELDS: [&'static str; 18] = [
        "max_angle_deg",
        "recovery_level",
        "recovery_time_s",
        "floor_level",
        "floor_time_s",
        "nadir_hz",
        "zenith_hz",
        "final_band_hz",
        "over_voltage_pu",
        "over_voltage_time_s",
        "sustained_over_voltage_pu",
        "sustained_over_voltage_time_s",
        "final_voltage_min_pu",
        "final_voltage_max_pu",
        "min_damping_ratio",
        "damping_window_s",
        "damping_angle_floor_deg",
        "damping_voltage_floor_pu",
    ];

    /// The field called `name` and the range of values it takes at nominal frequency `f0_hz`
    /// (ranges catch unit mistakes, not unusual policies).
    fn field_mut(&mut self, name: &str, f0_hz: f64) -> Option<(&mut f64, f64, f64)> {
        Some(match name {
            "max_angle_deg" => (&mut self.max_angle_deg, 10.0, 720.0),
            "recovery_level" => (&mut self.recovery_level, 0.0, 1.0),
            "recovery_time_s" => (&mut self.recovery_time_s, 0.0, 60.0),
            "floor_level" => (&mut self.floor_level, 0.0, 1.0),
            "floor_time_s" => (&mut self.floor_time_s, 0.0, 60.0),
            "nadir_hz" => (&mut self.nadir_hz, 0.0, f0_hz),
            "zenith_hz" => (&mut self.zenith_hz, f0_hz, 2.0 * f0_hz),
            "final_band_hz" => (&mut self.final_band_hz, 0.0, f0_hz),
            "over_voltage_pu" => (&mut self.over_voltage_pu, 1.0, 3.0),
            "over_voltage_time_s" => (&mut self.over_voltage_time_s, 0.0, 60.0),
            "sustained_over_voltage_pu" => (&mut self.sustained_over_voltage_pu, 1.0, 3.0),
            "sustained_over_voltage_time_s" => {
                (&mut self.sustained_over_voltage_time_s, 0.0, 3600.0)
            }
            "final_voltage_min_pu" => (&mut self.final_voltage_min_pu, 0.0, 1.0),
            "final_voltage_max_pu" => (&mut self.final_voltage_max_pu, 1.0, 3.0),
            "min_damping_ratio" => (&mut self.min_damping_ratio, -1.0, 1.0),
            "damping_window_s" => (&mut self.damping_window_s, 0.0, 3600.0),
            "damping_angle_floor_deg" => (&mut self.damping_angle_floor_deg, 1e-3, 180.0),
            "damping_voltage_floor_pu" => (&mut self.damping_voltage_floor_pu, 1e-5, 1.0),
            _ => return None,
        })
    }

    /// The value of the field called `name`, if there is one.
    pub fn field(&self, name: &str) -> Option<f64> {
        let mut copy = *self;
        copy.field_mut(name, 60.0).map(|(v, _, _)| *v)
    }

    /// Sets the field called `name` ([`Self::FIELDS`]) to `value`, checked against the field's
    /// range at nominal frequency `f0_hz`.
    pub fn set_field(
        &mut self,
        name: &str,
        value: f64,
        f0_hz: f64,
    ) -> Result<(), CriteriaFieldError> {
        let Some((field, min, max)) = self.field_mut(name, f0_hz) else {
            return Err(CriteriaFieldError::Unknown {
                name: name.to_string(),
            });
        };
        if !(value >= min && value <= max) {
            return Err(CriteriaFieldError::OutOfRange { min, max });
        }
        *field = value;
        Ok(())
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
    /// A load bus stayed above the high over-voltage level too long.
    OverVoltage,
    /// A load bus stayed above the sustained over-voltage level too long.
    SustainedOverVoltage,
    /// Frequency fell below the nadir limit.
    FrequencyNadir,
    /// Frequency rose above the zenith limit.
    FrequencyZenith,
    /// Frequency ended outside the final band.
    FrequencyFinal,
    /// A load-bus voltage ended outside the final band.
    FinalVoltage,
    /// An oscillation mode above its amplitude floor was damped less than the minimum.
    Damping,
    /// The numerical solution failed (no convergence even with smaller steps).
    NumericalFailure,
}

impl Criterion {
    /// True if the failure says that too much was shed, not too little: over-frequency, a
    /// frequency ending above its band, or a voltage too high (shedding load raises voltages).
    pub fn points_to_over_shed(self, value: f64, nominal_hz: f64) -> bool {
        match self {
            Criterion::FrequencyZenith
            | Criterion::OverVoltage
            | Criterion::SustainedOverVoltage => true,
            Criterion::FrequencyFinal => value > nominal_hz,
            Criterion::FinalVoltage => value > 1.0,
            _ => false,
        }
    }
}

impl fmt::Display for Criterion {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Criterion::AngleSeparation => "rotor-angle separation",
            Criterion::VoltageRecovery => "voltage recovery",
            Criterion::VoltageFloor => "voltage floor",
            Criterion::OverVoltage => "over-voltage",
            Criterion::SustainedOverVoltage => "sustained over-voltage",
            Criterion::FrequencyNadir => "frequency nadir",
            Criterion::FrequencyZenith => "frequency zenith",
            Criterion::FrequencyFinal => "final frequency",
            Criterion::FinalVoltage => "final voltage",
            Criterion::Damping => "damping",
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
    /// Where: a machine (`machine "ID"`), a bus (`bus N`), or the centre of inertia of an
    /// island.
    pub location: String,
    /// The value that crossed the limit, in the criterion's unit: degrees, share of
    /// pre-contingency voltage (recovery, floor), pu (over-voltage, final voltage), Hz, or a
    /// damping ratio.
    pub value: f64,
}

/// The oscillation mode that came closest to failing the damping criterion.
#[derive(Clone, Debug, PartialEq)]
pub struct ModeMargin {
    /// Frequency, Hz.
    pub frequency_hz: f64,
    /// Damping ratio. Dimensionless.
    pub damping_ratio: f64,
    /// Largest amplitude over the window, as a multiple of its signal's floor (at least 1).
    /// Dimensionless.
    pub amplitude_over_floor: f64,
    /// The signal it is largest in: `machine "ID"` (rotor angle) or `bus N` (voltage).
    pub location: String,
}

/// What the damping analysis at the end of a run found.
#[derive(Clone, Debug, PartialEq)]
pub struct DampingMargin {
    /// Start of the analysed window, s.
    pub window_start_s: f64,
    /// End of the analysed window, s.
    pub window_end_s: f64,
    /// Oscillation modes found above their amplitude floor (0.1-5 Hz).
    pub modes_above_floor: usize,
    /// The least damped of them, if any.
    pub worst: Option<ModeMargin>,
}

/// Margins of a run, kept whatever the outcome. `None` marks a margin the run did not reach.
#[derive(Clone, Debug, PartialEq)]
pub struct Margins {
    /// Largest rotor angle from its island's centre of inertia, degrees.
    pub max_angle_deg: f64,
    /// Lowest load-bus voltage after the last clearing, share of pre-contingency (`None`: the
    /// voltage checks never started).
    pub min_voltage_after_clearing: Option<f64>,
    /// Longest time a load bus took to get back above the recovery level, s after clearing
    /// (`None`: some bus had not recovered when the run ended, or the checks never started).
    pub slowest_recovery_s: Option<f64>,
    /// Lowest centre-of-inertia frequency, Hz (up to the end of the run).
    pub nadir_hz: f64,
    /// Highest centre-of-inertia frequency, Hz (up to the end of the run).
    pub zenith_hz: f64,
    /// Highest load-bus voltage after the first event, pu (`None`: no event yet).
    pub max_voltage_pu: Option<f64>,
    /// Longest time any load bus stayed above the high over-voltage level, s.
    pub longest_over_voltage_s: f64,
    /// Longest time any load bus stayed above the sustained over-voltage level, s.
    pub longest_sustained_over_voltage_s: f64,
    /// Centre-of-inertia frequency at the end of the window, Hz (of the island with the most
    /// inertia; `None`: the run stopped before the end).
    pub final_frequency_hz: Option<f64>,
    /// Lowest load-bus voltage at the end of the window, pu (`None`: not reached).
    pub final_voltage_min_pu: Option<f64>,
    /// Highest load-bus voltage at the end of the window, pu (`None`: not reached).
    pub final_voltage_max_pu: Option<f64>,
    /// The damping analysis (`None`: the run stopped before the end, the window after the last
    /// event was shorter than [`MIN_DAMPING_WINDOW_S`], or the criterion is off).
    pub damping: Option<DampingMargin>,
}

impl Margins {
    /// The margins of a run that has not started, on a grid of nominal frequency `f0_hz`:
    /// no angle, the frequency at nominal, everything else not reached.
    pub fn at_start(f0_hz: f64) -> Margins {
        Margins {
            max_angle_deg: 0.0,
            min_voltage_after_clearing: None,
            slowest_recovery_s: None,
            nadir_hz: f0_hz,
            zenith_hz: f0_hz,
            max_voltage_pu: None,
            longest_over_voltage_s: 0.0,
            longest_sustained_over_voltage_s: 0.0,
            final_frequency_hz: None,
            final_voltage_min_pu: None,
            final_voltage_max_pu: None,
            damping: None,
        }
    }
}

/// A relay action inside a device during a run.
#[derive(Clone, Debug, PartialEq)]
pub struct Trip {
    /// The element's id (wind plant or load).
    pub id: String,
    /// When it tripped, s.
    pub time_s: f64,
    /// Why.
    pub cause: TripCause,
}

/// What made a device trip.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum TripCause {
    /// Its voltage stayed below its low-voltage ride-through curve (or under-voltage relay).
    LowVoltage,
    /// Its voltage stayed above its high-voltage ride-through curve.
    HighVoltage,
}

impl fmt::Display for TripCause {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            TripCause::LowVoltage => "low voltage",
            TripCause::HighVoltage => "high voltage",
        })
    }
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
    /// Wind plants that tripped on their ride-through curves.
    pub wind_trips: Vec<Trip>,
    /// Load motor shares that tripped on under-voltage.
    pub motor_trips: Vec<Trip>,
}

impl Verdict {
    /// True if no criterion failed.
    pub fn is_stable(&self) -> bool {
        self.failure.is_none()
    }
}

/// Interval at which the damping analysis samples the signals, s (20 samples per second:
/// four per period of a 5-Hz oscillation).
pub const DAMPING_SAMPLE_S: f64 = 0.05;
/// Shortest window after the last event worth a damping analysis, s.
pub const MIN_DAMPING_WINDOW_S: f64 = 2.0;
/// Time after an event before its switching transient is left out of the damping window, s.
const DAMPING_SETTLE_S: f64 = 1.0;
/// Frequencies of the oscillations the damping criterion judges, Hz: electromechanical modes
/// (about 0.1-2.5 Hz) and slow control oscillations up to 5 Hz.
const DAMPING_BAND_HZ: (f64, f64) = (0.1, 5.0);
/// Most signals handed to the mode estimate (those that oscillate most, relative to their
/// floors): a mode above its floor shows in the signals it is largest in.
const DAMPING_MAX_SIGNALS: usize = 12;

/// The largest distance of the samples `y` (equally spaced) from their least-squares line.
fn departure_from_line(y: &[f64]) -> f64 {
    let n = y.len() as f64;
    let mean_k = (n - 1.0) / 2.0;
    let mean_y = y.iter().sum::<f64>() / n;
    let (mut sxy, mut sxx) = (0.0, 0.0);
    for (k, v) in y.iter().enumerate() {
        let dk = k as f64 - mean_k;
        sxy += dk * (v - mean_y);
        sxx += dk * dk;
    }
    let slope = if sxx > 0.0 { sxy / sxx } else { 0.0 };
    y.iter()
        .enumerate()
        .map(|(k, v)| (v - mean_y - slope * (k as f64 - mean_k)).abs())
        .fold(0.0, f64::max)
}

/// A load bus watched by the voltage criteria.
#[derive(Clone, Copy, Debug)]
pub(crate) struct LoadBus {
    /// Bus index.
    pub(crate) idx: usize,
    /// External bus number, for reports.
    pub(crate) number: u32,
    /// Pre-contingency voltage, pu.
    pub(crate) v_pre: f64,
}

/// Samples of the signals the damping analysis reads, at [`DAMPING_SAMPLE_S`] from a fixed
/// start, interpolated linearly between accepted steps.
#[derive(Clone, Debug)]
struct SignalRecorder {
    start_s: f64,
    /// Per signal: where it is (`machine "ID"` or `bus N`) and its amplitude floor.
    labels: Vec<String>,
    floors: Vec<f64>,
    /// Per signal, the samples so far.
    series: Vec<Vec<f64>>,
    last_t: f64,
    /// The signals at `last_t`, and at the point being recorded (kept to reuse their storage).
    last: Vec<f64>,
    now: Vec<f64>,
}

impl SignalRecorder {
    /// Records the signals in `self.now` at time `t`.
    fn push(&mut self, t: f64) {
        let values = &self.now;
        if self.last.is_empty() {
            self.last.extend_from_slice(values);
            self.last_t = t;
        }
        let mut next = self.start_s + self.series[0].len() as f64 * DAMPING_SAMPLE_S;
        while next <= t + 1e-9 {
            let w = if t > self.last_t && next > self.last_t {
                (next - self.last_t) / (t - self.last_t)
            } else {
                1.0
            };
            for ((s, now), before) in self.series.iter_mut().zip(values).zip(&self.last) {
                s.push(before + w * (now - before));
            }
            next = self.start_s + self.series[0].len() as f64 * DAMPING_SAMPLE_S;
        }
        self.last_t = t;
        std::mem::swap(&mut self.last, &mut self.now);
    }
}

/// Tracks the criteria step by step.
#[derive(Clone, Debug)]
pub(crate) struct Monitor {
    pub(crate) criteria: StabilityCriteria,
    f0_hz: f64,
    load_buses: Vec<LoadBus>,
    /// Start of the voltage-recovery checks (first event, or the latest clearing), s; NaN
    /// until then and while a fault is on.
    clock_s: f64,
    /// Time of the first event (start of the over-voltage checks), s; NaN until then.
    disturbed_s: f64,
    /// Time of the latest event, s (NaN: none).
    last_event_s: f64,
    /// Per load bus: recovered since the clock started.
    recovered: Vec<bool>,
    below_level_since: Vec<f64>,
    below_floor_since: Vec<f64>,
    above_high_since: Vec<f64>,
    above_sustained_since: Vec<f64>,
    recorder: Option<SignalRecorder>,
    pub(crate) margins: Margins,
    pub(crate) failure: Option<Failure>,
}

impl Monitor {
    pub(crate) fn new(
        criteria: StabilityCriteria,
        f0_hz: f64,
        load_buses: Vec<LoadBus>,
    ) -> Monitor {
        let n = load_buses.len();
        Monitor {
            criteria,
            f0_hz,
            load_buses,
            clock_s: f64::NAN,
            disturbed_s: f64::NAN,
            last_event_s: f64::NAN,
            recovered: vec![false; n],
            below_level_since: vec![f64::NAN; n],
            below_floor_since: vec![f64::NAN; n],
            above_high_since: vec![f64::NAN; n],
            above_sustained_since: vec![f64::NAN; n],
            recorder: None,
            margins: Margins::at_start(f0_hz),
            failure: None,
        }
    }

    /// Asks for the damping analysis of a run ending at `end_s`: the signals named by
    /// `machines` (rotor angles, degrees) then the load buses (voltages, pu) are to be
    /// recorded from the start of the window on. Does nothing if the criterion is off.
    pub(crate) fn record_damping_signals(&mut self, end_s: f64, machines: Vec<String>) {
        let c = self.criteria;
        if c.damping_window_s <= 0.0 {
            return;
        }
        let n_machines = machines.len();
        let mut labels = machines;
        labels.extend(self.load_buses.iter().map(|b| format!("bus {}", b.number)));
        if labels.is_empty() {
            return;
        }
        let mut floors = vec![c.damping_angle_floor_deg; n_machines];
        floors.resize(labels.len(), c.damping_voltage_floor_pu);
        self.recorder = Some(SignalRecorder {
            start_s: (end_s - c.damping_window_s).max(0.0),
            series: vec![Vec::new(); labels.len()],
            last: Vec::new(),
            now: Vec::new(),
            last_t: f64::NAN,
            labels,
            floors,
        });
    }

    /// True if the damping analysis wants the signals at time `t_s` (the engine computes them
    /// only then). `step_s` is the step: the sample before the window is kept to interpolate.
    pub(crate) fn wants_signals(&self, t_s: f64, step_s: f64) -> bool {
        self.recorder
            .as_ref()
            .is_some_and(|r| t_s >= r.start_s - 2.0 * step_s)
    }

    /// Records the damping signals at `t_s`: rotor angles from the centre of inertia in
    /// degrees (NaN for a machine out of service), in the order given to
    /// [`Self::record_damping_signals`]; the load-bus voltages are taken from `v_pu`.
    pub(crate) fn record_signals(&mut self, t_s: f64, angles_deg: &[f64], v_pu: &[f64]) {
        let Some(r) = &mut self.recorder else {
            return;
        };
        r.now.clear();
        r.now.extend_from_slice(angles_deg);
        r.now.extend(self.load_buses.iter().map(|b| v_pu[b.idx]));
        if r.now.len() == r.labels.len() {
            r.push(t_s);
        }
    }

    /// Notes an event at `t_s` (scheduled, or a relay trip inside a device): starts the
    /// over-voltage checks at the first, and keeps the damping window clear of the switching
    /// transient.
    pub(crate) fn note_event(&mut self, t_s: f64) {
        if self.disturbed_s.is_nan() {
            self.disturbed_s = t_s;
        }
        self.last_event_s = t_s;
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
        if !self.disturbed_s.is_nan() {
            self.check_over_voltages(t_s, v_pu);
        }
        if self.clock_s.is_nan() {
            return;
        }
        let c = self.criteria;
        let since_clock = t_s - self.clock_s;
        for k in 0..self.load_buses.len() {
            let LoadBus { idx, number, v_pre } = self.load_buses[k];
            let share = v_pu[idx] / v_pre;
            let lowest = &mut self.margins.min_voltage_after_clearing;
            *lowest = Some(lowest.map_or(share, |m| m.min(share)));
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
                    if self.recovered.iter().all(|&r| r) {
                        let slowest = self.margins.slowest_recovery_s.unwrap_or(0.0);
                        self.margins.slowest_recovery_s = Some(slowest.max(since_clock));
                    }
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

    /// The over-voltage envelope: each load bus against the high and the sustained level.
    fn check_over_voltages(&mut self, t_s: f64, v_pu: &[f64]) {
        let c = self.criteria;
        for k in 0..self.load_buses.len() {
            let LoadBus { idx, number, .. } = self.load_buses[k];
            let v = v_pu[idx];
            let highest = &mut self.margins.max_voltage_pu;
            *highest = Some(highest.map_or(v, |m| m.max(v)));
            let quiet = v <= c.over_voltage_pu.min(c.sustained_over_voltage_pu)
                && self.above_high_since[k].is_nan()
                && self.above_sustained_since[k].is_nan();
            if quiet {
                continue;
            }
            for (level, allowed, since, longest, criterion) in [
                (
                    c.over_voltage_pu,
                    c.over_voltage_time_s,
                    &mut self.above_high_since[k],
                    &mut self.margins.longest_over_voltage_s,
                    Criterion::OverVoltage,
                ),
                (
                    c.sustained_over_voltage_pu,
                    c.sustained_over_voltage_time_s,
                    &mut self.above_sustained_since[k],
                    &mut self.margins.longest_sustained_over_voltage_s,
                    Criterion::SustainedOverVoltage,
                ),
            ] {
                if v > level {
                    if since.is_nan() {
                        *since = t_s;
                    }
                    let lasted = t_s - *since;
                    *longest = longest.max(lasted);
                    if lasted > allowed + 1e-9 && self.failure.is_none() {
                        self.failure = Some(Failure {
                            criterion,
                            time_s: t_s,
                            location: format!("bus {number}"),
                            value: v,
                        });
                    }
                } else {
                    *since = f64::NAN;
                }
            }
        }
    }

    /// End-of-run checks. `reached_end` says whether the run got to the end of its window:
    /// only then are the final frequency, the final voltages and the damping measured and
    /// judged. Buses never recovered fail the recovery criterion once its time has passed.
    pub(crate) fn finish(&mut self, t_s: f64, reached_end: bool, f_final_hz: f64, v_pu: &[f64]) {
        if !self.clock_s.is_nan() {
            for k in 0..self.load_buses.len() {
                if !self.recovered[k] {
                    let LoadBus { idx, number, v_pre } = self.load_buses[k];
                    if reached_end && t_s - self.clock_s > self.criteria.recovery_time_s {
                        self.fail(
                            Criterion::VoltageRecovery,
                            t_s,
                            format!("bus {number}"),
                            v_pu[idx] / v_pre,
                        );
                    }
                }
            }
        }
        if !reached_end {
            return;
        }
        self.margins.final_frequency_hz = Some(f_final_hz);
        if (f_final_hz - self.f0_hz).abs() > self.criteria.final_band_hz {
            self.fail(
                Criterion::FrequencyFinal,
                t_s,
                "centre of inertia".to_string(),
                f_final_hz,
            );
        }
        self.check_final_voltages(t_s, v_pu);
        self.judge_damping(t_s);
    }

    fn check_final_voltages(&mut self, t_s: f64, v_pu: &[f64]) {
        let c = self.criteria;
        let mut worst: Option<(f64, u32)> = None;
        let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
        for b in &self.load_buses {
            let v = v_pu[b.idx];
            lo = lo.min(v);
            hi = hi.max(v);
            let outside = (c.final_voltage_min_pu - v).max(v - c.final_voltage_max_pu);
            if outside > 0.0 && worst.is_none_or(|(w, _)| outside > w) {
                worst = Some((outside, b.number));
            }
        }
        if !self.load_buses.is_empty() {
            self.margins.final_voltage_min_pu = Some(lo);
            self.margins.final_voltage_max_pu = Some(hi);
        }
        if let Some((_, number)) = worst {
            let v = self
                .load_buses
                .iter()
                .find(|b| b.number == number)
                .map_or(f64::NAN, |b| v_pu[b.idx]);
            self.fail(Criterion::FinalVoltage, t_s, format!("bus {number}"), v);
        }
    }

    /// The damping analysis over the recorded window.
    fn judge_damping(&mut self, t_s: f64) {
        let Some(r) = self.recorder.take() else {
            return;
        };
        let settled = if self.last_event_s.is_nan() {
            r.start_s
        } else {
            r.start_s.max(self.last_event_s + DAMPING_SETTLE_S)
        };
        let skip = ((settled - r.start_s) / DAMPING_SAMPLE_S - 1e-9)
            .ceil()
            .max(0.0) as usize;
        let n = r.series.first().map_or(0, Vec::len);
        if n < skip || (n - skip) as f64 * DAMPING_SAMPLE_S < MIN_DAMPING_WINDOW_S {
            return;
        }
        let window_start_s = r.start_s + skip as f64 * DAMPING_SAMPLE_S;
        // Each usable signal in units of its floor, with its largest departure from the straight
        // line through it (drift is not oscillation).
        let mut scaled: Vec<(usize, Vec<f64>, f64)> = r
            .series
            .iter()
            .enumerate()
            .filter(|(_, s)| s[skip..].iter().all(|v| v.is_finite()))
            .map(|(k, s)| {
                let y: Vec<f64> = s[skip..].iter().map(|v| v / r.floors[k]).collect();
                let wiggle = departure_from_line(&y);
                (k, y, wiggle)
            })
            .collect();
        let mut margin = DampingMargin {
            window_start_s,
            window_end_s: t_s,
            modes_above_floor: 0,
            worst: None,
        };
        // A mode at its floor moves its signal by its floor about the signal's trend; a signal
        // that stays within half its floor of a straight line holds none (unless two modes of
        // like size cancel each other), and a quiet run needs no estimate.
        scaled.retain(|(_, _, wiggle)| *wiggle >= 0.5);
        if !scaled.is_empty() {
            scaled.sort_by(|a, b| b.2.total_cmp(&a.2).then(a.0.cmp(&b.0)));
            scaled.truncate(DAMPING_MAX_SIGNALS);
            let signals: Vec<Vec<f64>> = scaled.iter().map(|(_, y, _)| y.clone()).collect();
            let options = PencilOptions {
                rank_amplitude: 0.1,
                ..PencilOptions::default()
            };
            if let Some(estimate) = estimate_modes(&signals, DAMPING_SAMPLE_S, &options) {
                let judged: Vec<&Mode> = estimate
                    .modes
                    .iter()
                    .filter(|m| {
                        m.amplitude >= 1.0
                            && m.frequency_hz >= DAMPING_BAND_HZ.0
                            && m.frequency_hz <= DAMPING_BAND_HZ.1
                    })
                    .collect();
                margin.modes_above_floor = judged.len();
                if let Some(w) = judged
                    .iter()
                    .min_by(|a, b| a.damping_ratio.total_cmp(&b.damping_ratio))
                {
                    margin.worst = Some(ModeMargin {
                        frequency_hz: w.frequency_hz,
                        damping_ratio: w.damping_ratio,
                        amplitude_over_floor: w.amplitude,
                        location: r.labels[scaled[w.signal].0].clone(),
                    });
                }
            }
        }
        if let Some(w) = &margin.worst
            && w.damping_ratio < self.criteria.min_damping_ratio
        {
            self.fail(Criterion::Damping, t_s, w.location.clone(), w.damping_ratio);
        }
        self.margins.damping = Some(margin);
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
            vec![LoadBus {
                idx: 0,
                number: 7,
                v_pre: 1.0,
            }],
        )
    }

    #[test]
    fn slow_recovery_fails_at_the_deadline_and_names_the_bus() {
        let mut m = monitor();
        m.note_event(0.1);
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
        assert_eq!(m.margins.slowest_recovery_s, None, "never recovered");
    }

    #[test]
    fn recovered_bus_may_dip_below_the_floor_briefly() {
        let mut m = monitor();
        m.note_event(0.0);
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
    fn over_voltage_envelope_has_a_high_brief_and_a_lower_sustained_level() {
        // Defaults (documented on the fields): above 1.2 pu for at most 0.1 s, above 1.1 pu for
        // at most 1 s. Common practice, no single source.
        let brief = |v: f64, lasting_s: f64| {
            let mut m = monitor();
            m.note_event(0.0);
            let mut t = 0.0;
            while t <= lasting_s + 1e-9 {
                m.check_voltages(t, &[v]);
                t += 0.01;
            }
            m.check_voltages(t, &[1.0]);
            m
        };
        assert!(!brief(1.25, 0.09).failed());
        let f = brief(1.25, 0.2).failure.unwrap();
        assert_eq!(
            (f.criterion, f.location.as_str()),
            (Criterion::OverVoltage, "bus 7")
        );
        assert!((f.time_s - 0.11).abs() < 1e-9 && f.value == 1.25, "{f:?}");
        assert!(!brief(1.15, 0.95).failed());
        let m = brief(1.15, 1.5);
        assert_eq!(
            m.failure.unwrap().criterion,
            Criterion::SustainedOverVoltage
        );
        // The margin keeps the whole excursion (the monitor goes on after a failure).
        assert!((m.margins.longest_sustained_over_voltage_s - 1.5).abs() < 1e-6);
        assert_eq!(m.margins.max_voltage_pu, Some(1.15));
    }

    #[test]
    fn margins_of_the_end_are_absent_until_the_end() {
        let mut m = monitor();
        m.note_event(0.1);
        m.check_voltages(0.2, &[1.0]);
        m.finish(0.2, false, 61.0, &[1.0]);
        assert_eq!(m.margins.final_frequency_hz, None);
        assert_eq!(m.margins.final_voltage_max_pu, None);
        assert_eq!(m.margins.slowest_recovery_s, None);
        assert!(
            !m.failed(),
            "nothing is judged at the end of a run that did not reach it"
        );
        m.finish(10.0, true, 61.0, &[1.12]);
        assert_eq!(m.margins.final_frequency_hz, Some(61.0));
        assert_eq!(m.failure.unwrap().criterion, Criterion::FrequencyFinal);
        assert_eq!(m.margins.final_voltage_max_pu, Some(1.12));
    }

    #[test]
    fn a_sustained_voltage_oscillation_fails_the_damping_criterion() {
        // A 0.95-Hz swing of 0.09 pu with damping ratio 0.006 on the load bus over the last
        // 5 s (closed form), against the default 3 % minimum and 0.01-pu floor.
        let mut m = monitor();
        m.note_event(0.1);
        m.record_damping_signals(10.0, Vec::new());
        let w = 2.0 * std::f64::consts::PI * 0.95;
        let sigma = 0.006 * w / (1.0f64 - 0.006 * 0.006).sqrt();
        let mut t = 0.0;
        while t <= 10.0 + 1e-9 {
            let v = 0.98 + 0.09 * (-sigma * t).exp() * (w * t).cos();
            if m.wants_signals(t, 1.0 / 120.0) {
                m.record_signals(t, &[], &[v]);
            }
            t += 1.0 / 120.0;
        }
        m.finish(10.0, true, 60.0, &[0.98]);
        let d = m.margins.damping.clone().unwrap();
        let worst = d.worst.unwrap();
        assert!((worst.frequency_hz - 0.95).abs() < 0.01, "{worst:?}");
        assert!((worst.damping_ratio - 0.006).abs() < 0.005, "{worst:?}");
        let f = m.failure.unwrap();
        assert_eq!(
            (f.criterion, f.location.as_str()),
            (Criterion::Damping, "bus 7")
        );
    }

    #[test]
    fn criteria_fields_are_set_by_name_within_their_ranges() {
        let mut c = StabilityCriteria::for_frequency(60.0);
        for name in StabilityCriteria::FIELDS {
            assert!(c.field(name).is_some(), "{name}");
        }
        c.set_field("min_damping_ratio", 0.05, 60.0).unwrap();
        assert_eq!(c.min_damping_ratio, 0.05);
        assert!(matches!(
            c.set_field("over_voltage_pu", 0.9, 60.0),
            Err(CriteriaFieldError::OutOfRange { .. })
        ));
        assert!(matches!(
            c.set_field("nadir", 59.0, 60.0),
            Err(CriteriaFieldError::Unknown { .. })
        ));
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
