//! SVG picture of a rehearsal: objective and best achievable objective, and per input the applied setpoint, estimate and optimum.
//! Loops rehearsed side by side get a comparison instead: per input, every loop's estimate on the optimum.
//!
//! Rendering goes through `plotters` with only its SVG backend: text is emitted as
//! `<text>` elements and sized by the browser, so no font library is needed. The
//! picture is rendered into memory first so that a failed write leaves no half file
//! from the backend and the error can name the path.

use std::path::Path;

use anyhow::anyhow;
use plotters::coord::Shift;
use plotters::element::DashedPathElement;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

#[derive(Debug, Clone, Default)]
pub struct LoopTrace {
    /// Loop name, e.g. "kiln-2-draft".
    pub name: String,
    /// Objective expression text, e.g. "heat_rate / 1000"; y-axis label of the top panel.
    pub objective: String,
    /// "maximize" or "minimize", shown in the panel title.
    pub direction: &'static str,
    /// Seeking method, e.g. "newton"; names the loop in a comparison's legend.
    pub method: &'static str,
    /// Simulated time of each tick, seconds, increasing.
    pub t_s: Vec<f64>,
    /// Measured objective per tick; NaN where it was not finite (drawn as a gap).
    pub objective_values: Vec<f64>,
    /// Best achievable objective per tick.
    pub best_objective: Vec<f64>,
    pub inputs: Vec<InputTrace>,
}

#[derive(Debug, Clone, Default)]
pub struct InputTrace {
    /// Input name, e.g. "damper_pct"; names carry their units by convention.
    pub name: String,
    pub applied: Vec<f64>,
    pub estimate: Vec<f64>,
    pub optimum: Vec<f64>,
}

/// Most points one series may contribute to the picture. Beyond this a browser
/// gets slow and the file large, while a ~1200 px wide panel shows no more detail.
const MAX_POINTS: usize = 2000;

const WIDTH: u32 = 1200;
const OBJECTIVE_PANEL_HEIGHT: u32 = 300;
const INPUT_PANEL_HEIGHT: u32 = 220;
const HEADER_HEIGHT: u32 = 30;
/// Each further row of a legend too wide for the header's first row.
const LEGEND_ROW_HEIGHT: u32 = 18;
const Y_LABEL_AREA: u32 = 90;
const X_LABEL_AREA: u32 = 45;
const RIGHT_MARGIN: u32 = 20;
const X_TICKS: usize = 12;
const Y_TICKS: usize = 6;
const FONT: &str = "sans-serif";

/// Values this large are treated like NaN: axis arithmetic on them overflows to
/// infinity, and no real plant quantity gets near them.
const OFF_SCALE: f64 = 1e300;

// Noisy/dithered series are light and drawn first so the smooth lines stay readable on top.
const OBJECTIVE_COLOUR: RGBColor = RGBColor(120, 160, 210);
const BEST_COLOUR: RGBColor = RGBColor(200, 30, 30);
const APPLIED_COLOUR: RGBColor = RGBColor(140, 190, 140);
const OPTIMUM_COLOUR: RGBColor = RGBColor(230, 130, 0);
const ESTIMATE_COLOUR: RGBColor = RGBColor(20, 50, 140);
const TITLE_COLOUR: RGBColor = RGBColor(20, 20, 20);
const SUBTITLE_COLOUR: RGBColor = RGBColor(70, 70, 70);
const GRID_LIGHT: RGBColor = RGBColor(242, 242, 242);
const GRID_BOLD: RGBColor = RGBColor(215, 215, 215);

// A comparison tells its loops apart by colour and by dash pattern, so it also reads in
// grey print and for colour-blind readers. The colours are dark and steer clear of the
// optimum's orange; the two cycles have different lengths, so the first twelve loops
// each get a combination of their own.
const LOOP_COLOURS: [RGBColor; 6] = [
    ESTIMATE_COLOUR,
    RGBColor(0, 140, 100),
    RGBColor(180, 60, 140),
    RGBColor(40, 40, 40),
    RGBColor(0, 150, 210),
    RGBColor(120, 80, 200),
];
/// Dash and gap lengths in pixels; `None` is a solid line.
const LOOP_DASHES: [Option<(u32, u32)>; 4] = [None, Some((12, 5)), Some((2, 4)), Some((6, 12))];

/// Writes one SVG with a column of panels: for each loop its objective panel, then one panel per input.
pub fn write_svg(path: &Path, loops: &[LoopTrace]) -> anyhow::Result<()> {
    write(path, loops.iter().flat_map(loop_panels).collect())
}

/// Writes one SVG that compares loops, each rehearsed against its own copy of the plant:
/// one panel per input name, in which every loop with that input draws its estimate in
/// its own colour and dash pattern over the optimum.
pub fn write_comparison_svg(path: &Path, loops: &[LoopTrace]) -> anyhow::Result<()> {
    write(path, comparison_panels(loops))
}

fn write(path: &Path, panels: Vec<Panel>) -> anyhow::Result<()> {
    let svg = render(panels).map_err(|e| anyhow!("could not write plot to {}: {e}", path.display()))?;
    std::fs::write(path, svg).map_err(|e| anyhow!("could not write plot to {}: {e}", path.display()))
}

struct Series {
    label: String,
    colour: RGBColor,
    width: u32,
    /// Dash and gap lengths in pixels; `None` is a solid line.
    dash: Option<(u32, u32)>,
    /// Points in time order, time already in the axis unit; a NaN `y` breaks the line.
    points: Vec<(f64, f64)>,
}

impl Series {
    /// `y` against `t`, decimated, with time in the axis unit.
    fn new(
        label: impl Into<String>,
        colour: RGBColor,
        width: u32,
        t: &[f64],
        y: &[f64],
        unit_s: f64,
    ) -> Self {
        let n = t.len().min(y.len());
        Series {
            label: label.into(),
            colour,
            width,
            dash: None,
            points: decimate(&t[..n], &y[..n], MAX_POINTS)
                .into_iter()
                .map(|(x, y)| (x / unit_s, y))
                .collect(),
        }
    }

    fn dashed(self, dash: Option<(u32, u32)>) -> Self {
        Series { dash, ..self }
    }

    /// Bit for bit, so that gaps (NaN) compare equal too.
    fn same_line_as(&self, other: &Series) -> bool {
        self.points.len() == other.points.len()
            && self
                .points
                .iter()
                .zip(&other.points)
                .all(|(a, b)| a.0.to_bits() == b.0.to_bits() && a.1.to_bits() == b.1.to_bits())
    }
}

struct Panel {
    title: String,
    /// Subtitles are for input panels, which belong to the loop panel above them.
    is_subpanel: bool,
    y_desc: String,
    x_desc: String,
    x_range: (f64, f64),
    /// `None` when there is nothing to draw; the panel then says "no data".
    series: Option<Vec<Series>>,
}

type DrawResult<T> = Result<T, DrawingAreaErrorKind<std::io::Error>>;

fn render(mut panels: Vec<Panel>) -> DrawResult<String> {
    if panels.is_empty() {
        panels.push(Panel {
            title: "rehearsal".to_string(),
            is_subpanel: false,
            y_desc: String::new(),
            x_desc: "time [s]".to_string(),
            x_range: (0.0, 1.0),
            series: None,
        });
    }

    let legends = panels.iter().map(legend_layout).collect::<DrawResult<Vec<_>>>()?;
    let heights: Vec<u32> = panels.iter().zip(&legends).map(|(p, l)| panel_height(p, l)).collect();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, heights.iter().sum())).into_drawing_area();
        root.fill(&WHITE)?;
        let mut rest = root.clone();
        for (i, (panel, legend)) in panels.iter().zip(&legends).enumerate() {
            let (area, below) = rest.split_vertically(heights[i]);
            if i > 0 && !panel.is_subpanel {
                // Marks where the next loop (in a comparison: input) starts in a long column.
                area.draw(&PathElement::new(
                    vec![(0, 1), (WIDTH as i32, 1)],
                    ShapeStyle::from(&GRID_BOLD).stroke_width(2),
                ))?;
            }
            draw_panel(&area, panel, legend)?;
            rest = below;
        }
        root.present()?;
    }
    Ok(svg)
}

fn panel_height(panel: &Panel, legend: &Legend) -> u32 {
    let height = if panel.is_subpanel { INPUT_PANEL_HEIGHT } else { OBJECTIVE_PANEL_HEIGHT };
    height + legend.extra_rows * LEGEND_ROW_HEIGHT
}

/// Ticks every series of the loop has. Vectors are specified to be equally long;
/// trusting only the shortest keeps a caller bug from turning into an out-of-bounds panic.
fn common_len(lp: &LoopTrace) -> usize {
    let mut n = lp.t_s.len().min(lp.objective_values.len()).min(lp.best_objective.len());
    for input in &lp.inputs {
        n = n.min(input.applied.len()).min(input.estimate.len()).min(input.optimum.len());
    }
    n
}

fn loop_panels(lp: &LoopTrace) -> Vec<Panel> {
    let n = common_len(lp);
    let t = &lp.t_s[..n];
    let time = TimeAxis::new(t);
    let has_data = time.is_some();
    let time = time.unwrap_or(TimeAxis::PLACEHOLDER);
    let make = |label, colour, width, y: &[f64]| Series::new(label, colour, width, t, &y[..n], time.unit_s);

    let mut panels = vec![Panel {
        title: format!("{} ({})", lp.name, lp.direction),
        is_subpanel: false,
        y_desc: lp.objective.clone(),
        x_desc: time.desc(),
        x_range: time.range,
        series: has_data.then(|| {
            vec![
                make("objective", OBJECTIVE_COLOUR, 1, &lp.objective_values),
                make("best", BEST_COLOUR, 2, &lp.best_objective),
            ]
        }),
    }];
    for input in &lp.inputs {
        panels.push(Panel {
            title: format!("{}: {}", lp.name, input.name),
            is_subpanel: true,
            y_desc: input.name.clone(),
            x_desc: time.desc(),
            x_range: time.range,
            series: has_data.then(|| {
                vec![
                    make("applied", APPLIED_COLOUR, 1, &input.applied),
                    // The optimum is wide and drawn under the estimate so both stay
                    // visible once the estimate has converged onto it.
                    make("optimum", OPTIMUM_COLOUR, 4, &input.optimum),
                    make("estimate", ESTIMATE_COLOUR, 2, &input.estimate),
                ]
            }),
        });
    }
    panels
}

/// One panel per input name, in order of first appearance; a loop's colour and dash
/// pattern follow from its place in `loops`, so it looks the same in every panel.
fn comparison_panels(loops: &[LoopTrace]) -> Vec<Panel> {
    let lens: Vec<usize> = loops.iter().map(common_len).collect();
    let ticks: Vec<&[f64]> = loops.iter().zip(&lens).map(|(lp, &n)| &lp.t_s[..n]).collect();
    // As in a single run, there is something to draw once some loop has a time axis;
    // loops may tick at different rates, so the axis spans them all.
    let has_data = ticks.iter().any(|t| TimeAxis::new(*t).is_some());
    let time =
        TimeAxis::new(ticks.iter().copied().flatten()).filter(|_| has_data).unwrap_or(TimeAxis::PLACEHOLDER);

    let mut names: Vec<&str> = Vec::new();
    for input in loops.iter().flat_map(|lp| &lp.inputs) {
        if !names.contains(&input.name.as_str()) {
            names.push(&input.name);
        }
    }
    names
        .into_iter()
        .map(|name| {
            let mut optima: Vec<(&str, Series)> = Vec::new();
            let mut estimates = Vec::new();
            for (k, ((lp, &n), &t)) in loops.iter().zip(&lens).zip(&ticks).enumerate() {
                let Some(input) = lp.inputs.iter().find(|i| i.name == name) else {
                    continue;
                };
                let (colour, dash) =
                    (LOOP_COLOURS[k % LOOP_COLOURS.len()], LOOP_DASHES[k % LOOP_DASHES.len()]);
                let label = if lp.method.is_empty() {
                    lp.name.clone()
                } else {
                    format!("{} ({})", lp.name, lp.method)
                };
                estimates
                    .push(Series::new(label, colour, 2, t, &input.estimate[..n], time.unit_s).dashed(dash));
                let optimum = Series::new("optimum", OPTIMUM_COLOUR, 4, t, &input.optimum[..n], time.unit_s);
                if !optima.iter().any(|(_, o)| o.same_line_as(&optimum)) {
                    optima.push((&lp.name, optimum.dashed(dash)));
                }
            }
            // Copies of one plant usually share the optimum: one line then. Optima that
            // differ (other inputs held elsewhere, other ticks) each name their loop.
            let shared = optima.len() == 1;
            let optima = optima.into_iter().map(|(loop_name, o)| {
                if shared { o.dashed(None) } else { Series { label: format!("optimum, {loop_name}"), ..o } }
            });
            Panel {
                title: format!("{name}: estimate per loop"),
                is_subpanel: false,
                y_desc: name.to_string(),
                x_desc: time.desc(),
                x_range: time.range,
                // Optima first: drawn wide and under the estimates, as in a single run.
                series: has_data.then(|| optima.chain(estimates).collect()),
            }
        })
        .collect()
}

struct TimeAxis {
    unit_s: f64,
    unit: &'static str,
    range: (f64, f64),
}

impl TimeAxis {
    /// The axis of a panel that says "no data".
    const PLACEHOLDER: TimeAxis = TimeAxis { unit_s: 1.0, unit: "s", range: (0.0, 1.0) };

    /// `None` when fewer than two usable ticks exist: a single instant has no time axis.
    fn new<'a>(t: impl IntoIterator<Item = &'a f64>) -> Option<Self> {
        let (lo, hi, count) = t
            .into_iter()
            .copied()
            .filter(|v| usable(*v))
            .fold((f64::INFINITY, f64::NEG_INFINITY, 0usize), |(lo, hi, count), v| {
                (lo.min(v), hi.max(v), count + 1)
            });
        if count < 2 {
            return None;
        }
        let duration = hi - lo;
        let (unit_s, unit) = if duration < 600.0 {
            (1.0, "s")
        } else if duration < 36_000.0 {
            (60.0, "min")
        } else {
            (3600.0, "h")
        };
        let range = widen_if_flat(lo / unit_s, hi / unit_s, 0.0);
        Some(Self { unit_s, unit, range })
    }

    fn desc(&self) -> String {
        format!("time [{}]", self.unit)
    }
}

fn usable(v: f64) -> bool {
    v.is_finite() && v.abs() < OFF_SCALE
}

/// Reduces a series to at most `cap` points by keeping, per bucket of ticks, the
/// smallest and the largest value in their original order. Unlike striding this keeps
/// the envelope of dither and noise, so the band stays as wide as it really was, and it
/// cannot skip over a gap. A NaN `y` in the result marks where the line must break.
fn decimate(t: &[f64], y: &[f64], cap: usize) -> Vec<(f64, f64)> {
    let n = t.len().min(y.len());
    let pairs = (cap / 2).max(1);
    let bucket = if n <= cap { 1 } else { n.div_ceil(pairs) };
    let ok = |i: usize| usable(t[i]) && usable(y[i]);

    let mut out: Vec<(f64, f64)> = Vec::with_capacity(n.min(cap) + 16);
    let push_gap = |out: &mut Vec<(f64, f64)>| {
        if out.last().is_some_and(|p| !p.1.is_nan()) {
            out.push((f64::NAN, f64::NAN));
        }
    };

    let mut start = 0;
    while start < n {
        let end = (start + bucket).min(n);
        let mut extremes: Option<(usize, usize)> = None;
        for i in (start..end).filter(|&i| ok(i)) {
            extremes = Some(match extremes {
                None => (i, i),
                Some((lo, hi)) => (if y[i] < y[lo] { i } else { lo }, if y[i] > y[hi] { i } else { hi }),
            });
        }
        match extremes {
            None => push_gap(&mut out),
            Some((lo, hi)) => {
                if !ok(start) {
                    push_gap(&mut out);
                }
                let (a, b) = (lo.min(hi), lo.max(hi));
                out.push((t[a], y[a]));
                if b != a {
                    out.push((t[b], y[b]));
                }
                if !ok(end - 1) {
                    push_gap(&mut out);
                }
            }
        }
        start = end;
    }
    out
}

/// Splits a decimated series at its NaN markers into runs that can each be one polyline.
fn segments(points: &[(f64, f64)]) -> Vec<Vec<(f64, f64)>> {
    points.split(|p| p.1.is_nan()).filter(|run| !run.is_empty()).map(<[(f64, f64)]>::to_vec).collect()
}

/// Range of the usable values padded by 5%, so extremes do not sit on the frame.
fn y_range<'a>(series: impl Iterator<Item = &'a Series>) -> (f64, f64) {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for s in series {
        for &(_, v) in &s.points {
            if usable(v) {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        }
    }
    if lo > hi {
        return (-1.0, 1.0);
    }
    let pad = 0.05 * (hi - lo);
    widen_if_flat(lo - pad, hi + pad, 0.05)
}

/// A flat range would divide by zero when mapping to pixels, and a range far below
/// the values' precision yields unreadable ticks, so such ranges are opened up
/// symmetrically around their centre.
fn widen_if_flat(lo: f64, hi: f64, rel_half: f64) -> (f64, f64) {
    let magnitude = lo.abs().max(hi.abs());
    if hi - lo > 1e-9 * magnitude && hi > lo {
        return (lo, hi);
    }
    let centre = 0.5 * (lo + hi);
    let half = if centre.abs() > 1e-9 && rel_half > 0.0 {
        centre.abs() * rel_half
    } else if centre.abs() > 1e-9 {
        centre.abs() * 0.05
    } else {
        1.0
    };
    (centre - half, centre + half)
}

/// Tick labels for a plotters numeric axis. Plotters steps through 1-2-5 multiples of
/// powers of ten; the step is recomputed the same way so each label shows exactly as
/// many decimals as the step needs (plotters' default prints e.g. "1000000.0").
fn tick_formatter(range: (f64, f64), max_ticks: usize) -> impl Fn(&f64) -> String {
    let span = range.1 - range.0;
    let step = nice_step(span, max_ticks);
    let magnitude = range.0.abs().max(range.1.abs());
    let scientific = !(1e-3..1e6).contains(&magnitude);
    // Plotters may settle on a finer step than the one recomputed here (0.5 where this
    // gives 1), so the decimals come from the finer of the candidate steps.
    let decimals = decimals_for(nice_step(span, 2 * max_ticks + 1));
    let sig = if magnitude > 0.0 {
        let digits = (magnitude.log10().floor() - step.log10().floor()).max(0.0);
        (digits as usize).min(8)
    } else {
        0
    };
    move |v: &f64| {
        // Rounding noise around zero would otherwise print as "-0.0" or "1e-17".
        let v = if v.abs() < step * 1e-6 { 0.0 } else { *v };
        if scientific && v != 0.0 {
            format!("{v:.sig$e}")
        } else {
            // Trailing zeros go, so a label never shows more decimals than it has.
            let text = format!("{v:.decimals$}");
            if text.contains('.') {
                text.trim_end_matches('0').trim_end_matches('.').to_owned()
            } else {
                text
            }
        }
    }
}

fn nice_step(span: f64, max_ticks: usize) -> f64 {
    if !(span.is_finite() && span > 0.0) {
        return 1.0;
    }
    let max_intervals = max_ticks.saturating_sub(1).max(1) as f64;
    let mut step = 10f64.powf(span.log10().ceil());
    loop {
        let base = step;
        for div in [2.0, 5.0, 10.0] {
            let candidate = base / div;
            if span / candidate > max_intervals {
                return step;
            }
            step = candidate;
        }
    }
}

fn decimals_for(step: f64) -> usize {
    if step >= 1.0 || !step.is_finite() || step <= 0.0 {
        0
    } else {
        // Small tolerance so 0.1 (stored as 0.1000000000000000055) gives 1, not 2.
        ((-step.log10() - 1e-9).ceil().max(0.0) as usize).min(12)
    }
}

fn text_style(size: u32, colour: &'static RGBColor) -> TextStyle<'static> {
    TextStyle::from((FONT, size).into_font()).color(colour)
}

fn title_style(panel: &Panel) -> TextStyle<'static> {
    if panel.is_subpanel { text_style(14, &SUBTITLE_COLOUR) } else { text_style(17, &TITLE_COLOUR) }
}

fn legend_style() -> TextStyle<'static> {
    text_style(13, &BLACK)
}

/// Width plotters gives the text: without a font library it estimates it from the font
/// size alone, so it can be known before there is an area to draw on.
fn text_width(text: &str, style: &TextStyle<'_>) -> DrawResult<i32> {
    let (w, _) = style.font.box_size(text).map_err(|_| DrawingAreaErrorKind::LayoutError)?;
    Ok(w as i32)
}

fn draw_panel(area: &DrawingArea<SVGBackend<'_>, Shift>, panel: &Panel, legend: &Legend) -> DrawResult<()> {
    area.draw(&Text::new(
        panel.title.clone(),
        (Y_LABEL_AREA as i32, 8),
        title_style(panel).pos(Pos::new(HPos::Left, VPos::Top)),
    ))?;

    let Some(series) = &panel.series else {
        return draw_no_data(area);
    };

    draw_legend(area, series, legend)?;

    let y = y_range(series.iter());
    let x = panel.x_range;
    let mut chart = ChartBuilder::on(area)
        .margin_top(HEADER_HEIGHT + legend.extra_rows * LEGEND_ROW_HEIGHT)
        .margin_right(RIGHT_MARGIN)
        .margin_bottom(4)
        .x_label_area_size(X_LABEL_AREA)
        .y_label_area_size(Y_LABEL_AREA)
        .build_cartesian_2d(x.0..x.1, y.0..y.1)?;

    let x_fmt = tick_formatter(x, X_TICKS);
    let y_fmt = tick_formatter(y, Y_TICKS);
    chart
        .configure_mesh()
        .x_labels(X_TICKS)
        .y_labels(Y_TICKS)
        .x_label_formatter(&x_fmt)
        .y_label_formatter(&y_fmt)
        .x_desc(panel.x_desc.as_str())
        .y_desc(panel.y_desc.as_str())
        .label_style(text_style(12, &BLACK))
        .axis_desc_style(text_style(13, &BLACK))
        .light_line_style(GRID_LIGHT)
        .bold_line_style(GRID_BOLD)
        .draw()?;

    for s in series {
        let style = ShapeStyle::from(&s.colour).stroke_width(s.width);
        for run in segments(&s.points) {
            match (run.len(), s.dash) {
                // An isolated tick between two gaps would be an invisible one-point line.
                (1, _) => chart.draw_series(run.into_iter().map(|p| Circle::new(p, 1, style.filled())))?,
                (_, None) => chart.draw_series(std::iter::once(PathElement::new(run, style)))?,
                (_, Some((on, off))) => {
                    chart.draw_series(std::iter::once(DashedPathElement::new(run, on, off, style)))?
                }
            };
        }
    }
    Ok(())
}

/// Where the legend goes: in the header, right-aligned, so it never hides data. Entries
/// that would run into the title wrap onto further rows, in reading order.
struct Legend {
    /// One per series, in the panel's order.
    entries: Vec<LegendEntry>,
    /// Rows below the first; each makes the header taller.
    extra_rows: u32,
}

/// Pixel positions in the panel: the sample line, the label, and the row's middle.
struct LegendEntry {
    line_start: i32,
    line_end: i32,
    text_x: i32,
    y: i32,
}

const LEGEND_SAMPLE: i32 = 24;
const LEGEND_LABEL_GAP: i32 = 6;
const LEGEND_ENTRY_GAP: i32 = 18;
const TITLE_LEGEND_GAP: i32 = 18;

/// A dashed sample is long enough to show its pattern at least twice.
fn sample_len(s: &Series) -> i32 {
    match s.dash {
        None => LEGEND_SAMPLE,
        Some((on, off)) => LEGEND_SAMPLE.max((2 * (on + off) + on) as i32),
    }
}

fn legend_layout(panel: &Panel) -> DrawResult<Legend> {
    let Some(series) = &panel.series else {
        return Ok(Legend { entries: Vec::new(), extra_rows: 0 });
    };
    let style = legend_style();
    let text_widths = series.iter().map(|s| text_width(&s.label, &style)).collect::<DrawResult<Vec<_>>>()?;
    let entry_width = |i: usize| sample_len(&series[i]) + LEGEND_LABEL_GAP + text_widths[i];
    let right = (WIDTH - RIGHT_MARGIN) as i32;
    let first_row_left =
        Y_LABEL_AREA as i32 + text_width(&panel.title, &title_style(panel))? + TITLE_LEGEND_GAP;

    // Rows of series indices, filled greedily in reading order; an entry wider than a
    // whole row still gets a row of its own.
    let mut rows: Vec<Vec<usize>> = Vec::new();
    let mut used = 0;
    for i in 0..series.len() {
        let left = if rows.len() <= 1 { first_row_left } else { Y_LABEL_AREA as i32 };
        let needed = used + LEGEND_ENTRY_GAP + entry_width(i);
        match rows.last_mut() {
            Some(row) if right - needed >= left => {
                row.push(i);
                used = needed;
            }
            _ => {
                rows.push(vec![i]);
                used = entry_width(i);
            }
        }
    }

    let mut entries: Vec<Option<LegendEntry>> = series.iter().map(|_| None).collect();
    for (r, row) in rows.iter().enumerate() {
        let y = 15 + r as i32 * LEGEND_ROW_HEIGHT as i32;
        let mut right = right;
        for &i in row.iter().rev() {
            let text_x = right - text_widths[i];
            let line_end = text_x - LEGEND_LABEL_GAP;
            let line_start = line_end - sample_len(&series[i]);
            entries[i] = Some(LegendEntry { line_start, line_end, text_x, y });
            right = line_start - LEGEND_ENTRY_GAP;
        }
    }
    let extra_rows = rows.len().saturating_sub(1) as u32;
    Ok(Legend { entries: entries.into_iter().flatten().collect(), extra_rows })
}

fn draw_legend(
    area: &DrawingArea<SVGBackend<'_>, Shift>,
    series: &[Series],
    legend: &Legend,
) -> DrawResult<()> {
    let style = legend_style();
    // Right to left, the order it has always been drawn in, so a single run's file stays
    // the same byte for byte.
    for (s, e) in series.iter().zip(&legend.entries).rev() {
        area.draw(&Text::new(
            s.label.as_str(),
            (e.text_x, e.y),
            style.pos(Pos::new(HPos::Left, VPos::Center)),
        ))?;
        let line = vec![(e.line_start, e.y), (e.line_end, e.y)];
        let line_style = ShapeStyle::from(&s.colour).stroke_width(s.width.max(2));
        match s.dash {
            None => area.draw(&PathElement::new(line, line_style))?,
            Some((on, off)) => area.draw(&DashedPathElement::new(line, on, off, line_style))?,
        }
    }
    Ok(())
}

fn draw_no_data(area: &DrawingArea<SVGBackend<'_>, Shift>) -> DrawResult<()> {
    let (w, h) = area.dim_in_pixel();
    let (left, top) = (Y_LABEL_AREA as i32, HEADER_HEIGHT as i32);
    let (right, bottom) = (w as i32 - RIGHT_MARGIN as i32, h as i32 - X_LABEL_AREA as i32);
    area.draw(&Rectangle::new([(left, top), (right, bottom)], ShapeStyle::from(&GRID_BOLD).stroke_width(1)))?;
    area.draw(&Text::new(
        "no data",
        ((left + right) / 2, (top + bottom) / 2),
        text_style(16, &SUBTITLE_COLOUR).pos(Pos::new(HPos::Center, VPos::Center)),
    ))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    fn scratch(name: &str) -> PathBuf {
        std::env::temp_dir().join(format!("rehearse-plot-{}-{name}.svg", std::process::id()))
    }

    fn render_to_string(loops: &[LoopTrace], name: &str) -> String {
        written(write_svg, loops, name)
    }

    fn comparison_to_string(loops: &[LoopTrace], name: &str) -> String {
        written(write_comparison_svg, loops, name)
    }

    fn written(
        write: fn(&Path, &[LoopTrace]) -> anyhow::Result<()>,
        loops: &[LoopTrace],
        name: &str,
    ) -> String {
        let path = scratch(name);
        let result = write(&path, loops);
        assert!(result.is_ok(), "write failed: {result:?}");
        let text = std::fs::read_to_string(&path).unwrap_or_default();
        let _ = std::fs::remove_file(&path);
        text
    }

    /// Tiny well-formedness check: one root, every tag closed in order, no stray NaN.
    fn assert_plausible_svg(svg: &str) {
        let trimmed = svg.trim_start();
        assert!(trimmed.starts_with("<svg") || trimmed.starts_with("<?xml"));
        assert!(svg.trim_end().ends_with("</svg>"));
        assert!(!svg.contains("NaN"), "NaN leaked into the SVG");
        assert!(!svg.contains("inf"), "infinity leaked into the SVG");
        let mut stack: Vec<String> = Vec::new();
        let mut rest = svg;
        while let Some(open) = rest.find('<') {
            let Some(close) = rest[open..].find('>') else {
                panic!("unterminated tag");
            };
            let tag = &rest[open + 1..open + close];
            rest = &rest[open + close + 1..];
            if tag.starts_with('?') || tag.starts_with('!') {
                continue;
            }
            if let Some(name) = tag.strip_prefix('/') {
                assert_eq!(stack.pop().as_deref(), Some(name.trim()), "mismatched close");
            } else if !tag.ends_with('/') {
                let name = tag.split_whitespace().next().unwrap_or_default();
                stack.push(name.to_string());
            }
        }
        assert!(stack.is_empty(), "unclosed tags: {stack:?}");
    }

    /// Polylines drawn in this stroke colour (plotters writes it as upper-case hex).
    fn polylines_in(svg: &str, colour: RGBColor) -> usize {
        let stroke = format!("stroke=\"#{:02X}{:02X}{:02X}\"", colour.0, colour.1, colour.2);
        svg.split("<polyline")
            .skip(1)
            .filter(|el| el.split("/>").next().is_some_and(|el| el.contains(&stroke)))
            .count()
    }

    fn polyline_point_counts(svg: &str) -> Vec<usize> {
        svg.split("<polyline")
            .skip(1)
            .filter_map(|el| {
                let start = el.find("points=\"")? + "points=\"".len();
                let end = el[start..].find('"')?;
                Some(el[start..start + end].split_whitespace().count())
            })
            .collect()
    }

    fn example(n: usize, dt: f64) -> LoopTrace {
        let t_s: Vec<f64> = (0..n).map(|i| i as f64 * dt).collect();
        let optimum: Vec<f64> = t_s.iter().map(|t| 40.0 + t / 3600.0).collect();
        let estimate: Vec<f64> =
            t_s.iter().zip(&optimum).map(|(t, o)| o - 15.0 * (-t / 3000.0).exp()).collect();
        let applied: Vec<f64> = t_s.iter().zip(&estimate).map(|(t, e)| e + 0.8 * (t / 30.0).sin()).collect();
        let objective_values: Vec<f64> = estimate
            .iter()
            .zip(&optimum)
            .enumerate()
            .map(|(i, (e, o))| {
                if i % 997 == 5 {
                    f64::NAN
                } else {
                    100.0 - 0.05 * (e - o).powi(2) + ((i * 7919 % 1000) as f64 / 1000.0 - 0.5)
                }
            })
            .collect();
        LoopTrace {
            name: "kiln-2-draft".to_string(),
            objective: "heat_rate / 1000 & <eff>".to_string(),
            direction: "maximize",
            method: "sine",
            best_objective: vec![100.0; n],
            t_s,
            objective_values,
            inputs: vec![InputTrace { name: "damper_pct".to_string(), applied, estimate, optimum }],
        }
    }

    #[test]
    fn the_svg_is_well_formed_and_names_loops_inputs_and_axes() {
        let svg = render_to_string(&[example(5000, 1.0)], "names");
        assert_plausible_svg(&svg);
        for needle in [
            "kiln-2-draft (maximize)",
            "damper_pct",
            "time [min]",
            "heat_rate / 1000 &amp; &lt;eff&gt;",
            "objective",
            "best",
            "applied",
            "estimate",
            "optimum",
        ] {
            assert!(svg.contains(needle), "missing {needle}");
        }
    }

    #[test]
    fn no_polyline_in_the_file_exceeds_the_point_cap() {
        let svg = render_to_string(&[example(100_000, 1.0)], "cap");
        assert_plausible_svg(&svg);
        assert!(svg.contains("time [h]"));
        let counts = polyline_point_counts(&svg);
        assert!(!counts.is_empty());
        assert!(counts.iter().all(|&c| c <= MAX_POINTS), "{counts:?}");
    }

    #[test]
    fn decimation_keeps_the_envelope_within_the_cap() {
        let n = 100_000;
        let t: Vec<f64> = (0..n).map(|i| i as f64).collect();
        let y: Vec<f64> = t.iter().map(|t| (t / 7.0).sin()).collect();
        let d = decimate(&t, &y, MAX_POINTS);
        assert!(d.len() <= MAX_POINTS);
        let max = d.iter().map(|p| p.1).fold(f64::MIN, f64::max);
        let min = d.iter().map(|p| p.1).fold(f64::MAX, f64::min);
        assert!(max > 0.99 && min < -0.99, "dither band lost: {min}..{max}");
        assert!(d.windows(2).all(|w| w[0].0 <= w[1].0), "time order lost");
        for n in [0, 1, 2, 1999, 2000, 2001, 4001, 100_003] {
            let t: Vec<f64> = (0..n).map(|i| i as f64).collect();
            assert!(decimate(&t, &t, MAX_POINTS).len() <= MAX_POINTS, "n = {n}");
        }
    }

    #[test]
    fn a_nan_leaves_a_gap_in_the_line() {
        let t = [0.0, 1.0, 2.0, 3.0, 4.0];
        let y = [1.0, 2.0, f64::NAN, 4.0, 5.0];
        let runs = segments(&decimate(&t, &y, MAX_POINTS));
        assert_eq!(runs, vec![vec![(0.0, 1.0), (1.0, 2.0)], vec![(3.0, 4.0), (4.0, 5.0)]]);
    }

    #[test]
    fn empty_and_tiny_traces_say_no_data() {
        for n in [0, 1] {
            let mut lp = example(n, 1.0);
            lp.inputs[0].name = "fuel_kw".to_string();
            let svg = render_to_string(&[lp], &format!("tiny{n}"));
            assert_plausible_svg(&svg);
            assert!(svg.contains("no data"));
            assert!(svg.contains("fuel_kw"));
        }
        let svg = render_to_string(&[], "none");
        assert_plausible_svg(&svg);
        assert!(svg.contains("no data"));
    }

    #[test]
    fn degenerate_values_do_not_panic() {
        let n = 50;
        let mut lp = example(n, 1.0);
        lp.objective_values = vec![f64::NAN; n];
        lp.best_objective = vec![f64::INFINITY; n];
        lp.inputs[0].applied = vec![3.0; n];
        lp.inputs[0].estimate = vec![0.0; n];
        lp.inputs[0].optimum = (0..n).map(|i| if i % 2 == 0 { 1e299 } else { -1e299 }).collect();
        let mut short = example(n, 1.0);
        short.inputs[0].estimate.truncate(10);
        let svg = render_to_string(&[lp, short], "degenerate");
        assert_plausible_svg(&svg);
        assert!(svg.contains("time [s]"));
    }

    #[test]
    fn a_constant_series_gets_a_symmetric_range() {
        assert_eq!(widen_if_flat(2.0, 2.0, 0.05), (1.9, 2.1));
        assert_eq!(widen_if_flat(0.0, 0.0, 0.05), (-1.0, 1.0));
        let (lo, hi) = widen_if_flat(-10.0, -10.0, 0.05);
        assert!(lo < -10.0 && hi > -10.0 && ((lo + hi) / 2.0 + 10.0).abs() < 1e-12);
    }

    #[test]
    fn the_same_traces_give_the_same_file() {
        let a = render_to_string(&[example(3000, 2.0)], "det-a");
        let b = render_to_string(&[example(3000, 2.0)], "det-b");
        assert_eq!(a, b);
    }

    #[test]
    fn a_write_error_names_the_path() {
        let path = Path::new("/nonexistent-dir-for-plot-test/out.svg");
        let err = write_svg(path, &[example(10, 1.0)]).err().map(|e| e.to_string());
        let msg = err.unwrap_or_default();
        assert!(msg.starts_with("could not write plot to /nonexistent-dir-for-plot-test/out.svg: "), "{msg}");
    }

    /// The example loop under another name and method, its estimate `lag_s` behind.
    fn contender(name: &str, method: &'static str, lag_s: f64) -> LoopTrace {
        let mut lp = LoopTrace { name: name.to_string(), method, ..example(3000, 2.0) };
        let input = &mut lp.inputs[0];
        input.estimate =
            lp.t_s.iter().zip(&input.optimum).map(|(t, o)| o - 15.0 * (-t / lag_s).exp()).collect();
        lp
    }

    #[test]
    fn a_comparison_overlays_every_loops_estimate_in_one_panel_per_input() {
        let mut newton = contender("kiln-2-newton", "newton", 600.0);
        let fan = InputTrace { name: "fan_pct".to_string(), ..newton.inputs[0].clone() };
        newton.inputs.push(fan);
        let svg = comparison_to_string(&[contender("kiln-2-sine", "sine", 3000.0), newton], "compare");
        assert_plausible_svg(&svg);
        for needle in [
            "damper_pct: estimate per loop",
            "fan_pct: estimate per loop",
            "kiln-2-sine (sine)",
            "kiln-2-newton (newton)",
            "time [min]",
        ] {
            assert!(svg.contains(needle), "missing {needle}");
        }
        // Both loops share damper_pct, only the Newton loop has fan_pct.
        assert_eq!(svg.matches("kiln-2-sine (sine)").count(), 1);
        assert_eq!(svg.matches("kiln-2-newton (newton)").count(), 2);
        // Copies of one plant share the optimum: one line and one legend entry per panel.
        assert_eq!(svg.matches("\noptimum\n").count(), 2);
        assert!(!svg.contains("applied") && !svg.contains("(maximize)"), "a comparison shows estimates only");
    }

    #[test]
    fn each_loop_in_a_comparison_has_its_own_colour_and_dash_pattern() {
        let loops = [
            contender("a", "sine", 3000.0),
            contender("b", "newton", 600.0),
            contender("c", "stepwise", 1500.0),
        ];
        let svg = comparison_to_string(&loops, "dashes");
        assert_plausible_svg(&svg);
        // The first loop is solid: one line in the panel and one in the legend. Dashed
        // loops are many short lines, each dash its own.
        assert_eq!(polylines_in(&svg, LOOP_COLOURS[0]), 2);
        assert!(polylines_in(&svg, LOOP_COLOURS[1]) > 20);
        assert!(polylines_in(&svg, LOOP_COLOURS[2]) > 20);
        let patterns: Vec<_> = (0..3).map(|k| LOOP_DASHES[k]).collect();
        assert!(patterns[0] != patterns[1] && patterns[1] != patterns[2] && patterns[0] != patterns[2]);
        // The shared optimum stays solid, as in a single run.
        assert_eq!(polylines_in(&svg, OPTIMUM_COLOUR), 2);
    }

    #[test]
    fn optima_that_differ_each_name_their_loop() {
        let mut other = contender("b", "newton", 600.0);
        other.inputs[0].optimum.iter_mut().for_each(|o| *o += 5.0);
        let svg = comparison_to_string(&[contender("a", "sine", 3000.0), other], "optima");
        assert_plausible_svg(&svg);
        assert!(svg.contains("optimum, a") && svg.contains("optimum, b"));
    }

    #[test]
    fn a_legend_too_wide_for_the_header_wraps_onto_rows_below_the_title() {
        let loops: Vec<LoopTrace> = (0..8)
            .map(|k| contender(&format!("kiln-2-draft-candidate-{k}"), "newton", 500.0 * f64::from(k + 1)))
            .collect();
        let panels = comparison_panels(&loops);
        let legend = match legend_layout(&panels[0]) {
            Ok(l) => l,
            Err(e) => panic!("no layout: {e}"),
        };
        assert!(legend.extra_rows >= 2, "{} extra rows", legend.extra_rows);
        assert_eq!(legend.entries.len(), 9);
        let title_w = text_width(&panels[0].title, &title_style(&panels[0])).unwrap_or_default();
        for e in &legend.entries {
            assert!(e.line_start >= Y_LABEL_AREA as i32 && e.text_x < (WIDTH - RIGHT_MARGIN) as i32);
            if e.y == legend.entries[0].y {
                assert!(e.line_start > Y_LABEL_AREA as i32 + title_w, "runs into the title");
            }
        }
        // Reading order: each entry is right of the one before, or on a lower row.
        assert!(legend.entries.windows(2).all(|w| w[1].y > w[0].y || w[1].line_start > w[0].text_x));
        let svg = comparison_to_string(&loops, "wrap");
        assert_plausible_svg(&svg);
        let height = OBJECTIVE_PANEL_HEIGHT + legend.extra_rows * LEGEND_ROW_HEIGHT;
        assert!(svg.contains(&format!("height=\"{height}\"")), "the panel grows by the extra rows");
    }

    #[test]
    fn a_comparison_without_data_says_so() {
        let svg = comparison_to_string(
            &[contender("a", "sine", 1.0), contender("b", "sine", 1.0)].map(|mut lp| {
                lp.t_s.truncate(1);
                lp
            }),
            "compare-tiny",
        );
        assert_plausible_svg(&svg);
        assert!(svg.contains("no data") && svg.contains("damper_pct"));
        let svg = comparison_to_string(&[], "compare-none");
        assert_plausible_svg(&svg);
        assert!(svg.contains("no data"));
    }

    #[test]
    fn tick_labels_show_the_decimals_the_step_needs() {
        let f = tick_formatter((0.0, 1.0), 6);
        assert_eq!(f(&0.2), "0.2");
        let f = tick_formatter((0.0, 6.0), 12);
        assert_eq!(f(&2.0), "2");
        let f = tick_formatter((0.0, 3.0), 12);
        assert_eq!(f(&1.5), "1.5");
        // A range plotters splits into half steps keeps its halves.
        let f = tick_formatter((85.5, 87.0), 6);
        assert_eq!(f(&86.5), "86.5");
        let f = tick_formatter((-1.0, 1000.0), 6);
        assert_eq!(f(&200.0), "200");
        assert_eq!(f(&-1e-17), "0");
        let f = tick_formatter((2e6, 3e6), 6);
        assert_eq!(f(&2.2e6), "2.2e6");
    }
}
