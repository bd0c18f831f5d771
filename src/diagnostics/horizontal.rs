//! Horizontal operators on the model's own grid: vorticity and gradient in the
//! grid's axes, with the metric of the sphere or the map factor of the
//! projection.
//!
//! In: a [`Grid`] and its geographic latitudes, once; then 2-D fields (NaN
//! where missing) with winds along the grid's axes. Out: owned 2-D arrays.
//! Pure: no I/O, no logging.

use ndarray::{Array2, ArrayView2};

use super::divergence::{divergence_conformal, divergence_sphere};
use super::vorticity::{relative_vorticity_conformal, relative_vorticity_sphere};
use crate::geometry::ops::{ddx_uniform, ddy_nonuniform};
use crate::geometry::{Grid, Horizontal};

/// Precomputed geometry for differencing on one grid.
pub struct Plane<'g> {
    grid: &'g Grid,
    /// Coriolis parameter at every point, s-1.
    pub f: Array2<f64>,
    /// Map factor at every point (1 on latitude/longitude grids).
    pub m: Array2<f64>,
    /// Angle from east to the grid's x axis (None where axes are east and north).
    pub rotation: Option<Array2<f64>>,
}

impl<'g> Plane<'g> {
    /// Set up the operators for `grid`, given its geographic latitudes and longitudes.
    pub fn new(grid: &'g Grid, lat: &Array2<f64>, lon: &Array2<f64>) -> Self {
        Plane {
            grid,
            f: grid.coriolis(lat),
            m: grid.map_factor(lat),
            rotation: grid.axis_rotation(lat, lon),
        }
    }

    /// Wind components in the grid's axes: unchanged when `grid_relative` or when
    /// the grid's axes are east and north, else turned by the axis rotation.
    pub fn to_grid_axes(
        &self,
        u: Array2<f64>,
        v: Array2<f64>,
        grid_relative: bool,
    ) -> (Array2<f64>, Array2<f64>) {
        match (&self.rotation, grid_relative) {
            (Some(alpha), false) => {
                super::vorticity::earth_to_grid(u.view(), v.view(), alpha.view())
            }
            _ => (u, v),
        }
    }

    /// Relative vorticity of a wind given in the grid's axes (see
    /// [`relative_vorticity_sphere`] and [`relative_vorticity_conformal`]).
    pub fn vorticity(&self, u: ArrayView2<f64>, v: ArrayView2<f64>) -> Array2<f64> {
        let g = self.grid;
        match &g.horizontal {
            Horizontal::LatLon { lat, lon, .. } => {
                relative_vorticity_sphere(u, v, lat, lon, g.radius(), g.periodic())
            }
            Horizontal::Rotated { rlat, rlon, .. } => {
                relative_vorticity_sphere(u, v, rlat, rlon, g.radius(), g.periodic())
            }
            Horizontal::Projected { x, y, .. } => {
                let dx = if x.len() > 1 { x[1] - x[0] } else { f64::NAN };
                let dy = if y.len() > 1 { y[1] - y[0] } else { f64::NAN };
                relative_vorticity_conformal(u, v, self.m.view(), dx, dy)
            }
        }
    }

    /// Horizontal divergence of a wind given in the grid's axes (see
    /// [`divergence_sphere`] and [`divergence_conformal`]).
    pub fn divergence(&self, u: ArrayView2<f64>, v: ArrayView2<f64>) -> Array2<f64> {
        let g = self.grid;
        match &g.horizontal {
            Horizontal::LatLon { lat, lon, .. } => {
                divergence_sphere(u, v, lat, lon, g.radius(), g.periodic())
            }
            Horizontal::Rotated { rlat, rlon, .. } => {
                divergence_sphere(u, v, rlat, rlon, g.radius(), g.periodic())
            }
            Horizontal::Projected { x, y, .. } => {
                let dx = if x.len() > 1 { x[1] - x[0] } else { f64::NAN };
                let dy = if y.len() > 1 { y[1] - y[0] } else { f64::NAN };
                divergence_conformal(u, v, self.m.view(), dx, dy)
            }
        }
    }

    /// Gradient (d/dx, d/dy) along the grid's axes, per metre:
    /// on the sphere d/dx = (1/(a cos phi)) d/dlambda, d/dy = (1/a) d/dphi;
    /// on a conformal projection d/dx = m d/dX, d/dy = m d/dY (Snyder 1987; from memory).
    pub fn gradient(&self, q: ArrayView2<f64>) -> (Array2<f64>, Array2<f64>) {
        let g = self.grid;
        let a = g.radius();
        match &g.horizontal {
            Horizontal::LatLon { lat, lon, .. }
            | Horizontal::Rotated {
                rlat: lat,
                rlon: lon,
                ..
            } => {
                let nx = lon.len();
                let dl = if nx > 1 {
                    (lon[nx - 1] - lon[0]).to_radians() / (nx - 1) as f64
                } else {
                    f64::NAN
                };
                let phi: Vec<f64> = lat.iter().map(|d| d.to_radians()).collect();
                let mut gx = ddx_uniform(q, dl, g.periodic());
                let mut gy = ddy_nonuniform(q, &phi);
                for (j, p) in phi.iter().enumerate() {
                    let c = p.cos();
                    gx.row_mut(j).mapv_inplace(|v| {
                        if c.abs() < 1e-12 {
                            f64::NAN
                        } else {
                            v / (a * c)
                        }
                    });
                    gy.row_mut(j).mapv_inplace(|v| v / a);
                }
                (gx, gy)
            }
            Horizontal::Projected { x, y, .. } => {
                let dx = if x.len() > 1 { x[1] - x[0] } else { f64::NAN };
                let ycoord: Vec<f64> = y.iter().map(|v| v - y[0]).collect();
                let gx = ddx_uniform(q, dx, false);
                let gy = ddy_nonuniform(q, &ycoord);
                (&gx * &self.m, &gy * &self.m)
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Earth;

    #[test]
    fn gradient_of_latitude_on_the_sphere() {
        // Closed form: q = a phi has d/dy = 1 and d/dx = 0 everywhere.
        let lat: Vec<f64> = (0..19).map(|j| -45.0 + 5.0 * j as f64).collect();
        let lon: Vec<f64> = (0..36).map(|i| 10.0 * i as f64).collect();
        let grid = Grid {
            earth: Earth::sphere(6_371_229.0),
            horizontal: Horizontal::LatLon {
                lat: lat.clone(),
                lon,
                gaussian: None,
            },
            template: 0,
        };
        let (la, lo) = grid.latlon();
        let plane = Plane::new(&grid, &la, &lo);
        let q = la.mapv(|d| 6_371_229.0 * d.to_radians());
        let (gx, gy) = plane.gradient(q.view());
        assert!((gy[(9, 3)] - 1.0).abs() < 1e-12);
        assert!(gx[(9, 0)].abs() < 1e-12, "periodic seam");
        assert!(
            gy[(0, 3)].is_nan(),
            "edge row of a grid that does not reach the pole"
        );
    }
}
