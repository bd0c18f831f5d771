//! The dynamic tropopause: where |PV| crosses a threshold (2 PVU by default),
//! searched in each column from the top down.
//!
//! In: isobaric PV (PVU) on levels of increasing pressure, the latitude of the
//! column. Out: where the surface lies (upper level index and weight in ln p),
//! or nothing where no crossing exists (the deep tropics). Pure: no I/O.

/// Locate the PV surface `threshold` (PVU, > 0) in one column: +threshold north
/// of the equator, -threshold south. The search starts at the top valid level,
/// which must be stratospheric (sign-adjusted PV at or above the threshold), and
/// stops at the first level below the threshold. Returns (upper index, weight
/// toward the upper level), the weight linear in PV, to be applied in ln p.
/// The 2 PVU surface as the dynamic tropopause: Hoskins, McIntyre and Robertson
/// 1985 (from memory); searching from the top down: common practice.
pub fn locate_pv_surface(pv: &[f64], lat: f64, threshold: f64) -> Option<(usize, f64)> {
    let s = if lat >= 0.0 { 1.0 } else { -1.0 };
    let first = pv.iter().position(|v| v.is_finite())?;
    if s * pv[first] < threshold {
        return None;
    }
    let mut k = first;
    while k + 1 < pv.len() {
        let (qu, ql) = (s * pv[k], s * pv[k + 1]);
        if !ql.is_finite() {
            return None;
        }
        if ql < threshold {
            let w = (threshold - ql) / (qu - ql);
            return Some((k, w));
        }
        k += 1;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crossing_found_from_the_top_and_signed_by_hemisphere() {
        // Stratosphere 8, 4 PVU; then 1, 0.5; a low-level diabatic blob of 3 PVU below
        // must not be taken: the first crossing from the top is between 4 and 1.
        let col = [8.0, 4.0, 1.0, 0.5, 3.0];
        let (k, w) = locate_pv_surface(&col, 45.0, 2.0).unwrap();
        assert_eq!(k, 1);
        assert!((w - 1.0 / 3.0).abs() < 1e-12);
        let south: Vec<f64> = col.iter().map(|v| -v).collect();
        assert_eq!(locate_pv_surface(&south, -45.0, 2.0), Some((1, w)));
        // Deep tropics: never stratospheric enough.
        assert_eq!(locate_pv_surface(&[1.5, 1.0, 0.2], 2.0, 2.0), None);
        assert_eq!(locate_pv_surface(&[f64::NAN; 3], 50.0, 2.0), None);
    }
}
