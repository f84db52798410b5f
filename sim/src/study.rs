//! The study file: what to sample, which contingencies, how to shed and judge, how finely to
//! bisect. Our own TOML format, documented by the annotated example
//! `scenarios/quillmoor-study.toml`; every problem is reported with file, line, field and value.

pub use holdfast_core::format::fnv1a64;
use std::path::{Path, PathBuf};

use holdfast_core::dynamics::{MachineModelChoice, SimulationOptions, StabilityCriteria};
pub use holdfast_core::shed::Placement;
use holdfast_core::{Error, Grid, Problem, format};
use serde::Deserialize;
use toml::Spanned;

/// The study-file versions this build reads.
pub const STUDY_FORMAT_VERSIONS: [i64; 1] = [1];

/// A validated study. Quantities are in engineering units as in the file, except where the
/// name says per unit.
#[derive(Clone, Debug, PartialEq)]
pub struct Study {
    /// Descriptive name.
    pub name: String,
    /// The grid file, resolved against the study file's folder.
    pub grid_path: PathBuf,
    /// Seed of every random draw: sample `i` depends only on (seed, i).
    pub seed: u64,
    /// Samples per shard file.
    pub shard_size: usize,
    /// System load level and per-area factors.
    pub load: LoadSampling,
    /// Wind speeds and the plants' power curve.
    pub wind: WindSampling,
    /// Which synchronous plants run.
    pub commitment: Commitment,
    /// When a sampled operating point is kept.
    pub acceptance: Acceptance,
    /// The contingency set and how often each kind is drawn.
    pub contingencies: ContingencySettings,
    /// Where, when and how finely to shed.
    pub shedding: ShedSettings,
    /// Stability criteria of every run.
    pub criteria: StabilityCriteria,
    /// Simulation settings of every run.
    pub simulation: SimulationOptions,
    /// The study text's hash (FNV-1a 64 of the file as read), written into every shard.
    pub hash: u64,
    /// The study text as read; datasets keep a copy (`study.toml`) so that their samples can
    /// be re-simulated without the original files.
    pub text: String,
}

/// System load level `L ~ N(mean, sd)` clipped to `[min, max]` (a share of the grid file's
/// load), times a factor per area `~ N(1, area_sd)` with the same correlation between any
/// two areas.
#[derive(Clone, Debug, PartialEq)]
pub struct LoadSampling {
    /// Mean level, share of the grid file's load.
    pub level_mean: f64,
    /// Standard deviation of the level.
    pub level_sd: f64,
    /// Lowest level kept (draws below are clipped to it).
    pub level_min: f64,
    /// Highest level kept.
    pub level_max: f64,
    /// Standard deviation of each area's factor around 1.
    pub area_sd: f64,
    /// Correlation between the factors of any two areas, in [0, 1].
    pub area_correlation: f64,
}

/// Hub-height wind speed per plant `~ Weibull(shape, scale)`, correlated between plants through
/// a Gaussian copula with one common correlation, turned into output by the power curve
/// (cubic between cut-in and rated, flat to cut-out, zero above) times availability.
#[derive(Clone, Debug, PartialEq)]
pub struct WindSampling {
    /// Weibull shape `k`.
    pub weibull_shape: f64,
    /// Weibull scale `c`, m/s.
    pub weibull_scale_m_s: f64,
    /// Correlation of the plants' speeds (of their normal scores), in [0, 1).
    pub correlation: f64,
    /// Cut-in speed, m/s.
    pub cut_in_m_s: f64,
    /// Rated speed, m/s.
    pub rated_m_s: f64,
    /// Cut-out speed, m/s.
    pub cut_out_m_s: f64,
    /// Share of the rating available (turbines in service, wake losses), in (0, 1].
    pub availability: f64,
}

/// Commitment: plants are switched on in order until their maximum output covers the net load
/// (load minus wind) times `1 + reserve_share`; the rest stay off, so inertia varies.
#[derive(Clone, Debug, PartialEq)]
pub struct Commitment {
    /// Spinning reserve required, share of the net load.
    pub reserve_share: f64,
    /// Machine ids, first switched on first; machines not listed follow by falling rating.
    pub order: Vec<String>,
}

/// An operating point is kept only if its power flow converges and stays within these limits;
/// otherwise the sample is drawn again (up to `max_attempts`), and each rejection is counted.
#[derive(Clone, Debug, PartialEq)]
pub struct Acceptance {
    /// Lowest bus voltage, pu.
    pub v_min_pu: f64,
    /// Highest bus voltage, pu.
    pub v_max_pu: f64,
    /// Highest branch loading, share of the normal rating.
    pub max_branch_loading: f64,
    /// Draws per sample before it is recorded as rejected.
    pub max_attempts: u32,
}

/// The contingency set and its timing.
#[derive(Clone, Debug, PartialEq)]
pub struct ContingencySettings {
    /// Time of the fault or trip, s after the start of the run.
    pub event_at_s: f64,
    /// Fault duration before the faulted branch is tripped, s.
    pub clearing_time_s: f64,
    /// Fault reactance, pu (a small value: a bolted three-phase fault).
    pub fault_x_pu: f64,
    /// Relative frequency of a three-phase fault at one end of a branch, cleared by tripping it.
    pub weight_branch_fault: f64,
    /// Relative frequency of a fault cleared by tripping two branches at the faulted bus.
    pub weight_double_fault: f64,
    /// Relative frequency of a synchronous-machine trip.
    pub weight_machine_trip: f64,
    /// Relative frequency of a wind-plant trip.
    pub weight_wind_trip: f64,
    /// Element ids never faulted or tripped.
    pub exclude: Vec<String>,
}

impl ContingencySettings {
    /// The timing part, as the dynamic engine's contingency builder takes it.
    pub fn timing(&self) -> holdfast_core::dynamics::ContingencyTiming {
        holdfast_core::dynamics::ContingencyTiming {
            event_at_s: self.event_at_s,
            clearing_time_s: self.clearing_time_s,
            fault_x_pu: self.fault_x_pu,
        }
    }
}

/// Shedding settings.
#[derive(Clone, Debug, PartialEq)]
pub struct ShedSettings {
    /// Bus numbers that may shed; empty means every bus with shed-able load.
    pub buses: Vec<u32>,
    /// Shed-able share of every load, overriding the grid file's; `None` keeps the grid's.
    pub sheddable_fraction: Option<f64>,
    /// Shed-able share of named loads (load id, share), overriding both of the above.
    pub sheddable_by_load: Vec<(String, f64)>,
    /// The action comes this long after fault clearing (after the trip, for a trip), drawn
    /// uniformly per sample between min and max, s.
    pub delay_min_s: f64,
    /// See `delay_min_s`.
    pub delay_max_s: f64,
    /// Spreading rule.
    pub placement: Placement,
    /// Bisection tolerance: the larger of this, MW...
    pub tolerance_mw: f64,
    /// ...and this share of the operating point's load.
    pub tolerance_share: f64,
}

/// Reads and validates a study file.
pub fn read_study(path: &Path) -> Result<Study, Error> {
    let text = std::fs::read_to_string(path).map_err(|source| Error::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_study(&text, path)
}

/// Parses and validates study text; `path` names it in messages and anchors the grid path.
pub fn parse_study(text: &str, path: &Path) -> Result<Study, Error> {
    let file: FileIn = toml::from_str(text).map_err(|e| format::syntax_error(text, path, &e))?;
    let version = file.format_version.get_ref();
    if !STUDY_FORMAT_VERSIONS.contains(version) {
        return Err(Error::UnsupportedVersion {
            path: path.to_path_buf(),
            found: *version,
            supported: STUDY_FORMAT_VERSIONS.to_vec(),
        });
    }
    let mut c = Checker {
        text,
        problems: Vec::new(),
    };
    let top = "study";
    c.positive_int(top, "shard_size", &file.shard_size);
    if file.grid.get_ref().trim().is_empty() {
        c.problem(top, "grid", &file.grid, "\"\"", "must name the grid file");
    }
    let l = &file.load;
    let rec = "[load]";
    c.range(rec, "level_mean", &l.level_mean, 0.05, 3.0);
    c.range(rec, "level_sd", &l.level_sd, 0.0, 1.0);
    c.range(rec, "level_min", &l.level_min, 0.05, 3.0);
    c.range(rec, "level_max", &l.level_max, 0.05, 3.0);
    if l.level_min.get_ref() > l.level_max.get_ref() {
        c.problem(
            rec,
            "level_min",
            &l.level_min,
            l.level_min.get_ref(),
            "must not exceed `level_max`",
        );
    }
    c.range(rec, "area_sd", &l.area_sd, 0.0, 0.5);
    c.range(rec, "area_correlation", &l.area_correlation, 0.0, 1.0);
    let w = &file.wind;
    let rec = "[wind]";
    c.range(rec, "weibull_shape", &w.weibull_shape, 0.5, 10.0);
    c.range(rec, "weibull_scale_m_s", &w.weibull_scale_m_s, 0.5, 40.0);
    c.range(rec, "correlation", &w.correlation, 0.0, 0.999);
    c.range(rec, "cut_in_m_s", &w.cut_in_m_s, 0.0, 10.0);
    c.range(rec, "rated_m_s", &w.rated_m_s, 1.0, 30.0);
    c.range(rec, "cut_out_m_s", &w.cut_out_m_s, 1.0, 50.0);
    if !(w.cut_in_m_s.get_ref() < w.rated_m_s.get_ref()
        && w.rated_m_s.get_ref() < w.cut_out_m_s.get_ref())
    {
        c.problem(
            rec,
            "rated_m_s",
            &w.rated_m_s,
            w.rated_m_s.get_ref(),
            "must lie strictly between `cut_in_m_s` and `cut_out_m_s`",
        );
    }
    c.range(rec, "availability", &w.availability, 0.01, 1.0);
    let k = &file.commitment;
    c.range("[commitment]", "reserve_share", &k.reserve_share, 0.0, 2.0);
    let a = &file.acceptance;
    let rec = "[acceptance]";
    c.range(rec, "v_min_pu", &a.v_min_pu, 0.5, 1.2);
    c.range(rec, "v_max_pu", &a.v_max_pu, 0.8, 1.5);
    c.range(rec, "max_branch_loading", &a.max_branch_loading, 0.1, 10.0);
    if a.max_attempts.get_ref() == &0 {
        c.problem(
            rec,
            "max_attempts",
            &a.max_attempts,
            0,
            "must be at least 1",
        );
    }
    let g = &file.contingencies;
    let rec = "[contingencies]";
    c.range(rec, "event_at_s", &g.event_at_s, 0.0, 5.0);
    c.range(rec, "clearing_time_s", &g.clearing_time_s, 0.01, 2.0);
    c.range(rec, "fault_x_pu", &g.fault_x_pu, 1e-6, 10.0);
    for (field, weight) in [
        ("weight_branch_fault", &g.weight_branch_fault),
        ("weight_double_fault", &g.weight_double_fault),
        ("weight_machine_trip", &g.weight_machine_trip),
        ("weight_wind_trip", &g.weight_wind_trip),
    ] {
        c.range(rec, field, weight, 0.0, 1e6);
    }
    let total_weight = g.weight_branch_fault.get_ref()
        + g.weight_double_fault.get_ref()
        + g.weight_machine_trip.get_ref()
        + g.weight_wind_trip.get_ref();
    if total_weight.is_nan() || total_weight <= 0.0 {
        c.problem(
            rec,
            "weight_branch_fault",
            &g.weight_branch_fault,
            g.weight_branch_fault.get_ref(),
            "at least one contingency weight must be positive",
        );
    }
    let s = &file.shedding;
    let rec = "[shedding]";
    if let Some(f) = &s.sheddable_fraction {
        c.range(rec, "sheddable_fraction", f, 0.0, 1.0);
    }
    for (id, f) in &s.sheddable_by_load {
        c.range(rec, &format!("sheddable_by_load.\"{id}\""), f, 0.0, 1.0);
    }
    c.range(rec, "delay_min_s", &s.delay_min_s, 0.0, 5.0);
    c.range(rec, "delay_max_s", &s.delay_max_s, 0.0, 5.0);
    if s.delay_min_s.get_ref() > s.delay_max_s.get_ref() {
        c.problem(
            rec,
            "delay_min_s",
            &s.delay_min_s,
            s.delay_min_s.get_ref(),
            "must not exceed `delay_max_s`",
        );
    }
    let placement = match s.placement.get_ref().as_str() {
        "uniform" => Placement::Uniform,
        "distance_weighted" => Placement::DistanceWeighted,
        "nearest_first" => Placement::NearestFirst,
        other => {
            c.problem(
                rec,
                "placement",
                &s.placement,
                format!("\"{other}\""),
                "must be \"uniform\", \"distance_weighted\" or \"nearest_first\"",
            );
            Placement::Uniform
        }
    };
    c.range(rec, "tolerance_mw", &s.tolerance_mw, 1e-3, 1e4);
    c.range(rec, "tolerance_share", &s.tolerance_share, 0.0, 0.5);
    let sim = &file.simulation;
    let rec = "[simulation]";
    c.range(rec, "duration_s", &sim.duration_s, 0.5, 120.0);
    if let Some(step) = &sim.step_s {
        c.range(rec, "step_s", step, 1e-4, 0.1);
    }
    let machine_model = match sim.machine_model.get_ref().as_str() {
        "detailed" => MachineModelChoice::Detailed,
        "classical" => MachineModelChoice::Classical,
        other => {
            c.problem(
                rec,
                "machine_model",
                &sim.machine_model,
                format!("\"{other}\""),
                "must be \"detailed\" or \"classical\"",
            );
            MachineModelChoice::Detailed
        }
    };
    if !c.problems.is_empty() {
        return Err(Error::Invalid {
            path: path.to_path_buf(),
            problems: c.problems,
        });
    }
    let grid_path = path
        .parent()
        .unwrap_or(Path::new("."))
        .join(file.grid.get_ref());
    let criteria = file.criteria.apply(c.text, path)?;
    Ok(Study {
        name: file.name,
        grid_path,
        seed: *file.seed.get_ref(),
        shard_size: *file.shard_size.get_ref() as usize,
        load: LoadSampling {
            level_mean: *l.level_mean.get_ref(),
            level_sd: *l.level_sd.get_ref(),
            level_min: *l.level_min.get_ref(),
            level_max: *l.level_max.get_ref(),
            area_sd: *l.area_sd.get_ref(),
            area_correlation: *l.area_correlation.get_ref(),
        },
        wind: WindSampling {
            weibull_shape: *w.weibull_shape.get_ref(),
            weibull_scale_m_s: *w.weibull_scale_m_s.get_ref(),
            correlation: *w.correlation.get_ref(),
            cut_in_m_s: *w.cut_in_m_s.get_ref(),
            rated_m_s: *w.rated_m_s.get_ref(),
            cut_out_m_s: *w.cut_out_m_s.get_ref(),
            availability: *w.availability.get_ref(),
        },
        commitment: Commitment {
            reserve_share: *k.reserve_share.get_ref(),
            order: k.order.clone(),
        },
        acceptance: Acceptance {
            v_min_pu: *a.v_min_pu.get_ref(),
            v_max_pu: *a.v_max_pu.get_ref(),
            max_branch_loading: *a.max_branch_loading.get_ref(),
            max_attempts: *a.max_attempts.get_ref(),
        },
        contingencies: ContingencySettings {
            event_at_s: *g.event_at_s.get_ref(),
            clearing_time_s: *g.clearing_time_s.get_ref(),
            fault_x_pu: *g.fault_x_pu.get_ref(),
            weight_branch_fault: *g.weight_branch_fault.get_ref(),
            weight_double_fault: *g.weight_double_fault.get_ref(),
            weight_machine_trip: *g.weight_machine_trip.get_ref(),
            weight_wind_trip: *g.weight_wind_trip.get_ref(),
            exclude: g.exclude.clone(),
        },
        shedding: ShedSettings {
            buses: s.buses.clone(),
            sheddable_fraction: s.sheddable_fraction.as_ref().map(|f| *f.get_ref()),
            sheddable_by_load: s
                .sheddable_by_load
                .iter()
                .map(|(id, f)| (id.clone(), *f.get_ref()))
                .collect(),
            delay_min_s: *s.delay_min_s.get_ref(),
            delay_max_s: *s.delay_max_s.get_ref(),
            placement,
            tolerance_mw: *s.tolerance_mw.get_ref(),
            tolerance_share: *s.tolerance_share.get_ref(),
        },
        criteria,
        simulation: SimulationOptions {
            step_s: sim.step_s.as_ref().map(|s| *s.get_ref()),
            duration_s: *sim.duration_s.get_ref(),
            machine_model,
            criteria: Some(criteria),
            early_stop: true,
            record: false,
            ..SimulationOptions::default()
        },
        hash: fnv1a64(text.as_bytes()),
        text: text.to_string(),
    })
}

impl Study {
    /// The shed-able share of a load: the study's entry for it, else the study's share for
    /// every load, else the grid file's.
    pub fn sheddable_fraction(&self, load: &holdfast_core::Load) -> f64 {
        self.shedding
            .sheddable_by_load
            .iter()
            .find(|(id, _)| *id == load.id)
            .map(|(_, f)| *f)
            .or(self.shedding.sheddable_fraction)
            .unwrap_or(load.sheddable_fraction)
    }

    /// Checks the study against its grid: ids and bus numbers it names must exist, and there
    /// must be something to shed. Every problem is listed.
    pub fn check_against(&self, grid: &Grid, path: &Path) -> Result<(), Error> {
        let mut problems = Vec::new();
        for id in &self.commitment.order {
            if !grid.machines.iter().any(|m| &m.id == id) {
                problems.push(
                    Problem::new(None, "[commitment]", "no synchronous machine has this id")
                        .field("order", format!("\"{id}\"")),
                );
            }
        }
        for id in &self.contingencies.exclude {
            if grid.element(id).is_none() {
                problems.push(
                    Problem::new(
                        None,
                        "[contingencies]",
                        "no branch, machine or wind plant has this id",
                    )
                    .field("exclude", format!("\"{id}\"")),
                );
            }
        }
        for (id, _) in &self.shedding.sheddable_by_load {
            if !grid.loads.iter().any(|l| &l.id == id) {
                problems.push(
                    Problem::new(None, "[shedding]", "no load has this id")
                        .field("sheddable_by_load", format!("\"{id}\"")),
                );
            }
        }
        for &n in &self.shedding.buses {
            if grid.bus_idx(n).is_none() {
                problems.push(
                    Problem::new(None, "[shedding]", "no bus has this number").field("buses", n),
                );
            }
        }
        if problems.is_empty() && crate::shed::candidates(grid, self).is_empty() {
            problems.push(Problem::new(
                None,
                "[shedding]",
                "no load at the candidate buses has a shed-able fraction above zero",
            ));
        }
        if problems.is_empty() {
            Ok(())
        } else {
            Err(Error::Invalid {
                path: path.to_path_buf(),
                problems,
            })
        }
    }
}

/// Collects problems with the line of the offending value.
struct Checker<'a> {
    text: &'a str,
    problems: Vec<Problem>,
}

impl Checker<'_> {
    fn line<T>(&self, v: &Spanned<T>) -> usize {
        format::line_col(self.text, v.span().start).0
    }

    fn problem<T>(
        &mut self,
        record: &str,
        field: &str,
        at: &Spanned<T>,
        value: impl std::fmt::Display,
        message: &str,
    ) {
        let line = self.line(at);
        self.problems
            .push(Problem::new(Some(line), record, message).field(field, value));
    }

    fn range(&mut self, record: &str, field: &str, v: &Spanned<f64>, lo: f64, hi: f64) {
        let x = *v.get_ref();
        if !(x.is_finite() && x >= lo && x <= hi) {
            self.problem(
                record,
                field,
                v,
                x,
                &format!("must be a number from {lo} to {hi}"),
            );
        }
    }

    fn positive_int(&mut self, record: &str, field: &str, v: &Spanned<u32>) {
        if *v.get_ref() == 0 {
            self.problem(record, field, v, 0, "must be at least 1");
        }
    }
}

// ---- file records (private: the public types above carry no serde) ----

type Num = Spanned<f64>;

fn num(x: f64) -> Num {
    Spanned::new(0..0, x)
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FileIn {
    format_version: Spanned<i64>,
    #[serde(default)]
    name: String,
    grid: Spanned<String>,
    #[serde(default = "default_seed")]
    seed: Spanned<u64>,
    #[serde(default = "default_shard_size")]
    shard_size: Spanned<u32>,
    #[serde(default)]
    load: LoadIn,
    #[serde(default)]
    wind: WindIn,
    #[serde(default)]
    commitment: CommitmentIn,
    #[serde(default)]
    acceptance: AcceptanceIn,
    #[serde(default)]
    contingencies: ContingenciesIn,
    #[serde(default)]
    shedding: SheddingIn,
    #[serde(default)]
    criteria: CriteriaIn,
    #[serde(default)]
    simulation: SimulationIn,
}

fn default_seed() -> Spanned<u64> {
    Spanned::new(0..0, 1)
}

fn default_shard_size() -> Spanned<u32> {
    Spanned::new(0..0, 250)
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct LoadIn {
    level_mean: Num,
    level_sd: Num,
    level_min: Num,
    level_max: Num,
    area_sd: Num,
    area_correlation: Num,
}

impl Default for LoadIn {
    fn default() -> Self {
        LoadIn {
            level_mean: num(0.8),
            level_sd: num(0.12),
            level_min: num(0.5),
            level_max: num(1.1),
            area_sd: num(0.05),
            area_correlation: num(0.5),
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct WindIn {
    weibull_shape: Num,
    weibull_scale_m_s: Num,
    correlation: Num,
    cut_in_m_s: Num,
    rated_m_s: Num,
    cut_out_m_s: Num,
    availability: Num,
}

impl Default for WindIn {
    fn default() -> Self {
        // Rayleigh winds of an IEC class II site (mean 8.5 m/s, c = 9.6 m/s) and a typical
        // power curve (DOMAIN.md 5.5).
        WindIn {
            weibull_shape: num(2.0),
            weibull_scale_m_s: num(9.6),
            correlation: num(0.6),
            cut_in_m_s: num(3.5),
            rated_m_s: num(12.5),
            cut_out_m_s: num(25.0),
            availability: num(0.92),
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct CommitmentIn {
    reserve_share: Num,
    order: Vec<String>,
}

impl Default for CommitmentIn {
    fn default() -> Self {
        CommitmentIn {
            reserve_share: num(0.1),
            order: Vec::new(),
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct AcceptanceIn {
    v_min_pu: Num,
    v_max_pu: Num,
    max_branch_loading: Num,
    max_attempts: Spanned<u32>,
}

impl Default for AcceptanceIn {
    fn default() -> Self {
        AcceptanceIn {
            v_min_pu: num(0.95),
            v_max_pu: num(1.05),
            max_branch_loading: num(1.0),
            max_attempts: Spanned::new(0..0, 20),
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct ContingenciesIn {
    event_at_s: Num,
    clearing_time_s: Num,
    fault_x_pu: Num,
    weight_branch_fault: Num,
    weight_double_fault: Num,
    weight_machine_trip: Num,
    weight_wind_trip: Num,
    exclude: Vec<String>,
}

impl Default for ContingenciesIn {
    fn default() -> Self {
        ContingenciesIn {
            event_at_s: num(0.1),
            clearing_time_s: num(0.1),
            fault_x_pu: num(holdfast_core::dynamics::BOLTED_FAULT_X_PU),
            weight_branch_fault: num(1.0),
            weight_double_fault: num(0.0),
            weight_machine_trip: num(1.0),
            weight_wind_trip: num(1.0),
            exclude: Vec::new(),
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct SheddingIn {
    buses: Vec<u32>,
    sheddable_fraction: Option<Num>,
    sheddable_by_load: std::collections::BTreeMap<String, Num>,
    delay_min_s: Num,
    delay_max_s: Num,
    placement: Spanned<String>,
    tolerance_mw: Num,
    tolerance_share: Num,
}

impl Default for SheddingIn {
    fn default() -> Self {
        SheddingIn {
            buses: Vec::new(),
            sheddable_fraction: None,
            sheddable_by_load: std::collections::BTreeMap::new(),
            delay_min_s: num(0.1),
            delay_max_s: num(0.2),
            placement: Spanned::new(0..0, "uniform".to_string()),
            tolerance_mw: num(1.0),
            tolerance_share: num(0.005),
        }
    }
}

/// The `[criteria]` table: one optional field per [`StabilityCriteria::FIELDS`] entry.
#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct CriteriaIn {
    nominal_frequency_hz: Option<Num>,
    max_angle_deg: Option<Num>,
    recovery_level: Option<Num>,
    recovery_time_s: Option<Num>,
    floor_level: Option<Num>,
    floor_time_s: Option<Num>,
    nadir_hz: Option<Num>,
    zenith_hz: Option<Num>,
    final_band_hz: Option<Num>,
    over_voltage_pu: Option<Num>,
    over_voltage_time_s: Option<Num>,
    sustained_over_voltage_pu: Option<Num>,
    sustained_over_voltage_time_s: Option<Num>,
    final_voltage_min_pu: Option<Num>,
    final_voltage_max_pu: Option<Num>,
    min_damping_ratio: Option<Num>,
    damping_window_s: Option<Num>,
    damping_angle_floor_deg: Option<Num>,
    damping_voltage_floor_pu: Option<Num>,
}

impl CriteriaIn {
    /// The defaults for the nominal frequency (60 Hz unless given), with the file's overrides.
    fn apply(&self, text: &str, path: &Path) -> Result<StabilityCriteria, Error> {
        let mut c = Checker {
            text,
            problems: Vec::new(),
        };
        let rec = "[criteria]";
        let f0 = self
            .nominal_frequency_hz
            .as_ref()
            .map_or(60.0, |f| *f.get_ref());
        if let Some(f) = &self.nominal_frequency_hz
            && *f.get_ref() != 50.0
            && *f.get_ref() != 60.0
        {
            c.problem(
                rec,
                "nominal_frequency_hz",
                f,
                f.get_ref(),
                "must be 50 or 60",
            );
        }
        let mut out = StabilityCriteria::for_frequency(f0);
        let given: [(&str, &Option<Num>); StabilityCriteria::FIELDS.len()] = [
            ("max_angle_deg", &self.max_angle_deg),
            ("recovery_level", &self.recovery_level),
            ("recovery_time_s", &self.recovery_time_s),
            ("floor_level", &self.floor_level),
            ("floor_time_s", &self.floor_time_s),
            ("nadir_hz", &self.nadir_hz),
            ("zenith_hz", &self.zenith_hz),
            ("final_band_hz", &self.final_band_hz),
            ("over_voltage_pu", &self.over_voltage_pu),
            ("over_voltage_time_s", &self.over_voltage_time_s),
            ("sustained_over_voltage_pu", &self.sustained_over_voltage_pu),
            (
                "sustained_over_voltage_time_s",
                &self.sustained_over_voltage_time_s,
            ),
            ("final_voltage_min_pu", &self.final_voltage_min_pu),
            ("final_voltage_max_pu", &self.final_voltage_max_pu),
            ("min_damping_ratio", &self.min_damping_ratio),
            ("damping_window_s", &self.damping_window_s),
            ("damping_angle_floor_deg", &self.damping_angle_floor_deg),
            ("damping_voltage_floor_pu", &self.damping_voltage_floor_pu),
        ];
        for (field, value) in given {
            if let Some(v) = value
                && let Err(e) = out.set_field(field, *v.get_ref(), f0)
            {
                c.problem(rec, field, v, v.get_ref(), &e.to_string());
            }
        }
        if out.final_voltage_min_pu >= out.final_voltage_max_pu
            && let Some(v) = &self.final_voltage_min_pu
        {
            c.problem(
                rec,
                "final_voltage_min_pu",
                v,
                v.get_ref(),
                &format!(
                    "must be below final_voltage_max_pu = {}",
                    out.final_voltage_max_pu
                ),
            );
        }
        if c.problems.is_empty() {
            Ok(out)
        } else {
            Err(Error::Invalid {
                path: path.to_path_buf(),
                problems: c.problems,
            })
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, default)]
struct SimulationIn {
    duration_s: Num,
    step_s: Option<Num>,
    machine_model: Spanned<String>,
}

impl Default for SimulationIn {
    fn default() -> Self {
        SimulationIn {
            duration_s: num(10.0),
            step_s: None,
            machine_model: Spanned::new(0..0, "detailed".to_string()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const MINIMAL: &str = "format_version = 1\ngrid = \"g.toml\"\n";

    #[test]
    fn a_minimal_study_takes_the_documented_defaults() {
        let s = parse_study(MINIMAL, Path::new("dir/s.toml")).unwrap();
        assert_eq!(s.grid_path, Path::new("dir/g.toml"));
        assert_eq!(s.shard_size, 250);
        assert_eq!(s.shedding.placement, Placement::Uniform);
        assert_eq!(s.criteria, StabilityCriteria::for_frequency(60.0));
        assert_eq!(s.simulation.criteria, Some(s.criteria));
    }

    #[test]
    fn problems_name_line_field_and_value() {
        let text =
            format!("{MINIMAL}[load]\nlevel_mean = -1.0\n[shedding]\nplacement = \"everywhere\"\n");
        let e = parse_study(&text, Path::new("s.toml")).unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("line 4: [load], field `level_mean` = -1"),
            "{msg}"
        );
        assert!(
            msg.contains("line 6: [shedding], field `placement` = \"everywhere\""),
            "{msg}"
        );
    }

    #[test]
    fn every_criterion_is_set_by_its_field_and_checked_against_its_range() {
        let text = format!(
            "{MINIMAL}[criteria]\nover_voltage_pu = 1.25\nmin_damping_ratio = 0.05\n\
             damping_window_s = 4.0\nfinal_voltage_max_pu = 0.95\n"
        );
        let e = parse_study(&text, Path::new("s.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains(
                "line 7: [criteria], field `final_voltage_max_pu` = 0.95: must be between 1 and 3"
            ),
            "{e}"
        );
        let text = format!(
            "{MINIMAL}[criteria]\nover_voltage_pu = 1.25\nmin_damping_ratio = 0.05\ndamping_window_s = 4.0\n"
        );
        let s = parse_study(&text, Path::new("s.toml")).unwrap();
        assert_eq!(
            (
                s.criteria.over_voltage_pu,
                s.criteria.min_damping_ratio,
                s.criteria.damping_window_s
            ),
            (1.25, 0.05, 4.0)
        );
    }

    #[test]
    fn unknown_fields_are_syntax_errors_with_position() {
        let text = format!("{MINIMAL}[wind]\nspeed = 3.0\n");
        let e = parse_study(&text, Path::new("s.toml")).unwrap_err();
        assert!(matches!(e, Error::Syntax { line: 4, .. }), "{e}");
    }

    #[test]
    fn a_named_load_s_share_beats_the_study_s_which_beats_the_grid_s() {
        let text = format!(
            "{MINIMAL}[shedding]\nsheddable_fraction = 0.3\nsheddable_by_load = {{ \"A\" = 0.1 }}\n"
        );
        let s = parse_study(&text, Path::new("s.toml")).unwrap();
        let mut load = holdfast_core::Load {
            id: "A".into(),
            bus: holdfast_core::BusIdx(0),
            p_pu: 1.0,
            q_pu: 0.0,
            voltage_dependence: holdfast_core::VoltageDependence::CONSTANT_POWER,
            frequency_dependence: holdfast_core::FrequencyDependence::default(),
            motor_share: 0.0,
            motor: holdfast_core::MotorData::TYPICAL,
            sheddable_fraction: 0.5,
            priority: 0,
            in_service: true,
        };
        assert_eq!(s.sheddable_fraction(&load), 0.1);
        load.id = "B".into();
        assert_eq!(s.sheddable_fraction(&load), 0.3);
        let plain = parse_study(MINIMAL, Path::new("s.toml")).unwrap();
        assert_eq!(plain.sheddable_fraction(&load), 0.5);
    }
}
