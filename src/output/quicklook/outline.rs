//! Where the land is: coastlines and country borders placed on a grid's own
//! projection.
//!
//! The lines are Natural Earth's 1:50 million land and admin-0 boundaries
//! (version 4.1.0, public domain), simplified to 0.02 degree and stored to a
//! hundredth of a degree in `coastlines.bin`, written by
//! `tools/coastlines.py` and compiled into the program: nothing is read at
//! run time. A point of a line is placed on the grid by the grid's own
//! forward projection (plane x, y for Lambert, polar stereographic and
//! Mercator grids; rotated latitude and longitude for a rotated grid;
//! longitude and latitude for the others) and then by the grid's spacing, so
//! it lands where that grid's own coordinates put it.

use std::io::Read;
use std::sync::OnceLock;

use crate::geometry::{Grid, Horizontal};

/// Kind of an outline.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Coast of land (and the shores of the land layer's lakes).
    Coast,
    /// Land boundary between two countries.
    Border,
}

/// One polyline, longitude and latitude in degrees.
pub struct Line {
    /// What it is.
    pub kind: Kind,
    /// Its points (longitude, latitude), degrees.
    pub points: Vec<(f64, f64)>,
}

static DATA: &[u8] = include_bytes!("coastlines.bin");

fn parse(z: &[u8]) -> Result<Vec<Line>, String> {
    let mut raw = Vec::new();
    flate2::read::ZlibDecoder::new(z)
        .read_to_end(&mut raw)
        .map_err(|e| format!("coastlines: {e}"))?;
    let bad = || "coastlines: data cut short".to_string();
    let mut pos = 0usize;
    let mut take = |n: usize| -> Result<&[u8], String> {
        let s = raw.get(pos..pos + n).ok_or_else(bad)?;
        pos += n;
        Ok(s)
    };
    if take(8)? != b"LWCOAST1" {
        return Err("coastlines: not leeward's format".into());
    }
    let u32_of = |b: &[u8]| u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as usize;
    let n = u32_of(take(4)?);
    let mut lines = Vec::with_capacity(n);
    for _ in 0..n {
        let kind = match take(1)?[0] {
            0 => Kind::Coast,
            _ => Kind::Border,
        };
        let m = u32_of(take(4)?);
        let mut points = Vec::with_capacity(m);
        let (mut x, mut y) = (0i32, 0i32);
        for k in 0..m {
            let b = take(4)?;
            let dx = i32::from(i16::from_le_bytes([b[0], b[1]]));
            let dy = i32::from(i16::from_le_bytes([b[2], b[3]]));
            (x, y) = if k == 0 { (dx, dy) } else { (x + dx, y + dy) };
            points.push((f64::from(x) / 100.0, f64::from(y) / 100.0));
        }
        lines.push(Line { kind, points });
    }
    Ok(lines)
}

/// Every coastline and border, decoded once.
pub fn lines() -> &'static [Line] {
    static LINES: OnceLock<Vec<Line>> = OnceLock::new();
    LINES.get_or_init(|| parse(DATA).unwrap_or_default())
}

/// Fractional index of `v` in an ascending list of coordinates: linear
/// between neighbours, extrapolated linearly beyond the ends.
fn index_in(axis: &[f64], v: f64) -> f64 {
    let n = axis.len();
    if n < 2 {
        return 0.0;
    }
    let k = axis.partition_point(|&a| a <= v).clamp(1, n - 1);
    let (a, b) = (axis[k - 1], axis[k]);
    (k - 1) as f64 + (v - a) / (b - a)
}

/// Fractional column of longitude `lon` on a longitude axis: the longitude is
/// taken within 180 degrees of the axis's middle, so a line just west of a
/// regional grid lies west of it, not 360 degrees east.
fn column_of(axis: &[f64], lon: f64) -> f64 {
    let n = axis.len();
    if n < 2 {
        return 0.0;
    }
    let mid = 0.5 * (axis[0] + axis[n - 1]);
    let l = mid + (lon - mid + 180.0).rem_euclid(360.0) - 180.0;
    (l - axis[0]) / ((axis[n - 1] - axis[0]) / (n - 1) as f64)
}

/// Where geographic (lat, lon) falls on `grid`, as a fractional (column,
/// row) in leeward's storage order (rows ascending in latitude or y); may
/// lie outside the grid. `None` where the projection has no finite image.
pub fn locate(grid: &Grid, lat: f64, lon: f64) -> Option<(f64, f64)> {
    let (c, r) = match &grid.horizontal {
        Horizontal::LatLon {
            lat: la, lon: lo, ..
        } => (column_of(lo, lon), index_in(la, lat)),
        Horizontal::Rotated { rlat, rlon, pole } => {
            let (a, b) = pole.to_rotated(lat, lon);
            (column_of(rlon, b), index_in(rlat, a))
        }
        Horizontal::Projected { proj, x, y } => {
            let (px, py) = proj.forward(&grid.earth, lat, lon);
            (index_in(x, px), index_in(y, py))
        }
    };
    (c.is_finite() && r.is_finite()).then_some((c, r))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::{Conformal, Earth};

    #[test]
    fn the_compiled_lines_decode_and_cover_the_globe() {
        let l = lines();
        let coast: usize = l
            .iter()
            .filter(|x| x.kind == Kind::Coast)
            .map(|x| x.points.len())
            .sum();
        let border: usize = l
            .iter()
            .filter(|x| x.kind == Kind::Border)
            .map(|x| x.points.len())
            .sum();
        assert!(coast > 20_000 && border > 5_000, "{coast} {border}");
        for x in l {
            for &(lon, lat) in &x.points {
                assert!((-180.0..=180.0).contains(&lon) && (-90.0..=90.0).contains(&lat));
            }
        }
        // Landmarks every coastline must have, each within 0.3 degree of a
        // coast point (positions from memory, to a tenth of a degree): Cape
        // Agulhas, Cape Horn, the Strait of Gibraltar's north shore,
        // Cape Chelyuskin, South East Cape of Tasmania.
        for (lon, lat) in [
            (20.0, -34.8),
            (-67.3, -56.0),
            (-5.6, 36.0),
            (104.3, 77.7),
            (146.8, -43.6),
        ] {
            let near = l.iter().filter(|x| x.kind == Kind::Coast).any(|x| {
                x.points
                    .iter()
                    .any(|&(a, b)| (a - lon).abs() < 0.3 && (b - lat).abs() < 0.3)
            });
            assert!(near, "no coast near {lon} E {lat} N");
        }
        // Nothing of the data's cut along the South Pole or the 180th meridian.
        for x in l {
            for w in x.points.windows(2) {
                assert!(!(w[0].1 < -89.9 && w[1].1 < -89.9));
                assert!(!(w[0].0.abs() > 179.99 && w[1].0.abs() > 179.99 && w[0].0 == w[1].0));
            }
        }
    }

    #[test]
    fn broken_data_is_an_error_not_a_panic() {
        assert!(parse(b"not zlib at all").is_err());
        let short = {
            use std::io::Write;
            let mut e = flate2::write::ZlibEncoder::new(Vec::new(), flate2::Compression::default());
            e.write_all(b"LWCOAST1\x05\x00\x00\x00\x00\x09").unwrap();
            e.finish().unwrap()
        };
        assert!(parse(&short).is_err());
    }

    #[test]
    fn points_land_on_the_grid_by_its_own_coordinates() {
        // A global grid stored from 0 E, and one from -180 E: 10 W is column
        // 350 of the first and 170 of the second (1-degree spacing).
        let ll = |lon0: f64| Grid {
            earth: Earth::sphere(6_371_229.0),
            horizontal: Horizontal::LatLon {
                lat: (0..181).map(|k| -90.0 + k as f64).collect(),
                lon: (0..360).map(|k| lon0 + k as f64).collect(),
                gaussian: None,
            },
            template: 0,
        };
        let (c, r) = locate(&ll(0.0), 45.0, -10.0).unwrap();
        assert!(
            (c - 350.0).abs() < 1e-9 && (r - 135.0).abs() < 1e-9,
            "{c} {r}"
        );
        let (c, _) = locate(&ll(-180.0), 45.0, -10.0).unwrap();
        assert!((c - 170.0).abs() < 1e-9, "{c}");
        // A Lambert grid: its own grid points map back to their indices.
        let earth = Earth::sphere(6_371_229.0);
        let proj = Conformal::Lambert {
            lat1: 30.0,
            lat2: 60.0,
            lat0: 45.0,
            lon0: 10.0,
        };
        let x: Vec<f64> = (0..40).map(|k| -600_000.0 + 30_000.0 * k as f64).collect();
        let y: Vec<f64> = (0..30).map(|k| -450_000.0 + 30_000.0 * k as f64).collect();
        let g = Grid {
            earth,
            horizontal: Horizontal::Projected {
                proj,
                x: x.clone(),
                y: y.clone(),
            },
            template: 30,
        };
        for (i, j) in [(0usize, 0usize), (17, 9), (39, 29)] {
            let (lat, lon) = proj.inverse(&earth, x[i], y[j]);
            let (c, r) = locate(&g, lat, lon).unwrap();
            assert!(
                (c - i as f64).abs() < 1e-6 && (r - j as f64).abs() < 1e-6,
                "{i} {j}: {c} {r}"
            );
        }
    }
}
