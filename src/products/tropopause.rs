//! The dynamic tropopause and its folds on each configured PV surface.
//!
//! In: the step's isobaric PV (PVU), theta, heights and winds on the product levels.
//! Out: per PV surface the pressure, theta, height and wind of the tropopause, and the
//! fold search's crossings, lowest crossing and fold depth. The column search itself is
//! [`tropopause::search`] (the method, its sources and closed-form tests are there).

use ndarray::{Array2, Array3};
use rayon::prelude::*;

use crate::diagnostics::tropopause;
use crate::output::cf::{Product, Vertical};
use crate::output::variables;

/// The columns the tropopause search reads: isobaric PV (PVU), theta, heights
/// and winds as the input gives them, on the product levels `p` (Pa).
pub(super) struct TropopauseColumns<'a> {
    pub pv: &'a Array3<f32>,
    pub theta: &'a Array3<f32>,
    pub z: Option<&'a Array3<f32>>,
    pub u: &'a Array3<f32>,
    pub v: &'a Array3<f32>,
    pub lat: &'a Array2<f64>,
    pub p: &'a [f64],
}

/// Outputs of the tropopause search per PV surface, in the order of
/// [`tropopause_products`]: p, theta, z, u, v, crossings, p of the lowest crossing, fold depth.
const TROP_OUTPUTS: usize = 8;

/// One column's tropopause outputs on one PV surface (NaN where nothing is found).
fn tropopause_column(
    c: &TropopauseColumns<'_>,
    (j, i): (usize, usize),
    lnp: &[f64],
    search: &tropopause::Search,
) -> [f32; TROP_OUTPUTS] {
    let col =
        |a: &Array3<f32>| -> Vec<f64> { (0..lnp.len()).map(|k| f64::from(a[(k, j, i)])).collect() };
    let (pv, theta) = (col(c.pv), col(c.theta));
    let mut o = [f32::NAN; TROP_OUTPUTS];
    let Some(found) = tropopause::search(&pv, &theta, lnp, c.lat[(j, i)], search) else {
        return o;
    };
    let x = found.top;
    o[0] = x.exp() as f32;
    o[1] = tropopause::theta_at_ln_p(&theta, lnp, x) as f32;
    if let Some(z) = c.z {
        o[2] = tropopause::at_ln_p(&col(z), lnp, x) as f32;
    }
    o[3] = tropopause::at_ln_p(&col(c.u), lnp, x) as f32;
    o[4] = tropopause::at_ln_p(&col(c.v), lnp, x) as f32;
    o[5] = found.crossings as f32;
    o[6] = found.lowest.exp() as f32;
    o[7] = found.fold_depth as f32;
    o
}

/// The dynamic tropopause on each configured PV surface: the lower of the PV surface
/// and the bound isentrope, with its pressure, theta, height and wind, and the fold
/// search's crossings, lowest crossing and fold depth (see [`tropopause::search`]).
pub(super) fn tropopause_products(
    c: &TropopauseColumns<'_>,
    cfg: &crate::config::Isentropic,
    (u_spec, v_spec): (variables::VarSpec, variables::VarSpec),
) -> Vec<Product> {
    let (_, ny, nx) = c.pv.dim();
    let np = cfg.tropopause_pvu.len();
    let lnp: Vec<f64> = c.p.iter().map(|p| p.ln()).collect();
    let mut out: Vec<Array3<f32>> = (0..TROP_OUTPUTS)
        .map(|_| Array3::from_elem((np, ny, nx), f32::NAN))
        .collect();
    for (s, &threshold) in cfg.tropopause_pvu.iter().enumerate() {
        let search = tropopause::Search {
            threshold,
            theta_bound: cfg.tropopause_theta_bound,
            fold_bottom: cfg.fold_bottom_hpa * 100.0,
            boundary_layer: tropopause::BOUNDARY_LAYER_PA,
        };
        // Rows in parallel; each row gives its own row of every output.
        let rows: Vec<Vec<[f32; TROP_OUTPUTS]>> = (0..ny)
            .into_par_iter()
            .map(|j| {
                (0..nx)
                    .map(|i| tropopause_column(c, (j, i), &lnp, &search))
                    .collect()
            })
            .collect();
        for (j, row) in rows.iter().enumerate() {
            for (i, o) in row.iter().enumerate() {
                for (q, a) in out.iter_mut().enumerate() {
                    a[(s, j, i)] = o[q];
                }
            }
        }
    }
    let bound = format!("{} K", cfg.tropopause_theta_bound);
    let bottom = format!("{} hPa", cfg.fold_bottom_hpa);
    let mut specs = vec![
        Some(variables::TROP_P),
        Some(variables::TROP_THETA),
        c.z.map(|_| variables::TROP_Z),
        Some(u_spec),
        Some(v_spec),
        Some(variables::TROP_CROSSINGS),
        Some(variables::TROP_P_LOW),
        Some(variables::TROP_FOLD_DP),
    ]
    .into_iter();
    out.into_iter()
        .filter_map(|data| {
            let spec = specs.next().flatten()?;
            let mut prod = Product::new(spec, Vertical::PvSurface, data);
            prod.notes.push(("leeward_theta_bound", bound.clone()));
            if matches!(spec.name, "trop_crossings" | "trop_p_low" | "trop_fold_dp") {
                prod.notes
                    .push(("leeward_fold_search_bottom", bottom.clone()));
            }
            Some(prod)
        })
        .collect()
}
