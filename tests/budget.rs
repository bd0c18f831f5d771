//! The PV budget between consecutive steps, end to end through `leeward process`:
//! a steady, conserved case (solid-body flow in a constant-lapse-rate atmosphere,
//! the same at both steps) must give predicted = actual vorticity and no PV change,
//! whichever step arrives first.

mod common;

use std::path::{Path, PathBuf};

use leeward::demo::encode::{encode, GridSpec, Message};

const LEVELS: [f64; 12] = [
    1000.0, 925.0, 850.0, 700.0, 600.0, 500.0, 400.0, 300.0, 250.0, 200.0, 150.0, 100.0,
];

fn write_step(dir: &Path, lead: u32) -> PathBuf {
    let grid = GridSpec::LatLon {
        ni: 72,
        nj: 37,
        lat0: -90.0,
        lon0: 0.0,
        dlat: 5.0,
        dlon: 5.0,
    };
    let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap();
    let (ni, nj) = (72, 37);
    let mut bytes = Vec::new();
    for p in LEVELS {
        // Constant lapse rate (docs/references.md): T = T0 (p/p0)^(R gamma / g).
        let t = vec![288.15 * (p / 1013.25f64).powf(287.05 * 0.0065 / 9.80665); ni * nj];
        // Solid-body flow u = u0 cos(lat) (Williamson et al. 1992; docs/references.md).
        let u: Vec<f64> = (0..ni * nj)
            .map(|k| 30.0 * (-90.0 + 5.0 * (k / ni) as f64).to_radians().cos())
            .collect();
        let v = vec![0.0; ni * nj];
        for (param, vals) in [((0, 0, 0), &t), ((0, 2, 2), &u), ((0, 2, 3), &v)] {
            bytes.extend(encode(&Message {
                centre: 255,
                reference,
                lead_hours: lead,
                param,
                surface: (100, p * 100.0),
                grid,
                grid_relative_winds: false,
                values: vals,
                decimal_scale: 3,
            }));
        }
    }
    std::fs::create_dir_all(dir).unwrap();
    let path = dir.join(format!("s{lead:03}.grib2"));
    std::fs::write(&path, bytes).unwrap();
    path
}

fn process(out: &Path, input: &Path) {
    let o = std::process::Command::new(common::leeward_bin())
        .args([
            "process",
            "--out",
            out.to_str().unwrap(),
            input.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

fn values(path: &Path, name: &str) -> Vec<f32> {
    leeward::output::quiet_hdf5_errors();
    let f = netcdf::open(path).unwrap();
    let v = f.variable(name).unwrap_or_else(|| panic!("{name} missing"));
    let fill = leeward::output::cf::FILL_F32;
    v.get_values::<f32, _>(..)
        .unwrap()
        .into_iter()
        .filter(|x| *x != fill)
        .collect()
}

#[test]
fn steady_conserved_flow_has_a_closed_budget_in_both_orders() {
    for later_first in [false, true] {
        let d = std::env::temp_dir().join(format!(
            "leeward-budget-{later_first}-{}",
            std::process::id()
        ));
        let _ = std::fs::remove_dir_all(&d);
        let s0 = write_step(&d.join("in"), 0);
        let s6 = write_step(&d.join("in"), 6);
        let out = d.join("out");
        if later_first {
            process(&out, &s6);
            process(&out, &s0);
        } else {
            process(&out, &s0);
            process(&out, &s6);
        }
        let later = out.join("c255_20260314T0000Z_006h.nc");
        let diff = values(&later, "bud_zeta_diff");
        let stretch = values(&later, "bud_stretch");
        let dpv = values(&later, "bud_dpvdt");
        assert!(
            diff.len() > 1000 && dpv.len() > 1000,
            "budget computed at enough points"
        );
        // Closed form: steady flow along latitude circles conserves eta and depth exactly.
        let worst = diff.iter().fold(0f32, |a, b| a.max(b.abs()));
        assert!(
            worst < 1e-6,
            "predicted vs actual vorticity: worst {worst} s-1 ({later_first})"
        );
        assert!(stretch.iter().all(|s| s.abs() < 1e-3), "no depth change");
        let worst_pv = dpv.iter().fold(0f32, |a, b| a.max(b.abs()));
        assert!(
            worst_pv < 0.05,
            "PV change {worst_pv} PVU/h ({later_first})"
        );
        let _ = std::fs::remove_dir_all(&d);
    }
}
