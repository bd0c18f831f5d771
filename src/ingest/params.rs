//! The quantities leeward knows, by their WMO GRIB2 numbers.
//!
//! In: discipline (code table 0.0), parameter category (4.1) and number (4.2).
//! Out: a [`Quantity`], or `None` for everything leeward does not use.
//! One table, here, decides this for the whole program.
//!
//! Source: WMO-No. 306, Manual on Codes, code table 4.2 (discipline 0,
//! meteorological products; discipline 2, land surface products).

/// A physical quantity leeward reads from GRIB2.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Quantity {
    /// Air temperature, K (0/0/0).
    Temperature,
    /// Specific humidity, kg kg-1 (0/1/0).
    SpecificHumidity,
    /// Relative humidity, % (0/1/1).
    RelativeHumidity,
    /// Wind component along x (east or grid x), m s-1 (0/2/2).
    WindU,
    /// Wind component along y (north or grid y), m s-1 (0/2/3).
    WindV,
    /// Absolute vorticity, s-1 (0/2/10).
    AbsoluteVorticity,
    /// Relative vorticity, s-1 (0/2/12).
    RelativeVorticity,
    /// Potential vorticity, K m2 kg-1 s-1 (0/2/14).
    PotentialVorticity,
    /// Pressure, Pa (0/3/0).
    Pressure,
    /// Pressure reduced to mean sea level, Pa (0/3/1).
    MeanSeaLevelPressure,
    /// Geopotential, m2 s-2 (0/3/4).
    Geopotential,
    /// Geopotential height, gpm (0/3/5).
    GeopotentialHeight,
    /// Geometric height, m (0/3/6).
    GeometricHeight,
    /// Model terrain height, m (2/0/7).
    TerrainHeight,
}

impl Quantity {
    /// Look up a field's quantity from its WMO numbers.
    pub fn from_wmo(discipline: u8, category: u8, number: u8) -> Option<Quantity> {
        use Quantity::*;
        Some(match (discipline, category, number) {
            (0, 0, 0) => Temperature,
            (0, 1, 0) => SpecificHumidity,
            (0, 1, 1) => RelativeHumidity,
            (0, 2, 2) => WindU,
            (0, 2, 3) => WindV,
            (0, 2, 10) => AbsoluteVorticity,
            (0, 2, 12) => RelativeVorticity,
            (0, 2, 14) => PotentialVorticity,
            (0, 3, 0) => Pressure,
            (0, 3, 1) => MeanSeaLevelPressure,
            (0, 3, 4) => Geopotential,
            (0, 3, 5) => GeopotentialHeight,
            (0, 3, 6) => GeometricHeight,
            (2, 0, 7) => TerrainHeight,
            _ => return None,
        })
    }

    /// leeward's own short name for the quantity, used in logs and listings.
    pub fn name(self) -> &'static str {
        use Quantity::*;
        match self {
            Temperature => "temperature",
            SpecificHumidity => "specific humidity",
            RelativeHumidity => "relative humidity",
            WindU => "wind x-component",
            WindV => "wind y-component",
            AbsoluteVorticity => "absolute vorticity",
            RelativeVorticity => "relative vorticity",
            PotentialVorticity => "potential vorticity",
            Pressure => "pressure",
            MeanSeaLevelPressure => "pressure reduced to mean sea level",
            Geopotential => "geopotential",
            GeopotentialHeight => "geopotential height",
            GeometricHeight => "geometric height",
            TerrainHeight => "terrain height",
        }
    }

    /// Units of the quantity as GRIB2 codes it.
    pub fn units(self) -> &'static str {
        use Quantity::*;
        match self {
            Temperature => "K",
            SpecificHumidity => "kg kg-1",
            RelativeHumidity => "%",
            WindU | WindV => "m s-1",
            AbsoluteVorticity | RelativeVorticity => "s-1",
            PotentialVorticity => "K m2 kg-1 s-1",
            Pressure | MeanSeaLevelPressure => "Pa",
            Geopotential => "m2 s-2",
            GeopotentialHeight => "gpm",
            GeometricHeight | TerrainHeight => "m",
        }
    }
}

/// Type of fixed surface, code table 4.5, for the kinds leeward reads.
pub mod surface {
    /// Ground or water surface.
    pub const GROUND: u8 = 1;
    /// Isobaric surface, value in Pa.
    pub const ISOBARIC: u8 = 100;
    /// Mean sea level.
    pub const MEAN_SEA_LEVEL: u8 = 101;
    /// Isentropic (theta) level, value in K.
    pub const ISENTROPIC: u8 = 107;
    /// Potential vorticity surface, value in K m2 kg-1 s-1.
    pub const POTENTIAL_VORTICITY: u8 = 109;

    /// A short description of a surface kind, for listings and messages.
    pub fn describe(kind: u8) -> &'static str {
        match kind {
            GROUND => "ground surface",
            ISOBARIC => "isobaric",
            MEAN_SEA_LEVEL => "mean sea level",
            103 => "height above ground",
            ISENTROPIC => "isentropic",
            POTENTIAL_VORTICITY => "potential vorticity surface",
            7 => "tropopause",
            6 => "maximum wind level",
            200 => "entire atmosphere",
            _ => "other surface",
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wmo_numbers_from_code_table_4_2() {
        // WMO-No. 306 code table 4.2 as listed in docs/references.md.
        assert_eq!(Quantity::from_wmo(0, 0, 0), Some(Quantity::Temperature));
        assert_eq!(
            Quantity::from_wmo(0, 3, 5),
            Some(Quantity::GeopotentialHeight)
        );
        assert_eq!(
            Quantity::from_wmo(0, 2, 10),
            Some(Quantity::AbsoluteVorticity)
        );
        assert_eq!(
            Quantity::from_wmo(0, 2, 14),
            Some(Quantity::PotentialVorticity)
        );
        assert_eq!(
            Quantity::from_wmo(0, 3, 1),
            Some(Quantity::MeanSeaLevelPressure)
        );
        assert_eq!(Quantity::from_wmo(0, 1, 8), None);
        assert_eq!(Quantity::from_wmo(10, 0, 3), None);
    }
}
