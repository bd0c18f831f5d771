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

use chrono::{NaiveDateTime, TimeDelta};
use ndarray::{Array2, Array3};

use super::detect::{find_centres, Centre, Settings as DetectSettings, Surface};
use super::facts::{facts, nearest_surface, upper_pv, Facts, Fields, Grid};
use crate::output::cf::layer_suffix;
use crate::output::store::{read_level, read_values};
use crate::output::variables::PVU;
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

/// Every level of a float variable (time 0), fill as NaN.
fn whole(f: &netcdf::File, name: &str) -> Option<Array3<f32>> {
    read_values(&f.variable(name)?)
}

/// Level `k` (0 where None) of a float variable (time 0), fill as NaN.
fn plane(f: &netcdf::File, name: &str, level: Option<usize>) -> Option<Array2<f32>> {
    read_level(&f.variable(name)?, level.unwrap_or(0))
}

fn values(f: &netcdf::File, name: &str) -> Vec<f64> {
    f.variable(name)
        .and_then(|v| v.get_values::<f64, _>(..).ok())
        .unwrap_or_default()
}

fn text(v: &netcdf::Variable<'_>, name: &str) -> Option<String> {
    match v.attribute(name)?.value().ok()? {
        netcdf::AttributeValue::Str(s) => Some(s),
        _ => None,
    }
}

fn number(v: &netcdf::Variable<'_>, name: &str) -> Option<f64> {
    match v.attribute(name)?.value().ok()? {
        netcdf::AttributeValue::Double(x) => Some(x),
        netcdf::AttributeValue::Float(x) => Some(f64::from(x)),
        netcdf::AttributeValue::Str(s) => s.trim().parse().ok(),
        _ => None,
    }
}

/// Latitude and longitude of every point, whether the columns wrap, the earth's radius.
fn geography(f: &netcdf::File) -> Option<(Array2<f64>, Array2<f64>, bool, f64)> {
    let (la, lo) = (values(f, "lat"), values(f, "lon"));
    let var = f.variable("lat")?;
    let (lat, lon, periodic) = if var.dimensions().len() == 1 {
        let (ny, nx) = (la.len(), lo.len());
        let d = if nx > 1 {
            (lo[1] - lo[0] + 540.0).rem_euclid(360.0) - 180.0
        } else {
            0.0
        };
        let periodic = nx >= 3 && (d * nx as f64 - 360.0).abs() < 0.5 * d.abs();
        (
            Array2::from_shape_fn((ny, nx), |(j, _)| la[j]),
            Array2::from_shape_fn((ny, nx), |(_, i)| lo[i]),
            periodic,
        )
    } else {
        let dims: Vec<usize> = var.dimensions().iter().map(|d| d.len()).collect();
        let shape = (*dims.first()?, *dims.get(1)?);
        (
            Array2::from_shape_vec(shape, la).ok()?,
            Array2::from_shape_vec(shape, lo).ok()?,
            false,
        )
    };
    let crs = f.variable("crs")?;
    let radius = match (
        number(&crs, "earth_radius"),
        number(&crs, "semi_major_axis"),
        number(&crs, "semi_minor_axis"),
    ) {
        (Some(r), _, _) => r,
        // The IUGG mean radius (2a + b)/3, as leeward's own derivatives use.
        (None, Some(a), Some(b)) => (2.0 * a + b) / 3.0,
        _ => return None,
    };
    Some((lat, lon, periodic, radius))
}

/// Index of `want` among a coordinate's values.
fn index_of(coord: &[f64], want: f64) -> Option<usize> {
    coord
        .iter()
        .position(|x| (x - want).abs() <= 1e-6 * want.abs().max(1.0))
}

/// What turns a PV variable's (or coordinate's) values into PVU: files give
/// PV in SI units, K m2 kg-1 s-1 (1 PVU = 1e-6 of them); a scaled unit
/// ("1e-6 K m2 kg-1 s-1") is PVU already.
fn to_pvu(f: &netcdf::File, name: &str) -> f64 {
    match f.variable(name).and_then(|v| text(&v, "units")) {
        Some(u) if u.trim() == crate::output::variables::PV_UNITS => 1.0 / PVU,
        _ => 1.0,
    }
}

/// One level of a PV variable, in PVU.
fn plane_pvu(f: &netcdf::File, name: &str, level: Option<usize>) -> Option<Array2<f32>> {
    let k = to_pvu(f, name);
    plane(f, name, level).map(|a| a.mapv(|x| (f64::from(x) * k) as f32))
}

/// The fields of the facts in a step file.
fn fields(f: &netcdf::File) -> Fields {
    // The 1000-500 hPa thickness: one variable of its own layer.
    let thick = format!("thick_{}", layer_suffix([1.0e5, 5.0e4]));
    let pv_levels: Vec<f64> = values(f, "pv_level")
        .iter()
        .map(|x| x * to_pvu(f, "pv_level"))
        .collect();
    let pv_level = index_of(&pv_levels, 2.0).or(Some(0));
    Fields {
        steer: plane(f, "steer_u", None).zip(plane(f, "steer_v", None)),
        eady: plane(f, "eady", None),
        thick: plane(f, &thick, Some(0)),
        orog: plane(f, "orog", None),
        stretch: whole(f, "bud_stretch"),
        zeta_stretch: whole(f, "bud_zeta_stretch"),
        zeta_diff: whole(f, "bud_zeta_diff"),
        low_pv: plane_pvu(f, "low_pv", None),
        theta_e_850: index_of(&values(f, "pressure"), 85_000.0)
            .and_then(|k| plane(f, "theta_e", Some(k))),
        trop_theta: pv_level.and_then(|k| plane(f, "trop_theta", Some(k))),
    }
}

/// Reference and valid time of a step file ("hours since" units of `time`).
fn times(f: &netcdf::File) -> Option<(NaiveDateTime, NaiveDateTime)> {
    let v = f.variable("time")?;
    let since = text(&v, "units")?.strip_prefix("hours since ")?.to_string();
    let reference = NaiveDateTime::parse_from_str(&since, "%Y-%m-%d %H:%M:%S").ok()?;
    let hours: f64 = v.get_value(0).ok()?;
    Some((
        reference,
        reference + TimeDelta::try_seconds((hours * 3600.0).round() as i64)?,
    ))
}

/// A step file's mean sea-level pressure with the latitude and longitude of every
/// point, and its terrain where it has one.
pub type MslpMap = (Array2<f32>, Array2<f64>, Array2<f64>, Option<Array2<f32>>);

/// Read [`MslpMap`] from a step file.
pub fn mslp_map(path: &Path) -> Option<MslpMap> {
    crate::output::quiet_hdf5_errors();
    let f = netcdf::open(path).ok()?;
    let m = plane(&f, "mslp", None)?;
    let (lat, lon, _, _) = geography(&f)?;
    let orog = plane(&f, "orog", None).filter(|o| o.dim() == m.dim());
    (lat.dim() == m.dim()).then_some((m, lat, lon, orog))
}

/// Read one step file and find its centres and their facts.
pub fn step_centres(path: &Path, set: &Settings) -> Result<StepCentres, String> {
    crate::output::quiet_hdf5_errors();
    let f = netcdf::open(path).map_err(|e| format!("cannot open: {e}"))?;
    let (reference_time, valid_time) = times(&f).ok_or("no valid time")?;
    let mslp = plane(&f, "mslp", None).ok_or("no mslp")?;
    let source = f
        .variable("mslp")
        .and_then(|v| text(&v, "leeward_method"))
        .unwrap_or_default();
    let (lat, lon, periodic, radius) =
        geography(&f).ok_or("no latitude, longitude or earth radius")?;
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
    let fl = fields(&f);
    let thetas = values(&f, "theta_level");
    let mut upper: HashMap<usize, Option<Array2<f32>>> = HashMap::new();
    let mut centres = Vec::with_capacity(found.len());
    for c in found {
        let at = (c.j, c.i);
        let (mut fx, points) = facts(&grid, &fl, at, set.radius);
        if let Some(k) = nearest_surface(&thetas, fx.trop_theta) {
            let pv = upper
                .entry(k)
                .or_insert_with(|| plane_pvu(&f, "isen_pv", Some(k)));
            if let Some(pv) = pv {
                upper_pv(&grid, pv.view(), thetas[k], at, &points, &mut fx);
            }
        }
        centres.push((c, fx));
    }
    let budget_interval_h = f
        .variable("bud_stretch")
        .and_then(|v| number(&v, "leeward_budget_interval_h"))
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

/// [`step_centres`], remembered for each file until its size or modification
/// time changes (a later step adds its budget to it) or the settings do, for
/// the files of the cycles used last ([`crate::recent::ByCycle`]).
pub fn step_centres_cached(path: &Path, set: &Settings) -> Result<StepCentres, String> {
    static CACHE: OnceLock<Mutex<ByCycle<NaiveDateTime, Known>>> = OnceLock::new();
    let meta = std::fs::metadata(path).map_err(|e| format!("cannot read: {e}"))?;
    let (size, mtime) = (meta.len(), meta.modified().ok());
    let cache = CACHE.get_or_init(|| Mutex::new(ByCycle::new(CYCLES_REMEMBERED)));
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
    cache
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .insert(path, c.reference_time, (size, mtime, *set, c.clone()));
    Ok(c)
}
