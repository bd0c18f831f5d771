//! Changes in time: thickness change within a cycle over configured
//! intervals, and the run-to-run change of thickness, heights and dynamic
//! tropopause pressure at the same valid time.
//!
//! In: the products of the step being published and the output directory,
//! whose published files are the only memory across steps and cycles. Out:
//! change products for this step (its earlier steps or cycle already there),
//! and updates of later steps or the next cycle published before this one
//! (steps arrive in any order). A change is computed only from published
//! files, which leeward writes only once a step is complete.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, OnceLock};

use chrono::{NaiveDateTime, TimeDelta};
use ndarray::Array3;
use tracing::{info, warn};

use crate::output::cf::{Product, Vertical};
use crate::output::store::{add_variables, published, read_field, Published};
use crate::output::variables::VarSpec;

/// What identifies the model run a step belongs to.
#[derive(Debug, Clone)]
pub struct Run<'a> {
    /// Output directory.
    pub out_dir: &'a Path,
    /// Centre.
    pub centre: u16,
    /// Grid fingerprint.
    pub grid_id: &'a str,
    /// Ensemble member.
    pub member: Option<u8>,
    /// Cycle.
    pub reference_time: NaiveDateTime,
    /// Valid time of this step.
    pub valid_time: NaiveDateTime,
}

/// Change of a field between two times: later minus earlier, per point (NaN where either is missing).
pub fn difference(later: &Array3<f32>, earlier: &Array3<f32>) -> Option<Array3<f32>> {
    (later.dim() == earlier.dim()).then(|| later - earlier)
}

fn intern(name: String) -> &'static str {
    static NAMES: OnceLock<Mutex<HashMap<String, &'static str>>> = OnceLock::new();
    let map = NAMES.get_or_init(|| Mutex::new(HashMap::new()));
    let mut m = match map.lock() {
        Ok(m) => m,
        Err(p) => p.into_inner(),
    };
    if let Some(s) = m.get(&name) {
        return s;
    }
    let s: &'static str = Box::leak(name.clone().into_boxed_str());
    m.insert(name, s);
    s
}

/// The variable for the thickness change over `hours`.
pub fn thickness_change_spec(hours: u32) -> VarSpec {
    VarSpec {
        name: intern(format!("thick_chg_{hours:02}h")),
        standard_name: None,
        long_name: intern(format!("change of layer thickness over the previous {hours} h")),
        units: "m",
        formula: "thick(this step) - thick(the step of the same cycle valid that many hours earlier), both read from published files",
    }
}

/// Run-to-run change of the thickness.
pub const THICK_R2R: VarSpec = VarSpec {
    name: "thick_r2r",
    standard_name: None,
    long_name: "layer thickness of this cycle minus that of the previous cycle at the same valid time",
    units: "m",
    formula: "thick(this cycle) - thick(previous cycle), same valid time, previous cycle read from its published file",
};

/// Run-to-run change of isobaric geopotential height.
pub const Z_R2R: VarSpec = VarSpec {
    name: "z_r2r",
    standard_name: None,
    long_name:
        "geopotential height of this cycle minus that of the previous cycle at the same valid time",
    units: "m",
    formula: "z(this cycle) - z(previous cycle), same valid time",
};

/// Run-to-run change of the dynamic tropopause pressure.
pub const TROP_P_R2R: VarSpec = VarSpec {
    name: "trop_p_r2r",
    standard_name: None,
    long_name: "dynamic tropopause pressure of this cycle minus that of the previous cycle at the same valid time",
    units: "Pa",
    formula: "trop_p(this cycle) - trop_p(previous cycle), same valid time",
};

fn same_coords(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .all(|(x, y)| (x - y).abs() < 1e-6 * x.abs().max(1.0))
}

/// The fields a change needs from this step: (variable name, vertical coordinate values, data).
pub type Fields<'a> = Vec<(&'static str, Vec<f64>, &'a Array3<f32>)>;

fn earlier_value(path: &Path, name: &str, coords: &[f64]) -> Option<Array3<f32>> {
    let (c, a) = read_field(path, name)?;
    same_coords(&c, coords).then_some(a)
}

/// Thickness changes for this step from earlier steps already published.
pub fn within_cycle(
    run: &Run<'_>,
    thick: (&[f64], &Array3<f32>),
    intervals: &[u32],
) -> Vec<Product> {
    let files = published(run.out_dir, run.centre, run.grid_id, run.member);
    let mut out = Vec::new();
    for &h in intervals {
        let Some(dt) = TimeDelta::try_hours(i64::from(h)) else {
            continue;
        };
        let want = run.valid_time - dt;
        let Some(earlier) = files
            .iter()
            .find(|p| p.reference_time == run.reference_time && p.valid_time == want)
        else {
            continue;
        };
        if let Some(d) =
            earlier_value(&earlier.path, "thick", thick.0).and_then(|e| difference(thick.1, &e))
        {
            info!(file = %earlier.path.display(), hours = h, "thickness change from an earlier step");
            out.push(Product::new(
                thickness_change_spec(h),
                Vertical::PressureLayer,
                d,
            ));
        }
    }
    out
}

/// Run-to-run changes for this step from the previous cycle's published file at the same valid time.
pub fn run_to_run(run: &Run<'_>, fields: &Fields<'_>) -> Vec<Product> {
    let files = published(run.out_dir, run.centre, run.grid_id, run.member);
    let Some(prev) = files
        .iter()
        .filter(|p| p.valid_time == run.valid_time && p.reference_time < run.reference_time)
        .max_by_key(|p| p.reference_time)
    else {
        return Vec::new();
    };
    r2r_products(&prev.path, fields)
}

fn r2r_products(earlier: &Path, fields: &Fields<'_>) -> Vec<Product> {
    let mut out = Vec::new();
    for (name, coords, data) in fields {
        let (spec, vertical) = match *name {
            "thick" => (THICK_R2R, Vertical::PressureLayer),
            "z" => (Z_R2R, Vertical::Pressure),
            "trop_p" => (TROP_P_R2R, Vertical::PvSurface),
            _ => continue,
        };
        if let Some(d) = earlier_value(earlier, name, coords).and_then(|e| difference(data, &e)) {
            let mut p = Product::new(spec, vertical, d);
            p.notes.push((
                "leeward_previous_cycle_file",
                earlier
                    .file_name()
                    .map(|n| n.to_string_lossy().into_owned())
                    .unwrap_or_default(),
            ));
            out.push(p);
        }
    }
    out
}

fn update(path: &Path, products: Vec<Product>, deflate: i32, nsb: u32) -> Option<PathBuf> {
    if products.is_empty() {
        return None;
    }
    match add_variables(path, &products, deflate, nsb) {
        Ok(()) => Some(path.to_path_buf()),
        Err(e) => {
            warn!(file = %path.display(), error = %e, "could not add changes to a published step");
            None
        }
    }
}

/// After this step is published: add its contribution to steps and cycles that were
/// published before it but come after it in time (steps arriving in any order).
/// Returns the files updated.
pub fn update_later(
    run: &Run<'_>,
    this_file: &Path,
    thick: Option<(&[f64], &Array3<f32>)>,
    fields: &Fields<'_>,
    intervals: &[u32],
    deflate: i32,
    nsb: u32,
) -> Vec<PathBuf> {
    let files = published(run.out_dir, run.centre, run.grid_id, run.member);
    let mut updated = Vec::new();
    if let Some((coords, this)) = thick {
        for &h in intervals {
            let Some(dt) = TimeDelta::try_hours(i64::from(h)) else {
                continue;
            };
            let later_valid = run.valid_time + dt;
            let Some(later) = files
                .iter()
                .find(|p| p.reference_time == run.reference_time && p.valid_time == later_valid)
            else {
                continue;
            };
            if let Some(d) =
                earlier_value(&later.path, "thick", coords).and_then(|l| difference(&l, this))
            {
                updated.extend(update(
                    &later.path,
                    vec![Product::new(
                        thickness_change_spec(h),
                        Vertical::PressureLayer,
                        d,
                    )],
                    deflate,
                    nsb,
                ));
            }
        }
    }
    // The next cycle at the same valid time, if this cycle is its previous one.
    let next = files
        .iter()
        .filter(|p| p.valid_time == run.valid_time && p.reference_time > run.reference_time)
        .min_by_key(|p| p.reference_time);
    if let Some(next) = next {
        let between = files.iter().any(|p: &Published| {
            p.valid_time == run.valid_time
                && p.reference_time > run.reference_time
                && p.reference_time < next.reference_time
        });
        if !between {
            let mut prods = Vec::new();
            for (name, coords, this) in fields {
                let (spec, vertical) = match *name {
                    "thick" => (THICK_R2R, Vertical::PressureLayer),
                    "z" => (Z_R2R, Vertical::Pressure),
                    "trop_p" => (TROP_P_R2R, Vertical::PvSurface),
                    _ => continue,
                };
                if let Some(d) =
                    earlier_value(&next.path, name, coords).and_then(|l| difference(&l, this))
                {
                    let mut p = Product::new(spec, vertical, d);
                    let name = this_file
                        .file_name()
                        .map(|n| n.to_string_lossy().into_owned());
                    p.notes
                        .push(("leeward_previous_cycle_file", name.unwrap_or_default()));
                    prods.push(p);
                }
            }
            updated.extend(update(&next.path, prods, deflate, nsb));
        }
    }
    updated
}
