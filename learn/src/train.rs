//! Training: Adam over shuffled mini-batches, validation with the serving forward pass, early
//! stopping, a checkpoint after every epoch (resumable), fine-tuning from a model file, and
//! the split-conformal safety margin.

use std::path::{Path, PathBuf};

use burn::prelude::*;
use holdfast_core::format::{seal, unseal};
use holdfast_infer::forward::Network;
use holdfast_infer::model::{
    Architecture, Array, Margin, ModelError, ModelFile, Normalisation, RecheckSettings,
    TrainingInfo, write_atomic,
};
use holdfast_sim::study::{Study, fnv1a64};
use rand::SeedableRng;
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::data::{DataError, Dataset, Example, Split, SplitRule};
use crate::loss::{Loss, LossSum};
use crate::net::{build_batch, forward, init_parameters, parameter_tensors};

/// The training device: burn's CPU backend chosen at build time, with autodiff.
pub fn training_device() -> Device {
    cpu_device().autodiff()
}

/// burn's CPU backend chosen at build time (`flex` by default, `ndarray` as an opt-in).
pub fn cpu_device() -> Device {
    #[cfg(feature = "flex")]
    {
        Device::flex()
    }
    #[cfg(all(feature = "ndarray", not(feature = "flex")))]
    #[allow(deprecated)] // reason: the opt-in backend is deprecated upstream; kept on purpose
    {
        Device::ndarray()
    }
}

/// Name of the backend in this build.
pub fn backend_name() -> &'static str {
    if cfg!(feature = "flex") {
        "flex"
    } else {
        "ndarray"
    }
}

/// Errors of training.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum TrainError {
    /// A model or checkpoint file.
    #[error(transparent)]
    Model(#[from] ModelError),
    /// The settings cannot be used.
    #[error("{0}")]
    Settings(String),
    /// The dataset.
    #[error(transparent)]
    Data(#[from] DataError),
    /// A checkpoint that cannot be used.
    #[error("{path}: {message}")]
    Checkpoint {
        /// The checkpoint file.
        path: PathBuf,
        /// What is wrong and what to do.
        message: String,
    },
}

/// Training settings.
#[derive(Clone, Debug, PartialEq)]
pub struct TrainConfig {
    /// Network shape.
    pub architecture: Architecture,
    /// Loss.
    pub loss: Loss,
    /// Most epochs.
    pub epochs: usize,
    /// Samples per batch.
    pub batch: usize,
    /// Adam's learning rate.
    pub learning_rate: f64,
    /// Epochs without a better validation loss before stopping.
    pub patience: usize,
    /// Seed of initialisation, shuffling and neighbour sampling.
    pub seed: u64,
    /// Neighbours kept per node and layer while training (`None`: all).
    pub neighbours: Option<usize>,
    /// How samples are split.
    pub split: SplitRule,
    /// Under-shed rate the safety margin is chosen for.
    pub target_under_rate: f64,
    /// Training examples shuffled together: each epoch visits the shards in a shuffled order
    /// and shuffles the examples of consecutive shards in windows of at least this many
    /// (all of them when the training split is no larger), so memory holds one window, not
    /// the dataset. Samples are independent draws, so a window already mixes well.
    pub shuffle_window: usize,
}

impl TrainConfig {
    /// The default shuffle window, examples.
    pub const SHUFFLE_WINDOW: usize = 4096;

    /// Settings as `name=value` pairs, for the model file and the checkpoint.
    pub fn settings(&self) -> Vec<(String, String)> {
        vec![
            ("architecture".into(), format!("{:?}", self.architecture)),
            ("loss".into(), self.loss.describe()),
            ("epochs".into(), self.epochs.to_string()),
            ("batch".into(), self.batch.to_string()),
            ("learning_rate".into(), self.learning_rate.to_string()),
            ("patience".into(), self.patience.to_string()),
            ("seed".into(), self.seed.to_string()),
            ("neighbours".into(), format!("{:?}", self.neighbours)),
            ("split".into(), format!("{:?}", self.split)),
            (
                "target_under_rate".into(),
                self.target_under_rate.to_string(),
            ),
            ("shuffle_window".into(), self.shuffle_window.to_string()),
            ("backend".into(), backend_name().into()),
        ]
    }
}

/// Adam (Kingma and Ba): `m = b1 m + (1 - b1) g`, `v = b2 v + (1 - b2) g^2`,
/// `w -= lr * m_hat / (sqrt(v_hat) + eps)` with bias-corrected `m_hat`, `v_hat`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Adam {
    /// First-moment estimates, per parameter array.
    pub m: Vec<Vec<f32>>,
    /// Second-moment estimates.
    pub v: Vec<Vec<f32>>,
    /// Steps taken.
    pub t: u64,
}

impl Adam {
    /// Decay of the first moment.
    pub const BETA1: f64 = 0.9;
    /// Decay of the second moment.
    pub const BETA2: f64 = 0.999;
    /// Added to the root of the second moment.
    pub const EPS: f64 = 1e-8;

    /// Zero moments for these parameters.
    pub fn new(params: &[Array]) -> Adam {
        Adam {
            m: params.iter().map(|a| vec![0.0; a.data.len()]).collect(),
            v: params.iter().map(|a| vec![0.0; a.data.len()]).collect(),
            t: 0,
        }
    }

    /// One step over every parameter array with its gradient.
    pub fn step(&mut self, params: &mut [Array], grads: &[Vec<f32>], lr: f64) {
        self.t += 1;
        let t = self.t as i32;
        let c1 = 1.0 - Self::BETA1.powi(t);
        let c2 = 1.0 - Self::BETA2.powi(t);
        for (k, (p, g)) in params.iter_mut().zip(grads).enumerate() {
            for (i, (w, &gi)) in p.data.iter_mut().zip(g).enumerate() {
                let gi = f64::from(gi);
                let m = Self::BETA1 * f64::from(self.m[k][i]) + (1.0 - Self::BETA1) * gi;
                let v = Self::BETA2 * f64::from(self.v[k][i]) + (1.0 - Self::BETA2) * gi * gi;
                self.m[k][i] = m as f32;
                self.v[k][i] = v as f32;
                let update = lr * (m / c1) / ((v / c2).sqrt() + Self::EPS);
                *w = (f64::from(*w) - update) as f32;
            }
        }
    }
}

/// Everything needed to continue training after a crash, written after every epoch.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Checkpoint {
    /// Fingerprint of the settings and dataset; a resume must match it.
    pub key: String,
    /// Epochs completed.
    pub epochs_done: usize,
    /// Current parameters.
    pub params: Vec<Array>,
    /// Optimiser state.
    pub adam: Adam,
    /// Normalisation in use.
    pub normalisation: Normalisation,
    /// Best parameters so far, their epoch and validation loss.
    pub best: Vec<Array>,
    /// Epoch of the best parameters, counted from 1.
    pub best_epoch: usize,
    /// Their validation loss.
    pub best_loss: f64,
    /// Per epoch: mean training loss, validation loss.
    pub history: Vec<(f64, f64)>,
}

const CHECKPOINT_MAGIC: &[u8; 8] = b"HFCHKPT1";

impl Checkpoint {
    fn write(&self, path: &Path) -> Result<(), TrainError> {
        let body =
            bincode::serde::encode_to_vec(self, bincode::config::standard()).unwrap_or_default();
        Ok(write_atomic(path, &seal(CHECKPOINT_MAGIC, &body))?)
    }

    fn read(path: &Path) -> Result<Checkpoint, TrainError> {
        let bad = |message: String| TrainError::Checkpoint {
            path: path.to_path_buf(),
            message: format!("{message}; delete it to start afresh"),
        };
        let bytes = std::fs::read(path).map_err(|e| bad(e.to_string()))?;
        let body = unseal(CHECKPOINT_MAGIC, &bytes).map_err(bad)?;
        let cfg = bincode::config::standard().with_limit::<{ 1 << 30 }>();
        bincode::serde::decode_from_slice(body, cfg)
            .map(|(c, _)| c)
            .map_err(|e| bad(format!("cannot decode: {e}")))
    }
}

/// Reports training progress.
pub trait TrainProgress {
    /// An epoch starts with this many batches.
    fn epoch_start(&self, epoch: usize, batches: usize);
    /// A batch finished with this loss.
    fn batch(&self, loss: f64);
    /// An epoch finished.
    fn epoch_end(&self, epoch: usize, train_loss: f64, validation_loss: f64, best: bool);
}

/// Reports nothing.
pub struct Silent;

impl TrainProgress for Silent {
    fn epoch_start(&self, _: usize, _: usize) {}
    fn batch(&self, _: f64) {}
    fn epoch_end(&self, _: usize, _: f64, _: f64, _: bool) {}
}

/// Where training starts from and where it keeps its checkpoint.
#[derive(Clone, Debug, Default)]
pub struct TrainRun {
    /// Checkpoint file (none: no checkpoints).
    pub checkpoint: Option<PathBuf>,
    /// Continue from the checkpoint if it exists.
    pub resume: bool,
    /// Start from this model's weights and normalisation (fine-tuning).
    pub init_from: Option<ModelFile>,
}

/// The outcome of training.
pub struct Trained {
    /// The model file (margin and record filled in).
    pub model: ModelFile,
    /// Per epoch: training and validation loss.
    pub history: Vec<(f64, f64)>,
    /// Seconds per epoch, measured (training steps and validation).
    pub epoch_seconds: Vec<f64>,
    /// Of which in training steps (batches, forward, backward, Adam).
    pub step_seconds: Vec<f64>,
}

/// A model file holding these parameters.
pub fn model_file(
    arch: &Architecture,
    norm: &Normalisation,
    params: &[Array],
    data: &Dataset,
) -> ModelFile {
    ModelFile::new(
        arch.clone(),
        norm.clone(),
        params.to_vec(),
        data.generator.fingerprint,
        data.grid().name.clone(),
        recheck_settings(&data.generator.study),
    )
}

/// The settings the advisor re-checks an action with: the study's contingency timing,
/// action delays, placement rule and simulation.
pub fn recheck_settings(study: &Study) -> RecheckSettings {
    RecheckSettings {
        timing: study.contingencies.timing(),
        action_delay_min_s: study.shedding.delay_min_s,
        action_delay_max_s: study.shedding.delay_max_s,
        placement: study.shedding.placement,
        simulation: study.simulation.clone(),
    }
}

/// The loss of the serving forward pass over one split, read shard by shard.
pub fn split_loss(
    loss: &Loss,
    model: &ModelFile,
    data: &Dataset,
    split: Split,
) -> Result<f64, TrainError> {
    let net = Network::new(model)?;
    let mut sum = LossSum::default();
    data.for_each_shard(None, |shard| {
        for e in shard.iter().filter(|e| e.split == split) {
            sum.add(loss, &net.predict(&e.input)?, &e.target_pu);
        }
        Ok::<(), TrainError>(())
    })?;
    Ok(sum.value())
}

/// What a checkpoint must agree on to be resumed: every setting that shapes the epochs
/// already run (not the number of epochs, the patience or the margin target, which only decide
/// when to stop and what to do after), and the dataset.
fn run_key(config: &TrainConfig, data: &Dataset) -> String {
    let shaping: Vec<(String, String)> = config
        .settings()
        .into_iter()
        .filter(|(k, _)| !matches!(k.as_str(), "epochs" | "patience" | "target_under_rate"))
        .collect();
    let text = format!(
        "{shaping:?}|{}|{}|{}",
        data.manifest.study_hash,
        data.manifest.samples,
        data.counts.total()
    );
    format!("{:016x}", fnv1a64(text.as_bytes()))
}

/// Trains a model on the dataset's training split.
pub fn train(
    data: &Dataset,
    config: &TrainConfig,
    run: &TrainRun,
    progress: &dyn TrainProgress,
) -> Result<Trained, TrainError> {
    if config.batch == 0 || config.epochs == 0 {
        return Err(TrainError::Settings(
            "batch size and epochs must be at least 1".into(),
        ));
    }
    let counts = data.counts;
    if counts.train == 0 || counts.validation == 0 {
        return Err(TrainError::Settings(format!(
            "{} training and {} validation samples: build a larger dataset",
            counts.train, counts.validation
        )));
    }
    let arch = &config.architecture;
    let key = run_key(config, data);
    let resumed = match (&run.checkpoint, run.resume) {
        (Some(path), true) if path.is_file() => {
            let c = Checkpoint::read(path)?;
            if c.key != key {
                return Err(TrainError::Checkpoint {
                    path: path.clone(),
                    message: "written by a run with other settings or another dataset; \
                              delete it or repeat those settings"
                        .into(),
                });
            }
            Some(c)
        }
        (Some(path), false) if path.is_file() => {
            return Err(TrainError::Checkpoint {
                path: path.clone(),
                message: "a checkpoint exists: pass --resume to continue it, or delete it".into(),
            });
        }
        _ => None,
    };
    let mut state = match resumed {
        Some(c) => c,
        None => {
            let (params, normalisation) = match &run.init_from {
                Some(m) => {
                    if m.architecture != *arch {
                        return Err(TrainError::Settings(format!(
                            "--init-from model has architecture {:?}; this run asks for {:?}",
                            m.architecture, arch
                        )));
                    }
                    let params = arch
                        .parameters()
                        .into_iter()
                        .map(|(name, _)| m.array(&name).cloned())
                        .collect::<Option<Vec<Array>>>()
                        .ok_or_else(|| {
                            TrainError::Settings("--init-from model lacks weights".into())
                        })?;
                    (params, m.normalisation.clone())
                }
                None => {
                    let mut init_rng = ChaCha8Rng::seed_from_u64(config.seed);
                    init_rng.set_stream(u64::MAX);
                    (
                        init_parameters(arch, &mut init_rng),
                        data.train_normalisation.clone(),
                    )
                }
            };
            Checkpoint {
                key,
                epochs_done: 0,
                adam: Adam::new(&params),
                best: params.clone(),
                params,
                normalisation,
                best_epoch: 0,
                best_loss: f64::INFINITY,
                history: Vec::new(),
            }
        }
    };
    let device = training_device();
    let mut epoch_seconds = Vec::new();
    let mut step_seconds = Vec::new();
    while state.epochs_done < config.epochs
        && state.epochs_done.saturating_sub(state.best_epoch) < config.patience.max(1)
    {
        let epoch = state.epochs_done + 1;
        let started = std::time::Instant::now();
        // Each epoch's shuffle and neighbour draws depend only on (seed, epoch), so a resumed
        // run repeats an uninterrupted one.
        let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
        rng.set_stream(epoch as u64);
        let mut order: Vec<usize> = (0..data.shard_count()).collect();
        order.shuffle(&mut rng);
        progress.epoch_start(epoch, counts.train.div_ceil(config.batch));
        let mut sum = 0.0;
        let mut step = |chunk: &[&Example], rng: &mut ChaCha8Rng| {
            let batch = build_batch(
                chunk,
                arch,
                &state.normalisation,
                config.neighbours,
                rng,
                &device,
            );
            let tensors = parameter_tensors(&state.params, &device, true);
            let pred = forward(arch, &tensors, &batch);
            let loss = config.loss.tensor(pred, batch.target.clone());
            let value = f64::from(loss.clone().into_scalar::<f32>());
            let grads = loss.backward();
            let g: Vec<Vec<f32>> = tensors
                .iter()
                .zip(&state.params)
                .map(|(t, a)| {
                    t.grad(&grads)
                        .and_then(|g| g.into_data().try_into_vec::<f32>().ok())
                        .unwrap_or_else(|| vec![0.0; a.data.len()])
                })
                .collect();
            state.adam.step(&mut state.params, &g, config.learning_rate);
            sum += value * chunk.len() as f64;
            progress.batch(value);
        };
        let mut window = ShuffleWindow::new();
        data.for_each_shard(Some(&order), |shard| {
            let train = shard.iter().filter(|e| e.split == Split::Train).cloned();
            if window.push(train) >= config.shuffle_window {
                window.drain(false, config.batch, &mut rng, &mut step);
            }
            Ok::<(), TrainError>(())
        })?;
        window.drain(true, config.batch, &mut rng, &mut step);
        step_seconds.push(started.elapsed().as_secs_f64());
        let train_loss = sum / counts.train as f64;
        let current = model_file(arch, &state.normalisation, &state.params, data);
        let val = split_loss(&config.loss, &current, data, Split::Validation)?;
        let improved = val < state.best_loss;
        if improved {
            state.best_loss = val;
            state.best_epoch = epoch;
            state.best = state.params.clone();
        }
        state.history.push((train_loss, val));
        state.epochs_done = epoch;
        epoch_seconds.push(started.elapsed().as_secs_f64());
        if let Some(path) = &run.checkpoint {
            state.write(path)?;
        }
        progress.epoch_end(epoch, train_loss, val, improved);
        if !train_loss.is_finite() {
            return Err(TrainError::Settings(format!(
                "the training loss became {train_loss} in epoch {epoch}: lower the learning rate"
            )));
        }
    }
    let mut model = model_file(arch, &state.normalisation, &state.best, data);
    model.margin = calibrate(&model, data, config.target_under_rate)?;
    model.training = TrainingInfo {
        dataset: data.dir.display().to_string(),
        study: data.manifest.study_name.clone(),
        study_hash: data.manifest.study_hash.clone(),
        split_seed: config.split.seed,
        split_shares: config.split.shares,
        loss: config.loss.describe(),
        split_sizes: [
            counts.train,
            counts.validation,
            counts.calibration,
            counts.test,
        ],
        seed: config.seed,
        epochs_run: state.epochs_done,
        best_epoch: state.best_epoch,
        validation_loss: state.best_loss,
        settings: config.settings(),
    };
    Ok(Trained {
        model,
        history: state.history,
        epoch_seconds,
        step_seconds,
    })
}

/// Total shed with margin share `share`: `sum_i min(s_i, p_i + share * s_i)`.
fn total_with_margin(pred: &[f64], sheddable: &[f64], share: f64) -> f64 {
    pred.iter()
        .zip(sheddable)
        .map(|(&p, &s)| (p + share * s).min(s))
        .sum()
}

/// The smallest margin share that lifts this prediction's total to `target_pu` (0 if it is
/// there already; 1 sheds everything).
pub fn needed_margin(pred: &[f64], sheddable: &[f64], target_pu: f64) -> f64 {
    if total_with_margin(pred, sheddable, 0.0) >= target_pu {
        return 0.0;
    }
    let (mut lo, mut hi) = (0.0, 1.0);
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if total_with_margin(pred, sheddable, mid) >= target_pu {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    hi
}

/// Split-conformal margin: over the calibration samples that need shed, the
/// `ceil((n + 1)(1 - alpha))`-th smallest needed margin, so that the under-shed rate on new
/// samples from the same distribution is at most `alpha` (Vovk et al.; Angelopoulos and Bates,
/// "A gentle introduction to conformal prediction", 2021, section 1).
pub fn conformal_margin(mut needed: Vec<f64>, alpha: f64) -> f64 {
    let n = needed.len();
    if n == 0 {
        return 0.0;
    }
    needed.sort_by(f64::total_cmp);
    let rank = (((n + 1) as f64) * (1.0 - alpha)).ceil() as usize;
    if rank == 0 {
        0.0
    } else if rank > n {
        1.0
    } else {
        needed[rank - 1]
    }
}

/// Chooses the model's safety margin on the dataset's calibration split.
pub fn calibrate(
    model: &ModelFile,
    data: &Dataset,
    target_under_rate: f64,
) -> Result<Margin, TrainError> {
    let net = Network::new(model)?;
    let mut needed = Vec::new();
    data.for_each_shard(None, |shard| {
        for e in shard
            .iter()
            .filter(|e| e.split == Split::Calibration && e.needs_shed())
        {
            let p = net.predict(&e.input)?;
            needed.push(needed_margin(&p, &e.input.sheddable_pu, e.total_pu));
        }
        Ok::<(), TrainError>(())
    })?;
    let calibration_samples = needed.len();
    Ok(Margin {
        share_of_sheddable: conformal_margin(needed, target_under_rate),
        target_under_rate,
        calibration_samples,
    })
}

/// Items of consecutive shards (the training examples), pooled until a window is full, then
/// shuffled and cut into batches; the few left over (less than a batch) stay for the next
/// window, so every item is handed out once per epoch and all batches but the last are full.
struct ShuffleWindow<T> {
    pool: Vec<T>,
}

impl<T> ShuffleWindow<T> {
    /// An empty window.
    fn new() -> ShuffleWindow<T> {
        ShuffleWindow { pool: Vec::new() }
    }

    /// Adds items; returns how many are pooled.
    fn push(&mut self, items: impl IntoIterator<Item = T>) -> usize {
        self.pool.extend(items);
        self.pool.len()
    }

    /// Shuffles the pool and hands out full batches (and the last, partial one when `last`).
    fn drain(
        &mut self,
        last: bool,
        batch: usize,
        rng: &mut ChaCha8Rng,
        step: &mut impl FnMut(&[&T], &mut ChaCha8Rng),
    ) {
        self.pool.shuffle(rng);
        let full = if last {
            self.pool.len()
        } else {
            self.pool.len() / batch * batch
        };
        let refs: Vec<&T> = self.pool[..full].iter().collect();
        for chunk in refs.chunks(batch) {
            step(chunk, rng);
        }
        self.pool.drain(..full);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn conformal_rank_follows_the_formula() {
        // n = 9, alpha = 0.2: rank ceil(10 * 0.8) = 8.
        let needed: Vec<f64> = (1..=9).map(|k| k as f64 / 10.0).collect();
        assert_eq!(conformal_margin(needed.clone(), 0.2), 0.8);
        // alpha so small that the rank passes n: shed everything.
        assert_eq!(conformal_margin(needed, 0.01), 1.0);
        assert_eq!(conformal_margin(Vec::new(), 0.1), 0.0);
    }

    #[test]
    fn needed_margin_reaches_the_target_exactly() {
        let pred = [0.1, 0.0, 0.5];
        let s = [0.5, 0.2, 0.5];
        // Closed form: at share m the totals are min(.5, .1 + .5m) + min(.2, .2m) + .5;
        // a target of 0.8 needs .1 + .5m + .2m = .3, m = 2/7.
        let m = needed_margin(&pred, &s, 0.8);
        assert!((m - 2.0 / 7.0).abs() < 1e-12, "{m}");
        assert_eq!(needed_margin(&pred, &s, 0.5), 0.0);
    }

    #[test]
    fn the_shuffle_window_hands_out_every_item_once_in_full_batches() {
        // Shards of 7 items, even ones kept; windows of at least 10, batches of 4. Reference:
        // counting by hand (32 even numbers below 63 = 8 batches of 4); no outside source.
        let shards: Vec<Vec<u32>> = (0..9u32)
            .map(|s| (0..7).map(|i| 7 * s + i).collect())
            .collect();
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let mut seen = Vec::new();
        let mut sizes = Vec::new();
        let mut step = |b: &[&u32], _: &mut ChaCha8Rng| {
            sizes.push(b.len());
            seen.extend(b.iter().map(|x| **x));
        };
        let mut window = ShuffleWindow::new();
        for shard in &shards {
            if window.push(shard.iter().copied().filter(|x| x.is_multiple_of(2))) >= 10 {
                window.drain(false, 4, &mut rng, &mut step);
            }
        }
        window.drain(true, 4, &mut rng, &mut step);
        let mut sorted = seen.clone();
        sorted.sort_unstable();
        let expected: Vec<u32> = (0..63u32).filter(|x| x.is_multiple_of(2)).collect();
        assert_eq!(sorted, expected, "each kept item exactly once");
        assert_ne!(seen, expected, "shuffled");
        // 32 items in batches of 4: eight full batches, none partial.
        assert_eq!(sizes, vec![4; 8]);
    }

    #[test]
    fn adam_first_step_moves_each_weight_by_the_learning_rate() {
        // With bias correction, the first step is lr * g / (|g| + eps) = lr * sign(g)
        // (Kingma and Ba, 2015, section 2.1: the effective step is bounded by lr).
        let mut p = vec![Array {
            name: "w".into(),
            shape: vec![2],
            data: vec![1.0, -1.0],
        }];
        let mut adam = Adam::new(&p);
        adam.step(&mut p, &[vec![0.5, -3.0]], 0.1);
        assert!((p[0].data[0] - 0.9).abs() < 1e-6);
        assert!((p[0].data[1] + 0.9).abs() < 1e-6);
    }
}
