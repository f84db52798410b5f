//! From a dataset folder to training examples: the snapshot and disturbance of each labelled
//! sample, featurised by `holdfast-infer`, with per-bus targets and the split it belongs to.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use holdfast_core::{BranchIdx, BusIdx, Grid, MachineIdx, WindIdx};
use holdfast_infer::features::{
    Disturbance, DisturbanceKind, FeatureError, GraphInput, GridContext, Snapshot, featurise,
};
use holdfast_infer::model::Normalisation;
use holdfast_sim::contingency::{Contingency, ContingencyKind};
use holdfast_sim::dataset::{
    DatasetError, Labelled, Manifest, PointRecord, SampleBody, read_shard, shard_file_name,
};
use holdfast_sim::generate::{Generator, complete_shards};
use holdfast_sim::label::Outcome;
use holdfast_sim::report::for_each_sample;
use holdfast_sim::shed::sheddable_per_load;
use holdfast_sim::study::{Study, fnv1a64};

use crate::net::NormalisationFit;

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
    /// A pass over the shards cannot go on.
    #[error("{path}: {message}")]
    Pass {
        /// The dataset folder.
        path: PathBuf,
        /// What went wrong.
        message: String,
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

/// Savable labelled samples per split.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct SplitCounts {
    /// Training.
    pub train: usize,
    /// Validation.
    pub validation: usize,
    /// Calibration.
    pub calibration: usize,
    /// Test.
    pub test: usize,
}

impl SplitCounts {
    /// The count of one split.
    pub fn of(&self, split: Split) -> usize {
        match split {
            Split::Train => self.train,
            Split::Validation => self.validation,
            Split::Calibration => self.calibration,
            Split::Test => self.test,
        }
    }

    /// All savable samples.
    pub fn total(&self) -> usize {
        self.train + self.validation + self.calibration + self.test
    }

    fn add(&mut self, split: Split) {
        *match split {
            Split::Train => &mut self.train,
            Split::Validation => &mut self.validation,
            Split::Calibration => &mut self.calibration,
            Split::Test => &mut self.test,
        } += 1;
    }
}

/// How much of a dataset is kept in memory.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct MemoryBudget {
    /// Featurised examples kept in memory, bytes: shards are kept in order until the next would
    /// pass this; the rest are read from disk and featurised again on every pass.
    pub cache_bytes: usize,
}

impl MemoryBudget {
    /// Everything in memory (tests, small datasets).
    pub const UNLIMITED: MemoryBudget = MemoryBudget {
        cache_bytes: usize::MAX,
    };
    /// Nothing kept: every pass reads the shards again.
    pub const STREAM: MemoryBudget = MemoryBudget { cache_bytes: 0 };

    /// A budget in mebibytes.
    pub fn mib(mib: usize) -> MemoryBudget {
        MemoryBudget {
            cache_bytes: mib.saturating_mul(1 << 20),
        }
    }
}

/// Where one shard's examples come from.
struct Shard {
    /// Its file in the dataset folder (`None`: held in memory only).
    file: Option<u32>,
    /// Its savable examples, when kept in memory.
    kept: Option<Arc<Vec<Example>>>,
    /// How many savable examples it held when the dataset was opened.
    savable: usize,
}

/// A dataset opened for training or evaluation: its grid and study, counts per split, the
/// training split's normalisation, and its examples shard by shard.
///
/// The examples are not all held: shards are kept in memory up to a [`MemoryBudget`] and the
/// rest are read and featurised again on every pass (one shard ahead, on a second thread), so a
/// dataset larger than memory can be trained on. Passes visit the same examples in the same
/// order whatever the budget, so training results do not depend on it.
pub struct Dataset {
    /// The folder.
    pub dir: PathBuf,
    /// Its manifest.
    pub manifest: Manifest,
    /// The dataset's study and grid (its own copies), able to re-simulate any sample.
    pub generator: Generator,
    /// How samples are split.
    pub split_rule: SplitRule,
    /// Savable labelled samples (no shed needed, or shed) per split.
    pub counts: SplitCounts,
    /// Unsavable samples by kind (no action can help; left out of training).
    pub unsavable: Vec<(u64, DisturbanceKind)>,
    /// Samples without a label (rejected or failed).
    pub unlabelled: u64,
    /// Per-feature mean and deviation over the training split.
    pub train_normalisation: Normalisation,
    /// Bytes of featurised examples kept in memory.
    pub kept_bytes: usize,
    context: GridContext,
    shards: Vec<Shard>,
}

/// Opens a dataset folder with every shard kept in memory. `study` replaces the folder's copy
/// of the study (see [`Generator::for_dataset`]).
pub fn read_dataset(
    dir: &Path,
    study: Option<&Path>,
    split: SplitRule,
) -> Result<Dataset, DataError> {
    open_dataset(dir, study, split, MemoryBudget::UNLIMITED)
}

/// Opens a dataset folder: one pass over its complete shards that featurises every sample
/// (so a sample that does not fit the grid is reported now, not in epoch 12), counts the
/// splits and fits the training split's normalisation, keeping shards in memory within
/// `budget`.
pub fn open_dataset(
    dir: &Path,
    study: Option<&Path>,
    split: SplitRule,
    budget: MemoryBudget,
) -> Result<Dataset, DataError> {
    let generator = Generator::for_dataset(dir, study)?;
    let manifest = Manifest::read(dir)?;
    let complete = complete_shards(dir, &manifest)?;
    let context = GridContext::new(&generator.grid);
    let mut data = Dataset {
        dir: dir.to_path_buf(),
        manifest,
        generator,
        split_rule: split,
        counts: SplitCounts::default(),
        unsavable: Vec::new(),
        unlabelled: 0,
        train_normalisation: Normalisation::identity(),
        kept_bytes: 0,
        context,
        shards: complete
            .iter()
            .map(|&j| Shard {
                file: Some(j),
                kept: None,
                savable: 0,
            })
            .collect(),
    };
    let mut fit = NormalisationFit::default();
    let mut keeping = true;
    for (k, &j) in complete.iter().enumerate() {
        let (examples, unsavable, unlabelled) = data.load(j)?;
        data.unsavable.extend(unsavable);
        data.unlabelled += unlabelled;
        tally(&examples, &mut data.counts, &mut fit);
        data.shards[k].savable = examples.len();
        let bytes: usize = examples.iter().map(Example::heap_bytes).sum();
        keeping &= data.kept_bytes.saturating_add(bytes) <= budget.cache_bytes;
        if keeping {
            data.kept_bytes += bytes;
            data.shards[k].kept = Some(Arc::new(examples));
        }
    }
    if data.counts.total() == 0 {
        return Err(DataError::Empty {
            path: dir.to_path_buf(),
            message: "no labelled samples that can be saved: build more samples".into(),
        });
    }
    data.train_normalisation = fit.finish();
    Ok(data)
}

/// Counts examples by split and adds the training ones to the normalisation fit.
fn tally(examples: &[Example], counts: &mut SplitCounts, fit: &mut NormalisationFit) {
    for e in examples {
        counts.add(e.split);
        if e.split == Split::Train {
            fit.add(&e.input);
        }
    }
}

impl Example {
    /// Heap bytes this example holds (its vectors' lengths; allocator overhead not counted).
    pub fn heap_bytes(&self) -> usize {
        let i = &self.input;
        let csr = |c: &holdfast_infer::features::Csr| 4 * (c.start.len() + c.index.len());
        4 * (i.bus_x.len() + i.branch_x.len())
            + csr(&i.bus_adj)
            + csr(&i.branch_adj)
            + csr(&i.bus_branches)
            + 8 * (i.sheddable_pu.len() + self.target_pu.len())
            + std::mem::size_of::<Example>()
    }
}

/// The examples of shards, visited one shard at a time (see [`Dataset::for_each_shard`]).
pub type ShardExamples = Arc<Vec<Example>>;

impl Dataset {
    /// Reads and featurises shard file `j`: its savable examples,
    /// unsavable samples and the count of unlabelled ones.
    #[allow(clippy::type_complexity)] // reason: three plain parts, named at the one use
    fn load(&self, j: u32) -> Result<(Vec<Example>, Vec<(u64, DisturbanceKind)>, u64), DataError> {
        let (_, samples) = read_shard(&self.dir.join(shard_file_name(j)))?;
        let grid = &self.generator.grid;
        let s = grid.s_base_mva;
        let mut examples = Vec::new();
        let mut unsavable = Vec::new();
        let mut unlabelled = 0;
        for sample in samples {
            let SampleBody::Labelled(l) = &sample.body else {
                unlabelled += 1;
                continue;
            };
            let dist = disturbance_of(&l.contingency);
            if l.label.outcome == Outcome::Unsavable {
                unsavable.push((sample.index, dist.kind));
                continue;
            }
            let snap = snapshot_of(grid, &self.generator.study, l);
            let input =
                featurise(&self.context, &snap, &dist).map_err(|source| DataError::Feature {
                    path: self.dir.clone(),
                    index: sample.index,
                    source,
                })?;
            let mut target_pu = vec![0.0; grid.n_buses()];
            for &(number, mw) in &l.label.shed_mw {
                if let Some(b) = grid.bus_idx(number) {
                    target_pu[b.get()] += mw / s;
                }
            }
            examples.push(Example {
                index: sample.index,
                split: self.split_rule.of(sample.index),
                input,
                total_pu: l.label.total_mw / s,
                target_pu,
                kind: dist.kind,
                outcome: l.label.outcome,
                tolerance_pu: l.label.tolerance_mw / s,
            });
        }
        Ok((examples, unsavable, unlabelled))
    }

    /// The examples of one shard, from memory or from its file.
    fn shard(&self, k: usize) -> Result<ShardExamples, DataError> {
        match &self.shards[k] {
            Shard {
                kept: Some(kept), ..
            } => Ok(Arc::clone(kept)),
            Shard {
                file: Some(j),
                kept: None,
                savable,
            } => {
                let examples = self.load(*j)?.0;
                if examples.len() != *savable {
                    return Err(DataError::Pass {
                        path: self.dir.join(shard_file_name(*j)),
                        message: format!(
                            "held {savable} savable samples when the dataset was opened and {} \
                             now: the folder changed during the run; start it again",
                            examples.len()
                        ),
                    });
                }
                Ok(Arc::new(examples))
            }
            Shard {
                file: None,
                kept: None,
                ..
            } => Ok(Arc::default()),
        }
    }

    /// Number of shards.
    pub fn shard_count(&self) -> usize {
        self.shards.len()
    }

    /// Shards kept in memory.
    pub fn shards_kept(&self) -> usize {
        self.shards.iter().filter(|s| s.kept.is_some()).count()
    }

    /// Calls `f` with the savable examples of each shard in `order` (positions in the
    /// dataset's list, each below [`Dataset::shard_count`]; all of them in order for `None`).
    /// Shards not kept in memory are read one ahead on a second thread. Stops at the first
    /// error, of reading or of `f`.
    pub fn for_each_shard<E: From<DataError>>(
        &self,
        order: Option<&[usize]>,
        mut f: impl FnMut(&ShardExamples) -> Result<(), E>,
    ) -> Result<(), E> {
        let all: Vec<usize>;
        let order = match order {
            Some(o) => o,
            None => {
                all = (0..self.shards.len()).collect();
                &all
            }
        };
        if let Some(&k) = order.iter().find(|&&k| k >= self.shards.len()) {
            return Err(DataError::Pass {
                path: self.dir.clone(),
                message: format!(
                    "shard position {k} asked for; the dataset has {} shards",
                    self.shards.len()
                ),
            }
            .into());
        }
        if order.iter().all(|&k| self.shards[k].kept.is_some()) {
            for &k in order {
                f(&self.shard(k)?)?;
            }
            return Ok(());
        }
        std::thread::scope(|scope| {
            // One shard ahead: the reader blocks until the one before it is taken.
            let (send, receive) = std::sync::mpsc::sync_channel(1);
            scope.spawn(move || {
                for &k in order {
                    if self.shards[k].kept.is_none() && send.send(self.shard(k)).is_err() {
                        return; // the visit stopped early
                    }
                }
            });
            for &k in order {
                let shard = if self.shards[k].kept.is_some() {
                    self.shard(k)?
                } else {
                    receive.recv().map_err(|_| DataError::Pass {
                        path: self.dir.clone(),
                        message: "the shard reader stopped unexpectedly".into(),
                    })??
                };
                f(&shard)?;
            }
            Ok(())
        })
    }

    /// The examples of one split (all savable examples for `None`), in index order, collected
    /// in memory: for reports and tests on datasets that fit.
    pub fn collect(&self, split: Option<Split>) -> Result<Vec<Example>, DataError> {
        let mut out = Vec::new();
        self.for_each_shard(None, |shard| {
            out.extend(
                shard
                    .iter()
                    .filter(|e| split.is_none_or(|s| e.split == s))
                    .cloned(),
            );
            Ok::<(), DataError>(())
        })?;
        Ok(out)
    }

    /// The same dataset holding these examples instead, in memory in shards of the dataset's
    /// shard size (benchmarks that repeat a small dataset's examples). The splits and the
    /// normalisation are recounted from the examples' own `split`; unsavable and unlabelled
    /// samples are dropped.
    pub fn with_examples(mut self, examples: Vec<Example>) -> Dataset {
        let size = (self.manifest.shard_size as usize).max(1);
        self.counts = SplitCounts::default();
        let mut fit = NormalisationFit::default();
        tally(&examples, &mut self.counts, &mut fit);
        self.train_normalisation = fit.finish();
        self.kept_bytes = examples.iter().map(Example::heap_bytes).sum();
        self.unsavable.clear();
        self.unlabelled = 0;
        self.shards.clear();
        let mut rest = examples.into_iter().peekable();
        while rest.peek().is_some() {
            let examples: Vec<Example> = rest.by_ref().take(size).collect();
            self.shards.push(Shard {
                file: None,
                savable: examples.len(),
                kept: Some(Arc::new(examples)),
            });
        }
        self
    }

    /// The dataset's grid.
    pub fn grid(&self) -> &Grid {
        &self.generator.grid
    }

    /// Unsavable samples in one split (all of them for `None`).
    pub fn unsavable_in(&self, split: Option<Split>) -> usize {
        self.unsavable
            .iter()
            .filter(|(i, _)| split.is_none_or(|s| self.split_rule.of(*i) == s))
            .count()
    }
}
