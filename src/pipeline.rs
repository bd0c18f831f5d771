//! One cycle step end to end: catalogue, group, decode, compute, write.
//!
//! In: GRIB2 files (paths), a [`Config`](crate::config::Config) and an output directory. Out: one
//! NetCDF file per (cycle, step, grid) and a [`StepReport`] for each, plus the
//! [`Issue`]s met on the way (file, field, reason). Shared by `leeward process`
//! and the service. A bad file or field is reported and skipped; the rest of
//! the run goes on. Nothing is published unless it is complete.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use chrono::NaiveDateTime;

use crate::ingest::catalogue::{catalogue, catalogue_file, Catalogue, FieldEntry};
use crate::ingest::params::{surface, Quantity};
use crate::ingest::source::{open_input, read_ranges};
use crate::outcome::StepOutcome;
use crate::output::cf::step_file_name;

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

pub(crate) fn describe(f: &FieldEntry) -> String {
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
    /// How the step ended: made (the file written), or why not.
    pub outcome: StepOutcome<PathBuf>,
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
    /// Quicklook images written beside the product.
    pub images: Vec<PathBuf>,
    /// The cycle's cyclone tracks, written again with this step.
    pub tracks: Vec<PathBuf>,
}

/// True for the fields a step's products may use, as `products::inputs::inventory` sorts
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

/// A stable fingerprint of a grid definition (FNV-1a, 64 bits, hex): the same
/// grid gives the same value in every run and every version.
pub fn grid_id(grid_key: &[u8]) -> String {
    crate::ingest::bytes::fnv1a_hex(grid_key)
}
