//! The isentropic surfaces: pressure, temperature, height, Montgomery streamfunction,
//! winds, PV and humidity on each configured theta.
//!
//! In: theta on the isobaric levels and the stacks to carry onto the surfaces. Out: the
//! products on [`Vertical::Theta`], each packed as soon as it is made. The surfaces, the
//! interpolation in ln p and the formulas are [`isentropic`] (sources and closed-form
//! tests there).

use ndarray::{Array3, Axis};
use rayon::prelude::*;

use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::isentropic;
use crate::output::cf::{Product, Vertical};
use crate::output::variables;

use super::seal::Sealer;
use super::synoptic;
use super::winds::Winds;

/// Two wind components on the isobaric levels.
pub(super) type WindPair<'a> = (&'a Array3<f32>, &'a Array3<f32>);

/// What the isentropic products are made from.
pub(super) struct Sources<'a> {
    /// Theta (K) on the isobaric levels `p` (Pa, increasing).
    pub theta: &'a Array3<f32>,
    pub p: &'a [f64],
    /// The surfaces, K.
    pub targets: &'a [f64],
    /// Winds as the input gives them, and along the grid's axes.
    pub winds: Option<(WindPair<'a>, WindPair<'a>)>,
    pub z: Option<&'a Array3<f32>>,
    /// Relative humidity, %, when humidity on the surfaces is asked for.
    pub rh: Option<&'a Array3<f32>>,
    /// Whether the step has winds at all (PV is written only then).
    pub have_w: bool,
    /// The step, for the log.
    pub cycle: &'a str,
    pub lead: i64,
}

/// The isentropic products, in the order the file lists them.
pub(super) fn products(
    s: &Sources<'_>,
    plane: &Plane,
    winds: &Winds,
    seal: &Sealer<'_>,
) -> Vec<Product> {
    let mut surf = isentropic::surfaces(s.theta.view(), s.p, s.targets);
    for (k, g) in surf.gaps.iter().enumerate() {
        tracing::debug!(cycle = %s.cycle, step = s.lead, theta = s.targets[k], below = g.below, above = g.above, unstable = g.unstable, "isentropic surface gaps");
    }
    // Winds and PV first; each product is packed as soon as it is made.
    let (mut made, pv_prod) = winds_and_pv(s, &surf, plane, winds, seal);
    let z_s = s.z.map(|z| isentropic::on_surfaces(z.view(), &surf));
    let mut t_s = Array3::from_elem(surf.pressure.dim(), f32::NAN);
    ndarray::Zip::indexed(&mut t_s)
        .and(&surf.pressure)
        .par_for_each(|(k, _, _), t, &p| {
            *t = isentropic::temperature_on_surface(s.targets[k], f64::from(p)) as f32;
        });
    if let Some(rh) = s.rh {
        made.extend(synoptic::isentropic_humidity(rh, &surf, &t_s, seal));
    }
    let p_s = std::mem::take(&mut surf.pressure);
    drop(surf);
    made.push(seal.sealed(variables::ISEN_P, Vertical::Theta, p_s));
    if let Some(z_s) = z_s {
        let mut m = Array3::from_elem(z_s.dim(), f32::NAN);
        ndarray::Zip::from(&mut m)
            .and(&t_s)
            .and(&z_s)
            .par_for_each(|m, &t, &z| {
                *m = isentropic::montgomery(f64::from(t), f64::from(z)) as f32;
            });
        made.push(seal.sealed(variables::ISEN_Z, Vertical::Theta, z_s));
        made.push(seal.sealed(variables::ISEN_M, Vertical::Theta, m));
    }
    made.push(seal.sealed(variables::ISEN_T, Vertical::Theta, t_s));
    if s.have_w {
        made.extend(pv_prod);
    }
    made
}

/// The winds on the surfaces (as the input gives them), packed, and the PV on
/// them, packed, when the step has winds.
fn winds_and_pv(
    s: &Sources<'_>,
    surf: &isentropic::Surfaces,
    plane: &Plane,
    winds: &Winds,
    seal: &Sealer<'_>,
) -> (Vec<Product>, Option<Product>) {
    let Some(((u, v), (ug, vg))) = s.winds else {
        return (Vec::new(), None);
    };
    let ugs = isentropic::on_surfaces(ug.view(), surf);
    let vgs = isentropic::on_surfaces(vg.view(), surf);
    let mut pv_s = Array3::from_elem(ugs.dim(), f32::NAN);
    pv_s.axis_iter_mut(Axis(0))
        .into_par_iter()
        .enumerate()
        .for_each(|(k, mut out)| {
            let z = plane.vorticity(
                ugs.index_axis(Axis(0), k).mapv(f64::from).view(),
                vgs.index_axis(Axis(0), k).mapv(f64::from).view(),
            );
            let pv = isentropic::isentropic_pv(
                z.view(),
                plane.f.view(),
                surf.dtheta_dp.index_axis(Axis(0), k),
            );
            out.zip_mut_with(&pv, |o, &x| *o = x as f32);
        });
    // Winds as the input gives them: the same arrays when no turning was needed.
    let (us, vs) = if winds.turned.is_none() {
        (ugs, vgs)
    } else {
        (
            isentropic::on_surfaces(u.view(), surf),
            isentropic::on_surfaces(v.view(), surf),
        )
    };
    let wind = |name, spec| variables::wind(name, spec, "wind component on isentropic surfaces");
    let made = vec![
        seal.sealed(wind("isen_u", winds.u_spec), Vertical::Theta, us),
        seal.sealed(wind("isen_v", winds.v_spec), Vertical::Theta, vs),
    ];
    (
        made,
        Some(seal.sealed(variables::ISEN_PV, Vertical::Theta, pv_s)),
    )
}
