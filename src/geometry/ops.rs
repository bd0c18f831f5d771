//! Finite-difference operators on the grid's own coordinates.
//!
//! In: 2-D fields (rows south to north, columns west to east) as `f64` views
//! and the coordinates of their rows or columns. Out: owned arrays of the same
//! shape. Missing values are NaN and spread to every derivative whose stencil
//! touches them; edge points without a full stencil are NaN unless the
//! direction is periodic. Never panics: a field whose shape does not match its
//! coordinates gives an all-NaN result.

use ndarray::{Array2, ArrayView2, Axis};

/// Three-point first derivative on unevenly spaced points: with
/// h1 = c0 - cm, h2 = cp - c0,
/// f'(c0) = (h1^2 fp - h2^2 fm + (h2^2 - h1^2) f0) / (h1 h2 (h1 + h2)),
/// second-order accurate (any numerical analysis text; from memory).
#[inline]
pub fn nonuniform_centred(fm: f64, f0: f64, fp: f64, h1: f64, h2: f64) -> f64 {
    (h1 * h1 * fp - h2 * h2 * fm + (h2 * h2 - h1 * h1) * f0) / (h1 * h2 * (h1 + h2))
}

/// Three-point one-sided first derivative at c0 from c0, c1 = c0 + h1, c2 = c1 + h2
/// (h1, h2 may be negative for a backward difference); second-order accurate:
/// f'(c0) = -(2 h1 + h2)/(h1 (h1 + h2)) f0 + (h1 + h2)/(h1 h2) f1 - h1/(h2 (h1 + h2)) f2.
#[inline]
pub fn nonuniform_one_sided(f0: f64, f1: f64, f2: f64, h1: f64, h2: f64) -> f64 {
    -(2.0 * h1 + h2) / (h1 * (h1 + h2)) * f0 + (h1 + h2) / (h1 * h2) * f1
        - h1 / (h2 * (h1 + h2)) * f2
}

/// d f / d x along the columns (axis 1) for evenly spaced columns `h` apart:
/// centred differences (f[i+1] - f[i-1]) / 2h; the first and last columns are
/// NaN unless `periodic`, when the last column neighbours the first.
pub fn ddx_uniform(f: ArrayView2<f64>, h: f64, periodic: bool) -> Array2<f64> {
    let (ny, nx) = f.dim();
    let mut out = Array2::from_elem((ny, nx), f64::NAN);
    if nx < 3 || h == 0.0 || !h.is_finite() {
        return out;
    }
    let inv = 1.0 / (2.0 * h);
    for (row, mut o) in f.axis_iter(Axis(0)).zip(out.axis_iter_mut(Axis(0))) {
        for i in 1..nx - 1 {
            o[i] = (row[i + 1] - row[i - 1]) * inv;
        }
        if periodic {
            o[0] = (row[1] - row[nx - 1]) * inv;
            o[nx - 1] = (row[0] - row[nx - 2]) * inv;
        }
    }
    out
}

/// d f / d y along the rows (axis 0) for row coordinates `c` (ascending, any
/// spacing): three-point differences of [`nonuniform_centred`]; the first and
/// last rows are NaN.
pub fn ddy_nonuniform(f: ArrayView2<f64>, c: &[f64]) -> Array2<f64> {
    let (ny, nx) = f.dim();
    let mut out = Array2::from_elem((ny, nx), f64::NAN);
    if ny < 3 || c.len() != ny {
        return out;
    }
    for j in 1..ny - 1 {
        let (h1, h2) = (c[j] - c[j - 1], c[j + 1] - c[j]);
        for i in 0..nx {
            out[(j, i)] = nonuniform_centred(f[(j - 1, i)], f[(j, i)], f[(j + 1, i)], h1, h2);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn three_point_formulas_are_exact_for_quadratics() {
        // Closed form: a three-point difference differentiates a quadratic exactly.
        let f = |x: f64| 3.0 * x * x - 2.0 * x + 1.0;
        let df = |x: f64| 6.0 * x - 2.0;
        let (xm, x0, xp) = (0.3, 0.7, 1.6);
        let c = nonuniform_centred(f(xm), f(x0), f(xp), x0 - xm, xp - x0);
        assert!((c - df(x0)).abs() < 1e-12);
        let o = nonuniform_one_sided(f(x0), f(x0 + 0.2), f(x0 + 0.5), 0.2, 0.3);
        assert!((o - df(x0)).abs() < 1e-12);
        let b = nonuniform_one_sided(f(x0), f(x0 - 0.2), f(x0 - 0.5), -0.2, -0.3);
        assert!((b - df(x0)).abs() < 1e-12);
    }

    #[test]
    fn periodic_seam_and_nan_spread() {
        // sin(x) on a full circle: derivative cos(x), also across the seam.
        let n = 72;
        let h = std::f64::consts::TAU / n as f64;
        let f = Array2::from_shape_fn((2, n), |(_, i)| (i as f64 * h).sin());
        let d = ddx_uniform(f.view(), h, true);
        for i in 0..n {
            assert!((d[(0, i)] - (i as f64 * h).cos()).abs() < 2e-3);
        }
        let d = ddx_uniform(f.view(), h, false);
        assert!(d[(0, 0)].is_nan() && d[(0, n - 1)].is_nan());
        let mut g = f.clone();
        g[(1, 10)] = f64::NAN;
        let d = ddx_uniform(g.view(), h, true);
        assert!(d[(1, 9)].is_nan() && d[(1, 11)].is_nan() && d[(1, 10)].is_finite());
    }

    #[test]
    fn mismatched_shapes_give_nan_not_panic() {
        let f = Array2::<f64>::zeros((4, 4));
        assert!(ddy_nonuniform(f.view(), &[0.0, 1.0])
            .iter()
            .all(|v| v.is_nan()));
        assert!(ddx_uniform(f.view(), 0.0, false).iter().all(|v| v.is_nan()));
    }
}
