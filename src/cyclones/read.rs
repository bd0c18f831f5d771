//! A published step file read for its cyclones: the centres on its mean
//! sea-level pressure and the facts round each, remembered per file (path,
//! size, modification time; for the cycles used last), so that a cycle's tracks can be made again from
//! every step published whenever one more arrives, reading only the files that
//! changed.
//!
//! In: a step file leeward wrote. Out: [`StepCentres`], or why the file gives
//! none. Reading only: nothing published is touched.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, OnceLock};
use std::time::SystemTime;

use chrono::NaiveDateTime;
use ndarray::Array2;

use super::detect::{find_centres, Centre, Settings as DetectSettings, Surface};
use super::facts::{facts, nearest_surface, upper_pv, Facts, Fields, Grid};
use super::source::Source;
use crate::output::cf::{layer_suffix, StepProducts};
use crate::recent::ByCycle;

/// How centres are found and summarised.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Settings {
    /// Finding the centres.
    pub detect: DetectSettings,
    /// Radius of the facts, m.
    pub radius: f64,
}

/// A step's centres and what is round them.
#[derive(Debug, Clone, PartialEq)]
pub struct StepCentres {
    /// The file.
    pub path: PathBuf,
    /// Cycle and valid time.
    pub reference_time: NaiveDateTime,
    pub valid_time: NaiveDateTime,
    /// Where its mean sea-level pressure came from (the variable's `leeward_method`).
    pub source: String,
    /// Interval of the PV budget in the file, hours (NaN: no budget yet).
    pub budget_interval_h: f64,
    /// Earth's radius of the grid, m.
    pub radius: f64,
    /// The centres, in grid order, each with its facts.
    pub centres: Vec<(Centre, Facts)>,
}

/// Index of `want` among a coordinate's values.
fn index_of(coord: &[f64], want: f64) -> Option<usize> {
    coord
        .iter()
        .position(|x| (x - want).abs() <= 1e-6 * want.abs().max(1.0))
}

/// One level of a PV variable, in PVU.
fn plane_pvu(s: &Source<'_>, name: &str, level: Option<usize>) -> Option<Array2<f32>> {
    let k = s.to_pvu(name);
    s.plane(name, level)
        .map(|a| a.mapv(|x| (f64::from(x) * k) as f32))
}

/// The fields of the facts in a step.
fn fields(s: &Source<'_>) -> Fields {
    // The 1000-500 hPa thickness: one variable of its own layer.
    let thick = format!("thick_{}", layer_suffix([1.0e5, 5.0e4]));
    let pv_level = index_of(&s.coordinate("pv_level"), 2.0).or(Some(0));
    Fields {
        steer: s.plane("steer_u", None).zip(s.plane("steer_v", None)),
        eady: s.plane("eady", None),
        thick: s.plane(&thick, Some(0)),
        orog: s.plane("orog", None),
        stretch: s.whole("bud_stretch"),
        zeta_stretch: s.whole("bud_zeta_stretch"),
        zeta_diff: s.whole("bud_zeta_diff"),
        low_pv: plane_pvu(s, "low_pv", None),
        theta_e_850: index_of(&s.coordinate("pressure"), 85_000.0)
            .and_then(|k| s.plane("theta_e", Some(k))),
        trop_theta: pv_level.and_then(|k| s.plane("trop_theta", Some(k))),
    }
}

/// A step file's mean sea-level pressure with the latitude and longitude of every
/// point, and its terrain where it has one.
pub type MslpMap = (Array2<f32>, Array2<f64>, Array2<f64>, Option<Array2<f32>>);

/// Read [`MslpMap`] from a step file.
pub fn mslp_map(path: &Path) -> Option<MslpMap> {
    crate::output::quiet_hdf5_errors();
    let f = netcdf::open(path).ok()?;
    let s = Source::File(&f);
    let m = s.plane("mslp", None)?;
    let (lat, lon, _, _) = s.geography()?;
    let orog = s.plane("orog", None).filter(|o| o.dim() == m.dim());
    (lat.dim() == m.dim()).then_some((m, lat, lon, orog))
}

/// Read one step file and find its centres and their facts.
pub fn step_centres(path: &Path, set: &Settings) -> Result<StepCentres, String> {
    crate::output::quiet_hdf5_errors();
    let f = netcdf::open(path).map_err(|e| format!("cannot open: {e}"))?;
    centres_of(&Source::File(&f), path, set)
}

/// The centres and their facts of the step whose products `p` are being written
/// to `path`: what [`step_centres`] will read from the file, found without it.
pub fn made_centres(p: &StepProducts, path: &Path, set: &Settings) -> Result<StepCentres, String> {
    centres_of(&Source::Made(p), path, set)
}

/// Find a step's centres and their facts.
fn centres_of(s: &Source<'_>, path: &Path, set: &Settings) -> Result<StepCentres, String> {
    let (reference_time, valid_time) = s.times().ok_or("no valid time")?;
    let mslp = s.plane("mslp", None).ok_or("no mslp")?;
    let source = s.text("mslp", "leeward_method").unwrap_or_default();
    let (lat, lon, periodic, radius) = s
        .geography()
        .ok_or("no latitude, longitude or earth radius")?;
    if lat.dim() != mslp.dim() {
        return Err("mslp and the coordinates differ in shape".into());
    }
    let surface = Surface {
        values: mslp.view(),
        lat: lat.view(),
        lon: lon.view(),
        periodic,
        radius,
    };
    let found = find_centres(&surface, &set.detect);
    let grid = Grid {
        lat: lat.view(),
        lon: lon.view(),
        periodic,
        radius,
    };
    let fl = fields(s);
    let thetas = s.coordinate("theta_level");
    let mut upper: HashMap<usize, Option<Array2<f32>>> = HashMap::new();
    let mut centres = Vec::with_capacity(found.len());
    for c in found {
        let at = (c.j, c.i);
        let (mut fx, points) = facts(&grid, &fl, at, set.radius);
        if let Some(k) = nearest_surface(&thetas, fx.trop_theta) {
            let pv = upper
                .entry(k)
                .or_insert_with(|| plane_pvu(s, "isen_pv", Some(k)));
            if let Some(pv) = pv {
                upper_pv(&grid, pv.view(), thetas[k], at, &points, &mut fx);
            }
        }
        centres.push((c, fx));
    }
    let budget_interval_h = s
        .number("bud_stretch", "leeward_budget_interval_h")
        .unwrap_or(f64::NAN);
    Ok(StepCentres {
        path: path.to_path_buf(),
        reference_time,
        valid_time,
        source,
        budget_interval_h,
        radius,
        centres,
    })
}

/// What is remembered of a file: (size, modification time, settings, centres).
type Known = (u64, Option<SystemTime>, Settings, StepCentres);

/// Cycles whose files' centres are remembered: a step's tracks need only the
/// steps of its own cycle; a few more cover feeds and members running at once.
const CYCLES_REMEMBERED: usize = 8;

/// The centres remembered per file, for the cycles used last ([`crate::recent::ByCycle`]).
fn cache() -> &'static Mutex<ByCycle<NaiveDateTime, Known>> {
    static CACHE: OnceLock<Mutex<ByCycle<NaiveDateTime, Known>>> = OnceLock::new();
    CACHE.get_or_init(|| Mutex::new(ByCycle::new(CYCLES_REMEMBERED)))
}

/// A file's size and modification time.
fn stamp(path: &Path) -> Result<(u64, Option<SystemTime>), String> {
    let meta = std::fs::metadata(path).map_err(|e| format!("cannot read: {e}"))?;
    Ok((meta.len(), meta.modified().ok()))
}

/// [`step_centres`], remembered for each file until its size or modification
/// time changes (a later step adds its budget to it) or the settings do, for
/// the files of the cycles used last.
pub fn step_centres_cached(path: &Path, set: &Settings) -> Result<StepCentres, String> {
    let (size, mtime) = stamp(path)?;
    let cache = cache();
    if let Some((s, m, k, c)) = cache
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .get(path)
    {
        if *s == size && *m == mtime && k == set {
            return Ok(c.clone());
        }
    }
    let c = step_centres(path, set)?;
    remember(path, (size, mtime), set, &c);
    Ok(c)
}

/// Remember the centres `c` of the file at `path` as it is now (its centres found
/// from its products while it was written, [`made_centres`]), so that
/// [`step_centres_cached`] takes them rather than reading the file.
pub fn remember_written(path: &Path, set: &Settings, c: &StepCentres) {
    check_made(path, set, c);
    if let Ok(st) = stamp(path) {
        remember(path, st, set, c);
    }
}

/// Test builds read the file at `path` as well and stop where its centres differ
/// from `c`, found from its products: every run of the test suite checks that the
/// products give what the file gives.
pub fn check_made(path: &Path, set: &Settings, c: &StepCentres) {
    if cfg!(debug_assertions) {
        if let Ok(read) = step_centres(path, set) {
            // Debug text, so that missing facts (NaN) compare equal.
            let (made, read) = (format!("{c:?}"), format!("{read:?}"));
            assert!(
                made == read,
                "{}: centres from the products differ from the file's:\n{made}\n{read}",
                path.display()
            );
        }
    }
}

fn remember(
    path: &Path,
    (size, mtime): (u64, Option<SystemTime>),
    set: &Settings,
    c: &StepCentres,
) {
    cache()
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .insert(path, c.reference_time, (size, mtime, *set, c.clone()));
}
