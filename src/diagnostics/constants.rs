//! Physical constants, in one place for the whole program.
//!
//! Sources as listed in docs/references.md.

/// Earth's angular velocity, s-1 (IERS conventions).
pub const OMEGA: f64 = 7.292115e-5;
/// Standard gravity, m s-2 (3rd CGPM, 1901).
pub const G0: f64 = 9.80665;
/// Gas constant of dry air, J kg-1 K-1 (common practice; US Standard Atmosphere 1976 gives 287.053).
pub const R_DRY: f64 = 287.05;
/// Specific heat of dry air at constant pressure, J kg-1 K-1 (common practice, 1004 to 1005.7).
pub const CP_DRY: f64 = 1004.6;
/// Poisson constant kappa = R/cp (about 0.2857, common practice).
pub const KAPPA: f64 = R_DRY / CP_DRY;
/// Reference pressure of potential temperature, Pa.
pub const P0: f64 = 100_000.0;
/// One potential vorticity unit, K m2 kg-1 s-1 (Hoskins, McIntyre and Robertson 1985; from memory).
pub const PVU: f64 = 1e-6;
