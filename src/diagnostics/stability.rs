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

/// Derivative of one column `f` with respect to `x` (ascending), three-point on the
/// column's valid levels: a level where `f` is missing (a level that carries other
/// quantities but not this one, or below the ground) is stepped over, so the
/// neighbours of a valid level are the nearest valid levels above and below it.
/// Centred where both exist, one-sided from the two nearest valid levels on one side
/// at the ends, two-point where the column has only two valid levels, NaN where a
/// level is missing or alone.
pub fn column_derivative(f: &[f64], x: &[f64], out: &mut [f64]) {
    let n = f.len().min(x.len()).min(out.len());
    out[..n].fill(f64::NAN);
    let mut valid = [0usize; 128];
    let mut m = 0;
    for k in 0..n {
        if f[k].is_finite() {
            if m == valid.len() {
                // More levels than any model carries: fall back to a heap copy.
                let all: Vec<usize> = (0..n).filter(|&k| f[k].is_finite()).collect();
                derivative_on(&all, f, x, out);
                return;
            }
            valid[m] = k;
            m += 1;
        }
    }
    derivative_on(&valid[..m], f, x, out);
}

/// d f / d p at level `k` of the column (`j`, `i`) of `f` (levels, rows, columns; NaN
/// where missing), on the levels `p` (Pa, increasing) with `lnp` their logarithms:
/// df/dp = (1/p) df/d ln p. Where both neighbouring levels hold `f` (nearly every point),
/// df/d ln p is the three-point centred difference on the uneven levels,
/// (h1^2 f(k+1) - h2^2 f(k-1) + (h2^2 - h1^2) f(k)) / (h1 h2 (h1 + h2)), h1 = ln p(k) - ln p(k-1),
/// h2 = ln p(k+1) - ln p(k) (second-order; any numerical analysis text, from memory);
/// elsewhere it is [`column_derivative`] of the whole column, whose nearest valid levels may
/// lie beyond levels that lack `f`. Exact for f quadratic in ln p.
pub fn vertical_derivative_at(
    f: ArrayView3<f32>,
    k: usize,
    j: usize,
    i: usize,
    lnp: &[f64],
    p: &[f64],
) -> f64 {
    let nz = lnp.len();
    // Both neighbours valid (nearly every point): the centred difference the
    // column rule takes there.
    if k >= 1 && k + 1 < nz {
        let (fm, f0, fp) = (
            f64::from(f[(k - 1, j, i)]),
            f64::from(f[(k, j, i)]),
            f64::from(f[(k + 1, j, i)]),
        );
        if fm.is_finite() && f0.is_finite() && fp.is_finite() {
            return nonuniform_centred(fm, f0, fp, lnp[k] - lnp[k - 1], lnp[k + 1] - lnp[k]) / p[k];
        }
    }
    // Otherwise the column rule on the whole column: the nearest valid levels may lie
    // beyond levels that lack this quantity.
    let mut col = [0.0f64; 128];
    let mut d = [0.0f64; 128];
    if nz > col.len() {
        let c: Vec<f64> = (0..nz).map(|kk| f64::from(f[(kk, j, i)])).collect();
        let mut dv = vec![0.0; nz];
        column_derivative(&c, lnp, &mut dv);
        return dv[k] / p[k];
    }
    for (kk, c) in col.iter_mut().enumerate().take(nz) {
        *c = f64::from(f[(kk, j, i)]);
    }
    column_derivative(&col[..nz], lnp, &mut d[..nz]);
    d[k] / p[k]
}

/// [`column_derivative`] at the levels `v` (ascending indices of the valid levels).
fn derivative_on(v: &[usize], f: &[f64], x: &[f64], out: &mut [f64]) {
    let m = v.len();
    if m < 2 {
        return;
    }
    for (q, &k) in v.iter().enumerate() {
        out[k] = if m == 2 {
            let (a, b) = (v[0], v[1]);
            (f[b] - f[a]) / (x[b] - x[a])
        } else if q == 0 {
            let (k1, k2) = (v[1], v[2]);
            nonuniform_one_sided(f[k], f[k1], f[k2], x[k1] - x[k], x[k2] - x[k1])
        } else if q + 1 == m {
            let (k1, k2) = (v[q - 1], v[q - 2]);
            nonuniform_one_sided(f[k], f[k1], f[k2], x[k1] - x[k], x[k2] - x[k1])
        } else {
            let (a, b) = (v[q - 1], v[q + 1]);
            nonuniform_centred(f[a], f[k], f[b], x[k] - x[a], x[b] - x[k])
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
    fn levels_without_the_quantity_are_stepped_over() {
        // f = x^2 on levels 0, 1, 3 and 6 (missing on 2, 4 and 5, levels that carry other
        // quantities): three-point differences on the valid levels, centred at 1 and 3,
        // one-sided at the ends, are exact for a quadratic.
        let x = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        let mut f: Vec<f64> = x.iter().map(|v| v * v).collect();
        for k in [2, 4, 5] {
            f[k] = f64::NAN;
        }
        let mut d = [0.0; 7];
        column_derivative(&f, &x, &mut d);
        for k in [0, 1, 3, 6] {
            assert!((d[k] - 2.0 * x[k]).abs() < 1e-12, "level {k}: {}", d[k]);
        }
        for k in [2, 4, 5] {
            assert!(d[k].is_nan());
        }
        // Two valid levels: their two-point difference at both; one: nothing.
        let two = [f64::NAN, 1.0, f64::NAN, 9.0];
        let mut d2 = [0.0; 4];
        column_derivative(&two, &x[..4], &mut d2);
        assert_eq!((d2[1], d2[3]), (4.0, 4.0));
        let one = [f64::NAN, 1.0, f64::NAN];
        let mut d1 = [0.0; 3];
        column_derivative(&one, &x[..3], &mut d1);
        assert!(d1.iter().all(|v| v.is_nan()));
    }

    #[test]
    fn vertical_derivative_of_a_quadratic_in_ln_p() {
        // f = 10 + 3 x + 2 x^2, x = ln(p / 1000 hPa): every three-point rule is exact for
        // it, so df/dp = (3 + 4 x)/p at every level to the rounding of f to f32: centred
        // inside, one-sided at the ends, and stepping over a level without f.
        let p: Vec<f64> = [100.0, 200.0, 300.0, 500.0, 700.0, 850.0, 925.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let lnp: Vec<f64> = p.iter().map(|v| v.ln()).collect();
        let x = |k: usize| (p[k] / 100_000.0).ln();
        let f_of = |k: usize| 10.0 + 3.0 * x(k) + 2.0 * x(k) * x(k);
        let mut f = Array3::from_shape_fn((p.len(), 2, 3), |(k, _, _)| f_of(k) as f32);
        // Column (1, 2) lacks f at 700 hPa.
        f[(4, 1, 2)] = f32::NAN;
        let fmax = (0..p.len()).map(|k| f_of(k).abs()).fold(0.0, f64::max);
        let hmin = lnp.windows(2).map(|w| w[1] - w[0]).fold(f64::MAX, f64::min);
        for k in 0..p.len() {
            let exact = (3.0 + 4.0 * x(k)) / p[k];
            // Rounding f to f32 moves df/d ln p by at most a few eps |f| / h.
            let tol = 64.0 * f64::from(f32::EPSILON) * fmax / hmin / p[k];
            for (j, i) in [(0, 0), (1, 2)] {
                let got = vertical_derivative_at(f.view(), k, j, i, &lnp, &p);
                if (j, i) == (1, 2) && k == 4 {
                    assert!(got.is_nan());
                    continue;
                }
                assert!(
                    (got - exact).abs() < tol,
                    "level {k} column ({j}, {i}): {got} vs {exact}"
                );
            }
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
