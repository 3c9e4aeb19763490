//! Self-contained HTML reports: `gaugewise fit --report FILE.html` and the renderer for replay reports.
//!
//! A report is one HTML file with inline SVG plots, a little CSS and no scripts, fonts, images or links to fetch,
//! so it opens the same from a USB stick on an offline laptop and can be attached to a maintenance ticket. The
//! plots are drawn by `plotters` (SVG backend); this module decides what goes in them and lays out the page.
//!
//! - [`fit_report`]: one tag's history with the best model's filtered estimate and its 95% band, missing stretches
//!   shaded; the standardised innovations with their ±1.96 bounds; ACF and PACF of the data and of the innovations
//!   with their 95% bands; the model comparison table and the emitted channel configuration. The numbers come from
//!   `estimate`, `filter`, `stats` and `report`, exactly as `fit` prints them.
//! - [`replay_report`]: per channel the raw values and the estimate with its band, flags shaded by kind, parameter
//!   changes marked, and tables of the flags' on/off times, with a summary per channel and kind. It takes plain
//!   [`ChannelTrace`] data so that any producer (replay, the demo) can feed it.
//!
//! Every plot is an `<svg class="plot" data-plot="...">` whose series are each wrapped in one
//! `<g class="series" data-series="...">`, so a test (or a reader's tool) can find a plot's series by name. Each
//! series is drawn by plotters on its own layer over the same chart geometry, and the layers are stacked in one SVG.
//!
//! **Downsampling for display.** A line drawn with more points than its plot has pixel columns only costs bytes
//! and rendering time. For each pixel column we keep the first, the last, the lowest and the highest sample of the
//! column (the "M4" rule): the drawn line then reaches exactly the same extremes as the full series, and joins
//! neighbouring columns where the full series does. Every sample next to a flag edge or a parameter change (the
//! last before and the first at or after it) is kept as well, so the picture never moves a flag's edge. A line is
//! broken, never bridged, across a missing value. Shaded stretches narrower than a pixel are widened to one pixel
//! and merged when they touch. So a plot holds at most about 4 points per pixel column whatever the length of the
//! history: 100,000 samples give a report well under 5 MB.
//!
//! Times: epoch seconds (any time above 1e8, i.e. after 1973) are shown as UTC date and time, otherwise as seconds.

use crate::estimate::Comparison;
use crate::filter;
use crate::history::Series;
use crate::model::ModelError;
use crate::report::{self, ReportedParams};
use crate::stats;
use plotters::coord::ranged1d::{KeyPointHint, NoDefaultFormatting, Ranged, ValueFormatter};
use plotters::prelude::*;
use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::ops::Range;
use thiserror::Error;

/// Why a report could not be made.
#[derive(Debug, Error)]
pub enum HtmlReportError {
    /// plotters refused a drawing; with an in-memory SVG target this means a bug of ours, not bad input.
    #[error("report plot '{plot}' could not be drawn: {message}")]
    Draw { plot: String, message: String },
    #[error("report: the best model cannot be run over the history: {0}")]
    Model(#[from] ModelError),
}

/// A flag raised on a channel: `kind` (e.g. a detector's name) picks the shading colour; `end` is None while the
/// flag is still on at the end of the trace.
#[derive(Debug, Clone, PartialEq)]
pub struct FlagSpan {
    pub kind: String,
    pub severity: String,
    pub start: f64,
    pub end: Option<f64>,
}

/// One channel's run through the streaming pipeline, as the replay report shows it. The vectors `times`, `raw`,
/// `estimate` and `std` are per sample (NaN where there is no value; `std` infinite while a model is still
/// diffuse); `changes` are parameter changes at a time, described in words.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ChannelTrace {
    pub channel: String,
    pub times: Vec<f64>,
    pub raw: Vec<f64>,
    pub estimate: Vec<f64>,
    pub std: Vec<f64>,
    pub flags: Vec<FlagSpan>,
    pub changes: Vec<(f64, String)>,
}

/// Times above this are epoch seconds and are shown in UTC.
const EPOCH_THRESHOLD: f64 = 1e8;
/// Flag rows listed per channel below its plot; the summary table covers all of them.
const MAX_FLAG_ROWS: usize = 100;

// Chart geometry shared by every layer of a plot: equal geometry is what makes the layers line up.
const MARGIN: u32 = 10;
const X_LABEL_AREA: u32 = 36;
const Y_LABEL_AREA: u32 = 64;
const WIDE: u32 = 1000;

// Our palette: muted, distinguishable in print and for the common colour-vision deficiencies.
const RAW: RGBColor = RGBColor(0x8c, 0x8c, 0x84);
const ESTIMATE: RGBColor = RGBColor(0x1d, 0x5c, 0x8a);
const BAND: RGBColor = RGBColor(0x6f, 0xa8, 0xd0);
const BAND_ALPHA: f64 = 0.35;
const MISSING: RGBColor = RGBColor(0xe3, 0xb4, 0x48);
const MISSING_ALPHA: f64 = 0.35;
const INNOVATION: RGBColor = RGBColor(0x4a, 0x4a, 0x60);
const BOUND: RGBColor = RGBColor(0xc0, 0x4e, 0x2c);
const STEM: RGBColor = RGBColor(0x1d, 0x5c, 0x8a);
const CHANGE: RGBColor = RGBColor(0x6b, 0x2f, 0x7a);
const GRID: RGBColor = RGBColor(0xe4, 0xe4, 0xe0);
const AXIS: RGBColor = RGBColor(0x55, 0x55, 0x55);
const FLAG_ALPHA: f64 = 0.3;
const FLAG_COLOURS: [RGBColor; 7] = [
    RGBColor(0xd9, 0x6a, 0x1e),
    RGBColor(0xa8, 0x32, 0x5a),
    RGBColor(0x4f, 0x8a, 0x2b),
    RGBColor(0x7a, 0x5c, 0xb8),
    RGBColor(0x1f, 0x8f, 0x96),
    RGBColor(0x8c, 0x6d, 0x3f),
    RGBColor(0x9a, 0x9a, 0x9a),
];

// ---------------------------------------------------------------------------------------------------------------
// Downsampling
// ---------------------------------------------------------------------------------------------------------------

/// Indices of the samples to draw, ascending: per pixel column (of `columns` over `x0..x1`) the first, last,
/// lowest and highest sample with a finite time and value, plus the samples on both sides of every time in `keep`
/// (the last before it and the first at or after it). Short series (at most four samples per column) are kept
/// whole. `times` must be ascending; the result never holds more than `4 * columns + 2 * keep.len()` indices.
pub fn display_indices(
    times: &[f64],
    values: &[f64],
    x0: f64,
    x1: f64,
    columns: usize,
    keep: &[f64],
) -> Vec<usize> {
    let n = times.len().min(values.len());
    let ok = |i: usize| times[i].is_finite() && values[i].is_finite();
    let columns = columns.max(1);
    if n <= 4 * columns {
        return (0..n).filter(|&i| ok(i)).collect();
    }
    let span = x1 - x0;
    let column = |t: f64| -> usize {
        if span > 0.0 {
            (((t - x0) / span) * columns as f64)
                .floor()
                .clamp(0.0, (columns - 1) as f64) as usize
        } else {
            0
        }
    };
    let mut out = Vec::with_capacity(4 * columns + 2 * keep.len());
    // (column, first, last, lowest, highest) of the column being scanned.
    let mut cur: Option<(usize, usize, usize, usize, usize)> = None;
    for i in 0..n {
        if !ok(i) {
            continue;
        }
        let c = column(times[i]);
        match &mut cur {
            Some((col, _, last, lo, hi)) if *col == c => {
                *last = i;
                if values[i] < values[*lo] {
                    *lo = i;
                }
                if values[i] > values[*hi] {
                    *hi = i;
                }
            }
            _ => {
                if let Some((_, f, l, lo, hi)) = cur {
                    out.extend([f, lo, hi, l]);
                }
                cur = Some((c, i, i, i, i));
            }
        }
    }
    if let Some((_, f, l, lo, hi)) = cur {
        out.extend([f, lo, hi, l]);
    }
    for &k in keep {
        let j = times[..n].partition_point(|&t| t < k);
        for i in [j.wrapping_sub(1), j] {
            if i < n && ok(i) {
                out.push(i);
            }
        }
    }
    out.sort_unstable();
    out.dedup();
    out
}

/// The chosen samples split into runs to draw as one line each: a run breaks wherever the full series has a
/// missing value, or a spacing above `max_gap`, between two chosen samples.
fn runs<'a>(
    times: &[f64],
    values: &[f64],
    idx: &'a [usize],
    max_gap: Option<f64>,
) -> Vec<&'a [usize]> {
    let n = times.len().min(values.len());
    if n == 0 || idx.is_empty() {
        return Vec::new();
    }
    // breaks[j]: how many places in 1..=j do not join sample j-1 to sample j.
    let mut breaks = Vec::with_capacity(n);
    let mut count = 0u32;
    for j in 0..n {
        if j > 0 {
            let gap = max_gap.is_some_and(|g| times[j] - times[j - 1] > g);
            if !values[j - 1].is_finite() || !times[j - 1].is_finite() || gap {
                count += 1;
            }
        }
        breaks.push(count);
    }
    let mut out = Vec::new();
    let mut start = 0;
    for k in 1..=idx.len() {
        if k == idx.len() || idx[k] >= n || breaks[idx[k]] != breaks[idx[k - 1].min(n - 1)] {
            out.push(&idx[start..k]);
            start = k;
        }
    }
    out.retain(|r| !r.is_empty());
    out
}

/// Polylines through the chosen samples, one per run (see [`runs`]).
fn polylines(
    times: &[f64],
    values: &[f64],
    idx: &[usize],
    max_gap: Option<f64>,
) -> Vec<Vec<(f64, f64)>> {
    runs(times, values, idx, max_gap)
        .into_iter()
        .map(|r| r.iter().map(|&i| (times[i], values[i])).collect())
        .collect()
}

/// Closed outlines of a band between `lower` and `upper`, one per stretch where both are finite.
fn band_polygons(
    times: &[f64],
    lower: &[f64],
    upper: &[f64],
    x0: f64,
    x1: f64,
    columns: usize,
    keep: &[f64],
) -> Vec<Vec<(f64, f64)>> {
    let n = times.len().min(lower.len()).min(upper.len());
    // Both edges must be present at a sample for the band to exist there.
    let lo: Vec<f64> = (0..n)
        .map(|i| {
            if upper[i].is_finite() {
                lower[i]
            } else {
                f64::NAN
            }
        })
        .collect();
    let times = &times[..n];
    let mut idx = display_indices(times, &lo, x0, x1, columns, keep);
    idx.extend(display_indices(times, &upper[..n], x0, x1, columns, keep));
    idx.retain(|&i| lo[i].is_finite());
    idx.sort_unstable();
    idx.dedup();
    runs(times, &lo, &idx, None)
        .into_iter()
        .filter(|run| run.len() > 1)
        .map(|run| {
            let mut poly: Vec<(f64, f64)> = run.iter().map(|&i| (times[i], upper[i])).collect();
            poly.extend(run.iter().rev().map(|&i| (times[i], lo[i])));
            poly
        })
        .collect()
}

/// Stretches `[start, end]` widened to at least `min_width` and merged where they then overlap.
fn merge_spans(mut spans: Vec<(f64, f64)>, min_width: f64) -> Vec<(f64, f64)> {
    spans.retain(|(a, b)| a.is_finite() && b.is_finite());
    for s in &mut spans {
        if s.1 < s.0 {
            *s = (s.1, s.0);
        }
        if s.1 - s.0 < min_width {
            let mid = 0.5 * (s.0 + s.1);
            *s = (mid - 0.5 * min_width, mid + 0.5 * min_width);
        }
    }
    spans.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut out: Vec<(f64, f64)> = Vec::with_capacity(spans.len());
    for s in spans {
        match out.last_mut() {
            Some(last) if s.0 <= last.1 => last.1 = last.1.max(s.1),
            _ => out.push(s),
        }
    }
    out
}

// ---------------------------------------------------------------------------------------------------------------
// Axes
// ---------------------------------------------------------------------------------------------------------------

#[derive(Debug, Clone, Copy, PartialEq)]
enum XKind {
    /// Epoch seconds, labelled as UTC clock time.
    Utc,
    /// Plain seconds (or sample index).
    Seconds,
    /// Correlogram lags: whole numbers.
    Lag,
}

/// The x axis of every plot. Our own `Ranged` so that UTC ticks fall on round clock times (every 5 min, 1 h,
/// 1 day, ...) rather than on round numbers of epoch seconds.
#[derive(Debug, Clone)]
struct XAxis {
    kind: XKind,
    start: f64,
    end: f64,
    /// Number of labels asked of the mesh; the label format follows the tick step this gives.
    labels: usize,
}

/// Steps for UTC ticks, in seconds: each divides a day or is a whole number of days.
const UTC_STEPS: [f64; 23] = [
    1.0, 2.0, 5.0, 10.0, 15.0, 30.0, 60.0, 120.0, 300.0, 600.0, 900.0, 1800.0, 3600.0, 7200.0,
    10800.0, 21600.0, 43200.0, 86400.0, 172800.0, 432000.0, 864000.0, 2592000.0, 7776000.0,
];

/// The smallest of 1, 2, 5 times a power of ten that is at least `x`.
fn nice_ceil(x: f64) -> f64 {
    if x.is_nan() || x <= 0.0 || x.is_infinite() {
        return 1.0;
    }
    let e = 10f64.powf(x.log10().floor());
    for m in [1.0, 2.0, 5.0, 10.0] {
        if m * e >= x * (1.0 - 1e-12) {
            return m * e;
        }
    }
    10.0 * e
}

impl XAxis {
    fn new(kind: XKind, start: f64, end: f64, labels: usize) -> Self {
        let (start, end) = if end > start {
            (start, end)
        } else {
            (start - 0.5, start + 0.5)
        };
        XAxis {
            kind,
            start,
            end,
            labels,
        }
    }

    fn step(&self, max_points: usize) -> f64 {
        let span = self.end - self.start;
        let intervals = (max_points.max(2) - 1) as f64;
        match self.kind {
            XKind::Utc => UTC_STEPS
                .iter()
                .copied()
                .find(|s| span / s <= intervals)
                .unwrap_or_else(|| nice_ceil(span / intervals / 86400.0) * 86400.0),
            XKind::Seconds => nice_ceil(span / intervals),
            XKind::Lag => nice_ceil(span / intervals).max(1.0),
        }
    }
}

impl Ranged for XAxis {
    type FormatOption = NoDefaultFormatting;
    type ValueType = f64;

    fn map(&self, value: &f64, limit: (i32, i32)) -> i32 {
        let frac = ((value - self.start) / (self.end - self.start)).clamp(-1.0, 2.0);
        let frac = if frac.is_nan() { 0.0 } else { frac };
        (limit.0 as f64 + frac * (limit.1 - limit.0) as f64).round() as i32
    }

    fn key_points<Hint: KeyPointHint>(&self, hint: Hint) -> Vec<f64> {
        let max = hint.max_num_points();
        if max == 0 {
            return Vec::new();
        }
        let step = self.step(max);
        let mut out = Vec::new();
        let mut k = (self.start / step).ceil();
        while out.len() < max.max(2) {
            let x = k * step;
            if x > self.end + 1e-9 * step {
                break;
            }
            out.push(x);
            k += 1.0;
        }
        out
    }

    fn range(&self) -> Range<f64> {
        self.start..self.end
    }
}

impl ValueFormatter<f64> for XAxis {
    fn format_ext(&self, value: &f64) -> String {
        let step = self.step(self.labels);
        match self.kind {
            XKind::Utc => {
                // A clock time alone is ambiguous over several days: midnight ticks carry the date instead.
                let midnight = step < 86400.0 && value.rem_euclid(86400.0) == 0.0;
                let pattern = if midnight {
                    "%m-%d"
                } else if step < 60.0 {
                    "%H:%M:%S"
                } else if step < 86400.0 {
                    "%H:%M"
                } else {
                    "%Y-%m-%d"
                };
                utc(*value)
                    .map(|d| d.format(pattern).to_string())
                    .unwrap_or_default()
            }
            XKind::Seconds => {
                let decimals = if step >= 1.0 {
                    0
                } else {
                    (-step.log10()).ceil() as usize
                };
                format!("{value:.decimals$}")
            }
            XKind::Lag => format!("{value:.0}"),
        }
    }
}

fn utc(t: f64) -> Option<chrono::DateTime<chrono::Utc>> {
    if !t.is_finite() {
        return None;
    }
    let secs = t.floor();
    let nanos = ((t - secs) * 1e9).round().min(999_999_999.0) as u32;
    chrono::DateTime::from_timestamp(secs as i64, nanos)
}

fn is_epoch(times: &[f64]) -> bool {
    times
        .iter()
        .find(|t| t.is_finite())
        .is_some_and(|&t| t > EPOCH_THRESHOLD)
}

/// A time for a table: UTC date and time for epoch seconds, else seconds.
fn fmt_time(t: f64, epoch: bool) -> String {
    if epoch {
        match utc(t) {
            Some(d) if t.fract() == 0.0 => d.format("%Y-%m-%d %H:%M:%S").to_string(),
            Some(d) => d.format("%Y-%m-%d %H:%M:%S%.3f").to_string(),
            None => "-".into(),
        }
    } else if t.is_finite() {
        format!("{} s", report::sig(t))
    } else {
        "-".into()
    }
}

/// A duration in the largest unit that reads well.
fn fmt_duration(s: f64) -> String {
    if !s.is_finite() {
        return "-".into();
    }
    if s < 120.0 {
        format!("{} s", report::sig(s))
    } else if s < 7200.0 {
        format!("{:.1} min", s / 60.0)
    } else if s < 172800.0 {
        format!("{:.1} h", s / 3600.0)
    } else {
        format!("{:.1} d", s / 86400.0)
    }
}

fn x_desc(kind: XKind, start: f64, end: f64) -> String {
    match kind {
        XKind::Utc => format!("UTC, {} to {}", fmt_time(start, true), fmt_time(end, true)),
        XKind::Seconds => "time (s)".into(),
        XKind::Lag => "lag (samples)".into(),
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Plots
// ---------------------------------------------------------------------------------------------------------------

/// What one plot shows, independent of how it is drawn.
struct Plot {
    id: String,
    label: String,
    width: u32,
    height: u32,
    x: XAxis,
    y: (f64, f64),
    x_desc: String,
    y_desc: String,
    layers: Vec<Layer>,
}

/// One series: everything in it ends up in one `<g class="series" data-series="name">`.
struct Layer {
    name: String,
    marks: Vec<Mark>,
}

enum Mark {
    Line {
        points: Vec<(f64, f64)>,
        colour: RGBColor,
        width: u32,
    },
    Area {
        points: Vec<(f64, f64)>,
        colour: RGBColor,
        alpha: f64,
    },
    /// A full-height shaded stretch of x.
    Span {
        x0: f64,
        x1: f64,
        colour: RGBColor,
        alpha: f64,
    },
    /// A short label at the top of the plot.
    Tag {
        x: f64,
        text: String,
        colour: RGBColor,
    },
}

/// Pixel columns of a plot's drawing area: the resolution its series are downsampled to.
fn columns(width: u32) -> usize {
    width.saturating_sub(2 * MARGIN + Y_LABEL_AREA).max(1) as usize
}

/// A y range for the given values: their extremes plus a margin, never empty.
fn y_range(values: impl IntoIterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values
        .into_iter()
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    if !(lo.is_finite() && hi.is_finite()) {
        return (-1.0, 1.0);
    }
    let pad = if hi > lo {
        0.04 * (hi - lo)
    } else {
        0.5 * lo.abs().max(1.0)
    };
    (lo - pad, hi + pad)
}

/// The y range of a signal plot: the data and estimate decide it; a band may widen it by at most a quarter of
/// their span, so one wide band (a model starting up, a long gap) does not flatten the picture. What lies
/// beyond is drawn at the edge.
fn signal_y_range(core: &[&[f64]], band: &[&[f64]]) -> (f64, f64) {
    let (lo, hi) = y_range(core.iter().flat_map(|s| s.iter().copied()));
    let reach = 0.25 * (hi - lo);
    let (blo, bhi) = y_range(
        band.iter()
            .flat_map(|s| s.iter().copied())
            .filter(|v| *v >= lo - reach && *v <= hi + reach),
    );
    let any_band = band.iter().any(|s| s.iter().any(|v| v.is_finite()));
    if any_band {
        (lo.min(blo), hi.max(bhi))
    } else {
        (lo, hi)
    }
}

fn draw_error(plot: &str, e: impl std::fmt::Display) -> HtmlReportError {
    HtmlReportError::Draw {
        plot: plot.to_string(),
        message: e.to_string(),
    }
}

/// Draws one layer (or, with `None`, the frame: background, grid, axes and labels) and returns its SVG content
/// without the outer `<svg>` element.
fn draw_layer(plot: &Plot, layer: Option<&Layer>) -> Result<String, HtmlReportError> {
    let err = |e: &dyn std::fmt::Display| draw_error(&plot.id, e);
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, (plot.width, plot.height)).into_drawing_area();
        if layer.is_none() {
            root.fill(&WHITE).map_err(|e| err(&e))?;
        }
        let (ylo, yhi) = plot.y;
        let mut chart = ChartBuilder::on(&root)
            .margin(MARGIN)
            .x_label_area_size(X_LABEL_AREA)
            .y_label_area_size(Y_LABEL_AREA)
            .build_cartesian_2d(plot.x.clone(), ylo..yhi)
            .map_err(|e| err(&e))?;
        let clamp_y = |y: f64| y.clamp(ylo, yhi);
        let clamp_x = |x: f64| x.clamp(plot.x.start, plot.x.end);
        let clamp = |pts: &[(f64, f64)]| -> Vec<(f64, f64)> {
            pts.iter().map(|&(x, y)| (clamp_x(x), clamp_y(y))).collect()
        };
        match layer {
            None => {
                // Tick values come from floating-point steps: a zero can arrive as 1e-17.
                let tiny = 1e-9 * (yhi - ylo);
                let y_fmt = |v: &f64| report::sig(if v.abs() < tiny { 0.0 } else { *v });
                // plotters' SVG text comes out at 1/1.24 of the size asked for: 14 gives about 11 px.
                chart
                    .configure_mesh()
                    .max_light_lines(0)
                    .x_labels(plot.x.labels)
                    .y_labels(6)
                    .y_label_formatter(&y_fmt)
                    .bold_line_style(GRID)
                    .axis_style(AXIS)
                    .label_style(("sans-serif", 14).into_font().color(&AXIS))
                    .axis_desc_style(("sans-serif", 14).into_font().color(&AXIS))
                    .x_desc(plot.x_desc.as_str())
                    .y_desc(plot.y_desc.as_str())
                    .draw()
                    .map_err(|e| err(&e))?;
            }
            Some(layer) => {
                for mark in &layer.marks {
                    match mark {
                        Mark::Line {
                            points,
                            colour,
                            width,
                        } => {
                            chart
                                .draw_series(LineSeries::new(
                                    clamp(points),
                                    colour.stroke_width(*width),
                                ))
                                .map_err(|e| err(&e))?;
                        }
                        Mark::Area {
                            points,
                            colour,
                            alpha,
                        } => {
                            chart
                                .draw_series(std::iter::once(Polygon::new(
                                    clamp(points),
                                    colour.mix(*alpha).filled(),
                                )))
                                .map_err(|e| err(&e))?;
                        }
                        Mark::Span {
                            x0,
                            x1,
                            colour,
                            alpha,
                        } => {
                            chart
                                .draw_series(std::iter::once(Rectangle::new(
                                    [(clamp_x(*x0), yhi), (clamp_x(*x1), ylo)],
                                    colour.mix(*alpha).filled(),
                                )))
                                .map_err(|e| err(&e))?;
                        }
                        Mark::Tag { x, text, colour } => {
                            let style = ("sans-serif", 13).into_font().color(colour);
                            chart
                                .draw_series(std::iter::once(
                                    EmptyElement::at((clamp_x(*x), yhi))
                                        + Text::new(text.clone(), (3, 2), style),
                                ))
                                .map_err(|e| err(&e))?;
                        }
                    }
                }
            }
        }
        root.present().map_err(|e| err(&e))?;
    }
    let start = buf
        .find("<svg")
        .and_then(|s| buf[s..].find('>').map(|e| s + e + 1));
    let end = buf.rfind("</svg>");
    Ok(match (start, end) {
        (Some(s), Some(e)) if e >= s => buf[s..e].trim_matches('\n').to_string(),
        _ => String::new(),
    })
}

/// The plot as one inline `<svg>`: the frame, then each series in its own group, in drawing order.
fn render_plot(plot: &Plot) -> Result<String, HtmlReportError> {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "<svg class=\"plot\" data-plot=\"{id}\" xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {w} {h}\" \
         width=\"{w}\" height=\"{h}\" role=\"img\" aria-label=\"{label}\">",
        id = esc(&plot.id),
        w = plot.width,
        h = plot.height,
        label = esc(&plot.label)
    );
    out.push_str("<g class=\"frame\">\n");
    out.push_str(&draw_layer(plot, None)?);
    out.push_str("\n</g>\n");
    for layer in &plot.layers {
        let _ = writeln!(
            out,
            "<g class=\"series\" data-series=\"{}\">",
            esc(&layer.name)
        );
        out.push_str(&draw_layer(plot, Some(layer))?);
        out.push_str("\n</g>\n");
    }
    out.push_str("</svg>\n");
    Ok(out)
}

/// A plot with its heading and legend; a plot that cannot be drawn leaves a note in its place rather than no
/// report at all.
fn figure(plot: &Plot, heading: &str, legend: &[(String, String)], out: &mut String) {
    let _ = writeln!(out, "<figure>\n<figcaption>{}</figcaption>", esc(heading));
    match render_plot(plot) {
        Ok(svg) => out.push_str(&svg),
        Err(e) => {
            let _ = writeln!(out, "<p class=\"note\">{}</p>", esc(&e.to_string()));
        }
    }
    if !legend.is_empty() {
        out.push_str("<ul class=\"legend\">");
        for (css, text) in legend {
            let _ = write!(
                out,
                "<li><span class=\"swatch\" style=\"{}\"></span>{}</li>",
                esc(css),
                esc(text)
            );
        }
        out.push_str("</ul>\n");
    }
    out.push_str("</figure>\n");
}

fn plural(n: usize) -> &'static str {
    if n == 1 {
        ""
    } else {
        "s"
    }
}

fn hex(c: RGBColor) -> String {
    format!("#{:02x}{:02x}{:02x}", c.0, c.1, c.2)
}

fn swatch_line(c: RGBColor) -> String {
    format!("background:{};height:3px", hex(c))
}

fn swatch_fill(c: RGBColor, alpha: f64) -> String {
    format!("background:{};opacity:{alpha}", hex(c))
}

/// HTML escaping for text and attribute values.
pub fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

const STYLE: &str = "\
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#222;background:#fbfbf8;margin:0 auto;\
max-width:1060px;padding:16px 24px 40px}\
h1{font-size:1.45em;margin:.4em 0 .2em}h2{font-size:1.15em;margin:1.6em 0 .4em;border-bottom:1px solid #ddd;\
padding-bottom:.2em}\
p.meta{color:#555;margin:.2em 0}p.note{color:#7a4b00;background:#fff6e0;padding:.4em .6em}\
figure{margin:1em 0;background:#fff;border:1px solid #e2e2dc;padding:8px}\
figcaption{font-weight:600;margin-bottom:4px}\
svg.plot{display:block;max-width:100%;height:auto}\
.grid2{display:flex;flex-wrap:wrap;gap:0 12px}.grid2 figure{flex:1 1 460px}\
ul.legend{list-style:none;padding:0;margin:6px 0 0;display:flex;flex-wrap:wrap;gap:4px 18px;font-size:.9em}\
ul.legend li{display:flex;align-items:center;gap:6px}\
.swatch{display:inline-block;width:22px;height:12px}\
table{border-collapse:collapse;font-size:.9em;margin:.5em 0;background:#fff}\
th,td{border:1px solid #ddd;padding:3px 8px;text-align:left;vertical-align:top}\
td.num{text-align:right;font-variant-numeric:tabular-nums}tr.best td{background:#eef5fb}\
pre{background:#f3f3ee;border:1px solid #ddd;padding:8px;overflow-x:auto}\
details{margin:.4em 0}summary{cursor:pointer;color:#333}\
footer{margin-top:2em;color:#666;font-size:.85em}";

fn page_start(title: &str, out: &mut String) {
    let _ = write!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <meta name=\"generator\" content=\"gaugewise {}\">\n<title>{}</title>\n<style>{STYLE}</style>\n</head>\n\
         <body>\n",
        env!("CARGO_PKG_VERSION"),
        esc(title)
    );
}

fn page_end(out: &mut String) {
    let _ = write!(
        out,
        "<footer>Made by gaugewise {}. Plots show at most about four points per pixel column (first, last, lowest \
         and highest sample of the column) and every sample at a flag edge or parameter change. gaugewise is \
         advisory: it does not replace alarms, interlocks or engineering judgement.</footer>\n</body>\n</html>\n",
        env!("CARGO_PKG_VERSION")
    );
}

// ---------------------------------------------------------------------------------------------------------------
// Fit report
// ---------------------------------------------------------------------------------------------------------------

/// The fit report for one tag: `series` is the history that was fitted, `cmp` the comparison `fit` ranked,
/// `interval` its nominal interval and `source` where the history came from (shown, not read).
pub fn fit_report(
    series: &Series,
    cmp: &Comparison,
    interval: f64,
    source: &str,
) -> Result<String, HtmlReportError> {
    let n = series.times.len().min(series.values.len());
    let times = &series.times[..n];
    let values = &series.values[..n];
    let epoch = is_epoch(times);
    let kind = if epoch { XKind::Utc } else { XKind::Seconds };
    let t0 = times.first().copied().unwrap_or(0.0);
    let t1 = times.last().copied().unwrap_or(t0);
    let z95 = stats::normal_quantile(0.975);

    let best = cmp.best();
    let spec = best.and_then(|b| b.spec.as_ref());
    let mut estimate = vec![f64::NAN; n];
    let mut sd = vec![f64::NAN; n];
    let mut innovations = vec![f64::NAN; n];
    if let Some(spec) = spec {
        filter::run(spec, times, values, |i, step| {
            estimate[i] = step.estimate;
            sd[i] = step.estimate_var.sqrt();
            innovations[i] = step.standardized;
        })?;
    }
    let upper: Vec<f64> = estimate.iter().zip(&sd).map(|(e, s)| e + z95 * s).collect();
    let lower: Vec<f64> = estimate.iter().zip(&sd).map(|(e, s)| e - z95 * s).collect();

    // Missing stretches: runs of missing values, and spacings much longer than the nominal interval (no rows).
    let gap = 2.5 * interval;
    let mut missing = Vec::new();
    let mut run_start: Option<usize> = None;
    for i in 0..n {
        if values[i].is_finite() {
            if let Some(s) = run_start.take() {
                missing.push((times[s], times[i - 1]));
            }
        } else if run_start.is_none() {
            run_start = Some(i);
        }
        if i > 0 && times[i] - times[i - 1] > gap {
            missing.push((times[i - 1], times[i]));
        }
    }
    if let Some(s) = run_start {
        missing.push((times[s], times[n - 1]));
    }
    let n_missing_values = values.iter().filter(|v| !v.is_finite()).count();
    let n_gaps = (1..n).filter(|&i| times[i] - times[i - 1] > gap).count();

    let mut out = String::new();
    let title = format!("gaugewise fit report: {}", series.name);
    page_start(&title, &mut out);
    let _ = writeln!(out, "<h1>{}</h1>", esc(&title));
    let _ = writeln!(
        out,
        "<p class=\"meta\">Source: {}. {} samples, {} missing, median interval {} s, {} to {}.</p>",
        esc(source),
        n,
        n_missing_values,
        report::sig(interval),
        esc(&fmt_time(t0, epoch)),
        esc(&fmt_time(t1, epoch))
    );
    match best {
        Some(b) => {
            let _ = writeln!(
                out,
                "<p class=\"meta\">Best model by AIC on the common sample: <b>{}</b> ({}).</p>",
                esc(&b.kind.to_string()),
                esc(&b
                    .spec
                    .as_ref()
                    .map(|s| ReportedParams::of(s).compact())
                    .unwrap_or_default())
            );
        }
        None => out.push_str(
            "<p class=\"note\">No candidate model converged: the plots show the data only.</p>\n",
        ),
    }

    // Data, estimate, band and missing stretches.
    let wide_cols = columns(WIDE);
    let px = (t1 - t0).max(f64::MIN_POSITIVE) / wide_cols as f64;
    let raw_idx = display_indices(times, values, t0, t1, wide_cols, &[]);
    let est_idx = display_indices(times, &estimate, t0, t1, wide_cols, &[]);
    let data_plot = Plot {
        id: "data".into(),
        label: format!("{}: data, filtered estimate and 95% band", series.name),
        width: WIDE,
        height: 340,
        x: XAxis::new(kind, t0, t1, 9),
        y: signal_y_range(&[values, &estimate], &[&upper, &lower]),
        x_desc: x_desc(kind, t0, t1),
        y_desc: series.name.clone(),
        layers: vec![
            Layer {
                name: "missing".into(),
                marks: merge_spans(missing, px)
                    .into_iter()
                    .map(|(x0, x1)| Mark::Span {
                        x0,
                        x1,
                        colour: MISSING,
                        alpha: MISSING_ALPHA,
                    })
                    .collect(),
            },
            Layer {
                name: "band".into(),
                marks: band_polygons(times, &lower, &upper, t0, t1, wide_cols, &[])
                    .into_iter()
                    .map(|points| Mark::Area {
                        points,
                        colour: BAND,
                        alpha: BAND_ALPHA,
                    })
                    .collect(),
            },
            Layer {
                name: "raw".into(),
                marks: polylines(times, values, &raw_idx, Some(gap))
                    .into_iter()
                    .map(|points| Mark::Line {
                        points,
                        colour: RAW,
                        width: 1,
                    })
                    .collect(),
            },
            Layer {
                name: "estimate".into(),
                marks: polylines(times, &estimate, &est_idx, None)
                    .into_iter()
                    .map(|points| Mark::Line {
                        points,
                        colour: ESTIMATE,
                        width: 2,
                    })
                    .collect(),
            },
        ],
    };
    out.push_str("<h2>Data and filtered estimate</h2>\n");
    figure(
        &data_plot,
        &format!(
            "{}: the data, the best model's filtered estimate and its 95% band",
            series.name
        ),
        &[
            (swatch_line(RAW), "data".into()),
            (swatch_line(ESTIMATE), "filtered estimate".into()),
            (
                swatch_fill(BAND, BAND_ALPHA),
                "95% band of the estimate".into(),
            ),
            (
                swatch_fill(MISSING, MISSING_ALPHA),
                format!(
                    "missing ({n_missing_values} value{}, {n_gaps} gap{} in time)",
                    plural(n_missing_values),
                    plural(n_gaps)
                ),
            ),
        ],
        &mut out,
    );

    // Standardised innovations.
    if spec.is_some() {
        let zmax = innovations
            .iter()
            .filter(|z| z.is_finite())
            .fold(3.0f64, |m, z| m.max(z.abs()))
            .min(8.0)
            * 1.05;
        let z_idx = display_indices(times, &innovations, t0, t1, wide_cols, &[]);
        let outside = innovations
            .iter()
            .filter(|z| z.is_finite() && z.abs() > z95)
            .count();
        let present = innovations.iter().filter(|z| z.is_finite()).count();
        let innov_plot = Plot {
            id: "innovations".into(),
            label: format!("{}: standardised innovations", series.name),
            width: WIDE,
            height: 240,
            x: XAxis::new(kind, t0, t1, 9),
            y: (-zmax, zmax),
            x_desc: x_desc(kind, t0, t1),
            y_desc: "standardised".into(),
            layers: vec![
                Layer {
                    name: "bounds".into(),
                    marks: [z95, -z95]
                        .into_iter()
                        .map(|b| Mark::Line {
                            points: vec![(t0, b), (t1, b)],
                            colour: BOUND,
                            width: 1,
                        })
                        .collect(),
                },
                Layer {
                    name: "innovations".into(),
                    marks: polylines(times, &innovations, &z_idx, Some(gap))
                        .into_iter()
                        .map(|points| Mark::Line {
                            points,
                            colour: INNOVATION,
                            width: 1,
                        })
                        .collect(),
                },
            ],
        };
        out.push_str("<h2>Standardised innovations</h2>\n");
        figure(
            &innov_plot,
            &format!(
                "Each value minus its one-step forecast, over the forecast's standard deviation: {outside} of {present} \
                 outside ±{z95:.2} (about 5% expected for a good model)"
            ),
            &[
                (swatch_line(INNOVATION), "standardised innovation".into()),
                (swatch_line(BOUND), format!("±{z95:.2}")),
            ],
            &mut out,
        );
    }

    // Correlograms.
    out.push_str("<h2>Autocorrelation</h2>\n");
    out.push_str(
        "<p class=\"meta\">Bars outside the shaded 95% band are significant. Of the data: a PACF that cuts off after \
         lag p while the ACF decays suggests an AR(p) part. Of the innovations: a good model leaves none.</p>\n",
    );
    out.push_str("<div class=\"grid2\">\n");
    let mut correlograms = vec![("data", "data", values)];
    if spec.is_some() {
        correlograms.push(("innovations", "innovations", &innovations));
    }
    for (id, what, x) in correlograms {
        match report::correlogram(x) {
            Some(c) => {
                let acf_band: Vec<f64> = c.acf_band.clone();
                let pacf_band = vec![c.pacf_band; c.lags];
                for (name, coefs, band) in
                    [("acf", &c.acf, &acf_band), ("pacf", &c.pacf, &pacf_band)]
                {
                    let plot = correlogram_plot(&format!("{name}-{id}"), name, what, coefs, band);
                    figure(
                        &plot,
                        &format!(
                            "{} of the {what}",
                            if name == "acf" {
                                "Autocorrelation"
                            } else {
                                "Partial autocorrelation"
                            }
                        ),
                        &[
                            (swatch_line(STEM), name.to_uppercase()),
                            (swatch_fill(BAND, BAND_ALPHA), "95% band".into()),
                        ],
                        &mut out,
                    );
                }
            }
            None => {
                let _ = writeln!(
                    out,
                    "<p class=\"note\">Too few {what} values for a correlogram.</p>"
                );
            }
        }
    }
    out.push_str("</div>\n");

    // Model comparison.
    out.push_str("<h2>Model comparison</h2>\n");
    out.push_str(
        "<table class=\"models\">\n<thead><tr><th>model</th><th>parameters</th><th>loglik</th><th>AIC</th>\
         <th>BIC</th><th>Ljung-Box p</th><th>verdict</th></tr></thead>\n<tbody>\n",
    );
    for f in &cmp.fits {
        let is_best = best.is_some_and(|b| b.kind == f.kind);
        let spec = f.spec.as_ref().filter(|_| f.converged);
        let num = |x: f64| {
            if spec.is_some() {
                format!("{x:.2}")
            } else {
                "-".into()
            }
        };
        let _ = writeln!(
            out,
            "<tr{}><td>{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td>\
             <td class=\"num\">{}</td><td>{}</td></tr>",
            if is_best { " class=\"best\"" } else { "" },
            esc(&f.kind.to_string()),
            esc(&spec.map(|s| ReportedParams::of(s).compact()).unwrap_or_else(|| "-".into())),
            num(f.loglik_common),
            num(f.aic_common),
            num(f.bic_common),
            spec.and(f.ljung_box.as_ref())
                .map(|lb| format!("{:.3}", lb.p))
                .unwrap_or_else(|| "-".into()),
            esc(&report::verdict(f, best))
        );
    }
    out.push_str("</tbody>\n</table>\n");
    let _ = writeln!(
        out,
        "<p class=\"meta\">loglik, AIC and BIC are on the common sample: every model is scored on the same \
         observations, those after the first {} present value(s). Ranked by that AIC, lowest first.</p>",
        cmp.common_skip
    );

    out.push_str("<h2>Channel configuration</h2>\n");
    match spec {
        Some(spec) => {
            let _ = writeln!(
                out,
                "<pre class=\"config\">{}</pre>",
                esc(&report::emit_config(spec, &series.name))
            );
        }
        None => out.push_str(
            "<p class=\"note\">No candidate model converged, so there is no configuration.</p>\n",
        ),
    }
    page_end(&mut out);
    Ok(out)
}

fn correlogram_plot(id: &str, name: &str, what: &str, coefs: &[f64], band: &[f64]) -> Plot {
    let lags = coefs.len().min(band.len());
    let mut upper = Vec::with_capacity(2 * lags);
    for (k, b) in band.iter().take(lags).enumerate() {
        let lag = (k + 1) as f64;
        upper.push((lag - 0.5, *b));
        upper.push((lag + 0.5, *b));
    }
    let mut outline = upper.clone();
    outline.extend(upper.iter().rev().map(|&(x, b)| (x, -b)));
    let reach = coefs
        .iter()
        .chain(band)
        .filter(|v| v.is_finite())
        .fold(0.2f64, |m, v| m.max(v.abs()))
        .min(1.0)
        * 1.1;
    Plot {
        id: id.into(),
        label: format!("{name} of the {what}"),
        width: 490,
        height: 230,
        x: XAxis::new(XKind::Lag, 0.5, lags as f64 + 0.5, 10),
        y: (-reach, reach),
        x_desc: x_desc(XKind::Lag, 0.0, 0.0),
        y_desc: name.to_uppercase(),
        layers: vec![
            Layer {
                name: "band".into(),
                marks: vec![
                    Mark::Area {
                        points: outline,
                        colour: BAND,
                        alpha: BAND_ALPHA,
                    },
                    Mark::Line {
                        points: vec![(0.5, 0.0), (lags as f64 + 0.5, 0.0)],
                        colour: AXIS,
                        width: 1,
                    },
                ],
            },
            Layer {
                name: "coefficients".into(),
                marks: coefs
                    .iter()
                    .take(lags)
                    .enumerate()
                    .filter(|(_, r)| r.is_finite())
                    .map(|(k, &r)| Mark::Line {
                        points: vec![((k + 1) as f64, 0.0), ((k + 1) as f64, r)],
                        colour: STEM,
                        width: 4,
                    })
                    .collect(),
            },
        ],
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Replay report
// ---------------------------------------------------------------------------------------------------------------

/// A trace cleaned for drawing: equal lengths, finite times, ascending.
struct Clean {
    times: Vec<f64>,
    raw: Vec<f64>,
    estimate: Vec<f64>,
    std: Vec<f64>,
}

fn clean(trace: &ChannelTrace) -> Clean {
    let n = trace
        .times
        .len()
        .min(trace.raw.len())
        .min(trace.estimate.len())
        .min(trace.std.len());
    let mut idx: Vec<usize> = (0..n).filter(|&i| trace.times[i].is_finite()).collect();
    if idx
        .windows(2)
        .any(|w| trace.times[w[0]] > trace.times[w[1]])
    {
        idx.sort_by(|&a, &b| trace.times[a].total_cmp(&trace.times[b]));
    }
    let pick = |v: &[f64]| idx.iter().map(|&i| v[i]).collect::<Vec<f64>>();
    Clean {
        times: pick(&trace.times),
        raw: pick(&trace.raw),
        estimate: pick(&trace.estimate),
        std: pick(&trace.std),
    }
}

/// Per channel and kind: what the summary table shows.
#[derive(Default)]
struct FlagSummary {
    count: usize,
    total: f64,
    first: f64,
    last_off: Option<f64>,
    still_on: bool,
    severities: Vec<String>,
}

/// The replay report: one section per channel (plot, flag on/off times, parameter changes) after a summary of
/// all flags. `title` heads the page. Bad data (unequal lengths, non-finite times, flags ending before they
/// start) is drawn as far as it makes sense, never refused.
pub fn replay_report(traces: &[ChannelTrace], title: &str) -> String {
    let cleaned: Vec<Clean> = traces.iter().map(clean).collect();
    let epoch = cleaned.iter().any(|c| is_epoch(&c.times));
    let kind = if epoch { XKind::Utc } else { XKind::Seconds };
    let z95 = stats::normal_quantile(0.975);

    // Colours by flag kind, the same in every channel.
    let mut kinds: Vec<&str> = traces
        .iter()
        .flat_map(|t| t.flags.iter().map(|f| f.kind.as_str()))
        .collect();
    kinds.sort_unstable();
    kinds.dedup();
    let colour_of = |k: &str| {
        let i = kinds.iter().position(|x| *x == k).unwrap_or(0);
        FLAG_COLOURS[i % FLAG_COLOURS.len()]
    };

    let mut out = String::new();
    page_start(title, &mut out);
    let _ = writeln!(out, "<h1>{}</h1>", esc(title));
    let samples: usize = cleaned.iter().map(|c| c.times.len()).sum();
    let first = cleaned
        .iter()
        .filter_map(|c| c.times.first())
        .fold(f64::INFINITY, |m, t| m.min(*t));
    let last = cleaned
        .iter()
        .filter_map(|c| c.times.last())
        .fold(f64::NEG_INFINITY, |m, t| m.max(*t));
    let _ = writeln!(
        out,
        "<p class=\"meta\">{} channel(s), {} samples, {} to {}.</p>",
        traces.len(),
        samples,
        esc(&fmt_time(first, epoch)),
        esc(&fmt_time(last, epoch))
    );

    // Summary of flags per channel and kind.
    out.push_str("<h2>Flags</h2>\n");
    out.push_str(
        "<table class=\"flag-summary\">\n<thead><tr><th>channel</th><th>kind</th><th>severity</th><th>count</th>\
         <th>total time on</th><th>first on</th><th>last off</th></tr></thead>\n<tbody>\n",
    );
    for (trace, c) in traces.iter().zip(&cleaned) {
        let end_of_trace = c.times.last().copied().unwrap_or(f64::NAN);
        let mut by_kind: BTreeMap<&str, FlagSummary> = BTreeMap::new();
        for f in &trace.flags {
            let s = by_kind
                .entry(f.kind.as_str())
                .or_insert_with(|| FlagSummary {
                    first: f64::INFINITY,
                    ..FlagSummary::default()
                });
            s.count += 1;
            let end = f.end.unwrap_or(end_of_trace);
            let on = end - f.start;
            if on.is_finite() && on > 0.0 {
                s.total += on;
            }
            s.first = s.first.min(f.start);
            match f.end {
                Some(e) => s.last_off = Some(s.last_off.map_or(e, |l: f64| l.max(e))),
                None => s.still_on = true,
            }
            if !s.severities.contains(&f.severity) {
                s.severities.push(f.severity.clone());
            }
        }
        if by_kind.is_empty() {
            let _ = writeln!(
                out,
                "<tr><td>{}</td><td colspan=\"6\">no flags</td></tr>",
                esc(&trace.channel)
            );
        }
        for (k, s) in by_kind {
            let _ = writeln!(
                out,
                "<tr><td>{}</td><td><span class=\"swatch\" style=\"{}\"></span> {}</td><td>{}</td>\
                 <td class=\"num\">{}</td><td class=\"num\">{}</td><td>{}</td><td>{}</td></tr>",
                esc(&trace.channel),
                esc(&swatch_fill(colour_of(k), FLAG_ALPHA + 0.2)),
                esc(k),
                esc(&s.severities.join(", ")),
                s.count,
                esc(&fmt_duration(s.total)),
                esc(&fmt_time(s.first, epoch)),
                if s.still_on {
                    "still on at the end".to_string()
                } else {
                    esc(&s.last_off.map_or("-".into(), |t| fmt_time(t, epoch)))
                }
            );
        }
    }
    out.push_str("</tbody>\n</table>\n");

    for (ci, (trace, c)) in traces.iter().zip(&cleaned).enumerate() {
        let _ = writeln!(
            out,
            "<section class=\"channel\" id=\"channel-{ci}\">\n<h2>{}</h2>",
            esc(&trace.channel)
        );
        if c.times.is_empty() {
            out.push_str("<p class=\"note\">No samples.</p>\n</section>\n");
            continue;
        }
        let t0 = c.times[0];
        let t1 = c.times[c.times.len() - 1];
        let end_of_trace = t1;
        let cols = columns(WIDE);
        let px = (t1 - t0).max(f64::MIN_POSITIVE) / cols as f64;
        let mut keep: Vec<f64> = trace
            .flags
            .iter()
            .flat_map(|f| [Some(f.start), f.end])
            .flatten()
            .chain(trace.changes.iter().map(|(t, _)| *t))
            .filter(|t| t.is_finite())
            .collect();
        keep.sort_by(f64::total_cmp);
        keep.dedup();
        let upper: Vec<f64> = c
            .estimate
            .iter()
            .zip(&c.std)
            .map(|(e, s)| e + z95 * s)
            .collect();
        let lower: Vec<f64> = c
            .estimate
            .iter()
            .zip(&c.std)
            .map(|(e, s)| e - z95 * s)
            .collect();
        let raw_idx = display_indices(&c.times, &c.raw, t0, t1, cols, &keep);
        let est_idx = display_indices(&c.times, &c.estimate, t0, t1, cols, &keep);

        let mut flag_marks = Vec::new();
        for k in &kinds {
            let spans: Vec<(f64, f64)> = trace
                .flags
                .iter()
                .filter(|f| f.kind == *k)
                .map(|f| (f.start, f.end.unwrap_or(end_of_trace)))
                .collect();
            for (x0, x1) in merge_spans(spans, px) {
                flag_marks.push(Mark::Span {
                    x0,
                    x1,
                    colour: colour_of(k),
                    alpha: FLAG_ALPHA,
                });
            }
        }
        let mut change_marks = Vec::new();
        for (i, (t, _)) in trace.changes.iter().enumerate() {
            if !t.is_finite() {
                continue;
            }
            change_marks.push(Mark::Line {
                points: vec![(*t, f64::NEG_INFINITY), (*t, f64::INFINITY)],
                colour: CHANGE,
                width: 1,
            });
            change_marks.push(Mark::Tag {
                x: *t,
                text: (i + 1).to_string(),
                colour: CHANGE,
            });
        }
        let plot = Plot {
            id: format!("channel-{ci}"),
            label: format!("{}: raw, estimate and 95% band, flags", trace.channel),
            width: WIDE,
            height: 320,
            x: XAxis::new(kind, t0, t1, 9),
            y: signal_y_range(&[&c.raw, &c.estimate], &[&upper, &lower]),
            x_desc: x_desc(kind, t0, t1),
            y_desc: trace.channel.clone(),
            layers: vec![
                Layer {
                    name: "flags".into(),
                    marks: flag_marks,
                },
                Layer {
                    name: "band".into(),
                    marks: band_polygons(&c.times, &lower, &upper, t0, t1, cols, &keep)
                        .into_iter()
                        .map(|points| Mark::Area {
                            points,
                            colour: BAND,
                            alpha: BAND_ALPHA,
                        })
                        .collect(),
                },
                Layer {
                    name: "raw".into(),
                    marks: polylines(&c.times, &c.raw, &raw_idx, None)
                        .into_iter()
                        .map(|points| Mark::Line {
                            points,
                            colour: RAW,
                            width: 1,
                        })
                        .collect(),
                },
                Layer {
                    name: "estimate".into(),
                    marks: polylines(&c.times, &c.estimate, &est_idx, None)
                        .into_iter()
                        .map(|points| Mark::Line {
                            points,
                            colour: ESTIMATE,
                            width: 2,
                        })
                        .collect(),
                },
                Layer {
                    name: "changes".into(),
                    marks: change_marks,
                },
            ],
        };
        let mut legend = vec![
            (swatch_line(RAW), "raw".to_string()),
            (swatch_line(ESTIMATE), "estimate".to_string()),
            (swatch_fill(BAND, BAND_ALPHA), "95% band".to_string()),
        ];
        let mut present: Vec<&str> = trace.flags.iter().map(|f| f.kind.as_str()).collect();
        present.sort_unstable();
        present.dedup();
        for k in present {
            legend.push((swatch_fill(colour_of(k), FLAG_ALPHA), format!("flag: {k}")));
        }
        if !trace.changes.is_empty() {
            legend.push((swatch_line(CHANGE), "parameter change (numbered)".into()));
        }
        figure(
            &plot,
            &format!(
                "{}: raw values, estimate with 95% band, flags",
                trace.channel
            ),
            &legend,
            &mut out,
        );

        if !trace.flags.is_empty() {
            let _ = writeln!(
                out,
                "<details>\n<summary>Flag on/off times ({})</summary>",
                trace.flags.len()
            );
            out.push_str(
                "<table class=\"flags\">\n<thead><tr><th>kind</th><th>severity</th><th>on</th><th>off</th>\
                 <th>duration</th></tr></thead>\n<tbody>\n",
            );
            let mut flags: Vec<&FlagSpan> = trace.flags.iter().collect();
            flags.sort_by(|a, b| a.start.total_cmp(&b.start));
            for f in flags.iter().take(MAX_FLAG_ROWS) {
                let end = f.end.unwrap_or(end_of_trace);
                let _ = writeln!(
                    out,
                    "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"num\">{}</td></tr>",
                    esc(&f.kind),
                    esc(&f.severity),
                    esc(&fmt_time(f.start, epoch)),
                    match f.end {
                        Some(e) => esc(&fmt_time(e, epoch)),
                        None => "still on".into(),
                    },
                    esc(&fmt_duration(end - f.start))
                );
            }
            out.push_str("</tbody>\n</table>\n");
            if flags.len() > MAX_FLAG_ROWS {
                let _ = writeln!(
                    out,
                    "<p class=\"meta\">{} more flags not listed; the summary above counts them all.</p>",
                    flags.len() - MAX_FLAG_ROWS
                );
            }
            out.push_str("</details>\n");
        }
        if !trace.changes.is_empty() {
            out.push_str("<p class=\"meta\">Parameter changes:</p>\n<ol class=\"changes\">\n");
            for (t, text) in &trace.changes {
                let _ = writeln!(out, "<li>{}: {}</li>", esc(&fmt_time(*t, epoch)), esc(text));
            }
            out.push_str("</ol>\n");
        }
        out.push_str("</section>\n");
    }
    page_end(&mut out);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn downsampling_keeps_extremes_and_edges() {
        let n = 100_000;
        let times: Vec<f64> = (0..n).map(|i| i as f64).collect();
        let mut values: Vec<f64> = (0..n).map(|i| ((i as f64) * 0.01).sin()).collect();
        values[31_337] = 50.0;
        values[70_001] = -50.0;
        values[500] = f64::NAN;
        let keep = [12_345.5, 80_000.0];
        let idx = display_indices(&times, &values, 0.0, (n - 1) as f64, 900, &keep);
        assert!(idx.len() <= 4 * 900 + 4, "{}", idx.len());
        assert!(idx.windows(2).all(|w| w[0] < w[1]));
        for i in [31_337, 70_001, 12_345, 12_346, 79_999, 80_000, 0, n - 1] {
            assert!(idx.contains(&i), "{i} dropped");
        }
        assert!(!idx.contains(&500));
        // The drawn line breaks at the missing value and nowhere else.
        let lines = polylines(&times, &values, &idx, None);
        assert_eq!(lines.len(), 2);
    }

    #[test]
    fn short_series_are_kept_whole() {
        let times = [0.0, 1.0, 2.0, f64::NAN, 4.0];
        let values = [1.0, f64::NAN, 3.0, 4.0, 5.0];
        assert_eq!(
            display_indices(&times, &values, 0.0, 4.0, 100, &[]),
            vec![0, 2, 4]
        );
        assert!(display_indices(&[], &[], 0.0, 0.0, 0, &[1.0]).is_empty());
    }

    #[test]
    fn spans_widen_and_merge() {
        let m = merge_spans(vec![(5.0, 5.0), (5.2, 6.0), (10.0, 9.0), (20.0, 21.0)], 1.0);
        // (5.2, 6.0) is widened to (5.1, 6.1) and then overlaps the widened (5, 5).
        assert_eq!(m, vec![(4.5, 6.1), (9.0, 10.0), (20.0, 21.0)]);
    }

    #[test]
    fn band_outline_follows_both_edges() {
        let times: Vec<f64> = (0..10).map(f64::from).collect();
        let mut lower: Vec<f64> = times.iter().map(|t| t - 1.0).collect();
        let upper: Vec<f64> = times.iter().map(|t| t + 1.0).collect();
        lower[5] = f64::NAN;
        let polys = band_polygons(&times, &lower, &upper, 0.0, 9.0, 100, &[]);
        assert_eq!(polys.len(), 2);
        assert_eq!(polys[0].first(), Some(&(0.0, 1.0)));
        assert_eq!(polys[0].last(), Some(&(0.0, -1.0)));
        assert_eq!(polys[1].len(), 8);
    }

    #[test]
    fn utc_ticks_fall_on_round_clock_times() {
        let t0 = 1_772_409_600.0 + 37.0;
        let axis = XAxis::new(XKind::Utc, t0, t0 + 6.0 * 3600.0, 9);
        let ticks = axis.key_points(9usize);
        assert!(ticks.len() >= 4 && ticks.len() <= 9, "{ticks:?}");
        let step = ticks[1] - ticks[0];
        assert!(UTC_STEPS.contains(&step));
        assert!(ticks.iter().all(|t| t % step == 0.0));
        assert_eq!(axis.format_ext(&1_772_413_200.0), "01:00");
        assert_eq!(axis.format_ext(&1_772_409_600.0), "03-02");
        let secs = XAxis::new(XKind::Seconds, 0.0, 0.5, 6);
        assert_eq!(secs.format_ext(&0.1), "0.1");
        assert_eq!(
            XAxis::new(XKind::Lag, 0.5, 20.5, 10).key_points(10usize),
            vec![5.0, 10.0, 15.0, 20.0]
        );
        assert_eq!(
            XAxis::new(XKind::Lag, 0.5, 5.5, 10).key_points(10usize),
            vec![1.0, 2.0, 3.0, 4.0, 5.0]
        );
    }

    #[test]
    fn times_and_durations_read_well() {
        assert_eq!(fmt_time(1_772_409_600.0, true), "2026-03-02 00:00:00");
        assert_eq!(fmt_time(1_772_409_600.25, true), "2026-03-02 00:00:00.250");
        assert_eq!(fmt_time(12.5, false), "12.5 s");
        assert_eq!(fmt_duration(30.0), "30 s");
        assert_eq!(fmt_duration(600.0), "10.0 min");
        assert_eq!(fmt_duration(7200.0), "2.0 h");
        assert_eq!(
            esc("<a href='x'>&\"</a>"),
            "&lt;a href=&#39;x&#39;&gt;&amp;&quot;&lt;/a&gt;"
        );
    }

    #[test]
    fn replay_report_survives_bad_traces() {
        let traces = vec![
            ChannelTrace {
                channel: "odd <name> & co".into(),
                times: vec![3.0, f64::NAN, 1.0, 2.0],
                raw: vec![1.0, 2.0, f64::NAN],
                estimate: vec![1.0, 2.0, 3.0, 4.0],
                std: vec![f64::INFINITY, 0.1, 0.1, 0.1],
                flags: vec![FlagSpan {
                    kind: "stuck".into(),
                    severity: "warn".into(),
                    start: 2.5,
                    end: Some(1.0),
                }],
                changes: vec![(f64::NAN, "x".into())],
            },
            ChannelTrace::default(),
        ];
        let html = replay_report(&traces, "t");
        assert!(html.contains("odd &lt;name&gt; &amp; co"));
        assert!(html.ends_with("</html>\n"));
    }
}
