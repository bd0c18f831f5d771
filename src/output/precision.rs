//! How many mantissa bits each product keeps in the files.
//!
//! Every value is bit-rounded before compression ([`super::cf::bit_round`]);
//! the trailing bits it clears hold no real information and only cost
//! compression time and disk. The default count of each product is measured:
//! the bitwise real information content (Kloewer et al. 2021, Nature
//! Computational Science 1, 713-724; docs/references.md) of the product on the
//! benchmark step and on real model output, and the fewest mantissa bits that
//! keep 99 % of it (`tests/bench/information.py`, figures in docs/output.md).
//! Two floors are added to the measurement:
//!
//! - [`DIFFERENCED`]: products a later step or cycle reads back from the file
//!   to take a difference (changes in time, the PV budget) keep at least
//!   [`DIFFERENCE_FLOOR`] bits, so that the rounding of both values stays far
//!   below the change they give;
//! - [`REFERENCE_FLOOR`] where the measured count would leave a product outside
//!   the agreement its reference checks hold it to (docs/output.md names each).
//!
//! `output.significant_bits` sets one count for every product instead, and
//! `[output.kept_bits]` sets a product's own; both win over this table.

use std::collections::BTreeMap;

/// Bits kept by a product the table does not name.
pub const UNLISTED_BITS: u32 = 16;

/// Bits kept at least by products whose published values a later step
/// differences: the rounding of two values, at most `2 * 2^-(n+1)` of their
/// size, is then 1.5e-5 of it (0.08 m of a 5,500 m thickness, 1.5 Pa of a
/// 100 kPa pressure), well below the smallest change worth showing.
pub const DIFFERENCE_FLOOR: u32 = 16;

/// Products read back from published files by the changes in time
/// ([`crate::changes`]: thickness, heights, tropopause pressure, mean
/// sea-level pressure) and by the PV budget (layer and isentropic winds, PV
/// and layer depth).
pub const DIFFERENCED: &[&str] = &[
    "thick", "z", "trop_p", "mslp", "layer_u", "layer_v", "layer_pv", "layer_dp", "isen_u",
    "isen_v", "isen_pv",
];

/// Mantissa bits that keep 99 % of each product's real information, the
/// largest over the measured inputs (docs/output.md, "Precision").
pub const MEASURED: &[(&str, u32)] = &[
    ("div", 6),
    ("eady", 4),
    ("eta", 9),
    ("isen_m", 14),
    ("isen_p", 9),
    ("isen_pv", 8),
    ("isen_q", 2),
    ("isen_rh", 4),
    ("isen_t", 10),
    ("isen_u", 7),
    ("isen_v", 3),
    ("isen_z", 10),
    ("layer_dp", 9),
    ("layer_pv", 7),
    ("layer_u", 6),
    ("layer_v", 3),
    ("low_pv", 8),
    ("mslp", 13),
    ("n2", 9),
    ("orog", 7),
    ("pv", 8),
    ("stab", 9),
    ("steer_u", 5),
    ("steer_v", 3),
    ("theta", 12),
    ("theta_e", 14),
    ("thick", 12),
    ("trop_crossings", 1),
    ("trop_fold_dp", 1),
    ("trop_p", 10),
    ("trop_p_low", 10),
    ("trop_theta", 14),
    ("trop_u", 9),
    ("trop_v", 3),
    ("trop_z", 11),
    ("z", 11),
    ("zeta", 7),
];

/// Floors of products whose reference checks need more than their measured
/// bits (docs/output.md says which check and why).
pub const REFERENCE_FLOOR: &[(&str, u32)] = &[
    // Counts of crossings: exact for any count below 512.
    ("trop_crossings", 9),
    // Absolute minus relative vorticity is the Coriolis parameter to 1e-4 of
    // it, from the two published fields: each rounded by at most 3.1e-5.
    ("zeta", 14),
    ("eta", 14),
    // Potential temperature within 2e-5 of the closed form at 1000 hPa.
    ("theta", 16),
    // PV within 2 % of the closed form, and its two tilting terms in a
    // baroclinic atmosphere each within 0.5 % of the smaller term plus 2^-16
    // of the whole PV, point by point: the 16 bits that check was set for.
    ("pv", 16),
    // Isentropic pressure within 100 Pa of the closed form, of which rounding
    // may take at most 4 Pa.
    ("isen_p", 13),
    // Isentropic temperature, height and Montgomery streamfunction are checked
    // against the closed form to 1e-5 of the value, the winds on the surfaces
    // and at the tropopause to 1e-4: the 16 bits those checks were set for.
    ("isen_t", 16),
    ("isen_z", 16),
    ("isen_m", 16),
    ("trop_u", 16),
    ("trop_v", 16),
    // A fold's depth equals the lowest crossing's pressure minus the
    // tropopause's to 1e-4 (1 Pa), both read from the file.
    ("trop_p_low", 16),
    ("trop_fold_dp", 16),
    // The Eady growth rate of uniform shear is checked to 1 % of its closed
    // form: rounding at most 2.0e-3 of it.
    ("eady", 8),
    // Uniform relative humidity interpolates to itself within 0.01 % (of
    // about 70 %): rounding at most 0.005.
    ("isen_rh", 13),
    // Specific humidity on isentropes within 1 % of MetPy's: rounding at most
    // 2.0e-3 of it.
    ("isen_q", 8),
    // Equivalent potential temperature within 0.1 K of MetPy's: rounding at
    // most 0.04 K at 350 K.
    ("theta_e", 12),
    // Divergence within 0.1 % (median) and 0.5 % (largest) of the largest value
    // of its closed form, of which truncation takes up to 0.07 %: rounding at
    // most 2^-11 = 4.9e-4 of each value.
    ("div", 10),
];

/// The name a product's count is kept under (`thick_chg_06h` under
/// `thick_chg`, `mslp_chg_06h` under `mslp_chg`).
fn key(name: &str) -> &str {
    if name.starts_with("thick_chg_") {
        "thick_chg"
    } else if name.starts_with("mslp_chg_") {
        "mslp_chg"
    } else {
        name
    }
}

fn lookup(table: &[(&str, u32)], name: &str) -> Option<u32> {
    table.iter().find(|(n, _)| *n == name).map(|(_, b)| *b)
}

/// The default count of a product: measured, raised to its floors.
pub fn default_bits(name: &str) -> u32 {
    let k = key(name);
    let mut bits = lookup(MEASURED, k).unwrap_or(UNLISTED_BITS);
    if let Some(f) = lookup(REFERENCE_FLOOR, k) {
        bits = bits.max(f);
    }
    if DIFFERENCED.contains(&k) {
        bits = bits.max(DIFFERENCE_FLOOR);
    }
    bits.clamp(1, 23)
}

/// Every product the table knows, with its default count.
pub fn default_table() -> Vec<(&'static str, u32)> {
    let mut names: Vec<&'static str> = MEASURED.iter().map(|(n, _)| *n).collect();
    names.extend(DIFFERENCED.iter().copied());
    names.sort_unstable();
    names.dedup();
    names.into_iter().map(|n| (n, default_bits(n))).collect()
}

/// The counts in force: the table, or the configuration's.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct KeptBits {
    /// One count for every product (`output.significant_bits`), if set.
    pub all: Option<u32>,
    /// A product's own count (`[output.kept_bits]`), by product name.
    pub by_name: BTreeMap<String, u32>,
}

impl KeptBits {
    /// The same count for every product.
    pub fn uniform(bits: u32) -> KeptBits {
        KeptBits {
            all: Some(bits),
            by_name: BTreeMap::new(),
        }
    }

    /// Mantissa bits kept by the product `name` (1 to 23; 23 keeps it exact).
    pub fn bits(&self, name: &str) -> u32 {
        if let Some(&b) = self
            .by_name
            .get(name)
            .or_else(|| self.by_name.get(key(name)))
        {
            return b.clamp(1, 23);
        }
        match self.all {
            Some(b) => b.clamp(1, 23),
            None => default_bits(name),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::output::cf::bit_round;

    #[test]
    fn configuration_wins_over_the_table() {
        let mut k = KeptBits::default();
        assert_eq!(k.bits("thick"), default_bits("thick"));
        k.all = Some(12);
        assert_eq!(k.bits("thick"), 12);
        k.by_name.insert("thick".into(), 20);
        assert_eq!(k.bits("thick"), 20);
        assert_eq!(k.bits("z"), 12);
        k.by_name.insert("thick_chg".into(), 5);
        assert_eq!(k.bits("thick_chg_06h"), 5);
        assert_eq!(KeptBits::uniform(40).bits("z"), 23);
    }

    #[test]
    fn every_differenced_product_keeps_the_floor() {
        for n in DIFFERENCED {
            assert!(
                default_bits(n) >= DIFFERENCE_FLOOR,
                "{n}: {}",
                default_bits(n)
            );
        }
    }

    /// Difference cases: a value of the product and a small step of the trade
    /// for it: 2.3 m of a 5,500 m layer thickness, 10 m of a 10 km height,
    /// 1 hPa of a 250 hPa tropopause, 0.5 hPa of a 1008 hPa sea-level
    /// pressure, 0.1 m/s of a 60 m/s wind, 0.05 PVU of 8 PVU, 1 hPa of a
    /// 100 hPa layer depth (common practice: the smallest contour steps of such
    /// charts are larger, from memory). No step is a whole multiple of the
    /// rounding spacing of the product's measured count, where the difference
    /// would come out exact and the case could not see the floor.
    const DIFFERENCE_CASES: &[(&str, f32, f32)] = &[
        ("thick", 5512.37, 2.3),
        ("z", 10_234.6, 10.0),
        ("trop_p", 25_013.3, 100.0),
        ("mslp", 100_812.4, 50.0),
        ("layer_u", 61.37, 0.1),
        ("layer_v", -43.91, 0.1),
        ("isen_u", 58.22, 0.1),
        ("isen_v", 39.07, 0.1),
        ("layer_pv", 8.13e-6, 5e-8),
        ("isen_pv", 7.77e-6, 5e-8),
        ("layer_dp", 10_037.0, 100.0),
    ];

    /// The largest relative error of a change `change` taken from two values
    /// rounded to `n` bits, over many phases of the value against the
    /// rounding lattice (all in the binade of `x`).
    fn worst_difference_error(x: f32, change: f32, n: u32) -> f64 {
        let mut worst = 0.0f64;
        for i in 0..997 {
            let a = x * (1.0 + i as f32 * 1.3e-4);
            let b = a + change;
            let published = f64::from(bit_round(b, n)) - f64::from(bit_round(a, n));
            let exact = f64::from(b) - f64::from(a);
            worst = worst.max((published - exact).abs() / exact.abs());
        }
        worst
    }

    /// A change taken from two published values is the change of the exact
    /// values to within 5 % for each case above.
    #[test]
    fn a_difference_of_published_values_is_not_dominated_by_rounding() {
        for &(name, x, change) in DIFFERENCE_CASES {
            let n = default_bits(name);
            let worst = worst_difference_error(x, change, n);
            assert!(
                worst <= 0.05,
                "{name}: {n} bits change a {change} step by {:.2} %",
                worst * 100.0
            );
        }
    }

    /// The cases can fail: every differenced product has one, and at its
    /// measured count alone (without the floor) its step comes out more than
    /// 5 % wrong.
    #[test]
    fn each_difference_case_sees_its_floor() {
        for n in DIFFERENCED {
            assert!(
                DIFFERENCE_CASES.iter().any(|(c, _, _)| c == n),
                "{n} has no difference case"
            );
        }
        for &(name, x, change) in DIFFERENCE_CASES {
            let measured = lookup(MEASURED, name).unwrap_or(UNLISTED_BITS);
            if measured >= DIFFERENCE_FLOOR {
                continue;
            }
            let worst = worst_difference_error(x, change, measured);
            assert!(
                worst > 0.05,
                "{name}: at its measured {measured} bits a {change} step is off by only {:.2} %",
                worst * 100.0
            );
        }
    }
}
