//! Unbreakable on input: truncated files, garbage bytes, messages whose
//! lengths lie, empty files. Property-based: real samples (and the demo
//! encoder's output) are cut and corrupted at random, and the catalogue, grid
//! and decode path must answer with values or errors, never a panic.
//! `PROPTEST_CASES` sets how many cases run (default 64 here; the long run
//! quoted in DEVELOPERS.md used 20 000).

mod common;

use leeward::ingest::catalogue::catalogue;
use leeward::ingest::decode::decode_raw;
use leeward::ingest::grid::parse_grid;
use proptest::prelude::*;

/// Everything leeward does with a file's bytes before diagnostics.
fn exercise(bytes: &[u8]) -> usize {
    let cat = catalogue(bytes);
    let mut n = 0;
    for f in &cat.fields {
        if let Some(s3) = bytes.get(f.sect3.clone()) {
            let _ = parse_grid(s3);
        }
        if decode_raw(bytes, f).is_ok() {
            n += 1;
        }
    }
    n + cat.problems.len()
}

/// Small inputs: the demo encoder's messages and the smallest real samples.
fn seeds() -> Vec<Vec<u8>> {
    let mut v = Vec::new();
    let vals: Vec<f64> = (0..35).map(|k| 280.0 + k as f64).collect();
    let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap();
    for grid in [
        leeward::demo::encode::GridSpec::LatLon {
            ni: 7,
            nj: 5,
            lat0: 10.0,
            lon0: 0.0,
            dlat: 1.0,
            dlon: 1.0,
        },
        leeward::demo::encode::GridSpec::Lambert {
            nx: 7,
            ny: 5,
            lat1: 40.0,
            lon1: -5.0,
            dx: 20e3,
            dy: 20e3,
            lov: 0.0,
            latin1: 45.0,
            latin2: 45.0,
        },
    ] {
        v.push(leeward::demo::encode::encode(
            &leeward::demo::encode::Message {
                centre: 255,
                reference,
                lead_hours: 6,
                param: (0, 0, 0),
                surface: (100, 85_000.0),
                grid,
                grid_relative_winds: true,
                values: &vals,
                decimal_scale: 1,
            },
        ));
    }
    if let Some(dir) = common::samples_dir("corrupt_input seeds") {
        for name in [
            "scanning-mode.grib2",
            "scanning-mode-with-bitmap.grib2",
            "no-radius-shapeOfEarth-7.grib2",
        ] {
            if let Ok(b) = std::fs::read(dir.join(name)) {
                v.push(b);
            }
        }
        // The first message of a complex-packed and a JPEG 2000 file.
        for name in [
            "gfs-2p5deg-2011100800-f072.grib2",
            "polar-stereo-jpeg2000.grib2",
        ] {
            if let Ok(b) = std::fs::read(dir.join(name)) {
                let len = leeward::ingest::bytes::u64_at(&b, 8).unwrap_or(0) as usize;
                v.push(b[..len.min(b.len())].to_vec());
            }
        }
    }
    v
}

#[test]
fn empty_and_tiny_inputs() {
    assert_eq!(exercise(&[]), 1);
    for n in 0..64 {
        let _ = exercise(&vec![0xffu8; n]);
        let mut b = b"GRIB".to_vec();
        b.extend(std::iter::repeat_n(0x02u8, n));
        let _ = exercise(&b);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: std::env::var("PROPTEST_CASES").ok().and_then(|v| v.parse().ok()).unwrap_or(64), ..ProptestConfig::default() })]

    #[test]
    fn truncated_anywhere(seed in 0usize..16, cut in 0.0f64..1.0) {
        let s = seeds();
        let b = &s[seed % s.len()];
        let at = (b.len() as f64 * cut) as usize;
        let _ = exercise(&b[..at]);
    }

    #[test]
    fn bytes_overwritten(seed in 0usize..16, edits in proptest::collection::vec((0.0f64..1.0, any::<u8>()), 1..12)) {
        let s = seeds();
        let mut b = s[seed % s.len()].clone();
        for (pos, val) in edits {
            let at = ((b.len() - 1) as f64 * pos) as usize;
            b[at] = val;
        }
        let _ = exercise(&b);
    }

    #[test]
    fn lengths_lie(seed in 0usize..16, which in 0usize..8, value in any::<u32>()) {
        // Overwrite the length of the n-th section (and the message length) with any number.
        let s = seeds();
        let mut b = s[seed % s.len()].clone();
        let mut p = 16usize;
        let mut k = 0;
        while p + 5 <= b.len() && &b[p..p + 4] != b"7777" {
            let len = u32::from_be_bytes([b[p], b[p + 1], b[p + 2], b[p + 3]]) as usize;
            if k == which {
                b[p..p + 4].copy_from_slice(&value.to_be_bytes());
                break;
            }
            if len < 5 { break; }
            p += len;
            k += 1;
        }
        if which == 7 && b.len() >= 16 {
            b[8..16].copy_from_slice(&u64::from(value).to_be_bytes());
        }
        let _ = exercise(&b);
    }

    #[test]
    fn garbage_between_messages(seed in 0usize..16, junk in proptest::collection::vec(any::<u8>(), 0..200)) {
        let s = seeds();
        let mut b = junk.clone();
        b.extend_from_slice(&s[seed % s.len()]);
        b.extend_from_slice(&junk);
        b.extend_from_slice(&s[(seed + 1) % s.len()]);
        // Both messages survive the junk around them.
        let cat = catalogue(&b);
        prop_assert!(cat.fields.len() >= 2);
    }
}
