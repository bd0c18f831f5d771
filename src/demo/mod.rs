//! The demo: an invented scenario written as GRIB2 by our own encoder, then
//! processed by the same pipeline as real model output.
//!
//! In: an output directory. Out: GRIB2 input files under `incoming/` and the
//! products under `products/`. The data are invented; they belong to the demo only.

pub mod encode;
pub mod scenario;

use std::path::{Path, PathBuf};

use chrono::{NaiveDate, NaiveDateTime};

use encode::{encode, Message};

/// Centre number written into the demo files: 255, "missing" in common code table C-11,
/// since the demo model belongs to no centre.
pub const DEMO_CENTRE: u16 = 255;

/// The demo's usual cycle: 2026-03-14 00 UTC.
pub fn default_cycle() -> NaiveDateTime {
    NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap_or_default()
}

/// Write the scenario's steps (lead hours) of the cycle `reference` as one
/// GRIB2 file per step into `dir`. The scenario evolves with the valid time,
/// so two cycles agree where their valid times meet.
pub fn write_inputs(
    dir: &Path,
    reference: NaiveDateTime,
    leads: &[u32],
) -> std::io::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)?;
    let mut out = Vec::new();
    for &lead in leads {
        // The invented weather depends on the valid time only.
        let valid_h = (reference - default_cycle()).num_minutes() as f64 / 60.0 + f64::from(lead);
        let s = scenario::step(valid_h);
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
