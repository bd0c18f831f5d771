//! Baroclinicity: the Eady growth rate of an isobaric layer, and the
//! pressure-weighted mean of a column over a layer.
//!
//! In: per column, the wind, height and potential temperature at the layer's
//! bottom and top (or a profile on levels). Out: the growth rate in s-1, or
//! the layer mean. NaN where an input is missing or the layer is statically
//! unstable. Pure functions: no I/O, no logging.

use super::constants::G0;

/// The factor of the maximum Eady growth rate, 0.31 (Lindzen and Farrell 1980,
/// J. Atmos. Sci. 37, 1648-1654; from memory).
pub const EADY_FACTOR: f64 = 0.31;

/// Maximum Eady growth rate of a layer, s-1:
///
/// sigma = 0.31 |f| |dV/dz| / N
///
/// (Lindzen and Farrell 1980; used as a measure of baroclinicity by Hoskins and
/// Valdes 1990, J. Atmos. Sci. 47, 1854-1864; from memory), with the layer's
/// shear dV/dz = (V_top - V_bottom) / (z_top - z_bottom) from the wind vector
/// difference (`du`, `dv`, m s-1) over the depth `dz` (m), and its
/// Brunt-Vaisala frequency N^2 = g ln(theta_top / theta_bottom) / dz, the
/// layer-mean of (g / theta) dtheta/dz, exact for a constant N. |f| keeps the
/// rate positive in both hemispheres. NaN where dz <= 0 or N^2 <= 0.
pub fn eady_growth_rate(
    f: f64,
    du: f64,
    dv: f64,
    dz: f64,
    theta_bottom: f64,
    theta_top: f64,
) -> f64 {
    if !(dz > 0.0 && theta_bottom > 0.0 && theta_top > 0.0) {
        return f64::NAN;
    }
    let n2 = G0 * (theta_top / theta_bottom).ln() / dz;
    if n2.is_nan() || n2 <= 0.0 {
        return f64::NAN;
    }
    EADY_FACTOR * f.abs() * du.hypot(dv) / dz / n2.sqrt()
}

/// Pressure-weighted (mass-weighted) mean of a column `f` on levels `p` (Pa,
/// increasing) over the layer from `p_bottom` up to `p_top`:
///
/// fbar = (1 / (p_bottom - p_top)) integral f dp
///
/// (hydrostatic mass weighting, dm = dp / g; common practice), trapezoidal
/// between levels, the values at the bounds linear in ln p between the levels
/// that bracket them. Missing levels (below ground) are left out: the mean is
/// taken over the valid part of the layer when that covers at least half of
/// its depth, else NaN.
pub fn pressure_weighted_mean(f: &[f64], p: &[f64], p_bottom: f64, p_top: f64) -> f64 {
    let n = f.len().min(p.len());
    if p_bottom.partial_cmp(&p_top) != Some(std::cmp::Ordering::Greater) || n == 0 {
        return f64::NAN;
    }
    // The column as (p, f) points inside the layer, with the bounds interpolated.
    let at = |target: f64| -> Option<f64> {
        (0..n.saturating_sub(1)).find_map(|k| {
            let (pa, pb) = (p[k], p[k + 1]);
            if target == pa && f[k].is_finite() {
                // A bound on a level (the usual case) needs no interpolation.
                Some(f[k])
            } else if pa <= target && target <= pb && f[k].is_finite() && f[k + 1].is_finite() {
                let w = (target.ln() - pa.ln()) / (pb.ln() - pa.ln());
                Some(f[k] + w * (f[k + 1] - f[k]))
            } else {
                None
            }
        })
    };
    let mut pts: Vec<(f64, f64)> = Vec::with_capacity(n + 2);
    if let Some(v) = at(p_top) {
        pts.push((p_top, v));
    }
    for k in 0..n {
        if p[k] > p_top && p[k] < p_bottom && f[k].is_finite() {
            pts.push((p[k], f[k]));
        }
    }
    if let Some(v) = at(p_bottom) {
        pts.push((p_bottom, v));
    }
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    pts.dedup_by(|a, b| a.0 == b.0);
    // Integrate over consecutive valid points; a gap (a missing level between) is not bridged.
    let valid_between =
        |a: f64, b: f64| (0..n).all(|k| !(p[k] > a && p[k] < b) || f[k].is_finite());
    let (mut sum, mut depth) = (0.0, 0.0);
    for w in pts.windows(2) {
        let ((pa, fa), (pb, fb)) = (w[0], w[1]);
        if valid_between(pa, pb) {
            sum += 0.5 * (fa + fb) * (pb - pa);
            depth += pb - pa;
        }
    }
    if depth >= 0.5 * (p_bottom - p_top) {
        sum / depth
    } else {
        f64::NAN
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::constants::OMEGA;

    #[test]
    fn uniform_shear_and_constant_stability() {
        // Closed form: u = Lambda z, N constant (theta = theta0 exp(N^2 z / g)), so
        // sigma = 0.31 f Lambda / N exactly (Lindzen and Farrell 1980).
        let (lambda, n) = (3e-3, 1.2e-2);
        let f = 2.0 * OMEGA * 45f64.to_radians().sin();
        let (z1, z2) = (1500.0, 5600.0);
        let th = |z: f64| 290.0 * (n * n * z / G0).exp();
        let s = eady_growth_rate(f, lambda * (z2 - z1), 0.0, z2 - z1, th(z1), th(z2));
        let want = 0.31 * f * lambda / n;
        assert!(((s - want) / want).abs() < 1e-12, "{s} vs {want}");
        // Southern hemisphere: the same rate; the shear's direction does not matter.
        let s2 = eady_growth_rate(-f, 0.0, -lambda * (z2 - z1), z2 - z1, th(z1), th(z2));
        assert!(((s2 - want) / want).abs() < 1e-12);
        // 0.69 per day for 3 m/s per km and N = 0.012 s-1 at 45 N (the formula by hand).
        assert!((want * 86400.0 - 0.690).abs() < 0.005, "{}", want * 86400.0);
        // Unstable or neutral layers have no rate.
        assert!(eady_growth_rate(f, 10.0, 0.0, 4000.0, 300.0, 299.0).is_nan());
        assert!(eady_growth_rate(f, 10.0, 0.0, 4000.0, 300.0, 300.0).is_nan());
    }

    #[test]
    fn pressure_weighted_mean_of_a_linear_profile() {
        // Closed form: f linear in p has its mass-weighted mean at the layer's middle.
        let p: Vec<f64> = [700.0, 750.0, 800.0, 850.0, 900.0, 925.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let f: Vec<f64> = p.iter().map(|x| 2.0 + 1e-4 * x).collect();
        let m = pressure_weighted_mean(&f, &p, 90_000.0, 70_000.0);
        assert!((m - (2.0 + 1e-4 * 80_000.0)).abs() < 1e-9, "{m}");
        // Bounds between levels are interpolated in ln p: a constant stays constant.
        let c = vec![1.5; p.len()];
        assert!((pressure_weighted_mean(&c, &p, 96_000.0, 72_000.0) - 1.5).abs() < 1e-12);
        // The lowest levels under ground: the mean over what is left, if at least half.
        let mut g = f.clone();
        g[4] = f64::NAN; // 900 hPa
        g[5] = f64::NAN;
        g[6] = f64::NAN;
        let m = pressure_weighted_mean(&g, &p, 90_000.0, 70_000.0);
        assert!((m - (2.0 + 1e-4 * 77_500.0)).abs() < 1e-9, "{m}");
        g[3] = f64::NAN; // 850 too: only 700-800 hPa left, half the layer
        assert!(pressure_weighted_mean(&g, &p, 90_000.0, 70_000.0).is_finite());
        g[2] = f64::NAN; // only 700-750 hPa: a quarter
        assert!(pressure_weighted_mean(&g, &p, 90_000.0, 70_000.0).is_nan());
    }
}
