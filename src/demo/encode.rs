//! A small GRIB2 writer of our own: simple packing (template 5.0), regular
//! latitude/longitude (3.0) or Lambert conformal (3.30) grids, analysis or
//! forecast products on one fixed surface (4.0).
//!
//! In: a [`Message`] description and its values in leeward's orientation
//! (rows south to north). Out: the bytes of one GRIB2 message. Used to make
//! the demo scenario and test inputs; layouts follow WMO-No. 306, FM 92 GRIB.

use chrono::{Datelike, NaiveDateTime, Timelike};

/// The grid of a message.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum GridSpec {
    /// Regular latitude/longitude from (lat0, lon0), south-west corner, with steps in degrees.
    LatLon {
        ni: usize,
        nj: usize,
        lat0: f64,
        lon0: f64,
        dlat: f64,
        dlon: f64,
    },
    /// Lambert conformal: first point (south-west), spacing in metres, LoV, standard parallels.
    Lambert {
        nx: usize,
        ny: usize,
        lat1: f64,
        lon1: f64,
        dx: f64,
        dy: f64,
        lov: f64,
        latin1: f64,
        latin2: f64,
    },
}

impl GridSpec {
    /// Number of points.
    pub fn points(&self) -> usize {
        match *self {
            GridSpec::LatLon { ni, nj, .. } => ni * nj,
            GridSpec::Lambert { nx, ny, .. } => nx * ny,
        }
    }
}

/// One field to encode.
#[derive(Debug, Clone)]
pub struct Message<'a> {
    /// Originating centre (common code table C-11).
    pub centre: u16,
    /// Reference time.
    pub reference: NaiveDateTime,
    /// Forecast time in hours.
    pub lead_hours: u32,
    /// Discipline, category, number (code tables 0.0, 4.1, 4.2).
    pub param: (u8, u8, u8),
    /// Fixed surface type (4.5) and value in its SI unit (Pa for isobaric).
    pub surface: (u8, f64),
    /// The grid.
    pub grid: GridSpec,
    /// Winds relative to the grid (flag table 3.3 bit 5).
    pub grid_relative_winds: bool,
    /// Values, rows south to north; NaN is not allowed (no bitmap is written).
    pub values: &'a [f64],
    /// Decimal scale factor D for the packing.
    pub decimal_scale: i16,
}

fn sm32(v: i64) -> [u8; 4] {
    let mag = (v.unsigned_abs() as u32) & 0x7fff_ffff;
    (if v < 0 { mag | 0x8000_0000 } else { mag }).to_be_bytes()
}

fn sm16(v: i32) -> [u8; 2] {
    let mag = (v.unsigned_abs() as u16) & 0x7fff;
    (if v < 0 { mag | 0x8000 } else { mag }).to_be_bytes()
}

fn micro(deg: f64) -> i64 {
    (deg * 1e6).round() as i64
}

fn section(num: u8, body: &[u8]) -> Vec<u8> {
    let mut s = Vec::with_capacity(body.len() + 5);
    s.extend_from_slice(&((body.len() + 5) as u32).to_be_bytes());
    s.push(num);
    s.extend_from_slice(body);
    s
}

/// Encode one message: simple packing with 16 bits per value, the binary scale
/// chosen to span the field's range.
pub fn encode(m: &Message<'_>) -> Vec<u8> {
    encode_packed(m, Bits::Fixed16)
}

/// Encode one message with as few bits per value as its decimal scale factor
/// needs: the values are rounded to 10^-D and packed with E = 0 when that takes at
/// most `max_bits` bits, otherwise with `max_bits` bits and the smallest binary
/// scale E that spans the range.
pub fn encode_compact(m: &Message<'_>, max_bits: u32) -> Vec<u8> {
    encode_packed(m, Bits::AtMost(max_bits))
}

/// How many bits a packed value takes.
#[derive(Debug, Clone, Copy)]
enum Bits {
    Fixed16,
    AtMost(u32),
}

fn section5(n: usize, r: f32, e: i32, d: i16, nbits: u32) -> Vec<u8> {
    let mut s5 = Vec::new();
    s5.extend_from_slice(&(n as u32).to_be_bytes());
    s5.extend_from_slice(&0u16.to_be_bytes());
    s5.extend_from_slice(&r.to_bits().to_be_bytes());
    s5.extend_from_slice(&sm16(e));
    s5.extend_from_slice(&sm16(i32::from(d)));
    s5.extend_from_slice(&[nbits as u8, 0]);
    s5
}

fn pack_fixed16(m: &Message<'_>) -> (Vec<u8>, Vec<u8>) {
    let scale = 10f64.powi(i32::from(m.decimal_scale));
    let scaled: Vec<f64> = m.values.iter().map(|v| v * scale).collect();
    let min = scaled.iter().copied().fold(f64::INFINITY, f64::min);
    let max = scaled.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let range = (max - min).max(0.0);
    let nbits = 16u32;
    let e = if range > 0.0 {
        (range / f64::from((1u32 << nbits) - 1)).log2().ceil() as i32
    } else {
        0
    };
    let r = min as f32;
    let step = 2f64.powi(e);
    let s5 = section5(m.values.len(), r, e, m.decimal_scale, nbits);
    let mut s7 = Vec::with_capacity(m.values.len() * 2);
    for v in &scaled {
        let x = ((v - f64::from(r)) / step).round().clamp(0.0, 65535.0) as u16;
        s7.extend_from_slice(&x.to_be_bytes());
    }
    (s5, s7)
}

fn pack_at_most(m: &Message<'_>, max_bits: u32) -> (Vec<u8>, Vec<u8>) {
    let scale = 10f64.powi(i32::from(m.decimal_scale));
    let scaled: Vec<f64> = m.values.iter().map(|v| v * scale).collect();
    let min = scaled.iter().copied().fold(f64::INFINITY, f64::min);
    let max = scaled.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    // A whole-number reference value is exact in the f32 of section 5 (below 2^24).
    let r = if min.abs() < 16_777_216.0 {
        min.floor()
    } else {
        min
    } as f32;
    let span = (max - f64::from(r)).max(0.0).round();
    let limit = (1u64 << max_bits) - 1;
    let (e, nbits) = if span as u64 <= limit {
        let n = (64 - (span as u64).leading_zeros()).max(1);
        (0, n)
    } else {
        ((span / limit as f64).log2().ceil() as i32, max_bits)
    };
    let step = 2f64.powi(e);
    let top = ((1u64 << nbits) - 1) as f64;
    let s5 = section5(m.values.len(), r, e, m.decimal_scale, nbits);
    let mut s7 = Vec::with_capacity((m.values.len() * nbits as usize).div_ceil(8));
    let (mut acc, mut held) = (0u64, 0u32);
    for v in &scaled {
        let x = ((v - f64::from(r)) / step).round().clamp(0.0, top) as u64;
        acc = (acc << nbits) | x;
        held += nbits;
        while held >= 8 {
            held -= 8;
            s7.push((acc >> held) as u8);
        }
        acc &= (1u64 << held) - 1;
    }
    if held > 0 {
        s7.push((acc << (8 - held)) as u8);
    }
    (s5, s7)
}

fn encode_packed(m: &Message<'_>, bits: Bits) -> Vec<u8> {
    // Section 1: identification.
    let mut s1 = Vec::new();
    s1.extend_from_slice(&m.centre.to_be_bytes());
    s1.extend_from_slice(&0u16.to_be_bytes());
    s1.extend_from_slice(&[2, 0, 1]); // master tables 2, no local tables, start of forecast
    s1.extend_from_slice(&(m.reference.year() as u16).to_be_bytes());
    s1.extend_from_slice(&[
        m.reference.month() as u8,
        m.reference.day() as u8,
        m.reference.hour() as u8,
        m.reference.minute() as u8,
        m.reference.second() as u8,
        1, // test products (code table 1.3): invented data
        1, // forecast products (1.4)
    ]);

    // Section 3: grid definition.
    let mut s3 = vec![0u8];
    s3.extend_from_slice(&(m.grid.points() as u32).to_be_bytes());
    s3.extend_from_slice(&[0, 0]);
    let flags = if m.grid_relative_winds { 0x08 } else { 0x00 };
    let earth = [6u8, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0]; // sphere 6 371 229 m
    match m.grid {
        GridSpec::LatLon {
            ni,
            nj,
            lat0,
            lon0,
            dlat,
            dlon,
        } => {
            s3.extend_from_slice(&0u16.to_be_bytes());
            s3.extend_from_slice(&earth);
            s3.extend_from_slice(&(ni as u32).to_be_bytes());
            s3.extend_from_slice(&(nj as u32).to_be_bytes());
            s3.extend_from_slice(&0u32.to_be_bytes());
            s3.extend_from_slice(&u32::MAX.to_be_bytes());
            s3.extend_from_slice(&sm32(micro(lat0)));
            s3.extend_from_slice(&sm32(micro(lon0.rem_euclid(360.0))));
            s3.push(0x30 | flags);
            s3.extend_from_slice(&sm32(micro(lat0 + dlat * (nj - 1) as f64)));
            s3.extend_from_slice(&sm32(micro(
                (lon0 + dlon * (ni - 1) as f64).rem_euclid(360.0),
            )));
            s3.extend_from_slice(&(micro(dlon) as u32).to_be_bytes());
            s3.extend_from_slice(&(micro(dlat) as u32).to_be_bytes());
            s3.push(0x40); // +i, +j: rows south to north
        }
        GridSpec::Lambert {
            nx,
            ny,
            lat1,
            lon1,
            dx,
            dy,
            lov,
            latin1,
            latin2,
        } => {
            s3.extend_from_slice(&30u16.to_be_bytes());
            s3.extend_from_slice(&earth);
            s3.extend_from_slice(&(nx as u32).to_be_bytes());
            s3.extend_from_slice(&(ny as u32).to_be_bytes());
            s3.extend_from_slice(&sm32(micro(lat1)));
            s3.extend_from_slice(&sm32(micro(lon1.rem_euclid(360.0))));
            s3.push(0x30 | flags);
            s3.extend_from_slice(&sm32(micro(latin1))); // LaD: where dx, dy are true
            s3.extend_from_slice(&sm32(micro(lov.rem_euclid(360.0))));
            s3.extend_from_slice(&((dx * 1e3).round() as u32).to_be_bytes());
            s3.extend_from_slice(&((dy * 1e3).round() as u32).to_be_bytes());
            s3.push(if latin1 < 0.0 { 0x80 } else { 0x00 });
            s3.push(0x40);
            s3.extend_from_slice(&sm32(micro(latin1)));
            s3.extend_from_slice(&sm32(micro(latin2)));
            s3.extend_from_slice(&sm32(micro(-90.0)));
            s3.extend_from_slice(&sm32(0));
        }
    }

    // Section 4: product definition template 4.0.
    let (d, c, n) = m.param;
    let mut s4 = Vec::new();
    s4.extend_from_slice(&0u16.to_be_bytes());
    s4.extend_from_slice(&0u16.to_be_bytes());
    s4.extend_from_slice(&[c, n, 2, 0, 0]);
    s4.extend_from_slice(&0u16.to_be_bytes());
    s4.extend_from_slice(&[0, 1]); // minutes after cut-off; unit: hour
    s4.extend_from_slice(&m.lead_hours.to_be_bytes());
    s4.extend_from_slice(&[m.surface.0, 0]);
    s4.extend_from_slice(&(m.surface.1.round() as u32).to_be_bytes());
    s4.extend_from_slice(&[255, 255, 255, 255, 255, 255]);

    // Sections 5 and 7: simple packing, Y = (R + X 2^E) / 10^D.
    let (s5, s7) = match bits {
        Bits::Fixed16 => pack_fixed16(m),
        Bits::AtMost(n) => pack_at_most(m, n.clamp(1, 32)),
    };
    let mut body = Vec::new();
    body.extend(section(1, &s1));
    body.extend(section(3, &s3));
    body.extend(section(4, &s4));
    body.extend(section(5, &s5));
    body.extend(section(6, &[255]));
    body.extend(section(7, &s7));
    body.extend_from_slice(b"7777");
    let mut msg = Vec::with_capacity(body.len() + 16);
    msg.extend_from_slice(b"GRIB");
    msg.extend_from_slice(&[0, 0, d, 2]);
    msg.extend_from_slice(&((body.len() + 16) as u64).to_be_bytes());
    msg.extend(body);
    msg
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ingest::catalogue::catalogue;
    use crate::ingest::decode::decode_raw;
    use crate::ingest::grid::parse_grid;

    #[test]
    fn round_trip_through_the_catalogue_and_the_crate_decoder() {
        let values: Vec<f64> = (0..12).map(|k| 250.0 + k as f64 * 0.5).collect();
        let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
            .and_then(|d| d.and_hms_opt(6, 0, 0))
            .unwrap();
        let m = Message {
            centre: 255,
            reference,
            lead_hours: 12,
            param: (0, 0, 0),
            surface: (100, 50_000.0),
            grid: GridSpec::LatLon {
                ni: 4,
                nj: 3,
                lat0: 40.0,
                lon0: -10.0,
                dlat: 1.0,
                dlon: 2.0,
            },
            grid_relative_winds: false,
            values: &values,
            decimal_scale: 0,
        };
        let bytes = encode(&m);
        let cat = catalogue(&bytes);
        assert!(cat.problems.is_empty(), "{:?}", cat.problems);
        let f = &cat.fields[0];
        assert_eq!(
            (f.category, f.number, f.level.value),
            (0, 0, Some(50_000.0))
        );
        assert_eq!(f.lead.num_hours(), 12);
        let v = decode_raw(&bytes, f).unwrap();
        for (a, b) in v.iter().zip(&values) {
            assert!((f64::from(*a) - b).abs() < 1e-3, "{a} {b}");
        }
        let (g, _) = parse_grid(&bytes[f.sect3.clone()]).unwrap();
        assert_eq!(g.shape(), (3, 4));

        // Found by the corrupt-input property test: a forecast time that takes the
        // valid time past the calendar is a problem for that field, not a panic.
        let far = Message {
            lead_hours: u32::MAX,
            ..m
        };
        let cat = catalogue(&encode(&far));
        assert_eq!(cat.problems.len(), 1, "{:?}", cat.problems);
        assert!(cat.problems[0].reason.contains("out of range"));
    }

    #[test]
    fn compact_packing_keeps_the_decimal_precision_in_as_few_bits_as_it_needs() {
        let grid = GridSpec::LatLon {
            ni: 7,
            nj: 3,
            lat0: 40.0,
            lon0: -10.0,
            dlat: 1.0,
            dlon: 2.0,
        };
        let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
            .and_then(|d| d.and_hms_opt(0, 0, 0))
            .unwrap();
        // (values, D, bits expected): 0.01 K over 12 K takes 11 bits; specific
        // humidity at 1e-8 over 0.01 needs 20 bits, so 16 with a binary scale.
        let t: Vec<f64> = (0..21).map(|k| 250.0 + 0.6 * k as f64 + 0.004).collect();
        let q: Vec<f64> = (0..21).map(|k| 0.0005 * k as f64 + 1e-6).collect();
        for (values, d, bits, tol) in [(&t, 2, 11, 0.005), (&q, 8, 16, 1e-7)] {
            let m = Message {
                centre: 255,
                reference,
                lead_hours: 0,
                param: (0, 0, 0),
                surface: (100, 50_000.0),
                grid,
                grid_relative_winds: false,
                values,
                decimal_scale: d,
            };
            let bytes = encode_compact(&m, 16);
            let cat = catalogue(&bytes);
            assert!(cat.problems.is_empty(), "{:?}", cat.problems);
            let f = &cat.fields[0];
            assert_eq!(bytes[f.sect5.clone()][19], bits);
            let v = decode_raw(&bytes, f).unwrap();
            for (a, b) in v.iter().zip(values.iter()) {
                assert!(
                    (f64::from(*a) - b).abs() <= tol * 1.01 + 1e-5 * b.abs(),
                    "{a} {b}"
                );
            }
        }
    }
}
