//! `holdfast advise` and `holdfast serve`: the inference library's command-line surfaces.

use std::io::{BufRead, Write};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use clap::Args;
use holdfast_infer::advise::BusShed;
use holdfast_infer::{
    Advice, AdvicePath, Advisor, Budget, CAUTION, CheckOutcome, ContingencySpec, Disturbance,
    Snapshot, answer_json_line, from_json,
};

/// Arguments of `holdfast advise`.
#[derive(Args, Debug)]
pub(crate) struct AdviseArgs {
    /// Model file (from `holdfast train`).
    pub model: PathBuf,
    /// The grid file the model was trained on.
    pub grid: PathBuf,
    /// The grid state just before the contingency, as JSON (the `snapshot` object of the
    /// serve protocol; see DEVELOPERS.md).
    #[arg(long)]
    pub snapshot: PathBuf,
    /// The contingency: comma-separated `fault=BUS` and `trip=ID` items, e.g.
    /// `fault=7,trip=L7-8` (fault cleared by tripping a branch) or `trip=G2` (unit trip).
    #[arg(long, allow_hyphen_values = true)]
    pub contingency: String,
    /// Delay of the action after the contingency settled, s (default: the training study's
    /// longest).
    #[arg(long)]
    pub action_delay: Option<f64>,
    /// Time budget of the re-check, ms.
    #[arg(long, default_value_t = 500.0)]
    pub budget_ms: f64,
    /// Print the answer as JSON (the serve protocol's answer object).
    #[arg(long)]
    pub json: bool,
    /// Simulate the final action over the whole window and plot it (SVG or PNG by extension).
    #[arg(long)]
    pub plot: Option<PathBuf>,
}

/// Arguments of `holdfast serve`.
#[derive(Args, Debug)]
pub(crate) struct ServeArgs {
    /// Model file (from `holdfast train`).
    pub model: PathBuf,
    /// The grid file the model was trained on.
    pub grid: PathBuf,
}

/// Reads a snapshot file, naming the file and the field at fault.
pub(crate) fn read_snapshot(path: &Path) -> Result<Snapshot> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
    from_json(&text).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

pub(crate) fn advise_command(args: &AdviseArgs, out: &mut impl Write) -> Result<()> {
    let advisor = Advisor::open(&args.model, &args.grid)?;
    let snapshot = read_snapshot(&args.snapshot)?;
    let spec = ContingencySpec::parse(&args.contingency)?;
    let dist = spec.resolve(advisor.grid())?;
    let most_ms = holdfast_infer::advise::MAX_BUDGET.as_secs_f64() * 1e3;
    if !(args.budget_ms.is_finite() && args.budget_ms > 0.0 && args.budget_ms <= most_ms) {
        anyhow::bail!(
            "--budget-ms {}: must be a positive number of at most {most_ms} ms",
            args.budget_ms
        );
    }
    let budget = Budget {
        time: std::time::Duration::from_secs_f64(args.budget_ms / 1e3),
        ..Budget::default()
    };
    let advice = advisor.advise_disturbance(&snapshot, &dist, args.action_delay, budget)?;
    if args.json {
        serde_json::to_writer(&mut *out, &advice)?;
        writeln!(out)?;
    } else {
        writeln!(out, "{}", advisor.model_summary())?;
        print_advice(out, &advisor, &args.contingency, &advice)?;
        writeln!(out, "{CAUTION}")?;
    }
    if let Some(path) = &args.plot {
        plot_action(&advisor, &snapshot, &dist, args.action_delay, &advice, path)?;
        writeln!(out, "wrote {}", path.display())?;
    }
    Ok(())
}

/// Simulates an advised action over the whole window and plots it.
pub(crate) fn plot_action(
    advisor: &Advisor,
    snapshot: &Snapshot,
    dist: &Disturbance,
    action_delay_s: Option<f64>,
    advice: &Advice,
    path: &Path,
) -> Result<()> {
    let result = advisor.simulate_action(snapshot, dist, action_delay_s, &advice.shed)?;
    let trajectory = result
        .trajectory
        .as_ref()
        .context("the simulation recorded no signals")?;
    let grid = advisor.grid();
    let mut buses: Vec<usize> = vec![dist.disturbance_bus.get()];
    let mut by_size: Vec<&BusShed> = advice.shed.iter().collect();
    by_size.sort_by(|a, b| b.mw.total_cmp(&a.mw));
    for s in by_size.iter().take(3) {
        if let Some(b) = grid.bus_idx(s.bus)
            && !buses.contains(&b.get())
        {
            buses.push(b.get());
        }
    }
    let title = format!(
        "Advised shed {:.0} MW at {:.2} s ({})",
        advice.total_mw,
        advice.action_at_s,
        path_name(advice.path)
    );
    crate::plot::write_plot(path, &title, trajectory, &buses)
}

fn path_name(p: AdvicePath) -> &'static str {
    match p {
        AdvicePath::Model => "the model's action",
        AdvicePath::Escalated => "escalated after the model's action failed its check",
        AdvicePath::Conservative => "conservative fallback",
    }
}

fn outcome_name(o: CheckOutcome) -> &'static str {
    match o {
        CheckOutcome::Stable => "STABLE",
        CheckOutcome::Unstable => "UNSTABLE",
        CheckOutcome::Unchecked => "UNCHECKED",
    }
}

/// The answer as text.
pub(crate) fn print_advice(
    out: &mut impl Write,
    advisor: &Advisor,
    contingency: &str,
    advice: &Advice,
) -> Result<()> {
    let grid = advisor.grid();
    writeln!(out, "Contingency: {contingency}")?;
    writeln!(
        out,
        "Advice: shed {:.1} MW of {:.1} MW shed-able, at t = {:.2} s: {} -> {}",
        advice.total_mw,
        advice.sheddable_mw,
        advice.action_at_s,
        path_name(advice.path),
        outcome_name(advice.outcome)
    )?;
    if advice.path != AdvicePath::Model {
        writeln!(
            out,
            "  (the model alone advised {:.1} MW)",
            advice.model_total_mw
        )?;
    }
    for s in &advice.shed {
        let name = grid
            .bus_idx(s.bus)
            .map_or("", |b| grid.buses[b.get()].name.as_str());
        writeln!(out, "  bus {:>5} {:<24} {:>8.1} MW", s.bus, name, s.mw)?;
    }
    writeln!(out, "Re-check runs:")?;
    for (k, c) in advice.checks.iter().enumerate() {
        let why = match (&c.failed, c.failed_at_s, &c.failed_where, c.failed_value) {
            (Some(f), Some(t), Some(w), Some(v)) => format!(" ({f} {v:.3} at {t:.2} s, {w})"),
            _ => String::new(),
        };
        writeln!(
            out,
            "  {}. {:>8.1} MW: {}{why} [{:.1} ms]",
            k + 1,
            c.total_mw,
            outcome_name(c.outcome),
            c.ms
        )?;
    }
    for n in &advice.notes {
        writeln!(out, "Note: {n}")?;
    }
    let t = &advice.timings;
    writeln!(
        out,
        "Timings: features {:.0} us, forward {:.0} us, snapshot and pre-action run {:.1} ms, \
         checks {:.1} ms, total {:.1} ms",
        t.features_us, t.forward_us, t.prepare_ms, t.checks_ms, t.total_ms
    )?;
    Ok(())
}

pub(crate) fn serve_command(args: &ServeArgs, out: &mut impl Write) -> Result<()> {
    let advisor = Advisor::open(&args.model, &args.grid)?;
    eprintln!("holdfast serve: {}", advisor.model_summary());
    eprintln!("one JSON request per line on stdin, one JSON answer per line on stdout");
    eprintln!("{CAUTION}");
    let stdin = std::io::stdin();
    for line in stdin.lock().lines() {
        let line = line.context("cannot read stdin")?;
        if line.trim().is_empty() {
            continue;
        }
        writeln!(out, "{}", answer_json_line(&advisor, &line))?;
        out.flush()?;
    }
    Ok(())
}
