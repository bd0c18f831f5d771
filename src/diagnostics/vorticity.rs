//! Relative and absolute vorticity on the model's own grid.
//!
//! In: the two horizontal wind components on one level (NaN where missing),
//! in the grid's axes, and the grid's coordinates. Out: vorticity, s-1, NaN
//! where a stencil point is missing or at edges without a full stencil.
//! Pure functions: no I/O, no logging.

use ndarray::{Array2, ArrayView2, Zip};

use crate::geometry::ops::{ddx_uniform, ddy_nonuniform, nonuniform_centred};

/// Turn earth-relative wind components (east, north) into grid components,
/// given alpha, the counter-clockwise angle from east to the grid's x axis:
/// u_g = u_e cos(alpha) + v_e sin(alpha), v_g = -u_e sin(alpha) + v_e cos(alpha)
/// (a rotation of axes; Snyder 1987 for the angle of each projection; from memory).
pub fn earth_to_grid(
    u: ArrayView2<f64>,
    v: ArrayView2<f64>,
    alpha: ArrayView2<f64>,
) -> (Array2<f64>, Array2<f64>) {
    let mut ug = Array2::zeros(u.dim());
    let mut vg = Array2::zeros(u.dim());
    Zip::from(&mut ug)
        .and(&mut vg)
        .and(u)
        .and(v)
        .and(alpha)
        .for_each(|ug, vg, &ue, &ve, &a| {
            let (s, c) = a.sin_cos();
            *ug = ue * c + ve * s;
            *vg = -ue * s + ve * c;
        });
    (ug, vg)
}

/// Relative vorticity on a (rotated) latitude/longitude sphere grid:
///
/// zeta = 1/(a cos phi) * [ dv/dlambda - d(u cos phi)/dphi ]
///
/// (any dynamics text, e.g. Holton, An Introduction to Dynamic Meteorology;
/// from memory). Centred differences, three-point on uneven latitudes
/// (Gaussian grids). On a grid that wraps in longitude the seam is periodic;
/// a row on a pole gets the mean vorticity of the polar cap from the
/// circulation round the next row, Gamma / (2 pi a^2 (1 - |sin phi1|)); an edge
/// row next to a pole uses u cos(phi) = 0 at the pole as its outer point.
/// Limited-area edges are NaN.
pub fn relative_vorticity_sphere(
    u: ArrayView2<f64>,
    v: ArrayView2<f64>,
    lat_deg: &[f64],
    lon_deg: &[f64],
    radius: f64,
    periodic: bool,
) -> Array2<f64> {
    let (ny, nx) = u.dim();
    let mut zeta = Array2::from_elem((ny, nx), f64::NAN);
    let Some(SphereRows {
        phi,
        cosphi,
        dlambda,
    }) = SphereRows::of(u, v, lat_deg, lon_deg)
    else {
        return zeta;
    };
    let ucos = Array2::from_shape_fn((ny, nx), |(j, i)| u[(j, i)] * cosphi[j]);
    let dv_dlambda = ddx_uniform(v, dlambda, periodic);
    let mut ducos_dphi = ddy_nonuniform(ucos.view(), &phi);

    let half_pi = std::f64::consts::FRAC_PI_2;
    let on_pole = |j: usize| (phi[j].abs() - half_pi).abs() < 1e-9;
    if periodic {
        pole_as_outer_point(&mut ducos_dphi, ucos.view(), &phi);
    }
    for j in 0..ny {
        if on_pole(j) {
            continue;
        }
        let k = 1.0 / (radius * cosphi[j]);
        for i in 0..nx {
            zeta[(j, i)] = k * (dv_dlambda[(j, i)] - ducos_dphi[(j, i)]);
        }
    }
    // Pole rows: the circulation round the neighbouring row over the cap area.
    if periodic {
        for (jp, j1) in [(0usize, 1usize), (ny - 1, ny - 2)] {
            if !on_pole(jp) {
                continue;
            }
            let north = phi[jp] > 0.0;
            let mut circ = 0.0;
            for i in 0..nx {
                circ += u[(j1, i)] * radius * cosphi[j1] * dlambda.abs();
            }
            // Anticlockwise seen from above is eastward round the north pole, westward round the south.
            let circ = if north { circ } else { -circ };
            let area = std::f64::consts::TAU * radius * radius * (1.0 - phi[j1].sin().abs());
            let z = circ / area;
            for i in 0..nx {
                zeta[(jp, i)] = z;
            }
        }
    }
    zeta
}

/// The rows of a (rotated) latitude/longitude grid as the sphere's formulas take
/// them: latitudes in radians, their cosines, and the longitude spacing in radians.
pub(super) struct SphereRows {
    pub phi: Vec<f64>,
    pub cosphi: Vec<f64>,
    pub dlambda: f64,
}

impl SphereRows {
    /// The rows of `lat_deg` x `lon_deg` for winds `u`, `v`, or None when the
    /// shapes do not fit or the grid has fewer than two rows or columns.
    pub fn of(
        u: ArrayView2<f64>,
        v: ArrayView2<f64>,
        lat_deg: &[f64],
        lon_deg: &[f64],
    ) -> Option<SphereRows> {
        let (ny, nx) = u.dim();
        if ny < 2 || nx < 2 || lat_deg.len() != ny || lon_deg.len() != nx || v.dim() != (ny, nx) {
            return None;
        }
        let phi: Vec<f64> = lat_deg.iter().map(|d| d.to_radians()).collect();
        let cosphi = phi.iter().map(|p| p.cos()).collect();
        let dlambda = (lon_deg[nx - 1] - lon_deg[0]).to_radians() / (nx - 1) as f64;
        Some(SphereRows {
            phi,
            cosphi,
            dlambda,
        })
    }
}

/// d(q cos phi)/dphi on the edge rows next to (but not on) a pole of a grid that
/// wraps round: the pole itself is the outer stencil point, where q cos(phi) = 0
/// (q = u for vorticity, v for divergence). Other rows of `d` are left as they are.
pub(super) fn pole_as_outer_point(d: &mut Array2<f64>, vcos: ArrayView2<f64>, phi: &[f64]) {
    let (ny, nx) = vcos.dim();
    let half_pi = std::f64::consts::FRAC_PI_2;
    let on_pole = |j: usize| (phi[j].abs() - half_pi).abs() < 1e-9;
    let (jn, js) = (ny - 1, 0);
    let hn = phi[jn] - phi[jn - 1];
    if !on_pole(jn) && half_pi - phi[jn] <= 1.5 * hn.abs() {
        for i in 0..nx {
            d[(jn, i)] =
                nonuniform_centred(vcos[(jn - 1, i)], vcos[(jn, i)], 0.0, hn, half_pi - phi[jn]);
        }
    }
    let hs = phi[js + 1] - phi[js];
    if !on_pole(js) && phi[js] + half_pi <= 1.5 * hs.abs() {
        for i in 0..nx {
            d[(js, i)] =
                nonuniform_centred(0.0, vcos[(js, i)], vcos[(js + 1, i)], phi[js] + half_pi, hs);
        }
    }
}

/// Relative vorticity on a conformal projection with map factor m, from wind
/// components along the grid's x and y axes:
///
/// zeta = m^2 [ d(v/m)/dx - d(u/m)/dy ]
///
/// (Snyder 1987 for m; the form used by limited-area models; from memory).
/// `dx`, `dy` are the plane spacings in metres. Edges are NaN.
pub fn relative_vorticity_conformal(
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
    let v_m = Array2::from_shape_fn((ny, nx), |ji| v[ji] / m[ji]);
    let u_m = Array2::from_shape_fn((ny, nx), |ji| u[ji] / m[ji]);
    let dvdx = ddx_uniform(v_m.view(), dx, false);
    let ycoord: Vec<f64> = (0..ny).map(|j| j as f64 * dy).collect();
    let dudy = ddy_nonuniform(u_m.view(), &ycoord);
    Array2::from_shape_fn((ny, nx), |ji| m[ji] * m[ji] * (dvdx[ji] - dudy[ji]))
}

/// Absolute vorticity eta = zeta + f (any dynamics text; from memory).
#[inline]
pub fn absolute_vorticity_at(zeta: f64, f: f64) -> f64 {
    zeta + f
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::constants::OMEGA;

    const A: f64 = 6_371_229.0;

    /// Williamson et al. 1992, test case 2 (docs/references.md): u = u0 cos(phi), v = 0
    /// has zeta = 2 u0 sin(phi) / a exactly.
    #[test]
    fn solid_body_flow_on_a_global_grid_with_poles() {
        let u0 = 40.0;
        let lat: Vec<f64> = (0..73).map(|j| -90.0 + 2.5 * j as f64).collect();
        let lon: Vec<f64> = (0..144).map(|i| 2.5 * i as f64).collect();
        let u = Array2::from_shape_fn((73, 144), |(j, _)| u0 * lat[j].to_radians().cos());
        let v = Array2::zeros((73, 144));
        let z = relative_vorticity_sphere(u.view(), v.view(), &lat, &lon, A, true);
        for j in 0..73 {
            let exact = 2.0 * u0 * lat[j].to_radians().sin() / A;
            for i in [0, 71, 143] {
                let got = z[(j, i)];
                let tol = 5e-3 * exact.abs() + 1e-12;
                assert!(
                    (got - exact).abs() <= tol,
                    "lat {} got {got} exact {exact}",
                    lat[j]
                );
            }
        }
    }

    #[test]
    fn solid_body_flow_on_a_grid_without_pole_rows() {
        // Rows at +-88.75 ... like a Gaussian or offset grid: the pole is the outer point.
        let u0 = 30.0;
        let lat: Vec<f64> = (0..72).map(|j| -88.75 + 2.5 * j as f64).collect();
        let lon: Vec<f64> = (0..144).map(|i| 2.5 * i as f64).collect();
        let u = Array2::from_shape_fn((72, 144), |(j, _)| u0 * lat[j].to_radians().cos());
        let v = Array2::zeros((72, 144));
        let z = relative_vorticity_sphere(u.view(), v.view(), &lat, &lon, A, true);
        for j in [0, 1, 36, 70, 71] {
            let exact = 2.0 * u0 * lat[j].to_radians().sin() / A;
            assert!((z[(j, 5)] - exact).abs() <= 5e-3 * exact.abs(), "row {j}");
        }
    }

    #[test]
    fn limited_area_edges_are_missing_and_nan_spreads() {
        let lat: Vec<f64> = (0..10).map(|j| 30.0 + j as f64).collect();
        let lon: Vec<f64> = (0..10).map(|i| i as f64).collect();
        let mut u = Array2::from_elem((10, 10), 10.0);
        let v = Array2::zeros((10, 10));
        u[(5, 5)] = f64::NAN;
        let z = relative_vorticity_sphere(u.view(), v.view(), &lat, &lon, A, false);
        assert!(z[(0, 5)].is_nan() && z[(5, 0)].is_nan());
        assert!(z[(4, 5)].is_nan() && z[(6, 5)].is_nan());
        assert!(z[(5, 5)].is_nan(), "a missing point has no vorticity");
        assert!(
            z[(5, 7)].is_finite() && z[(3, 5)].is_finite(),
            "points off the stencil keep theirs"
        );
    }

    #[test]
    fn conformal_form_reduces_to_cartesian_for_unit_map_factor() {
        // Closed form: u = -c y, v = c x has zeta = 2c on a plane (m = 1).
        let c = 1e-4;
        let (dx, dy) = (10_000.0, 10_000.0);
        let u = Array2::from_shape_fn((20, 30), |(j, _)| -c * j as f64 * dy);
        let v = Array2::from_shape_fn((20, 30), |(_, i)| c * i as f64 * dx);
        let m = Array2::ones((20, 30));
        let z = relative_vorticity_conformal(u.view(), v.view(), m.view(), dx, dy);
        assert!((z[(10, 10)] - 2.0 * c).abs() < 1e-15);
        assert!(z[(0, 10)].is_nan());
    }

    #[test]
    fn wind_rotation_round_trip_and_quarter_turn() {
        // A quarter turn of the axes: an eastward wind is along -y of a grid whose x points north.
        let u = Array2::from_elem((1, 1), 10.0);
        let v = Array2::zeros((1, 1));
        let a = Array2::from_elem((1, 1), std::f64::consts::FRAC_PI_2);
        let (ug, vg) = earth_to_grid(u.view(), v.view(), a.view());
        assert!(ug[(0, 0)].abs() < 1e-12 && (vg[(0, 0)] + 10.0).abs() < 1e-12);
    }

    #[test]
    fn absolute_adds_coriolis() {
        // docs/references.md check value: f at 45 degrees = 1.03126e-4 s-1.
        let f = 2.0 * OMEGA * 45f64.to_radians().sin();
        let eta = absolute_vorticity_at(1e-5, f);
        assert!((eta - (1.03126e-4 + 1e-5)).abs() < 1e-9);
    }
}
