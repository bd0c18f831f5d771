//! The direct unpacking of templates 5.0, 5.2 and 5.3 (`leeward::ingest::unpack`)
//! checked against two outside decoders:
//! - the `grib` crate 0.20 (`grib::Grib2SubmessageDecoder`), bit for bit, on
//!   every simple or complex packed field of the real samples, of the benchmark
//!   files and of files ecCodes encodes here;
//! - ecCodes 2.50 (PyPI `eccodes`), within half a packing step 2^E 10^-D, on the
//!   files it encodes with bitmaps and with spatial differencing of order 1 and 2;
//!
//! and corrupt input (truncated, lying, random) that must give `None` or an
//! error, never a panic.

mod common;

use std::path::{Path, PathBuf};

use leeward::ingest::catalogue::{catalogue, FieldEntry};
use leeward::ingest::unpack::unpack;
use proptest::prelude::*;

/// Sections 5, 6, 7 of a field as `decode_raw` hands them on: bitmap indicator
/// 254 made 0, code table 5.1 "integer" made "floating point".
fn sections(bytes: &[u8], f: &FieldEntry) -> Option<(Vec<u8>, Vec<u8>, Vec<u8>)> {
    let mut s5 = bytes.get(f.sect5.clone())?.to_vec();
    let mut s6 = bytes.get(f.sect6.clone())?.to_vec();
    let s7 = bytes.get(f.sect7.clone())?.to_vec();
    if s6.len() > 5 && f.bitmap_indicator == 254 {
        s6[5] = 0;
    }
    if s5.get(20) == Some(&1) {
        s5[20] = 0;
    }
    Some((s5, s6, s7))
}

/// The `grib` crate's decode of the same sections (the reference).
fn crate_decode(n: usize, s5: &[u8], s6: &[u8], s7: &[u8]) -> Result<Vec<f32>, String> {
    let run = || -> Result<Vec<f32>, String> {
        let d = grib::Grib2SubmessageDecoder::new(n, s5.to_vec(), s6.to_vec(), s7.to_vec())
            .map_err(|e| e.to_string())?;
        let v: Vec<f32> = d.dispatch().map_err(|e| e.to_string())?.collect();
        if v.len() != n {
            return Err(format!("{} values for {n} points", v.len()));
        }
        Ok(v)
    };
    std::panic::catch_unwind(run).unwrap_or_else(|_| Err("the crate stopped".into()))
}

/// Bit-for-bit equality, any NaN equal to any NaN.
fn same_bits(a: &[f32], b: &[f32]) -> Option<usize> {
    if a.len() != b.len() {
        return Some(usize::MAX);
    }
    a.iter()
        .zip(b)
        .position(|(x, y)| !(x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan())))
}

/// Fields compared per template (index 0, 2, 3) and fields left to the crate.
#[derive(Default, Debug)]
struct Tally {
    compared: [usize; 4],
    fell_back: usize,
    both_refused: usize,
}

impl Tally {
    /// What was compared, for the test's output.
    fn report(&self, what: &str) {
        eprintln!(
            "{what}: fields compared bit for bit with the grib crate: 5.0 {}, 5.2 {}, 5.3 {}; \
             left to the crate {}; refused by both {}",
            self.compared[0], self.compared[2], self.compared[3], self.fell_back, self.both_refused
        );
    }
}

/// Compare every template 5.0/5.2/5.3 field of one file, panicking on the
/// first difference; returns the tally.
fn compare_file(path: &Path, tally: &mut Tally) {
    let bytes = std::fs::read(path).unwrap();
    let name = path.display();
    for f in catalogue(&bytes).fields {
        if !matches!(f.data_template, 0 | 2 | 3) || f.unusable.is_some() {
            continue;
        }
        let Some((s5, s6, s7)) = sections(&bytes, &f) else {
            continue;
        };
        let n = f.num_points;
        let reference = crate_decode(n, &s5, &s6, &s7);
        match (unpack(f.data_template, &s5, &s6, &s7, n), reference) {
            (None, _) => tally.fell_back += 1,
            (Some(Ok(v)), Ok(r)) => {
                if let Some(k) = same_bits(&v, &r) {
                    panic!(
                        "{name} field {}: differs from the grib crate at point {k}: {:?} vs {:?}",
                        f.index,
                        v.get(k),
                        r.get(k)
                    );
                }
                tally.compared[usize::from(f.data_template)] += 1;
            }
            (Some(Err(e)), Ok(_)) => {
                panic!(
                    "{name} field {}: refused ({e}) but the grib crate decodes it",
                    f.index
                )
            }
            (Some(Ok(_)), Err(e)) => {
                panic!(
                    "{name} field {}: decoded but the grib crate refuses it ({e})",
                    f.index
                )
            }
            (Some(Err(_)), Err(_)) => tally.both_refused += 1,
        }
    }
}

#[test]
fn every_sample_field_is_bit_for_bit_the_grib_crates() {
    let Some(dir) = common::samples_dir("every_sample_field_is_bit_for_bit_the_grib_crates") else {
        return;
    };
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "grib2"))
        .collect();
    files.sort();
    let mut tally = Tally::default();
    for p in &files {
        compare_file(p, &mut tally);
    }
    tally.report("real samples");
    assert_eq!(
        tally.fell_back, 0,
        "every sample field of 5.0/5.2/5.3 read directly"
    );
    assert!(tally.compared.iter().sum::<usize>() > 0);
}

#[test]
fn benchmark_files_are_bit_for_bit_the_grib_crates() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench");
    for name in ["step-0.25deg.grib2", "step-1.0deg.grib2"] {
        let path = root.join(name);
        if !path.is_file() {
            eprintln!(
                "SKIPPED {name}: benchmark file not found at {}",
                path.display()
            );
            continue;
        }
        let mut tally = Tally::default();
        compare_file(&path, &mut tally);
        tally.report(name);
        assert_eq!(tally.fell_back + tally.both_refused, 0, "{name}");
    }
}

/// ecCodes 2.50 encoder of the fixtures (PyPI `eccodes`): a smooth field on a
/// 97 x 61 latitude-longitude grid packed with templates 5.0, 5.2, 5.3 (order 1
/// and 2), with and without a bitmap; ecCodes' own decode is written beside each
/// file as little-endian f64 (NaN where missing).
const FIXTURE_PY: &str = r#"
import sys, numpy as np, eccodes
out = sys.argv[1]
cases = [("simple", "grid_simple", 0, False, 12), ("simple-bitmap", "grid_simple", 0, True, 16),
         ("complex", "grid_complex", 0, False, 14), ("complex-bitmap", "grid_complex", 0, True, 12),
         ("spatial1", "grid_complex_spatial_differencing", 1, False, 16),
         ("spatial2", "grid_complex_spatial_differencing", 2, False, 16),
         ("spatial1-bitmap", "grid_complex_spatial_differencing", 1, True, 13),
         ("spatial2-bitmap", "grid_complex_spatial_differencing", 2, True, 18)]
ni, nj = 97, 61
lon = np.linspace(0, 2 * np.pi, ni)
lat = np.linspace(-1.2, 1.2, nj)
for name, packing, order, bitmap, bits in cases:
    h = eccodes.codes_grib_new_from_samples("regular_ll_sfc_grib2")
    eccodes.codes_set_long(h, "Ni", ni)
    eccodes.codes_set_long(h, "Nj", nj)
    eccodes.codes_set(h, "latitudeOfFirstGridPointInDegrees", 70.0)
    eccodes.codes_set(h, "latitudeOfLastGridPointInDegrees", -50.0)
    eccodes.codes_set(h, "longitudeOfFirstGridPointInDegrees", 0.0)
    eccodes.codes_set(h, "longitudeOfLastGridPointInDegrees", 360.0 * (ni - 1) / ni)
    eccodes.codes_set(h, "iDirectionIncrementInDegrees", 360.0 / ni)
    eccodes.codes_set(h, "jDirectionIncrementInDegrees", 2.0)
    v = (250 + 40 * np.cos(lat)[:, None] * np.sin(3 * lon)[None, :] + 7 * np.sin(11 * lat)[:, None]).ravel()
    eccodes.codes_set_string(h, "packingType", packing)
    if bitmap:
        eccodes.codes_set(h, "missingValue", 9999.0)
        eccodes.codes_set_long(h, "bitmapPresent", 1)
        m = (np.arange(v.size) * 7919) % 13 < 3
        m[:5] = True
        v = np.where(m, 9999.0, v)
    eccodes.codes_set_string(h, "packingType", packing)
    eccodes.codes_set_long(h, "bitsPerValue", bits)
    if order:
        eccodes.codes_set_long(h, "orderOfSpatialDifferencing", order)
    eccodes.codes_set_values(h, v)
    msg = eccodes.codes_get_message(h)
    eccodes.codes_release(h)
    open(f"{out}/{name}.grib2", "wb").write(msg)
    g = eccodes.codes_new_from_message(msg)
    back = np.asarray(eccodes.codes_get_values(g), dtype=float)
    if bitmap:
        back = np.where(back == 9999.0, np.nan, back)
    back.astype("<f8").tofile(f"{out}/{name}.ecc.f64")
    eccodes.codes_release(g)
"#;

/// Write the ecCodes fixtures into `target/unpack-fixtures/`; `None`, with a
/// visible message, when the Python environment with ecCodes is unavailable.
fn fixtures() -> Option<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = root.join("target/unpack-fixtures");
    std::fs::create_dir_all(&dir).ok()?;
    let py = std::process::Command::new("bash")
        .arg(root.join("tests/setup-python.sh"))
        .output()
        .ok()
        .filter(|o| o.status.success())
        .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string());
    let Some(py) = py.filter(|p| !p.is_empty()) else {
        eprintln!("SKIPPED ecCodes fixtures: tests/setup-python.sh found no Python with ecCodes");
        return None;
    };
    let script = dir.join("write.py");
    std::fs::write(&script, FIXTURE_PY).ok()?;
    let out = std::process::Command::new(&py)
        .arg(&script)
        .arg(&dir)
        .output();
    match out {
        Ok(o) if o.status.success() => Some(dir),
        Ok(o) => {
            eprintln!(
                "SKIPPED ecCodes fixtures: the encoder failed: {}",
                String::from_utf8_lossy(&o.stderr)
            );
            None
        }
        Err(e) => {
            eprintln!("SKIPPED ecCodes fixtures: cannot run {py}: {e}");
            None
        }
    }
}

#[test]
fn eccodes_fixtures_match_the_crate_bit_for_bit_and_eccodes_within_half_a_step() {
    let Some(dir) = fixtures() else {
        return;
    };
    let names = [
        ("simple", 0u16, false),
        ("simple-bitmap", 0, true),
        ("complex", 2, false),
        ("complex-bitmap", 2, true),
        ("spatial1", 3, false),
        ("spatial2", 3, false),
        ("spatial1-bitmap", 3, true),
        ("spatial2-bitmap", 3, true),
    ];
    let mut tally = Tally::default();
    for (name, template, bitmap) in names {
        let path = dir.join(format!("{name}.grib2"));
        compare_file(&path, &mut tally);
        let bytes = std::fs::read(&path).unwrap();
        let cat = catalogue(&bytes);
        let f = cat.fields.first().expect("one field");
        assert_eq!(f.data_template, template, "{name}: template");
        assert_eq!(f.bitmap_indicator == 0, bitmap, "{name}: bitmap");
        let (s5, s6, s7) = sections(&bytes, f).unwrap();
        if template == 3 {
            let order = s5[47];
            let want = if name.starts_with("spatial1") { 1 } else { 2 };
            assert_eq!(order, want, "{name}: order of spatial differencing");
        }
        let ours = unpack(template, &s5, &s6, &s7, f.num_points)
            .expect("read directly")
            .expect("decoded");
        let ecc: Vec<f64> = std::fs::read(dir.join(format!("{name}.ecc.f64")))
            .unwrap()
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
            .collect();
        assert_eq!(ours.len(), ecc.len(), "{name}: point count");
        // Packing step 2^E 10^-D (WMO-No. 306, template 5.0 octets 16-19).
        let sm = |v: u16| {
            let m = i32::from(v & 0x7fff);
            if v & 0x8000 != 0 {
                -m
            } else {
                m
            }
        };
        let e = sm(u16::from_be_bytes([s5[15], s5[16]]));
        let d = sm(u16::from_be_bytes([s5[17], s5[18]]));
        let half = 0.5 * 2f64.powi(e) * 10f64.powi(-d);
        let mut missing = 0;
        for (k, (a, b)) in ours.iter().zip(&ecc).enumerate() {
            assert_eq!(
                a.is_nan(),
                b.is_nan(),
                "{name}: point {k} missing in one only"
            );
            if a.is_nan() {
                missing += 1;
                continue;
            }
            assert!(
                (f64::from(*a) - b).abs() <= half,
                "{name}: point {k}: {a} vs ecCodes {b} (half step {half})"
            );
        }
        assert_eq!(missing > 0, bitmap, "{name}: missing points");
    }
    eprintln!(
        "ecCodes fixtures: fields compared bit for bit with the grib crate: 5.0 {}, 5.2 {}, 5.3 {}",
        tally.compared[0], tally.compared[2], tally.compared[3]
    );
    assert_eq!(tally.compared, [2, 0, 2, 4]);
}

/// A small field packed by hand with template 5.3 (order 2, no bitmap):
/// groups of 7 values, each with its own reference and width (WMO-No. 306,
/// templates 5.3 and 7.3), for the corrupt-input checks. Returns s5, s6, s7.
fn hand_packed() -> (Vec<u8>, Vec<u8>, Vec<u8>) {
    let n = 40usize;
    let y: Vec<i64> = (0..n as i64).map(|k| 500 + 3 * k * k % 97 - k).collect();
    let mut d: Vec<i64> = vec![0, 0];
    for k in 2..n {
        d.push(y[k] - 2 * y[k - 1] + y[k - 2]);
    }
    let min = *d[2..].iter().min().unwrap();
    let x: Vec<u32> = d.iter().map(|v| (v - min).max(0) as u32).collect();
    let groups: Vec<&[u32]> = x.chunks(7).collect();
    let mut bits = Bits::default();
    let mut payload = Vec::new();
    payload.extend_from_slice(&(y[0] as u16).to_be_bytes());
    payload.extend_from_slice(&(y[1] as u16).to_be_bytes());
    let m = min.unsigned_abs() as u16 | if min < 0 { 0x8000 } else { 0 };
    payload.extend_from_slice(&m.to_be_bytes());
    let widths: Vec<u32> = groups
        .iter()
        .map(|g| {
            let lo = *g.iter().min().unwrap();
            32 - (g.iter().max().unwrap() - lo).leading_zeros()
        })
        .collect();
    for g in &groups {
        bits.put(*g.iter().min().unwrap(), 10);
    }
    bits.pad();
    for w in &widths {
        bits.put(*w, 5);
    }
    bits.pad();
    for g in &groups[..groups.len() - 1] {
        bits.put(g.len() as u32 - 7, 1);
    }
    bits.pad();
    for (g, w) in groups.iter().zip(&widths) {
        let lo = *g.iter().min().unwrap();
        for v in g.iter() {
            bits.put(v - lo, *w);
        }
    }
    bits.pad();
    payload.extend_from_slice(&bits.out);
    let mut s5 = vec![0u8; 49];
    s5[..4].copy_from_slice(&49u32.to_be_bytes());
    s5[4] = 5;
    s5[5..9].copy_from_slice(&(n as u32).to_be_bytes());
    s5[9..11].copy_from_slice(&3u16.to_be_bytes());
    s5[11..15].copy_from_slice(&0f32.to_bits().to_be_bytes());
    s5[19] = 10;
    s5[21] = 1;
    s5[31..35].copy_from_slice(&(groups.len() as u32).to_be_bytes());
    s5[36] = 5;
    s5[37..41].copy_from_slice(&7u32.to_be_bytes());
    s5[41] = 1;
    let last = groups.last().unwrap().len() as u32;
    s5[42..46].copy_from_slice(&last.to_be_bytes());
    s5[46] = 1;
    s5[47] = 2;
    s5[48] = 2;
    let s6 = vec![0, 0, 0, 6, 6, 255];
    let mut s7 = Vec::new();
    s7.extend_from_slice(&((payload.len() + 5) as u32).to_be_bytes());
    s7.push(7);
    s7.extend_from_slice(&payload);
    (s5, s6, s7)
}

/// Bit writer for [`hand_packed`], most significant bit first.
#[derive(Default)]
struct Bits {
    out: Vec<u8>,
    used: u32,
}

impl Bits {
    fn put(&mut self, v: u32, width: u32) {
        for i in (0..width).rev() {
            if self.used.is_multiple_of(8) {
                self.out.push(0);
            }
            let bit = ((v >> i) & 1) as u8;
            *self.out.last_mut().unwrap() |= bit << (7 - self.used % 8);
            self.used += 1;
        }
    }
    fn pad(&mut self) {
        self.used = self.used.div_ceil(8) * 8;
    }
}

#[test]
fn hand_packed_field_is_the_crates_and_the_original_integers() {
    let (s5, s6, s7) = hand_packed();
    let ours = unpack(3, &s5, &s6, &s7, 40).unwrap().unwrap();
    let theirs = crate_decode(40, &s5, &s6, &s7).unwrap();
    assert_eq!(same_bits(&ours, &theirs), None);
    let y: Vec<f32> = (0..40i64)
        .map(|k| (500 + 3 * k * k % 97 - k) as f32)
        .collect();
    assert_eq!(ours, y);
}

/// Sections set up to be wrong in one way each.
fn corrupt(
    kind: u8,
    a: u32,
    b: u8,
    cut: f64,
    noise: Vec<u8>,
) -> (u16, Vec<u8>, Vec<u8>, Vec<u8>, usize) {
    let (mut s5, mut s6, mut s7) = hand_packed();
    let mut n = 40;
    let fix7 = |s7: &mut Vec<u8>| {
        let l = s7.len() as u32;
        s7[..4].copy_from_slice(&l.to_be_bytes());
    };
    match kind % 7 {
        // Section 7 cut short.
        0 => {
            let at = 5 + ((s7.len() - 5) as f64 * cut) as usize;
            s7.truncate(at);
            fix7(&mut s7);
        }
        // A lying number of groups.
        1 => s5[31..35].copy_from_slice(&a.to_be_bytes()),
        // Group widths beyond 32 bits (reference for widths) or descriptor bits.
        2 => {
            s5[35] = b;
            s5[36] = b % 40;
        }
        // Random payload.
        3 => {
            s7.truncate(5);
            s7.extend_from_slice(&noise);
            fix7(&mut s7);
        }
        // Random section 5 after the template number, any template 0/2/3.
        4 => {
            let t = [0u16, 2, 3][usize::from(b % 3)];
            s5[9..11].copy_from_slice(&t.to_be_bytes());
            for (k, v) in noise.iter().enumerate() {
                if let Some(x) = s5.get_mut(11 + k) {
                    *x = *v;
                }
            }
        }
        // A bitmap that is too short or disagrees with the count.
        5 => {
            s6 = vec![0, 0, 0, 0, 6, 0];
            s6.extend(noise.iter().take(usize::from(b % 8)));
            let l = s6.len() as u32;
            s6[..4].copy_from_slice(&l.to_be_bytes());
        }
        // Overwritten octets of section 7 and a different grid size.
        _ => {
            for (k, v) in noise.iter().enumerate().take(8) {
                let at = 5 + (a as usize + k * 31) % (s7.len() - 5);
                s7[at] = *v;
            }
            n = (a % 80) as usize + 1;
        }
    }
    let t = u16::from_be_bytes([s5[9], s5[10]]);
    (t, s5, s6, s7, n)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn corrupt_input_gives_none_or_an_error_never_a_panic(
        kind in 0u8..7,
        a in any::<u32>(),
        b in any::<u8>(),
        cut in 0.0f64..1.0,
        noise in proptest::collection::vec(any::<u8>(), 0..64),
    ) {
        let (t, s5, s6, s7, n) = corrupt(kind, a, b, cut, noise);
        if let Some(Ok(v)) = unpack(t, &s5, &s6, &s7, n) {
            // Whatever decodes must be what the grib crate decodes.
            prop_assert_eq!(v.len(), n);
            if let Ok(r) = crate_decode(n, &s5, &s6, &s7) {
                prop_assert_eq!(same_bits(&v, &r), None);
            }
        }
    }

    #[test]
    fn random_sections_never_panic(
        t in prop_oneof![Just(0u16), Just(2u16), Just(3u16)],
        body5 in proptest::collection::vec(any::<u8>(), 0..50),
        body6 in proptest::collection::vec(any::<u8>(), 0..20),
        body7 in proptest::collection::vec(any::<u8>(), 0..200),
        n in 1usize..200,
    ) {
        let mut s5 = vec![0, 0, 0, 0, 5];
        s5.extend(&body5);
        if s5.len() >= 11 {
            s5[9..11].copy_from_slice(&t.to_be_bytes());
        }
        let l = s5.len() as u32;
        s5[..4].copy_from_slice(&l.to_be_bytes());
        let mut s6 = vec![0, 0, 0, 0, 6, if body6.len() % 2 == 0 { 255 } else { 0 }];
        if s6[5] == 0 {
            s6.extend(&body6);
        }
        let l = s6.len() as u32;
        s6[..4].copy_from_slice(&l.to_be_bytes());
        let mut s7 = vec![0, 0, 0, 0, 7];
        s7.extend(&body7);
        let l = s7.len() as u32;
        s7[..4].copy_from_slice(&l.to_be_bytes());
        if let Some(Ok(v)) = unpack(t, &s5, &s6, &s7, n) {
            prop_assert_eq!(v.len(), n);
        }
    }
}
