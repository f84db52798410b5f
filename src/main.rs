//! The `holdfast` command line: grid checks and power flow, dynamic simulation, datasets,
//! training and evaluation, advice (one-off and served), and the end-to-end demo.

mod advise;
mod dataset;
mod demo;
mod learn;
mod plot;
mod report;
mod simulate;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, Result, bail};
use clap::{Parser, Subcommand};
use holdfast_core::powerflow::{PowerFlowOptions, solve};
use holdfast_core::{Grid, Outages, cdf, format};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Emergency load-shedding studies for low-inertia grids.
///
/// Holdfast checks and solves grid models, simulates contingencies, builds labelled datasets,
/// trains a graph network and advises how much load to shed where, re-checking each action
/// by simulation.
/// Decision support for studies and operators, not a protection scheme: local grid codes,
/// operating procedures and licensed engineers decide.
///
/// Exit codes: 0 success, 2 error (bad input, power flow that does not converge).
#[derive(Parser, Debug)]
#[command(name = "holdfast", version, propagate_version = true)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Validate, solve, import and inspect grid files.
    #[command(subcommand)]
    Grid(GridCommand),
    /// Simulate a contingency: print the stability verdict and margins, optionally write the
    /// signals (CSV) and a plot (SVG or PNG).
    ///
    /// Examples:
    ///   holdfast simulate scenarios/quillmoor.toml --scenario scenarios/quillmoor-fault.toml --plot run.svg
    ///   holdfast simulate scenarios/quillmoor.toml --event "0.1 fault 303" --event "0.183 clear 303" \
    ///       --event "0.183 trip \"North Hub - City North 345 #1\"" --out run.csv
    #[command(verbatim_doc_comment)]
    Simulate(simulate::SimulateArgs),
    /// Build labelled datasets from a study file, merge split builds, print statistics,
    /// export for other tools.
    #[command(subcommand)]
    Dataset(dataset::DatasetCommand),
    /// Train a model (GraphSAGE or the MLP baseline) on a dataset and write the model file.
    ///
    /// Splits samples by operating point into training, validation (early stopping),
    /// calibration (safety margin) and test; writes a checkpoint after every epoch.
    ///
    /// Examples:
    ///   holdfast train data/quillmoor -o models/quillmoor.hfmodel
    ///   holdfast train data/quillmoor -o m.hfmodel --loss pinball --quantile 0.9
    ///   holdfast train data/new-topology -o m2.hfmodel --init-from m.hfmodel --epochs 10
    #[command(verbatim_doc_comment)]
    Train(learn::TrainArgs),
    /// Evaluate a model on a dataset: MAPE, under-shed rate, and success and cost by
    /// re-simulating every case with the advised shed; by contingency kind; optional plot.
    ///
    /// Example: holdfast evaluate models/quillmoor.hfmodel data/quillmoor --plot eval.svg
    #[command(verbatim_doc_comment)]
    Evaluate(learn::EvaluateArgs),
    /// Train and evaluate GraphSAGE and the MLP baseline, each with the neutral and the averse
    /// loss, on one dataset; print one table (--model and --loss are ignored here; every other
    /// training setting applies to all four).
    ///
    /// Example: holdfast compare data/quillmoor --epochs 30
    #[command(verbatim_doc_comment)]
    Compare(learn::CompareArgs),
    /// Advise on one contingency: predict the shed per bus, re-check it by simulation and
    /// escalate if it fails; print the answer (or JSON) and optionally plot the action.
    ///
    /// Example: holdfast advise models/quillmoor.hfmodel scenarios/quillmoor.toml \
    ///     --snapshot scenarios/quillmoor-snapshot.json --contingency "trip=Southmarsh Combined Cycle 1"
    #[command(verbatim_doc_comment)]
    Advise(advise::AdviseArgs),
    /// Serve advice: one JSON request per line on stdin, one JSON answer per line on stdout
    /// (schema in DEVELOPERS.md).
    ///
    /// Example: holdfast serve models/quillmoor.hfmodel scenarios/quillmoor.toml < requests.jsonl
    #[command(verbatim_doc_comment)]
    Serve(advise::ServeArgs),
    /// Run the whole pipeline on the bundled demo grid: a labelled dataset, training and
    /// evaluation of GraphSAGE and the MLP baseline, and one advised action with its re-check
    /// and a plot (a few minutes on two cores; written under --out).
    ///
    /// Example: holdfast demo
    #[command(verbatim_doc_comment)]
    Demo(demo::DemoArgs),
}

#[derive(Subcommand, Debug)]
enum GridCommand {
    /// Validate a grid file, solve its power flow and print a readable summary.
    ///
    /// Examples:
    ///   holdfast grid check scenarios/quillmoor.toml
    ///   holdfast grid check scenarios/quillmoor.toml --load-scale 1.15
    ///   holdfast grid check scenarios/quillmoor.toml --outage "Windrise A Wind"
    #[command(verbatim_doc_comment)]
    Check(SolveArgs),
    /// Solve a grid file's power flow and print bus, machine and branch results.
    ///
    /// Examples:
    ///   holdfast grid solve scenarios/quillmoor.toml
    ///   holdfast grid solve scenarios/quillmoor.toml --json > result.json
    #[command(verbatim_doc_comment)]
    Solve {
        #[command(flatten)]
        args: SolveArgs,
        /// Print JSON instead of tables (schema: `holdfast grid solve --help` and README).
        #[arg(long)]
        json: bool,
    },
    /// Convert an IEEE Common Data Format case into a Holdfast grid file.
    ///
    /// The file's solved voltages are kept as `solved_v_pu` / `solved_angle_deg`.
    ///
    /// Example:
    ///   holdfast grid import ieee14cdf.txt -o ieee14.toml
    #[command(verbatim_doc_comment)]
    Import {
        /// The CDF file to read.
        #[arg(value_name = "FILE.cdf")]
        input: PathBuf,
        /// Where to write the grid file (TOML).
        #[arg(short, long, value_name = "FILE.toml")]
        output: PathBuf,
    },
}

#[derive(clap::Args, Debug)]
struct SolveArgs {
    /// The grid file (TOML, format_version 1).
    #[arg(value_name = "FILE")]
    grid: PathBuf,
    /// Scale every load by this factor (P and Q), re-dispatching the change over the
    /// voltage-regulating machines in proportion to rating. Default 1.
    #[arg(long, value_name = "FACTOR", default_value_t = 1.0)]
    load_scale: f64,
    /// Convergence tolerance on the largest power mismatch, pu on the system base.
    #[arg(long, value_name = "PU", default_value_t = holdfast_core::powerflow::MISMATCH_TOL_PU)]
    tolerance_pu: f64,
    /// Ignore machine reactive limits.
    #[arg(long)]
    no_q_limits: bool,
    /// Take a branch, machine or wind plant out of service by its id (repeatable), e.g. to see
    /// the islands and flows after an outage.
    #[arg(long = "outage", value_name = "ID")]
    outages: Vec<String>,
}

impl SolveArgs {
    fn options(&self) -> Result<PowerFlowOptions> {
        if !(self.tolerance_pu.is_finite() && self.tolerance_pu > 0.0 && self.tolerance_pu < 1.0) {
            bail!(
                "--tolerance-pu must be between 0 and 1 (got {})",
                self.tolerance_pu
            );
        }
        Ok(PowerFlowOptions {
            tolerance_pu: self.tolerance_pu,
            enforce_q_limits: !self.no_q_limits,
            ..PowerFlowOptions::default()
        })
    }

    fn outages(&self, grid: &Grid) -> Result<Outages> {
        Ok(Outages::from_ids(grid, &self.outages)?)
    }

    fn load(&self) -> Result<Grid> {
        if !(self.load_scale.is_finite() && self.load_scale >= 0.0 && self.load_scale <= 10.0) {
            bail!(
                "--load-scale must be between 0 and 10 (got {})",
                self.load_scale
            );
        }
        let grid = format::load_grid(&self.grid)?;
        Ok(if self.load_scale == 1.0 {
            grid
        } else {
            grid.with_load_scaled(self.load_scale)
        })
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {e:#}");
            ExitCode::from(2)
        }
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

fn run(cli: Cli) -> Result<()> {
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    match cli.command {
        Command::Grid(GridCommand::Check(args)) => {
            let grid = args.load()?;
            let outages = args.outages(&grid)?;
            let sol = solve(&grid, &outages, &args.options()?).converged()?;
            if !args.outages.is_empty() {
                writeln!(out, "Outages: {}", args.outages.join(", "))?;
            }
            report::summary(
                &mut out,
                &grid,
                &sol,
                &outages,
                &args.grid.display().to_string(),
                args.load_scale,
            )?;
        }
        Command::Grid(GridCommand::Solve { args, json }) => {
            let grid = args.load()?;
            let outages = args.outages(&grid)?;
            let sol = solve(&grid, &outages, &args.options()?).converged()?;
            if json {
                serde_json::to_writer_pretty(
                    &mut out,
                    &report::SolveReport::new(&grid, &sol, &outages),
                )?;
                writeln!(out)?;
            } else {
                report::tables(&mut out, &grid, &sol, &outages)?;
            }
        }
        Command::Grid(GridCommand::Import { input, output }) => import(&input, &output)?,
        Command::Simulate(args) => simulate::run(&args, &mut out)?,
        Command::Dataset(cmd) => dataset::run(&cmd, &mut out)?,
        Command::Train(args) => learn::train_command(&args, &mut out)?,
        Command::Evaluate(args) => learn::evaluate_command(&args, &mut out)?,
        Command::Compare(args) => learn::compare_command(&args, &mut out)?,
        Command::Advise(args) => advise::advise_command(&args, &mut out)?,
        Command::Serve(args) => advise::serve_command(&args, &mut out)?,
        Command::Demo(args) => demo::run(&args, &mut out)?,
    }
    out.flush()?;
    Ok(())
}

fn import(input: &Path, output: &Path) -> Result<()> {
    let imported = cdf::load_cdf(input)?;
    for w in &imported.warnings {
        eprintln!("note: {w}");
    }
    let mut text = format!(
        "# Imported by holdfast from {} (IEEE Common Data Format).\n# Case title: {}\n# Impedances in per unit on the system base.\n",
        input.display(),
        imported.title
    );
    text += &format::write_grid(&imported.grid)?;
    // Refuse to write a file that would not load again.
    format::parse_grid(&text, output)
        .context("internal error: the converted grid does not validate")?;
    write_atomically(output, text.as_bytes())?;
    eprintln!(
        "wrote {} ({} buses, {} branches, {} machines, {} loads)",
        output.display(),
        imported.grid.buses.len(),
        imported.grid.branches.len(),
        imported.grid.machines.len(),
        imported.grid.loads.len()
    );
    Ok(())
}

/// Writes via a temporary file in the same folder, then renames, so a crash never leaves half a file.
fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = path
        .parent()
        .filter(|d| !d.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path.file_name().context("output path has no file name")?;
    let tmp = dir.join(format!(
        ".{}.tmp-{}",
        name.to_string_lossy(),
        std::process::id()
    ));
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result.with_context(|| format!("cannot write {}", path.display()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn verify_cli() {
        Cli::command().debug_assert();
    }

    #[test]
    fn demo_grid_parses() {
        format::parse_grid(demo::DEMO_GRID, Path::new(demo::DEMO_GRID_NAME)).unwrap();
    }
}
