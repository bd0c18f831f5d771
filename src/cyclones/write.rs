//! A cycle's tracks as files: a CF discrete sampling geometry NetCDF file of
//! trajectories (CF 1.11 chapter 9, featureType "trajectory", contiguous
//! ragged array: the points of each track together, `row_size` of them per
//! track), and a GeoJSON FeatureCollection (IETF RFC 7946: longitude before
//! latitude, longitudes in -180 to 180, a track that crosses the antimeridian
//! cut there into a MultiLineString, section 3.1.9).
//!
//! In: a [`Cycle`]. Out: the files, each written whole under a hidden name,
//! fsynced and renamed into place. The words state what the diagnostics hold;
//! they give no verdict.

use std::path::Path;

use serde_json::{json, Map, Value};

use super::detect::Centre;
use super::facts::Facts;
use super::read::StepCentres;
use super::track::{Deepening, BERGERON};
use super::tracked::Cycle;
use crate::output::cf::{CAUTION, FILL_F32};
use crate::output::variables::{PVU, PV_UNITS};

/// One point of one track.
pub struct Point<'a> {
    /// Track number, from 1.
    pub track: usize,
    pub step: &'a StepCentres,
    pub centre: &'a Centre,
    pub facts: &'a Facts,
    pub deepening: &'a Deepening,
}

impl Cycle {
    /// The points of track `t` (from 0), in time order.
    pub fn points(&self, t: usize) -> Vec<Point<'_>> {
        self.tracks[t]
            .iter()
            .zip(&self.deepening[t])
            .map(|(&(s, c), d)| {
                let (centre, facts) = &self.steps[s].centres[c];
                Point {
                    track: t + 1,
                    step: &self.steps[s],
                    centre,
                    facts,
                    deepening: d,
                }
            })
            .collect()
    }

    /// Hours of a point after the reference time.
    pub fn hours(&self, p: &Point<'_>) -> f64 {
        (p.step.valid_time - self.reference_time).num_seconds() as f64 / 3600.0
    }
}

/// A per-point variable of the tracks file.
struct Var {
    name: &'static str,
    standard_name: Option<&'static str>,
    long_name: &'static str,
    units: &'static str,
    value: fn(&Point<'_>) -> f64,
}

/// The per-point variables, in the order written.
const VARS: [Var; 23] = [
    Var { name: "central_pressure", standard_name: Some("air_pressure_at_mean_sea_level"), long_name: "central pressure of the cyclone (minimum of a quadratic fitted to the 3 x 3 grid points round the grid-point minimum)", units: "Pa", value: |p| p.centre.pressure },
    Var { name: "outer_isobar", standard_name: None, long_name: "outermost isobar closed round the centre", units: "Pa", value: |p| p.centre.outer },
    Var { name: "depth", standard_name: None, long_name: "outermost closed isobar minus the grid-point central pressure", units: "Pa", value: |p| p.centre.depth },
    Var { name: "deepening_rate", standard_name: None, long_name: "fall of the central pressure per 24 h over deepening_interval (negative: filling)", units: "hPa day-1", value: |p| p.deepening.rate / 100.0 },
    Var { name: "deepening_rate_60", standard_name: None, long_name: "deepening_rate scaled to 60 degrees of latitude, times sin(60)/sin(|mean latitude|) (Sanders and Gyakum 1980); missing within 15 degrees of the equator", units: "hPa day-1", value: |p| p.deepening.rate_60 / 100.0 },
    Var { name: "bergeron", standard_name: None, long_name: "deepening_rate_60 in bergerons (1 bergeron: 24 hPa in 24 h at 60 degrees; Sanders and Gyakum 1980)", units: "1", value: |p| p.deepening.bergeron },
    Var { name: "deepening_interval", standard_name: None, long_name: "interval the deepening rate is taken over: the longest of at most 24 h ending at the point, or starting there at a track's first point", units: "h", value: |p| p.deepening.hours },
    Var { name: "steer_u", standard_name: Some("eastward_wind"), long_name: "steering wind at the centre, toward east", units: "m s-1", value: |p| p.facts.steer_u },
    Var { name: "steer_v", standard_name: Some("northward_wind"), long_name: "steering wind at the centre, toward north", units: "m s-1", value: |p| p.facts.steer_v },
    Var { name: "eady_max", standard_name: None, long_name: "largest Eady growth rate within the radius", units: "day-1", value: |p| p.facts.eady_max },
    Var { name: "thick_gradient_max", standard_name: None, long_name: "largest 1000-500 hPa thickness gradient within the radius, m per 100 km", units: "1e-5", value: |p| p.facts.thick_gradient_max },
    Var { name: "stretch_max", standard_name: None, long_name: "largest fractional stretching of an isentropic layer within the radius since the previous step (bud_stretch)", units: "1", value: |p| p.facts.stretch_max },
    Var { name: "zeta_stretch_max", standard_name: None, long_name: "largest relative vorticity the PV budget puts down to the stretching of an isentropic layer within the radius (bud_zeta_stretch)", units: "s-1", value: |p| p.facts.zeta_stretch_max },
    Var { name: "orog_upstream_max", standard_name: None, long_name: "highest terrain on the line from the centre one radius upstream along the steering wind", units: "m", value: |p| p.facts.orog_upstream_max },
    Var { name: "orog_centre", standard_name: Some("surface_altitude"), long_name: "terrain height at the centre", units: "m", value: |p| p.facts.orog_centre },
    Var { name: "low_pv_max", standard_name: None, long_name: "largest low-level mean PV (low_pv) within the radius (1 PVU = 1e-6 K m2 kg-1 s-1)", units: PV_UNITS, value: |p| p.facts.low_pv_max * PVU },
    Var { name: "zeta_diff_max", standard_name: None, long_name: "largest actual minus conserved-PV relative vorticity of an isentropic layer within the radius (bud_zeta_diff, PV not conserved)", units: "s-1", value: |p| p.facts.zeta_diff_max },
    Var { name: "theta_e_850_max", standard_name: None, long_name: "largest 850 hPa equivalent potential temperature within the radius", units: "K", value: |p| p.facts.theta_e_850_max },
    Var { name: "trop_theta", standard_name: None, long_name: "median potential temperature of the dynamic tropopause within the radius", units: "K", value: |p| p.facts.trop_theta },
    Var { name: "upper_theta", standard_name: None, long_name: "the isentropic surface nearest to trop_theta", units: "K", value: |p| p.facts.upper_theta },
    Var { name: "upper_pv_max", standard_name: None, long_name: "largest PV on the surface upper_theta within the radius (1 PVU = 1e-6 K m2 kg-1 s-1)", units: PV_UNITS, value: |p| p.facts.upper_pv_max * PVU },
    Var { name: "upper_pv_distance", standard_name: None, long_name: "distance from the centre to upper_pv_max", units: "km", value: |p| p.facts.upper_pv_distance },
    Var { name: "upper_pv_along_flow", standard_name: None, long_name: "offset of upper_pv_max from the centre along the steering wind (negative: upstream)", units: "km", value: |p| p.facts.upper_pv_along_flow },
];

fn nc_err(path: &Path) -> impl Fn(netcdf::Error) -> String + '_ {
    move |e| format!("{}: {e}", path.display())
}

/// Write the tracks as a CF trajectory file at `path`, atomically.
pub fn netcdf(path: &Path, c: &Cycle) -> Result<(), String> {
    crate::output::publish_atomically(
        path,
        "partial",
        |tmp| write_netcdf(tmp, c),
        |p, e| format!("{}: {e}", p.display()),
    )
}

fn write_netcdf(path: &Path, c: &Cycle) -> Result<(), String> {
    let e = nc_err(path);
    crate::output::quiet_hdf5_errors();
    let mut f = netcdf::create(path).map_err(&e)?;
    let points: Vec<Point<'_>> = (0..c.tracks.len()).flat_map(|t| c.points(t)).collect();
    globals(&mut f, c).map_err(&e)?;
    // Unlimited dimensions hold a cycle without any track as well.
    f.add_unlimited_dimension("trajectory").map_err(&e)?;
    f.add_unlimited_dimension("obs").map_err(&e)?;
    let ids: Vec<i32> = (1..=c.tracks.len() as i32).collect();
    let sizes: Vec<i32> = c.tracks.iter().map(|t| t.len() as i32).collect();
    {
        let mut v = f
            .add_variable::<i32>("track", &["trajectory"])
            .map_err(&e)?;
        v.put_attribute("cf_role", "trajectory_id").map_err(&e)?;
        v.put_attribute("long_name", "track number within the cycle")
            .map_err(&e)?;
        v.put_values(&ids, ..).map_err(&e)?;
        let mut v = f
            .add_variable::<i32>("row_size", &["trajectory"])
            .map_err(&e)?;
        v.put_attribute("long_name", "number of points of the track")
            .map_err(&e)?;
        v.put_attribute("sample_dimension", "obs").map_err(&e)?;
        v.put_values(&sizes, ..).map_err(&e)?;
    }
    let since = format!(
        "hours since {}",
        c.reference_time.format("%Y-%m-%d %H:%M:%S")
    );
    let coords: [(&str, &str, &str, &str, Vec<f64>); 3] = [
        (
            "time",
            "time",
            "valid time",
            since.as_str(),
            points.iter().map(|p| c.hours(p)).collect(),
        ),
        (
            "lat",
            "latitude",
            "latitude of the centre",
            "degrees_north",
            points.iter().map(|p| p.centre.lat).collect(),
        ),
        (
            "lon",
            "longitude",
            "longitude of the centre",
            "degrees_east",
            points.iter().map(|p| wrap180(p.centre.lon)).collect(),
        ),
    ];
    for (name, std, long, units, data) in coords {
        let mut v = f.add_variable::<f64>(name, &["obs"]).map_err(&e)?;
        v.put_attribute("standard_name", std).map_err(&e)?;
        v.put_attribute("long_name", long).map_err(&e)?;
        v.put_attribute("units", units).map_err(&e)?;
        if name == "time" {
            v.put_attribute("calendar", "proleptic_gregorian")
                .map_err(&e)?;
            v.put_attribute("axis", "T").map_err(&e)?;
        }
        v.put_values(&data, ..).map_err(&e)?;
    }
    {
        let mut v = f.add_variable::<f64>("reference_time", &[]).map_err(&e)?;
        v.put_attribute("standard_name", "forecast_reference_time")
            .map_err(&e)?;
        v.put_attribute("long_name", "reference time of the model cycle")
            .map_err(&e)?;
        v.put_attribute("units", since.as_str()).map_err(&e)?;
        v.put_attribute("calendar", "proleptic_gregorian")
            .map_err(&e)?;
        v.put_value(0.0f64, ..).map_err(&e)?;
    }
    for (name, long, get) in [
        (
            "grid_row",
            "row of the grid-point minimum in the step file (from 0, south to north)",
            (|p: &Point<'_>| p.centre.j as i32) as fn(&Point<'_>) -> i32,
        ),
        (
            "grid_column",
            "column of the grid-point minimum in the step file (from 0, west to east)",
            |p: &Point<'_>| p.centre.i as i32,
        ),
    ] {
        let mut v = f.add_variable::<i32>(name, &["obs"]).map_err(&e)?;
        v.put_attribute("long_name", long).map_err(&e)?;
        v.put_attribute("coordinates", "time lat lon").map_err(&e)?;
        let data: Vec<i32> = points.iter().map(get).collect();
        v.put_values(&data, ..).map_err(&e)?;
    }
    {
        let mut v = f
            .add_variable::<i8>("bergeron_reached", &["obs"])
            .map_err(&e)?;
        v.put_attribute("long_name", "whether bergeron is at least 1")
            .map_err(&e)?;
        v.put_attribute("flag_values", vec![0i8, 1i8]).map_err(&e)?;
        v.put_attribute("flag_meanings", "below_one_bergeron at_least_one_bergeron")
            .map_err(&e)?;
        v.put_attribute("coordinates", "time lat lon").map_err(&e)?;
        let data: Vec<i8> = points
            .iter()
            .map(|p| i8::from(p.deepening.bergeron >= 1.0))
            .collect();
        v.put_values(&data, ..).map_err(&e)?;
    }
    for var in &VARS {
        let mut v = f.add_variable::<f32>(var.name, &["obs"]).map_err(&e)?;
        v.set_fill_value(FILL_F32).map_err(&e)?;
        if let Some(s) = var.standard_name {
            v.put_attribute("standard_name", s).map_err(&e)?;
        }
        v.put_attribute("long_name", var.long_name).map_err(&e)?;
        v.put_attribute("units", var.units).map_err(&e)?;
        v.put_attribute("coordinates", "time lat lon").map_err(&e)?;
        let data: Vec<f32> = points
            .iter()
            .map(|p| {
                let x = (var.value)(p);
                if x.is_finite() {
                    x as f32
                } else {
                    FILL_F32
                }
            })
            .collect();
        v.put_values(&data, ..).map_err(&e)?;
    }
    f.close().map_err(&e)
}

fn globals(f: &mut netcdf::FileMut, c: &Cycle) -> netcdf::Result<()> {
    f.add_attribute("Conventions", "CF-1.11")?;
    f.add_attribute("featureType", "trajectory")?;
    f.add_attribute("title", "leeward cyclone tracks of one model cycle")?;
    f.add_attribute(
        "source",
        format!(
            "mean sea-level pressure of the published step files, processed by leeward {}",
            env!("CARGO_PKG_VERSION")
        )
        .as_str(),
    )?;
    f.add_attribute("references", "Wernli and Schwierz 2006, J. Atmos. Sci. 63, 2486-2507 (closed-contour centres); Sanders and Gyakum 1980, Mon. Wea. Rev. 108, 1589-1606 (bergeron); Lindzen and Farrell 1980, J. Atmos. Sci. 37, 1648-1654 (Eady growth rate); Bolton 1980, Mon. Wea. Rev. 108, 1046-1053 (theta-e); CF Conventions chapter 9")?;
    f.add_attribute("comment", CAUTION)?;
    let s = &c.settings;
    f.add_attribute("leeward_contour_interval_hpa", s.detect.interval / 100.0)?;
    f.add_attribute(
        "leeward_max_contour_radius_km",
        s.detect.max_radius / 1000.0,
    )?;
    f.add_attribute("leeward_radius_km", s.radius / 1000.0)?;
    f.add_attribute("leeward_search_radius_km", c.search_radius_6h / 1000.0)?;
    let steps: Vec<String> = c
        .steps
        .iter()
        .map(|s| {
            s.path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default()
        })
        .collect();
    f.add_attribute("leeward_steps", steps.join(", ").as_str())?;
    let mut sources: Vec<&str> = c.steps.iter().map(|s| s.source.as_str()).collect();
    sources.sort_unstable();
    sources.dedup();
    f.add_attribute("leeward_mslp_source", sources.join("; ").as_str())?;
    Ok(())
}

fn wrap180(lon: f64) -> f64 {
    let l = (lon + 180.0).rem_euclid(360.0) - 180.0;
    if l == -180.0 && lon > 0.0 {
        180.0
    } else {
        l
    }
}

fn num(x: f64, decimals: i32) -> Value {
    if x.is_finite() {
        let k = 10f64.powi(decimals);
        json!((x * k).round() / k)
    } else {
        Value::Null
    }
}

/// The facts of a point as GeoJSON properties (units in the names).
fn properties(c: &Cycle, p: &Point<'_>) -> Map<String, Value> {
    let f = p.facts;
    let d = p.deepening;
    let mut m = Map::new();
    m.insert("track".into(), json!(p.track));
    m.insert(
        "valid_time".into(),
        json!(p.step.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string()),
    );
    m.insert("lead_hours".into(), num(c.hours(p), 2));
    m.insert("lat".into(), num(p.centre.lat, 3));
    m.insert("lon".into(), num(wrap180(p.centre.lon), 3));
    m.insert(
        "central_pressure_hpa".into(),
        num(p.centre.pressure / 100.0, 2),
    );
    m.insert("outer_isobar_hpa".into(), num(p.centre.outer / 100.0, 2));
    m.insert("depth_hpa".into(), num(p.centre.depth / 100.0, 2));
    m.insert("deepening_hpa_per_24h".into(), num(d.rate / 100.0, 2));
    m.insert(
        "deepening_hpa_per_24h_at_60".into(),
        num(d.rate_60 / 100.0, 2),
    );
    m.insert("bergeron".into(), num(d.bergeron, 3));
    m.insert("bergeron_reached".into(), json!(d.bergeron >= 1.0));
    m.insert("deepening_interval_hours".into(), num(d.hours, 2));
    m.insert("steer_u_ms".into(), num(f.steer_u, 2));
    m.insert("steer_v_ms".into(), num(f.steer_v, 2));
    m.insert("eady_max_per_day".into(), num(f.eady_max, 3));
    m.insert(
        "thickness_gradient_max_m_per_100km".into(),
        num(f.thick_gradient_max, 2),
    );
    m.insert("stretch_max".into(), num(f.stretch_max, 4));
    m.insert("zeta_stretch_max_per_s".into(), num(f.zeta_stretch_max, 8));
    m.insert(
        "orography_upstream_max_m".into(),
        num(f.orog_upstream_max, 1),
    );
    m.insert("orography_centre_m".into(), num(f.orog_centre, 1));
    m.insert("low_pv_max_pvu".into(), num(f.low_pv_max, 3));
    m.insert("zeta_diff_max_per_s".into(), num(f.zeta_diff_max, 8));
    m.insert("theta_e_850_max_k".into(), num(f.theta_e_850_max, 2));
    m.insert("trop_theta_k".into(), num(f.trop_theta, 1));
    m.insert("upper_theta_k".into(), num(f.upper_theta, 1));
    m.insert("upper_pv_max_pvu".into(), num(f.upper_pv_max, 3));
    m.insert("upper_pv_distance_km".into(), num(f.upper_pv_distance, 1));
    m.insert(
        "upper_pv_along_flow_km".into(),
        num(f.upper_pv_along_flow, 1),
    );
    m.insert("facts".into(), json!(sentences(c, p)));
    m
}

/// The facts of a point in words: what the diagnostics hold, no verdict.
pub fn sentences(c: &Cycle, p: &Point<'_>) -> Vec<String> {
    let f = p.facts;
    let d = p.deepening;
    let r = c.settings.radius / 1000.0;
    let mut out = vec![format!(
        "central pressure {:.1} hPa, {:.1} hPa below its outermost closed isobar",
        p.centre.pressure / 100.0,
        p.centre.depth / 100.0
    )];
    if d.rate.is_finite() {
        let mut s = format!(
            "central pressure change over {:.0} h: {:+.1} hPa per 24 h",
            d.hours,
            -d.rate / 100.0
        );
        if d.rate_60.is_finite() {
            s.push_str(&format!(
                " ({:+.1} hPa per 24 h scaled to 60 degrees, {:.2} bergeron)",
                -d.rate_60 / 100.0,
                d.bergeron
            ));
        }
        out.push(s);
    }
    let mut say = |x: f64, text: String| {
        if x.is_finite() {
            out.push(text);
        }
    };
    say(
        f.eady_max,
        format!(
            "Eady growth rate within {r:.0} km: up to {:.1} per day",
            f.eady_max
        ),
    );
    say(
        f.thick_gradient_max,
        format!(
            "1000-500 hPa thickness gradient within {r:.0} km: up to {:.0} m per 100 km",
            f.thick_gradient_max
        ),
    );
    say(f.stretch_max, format!("stretching of an isentropic layer within {r:.0} km: up to {:.0} % since the previous step", 100.0 * f.stretch_max));
    say(
        f.zeta_stretch_max,
        format!(
            "relative vorticity made by that stretching within {r:.0} km: up to {:.1e} s-1",
            f.zeta_stretch_max
        ),
    );
    say(
        f.orog_upstream_max,
        format!(
            "terrain within {r:.0} km upstream along the steering flow: up to {:.0} m",
            f.orog_upstream_max
        ),
    );
    say(
        f.low_pv_max,
        format!(
            "low-level PV within {r:.0} km: up to {:.2} PVU",
            f.low_pv_max
        ),
    );
    say(
        f.zeta_diff_max,
        format!(
            "relative vorticity above its conserved-PV value within {r:.0} km: up to {:.1e} s-1",
            f.zeta_diff_max
        ),
    );
    say(
        f.theta_e_850_max,
        format!(
            "850 hPa theta-e within {r:.0} km: up to {:.1} K",
            f.theta_e_850_max
        ),
    );
    if f.upper_pv_max.is_finite() {
        let where_ = if f.upper_pv_along_flow.is_finite() {
            format!(
                ", {:.0} km from the centre, {:.0} km {} along the steering flow",
                f.upper_pv_distance,
                f.upper_pv_along_flow.abs(),
                if f.upper_pv_along_flow < 0.0 {
                    "upstream"
                } else {
                    "downstream"
                }
            )
        } else {
            String::new()
        };
        out.push(format!(
            "PV on {:.0} K within {r:.0} km: up to {:.1} PVU{where_}",
            f.upper_theta, f.upper_pv_max
        ));
    }
    if f.orog_centre.is_finite() && f.orog_centre >= 1000.0 {
        out.push(format!(
            "terrain at the centre: {:.0} m (pressure reduced to sea level there)",
            f.orog_centre
        ));
    }
    out
}

/// Positions of a line split where it crosses the antimeridian (RFC 7946,
/// section 3.1.9): each part ends and the next starts on it, at the latitude
/// interpolated between the two points on either side.
pub fn split_at_antimeridian(pts: &[(f64, f64)]) -> Vec<Vec<(f64, f64)>> {
    let mut parts = vec![Vec::new()];
    for (k, &(lon, lat)) in pts.iter().enumerate() {
        let lon = wrap180(lon);
        if k > 0 {
            let (plon, plat) = {
                let (a, b) = pts[k - 1];
                (wrap180(a), b)
            };
            if (lon - plon).abs() > 180.0 {
                // Crossing: eastward if the previous point is in the east half.
                let east = plon > 0.0;
                let edge = if east { 180.0 } else { -180.0 };
                let span = if east {
                    360.0 - plon + lon
                } else {
                    360.0 + plon - lon
                };
                let to_edge = (edge - plon).abs();
                let w = if span > 0.0 { to_edge / span } else { 0.5 };
                let lat_x = plat + w * (lat - plat);
                if let Some(last) = parts.last_mut() {
                    last.push((edge, lat_x));
                }
                parts.push(vec![(-edge, lat_x)]);
            }
        }
        if let Some(last) = parts.last_mut() {
            last.push((lon, lat));
        }
    }
    parts
}

fn coords(v: &[(f64, f64)]) -> Value {
    Value::Array(
        v.iter()
            .map(|&(lo, la)| json!([round6(lo), round6(la)]))
            .collect(),
    )
}

fn round6(x: f64) -> f64 {
    (x * 1e6).round() / 1e6
}

/// The tracks as a GeoJSON FeatureCollection: per track a line (`kind`
/// "track", with every point's facts in `points`) and its latest position
/// (`kind` "latest", with that point's facts as properties).
pub fn geojson(c: &Cycle) -> Value {
    let mut features = Vec::new();
    for t in 0..c.tracks.len() {
        let pts = c.points(t);
        let line: Vec<(f64, f64)> = pts.iter().map(|p| (p.centre.lon, p.centre.lat)).collect();
        let geometry = if line.len() < 2 {
            json!({"type": "Point", "coordinates": [round6(wrap180(line[0].0)), round6(line[0].1)]})
        } else {
            let parts = split_at_antimeridian(&line);
            if parts.len() == 1 {
                json!({"type": "LineString", "coordinates": coords(&parts[0])})
            } else {
                json!({"type": "MultiLineString", "coordinates": parts.iter().map(|p| coords(p)).collect::<Vec<_>>()})
            }
        };
        let lowest = pts
            .iter()
            .map(|p| p.centre.pressure)
            .fold(f64::INFINITY, f64::min);
        let most = pts
            .iter()
            .map(|p| p.deepening.bergeron)
            .fold(f64::NAN, f64::max);
        let first = &pts[0];
        let last = &pts[pts.len() - 1];
        features.push(json!({
            "type": "Feature",
            "geometry": geometry,
            "properties": {
                "kind": "track",
                "track": t + 1,
                "first_valid_time": first.step.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
                "last_valid_time": last.step.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
                "points_count": pts.len(),
                "lowest_central_pressure_hpa": num(lowest / 100.0, 2),
                "largest_bergeron": num(most, 3),
                "bergeron_reached": most >= 1.0,
                "points": pts.iter().map(|p| Value::Object(properties(c, p))).collect::<Vec<_>>(),
            }
        }));
        let mut props = properties(c, last);
        props.insert("kind".into(), json!("latest"));
        features.push(json!({
            "type": "Feature",
            "geometry": {"type": "Point", "coordinates": [round6(wrap180(last.centre.lon)), round6(last.centre.lat)]},
            "properties": Value::Object(props),
        }));
    }
    json!({
        "type": "FeatureCollection",
        "features": features,
        "leeward": {
            "cycle": c.reference_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
            "steps": c.steps.iter().map(|s| s.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string()).collect::<Vec<_>>(),
            "contour_interval_hpa": c.settings.detect.interval / 100.0,
            "radius_km": c.settings.radius / 1000.0,
            "bergeron_hpa_per_24h_at_60": BERGERON / 100.0,
            "caution": CAUTION,
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_track_across_the_antimeridian_is_cut_there() {
        // From 170 E to 170 W along a line of rising latitude: cut at 180 halfway (RFC 7946 3.1.9).
        let parts =
            split_at_antimeridian(&[(160.0, 40.0), (170.0, 42.0), (-170.0, 46.0), (-160.0, 48.0)]);
        assert_eq!(parts.len(), 2, "{parts:?}");
        assert_eq!(parts[0].last(), Some(&(180.0, 44.0)));
        assert_eq!(parts[1].first(), Some(&(-180.0, 44.0)));
        // Westward, and given in 0..360.
        let parts = split_at_antimeridian(&[(185.0, 10.0), (175.0, 12.0)]);
        assert_eq!(parts.len(), 2, "{parts:?}");
        assert_eq!(parts[0], vec![(-175.0, 10.0), (-180.0, 11.0)]);
        assert_eq!(parts[1], vec![(180.0, 11.0), (175.0, 12.0)]);
        // No crossing: one part, longitudes in -180..180.
        assert_eq!(
            split_at_antimeridian(&[(350.0, 0.0), (10.0, 1.0)]),
            vec![vec![(-10.0, 0.0), (10.0, 1.0)]]
        );
    }
}
