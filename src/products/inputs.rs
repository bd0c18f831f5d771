//! A step's fields sorted by what they are, and decoded.
//!
//! In: a [`Step`] (its fields, located in the inputs) and the inputs' bytes. Out: an
//! [`Inventory`] (which quantity on which level comes from which field) and the decoded
//! 2-D arrays of the fields asked for; duplicates and undecodable fields become
//! [`Issue`]s naming their file and field.

use std::collections::BTreeMap;

use ndarray::Array2;
use rayon::prelude::*;
use tracing::warn;

use crate::diagnostics::constants::G0;
use crate::ingest::decode::decode;
use crate::ingest::grid::Scan;
use crate::ingest::params::{surface, Quantity};
use crate::pipeline::{describe, FieldRef, InputFile, Issue, Step};

/// Fields of a step sorted by what they are.
#[derive(Default)]
pub(super) struct Inventory {
    /// (quantity, level in Pa) -> field, isobaric levels.
    pub isobaric: BTreeMap<(Quantity, i64), FieldRef>,
    pub surface_pressure: Option<FieldRef>,
    /// Pressure reduced to mean sea level.
    pub mslp: Option<FieldRef>,
    /// Orography and how to turn it into metres.
    pub orography: Option<(FieldRef, f64)>,
    /// Levels (Pa key) whose geopotential height is geopotential (0/3/4) to be divided by
    /// standard gravity: levels with geopotential and no geopotential height.
    pub geopotential: Vec<i64>,
}

pub(super) fn pa_key(p: f64) -> i64 {
    (p * 100.0).round() as i64 // 0.01 Pa resolution
}

pub(super) fn inventory(step: &Step, inputs: &[InputFile], issues: &mut Vec<Issue>) -> Inventory {
    let mut inv = Inventory::default();
    let mut geopotential: BTreeMap<i64, FieldRef> = BTreeMap::new();
    for fr in &step.fields {
        let e = &fr.entry;
        let Some(q) = Quantity::from_wmo(e.discipline, e.category, e.number) else {
            continue;
        };
        match (e.level.kind, e.level.value) {
            (surface::ISOBARIC, Some(p)) if p > 0.0 && q == Quantity::Geopotential => {
                geopotential.entry(pa_key(p)).or_insert_with(|| fr.clone());
            }
            (surface::ISOBARIC, Some(p)) if p > 0.0 => {
                let k = (q, pa_key(p));
                match inv.isobaric.entry(k) {
                    std::collections::btree_map::Entry::Vacant(slot) => {
                        slot.insert(fr.clone());
                    }
                    std::collections::btree_map::Entry::Occupied(_) => issues.push(Issue {
                        file: inputs[fr.file].path.clone(),
                        field: Some(e.index),
                        what: describe(e),
                        reason:
                            "duplicate of a field already seen for this step; the first is used"
                                .into(),
                    }),
                }
            }
            (surface::GROUND, _) => match q {
                Quantity::Pressure => {
                    inv.surface_pressure.get_or_insert(fr.clone());
                }
                Quantity::GeopotentialHeight
                | Quantity::GeometricHeight
                | Quantity::TerrainHeight => {
                    inv.orography.get_or_insert((fr.clone(), 1.0));
                }
                Quantity::Geopotential => {
                    inv.orography.get_or_insert((fr.clone(), 1.0 / G0));
                }
                _ => {}
            },
            // Some centres code it as pressure (0/3/0) at mean sea level.
            (surface::MEAN_SEA_LEVEL, _)
                if matches!(q, Quantity::MeanSeaLevelPressure | Quantity::Pressure) =>
            {
                inv.mslp.get_or_insert(fr.clone());
            }
            _ => {}
        }
    }
    // Geopotential stands in for geopotential height where a level has no height:
    // z = Phi / g0 (WMO-No. 306 code table 4.2, 0/3/4 and 0/3/5; standard gravity).
    for (p, fr) in geopotential {
        if let std::collections::btree_map::Entry::Vacant(slot) =
            inv.isobaric.entry((Quantity::GeopotentialHeight, p))
        {
            slot.insert(fr);
            inv.geopotential.push(p);
        }
    }
    inv
}

/// One issue per file of a step that gave nothing usable: what the products
/// lacked, and what the file did give the step.
pub(super) fn nothing_usable(
    step: &Step,
    inputs: &[InputFile],
    lacking: &str,
    cycle: &str,
    lead: i64,
) -> Vec<Issue> {
    let mut by_file: BTreeMap<usize, Vec<String>> = BTreeMap::new();
    for fr in &step.fields {
        by_file
            .entry(fr.file)
            .or_default()
            .push(describe(&fr.entry));
    }
    by_file
        .into_iter()
        .map(|(fi, what)| {
            let shown: Vec<&str> = what.iter().take(3).map(String::as_str).collect();
            let more = if what.len() > 3 {
                format!(", and {} more", what.len() - 3)
            } else {
                String::new()
            };
            Issue {
                file: inputs[fi].path.clone(),
                field: None,
                what: String::new(),
                reason: format!(
                    "nothing usable: {lacking} for step {cycle} +{lead:03}h (found here: {}{more})",
                    shown.join("; ")
                ),
            }
        })
        .collect()
}

/// Decoded fields of a step, keyed as asked.
pub(super) type Decoded<K> = BTreeMap<K, Array2<f32>>;

pub(super) fn decode_all<K: Ord + Clone + Send + Sync>(
    wanted: Vec<(K, FieldRef)>,
    inputs: &[InputFile],
    scan: &Scan,
    issues: &mut Vec<Issue>,
) -> Decoded<K> {
    let results: Vec<(K, FieldRef, Result<Vec<f32>, String>)> = wanted
        .into_par_iter()
        .map(|(k, fr)| {
            let r = decode(&inputs[fr.file].bytes, &fr.entry, scan).map_err(|e| e.to_string());
            (k, fr, r)
        })
        .collect();
    let mut out = BTreeMap::new();
    for (k, fr, r) in results {
        match r
            .and_then(|v| Array2::from_shape_vec((scan.nj, scan.ni), v).map_err(|e| e.to_string()))
        {
            Ok(a) => {
                out.insert(k, a);
            }
            Err(reason) => {
                let file = inputs[fr.file].path.clone();
                warn!(file = %crate::escape::shown(&file), field = fr.entry.index, what = %describe(&fr.entry), %reason, "field not decoded");
                issues.push(Issue {
                    file,
                    field: Some(fr.entry.index),
                    what: describe(&fr.entry),
                    reason,
                });
            }
        }
    }
    out
}
