//! Isobaric layer thickness: the height difference where both bounding levels have
//! heights, else the hypsometric equation with virtual temperature.
//!
//! In: the step's [`Columns`] (heights, temperature and humidity on the levels) and the
//! configured layers (pairs of hPa). Out: `thick` on [`Vertical::PressureLayer`] with
//! the method of each layer, and the layers made (Pa). The formulas are
//! [`thickness`] (sources and closed-form tests there).

use ndarray::{Array2, Array3, Axis};

use crate::diagnostics::thickness;
use crate::output::cf::{Product, Vertical};
use crate::output::variables;

use super::columns::Columns;

/// The thickness product (unpacked) and its layers (Pa), or None when no layer could
/// be made; each layer that could not is added to `missing`.
pub(super) fn product(
    c: &Columns,
    t: Option<&Array3<f32>>,
    layers_hpa: &[[f64; 2]],
    missing: &mut Vec<String>,
) -> (Option<Product>, Vec<[f64; 2]>) {
    let (_, ny, nx) = c.shape;
    let find = |hpa: f64| {
        c.levels
            .iter()
            .position(|&k| (k as f64 / 1e4 - hpa).abs() < 1e-6)
    };
    let has_z = |k: usize| {
        c.z.as_ref()
            .is_some_and(|z| z.index_axis(Axis(0), k).iter().any(|v| v.is_finite()))
    };
    let mut p_layers = Vec::new();
    let mut data = Vec::new();
    let mut methods = Vec::new();
    for l in layers_hpa {
        let (Some(kb), Some(kt)) = (find(l[0]), find(l[1])) else {
            missing.push(format!(
                "thickness {}-{} hPa: a bounding level is not in the input",
                l[0], l[1]
            ));
            continue;
        };
        let mut a = Array2::from_elem((ny, nx), f32::NAN);
        if has_z(kb) && has_z(kt) {
            if let Some(z) = &c.z {
                ndarray::Zip::indexed(&mut a).for_each(|(j, i), o| {
                    *o = z[(kt, j, i)] - z[(kb, j, i)];
                });
            }
            methods.push(format!(
                "{}-{} hPa: geopotential height difference",
                l[0], l[1]
            ));
        } else if let Some(t) = t {
            hypsometric(c, t, (kb, kt), &mut a);
            methods.push(format!(
                "{}-{} hPa: hypsometric equation, {}",
                l[0],
                l[1],
                humidity(c)
            ));
        } else {
            missing.push(format!(
                "thickness {}-{} hPa: no heights and no temperature",
                l[0], l[1]
            ));
            continue;
        }
        p_layers.push([l[0] * 100.0, l[1] * 100.0]);
        data.push(a);
    }
    if data.is_empty() {
        return (None, p_layers);
    }
    let mut th = Array3::from_elem((data.len(), ny, nx), f32::NAN);
    for (k, a) in data.into_iter().enumerate() {
        th.index_axis_mut(Axis(0), k).assign(&a);
    }
    let mut prod = Product::new(variables::THICK, Vertical::PressureLayer, th);
    prod.notes.push(("leeward_method", methods.join("; ")));
    (Some(prod), p_layers)
}

/// Whether temperature is needed for thickness: a layer asked for whose bounding levels
/// do not both have heights (`z_levels`, Pa x 100).
pub(super) fn needs_temperature(thick: bool, z_levels: &[i64], layers_hpa: &[[f64; 2]]) -> bool {
    let has_z_at = |hpa: f64| {
        z_levels
            .iter()
            .any(|&k| (k as f64 / 1e4 - hpa).abs() < 1e-6)
    };
    thick
        && layers_hpa
            .iter()
            .any(|l| !(has_z_at(l[0]) && has_z_at(l[1])))
}

/// Which humidity the virtual temperature comes from, in words.
fn humidity(c: &Columns) -> &'static str {
    if c.q.is_some() {
        "virtual temperature from specific humidity"
    } else if c.rh.is_some() {
        "virtual temperature from relative humidity"
    } else {
        "dry: no humidity in the input"
    }
}

/// The hypsometric thickness between levels `kb` and `kt` of every column, into `a`.
fn hypsometric(c: &Columns, t: &Array3<f32>, (kb, kt): (usize, usize), a: &mut Array2<f32>) {
    let (nz, p) = (c.shape.0, &c.p);
    ndarray::Zip::indexed(a).par_for_each(|(j, i), o| {
        let tv: Vec<f64> = (0..nz)
            .map(|k| {
                let tk = f64::from(t[(k, j, i)]);
                let q = match (&c.q, &c.rh) {
                    (Some(q), _) => f64::from(q[(k, j, i)]),
                    (None, Some(rh)) => {
                        thickness::specific_humidity_from_rh(f64::from(rh[(k, j, i)]), tk, p[k])
                    }
                    _ => 0.0,
                };
                thickness::virtual_temperature(tk, if q.is_finite() { q } else { 0.0 })
            })
            .collect();
        *o = thickness::hypsometric_thickness(&tv, p, p[kb], p[kt]) as f32;
    });
}
