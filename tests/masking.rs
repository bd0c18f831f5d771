//! Levels below the ground are masked where the input carries surface pressure
//! (or orography with isobaric heights), and the file says how.

mod common;

use leeward::demo::encode::{encode, GridSpec, Message};

fn field(grid: GridSpec, param: (u8, u8, u8), surface: (u8, f64), values: &[f64]) -> Vec<u8> {
    let reference = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap();
    encode(&Message {
        centre: 255,
        reference,
        lead_hours: 0,
        param,
        surface,
        grid,
        grid_relative_winds: false,
        values,
        decimal_scale: 2,
    })
}

#[test]
fn levels_below_the_surface_pressure_are_missing() {
    let grid = GridSpec::LatLon {
        ni: 12,
        nj: 9,
        lat0: 40.0,
        lon0: 0.0,
        dlat: 1.0,
        dlon: 1.0,
    };
    let n = 12 * 9;
    let mut bytes = Vec::new();
    for p in [1000.0, 925.0, 850.0, 700.0, 500.0] {
        // A standard-atmosphere-like column (docs/references.md "Constants"), uniform in the horizontal.
        let t = vec![288.15 * (p / 1013.25f64).powf(0.190_263); n];
        let u: Vec<f64> = (0..n).map(|k| 10.0 + (k % 12) as f64).collect();
        let v: Vec<f64> = (0..n).map(|k| (k / 12) as f64).collect();
        bytes.extend(field(grid, (0, 0, 0), (100, p * 100.0), &t));
        bytes.extend(field(grid, (0, 2, 2), (100, p * 100.0), &u));
        bytes.extend(field(grid, (0, 2, 3), (100, p * 100.0), &v));
    }
    // Surface pressure 900 hPa on the eastern half (a plateau), 1010 hPa elsewhere.
    let ps: Vec<f64> = (0..n)
        .map(|k| if k % 12 >= 6 { 90_000.0 } else { 101_000.0 })
        .collect();
    bytes.extend(field(grid, (0, 3, 0), (1, 0.0), &ps));

    let dir = std::env::temp_dir().join(format!("leeward-mask-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let input = dir.join("in.grib2");
    std::fs::write(&input, &bytes).unwrap();
    let status = std::process::Command::new(common::leeward_bin())
        .args([
            "process",
            "--out",
            dir.join("out").to_str().unwrap(),
            input.to_str().unwrap(),
        ])
        .status()
        .unwrap();
    assert!(status.success());
    let f = netcdf::open(dir.join("out/c255_20260314T0000Z_000h.nc")).unwrap();
    let masking: String = match f
        .attribute("leeward_below_ground_masking")
        .unwrap()
        .value()
        .unwrap()
    {
        netcdf::AttributeValue::Str(s) => s,
        other => panic!("{other:?}"),
    };
    assert!(masking.contains("surface pressure"), "{masking}");
    let p: Vec<f64> = f.variable("pressure").unwrap().get_values(..).unwrap();
    let theta: Vec<f32> = f.variable("theta").unwrap().get_values(..).unwrap();
    let fill = leeward::output::cf::FILL_F32;
    for (k, &pk) in p.iter().enumerate() {
        for (j, i) in [(4usize, 2usize), (4, 9)] {
            let v = theta[(k * 9 + j) * 12 + i];
            let below = pk > if i >= 6 { 90_000.0 } else { 101_000.0 };
            assert_eq!(v == fill, below, "level {pk} Pa, column {i}: theta {v}");
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn geopotential_and_orography_mask_levels_with_and_without_heights() {
    // Geopotential (WMO 0/3/4, m2 s-2) on 1000, 850 and 500 hPa only, temperature and
    // winds on 1000, 925, 850, 700 and 500 hPa; the ground's geopotential 1100 m x g0 on
    // the eastern half (a plateau), 0 elsewhere. Heights are geopotential / g0 (standard
    // gravity, docs/references.md "Constants"). Standard atmosphere (docs/references.md "Check values"):
    // 1000 hPa 110.9 m, 925 hPa 762.0 m, 850 hPa 1457.3 m. On the plateau 1000 hPa is
    // below the ground by its own height, 925 hPa (no height in the input) by its height
    // linear in ln p between 1000 and 850 hPa (757 m); 850 hPa and above are not.
    const G0: f64 = 9.80665;
    let grid = GridSpec::LatLon {
        ni: 12,
        nj: 9,
        lat0: 40.0,
        lon0: 0.0,
        dlat: 1.0,
        dlon: 1.0,
    };
    let n = 12 * 9;
    let c = 287.05 * 0.0065 / G0;
    let std_z = |p: f64| 288.15 / 0.0065 * (1.0 - (p / 1013.25f64).powf(c));
    let mut bytes = Vec::new();
    for p in [1000.0, 925.0, 850.0, 700.0, 500.0] {
        let t = vec![288.15 * (p / 1013.25f64).powf(c); n];
        let u: Vec<f64> = (0..n).map(|k| 10.0 + (k % 12) as f64).collect();
        let v: Vec<f64> = (0..n).map(|k| (k / 12) as f64).collect();
        bytes.extend(field(grid, (0, 0, 0), (100, p * 100.0), &t));
        bytes.extend(field(grid, (0, 2, 2), (100, p * 100.0), &u));
        bytes.extend(field(grid, (0, 2, 3), (100, p * 100.0), &v));
        if [1000.0, 850.0, 500.0].contains(&p) {
            bytes.extend(field(
                grid,
                (0, 3, 4),
                (100, p * 100.0),
                &vec![std_z(p) * G0; n],
            ));
        }
    }
    let ground: Vec<f64> = (0..n)
        .map(|k| if k % 12 >= 6 { 1100.0 * G0 } else { 0.0 })
        .collect();
    bytes.extend(field(grid, (0, 3, 4), (1, 0.0), &ground));

    let dir = std::env::temp_dir().join(format!("leeward-mask-gp-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let input = dir.join("in.grib2");
    std::fs::write(&input, &bytes).unwrap();
    let status = std::process::Command::new(common::leeward_bin())
        .args([
            "process",
            "--out",
            dir.join("out").to_str().unwrap(),
            input.to_str().unwrap(),
        ])
        .status()
        .unwrap();
    assert!(status.success());
    let f = netcdf::open(dir.join("out/c255_20260314T0000Z_000h.nc")).unwrap();
    let text = |a: netcdf::AttributeValue| match a {
        netcdf::AttributeValue::Str(s) => s,
        other => panic!("{other:?}"),
    };
    let masking = text(
        f.attribute("leeward_below_ground_masking")
            .unwrap()
            .value()
            .unwrap(),
    );
    assert!(masking.contains("orography"), "{masking}");
    let zvar = f.variable("z").unwrap();
    let method = text(zvar.attribute("leeward_method").unwrap().value().unwrap());
    assert!(method.contains("geopotential"), "{method}");
    let p: Vec<f64> = f.variable("pressure").unwrap().get_values(..).unwrap();
    let theta: Vec<f32> = f.variable("theta").unwrap().get_values(..).unwrap();
    let z: Vec<f32> = zvar.get_values(..).unwrap();
    let fill = leeward::output::cf::FILL_F32;
    for (k, &pk) in p.iter().enumerate() {
        for (j, i) in [(4usize, 2usize), (4, 9)] {
            let at = (k * 9 + j) * 12 + i;
            let below = i >= 6 && pk > 90_000.0;
            assert_eq!(
                theta[at] == fill,
                below,
                "level {pk} Pa, column {i}: theta {}",
                theta[at]
            );
            let hpa = pk / 100.0;
            if [1000.0, 850.0, 500.0].contains(&hpa) && !below {
                let want = std_z(hpa);
                assert!(
                    (f64::from(z[at]) - want).abs() < 0.1,
                    "z at {hpa} hPa: {} vs {want}",
                    z[at]
                );
            }
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
}
