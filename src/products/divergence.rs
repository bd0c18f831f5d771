//! Horizontal divergence on the isobaric levels.
//!
//! In: winds along the grid's axes (levels, rows, columns) and the grid's [`Plane`].
//! Out: divergence, s-1, level by level in parallel. The differencing is
//! [`Plane::divergence`] (formula, source and closed-form tests in
//! [`crate::diagnostics::divergence`]).

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::diagnostics::horizontal::Plane;

/// Divergence, s-1, of the winds `ug`, `vg` along the grid's axes.
pub(super) fn divergence(plane: &Plane, ug: &Array3<f32>, vg: &Array3<f32>) -> Array3<f32> {
    let mut div = Array3::from_elem(ug.dim(), f32::NAN);
    div.axis_iter_mut(Axis(0))
        .into_par_iter()
        .enumerate()
        .for_each(|(k, mut level)| {
            let d = plane.divergence(
                ug.index_axis(Axis(0), k).mapv(f64::from).view(),
                vg.index_axis(Axis(0), k).mapv(f64::from).view(),
            );
            level.zip_mut_with(&d, |o, &x| *o = x as f32);
        });
    div
}
