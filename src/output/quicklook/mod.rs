//! Quicklook images: one 2-D field drawn as a PNG on the model's own grid.
//!
//! In: a [`Quicklook`]: the field's values on the grid (NaN, or any other
//! non-finite value, where missing), the latitude and longitude of every grid
//! point, a title, a subtitle, the units, a [`Scale`], what outlines the land
//! ([`Outline`]) and optionally one contour line ([`Contour`]). Out: the
//! bytes of an 8-bit RGB PNG:
//!
//! - a title band on top, set in DejaVu Sans ([`text`]);
//! - the field drawn point by point, nearest neighbour and north up, in the
//!   colour bands of its scale ([`ramps`]: leeward's own ramps, designed in
//!   OKLab), missing points in neutral grey;
//! - a 10-degree graticule traced where the grid's own coordinates cross a
//!   multiple of 10 (so a projected grid or a longitude seam needs nothing
//!   special);
//! - coastlines and borders placed by the grid's own projection, or contours
//!   of the model's terrain ([`outline`]);
//! - the contour line, if any (the 2 PVU line on PV and tropopause maps);
//! - a colour bar of the bands with their edges labelled, the units, a key
//!   to the lines and where the outline comes from.
//!
//! Nothing is reprojected or smoothed and nothing is read from disk: what is
//! shown is what the grid holds. These images are guidance for trained
//! forecasters, not warnings.

pub mod lines;
pub mod outline;
pub mod ramps;
pub mod text;

use ndarray::ArrayView2;

use crate::geometry::Grid;
use lines::Mask;
use text::Weight;

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
/// Space left of and right of the colour bar for the end labels and arrows.
const BAR_INSET: usize = 40;
// Type sizes, pixels to the em.
const TITLE_SIZE: f32 = 16.0;
const SUBTITLE_SIZE: f32 = 13.0;
const LABEL_SIZE: f32 = 12.0;
const NOTE_SIZE: f32 = 11.0;
// Heights of the parts and the gaps between them, top to bottom.
const TOP_PAD: usize = 8;
const TITLE_H: usize = 22;
const SUBTITLE_H: usize = 18;
const BAND_GAP: usize = 8;
const BAR_GAP: usize = 12;
const BAR_H: usize = 16;
const TICK_LEN: usize = 4;
const LABEL_H: usize = 16;
const FOOT_H: usize = 18;
const BOTTOM_PAD: usize = 6;
/// Graticule spacing, degrees, and on maps more than [`WIDE_MAP_DEG`] of
/// longitude across.
const GRATICULE_STEP: f64 = 10.0;
const GRATICULE_STEP_WIDE: f64 = 30.0;
const WIDE_MAP_DEG: f64 = 100.0;
/// Most colour bands a scale may have.
pub const MAX_BANDS: usize = 40;

const BACKGROUND: [u8; 3] = [255, 255, 255];
const INK: [u8; 3] = [24, 24, 28];
const SOFT_INK: [u8; 3] = [96, 96, 104];
const FRAME: [u8; 3] = [90, 90, 90];
/// Missing values: a neutral grey that neither colour ramp contains.
pub const MISSING: [u8; 3] = [150, 150, 150];

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
    /// Colour ramp, range and bands.
    pub scale: Scale,
    /// What outlines the land.
    pub outline: Outline<'a>,
    /// A contour line drawn over the field.
    pub contour: Option<Contour<'a>>,
}

/// What outlines the land on a map.
#[derive(Debug, Clone, Copy)]
pub enum Outline<'a> {
    /// Nothing.
    None,
    /// Natural Earth coastlines and borders, placed by this grid's projection
    /// (which must be the grid of the values, in leeward's storage order).
    Coastlines(&'a Grid),
    /// Contours of the model's own terrain height (m) at these heights: the
    /// outline of an invented world, or of a model's own land.
    Terrain {
        /// Terrain height, m, same shape as the values.
        height: ArrayView2<'a, f32>,
        /// Heights to contour, m.
        levels: &'a [f64],
    },
}

/// One contour line over the map.
#[derive(Debug, Clone, Copy)]
pub struct Contour<'a> {
    /// The field it is a line of, same shape as the values (it may be the values).
    pub values: ArrayView2<'a, f32>,
    /// The value of the line.
    pub level: f64,
    /// Its key under the colour bar, e.g. "2 PVU".
    pub label: &'a str,
}

/// Colour ramps.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Palette {
    /// leeward's sequential ramp: lightness rising from pine green to pale rose.
    Sequential,
    /// leeward's diverging ramp: petrol blue (low), near-white centre, copper (high).
    Diverging,
}

/// A colour scale: the ramp, the range it spans and the width of its bands.
/// Values below `min` or above `max` take the colour of the end band (the bar
/// shows arrows at its ends to say so).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Scale {
    /// Which ramp.
    pub palette: Palette,
    /// Value at the low end.
    pub min: f64,
    /// Value at the high end.
    pub max: f64,
    /// Width of each colour band; `(max - min) / step` bands, at most [`MAX_BANDS`].
    pub step: f64,
    /// Run the ramp the other way (high values dark).
    pub reversed: bool,
}

impl Scale {
    /// A fixed scale of `palette` from `min` to `max` in bands `step` wide.
    pub fn fixed(palette: Palette, min: f64, max: f64, step: f64) -> Scale {
        Scale {
            palette,
            min,
            max,
            step,
            reversed: false,
        }
    }

    /// A scale that spans the finite values of a field, for a quantity that has
    /// no fixed scale: its ends on whole bands of a step of 1, 2 or 5 times a
    /// power of ten, 8 to 20 bands; diverging scales are made symmetric about 0.
    pub fn spanning(values: &ArrayView2<'_, f32>, palette: Palette) -> Scale {
        let (mut lo, mut hi) = values
            .iter()
            .filter(|v| v.is_finite())
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
                (a.min(f64::from(v)), b.max(f64::from(v)))
            });
        if !lo.is_finite() {
            (lo, hi) = (0.0, 1.0);
        }
        if palette == Palette::Diverging {
            let m = lo.abs().max(hi.abs());
            (lo, hi) = (-m, m);
        }
        if hi - lo <= 1e-12 * lo.abs().max(hi.abs()).max(1e-300) {
            let d = if lo == 0.0 { 1.0 } else { 0.05 * lo.abs() };
            (lo, hi) = (lo - d, hi + d);
        }
        let step = band_step(hi - lo);
        let (lo, hi) = ((lo / step).floor() * step, (hi / step).ceil() * step);
        Scale::fixed(palette, lo, hi, step)
    }

    /// Number of bands.
    pub fn bands(&self) -> usize {
        ((self.max - self.min) / self.step).round().max(1.0) as usize
    }

    fn check(&self) -> Result<(), String> {
        for (name, v) in [("min", self.min), ("max", self.max), ("step", self.step)] {
            if !v.is_finite() {
                return Err(format!(
                    "quicklook: scale {name} is {v}, not a finite number"
                ));
            }
        }
        if self.min >= self.max {
            return Err(format!(
                "quicklook: scale min {} is not below max {}",
                self.min, self.max
            ));
        }
        if !(self.max - self.min).is_finite() {
            return Err(format!(
                "quicklook: scale {} to {} is too wide",
                self.min, self.max
            ));
        }
        let n = (self.max - self.min) / self.step;
        if !(self.step > 0.0 && (0.5..=MAX_BANDS as f64 + 0.5).contains(&n)) {
            return Err(format!(
                "quicklook: scale step {} gives {n:.1} bands over {} to {} (1 to {MAX_BANDS})",
                self.step, self.min, self.max
            ));
        }
        Ok(())
    }

    /// The colour of band `k` (0 the low end).
    fn band_colour(&self, k: usize) -> [u8; 3] {
        let t = (k as f64 + 0.5) / self.bands() as f64;
        self.colour_at(t)
    }

    /// Colour at position `t` (0 low end, 1 high end) of the ramp.
    fn colour_at(&self, t: f64) -> [u8; 3] {
        let t = if self.reversed { 1.0 - t } else { t };
        let ramp = match self.palette {
            Palette::Sequential => ramps::sequential(),
            Palette::Diverging => ramps::diverging(),
        };
        ramps::at(ramp, t)
    }

    /// Band of value `v`; values beyond the ends fall in the end bands.
    fn band_of(&self, v: f64) -> usize {
        let n = self.bands();
        let k = ((v - self.min) / self.step).floor();
        if k < 0.0 {
            0
        } else {
            (k as usize).min(n - 1)
        }
    }
}

/// A band width of 1, 2 or 5 times a power of ten giving 8 to 20 bands over
/// `span` (so band edges fall on round numbers); for a span no such step
/// fits, a tenth of it.
pub fn band_step(span: f64) -> f64 {
    if !(span > 0.0 && span.is_finite()) {
        return 1.0;
    }
    let e = span.log10().floor() as i32;
    for p in [e - 1, e - 2, e] {
        for m in [1.0, 2.0, 5.0] {
            let step = m * 10f64.powi(p);
            let n = span / step;
            if (8.0..=20.0).contains(&n) {
                return step;
            }
        }
    }
    span / 10.0
}

/// Draw `q` and return the PNG bytes (8-bit RGB).
///
/// Errors, never a panic: the arrays differ in shape (the message names the
/// shapes), the grid is empty, or the scale is not usable (bounds not
/// finite, not in order, too far apart, or a band width that gives no bands
/// or more than [`MAX_BANDS`]).
pub fn render(q: &Quicklook<'_>) -> Result<Vec<u8>, String> {
    render_with_marks(q, &[])
}

/// [`render`] with tracks drawn over the map: each mark a line through points
/// given as (row, column) grid indices of the field (fractions allowed), a dot
/// at each point and a larger one at its last. A segment that jumps more than
/// half the grid's width (across the seam of a global grid) is not drawn.
pub fn render_with_marks(q: &Quicklook<'_>, marks: &[Vec<(f64, f64)>]) -> Result<Vec<u8>, String> {
    if let Some((name, s)) = [("lat", q.lat.dim()), ("lon", q.lon.dim())]
        .into_iter()
        .find(|(_, s)| *s != q.values.dim())
    {
        return Err(format!(
            "quicklook: shapes differ: values {:?}, {name} {s:?}",
            q.values.dim()
        ));
    }
    draw_on(q, &Backdrop::new(q.lat, q.lon, &q.outline)?, marks)
}

/// Draw `q` on a backdrop already worked out for its grid and outline (by
/// [`Backdrop::new`] from `q.lat`, `q.lon` and `q.outline`, or from those
/// of another image of the same grid): what [`render`] does, without
/// working out the same geometry again for every image of a step.
///
/// Errors as [`render`]; a backdrop of another shape than the values is one.
pub fn render_on(q: &Quicklook<'_>, b: &Backdrop) -> Result<Vec<u8>, String> {
    draw_on(q, b, &[])
}

/// [`render_on`] with the marks of [`render_with_marks`].
fn draw_on(q: &Quicklook<'_>, b: &Backdrop, marks: &[Vec<(f64, f64)>]) -> Result<Vec<u8>, String> {
    let shape = q.values.dim();
    let mut shapes = vec![("backdrop", (b.place.ny, b.place.nx))];
    if let Some(c) = &q.contour {
        shapes.push(("contour field", c.values.dim()));
    }
    if let Some((name, s)) = shapes.iter().find(|(_, s)| *s != shape) {
        return Err(format!(
            "quicklook: shapes differ: values {shape:?}, {name} {s:?}"
        ));
    }
    let (ny, nx) = shape;
    if ny == 0 || nx == 0 {
        return Err(format!("quicklook: empty grid {shape:?}"));
    }
    q.scale.check()?;
    let lay = layout(nx, ny);
    let mut img = Canvas::new(lay.width, lay.height, BACKGROUND);

    draw_bands(&mut img, &lay, q.title, q.subtitle);
    draw_map(&mut img, &lay, q, b);
    for (strokes, alpha) in &b.outline {
        ink_strokes(&mut img, &lay, strokes, *alpha);
    }
    if let Some(c) = &q.contour {
        draw_contour(&mut img, &lay, &b.place, c);
    }
    if !marks.is_empty() {
        draw_marks(&mut img, &lay, &b.place, marks);
    }
    img.frame(lay.map_x, lay.map_y, lay.map_w, lay.map_h, FRAME);
    draw_colour_bar(&mut img, &lay, &q.scale);
    draw_foot(
        &mut img,
        &lay,
        q.units,
        q.contour.as_ref().map(|c| c.label),
        &b.note,
    );
    img.encode()
}

/// What every image of one grid shares, worked out once for all of them:
/// which way up the rows go, the map pixels the graticule passes through
/// and the strokes of the outline with the note that says where it comes
/// from. It depends on the grid's coordinates and the outline only, not on
/// the field drawn.
pub struct Backdrop {
    place: Placement,
    /// Map pixels (row by row) the graticule passes through.
    graticule: Vec<u32>,
    /// The outline's strokes in the order they are inked, each at its opacity.
    outline: Vec<(lines::Strokes, f32)>,
    note: String,
}

impl Backdrop {
    /// The backdrop of a grid with these coordinates (as [`Quicklook::lat`]
    /// and [`Quicklook::lon`]) and outline. Errors: the arrays differ in shape
    /// (the message names the shapes) or the grid is empty.
    pub fn new(
        lat: ArrayView2<'_, f64>,
        lon: ArrayView2<'_, f64>,
        outline: &Outline<'_>,
    ) -> Result<Backdrop, String> {
        let shape = lat.dim();
        let mut shapes = vec![("lon", lon.dim())];
        if let Outline::Terrain { height, .. } = outline {
            shapes.push(("terrain", height.dim()));
        }
        if let Some((name, s)) = shapes.iter().find(|(_, s)| *s != shape) {
            return Err(format!(
                "quicklook: shapes differ: lat {shape:?}, {name} {s:?}"
            ));
        }
        let (ny, nx) = shape;
        if ny == 0 || nx == 0 {
            return Err(format!("quicklook: empty grid {shape:?}"));
        }
        let lay = layout(nx, ny);
        let flip = flip_rows(&lat);
        let place = Placement {
            nx,
            ny,
            w: lay.map_w,
            h: lay.map_h,
            flip,
        };
        let (plat, plon) = pixel_coordinates(&lat, &lon, &place);
        let graticule = graticule_pixels(&plat, &plon, place.w, place.h);
        let (outline, note) = outline_strokes(&place, outline);
        Ok(Backdrop {
            place,
            graticule,
            outline,
            note,
        })
    }
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
    foot_y: usize,
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
    let subtitle_y = title_y + TITLE_H;
    let map_y = subtitle_y + SUBTITLE_H + BAND_GAP;
    let bar_y = map_y + map_h + BAR_GAP;
    let label_y = bar_y + BAR_H + TICK_LEN;
    let foot_y = label_y + LABEL_H;
    Layout {
        width,
        height: foot_y + FOOT_H + BOTTOM_PAD,
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
        foot_y,
    }
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

/// How grid coordinates map to map pixels: the inverse of [`fractional`],
/// rows turned over when the map is drawn last row first.
#[derive(Debug, Clone, Copy)]
struct Placement {
    nx: usize,
    ny: usize,
    w: usize,
    h: usize,
    flip: bool,
}

impl Placement {
    /// Map pixel (x, y) of fractional grid (column, row).
    fn pixel(&self, col: f64, row: f64) -> (f64, f64) {
        let r = if self.flip {
            (self.ny - 1) as f64 - row
        } else {
            row
        };
        (
            (col + 0.5) * self.w as f64 / self.nx as f64 - 0.5,
            (r + 0.5) * self.h as f64 / self.ny as f64 - 0.5,
        )
    }
}

/// Latitude and longitude at the centre of each map pixel, interpolated
/// bilinearly between the four surrounding grid points (longitudes unwrapped
/// about the first of them, so a seam between them does not matter); rows of
/// pixels on every core.
fn pixel_coordinates(
    glat: &ArrayView2<'_, f64>,
    glon: &ArrayView2<'_, f64>,
    place: &Placement,
) -> (Vec<f64>, Vec<f64>) {
    use rayon::prelude::*;
    let (ny, nx) = (place.ny, place.nx);
    let (w, h) = (place.w, place.h);
    let mut lat = vec![f64::NAN; w * h];
    let mut lon = vec![f64::NAN; w * h];
    let columns: Vec<(usize, usize, f64)> = (0..w)
        .map(|px| {
            let g = fractional(px, w, nx);
            let i0 = (g.floor() as usize).min(nx - 1);
            (i0, (i0 + 1).min(nx - 1), g - i0 as f64)
        })
        .collect();
    lat.par_chunks_mut(w)
        .zip(lon.par_chunks_mut(w))
        .enumerate()
        .for_each(|(py, (lat_row, lon_row))| {
            let gd = fractional(py, h, ny);
            let g = if place.flip { (ny - 1) as f64 - gd } else { gd };
            let j0 = (g.floor() as usize).min(ny - 1);
            let j1 = (j0 + 1).min(ny - 1);
            let fy = g - j0 as f64;
            for (px, &(i0, i1, fx)) in columns.iter().enumerate() {
                let bilinear = |a: f64, b: f64, c: f64, d: f64| {
                    (1.0 - fy) * ((1.0 - fx) * a + fx * b) + fy * ((1.0 - fx) * c + fx * d)
                };
                lat_row[px] = bilinear(
                    glat[[j0, i0]],
                    glat[[j0, i1]],
                    glat[[j1, i0]],
                    glat[[j1, i1]],
                );
                let base = glon[[j0, i0]];
                let un = |x: f64| base + wrap180(x - base);
                lon_row[px] = bilinear(
                    base,
                    un(glon[[j0, i1]]),
                    un(glon[[j1, i0]]),
                    un(glon[[j1, i1]]),
                );
            }
        });
    (lat, lon)
}

/// If a multiple of `step` lies between coordinates `a` and `b` of two
/// neighbouring pixels: that multiple, and whether it is nearer `b`.
fn crossing(a: f64, b: f64, step: f64) -> Option<(f64, bool)> {
    if !a.is_finite() || !b.is_finite() {
        return None;
    }
    let (ca, cb) = ((a / step).floor(), (b / step).floor());
    if ca == cb {
        return None;
    }
    let line = step * ca.max(cb);
    Some((line, (b - line).abs() <= (a - line).abs()))
}

/// Spacing of the graticule: 10 degrees, 30 on a map more than
/// [`WIDE_MAP_DEG`] of longitude across its middle row.
fn graticule_step(lon: &[f64], w: usize, h: usize) -> f64 {
    let row = &lon[(h / 2) * w..(h / 2) * w + w];
    let across: f64 = row
        .windows(2)
        .map(|p| wrap180(p[1] - p[0]).abs())
        .filter(|d| d.is_finite())
        .sum();
    if across > WIDE_MAP_DEG {
        GRATICULE_STEP_WIDE
    } else {
        GRATICULE_STEP
    }
}

/// Map pixels the graticule passes through: for each pair of neighbouring
/// pixels, across and down, whose latitudes or longitudes straddle a
/// multiple of the step, the one nearer the line. The poles are points,
/// not parallels: a grid row at 90 N or S gets no line. The pixels are
/// given by their index, row by row.
fn graticule_pixels(lat: &[f64], lon: &[f64], w: usize, h: usize) -> Vec<u32> {
    let step = graticule_step(lon, w, h);
    let mut mask = vec![false; w * h];
    let mut mark = |a: usize, b: usize| {
        let parallel = crossing(lat[a], lat[b], step).filter(|&(line, _)| line.abs() < 90.0);
        let lon_b = lon[a] + wrap180(lon[b] - lon[a]);
        for (_, nearer_b) in [parallel, crossing(lon[a], lon_b, step)]
            .into_iter()
            .flatten()
        {
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
    (0..w * h).filter(|&k| mask[k]).map(|k| k as u32).collect()
}

/// Whether a line over colour `c` is better dark (light ground) or light.
fn dark_over(c: [u8; 3]) -> bool {
    ramps::lightness(c) > 0.62
}

/// A graticule pixel over `c`: a faint line, darkened over light colours
/// (`dark`, [`dark_over`]) and lightened over dark ones.
fn graticule_colour(c: [u8; 3], dark: bool) -> [u8; 3] {
    let (target, amount) = if dark { (0.0, 0.3) } else { (255.0, 0.35) };
    c.map(|v| (f64::from(v) + amount * (target - f64::from(v))).round() as u8)
}

/// The field in its bands, nearest grid point to each map pixel, then the
/// graticule over it.
fn draw_map(img: &mut Canvas, lay: &Layout, q: &Quicklook<'_>, b: &Backdrop) {
    let (ny, nx) = q.values.dim();
    let (w, h) = (lay.map_w, lay.map_h);
    let columns: Vec<usize> = (0..w).map(|px| nearest(px, w, nx)).collect();
    let bands: Vec<[u8; 3]> = (0..q.scale.bands())
        .map(|k| q.scale.band_colour(k))
        .collect();
    for py in 0..h {
        let rd = nearest(py, h, ny);
        let row = q.values.row(if b.place.flip { ny - 1 - rd } else { rd });
        for (px, &c) in columns.iter().enumerate() {
            let v = row[c];
            let colour = if v.is_finite() {
                bands[q.scale.band_of(f64::from(v))]
            } else {
                MISSING
            };
            img.set(lay.map_x + px, lay.map_y + py, colour);
        }
    }
    let mut shade = Recall::default();
    for &k in &b.graticule {
        let (x, y) = (lay.map_x + k as usize % w, lay.map_y + k as usize / w);
        let under = img.px(x, y);
        let dark = shade.dark_over(under);
        img.set(x, y, graticule_colour(under, dark));
    }
}

/// [`dark_over`] of the last colour asked about, kept: neighbouring pixels
/// under a line are mostly of one band.
#[derive(Default)]
struct Recall {
    last: Option<([u8; 3], bool)>,
}

impl Recall {
    fn dark_over(&mut self, c: [u8; 3]) -> bool {
        match self.last {
            Some((l, d)) if l == c => d,
            _ => {
                let d = dark_over(c);
                self.last = Some((c, d));
                d
            }
        }
    }
}

// ---------------------------------------------------------------------------
// Lines over the map

/// Lay strokes on the map: dark ink where the ground is light, near-white
/// where it is dark, at `alpha` of their coverage.
fn ink_strokes(img: &mut Canvas, lay: &Layout, s: &lines::Strokes, alpha: f32) {
    let mut shade = Recall::default();
    for &(k, c) in &s.covered {
        let (x, y) = (lay.map_x + k as usize % s.w, lay.map_y + k as usize / s.w);
        let ink = if shade.dark_over(img.px(x, y)) {
            INK
        } else {
            [250, 250, 250]
        };
        img.blend(x, y, ink, c * alpha);
    }
}

/// The outline's strokes, in the order they are inked with their opacity,
/// and the note that says where the outline comes from.
fn outline_strokes(place: &Placement, o: &Outline<'_>) -> (Vec<(lines::Strokes, f32)>, String) {
    match o {
        Outline::None => (Vec::new(), String::new()),
        Outline::Coastlines(grid) => {
            if grid.shape() != (place.ny, place.nx) {
                return (Vec::new(), String::new());
            }
            let mut coast = Mask::new(place.w, place.h);
            let mut border = Mask::new(place.w, place.h);
            for line in outline::lines() {
                let (m, half) = match line.kind {
                    outline::Kind::Coast => (&mut coast, 0.55),
                    outline::Kind::Border => (&mut border, 0.4),
                };
                stroke_geographic(m, place, grid, &line.points, half);
            }
            (
                vec![(border.strokes(), 0.55), (coast.strokes(), 0.9)],
                "coastlines and borders: Natural Earth".into(),
            )
        }
        Outline::Terrain { height, levels } => {
            let mut m = Mask::new(place.w, place.h);
            for &level in levels.iter() {
                stroke_segments(&mut m, place, &lines::contour(height, level), 0.55);
            }
            let heights: Vec<String> = levels.iter().map(|l| format!("{l}")).collect();
            (
                vec![(m.strokes(), 0.85)],
                format!("outline: model terrain at {} m", heights.join(", ")),
            )
        }
    }
}

/// Stroke a polyline given in (longitude, latitude), placed by the grid.
/// A step that jumps across more than half the grid (a longitude seam, or
/// the far side of a projection) is not drawn.
fn stroke_geographic(m: &mut Mask, place: &Placement, grid: &Grid, pts: &[(f64, f64)], half: f64) {
    let mut prev: Option<(f64, f64)> = None;
    for &(lon, lat) in pts {
        let here = outline::locate(grid, lat, lon);
        if let (Some(a), Some(b)) = (prev, here) {
            let near = (a.0 - b.0).abs() < place.nx as f64 / 2.0
                && (a.1 - b.1).abs() < place.ny as f64 / 2.0;
            if near {
                m.segment(place.pixel(a.0, a.1), place.pixel(b.0, b.1), half);
            }
        }
        prev = here;
    }
}

/// Stroke contour segments given in grid coordinates.
fn stroke_segments(m: &mut Mask, place: &Placement, segs: &[[(f64, f64); 2]], half: f64) {
    for [a, b] in segs {
        m.segment(place.pixel(a.0, a.1), place.pixel(b.0, b.1), half);
    }
}

/// The contour line: a dark core in a light halo, readable on any colour.
fn draw_contour(img: &mut Canvas, lay: &Layout, place: &Placement, c: &Contour<'_>) {
    let segs = lines::contour(&c.values, c.level);
    let mut halo = Mask::new(place.w, place.h);
    let mut core = Mask::new(place.w, place.h);
    stroke_segments(&mut halo, place, &segs, 2.4);
    stroke_segments(&mut core, place, &segs, 1.3);
    blend_strokes(img, lay, &halo.strokes(), [255, 255, 255], 0.85);
    blend_strokes(img, lay, &core.strokes(), CONTOUR_INK, 1.0);
}

/// Tracks over the map: dark lines and dots with a white halo.
fn draw_marks(img: &mut Canvas, lay: &Layout, place: &Placement, marks: &[Vec<(f64, f64)>]) {
    let mut halo = Mask::new(place.w, place.h);
    let mut core = Mask::new(place.w, place.h);
    for mark in marks {
        for w in mark.windows(2) {
            if (w[1].1 - w[0].1).abs() <= place.nx as f64 / 2.0 {
                let (a, b) = (place.pixel(w[0].1, w[0].0), place.pixel(w[1].1, w[1].0));
                halo.segment(a, b, 2.6);
                core.segment(a, b, 1.4);
            }
        }
        for (k, &(row, col)) in mark.iter().enumerate() {
            let r = if k + 1 == mark.len() { 4.5 } else { 2.5 };
            let c = place.pixel(col, row);
            halo.segment(c, c, r + 1.2);
            core.segment(c, c, r);
        }
    }
    blend_strokes(img, lay, &halo.strokes(), [255, 255, 255], 0.9);
    blend_strokes(img, lay, &core.strokes(), CONTOUR_INK, 1.0);
}

/// Colour of the contour line's core.
const CONTOUR_INK: [u8; 3] = [12, 12, 16];

fn blend_strokes(img: &mut Canvas, lay: &Layout, s: &lines::Strokes, ink: [u8; 3], alpha: f32) {
    for &(k, c) in &s.covered {
        let (x, y) = (lay.map_x + k as usize % s.w, lay.map_y + k as usize / s.w);
        img.blend(x, y, ink, c * alpha);
    }
}

// ---------------------------------------------------------------------------
// Colour bar, band edges and labels

/// Label of value `v` on a scale of bands `step` wide: as many decimals as
/// the step needs, scientific notation for very large or small numbers,
/// and a true minus sign.
fn edge_label(v: f64, step: f64) -> String {
    let v = if v.abs() < step.abs() * 1e-6 { 0.0 } else { v };
    let step = step.abs();
    let s = if !(1e-4..1e7).contains(&step) || v.abs() >= 1e8 {
        format!("{v:.2e}")
    } else {
        let decimals = (0..=6)
            .find(|&d| {
                let s = step * 10f64.powi(d);
                (s - s.round()).abs() < 1e-6 * s.max(1.0)
            })
            .unwrap_or(6) as usize;
        format!("{v:.decimals$}")
    };
    s.replace('-', "\u{2212}")
}

/// Which band edges get a label: every `k`-th edge counted from a value that
/// is a multiple of `k` steps (so the labels are round numbers), with the
/// smallest `k` of 1, 2, 4, 5, 10, 20, ... whose labels keep 10 px apart.
fn labelled_edges(scale: &Scale, xs: &[f64], labels: &[String]) -> Vec<usize> {
    let widths: Vec<f64> = labels
        .iter()
        .map(|l| f64::from(text::width(l, LABEL_SIZE, Weight::Regular)))
        .collect();
    let first = (scale.min / scale.step).round() as i64;
    let mut every = [1usize, 2, 4, 5].to_vec();
    every.extend((1..6).flat_map(|p| [10usize.pow(p), 2 * 10usize.pow(p), 5 * 10usize.pow(p)]));
    for k in every {
        let chosen: Vec<usize> = (0..xs.len())
            .filter(|&i| (first + i as i64).rem_euclid(k as i64) == 0)
            .collect();
        let fits = chosen.windows(2).all(|p| {
            let (a, b) = (p[0], p[1]);
            xs[b] - xs[a] >= (widths[a] + widths[b]) / 2.0 + 10.0
        });
        if fits && !chosen.is_empty() {
            return chosen;
        }
    }
    vec![0, xs.len() - 1]
}

fn draw_colour_bar(img: &mut Canvas, lay: &Layout, scale: &Scale) {
    let (x0, w, y0) = (lay.bar_x, lay.bar_w, lay.bar_y);
    let n = scale.bands();
    for x in 0..w {
        let k = ((x as f64 + 0.5) / w as f64 * n as f64) as usize;
        let c = scale.band_colour(k.min(n - 1));
        for y in 0..BAR_H {
            img.set(x0 + x, y0 + y, c);
        }
    }
    // Arrows at the ends: values beyond the range take the end colours.
    let arrow = BAR_H;
    for (end, k) in [(0usize, 0usize), (1, n - 1)] {
        let c = scale.band_colour(k);
        for y in 0..BAR_H {
            let half = (BAR_H as f64 / 2.0 - (y as f64 + 0.5 - BAR_H as f64 / 2.0).abs())
                / (BAR_H as f64 / 2.0);
            let len = (half * arrow as f64 * 0.75).round() as usize;
            for i in 1..=len {
                let x = if end == 0 {
                    x0.saturating_sub(i)
                } else {
                    x0 + w - 1 + i
                };
                img.set(x, y0 + y, c);
            }
        }
    }
    img.frame(x0, y0, w, BAR_H, FRAME);

    let xs: Vec<f64> = (0..=n)
        .map(|i| x0 as f64 + i as f64 * w as f64 / n as f64)
        .collect();
    let labels: Vec<String> = (0..=n)
        .map(|i| edge_label(scale.min + i as f64 * scale.step, scale.step))
        .collect();
    for &x in &xs {
        let x = (x.round() as usize).min(x0 + w);
        for y in 0..TICK_LEN {
            img.set(x, y0 + BAR_H + y, FRAME);
        }
    }
    let baseline = lay.label_y as f32 + 2.0 + text::ascent(LABEL_SIZE, Weight::Regular);
    for i in labelled_edges(scale, &xs, &labels) {
        let tw = f64::from(text::width(&labels[i], LABEL_SIZE, Weight::Regular));
        let left = (xs[i] - tw / 2.0).clamp(2.0, img.w as f64 - tw - 2.0);
        text::draw(
            img,
            left as f32,
            baseline,
            &labels[i],
            LABEL_SIZE,
            Weight::Regular,
            INK,
        );
    }
}

/// The line under the bar: the key to the contour line on the left, the
/// units in the middle, where the outline comes from on the right.
fn draw_foot(img: &mut Canvas, lay: &Layout, units: &str, contour: Option<&str>, note: &str) {
    let baseline = lay.foot_y as f32 + 2.0 + text::ascent(SUBTITLE_SIZE, Weight::Regular);
    let units = text::fit(units, (lay.bar_w / 2) as f32, SUBTITLE_SIZE, Weight::Bold);
    let uw = text::width(&units, SUBTITLE_SIZE, Weight::Bold);
    let ux = (img.w as f32 - uw) / 2.0;
    text::draw(img, ux, baseline, &units, SUBTITLE_SIZE, Weight::Bold, INK);
    let side = (ux - MARGIN as f32 - 12.0).max(0.0);
    if let Some(label) = contour {
        // A short sample of the line, then its label.
        let y = (baseline - 4.0) as usize;
        for x in MARGIN..MARGIN + 22 {
            for dy in 0..2 {
                img.set(x, y + dy, CONTOUR_INK);
            }
        }
        let l = text::fit(label, side - 28.0, NOTE_SIZE, Weight::Regular);
        text::draw(
            img,
            (MARGIN + 28) as f32,
            baseline,
            &l,
            NOTE_SIZE,
            Weight::Regular,
            INK,
        );
    }
    if !note.is_empty() {
        let n = text::fit(note, side, NOTE_SIZE, Weight::Regular);
        let nw = text::width(&n, NOTE_SIZE, Weight::Regular);
        let x = img.w as f32 - MARGIN as f32 - nw;
        text::draw(img, x, baseline, &n, NOTE_SIZE, Weight::Regular, SOFT_INK);
    }
}

// ---------------------------------------------------------------------------
// Title and subtitle

fn draw_bands(img: &mut Canvas, lay: &Layout, title: &str, subtitle: &str) {
    let room = (img.w - 2 * MARGIN) as f32;
    let t = text::fit(title, room, TITLE_SIZE, Weight::Bold);
    let base = lay.title_y as f32 + text::ascent(TITLE_SIZE, Weight::Bold) + 2.0;
    text::draw(img, MARGIN as f32, base, &t, TITLE_SIZE, Weight::Bold, INK);
    let s = text::fit(subtitle, room, SUBTITLE_SIZE, Weight::Regular);
    let base = lay.subtitle_y as f32 + text::ascent(SUBTITLE_SIZE, Weight::Regular) + 1.0;
    text::draw(
        img,
        MARGIN as f32,
        base,
        &s,
        SUBTITLE_SIZE,
        Weight::Regular,
        SOFT_INK,
    );
}

// ---------------------------------------------------------------------------
// Pixels

/// An 8-bit RGB image being drawn.
pub struct Canvas {
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

    fn px(&self, x: usize, y: usize) -> [u8; 3] {
        let k = 3 * (y * self.w + x);
        [self.rgb[k], self.rgb[k + 1], self.rgb[k + 2]]
    }

    /// Mix `c` into one pixel at opacity `a` (0..1), in linear light so that
    /// anti-aliased edges keep their weight; outside the image, nothing.
    pub fn blend(&mut self, x: usize, y: usize, c: [u8; 3], a: f32) {
        if x >= self.w || y >= self.h || a <= 0.0 {
            return;
        }
        let a = f64::from(a.min(1.0));
        let k = 3 * (y * self.w + x);
        let linear = ramps::linear_table();
        for (dst, &over) in self.rgb[k..k + 3].iter_mut().zip(&c) {
            let under = linear[usize::from(*dst)];
            let mixed = under + a * (linear[usize::from(over)] - under);
            *dst = ramps::encode_u8(mixed);
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

    fn encode(&self) -> Result<Vec<u8>, String> {
        let w = u32::try_from(self.w).map_err(|_| format!("quicklook: width {}", self.w))?;
        let h = u32::try_from(self.h).map_err(|_| format!("quicklook: height {}", self.h))?;
        let mut out = Vec::new();
        let mut enc = png::Encoder::new(&mut out, w, h);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        enc.set_compression(png::Compression::Balanced);
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
mod tests;
