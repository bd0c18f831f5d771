//! The fields a forecaster weighs round a cyclone, made within a step: mean
//! sea-level pressure and the terrain, the steering wind, the Eady growth rate
//! of a layer, equivalent potential temperature, humidity on isentropic
//! surfaces and the low-level PV mean.
//!
//! In: the step's stacked isobaric fields (levels, rows, columns; NaN where
//! missing or below ground) and its 2-D inputs. Out: [`Product`]s, each with
//! the layer it stands for in its attributes. The formulas are the pure
//! functions of [`crate::diagnostics`]; this module only walks the grid.

use std::borrow::Cow;

use ndarray::{Array2, Array3, ArrayView2, Axis, Zip};
use rayon::prelude::*;

use crate::diagnostics::{baroclinic, isentropic, moisture, sea_level, thickness};
use crate::output::cf::{Product, Vertical};
use crate::output::variables;

use super::seal::Sealer;

/// The step's isobaric stacks the fields are made from.
pub(super) struct Stacks<'a> {
    /// Level pressures, Pa, increasing.
    pub p: &'a [f64],
    /// Temperature, K.
    pub t: Option<&'a Array3<f32>>,
    /// Winds along the grid's axes, m s-1.
    pub u: Option<&'a Array3<f32>>,
    pub v: Option<&'a Array3<f32>>,
    /// Geopotential height, m.
    pub z: Option<&'a Array3<f32>>,
    /// Potential temperature, K.
    pub theta: Option<&'a Array3<f32>>,
    /// Relative humidity over water, % (from the input, or from its specific humidity).
    pub rh: Option<&'a Array3<f32>>,
    /// Coriolis parameter, s-1.
    pub f: &'a Array2<f64>,
    /// Angle from east to the grid's x axis, radians (None: the axes are east and north).
    pub rotation: Option<&'a Array2<f64>>,
}

/// "850-500" for a layer [bottom, top] in hPa.
fn layer_text(l: [f64; 2]) -> String {
    format!("{}-{}", l[0], l[1])
}

fn level_index(p: &[f64], hpa: f64) -> Option<usize> {
    p.iter().position(|x| (x / 100.0 - hpa).abs() < 1e-6)
}

/// The product of the layer `l` (hPa): on the layer's pressure coordinate in
/// the file (its middle, the layer's ends as its bounds), the layer also said
/// in `leeward_layer_hpa`; a mean over the layer says so in `cell_methods`
/// (a mean over a pressure cell weighs by mass, dm = dp/g: CF 1.11 section 7.3).
fn with_layer(mut prod: Product, l: [f64; 2], mean: bool) -> Product {
    let pa = [l[0] * 100.0, l[1] * 100.0];
    prod.notes.push(("leeward_layer_hpa", layer_text(l)));
    if mean {
        let coord = crate::output::cf::layer_coordinate(pa);
        prod.notes.push(("cell_methods", format!("{coord}: mean")));
    }
    prod.layer = Some(pa);
    prod
}

/// Relative humidity over water on the levels, %: the input's own (borrowed,
/// not copied), or from its specific humidity, temperature and pressure
/// (100 e / e_s(T)).
pub(super) fn relative_humidity<'a>(
    q: Option<&Array3<f32>>,
    rh: Option<&'a Array3<f32>>,
    t: Option<&Array3<f32>>,
    p: &[f64],
) -> Option<Cow<'a, Array3<f32>>> {
    if let Some(rh) = rh {
        return Some(Cow::Borrowed(rh));
    }
    let (q, t) = (q?, t?);
    let mut out = Array3::from_elem(q.dim(), f32::NAN);
    Zip::indexed(&mut out)
        .and(q)
        .and(t)
        .par_for_each(|(k, _, _), o, &q, &tk| {
            *o = moisture::relative_humidity(f64::from(q), f64::from(tk), p[k]) as f32;
        });
    Some(Cow::Owned(out))
}

/// The Eady growth rate of its layer and the steering wind, into `surface`, as the
/// products ask (`both`: the step has temperature and winds); a layer the levels do not
/// cover is said in `missing`.
pub(super) fn eady_and_steering(
    s: &Stacks<'_>,
    cfg: &crate::config::Config,
    both: bool,
    surface: &mut Vec<Product>,
    missing: &mut Vec<String>,
) {
    if cfg.products.eady && both {
        match eady(s, cfg.cyclones.eady_layer_hpa) {
            Ok(p) => surface.push(p),
            Err(m) => missing.push(m),
        }
    }
    if cfg.products.cyclones {
        surface.extend(
            steering(s, cfg.cyclones.steering_layer_hpa)
                .into_iter()
                .flatten(),
        );
    }
}

/// Equivalent potential temperature (Bolton 1980) on the levels at and below
/// `top_hpa` (0: every level); missing above it, where the air holds so little
/// vapour that theta-e is theta (docs/output.md). Made and packed level by level.
pub(super) fn theta_e(s: &Stacks<'_>, top_hpa: f64, seal: &Sealer<'_>) -> Option<Product> {
    let (t, rh) = (s.t?, s.rh?);
    let spec = [variables::THETA_E];
    let made = seal.made(spec, Vertical::Pressure, t.dim(), |k, [out]| {
        if s.p[k] >= top_hpa * 100.0 {
            let (t, rh) = (t.index_axis(Axis(0), k), rh.index_axis(Axis(0), k));
            theta_e_level(t, rh, moisture::IsobaricLevel::new(s.p[k]), out);
        }
    });
    let mut prod = made.into_iter().next()?;
    prod.numbers.push(("leeward_top_hpa", top_hpa));
    Some(prod)
}

/// A row's values as one slice: borrowed when they lie in order, else copied.
fn slice<'a>(a: ndarray::ArrayView1<'a, f32>) -> Cow<'a, [f32]> {
    match a.to_slice() {
        Some(v) => Cow::Borrowed(v),
        None => Cow::Owned(a.to_vec()),
    }
}

/// theta_e of one level, row by row.
fn theta_e_level(
    t: ArrayView2<'_, f32>,
    rh: ArrayView2<'_, f32>,
    level: moisture::IsobaricLevel,
    out: &mut Array2<f32>,
) {
    let nx = out.ncols().max(1);
    // A level of `Sealer::made` is in standard layout: its rows lie one after another.
    let Some(out) = out.as_slice_mut() else {
        return;
    };
    for ((t, rh), o) in t.rows().into_iter().zip(rh.rows()).zip(out.chunks_mut(nx)) {
        moisture::theta_e_from_rh_row(&slice(t), &slice(rh), level, o);
    }
}

/// The Eady growth rate of the layer `l` (hPa), when both its levels are there.
pub(super) fn eady(s: &Stacks<'_>, l: [f64; 2]) -> Result<Product, String> {
    let missing = |what: &str| format!("eady {}: {what}", layer_text(l));
    let (kb, kt) = match (level_index(s.p, l[0]), level_index(s.p, l[1])) {
        (Some(b), Some(t)) => (b, t),
        _ => return Err(missing("a bounding level is not in the input")),
    };
    let (u, v, th) = match (s.u, s.v, s.theta) {
        (Some(u), Some(v), Some(th)) => (u, v, th),
        _ => return Err(missing("no winds or temperature")),
    };
    let dz = layer_depth(s, kb, kt).ok_or_else(|| missing("no heights and no temperature"))?;
    let mut out = Array2::from_elem(dz.dim(), f32::NAN);
    Zip::indexed(&mut out)
        .and(&dz)
        .and(s.f)
        .par_for_each(|(j, i), o, &dz, &f| {
            let d = |a: &Array3<f32>| f64::from(a[(kt, j, i)]) - f64::from(a[(kb, j, i)]);
            *o = baroclinic::eady_growth_rate(
                f,
                d(u),
                d(v),
                dz,
                f64::from(th[(kb, j, i)]),
                f64::from(th[(kt, j, i)]),
            ) as f32;
        });
    let data = out.insert_axis(Axis(0));
    Ok(with_layer(
        Product::new(variables::EADY, Vertical::Surface, data),
        l,
        false,
    ))
}

/// Depth of the layer between levels `kb` (bottom) and `kt` (top), m: the
/// heights' difference, or the dry hypsometric thickness without heights.
fn layer_depth(s: &Stacks<'_>, kb: usize, kt: usize) -> Option<Array2<f64>> {
    if let Some(z) = s.z {
        let d =
            &z.index_axis(Axis(0), kt).mapv(f64::from) - &z.index_axis(Axis(0), kb).mapv(f64::from);
        if d.iter().any(|x| x.is_finite()) {
            return Some(d);
        }
    }
    let t = s.t?;
    let (_, ny, nx) = t.dim();
    let mut out = Array2::from_elem((ny, nx), f64::NAN);
    Zip::indexed(&mut out).par_for_each(|(j, i), o| {
        let col: Vec<f64> = (0..s.p.len()).map(|k| f64::from(t[(k, j, i)])).collect();
        *o = thickness::hypsometric_thickness(&col, s.p, s.p[kb], s.p[kt]);
    });
    Some(out)
}

/// The levels of `p` (Pa, increasing) a mean over the layer from `p_bottom` up
/// to `p_top` reads: from the last level above the top to the first below the
/// bottom, so that every pair of levels that brackets a bound is among them and
/// [`baroclinic::pressure_weighted_mean`] gives on them what it gives on the
/// whole column.
fn layer_levels(p: &[f64], p_bottom: f64, p_top: f64) -> std::ops::Range<usize> {
    let lo = p.iter().rposition(|&x| x < p_top).unwrap_or(0);
    let hi = p
        .iter()
        .position(|&x| x > p_bottom)
        .map_or(p.len(), |k| k + 1);
    lo..hi.max(lo)
}

/// Pressure-weighted mean of `a` over the layer `l` (hPa) in every column: the
/// rows on every core, each column read on the layer's levels only, through the
/// layer's [`baroclinic::LayerPlan`] where every level is valid.
fn layer_mean(a: &Array3<f32>, p: &[f64], l: [f64; 2]) -> Array2<f32> {
    let (p_bottom, p_top) = (l[0] * 100.0, l[1] * 100.0);
    let ks = layer_levels(p, p_bottom, p_top);
    let ps = &p[ks.clone()];
    let (_, ny, nx) = a.dim();
    let plan = baroclinic::LayerPlan::new(ps, p_bottom, p_top);
    let mut out = Array2::from_elem((ny, nx), f32::NAN);
    out.axis_iter_mut(Axis(0))
        .into_par_iter()
        .enumerate()
        .for_each(|(j, mut row)| {
            let mut col = vec![f64::NAN; ps.len()];
            for (i, o) in row.iter_mut().enumerate() {
                for (c, k) in col.iter_mut().zip(ks.clone()) {
                    *c = f64::from(a[(k, j, i)]);
                }
                *o = match &plan {
                    Some(plan) if col.iter().all(|c| c.is_finite()) => plan.mean(&col),
                    _ => baroclinic::pressure_weighted_mean(&col, ps, p_bottom, p_top),
                } as f32;
            }
        });
    out
}

/// The low-level PV mean of the layer `l` (hPa) from isobaric PV.
pub(super) fn low_pv(pv: &Array3<f32>, p: &[f64], l: [f64; 2]) -> Product {
    let data = layer_mean(pv, p, l).insert_axis(Axis(0));
    with_layer(
        Product::new(variables::LOW_PV, Vertical::Surface, data),
        l,
        true,
    )
}

/// The steering wind, earth-relative, of the layer `l` (hPa).
pub(super) fn steering(s: &Stacks<'_>, l: [f64; 2]) -> Option<[Product; 2]> {
    let (u, v) = (s.u?, s.v?);
    let (mut ue, mut ve) = (layer_mean(u, s.p, l), layer_mean(v, s.p, l));
    if let Some(alpha) = s.rotation {
        // Grid axes back to east and north: the inverse of the rotation of axes
        // (see `vorticity::earth_to_grid`).
        Zip::from(&mut ue)
            .and(&mut ve)
            .and(alpha)
            .par_for_each(|u, v, &a| {
                let (sn, c) = a.sin_cos();
                let (ug, vg) = (f64::from(*u), f64::from(*v));
                *u = (ug * c - vg * sn) as f32;
                *v = (ug * sn + vg * c) as f32;
            });
    }
    let mk = |spec, a: Array2<f32>| {
        with_layer(
            Product::new(spec, Vertical::Surface, a.insert_axis(Axis(0))),
            l,
            true,
        )
    };
    Some([mk(variables::STEER_U, ue), mk(variables::STEER_V, ve)])
}

/// Mean sea-level pressure: the input's, or reduced from the 1000 hPa height
/// and temperature (as decoded, not masked below ground).
pub(super) fn mslp(
    input: Option<Array2<f32>>,
    z1000: Option<&Array2<f32>>,
    t1000: Option<&Array2<f32>>,
) -> Option<Product> {
    let (data, method) = match (input, z1000, t1000) {
        (Some(m), _, _) => (
            m,
            "from the input: pressure reduced to mean sea level (WMO 0/3/1)",
        ),
        (None, Some(z), Some(t)) => {
            let mut m = Array2::from_elem(z.dim(), f32::NAN);
            Zip::from(&mut m).and(z).and(t).par_for_each(|m, &z, &t| {
                *m = sea_level::sea_level_pressure(f64::from(z), f64::from(t)) as f32;
            });
            (m, "reduced from the 1000 hPa height and temperature: the input has no mean sea-level pressure")
        }
        (None, Some(z), None) => {
            let mut m = Array2::from_elem(z.dim(), f32::NAN);
            Zip::from(&mut m).and(z).par_for_each(|m, &z| {
                *m = sea_level::sea_level_pressure(f64::from(z), STANDARD_T1000) as f32;
            });
            (m, "reduced from the 1000 hPa height with 288.15 K: the input has no mean sea-level pressure and no 1000 hPa temperature")
        }
        _ => return None,
    };
    let mut prod = Product::new(
        variables::MSLP,
        Vertical::Surface,
        data.insert_axis(Axis(0)),
    );
    prod.notes.push(("leeward_method", method.to_string()));
    Some(prod)
}

/// Temperature of the US Standard Atmosphere 1976 at sea level, K (docs/references.md).
const STANDARD_T1000: f64 = 288.15;

/// The terrain as a product, metres.
pub(super) fn orography(oro: &Array2<f32>, scale: f64) -> Product {
    let data = oro
        .mapv(|x| (f64::from(x) * scale) as f32)
        .insert_axis(Axis(0));
    Product::new(variables::OROG, Vertical::Surface, data)
}

/// Specific and relative humidity on the isentropic surfaces `surf`, from the
/// isobaric relative humidity `rh` interpolated there ([`isentropic::on_surface`];
/// bounded as the input is, where a linear interpolation of specific humidity
/// would exceed saturation between levels) and the surfaces' pressure and
/// temperature `t_s`: q = epsilon e / (p - (1 - epsilon) e), e = RH e_s(T).
/// Made and packed surface by surface.
pub(super) fn isentropic_humidity(
    rh: &Array3<f32>,
    surf: &isentropic::Surfaces,
    t_s: &Array3<f32>,
    seal: &Sealer<'_>,
) -> Vec<Product> {
    let specs = [variables::ISEN_Q, variables::ISEN_RH];
    seal.made(specs, Vertical::Theta, t_s.dim(), |k, [q, rh_k]| {
        isentropic::on_surface(rh.view(), surf, k, rh_k);
        Zip::from(q)
            .and(&*rh_k)
            .and(surf.pressure.index_axis(Axis(0), k))
            .and(t_s.index_axis(Axis(0), k))
            .for_each(|q, &r, &p, &t| {
                let e = moisture::vapour_pressure_from_rh(f64::from(r), f64::from(t));
                *q = moisture::specific_humidity(e, f64::from(p)) as f32;
            });
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::output::cf::Values;

    /// Levels 1000 to 100 hPa every 50 hPa, Pa, increasing.
    fn levels() -> Vec<f64> {
        (2..=20).map(|k| f64::from(k) * 5_000.0).collect()
    }

    /// A stack whose columns differ: f = a + b p with a, b from the column, and
    /// levels below ground (NaN) from the bottom up in every third column.
    fn stack(p: &[f64], ny: usize, nx: usize) -> Array3<f32> {
        Array3::from_shape_fn((p.len(), ny, nx), |(k, j, i)| {
            let (a, b) = (j as f64 * 3.0 - 7.0, 1e-4 * (i as f64 + 1.0));
            let below = (i % 3 == 0) && p[k] > 100_000.0 - 2_500.0 * (j as f64);
            if below {
                f32::NAN
            } else {
                (a + b * p[k]) as f32
            }
        })
    }

    #[test]
    fn theta_e_is_made_up_to_its_top_level_and_missing_above() {
        // Levels 1000 to 100 hPa, top 300 hPa: the levels above 300 hPa are missing, the
        // rest is Bolton's theta_e of each point (moisture::theta_e_from_rh); top 0 makes
        // every level.
        let p = levels();
        let (ny, nx) = (3, 5);
        let t = Array3::from_shape_fn((p.len(), ny, nx), |(k, j, i)| {
            (210.0 + 80.0 * p[k] / 1e5 + j as f64 + 0.5 * i as f64) as f32
        });
        let rh = Array3::from_shape_fn(t.dim(), |(k, j, i)| ((k * 7 + j * 5 + i * 3) % 101) as f32);
        let f = Array2::from_elem((ny, nx), 1e-4);
        let s = Stacks {
            p: &p,
            t: Some(&t),
            u: None,
            v: None,
            z: None,
            theta: None,
            rh: Some(&rh),
            f: &f,
            rotation: None,
        };
        // Made whole (deflate off) and made and packed level by level (deflate on: the
        // values bit-rounded as the file keeps them).
        for (top, deflate) in [(300.0, 0), (0.0, 0), (300.0, 1), (0.0, 1)] {
            let output = crate::config::settings::Output {
                deflate_level: deflate,
                ..Default::default()
            };
            let seal = Sealer::new(&output);
            let prod = theta_e(&s, top, &seal).unwrap();
            let (out, bits) = match &prod.values {
                Values::Plain(out) => (out.clone(), 23),
                Values::Packed(p) => (p.unpack(), seal.kept.bits("theta_e")),
            };
            assert_eq!(deflate == 0, bits == 23, "plain only with deflate off");
            for ((k, j, i), &o) in out.indexed_iter() {
                if p[k] < top * 100.0 {
                    assert!(o.is_nan(), "{} hPa above the top {top}: {o}", p[k] / 100.0);
                } else {
                    let level = moisture::IsobaricLevel::new(p[k]);
                    let want = moisture::theta_e_from_rh(
                        f64::from(t[(k, j, i)]),
                        f64::from(rh[(k, j, i)]),
                        level,
                    ) as f32;
                    let want = crate::output::pack::bit_round(want, bits);
                    assert_eq!(
                        o.to_bits(),
                        want.to_bits(),
                        "{} hPa ({j}, {i})",
                        p[k] / 100.0
                    );
                }
            }
            assert!(prod.numbers.contains(&("leeward_top_hpa", top)));
        }
    }

    #[test]
    fn a_layer_mean_reads_its_levels_only_and_gives_the_whole_column_result() {
        // The same function on the whole column and on the layer's levels: the same bits.
        let p = levels();
        let a = stack(&p, 9, 7);
        for l in [
            [900.0, 700.0],
            [850.0, 500.0],
            [925.0, 675.0],
            [1000.0, 100.0],
            [1050.0, 80.0],
        ] {
            let got = layer_mean(&a, &p, l);
            for ((j, i), g) in got.indexed_iter() {
                let col: Vec<f64> = (0..p.len()).map(|k| f64::from(a[(k, j, i)])).collect();
                let want =
                    baroclinic::pressure_weighted_mean(&col, &p, l[0] * 100.0, l[1] * 100.0) as f32;
                assert_eq!(
                    g.to_bits(),
                    want.to_bits(),
                    "{l:?} ({j}, {i}): {g} vs {want}"
                );
            }
        }
    }

    #[test]
    fn the_mean_of_a_linear_profile_is_its_value_at_the_middle() {
        // Closed form: f = a + b p has the pressure-weighted mean a + b (p_b + p_t) / 2
        // over [p_t, p_b] (trapezoids are exact for a linear integrand; both bounds on levels).
        let p = levels();
        let a = stack(&p, 3, 4);
        let got = layer_mean(&a, &p, [900.0, 700.0]);
        for ((j, i), g) in got.indexed_iter() {
            let want = (j as f64 * 3.0 - 7.0) + 1e-4 * (i as f64 + 1.0) * 80_000.0;
            assert!(
                (f64::from(*g) - want).abs() < 1e-5 * want.abs().max(1.0),
                "{g} vs {want}"
            );
        }
    }

    #[test]
    fn the_levels_of_a_layer() {
        let p = levels();
        let at = |hpa: f64| {
            p.iter()
                .position(|x| (x - hpa * 100.0).abs() < 1e-6)
                .unwrap()
        };
        // Bounds on levels: one level more on each side.
        assert_eq!(
            layer_levels(&p, 90_000.0, 70_000.0),
            at(650.0)..at(950.0) + 1
        );
        // Bounds between levels: the levels that bracket them.
        assert_eq!(
            layer_levels(&p, 92_500.0, 67_500.0),
            at(650.0)..at(950.0) + 1
        );
        // A layer beyond the column: the whole column.
        assert_eq!(layer_levels(&p, 105_000.0, 8_000.0), 0..p.len());
    }
}
