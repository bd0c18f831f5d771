//! Cyclone centres on one field: grid-point minima of mean sea-level pressure
//! enclosed by at least one closed isobar, in the manner of the closed-contour
//! identification of Wernli and Schwierz 2006 (J. Atmos. Sci. 63, 2486-2507;
//! from memory).
//!
//! In: a [`Surface`]: the field on the model's grid (Pa, NaN where missing),
//! the latitude and longitude of every point, whether the grid wraps round the
//! earth, the earth's radius. Out: the [`Centre`]s, in grid order. Pure: no I/O,
//! no logging.
//!
//! The isobars are the multiples of the contour interval, as an analyst draws
//! them. An isobar is closed round a minimum when the connected region of
//! points below it that holds the minimum (eight neighbours) touches no edge of
//! a limited-area grid (a pole row and the seam of a global grid are not edges)
//! and no missing point, holds no deeper minimum (equal values: the first in
//! grid order is the deeper), and reaches no farther from the minimum than the
//! largest radius allowed. The depth is the outermost closed isobar minus the
//! central pressure.

use std::cmp::Reverse;
use std::collections::BinaryHeap;

use ndarray::ArrayView2;
use rayon::prelude::*;

/// The field the centres are found on, with its grid.
#[derive(Clone, Copy)]
pub struct Surface<'a> {
    /// Values, Pa, (rows, columns); NaN where missing.
    pub values: ArrayView2<'a, f32>,
    /// Latitude of every point, degrees.
    pub lat: ArrayView2<'a, f64>,
    /// Longitude of every point, degrees.
    pub lon: ArrayView2<'a, f64>,
    /// The columns wrap round the earth (a global grid).
    pub periodic: bool,
    /// Earth's radius, m.
    pub radius: f64,
}

/// How centres are found.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Settings {
    /// Interval of the isobars, Pa.
    pub interval: f64,
    /// Farthest a closed isobar may reach from its centre, m.
    pub max_radius: f64,
}

/// One centre.
#[derive(Debug, Clone, PartialEq)]
pub struct Centre {
    /// Row and column of the grid-point minimum.
    pub j: usize,
    pub i: usize,
    /// Position of the minimum of a quadratic fitted to the 3 x 3 points round
    /// it (the grid point where the fit has none within half a grid length), degrees.
    pub lat: f64,
    pub lon: f64,
    /// Central pressure of that fit, Pa (never above the grid-point value).
    pub pressure: f64,
    /// The value at the grid point, Pa.
    pub grid_pressure: f64,
    /// The outermost closed isobar, Pa.
    pub outer: f64,
    /// outer - grid_pressure, Pa.
    pub depth: f64,
}

/// Great-circle distance between two points (degrees), m (haversine formula; common practice).
pub fn distance(radius: f64, lat1: f64, lon1: f64, lat2: f64, lon2: f64) -> f64 {
    let (p1, p2) = (lat1.to_radians(), lat2.to_radians());
    let dp = p2 - p1;
    let dl = (lon2 - lon1).to_radians();
    let h = (dp / 2.0).sin().powi(2) + p1.cos() * p2.cos() * (dl / 2.0).sin().powi(2);
    2.0 * radius * h.sqrt().min(1.0).asin()
}

impl Surface<'_> {
    fn dim(&self) -> (usize, usize) {
        self.values.dim()
    }

    fn at(&self, j: usize, i: usize) -> f64 {
        f64::from(self.values[(j, i)])
    }

    fn pole_row(&self, j: usize) -> bool {
        self.periodic && self.lat[(j, 0)].abs() > 89.999
    }

    /// The eight neighbours of (j, i) that exist; `open` is set when (j, i) lies
    /// on an edge a region may not touch.
    fn neighbours(&self, j: usize, i: usize, out: &mut Vec<(usize, usize)>) -> bool {
        let (ny, nx) = self.dim();
        out.clear();
        let mut open = false;
        for dj in [-1i64, 0, 1] {
            for di in [-1i64, 0, 1] {
                if dj == 0 && di == 0 {
                    continue;
                }
                let jj = j as i64 + dj;
                let mut ii = i as i64 + di;
                if jj < 0 || jj >= ny as i64 {
                    open |= !self.pole_row(j);
                    continue;
                }
                if ii < 0 || ii >= nx as i64 {
                    if !self.periodic {
                        open = true;
                        continue;
                    }
                    ii = ii.rem_euclid(nx as i64);
                }
                out.push((jj as usize, ii as usize));
            }
        }
        open
    }
}

/// Every centre of `s`, in grid order: the grid-point minima found row by row
/// on every core, then each one's closed isobars looked for, a share of the
/// minima per task (each task with its own record of the points its floods took).
pub fn find_centres(s: &Surface<'_>, set: &Settings) -> Vec<Centre> {
    let (ny, nx) = s.dim();
    let minima: Vec<(usize, usize)> = (0..ny)
        .into_par_iter()
        .flat_map_iter(|j| row_minima(s, j))
        .collect();
    let per_task = minima
        .len()
        .div_ceil(4 * rayon::current_num_threads())
        .max(1);
    minima
        .par_chunks(per_task)
        .flat_map_iter(|share| {
            // Points taken by the flood of the minimum being looked at: the stamp
            // of its turn, so that one array serves every minimum of the share.
            let mut taken = Flood {
                stamp: vec![0; ny * nx],
                turn: 0,
            };
            let found: Vec<Centre> = share
                .iter()
                .filter_map(|&(j, i)| centre(s, set, j, i, &mut taken))
                .collect();
            found
        })
        .collect()
}

/// The grid-point minima of row `j`: finite points with no lower and no missing
/// neighbour, not on an edge a region may not touch.
fn row_minima(s: &Surface<'_>, j: usize) -> Vec<(usize, usize)> {
    let (ny, nx) = s.dim();
    let mut out = Vec::new();
    let mut nb = Vec::with_capacity(8);
    let lower = |a: usize, b: usize, v: f64| {
        let x = s.at(a, b);
        x.is_nan() || x < v
    };
    for i in 0..nx {
        let v = s.at(j, i);
        if !v.is_finite() {
            continue;
        }
        let inner = j > 0 && j + 1 < ny && i > 0 && i + 1 < nx;
        let not_minimum = if inner {
            // The eight neighbours straight away, none on an edge or across the seam.
            [j - 1, j, j + 1].into_iter().any(|a| {
                [i - 1, i, i + 1]
                    .into_iter()
                    .any(|b| (a, b) != (j, i) && lower(a, b, v))
            })
        } else {
            let open = s.neighbours(j, i, &mut nb);
            open || nb.iter().any(|&(a, b)| lower(a, b, v))
        };
        if !not_minimum {
            out.push((j, i));
        }
    }
    out
}

/// The centre at the grid-point minimum (j, i), if an isobar is closed round it.
fn centre(
    s: &Surface<'_>,
    set: &Settings,
    j: usize,
    i: usize,
    taken: &mut Flood,
) -> Option<Centre> {
    let v = s.at(j, i);
    let outer = outermost_closed(s, set, j, i, taken)?;
    let (lat, lon, pressure) = refine(s, j, i);
    Some(Centre {
        j,
        i,
        lat,
        lon,
        pressure,
        grid_pressure: v,
        outer,
        depth: outer - v,
    })
}

/// The points one flood has taken, by turn.
struct Flood {
    stamp: Vec<u32>,
    turn: u32,
}

/// Value and grid order of a point, for the ordered flood.
#[derive(PartialEq)]
struct Key(f64, usize);
impl Eq for Key {}
impl PartialOrd for Key {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Key {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.0
            .total_cmp(&other.0)
            .then_with(|| self.1.cmp(&other.1))
    }
}

/// The outermost closed isobar round the minimum at (j, i), if any: the points
/// are taken lowest first from the region grown from the minimum (a priority
/// flood), so that all the points below an isobar L are taken before the first
/// at or above it; L is closed when none of them broke a rule.
fn outermost_closed(
    s: &Surface<'_>,
    set: &Settings,
    j: usize,
    i: usize,
    taken: &mut Flood,
) -> Option<f64> {
    let (_, nx) = s.dim();
    let v0 = s.at(j, i);
    let me = j * nx + i;
    let (lat0, lon0) = (s.lat[(j, i)], s.lon[(j, i)]);
    let mut level = ((v0 / set.interval).floor() + 1.0) * set.interval;
    let mut closed = None;
    taken.turn += 1;
    let turn = taken.turn;
    let mut heap = BinaryHeap::new();
    let mut nb = Vec::with_capacity(8);
    heap.push(Reverse(Key(v0, me)));
    taken.stamp[me] = turn;
    while let Some(Reverse(Key(v, idx))) = heap.pop() {
        while v >= level {
            closed = Some(level);
            level += set.interval;
        }
        let (pj, pi) = (idx / nx, idx % nx);
        let deeper = v < v0 || (v == v0 && idx < me);
        let open = s.neighbours(pj, pi, &mut nb);
        let far = distance(s.radius, lat0, lon0, s.lat[(pj, pi)], s.lon[(pj, pi)]) > set.max_radius;
        if deeper || open || far || nb.iter().any(|&(a, b)| !s.at(a, b).is_finite()) {
            return closed;
        }
        for &(a, b) in &nb {
            let k = a * nx + b;
            if taken.stamp[k] != turn {
                taken.stamp[k] = turn;
                heap.push(Reverse(Key(s.at(a, b), k)));
            }
        }
    }
    // The whole grid below the next isobar, with nothing broken: a closed world.
    closed
}

/// The minimum of the quadratic through the 3 x 3 points round (j, i):
/// f = f0 + g.x + x.H.x / 2 with centred differences for g and H, minimum at
/// x = -H^-1 g (common practice); the grid point itself where H is not positive
/// definite or the minimum lies more than half a grid length away.
fn refine(s: &Surface<'_>, j: usize, i: usize) -> (f64, f64, f64) {
    let (ny, nx) = s.dim();
    let v0 = s.at(j, i);
    let here = (s.lat[(j, i)], s.lon[(j, i)], v0);
    if j == 0 || j + 1 >= ny || s.pole_row(j) {
        return here;
    }
    let col = |d: i64| (i as i64 + d).rem_euclid(nx as i64) as usize;
    if !s.periodic && (i == 0 || i + 1 >= nx) {
        return here;
    }
    let f = |dj: i64, di: i64| s.at((j as i64 + dj) as usize, col(di));
    let (gx, gy) = ((f(0, 1) - f(0, -1)) / 2.0, (f(1, 0) - f(-1, 0)) / 2.0);
    let (hxx, hyy) = (f(0, 1) - 2.0 * v0 + f(0, -1), f(1, 0) - 2.0 * v0 + f(-1, 0));
    let hxy = (f(1, 1) - f(1, -1) - f(-1, 1) + f(-1, -1)) / 4.0;
    let det = hxx * hyy - hxy * hxy;
    if !(hxx > 0.0 && det > 0.0) {
        return here;
    }
    let dx = -(hyy * gx - hxy * gy) / det;
    let dy = -(hxx * gy - hxy * gx) / det;
    if !(dx.abs() <= 0.5 && dy.abs() <= 0.5) {
        return here;
    }
    let p = v0 + 0.5 * (gx * dx + gy * dy);
    let (lat, lon) = position(s, j, i, dy, dx);
    (lat, lon, p.min(v0))
}

/// Latitude and longitude at the fractional grid position (j + dy, i + dx),
/// |dx|, |dy| <= 0.5: bilinear in the neighbouring points, longitudes unwrapped
/// about the point's own.
fn position(s: &Surface<'_>, j: usize, i: usize, dy: f64, dx: f64) -> (f64, f64) {
    let (_, nx) = s.dim();
    let j2 = if dy >= 0.0 { j + 1 } else { j - 1 };
    let i2 = (i as i64 + if dx >= 0.0 { 1 } else { -1 }).rem_euclid(nx as i64) as usize;
    let (wy, wx) = (dy.abs(), dx.abs());
    let lon0 = s.lon[(j, i)];
    let un = |l: f64| lon0 + (l - lon0 + 540.0).rem_euclid(360.0) - 180.0;
    let bil = |a: f64, b: f64, c: f64, d: f64| {
        (1.0 - wy) * ((1.0 - wx) * a + wx * b) + wy * ((1.0 - wx) * c + wx * d)
    };
    let lat = bil(
        s.lat[(j, i)],
        s.lat[(j, i2)],
        s.lat[(j2, i)],
        s.lat[(j2, i2)],
    );
    let lon = bil(
        lon0,
        un(s.lon[(j, i2)]),
        un(s.lon[(j2, i)]),
        un(s.lon[(j2, i2)]),
    );
    (lat, (lon + 540.0).rem_euclid(360.0) - 180.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    const A: f64 = 6_371_229.0;

    fn grid(lat0: f64, lon0: f64, d: f64, ny: usize, nx: usize) -> (Array2<f64>, Array2<f64>) {
        (
            Array2::from_shape_fn((ny, nx), |(j, _)| lat0 + d * j as f64),
            Array2::from_shape_fn((ny, nx), |(_, i)| lon0 + d * i as f64),
        )
    }

    /// A Gaussian low of `depth` Pa and e-folding radius `r` m at (la, lo) over 1010 hPa.
    fn low(
        lat: &Array2<f64>,
        lon: &Array2<f64>,
        la: f64,
        lo: f64,
        depth: f64,
        r: f64,
    ) -> Array2<f32> {
        Array2::from_shape_fn(lat.dim(), |(j, i)| {
            let d = distance(A, la, lo, lat[(j, i)], lon[(j, i)]);
            (101_000.0 - depth * (-(d / r).powi(2)).exp()) as f32
        })
    }

    fn settings() -> Settings {
        Settings {
            interval: 50.0,
            max_radius: 2.5e6,
        }
    }

    #[test]
    fn one_gaussian_low_found_where_it_is_with_its_depth() {
        let (lat, lon) = grid(30.0, -20.0, 1.0, 41, 61);
        let p = low(&lat, &lon, 50.3, 10.6, 1500.0, 6e5);
        let s = Surface {
            values: p.view(),
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        let c = find_centres(&s, &settings());
        assert_eq!(c.len(), 1, "{c:?}");
        let c = &c[0];
        assert_eq!((c.j, c.i), (20, 31));
        // The fitted position is far closer than the grid point (1 degree) and the
        // fitted central pressure within 10 Pa of the true 995 hPa.
        assert!(distance(A, c.lat, c.lon, 50.3, 10.6) < 25_000.0, "{c:?}");
        assert!((c.pressure - 99_500.0).abs() < 10.0, "{c:?}");
        // The outermost closed isobar lies within the domain: the field at the
        // nearest edge point (lat 30 or 70, or lon -20 or 40) caps it.
        assert!(c.outer <= 101_000.0 && c.outer > 100_800.0, "{c:?}");
        assert!((c.depth - (c.outer - c.grid_pressure)).abs() < 1e-9);
    }

    #[test]
    fn open_lows_shallow_lows_and_the_deeper_of_two() {
        let (lat, lon) = grid(30.0, -20.0, 1.0, 41, 61);
        // A low centred on the edge has no closed isobar: a minimum of the grid on
        // its edge is not a centre, and the points next to it are not minima.
        let p = low(&lat, &lon, 30.0, 10.0, 1500.0, 6e5);
        let s = Surface {
            values: p.view(),
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        assert!(find_centres(&s, &settings()).is_empty());
        // Two lows: each has its own closed isobars until they merge; both found.
        let a = low(&lat, &lon, 50.0, 0.0, 1500.0, 4e5);
        let b = low(&lat, &lon, 50.0, 20.0, 900.0, 4e5);
        let p = &a + &b - 101_000.0;
        let s = Surface {
            values: p.view(),
            lat: lat.view(),
            lon: lon.view(),
            periodic: false,
            radius: A,
        };
        let c = find_centres(&s, &settings());
        assert_eq!(c.len(), 2, "{c:?}");
        // The shallower one's outermost closed isobar is below the col between them
        // (the highest point of the straight path between the two is above the col).
        let saddle = (20..=40).map(|i| p[(20, i)]).fold(f32::MIN, f32::max) as f64;
        let weak = c.iter().find(|c| c.i == 40).expect("the eastern low");
        assert!(weak.outer <= saddle, "{weak:?} saddle {saddle}");
        // A plateau of equal values is one centre, not many.
        let mut flat = Array2::from_elem((21, 21), 101_000.0f32);
        for j in 8..13 {
            for i in 8..13 {
                flat[(j, i)] = 100_900.0;
            }
        }
        let (la, lo) = grid(40.0, 0.0, 1.0, 21, 21);
        let s = Surface {
            values: flat.view(),
            lat: la.view(),
            lon: lo.view(),
            periodic: false,
            radius: A,
        };
        let c = find_centres(&s, &settings());
        assert_eq!(c.len(), 1, "{c:?}");
        assert_eq!((c[0].j, c[0].i), (8, 8));
    }

    #[test]
    fn a_low_on_the_seam_of_a_global_grid_and_one_at_a_pole() {
        // Global 2.5 degree grid from 90 S to 90 N, 0 to 357.5 E: a low at 0 E, 60 S
        // straddles the seam; a low over the North Pole reaches the pole row.
        let (lat, lon) = grid(-90.0, 0.0, 2.5, 73, 144);
        let p = &low(&lat, &lon, -60.0, 0.0, 2000.0, 8e5)
            + &low(&lat, &lon, 90.0, 0.0, 1200.0, 9e5)
            - 101_000.0;
        let s = Surface {
            values: p.view(),
            lat: lat.view(),
            lon: lon.view(),
            periodic: true,
            radius: A,
        };
        let c = find_centres(&s, &settings());
        assert!(
            c.iter()
                .any(|c| (c.lat + 60.0).abs() < 0.1 && c.lon.abs() < 0.1),
            "{c:?}"
        );
        // The pole row is one point on the sphere: every point of it is a minimum of
        // equal value, and only the first in grid order is a centre.
        let polar: Vec<_> = c.iter().filter(|c| c.lat > 89.0).collect();
        assert_eq!(polar.len(), 1, "{c:?}");
        assert!(polar[0].depth >= 50.0);
        // The same field on a grid that does not wrap: the seam low is cut by the edge.
        let s = Surface {
            periodic: false,
            ..s
        };
        let c = find_centres(&s, &settings());
        assert!(!c.iter().any(|c| (c.lat + 60.0).abs() < 0.1), "{c:?}");
    }

    /// A rough field: pseudo-random values from a few levels (so plateaus of
    /// equal values), missing points here and there.
    fn rough(ny: usize, nx: usize) -> Array2<f32> {
        let mut x: u64 = 0x9e37_79b9_7f4a_7c15;
        Array2::from_shape_fn((ny, nx), |_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            match x % 41 {
                0 => f32::NAN,
                r => 100_000.0 + 20.0 * (r % 6) as f32,
            }
        })
    }

    #[test]
    fn the_minima_row_by_row_are_those_of_the_eight_neighbours_everywhere() {
        // The inner points' shortcut against `neighbours` at every point, on a
        // grid that wraps (pole rows, seam) and one that does not (edges).
        let (lat, lon) = grid(-90.0, 0.0, 5.0, 37, 72);
        let p = rough(37, 72);
        for periodic in [true, false] {
            let s = Surface {
                values: p.view(),
                lat: lat.view(),
                lon: lon.view(),
                periodic,
                radius: A,
            };
            let mut nb = Vec::new();
            let mut want = Vec::new();
            for j in 0..37 {
                for i in 0..72 {
                    let v = s.at(j, i);
                    let open = s.neighbours(j, i, &mut nb);
                    let lower = nb
                        .iter()
                        .any(|&(a, b)| s.at(a, b).is_nan() || s.at(a, b) < v);
                    if v.is_finite() && !open && !lower {
                        want.push((j, i));
                    }
                }
            }
            let got: Vec<_> = (0..37).flat_map(|j| row_minima(&s, j)).collect();
            assert!(want.len() > 20, "{}", want.len());
            assert_eq!(got, want, "periodic {periodic}");
        }
    }

    #[test]
    fn centres_come_in_grid_order_as_one_flood_after_another_finds_them() {
        // Many lows, their minima shared among tasks: the same centres, in grid
        // order, as looking at each minimum in turn with one record of floods.
        let (lat, lon) = grid(-90.0, 0.0, 2.5, 73, 144);
        let mut p = Array2::from_elem(lat.dim(), 101_000.0f32);
        for (n, la) in [-70.0, -45.0, -20.0, 5.0, 30.0, 55.0, 80.0]
            .into_iter()
            .enumerate()
        {
            for lo in (0..6).map(|k| 60.0 * f64::from(k) + 17.0 * n as f64) {
                p = &p + &low(&lat, &lon, la, lo, 800.0 + 90.0 * n as f64, 4e5) - 101_000.0;
            }
        }
        let s = Surface {
            values: p.view(),
            lat: lat.view(),
            lon: lon.view(),
            periodic: true,
            radius: A,
        };
        let set = settings();
        let mut taken = Flood {
            stamp: vec![0; 73 * 144],
            turn: 0,
        };
        let want: Vec<Centre> = (0..73)
            .flat_map(|j| row_minima(&s, j))
            .filter_map(|(j, i)| centre(&s, &set, j, i, &mut taken))
            .collect();
        assert!(want.len() >= 30, "{}", want.len());
        assert_eq!(find_centres(&s, &set), want);
    }

    #[test]
    fn distance_on_the_sphere() {
        // A quarter of a meridian is pi a / 2; one degree of the equator a pi / 180.
        assert!((distance(A, 0.0, 0.0, 90.0, 0.0) - A * std::f64::consts::FRAC_PI_2).abs() < 1e-6);
        assert!((distance(A, 0.0, 179.5, 0.0, -179.5) - A * 1f64.to_radians()).abs() < 1e-6);
    }
}
