//! From a dataset folder to training examples: the snapshot and disturbance of each labelled
//! sample, featurised by `holdfast-infer`, with per-bus targets and the split it belongs to.

use std::path::{Path, PathBuf};

use holdfast_core::{BranchIdx, BusIdx, Grid, MachineIdx, WindIdx};
use holdfast_infer::features::{
    Disturbance, DisturbanceKind, FeatureError, GraphInput, GridContext, Snapshot, featurise,
};
use holdfast_sim::contingency::{Contingency, ContingencyKind};
use holdfast_sim::dataset::{DatasetError, Labelled, Manifest, PointRecord, SampleBody};
use holdfast_sim::generate::Generator;
use holdfast_sim::label::Outcome;
use holdfast_sim::report::for_each_sample;
use holdfast_sim::shed::sheddable_per_load;
use holdfast_sim::study::{Study, fnv1a64};

/// Errors while reading a dataset for training.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DataError {
    /// The dataset folder or its files.
    #[error(transparent)]
    Dataset(#[from] DatasetError),
    /// A sample does not fit the dataset's grid.
    #[error("{path}: sample {index}: {source}")]
    Feature {
        /// The dataset folder.
        path: PathBuf,
        /// Sample index.
        index: u64,
        /// What is wrong.
        source: FeatureError,
    },
    /// Nothing to train on.
    #[error("{path}: {message}")]
    Empty {
        /// The dataset folder.
        path: PathBuf,
        /// What is missing.
        message: String,
    },
}

/// Which split a sample belongs to.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Split {
    /// Fitting the weights and the normalisation.
    Train,
    /// Early stopping.
    Validation,
    /// Choosing the safety margin.
    Calibration,
    /// Reporting.
    Test,
}

/// How samples are split: by a hash of (seed, sample index) into the given shares.
///
/// Every sample of a study draws its own operating point, so splitting by sample index is
/// splitting by operating point: no operating point appears in two splits.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SplitRule {
    /// Seed of the hash.
    pub seed: u64,
    /// Shares of validation, calibration and test (the rest trains).
    pub shares: [f64; 3],
}

impl SplitRule {
    /// The split of sample `index`.
    pub fn of(&self, index: u64) -> Split {
        let mut bytes = [0u8; 16];
        bytes[..8].copy_from_slice(&self.seed.to_le_bytes());
        bytes[8..].copy_from_slice(&index.to_le_bytes());
        // FNV-1a mixes the low bits poorly for short keys; a final avalanche step fixes that.
        let mut h = fnv1a64(&bytes);
        h ^= h >> 33;
        h = h.wrapping_mul(0xff51_afd7_ed55_8ccd);
        h ^= h >> 33;
        let u = (h >> 11) as f64 / (1u64 << 53) as f64;
        let [v, c, t] = self.shares;
        if u < t {
            Split::Test
        } else if u < t + c {
            Split::Calibration
        } else if u < t + c + v {
            Split::Validation
        } else {
            Split::Train
        }
    }
}

/// One labelled sample, ready for the networks.
#[derive(Clone, Debug)]
pub struct Example {
    /// Sample index in the dataset.
    pub index: u64,
    /// Its split.
    pub split: Split,
    /// Network inputs.
    pub input: GraphInput,
    /// Labelled shed per bus, pu (zero where nothing is shed).
    pub target_pu: Vec<f64>,
    /// Labelled total, pu.
    pub total_pu: f64,
    /// Contingency kind.
    pub kind: DisturbanceKind,
    /// Outcome of labelling.
    pub outcome: Outcome,
    /// Bisection tolerance of the label, pu.
    pub tolerance_pu: f64,
}

impl Example {
    /// Whether the sample needs shed (and can be saved).
    pub fn needs_shed(&self) -> bool {
        self.outcome == Outcome::Shed
    }
}

/// A dataset read for training or evaluation.
pub struct Dataset {
    /// The folder.
    pub dir: PathBuf,
    /// Its manifest.
    pub manifest: Manifest,
    /// The dataset's study and grid (its own copies), able to re-simulate any sample.
    pub generator: Generator,
    /// Savable labelled samples (no shed needed, or shed), in index order.
    pub examples: Vec<Example>,
    /// Unsavable samples by kind (no action can help; left out of training).
    pub unsavable: Vec<(u64, DisturbanceKind)>,
    /// Samples without a label (rejected or failed).
    pub unlabelled: u64,
}

/// The disturbance of a stored contingency.
pub fn disturbance_of(c: &Contingency) -> Disturbance {
    Disturbance {
        kind: match c.kind {
            ContingencyKind::BranchFault => DisturbanceKind::BranchFault,
            ContingencyKind::DoubleFault => DisturbanceKind::DoubleFault,
            ContingencyKind::MachineTrip => DisturbanceKind::MachineTrip,
            ContingencyKind::WindTrip => DisturbanceKind::WindTrip,
        },
        disturbance_bus: BusIdx(c.disturbance_bus),
        fault_bus: c.fault_bus.map(BusIdx),
        tripped_branches: c.branches.iter().map(|&b| BranchIdx(b)).collect(),
        tripped_machine: c.machine.map(MachineIdx),
        tripped_wind: c.wind.map(WindIdx),
    }
}

/// The snapshot of a stored sample, with shed-able load by the study's rule.
pub fn snapshot_of(grid: &Grid, study: &Study, l: &Labelled) -> Snapshot {
    snapshot_of_point(grid, study, &l.point)
}

/// The snapshot of an operating point's record, with shed-able load by the study's rule.
pub fn snapshot_of_point(grid: &Grid, study: &Study, p: &PointRecord) -> Snapshot {
    let s = grid.s_base_mva;
    let load_p_pu: Vec<f64> = p.load_p_mw.iter().map(|x| x / s).collect();
    Snapshot {
        bus_v_pu: p.bus_v_pu.clone(),
        bus_angle_deg: p.bus_angle_deg.clone(),
        load_p_mw: p.load_p_mw.clone(),
        load_q_mvar: p.load_q_mvar.clone(),
        load_sheddable_mw: sheddable_per_load(grid, study, &load_p_pu)
            .iter()
            .map(|x| x * s)
            .collect(),
        machine_on: p.machine_on.clone(),
        machine_p_mw: p.machine_p_mw.clone(),
        machine_q_mvar: p.machine_q_mvar.clone(),
        wind_p_mw: p.wind_p_mw.clone(),
        branch_closed: grid.branches.iter().map(|b| b.in_service).collect(),
    }
}

/// The labelled samples of a dataset folder with these indices (one pass over the shards;
/// indices without a labelled sample are absent from the map).
pub fn read_labelled(
    dir: &Path,
    indices: &[u64],
) -> Result<std::collections::HashMap<u64, Labelled>, DataError> {
    let mut found = std::collections::HashMap::new();
    for_each_sample(dir, |s| {
        if let SampleBody::Labelled(l) = &s.body
            && indices.contains(&s.index)
        {
            found.insert(s.index, (**l).clone());
        }
    })?;
    Ok(found)
}

/// Reads every labelled sample of a dataset folder. `study` replaces the folder's copy of the
/// study (see [`Generator::for_dataset`]).
pub fn read_dataset(
    dir: &Path,
    study: Option<&Path>,
    split: SplitRule,
) -> Result<Dataset, DataError> {
    let generator = Generator::for_dataset(dir, study)?;
    let grid = &generator.grid;
    let ctx = GridContext::new(grid);
    let s = grid.s_base_mva;
    let mut examples = Vec::new();
    let mut unsavable = Vec::new();
    let mut unlabelled = 0;
    let mut problem = None;
    let (manifest, _) = for_each_sample(dir, |sample| {
        let SampleBody::Labelled(l) = &sample.body else {
            unlabelled += 1;
            return;
        };
        let dist = disturbance_of(&l.contingency);
        if l.label.outcome == Outcome::Unsavable {
            unsavable.push((sample.index, dist.kind));
            return;
        }
        let snap = snapshot_of(grid, &generator.study, l);
        let input = match featurise(&ctx, &snap, &dist) {
            Ok(i) => i,
            Err(e) => {
                problem.get_or_insert((sample.index, e));
                return;
            }
        };
        let mut target_pu = vec![0.0; grid.n_buses()];
        for &(number, mw) in &l.label.shed_mw {
            if let Some(b) = grid.bus_idx(number) {
                target_pu[b.get()] += mw / s;
            }
        }
        examples.push(Example {
            index: sample.index,
            split: split.of(sample.index),
            input,
            total_pu: l.label.total_mw / s,
            target_pu,
            kind: dist.kind,
            outcome: l.label.outcome,
            tolerance_pu: l.label.tolerance_mw / s,
        });
    })?;
    if let Some((index, source)) = problem {
        return Err(DataError::Feature {
            path: dir.to_path_buf(),
            index,
            source,
        });
    }
    if examples.is_empty() {
        return Err(DataError::Empty {
            path: dir.to_path_buf(),
            message: "no labelled samples that can be saved: build more samples".into(),
        });
    }
    Ok(Dataset {
        dir: dir.to_path_buf(),
        manifest,
        generator,
        examples,
        unsavable,
        unlabelled,
    })
}

impl Dataset {
    /// The dataset's grid.
    pub fn grid(&self) -> &Grid {
        &self.generator.grid
    }

    /// Unsavable samples in one split (all of them for `None`).
    pub fn unsavable_in(&self, rule: &SplitRule, split: Option<Split>) -> usize {
        self.unsavable
            .iter()
            .filter(|(i, _)| split.is_none_or(|s| rule.of(*i) == s))
            .count()
    }

    /// The examples of one split.
    pub fn split(&self, which: Split) -> Vec<&Example> {
        self.examples.iter().filter(|e| e.split == which).collect()
    }
}
