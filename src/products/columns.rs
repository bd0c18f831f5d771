//! The step's isobaric columns: each quantity stacked on the product levels, masked
//! below the ground.
//!
//! In: the decoded 2-D fields, keyed by [`Want`]. Out: [`Columns`], 3-D stacks (levels,
//! rows, columns; NaN where a level lacks the quantity or lies below the ground) with the
//! level pressures, and how the ground was found.

use ndarray::{Array2, Array3, Axis};

use crate::ingest::params::Quantity;

use super::inputs::{Decoded, Inventory};
use super::needs::{Needs, Want};

/// Isobaric stacks on the product levels.
pub(super) struct Columns {
    /// Level keys (Pa x 100), increasing.
    pub levels: Vec<i64>,
    /// Level pressures, Pa, increasing.
    pub p: Vec<f64>,
    /// (levels, rows, columns).
    pub shape: (usize, usize, usize),
    pub t: Option<Array3<f32>>,
    pub u: Option<Array3<f32>>,
    pub v: Option<Array3<f32>>,
    pub z: Option<Array3<f32>>,
    pub q: Option<Array3<f32>>,
    pub rh: Option<Array3<f32>>,
    /// How levels below the ground were found, in words (for the file's attributes).
    pub masking: String,
}

impl Columns {
    /// Stack what `dec` holds on the levels the products need; `dec` is used up.
    pub fn stack(
        mut dec: Decoded<Want>,
        needs: &Needs,
        inv: &Inventory,
        (ny, nx): (usize, usize),
    ) -> Self {
        // The isobaric levels of the products: every level with temperature or winds.
        let mut levels: Vec<i64> = Vec::new();
        if needs.need_t {
            levels.extend(&needs.t_levels);
        }
        if needs.thick {
            levels.extend(&needs.z_levels);
        }
        if needs.need_w {
            levels.extend(&needs.wind_levels);
        }
        levels.sort_unstable();
        levels.dedup();
        let p: Vec<f64> = levels.iter().map(|k| *k as f64 / 100.0).collect();
        let (below, masking) = below_ground(&mut dec, inv, &levels, &p);
        let nz = levels.len();
        // Stack each quantity on the product levels (NaN where a level lacks it), masked below ground.
        let mut stack = |q: Quantity| -> Option<Array3<f32>> {
            let mut out: Option<Array3<f32>> = None;
            for (k, lk) in levels.iter().enumerate() {
                if let Some(mut a) = dec.remove(&Want::Iso(q, *lk)) {
                    if let Some(m) = &below[k] {
                        ndarray::Zip::from(&mut a).and(m).for_each(|v, &b| {
                            if b {
                                *v = f32::NAN;
                            }
                        });
                    }
                    out.get_or_insert_with(|| Array3::from_elem((nz, ny, nx), f32::NAN))
                        .index_axis_mut(Axis(0), k)
                        .assign(&a);
                }
            }
            out
        };
        let moist = needs.thick || needs.moist;
        let t = if needs.need_t {
            stack(Quantity::Temperature)
        } else {
            None
        };
        let u = if needs.need_w {
            stack(Quantity::WindU)
        } else {
            None
        };
        let v = if needs.need_w {
            stack(Quantity::WindV)
        } else {
            None
        };
        let z = stack(Quantity::GeopotentialHeight);
        let q = if moist {
            stack(Quantity::SpecificHumidity)
        } else {
            None
        };
        let rh = if moist && q.is_none() {
            stack(Quantity::RelativeHumidity)
        } else {
            None
        };
        Columns {
            levels,
            p,
            shape: (nz, ny, nx),
            t,
            u,
            v,
            z,
            q,
            rh,
            masking,
        }
    }
}

/// Below-ground mask per level, from surface pressure or from orography and heights,
/// and how it was found.
fn below_ground(
    dec: &mut Decoded<Want>,
    inv: &Inventory,
    levels: &[i64],
    p: &[f64],
) -> (Vec<Option<Array2<bool>>>, String) {
    if let Some(ps) = dec.remove(&Want::SurfacePressure) {
        let below = p
            .iter()
            .map(|p| Some(ps.mapv(|s| s.is_finite() && f64::from(s) < *p)))
            .collect();
        let how = "levels with pressure greater than the surface pressure are missing";
        return (below, how.to_string());
    }
    let Some(oro) = dec.remove(&Want::Orography) else {
        let how = "none: no surface pressure or orography in the input";
        return (vec![None; levels.len()], how.to_string());
    };
    let scale = inv.orography.as_ref().map(|o| o.1).unwrap_or(1.0);
    let z_at: Vec<Option<&Array2<f32>>> = levels
        .iter()
        .map(|lk| dec.get(&Want::Iso(Quantity::GeopotentialHeight, *lk)))
        .collect();
    let how = if z_at.iter().any(Option::is_some) {
        "levels whose geopotential height is below the orography are missing"
    } else {
        "none: orography present but no isobaric geopotential height to compare"
    };
    (
        below_ground_by_heights(p, &z_at, &oro, scale),
        how.to_string(),
    )
}

/// Below-ground masks of the levels `p` (Pa, increasing) from orography `oro` (times
/// `scale` to metres) and the geopotential height `z_at` of the levels that have it: a
/// level is below the ground where its height is below the orography. A level without
/// heights takes its height linearly in ln p from the nearest levels above and below that
/// have them; below the lowest of those it is below the ground where that level is
/// (heights fall downward), and above the highest it is not masked.
fn below_ground_by_heights(
    p: &[f64],
    z_at: &[Option<&Array2<f32>>],
    oro: &Array2<f32>,
    scale: f64,
) -> Vec<Option<Array2<bool>>> {
    let lnp: Vec<f64> = p.iter().map(|v| v.ln()).collect();
    let have: Vec<usize> = (0..p.len()).filter(|&k| z_at[k].is_some()).collect();
    let under = |z: f64, o: f32| z.is_finite() && o.is_finite() && z < f64::from(o) * scale;
    (0..p.len())
        .map(|k| {
            if let Some(z) = z_at[k] {
                return Some(
                    ndarray::Zip::from(z)
                        .and(oro)
                        .map_collect(|&z, &o| under(f64::from(z), o)),
                );
            }
            let above = have.iter().rev().copied().find(|&a| a < k);
            let below = have.iter().copied().find(|&b| b > k);
            match (above, below) {
                (Some(a), Some(b)) => {
                    let w = (lnp[k] - lnp[b]) / (lnp[a] - lnp[b]);
                    let (za, zb) = (z_at[a]?, z_at[b]?);
                    Some(
                        ndarray::Zip::from(za)
                            .and(zb)
                            .and(oro)
                            .map_collect(|&za, &zb, &o| {
                                under(f64::from(zb) + w * f64::from(za - zb), o)
                            }),
                    )
                }
                (Some(a), None) => Some(
                    ndarray::Zip::from(z_at[a]?)
                        .and(oro)
                        .map_collect(|&z, &o| under(f64::from(z), o)),
                ),
                _ => None,
            }
        })
        .collect()
}
