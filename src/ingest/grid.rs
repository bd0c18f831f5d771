//! GRIB2 grid definitions (section 3) to [`Grid`]s, and scanning-mode
//! normalisation of decoded values.
//!
//! In: the bytes of section 3. Out: a [`Grid`] in leeward's one orientation
//! (rows south to north, columns west to east) plus the [`Scan`] that maps
//! the file's value order onto it; or a [`GridError`] naming the template and
//! the reason. Never panics on any bytes.
//!
//! Template layouts: WMO-No. 306, FM 92 GRIB, templates 3.0, 3.1, 3.10, 3.20,
//! 3.30, 3.40; code tables 3.2 (shape of the earth), flag tables 3.3 and 3.4.

use thiserror::Error;

use super::bytes::{all_ones, f32_at, i32_at, i8_at, u16_at, u32_at, u8_at};
use crate::geometry::{
    gaussian_latitudes, Conformal, Earth, Grid, Horizontal, LongitudeRange, RotatedPole,
};

/// Why a grid cannot be used.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum GridError {
    /// A template leeward does not read.
    #[error("grid definition template 3.{0} is not supported{1}")]
    Unsupported(u16, &'static str),
    /// A grid with rows of different lengths (quasi-regular / reduced).
    #[error("grid definition template 3.{0} is a reduced grid (a list of points per row): not supported")]
    Reduced(u16),
    /// Section 3 shorter than its template needs.
    #[error("grid definition template 3.{0} cut short: section 3 has {1} octets")]
    Short(u16, usize),
    /// Values that cannot describe a grid.
    #[error("grid definition template 3.{0}: {1}")]
    Invalid(u16, String),
}

/// Octet (0-based in section 3) of the resolution and component flags (flag
/// table 3.3) for the templates leeward reads: 55 in 3.0-3.3 and 3.40-3.43, 47
/// in 3.10, 3.20, 3.30 and 3.31 (WMO-No. 306 template layouts).
pub fn flags_octet(template: u16) -> Option<usize> {
    match template {
        0..=3 | 40..=43 => Some(54),
        10 | 20 | 30 | 31 => Some(46),
        _ => None,
    }
}

/// How values are ordered in the file (flag table 3.4), for reordering.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Scan {
    /// Number of points along i (x) and j (y).
    pub ni: usize,
    /// Points along j.
    pub nj: usize,
    /// Bit 1: points of a row scan in the -i direction (east to west).
    pub i_negative: bool,
    /// Bit 2: rows scan in the +j direction (south to north).
    pub j_positive: bool,
    /// Bit 3: adjacent points in the j direction are consecutive.
    pub j_consecutive: bool,
    /// Bit 4: every other row scans in the opposite direction.
    pub alternating: bool,
    /// Columns rolled so that longitudes ascend in their range (see
    /// [`crate::geometry::longitude::columns`]): column `c` of the result is
    /// column `(c + roll) % ni` west to east.
    pub roll: usize,
}

impl Scan {
    fn from_flags(ni: usize, nj: usize, flags: u8) -> Self {
        Scan {
            ni,
            nj,
            i_negative: flags & 0x80 != 0,
            j_positive: flags & 0x40 != 0,
            j_consecutive: flags & 0x20 != 0,
            alternating: flags & 0x10 != 0,
            roll: 0,
        }
    }

    /// (row, column) in leeward's orientation of the k-th value in the file.
    #[inline]
    pub fn position(&self, k: usize) -> (usize, usize) {
        let (mut i, mut j);
        if self.j_consecutive {
            i = k / self.nj;
            j = k % self.nj;
            if self.alternating && i % 2 == 1 {
                j = self.nj - 1 - j;
            }
        } else {
            j = k / self.ni;
            i = k % self.ni;
            if self.alternating && j % 2 == 1 {
                i = self.ni - 1 - i;
            }
        }
        if self.i_negative {
            i = self.ni - 1 - i;
        }
        if !self.j_positive {
            j = self.nj - 1 - j;
        }
        if !self.roll.is_multiple_of(self.ni) {
            i = (i + self.ni - self.roll % self.ni) % self.ni;
        }
        (j, i)
    }

    /// Reorder `values` (file order) into a row-major (rows south to north) vector.
    pub fn normalise(&self, values: &[f32]) -> Vec<f32> {
        let n = self.ni * self.nj;
        let mut out = vec![f32::NAN; n];
        let plain = !self.j_consecutive && !self.alternating && !self.i_negative;
        if plain {
            // Common fast path: only the row order may need flipping.
            let roll = self.roll % self.ni.max(1);
            for (r, row) in values.chunks(self.ni).take(self.nj).enumerate() {
                let j = if self.j_positive { r } else { self.nj - 1 - r };
                let dest = &mut out[j * self.ni..j * self.ni + row.len()];
                if roll == 0 || row.len() != self.ni {
                    dest.copy_from_slice(row);
                } else {
                    dest[..self.ni - roll].copy_from_slice(&row[roll..]);
                    dest[self.ni - roll..].copy_from_slice(&row[..roll]);
                }
            }
            return out;
        }
        for (k, &v) in values.iter().take(n).enumerate() {
            let (j, i) = self.position(k);
            out[j * self.ni + i] = v;
        }
        out
    }
}

/// Figure of the earth from octets 15-30 of templates 3.0-3.40 (code table 3.2).
fn earth(s: &[u8], t: u16) -> Result<Earth, GridError> {
    let short = || GridError::Short(t, s.len());
    let shape = u8_at(s, 14).ok_or_else(short)?;
    let scaled = |at: usize| -> Result<Option<f64>, GridError> {
        if all_ones(s, at, 1) || all_ones(s, at + 1, 4) {
            return Ok(None);
        }
        let f = i8_at(s, at).ok_or_else(short)?;
        let v = u32_at(s, at + 1).ok_or_else(short)? as f64;
        Ok(Some(v * 10f64.powi(-f)))
    };
    let given = |what: &str, v: Option<f64>| -> Result<f64, GridError> {
        match v {
            Some(x) if x.is_finite() && x > 0.0 => Ok(x),
            _ => Err(GridError::Invalid(
                t,
                format!("shape of the earth {shape} (code table 3.2) says the {what} is given, but it is missing or zero"),
            )),
        }
    };
    Ok(match shape {
        0 => Earth::sphere(6_367_470.0),
        1 => Earth::sphere(given("radius", scaled(15)?)?),
        2 => Earth {
            a: 6_378_160.0,
            b: 6_356_775.0,
        },
        3 => Earth {
            a: given("major axis", scaled(20)?)? * 1000.0,
            b: given("minor axis", scaled(25)?)? * 1000.0,
        },
        4 => Earth {
            a: 6_378_137.0,
            b: 6_356_752.314_140,
        },
        5 => Earth {
            a: 6_378_137.0,
            b: 6_378_137.0 * (1.0 - 1.0 / 298.257_223_563),
        },
        6 => Earth::sphere(6_371_229.0),
        7 => Earth {
            a: given("major axis", scaled(20)?)?,
            b: given("minor axis", scaled(25)?)?,
        },
        8 => Earth::sphere(6_371_200.0),
        9 => Earth {
            a: 6_377_563.396,
            b: 6_356_256.909,
        },
        n => {
            return Err(GridError::Invalid(
                t,
                format!("shape of the earth {n} (code table 3.2) is not supported"),
            ))
        }
    })
}

fn count(s: &[u8], at: usize, t: u16, what: &str) -> Result<usize, GridError> {
    if all_ones(s, at, 4) {
        return Err(GridError::Reduced(t));
    }
    let n = u32_at(s, at).ok_or(GridError::Short(t, s.len()))? as usize;
    if n == 0 || n > 1_000_000 {
        return Err(GridError::Invalid(t, format!("{what} = {n} points")));
    }
    Ok(n)
}

/// Parse section 3 into a grid and the scan that orders its values.
pub fn parse_grid(s: &[u8]) -> Result<(Grid, Scan), GridError> {
    let t = u16_at(s, 12).ok_or(GridError::Short(u16::MAX, s.len()))?;
    let num_points = u32_at(s, 6).ok_or(GridError::Short(t, s.len()))? as usize;
    let list_len = u8_at(s, 10).ok_or(GridError::Short(t, s.len()))?;
    let source = u8_at(s, 5).ok_or(GridError::Short(t, s.len()))?;
    if source != 0 {
        return Err(GridError::Invalid(
            t,
            format!("source of grid definition {source} (code table 3.0): only 0 (template in section 3) is read"),
        ));
    }
    if list_len != 0 && matches!(t, 0 | 1 | 40) {
        return Err(GridError::Reduced(t));
    }
    let (grid, scan) = match t {
        0 | 1 | 40 => latlon(s, t)?,
        10 => mercator(s)?,
        20 => polar(s)?,
        30 => lambert(s)?,
        2 | 3 => return Err(GridError::Unsupported(t, ": stretched grids are not read")),
        32768.. => return Err(GridError::Unsupported(t, ": a centre-local template")),
        50..=53 => return Err(GridError::Unsupported(t, ": spectral data are not read")),
        _ => return Err(GridError::Unsupported(t, "")),
    };
    if scan.ni * scan.nj != num_points {
        return Err(GridError::Invalid(
            t,
            format!(
                "{} x {} points but section 3 says {num_points}",
                scan.ni, scan.nj
            ),
        ));
    }
    Ok((grid, scan))
}

/// Angles in units of the basic angle (octets 39-46), else microdegrees.
fn angle_unit(s: &[u8], t: u16) -> Result<f64, GridError> {
    let basic = u32_at(s, 38).ok_or(GridError::Short(t, s.len()))?;
    let sub = u32_at(s, 42).ok_or(GridError::Short(t, s.len()))?;
    let basic = if basic == 0 || basic == u32::MAX {
        1
    } else {
        basic
    };
    let sub = if sub == 0 || sub == u32::MAX {
        1_000_000
    } else {
        sub
    };
    Ok(f64::from(basic) / f64::from(sub))
}

fn deg(s: &[u8], at: usize, t: u16, unit: f64) -> Result<f64, GridError> {
    Ok(i32_at(s, at).ok_or(GridError::Short(t, s.len()))? as f64 * unit)
}

fn latlon(s: &[u8], t: u16) -> Result<(Grid, Scan), GridError> {
    let need = if t == 1 { 84 } else { 72 };
    if s.len() < need {
        return Err(GridError::Short(t, s.len()));
    }
    let e = earth(s, t)?;
    let ni = count(s, 30, t, "Ni")?;
    let nj = count(s, 34, t, "Nj")?;
    let unit = angle_unit(s, t)?;
    let la1 = deg(s, 46, t, unit)?;
    let lo1 = deg(s, 50, t, unit)?;
    let la2 = deg(s, 55, t, unit)?;
    let lo2 = deg(s, 59, t, unit)?;
    let flags = u8_at(s, 71).ok_or(GridError::Short(t, s.len()))?;
    if flags & 0x0f != 0 {
        return Err(GridError::Invalid(
            t,
            format!("scanning mode {flags:#04x}: staggered rows (bits 5-8) are not supported"),
        ));
    }
    let scan = Scan::from_flags(ni, nj, flags);
    // Longitudes from the first and last points, in the scan's direction.
    let (west, span) = if scan.i_negative {
        (lo2, (lo1 - lo2).rem_euclid(360.0))
    } else {
        (lo1, (lo2 - lo1).rem_euclid(360.0))
    };
    let di_coded = u32_at(s, 63)
        .filter(|&v| v != u32::MAX)
        .map(|v| f64::from(v) * unit);
    let di = if ni > 1 && span > 0.0 {
        span / (ni - 1) as f64
    } else {
        di_coded.unwrap_or(0.0)
    };
    let lon: Vec<f64> = (0..ni).map(|i| west + i as f64 * di).collect();
    let (south, north) = (la1.min(la2), la1.max(la2));
    if !(-90.0..=90.0).contains(&south) || !(-90.0..=90.0).contains(&north) {
        return Err(GridError::Invalid(
            t,
            format!("latitudes {la1} and {la2} out of range"),
        ));
    }
    let lat: Vec<f64> = if t == 40 {
        let n = u32_at(s, 67).ok_or(GridError::Short(t, s.len()))? as usize;
        if n == 0 || n > 8000 || nj > 2 * n {
            return Err(GridError::Invalid(
                t,
                format!("Gaussian N = {n} with {nj} rows"),
            ));
        }
        let all = gaussian_latitudes(n); // north to south
        let first = all
            .iter()
            .enumerate()
            .min_by(|a, b| (a.1 - north).abs().total_cmp(&(b.1 - north).abs()))
            .map(|(k, _)| k)
            .unwrap_or(0);
        if first + nj > all.len() || (all[first] - north).abs() > 0.01 {
            return Err(GridError::Invalid(
                t,
                format!("rows from {north} do not match the Gaussian latitudes of N{n}"),
            ));
        }
        let mut v: Vec<f64> = all[first..first + nj].to_vec();
        v.reverse();
        v
    } else {
        let dj = if nj > 1 {
            (north - south) / (nj - 1) as f64
        } else {
            0.0
        };
        (0..nj).map(|j| south + j as f64 * dj).collect()
    };
    let horizontal = match t {
        1 => {
            let sp_lat = deg(s, 72, t, unit)?;
            let sp_lon = u32_at(s, 76).ok_or(GridError::Short(t, s.len()))? as f64 * unit;
            let angle = f64::from(f32_at(s, 80).ok_or(GridError::Short(t, s.len()))?);
            if angle != 0.0 {
                // Conventions for a non-zero angle differ between readers; refuse rather than guess.
                return Err(GridError::Invalid(
                    t,
                    format!("angle of rotation {angle} degrees: only 0 is supported"),
                ));
            }
            Horizontal::Rotated {
                rlat: lat,
                rlon: lon,
                pole: RotatedPole {
                    south_pole_lat: sp_lat,
                    south_pole_lon: sp_lon,
                    angle,
                },
            }
        }
        40 => Horizontal::LatLon {
            lat,
            lon,
            gaussian: u32_at(s, 67).map(|n| n as usize),
        },
        _ => Horizontal::LatLon {
            lat,
            lon,
            gaussian: None,
        },
    };
    Ok(with_longitudes(
        Grid {
            earth: e,
            horizontal,
            template: t,
        },
        scan,
        LongitudeRange::Auto,
    ))
}

/// The grid with its column longitudes (rotated longitudes on a rotated grid)
/// in the range `want` asks for, and the scan that rolls the values with them
/// ([`crate::geometry::longitude::columns`]). Projected grids pass unchanged.
pub fn with_longitudes(mut grid: Grid, mut scan: Scan, want: LongitudeRange) -> (Grid, Scan) {
    let periodic = grid.periodic();
    let lon = match &mut grid.horizontal {
        Horizontal::LatLon { lon, .. } => lon,
        Horizontal::Rotated { rlon, .. } => rlon,
        Horizontal::Projected { .. } => return (grid, scan),
    };
    let (roll, new) = crate::geometry::longitude::columns(lon, periodic, want);
    *lon = new;
    if scan.ni > 0 {
        scan.roll = (scan.roll + roll) % scan.ni;
    }
    (grid, scan)
}

/// Plane coordinates from the first point, spacing and scan direction.
fn plane_axes(x0: f64, y0: f64, dx: f64, dy: f64, scan: &Scan) -> (Vec<f64>, Vec<f64>) {
    let west = if scan.i_negative {
        x0 - (scan.ni - 1) as f64 * dx
    } else {
        x0
    };
    let south = if scan.j_positive {
        y0
    } else {
        y0 - (scan.nj - 1) as f64 * dy
    };
    (
        (0..scan.ni).map(|i| west + i as f64 * dx).collect(),
        (0..scan.nj).map(|j| south + j as f64 * dy).collect(),
    )
}

fn spacing(s: &[u8], at: usize, t: u16, what: &str) -> Result<f64, GridError> {
    let v = u32_at(s, at).ok_or(GridError::Short(t, s.len()))?;
    if v == 0 || v == u32::MAX {
        return Err(GridError::Invalid(t, format!("{what} is missing or zero")));
    }
    Ok(f64::from(v) * 1e-3) // millimetres in the file
}

fn check_finite(t: u16, xs: &[f64]) -> Result<(), GridError> {
    if xs.iter().all(|v| v.is_finite()) {
        Ok(())
    } else {
        Err(GridError::Invalid(
            t,
            "the first grid point cannot be projected".into(),
        ))
    }
}

fn mercator(s: &[u8]) -> Result<(Grid, Scan), GridError> {
    let t = 10;
    if s.len() < 72 {
        return Err(GridError::Short(t, s.len()));
    }
    let e = earth(s, t)?;
    let ni = count(s, 30, t, "Ni")?;
    let nj = count(s, 34, t, "Nj")?;
    let la1 = deg(s, 38, t, 1e-6)?;
    let lo1 = deg(s, 42, t, 1e-6)?;
    let lad = deg(s, 47, t, 1e-6)?;
    let flags = u8_at(s, 59).ok_or(GridError::Short(t, s.len()))?;
    let orientation = i32_at(s, 60).ok_or(GridError::Short(t, s.len()))?;
    if orientation != 0 {
        return Err(GridError::Invalid(
            t,
            "grid not aligned with the equator (orientation != 0)".into(),
        ));
    }
    let scan = Scan::from_flags(ni, nj, flags);
    let di = spacing(s, 64, t, "Di")?;
    let dj = spacing(s, 68, t, "Dj")?;
    // Central meridian: the first point's, so x stays small; any meridian gives the same grid.
    let proj = Conformal::Mercator {
        lat_ts: lad,
        lon0: lo1,
    };
    projected(t, e, proj, (la1, lo1), lad, (di, dj), scan)
}

/// What polar stereographic (3.20) and Lambert conformal (3.30) share in octets 15-65.
struct ConeHeader {
    e: Earth,
    la1: f64,
    lo1: f64,
    lad: f64,
    lov: f64,
    dx: f64,
    dy: f64,
    centre: u8,
    scan: Scan,
}

fn cone_header(s: &[u8], t: u16, min_len: usize) -> Result<ConeHeader, GridError> {
    if s.len() < min_len {
        return Err(GridError::Short(t, s.len()));
    }
    let ni = count(s, 30, t, "Nx")?;
    let nj = count(s, 34, t, "Ny")?;
    let flags = u8_at(s, 64).ok_or(GridError::Short(t, s.len()))?;
    Ok(ConeHeader {
        e: earth(s, t)?,
        la1: deg(s, 38, t, 1e-6)?,
        lo1: deg(s, 42, t, 1e-6)?,
        lad: deg(s, 47, t, 1e-6)?,
        lov: deg(s, 51, t, 1e-6)?,
        dx: spacing(s, 55, t, "Dx")?,
        dy: spacing(s, 59, t, "Dy")?,
        centre: u8_at(s, 63).ok_or(GridError::Short(t, s.len()))?,
        scan: Scan::from_flags(ni, nj, flags),
    })
}

/// A projected grid from its first point and its spacings, true at latitude `lad`:
/// plane spacing = spacing x k(lad).
fn projected(
    t: u16,
    e: Earth,
    proj: Conformal,
    first: (f64, f64),
    lad: f64,
    spacings: (f64, f64),
    scan: Scan,
) -> Result<(Grid, Scan), GridError> {
    let k = proj.scale_factor(&e, lad);
    let (x0, y0) = proj.forward(&e, first.0, first.1);
    check_finite(t, &[x0, y0, k])?;
    let (x, y) = plane_axes(x0, y0, spacings.0 * k, spacings.1 * k, &scan);
    Ok((
        Grid {
            earth: e,
            horizontal: Horizontal::Projected { proj, x, y },
            template: t,
        },
        scan,
    ))
}

fn polar(s: &[u8]) -> Result<(Grid, Scan), GridError> {
    let t = 20;
    let h = cone_header(s, t, 65)?;
    let north = h.centre & 0x80 == 0;
    let lat_ts = if h.lad.abs() < 1e-9 {
        if north {
            60.0
        } else {
            -60.0
        }
    } else {
        h.lad
    };
    let proj = Conformal::PolarStereographic {
        north,
        lat_ts,
        lon0: h.lov,
    };
    projected(t, h.e, proj, (h.la1, h.lo1), h.lad, (h.dx, h.dy), h.scan)
}

fn lambert(s: &[u8]) -> Result<(Grid, Scan), GridError> {
    let t = 30;
    let h = cone_header(s, t, 81)?;
    let latin1 = deg(s, 65, t, 1e-6)?;
    let latin2 = deg(s, 69, t, 1e-6)?;
    if h.centre & 0x40 != 0 {
        return Err(GridError::Invalid(
            t,
            "bi-polar Lambert projection is not supported".into(),
        ));
    }
    if latin1.abs() < 1e-6 && latin2.abs() < 1e-6 {
        return Err(GridError::Invalid(
            t,
            "standard parallels at the equator: not a cone".into(),
        ));
    }
    let proj = Conformal::Lambert {
        lat1: latin1,
        lat2: latin2,
        lat0: h.lad,
        lon0: h.lov,
    };
    projected(t, h.e, proj, (h.la1, h.lo1), h.lad, (h.dx, h.dy), h.scan)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scanning_modes_of_flag_table_3_4() {
        // WMO flag table 3.4: 0x00 = +i, -j (north to south), rows consecutive.
        let s = Scan::from_flags(3, 2, 0x00);
        assert_eq!(s.position(0), (1, 0));
        assert_eq!(s.position(5), (0, 2));
        // 0x40: +j (south to north).
        let s = Scan::from_flags(3, 2, 0x40);
        assert_eq!(s.position(0), (0, 0));
        // 0x80: -i (east to west).
        let s = Scan::from_flags(3, 2, 0xc0);
        assert_eq!(s.position(0), (0, 2));
        // 0x20: columns consecutive.
        let s = Scan::from_flags(3, 2, 0x60);
        assert_eq!(s.position(1), (1, 0));
        // 0x10: boustrophedon.
        let s = Scan::from_flags(3, 2, 0x50);
        assert_eq!(s.position(3), (1, 2));
        let v: Vec<f32> = (0..6).map(|x| x as f32).collect();
        let n = s.normalise(&v);
        assert_eq!(n, vec![0.0, 1.0, 2.0, 5.0, 4.0, 3.0]);
    }

    #[test]
    fn a_roll_moves_columns_on_both_paths() {
        // Column c of the result is column (c + roll) % ni of the file's west-to-east row.
        let v: Vec<f32> = (0..8).map(|x| x as f32).collect();
        let mut s = Scan::from_flags(4, 2, 0x40);
        s.roll = 1;
        assert_eq!(
            s.normalise(&v),
            vec![1.0, 2.0, 3.0, 0.0, 5.0, 6.0, 7.0, 4.0]
        );
        assert_eq!(s.position(0), (0, 3));
        // The general path (east to west in the file) agrees.
        let mut s = Scan::from_flags(4, 2, 0xc0);
        s.roll = 1;
        assert_eq!(
            s.normalise(&v),
            vec![2.0, 1.0, 0.0, 3.0, 6.0, 5.0, 4.0, 7.0]
        );
    }

    #[test]
    fn garbage_section_is_an_error_not_a_panic() {
        for len in 0..90 {
            let s = vec![0xffu8; len];
            let _ = parse_grid(&s);
            let s = vec![0u8; len];
            let _ = parse_grid(&s);
        }
    }
}
