//! Unbreakable on input: truncated files, garbage bytes, messages whose
//! lengths lie, empty files. Property-based: real samples (and the demo
//! encoder's output) are cut and corrupted at random, and the catalogue, grid
//! and decode path must answer with values or errors, never a panic.
//! Every case is also read as a file, section by section, and must give the
//! same catalogue and values as the bytes in memory.
//! `PROPTEST_CASES` sets how many cases run (default 64 here; the long run
//! quoted in DEVELOPERS.md used 20 000).

mod common;

use leeward::ingest::catalogue::{catalogue, catalogue_file};
use leeward::ingest::decode::decode_raw;
use leeward::ingest::grid::parse_grid;
use leeward::ingest::source::{open_input, read_ranges};
use proptest::prelude::*;

/// Everything leeward does with a file's bytes before diagnostics, in memory
/// and with the file where it lies: the catalogue read section by section
/// from the file must be the one of its bytes, and each field decoded from
/// its message alone must give the values decoded from the whole file.
fn exercise(bytes: &[u8]) -> usize {
    let cat = catalogue(bytes);
    let path = std::env::temp_dir().join(format!(
        "leeward-corrupt-{}-{:?}.grib2",
        std::process::id(),
        std::thread::current().id()
    ));
    std::fs::write(&path, bytes).unwrap();
    let opened = open_input(&path, true).unwrap();
    let from_file = catalogue_file(&opened.file, opened.size);
    assert_eq!(
        format!("{:?}", from_file.fields),
        format!("{:?}", cat.fields)
    );
    assert_eq!(from_file.problems, cat.problems);
    assert_eq!(from_file.cut_at_end, cat.cut_at_end);
    let mut n = 0;
    for f in &cat.fields {
        let _ = parse_grid(&f.grid_definition);
        let whole = decode_raw(bytes, f);
        let message = read_ranges(
            &opened.file,
            opened.size,
            &[(f.message_offset as u64, f.message_len as u64)],
        )
        .unwrap();
        let alone = decode_raw(&message, &f.moved(0));
        assert_eq!(
            format!(
                "{:?}",
                whole
                    .as_ref()
                    .map(|v| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>())
            ),
            format!(
                "{:?}",
                alone
                    .as_ref()
                    .map(|v| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>())
            ),
            "field {}",
            f.index
        );
        if whole.is_ok() {
            n += 1;
        }
    }
    let _ = std::fs::remove_file(&path);
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
