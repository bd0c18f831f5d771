//! Changes in time read back from published files: thickness change within a
//! cycle (steps fed in both orders) and run-to-run change (cycles processed in
//! separate runs, as after a restart, in both orders).

mod common;

use std::path::{Path, PathBuf};

use leeward::demo::encode::{encode, GridSpec, Message};

const GRID: GridSpec = GridSpec::LatLon {
    ni: 10,
    nj: 8,
    lat0: 40.0,
    lon0: 0.0,
    dlat: 1.0,
    dlon: 1.0,
};
const LEVELS: [f64; 5] = [1000.0, 925.0, 850.0, 700.0, 500.0];

/// US Standard Atmosphere 1976 troposphere temperature (docs/references.md "Constants") plus `warm` K.
fn t_std(p_hpa: f64, warm: f64) -> f64 {
    288.15 * (p_hpa / 1013.25f64).powf(287.05 * 0.0065 / 9.80665) + warm
}

fn write_step(dir: &Path, ref_hour: u32, lead: u32, warm: f64) -> PathBuf {
    let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(ref_hour, 0, 0))
        .unwrap();
    let n = 80;
    let mut bytes = Vec::new();
    for p in LEVELS {
        let t = vec![t_std(p, warm); n];
        bytes.extend(encode(&Message {
            centre: 255,
            reference,
            lead_hours: lead,
            param: (0, 0, 0),
            surface: (100, p * 100.0),
            grid: GRID,
            grid_relative_winds: false,
            values: &t,
            decimal_scale: 3,
        }));
    }
    std::fs::create_dir_all(dir).unwrap();
    let path = dir.join(format!("t{ref_hour:02}_{lead:03}.grib2"));
    std::fs::write(&path, bytes).unwrap();
    path
}

fn process(out: &Path, inputs: &[&Path]) {
    let mut cmd = std::process::Command::new(common::leeward_bin());
    cmd.args(["process", "--out", out.to_str().unwrap()]);
    for i in inputs {
        cmd.arg(i);
    }
    let o = cmd.output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

fn read(path: &Path, name: &str) -> Vec<f32> {
    leeward::output::quiet_hdf5_errors();
    let f = netcdf::open(path).unwrap();
    let v = f
        .variable(name)
        .unwrap_or_else(|| panic!("{name} missing in {}", path.display()));
    v.get_values(..).unwrap()
}

fn tmp(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("leeward-changes-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    d
}

/// Closed form (hypsometric equation, docs/references.md): warming a column uniformly by dT
/// changes the 1000-500 hPa thickness by (R dT / g) ln 2: 40.6 m for 2 K.
fn expected(dt: f64) -> f64 {
    287.05 * dt / 9.80665 * 2f64.ln()
}

#[test]
fn thickness_change_in_both_orders() {
    for order in ["earlier first", "later first"] {
        let d = tmp(if order == "earlier first" { "a" } else { "b" });
        let s0 = write_step(&d.join("in"), 0, 0, 0.0);
        let s6 = write_step(&d.join("in"), 0, 6, 2.0);
        let out = d.join("out");
        if order == "earlier first" {
            process(&out, &[&s0]);
            process(&out, &[&s6]);
        } else {
            process(&out, &[&s6]);
            process(&out, &[&s0]);
        }
        let later = out.join("c255_20260314T0000Z_006h.nc");
        // One variable per layer (docs/output.md "Thickness"): the 1000-500 hPa layer.
        let chg = read(&later, "thick_chg_06h_1000_500");
        let together = d.join("together");
        process(&together, &[&s6, &s0]);
        assert_eq!(
            read(
                &together.join("c255_20260314T0000Z_006h.nc"),
                "thick_chg_06h_1000_500"
            ),
            chg,
            "{order}: one run"
        );
        for v in &chg[..80] {
            assert!(
                (f64::from(*v) - expected(2.0)).abs() < 1.0,
                "{order}: {v} vs {}",
                expected(2.0)
            );
        }
        let names: Vec<_> = std::fs::read_dir(&out)
            .unwrap()
            .flatten()
            .map(|e| e.file_name())
            .collect();
        assert!(
            names.iter().all(|n| !n.to_string_lossy().starts_with('.')),
            "{order}: temporaries left"
        );
        let _ = std::fs::remove_dir_all(&d);
    }
}

#[test]
fn run_to_run_change_survives_a_restart_in_both_orders() {
    for order in ["previous cycle first", "next cycle first"] {
        let d = tmp(if order == "previous cycle first" {
            "r1"
        } else {
            "r2"
        });
        // Cycle 00 UTC + 12 h and cycle 06 UTC + 6 h: the same valid time; the newer run is 1 K warmer.
        let a = write_step(&d.join("in"), 0, 12, 0.0);
        let b = write_step(&d.join("in"), 6, 6, 1.0);
        let out = d.join("out");
        // Separate processes: nothing survives in memory between them.
        if order == "previous cycle first" {
            process(&out, &[&a]);
            process(&out, &[&b]);
        } else {
            process(&out, &[&b]);
            process(&out, &[&a]);
        }
        let newer = out.join("c255_20260314T0600Z_006h.nc");
        let r2r = read(&newer, "thick_r2r_1000_500");
        for v in &r2r[..80] {
            assert!(
                (f64::from(*v) - expected(1.0)).abs() < 1.0,
                "{order}: {v} vs {}",
                expected(1.0)
            );
        }
        // The same two cycles in one run give identical results.
        let together = d.join("together");
        process(&together, &[&a, &b]);
        assert_eq!(
            read(
                &together.join("c255_20260314T0600Z_006h.nc"),
                "thick_r2r_1000_500"
            ),
            r2r,
            "{order}"
        );
        let older = out.join("c255_20260314T0000Z_012h.nc");
        assert!(
            {
                leeward::output::quiet_hdf5_errors();
                netcdf::open(&older)
            }
            .unwrap()
            .variable("thick_r2r_1000_500")
            .is_none(),
            "{order}: the older cycle has no previous one"
        );
        let _ = std::fs::remove_dir_all(&d);
    }
}
