//! The fixed colour scale of each product's quicklook, and the units it is
//! shown in.
//!
//! Every product has a fixed physical range by default, so that successive
//! steps and runs are drawn alike and a value always has the same colour;
//! `[quicklook.scales]` replaces any of them (docs/configuration.md). Values
//! are shown in the units forecasters read: hPa for pressure, PVU for
//! potential vorticity (converted from whatever units the file gives, SI or
//! PVU-scaled), 10⁻⁵ s⁻¹ for vorticity. Changes and budget terms get
//! symmetric fixed limits on the diverging ramp. A variable with no scale of
//! its own (a product added later) spans its own values, and says so.

use super::quicklook::{Palette, Scale};

/// How a variable's values are shown: factor to the shown units and their name.
#[derive(Debug, Clone, PartialEq)]
pub struct Shown {
    /// Multiply the stored values by this.
    pub factor: f64,
    /// Units of the result, as written under the colour bar.
    pub units: String,
}

/// Units a stored variable is shown in, from the units its file gives.
pub fn shown_units(units: &str) -> Shown {
    let (factor, shown) = match units.trim() {
        "Pa" => (0.01, "hPa"),
        "K Pa-1" => (100.0, "K hPa\u{207b}\u{00b9}"),
        "1e-6 K m2 kg-1 s-1" => (1.0, "PVU"),
        "K m2 kg-1 s-1" => (1e6, "PVU"),
        "1e-6 K m2 kg-1 s-1 h-1" => (1.0, "PVU h\u{207b}\u{00b9}"),
        "K m2 kg-1 s-1 h-1" => (1e6, "PVU h\u{207b}\u{00b9}"),
        "K m2 kg-1 s-2" => (3.6e9, "PVU h\u{207b}\u{00b9}"),
        "s-1" => (1e5, "10\u{207b}\u{2075} s\u{207b}\u{00b9}"),
        "s-2" => (1e4, "10\u{207b}\u{2074} s\u{207b}\u{00b2}"),
        "m2 s-2" => (1e-3, "kJ kg\u{207b}\u{00b9}"),
        "Pa-1 s-1" => (
            1e9,
            "10\u{207b}\u{2079} Pa\u{207b}\u{00b9} s\u{207b}\u{00b9}",
        ),
        "m s-1" => (1.0, "m s\u{207b}\u{00b9}"),
        "m" => (1.0, "m"),
        "K" => (1.0, "K"),
        "1" => (1.0, "fraction"),
        // Anything else is shown as the file gives it.
        other => (1.0, other),
    };
    Shown {
        factor,
        units: shown.to_string(),
    }
}

/// Whether a product is potential vorticity.
pub fn is_pv(name: &str) -> bool {
    matches!(name, "pv" | "isen_pv" | "layer_pv")
}

/// Whether a product is drawn by magnitude: potential vorticity and absolute
/// vorticity, whose sign follows the hemisphere's, are shown with their sign
/// reversed south of the equator, so that stratospheric air (PV) and
/// cyclonic spin (absolute vorticity) are high in both hemispheres; the
/// image's title says so.
pub fn by_magnitude(name: &str) -> bool {
    is_pv(name) || name == "eta"
}

/// Whether a product is a map of the dynamic tropopause.
pub fn is_tropopause(name: &str) -> bool {
    name.starts_with("trop_")
}

/// The default scale of a product at a level (`level` as written in an
/// image entry: "500", "1000-500", "320"), in the units of [`shown_units`].
/// `None`: the product has no fixed scale of its own.
pub fn default_scale(name: &str, level: &str) -> Option<Scale> {
    use Palette::{Diverging as D, Sequential as S};
    let f = |p, lo, hi, step| Some(Scale::fixed(p, lo, hi, step));
    let reversed = |s: Option<Scale>| {
        s.map(|s| Scale {
            reversed: true,
            ..s
        })
    };
    match name {
        "zeta" | "bud_zeta_pred" | "bud_zeta" => f(D, -30.0, 30.0, 5.0),
        // Troughs, cut-off lows and stratospheric air dark.
        "eta" => reversed(f(S, 0.0, 32.0, 4.0)),
        "bud_zeta_diff" => f(D, -10.0, 10.0, 2.0),
        // Spreading out and converging, symmetric about zero.
        "div" => f(D, -10.0, 10.0, 2.0),
        "theta" => f(S, 260.0, 380.0, 10.0),
        "stab" => f(S, 0.0, 0.3, 0.025),
        "n2" => f(S, 0.0, 6.0, 0.5),
        "pv" | "isen_pv" => reversed(f(S, 0.0, 10.0, 1.0)),
        "layer_pv" => reversed(f(S, 0.0, 100.0, 10.0)),
        "layer_dp" => f(S, 0.0, 300.0, 25.0),
        "isen_p" => reversed(f(S, 100.0, 1000.0, 50.0)),
        "isen_z" => f(S, 0.0, 16_000.0, 1000.0),
        "isen_t" => f(S, 190.0, 310.0, 10.0),
        "isen_m" => f(S, 280.0, 360.0, 5.0),
        "isen_u" | "isen_v" | "trop_u" | "trop_v" | "layer_u" | "layer_v" => {
            f(D, -60.0, 60.0, 10.0)
        }
        "trop_p" => reversed(f(S, 100.0, 500.0, 25.0)),
        "trop_theta" => f(S, 280.0, 380.0, 5.0),
        "trop_z" => f(S, 4000.0, 18_000.0, 1000.0),
        // Deep folds and low crossings dark.
        "trop_fold_dp" => reversed(f(S, 0.0, 300.0, 25.0)),
        "trop_p_low" => reversed(f(S, 100.0, 700.0, 25.0)),
        "trop_crossings" => f(S, 0.0, 6.0, 1.0),
        "trop_p_r2r" => f(D, -100.0, 100.0, 20.0),
        "thick_r2r" => f(D, -60.0, 60.0, 10.0),
        "z_r2r" => f(D, -80.0, 80.0, 10.0),
        "bud_stretch" => f(D, -0.5, 0.5, 0.1),
        "bud_dpvdt" => f(D, -0.5, 0.5, 0.1),
        n if n.starts_with("thick_chg_") => f(D, -120.0, 120.0, 20.0),
        "mslp" => f(S, 960.0, 1048.0, 4.0),
        n if n.starts_with("mslp_chg_") => f(D, -24.0, 24.0, 4.0),
        "mslp_r2r" => f(D, -20.0, 20.0, 4.0),
        "eady" => f(S, 0.0, 3.0, 0.25),
        "theta_e" => f(S, 250.0, 370.0, 10.0),
        "low_pv" => reversed(f(S, 0.0, 4.0, 0.5)),
        "isen_rh" => f(S, 0.0, 100.0, 10.0),
        "thick" => match level {
            "1000-500" => f(S, 4800.0, 6000.0, 60.0),
            "1000-850" => f(S, 1100.0, 1500.0, 25.0),
            "850-700" => f(S, 1350.0, 1650.0, 20.0),
            "700-500" => f(S, 2400.0, 2800.0, 25.0),
            _ => None,
        },
        "z" => match level {
            "1000" => f(D, -400.0, 400.0, 50.0),
            "850" => f(S, 1000.0, 1800.0, 50.0),
            "700" => f(S, 2500.0, 3300.0, 50.0),
            "500" => f(S, 4800.0, 6000.0, 60.0),
            "300" => f(S, 8200.0, 9800.0, 100.0),
            "250" => f(S, 9400.0, 11_000.0, 100.0),
            "200" => f(S, 10_800.0, 12_600.0, 100.0),
            _ => None,
        },
        _ => None,
    }
}

/// The ramp of a product with no fixed scale: diverging for changes and
/// signed quantities, sequential otherwise.
pub fn fallback_palette(name: &str) -> Palette {
    let signed = ["chg", "r2r", "diff", "_u", "_v", "zeta", "dpvdt", "stretch"];
    if signed.iter().any(|k| name.contains(k)) {
        Palette::Diverging
    } else {
        Palette::Sequential
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pv_is_shown_in_pvu_whatever_units_the_file_gives() {
        // 1 PVU = 1e-6 K m2 kg-1 s-1 (Hoskins, McIntyre and Robertson 1985).
        let si = shown_units("K m2 kg-1 s-1");
        let scaled = shown_units("1e-6 K m2 kg-1 s-1");
        assert_eq!(si.units, "PVU");
        assert_eq!(scaled.units, "PVU");
        assert!((2e-6 * si.factor - 2.0).abs() < 1e-12);
        assert_eq!(2.0 * scaled.factor, 2.0);
        // A rate per second in SI, shown per hour: 1e-6 / 3600 per s is 1 PVU h-1.
        let rate = shown_units("K m2 kg-1 s-2");
        assert!((1e-6 / 3600.0 * rate.factor - 1.0).abs() < 1e-12);
        assert_eq!(shown_units("Pa").factor, 0.01);
    }

    #[test]
    fn the_products_a_forecaster_compares_have_fixed_physical_scales() {
        let s = default_scale("isen_pv", "320").unwrap();
        assert_eq!((s.min, s.max, s.palette), (0.0, 10.0, Palette::Sequential));
        let s = default_scale("trop_p", "2").unwrap();
        assert_eq!((s.min, s.max, s.reversed), (100.0, 500.0, true));
        let s = default_scale("trop_theta", "2").unwrap();
        assert_eq!((s.min, s.max), (280.0, 380.0));
        // Changes and budget terms: symmetric about zero on the diverging ramp.
        for n in [
            "thick_chg_06h",
            "thick_chg_24h",
            "thick_r2r",
            "z_r2r",
            "trop_p_r2r",
            "bud_stretch",
            "bud_dpvdt",
            "bud_zeta_diff",
            "zeta",
            "div",
        ] {
            let s = default_scale(n, "1000-500").unwrap();
            assert_eq!(s.palette, Palette::Diverging, "{n}");
            assert_eq!(s.min, -s.max, "{n}");
        }
        // Every default has whole bands within the limit.
        for n in [
            "zeta", "div", "theta", "stab", "n2", "pv", "layer_pv", "layer_dp", "isen_p", "isen_z",
            "isen_t", "isen_m", "isen_u", "trop_z", "thick", "z",
        ] {
            for level in [
                "1000-500", "1000-850", "850-700", "700-500", "500", "850", "1000", "300", "200",
                "250", "700",
            ] {
                if let Some(s) = default_scale(n, level) {
                    let b = (s.max - s.min) / s.step;
                    assert!(
                        (b - b.round()).abs() < 1e-9 && (4.0..=40.0).contains(&b),
                        "{n}@{level}: {b}"
                    );
                }
            }
        }
        assert!(default_scale("fold_new_thing", "").is_none());
    }
}
