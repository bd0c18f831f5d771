//! Moisture on isobaric levels and isentropic surfaces: vapour pressure,
//! mixing ratio, relative humidity, and equivalent potential temperature.
//!
//! In: temperature (K), pressure (Pa) and specific humidity (kg kg-1) or
//! relative humidity (%), one point at a time. Out: the quantity at that
//! point, NaN where an input is missing. Pure functions: no I/O, no logging.

use super::constants::{KAPPA, P0};
use super::thickness::{saturation_vapour_pressure, EPSILON};

/// Vapour pressure from specific humidity, Pa: e = p q / (epsilon + (1 - epsilon) q)
/// (from q = epsilon e / (p - (1 - epsilon) e); common practice).
#[inline]
pub fn vapour_pressure_from_q(q: f64, p: f64) -> f64 {
    let q = q.max(0.0);
    p * q / (EPSILON + (1.0 - EPSILON) * q)
}

/// Vapour pressure from relative humidity (%), Pa: e = (RH/100) e_s(T), with
/// e_s of Bolton 1980 (his equation 10), RH clipped to 0..100 (common practice).
#[inline]
pub fn vapour_pressure_from_rh(rh: f64, t: f64) -> f64 {
    (rh / 100.0).clamp(0.0, 1.0) * saturation_vapour_pressure(t)
}

/// Mixing ratio, kg kg-1: r = epsilon e / (p - e) (common practice).
#[inline]
pub fn mixing_ratio(e: f64, p: f64) -> f64 {
    EPSILON * e / (p - e)
}

/// Relative humidity over water, %: 100 e / e_s(T), e from specific humidity `q` at
/// pressure `p` (WMO's definition through vapour pressures; common practice).
#[inline]
pub fn relative_humidity(q: f64, t: f64, p: f64) -> f64 {
    100.0 * vapour_pressure_from_q(q, p) / saturation_vapour_pressure(t)
}

/// Specific humidity, kg kg-1, from vapour pressure `e` at pressure `p`:
/// q = epsilon e / (p - (1 - epsilon) e) (common practice).
#[inline]
pub fn specific_humidity(e: f64, p: f64) -> f64 {
    EPSILON * e / (p - (1.0 - EPSILON) * e)
}

/// Temperature at the lifting condensation level, K, from temperature `t` (K) and
/// vapour pressure `e` (Pa): T_L = 2840 / (3.5 ln T - ln e - 4.805) + 55, e in hPa
/// (Bolton 1980, Mon. Wea. Rev. 108, 1046-1053, his equation 22; from memory).
#[inline]
pub fn lcl_temperature(t: f64, e: f64) -> f64 {
    2840.0 / (3.5 * t.ln() - (e / 100.0).ln() - 4.805) + 55.0
}

/// Equivalent potential temperature, K (Bolton 1980, his equation 39):
///
/// theta_e = T (p0 / (p - e))^kappa (T / T_L)^(0.28 r) exp[(3.036 / T_L - 0.00178) r (1 + 0.448e-3 r)]
///
/// with r the mixing ratio in g kg-1, T_L from [`lcl_temperature`] and kappa
/// leeward's R/cp (Bolton writes 0.2854; leeward's 0.2857 keeps theta_e equal to
/// theta in dry air). `e` is the vapour pressure, Pa; dry air (e <= 0) gives theta.
///
/// Evaluated as one exponential of the sum of the three factors' logarithms,
/// theta_e = T exp[kappa ln(p0 / (p - e)) + 0.28e-3 r (ln T - ln T_L) + (3.036 / T_L - 0.00178) r (1 + 0.448e-3 r)],
/// the same quantity with four logarithms and one exponential instead of two
/// powers, two logarithms and an exponential (it runs at every point of every level).
pub fn equivalent_potential_temperature(t: f64, p: f64, e: f64) -> f64 {
    if !(t.is_finite() && p.is_finite() && e.is_finite()) || e >= p {
        return f64::NAN;
    }
    if e <= 0.0 {
        return t * (P0 / p).powf(KAPPA);
    }
    let r = 1000.0 * mixing_ratio(e, p);
    let ln_t = t.ln();
    let tl = 2840.0 / (3.5 * ln_t - (e / 100.0).ln() - 4.805) + 55.0;
    let exponent = KAPPA * (P0 / (p - e)).ln()
        + 0.28e-3 * r * (ln_t - tl.ln())
        + (3.036 / tl - 0.00178) * r * (1.0 + 0.448e-3 * r);
    t * exponent.exp()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::stability::potential_temperature;

    /// Vapour pressure at dewpoint `td` (K), Pa (Bolton 1980, equation 10; from memory).
    fn e_at_dewpoint(td: f64) -> f64 {
        saturation_vapour_pressure(td)
    }

    #[test]
    fn dry_air_gives_potential_temperature() {
        // Closed form: with no vapour theta_e is theta (Poisson's equation).
        for (t, p) in [(300.0, 1e5), (250.0, 5e4), (220.0, 2.5e4)] {
            let th = potential_temperature(t, p);
            assert!((equivalent_potential_temperature(t, p, 0.0) - th).abs() < 1e-9);
            // A trace of vapour changes it continuously.
            let tiny = equivalent_potential_temperature(t, p, 1e-6);
            assert!((tiny - th).abs() < 1e-4, "{tiny} vs {th}");
        }
    }

    #[test]
    fn the_metpy_documentation_example() {
        // MetPy 1.4 documentation of equivalent_potential_temperature, its example: 850 hPa,
        // 20 C, dewpoint 18 C gives 353.937994 K (Bolton's equation 39 with kappa = 2/7 and
        // T_L from the dewpoint, his equation 15). Here T_L comes from the vapour pressure
        // (his equation 22), Bolton states both to within 0.1 K of each other.
        let e = e_at_dewpoint(291.15);
        let te = equivalent_potential_temperature(293.15, 85_000.0, e);
        assert!((te - 353.938).abs() < 0.05, "{te}");
        // The LCL temperature lies just below the dewpoint for nearly saturated air
        // (Bolton 1980, equation 15 gives 290.68 K here; from the formula above).
        let tl = lcl_temperature(293.15, e);
        assert!((tl - 290.68).abs() < 0.05, "{tl}");
    }

    /// Bolton's equation 39 written factor by factor, as printed.
    fn theta_e_as_printed(t: f64, p: f64, e: f64) -> f64 {
        let r = 1000.0 * mixing_ratio(e, p);
        let tl = lcl_temperature(t, e);
        t * (P0 / (p - e)).powf(KAPPA)
            * (t / tl).powf(0.28e-3 * r)
            * ((3.036 / tl - 0.00178) * r * (1.0 + 0.448e-3 * r)).exp()
    }

    #[test]
    fn one_exponential_equals_the_printed_factors() {
        // Every factor active: moist air from the tropics to the upper troposphere.
        for (t, p, rh) in [
            (303.0, 100_000.0, 0.9),
            (288.0, 85_000.0, 0.5),
            (250.0, 50_000.0, 1.0),
            (220.0, 20_000.0, 0.3),
        ] {
            let e = rh * saturation_vapour_pressure(t);
            let (a, b) = (
                equivalent_potential_temperature(t, p, e),
                theta_e_as_printed(t, p, e),
            );
            assert!((a - b).abs() < 1e-9 * b, "{t} {p}: {a} vs {b}");
        }
    }

    #[test]
    fn saturated_air_has_its_lcl_at_its_own_temperature() {
        // Bolton's T_L formulas are fits: at saturation T_L equals T within 0.1 K
        // (Bolton 1980 quotes errors below 0.1 K over -35 to 35 C; from memory).
        for t in [253.15, 273.15, 293.15, 303.15] {
            let tl = lcl_temperature(t, saturation_vapour_pressure(t));
            assert!((tl - t).abs() < 0.1, "{t}: {tl}");
        }
    }

    #[test]
    fn humidity_conversions_invert() {
        let (t, p) = (288.0, 85_000.0);
        for rh in [5.0, 50.0, 100.0] {
            let e = vapour_pressure_from_rh(rh, t);
            let q = specific_humidity(e, p);
            assert!((relative_humidity(q, t, p) - rh).abs() < 1e-9);
            assert!((vapour_pressure_from_q(q, p) - e).abs() < 1e-9);
        }
        // r = q / (1 - q) (common practice).
        let e = 1500.0;
        let q = specific_humidity(e, p);
        assert!((mixing_ratio(e, p) - q / (1.0 - q)).abs() < 1e-12);
    }
}
