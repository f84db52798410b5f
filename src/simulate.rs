//! `holdfast simulate`: runs a scenario on a grid and reports the stability verdict, margins,
//! a CSV of signals and a plot.

use std::io::Write;
use std::path::PathBuf;
use std::time::Instant;

use anyhow::{Context, Result, bail};
use holdfast_core::Grid;
use holdfast_core::dynamics::{
    Event, MIN_DAMPING_WINDOW_S, MachineModelChoice, Scenario, SimulationOptions, SimulationResult,
    StabilityCriteria, Trajectory, Trip, parse_event_line, read_scenario, simulate,
};
use holdfast_core::powerflow::solve;
use serde::Serialize;

use crate::report::CAUTION;
use crate::{SolveArgs, plot, write_atomically};

/// Arguments of `holdfast simulate`.
#[derive(clap::Args, Debug)]
pub(crate) struct SimulateArgs {
    #[command(flatten)]
    pub(crate) grid: SolveArgs,
    /// A scenario file (TOML; see scenarios/README.md).
    #[arg(long, value_name = "FILE.toml")]
    pub(crate) scenario: Option<PathBuf>,
    /// One event (repeatable): "TIME fault BUS [x=X_PU] [r=R_PU]", "TIME clear BUS",
    /// "TIME trip ID", "TIME shed BUS MW", "TIME load BUS MW". Added to the scenario file's.
    #[arg(long = "event", value_name = "EVENT")]
    pub(crate) events: Vec<String>,
    /// Length of the run, s.
    #[arg(long, value_name = "S", default_value_t = 10.0)]
    pub(crate) duration: f64,
    /// Integration step, s (default: half a cycle).
    #[arg(long, value_name = "S")]
    pub(crate) step: Option<f64>,
    /// Use the classical model for every machine (exciters ignored).
    #[arg(long)]
    pub(crate) classical: bool,
    /// Run to the end even after a criterion has failed.
    #[arg(long)]
    pub(crate) full_run: bool,
    /// Write the signals (time, frequency, rotor angles, bus voltages) to a CSV file.
    #[arg(long, value_name = "FILE.csv")]
    pub(crate) out: Option<PathBuf>,
    /// Voltages to write and plot, by bus number (repeatable; default: every bus in the CSV,
    /// the load buses in the plot).
    #[arg(long = "bus", value_name = "BUS")]
    pub(crate) buses: Vec<u32>,
    /// Draw rotor angles, load-bus voltages and frequency to an .svg or .png file.
    #[arg(long, value_name = "FILE.svg|FILE.png")]
    pub(crate) plot: Option<PathBuf>,
    /// Print the verdict as JSON.
    #[arg(long)]
    pub(crate) json: bool,
    /// Change one stability criterion (repeatable), by the name it has in a study's
    /// [criteria] table: e.g. "min_damping_ratio=0.05", "over_voltage_pu=1.25",
    /// "final_voltage_min_pu=0.92". Default: the criteria for the grid's frequency.
    #[arg(long = "criterion", value_name = "NAME=VALUE")]
    pub(crate) criteria: Vec<String>,
}

/// The verdict in JSON (`holdfast simulate --json`). A margin the run did not reach is null.
#[derive(Serialize)]
struct VerdictReport {
    stable: bool,
    failed_criterion: Option<String>,
    failed_at_s: Option<f64>,
    failed_where: Option<String>,
    failed_value: Option<f64>,
    max_angle_deg: f64,
    min_voltage_after_clearing: Option<f64>,
    slowest_recovery_s: Option<f64>,
    max_voltage_pu: Option<f64>,
    longest_over_voltage_s: f64,
    longest_sustained_over_voltage_s: f64,
    nadir_hz: f64,
    zenith_hz: f64,
    final_frequency_hz: Option<f64>,
    final_voltage_min_pu: Option<f64>,
    final_voltage_max_pu: Option<f64>,
    damping: Option<DampingReport>,
    end_time_s: f64,
    stopped_early: bool,
    wind_trips: Vec<TripReport>,
    motor_trips: Vec<TripReport>,
    steps: usize,
    newton_iterations: usize,
    factorisations: usize,
    wall_ms: f64,
}

/// The damping analysis in JSON.
#[derive(Serialize)]
struct DampingReport {
    window_start_s: f64,
    window_end_s: f64,
    modes_above_floor: usize,
    worst_mode: Option<ModeReport>,
}

/// The least damped mode in JSON.
#[derive(Serialize)]
struct ModeReport {
    frequency_hz: f64,
    damping_ratio: f64,
    amplitude_over_floor: f64,
    location: String,
}

/// A ride-through or under-voltage trip in JSON.
#[derive(Serialize)]
struct TripReport {
    id: String,
    time_s: f64,
    cause: String,
}

/// The criteria for `grid`, changed by `--criterion NAME=VALUE` arguments.
fn criteria(grid: &Grid, given: &[String]) -> Result<StabilityCriteria> {
    let mut c = StabilityCriteria::for_frequency(grid.frequency_hz);
    for arg in given {
        let (name, value) = arg
            .split_once('=')
            .with_context(|| format!("--criterion \"{arg}\": give NAME=VALUE"))?;
        let value: f64 = value.trim().parse().with_context(|| {
            format!(
                "--criterion \"{arg}\": the value \"{}\" is not a number",
                value.trim()
            )
        })?;
        c.set_field(name.trim(), value, grid.frequency_hz)
            .with_context(|| format!("--criterion \"{arg}\""))?;
    }
    if c.final_voltage_min_pu >= c.final_voltage_max_pu {
        bail!(
            "--criterion: final_voltage_min_pu = {} must be below final_voltage_max_pu = {}",
            c.final_voltage_min_pu,
            c.final_voltage_max_pu
        );
    }
    Ok(c)
}

pub(crate) fn run(args: &SimulateArgs, out: &mut impl Write) -> Result<()> {
    let grid = args.grid.load()?;
    let outages = args.grid.outages(&grid)?;
    let pf = solve(&grid, &outages, &args.grid.options()?).converged()?;
    let mut scenario = match &args.scenario {
        Some(path) => read_scenario(path, &grid)?,
        None => Scenario::default(),
    };
    for line in &args.events {
        scenario
            .events
            .push(parse_event_line(&grid, line).map_err(anyhow::Error::msg)?);
    }
    if !(args.duration.is_finite() && args.duration > 0.0 && args.duration <= 3600.0) {
        bail!(
            "--duration must be between 0 and 3600 s (got {})",
            args.duration
        );
    }
    if let Some(h) = args.step
        && !(h.is_finite() && h > 0.0 && h <= 0.1)
    {
        bail!("--step must be between 0 and 0.1 s (got {h})");
    }
    let options = SimulationOptions {
        step_s: args.step,
        duration_s: args.duration,
        machine_model: if args.classical {
            MachineModelChoice::Classical
        } else {
            MachineModelChoice::Detailed
        },
        early_stop: !args.full_run,
        record: args.out.is_some() || args.plot.is_some(),
        criteria: Some(criteria(&grid, &args.criteria)?),
        ..SimulationOptions::default()
    };
    let chosen: Vec<usize> = args
        .buses
        .iter()
        .map(|&n| {
            grid.bus_idx(n)
                .map(|b| b.get())
                .with_context(|| format!("--bus {n}: no bus has this number"))
        })
        .collect::<Result<_>>()?;
    let started = Instant::now();
    let result = simulate(&grid, &outages, &pf, &scenario, &options)?;
    let wall_ms = started.elapsed().as_secs_f64() * 1e3;
    if let (Some(path), Some(tr)) = (&args.out, &result.trajectory) {
        let all: Vec<usize> = (0..grid.n_buses()).collect();
        let buses = if chosen.is_empty() { &all } else { &chosen };
        write_atomically(path, csv(tr, buses).as_bytes())?;
    }
    if let (Some(path), Some(tr)) = (&args.plot, &result.trajectory) {
        let title = format!(
            "{}: {}",
            grid.name,
            if scenario.name.is_empty() {
                "simulated run"
            } else {
                &scenario.name
            }
        );
        let buses = if chosen.is_empty() {
            grid.load_buses().into_iter().map(|b| b.get()).collect()
        } else {
            chosen.clone()
        };
        plot::write_plot(path, &title, tr, &buses)
            .with_context(|| format!("plot {}", path.display()))?;
    }
    if args.json {
        serde_json::to_writer_pretty(&mut *out, &json(&result, wall_ms))?;
        writeln!(out)?;
    } else {
        let grid_name = args.grid.grid.display().to_string();
        text(
            out, &grid, &grid_name, &scenario, &options, &result, wall_ms,
        )?;
        for (what, path) in [("signals", &args.out), ("plot", &args.plot)] {
            if let Some(p) = path {
                writeln!(out, "Wrote the {what} to {}", p.display())?;
            }
        }
        writeln!(out)?;
        writeln!(out, "{CAUTION}")?;
    }
    Ok(())
}

fn describe(grid: &Grid, e: &Event) -> String {
    let bus = |b: holdfast_core::BusIdx| grid.buses[b.get()].number;
    match e {
        Event::Fault { bus: b, r_pu, x_pu } => {
            format!(
                "three-phase fault at bus {} (r {r_pu} pu, x {x_pu} pu)",
                bus(*b)
            )
        }
        Event::ClearFault { bus: b } => format!("fault at bus {} cleared", bus(*b)),
        Event::TripBranch(k) => format!("branch \"{}\" opens", grid.branches[k.get()].id),
        Event::TripMachine(k) => format!("machine \"{}\" trips", grid.machines[k.get()].id),
        Event::TripWind(k) => format!("wind plant \"{}\" trips", grid.wind_plants[k.get()].id),
        Event::LoadStep { bus: b, p_pu } => format!(
            "load at bus {} changes by {:+.1} MW",
            bus(*b),
            p_pu * grid.s_base_mva
        ),
        Event::Shed { bus: b, p_pu } => format!(
            "{:.1} MW of load shed at bus {}",
            p_pu * grid.s_base_mva,
            bus(*b)
        ),
    }
}

fn text(
    out: &mut impl Write,
    grid: &Grid,
    grid_name: &str,
    scenario: &Scenario,
    options: &SimulationOptions,
    result: &SimulationResult,
    wall_ms: f64,
) -> Result<()> {
    let h = options.step_s.unwrap_or(0.5 / grid.frequency_hz);
    writeln!(
        out,
        "Simulation of {grid_name}{}: {:.1} s at {:.2}-ms steps, {} machine models",
        if scenario.name.is_empty() {
            String::new()
        } else {
            format!(", scenario \"{}\"", scenario.name)
        },
        options.duration_s,
        h * 1e3,
        match options.machine_model {
            MachineModelChoice::Classical => "classical",
            MachineModelChoice::Detailed => "detailed",
        }
    )?;
    let mut events = scenario.events.clone();
    events.sort_by(|a, b| a.t_s.total_cmp(&b.t_s));
    if events.is_empty() {
        writeln!(out, "No events: a flat run.")?;
    }
    for e in &events {
        writeln!(out, "  {:>7.3} s  {}", e.t_s, describe(grid, &e.event))?;
    }
    writeln!(out)?;
    let v = &result.verdict;
    let c = options
        .criteria
        .unwrap_or_else(|| StabilityCriteria::for_frequency(grid.frequency_hz));
    match &v.failure {
        None => writeln!(out, "Verdict: STABLE")?,
        Some(f) => writeln!(
            out,
            "Verdict: UNSTABLE: {} at {:.3} s, {} ({}){}",
            f.criterion,
            f.time_s,
            f.location,
            if f.value.is_nan() {
                "no value".to_string()
            } else {
                format!("{:.3}", f.value)
            },
            if v.stopped_early {
                "; the run stopped there"
            } else {
                ""
            }
        )?,
    }
    let m = &v.margins;
    let not_reached = || format!("not reached (the run stopped at {:.3} s)", v.end_time_s);
    let mut rows: Vec<(String, String)> = vec![(
        "largest rotor angle from centre of inertia".into(),
        format!("{:.1} deg (limit {:.0})", m.max_angle_deg, c.max_angle_deg),
    )];
    if let Some(lowest) = m.min_voltage_after_clearing {
        rows.push((
            "lowest load-bus voltage after the event".into(),
            format!(
                "{lowest:.3} of pre-contingency (recover to {:.2} within {:.1} s, floor {:.2})",
                c.recovery_level, c.recovery_time_s, c.floor_level
            ),
        ));
        rows.push((
            format!("slowest recovery above {:.2}", c.recovery_level),
            match m.slowest_recovery_s {
                Some(s) => format!("{s:.3} s"),
                None if v.stopped_early => not_reached(),
                None => "never".to_string(),
            },
        ));
    }
    if let Some(highest) = m.max_voltage_pu {
        rows.push((
            "highest load-bus voltage after the event".into(),
            format!(
                "{highest:.3} pu (at most {:.2} s above {:.2}, {:.1} s above {:.2})",
                c.over_voltage_time_s,
                c.over_voltage_pu,
                c.sustained_over_voltage_time_s,
                c.sustained_over_voltage_pu
            ),
        ));
        rows.push((
            format!(
                "longest time above {:.2} / {:.2} pu",
                c.over_voltage_pu, c.sustained_over_voltage_pu
            ),
            format!(
                "{:.3} / {:.3} s",
                m.longest_over_voltage_s, m.longest_sustained_over_voltage_s
            ),
        ));
    }
    rows.push((
        "frequency nadir / zenith".into(),
        format!(
            "{:.3} / {:.3} Hz (limits {:.2} / {:.2}){}",
            m.nadir_hz,
            m.zenith_hz,
            c.nadir_hz,
            c.zenith_hz,
            if v.stopped_early {
                format!(", up to {:.3} s", v.end_time_s)
            } else {
                String::new()
            }
        ),
    ));
    rows.push((
        "final frequency".into(),
        match m.final_frequency_hz {
            Some(f) => format!("{f:.3} Hz (band +/-{:.2} Hz)", c.final_band_hz),
            None => not_reached(),
        },
    ));
    rows.push((
        "final load-bus voltages".into(),
        match (m.final_voltage_min_pu, m.final_voltage_max_pu) {
            (Some(lo), Some(hi)) => format!(
                "{lo:.3} to {hi:.3} pu (band {:.2} to {:.2})",
                c.final_voltage_min_pu, c.final_voltage_max_pu
            ),
            _ if v.stopped_early => not_reached(),
            _ => "no load bus".to_string(),
        },
    ));
    rows.push((
        "damping of oscillations".into(),
        match &m.damping {
            Some(d) => match &d.worst {
                Some(w) => format!(
                    "least damped {:.2} Hz at {}: damping ratio {:.3} (minimum {:.3}), \
                     {:.1}x its amplitude floor; {} mode(s) above their floor, {:.1}-{:.1} s",
                    w.frequency_hz,
                    w.location,
                    w.damping_ratio,
                    c.min_damping_ratio,
                    w.amplitude_over_floor,
                    d.modes_above_floor,
                    d.window_start_s,
                    d.window_end_s
                ),
                None => format!(
                    "no mode above its floor ({:.1} deg, {:.3} pu), {:.1}-{:.1} s",
                    c.damping_angle_floor_deg,
                    c.damping_voltage_floor_pu,
                    d.window_start_s,
                    d.window_end_s
                ),
            },
            None if v.stopped_early => not_reached(),
            None if c.damping_window_s <= 0.0 => "not judged (damping_window_s = 0)".to_string(),
            None => format!(
                "not judged: less than {MIN_DAMPING_WINDOW_S:.1} s after the last event in \
                 the last {:.1} s",
                c.damping_window_s
            ),
        },
    ));
    let list = |trips: &[Trip]| {
        if trips.is_empty() {
            "none".to_string()
        } else {
            trips
                .iter()
                .map(|t| format!("\"{}\" at {:.3} s ({})", t.id, t.time_s, t.cause))
                .collect::<Vec<_>>()
                .join(", ")
        }
    };
    rows.push((
        "wind plants tripped on ride-through".into(),
        list(&v.wind_trips),
    ));
    rows.push((
        "motor shares tripped on under-voltage".into(),
        list(&v.motor_trips),
    ));
    writeln!(out, "Margins:")?;
    let width = rows.iter().map(|(label, _)| label.len()).max().unwrap_or(0);
    for (label, value) in &rows {
        writeln!(out, "  {label:<width$}  {value}")?;
    }
    let s = &result.stats;
    writeln!(
        out,
        "Run: {:.2} s simulated, {} steps, {} Newton iterations, {} factorisations, {:.1} ms wall",
        v.end_time_s, s.steps, s.iterations, s.factorisations, wall_ms
    )?;
    Ok(())
}

fn json(result: &SimulationResult, wall_ms: f64) -> VerdictReport {
    let v = &result.verdict;
    let m = &v.margins;
    let trips = |trips: &[Trip]| {
        trips
            .iter()
            .map(|t| TripReport {
                id: t.id.clone(),
                time_s: t.time_s,
                cause: t.cause.to_string(),
            })
            .collect()
    };
    VerdictReport {
        stable: v.is_stable(),
        failed_criterion: v.failure.as_ref().map(|f| f.criterion.to_string()),
        failed_at_s: v.failure.as_ref().map(|f| f.time_s),
        failed_where: v.failure.as_ref().map(|f| f.location.clone()),
        failed_value: v
            .failure
            .as_ref()
            .map(|f| f.value)
            .filter(|x| x.is_finite()),
        max_angle_deg: m.max_angle_deg,
        min_voltage_after_clearing: m.min_voltage_after_clearing,
        slowest_recovery_s: m.slowest_recovery_s,
        max_voltage_pu: m.max_voltage_pu,
        longest_over_voltage_s: m.longest_over_voltage_s,
        longest_sustained_over_voltage_s: m.longest_sustained_over_voltage_s,
        nadir_hz: m.nadir_hz,
        zenith_hz: m.zenith_hz,
        final_frequency_hz: m.final_frequency_hz,
        final_voltage_min_pu: m.final_voltage_min_pu,
        final_voltage_max_pu: m.final_voltage_max_pu,
        damping: m.damping.as_ref().map(|d| DampingReport {
            window_start_s: d.window_start_s,
            window_end_s: d.window_end_s,
            modes_above_floor: d.modes_above_floor,
            worst_mode: d.worst.as_ref().map(|w| ModeReport {
                frequency_hz: w.frequency_hz,
                damping_ratio: w.damping_ratio,
                amplitude_over_floor: w.amplitude_over_floor,
                location: w.location.clone(),
            }),
        }),
        end_time_s: v.end_time_s,
        stopped_early: v.stopped_early,
        wind_trips: trips(&v.wind_trips),
        motor_trips: trips(&v.motor_trips),
        steps: result.stats.steps,
        newton_iterations: result.stats.iterations,
        factorisations: result.stats.factorisations,
        wall_ms,
    }
}

/// The trajectory as CSV: time, frequency, then one column per machine angle and one per
/// chosen bus voltage (`buses`: positions in the trajectory's bus list).
fn csv(tr: &Trajectory, buses: &[usize]) -> String {
    let mut s = String::from("time_s,frequency_hz");
    for m in &tr.machines {
        s += &format!(",angle_deg:{}", m.replace(',', ";"));
    }
    for &b in buses {
        s += &format!(",v_pu:{}", tr.buses[b]);
    }
    s.push('\n');
    for k in 0..tr.time_s.len() {
        s += &format!("{:.6},{:.6}", tr.time_s[k], tr.frequency_hz[k]);
        for a in &tr.angle_deg {
            s += &format!(",{:.4}", a[k]);
        }
        for &b in buses {
            s += &format!(",{:.6}", tr.voltage_pu[b][k]);
        }
        s.push('\n');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    #[test]
    fn csv_has_one_row_per_sample_and_named_columns() {
        let tr = Trajectory {
            time_s: vec![0.0, 0.1],
            machines: vec!["G1".into()],
            angle_deg: vec![vec![1.0, 2.0]],
            buses: vec![7],
            voltage_pu: vec![vec![1.0, 0.9]],
            frequency_hz: vec![60.0, 59.9],
            event_times_s: vec![0.05],
        };
        let text = csv(&tr, &[0]);
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], "time_s,frequency_hz,angle_deg:G1,v_pu:7");
        assert_eq!(lines.len(), 3);
        assert!(lines[2].starts_with("0.100000,59.900000,2.0000,0.900000"));
    }

    #[test]
    fn unknown_plot_extension_is_refused() {
        let tr = Trajectory::default();
        let e = plot::write_plot(Path::new("x.jpg"), "t", &tr, &[]).unwrap_err();
        assert!(e.to_string().contains(".svg or .png"));
    }
}
