//! Every field of every real sample decoded by leeward and compared with the
//! reference decode of ecCodes 2.50 (`reference-decode.json` beside the
//! samples): identification, point and missing counts, min/max/mean and the
//! sampled values, within the packing's precision. Grids leeward refuses give
//! a message naming the template.

mod common;

use leeward::ingest::catalogue::catalogue;
use leeward::ingest::decode::decode_raw;
use leeward::ingest::grid::parse_grid;
use serde_json::Value;

#[test]
fn every_sample_field_matches_the_ecodes_reference() {
    let Some(dir) = common::samples_dir("every_sample_field_matches_the_ecodes_reference") else {
        return;
    };
    let reference: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("reference-decode.json")).unwrap())
            .unwrap();
    let files = reference["files"].as_object().expect("files object");
    let mut compared = 0usize;
    for (name, fields) in files {
        let bytes = std::fs::read(dir.join(name)).unwrap();
        let cat = catalogue(&bytes);
        let fields = fields.as_array().unwrap();
        assert_eq!(
            cat.fields.len(),
            fields.len(),
            "{name}: field count (ecCodes with multi-field support)"
        );
        for (f, r) in cat.fields.iter().zip(fields) {
            let ctx = format!("{name} field {}", f.index);
            assert_eq!(
                u64::from(f.discipline),
                r["discipline"].as_u64().unwrap(),
                "{ctx}: discipline"
            );
            assert_eq!(
                u64::from(f.category),
                r["parameterCategory"].as_u64().unwrap(),
                "{ctx}: category"
            );
            assert_eq!(
                u64::from(f.number),
                r["parameterNumber"].as_u64().unwrap(),
                "{ctx}: number"
            );
            assert_eq!(
                u64::from(f.grid_template),
                r["gridDefinitionTemplateNumber"].as_u64().unwrap(),
                "{ctx}"
            );
            assert_eq!(
                u64::from(f.data_template),
                r["dataRepresentationTemplateNumber"].as_u64().unwrap(),
                "{ctx}"
            );
            assert_eq!(
                u64::from(f.product_template),
                r["productDefinitionTemplateNumber"].as_u64().unwrap(),
                "{ctx}"
            );
            assert_eq!(
                f.num_points as u64,
                r["numberOfDataPoints"].as_u64().unwrap(),
                "{ctx}: points"
            );
            if let Some(date) = r["dataDate"].as_u64() {
                assert_eq!(
                    f.reference_time.format("%Y%m%d").to_string(),
                    date.to_string(),
                    "{ctx}: date"
                );
            }
            if let Some(ft) = r["forecastTime"].as_i64() {
                let unit = r["indicatorOfUnitOfTimeRange"].as_u64().unwrap() as u8;
                let secs = leeward::ingest::catalogue::time_unit_seconds(unit).unwrap();
                assert_eq!(f.lead.num_seconds(), ft * secs, "{ctx}: forecast time");
            }
            let values = decode_raw(&bytes, f).unwrap_or_else(|e| panic!("{ctx}: {e}"));
            let valid: Vec<f64> = values
                .iter()
                .filter(|v| v.is_finite())
                .map(|&v| f64::from(v))
                .collect();
            assert_eq!(
                valid.len() as u64,
                r["count"].as_u64().unwrap() - r["missing"].as_u64().unwrap(),
                "{ctx}: valid points"
            );
            assert_eq!(
                (values.len() - valid.len()) as u64,
                r["missing"].as_u64().unwrap(),
                "{ctx}: missing points"
            );
            let sect5 = &bytes[f.sect5.clone()];
            if !valid.is_empty() {
                let min = valid.iter().copied().fold(f64::INFINITY, f64::min);
                let max = valid.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let mean = valid.iter().sum::<f64>() / valid.len() as f64;
                for (what, got, want) in [
                    ("min", min, &r["min"]),
                    ("max", max, &r["max"]),
                    ("mean", mean, &r["mean"]),
                ] {
                    let want = want.as_f64().unwrap();
                    assert!(
                        (got - want).abs() <= common::tolerance(sect5, want),
                        "{ctx}: {what} {got} vs ecCodes {want}"
                    );
                }
            }
            for (pos, want) in r["samples"].as_object().unwrap() {
                let k: usize = pos.parse().unwrap();
                match want.as_f64() {
                    Some(w) => {
                        let g = f64::from(values[k]);
                        assert!(
                            (g - w).abs() <= common::tolerance(sect5, w),
                            "{ctx}: value {k} {g} vs ecCodes {w}"
                        );
                    }
                    None => assert!(values[k].is_nan(), "{ctx}: value {k} should be missing"),
                }
            }
            compared += 1;
        }
    }
    assert!(compared > 600, "compared {compared} fields");
}

#[test]
fn refused_grids_name_their_template() {
    let Some(dir) = common::samples_dir("refused_grids_name_their_template") else {
        return;
    };
    for (name, needle) in [
        ("unsupported-grid-template-32769.grib2", "3.32769"),
        ("reduced-latlon-bitmap.grib2", "reduced grid"),
    ] {
        let bytes = std::fs::read(dir.join(name)).unwrap();
        let cat = catalogue(&bytes);
        let f = &cat.fields[0];
        let err = parse_grid(&bytes[f.sect3.clone()])
            .expect_err(name)
            .to_string();
        assert!(err.contains(needle), "{name}: {err}");
        assert!(err.contains("template 3."), "{name}: {err}");
    }
}
