//! The PV budget along isentropic trajectories between two steps: where each
//! column arriving at a grid point came from, and how its absolute vorticity
//! should have changed if (zeta + f)/depth were conserved.
//!
//! In: the grid's coordinates, winds along the grid's axes at both steps (NaN
//! where missing), the time between them. Out: departure points as fractional
//! grid indices, and values interpolated there. Pure: no I/O, no logging.
//!
//! Departure points: two-time-level semi-Lagrangian midpoint iteration
//! (Robert 1981; Staniforth and Cote 1991, Mon. Wea. Rev. 119, 2206-2223;
//! from memory), x_d = x_a - dt V(x_m, t + dt/2), x_m the midpoint, V the mean
//! of both steps' winds there. On the sphere the iteration runs on unit
//! vectors in three dimensions (great-circle geometry, no pole problem), also
//! for projected grids, whose winds are turned from grid axes to east and north
//! at each midpoint and whose departure points are projected back to the plane.

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

/// Bilinear interpolation at fractional index (fj, fi); periodic in i when asked;
/// NaN outside the grid or where a corner is missing.
pub fn bilinear(f: ArrayView2<f64>, fj: f64, fi: f64, periodic: bool) -> f64 {
    let (ny, nx) = f.dim();
    if !(fj.is_finite() && fi.is_finite()) || ny < 2 || nx < 2 {
        return f64::NAN;
    }
    if fj < 0.0 || fj > (ny - 1) as f64 {
        return f64::NAN;
    }
    let fi = if periodic {
        fi.rem_euclid(nx as f64)
    } else {
        fi
    };
    if !periodic && (fi < 0.0 || fi > (nx - 1) as f64) {
        return f64::NAN;
    }
    let j0 = (fj.floor() as usize).min(ny - 2);
    let i0 = (fi.floor() as usize).min(nx - 1);
    let i1 = if periodic {
        (i0 + 1) % nx
    } else {
        (i0 + 1).min(nx - 1)
    };
    let (wj, wi) = (fj - j0 as f64, fi - i0 as f64);
    let (a, b, c, d) = (f[(j0, i0)], f[(j0, i1)], f[(j0 + 1, i0)], f[(j0 + 1, i1)]);
    (1.0 - wj) * ((1.0 - wi) * a + wi * b) + wj * ((1.0 - wi) * c + wi * d)
}

fn frac_index(axis: &[f64], v: f64) -> f64 {
    let n = axis.len();
    if n < 2 || v < axis[0] || v > axis[n - 1] {
        return f64::NAN;
    }
    let k = axis.partition_point(|&a| a <= v).clamp(1, n - 1);
    let (a, b) = (axis[k - 1], axis[k]);
    (k - 1) as f64 + (v - a) / (b - a)
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

fn normalise(x: [f64; 3]) -> [f64; 3] {
    let n = (x[0] * x[0] + x[1] * x[1] + x[2] * x[2]).sqrt();
    [x[0] / n, x[1] / n, x[2] / n]
}

/// One midpoint-rule step back along the sphere: x_d = normalise(x_a - s (u e + v n)),
/// e and n the local east and north unit vectors at the midpoint (la, lo), s = dt / a.
fn step_back(xa: [f64; 3], la: f64, lo: f64, u: f64, v: f64, s: f64) -> [f64; 3] {
    let (p, l) = (la.to_radians(), lo.to_radians());
    let east = [-l.sin(), l.cos(), 0.0];
    let north = [-p.sin() * l.cos(), -p.sin() * l.sin(), p.cos()];
    normalise([
        xa[0] - s * (u * east[0] + v * north[0]),
        xa[1] - s * (u * east[1] + v * north[1]),
        xa[2] - s * (u * east[2] + v * north[2]),
    ])
}

/// Departure points of the columns arriving at every grid point, as fractional
/// (row, column) indices, from winds (u, v along the grid's axes, m/s) at the
/// earlier and later steps, `dt` seconds apart. NaN where the trajectory leaves
/// the grid or meets missing winds.
pub fn departure_points(
    layout: &Layout<'_>,
    u_old: ArrayView2<f64>,
    v_old: ArrayView2<f64>,
    u_new: ArrayView2<f64>,
    v_new: ArrayView2<f64>,
    dt: f64,
    iterations: usize,
) -> (Array2<f64>, Array2<f64>) {
    let (ny, nx) = u_new.dim();
    let mut dj = Array2::from_elem((ny, nx), f64::NAN);
    let mut di = Array2::from_elem((ny, nx), f64::NAN);
    let mean_wind = |fj: f64, fi: f64, periodic: bool| -> (f64, f64) {
        let u = 0.5 * (bilinear(u_old, fj, fi, periodic) + bilinear(u_new, fj, fi, periodic));
        let v = 0.5 * (bilinear(v_old, fj, fi, periodic) + bilinear(v_new, fj, fi, periodic));
        (u, v)
    };
    match layout {
        Layout::Sphere {
            lat,
            lon,
            radius,
            periodic,
        } => {
            let dlon = if nx > 1 {
                (lon[nx - 1] - lon[0]) / (nx - 1) as f64
            } else {
                f64::NAN
            };
            let to_index = |la: f64, lo: f64| -> (f64, f64) {
                let fi = (lo - lon[0]).rem_euclid(360.0) / dlon;
                let fi = if !*periodic && fi > (nx - 1) as f64 + 0.5 {
                    fi - 360.0 / dlon
                } else {
                    fi
                };
                (frac_index(lat, la), fi)
            };
            Zip::indexed(&mut dj)
                .and(&mut di)
                .par_for_each(|(j, i), dj_out, di_out| {
                    let xa = unit(lat[j], lon[i]);
                    let mut xd = xa;
                    let mut ok = true;
                    for _ in 0..iterations.max(1) {
                        let xm = normalise([xa[0] + xd[0], xa[1] + xd[1], xa[2] + xd[2]]);
                        let (la, lo) = latlon(xm);
                        let (fj, fi) = to_index(la, lo);
                        let (u, v) = mean_wind(fj, fi, *periodic);
                        if !(u.is_finite() && v.is_finite()) {
                            ok = false;
                            break;
                        }
                        xd = step_back(xa, la, lo, u, v, dt / radius);
                    }
                    if ok {
                        let (la, lo) = latlon(xd);
                        let (fj, fi) = to_index(la, lo);
                        *dj_out = fj;
                        *di_out = fi;
                    }
                });
        }
        Layout::Projected {
            proj,
            earth,
            x0,
            y0,
            dx,
            dy,
        } => {
            let radius = earth.mean_radius();
            let to_index = |la: f64, lo: f64| -> (f64, f64) {
                let (x, y) = proj.forward(earth, la, lo);
                ((y - y0) / dy, (x - x0) / dx)
            };
            Zip::indexed(&mut dj)
                .and(&mut di)
                .par_for_each(|(j, i), dj_out, di_out| {
                    let (la0, lo0) = proj.inverse(earth, x0 + i as f64 * dx, y0 + j as f64 * dy);
                    let xa = unit(la0, lo0);
                    let mut xd = xa;
                    let mut ok = true;
                    for _ in 0..iterations.max(1) {
                        let xm = normalise([xa[0] + xd[0], xa[1] + xd[1], xa[2] + xd[2]]);
                        let (la, lo) = latlon(xm);
                        let (fj, fi) = to_index(la, lo);
                        let (ug, vg) = mean_wind(fj, fi, false);
                        if !(ug.is_finite() && vg.is_finite()) {
                            ok = false;
                            break;
                        }
                        // Grid axes to east and north at the midpoint.
                        let alpha = proj.grid_rotation(earth, la, lo);
                        let (sa, ca) = alpha.sin_cos();
                        let (u, v) = (ug * ca - vg * sa, ug * sa + vg * ca);
                        xd = step_back(xa, la, lo, u, v, dt / radius);
                    }
                    if ok {
                        let (la, lo) = latlon(xd);
                        let (fj, fi) = to_index(la, lo);
                        if fj >= 0.0 && fj <= (ny - 1) as f64 && fi >= 0.0 && fi <= (nx - 1) as f64
                        {
                            *dj_out = fj;
                            *di_out = fi;
                        }
                    }
                });
        }
    }
    (dj, di)
}

/// Values of `f` at the departure points.
pub fn at_departure(
    f: ArrayView2<f64>,
    dj: ArrayView2<f64>,
    di: ArrayView2<f64>,
    periodic: bool,
) -> Array2<f64> {
    Array2::from_shape_fn(f.dim(), |ji| bilinear(f, dj[ji], di[ji], periodic))
}

/// Conservation of (zeta + f)/depth along a trajectory: the absolute vorticity a
/// column should have on arrival, eta_a = eta_d * depth_a / depth_d (the
/// column-depth form of PV conservation; any dynamics text; from memory).
#[inline]
pub fn predicted_absolute_vorticity(
    eta_departure: f64,
    depth_departure: f64,
    depth_arrival: f64,
) -> f64 {
    eta_departure * depth_arrival / depth_departure
}

/// Fractional depth change (depth_a - depth_d)/depth_d: stretching > 0.
#[inline]
pub fn stretching(depth_departure: f64, depth_arrival: f64) -> f64 {
    (depth_arrival - depth_departure) / depth_departure
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: f64 = 6_371_229.0;

    /// Uniform solid-body rotation about the earth's axis, u = u0 cos(phi), v = 0
    /// (Williamson et al. 1992 test case 1's flow; from memory), moves every point
    /// west-to-east by the angle u0 dt / a: the departure point is exactly that far west.
    #[test]
    fn solid_body_rotation_on_the_sphere() {
        let lat: Vec<f64> = (0..73).map(|j| -90.0 + 2.5 * j as f64).collect();
        let lon: Vec<f64> = (0..144).map(|i| 2.5 * i as f64).collect();
        let u0 = 40.0;
        let u = Array2::from_shape_fn((73, 144), |(j, _)| u0 * lat[j].to_radians().cos());
        let v = Array2::zeros((73, 144));
        let dt = 6.0 * 3600.0;
        let layout = Layout::Sphere {
            lat: &lat,
            lon: &lon,
            radius: A,
            periodic: true,
        };
        let (dj, di) = departure_points(&layout, u.view(), v.view(), u.view(), v.view(), dt, 4);
        let shift = (u0 * dt / A).to_degrees() / 2.5; // in columns
        for j in 8..65 {
            for i in [0usize, 50, 143] {
                let want_i = (i as f64 - shift).rem_euclid(144.0);
                let err_cols = ((di[(j, i)] - want_i + 72.0).rem_euclid(144.0) - 72.0).abs();
                // 1% of a grid length, in metres along the parallel and the meridian.
                let err_m = err_cols * 2.5f64.to_radians() * A * lat[j].to_radians().cos();
                let grid_len = 2.5f64.to_radians() * A;
                assert!(err_m < 0.01 * grid_len, "row {j}: {err_m} m");
                assert!(
                    (dj[(j, i)] - j as f64).abs() * grid_len < 0.01 * grid_len,
                    "row {j}: {}",
                    dj[(j, i)]
                );
            }
        }
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
        let (dj, di) = departure_points(&layout, u.view(), v.view(), u.view(), v.view(), dt, 4);
        let mut checked = 0;
        for j in 5..ny - 5 {
            for i in 15..nx - 5 {
                let (la, lo) = proj.inverse(&earth, x0 + i as f64 * d, y0 + j as f64 * d);
                let (xd, yd) = proj.forward(&earth, la, lo - (u0 * dt / A).to_degrees());
                let (wi, wj) = ((xd - x0) / d, (yd - y0) / d);
                // 1% of a grid length, in grid lengths on the map.
                let err = ((di[(j, i)] - wi).powi(2) + (dj[(j, i)] - wj).powi(2)).sqrt();
                assert!(err < 0.01, "({j}, {i}): {err} grid lengths");
                checked += 1;
            }
        }
        assert!(checked > 1000);
    }

    #[test]
    fn conservation_and_stretching() {
        // A column stretched by 10% keeps eta/depth: eta grows by 10%.
        assert!((predicted_absolute_vorticity(1e-4, 100.0, 110.0) - 1.1e-4).abs() < 1e-18);
        assert!((stretching(100.0, 110.0) - 0.1).abs() < 1e-12);
        let f = Array2::from_shape_fn((3, 3), |(j, i)| (j * 3 + i) as f64);
        assert_eq!(bilinear(f.view(), 0.5, 0.5, false), 2.0);
        assert_eq!(bilinear(f.view(), 0.0, 2.5, true), 1.0); // seam: halfway between 2 and 0
    }
}
