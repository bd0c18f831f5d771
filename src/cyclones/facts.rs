//! What the diagnostics say round a cyclone centre: the largest values within
//! a radius, the terrain upstream along the steering flow, and the upper-level
//! PV on the isentropic surface that crosses the tropopause there.
//!
//! In: a step's fields on the model's grid (NaN where missing) with the grid's
//! latitudes and longitudes, and a centre. Out: [`Facts`], NaN where a field
//! is absent or missing within the radius. Pure: no I/O, no logging. The facts
//! are what the fields hold, not a verdict on the cyclone.

use ndarray::{Array2, Array3, ArrayView2, Axis};

use super::detect::distance;
use super::track::displace;

/// A step's grid.
#[derive(Clone, Copy)]
pub struct Grid<'a> {
    /// Latitude and longitude of every point, degrees.
    pub lat: ArrayView2<'a, f64>,
    pub lon: ArrayView2<'a, f64>,
    /// The columns wrap round the earth.
    pub periodic: bool,
    /// Earth's radius, m.
    pub radius: f64,
}

/// The fields the facts are taken from (each absent where the step has none).
#[derive(Debug, Default, Clone)]
pub struct Fields {
    /// Steering wind toward east and north, m s-1.
    pub steer: Option<(Array2<f32>, Array2<f32>)>,
    /// Maximum Eady growth rate of the layer, s-1.
    pub eady: Option<Array2<f32>>,
    /// Thickness of the 1000-500 hPa layer, m.
    pub thick: Option<Array2<f32>>,
    /// Terrain height, m.
    pub orog: Option<Array2<f32>>,
    /// Fractional stretching of the isentropic layers since the previous step (layers, rows, columns).
    pub stretch: Option<Array3<f32>>,
    /// The budget's stretching part of the layers' relative vorticity, eta_d (depth_a/depth_d - 1), s-1.
    pub zeta_stretch: Option<Array3<f32>>,
    /// The budget's actual minus conserved-PV relative vorticity of the layers, s-1.
    pub zeta_diff: Option<Array3<f32>>,
    /// Low-level PV mean, PVU.
    pub low_pv: Option<Array2<f32>>,
    /// Equivalent potential temperature at 850 hPa, K.
    pub theta_e_850: Option<Array2<f32>>,
    /// Potential temperature of the dynamic tropopause, K.
    pub trop_theta: Option<Array2<f32>>,
}

/// What the diagnostics say round one centre.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Facts {
    /// Steering wind at the centre, toward east and north, m s-1.
    pub steer_u: f64,
    pub steer_v: f64,
    /// Largest Eady growth rate within the radius, per day.
    pub eady_max: f64,
    /// Largest 1000-500 hPa thickness gradient within the radius, m per 100 km.
    pub thick_gradient_max: f64,
    /// Largest fractional stretching of an isentropic layer within the radius.
    pub stretch_max: f64,
    /// Largest vorticity the budget puts down to that stretching within the radius, s-1.
    pub zeta_stretch_max: f64,
    /// Highest terrain on the line from the centre one radius upstream along the steering wind, m.
    pub orog_upstream_max: f64,
    /// Terrain at the centre, m.
    pub orog_centre: f64,
    /// Largest low-level PV mean within the radius, PVU.
    pub low_pv_max: f64,
    /// Largest actual minus conserved-PV relative vorticity of an isentropic layer within the radius, s-1.
    pub zeta_diff_max: f64,
    /// Largest 850 hPa equivalent potential temperature within the radius, K.
    pub theta_e_850_max: f64,
    /// Median potential temperature of the dynamic tropopause within the radius, K.
    pub trop_theta: f64,
    /// The isentropic surface nearest to it, K.
    pub upper_theta: f64,
    /// Largest PV on that surface within the radius, PVU.
    pub upper_pv_max: f64,
    /// Where that largest PV lies: distance from the centre (km) and the
    /// component of that offset along the steering wind (km, negative: upstream).
    pub upper_pv_distance: f64,
    pub upper_pv_along_flow: f64,
}

impl Default for Facts {
    fn default() -> Self {
        let n = f64::NAN;
        Facts {
            steer_u: n,
            steer_v: n,
            eady_max: n,
            thick_gradient_max: n,
            stretch_max: n,
            zeta_stretch_max: n,
            orog_upstream_max: n,
            orog_centre: n,
            low_pv_max: n,
            zeta_diff_max: n,
            theta_e_850_max: n,
            trop_theta: n,
            upper_theta: n,
            upper_pv_max: n,
            upper_pv_distance: n,
            upper_pv_along_flow: n,
        }
    }
}

/// The grid points within `radius` m of (j, i), grown from it through
/// neighbours (the disc on any grid; the seam of a global grid is crossed).
pub fn disc(g: &Grid<'_>, j: usize, i: usize, radius: f64) -> Vec<(usize, usize)> {
    let (ny, nx) = g.lat.dim();
    let (la, lo) = (g.lat[(j, i)], g.lon[(j, i)]);
    let mut seen = std::collections::HashSet::new();
    let mut out = vec![(j, i)];
    seen.insert((j, i));
    let mut k = 0;
    while k < out.len() {
        let (pj, pi) = out[k];
        k += 1;
        for (dj, di) in [(-1i64, 0i64), (1, 0), (0, -1), (0, 1)] {
            let jj = pj as i64 + dj;
            let mut ii = pi as i64 + di;
            if jj < 0 || jj >= ny as i64 {
                continue;
            }
            if ii < 0 || ii >= nx as i64 {
                if !g.periodic {
                    continue;
                }
                ii = ii.rem_euclid(nx as i64);
            }
            let q = (jj as usize, ii as usize);
            if seen.insert(q) && distance(g.radius, la, lo, g.lat[q], g.lon[q]) <= radius {
                out.push(q);
            }
        }
    }
    out
}

/// Largest finite value of `f` over the points, and where.
pub fn max_over(
    f: ArrayView2<'_, f32>,
    points: &[(usize, usize)],
) -> Option<(f64, (usize, usize))> {
    points
        .iter()
        .filter_map(|&q| {
            let v = f64::from(f[q]);
            v.is_finite().then_some((v, q))
        })
        .max_by(|a, b| a.0.total_cmp(&b.0))
}

fn max_of(f: Option<&Array2<f32>>, points: &[(usize, usize)]) -> f64 {
    f.and_then(|f| max_over(f.view(), points))
        .map_or(f64::NAN, |m| m.0)
}

fn max_of_layers(f: Option<&Array3<f32>>, points: &[(usize, usize)]) -> f64 {
    f.map_or(f64::NAN, |a| {
        a.axis_iter(Axis(0))
            .filter_map(|l| max_over(l, points).map(|m| m.0))
            .fold(f64::NAN, f64::max)
    })
}

/// Magnitude of the horizontal gradient of `h` at (j, i), per metre: centred
/// differences along the grid's rows and columns over the great-circle
/// distances between the neighbours (the grids leeward reads have orthogonal
/// axes; common practice). NaN at an edge or next to a missing value.
pub fn gradient(g: &Grid<'_>, h: ArrayView2<'_, f32>, j: usize, i: usize) -> f64 {
    let (ny, nx) = h.dim();
    if j == 0 || j + 1 >= ny {
        return f64::NAN;
    }
    let (iw, ie) = if i == 0 || i + 1 >= nx {
        if !g.periodic {
            return f64::NAN;
        }
        ((i + nx - 1) % nx, (i + 1) % nx)
    } else {
        (i - 1, i + 1)
    };
    let d = |a: (usize, usize), b: (usize, usize)| {
        distance(g.radius, g.lat[a], g.lon[a], g.lat[b], g.lon[b])
    };
    let (w, e, s, n) = ((j, iw), (j, ie), (j - 1, i), (j + 1, i));
    let dx = (f64::from(h[e]) - f64::from(h[w])) / d(w, e);
    let dy = (f64::from(h[n]) - f64::from(h[s])) / d(s, n);
    dx.hypot(dy)
}

/// The grid point nearest (lat, lon), found by walking from (j, i) to the
/// neighbour nearest the target until none is nearer (grids are smooth).
pub fn nearest_point(g: &Grid<'_>, j: usize, i: usize, lat: f64, lon: f64) -> (usize, usize) {
    let (ny, nx) = g.lat.dim();
    let mut at = (j, i);
    let d = |q: (usize, usize)| distance(g.radius, lat, lon, g.lat[q], g.lon[q]);
    let mut best = d(at);
    loop {
        let mut moved = false;
        for (dj, di) in [
            (-1i64, 0i64),
            (1, 0),
            (0, -1),
            (0, 1),
            (-1, -1),
            (-1, 1),
            (1, -1),
            (1, 1),
        ] {
            let jj = at.0 as i64 + dj;
            let mut ii = at.1 as i64 + di;
            if jj < 0 || jj >= ny as i64 {
                continue;
            }
            if ii < 0 || ii >= nx as i64 {
                if !g.periodic {
                    continue;
                }
                ii = ii.rem_euclid(nx as i64);
            }
            let q = (jj as usize, ii as usize);
            let dq = d(q);
            if dq < best {
                best = dq;
                at = q;
                moved = true;
            }
        }
        if !moved {
            return at;
        }
    }
}

/// Highest terrain on the line from (lat, lon) `length` m upstream along the
/// wind (u, v), sampled every `step` m at the nearest grid point.
pub fn upstream_max(
    g: &Grid<'_>,
    orog: ArrayView2<'_, f32>,
    from: (usize, usize),
    wind: (f64, f64),
    length: f64,
    step: f64,
) -> f64 {
    let speed = wind.0.hypot(wind.1);
    if !(speed > 0.0 && step > 0.0) {
        return f64::NAN;
    }
    let (ux, uy) = (wind.0 / speed, wind.1 / speed);
    let (la, lo) = (g.lat[from], g.lon[from]);
    let mut best = f64::NAN;
    let mut at = from;
    let n = (length / step).ceil() as usize;
    for k in 0..=n {
        let s = (k as f64 * step).min(length);
        let (pl, po) = displace(g.radius, la, lo, -ux * s, -uy * s);
        at = nearest_point(g, at.0, at.1, pl, po);
        best = best.max(f64::from(orog[at]));
    }
    best
}

/// The shorter of the distances from `at` to its neighbours along a row and a column, m.
pub fn grid_length(g: &Grid<'_>, at: (usize, usize)) -> f64 {
    let (ny, nx) = g.lat.dim();
    let d = |q: (usize, usize)| distance(g.radius, g.lat[at], g.lon[at], g.lat[q], g.lon[q]);
    let along = if at.1 + 1 < nx {
        d((at.0, at.1 + 1))
    } else if at.1 > 0 {
        d((at.0, at.1 - 1))
    } else {
        f64::INFINITY
    };
    let across = if at.0 + 1 < ny {
        d((at.0 + 1, at.1))
    } else if at.0 > 0 {
        d((at.0 - 1, at.1))
    } else {
        f64::INFINITY
    };
    along.min(across)
}

/// Index of the surface among `thetas` nearest to `t` (K), if any is within 10 K.
pub fn nearest_surface(thetas: &[f64], t: f64) -> Option<usize> {
    thetas
        .iter()
        .enumerate()
        .filter(|(_, x)| (*x - t).abs() <= 10.0)
        .min_by(|a, b| (a.1 - t).abs().total_cmp(&(b.1 - t).abs()))
        .map(|(k, _)| k)
}

/// Median of the finite values of `f` over the points.
pub fn median_over(f: ArrayView2<'_, f32>, points: &[(usize, usize)]) -> f64 {
    let mut v: Vec<f64> = points
        .iter()
        .map(|&q| f64::from(f[q]))
        .filter(|x| x.is_finite())
        .collect();
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Every fact but the upper-level PV (see [`upper_pv`]) round the centre at
/// grid point `at` within `radius` m.
pub fn facts(
    g: &Grid<'_>,
    f: &Fields,
    at: (usize, usize),
    radius: f64,
) -> (Facts, Vec<(usize, usize)>) {
    let points = disc(g, at.0, at.1, radius);
    let mut out = Facts::default();
    if let Some((u, v)) = &f.steer {
        out.steer_u = f64::from(u[at]);
        out.steer_v = f64::from(v[at]);
    }
    out.eady_max = max_of(f.eady.as_ref(), &points) * 86_400.0;
    if let Some(h) = &f.thick {
        out.thick_gradient_max = points
            .iter()
            .map(|&(j, i)| gradient(g, h.view(), j, i))
            .fold(f64::NAN, f64::max)
            * 1.0e5;
    }
    out.stretch_max = max_of_layers(f.stretch.as_ref(), &points);
    out.zeta_stretch_max = max_of_layers(f.zeta_stretch.as_ref(), &points);
    out.zeta_diff_max = max_of_layers(f.zeta_diff.as_ref(), &points);
    if let Some(o) = &f.orog {
        out.orog_centre = f64::from(o[at]);
        // Half a grid length, so that no crest is stepped over.
        let step = 0.5 * grid_length(g, at).clamp(500.0, radius);
        out.orog_upstream_max =
            upstream_max(g, o.view(), at, (out.steer_u, out.steer_v), radius, step);
    }
    out.low_pv_max = max_of(f.low_pv.as_ref(), &points);
    out.theta_e_850_max = max_of(f.theta_e_850.as_ref(), &points);
    if let Some(t) = &f.trop_theta {
        out.trop_theta = median_over(t.view(), &points);
    }
    (out, points)
}

/// The upper-level PV facts: the largest PV on the surface `theta` (`pv` on it,
/// PVU) within `points`, its distance from the centre at `at` and the part of
/// that offset along the steering wind.
pub fn upper_pv(
    g: &Grid<'_>,
    pv: ArrayView2<'_, f32>,
    theta: f64,
    at: (usize, usize),
    points: &[(usize, usize)],
    out: &mut Facts,
) {
    out.upper_theta = theta;
    let Some((v, q)) = max_over(pv, points) else {
        return;
    };
    out.upper_pv_max = v;
    let (la, lo) = (g.lat[at], g.lon[at]);
    out.upper_pv_distance = distance(g.radius, la, lo, g.lat[q], g.lon[q]) / 1000.0;
    let speed = out.steer_u.hypot(out.steer_v);
    if speed > 0.0 {
        let dl = (g.lon[q] - lo + 540.0).rem_euclid(360.0) - 180.0;
        let c = ((la + g.lat[q]) / 2.0).to_radians().cos();
        let ex = g.radius * c * dl.to_radians();
        let ny = g.radius * (g.lat[q] - la).to_radians();
        out.upper_pv_along_flow = (ex * out.steer_u + ny * out.steer_v) / speed / 1000.0;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: f64 = 6_371_229.0;

    fn latlon(lat0: f64, lon0: f64, d: f64, ny: usize, nx: usize) -> (Array2<f64>, Array2<f64>) {
        (
            Array2::from_shape_fn((ny, nx), |(j, _)| lat0 + d * j as f64),
            Array2::from_shape_fn((ny, nx), |(_, i)| lon0 + d * i as f64),
        )
    }

    #[test]
    fn the_disc_holds_every_point_within_the_radius_and_no_other() {
        let (lat, lon) = latlon(30.0, 340.0, 0.5, 81, 121); // crosses 0 E as 360
        let g = Grid {
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        let d = disc(&g, 40, 40, 500e3);
        let brute: Vec<(usize, usize)> = lat
            .indexed_iter()
            .map(|(q, _)| q)
            .filter(|&q| distance(A, 50.0, 0.0, lat[q], lon[q]) <= 500e3)
            .collect();
        let mut got = d.clone();
        got.sort_unstable();
        assert_eq!(got, brute);
        // pi r^2 over the area of a cell at 50 N (55.6 km by 35.7 km): about 395 points.
        assert!((360..430).contains(&got.len()), "{}", got.len());
    }

    #[test]
    fn gradient_of_a_field_linear_in_distance() {
        // h = 10 m per 100 km northward: its gradient is 1e-4 per metre (by hand).
        let (lat, lon) = latlon(40.0, 0.0, 1.0, 21, 21);
        let g = Grid {
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        let h = lat.mapv(|p| (5400.0 + 1e-4 * A * p.to_radians()) as f32);
        let got = gradient(&g, h.view(), 10, 10);
        assert!((got - 1e-4).abs() < 1e-7, "{got}");
        assert!(gradient(&g, h.view(), 0, 10).is_nan());
    }

    #[test]
    fn terrain_upstream_and_upper_pv_offset() {
        // A ridge along 10 E; a centre at 50 N 14 E in a westerly: the ridge is 286 km
        // upstream, within 500 km; in an easterly it is behind the centre.
        let (lat, lon) = latlon(40.0, 0.0, 0.25, 81, 97);
        let g = Grid {
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        let orog = lon.mapv(|l| (2000.0 * (-((l - 10.0) / 0.6).powi(2)).exp()) as f32);
        let at = (40, 56);
        let west = upstream_max(&g, orog.view(), at, (15.0, 0.0), 500e3, 8e3);
        let east = upstream_max(&g, orog.view(), at, (-15.0, 0.0), 500e3, 8e3);
        assert!(west > 1900.0 && east < 1.0, "{west} {east}");
        // PV largest 2 degrees west of the centre: 143 km upstream of it in a westerly.
        let pv = Array2::from_shape_fn(lat.dim(), |q| {
            let r = distance(A, 50.0, 12.0, lat[q], lon[q]) / 60e3;
            (8.0 * (-r * r).exp()) as f32
        });
        let points = disc(&g, at.0, at.1, 500e3);
        let mut f = Facts {
            steer_u: 15.0,
            steer_v: 0.0,
            ..Facts::default()
        };
        upper_pv(&g, pv.view(), 320.0, at, &points, &mut f);
        assert!((f.upper_pv_max - 8.0).abs() < 1e-3);
        assert!((f.upper_pv_distance - 143.0).abs() < 1.0, "{f:?}");
        assert!((f.upper_pv_along_flow + 143.0).abs() < 1.0, "{f:?}");
        assert_eq!(
            nearest_surface(&[300.0, 310.0, 320.0, 330.0], 323.0),
            Some(2)
        );
        assert_eq!(nearest_surface(&[300.0, 310.0], 340.0), None);
    }
}
