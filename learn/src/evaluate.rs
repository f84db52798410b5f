//! Evaluation of a model file on a dataset: accuracy of the predicted totals, the under-shed
//! rate with and without the safety margin, and the real check: every case re-simulated with
//! the advised per-bus shed, scored by an expected cost.
//!
//! Cost of one case, MW: the shed itself when the run is stable; when it is not, the load of
//! the area that fails (the area of the bus or machine the failed criterion names; the whole
//! grid for frequency and numerical failures) plus whatever was shed outside that area.

use std::collections::BTreeMap;

use holdfast_core::BusIdx;
use holdfast_infer::features::DisturbanceKind;
use holdfast_infer::forward::{Network, apply_margin};
use holdfast_infer::model::{ModelError, ModelFile};
use holdfast_sim::label::RunSummary;
use rayon::prelude::*;

use crate::data::{DataError, Dataset, Example, Split};

/// One evaluated case.
#[derive(Clone, Debug, PartialEq)]
pub struct Case {
    /// Sample index.
    pub index: u64,
    /// Contingency kind.
    pub kind: DisturbanceKind,
    /// Labelled total, MW (0 when no shed is needed).
    pub true_mw: f64,
    /// Predicted total without margin, MW.
    pub raw_mw: f64,
    /// Advised total (with the margin), MW.
    pub advised_mw: f64,
    /// Whether the advised action was stable when re-simulated (`None`: not simulated).
    pub stable: Option<bool>,
    /// The failed criterion and where, if not stable.
    pub failure: Option<String>,
    /// Cost, MW (see the module text); `None` when not simulated.
    pub cost_mw: Option<f64>,
}

impl Case {
    /// Whether the sample needs shed.
    pub fn needs_shed(&self) -> bool {
        self.true_mw > 0.0
    }
}

/// Figures over a set of cases.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Metrics {
    /// Cases.
    pub cases: usize,
    /// Cases that need shed.
    pub need_shed: usize,
    /// Mean absolute percentage error of the raw total, on cases that need shed, %.
    pub mape_pct: f64,
    /// Share of cases needing shed whose raw total is below the label, %.
    pub under_raw_pct: f64,
    /// The same with the margin, %.
    pub under_pct: f64,
    /// Share of simulated cases that were stable with the advised action, %.
    pub success_pct: Option<f64>,
    /// Mean of max(advised - label, 0), MW, over all cases.
    pub mean_excess_mw: f64,
    /// Mean cost, MW, over simulated cases.
    pub expected_cost_mw: Option<f64>,
}

impl Metrics {
    /// Figures of these cases.
    pub fn of<'a>(cases: impl Iterator<Item = &'a Case> + Clone) -> Metrics {
        let all: Vec<&Case> = cases.collect();
        let shed: Vec<&&Case> = all.iter().filter(|c| c.needs_shed()).collect();
        let pct = |k: usize, n: usize| {
            if n == 0 {
                0.0
            } else {
                100.0 * k as f64 / n as f64
            }
        };
        let sim: Vec<&&Case> = all.iter().filter(|c| c.stable.is_some()).collect();
        Metrics {
            cases: all.len(),
            need_shed: shed.len(),
            mape_pct: if shed.is_empty() {
                0.0
            } else {
                100.0
                    * shed
                        .iter()
                        .map(|c| (c.raw_mw - c.true_mw).abs() / c.true_mw)
                        .sum::<f64>()
                    / shed.len() as f64
            },
            under_raw_pct: pct(
                shed.iter().filter(|c| c.raw_mw < c.true_mw).count(),
                shed.len(),
            ),
            under_pct: pct(
                shed.iter().filter(|c| c.advised_mw < c.true_mw).count(),
                shed.len(),
            ),
            success_pct: (!sim.is_empty()).then(|| {
                pct(
                    sim.iter().filter(|c| c.stable == Some(true)).count(),
                    sim.len(),
                )
            }),
            mean_excess_mw: if all.is_empty() {
                0.0
            } else {
                all.iter()
                    .map(|c| (c.advised_mw - c.true_mw).max(0.0))
                    .sum::<f64>()
                    / all.len() as f64
            },
            expected_cost_mw: (!sim.is_empty())
                .then(|| sim.iter().filter_map(|c| c.cost_mw).sum::<f64>() / sim.len() as f64),
        }
    }
}

/// An evaluation.
#[derive(Clone, Debug)]
pub struct Evaluation {
    /// Every case.
    pub cases: Vec<Case>,
    /// Unsavable samples among those asked for (no action helps; not scored).
    pub unsavable: usize,
}

impl Evaluation {
    /// Figures over all cases.
    pub fn overall(&self) -> Metrics {
        Metrics::of(self.cases.iter())
    }

    /// Figures per contingency kind (kinds with cases only).
    pub fn by_kind(&self) -> BTreeMap<&'static str, Metrics> {
        DisturbanceKind::ALL
            .iter()
            .filter(|k| self.cases.iter().any(|c| c.kind == **k))
            .map(|k| {
                (
                    k.name(),
                    Metrics::of(self.cases.iter().filter(|c| c.kind == *k)),
                )
            })
            .collect()
    }
}

/// The load lost when a run fails: the failing area's load plus the shed outside it, MW.
fn failure_cost_mw(data: &Dataset, e: &Example, shed_pu: &[f64], v: &RunSummary) -> f64 {
    let grid = data.grid();
    let s = grid.s_base_mva;
    let load_pu = |b: usize| f64::from(e.input.bus_x[b * holdfast_infer::features::N_BUS_FEATURES]);
    let area = v.failed_where.as_deref().and_then(|w| {
        if let Some(n) = w.strip_prefix("bus ") {
            n.trim()
                .parse::<u32>()
                .ok()
                .and_then(|n| grid.bus_idx(n))
                .map(|b| grid.buses[b.get()].area)
        } else if let Some(id) = w.strip_prefix("machine ") {
            let id = id.trim_matches('"');
            grid.machines
                .iter()
                .find(|m| m.id == id)
                .map(|m| grid.buses[m.bus.get()].area)
        } else {
            None
        }
    });
    let in_area = |b: usize| area.is_none_or(|a| grid.buses[b].area == a);
    let lost: f64 = (0..grid.n_buses())
        .filter(|&b| in_area(b))
        .map(load_pu)
        .sum();
    let shed_outside: f64 = (0..grid.n_buses())
        .filter(|&b| !in_area(b))
        .map(|b| shed_pu[b])
        .sum();
    (lost + shed_outside) * s
}

/// Errors of an evaluation.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum EvaluateError {
    /// The model file.
    #[error(transparent)]
    Model(#[from] ModelError),
    /// The dataset.
    #[error(transparent)]
    Data(#[from] DataError),
}

fn worker_pool(jobs: usize) -> Result<rayon::ThreadPool, ModelError> {
    rayon::ThreadPoolBuilder::new()
        .num_threads(jobs.max(1))
        .build()
        .map_err(|e| ModelError::Weights(format!("cannot start worker threads: {e}")))
}

/// Evaluates a model on one split of a dataset (every savable sample for `None`), reading it
/// shard by shard, so only the cases (a few numbers each) are held. `resimulate` re-runs every
/// case with the advised shed (in parallel on `jobs` threads), calling `tick` after each case.
pub fn evaluate_split(
    model: &ModelFile,
    data: &Dataset,
    split: Option<Split>,
    resimulate: bool,
    jobs: usize,
    tick: &(dyn Fn() + Sync),
) -> Result<Evaluation, EvaluateError> {
    /// Examples handed to the worker threads at once.
    const CHUNK: usize = 256;
    let net = Network::new(model)?;
    let share = model.margin.share_of_sheddable;
    let mut cases = Vec::new();
    let mut chunk: Vec<Example> = Vec::with_capacity(CHUNK);
    let mut run = |chunk: &mut Vec<Example>| -> Result<(), EvaluateError> {
        let refs: Vec<&Example> = chunk.iter().collect();
        cases.extend(cases_of(&net, share, data, &refs, resimulate, tick)?);
        chunk.clear();
        Ok(())
    };
    worker_pool(jobs)?.install(|| {
        data.for_each_shard(None, |shard| {
            for e in shard.iter().filter(|e| split.is_none_or(|s| e.split == s)) {
                chunk.push(e.clone());
                if chunk.len() == CHUNK {
                    run(&mut chunk)?;
                }
            }
            Ok::<(), EvaluateError>(())
        })?;
        run(&mut chunk)
    })?;
    Ok(Evaluation {
        cases,
        unsavable: data.unsavable_in(split),
    })
}

/// The cases of these examples, in parallel on the current thread pool.
fn cases_of(
    net: &Network,
    share: f64,
    data: &Dataset,
    examples: &[&Example],
    resimulate: bool,
    tick: &(dyn Fn() + Sync),
) -> Result<Vec<Case>, ModelError> {
    let s = data.grid().s_base_mva;
    examples
        .par_iter()
        .map(|e| {
            let raw = net.predict(&e.input)?;
            let advised = apply_margin(&raw, &e.input.sheddable_pu, share);
            let advised_pu: f64 = advised.iter().sum();
            let mut case = Case {
                index: e.index,
                kind: e.kind,
                true_mw: e.total_pu * s,
                raw_mw: raw.iter().sum::<f64>() * s,
                advised_mw: advised_pu * s,
                stable: None,
                failure: None,
                cost_mw: None,
            };
            if resimulate {
                if !e.needs_shed() && advised_pu <= 0.0 {
                    // Stable without shed, as labelled: nothing to run.
                    case.stable = Some(true);
                    case.cost_mw = Some(0.0);
                } else {
                    let shed: Vec<(BusIdx, f64)> = advised
                        .iter()
                        .enumerate()
                        .filter(|(_, p)| **p > 0.0)
                        .map(|(b, &p)| (BusIdx(b as u32), p))
                        .collect();
                    match data.generator.check_action(e.index, &shed) {
                        Ok(v) => {
                            let stable = v.failed.is_none();
                            case.stable = Some(stable);
                            case.cost_mw = Some(if stable {
                                advised_pu * s
                            } else {
                                failure_cost_mw(data, e, &advised, &v)
                            });
                            case.failure = v.failed.as_ref().map(|f| {
                                format!("{f} at {}", v.failed_where.clone().unwrap_or_default())
                            });
                        }
                        Err(message) => {
                            case.failure = Some(format!("not simulated: {message}"));
                        }
                    }
                }
            }
            tick();
            Ok(case)
        })
        .collect()
}
