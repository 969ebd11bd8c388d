//! The pictures of a result, as self-contained SVG text (plotters' SVG backend, no fonts needed):
//! the curve of expected loss and its parts against the knob, the per-point view of truth against
//! mean predictions, and the histogram of the knob chosen by cross-validation.

use plotters::coord::Shift;
use plotters::prelude::*;

use super::terminal::View;
use super::{PointRow, ResultDoc};
use crate::error::Error;
use crate::fmt::{fmt_num, fmt_value};
use crate::runner::Outcome;
use crate::scenario::{Plan, Source};
use ndarray::{Array1, Array2};

/// Width and height of the curve picture in pixels.
pub const CURVE_SIZE: (u32, u32) = (960, 560);
/// Width and height of the per-point picture in pixels.
pub const POINTS_SIZE: (u32, u32) = (960, 560);
/// Width and height of the selection histogram in pixels.
pub const SELECTION_SIZE: (u32, u32) = (760, 420);

/// Width of the side panel that holds the legend.
const PANEL: u32 = 250;

// The palette of lossprism's pictures: four hues that stay apart for the common colour-vision
// deficiencies (dark ink, burnt orange, sky blue, mid grey) and, because their lightness differs,
// in grey-scale too. Every series also has its own dash pattern and marker.
const INK: RGBColor = RGBColor(0x1f, 0x1d, 0x3d);
const RUST: RGBColor = RGBColor(0xb0, 0x4e, 0x0f);
const SKY: RGBColor = RGBColor(0x4a, 0xa3, 0xdf);
const STONE: RGBColor = RGBColor(0x70, 0x70, 0x70);
const PAPER: RGBColor = RGBColor(0xff, 0xff, 0xff);
const SAGE: RGBColor = RGBColor(0xe4, 0xee, 0xd8);
// Two more hues for the terms of ensembles: plum (diversity) and ochre (average member loss),
// each with its own dash pattern and marker; and a deeper blue for `var (data)`, the lower part
// of the stacked split of the variance (whose upper part, `var (fit)`, is pale sky blue).
const PLUM: RGBColor = RGBColor(0x8e, 0x3f, 0x9e);
const OCHRE: RGBColor = RGBColor(0xb8, 0x8a, 0x00);
const DEEP: RGBColor = RGBColor(0x1f, 0x5f, 0x96);
const FONT: &str = "sans-serif";

/// Replaces the characters XML 1.0 does not allow (controls other than tab, line feed and
/// carriage return; U+FFFE, U+FFFF) and the bidirectional-override controls with U+FFFD: text
/// from an edited result document reaches the labels as it is, and one such character made the
/// whole SVG unreadable to an XML parser.
pub fn xml_chars(svg: String) -> String {
    if !svg.chars().any(unsafe_char) {
        return svg;
    }
    svg.chars()
        .map(|c| if unsafe_char(c) { '\u{fffd}' } else { c })
        .collect()
}

/// A character [`xml_chars`] replaces.
pub fn unsafe_char(c: char) -> bool {
    (c.is_control() && !matches!(c, '\t' | '\n' | '\r'))
        || matches!(c, '\u{fffe}' | '\u{ffff}')
        || crate::fmt::reorders(c)
}

fn draw_err<E: std::error::Error + Send + Sync>(e: DrawingAreaErrorKind<E>) -> Error {
    Error::Usage(format!("cannot draw the picture: {e}"))
}

/// An axis range for the chart builder: refused when its ends or its width are not finite
/// numbers (values near ±1e308 in an edited result make the width +inf, and the tick search of
/// the plotting library never ends).
fn axis(lo: f64, hi: f64, which: &str) -> Result<std::ops::Range<f64>, Error> {
    if !(lo.is_finite() && hi.is_finite() && (hi - lo).is_finite()) {
        return Err(Error::Usage(format!(
            "cannot draw the picture: the {which} axis would run from {} to {}, beyond the range \
             of floating-point numbers",
            crate::fmt::fmt_exact(lo),
            crate::fmt::fmt_exact(hi)
        )));
    }
    Ok(lo..hi)
}

/// A value axis from `lo` to `hi` ([`axis`]) whose labels sit at round values chosen here
/// ([`round_ticks`]): the plotting library's own choice failed on tiny ranges (expected losses
/// near 1e-19 got one label, `-3.433e-20`, and ranges near 1e-17 labels that were not round).
fn value_axis(lo: f64, hi: f64, which: &str) -> Result<RoundAxis, Error> {
    let r = axis(lo, hi, which)?;
    Ok(RoundAxis {
        inner: r.clone().into(),
        lo: r.start,
        hi: r.end,
    })
}

/// [`value_axis`]'s coordinate: the library's linear mapping, with round label positions.
#[derive(Clone)]
struct RoundAxis {
    inner: plotters::coord::types::RangedCoordf64,
    lo: f64,
    hi: f64,
}

impl plotters::coord::ranged1d::Ranged for RoundAxis {
    type FormatOption = plotters::coord::ranged1d::DefaultFormatting;
    type ValueType = f64;

    fn map(&self, value: &f64, limit: (i32, i32)) -> i32 {
        self.inner.map(value, limit)
    }

    fn key_points<Hint: plotters::coord::ranged1d::KeyPointHint>(&self, hint: Hint) -> Vec<f64> {
        if hint.weight().allow_light_points() {
            // No light grid lines between the labelled ones.
            return Vec::new();
        }
        let most = hint.max_num_points().max(2);
        let mut n = most;
        loop {
            let ticks = round_ticks(self.lo, self.hi, n);
            if ticks.len() <= most || n <= 2 {
                return ticks;
            }
            n -= 1;
        }
    }

    fn range(&self) -> std::ops::Range<f64> {
        self.lo..self.hi
    }
}

/// About `n` round values (1, 2 or 5 times a power of ten apart) within `[lo, hi]`; the two
/// ends when the range is empty or not finite.
fn round_ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    let span = hi - lo;
    if !(span > 0.0 && span.is_finite()) || n == 0 {
        return vec![lo, hi];
    }
    let raw = span / n as f64;
    let power = 10f64.powi(raw.log10().floor() as i32);
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * power)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * power);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last).map(|k| k as f64 * step).collect()
}

/// How a series is stroked: solid, or dashes of `on` pixels separated by `off` pixels.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Dash {
    Solid,
    Dashed(u32, u32),
}

/// How a series marks its data points.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Marker {
    Dot,
    Square,
    Triangle,
    Cross,
    Diamond,
    None,
}

/// The look of one series.
#[derive(Debug, Clone, Copy)]
struct Look {
    color: RGBColor,
    width: u32,
    dash: Dash,
    marker: Marker,
}

/// One series of the curve picture: a value and a standard error per grid value.
#[derive(Debug, Clone)]
struct Series {
    label: String,
    values: Vec<f64>,
    se: Vec<Option<f64>>,
    look: Look,
}

fn looks() -> [Look; 4] {
    [
        Look {
            color: INK,
            width: 3,
            dash: Dash::Solid,
            marker: Marker::Dot,
        },
        Look {
            color: RUST,
            width: 2,
            dash: Dash::Dashed(10, 5),
            marker: Marker::Square,
        },
        Look {
            color: SKY,
            width: 2,
            dash: Dash::Dashed(3, 4),
            marker: Marker::Triangle,
        },
        Look {
            color: STONE,
            width: 2,
            dash: Dash::Dashed(16, 6),
            marker: Marker::Cross,
        },
    ]
}

/// The series the curve shows for a document: expected loss, then the bias-type, variance-type
/// and noise terms of the view (found by their roles in the document's term description). For
/// 0-1 loss the Domingos view draws the net variance (the variance as it enters the loss).
fn curve_series(doc: &ResultDoc, view: View) -> Vec<Series> {
    let terms = doc.term_docs();
    let p = &doc.points;
    let [l0, l1, l2, l3] = looks();
    let series = |key: &str, label: String, look: Look| Series {
        label,
        values: p.iter().map(|r| r.get(key)).collect(),
        se: p.iter().map(|r| r.se(key)).collect(),
        look,
    };
    let group = match view {
        View::KohaviWolpert => "kohavi_wolpert",
        View::James => "james",
        View::Domingos | View::All => "main",
    };
    let find = |role: &str, grp: &str| {
        terms
            .iter()
            .find(|t| t.role == role && t.group == grp)
            .map(|t| (t.key.clone(), t.label.clone()))
    };
    let suffix = match view {
        View::KohaviWolpert => " (Kohavi-Wolpert)",
        View::James => " (James)",
        _ if terms.iter().any(|t| t.key == "net_variance") => " (Domingos)",
        _ => "",
    };
    let find = |role: &str, grp: &str| {
        find(role, grp).map(|(k, l)| (k, l.trim_start_matches("KW ").to_string()))
    };
    let mut out = vec![series("expected_loss", "expected loss".into(), l0)];
    if let Some((k, l)) = find("bias", group) {
        out.push(series(&k, format!("{l}{suffix}"), l1));
    }
    let variance = if group == "main" && terms.iter().any(|t| t.key == "net_variance") {
        Some(("net_variance".to_string(), "net variance".to_string()))
    } else {
        find("variance", group)
    };
    if let Some((k, l)) = variance {
        out.push(series(&k, format!("{l}{suffix}"), l2));
    }
    let noise = find("noise", group).or_else(|| find("noise", "main"));
    if let Some((k, l)) = noise {
        let label = if group == "main" {
            l
        } else {
            format!("{l}{suffix}")
        };
        let mut s = series(&k, label, l3);
        s.se = vec![Some(0.0); s.values.len()];
        out.push(s);
    }
    // Ensembles: the average member's loss and the members' diversity, after the four above
    // (whose positions the region labels use).
    if group == "main" {
        for (key, look) in [
            (
                "member_loss",
                Look {
                    color: OCHRE,
                    width: 2,
                    dash: Dash::Dashed(6, 3),
                    marker: Marker::Dot,
                },
            ),
            (
                "diversity",
                Look {
                    color: PLUM,
                    width: 2,
                    dash: Dash::Dashed(2, 3),
                    marker: Marker::Diamond,
                },
            ),
        ] {
            if let Some(t) = terms.iter().find(|t| t.key == key) {
                out.push(series(key, t.label.clone(), look));
            }
        }
    }
    out
}

/// The split of the variance over several fit seeds, drawn as a stacked band under the
/// variance line: `var (data)` from zero, `var (fit)` on top of it (they add up to the variance
/// exactly).
struct Split {
    data: Vec<f64>,
    total: Vec<f64>,
    data_label: String,
    fit_label: String,
}

/// The variance split of the main view; `None` without fit seeds or in another view.
fn variance_split(doc: &ResultDoc, view: View) -> Option<Split> {
    if !matches!(view, View::Domingos | View::All) {
        return None;
    }
    let terms = doc.term_docs();
    let label = |k: &str| terms.iter().find(|t| t.key == k).map(|t| t.label.clone());
    let (data_label, fit_label) = (label("variance_data")?, label("variance_fit")?);
    let p = &doc.points;
    Some(Split {
        data: p.iter().map(|r| r.get("variance_data")).collect(),
        total: p
            .iter()
            .map(|r| r.get("variance_data") + r.get("variance_fit"))
            .collect(),
        data_label,
        fit_label,
    })
}

/// Whether the x axis is logarithmic: a `log` grid of positive values.
fn log_axis(doc: &ResultDoc) -> bool {
    doc.scenario.grid_kind == "log" && doc.points.iter().all(|p| p.value > 0.0)
}

/// A padded range holding all finite `values` (and `also`).
fn padded(values: impl Iterator<Item = f64>, also: &[f64], pad: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.chain(also.iter().copied()).filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let span = if hi > lo { hi - lo } else { lo.abs().max(1.0) };
    (lo - pad * span, hi + pad * span)
}

fn style(look: &Look) -> ShapeStyle {
    look.color.stroke_width(look.width)
}

/// Draws a marker centred at pixel `(x, y)`.
fn marker_at<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    m: Marker,
    c: RGBColor,
    (x, y): (i32, i32),
) -> Result<(), Error> {
    let s = c.stroke_width(2);
    match m {
        Marker::Dot => area.draw(&Circle::new((x, y), 5, c.filled())),
        Marker::Square => area.draw(&Rectangle::new(
            [(x - 4, y - 4), (x + 4, y + 4)],
            c.filled(),
        )),
        Marker::Triangle => area.draw(&TriangleMarker::new((x, y), 6, c.filled())),
        Marker::Cross => area.draw(&Cross::new((x, y), 5, s)),
        Marker::Diamond => area.draw(&Polygon::new(
            vec![(x, y - 6), (x + 6, y), (x, y + 6), (x - 6, y)],
            c.filled(),
        )),
        Marker::None => Ok(()),
    }
    .map_err(draw_err)
}

/// Draws a short sample of a line look from `x0` to `x1` at height `y` (pixel coordinates).
fn sample_line<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    look: &Look,
    x0: i32,
    x1: i32,
    y: i32,
) -> Result<(), Error> {
    let st = style(look);
    match look.dash {
        Dash::Solid => area
            .draw(&PathElement::new(vec![(x0, y), (x1, y)], st))
            .map_err(draw_err)?,
        Dash::Dashed(on, off) => {
            let mut x = x0;
            while x < x1 {
                let e = (x + on as i32).min(x1);
                area.draw(&PathElement::new(vec![(x, y), (e, y)], st))
                    .map_err(draw_err)?;
                x = e + off as i32;
            }
        }
    }
    marker_at(area, look.marker, look.color, ((x0 + x1) / 2, y))
}

/// Writes `text` in the side panel at pixel `(x, y)`, wrapped at `width` characters; returns the
/// y below the last line.
fn panel_text<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    text: &str,
    (x, y): (i32, i32),
    size: u32,
    color: RGBColor,
    width: usize,
) -> Result<i32, Error> {
    let mut lines: Vec<String> = Vec::new();
    let mut cur = String::new();
    for w in text.split_whitespace() {
        if !cur.is_empty() && cur.chars().count() + 1 + w.chars().count() > width {
            lines.push(std::mem::take(&mut cur));
        }
        if !cur.is_empty() {
            cur.push(' ');
        }
        cur.push_str(w);
    }
    if !cur.is_empty() {
        lines.push(cur);
    }
    let mut y = y;
    let font = (FONT, size).into_font().color(&color);
    for l in lines {
        area.draw(&Text::new(l, (x, y), font.clone()))
            .map_err(draw_err)?;
        y += size as i32 + 4;
    }
    Ok(y)
}

/// Polygon of a band between `lo` and `hi` over `xs` (skipping non-finite entries).
fn band(xs: &[f64], lo: &[f64], hi: &[f64]) -> Vec<(f64, f64)> {
    let idx: Vec<usize> = (0..xs.len())
        .filter(|&i| xs[i].is_finite() && lo[i].is_finite() && hi[i].is_finite())
        .collect();
    let mut poly: Vec<(f64, f64)> = idx.iter().map(|&i| (xs[i], hi[i])).collect();
    poly.extend(idx.iter().rev().map(|&i| (xs[i], lo[i])));
    poly
}

/// The curve picture: expected loss, the bias-type and variance-type terms and noise against the
/// knob, each with a ±2 standard error band, the lowest expected loss marked and the values
/// within one standard error of it shaded. The x axis is logarithmic for a `log` grid; the y
/// axis always includes zero (net variance and unbiased bias² may be negative).
pub fn curve_svg(doc: &ResultDoc, view: View) -> Result<String, Error> {
    curve_svg_scaled(doc, view, YScale::Auto)
}

/// How the curve picture's y axis is scaled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum YScale {
    /// Clip (as [`YScale::Clip`]) only when the largest value would squash the rest: when it
    /// (with its band) exceeds six times the median expected loss over the grid.
    #[default]
    Auto,
    /// Every value on a linear axis.
    Linear,
    /// A linear axis up to three times the median expected loss over the grid (the median,
    /// unlike a higher quantile, stays put when a few grid values explode); values above it are
    /// drawn at the top edge, marked ▲ with their value.
    Clip,
}

/// The top of the y axis under `scale`, or `None` for no clipping.
fn clip_top(doc: &ResultDoc, scale: YScale, largest: f64) -> Option<f64> {
    let mut el: Vec<f64> = doc
        .points
        .iter()
        .map(|p| p.expected_loss())
        .filter(|v| v.is_finite())
        .collect();
    if el.is_empty() {
        return None;
    }
    el.sort_by(f64::total_cmp);
    let n = el.len();
    let median = if n % 2 == 1 {
        el[n / 2]
    } else {
        0.5 * (el[n / 2 - 1] + el[n / 2])
    };
    if median.is_nan() || median <= 0.0 {
        return None;
    }
    let top = 3.0 * median;
    match scale {
        YScale::Linear => None,
        YScale::Clip => (largest > top).then_some(top),
        YScale::Auto => (largest > 6.0 * median).then_some(top),
    }
}

/// The curve picture with a chosen y-axis scale (see [`curve_svg`]).
pub fn curve_svg_scaled(doc: &ResultDoc, view: View, scale: YScale) -> Result<String, Error> {
    if doc.points.is_empty() {
        return Err(Error::Usage("the result has no grid values to plot".into()));
    }
    if view == View::All {
        let zero_one = doc
            .term_docs()
            .iter()
            .any(|t| t.group == "kohavi_wolpert" || t.group == "james");
        return Err(Error::Usage(if zero_one {
            "a curve picture shows one decomposition: choose --decomposition domingos, \
             kohavi-wolpert or james (`all` is for tables)"
                .into()
        } else {
            format!(
                "`--decomposition all` is for the terminal table (`run --decomposition all` \
                 shows every term); a picture of a {} loss result shows its one decomposition: \
                 leave --decomposition out",
                doc.loss
            )
        }));
    }
    // A loss without the 0-1 decompositions (squared, log, Brier, Poisson) has only its own
    // terms: the Kohavi-Wolpert and James views show those, as the terminal table does (they
    // indexed a variance series that was not there and panicked).
    let group = match view {
        View::KohaviWolpert => Some("kohavi_wolpert"),
        View::James => Some("james"),
        View::Domingos | View::All => None,
    };
    let view = match group {
        Some(g) if !doc.term_docs().iter().any(|t| t.group == g) => View::Domingos,
        _ => view,
    };
    let mut series = curve_series(doc, view);
    let split = variance_split(doc, view);
    let log = log_axis(doc);
    let tx = |v: f64| if log { v.log10() } else { v };
    let xs: Vec<f64> = doc.points.iter().map(|p| tx(p.value)).collect();
    let (x0, x1) = padded(xs.iter().copied(), &[], 0.04);
    let mut ys: Vec<f64> = Vec::new();
    for s in &series {
        for (v, e) in s.values.iter().zip(&s.se) {
            let e = e.unwrap_or(0.0);
            ys.push(v - 2.0 * e);
            ys.push(v + 2.0 * e);
        }
    }
    let largest = ys
        .iter()
        .copied()
        .filter(|v| v.is_finite())
        .fold(f64::MIN, f64::max);
    let clip = clip_top(doc, scale, largest);
    // Clipped values: drawn at the top edge, remembered with their true value for a label.
    let mut clipped: Vec<(usize, f64)> = Vec::new();
    if let Some(t) = clip {
        // The floor follows the values, not their bands: a band as wide as the clipped peak
        // would squash the picture from below just as the peak did from above.
        let floor = series
            .iter()
            .flat_map(|s| s.values.iter().copied())
            .filter(|v| v.is_finite())
            .fold(0.0_f64, f64::min);
        let floor = floor - 0.1 * (t - floor);
        ys.retain(|v| *v <= t && *v >= floor);
        ys.push(t);
        ys.push(floor);
        for s in &mut series {
            for (i, v) in s.values.iter_mut().enumerate() {
                if *v > t {
                    match clipped.iter_mut().find(|c| c.0 == i) {
                        Some(c) => c.1 = c.1.max(*v),
                        None => clipped.push((i, *v)),
                    }
                    *v = t;
                }
            }
        }
    }
    let (y0, y1) = padded(ys.into_iter(), &[0.0], 0.06);
    let y1 = match clip {
        Some(t) => t + 0.02 * (t - y0),
        None => y1,
    };
    let unit = if doc.loss == "squared" {
        "loss (squared units of the response)"
    } else {
        "loss (per evaluation point)"
    };
    let knob = doc.knob.clone();
    let best_x = tx(doc.best.value);
    let within: Vec<f64> = doc.best.within_one_se.iter().map(|v| tx(*v)).collect();

    let mut buf = String::new();
    {
        // Taller when the legend has more than the four usual series.
        let extra = series.len().saturating_sub(4) + if split.is_some() { 2 } else { 0 };
        let size = (CURVE_SIZE.0, CURVE_SIZE.1 + 34 * extra as u32);
        let root = SVGBackend::with_string(&mut buf, size).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let title = format!(
            "Where {knob} balances bias against variance ({}, {} family)",
            doc.scenario.name, doc.family
        );
        let (top, body) = root.split_vertically(44);
        top.draw(&Text::new(
            title,
            (18, 14),
            (FONT, 21).into_font().style(FontStyle::Bold).color(&INK),
        ))
        .map_err(draw_err)?;
        let (plot, panel) = body.split_horizontally(size.0 - PANEL);
        let mut chart = ChartBuilder::on(&plot)
            .margin_left(10)
            .margin_right(16)
            .margin_top(26)
            .margin_bottom(8)
            .x_label_area_size(52)
            .y_label_area_size(74)
            .build_cartesian_2d(axis(x0, x1, "x")?, value_axis(y0, y1, "y")?)
            .map_err(draw_err)?;
        let xfmt = |v: &f64| {
            if log {
                fmt_value(10f64.powf(*v))
            } else {
                fmt_value(*v)
            }
        };
        let x_desc = if log {
            format!("{knob} (logarithmic axis)")
        } else {
            knob.clone()
        };
        let n_labels = if log {
            ((x1 - x0).ceil() as usize + 1).clamp(2, 12)
        } else {
            doc.points.len().clamp(2, 12)
        };
        chart
            .configure_mesh()
            .light_line_style(RGBColor(0xf3, 0xf3, 0xf3))
            .bold_line_style(RGBColor(0xd8, 0xd8, 0xd8))
            .x_labels(n_labels)
            .y_labels(8)
            .x_label_formatter(&xfmt)
            .y_label_formatter(&|v: &f64| fmt_value(*v))
            .x_desc(x_desc)
            .y_desc(unit)
            .axis_desc_style((FONT, 16))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;

        // The values within one standard error of the best: a pale column behind everything.
        if let (Some(a), Some(b)) = (
            within.iter().copied().reduce(f64::min),
            within.iter().copied().reduce(f64::max),
        ) {
            let step = if xs.len() > 1 {
                (xs[xs.len() - 1] - xs[0]) / (xs.len() - 1) as f64 * 0.3
            } else {
                0.3
            };
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(a - step, y0), (b + step, y1)],
                    SAGE.filled(),
                )))
                .map_err(draw_err)?;
        }
        if y0 < 0.0 {
            chart
                .draw_series(LineSeries::new(
                    vec![(x0, 0.0), (x1, 0.0)],
                    BLACK.stroke_width(1),
                ))
                .map_err(draw_err)?;
        }
        // The variance split: var (data) stacked under var (fit), below every band and line.
        if let Some(sp) = &split {
            let zero = vec![0.0; xs.len()];
            for (lo, hi, color) in [
                (&zero, &sp.data, DEEP.mix(0.40)),
                (&sp.data, &sp.total, SKY.mix(0.16)),
            ] {
                let lo: Vec<f64> = lo.iter().map(|v| v.min(y1)).collect();
                let hi: Vec<f64> = hi.iter().map(|v| v.min(y1)).collect();
                let poly = band(&xs, &lo, &hi);
                if poly.len() >= 3 {
                    chart
                        .draw_series(std::iter::once(Polygon::new(poly, color.filled())))
                        .map_err(draw_err)?;
                }
            }
            let edge: Vec<(f64, f64)> = xs
                .iter()
                .zip(&sp.data)
                .filter(|(x, y)| x.is_finite() && y.is_finite())
                .map(|(x, y)| (*x, y.min(y1)))
                .collect();
            chart
                .draw_series(LineSeries::new(edge, DEEP.stroke_width(1)))
                .map_err(draw_err)?;
        }
        // Bands first, so that every line stays visible on top of them.
        for s in &series {
            let lo: Vec<f64> = s
                .values
                .iter()
                .zip(&s.se)
                .map(|(v, e)| v - 2.0 * e.unwrap_or(0.0))
                .collect();
            let hi: Vec<f64> = s
                .values
                .iter()
                .zip(&s.se)
                .map(|(v, e)| (v + 2.0 * e.unwrap_or(0.0)).min(y1))
                .collect();
            let lo: Vec<f64> = lo.iter().map(|v| v.clamp(y0, y1)).collect();
            let poly = band(&xs, &lo, &hi);
            if poly.len() >= 3 {
                chart
                    .draw_series(std::iter::once(Polygon::new(
                        poly,
                        s.look.color.mix(0.22).filled(),
                    )))
                    .map_err(draw_err)?;
            }
        }
        for s in &series {
            let pts: Vec<(f64, f64)> = xs
                .iter()
                .zip(&s.values)
                .filter(|(x, y)| x.is_finite() && y.is_finite())
                .map(|(x, y)| (*x, y.min(y1)))
                .collect();
            match s.look.dash {
                Dash::Solid => chart
                    .draw_series(LineSeries::new(pts.clone(), style(&s.look)))
                    .map_err(draw_err)?,
                Dash::Dashed(on, off) => chart
                    .draw_series(DashedLineSeries::new(
                        pts.clone(),
                        on as i32,
                        off as i32,
                        style(&s.look),
                    ))
                    .map_err(draw_err)?,
            };
            for &(x, y) in &pts {
                let px = chart.backend_coord(&(x, y));
                marker_at(&root, s.look.marker, s.look.color, px)?;
            }
        }
        // Clipped values: a ▲ at the top edge of each, and the largest true value written
        // beside its mark (one label, so neighbouring clipped values do not overprint).
        for &(i, _) in &clipped {
            let (px, py) = chart.backend_coord(&(xs[i], y1));
            root.draw(&TriangleMarker::new((px, py + 7), 5, RUST.filled()))
                .map_err(draw_err)?;
        }
        if let Some(&(i, v)) = clipped.iter().max_by(|a, b| a.1.total_cmp(&b.1)) {
            let (px, py) = chart.backend_coord(&(xs[i], y1));
            let label = format!(
                "▲ {} at {knob} = {}",
                fmt_num(v),
                fmt_value(doc.points[i].value)
            );
            let right = chart.backend_coord(&(x1, y1)).0;
            let width = 7 * label.chars().count() as i32;
            let left = if px + 12 + width <= right {
                px + 12
            } else {
                px - 12 - width
            };
            // on a white card below the top edge, so the clamped lines do not hide it
            let y = py + 26;
            root.draw(&Rectangle::new(
                [(left - 3, y - 2), (left + width + 3, y + 15)],
                PAPER.mix(0.9).filled(),
            ))
            .map_err(draw_err)?;
            root.draw(&Text::new(
                label,
                (left, y),
                (FONT, 12).into_font().color(&RUST),
            ))
            .map_err(draw_err)?;
        }
        // The best value: a ring around its expected loss and a label above the plot area.
        let best_y = doc.best.expected_loss;
        chart
            .draw_series(std::iter::once(Circle::new(
                (best_x, best_y),
                11,
                INK.stroke_width(2),
            )))
            .map_err(draw_err)?;
        chart
            .draw_series(DashedLineSeries::new(
                vec![(best_x, y0), (best_x, y1)],
                2,
                5,
                INK.stroke_width(1),
            ))
            .map_err(draw_err)?;

        // Above the plot area: which parts of the grid are bias-dominated, which
        // variance-dominated, one label per run of neighbouring grid values (a label that would
        // overlap the previous one is left out).
        // A table under a loss whose noise is not estimated draws bias+noise: only where the
        // variance is above it is a side known (the variance is then above the bias alone).
        let folded = doc.noise_folded();
        let bias_dom = |i: usize| series[1].values[i] > series[2].values[i];
        let bias_dom = |i: usize| {
            if folded {
                series[1].values[i] >= series[2].values[i]
            } else {
                bias_dom(i)
            }
        };
        let mut runs: Vec<(usize, usize)> = Vec::new();
        for i in 0..xs.len() {
            match runs.last_mut() {
                Some((_, e)) if bias_dom(*e) == bias_dom(i) => *e = i,
                _ => runs.push((i, i)),
            }
        }
        let font = (FONT, 14).into_font().color(&STONE);
        let lo = chart.backend_coord(&(x0, y1)).0;
        let hi = chart.backend_coord(&(x1, y1)).0;
        let mut right_edge = i32::MIN;
        for (a, b) in runs {
            // A folded term that can be below the bias (Domingos', where the majority is wrong):
            // variance above it says nothing of which side dominates.
            let text = if bias_dom(a) && folded {
                "bias+noise above variance"
            } else if folded
                && crate::decompose::by_name(&doc.loss).is_some_and(|l| !l.folded_covers_bias())
            {
                "variance above bias+noise"
            } else if bias_dom(a) {
                "bias-dominated"
            } else {
                "variance-dominated"
            };
            let (px, top_y) = chart.backend_coord(&((xs[a] + xs[b]) / 2.0, y1));
            let width = text.chars().count() as i32 * 7;
            let x = (px - width / 2).clamp(lo, (hi - width).max(lo));
            if x > right_edge + 8 {
                root.draw(&Text::new(text, (x, top_y - 20), font.clone()))
                    .map_err(draw_err)?;
                right_edge = x + width;
            }
        }

        // Side panel: legend, then how to read it.
        let mut y = 16;
        y = panel_text(
            &panel,
            "Series (band: ±2 standard errors)",
            (8, y),
            14,
            INK,
            34,
        )?;
        y += 8;
        for s in &series {
            sample_line(&panel, &s.look, 10, 58, y + 7)?;
            let ny = panel_text(&panel, &s.label, (68, y), 14, INK, 27)?;
            y = ny.max(y + 22) + 6;
        }
        if let Some(sp) = &split {
            for (color, text) in [
                (
                    SKY.mix(0.16),
                    format!("{}: upper part of the variance", sp.fit_label),
                ),
                (
                    DEEP.mix(0.40),
                    format!("{}: lower part of the variance", sp.data_label),
                ),
            ] {
                panel
                    .draw(&Rectangle::new([(12, y), (56, y + 16)], color.filled()))
                    .map_err(draw_err)?;
                let ny = panel_text(&panel, &text, (68, y), 14, INK, 27)?;
                y = ny.max(y + 22) + 6;
            }
        }
        y += 6;
        panel
            .draw(&Circle::new((34, y + 7), 9, INK.stroke_width(2)))
            .map_err(draw_err)?;
        let best_text = format!(
            "lowest expected loss: {knob} = {}",
            fmt_value(doc.best.value)
        );
        y = panel_text(&panel, &best_text, (68, y), 14, INK, 27)? + 8;
        panel
            .draw(&Rectangle::new([(12, y), (56, y + 16)], SAGE.filled()))
            .map_err(draw_err)?;
        y = panel_text(
            &panel,
            "within one standard error of the lowest",
            (68, y),
            14,
            INK,
            24,
        )? + 14;
        let mut note = curve_note(doc, view);
        if let Some(t) = clip {
            note.push_str(&format!(
                " The y axis stops at {} (three times the median expected loss): larger values sit on the top edge, marked ▲, the largest with its value; --y-scale linear shows them all.",
                fmt_num(t)
            ));
        }
        panel_text(&panel, &note, (8, y), 12, STONE, 38)?;
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

/// The footnote of the curve picture, derived from the knob's direction and the view.
fn curve_note(doc: &ResultDoc, view: View) -> String {
    let (simple, complex) = if doc.larger_is_simpler {
        ("Right", "left")
    } else {
        ("Left", "right")
    };
    match view {
        View::Domingos | View::All
            if doc.table.is_some() && doc.term_docs().iter().any(|t| t.key == "net_variance") =>
        {
            format!(
                "Domingos on a table: expected loss = (bias+noise) + net variance, the noise folded \
                 into the bias. A net variance below zero means variance helps where the majority \
                 prediction is wrong. {simple} of the best value the model is simpler, {complex} of \
                 it more complex."
            )
        }
        View::Domingos | View::All if doc.term_docs().iter().any(|t| t.key == "net_variance") => format!(
            "Domingos: expected loss = c1·noise + bias + net variance. A net variance below zero \
             means variance helps where the majority prediction is wrong. {simple} of the best \
             value the model is simpler, {complex} of it more complex."
        ),
        View::KohaviWolpert => format!(
            "Kohavi-Wolpert: expected loss = noise + bias² + variance of the predicted class \
             distribution. {simple} of the best value the model is simpler, {complex} of it more complex."
        ),
        View::James => format!(
            "James: expected loss = noise + systematic effect + variance effect. {simple} of the \
             best value the model is simpler, {complex} of it more complex."
        ),
        _ => {
            // the loss's own name of its bias term (bias (KL), bias, ...); bias² for squared
            let bias = match doc.loss.as_str() {
                "squared" => None,
                _ => doc
                    .term_docs()
                    .into_iter()
                    .find(|t| t.role == "bias" && t.group == "main")
                    .map(|t| t.label),
            }
            .unwrap_or_else(|| "bias²".to_string());
            let has = |k: &str| doc.term_docs().iter().any(|t| t.key == k);
            // A table scored by a classification or count loss folds the noise into its bias
            // (`bias+noise`): there is no noise term to add (it read "noise + bias+noise").
            let noise = if has("noise") { "noise + " } else { "" };
            let mut note = if has("diversity") {
                // Averaging exchangeable members: more members leave the bias alone and shrink
                // only the variance, so "overfitting" is not what the right side shows.
                format!(
                    "Expected loss = {noise}{bias} + variance = avg member loss − diversity \
                     (Krogh and Vedelsby 1995; Wood et al. 2023): averaging the members takes \
                     their diversity off the loss of a single member. {simple} of the best value \
                     the model is simpler, {complex} of it more complex."
                )
            } else {
                format!(
                    "Expected loss = {noise}{bias} + variance. {simple} of the best value the \
                     model is simpler and {bias} tends to dominate (underfitting); {complex} of \
                     it variance grows (overfitting)."
                )
            };
            if has("variance_fit") {
                note.push_str(
                    " The shaded areas under the variance add up to it: the part due to the \
                     training data below, the learner's own randomness (across fit seeds) above.",
                );
            }
            note
        }
    }
}

/// One mean-prediction curve of the per-point view.
#[derive(Debug, Clone, PartialEq)]
pub struct PointCurve {
    /// The knob value.
    pub value: f64,
    /// Why it was picked: `smallest`, `best` or `largest`.
    pub role: String,
    /// Mean prediction (over replicates) at each x of the view.
    pub mean: Vec<f64>,
    /// Prediction standard deviation (over replicates) at each x of the view.
    pub sd: Vec<f64>,
}

/// The data of the per-point view, ready to draw.
#[derive(Debug, Clone, PartialEq)]
pub struct PointView {
    /// Scenario name.
    pub scenario: String,
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// The input on the x axis.
    pub input: String,
    /// The other inputs, averaged over within bins of `input` (empty for one input).
    pub averaged_over: Vec<String>,
    /// x positions (evaluation points, or bin centres when other inputs are averaged over).
    pub x: Vec<f64>,
    /// The truth f at `x` (averaged within a bin).
    pub truth: Vec<f64>,
    /// Two or three knob values: the smallest, the best and the largest.
    pub curves: Vec<PointCurve>,
    /// Replicate 0's training inputs (the chosen input).
    pub train_x: Vec<f64>,
    /// Replicate 0's training responses.
    pub train_y: Vec<f64>,
    /// The input takes at most [`DISCRETE_LEVELS`] distinct values (a 0/1 or one-hot column, a
    /// count with few levels): `x` holds the levels, and the picture draws a marker with a ±1 sd
    /// bar per level and curve (side by side) instead of lines and bands.
    pub discrete: bool,
}

/// An input with at most this many distinct values among the evaluation points is drawn as
/// points at its levels, not as a continuous line.
pub const DISCRETE_LEVELS: usize = 10;

/// The column of the input on the x axis of the per-point view; several inputs need a name.
fn input_column(names: &[String], input: Option<&str>) -> Result<usize, Error> {
    match input {
        Some(name) => names.iter().position(|n| n == name).ok_or_else(|| {
            Error::Usage(format!(
                "--input {name}: no such input; the scenario's inputs are {}",
                names.join(", ")
            ))
        }),
        None if names.len() == 1 => Ok(0),
        None => Err(Error::Usage(format!(
            "--plot-points shows one input but the scenario has {}: choose one with --input NAME \
             ({}); the others are averaged over",
            names.len(),
            names.join(", ")
        ))),
    }
}

/// Checks before a run that the per-point view can be drawn for `plan` with `input`, so a
/// long run does not end in a refusal.
pub fn check_point_request(plan: &Plan, input: Option<&str>) -> Result<(), Error> {
    if !matches!(plan.source, Source::Synthetic(_))
        || plan.task != crate::family::Task::Regress
        || plan.loss.name() != "squared"
    {
        return Err(Error::Usage(
            "--plot-points needs a synthetic or twin scenario with squared loss (a known truth \
             and mean predictions; a table's truth is unknown)"
                .into(),
        ));
    }
    let names: Vec<String> = super::scenario_echo(plan)
        .inputs
        .iter()
        .map(|i| i.name.clone())
        .collect();
    input_column(&names, input).map(|_| ())
}

/// Builds the per-point view of a finished regression run: the truth and the mean prediction
/// (±1 prediction sd) at the smallest, the best and the largest knob value, against one input.
/// With several inputs, `input` names the one on the x axis and the others are averaged over
/// within equal-width bins of it; without `input` a run with several inputs is refused.
/// `train` is replicate 0's training set (inputs and responses), which the caller draws
/// ([`crate::runner::training_set`]).
pub fn point_view(
    plan: &Plan,
    outcome: &Outcome,
    doc: &ResultDoc,
    input: Option<&str>,
    train: (&Array2<f64>, &Array1<f64>),
) -> Result<PointView, Error> {
    if !matches!(plan.source, Source::Synthetic(_)) {
        return Err(Error::Usage(
            "the per-point view needs a synthetic scenario (a known truth f)".into(),
        ));
    }
    if plan.task != crate::family::Task::Regress {
        return Err(Error::Usage(
            "the per-point view needs a regression (mean predictions); this run classifies".into(),
        ));
    }
    if plan.loss.name() != "squared" {
        return Err(Error::Usage(format!(
            "the per-point view shows mean predictions of the squared loss; this run uses the {} loss",
            plan.loss.name()
        )));
    }
    let sum = outcome.summary();
    let names: Vec<String> = doc.scenario.inputs.iter().map(|i| i.name.clone()).collect();
    let col = input_column(&names, input)?;
    let prep = &outcome.prepared;
    let acc = &sum.total;
    let m = acc.shape.points;
    let ex: Vec<f64> = prep.eval_x.column(col).to_vec();
    let grid = &plan.model().grid;
    // The best of the model shown (the first, at the largest size): a study's overall best may
    // be another model's value, and was looked up in this grid (a tree's "best" at depth 5 was
    // the k-NN's k = 5).
    let best_g = super::best_index(sum);
    let mut picks: Vec<(usize, &str)> = vec![(0, "smallest")];
    if best_g != 0 {
        picks.push((best_g, "best"));
    } else {
        picks[0].1 = "smallest, best";
    }
    if grid.len() > 1 && best_g != grid.len() - 1 {
        picks.push((grid.len() - 1, "largest"));
    } else if grid.len() > 1 {
        if let Some(last) = picks.last_mut() {
            last.1 = "best, largest";
        }
    }
    let cell = |g: usize, e: usize| crate::decompose::squared::point(acc, g, e, prep.eval_truth[e]);
    // Group evaluation points: one group per point (sorted by x) for one input, equal-width bins
    // of the chosen input otherwise (equal-count bins when one equal-width bin would hold more
    // than a third of the points).
    let mut order: Vec<usize> = (0..m).filter(|&e| ex[e].is_finite()).collect();
    order.sort_by(|&a, &b| ex[a].total_cmp(&ex[b]));
    let mut levels: Vec<f64> = order.iter().map(|&e| ex[e]).collect();
    levels.dedup();
    let discrete = levels.len() <= DISCRETE_LEVELS;
    let groups: Vec<Vec<usize>> = if discrete {
        // One group per level (the other inputs, if any, averaged over within it).
        levels
            .iter()
            .map(|&l| order.iter().copied().filter(|&e| ex[e] == l).collect())
            .collect()
    } else if names.len() == 1 {
        order.iter().map(|&e| vec![e]).collect()
    } else {
        let bins = (m / 25).clamp(5, 30);
        let (lo, hi) = (
            order.first().map(|&e| ex[e]).unwrap_or(0.0),
            order.last().map(|&e| ex[e]).unwrap_or(1.0),
        );
        let w = if hi > lo {
            (hi - lo) / bins as f64
        } else {
            1.0
        };
        let mut g: Vec<Vec<usize>> = vec![Vec::new(); bins];
        for &e in &order {
            let b = (((ex[e] - lo) / w) as usize).min(bins - 1);
            g[b].push(e);
        }
        // A skewed input (lognormal, exponential) piles most points into the first equal-width
        // bin (93% of them for a lognormal with sdlog 2): then bins of equal counts, in order.
        if g.iter().any(|v| 3 * v.len() > order.len()) {
            let per = order.len().div_ceil(bins).max(1);
            order.chunks(per).map(<[usize]>::to_vec).collect()
        } else {
            g.into_iter().filter(|v| !v.is_empty()).collect()
        }
    };
    let avg = |v: &dyn Fn(usize) -> f64, grp: &[usize]| {
        grp.iter().map(|&e| v(e)).sum::<f64>() / grp.len() as f64
    };
    let x: Vec<f64> = groups.iter().map(|g| avg(&|e| ex[e], g)).collect();
    let truth: Vec<f64> = groups
        .iter()
        .map(|g| avg(&|e| prep.eval_truth[e], g))
        .collect();
    let curves = picks
        .iter()
        .map(|&(g, role)| PointCurve {
            value: grid[g],
            role: role.to_string(),
            mean: groups
                .iter()
                .map(|grp| avg(&|e| cell(g, e).mean_prediction, grp))
                .collect(),
            sd: groups
                .iter()
                .map(|grp| avg(&|e| cell(g, e).variance, grp).sqrt())
                .collect(),
        })
        .collect();
    let (tx, ty) = train;
    // A study says which model and size the picture shows.
    let shown = if plan.models.len() > 1 || plan.sizes.len() > 1 {
        format!(
            "{}, model {} at {} training rows",
            plan.name,
            plan.model().label,
            plan.sizes.last().copied().unwrap_or_default()
        )
    } else {
        plan.name.clone()
    };
    Ok(PointView {
        scenario: shown,
        family: plan.model().family.name().to_string(),
        knob: plan.model().family.knob().to_string(),
        input: names[col].clone(),
        averaged_over: names
            .iter()
            .enumerate()
            .filter(|(i, _)| *i != col)
            .map(|(_, n)| n.clone())
            .collect(),
        x,
        truth,
        curves,
        train_x: tx.column(col).to_vec(),
        train_y: ty.to_vec(),
        discrete,
    })
}

/// The per-point picture: replicate 0's training points, the truth, and the mean prediction with
/// a ±1 prediction sd band at each chosen knob value.
pub fn points_svg(v: &PointView) -> Result<String, Error> {
    if v.x.is_empty() || v.curves.is_empty() {
        return Err(Error::Usage(
            "the per-point view has nothing to draw".into(),
        ));
    }
    // A discrete input: the levels' smallest gap sets the room around each level, where the
    // curves' markers stand side by side.
    let gap =
        v.x.windows(2)
            .map(|w| w[1] - w[0])
            .filter(|d| *d > 0.0)
            .fold(f64::INFINITY, f64::min);
    let gap = if gap.is_finite() { gap } else { 1.0 };
    let (x0, x1) = if v.discrete {
        let lo = v.x.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = v.x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        (lo - 0.5 * gap, hi + 0.5 * gap)
    } else {
        padded(v.x.iter().chain(&v.train_x).copied(), &[], 0.02)
    };
    let n_curves = v.curves.len() as f64;
    // Horizontal offset of curve `i` at a level (discrete input).
    let shift = |i: usize| (i as f64 - (n_curves - 1.0) / 2.0) * 0.12 * gap;
    let ys = v
        .truth
        .iter()
        .copied()
        .chain(v.train_y.iter().copied())
        .chain(v.curves.iter().flat_map(|c| {
            c.mean
                .iter()
                .zip(&c.sd)
                .flat_map(|(m, s)| [m - s, m + s])
                .collect::<Vec<f64>>()
        }));
    let (y0, y1) = padded(ys, &[], 0.05);
    let curve_looks = [
        Look {
            color: RUST,
            width: 2,
            dash: Dash::Dashed(10, 5),
            marker: Marker::Square,
        },
        Look {
            color: INK,
            width: 3,
            dash: Dash::Solid,
            marker: Marker::Diamond,
        },
        Look {
            color: SKY,
            width: 2,
            dash: Dash::Dashed(3, 4),
            marker: Marker::Triangle,
        },
    ];
    let truth_look = Look {
        color: RGBColor(0x9a, 0xb8, 0x7a),
        width: 6,
        dash: Dash::Solid,
        marker: Marker::None,
    };
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, POINTS_SIZE).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let (top, body) = root.split_vertically(44);
        top.draw(&Text::new(
            format!(
                "Mean prediction against the truth along {} ({}, {} family)",
                v.input, v.scenario, v.family
            ),
            (18, 14),
            (FONT, 21).into_font().style(FontStyle::Bold).color(&INK),
        ))
        .map_err(draw_err)?;
        let (plot, panel) = body.split_horizontally(POINTS_SIZE.0 - PANEL);
        let mut chart = ChartBuilder::on(&plot)
            .margin_left(10)
            .margin_right(16)
            .margin_bottom(8)
            .x_label_area_size(52)
            .y_label_area_size(74)
            .build_cartesian_2d(axis(x0, x1, "x")?, value_axis(y0, y1, "y")?)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .light_line_style(RGBColor(0xf3, 0xf3, 0xf3))
            .bold_line_style(RGBColor(0xd8, 0xd8, 0xd8))
            .x_labels(if v.discrete { 0 } else { 10 })
            .x_label_formatter(&|x: &f64| fmt_value(*x))
            .y_label_formatter(&|y: &f64| fmt_value(*y))
            .x_desc(v.input.clone())
            .y_desc("response")
            .axis_desc_style((FONT, 16))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;
        if v.discrete {
            // The levels are the only x labels, each with a faint guide line.
            let label =
                (FONT, 13)
                    .into_font()
                    .color(&INK)
                    .pos(plotters::style::text_anchor::Pos::new(
                        plotters::style::text_anchor::HPos::Center,
                        plotters::style::text_anchor::VPos::Top,
                    ));
            for &l in &v.x {
                chart
                    .draw_series(std::iter::once(PathElement::new(
                        vec![(l, y0), (l, y1)],
                        RGBColor(0xd8, 0xd8, 0xd8).stroke_width(1),
                    )))
                    .map_err(draw_err)?;
                let (px, py) = chart.backend_coord(&(l, y0));
                root.draw(&Text::new(fmt_value(l), (px, py + 8), label.clone()))
                    .map_err(draw_err)?;
            }
        }
        // Training points; at a discrete input spread sideways (a fixed pattern, not random)
        // so that equal inputs do not pile up into one dot.
        chart
            .draw_series(
                v.train_x
                    .iter()
                    .zip(&v.train_y)
                    .enumerate()
                    .filter(|(_, (x, y))| x.is_finite() && y.is_finite())
                    .map(|(i, (x, y))| {
                        let jitter = if v.discrete {
                            ((i * 7919) % 61) as f64 / 60.0 - 0.5
                        } else {
                            0.0
                        };
                        Circle::new((*x + 0.44 * gap * jitter, *y), 2, STONE.mix(0.45).filled())
                    }),
            )
            .map_err(draw_err)?;
        if v.discrete {
            // Truth: a wide bar at each level; each curve: its marker and a ±1 sd bar, side by
            // side so that equal means stay visible.
            for (&x, &t) in v.x.iter().zip(&v.truth) {
                chart
                    .draw_series(std::iter::once(PathElement::new(
                        vec![(x - 0.3 * gap, t), (x + 0.3 * gap, t)],
                        style(&truth_look),
                    )))
                    .map_err(draw_err)?;
            }
            for (i, (c, look)) in v.curves.iter().zip(curve_looks.iter().cycle()).enumerate() {
                for ((&x, &m), &sd) in v.x.iter().zip(&c.mean).zip(&c.sd) {
                    if !(x.is_finite() && m.is_finite()) {
                        continue;
                    }
                    let xs = x + shift(i);
                    if sd.is_finite() && sd > 0.0 {
                        let (px, top) = chart.backend_coord(&(xs, m + sd));
                        let (_, bottom) = chart.backend_coord(&(xs, m - sd));
                        let st = look.color.stroke_width(2);
                        for seg in [
                            vec![(px, top), (px, bottom)],
                            vec![(px - 5, top), (px + 5, top)],
                            vec![(px - 5, bottom), (px + 5, bottom)],
                        ] {
                            root.draw(&PathElement::new(seg, st)).map_err(draw_err)?;
                        }
                    }
                    let (px, py) = chart.backend_coord(&(xs, m));
                    marker_at(&root, look.marker, look.color, (px, py))?;
                }
            }
        } else {
            for (c, look) in v.curves.iter().zip(curve_looks.iter().cycle()) {
                let lo: Vec<f64> = c.mean.iter().zip(&c.sd).map(|(m, s)| m - s).collect();
                let hi: Vec<f64> = c.mean.iter().zip(&c.sd).map(|(m, s)| m + s).collect();
                let poly = band(&v.x, &lo, &hi);
                if poly.len() >= 3 {
                    chart
                        .draw_series(std::iter::once(Polygon::new(
                            poly,
                            look.color.mix(0.16).filled(),
                        )))
                        .map_err(draw_err)?;
                }
            }
            let tpts: Vec<(f64, f64)> = v.x.iter().copied().zip(v.truth.iter().copied()).collect();
            chart
                .draw_series(LineSeries::new(tpts, style(&truth_look)))
                .map_err(draw_err)?;
            // The widest line first, so that thinner dashed lines on top stay visible where
            // curves coincide; markers staggered along x so that they do not cover each other.
            let mut drawing: Vec<(usize, &PointCurve, &Look)> = v
                .curves
                .iter()
                .zip(curve_looks.iter().cycle())
                .enumerate()
                .map(|(i, (c, l))| (i, c, l))
                .collect();
            drawing.sort_by_key(|(i, _, l)| (std::cmp::Reverse(l.width), *i));
            for &(i, c, look) in &drawing {
                let pts: Vec<(f64, f64)> =
                    v.x.iter()
                        .zip(&c.mean)
                        .filter(|(x, y)| x.is_finite() && y.is_finite())
                        .map(|(x, y)| (*x, *y))
                        .collect();
                match look.dash {
                    Dash::Solid => chart
                        .draw_series(LineSeries::new(pts.clone(), style(look)))
                        .map_err(draw_err)?,
                    Dash::Dashed(on, off) => chart
                        .draw_series(DashedLineSeries::new(
                            pts.clone(),
                            on as i32,
                            off as i32,
                            style(look),
                        ))
                        .map_err(draw_err)?,
                };
                // A few markers along the curve so the styles stay apart in print.
                let step = (pts.len() / 8).max(1);
                let offset = step * (i + 1) / (v.curves.len() + 1);
                for &(x, y) in pts.iter().skip(offset).step_by(step) {
                    let (px, py) = chart.backend_coord(&(x, y));
                    marker_at(&root, look.marker, look.color, (px, py))?;
                }
            }
        }
        let mut y = 16;
        y = panel_text(&panel, "What is drawn", (8, y), 14, INK, 34)? + 8;
        sample_line(&panel, &truth_look, 10, 58, y + 7)?;
        y = panel_text(&panel, "truth f", (68, y), 14, INK, 27)?.max(y + 22) + 6;
        for (c, look) in v.curves.iter().zip(curve_looks.iter().cycle()) {
            if v.discrete {
                let st = look.color.stroke_width(2);
                panel
                    .draw(&PathElement::new(vec![(34, y - 3), (34, y + 17)], st))
                    .map_err(draw_err)?;
                marker_at(&panel, look.marker, look.color, (34, y + 7))?;
            } else {
                sample_line(&panel, look, 10, 58, y + 7)?;
            }
            let label = format!(
                "mean prediction, {} = {} ({})",
                v.knob,
                fmt_value(c.value),
                c.role
            );
            y = panel_text(&panel, &label, (68, y), 14, INK, 27)?.max(y + 22) + 6;
        }
        panel
            .draw(&Circle::new((34, y + 7), 3, STONE.mix(0.55).filled()))
            .map_err(draw_err)?;
        y = panel_text(&panel, "training set of replicate 0", (68, y), 14, INK, 24)?.max(y + 22)
            + 10;
        let mut note = if v.discrete {
            format!(
                "{} takes {} values: at each, the truth (bar) and each mean prediction (marker, \
                 side by side) with ±1 standard deviation of the prediction across replicates. \
                 A mean that misses the truth is bias (underfitting); a long bar is variance \
                 (overfitting).",
                v.input,
                v.x.len()
            )
        } else {
            String::from(
                "Bands: ±1 standard deviation of the prediction across replicates. A mean curve \
                 that misses the truth is bias (underfitting); a wide band is variance \
                 (overfitting).",
            )
        };
        if !v.averaged_over.is_empty() {
            note.push_str(&format!(
                " Averaged over {} within {} of {}.",
                v.averaged_over.join(", "),
                if v.discrete { "each value" } else { "bins" },
                v.input
            ));
        }
        panel_text(&panel, &note, (8, y), 12, STONE, 38)?;
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

/// What the selection histogram needs: how often cross-validation chose each grid value, and
/// the oracle best (lowest expected loss).
#[derive(Debug, Clone, PartialEq)]
pub struct SelectionView {
    /// Grid values.
    pub grid: Vec<f64>,
    /// How many replicates chose each grid value.
    pub counts: Vec<u64>,
    /// The grid value with the lowest expected loss.
    pub oracle: f64,
    /// Several models: each bar's candidate name (`knn k = 10`; `grid` then holds the bar
    /// indices 0, 1, …, and `oracle` the oracle's index). Empty for one model.
    pub labels: Vec<String>,
}

impl SelectionView {
    /// Reads the `selection` section of a result document's JSON: an object with
    /// `chosen_counts` (a list of counts in grid order, a list of `{value, count}` objects, or
    /// an object from value to count) and `oracle_best` (a number or `{value, ...}`). The error
    /// says why it cannot be drawn, naming the key: no section (no cross-validation audit), or
    /// a part missing or not fitting the grid (a cut `chosen_counts` was reported as a missing
    /// section).
    pub fn from_json(doc: &serde_json::Value) -> Result<SelectionView, String> {
        const EDITED: &str = "the document was edited";
        let sel = doc.get("selection").ok_or(
            "no `selection` section (run the cross-validation audit first); drop --selection",
        )?;
        let grid: Vec<f64> = doc
            .get("scenario")
            .and_then(|s| s.get("grid"))
            .and_then(|g| g.as_array())
            .ok_or(format!(
                "`scenario.grid` is missing or not a list: {EDITED}"
            ))?
            .iter()
            .filter_map(|v| v.as_f64())
            .collect();
        let cc = sel
            .get("chosen_counts")
            .ok_or(format!("`selection.chosen_counts` is missing: {EDITED}"))?;
        let whole = || {
            format!("`selection.chosen_counts` holds a count that is not a whole number: {EDITED}")
        };
        let entries = |n: usize, of: usize, what: &str| {
            format!("`selection.chosen_counts` has {n} entries for {of} {what}: {EDITED}")
        };
        let oracle_best = || -> Result<f64, String> {
            let ob = sel
                .get("oracle_best")
                .ok_or(format!("`selection.oracle_best` is missing: {EDITED}"))?;
            ob.as_f64()
                .or_else(|| ob.get("value").and_then(|v| v.as_f64()))
                .ok_or(format!("`selection.oracle_best` is not a number: {EDITED}"))
        };
        // Several models: one bar per candidate, named in `candidates`.
        if let Some(names) = sel.get("candidates").and_then(|c| c.as_array()) {
            let labels: Vec<String> = names
                .iter()
                .map(|n| n.as_str().map(str::to_string))
                .collect::<Option<_>>()
                .ok_or(format!(
                    "`selection.candidates` holds a name that is not text: {EDITED}"
                ))?;
            let counts: Vec<u64> = cc
                .as_array()
                .ok_or(format!("`selection.chosen_counts` is not a list: {EDITED}"))?
                .iter()
                .map(|v| v.as_u64())
                .collect::<Option<_>>()
                .ok_or_else(whole)?;
            if labels.is_empty() || labels.len() != counts.len() {
                return Err(entries(counts.len(), labels.len(), "candidates"));
            }
            let oracle_name = sel.get("oracle_candidate").and_then(|o| o.as_str());
            let oracle = oracle_name
                .and_then(|o| labels.iter().position(|l| l == o))
                .map_or(-1.0, |i| i as f64);
            return Ok(SelectionView {
                grid: (0..labels.len()).map(|i| i as f64).collect(),
                counts,
                oracle,
                labels,
            });
        }
        let mut counts = vec![0u64; grid.len()];
        let put = |counts: &mut Vec<u64>, value: f64, n: u64| {
            if let Some(i) = grid.iter().position(|g| *g == value) {
                counts[i] += n;
            }
        };
        let unread = || {
            format!(
                "`selection.chosen_counts` is not what `run` writes (counts, or value and count \
                 pairs): {EDITED}"
            )
        };
        match cc {
            serde_json::Value::Array(a) if a.iter().all(|v| v.is_number()) => {
                if a.len() != grid.len() {
                    return Err(entries(a.len(), grid.len(), "grid values"));
                }
                counts = a
                    .iter()
                    .map(|v| v.as_u64())
                    .collect::<Option<_>>()
                    .ok_or_else(whole)?;
            }
            serde_json::Value::Array(a) => {
                for e in a {
                    let value = e.get("value").and_then(|v| v.as_f64()).ok_or_else(unread)?;
                    let n = e.get("count").and_then(|v| v.as_u64()).ok_or_else(whole)?;
                    put(&mut counts, value, n);
                }
            }
            serde_json::Value::Object(o) => {
                for (k, n) in o {
                    let value = k.parse().map_err(|_| unread())?;
                    put(&mut counts, value, n.as_u64().ok_or_else(whole)?);
                }
            }
            _ => return Err(unread()),
        }
        Ok(SelectionView {
            grid,
            counts,
            oracle: oracle_best()?,
            labels: Vec::new(),
        })
    }
}

/// The selection histogram: one bar per grid value with how often cross-validation chose it; the
/// oracle best value's bar is dark and labelled.
pub fn selection_svg(v: &SelectionView, knob: &str) -> Result<String, Error> {
    let g = v.grid.len();
    if g == 0 || v.counts.len() != g {
        return Err(Error::Usage(
            "the selection audit needs one count per grid value".into(),
        ));
    }
    let total: u64 = v.counts.iter().sum();
    let top = v.counts.iter().copied().max().unwrap_or(0).max(1) as f64;
    let oracle_i = v.grid.iter().position(|x| *x == v.oracle);
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, SELECTION_SIZE).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let (head, body) = root.split_vertically(44);
        let named = !v.labels.is_empty();
        let what = if named {
            "candidate".to_string()
        } else {
            knob.to_string()
        };
        head.draw(&Text::new(
            format!("Which {what} cross-validation picked, in {total} replicates"),
            (18, 14),
            (FONT, 19).into_font().style(FontStyle::Bold).color(&INK),
        ))
        .map_err(draw_err)?;
        let grid = v.grid.clone();
        let mut chart = ChartBuilder::on(&body)
            .margin_left(10)
            .margin_right(20)
            .margin_bottom(8)
            .x_label_area_size(if named { 150 } else { 48 })
            .y_label_area_size(64)
            .build_cartesian_2d(-0.6f64..(g as f64 - 0.4), 0f64..top * 1.18)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .disable_x_mesh()
            .light_line_style(RGBColor(0xf3, 0xf3, 0xf3))
            .bold_line_style(RGBColor(0xd8, 0xd8, 0xd8))
            .x_labels(g.min(20) * 2 + 1)
            .x_label_formatter(&|x: &f64| {
                let i = x.round();
                if named {
                    // drawn turned by hand below
                    String::new()
                } else if (x - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < grid.len() {
                    fmt_value(grid[i as usize])
                } else {
                    String::new()
                }
            })
            .y_label_formatter(&|y: &f64| format!("{y:.0}"))
            .x_desc(if named {
                String::new()
            } else {
                knob.to_string()
            })
            .y_desc("replicates choosing it")
            .axis_desc_style((FONT, 15))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;
        // Candidate names, turned a quarter so that long names fit under narrow bars.
        for (i, name) in v.labels.iter().enumerate() {
            let (px, py) = chart.backend_coord(&(i as f64, 0.0));
            root.draw(&Text::new(
                name.clone(),
                (px - 7, py + 8),
                (FONT, 13)
                    .into_font()
                    .transform(FontTransform::Rotate90)
                    .color(&INK),
            ))
            .map_err(draw_err)?;
        }
        for (i, &n) in v.counts.iter().enumerate() {
            let oracle = Some(i) == oracle_i;
            let (fill, edge) = if oracle { (INK, INK) } else { (SKY, INK) };
            let rect = [(i as f64 - 0.36, 0.0), (i as f64 + 0.36, n as f64)];
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    rect,
                    fill.mix(0.85).filled(),
                )))
                .map_err(draw_err)?;
            chart
                .draw_series(std::iter::once(Rectangle::new(rect, edge.stroke_width(1))))
                .map_err(draw_err)?;
            if oracle {
                let (px, py) = chart.backend_coord(&(i as f64, n as f64));
                root.draw(&Text::new(
                    "oracle best",
                    (px - 34, py - 22),
                    (FONT, 14).into_font().color(&INK),
                ))
                .map_err(draw_err)?;
            }
        }
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

/// Width and height of the study pictures (heatmap, learning curves, families).
pub const STUDY_SIZE: (u32, u32) = (960, 520);

/// Colour of a value in [0, 1] on a light-to-dark scale (pale sage to dark ink).
fn scale(t: f64) -> RGBColor {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        1.0
    };
    let lerp = |a: u8, b: u8| (a as f64 + (b as f64 - a as f64) * t).round() as u8;
    RGBColor(lerp(0xf4, 0x1f), lerp(0xf7, 0x1d), lerp(0xee, 0x3d))
}

fn title_area<'b>(
    root: &DrawingArea<SVGBackend<'b>, Shift>,
    title: &str,
) -> Result<DrawingArea<SVGBackend<'b>, Shift>, Error> {
    let (top, body) = root.split_vertically(44);
    top.draw(&Text::new(
        title.to_string(),
        (18, 14),
        (FONT, 20).into_font().style(FontStyle::Bold).color(&INK),
    ))
    .map_err(draw_err)?;
    Ok(body)
}

/// The heatmap of expected loss over (training size × knob value) for one family of a
/// learning-curve run: darker is a higher loss (each row scaled from its own lowest to its own
/// highest, so the shape of every curve shows), the number in each cell is the expected loss,
/// and a ring marks the best value at each size.
pub fn heatmap_svg(doc: &ResultDoc, family: &str) -> Result<String, Error> {
    let sizes: Vec<usize> = if doc.sizes.is_empty() {
        vec![doc.scenario.train_size]
    } else {
        doc.sizes.clone()
    };
    let knob = doc
        .models
        .iter()
        .find(|m| m.id() == family)
        .map_or(doc.knob.clone(), |m| m.knob.clone());
    let rows: Vec<Vec<(f64, f64)>> = sizes
        .iter()
        .map(|&n| {
            doc.points
                .iter()
                .filter(|p| p.family.as_deref().map_or(true, |f| f == family))
                .filter(|p| p.train_size.map_or(true, |t| t as usize == n))
                .map(|p| (p.value, p.expected_loss()))
                .collect()
        })
        .collect();
    let cols = rows.first().map_or(0, Vec::len);
    if cols == 0 {
        return Err(Error::Usage(format!(
            "no rows of family `{family}` to draw"
        )));
    }
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, STUDY_SIZE).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let body = title_area(
            &root,
            &format!("Expected loss of {family} by training size and {knob}"),
        )?;
        let mut chart = ChartBuilder::on(&body)
            .margin(16)
            .x_label_area_size(48)
            .y_label_area_size(80)
            .build_cartesian_2d(
                -0.5f64..cols as f64 - 0.5,
                -0.5f64..sizes.len() as f64 - 0.5,
            )
            .map_err(draw_err)?;
        let values: Vec<f64> = rows[0].iter().map(|c| c.0).collect();
        // Cells are centred on whole numbers, so the axis labels sit under their cells; a
        // label is only written where the tick falls on a cell centre.
        let centre = |v: f64| (v - v.round()).abs() < 1e-6 && v >= -1e-6;
        let size_labels = sizes.clone();
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(cols.min(20))
            .y_labels(sizes.len())
            .x_label_formatter(&|v: &f64| {
                if !centre(*v) {
                    return String::new();
                }
                values
                    .get(v.round() as usize)
                    .map(|x| fmt_value(*x))
                    .unwrap_or_default()
            })
            .y_label_formatter(&|v: &f64| {
                if !centre(*v) {
                    return String::new();
                }
                size_labels
                    .get(v.round() as usize)
                    .map(|n| n.to_string())
                    .unwrap_or_default()
            })
            .x_desc(knob.clone())
            .y_desc("training size")
            .axis_desc_style((FONT, 16))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;
        for (si, row) in rows.iter().enumerate() {
            let lo = row.iter().map(|c| c.1).fold(f64::INFINITY, f64::min);
            let hi = row.iter().map(|c| c.1).fold(f64::NEG_INFINITY, f64::max);
            let best = row
                .iter()
                .enumerate()
                .min_by(|a, b| a.1 .1.total_cmp(&b.1 .1))
                .map(|(i, _)| i);
            for (ci, &(_, el)) in row.iter().enumerate() {
                // Shade by the excess over the row's best on a log scale: twice the best loss
                // or more is the darkest shade, so one very poor cell cannot wash out the rest.
                let t = if lo > 0.0 {
                    ((el / lo).ln() / 2f64.ln()).clamp(0.0, 1.0)
                } else if hi > lo {
                    (el - lo) / (hi - lo)
                } else {
                    0.0
                };
                let (x, y) = (ci as f64 - 0.5, si as f64 - 0.5);
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(x + 0.03, y + 0.05), (x + 0.97, y + 0.95)],
                        scale(0.85 * t).filled(),
                    )))
                    .map_err(draw_err)?;
                let ink = if scale(0.85 * t).0 < 128 { PAPER } else { INK };
                let label = crate::fmt::fmt_num(el);
                chart
                    .draw_series(std::iter::once(Text::new(
                        label,
                        (x + 0.08, y + 0.62),
                        (FONT, 11).into_font().color(&ink),
                    )))
                    .map_err(draw_err)?;
                if Some(ci) == best {
                    chart
                        .draw_series(std::iter::once(Circle::new(
                            (x + 0.5, y + 0.25),
                            6,
                            RUST.filled(),
                        )))
                        .map_err(draw_err)?;
                }
            }
        }
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

/// Learning curves: at each family's best knob value for each training size, the expected loss
/// (solid, with a ±2 standard error band), the bias-type term (dashed) and the variance
/// (dotted), against the training size on a logarithmic axis; one colour per family.
pub fn learning_svg(doc: &ResultDoc) -> Result<String, Error> {
    // The bias-type term drawn dashed, by the loss's own label (bias², bias² (est.), bias, ...).
    let bias_label = doc
        .term_docs()
        .iter()
        .find(|t| t.role == "bias" && t.group == "main")
        .map_or("bias term".to_string(), |t| t.label.clone());
    if doc.learning.is_empty() {
        return Err(Error::Usage(
            "the result has one training size: give `train_size = [..]` for learning curves".into(),
        ));
    }
    let colours = [INK, RUST, SKY, STONE];
    let xs: Vec<f64> = doc.sizes.iter().map(|&n| (n as f64).log10()).collect();
    let (x0, x1) = padded(xs.iter().copied(), &[], 0.05);
    let mut ys = vec![0.0];
    for c in &doc.learning {
        for s in &c.sizes {
            ys.push(s.expected_loss + 2.0 * s.stderr.unwrap_or(0.0));
            ys.push(s.bias);
            ys.push(s.variance);
        }
    }
    let (y0, y1) = padded(ys.into_iter(), &[0.0], 0.06);
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, STUDY_SIZE).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let body = title_area(
            &root,
            "Would more data help? Loss, bias and variance against training size",
        )?;
        let (plot, panel) = body.split_horizontally(STUDY_SIZE.0 - PANEL);
        let mut chart = ChartBuilder::on(&plot)
            .margin(14)
            .x_label_area_size(48)
            .y_label_area_size(74)
            .build_cartesian_2d(axis(x0, x1, "x")?, value_axis(y0, y1, "y")?)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .light_line_style(RGBColor(0xf3, 0xf3, 0xf3))
            .x_labels(doc.sizes.len().clamp(2, 12))
            .x_label_formatter(&|v: &f64| format!("{:.0}", 10f64.powf(*v)))
            .y_label_formatter(&|v: &f64| fmt_value(*v))
            .x_desc("training size (logarithmic axis)")
            .y_desc("at each size's best knob value")
            .axis_desc_style((FONT, 16))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;
        let mut y = 8;
        for (ci, c) in doc.learning.iter().enumerate() {
            let col = colours[ci % colours.len()];
            let el: Vec<(f64, f64)> = xs
                .iter()
                .zip(&c.sizes)
                .map(|(x, s)| (*x, s.expected_loss))
                .collect();
            let lo: Vec<f64> = c
                .sizes
                .iter()
                .map(|s| s.expected_loss - 2.0 * s.stderr.unwrap_or(0.0))
                .collect();
            let hi: Vec<f64> = c
                .sizes
                .iter()
                .map(|s| s.expected_loss + 2.0 * s.stderr.unwrap_or(0.0))
                .collect();
            let poly = band(&xs, &lo, &hi);
            if poly.len() >= 3 {
                chart
                    .draw_series(std::iter::once(Polygon::new(poly, col.mix(0.18).filled())))
                    .map_err(draw_err)?;
            }
            chart
                .draw_series(LineSeries::new(el.clone(), col.stroke_width(3)))
                .map_err(draw_err)?;
            let bias: Vec<(f64, f64)> =
                xs.iter().zip(&c.sizes).map(|(x, s)| (*x, s.bias)).collect();
            chart
                .draw_series(DashedLineSeries::new(bias, 10, 5, col.stroke_width(2)))
                .map_err(draw_err)?;
            let var: Vec<(f64, f64)> = xs
                .iter()
                .zip(&c.sizes)
                .map(|(x, s)| (*x, s.variance))
                .collect();
            chart
                .draw_series(DashedLineSeries::new(var, 3, 4, col.stroke_width(2)))
                .map_err(draw_err)?;
            for &(x, v) in &el {
                let px = chart.backend_coord(&(x, v));
                marker_at(&root, Marker::Dot, col, px)?;
            }
            let look = Look {
                color: col,
                width: 3,
                dash: Dash::Solid,
                marker: Marker::Dot,
            };
            sample_line(&panel, &look, 10, 58, y + 7)?;
            y = panel_text(
                &panel,
                &format!("{}: expected loss", c.family),
                (68, y),
                14,
                INK,
                24,
            )? + 6;
            let dashed = Look {
                dash: Dash::Dashed(10, 5),
                width: 2,
                marker: Marker::None,
                ..look
            };
            sample_line(&panel, &dashed, 10, 58, y + 7)?;
            y = panel_text(&panel, &bias_label, (68, y), 14, INK, 24)? + 6;
            let dotted = Look {
                dash: Dash::Dashed(3, 4),
                ..dashed
            };
            sample_line(&panel, &dotted, 10, 58, y + 7)?;
            y = panel_text(&panel, "variance", (68, y), 14, INK, 24)? + 14;
        }
        panel_text(
            &panel,
            "A falling variance line means more data still pays; a flat bias line means only a more flexible model would lower it.",
            (8, y),
            12,
            STONE,
            36,
        )?;
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

/// Every family's expected-loss curve (largest training size) on one picture: the x axis runs
/// from each family's simplest grid value (left) to its most complex (right), so curves of
/// different knobs share it; the best value of each family is ringed and labelled.
pub fn families_svg(doc: &ResultDoc) -> Result<String, Error> {
    let families = doc.families();
    let colours = [INK, RUST, SKY, STONE];
    let curves: Vec<(String, String, bool, Vec<PointRow>)> = families
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let m = doc.models.get(i);
            (
                f.clone(),
                m.map_or(doc.knob.clone(), |m| m.knob.clone()),
                m.map_or(doc.larger_is_simpler, |m| m.larger_is_simpler),
                doc.curve(f),
            )
        })
        .collect();
    let mut ys = vec![];
    for c in &curves {
        for p in &c.3 {
            ys.push(p.expected_loss() - 2.0 * p.se("expected_loss").unwrap_or(0.0));
            ys.push(p.expected_loss() + 2.0 * p.se("expected_loss").unwrap_or(0.0));
        }
    }
    let (y0, y1) = padded(ys.into_iter(), &[], 0.08);
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, STUDY_SIZE).into_drawing_area();
        root.fill(&PAPER).map_err(draw_err)?;
        let size = doc.sizes.last().map_or(doc.scenario.train_size, |&n| n);
        let body = title_area(
            &root,
            &format!("Which family? Expected loss of each at {size} training rows"),
        )?;
        let (plot, panel) = body.split_horizontally(STUDY_SIZE.0 - PANEL);
        let mut chart = ChartBuilder::on(&plot)
            .margin(14)
            .x_label_area_size(48)
            .y_label_area_size(74)
            .build_cartesian_2d(-0.05f64..1.05f64, value_axis(y0, y1, "y")?)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .light_line_style(RGBColor(0xf3, 0xf3, 0xf3))
            .x_labels(3)
            .x_label_formatter(&|v: &f64| {
                if *v < 0.25 {
                    "simplest".into()
                } else if *v > 0.75 {
                    "most complex".into()
                } else {
                    String::new()
                }
            })
            .y_label_formatter(&|v: &f64| fmt_value(*v))
            .x_desc("position in each family's grid, from simplest to most complex")
            .y_desc("expected loss")
            .axis_desc_style((FONT, 16))
            .label_style((FONT, 13))
            .draw()
            .map_err(draw_err)?;
        let mut y = 8;
        for (ci, (fam, knob, larger_simpler, rows)) in curves.iter().enumerate() {
            let col = colours[ci % colours.len()];
            let n = rows.len().max(2) - 1;
            let pos = |i: usize| {
                let t = i as f64 / n as f64;
                if *larger_simpler {
                    1.0 - t
                } else {
                    t
                }
            };
            let mut pts: Vec<(f64, f64)> = rows
                .iter()
                .enumerate()
                .map(|(i, p)| (pos(i), p.expected_loss()))
                .collect();
            pts.sort_by(|a, b| a.0.total_cmp(&b.0));
            chart
                .draw_series(LineSeries::new(pts.clone(), col.stroke_width(3)))
                .map_err(draw_err)?;
            for &(x, v) in &pts {
                let px = chart.backend_coord(&(x, v));
                marker_at(&root, Marker::Dot, col, px)?;
            }
            if let Some((bi, bp)) = rows
                .iter()
                .enumerate()
                .min_by(|a, b| a.1.expected_loss().total_cmp(&b.1.expected_loss()))
            {
                let at = (pos(bi), bp.expected_loss());
                chart
                    .draw_series(std::iter::once(Circle::new(at, 11, col.stroke_width(2))))
                    .map_err(draw_err)?;
                let look = Look {
                    color: col,
                    width: 3,
                    dash: Dash::Solid,
                    marker: Marker::Dot,
                };
                sample_line(&panel, &look, 10, 58, y + 7)?;
                y = panel_text(
                    &panel,
                    &format!(
                        "{fam}: best {knob} = {} ({})",
                        fmt_value(bp.value),
                        crate::fmt::fmt_num(bp.expected_loss())
                    ),
                    (68, y),
                    14,
                    INK,
                    24,
                )? + 10;
            }
        }
        panel_text(
            &panel,
            "Rings mark each family's lowest expected loss; the reading gives the paired differences and their standard errors.",
            (8, y + 6),
            12,
            STONE,
            36,
        )?;
        root.present().map_err(draw_err)?;
    }
    Ok(xml_chars(buf))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Round labels at every scale (sweep 69: losses near 1e-19 got one label, -3.433e-20):
    /// 1, 2 or 5 times a power of ten apart, inside the range, about as many as asked.
    #[test]
    fn value_axis_labels_are_round_at_every_scale() {
        for scale in [1e-300, 1e-19, 1e-15, 1.0, 1e12, 1e150] {
            let (lo, hi) = (1.37 * scale, 2.11 * scale);
            let t = round_ticks(lo, hi, 8);
            assert!((4..=10).contains(&t.len()), "{scale}: {t:?}");
            assert!(t.iter().all(|v| *v >= lo && *v <= hi), "{scale}: {t:?}");
            let step = t[1] - t[0];
            let mantissa = step / 10f64.powf((step.log10() + 1e-9).floor());
            assert!(
                [1.0, 2.0, 5.0].iter().any(|m| (mantissa - m).abs() < 1e-6),
                "{scale}: step {step}"
            );
        }
        let t = round_ticks(0.0, 1.0, 5);
        assert_eq!(t.len(), 6, "{t:?}");
        assert!(
            (t[3] - 0.6).abs() < 1e-12 && t[0] == 0.0 && t[5] == 1.0,
            "{t:?}"
        );
    }
}
