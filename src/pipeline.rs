//! One cycle step end to end: catalogue, group, decode, compute, write.
//!
//! In: GRIB2 files (paths), a [`Config`] and an output directory. Out: one
//! NetCDF file per (cycle, step, grid) and a [`StepReport`] for each, plus the
//! [`Issue`]s met on the way (file, field, reason). Shared by `leeward process`
//! and the service. A bad file or field is reported and skipped; the rest of
//! the run goes on. Nothing is published unless it is complete.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use chrono::NaiveDateTime;
use ndarray::{Array2, Array3, Axis};
use rayon::prelude::*;
use tracing::{info, warn};

use crate::changes;
use crate::config::Config;
use crate::diagnostics::constants::G0;
use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::{budget, isentropic, pv, stability, thickness, tropopause, vorticity};
use crate::geometry::Horizontal;
use crate::ingest::catalogue::{catalogue, catalogue_file, Catalogue, FieldEntry};
use crate::ingest::decode::decode;
use crate::ingest::grid::{parse_grid, Scan};
use crate::ingest::params::{surface, Quantity};
use crate::ingest::source::{open_input, read_ranges};
use crate::output::cf::{step_file_name, write_step, Product, StepProducts, Vertical};
use crate::output::variables;

mod synoptic;

/// A problem with the input, said so an operator can act on it.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
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
        write!(f, "{}", crate::escape::shown(&self.file))?;
        if let Some(n) = self.field {
            write!(f, ": field {n}")?;
        }
        if !self.what.is_empty() {
            write!(f, " ({})", self.what)?;
        }
        write!(f, ": {}", self.reason)
    }
}

/// One GRIB2 file in memory with its catalogue: the whole file, or only
/// some of its messages one after the other (their fields' ranges then point
/// into that buffer, their numbers stay those of the file).
pub struct InputFile {
    /// Where it was read from.
    pub path: PathBuf,
    /// Its bytes.
    pub bytes: Arc<Vec<u8>>,
    /// Its fields.
    pub catalogue: Catalogue,
}

/// A GRIB2 file catalogued where it lies: its fields' byte ranges in the
/// file, and nothing of its data read.
pub struct IndexedFile {
    /// The path.
    pub path: PathBuf,
    /// Its size when catalogued.
    pub size: u64,
    /// Its fields.
    pub catalogue: Catalogue,
}

/// A file whose fields are catalogued, in memory or where it lies.
pub trait Catalogued {
    /// Its path.
    fn path(&self) -> &Path;
    /// Its catalogue.
    fn catalogue(&self) -> &Catalogue;
}

impl Catalogued for InputFile {
    fn path(&self) -> &Path {
        &self.path
    }
    fn catalogue(&self) -> &Catalogue {
        &self.catalogue
    }
}

impl Catalogued for IndexedFile {
    fn path(&self) -> &Path {
        &self.path
    }
    fn catalogue(&self) -> &Catalogue {
        &self.catalogue
    }
}

fn file_issue(path: &Path, reason: String) -> Issue {
    Issue {
        file: path.to_path_buf(),
        field: None,
        what: String::new(),
        reason,
    }
}

fn catalogue_issues(path: &Path, catalogue: &Catalogue) -> Vec<Issue> {
    catalogue
        .problems
        .iter()
        .map(|p| Issue {
            file: path.to_path_buf(),
            field: p.field,
            what: String::new(),
            reason: format!("{} (at byte {})", p.reason, p.offset),
        })
        .collect()
}

/// Read a whole file and catalogue it; problems become issues. Anything but
/// a regular file is refused without blocking (see [`open_input`]).
pub fn read_input(path: &Path) -> (Option<InputFile>, Vec<Issue>) {
    let read = open_input(path, true)
        .map_err(|e| e.to_string())
        .and_then(|o| {
            read_ranges(&o.file, o.size, &[(0, o.size)]).map_err(|e| format!("cannot read: {e}"))
        });
    match read {
        Ok(bytes) => {
            let catalogue = catalogue(&bytes);
            let issues = catalogue_issues(path, &catalogue);
            (
                Some(InputFile {
                    path: path.to_path_buf(),
                    bytes: Arc::new(bytes),
                    catalogue,
                }),
                issues,
            )
        }
        Err(e) => (None, vec![file_issue(path, e)]),
    }
}

/// Catalogue a file where it lies, section by section, reading none of its
/// data; problems become issues. Anything but a regular file is refused
/// without blocking (see [`open_input`]).
pub fn index_input(path: &Path) -> (Option<IndexedFile>, Vec<Issue>) {
    match open_input(path, true) {
        Ok(o) => {
            let catalogue = catalogue_file(&o.file, o.size);
            let issues = catalogue_issues(path, &catalogue);
            (
                Some(IndexedFile {
                    path: path.to_path_buf(),
                    size: o.size,
                    catalogue,
                }),
                issues,
            )
        }
        Err(e) => (None, vec![file_issue(path, e.to_string())]),
    }
}

/// Read from their files the messages of a step's fields that its products
/// may use (see [`may_use`]; the step's first field always, for its grid),
/// each message once: the step again, over files that hold only those
/// messages. A file that cannot be read again as it was catalogued is an issue.
pub fn load_step_input(
    step: &Step,
    files: &[IndexedFile],
) -> Result<(Step, Vec<InputFile>), Issue> {
    let mut chosen: BTreeMap<usize, Vec<&FieldEntry>> = BTreeMap::new();
    for (k, fr) in step.fields.iter().enumerate() {
        if k == 0 || may_use(&fr.entry) {
            chosen.entry(fr.file).or_default().push(&fr.entry);
        }
    }
    let mut inputs = Vec::new();
    let mut fields = Vec::new();
    for (fi, entries) in chosen {
        let f = &files[fi];
        // The messages in file order, each once, and where each lands in the buffer.
        let mut messages: Vec<(u64, u64)> = entries
            .iter()
            .map(|e| (e.message_offset as u64, e.message_len as u64))
            .collect();
        messages.sort_unstable();
        messages.dedup();
        let mut at = BTreeMap::new();
        let mut next = 0usize;
        for &(o, n) in &messages {
            at.insert(o as usize, next);
            next += n as usize;
        }
        let bytes = open_input(&f.path, true)
            .map_err(|e| e.to_string())
            .and_then(|o| {
                read_ranges(&o.file, f.size, &messages).map_err(|e| format!("cannot read: {e}"))
            })
            .map_err(|reason| file_issue(&f.path, reason))?;
        let moved: Vec<FieldEntry> = entries
            .iter()
            .map(|e| e.moved(at[&e.message_offset]))
            .collect();
        for e in &moved {
            fields.push(FieldRef {
                file: inputs.len(),
                entry: e.clone(),
            });
        }
        inputs.push(InputFile {
            path: f.path.clone(),
            bytes: Arc::new(bytes),
            catalogue: Catalogue {
                fields: moved,
                ..Catalogue::default()
            },
        });
    }
    // Files and fields keep their order: the first field (the grid) stays
    // first, and of duplicates the first is used, as with the whole files.
    Ok((
        Step {
            key: step.key.clone(),
            fields,
        },
        inputs,
    ))
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

/// The step a field belongs to: centre, cycle, valid time, member, and its
/// grid definition with the resolution-and-component flags left out.
pub fn step_key(f: &FieldEntry) -> StepKey {
    StepKey {
        centre: f.centre,
        reference_time: f.reference_time,
        valid_time: f.valid_time,
        member: f.member,
        grid_key: grid_key(f),
    }
}

fn grid_key(f: &FieldEntry) -> Vec<u8> {
    let mut k = f.grid_definition.to_vec();
    let flags_at = crate::ingest::grid::flags_octet(f.grid_template);
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
pub fn plan<F: Catalogued>(inputs: &[F]) -> (Vec<Step>, Vec<Issue>) {
    let mut groups: BTreeMap<StepKey, Vec<FieldRef>> = BTreeMap::new();
    let mut issues = Vec::new();
    for (fi, input) in inputs.iter().enumerate() {
        for e in &input.catalogue().fields {
            if let Some(reason) = &e.unusable {
                // Problems already reported by the catalogue carry the same reason.
                if !input
                    .catalogue()
                    .problems
                    .iter()
                    .any(|p| p.field == Some(e.index))
                {
                    issues.push(Issue {
                        file: input.path().to_path_buf(),
                        field: Some(e.index),
                        what: String::new(),
                        reason: reason.clone(),
                    });
                }
                continue;
            }
            let key = step_key(e);
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
    /// Variables made but left out of the file because no point has a value,
    /// each as "name: why".
    pub left_out: Vec<String>,
    /// The file written, if any.
    pub output: Option<PathBuf>,
    /// Files published earlier that this step completed (changes added to them).
    pub updated: Vec<PathBuf>,
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
    /// Of which changes in time and the PV budget after publishing (reading earlier
    /// files, updating later ones).
    pub changes_seconds: f64,
    /// Of which drawing and writing the quicklook images.
    pub images_seconds: f64,
    /// Diagnostics time by family (vorticity, stability, isobaric PV, isentropic, tropopause, layer PV).
    pub family_seconds: Vec<(&'static str, f64)>,
    /// Why nothing was written, when nothing was.
    pub skipped: Option<String>,
    /// Quicklook images written beside the product.
    pub images: Vec<PathBuf>,
    /// The cycle's cyclone tracks, written again with this step.
    pub tracks: Vec<PathBuf>,
    /// True when the products were made but could not be written (disk full,
    /// permission denied): worth trying again, unlike a problem with the input.
    pub output_failed: bool,
}

/// Fields of a step sorted by what they are.
#[derive(Default)]
struct Inventory {
    /// (quantity, level in Pa) -> field, isobaric levels.
    isobaric: BTreeMap<(Quantity, i64), FieldRef>,
    surface_pressure: Option<FieldRef>,
    /// Pressure reduced to mean sea level.
    mslp: Option<FieldRef>,
    /// Orography and how to turn it into metres.
    orography: Option<(FieldRef, f64)>,
    /// Levels (Pa key) whose geopotential height is geopotential (0/3/4) to be divided by
    /// standard gravity: levels with geopotential and no geopotential height.
    geopotential: Vec<i64>,
}

/// True for the fields a step's products may use, as [`inventory`] sorts
/// them: quantities leeward knows on isobaric levels, surface pressure or
/// orography at the ground, and mean sea-level pressure.
pub fn may_use(e: &FieldEntry) -> bool {
    let Some(q) = Quantity::from_wmo(e.discipline, e.category, e.number) else {
        return false;
    };
    match (e.level.kind, e.level.value) {
        (surface::ISOBARIC, Some(p)) => p > 0.0,
        (surface::GROUND, _) => matches!(
            q,
            Quantity::Pressure
                | Quantity::GeopotentialHeight
                | Quantity::GeometricHeight
                | Quantity::TerrainHeight
                | Quantity::Geopotential
        ),
        // Mean sea-level pressure, for the cyclone centres and their tracks.
        (surface::MEAN_SEA_LEVEL, _) => {
            matches!(q, Quantity::MeanSeaLevelPressure | Quantity::Pressure)
        }
        _ => false,
    }
}

fn pa_key(p: f64) -> i64 {
    (p * 100.0).round() as i64 // 0.01 Pa resolution
}

fn inventory(step: &Step, inputs: &[InputFile], issues: &mut Vec<Issue>) -> Inventory {
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
fn nothing_usable(
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

/// Where a step's products go.
#[derive(Clone, Copy)]
pub struct Destination<'a> {
    /// Directory whose published files (and cycle subdirectories) are the
    /// memory across steps and cycles: changes in time are looked up there.
    pub store: &'a Path,
    /// Directory the step file is written into (`store` itself or below it).
    pub dir: &'a Path,
    /// Held while earlier files are read, this one written and later ones
    /// updated, so that steps processed at the same time see each other.
    pub lock: Option<&'a Mutex<()>>,
    /// Called once the file is in place and later files are updated, still
    /// holding `lock` (the service writes manifests here). An error means the
    /// step is not published and is worth trying again.
    pub on_published: Option<&'a PublishHook<'a>>,
    /// A batch job's staging directory: the step's file and images are
    /// written there instead of `dir`, and additions to files already
    /// published go to staged copies there (see [`changes::Run::staged`]);
    /// the service moves them into place. Nothing published is touched.
    pub stage: Option<&'a Path>,
}

/// What [`Destination::on_published`] is.
pub type PublishHook<'a> = dyn Fn(&StepReport) -> Result<(), String> + Sync + 'a;

impl<'a> Destination<'a> {
    /// Everything in one directory, one step at a time (`leeward process`).
    pub fn flat(dir: &'a Path) -> Self {
        Destination {
            store: dir,
            dir,
            lock: None,
            on_published: None,
            stage: None,
        }
    }
}

/// Run one step of `inputs` and write its products to `out`.
pub fn run_step(
    step: &Step,
    inputs: &[InputFile],
    cfg: &Config,
    out: &Destination<'_>,
    grid_suffix: Option<usize>,
) -> StepReport {
    let out_dir = out.store;
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
    let Some(first) = step.fields.first() else {
        rep.skipped = Some("no fields".into());
        return rep;
    };
    let (grid, scan) = match parse_grid(&first.entry.grid_definition).map_err(|e| e.to_string()) {
        Ok((g, s)) => crate::ingest::grid::with_longitudes(g, s, cfg.output.longitudes),
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
    let pr = &cfg.products;
    let have_t = !t_levels.is_empty();
    let have_w = !wind_levels.is_empty();
    let want_vort = pr.vorticity && have_w;
    let want_stab = pr.stability && have_t;
    let want_pv = pr.isobaric_pv && have_t && have_w;
    let want_isen = pr.isentropic && have_t;
    let want_trop = pr.tropopause && have_t && have_w;
    let want_layer = pr.layer_pv && have_t && have_w;
    let z_levels_all = levels_of(Quantity::GeopotentialHeight);
    let want_thick = pr.thickness && (have_t || !z_levels_all.is_empty());
    let want_moist = (pr.theta_e || pr.isentropic_humidity) && have_t;
    let want_low_pv = pr.low_level_pv && have_t && have_w;
    let want_mslp = pr.mslp || pr.cyclones;
    // Without a mean sea-level pressure it is reduced from the 1000 hPa height.
    let mslp_from_z = want_mslp && inv.mslp.is_none();
    let at_1000 = |p: &i64| *p == pa_key(1.0e5);
    if (pr.vorticity || pr.isobaric_pv || pr.tropopause || pr.layer_pv) && !have_w {
        rep.missing
            .push("isobaric u and v: no vorticity or PV".into());
    }
    if (pr.stability || pr.isentropic || pr.isobaric_pv || pr.tropopause || pr.layer_pv) && !have_t
    {
        rep.missing
            .push("isobaric temperature: no theta, stability, PV or isentropic products".into());
    }
    if !(want_vort || want_stab || want_pv || want_isen || want_trop || want_layer || want_thick) {
        let mut absent = Vec::new();
        for (q, levels) in [
            ("temperature", &t_levels),
            ("u", &u_levels),
            ("v", &v_levels),
        ] {
            if levels.is_empty() {
                absent.push(q);
            }
        }
        if pr.thickness && z_levels_all.is_empty() {
            absent.push("geopotential height");
        }
        let lacking = if absent.is_empty() {
            "no isobaric level with both u and v".to_string()
        } else {
            format!("no isobaric {}", absent.join(", "))
        };
        issues.extend(nothing_usable(step, inputs, &lacking, &cycle, lead));
        rep.issues = issues;
        rep.skipped = Some(format!(
            "no fields for any product: {lacking} ({})",
            rep.missing.join("; ")
        ));
        rep.seconds = t0.elapsed().as_secs_f64();
        return rep;
    }
    let need_t = want_stab || want_pv || want_isen || want_trop || want_layer || want_thick;
    let need_w = want_vort || want_pv || want_isen || want_trop || want_layer;
    let need_z_products = want_isen || want_trop || want_thick;
    let z_levels = levels_of(Quantity::GeopotentialHeight);
    if need_z_products && z_levels.is_empty() {
        rep.missing
            .push("isobaric geopotential height: no isen_z, isen_m, trop_z".into());
    }

    // Decode what the products need, in parallel across fields.
    #[derive(Clone, PartialEq, Eq, PartialOrd, Ord)]
    enum Want {
        Iso(Quantity, i64),
        SurfacePressure,
        Orography,
        Mslp,
    }
    let mask_by_orography =
        pr.mask_below_ground && inv.orography.is_some() && inv.surface_pressure.is_none();
    let mut wanted: Vec<(Want, FieldRef)> = Vec::new();
    for ((q, p), fr) in &inv.isobaric {
        let need = match q {
            Quantity::Temperature => need_t || (mslp_from_z && at_1000(p)),
            Quantity::WindU | Quantity::WindV => need_w && wind_levels.contains(p),
            Quantity::GeopotentialHeight => {
                need_z_products || mask_by_orography || (mslp_from_z && at_1000(p))
            }
            Quantity::SpecificHumidity | Quantity::RelativeHumidity => want_thick || want_moist,
            _ => false,
        };
        if need {
            wanted.push((Want::Iso(*q, *p), fr.clone()));
        }
    }
    if pr.mask_below_ground {
        if let Some(fr) = &inv.surface_pressure {
            wanted.push((Want::SurfacePressure, fr.clone()));
        } else if let Some((fr, _)) = &inv.orography {
            wanted.push((Want::Orography, fr.clone()));
        }
    }
    if want_mslp {
        if let Some(fr) = &inv.mslp {
            wanted.push((Want::Mslp, fr.clone()));
        }
    }
    // The model's own terrain outlines its land on the quicklooks when asked, and is
    // written with the mean sea-level pressure.
    let terrain_outline =
        cfg.quicklook.enabled && cfg.quicklook.outline == crate::config::OutlineKind::Terrain;
    if (terrain_outline || want_mslp) && !wanted.iter().any(|(w, _)| *w == Want::Orography) {
        if let Some((fr, _)) = &inv.orography {
            wanted.push((Want::Orography, fr.clone()));
        }
    }
    let t_decode = Instant::now();
    let mut dec = decode_all(wanted, inputs, &scan, &mut issues);
    for p in &inv.geopotential {
        if let Some(z) = dec.get_mut(&Want::Iso(Quantity::GeopotentialHeight, *p)) {
            z.mapv_inplace(|phi| (f64::from(phi) / G0) as f32);
        }
    }
    let terrain_m: Option<Array2<f32>> = terrain_outline
        .then(|| {
            let to_m = inv.orography.as_ref().map_or(1.0, |o| o.1) as f32;
            dec.get(&Want::Orography).map(|o| o.mapv(|x| x * to_m))
        })
        .flatten();
    rep.fields_used = dec.len();
    rep.decode_seconds = t_decode.elapsed().as_secs_f64();
    let t_compute = Instant::now();
    // Mean sea-level pressure and the terrain, before anything is masked below ground.
    let mut surface_products: Vec<Product> = Vec::new();
    if want_mslp {
        let input = dec.remove(&Want::Mslp);
        let iso = |q| dec.get(&Want::Iso(q, pa_key(1.0e5)));
        let z1000 = iso(Quantity::GeopotentialHeight).filter(|_| mslp_from_z);
        let t1000 = iso(Quantity::Temperature).filter(|_| mslp_from_z);
        let made = synoptic::mslp(input, z1000, t1000);
        if made.is_none() {
            rep.missing
                .push("mean sea-level pressure, or the 1000 hPa height: no mslp".into());
        }
        surface_products.extend(made);
        if let (Some(oro), Some((_, scale))) = (dec.get(&Want::Orography), &inv.orography) {
            surface_products.push(synoptic::orography(oro, *scale));
        }
    }

    // The isobaric levels of the products: every level with temperature or winds.
    let (ny, nx) = grid.shape();
    let mut levels: Vec<i64> = Vec::new();
    if need_t {
        levels.extend(&t_levels);
    }
    if want_thick {
        levels.extend(&z_levels_all);
    }
    if need_w {
        levels.extend(&wind_levels);
    }
    levels.sort_unstable();
    levels.dedup();
    let p_pa: Vec<f64> = levels.iter().map(|k| *k as f64 / 100.0).collect();
    let nz = levels.len();

    // Below-ground mask per level, from surface pressure or from orography and heights.
    let masking;
    let mut below = vec![None::<Array2<bool>>; nz];
    if let Some(ps) = dec.remove(&Want::SurfacePressure) {
        masking = "levels with pressure greater than the surface pressure are missing".to_string();
        for (k, p) in p_pa.iter().enumerate() {
            below[k] = Some(ps.mapv(|s| s.is_finite() && f64::from(s) < *p));
        }
    } else if let Some(oro) = dec.remove(&Want::Orography) {
        let scale = inv.orography.as_ref().map(|o| o.1).unwrap_or(1.0);
        let z_at: Vec<Option<&Array2<f32>>> = levels
            .iter()
            .map(|lk| dec.get(&Want::Iso(Quantity::GeopotentialHeight, *lk)))
            .collect();
        let any = z_at.iter().any(Option::is_some);
        below = below_ground_by_heights(&p_pa, &z_at, &oro, scale);
        masking = if any {
            "levels whose geopotential height is below the orography are missing".to_string()
        } else {
            "none: orography present but no isobaric geopotential height to compare".to_string()
        };
    } else {
        masking = "none: no surface pressure or orography in the input".to_string();
    }

    // Stack each quantity on the product levels (NaN where a level lacks it), masked below ground.
    let mut stack = |q: Quantity| -> Option<Array3<f32>> {
        let mut out: Option<Array3<f32>> = None;
        for (k, lk) in levels.iter().enumerate() {
            if let Some(mut a) = dec.remove(&Want::Iso(q, *lk)) {
                if let Some(m) = &below[k] {
                    ndarray::Zip::from(&mut a).and(m).for_each(|v, &b| {
                        if b {
                            *v = f32::NAN;
                        }
                    });
                }
                out.get_or_insert_with(|| Array3::from_elem((nz, ny, nx), f32::NAN))
                    .index_axis_mut(Axis(0), k)
                    .assign(&a);
            }
        }
        out
    };
    let t3 = if need_t {
        stack(Quantity::Temperature)
    } else {
        None
    };
    let u3 = if need_w { stack(Quantity::WindU) } else { None };
    let v3 = if need_w { stack(Quantity::WindV) } else { None };
    let z3 = stack(Quantity::GeopotentialHeight);
    let q3 = if want_thick || want_moist {
        stack(Quantity::SpecificHumidity)
    } else {
        None
    };
    let rh3 = if (want_thick || want_moist) && q3.is_none() {
        stack(Quantity::RelativeHumidity)
    } else {
        None
    };
    drop(dec);

    let (lat, lon) = grid.latlon();
    // Longitudes of every point of a rotated or projected grid in one range, as the columns'.
    let lon = if matches!(grid.horizontal, Horizontal::LatLon { .. }) {
        lon
    } else {
        crate::geometry::longitude::points(&lon, cfg.output.longitudes)
    };
    let plane = Plane::new(&grid, &lat, &lon);
    let mut fields: Vec<Product> = Vec::new();
    let mut winds = "no winds used".to_string();
    let first_wind = wind_levels
        .first()
        .and_then(|p| inv.isobaric.get(&(Quantity::WindU, *p)));
    let input_grid_relative = first_wind
        .map(|fr| fr.entry.winds_grid_relative)
        .unwrap_or(false);
    let (u_spec, v_spec) = if plane.rotation.is_some() && input_grid_relative {
        (variables::WIND_U_GRID, variables::WIND_V_GRID)
    } else {
        (variables::WIND_U_EARTH, variables::WIND_V_EARTH)
    };

    // Winds along the grid's axes, level by level, as each level's flag says.
    let mut wind_axes: Option<(Array3<f32>, Array3<f32>)> = None;
    if let (Some(u3), Some(v3)) = (&u3, &v3) {
        let grid_rel: Vec<bool> = levels
            .iter()
            .map(|p| {
                inv.isobaric
                    .get(&(Quantity::WindU, *p))
                    .map(|fr| fr.entry.winds_grid_relative)
                    .unwrap_or(true)
            })
            .collect();
        let all_grid = grid_rel.iter().all(|&g| g);
        let any_grid = grid_rel.iter().any(|&g| g);
        winds = match (&grid.horizontal, all_grid, any_grid) {
            (Horizontal::LatLon { .. }, _, _) => "relative to east and north (the grid's axes)".into(),
            (_, true, _) => "relative to the grid's x and y axes (flag table 3.3 bit 5 set); used as they are".into(),
            (_, false, false) => "relative to east and north (flag table 3.3 bit 5 clear); turned into grid axes before differencing".into(),
            _ => "mixed: each level as its flag table 3.3 bit 5 says".into(),
        };
        if plane.rotation.is_some() && !all_grid {
            let mut ug = u3.clone();
            let mut vg = v3.clone();
            for (k, &rel) in grid_rel.iter().enumerate() {
                let (a, b) = plane.to_grid_axes(
                    u3.index_axis(Axis(0), k).mapv(f64::from),
                    v3.index_axis(Axis(0), k).mapv(f64::from),
                    rel,
                );
                ug.index_axis_mut(Axis(0), k).assign(&a.mapv(|x| x as f32));
                vg.index_axis_mut(Axis(0), k).assign(&b.mapv(|x| x as f32));
            }
            wind_axes = Some((ug, vg));
        }
    }
    let (ug3, vg3) = match (&wind_axes, &u3, &v3) {
        (Some((a, b)), _, _) => (Some(a), Some(b)),
        (None, Some(a), Some(b)) => (Some(a), Some(b)),
        _ => (None, None),
    };

    // Each product leaves the working set packed as the file will store it
    // (bit rounding, shuffle, deflate; [`crate::output::pack`], on every core)
    // as soon as it is made, or once nothing else needs its plain values; only
    // compressed bytes wait for the writer. The seconds count as writing.
    let packing = std::cell::Cell::new(0.0);
    let kept = cfg.output.kept_bits();
    let seal = |mut p: Product| {
        let t = Instant::now();
        in_si_units(&mut p);
        p.pack(kept.bits(p.spec.name), cfg.output.deflate_level);
        packing.set(packing.get() + t.elapsed().as_secs_f64());
        p
    };
    let sealed = |spec, vertical, data: Array3<f32>| seal(Product::new(spec, vertical, data));
    // Values still in use elsewhere: packed from a borrow, without a copy.
    let sealed_copy = |spec: variables::VarSpec, vertical, data: &Array3<f32>| {
        let t = Instant::now();
        let p = if spec.units == variables::PV_UNITS {
            let mut p = Product::new(spec, vertical, data.clone());
            in_si_units(&mut p);
            p.pack(kept.bits(p.spec.name), cfg.output.deflate_level);
            p
        } else {
            Product::packed_copy(spec, vertical, data, &cfg.output)
        };
        packing.set(packing.get() + t.elapsed().as_secs_f64());
        p
    };
    rep.family_seconds
        .push(("prepare", t_compute.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Isobaric vorticity, level by level in parallel.
    let mut eta3: Option<Array3<f32>> = None;
    if let (Some(ug), Some(vg)) = (ug3, vg3) {
        let mut zeta = Array3::from_elem((nz, ny, nx), f32::NAN);
        let mut eta = Array3::from_elem((nz, ny, nx), f32::NAN);
        zeta.axis_iter_mut(Axis(0))
            .into_par_iter()
            .zip(eta.axis_iter_mut(Axis(0)))
            .enumerate()
            .for_each(|(k, (mut zl, mut el))| {
                let z = plane.vorticity(
                    ug.index_axis(Axis(0), k).mapv(f64::from).view(),
                    vg.index_axis(Axis(0), k).mapv(f64::from).view(),
                );
                ndarray::Zip::from(&mut zl)
                    .and(&mut el)
                    .and(&z)
                    .and(&plane.f)
                    .for_each(|zo, eo, &zv, &f| {
                        *zo = zv as f32;
                        *eo = vorticity::absolute_vorticity_at(zv, f) as f32;
                    });
            });
        if want_vort {
            fields.push(sealed(variables::ZETA, Vertical::Pressure, zeta));
            fields.push(sealed_copy(variables::ETA, Vertical::Pressure, &eta));
        }
        eta3 = Some(eta);
    }

    rep.family_seconds
        .push(("vorticity", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Potential temperature and static stability.
    let mut st = t3.as_ref().map(|t| stability::stability(t.view(), &p_pa));
    // Relative humidity on the levels, for theta_e and the isentropic surfaces.
    let rh_moist = if want_moist {
        synoptic::relative_humidity(q3.as_ref(), rh3.as_ref(), t3.as_ref(), &p_pa)
    } else {
        None
    };
    if want_moist && rh_moist.is_none() {
        rep.missing
            .push("isobaric humidity: no theta_e, isen_q or isen_rh".into());
    }
    {
        let syn = synoptic::Stacks {
            p: &p_pa,
            t: t3.as_ref(),
            u: ug3,
            v: vg3,
            z: z3.as_ref(),
            theta: st.as_ref().map(|s| &s.theta),
            rh: rh_moist.as_deref(),
            f: &plane.f,
            rotation: plane.rotation.as_ref(),
        };
        if pr.theta_e {
            fields.extend(synoptic::theta_e(&syn).map(seal));
        }
        if pr.eady && have_t && have_w {
            match synoptic::eady(&syn, cfg.cyclones.eady_layer_hpa) {
                Ok(p) => surface_products.push(p),
                Err(m) => rep.missing.push(m),
            }
        }
        if pr.cyclones {
            surface_products.extend(
                synoptic::steering(&syn, cfg.cyclones.steering_layer_hpa)
                    .into_iter()
                    .flatten(),
            );
        }
    }
    // Temperature itself is needed later only for a thickness layer without heights.
    let has_z_at = |hpa: f64| {
        z_levels_all
            .iter()
            .any(|&k| (k as f64 / 1e4 - hpa).abs() < 1e-6)
    };
    let thick_needs_t = want_thick
        && cfg
            .thickness
            .layers_hpa
            .iter()
            .any(|l| !(has_z_at(l[0]) && has_z_at(l[1])));
    let t3 = t3.filter(|_| thick_needs_t);
    let n2_prod = st
        .as_mut()
        .map(|st| std::mem::take(&mut st.n2))
        .filter(|_| want_stab)
        .map(|n2| sealed(variables::N2, Vertical::Pressure, n2));

    rep.family_seconds
        .push(("stability", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Isobaric PV in its full form.
    let mut pv3: Option<Array3<f32>> = None;
    if let (Some(st), Some(eta), Some(ug), Some(vg)) = (&st, &eta3, ug3, vg3) {
        if want_pv || want_trop || want_low_pv {
            let lnp: Vec<f64> = p_pa.iter().map(|p| p.ln()).collect();
            let mut pv = Array3::from_elem((nz, ny, nx), f32::NAN);
            pv.axis_iter_mut(Axis(0))
                .into_par_iter()
                .enumerate()
                .for_each(|(k, mut out)| {
                    let th = st.theta.index_axis(Axis(0), k).mapv(f64::from);
                    let (gx, gy) = plane.gradient(th.view());
                    ndarray::Zip::indexed(&mut out).for_each(|(j, i), o| {
                        *o = pv::isobaric_pv(
                            f64::from(eta[(k, j, i)]),
                            -f64::from(st.neg_dtheta_dp[(k, j, i)]),
                            vertical_derivative_at(ug, k, j, i, &lnp, &p_pa),
                            vertical_derivative_at(vg, k, j, i, &lnp, &p_pa),
                            gx[(j, i)],
                            gy[(j, i)],
                        ) as f32;
                    });
                });
            pv3 = Some(pv);
        }
    }
    // Absolute vorticity is needed by PV only.
    drop(eta3);
    if let (true, Some(pv)) = (want_low_pv, &pv3) {
        surface_products.push(synoptic::low_pv(pv, &p_pa, cfg.cyclones.low_pv_layer_hpa));
    }

    let stab_prod = st
        .as_mut()
        .map(|st| std::mem::take(&mut st.neg_dtheta_dp))
        .filter(|_| want_stab)
        .map(|stab| sealed(variables::STAB, Vertical::Pressure, stab));
    rep.family_seconds
        .push(("isobaric_pv", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Dynamic tropopause and folds on each PV surface.
    if let (true, Some(pv), Some(st), Some(u), Some(v)) = (want_trop, &pv3, &st, &u3, &v3) {
        let columns = TropopauseColumns {
            pv,
            theta: &st.theta,
            z: z3.as_ref(),
            u,
            v,
            lat: &lat,
            p: &p_pa,
        };
        let winds = (
            variables::wind("trop_u", u_spec, "wind component at the dynamic tropopause"),
            variables::wind("trop_v", v_spec, "wind component at the dynamic tropopause"),
        );
        fields.extend(
            tropopause_products(&columns, &cfg.isentropic, winds)
                .into_iter()
                .map(&seal),
        );
    }

    let pv_prod = pv3
        .take()
        .filter(|_| want_pv)
        .map(|pv| sealed(variables::PV, Vertical::Pressure, pv));
    rep.family_seconds
        .push(("tropopause", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Isentropic surfaces.
    if let (true, Some(st)) = (want_isen, &st) {
        let targets = &cfg.isentropic.surfaces;
        let mut surf = isentropic::surfaces(st.theta.view(), &p_pa, targets);
        for (k, g) in surf.gaps.iter().enumerate() {
            tracing::debug!(cycle = %cycle, step = lead, theta = targets[k], below = g.below, above = g.above, unstable = g.unstable, "isentropic surface gaps");
        }
        let ns = targets.len();
        // Winds and PV first; each product is packed as soon as it is made.
        let mut made: Vec<Product> = Vec::new();
        let mut pv_prod = None;
        if let (Some(u), Some(v), Some(ug), Some(vg)) = (&u3, &v3, ug3, vg3) {
            let ugs = isentropic::on_surfaces(ug.view(), &surf);
            let vgs = isentropic::on_surfaces(vg.view(), &surf);
            let mut pv_s = Array3::from_elem((ns, ny, nx), f32::NAN);
            pv_s.axis_iter_mut(Axis(0))
                .into_par_iter()
                .enumerate()
                .for_each(|(s, mut out)| {
                    let z = plane.vorticity(
                        ugs.index_axis(Axis(0), s).mapv(f64::from).view(),
                        vgs.index_axis(Axis(0), s).mapv(f64::from).view(),
                    );
                    let pv = isentropic::isentropic_pv(
                        z.view(),
                        plane.f.view(),
                        surf.dtheta_dp.index_axis(Axis(0), s),
                    );
                    out.zip_mut_with(&pv, |o, &x| *o = x as f32);
                });
            // Winds as the input gives them: the same arrays when no turning was needed.
            let (us, vs) = if wind_axes.is_none() {
                (ugs, vgs)
            } else {
                (
                    isentropic::on_surfaces(u.view(), &surf),
                    isentropic::on_surfaces(v.view(), &surf),
                )
            };
            made.push(sealed(
                variables::wind("isen_u", u_spec, "wind component on isentropic surfaces"),
                Vertical::Theta,
                us,
            ));
            made.push(sealed(
                variables::wind("isen_v", v_spec, "wind component on isentropic surfaces"),
                Vertical::Theta,
                vs,
            ));
            pv_prod = Some(sealed(variables::ISEN_PV, Vertical::Theta, pv_s));
        }
        let z_s = z3
            .as_ref()
            .map(|z| isentropic::on_surfaces(z.view(), &surf));
        let rh_s = rh_moist
            .as_ref()
            .filter(|_| pr.isentropic_humidity)
            .map(|r| isentropic::on_surfaces(r.view(), &surf));
        let p_s = std::mem::take(&mut surf.pressure);
        drop(surf);
        let mut t_s = Array3::from_elem((ns, ny, nx), f32::NAN);
        ndarray::Zip::indexed(&mut t_s)
            .and(&p_s)
            .par_for_each(|(s, _, _), t, &p| {
                *t = isentropic::temperature_on_surface(targets[s], f64::from(p)) as f32;
            });
        if let Some(rh_s) = rh_s {
            made.extend(synoptic::isentropic_humidity(rh_s, &p_s, &t_s).map(seal));
        }
        made.push(sealed(variables::ISEN_P, Vertical::Theta, p_s));
        if let Some(z_s) = z_s {
            let mut m = Array3::from_elem((ns, ny, nx), f32::NAN);
            ndarray::Zip::from(&mut m)
                .and(&t_s)
                .and(&z_s)
                .par_for_each(|m, &t, &z| {
                    *m = isentropic::montgomery(f64::from(t), f64::from(z)) as f32;
                });
            made.push(sealed(variables::ISEN_Z, Vertical::Theta, z_s));
            made.push(sealed(variables::ISEN_M, Vertical::Theta, m));
        }
        made.push(sealed(variables::ISEN_T, Vertical::Theta, t_s));
        if have_w {
            made.extend(pv_prod);
        }
        fields.extend(made);
    }

    rep.family_seconds
        .push(("isentropic", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    // Layer PV in column-depth form.
    if let (true, Some(st), Some(ug), Some(vg)) = (want_layer, &st, ug3, vg3) {
        let layers = &cfg.isentropic.layers;
        let mut bounds: Vec<f64> = layers.iter().flat_map(|l| [l[0], l[1]]).collect();
        bounds.sort_by(f64::total_cmp);
        bounds.dedup();
        let surf = isentropic::surfaces(st.theta.view(), &p_pa, &bounds);
        let nl = layers.len();
        let mut lpv = Array3::from_elem((nl, ny, nx), f32::NAN);
        let mut ldp = Array3::from_elem((nl, ny, nx), f32::NAN);
        let mut lu = Array3::from_elem((nl, ny, nx), f32::NAN);
        let mut lv = Array3::from_elem((nl, ny, nx), f32::NAN);
        let ub = isentropic::on_surfaces(ug.view(), &surf);
        let vb = isentropic::on_surfaces(vg.view(), &surf);
        for (n, l) in layers.iter().enumerate() {
            let ib = bounds.iter().position(|b| *b == l[0]).unwrap_or(0);
            let it = bounds.iter().position(|b| *b == l[1]).unwrap_or(0);
            let (um, vm, dp) = isentropic::layer_mean_wind_with(
                ug.view(),
                vg.view(),
                &p_pa,
                &surf,
                (&ub, &vb),
                ib,
                it,
            );
            let z = plane.vorticity(um.view(), vm.view());
            lu.index_axis_mut(Axis(0), n).assign(&um.mapv(|x| x as f32));
            lv.index_axis_mut(Axis(0), n).assign(&vm.mapv(|x| x as f32));
            ndarray::Zip::from(ldp.index_axis_mut(Axis(0), n))
                .and(lpv.index_axis_mut(Axis(0), n))
                .and(&z)
                .and(&dp)
                .and(&plane.f)
                .par_for_each(|ld, lp, &zv, &d, &f| {
                    *ld = d as f32;
                    *lp = isentropic::layer_pv(zv + f, d) as f32;
                });
        }
        fields.push(sealed(variables::LAYER_PV, Vertical::ThetaLayer, lpv));
        fields.push(sealed(variables::LAYER_DP, Vertical::ThetaLayer, ldp));
        let (lu_spec, lv_spec) = if plane.rotation.is_some() {
            (variables::WIND_U_GRID, variables::WIND_V_GRID)
        } else {
            (variables::WIND_U_EARTH, variables::WIND_V_EARTH)
        };
        fields.push(sealed(
            variables::wind(
                "layer_u",
                lu_spec,
                "layer-mean wind along the grid's x axis",
            ),
            Vertical::ThetaLayer,
            lu,
        ));
        fields.push(sealed(
            variables::wind(
                "layer_v",
                lv_spec,
                "layer-mean wind along the grid's y axis",
            ),
            Vertical::ThetaLayer,
            lv,
        ));
    }

    rep.family_seconds
        .push(("layer_pv", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();

    // Isobaric layer thickness: heights where both levels have them, else hypsometric.
    let mut p_layers: Vec<[f64; 2]> = Vec::new();
    if want_thick {
        let find = |hpa: f64| {
            levels
                .iter()
                .position(|&k| (k as f64 / 1e4 - hpa).abs() < 1e-6)
        };
        let has_z = |k: usize| {
            z3.as_ref()
                .is_some_and(|z| z.index_axis(Axis(0), k).iter().any(|v| v.is_finite()))
        };
        let humidity = if q3.is_some() {
            "virtual temperature from specific humidity"
        } else if rh3.is_some() {
            "virtual temperature from relative humidity"
        } else {
            "dry: no humidity in the input"
        };
        let mut data = Vec::new();
        let mut methods = Vec::new();
        for l in &cfg.thickness.layers_hpa {
            let (Some(kb), Some(kt)) = (find(l[0]), find(l[1])) else {
                rep.missing.push(format!(
                    "thickness {}-{} hPa: a bounding level is not in the input",
                    l[0], l[1]
                ));
                continue;
            };
            let mut a = Array2::from_elem((ny, nx), f32::NAN);
            if has_z(kb) && has_z(kt) {
                if let Some(z) = &z3 {
                    ndarray::Zip::indexed(&mut a).for_each(|(j, i), o| {
                        *o = z[(kt, j, i)] - z[(kb, j, i)];
                    });
                }
                methods.push(format!(
                    "{}-{} hPa: geopotential height difference",
                    l[0], l[1]
                ));
            } else if let Some(t) = &t3 {
                ndarray::Zip::indexed(&mut a).par_for_each(|(j, i), o| {
                    let tv: Vec<f64> = (0..nz)
                        .map(|k| {
                            let tk = f64::from(t[(k, j, i)]);
                            let q = match (&q3, &rh3) {
                                (Some(q), _) => f64::from(q[(k, j, i)]),
                                (None, Some(rh)) => thickness::specific_humidity_from_rh(
                                    f64::from(rh[(k, j, i)]),
                                    tk,
                                    p_pa[k],
                                ),
                                _ => 0.0,
                            };
                            thickness::virtual_temperature(tk, if q.is_finite() { q } else { 0.0 })
                        })
                        .collect();
                    *o = thickness::hypsometric_thickness(&tv, &p_pa, p_pa[kb], p_pa[kt]) as f32;
                });
                methods.push(format!(
                    "{}-{} hPa: hypsometric equation, {humidity}",
                    l[0], l[1]
                ));
            } else {
                rep.missing.push(format!(
                    "thickness {}-{} hPa: no heights and no temperature",
                    l[0], l[1]
                ));
                continue;
            }
            p_layers.push([l[0] * 100.0, l[1] * 100.0]);
            data.push(a);
        }
        if !data.is_empty() {
            let mut th = Array3::from_elem((data.len(), ny, nx), f32::NAN);
            for (k, a) in data.into_iter().enumerate() {
                th.index_axis_mut(Axis(0), k).assign(&a);
            }
            let mut prod = Product::new(variables::THICK, Vertical::PressureLayer, th);
            prod.notes.push(("leeward_method", methods.join("; ")));
            fields.push(seal(prod));
        }
    }
    rep.family_seconds
        .push(("thickness", t_family.elapsed().as_secs_f64()));
    let t_family = Instant::now();
    if let (true, Some(st)) = (want_stab, st) {
        fields.push(sealed(variables::THETA, Vertical::Pressure, st.theta));
    }
    fields.extend(stab_prod);
    fields.extend(n2_prod);
    fields.extend(pv_prod);
    for p in &mut surface_products {
        in_si_units(p);
    }
    fields.extend(surface_products);
    if let (true, Some(z)) = (want_thick || want_isen, &z3) {
        let mut prod = sealed_copy(variables::Z, Vertical::Pressure, z);
        if !inv.geopotential.is_empty() {
            let hpa: Vec<String> = inv
                .geopotential
                .iter()
                .map(|p| format!("{}", *p as f64 / 1e4))
                .collect();
            prod.notes.push((
                "leeward_method",
                format!(
                    "geopotential (WMO 0/3/4) divided by standard gravity {G0} m s-2 at {} hPa",
                    hpa.join(", ")
                ),
            ));
        }
        fields.push(prod);
    }

    // Changes in time, from the published files of earlier steps and cycles.
    // Steps processed side by side take turns from here to the end.
    let _publishing = out
        .lock
        .map(|m| m.lock().unwrap_or_else(std::sync::PoisonError::into_inner));
    let gid = grid_id(&step.key.grid_key);
    let run = changes::Run {
        out_dir,
        centre: step.key.centre,
        grid_id: &gid,
        member: step.key.member,
        reference_time: step.key.reference_time,
        valid_time: step.key.valid_time,
        stage: out.stage,
    };
    let p_layer_coords: Vec<f64> = p_layers.iter().map(|l| 0.5 * (l[0] + l[1])).collect();
    let pv_coords = cfg.isentropic.tropopause_pvu.clone();
    let mut change_products = Vec::new();
    // Changes are taken between values as published (bit-rounded), so that the
    // order in which steps and cycles arrive cannot change a single bit.
    let kept = cfg.output.kept_bits();
    let as_published: Vec<(&'static str, Array3<f32>)> = fields
        .iter()
        .filter(|f| matches!(f.spec.name, "thick" | "z" | "trop_p" | "mslp"))
        .map(|f| (f.spec.name, f.published(kept.bits(f.spec.name))))
        .collect();
    let find = |n: &str| as_published.iter().find(|(m, _)| *m == n).map(|(_, a)| a);
    // The fields of this step that run-to-run changes compare, with their coordinates:
    // used against the previous cycle now, and against a next cycle after publishing.
    let mut r2r_fields: changes::Fields<'_> = Vec::new();
    if pr.run_to_run {
        for (name, coords) in [
            ("thick", &p_layer_coords),
            ("z", &p_pa),
            ("trop_p", &pv_coords),
            ("mslp", &Vec::new()),
        ] {
            if let Some(a) = find(name) {
                r2r_fields.push((name, coords.clone(), a));
            }
        }
    }
    let thick_now = if pr.thickness_change {
        find("thick").map(|a| (p_layer_coords.as_slice(), a))
    } else {
        None
    };
    if let Some(th) = thick_now {
        change_products.extend(changes::within_cycle(&run, th, &cfg.changes.intervals_h));
    }
    let mslp_now = find("mslp").map(|a| (&[][..], a));
    if let Some(m) = mslp_now {
        change_products.extend(changes::within_cycle_of(
            &run,
            changes::MSLP_TENDENCY,
            m,
            &cfg.changes.intervals_h,
        ));
    }
    if pr.run_to_run {
        change_products.extend(changes::run_to_run(&run, &r2r_fields));
    }
    fields.extend(change_products.into_iter().map(seal));
    rep.family_seconds
        .push(("changes_read", t_family.elapsed().as_secs_f64()));
    let pack_seconds = packing.get();
    rep.family_seconds.push(("packing", pack_seconds));
    for (family, seconds) in &rep.family_seconds {
        tracing::debug!(cycle = %cycle, step = lead, family, seconds, "diagnostic family timing");
    }
    let (fields, left_out) = crate::output::cf::leave_out_empty(fields);
    for (name, why) in &left_out {
        warn!(cycle = %cycle, step = lead, variable = %name, reason = %why, "variable left out: no valid point");
    }
    rep.left_out = left_out
        .into_iter()
        .map(|(n, why)| format!("{n}: {why}"))
        .collect();
    rep.products = fields
        .iter()
        .flat_map(|f| crate::output::cf::file_names(f, &p_layers))
        .collect();
    rep.compute_seconds = t_compute.elapsed().as_secs_f64() - pack_seconds;

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
    let budget_f = plane.f.clone();
    let budget_rotation = plane.rotation.clone();
    drop(plane);
    let products = StepProducts {
        centre: step.key.centre,
        grid_id: grid_id(&step.key.grid_key),
        member: step.key.member,
        institution: cfg.output.institution(step.key.centre),
        reference_time: step.key.reference_time,
        valid_time: step.key.valid_time,
        grid,
        lat,
        lon,
        levels: if fields.iter().any(|f| f.vertical == Vertical::Pressure) {
            p_pa
        } else {
            Vec::new()
        },
        theta_levels: cfg.isentropic.surfaces.clone(),
        pv_levels: cfg.isentropic.tropopause_pvu.clone(),
        layers: cfg.isentropic.layers.clone(),
        p_layers,
        fields,
        masking,
        winds,
        inputs: inputs_used,
        deflate: cfg.output.deflate_level,
        kept_bits: kept.clone(),
    };
    let name = output_name(&step.key, grid_suffix);
    let t_write = Instant::now();
    let written = write_step(out.stage.unwrap_or(out.dir), &name, &products);
    rep.write_seconds = t_write.elapsed().as_secs_f64() + pack_seconds;
    match written {
        Ok(path) => {
            let t_changes = Instant::now();
            rep.updated = changes::update_later(
                &run,
                &path,
                thick_now,
                &r2r_fields,
                &cfg.changes.intervals_h,
                cfg.output.deflate_level,
                &kept,
            );
            if let Some(m) = mslp_now {
                rep.updated.extend(changes::update_later_of(
                    &run,
                    changes::MSLP_TENDENCY,
                    m,
                    &cfg.changes.intervals_h,
                    cfg.output.deflate_level,
                    &kept,
                ));
            }
            if pr.pv_budget && want_layer {
                let layout = match &products.grid.horizontal {
                    Horizontal::LatLon { lat, lon, .. } => budget::Layout::Sphere {
                        lat,
                        lon,
                        radius: products.grid.radius(),
                        periodic: products.grid.periodic(),
                    },
                    Horizontal::Rotated { rlat, rlon, .. } => budget::Layout::Sphere {
                        lat: rlat,
                        lon: rlon,
                        radius: products.grid.radius(),
                        periodic: products.grid.periodic(),
                    },
                    Horizontal::Projected { proj, x, y } => budget::Layout::Projected {
                        proj: *proj,
                        earth: products.grid.earth,
                        x0: x[0],
                        y0: y[0],
                        dx: if x.len() > 1 { x[1] - x[0] } else { f64::NAN },
                        dy: if y.len() > 1 { y[1] - y[0] } else { f64::NAN },
                    },
                };
                let trajectories = budget::Settings {
                    max_substep: cfg.changes.budget_max_substep_h * 3600.0,
                    tolerance: cfg.changes.budget_tolerance * layout.grid_length(),
                    max_iterations: budget::MAX_ITERATIONS,
                };
                let geom = changes::Geometry {
                    layout,
                    f: &budget_f,
                    rotation: budget_rotation.as_ref(),
                    winds_grid_relative: input_grid_relative,
                    periodic: products.grid.periodic(),
                    trajectories,
                };
                rep.updated.extend(changes::update_budgets(
                    &run,
                    &path,
                    &geom,
                    cfg.changes.budget_max_interval_h,
                    cfg.output.deflate_level,
                    &kept,
                ));
            }
            // The cycle's tracks, from every step published so far; a batch job's
            // staged step is not published yet: the service makes them on taking it.
            if pr.cyclones && out.stage.is_none() && mslp_now.is_some() {
                rep.tracks = crate::cyclones::cycle::update(
                    &run,
                    &path,
                    &cfg.cyclones,
                    &cfg.quicklook,
                    Some(&products.grid),
                );
            }
            rep.changes_seconds = t_changes.elapsed().as_secs_f64();
            info!(cycle = %cycle, step = lead, file = %path.display(), products = ?rep.products, "step written");
            if cfg.quicklook.enabled {
                let wanted: Vec<_> = cfg
                    .quicklook
                    .images
                    .iter()
                    .filter_map(|s| crate::output::images::parse(s).ok())
                    .collect();
                let look = crate::output::images::Look {
                    settings: &cfg.quicklook,
                    terrain: terrain_m.as_ref().map(|t| t.view()),
                };
                let t_images = Instant::now();
                rep.images = crate::output::images::write_images(&path, &products, &wanted, &look);
                rep.images_seconds = t_images.elapsed().as_secs_f64();
            }
            rep.output = Some(path);
            if let Some(hook) = out.on_published {
                rep.issues = std::mem::take(&mut issues);
                rep.seconds = t0.elapsed().as_secs_f64();
                if let Err(e) = hook(&rep) {
                    warn!(cycle = %cycle, step = lead, error = %e, "step written but not published");
                    rep.output_failed = true;
                    rep.skipped = Some(e);
                }
            }
        }
        Err(e) => {
            warn!(cycle = %cycle, step = lead, error = %e, "step not written");
            rep.output_failed = true;
            rep.skipped = Some(e.to_string());
        }
    }
    rep.issues.extend(issues);
    rep.seconds = t0.elapsed().as_secs_f64();
    rep
}

/// The columns the tropopause search reads: isobaric PV (PVU), theta, heights
/// and winds as the input gives them, on the product levels `p` (Pa).
struct TropopauseColumns<'a> {
    pv: &'a Array3<f32>,
    theta: &'a Array3<f32>,
    z: Option<&'a Array3<f32>>,
    u: &'a Array3<f32>,
    v: &'a Array3<f32>,
    lat: &'a Array2<f64>,
    p: &'a [f64],
}

/// Outputs of the tropopause search per PV surface, in the order of
/// [`tropopause_products`]: p, theta, z, u, v, crossings, p of the lowest crossing, fold depth.
const TROP_OUTPUTS: usize = 8;

/// One column's tropopause outputs on one PV surface (NaN where nothing is found).
fn tropopause_column(
    c: &TropopauseColumns<'_>,
    (j, i): (usize, usize),
    lnp: &[f64],
    search: &tropopause::Search,
) -> [f32; TROP_OUTPUTS] {
    let col =
        |a: &Array3<f32>| -> Vec<f64> { (0..lnp.len()).map(|k| f64::from(a[(k, j, i)])).collect() };
    let (pv, theta) = (col(c.pv), col(c.theta));
    let mut o = [f32::NAN; TROP_OUTPUTS];
    let Some(found) = tropopause::search(&pv, &theta, lnp, c.lat[(j, i)], search) else {
        return o;
    };
    let x = found.top;
    o[0] = x.exp() as f32;
    o[1] = tropopause::theta_at_ln_p(&theta, lnp, x) as f32;
    if let Some(z) = c.z {
        o[2] = tropopause::at_ln_p(&col(z), lnp, x) as f32;
    }
    o[3] = tropopause::at_ln_p(&col(c.u), lnp, x) as f32;
    o[4] = tropopause::at_ln_p(&col(c.v), lnp, x) as f32;
    o[5] = found.crossings as f32;
    o[6] = found.lowest.exp() as f32;
    o[7] = found.fold_depth as f32;
    o
}

/// The dynamic tropopause on each configured PV surface: the lower of the PV surface
/// and the bound isentrope, with its pressure, theta, height and wind, and the fold
/// search's crossings, lowest crossing and fold depth (see [`tropopause::search`]).
fn tropopause_products(
    c: &TropopauseColumns<'_>,
    cfg: &crate::config::Isentropic,
    (u_spec, v_spec): (variables::VarSpec, variables::VarSpec),
) -> Vec<Product> {
    let (_, ny, nx) = c.pv.dim();
    let np = cfg.tropopause_pvu.len();
    let lnp: Vec<f64> = c.p.iter().map(|p| p.ln()).collect();
    let mut out: Vec<Array3<f32>> = (0..TROP_OUTPUTS)
        .map(|_| Array3::from_elem((np, ny, nx), f32::NAN))
        .collect();
    for (s, &threshold) in cfg.tropopause_pvu.iter().enumerate() {
        let search = tropopause::Search {
            threshold,
            theta_bound: cfg.tropopause_theta_bound,
            fold_bottom: cfg.fold_bottom_hpa * 100.0,
            boundary_layer: tropopause::BOUNDARY_LAYER_PA,
        };
        // Rows in parallel; each row gives its own row of every output.
        let rows: Vec<Vec<[f32; TROP_OUTPUTS]>> = (0..ny)
            .into_par_iter()
            .map(|j| {
                (0..nx)
                    .map(|i| tropopause_column(c, (j, i), &lnp, &search))
                    .collect()
            })
            .collect();
        for (j, row) in rows.iter().enumerate() {
            for (i, o) in row.iter().enumerate() {
                for (q, a) in out.iter_mut().enumerate() {
                    a[(s, j, i)] = o[q];
                }
            }
        }
    }
    let bound = format!("{} K", cfg.tropopause_theta_bound);
    let bottom = format!("{} hPa", cfg.fold_bottom_hpa);
    let mut specs = vec![
        Some(variables::TROP_P),
        Some(variables::TROP_THETA),
        c.z.map(|_| variables::TROP_Z),
        Some(u_spec),
        Some(v_spec),
        Some(variables::TROP_CROSSINGS),
        Some(variables::TROP_P_LOW),
        Some(variables::TROP_FOLD_DP),
    ]
    .into_iter();
    out.into_iter()
        .filter_map(|data| {
            let spec = specs.next().flatten()?;
            let mut prod = Product::new(spec, Vertical::PvSurface, data);
            prod.notes.push(("leeward_theta_bound", bound.clone()));
            if matches!(spec.name, "trop_crossings" | "trop_p_low" | "trop_fold_dp") {
                prod.notes
                    .push(("leeward_fold_search_bottom", bottom.clone()));
            }
            Some(prod)
        })
        .collect()
}

/// The file name of a step's products: centre, cycle, lead, grid number
/// (when one step comes on several grids), member.
pub fn output_name(key: &StepKey, grid_suffix: Option<usize>) -> String {
    let lead = (key.valid_time - key.reference_time).num_hours();
    let mut name = step_file_name(key.centre, key.reference_time, lead, grid_suffix);
    if let Some(m) = key.member {
        name = name.replace(".nc", &format!("_m{m:02}.nc"));
    }
    name
}

/// PV is computed in PVU and written in SI units ([`variables::PV_UNITS`]):
/// the values of a product in those units are scaled here, once, before packing.
fn in_si_units(p: &mut Product) {
    if p.spec.units != variables::PV_UNITS {
        return;
    }
    if let crate::output::cf::Values::Plain(a) = &mut p.values {
        a.mapv_inplace(|x| (f64::from(x) * variables::PVU) as f32);
    }
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

/// Below-ground masks of the levels `p` (Pa, increasing) from orography `oro` (times
/// `scale` to metres) and the geopotential height `z_at` of the levels that have it: a
/// level is below the ground where its height is below the orography. A level without
/// heights takes its height linearly in ln p from the nearest levels above and below that
/// have them; below the lowest of those it is below the ground where that level is
/// (heights fall downward), and above the highest it is not masked.
fn below_ground_by_heights(
    p: &[f64],
    z_at: &[Option<&Array2<f32>>],
    oro: &Array2<f32>,
    scale: f64,
) -> Vec<Option<Array2<bool>>> {
    let lnp: Vec<f64> = p.iter().map(|v| v.ln()).collect();
    let have: Vec<usize> = (0..p.len()).filter(|&k| z_at[k].is_some()).collect();
    let under = |z: f64, o: f32| z.is_finite() && o.is_finite() && z < f64::from(o) * scale;
    (0..p.len())
        .map(|k| {
            if let Some(z) = z_at[k] {
                return Some(
                    ndarray::Zip::from(z)
                        .and(oro)
                        .map_collect(|&z, &o| under(f64::from(z), o)),
                );
            }
            let above = have.iter().rev().copied().find(|&a| a < k);
            let below = have.iter().copied().find(|&b| b > k);
            match (above, below) {
                (Some(a), Some(b)) => {
                    let w = (lnp[k] - lnp[b]) / (lnp[a] - lnp[b]);
                    let (za, zb) = (z_at[a]?, z_at[b]?);
                    Some(
                        ndarray::Zip::from(za)
                            .and(zb)
                            .and(oro)
                            .map_collect(|&za, &zb, &o| {
                                under(f64::from(zb) + w * f64::from(za - zb), o)
                            }),
                    )
                }
                (Some(a), None) => Some(
                    ndarray::Zip::from(z_at[a]?)
                        .and(oro)
                        .map_collect(|&z, &o| under(f64::from(z), o)),
                ),
                _ => None,
            }
        })
        .collect()
}

/// d f / d p of every column of `f` (levels, rows, columns), from three-point
/// differences in ln p (see `stability::column_derivative`): df/dp = (1/p) df/d ln p.
fn vertical_derivative_at(
    f: &Array3<f32>,
    k: usize,
    j: usize,
    i: usize,
    lnp: &[f64],
    p: &[f64],
) -> f64 {
    let nz = lnp.len();
    // Both neighbours valid (nearly every point): the centred difference the
    // column rule takes there.
    if k >= 1 && k + 1 < nz {
        let (fm, f0, fp) = (
            f64::from(f[(k - 1, j, i)]),
            f64::from(f[(k, j, i)]),
            f64::from(f[(k + 1, j, i)]),
        );
        if fm.is_finite() && f0.is_finite() && fp.is_finite() {
            return crate::geometry::ops::nonuniform_centred(
                fm,
                f0,
                fp,
                lnp[k] - lnp[k - 1],
                lnp[k + 1] - lnp[k],
            ) / p[k];
        }
    }
    // Otherwise the column rule on the whole column: the nearest valid levels may lie
    // beyond levels that lack this quantity.
    let mut col = [0.0f64; 128];
    let mut d = [0.0f64; 128];
    if nz > col.len() {
        let c: Vec<f64> = (0..nz).map(|kk| f64::from(f[(kk, j, i)])).collect();
        let mut dv = vec![0.0; nz];
        stability::column_derivative(&c, lnp, &mut dv);
        return dv[k] / p[k];
    }
    for (kk, c) in col.iter_mut().enumerate().take(nz) {
        *c = f64::from(f[(kk, j, i)]);
    }
    stability::column_derivative(&col[..nz], lnp, &mut d[..nz]);
    d[k] / p[k]
}

/// A stable fingerprint of a grid definition (FNV-1a, 64 bits, hex): the same
/// grid gives the same value in every run and every version.
pub fn grid_id(grid_key: &[u8]) -> String {
    crate::ingest::bytes::fnv1a_hex(grid_key)
}
