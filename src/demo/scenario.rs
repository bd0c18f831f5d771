//! The demo scenario: an invented regional model on a Lambert conformal grid,
//! with a baroclinic westerly jet and an upper trough moving through it.
//!
//! In: a step's lead time. Out: isobaric geopotential height, temperature and
//! grid-relative winds on the scenario's grid, physically consistent: heights
//! are an analytic function, temperature follows from them hydrostatically,
//! T = -(g/R) dZ/d(ln p), and the winds are geostrophic,
//! u = -(g/f) (1/a) dZ/dphi, v = (g/f) (1/(a cos phi)) dZ/dlambda,
//! turned into the grid's axes. Everything here is invented data.

use crate::diagnostics::constants::{G0, OMEGA, R_DRY};
use crate::geometry::{Conformal, Earth};

use super::encode::GridSpec;

/// Isobaric levels of the scenario, hPa (21 levels).
pub const LEVELS_HPA: [f64; 21] = [
    1000.0, 950.0, 900.0, 850.0, 800.0, 750.0, 700.0, 650.0, 600.0, 550.0, 500.0, 450.0, 400.0,
    350.0, 300.0, 250.0, 200.0, 150.0, 100.0, 70.0, 50.0,
];

/// The scenario's Lambert conformal grid: 30/60 N secant cone, LoV 10 E,
/// 97 x 81 points at 30 km.
pub const GRID: GridSpec = GridSpec::Lambert {
    nx: 97,
    ny: 81,
    lat1: 33.0,
    lon1: -14.0,
    dx: 30_000.0,
    dy: 30_000.0,
    lov: 10.0,
    latin1: 30.0,
    latin2: 60.0,
};

const EARTH_RADIUS: f64 = 6_371_229.0;

/// US Standard Atmosphere 1976 geopotential height of pressure p (hPa), to
/// 20 km: lapse rate 6.5 K/km to 11 km, isothermal 216.65 K above.
pub fn standard_height(p: f64) -> f64 {
    let (t0, gamma, p0) = (288.15, 0.0065, 1013.25);
    let c = R_DRY * gamma / G0;
    let p11 = p0 * (216.65f64 / t0).powf(1.0 / c);
    if p >= p11 {
        t0 / gamma * (1.0 - (p / p0).powf(c))
    } else {
        11_000.0 + R_DRY * 216.65 / G0 * (p11 / p).ln()
    }
}

/// Geopotential height (gpm) at pressure p (hPa), latitude and longitude (degrees), lead hours.
pub fn height(p: f64, lat: f64, lon: f64, lead: f64) -> f64 {
    let lnr = (1000.0 / p).ln();
    // Baroclinic zone: the height falls poleward, more with altitude (thermal wind),
    // tapering above 250 hPa where the jet has its core.
    let depth = if p >= 250.0 {
        lnr
    } else {
        (1000.0f64 / 250.0).ln() * (p / 250.0).powf(0.6)
    };
    let jet = -240.0 * depth * ((lat - 47.0) / 7.0).tanh();
    // An upper trough moving east at 12 m/s, deepening with height.
    let lon_c = -20.0
        + 12.0 * lead * 3600.0 / (EARTH_RADIUS * 47f64.to_radians().cos()) * 180.0
            / std::f64::consts::PI;
    let (dl, dp) = (lon - lon_c, lat - 50.0);
    let trough =
        -140.0 * depth.min(1.4) * (-(dl * dl) / (8.0 * 8.0) - (dp * dp) / (7.0 * 7.0)).exp();
    standard_height(p) + jet + trough
}

/// One level of a step: (level hPa, temperature K, height gpm, grid-relative u and v m/s),
/// each field with rows south to north.
pub type LevelFields = (f64, Vec<f64>, Vec<f64>, Vec<f64>, Vec<f64>);

/// One step of the scenario on its grid.
pub struct StepFields {
    /// Every level, from the bottom up.
    pub levels: Vec<LevelFields>,
}

/// Compute every field of one step.
pub fn step(lead: f64) -> StepFields {
    let GridSpec::Lambert {
        nx,
        ny,
        lat1,
        lon1,
        dx,
        dy,
        lov,
        latin1,
        latin2,
    } = GRID
    else {
        return StepFields { levels: Vec::new() };
    };
    let earth = Earth::sphere(EARTH_RADIUS);
    let proj = Conformal::Lambert {
        lat1: latin1,
        lat2: latin2,
        lat0: latin1,
        lon0: lov,
    };
    let (x0, y0) = proj.forward(&earth, lat1, lon1);
    let mut points = Vec::with_capacity(nx * ny);
    for j in 0..ny {
        for i in 0..nx {
            let (la, lo) = proj.inverse(&earth, x0 + i as f64 * dx, y0 + j as f64 * dy);
            points.push((la, lo, proj.grid_rotation(&earth, la, lo)));
        }
    }
    let d = 0.01; // degrees, for centred differences of the analytic heights
    let levels = LEVELS_HPA
        .iter()
        .map(|&p| {
            let mut t = Vec::with_capacity(points.len());
            let mut z = Vec::with_capacity(points.len());
            let mut u = Vec::with_capacity(points.len());
            let mut v = Vec::with_capacity(points.len());
            for &(la, lo, alpha) in &points {
                z.push(height(p, la, lo, lead));
                // Hydrostatic: T = -(g/R) dZ/d ln p.
                let e = 1e-3;
                let dz = height(p * (1.0 + e), la, lo, lead) - height(p * (1.0 - e), la, lo, lead);
                let dlnp = ((1.0 + e) / (1.0 - e)).ln();
                t.push(-G0 / R_DRY * dz / dlnp);
                // Geostrophic wind on the sphere, earth-relative.
                let f = 2.0 * OMEGA * la.to_radians().sin();
                let dzdphi = (height(p, la + d, lo, lead) - height(p, la - d, lo, lead))
                    / (2.0 * d.to_radians());
                let dzdlam = (height(p, la, lo + d, lead) - height(p, la, lo - d, lead))
                    / (2.0 * d.to_radians());
                let ue = -G0 / f * dzdphi / EARTH_RADIUS;
                let ve = G0 / f * dzdlam / (EARTH_RADIUS * la.to_radians().cos());
                // Into the grid's axes (alpha: angle from east to grid x).
                let (s, c) = alpha.sin_cos();
                u.push(ue * c + ve * s);
                v.push(-ue * s + ve * c);
            }
            (p, t, z, u, v)
        })
        .collect();
    StepFields { levels }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn standard_heights_match_the_handbook() {
        // US Standard Atmosphere 1976 values in REFERENCES.md.
        for (p, z) in [
            (1000.0, 110.9),
            (850.0, 1457.3),
            (500.0, 5574.4),
            (200.0, 11784.0),
            (100.0, 16179.7),
        ] {
            assert!(
                (standard_height(p) - z).abs() < 1.0,
                "{p}: {} vs {z}",
                standard_height(p)
            );
        }
    }

    #[test]
    fn the_scenario_is_hydrostatic_and_realistic() {
        let s = step(0.0);
        for (p, t, z, u, _) in &s.levels {
            let tmin = t.iter().copied().fold(f64::INFINITY, f64::min);
            let tmax = t.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            assert!(tmin > 190.0 && tmax < 320.0, "{p} hPa: T {tmin}..{tmax}");
            assert!(z.iter().all(|v| v.is_finite()));
            let umax = u.iter().copied().fold(0.0f64, |a, b| a.max(b.abs()));
            assert!(umax < 90.0, "{p} hPa: |u| up to {umax}");
        }
    }
}
