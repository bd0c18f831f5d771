//! Ertel PV on the isobaric levels, in its full form with the tilting terms.
//!
//! In: absolute vorticity, potential temperature and -dtheta/dp on the levels, and the
//! winds along the grid's axes. Out: PV in PVU, level by level in parallel. The formula
//! is [`pv::isobaric_pv`] (equation, source and closed-form tests there); the vertical
//! derivatives of the winds are three-point differences in ln p
//! ([`vertical_derivative_at`]).

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::pv;
use crate::diagnostics::stability::vertical_derivative_at;

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
    let (ug, vg) = (ug.view(), vg.view());
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
