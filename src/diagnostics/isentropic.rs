//! Isentropic analysis: columns interpolated from isobaric levels to surfaces
//! of constant potential temperature, Ertel PV on those surfaces, and the
//! column-depth form of PV for isentropic layers.
//!
//! In: theta on isobaric levels of increasing pressure (NaN where missing),
//! the level pressures, target surfaces. Out: where each surface lies in each
//! column (pressure, bracketing level and weight), fields interpolated there,
//! PV and layer quantities; NaN where a surface is below the lowest valid
//! level, above the top, or crosses the column in a statically unstable layer.
//! Pure functions: no I/O, no logging.

use std::sync::atomic::{AtomicUsize, Ordering};

use ndarray::{Array2, Array3, ArrayView2, ArrayView3, Axis, Zip};

use super::constants::{CP_DRY, G0, KAPPA, P0, PVU};

/// Why a surface is missing in a column, counted over a whole field.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Gaps {
    /// Columns where the surface lies below the lowest valid level (warmer than the ground, or below ground).
    pub below: usize,
    /// Columns where the surface lies above the top level.
    pub above: usize,
    /// Columns where the first crossing from the top is in a statically unstable or neutral layer.
    pub unstable: usize,
}

/// Where each isentropic surface lies in each column.
pub struct Surfaces {
    /// Target potential temperatures, K.
    pub theta: Vec<f64>,
    /// Index of the upper bracketing level (lower pressure); -1 where missing. Shape (surface, row, column).
    pub upper: Array3<i16>,
    /// Index of the lower bracketing level (higher pressure): the next level below the
    /// upper one that has theta, not always the adjacent one; -1 where missing.
    pub lower: Array3<i16>,
    /// Interpolation weight toward the upper level, in ln theta (0 at the lower level, 1 at the upper).
    pub weight: Array3<f32>,
    /// ln p of the isobaric levels (p in Pa, increasing).
    pub ln_p: Vec<f64>,
    /// Pressure of the surface, Pa (NaN where missing).
    pub pressure: Array3<f32>,
    /// d theta / d p at the surface, K Pa-1, from the pressures of the isentropes
    /// [`STABILITY_HALF_WIDTH`] either side of it (see [`stability_at`]).
    pub dtheta_dp: Array3<f32>,
    /// Missing columns by cause, one entry per surface.
    pub gaps: Vec<Gaps>,
}

/// Where a surface lies in one column: the bracketing pair of levels with theta and
/// the weight of the upper one.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bracket {
    /// The upper level (lower pressure).
    pub upper: usize,
    /// The lower level: the next level below `upper` that has theta.
    pub lower: usize,
    /// Weight of the upper level, in ln theta and equally in ln p (0 at the lower level, 1 at the upper).
    pub weight: f64,
}

impl Bracket {
    /// ln p of the surface, from ln p of the levels.
    pub fn ln_p(&self, lnp: &[f64]) -> f64 {
        lnp[self.lower] + self.weight * (lnp[self.upper] - lnp[self.lower])
    }
}

/// Locate surface `target` in one column `th` (levels of increasing pressure `lnp`),
/// searching from the top down for the first layer whose bounding levels
/// bracket it. Levels without theta (NaN: levels that carry only other quantities,
/// or below the ground) are stepped over: a layer is bounded by consecutive levels
/// that have theta. Returns the bracket or the cause of the gap.
///
/// Interpolation is linear in ln p with ln theta as the variable,
/// ln p = ln p_l + w (ln p_u - ln p_l), w = (ln theta* - ln theta_l) / (ln theta_u - ln theta_l),
/// exact for a polytropic layer (T proportional to p^c), in the spirit of
/// Ziv and Alpert 1994, J. Appl. Meteor. 33, 694-703 (from memory).
pub fn locate(th: &[f64], target: f64) -> Result<Bracket, GapKind> {
    let ln_th: Vec<f64> = th.iter().map(|t| t.ln()).collect();
    locate_ln(th, &ln_th, target, target.ln())
}

/// [`locate`] with the logarithms of the column (`ln_th`) and of the target
/// taken once by the caller: the same search, the same weight.
pub fn locate_ln(
    th: &[f64],
    ln_th: &[f64],
    target: f64,
    ln_target: f64,
) -> Result<Bracket, GapKind> {
    let ok = |k: usize| th[k].is_finite() && th[k] > 0.0;
    let mut valid = (0..th.len()).filter(|&k| ok(k));
    let Some(top) = valid.next() else {
        return Err(GapKind::Below);
    };
    let mut upper = top;
    for lower in valid {
        let (tu, tl) = (th[upper], th[lower]);
        let inside = (tl <= target && target <= tu) || (tu <= target && target <= tl);
        if inside {
            if tu <= tl {
                return Err(GapKind::Unstable);
            }
            let weight = (ln_target - ln_th[lower]) / (ln_th[upper] - ln_th[lower]);
            return Ok(Bracket {
                upper,
                lower,
                weight,
            });
        }
        upper = lower;
    }
    let bottom = upper;
    if target > th[top] {
        Err(GapKind::Above)
    } else if target < th[bottom] {
        Err(GapKind::Below)
    } else {
        // Within the column's range but never bracketed: a single valid level equal to it.
        Err(GapKind::Unstable)
    }
}

/// Cause of a missing surface in one column.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GapKind {
    /// Below the lowest valid level.
    Below = 0,
    /// Above the top.
    Above = 1,
    /// In a statically unstable or neutral layer.
    Unstable = 2,
}

/// Find every surface in every column of `theta` (levels, rows, columns) on levels `p` (Pa, increasing).
pub fn surfaces(theta: ArrayView3<f32>, p: &[f64], targets: &[f64]) -> Surfaces {
    let (nz, ny, nx) = theta.dim();
    let ns = targets.len();
    let mut upper = Array3::from_elem((ns, ny, nx), -1i16);
    let mut lower = Array3::from_elem((ns, ny, nx), -1i16);
    let mut weight = Array3::from_elem((ns, ny, nx), f32::NAN);
    let mut pressure = Array3::from_elem((ns, ny, nx), f32::NAN);
    let mut dthdp = Array3::from_elem((ns, ny, nx), f32::NAN);
    let mut gaps = vec![Gaps::default(); ns];
    let lnp: Vec<f64> = p.iter().map(|v| v.ln()).collect();
    if p.len() != nz || nz < 2 || nz > i16::MAX as usize {
        for g in &mut gaps {
            g.below = ny * nx;
        }
        return Surfaces {
            theta: targets.to_vec(),
            upper,
            lower,
            weight,
            ln_p: lnp,
            pressure,
            dtheta_dp: dthdp,
            gaps,
        };
    }
    let counts: Vec<[AtomicUsize; 3]> = (0..ns).map(|_| Default::default()).collect();
    let ln_targets: Vec<f64> = targets.iter().map(|t| t.ln()).collect();
    // Rows in parallel: each row owns its columns of every output.
    Zip::from(theta.axis_iter(Axis(1)))
        .and(upper.axis_iter_mut(Axis(1)))
        .and(lower.axis_iter_mut(Axis(1)))
        .and(weight.axis_iter_mut(Axis(1)))
        .and(pressure.axis_iter_mut(Axis(1)))
        .and(dthdp.axis_iter_mut(Axis(1)))
        .par_for_each(|th_row, mut up, mut lo, mut wt, mut pr, mut dd| {
            let mut col = vec![0.0; nz];
            let mut ln_col = vec![0.0; nz];
            for i in 0..nx {
                for k in 0..nz {
                    col[k] = f64::from(th_row[(k, i)]);
                    ln_col[k] = col[k].ln();
                }
                let column = Column {
                    theta: &col,
                    ln_theta: &ln_col,
                    ln_p: &lnp,
                };
                for (s, &target) in targets.iter().enumerate() {
                    match column.surface(target, ln_targets[s]) {
                        Ok((b, ps, d)) => {
                            up[(s, i)] = b.upper as i16;
                            lo[(s, i)] = b.lower as i16;
                            wt[(s, i)] = b.weight as f32;
                            pr[(s, i)] = ps as f32;
                            dd[(s, i)] = d as f32;
                        }
                        Err(kind) => {
                            counts[s][kind as usize].fetch_add(1, Ordering::Relaxed);
                        }
                    }
                }
            }
        });
    for (g, c) in gaps.iter_mut().zip(&counts) {
        g.below = c[GapKind::Below as usize].load(Ordering::Relaxed);
        g.above = c[GapKind::Above as usize].load(Ordering::Relaxed);
        g.unstable = c[GapKind::Unstable as usize].load(Ordering::Relaxed);
    }
    Surfaces {
        theta: targets.to_vec(),
        upper,
        lower,
        weight,
        ln_p: lnp,
        pressure,
        dtheta_dp: dthdp,
        gaps,
    }
}

/// One column of theta with its logarithm and ln p of its levels.
struct Column<'a> {
    theta: &'a [f64],
    ln_theta: &'a [f64],
    ln_p: &'a [f64],
}

impl Column<'_> {
    /// ln p of the isentrope `t` in this column, if it is found.
    fn ln_p_of(&self, t: f64) -> Option<f64> {
        locate_ln(self.theta, self.ln_theta, t, t.ln())
            .ok()
            .map(|b| b.ln_p(self.ln_p))
    }

    /// The surface `target`: its bracket, its pressure (Pa) and d theta/dp there (K Pa-1,
    /// see [`stability_at`]).
    fn surface(&self, target: f64, ln_target: f64) -> Result<(Bracket, f64, f64), GapKind> {
        let b = locate_ln(self.theta, self.ln_theta, target, ln_target)?;
        let (u, l) = (b.upper, b.lower);
        let ln_ps = b.ln_p(self.ln_p);
        let ps = ln_ps.exp();
        let layer = (self.ln_theta[u] - self.ln_theta[l]) / (self.ln_p[u] - self.ln_p[l]);
        let h = STABILITY_HALF_WIDTH;
        let at = stability_at(
            (target, ln_ps),
            (target + h, self.ln_p_of(target + h)),
            (target - h, self.ln_p_of(target - h)),
            layer,
        );
        // d theta/dp = (theta/p) d ln theta / d ln p.
        Ok((b, ps, target / ps * at))
    }
}

/// Half the potential temperature interval over which the stability of an isentropic
/// surface is taken, K (half the usual 5 K spacing of isentropic analyses; judgement).
pub const STABILITY_HALF_WIDTH: f64 = 2.5;

/// d ln theta / d ln p at a surface (theta*, ln p*), from the pressures of the isentropes
/// theta* + h above and theta* - h below it (`up`, `down`: theta and ln p, None where that
/// isentrope is not in the column): the secant (ln theta+ - ln theta-) / (ln p+ - ln p-),
/// dp/dtheta between neighbouring surfaces (as isentropic analyses difference them; Ziv and
/// Alpert 1994 on how interpolation errors reach PV; docs/references.md). Where one
/// neighbour is missing, the secant to the surface itself; where both are, or the secant is
/// not stable (>= 0), `layer`, the slope of the bracketing pair of levels.
///
/// The pressure of an isentrope is continuous in theta, so this stability is too, also
/// where a surface passes through an isobaric level; the bracketing layer's own slope,
/// constant between two levels, jumps there and makes PV jump along the isobar (a seam).
/// Exact for a polytropic column (ln p linear in ln theta).
pub fn stability_at(
    (theta, lnp): (f64, f64),
    up: (f64, Option<f64>),
    down: (f64, Option<f64>),
    layer: f64,
) -> f64 {
    let secant = |a: (f64, f64), b: (f64, f64)| (a.0.ln() - b.0.ln()) / (a.1 - b.1);
    let s = match (up.1, down.1) {
        (Some(pu), Some(pd)) => secant((up.0, pu), (down.0, pd)),
        (Some(pu), None) => secant((up.0, pu), (theta, lnp)),
        (None, Some(pd)) => secant((theta, lnp), (down.0, pd)),
        (None, None) => layer,
    };
    if s.is_finite() && s < 0.0 {
        s
    } else {
        layer
    }
}

/// A field on isobaric levels (levels, rows, columns) interpolated to the
/// surfaces, linearly in ln p between the nearest levels above and below the surface
/// where the field has values: with the surfaces' weights where those are its
/// bracketing levels (nearly always), otherwise from its pressure (a field may lack
/// levels that theta has, and have levels theta lacks); NaN where it has none on one
/// side.
pub fn on_surfaces(field: ArrayView3<f32>, s: &Surfaces) -> Array3<f32> {
    let mut out = Array3::from_elem(s.upper.dim(), f32::NAN);
    Zip::indexed(&mut out)
        .and(&s.upper)
        .and(&s.lower)
        .and(&s.weight)
        .and(&s.pressure)
        .par_for_each(|(_, j, i), o, &u, &l, &w, &ps| {
            *o = on_surface_at(field, &s.ln_p, (u, l, w, ps), (j, i));
        });
    out
}

/// Surface `k` of [`on_surfaces`] into `out` (rows, columns).
pub fn on_surface(field: ArrayView3<f32>, s: &Surfaces, k: usize, out: &mut Array2<f32>) {
    Zip::indexed(out)
        .and(s.upper.index_axis(Axis(0), k))
        .and(s.lower.index_axis(Axis(0), k))
        .and(s.weight.index_axis(Axis(0), k))
        .and(s.pressure.index_axis(Axis(0), k))
        .for_each(|(j, i), o, &u, &l, &w, &ps| {
            *o = on_surface_at(field, &s.ln_p, (u, l, w, ps), (j, i));
        });
}

/// [`on_surfaces`] at one point (row `j`, column `i`) of a surface, from where
/// the surface lies there: its bracketing levels, weight and pressure.
fn on_surface_at(
    field: ArrayView3<f32>,
    ln_p: &[f64],
    (u, l, w, ps): (i16, i16, f32, f32),
    (j, i): (usize, usize),
) -> f32 {
    if u < 0 || l < 0 {
        return f32::NAN;
    }
    let (u, l) = (u as usize, l as usize);
    let (fu, fl) = (f64::from(field[(u, j, i)]), f64::from(field[(l, j, i)]));
    let between = (u + 1..l).any(|k| field[(k, j, i)].is_finite());
    if fu.is_finite() && fl.is_finite() && !between {
        return (fl + f64::from(w) * (fu - fl)) as f32;
    }
    let x = f64::from(ps).ln();
    let nz = field.dim().0;
    let above = (0..nz)
        .rev()
        .find(|&k| ln_p[k] <= x && field[(k, j, i)].is_finite());
    let below = (0..nz).find(|&k| ln_p[k] >= x && field[(k, j, i)].is_finite());
    match (above, below) {
        (Some(a), Some(b)) if a == b => field[(a, j, i)],
        (Some(a), Some(b)) => {
            let t = (x - ln_p[b]) / (ln_p[a] - ln_p[b]);
            let (fa, fb) = (f64::from(field[(a, j, i)]), f64::from(field[(b, j, i)]));
            (fb + t * (fa - fb)) as f32
        }
        _ => f32::NAN,
    }
}

/// Temperature on an isentropic surface from its pressure: T = theta (p / p0)^kappa (Poisson's equation).
pub fn temperature_on_surface(theta: f64, p: f64) -> f64 {
    theta * (p / P0).powf(KAPPA)
}

/// Montgomery streamfunction M = cp T + g z, m2 s-2 (Montgomery 1937; common practice).
pub fn montgomery(t: f64, z: f64) -> f64 {
    CP_DRY * t + G0 * z
}

/// Ertel potential vorticity on an isentropic surface, in PVU:
/// P = -g (zeta_theta + f) d theta / dp (Hoskins, McIntyre and Robertson 1985; from memory).
pub fn isentropic_pv(
    zeta: ArrayView2<f64>,
    f: ArrayView2<f64>,
    dtheta_dp: ArrayView2<f32>,
) -> Array2<f64> {
    let mut out = Array2::zeros(zeta.dim());
    Zip::from(&mut out)
        .and(zeta)
        .and(f)
        .and(dtheta_dp)
        .for_each(|o, &z, &f, &d| {
            *o = -G0 * (z + f) * f64::from(d) / PVU;
        });
    out
}

/// Mass-weighted mean of a column profile between pressures `p_top` < `p_bottom`:
/// (1/dp) integral f dp, trapezoidal over the levels inside that have a value and the
/// two end values. Levels `p` increase downward; NaN if an end value is missing.
pub fn layer_mean(
    f: impl Fn(usize) -> f64,
    p: &[f64],
    p_top: f64,
    f_top: f64,
    p_bottom: f64,
    f_bottom: f64,
) -> f64 {
    if p_bottom.partial_cmp(&p_top) != Some(std::cmp::Ordering::Greater) {
        return f64::NAN;
    }
    let mut sum = 0.0;
    let (mut pp, mut fp) = (p_top, f_top);
    for (k, &pk) in p.iter().enumerate() {
        if pk > p_top && pk < p_bottom {
            let fk = f(k);
            if !fk.is_finite() {
                continue; // a level without this field: the trapezoid spans it
            }
            sum += 0.5 * (fp + fk) * (pk - pp);
            pp = pk;
            fp = fk;
        }
    }
    sum += 0.5 * (fp + f_bottom) * (p_bottom - pp);
    sum / (p_bottom - p_top)
}

/// Layer-mean wind components of the layer between two surfaces (indices `bottom`,
/// `top` into `s`), from isobaric `u`, `v` (levels, rows, columns) on levels `p`;
/// also the layer's pressure depth.
pub fn layer_mean_wind(
    u: ArrayView3<f32>,
    v: ArrayView3<f32>,
    p: &[f64],
    s: &Surfaces,
    bottom: usize,
    top: usize,
) -> (Array2<f64>, Array2<f64>, Array2<f64>) {
    let ub = on_surfaces(u, s);
    let vb = on_surfaces(v, s);
    layer_mean_wind_with(u, v, p, s, (&ub, &vb), bottom, top)
}

/// [`layer_mean_wind`] given the winds already on the bounding surfaces
/// (`on_surfaces` of `u` and `v`), so that layers sharing surfaces share them.
pub fn layer_mean_wind_with(
    u: ArrayView3<f32>,
    v: ArrayView3<f32>,
    p: &[f64],
    s: &Surfaces,
    (ub, vb): (&Array3<f32>, &Array3<f32>),
    bottom: usize,
    top: usize,
) -> (Array2<f64>, Array2<f64>, Array2<f64>) {
    let (_, ny, nx) = u.dim();
    let mut um = Array2::from_elem((ny, nx), f64::NAN);
    let mut vm = Array2::from_elem((ny, nx), f64::NAN);
    let mut dp = Array2::from_elem((ny, nx), f64::NAN);
    Zip::indexed(&mut um)
        .and(&mut vm)
        .and(&mut dp)
        .par_for_each(|(j, i), um, vm, dp| {
            let pb = f64::from(s.pressure[(bottom, j, i)]);
            let pt = f64::from(s.pressure[(top, j, i)]);
            if !(pb.is_finite() && pt.is_finite() && pb > pt) {
                return;
            }
            let fu = |k: usize| f64::from(u[(k, j, i)]);
            let fv = |k: usize| f64::from(v[(k, j, i)]);
            *um = layer_mean(
                fu,
                p,
                pt,
                f64::from(ub[(top, j, i)]),
                pb,
                f64::from(ub[(bottom, j, i)]),
            );
            *vm = layer_mean(
                fv,
                p,
                pt,
                f64::from(vb[(top, j, i)]),
                pb,
                f64::from(vb[(bottom, j, i)]),
            );
            *dp = pb - pt;
        });
    (um, vm, dp)
}

/// Potential vorticity of an isentropic layer in its column-depth form,
/// (zeta + f) / (p_bottom - p_top), Pa-1 s-1: conserved by a column between two
/// isentropes without heating or friction (any dynamics text; from memory).
pub fn layer_pv(eta: f64, dp: f64) -> f64 {
    eta / dp
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::constants::R_DRY;

    /// Constant-lapse-rate atmosphere (docs/references.md): T = T0 (p/p0)^c, c = R gamma / g.
    fn theta_of(p: f64) -> f64 {
        let c = R_DRY * 0.0065 / G0;
        288.15 * (p / 101_325.0).powf(c) * (P0 / p).powf(KAPPA)
    }

    fn p_of(theta: f64) -> f64 {
        // Inverse of theta_of: theta = A p^(c - kappa).
        let c = R_DRY * 0.0065 / G0;
        let a = 288.15 * 101_325f64.powf(-c) * P0.powf(KAPPA);
        (theta / a).powf(1.0 / (c - KAPPA))
    }

    #[test]
    fn surfaces_of_a_constant_lapse_rate_atmosphere_are_exact() {
        let p: Vec<f64> = [100.0, 200.0, 300.0, 500.0, 700.0, 850.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let th = Array3::from_shape_fn((p.len(), 1, 2), |(k, _, _)| theta_of(p[k]) as f32);
        let targets = [300.0, 320.0, 340.0];
        let s = surfaces(th.view(), &p, &targets);
        for (k, &t) in targets.iter().enumerate() {
            let got = f64::from(s.pressure[(k, 0, 1)]);
            assert!((got - p_of(t)).abs() < 30.0, "{t} K: {got} vs {}", p_of(t)); // 0.3 hPa: f32 theta
            let c = R_DRY * 0.0065 / G0;
            let exact = (c - KAPPA) * t / p_of(t);
            assert!(((f64::from(s.dtheta_dp[(k, 0, 1)]) - exact) / exact).abs() < 1e-3);
        }
    }

    #[test]
    fn stability_is_continuous_where_a_surface_passes_through_a_level() {
        // A column whose stability changes with height (a stable layer above 500 hPa, a
        // weakly stable one below): surfaces just above and just below the 500 hPa level's
        // theta lie in different layers. With the stability taken between the isentropes
        // 2.5 K either side, dtheta/dp on the two differs by what 0.004 K changes (under
        // 0.1%); with each layer's own slope it would jump by the ratio of the layers'
        // stabilities (here 2.3).
        let p: Vec<f64> = [200.0, 300.0, 400.0, 500.0, 600.0, 700.0, 850.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let th: [f64; 7] = [350.0, 335.0, 323.0, 313.0, 309.5, 306.5, 302.5];
        let col = Array3::from_shape_fn((p.len(), 1, 1), |(k, _, _)| th[k] as f32);
        let at = th[3] as f32 as f64;
        let s = surfaces(col.view(), &p, &[at - 0.002, at + 0.002]);
        let (below, above) = (
            f64::from(s.dtheta_dp[(0, 0, 0)]),
            f64::from(s.dtheta_dp[(1, 0, 0)]),
        );
        assert!(below < 0.0 && above < 0.0);
        assert!(
            (above / below - 1.0).abs() < 1e-3,
            "dtheta/dp {below:e} below the level, {above:e} above"
        );
        // The layers' own slopes differ by a factor of 2.3.
        let slope = |a: usize, b: usize| (th[a] / th[b]).ln() / (p[a] / p[b]).ln();
        assert!(slope(2, 3) / slope(3, 4) > 2.0);
        // stability_at: the secant between the neighbours, one-sided where one is missing,
        // the layer's slope where both are or the secant is not stable.
        let (t, lp) = (300.0f64, 50_000f64.ln());
        let lp_of = |th: f64| lp + (th / t).ln() / -0.1; // d ln theta / d ln p = -0.1
        let up = (302.5, Some(lp_of(302.5)));
        let down = (297.5, Some(lp_of(297.5)));
        assert!((stability_at((t, lp), up, down, -0.3) + 0.1).abs() < 1e-12);
        assert!((stability_at((t, lp), up, (297.5, None), -0.3) + 0.1).abs() < 1e-12);
        assert!((stability_at((t, lp), (302.5, None), down, -0.3) + 0.1).abs() < 1e-12);
        assert_eq!(
            stability_at((t, lp), (302.5, None), (297.5, None), -0.3),
            -0.3
        );
        let inverted = (302.5, Some(lp_of(297.5)));
        assert_eq!(stability_at((t, lp), inverted, down, -0.3), -0.3);
    }

    #[test]
    fn superadiabatic_bottom_and_out_of_range_surfaces_are_missing_and_counted() {
        // Top down: 330 (100 hPa), 310, 300, then 303 at the bottom: superadiabatic near the
        // ground. 301 K is found in the stable layer above, the first crossing from the top.
        let col = [330.0, 310.0, 300.0, 303.0];
        assert_eq!(locate(&col, 320.0).map(|b| b.upper), Ok(0));
        assert_eq!(locate(&col, 301.0).map(|b| b.upper), Ok(1));
        // An unstable layer met first from the top: missing.
        assert_eq!(
            locate(&[320.0, 325.0, 300.0], 322.0),
            Err(GapKind::Unstable)
        );
        assert_eq!(locate(&col, 350.0), Err(GapKind::Above));
        assert_eq!(locate(&col, 290.0), Err(GapKind::Below));
        // A level without theta (winds or heights only) between 330 and 300 K: stepped
        // over, the surface lies between the levels around it.
        let nan = [330.0, f64::NAN, 300.0, 290.0];
        let b = locate(&nan, 320.0).unwrap();
        assert_eq!((b.upper, b.lower), (0, 2));
        let w = (320f64.ln() - 300f64.ln()) / (330f64.ln() - 300f64.ln());
        assert!((b.weight - w).abs() < 1e-15);
        assert!(matches!(
            locate(&nan, 295.0),
            Ok(Bracket {
                upper: 2,
                lower: 3,
                ..
            })
        ));
    }

    #[test]
    fn fields_on_surfaces_where_levels_differ() {
        // theta on 200, 400 and 800 hPa only (500 hPa carries winds and heights only);
        // the 325 K surface lies between 400 and 800 hPa, at 447 hPa. A field linear in
        // ln p with values on every level, or lacking 800 hPa, is interpolated between its
        // nearest levels around the surface, 400 and 500 hPa: exact either way.
        let p = [20_000.0, 40_000.0, 50_000.0, 80_000.0];
        let th = [350.0, 330.0, f32::NAN, 300.0];
        let theta = Array3::from_shape_fn((4, 1, 1), |(k, _, _)| th[k]);
        let s = surfaces(theta.view(), &p, &[325.0]);
        assert_eq!((s.upper[(0, 0, 0)], s.lower[(0, 0, 0)]), (1, 3));
        let ps = f64::from(s.pressure[(0, 0, 0)]);
        assert!((ps - 44_690.0).abs() < 100.0, "{ps}");
        let lin = |x: f64| 3.0 * x.ln() - 20.0;
        let full = Array3::from_shape_fn((4, 1, 1), |(k, _, _)| lin(p[k]) as f32);
        let mut part = full.clone();
        part[(3, 0, 0)] = f32::NAN;
        for f in [&full, &part] {
            let got = f64::from(on_surfaces(f.view(), &s)[(0, 0, 0)]);
            assert!((got - lin(ps)).abs() < 1e-4, "{got} vs {}", lin(ps));
        }
        // A field that also has 500 hPa, between the bracketing levels: interpolated
        // between its own nearest levels around the surface (exact again).
        let quad = |x: f64| (x.ln() - 10.0).powi(2);
        let q = Array3::from_shape_fn((4, 1, 1), |(k, _, _)| quad(p[k]) as f32);
        let got = f64::from(on_surfaces(q.view(), &s)[(0, 0, 0)]);
        let (a, b) = (1, 2);
        let t = (ps.ln() - p[b].ln()) / (p[a].ln() - p[b].ln());
        let want = quad(p[b]) + t * (quad(p[a]) - quad(p[b]));
        assert!((got - want).abs() < 1e-4 * want.abs(), "{got} vs {want}");
        // Nothing below the surface: missing.
        let mut none_below = full.clone();
        none_below[(2, 0, 0)] = f32::NAN;
        none_below[(3, 0, 0)] = f32::NAN;
        assert!(on_surfaces(none_below.view(), &s)[(0, 0, 0)].is_nan());
        assert_eq!(s.gaps[0], Gaps::default());
    }

    #[test]
    fn layer_mean_steps_over_levels_without_the_field() {
        // f = p on 400 and 600 hPa, missing at 500 hPa: the trapezoid from 300 to 700 hPa
        // across the gap is still exact for a linear profile.
        let p = [200.0, 400.0, 500.0, 600.0, 800.0];
        let f = [200.0, 400.0, f64::NAN, 600.0, 800.0];
        let m = layer_mean(|k| f[k], &p, 300.0, 300.0, 700.0, 700.0);
        assert!((m - 500.0).abs() < 1e-12, "{m}");
    }

    #[test]
    fn layer_mean_of_a_linear_profile() {
        // Closed form: the mass-weighted mean of f = p over [pt, pb] is (pt + pb) / 2.
        let p = [200.0, 400.0, 600.0, 800.0];
        let m = layer_mean(|k| p[k], &p, 300.0, 300.0, 700.0, 700.0);
        assert!((m - 500.0).abs() < 1e-12);
        assert!(layer_mean(|k| p[k], &p, 700.0, 1.0, 300.0, 1.0).is_nan());
    }

    #[test]
    fn pv_sign_and_magnitude() {
        // Hand check: eta = 1e-4, dtheta/dp = -1e-3 K/Pa (10 K per 100 hPa... per 10 hPa) gives
        // P = 9.80665 * 1e-4 * 1e-3 = 9.8e-7 = 0.98 PVU.
        let z = Array2::from_elem((1, 1), 0.0);
        let f = Array2::from_elem((1, 1), 1e-4);
        let d = Array2::from_elem((1, 1), -1e-3f32);
        let pv = isentropic_pv(z.view(), f.view(), d.view());
        assert!((pv[(0, 0)] - 0.980665).abs() < 1e-6);
        let f = Array2::from_elem((1, 1), -1e-4);
        assert!(
            isentropic_pv(z.view(), f.view(), d.view())[(0, 0)] < 0.0,
            "negative in the south"
        );
    }
}
