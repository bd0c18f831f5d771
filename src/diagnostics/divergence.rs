//! Horizontal divergence on the model's own grid.
//!
//! In: the two horizontal wind components on one level (NaN where missing),
//! in the grid's axes, and the grid's coordinates. Out: divergence, s-1, NaN
//! where a stencil point is missing or at edges without a full stencil.
//! Pure functions: no I/O, no logging. The stencils are those of
//! [`super::vorticity`], with the roles of u and v exchanged.

use ndarray::{Array2, ArrayView1, ArrayView2};

use super::vorticity::{pole_as_outer_point, SphereRows};
use crate::geometry::ops::{ddx_uniform, ddy_nonuniform};

/// Horizontal divergence on a (rotated) latitude/longitude sphere grid:
///
/// D = 1/(a cos phi) * [ du/dlambda + d(v cos phi)/dphi ]
///
/// (any dynamics text, e.g. Holton, An Introduction to Dynamic Meteorology;
/// from memory). Centred differences, three-point on uneven latitudes. On a
/// grid that wraps in longitude the seam is periodic; a row on a pole gets the
/// mean divergence of the polar cap from the flux out through the next row,
/// -/+ sum(v a cos phi1 dlambda) / (2 pi a^2 (1 - |sin phi1|)) (north/south, by
/// Gauss's theorem); an edge row next to a pole uses v cos(phi) = 0 at the pole
/// as its outer point. Limited-area edges are NaN.
pub fn divergence_sphere(
    u: ArrayView2<f64>,
    v: ArrayView2<f64>,
    lat_deg: &[f64],
    lon_deg: &[f64],
    radius: f64,
    periodic: bool,
) -> Array2<f64> {
    let (ny, nx) = u.dim();
    let mut div = Array2::from_elem((ny, nx), f64::NAN);
    let Some(SphereRows {
        phi,
        cosphi,
        dlambda,
    }) = SphereRows::of(u, v, lat_deg, lon_deg)
    else {
        return div;
    };
    let vcos = Array2::from_shape_fn((ny, nx), |(j, i)| v[(j, i)] * cosphi[j]);
    let du_dlambda = ddx_uniform(u, dlambda, periodic);
    let mut dvcos_dphi = ddy_nonuniform(vcos.view(), &phi);
    let on_pole = |j: usize| (phi[j].abs() - std::f64::consts::FRAC_PI_2).abs() < 1e-9;
    if periodic {
        pole_as_outer_point(&mut dvcos_dphi, vcos.view(), &phi);
    }
    for j in (0..ny).filter(|&j| !on_pole(j)) {
        let k = 1.0 / (radius * cosphi[j]);
        for i in 0..nx {
            div[(j, i)] = k * (du_dlambda[(j, i)] + dvcos_dphi[(j, i)]);
        }
    }
    if periodic {
        for (jp, j1) in [(0usize, 1usize), (ny - 1, ny - 2)] {
            if on_pole(jp) {
                let d = polar_cap_divergence(v.row(j1), phi[j1], phi[jp] > 0.0, dlambda, radius);
                div.row_mut(jp).fill(d);
            }
        }
    }
    div
}

/// Mean divergence of the cap poleward of latitude `phi1` (radians), from the
/// northward wind `v1` on that row: the flux out of the cap over its area
/// (Gauss's theorem). Northward wind enters a northern cap and leaves a
/// southern one. The row is summed in order of value, so that the same
/// grid starting at another longitude gives the same bits.
fn polar_cap_divergence(
    v1: ArrayView1<f64>,
    phi1: f64,
    north: bool,
    dlambda: f64,
    radius: f64,
) -> f64 {
    let mut row: Vec<f64> = v1.to_vec();
    row.sort_by(f64::total_cmp);
    let inward: f64 = row
        .iter()
        .map(|v| v * radius * phi1.cos() * dlambda.abs())
        .sum();
    let out = if north { -inward } else { inward };
    let area = std::f64::consts::TAU * radius * radius * (1.0 - phi1.sin().abs());
    out / area
}

/// Horizontal divergence on a conformal projection with map factor m, from
/// wind components along the grid's x and y axes:
///
/// D = m^2 [ d(u/m)/dx + d(v/m)/dy ]
///
/// (Haltiner and Williams 1980, Numerical Prediction and Dynamic Meteorology,
/// for the map-factor form; from memory). `dx`, `dy` are the plane spacings in
/// metres. Edges are NaN.
pub fn divergence_conformal(
    u: ArrayView2<f64>,
    v: ArrayView2<f64>,
    m: ArrayView2<f64>,
    dx: f64,
    dy: f64,
) -> Array2<f64> {
    let (ny, nx) = u.dim();
    if v.dim() != (ny, nx) || m.dim() != (ny, nx) {
        return Array2::from_elem((ny, nx), f64::NAN);
    }
    let u_m = Array2::from_shape_fn((ny, nx), |ji| u[ji] / m[ji]);
    let v_m = Array2::from_shape_fn((ny, nx), |ji| v[ji] / m[ji]);
    let dudx = ddx_uniform(u_m.view(), dx, false);
    let ycoord: Vec<f64> = (0..ny).map(|j| j as f64 * dy).collect();
    let dvdy = ddy_nonuniform(v_m.view(), &ycoord);
    Array2::from_shape_fn((ny, nx), |ji| m[ji] * m[ji] * (dudx[ji] + dvdy[ji]))
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: f64 = 6_371_229.0;

    /// u = U0 sin(lambda) cos(phi), v = V0 cos(phi) has
    /// D = (U0 cos(lambda) - 2 V0 sin(phi)) / a exactly: both terms active, of
    /// opposite parity, so a dropped term, a flipped sign or a lost cos(phi)
    /// shows. The pole rows hold the cap mean -/+ V0 (1 + |sin phi1|)/a.
    #[test]
    fn a_flow_with_both_terms_active_on_a_global_grid_with_poles() {
        let (u0, v0) = (25.0, 8.0);
        let lat: Vec<f64> = (0..73).map(|j| -90.0 + 2.5 * j as f64).collect();
        let lon: Vec<f64> = (0..144).map(|i| -180.0 + 2.5 * i as f64).collect();
        let (phi, lam) = (
            |j: usize| lat[j].to_radians(),
            |i: usize| lon[i].to_radians(),
        );
        let u = Array2::from_shape_fn((73, 144), |(j, i)| u0 * lam(i).sin() * phi(j).cos());
        let v = Array2::from_shape_fn((73, 144), |(j, _)| v0 * phi(j).cos());
        let d = divergence_sphere(u.view(), v.view(), &lat, &lon, A, true);
        let mut worst: f64 = 0.0;
        for j in 1..72 {
            for i in 0..144 {
                let exact = (u0 * lam(i).cos() - 2.0 * v0 * phi(j).sin()) / A;
                worst = worst.max((d[(j, i)] - exact).abs());
            }
        }
        // Second-order truncation at 2.5 degrees (h = 0.0436): (h^2/6) U0/a = 1.2e-9 from
        // the u term and (h^2/6) 8 V0 |sin phi|/a <= 3.2e-9 from the v term, 4.4e-9 s-1 in
        // all, 0.07 % of the largest value, 6.4e-6 s-1.
        assert!(worst <= 5e-9, "largest error {worst:e} s-1");
        let s1 = phi(1).sin().abs();
        for (jp, sign) in [(0usize, 1.0), (72usize, -1.0)] {
            let cap = sign * v0 * (1.0 + s1) / A;
            assert!(
                (d[(jp, 7)] - cap).abs() <= 1e-12,
                "pole row {jp}: {} vs {cap}",
                d[(jp, 7)]
            );
        }
    }

    /// The same flow on the same grid starting half way round: the same bits,
    /// rolled (the pole rows' sum included).
    #[test]
    fn a_grid_starting_elsewhere_gives_the_same_values_rolled() {
        let lat: Vec<f64> = (0..37).map(|j| -90.0 + 5.0 * j as f64).collect();
        let lon0: Vec<f64> = (0..72).map(|i| 5.0 * i as f64).collect();
        let lon1: Vec<f64> = (0..72).map(|i| -180.0 + 5.0 * i as f64).collect();
        let u = Array2::from_shape_fn((37, 72), |(j, i)| {
            (3.0 * lon0[i].to_radians()).sin() * 7.3 + lat[j] * 0.11
        });
        // Values of many sizes, as real winds are, so that the order of a sum shows.
        let v = Array2::from_shape_fn((37, 72), |(j, i)| {
            let k = ((i * 7919 + j * 104_729) % 997) as f64;
            (k * 0.618_034).sin() * 10f64.powi((k as i32 % 5) - 1) * lat[j].to_radians().cos()
        });
        // The same values, the grid starting at 180 W: column i is column i + 36 of the first.
        let roll =
            |a: &Array2<f64>| Array2::from_shape_fn((37, 72), |(j, i)| a[(j, (i + 36) % 72)]);
        let d0 = divergence_sphere(u.view(), v.view(), &lat, &lon0, A, true);
        let d1 = divergence_sphere(roll(&u).view(), roll(&v).view(), &lat, &lon1, A, true);
        for j in 0..37 {
            for i in 0..72 {
                assert_eq!(
                    d0[(j, (i + 36) % 72)].to_bits(),
                    d1[(j, i)].to_bits(),
                    "row {j} column {i}"
                );
            }
        }
    }

    #[test]
    fn rows_next_to_a_pole_use_the_pole_as_their_outer_point() {
        let v0 = 10.0;
        let lat: Vec<f64> = (0..72).map(|j| -88.75 + 2.5 * j as f64).collect();
        let lon: Vec<f64> = (0..144).map(|i| 180.0 + 2.5 * i as f64).collect();
        let u = Array2::zeros((72, 144));
        let v = Array2::from_shape_fn((72, 144), |(j, _)| v0 * lat[j].to_radians().cos());
        let d = divergence_sphere(u.view(), v.view(), &lat, &lon, A, true);
        for j in [0, 1, 36, 70, 71] {
            let exact = -2.0 * v0 * lat[j].to_radians().sin() / A;
            assert!((d[(j, 3)] - exact).abs() <= 5e-3 * exact.abs(), "row {j}");
        }
    }

    #[test]
    fn limited_area_edges_are_missing_and_nan_spreads() {
        let lat: Vec<f64> = (0..10).map(|j| -5.0 + j as f64).collect();
        let lon: Vec<f64> = (0..10).map(|i| 175.0 + i as f64).collect();
        let mut u = Array2::from_shape_fn((10, 10), |(_, i)| i as f64);
        let v = Array2::zeros((10, 10));
        u[(5, 5)] = f64::NAN;
        let d = divergence_sphere(u.view(), v.view(), &lat, &lon, A, false);
        assert!(d[(0, 5)].is_nan() && d[(5, 0)].is_nan());
        assert!(d[(5, 4)].is_nan() && d[(5, 6)].is_nan());
        assert!(d[(3, 3)].is_finite() && d[(3, 3)] > 0.0);
    }

    /// On a plane (m = 1), u = a x, v = b y has D = a + b; with a map factor,
    /// u = c m x, v = 0 has D = m^2 c, which shows both the 1/m inside and the m^2.
    #[test]
    fn conformal_form_on_a_plane_and_with_a_map_factor() {
        let (a, b, c) = (2e-5, -5e-6, 3e-5);
        let (dx, dy) = (10_000.0, 10_000.0);
        let x = |i: usize| i as f64 * dx;
        let u = Array2::from_shape_fn((20, 30), |(_, i)| a * x(i));
        let v = Array2::from_shape_fn((20, 30), |(j, _)| b * j as f64 * dy);
        let ones = Array2::ones((20, 30));
        let d = divergence_conformal(u.view(), v.view(), ones.view(), dx, dy);
        assert!((d[(10, 10)] - (a + b)).abs() < 1e-15);
        assert!(d[(0, 10)].is_nan());
        let m = Array2::from_shape_fn((20, 30), |(j, _)| 1.0 + 0.01 * j as f64);
        let u = Array2::from_shape_fn((20, 30), |(j, i)| c * m[(j, i)] * x(i));
        let zero = Array2::zeros((20, 30));
        let d = divergence_conformal(u.view(), zero.view(), m.view(), dx, dy);
        let want = m[(12, 9)] * m[(12, 9)] * c;
        assert!((d[(12, 9)] - want).abs() < 1e-15 * want.abs().max(1.0) + 1e-18);
    }
}
