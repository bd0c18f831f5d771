//! One cycle step end to end: catalogue, group, decode, compute, write.
//!
//! In: GRIB2 files (paths), a [`Config`] and an output directory. Out: one
//! NetCDF file per (cycle, step, grid) and a [`StepReport`] for each, plus the
//! [`Issue`]s met on the way (file, field, reason). Shared by `leeward process`
//! and the service. A bad file or field is reported and skipped; the rest of
//! the run goes on. Nothing is published unless it is complete.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Instant;

use chrono::NaiveDateTime;
use ndarray::{s, Array2, Array3, Axis};
use rayon::prelude::*;
use tracing::{info, warn};

use crate::config::Config;
use crate::diagnostics::constants::G0;
use crate::diagnostics::{stability, vorticity};
use crate::geometry::Horizontal;
use crate::ingest::catalogue::{catalogue, Catalogue, FieldEntry};
use crate::ingest::decode::decode;
use crate::ingest::grid::{parse_grid, Scan};
use crate::ingest::params::{surface, Quantity};
use crate::output::cf::{step_file_name, write_step, StepProducts};
use crate::output::variables;

/// A problem with the input, said so an operator can act on it.
#[derive(Debug, Clone, PartialEq)]
pub struct Issue {
    /// The input file.
    pub file: PathBuf,
    /// The field number in the file, when it concerns one field.
    pub field: Option<usize>,
    /// What the field is (quantity and level), when known.
    pub what: String,
    /// Why it could not be used.
    pub reason: String,
}

impl std::fmt::Display for Issue {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}", self.file.display())?;
        if let Some(n) = self.field {
            write!(f, ": field {n}")?;
        }
        if !self.what.is_empty() {
            write!(f, " ({})", self.what)?;
        }
        write!(f, ": {}", self.reason)
    }
}

/// One GRIB2 file in memory with its catalogue.
pub struct InputFile {
    /// Where it was read from.
    pub path: PathBuf,
    /// Its bytes.
    pub bytes: Arc<Vec<u8>>,
    /// Its fields.
    pub catalogue: Catalogue,
}

/// Read and catalogue a file; problems become issues.
pub fn read_input(path: &Path) -> (Option<InputFile>, Vec<Issue>) {
    match std::fs::read(path) {
        Ok(bytes) => {
            let catalogue = catalogue(&bytes);
            let issues = catalogue
                .problems
                .iter()
                .map(|p| Issue {
                    file: path.to_path_buf(),
                    field: p.field,
                    what: String::new(),
                    reason: format!("{} (at byte {})", p.reason, p.offset),
                })
                .collect();
            (
                Some(InputFile {
                    path: path.to_path_buf(),
                    bytes: Arc::new(bytes),
                    catalogue,
                }),
                issues,
            )
        }
        Err(e) => (
            None,
            vec![Issue {
                file: path.to_path_buf(),
                field: None,
                what: String::new(),
                reason: format!("cannot read: {e}"),
            }],
        ),
    }
}

/// A field located in one of the inputs.
#[derive(Clone)]
pub struct FieldRef {
    /// Index into the inputs.
    pub file: usize,
    /// The catalogue entry.
    pub entry: FieldEntry,
}

/// What identifies a step: cycle, valid time, ensemble member, grid.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct StepKey {
    /// Originating centre.
    pub centre: u16,
    /// Reference time of the cycle.
    pub reference_time: NaiveDateTime,
    /// Valid time.
    pub valid_time: NaiveDateTime,
    /// Ensemble member, if any.
    pub member: Option<u8>,
    /// Section 3 bytes without the resolution-and-component flags octet.
    pub grid_key: Vec<u8>,
}

/// The fields of one step, on one grid.
pub struct Step {
    /// Its identity.
    pub key: StepKey,
    /// Its fields.
    pub fields: Vec<FieldRef>,
}

impl Step {
    /// Lead time in hours.
    pub fn lead_hours(&self) -> i64 {
        (self.key.valid_time - self.key.reference_time).num_hours()
    }
}

fn grid_key(bytes: &[u8], f: &FieldEntry) -> Vec<u8> {
    let mut k = bytes
        .get(f.sect3.clone())
        .map(<[u8]>::to_vec)
        .unwrap_or_default();
    let flags_at = match f.grid_template {
        0..=3 | 40..=43 => Some(54),
        10 | 20 | 30 | 31 => Some(46),
        _ => None,
    };
    if let Some(o) = flags_at {
        if let Some(b) = k.get_mut(o) {
            *b = 0;
        }
    }
    k
}

fn describe(f: &FieldEntry) -> String {
    let q = Quantity::from_wmo(f.discipline, f.category, f.number)
        .map(|q| q.name().to_string())
        .unwrap_or_else(|| format!("parameter {}/{}/{}", f.discipline, f.category, f.number));
    let lvl = match (f.level.kind, f.level.value) {
        (surface::ISOBARIC, Some(p)) => format!("{} hPa", p / 100.0),
        (k, Some(v)) => format!("{} {v}", surface::describe(k)),
        (k, None) => surface::describe(k).to_string(),
    };
    format!("{q} at {lvl}")
}

/// Group every usable field of the inputs into steps; fields that cannot be
/// used at all (broken, unsupported product template) become issues.
pub fn plan(inputs: &[InputFile]) -> (Vec<Step>, Vec<Issue>) {
    let mut groups: BTreeMap<StepKey, Vec<FieldRef>> = BTreeMap::new();
    let mut issues = Vec::new();
    for (fi, input) in inputs.iter().enumerate() {
        for e in &input.catalogue.fields {
            if let Some(reason) = &e.unusable {
                // Problems already reported by the catalogue carry the same reason.
                if !input
                    .catalogue
                    .problems
                    .iter()
                    .any(|p| p.field == Some(e.index))
                {
                    issues.push(Issue {
                        file: input.path.clone(),
                        field: Some(e.index),
                        what: String::new(),
                        reason: reason.clone(),
                    });
                }
                continue;
            }
            let key = StepKey {
                centre: e.centre,
                reference_time: e.reference_time,
                valid_time: e.valid_time,
                member: e.member,
                grid_key: grid_key(&input.bytes, e),
            };
            groups.entry(key).or_default().push(FieldRef {
                file: fi,
                entry: e.clone(),
            });
        }
    }
    let steps = groups
        .into_iter()
        .map(|(key, fields)| Step { key, fields })
        .collect();
    (steps, issues)
}

/// What happened to one step.
#[derive(Debug, Clone, Default)]
pub struct StepReport {
    /// Cycle (reference time).
    pub cycle: String,
    /// Lead time, hours.
    pub lead_hours: i64,
    /// Grid description.
    pub grid: String,
    /// Fields decoded and used.
    pub fields_used: usize,
    /// What was looked for and not found, or could not be used.
    pub missing: Vec<String>,
    /// Variables written.
    pub products: Vec<String>,
    /// The file written, if any.
    pub output: Option<PathBuf>,
    /// Problems with this step's input.
    pub issues: Vec<Issue>,
    /// Wall time, seconds.
    pub seconds: f64,
    /// Of which decoding the fields.
    pub decode_seconds: f64,
    /// Of which computing the diagnostics.
    pub compute_seconds: f64,
    /// Of which writing the file.
    pub write_seconds: f64,
    /// Why nothing was written, when nothing was.
    pub skipped: Option<String>,
}

/// Fields of a step sorted by what they are.
#[derive(Default)]
struct Inventory {
    /// (quantity, level in Pa) -> field, isobaric levels.
    isobaric: BTreeMap<(Quantity, i64), FieldRef>,
    surface_pressure: Option<FieldRef>,
    /// Orography and how to turn it into metres.
    orography: Option<(FieldRef, f64)>,
}

fn pa_key(p: f64) -> i64 {
    (p * 100.0).round() as i64 // 0.01 Pa resolution
}

fn inventory(step: &Step, inputs: &[InputFile], issues: &mut Vec<Issue>) -> Inventory {
    let mut inv = Inventory::default();
    for fr in &step.fields {
        let e = &fr.entry;
        let Some(q) = Quantity::from_wmo(e.discipline, e.category, e.number) else {
            continue;
        };
        match (e.level.kind, e.level.value) {
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
            _ => {}
        }
    }
    inv
}

/// Decoded fields of a step, keyed as asked.
type Decoded<K> = BTreeMap<K, Array2<f32>>;

fn decode_all<K: Ord + Clone + Send + Sync>(
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
                warn!(file = %file.display(), field = fr.entry.index, what = %describe(&fr.entry), %reason, "field not decoded");
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

/// Run every step of `inputs` and write its products into `out_dir`.
pub fn run_step(
    step: &Step,
    inputs: &[InputFile],
    cfg: &Config,
    out_dir: &Path,
    grid_suffix: Option<usize>,
) -> StepReport {
    let t0 = Instant::now();
    let cycle = step
        .key
        .reference_time
        .format("%Y-%m-%dT%H:%MZ")
        .to_string();
    let lead = step.lead_hours();
    let mut rep = StepReport {
        cycle: cycle.clone(),
        lead_hours: lead,
        ..Default::default()
    };
    let first = &step.fields[0];
    let (grid, scan) = match inputs[first.file]
        .bytes
        .get(first.entry.sect3.clone())
        .ok_or_else(|| "section 3 outside the file".to_string())
        .and_then(|s| parse_grid(s).map_err(|e| e.to_string()))
    {
        Ok(g) => g,
        Err(reason) => {
            // Every field of the step shares this grid: report each file once.
            let mut seen = Vec::new();
            for fr in &step.fields {
                if !seen.contains(&fr.file) {
                    seen.push(fr.file);
                    rep.issues.push(Issue {
                        file: inputs[fr.file].path.clone(),
                        field: Some(fr.entry.index),
                        what: describe(&fr.entry),
                        reason: reason.clone(),
                    });
                }
            }
            warn!(cycle = %cycle, step = lead, %reason, "grid refused");
            rep.skipped = Some(reason);
            rep.seconds = t0.elapsed().as_secs_f64();
            return rep;
        }
    };
    rep.grid = grid.describe();
    let mut issues = Vec::new();
    let inv = inventory(step, inputs, &mut issues);

    let levels_of = |q: Quantity| -> Vec<i64> {
        inv.isobaric
            .keys()
            .filter(|(qq, _)| *qq == q)
            .map(|(_, p)| *p)
            .collect()
    };
    let t_levels = levels_of(Quantity::Temperature);
    let u_levels = levels_of(Quantity::WindU);
    let v_levels = levels_of(Quantity::WindV);
    let wind_levels: Vec<i64> = u_levels
        .iter()
        .copied()
        .filter(|p| v_levels.contains(p))
        .collect();
    for p in u_levels.iter().filter(|p| !v_levels.contains(p)) {
        rep.missing
            .push(format!("v at {} hPa (u present)", *p as f64 / 1e4));
    }
    for p in v_levels.iter().filter(|p| !u_levels.contains(p)) {
        rep.missing
            .push(format!("u at {} hPa (v present)", *p as f64 / 1e4));
    }
    let want_vort = cfg.products.vorticity && !wind_levels.is_empty();
    let want_stab = cfg.products.stability && !t_levels.is_empty();
    if cfg.products.vorticity && wind_levels.is_empty() {
        rep.missing.push("isobaric u and v: no vorticity".into());
    }
    if cfg.products.stability && t_levels.is_empty() {
        rep.missing
            .push("isobaric temperature: no theta, stab, n2".into());
    }
    if !want_vort && !want_stab {
        rep.issues = issues;
        rep.skipped = Some(format!(
            "no fields for any product ({})",
            rep.missing.join("; ")
        ));
        rep.seconds = t0.elapsed().as_secs_f64();
        return rep;
    }

    // Decode what the products need, in parallel across fields.
    #[derive(Clone, PartialEq, Eq, PartialOrd, Ord)]
    enum Want {
        Iso(Quantity, i64),
        SurfacePressure,
        Orography,
    }
    let mut wanted: Vec<(Want, FieldRef)> = Vec::new();
    for ((q, p), fr) in &inv.isobaric {
        let need = match q {
            Quantity::Temperature => want_stab,
            Quantity::WindU | Quantity::WindV => want_vort && wind_levels.contains(p),
            Quantity::GeopotentialHeight => {
                cfg.products.mask_below_ground
                    && inv.orography.is_some()
                    && inv.surface_pressure.is_none()
            }
            _ => false,
        };
        if need {
            wanted.push((Want::Iso(*q, *p), fr.clone()));
        }
    }
    if cfg.products.mask_below_ground {
        if let Some(fr) = &inv.surface_pressure {
            wanted.push((Want::SurfacePressure, fr.clone()));
        } else if let Some((fr, _)) = &inv.orography {
            wanted.push((Want::Orography, fr.clone()));
        }
    }
    let t_decode = Instant::now();
    let mut dec = decode_all(wanted, inputs, &scan, &mut issues);
    rep.fields_used = dec.len();
    rep.decode_seconds = t_decode.elapsed().as_secs_f64();
    let t_compute = Instant::now();

    // Below-ground mask per level, from surface pressure or from orography and heights.
    let (ny, nx) = grid.shape();
    let mut levels: Vec<i64> = t_levels.iter().chain(wind_levels.iter()).copied().collect();
    levels.sort_unstable();
    levels.dedup();
    let p_pa: Vec<f64> = levels.iter().map(|k| *k as f64 / 100.0).collect();
    let masking;
    let mut below = vec![None::<Array2<bool>>; levels.len()];
    if let Some(ps) = dec.remove(&Want::SurfacePressure) {
        masking = "levels with pressure greater than the surface pressure are missing".to_string();
        for (k, p) in p_pa.iter().enumerate() {
            below[k] = Some(ps.mapv(|s| s.is_finite() && f64::from(s) < *p));
        }
    } else if let Some(oro) = dec.remove(&Want::Orography) {
        let scale = inv.orography.as_ref().map(|o| o.1).unwrap_or(1.0);
        let mut any = false;
        for (k, lk) in levels.iter().enumerate() {
            if let Some(z) = dec.get(&Want::Iso(Quantity::GeopotentialHeight, *lk)) {
                any = true;
                let mut m = Array2::from_elem((ny, nx), false);
                ndarray::Zip::from(&mut m)
                    .and(z)
                    .and(&oro)
                    .for_each(|m, &z, &o| {
                        *m = z.is_finite() && o.is_finite() && f64::from(z) < f64::from(o) * scale;
                    });
                below[k] = Some(m);
            }
        }
        masking = if any {
            "levels whose geopotential height is below the orography are missing".to_string()
        } else {
            "none: orography present but no isobaric geopotential height to compare".to_string()
        };
    } else {
        masking = "none: no surface pressure or orography in the input".to_string();
    }
    let apply_mask = |k: usize, a: &mut Array2<f32>| {
        if let Some(m) = &below[k] {
            ndarray::Zip::from(a).and(m).for_each(|v, &b| {
                if b {
                    *v = f32::NAN;
                }
            });
        }
    };

    let (lat, lon) = grid.latlon();
    let nz = levels.len();
    let mut fields = Vec::new();
    let mut winds = "no winds used".to_string();

    if want_vort {
        let f = grid.coriolis(&lat);
        let rotation = grid.axis_rotation(&lat, &lon);
        let m = grid.map_factor(&lat);
        let grid_rel: Vec<bool> = wind_levels
            .iter()
            .filter_map(|p| inv.isobaric.get(&(Quantity::WindU, *p)))
            .map(|fr| fr.entry.winds_grid_relative)
            .collect();
        let all_grid = grid_rel.iter().all(|&g| g);
        let any_grid = grid_rel.iter().any(|&g| g);
        winds = match (&grid.horizontal, all_grid, any_grid) {
            (Horizontal::LatLon { .. }, _, _) => "relative to east and north (the grid's axes)".into(),
            (_, true, _) => "relative to the grid's x and y axes (flag table 3.3 bit 5 set); used as they are".into(),
            (_, false, false) => "relative to east and north (flag table 3.3 bit 5 clear); turned into grid axes before differencing".into(),
            _ => "mixed: each level as its flag table 3.3 bit 5 says".into(),
        };
        let mut zeta = Array3::from_elem((nz, ny, nx), f32::NAN);
        let mut eta = Array3::from_elem((nz, ny, nx), f32::NAN);
        let per_level: Vec<(usize, Array2<f64>)> = levels
            .par_iter()
            .enumerate()
            .filter_map(|(k, lk)| {
                let u = dec.get(&Want::Iso(Quantity::WindU, *lk))?;
                let v = dec.get(&Want::Iso(Quantity::WindV, *lk))?;
                let fr = inv.isobaric.get(&(Quantity::WindU, *lk))?;
                let mut u = u.clone();
                let mut v = v.clone();
                apply_mask(k, &mut u);
                apply_mask(k, &mut v);
                let mut u = u.mapv(f64::from);
                let mut v = v.mapv(f64::from);
                if let (Some(alpha), false) = (&rotation, fr.entry.winds_grid_relative) {
                    let (ug, vg) = vorticity::earth_to_grid(u.view(), v.view(), alpha.view());
                    u = ug;
                    v = vg;
                }
                let z = match &grid.horizontal {
                    Horizontal::LatLon { lat, lon, .. } => vorticity::relative_vorticity_sphere(
                        u.view(),
                        v.view(),
                        lat,
                        lon,
                        grid.radius(),
                        grid.periodic(),
                    ),
                    Horizontal::Rotated { rlat, rlon, .. } => vorticity::relative_vorticity_sphere(
                        u.view(),
                        v.view(),
                        rlat,
                        rlon,
                        grid.radius(),
                        grid.periodic(),
                    ),
                    Horizontal::Projected { x, y, .. } => {
                        let dx = if x.len() > 1 { x[1] - x[0] } else { f64::NAN };
                        let dy = if y.len() > 1 { y[1] - y[0] } else { f64::NAN };
                        vorticity::relative_vorticity_conformal(
                            u.view(),
                            v.view(),
                            m.view(),
                            dx,
                            dy,
                        )
                    }
                };
                Some((k, z))
            })
            .collect();
        for (k, z) in per_level {
            let e = vorticity::absolute_vorticity(z.view(), f.view());
            zeta.slice_mut(s![k, .., ..]).assign(&z.mapv(|x| x as f32));
            eta.slice_mut(s![k, .., ..]).assign(&e.mapv(|x| x as f32));
        }
        fields.push((variables::ZETA, zeta));
        fields.push((variables::ETA, eta));
    }
    if want_stab {
        let mut t = Array3::from_elem((nz, ny, nx), f32::NAN);
        for (k, lk) in levels.iter().enumerate() {
            if let Some(a) = dec.get(&Want::Iso(Quantity::Temperature, *lk)) {
                let mut a = a.clone();
                apply_mask(k, &mut a);
                t.index_axis_mut(Axis(0), k).assign(&a);
            }
        }
        let st = stability::stability(t.view(), &p_pa);
        fields.push((variables::THETA, st.theta));
        fields.push((variables::STAB, st.neg_dtheta_dp));
        fields.push((variables::N2, st.n2));
    }
    rep.products = fields.iter().map(|(s, _)| s.name.to_string()).collect();
    rep.compute_seconds = t_compute.elapsed().as_secs_f64();

    let mut inputs_used: Vec<String> = step
        .fields
        .iter()
        .map(|fr| {
            inputs[fr.file]
                .path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default()
        })
        .collect();
    inputs_used.sort();
    inputs_used.dedup();
    let products = StepProducts {
        centre: step.key.centre,
        reference_time: step.key.reference_time,
        valid_time: step.key.valid_time,
        grid,
        lat,
        lon,
        levels: p_pa,
        fields,
        masking,
        winds,
        inputs: inputs_used,
        deflate: cfg.output.deflate_level,
        significant_bits: cfg.output.significant_bits,
    };
    let mut name = step_file_name(step.key.centre, step.key.reference_time, lead, grid_suffix);
    if let Some(m) = step.key.member {
        name = name.replace(".nc", &format!("_m{m:02}.nc"));
    }
    let t_write = Instant::now();
    let written = write_step(out_dir, &name, &products);
    rep.write_seconds = t_write.elapsed().as_secs_f64();
    match written {
        Ok(path) => {
            info!(cycle = %cycle, step = lead, file = %path.display(), products = ?rep.products, "step written");
            rep.output = Some(path);
        }
        Err(e) => {
            warn!(cycle = %cycle, step = lead, error = %e, "step not written");
            rep.skipped = Some(e.to_string());
        }
    }
    rep.issues = issues;
    rep.seconds = t0.elapsed().as_secs_f64();
    rep
}

/// Suffixes `_g2`, `_g3`, ... for steps that share centre, cycle, lead and member
/// but not the grid.
pub fn grid_suffixes(steps: &[Step]) -> Vec<Option<usize>> {
    let mut seen: BTreeMap<(u16, NaiveDateTime, NaiveDateTime, Option<u8>), usize> =
        BTreeMap::new();
    steps
        .iter()
        .map(|s| {
            let n = seen
                .entry((
                    s.key.centre,
                    s.key.reference_time,
                    s.key.valid_time,
                    s.key.member,
                ))
                .or_insert(0);
            *n += 1;
            if *n > 1 {
                Some(*n)
            } else {
                None
            }
        })
        .collect()
}
