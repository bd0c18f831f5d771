//! Ertel PV on the isobaric levels, in its full form with the tilting terms.
//!
//! In: absolute vorticity, potential temperature and -dtheta/dp on the levels, and the
//! winds along the grid's axes. Out: PV in PVU, level by level in parallel. The formula
//! is [`pv::isobaric_pv`] (equation, source and closed-form tests there); the vertical
//! derivatives of the winds are three-point differences in ln p.

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::{pv, stability};

/// Isobaric PV (PVU) from eta (s-1), theta (K), -dtheta/dp (K Pa-1) and the winds
/// along the grid's axes, on the levels `p` (Pa, increasing).
pub(super) fn isobaric_pv(
    plane: &Plane,
    eta: &Array3<f32>,
    (theta, neg_dtheta_dp): (&Array3<f32>, &Array3<f32>),
    (ug, vg): (&Array3<f32>, &Array3<f32>),
    p: &[f64],
) -> Array3<f32> {
    let lnp: Vec<f64> = p.iter().map(|p| p.ln()).collect();
    let mut pv = Array3::from_elem(eta.dim(), f32::NAN);
    pv.axis_iter_mut(Axis(0))
        .into_par_iter()
        .enumerate()
        .for_each(|(k, mut out)| {
            let th = theta.index_axis(Axis(0), k).mapv(f64::from);
            let (gx, gy) = plane.gradient(th.view());
            ndarray::Zip::indexed(&mut out).for_each(|(j, i), o| {
                *o = pv::isobaric_pv(
                    f64::from(eta[(k, j, i)]),
                    -f64::from(neg_dtheta_dp[(k, j, i)]),
                    vertical_derivative_at(ug, k, j, i, &lnp, p),
                    vertical_derivative_at(vg, k, j, i, &lnp, p),
                    gx[(j, i)],
                    gy[(j, i)],
                ) as f32;
            });
        });
    pv
}

/// d f / d p of every column of `f` (levels, rows, columns), from three-point
/// differences in ln p (see `stability::column_derivative`): df/dp = (1/p) df/d ln p.
fn vertical_derivative_at(
    f: &Array3<f32>,
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
            return crate::geometry::ops::nonuniform_centred(
                fm,
                f0,
                fp,
                lnp[k] - lnp[k - 1],
                lnp[k + 1] - lnp[k],
            ) / p[k];
        }
    }
    // Otherwise the column rule on the whole column: the nearest valid levels may lie
    // beyond levels that lack this quantity.
    let mut col = [0.0f64; 128];
    let mut d = [0.0f64; 128];
    if nz > col.len() {
        let c: Vec<f64> = (0..nz).map(|kk| f64::from(f[(kk, j, i)])).collect();
        let mut dv = vec![0.0; nz];
        stability::column_derivative(&c, lnp, &mut dv);
        return dv[k] / p[k];
    }
    for (kk, c) in col.iter_mut().enumerate().take(nz) {
        *c = f64::from(f[(kk, j, i)]);
    }
    stability::column_derivative(&col[..nz], lnp, &mut d[..nz]);
    d[k] / p[k]
}
