//! Relative and absolute vorticity on the isobaric levels.
//!
//! In: winds along the grid's axes (levels, rows, columns) and the grid's [`Plane`].
//! Out: relative vorticity zeta and absolute vorticity eta = zeta + f, level by level in
//! parallel. The differencing is [`Plane::vorticity`]; eta is
//! [`vorticity::absolute_vorticity_at`] (formula, source and closed-form tests there).

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::vorticity;

/// (zeta, eta), s-1, of the winds `ug`, `vg` along the grid's axes.
pub(super) fn zeta_eta(
    plane: &Plane,
    ug: &Array3<f32>,
    vg: &Array3<f32>,
) -> (Array3<f32>, Array3<f32>) {
    let shape = ug.dim();
    let mut zeta = Array3::from_elem(shape, f32::NAN);
    let mut eta = Array3::from_elem(shape, f32::NAN);
    zeta.axis_iter_mut(Axis(0))
        .into_par_iter()
        .zip(eta.axis_iter_mut(Axis(0)))
        .enumerate()
        .for_each(|(k, (mut zl, mut el))| {
            let z = plane.vorticity(
                ug.index_axis(Axis(0), k).mapv(f64::from).view(),
                vg.index_axis(Axis(0), k).mapv(f64::from).view(),
            );
            ndarray::Zip::from(&mut zl)
                .and(&mut el)
                .and(&z)
                .and(&plane.f)
                .for_each(|zo, eo, &zv, &f| {
                    *zo = zv as f32;
                    *eo = vorticity::absolute_vorticity_at(zv, f) as f32;
                });
        });
    (zeta, eta)
}
