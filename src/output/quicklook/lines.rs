//! Lines on the map: anti-aliased strokes gathered in a coverage mask, and
//! contour lines of a field traced cell by cell (marching squares).
//!
//! Coordinates are map pixels, pixel (i, j) centred at (i, j). A stroke's
//! coverage of a pixel is its half width plus half a pixel less the distance
//! from the pixel's centre to the segment, clamped to 0..1 (a box filter of
//! the pixel over a line of that width, common practice). Where strokes meet
//! the mask keeps the larger coverage, so joints are not drawn twice.

use ndarray::ArrayView2;

/// Coverage (0..1) of each map pixel by the strokes drawn into it.
pub struct Mask {
    /// Width in pixels.
    pub w: usize,
    /// Height in pixels.
    pub h: usize,
    /// Coverage, row by row.
    pub cover: Vec<f32>,
}

impl Mask {
    /// An empty mask.
    pub fn new(w: usize, h: usize) -> Mask {
        Mask {
            w,
            h,
            cover: vec![0.0; w * h],
        }
    }

    /// Stroke the segment from `a` to `b`, `half` pixels either side of it.
    pub fn segment(&mut self, a: (f64, f64), b: (f64, f64), half: f64) {
        if ![a.0, a.1, b.0, b.1].iter().all(|v| v.is_finite()) {
            return;
        }
        let reach = half + 1.0;
        let (x0, x1) = (a.0.min(b.0) - reach, a.0.max(b.0) + reach);
        let (y0, y1) = (a.1.min(b.1) - reach, a.1.max(b.1) + reach);
        if x1 < 0.0 || y1 < 0.0 || x0 > self.w as f64 || y0 > self.h as f64 {
            return;
        }
        let (dx, dy) = (b.0 - a.0, b.1 - a.1);
        let len2 = dx * dx + dy * dy;
        let xs = x0.max(0.0).ceil() as usize..=(x1.min(self.w as f64 - 1.0).floor() as usize);
        let ys = y0.max(0.0).ceil() as usize..=(y1.min(self.h as f64 - 1.0).floor() as usize);
        for y in ys {
            for x in xs.clone() {
                let (px, py) = (x as f64 - a.0, y as f64 - a.1);
                let t = if len2 > 0.0 {
                    ((px * dx + py * dy) / len2).clamp(0.0, 1.0)
                } else {
                    0.0
                };
                let d = ((px - t * dx).powi(2) + (py - t * dy).powi(2)).sqrt();
                let c = (half + 0.5 - d).clamp(0.0, 1.0) as f32;
                if c > 0.0 {
                    let k = y * self.w + x;
                    if c > self.cover[k] {
                        self.cover[k] = c;
                    }
                }
            }
        }
    }

    /// Whether any pixel is covered.
    pub fn any(&self) -> bool {
        self.cover.iter().any(|&c| c > 0.0)
    }

    /// The covered pixels only, to lay on an image.
    pub fn strokes(&self) -> Strokes {
        let covered = self
            .cover
            .iter()
            .enumerate()
            .filter(|(_, &c)| c > 0.0)
            .map(|(k, &c)| (k as u32, c))
            .collect();
        Strokes { w: self.w, covered }
    }
}

/// The covered pixels of a [`Mask`], row by row: (pixel index, coverage).
pub struct Strokes {
    /// Width of the mask, pixels.
    pub w: usize,
    /// Index (row times width plus column) and coverage of each covered pixel.
    pub covered: Vec<(u32, f32)>,
}

/// Where the level crosses the edge between two corner values, as a fraction
/// from the first; `None` unless the values lie on opposite sides.
fn cut(a: f64, b: f64, level: f64) -> Option<f64> {
    if (a < level) == (b < level) {
        return None;
    }
    Some(((level - a) / (b - a)).clamp(0.0, 1.0))
}

/// Segments of the contour `level` of `v`, in grid coordinates (column,
/// row), one or two per grid cell whose four corners are all valid. A cell
/// the level crosses on all four edges (a saddle) is joined the way the mean
/// of its corners says: the two corners on the mean's side stay connected
/// (common practice). Cells with a missing corner are left out, so the line
/// stops where the field does.
pub fn contour(v: &ArrayView2<'_, f32>, level: f64) -> Vec<[(f64, f64); 2]> {
    use rayon::prelude::*;
    let ny = v.nrows();
    (0..ny.saturating_sub(1))
        .into_par_iter()
        .flat_map_iter(|r| contour_row(v, level, r))
        .collect()
}

/// The segments of the cells between grid rows `r` and `r + 1`.
fn contour_row(v: &ArrayView2<'_, f32>, level: f64, r: usize) -> Vec<[(f64, f64); 2]> {
    let nx = v.ncols();
    let mut out = Vec::new();
    for c in 0..nx.saturating_sub(1) {
        // Corners counter-clockwise from (c, r).
        let z = [
            f64::from(v[[r, c]]),
            f64::from(v[[r, c + 1]]),
            f64::from(v[[r + 1, c + 1]]),
            f64::from(v[[r + 1, c]]),
        ];
        if !z.iter().all(|x| x.is_finite()) {
            continue;
        }
        let (cf, rf) = (c as f64, r as f64);
        // Crossing points on the edges bottom, right, top, left.
        let pts: [Option<(f64, f64)>; 4] = [
            cut(z[0], z[1], level).map(|f| (cf + f, rf)),
            cut(z[1], z[2], level).map(|f| (cf + 1.0, rf + f)),
            cut(z[3], z[2], level).map(|f| (cf + f, rf + 1.0)),
            cut(z[0], z[3], level).map(|f| (cf, rf + f)),
        ];
        let on: Vec<(f64, f64)> = pts.iter().flatten().copied().collect();
        match on.len() {
            2 => out.push([on[0], on[1]]),
            4 => {
                let mean = z.iter().sum::<f64>() / 4.0;
                let [b, rt, t, l] = pts.map(|p| p.unwrap_or((cf, rf)));
                if (mean < level) == (z[0] < level) {
                    // Corner 0 joins the centre: cut off corners 1 and 3.
                    out.push([b, rt]);
                    out.push([t, l]);
                } else {
                    out.push([b, l]);
                    out.push([rt, t]);
                }
            }
            _ => {}
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn a_stroke_covers_its_width_and_fades_at_the_edges() {
        let mut m = Mask::new(20, 10);
        m.segment((2.0, 5.0), (17.0, 5.0), 1.0);
        // On the line: full; 1 px off: half (1 + 0.5 - 1); 2 px off: none.
        assert_eq!(m.cover[5 * 20 + 10], 1.0);
        assert_eq!(m.cover[4 * 20 + 10], 0.5);
        assert_eq!(m.cover[3 * 20 + 10], 0.0);
        // Past the ends by 2 px: none.
        assert_eq!(m.cover[5 * 20 + 19], 0.0);
        // Off the canvas: nothing, no panic.
        m.segment((-50.0, -50.0), (-40.0, -45.0), 1.0);
        m.segment((f64::NAN, 1.0), (3.0, 3.0), 1.0);
    }

    #[test]
    fn the_contour_of_a_plane_is_the_line_where_it_equals_the_level() {
        // v = col + 2 row on a 6 x 5 grid; the 4.5 contour is col = 4.5 - 2 row.
        let v = Array2::from_shape_fn((5, 6), |(r, c)| (c + 2 * r) as f32);
        let segs = contour(&v.view(), 4.5);
        assert!(!segs.is_empty());
        for s in &segs {
            for (c, r) in s {
                assert!((c + 2.0 * r - 4.5).abs() < 1e-9, "({c}, {r})");
            }
        }
        // A cell with a missing corner has no segment.
        let mut holed = v.clone();
        holed[[1, 2]] = f32::NAN;
        let n = contour(&holed.view(), 4.5).len();
        assert!(n < segs.len());
        // A level the field never reaches: no line.
        assert!(contour(&v.view(), 100.0).is_empty());
    }

    #[test]
    fn a_circle_is_traced_within_a_tenth_of_a_cell() {
        // Distance from (10, 10), contour 6: a circle of radius 6.
        let v = Array2::from_shape_fn((21, 21), |(r, c)| {
            ((c as f64 - 10.0).hypot(r as f64 - 10.0)) as f32
        });
        let segs = contour(&v.view(), 6.0);
        let mut worst: f64 = 0.0;
        for s in &segs {
            for (c, r) in s {
                worst = worst.max(((c - 10.0).hypot(r - 10.0) - 6.0).abs());
            }
        }
        // Linear interpolation of a distance field along grid edges: the
        // crossing points lie within 0.1 cell of the true circle.
        assert!(worst < 0.1, "{worst}");
        // Closed: each crossing point is shared by exactly two segments.
        let key = |p: &(f64, f64)| ((p.0 * 1e6).round() as i64, (p.1 * 1e6).round() as i64);
        let mut count = std::collections::HashMap::new();
        for s in &segs {
            for p in s {
                *count.entry(key(p)).or_insert(0) += 1;
            }
        }
        assert!(count.values().all(|&n| n == 2), "{count:?}");
    }

    #[test]
    fn a_saddle_is_joined_by_the_cell_mean() {
        // Corners 0 and 2 high, 1 and 3 low; level 0.5; the mean 0.6 is high,
        // so the high corners connect and each low corner is cut off.
        let v = Array2::from_shape_vec((2, 2), vec![1.0_f32, 0.0, 0.4, 1.0]).unwrap();
        let segs = contour(&v.view(), 0.5);
        assert_eq!(segs.len(), 2);
        for s in &segs {
            // Each segment cuts off one low corner: (1, 0) or (0, 1).
            let mid = ((s[0].0 + s[1].0) / 2.0, (s[0].1 + s[1].1) / 2.0);
            let near_low = (mid.0 - 1.0).hypot(mid.1) < 0.75 || mid.0.hypot(mid.1 - 1.0) < 0.75;
            assert!(near_low, "{s:?}");
        }
    }
}
