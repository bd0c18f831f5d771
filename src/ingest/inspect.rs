//! What is in a GRIB2 file, for people and scripts (`leeward inspect`).
//!
//! In: a file's bytes. Out: one [`FieldListing`] per field: the quantity (its
//! name in the WMO code tables, "local use" for a centre's own numbers, and its
//! WMO discipline/category/number), the level with its units,
//! reference and valid time, the grid (template, size, spacing), the packing
//! (template, bits per value) and the range of the decoded values; fields
//! leeward cannot use carry the reason. Built on the same catalogue, grid
//! parser and decoder as the pipeline, so what it shows is what leeward sees.

use serde::Serialize;

use super::catalogue::{catalogue, catalogue_of, FieldEntry};
use super::decode::decode_raw;
use super::grid::parse_grid;
use super::params::{naming, surface, Naming, Param};
use super::source::{FileOctets, Octets};
use crate::geometry::Horizontal;

/// One field as listed.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FieldListing {
    /// Field number in the file, from 0.
    pub index: usize,
    /// Byte offset of its message.
    pub offset: usize,
    /// The quantity's name in the WMO code tables (4.2), for every standard
    /// parameter; `None` for a number the tables leave to local use or do not list.
    pub quantity: Option<String>,
    /// Units of the quantity in the WMO code tables, for a standard parameter.
    pub units: Option<String>,
    /// The numbers are reserved for local use (the centre's own meaning).
    pub local_use: bool,
    /// WMO discipline (code table 0.0), parameter category (4.1) and number (4.2).
    pub wmo: [u8; 3],
    /// Level for people, e.g. "500 hPa", "ground surface".
    pub level: String,
    /// Type of the first fixed surface (code table 4.5) and its value in SI units.
    pub level_type: u8,
    /// Value of the first fixed surface (Pa for isobaric levels), if any.
    pub level_value: Option<f64>,
    /// Reference time, ISO 8601.
    pub reference_time: String,
    /// Valid time, ISO 8601.
    pub valid_time: String,
    /// Lead time, hours.
    pub lead_hours: f64,
    /// Ensemble member, if any.
    pub member: Option<u8>,
    /// Originating centre (common code table C-11).
    pub centre: u16,
    /// Product definition template (4.x).
    pub product_template: u16,
    /// Grid definition template (3.x).
    pub grid_template: u16,
    /// The grid, when leeward can read it.
    pub grid: Option<String>,
    /// Columns and rows.
    pub size: Option<[usize; 2]>,
    /// Spacing for people, e.g. "0.25 x 0.25 deg", "32.46 x 32.46 km".
    pub spacing: Option<String>,
    /// Why the grid cannot be used, if it cannot.
    pub grid_problem: Option<String>,
    /// Data representation template (5.x).
    pub packing_template: u16,
    /// Bits per packed value, where the template has them.
    pub bits_per_value: Option<u8>,
    /// Points in the grid.
    pub points: usize,
    /// Missing points (bitmap), when decoded.
    pub missing: Option<usize>,
    /// Smallest decoded value.
    pub min: Option<f64>,
    /// Largest decoded value.
    pub max: Option<f64>,
    /// Mean of the decoded values.
    pub mean: Option<f64>,
    /// Why the field cannot be used, if it cannot.
    pub unusable: Option<String>,
}

/// A whole file as listed.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FileListing {
    /// The path as given.
    pub file: String,
    /// Its size, bytes.
    pub bytes: usize,
    /// Its fields.
    pub fields: Vec<FieldListing>,
    /// Problems of the file's structure (lengths, markers), with the byte offset.
    pub problems: Vec<String>,
}

fn level_text(e: &FieldEntry) -> String {
    surface::level_text(e.level.kind, e.level.value)
}

fn spacing(h: &Horizontal) -> Option<String> {
    let step = |v: &[f64]| (v.len() > 1).then(|| (v[v.len() - 1] - v[0]) / (v.len() - 1) as f64);
    match h {
        Horizontal::LatLon { lat, lon, .. } => Some(format!(
            "{:.4} x {:.4} deg",
            step(lon)?.abs(),
            step(lat)?.abs()
        )),
        Horizontal::Rotated { rlat, rlon, .. } => Some(format!(
            "{:.4} x {:.4} deg (rotated)",
            step(rlon)?.abs(),
            step(rlat)?.abs()
        )),
        Horizontal::Projected { x, y, .. } => Some(format!(
            "{:.3} x {:.3} km",
            step(x)?.abs() / 1000.0,
            step(y)?.abs() / 1000.0
        )),
    }
}

fn bits_per_value(template: u16, sect5: &[u8]) -> Option<u8> {
    // Octet 20 of section 5 in templates 5.0, 5.2, 5.3, 5.40, 5.41, 5.42 (WMO-No. 306).
    matches!(template, 0 | 2 | 3 | 40 | 41 | 42)
        .then(|| sect5.get(19).copied())
        .flatten()
}

/// List every field of a file in memory.
pub fn inspect(file: &str, bytes: &[u8], with_values: bool) -> FileListing {
    listing(file, bytes, &catalogue(bytes), with_values)
}

/// List every field of an open file where it lies: catalogued section by
/// section, each message read only to decode its fields' values.
pub fn inspect_file(file: &str, f: &std::fs::File, size: u64, with_values: bool) -> FileListing {
    let o = FileOctets::new(f, size);
    listing(file, &o, &catalogue_of(&o), with_values)
}

/// Smallest, largest and mean of the finite values, and how many are not.
fn value_range(v: &[f32]) -> (usize, Option<(f64, f64, f64)>) {
    let valid: Vec<f64> = v
        .iter()
        .filter(|x| x.is_finite())
        .map(|&x| f64::from(x))
        .collect();
    let stats = (!valid.is_empty()).then(|| {
        (
            valid.iter().copied().fold(f64::INFINITY, f64::min),
            valid.iter().copied().fold(f64::NEG_INFINITY, f64::max),
            valid.iter().sum::<f64>() / valid.len() as f64,
        )
    });
    (v.len() - valid.len(), stats)
}

fn listing<O: Octets + ?Sized>(
    file: &str,
    o: &O,
    cat: &super::catalogue::Catalogue,
    with_values: bool,
) -> FileListing {
    let mut fields = Vec::new();
    // The message last read, for the other fields of a message with several.
    let mut message: Option<(usize, std::borrow::Cow<'_, [u8]>)> = None;
    for e in &cat.fields {
        let (grid, size, sp, grid_problem) =
            match parse_grid(&e.grid_definition).map_err(|x| x.to_string()) {
                Ok((g, _)) => (
                    Some(g.describe()),
                    Some([g.nx(), g.ny()]),
                    spacing(&g.horizontal),
                    None,
                ),
                Err(r) => (None, None, None, Some(r)),
            };
        let (mut missing, mut min, mut max, mut mean) = (None, None, None, None);
        let mut unusable = e.unusable.clone();
        if with_values && unusable.is_none() {
            if message.as_ref().is_none_or(|m| m.0 != e.message_offset) {
                let r = e.message_offset..e.message_offset + e.message_len;
                message = o.read(r).ok().map(|b| (e.message_offset, b));
            }
            let values = match &message {
                Some((_, m)) => decode_raw(m, &e.moved(0)).map_err(|x| x.to_string()),
                None => Err("its message cannot be read".to_string()),
            };
            match values {
                Ok(v) => {
                    let (m, stats) = value_range(&v);
                    missing = Some(m);
                    if let Some((lo, hi, avg)) = stats {
                        (min, max, mean) = (Some(lo), Some(hi), Some(avg));
                    }
                }
                Err(x) => unusable = Some(x),
            }
        }
        let named = naming(Param::new(e.discipline, e.category, e.number));
        fields.push(FieldListing {
            index: e.index,
            offset: e.message_offset,
            quantity: match named {
                Naming::Standard(p) => Some(p.name.to_string()),
                _ => None,
            },
            units: match named {
                Naming::Standard(p) => Some(p.units.to_string()),
                _ => None,
            },
            local_use: named == Naming::LocalUse,
            wmo: [e.discipline, e.category, e.number],
            level: level_text(e),
            level_type: e.level.kind,
            level_value: e.level.value,
            reference_time: e.reference_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
            valid_time: e.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
            lead_hours: e.lead.num_seconds() as f64 / 3600.0,
            member: e.member,
            centre: e.centre,
            product_template: e.product_template,
            grid_template: e.grid_template,
            grid,
            size,
            spacing: sp,
            grid_problem,
            packing_template: e.data_template,
            bits_per_value: o
                .read(e.sect5.clone())
                .ok()
                .and_then(|s| bits_per_value(e.data_template, &s)),
            points: e.num_points,
            missing,
            min,
            max,
            mean,
            unusable,
        });
    }
    FileListing {
        file: file.to_string(),
        bytes: o.len(),
        fields,
        problems: cat
            .problems
            .iter()
            .map(|p| format!("at byte {}: {}", p.offset, p.reason))
            .collect(),
    }
}

fn short(x: f64) -> String {
    let a = x.abs();
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
        format!("{x:.4e}")
    } else {
        format!("{x:.4}")
    }
}

/// The columns of one field's line.
fn columns(f: &FieldListing) -> [String; 6] {
    let name = match (&f.quantity, f.local_use) {
        (Some(q), _) => q.as_str(),
        (None, true) => "local use",
        (None, false) => "not in the WMO tables",
    };
    let q = format!("{name} ({}/{}/{})", f.wmo[0], f.wmo[1], f.wmo[2]);
    let lead = if f.lead_hours.fract() == 0.0 {
        format!("{}", f.lead_hours as i64)
    } else {
        format!("{:.2}", f.lead_hours)
    };
    let valid = format!(
        "{} (+{lead}h)",
        f.valid_time
            .get(..16)
            .unwrap_or(&f.valid_time)
            .replace('T', " ")
    );
    let grid = match (&f.grid, &f.spacing) {
        (Some(g), Some(s)) => format!("{g}, {s}"),
        (Some(g), None) => g.clone(),
        _ => format!("template 3.{}", f.grid_template),
    };
    let packing = match f.bits_per_value {
        Some(b) => format!("5.{} {b} bit", f.packing_template),
        None => format!("5.{}", f.packing_template),
    };
    let values = match (f.min, f.max, f.mean) {
        (Some(a), Some(b), Some(m)) => {
            let mut s = format!("{} to {}, mean {}", short(a), short(b), short(m));
            if let Some(n) = f.missing.filter(|n| *n > 0) {
                s.push_str(&format!(", {n} missing"));
            }
            s
        }
        _ => String::new(),
    };
    [q, f.level.clone(), valid, grid, packing, values]
}

/// The listing as text: one header line per file, one line per field, in
/// columns as wide as their widest entry (counted in characters), so that
/// they stay aligned whatever the names of the quantities and levels.
pub fn render(l: &FileListing) -> String {
    let mut o = format!(
        "{}: {} bytes, {} field(s)\n",
        l.file,
        l.bytes,
        l.fields.len()
    );
    let header = [
        "quantity (WMO d/c/n)",
        "level",
        "valid (lead)",
        "grid",
        "packing",
        "values",
    ]
    .map(String::from);
    let rows: Vec<[String; 6]> = l.fields.iter().map(columns).collect();
    let index_w = l
        .fields
        .iter()
        .map(|f| f.index.to_string().len())
        .max()
        .unwrap_or(1)
        .max(1);
    let mut widths = [0usize; 6];
    for r in rows.iter().chain(std::iter::once(&header)) {
        for (w, c) in widths.iter_mut().zip(r) {
            *w = (*w).max(c.chars().count());
        }
    }
    let line = |first: &str, r: &[String; 6]| {
        let mut s = format!("  {first:>index_w$}");
        for (k, (c, w)) in r.iter().zip(widths).enumerate() {
            s.push_str("  ");
            s.push_str(c);
            if k + 1 < r.len() {
                s.extend(std::iter::repeat_n(' ', w - c.chars().count()));
            }
        }
        s.trim_end().to_string() + "\n"
    };
    if !l.fields.is_empty() {
        o.push_str(&line("#", &header));
    }
    for (f, r) in l.fields.iter().zip(&rows) {
        o.push_str(&line(&f.index.to_string(), r));
        if let Some(r) = f.unusable.as_ref().or(f.grid_problem.as_ref()) {
            o.push_str(&format!("  {:index_w$}  not usable: {r}\n", ""));
        }
    }
    for p in &l.problems {
        o.push_str(&format!("  problem {p}\n"));
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_demo_file_lists_every_field_with_level_grid_and_range() {
        let dir = std::env::temp_dir().join(format!("leeward-inspect-{}", std::process::id()));
        let files = crate::demo::write_inputs(&dir, crate::demo::default_cycle(), &[6]).unwrap();
        let bytes = std::fs::read(&files[0]).unwrap();
        let l = inspect("demo", &bytes, true);
        let temperatures = l
            .fields
            .iter()
            .filter(|f| f.wmo == [0, 0, 0] && f.level.ends_with(" hPa"))
            .count();
        assert_eq!(
            temperatures,
            crate::demo::scenario::LEVELS_HPA.len(),
            "every level"
        );
        let t500 = l
            .fields
            .iter()
            .find(|f| f.wmo == [0, 0, 0] && f.level == "500 hPa")
            .expect("temperature at 500 hPa");
        assert_eq!(t500.quantity.as_deref(), Some("Temperature"));
        assert_eq!(t500.lead_hours, 6.0);
        assert_eq!(t500.grid_template, 30);
        assert!(t500.spacing.as_deref().is_some_and(|s| s.ends_with("km")));
        let (lo, hi) = (t500.min.unwrap(), t500.max.unwrap());
        assert!(200.0 < lo && lo < hi && hi < 300.0, "{lo} {hi}");
        let text = render(&l);
        assert!(
            text.contains("Temperature (0/0/0)") && text.contains("500 hPa"),
            "{text}"
        );
        // Every line starts its columns at the same character, whatever the
        // level names ("Specified height level above ground" among them).
        let starts = |needle: &str| -> Vec<usize> {
            text.lines()
                .skip(1)
                .filter(|l| !l.trim_start().starts_with("not usable"))
                .filter_map(|l| {
                    let cut = l.find(needle)?;
                    Some(l[..cut].chars().count())
                })
                .collect()
        };
        let at = starts(" 2026-03-");
        assert!(at.len() > 20 && at.iter().all(|&c| c == at[0]), "{text}");
        // A truncated file: what is left is listed, the problem said.
        let cut = inspect("cut", &bytes[..bytes.len() / 3], true);
        assert!(!cut.problems.is_empty());
        let _ = std::fs::remove_dir_all(&dir);
    }
}
