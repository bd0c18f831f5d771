//! Moisture on isobaric levels and isentropic surfaces: vapour pressure,
//! mixing ratio, relative humidity, and equivalent potential temperature.
//!
//! In: temperature (K), pressure (Pa) and specific humidity (kg kg-1) or
//! relative humidity (%), one point at a time. Out: the quantity at that
//! point, NaN where an input is missing. Pure functions: no I/O, no logging.

use super::constants::{KAPPA, P0};
use super::elementary;
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

/// An isobaric level with its Poisson factor (p0 / p)^kappa, computed once for
/// every point of the level.
#[derive(Debug, Clone, Copy)]
pub struct IsobaricLevel {
    /// Pressure, Pa.
    pub p: f64,
    /// (p0 / p)^kappa: potential temperature over temperature on this level.
    pub poisson: f64,
}

impl IsobaricLevel {
    pub fn new(p: f64) -> Self {
        Self {
            p,
            poisson: (P0 / p).powf(KAPPA),
        }
    }
}

/// ln y for y near 1, from z = (y - 1) / (y + 1): ln y = 2 atanh z =
/// 2 (z + z^3/3 + z^5/5 + z^7/7 + z^9/9 + ...) (the series of the inverse hyperbolic
/// tangent, common practice). Within |z| < 0.2 (y from 0.67 to 1.5) the terms left
/// out add up to less than 2 z^11 / (11 (1 - z^2)) < 4e-9; beyond, the library's
/// logarithm of y = (1 + z) / (1 - z).
#[inline]
fn ln_near_one_z(z: f64) -> f64 {
    if z.abs() >= NEAR_ONE || z.is_nan() {
        return ((1.0 + z) / (1.0 - z)).ln();
    }
    atanh_series(z)
}

/// The series of [`ln_near_one_z`] alone, for |z| < [`NEAR_ONE`].
#[inline(always)]
fn atanh_series(z: f64) -> f64 {
    let z2 = z * z;
    2.0 * z * (1.0 + z2 * (1.0 / 3.0 + z2 * (1.0 / 5.0 + z2 * (1.0 / 7.0 + z2 / 9.0))))
}

/// The |z| below which [`atanh_series`] is within 4e-9 of the logarithm.
const NEAR_ONE: f64 = 0.2;

/// Equivalent potential temperature, K, from temperature `t` (K) and relative
/// humidity `rh` (%) on the isobaric level `level`: Bolton's equation 39 as in
/// [`equivalent_potential_temperature`], with e = (RH/100) e_s(T) (his
/// equation 10), the same quantity rearranged so that a point costs one
/// logarithm and two exponentials instead of four and two, and fewer
/// divisions in a row:
///
/// - with a = 17.67 (T - 273.15) / (T - 29.65), ln(e / 1 hPa) = ln(RH/100) + a + ln 6.112,
///   so the denominator of T_L (equation 22) is D = 3.5 ln T - ln e - 4.805
///   = ln(T^3 sqrt(T) / (RH/100)) - a - ln 6.112 - 4.805, T_L = (2840 + 55 D) / D;
/// - ln(p0 / (p - e)) = ln(p0 / p) - ln(1 - e/p): the first is the level's Poisson
///   factor, the second and ln(T / T_L) are logarithms of numbers near 1 (`ln_near_one_z`,
///   whose z = (y - 1) / (y + 1) is (T D - 2840 - 55 D) / (T D + 2840 + 55 D) for y = T / T_L).
///
/// Quotients are taken two at a time (a / b and c / d as a d / (b d) and c b / (b d)), so
/// that a point costs three divisions besides the logarithm's. The exponentials and the
/// logarithm are [`elementary`]'s, within a few units in the
/// last place of the library's. Dry air (RH <= 0) gives theta; RH is clipped to 100 %
/// as in [`vapour_pressure_from_rh`].
pub fn theta_e_from_rh(t: f64, rh: f64, level: IsobaricLevel) -> f64 {
    let s = ThetaEStart::of(t, rh);
    s.one_point(elementary::exp(s.a), elementary::ln(s.t35_over_h), level)
}

/// Equivalent potential temperature along a row of one isobaric level, float32 in and
/// out: [`theta_e_from_rh`] of each point (to float32's rounding), a chunk of points
/// at a time in straight-line arithmetic that runs in vector registers, 4 points
/// at once where the processor has AVX2.
pub fn theta_e_from_rh_row(t: &[f32], rh: &[f32], level: IsobaricLevel, out: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: `theta_e_row_avx2` is `theta_e_row` compiled with AVX2 allowed; the only
        // condition for calling it is a processor with AVX2, checked on the line above.
        return unsafe { theta_e_row_avx2(t, rh, level, out) };
    }
    theta_e_row(t, rh, level, out);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn theta_e_row_avx2(t: &[f32], rh: &[f32], level: IsobaricLevel, out: &mut [f32]) {
    theta_e_row(t, rh, level, out);
}

#[inline(always)]
fn theta_e_row(t: &[f32], rh: &[f32], level: IsobaricLevel, out: &mut [f32]) {
    let chunks = t.chunks(CHUNK).zip(rh.chunks(CHUNK));
    for ((t, rh), out) in chunks.zip(out.chunks_mut(CHUNK)) {
        theta_e_chunk(t, rh, level, out);
    }
}

/// Points a chunk: enough for the arithmetic to stay in cache between passes.
const CHUNK: usize = 64;

/// The passes over a chunk's points, one array per quantity (the start of each
/// point, [`ThetaEStart`], as four arrays, so that every pass runs in vector registers).
struct Passes {
    t: [f64; CHUNK],
    h: [f64; CHUNK],
    a: [f64; CHUNK],
    t35_over_h: [f64; CHUNK],
    exp_a: [f64; CHUNK],
    ln_x: [f64; CHUNK],
    factor: [f64; CHUNK],
    exponent: [f64; CHUNK],
    regular: [bool; CHUNK],
}

impl Passes {
    #[inline(always)]
    fn start(&self, i: usize) -> ThetaEStart {
        ThetaEStart {
            t: self.t[i],
            h: self.h[i],
            a: self.a[i],
            t35_over_h: self.t35_over_h[i],
        }
    }
}

/// theta_e of up to [`CHUNK`] points: the regular ones (every input there, moist,
/// e < p, both logarithms near one within the series' range, the exponent within
/// [`elementary`]'s reduced range) in straight-line arithmetic; the rest again one by
/// one through [`ThetaEStart::one_point`], which gives the regular ones the same bits.
#[inline(always)]
fn theta_e_chunk(t: &[f32], rh: &[f32], level: IsobaricLevel, out: &mut [f32]) {
    let n = t.len().min(rh.len()).min(out.len()).min(CHUNK);
    let (t, rh, out) = (&t[..n], &rh[..n], &mut out[..n]);
    let mut w = Passes {
        t: [0.0; CHUNK],
        h: [0.0; CHUNK],
        a: [0.0; CHUNK],
        t35_over_h: [0.0; CHUNK],
        exp_a: [0.0; CHUNK],
        ln_x: [0.0; CHUNK],
        factor: [0.0; CHUNK],
        exponent: [0.0; CHUNK],
        regular: [false; CHUNK],
    };
    for i in 0..n {
        let s = ThetaEStart::of(f64::from(t[i]), f64::from(rh[i]));
        (w.t[i], w.h[i], w.a[i], w.t35_over_h[i]) = (s.t, s.h, s.a, s.t35_over_h);
    }
    elementary::exp_slice(&w.a[..n], &mut w.exp_a[..n]);
    elementary::ln_slice(&w.t35_over_h[..n], &mut w.ln_x[..n]);
    for i in 0..n {
        let (x, regular) = w.start(i).regular(w.exp_a[i], w.ln_x[i], level);
        w.regular[i] = regular;
        w.exponent[i] = if regular { x } else { 0.0 };
        w.factor[i] = w.t[i] * level.poisson;
    }
    // The exponentials of the exponents, into `exp_a`, spent.
    elementary::exp_slice(&w.exponent[..n], &mut w.exp_a[..n]);
    for ((o, f), e) in out.iter_mut().zip(&w.factor).zip(&w.exp_a) {
        *o = (f * e) as f32;
    }
    for (i, o) in out.iter_mut().enumerate() {
        if !w.regular[i] {
            let s = w.start(i);
            let exp_a = elementary::exp(s.a);
            *o = s.one_point(exp_a, w.ln_x[i], level) as f32;
        }
    }
}

/// What a point of [`theta_e_from_rh`] needs before its exponential and logarithm.
#[derive(Debug, Clone, Copy, Default)]
struct ThetaEStart {
    t: f64,
    /// RH / 100, clipped to 1 (NaN where an input is missing).
    h: f64,
    /// 17.67 (T - 273.15) / (T - 29.65): e_s = 6.112 hPa exp(a).
    a: f64,
    /// T^3 sqrt(T) / (RH / 100).
    t35_over_h: f64,
}

impl ThetaEStart {
    #[inline(always)]
    fn of(t: f64, rh: f64) -> Self {
        // Not `min`: a missing RH (NaN) must stay missing.
        let h = if rh > 100.0 { 1.0 } else { rh * 0.01 };
        // One division for the two quotients: 1 / ((T - 29.65) h).
        let inv = 1.0 / ((t - 29.65) * h);
        Self {
            t,
            h,
            a: 17.67 * (t - 273.15) * h * inv,
            t35_over_h: t * t * t * t.sqrt() * (t - 29.65) * inv,
        }
    }

    /// Bolton's exponent, from exp(a), ln(T^3 sqrt(T) / (RH/100)) and the two logarithms
    /// near one taken by `ln1` (their z as arguments): theta_e = T (p0/p)^kappa exp(exponent).
    /// Also e, and the two z.
    #[inline(always)]
    fn exponent(
        &self,
        exp_a: f64,
        ln_x: f64,
        level: IsobaricLevel,
        ln1: fn(f64) -> f64,
    ) -> [f64; 4] {
        let (e, p) = (self.h * 611.2 * exp_a, level.p);
        // r = 1000 epsilon e / (p - e) and, with x = e / p, z_p = -x / (2 - x) = -e / (2p - e):
        // one division for the two.
        let inv = 1.0 / ((p - e) * (2.0 * p - e));
        let r = 1000.0 * EPSILON * e * (2.0 * p - e) * inv;
        let z_p = -e * (p - e) * inv;
        let d = ln_x - self.a - LN_6_112 - 4.805;
        // T D and T_L D; z_t = (T D - T_L D) / (T D + T_L D) and 1 / T_L = D / (T_L D):
        // one division for the two.
        let (num, tld) = (self.t * d, 2840.0 + 55.0 * d);
        let inv = 1.0 / ((num + tld) * tld);
        let z_t = (num - tld) * tld * inv;
        let inv_tl = d * (num + tld) * inv;
        let exponent = -KAPPA * ln1(z_p)
            + 0.28e-3 * r * ln1(z_t)
            + (3.036 * inv_tl - 0.00178) * r * (1.0 + 0.448e-3 * r);
        [exponent, e, z_t, z_p]
    }

    /// The exponent of a regular point, and whether the point is regular. No branches:
    /// the conditions are combined with `&`, not `&&`.
    #[inline(always)]
    fn regular(&self, exp_a: f64, ln_x: f64, level: IsobaricLevel) -> (f64, bool) {
        let [x, e, z_t, z_p] = self.exponent(exp_a, ln_x, level, atanh_series);
        let finite = (self.t.abs() < f64::INFINITY) & (self.h.abs() < f64::INFINITY);
        let moist = (self.h > 0.0) & (e < level.p);
        let near_one = (z_t.abs() < NEAR_ONE) & (z_p.abs() < NEAR_ONE);
        (
            x,
            finite & moist & near_one & (x.abs() < 700.0) & (level.p < f64::INFINITY),
        )
    }

    /// theta_e of any point, one at a time: missing where an input is missing or e >= p,
    /// theta for dry air, else with the library's logarithm beyond the series' range.
    /// For a regular point, the operations of [`theta_e_chunk`] in the same order.
    fn one_point(&self, exp_a: f64, ln_x: f64, level: IsobaricLevel) -> f64 {
        let (t, h, p) = (self.t, self.h, level.p);
        if !(t.is_finite() && h.is_finite() && p.is_finite()) {
            return f64::NAN;
        }
        if h <= 0.0 {
            return t * level.poisson;
        }
        let [x, e, _, _] = self.exponent(exp_a, ln_x, level, ln_near_one_z);
        if e >= p {
            return f64::NAN;
        }
        t * level.poisson * elementary::exp(x)
    }
}

/// ln 6.112 (Bolton's e_s at 0 C, hPa).
const LN_6_112: f64 = 1.810_254_051_864_219_4;

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

    #[test]
    fn the_logarithm_near_one_is_the_logarithm() {
        assert_eq!(LN_6_112, 6.112f64.ln());
        // Against the library's logarithm across the series' range and past it.
        for k in 0..=400 {
            let y = 0.5 + f64::from(k) * 0.0025;
            let (a, b) = (ln_near_one_z((y - 1.0) / (y + 1.0)), y.ln());
            assert!((a - b).abs() < 5e-9, "{y}: {a} vs {b}");
        }
    }

    #[test]
    fn theta_e_from_relative_humidity_equals_the_printed_factors() {
        // Every factor active, and the corners: the warmest saturated surface air
        // (e/p near 0.1), very dry air (T/T_L past the series' range), the
        // upper troposphere and the stratosphere, supersaturation clipped.
        let mut worst: f64 = 0.0;
        for t in [190.0, 210.0, 230.0, 250.0, 270.0, 290.0, 303.0, 318.0] {
            for p in [100_000.0, 85_000.0, 50_000.0, 20_000.0, 5_000.0, 1_000.0] {
                for rh in [0.1, 1.0, 10.0, 50.0, 90.0, 100.0, 104.0] {
                    let e = vapour_pressure_from_rh(rh, t);
                    let want = equivalent_potential_temperature(t, p, e);
                    let got = theta_e_from_rh(t, rh, IsobaricLevel::new(p));
                    if !want.is_finite() {
                        // Vapour at or near the level's pressure: missing or overflowing alike.
                        assert_eq!(got.is_nan(), want.is_nan(), "{t} {p} {rh}: {got}");
                        continue;
                    }
                    worst = worst.max((got - want).abs() / want);
                    let printed = theta_e_as_printed(t, p, e);
                    assert!(
                        (got - printed).abs() < 1e-9 * want,
                        "{t} {p} {rh}: {got} vs {printed}, {want}"
                    );
                }
            }
        }
        // The series' bound, 4e-9 in a logarithm times kappa, is below float32's 6e-8.
        assert!(worst < 2e-9, "largest relative difference {worst}");
        // Dry air is theta; a missing input is missing.
        let l = IsobaricLevel::new(50_000.0);
        assert!((theta_e_from_rh(250.0, 0.0, l) - potential_temperature(250.0, 5e4)).abs() < 1e-9);
        assert!(theta_e_from_rh(f64::NAN, 50.0, l).is_nan());
        assert!(theta_e_from_rh(250.0, f64::NAN, l).is_nan());
    }

    #[test]
    fn a_row_is_its_points_bit_for_bit() {
        // More points than a chunk and a partial last chunk, with missing, dry,
        // supersaturated and over-saturated-for-the-level points among them.
        let n = 150;
        let t: Vec<f32> = (0..n).map(|i| 190.0 + 0.8 * i as f32).collect();
        let mut rh: Vec<f32> = (0..n).map(|i| (i * 37 % 110) as f32).collect();
        rh[3] = f32::NAN;
        rh[70] = 0.0;
        rh[71] = -2.0;
        let mut t = t;
        t[5] = f32::NAN;
        for p in [100_000.0, 30_000.0, 2_000.0] {
            let level = IsobaricLevel::new(p);
            let mut row = vec![0.0f32; n];
            theta_e_from_rh_row(&t, &rh, level, &mut row);
            // Where the processor has AVX2, that was the wide form: the plain one agrees.
            let mut plain = vec![0.0f32; n];
            theta_e_row(&t, &rh, level, &mut plain);
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&row), bits(&plain));
            for i in 0..n {
                let one = theta_e_from_rh(f64::from(t[i]), f64::from(rh[i]), level) as f32;
                assert_eq!(
                    row[i].to_bits(),
                    one.to_bits(),
                    "{p} {i}: {} vs {one}",
                    row[i]
                );
            }
            assert!(row[3].is_nan() && row[5].is_nan());
        }
    }
}
