//! The quantities leeward knows, by their WMO GRIB2 numbers, and the names of
//! every field and fixed surface from the WMO code tables.
//!
//! In: discipline (code table 0.0), parameter category (4.1) and number (4.2),
//! or a type of fixed surface (4.5). Out: a [`Quantity`] for what leeward
//! computes with (`None` for everything else), and for any field its name in
//! the standard's own words, "local use" for the numbers the standard leaves
//! to each centre ([`naming`]). The feed `require` words are read here too
//! ([`param_from_words`]). One table decides this for the whole program: the
//! generated [`super::wmo_tables`] (tools/wmo_tables.py).
//!
//! Source: WMO-No. 306, Manual on Codes, Vol. I.2, code tables 0.0, 4.1, 4.2
//! and 4.5 (the machine-readable edition, docs/references.md).

use super::wmo_tables::{
    Parameter, CATEGORIES, CATEGORIES_LOCAL, DISCIPLINES, DISCIPLINES_LOCAL, PARAMETERS,
    PARAMETERS_LOCAL, SURFACES, SURFACES_LOCAL,
};

/// A field's WMO identity: discipline, parameter category, parameter number.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Param {
    /// Discipline (code table 0.0).
    pub discipline: u8,
    /// Parameter category (code table 4.1).
    pub category: u8,
    /// Parameter number (code table 4.2).
    pub number: u8,
}

impl Param {
    /// The parameter discipline/category/number.
    pub const fn new(discipline: u8, category: u8, number: u8) -> Param {
        Param {
            discipline,
            category,
            number,
        }
    }
}

impl std::fmt::Display for Param {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}/{}", self.discipline, self.category, self.number)
    }
}

/// What the WMO tables say of a field's numbers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Naming {
    /// A parameter of the standard, with its name and units.
    Standard(&'static Parameter),
    /// A number the standard reserves for local use (in its discipline,
    /// category or parameter table): its meaning is the centre's own.
    LocalUse,
    /// Neither: a number this edition of the tables does not list (a newer
    /// edition, or a reserved number).
    Unlisted,
}

impl Naming {
    /// The words `leeward inspect` prints: the standard's name, "local use",
    /// or "not in the WMO tables".
    pub fn words(&self) -> &'static str {
        match self {
            Naming::Standard(p) => p.name,
            Naming::LocalUse => "local use",
            Naming::Unlisted => "not in the WMO tables",
        }
    }
}

fn in_ranges(x: u8, ranges: impl IntoIterator<Item = (u8, u8)>) -> bool {
    ranges.into_iter().any(|(lo, hi)| (lo..=hi).contains(&x))
}

/// The standard's entry for `p`, if it has one.
pub fn parameter(p: Param) -> Option<&'static Parameter> {
    PARAMETERS
        .binary_search_by_key(&(p.discipline, p.category, p.number), |e| {
            (e.discipline, e.category, e.number)
        })
        .ok()
        .map(|i| &PARAMETERS[i])
}

/// What the tables say of `p` (see [`Naming`]).
pub fn naming(p: Param) -> Naming {
    if let Some(e) = parameter(p) {
        return Naming::Standard(e);
    }
    let local = in_ranges(p.discipline, DISCIPLINES_LOCAL.iter().copied())
        || in_ranges(
            p.category,
            CATEGORIES_LOCAL
                .iter()
                .filter(|c| c.0 == p.discipline)
                .map(|c| (c.1, c.2)),
        )
        || in_ranges(
            p.number,
            PARAMETERS_LOCAL
                .iter()
                .filter(|c| (c.0, c.1) == (p.discipline, p.category))
                .map(|c| (c.2, c.3)),
        );
    if local {
        Naming::LocalUse
    } else {
        Naming::Unlisted
    }
}

/// Name of a discipline (code table 0.0).
pub fn discipline_name(d: u8) -> Option<&'static str> {
    DISCIPLINES.iter().find(|e| e.0 == d).map(|e| e.1)
}

/// Name of a parameter category of a discipline (code table 4.1).
pub fn category_name(d: u8, c: u8) -> Option<&'static str> {
    CATEGORIES
        .binary_search_by_key(&(d, c), |e| (e.0, e.1))
        .ok()
        .map(|i| CATEGORIES[i].2)
}

/// Fold text for comparing quantity words: lower case, single spaces.
fn fold(s: &str) -> String {
    s.split_whitespace()
        .collect::<Vec<_>>()
        .join(" ")
        .to_lowercase()
}

/// Short names of one centre's parameter database that an older
/// configuration may hold, with the quantity each meant.
const OLD_SHORT_NAMES: [(&str, Param); 6] = [
    ("t", Param::new(0, 0, 0)),
    ("u", Param::new(0, 2, 2)),
    ("v", Param::new(0, 2, 3)),
    ("gh", Param::new(0, 3, 5)),
    ("q", Param::new(0, 1, 0)),
    ("r", Param::new(0, 1, 1)),
];

/// The parameter a feed's `require` entry names: WMO numbers written
/// `discipline/category/number` (`0/0/0`), or the parameter's name in the
/// standard's words as `leeward inspect` prints it (`Temperature`,
/// `u-component of wind`; case and runs of spaces do not matter). A name
/// found in more than one table is taken from its operational entry, and
/// then from discipline 0 (meteorological products), when that leaves one;
/// otherwise the entry is ambiguous and the error lists the numbers to write.
pub fn param_from_words(words: &str) -> Result<Param, String> {
    let w = words.trim();
    let nums: Vec<&str> = w.split('/').map(str::trim).collect();
    if nums.len() == 3
        && nums
            .iter()
            .all(|x| !x.is_empty() && x.bytes().all(|b| b.is_ascii_digit()))
    {
        let n: Vec<u8> = nums.iter().filter_map(|x| x.parse().ok()).collect();
        if n.len() != 3 {
            return Err(format!("{w:?}: each WMO number is 0 to 255"));
        }
        let p = Param::new(n[0], n[1], n[2]);
        return match naming(p) {
            Naming::Unlisted => Err(format!(
                "{w:?}: no such parameter in the WMO tables (and not a number for local use)"
            )),
            _ => Ok(p),
        };
    }
    if let Some((_, p)) = OLD_SHORT_NAMES.iter().find(|(s, _)| *s == w) {
        let name = parameter(*p).map_or("", |e| e.name);
        return Err(format!(
            "{w:?} is not a quantity word; write {name:?} or {p} (the WMO name or numbers that `leeward inspect` prints)"
        ));
    }
    let f = fold(w);
    let mut found: Vec<&Parameter> = PARAMETERS.iter().filter(|e| fold(e.name) == f).collect();
    if found.len() > 1 && found.iter().any(|e| !e.deprecated) {
        found.retain(|e| !e.deprecated);
    }
    if found.len() > 1 && found.iter().any(|e| e.discipline == 0) {
        found.retain(|e| e.discipline == 0);
    }
    match found.as_slice() {
        [e] => Ok(Param::new(e.discipline, e.category, e.number)),
        [] => Err(format!(
            "{w:?}: no WMO parameter of that name; write the name `leeward inspect` prints (e.g. \"Temperature\") or discipline/category/number (e.g. 0/0/0)"
        )),
        many => Err(format!(
            "{w:?}: several WMO parameters have that name ({}); write the numbers of the one meant",
            many.iter()
                .map(|e| format!("{}/{}/{}", e.discipline, e.category, e.number))
                .collect::<Vec<_>>()
                .join(", ")
        )),
    }
}

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
    /// Every quantity leeward computes with.
    pub const ALL: [Quantity; 14] = {
        use Quantity::*;
        [
            Temperature,
            SpecificHumidity,
            RelativeHumidity,
            WindU,
            WindV,
            AbsoluteVorticity,
            RelativeVorticity,
            PotentialVorticity,
            Pressure,
            MeanSeaLevelPressure,
            Geopotential,
            GeopotentialHeight,
            GeometricHeight,
            TerrainHeight,
        ]
    };

    /// Look up a field's quantity from its WMO numbers.
    pub fn from_wmo(discipline: u8, category: u8, number: u8) -> Option<Quantity> {
        let p = Param::new(discipline, category, number);
        Quantity::ALL.into_iter().find(|q| q.param() == p)
    }

    /// The quantity's WMO numbers.
    pub fn param(self) -> Param {
        use Quantity::*;
        let (d, c, n) = match self {
            Temperature => (0, 0, 0),
            SpecificHumidity => (0, 1, 0),
            RelativeHumidity => (0, 1, 1),
            WindU => (0, 2, 2),
            WindV => (0, 2, 3),
            AbsoluteVorticity => (0, 2, 10),
            RelativeVorticity => (0, 2, 12),
            PotentialVorticity => (0, 2, 14),
            Pressure => (0, 3, 0),
            MeanSeaLevelPressure => (0, 3, 1),
            Geopotential => (0, 3, 4),
            GeopotentialHeight => (0, 3, 5),
            GeometricHeight => (0, 3, 6),
            TerrainHeight => (2, 0, 7),
        };
        Param::new(d, c, n)
    }

    /// The quantity's name in the standard's words (code table 4.2), as
    /// `leeward inspect` prints it and a feed's `require` takes it.
    pub fn name(self) -> &'static str {
        parameter(self.param()).map_or("?", |e| e.name)
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

/// Type of fixed surface, code table 4.5.
pub mod surface {
    use super::{in_ranges, SURFACES, SURFACES_LOCAL};

    /// Ground or water surface.
    pub const GROUND: u8 = 1;
    /// Isobaric surface, value in Pa.
    pub const ISOBARIC: u8 = 100;
    /// Mean sea level.
    pub const MEAN_SEA_LEVEL: u8 = 101;
    /// Specified height level above ground, value in m.
    pub const HEIGHT_ABOVE_GROUND: u8 = 103;
    /// Isentropic (theta) level, value in K.
    pub const ISENTROPIC: u8 = 107;
    /// Potential vorticity surface, value in K m2 kg-1 s-1.
    pub const POTENTIAL_VORTICITY: u8 = 109;

    /// The standard's name and units of a type of fixed surface.
    pub fn entry(kind: u8) -> Option<(&'static str, &'static str)> {
        SURFACES
            .binary_search_by_key(&kind, |e| e.0)
            .ok()
            .map(|i| (SURFACES[i].1, SURFACES[i].2))
    }

    /// A type of fixed surface in words: the standard's name, or "local
    /// surface type N", or "surface type N" for one the tables do not list.
    pub fn describe(kind: u8) -> String {
        match entry(kind) {
            Some((name, _)) => name.to_string(),
            None if in_ranges(kind, SURFACES_LOCAL.iter().copied()) => {
                format!("local surface type {kind}")
            }
            None => format!("surface type {kind}"),
        }
    }

    /// A level for people: compact forms for the surfaces of the trade
    /// ("500 hPa", "320 K", "2 PVU", "2 m above ground"), otherwise the
    /// standard's name with the value and its units.
    pub fn level_text(kind: u8, value: Option<f64>) -> String {
        match (kind, value) {
            (ISOBARIC, Some(p)) => format!("{} hPa", p / 100.0),
            (ISENTROPIC, Some(t)) => format!("{t} K"),
            (POTENTIAL_VORTICITY, Some(v)) => format!("{} PVU", round_sig(v * 1e6)),
            (HEIGHT_ABOVE_GROUND, Some(h)) => format!("{h} m above ground"),
            (k, Some(v)) => match entry(k) {
                Some((name, units)) if !units.is_empty() => format!("{name} {v} {units}"),
                // A surface without units (the tropopause, mean sea level)
                // has no value to give; a centre may still write 0 there.
                Some((name, _)) if v == 0.0 => name.to_string(),
                _ => format!("{} {v}", describe(k)),
            },
            (k, None) => describe(k),
        }
    }

    /// `x` to 9 significant digits, so that 2e-6 * 1e6 prints as 2.
    fn round_sig(x: f64) -> f64 {
        if x == 0.0 || !x.is_finite() {
            return x;
        }
        let e = 8 - x.abs().log10().floor() as i32;
        let k = 10f64.powi(e);
        (x * k).round() / k
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
        assert_eq!(Quantity::from_wmo(0, 1, 8), None);
        assert_eq!(Quantity::from_wmo(10, 0, 3), None);
    }

    #[test]
    fn every_quantity_has_its_standard_name() {
        // The words of WMO-No. 306 code table 4.2 (and 4.2.2.0 for terrain).
        for (q, name) in [
            (Quantity::Temperature, "Temperature"),
            (Quantity::WindU, "u-component of wind"),
            (Quantity::WindV, "v-component of wind"),
            (Quantity::GeopotentialHeight, "Geopotential height"),
            (Quantity::SpecificHumidity, "Specific humidity"),
            (Quantity::RelativeHumidity, "Relative humidity"),
            (Quantity::PotentialVorticity, "Potential vorticity"),
            (Quantity::TerrainHeight, "Model terrain height"),
        ] {
            assert_eq!(q.name(), name);
            assert_eq!(param_from_words(name), Ok(q.param()), "{name}");
        }
        for q in Quantity::ALL {
            assert!(parameter(q.param()).is_some(), "{q:?}");
            assert_eq!(
                Quantity::from_wmo(q.param().discipline, q.param().category, q.param().number),
                Some(q)
            );
        }
    }

    #[test]
    fn standard_local_and_unlisted_numbers() {
        let name = |d, c, n| naming(Param::new(d, c, n)).words();
        assert_eq!(name(0, 3, 1), "Pressure reduced to MSL");
        assert_eq!(name(0, 1, 8), "Total precipitation");
        assert_eq!(
            name(10, 0, 3),
            "Significant height of combined wind waves and swell"
        );
        // 192-254 of a table 4.2, of table 4.1 and of table 0.0 are for local use.
        assert_eq!(name(0, 3, 192), "local use");
        assert_eq!(name(0, 200, 1), "local use");
        assert_eq!(name(200, 0, 0), "local use");
        // Reserved (33-191 of table 4.2.0.0) and the missing value 255.
        assert_eq!(name(0, 0, 150), "not in the WMO tables");
        assert_eq!(name(0, 0, 255), "not in the WMO tables");
        assert_eq!(category_name(0, 3), Some("Mass"));
        assert_eq!(discipline_name(10), Some("Oceanographic products"));
        assert_eq!(surface::describe(7), "Tropopause");
        assert_eq!(surface::describe(200), "local surface type 200");
        assert_eq!(surface::level_text(100, Some(50_000.0)), "500 hPa");
        assert_eq!(surface::level_text(109, Some(-2e-6)), "-2 PVU");
        assert_eq!(
            surface::level_text(102, Some(3000.0)),
            "Specific altitude above mean sea level 3000 m"
        );
    }

    #[test]
    fn require_words_are_names_or_numbers_and_old_short_names_get_advice() {
        assert_eq!(param_from_words("  TEMPERATURE "), Ok(Param::new(0, 0, 0)));
        assert_eq!(
            param_from_words("u-component  of wind"),
            Ok(Param::new(0, 2, 2))
        );
        assert_eq!(param_from_words("0/1/1"), Ok(Param::new(0, 1, 1)));
        assert_eq!(param_from_words("0/3/192"), Ok(Param::new(0, 3, 192)));
        for (old, new) in [
            ("t", "\"Temperature\" or 0/0/0"),
            ("gh", "\"Geopotential height\" or 0/3/5"),
            ("r", "0/1/1"),
        ] {
            let e = param_from_words(old).expect_err(old);
            assert!(e.contains(new), "{e}");
        }
        // Two parameters of 0/19 share the name "Icing": both numbers are offered.
        let e = param_from_words("icing").expect_err("ambiguous");
        assert!(e.contains("0/19/7") && e.contains("0/19/20"), "{e}");
        for bad in ["winds aloft", "0/0/150", "0/0/256", "0/0", "x/y/z"] {
            assert!(param_from_words(bad).is_err(), "{bad}");
        }
    }
}
