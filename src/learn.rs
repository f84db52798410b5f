//! `holdfast train`, `holdfast evaluate` and `holdfast compare`.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, Result, bail};
use clap::{Args, ValueEnum};
use holdfast_infer::model::{Architecture, ModelFile};
use holdfast_learn::data::{Dataset, MemoryBudget, Split, SplitRule, open_dataset};
use holdfast_learn::evaluate::{Evaluation, Metrics, evaluate_split};
use holdfast_learn::loss::Loss;
use holdfast_learn::train::{TrainConfig, TrainProgress, TrainRun, Trained, backend_name, train};
use indicatif::{ProgressBar, ProgressStyle};

use crate::plot::{EvaluatedPoint, write_evaluation_plot};

use holdfast_infer::CAUTION;

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub(crate) enum ModelKind {
    /// GraphSAGE over the bus graph and the branch graph.
    Sage,
    /// Multilayer perceptron on all features flattened (baseline; fixed to one topology).
    Mlp,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub(crate) enum LossKind {
    /// Squared error plus --under-weight times the squared shortfall.
    Averse,
    /// Squared error only (the averse loss with weight 0).
    Neutral,
    /// Quantile (pinball) loss at --quantile.
    Pinball,
}

/// Settings shared by `train` and `compare`.
#[derive(Args, Debug, Clone)]
pub(crate) struct TrainOptions {
    /// Network: GraphSAGE or the MLP baseline.
    #[arg(long, value_enum, default_value = "sage")]
    model: ModelKind,
    /// Width of the hidden layers.
    #[arg(long, default_value_t = 64)]
    hidden: usize,
    /// GraphSAGE layers on the bus graph (MLP: hidden layers).
    #[arg(long, default_value_t = 2)]
    layers: usize,
    /// GraphSAGE layers on the branch graph (0: no branch tower).
    #[arg(long, default_value_t = 1)]
    branch_layers: usize,
    /// Training loss.
    #[arg(long, value_enum, default_value = "averse")]
    loss: LossKind,
    /// Weight of the squared shortfall in the averse loss.
    #[arg(long, default_value_t = 4.0)]
    under_weight: f64,
    /// Quantile of the pinball loss.
    #[arg(long, default_value_t = 0.9)]
    quantile: f64,
    /// Most epochs.
    #[arg(long, default_value_t = 60)]
    epochs: usize,
    /// Samples per batch.
    #[arg(long, default_value_t = 128)]
    batch: usize,
    /// Adam's learning rate.
    #[arg(long, default_value_t = 3e-3)]
    learning_rate: f64,
    /// Stop after this many epochs without a better validation loss.
    #[arg(long, default_value_t = 8)]
    patience: usize,
    /// Seed of initialisation, splits, shuffling and neighbour sampling.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Neighbours sampled per node and layer while training (0: all; inference uses all).
    #[arg(long, default_value_t = 8)]
    neighbours: usize,
    /// Share of samples for validation (early stopping).
    #[arg(long, default_value_t = 0.1)]
    validation_share: f64,
    /// Share of samples for calibrating the safety margin.
    #[arg(long, default_value_t = 0.1)]
    calibration_share: f64,
    /// Share of samples held out for testing.
    #[arg(long, default_value_t = 0.1)]
    test_share: f64,
    /// Under-shed rate the safety margin is chosen for (on samples that need shed).
    #[arg(long, default_value_t = 0.05)]
    target_under_rate: f64,
    /// Training samples shuffled together: each epoch visits the shards in a shuffled order
    /// and shuffles windows of at least this many samples (memory holds one window).
    #[arg(long, default_value_t = TrainConfig::SHUFFLE_WINDOW)]
    shuffle_window: usize,
    #[command(flatten)]
    memory: MemoryOption,
    /// The study file the dataset was built with (only for datasets without their own copy).
    #[arg(long, value_name = "FILE")]
    study: Option<PathBuf>,
    /// No progress bar.
    #[arg(long)]
    pub(crate) quiet: bool,
}

/// How much of a dataset stays in memory.
#[derive(Args, Debug, Clone)]
pub(crate) struct MemoryOption {
    /// Featurised samples kept in memory, MiB; shards beyond it are read from disk again on
    /// every pass, so a dataset larger than memory still trains (slower).
    #[arg(long, value_name = "MIB", default_value_t = 1024)]
    memory_mb: usize,
}

impl MemoryOption {
    fn budget(&self) -> MemoryBudget {
        MemoryBudget::mib(self.memory_mb)
    }
}

impl TrainOptions {
    fn config(&self, model: ModelKind, loss: LossKind, data: &Dataset) -> Result<TrainConfig> {
        let shares = [
            self.validation_share,
            self.calibration_share,
            self.test_share,
        ];
        if shares.iter().any(|s| !(0.0..1.0).contains(s)) || shares.iter().sum::<f64>() >= 0.9 {
            bail!("split shares must each be in 0..1 and leave at least 10 % for training");
        }
        if !(self.target_under_rate > 0.0 && self.target_under_rate < 1.0) {
            bail!("--target-under-rate must be between 0 and 1");
        }
        if !(self.quantile > 0.0 && self.quantile < 1.0) {
            bail!("--quantile must be between 0 and 1");
        }
        if !(self.under_weight >= 0.0 && self.under_weight.is_finite()) {
            bail!("--under-weight must be 0 or more");
        }
        if !(self.learning_rate > 0.0 && self.learning_rate < 1.0) {
            bail!("--learning-rate must be between 0 and 1");
        }
        if self.hidden == 0 || self.layers == 0 || self.shuffle_window == 0 {
            bail!("--hidden, --layers and --shuffle-window must be at least 1");
        }
        let architecture = match model {
            ModelKind::Sage => Architecture::Sage {
                hidden: self.hidden,
                bus_layers: self.layers,
                branch_layers: self.branch_layers,
            },
            ModelKind::Mlp => Architecture::Mlp {
                hidden: self.hidden * 2,
                layers: self.layers,
                n_bus: data.grid().n_buses(),
                n_branch: data.grid().branches.len(),
            },
        };
        Ok(TrainConfig {
            architecture,
            loss: match loss {
                LossKind::Averse => Loss::Averse {
                    under_weight: self.under_weight,
                },
                LossKind::Neutral => Loss::Averse { under_weight: 0.0 },
                LossKind::Pinball => Loss::Pinball { tau: self.quantile },
            },
            epochs: self.epochs,
            batch: self.batch,
            learning_rate: self.learning_rate,
            patience: self.patience,
            seed: self.seed,
            neighbours: (self.neighbours > 0).then_some(self.neighbours),
            split: self.split_rule(),
            target_under_rate: self.target_under_rate,
            shuffle_window: self.shuffle_window,
        })
    }

    /// Opens the dataset with these options' split and memory budget.
    pub(crate) fn open(&self, dir: &Path) -> Result<Dataset> {
        Ok(open_dataset(
            dir,
            self.study.as_deref(),
            self.split_rule(),
            self.memory.budget(),
        )?)
    }

    pub(crate) fn split_rule(&self) -> SplitRule {
        SplitRule {
            seed: self.seed,
            shares: [
                self.validation_share,
                self.calibration_share,
                self.test_share,
            ],
        }
    }
}

/// `holdfast train`.
#[derive(Args, Debug)]
pub(crate) struct TrainArgs {
    /// The dataset folder.
    data: PathBuf,
    /// The model file to write.
    #[arg(short, long, value_name = "MODEL")]
    out: PathBuf,
    #[command(flatten)]
    options: TrainOptions,
    /// Checkpoint file, written after every epoch (default: the model path + ".checkpoint");
    /// removed once the model is written.
    #[arg(long, value_name = "FILE")]
    checkpoint: Option<PathBuf>,
    /// Continue from the checkpoint of an interrupted run with the same settings.
    #[arg(long)]
    resume: bool,
    /// Start from this model's weights and normalisation (fine-tuning, e.g. after a topology
    /// change); the architecture must match.
    #[arg(long, value_name = "MODEL")]
    init_from: Option<PathBuf>,
}

/// `holdfast evaluate`.
#[derive(Args, Debug)]
pub(crate) struct EvaluateArgs {
    /// The model file.
    model: PathBuf,
    /// The dataset folder.
    data: PathBuf,
    /// Which samples: the model's test split (the default when the dataset is the one it was
    /// trained on), or all of them (the default for any other dataset).
    #[arg(long, value_enum)]
    split: Option<SplitChoice>,
    /// Skip re-simulating the advised actions (no success rate or cost).
    #[arg(long)]
    no_simulate: bool,
    /// Threads for the re-simulation.
    #[arg(long, default_value_t = std::thread::available_parallelism().map_or(1, |n| n.get()))]
    jobs: usize,
    /// Write a plot (advised vs labelled, error histogram); .svg or .png.
    #[arg(long, value_name = "FILE")]
    plot: Option<PathBuf>,
    /// The study file the dataset was built with (only for datasets without their own copy).
    #[arg(long, value_name = "FILE")]
    study: Option<PathBuf>,
    #[command(flatten)]
    memory: MemoryOption,
    /// No progress bar.
    #[arg(long)]
    quiet: bool,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub(crate) enum SplitChoice {
    /// The test split of the model's training run.
    Test,
    /// Every labelled sample.
    All,
}

/// `holdfast compare`.
#[derive(Args, Debug)]
pub(crate) struct CompareArgs {
    /// The dataset folder.
    data: PathBuf,
    #[command(flatten)]
    options: TrainOptions,
    /// Folder for the four model files (default: none kept).
    #[arg(long, value_name = "DIR")]
    models: Option<PathBuf>,
    /// Skip re-simulating the advised actions.
    #[arg(long)]
    no_simulate: bool,
    /// Threads for the re-simulation.
    #[arg(long, default_value_t = std::thread::available_parallelism().map_or(1, |n| n.get()))]
    jobs: usize,
}

struct EpochBar {
    bar: ProgressBar,
    epochs: usize,
    quiet: bool,
}

impl EpochBar {
    fn new(epochs: usize, quiet: bool) -> Result<EpochBar> {
        let bar = if quiet {
            ProgressBar::hidden()
        } else {
            ProgressBar::new(0)
        };
        bar.set_style(
            ProgressStyle::with_template(
                "{prefix} [{bar:30}] {pos}/{len} batches, {per_sec} | {msg}",
            )
            .context("progress bar template")?
            .progress_chars("=> "),
        );
        bar.enable_steady_tick(Duration::from_millis(500));
        Ok(EpochBar { bar, epochs, quiet })
    }
}

impl TrainProgress for EpochBar {
    fn epoch_start(&self, epoch: usize, batches: usize) {
        self.bar.reset();
        self.bar.set_length(batches as u64);
        self.bar
            .set_prefix(format!("epoch {epoch}/{}", self.epochs));
    }

    fn batch(&self, loss: f64) {
        self.bar.set_message(format!("batch loss {loss:.5}"));
        self.bar.inc(1);
    }

    fn epoch_end(&self, epoch: usize, train_loss: f64, validation_loss: f64, best: bool) {
        if !self.quiet {
            self.bar.println(format!(
                "epoch {epoch:>3}: training loss {train_loss:.5}, validation loss {validation_loss:.5}{}",
                if best { "  (best so far)" } else { "" }
            ));
        }
    }
}

fn run_training(
    data: &Dataset,
    options: &TrainOptions,
    model: ModelKind,
    loss: LossKind,
    run: &TrainRun,
) -> Result<Trained> {
    let config = options.config(model, loss, data)?;
    let bar = EpochBar::new(config.epochs, options.quiet)?;
    let trained = train(data, &config, run, &bar)?;
    bar.bar.finish_and_clear();
    Ok(trained)
}

pub(crate) fn train_command(args: &TrainArgs, out: &mut impl Write) -> Result<()> {
    let o = &args.options;
    let data = o.open(&args.data)?;
    let init_from = args.init_from.as_deref().map(ModelFile::read).transpose()?;
    let checkpoint = args.checkpoint.clone().unwrap_or_else(|| {
        let mut p = args.out.as_os_str().to_owned();
        p.push(".checkpoint");
        PathBuf::from(p)
    });
    let run = TrainRun {
        checkpoint: Some(checkpoint.clone()),
        resume: args.resume,
        init_from,
    };
    writeln!(
        out,
        "{}: {} savable labelled samples ({} unsavable and {} unlabelled left out); backend {}",
        args.data.display(),
        data.counts.total(),
        data.unsavable.len(),
        data.unlabelled,
        backend_name()
    )?;
    memory_line(out, &data)?;
    let trained = run_training(&data, o, o.model, o.loss, &run)?;
    trained.model.write(&args.out)?;
    // The model holds everything the checkpoint did that is worth keeping.
    let _ = std::fs::remove_file(&checkpoint);
    summary(out, &trained, &args.out)?;
    let eval = evaluate_split(&trained.model, &data, Some(Split::Test), false, 1, &|| {})?;
    let m = eval.overall();
    writeln!(
        out,
        "test split, without re-simulation: {} cases ({} need shed), MAPE {:.1} %, under-shed {:.1} % \
         before the margin and {:.1} % with it (target {:.1} %)",
        m.cases,
        m.need_shed,
        m.mape_pct,
        m.under_raw_pct,
        m.under_pct,
        100.0 * trained.model.margin.target_under_rate
    )?;
    writeln!(
        out,
        "(evaluate with re-simulation: holdfast evaluate {} {})",
        args.out.display(),
        args.data.display()
    )?;
    Ok(())
}

/// How much of the dataset is held in memory and how much is read from disk on every pass.
fn memory_line(out: &mut impl Write, data: &Dataset) -> Result<()> {
    let kept = data.shards_kept();
    let all = data.shard_count();
    writeln!(
        out,
        "{kept} of {all} shards held in memory ({:.0} MiB of featurised samples){}",
        data.kept_bytes as f64 / f64::from(1 << 20),
        if kept < all {
            "; the rest are read from disk on every pass (--memory-mb sets the budget)"
        } else {
            ""
        }
    )?;
    Ok(())
}

fn summary(out: &mut impl Write, trained: &Trained, path: &Path) -> Result<()> {
    let m = &trained.model;
    let t = &m.training;
    let secs: f64 = trained.epoch_seconds.iter().sum();
    writeln!(
        out,
        "{}: {} trained with the {} loss; {} epochs run ({:.1} s, {:.2} s per epoch), kept epoch {} \
         (validation loss {:.5}); splits train/validation/calibration/test {:?}",
        path.display(),
        m.architecture.name(),
        t.loss,
        t.epochs_run,
        secs,
        secs / trained.epoch_seconds.len().max(1) as f64,
        t.best_epoch,
        t.validation_loss,
        t.split_sizes
    )?;
    writeln!(
        out,
        "safety margin: {:.1} % of each bus's shed-able load, chosen on {} calibration samples \
         for an under-shed rate of at most {:.1} %",
        100.0 * m.margin.share_of_sheddable,
        m.margin.calibration_samples,
        100.0 * m.margin.target_under_rate
    )?;
    Ok(())
}

fn metrics_row(out: &mut impl Write, name: &str, m: &Metrics) -> Result<()> {
    let opt =
        |x: Option<f64>, digits: usize| x.map_or("-".to_string(), |v| format!("{v:.digits$}"));
    writeln!(
        out,
        "{name:<28} {:>6} {:>6} {:>7.1} {:>8.1} {:>8.1} {:>8} {:>9.1} {:>9}",
        m.cases,
        m.need_shed,
        m.mape_pct,
        m.under_raw_pct,
        m.under_pct,
        opt(m.success_pct, 1),
        m.mean_excess_mw,
        opt(m.expected_cost_mw, 1),
    )?;
    Ok(())
}

fn metrics_header(out: &mut impl Write, first: &str) -> Result<()> {
    writeln!(
        out,
        "{first:<28} {:>6} {:>6} {:>7} {:>8} {:>8} {:>8} {:>9} {:>9}",
        "cases", "shed", "MAPE%", "under%", "under%m", "stable%", "excessMW", "costMW"
    )?;
    Ok(())
}

fn legend(out: &mut impl Write) -> Result<()> {
    writeln!(
        out,
        "  shed: cases that need shed; MAPE: of the raw total on those; under%: raw total below \
         the label; under%m: with the safety margin;\n  stable%: re-simulated with the advised \
         (margin) shed; excessMW: mean advised minus label where above; costMW: shed, or the \
         failing area's load when not stable."
    )?;
    Ok(())
}

/// Evaluates with a progress bar over the re-simulated cases (none when not simulating).
fn evaluate_with_bar(
    model: &ModelFile,
    data: &Dataset,
    split: Option<Split>,
    simulate: bool,
    jobs: usize,
    quiet: bool,
) -> Result<Evaluation> {
    let bar = if quiet || !simulate {
        ProgressBar::hidden()
    } else {
        ProgressBar::new(split.map_or(data.counts.total(), |s| data.counts.of(s)) as u64)
    };
    bar.set_style(
        ProgressStyle::with_template(
            "re-simulating [{bar:30}] {pos}/{len} cases, {per_sec}, ETA {eta}",
        )
        .context("progress bar template")?
        .progress_chars("=> "),
    );
    bar.enable_steady_tick(Duration::from_millis(500));
    let eval = evaluate_split(model, data, split, simulate, jobs, &|| bar.inc(1))?;
    bar.finish_and_clear();
    Ok(eval)
}

pub(crate) fn evaluate_command(args: &EvaluateArgs, out: &mut impl Write) -> Result<()> {
    let model = ModelFile::read(&args.model)?;
    let t = &model.training;
    let rule = SplitRule {
        seed: t.split_seed,
        shares: t.split_shares,
    };
    let data = open_dataset(
        &args.data,
        args.study.as_deref(),
        rule,
        args.memory.budget(),
    )?;
    model.check_grid(data.generator.fingerprint, &args.model)?;
    let same = t.study_hash == data.manifest.study_hash;
    let split = args.split.unwrap_or(if same {
        SplitChoice::Test
    } else {
        SplitChoice::All
    });
    if split == SplitChoice::Test && !same {
        bail!(
            "{} was not trained on {} (another study): its test split is not defined there; use --split all",
            args.model.display(),
            args.data.display()
        );
    }
    let eval = evaluate_with_bar(
        &model,
        &data,
        (split == SplitChoice::Test).then_some(Split::Test),
        !args.no_simulate,
        args.jobs,
        args.quiet,
    )?;
    writeln!(
        out,
        "{} ({}, {} loss, margin {:.1} % of shed-able) on {} ({} split): {} cases, {} unsavable not scored",
        args.model.display(),
        model.architecture.name(),
        t.loss,
        100.0 * model.margin.share_of_sheddable,
        args.data.display(),
        if split == SplitChoice::Test {
            "test"
        } else {
            "every"
        },
        eval.cases.len(),
        eval.unsavable
    )?;
    metrics_header(out, "contingency kind")?;
    for (kind, m) in eval.by_kind() {
        metrics_row(out, kind, &m)?;
    }
    metrics_row(out, "all", &eval.overall())?;
    legend(out)?;
    if let Some(path) = &args.plot {
        plot(
            path,
            &eval,
            &format!("{} on {}", model.architecture.name(), args.data.display()),
        )?;
        writeln!(out, "plot: {}", path.display())?;
    }
    writeln!(out, "{CAUTION}")?;
    Ok(())
}

fn plot(path: &Path, eval: &Evaluation, title: &str) -> Result<()> {
    let points: Vec<EvaluatedPoint> = eval
        .cases
        .iter()
        .map(|c| EvaluatedPoint {
            true_mw: c.true_mw,
            advised_mw: c.advised_mw,
            stable: c.stable,
        })
        .collect();
    write_evaluation_plot(path, title, &points)
}

pub(crate) fn compare_command(args: &CompareArgs, out: &mut impl Write) -> Result<()> {
    let o = &args.options;
    let data = o.open(&args.data)?;
    memory_line(out, &data)?;
    compare(
        &data,
        o,
        args.models.as_deref(),
        !args.no_simulate,
        args.jobs,
        out,
    )?;
    writeln!(out, "{CAUTION}")?;
    Ok(())
}

/// Trains and evaluates GraphSAGE and the MLP, each with the neutral and the averse loss, and
/// prints the table; writes the models into `models` if given. Returns the four models in the
/// order GraphSAGE neutral, GraphSAGE averse, MLP neutral, MLP averse.
pub(crate) fn compare(
    data: &Dataset,
    o: &TrainOptions,
    models: Option<&Path>,
    simulate: bool,
    jobs: usize,
    out: &mut impl Write,
) -> Result<Vec<ModelFile>> {
    if let Some(dir) = models {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    let unsavable = data.unsavable_in(Some(Split::Test));
    let mut rows = Vec::new();
    let mut trained_models = Vec::new();
    for (model, loss) in [
        (ModelKind::Sage, LossKind::Neutral),
        (ModelKind::Sage, LossKind::Averse),
        (ModelKind::Mlp, LossKind::Neutral),
        (ModelKind::Mlp, LossKind::Averse),
    ] {
        let name = format!(
            "{} / {}",
            match model {
                ModelKind::Sage => "GraphSAGE",
                ModelKind::Mlp => "MLP",
            },
            match loss {
                LossKind::Neutral => "neutral",
                LossKind::Averse => "averse",
                LossKind::Pinball => "pinball",
            }
        );
        writeln!(out, "training {name} ...")?;
        out.flush()?;
        let trained = run_training(data, o, model, loss, &TrainRun::default())?;
        if let Some(dir) = models {
            let file = dir.join(format!(
                "{}-{}.hfmodel",
                format!("{model:?}").to_lowercase(),
                format!("{loss:?}").to_lowercase()
            ));
            trained.model.write(&file)?;
        }
        let secs: f64 = trained.epoch_seconds.iter().sum();
        let eval = evaluate_with_bar(
            &trained.model,
            data,
            Some(Split::Test),
            simulate,
            jobs,
            o.quiet,
        )?;
        rows.push((
            name,
            eval.overall(),
            trained.model.margin.share_of_sheddable,
            trained.model.training.epochs_run,
            secs,
        ));
        trained_models.push(trained.model);
    }
    writeln!(
        out,
        "\n{}: test split, {} cases ({} unsavable not scored); safety margin target {:.1} % under-shed",
        data.dir.display(),
        data.counts.test,
        unsavable,
        100.0 * o.target_under_rate
    )?;
    metrics_header(out, "model / loss")?;
    for (name, m, _, _, _) in &rows {
        metrics_row(out, name, m)?;
    }
    legend(out)?;
    for (name, _, margin, epochs, secs) in &rows {
        writeln!(
            out,
            "  {name}: margin {:.1} % of shed-able, {epochs} epochs in {secs:.1} s",
            100.0 * margin
        )?;
    }
    Ok(trained_models)
}
