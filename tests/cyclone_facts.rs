//! The figures a forecaster reads beside a cyclone centre, in the units the tracks file and
//! the GeoJSON state (docs/output.md): fields whose answer is known by hand, in both
//! hemispheres.
//!
//! - 1000-500 hPa thickness growing by 10 m per 100 km of meridional distance: its gradient
//!   is 10 m per 100 km everywhere (the great-circle distance along a meridian is a dphi;
//!   by hand).
//! - A uniform Eady growth rate of 1e-5 s-1 is 0.864 per day (86 400 s in a day).
//! - A ridge 2000 m high along 10 E and a centre on 14 E: the crest lies 4 degrees of
//!   longitude west, 286 km at 50 degrees of latitude (6 371 229 m x 4 pi/180 x cos 50; by
//!   hand), within the 500 km looked at. In a westerly steering wind it is upstream and the
//!   terrain upstream is the crest's; in an easterly the line upstream runs east, away from
//!   it, over flat ground.

use leeward::cyclones::facts::{facts, Fields, Grid};
use ndarray::Array2;

/// Sphere of GRIB2 code table 3.2 value 6 (WMO-No. 306), m.
const A: f64 = 6_371_229.0;
const RADIUS: f64 = 500e3;

struct Case {
    lat: Array2<f64>,
    lon: Array2<f64>,
}

/// A 0.25-degree grid of latitudes `lat0` to `lat0` + 20 and longitudes 0 to 24 E.
fn case(lat0: f64) -> Case {
    let (ny, nx) = (81, 97);
    Case {
        lat: Array2::from_shape_fn((ny, nx), |(j, _)| lat0 + 0.25 * j as f64),
        lon: Array2::from_shape_fn((ny, nx), |(_, i)| 0.25 * i as f64),
    }
}

fn fields(c: &Case, steer_u: f32) -> Fields {
    let uniform = |v: f32| Array2::from_elem(c.lat.dim(), v);
    Fields {
        steer: Some((uniform(steer_u), uniform(0.0))),
        eady: Some(uniform(1.0e-5)),
        // 10 m per 100 km = 1e-4 m per metre of meridional distance a phi.
        thick: Some(
            c.lat
                .mapv(|p| (5400.0 + 1.0e-4 * A * p.to_radians()) as f32),
        ),
        orog: Some(
            c.lon
                .mapv(|l| (2000.0 * (-((l - 10.0) / 0.6).powi(2)).exp()) as f32),
        ),
        ..Fields::default()
    }
}

#[test]
fn the_facts_are_stated_in_their_units_and_look_upstream_in_both_hemispheres() {
    for lat0 in [40.0, -60.0] {
        let c = case(lat0);
        let g = Grid {
            lat: c.lat.view(),
            lon: c.lon.view(),
            periodic: false,
            radius: A,
        };
        // The centre at 50 N or 50 S, 14 E.
        let at = (40, 56);
        assert!((c.lat[at].abs() - 50.0).abs() < 1e-9 && (c.lon[at] - 14.0).abs() < 1e-9);

        let (west, points) = facts(&g, &fields(&c, 15.0), at, RADIUS);
        assert!(points.len() > 1000, "{} points within 500 km", points.len());
        let lat = c.lat[at];
        assert!(
            (west.thick_gradient_max - 10.0).abs() < 0.01,
            "{lat}: thickness gradient {} m per 100 km, by hand 10",
            west.thick_gradient_max
        );
        assert!(
            (west.eady_max - 0.864).abs() < 1e-5,
            "{lat}: Eady growth rate {} per day, 1e-5 s-1 is 0.864",
            west.eady_max
        );
        assert!(
            west.orog_centre < 1.0,
            "{lat}: terrain at the centre {}",
            west.orog_centre
        );
        assert!(
            west.orog_upstream_max > 1900.0,
            "{lat}: a westerly's upstream terrain {} m, the crest 286 km west is 2000 m",
            west.orog_upstream_max
        );
        assert_eq!((west.steer_u, west.steer_v), (15.0, 0.0));

        let (east, _) = facts(&g, &fields(&c, -15.0), at, RADIUS);
        assert!(
            east.orog_upstream_max < 1.0,
            "{lat}: an easterly's upstream terrain {} m, flat east of the centre",
            east.orog_upstream_max
        );
    }
}
