//! SVG picture of a rehearsal: objective and best achievable objective, and per input the applied setpoint, estimate and optimum.
//!
//! Rendering goes through `plotters` with only its SVG backend: text is emitted as
//! `<text>` elements and sized by the browser, so no font library is needed. The
//! picture is rendered into memory first so that a failed write leaves no half file
//! from the backend and the error can name the path.

use std::path::Path;

use anyhow::anyhow;
use plotters::coord::Shift;
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

/// Writes one SVG with a column of panels: for each loop its objective panel, then one panel per input.
pub fn write_svg(path: &Path, loops: &[LoopTrace]) -> anyhow::Result<()> {
    let svg = render(loops).map_err(|e| anyhow!("could not write plot to {}: {e}", path.display()))?;
    std::fs::write(path, svg).map_err(|e| anyhow!("could not write plot to {}: {e}", path.display()))
}

struct Series {
    label: &'static str,
    colour: RGBColor,
    width: u32,
    /// Points in time order, time already in the axis unit; a NaN `y` breaks the line.
    points: Vec<(f64, f64)>,
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

fn render(loops: &[LoopTrace]) -> DrawResult<String> {
    let mut panels = Vec::new();
    for lp in loops {
        panels.extend(loop_panels(lp));
    }
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

    let height: u32 = panels.iter().map(panel_height).sum();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE)?;
        let mut rest = root.clone();
        for (i, panel) in panels.iter().enumerate() {
            let (area, below) = rest.split_vertically(panel_height(panel));
            if i > 0 && !panel.is_subpanel {
                // Marks where the next loop starts in a long column of panels.
                area.draw(&PathElement::new(
                    vec![(0, 1), (WIDTH as i32, 1)],
                    ShapeStyle::from(&GRID_BOLD).stroke_width(2),
                ))?;
            }
            draw_panel(&area, panel)?;
            rest = below;
        }
        root.present()?;
    }
    Ok(svg)
}

fn panel_height(panel: &Panel) -> u32 {
    if panel.is_subpanel { INPUT_PANEL_HEIGHT } else { OBJECTIVE_PANEL_HEIGHT }
}

fn loop_panels(lp: &LoopTrace) -> Vec<Panel> {
    // Vectors are specified to be equally long; trusting only the shortest keeps a
    // caller bug from turning into an out-of-bounds panic.
    let mut n = lp.t_s.len().min(lp.objective_values.len()).min(lp.best_objective.len());
    for input in &lp.inputs {
        n = n.min(input.applied.len()).min(input.estimate.len()).min(input.optimum.len());
    }
    let t = &lp.t_s[..n];
    let time = TimeAxis::new(t);
    let has_data = time.is_some();
    let (unit_s, x_desc, x_range) = match &time {
        Some(axis) => (axis.unit_s, axis.desc(), axis.range),
        None => (1.0, "time [s]".to_string(), (0.0, 1.0)),
    };
    let make = |label, colour, width, y: &[f64]| Series {
        label,
        colour,
        width,
        points: decimate(t, &y[..n], MAX_POINTS).into_iter().map(|(x, y)| (x / unit_s, y)).collect(),
    };

    let mut panels = vec![Panel {
        title: format!("{} ({})", lp.name, lp.direction),
        is_subpanel: false,
        y_desc: lp.objective.clone(),
        x_desc: x_desc.clone(),
        x_range,
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
            x_desc: x_desc.clone(),
            x_range,
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

struct TimeAxis {
    unit_s: f64,
    unit: &'static str,
    range: (f64, f64),
}

impl TimeAxis {
    /// `None` when fewer than two usable ticks exist: a single instant has no time axis.
    fn new(t: &[f64]) -> Option<Self> {
        let (lo, hi, count) = t
            .iter()
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

fn draw_panel(area: &DrawingArea<SVGBackend<'_>, Shift>, panel: &Panel) -> DrawResult<()> {
    let (title_size, title_colour) =
        if panel.is_subpanel { (14, &SUBTITLE_COLOUR) } else { (17, &TITLE_COLOUR) };
    area.draw(&Text::new(
        panel.title.clone(),
        (Y_LABEL_AREA as i32, 8),
        text_style(title_size, title_colour).pos(Pos::new(HPos::Left, VPos::Top)),
    ))?;

    let Some(series) = &panel.series else {
        return draw_no_data(area);
    };

    draw_legend(area, series)?;

    let y = y_range(series.iter());
    let x = panel.x_range;
    let mut chart = ChartBuilder::on(area)
        .margin_top(HEADER_HEIGHT)
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
            if run.len() == 1 {
                // An isolated tick between two gaps would be an invisible one-point line.
                chart.draw_series(run.into_iter().map(|p| Circle::new(p, 1, style.filled())))?;
            } else {
                chart.draw_series(std::iter::once(PathElement::new(run, style)))?;
            }
        }
    }
    Ok(())
}

/// The legend sits in the header, right-aligned, so it never hides data.
fn draw_legend(area: &DrawingArea<SVGBackend<'_>, Shift>, series: &[Series]) -> DrawResult<()> {
    let style = text_style(13, &BLACK);
    let y = 15;
    let mut right = area.dim_in_pixel().0 as i32 - RIGHT_MARGIN as i32;
    for s in series.iter().rev() {
        let (text_w, _) = area.estimate_text_size(s.label, &style)?;
        let text_x = right - text_w as i32;
        area.draw(&Text::new(s.label, (text_x, y), style.pos(Pos::new(HPos::Left, VPos::Center))))?;
        let line_end = text_x - 6;
        let line_start = line_end - 24;
        area.draw(&PathElement::new(
            vec![(line_start, y), (line_end, y)],
            ShapeStyle::from(&s.colour).stroke_width(s.width.max(2)),
        ))?;
        right = line_start - 18;
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
        let path = scratch(name);
        let result = write_svg(&path, loops);
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
