//! PV of isentropic layers in column-depth form, with the layers' mean winds and depths.
//!
//! In: theta on the isobaric levels, the winds along the grid's axes and the configured
//! layers (pairs of theta, K). Out: `layer_pv`, `layer_dp`, `layer_u`, `layer_v` on
//! [`Vertical::ThetaLayer`]. The layer mean and the formula are
//! [`isentropic::layer_mean_wind_with`] and [`isentropic::layer_pv`] (sources and
//! closed-form tests there).

use ndarray::{Array3, Axis};

use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::isentropic;
use crate::output::cf::{Product, Vertical};
use crate::output::variables;

use super::seal::Sealer;

/// The layer products of theta (K) on the levels `p` (Pa) and the winds `(ug, vg)`.
pub(super) fn products(
    theta: &Array3<f32>,
    p: &[f64],
    (ug, vg): (&Array3<f32>, &Array3<f32>),
    layers: &[[f64; 2]],
    plane: &Plane,
    seal: &Sealer<'_>,
) -> Vec<Product> {
    let (_, ny, nx) = theta.dim();
    let mut bounds: Vec<f64> = layers.iter().flat_map(|l| [l[0], l[1]]).collect();
    bounds.sort_by(f64::total_cmp);
    bounds.dedup();
    let surf = isentropic::surfaces(theta.view(), p, &bounds);
    let nl = layers.len();
    let mut lpv = Array3::from_elem((nl, ny, nx), f32::NAN);
    let mut ldp = Array3::from_elem((nl, ny, nx), f32::NAN);
    let mut lu = Array3::from_elem((nl, ny, nx), f32::NAN);
    let mut lv = Array3::from_elem((nl, ny, nx), f32::NAN);
    let ub = isentropic::on_surfaces(ug.view(), &surf);
    let vb = isentropic::on_surfaces(vg.view(), &surf);
    for (n, l) in layers.iter().enumerate() {
        let ib = bounds.iter().position(|b| *b == l[0]).unwrap_or(0);
        let it = bounds.iter().position(|b| *b == l[1]).unwrap_or(0);
        let (um, vm, dp) =
            isentropic::layer_mean_wind_with(ug.view(), vg.view(), p, &surf, (&ub, &vb), ib, it);
        let z = plane.vorticity(um.view(), vm.view());
        lu.index_axis_mut(Axis(0), n).assign(&um.mapv(|x| x as f32));
        lv.index_axis_mut(Axis(0), n).assign(&vm.mapv(|x| x as f32));
        ndarray::Zip::from(ldp.index_axis_mut(Axis(0), n))
            .and(lpv.index_axis_mut(Axis(0), n))
            .and(&z)
            .and(&dp)
            .and(&plane.f)
            .par_for_each(|ld, lp, &zv, &d, &f| {
                *ld = d as f32;
                *lp = isentropic::layer_pv(zv + f, d) as f32;
            });
    }
    let (lu_spec, lv_spec) = if plane.rotation.is_some() {
        (variables::WIND_U_GRID, variables::WIND_V_GRID)
    } else {
        (variables::WIND_U_EARTH, variables::WIND_V_EARTH)
    };
    vec![
        seal.sealed(variables::LAYER_PV, Vertical::ThetaLayer, lpv),
        seal.sealed(variables::LAYER_DP, Vertical::ThetaLayer, ldp),
        seal.sealed(
            variables::wind(
                "layer_u",
                lu_spec,
                "layer-mean wind along the grid's x axis",
            ),
            Vertical::ThetaLayer,
            lu,
        ),
        seal.sealed(
            variables::wind(
                "layer_v",
                lv_spec,
                "layer-mean wind along the grid's y axis",
            ),
            Vertical::ThetaLayer,
            lv,
        ),
    ]
}
