//! The campaign report's plots: inline SVG drawn with plotters, from plain numbers.
//!
//! Owns: every chart of `tarn report` (its size, axes, colours and marks), the palette
//! the page shares with them, contour lines of a gridded energy (marching squares) and
//! the thinning that keeps a long campaign's plots small. Must not touch: the store,
//! files or the HTML around the charts; `html.rs` gathers the numbers and places the
//! charts.
//!
//! Every chart function returns one `<svg>` element as a string. Charts with nothing to
//! draw return a framed notice (see [`notice`]) whose text says why, so that a page never
//! carries an empty box without an explanation.

use plotters::coord::Shift;
use plotters::prelude::*;

/// Why a chart could not be drawn; plotters' drawing errors carry no more than a message.
#[derive(Debug, thiserror::Error)]
#[error("drawing a report chart: {0}")]
pub struct PlotError(String);

impl<E: std::error::Error + Send + Sync> From<DrawingAreaErrorKind<E>> for PlotError {
    fn from(e: DrawingAreaErrorKind<E>) -> Self {
        PlotError(e.to_string())
    }
}

/// Width and height of the half-width charts, in CSS pixels.
pub const SMALL: (u32, u32) = (600, 380);
/// Width and height of the full-width charts (the sample landscape).
pub const WIDE: (u32, u32) = (1000, 640);

/// The font family written into the SVG text; the page's own system-font stack, so that
/// chart text and page text match.
const FONT: &str =
    "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif";

/// Page background behind the charts.
pub const PAPER: RGBColor = RGBColor(0xfd, 0xfc, 0xf9);
/// Text and axes.
pub const INK: RGBColor = RGBColor(0x25, 0x32, 0x38);
/// Secondary text and grid lines.
pub const MUTED: RGBColor = RGBColor(0x6b, 0x78, 0x80);
/// Light grid lines.
const GRID: RGBColor = RGBColor(0xe6, 0xe4, 0xde);
/// Contour lines of the energy landscape.
const CONTOUR: RGBColor = RGBColor(0x8f, 0x9e, 0xa8);
/// The report's accent (a lake teal), used for single-series charts.
pub const ACCENT: RGBColor = RGBColor(0x2f, 0x6f, 0x73);

/// Distinct, calm colours for states, in order of state id (cycled).
const STATE_COLOURS: [RGBColor; 10] = [
    RGBColor(0x2f, 0x6f, 0x73), // lake teal
    RGBColor(0xc0, 0x7a, 0x35), // ochre
    RGBColor(0x6b, 0x5b, 0x95), // heather
    RGBColor(0x7d, 0x8f, 0x45), // moss
    RGBColor(0xb0, 0x4e, 0x3c), // rust
    RGBColor(0x3f, 0x6f, 0xa8), // slate blue
    RGBColor(0x9c, 0x5b, 0x7a), // plum
    RGBColor(0x4f, 0x8a, 0x66), // pine
    RGBColor(0x8a, 0x6e, 0x4b), // bark
    RGBColor(0x5c, 0x65, 0x6b), // granite
];

/// Anchors of the round ramp, early rounds first: deep blue, teal, moss, warm sand.
const ROUND_RAMP: [RGBColor; 4] = [
    RGBColor(0x26, 0x3d, 0x6e),
    RGBColor(0x2a, 0x85, 0x80),
    RGBColor(0x93, 0xb0, 0x4f),
    RGBColor(0xe2, 0xae, 0x3a),
];

/// The colour of state `index` (its position in the catalogue).
pub fn state_colour(index: usize) -> RGBColor {
    STATE_COLOURS[index % STATE_COLOURS.len()]
}

/// The colour of a round at position `t` in [0, 1] between the first and last round:
/// linear interpolation between the ramp's anchors.
pub fn round_colour(t: f64) -> RGBColor {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.0
    };
    let span = (ROUND_RAMP.len() - 1) as f64;
    let i = ((t * span).floor() as usize).min(ROUND_RAMP.len() - 2);
    let f = t * span - i as f64;
    let (a, b) = (ROUND_RAMP[i], ROUND_RAMP[i + 1]);
    let mix = |x: u8, y: u8| (f64::from(x) + f * (f64::from(y) - f64::from(x))).round() as u8;
    RGBColor(mix(a.0, b.0), mix(a.1, b.1), mix(a.2, b.2))
}

/// A colour as CSS `#rrggbb`, for legends drawn in HTML beside a chart.
pub fn css(c: RGBColor) -> String {
    format!("#{:02x}{:02x}{:02x}", c.0, c.1, c.2)
}

/// The CSS gradient of the round ramp, for the colour bar under the landscape.
pub fn round_ramp_css() -> String {
    let stops: Vec<String> = (0..=8)
        .map(|k| {
            let t = f64::from(k) / 8.0;
            format!("{} {:.1}%", css(round_colour(t)), 100.0 * t)
        })
        .collect();
    format!("linear-gradient(to right, {})", stops.join(", "))
}

/// A number for an axis tick: integers plainly up to 10⁴, then with k/M/G suffixes, and
/// otherwise at most three significant digits.
pub fn compact(v: f64) -> String {
    let a = v.abs();
    if a == 0.0 {
        return "0".into();
    }
    let trim = |s: String| {
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    };
    if a >= 1e9 {
        format!("{}G", trim(format!("{:.2}", v / 1e9)))
    } else if a >= 1e6 {
        format!("{}M", trim(format!("{:.2}", v / 1e6)))
    } else if a >= 1e4 {
        format!("{}k", trim(format!("{:.1}", v / 1e3)))
    } else if a >= 100.0 || v == v.trunc() {
        format!("{v:.0}")
    } else if a >= 1.0 {
        trim(format!("{v:.2}"))
    } else {
        trim(format!("{v:.3}"))
    }
}

/// A closed interval that plotters can draw: finite, with a non-zero width, padded by
/// `pad` of its width on both sides.
fn span(lo: f64, hi: f64, pad: f64) -> std::ops::Range<f64> {
    let (mut lo, mut hi) = if lo.is_finite() && hi.is_finite() && lo <= hi {
        (lo, hi)
    } else {
        (0.0, 1.0)
    };
    if hi - lo < 1e-12 * (1.0 + lo.abs()) {
        let w = if lo == 0.0 { 1.0 } else { 0.05 * lo.abs() };
        lo -= w;
        hi += w;
    }
    let w = hi - lo;
    (lo - pad * w)..(hi + pad * w)
}

/// Minimum and maximum of the finite values of an iterator (∞, −∞ when there is none).
fn bounds(values: impl Iterator<Item = f64>) -> (f64, f64) {
    values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        })
}

/// The text styles every chart shares.
struct Fonts;

impl Fonts {
    fn label() -> TextStyle<'static> {
        (FONT, 18).into_font().color(&INK)
    }
    fn tick() -> TextStyle<'static> {
        (FONT, 16).into_font().color(&MUTED)
    }
    fn note() -> TextStyle<'static> {
        (FONT, 19).into_font().color(&MUTED)
    }
}

/// Draws into a fresh SVG string of `size` and returns it.
fn svg(
    size: (u32, u32),
    draw: impl FnOnce(&DrawingArea<SVGBackend, Shift>) -> Result<(), PlotError>,
) -> Result<String, PlotError> {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, size).into_drawing_area();
        root.fill(&PAPER)?;
        draw(&root)?;
        root.present()?;
    }
    Ok(out)
}

/// Axis descriptions of a chart.
#[derive(Debug, Clone, Copy)]
pub struct Axes<'a> {
    /// Horizontal axis, with its unit.
    pub x: &'a str,
    /// Vertical axis, with its unit.
    pub y: &'a str,
}

/// A framed chart with axes but no data, carrying `message` in its middle: what the page
/// shows where there is nothing to plot, so the reader learns why.
pub fn notice(size: (u32, u32), axes: Axes, message: &str) -> Result<String, PlotError> {
    svg(size, |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(14)
            .x_label_area_size(48)
            .y_label_area_size(64)
            .build_cartesian_2d(0.0..1.0, 0.0..1.0)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(0)
            .y_labels(0)
            .x_desc(axes.x)
            .y_desc(axes.y)
            .axis_desc_style(Fonts::label())
            .axis_style(MUTED)
            .draw()?;
        chart.draw_series(std::iter::once(Text::new(
            message.to_string(),
            (0.5, 0.5),
            Fonts::note().pos(plotters::style::text_anchor::Pos::new(
                plotters::style::text_anchor::HPos::Center,
                plotters::style::text_anchor::VPos::Center,
            )),
        )))?;
        Ok(())
    })
}

/// The usual mesh: light grid, muted ticks, labelled axes, compact tick numbers.
fn mesh<DB: DrawingBackend>(
    chart: &mut ChartContext<
        DB,
        Cartesian2d<plotters::coord::types::RangedCoordf64, plotters::coord::types::RangedCoordf64>,
    >,
    axes: Axes,
    x_format: &dyn Fn(&f64) -> String,
    y_format: &dyn Fn(&f64) -> String,
) -> Result<(), PlotError>
where
    DB::ErrorType: 'static,
{
    chart
        .configure_mesh()
        .max_light_lines(0)
        .bold_line_style(GRID)
        .axis_style(MUTED)
        .x_desc(axes.x)
        .y_desc(axes.y)
        .axis_desc_style(Fonts::label())
        .label_style(Fonts::tick())
        .x_labels(8)
        .y_labels(7)
        .x_label_formatter(x_format)
        .y_label_formatter(y_format)
        .draw()
        .map_err(|e| PlotError(e.to_string()))
}

/// Tick labels of a count axis (rounds, states): whole numbers only (a tick at round
/// 2.5 means nothing).
fn whole_tick(v: &f64) -> String {
    if (v - v.round()).abs() < 1e-9 {
        format!("{v:.0}")
    } else {
        String::new()
    }
}

/// Tick labels of a continuous axis.
fn value_tick(v: &f64) -> String {
    compact(*v)
}

/// A chart builder with the report's margins and label areas.
fn builder<'a, 'b, DB: DrawingBackend>(
    root: &'a DrawingArea<DB, Shift>,
) -> ChartBuilder<'a, 'b, DB> {
    let mut b = ChartBuilder::on(root);
    b.margin(14)
        .margin_right(24)
        .x_label_area_size(50)
        .y_label_area_size(66);
    b
}

/// Points of a step function through `(x, y)` pairs sorted by x: the value holds until
/// the next x, where it jumps.
fn steps(points: &[(f64, f64)]) -> Vec<(f64, f64)> {
    let mut out = Vec::with_capacity(points.len() * 2);
    for (i, &(x, y)) in points.iter().enumerate() {
        if i > 0 {
            out.push((x, points[i - 1].1));
        }
        out.push((x, y));
    }
    out
}

/// Indices `0..n` thinned to at most `max` evenly spaced ones, always keeping the first
/// and the last, so that long campaigns draw a bounded number of marks.
pub fn thin(n: usize, max: usize) -> Vec<usize> {
    if n <= max {
        return (0..n).collect();
    }
    if max < 2 {
        return if max == 1 { vec![n - 1] } else { Vec::new() };
    }
    let mut out: Vec<usize> = (0..max)
        .map(|k| ((k as f64) * ((n - 1) as f64) / ((max - 1) as f64)).round() as usize)
        .collect();
    out.dedup();
    out
}

/// Discovery against rounds: the catalogue's size after each round, as steps, with a
/// mark on each round that found something. `rounds` holds (round, states after it,
/// new states in it).
pub fn discovery_by_round(rounds: &[(u32, u32, u32)], axes: Axes) -> Result<String, PlotError> {
    if rounds.is_empty() {
        return notice(SMALL, axes, "no round completed yet");
    }
    let mut pts: Vec<(f64, f64)> = vec![(f64::from(rounds[0].0) - 1.0, 0.0)];
    pts.extend(rounds.iter().map(|r| (f64::from(r.0), f64::from(r.1))));
    let (x0, x1) = bounds(pts.iter().map(|p| p.0));
    let (_, y1) = bounds(pts.iter().map(|p| p.1));
    svg(SMALL, |root| {
        let mut chart =
            builder(root).build_cartesian_2d(span(x0, x1, 0.02), 0.0..(y1.max(1.0) * 1.12))?;
        mesh(&mut chart, axes, &whole_tick, &whole_tick)?;
        chart.draw_series(LineSeries::new(steps(&pts), ACCENT.stroke_width(2)))?;
        let marks = rounds.iter().filter(|r| r.2 > 0);
        chart.draw_series(
            marks.map(|r| Circle::new((f64::from(r.0), f64::from(r.1)), 4, ACCENT.filled())),
        )?;
        Ok(())
    })
}

/// Discovery against cost: the number of states found against the cumulative energy
/// evaluations spent until each discovery (`costs`, one per state), up to `total`.
pub fn discovery_by_cost(costs: &[u64], total: u64, axes: Axes) -> Result<String, PlotError> {
    if costs.is_empty() {
        return notice(SMALL, axes, "no state found yet");
    }
    let mut sorted: Vec<f64> = costs.iter().map(|&c| c as f64).collect();
    sorted.sort_by(f64::total_cmp);
    let mut pts = vec![(0.0, 0.0)];
    pts.extend(sorted.iter().enumerate().map(|(i, &c)| (c, (i + 1) as f64)));
    let end = (total as f64).max(*sorted.last().unwrap_or(&0.0));
    pts.push((end, sorted.len() as f64));
    let n = sorted.len() as f64;
    svg(SMALL, |root| {
        let mut chart = builder(root).build_cartesian_2d(span(0.0, end, 0.02), 0.0..(n * 1.12))?;
        mesh(&mut chart, axes, &value_tick, &whole_tick)?;
        chart.draw_series(LineSeries::new(steps(&pts), ACCENT.stroke_width(2)))?;
        chart.draw_series(
            sorted
                .iter()
                .enumerate()
                .map(|(i, &c)| Circle::new((c, (i + 1) as f64), 4, ACCENT.filled())),
        )?;
        Ok(())
    })
}

/// One state's free-energy history for [`free_energies`].
#[derive(Debug, Clone)]
pub struct StateTrack {
    /// Position of the state in the catalogue (its colour).
    pub index: usize,
    /// (x, free energy in kT, error in kT) per estimate, in x order; x is the round
    /// for [`free_energies`] and the cumulative energy evaluations for
    /// [`free_energies_by_cost`].
    pub points: Vec<(f64, f64, Option<f64>)>,
}

/// A track's colour index and its finite (round, F, error) points.
type FiniteTrack = (usize, Vec<(f64, f64, f64)>);

/// The free energy of each state by round, with error bars (one standard error). Error
/// bars are thinned to at most 60 per state so that a long campaign stays light; the
/// line passes through every estimate.
pub fn free_energies(tracks: &[StateTrack], axes: Axes) -> Result<String, PlotError> {
    free_energy_tracks(tracks, axes, &whole_tick)
}

/// The same, against cumulative energy evaluations: the cost curve of the answer.
pub fn free_energies_by_cost(tracks: &[StateTrack], axes: Axes) -> Result<String, PlotError> {
    free_energy_tracks(tracks, axes, &value_tick)
}

fn free_energy_tracks(
    tracks: &[StateTrack],
    axes: Axes,
    x_tick: &dyn Fn(&f64) -> String,
) -> Result<String, PlotError> {
    let finite: Vec<FiniteTrack> = tracks
        .iter()
        .map(|t| {
            let pts = t
                .points
                .iter()
                .filter(|p| p.1.is_finite())
                .map(|p| {
                    let e = p.2.filter(|e| e.is_finite() && *e >= 0.0).unwrap_or(0.0);
                    (p.0, p.1, e)
                })
                .collect();
            (t.index, pts)
        })
        .filter(|(_, p): &(usize, Vec<_>)| !p.is_empty())
        .collect();
    if finite.is_empty() {
        return notice(SMALL, axes, "no free-energy estimate yet");
    }
    let all = || finite.iter().flat_map(|(_, p)| p.iter());
    let (x0, x1) = bounds(all().map(|p| p.0));
    let (y0, _) = bounds(all().map(|p| p.1 - p.2));
    let (_, y1) = bounds(all().map(|p| p.1 + p.2));
    svg(SMALL, |root| {
        let mut chart =
            builder(root).build_cartesian_2d(span(x0, x1, 0.04), span(y0.min(0.0), y1, 0.08))?;
        mesh(&mut chart, axes, x_tick, &value_tick)?;
        let dx = (x1 - x0).max(1.0) * 0.006;
        for (index, pts) in &finite {
            let colour = state_colour(*index);
            chart.draw_series(LineSeries::new(
                pts.iter().map(|p| (p.0, p.1)),
                colour.stroke_width(2),
            ))?;
            let keep = thin(pts.len(), 60);
            chart.draw_series(keep.iter().map(|&i| pts[i]).filter(|p| p.2 > 0.0).map(
                |(x, y, e)| {
                    PathElement::new(
                        vec![
                            (x - dx, y - e),
                            (x + dx, y - e),
                            (x, y - e),
                            (x, y + e),
                            (x - dx, y + e),
                            (x + dx, y + e),
                        ],
                        colour.stroke_width(1),
                    )
                },
            ))?;
            chart.draw_series(
                keep.iter()
                    .map(|&i| pts[i])
                    .map(|(x, y, _)| Circle::new((x, y), 3, colour.filled())),
            )?;
        }
        Ok(())
    })
}

/// The ESS fraction by round, with the campaign's ESS floor (a stop rule) as a dashed
/// line when it has one. Fractions span decades when a flow is poor, so below 0.02 the
/// axis is logarithmic (ticks still read as fractions).
pub fn ess_fraction(
    points: &[(u32, f64)],
    floor: Option<f64>,
    axes: Axes,
) -> Result<String, PlotError> {
    let pts: Vec<(f64, f64)> = points
        .iter()
        .filter(|p| p.1.is_finite() && p.1 > 0.0)
        .map(|p| (f64::from(p.0), p.1.min(1.0)))
        .collect();
    if pts.is_empty() {
        return notice(SMALL, axes, "no ESS fraction recorded yet");
    }
    let (x0, x1) = bounds(pts.iter().map(|p| p.0));
    let floor = floor.filter(|f| f.is_finite() && *f > 0.0 && *f <= 1.0);
    let (lo, _) = bounds(pts.iter().map(|p| p.1).chain(floor));
    let log = lo < 0.02;
    let map = |v: f64| if log { v.log10() } else { v };
    let y_range = if log {
        lo.log10().floor()..0.05
    } else {
        0.0..1.04
    };
    let fmt = move |v: &f64| {
        if log {
            compact(10f64.powf(*v))
        } else {
            compact(*v)
        }
    };
    svg(SMALL, |root| {
        let mut chart = builder(root).build_cartesian_2d(span(x0, x1, 0.04), y_range)?;
        mesh(&mut chart, axes, &whole_tick, &fmt)?;
        chart.draw_series(LineSeries::new(
            pts.iter().map(|p| (p.0, map(p.1))),
            ACCENT.stroke_width(2),
        ))?;
        let keep = thin(pts.len(), 200);
        chart.draw_series(
            keep.iter()
                .map(|&i| Circle::new((pts[i].0, map(pts[i].1)), 3, ACCENT.filled())),
        )?;
        if let Some(f) = floor {
            let (a, b) = (chart.x_range().start, chart.x_range().end);
            chart.draw_series(DashedLineSeries::new(
                [(a, map(f)), (b, map(f))],
                6,
                4,
                state_colour(4).stroke_width(2),
            ))?;
        }
        Ok(())
    })
}

/// Values of a function on a regular grid over a rectangle: `values[j * nx + i]` at
/// `x = x.0 + i (x.1 − x.0)/(nx − 1)`, `y = y.0 + j (y.1 − y.0)/(ny − 1)`.
#[derive(Debug, Clone)]
pub struct Grid {
    /// Points along x (at least 2).
    pub nx: usize,
    /// Points along y (at least 2).
    pub ny: usize,
    /// First and last x.
    pub x: (f64, f64),
    /// First and last y.
    pub y: (f64, f64),
    /// Row-major values, `nx * ny` of them; non-finite values cut lines.
    pub values: Vec<f64>,
}

impl Grid {
    /// The grid's points, row-major, as `[x, y]` pairs flattened (for a batched energy).
    pub fn points(nx: usize, ny: usize, x: (f64, f64), y: (f64, f64)) -> Vec<f64> {
        let mut out = Vec::with_capacity(nx * ny * 2);
        for j in 0..ny {
            for i in 0..nx {
                out.push(x.0 + (x.1 - x.0) * i as f64 / (nx - 1).max(1) as f64);
                out.push(y.0 + (y.1 - y.0) * j as f64 / (ny - 1).max(1) as f64);
            }
        }
        out
    }

    fn at(&self, i: usize, j: usize) -> f64 {
        self.values[j * self.nx + i]
    }

    fn coord(&self, i: f64, j: f64) -> (f64, f64) {
        (
            self.x.0 + (self.x.1 - self.x.0) * i / (self.nx - 1) as f64,
            self.y.0 + (self.y.1 - self.y.0) * j / (self.ny - 1) as f64,
        )
    }
}

/// Contour lines of `grid` at `level` by marching squares, chained into polylines.
///
/// Each cell edge that the level crosses gets one point (linear interpolation between
/// its ends); each cell joins its crossing points in pairs (the two saddle cases are
/// resolved by the cell's mean value), and segments sharing an edge point are chained.
/// A closed contour comes back with its first point repeated at the end. Cells with a
/// non-finite corner are skipped.
pub fn contour_lines(grid: &Grid, level: f64) -> Vec<Vec<(f64, f64)>> {
    if grid.nx < 2 || grid.ny < 2 || grid.values.len() != grid.nx * grid.ny {
        return Vec::new();
    }
    let (nx, ny) = (grid.nx, grid.ny);
    // Edge ids: horizontal edge from (i, j) to (i+1, j) is 2 (j nx + i); vertical edge
    // from (i, j) to (i, j+1) is 2 (j nx + i) + 1.
    let h = |i: usize, j: usize| 2 * (j * nx + i);
    let v = |i: usize, j: usize| 2 * (j * nx + i) + 1;
    let mut segments: Vec<(usize, usize)> = Vec::new();
    for j in 0..ny - 1 {
        for i in 0..nx - 1 {
            let c = [
                grid.at(i, j),
                grid.at(i + 1, j),
                grid.at(i + 1, j + 1),
                grid.at(i, j + 1),
            ];
            if c.iter().any(|x| !x.is_finite()) {
                continue;
            }
            let case = c
                .iter()
                .enumerate()
                .fold(0u8, |acc, (k, &x)| acc | (u8::from(x >= level) << k));
            // Edges of the cell: bottom, right, top, left.
            let (b, r, t, l) = (h(i, j), v(i + 1, j), h(i, j + 1), v(i, j));
            let centre_high = c.iter().sum::<f64>() / 4.0 >= level;
            let pairs: &[(usize, usize)] = match case {
                0 | 15 => &[],
                1 | 14 => &[(l, b)],
                2 | 13 => &[(b, r)],
                3 | 12 => &[(l, r)],
                4 | 11 => &[(r, t)],
                6 | 9 => &[(b, t)],
                7 | 8 => &[(l, t)],
                5 if centre_high => &[(l, t), (b, r)],
                5 => &[(l, b), (r, t)],
                10 if centre_high => &[(l, b), (r, t)],
                _ => &[(l, t), (b, r)],
            };
            segments.extend_from_slice(pairs);
        }
    }
    let point = |edge: usize| -> (f64, f64) {
        let cell = edge / 2;
        let (i, j) = (cell % nx, cell / nx);
        let (a, b, di, dj) = if edge.is_multiple_of(2) {
            (grid.at(i, j), grid.at(i + 1, j), 1.0, 0.0)
        } else {
            (grid.at(i, j), grid.at(i, j + 1), 0.0, 1.0)
        };
        let f = if b != a {
            ((level - a) / (b - a)).clamp(0.0, 1.0)
        } else {
            0.5
        };
        grid.coord(i as f64 + f * di, j as f64 + f * dj)
    };
    chain(&segments)
        .into_iter()
        .map(|line| line.into_iter().map(point).collect())
        .collect()
}

/// Chains segments between edge ids into paths: every edge id touches at most two
/// segments, so a walk from an end (or, for loops, from anywhere) visits each once.
fn chain(segments: &[(usize, usize)]) -> Vec<Vec<usize>> {
    use std::collections::HashMap;
    let mut at: HashMap<usize, Vec<usize>> = HashMap::new();
    for (k, &(a, b)) in segments.iter().enumerate() {
        at.entry(a).or_default().push(k);
        at.entry(b).or_default().push(k);
    }
    let mut used = vec![false; segments.len()];
    let mut lines = Vec::new();
    // Open lines first (start at an edge with one segment), then the loops that remain.
    let mut starts: Vec<usize> = at
        .iter()
        .filter(|(_, s)| s.len() == 1)
        .map(|(&e, _)| e)
        .collect();
    starts.sort_unstable();
    let walk = |start_edge: usize, used: &mut Vec<bool>| -> Vec<usize> {
        let mut line = vec![start_edge];
        let mut edge = start_edge;
        while let Some(&k) = at.get(&edge).and_then(|s| s.iter().find(|&&k| !used[k])) {
            used[k] = true;
            let (a, b) = segments[k];
            edge = if a == edge { b } else { a };
            line.push(edge);
        }
        line
    };
    for e in starts {
        if at[&e].iter().any(|&k| !used[k]) {
            lines.push(walk(e, &mut used));
        }
    }
    for k in 0..segments.len() {
        if !used[k] {
            lines.push(walk(segments[k].0, &mut used));
        }
    }
    lines
}

/// Contour levels for an energy grid: every `step` from the lowest grid value up to at
/// most `max_levels` levels, where `step` is a whole number of kT chosen so that the
/// levels cover the lower part of the landscape (up to its 70th percentile, at most
/// 24 kT above the minimum). Returns the levels and the step.
pub fn contour_levels(values: &[f64], kt: f64, max_levels: usize) -> (Vec<f64>, f64) {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
    if v.is_empty() || !(kt.is_finite() && kt > 0.0) || max_levels == 0 {
        return (Vec::new(), 0.0);
    }
    v.sort_by(f64::total_cmp);
    let lo = v[0];
    let p70 = v[(v.len() - 1) * 7 / 10];
    let top = (p70 - lo).min(24.0 * kt).max(kt);
    let step = kt * (top / kt / max_levels as f64).ceil().max(1.0);
    let n = ((top / step).floor() as usize).clamp(1, max_levels);
    (
        (1..=n).map(|k| lo + step * (k as f64 - 0.5)).collect(),
        step,
    )
}

/// What the landscape chart shows.
#[derive(Debug, Clone)]
pub struct Landscape<'a> {
    /// The energy on a grid over the plotted rectangle, or `None` (an external model).
    pub grid: Option<&'a Grid>,
    /// Contour levels in the system's energy unit.
    pub levels: &'a [f64],
    /// Samples as (x, y, round), in drawing order.
    pub samples: &'a [(f64, f64, u32)],
    /// Catalogue minima as (state id, x, y).
    pub minima: &'a [(u32, f64, f64)],
    /// First and last round, for the colour ramp.
    pub rounds: (u32, u32),
    /// The plotted rectangle.
    pub x: (f64, f64),
    /// The plotted rectangle.
    pub y: (f64, f64),
}

/// Explore samples coloured by round over the energy's contour lines, with the
/// catalogue's minima marked by their state ids.
pub fn landscape(l: &Landscape, axes: Axes) -> Result<String, PlotError> {
    if l.samples.is_empty() && l.minima.is_empty() {
        return notice(WIDE, axes, "no sample stored yet");
    }
    let (r0, r1) = l.rounds;
    let t = |r: u32| {
        if r1 > r0 {
            f64::from(r - r0.min(r)) / f64::from(r1 - r0)
        } else {
            1.0
        }
    };
    svg(WIDE, |root| {
        let mut chart = builder(root).build_cartesian_2d(l.x.0..l.x.1, l.y.0..l.y.1)?;
        mesh(&mut chart, axes, &value_tick, &value_tick)?;
        if let Some(grid) = l.grid {
            let n = l.levels.len().max(1) as f64;
            for (k, &level) in l.levels.iter().enumerate() {
                // Lower levels darker, so the basins read first.
                let alpha = 0.9 - 0.55 * (k as f64 / n);
                let style = CONTOUR.mix(alpha).stroke_width(1);
                chart.draw_series(
                    contour_lines(grid, level)
                        .into_iter()
                        .filter(|line| line.len() >= 2)
                        .map(|line| PathElement::new(line, style)),
                )?;
            }
        }
        chart.draw_series(
            l.samples
                .iter()
                .map(|&(x, y, r)| Circle::new((x, y), 2, round_colour(t(r)).mix(0.7).filled())),
        )?;
        for &(id, x, y) in l.minima {
            // The label sits on a paper-coloured plate up and right of the minimum, so
            // that it reads over a dense cloud of samples.
            let label = format!("state {id}");
            let width = 12 + (label.len() as i32) * 8;
            let mark = EmptyElement::at((x, y))
                + Circle::new((0, 0), 7, INK.stroke_width(2))
                + Rectangle::new([(9, -28), (9 + width, -8)], PAPER.mix(0.88).filled())
                + Rectangle::new([(9, -28), (9 + width, -8)], MUTED.mix(0.5).stroke_width(1))
                + Text::new(label, (14, -25), (FONT, 17).into_font().color(&INK));
            chart.draw_series(std::iter::once(mark))?;
        }
        Ok(())
    })
}

/// A 1-D free-energy profile for [`profile`].
#[derive(Debug, Clone)]
pub struct ProfileData {
    /// Bin centres along the collective variable.
    pub centers: Vec<f64>,
    /// Free energy per bin in kT (non-finite where the bin is empty).
    pub free_energy: Vec<f64>,
    /// Lower and upper ends of the error band per bin, if known.
    pub band: Option<(Vec<f64>, Vec<f64>)>,
    /// The reference profile on the same bins, if the campaign provides one.
    pub reference: Option<Vec<f64>>,
}

/// The 1-D profile with its error band (a shaded polygon per run of finite bins) and
/// its reference as a second line.
pub fn profile(p: &ProfileData, axes: Axes) -> Result<String, PlotError> {
    let n = p.centers.len();
    let est: Vec<(f64, f64)> = (0..n)
        .filter(|&i| p.free_energy.get(i).is_some_and(|f| f.is_finite()))
        .map(|i| (p.centers[i], p.free_energy[i]))
        .collect();
    if est.is_empty() {
        return notice(SMALL, axes, "the stored profile has no finite bin");
    }
    let reference: Vec<(f64, f64)> = p
        .reference
        .iter()
        .flat_map(|r| {
            (0..n.min(r.len()))
                .filter(|&i| r[i].is_finite())
                .map(|i| (p.centers[i], r[i]))
        })
        .collect();
    let band: Vec<(f64, f64, f64)> = p
        .band
        .iter()
        .flat_map(|(lo, hi)| {
            (0..n.min(lo.len()).min(hi.len()))
                .filter(|&i| lo[i].is_finite() && hi[i].is_finite())
                .map(|i| (p.centers[i], lo[i], hi[i]))
        })
        .collect();
    let (x0, x1) = bounds(p.centers.iter().copied());
    let ys = est
        .iter()
        .map(|q| q.1)
        .chain(reference.iter().map(|q| q.1))
        .chain(band.iter().flat_map(|b| [b.1, b.2]));
    let (y0, y1) = bounds(ys);
    svg(SMALL, |root| {
        let mut chart =
            builder(root).build_cartesian_2d(span(x0, x1, 0.02), span(y0.min(0.0), y1, 0.08))?;
        mesh(&mut chart, axes, &value_tick, &value_tick)?;
        if band.len() >= 2 {
            let mut poly: Vec<(f64, f64)> = band.iter().map(|b| (b.0, b.2)).collect();
            poly.extend(band.iter().rev().map(|b| (b.0, b.1)));
            chart.draw_series(std::iter::once(Polygon::new(
                poly,
                ACCENT.mix(0.18).filled(),
            )))?;
        }
        if !reference.is_empty() {
            chart.draw_series(LineSeries::new(
                reference.iter().copied(),
                state_colour(1).stroke_width(2),
            ))?;
        }
        chart.draw_series(LineSeries::new(est.iter().copied(), ACCENT.stroke_width(2)))?;
        chart.draw_series(est.iter().map(|&q| Circle::new(q, 2, ACCENT.filled())))?;
        Ok(())
    })
}
