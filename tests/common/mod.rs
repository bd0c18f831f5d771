//! Shared helpers for leeward's integration tests.
#![allow(dead_code)]

use std::path::PathBuf;

/// The folder of real GRIB2 samples: `$LEEWARD_SAMPLES`, else `../shared/data/grib2`
/// beside the checkout. `None`, with a visible message, when it is absent.
pub fn samples_dir(test: &str) -> Option<PathBuf> {
    let dir = std::env::var_os("LEEWARD_SAMPLES")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../shared/data/grib2"));
    if dir.join("reference-decode.json").is_file() {
        Some(dir)
    } else {
        eprintln!(
            "SKIPPED {test}: real GRIB2 samples not found at {} (set LEEWARD_SAMPLES)",
            dir.display()
        );
        None
    }
}

/// Path of the built `leeward` binary for command-line tests.
pub fn leeward_bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_leeward"))
}

/// Pearson correlation of two equally long samples.
pub fn correlation(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    sab / (saa * sbb).sqrt()
}

/// Root-mean-square difference.
pub fn rms_diff(a: &[f64], b: &[f64]) -> f64 {
    (a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum::<f64>() / a.len() as f64).sqrt()
}

/// Largest difference the packing allows between two correct decoders: half a
/// step of the packed integers, 2^E / 10^D / 2 (WMO-No. 306, template 5.0
/// regulation Y = (R + X 2^E) / 10^D), plus f32 rounding of the values.
pub fn tolerance(sect5: &[u8], value: f64) -> f64 {
    let e = leeward::ingest::bytes::u16_at(sect5, 15).map(|v| {
        let mag = i32::from(v & 0x7fff);
        if v & 0x8000 != 0 {
            -mag
        } else {
            mag
        }
    });
    let d = leeward::ingest::bytes::u16_at(sect5, 17).map(|v| {
        let mag = i32::from(v & 0x7fff);
        if v & 0x8000 != 0 {
            -mag
        } else {
            mag
        }
    });
    let step = match (e, d) {
        (Some(e), Some(d)) => 2f64.powi(e) / 10f64.powi(d),
        _ => 0.0,
    };
    0.5 * step + 2e-6 * value.abs() + 1e-9
}
