//! Generating a dataset: sample `i` of a study from its own random stream, shards in parallel,
//! resumable, splittable across the jobs of a cluster array.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use holdfast_core::topology::{DistanceMatrix, electrical_distance};
use holdfast_core::{Grid, Outages, format};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::contingency::{FaultSet, draw_contingency};
use crate::dataset::{
    DatasetError, Labelled, Manifest, PointRecord, SHARD_FORMAT_VERSION, Sample, SampleBody,
    ShardHeader, encode_shard, grid_fingerprint, hex, io_error, read_shard, shard_file_name,
    write_atomic,
};
use crate::label::{Label, Outcome, RunSummary, SimulationOracle, bisect};
use crate::sampling::draw_operating_point;
use crate::shed::candidates;
use crate::study::{Study, parse_study, read_study};

/// The copy of the study kept in every dataset folder.
pub const STUDY_FILE: &str = "study.toml";

/// Everything needed to label any sample of a study; built once, shared by all threads.
pub struct Generator {
    /// The study.
    pub study: Study,
    /// The grid as read.
    pub grid: Grid,
    /// Fingerprint of the grid.
    pub fingerprint: u64,
    faults: FaultSet,
    distance: DistanceMatrix,
}

impl Generator {
    /// Reads the study and its grid and checks them against each other.
    pub fn open(study_path: &Path) -> Result<Generator, DatasetError> {
        let study = read_study(study_path)?;
        let grid = format::load_grid(&study.grid_path)?;
        Generator::new(study, grid, study_path)
    }

    /// From a parsed study and grid (`study_path` names the study in messages).
    pub fn new(study: Study, grid: Grid, study_path: &Path) -> Result<Generator, DatasetError> {
        study.check_against(&grid, study_path)?;
        let fingerprint = grid_fingerprint(&grid)?;
        let faults = FaultSet::new(&grid, &study);
        let distance = electrical_distance(&grid, &Outages::none());
        Ok(Generator {
            study,
            grid,
            fingerprint,
            faults,
            distance,
        })
    }

    /// The generator of a dataset folder, from its own copies of the grid and the study
    /// (`study` replaces the folder's copy, for datasets built before the copy was kept). The
    /// study must be the one the dataset was built with (same hash).
    pub fn for_dataset(dir: &Path, study: Option<&Path>) -> Result<Generator, DatasetError> {
        let manifest = Manifest::read(dir)?;
        let study_path = study.map_or_else(|| dir.join(STUDY_FILE), Path::to_path_buf);
        let text = std::fs::read_to_string(&study_path).map_err(|e| {
            if study.is_none() && e.kind() == std::io::ErrorKind::NotFound {
                DatasetError::Folder {
                    path: dir.to_path_buf(),
                    message: format!(
                        "no {STUDY_FILE} here (datasets built before it was kept): pass the \
                         study file the dataset was built with"
                    ),
                }
            } else {
                io_error(&study_path)(e)
            }
        })?;
        let mut parsed = parse_study(&text, &study_path)?;
        if hex(parsed.hash) != manifest.study_hash {
            return Err(DatasetError::Folder {
                path: study_path,
                message: format!(
                    "this study (hash {}) is not the one dataset {} was built with (hash {})",
                    hex(parsed.hash),
                    dir.display(),
                    manifest.study_hash
                ),
            });
        }
        parsed.grid_path = dir.join("grid.toml");
        let grid = format::load_grid(&parsed.grid_path)?;
        Generator::new(parsed, grid, &study_path)
    }

    /// Re-runs sample `index` with a given shed (bus, pu) at its action time and returns the
    /// verdict; the error says why the sample cannot be simulated.
    pub fn check_action(
        &self,
        index: u64,
        shed_pu: &[(holdfast_core::BusIdx, f64)],
    ) -> Result<RunSummary, String> {
        let (_, prepared) = self.prepare(index);
        let p = match prepared {
            Some(Ok(p)) => p,
            Some(Err((_, message))) => return Err(message),
            None => return Err(format!("sample {index}: every draw was rejected")),
        };
        let mut oracle = self.oracle(&p).map_err(|e| e.to_string())?;
        let verdict = oracle.run_placed(shed_pu).map_err(|e| e.to_string())?;
        Ok(RunSummary::from(&verdict))
    }

    /// The contingency set's fault lists.
    pub fn faults(&self) -> &FaultSet {
        &self.faults
    }

    /// The random stream of sample `index`: ChaCha8 seeded by the study seed, stream `index`.
    pub fn rng(&self, index: u64) -> ChaCha8Rng {
        let mut rng = ChaCha8Rng::seed_from_u64(self.study.seed);
        rng.set_stream(index);
        rng
    }

    /// Draws and labels sample `index`. Depends on nothing but the study, the grid and the
    /// index.
    pub fn sample(&self, index: u64) -> Sample {
        let (rejections, prepared) = self.prepare(index);
        let body = match prepared {
            None => SampleBody::Rejected,
            Some(Err((point, message))) => SampleBody::Failed {
                point: Box::new(point),
                message,
            },
            Some(Ok(p)) => match self.label(&p) {
                Ok(l) => SampleBody::Labelled(Box::new(l)),
                Err(message) => SampleBody::Failed {
                    point: Box::new(PointRecord::of(&p.op)),
                    message,
                },
            },
        };
        Sample {
            index,
            rejections,
            body,
        }
    }

    /// The random part of sample `index`: the rejected draws, then (unless every draw was
    /// rejected) the kept operating point with its contingency and action time, or the
    /// point and why it cannot be labelled.
    #[allow(clippy::type_complexity)] // reason: a one-off triple of outcomes, named at its use
    pub fn prepare(
        &self,
        index: u64,
    ) -> (
        Vec<crate::sampling::Rejection>,
        Option<Result<Prepared, (PointRecord, String)>>,
    ) {
        let study = &self.study;
        let mut rng = self.rng(index);
        let mut rejections = Vec::new();
        for _ in 0..study.acceptance.max_attempts {
            let (_, drawn) = draw_operating_point(&self.grid, study, &mut rng);
            let op = match drawn {
                Ok(op) => op,
                Err(r) => {
                    rejections.push(r);
                    continue;
                }
            };
            let Some(contingency) = draw_contingency(&self.faults, &op, study, &mut rng) else {
                let message = "no contingency of a weighted kind applies here".to_string();
                return (rejections, Some(Err((PointRecord::of(&op), message))));
            };
            let (lo, hi) = (study.shedding.delay_min_s, study.shedding.delay_max_s);
            let delay_s = if hi > lo {
                rng.random_range(lo..hi)
            } else {
                lo
            };
            let action_at_s = contingency.settled_at_s(&study.contingencies) + delay_s;
            let cands = candidates(&op.grid, study);
            let max_pu: f64 = cands.iter().map(|c| c.sheddable_pu).sum();
            let load_pu: f64 = op
                .grid
                .loads
                .iter()
                .filter(|l| l.in_service)
                .map(|l| l.p_pu)
                .sum();
            let tol_pu = (study.shedding.tolerance_mw / op.grid.s_base_mva)
                .max(study.shedding.tolerance_share * load_pu);
            let prepared = Prepared {
                op,
                contingency,
                delay_s,
                action_at_s,
                cands,
                max_pu,
                tol_pu,
            };
            return (rejections, Some(Ok(prepared)));
        }
        (rejections, None)
    }

    /// The simulation oracle of a prepared sample: its contingency run up to the action time.
    pub fn oracle<'a>(
        &'a self,
        p: &'a Prepared,
    ) -> Result<SimulationOracle<'a>, holdfast_core::Error> {
        SimulationOracle::new(
            &p.op,
            &p.contingency,
            &self.study,
            &self.study.simulation,
            &p.cands,
            &self.distance,
            p.action_at_s,
        )
    }

    /// Labels a prepared sample (the error says why it could not be simulated).
    pub fn label(&self, p: &Prepared) -> Result<Labelled, String> {
        let base = p.op.grid.s_base_mva;
        let mut oracle = self.oracle(p).map_err(|e| e.to_string())?;
        let (outcome, total_pu, trials, non_monotone, verdict) = if oracle.failed_before_action() {
            // The verdict is already certain: no action can undo it.
            let v = crate::label::ShedOracle::run(&mut oracle, 0.0).map_err(|e| e.to_string())?;
            (Outcome::Unsavable, p.max_pu, Vec::new(), false, v)
        } else {
            bisect(&mut oracle, p.max_pu, p.tol_pu, base).map_err(|e| e.to_string())?
        };
        let shed_mw = match outcome {
            Outcome::Shed => oracle.placement_mw(total_pu),
            _ => Vec::new(),
        };
        Ok(Labelled {
            point: PointRecord::of(&p.op),
            contingency: p.contingency.clone(),
            delay_s: p.delay_s,
            action_at_s: p.action_at_s,
            label: Label {
                outcome,
                shed_mw,
                total_mw: if outcome == Outcome::Shed {
                    total_pu * base
                } else {
                    0.0
                },
                sheddable_mw: p.max_pu * base,
                tolerance_mw: p.tol_pu * base,
                simulations: oracle.runs,
                non_monotone,
                trials,
                verdict: RunSummary::from(&verdict),
            },
        })
    }
}

/// A sample ready to label: the kept operating point, its contingency, the action time, the
/// candidates and the search range.
pub struct Prepared {
    /// The operating point.
    pub op: crate::sampling::OperatingPoint,
    /// The contingency.
    pub contingency: crate::contingency::Contingency,
    /// Delay of the action after clearing, s.
    pub delay_s: f64,
    /// Time of the action, s.
    pub action_at_s: f64,
    /// Candidate buses.
    pub cands: Vec<crate::shed::Candidate>,
    /// All shed-able load, pu.
    pub max_pu: f64,
    /// Bisection tolerance, pu.
    pub tol_pu: f64,
}

/// How to run a build.
#[derive(Clone, Debug)]
pub struct BuildOptions {
    /// Samples in the dataset.
    pub samples: u64,
    /// The dataset folder.
    pub out: PathBuf,
    /// Worker threads (0: all cores).
    pub jobs: usize,
    /// This process's part, `(k, n)` with `1 <= k <= n`: shards `j` with `j % n == k - 1`.
    pub part: (u32, u32),
    /// Continue a build: keep complete shards, write the missing ones.
    pub resume: bool,
}

/// What a build did.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct BuildReport {
    /// Shards this part owns.
    pub owned: usize,
    /// Of those, found complete and kept.
    pub kept: usize,
    /// Of those, written now.
    pub written: usize,
    /// Shards found damaged and written again.
    pub rewritten_damaged: Vec<u32>,
}

/// Reports progress; called from worker threads.
pub trait Progress: Sync {
    /// A shard's work is known: `samples` to do in total this run.
    fn start(&self, samples: u64);
    /// One sample is done.
    fn sample(&self, sample: &Sample);
    /// A shard file is on disk.
    fn shard_written(&self, shard: u32);
}

/// A progress sink that ignores everything.
pub struct Quiet;

impl Progress for Quiet {
    fn start(&self, _: u64) {}
    fn sample(&self, _: &Sample) {}
    fn shard_written(&self, _: u32) {}
}

/// Builds (or resumes) this part of a dataset.
pub fn build(
    generator: &Generator,
    opts: &BuildOptions,
    progress: &dyn Progress,
) -> Result<BuildReport, DatasetError> {
    let dir = &opts.out;
    let (k, n) = opts.part;
    if n == 0 || k == 0 || k > n {
        return Err(DatasetError::Folder {
            path: dir.clone(),
            message: format!("part {k}/{n} is not valid: use K/N with 1 <= K <= N"),
        });
    }
    std::fs::create_dir_all(dir).map_err(io_error(dir))?;
    let study = &generator.study;
    let shard_size = study.shard_size as u64;
    let shard_count = opts.samples.div_ceil(shard_size) as u32;
    let mut manifest = Manifest {
        format_version: 1,
        study_name: study.name.clone(),
        study_hash: hex(study.hash),
        grid_fingerprint: hex(generator.fingerprint),
        samples: opts.samples,
        shard_size,
        shard_count,
        complete: Vec::new(),
    };
    let (found, damaged) = check_folder(dir, &manifest, opts.resume)?;
    // The grid, canonical, so the dataset can be read without the original files.
    let grid_text = format::write_grid(&generator.grid)?;
    write_atomic(&dir.join("grid.toml"), grid_text.as_bytes())?;
    write_atomic(&dir.join(STUDY_FILE), study.text.as_bytes())?;
    manifest.complete = found.iter().copied().collect();
    manifest.write(dir)?;
    let owned: Vec<u32> = (0..shard_count).filter(|j| j % n == k - 1).collect();
    let todo: Vec<u32> = owned
        .iter()
        .copied()
        .filter(|j| !found.contains(j))
        .collect();
    let to_do_samples: u64 = todo
        .iter()
        .map(|&j| u64::from(manifest.shard_range(j).1))
        .sum();
    progress.start(to_do_samples);
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.jobs)
        .build()
        .map_err(|e| DatasetError::Folder {
            path: dir.clone(),
            message: format!("cannot start worker threads: {e}"),
        })?;
    let mut written = 0;
    let mut done = BTreeSet::new();
    for &j in &todo {
        let (first, count) = manifest.shard_range(j);
        let samples: Vec<Sample> = pool.install(|| {
            (first..first + u64::from(count))
                .into_par_iter()
                .map(|i| {
                    let s = generator.sample(i);
                    progress.sample(&s);
                    s
                })
                .collect()
        });
        let header = ShardHeader {
            format_version: SHARD_FORMAT_VERSION,
            grid_fingerprint: generator.fingerprint,
            study_hash: study.hash,
            shard: j,
            first_sample: first,
            count,
        };
        write_atomic(
            &dir.join(shard_file_name(j)),
            &encode_shard(&header, &samples),
        )?;
        written += 1;
        progress.shard_written(j);
        // Other parts may write into the same folder: list the shard files there now (by name
        // only; reading them all after every shard would cost a quadratic amount of I/O, and
        // stats, merge and resume check the files themselves).
        done.insert(j);
        let complete: Vec<u32> = (0..shard_count)
            .filter(|&s| {
                done.contains(&s)
                    || found.contains(&s)
                    || (!damaged.contains(&s) && dir.join(shard_file_name(s)).is_file())
            })
            .collect();
        manifest.complete = complete;
        manifest.write(dir)?;
    }
    Ok(BuildReport {
        owned: owned.len(),
        kept: owned.len() - todo.len(),
        written,
        rewritten_damaged: damaged.into_iter().filter(|j| owned.contains(j)).collect(),
    })
}

/// Checks the folder before a build: a manifest there must describe the same study, grid and
/// size; shard files there need `--resume`. Returns the complete shards found and the damaged
/// ones (which the build writes again: their content depends only on the study).
fn check_folder(
    dir: &Path,
    manifest: &Manifest,
    resume: bool,
) -> Result<(BTreeSet<u32>, Vec<u32>), DatasetError> {
    if dir.join("manifest.json").exists() {
        let old = Manifest::read(dir)?;
        let same = old.study_hash == manifest.study_hash
            && old.grid_fingerprint == manifest.grid_fingerprint
            && old.samples == manifest.samples
            && old.shard_size == manifest.shard_size;
        if !same {
            return Err(DatasetError::Folder {
                path: dir.to_path_buf(),
                message: format!(
                    "holds a dataset of another study, grid or size (study {}, grid {}, {} samples \
                     in shards of {}); use an empty folder",
                    old.study_hash, old.grid_fingerprint, old.samples, old.shard_size
                ),
            });
        }
    }
    let (found, damaged) = scan_shards(dir, manifest)?;
    let any_shard = std::fs::read_dir(dir)
        .map_err(io_error(dir))?
        .filter_map(Result::ok)
        .any(|e| e.file_name().to_string_lossy().starts_with("shard-"));
    if any_shard && !resume {
        return Err(DatasetError::Folder {
            path: dir.to_path_buf(),
            message: "already holds shard files: add --resume to continue that build, or use an \
                      empty folder"
                .to_string(),
        });
    }
    Ok((found, damaged.into_iter().map(|(j, _)| j).collect()))
}

/// The shards of `manifest`'s dataset present in `dir` and intact. A damaged shard is an
/// error that names it and says how to rewrite it (`--resume`).
pub fn complete_shards(dir: &Path, manifest: &Manifest) -> Result<BTreeSet<u32>, DatasetError> {
    let (complete, mut damaged) = scan_shards(dir, manifest)?;
    match damaged.pop() {
        Some((_, e)) => Err(e),
        None => Ok(complete),
    }
}

/// The intact shards in `dir`, and the damaged ones (unreadable, truncated, failing their
/// checksum) with why. A readable shard of another study or layout is an error.
#[allow(clippy::type_complexity)] // reason: a pair of plain collections, named at the use
pub fn scan_shards(
    dir: &Path,
    manifest: &Manifest,
) -> Result<(BTreeSet<u32>, Vec<(u32, DatasetError)>), DatasetError> {
    let mut out = BTreeSet::new();
    let mut damaged = Vec::new();
    for j in 0..manifest.shard_count {
        let path = dir.join(shard_file_name(j));
        if !path.exists() {
            continue;
        }
        let h = match read_shard(&path) {
            Ok((h, _)) => h,
            Err(e @ DatasetError::Shard { .. }) => {
                damaged.push((j, e));
                continue;
            }
            Err(e) => return Err(e),
        };
        let (first, count) = manifest.shard_range(j);
        if format!("{:016x}", h.study_hash) != manifest.study_hash
            || format!("{:016x}", h.grid_fingerprint) != manifest.grid_fingerprint
            || h.shard != j
            || h.first_sample != first
            || h.count != count
        {
            return Err(DatasetError::Shard {
                path,
                problem: "belongs to another study, grid or shard layout".to_string(),
                fix: "remove it from this folder".to_string(),
            });
        }
        out.insert(j);
    }
    Ok((out, damaged))
}
