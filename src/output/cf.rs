//! CF-1.10 NetCDF-4 writing of one step's products.
//!
//! In: a [`StepProducts`] (grid, coordinates, times, data arrays, notes).
//! Out: one NetCDF-4 file, written under a hidden temporary name in the target
//! directory, fsynced, then renamed into place, so a reader never sees a
//! partial file. On any error the temporary is removed and nothing already in
//! the directory is touched.

use std::fs;
use std::path::{Path, PathBuf};

use chrono::NaiveDateTime;
use ndarray::{Array2, Array3};
use thiserror::Error;

use super::variables::VarSpec;
use crate::geometry::{Conformal, Earth, Grid, Horizontal};

/// The netCDF default fill value for floats, used as `_FillValue`.
pub const FILL_F32: f32 = 9.969_21e36;

/// Why a file could not be written.
#[derive(Debug, Error)]
pub enum OutputError {
    /// The netCDF library refused.
    #[error("netCDF error writing {path}: {source}")]
    NetCdf {
        /// File being written.
        path: PathBuf,
        /// The library's error.
        source: netcdf::Error,
    },
    /// The filesystem refused.
    #[error("cannot write {path}: {source}")]
    Io {
        /// File or directory.
        path: PathBuf,
        /// The system's error.
        source: std::io::Error,
    },
}

/// Everything one output file holds.
#[derive(Debug, Clone)]
pub struct StepProducts {
    /// Originating centre (common code table C-11).
    pub centre: u16,
    /// Fingerprint of the grid (same grid, same value), to find earlier files of the same model.
    pub grid_id: String,
    /// Ensemble member, if any.
    pub member: Option<u8>,
    /// Reference time of the cycle.
    pub reference_time: NaiveDateTime,
    /// Valid time of the step.
    pub valid_time: NaiveDateTime,
    /// The grid.
    pub grid: Grid,
    /// Geographic latitudes of every point, degrees.
    pub lat: Array2<f64>,
    /// Geographic longitudes of every point, degrees.
    pub lon: Array2<f64>,
    /// Isobaric levels, Pa, in the order of the data's first axis.
    pub levels: Vec<f64>,
    /// Isentropic surfaces, K.
    pub theta_levels: Vec<f64>,
    /// PV surfaces of the dynamic tropopause, PVU (magnitudes).
    pub pv_levels: Vec<f64>,
    /// Isentropic layers (bottom, top), K.
    pub layers: Vec<[f64; 2]>,
    /// Isobaric layers (bottom, top), Pa.
    pub p_layers: Vec<[f64; 2]>,
    /// Data variables on (vertical, row, column); NaN where missing.
    pub fields: Vec<Product>,
    /// How levels below the ground were masked.
    pub masking: String,
    /// Whether the input winds were grid- or earth-relative.
    pub winds: String,
    /// Input file names.
    pub inputs: Vec<String>,
    /// deflate level 0-9.
    pub deflate: i32,
    /// Mantissa bits kept in data values (1-23; 23 keeps them exact).
    pub significant_bits: u32,
}

/// Round a float to `nsb` significant mantissa bits, to nearest with ties to
/// even, and clear the rest ("bit rounding"; Kloewer et al. 2021, Nature
/// Computational Science 1, 713-724; from memory). The relative error is at
/// most 2^-(nsb+1); zeroed trailing bits make deflate faster and smaller.
/// Non-finite values pass unchanged.
#[inline]
pub fn bit_round(x: f32, nsb: u32) -> f32 {
    if !x.is_finite() || nsb >= 23 {
        return x;
    }
    let shift = 23 - nsb.max(1);
    let b = x.to_bits();
    let half_minus_one = (1u32 << (shift - 1)) - 1;
    let odd = (b >> shift) & 1;
    let r = b.wrapping_add(half_minus_one + odd) & !((1u32 << shift) - 1);
    let y = f32::from_bits(r);
    if y.is_finite() {
        y
    } else {
        x
    }
}

/// The vertical coordinate of a product.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Vertical {
    /// Isobaric levels (`pressure`).
    Pressure,
    /// Isentropic surfaces (`theta_level`).
    Theta,
    /// PV surfaces (`pv_level`).
    PvSurface,
    /// Isentropic layers (`theta_layer`, with bounds).
    ThetaLayer,
    /// Isobaric layers (`p_layer`, with bounds).
    PressureLayer,
    /// A single field with no vertical dimension (mean sea-level pressure, a
    /// layer's mean): (time, y, x); a layer it stands for is said in its attributes.
    Surface,
}

impl Vertical {
    /// Dimension name in the file.
    pub fn dim(self) -> &'static str {
        match self {
            Vertical::Pressure => "pressure",
            Vertical::Theta => "theta_level",
            Vertical::PvSurface => "pv_level",
            Vertical::ThetaLayer => "theta_layer",
            Vertical::PressureLayer => "p_layer",
            Vertical::Surface => "",
        }
    }

    /// The variable's dimensions in the file, given the horizontal ones.
    pub fn dims<'a>(self, ydim: &'a str, xdim: &'a str) -> Vec<&'a str> {
        match self {
            Vertical::Surface => vec!["time", ydim, xdim],
            v => vec!["time", v.dim(), ydim, xdim],
        }
    }
}

/// One data variable: what it is, on which vertical coordinate, its values.
#[derive(Debug, Clone)]
pub struct Product {
    /// Name, standard name, units.
    pub spec: VarSpec,
    /// Its vertical coordinate.
    pub vertical: Vertical,
    /// Values on (vertical, row, column), NaN where missing.
    pub values: Values,
    /// Further attributes of this variable (name, text).
    pub notes: Vec<(&'static str, String)>,
}

/// A product's values: as computed, or already packed as the file stores them.
#[derive(Debug, Clone)]
pub enum Values {
    /// As computed, NaN where missing.
    Plain(Array3<f32>),
    /// Bit-rounded, shuffled and deflated per level ([`super::pack`]).
    Packed(super::pack::Packed),
}

impl Product {
    /// A product with no further attributes.
    pub fn new(spec: VarSpec, vertical: Vertical, data: Array3<f32>) -> Self {
        Product {
            spec,
            vertical,
            values: Values::Plain(data),
            notes: Vec::new(),
        }
    }

    /// A product of values that stay in use elsewhere: packed at once from
    /// a borrow when `out` deflates (no copy of the plain values), else copied.
    pub fn packed_copy(
        spec: VarSpec,
        vertical: Vertical,
        data: &Array3<f32>,
        out: &crate::config::Output,
    ) -> Self {
        let values = if out.deflate_level > 0 {
            Values::Packed(super::pack::Packed::new(
                data,
                out.significant_bits,
                out.deflate_level as u32,
            ))
        } else {
            Values::Plain(data.clone())
        };
        Product {
            spec,
            vertical,
            values,
            notes: Vec::new(),
        }
    }

    /// (levels, rows, columns).
    pub fn dim(&self) -> (usize, usize, usize) {
        match &self.values {
            Values::Plain(a) => a.dim(),
            Values::Packed(p) => p.shape,
        }
    }

    /// Level `k`, NaN where missing.
    pub fn level(&self, k: usize) -> Array2<f32> {
        match &self.values {
            Values::Plain(a) => a.index_axis(ndarray::Axis(0), k).to_owned(),
            Values::Packed(p) => p.level(k),
        }
    }

    /// Every level as a reader of the file gets it: bit-rounded to `nsb`
    /// significant bits, NaN where missing.
    pub fn published(&self, nsb: u32) -> Array3<f32> {
        match &self.values {
            Values::Plain(a) => a.mapv(|x| bit_round(x, nsb)),
            Values::Packed(p) => p.unpack(),
        }
    }

    /// Pack the values as the file will store them (deflate `level` > 0),
    /// on every core, and free the plain array.
    pub fn pack(&mut self, nsb: u32, level: i32) {
        if level <= 0 {
            return;
        }
        if let Values::Plain(a) = &self.values {
            self.values = Values::Packed(super::pack::Packed::new(a, nsb, level as u32));
        }
    }
}

/// Short name of a centre for file names (our own list; numbers from common code table C-11).
pub fn centre_short_name(c: u16) -> String {
    match c {
        7 => "ncep".into(),
        54 => "cmc".into(),
        98 => "ecmwf".into(),
        74 => "ukmo".into(),
        78 => "dwd".into(),
        34 => "jma".into(),
        85 => "mfr".into(),
        n => format!("c{n}"),
    }
}

/// Institution name for a centre (common code table C-11).
pub fn institution(c: u16) -> String {
    match c {
        7 => "US National Weather Service, National Centers for Environmental Prediction (NCEP)"
            .into(),
        54 => "Canadian Meteorological Service, Montreal".into(),
        98 => "European Centre for Medium-Range Weather Forecasts (ECMWF)".into(),
        74 => "UK Meteorological Office, Exeter".into(),
        78 => "Deutscher Wetterdienst, Offenbach".into(),
        34 => "Japan Meteorological Agency, Tokyo".into(),
        85 => "Meteo-France, Toulouse".into(),
        n => format!("originating centre {n} (WMO common code table C-11)"),
    }
}

/// The file name for a step: `{centre}_{YYYYMMDD}T{HHMM}Z_{HHH}h.nc`.
pub fn step_file_name(
    centre: u16,
    reference: NaiveDateTime,
    lead_hours: i64,
    grid_suffix: Option<usize>,
) -> String {
    let g = grid_suffix.map(|n| format!("_g{n}")).unwrap_or_default();
    format!(
        "{}_{}_{:03}h{}.nc",
        centre_short_name(centre),
        reference.format("%Y%m%dT%H%MZ"),
        lead_hours,
        g
    )
}

/// The caution every file and document carries.
pub const CAUTION: &str = "These diagnostics are guidance for trained forecasters, not warnings. Local procedures and the responsible national meteorological service take precedence.";

fn nc(path: &Path) -> impl Fn(netcdf::Error) -> OutputError + '_ {
    move |source| OutputError::NetCdf {
        path: path.to_path_buf(),
        source,
    }
}

fn earth_attrs(v: &mut netcdf::VariableMut<'_>, e: &Earth) -> netcdf::Result<()> {
    if e.is_sphere() {
        v.put_attribute("earth_radius", e.a)?;
    } else {
        v.put_attribute("semi_major_axis", e.a)?;
        v.put_attribute("semi_minor_axis", e.b)?;
    }
    Ok(())
}

/// Write `p` to `dir/name` atomically (temporary, fsync, rename).
pub fn write_step(dir: &Path, name: &str, p: &StepProducts) -> Result<PathBuf, OutputError> {
    let final_path = dir.join(name);
    let tmp = dir.join(format!(".{name}.partial-{}", super::temporary_suffix()));
    let (ny, nx) = p.grid.shape();
    let points = (ny * nx) as u64;
    let raw: u64 = p
        .fields
        .iter()
        .map(|f| {
            let (a, b, c) = f.dim();
            (a * b * c) as u64 * 4
        })
        .sum::<u64>()
        + points * 16
        + (1 << 20);
    super::ensure_space(dir, raw).map_err(|source| OutputError::Io {
        path: final_path.clone(),
        source,
    })?;
    let result = write_file(&tmp, p).and_then(|()| {
        let io = |path: &Path| {
            let path = path.to_path_buf();
            move |source| OutputError::Io { path, source }
        };
        fs::File::open(&tmp)
            .and_then(|f| f.sync_all())
            .map_err(io(&tmp))?;
        fs::rename(&tmp, &final_path).map_err(io(&final_path))?;
        // Make the rename itself durable.
        fs::File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(io(dir))?;
        Ok(())
    });
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result.map(|()| final_path).map_err(|e| explain(dir, e))
}

/// libnetcdf reports most system errors as an HDF error or "Permission
/// denied": when the directory itself refuses a small file, say the
/// system's own reason (read-only file system, no space, permissions).
pub fn explain(dir: &Path, e: OutputError) -> OutputError {
    if !matches!(e, OutputError::NetCdf { .. }) {
        return e;
    }
    let probe = dir.join(format!(".probe-{}", super::temporary_suffix()));
    let r = fs::File::create(&probe).and_then(|mut f| {
        use std::io::Write;
        f.write_all(&[0u8; 4096])?;
        f.sync_all()
    });
    let _ = fs::remove_file(&probe);
    match r {
        Err(source) => OutputError::Io {
            path: dir.to_path_buf(),
            source,
        },
        Ok(()) => e,
    }
}

fn write_file(path: &Path, p: &StepProducts) -> Result<(), OutputError> {
    let e = nc(path);
    let mut f = netcdf::create(path).map_err(&e)?;
    let (ny, nx) = p.grid.shape();
    let nz = p.levels.len();

    // Global attributes.
    f.add_attribute("Conventions", "CF-1.10").map_err(&e)?;
    f.add_attribute("title", "leeward dynamical diagnostics on isobaric levels")
        .map_err(&e)?;
    f.add_attribute("institution", institution(p.centre).as_str())
        .map_err(&e)?;
    f.add_attribute(
        "source",
        format!(
            "GRIB2 output of {} on a {} grid, processed by leeward {}",
            institution(p.centre),
            p.grid.describe(),
            env!("CARGO_PKG_VERSION")
        )
        .as_str(),
    )
    .map_err(&e)?;
    f.add_attribute(
        "history",
        format!(
            "{} leeward {}: diagnostics computed on the model grid from {}",
            chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ"),
            env!("CARGO_PKG_VERSION"),
            p.inputs.join(", ")
        )
        .as_str(),
    )
    .map_err(&e)?;
    f.add_attribute(
        "references",
        "WMO-No. 306 Manual on Codes (GRIB2); CF Conventions 1.10; Holton, An Introduction to Dynamic Meteorology; Bluestein 1992, Synoptic-Dynamic Meteorology in Midlatitudes; Snyder 1987, USGS Professional Paper 1395",
    )
    .map_err(&e)?;
    f.add_attribute("comment", CAUTION).map_err(&e)?;
    f.add_attribute("leeward_below_ground_masking", p.masking.as_str())
        .map_err(&e)?;
    f.add_attribute("leeward_wind_components", p.winds.as_str())
        .map_err(&e)?;
    f.add_attribute("leeward_grid_id", p.grid_id.as_str())
        .map_err(&e)?;
    f.add_attribute("leeward_centre", i32::from(p.centre))
        .map_err(&e)?;
    f.add_attribute("leeward_member", p.member.map(i32::from).unwrap_or(-1))
        .map_err(&e)?;

    // Dimensions and horizontal coordinates.
    let (ydim, xdim, aux_latlon) = match &p.grid.horizontal {
        Horizontal::LatLon { .. } => ("lat", "lon", false),
        Horizontal::Rotated { .. } => ("rlat", "rlon", true),
        Horizontal::Projected { .. } => ("y", "x", true),
    };
    f.add_dimension("time", 1).map_err(&e)?;
    let uses = |v: Vertical| p.fields.iter().any(|x| x.vertical == v);
    if nz > 0 {
        f.add_dimension("pressure", nz).map_err(&e)?;
    }
    f.add_dimension(ydim, ny).map_err(&e)?;
    f.add_dimension(xdim, nx).map_err(&e)?;

    let hours_since = format!(
        "hours since {}",
        p.reference_time.format("%Y-%m-%d %H:%M:%S")
    );
    let lead_h = (p.valid_time - p.reference_time).num_seconds() as f64 / 3600.0;
    {
        let mut v = f.add_variable::<f64>("time", &["time"]).map_err(&e)?;
        v.put_attribute("standard_name", "time").map_err(&e)?;
        v.put_attribute("long_name", "valid time").map_err(&e)?;
        v.put_attribute("units", hours_since.as_str()).map_err(&e)?;
        v.put_attribute("calendar", "proleptic_gregorian")
            .map_err(&e)?;
        v.put_attribute("axis", "T").map_err(&e)?;
        v.put_values(&[lead_h], ..).map_err(&e)?;
    }
    {
        let mut v = f.add_variable::<f64>("reference_time", &[]).map_err(&e)?;
        v.put_attribute("standard_name", "forecast_reference_time")
            .map_err(&e)?;
        v.put_attribute("long_name", "reference time of the model cycle")
            .map_err(&e)?;
        v.put_attribute("units", hours_since.as_str()).map_err(&e)?;
        v.put_attribute("calendar", "proleptic_gregorian")
            .map_err(&e)?;
        v.put_value(0.0f64, ..).map_err(&e)?;
    }
    {
        let mut v = f.add_variable::<f64>("lead_time", &[]).map_err(&e)?;
        v.put_attribute("standard_name", "forecast_period")
            .map_err(&e)?;
        v.put_attribute("long_name", "time since the reference time")
            .map_err(&e)?;
        v.put_attribute("units", "hours").map_err(&e)?;
        v.put_value(lead_h, ..).map_err(&e)?;
    }
    if nz > 0 {
        let mut v = f
            .add_variable::<f64>("pressure", &["pressure"])
            .map_err(&e)?;
        v.put_attribute("standard_name", "air_pressure")
            .map_err(&e)?;
        v.put_attribute("long_name", "pressure of the isobaric level")
            .map_err(&e)?;
        v.put_attribute("units", "Pa").map_err(&e)?;
        v.put_attribute("positive", "down").map_err(&e)?;
        v.put_attribute("axis", "Z").map_err(&e)?;
        v.put_values(&p.levels, ..).map_err(&e)?;
    }
    if uses(Vertical::Theta) && !p.theta_levels.is_empty() {
        f.add_dimension("theta_level", p.theta_levels.len())
            .map_err(&e)?;
        let mut v = f
            .add_variable::<f64>("theta_level", &["theta_level"])
            .map_err(&e)?;
        v.put_attribute("standard_name", "air_potential_temperature")
            .map_err(&e)?;
        v.put_attribute(
            "long_name",
            "potential temperature of the isentropic surface",
        )
        .map_err(&e)?;
        v.put_attribute("units", "K").map_err(&e)?;
        v.put_attribute("positive", "up").map_err(&e)?;
        v.put_attribute("axis", "Z").map_err(&e)?;
        v.put_values(&p.theta_levels, ..).map_err(&e)?;
    }
    if uses(Vertical::PvSurface) && !p.pv_levels.is_empty() {
        f.add_dimension("pv_level", p.pv_levels.len()).map_err(&e)?;
        let mut v = f
            .add_variable::<f64>("pv_level", &["pv_level"])
            .map_err(&e)?;
        v.put_attribute("standard_name", "ertel_potential_vorticity")
            .map_err(&e)?;
        v.put_attribute(
            "long_name",
            "magnitude of Ertel potential vorticity on the surface",
        )
        .map_err(&e)?;
        v.put_attribute("units", super::variables::PVU_UNITS)
            .map_err(&e)?;
        v.put_attribute("positive", "up").map_err(&e)?;
        v.put_attribute(
            "comment",
            "the surface is PV = +value north of the equator and PV = -value south of it",
        )
        .map_err(&e)?;
        v.put_values(&p.pv_levels, ..).map_err(&e)?;
    }
    if uses(Vertical::PressureLayer) && !p.p_layers.is_empty() {
        f.add_dimension("p_layer", p.p_layers.len()).map_err(&e)?;
        if f.dimension("nv").is_none() {
            f.add_dimension("nv", 2).map_err(&e)?;
        }
        let mid: Vec<f64> = p.p_layers.iter().map(|l| 0.5 * (l[0] + l[1])).collect();
        // Layers may overlap (1000-500 and 1000-850 hPa): their middles need not be
        // monotonic, so they form an auxiliary coordinate, not a coordinate variable.
        let mut v = f
            .add_variable::<f64>("p_layer_mid", &["p_layer"])
            .map_err(&e)?;
        v.put_attribute("standard_name", "air_pressure")
            .map_err(&e)?;
        v.put_attribute("long_name", "pressure at the middle of the isobaric layer")
            .map_err(&e)?;
        v.put_attribute("units", "Pa").map_err(&e)?;
        v.put_attribute("positive", "down").map_err(&e)?;
        v.put_attribute("bounds", "p_layer_bounds").map_err(&e)?;
        v.put_values(&mid, ..).map_err(&e)?;
        let mut b = f
            .add_variable::<f64>("p_layer_bounds", &["p_layer", "nv"])
            .map_err(&e)?;
        let flat: Vec<f64> = p.p_layers.iter().flat_map(|l| [l[0], l[1]]).collect();
        b.put_values(&flat, ..).map_err(&e)?;
    }
    if uses(Vertical::ThetaLayer) && !p.layers.is_empty() {
        f.add_dimension("theta_layer", p.layers.len()).map_err(&e)?;
        if f.dimension("nv").is_none() {
            f.add_dimension("nv", 2).map_err(&e)?;
        }
        let mid: Vec<f64> = p.layers.iter().map(|l| 0.5 * (l[0] + l[1])).collect();
        let mut v = f
            .add_variable::<f64>("theta_layer", &["theta_layer"])
            .map_err(&e)?;
        v.put_attribute("standard_name", "air_potential_temperature")
            .map_err(&e)?;
        v.put_attribute(
            "long_name",
            "potential temperature at the middle of the isentropic layer",
        )
        .map_err(&e)?;
        v.put_attribute("units", "K").map_err(&e)?;
        v.put_attribute("positive", "up").map_err(&e)?;
        v.put_attribute("axis", "Z").map_err(&e)?;
        v.put_attribute("bounds", "theta_layer_bounds")
            .map_err(&e)?;
        v.put_values(&mid, ..).map_err(&e)?;
        let mut b = f
            .add_variable::<f64>("theta_layer_bounds", &["theta_layer", "nv"])
            .map_err(&e)?;
        let flat: Vec<f64> = p.layers.iter().flat_map(|l| [l[0], l[1]]).collect();
        b.put_values(&flat, ..).map_err(&e)?;
    }

    // Grid mapping and horizontal coordinates.
    {
        let mut v = f.add_variable::<i32>("crs", &[]).map_err(&e)?;
        match &p.grid.horizontal {
            Horizontal::LatLon { .. } => {
                v.put_attribute("grid_mapping_name", "latitude_longitude")
                    .map_err(&e)?;
            }
            Horizontal::Rotated { pole, .. } => {
                let (plat, plon, pgl) = pole.cf_north_pole();
                v.put_attribute("grid_mapping_name", "rotated_latitude_longitude")
                    .map_err(&e)?;
                v.put_attribute("grid_north_pole_latitude", plat)
                    .map_err(&e)?;
                v.put_attribute("grid_north_pole_longitude", plon)
                    .map_err(&e)?;
                v.put_attribute("north_pole_grid_longitude", pgl)
                    .map_err(&e)?;
            }
            Horizontal::Projected { proj, .. } => {
                match *proj {
                    Conformal::Mercator { lat_ts, lon0 } => {
                        v.put_attribute("grid_mapping_name", "mercator")
                            .map_err(&e)?;
                        v.put_attribute("standard_parallel", lat_ts).map_err(&e)?;
                        v.put_attribute("longitude_of_projection_origin", lon0)
                            .map_err(&e)?;
                    }
                    Conformal::PolarStereographic {
                        north,
                        lat_ts,
                        lon0,
                    } => {
                        v.put_attribute("grid_mapping_name", "polar_stereographic")
                            .map_err(&e)?;
                        v.put_attribute("straight_vertical_longitude_from_pole", lon0)
                            .map_err(&e)?;
                        v.put_attribute(
                            "latitude_of_projection_origin",
                            if north { 90.0 } else { -90.0 },
                        )
                        .map_err(&e)?;
                        // PROJ takes the hemisphere from the sign of standard_parallel.
                        let sp = if north { lat_ts.abs() } else { -lat_ts.abs() };
                        v.put_attribute("standard_parallel", sp).map_err(&e)?;
                    }
                    Conformal::Lambert {
                        lat1,
                        lat2,
                        lat0,
                        lon0,
                    } => {
                        v.put_attribute("grid_mapping_name", "lambert_conformal_conic")
                            .map_err(&e)?;
                        // Always two values: with one, readers take the origin at that
                        // parallel and drop latitude_of_projection_origin.
                        v.put_attribute("standard_parallel", vec![lat1, lat2])
                            .map_err(&e)?;
                        v.put_attribute("longitude_of_central_meridian", lon0)
                            .map_err(&e)?;
                        v.put_attribute("latitude_of_projection_origin", lat0)
                            .map_err(&e)?;
                    }
                }
                v.put_attribute("false_easting", 0.0).map_err(&e)?;
                v.put_attribute("false_northing", 0.0).map_err(&e)?;
            }
        }
        earth_attrs(&mut v, &p.grid.earth).map_err(&e)?;
    }
    match &p.grid.horizontal {
        Horizontal::LatLon { lat, lon, .. } => {
            let mut v = f.add_variable::<f64>("lat", &["lat"]).map_err(&e)?;
            v.put_attribute("standard_name", "latitude").map_err(&e)?;
            v.put_attribute("long_name", "latitude").map_err(&e)?;
            v.put_attribute("units", "degrees_north").map_err(&e)?;
            v.put_attribute("axis", "Y").map_err(&e)?;
            v.put_values(lat, ..).map_err(&e)?;
            let mut v = f.add_variable::<f64>("lon", &["lon"]).map_err(&e)?;
            v.put_attribute("standard_name", "longitude").map_err(&e)?;
            v.put_attribute("long_name", "longitude").map_err(&e)?;
            v.put_attribute("units", "degrees_east").map_err(&e)?;
            v.put_attribute("axis", "X").map_err(&e)?;
            v.put_values(lon, ..).map_err(&e)?;
        }
        Horizontal::Rotated { rlat, rlon, .. } => {
            let mut v = f.add_variable::<f64>("rlat", &["rlat"]).map_err(&e)?;
            v.put_attribute("standard_name", "grid_latitude")
                .map_err(&e)?;
            v.put_attribute("long_name", "latitude in the rotated grid")
                .map_err(&e)?;
            v.put_attribute("units", "degrees").map_err(&e)?;
            v.put_attribute("axis", "Y").map_err(&e)?;
            v.put_values(rlat, ..).map_err(&e)?;
            let mut v = f.add_variable::<f64>("rlon", &["rlon"]).map_err(&e)?;
            v.put_attribute("standard_name", "grid_longitude")
                .map_err(&e)?;
            v.put_attribute("long_name", "longitude in the rotated grid")
                .map_err(&e)?;
            v.put_attribute("units", "degrees").map_err(&e)?;
            v.put_attribute("axis", "X").map_err(&e)?;
            v.put_values(rlon, ..).map_err(&e)?;
        }
        Horizontal::Projected { x, y, .. } => {
            let mut v = f.add_variable::<f64>("y", &["y"]).map_err(&e)?;
            v.put_attribute("standard_name", "projection_y_coordinate")
                .map_err(&e)?;
            v.put_attribute("long_name", "y coordinate of the projection")
                .map_err(&e)?;
            v.put_attribute("units", "m").map_err(&e)?;
            v.put_attribute("axis", "Y").map_err(&e)?;
            v.put_values(y, ..).map_err(&e)?;
            let mut v = f.add_variable::<f64>("x", &["x"]).map_err(&e)?;
            v.put_attribute("standard_name", "projection_x_coordinate")
                .map_err(&e)?;
            v.put_attribute("long_name", "x coordinate of the projection")
                .map_err(&e)?;
            v.put_attribute("units", "m").map_err(&e)?;
            v.put_attribute("axis", "X").map_err(&e)?;
            v.put_values(x, ..).map_err(&e)?;
        }
    }
    if aux_latlon {
        for (name, std, units, arr) in [
            ("lat", "latitude", "degrees_north", &p.lat),
            ("lon", "longitude", "degrees_east", &p.lon),
        ] {
            let mut v = f.add_variable::<f64>(name, &[ydim, xdim]).map_err(&e)?;
            v.put_attribute("standard_name", std).map_err(&e)?;
            v.put_attribute("long_name", std).map_err(&e)?;
            v.put_attribute("units", units).map_err(&e)?;
            v.set_compression(p.deflate, true).map_err(&e)?;
            let data: Vec<f64> = arr.iter().copied().collect();
            v.put_values(&data, ..).map_err(&e)?;
        }
    }

    let coords = if aux_latlon {
        "reference_time lead_time lat lon"
    } else {
        "reference_time lead_time"
    };
    let mut direct = Vec::new();
    for prod in &p.fields {
        let spec = &prod.spec;
        let surface = prod.vertical == Vertical::Surface;
        let mut v = f
            .add_variable::<f32>(spec.name, &prod.vertical.dims(ydim, xdim))
            .map_err(&e)?;
        v.set_fill_value(FILL_F32).map_err(&e)?;
        if p.deflate > 0 {
            v.set_compression(p.deflate, true).map_err(&e)?;
        }
        if surface {
            v.set_chunking(&[1, ny, nx]).map_err(&e)?;
        } else {
            v.set_chunking(&[1, 1, ny, nx]).map_err(&e)?;
        }
        if let Some(s) = spec.standard_name {
            v.put_attribute("standard_name", s).map_err(&e)?;
        }
        v.put_attribute("long_name", spec.long_name).map_err(&e)?;
        v.put_attribute("units", spec.units).map_err(&e)?;
        v.put_attribute("grid_mapping", "crs").map_err(&e)?;
        if prod.vertical == Vertical::PressureLayer {
            v.put_attribute("coordinates", format!("{coords} p_layer_mid").as_str())
                .map_err(&e)?;
        } else {
            v.put_attribute("coordinates", coords).map_err(&e)?;
        }
        v.put_attribute("comment", spec.formula).map_err(&e)?;
        if prod.vertical == Vertical::ThetaLayer && spec.name == super::variables::LAYER_PV.name {
            v.put_attribute("cell_methods", "theta_layer: mean")
                .map_err(&e)?;
        }
        for (name, text) in &prod.notes {
            v.put_attribute(name, text.as_str()).map_err(&e)?;
        }
        if p.significant_bits < 23 {
            v.put_attribute("leeward_significant_bits", p.significant_bits as i32)
                .map_err(&e)?;
        }
        match &prod.values {
            // One level, no vertical dimension: through libnetcdf, which packs it.
            _ if surface => {
                let level = prod.level(0);
                let buf: Vec<f32> = level
                    .iter()
                    .map(|&x| {
                        if x.is_finite() {
                            bit_round(x, p.significant_bits)
                        } else {
                            FILL_F32
                        }
                    })
                    .collect();
                v.put_values(&buf, (0, .., ..)).map_err(&e)?;
            }
            Values::Plain(data) => {
                for (k, level) in data.outer_iter().enumerate() {
                    let buf: Vec<f32> = level
                        .iter()
                        .map(|&x| {
                            if x.is_finite() {
                                bit_round(x, p.significant_bits)
                            } else {
                                FILL_F32
                            }
                        })
                        .collect();
                    v.put_values(&buf, (0, k, .., ..)).map_err(&e)?;
                }
            }
            // Packed with the filters declared above: stored after the file is closed.
            Values::Packed(packed) => direct.push((spec.name, packed)),
        }
    }
    f.close().map_err(&e)?;
    if !direct.is_empty() {
        super::pack::write_chunks(path, &direct).map_err(|m| OutputError::NetCdf {
            path: path.to_path_buf(),
            source: netcdf::Error::from(m.as_str()),
        })?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bit_rounding_bounds_the_relative_error() {
        // Closed form: keeping n mantissa bits bounds the relative error by 2^-(n+1).
        for &x in &[1.0f32, 1.234_567, -2.7e-5, 287.05, 1.0e30, 1.2e-38] {
            for n in [7u32, 12, 16] {
                let y = bit_round(x, n);
                let rel = ((y - x) / x).abs();
                assert!(rel <= 2f32.powi(-(n as i32 + 1)) * 1.0001, "{x} {n}: {y}");
                assert_eq!(y.to_bits() & ((1 << (23 - n)) - 1), 0);
            }
        }
        assert!(bit_round(f32::NAN, 8).is_nan());
        assert_eq!(bit_round(1.5, 23), 1.5);
        // Ties go to even: 1 + 2^-8 with 7 bits kept is halfway between 1 and 1 + 2^-7.
        assert_eq!(bit_round(1.0 + 2f32.powi(-8), 7), 1.0);
    }
}
