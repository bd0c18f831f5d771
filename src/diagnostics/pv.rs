//! Ertel potential vorticity on isobaric levels, in its full form with the
//! baroclinic (tilting) terms.
//!
//! In: per level, absolute vorticity, the horizontal gradient of theta, and the
//! vertical derivatives of theta, u and v (grid axes). Out: PV in PVU.
//! Pure functions: no I/O, no logging.

use super::constants::{G0, PVU};

/// P = -g [ (zeta_p + f) dtheta/dp - (dv/dp)(dtheta/dx) + (du/dp)(dtheta/dy) ], in PVU
/// (Bluestein 1992, Synoptic-Dynamic Meteorology in Midlatitudes, vol. I; from memory).
/// `eta` = zeta_p + f; x and y along the grid's axes, with u and v along them too.
#[inline]
pub fn isobaric_pv(
    eta: f64,
    dtheta_dp: f64,
    du_dp: f64,
    dv_dp: f64,
    dtheta_dx: f64,
    dtheta_dy: f64,
) -> f64 {
    -G0 * (eta * dtheta_dp - dv_dp * dtheta_dx + du_dp * dtheta_dy) / PVU
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn barotropic_limit_and_tilting_sign() {
        // Closed form, no shear: P = -g eta dtheta/dp.
        let p = isobaric_pv(1e-4, -1e-3, 0.0, 0.0, 5e-6, 5e-6);
        assert!((p - 0.980665).abs() < 1e-9);
        // Thermal wind balance in the north (f > 0): theta falling poleward (dtheta/dy < 0)
        // goes with westerly shear upward (du/dp < 0); the tilting term (du/dp)(dtheta/dy) > 0
        // then lowers PV (Bluestein 1992; from memory).
        let tilted = isobaric_pv(1e-4, -1e-3, -3e-4, 0.0, 0.0, -1e-5);
        assert!(tilted < p);
    }
}
