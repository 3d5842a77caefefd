//! Figures as SVG or PNG, chosen by the file extension.
//!
//! Each figure is a plain data struct (what to draw, in natural units, with
//! axis labels that carry units) implementing [`Figure`]; [`save`] draws it
//! with plotters on the SVG backend or on a pixel buffer encoded as PNG.
//! Text is laid out with the embedded DejaVu Sans in both, so an SVG and a
//! PNG of one figure look alike on any machine.

use plotters::coord::combinators::BindKeyPoints;
use plotters::coord::ranged1d::ValueFormatter;
use plotters::coord::Shift;
use plotters::prelude::*;
use std::path::Path;
use std::sync::OnceLock;

/// Why a figure could not be written.
#[derive(Debug, thiserror::Error)]
pub enum ChartError {
    /// The extension is neither `.svg` nor `.png`.
    #[error("{path}: cannot tell the format from the name; end it in .svg or .png")]
    Format {
        /// The path given.
        path: String,
    },
    /// Drawing failed.
    #[error("cannot draw {path}: {reason}")]
    Draw {
        /// The file.
        path: String,
        /// What went wrong.
        reason: String,
    },
    /// Writing the file failed.
    #[error("cannot write {path}: {error}")]
    Io {
        /// The file.
        path: String,
        /// The error.
        error: std::io::Error,
    },
}

/// Output format.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Scalable vector graphics.
    Svg,
    /// Portable network graphics (pixels).
    Png,
}

/// The format a path asks for by its extension (case-insensitive).
pub fn format_of(path: &Path) -> Result<Format, ChartError> {
    match path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("svg") => Ok(Format::Svg),
        Some("png") => Ok(Format::Png),
        _ => Err(ChartError::Format {
            path: path.display().to_string(),
        }),
    }
}

/// Something that can be drawn.
pub trait Figure {
    /// Width and height in pixels.
    fn size(&self) -> (u32, u32);
    /// Draws the figure on `root` (already sized).
    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static;
}

/// The font every figure uses.
const FONT: &str = "sans-serif";

/// Registers the embedded font with plotters (done by [`save`]; call it
/// before drawing on a backend of your own).
pub fn fonts() {
    static DONE: OnceLock<()> = OnceLock::new();
    DONE.get_or_init(|| {
        // The bundled font is a valid TrueType file; a failure here would
        // leave text out of PNGs, which the tests would catch.
        let _ = plotters::style::register_font(FONT, FontStyle::Normal, dejavu::sans::regular());
        let _ = plotters::style::register_font(FONT, FontStyle::Bold, dejavu::sans::bold());
    });
}

/// `fig` as SVG text.
pub fn svg_string(fig: &impl Figure) -> Result<String, ChartError> {
    fonts();
    let mut text = String::new();
    let err = |reason: String| ChartError::Draw {
        path: "(in memory)".into(),
        reason,
    };
    {
        let root = SVGBackend::with_string(&mut text, fig.size()).into_drawing_area();
        fig.draw(&root).map_err(err)?;
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(text)
}

/// Writes `fig` to `path` as SVG or PNG (by the extension).
pub fn save(fig: &impl Figure, path: &Path) -> Result<(), ChartError> {
    let format = format_of(path)?;
    fonts();
    let name = path.display().to_string();
    let draw_err = |reason: String| ChartError::Draw {
        path: name.clone(),
        reason,
    };
    let size = fig.size();
    match format {
        Format::Svg => {
            let mut text = String::new();
            {
                let root = SVGBackend::with_string(&mut text, size).into_drawing_area();
                fig.draw(&root).map_err(draw_err)?;
                root.present().map_err(|e| draw_err(e.to_string()))?;
            }
            std::fs::write(path, text).map_err(|error| ChartError::Io {
                path: name.clone(),
                error,
            })
        }
        Format::Png => {
            let (w, h) = size;
            let mut buf = vec![255u8; (w * h * 3) as usize];
            {
                let root = BitMapBackend::with_buffer(&mut buf, size).into_drawing_area();
                fig.draw(&root).map_err(draw_err)?;
                root.present().map_err(|e| draw_err(e.to_string()))?;
            }
            let file = std::fs::File::create(path).map_err(|error| ChartError::Io {
                path: name.clone(),
                error,
            })?;
            let mut enc = png::Encoder::new(std::io::BufWriter::new(file), w, h);
            enc.set_color(png::ColorType::Rgb);
            enc.set_depth(png::BitDepth::Eight);
            let io = |e: png::EncodingError| ChartError::Io {
                path: name.clone(),
                error: std::io::Error::other(e.to_string()),
            };
            let mut writer = enc.write_header().map_err(io)?;
            writer.write_image_data(&buf).map_err(io)?;
            writer.finish().map_err(io)
        }
    }
}

fn e2s<E: std::fmt::Display>(e: E) -> String {
    e.to_string()
}

// Our palette: muted and distinguishable in print.
/// Main line colour (ink blue).
pub const INK: RGBColor = RGBColor(31, 64, 122);
/// Band colour.
pub const BAND: RGBColor = RGBColor(150, 178, 214);
/// Observed points.
pub const DOTS: RGBColor = RGBColor(196, 84, 40);
/// Target band.
pub const TARGET: RGBColor = RGBColor(58, 140, 76);
/// Shading where the surrogate knows little.
pub const UNSURE: RGBColor = RGBColor(225, 225, 225);
/// Grey for secondary marks.
pub const GREY: RGBColor = RGBColor(120, 120, 120);

/// A colour on our sequential scale for `t` in [0, 1] (deep blue, teal,
/// sand): lightness rises steadily, so the order reads in grey print too.
pub fn ramp(t: f64) -> RGBColor {
    const STOPS: [(f64, [f64; 3]); 4] = [
        (0.0, [30.0, 40.0, 90.0]),
        (0.35, [40.0, 110.0, 140.0]),
        (0.7, [120.0, 180.0, 130.0]),
        (1.0, [245.0, 225.0, 150.0]),
    ];
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.0
    };
    for w in STOPS.windows(2) {
        let (t0, c0) = w[0];
        let (t1, c1) = w[1];
        if t <= t1 {
            let f = (t - t0) / (t1 - t0);
            let c = |k: usize| (c0[k] + f * (c1[k] - c0[k])).round() as u8;
            return RGBColor(c(0), c(1), c(2));
        }
    }
    RGBColor(245, 225, 150)
}

/// How an axis is spread.
#[derive(Clone, Debug, PartialEq)]
pub struct Axis {
    /// Label with unit, e.g. `"height_sd [um]"`.
    pub label: String,
    /// Lowest value shown.
    pub lo: f64,
    /// Highest value shown.
    pub hi: f64,
    /// Logarithmic axis.
    pub log: bool,
}

impl Axis {
    /// A linear or log axis over `[lo, hi]`, widened when empty.
    pub fn new(label: impl Into<String>, lo: f64, hi: f64, log: bool) -> Axis {
        let (mut lo, mut hi) = if lo <= hi { (lo, hi) } else { (hi, lo) };
        if !(lo.is_finite() && hi.is_finite()) {
            lo = 0.0;
            hi = 1.0;
        }
        let log = log && lo > 0.0;
        if hi - lo <= f64::EPSILON * hi.abs().max(1.0) {
            if log {
                lo /= 1.5;
                hi *= 1.5;
            } else {
                let pad = 0.5 * hi.abs().max(1e-9);
                lo -= pad;
                hi += pad;
            }
        }
        Axis {
            label: label.into(),
            lo,
            hi,
            log,
        }
    }

    /// The axis padded by `share` of its span on each side (in log space for log axes).
    pub fn padded(&self, share: f64) -> Axis {
        if self.log {
            let (a, b) = (self.lo.ln(), self.hi.ln());
            let p = (b - a) * share;
            Axis {
                lo: (a - p).exp(),
                hi: (b + p).exp(),
                ..self.clone()
            }
        } else {
            let p = (self.hi - self.lo) * share;
            Axis {
                lo: self.lo - p,
                hi: self.hi + p,
                ..self.clone()
            }
        }
    }

    /// Where `t` in [0, 1] falls on the axis.
    pub fn at(&self, t: f64) -> f64 {
        if self.log {
            (self.lo.ln() + t * (self.hi.ln() - self.lo.ln())).exp()
        } else {
            self.lo + t * (self.hi - self.lo)
        }
    }
}

/// A compact number for tick labels.
pub fn tick(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if !(1e-3..1e5).contains(&a) {
        return format!("{v:.1e}");
    }
    let s = format!("{:.4}", v);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    s.to_string()
}

/// Tick positions for a log axis over `[lo, hi]`: 1, 2 and 5 times powers
/// of ten, or finer steps (1 to 9) when the range spans less than a decade.
pub fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    if lo.is_nan() || hi.is_nan() || lo <= 0.0 || hi <= lo {
        return Vec::new();
    }
    let pick = |mantissas: &[f64]| -> Vec<f64> {
        let mut out = Vec::new();
        let mut e = lo.log10().floor() as i32 - 1;
        while 10f64.powi(e) <= hi * 10.0 && out.len() < 200 {
            for m in mantissas {
                let v = m * 10f64.powi(e);
                if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                    out.push(v);
                }
            }
            e += 1;
        }
        out
    };
    let coarse = pick(&[1.0, 2.0, 5.0]);
    if coarse.len() >= 3 {
        // At most about 8 labels: thin to powers of ten on long ranges.
        if coarse.len() > 9 {
            return pick(&[1.0]);
        }
        return coarse;
    }
    pick(&[1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0])
}

/// Calls `$body` with a chart whose axes are `$x` and `$y` (each linear or
/// logarithmic), so one drawing routine serves all four combinations.
macro_rules! with_axes {
    ($builder:expr, $x:expr, $y:expr, |$chart:ident| $body:expr) => {{
        let (x, y) = (&$x, &$y);
        match (x.log, y.log) {
            (false, false) => {
                let mut $chart = $builder
                    .build_cartesian_2d(x.lo..x.hi, y.lo..y.hi)
                    .map_err(e2s)?;
                $body
            }
            (true, false) => {
                let mut $chart = $builder
                    .build_cartesian_2d(
                        (x.lo..x.hi)
                            .log_scale()
                            .with_key_points(log_ticks(x.lo, x.hi)),
                        y.lo..y.hi,
                    )
                    .map_err(e2s)?;
                $body
            }
            (false, true) => {
                let mut $chart = $builder
                    .build_cartesian_2d(
                        x.lo..x.hi,
                        (y.lo..y.hi)
                            .log_scale()
                            .with_key_points(log_ticks(y.lo, y.hi)),
                    )
                    .map_err(e2s)?;
                $body
            }
            (true, true) => {
                let mut $chart = $builder
                    .build_cartesian_2d(
                        (x.lo..x.hi)
                            .log_scale()
                            .with_key_points(log_ticks(x.lo, x.hi)),
                        (y.lo..y.hi)
                            .log_scale()
                            .with_key_points(log_ticks(y.lo, y.hi)),
                    )
                    .map_err(e2s)?;
                $body
            }
        }
    }};
}

fn mesh<DB, X, Y>(
    chart: &mut ChartContext<'_, DB, Cartesian2d<X, Y>>,
    x: &Axis,
    y: &Axis,
    small: bool,
) -> Result<(), String>
where
    DB: DrawingBackend,
    X: plotters::coord::ranged1d::Ranged<ValueType = f64> + ValueFormatter<f64>,
    Y: plotters::coord::ranged1d::Ranged<ValueType = f64> + ValueFormatter<f64>,
{
    mesh_lines(chart, x, y, small, true)
}

fn mesh_lines<DB, X, Y>(
    chart: &mut ChartContext<'_, DB, Cartesian2d<X, Y>>,
    x: &Axis,
    y: &Axis,
    small: bool,
    lines: bool,
) -> Result<(), String>
where
    DB: DrawingBackend,
    X: plotters::coord::ranged1d::Ranged<ValueType = f64> + ValueFormatter<f64>,
    Y: plotters::coord::ranged1d::Ranged<ValueType = f64> + ValueFormatter<f64>,
{
    let size = if small { 11 } else { 14 };
    let (light, bold) = if lines {
        (
            RGBColor(238, 238, 238).into(),
            RGBColor(215, 215, 215).into(),
        )
    } else {
        (TRANSPARENT.into(), TRANSPARENT.into())
    };
    let light: ShapeStyle = light;
    let bold: ShapeStyle = bold;
    chart
        .configure_mesh()
        .light_line_style(light)
        .bold_line_style(bold)
        .x_desc(x.label.as_str())
        .y_desc(y.label.as_str())
        .x_labels(if small { 4 } else { 8 })
        .y_labels(if small { 4 } else { 7 })
        .x_label_formatter(&|v| tick(*v))
        .y_label_formatter(&|v| tick(*v))
        .label_style((FONT, size))
        .axis_desc_style((FONT, size + 1))
        .draw()
        .map_err(e2s)
}

/// One metric against one parameter: a curve with its band, observed
/// points, a target band and shaded stretches where the surrogate knows little.
#[derive(Clone, Debug, Default)]
pub struct CurvePlot {
    /// Title.
    pub title: String,
    /// The x axis (the parameter).
    pub x: Option<Axis>,
    /// Label of the y axis (metric with unit).
    pub y_label: String,
    /// `(x, mean, lower, upper)` along the curve.
    pub curve: Vec<(f64, f64, f64, f64)>,
    /// Label of the curve and band in the legend.
    pub curve_label: String,
    /// Observed points `(x, y)`.
    pub observed: Vec<(f64, f64)>,
    /// Label of the observed points.
    pub observed_label: String,
    /// A target: `(value, sd, label)`, drawn as a band `value +- sd`.
    pub target: Option<(f64, f64, String)>,
    /// Stretches of x where the surrogate knows little (shaded).
    pub unsure: Vec<(f64, f64)>,
    /// Keep the y axis inside these bounds.
    pub y_bounds: [Option<f64>; 2],
}

impl CurvePlot {
    fn y_axis(&self) -> Axis {
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        let mut take = |v: f64| {
            if v.is_finite() {
                lo = lo.min(v);
                hi = hi.max(v);
            }
        };
        for &(_, m, l, u) in &self.curve {
            take(m);
            take(l);
            take(u);
        }
        for &(_, y) in &self.observed {
            take(y);
        }
        if let Some((v, sd, _)) = &self.target {
            take(v - sd);
            take(v + sd);
        }
        let a = Axis::new(self.y_label.clone(), lo, hi, false).padded(0.06);
        Axis {
            lo: self.y_bounds[0].map_or(a.lo, |b| a.lo.max(b)),
            hi: self.y_bounds[1].map_or(a.hi, |b| a.hi.min(b)),
            ..a
        }
    }
}

impl Figure for CurvePlot {
    fn size(&self) -> (u32, u32) {
        (900, 560)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let x = self
            .x
            .clone()
            .unwrap_or_else(|| Axis::new("", 0.0, 1.0, false));
        let y = self.y_axis();
        let mut builder = ChartBuilder::on(root);
        builder
            .caption(&self.title, (FONT, 19))
            .margin(14)
            .x_label_area_size(48)
            .y_label_area_size(76);
        with_axes!(builder, x, y, |chart| {
            mesh(&mut chart, &x, &y, false)?;
            for &(a, b) in &self.unsure {
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(a, y.lo), (b, y.hi)],
                        UNSURE.mix(0.6).filled(),
                    )))
                    .map_err(e2s)?;
            }
            if let Some((v, sd, label)) = &self.target {
                let (lo, hi) = ((v - sd).max(y.lo), (v + sd).min(y.hi));
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(x.lo, lo), (x.hi, hi)],
                        TARGET.mix(0.18).filled(),
                    )))
                    .map_err(e2s)?
                    .label(label.as_str())
                    .legend(|(a, b)| {
                        Rectangle::new([(a, b - 5), (a + 18, b + 5)], TARGET.mix(0.3).filled())
                    });
                chart
                    .draw_series(LineSeries::new(
                        [(x.lo, *v), (x.hi, *v)],
                        TARGET.stroke_width(1),
                    ))
                    .map_err(e2s)?;
            }
            if !self.curve.is_empty() {
                let mut poly: Vec<(f64, f64)> = self
                    .curve
                    .iter()
                    .map(|&(x, _, _, u)| (x, u.clamp(y.lo, y.hi)))
                    .collect();
                poly.extend(
                    self.curve
                        .iter()
                        .rev()
                        .map(|&(x, _, l, _)| (x, l.clamp(y.lo, y.hi))),
                );
                chart
                    .draw_series(std::iter::once(Polygon::new(poly, BAND.mix(0.45).filled())))
                    .map_err(e2s)?;
                chart
                    .draw_series(LineSeries::new(
                        self.curve.iter().map(|&(x, m, _, _)| (x, m)),
                        INK.stroke_width(2),
                    ))
                    .map_err(e2s)?
                    .label(self.curve_label.as_str())
                    .legend(|(a, b)| PathElement::new([(a, b), (a + 18, b)], INK.stroke_width(2)));
            }
            if !self.observed.is_empty() {
                chart
                    .draw_series(
                        self.observed
                            .iter()
                            .filter(|(px, py)| {
                                (x.lo..=x.hi).contains(px) && (y.lo..=y.hi).contains(py)
                            })
                            .map(|&(px, py)| Circle::new((px, py), 3, DOTS.mix(0.75).filled())),
                    )
                    .map_err(e2s)?
                    .label(self.observed_label.as_str())
                    .legend(|(a, b)| Circle::new((a + 9, b), 3, DOTS.filled()));
            }
            chart
                .configure_series_labels()
                .background_style(WHITE.mix(0.85))
                .border_style(RGBColor(200, 200, 200))
                .label_font((FONT, 13))
                .position(SeriesLabelPosition::UpperRight)
                .draw()
                .map_err(e2s)?;
        });
        Ok(())
    }
}

/// A map of a metric over two parameters: the mean as colour with contour
/// lines, the sd beside it, observed points on both.
#[derive(Clone, Debug, Default)]
pub struct MapPlot {
    /// Title.
    pub title: String,
    /// The horizontal parameter.
    pub x: Option<Axis>,
    /// The vertical parameter.
    pub y: Option<Axis>,
    /// Grid x values (natural units; even on the axis's scale).
    pub xs: Vec<f64>,
    /// Grid y values.
    pub ys: Vec<f64>,
    /// Means, `mean[j][i]` at `(xs[i], ys[j])`.
    pub mean: Vec<Vec<f64>>,
    /// Sds, same layout.
    pub sd: Vec<Vec<f64>>,
    /// Metric label with unit.
    pub metric: String,
    /// Observed points.
    pub observed: Vec<(f64, f64)>,
}

/// Edges of grid cells around centres `v` (on a log or linear scale).
fn cell_edges(v: &[f64], log: bool) -> Vec<f64> {
    let f = |x: f64| if log { x.ln() } else { x };
    let g = |x: f64| if log { x.exp() } else { x };
    let n = v.len();
    if n == 0 {
        return Vec::new();
    }
    if n == 1 {
        return vec![v[0], v[0]];
    }
    let mut e = Vec::with_capacity(n + 1);
    e.push(g(f(v[0]) - 0.5 * (f(v[1]) - f(v[0]))));
    for k in 0..n - 1 {
        e.push(g(0.5 * (f(v[k]) + f(v[k + 1]))));
    }
    e.push(g(f(v[n - 1]) + 0.5 * (f(v[n - 1]) - f(v[n - 2]))));
    e
}

/// Contour segments of `z` (rows over `ys`, columns over `xs`) at `level`
/// by marching squares (Lorensen & Cline 1987, in two dimensions), with
/// linear interpolation along cell edges.
pub fn contour(xs: &[f64], ys: &[f64], z: &[Vec<f64>], level: f64) -> Vec<[(f64, f64); 2]> {
    let mut out = Vec::new();
    for j in 0..ys.len().saturating_sub(1) {
        for i in 0..xs.len().saturating_sub(1) {
            let c = [
                (xs[i], ys[j], z[j][i]),
                (xs[i + 1], ys[j], z[j][i + 1]),
                (xs[i + 1], ys[j + 1], z[j + 1][i + 1]),
                (xs[i], ys[j + 1], z[j + 1][i]),
            ];
            if c.iter().any(|p| !p.2.is_finite()) {
                continue;
            }
            let mut pts = Vec::new();
            for k in 0..4 {
                let (a, b) = (c[k], c[(k + 1) % 4]);
                if (a.2 < level) != (b.2 < level) {
                    let t = (level - a.2) / (b.2 - a.2);
                    pts.push((a.0 + t * (b.0 - a.0), a.1 + t * (b.1 - a.1)));
                }
            }
            if pts.len() == 2 {
                out.push([pts[0], pts[1]]);
            } else if pts.len() == 4 {
                out.push([pts[0], pts[1]]);
                out.push([pts[2], pts[3]]);
            }
        }
    }
    out
}

/// Round contour levels inside `[lo, hi]` (about `n` of them).
pub fn levels(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    if hi.is_nan() || lo.is_nan() || hi <= lo || n == 0 {
        return Vec::new();
    }
    let raw = (hi - lo) / n as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let mut v = (lo / step).ceil() * step;
    let mut out = Vec::new();
    while v < hi && out.len() < 4 * n {
        if v > lo {
            out.push(v);
        }
        v += step;
    }
    out
}

fn grid_range(z: &[Vec<f64>]) -> (f64, f64) {
    z.iter()
        .flatten()
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        })
}

impl MapPlot {
    #[allow(clippy::too_many_arguments)]
    fn panel<DB: DrawingBackend>(
        &self,
        area: &DrawingArea<DB, Shift>,
        x: &Axis,
        y: &Axis,
        z: &[Vec<f64>],
        title: &str,
        with_contours: bool,
    ) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        let (zlo, zhi) = grid_range(z);
        let span = if zhi > zlo { zhi - zlo } else { 1.0 };
        let (left, bar) = area.split_horizontally(area.dim_in_pixel().0.saturating_sub(90));
        let xe = cell_edges(&self.xs, x.log);
        let ye = cell_edges(&self.ys, y.log);
        let mut builder = ChartBuilder::on(&left);
        builder
            .caption(title, (FONT, 16))
            .margin(8)
            .x_label_area_size(44)
            .y_label_area_size(70);
        with_axes!(builder, x, y, |chart| {
            let mut cells = Vec::new();
            for (j, row) in z.iter().enumerate() {
                for (i, &v) in row.iter().enumerate() {
                    if i + 1 < xe.len() && j + 1 < ye.len() {
                        let c = ramp((v - zlo) / span);
                        cells.push(Rectangle::new(
                            [
                                (xe[i].clamp(x.lo, x.hi), ye[j].clamp(y.lo, y.hi)),
                                (xe[i + 1].clamp(x.lo, x.hi), ye[j + 1].clamp(y.lo, y.hi)),
                            ],
                            c.filled(),
                        ));
                    }
                }
            }
            chart.draw_series(cells).map_err(e2s)?;
            mesh_lines(&mut chart, x, y, true, false)?;
            if with_contours {
                for level in levels(zlo, zhi, 6) {
                    let segs = contour(&self.xs, &self.ys, z, level);
                    chart
                        .draw_series(
                            segs.into_iter().map(|s| {
                                PathElement::new(s.to_vec(), WHITE.mix(0.8).stroke_width(1))
                            }),
                        )
                        .map_err(e2s)?;
                }
            }
            chart
                .draw_series(
                    self.observed
                        .iter()
                        .filter(|(a, b)| (x.lo..=x.hi).contains(a) && (y.lo..=y.hi).contains(b))
                        .map(|&(a, b)| {
                            Circle::new((a, b), 3, ShapeStyle::from(&WHITE).stroke_width(1))
                        }),
                )
                .map_err(e2s)?;
            chart
                .draw_series(
                    self.observed
                        .iter()
                        .filter(|(a, b)| (x.lo..=x.hi).contains(a) && (y.lo..=y.hi).contains(b))
                        .map(|&(a, b)| Circle::new((a, b), 2, BLACK.filled())),
                )
                .map_err(e2s)?;
        });
        // Colour bar.
        let mut cb = ChartBuilder::on(&bar);
        cb.margin_top(36)
            .margin_bottom(52)
            .margin_right(8)
            .y_label_area_size(52);
        let mut c = cb
            .build_cartesian_2d(0.0..1.0, zlo..(zlo + span))
            .map_err(e2s)?;
        let steps = 60;
        c.draw_series((0..steps).map(|k| {
            let a = zlo + span * k as f64 / steps as f64;
            let b = zlo + span * (k + 1) as f64 / steps as f64;
            Rectangle::new(
                [(0.0, a), (1.0, b)],
                ramp(k as f64 / (steps - 1) as f64).filled(),
            )
        }))
        .map_err(e2s)?;
        c.configure_mesh()
            .disable_x_mesh()
            .disable_y_mesh()
            .disable_x_axis()
            .y_labels(5)
            .y_label_formatter(&|v| tick(*v))
            .label_style((FONT, 11))
            .draw()
            .map_err(e2s)?;
        Ok(())
    }
}

impl Figure for MapPlot {
    fn size(&self) -> (u32, u32) {
        (1200, 560)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let root = root.titled(&self.title, (FONT, 19)).map_err(e2s)?;
        let x = self
            .x
            .clone()
            .unwrap_or_else(|| Axis::new("", 0.0, 1.0, false));
        let y = self
            .y
            .clone()
            .unwrap_or_else(|| Axis::new("", 0.0, 1.0, false));
        let (a, b) = root.split_horizontally(root.dim_in_pixel().0 / 2);
        self.panel(
            &a,
            &x,
            &y,
            &self.mean,
            &format!("mean of {}", self.metric),
            true,
        )?;
        self.panel(
            &b,
            &x,
            &y,
            &self.sd,
            "sd of the mean (surrogate uncertainty)",
            false,
        )?;
        Ok(())
    }
}

/// A value with the ends of its interval: `(value, lo, hi)`.
pub type Estimate = (f64, f64, f64);

/// One histogram: its axis, the samples, an interval to shade.
pub type HistPanel = (Axis, Vec<f64>, Option<(f64, f64)>);

/// Sensitivity indices as bars with intervals: first order and total per parameter.
#[derive(Clone, Debug, Default)]
pub struct BarPlot {
    /// Title.
    pub title: String,
    /// Per parameter: name, first order `(value, lo, hi)`, total `(value, lo, hi)`.
    pub bars: Vec<(String, Estimate, Estimate)>,
}

impl Figure for BarPlot {
    fn size(&self) -> (u32, u32) {
        (900, (140 + 56 * self.bars.len().max(1)) as u32)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let n = self.bars.len().max(1);
        let width = self
            .bars
            .iter()
            .map(|b| b.0.chars().count())
            .max()
            .unwrap_or(4) as u32;
        let mut builder = ChartBuilder::on(root);
        builder
            .caption(&self.title, (FONT, 19))
            .margin(14)
            .x_label_area_size(44)
            .y_label_area_size(20 + 8 * width.min(30));
        let mut chart = builder
            .build_cartesian_2d(0.0..1.0, 0.0..n as f64)
            .map_err(e2s)?;
        let names: Vec<String> = self.bars.iter().map(|b| b.0.clone()).collect();
        chart
            .configure_mesh()
            .disable_y_mesh()
            .light_line_style(RGBColor(238, 238, 238))
            .x_desc("share of the metric's variance")
            .x_label_formatter(&|v| tick(*v))
            .y_labels(n * 2 + 1)
            .y_label_formatter(&|v| {
                let k = (n as f64 - v - 0.5).round();
                if (n as f64 - v - 0.5 - k).abs() < 1e-6 && k >= 0.0 && (k as usize) < names.len() {
                    names[k as usize].clone()
                } else {
                    String::new()
                }
            })
            .label_style((FONT, 13))
            .axis_desc_style((FONT, 14))
            .draw()
            .map_err(e2s)?;
        let total_style = RGBColor(150, 178, 214);
        for (k, (_, first, total)) in self.bars.iter().enumerate() {
            let row = n as f64 - k as f64 - 1.0;
            let bar = |(v, lo, hi): (f64, f64, f64), y0: f64, y1: f64, colour: RGBColor| {
                let v = v.clamp(0.0, 1.0);
                let mid = 0.5 * (y0 + y1);
                vec![
                    Rectangle::new([(0.0, y0), (v, y1)], colour.filled()).into_dyn(),
                    PathElement::new(
                        [(lo.clamp(0.0, 1.0), mid), (hi.clamp(0.0, 1.0), mid)],
                        BLACK.stroke_width(2),
                    )
                    .into_dyn(),
                ]
            };
            chart
                .draw_series(bar(*total, row + 0.52, row + 0.86, total_style))
                .map_err(e2s)?;
            chart
                .draw_series(bar(*first, row + 0.14, row + 0.48, INK))
                .map_err(e2s)?;
        }
        // Legend, drawn by hand in the top right.
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(0.0, -1.0), (0.0, -1.0)],
                INK.filled(),
            )))
            .map_err(e2s)?
            .label("first order (the parameter alone)")
            .legend(|(a, b)| Rectangle::new([(a, b - 5), (a + 18, b + 5)], INK.filled()));
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(0.0, -1.0), (0.0, -1.0)],
                total_style.filled(),
            )))
            .map_err(e2s)?
            .label("total (with its interactions)")
            .legend(move |(a, b)| {
                Rectangle::new([(a, b - 5), (a + 18, b + 5)], total_style.filled())
            });
        chart
            .configure_series_labels()
            .background_style(WHITE.mix(0.9))
            .border_style(RGBColor(200, 200, 200))
            .label_font((FONT, 13))
            .position(SeriesLabelPosition::LowerRight)
            .draw()
            .map_err(e2s)?;
        Ok(())
    }
}

/// Histograms, one panel per parameter, with an optional flat reference
/// (the prior) and shaded interval.
#[derive(Clone, Debug, Default)]
pub struct HistPanels {
    /// Title.
    pub title: String,
    /// Per panel: axis, samples, a shaded interval `[lo, hi]`.
    pub panels: Vec<HistPanel>,
    /// Draw the density of a uniform distribution over each axis (in its scale).
    pub uniform_reference: bool,
}

fn columns(n: usize) -> usize {
    match n {
        0..=1 => 1,
        2..=4 => 2,
        5..=9 => 3,
        _ => 4,
    }
}

impl Figure for HistPanels {
    fn size(&self) -> (u32, u32) {
        let c = columns(self.panels.len()) as u32;
        let r = self.panels.len().div_ceil(c as usize).max(1) as u32;
        (380 * c, 60 + 300 * r)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let root = root.titled(&self.title, (FONT, 19)).map_err(e2s)?;
        let c = columns(self.panels.len());
        let r = self.panels.len().div_ceil(c).max(1);
        let areas = root.split_evenly((r, c));
        for ((axis, v, shade), area) in self.panels.iter().zip(areas) {
            let bins = 30usize;
            let pos = |x: f64| -> f64 {
                if axis.log {
                    (x.ln() - axis.lo.ln()) / (axis.hi.ln() - axis.lo.ln())
                } else {
                    (x - axis.lo) / (axis.hi - axis.lo)
                }
            };
            let mut counts = vec![0usize; bins];
            let mut n = 0usize;
            for &x in v {
                let t = pos(x);
                if t.is_finite() && (0.0..=1.0).contains(&t) {
                    counts[((t * bins as f64) as usize).min(bins - 1)] += 1;
                    n += 1;
                }
            }
            // Density per unit of the axis's own scale (fraction per bin x bins).
            let dens: Vec<f64> = counts
                .iter()
                .map(|&k| {
                    if n == 0 {
                        0.0
                    } else {
                        k as f64 / n as f64 * bins as f64
                    }
                })
                .collect();
            let top = dens.iter().copied().fold(1.2, f64::max) * 1.1;
            let y = Axis::new("density (per unit of the axis)", 0.0, top, false);
            let mut builder = ChartBuilder::on(&area);
            builder
                .margin(10)
                .x_label_area_size(40)
                .y_label_area_size(50);
            with_axes!(builder, *axis, y, |chart| {
                mesh(&mut chart, axis, &y, true)?;
                if let Some((a, b)) = shade {
                    chart
                        .draw_series(std::iter::once(Rectangle::new(
                            [(*a, 0.0), (*b, top)],
                            TARGET.mix(0.12).filled(),
                        )))
                        .map_err(e2s)?;
                }
                chart
                    .draw_series(dens.iter().enumerate().map(|(k, &h)| {
                        Rectangle::new(
                            [
                                (axis.at(k as f64 / bins as f64), 0.0),
                                (axis.at((k + 1) as f64 / bins as f64), h),
                            ],
                            BAND.filled(),
                        )
                    }))
                    .map_err(e2s)?;
                if self.uniform_reference {
                    chart
                        .draw_series(LineSeries::new(
                            [(axis.lo, 1.0), (axis.hi, 1.0)],
                            GREY.stroke_width(1),
                        ))
                        .map_err(e2s)?;
                }
            });
        }
        Ok(())
    }
}

/// A pairs plot: posterior samples for each pair of parameters below the
/// diagonal, on top of the region not ruled out (grey), histograms on it.
#[derive(Clone, Debug, Default)]
pub struct PairsPlot {
    /// Title.
    pub title: String,
    /// One axis per parameter.
    pub axes: Vec<Axis>,
    /// Samples (natural units), one row per sample.
    pub samples: Vec<Vec<f64>>,
    /// Points of the region not ruled out (natural units).
    pub region: Vec<Vec<f64>>,
}

impl Figure for PairsPlot {
    fn size(&self) -> (u32, u32) {
        let d = self.axes.len().max(1) as u32;
        let cell = if d <= 3 {
            300
        } else if d <= 5 {
            230
        } else {
            170
        };
        (cell * d + 20, cell * d + 60)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let root = root.titled(&self.title, (FONT, 19)).map_err(e2s)?;
        let d = self.axes.len();
        if d == 0 {
            return Ok(());
        }
        let areas = root.split_evenly((d, d));
        for (k, area) in areas.into_iter().enumerate() {
            let (i, j) = (k / d, k % d);
            if j > i {
                continue;
            }
            let (x, y) = (&self.axes[j], &self.axes[i]);
            let mut builder = ChartBuilder::on(&area);
            builder
                .margin(6)
                .x_label_area_size(34)
                .y_label_area_size(44);
            if i == j {
                let column: Vec<f64> = self.samples.iter().map(|s| s[j]).collect();
                let h = HistPanels {
                    title: String::new(),
                    panels: vec![(x.clone(), column, None)],
                    uniform_reference: true,
                };
                h.draw(&area)?;
                continue;
            }
            with_axes!(builder, *x, *y, |chart| {
                mesh(&mut chart, x, y, true)?;
                chart
                    .draw_series(
                        self.region
                            .iter()
                            .map(|p| Circle::new((p[j], p[i]), 2, UNSURE.filled())),
                    )
                    .map_err(e2s)?;
                chart
                    .draw_series(
                        self.samples
                            .iter()
                            .map(|p| Circle::new((p[j], p[i]), 1, INK.mix(0.35).filled())),
                    )
                    .map_err(e2s)?;
            });
        }
        Ok(())
    }
}

/// Scatter panels of one quantity against each parameter, with an
/// optional horizontal line (a cutoff).
#[derive(Clone, Debug, Default)]
pub struct ScatterPanels {
    /// Title.
    pub title: String,
    /// Label of the y quantity.
    pub y_label: String,
    /// Per panel: axis and the x values.
    pub panels: Vec<(Axis, Vec<f64>)>,
    /// The y values (shared by all panels).
    pub ys: Vec<f64>,
    /// A horizontal line and its label.
    pub hline: Option<(f64, String)>,
    /// Upper end of the y axis (values above are drawn at it).
    pub y_max: Option<f64>,
}

impl Figure for ScatterPanels {
    fn size(&self) -> (u32, u32) {
        let c = columns(self.panels.len()) as u32;
        let r = self.panels.len().div_ceil(c as usize).max(1) as u32;
        (380 * c, 60 + 300 * r)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let root = root.titled(&self.title, (FONT, 19)).map_err(e2s)?;
        let c = columns(self.panels.len());
        let r = self.panels.len().div_ceil(c).max(1);
        let areas = root.split_evenly((r, c));
        let top = self.y_max.unwrap_or_else(|| {
            self.ys
                .iter()
                .copied()
                .filter(|v| v.is_finite())
                .fold(0.0, f64::max)
        });
        let y = Axis::new(self.y_label.clone(), 0.0, top, false).padded(0.03);
        for ((axis, xs), area) in self.panels.iter().zip(areas) {
            let mut builder = ChartBuilder::on(&area);
            builder
                .margin(10)
                .x_label_area_size(40)
                .y_label_area_size(50);
            with_axes!(builder, *axis, y, |chart| {
                mesh(&mut chart, axis, &y, true)?;
                chart
                    .draw_series(xs.iter().zip(&self.ys).map(|(&a, &b)| {
                        let colour = match &self.hline {
                            Some((h, _)) if b > *h => GREY.mix(0.35),
                            _ => INK.mix(0.6),
                        };
                        Circle::new((a, b.min(y.hi)), 2, colour.filled())
                    }))
                    .map_err(e2s)?;
                if let Some((h, label)) = &self.hline {
                    chart
                        .draw_series(LineSeries::new(
                            [(axis.lo, *h), (axis.hi, *h)],
                            DOTS.stroke_width(2),
                        ))
                        .map_err(e2s)?
                        .label(label.as_str())
                        .legend(|(a, b)| {
                            PathElement::new([(a, b), (a + 18, b)], DOTS.stroke_width(2))
                        });
                    chart
                        .configure_series_labels()
                        .background_style(WHITE.mix(0.85))
                        .label_font((FONT, 11))
                        .position(SeriesLabelPosition::UpperRight)
                        .draw()
                        .map_err(e2s)?;
                }
            });
        }
        Ok(())
    }
}

/// A value against the evaluation count: every point and the best so far.
#[derive(Clone, Debug, Default)]
pub struct ProgressPlot {
    /// Title.
    pub title: String,
    /// Label of the value with unit.
    pub y_label: String,
    /// `(evaluation number, value)` in order.
    pub points: Vec<(f64, f64)>,
    /// Smaller is better (for the best-so-far line).
    pub minimise: bool,
}

impl Figure for ProgressPlot {
    fn size(&self) -> (u32, u32) {
        (900, 480)
    }

    fn draw<DB: DrawingBackend>(&self, root: &DrawingArea<DB, Shift>) -> Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        root.fill(&WHITE).map_err(e2s)?;
        let (lo, hi) = self
            .points
            .iter()
            .map(|p| p.1)
            .filter(|v| v.is_finite())
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
                (a.min(v), b.max(v))
            });
        let n = self.points.iter().map(|p| p.0).fold(1.0, f64::max);
        let x = Axis::new("point (in the order run)", 0.0, n, false).padded(0.02);
        let y = Axis::new(self.y_label.clone(), lo, hi, false).padded(0.05);
        let mut builder = ChartBuilder::on(root);
        builder
            .caption(&self.title, (FONT, 19))
            .margin(14)
            .x_label_area_size(44)
            .y_label_area_size(76);
        with_axes!(builder, x, y, |chart| {
            mesh(&mut chart, &x, &y, false)?;
            chart
                .draw_series(
                    self.points
                        .iter()
                        .filter(|p| p.1.is_finite())
                        .map(|&(a, b)| Circle::new((a, b), 3, DOTS.mix(0.6).filled())),
                )
                .map_err(e2s)?
                .label("each point (mean of its runs)")
                .legend(|(a, b)| Circle::new((a + 9, b), 3, DOTS.filled()));
            let mut best = if self.minimise {
                f64::INFINITY
            } else {
                f64::NEG_INFINITY
            };
            let line: Vec<(f64, f64)> = self
                .points
                .iter()
                .filter(|p| p.1.is_finite())
                .map(|&(a, b)| {
                    best = if self.minimise {
                        best.min(b)
                    } else {
                        best.max(b)
                    };
                    (a, best)
                })
                .collect();
            chart
                .draw_series(LineSeries::new(line, INK.stroke_width(2)))
                .map_err(e2s)?
                .label("best so far")
                .legend(|(a, b)| PathElement::new([(a, b), (a + 18, b)], INK.stroke_width(2)));
            chart
                .configure_series_labels()
                .background_style(WHITE.mix(0.85))
                .border_style(RGBColor(200, 200, 200))
                .label_font((FONT, 13))
                .position(SeriesLabelPosition::UpperRight)
                .draw()
                .map_err(e2s)?;
        });
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formats_by_extension() {
        assert_eq!(format_of(Path::new("a.SVG")).ok(), Some(Format::Svg));
        assert_eq!(format_of(Path::new("a.png")).ok(), Some(Format::Png));
        assert!(format_of(Path::new("a.pdf")).is_err());
    }

    // Analytic: the 0.5 contour of z = x on the unit square is the line x = 0.5.
    #[test]
    fn contour_of_a_plane_is_a_line() {
        let xs = [0.0, 0.5, 1.0];
        let ys = [0.0, 1.0];
        let z = vec![vec![0.0, 0.5, 1.0], vec![0.0, 0.5, 1.0]];
        for seg in contour(&xs, &ys, &z, 0.25) {
            for p in seg {
                assert!((p.0 - 0.25).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn log_ticks_are_round_and_inside() {
        assert_eq!(
            log_ticks(0.1, 10.0),
            vec![0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0]
        );
        assert_eq!(log_ticks(0.5, 5.0), vec![0.5, 1.0, 2.0, 5.0]);
        assert_eq!(log_ticks(2.0, 4.0), vec![2.0, 3.0, 4.0]);
        assert_eq!(
            log_ticks(1e-3, 1e3),
            vec![1e-3, 1e-2, 0.1, 1.0, 10.0, 100.0, 1000.0]
        );
    }

    #[test]
    fn levels_are_round() {
        let l = levels(0.0, 1.0, 5);
        let want = [0.2, 0.4, 0.6, 0.8];
        assert_eq!(l.len(), want.len());
        for (a, b) in l.iter().zip(want) {
            assert!((a - b).abs() < 1e-12);
        }
    }
}
