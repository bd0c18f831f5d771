//! The PV budget along isentropic trajectories between two steps: where each
//! column arriving at a grid point came from, and how its absolute vorticity
//! should have changed if (zeta + f)/depth were conserved.
//!
//! In: the grid's coordinates, winds along the grid's axes at both steps (NaN
//! where missing), the time between them, the trajectory settings. Out:
//! departure points as fractional grid indices with each point's convergence,
//! and values interpolated there. Pure: no I/O, no logging.
//!
//! Departure points: two-time-level semi-Lagrangian midpoint rule (Robert 1981;
//! Staniforth and Cote 1991; docs/references.md), x_d = x_a - h V(x_m, t + h/2),
//! x_m the midpoint, V the wind at the middle of the sub-step, linear in time
//! between the two steps' winds. The interval is cut into sub-steps of at most
//! `Settings::max_substep`, traced back one after the other. In each the
//! midpoint equation is solved by fixed-point iteration until two successive
//! departure points lie within `Settings::tolerance` of each other; the iteration
//! contracts by about (h/2)|grad V| each time (Staniforth and Cote 1991; from
//! memory), so it cannot converge where that exceeds one, and a point that has
//! not converged after `Settings::max_iterations` is flagged. On the sphere the
//! iteration runs on unit vectors in three dimensions (great-circle geometry, no
//! pole problem), also for projected grids, whose winds are turned from grid
//! axes to east and north at each midpoint and whose departure points are
//! projected back to the plane.

use ndarray::{Array2, ArrayView2, Zip};

use crate::geometry::{Conformal, Earth};

/// How a grid's points are laid out, for trajectories.
pub enum Layout<'a> {
    /// A (rotated) latitude/longitude sphere grid: row latitudes (ascending, any
    /// spacing) and evenly spaced column longitudes, degrees; radius in metres.
    Sphere {
        lat: &'a [f64],
        lon: &'a [f64],
        radius: f64,
        periodic: bool,
    },
    /// A conformal projection: the projection, its earth, the plane coordinates of
    /// the first point and the spacings (metres). Trajectories still run on the
    /// sphere (winds turned from grid axes to east and north at each midpoint), which
    /// follows curved paths far better than straight steps in the map plane.
    Projected {
        proj: Conformal,
        earth: Earth,
        x0: f64,
        y0: f64,
        dx: f64,
        dy: f64,
    },
}

impl Layout<'_> {
    /// The grid's shortest spacing between neighbouring points, metres.
    pub fn grid_length(&self) -> f64 {
        match self {
            Layout::Sphere {
                lat, lon, radius, ..
            } => {
                let dlat = lat
                    .windows(2)
                    .map(|w| (w[1] - w[0]).abs())
                    .fold(f64::INFINITY, f64::min);
                let dlon = if lon.len() > 1 {
                    ((lon[lon.len() - 1] - lon[0]) / (lon.len() - 1) as f64).abs()
                } else {
                    f64::INFINITY
                };
                radius * dlat.min(dlon).to_radians()
            }
            Layout::Projected { dx, dy, .. } => dx.abs().min(dy.abs()),
        }
    }

    fn radius(&self) -> f64 {
        match self {
            Layout::Sphere { radius, .. } => *radius,
            Layout::Projected { earth, .. } => earth.mean_radius(),
        }
    }
}

/// How trajectories are traced.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Settings {
    /// Longest sub-step, seconds.
    pub max_substep: f64,
    /// Two successive departure points of a sub-step closer than this, metres, have converged.
    pub tolerance: f64,
    /// Iterations of a sub-step's midpoint equation before a point counts as not converged.
    pub max_iterations: usize,
}

/// Iterations of the midpoint equation allowed per sub-step (an iteration that
/// contracts by a half gains three decimal places in ten; common practice).
pub const MAX_ITERATIONS: usize = 20;

/// A trajectory's outcome at one arrival point.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Status {
    /// Every sub-step converged.
    Converged = 0,
    /// A sub-step's iteration did not converge (the departure point is its last iterate).
    NotConverged = 1,
    /// The trajectory left the grid or met missing winds: no departure point.
    None = 2,
}

/// Departure points and how each was found.
pub struct Departures {
    /// Fractional row index of each departure point (NaN where there is none).
    pub dj: Array2<f64>,
    /// Fractional column index.
    pub di: Array2<f64>,
    /// Outcome per arrival point.
    pub status: Array2<Status>,
}

impl Departures {
    /// Points whose trajectory did not converge.
    pub fn not_converged(&self) -> usize {
        self.status
            .iter()
            .filter(|s| **s == Status::NotConverged)
            .count()
    }
}

/// Bilinear interpolation at fractional index (fj, fi); periodic in i when asked;
/// NaN outside the grid or where a corner is missing.
pub fn bilinear(f: ArrayView2<f64>, fj: f64, fi: f64, periodic: bool) -> f64 {
    Corners::at(f.dim(), fj, fi, periodic).map_or(f64::NAN, |c| c.of(f))
}

/// The four grid points round a fractional index and their weights: found once,
/// applied to every field on the grid (the two winds at two times, along a
/// trajectory).
#[derive(Debug, Clone, Copy)]
pub struct Corners {
    j0: usize,
    i0: usize,
    i1: usize,
    wj: f64,
    wi: f64,
}

impl Corners {
    /// The corners of (fj, fi) on a grid of `dim` (rows, columns); None outside it.
    pub fn at((ny, nx): (usize, usize), fj: f64, fi: f64, periodic: bool) -> Option<Self> {
        if !(fj.is_finite() && fi.is_finite()) || ny < 2 || nx < 2 {
            return None;
        }
        if fj < 0.0 || fj > (ny - 1) as f64 {
            return None;
        }
        let fi = if periodic { wrap(fi, nx as f64) } else { fi };
        if !periodic && (fi < 0.0 || fi > (nx - 1) as f64) {
            return None;
        }
        let j0 = (fj.floor() as usize).min(ny - 2);
        let i0 = (fi.floor() as usize).min(nx - 1);
        let i1 = if periodic {
            (i0 + 1) % nx
        } else {
            (i0 + 1).min(nx - 1)
        };
        let (wj, wi) = (fj - j0 as f64, fi - i0 as f64);
        Some(Self { j0, i0, i1, wj, wi })
    }

    /// (1 - wj) ((1 - wi) f00 + wi f01) + wj ((1 - wi) f10 + wi f11): `f` at the point.
    #[inline]
    pub fn of(&self, f: ArrayView2<f64>) -> f64 {
        let Self { j0, i0, i1, wj, wi } = *self;
        let (a, b, c, d) = (f[(j0, i0)], f[(j0, i1)], f[(j0 + 1, i0)], f[(j0 + 1, i1)]);
        (1.0 - wj) * ((1.0 - wi) * a + wi * b) + wj * ((1.0 - wi) * c + wi * d)
    }
}

/// `x.rem_euclid(m)` for m > 0, the same bit for bit: the value itself, or
/// one `m` added or taken away (exact: Sterbenz's lemma for the subtraction,
/// and the very operation the library does for the addition) where that
/// brings it into [0, m), which is every call on a trajectory; the library's
/// remainder otherwise.
#[inline]
fn wrap(x: f64, m: f64) -> f64 {
    if (0.0..m).contains(&x) {
        x
    } else if x > -m && x < 0.0 {
        x + m
    } else if x >= m && x < 2.0 * m {
        x - m
    } else {
        x.rem_euclid(m)
    }
}

/// Fractional index of `v` on the ascending `axis`: k - 1 + (v - a_(k-1)) / (a_k - a_(k-1))
/// with a_(k-1) <= v < a_k; NaN outside the axis.
fn frac_index(axis: &[f64], v: f64) -> f64 {
    let n = axis.len();
    if n < 2 || v < axis[0] || v > axis[n - 1] {
        return f64::NAN;
    }
    let k = first_above(axis, v).clamp(1, n - 1);
    let (a, b) = (axis[k - 1], axis[k]);
    (k - 1) as f64 + (v - a) / (b - a)
}

/// The number of values of the ascending `axis` at or below `v` (what
/// `partition_point(|a| a <= v)` gives), found from a guess on the mean spacing
/// and a walk to the exact place: one or two steps on a regular or Gaussian axis
/// instead of a binary search at every iteration of every trajectory.
fn first_above(axis: &[f64], v: f64) -> usize {
    let n = axis.len();
    let guess = (v - axis[0]) / ((axis[n - 1] - axis[0]) / (n - 1) as f64);
    if !guess.is_finite() {
        return axis.partition_point(|&a| a <= v);
    }
    let mut k = (guess.floor().max(-1.0) as usize).saturating_add(1).min(n);
    while k > 0 && axis[k - 1] > v {
        k -= 1;
    }
    while k < n && axis[k] <= v {
        k += 1;
    }
    k
}

fn unit(lat: f64, lon: f64) -> [f64; 3] {
    let (p, l) = (lat.to_radians(), lon.to_radians());
    [p.cos() * l.cos(), p.cos() * l.sin(), p.sin()]
}

fn latlon(x: [f64; 3]) -> (f64, f64) {
    let n = (x[0] * x[0] + x[1] * x[1] + x[2] * x[2]).sqrt();
    (
        (x[2] / n).clamp(-1.0, 1.0).asin().to_degrees(),
        x[1].atan2(x[0]).to_degrees(),
    )
}

/// Latitude and longitude, degrees, of a unit vector (no norm taken).
#[inline]
fn unit_latlon(x: [f64; 3]) -> (f64, f64) {
    (
        x[2].clamp(-1.0, 1.0).asin().to_degrees(),
        x[1].atan2(x[0]).to_degrees(),
    )
}

fn chord_squared(a: [f64; 3], b: [f64; 3]) -> f64 {
    (a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)
}

fn normalise(x: [f64; 3]) -> [f64; 3] {
    let n = (x[0] * x[0] + x[1] * x[1] + x[2] * x[2]).sqrt();
    [x[0] / n, x[1] / n, x[2] / n]
}

#[cfg(test)]
fn chord(a: [f64; 3], b: [f64; 3]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
}

/// One midpoint-rule step back along the sphere: x_d = normalise(x_a - s (u e + v n)),
/// e and n the local east and north unit vectors at the midpoint `xm` (a unit
/// vector), s = h / a. With rho = sqrt(xm_x^2 + xm_y^2) = cos(lat):
/// e = (-xm_y, xm_x, 0) / rho and n = (-xm_z xm_x / rho, -xm_z xm_y / rho, rho),
/// the same vectors as (-sin lon, cos lon, 0) and (-sin lat cos lon, -sin lat sin lon,
/// cos lat) without the trigonometry; at the poles, where east has no direction,
/// from the longitude `lo` (degrees) the wind was read at.
fn step_back(xa: [f64; 3], xm: [f64; 3], lo: f64, (u, v): (f64, f64), s: f64) -> [f64; 3] {
    let rho = (xm[0] * xm[0] + xm[1] * xm[1]).sqrt();
    let (east, north) = if rho > 1e-9 {
        (
            [-xm[1] / rho, xm[0] / rho, 0.0],
            [-xm[2] * xm[0] / rho, -xm[2] * xm[1] / rho, rho],
        )
    } else {
        let (sl, cl) = lo.to_radians().sin_cos();
        let sp = xm[2].signum();
        ([-sl, cl, 0.0], [-sp * cl, -sp * sl, 0.0])
    };
    normalise([
        xa[0] - s * (u * east[0] + v * north[0]),
        xa[1] - s * (u * east[1] + v * north[1]),
        xa[2] - s * (u * east[2] + v * north[2]),
    ])
}

/// Trace one arrival point `xa` back over `n` sub-steps of `s` = h/a each.
/// `wind(lat, lon, tau)` is the east and north wind at a position and at the
/// fraction `tau` of the interval from the earlier step (None where missing or
/// off the grid). `tol` is the convergence distance on the unit sphere.
///
/// `guess[m]` holds the displacements over sub-step m (vectors in three
/// dimensions) of the two arrival points before this one on its row, where
/// their sub-step converged. The iteration starts from their linear
/// extrapolation to this point, 2 d1 - d2 (or d1 alone, or no displacement),
/// and may stop after its first step when that step moves less than the
/// convergence distance: the stopping test of every iteration, which bounds
/// the distance to the fixed point the same way wherever it starts. The
/// departure point found lies within that bound of the one an iteration from
/// no displacement finds where both converge; from a guess the test is also
/// met at some points where the iteration does not contract. The guesses are
/// then moved on to this point's.
fn trace(
    xa: [f64; 3],
    how: Tracing,
    wind: impl Fn(f64, f64, f64) -> Option<(f64, f64)>,
    guess: &mut [Guess],
) -> Option<([f64; 3], bool)> {
    let Tracing {
        n,
        s,
        tol,
        max_iterations,
    } = how;
    let mut x = xa;
    let mut all_converged = true;
    for m in (0..n).rev() {
        let tau = (m as f64 + 0.5) / n as f64;
        let start = x;
        let first = guess[m].first();
        let mut xd = match first {
            Some(g) => normalise([start[0] + g[0], start[1] + g[1], start[2] + g[2]]),
            None => start,
        };
        let mut converged = false;
        for it in 0..max_iterations.max(1) {
            let xm = normalise([start[0] + xd[0], start[1] + xd[1], start[2] + xd[2]]);
            let (la, lo) = unit_latlon(xm);
            let wind = wind(la, lo, tau)?;
            let next = step_back(start, xm, lo, wind, s);
            // Squared distances compared: no square root in the loop.
            let moved2 = chord_squared(next, xd);
            xd = next;
            // From no displacement, the first step's move is the whole
            // displacement: at least two steps then.
            if (it > 0 || first.is_some()) && moved2 < tol * tol {
                converged = true;
                break;
            }
        }
        all_converged &= converged;
        guess[m].moved_on(converged.then_some([
            xd[0] - start[0],
            xd[1] - start[1],
            xd[2] - start[2],
        ]));
        x = xd;
    }
    Some((x, all_converged))
}

/// The displacements over one sub-step of the last two points traced on a
/// row, where their sub-step converged.
#[derive(Debug, Clone, Copy, Default)]
struct Guess {
    last: Option<[f64; 3]>,
    before: Option<[f64; 3]>,
}

impl Guess {
    /// 2 d1 - d2, or d1, or none.
    fn first(&self) -> Option<[f64; 3]> {
        match (self.last, self.before) {
            (Some(a), Some(b)) => Some([2.0 * a[0] - b[0], 2.0 * a[1] - b[1], 2.0 * a[2] - b[2]]),
            (a, _) => a,
        }
    }

    /// The next point's: this point's displacement, if its sub-step converged.
    fn moved_on(&mut self, d: Option<[f64; 3]>) {
        self.before = d.and(self.last);
        self.last = d;
    }
}

/// How one trajectory is traced: sub-steps, their length on the unit sphere
/// (h/a), the convergence distance on it, and the iterations allowed.
#[derive(Clone, Copy)]
struct Tracing {
    n: usize,
    s: f64,
    tol: f64,
    max_iterations: usize,
}

/// Departure points of the columns arriving at every grid point, as fractional
/// (row, column) indices, from winds (u, v along the grid's axes, m/s) at the
/// earlier and later steps, `dt` seconds apart, traced as [`Settings`] says.
pub fn departure_points(
    layout: &Layout<'_>,
    (u_old, v_old): (ArrayView2<f64>, ArrayView2<f64>),
    (u_new, v_new): (ArrayView2<f64>, ArrayView2<f64>),
    dt: f64,
    settings: &Settings,
) -> Departures {
    let (ny, nx) = u_new.dim();
    let dj = Array2::from_elem((ny, nx), f64::NAN);
    let di = Array2::from_elem((ny, nx), f64::NAN);
    let status = Array2::from_elem((ny, nx), Status::None);
    if [u_old.dim(), v_old.dim(), v_new.dim()] != [(ny, nx); 3] {
        // Winds on different grids have no trajectories (the four share corners below).
        return Departures { dj, di, status };
    }
    let radius = layout.radius();
    let n = if settings.max_substep > 0.0 {
        ((dt.abs() / settings.max_substep).ceil() as usize).max(1)
    } else {
        1
    };
    let s = dt / n as f64 / radius;
    let tol = settings.tolerance / radius;
    let wind_at = |fj: f64, fi: f64, tau: f64, periodic: bool| -> Option<(f64, f64)> {
        // One set of corners for the four fields (they share the grid).
        let c = Corners::at(u_new.dim(), fj, fi, periodic)?;
        let u = (1.0 - tau) * c.of(u_old) + tau * c.of(u_new);
        let v = (1.0 - tau) * c.of(v_old) + tau * c.of(v_new);
        (u.is_finite() && v.is_finite()).then_some((u, v))
    };
    let how = Tracing {
        n,
        s,
        tol,
        max_iterations: settings.max_iterations,
    };
    let mut d = Departures { dj, di, status };
    // Each layout's closures are passed by value, so that the tracing loop is
    // compiled for each with the wind's interpolation inlined.
    match layout {
        Layout::Sphere {
            lat, lon, periodic, ..
        } => {
            let periodic = *periodic;
            let dlon = if nx > 1 {
                (lon[nx - 1] - lon[0]) / (nx - 1) as f64
            } else {
                f64::NAN
            };
            let to_index = move |la: f64, lo: f64| -> (f64, f64) {
                let fi = wrap(lo - lon[0], 360.0) / dlon;
                let fi = if !periodic && fi > (nx - 1) as f64 + 0.5 {
                    fi - 360.0 / dlon
                } else {
                    fi
                };
                (frac_index(lat, la), fi)
            };
            let wind = move |la, lo, tau| {
                let (fj, fi) = to_index(la, lo);
                wind_at(fj, fi, tau, periodic)
            };
            trace_all(
                &mut d,
                |j, i| (lat[j], lon[i]),
                to_index,
                wind,
                how,
                periodic,
            );
        }
        Layout::Projected {
            proj,
            earth,
            x0,
            y0,
            dx,
            dy,
        } => {
            let to_index = move |la: f64, lo: f64| -> (f64, f64) {
                let (x, y) = proj.forward(earth, la, lo);
                ((y - y0) / dy, (x - x0) / dx)
            };
            let arrival = move |j, i| proj.inverse(earth, x0 + i as f64 * dx, y0 + j as f64 * dy);
            let wind = move |la, lo, tau| {
                let (fj, fi) = to_index(la, lo);
                let (ug, vg) = wind_at(fj, fi, tau, false)?;
                // Grid axes to east and north at the midpoint.
                let (sa, ca) = proj.grid_rotation(earth, la, lo).sin_cos();
                Some((ug * ca - vg * sa, ug * sa + vg * ca))
            };
            trace_all(&mut d, arrival, to_index, wind, how, false);
        }
    }
    d
}

/// Trace every arrival point of `d`'s grid back, on every core: `arrival`
/// gives a grid point's latitude and longitude, `to_index` a position's
/// fractional (row, column) index, `wind` the east and north wind at a
/// position and fraction of the interval.
fn trace_all(
    d: &mut Departures,
    arrival: impl Fn(usize, usize) -> (f64, f64) + Sync,
    to_index: impl Fn(f64, f64) -> (f64, f64) + Sync,
    wind: impl Fn(f64, f64, f64) -> Option<(f64, f64)> + Sync,
    how: Tracing,
    periodic: bool,
) {
    let (ny, nx) = d.dj.dim();
    // Row by row, each point starting from the displacements of the two
    // before it: the same guesses, and so the same result, however the rows
    // are shared among threads.
    Zip::indexed(d.dj.rows_mut())
        .and(d.di.rows_mut())
        .and(d.status.rows_mut())
        .par_for_each(|j, mut dj_row, mut di_row, mut st_row| {
            let mut guess = vec![Guess::default(); how.n];
            for i in 0..nx {
                let (la0, lo0) = arrival(j, i);
                let Some((xd, converged)) = trace(unit(la0, lo0), how, &wind, &mut guess) else {
                    guess.fill(Guess::default());
                    continue;
                };
                let (la, lo) = latlon(xd);
                let (fj, fi) = to_index(la, lo);
                let inside = fj >= 0.0
                    && fj <= (ny - 1) as f64
                    && (periodic || (fi >= 0.0 && fi <= (nx - 1) as f64));
                if fj.is_finite() && fi.is_finite() && inside {
                    dj_row[i] = fj;
                    di_row[i] = fi;
                    st_row[i] = if converged {
                        Status::Converged
                    } else {
                        Status::NotConverged
                    };
                }
            }
        });
}

/// Values of `f` at the departure points (NaN where there is none), on every core.
pub fn at_departure(f: ArrayView2<f64>, d: &Departures, periodic: bool) -> Array2<f64> {
    let mut out = Array2::from_elem(d.dj.dim(), f64::NAN);
    Zip::from(&mut out)
        .and(&d.dj)
        .and(&d.di)
        .par_for_each(|o, &fj, &fi| *o = bilinear(f, fj, fi, periodic));
    out
}

/// The parts of the column-depth PV budget at one point (any dynamics text; the
/// column-depth form of PV conservation, (zeta + f)/depth constant along the
/// trajectory; docs/references.md). With eta_d and depth_d at the departure point,
/// f_d and f_a the Coriolis parameter at departure and arrival and depth_a on arrival:
///
/// - relative vorticity at departure: zeta_d = eta_d - f_d;
/// - stretching part: eta_d (depth_a/depth_d - 1), the change of relative vorticity
///   that the change of depth alone makes;
/// - Coriolis part: -(f_a - f_d), the change of relative vorticity that moving to
///   another latitude makes while eta is kept;
/// - predicted relative vorticity: their sum, eta_d depth_a/depth_d - f_a.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Parts {
    /// Relative vorticity at the departure point, s-1.
    pub zeta_departure: f64,
    /// Stretching part, s-1.
    pub stretching: f64,
    /// Coriolis part, s-1.
    pub coriolis: f64,
}

impl Parts {
    /// The parts for eta_d, f_d, f_a, depth_d and depth_a.
    pub fn of(eta_d: f64, f_d: f64, f_a: f64, depth_d: f64, depth_a: f64) -> Parts {
        Parts {
            zeta_departure: eta_d - f_d,
            stretching: eta_d * (depth_a / depth_d - 1.0),
            coriolis: -(f_a - f_d),
        }
    }

    /// Predicted relative vorticity on arrival: zeta_d + stretching + Coriolis part,
    /// which is eta_d depth_a/depth_d - f_a.
    pub fn predicted(&self) -> f64 {
        self.zeta_departure + self.stretching + self.coriolis
    }
}

/// Fractional depth change (depth_a - depth_d)/depth_d: stretching > 0.
#[inline]
pub fn stretching(depth_departure: f64, depth_arrival: f64) -> f64 {
    (depth_arrival - depth_departure) / depth_departure
}

/// Absolute vorticity of an isentropic layer from its column-depth PV, at every
/// point: eta = P dp, with P = (zeta + f)/dp the layer PV and dp the layer's pressure
/// depth (the column-depth form of PV; docs/references.md).
pub fn layer_absolute_vorticity(
    layer_pv: ArrayView2<f64>,
    layer_dp: ArrayView2<f64>,
) -> Array2<f64> {
    &layer_pv * &layer_dp
}

/// The column budget of an isentropic layer at one arrival point, as written: the
/// [`Parts`] of the prediction, the actual relative vorticity on arrival
/// zeta_a = P_a depth_a - f_a (P_a the layer PV on arrival), the actual minus the
/// predicted, zeta_a - (eta_d depth_a/depth_d - f_a) = depth_a (P_a - eta_d/depth_d), zero
/// where the column kept its PV, and the fractional depth change [`stretching`]
/// (column-depth PV conservation; docs/references.md).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ColumnBudget {
    /// The parts of the conserved-PV prediction.
    pub parts: Parts,
    /// Actual relative vorticity on arrival, s-1.
    pub actual: f64,
    /// Actual minus predicted relative vorticity, s-1.
    pub residual: f64,
    /// Fractional depth change (depth_a - depth_d)/depth_d.
    pub stretch: f64,
}

impl ColumnBudget {
    /// The budget for eta_d, f_d, f_a, depth_d and depth_a (as [`Parts::of`]) and the
    /// layer PV on arrival `pv_a` (Pa-1 s-1).
    pub fn of(
        eta_d: f64,
        f_d: f64,
        f_a: f64,
        depth_d: f64,
        depth_a: f64,
        pv_a: f64,
    ) -> ColumnBudget {
        let parts = Parts::of(eta_d, f_d, f_a, depth_d, depth_a);
        let actual = pv_a * depth_a - f_a;
        ColumnBudget {
            parts,
            actual,
            residual: actual - parts.predicted(),
            stretch: stretching(depth_d, depth_a),
        }
    }
}

/// Lagrangian rate of change of a quantity along a trajectory over the time `dt`:
/// dq/dt = (q_a - q_d)/dt, q_a on arrival and q_d at the departure point (the
/// semi-Lagrangian difference along the trajectory; Staniforth and Cote 1991).
#[inline]
pub fn lagrangian_rate(arrival: f64, departure: f64, dt: f64) -> f64 {
    (arrival - departure) / dt
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: f64 = 6_371_229.0;

    fn settings(max_substep_h: f64) -> Settings {
        Settings {
            max_substep: max_substep_h * 3600.0,
            tolerance: 0.001 * 2.5f64.to_radians() * A,
            max_iterations: MAX_ITERATIONS,
        }
    }

    fn global_axes() -> (Vec<f64>, Vec<f64>) {
        (
            (0..73).map(|j| -90.0 + 2.5 * j as f64).collect(),
            (0..144).map(|i| 2.5 * i as f64).collect(),
        )
    }

    /// Departure points on the 2.5-degree global grid of [`global_axes`].
    fn global_departures(
        old: (&Array2<f64>, &Array2<f64>),
        new: (&Array2<f64>, &Array2<f64>),
        dt: f64,
    ) -> Departures {
        let (lat, lon) = global_axes();
        let layout = Layout::Sphere {
            lat: &lat,
            lon: &lon,
            radius: A,
            periodic: true,
        };
        departure_points(
            &layout,
            (old.0.view(), old.1.view()),
            (new.0.view(), new.1.view()),
            dt,
            &settings(3.0),
        )
    }

    /// Uniform solid-body rotation about the earth's axis, u = u0 cos(phi), v = 0
    /// (Williamson et al. 1992 test case 1's flow; docs/references.md), moves every point
    /// west-to-east by the angle u0 dt / a: the departure point is exactly that far west.
    #[test]
    fn solid_body_rotation_on_the_sphere() {
        let (lat, _) = global_axes();
        let u0 = 40.0;
        let u = Array2::from_shape_fn((73, 144), |(j, _)| u0 * lat[j].to_radians().cos());
        let v = Array2::zeros((73, 144));
        let dt = 12.0 * 3600.0;
        let d = global_departures((&u, &v), (&u, &v), dt);
        assert_eq!(d.not_converged(), 0);
        let shift = (u0 * dt / A).to_degrees() / 2.5; // in columns
        for (j, la) in lat.iter().enumerate().take(65).skip(8) {
            for i in [0usize, 50, 143] {
                let want_i = (i as f64 - shift).rem_euclid(144.0);
                let err_cols = ((d.di[(j, i)] - want_i + 72.0).rem_euclid(144.0) - 72.0).abs();
                // 1% of a grid length, in metres along the parallel and the meridian.
                let err_m = err_cols * 2.5f64.to_radians() * A * la.to_radians().cos();
                let grid_len = 2.5f64.to_radians() * A;
                assert!(err_m < 0.01 * grid_len, "row {j}: {err_m} m");
                assert!(
                    (d.dj[(j, i)] - j as f64).abs() < 0.01,
                    "row {j}: {}",
                    d.dj[(j, i)]
                );
                assert_eq!(d.status[(j, i)], Status::Converged);
            }
        }
    }

    /// `wrap` is `rem_euclid`, bit for bit (the library remainder is exact, so
    /// adding or taking away one period where that suffices must give the same).
    #[test]
    fn wrap_is_the_euclidean_remainder_bit_for_bit() {
        for m in [360.0, 1440.0, 97.0] {
            let mut xs = vec![0.0, -0.0, m, -m, 2.0 * m, -2.0 * m, 3.7 * m, -3.7 * m];
            xs.extend([
                f64::NAN,
                f64::INFINITY,
                f64::MIN_POSITIVE,
                -f64::MIN_POSITIVE,
            ]);
            xs.extend([m - f64::EPSILON * m, -m + f64::EPSILON * m, 1e-300, -1e-300]);
            // Pseudo-random values over (-3m, 3m).
            let mut r = 0x2545_f491_4f6c_dd1du64;
            for _ in 0..20_000 {
                r ^= r << 13;
                r ^= r >> 7;
                r ^= r << 17;
                xs.push((r as f64 / u64::MAX as f64 - 0.5) * 6.0 * m);
            }
            for x in xs {
                let (got, want) = (wrap(x, m), x.rem_euclid(m));
                assert!(
                    got.to_bits() == want.to_bits() || (got.is_nan() && want.is_nan()),
                    "{x} mod {m}: {got} != {want}"
                );
            }
        }
    }

    /// The neighbours' displacements as first guess find the same departure point
    /// to within the convergence distance, in fewer iterations: points along a
    /// parallel at 40 N in a sheared, rotating flow, each traced from no
    /// displacement and then one after another with the guesses passed on.
    #[test]
    fn a_neighbours_displacement_as_first_guess_saves_iterations_and_nothing_else() {
        let calls = std::cell::Cell::new(0usize);
        let wind = |la: f64, lo: f64, tau: f64| {
            calls.set(calls.get() + 1);
            let (p, l) = (la.to_radians(), lo.to_radians());
            let u = 35.0 * p.cos() + 12.0 * (2.0 * l).sin() * (1.0 + tau);
            let v = 9.0 * (3.0 * l).cos() * p.cos();
            Some((u, v))
        };
        let dt = 6.0 * 3600.0;
        let how = Tracing {
            n: 2,
            s: dt / 2.0 / A,
            tol: 0.01 * 0.25f64.to_radians(),
            max_iterations: MAX_ITERATIONS,
        };
        let arrivals: Vec<[f64; 3]> = (0..360).map(|i| unit(40.0, i as f64)).collect();
        let alone: Vec<[f64; 3]> = arrivals
            .iter()
            .map(|&x| trace(x, how, wind, &mut [Guess::default(); 2]).unwrap().0)
            .collect();
        let calls_alone = calls.replace(0);
        let mut guess = [Guess::default(); 2];
        for (x, want) in arrivals.iter().zip(&alone) {
            let (got, converged) = trace(*x, how, wind, &mut guess).unwrap();
            assert!(converged);
            assert!(chord(got, *want) < how.tol, "{got:?} vs {want:?}");
        }
        let calls_guessed = calls.get();
        // About 0.44 here; at least 0.575 (two iterations a sub-step) if the
        // iteration could not stop after its first step from a guess.
        assert!(
            (calls_guessed as f64) < 0.5 * calls_alone as f64,
            "{calls_guessed} wind readings with guesses, {calls_alone} without"
        );
    }

    /// The guess is the linear extrapolation of the last two converged
    /// displacements, the last alone after one, none after a sub-step that did
    /// not converge.
    #[test]
    fn the_first_guess_extrapolates_the_last_two_displacements() {
        let mut g = Guess::default();
        assert_eq!(g.first(), None);
        g.moved_on(Some([1.0, 2.0, 3.0]));
        assert_eq!(g.first(), Some([1.0, 2.0, 3.0]));
        g.moved_on(Some([2.0, 2.5, 2.0]));
        assert_eq!(g.first(), Some([3.0, 3.0, 1.0]));
        g.moved_on(None);
        assert_eq!(g.first(), None);
        g.moved_on(Some([0.5, 0.5, 0.5]));
        assert_eq!(g.first(), Some([0.5, 0.5, 0.5]));
    }

    /// Each row is traced from its own first point on, so the departure points
    /// do not depend on how rows are shared among threads (1 thread and 3).
    #[test]
    fn departures_are_the_same_bit_for_bit_on_any_number_of_threads() {
        let (lat, lon) = global_axes();
        // Wind that vanishes at the poles, where it would otherwise depend on
        // the longitude it is read at.
        let u = Array2::from_shape_fn((73, 144), |(j, i)| {
            (30.0 + 8.0 * (lon[i].to_radians() * 2.0).sin()) * lat[j].to_radians().cos()
        });
        let v = Array2::from_shape_fn((73, 144), |(j, i)| {
            6.0 * (lon[i].to_radians() * 3.0).cos() * lat[j].to_radians().cos()
        });
        let on = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| global_departures((&u, &v), (&u, &v), 6.0 * 3600.0))
        };
        let (one, three) = (on(1), on(3));
        let bits = |a: &Array2<f64>| a.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&one.dj), bits(&three.dj));
        assert_eq!(bits(&one.di), bits(&three.di));
        assert_eq!(one.status, three.status);
        assert_eq!(one.not_converged(), 0);
    }

    #[test]
    fn winds_on_different_grids_have_no_departure_points() {
        // The earlier step's winds on another grid: no trajectories, no panic.
        let u = Array2::from_elem((73, 144), 10.0);
        let small = Array2::from_elem((72, 144), 10.0);
        let d = global_departures((&small, &small), (&u, &u), 3600.0);
        assert!(d.status.iter().all(|s| *s == Status::None));
        assert!(d.dj.iter().all(|x| x.is_nan()));
    }

    #[test]
    fn a_step_back_uses_the_east_and_north_of_the_midpoint() {
        // Against the trigonometric east (-sin lon, cos lon, 0) and north
        // (-sin lat cos lon, -sin lat sin lon, cos lat), every quadrant, both
        // hemispheres, near and at the poles; winds with both components.
        let trig = |xa: [f64; 3], la: f64, lo: f64, u: f64, v: f64, s: f64| {
            let (p, l) = (la.to_radians(), lo.to_radians());
            let e = [-l.sin(), l.cos(), 0.0];
            let n = [-p.sin() * l.cos(), -p.sin() * l.sin(), p.cos()];
            normalise([
                xa[0] - s * (u * e[0] + v * n[0]),
                xa[1] - s * (u * e[1] + v * n[1]),
                xa[2] - s * (u * e[2] + v * n[2]),
            ])
        };
        let s = 3600.0 * 6.0 / A;
        for la in [-90.0, -89.999_999, -60.0, -1.0, 0.0, 30.0, 89.9, 90.0] {
            for lo in [-179.0, -90.0, -10.0, 0.0, 45.0, 135.0, 180.0] {
                let xm = unit(la, lo);
                let (la2, lo2) = latlon(xm);
                for (u, v) in [(20.0, -7.0), (-35.0, 12.0)] {
                    let got = step_back(xm, xm, lo2, (u, v), s);
                    let want = trig(xm, la2, lo2, u, v, s);
                    // 1e-10 of the radius is 0.6 mm; near the poles the
                    // trigonometric form itself loses digits through asin.
                    assert!(chord(got, want) < 1e-10, "{la} {lo}: {got:?} vs {want:?}");
                }
            }
        }
    }

    #[test]
    fn the_walk_finds_what_a_binary_search_finds() {
        // Regular, Gaussian-like (uneven) and very uneven ascending axes, values on,
        // between and beyond the nodes.
        let regular: Vec<f64> = (0..721).map(|j| -90.0 + 0.25 * j as f64).collect();
        let uneven: Vec<f64> = (0..96)
            .map(|j| 88.6 * (j as f64 / 95.0 * 2.0 - 1.0).powi(3))
            .collect();
        let lumpy = vec![0.0, 0.1, 0.2, 5.0, 5.1, 40.0, 41.0, 90.0];
        for axis in [&regular, &uneven, &lumpy] {
            let (lo, hi) = (axis[0], axis[axis.len() - 1]);
            for m in 0..=4000 {
                let v = lo - 1.0 + (hi - lo + 2.0) * f64::from(m) / 4000.0;
                assert_eq!(
                    first_above(axis, v),
                    axis.partition_point(|&a| a <= v),
                    "{v}"
                );
            }
            for &v in axis.iter() {
                assert_eq!(
                    first_above(axis, v),
                    axis.partition_point(|&a| a <= v),
                    "{v}"
                );
            }
        }
        assert!(frac_index(&regular, f64::NAN).is_nan());
        assert_eq!(frac_index(&regular, -89.875), 0.5);
    }

    #[test]
    fn bilinear_is_exact_for_a_bilinear_field() {
        // Closed form: f = 2 + 3 j - i + 0.5 i j is reproduced anywhere inside the grid.
        let f = Array2::from_shape_fn((5, 6), |(j, i)| {
            let (j, i) = (j as f64, i as f64);
            2.0 + 3.0 * j - i + 0.5 * i * j
        });
        for (fj, fi) in [
            (0.25, 0.75),
            (3.5, 4.1),
            (4.0, 5.0),
            (0.0, 0.0),
            (2.9, 0.01),
        ] {
            let want = 2.0 + 3.0 * fj - fi + 0.5 * fi * fj;
            let got = bilinear(f.view(), fj, fi, false);
            assert!((got - want).abs() < 1e-12, "({fj}, {fi}): {got} vs {want}");
        }
        assert!(bilinear(f.view(), 4.5, 1.0, false).is_nan());
        assert!(bilinear(f.view(), 1.0, 5.5, false).is_nan());
        assert!(Corners::at((5, 6), 1.0, -0.5, false).is_none());
    }

    #[test]
    fn solid_body_rotation_on_a_lambert_grid() {
        // The same flow on a Lambert conformal grid (tangent at 45 N), winds turned into
        // the grid's axes: the exact departure point, projected, against the plane trajectory.
        let earth = Earth::sphere(A);
        let proj = Conformal::Lambert {
            lat1: 45.0,
            lat2: 45.0,
            lat0: 45.0,
            lon0: 0.0,
        };
        let (nx, ny, d) = (60usize, 50usize, 50_000.0);
        let (x0, y0) = proj.forward(&earth, 30.0, -25.0);
        let u0 = 40.0;
        let mut u = Array2::zeros((ny, nx));
        let mut v = Array2::zeros((ny, nx));
        for j in 0..ny {
            for i in 0..nx {
                let (la, lo) = proj.inverse(&earth, x0 + i as f64 * d, y0 + j as f64 * d);
                let alpha = proj.grid_rotation(&earth, la, lo);
                let ue = u0 * la.to_radians().cos();
                u[(j, i)] = ue * alpha.cos();
                v[(j, i)] = -ue * alpha.sin();
            }
        }
        let dt = 6.0 * 3600.0;
        let layout = Layout::Projected {
            proj,
            earth,
            x0,
            y0,
            dx: d,
            dy: d,
        };
        assert_eq!(layout.grid_length(), d);
        let dep = departure_points(
            &layout,
            (u.view(), v.view()),
            (u.view(), v.view()),
            dt,
            &settings(3.0),
        );
        let mut checked = 0;
        for j in 5..ny - 5 {
            for i in 15..nx - 5 {
                let (la, lo) = proj.inverse(&earth, x0 + i as f64 * d, y0 + j as f64 * d);
                let (xd, yd) = proj.forward(&earth, la, lo - (u0 * dt / A).to_degrees());
                let (wi, wj) = ((xd - x0) / d, (yd - y0) / d);
                // 1% of a grid length, in grid lengths on the map.
                let err = ((dep.di[(j, i)] - wi).powi(2) + (dep.dj[(j, i)] - wj).powi(2)).sqrt();
                assert!(err < 0.01, "({j}, {i}): {err} grid lengths");
                checked += 1;
            }
        }
        assert!(checked > 1000);
        // The western edge: trajectories from outside the grid have no departure point.
        assert_eq!(dep.status[(25, 0)], Status::None);
        assert!(dep.dj[(25, 0)].is_nan());
    }

    /// A wind that changes between the steps: the later step's wind alone would carry a
    /// point twice as far as the earlier's. With the wind linear in time, the departure
    /// point lies the mean displacement back (solid-body rotation at the mean rate).
    #[test]
    fn wind_linear_in_time_between_the_steps() {
        let (lat, lon) = global_axes();
        let u = |u0: f64| Array2::from_shape_fn((73, 144), |(j, _)| u0 * lat[j].to_radians().cos());
        let v = Array2::zeros((73, 144));
        let layout = Layout::Sphere {
            lat: &lat,
            lon: &lon,
            radius: A,
            periodic: true,
        };
        let dt = 12.0 * 3600.0;
        let (uo, un) = (u(20.0), u(60.0));
        let d = departure_points(
            &layout,
            (uo.view(), v.view()),
            (un.view(), v.view()),
            dt,
            &settings(3.0),
        );
        let shift = (40.0 * dt / A).to_degrees() / 2.5;
        let want = (72.0 - shift).rem_euclid(144.0);
        assert!(
            (d.di[(36, 72)] - want).abs() < 0.01,
            "{} vs {want}",
            d.di[(36, 72)]
        );
    }

    /// Rigid rotations about two different axes at the two steps, the angular velocity
    /// linear in time between them: dx/dt = Omega(t) x x with Omega equal to
    /// (1 - tau) Omega_old plus tau Omega_new. Rotations about different axes do not commute, so the departure
    /// point depends on which wind comes first; the exact one is integrated here with
    /// classical fourth-order Runge-Kutta in 2000 steps.
    #[test]
    fn winds_are_taken_in_time_order() {
        let (lat, lon) = global_axes();
        let (w_old, w_new) = ([0.0, 0.0, 1.2e-5], [1.0e-5, 0.0, 0.0]);
        let wind = |w: [f64; 3]| {
            let mut u = Array2::zeros((73, 144));
            let mut v = Array2::zeros((73, 144));
            for ((j, i), uu) in u.indexed_iter_mut() {
                let (p, l) = (lat[j].to_radians(), lon[i].to_radians());
                let r = [p.cos() * l.cos(), p.cos() * l.sin(), p.sin()];
                let vel = [
                    A * (w[1] * r[2] - w[2] * r[1]),
                    A * (w[2] * r[0] - w[0] * r[2]),
                    A * (w[0] * r[1] - w[1] * r[0]),
                ];
                let east = [-l.sin(), l.cos(), 0.0];
                let north = [-p.sin() * l.cos(), -p.sin() * l.sin(), p.cos()];
                *uu = vel[0] * east[0] + vel[1] * east[1];
                v[(j, i)] = vel[0] * north[0] + vel[1] * north[1] + vel[2] * north[2];
            }
            (u, v)
        };
        let ((uo, vo), (un, vn)) = (wind(w_old), wind(w_new));
        let layout = Layout::Sphere {
            lat: &lat,
            lon: &lon,
            radius: A,
            periodic: true,
        };
        let dt = 12.0 * 3600.0;
        let d = departure_points(
            &layout,
            (uo.view(), vo.view()),
            (un.view(), vn.view()),
            dt,
            &settings(3.0),
        );
        let rhs = |t: f64, x: [f64; 3]| {
            let tau = t / dt;
            let w: Vec<f64> = (0..3)
                .map(|k| (1.0 - tau) * w_old[k] + tau * w_new[k])
                .collect();
            [
                w[1] * x[2] - w[2] * x[1],
                w[2] * x[0] - w[0] * x[2],
                w[0] * x[1] - w[1] * x[0],
            ]
        };
        let add =
            |x: [f64; 3], k: [f64; 3], h: f64| [x[0] + h * k[0], x[1] + h * k[1], x[2] + h * k[2]];
        let mut worst: f64 = 0.0;
        for (j, i) in [(20usize, 10usize), (30, 70), (36, 100), (45, 30), (52, 140)] {
            // Backwards from the arrival at t = dt to t = 0.
            let mut x = unit(lat[j], lon[i]);
            let steps = 2000;
            let h = -dt / steps as f64;
            for n in 0..steps {
                let t = dt + n as f64 * h;
                let k1 = rhs(t, x);
                let k2 = rhs(t + h / 2.0, add(x, k1, h / 2.0));
                let k3 = rhs(t + h / 2.0, add(x, k2, h / 2.0));
                let k4 = rhs(t + h, add(x, k3, h));
                for c in 0..3 {
                    x[c] += h / 6.0 * (k1[c] + 2.0 * k2[c] + 2.0 * k3[c] + k4[c]);
                }
            }
            let (la, lo) = latlon(x);
            let fj = frac_index(&lat, la);
            let fi = lo.rem_euclid(360.0) / 2.5;
            let di = ((d.di[(j, i)] - fi + 72.0).rem_euclid(144.0) - 72.0) * la.to_radians().cos();
            let err = ((d.dj[(j, i)] - fj).powi(2) + di.powi(2)).sqrt();
            worst = worst.max(err);
        }
        // 5% of a grid length; taking the later wind first misses by about half of one.
        assert!(worst < 0.05, "worst {worst} grid lengths");
    }

    /// A flow whose wind changes along its path faster than one sub-step can follow:
    /// u = U sin(4 lambda) on a small sphere, |du/dx| up to 4 U / a = 3.8e-4 s-1. Over one
    /// 6-hour sub-step the midpoint iteration contracts by (h/2)|grad V| = 4, which it
    /// cannot; cut into sub-steps of 30 minutes it contracts by 0.34 and converges.
    #[test]
    fn trajectories_that_cannot_converge_are_flagged_and_sub_steps_cure_them() {
        let (lat, lon) = global_axes();
        let a = A / 10.0;
        let u = Array2::from_shape_fn((73, 144), |(j, i)| {
            60.0 * (4.0 * lon[i].to_radians()).sin() * lat[j].to_radians().cos()
        });
        let v = Array2::zeros((73, 144));
        let layout = Layout::Sphere {
            lat: &lat,
            lon: &lon,
            radius: a,
            periodic: true,
        };
        let dt = 6.0 * 3600.0;
        let tight = Settings {
            tolerance: 1e-3 * 2.5f64.to_radians() * a,
            ..settings(6.0)
        };
        let one = departure_points(
            &layout,
            (u.view(), v.view()),
            (u.view(), v.view()),
            dt,
            &tight,
        );
        let fine = Settings {
            max_substep: 1800.0,
            ..tight
        };
        let many = departure_points(
            &layout,
            (u.view(), v.view()),
            (u.view(), v.view()),
            dt,
            &fine,
        );
        let band = |d: &Departures| {
            (20..53)
                .flat_map(|j| (0..144).map(move |i| (j, i)))
                .filter(|ji| d.status[*ji] == Status::NotConverged)
                .count()
        };
        assert!(
            band(&one) > 500,
            "one sub-step: {} not converged",
            band(&one)
        );
        assert_eq!(band(&many), 0, "30-minute sub-steps");
        assert_eq!(
            one.not_converged(),
            one.status
                .iter()
                .filter(|s| **s == Status::NotConverged)
                .count()
        );
    }

    #[test]
    fn budget_parts_add_up_to_the_conserved_prediction() {
        // A column stretched by 10% keeps eta/depth: eta grows by 10%; moving from f_d to
        // f_a takes f_a - f_d from its relative vorticity.
        let (eta_d, f_d, f_a) = (1.2e-4, 1.0e-4, 1.1e-4);
        let p = Parts::of(eta_d, f_d, f_a, 100.0, 110.0);
        assert!((p.zeta_departure - 2.0e-5).abs() < 1e-18);
        assert!((p.stretching - 1.2e-5).abs() < 1e-18);
        assert!((p.coriolis + 1.0e-5).abs() < 1e-18);
        assert!((p.predicted() - (eta_d * 1.1 - f_a)).abs() < 1e-18);
        assert!((stretching(100.0, 110.0) - 0.1).abs() < 1e-12);
        let f = Array2::from_shape_fn((3, 3), |(j, i)| (j * 3 + i) as f64);
        assert_eq!(bilinear(f.view(), 0.5, 0.5, false), 2.0);
        assert_eq!(bilinear(f.view(), 0.0, 2.5, true), 1.0); // seam: halfway between 2 and 0
    }

    #[test]
    fn layer_absolute_vorticity_is_layer_pv_times_depth() {
        // eta = 1.2e-4 s-1 in a 50 hPa deep layer has P = 2.4e-8 Pa-1 s-1; P dp gives eta back.
        let pv = Array2::from_shape_fn((2, 3), |(j, i)| {
            (1.2e-4 + 1e-5 * j as f64) / (5000.0 + 100.0 * i as f64)
        });
        let dp = Array2::from_shape_fn((2, 3), |(_, i)| 5000.0 + 100.0 * i as f64);
        let eta = layer_absolute_vorticity(pv.view(), dp.view());
        for ((j, _), e) in eta.indexed_iter() {
            let exact = 1.2e-4 + 1e-5 * j as f64;
            assert!((e - exact).abs() < 1e-19, "{e} vs {exact}");
        }
    }

    #[test]
    fn column_budget_of_a_column_that_keeps_or_gains_pv() {
        // Stretched by 10% from f_d to f_a, keeping eta/depth: the actual relative
        // vorticity on arrival is the prediction, eta_d 1.1 - f_a, and the residual is zero.
        let (eta_d, f_d, f_a, depth_d, depth_a) = (1.2e-4, 1.0e-4, 1.1e-4, 100.0, 110.0);
        let kept = ColumnBudget::of(eta_d, f_d, f_a, depth_d, depth_a, eta_d / depth_d);
        assert_eq!(kept.parts, Parts::of(eta_d, f_d, f_a, depth_d, depth_a));
        assert!(
            (kept.actual - (eta_d * 1.1 - f_a)).abs() < 1e-18,
            "{}",
            kept.actual
        );
        assert!(kept.residual.abs() < 1e-18, "{}", kept.residual);
        assert!((kept.stretch - 0.1).abs() < 1e-12);
        // Heating that raises the layer PV by dP leaves a residual depth_a dP.
        let gain = 2e-8;
        let warmed = ColumnBudget::of(eta_d, f_d, f_a, depth_d, depth_a, eta_d / depth_d + gain);
        assert!(
            (warmed.residual - depth_a * gain).abs() < 1e-18,
            "{}",
            warmed.residual
        );
        assert!((warmed.actual - kept.actual - depth_a * gain).abs() < 1e-18);
    }

    #[test]
    fn lagrangian_rate_over_an_interval() {
        // PV rising from 1 to 1.5 PVU in 6 h: 0.5e-6 / 21600 K m2 kg-1 s-2; falling: minus that.
        let rate = lagrangian_rate(1.5e-6, 1.0e-6, 6.0 * 3600.0);
        assert!((rate - 0.5e-6 / 21_600.0).abs() < 1e-24, "{rate}");
        assert_eq!(lagrangian_rate(1.0e-6, 1.5e-6, 6.0 * 3600.0), -rate);
        assert_eq!(lagrangian_rate(2.0, 2.0, 3600.0), 0.0);
    }
}
