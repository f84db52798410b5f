//! Features: how a grid state and the contingency that just happened become the inputs of the
//! bus-graph and branch-graph networks.
//!
//! Training (`holdfast-learn`) and serving use this one definition, so the two cannot disagree.
//! Everything is per unit on the grid's base and radians, as in `holdfast-core`.
//!
//! # The two graphs
//! - **Bus graph**: one node per bus; an edge joins two buses when at least one branch between
//!   them is closed before the contingency and not tripped by it. Outages therefore show as
//!   removed edges, and one model serves every topology of the grid.
//! - **Branch graph**: one node per branch; an edge joins two branches that share a bus, when
//!   both are in service after the contingency. An open or tripped branch keeps its node (its
//!   features say so) but has no edges.
//! - **Incidence**: each bus lists its branches in service after the contingency; the branch
//!   embeddings are fused into their end buses over this list.
//!
//! # Conventions
//! Pre-contingency quantities describe the state just before the disturbance (what the
//! snapshot holds); the generation and inertia features leave out the unit the contingency
//! trips, whose output appears instead as `lost_p_pu` at its bus. The system features are the
//! same at every bus (broadcast), so a few message-passing layers still see the whole grid's
//! balance.

use holdfast_core::topology::{DistanceMatrix, electrical_distance};
use holdfast_core::ybus::branch_admittance;
use holdfast_core::{BranchIdx, BranchKind, BusIdx, Complex, Grid, MachineIdx, Outages, WindIdx};

/// Version of the feature definitions below; stored in model files. Any change to the list,
/// order or meaning of a feature raises it.
pub const FEATURE_SET_VERSION: u32 = 1;

/// Bus-node features, in order.
pub const BUS_FEATURES: [&str; 22] = [
    "load_p_pu",
    "load_q_pu",
    "machine_p_pu",
    "machine_q_pu",
    "wind_p_pu",
    "v_pu",
    "angle_rad",
    "inertia_pu_s",
    "sheddable_pu",
    "motor_share",
    "is_disturbance_bus",
    "is_fault_bus",
    "lost_p_pu",
    "distance_to_disturbance_pu",
    "system_lost_p_share",
    "system_inertia_s",
    "system_load_pu",
    "system_wind_share",
    "kind_branch_fault",
    "kind_double_fault",
    "kind_machine_trip",
    "kind_wind_trip",
];

/// Branch-node features, in order.
pub const BRANCH_FEATURES: [&str; 9] = [
    "p_from_pu",
    "q_from_pu",
    "loading_share",
    "r_pu",
    "x_pu",
    "in_service",
    "tripped",
    "is_transformer",
    "touches_disturbance_bus",
];

/// Number of bus features.
pub const N_BUS_FEATURES: usize = BUS_FEATURES.len();
/// Number of branch features.
pub const N_BRANCH_FEATURES: usize = BRANCH_FEATURES.len();

/// Index of `sheddable_pu` among the bus features.
pub const BUS_SHEDDABLE: usize = 8;

/// Electrical distances above this (including buses in another island, at infinite distance)
/// are stored as this, pu.
pub const DISTANCE_CAP_PU: f64 = 10.0;

/// Kind of disturbance.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
pub enum DisturbanceKind {
    /// Fault at a branch end, cleared by tripping the branch.
    BranchFault,
    /// Fault at a bus, cleared by tripping two branches there.
    DoubleFault,
    /// Loss of a synchronous machine.
    MachineTrip,
    /// Loss of a wind plant.
    WindTrip,
}

impl DisturbanceKind {
    /// Every kind, in the order of the one-hot features.
    pub const ALL: [DisturbanceKind; 4] = [
        DisturbanceKind::BranchFault,
        DisturbanceKind::DoubleFault,
        DisturbanceKind::MachineTrip,
        DisturbanceKind::WindTrip,
    ];

    /// Short name.
    pub fn name(self) -> &'static str {
        match self {
            DisturbanceKind::BranchFault => "branch fault",
            DisturbanceKind::DoubleFault => "double fault",
            DisturbanceKind::MachineTrip => "machine trip",
            DisturbanceKind::WindTrip => "wind-plant trip",
        }
    }
}

/// The contingency that just happened, by element index.
#[derive(Clone, Debug, PartialEq)]
pub struct Disturbance {
    /// Kind.
    pub kind: DisturbanceKind,
    /// The bus nearest the disturbance (faulted bus, or the tripped unit's bus).
    pub disturbance_bus: BusIdx,
    /// Faulted bus, for faults.
    pub fault_bus: Option<BusIdx>,
    /// Branches tripped.
    pub tripped_branches: Vec<BranchIdx>,
    /// Machine tripped.
    pub tripped_machine: Option<MachineIdx>,
    /// Wind plant tripped.
    pub tripped_wind: Option<WindIdx>,
}

/// The grid's state just before the contingency, per element in grid order, engineering units.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Snapshot {
    /// Voltage magnitude per bus, pu.
    pub bus_v_pu: Vec<f64>,
    /// Voltage angle per bus, degrees.
    pub bus_angle_deg: Vec<f64>,
    /// Active load per load, MW (0 for a load out of service).
    pub load_p_mw: Vec<f64>,
    /// Reactive load per load, Mvar.
    pub load_q_mvar: Vec<f64>,
    /// Load that may be shed per load, MW (at most `load_p_mw`).
    pub load_sheddable_mw: Vec<f64>,
    /// Whether each synchronous machine is connected.
    pub machine_on: Vec<bool>,
    /// Output per machine, MW.
    pub machine_p_mw: Vec<f64>,
    /// Reactive output per machine, Mvar.
    pub machine_q_mvar: Vec<f64>,
    /// Output per wind plant, MW.
    pub wind_p_mw: Vec<f64>,
    /// Whether each branch is closed.
    pub branch_closed: Vec<bool>,
}

/// Why a snapshot or disturbance cannot be turned into features.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum FeatureError {
    /// A per-element list has the wrong length.
    #[error("snapshot field `{field}` has {got} entries; the grid has {expected}")]
    Length {
        /// The field.
        field: &'static str,
        /// Entries expected.
        expected: usize,
        /// Entries found.
        got: usize,
    },
    /// A value is NaN or infinite, or out of its physical range.
    #[error("snapshot field `{field}`, entry {index}: value {value} {problem}")]
    Value {
        /// The field.
        field: &'static str,
        /// Entry (element index).
        index: usize,
        /// The value.
        value: f64,
        /// What is wrong.
        problem: &'static str,
    },
    /// The disturbance names an element the grid does not have.
    #[error("disturbance field `{field}`: index {index} is out of range (the grid has {count})")]
    Element {
        /// The field.
        field: &'static str,
        /// The index given.
        index: usize,
        /// How many such elements the grid has.
        count: usize,
    },
}

/// Neighbour lists in compressed form: the neighbours of node `i` are
/// `index[start[i]..start[i + 1]]`.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Csr {
    /// Row starts, one more than the number of nodes.
    pub start: Vec<u32>,
    /// Neighbour indices.
    pub index: Vec<u32>,
}

impl Csr {
    /// From one list per node; each list is sorted and de-duplicated.
    pub fn from_lists(lists: Vec<Vec<u32>>) -> Csr {
        let mut start = Vec::with_capacity(lists.len() + 1);
        let mut index = Vec::new();
        start.push(0);
        for mut l in lists {
            l.sort_unstable();
            l.dedup();
            index.extend_from_slice(&l);
            start.push(index.len() as u32);
        }
        Csr { start, index }
    }

    /// Rebuilds the lists in place, rows sorted and de-duplicated as by [`Csr::from_lists`],
    /// from the `(node, neighbour)` pairs that `pairs` emits (it is called twice: once to
    /// count, once to fill). Reuses the storage: no allocation once it is large enough.
    pub fn rebuild(
        &mut self,
        nodes: usize,
        cursor: &mut Vec<u32>,
        pairs: impl Fn(&mut dyn FnMut(usize, u32)),
    ) {
        self.start.clear();
        self.start.resize(nodes + 1, 0);
        pairs(&mut |i, _| self.start[i + 1] += 1);
        for i in 0..nodes {
            self.start[i + 1] += self.start[i];
        }
        self.index.clear();
        self.index.resize(self.start[nodes] as usize, 0);
        cursor.clear();
        cursor.extend_from_slice(&self.start[..nodes]);
        pairs(&mut |i, j| {
            self.index[cursor[i] as usize] = j;
            cursor[i] += 1;
        });
        // Sort each row and drop repeats (parallel branches), compacting towards the front.
        let mut write = 0;
        let mut row_start = 0;
        for i in 0..nodes {
            let row_end = self.start[i + 1] as usize;
            self.index[row_start..row_end].sort_unstable();
            self.start[i] = write as u32;
            let mut previous = None;
            for k in row_start..row_end {
                let v = self.index[k];
                if previous != Some(v) {
                    self.index[write] = v;
                    write += 1;
                    previous = Some(v);
                }
            }
            row_start = row_end;
        }
        self.start[nodes] = write as u32;
        self.index.truncate(write);
    }

    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.start.len().saturating_sub(1)
    }

    /// Whether there are no nodes.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The neighbours of node `i`.
    pub fn neighbours(&self, i: usize) -> &[u32] {
        &self.index[self.start[i] as usize..self.start[i + 1] as usize]
    }
}

/// Grid data the features need, computed once per grid.
#[derive(Clone, Debug)]
pub struct GridContext {
    s_base_mva: f64,
    n_bus: usize,
    branch_ends: Vec<(usize, usize)>,
    branch_blocks: Vec<[Complex; 4]>,
    branch_r_pu: Vec<f64>,
    branch_x_pu: Vec<f64>,
    branch_rating_pu: Vec<f64>,
    branch_is_transformer: Vec<bool>,
    branch_in_service: Vec<bool>,
    load_bus: Vec<usize>,
    load_motor_share: Vec<f64>,
    machine_bus: Vec<usize>,
    machine_inertia_pu_s: Vec<f64>,
    wind_bus: Vec<usize>,
    distance: DistanceMatrix,
}

impl GridContext {
    /// Precomputes branch admittances and the electrical distances of the grid as given
    /// (branches in service per the grid file; the contingency's trips are not removed, so the
    /// distance to the disturbance is that of the pre-contingency network).
    pub fn new(grid: &Grid) -> GridContext {
        let s = grid.s_base_mva;
        GridContext {
            s_base_mva: s,
            n_bus: grid.n_buses(),
            branch_ends: grid
                .branches
                .iter()
                .map(|b| (b.from.get(), b.to.get()))
                .collect(),
            branch_blocks: grid
                .branches
                .iter()
                .map(|b| branch_admittance(b.r_pu, b.x_pu, b.b_pu, b.tap_ratio, b.phase_shift_rad))
                .collect(),
            branch_r_pu: grid.branches.iter().map(|b| b.r_pu).collect(),
            branch_x_pu: grid.branches.iter().map(|b| b.x_pu).collect(),
            branch_rating_pu: grid.branches.iter().map(|b| b.rating_mva / s).collect(),
            branch_is_transformer: grid
                .branches
                .iter()
                .map(|b| b.kind == BranchKind::Transformer)
                .collect(),
            branch_in_service: grid.branches.iter().map(|b| b.in_service).collect(),
            load_bus: grid.loads.iter().map(|l| l.bus.get()).collect(),
            load_motor_share: grid.loads.iter().map(|l| l.motor_share).collect(),
            machine_bus: grid.machines.iter().map(|m| m.bus.get()).collect(),
            machine_inertia_pu_s: grid
                .machines
                .iter()
                .map(|m| {
                    m.dynamics
                        .as_ref()
                        .map_or(0.0, |d| d.h_s * m.rating_mva / s)
                })
                .collect(),
            wind_bus: grid.wind_plants.iter().map(|w| w.bus.get()).collect(),
            distance: electrical_distance(grid, &Outages::none()),
        }
    }

    /// Number of buses.
    pub fn n_bus(&self) -> usize {
        self.n_bus
    }

    /// Number of branches.
    pub fn n_branch(&self) -> usize {
        self.branch_ends.len()
    }

    /// Electrical distances between buses of the intact grid, pu.
    pub fn distance(&self) -> &DistanceMatrix {
        &self.distance
    }

    /// The system base, MVA.
    pub fn s_base_mva(&self) -> f64 {
        self.s_base_mva
    }
}

/// The network inputs of one sample.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct GraphInput {
    /// Bus features, row-major `[n_bus, N_BUS_FEATURES]`, not normalised.
    pub bus_x: Vec<f32>,
    /// Branch features, row-major `[n_branch, N_BRANCH_FEATURES]`, not normalised.
    pub branch_x: Vec<f32>,
    /// Bus-graph neighbours.
    pub bus_adj: Csr,
    /// Branch-graph neighbours.
    pub branch_adj: Csr,
    /// Branches in service after the contingency, per bus.
    pub bus_branches: Csr,
    /// Load that may be shed per bus, pu (the bound of the per-bus output).
    pub sheddable_pu: Vec<f64>,
}

impl GraphInput {
    /// Number of buses.
    pub fn n_bus(&self) -> usize {
        self.sheddable_pu.len()
    }

    /// Number of branches.
    pub fn n_branch(&self) -> usize {
        self.branch_x.len() / N_BRANCH_FEATURES
    }
}

fn check_len<T>(field: &'static str, v: &[T], expected: usize) -> Result<(), FeatureError> {
    if v.len() == expected {
        Ok(())
    } else {
        Err(FeatureError::Length {
            field,
            expected,
            got: v.len(),
        })
    }
}

fn check_finite(field: &'static str, v: &[f64]) -> Result<(), FeatureError> {
    match v.iter().position(|x| !x.is_finite()) {
        None => Ok(()),
        Some(index) => Err(FeatureError::Value {
            field,
            index,
            value: v[index],
            problem: "is not a finite number",
        }),
    }
}

fn check_element(field: &'static str, index: usize, count: usize) -> Result<(), FeatureError> {
    if index < count {
        Ok(())
    } else {
        Err(FeatureError::Element {
            field,
            index,
            count,
        })
    }
}

/// Checks a snapshot and a disturbance against the grid.
pub fn validate(
    ctx: &GridContext,
    snap: &Snapshot,
    dist: &Disturbance,
) -> Result<(), FeatureError> {
    let n_load = ctx.load_bus.len();
    let n_machine = ctx.machine_bus.len();
    let n_wind = ctx.wind_bus.len();
    check_len("bus_v_pu", &snap.bus_v_pu, ctx.n_bus)?;
    check_len("bus_angle_deg", &snap.bus_angle_deg, ctx.n_bus)?;
    check_len("load_p_mw", &snap.load_p_mw, n_load)?;
    check_len("load_q_mvar", &snap.load_q_mvar, n_load)?;
    check_len("load_sheddable_mw", &snap.load_sheddable_mw, n_load)?;
    check_len("machine_on", &snap.machine_on, n_machine)?;
    check_len("machine_p_mw", &snap.machine_p_mw, n_machine)?;
    check_len("machine_q_mvar", &snap.machine_q_mvar, n_machine)?;
    check_len("wind_p_mw", &snap.wind_p_mw, n_wind)?;
    check_len("branch_closed", &snap.branch_closed, ctx.n_branch())?;
    for (field, v) in [
        ("bus_v_pu", &snap.bus_v_pu),
        ("bus_angle_deg", &snap.bus_angle_deg),
        ("load_p_mw", &snap.load_p_mw),
        ("load_q_mvar", &snap.load_q_mvar),
        ("load_sheddable_mw", &snap.load_sheddable_mw),
        ("machine_p_mw", &snap.machine_p_mw),
        ("machine_q_mvar", &snap.machine_q_mvar),
        ("wind_p_mw", &snap.wind_p_mw),
    ] {
        check_finite(field, v)?;
    }
    if let Some(index) = snap
        .bus_v_pu
        .iter()
        .position(|&v| !(0.0..=3.0).contains(&v))
    {
        return Err(FeatureError::Value {
            field: "bus_v_pu",
            index,
            value: snap.bus_v_pu[index],
            problem: "is outside 0..3 pu",
        });
    }
    for (index, (&s, &p)) in snap
        .load_sheddable_mw
        .iter()
        .zip(&snap.load_p_mw)
        .enumerate()
    {
        if s < 0.0 || s > p.max(0.0) + 1e-6 * p.abs().max(1.0) {
            return Err(FeatureError::Value {
                field: "load_sheddable_mw",
                index,
                value: s,
                problem: "is negative or above the load's load_p_mw",
            });
        }
    }
    check_element("disturbance_bus", dist.disturbance_bus.get(), ctx.n_bus)?;
    if let Some(b) = dist.fault_bus {
        check_element("fault_bus", b.get(), ctx.n_bus)?;
    }
    for b in &dist.tripped_branches {
        check_element("tripped_branches", b.get(), ctx.n_branch())?;
    }
    if let Some(m) = dist.tripped_machine {
        check_element("tripped_machine", m.get(), n_machine)?;
    }
    if let Some(w) = dist.tripped_wind {
        check_element("tripped_wind", w.get(), n_wind)?;
    }
    Ok(())
}

/// Turns a snapshot and the contingency into network inputs (validating both first).
pub fn featurise(
    ctx: &GridContext,
    snap: &Snapshot,
    dist: &Disturbance,
) -> Result<GraphInput, FeatureError> {
    let mut buffers = FeatureBuffers::default();
    featurise_into(ctx, snap, dist, &mut buffers)?;
    Ok(buffers.input)
}

/// Reusable storage for [`featurise_into`]: once it has held the inputs of a grid, building
/// them again for the same grid allocates nothing.
#[derive(Clone, Debug, Default)]
pub struct FeatureBuffers {
    /// The inputs last built.
    pub input: GraphInput,
    bus: Vec<f64>,
    branch: Vec<f64>,
    motor_weighted: Vec<f64>,
    after: Vec<bool>,
    cursor: Vec<u32>,
}

/// Like [`featurise`], into reused buffers; returns the inputs built.
pub fn featurise_into<'b>(
    ctx: &GridContext,
    snap: &Snapshot,
    dist: &Disturbance,
    buffers: &'b mut FeatureBuffers,
) -> Result<&'b GraphInput, FeatureError> {
    validate(ctx, snap, dist)?;
    let FeatureBuffers {
        input,
        bus,
        branch,
        motor_weighted,
        after,
        cursor,
    } = buffers;
    let s = ctx.s_base_mva;
    let n = ctx.n_bus;
    let m = ctx.n_branch();
    let fb = N_BUS_FEATURES;
    zeroed(bus, n * fb);
    zeroed(&mut input.sheddable_pu, n);
    zeroed(motor_weighted, n);
    let sheddable_pu = &mut input.sheddable_pu;

    let mut load_total = 0.0;
    for (k, &b) in ctx.load_bus.iter().enumerate() {
        let p = snap.load_p_mw[k] / s;
        bus[b * fb] += p;
        bus[b * fb + 1] += snap.load_q_mvar[k] / s;
        sheddable_pu[b] += snap.load_sheddable_mw[k] / s;
        motor_weighted[b] += p.max(0.0) * ctx.load_motor_share[k];
        load_total += p;
    }
    let mut lost_total = 0.0;
    let mut inertia_total = 0.0;
    for (k, &b) in ctx.machine_bus.iter().enumerate() {
        if !snap.machine_on[k] {
            continue;
        }
        let p = snap.machine_p_mw[k] / s;
        if dist.tripped_machine == Some(MachineIdx(k as u32)) {
            bus[b * fb + 12] += p;
            lost_total += p;
        } else {
            bus[b * fb + 2] += p;
            bus[b * fb + 3] += snap.machine_q_mvar[k] / s;
            bus[b * fb + 7] += ctx.machine_inertia_pu_s[k];
            inertia_total += ctx.machine_inertia_pu_s[k];
        }
    }
    let mut wind_total = 0.0;
    for (k, &b) in ctx.wind_bus.iter().enumerate() {
        let p = snap.wind_p_mw[k] / s;
        if dist.tripped_wind == Some(WindIdx(k as u32)) {
            bus[b * fb + 12] += p;
            lost_total += p;
        } else {
            bus[b * fb + 4] += p;
            wind_total += p;
        }
    }
    let d_bus = dist.disturbance_bus;
    let kind_at = DisturbanceKind::ALL
        .iter()
        .position(|k| *k == dist.kind)
        .unwrap_or(0);
    let load_den = load_total.max(1e-9);
    for b in 0..n {
        let row = &mut bus[b * fb..(b + 1) * fb];
        row[5] = snap.bus_v_pu[b];
        row[6] = snap.bus_angle_deg[b].to_radians();
        row[8] = sheddable_pu[b];
        row[9] = if row[0] > 1e-12 {
            motor_weighted[b] / row[0]
        } else {
            0.0
        };
        row[10] = f64::from(u8::from(b == d_bus.get()));
        row[11] = f64::from(u8::from(dist.fault_bus == Some(BusIdx(b as u32))));
        let d = ctx.distance.get(BusIdx(b as u32), d_bus);
        row[13] = if d.is_finite() {
            d.min(DISTANCE_CAP_PU)
        } else {
            DISTANCE_CAP_PU
        };
        row[14] = lost_total / load_den;
        row[15] = inertia_total / load_den;
        row[16] = load_total;
        row[17] = wind_total / load_den;
        row[18 + kind_at] = 1.0;
    }

    // Branches: state before and after the contingency, flows from the snapshot's voltages.
    let fe = N_BRANCH_FEATURES;
    zeroed(branch, m * fe);
    zeroed(after, m);
    let voltage =
        |b: usize| Complex::from_polar(snap.bus_v_pu[b], snap.bus_angle_deg[b].to_radians());
    for k in 0..m {
        let closed = ctx.branch_in_service[k] && snap.branch_closed[k];
        let tripped = dist.tripped_branches.contains(&BranchIdx(k as u32));
        after[k] = closed && !tripped;
        let (f, t) = ctx.branch_ends[k];
        let row = &mut branch[k * fe..(k + 1) * fe];
        if closed {
            let y = ctx.branch_blocks[k];
            let (vf, vt) = (voltage(f), voltage(t));
            let i_f = y[0] * vf + y[1] * vt;
            let i_t = y[2] * vf + y[3] * vt;
            let s_f = vf * i_f.conj();
            let s_t = vt * i_t.conj();
            row[0] = s_f.re;
            row[1] = s_f.im;
            let rating = ctx.branch_rating_pu[k];
            row[2] = if rating > 0.0 {
                s_f.norm().max(s_t.norm()) / rating
            } else {
                0.0
            };
        }
        row[3] = ctx.branch_r_pu[k];
        row[4] = ctx.branch_x_pu[k];
        row[5] = f64::from(u8::from(after[k]));
        row[6] = f64::from(u8::from(tripped));
        row[7] = f64::from(u8::from(ctx.branch_is_transformer[k]));
        row[8] = f64::from(u8::from(f == d_bus.get() || t == d_bus.get()));
    }

    let after = &*after;
    let ends = &ctx.branch_ends;
    input.bus_adj.rebuild(n, cursor, |emit| {
        for k in (0..m).filter(|&k| after[k]) {
            let (f, t) = ends[k];
            if f != t {
                emit(f, t as u32);
                emit(t, f as u32);
            }
        }
    });
    input.bus_branches.rebuild(n, cursor, |emit| {
        for k in (0..m).filter(|&k| after[k]) {
            let (f, t) = ends[k];
            emit(f, k as u32);
            emit(t, k as u32);
        }
    });
    let GraphInput {
        bus_branches,
        branch_adj,
        ..
    } = &mut *input;
    let incident = &*bus_branches;
    branch_adj.rebuild(m, cursor, |emit| {
        for at_bus in (0..n).map(|b| incident.neighbours(b)) {
            for &a in at_bus {
                for &b in at_bus {
                    if a != b {
                        emit(a as usize, b);
                    }
                }
            }
        }
    });
    input.bus_x.clear();
    input.bus_x.extend(bus.iter().map(|&x| x as f32));
    input.branch_x.clear();
    input.branch_x.extend(branch.iter().map(|&x| x as f32));
    Ok(input)
}

/// Empties `v` and fills it with `len` zeros, keeping its storage.
pub(crate) fn zeroed<T: Copy + Default>(v: &mut Vec<T>, len: usize) {
    v.clear();
    v.resize(len, T::default());
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// Three buses in a ring (lossless lines, x = 0.1 pu), a machine at bus 2, a load at bus 3.
    pub(crate) fn ring() -> Grid {
        let text = r#"
format_version = 1
name = "three-bus ring"
s_base_mva = 100.0
frequency_hz = 50.0
[[bus]]
id = 1
name = "A"
base_kv = 230.0
reference = true
[[bus]]
id = 2
name = "B"
base_kv = 230.0
[[bus]]
id = 3
name = "C"
base_kv = 230.0
[[line]]
id = "A-B"
from = 1
to = 2
r_pu = 0.0
x_pu = 0.1
rating_mva = 200.0
[[line]]
id = "B-C"
from = 2
to = 3
r_pu = 0.0
x_pu = 0.1
[[line]]
id = "A-C"
from = 1
to = 3
r_pu = 0.0
x_pu = 0.1
[[machine]]
id = "G1"
bus = 1
p_mw = 0.0
v_set_pu = 1.0
rating_mva = 300.0
[machine.dynamics]
h_s = 5.0
xd_pu = 1.8
xq_pu = 1.7
xd_transient_pu = 0.3
xq_transient_pu = 0.55
xl_pu = 0.15
td0_transient_s = 6.5
[[machine]]
id = "G2"
bus = 2
p_mw = 50.0
v_set_pu = 1.0
rating_mva = 100.0
[machine.dynamics]
h_s = 4.0
xd_pu = 1.8
xq_pu = 1.7
xd_transient_pu = 0.3
xq_transient_pu = 0.55
xl_pu = 0.15
td0_transient_s = 6.5
[[load]]
id = "Town"
bus = 3
p_mw = 120.0
q_mvar = 30.0
motor_share = 0.5
sheddable_fraction = 0.25
"#;
        holdfast_core::format::parse_grid(text, "ring.toml".as_ref()).unwrap()
    }

    pub(crate) fn snapshot() -> Snapshot {
        Snapshot {
            bus_v_pu: vec![1.0, 0.98, 0.97],
            bus_angle_deg: vec![0.0, -5.0, -8.0],
            load_p_mw: vec![120.0],
            load_q_mvar: vec![30.0],
            load_sheddable_mw: vec![30.0],
            machine_on: vec![true, true],
            machine_p_mw: vec![70.0, 50.0],
            machine_q_mvar: vec![20.0, 10.0],
            wind_p_mw: vec![],
            branch_closed: vec![true; 3],
        }
    }

    fn bus_feature(x: &GraphInput, bus: usize, name: &str) -> f32 {
        let k = BUS_FEATURES.iter().position(|n| *n == name).unwrap();
        x.bus_x[bus * N_BUS_FEATURES + k]
    }

    fn branch_feature(x: &GraphInput, branch: usize, name: &str) -> f32 {
        let k = BRANCH_FEATURES.iter().position(|n| *n == name).unwrap();
        x.branch_x[branch * N_BRANCH_FEATURES + k]
    }

    #[test]
    fn lossless_line_flows_match_the_closed_form() {
        // Power over a lossless line (e.g. Kundur, Power System Stability and Control, 1994,
        // section 6.1): P = V1 V2 sin(d12) / X, Q1 = (V1^2 - V1 V2 cos(d12)) / X.
        let grid = ring();
        let ctx = GridContext::new(&grid);
        let dist = Disturbance {
            kind: DisturbanceKind::MachineTrip,
            disturbance_bus: BusIdx(1),
            fault_bus: None,
            tripped_branches: vec![],
            tripped_machine: Some(MachineIdx(1)),
            tripped_wind: None,
        };
        let x = featurise(&ctx, &snapshot(), &dist).unwrap();
        let d = 5f64.to_radians();
        let p = 0.98 * d.sin() / 0.1;
        let q = (1.0 - 0.98 * d.cos()) / 0.1;
        assert!((f64::from(branch_feature(&x, 0, "p_from_pu")) - p).abs() < 1e-5);
        assert!((f64::from(branch_feature(&x, 0, "q_from_pu")) - q).abs() < 1e-5);
        // Loading: the larger end's |S| over 2 pu; the to end carries the same P and
        // Q2 = (V2^2 - V1 V2 cos d) / X in magnitude.
        let q2 = (0.98f64 * 0.98 - 0.98 * d.cos()) / 0.1;
        let s_max = p.hypot(q).max(p.hypot(q2));
        assert!((f64::from(branch_feature(&x, 0, "loading_share")) - s_max / 2.0).abs() < 1e-5);
        // A branch without a rating reports no loading.
        assert_eq!(branch_feature(&x, 1, "loading_share"), 0.0);

        // The tripped machine's output is lost at its bus, not generated there, and its inertia
        // is gone: only G1's 5 s x 300 MVA / 100 MVA = 15 pu s remains.
        assert!((bus_feature(&x, 1, "lost_p_pu") - 0.5).abs() < 1e-6);
        assert_eq!(bus_feature(&x, 1, "machine_p_pu"), 0.0);
        assert!((bus_feature(&x, 0, "inertia_pu_s") - 15.0).abs() < 1e-5);
        assert_eq!(bus_feature(&x, 1, "inertia_pu_s"), 0.0);
        // System features, the same at every bus: lost 0.5 of a 1.2 pu load; 15 / 1.2 s.
        for b in 0..3 {
            assert!((bus_feature(&x, b, "system_lost_p_share") - 0.5 / 1.2).abs() < 1e-6);
            assert!((bus_feature(&x, b, "system_inertia_s") - 12.5).abs() < 1e-5);
            assert_eq!(bus_feature(&x, b, "kind_machine_trip"), 1.0);
        }
        assert_eq!(bus_feature(&x, 1, "is_disturbance_bus"), 1.0);
        assert_eq!(bus_feature(&x, 0, "is_disturbance_bus"), 0.0);
        assert!((bus_feature(&x, 2, "sheddable_pu") - 0.3).abs() < 1e-6);
        assert!((bus_feature(&x, 2, "motor_share") - 0.5).abs() < 1e-6);
        // Distance on the ring: the Thevenin impedance between adjacent buses is
        // 0.1 || 0.2 = 0.0667 pu (series and parallel, closed form).
        assert!((bus_feature(&x, 0, "distance_to_disturbance_pu") - 0.2 / 3.0).abs() < 1e-5);
        assert!((x.sheddable_pu[2] - 0.3).abs() < 1e-12);
    }

    #[test]
    fn a_tripped_branch_is_a_removed_edge() {
        let grid = ring();
        let ctx = GridContext::new(&grid);
        let dist = Disturbance {
            kind: DisturbanceKind::BranchFault,
            disturbance_bus: BusIdx(0),
            fault_bus: Some(BusIdx(0)),
            tripped_branches: vec![BranchIdx(0)],
            tripped_machine: None,
            tripped_wind: None,
        };
        let x = featurise(&ctx, &snapshot(), &dist).unwrap();
        // Bus graph: A-B is gone, the other two edges stay.
        assert_eq!(x.bus_adj.neighbours(0), &[2]);
        assert_eq!(x.bus_adj.neighbours(1), &[2]);
        assert_eq!(x.bus_adj.neighbours(2), &[0, 1]);
        // Branch graph: the tripped branch keeps its node, without edges; the others meet at C.
        assert!(x.branch_adj.neighbours(0).is_empty());
        assert_eq!(x.branch_adj.neighbours(1), &[2]);
        assert_eq!(x.branch_adj.neighbours(2), &[1]);
        assert_eq!(branch_feature(&x, 0, "tripped"), 1.0);
        assert_eq!(branch_feature(&x, 0, "in_service"), 0.0);
        // Incidence: bus A keeps only A-C.
        assert_eq!(x.bus_branches.neighbours(0), &[2]);
        assert_eq!(bus_feature(&x, 0, "is_fault_bus"), 1.0);
    }

    #[test]
    fn bad_snapshots_are_named() {
        let grid = ring();
        let ctx = GridContext::new(&grid);
        let dist = Disturbance {
            kind: DisturbanceKind::WindTrip,
            disturbance_bus: BusIdx(0),
            fault_bus: None,
            tripped_branches: vec![],
            tripped_machine: None,
            tripped_wind: Some(WindIdx(0)),
        };
        let e = featurise(&ctx, &snapshot(), &dist).unwrap_err();
        assert_eq!(
            e.to_string(),
            "disturbance field `tripped_wind`: index 0 is out of range (the grid has 0)"
        );
        let mut snap = snapshot();
        snap.bus_v_pu[2] = f64::NAN;
        let dist = Disturbance {
            tripped_wind: None,
            ..dist
        };
        let e = featurise(&ctx, &snap, &dist).unwrap_err();
        assert!(e.to_string().contains("`bus_v_pu`, entry 2"), "{e}");
        let mut snap = snapshot();
        snap.load_sheddable_mw[0] = 500.0;
        assert!(featurise(&ctx, &snap, &dist).is_err());
        let mut snap = snapshot();
        snap.machine_on.pop();
        assert!(matches!(
            featurise(&ctx, &snap, &dist),
            Err(FeatureError::Length {
                field: "machine_on",
                expected: 2,
                got: 1
            })
        ));
    }

    #[test]
    fn csr_sorts_and_deduplicates() {
        let c = Csr::from_lists(vec![vec![2, 1, 2], vec![], vec![0]]);
        assert_eq!(c.len(), 3);
        assert_eq!(c.neighbours(0), &[1, 2]);
        assert!(c.neighbours(1).is_empty());
        assert_eq!(c.neighbours(2), &[0]);
    }

    #[test]
    fn feature_names_are_unique() {
        let mut names: Vec<&str> = BUS_FEATURES
            .iter()
            .chain(&BRANCH_FEATURES)
            .copied()
            .collect();
        names.sort_unstable();
        names.dedup();
        assert_eq!(names.len(), N_BUS_FEATURES + N_BRANCH_FEATURES);
        assert_eq!(BUS_FEATURES[BUS_SHEDDABLE], "sheddable_pu");
    }

    #[test]
    fn lists_rebuilt_in_place_equal_lists_built_afresh() {
        // Pseudo-random lists with repeats and empty rows, rebuilt into one reused Csr.
        let mut state = 12_345_u64;
        let mut next = move |m: u64| {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1);
            (state >> 33) % m
        };
        let mut csr = Csr::default();
        let mut cursor = Vec::new();
        for round in 0..20 {
            let nodes = 1 + next(30) as usize;
            let lists: Vec<Vec<u32>> = (0..nodes)
                .map(|_| (0..next(6)).map(|_| next(nodes as u64) as u32).collect())
                .collect();
            csr.rebuild(nodes, &mut cursor, |emit| {
                for (i, l) in lists.iter().enumerate() {
                    for &j in l {
                        emit(i, j);
                    }
                }
            });
            assert_eq!(csr, Csr::from_lists(lists.clone()), "round {round}");
        }
    }

    #[test]
    fn reused_buffers_give_the_inputs_of_fresh_ones() {
        let grid = ring();
        let ctx = GridContext::new(&grid);
        let trip = Disturbance {
            kind: DisturbanceKind::MachineTrip,
            disturbance_bus: BusIdx(1),
            fault_bus: None,
            tripped_branches: vec![],
            tripped_machine: Some(MachineIdx(1)),
            tripped_wind: None,
        };
        let fault = Disturbance {
            kind: DisturbanceKind::BranchFault,
            disturbance_bus: BusIdx(2),
            fault_bus: Some(BusIdx(2)),
            tripped_branches: vec![BranchIdx(1)],
            tripped_machine: None,
            tripped_wind: None,
        };
        let mut buffers = FeatureBuffers::default();
        for d in [&trip, &fault, &trip] {
            let reused = featurise_into(&ctx, &snapshot(), d, &mut buffers)
                .unwrap()
                .clone();
            assert_eq!(reused, featurise(&ctx, &snapshot(), d).unwrap());
        }
    }
}
