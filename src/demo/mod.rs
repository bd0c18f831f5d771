//! The demo: an invented scenario written as GRIB2 by our own encoder, then
//! processed by the same pipeline as real model output.
//!
//! In: an output directory. Out: GRIB2 input files under `incoming/` and the
//! products under `products/`. The data are invented; they belong to the demo only.

pub mod encode;
pub mod play;
pub mod scenario;

use std::path::{Path, PathBuf};

use chrono::{NaiveDate, NaiveDateTime};

use encode::{encode_compact, GridSpec, Message};
use scenario::StepFields;

/// Centre number written into the demo files: 255, "missing" in common code table C-11,
/// since the demo model belongs to no centre.
pub const DEMO_CENTRE: u16 = 255;

/// The invented centre the demo's files come from, named in their `institution` through
/// the demo's configuration (`output.institutions`): it exists nowhere else.
pub const DEMO_INSTITUTION: &str = "Harrowmere Forecast Centre (invented for the leeward demo)";

/// The lead times of one full demo cycle: 48 hours in 6-hour steps.
pub const CYCLE_LEADS: [u32; 9] = [0, 6, 12, 18, 24, 30, 36, 42, 48];

/// Most bits a packed value takes in the demo files.
const MAX_BITS: u32 = 16;

/// Decimal scale factors D (values kept to 10^-D of their unit): temperature 0.01 K,
/// height 0.1 gpm, wind 0.01 m/s, specific humidity 1e-8 kg/kg, surface pressure 1 Pa.
const D_TEMPERATURE: i16 = 2;
const D_HEIGHT: i16 = 1;
const D_WIND: i16 = 2;
const D_HUMIDITY: i16 = 8;
const D_PRESSURE: i16 = 0;

/// The demo's usual cycle: 2026-03-14 00 UTC.
pub fn default_cycle() -> NaiveDateTime {
    NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap_or_default()
}

/// Write the regional scenario's steps (lead hours) of the cycle `reference` as
/// one GRIB2 file per step, `lwdemo_{YYYYMMDDHH}_{HHH}.grib2`, into `dir`. The
/// scenario evolves with the valid time, so two cycles agree where their valid
/// times meet.
pub fn write_inputs(
    dir: &Path,
    reference: NaiveDateTime,
    leads: &[u32],
) -> std::io::Result<Vec<PathBuf>> {
    write_steps(
        dir,
        "lwdemo",
        reference,
        leads,
        scenario::GRID,
        true,
        scenario::step,
    )
}

/// Write the global scenario (5-degree latitude/longitude grid, winds toward east
/// and north) as `lwglobal_{YYYYMMDDHH}_{HHH}.grib2`, one file per step, into `dir`.
pub fn write_global_inputs(
    dir: &Path,
    reference: NaiveDateTime,
    leads: &[u32],
) -> std::io::Result<Vec<PathBuf>> {
    write_steps(
        dir,
        "lwglobal",
        reference,
        leads,
        scenario::GLOBAL_GRID,
        false,
        scenario::global_step,
    )
}

/// Hours from the scenario's origin (2026-03-14 00 UTC) to the valid time.
fn valid_hours(reference: NaiveDateTime, lead: u32) -> f64 {
    (reference - default_cycle()).num_minutes() as f64 / 60.0 + f64::from(lead)
}

/// The GRIB2 messages of one step: terrain, surface pressure and mean sea-level pressure first, then per
/// level from the bottom up temperature, specific humidity, height and winds.
fn step_messages(
    s: &StepFields,
    reference: NaiveDateTime,
    lead: u32,
    grid: GridSpec,
    grid_relative_winds: bool,
) -> Vec<u8> {
    let message = |param, surface, values: &[f64], decimal_scale| {
        encode_compact(
            &Message {
                centre: DEMO_CENTRE,
                reference,
                lead_hours: lead,
                param,
                surface,
                grid,
                grid_relative_winds,
                values,
                decimal_scale,
            },
            MAX_BITS,
        )
    };
    let mut bytes = Vec::new();
    // Ground (code table 4.5 type 1): geopotential height of the terrain, surface pressure.
    bytes.extend(message((0, 3, 5), (1, 0.0), &s.terrain, D_HEIGHT));
    bytes.extend(message(
        (0, 3, 0),
        (1, 0.0),
        &s.surface_pressure,
        D_PRESSURE,
    ));
    // Mean sea level (code table 4.5 type 101): pressure reduced to mean sea level.
    bytes.extend(message((0, 3, 1), (101, 0.0), &s.mslp, D_PRESSURE));
    for l in &s.levels {
        let surface = (100, l.p * 100.0);
        for (param, values, d) in [
            ((0, 0, 0), &l.t, D_TEMPERATURE),
            ((0, 1, 0), &l.q, D_HUMIDITY),
            ((0, 3, 5), &l.z, D_HEIGHT),
            ((0, 2, 2), &l.u, D_WIND),
            ((0, 2, 3), &l.v, D_WIND),
        ] {
            bytes.extend(message(param, surface, values, d));
        }
    }
    bytes
}

fn write_steps(
    dir: &Path,
    prefix: &str,
    reference: NaiveDateTime,
    leads: &[u32],
    grid: GridSpec,
    grid_relative_winds: bool,
    weather: fn(f64) -> StepFields,
) -> std::io::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)?;
    let mut out = Vec::new();
    for &lead in leads {
        // The invented weather depends on the valid time only.
        let s = weather(valid_hours(reference, lead));
        let bytes = step_messages(&s, reference, lead, grid, grid_relative_winds);
        let path = dir.join(format!(
            "{prefix}_{}_{lead:03}.grib2",
            reference.format("%Y%m%d%H")
        ));
        let tmp = dir.join(format!(".{prefix}_{lead}.tmp"));
        std::fs::write(&tmp, &bytes)?;
        std::fs::rename(&tmp, &path)?;
        out.push(path);
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ingest::catalogue::catalogue;
    use crate::ingest::decode::decode_raw;

    fn tmp(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("leeward-demo-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    /// (discipline, category, number, level kind, level) of a field.
    type Key = (u8, u8, u8, u8, i64);

    /// Every field of a file with its values.
    fn decoded(path: &Path) -> Vec<(Key, Vec<f32>)> {
        let bytes = std::fs::read(path).unwrap();
        let cat = catalogue(&bytes);
        assert!(cat.problems.is_empty(), "{:?}", cat.problems);
        cat.fields
            .iter()
            .map(|f| {
                let key = (
                    f.discipline,
                    f.category,
                    f.number,
                    f.level.kind,
                    f.level.value.unwrap_or(0.0).round() as i64,
                );
                (key, decode_raw(&bytes, f).unwrap())
            })
            .collect()
    }

    #[test]
    fn two_cycles_agree_at_the_same_valid_time_and_files_stay_small() {
        let d = tmp("cycles");
        let a = write_inputs(&d, default_cycle(), &[12]).unwrap();
        let later = default_cycle() + chrono::TimeDelta::hours(6);
        let b = write_inputs(&d, later, &[6]).unwrap();
        assert!(a[0].ends_with("lwdemo_2026031400_012.grib2"));
        assert!(b[0].ends_with("lwdemo_2026031406_006.grib2"));
        let size = std::fs::metadata(&a[0]).unwrap().len();
        assert!(size < 1_600_000, "{size} bytes");
        let (fa, fb) = (decoded(&a[0]), decoded(&b[0]));
        // Terrain, surface pressure and mean sea-level pressure, then 5 quantities on 21 levels.
        assert_eq!(fa.len(), 3 + 5 * 21);
        assert_eq!(fa[0].0, (0, 3, 5, 1, 0));
        assert_eq!(fa[1].0, (0, 3, 0, 1, 0));
        assert_eq!(fa[2].0, (0, 3, 1, 101, 0));
        for ((ka, va), (kb, vb)) in fa.iter().zip(&fb) {
            assert_eq!(ka, kb);
            assert_eq!(va, vb, "{ka:?} differs between the cycles");
        }
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn the_global_files_are_on_the_five_degree_grid() {
        let d = tmp("global");
        let f = write_global_inputs(&d, default_cycle(), &[0, 6]).unwrap();
        assert!(f[1].ends_with("lwglobal_2026031400_006.grib2"));
        let bytes = std::fs::read(&f[1]).unwrap();
        let cat = catalogue(&bytes);
        assert!(cat.problems.is_empty(), "{:?}", cat.problems);
        assert_eq!(cat.fields.len(), 3 + 5 * 21);
        let first = &cat.fields[0];
        let (g, _) = crate::ingest::grid::parse_grid(&bytes[first.sect3.clone()]).unwrap();
        assert_eq!(g.shape(), (37, 72));
        let _ = std::fs::remove_dir_all(&d);
    }
}
