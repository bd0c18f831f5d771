//! Which way the step's winds point, and the winds along the grid's axes.
//!
//! In: the grid, its [`Plane`], the inventory (flag table 3.3 bit 5 of each level's u)
//! and the stacked winds. Out: [`Winds`]: the winds along the grid's x and y axes that
//! differencing needs (turned level by level where the input gives them relative to
//! east and north on a rotated or projected grid), the variables the input's own winds
//! are written as, and a sentence for the file.

use ndarray::{Array3, Axis};

use crate::diagnostics::horizontal::Plane;
use crate::geometry::{Grid, Horizontal};
use crate::ingest::params::Quantity;
use crate::output::variables;

use super::columns::Columns;
use super::inputs::Inventory;

/// The step's winds as the products use them.
pub(super) struct Winds {
    /// How the input's winds were read, in words.
    pub described: String,
    /// The variables winds as the input gives them are written as.
    pub u_spec: (&'static str, &'static str),
    pub v_spec: (&'static str, &'static str),
    /// The winds turned to the grid's axes, where any level needed turning.
    pub turned: Option<(Array3<f32>, Array3<f32>)>,
    /// The first wind level's flag: winds relative to the grid's axes.
    pub input_grid_relative: bool,
}

impl Winds {
    /// Read the winds of `cols` on `grid`.
    pub fn read(
        grid: &Grid,
        plane: &Plane,
        inv: &Inventory,
        wind_levels: &[i64],
        cols: &Columns,
    ) -> Self {
        let first_wind = wind_levels
            .first()
            .and_then(|p| inv.isobaric.get(&(Quantity::WindU, *p)));
        let input_grid_relative = first_wind
            .map(|fr| fr.entry.winds_grid_relative)
            .unwrap_or(false);
        let (u_spec, v_spec) = if plane.rotation.is_some() && input_grid_relative {
            (variables::WIND_U_GRID, variables::WIND_V_GRID)
        } else {
            (variables::WIND_U_EARTH, variables::WIND_V_EARTH)
        };
        let mut w = Winds {
            described: "no winds used".to_string(),
            u_spec,
            v_spec,
            turned: None,
            input_grid_relative,
        };
        let (Some(u3), Some(v3)) = (&cols.u, &cols.v) else {
            return w;
        };
        // Winds along the grid's axes, level by level, as each level's flag says.
        let grid_rel: Vec<bool> = cols
            .levels
            .iter()
            .map(|p| {
                inv.isobaric
                    .get(&(Quantity::WindU, *p))
                    .map(|fr| fr.entry.winds_grid_relative)
                    .unwrap_or(true)
            })
            .collect();
        let all_grid = grid_rel.iter().all(|&g| g);
        let any_grid = grid_rel.iter().any(|&g| g);
        w.described = match (&grid.horizontal, all_grid, any_grid) {
            (Horizontal::LatLon { .. }, _, _) => "relative to east and north (the grid's axes)".into(),
            (_, true, _) => "relative to the grid's x and y axes (flag table 3.3 bit 5 set); used as they are".into(),
            (_, false, false) => "relative to east and north (flag table 3.3 bit 5 clear); turned into grid axes before differencing".into(),
            _ => "mixed: each level as its flag table 3.3 bit 5 says".into(),
        };
        if plane.rotation.is_some() && !all_grid {
            let mut ug = u3.clone();
            let mut vg = v3.clone();
            for (k, &rel) in grid_rel.iter().enumerate() {
                let (a, b) = plane.to_grid_axes(
                    u3.index_axis(Axis(0), k).mapv(f64::from),
                    v3.index_axis(Axis(0), k).mapv(f64::from),
                    rel,
                );
                ug.index_axis_mut(Axis(0), k).assign(&a.mapv(|x| x as f32));
                vg.index_axis_mut(Axis(0), k).assign(&b.mapv(|x| x as f32));
            }
            w.turned = Some((ug, vg));
        }
        w
    }

    /// The winds along the grid's axes: the turned ones, or those of `cols` as they are.
    pub fn along_axes<'a>(
        &'a self,
        cols: &'a Columns,
    ) -> Option<(&'a Array3<f32>, &'a Array3<f32>)> {
        match (&self.turned, &cols.u, &cols.v) {
            (Some((a, b)), _, _) => Some((a, b)),
            (None, Some(a), Some(b)) => Some((a, b)),
            _ => None,
        }
    }
}
