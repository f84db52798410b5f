//! The contingency set: three-phase faults at either end of a branch cleared by tripping it
//! (alone, or with a second branch at the faulted bus), synchronous-machine trips and
//! wind-plant trips. Faults whose clearing would split the grid are left out.

use holdfast_core::dynamics::{TimedEvent, contingency_events};
use holdfast_core::topology::islands;
use holdfast_core::{BranchIdx, BusIdx, Grid, MachineIdx, Outages, WindIdx};
use rand::Rng;

use crate::sampling::OperatingPoint;
use crate::study::{ContingencySettings, Study};

/// Kind of contingency.
#[derive(
    Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
pub enum ContingencyKind {
    /// Fault at a branch end, cleared by tripping the branch.
    BranchFault,
    /// Fault at a bus, cleared by tripping two branches there.
    DoubleFault,
    /// Loss of a synchronous machine.
    MachineTrip,
    /// Loss of a wind plant.
    WindTrip,
}

impl ContingencyKind {
    /// Every kind, in a fixed order.
    pub const ALL: [ContingencyKind; 4] = [
        ContingencyKind::BranchFault,
        ContingencyKind::DoubleFault,
        ContingencyKind::MachineTrip,
        ContingencyKind::WindTrip,
    ];

    /// Short name.
    pub fn name(self) -> &'static str {
        match self {
            ContingencyKind::BranchFault => "branch fault",
            ContingencyKind::DoubleFault => "double fault",
            ContingencyKind::MachineTrip => "machine trip",
            ContingencyKind::WindTrip => "wind-plant trip",
        }
    }
}

/// One contingency.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Contingency {
    /// Kind.
    pub kind: ContingencyKind,
    /// Human-readable description with element ids and bus numbers.
    pub description: String,
    /// The bus the disturbance is nearest to (faulted bus, or the tripped unit's bus), index.
    pub disturbance_bus: u32,
    /// Faulted bus (index), for faults.
    pub fault_bus: Option<u32>,
    /// Branches tripped (indices).
    pub branches: Vec<u32>,
    /// Machine tripped (index).
    pub machine: Option<u32>,
    /// Wind plant tripped (index).
    pub wind: Option<u32>,
}

impl Contingency {
    /// When the contingency is over (fault cleared or unit tripped), s.
    pub fn settled_at_s(&self, s: &ContingencySettings) -> f64 {
        s.timing().settled_at_s(self.fault_bus.is_some())
    }

    /// Its events.
    pub fn events(&self, s: &ContingencySettings) -> Vec<TimedEvent> {
        let branches: Vec<BranchIdx> = self.branches.iter().map(|&b| BranchIdx(b)).collect();
        contingency_events(
            &s.timing(),
            self.fault_bus.map(BusIdx),
            &branches,
            self.machine.map(MachineIdx),
            self.wind.map(WindIdx),
        )
    }
}

/// The faults of a grid that keep it in one piece, listed once per study (they depend on the
/// network only). Unit trips depend on the operating point and are drawn from it.
#[derive(Clone, Debug, Default)]
pub struct FaultSet {
    /// Faults cleared by one branch.
    pub single: Vec<Contingency>,
    /// Faults cleared by two branches at the faulted bus.
    pub double: Vec<Contingency>,
}

impl FaultSet {
    /// Lists the faults of `grid` (in-service branches not excluded by the study).
    pub fn new(grid: &Grid, study: &Study) -> FaultSet {
        let excluded = |id: &str| study.contingencies.exclude.iter().any(|e| e == id);
        let base_islands = islands(grid, &Outages::none()).members.len();
        let keeps_one_piece = |branches: &[BranchIdx]| {
            let mut o = Outages::none();
            o.branches = branches.to_vec();
            islands(grid, &o).members.len() <= base_islands
        };
        let usable: Vec<usize> = (0..grid.branches.len())
            .filter(|&k| grid.branches[k].in_service && !excluded(&grid.branches[k].id))
            .collect();
        let mut set = FaultSet::default();
        for &k in &usable {
            let b = &grid.branches[k];
            if !keeps_one_piece(&[BranchIdx(k as u32)]) {
                continue;
            }
            for end in [b.from, b.to] {
                set.single.push(Contingency {
                    kind: ContingencyKind::BranchFault,
                    description: format!(
                        "fault at bus {} cleared by tripping {}",
                        grid.buses[end.get()].number,
                        b.id
                    ),
                    disturbance_bus: end.0,
                    fault_bus: Some(end.0),
                    branches: vec![k as u32],
                    machine: None,
                    wind: None,
                });
            }
        }
        for bus in 0..grid.n_buses() {
            let here: Vec<usize> = usable
                .iter()
                .copied()
                .filter(|&k| grid.branches[k].from.get() == bus || grid.branches[k].to.get() == bus)
                .collect();
            for (i, &a) in here.iter().enumerate() {
                for &b in &here[i + 1..] {
                    if !keeps_one_piece(&[BranchIdx(a as u32), BranchIdx(b as u32)]) {
                        continue;
                    }
                    set.double.push(Contingency {
                        kind: ContingencyKind::DoubleFault,
                        description: format!(
                            "fault at bus {} cleared by tripping {} and {}",
                            grid.buses[bus].number, grid.branches[a].id, grid.branches[b].id
                        ),
                        disturbance_bus: bus as u32,
                        fault_bus: Some(bus as u32),
                        branches: vec![a as u32, b as u32],
                        machine: None,
                        wind: None,
                    });
                }
            }
        }
        set
    }
}

/// Draws a contingency for an operating point: a kind by the study's weights (among kinds with
/// at least one candidate), then one candidate uniformly. Machine trips pick among committed
/// machines that produce; wind trips among plants producing.
pub fn draw_contingency<R: Rng>(
    faults: &FaultSet,
    op: &OperatingPoint,
    study: &Study,
    rng: &mut R,
) -> Option<Contingency> {
    let grid = &op.grid;
    let excluded = |id: &str| study.contingencies.exclude.iter().any(|e| e == id);
    let machines: Vec<usize> = (0..grid.machines.len())
        .filter(|&k| {
            let m = &grid.machines[k];
            m.in_service
                && !op.outages.machines.contains(&MachineIdx(k as u32))
                && op.pf.machine_p_pu[k] > 1e-6
                && !excluded(&m.id)
                && !grid.buses[m.bus.get()].is_reference
        })
        .collect();
    let winds: Vec<usize> = (0..grid.wind_plants.len())
        .filter(|&k| {
            let w = &grid.wind_plants[k];
            w.in_service && w.p_pu > 1e-6 && !excluded(&w.id)
        })
        .collect();
    let c = &study.contingencies;
    let options = [
        (
            ContingencyKind::BranchFault,
            c.weight_branch_fault,
            faults.single.len(),
        ),
        (
            ContingencyKind::DoubleFault,
            c.weight_double_fault,
            faults.double.len(),
        ),
        (
            ContingencyKind::MachineTrip,
            c.weight_machine_trip,
            machines.len(),
        ),
        (ContingencyKind::WindTrip, c.weight_wind_trip, winds.len()),
    ];
    let total: f64 = options.iter().filter(|o| o.2 > 0).map(|o| o.1).sum();
    if total.is_nan() || total <= 0.0 {
        return None;
    }
    let mut pick = rng.random::<f64>() * total;
    let mut kind = None;
    for o in options.iter().filter(|o| o.2 > 0 && o.1 > 0.0) {
        kind = Some(*o);
        if pick < o.1 {
            break;
        }
        pick -= o.1;
    }
    let (kind, _, count) = kind?;
    let k = rng.random_range(0..count);
    Some(match kind {
        ContingencyKind::BranchFault => faults.single[k].clone(),
        ContingencyKind::DoubleFault => faults.double[k].clone(),
        ContingencyKind::MachineTrip => {
            let m = machines[k];
            let machine = &grid.machines[m];
            Contingency {
                kind,
                description: format!(
                    "trip of {} ({:.0} MW) at bus {}",
                    machine.id,
                    op.pf.machine_p_pu[m] * grid.s_base_mva,
                    grid.buses[machine.bus.get()].number
                ),
                disturbance_bus: machine.bus.0,
                fault_bus: None,
                branches: Vec::new(),
                machine: Some(m as u32),
                wind: None,
            }
        }
        ContingencyKind::WindTrip => {
            let w = winds[k];
            let plant = &grid.wind_plants[w];
            Contingency {
                kind,
                description: format!(
                    "trip of {} ({:.0} MW) at bus {}",
                    plant.id,
                    plant.p_pu * grid.s_base_mva,
                    grid.buses[plant.bus.get()].number
                ),
                disturbance_bus: plant.bus.0,
                fault_bus: None,
                branches: Vec::new(),
                machine: None,
                wind: Some(w as u32),
            }
        }
    })
}
