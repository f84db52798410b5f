//! Plots of a simulated run (rotor angles, bus voltages, frequency, with the event times marked)
//! as SVG or PNG, chosen by the file extension.

use std::path::Path;

use anyhow::{Context, Result, bail};
use holdfast_core::dynamics::Trajectory;
use plotters::coord::Shift;
use plotters::prelude::*;

/// Runs `$draw` on an SVG or PNG drawing area for `$path` (by extension) and writes the file.
macro_rules! on_backend {
    ($path:expr, $size:expr, $draw:expr) => {{
        let path: &Path = $path;
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .map(str::to_ascii_lowercase);
        match ext.as_deref() {
            Some("svg") => {
                let root = SVGBackend::new(path, $size).into_drawing_area();
                $draw(&root)?;
                root.present()
                    .with_context(|| format!("cannot write {}", path.display()))?;
            }
            Some("png") => {
                let root = BitMapBackend::new(path, $size).into_drawing_area();
                $draw(&root)?;
                root.present()
                    .with_context(|| format!("cannot write {}", path.display()))?;
            }
            _ => bail!(
                "plot file {}: use the extension .svg or .png",
                path.display()
            ),
        }
        Ok(())
    }};
}

/// DejaVu Sans Mono (free licence, `assets/fonts/DejaVu-LICENSE.txt`), bundled so that text
/// renders the same on every machine without a system font library.
const FONT: &[u8] = include_bytes!("../assets/fonts/DejaVuSansMono.ttf");

/// One panel: a title, a unit, and named series.
struct Panel<'a> {
    title: &'a str,
    y_label: &'a str,
    series: Vec<(String, &'a [f64])>,
}

/// Writes the plot of `tr` to `path` (`.svg` or `.png`); `buses` selects the voltage curves
/// (indices into the trajectory's bus list).
pub(crate) fn write_plot(path: &Path, title: &str, tr: &Trajectory, buses: &[usize]) -> Result<()> {
    // Registering twice is harmless; the font is valid, so failure is not expected.
    let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, FONT);
    let panels = [
        Panel {
            title: "Rotor angles from the centre of inertia",
            y_label: "angle (deg)",
            series: tr
                .machines
                .iter()
                .zip(&tr.angle_deg)
                .map(|(m, a)| (m.clone(), a.as_slice()))
                .collect(),
        },
        Panel {
            title: "Load-bus voltages",
            y_label: "voltage (pu)",
            series: buses
                .iter()
                .map(|&k| (format!("bus {}", tr.buses[k]), tr.voltage_pu[k].as_slice()))
                .collect(),
        },
        Panel {
            title: "Frequency (centre of inertia)",
            y_label: "frequency (Hz)",
            series: vec![("frequency".to_string(), tr.frequency_hz.as_slice())],
        },
    ];
    on_backend!(path, (1100, 1200), |root| draw(root, title, tr, &panels))
}

fn draw<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    title: &str,
    tr: &Trajectory,
    panels: &[Panel<'_>],
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let err = |e: DrawingAreaErrorKind<DB::ErrorType>| anyhow::anyhow!("plot: {e:?}");
    root.fill(&WHITE).map_err(err)?;
    let root = root.titled(title, ("sans-serif", 22)).map_err(err)?;
    let t_end = tr.time_s.last().copied().unwrap_or(1.0).max(1e-3);
    for (area, panel) in root.split_evenly((panels.len(), 1)).iter().zip(panels) {
        let (lo, hi) = range(panel.series.iter().flat_map(|(_, v)| v.iter().copied()));
        let mut chart = ChartBuilder::on(area)
            .caption(panel.title, ("sans-serif", 17))
            .margin(12)
            .x_label_area_size(36)
            .y_label_area_size(64)
            .build_cartesian_2d(0.0..t_end, lo..hi)
            .map_err(err)?;
        chart
            .configure_mesh()
            .x_desc("time (s)")
            .y_desc(panel.y_label)
            .label_style(("sans-serif", 13))
            .draw()
            .map_err(err)?;
        for &t in &tr.event_times_s {
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(t, lo), (t, hi)],
                    ShapeStyle::from(&BLACK.mix(0.45)).stroke_width(1),
                )))
                .map_err(err)?;
        }
        for (k, (name, values)) in panel.series.iter().enumerate() {
            let colour = Palette99::pick(k).to_rgba();
            let points = tr
                .time_s
                .iter()
                .copied()
                .zip(values.iter().copied())
                .filter(|(_, v)| v.is_finite());
            chart
                .draw_series(LineSeries::new(points, colour.stroke_width(2)))
                .map_err(err)?
                .label(name.as_str())
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2))
                });
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(("sans-serif", 11))
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.3))
            .draw()
            .map_err(err)?;
    }
    Ok(())
}

/// A plotting range around the finite values, with a margin; a flat signal gets a small band.
fn range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let pad = ((hi - lo) * 0.08).max(1e-3 * hi.abs().max(1.0));
    (lo - pad, hi + pad)
}

/// One evaluated case for the plot: labelled total, advised total (MW), and whether the
/// re-simulation was stable (`None`: not simulated).
pub(crate) struct EvaluatedPoint {
    pub(crate) true_mw: f64,
    pub(crate) advised_mw: f64,
    pub(crate) stable: Option<bool>,
}

/// Writes an evaluation plot: advised vs labelled totals (left; stable runs in blue, failed
/// in red, not simulated in grey) and the histogram of advised minus labelled (right).
pub(crate) fn write_evaluation_plot(
    path: &Path,
    title: &str,
    points: &[EvaluatedPoint],
) -> Result<()> {
    let _ = plotters::style::register_font("sans-serif", FontStyle::Normal, FONT);
    on_backend!(path, (1300, 620), |root| draw_evaluation(
        root, title, points
    ))
}

fn draw_evaluation<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    title: &str,
    points: &[EvaluatedPoint],
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let err = |e: DrawingAreaErrorKind<DB::ErrorType>| anyhow::anyhow!("plot: {e:?}");
    root.fill(&WHITE).map_err(err)?;
    let root = root.titled(title, ("sans-serif", 22)).map_err(err)?;
    let (left, right) = root.split_horizontally(650);
    let (_, hi) = range(points.iter().flat_map(|p| [p.true_mw, p.advised_mw]));
    let hi = hi.max(1.0);
    let mut chart = ChartBuilder::on(&left)
        .caption("Advised vs labelled total shed", ("sans-serif", 17))
        .margin(14)
        .x_label_area_size(40)
        .y_label_area_size(64)
        .build_cartesian_2d(0.0..hi, 0.0..hi)
        .map_err(err)?;
    chart
        .configure_mesh()
        .x_desc("labelled (MW)")
        .y_desc("advised (MW)")
        .label_style(("sans-serif", 13))
        .draw()
        .map_err(err)?;
    chart
        .draw_series(std::iter::once(PathElement::new(
            vec![(0.0, 0.0), (hi, hi)],
            ShapeStyle::from(&BLACK.mix(0.5)).stroke_width(1),
        )))
        .map_err(err)?;
    for (which, colour, name) in [
        (Some(true), BLUE.mix(0.55), "stable"),
        (Some(false), RED.mix(0.8), "not stable"),
        (None, BLACK.mix(0.35), "not simulated"),
    ] {
        let pts: Vec<(f64, f64)> = points
            .iter()
            .filter(|p| p.stable == which)
            .map(|p| (p.true_mw, p.advised_mw))
            .collect();
        if pts.is_empty() {
            continue;
        }
        chart
            .draw_series(
                pts.into_iter()
                    .map(|xy| Circle::new(xy, 3, colour.filled())),
            )
            .map_err(err)?
            .label(name)
            .legend(move |(x, y)| Circle::new((x + 8, y), 4, colour.filled()));
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperLeft)
        .label_font(("sans-serif", 12))
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.3))
        .draw()
        .map_err(err)?;

    let errors: Vec<f64> = points.iter().map(|p| p.advised_mw - p.true_mw).collect();
    let (lo, hi) = range(errors.iter().copied());
    let bins = 30usize;
    let width = (hi - lo) / bins as f64;
    let mut counts = vec![0u32; bins];
    for e in &errors {
        let k = (((e - lo) / width) as usize).min(bins - 1);
        counts[k] += 1;
    }
    let top = f64::from(counts.iter().copied().max().unwrap_or(1).max(1)) * 1.1;
    let mut chart = ChartBuilder::on(&right)
        .caption("Advised minus labelled", ("sans-serif", 17))
        .margin(14)
        .x_label_area_size(40)
        .y_label_area_size(56)
        .build_cartesian_2d(lo..hi, 0.0..top)
        .map_err(err)?;
    chart
        .configure_mesh()
        .x_desc("MW (negative: under-shed)")
        .y_desc("cases")
        .label_style(("sans-serif", 13))
        .draw()
        .map_err(err)?;
    chart
        .draw_series(counts.iter().enumerate().map(|(k, &c)| {
            let x0 = lo + k as f64 * width;
            Rectangle::new(
                [(x0, 0.0), (x0 + width, f64::from(c))],
                BLUE.mix(0.5).filled(),
            )
        }))
        .map_err(err)?;
    chart
        .draw_series(std::iter::once(PathElement::new(
            vec![(0.0, 0.0), (0.0, top)],
            ShapeStyle::from(&BLACK.mix(0.6)).stroke_width(1),
        )))
        .map_err(err)?;
    Ok(())
}
