//! CF-1.11 NetCDF-4 writing of one step's products.
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

pub use super::pack::{bit_round, FILL_F32};

/// Version of the file layout, in the global attribute `leeward_layout`: the
/// changes in time read and add to published files of this layout only (2:
/// longitudes in one range, PV in SI units, the isobaric layer coordinate,
/// the member as a `realization` coordinate).
pub const LAYOUT: i32 = 2;

/// Name of the CF 1.11 quantization container variable (section 8.4).
pub const QUANTIZATION: &str = "quantization_info";

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
    /// Name of the institution that made the input (`output.institutions`,
    /// else [`institution`] of the centre).
    pub institution: String,
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
    /// Mantissa bits kept by each data variable (1-23; 23 keeps it exact).
    pub kept_bits: super::precision::KeptBits,
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
    /// Isobaric layers: in the file one variable per layer, `<name>_<bottom>_<top>`,
    /// on its own coordinate `p_layer_<bottom>_<top>` with the layer as bounds
    /// (layers may overlap, which one coordinate with bounds cannot hold).
    PressureLayer,
    /// A single field (mean sea-level pressure, a layer's mean): (time, y, x);
    /// one that describes an isobaric layer ([`Product::layer`]) is written on
    /// that layer's coordinate `p_layer_<bottom>_<top>` of length 1, as the
    /// thickness layers are: `(time, p_layer_<bottom>_<top>, y, x)`.
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

/// `<bottom>_<top>` in hPa of an isobaric layer given in Pa, as it ends the
/// names of its variables (`1000_500`; a fraction as `p`: `962p5_500`).
pub fn layer_suffix(layer: [f64; 2]) -> String {
    let hpa = |pa: f64| format!("{}", pa / 100.0).replace('.', "p");
    format!("{}_{}", hpa(layer[0]), hpa(layer[1]))
}

/// The vertical coordinate (and dimension) of one isobaric layer.
pub fn layer_coordinate(layer: [f64; 2]) -> String {
    format!("p_layer_{}", layer_suffix(layer))
}

/// The names a product has in the file: its own, or one per isobaric layer.
pub fn file_names(prod: &Product, p_layers: &[[f64; 2]]) -> Vec<String> {
    if prod.vertical == Vertical::PressureLayer {
        p_layers
            .iter()
            .take(prod.dim().0)
            .map(|l| format!("{}_{}", prod.spec.name, layer_suffix(*l)))
            .collect()
    } else {
        vec![prod.spec.name.to_string()]
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
    /// Further numeric attributes of this variable (name, value).
    pub numbers: Vec<(&'static str, f64)>,
    /// The isobaric layer (bottom, top; Pa) a single field describes (a layer
    /// mean, or a quantity of the layer's ends), if any: its vertical
    /// coordinate in the file ([`Product::vertical_name`]).
    pub layer: Option<[f64; 2]>,
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
        Product::of(spec, vertical, Values::Plain(data))
    }

    /// A product of `values`, plain or packed, with no further attributes.
    pub fn of(spec: VarSpec, vertical: Vertical, values: Values) -> Self {
        Product {
            spec,
            vertical,
            values,
            notes: Vec::new(),
            numbers: Vec::new(),
            layer: None,
        }
    }

    /// A product of values that stay in use elsewhere: packed at once from
    /// a borrow when `out` deflates (no copy of the plain values), else copied.
    pub fn packed_copy(
        spec: VarSpec,
        vertical: Vertical,
        data: &Array3<f32>,
        out: &crate::config::settings::Output,
    ) -> Self {
        let values = if out.deflate_level > 0 {
            Values::Packed(super::pack::Packed::new(
                data,
                out.kept_bits().bits(spec.name),
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
            numbers: Vec::new(),
            layer: None,
        }
    }

    /// Its vertical dimension in the file: the coordinate of its isobaric layer
    /// for a single field of a layer, none ("") for another single field, else
    /// that of its vertical coordinate (a product on isobaric layers has one
    /// per layer, named by [`layer_coordinate`]).
    pub fn vertical_name(&self) -> String {
        match (self.vertical, self.layer) {
            (Vertical::Surface, Some(l)) => layer_coordinate(l),
            (v, _) => v.dim().to_string(),
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

    /// Number of points with a value (not missing).
    pub fn valid_points(&self) -> usize {
        match &self.values {
            Values::Plain(a) => a.iter().filter(|x| x.is_finite()).count(),
            Values::Packed(p) => p.valid,
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

    /// Level `k` as a reader of the file gets it (see [`Product::published`]).
    pub fn published_level(&self, k: usize, nsb: u32) -> Array2<f32> {
        match &self.values {
            Values::Plain(a) => a
                .index_axis(ndarray::Axis(0), k)
                .mapv(|x| bit_round(x, nsb)),
            Values::Packed(p) => p.level(k),
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

/// Products with at least one valid point, and (name, why) of those without:
/// a file holds nothing that holds no value.
pub fn leave_out_empty(fields: Vec<Product>) -> (Vec<Product>, Vec<(String, String)>) {
    let mut kept = Vec::with_capacity(fields.len());
    let mut out = Vec::new();
    for f in fields {
        if f.valid_points() > 0 {
            kept.push(f);
        } else {
            out.push((f.spec.name.to_string(), why_empty(&f).to_string()));
        }
    }
    (kept, out)
}

/// Why a product has no valid point, from what its vertical coordinate needs.
fn why_empty(f: &Product) -> &'static str {
    match (f.vertical, f.spec.name) {
        (Vertical::Pressure, "stab" | "n2" | "pv") => {
            "every point is missing: a vertical derivative needs two or more isobaric levels with values"
        }
        (Vertical::Theta, _) => {
            "every point is missing: no configured isentropic surface lies between two isobaric levels of a stable layer"
        }
        (Vertical::PvSurface, _) => {
            "every point is missing: no column crosses a configured PV surface"
        }
        (Vertical::ThetaLayer, _) => {
            "every point is missing: no column holds both bounding surfaces of a configured isentropic layer"
        }
        (Vertical::PressureLayer, _) => {
            "every point is missing: no point has values at both bounding levels of a configured layer"
        }
        _ => "every point is missing (masked below ground or not computable from the input)",
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
        255 => "an originating centre the input does not name (WMO common code table C-11: 255, missing)".into(),
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

/// Write `p` to `dir/name` atomically (temporary, fsync, rename).
pub fn write_step(dir: &Path, name: &str, p: &StepProducts) -> Result<PathBuf, OutputError> {
    let final_path = dir.join(name);
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
    let result = super::publish_atomically(
        &final_path,
        "partial",
        |tmp| write_file(tmp, p),
        |path, source| OutputError::Io {
            path: path.to_path_buf(),
            source,
        },
    );
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
    let direct = write_contents(&mut f, p).map_err(&e)?;
    f.close().map_err(&e)?;
    if !direct.is_empty() {
        let refs: Vec<(&str, &super::pack::Packed)> =
            direct.iter().map(|(n, x)| (n.as_str(), x)).collect();
        super::pack::write_chunks(path, &refs).map_err(|m| OutputError::NetCdf {
            path: path.to_path_buf(),
            source: netcdf::Error::from(m.as_str()),
        })?;
    }
    Ok(())
}

/// Everything of the file but the packed chunks, which are returned to be
/// stored once the file is closed.
fn write_contents(
    f: &mut netcdf::FileMut,
    p: &StepProducts,
) -> netcdf::Result<Vec<(String, super::pack::Packed)>> {
    global_attributes(f, p)?;
    let (ydim, xdim, aux_latlon) = horizontal_dims(&p.grid);
    f.add_dimension("time", 1)?;
    f.add_dimension(ydim, p.grid.ny())?;
    f.add_dimension(xdim, p.grid.nx())?;
    time_coordinates(f, p)?;
    vertical_coordinates(f, p)?;
    grid_mapping(f, p)?;
    horizontal_coordinates(f, p, aux_latlon)?;
    let mut coords = String::from("reference_time lead_time");
    if let Some(m) = p.member {
        let mut v = f.add_variable::<i32>("realization", &[])?;
        v.put_attribute("standard_name", "realization")?;
        v.put_attribute("long_name", "ensemble member number")?;
        v.put_attribute("units", "1")?;
        v.put_value(i32::from(m), ..)?;
        coords.push_str(" realization");
    }
    if aux_latlon {
        coords.push_str(" lat lon");
    }
    if p.fields.iter().any(|x| p.kept_bits.bits(x.spec.name) < 23) {
        quantization_container(f)?;
    }
    let mut direct = Vec::new();
    for prod in &p.fields {
        if prod.vertical == Vertical::PressureLayer {
            for (k, layer) in p.p_layers.iter().enumerate().take(prod.dim().0) {
                let target = Target {
                    name: format!("{}_{}", prod.spec.name, layer_suffix(*layer)),
                    vertical: layer_coordinate(*layer),
                    level: Some(k),
                    layer: Some(*layer),
                };
                direct.extend(data_variable(f, p, prod, &target, &coords)?);
            }
        } else {
            let target = Target {
                name: prod.spec.name.to_string(),
                vertical: prod.vertical_name(),
                level: None,
                layer: None,
            };
            direct.extend(data_variable(f, p, prod, &target, &coords)?);
        }
    }
    Ok(direct)
}

/// Where a product (or one level of it) goes in the file.
pub struct Target {
    /// Variable name.
    pub name: String,
    /// Its vertical dimension.
    pub vertical: String,
    /// The product's level it holds, when it holds one only.
    pub level: Option<usize>,
    /// The isobaric layer it holds (Pa), if it is one.
    pub layer: Option<[f64; 2]>,
}

/// Declare, describe and fill one data variable; packed levels are returned
/// to be stored once the file is closed.
fn data_variable(
    f: &mut netcdf::FileMut,
    p: &StepProducts,
    prod: &Product,
    t: &Target,
    coords: &str,
) -> netcdf::Result<Option<(String, super::pack::Packed)>> {
    let (ydim, xdim, _) = horizontal_dims(&p.grid);
    let mut v = f.add_variable::<f32>(&t.name, &target_dims(t, ydim, xdim))?;
    declare_storage(&mut v, p.deflate, p.grid.shape())?;
    let nsb = p.kept_bits.bits(prod.spec.name);
    describe_variable(&mut v, prod, coords, nsb, t.layer)?;
    if t.vertical.is_empty() {
        // One level, no vertical dimension: packed as its chunk, or through
        // libnetcdf, which packs it.
        if let Values::Packed(packed) = &prod.values {
            return Ok(Some((t.name.clone(), packed.levels(&[0]))));
        }
        let buf: Vec<f32> = prod.level(0).iter().map(|&x| stored(x, nsb)).collect();
        v.put_values(&buf, (0, .., ..))?;
        return Ok(None);
    }
    let levels: Vec<usize> = match t.level {
        Some(k) => vec![k],
        None => (0..prod.dim().0).collect(),
    };
    match &prod.values {
        Values::Plain(data) => {
            for (n, &k) in levels.iter().enumerate() {
                let buf: Vec<f32> = data
                    .index_axis(ndarray::Axis(0), k)
                    .iter()
                    .map(|&x| stored(x, nsb))
                    .collect();
                v.put_values(&buf, (0, n, .., ..))?;
            }
            Ok(None)
        }
        // Packed with the filters declared above: stored after the file is closed.
        Values::Packed(packed) => Ok(Some((t.name.clone(), packed.levels(&levels)))),
    }
}

/// The dimensions of a target variable: (time, y, x) for a single field with
/// no vertical dimension, (time, vertical, y, x) otherwise.
pub fn target_dims<'a>(t: &'a Target, ydim: &'a str, xdim: &'a str) -> Vec<&'a str> {
    if t.vertical.is_empty() {
        vec!["time", ydim, xdim]
    } else {
        vec!["time", t.vertical.as_str(), ydim, xdim]
    }
}

/// A value as the file stores it: bit-rounded, the fill value where missing.
pub fn stored(x: f32, nsb: u32) -> f32 {
    if x.is_finite() {
        bit_round(x, nsb)
    } else {
        FILL_F32
    }
}

/// Names of the horizontal dimensions (y, x) and whether latitude and
/// longitude are 2-D auxiliary coordinates.
fn horizontal_dims(g: &Grid) -> (&'static str, &'static str, bool) {
    match &g.horizontal {
        Horizontal::LatLon { .. } => ("lat", "lon", false),
        Horizontal::Rotated { .. } => ("rlat", "rlon", true),
        Horizontal::Projected { .. } => ("y", "x", true),
    }
}

fn global_attributes(f: &mut netcdf::FileMut, p: &StepProducts) -> netcdf::Result<()> {
    f.add_attribute("Conventions", "CF-1.11")?;
    f.add_attribute("title", "leeward dynamical diagnostics on isobaric levels")?;
    f.add_attribute("institution", p.institution.as_str())?;
    let source = format!(
        "GRIB2 output of {} on a {} grid, processed by leeward {}",
        p.institution,
        p.grid.describe(),
        env!("CARGO_PKG_VERSION")
    );
    f.add_attribute("source", source.as_str())?;
    let history = format!(
        "{} leeward {}: diagnostics computed on the model grid from {}",
        chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ"),
        env!("CARGO_PKG_VERSION"),
        p.inputs.join(", ")
    );
    f.add_attribute("history", history.as_str())?;
    f.add_attribute(
        "references",
        "WMO-No. 306 Manual on Codes (GRIB2); CF Conventions 1.11; Holton, An Introduction to Dynamic Meteorology; Bluestein 1992, Synoptic-Dynamic Meteorology in Midlatitudes; Snyder 1987, USGS Professional Paper 1395",
    )?;
    f.add_attribute("comment", CAUTION)?;
    f.add_attribute("leeward_below_ground_masking", p.masking.as_str())?;
    f.add_attribute("leeward_wind_components", p.winds.as_str())?;
    f.add_attribute("leeward_grid_id", p.grid_id.as_str())?;
    f.add_attribute("leeward_centre", i32::from(p.centre))?;
    f.add_attribute("leeward_layout", LAYOUT)?;
    Ok(())
}

fn time_coordinates(f: &mut netcdf::FileMut, p: &StepProducts) -> netcdf::Result<()> {
    let hours_since = format!(
        "hours since {}",
        p.reference_time.format("%Y-%m-%d %H:%M:%S")
    );
    let lead_h = (p.valid_time - p.reference_time).num_seconds() as f64 / 3600.0;
    // Model times count no leap seconds (CF 1.11 section 4.4.3).
    let mut v = f.add_variable::<f64>("time", &["time"])?;
    v.put_attribute("standard_name", "time")?;
    v.put_attribute("long_name", "valid time")?;
    v.put_attribute("units", hours_since.as_str())?;
    v.put_attribute("calendar", "proleptic_gregorian")?;
    v.put_attribute("units_metadata", "leap_seconds: none")?;
    v.put_attribute("axis", "T")?;
    v.put_values(&[lead_h], ..)?;
    let mut v = f.add_variable::<f64>("reference_time", &[])?;
    v.put_attribute("standard_name", "forecast_reference_time")?;
    v.put_attribute("long_name", "reference time of the model cycle")?;
    v.put_attribute("units", hours_since.as_str())?;
    v.put_attribute("calendar", "proleptic_gregorian")?;
    v.put_attribute("units_metadata", "leap_seconds: none")?;
    v.put_value(0.0f64, ..)?;
    let mut v = f.add_variable::<f64>("lead_time", &[])?;
    v.put_attribute("standard_name", "forecast_period")?;
    v.put_attribute("long_name", "time since the reference time")?;
    v.put_attribute("units", "hours")?;
    v.put_value(lead_h, ..)?;
    Ok(())
}

/// A vertical coordinate: its dimension, the variable and its bounds if any.
struct VerticalCoord<'a> {
    name: &'static str,
    standard_name: &'static str,
    long_name: &'static str,
    units: &'static str,
    positive: &'static str,
    values: Vec<f64>,
    bounds: Option<&'a [[f64; 2]]>,
    comment: Option<&'static str>,
}

fn vertical_coordinate(
    f: &mut netcdf::FileMut,
    c: &VerticalCoord<'_>,
    name: &str,
) -> netcdf::Result<()> {
    f.add_dimension(name, c.values.len())?;
    let bounds_name = format!("{name}_bounds");
    if c.bounds.is_some() && f.dimension("nv").is_none() {
        f.add_dimension("nv", 2)?;
    }
    let mut v = f.add_variable::<f64>(name, &[name])?;
    v.put_attribute("standard_name", c.standard_name)?;
    v.put_attribute("long_name", c.long_name)?;
    v.put_attribute("units", c.units)?;
    if let Some(m) = super::variables::units_metadata(c.units, Some(c.standard_name)) {
        v.put_attribute("units_metadata", m)?;
    }
    v.put_attribute("positive", c.positive)?;
    v.put_attribute("axis", "Z")?;
    if let Some(t) = c.comment {
        v.put_attribute("comment", t)?;
    }
    if c.bounds.is_some() {
        v.put_attribute("bounds", bounds_name.as_str())?;
    }
    v.put_values(&c.values, ..)?;
    if let Some(b) = c.bounds {
        let mut bv = f.add_variable::<f64>(&bounds_name, &[name, "nv"])?;
        let flat: Vec<f64> = b.iter().flat_map(|l| [l[0], l[1]]).collect();
        bv.put_values(&flat, ..)?;
    }
    Ok(())
}

fn vertical_coordinates(f: &mut netcdf::FileMut, p: &StepProducts) -> netcdf::Result<()> {
    let uses = |v: Vertical| p.fields.iter().any(|x| x.vertical == v);
    let mid = |l: &[[f64; 2]]| l.iter().map(|l| 0.5 * (l[0] + l[1])).collect::<Vec<_>>();
    let mut coords = Vec::new();
    if !p.levels.is_empty() {
        coords.push(VerticalCoord {
            name: "pressure",
            standard_name: "air_pressure",
            long_name: "pressure of the isobaric level",
            units: "Pa",
            positive: "down",
            values: p.levels.clone(),
            bounds: None,
            comment: None,
        });
    }
    if uses(Vertical::Theta) && !p.theta_levels.is_empty() {
        coords.push(VerticalCoord {
            name: "theta_level",
            standard_name: "air_potential_temperature",
            long_name: "potential temperature of the isentropic surface",
            units: "K",
            positive: "up",
            values: p.theta_levels.clone(),
            bounds: None,
            comment: None,
        });
    }
    if uses(Vertical::PvSurface) && !p.pv_levels.is_empty() {
        coords.push(VerticalCoord {
            name: "pv_level",
            standard_name: "ertel_potential_vorticity",
            long_name: "magnitude of Ertel potential vorticity on the surface (1 PVU = 1e-6 K m2 kg-1 s-1)",
            units: super::variables::PV_UNITS,
            positive: "up",
            values: p.pv_levels.iter().map(|&x| super::variables::pvu_to_si(x)).collect(),
            bounds: None,
            comment: Some(
                "the surface is PV = +value north of the equator and PV = -value south of it",
            ),
        });
    }
    let mut one_layer: Vec<(String, [[f64; 2]; 1])> = if uses(Vertical::PressureLayer) {
        p.p_layers
            .iter()
            .map(|l| (layer_coordinate(*l), [*l]))
            .collect()
    } else {
        Vec::new()
    };
    // The layers of single fields, each once (a thickness layer may be one of them).
    for l in p.fields.iter().filter(|x| x.vertical == Vertical::Surface) {
        if let Some(l) = l.layer {
            let name = layer_coordinate(l);
            if !one_layer.iter().any(|(n, _)| *n == name) {
                one_layer.push((name, [l]));
            }
        }
    }
    if uses(Vertical::ThetaLayer) && !p.layers.is_empty() {
        coords.push(VerticalCoord {
            name: "theta_layer",
            standard_name: "air_potential_temperature",
            long_name: "potential temperature at the middle of the isentropic layer",
            units: "K",
            positive: "up",
            values: mid(&p.layers),
            bounds: Some(&p.layers),
            comment: None,
        });
    }
    for c in &coords {
        vertical_coordinate(f, c, c.name)?;
    }
    for (name, layer) in &one_layer {
        let c = VerticalCoord {
            name: "p_layer",
            standard_name: "air_pressure",
            long_name:
                "pressure at the middle of the isobaric layer; its bottom and top are the bounds",
            units: "Pa",
            positive: "down",
            values: vec![0.5 * (layer[0][0] + layer[0][1])],
            bounds: Some(layer),
            comment: None,
        };
        vertical_coordinate(f, &c, name)?;
    }
    Ok(())
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

/// An angle as written: -0 as 0 (readers print "-0" otherwise).
fn angle(x: f64) -> f64 {
    x + 0.0
}

fn grid_mapping(f: &mut netcdf::FileMut, p: &StepProducts) -> netcdf::Result<()> {
    let mut v = f.add_variable::<i32>("crs", &[])?;
    match &p.grid.horizontal {
        Horizontal::LatLon { .. } => {
            v.put_attribute("grid_mapping_name", "latitude_longitude")?;
        }
        Horizontal::Rotated { pole, .. } => {
            let (plat, plon, pgl) = pole.cf_north_pole();
            v.put_attribute("grid_mapping_name", "rotated_latitude_longitude")?;
            v.put_attribute("grid_north_pole_latitude", angle(plat))?;
            v.put_attribute("grid_north_pole_longitude", angle(plon))?;
            v.put_attribute("north_pole_grid_longitude", angle(pgl))?;
        }
        Horizontal::Projected { proj, .. } => {
            match *proj {
                Conformal::Mercator { lat_ts, lon0 } => {
                    v.put_attribute("grid_mapping_name", "mercator")?;
                    v.put_attribute("standard_parallel", angle(lat_ts))?;
                    v.put_attribute("longitude_of_projection_origin", angle(lon0))?;
                }
                Conformal::PolarStereographic {
                    north,
                    lat_ts,
                    lon0,
                } => {
                    v.put_attribute("grid_mapping_name", "polar_stereographic")?;
                    v.put_attribute("straight_vertical_longitude_from_pole", angle(lon0))?;
                    let origin = if north { 90.0 } else { -90.0 };
                    v.put_attribute("latitude_of_projection_origin", origin)?;
                    // PROJ takes the hemisphere from the sign of standard_parallel.
                    let sp = if north { lat_ts.abs() } else { -lat_ts.abs() };
                    v.put_attribute("standard_parallel", sp)?;
                }
                Conformal::Lambert {
                    lat1,
                    lat2,
                    lat0,
                    lon0,
                } => {
                    v.put_attribute("grid_mapping_name", "lambert_conformal_conic")?;
                    // Always two values: with one, readers take the origin at that
                    // parallel and drop latitude_of_projection_origin.
                    v.put_attribute("standard_parallel", vec![angle(lat1), angle(lat2)])?;
                    v.put_attribute("longitude_of_central_meridian", angle(lon0))?;
                    v.put_attribute("latitude_of_projection_origin", angle(lat0))?;
                }
            }
            v.put_attribute("false_easting", 0.0)?;
            v.put_attribute("false_northing", 0.0)?;
        }
    }
    earth_attrs(&mut v, &p.grid.earth)
}

/// A 1-D horizontal coordinate variable.
fn axis_coordinate(
    f: &mut netcdf::FileMut,
    name: &str,
    attrs: [(&str, &str); 3],
    axis: &str,
    values: &[f64],
) -> netcdf::Result<()> {
    let mut v = f.add_variable::<f64>(name, &[name])?;
    for (k, t) in attrs {
        v.put_attribute(k, t)?;
    }
    v.put_attribute("axis", axis)?;
    v.put_values(values, ..)
}

fn horizontal_coordinates(
    f: &mut netcdf::FileMut,
    p: &StepProducts,
    aux_latlon: bool,
) -> netcdf::Result<()> {
    let (ydim, xdim, _) = horizontal_dims(&p.grid);
    let (yattrs, xattrs, y, x) = match &p.grid.horizontal {
        Horizontal::LatLon { lat, lon, .. } => (
            [
                ("standard_name", "latitude"),
                ("long_name", "latitude"),
                ("units", "degrees_north"),
            ],
            [
                ("standard_name", "longitude"),
                ("long_name", "longitude"),
                ("units", "degrees_east"),
            ],
            lat,
            lon,
        ),
        Horizontal::Rotated { rlat, rlon, .. } => (
            [
                ("standard_name", "grid_latitude"),
                ("long_name", "latitude in the rotated grid"),
                ("units", "degrees"),
            ],
            [
                ("standard_name", "grid_longitude"),
                ("long_name", "longitude in the rotated grid"),
                ("units", "degrees"),
            ],
            rlat,
            rlon,
        ),
        Horizontal::Projected { x, y, .. } => (
            [
                ("standard_name", "projection_y_coordinate"),
                ("long_name", "y coordinate of the projection"),
                ("units", "m"),
            ],
            [
                ("standard_name", "projection_x_coordinate"),
                ("long_name", "x coordinate of the projection"),
                ("units", "m"),
            ],
            y,
            x,
        ),
    };
    axis_coordinate(f, ydim, yattrs, "Y", y)?;
    axis_coordinate(f, xdim, xattrs, "X", x)?;
    if aux_latlon {
        for (name, std, units, arr) in [
            ("lat", "latitude", "degrees_north", &p.lat),
            ("lon", "longitude", "degrees_east", &p.lon),
        ] {
            let mut v = f.add_variable::<f64>(name, &[ydim, xdim])?;
            v.put_attribute("standard_name", std)?;
            v.put_attribute("long_name", std)?;
            v.put_attribute("units", units)?;
            v.set_compression(p.deflate, true)?;
            let data: Vec<f64> = arr.iter().copied().collect();
            v.put_values(&data, ..)?;
        }
    }
    Ok(())
}

/// The CF quantization container (section 8.4): how the data values were
/// bit-rounded, for every data variable that points to it.
pub fn quantization_container(f: &mut netcdf::FileMut) -> netcdf::Result<()> {
    if f.variable(QUANTIZATION).is_some() {
        return Ok(());
    }
    let mut v = f.add_variable::<i32>(QUANTIZATION, &[])?;
    v.put_attribute(
        "long_name",
        "how the data values were rounded before compression (CF quantization container)",
    )?;
    v.put_attribute("algorithm", "bitround")?;
    v.put_attribute(
        "implementation",
        format!(
            "leeward version {} (round to nearest, ties to even; Kloewer et al. 2021)",
            env!("CARGO_PKG_VERSION")
        )
        .as_str(),
    )?;
    Ok(())
}

/// Chunks of one level and the filters the packed chunks were made with
/// (a variable with no vertical dimension is one chunk of (time, y, x)).
pub fn declare_storage(
    v: &mut netcdf::VariableMut<'_>,
    deflate: i32,
    (ny, nx): (usize, usize),
) -> netcdf::Result<()> {
    v.set_fill_value(FILL_F32)?;
    if deflate > 0 {
        v.set_compression(deflate, true)?;
    }
    if v.dimensions().len() == 3 {
        v.set_chunking(&[1, ny, nx])
    } else {
        v.set_chunking(&[1, 1, ny, nx])
    }
}

/// The attributes of a data variable: names and units from its spec, the grid
/// mapping, coordinates, its notes, and how its values were rounded. Written
/// again over an existing variable, they replace what it said.
pub fn describe_variable(
    v: &mut netcdf::VariableMut<'_>,
    prod: &Product,
    coords: &str,
    nsb: u32,
    layer: Option<[f64; 2]>,
) -> netcdf::Result<()> {
    let spec = &prod.spec;
    if let Some(s) = spec.standard_name {
        v.put_attribute("standard_name", s)?;
    }
    let long_name = match layer {
        Some(l) => format!("{}, {}-{} hPa", spec.long_name, l[0] / 100.0, l[1] / 100.0),
        None => spec.long_name.to_string(),
    };
    v.put_attribute("long_name", long_name.as_str())?;
    v.put_attribute("units", spec.units)?;
    if let Some(m) = super::variables::units_metadata(spec.units, spec.standard_name) {
        v.put_attribute("units_metadata", m)?;
    }
    v.put_attribute("grid_mapping", "crs")?;
    v.put_attribute("coordinates", coords)?;
    v.put_attribute("comment", spec.formula)?;
    if prod.vertical == Vertical::ThetaLayer && spec.name == super::variables::LAYER_PV.name {
        v.put_attribute("cell_methods", "theta_layer: mean")?;
    }
    for (name, text) in &prod.notes {
        v.put_attribute(name, text.as_str())?;
    }
    for (name, x) in &prod.numbers {
        v.put_attribute(name, *x)?;
    }
    if nsb < 23 {
        let nsb = nsb as i32;
        v.put_attribute("quantization", QUANTIZATION)?;
        v.put_attribute("quantization_nsb", nsb)?;
        // Not libnetcdf's own `_QuantizeBitRoundNumberOfSignificantBits`: names
        // beginning with "_" belong to the library, which writes that one when
        // it rounds itself, and both CF checkers (IOOS, NCAS) refuse it.
    }
    Ok(())
}
