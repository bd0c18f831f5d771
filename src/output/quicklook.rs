//! Quicklook images: one 2-D field drawn as a PNG on the model's own grid.
//!
//! In: a [`Quicklook`]: the field's values on the grid (NaN, or any other
//! non-finite value, where missing), the latitude and longitude of every grid
//! point, a title, a subtitle, the units and a [`Scale`]. Out: the bytes of an
//! 8-bit RGB PNG: a title band on top; the field drawn point by point, nearest
//! neighbour and north up, missing points in neutral grey, with a 10-degree
//! graticule traced where the grid's own coordinates cross a multiple of 10
//! (so a projected grid or a longitude seam needs nothing special); and a
//! horizontal colour bar with labelled ticks and the units at the bottom.
//! Nothing is reprojected, smoothed or read from disk: what is shown is what
//! the grid holds. These images are guidance for trained forecasters, not
//! warnings.

use ndarray::ArrayView2;

// Widest and tallest the map itself may be, in pixels.
const MAP_MAX_W: usize = 900;
const MAP_MAX_H: usize = 900;
/// The map is scaled up by a whole number of pixels per grid point until it
/// reaches at least this width, when that fits under [`MAP_MAX_W`].
const MAP_MIN_W: usize = 600;
/// Narrowest the area between the margins may be, so that the bands and the
/// colour bar have room whatever the grid.
const CONTENT_MIN_W: usize = 640;
/// Blank border on the left and right of the image.
const MARGIN: usize = 16;
/// Space left of and right of the colour bar for the end labels.
const BAR_INSET: usize = 40;
// Heights of the parts and the gaps between them, top to bottom.
const TOP_PAD: usize = 10;
const LINE_H: usize = 16;
const LINE_GAP: usize = 6;
const BAND_GAP: usize = 12;
const BAR_GAP: usize = 14;
const BAR_H: usize = 18;
const TICK_LEN: usize = 5;
const LABEL_GAP: usize = 4;
const BOTTOM_PAD: usize = 10;
/// Graticule spacing, degrees.
const GRATICULE_STEP: f64 = 10.0;

const BACKGROUND: [u8; 3] = [255, 255, 255];
const INK: [u8; 3] = [20, 20, 20];
const FRAME: [u8; 3] = [90, 90, 90];
/// Missing values: a neutral grey that neither colour map contains.
const MISSING: [u8; 3] = [150, 150, 150];

/// One field to draw.
#[derive(Debug, Clone, Copy)]
pub struct Quicklook<'a> {
    /// Values, (rows, columns) as on the model grid; row 0 is the first row of
    /// the grid as leeward stores it. NaN (or any non-finite value) is missing.
    pub values: ArrayView2<'a, f32>,
    /// Latitude of each grid point, degrees north; same shape.
    pub lat: ArrayView2<'a, f64>,
    /// Longitude of each grid point, degrees east, in any convention
    /// (-180..180 or 0..360); same shape.
    pub lon: ArrayView2<'a, f64>,
    /// First line of the top band, e.g. the quantity and its level.
    pub title: &'a str,
    /// Second line of the top band, e.g. valid time, cycle and lead time.
    pub subtitle: &'a str,
    /// Units written under the colour bar.
    pub units: &'a str,
    /// Colour map and range.
    pub scale: Scale,
}

/// Colour maps, both perceptually uniform, as the `colorous` crate provides them.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Palette {
    /// Viridis, dark blue-violet (low) to yellow (high).
    Sequential,
    /// The red-blue diverging map, run from blue (low) through near-white to
    /// red (high).
    Diverging,
}

/// Colour map and the range of values it spans. Values outside the range take
/// the colour of the nearer end.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Scale {
    /// Which colour map.
    pub palette: Palette,
    /// Value at the low end. `None`: from the data, the 2nd percentile of the
    /// valid values (sequential) or minus the larger magnitude of the 2nd and
    /// 98th percentiles (diverging, so the range is symmetric about 0); a
    /// diverging scale given only `max` takes `-max`.
    pub min: Option<f64>,
    /// Value at the high end. `None`: from the data, the 98th percentile
    /// (sequential) or the mirror of `min` (diverging).
    pub max: Option<f64>,
    /// Run the colour map the other way.
    pub reversed: bool,
}

impl Scale {
    /// A scale of `palette` whose range comes from the data.
    pub fn from_data(palette: Palette) -> Self {
        Scale {
            palette,
            min: None,
            max: None,
            reversed: false,
        }
    }
}

/// Draw `q` and return the PNG bytes (8-bit RGB).
///
/// Errors, never a panic: the three arrays differ in shape (the message names
/// the shapes), the grid is empty, or the scale's bounds are not finite, not
/// in order or too far apart for their difference to be a number.
pub fn render(q: &Quicklook<'_>) -> Result<Vec<u8>, String> {
    let shape = q.values.dim();
    if q.lat.dim() != shape || q.lon.dim() != shape {
        return Err(format!(
            "quicklook: shapes differ: values {:?}, lat {:?}, lon {:?}",
            shape,
            q.lat.dim(),
            q.lon.dim()
        ));
    }
    let (ny, nx) = shape;
    if ny == 0 || nx == 0 {
        return Err(format!("quicklook: empty grid {shape:?}"));
    }
    let (lo, hi) = colour_range(&q.values, &q.scale)?;
    let lay = layout(nx, ny);
    let mut img = Canvas::new(lay.width, lay.height, BACKGROUND);

    draw_bands(&mut img, &lay, q.title, q.subtitle);
    draw_map(&mut img, &lay, q, lo, hi);
    draw_colour_bar(&mut img, &lay, &q.scale, lo, hi, q.units);
    img.encode()
}

/// Colour of the lines and points drawn over a map: near-black, with a white edge.
const MARK: [u8; 3] = [10, 10, 10];
const MARK_EDGE: [u8; 3] = [255, 255, 255];

/// [`render`] with lines drawn over the map: each mark a polyline through
/// points given as (row, column) grid indices of the field, fractions allowed,
/// a dot at each point and a larger one at its last. A segment that jumps more
/// than half the grid's width (across the seam of a global grid) is not drawn.
pub fn render_with_marks(q: &Quicklook<'_>, marks: &[Vec<(f64, f64)>]) -> Result<Vec<u8>, String> {
    let shape = q.values.dim();
    if q.lat.dim() != shape || q.lon.dim() != shape {
        return Err(format!(
            "quicklook: shapes differ: values {:?}, lat {:?}, lon {:?}",
            shape,
            q.lat.dim(),
            q.lon.dim()
        ));
    }
    let (ny, nx) = shape;
    if ny == 0 || nx == 0 {
        return Err(format!("quicklook: empty grid {shape:?}"));
    }
    let (lo, hi) = colour_range(&q.values, &q.scale)?;
    let lay = layout(nx, ny);
    let mut img = Canvas::new(lay.width, lay.height, BACKGROUND);
    draw_bands(&mut img, &lay, q.title, q.subtitle);
    draw_map(&mut img, &lay, q, lo, hi);
    let flip = flip_rows(&q.lat);
    let to_px = |(j, i): (f64, f64)| {
        let row = if flip { (ny - 1) as f64 - j } else { j };
        (
            lay.map_x as f64 + (i + 0.5) * lay.map_w as f64 / nx as f64,
            lay.map_y as f64 + (row + 0.5) * lay.map_h as f64 / ny as f64,
        )
    };
    for mark in marks {
        for w in mark.windows(2) {
            if (w[1].1 - w[0].1).abs() <= nx as f64 / 2.0 {
                img.line(to_px(w[0]), to_px(w[1]), MARK);
            }
        }
        for (k, &p) in mark.iter().enumerate() {
            let r = if k + 1 == mark.len() { 4 } else { 2 };
            img.dot(to_px(p), r + 1, MARK_EDGE);
            img.dot(to_px(p), r, MARK);
        }
    }
    draw_colour_bar(&mut img, &lay, &q.scale, lo, hi, q.units);
    img.encode()
}

/// Where each part of the image goes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Layout {
    width: usize,
    height: usize,
    title_y: usize,
    subtitle_y: usize,
    map_x: usize,
    map_y: usize,
    map_w: usize,
    map_h: usize,
    bar_x: usize,
    bar_y: usize,
    bar_w: usize,
    label_y: usize,
    units_y: usize,
}

/// Pixel size of the map for a grid of `nx` columns and `ny` rows.
///
/// Grids that fit are drawn with a whole number of pixels per grid point in
/// both directions: the smallest that makes the map at least [`MAP_MIN_W`]
/// wide, or the largest under [`MAP_MAX_W`] (and [`MAP_MAX_H`] tall) if that
/// is less. A grid wider than [`MAP_MAX_W`] columns (or taller than
/// [`MAP_MAX_H`] rows) is drawn at that size, each pixel taking its nearest
/// grid point.
fn map_size(nx: usize, ny: usize) -> (usize, usize) {
    let fit = (MAP_MAX_W as f64 / nx as f64).min(MAP_MAX_H as f64 / ny as f64);
    if fit >= 1.0 {
        let most = fit.floor() as usize;
        let wanted = MAP_MIN_W.div_ceil(nx);
        let k = wanted.min(most).max(1);
        (nx * k, ny * k)
    } else {
        let w = ((nx as f64 * fit).round() as usize).clamp(1, MAP_MAX_W);
        let h = ((ny as f64 * fit).round() as usize).clamp(1, MAP_MAX_H);
        (w, h)
    }
}

fn layout(nx: usize, ny: usize) -> Layout {
    let (map_w, map_h) = map_size(nx, ny);
    let width = map_w.max(CONTENT_MIN_W) + 2 * MARGIN;
    let title_y = TOP_PAD;
    let subtitle_y = title_y + LINE_H + LINE_GAP;
    let map_y = subtitle_y + LINE_H + BAND_GAP;
    let bar_y = map_y + map_h + BAR_GAP;
    let label_y = bar_y + BAR_H + TICK_LEN + LABEL_GAP;
    let units_y = label_y + LINE_H + LINE_GAP;
    Layout {
        width,
        height: units_y + LINE_H + BOTTOM_PAD,
        title_y,
        subtitle_y,
        map_x: (width - map_w) / 2,
        map_y,
        map_w,
        map_h,
        bar_x: MARGIN + BAR_INSET,
        bar_y,
        bar_w: width - 2 * (MARGIN + BAR_INSET),
        label_y,
        units_y,
    }
}

// ---------------------------------------------------------------------------
// Range and colours

/// Quantile `p` (0..1) of `v`, linear between the order statistics at rank
/// p (n - 1) (the usual sample quantile, common practice). `v` is reordered;
/// it must not be empty or hold NaN.
fn quantile(v: &mut [f64], p: f64) -> f64 {
    let n = v.len();
    let rank = p.clamp(0.0, 1.0) * (n - 1) as f64;
    let k = (rank.floor() as usize).min(n - 1);
    let frac = rank - k as f64;
    let (_, &mut at_k, above) = v.select_nth_unstable_by(k, f64::total_cmp);
    if frac <= 0.0 || above.is_empty() {
        return at_k;
    }
    let next = above.iter().copied().fold(f64::INFINITY, f64::min);
    at_k + frac * (next - at_k)
}

/// 2nd and 98th percentiles of the finite values, `None` if there are none.
fn percentile_range(values: &ArrayView2<'_, f32>) -> Option<(f64, f64)> {
    let mut v: Vec<f64> = values
        .iter()
        .filter(|x| x.is_finite())
        .map(|&x| f64::from(x))
        .collect();
    if v.is_empty() {
        return None;
    }
    let lo = quantile(&mut v, 0.02);
    let hi = quantile(&mut v, 0.98);
    Some((lo, hi))
}

/// The values at the two ends of the colour map.
fn colour_range(values: &ArrayView2<'_, f32>, scale: &Scale) -> Result<(f64, f64), String> {
    for (name, b) in [("min", scale.min), ("max", scale.max)] {
        if let Some(x) = b {
            if !x.is_finite() {
                return Err(format!(
                    "quicklook: scale {name} is {x}, not a finite number"
                ));
            }
        }
    }
    if let (Some(a), Some(b)) = (scale.min, scale.max) {
        if a >= b {
            return Err(format!("quicklook: scale min {a} is not below max {b}"));
        }
    }
    let data = percentile_range(values);
    let (lo, hi) = match scale.palette {
        Palette::Sequential => {
            let (dlo, dhi) = data.unwrap_or((0.0, 1.0));
            (scale.min.unwrap_or(dlo), scale.max.unwrap_or(dhi))
        }
        Palette::Diverging => match (scale.min, scale.max) {
            (Some(a), Some(b)) => (a, b),
            (Some(a), None) => (a, -a),
            (_, Some(b)) => (-b, b),
            _ => {
                let a = data.map_or(1.0, |(l, h)| l.abs().max(h.abs()));
                (-a, a)
            }
        },
    };
    let (lo, hi) = widen(lo, hi, scale.min.is_some(), scale.max.is_some());
    if !(hi - lo).is_finite() {
        return Err(format!("quicklook: colour range {lo} to {hi} is too wide"));
    }
    Ok((lo, hi))
}

/// Make a degenerate range (a constant field, or one bound given on the far
/// side of the data) span something, keeping a bound that was given fixed and
/// otherwise the centre.
fn widen(lo: f64, hi: f64, fixed_lo: bool, fixed_hi: bool) -> (f64, f64) {
    let size = lo.abs().max(hi.abs());
    if hi > lo && hi - lo > size * 1e-9 {
        return (lo, hi);
    }
    let d = if size > 0.0 { 0.05 * size } else { 1.0 };
    match (fixed_lo, fixed_hi) {
        (true, false) => (lo, lo + 2.0 * d),
        (false, true) => (hi - 2.0 * d, hi),
        _ => {
            let c = 0.5 * (lo + hi);
            (c - d, c + d)
        }
    }
}

/// Colour at position `t` (0 low end, 1 high end) of the scale.
fn colour_at(scale: &Scale, t: f64) -> [u8; 3] {
    let t = t.clamp(0.0, 1.0);
    let t = if scale.reversed { 1.0 - t } else { t };
    let c = match scale.palette {
        Palette::Sequential => colorous::VIRIDIS.eval_continuous(t),
        // colorous's red-blue runs red (0) to blue (1): read it backwards so
        // that low values are blue.
        Palette::Diverging => colorous::RED_BLUE.eval_continuous(1.0 - t),
    };
    [c.r, c.g, c.b]
}

fn value_colour(scale: &Scale, v: f32, lo: f64, hi: f64) -> [u8; 3] {
    if !v.is_finite() {
        return MISSING;
    }
    colour_at(scale, (f64::from(v) - lo) / (hi - lo))
}

// ---------------------------------------------------------------------------
// Map and graticule

/// Whether the rows must be drawn last to first for north to be up: when the
/// mean latitude of the last row is above that of the first.
fn flip_rows(lat: &ArrayView2<'_, f64>) -> bool {
    let ny = lat.nrows();
    if ny < 2 {
        return false;
    }
    let mean = |r: usize| {
        let (s, n) = lat
            .row(r)
            .iter()
            .filter(|x| x.is_finite())
            .fold((0.0, 0usize), |(s, n), &x| (s + x, n + 1));
        (n > 0).then(|| s / n as f64)
    };
    matches!((mean(0), mean(ny - 1)), (Some(a), Some(b)) if b > a)
}

/// Wrap a longitude difference into [-180, 180].
fn wrap180(d: f64) -> f64 {
    d - 360.0 * (d / 360.0).round()
}

/// Nearest grid index for pixel `p` of `n_px` pixels showing `n` grid points.
fn nearest(p: usize, n_px: usize, n: usize) -> usize {
    (((p as f64 + 0.5) * n as f64 / n_px as f64) as usize).min(n - 1)
}

/// Fractional grid coordinate of the centre of pixel `p`, within [0, n - 1].
fn fractional(p: usize, n_px: usize, n: usize) -> f64 {
    ((p as f64 + 0.5) * n as f64 / n_px as f64 - 0.5).clamp(0.0, (n - 1) as f64)
}

/// Latitude and longitude at the centre of each map pixel, interpolated
/// bilinearly between the four surrounding grid points (longitudes unwrapped
/// about the first of them, so a seam between them does not matter).
fn pixel_coordinates(q: &Quicklook<'_>, lay: &Layout, flip: bool) -> (Vec<f64>, Vec<f64>) {
    let (ny, nx) = q.values.dim();
    let (w, h) = (lay.map_w, lay.map_h);
    let mut lat = vec![f64::NAN; w * h];
    let mut lon = vec![f64::NAN; w * h];
    let columns: Vec<(usize, usize, f64)> = (0..w)
        .map(|px| {
            let g = fractional(px, w, nx);
            let i0 = (g.floor() as usize).min(nx - 1);
            (i0, (i0 + 1).min(nx - 1), g - i0 as f64)
        })
        .collect();
    for py in 0..h {
        let gd = fractional(py, h, ny);
        let g = if flip { (ny - 1) as f64 - gd } else { gd };
        let j0 = (g.floor() as usize).min(ny - 1);
        let j1 = (j0 + 1).min(ny - 1);
        let fy = g - j0 as f64;
        for (px, &(i0, i1, fx)) in columns.iter().enumerate() {
            let bilinear = |a: f64, b: f64, c: f64, d: f64| {
                (1.0 - fy) * ((1.0 - fx) * a + fx * b) + fy * ((1.0 - fx) * c + fx * d)
            };
            let k = py * w + px;
            lat[k] = bilinear(
                q.lat[[j0, i0]],
                q.lat[[j0, i1]],
                q.lat[[j1, i0]],
                q.lat[[j1, i1]],
            );
            let base = q.lon[[j0, i0]];
            let un = |x: f64| base + wrap180(x - base);
            lon[k] = bilinear(
                base,
                un(q.lon[[j0, i1]]),
                un(q.lon[[j1, i0]]),
                un(q.lon[[j1, i1]]),
            );
        }
    }
    (lat, lon)
}

/// If a multiple of [`GRATICULE_STEP`] lies between coordinates `a` and `b`
/// of two neighbouring pixels: that multiple, and whether it is nearer `b`.
fn crossing(a: f64, b: f64) -> Option<(f64, bool)> {
    if !a.is_finite() || !b.is_finite() {
        return None;
    }
    let (ca, cb) = ((a / GRATICULE_STEP).floor(), (b / GRATICULE_STEP).floor());
    if ca == cb {
        return None;
    }
    let line = GRATICULE_STEP * ca.max(cb);
    Some((line, (b - line).abs() <= (a - line).abs()))
}

/// Map pixels the graticule passes through: for each pair of neighbouring
/// pixels, across and down, whose latitudes or longitudes straddle a
/// multiple of 10 degrees, the one nearer the line. The poles are points,
/// not parallels: a grid row at 90 N or S gets no line.
fn graticule_mask(lat: &[f64], lon: &[f64], w: usize, h: usize) -> Vec<bool> {
    let mut mask = vec![false; w * h];
    let mut mark = |a: usize, b: usize| {
        let parallel = crossing(lat[a], lat[b]).filter(|&(line, _)| line.abs() < 90.0);
        let lon_b = lon[a] + wrap180(lon[b] - lon[a]);
        for (_, nearer_b) in [parallel, crossing(lon[a], lon_b)].into_iter().flatten() {
            mask[if nearer_b { b } else { a }] = true;
        }
    };
    for y in 0..h {
        for x in 0..w {
            let k = y * w + x;
            if x + 1 < w {
                mark(k, k + 1);
            }
            if y + 1 < h {
                mark(k, k + w);
            }
        }
    }
    mask
}

/// A graticule pixel over `c`: lightened over dark colours, darkened over light.
fn graticule_colour(c: [u8; 3]) -> [u8; 3] {
    let y = 0.2126 * f64::from(c[0]) + 0.7152 * f64::from(c[1]) + 0.0722 * f64::from(c[2]);
    let (target, amount) = if y > 140.0 { (0.0, 0.55) } else { (255.0, 0.6) };
    c.map(|v| (f64::from(v) + amount * (target - f64::from(v))).round() as u8)
}

fn draw_map(img: &mut Canvas, lay: &Layout, q: &Quicklook<'_>, lo: f64, hi: f64) {
    let (ny, nx) = q.values.dim();
    let flip = flip_rows(&q.lat);
    let (w, h) = (lay.map_w, lay.map_h);
    let columns: Vec<usize> = (0..w).map(|px| nearest(px, w, nx)).collect();
    let (lat, lon) = pixel_coordinates(q, lay, flip);
    let mask = graticule_mask(&lat, &lon, w, h);
    for py in 0..h {
        let rd = nearest(py, h, ny);
        let r = if flip { ny - 1 - rd } else { rd };
        for (px, &c) in columns.iter().enumerate() {
            let mut colour = value_colour(&q.scale, q.values[[r, c]], lo, hi);
            if mask[py * w + px] {
                colour = graticule_colour(colour);
            }
            img.set(lay.map_x + px, lay.map_y + py, colour);
        }
    }
    img.frame(lay.map_x, lay.map_y, w, h, FRAME);
}

// ---------------------------------------------------------------------------
// Colour bar, ticks and labels

/// Tick values for the range `lo..hi`: the multiples of the largest step of
/// 1, 2, 2.5 or 5 times a power of ten that gives at least five in the range
/// (common practice), with that step. Five evenly spaced values if no such
/// step is found (a range beyond the resolution of the numbers).
fn ticks(lo: f64, hi: f64) -> (Vec<f64>, f64) {
    let span = hi - lo;
    if span > 0.0 && span.is_finite() {
        let mut e = span.log10().floor() as i32 + 1;
        for _ in 0..8 {
            for m in [5.0, 2.5, 2.0, 1.0] {
                let step = m * 10f64.powi(e);
                let k0 = (lo / step - 1e-9).ceil();
                let k1 = (hi / step + 1e-9).floor();
                let n = k1 - k0 + 1.0;
                if (5.0..=40.0).contains(&n) {
                    let values = (0..n as usize).map(|i| (k0 + i as f64) * step).collect();
                    return (values, step);
                }
            }
            e -= 1;
        }
    }
    let step = span / 4.0;
    ((0..5).map(|i| lo + i as f64 * step).collect(), step)
}

/// Label of tick `v` on a scale of ticks `step` apart: as many decimals as
/// the step needs, scientific notation for very large or small numbers.
fn tick_label(v: f64, step: f64) -> String {
    let v = if v.abs() < step.abs() * 1e-6 { 0.0 } else { v };
    let step = step.abs();
    if !(1e-4..1e7).contains(&step) || v.abs() >= 1e8 {
        return format!("{v:.2e}");
    }
    let decimals = (0..=6)
        .find(|&d| {
            let s = step * 10f64.powi(d);
            (s - s.round()).abs() < 1e-6 * s.max(1.0)
        })
        .unwrap_or(6) as usize;
    format!("{v:.decimals$}")
}

fn draw_colour_bar(img: &mut Canvas, lay: &Layout, scale: &Scale, lo: f64, hi: f64, units: &str) {
    let (x0, w) = (lay.bar_x, lay.bar_w);
    for x in 0..w {
        let c = colour_at(scale, (x as f64 + 0.5) / w as f64);
        for y in 0..BAR_H {
            img.set(x0 + x, lay.bar_y + y, c);
        }
    }
    img.frame(x0, lay.bar_y, w, BAR_H, FRAME);

    let (values, step) = ticks(lo, hi);
    let xs: Vec<usize> = values
        .iter()
        .map(|&v| {
            let t = ((v - lo) / (hi - lo)).clamp(0.0, 1.0);
            x0 + ((t * w as f64) as usize).min(w - 1)
        })
        .collect();
    for &x in &xs {
        for y in 0..TICK_LEN {
            img.set(x, lay.bar_y + BAR_H + y, INK);
        }
    }
    let labels: Vec<String> = values.iter().map(|&v| tick_label(v, step)).collect();
    // Large digits when neighbouring labels do not touch, else small ones;
    // small labels that would still touch the last one drawn are left out.
    let fits = |scale: usize| {
        xs.windows(2).zip(labels.windows(2)).all(|(x, l)| {
            let half = (text_width(&l[0], scale) + text_width(&l[1], scale)) / 2;
            x[1].saturating_sub(x[0]) >= half + 8
        })
    };
    let size = if fits(2) { 2 } else { 1 };
    let mut right_of_last = 0usize;
    for (&x, label) in xs.iter().zip(&labels) {
        let tw = text_width(label, size);
        let left = x
            .saturating_sub(tw / 2)
            .min(img.w.saturating_sub(tw + 2))
            .max(2);
        if left < right_of_last + 8 && right_of_last > 0 {
            continue;
        }
        let dy = (LINE_H - 8 * size) / 2;
        img.text(left, lay.label_y + dy, label, size, INK);
        right_of_last = left + tw;
    }
    draw_line(img, lay.units_y, units, Align::Centre);
}

// ---------------------------------------------------------------------------
// Text

fn draw_bands(img: &mut Canvas, lay: &Layout, title: &str, subtitle: &str) {
    draw_line(img, lay.title_y, title, Align::Left);
    draw_line(img, lay.subtitle_y, subtitle, Align::Left);
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Align {
    Left,
    Centre,
}

/// One line of text in a band [`LINE_H`] tall at `y`: large glyphs if it fits
/// between the margins, small ones if not, cut short with "..." if even that
/// is too long.
fn draw_line(img: &mut Canvas, y: usize, s: &str, align: Align) {
    let room = img.w.saturating_sub(2 * MARGIN);
    let (text, size) = fit_text(s, room);
    let tw = text_width(&text, size);
    let x = match align {
        Align::Left => MARGIN,
        Align::Centre => (img.w.saturating_sub(tw)) / 2,
    };
    img.text(x, y + (LINE_H - 8 * size) / 2, &text, size, INK);
}

fn fit_text(s: &str, room: usize) -> (String, usize) {
    let clean: String = s
        .chars()
        .map(|c| if c.is_control() { ' ' } else { c })
        .collect();
    for size in [2, 1] {
        if text_width(&clean, size) <= room {
            return (clean, size);
        }
    }
    let keep = (room / 8).saturating_sub(3);
    let mut cut: String = clean.chars().take(keep).collect();
    cut.push_str("...");
    (cut, 1)
}

fn text_width(s: &str, size: usize) -> usize {
    s.chars().count() * 8 * size
}

/// The 8x8 bitmap of `c`: the public-domain font of the `font8x8` crate for
/// Basic Latin and Latin-1 (which has the degree sign and superscripts 1 to
/// 3), with other superscript digits and minus signs read as their plain
/// forms and anything else as '?'. Row by row, bit 0 the leftmost pixel.
fn glyph(c: char) -> [u8; 8] {
    use font8x8::legacy::{BASIC_LEGACY, LATIN_LEGACY};
    let c = match c {
        '\u{2070}' => '0',
        '\u{2074}'..='\u{2079}' => char::from(b'4' + (c as u32 - 0x2074) as u8),
        '\u{207B}' | '\u{2212}' | '\u{2010}'..='\u{2014}' => '-',
        _ => c,
    };
    match c as u32 {
        cp @ 0x20..=0x7E => BASIC_LEGACY[cp as usize],
        cp @ 0xA0..=0xFF => LATIN_LEGACY[(cp - 0xA0) as usize],
        _ => BASIC_LEGACY[usize::from(b'?')],
    }
}

// ---------------------------------------------------------------------------
// Pixels

struct Canvas {
    w: usize,
    h: usize,
    rgb: Vec<u8>,
}

impl Canvas {
    fn new(w: usize, h: usize, background: [u8; 3]) -> Self {
        Canvas {
            w,
            h,
            rgb: background.repeat(w * h),
        }
    }

    /// Set one pixel; outside the image, nothing.
    fn set(&mut self, x: usize, y: usize, c: [u8; 3]) {
        if x < self.w && y < self.h {
            let k = 3 * (y * self.w + x);
            self.rgb[k..k + 3].copy_from_slice(&c);
        }
    }

    /// A line of width 2 from `a` to `b` (pixel coordinates), a point every half pixel.
    fn line(&mut self, a: (f64, f64), b: (f64, f64), c: [u8; 3]) {
        let n = (2.0 * (b.0 - a.0).abs().max((b.1 - a.1).abs()))
            .ceil()
            .max(1.0) as usize;
        for k in 0..=n {
            let t = k as f64 / n as f64;
            let (x, y) = (a.0 + t * (b.0 - a.0), a.1 + t * (b.1 - a.1));
            if x >= 0.0 && y >= 0.0 {
                let (x, y) = (x as usize, y as usize);
                self.set(x, y, c);
                self.set(x + 1, y, c);
            }
        }
    }

    /// A filled disc of radius `r` pixels about `p`.
    fn dot(&mut self, p: (f64, f64), r: i64, c: [u8; 3]) {
        let (cx, cy) = (p.0.round() as i64, p.1.round() as i64);
        for dy in -r..=r {
            for dx in -r..=r {
                if dx * dx + dy * dy <= r * r && cx + dx >= 0 && cy + dy >= 0 {
                    self.set((cx + dx) as usize, (cy + dy) as usize, c);
                }
            }
        }
    }

    /// A one-pixel outline just outside the rectangle.
    fn frame(&mut self, x: usize, y: usize, w: usize, h: usize, c: [u8; 3]) {
        let (left, top) = (x.wrapping_sub(1), y.wrapping_sub(1));
        for i in 0..w + 2 {
            self.set(left.wrapping_add(i), top, c);
            self.set(left.wrapping_add(i), y + h, c);
        }
        for j in 0..h + 2 {
            self.set(left, top.wrapping_add(j), c);
            self.set(x + w, top.wrapping_add(j), c);
        }
    }

    fn text(&mut self, x: usize, y: usize, s: &str, size: usize, c: [u8; 3]) {
        for (i, ch) in s.chars().enumerate() {
            let g = glyph(ch);
            let gx = x + i * 8 * size;
            for (row, bits) in g.iter().enumerate() {
                for col in 0..8 {
                    if bits & (1 << col) != 0 {
                        for dy in 0..size {
                            for dx in 0..size {
                                self.set(gx + col * size + dx, y + row * size + dy, c);
                            }
                        }
                    }
                }
            }
        }
    }

    fn encode(&self) -> Result<Vec<u8>, String> {
        let w = u32::try_from(self.w).map_err(|_| format!("quicklook: width {}", self.w))?;
        let h = u32::try_from(self.h).map_err(|_| format!("quicklook: height {}", self.h))?;
        let mut out = Vec::new();
        let mut enc = png::Encoder::new(&mut out, w, h);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut writer = enc
            .write_header()
            .map_err(|e| format!("quicklook: PNG header: {e}"))?;
        writer
            .write_image_data(&self.rgb)
            .map_err(|e| format!("quicklook: PNG data: {e}"))?;
        writer
            .finish()
            .map_err(|e| format!("quicklook: PNG end: {e}"))?;
        Ok(out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    /// A decoded image.
    struct Image {
        w: usize,
        h: usize,
        rgb: Vec<u8>,
    }

    impl Image {
        fn px(&self, x: usize, y: usize) -> [u8; 3] {
            let k = 3 * (y * self.w + x);
            [self.rgb[k], self.rgb[k + 1], self.rgb[k + 2]]
        }
    }

    /// Decode with the `png` crate's own decoder: 8-bit RGB is required.
    fn decode(bytes: &[u8]) -> Image {
        let mut reader = png::Decoder::new(std::io::Cursor::new(bytes))
            .read_info()
            .expect("PNG header");
        let mut buf = vec![0; reader.output_buffer_size().expect("buffer size")];
        let info = reader.next_frame(&mut buf).expect("PNG frame");
        assert_eq!(info.color_type, png::ColorType::Rgb);
        assert_eq!(info.bit_depth, png::BitDepth::Eight);
        buf.truncate(info.buffer_size());
        Image {
            w: info.width as usize,
            h: info.height as usize,
            rgb: buf,
        }
    }

    /// Regular lat/lon grid: row r at lat0 + r dlat, column c at lon0 + c dlon.
    fn latlon(
        ny: usize,
        nx: usize,
        lat0: f64,
        dlat: f64,
        lon0: f64,
        dlon: f64,
    ) -> (Array2<f64>, Array2<f64>) {
        (
            Array2::from_shape_fn((ny, nx), |(r, _)| lat0 + r as f64 * dlat),
            Array2::from_shape_fn((ny, nx), |(_, c)| lon0 + c as f64 * dlon),
        )
    }

    fn draw(values: &Array2<f32>, lat: &Array2<f64>, lon: &Array2<f64>, scale: Scale) -> Image {
        let q = Quicklook {
            values: values.view(),
            lat: lat.view(),
            lon: lon.view(),
            title: "Test field",
            subtitle: "valid 2026-03-14 06:00 UTC",
            units: "K",
            scale,
        };
        decode(&render(&q).expect("render"))
    }

    fn viridis() -> Scale {
        Scale::from_data(Palette::Sequential)
    }

    /// 1001 evenly spaced samples of the scale's colour map, low end first.
    fn samples(scale: &Scale) -> &'static [[u8; 3]] {
        use std::sync::OnceLock;
        static SAMPLES: OnceLock<Vec<Vec<[u8; 3]>>> = OnceLock::new();
        let all = SAMPLES.get_or_init(|| {
            [Palette::Sequential, Palette::Diverging]
                .iter()
                .flat_map(|&palette| [false, true].map(move |reversed| (palette, reversed)))
                .map(|(palette, reversed)| {
                    let s = Scale {
                        reversed,
                        ..Scale::from_data(palette)
                    };
                    (0..=1000)
                        .map(|i| colour_at(&s, i as f64 / 1000.0))
                        .collect()
                })
                .collect()
        });
        let p = usize::from(scale.palette == Palette::Diverging);
        &all[2 * p + usize::from(scale.reversed)]
    }

    /// Position (0..=1000) of the nearest of 1001 samples of the scale's
    /// colour map to `c`, if one is within a few units of it.
    fn palette_index(scale: &Scale, c: [u8; 3]) -> Option<usize> {
        samples(scale)
            .iter()
            .enumerate()
            .map(|(i, p)| {
                let d: i32 = (0..3)
                    .map(|k| (i32::from(p[k]) - i32::from(c[k])).pow(2))
                    .sum();
                (d, i)
            })
            .min()
            .and_then(|(d, i)| (d <= 12).then_some(i))
    }

    /// Longest run along `y` of pixels on the palette whose positions never
    /// go down (`up`) or never go up, and the positions at its ends. Colours
    /// are 8-bit, so neighbouring samples can share one: a step back of up to
    /// 5 positions (of 1000) is taken as no step.
    fn monotonic_run(img: &Image, y: usize, scale: &Scale, up: bool) -> (usize, usize, usize) {
        let mut best = (0, 0, 0);
        let mut run: Option<(usize, usize, usize)> = None;
        for x in 0..img.w {
            let i = palette_index(scale, img.px(x, y));
            run = match (run, i) {
                (Some((n, first, far)), Some(i)) if up && i + 5 >= far => {
                    Some((n + 1, first, far.max(i)))
                }
                (Some((n, first, far)), Some(i)) if !up && i <= far + 5 => {
                    Some((n + 1, first, far.min(i)))
                }
                (_, Some(i)) => Some((1, i, i)),
                (_, None) => None,
            };
            if let Some(r) = run {
                if r.0 > best.0 {
                    best = r;
                }
            }
        }
        best
    }

    /// Row in the bottom quarter with a monotonic run over 70 % of the width
    /// covering most of the colour map.
    fn find_bar(img: &Image, scale: &Scale, up: bool) -> Option<(usize, usize, usize)> {
        (img.h * 3 / 4..img.h).rev().find_map(|y| {
            let (n, first, last) = monotonic_run(img, y, scale, up);
            (n * 10 >= img.w * 7 && first.abs_diff(last) >= 900).then_some((y, first, last))
        })
    }

    #[test]
    fn size_follows_the_grid_and_the_map_is_600_to_900_wide() {
        // 41 x 21 points: 15 pixels a point is the first whole number to
        // reach 600 px (41 x 15 = 615), within 900.
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let v = Array2::from_elem((21, 41), 3.0_f32);
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(41, 21);
        assert_eq!((lay.map_w, lay.map_h), (615, 315));
        assert_eq!((img.w, img.h), (lay.width, lay.height));
        assert_eq!(img.w, 640 + 2 * 16);
        // Wide grids are sampled down to 900 px, tall ones to 900 rows, a
        // lone point is drawn 600 px wide.
        assert_eq!(map_size(1440, 721), (900, 451));
        assert_eq!(map_size(100, 3000), (30, 900));
        assert_eq!(map_size(1, 1), (600, 600));
        assert_eq!(map_size(500, 400), (500, 400));
        for (nx, ny) in [(7, 3), (41, 21), (299, 300), (1799, 1059), (3600, 1801)] {
            let (w, _) = map_size(nx, ny);
            assert!((450..=900).contains(&w), "{nx} x {ny}: {w} px wide");
        }
    }

    #[test]
    fn colour_bar_runs_along_viridis_near_the_bottom() {
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let v = Array2::from_elem((21, 41), 3.0_f32);
        let img = draw(&v, &lat, &lon, viridis());
        let (y, first, last) = find_bar(&img, &viridis(), true).expect("no colour bar row");
        assert!(first < 50 && last > 950, "bar spans {first}..{last}");
        let lay = layout(41, 21);
        assert!((lay.bar_y..lay.bar_y + BAR_H).contains(&y), "bar row {y}");
    }

    #[test]
    fn reversed_and_diverging_bars_run_as_asked() {
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let v = Array2::from_elem((21, 41), 3.0_f32);
        let rev = Scale {
            reversed: true,
            ..viridis()
        };
        let img = draw(&v, &lat, &lon, rev);
        assert!(find_bar(&img, &viridis(), false).is_some(), "reversed bar");
        assert!(
            find_bar(&img, &viridis(), true).is_none(),
            "bar not reversed"
        );
        // Diverging: blue at the low end (left), red at the high end.
        let div = Scale::from_data(Palette::Diverging);
        let img = draw(&v, &lat, &lon, div);
        let (y, _, _) = find_bar(&img, &div, true).expect("diverging bar");
        let lay = layout(41, 21);
        let left = img.px(lay.bar_x + 1, y);
        let right = img.px(lay.bar_x + lay.bar_w - 2, y);
        assert!(left[2] > left[0] + 60, "left end not blue: {left:?}");
        assert!(right[0] > right[2] + 60, "right end not red: {right:?}");
    }

    #[test]
    fn ramp_varies_west_to_east_and_a_constant_field_is_uniform() {
        // Lat 49 to 41, lon 1 to 9: no graticule line inside.
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let lay = layout(41, 21);
        let k = lay.map_w / 41;
        let ramp = Array2::from_shape_fn((21, 41), |(_, c)| c as f32);
        let img = draw(&ramp, &lat, &lon, viridis());
        let y = lay.map_y + lay.map_h / 2;
        let mut positions = Vec::new();
        for c in 0..41 {
            let block: Vec<[u8; 3]> = (0..k).map(|i| img.px(lay.map_x + c * k + i, y)).collect();
            assert!(
                block.iter().all(|p| *p == block[0]),
                "column {c} not uniform"
            );
            positions.push(palette_index(&viridis(), block[0]).expect("off the palette"));
        }
        // 2nd..98th percentile of 0..40 is 0.8..39.2: columns 1..39 inside, each
        // further along the palette than the one west of it.
        for c in 1..40 {
            assert!(positions[c] > positions[c - 1], "{c}: {positions:?}");
        }
        let row = |c: usize| img.px(lay.map_x + c * k, y);
        assert_eq!(row(0), colour_at(&viridis(), 0.0));
        assert_eq!(row(40), colour_at(&viridis(), 1.0));

        let flat = Array2::from_elem((21, 41), 7.5_f32);
        let img = draw(&flat, &lat, &lon, viridis());
        let first = img.px(lay.map_x, lay.map_y);
        for y in lay.map_y..lay.map_y + lay.map_h {
            for x in lay.map_x..lay.map_x + lay.map_w {
                assert_eq!(img.px(x, y), first, "({x}, {y})");
            }
        }
        assert!(palette_index(&viridis(), first).is_some());
    }

    #[test]
    fn graticule_crosses_at_10_20_30_east_and_50_north() {
        // 41 columns 0..40 E, 21 rows 55..45 N; 15 px a point, so the centre
        // of column c is pixel 15 c + 7 and of row r pixel 15 r + 7.
        let (lat, lon) = latlon(21, 41, 55.0, -0.5, 0.0, 1.0);
        let v = Array2::from_elem((21, 41), 1.0_f32);
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(41, 21);
        assert_eq!(lay.map_w, 41 * 15);
        let field = img.px(lay.map_x + 3, lay.map_y + 3);
        let marked = |y: usize| -> Vec<usize> {
            (0..lay.map_w)
                .filter(|&x| img.px(lay.map_x + x, lay.map_y + y) != field)
                .collect()
        };
        // Any row away from 50 N: one pixel at each of 10, 20, 30 E and at the
        // grid's east edge, 40 E; none at 0 E on the west edge.
        let centre = |i: usize| 15 * i + 7;
        for y in [0, 30, 100, 200, lay.map_h - 1] {
            assert_eq!(
                marked(y),
                vec![centre(10), centre(20), centre(30), centre(40)]
            );
        }
        // 50 N is row 10: the whole row is marked, the rows either side are not.
        assert_eq!(marked(centre(10)).len(), lay.map_w);
        assert_eq!(marked(centre(10) - 1).len(), 4);
        assert_eq!(marked(centre(10) + 1).len(), 4);
    }

    #[test]
    fn graticule_has_no_line_along_the_longitude_seam() {
        // 21 columns a degree apart from 175.3 E written in -180..180, and
        // from 355.3 E written in 0..360: the seam falls between columns 4
        // and 5 and the only meridians are 4.7 and 14.7 columns in (180 and
        // 170 W; 0 and 10 E).
        let lay = layout(21, 9);
        let k = lay.map_w / 21;
        let expect = |g: f64| (g + 0.5) * k as f64 - 0.5;
        let to_0_360 = |l: f64| l.rem_euclid(360.0);
        let conventions: [(f64, &dyn Fn(f64) -> f64); 2] = [(175.3, &wrap180), (355.3, &to_0_360)];
        for (west, convention) in conventions {
            let lat = Array2::from_shape_fn((9, 21), |(r, _)| 48.0 - r as f64);
            let lon = Array2::from_shape_fn((9, 21), |(_, c)| convention(west + c as f64));
            assert!(lon[[0, 4]] > lon[[0, 5]], "no seam in {west}");
            let v = Array2::from_elem((9, 21), 2.0_f32);
            let img = draw(&v, &lat, &lon, viridis());
            let field = img.px(lay.map_x + 1, lay.map_y + 1);
            for y in [1, lay.map_h / 2, lay.map_h - 2] {
                let marked: Vec<usize> = (0..lay.map_w)
                    .filter(|&x| img.px(lay.map_x + x, lay.map_y + y) != field)
                    .collect();
                assert_eq!(marked.len(), 2, "from {west} E, row {y}: {marked:?}");
                assert!((marked[0] as f64 - expect(4.7)).abs() <= 1.0, "{marked:?}");
                assert!((marked[1] as f64 - expect(14.7)).abs() <= 1.0, "{marked:?}");
            }
        }
    }

    /// Lambert conformal grid, tangent at 50 N, centred at 50 N 5 E, 50 km
    /// spacing on a sphere of radius 6371 km; rows run north to south.
    /// Inverse of the spherical projection (Snyder 1987, Map Projections: A
    /// Working Manual, USGS PP 1395, eqs. 15-1 to 15-5 and their inverses;
    /// from memory).
    fn lambert(ny: usize, nx: usize) -> (Array2<f64>, Array2<f64>) {
        let (r_e, phi1, lam0) = (6371.0_f64, 50f64.to_radians(), 5f64.to_radians());
        let n = phi1.sin();
        let t = |phi: f64| (std::f64::consts::FRAC_PI_4 + phi / 2.0).tan();
        let f = phi1.cos() * t(phi1).powf(n) / n;
        let rho0 = r_e * f / t(phi1).powf(n);
        let mut lat = Array2::zeros((ny, nx));
        let mut lon = Array2::zeros((ny, nx));
        for ((r, c), la) in lat.indexed_iter_mut() {
            let x = (c as f64 - (nx - 1) as f64 / 2.0) * 50.0;
            let y = ((ny - 1) as f64 / 2.0 - r as f64) * 50.0;
            let rho = (x * x + (rho0 - y).powi(2)).sqrt();
            let theta = x.atan2(rho0 - y);
            *la = (2.0 * (r_e * f / rho).powf(1.0 / n).atan() - std::f64::consts::FRAC_PI_2)
                .to_degrees();
            lon[[r, c]] = (theta / n + lam0).to_degrees();
        }
        (lat, lon)
    }

    #[test]
    fn graticule_on_a_lambert_grid_follows_the_grid_coordinates() {
        let (ny, nx) = (40, 50);
        let (lat, lon) = lambert(ny, nx);
        let v = Array2::from_elem((ny, nx), 4.0_f32);
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(nx, ny);
        let field = img.px(lay.map_x + lay.map_w / 2 + 3, lay.map_y + 1);
        let near_line = |x: f64| (x - 10.0 * (x / 10.0).round()).abs();
        let mut rows_on_greenwich = 0;
        let mut line_pixels = 0;
        for py in 0..lay.map_h {
            let r = py * ny / lay.map_h;
            let mut on_greenwich = false;
            for px in 0..lay.map_w {
                if img.px(lay.map_x + px, lay.map_y + py) == field {
                    continue;
                }
                line_pixels += 1;
                let c = px * nx / lay.map_w;
                let (la, lo) = (lat[[r, c]], lon[[r, c]]);
                // The nearest grid point is within about half a grid step
                // (0.45 deg of latitude, 0.7 of longitude) of the line.
                assert!(
                    near_line(la) < 0.6 || near_line(lo) < 1.0,
                    "pixel ({px}, {py}) at {la:.2} N {lo:.2} E is on no line"
                );
                on_greenwich |= lo.abs() < 1.0;
            }
            rows_on_greenwich += usize::from(on_greenwich);
        }
        assert!(line_pixels > 0);
        // The Greenwich meridian crosses the whole domain: a line in every row.
        assert_eq!(rows_on_greenwich, lay.map_h);
    }

    #[test]
    fn no_parallel_is_drawn_at_a_pole() {
        // Rows 90 N to 79 N, columns 1 to 9 E: the only line is 80 N, along
        // the centre of row 10 (15 px a point: pixel row 15 x 10 + 7).
        let (lat, lon) = latlon(12, 41, 90.0, -1.0, 1.0, 0.2);
        let v = Array2::from_elem((12, 41), 1.0_f32);
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(41, 12);
        assert_eq!(lay.map_h, 12 * 15);
        let field = img.px(lay.map_x + 3, lay.map_y + 3);
        let rows: Vec<usize> = (0..lay.map_h)
            .filter(|&y| (0..lay.map_w).any(|x| img.px(lay.map_x + x, lay.map_y + y) != field))
            .collect();
        assert_eq!(rows, vec![157]);
    }

    #[test]
    fn north_is_up_whichever_way_the_rows_run() {
        // The field is the latitude: the top of the map must be the high end.
        for (lat0, dlat) in [(41.0, 0.4), (49.0, -0.4)] {
            let (lat, lon) = latlon(21, 41, lat0, dlat, 1.0, 0.2);
            let v = lat.mapv(|l| l as f32);
            let img = draw(&v, &lat, &lon, viridis());
            let lay = layout(41, 21);
            let x = lay.map_x + lay.map_w / 2;
            let top = img.px(x, lay.map_y);
            let bottom = img.px(x, lay.map_y + lay.map_h - 1);
            assert_eq!(top, colour_at(&viridis(), 1.0), "dlat {dlat}");
            assert_eq!(bottom, colour_at(&viridis(), 0.0), "dlat {dlat}");
        }
    }

    #[test]
    fn missing_values_are_neutral_grey() {
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let mut v = Array2::from_shape_fn((21, 41), |(r, c)| (r + c) as f32);
        v[[0, 0]] = f32::NAN;
        v[[10, 20]] = f32::NAN;
        v[[20, 40]] = f32::INFINITY;
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(41, 21);
        let k = lay.map_w / 41;
        for (r, c) in [(0, 0), (10, 20), (20, 40)] {
            for dy in 0..k {
                for dx in 0..k {
                    let p = img.px(lay.map_x + c * k + dx, lay.map_y + r * k + dy);
                    assert!(
                        p[0] == p[1] && p[1] == p[2] && (100..=200).contains(&p[0]),
                        "({r}, {c}): {p:?}"
                    );
                }
            }
        }
        // The point beside a missing one has its value's colour, not grey.
        let beside = img.px(lay.map_x + 21 * k, lay.map_y + 10 * k);
        assert!(palette_index(&viridis(), beside).is_some(), "{beside:?}");
        assert!(!(beside[0] == beside[1] && beside[1] == beside[2]));
    }

    #[test]
    fn all_missing_one_point_and_constant_fields_render() {
        let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
        let v = Array2::from_elem((21, 41), f32::NAN);
        let img = draw(&v, &lat, &lon, viridis());
        let lay = layout(41, 21);
        for y in lay.map_y..lay.map_y + lay.map_h {
            for x in lay.map_x..lay.map_x + lay.map_w {
                assert_eq!(img.px(x, y), MISSING);
            }
        }
        assert!(
            find_bar(&img, &viridis(), true).is_some(),
            "bar of an empty field"
        );

        for scale in [viridis(), Scale::from_data(Palette::Diverging)] {
            let one = Array2::from_elem((1, 1), 12.0_f32);
            let (lat, lon) = latlon(1, 1, 50.0, 0.0, 10.0, 0.0);
            let img = draw(&one, &lat, &lon, scale);
            assert_eq!((img.w, img.h), (layout(1, 1).width, layout(1, 1).height));
            let zero = Array2::from_elem((3, 4), 0.0_f32);
            let (lat, lon) = latlon(3, 4, 0.0, 1.0, 0.0, 1.0);
            draw(&zero, &lat, &lon, scale);
        }
    }

    #[test]
    fn mismatched_shapes_are_refused_naming_them() {
        let v = Array2::from_elem((3, 4), 1.0_f32);
        let (lat, lon) = latlon(3, 5, 0.0, 1.0, 0.0, 1.0);
        let q = Quicklook {
            values: v.view(),
            lat: lat.view(),
            lon: lon.view(),
            title: "",
            subtitle: "",
            units: "",
            scale: viridis(),
        };
        let e = render(&q).expect_err("shapes differ");
        assert!(e.contains("(3, 4)") && e.contains("(3, 5)"), "{e}");
        let empty = Array2::<f32>::zeros((0, 4));
        let (lat, lon) = latlon(0, 4, 0.0, 1.0, 0.0, 1.0);
        let q = Quicklook {
            values: empty.view(),
            lat: lat.view(),
            lon: lon.view(),
            ..q
        };
        assert!(render(&q).expect_err("empty").contains("(0, 4)"));
    }

    #[test]
    fn awkward_text_and_bounds_do_not_panic() {
        let (lat, lon) = latlon(5, 5, 0.0, 1.0, 0.0, 1.0);
        let v = Array2::from_elem((5, 5), 1.0_f32);
        let long = "x".repeat(500) + "\u{1F600}\n°C m s⁻¹";
        let q = Quicklook {
            values: v.view(),
            lat: lat.view(),
            lon: lon.view(),
            title: &long,
            subtitle: &long,
            units: &long,
            scale: viridis(),
        };
        decode(&render(&q).expect("long text"));
        for (min, max) in [
            (Some(f64::NAN), None),
            (None, Some(f64::INFINITY)),
            (Some(2.0), Some(2.0)),
            (Some(3.0), Some(1.0)),
            (Some(-1e308), Some(1e308)),
        ] {
            let q = Quicklook {
                scale: Scale {
                    min,
                    max,
                    ..viridis()
                },
                ..q
            };
            assert!(render(&q).is_err(), "{min:?} {max:?}");
        }
        // One bound on the far side of the data: the range still spans.
        let q = Quicklook {
            scale: Scale {
                min: Some(5.0),
                ..viridis()
            },
            ..q
        };
        decode(&render(&q).expect("min above the data"));
    }

    #[test]
    fn percentile_range_closed_forms() {
        // 0, 1, ..., 100: rank 0.02 x 100 = 2 and 0.98 x 100 = 98 exactly.
        let mut v: Vec<f64> = (0..=100).rev().map(f64::from).collect();
        assert_eq!(quantile(&mut v, 0.02), 2.0);
        assert_eq!(quantile(&mut v, 0.98), 98.0);
        // Two values 0 and 10: ranks 0.02 and 0.98 between them.
        assert!((quantile(&mut [10.0, 0.0], 0.02) - 0.2).abs() < 1e-12);
        assert!((quantile(&mut [10.0, 0.0], 0.98) - 9.8).abs() < 1e-12);

        // The same values shifted by -20 with missing ones among them.
        let field = Array2::from_shape_fn((11, 11), |(r, c)| {
            let i = r * 11 + c;
            if i > 100 {
                f32::NAN
            } else {
                i as f32 - 20.0
            }
        });
        let v = field.view();
        assert_eq!(percentile_range(&v), Some((-18.0, 78.0)));
        assert_eq!(colour_range(&v, &viridis()), Ok((-18.0, 78.0)));
        let div = Scale::from_data(Palette::Diverging);
        assert_eq!(colour_range(&v, &div), Ok((-78.0, 78.0)));
        let div_max = Scale {
            max: Some(30.0),
            ..div
        };
        assert_eq!(colour_range(&v, &div_max), Ok((-30.0, 30.0)));
        let fixed = Scale {
            min: Some(-5.0),
            max: Some(5.0),
            ..viridis()
        };
        assert_eq!(colour_range(&v, &fixed), Ok((-5.0, 5.0)));
        let low_only = Scale {
            min: Some(0.0),
            ..viridis()
        };
        assert_eq!(colour_range(&v, &low_only), Ok((0.0, 78.0)));
        // A constant field of 200: centred, 5 % of the value either side.
        let flat = Array2::from_elem((2, 2), 200.0_f32);
        assert_eq!(colour_range(&flat.view(), &viridis()), Ok((190.0, 210.0)));
        // No data at all: 0..1 sequential, -1..1 diverging.
        let none = Array2::from_elem((2, 2), f32::NAN);
        assert_eq!(percentile_range(&none.view()), None);
        assert_eq!(colour_range(&none.view(), &viridis()), Ok((0.0, 1.0)));
        assert_eq!(colour_range(&none.view(), &div), Ok((-1.0, 1.0)));
    }

    #[test]
    fn ticks_are_at_least_five_nice_numbers_in_range() {
        let (t, step) = ticks(0.0, 1.0);
        assert_eq!(step, 0.25);
        assert_eq!(t, vec![0.0, 0.25, 0.5, 0.75, 1.0]);
        let (t, step) = ticks(-78.0, 78.0);
        assert_eq!(step, 25.0);
        assert_eq!(t, vec![-75.0, -50.0, -25.0, 0.0, 25.0, 50.0, 75.0]);
        for (lo, hi) in [(190.0, 210.0), (250.3, 251.1), (-1e-6, 3e-6), (0.0, 7.3e9)] {
            let (t, step) = ticks(lo, hi);
            assert!(t.len() >= 5, "{lo}..{hi}: {t:?}");
            assert!(t
                .iter()
                .all(|&x| x >= lo - 1e-9 * step && x <= hi + 1e-9 * step));
            for w in t.windows(2) {
                assert!(((w[1] - w[0]) - step).abs() < 1e-6 * step, "{t:?}");
            }
        }
        assert_eq!(tick_label(0.25, 0.25), "0.25");
        assert_eq!(tick_label(-75.0, 25.0), "-75");
        assert_eq!(tick_label(1e-17, 0.1), "0.0");
        assert_eq!(tick_label(2e9, 1e9), "2.00e9");
    }
}
