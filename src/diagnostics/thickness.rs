//! Layer thickness between isobaric levels: from geopotential height where
//! both levels have it, otherwise from the hypsometric equation with the
//! layer-mean virtual temperature.
//!
//! In: columns of temperature (and humidity) on levels of increasing pressure,
//! or heights at the two levels. Out: thickness in metres (geopotential). Pure.

use super::constants::{G0, R_DRY};

/// Ratio of the gas constants of dry air and water vapour, epsilon = Rd/Rv (common practice).
pub const EPSILON: f64 = 0.622;

/// Virtual temperature Tv = T (1 + 0.608 q), q specific humidity in kg/kg (common practice).
#[inline]
pub fn virtual_temperature(t: f64, q: f64) -> f64 {
    t * (1.0 + 0.608 * q)
}

/// Saturation vapour pressure over water, Pa: e_s = 611.2 exp(17.67 (T - 273.15) / (T - 29.65))
/// (Bolton 1980, Mon. Wea. Rev. 108, 1046-1053; from memory).
#[inline]
pub fn saturation_vapour_pressure(t: f64) -> f64 {
    611.2 * (17.67 * (t - 273.15) / (t - 29.65)).exp()
}

/// Specific humidity from relative humidity (%), temperature (K) and pressure (Pa):
/// e = (RH/100) e_s(T), q = epsilon e / (p - (1 - epsilon) e) (common practice).
#[inline]
pub fn specific_humidity_from_rh(rh: f64, t: f64, p: f64) -> f64 {
    let e = (rh / 100.0).clamp(0.0, 1.0) * saturation_vapour_pressure(t);
    EPSILON * e / (p - (1.0 - EPSILON) * e)
}

/// Integral of Tv d(ln p) over one segment, assuming ln Tv linear in ln p (exact for a
/// polytropic layer, a constant lapse rate): (T2 - T1) / ln(T2/T1) * |ln p2 - ln p1|.
#[inline]
fn segment(t1: f64, t2: f64, dlnp: f64) -> f64 {
    let mean = if (t2 - t1).abs() < 1e-9 * t1.abs() {
        0.5 * (t1 + t2)
    } else {
        (t2 - t1) / (t2 / t1).ln()
    };
    mean * dlnp
}

/// Hypsometric thickness of the layer from `p_bottom` to `p_top` (Pa), given a
/// column of virtual temperature `tv` on levels `p` (Pa, increasing) that include
/// both bounds: z_top - z_bottom = (R / g0) integral Tv d ln p, the hypsometric
/// equation (any dynamics text; docs/references.md). Levels between the bounds without
/// temperature (levels that carry only winds or heights) are stepped over, ln Tv linear
/// in ln p across them; NaN if a bound lacks it.
pub fn hypsometric_thickness(tv: &[f64], p: &[f64], p_bottom: f64, p_top: f64) -> f64 {
    let (Some(kb), Some(kt)) = (
        p.iter().position(|&x| (x - p_bottom).abs() < 1e-3),
        p.iter().position(|&x| (x - p_top).abs() < 1e-3),
    ) else {
        return f64::NAN;
    };
    if kt >= kb {
        return f64::NAN;
    }
    if !(tv[kt].is_finite() && tv[kb].is_finite()) {
        return f64::NAN;
    }
    let mut integral = 0.0;
    let mut upper = kt;
    for k in kt + 1..=kb {
        if !tv[k].is_finite() {
            continue; // a level without temperature: the segment spans it
        }
        integral += segment(tv[upper], tv[k], (p[k] / p[upper]).ln());
        upper = k;
    }
    R_DRY / G0 * integral
}

#[cfg(test)]
mod tests {
    use super::*;

    /// US Standard Atmosphere 1976 temperature at pressure p (Pa), troposphere:
    /// T = T0 (p/p0)^(R gamma/g) (docs/references.md, computed from its defining constants).
    fn std_t(p: f64) -> f64 {
        288.15 * (p / 101_325.0).powf(R_DRY * 0.0065 / G0)
    }

    #[test]
    fn standard_atmosphere_thicknesses_from_temperature_alone() {
        // docs/references.md check values: 1000-500 5463.6 m, 1000-850 1346.4, 850-700 1554.9, 700-500 2562.3.
        let p: Vec<f64> = [500.0, 700.0, 850.0, 925.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let t: Vec<f64> = p.iter().map(|&x| std_t(x)).collect();
        for (bot, top, want) in [
            (1000.0, 500.0, 5463.6),
            (1000.0, 850.0, 1346.4),
            (850.0, 700.0, 1554.9),
            (700.0, 500.0, 2562.3),
        ] {
            let got = hypsometric_thickness(&t, &p, bot * 100.0, top * 100.0);
            assert!((got - want).abs() < 2.0, "{bot}-{top}: {got} vs {want}");
        }
    }

    #[test]
    fn levels_without_temperature_are_stepped_over() {
        // 925 and 700 hPa carry winds only (no temperature): the 1000-500 hPa thickness
        // of the constant-lapse-rate column is still exact (ln T linear in ln p across
        // the gaps), 5463.6 m (docs/references.md check values); a bound without
        // temperature gives NaN.
        let p: Vec<f64> = [500.0, 700.0, 850.0, 925.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let mut t: Vec<f64> = p.iter().map(|&x| std_t(x)).collect();
        let full = hypsometric_thickness(&t, &p, 1e5, 5e4);
        t[1] = f64::NAN;
        t[3] = f64::NAN;
        let gaps = hypsometric_thickness(&t, &p, 1e5, 5e4);
        assert!((gaps - full).abs() < 1e-6, "{gaps} vs {full}");
        assert!((gaps - 5463.6).abs() < 2.0);
        assert!(hypsometric_thickness(&t, &p, 92_500.0, 5e4).is_nan());
    }

    #[test]
    fn uniform_warming_of_two_kelvin() {
        // Closed form (hypsometric equation): +2 K everywhere adds (R 2 / g) ln 2 = 40.6 m to 1000-500 hPa.
        let p: Vec<f64> = [500.0, 700.0, 850.0, 1000.0]
            .iter()
            .map(|h| h * 100.0)
            .collect();
        let t: Vec<f64> = p.iter().map(|&x| std_t(x)).collect();
        let warm: Vec<f64> = t.iter().map(|x| x + 2.0).collect();
        let d =
            hypsometric_thickness(&warm, &p, 1e5, 5e4) - hypsometric_thickness(&t, &p, 1e5, 5e4);
        assert!((d - R_DRY * 2.0 / G0 * 2f64.ln()).abs() < 0.05, "{d}");
        assert!((d - 40.6).abs() < 0.1);
    }

    #[test]
    fn moisture_and_saturation() {
        // Bolton 1980 (from memory): e_s(0 C) = 611.2 Pa, e_s(20 C) about 2339 Pa.
        assert!((saturation_vapour_pressure(273.15) - 611.2).abs() < 1e-9);
        assert!((saturation_vapour_pressure(293.15) - 2339.0).abs() < 5.0);
        // Saturated air at 20 C and 1000 hPa holds about 14.7 g/kg (common practice).
        let q = specific_humidity_from_rh(100.0, 293.15, 1e5);
        assert!((q - 0.0147).abs() < 3e-4, "{q}");
        assert!(virtual_temperature(300.0, 0.01) > 301.8);
    }
}
