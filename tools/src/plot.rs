//! SVG plots of an error report ([`crate::report::Report`]).
//!
//! [`write_plots`] draws three figures from [`crate::report::PlotData`]:
//! - `output_trace.svg`: float and quantized outputs over the traced window,
//!   one panel per output;
//! - `output_error.svg`: the windowed output SQNR over time, optionally
//!   against a target;
//! - `gate_error_hist.svg`: per layer and gate, the histogram of
//!   quantized-minus-float gate errors in LSB of Q0.15.
//!
//! Plots are drawn with `plotters`' SVG backend without a font feature: text
//! is written as SVG `<text>` elements (family `sans-serif`) and laid out by
//! the viewer, so label areas are sized generously rather than measured
//! (plotters' own text size estimate is crude without a font). Legends sit in
//! the figure header, above the panels, so they never hide data. Every file
//! is rendered into memory and written atomically
//! ([`crate::output::write_atomic`]).
//!
//! Degenerate data (no steps, one step, constant values, non-finite SQNR,
//! empty or all-zero histograms) still gives a readable file, with a note
//! in any panel that has nothing to draw.

use crate::report::{PlotData, Report, HIST_HALF};
use anyhow::{anyhow, bail, Context, Result};
use plotters::coord::ranged1d::{Ranged, ValueFormatter};
use plotters::coord::types::RangedCoordf64;
use plotters::coord::Shift;
use plotters::element::DashedPathElement;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use std::path::{Path, PathBuf};

/// File name of the output trace figure.
pub const OUTPUT_TRACE_FILE: &str = "output_trace.svg";
/// File name of the windowed output SQNR figure.
pub const OUTPUT_ERROR_FILE: &str = "output_error.svg";
/// File name of the gate error histogram figure.
pub const GATE_HIST_FILE: &str = "gate_error_hist.svg";

/// At most this many outputs get a panel in the trace figure (a hidden-state
/// output can have dozens of units; the subtitle says how many are shown).
pub const MAX_TRACE_PANELS: usize = 8;

/// Where a `+inf` window SQNR (float and quantized agree exactly) is drawn
/// when no window has a finite SQNR. Otherwise it is drawn 10 dB (or a tenth
/// of the finite span, if larger) above the highest finite value or target,
/// so that the finite windows keep a readable scale. The subtitle says where.
pub const INF_SQNR_DRAWN_DB: f64 = 150.0;

// Sizes. Plotters writes `font-size = size / 1.24` into the SVG, so these give
// 15.3 px tick labels, 16.9 px axis descriptions and legends, 18.5 px panel
// captions, 16.1 px subtitles and 21 px titles.
const FONT: &str = "sans-serif";
const TICK_SIZE: f64 = 19.0;
const DESC_SIZE: f64 = 21.0;
const CAPTION_SIZE: f64 = 23.0;
const TITLE_SIZE: f64 = 26.0;
const SUBTITLE_SIZE: f64 = 20.0;
const WIDTH: u32 = 1000;
const HIST_WIDTH: u32 = 1400;
const PANEL_HEIGHT: u32 = 300;
const X_LABEL_AREA: u32 = 54;
const Y_LABEL_AREA: u32 = 95;
/// Approximate width of one legend character in px (16.9 px sans-serif).
const LEGEND_CHAR_PX: f64 = 10.0;

const FLOAT_COLOR: RGBColor = RGBColor(31, 119, 180);
const QUANT_COLOR: RGBColor = RGBColor(230, 97, 1);
const TARGET_COLOR: RGBColor = RGBColor(200, 30, 30);
const BAR_COLOR: RGBColor = RGBColor(70, 130, 180);
const EDGE_BAR_COLOR: RGBColor = RGBColor(230, 97, 1);
const NOTE_COLOR: RGBColor = RGBColor(90, 90, 90);

type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
type LinearChart<'a, 'b> = ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

/// The glyph of a legend entry.
#[derive(Clone, Copy)]
enum Key {
    /// A solid line.
    Line(RGBColor),
    /// A dashed line.
    Dashed(RGBColor),
    /// A hollow circle.
    Ring(RGBColor),
}

/// Writes the report's SVGs into `dir` and returns the paths written, in
/// this order:
/// - `output_trace.svg`: float vs quantized output over the traced window,
///   one panel per output (at most [`MAX_TRACE_PANELS`]) stacked vertically
///   with x = step; float solid blue, quantized dashed orange; legend
///   `float` / `quantized (<scheme>)`; axes `step` and
///   `output (model units)`.
/// - `output_error.svg`: windowed output SQNR against the window's first
///   step (axes `step`, `SQNR (dB)`), with a dashed horizontal `target` line
///   when `sqnr_target_db` is `Some` (and finite). NaN and `-inf` windows are
///   skipped (the line breaks there); `+inf` windows (exact agreement) are
///   hollow markers above the finite data (see [`INF_SQNR_DRAWN_DB`]).
/// - `gate_error_hist.svg`: per layer one row of four panels (gates i, f, g,
///   o) titled `layer k gate f`, x `quantized - float (LSB of 2^-15)`, y
///   `count`, or `count (log scale)` when the nonzero counts span more than
///   three decades. All panels share one y range; the outer bins, which also
///   count everything beyond ±[`HIST_HALF`] LSB, are drawn in orange.
///
/// Titles name the scheme; subtitles give the step counts.
///
/// # Errors
/// `dir` does not exist or is not a directory (the message names it), a
/// drawing error, or an I/O error while writing (see
/// [`crate::output::write_atomic`]).
pub fn write_plots(report: &Report, dir: &Path, sqnr_target_db: Option<f64>) -> Result<Vec<PathBuf>> {
    if !dir.is_dir() {
        bail!("cannot write plots: directory {} does not exist", dir.display());
    }
    let figures: [(&str, String); 3] = [
        (OUTPUT_TRACE_FILE, render_output_trace(report).context("cannot draw the output trace")?),
        (OUTPUT_ERROR_FILE, render_output_error(report, sqnr_target_db).context("cannot draw the output SQNR")?),
        (GATE_HIST_FILE, render_gate_hist(report).context("cannot draw the gate error histograms")?),
    ];
    let mut written = Vec::with_capacity(figures.len());
    for (name, svg) in figures {
        let path = dir.join(name);
        crate::output::write_atomic(&path, svg.as_bytes())?;
        written.push(path);
    }
    Ok(written)
}

// ---------------------------------------------------------------------------
// Figures

/// `output_trace.svg` as a string.
fn render_output_trace(report: &Report) -> Result<String> {
    let p = &report.plot;
    let steps = p.trace_float.len().max(p.trace_quant.len());
    let outputs = output_count(p);
    let panels = outputs.clamp(1, MAX_TRACE_PANELS);

    let title = format!("Output trace: float vs quantized ({})", scheme_name(report));
    let mut subtitle = if steps == 0 {
        format!("no traced steps ({} steps compared)", report.steps)
    } else {
        format!(
            "steps {}..{} ({} traced of {} compared)",
            p.trace_start,
            p.trace_start + steps - 1,
            steps,
            report.steps
        )
    };
    if outputs > panels {
        subtitle.push_str(&format!("; first {panels} of {outputs} outputs shown"));
    }
    let quant_label = format!("quantized ({})", scheme_name(report));
    let keys = [(Key::Line(FLOAT_COLOR), "float"), (Key::Dashed(QUANT_COLOR), quant_label.as_str())];

    let mut svg = String::new();
    {
        let height = header_height(1, true) + PANEL_HEIGHT * panels as u32;
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let body = header(&root, &title, &[&subtitle], &keys)?;
        let areas = body.split_evenly((panels, 1));
        for (k, area) in areas.iter().enumerate() {
            let name = p.output_names.get(k).cloned().unwrap_or_else(|| format!("output {k}"));
            let float = trace_points(&p.trace_float, p.trace_start, k);
            let quant = trace_points(&p.trace_quant, p.trace_start, k);
            trace_panel(area, &name, &float, &quant, steps == 0)?;
        }
        root.present().map_err(draw_err)?;
    }
    Ok(svg)
}

/// `output_error.svg` as a string.
fn render_output_error(report: &Report, target: Option<f64>) -> Result<String> {
    let p = &report.plot;
    let windows = &p.sqnr_windows;
    let target = target.filter(|t| t.is_finite());
    // +inf means the window's float and quantized outputs agree exactly. An
    // infinite axis is not drawable and a fixed 150 dB would squash the
    // finite windows into a flat line, so exact windows are drawn just above
    // everything finite (or at 150 dB when nothing is finite) as hollow
    // markers, and the subtitle says where.
    let finite = finite_min_max(windows.iter().map(|w| w.1).chain(target));
    let inf_at = match finite {
        Some((lo, hi)) => hi + ((hi - lo) * 0.1).max(10.0),
        None => INF_SQNR_DRAWN_DB,
    };
    // Line segments of consecutive finite windows: the line breaks at
    // undefined (NaN, -inf: zero signal with nonzero error) and exact windows.
    let mut segments: Vec<Vec<(f64, f64)>> = vec![Vec::new()];
    let mut exact = Vec::new();
    let mut skipped = 0usize;
    for &(step, db) in windows {
        let x = step as f64;
        if db.is_finite() {
            if let Some(seg) = segments.last_mut() {
                seg.push((x, db));
            }
            continue;
        }
        if db == f64::INFINITY {
            exact.push((x, inf_at));
        } else {
            skipped += 1;
        }
        if segments.last().is_some_and(|s| !s.is_empty()) {
            segments.push(Vec::new());
        }
    }
    let finite_points: Vec<(f64, f64)> = segments.iter().flatten().copied().collect();

    let title = format!("Windowed output SQNR ({})", scheme_name(report));
    let subtitle =
        format!("{} over {} compared steps; x = first step of window", plural(windows.len(), "window"), report.steps);
    let mut notes = Vec::new();
    if !exact.is_empty() {
        notes.push(format!("{} exact (+inf) drawn at {} dB", exact.len(), fmt_tick(inf_at)));
    }
    if skipped > 0 {
        notes.push(format!("{skipped} undefined (NaN/-inf) skipped"));
    }
    let notes = notes.join("; ");
    let lines: Vec<&str> = [subtitle.as_str(), notes.as_str()].into_iter().filter(|l| !l.is_empty()).collect();
    let mut keys = vec![(Key::Line(FLOAT_COLOR), "windowed SQNR")];
    if !exact.is_empty() {
        keys.push((Key::Ring(FLOAT_COLOR), "exact (+inf)"));
    }
    if target.is_some() {
        keys.push((Key::Dashed(TARGET_COLOR), "target"));
    }

    let mut svg = String::new();
    {
        let height = header_height(lines.len(), true) + PANEL_HEIGHT + 100;
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let body = header(&root, &title, &lines, &keys)?;

        let all = finite_points.iter().chain(&exact);
        let (x0, x1) = padded(all.clone().map(|q| q.0), 1.0, 0.02, 0.0);
        let (y0, y1) = match finite_min_max(all.map(|q| q.1).chain(target)) {
            Some((lo, hi)) => {
                let pad = ((hi - lo) * 0.08).max(3.0);
                (lo - pad, hi + pad)
            }
            None => (0.0, 60.0),
        };
        let mut chart = ChartBuilder::on(&body)
            .margin(12)
            .margin_right(30)
            .x_label_area_size(X_LABEL_AREA)
            .y_label_area_size(Y_LABEL_AREA)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(draw_err)?;
        configure(&mut chart, "step", "SQNR (dB)", &|v| fmt_integer(*v), &|v| fmt_tick(*v))?;

        if let Some(t) = target {
            chart
                .draw_series(DashedLineSeries::new(vec![(x0, t), (x1, t)], 10, 6, TARGET_COLOR.stroke_width(2)))
                .map_err(draw_err)?;
        }
        for seg in segments.iter().filter(|s| s.len() > 1) {
            chart.draw_series(LineSeries::new(seg.iter().copied(), FLOAT_COLOR.stroke_width(2))).map_err(draw_err)?;
        }
        chart.draw_series(finite_points.iter().map(|&q| Circle::new(q, 3, FLOAT_COLOR.filled()))).map_err(draw_err)?;
        chart.draw_series(exact.iter().map(|&q| Circle::new(q, 6, FLOAT_COLOR.stroke_width(2)))).map_err(draw_err)?;
        if finite_points.is_empty() && exact.is_empty() {
            let msg = if windows.is_empty() { "no SQNR windows" } else { "no window has a defined SQNR" };
            note(&chart.plotting_area().strip_coord_spec(), msg)?;
        }
        root.present().map_err(draw_err)?;
    }
    Ok(svg)
}

/// `gate_error_hist.svg` as a string.
fn render_gate_hist(report: &Report) -> Result<String> {
    let p = &report.plot;
    let layers = p.gate_hist.len();
    let rows = layers.max(1);
    let all = p.gate_hist.iter().flat_map(|l| l.iter());
    let max_count = all.clone().flat_map(|h| h.counts.iter().copied()).max().unwrap_or(0);
    let min_pos = all.clone().flat_map(|h| h.counts.iter().copied()).filter(|&c| c > 0).min().unwrap_or(0);
    let log = min_pos > 0 && max_count / min_pos > 1000;
    // Bins: the report's layout, or wider if a histogram has more bins; all
    // histograms of a report share one bin width.
    let bin = all.clone().map(|h| h.bin_lsb).max().unwrap_or(1).max(1);
    let bins = all.map(|h| h.counts.len()).max().unwrap_or(0).max((2 * HIST_HALF + 1) as usize);
    let w = bin as f64;
    let x0 = (-(HIST_HALF as f64) - 0.5) * w;
    let x1 = x0 + bins as f64 * w;

    let title = format!("Gate error histograms ({})", scheme_name(report));
    let subtitle = format!(
        "{}, {} compared steps; bins of {bin} LSB of Q0.15; the orange outer bins also count \
         everything beyond +/-{} LSB",
        plural(layers, "layer"),
        report.steps,
        HIST_HALF * bin as i64
    );
    let y_desc = if log { "count (log scale)" } else { "count" };

    let mut svg = String::new();
    {
        let height = header_height(1, false) + PANEL_HEIGHT * rows as u32;
        let root = SVGBackend::with_string(&mut svg, (HIST_WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let body = header(&root, &title, &[&subtitle], &[])?;
        if layers == 0 {
            let spec = RangedCoordf64::from(0.0..1.0);
            hist_panel(&body, "no gate histograms", &[], x0, x1, spec, 0.0, y_desc)?;
        } else {
            let areas = body.split_evenly((rows, 4));
            let panels = p.gate_hist.iter().enumerate().flat_map(|(k, gates)| {
                gates.iter().zip(["i", "f", "g", "o"]).map(move |(h, g)| (format!("layer {k} gate {g}"), h))
            });
            for (area, (name, h)) in areas.iter().zip(panels) {
                if log {
                    // Bars start at 0.5 so that a count of 1 is visible.
                    let spec: LogCoord<f64> = (0.5..max_count as f64 * 3.0).log_scale().into();
                    hist_panel(area, &name, &h.counts, x0, x1, spec, 0.5, y_desc)?;
                } else {
                    let top = if max_count == 0 { 1.0 } else { max_count as f64 * 1.1 };
                    hist_panel(area, &name, &h.counts, x0, x1, RangedCoordf64::from(0.0..top), 0.0, y_desc)?;
                }
            }
        }
        root.present().map_err(draw_err)?;
    }
    Ok(svg)
}

// ---------------------------------------------------------------------------
// Panels

/// One output's panel of the trace figure.
fn trace_panel(area: &Area<'_>, name: &str, float: &[(f64, f64)], quant: &[(f64, f64)], no_steps: bool) -> Result<()> {
    let (x0, x1) = padded(float.iter().chain(quant).map(|q| q.0), 1.0, 0.0, 0.0);
    let (y0, y1) = padded(float.iter().chain(quant).map(|q| q.1), 0.0, 0.06, 0.0);
    let mut chart = ChartBuilder::on(area)
        .caption(name, (FONT, CAPTION_SIZE))
        .margin(8)
        .margin_right(30)
        .x_label_area_size(X_LABEL_AREA)
        .y_label_area_size(Y_LABEL_AREA)
        .build_cartesian_2d(x0..x1, y0..y1)
        .map_err(draw_err)?;
    configure(&mut chart, "step", "output (model units)", &|v| fmt_integer(*v), &|v| fmt_tick(*v))?;
    chart.draw_series(LineSeries::new(float.iter().copied(), FLOAT_COLOR.stroke_width(2))).map_err(draw_err)?;
    chart
        .draw_series(DashedLineSeries::new(quant.iter().copied(), 8, 5, QUANT_COLOR.stroke_width(2)))
        .map_err(draw_err)?;
    // A single step draws no line: mark the points.
    if float.len() == 1 || quant.len() == 1 {
        chart.draw_series(float.iter().map(|&q| Circle::new(q, 4, FLOAT_COLOR.filled()))).map_err(draw_err)?;
        chart.draw_series(quant.iter().map(|&q| Circle::new(q, 7, QUANT_COLOR.stroke_width(2)))).map_err(draw_err)?;
    }
    if float.is_empty() && quant.is_empty() {
        let msg = if no_steps { "no traced steps" } else { "no finite values for this output" };
        note(&chart.plotting_area().strip_coord_spec(), msg)?;
    }
    Ok(())
}

/// One gate's histogram panel; `y` is the (linear or log) count axis, `base`
/// where bars start.
#[allow(clippy::too_many_arguments)]
fn hist_panel<Y>(
    area: &Area<'_>,
    name: &str,
    counts: &[u64],
    x0: f64,
    x1: f64,
    y: Y,
    base: f64,
    y_desc: &str,
) -> Result<()>
where
    Y: Ranged<ValueType = f64> + ValueFormatter<f64>,
{
    let mut chart = ChartBuilder::on(area)
        .caption(name, (FONT, CAPTION_SIZE))
        .margin(8)
        .margin_right(30)
        .x_label_area_size(X_LABEL_AREA)
        .y_label_area_size(74)
        .build_cartesian_2d(RangedCoordf64::from(x0..x1), y)
        .map_err(draw_err)?;
    let fx = |v: &f64| fmt_integer(*v);
    let fy = |v: &f64| fmt_count(*v);
    chart
        .configure_mesh()
        .x_labels(5)
        .y_labels(6)
        .x_desc("quantized - float (LSB of 2^-15)")
        .y_desc(y_desc)
        .x_label_formatter(&fx)
        .y_label_formatter(&fy)
        .label_style((FONT, TICK_SIZE))
        .axis_desc_style((FONT, DESC_SIZE))
        .light_line_style(RGBColor(240, 240, 240))
        .bold_line_style(RGBColor(215, 215, 215))
        .draw()
        .map_err(draw_err)?;
    let last = counts.len().saturating_sub(1);
    let w = (x1 - x0) / counts.len().max(1) as f64;
    let bars = counts.iter().enumerate().filter(|(_, &c)| c > 0).map(|(i, &c)| {
        let x = x0 + (i as f64 + 0.5) * w;
        let color = if i == 0 || i == last { EDGE_BAR_COLOR } else { BAR_COLOR };
        Rectangle::new([(x - 0.45 * w, base), (x + 0.45 * w, c as f64)], color.filled())
    });
    chart.draw_series(bars).map_err(draw_err)?;
    if counts.iter().all(|&c| c == 0) {
        let msg = if counts.is_empty() { "no data" } else { "all counts zero" };
        note(&chart.plotting_area().strip_coord_spec(), msg)?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------
// Helpers

/// Draws the figure title, subtitle lines and (if any) a legend row on top
/// of `root`; returns the area below.
fn header<'a>(root: &Area<'a>, title: &str, lines: &[&str], keys: &[(Key, &str)]) -> Result<Area<'a>> {
    let (top, body) = root.split_vertically(header_height(lines.len(), !keys.is_empty()));
    let (w, _) = top.dim_in_pixel();
    let cx = (w / 2) as i32;
    let title_style = TextStyle::from((FONT, TITLE_SIZE).into_font()).pos(Pos::new(HPos::Center, VPos::Top));
    top.draw_text(title, &title_style, (cx, 10)).map_err(draw_err)?;
    let sub_style =
        TextStyle::from((FONT, SUBTITLE_SIZE).into_font()).color(&NOTE_COLOR).pos(Pos::new(HPos::Center, VPos::Top));
    let mut y = 44;
    for line in lines {
        top.draw_text(line, &sub_style, (cx, y)).map_err(draw_err)?;
        y += 26;
    }
    if keys.is_empty() {
        return Ok(body);
    }
    // One centred row: glyph (36 px), gap, label, 36 px to the next entry.
    // Label widths are estimated; the viewer lays out the real text.
    const GLYPH: i32 = 36;
    const GAP: i32 = 10;
    const SPACING: i32 = 36;
    let widths: Vec<i32> = keys.iter().map(|(_, l)| (l.chars().count() as f64 * LEGEND_CHAR_PX) as i32).collect();
    let total: i32 = widths.iter().map(|w| GLYPH + GAP + w).sum::<i32>() + SPACING * (keys.len() as i32 - 1);
    let mut x = (cx - total / 2).max(10);
    let ym = y + 16;
    let label_style = TextStyle::from((FONT, DESC_SIZE).into_font()).pos(Pos::new(HPos::Left, VPos::Center));
    for ((key, label), width) in keys.iter().zip(&widths) {
        let seg = vec![(x, ym), (x + GLYPH, ym)];
        match *key {
            Key::Line(c) => top.draw(&PathElement::new(seg, c.stroke_width(3))),
            Key::Dashed(c) => top.draw(&DashedPathElement::new(seg, 9, 5, c.stroke_width(3))),
            Key::Ring(c) => top.draw(&Circle::new((x + GLYPH / 2, ym), 6, c.stroke_width(2))),
        }
        .map_err(draw_err)?;
        top.draw_text(label, &label_style, (x + GLYPH + GAP, ym)).map_err(draw_err)?;
        x += GLYPH + GAP + width + SPACING;
    }
    Ok(body)
}

/// Height of a header with a title, `lines` subtitle lines and, if
/// `legend`, a legend row.
fn header_height(lines: usize, legend: bool) -> u32 {
    48 + 26 * lines as u32 + if legend { 36 } else { 0 }
}

/// Mesh, tick labels and axis descriptions of a linear chart.
fn configure(
    chart: &mut LinearChart<'_, '_>,
    x_desc: &str,
    y_desc: &str,
    fx: &dyn Fn(&f64) -> String,
    fy: &dyn Fn(&f64) -> String,
) -> Result<()> {
    chart
        .configure_mesh()
        .x_labels(10)
        .y_labels(6)
        .x_desc(x_desc)
        .y_desc(y_desc)
        .x_label_formatter(fx)
        .y_label_formatter(fy)
        .label_style((FONT, TICK_SIZE))
        .axis_desc_style((FONT, DESC_SIZE))
        .light_line_style(RGBColor(240, 240, 240))
        .bold_line_style(RGBColor(215, 215, 215))
        .draw()
        .map_err(draw_err)
}

/// A grey note in the middle of `area` (for panels with nothing to draw).
fn note(area: &Area<'_>, text: &str) -> Result<()> {
    let (w, h) = area.dim_in_pixel();
    let style =
        TextStyle::from((FONT, DESC_SIZE).into_font()).color(&NOTE_COLOR).pos(Pos::new(HPos::Center, VPos::Center));
    area.draw_text(text, &style, ((w / 2) as i32, (h / 2) as i32)).map_err(draw_err)
}

/// Number of outputs: named, or the widest step row.
fn output_count(p: &PlotData) -> usize {
    let widest = p.trace_float.iter().chain(&p.trace_quant).map(Vec::len).max().unwrap_or(0);
    widest.max(p.output_names.len())
}

/// `(step, value)` of output `k`, finite values only.
fn trace_points(trace: &[Vec<f32>], start: usize, k: usize) -> Vec<(f64, f64)> {
    trace
        .iter()
        .enumerate()
        .filter_map(|(t, row)| row.get(k).map(|&v| ((start + t) as f64, f64::from(v))))
        .filter(|q| q.1.is_finite())
        .collect()
}

/// The finite minimum and maximum of `values`, if any.
fn finite_min_max(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    values.filter(|v| v.is_finite()).fold(None, |acc, v| match acc {
        None => Some((v, v)),
        Some((lo, hi)) => Some((lo.min(v), hi.max(v))),
    })
}

/// An axis range around `values`: `margin` of the span on each side plus
/// `top` of the span above. A zero span is padded by `flat_pad` if nonzero,
/// else by 10 % of the value (1 at zero); no data gives `0..1`.
fn padded(values: impl Iterator<Item = f64>, flat_pad: f64, margin: f64, top: f64) -> (f64, f64) {
    let Some((lo, hi)) = finite_min_max(values) else {
        return (0.0, 1.0);
    };
    let span = hi - lo;
    if span <= lo.abs().max(hi.abs()) * 1e-9 {
        let pad = if flat_pad > 0.0 {
            flat_pad
        } else if lo != 0.0 {
            lo.abs() * 0.1
        } else {
            1.0
        };
        return (lo - pad, hi + pad + 2.0 * pad * top);
    }
    (lo - span * margin, hi + span * (margin + top))
}

/// A tick label: integers without decimals, others with up to four
/// significant decimals, trailing zeros trimmed.
fn fmt_tick(v: f64) -> String {
    if !v.is_finite() {
        return String::new();
    }
    if is_integer(v) {
        let r = v.round();
        return if r == 0.0 { "0".to_string() } else { format!("{r:.0}") };
    }
    let a = v.abs();
    if !(1e-3..1e5).contains(&a) {
        return format!("{v:.2e}");
    }
    let decimals = if a >= 100.0 {
        1
    } else if a >= 1.0 {
        2
    } else {
        (4.0 - a.log10().floor()).clamp(2.0, 7.0) as usize
    };
    let s = format!("{v:.decimals$}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".to_string()
    } else {
        s.to_string()
    }
}

/// Whether `v` is an integer (up to rounding noise).
fn is_integer(v: f64) -> bool {
    (v - v.round()).abs() < 1e-9 * v.abs().max(1.0)
}

/// A tick label on an integer axis (steps, LSB): non-integer ticks, which
/// plotters places on short ranges, stay unlabelled.
fn fmt_integer(v: f64) -> String {
    if v.is_finite() && is_integer(v) {
        fmt_tick(v)
    } else {
        String::new()
    }
}

/// A count tick label: integers only, `10000` and above as `1e4`.
fn fmt_count(v: f64) -> String {
    if v >= 1e4 && v.is_finite() {
        format!("{v:.0e}")
    } else {
        fmt_integer(v)
    }
}

/// The scheme for titles (`unnamed scheme` if empty).
fn scheme_name(report: &Report) -> &str {
    if report.scheme.is_empty() {
        "unnamed scheme"
    } else {
        &report.scheme
    }
}

/// `1 window`, `2 windows`.
fn plural(n: usize, noun: &str) -> String {
    if n == 1 {
        format!("{n} {noun}")
    } else {
        format!("{n} {noun}s")
    }
}

/// Plotters' error as an `anyhow` error.
fn draw_err<E: std::fmt::Display>(e: E) -> anyhow::Error {
    anyhow!("plot drawing failed: {e}")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::ErrorHistogram;

    fn hist(f: impl Fn(i64) -> u64) -> ErrorHistogram {
        ErrorHistogram { counts: (-HIST_HALF..=HIST_HALF).map(f).collect(), bin_lsb: 1 }
    }

    fn synthetic() -> Report {
        let steps = 300;
        let mut float = Vec::new();
        let mut quant = Vec::new();
        for t in 0..steps {
            let x = t as f32 * 0.05;
            let f = vec![x.sin(), 0.5 * (0.3 * x).cos() + 0.2];
            // Deterministic "noise".
            let n = ((t as f32 * 12.9898).sin() * 43758.547).fract() - 0.5;
            let q = f.iter().map(|v| v + 0.02 * n).collect();
            float.push(f);
            quant.push(q);
        }
        let sqnr_windows = (0..10).map(|w| (w * 100, 45.0 - w as f64 * 0.8)).collect();
        let wide = hist(|e| (100_000.0 * (-(e * e) as f64 / 8.0).exp()) as u64 + u64::from(e.abs() == HIST_HALF) * 3);
        let narrow = hist(|e| if e.abs() <= 3 { 400 - 100 * e.unsigned_abs() } else { 0 });
        Report {
            scheme: "w8a16-c16-standard".into(),
            steps: 1000,
            plot: PlotData {
                trace_start: 700,
                trace_float: float,
                trace_quant: quant,
                output_names: vec!["y0".into(), "y1".into()],
                sqnr_windows,
                gate_hist: vec![
                    [wide.clone(), narrow.clone(), wide.clone(), narrow.clone()],
                    [narrow.clone(), wide.clone(), narrow, wide],
                ],
            },
            ..Default::default()
        }
    }

    fn read(paths: &[PathBuf], name: &str) -> String {
        let p = paths.iter().find(|p| p.file_name().is_some_and(|n| n == name)).unwrap();
        let s = std::fs::read_to_string(p).unwrap();
        assert!(s.starts_with("<svg"), "{name} does not start with <svg");
        assert!(s.trim_end().ends_with("</svg>"), "{name} is not closed");
        s
    }

    #[test]
    fn writes_three_svgs_with_labels_and_legends() {
        let dir = tempfile::tempdir().unwrap();
        let r = synthetic();
        let paths = write_plots(&r, dir.path(), Some(40.0)).unwrap();
        assert_eq!(paths.len(), 3);
        for p in &paths {
            assert!(p.exists(), "{}", p.display());
            assert_eq!(p.parent(), Some(dir.path()));
        }
        let trace = read(&paths, OUTPUT_TRACE_FILE);
        for text in ["step", "output (model units)", "float", "quantized (w8a16-c16-standard)", "y0", "y1", "700..999"]
        {
            assert!(trace.contains(text), "output_trace.svg lacks {text:?}");
        }
        let err = read(&paths, OUTPUT_ERROR_FILE);
        for text in ["step", "SQNR (dB)", "target", "windowed SQNR", "w8a16-c16-standard", "1000 compared steps"] {
            assert!(err.contains(text), "output_error.svg lacks {text:?}");
        }
        let h = read(&paths, GATE_HIST_FILE);
        for text in ["quantized - float (LSB of 2^-15)", "count (log scale)", "layer 0 gate i", "layer 1 gate o"] {
            assert!(h.contains(text), "gate_error_hist.svg lacks {text:?}");
        }
        // Font sizes of at least 14 px everywhere.
        for s in [&trace, &err, &h] {
            for part in s.split("font-size=\"").skip(1) {
                let size: f64 = part.split('"').next().unwrap().parse().unwrap();
                assert!(size >= 14.0, "font size {size}");
            }
        }
    }

    #[test]
    fn no_target_no_target_line_and_linear_counts() {
        let dir = tempfile::tempdir().unwrap();
        let mut r = synthetic();
        let narrow = r.plot.gate_hist[0][1].clone();
        r.plot.gate_hist = vec![[narrow.clone(), narrow.clone(), narrow.clone(), narrow]];
        let paths = write_plots(&r, dir.path(), None).unwrap();
        assert!(!read(&paths, OUTPUT_ERROR_FILE).contains("target"));
        let h = read(&paths, GATE_HIST_FILE);
        assert!(h.contains(">\ncount\n") && !h.contains("log scale"));
    }

    #[test]
    fn degenerate_inputs_still_write_files() {
        let cases: Vec<Report> = vec![
            // Nothing at all.
            Report::default(),
            // One step, constant values, infinite / NaN SQNR, all-zero and empty histograms.
            Report {
                scheme: "s".into(),
                steps: 1,
                plot: PlotData {
                    trace_start: 5,
                    trace_float: vec![vec![0.25, 0.0]],
                    trace_quant: vec![vec![0.25, f32::NAN]],
                    output_names: vec![],
                    sqnr_windows: vec![(0, f64::INFINITY)],
                    gate_hist: vec![[
                        hist(|_| 0),
                        ErrorHistogram { counts: vec![], bin_lsb: 1 },
                        ErrorHistogram { counts: vec![7], bin_lsb: 1 },
                        hist(|_| 0),
                    ]],
                },
                ..Default::default()
            },
            // Constant traces over many steps, only non-finite SQNR.
            Report {
                scheme: "s".into(),
                steps: 50,
                plot: PlotData {
                    trace_start: 0,
                    trace_float: vec![vec![3.0]; 50],
                    trace_quant: vec![vec![3.0]; 50],
                    output_names: vec!["h0".into()],
                    sqnr_windows: vec![(0, f64::NAN), (10, f64::NEG_INFINITY), (20, f64::INFINITY)],
                    gate_hist: vec![],
                },
                ..Default::default()
            },
        ];
        for (i, r) in cases.iter().enumerate() {
            let dir = tempfile::tempdir().unwrap();
            let paths = write_plots(r, dir.path(), Some(f64::NAN)).unwrap();
            assert_eq!(paths.len(), 3, "case {i}");
            for name in [OUTPUT_TRACE_FILE, OUTPUT_ERROR_FILE, GATE_HIST_FILE] {
                read(&paths, name);
            }
        }
        // Only exact windows: +inf at 150 dB, or just above the target.
        let dir = tempfile::tempdir().unwrap();
        let paths = write_plots(&cases[1], dir.path(), None).unwrap();
        let err = read(&paths, OUTPUT_ERROR_FILE);
        assert!(err.contains("exact (+inf) drawn at 150 dB") && err.contains(">\nexact (+inf)\n"), "{err}");
        let paths = write_plots(&cases[1], dir.path(), Some(30.0)).unwrap();
        assert!(read(&paths, OUTPUT_ERROR_FILE).contains("exact (+inf) drawn at 40 dB"));
        // Undefined windows are counted in the subtitle.
        let paths = write_plots(&cases[2], dir.path(), None).unwrap();
        assert!(read(&paths, OUTPUT_ERROR_FILE).contains("2 undefined (NaN/-inf) skipped"));
    }

    #[test]
    fn many_outputs_are_capped() {
        let dir = tempfile::tempdir().unwrap();
        let mut r = synthetic();
        r.plot.trace_float = vec![vec![0.0; 20]; 3];
        r.plot.trace_quant = vec![vec![0.0; 20]; 3];
        r.plot.output_names.clear();
        let paths = write_plots(&r, dir.path(), None).unwrap();
        let trace = read(&paths, OUTPUT_TRACE_FILE);
        assert!(trace.contains(&format!("first {MAX_TRACE_PANELS} of 20 outputs shown")));
        assert!(trace.contains("output 7") && !trace.contains("output 8"));
    }

    #[test]
    fn missing_dir_is_an_error_naming_it() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("no-such-plots");
        let e = write_plots(&synthetic(), &missing, None).unwrap_err().to_string();
        assert!(e.contains("no-such-plots") && e.contains("does not exist"), "{e}");
    }

    #[test]
    fn tick_formatting() {
        assert_eq!(fmt_tick(700.0), "700");
        assert_eq!(fmt_tick(-0.0), "0");
        assert_eq!(fmt_tick(0.25), "0.25");
        assert_eq!(fmt_tick(-1.5), "-1.5");
        assert_eq!(fmt_tick(1.0e-4), "1.00e-4");
        assert_eq!(fmt_count(100000.0), "1e5");
        assert_eq!(padded([2.0, 2.0].into_iter(), 0.0, 0.1, 0.0), (1.8, 2.2));
        assert_eq!(padded(std::iter::empty(), 1.0, 0.1, 0.0), (0.0, 1.0));
    }
}
