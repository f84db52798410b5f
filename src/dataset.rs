//! `holdfast dataset`: build, merge, inspect and export labelled datasets.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use anyhow::{Context, Result, bail};
use clap::{Args, Subcommand, ValueEnum};
use holdfast_sim::dataset::{Sample, SampleBody};
use holdfast_sim::generate::{BuildOptions, BuildReport, Generator, Progress, build};
use holdfast_sim::label::Outcome;
use holdfast_sim::report;
use indicatif::{ProgressBar, ProgressStyle};

#[derive(Subcommand, Debug)]
pub(crate) enum DatasetCommand {
    /// Draw and label samples of a study into a dataset folder, on every core.
    ///
    /// Sample i depends only on the study's seed and i, so the folder's shards are the same
    /// whatever --jobs, --shard or restarts. After a crash, run the same command with --resume:
    /// complete shards are kept, the rest written.
    ///
    /// Examples:
    ///   holdfast dataset build scenarios/quillmoor-study.toml -n 2000 -o data/quillmoor
    ///   holdfast dataset build study.toml -n 100000 -o data/big --shard 3/16   (job 3 of 16)
    #[command(verbatim_doc_comment)]
    Build(BuildArgs),
    /// Combine the folders of a split build (--shard K/N) into one, checking every shard.
    ///
    /// Example: holdfast dataset merge part1 part2 part3 -o data/all
    Merge {
        /// The folders to combine.
        #[arg(required = true)]
        inputs: Vec<PathBuf>,
        /// The folder to write.
        #[arg(short, long)]
        out: PathBuf,
        /// Fail (exit 2) if any shard is missing from every input.
        #[arg(long)]
        require_complete: bool,
    },
    /// Plan a build as a Slurm job array: writes OUT.slurm/ beside the dataset folder with
    /// array.sbatch (one task per part, each resuming its own folder), merge.sbatch (runs once
    /// every task succeeded) and submit.sh. Time and memory requests come from labelling a few
    /// samples here first (stated in the scripts' comments).
    ///
    /// Example:
    ///   holdfast dataset plan scenarios/vellmark-study.toml -n 1000000 --tasks 200 -o /scratch/vellmark
    ///   bash /scratch/vellmark.slurm/submit.sh
    #[command(verbatim_doc_comment)]
    Plan(PlanArgs),
    /// Print a dataset's label shares, histogram, rejections and simulations per sample.
    ///
    /// Example: holdfast dataset stats data/quillmoor
    Stats {
        /// The dataset folder.
        dir: PathBuf,
    },
    /// Write a dataset for other tools: a CSV table, or a NumPy archive of arrays (the array
    /// names and codes are listed in holdfast_sim::report::export_npz's documentation).
    ///
    /// Examples:
    ///   holdfast dataset export data/quillmoor --format csv -o quillmoor.csv
    ///   holdfast dataset export data/quillmoor --format npz -o quillmoor.npz
    #[command(verbatim_doc_comment)]
    Export {
        /// The dataset folder.
        dir: PathBuf,
        /// Output format.
        #[arg(long, value_enum, default_value = "csv")]
        format: ExportFormat,
        /// Output file.
        #[arg(short, long)]
        out: PathBuf,
    },
}

/// Export formats.
#[derive(Clone, Copy, Debug, ValueEnum)]
pub(crate) enum ExportFormat {
    /// Comma-separated values, one row per sample.
    Csv,
    /// NumPy archive (.npz) of per-sample and per-element arrays.
    Npz,
}

#[derive(Args, Debug)]
pub(crate) struct BuildArgs {
    /// The study file.
    study: PathBuf,
    /// Samples in the dataset.
    #[arg(short = 'n', long = "samples")]
    samples: u64,
    /// The dataset folder.
    #[arg(short, long)]
    out: PathBuf,
    /// Worker threads (default: every core).
    #[arg(long, default_value_t = 0)]
    jobs: usize,
    /// This process's part of a split build, K/N (1 <= K <= N): shards j with j mod N = K-1.
    #[arg(long, value_parser = parse_part)]
    shard: Option<(u32, u32)>,
    /// Continue an interrupted build in the same folder.
    #[arg(long)]
    resume: bool,
    /// No progress bar (for logs).
    #[arg(long)]
    quiet: bool,
}

#[derive(Args, Debug)]
pub(crate) struct PlanArgs {
    /// The study file.
    study: PathBuf,
    /// Samples in the dataset.
    #[arg(short = 'n', long = "samples")]
    samples: u64,
    /// Array tasks (parts).
    #[arg(long)]
    tasks: u32,
    /// The dataset folder the merge writes (the plan goes beside it, in OUT.slurm).
    #[arg(short, long)]
    out: PathBuf,
    /// Cores per array task.
    #[arg(long, default_value_t = 4)]
    cpus_per_task: u32,
    /// Samples labelled here, on one core, to measure the cost per sample.
    #[arg(long, default_value_t = 16)]
    calibrate: u64,
}

/// Peak resident memory of this process so far, MB (Linux `VmHWM`; `None` elsewhere).
fn peak_memory_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

fn plan_command(args: &PlanArgs, out: &mut impl Write) -> Result<()> {
    use holdfast_sim::plan::{PlanInput, slurm_plan};
    if args.samples == 0 || args.tasks == 0 || args.cpus_per_task == 0 || args.calibrate == 0 {
        bail!("-n, --tasks, --cpus-per-task and --calibrate must each be at least 1");
    }
    let generator = Generator::open(&args.study)?;
    let shard_size = generator.study.shard_size as u64;
    let shards = args.samples.div_ceil(shard_size);
    if u64::from(args.tasks) > shards {
        bail!(
            "--tasks {}: the dataset has only {shards} shards of {shard_size} samples; use at \
             most {shards} tasks",
            args.tasks
        );
    }
    let calibrate = args.calibrate.min(args.samples);
    let started = std::time::Instant::now();
    for i in 0..calibrate {
        std::hint::black_box(generator.sample(i));
    }
    let seconds_per_sample = started.elapsed().as_secs_f64() / calibrate as f64;
    let host = std::fs::read_to_string("/etc/hostname")
        .map(|h| h.trim().to_string())
        .unwrap_or_else(|_| "this machine".to_string());
    let absolute = |p: &Path| std::path::absolute(p).with_context(|| p.display().to_string());
    let input = PlanInput {
        holdfast: std::env::current_exe().context("the path of this executable")?,
        study: absolute(&args.study)?,
        out: absolute(&args.out)?,
        samples: args.samples,
        shard_size,
        tasks: args.tasks,
        cpus_per_task: args.cpus_per_task,
        seconds_per_sample,
        measured: format!(
            "samples 0-{} of the study labelled on one core of {host}",
            calibrate - 1
        ),
        peak_memory_mb: peak_memory_mb().unwrap_or(0.0),
    };
    let plan = slurm_plan(&input);
    for sub in ["logs", "parts"] {
        let d = plan.dir.join(sub);
        std::fs::create_dir_all(&d).with_context(|| format!("cannot create {}", d.display()))?;
    }
    for (name, text) in [
        ("array.sbatch", &plan.array),
        ("merge.sbatch", &plan.merge),
        ("submit.sh", &plan.submit),
    ] {
        let path = plan.dir.join(name);
        crate::write_atomically(&path, text.as_bytes())?;
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o755))
            .with_context(|| format!("cannot make {} executable", path.display()))?;
    }
    writeln!(
        out,
        "{}: {} array tasks of at most {} samples on {} cores each, {} and {} MB per task \
         (measured {:.3} core-seconds per sample on {calibrate} samples)",
        plan.dir.display(),
        args.tasks,
        plan.samples_per_task,
        args.cpus_per_task,
        holdfast_sim::plan::slurm_time(plan.task_minutes),
        plan.task_memory_mb,
        seconds_per_sample
    )?;
    writeln!(
        out,
        "submit with: bash {}",
        plan.dir.join("submit.sh").display()
    )?;
    Ok(())
}

fn parse_part(s: &str) -> Result<(u32, u32), String> {
    let (k, n) = s
        .split_once('/')
        .ok_or_else(|| format!("\"{s}\": expected K/N, e.g. 3/16"))?;
    let k: u32 = k
        .trim()
        .parse()
        .map_err(|_| format!("\"{s}\": K is not a number"))?;
    let n: u32 = n
        .trim()
        .parse()
        .map_err(|_| format!("\"{s}\": N is not a number"))?;
    if k == 0 || n == 0 || k > n {
        return Err(format!("\"{s}\": need 1 <= K <= N"));
    }
    Ok((k, n))
}

pub(crate) fn run(cmd: &DatasetCommand, out: &mut impl Write) -> Result<()> {
    match cmd {
        DatasetCommand::Build(args) => build_command(args, out),
        DatasetCommand::Plan(args) => plan_command(args, out),
        DatasetCommand::Merge {
            inputs,
            out: dir,
            require_complete,
        } => {
            let r = report::merge(inputs, dir)?;
            writeln!(out, "{}: {} shards merged", dir.display(), r.shards)?;
            if *require_complete && !r.missing.is_empty() {
                bail!(
                    "{}: shards missing from every input: {:?}; run their parts again \
                     (they resume)",
                    dir.display(),
                    r.missing
                );
            }
            if !r.missing.is_empty() {
                writeln!(
                    out,
                    "shards missing from every input: {:?} (run their part again with --resume)",
                    r.missing
                )?;
            }
            Ok(())
        }
        DatasetCommand::Stats { dir } => {
            let st = report::stats(dir)?;
            write!(out, "{st}")?;
            Ok(())
        }
        DatasetCommand::Export {
            dir,
            format,
            out: file,
        } => {
            let rows = match format {
                ExportFormat::Csv => report::export_csv(dir, file)?,
                ExportFormat::Npz => report::export_npz(dir, file)?,
            };
            writeln!(out, "{}: {rows} rows", file.display())?;
            Ok(())
        }
    }
}

/// Progress bar: samples/s and ETA from indicatif, plus running label shares.
struct Bar {
    bar: ProgressBar,
    labelled: AtomicU64,
    shed: AtomicU64,
    unsavable: AtomicU64,
    not_labelled: AtomicU64,
}

impl Progress for Bar {
    fn start(&self, samples: u64) {
        self.bar.set_length(samples);
    }

    fn sample(&self, s: &Sample) {
        match &s.body {
            SampleBody::Labelled(l) => {
                self.labelled.fetch_add(1, Ordering::Relaxed);
                match l.label.outcome {
                    Outcome::Shed => {
                        self.shed.fetch_add(1, Ordering::Relaxed);
                    }
                    Outcome::Unsavable => {
                        self.unsavable.fetch_add(1, Ordering::Relaxed);
                    }
                    Outcome::NoShedNeeded => {}
                }
            }
            _ => {
                self.not_labelled.fetch_add(1, Ordering::Relaxed);
            }
        }
        let lab = self.labelled.load(Ordering::Relaxed).max(1);
        self.bar.set_message(format!(
            "need shed {:.0} %, unsavable {}, not labelled {}",
            100.0 * self.shed.load(Ordering::Relaxed) as f64 / lab as f64,
            self.unsavable.load(Ordering::Relaxed),
            self.not_labelled.load(Ordering::Relaxed)
        ));
        self.bar.inc(1);
    }

    fn shard_written(&self, _: u32) {}
}

/// Builds (or resumes) a dataset with a progress bar; returns the report, the samples done
/// and the seconds taken.
pub(crate) fn build_with_bar(
    generator: &Generator,
    opts: &BuildOptions,
    quiet: bool,
) -> Result<(BuildReport, u64, f64)> {
    let bar = if quiet {
        ProgressBar::hidden()
    } else {
        ProgressBar::new(0)
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{elapsed_precise} [{bar:30}] {pos}/{len} samples, {per_sec}, ETA {eta} | {msg}",
        )
        .context("progress bar template")?
        .progress_chars("=> "),
    );
    bar.enable_steady_tick(Duration::from_millis(500));
    let progress = Bar {
        bar,
        labelled: AtomicU64::new(0),
        shed: AtomicU64::new(0),
        unsavable: AtomicU64::new(0),
        not_labelled: AtomicU64::new(0),
    };
    let started = std::time::Instant::now();
    let report = build(generator, opts, &progress)?;
    progress.bar.finish_and_clear();
    let secs = started.elapsed().as_secs_f64();
    let done =
        progress.labelled.load(Ordering::Relaxed) + progress.not_labelled.load(Ordering::Relaxed);
    Ok((report, done, secs))
}

fn build_command(args: &BuildArgs, out: &mut impl Write) -> Result<()> {
    if args.samples == 0 {
        bail!("-n must be at least 1");
    }
    let generator = Generator::open(&args.study)?;
    let opts = BuildOptions {
        samples: args.samples,
        out: args.out.clone(),
        jobs: args.jobs,
        part: args.shard.unwrap_or((1, 1)),
        resume: args.resume,
    };
    let (report, done, secs) = build_with_bar(&generator, &opts, args.quiet)?;
    writeln!(
        out,
        "{}: part {}/{}: {} shards owned, {} kept from before, {} written; {} samples in {:.1} s \
         ({:.0} per hour)",
        args.out.display(),
        opts.part.0,
        opts.part.1,
        report.owned,
        report.kept,
        report.written,
        done,
        secs,
        if secs > 0.0 {
            done as f64 * 3600.0 / secs
        } else {
            0.0
        }
    )?;
    if !report.rewritten_damaged.is_empty() {
        writeln!(
            out,
            "damaged shards found and written again: {:?}",
            report.rewritten_damaged
        )?;
    }
    writeln!(
        out,
        "(see `holdfast dataset stats {}`)",
        display_path(&args.out)
    )?;
    Ok(())
}

fn display_path(p: &Path) -> String {
    p.display().to_string()
}
