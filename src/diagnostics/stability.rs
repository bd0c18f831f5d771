//! Potential temperature and static stability on isobaric levels.
//!
//! In: temperature on levels of increasing pressure (NaN where missing or
//! below ground), the level pressures in Pa. Out: theta, -dtheta/dp and N^2
//! on the same levels. Vertical derivatives are three-point differences in
//! ln p on unevenly spaced levels, one-sided at the ends of each column's
//! valid run. Pure functions: no I/O, no logging.

use ndarray::{Array3, ArrayView3, Axis, Zip};

use super::constants::{G0, KAPPA, P0, R_DRY};
use crate::geometry::ops::{nonuniform_centred, nonuniform_one_sided};

/// Potential temperature theta = T (p0 / p)^kappa, p0 = 1000 hPa (Poisson's equation).
#[inline]
pub fn potential_temperature(t: f64, p: f64) -> f64 {
    t * (P0 / p).powf(KAPPA)
}

/// Derivative of one column `f` with respect to `x` (ascending), three-point:
/// centred where both neighbours are valid, one-sided from the two valid
/// levels on one side where the other is missing or absent, two-point where
/// only one neighbour is valid, NaN where none is.
pub fn column_derivative(f: &[f64], x: &[f64], out: &mut [f64]) {
    let n = f.len().min(x.len()).min(out.len());
    let ok = |k: usize| f[k].is_finite();
    for k in 0..n {
        out[k] = f64::NAN;
        if !ok(k) {
            continue;
        }
        let below = k + 1 < n && ok(k + 1);
        let above = k >= 1 && ok(k - 1);
        out[k] = if below && above {
            nonuniform_centred(f[k - 1], f[k], f[k + 1], x[k] - x[k - 1], x[k + 1] - x[k])
        } else if below && k + 2 < n && ok(k + 2) {
            nonuniform_one_sided(
                f[k],
                f[k + 1],
                f[k + 2],
                x[k + 1] - x[k],
                x[k + 2] - x[k + 1],
            )
        } else if above && k >= 2 && ok(k - 2) {
            nonuniform_one_sided(
                f[k],
                f[k - 1],
                f[k - 2],
                x[k - 1] - x[k],
                x[k - 2] - x[k - 1],
            )
        } else if below {
            (f[k + 1] - f[k]) / (x[k + 1] - x[k])
        } else if above {
            (f[k] - f[k - 1]) / (x[k] - x[k - 1])
        } else {
            f64::NAN
        };
    }
}

/// Vertical results for a stack of isobaric levels.
pub struct Stability {
    /// Potential temperature, K.
    pub theta: Array3<f32>,
    /// Static stability -d theta / d p, K Pa-1 (Bluestein 1992; from memory).
    pub neg_dtheta_dp: Array3<f32>,
    /// N^2 = -(g^2 p / (R T theta)) d theta / dp, s-2 (hydrostatic form; Bluestein 1992; from memory).
    pub n2: Array3<f32>,
}

/// theta, -dtheta/dp and N^2 for temperature `t` (levels, rows, columns) on
/// levels `p` (Pa, strictly increasing). dtheta/dp = (1/p) dtheta/d ln p.
/// Arrays are stored as `f32`; each column is worked in `f64`.
pub fn stability(t: ArrayView3<f32>, p: &[f64]) -> Stability {
    let (nz, ny, nx) = t.dim();
    let mut theta = Array3::from_elem((nz, ny, nx), f32::NAN);
    let mut neg = Array3::from_elem((nz, ny, nx), f32::NAN);
    let mut n2 = Array3::from_elem((nz, ny, nx), f32::NAN);
    if p.len() != nz || nz == 0 {
        return Stability {
            theta,
            neg_dtheta_dp: neg,
            n2,
        };
    }
    let lnp: Vec<f64> = p.iter().map(|v| v.ln()).collect();
    // (p0 / p)^kappa once per level: theta = T * factor.
    let factor: Vec<f64> = p.iter().map(|&pk| potential_temperature(1.0, pk)).collect();
    // Row by row (each level's row is contiguous), a column at a time within the row.
    Zip::from(t.axis_iter(Axis(1)))
        .and(theta.axis_iter_mut(Axis(1)))
        .and(neg.axis_iter_mut(Axis(1)))
        .and(n2.axis_iter_mut(Axis(1)))
        .par_for_each(|tr, mut thr, mut ndr, mut n2r| {
            let mut tk = vec![0.0; nz];
            let mut th = vec![0.0; nz];
            let mut der = vec![0.0; nz];
            for i in 0..nx {
                for k in 0..nz {
                    tk[k] = f64::from(tr[(k, i)]);
                    th[k] = tk[k] * factor[k];
                }
                column_derivative(&th, &lnp, &mut der);
                for k in 0..nz {
                    let dthdp = der[k] / p[k];
                    thr[(k, i)] = th[k] as f32;
                    ndr[(k, i)] = (-dthdp) as f32;
                    n2r[(k, i)] = (-(G0 * G0 * p[k] / (R_DRY * tk[k] * th[k])) * dthdp) as f32;
                }
            }
        });
    Stability {
        theta,
        neg_dtheta_dp: neg,
        n2,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Constant-lapse-rate atmosphere (docs/references.md): T = T0 (p/p0)^(R gamma/g).
    fn lapse_t(p: f64) -> f64 {
        288.15 * (p / 101_325.0).powf(R_DRY * 0.0065 / G0)
    }

    #[test]
    fn potential_temperature_of_the_standard_atmosphere() {
        // US Standard Atmosphere 1976 (computed from its defining constants, docs/references.md):
        // at 500 hPa, z = 5574.4 m, T = 288.15 - 6.5 * 5.5744 = 251.91 K, so theta = 251.91 (1000/500)^kappa.
        let t500 = 288.15 - 6.5 * 5.5744;
        let th = potential_temperature(t500, 50_000.0);
        assert!((th - t500 * 2f64.powf(0.2857)).abs() < 0.1, "{th}");
        // At 1000 hPa theta equals T by definition.
        assert_eq!(potential_temperature(280.0, 100_000.0), 280.0);
    }

    #[test]
    fn stability_of_a_constant_lapse_rate_atmosphere() {
        // Closed form: theta = T0 (p/p0)^c (p00/p)^kappa with c = R gamma/g, so
        // d theta/dp = (c - kappa) theta / p.
        let p: Vec<f64> = [
            100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 700.0, 850.0, 925.0, 1000.0,
        ]
        .iter()
        .map(|h| h * 100.0)
        .collect();
        let t = Array3::from_shape_fn((p.len(), 2, 3), |(k, _, _)| lapse_t(p[k]) as f32);
        let s = stability(t.view(), &p);
        let c = R_DRY * 0.0065 / G0;
        for k in 0..p.len() {
            let th = potential_temperature(lapse_t(p[k]), p[k]);
            let exact = -(c - KAPPA) * th / p[k];
            let got = f64::from(s.neg_dtheta_dp[(k, 1, 2)]);
            let tol = if k == 0 || k + 1 == p.len() {
                0.02
            } else {
                0.005
            };
            assert!(
                ((got - exact) / exact).abs() < tol,
                "level {k}: {got} vs {exact}"
            );
            let n2 = G0 * G0 * p[k] / (R_DRY * lapse_t(p[k]) * th) * exact;
            assert!(((f64::from(s.n2[(k, 1, 2)]) - n2) / n2).abs() < tol);
        }
    }

    #[test]
    fn missing_levels_fall_back_to_one_sided() {
        let x = [0.0, 1.0, 2.0, 3.0, 4.0];
        let f = [f64::NAN, 1.0, 4.0, 9.0, 16.0]; // (x)^2 on the valid run
        let mut d = [0.0; 5];
        column_derivative(&f, &x, &mut d);
        assert!(d[0].is_nan());
        // One-sided three-point is exact for a quadratic: d/dx x^2 at x = 1 is 2.
        assert!((d[1] - 2.0).abs() < 1e-12);
        assert!((d[4] - 8.0).abs() < 1e-12);
    }
}
