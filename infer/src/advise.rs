//! The advisor: from a snapshot of the grid and the contingency that just happened to a
//! checked load-shedding action.
//!
//! 1. **Predict**: features, the plain-Rust forward pass and the model's safety margin give a
//!    shed per bus (reused buffers: no allocation once warm).
//! 2. **Re-check**: the snapshot is solved as a power flow and the contingency is simulated
//!    with `holdfast-core`'s dynamic engine, with the study settings stored in the model file
//!    and early stop; the action lands at the action time.
//! 3. **Escalate** if the re-check fails, in the direction the failure points: too little shed
//!    (frequency below its floor or ending below its band, voltage or angle failures) raises
//!    the total to `max(1.25 x total, total + 5 % of all shed-able load)`, capped at all
//!    shed-able load, keeping the model's per-bus amounts and placing the extra over the room
//!    left at each bus by the study's placement rule; too much shed (frequency above its
//!    ceiling, or ending above its band) lowers it to `min(total / 1.25, total - 5 %)`, scaling
//!    the model's amounts down. Once a too-small and a too-large total are both known, the
//!    search bisects between them, down to 1 % of the shed-able load. It stops at the first
//!    stable action, or when the range or the budget (time and simulations) is exhausted.
//! 4. **Conservative action** otherwise. After a unit trip: the lost output, MW for MW, placed
//!    by the study's rule (the balance restored without counting on reserves). After a fault:
//!    all shed-able load in the faulted bus's `area` (the grid's if that area has none). It is
//!    checked if the budget still allows.
//!
//! The answer always says which path produced it, the verdict of its check (or that it is
//! unchecked) and the time each stage took.
//!
//! Decision support for studies and operators, not a protection scheme: local grid codes,
//! operating procedures and licensed engineers decide ([`CAUTION`]).

use std::cell::RefCell;
use std::path::Path;
use std::time::{Duration, Instant};

use holdfast_core::dynamics::{
    Event, Failure, Scenario, Simulation, SimulationOptions, SimulationResult, TimedEvent, Verdict,
    contingency_events, simulate,
};
use holdfast_core::format::{grid_fingerprint, load_grid};
use holdfast_core::powerflow::{PowerFlowOptions, PowerFlowSolution, solve_from};
use holdfast_core::shed::{Candidate, place};
use holdfast_core::topology::islands;
use holdfast_core::{BranchIdx, BusIdx, Complex, Element, Grid, MachineIdx, Outages};
use serde::{Deserialize, Serialize};

use crate::features::{
    Disturbance, DisturbanceKind, FeatureBuffers, FeatureError, GridContext, Snapshot,
    featurise_into,
};
use crate::forward::{ForwardBuffers, Network, apply_margin_in_place};
use crate::model::{Architecture, ModelError, ModelFile, RecheckSettings};

/// The caution shown wherever Holdfast advises on shedding load.
pub const CAUTION: &str = "Decision support for studies and operators, not a protection \
    scheme: local grid codes, operating procedures and licensed engineers decide.";

/// Growth of the total at each escalation step.
pub const ESCALATION_FACTOR: f64 = 1.25;
/// Smallest escalation step, share of all shed-able load (so a zero prediction escalates).
pub const ESCALATION_MIN_STEP: f64 = 0.05;
/// The search stops bisecting between a too-small and a too-large total closer than this
/// share of all shed-able load.
pub const ESCALATION_RESOLUTION: f64 = 0.01;
/// Longest time budget accepted (longer ones are cut to it).
pub const MAX_BUDGET: Duration = Duration::from_secs(3600);
/// Simulated time between budget checks during a re-check run, s.
const BUDGET_CHECK_EVERY_S: f64 = 0.25;

/// Why advice could not be given. Each names the field, element or value at fault.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum AdviseError {
    /// The model file is unreadable, damaged, of another version or for another grid.
    #[error(transparent)]
    Model(#[from] ModelError),
    /// The grid file cannot be read.
    #[error(transparent)]
    Grid(holdfast_core::Error),
    /// The snapshot does not fit the grid or holds impossible values.
    #[error("snapshot: {0}")]
    Snapshot(#[from] FeatureError),
    /// The contingency names unknown elements or is not one the model knows.
    #[error("contingency: {0}")]
    Contingency(String),
    /// The grid state cannot be re-checked (it splits into islands, or its power flow fails).
    #[error("re-check: {0}")]
    State(String),
    /// A request's own fields are wrong.
    #[error("request: {0}")]
    Request(String),
}

/// The contingency as a caller names it: by bus number and element ids.
///
/// Kinds the model knows: a fault at a bus cleared by tripping one branch (branch fault) or
/// two or more (double fault), each touching the faulted bus; the trip of one synchronous
/// machine; the trip of one wind plant.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ContingencySpec {
    /// Faulted bus number, for faults.
    #[serde(default)]
    pub fault_bus: Option<u32>,
    /// Ids of the branches, machine or wind plant tripped.
    #[serde(default)]
    pub trip: Vec<String>,
}

impl ContingencySpec {
    /// Parses the command-line form: comma-separated `fault=BUS` and `trip=ID` items, e.g.
    /// `fault=7,trip=L7-8` or `trip=G2`.
    pub fn parse(text: &str) -> Result<ContingencySpec, AdviseError> {
        let mut spec = ContingencySpec::default();
        for item in text.split(',').map(str::trim).filter(|s| !s.is_empty()) {
            match item.split_once('=') {
                Some(("fault", bus)) => {
                    let n = bus.trim().parse::<u32>().map_err(|_| {
                        AdviseError::Contingency(format!(
                            "`{item}`: the faulted bus must be a bus number"
                        ))
                    })?;
                    if spec.fault_bus.replace(n).is_some() {
                        return Err(AdviseError::Contingency(
                            "more than one faulted bus".to_string(),
                        ));
                    }
                }
                Some(("trip", id)) => spec.trip.push(id.trim().to_string()),
                _ => {
                    return Err(AdviseError::Contingency(format!(
                        "`{item}`: expected `fault=BUS` or `trip=ID`"
                    )));
                }
            }
        }
        Ok(spec)
    }

    /// The command-line form [`ContingencySpec::parse`] reads, e.g. `fault=7,trip=L7-8`.
    pub fn text(&self) -> String {
        self.fault_bus
            .map(|b| format!("fault={b}"))
            .into_iter()
            .chain(self.trip.iter().map(|t| format!("trip={t}")))
            .collect::<Vec<_>>()
            .join(",")
    }

    /// The names of a resolved disturbance ([`ContingencySpec::resolve`] reversed). The
    /// disturbance's indices must belong to `grid`.
    pub fn of(grid: &Grid, dist: &Disturbance) -> ContingencySpec {
        ContingencySpec {
            fault_bus: dist.fault_bus.map(|b| grid.buses[b.get()].number),
            trip: dist
                .tripped_branches
                .iter()
                .map(|b| grid.branches[b.get()].id.clone())
                .chain(
                    dist.tripped_machine
                        .map(|m| grid.machines[m.get()].id.clone()),
                )
                .chain(
                    dist.tripped_wind
                        .map(|w| grid.wind_plants[w.get()].id.clone()),
                )
                .collect(),
        }
    }

    /// Resolves the names against a grid, checking the combination is a kind the model knows.
    pub fn resolve(&self, grid: &Grid) -> Result<Disturbance, AdviseError> {
        let bad = |m: String| AdviseError::Contingency(m);
        let fault_bus = match self.fault_bus {
            None => None,
            Some(n) => Some(
                grid.bus_idx(n)
                    .ok_or_else(|| bad(format!("fault_bus {n}: the grid has no such bus")))?,
            ),
        };
        let (mut branches, mut machines, mut winds) = (Vec::new(), Vec::new(), Vec::new());
        for id in &self.trip {
            match grid.element(id) {
                Some(Element::Branch(k)) => branches.push(k),
                Some(Element::Machine(k)) => machines.push(k),
                Some(Element::Wind(k)) => winds.push(k),
                None => {
                    return Err(bad(format!(
                        "trip `{id}`: the grid has no branch, machine or wind plant with this id"
                    )));
                }
            }
        }
        let one_unit = |what: &str| {
            bad(format!(
                "a {what} trip names exactly one unit and nothing else; got {} branch(es), {} \
                 machine(s), {} wind plant(s){}",
                branches.len(),
                machines.len(),
                winds.len(),
                if fault_bus.is_some() {
                    " and a fault"
                } else {
                    ""
                }
            ))
        };
        match fault_bus {
            Some(bus) => {
                if branches.is_empty() || !machines.is_empty() || !winds.is_empty() {
                    return Err(bad(format!(
                        "a fault at bus {} must be cleared by tripping one or more branches at \
                         that bus, and nothing else",
                        grid.buses[bus.get()].number
                    )));
                }
                for &k in &branches {
                    let b = &grid.branches[k.get()];
                    if b.from != bus && b.to != bus {
                        return Err(bad(format!(
                            "trip `{}` does not touch the faulted bus {}",
                            b.id,
                            grid.buses[bus.get()].number
                        )));
                    }
                }
                let kind = if branches.len() == 1 {
                    DisturbanceKind::BranchFault
                } else {
                    DisturbanceKind::DoubleFault
                };
                Ok(Disturbance {
                    kind,
                    disturbance_bus: bus,
                    fault_bus: Some(bus),
                    tripped_branches: branches,
                    tripped_machine: None,
                    tripped_wind: None,
                })
            }
            None if machines.len() == 1 && branches.is_empty() && winds.is_empty() => {
                let m = machines[0];
                Ok(Disturbance {
                    kind: DisturbanceKind::MachineTrip,
                    disturbance_bus: grid.machines[m.get()].bus,
                    fault_bus: None,
                    tripped_branches: Vec::new(),
                    tripped_machine: Some(m),
                    tripped_wind: None,
                })
            }
            None if winds.len() == 1 && branches.is_empty() && machines.is_empty() => {
                let w = winds[0];
                Ok(Disturbance {
                    kind: DisturbanceKind::WindTrip,
                    disturbance_bus: grid.wind_plants[w.get()].bus,
                    fault_bus: None,
                    tripped_branches: Vec::new(),
                    tripped_machine: None,
                    tripped_wind: Some(w),
                })
            }
            None if !machines.is_empty() => Err(one_unit("machine")),
            None if !winds.is_empty() => Err(one_unit("wind-plant")),
            None if !branches.is_empty() => Err(bad(
                "branch trips without a fault are not a contingency kind the model knows; \
                 give the faulted bus with `fault`"
                    .to_string(),
            )),
            None => Err(bad("nothing happened: give `fault` and `trip`".to_string())),
        }
    }
}

/// Time and work the re-check may spend.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Budget {
    /// Wall-clock time for the whole answer.
    pub time: Duration,
    /// Most simulations (the model's action, escalations, the conservative action).
    pub max_simulations: u32,
}

impl Default for Budget {
    /// 500 ms and 12 simulations: on the small demo grid a re-check run takes 5-15 ms, so this
    /// allows the whole escalation ladder with room to spare.
    fn default() -> Self {
        Budget {
            time: Duration::from_millis(500),
            max_simulations: 12,
        }
    }
}

/// One request: the state before the contingency, the contingency, and options.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Request {
    /// Caller's label, echoed in the answer.
    #[serde(default)]
    pub id: Option<String>,
    /// The grid state just before the contingency.
    pub snapshot: Snapshot,
    /// The contingency.
    pub contingency: ContingencySpec,
    /// Delay of the action after the contingency settled (fault cleared or unit tripped), s;
    /// default: the longest delay of the training study.
    #[serde(default)]
    pub action_delay_s: Option<f64>,
    /// Time budget, ms (default 500).
    #[serde(default)]
    pub budget_ms: Option<f64>,
    /// Most re-check simulations (default 12).
    #[serde(default)]
    pub max_simulations: Option<u32>,
}

/// Which path produced the action.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AdvicePath {
    /// The model's action (with its safety margin) passed the re-check.
    Model,
    /// The model's action failed the re-check; a larger one passed.
    Escalated,
    /// No action tried passed within the budget: all shed-able load near the disturbance.
    Conservative,
}

/// How the final action's re-check came out.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CheckOutcome {
    /// Simulated to the end of the window; every criterion held.
    Stable,
    /// A criterion failed.
    Unstable,
    /// Not simulated to a verdict (the budget ran out).
    Unchecked,
}

/// One re-check simulation.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CheckRecord {
    /// The action's total, MW.
    pub total_mw: f64,
    /// How it came out.
    pub outcome: CheckOutcome,
    /// The criterion that failed, if any.
    pub failed: Option<String>,
    /// When it failed, s.
    pub failed_at_s: Option<f64>,
    /// Where (bus or machine).
    pub failed_where: Option<String>,
    /// The value that crossed the limit, in the criterion's unit (degrees, share of
    /// pre-contingency voltage, Hz).
    pub failed_value: Option<f64>,
    /// Frequency nadir, Hz (none if unchecked).
    pub nadir_hz: Option<f64>,
    /// Lowest load-bus voltage after clearing, share of pre-contingency (none if unchecked).
    pub min_voltage_share: Option<f64>,
    /// Wall-clock time of the run, ms.
    pub ms: f64,
}

/// Shed at one bus.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct BusShed {
    /// Bus number.
    pub bus: u32,
    /// Load to shed, MW.
    pub mw: f64,
}

/// Time spent per stage.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Timings {
    /// Features, us.
    pub features_us: f64,
    /// Forward pass and margin, us.
    pub forward_us: f64,
    /// Power flow of the snapshot and the run up to the action time, ms.
    pub prepare_ms: f64,
    /// Re-check simulations after the action time, ms.
    pub checks_ms: f64,
    /// Everything, ms.
    pub total_ms: f64,
}

/// The answer.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Advice {
    /// The request's label.
    pub id: Option<String>,
    /// Which path produced the action.
    pub path: AdvicePath,
    /// Verdict of the final action's re-check.
    pub outcome: CheckOutcome,
    /// Shed per bus, MW (buses that shed nothing are left out), in bus order.
    pub shed: Vec<BusShed>,
    /// Total shed, MW.
    pub total_mw: f64,
    /// The model's total with its safety margin, before any escalation, MW.
    pub model_total_mw: f64,
    /// All load that may be shed, MW.
    pub sheddable_mw: f64,
    /// Time of the action in the re-check, s from the contingency's start.
    pub action_at_s: f64,
    /// Every re-check run, in order.
    pub checks: Vec<CheckRecord>,
    /// Time per stage.
    pub timings: Timings,
    /// Anything the caller should know (budget exhausted, snapshot inconsistent, ...).
    pub notes: Vec<String>,
}

/// Everything the prediction needs besides the model, reused between calls.
#[derive(Clone, Debug, Default)]
pub struct Workspace {
    features: FeatureBuffers,
    forward: ForwardBuffers,
    /// Per-bus shed with the margin, pu (the last prediction).
    shed_pu: Vec<f64>,
}

impl Workspace {
    /// The last prediction: shed per bus (grid order), pu, safety margin included.
    pub fn shed_pu(&self) -> &[f64] {
        &self.shed_pu
    }

    /// Shed-able load per bus (grid order) of the last prediction, pu.
    pub fn sheddable_pu(&self) -> &[f64] {
        &self.features.input.sheddable_pu
    }
}

thread_local! {
    /// Each serving thread's prediction buffers.
    static WORKSPACE: RefCell<Workspace> = RefCell::new(Workspace::default());
}

/// A loaded model for one grid, ready to serve from many threads.
#[derive(Clone, Debug)]
pub struct Advisor {
    grid: Grid,
    ctx: GridContext,
    network: Network,
    margin_share: f64,
    recheck: RecheckSettings,
    area_of_bus: Vec<u32>,
    model_summary: String,
}

/// The state re-checks start from: the snapshot's grid, outages and power flow.
struct State {
    grid: Grid,
    outages: Outages,
    pf: PowerFlowSolution,
}

impl Advisor {
    /// Checks that the model belongs to the grid (fingerprint) and unpacks its weights.
    /// `model_path` names the model in errors.
    pub fn new(model: &ModelFile, model_path: &Path, grid: Grid) -> Result<Advisor, AdviseError> {
        let fingerprint = grid_fingerprint(&grid).map_err(AdviseError::Grid)?;
        model.check_grid(fingerprint, model_path)?;
        let network = Network::new(model)?;
        if let Architecture::Mlp {
            n_bus, n_branch, ..
        } = model.architecture
            && (n_bus != grid.n_buses() || n_branch != grid.branches.len())
        {
            return Err(ModelError::Weights(format!(
                "this baseline model is fixed to {n_bus} buses and {n_branch} branches; the grid \
                 has {} and {}",
                grid.n_buses(),
                grid.branches.len()
            ))
            .into());
        }
        Ok(Advisor {
            ctx: GridContext::new(&grid),
            area_of_bus: grid.buses.iter().map(|b| b.area).collect(),
            network,
            margin_share: model.margin.share_of_sheddable,
            recheck: model.recheck.clone(),
            model_summary: format!(
                "{} model for grid \"{}\", trained on {} ({} loss), margin {:.1} % of shed-able \
                 load",
                model.architecture.name(),
                model.grid_name,
                model.training.dataset,
                model.training.loss,
                100.0 * model.margin.share_of_sheddable
            ),
            grid,
        })
    }

    /// Reads a model file and a grid file and checks they belong together.
    pub fn open(model_path: &Path, grid_path: &Path) -> Result<Advisor, AdviseError> {
        let model = ModelFile::read(model_path)?;
        let grid = load_grid(grid_path).map_err(AdviseError::Grid)?;
        Advisor::new(&model, model_path, grid)
    }

    /// The grid served.
    pub fn grid(&self) -> &Grid {
        &self.grid
    }

    /// One line about the model: architecture, grid, dataset, loss, margin.
    pub fn model_summary(&self) -> &str {
        &self.model_summary
    }

    /// The re-check settings from the model file.
    pub fn recheck_settings(&self) -> &RecheckSettings {
        &self.recheck
    }

    /// The model's action: shed per bus, pu, margin included, into `ws` (see
    /// [`Workspace::shed_pu`]). Validates the snapshot and the disturbance first. Allocates
    /// nothing once `ws` has served this grid.
    pub fn predict(
        &self,
        snap: &Snapshot,
        dist: &Disturbance,
        ws: &mut Workspace,
    ) -> Result<(), AdviseError> {
        self.predict_timed(snap, dist, ws, &mut Timings::default())
    }

    /// [`Advisor::predict`], recording the features' and the forward pass's time.
    fn predict_timed(
        &self,
        snap: &Snapshot,
        dist: &Disturbance,
        ws: &mut Workspace,
        timings: &mut Timings,
    ) -> Result<(), AdviseError> {
        let Workspace {
            features,
            forward,
            shed_pu,
        } = ws;
        let t = Instant::now();
        let input = featurise_into(&self.ctx, snap, dist, features)?;
        timings.features_us = micros(t.elapsed());
        let t = Instant::now();
        self.network.predict_into(input, forward, shed_pu)?;
        apply_margin_in_place(shed_pu, &input.sheddable_pu, self.margin_share);
        timings.forward_us = micros(t.elapsed());
        Ok(())
    }

    /// Answers a request: resolves the contingency, predicts, re-checks and escalates.
    pub fn advise(&self, request: &Request) -> Result<Advice, AdviseError> {
        let dist = request.contingency.resolve(&self.grid)?;
        let mut budget = Budget::default();
        if let Some(ms) = request.budget_ms {
            if !(ms.is_finite() && ms > 0.0 && ms <= MAX_BUDGET.as_secs_f64() * 1e3) {
                return Err(AdviseError::Request(format!(
                    "budget_ms {ms}: must be a positive number of at most {} ms",
                    MAX_BUDGET.as_millis()
                )));
            }
            budget.time = Duration::from_secs_f64(ms / 1e3);
        }
        if let Some(n) = request.max_simulations {
            budget.max_simulations = n;
        }
        let mut advice =
            self.advise_disturbance(&request.snapshot, &dist, request.action_delay_s, budget)?;
        advice.id = request.id.clone();
        Ok(advice)
    }

    /// Answers for a resolved disturbance. `action_delay_s`: delay of the action after the
    /// contingency settled (default: the longest delay of the training study).
    pub fn advise_disturbance(
        &self,
        snap: &Snapshot,
        dist: &Disturbance,
        action_delay_s: Option<f64>,
        budget: Budget,
    ) -> Result<Advice, AdviseError> {
        let start = Instant::now();
        let deadline = start + budget.time.min(MAX_BUDGET);
        let delay_s = action_delay_s.unwrap_or(self.recheck.action_delay_max_s);
        let mut timings = Timings::default();
        let (model_pu, sheddable_pu) = WORKSPACE.with(|cell| {
            let mut ws = cell.borrow_mut();
            self.predict_timed(snap, dist, &mut ws, &mut timings)?;
            Ok::<_, AdviseError>((ws.shed_pu().to_vec(), ws.sheddable_pu().to_vec()))
        })?;
        let s = self.grid.s_base_mva;
        let mut notes = Vec::new();

        let t = Instant::now();
        let state = self.state(snap, dist, &mut notes)?;
        let (action_at_s, options, scenario) = self.run_setup(dist, delay_s)?;
        let mut before =
            Simulation::new(&state.grid, &state.outages, &state.pf, &scenario, &options)
                .map_err(|e| AdviseError::State(e.to_string()))?;
        let reached = run_within(&mut before, action_at_s, deadline);
        timings.prepare_ms = millis(t.elapsed());

        let mut run = Recheck {
            before,
            action_at_s,
            end_s: options.duration_s,
            deadline,
            simulations_left: budget.max_simulations,
            checks: Vec::new(),
            s_base_mva: s,
            frequency_hz: self.grid.frequency_hz,
        };
        let sheddable_total: f64 = sheddable_pu.iter().sum();
        let t = Instant::now();
        let (path, outcome, action) = if !reached {
            notes.push(format!(
                "the time budget ({:.0} ms) ran out before the action time: the model's action \
                 is unchecked",
                budget.time.as_secs_f64() * 1e3
            ));
            (AdvicePath::Model, CheckOutcome::Unchecked, model_pu.clone())
        } else if run.before.stopped() {
            notes.push(
                "the grid fails before the action time whatever is shed: the verdict cannot be \
                 changed by shedding; the model's action is returned"
                    .into(),
            );
            let (outcome, _) = run.check(&model_pu);
            (AdvicePath::Model, outcome, model_pu.clone())
        } else {
            self.search(&mut run, &model_pu, &sheddable_pu, snap, dist, &mut notes)
        };
        timings.checks_ms = millis(t.elapsed());
        timings.total_ms = millis(start.elapsed());
        if path == AdvicePath::Conservative && sheddable_total <= 0.0 {
            notes.push("no load may be shed in this snapshot".into());
        }
        Ok(Advice {
            id: None,
            path,
            outcome,
            shed: action
                .iter()
                .enumerate()
                .filter(|(_, p)| **p > 0.0)
                .map(|(b, p)| BusShed {
                    bus: self.grid.buses[b].number,
                    mw: p * s,
                })
                .collect(),
            total_mw: action.iter().sum::<f64>() * s,
            model_total_mw: model_pu.iter().sum::<f64>() * s,
            sheddable_mw: sheddable_total * s,
            action_at_s,
            checks: run.checks,
            timings,
            notes,
        })
    }

    /// The action time, the re-check's simulation options and the contingency's events.
    fn run_setup(
        &self,
        dist: &Disturbance,
        delay_s: f64,
    ) -> Result<(f64, SimulationOptions, Scenario), AdviseError> {
        if !(delay_s.is_finite() && (0.0..=60.0).contains(&delay_s)) {
            return Err(AdviseError::Request(format!(
                "action_delay_s {delay_s}: must be between 0 and 60 s"
            )));
        }
        let timing = self.recheck.timing;
        let action_at_s = timing.settled_at_s(dist.fault_bus.is_some()) + delay_s;
        let options = SimulationOptions {
            early_stop: true,
            record: false,
            ..self.recheck.simulation.clone()
        };
        if action_at_s >= options.duration_s {
            return Err(AdviseError::Request(format!(
                "the action at {action_at_s:.3} s falls after the re-check window of {} s",
                options.duration_s
            )));
        }
        let scenario = Scenario {
            name: "advice re-check".into(),
            events: contingency_events(
                &timing,
                dist.fault_bus,
                &dist.tripped_branches,
                dist.tripped_machine,
                dist.tripped_wind,
            ),
        };
        Ok((action_at_s, options, scenario))
    }

    /// Simulates the contingency with a given shed (bus number and MW, at the action time)
    /// over the whole window, recording the signals: for plots and reports of an advised
    /// action. Not budgeted.
    pub fn simulate_action(
        &self,
        snap: &Snapshot,
        dist: &Disturbance,
        action_delay_s: Option<f64>,
        shed: &[BusShed],
    ) -> Result<SimulationResult, AdviseError> {
        crate::features::validate(&self.ctx, snap, dist)?;
        let delay_s = action_delay_s.unwrap_or(self.recheck.action_delay_max_s);
        let state = self.state(snap, dist, &mut Vec::new())?;
        let (action_at_s, mut options, mut scenario) = self.run_setup(dist, delay_s)?;
        options.record = true;
        options.early_stop = false;
        let s = self.grid.s_base_mva;
        for b in shed {
            let bus = self.grid.bus_idx(b.bus).ok_or_else(|| {
                AdviseError::Request(format!("shed at bus {}: no such bus", b.bus))
            })?;
            scenario.events.push(TimedEvent {
                t_s: action_at_s,
                event: Event::Shed {
                    bus,
                    p_pu: b.mw / s,
                },
            });
        }
        simulate(&state.grid, &state.outages, &state.pf, &scenario, &options)
            .map_err(|e| AdviseError::State(e.to_string()))
    }

    /// The model's action, then the escalation search, then the conservative action.
    fn search(
        &self,
        run: &mut Recheck<'_>,
        model_pu: &[f64],
        sheddable_pu: &[f64],
        snap: &Snapshot,
        dist: &Disturbance,
        notes: &mut Vec<String>,
    ) -> (AdvicePath, CheckOutcome, Vec<f64>) {
        let all: f64 = sheddable_pu.iter().sum();
        let model_total: f64 = model_pu.iter().sum();
        let step = ESCALATION_MIN_STEP * all;
        // Largest total known to be too little, smallest known to be too much.
        let mut too_little: Option<f64> = None;
        let mut too_much: Option<f64> = None;
        let mut total = model_total;
        let mut action = model_pu.to_vec();
        let mut first = true;
        loop {
            let (outcome, direction) = run.check(&action);
            match outcome {
                CheckOutcome::Stable => {
                    let path = if first {
                        AdvicePath::Model
                    } else {
                        AdvicePath::Escalated
                    };
                    return (path, outcome, action);
                }
                CheckOutcome::Unchecked => break,
                CheckOutcome::Unstable => {}
            }
            first = false;
            match direction {
                Direction::TooMuch => too_much = Some(too_much.map_or(total, |h| h.min(total))),
                Direction::TooLittle => {
                    too_little = Some(too_little.map_or(total, |l| l.max(total)));
                }
            }
            let next = match (too_little, too_much) {
                (Some(lo), Some(hi)) if hi - lo > ESCALATION_RESOLUTION * all => 0.5 * (lo + hi),
                (Some(_), Some(_)) => break,
                (_, None) if total >= all * (1.0 - 1e-9) => break,
                (_, None) => (total * ESCALATION_FACTOR).max(total + step).min(all),
                (None, Some(_)) if total <= 1e-12 => break,
                (None, Some(_)) => (total / ESCALATION_FACTOR).min(total - step).max(0.0),
            };
            if !run.can_run() {
                break;
            }
            total = next;
            action = self.resize(model_pu, sheddable_pu, total, dist.disturbance_bus);
        }
        let conservative = self.conservative(sheddable_pu, snap, dist);
        let tried = run.checks.len();
        let outcome = if run.can_run() {
            run.check(&conservative).0
        } else {
            CheckOutcome::Unchecked
        };
        notes.push(match outcome {
            CheckOutcome::Unchecked => format!(
                "no action among the {tried} checked kept the grid stable before the budget or \
                 the search ran out: the conservative action is returned unchecked"
            ),
            CheckOutcome::Unstable => format!(
                "no action among the {} checked kept the grid stable, the conservative one \
                 included",
                tried + 1
            ),
            CheckOutcome::Stable => format!(
                "no action of the escalation search ({tried} checked) kept the grid stable; the \
                 conservative action did"
            ),
        });
        (AdvicePath::Conservative, outcome, conservative)
    }

    /// The model's action resized to `total_pu`: above the model's total, the model's amounts
    /// plus the extra placed over the room left at each bus by the study's placement rule;
    /// below it, the model's amounts scaled down alike.
    fn resize(
        &self,
        model_pu: &[f64],
        sheddable_pu: &[f64],
        total_pu: f64,
        disturbance: BusIdx,
    ) -> Vec<f64> {
        let model_total: f64 = model_pu.iter().sum();
        if total_pu <= model_total {
            let k = if model_total > 0.0 {
                total_pu / model_total
            } else {
                0.0
            };
            return model_pu.iter().map(|p| p * k).collect();
        }
        let room: Vec<f64> = model_pu
            .iter()
            .zip(sheddable_pu)
            .map(|(p, s)| (s - p).max(0.0))
            .collect();
        let mut out = model_pu.to_vec();
        for (b, p) in self.placed(&room, total_pu - model_total, disturbance) {
            out[b] += p;
        }
        out
    }

    /// `total_pu` spread over buses with `room_pu` by the study's placement rule: (bus, pu).
    fn placed(&self, room_pu: &[f64], total_pu: f64, disturbance: BusIdx) -> Vec<(usize, f64)> {
        let cands: Vec<Candidate> = room_pu
            .iter()
            .enumerate()
            .filter(|(_, r)| **r > 1e-12)
            .map(|(b, &r)| Candidate {
                bus: BusIdx(b as u32),
                sheddable_pu: r,
            })
            .collect();
        let amounts = place(
            &cands,
            total_pu,
            self.recheck.placement,
            disturbance,
            self.ctx.distance(),
        );
        cands.iter().map(|c| c.bus.get()).zip(amounts).collect()
    }

    /// The conservative action. A unit trip loses generation: shed the lost output, MW for MW
    /// (at most the shed-able load), placed by the study's rule around the tripped unit, so
    /// the balance is restored without counting on reserves. A fault threatens angle and
    /// voltage near it: shed all shed-able load in the faulted bus's area (the whole grid's if
    /// that area has none).
    fn conservative(&self, sheddable_pu: &[f64], snap: &Snapshot, dist: &Disturbance) -> Vec<f64> {
        let s = self.grid.s_base_mva;
        let lost_mw = match (dist.tripped_machine, dist.tripped_wind) {
            (Some(m), _) if snap.machine_on[m.get()] => Some(snap.machine_p_mw[m.get()]),
            (Some(_), _) => Some(0.0),
            (None, Some(w)) => Some(snap.wind_p_mw[w.get()]),
            (None, None) => None,
        };
        if let Some(lost_mw) = lost_mw {
            let mut out = vec![0.0; sheddable_pu.len()];
            for (b, p) in self.placed(sheddable_pu, (lost_mw / s).max(0.0), dist.disturbance_bus) {
                out[b] = p;
            }
            return out;
        }
        let area = self.area_of_bus[dist.disturbance_bus.get()];
        let in_area: Vec<f64> = sheddable_pu
            .iter()
            .zip(&self.area_of_bus)
            .map(|(&s, &a)| if a == area { s } else { 0.0 })
            .collect();
        if in_area.iter().sum::<f64>() > 0.0 {
            in_area
        } else {
            sheddable_pu.to_vec()
        }
    }

    /// The grid of the snapshot, its outages after checking it stays whole with and without
    /// the contingency, and its power flow.
    fn state(
        &self,
        snap: &Snapshot,
        dist: &Disturbance,
        notes: &mut Vec<String>,
    ) -> Result<State, AdviseError> {
        let grid = apply_snapshot(&self.grid, snap);
        let mut outages = Outages::none();
        outages.branches = (0..grid.branches.len())
            .filter(|&k| !snap.branch_closed[k])
            .map(|k| BranchIdx(k as u32))
            .collect();
        outages.machines = (0..grid.machines.len())
            .filter(|&k| !snap.machine_on[k])
            .map(|k| MachineIdx(k as u32))
            .collect();
        let before = islands(&grid, &outages);
        if before.members.len() > 1 {
            return Err(AdviseError::State(format!(
                "the snapshot's grid is split into {} islands (open branches); the model knows \
                 the grid whole",
                before.members.len()
            )));
        }
        let mut after = outages.clone();
        after.branches.extend(&dist.tripped_branches);
        let split = islands(&grid, &after);
        if split.members.len() > 1 {
            return Err(AdviseError::Contingency(format!(
                "tripping the branches splits the grid into {} islands; the model was trained on \
                 contingencies that keep it whole",
                split.members.len()
            )));
        }
        let start: Vec<Complex> = snap
            .bus_v_pu
            .iter()
            .zip(&snap.bus_angle_deg)
            .map(|(&v, &a)| Complex::from_polar(v, a.to_radians()))
            .collect();
        let pf = solve_from(&grid, &outages, &PowerFlowOptions::default(), &start)
            .converged()
            .map_err(|e| AdviseError::State(format!("the snapshot's power flow: {e}")))?;
        let reference_shift = reference_angle_shift(&grid, &pf, snap);
        let mut worst = (0.0, 0);
        for b in 0..grid.n_buses() {
            let dv = (pf.v_pu[b] - snap.bus_v_pu[b]).abs();
            let da = (pf.angle_rad[b] - snap.bus_angle_deg[b].to_radians() - reference_shift).abs();
            let gap = dv.max(da);
            if gap > worst.0 {
                worst = (gap, b);
            }
        }
        if worst.0 > 0.01 {
            notes.push(format!(
                "the snapshot is not a power-flow solution of its own injections: at bus {} the \
                 solved voltage differs by {:.3} pu (or rad); the re-check uses the solved state",
                grid.buses[worst.1].number, worst.0
            ));
        }
        Ok(State { grid, outages, pf })
    }
}

/// The angle the solved flow adds to the snapshot's angles (the reference may differ), rad.
fn reference_angle_shift(grid: &Grid, pf: &PowerFlowSolution, snap: &Snapshot) -> f64 {
    grid.buses
        .iter()
        .position(|b| b.is_reference)
        .map_or(0.0, |r| {
            pf.angle_rad[r] - snap.bus_angle_deg[r].to_radians()
        })
}

/// The grid with the snapshot's loads, dispatch, wind output and voltage set-points.
fn apply_snapshot(base: &Grid, snap: &Snapshot) -> Grid {
    let s = base.s_base_mva;
    let mut grid = base.clone();
    for (k, load) in grid.loads.iter_mut().enumerate() {
        load.p_pu = snap.load_p_mw[k] / s;
        load.q_pu = snap.load_q_mvar[k] / s;
        load.sheddable_fraction = if snap.load_p_mw[k] > 0.0 {
            (snap.load_sheddable_mw[k] / snap.load_p_mw[k]).clamp(0.0, 1.0)
        } else {
            0.0
        };
    }
    for (k, m) in grid.machines.iter_mut().enumerate() {
        m.p_pu = snap.machine_p_mw[k] / s;
        match m.v_set_pu {
            Some(_) => m.v_set_pu = Some(snap.bus_v_pu[m.bus.get()]),
            None => m.q_pu = snap.machine_q_mvar[k] / s,
        }
    }
    for (k, w) in grid.wind_plants.iter_mut().enumerate() {
        w.p_pu = snap.wind_p_mw[k] / s;
    }
    grid
}

/// The re-check runs of one request: the run up to the action time, continued per action.
struct Recheck<'g> {
    before: Simulation<'g>,
    action_at_s: f64,
    end_s: f64,
    deadline: Instant,
    simulations_left: u32,
    checks: Vec<CheckRecord>,
    s_base_mva: f64,
    frequency_hz: f64,
}

impl Recheck<'_> {
    /// Whether the budget allows another run.
    fn can_run(&self) -> bool {
        self.simulations_left > 0 && Instant::now() < self.deadline
    }

    /// Continues the pre-action run with `shed_pu` (per bus, pu) shed at the action time;
    /// returns the outcome and, if unstable, which way the total should move.
    fn check(&mut self, shed_pu: &[f64]) -> (CheckOutcome, Direction) {
        let t = Instant::now();
        let total_mw = shed_pu.iter().sum::<f64>() * self.s_base_mva;
        if !self.can_run() {
            return (CheckOutcome::Unchecked, Direction::TooLittle);
        }
        self.simulations_left -= 1;
        let mut sim = self.before.clone();
        let events: Vec<TimedEvent> = shed_pu
            .iter()
            .enumerate()
            .filter(|(_, p)| **p > 0.0)
            .map(|(b, &p_pu)| TimedEvent {
                t_s: self.action_at_s,
                event: Event::Shed {
                    bus: BusIdx(b as u32),
                    p_pu,
                },
            })
            .collect();
        // Shed events name buses of this grid at the current time: they always fit.
        let added = events.is_empty() || sim.add_events(&events).is_ok();
        let finished = added && run_within(&mut sim, self.end_s, self.deadline);
        let verdict: Option<Verdict> = finished.then(|| sim.finish().verdict);
        let outcome = match &verdict {
            None => CheckOutcome::Unchecked,
            Some(v) if v.is_stable() => CheckOutcome::Stable,
            Some(_) => CheckOutcome::Unstable,
        };
        let failure = verdict.as_ref().and_then(|v| v.failure.as_ref());
        let direction = match failure {
            Some(f) => Direction::of(f, self.frequency_hz),
            None => Direction::TooLittle,
        };
        self.checks.push(CheckRecord {
            total_mw,
            outcome,
            failed: failure.map(|f| f.criterion.to_string()),
            failed_at_s: failure.map(|f| f.time_s),
            failed_where: failure.map(|f| f.location.clone()),
            failed_value: failure.map(|f| f.value),
            nadir_hz: verdict.as_ref().map(|v| v.margins.nadir_hz),
            min_voltage_share: verdict
                .as_ref()
                .and_then(|v| v.margins.min_voltage_after_clearing),
            ms: millis(t.elapsed()),
        });
        (outcome, direction)
    }
}

/// Which way an unstable action's total should move.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Direction {
    /// Too little shed: frequency too low, voltage or angle failures.
    TooLittle,
    /// Too much shed: frequency rose above its ceiling or ended above its band, or voltages
    /// rose too high.
    TooMuch,
}

impl Direction {
    fn of(f: &Failure, nominal_hz: f64) -> Direction {
        if f.criterion.points_to_over_shed(f.value, nominal_hz) {
            Direction::TooMuch
        } else {
            Direction::TooLittle
        }
    }
}

/// Runs `sim` to `t_end_s` (or until it stops early), checking the clock every
/// [`BUDGET_CHECK_EVERY_S`] of simulated time; false if the deadline passed first.
fn run_within(sim: &mut Simulation<'_>, t_end_s: f64, deadline: Instant) -> bool {
    while !sim.stopped() && sim.time_s() < t_end_s - 1e-9 {
        if Instant::now() >= deadline {
            return false;
        }
        sim.run_to((sim.time_s() + BUDGET_CHECK_EVERY_S).min(t_end_s));
    }
    true
}

fn micros(d: Duration) -> f64 {
    d.as_secs_f64() * 1e6
}

fn millis(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

/// The answer to one JSON request line, as one JSON line: an [`Advice`], or
/// `{"id": ..., "error": "..."}` when the request cannot be answered. Never fails.
pub fn answer_json_line(advisor: &Advisor, line: &str) -> String {
    #[derive(Serialize)]
    struct Refusal<'a> {
        id: Option<&'a str>,
        error: String,
    }
    let request: Request = match from_json(line) {
        Ok(r) => r,
        Err(e) => {
            // Echo the id if the line is JSON with one, so the caller can match the error.
            let id = serde_json::from_str::<serde_json::Value>(line)
                .ok()
                .and_then(|v| v.get("id").and_then(|i| i.as_str().map(str::to_string)));
            let refusal = Refusal {
                id: id.as_deref(),
                error: format!("request: {e}"),
            };
            return serde_json::to_string(&refusal).unwrap_or_default();
        }
    };
    let answer = match advisor.advise(&request) {
        Ok(advice) => serde_json::to_string(&advice),
        Err(e) => serde_json::to_string(&Refusal {
            id: request.id.as_deref(),
            error: e.to_string(),
        }),
    };
    // Serialising plain data cannot fail.
    answer.unwrap_or_default()
}

/// Reads one JSON value, naming the field at fault, e.g. ``field `snapshot.load_p_mw[3]`:
/// invalid type: string "x", expected f64 at line 1 column 210``.
pub fn from_json<T: serde::de::DeserializeOwned>(text: &str) -> Result<T, String> {
    let mut de = serde_json::Deserializer::from_str(text);
    let value = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let path = e.path().to_string();
        let inner = e.into_inner();
        if path == "." {
            inner.to_string()
        } else {
            format!("field `{path}`: {inner}")
        }
    })?;
    de.end().map_err(|e| e.to_string())?;
    Ok(value)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::features::tests::ring;

    fn spec(text: &str) -> Result<Disturbance, AdviseError> {
        ContingencySpec::parse(text)?.resolve(&ring())
    }

    #[test]
    fn contingencies_resolve_to_the_kinds_the_model_knows() {
        let d = spec("fault=3, trip=B-C").unwrap();
        assert_eq!(d.kind, DisturbanceKind::BranchFault);
        assert_eq!(d.fault_bus, Some(BusIdx(2)));
        assert_eq!(d.tripped_branches, vec![BranchIdx(1)]);
        let d = spec("fault=3,trip=B-C,trip=A-C").unwrap();
        assert_eq!(d.kind, DisturbanceKind::DoubleFault);
        let d = spec("trip=G2").unwrap();
        assert_eq!(d.kind, DisturbanceKind::MachineTrip);
        assert_eq!(d.disturbance_bus, BusIdx(1));
        assert_eq!(d.tripped_machine, Some(MachineIdx(1)));
    }

    #[test]
    fn names_text_and_disturbances_convert_both_ways() {
        let grid = ring();
        for text in ["fault=3,trip=B-C", "fault=3,trip=B-C,trip=A-C", "trip=G2"] {
            let spec = ContingencySpec::parse(text).unwrap();
            assert_eq!(spec.text(), text);
            assert_eq!(
                ContingencySpec::of(&grid, &spec.resolve(&grid).unwrap()),
                spec
            );
        }
    }

    #[test]
    fn bad_contingencies_are_refused_naming_what_is_wrong() {
        for (text, needle) in [
            ("fault=9,trip=A-B", "fault_bus 9: the grid has no such bus"),
            (
                "fault=3,trip=Nowhere",
                "trip `Nowhere`: the grid has no branch",
            ),
            (
                "fault=3,trip=A-B",
                "trip `A-B` does not touch the faulted bus 3",
            ),
            (
                "fault=3",
                "must be cleared by tripping one or more branches",
            ),
            ("trip=A-B", "branch trips without a fault"),
            ("trip=G1,trip=G2", "exactly one unit"),
            ("", "nothing happened"),
            ("fault=x", "`fault=x`: the faulted bus must be a bus number"),
            ("fault=1,fault=2", "more than one faulted bus"),
            ("open=A-B", "expected `fault=BUS` or `trip=ID`"),
        ] {
            let e = spec(text).unwrap_err().to_string();
            assert!(e.starts_with("contingency: "), "{text}: {e}");
            assert!(e.contains(needle), "{text}: {e}");
        }
    }

    #[test]
    fn json_errors_name_the_field() {
        let e = from_json::<Snapshot>(r#"{"bus_v_pu": [1.0, "x"]}"#).unwrap_err();
        assert!(
            e.starts_with("field `bus_v_pu[1]`: invalid type: string"),
            "{e}"
        );
        let e = from_json::<ContingencySpec>(r#"{"fault_bus": 3, "trips": []}"#).unwrap_err();
        assert!(e.contains("unknown field `trips`"), "{e}");
        let e = from_json::<ContingencySpec>(r#"{"fault_bus": 3} x"#).unwrap_err();
        assert!(e.contains("trailing characters"), "{e}");
    }
}
