//! The demo: an invented scenario written as GRIB2 by our own encoder, then
//! processed by the same pipeline as real model output.
//!
//! In: an output directory. Out: GRIB2 input files under `incoming/` and the
//! products under `products/`. The data are invented; they belong to the demo only.

pub mod encode;
pub mod scenario;

use std::path::{Path, PathBuf};

use chrono::NaiveDate;

use encode::{encode, Message};

/// Centre number written into the demo files: 255, "missing" in common code table C-11,
/// since the demo model belongs to no centre.
pub const DEMO_CENTRE: u16 = 255;

/// Write the scenario's steps (lead hours) as one GRIB2 file per step into `dir`.
pub fn write_inputs(dir: &Path, leads: &[u32]) -> std::io::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)?;
    let reference = NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .ok_or_else(|| std::io::Error::other("bad demo date"))?;
    let mut out = Vec::new();
    for &lead in leads {
        let s = scenario::step(f64::from(lead));
        let mut bytes = Vec::new();
        for (p, t, z, u, v) in &s.levels {
            for (param, vals, dscale) in [
                ((0, 0, 0), t, 2),
                ((0, 3, 5), z, 1),
                ((0, 2, 2), u, 2),
                ((0, 2, 3), v, 2),
            ] {
                bytes.extend(encode(&Message {
                    centre: DEMO_CENTRE,
                    reference,
                    lead_hours: lead,
                    param,
                    surface: (100, p * 100.0),
                    grid: scenario::GRID,
                    grid_relative_winds: true,
                    values: vals,
                    decimal_scale: dscale,
                }));
            }
        }
        let path = dir.join(format!(
            "lwdemo_{}_{lead:03}.grib2",
            reference.format("%Y%m%d%H")
        ));
        let tmp = dir.join(format!(".{}.tmp", lead));
        std::fs::write(&tmp, &bytes)?;
        std::fs::rename(&tmp, &path)?;
        out.push(path);
    }
    Ok(out)
}
