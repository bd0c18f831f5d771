//! Where a step's fields are read from for its cyclones: its published file,
//! or its products as that file holds them (the same values, bit for bit:
//! bit-rounded, in the file's units, missing as NaN), so that the centres of a
//! step being written can be found while it is written.
//!
//! In: an open step file, or a step's products. Out: levels of its variables,
//! its coordinates, attributes, times and geography. Reading only.

use chrono::NaiveDateTime;
use ndarray::{Array2, Array3, Axis};

use crate::geometry::Horizontal;
use crate::output::cf::{file_names, Product, StepProducts, Values};
use crate::output::store::{read_level, read_values, times};
use crate::output::variables::{PVU, PV_UNITS};

/// A step's variables, from its file or from its products.
pub enum Source<'a> {
    /// A published step file, open.
    File(&'a netcdf::File),
    /// The products the file is written from.
    Made(&'a StepProducts),
}

/// Latitude and longitude of every point, whether the columns wrap, the earth's radius.
pub type Geography = (Array2<f64>, Array2<f64>, bool, f64);

impl Source<'_> {
    /// A variable of the file by its name in the file, and the level of the
    /// product it is (a variable of an isobaric layer is one level of its product).
    fn product<'p>(p: &'p StepProducts, name: &str) -> Option<(&'p Product, Option<usize>)> {
        p.fields.iter().find_map(|f| {
            let names = file_names(f, &p.p_layers);
            let k = names.iter().position(|n| n == name)?;
            Some((f, (names.len() > 1 || f.spec.name != name).then_some(k)))
        })
    }

    /// Level `k` (0 where None) of a float variable (time 0), missing as NaN.
    pub fn plane(&self, name: &str, level: Option<usize>) -> Option<Array2<f32>> {
        match self {
            Source::File(f) => read_level(&f.variable(name)?, level.unwrap_or(0)),
            Source::Made(p) => {
                let (prod, layer) = Self::product(p, name)?;
                let k = layer.or(level).unwrap_or(0);
                (k < prod.dim().0).then(|| published(prod, p, k))
            }
        }
    }

    /// Every level of a float variable (time 0), missing as NaN.
    pub fn whole(&self, name: &str) -> Option<Array3<f32>> {
        match self {
            Source::File(f) => read_values(&f.variable(name)?),
            Source::Made(p) => {
                let (prod, layer) = Self::product(p, name)?;
                let levels: Vec<usize> = match layer {
                    Some(k) => vec![k],
                    None => (0..prod.dim().0).collect(),
                };
                let planes: Vec<Array2<f32>> =
                    levels.iter().map(|&k| published(prod, p, k)).collect();
                let views: Vec<_> = planes.iter().map(|a| a.view()).collect();
                ndarray::stack(Axis(0), &views).ok()
            }
        }
    }

    /// The values of a vertical coordinate (`pressure` in Pa, `theta_level` in K,
    /// `pv_level` in PVU).
    pub fn coordinate(&self, name: &str) -> Vec<f64> {
        match self {
            Source::File(f) => {
                let k = if name == "pv_level" {
                    self.to_pvu(name)
                } else {
                    1.0
                };
                f.variable(name)
                    .and_then(|v| v.get_values::<f64, _>(..).ok())
                    .unwrap_or_default()
                    .iter()
                    .map(|x| x * k)
                    .collect()
            }
            Source::Made(p) => match name {
                "pressure" => p.levels.clone(),
                "theta_level" => p.theta_levels.clone(),
                "pv_level" => p.pv_levels.clone(),
                _ => Vec::new(),
            },
        }
    }

    /// What turns a PV variable's values into PVU: files give PV in SI units,
    /// K m2 kg-1 s-1 (1 PVU = 1e-6 of them); a scaled unit
    /// ("1e-6 K m2 kg-1 s-1") is PVU already.
    pub fn to_pvu(&self, name: &str) -> f64 {
        let units = match self {
            Source::File(f) => f.variable(name).and_then(|v| text(&v, "units")),
            Source::Made(p) => Self::product(p, name).map(|(f, _)| f.spec.units.to_string()),
        };
        match units {
            Some(u) if u.trim() == PV_UNITS => 1.0 / PVU,
            _ => 1.0,
        }
    }

    /// A text attribute of a variable.
    pub fn text(&self, var: &str, attr: &str) -> Option<String> {
        match self {
            Source::File(f) => text(&f.variable(var)?, attr),
            Source::Made(p) => {
                let (prod, _) = Self::product(p, var)?;
                prod.notes
                    .iter()
                    .find(|(k, _)| *k == attr)
                    .map(|(_, v)| v.clone())
            }
        }
    }

    /// A numeric attribute of a variable.
    pub fn number(&self, var: &str, attr: &str) -> Option<f64> {
        match self {
            Source::File(f) => number(&f.variable(var)?, attr),
            Source::Made(p) => {
                let (prod, _) = Self::product(p, var)?;
                let n = prod.numbers.iter().find(|(k, _)| *k == attr);
                n.map(|(_, x)| *x)
                    .or_else(|| self.text(var, attr)?.trim().parse().ok())
            }
        }
    }

    /// Reference and valid time.
    pub fn times(&self) -> Option<(NaiveDateTime, NaiveDateTime)> {
        match self {
            Source::File(f) => times(f),
            Source::Made(p) => Some((p.reference_time, p.valid_time)),
        }
    }

    /// Latitude and longitude of every point, whether the columns wrap, the earth's radius.
    pub fn geography(&self) -> Option<Geography> {
        match self {
            Source::File(f) => geography(f),
            Source::Made(p) => {
                let e = &p.grid.earth;
                let radius = if e.is_sphere() {
                    e.a
                } else {
                    // The IUGG mean radius (2a + b)/3, as leeward's own derivatives use.
                    (2.0 * e.a + e.b) / 3.0
                };
                // A regular grid's file holds its axes: the points' coordinates are
                // taken from them, as a reader of the file takes them.
                Some(match &p.grid.horizontal {
                    Horizontal::LatLon { lat, lon, .. } => {
                        let (la, lo) = from_axes(lat, lon);
                        (la, lo, periodic(lon), radius)
                    }
                    _ => (p.lat.clone(), p.lon.clone(), false, radius),
                })
            }
        }
    }
}

/// Level `k` of a product as the file holds it, missing as NaN.
fn published(prod: &Product, p: &StepProducts, k: usize) -> Array2<f32> {
    let a = prod.published_level(k, p.kept_bits.bits(prod.spec.name));
    match prod.values {
        // Packed levels come back with the fill value as NaN already.
        Values::Packed(_) => a,
        Values::Plain(_) => a.mapv(|x| if x.is_finite() { x } else { f32::NAN }),
    }
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

fn values(f: &netcdf::File, name: &str) -> Vec<f64> {
    f.variable(name)
        .and_then(|v| v.get_values::<f64, _>(..).ok())
        .unwrap_or_default()
}

/// Whether columns of these longitudes (degrees, evenly spaced) go once round the earth.
fn periodic(lo: &[f64]) -> bool {
    let nx = lo.len();
    let d = if nx > 1 {
        (lo[1] - lo[0] + 540.0).rem_euclid(360.0) - 180.0
    } else {
        0.0
    };
    nx >= 3 && (d * nx as f64 - 360.0).abs() < 0.5 * d.abs()
}

/// Latitude and longitude of every point of a grid with these axes.
fn from_axes(la: &[f64], lo: &[f64]) -> (Array2<f64>, Array2<f64>) {
    let (ny, nx) = (la.len(), lo.len());
    (
        Array2::from_shape_fn((ny, nx), |(j, _)| la[j]),
        Array2::from_shape_fn((ny, nx), |(_, i)| lo[i]),
    )
}

/// [`Source::geography`] of a file.
fn geography(f: &netcdf::File) -> Option<Geography> {
    let (la, lo) = (values(f, "lat"), values(f, "lon"));
    let var = f.variable("lat")?;
    let (lat, lon, periodic) = if var.dimensions().len() == 1 {
        let (lat, lon) = from_axes(&la, &lo);
        (lat, lon, periodic(&lo))
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
