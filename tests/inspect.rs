//! `leeward inspect --json` on every real sample, checked against the
//! reference decode of ecCodes 2.50 (`reference-decode.json` beside the
//! samples): identification (WMO discipline, category, number; templates;
//! point count; reference date; forecast time) and value range (min, max,
//! mean within half a packing step, and the missing count). Fields on grids
//! leeward refuses must be listed with the reason.

mod common;

use serde_json::Value;

#[test]
fn inspect_json_agrees_with_ecodes_on_every_sample() {
    let Some(dir) = common::samples_dir("inspect_json_agrees_with_ecodes_on_every_sample") else {
        return;
    };
    let reference: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("reference-decode.json")).unwrap())
            .unwrap();
    let mut compared = 0;
    for (name, fields) in reference["files"].as_object().unwrap() {
        let path = dir.join(name);
        let out = std::process::Command::new(common::leeward_bin())
            .args(["inspect", "--json"])
            .arg(&path)
            .output()
            .unwrap();
        assert!(
            matches!(out.status.code(), Some(0) | Some(3)),
            "{name}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let listing: Value = serde_json::from_slice(&out.stdout).unwrap();
        let got = listing[0]["fields"].as_array().unwrap();
        let want = fields.as_array().unwrap();
        assert_eq!(got.len(), want.len(), "{name}: field count");
        let bytes = std::fs::read(&path).unwrap();
        let cat = leeward::ingest::catalogue::catalogue(&bytes);
        for ((g, r), e) in got.iter().zip(want).zip(&cat.fields) {
            let ctx = format!("{name} field {}", g["index"]);
            let wmo: Vec<u64> = g["wmo"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap())
                .collect();
            assert_eq!(
                wmo,
                vec![
                    r["discipline"].as_u64().unwrap(),
                    r["parameterCategory"].as_u64().unwrap(),
                    r["parameterNumber"].as_u64().unwrap()
                ],
                "{ctx}: discipline/category/number"
            );
            for (mine, theirs) in [
                ("grid_template", "gridDefinitionTemplateNumber"),
                ("packing_template", "dataRepresentationTemplateNumber"),
                ("product_template", "productDefinitionTemplateNumber"),
                ("points", "numberOfDataPoints"),
            ] {
                assert_eq!(g[mine].as_u64(), r[theirs].as_u64(), "{ctx}: {mine}");
            }
            if let Some(date) = r["dataDate"].as_u64() {
                let d = g["reference_time"].as_str().unwrap().replace('-', "");
                assert_eq!(&d[..8], date.to_string(), "{ctx}: reference date");
            }
            if let (Some(ft), Some(unit)) = (
                r["forecastTime"].as_f64(),
                r["indicatorOfUnitOfTimeRange"].as_u64(),
            ) {
                let secs =
                    leeward::ingest::catalogue::time_unit_seconds(unit as u8).unwrap() as f64;
                assert!(
                    (g["lead_hours"].as_f64().unwrap() - ft * secs / 3600.0).abs() < 1e-9,
                    "{ctx}: lead"
                );
            }
            let usable = g["unusable"].is_null();
            if !usable {
                assert!(
                    !g["unusable"].as_str().unwrap().is_empty(),
                    "{ctx}: a reason"
                );
                continue;
            }
            if g["grid_problem"].is_string() {
                // Refused grids (reduced, template 3.32769) are said, values still listed.
                assert!(
                    g["grid_problem"].as_str().unwrap().contains("template"),
                    "{ctx}"
                );
            }
            assert_eq!(
                g["missing"].as_u64(),
                r["missing"].as_u64(),
                "{ctx}: missing"
            );
            let sect5 = &bytes[e.sect5.clone()];
            for key in ["min", "max", "mean"] {
                if let (Some(a), Some(b)) = (g[key].as_f64(), r[key].as_f64()) {
                    assert!(
                        (a - b).abs() <= common::tolerance(sect5, b),
                        "{ctx}: {key} {a} vs ecCodes {b}"
                    );
                }
            }
            compared += 1;
        }
    }
    assert!(compared > 600, "compared {compared} fields");
}

#[test]
fn inspect_text_names_quantity_level_grid_and_a_refused_template() {
    let Some(dir) =
        common::samples_dir("inspect_text_names_quantity_level_grid_and_a_refused_template")
    else {
        return;
    };
    let out = std::process::Command::new(common::leeward_bin())
        .arg("inspect")
        .arg(dir.join("gfs-2p5deg-2011100800-f072.grib2"))
        .arg(dir.join("unsupported-grid-template-32769.grib2"))
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("Temperature (0/0/0)") && text.contains("500 hPa"),
        "{text}"
    );
    assert!(
        text.contains("latitude/longitude 144x73 (template 3.0), 2.5000 x 2.5000 deg"),
        "{text}"
    );
    assert!(
        text.contains("not usable") && text.contains("32769"),
        "{text}"
    );
    // Standard parameters leeward does not compute with are named all the
    // same (WMO-No. 306 code table 4.2.0.3 and 4.2.0.1), local numbers said so.
    for want in [
        "Pressure reduced to MSL (0/3/1)",
        "Total precipitation (0/1/8)",
        "local use (0/3/192)",
    ] {
        assert!(text.contains(want), "{want}: {text}");
    }
    assert!(!text.contains(" - (0/"), "{text}");
}
