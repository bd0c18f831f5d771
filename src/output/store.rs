//! Published step files as a store: find the files of earlier steps and
//! cycles of the same model and grid, read their fields back, and add a
//! variable to a published file without ever exposing a partial one.
//!
//! In: an output directory. Out: the steps published there and their data.
//! State needed across steps and cycles is read from these files, never kept
//! only in memory, so it survives a restart. An update copies the file to a
//! hidden temporary, adds to the copy, fsyncs it and renames it over the
//! original: a reader sees the old file or the new one, never a mix.

use std::path::{Path, PathBuf};

use chrono::{NaiveDateTime, TimeDelta};
use ndarray::Array3;

use super::cf::{stored, OutputError, Product, FILL_F32};

/// One published step file.
#[derive(Debug, Clone, PartialEq)]
pub struct Published {
    /// Its path.
    pub path: PathBuf,
    /// Cycle reference time.
    pub reference_time: NaiveDateTime,
    /// Valid time.
    pub valid_time: NaiveDateTime,
}

fn text_attr(f: &netcdf::File, name: &str) -> Option<String> {
    match f.attribute(name)?.value().ok()? {
        netcdf::AttributeValue::Str(s) => Some(s),
        _ => None,
    }
}

fn int_attr(f: &netcdf::File, name: &str) -> Option<i64> {
    match f.attribute(name)?.value().ok()? {
        netcdf::AttributeValue::Int(v) => Some(i64::from(v)),
        netcdf::AttributeValue::Short(v) => Some(i64::from(v)),
        _ => None,
    }
}

/// Reference and valid time of a file written by leeward: from its `time`
/// units ("hours since REF") and value.
pub fn times(f: &netcdf::File) -> Option<(NaiveDateTime, NaiveDateTime)> {
    let v = f.variable("time")?;
    let units = match v.attribute("units")?.value().ok()? {
        netcdf::AttributeValue::Str(s) => s,
        _ => return None,
    };
    let since = units.strip_prefix("hours since ")?;
    let reference = NaiveDateTime::parse_from_str(since, "%Y-%m-%d %H:%M:%S").ok()?;
    let hours: f64 = v.get_value(0).ok()?;
    let valid = reference + TimeDelta::try_seconds((hours * 3600.0).round() as i64)?;
    Some((reference, valid))
}

/// How far from a step's cycle the cycle subdirectories of a store are
/// searched for earlier and later files: changes in time look at most a few
/// cycles back, and a store kept for months must not be opened file by file.
pub const LOOKUP_DAYS: i64 = 4;

/// Name of the subdirectory of a store that holds one cycle's files.
pub fn cycle_dir_name(reference_time: NaiveDateTime) -> String {
    reference_time.format("%Y%m%dT%H%MZ").to_string()
}

/// Every step published in `dir` for this centre, grid and member: files in
/// `dir` itself and in its cycle subdirectories within [`LOOKUP_DAYS`] of
/// `near`. Files that are not leeward's, or unreadable, are passed over.
pub fn published(
    dir: &Path,
    centre: u16,
    grid_id: &str,
    member: Option<u8>,
    near: NaiveDateTime,
) -> Vec<Published> {
    published_where(dir, centre, grid_id, member, near, |_, _| true)
}

/// What a product's file name says: the centre's short name, cycle, valid
/// time and member (see [`super::cf::step_file_name`]:
/// `<centre>_<cycle>_<lead>h[_g<n>][_m<member>].nc`), if it is a name leeward gives.
fn name_says(name: &str) -> Option<(&str, NaiveDateTime, NaiveDateTime, Option<u8>)> {
    let stem = name.strip_suffix(".nc")?;
    let mut parts: Vec<&str> = stem.split('_').collect();
    let digits = |s: &str| !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit());
    let mut member = None;
    if let Some(m) = parts.last().and_then(|p| p.strip_prefix('m')) {
        if m.len() == 2 && digits(m) {
            member = m.parse().ok();
            parts.pop();
        }
    }
    if parts
        .last()
        .and_then(|p| p.strip_prefix('g'))
        .is_some_and(digits)
    {
        parts.pop();
    }
    let lead: i64 = parts.pop()?.strip_suffix('h')?.parse().ok()?;
    let cycle = NaiveDateTime::parse_from_str(parts.pop()?, "%Y%m%dT%H%MZ").ok()?;
    let [centre] = parts[..] else { return None };
    if !centre.bytes().all(|b| b.is_ascii_alphanumeric()) {
        return None;
    }
    Some((centre, cycle, cycle + TimeDelta::try_hours(lead)?, member))
}

/// [`published`], opening only the files whose names say a cycle and valid
/// time that `want` accepts (and the member asked for): a store of many
/// cycles and members is looked through by name, not file by file. A file
/// whose name says nothing is opened and judged by its attributes.
pub fn published_where(
    dir: &Path,
    centre: u16,
    grid_id: &str,
    member: Option<u8>,
    near: NaiveDateTime,
    want: impl Fn(NaiveDateTime, NaiveDateTime) -> bool,
) -> Vec<Published> {
    let mut candidates = Vec::new();
    let window = TimeDelta::try_days(LOOKUP_DAYS).unwrap_or_default();
    let Ok(rd) = std::fs::read_dir(dir) else {
        return Vec::new();
    };
    for e in rd.flatten() {
        let path = e.path();
        let name = e.file_name().to_string_lossy().into_owned();
        // Hidden temporaries, and a cycle's cyclone tracks (not a step).
        if name.starts_with('.') || name.contains("_cyclones") {
            continue;
        }
        if name.ends_with(".nc") {
            candidates.push(path);
        } else if let Ok(t) = NaiveDateTime::parse_from_str(&name, "%Y%m%dT%H%MZ") {
            if (t - near).abs() <= window && path.is_dir() {
                if let Ok(sub) = std::fs::read_dir(&path) {
                    candidates.extend(sub.flatten().map(|e| e.path()).filter(|p| {
                        p.file_name().and_then(|n| n.to_str()).is_some_and(|n| {
                            !n.starts_with('.') && n.ends_with(".nc") && !n.contains("_cyclones")
                        })
                    }));
                }
            }
        }
    }
    let centre_name = super::cf::centre_short_name(centre);
    let mut out = Vec::new();
    for path in candidates {
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if let Some((c, r, v, m)) = name_says(&name) {
            if c != centre_name || m != member || !want(r, v) {
                continue;
            }
        }
        let Some(id) = identity(&path) else { continue };
        // Files of an earlier layout (longitudes, units, coordinates) are not
        // mixed with this one's: no change is taken between them.
        let same = id.grid_id.as_deref() == Some(grid_id)
            && id.centre == Some(i64::from(centre))
            && id.member == member.map(i64::from)
            && id.layout == Some(i64::from(super::cf::LAYOUT));
        if !same {
            continue;
        }
        if let Some((reference_time, valid_time)) = id.times.filter(|(r, v)| want(*r, *v)) {
            out.push(Published {
                path,
                reference_time,
                valid_time,
            });
        }
    }
    out.sort_by_key(|p| (p.reference_time, p.valid_time));
    out
}

/// What a published file says it is (its global attributes and times).
#[derive(Debug, Clone, PartialEq)]
struct Identity {
    grid_id: Option<String>,
    centre: Option<i64>,
    /// The `realization` coordinate, if any.
    member: Option<i64>,
    layout: Option<i64>,
    times: Option<(NaiveDateTime, NaiveDateTime)>,
}

/// Cycles whose files' identities are remembered: a step looks up the steps
/// of its own cycle and of a few before it (changes within a cycle and from
/// run to run).
const CYCLES_REMEMBERED: usize = 64;

/// A file's identity, read once per (path, size, mtime) in this process: a
/// service looking up earlier steps for every new one would otherwise open
/// the same files again and again (each open costs libhdf5 memory it keeps).
/// Remembered for the files of the cycles used last
/// ([`crate::recent::ByCycle`]), so that the memory of a process running for
/// months stays bounded. `None` when the file cannot be opened.
fn identity(path: &Path) -> Option<Identity> {
    type Known = (u64, Option<std::time::SystemTime>, Identity);
    type Cache = crate::recent::ByCycle<Option<NaiveDateTime>, Known>;
    static CACHE: std::sync::OnceLock<std::sync::Mutex<Cache>> = std::sync::OnceLock::new();
    let meta = std::fs::metadata(path).ok()?;
    let (size, mtime) = (meta.len(), meta.modified().ok());
    let cache = CACHE.get_or_init(|| std::sync::Mutex::new(Cache::new(CYCLES_REMEMBERED)));
    if let Some((s, m, id)) = cache
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .get(path)
    {
        if *s == size && *m == mtime {
            return Some(id.clone());
        }
    }
    super::quiet_hdf5_errors();
    let f = netcdf::open(path).ok()?;
    let id = Identity {
        grid_id: text_attr(&f, "leeward_grid_id"),
        centre: int_attr(&f, "leeward_centre"),
        member: f
            .variable("realization")
            .and_then(|v| v.get_value::<i32, _>(..).ok())
            .map(i64::from),
        layout: int_attr(&f, "leeward_layout"),
        times: times(&f),
    };
    drop(f);
    cache
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .insert(path, id.times.map(|t| t.0), (size, mtime, id.clone()));
    Some(id)
}

/// The isobaric layers of a file's per-layer variables (`<name>_<bottom>_<top>`,
/// such as the thickness): (coordinate name, middle, [bottom, top]), from the
/// ground up (the order of the configured layers, see
/// [`crate::config::Config::from_toml`]). The layer of a single field only
/// (`low_pv` on `p_layer_900_700`) is not one of them.
fn pressure_layers(f: &netcdf::File) -> Vec<(String, f64, [f64; 2])> {
    let per_layer = |coord: &str| {
        let suffix = coord.strip_prefix("p_layer").unwrap_or_default();
        f.variables().any(|v| {
            let dims = v.dimensions();
            v.name().ends_with(suffix) && dims.len() == 4 && dims[1].name() == coord
        })
    };
    let mut out: Vec<(String, f64, [f64; 2])> = f
        .variables()
        .filter_map(|v| {
            let name = v.name();
            let dims = v.dimensions();
            if !name.starts_with("p_layer_") || dims.len() != 1 || dims[0].name() != name {
                return None;
            }
            if !per_layer(&name) {
                return None;
            }
            let mid: f64 = v.get_value(0).ok()?;
            let b: Vec<f64> = f.variable(&format!("{name}_bounds"))?.get_values(..).ok()?;
            (b.len() == 2).then(|| (name, mid, [b[0], b[1]]))
        })
        .collect();
    out.sort_by(|a, b| b.1.total_cmp(&a.1));
    out
}

/// A value as read from a file: the fill value and anything not finite as NaN.
pub(crate) fn fill_to_nan(x: f32) -> f32 {
    if x == FILL_F32 || !x.is_finite() {
        f32::NAN
    } else {
        x
    }
}

/// Every level of the first time of a (time, vertical, y, x) or (time, y, x)
/// float variable (one level), as (levels, rows, columns), fill as NaN.
pub(crate) fn read_values(v: &netcdf::Variable<'_>) -> Option<Array3<f32>> {
    let mut dims: Vec<usize> = v.dimensions().iter().map(|d| d.len()).collect();
    // A field with no vertical dimension reads as one level.
    if dims.len() == 3 {
        dims.insert(1, 1);
    }
    if dims.len() != 4 {
        return None;
    }
    let data: Vec<f32> = v.get_values(..).ok()?;
    let a = Array3::from_shape_vec((dims[1], dims[2], dims[3]), data).ok()?;
    Some(a.mapv(fill_to_nan))
}

/// (levels, rows, columns) of a (time, vertical, y, x) or (time, y, x) float
/// variable (one level); None for any other shape.
pub fn level_shape(v: &netcdf::Variable<'_>) -> Option<(usize, usize, usize)> {
    let dims: Vec<usize> = v.dimensions().iter().map(|d| d.len()).collect();
    match dims[..] {
        [_, ny, nx] => Some((1, ny, nx)),
        [_, nz, ny, nx] => Some((nz, ny, nx)),
        _ => None,
    }
}

/// Level `k` of the first time of a variable [`level_shape`] describes, fill as
/// NaN; None where there is no such level or it cannot be read.
pub fn read_level(v: &netcdf::Variable<'_>, k: usize) -> Option<ndarray::Array2<f32>> {
    let (nz, ny, nx) = level_shape(v)?;
    if k >= nz {
        return None;
    }
    let data: Vec<f32> = if v.dimensions().len() == 3 {
        v.get_values((0, .., ..)).ok()?
    } else {
        v.get_values((0, k, .., ..)).ok()?
    };
    let a = ndarray::Array2::from_shape_vec((ny, nx), data).ok()?;
    Some(a.mapv(fill_to_nan))
}

/// Read a (time, vertical, y, x) float variable back as (vertical, y, x), fill as NaN,
/// with the values of its vertical coordinate. A variable on isobaric layers,
/// written as one variable per layer, comes back with every layer the file
/// has it on, in the file's order of layers, with their middles.
pub fn read_field(path: &Path, name: &str) -> Option<(Vec<f64>, Array3<f32>)> {
    super::quiet_hdf5_errors();
    let f = netcdf::open(path).ok()?;
    if let Some(v) = f.variable(name) {
        let a = read_values(&v)?;
        // A field with no vertical dimension has no vertical coordinate.
        let coord: Vec<f64> = Some(v.dimensions())
            .filter(|d| d.len() == 4)
            .and_then(|d| f.variable(&d[1].name()))
            .and_then(|c| c.get_values(..).ok())
            .unwrap_or_default();
        return Some((coord, a));
    }
    let mut mids = Vec::new();
    let mut levels = Vec::new();
    for (coord, mid, _) in pressure_layers(&f) {
        let suffix = coord.strip_prefix("p_layer_").unwrap_or_default();
        if let Some(a) = f
            .variable(&format!("{name}_{suffix}"))
            .and_then(|v| read_values(&v))
        {
            mids.push(mid);
            levels.push(a);
        }
    }
    let views: Vec<_> = levels.iter().map(|a| a.view()).collect();
    let a = ndarray::concatenate(ndarray::Axis(0), &views).ok()?;
    Some((mids, a))
}

/// Add (or replace) float variables on an existing vertical dimension of a
/// published file, atomically: copy, add to the copy, fsync, rename over.
pub fn add_variables(
    path: &Path,
    vars: &[Product],
    deflate: i32,
    kept: &super::precision::KeptBits,
) -> Result<(), OutputError> {
    add_variables_to(path, path, vars, deflate, kept)
}

/// [`add_variables`] with the result at `path` and the file it starts from at
/// `from` (a batch job stages its additions to published files beside its own
/// product instead of touching them): copy `from`, add, fsync, rename to `path`.
pub fn add_variables_to(
    from: &Path,
    path: &Path,
    vars: &[Product],
    deflate: i32,
    kept: &super::precision::KeptBits,
) -> Result<(), OutputError> {
    let io = |p: &Path| {
        let p = p.to_path_buf();
        move |source| OutputError::Io { path: p, source }
    };
    let dir = path.parent().unwrap_or(Path::new("."));
    let existing = std::fs::metadata(from).map(|m| m.len()).unwrap_or(0);
    let added: u64 = vars
        .iter()
        .map(|v| {
            let (a, b, c) = v.dim();
            (a * b * c) as u64 * 4
        })
        .sum();
    super::ensure_space(dir, existing + added + (1 << 20)).map_err(io(path))?;
    super::publish_atomically(
        path,
        "update",
        |tmp| {
            std::fs::copy(from, tmp).map_err(io(tmp))?;
            add_to_copy(tmp, path, vars, deflate, kept)
        },
        |p, source| OutputError::Io {
            path: p.to_path_buf(),
            source,
        },
    )
}

/// Add `vars` to the copy at `tmp` of the file to be published at `path`
/// (named in warnings), and store their packed levels.
fn add_to_copy(
    tmp: &Path,
    path: &Path,
    vars: &[Product],
    deflate: i32,
    kept: &super::precision::KeptBits,
) -> Result<(), OutputError> {
    let e = |source| OutputError::NetCdf {
        path: tmp.to_path_buf(),
        source,
    };
    super::quiet_hdf5_errors();
    let mut f = netcdf::append(tmp).map_err(e)?;
    // The coordinates every data variable of the file names (the file's
    // own, from any data variable), so that an added one names the same.
    let coords = f
        .variables()
        .filter(|v| v.dimensions().len() == 4)
        .find_map(|v| match v.attribute("coordinates")?.value().ok()? {
            netcdf::AttributeValue::Str(s) => Some(s),
            _ => None,
        })
        .unwrap_or_else(|| "reference_time lead_time".to_string());
    let (ydim, xdim) = if f.dimension("lat").is_some()
        && f.variable("lon").is_some_and(|v| v.dimensions().len() == 1)
    {
        ("lat", "lon")
    } else if f.dimension("rlat").is_some() {
        ("rlat", "rlon")
    } else {
        ("y", "x")
    };
    if vars.iter().any(|v| kept.bits(v.spec.name) < 23) {
        super::cf::quantization_container(&mut f).map_err(e)?;
    }
    // New variables are declared here with leeward's chunks and filters, so
    // their levels are packed on every core and stored directly after the
    // file is closed; a variable already in the file keeps its own
    // declaration and is rewritten through libnetcdf, its attributes
    // replaced by this version's.
    let mut direct: Vec<(String, super::pack::Packed)> = Vec::new();
    let layers = pressure_layers(&f);
    for prod in vars {
        let targets: Vec<super::cf::Target> = if prod.vertical == super::cf::Vertical::PressureLayer
        {
            // Level k of a layer product is the file's k-th layer (changes are
            // taken only between files whose layers agree).
            if layers.len() != prod.dim().0 {
                tracing::warn!(file = %path.display(), variable = prod.spec.name, "layers differ from the file's: not added");
                continue;
            }
            layers
                .iter()
                .enumerate()
                .map(|(k, (coord, _, bounds))| super::cf::Target {
                    name: format!("{}_{}", prod.spec.name, super::cf::layer_suffix(*bounds)),
                    vertical: coord.clone(),
                    level: Some(k),
                    layer: Some(*bounds),
                })
                .collect()
        } else {
            let vertical = prod.vertical_name();
            if !vertical.is_empty() && f.dimension(&vertical).is_none() {
                tracing::warn!(file = %path.display(), variable = prod.spec.name, dimension = %vertical, "the file has no such vertical coordinate: not added");
                continue;
            }
            vec![super::cf::Target {
                name: prod.spec.name.to_string(),
                vertical,
                level: None,
                layer: None,
            }]
        };
        for t in targets {
            add_one(
                &mut f,
                prod,
                &t,
                (ydim, xdim),
                &coords,
                (deflate, kept.bits(prod.spec.name)),
                &mut direct,
            )
            .map_err(e)?;
        }
    }
    f.close().map_err(e)?;
    if !direct.is_empty() {
        let refs: Vec<(&str, &super::pack::Packed)> =
            direct.iter().map(|(n, p)| (n.as_str(), p)).collect();
        super::pack::write_chunks(tmp, &refs).map_err(|m| OutputError::NetCdf {
            path: tmp.to_path_buf(),
            source: netcdf::Error::from(m.as_str()),
        })?;
    }
    Ok(())
}

/// Add or replace one variable of an update (a whole product, or one level
/// of it): new variables are declared with leeward's chunks and filters and
/// their packed levels queued in `direct`, to be stored after the file is
/// closed; a variable already in the file keeps its own declaration and is
/// rewritten through libnetcdf, its attributes replaced by this version's.
fn add_one(
    f: &mut netcdf::FileMut,
    prod: &Product,
    t: &super::cf::Target,
    (ydim, xdim): (&str, &str),
    coords: &str,
    (deflate, nsb): (i32, u32),
    direct: &mut Vec<(String, super::pack::Packed)>,
) -> netcdf::Result<()> {
    let levels: Vec<usize> = match t.level {
        Some(k) => vec![k],
        None => (0..prod.dim().0).collect(),
    };
    let is_new = f.variable(&t.name).is_none();
    if is_new {
        let mut v = f.add_variable::<f32>(&t.name, &super::cf::target_dims(t, ydim, xdim))?;
        let (_, ny, nx) = prod.dim();
        super::cf::declare_storage(&mut v, deflate, (ny, nx))?;
    }
    let mut v = f
        .variable_mut(&t.name)
        .ok_or_else(|| netcdf::Error::from("variable vanished"))?;
    super::cf::describe_variable(&mut v, prod, coords, nsb, t.layer)?;
    // One level, no vertical dimension: its level 0 is the whole field.
    let surface = t.vertical.is_empty();
    let levels = if surface { vec![0] } else { levels };
    if is_new && deflate > 0 {
        let packed = match &prod.values {
            super::cf::Values::Plain(a) => super::pack::Packed::new(a, nsb, deflate as u32),
            super::cf::Values::Packed(p) => p.clone(),
        };
        direct.push((t.name.clone(), packed.levels(&levels)));
        return Ok(());
    }
    if surface {
        // Rewritten in place: through libnetcdf, which packs it.
        let buf: Vec<f32> = prod.level(0).iter().map(|&x| stored(x, nsb)).collect();
        return v.put_values(&buf, (0, .., ..));
    }
    for (n, &k) in levels.iter().enumerate() {
        let buf: Vec<f32> = prod.level(k).iter().map(|&x| stored(x, nsb)).collect();
        v.put_values(&buf, (0, n, .., ..))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_say_cycle_valid_time_and_member() {
        let t = |s: &str| NaiveDateTime::parse_from_str(s, "%Y%m%dT%H%M").unwrap();
        assert_eq!(
            name_says("c255_20260314T0000Z_024h.nc"),
            Some(("c255", t("20260314T0000"), t("20260315T0000"), None))
        );
        assert_eq!(
            name_says("ecmwf_20260314T1200Z_240h_g2_m07.nc"),
            Some(("ecmwf", t("20260314T1200"), t("20260324T1200"), Some(7)))
        );
        assert_eq!(name_says("analysis.nc"), None);
        assert_eq!(name_says("my_c255_20260314T0000Z_024h.nc"), None);
    }
}
