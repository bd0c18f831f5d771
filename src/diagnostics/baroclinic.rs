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

/// [`pressure_weighted_mean`] planned once for a set of levels and a layer, for
/// the columns where every level is valid (the usual case above ground): the points
/// it integrates over, where each point's value comes from, and the layer's depth.
/// A column then costs its sums only. The operations are those of
/// [`pressure_weighted_mean`] in the same order, so a column gets the same bits.
#[derive(Debug, Clone)]
pub struct LayerPlan {
    /// The points in increasing pressure: pressure, Pa, and where the value comes from.
    points: Vec<(f64, Node)>,
    /// Sum of the pressure steps between the points, Pa.
    depth: f64,
    /// Whether the points cover at least half of the layer (else the mean is NaN).
    covers: bool,
}

/// Where a point's value comes from: a level, or between level k and k + 1 at weight w.
#[derive(Debug, Clone, Copy)]
enum Node {
    Level(usize),
    Between(usize, f64),
}

impl LayerPlan {
    /// The plan for the levels `p` (Pa, increasing) and the layer from `p_bottom` up
    /// to `p_top`; None where [`pressure_weighted_mean`] has no layer (bounds not in order).
    pub fn new(p: &[f64], p_bottom: f64, p_top: f64) -> Option<Self> {
        let n = p.len();
        if p_bottom.partial_cmp(&p_top) != Some(std::cmp::Ordering::Greater) || n == 0 {
            return None;
        }
        let at = |target: f64| {
            (0..n - 1).find_map(|k| {
                let (pa, pb) = (p[k], p[k + 1]);
                if target == pa {
                    Some(Node::Level(k))
                } else if pa <= target && target <= pb {
                    Some(Node::Between(
                        k,
                        (target.ln() - pa.ln()) / (pb.ln() - pa.ln()),
                    ))
                } else {
                    None
                }
            })
        };
        let mut points = Vec::with_capacity(n + 2);
        points.extend(at(p_top).map(|v| (p_top, v)));
        let inside = (0..n).filter(|&k| p[k] > p_top && p[k] < p_bottom);
        points.extend(inside.map(|k| (p[k], Node::Level(k))));
        points.extend(at(p_bottom).map(|v| (p_bottom, v)));
        points.sort_by(|a, b| a.0.total_cmp(&b.0));
        points.dedup_by(|a, b| a.0 == b.0);
        let depth = points.windows(2).fold(0.0, |d, w| d + (w[1].0 - w[0].0));
        let covers = depth >= 0.5 * (p_bottom - p_top);
        Some(Self {
            points,
            depth,
            covers,
        })
    }

    /// The mean of the column `f` on the plan's levels, every value finite (the
    /// caller checks; a missing value belongs to [`pressure_weighted_mean`]).
    pub fn mean(&self, f: &[f64]) -> f64 {
        let value = |node: Node| match node {
            Node::Level(k) => f[k],
            Node::Between(k, w) => f[k] + w * (f[k + 1] - f[k]),
        };
        let mut sum = 0.0;
        for w in self.points.windows(2) {
            let ((pa, a), (pb, b)) = (w[0], w[1]);
            sum += 0.5 * (value(a) + value(b)) * (pb - pa);
        }
        if self.covers {
            sum / self.depth
        } else {
            f64::NAN
        }
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
    fn a_planned_layer_gives_the_same_bits() {
        // Bounds on levels, between levels, on the first and last level, beyond the
        // column and covering less than half of it; columns linear, curved and lumpy.
        let p: Vec<f64> = [100.0, 250.0, 300.0, 500.0, 700.0, 850.0, 925.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let layers = [
            (90_000.0, 70_000.0),
            (92_500.0, 67_500.0),
            (100_000.0, 10_000.0),
            (105_000.0, 5_000.0),
            (101_000.0, 99_000.0),
            (26_000.0, 24_000.0),
            (85_000.0, 85_000.0),
        ];
        for (bottom, top) in layers {
            let plan = LayerPlan::new(&p, bottom, top);
            for c in 0..50 {
                let c = f64::from(c);
                let f: Vec<f64> = p.iter().map(|x| (x * 1e-4 * c).sin() * 7.0 + c).collect();
                let want = pressure_weighted_mean(&f, &p, bottom, top);
                let got = plan.as_ref().map_or(f64::NAN, |plan| plan.mean(&f));
                assert_eq!(
                    got.to_bits(),
                    want.to_bits(),
                    "{bottom} {top} {c}: {got} {want}"
                );
            }
        }
        assert!(LayerPlan::new(&p, 70_000.0, 90_000.0).is_none());
        assert!(LayerPlan::new(&p, f64::NAN, 90_000.0).is_none());
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
