//! `holdfast demo`: the whole pipeline on the bundled demo grid, end to end.
//!
//! Grid and power flow, a labelled dataset (progress bar; resumed if the folder holds part of
//! one), training and evaluation of the four model x loss variants (one table), and one
//! advised action with its re-check and a plot. Everything is written under `--out`.

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use clap::Args;
use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Grid, Outages, format};
use holdfast_infer::{Advisor, CAUTION, ContingencySpec, Request};
use holdfast_learn::data::{Split, disturbance_of, read_labelled, snapshot_of};
use holdfast_sim::generate::{BuildOptions, Generator};

use crate::learn::TrainOptions;
use crate::{advise, report};

/// The bundled demo grid: fictional, built from typical parameter values (see its header).
pub(crate) const DEMO_GRID: &str = include_str!("../scenarios/quillmoor.toml");
pub(crate) const DEMO_GRID_NAME: &str = "scenarios/quillmoor.toml";
/// The bundled demo study (fictional, like its grid).
const DEMO_STUDY: &str = include_str!("../scenarios/quillmoor-study.toml");
const DEMO_STUDY_NAME: &str = "scenarios/quillmoor-study.toml";

/// Arguments of `holdfast demo`.
#[derive(Args, Debug)]
pub(crate) struct DemoArgs {
    /// Samples in the demo dataset.
    #[arg(long, default_value_t = 4000)]
    samples: u64,
    /// Folder for the dataset, the models, the advised action's request and its plot (an
    /// existing dataset there is resumed, not rebuilt).
    #[arg(long, default_value = "holdfast-demo")]
    out: PathBuf,
    /// Worker threads for labelling and re-simulation (0: all cores).
    #[arg(long, default_value_t = 0)]
    jobs: usize,
    #[command(flatten)]
    train: TrainOptions,
}

pub(crate) fn run(args: &DemoArgs, out: &mut impl Write) -> Result<()> {
    let started = std::time::Instant::now();
    writeln!(out, "Holdfast demo on the bundled grid {DEMO_GRID_NAME}")?;
    writeln!(
        out,
        "(a fictional grid of our own design, built from typical parameter values)"
    )?;
    writeln!(out)?;
    let grid = format::parse_grid(DEMO_GRID, Path::new(DEMO_GRID_NAME))?;
    let pf = solve(&grid, &Outages::none(), &PowerFlowOptions::default())
        .converged()
        .context("demo grid at nominal load")?;
    writeln!(out, "=== 1. the grid at nominal load ===")?;
    report::summary(out, &grid, &pf, &Outages::none(), DEMO_GRID_NAME, 1.0)?;
    writeln!(out)?;

    // One folder per size: a dataset folder only resumes a build of the same size.
    let data_dir = args.out.join(format!("dataset-{}", args.samples));
    dataset(out, args, &grid, &data_dir)?;

    writeln!(
        out,
        "=== 3. training and evaluation: GraphSAGE and the MLP baseline, neutral and averse loss ==="
    )?;
    let o = &args.train;
    let data = o.open(&data_dir)?;
    let jobs = if args.jobs == 0 {
        std::thread::available_parallelism().map_or(1, |n| n.get())
    } else {
        args.jobs
    };
    let models_dir = args.out.join("models");
    let models = crate::learn::compare(&data, o, Some(&models_dir), true, jobs, out)?;
    writeln!(out, "(model files in {})", models_dir.display())?;
    writeln!(out)?;

    writeln!(
        out,
        "=== 4. one advised action: GraphSAGE (averse loss) with its re-check ==="
    )?;
    let model_path = models_dir.join("sage-averse.hfmodel");
    let advisor = Advisor::new(&models[1], &model_path, grid.clone())?;
    advise_one(out, args, &advisor, &data)?;
    writeln!(
        out,
        "demo finished in {:.1} min",
        started.elapsed().as_secs_f64() / 60.0
    )?;
    writeln!(out)?;
    writeln!(out, "{CAUTION}")?;
    Ok(())
}

/// Builds (or resumes) the demo dataset and prints its statistics.
fn dataset(out: &mut impl Write, args: &DemoArgs, grid: &Grid, dir: &Path) -> Result<()> {
    writeln!(
        out,
        "=== 2. labelled dataset: {} samples of the demo study {DEMO_STUDY_NAME} ===",
        args.samples
    )?;
    out.flush()?;
    let study = holdfast_sim::study::parse_study(DEMO_STUDY, Path::new(DEMO_STUDY_NAME))?;
    let generator = Generator::new(study, grid.clone(), Path::new(DEMO_STUDY_NAME))?;
    let opts = BuildOptions {
        samples: args.samples,
        out: dir.to_path_buf(),
        jobs: args.jobs,
        part: (1, 1),
        resume: dir.join("manifest.json").exists(),
    };
    let (report, done, secs) = crate::dataset::build_with_bar(&generator, &opts, args.train.quiet)
        .with_context(|| format!("demo dataset in {}", dir.display()))?;
    writeln!(
        out,
        "{}: {} shards ({} kept from an earlier run), {done} samples labelled in {secs:.1} s",
        dir.display(),
        report.owned,
        report.kept
    )?;
    let stats = holdfast_sim::report::stats(dir)?;
    for line in stats.to_string().lines().skip(1).take(9) {
        writeln!(out, "{line}")?;
    }
    writeln!(out)?;
    Ok(())
}

/// Advises on a typical test case (the median shed), prints the answer beside the label,
/// writes the request (for `holdfast serve`) and a plot of the advised action.
fn advise_one(
    out: &mut impl Write,
    args: &DemoArgs,
    advisor: &Advisor,
    data: &holdfast_learn::data::Dataset,
) -> Result<()> {
    let grid = advisor.grid();
    // A typical case: the median labelled shed among the test cases that need shed.
    let mut need: Vec<_> = data
        .collect(Some(Split::Test))?
        .into_iter()
        .filter(|e| e.needs_shed())
        .collect();
    need.sort_by(|a, b| {
        a.total_pu
            .total_cmp(&b.total_pu)
            .then(a.index.cmp(&b.index))
    });
    let Some(case) = need.get(need.len() / 2) else {
        writeln!(out, "(no test case needs shed in this dataset)")?;
        return Ok(());
    };
    let l = read_labelled(&data.dir, &[case.index])?
        .remove(&case.index)
        .context("the chosen test case is missing from the dataset")?;
    let snapshot = snapshot_of(grid, &data.generator.study, &l);
    let dist = disturbance_of(&l.contingency);
    let spec = ContingencySpec::of(grid, &dist);
    let request = Request {
        id: Some(format!("demo-sample-{}", case.index)),
        snapshot: snapshot.clone(),
        contingency: spec.clone(),
        action_delay_s: Some(l.delay_s),
        budget_ms: None,
        max_simulations: None,
    };
    let advice = advisor.advise(&request)?;
    writeln!(
        out,
        "Test sample {} ({}): labelled minimum shed {:.1} MW (bisection to {:.1} MW), action {:.2} s after clearing",
        case.index, l.contingency.description, l.label.total_mw, l.label.tolerance_mw, l.delay_s
    )?;
    let spec_text = spec.text();
    advise::print_advice(out, advisor, &spec_text, &advice)?;
    let request_path = args.out.join("request.json");
    let snapshot_path = args.out.join("snapshot.json");
    crate::write_atomically(&request_path, serde_json::to_string(&request)?.as_bytes())?;
    crate::write_atomically(
        &snapshot_path,
        serde_json::to_string_pretty(&snapshot)?.as_bytes(),
    )?;
    let plot_path = args.out.join("advice.svg");
    advise::plot_action(
        advisor,
        &snapshot,
        &dist,
        Some(l.delay_s),
        &advice,
        &plot_path,
    )?;
    writeln!(
        out,
        "wrote {} (the advised action simulated), {} and {}",
        plot_path.display(),
        snapshot_path.display(),
        request_path.display()
    )?;
    writeln!(
        out,
        "(try: holdfast advise {} {DEMO_GRID_NAME} --snapshot {} --contingency \"{spec_text}\" --action-delay {:.3})",
        args.out.join("models/sage-averse.hfmodel").display(),
        snapshot_path.display(),
        l.delay_s
    )?;
    writeln!(
        out,
        "(or:  holdfast serve {} {DEMO_GRID_NAME} < {})",
        args.out.join("models/sage-averse.hfmodel").display(),
        request_path.display()
    )?;
    Ok(())
}
