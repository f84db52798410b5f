//! Labelling: the smallest total shed (placed by the study's rule) that keeps the grid stable
//! after a contingency, found by bisection on simulations that all continue one snapshot taken
//! at the action time.

use holdfast_core::dynamics::{
    Event, Scenario, Simulation, SimulationOptions, TimedEvent, Verdict,
};
use holdfast_core::topology::DistanceMatrix;
use holdfast_core::{BusIdx, Error};

use crate::contingency::Contingency;
use crate::sampling::OperatingPoint;
use crate::shed::{Candidate, place};
use crate::study::{Placement, Study};

/// How a sample came out.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub enum Outcome {
    /// Stable without any shed: label 0.
    NoShedNeeded,
    /// Unstable without shed, stable with the labelled amount.
    Shed,
    /// No amount tried was stable: not with a quarter, half, three quarters or all of the
    /// shed-able load (or the run failed before the action could act).
    Unsavable,
}

/// One trial of the bisection.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Trial {
    /// Total shed, MW.
    pub total_mw: f64,
    /// Whether the run was stable.
    pub stable: bool,
}

/// The verdict of a run, as stored: the failure and the margins (`None`: not reached by the
/// run; see [`holdfast_core::dynamics::Margins`]).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RunSummary {
    /// The failed criterion, if any (its display name).
    pub failed: Option<String>,
    /// When it failed, s.
    pub failed_at_s: Option<f64>,
    /// Where (bus or machine).
    pub failed_where: Option<String>,
    /// Largest rotor-angle separation from the centre of inertia, degrees.
    pub max_angle_deg: f64,
    /// Lowest load-bus voltage after clearing, share of pre-contingency.
    pub min_voltage_share: Option<f64>,
    /// Highest load-bus voltage after the first event, pu.
    pub max_voltage_pu: Option<f64>,
    /// Frequency nadir, Hz.
    pub nadir_hz: f64,
    /// Frequency zenith, Hz.
    pub zenith_hz: f64,
    /// Frequency at the end of the window, Hz.
    pub final_frequency_hz: Option<f64>,
    /// Lowest load-bus voltage at the end of the window, pu.
    pub final_voltage_min_pu: Option<f64>,
    /// Highest load-bus voltage at the end of the window, pu.
    pub final_voltage_max_pu: Option<f64>,
    /// Frequency of the least damped oscillation mode above its floor, Hz.
    pub worst_mode_hz: Option<f64>,
    /// Damping ratio of that mode. Dimensionless.
    pub worst_mode_damping: Option<f64>,
    /// End of the run, s.
    pub end_time_s: f64,
}

impl From<&Verdict> for RunSummary {
    fn from(v: &Verdict) -> Self {
        let m = &v.margins;
        let worst = m.damping.as_ref().and_then(|d| d.worst.as_ref());
        RunSummary {
            failed: v.failure.as_ref().map(|f| f.criterion.to_string()),
            failed_at_s: v.failure.as_ref().map(|f| f.time_s),
            failed_where: v.failure.as_ref().map(|f| f.location.clone()),
            max_angle_deg: m.max_angle_deg,
            min_voltage_share: m.min_voltage_after_clearing,
            max_voltage_pu: m.max_voltage_pu,
            nadir_hz: m.nadir_hz,
            zenith_hz: m.zenith_hz,
            final_frequency_hz: m.final_frequency_hz,
            final_voltage_min_pu: m.final_voltage_min_pu,
            final_voltage_max_pu: m.final_voltage_max_pu,
            worst_mode_hz: worst.map(|w| w.frequency_hz),
            worst_mode_damping: worst.map(|w| w.damping_ratio),
            end_time_s: v.end_time_s,
        }
    }
}

/// A sample's label.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Label {
    /// Outcome.
    pub outcome: Outcome,
    /// Shed per candidate bus (bus number, MW), zero entries left out. For an unsavable sample:
    /// empty.
    pub shed_mw: Vec<(u32, f64)>,
    /// Total shed, MW.
    pub total_mw: f64,
    /// All shed-able load at the candidate buses, MW.
    pub sheddable_mw: f64,
    /// Bisection tolerance used, MW.
    pub tolerance_mw: f64,
    /// Simulations run (the pre-action part counted once).
    pub simulations: u32,
    /// A stable amount was followed by an unstable larger one somewhere in the trials.
    pub non_monotone: bool,
    /// Every trial, in the order run.
    pub trials: Vec<Trial>,
    /// The labelled run's verdict (no shed for `NoShedNeeded`, the full shed for `Unsavable`).
    pub verdict: RunSummary,
}

/// Stable-or-not as a function of the total shed, pu; returns the verdict.
pub trait ShedOracle {
    /// Runs (or looks up) the outcome of shedding `total_pu`.
    fn run(&mut self, total_pu: f64) -> Result<Verdict, Error>;
}

/// Rounds of re-bisection after a non-monotone check fails, before giving up and labelling the
/// full amount.
pub const MAX_MONOTONE_ROUNDS: usize = 3;

/// Steps of the coarse scan before bisection: shares of the shed-able load tried in turn.
pub const COARSE_STEPS: [f64; 4] = [0.25, 0.5, 0.75, 1.0];

/// Searches the smallest stable total shed in `[0, max_pu]` to `tol_pu` (DOMAIN.md 8.3-8.4).
/// No shed first (stable: label 0); then a coarse scan at quarters of the shed-able load,
/// because shedding far too much fails too (over-frequency); no stable quarter means
/// unsavable. Then bisection inside the quarter below the first stable one, and the robustness
/// check: the answer `a` must be stable at `a` and at `a + 2 tol`; if not, the sample is
/// flagged non-monotone and the search continues above the unstable point. `to_mw` converts pu
/// to MW for the record.
pub fn bisect(
    oracle: &mut dyn ShedOracle,
    max_pu: f64,
    tol_pu: f64,
    to_mw: f64,
) -> Result<(Outcome, f64, Vec<Trial>, bool, Verdict), Error> {
    let mut trials = Vec::new();
    let trial = |oracle: &mut dyn ShedOracle, amount: f64, trials: &mut Vec<Trial>| {
        let v = oracle.run(amount)?;
        trials.push(Trial {
            total_mw: amount * to_mw,
            stable: v.is_stable(),
        });
        Ok::<Verdict, Error>(v)
    };
    let none = trial(oracle, 0.0, &mut trials)?;
    if none.is_stable() {
        return Ok((Outcome::NoShedNeeded, 0.0, trials, false, none));
    }
    let mut bracket = None;
    let mut last = none;
    let mut lower = 0.0;
    for share in COARSE_STEPS {
        let amount = share * max_pu;
        let v = trial(oracle, amount, &mut trials)?;
        if v.is_stable() {
            bracket = Some((lower, amount, v));
            break;
        }
        lower = amount;
        last = v;
    }
    let Some((mut lo, mut hi, mut hi_verdict)) = bracket else {
        return Ok((Outcome::Unsavable, max_pu, trials, false, last));
    };
    let mut non_monotone = false;
    for _ in 0..MAX_MONOTONE_ROUNDS {
        while hi - lo > tol_pu {
            let mid = 0.5 * (lo + hi);
            let v = trial(oracle, mid, &mut trials)?;
            if v.is_stable() {
                (hi, hi_verdict) = (mid, v);
            } else {
                lo = mid;
            }
        }
        let above = hi + 2.0 * tol_pu;
        if above >= max_pu {
            break;
        }
        let v = trial(oracle, above, &mut trials)?;
        if v.is_stable() {
            break;
        }
        // Stable at `hi`, unstable above it: not monotone. Search above the unstable point,
        // up to the next stable amount among the trials (or the whole range).
        non_monotone = true;
        let next_stable = trials
            .iter()
            .filter(|t| t.stable && t.total_mw > above * to_mw)
            .map(|t| t.total_mw / to_mw)
            .fold(f64::INFINITY, f64::min);
        lo = above;
        if next_stable.is_finite() {
            hi = next_stable;
            hi_verdict = trial(oracle, hi, &mut trials)?;
        } else {
            hi = max_pu;
            hi_verdict = trial(oracle, max_pu, &mut trials)?;
        }
        if !hi_verdict.is_stable() {
            return Ok((Outcome::Unsavable, max_pu, trials, true, hi_verdict));
        }
    }
    // Any stable trial below an unstable one also counts as non-monotone.
    for a in trials.iter().filter(|t| t.stable) {
        if trials.iter().any(|b| !b.stable && b.total_mw > a.total_mw) {
            non_monotone = true;
        }
    }
    Ok((Outcome::Shed, hi, trials, non_monotone, hi_verdict))
}

/// The simulation oracle: a snapshot at the action time, continued with each shed amount.
pub struct SimulationOracle<'g> {
    snapshot: Simulation<'g>,
    cands: &'g [Candidate],
    placement: Placement,
    disturbance: BusIdx,
    distance: &'g DistanceMatrix,
    t_action_s: f64,
    end_s: f64,
    bus_numbers: Vec<u32>,
    base_mva: f64,
    /// Simulations run so far.
    pub runs: u32,
}

impl<'g> SimulationOracle<'g> {
    /// Runs the contingency from the operating point up to the action time.
    #[allow(clippy::too_many_arguments)] // reason: the pieces of one labelling run, all needed
    pub fn new(
        op: &'g OperatingPoint,
        contingency: &Contingency,
        study: &Study,
        options: &SimulationOptions,
        cands: &'g [Candidate],
        distance: &'g DistanceMatrix,
        t_action_s: f64,
    ) -> Result<Self, Error> {
        let scenario = Scenario {
            name: contingency.description.clone(),
            events: contingency.events(&study.contingencies),
        };
        let mut snapshot = Simulation::new(&op.grid, &op.outages, &op.pf, &scenario, options)?;
        snapshot.run_to(t_action_s);
        Ok(SimulationOracle {
            snapshot,
            cands,
            placement: study.shedding.placement,
            disturbance: BusIdx(contingency.disturbance_bus),
            distance,
            t_action_s,
            end_s: options.duration_s,
            bus_numbers: op.grid.buses.iter().map(|b| b.number).collect(),
            base_mva: op.grid.s_base_mva,
            runs: 0,
        })
    }

    /// Where a total amount goes: (bus, pu) for every candidate that sheds.
    fn placed(&self, total_pu: f64) -> Vec<(BusIdx, f64)> {
        place(
            self.cands,
            total_pu,
            self.placement,
            self.disturbance,
            self.distance,
        )
        .into_iter()
        .zip(self.cands)
        .filter(|(p, _)| *p > 0.0)
        .map(|(p, c)| (c.bus, p))
        .collect()
    }

    /// Where a total amount goes: (bus number, MW) for every candidate that sheds.
    pub fn placement_mw(&self, total_pu: f64) -> Vec<(u32, f64)> {
        self.placed(total_pu)
            .into_iter()
            .map(|(bus, p)| (self.bus_numbers[bus.get()], p * self.base_mva))
            .collect()
    }

    /// Whether the run already failed before the action time (then no shed can help).
    pub fn failed_before_action(&self) -> bool {
        self.snapshot.stopped()
    }

    /// The shed events of a total amount.
    pub fn shed_events(&self, total_pu: f64) -> Vec<TimedEvent> {
        self.placed(total_pu)
            .into_iter()
            .map(|(bus, p_pu)| TimedEvent {
                t_s: self.t_action_s,
                event: Event::Shed { bus, p_pu },
            })
            .collect()
    }
}

impl SimulationOracle<'_> {
    /// Continues the snapshot with a given shed, (bus, pu) at the action time, to the end.
    pub fn run_placed(&mut self, shed_pu: &[(BusIdx, f64)]) -> Result<Verdict, Error> {
        self.runs += 1;
        let mut sim = self.snapshot.clone();
        let events: Vec<TimedEvent> = shed_pu
            .iter()
            .filter(|(_, p)| *p > 0.0)
            .map(|&(bus, p_pu)| TimedEvent {
                t_s: self.t_action_s,
                event: Event::Shed { bus, p_pu },
            })
            .collect();
        if !events.is_empty() {
            sim.add_events(&events)?;
        }
        sim.run_to(self.end_s);
        Ok(sim.finish().verdict)
    }
}

impl ShedOracle for SimulationOracle<'_> {
    fn run(&mut self, total_pu: f64) -> Result<Verdict, Error> {
        self.runs += 1;
        let mut sim = self.snapshot.clone();
        if total_pu > 0.0 {
            sim.add_events(&self.shed_events(total_pu))?;
        }
        sim.run_to(self.end_s);
        Ok(sim.finish().verdict)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use holdfast_core::dynamics::{Criterion, Failure, Margins};

    /// Stable exactly when the amount is at least `threshold` and not in `bad` (a band of
    /// instability above it, for non-monotone cases).
    struct Threshold {
        threshold: f64,
        bad: Option<(f64, f64)>,
    }

    fn verdict(stable: bool) -> Verdict {
        Verdict {
            failure: (!stable).then(|| Failure {
                criterion: Criterion::FrequencyNadir,
                time_s: 1.0,
                location: "test".into(),
                value: 0.0,
            }),
            margins: Margins::at_start(60.0),
            end_time_s: 10.0,
            stopped_early: false,
            wind_trips: Vec::new(),
            motor_trips: Vec::new(),
        }
    }

    fn oracle(threshold: f64, bad: Option<(f64, f64)>) -> Threshold {
        Threshold { threshold, bad }
    }

    impl ShedOracle for Threshold {
        fn run(&mut self, x: f64) -> Result<Verdict, Error> {
            let in_bad = self.bad.is_some_and(|(a, b)| x > a && x < b);
            Ok(verdict(x >= self.threshold && !in_bad))
        }
    }

    #[test]
    fn bisection_finds_a_known_minimum_within_tolerance() {
        // Synthetic monotone oracle with the exact minimum known: the label must be at or
        // above it and less than one tolerance above it.
        for threshold in [0.001, 0.137, 0.5, 0.731_9, 0.999] {
            let mut o = oracle(threshold, None);
            let (outcome, label, trials, non_mono, _) = bisect(&mut o, 1.0, 0.01, 100.0).unwrap();
            assert_eq!(outcome, Outcome::Shed);
            assert!(
                label >= threshold && label - threshold <= 0.01,
                "{threshold}: {label}"
            );
            assert!(!non_mono);
            // 0, up to four quarters, log2(0.25/0.01) = 5 halvings, one robustness check.
            assert!(trials.len() <= 11, "{}", trials.len());
        }
    }

    #[test]
    fn ends_of_the_range_give_no_shed_and_unsavable() {
        let mut o = oracle(0.0, None);
        assert_eq!(
            bisect(&mut o, 1.0, 0.01, 1.0).unwrap().0,
            Outcome::NoShedNeeded
        );
        let mut o = oracle(2.0, None);
        assert_eq!(
            bisect(&mut o, 1.0, 0.01, 1.0).unwrap().0,
            Outcome::Unsavable
        );
    }

    #[test]
    fn failing_with_all_shed_is_not_unsavable_when_less_shed_saves() {
        // Over-shedding fails (over-frequency) above 0.8; 0.3 and more, up to 0.8, is stable.
        let mut o = oracle(0.3, Some((0.8, 2.0)));
        let (outcome, label, _, _, _) = bisect(&mut o, 1.0, 0.01, 1.0).unwrap();
        assert_eq!(outcome, Outcome::Shed);
        assert!((0.3..=0.31).contains(&label), "{label}");
    }

    #[test]
    fn an_unstable_band_above_the_first_stable_amount_is_flagged_and_skipped() {
        // Stable from 0.5, but unstable again in (0.505, 0.6): bisection lands on 0.5, the
        // check at 0.5 + 2 tol finds the band, and the search continues above it.
        let mut o = oracle(0.5, Some((0.505, 0.6)));
        let (outcome, label, _, non_mono, _) = bisect(&mut o, 1.0, 0.01, 1.0).unwrap();
        assert_eq!(outcome, Outcome::Shed);
        assert!(non_mono);
        assert!((0.6..=0.61).contains(&label), "{label}");
    }
}
