//! Pressure reduced to mean sea level from the 1000 hPa height, for inputs
//! that carry no mean sea-level pressure.
//!
//! In: the 1000 hPa geopotential height (m) and temperature (K) of a column.
//! Out: pressure at z = 0, Pa. Pure function: no I/O, no logging.

use super::constants::{G0, R_DRY};

/// Pressure at sea level from the height `z1000` (gpm) of the 1000 hPa surface,
/// Pa: the hypsometric equation for the layer between them with the 1000 hPa
/// temperature `t1000` (K) as its mean,
///
/// p_msl = 1000 hPa exp(g0 z1000 / (R T1000))
///
/// (hypsometric equation; docs/references.md "Methods"). Where the 1000 hPa surface
/// is below ground the model's own extrapolated height is used, as a model's
/// own mean sea-level pressure is extrapolated there too.
#[inline]
pub fn sea_level_pressure(z1000: f64, t1000: f64) -> f64 {
    1.0e5 * (G0 * z1000 / (R_DRY * t1000)).exp()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn standard_atmosphere() {
        // US Standard Atmosphere 1976 (docs/references.md "Check values"): 1000 hPa at 110.9 m,
        // 288.15 - 6.5 * 0.1109 = 287.43 K there, 1013.25 hPa at sea level.
        let p = sea_level_pressure(110.9, 288.15 - 6.5 * 0.1109);
        assert!((p - 101_325.0).abs() < 5.0, "{p}");
        assert_eq!(sea_level_pressure(0.0, 280.0), 1.0e5);
        // A surface below sea level (a deep low): pressure under 1000 hPa.
        assert!(sea_level_pressure(-200.0, 280.0) < 97_700.0);
    }
}
