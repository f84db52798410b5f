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
    },
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
        DatasetCommand::Merge { inputs, out: dir } => {
            let r = report::merge(inputs, dir)?;
            writeln!(out, "{}: {} shards merged", dir.display(), r.shards)?;
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
