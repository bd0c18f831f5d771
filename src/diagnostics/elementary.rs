//! The exponential and the natural logarithm of many numbers at once.
//!
//! In: a slice of f64. Out: exp or ln of each, to within a few units in the last
//! place. The usual argument range is done in straight-line arithmetic (no calls,
//! no branches) that the compiler puts into vector registers; the few arguments
//! outside it (NaN, infinities, zero, negative numbers, subnormals, overflow)
//! go to the standard library's functions in a second pass, so that every input
//! gets exactly what [`exp`] and [`ln`] give it one at a time.
//!
//! Both functions reduce the argument by a power of two and sum a series on the
//! rest (argument reduction of Cody and Waite, 1980, "Software Manual for the
//! Elementary Functions"; common practice).

use std::f64::consts::{LOG2_E, SQRT_2};

/// Arguments of [`exp`] in [-708, 709] are reduced; the rest go to `f64::exp`.
const EXP_LOW: f64 = -708.0;
const EXP_HIGH: f64 = 709.0;

/// ln 2 in two parts (Cody and Waite): the high part has its last 21 bits zero, so that
/// k ln2_hi is exact for |k| < 2^21; ln2_lo is ln 2 - ln2_hi to 53 bits of its own
/// (1.9082149292705877e-10; not `LN_2 - LN2_HI`, which would keep `LN_2`'s rounding
/// error, about 1e-17, and multiply it by k).
const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);

/// 1.5 * 2^52: y + SHIFT - SHIFT rounds y (|y| < 2^51) to the nearest integer, and
/// the low bits of y + SHIFT hold that integer.
const SHIFT: f64 = 6_755_399_441_055_744.0;

/// 1 / n!, n = 0..=12.
const INV_FACTORIAL: [f64; 13] = [
    1.0,
    1.0,
    1.0 / 2.0,
    1.0 / 6.0,
    1.0 / 24.0,
    1.0 / 120.0,
    1.0 / 720.0,
    1.0 / 5_040.0,
    1.0 / 40_320.0,
    1.0 / 362_880.0,
    1.0 / 3_628_800.0,
    1.0 / 39_916_800.0,
    1.0 / 479_001_600.0,
];

/// e^x = 2^k e^r, k = round(x / ln 2), r = x - k ln 2 (|r| <= ln 2 / 2), and
/// e^r = sum r^n / n! to n = 12: the first term left out, r^13 / 13!, is below
/// 1.7e-16 of e^r. The caller keeps x within [EXP_LOW, EXP_HIGH].
#[inline(always)]
fn exp_reduced(x: f64) -> f64 {
    let x = x.clamp(EXP_LOW, EXP_HIGH);
    let shifted = x * LOG2_E + SHIFT;
    let k = shifted - SHIFT;
    let r = (x - k * LN2_HI) - k * LN2_LO;
    let c = &INV_FACTORIAL;
    let mut sum = c[12];
    for n in (0..12).rev() {
        sum = sum * r + c[n];
    }
    // 2^k from its bits: k + 1023 is in 1..=2046, a normal number's exponent.
    let k_bits = shifted.to_bits().wrapping_sub(SHIFT.to_bits());
    sum * f64::from_bits(k_bits.wrapping_add(1023) << 52)
}

/// Whether [`exp_reduced`] takes `x`: within [EXP_LOW, EXP_HIGH].
#[inline(always)]
fn exp_takes(x: f64) -> bool {
    (EXP_LOW..=EXP_HIGH).contains(&x)
}

/// e^x: the reduced form within [EXP_LOW, EXP_HIGH], the library's beyond.
#[inline]
pub fn exp(x: f64) -> f64 {
    if exp_takes(x) {
        exp_reduced(x)
    } else {
        x.exp()
    }
}

/// [`exp`] of each of `x`, into `out` (the shorter of the two sets the length).
#[inline(always)]
pub fn exp_slice(x: &[f64], out: &mut [f64]) {
    each(x, out, exp_reduced, exp_takes, f64::exp);
}

/// `reduced` of every `x` into `out` in one straight pass, then `library` of those
/// `reduced` does not take.
#[inline(always)]
fn each(
    x: &[f64],
    out: &mut [f64],
    reduced: impl Fn(f64) -> f64,
    takes: impl Fn(f64) -> bool,
    library: impl Fn(f64) -> f64,
) {
    for (o, &x) in out.iter_mut().zip(x) {
        *o = reduced(x);
    }
    for (o, &x) in out.iter_mut().zip(x) {
        if !takes(x) {
            *o = library(x);
        }
    }
}

/// 2 atanh z = 2 (z + z^3/3 + ... + z^19/19), the coefficients 1 / (2n + 1).
const ODD_RECIPROCALS: [f64; 10] = [
    1.0,
    1.0 / 3.0,
    1.0 / 5.0,
    1.0 / 7.0,
    1.0 / 9.0,
    1.0 / 11.0,
    1.0 / 13.0,
    1.0 / 15.0,
    1.0 / 17.0,
    1.0 / 19.0,
];

/// ln x = k ln 2 + ln m, x = m 2^k with m in [sqrt(1/2), sqrt(2)), and
/// ln m = 2 atanh z, z = (m - 1) / (m + 1), |z| <= 0.1716: the first term left out of
/// the series, z^21 / 21, is below 2.3e-17 of ln m. The caller keeps x a positive,
/// finite, normal number.
#[inline(always)]
fn ln_reduced(x: f64) -> f64 {
    let bits = x.to_bits();
    let mantissa = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    // The biased exponent as a float: its bits under 2^52's exponent, less 2^52.
    let biased = f64::from_bits((bits >> 52) | 0x4330_0000_0000_0000) - 4_503_599_627_370_496.0;
    let big = mantissa > SQRT_2;
    let m = if big { mantissa * 0.5 } else { mantissa };
    let k = biased - 1023.0 + if big { 1.0 } else { 0.0 };
    let z = (m - 1.0) / (m + 1.0);
    let z2 = z * z;
    let c = &ODD_RECIPROCALS;
    let mut sum = c[9];
    for n in (0..9).rev() {
        sum = sum * z2 + c[n];
    }
    k * LN2_HI + (2.0 * z * sum + k * LN2_LO)
}

/// Whether [`ln_reduced`] takes `x`: positive, finite and normal.
#[inline(always)]
fn ln_takes(x: f64) -> bool {
    (f64::MIN_POSITIVE..=f64::MAX).contains(&x)
}

/// ln x: the reduced form for positive, finite, normal x, the library's otherwise.
#[inline]
pub fn ln(x: f64) -> f64 {
    if ln_takes(x) {
        ln_reduced(x)
    } else {
        x.ln()
    }
}

/// [`ln`] of each of `x`, into `out` (the shorter of the two sets the length).
#[inline(always)]
pub fn ln_slice(x: &[f64], out: &mut [f64]) {
    each(x, out, ln_reduced, ln_takes, f64::ln);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Arguments over the whole range in which each function reduces, denser near
    /// the powers of two and near zero, plus the edges and the special values.
    fn arguments(low: f64, high: f64) -> Vec<f64> {
        let mut v: Vec<f64> = (0..200_001)
            .map(|i| low + (high - low) * f64::from(i) / 200_000.0)
            .collect();
        for k in -60..60 {
            let p = 2f64.powi(k);
            v.extend([p, p * (1.0 + 1e-15), p * (1.0 - 1e-16), p * SQRT_2]);
        }
        v.extend([
            0.0,
            -0.0,
            1e-300,
            5e-324,
            1.0,
            1.0 + 1e-15,
            1.0 - 1e-15,
            -1.0,
        ]);
        v.extend([EXP_LOW, EXP_HIGH, -709.5, 709.7, 710.0, -745.2, -800.0]);
        v.extend([
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::MAX,
            f64::MIN_POSITIVE,
        ]);
        v
    }

    /// Units in the last place between `a` and the library's `b`.
    fn ulps(a: f64, b: f64) -> f64 {
        if a == b || (a.is_nan() && b.is_nan()) {
            return 0.0;
        }
        (a - b).abs() / (b.abs() * f64::EPSILON).max(f64::MIN_POSITIVE)
    }

    /// Reference: the standard library's `exp` and `ln` (correctly rounded to within
    /// one unit in the last place on glibc; common practice).
    #[test]
    fn the_exponential_is_the_librarys_to_a_few_units_in_the_last_place() {
        let x = arguments(-750.0, 750.0);
        let mut out = vec![0.0; x.len()];
        exp_slice(&x, &mut out);
        let worst = x
            .iter()
            .zip(&out)
            .map(|(&x, &y)| ulps(y, x.exp()))
            .fold(0.0, f64::max);
        assert!(worst <= 4.0, "largest error {worst} ulp");
        // One at a time is the same, bit for bit.
        for (&x, &y) in x.iter().zip(&out) {
            assert_eq!(exp(x).to_bits(), y.to_bits(), "exp({x})");
        }
        assert_eq!(exp(0.0), 1.0);
    }

    #[test]
    fn the_logarithm_is_the_librarys_to_a_few_units_in_the_last_place() {
        let mut x = arguments(-1.0, 1e6);
        x.extend(arguments(0.5, 2.0));
        let mut out = vec![0.0; x.len()];
        ln_slice(&x, &mut out);
        // Near x = 1 the logarithm is near zero: count its error against x - 1's size.
        let worst = x
            .iter()
            .zip(&out)
            .map(|(&x, &y)| ulps(y, x.ln()).min((y - x.ln()).abs() / f64::EPSILON))
            .fold(0.0, f64::max);
        assert!(worst <= 4.0, "largest error {worst} ulp");
        for (&x, &y) in x.iter().zip(&out) {
            assert_eq!(ln(x).to_bits(), y.to_bits(), "ln({x})");
        }
        assert_eq!(ln(1.0), 0.0);
        assert_eq!(ln(2.0).to_bits(), std::f64::consts::LN_2.to_bits());
        assert_eq!(ln(0.0), f64::NEG_INFINITY);
        assert!(ln(-1.0).is_nan());
    }

    /// Closed forms: e^(a+b) = e^a e^b, ln(a b) = ln a + ln b and e^(ln c) = c across the
    /// powers of two, where the reduction's integer part changes. The bounds are the
    /// rounding of the arguments (an absolute error d in x is a relative d in e^x) plus
    /// four units in the last place.
    #[test]
    fn the_functions_keep_their_laws_across_the_reduction() {
        let eps = f64::EPSILON;
        for i in -40..40 {
            let a = f64::from(i) * 0.173_286_795_139_986_33; // ln 2 / 4
            let (b, c) = (0.3 + f64::from(i) * 0.01, 2f64.powi(i) * 1.7);
            let bound = ((a + b).abs() + 4.0) * eps;
            assert!(
                (exp(a + b) / (exp(a) * exp(b)) - 1.0).abs() < bound,
                "{a} {b}"
            );
            let bound = (ln(c).abs() + 4.0) * eps;
            assert!((ln(c * 3.1) - (ln(c) + ln(3.1))).abs() < 2.0 * bound, "{c}");
            assert!((exp(ln(c)) / c - 1.0).abs() < bound, "{c}");
        }
    }
}
