//! Grids and their geometry: where each point is on the earth, how far apart
//! neighbours are, and how grid axes turn against east and north.
//!
//! In: a [`Grid`] built by `ingest::grid` from a GRIB2 grid definition.
//! Out: latitudes, longitudes, Coriolis parameter, map factors, wind rotation
//! angles, and the derivative operators of [`ops`]. This module knows nothing
//! of GRIB2 or NetCDF, and never panics on a well-formed `Grid`.
//!
//! Every grid is held in one orientation: row 0 is the southernmost (smallest
//! y), column 0 the westernmost (smallest x), whatever the file's scanning mode.

pub mod longitude;
pub mod ops;
pub mod projection;

use ndarray::Array2;

pub use longitude::LongitudeRange;
pub use projection::{gaussian_latitudes, Conformal, Earth, RotatedPole};

use crate::diagnostics::constants::OMEGA;

/// The horizontal layout of a grid.
#[derive(Debug, Clone, PartialEq)]
pub enum Horizontal {
    /// Regular (template 3.0) or Gaussian (3.40) latitude/longitude.
    LatLon {
        /// Latitudes of the rows, degrees north, ascending.
        lat: Vec<f64>,
        /// Longitudes of the columns, degrees east, ascending, in [-180, 180) or
        /// [0, 360) (a limited area wider than both ascends past 180).
        lon: Vec<f64>,
        /// For a Gaussian grid, its N (latitudes between pole and equator).
        gaussian: Option<usize>,
    },
    /// Rotated latitude/longitude (template 3.1).
    Rotated {
        /// Rotated latitudes of the rows, degrees, ascending.
        rlat: Vec<f64>,
        /// Rotated longitudes of the columns, degrees, ascending, in one range as `lon` above.
        rlon: Vec<f64>,
        /// The rotation.
        pole: RotatedPole,
    },
    /// A conformal projection (templates 3.10, 3.20, 3.30) with plane coordinates.
    Projected {
        /// The projection.
        proj: Conformal,
        /// Plane x of the columns, metres, ascending.
        x: Vec<f64>,
        /// Plane y of the rows, metres, ascending.
        y: Vec<f64>,
    },
}

/// A grid: the earth it lives on and its horizontal layout.
#[derive(Debug, Clone, PartialEq)]
pub struct Grid {
    /// Figure of the earth, from GRIB2 code table 3.2.
    pub earth: Earth,
    /// Rows and columns.
    pub horizontal: Horizontal,
    /// GRIB2 grid definition template number it came from.
    pub template: u16,
}

impl Grid {
    /// Number of columns.
    pub fn nx(&self) -> usize {
        match &self.horizontal {
            Horizontal::LatLon { lon, .. } => lon.len(),
            Horizontal::Rotated { rlon, .. } => rlon.len(),
            Horizontal::Projected { x, .. } => x.len(),
        }
    }

    /// Number of rows.
    pub fn ny(&self) -> usize {
        match &self.horizontal {
            Horizontal::LatLon { lat, .. } => lat.len(),
            Horizontal::Rotated { rlat, .. } => rlat.len(),
            Horizontal::Projected { y, .. } => y.len(),
        }
    }

    /// Shape as (rows, columns).
    pub fn shape(&self) -> (usize, usize) {
        (self.ny(), self.nx())
    }

    /// True when the columns wrap all the way round in (rotated) longitude, so
    /// that the last column neighbours the first.
    pub fn periodic(&self) -> bool {
        let lon = match &self.horizontal {
            Horizontal::LatLon { lon, .. } => lon,
            Horizontal::Rotated { rlon, .. } => rlon,
            Horizontal::Projected { .. } => return false,
        };
        if lon.len() < 3 {
            return false;
        }
        let d = (lon[lon.len() - 1] - lon[0]) / (lon.len() - 1) as f64;
        (d * lon.len() as f64 - 360.0).abs() < 0.5 * d.abs()
    }

    /// Spherical radius used for distances and derivatives, metres.
    pub fn radius(&self) -> f64 {
        self.earth.mean_radius()
    }

    /// Geographic latitude and longitude (degrees) of every point.
    pub fn latlon(&self) -> (Array2<f64>, Array2<f64>) {
        let (ny, nx) = self.shape();
        match &self.horizontal {
            Horizontal::LatLon { lat, lon, .. } => (
                Array2::from_shape_fn((ny, nx), |(j, _)| lat[j]),
                Array2::from_shape_fn((ny, nx), |(_, i)| lon[i]),
            ),
            Horizontal::Rotated { rlat, rlon, pole } => {
                let mut la = Array2::zeros((ny, nx));
                let mut lo = Array2::zeros((ny, nx));
                for j in 0..ny {
                    for i in 0..nx {
                        let (a, o) = pole.to_geographic(rlat[j], rlon[i]);
                        la[(j, i)] = a;
                        lo[(j, i)] = o;
                    }
                }
                (la, lo)
            }
            Horizontal::Projected { proj, x, y } => {
                let mut la = Array2::zeros((ny, nx));
                let mut lo = Array2::zeros((ny, nx));
                for j in 0..ny {
                    for i in 0..nx {
                        let (a, o) = proj.inverse(&self.earth, x[i], y[j]);
                        la[(j, i)] = a;
                        lo[(j, i)] = o;
                    }
                }
                (la, lo)
            }
        }
    }

    /// Coriolis parameter f = 2 Omega sin(latitude) at every point, s-1
    /// (any dynamics text, e.g. Holton, An Introduction to Dynamic Meteorology; from memory).
    pub fn coriolis(&self, lat: &Array2<f64>) -> Array2<f64> {
        lat.mapv(|p| 2.0 * OMEGA * p.to_radians().sin())
    }

    /// Angle (radians, counter-clockwise) from geographic east to the grid's
    /// x axis at every point; `None` on a grid whose axes are east and north.
    pub fn axis_rotation(&self, lat: &Array2<f64>, lon: &Array2<f64>) -> Option<Array2<f64>> {
        match &self.horizontal {
            Horizontal::LatLon { .. } => None,
            Horizontal::Rotated { rlat, rlon, pole } => {
                Some(Array2::from_shape_fn(self.shape(), |(j, i)| {
                    pole.grid_rotation(rlat[j], rlon[i])
                }))
            }
            Horizontal::Projected { proj, .. } => {
                Some(Array2::from_shape_fn(self.shape(), |(j, i)| {
                    proj.grid_rotation(&self.earth, lat[(j, i)], lon[(j, i)])
                }))
            }
        }
    }

    /// Map scale factor m at every point of a projected grid (1 elsewhere).
    pub fn map_factor(&self, lat: &Array2<f64>) -> Array2<f64> {
        match &self.horizontal {
            Horizontal::Projected { proj, .. } => lat.mapv(|p| proj.scale_factor(&self.earth, p)),
            _ => Array2::ones(self.shape()),
        }
    }

    /// A short description for logs: template and size.
    pub fn describe(&self) -> String {
        let kind = match &self.horizontal {
            Horizontal::LatLon {
                gaussian: Some(n), ..
            } => format!("Gaussian N{n}"),
            Horizontal::LatLon { .. } => "latitude/longitude".to_string(),
            Horizontal::Rotated { .. } => "rotated latitude/longitude".to_string(),
            Horizontal::Projected {
                proj: Conformal::Mercator { .. },
                ..
            } => "Mercator".to_string(),
            Horizontal::Projected {
                proj: Conformal::PolarStereographic { .. },
                ..
            } => "polar stereographic".to_string(),
            Horizontal::Projected {
                proj: Conformal::Lambert { .. },
                ..
            } => "Lambert conformal".to_string(),
        };
        format!(
            "{kind} {}x{} (template 3.{})",
            self.nx(),
            self.ny(),
            self.template
        )
    }
}
