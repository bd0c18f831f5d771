//! The table of every variable leeward writes: name, CF standard name, units,
//! long name. One table in one file, so that the writer, the docs and the
//! tests agree.
//!
//! Standard names from the CF Standard Name Table, version 93.

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

/// Every data variable of the isobaric diagnostics, in the order written.
pub const ISOBARIC: [VarSpec; 5] = [ZETA, ETA, THETA, STAB, N2];

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
}
