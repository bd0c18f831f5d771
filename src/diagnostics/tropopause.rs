//! The dynamic tropopause and tropopause folds, column by column.
//!
//! In: one column of isobaric PV (PVU) and potential temperature (K) on levels
//! of increasing pressure (NaN where a level lacks them), ln p of the levels,
//! the column's latitude and the search's settings. Out: where the column
//! passes between stratospheric and tropospheric air, as positions in ln p:
//! the uppermost crossing (the tropopause), how many crossings there are, the
//! lowest crossing with stratospheric air above it, and the fold depth. Pure:
//! no I/O, no logging.
//!
//! Sources (docs/references.md): the 2 PVU surface as the dynamic tropopause and
//! the 380 K isentrope as its upper bound in the tropics, Hoskins, McIntyre and
//! Robertson 1985 (from memory); the lower of the two as the tropopause is common
//! practice in tropopause climatologies. Folds: Sprenger, Croci Maspoli and
//! Wernli 2003 (from memory), who search each vertical profile for multiple
//! crossings of the dynamical tropopause and take the fold depth as the pressure
//! between the uppermost and the lowest crossing.

/// How a column is searched.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Search {
    /// |PV| of the surface, PVU (> 0): +threshold north of the equator, -threshold south.
    pub threshold: f64,
    /// Potential temperature at and above which air counts as stratospheric whatever
    /// its PV, K (380 K by default): the tropopause is the lower of the PV surface and
    /// this isentrope.
    pub theta_bound: f64,
    /// Pressure below which (greater than which) crossings after the first are not
    /// counted, Pa: diabatic PV near the ground is not a fold.
    pub fold_bottom: f64,
    /// Depth above the column's lowest valid level in which crossings after the first
    /// are not counted either, Pa (the boundary layer, whose stable, cold air over ice
    /// and high ground often exceeds 2 PVU).
    pub boundary_layer: f64,
}

/// Depth of the layer above the lowest valid level left out of the fold search, Pa
/// (a typical boundary-layer depth of about 100 hPa; common practice).
pub const BOUNDARY_LAYER_PA: f64 = 10_000.0;

/// What one column's search found. Positions are ln p (p in Pa).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Found {
    /// The tropopause: the uppermost crossing from stratospheric air above to
    /// tropospheric air below.
    pub top: f64,
    /// Crossings counted: the first, and every later one above the fold search's bottom.
    pub crossings: usize,
    /// The lowest counted crossing with stratospheric air above and tropospheric air
    /// below (equal to `top` where the column does not fold).
    pub lowest: f64,
    /// Fold depth, Pa: p(lowest) - p(top) where the column folds (three crossings or
    /// more: stratospheric air lies under tropospheric air), 0 where it does not.
    pub fold_depth: f64,
}

/// Air is stratospheric where its sign-adjusted PV reaches the threshold or its
/// potential temperature reaches the bound.
#[inline]
fn stratospheric(q: f64, theta: f64, s: &Search) -> bool {
    q >= s.threshold || theta >= s.theta_bound
}

/// Where, within the layer from valid level `a` (above) to `b` (below), the air
/// changes from one kind to the other: the PV surface linear in PV and the bound
/// isentrope linear in ln theta, both placed in ln p; when both criteria change in
/// the layer, the kind changes at the lower of the two going down into the
/// troposphere and at the upper going down into the stratosphere.
fn crossing_in(
    q: [f64; 2],
    th: [f64; 2],
    lnp: [f64; 2],
    s: &Search,
    into_troposphere: bool,
) -> f64 {
    let at = |w: f64| lnp[1] + w * (lnp[0] - lnp[1]);
    let mut pos: Vec<f64> = Vec::with_capacity(2);
    if (q[0] >= s.threshold) != (q[1] >= s.threshold) {
        pos.push(at((s.threshold - q[1]) / (q[0] - q[1])));
    }
    if (th[0] >= s.theta_bound) != (th[1] >= s.theta_bound) {
        let (lu, ll) = (th[0].ln(), th[1].ln());
        pos.push(at((s.theta_bound.ln() - ll) / (lu - ll)));
    }
    let pick = |f: fn(f64, f64) -> f64| pos.iter().copied().fold(f64::NAN, f);
    if into_troposphere {
        pick(f64::max)
    } else {
        pick(f64::min)
    }
}

/// Search one column from the top down. `pv` (PVU) and `theta` (K) on levels `lnp`
/// (ln p, p in Pa, increasing); levels where either is missing are skipped. The top
/// valid level must be stratospheric, otherwise nothing is found (the column has no
/// stratospheric air below the bound: the deep tropics under a low model top).
pub fn search(pv: &[f64], theta: &[f64], lnp: &[f64], lat: f64, s: &Search) -> Option<Found> {
    let sign = if lat >= 0.0 { 1.0 } else { -1.0 };
    let valid: Vec<usize> = (0..pv.len().min(theta.len()).min(lnp.len()))
        .filter(|&k| pv[k].is_finite() && theta[k].is_finite() && theta[k] > 0.0)
        .collect();
    let first = *valid.first()?;
    let last = *valid.last()?;
    if !stratospheric(sign * pv[first], theta[first], s) {
        return None;
    }
    let bottom = s.fold_bottom.min(lnp[last].exp() - s.boundary_layer).ln();
    let mut top = None;
    let mut crossings = 0;
    let mut lowest = f64::NAN;
    for w in valid.windows(2) {
        let (a, b) = (w[0], w[1]);
        let (qa, qb) = (sign * pv[a], sign * pv[b]);
        let (sa, sb) = (
            stratospheric(qa, theta[a], s),
            stratospheric(qb, theta[b], s),
        );
        if sa == sb {
            continue;
        }
        let x = crossing_in([qa, qb], [theta[a], theta[b]], [lnp[a], lnp[b]], s, sa);
        if top.is_none() {
            // The tropopause: the first crossing, always into the troposphere.
            top = Some(x);
            lowest = x;
            crossings = 1;
            continue;
        }
        if x > bottom {
            break;
        }
        crossings += 1;
        if sa {
            lowest = x;
        }
    }
    let top = top?;
    let fold_depth = if crossings >= 3 {
        lowest.exp() - top.exp()
    } else {
        0.0
    };
    Some(Found {
        top,
        crossings,
        lowest,
        fold_depth,
    })
}

/// A column `f` on levels `lnp` at position `x` (ln p): linear in ln p between the
/// nearest valid levels above and below `x` (a field may lack levels its neighbours
/// have). NaN where no valid level lies on one side.
pub fn at_ln_p(f: &[f64], lnp: &[f64], x: f64) -> f64 {
    let n = f.len().min(lnp.len());
    let above = (0..n).rev().find(|&k| lnp[k] <= x && f[k].is_finite());
    let below = (0..n).find(|&k| lnp[k] >= x && f[k].is_finite());
    match (above, below) {
        (Some(a), Some(b)) if a == b => f[a],
        (Some(a), Some(b)) => {
            let w = (x - lnp[b]) / (lnp[a] - lnp[b]);
            f[b] + w * (f[a] - f[b])
        }
        _ => f64::NAN,
    }
}

/// Potential temperature of a column at `x` (ln p): ln theta linear in ln p between
/// the nearest valid levels, the interpolation that places the bound isentrope, so
/// that a tropopause on the bound has exactly the bound's potential temperature.
pub fn theta_at_ln_p(theta: &[f64], lnp: &[f64], x: f64) -> f64 {
    let ln: Vec<f64> = theta
        .iter()
        .map(|t| if *t > 0.0 { t.ln() } else { f64::NAN })
        .collect();
    at_ln_p(&ln, lnp, x).exp()
}

#[cfg(test)]
mod tests {
    use super::*;

    const HPA: [f64; 10] = [
        100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 600.0, 700.0, 850.0,
    ];

    fn lnp() -> Vec<f64> {
        HPA.iter().map(|h| (h * 100.0).ln()).collect()
    }

    fn search_default() -> Search {
        Search {
            threshold: 2.0,
            theta_bound: 380.0,
            fold_bottom: 70_000.0,
            boundary_layer: BOUNDARY_LAYER_PA,
        }
    }

    /// A stable column with theta from 400 K at 100 hPa to 290 K at 850 hPa.
    fn theta() -> Vec<f64> {
        vec![
            400.0, 370.0, 350.0, 340.0, 330.0, 320.0, 310.0, 303.0, 298.0, 290.0,
        ]
    }

    fn p_of(x: f64) -> f64 {
        x.exp() / 100.0
    }

    #[test]
    fn one_crossing_in_ln_p_and_signed_by_hemisphere() {
        // Stratosphere 8, 6, 4 PVU, then 1 PVU at 250 hPa: the 2 PVU crossing is a third
        // of the way from 250 to 200 hPa in PV, applied in ln p.
        let pv = [8.0, 6.0, 4.0, 1.0, 0.6, 0.5, 0.4, 0.4, 0.5, 0.6];
        let f = search(&pv, &theta(), &lnp(), 45.0, &search_default()).unwrap();
        let want = (25_000f64.ln() + (1.0 / 3.0) * (20_000f64.ln() - 25_000f64.ln())).exp();
        assert!((f.top.exp() - want).abs() < 1e-6, "{}", p_of(f.top));
        assert_eq!((f.crossings, f.fold_depth), (1, 0.0));
        assert_eq!(f.lowest, f.top);
        let south: Vec<f64> = pv.iter().map(|v| -v).collect();
        assert_eq!(
            search(&south, &theta(), &lnp(), -45.0, &search_default()),
            Some(f)
        );
        // A southern column read with the northern sign has no stratosphere on top
        // (below the bound isentrope everywhere).
        let cool: Vec<f64> = theta().iter().map(|t| t - 30.0).collect();
        assert!(search(&south, &cool, &lnp(), -45.0, &search_default()).is_some());
        assert_eq!(search(&south, &cool, &lnp(), 45.0, &search_default()), None);
    }

    #[test]
    fn tropical_column_takes_the_bound_isentrope() {
        // Deep tropics: PV reaches 2 PVU only between 150 and 100 hPa, while the 380 K
        // isentrope lies lower, between 250 hPa (375 K) and 200 hPa (385 K): the
        // tropopause is the isentrope, at exactly 380 K.
        let pv = [3.0, 0.8, 0.3, 0.2, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1];
        let th = vec![
            420.0, 400.0, 385.0, 375.0, 350.0, 330.0, 320.0, 310.0, 303.0, 298.0,
        ];
        let f = search(&pv, &th, &lnp(), 3.0, &search_default()).unwrap();
        let w = (380f64.ln() - 375f64.ln()) / (385f64.ln() - 375f64.ln());
        let want = 25_000f64.ln() + w * (20_000f64.ln() - 25_000f64.ln());
        assert!((f.top - want).abs() < 1e-12, "{} hPa", p_of(f.top));
        assert!((theta_at_ln_p(&th, &lnp(), f.top) - 380.0).abs() < 1e-9);
        assert_eq!(f.crossings, 1);
        // Both surfaces in the same layer (250-200 hPa): PV 2.5 to 1.0 crosses 2 PVU a
        // third of the way down in PV, the isentrope half way in ln theta; the lower wins.
        let both = [6.0, 4.0, 2.5, 1.0, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1];
        let b = search(&both, &th, &lnp(), 20.0, &search_default()).unwrap();
        let w_pv = (2.0 - 1.0) / (2.5 - 1.0);
        let x_pv = 25_000f64.ln() + w_pv * (20_000f64.ln() - 25_000f64.ln());
        assert!(x_pv < want, "the PV crossing lies higher in this layer");
        assert!((b.top - want).abs() < 1e-12, "{} hPa", p_of(b.top));
        // At the equator PV is zero in every column of a flow without relative
        // vorticity: the isentrope alone.
        let g = search(&[0.0; 10], &th, &lnp(), 0.0, &search_default()).unwrap();
        assert_eq!(g.top, f.top);
        // The PV surface alone would lie higher (smaller p).
        let pv_only = Search {
            theta_bound: f64::INFINITY,
            ..search_default()
        };
        let h = search(&pv, &th, &lnp(), 3.0, &pv_only).unwrap();
        assert!(h.top < f.top, "{} vs {}", p_of(h.top), p_of(f.top));
        // Below 380 K everywhere and below 2 PVU: no tropopause at all.
        let low_top: Vec<f64> = th.iter().map(|t| t - 50.0).collect();
        let weak = [1.5, 0.8, 0.3, 0.2, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1];
        assert_eq!(
            search(&weak, &low_top, &lnp(), 3.0, &search_default()),
            None
        );
        assert_eq!(
            search(&[f64::NAN; 10], &th, &lnp(), 50.0, &search_default()),
            None
        );
    }

    #[test]
    fn folded_column_with_three_crossings() {
        // Stratosphere down to between 250 and 300 hPa; a tropospheric gap at 300 hPa; a
        // fold of stratospheric air at 400-500 hPa; troposphere below. Crossings: 250-300
        // (down into the troposphere), 300-400 (into the fold), 500-600 (out of it).
        let pv = [8.0, 6.0, 4.0, 3.0, 1.0, 3.0, 2.5, 0.5, 0.4, 0.6];
        let f = search(&pv, &theta(), &lnp(), 60.0, &search_default()).unwrap();
        assert_eq!(f.crossings, 3);
        let top = 30_000f64.ln() + 0.5 * (25_000f64.ln() - 30_000f64.ln());
        let low = 60_000f64.ln() + 0.75 * (50_000f64.ln() - 60_000f64.ln());
        assert!((f.top - top).abs() < 1e-12, "top {}", p_of(f.top));
        assert!((f.lowest - low).abs() < 1e-12, "lowest {}", p_of(f.lowest));
        assert!((f.fold_depth - (low.exp() - top.exp())).abs() < 1e-6);
        assert!(f.fold_depth > 24_000.0, "{}", f.fold_depth);
    }

    #[test]
    fn two_crossings_are_not_a_fold_and_the_ground_is_left_out() {
        // High PV again at 600-700 hPa reaching the fold search's bottom: two crossings,
        // stratospheric air does not lie under tropospheric air within the search.
        let pv = [8.0, 6.0, 4.0, 1.0, 0.6, 0.5, 0.6, 2.5, 3.0, 0.6];
        let f = search(&pv, &theta(), &lnp(), 50.0, &search_default()).unwrap();
        assert_eq!((f.crossings, f.fold_depth), (2, 0.0));
        assert_eq!(f.lowest, f.top);
        // A cold, stable layer next to the ground with 3 PVU at the lowest level (850
        // hPa): the crossing into it lies in the boundary layer and below the fold
        // bottom, not counted.
        let pv = [8.0, 6.0, 4.0, 1.0, 0.6, 0.5, 0.6, 0.6, 0.6, 3.0];
        let f = search(&pv, &theta(), &lnp(), 50.0, &search_default()).unwrap();
        assert_eq!((f.crossings, f.fold_depth), (1, 0.0));
        // Without the bottom bounds the same column would count two crossings.
        let anywhere = Search {
            fold_bottom: f64::INFINITY,
            boundary_layer: 0.0,
            ..search_default()
        };
        let g = search(&pv, &theta(), &lnp(), 50.0, &anywhere).unwrap();
        assert_eq!(g.crossings, 2);
        // The boundary layer alone: the fold bottom far down, the lowest level at 850 hPa
        // keeps crossings below 750 hPa out.
        let bl_only = Search {
            fold_bottom: f64::INFINITY,
            ..search_default()
        };
        assert_eq!(
            search(&pv, &theta(), &lnp(), 50.0, &bl_only)
                .unwrap()
                .crossings,
            1
        );
    }

    #[test]
    fn missing_levels_are_stepped_over() {
        // A level without PV (winds or heights only) between 250 and 300 hPa: the search
        // goes on across it, interpolating between 250 and 400 hPa.
        let pv = [8.0, 6.0, 4.0, 3.0, f64::NAN, 1.0, 0.5, 0.4, 0.4, 0.5];
        let f = search(&pv, &theta(), &lnp(), 45.0, &search_default()).unwrap();
        let want = 40_000f64.ln() + 0.5 * (25_000f64.ln() - 40_000f64.ln());
        assert!((f.top - want).abs() < 1e-12);
        let col = [1.0, f64::NAN, 3.0];
        let l = [1.0, 2.0, 3.0];
        assert!((at_ln_p(&col, &l, 2.5) - 2.5).abs() < 1e-12);
        assert!((at_ln_p(&col, &l, 3.0) - 3.0).abs() < 1e-12);
        assert!(at_ln_p(&col, &l, 3.5).is_nan());
    }
}
