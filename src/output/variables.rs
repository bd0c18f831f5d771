//! The table of every variable leeward writes: name, CF standard name, units,
//! long name. One table in one file, so that the writer, the docs and the
//! tests agree.
//!
//! Standard names from the CF Standard Name Table, version 93.
//!
//! The variables of the changes in time are in [`changes`], those of the PV
//! budget in [`budget`].

pub mod budget;
pub mod changes;

/// How one output variable is described in the file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct VarSpec {
    /// Variable name in the file (our own, short and plain).
    pub name: &'static str,
    /// CF standard name, when the table has one.
    pub standard_name: Option<&'static str>,
    /// Long name.
    pub long_name: &'static str,
    /// Units (UDUNITS).
    pub units: &'static str,
    /// Formula and source, written to the variable's `comment`.
    pub formula: &'static str,
}

/// Relative vorticity on isobaric levels.
pub const ZETA: VarSpec = VarSpec {
    name: "zeta",
    standard_name: Some("atmosphere_upward_relative_vorticity"),
    long_name: "relative vorticity",
    units: "s-1",
    formula: "zeta = (1/(a cos phi)) (dv/dlambda - d(u cos phi)/dphi) on latitude/longitude grids; zeta = m^2 (d(v/m)/dx - d(u/m)/dy) on conformal projections (Holton; Snyder 1987)",
};

/// Absolute vorticity on isobaric levels.
pub const ETA: VarSpec = VarSpec {
    name: "eta",
    standard_name: Some("atmosphere_upward_absolute_vorticity"),
    long_name: "absolute vorticity",
    units: "s-1",
    formula: "eta = zeta + f, f = 2 Omega sin(latitude), Omega = 7.292115e-5 s-1",
};

/// Horizontal divergence on isobaric levels.
pub const DIV: VarSpec = VarSpec {
    name: "div",
    standard_name: Some("divergence_of_wind"),
    long_name: "horizontal divergence",
    units: "s-1",
    formula: "D = (1/(a cos phi)) (du/dlambda + d(v cos phi)/dphi) on latitude/longitude grids; D = m^2 (d(u/m)/dx + d(v/m)/dy) on conformal projections (Holton; Haltiner and Williams 1980)",
};

/// Potential temperature on isobaric levels.
pub const THETA: VarSpec = VarSpec {
    name: "theta",
    standard_name: Some("air_potential_temperature"),
    long_name: "potential temperature",
    units: "K",
    formula:
        "theta = T (p0/p)^kappa, p0 = 1000 hPa, kappa = R/cp = 287.05/1004.6 (Poisson's equation)",
};

/// Static stability -dtheta/dp on isobaric levels.
pub const STAB: VarSpec = VarSpec {
    name: "stab",
    standard_name: None,
    long_name: "static stability as minus the pressure derivative of potential temperature",
    units: "K Pa-1",
    formula: "-dtheta/dp = -(1/p) dtheta/dln(p), three-point differences in ln p on uneven levels, one-sided at the ends (Bluestein 1992)",
};

/// Squared Brunt-Vaisala frequency on isobaric levels.
pub const N2: VarSpec = VarSpec {
    name: "n2",
    standard_name: Some("square_of_brunt_vaisala_frequency_in_air"),
    long_name: "squared Brunt-Vaisala frequency",
    units: "s-2",
    formula: "N^2 = -(g^2 p/(R T theta)) dtheta/dp (hydrostatic form; Bluestein 1992)",
};

/// Ertel PV on isobaric levels, full form.
pub const PV: VarSpec = VarSpec {
    name: "pv",
    standard_name: Some("ertel_potential_vorticity"),
    long_name: "Ertel potential vorticity on isobaric levels (1 PVU = 1e-6 K m2 kg-1 s-1)",
    units: PV_UNITS,
    formula: "P = -g [ (zeta_p + f) dtheta/dp - (dv/dp)(dtheta/dx) + (du/dp)(dtheta/dy) ] (Bluestein 1992)",
};

/// Potential vorticity in SI units, the canonical units of the CF standard
/// name: every reader parses them (UDUNITS, cf_units, pint, GDAL), unlike a
/// scaled unit such as "1e-6 K m2 kg-1 s-1", which pint refuses. The PVU
/// (1e-6 of this) is said in the long names and used in quicklooks.
pub const PV_UNITS: &str = "K m2 kg-1 s-1";

/// Values of PV in PVU times this are in [`PV_UNITS`].
pub const PVU: f64 = 1e-6;

/// PV in PVU (the unit of the diagnostics and the configuration) as written.
pub fn pvu_to_si(pvu: f64) -> f64 {
    // Dividing by the exact 1e6 rounds once: 2 PVU is written as the double nearest 2e-6.
    pvu / 1e6
}

/// CF 1.11 `units_metadata` (section 3.1.3) for a variable in `units` with
/// CF standard name `standard_name`: a temperature on its scale, or a
/// temperature difference inside compound units (PV, static stability).
pub fn units_metadata(units: &str, standard_name: Option<&str>) -> Option<&'static str> {
    let has_kelvin = units.split_whitespace().any(|t| {
        t.strip_prefix('K').is_some_and(|r| {
            r.is_empty()
                || r.trim_start_matches('-')
                    .bytes()
                    .all(|b| b.is_ascii_digit())
        })
    });
    match (units, standard_name) {
        ("K", Some(n)) if n.contains("difference") || n.contains("anomaly") => {
            Some("temperature: difference")
        }
        ("K", _) => Some("temperature: on_scale"),
        _ if has_kelvin => Some("temperature: difference"),
        _ => None,
    }
}

/// Pressure on isentropic surfaces.
pub const ISEN_P: VarSpec = VarSpec {
    name: "isen_p",
    standard_name: Some("air_pressure"),
    long_name: "pressure on isentropic surfaces",
    units: "Pa",
    formula: "ln p linear in ln theta between the two isobaric levels that bracket the surface, searched from the top down (Ziv and Alpert 1994)",
};

/// Geopotential height on isentropic surfaces.
pub const ISEN_Z: VarSpec = VarSpec {
    name: "isen_z",
    standard_name: Some("geopotential_height"),
    long_name: "geopotential height on isentropic surfaces",
    units: "m",
    formula: "isobaric geopotential height interpolated linearly in ln p",
};

/// Temperature on isentropic surfaces.
pub const ISEN_T: VarSpec = VarSpec {
    name: "isen_t",
    standard_name: Some("air_temperature"),
    long_name: "temperature on isentropic surfaces",
    units: "K",
    formula: "T = theta (p/p0)^kappa at the surface's pressure (Poisson's equation)",
};

/// Montgomery streamfunction on isentropic surfaces.
pub const ISEN_M: VarSpec = VarSpec {
    name: "isen_m",
    standard_name: None,
    long_name: "Montgomery streamfunction on isentropic surfaces",
    units: "m2 s-2",
    formula:
        "M = cp T + g z (Montgomery 1937); its gradient drives the geostrophic wind on the surface",
};

/// Ertel PV on isentropic surfaces.
pub const ISEN_PV: VarSpec = VarSpec {
    name: "isen_pv",
    standard_name: Some("ertel_potential_vorticity"),
    long_name: "Ertel potential vorticity on isentropic surfaces (1 PVU = 1e-6 K m2 kg-1 s-1)",
    units: PV_UNITS,
    formula: "P = -g (zeta_theta + f) dtheta/dp, zeta_theta from the winds on the surface, dtheta/dp of the bracketing layer (Hoskins, McIntyre and Robertson 1985)",
};

/// Wind components on a surface: earth-relative and grid-relative variants.
pub const WIND_U_EARTH: (&str, &str) = ("eastward_wind", "eastward wind");
/// Northward component.
pub const WIND_V_EARTH: (&str, &str) = ("northward_wind", "northward wind");
/// Grid x component.
pub const WIND_U_GRID: (&str, &str) = ("x_wind", "wind along the grid's x axis");
/// Grid y component.
pub const WIND_V_GRID: (&str, &str) = ("y_wind", "wind along the grid's y axis");

/// A wind component variable on some surface: `name`, component names, what surface.
pub const fn wind(
    name: &'static str,
    comp: (&'static str, &'static str),
    long_name: &'static str,
) -> VarSpec {
    VarSpec {
        name,
        standard_name: Some(comp.0),
        long_name,
        units: "m s-1",
        formula: comp.1,
    }
}

/// Pressure of the dynamic tropopause.
pub const TROP_P: VarSpec = VarSpec {
    name: "trop_p",
    standard_name: Some("air_pressure"),
    long_name: "pressure of the dynamic tropopause (the lower of the PV surface and the bound isentrope)",
    units: "Pa",
    formula: "uppermost crossing, from the top of the column down, from stratospheric air (|PV| >= value, +value north and -value south, or theta >= the bound in leeward_theta_bound) to tropospheric air; the PV surface linear in PV and the isentrope linear in ln theta, placed in ln p; missing where the top of the column is not stratospheric (Hoskins, McIntyre and Robertson 1985; docs/references.md)",
};

/// Potential temperature of the dynamic tropopause.
pub const TROP_THETA: VarSpec = VarSpec {
    name: "trop_theta",
    standard_name: Some("dynamic_tropopause_potential_temperature"),
    long_name: "potential temperature of the dynamic tropopause",
    units: "K",
    formula: "ln theta linear in ln p at trop_p; equal to the bound (leeward_theta_bound) where the isentrope is the lower surface",
};

/// Crossings of the tropopause criterion in a column.
pub const TROP_CROSSINGS: VarSpec = VarSpec {
    name: "trop_crossings",
    standard_name: None,
    long_name: "number of crossings between stratospheric and tropospheric air in the column, from the top down",
    units: "1",
    formula: "the first crossing (trop_p) and every later one above the fold search's bottom (leeward_fold_search_bottom, and 100 hPa above the lowest level with data); 3 or more: the column folds (Sprenger, Croci Maspoli and Wernli 2003; docs/references.md)",
};

/// Lowest crossing with stratospheric air above.
pub const TROP_P_LOW: VarSpec = VarSpec {
    name: "trop_p_low",
    standard_name: Some("air_pressure"),
    long_name: "pressure of the lowest crossing from stratospheric air above to tropospheric air below",
    units: "Pa",
    formula: "the lowest counted crossing into the troposphere (the base of a fold); equal to trop_p where the column does not fold",
};

/// Depth of a tropopause fold.
pub const TROP_FOLD_DP: VarSpec = VarSpec {
    name: "trop_fold_dp",
    standard_name: None,
    long_name: "tropopause fold depth: pressure between the uppermost and the lowest crossing",
    units: "Pa",
    formula: "trop_p_low - trop_p where trop_crossings >= 3, 0 where the column does not fold, missing where there is no tropopause (Sprenger, Croci Maspoli and Wernli 2003; docs/references.md)",
};

/// Geopotential height of the dynamic tropopause.
pub const TROP_Z: VarSpec = VarSpec {
    name: "trop_z",
    standard_name: Some("geopotential_height"),
    long_name: "geopotential height of the dynamic tropopause",
    units: "m",
    formula: "isobaric geopotential height interpolated to the PV surface linearly in ln p",
};

/// Layer PV in column-depth form.
pub const LAYER_PV: VarSpec = VarSpec {
    name: "layer_pv",
    standard_name: Some("potential_vorticity_of_atmosphere_layer"),
    long_name: "potential vorticity of the isentropic layer (absolute vorticity over pressure depth)",
    units: "Pa-1 s-1",
    formula: "(zeta + f)/(p_bottom - p_top), zeta of the layer's mass-weighted mean wind; conserved by a column without heating or friction",
};

/// Pressure depth of an isentropic layer.
pub const LAYER_DP: VarSpec = VarSpec {
    name: "layer_dp",
    standard_name: None,
    long_name: "pressure depth of the isentropic layer",
    units: "Pa",
    formula: "p(bottom theta) - p(top theta), both from the isentropic interpolation",
};

/// Geopotential height on isobaric levels (as decoded, masked below ground).
pub const Z: VarSpec = VarSpec {
    name: "z",
    standard_name: Some("geopotential_height"),
    long_name: "geopotential height of the isobaric level",
    units: "m",
    formula: "from the input (gpm), or geopotential / 9.80665",
};

/// Thickness of an isobaric layer.
pub const THICK: VarSpec = VarSpec {
    name: "thick",
    standard_name: Some("atmosphere_layer_thickness_expressed_as_geopotential_height_difference"),
    long_name: "thickness of the isobaric layer",
    units: "m",
    formula: "z(top) - z(bottom) from geopotential height where both levels have it, else (R/g0) integral Tv dln p (hypsometric equation), ln Tv linear in ln p between levels; the method per layer is in leeward_method",
};

/// Mean sea-level pressure, from the input or reduced from the 1000 hPa height.
pub const MSLP: VarSpec = VarSpec {
    name: "mslp",
    standard_name: Some("air_pressure_at_mean_sea_level"),
    long_name: "pressure reduced to mean sea level",
    units: "Pa",
    formula: "from the input (WMO 0/3/1 at mean sea level), or, where the input has none, from the 1000 hPa height: p = 1000 hPa exp(g0 z1000 / (R T1000)) (hypsometric equation); the source is in leeward_method",
};

/// Terrain height of the model, as the input gives it.
pub const OROG: VarSpec = VarSpec {
    name: "orog",
    standard_name: Some("surface_altitude"),
    long_name: "height of the model's terrain",
    units: "m",
    formula:
        "from the input: terrain or surface geopotential height, or surface geopotential / 9.80665",
};

/// Steering wind of the cyclone tracks: east component.
pub const STEER_U: VarSpec = VarSpec {
    name: "steer_u",
    standard_name: Some("eastward_wind"),
    long_name: "pressure-weighted mean eastward wind of the steering layer",
    units: "m s-1",
    formula: "(1/(p_bottom - p_top)) integral u dp over the layer in cyclones.steering_layer_hpa, trapezoidal, toward east whatever the input's axes; the layer is the bounds of its vertical coordinate (and in leeward_layer_hpa)",
};

/// Steering wind of the cyclone tracks: north component.
pub const STEER_V: VarSpec = VarSpec {
    name: "steer_v",
    standard_name: Some("northward_wind"),
    long_name: "pressure-weighted mean northward wind of the steering layer",
    units: "m s-1",
    formula: "(1/(p_bottom - p_top)) integral v dp over the layer in cyclones.steering_layer_hpa, trapezoidal, toward north whatever the input's axes; the layer is the bounds of its vertical coordinate (and in leeward_layer_hpa)",
};

/// Maximum Eady growth rate of an isobaric layer.
pub const EADY: VarSpec = VarSpec {
    name: "eady",
    standard_name: None,
    long_name: "maximum Eady growth rate of the isobaric layer",
    units: "s-1",
    formula: "sigma = 0.31 |f| |V_top - V_bottom| / (dz N), N^2 = g ln(theta_top/theta_bottom) / dz, dz = z_top - z_bottom (Lindzen and Farrell 1980; Hoskins and Valdes 1990); the layer is the bounds of its vertical coordinate (and in leeward_layer_hpa)",
};

/// Equivalent potential temperature on isobaric levels.
pub const THETA_E: VarSpec = VarSpec {
    name: "theta_e",
    standard_name: Some("air_pseudo_equivalent_potential_temperature"),
    long_name: "equivalent potential temperature (pseudo-adiabatic)",
    units: "K",
    formula: "theta_e = T (p0/(p - e))^kappa (T/T_L)^(0.28 r) exp[(3.036/T_L - 0.00178) r (1 + 0.448e-3 r)], r in g/kg, T_L = 2840/(3.5 ln T - ln e - 4.805) + 55, e in hPa (Bolton 1980, equations 39 and 22), kappa = 287.05/1004.6",
};

/// Specific humidity on isentropic surfaces.
pub const ISEN_Q: VarSpec = VarSpec {
    name: "isen_q",
    standard_name: Some("specific_humidity"),
    long_name: "specific humidity on isentropic surfaces",
    units: "kg kg-1",
    formula: "q = epsilon e / (p - (1 - epsilon) e), e = RH e_s(T), at the surface's pressure and temperature, RH from isen_rh, e_s = 611.2 exp(17.67 (T - 273.15)/(T - 29.65)) Pa (Bolton 1980), epsilon = 0.622",
};

/// Relative humidity on isentropic surfaces.
pub const ISEN_RH: VarSpec = VarSpec {
    name: "isen_rh",
    standard_name: Some("relative_humidity"),
    long_name: "relative humidity over water on isentropic surfaces",
    units: "%",
    formula: "isobaric relative humidity over water (from the input, or 100 e / e_s(T) from its specific humidity) interpolated linearly in ln p to the surface",
};

/// Mass-weighted mean isobaric PV of a low-level layer.
pub const LOW_PV: VarSpec = VarSpec {
    name: "low_pv",
    standard_name: None,
    long_name: "mass-weighted mean Ertel potential vorticity of the low-level isobaric layer (1 PVU = 1e-6 K m2 kg-1 s-1)",
    units: PV_UNITS,
    formula: "(1/(p_bottom - p_top)) integral pv dp over the layer (the bounds of its vertical coordinate), trapezoidal on the isobaric levels, bounds linear in ln p; over the part of the layer above ground when that is at least half of it",
};

/// Every data variable of the isobaric diagnostics, in the order written.
pub const ISOBARIC: [VarSpec; 6] = [ZETA, ETA, THETA, STAB, N2, PV];

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_unique_and_units_present() {
        let mut names: Vec<_> = ISOBARIC.iter().map(|v| v.name).collect();
        names.sort_unstable();
        names.dedup();
        assert_eq!(names.len(), ISOBARIC.len());
        assert!(ISOBARIC
            .iter()
            .all(|v| !v.units.is_empty() && !v.long_name.is_empty()));
    }

    #[test]
    fn temperatures_say_whether_they_are_on_scale_or_differences() {
        // CF 1.11 section 3.1.3.
        assert_eq!(
            units_metadata("K", Some("air_temperature")),
            Some("temperature: on_scale")
        );
        assert_eq!(units_metadata("K", None), Some("temperature: on_scale"));
        assert_eq!(
            units_metadata(PV_UNITS, Some("ertel_potential_vorticity")),
            Some("temperature: difference")
        );
        assert_eq!(
            units_metadata("K Pa-1", None),
            Some("temperature: difference")
        );
        assert_eq!(units_metadata("K2", None), Some("temperature: difference"));
        assert_eq!(units_metadata("kg m-2", None), None);
        assert_eq!(units_metadata("Pa", Some("air_pressure")), None);
        assert_eq!(pvu_to_si(2.0), 2e-6);
        assert_eq!(pvu_to_si(1.5), 1.5e-6);
    }
}
