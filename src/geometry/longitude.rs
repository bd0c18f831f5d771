//! Longitudes in one conventional range.
//!
//! In: the longitudes of a grid's columns (ascending, evenly spaced, as section
//! 3 gives them: they may start anywhere and pass 360) or the longitudes of
//! every point of a projected or rotated grid. Out: the same meridians in
//! [-180, 180) or [0, 360), and for a grid that wraps all the way round, the
//! column that must come first so that they ascend. A grid that does not wrap
//! keeps its columns in order: its longitudes take the range in which they run
//! without a jump.

use ndarray::Array2;
use serde::{Deserialize, Serialize};

/// Which range the longitudes of a file take.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub enum LongitudeRange {
    /// A global grid keeps the range its first column is nearest to (no roll
    /// when the model starts at 0 or at 180 W); others take the range in
    /// which they run without a jump, [-180, 180) when both do.
    #[default]
    #[serde(rename = "auto")]
    Auto,
    /// [-180, 180): west negative.
    #[serde(rename = "-180..180")]
    Signed,
    /// [0, 360): degrees east.
    #[serde(rename = "0..360")]
    East,
}

impl LongitudeRange {
    /// The range's lower end, degrees.
    fn low(self) -> f64 {
        match self {
            LongitudeRange::East => 0.0,
            _ => -180.0,
        }
    }

    /// The other explicit range.
    fn other(self) -> LongitudeRange {
        match self {
            LongitudeRange::East => LongitudeRange::Signed,
            _ => LongitudeRange::East,
        }
    }
}

/// Tolerance for "the same meridian", degrees (well below any grid spacing).
const EPS: f64 = 1e-6;

/// `x` moved by whole turns into [low, low + 360), a value within EPS below the
/// top counting as the bottom.
fn wrap(x: f64, low: f64) -> f64 {
    let w = (x - low).rem_euclid(360.0) + low;
    if w >= low + 360.0 - EPS {
        w - 360.0
    } else {
        w
    }
}

/// Columns in a conventional range: (`roll`, longitudes) where column `c` of the
/// result is column `(c + roll) % n` of `lon`.
///
/// `lon` ascends evenly; `periodic` says that its last column neighbours its
/// first, so that its data may be rolled. Other grids keep roll 0 and move by
/// whole turns only, into the range in which they fit ([`LongitudeRange::Auto`]
/// and a range asked for alike: a limited-area grid never gets a jump); one
/// spanning more than either range starts in [-180, 180) and ascends past 180.
pub fn columns(lon: &[f64], periodic: bool, want: LongitudeRange) -> (usize, Vec<f64>) {
    let n = lon.len();
    if n == 0 {
        return (0, Vec::new());
    }
    let d = if n > 1 {
        (lon[n - 1] - lon[0]) / (n - 1) as f64
    } else {
        0.0
    };
    if periodic && d > 0.0 {
        let range = match want {
            LongitudeRange::Auto => {
                if wrap(lon[0], -180.0).abs() >= 90.0 {
                    LongitudeRange::Signed
                } else {
                    LongitudeRange::East
                }
            }
            r => r,
        };
        let low = range.low();
        // Degrees forward from the first column to the range's lower end.
        let ahead = (low - lon[0]).rem_euclid(360.0);
        let mut roll = ((ahead / d) - EPS).ceil().max(0.0) as usize % n;
        let mut first = wrap(lon[0] + roll as f64 * d, low);
        if first < low - EPS {
            roll = (roll + 1) % n;
            first = wrap(lon[0] + roll as f64 * d, low);
        }
        if (first - low).abs() < EPS {
            first = low;
        }
        return (roll, (0..n).map(|k| first + k as f64 * d).collect());
    }
    let fits = |r: LongitudeRange| {
        let first = wrap(lon[0], r.low());
        (first + (lon[n - 1] - lon[0]) < r.low() + 360.0 - EPS).then_some(first - lon[0])
    };
    let order = match want {
        LongitudeRange::Auto => [LongitudeRange::Signed, LongitudeRange::East],
        r => [r, r.other()],
    };
    let shift = order
        .iter()
        .find_map(|r| fits(*r))
        .unwrap_or_else(|| wrap(lon[0], -180.0) - lon[0]);
    (0, lon.iter().map(|x| x + shift).collect())
}

/// Longitudes of every point (a rotated or projected grid) in one range: the
/// range asked for, unless the other one has the smaller largest jump between
/// neighbouring points (a grid over the date line in [0, 360), one over the
/// prime meridian in [-180, 180)); [`LongitudeRange::Auto`] prefers [-180, 180).
pub fn points(lon: &Array2<f64>, want: LongitudeRange) -> Array2<f64> {
    let first = match want {
        LongitudeRange::Auto => LongitudeRange::Signed,
        r => r,
    };
    let in_range =
        |r: LongitudeRange| lon.mapv(|x| if x.is_finite() { wrap(x, r.low()) } else { x });
    let jump = |a: &Array2<f64>| {
        let (ny, nx) = a.dim();
        let mut m: f64 = 0.0;
        for j in 0..ny {
            for i in 0..nx {
                if i + 1 < nx {
                    m = m.max((a[(j, i + 1)] - a[(j, i)]).abs());
                }
                if j + 1 < ny {
                    m = m.max((a[(j + 1, i)] - a[(j, i)]).abs());
                }
            }
        }
        m
    };
    let a = in_range(first);
    let b = in_range(first.other());
    // NaN jumps (points off the projection) compare as no jump.
    if jump(&b) + EPS < jump(&a) {
        b
    } else {
        a
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn grid(first: f64, d: f64, n: usize) -> Vec<f64> {
        (0..n).map(|k| first + k as f64 * d).collect()
    }

    #[test]
    fn a_global_grid_from_180_is_relabelled_not_rolled() {
        // The ECMWF and CMC layout: 180 to 539.6 in section 3's terms.
        let (roll, lon) = columns(&grid(180.0, 0.4, 900), true, LongitudeRange::Auto);
        assert_eq!(roll, 0);
        assert_eq!(lon[0], -180.0);
        assert!((lon[899] - 179.6).abs() < 1e-9);
        // Asked for [0, 360): the column at 0 comes first.
        let (roll, lon) = columns(&grid(180.0, 0.4, 900), true, LongitudeRange::East);
        assert_eq!(roll, 450);
        assert!(lon[0].abs() < 1e-9 && (lon[899] - 359.6).abs() < 1e-9);
    }

    #[test]
    fn global_grids_from_0_and_minus_180() {
        let (roll, lon) = columns(&grid(0.0, 2.5, 144), true, LongitudeRange::Auto);
        assert_eq!((roll, lon[0], lon[143]), (0, 0.0, 357.5));
        let (roll, lon) = columns(&grid(-180.0, 2.5, 144), true, LongitudeRange::Auto);
        assert_eq!((roll, lon[0], lon[143]), (0, -180.0, 177.5));
        let (roll, lon) = columns(&grid(0.0, 2.5, 144), true, LongitudeRange::Signed);
        assert_eq!((roll, lon[0]), (72, -180.0));
        assert!((lon[143] - 177.5).abs() < 1e-9);
        // Half a cell off the meridians: 0.25 ... 359.75, and -0.25 ... 359.25 rolled by one.
        let (roll, lon) = columns(&grid(-0.25, 0.5, 720), true, LongitudeRange::Auto);
        assert_eq!(roll, 1);
        assert!((lon[0] - 0.25).abs() < 1e-9 && (lon[719] - 359.75).abs() < 1e-9);
        // Starting at 90 E: rolled so that 180 W comes first.
        let (roll, lon) = columns(&grid(90.0, 1.0, 360), true, LongitudeRange::Auto);
        assert_eq!((roll, lon[0], lon[359]), (90, -180.0, 179.0));
    }

    #[test]
    fn limited_areas_keep_their_order_and_never_jump() {
        // Over the date line: 170 E to 170 W stays 170 ... 190.
        for want in [
            LongitudeRange::Auto,
            LongitudeRange::Signed,
            LongitudeRange::East,
        ] {
            let (roll, lon) = columns(&grid(170.0, 1.0, 21), false, want);
            assert_eq!((roll, lon[0], lon[20]), (0, 170.0, 190.0), "{want:?}");
            // Over the prime meridian (330 E to 40 E in section 3): -30 ... 40.
            let (roll, lon) = columns(&grid(330.0, 1.0, 71), false, want);
            assert_eq!((roll, lon[0], lon[70]), (0, -30.0, 40.0), "{want:?}");
        }
        // A rotated grid's 325.5 ... 394.5.
        let (_, lon) = columns(&grid(325.5, 0.5, 139), false, LongitudeRange::Auto);
        assert!((lon[0] + 34.5).abs() < 1e-9 && (lon[138] - 34.5).abs() < 1e-9);
        // Fits both: the range asked for.
        let (_, lon) = columns(&grid(10.0, 1.0, 11), false, LongitudeRange::Auto);
        assert_eq!(lon[0], 10.0);
        let (_, lon) = columns(&grid(-100.0, 1.0, 11), false, LongitudeRange::East);
        assert_eq!(lon[0], 260.0);
        // Wider than either range allows without a jump: starts in [-180, 180).
        let (_, lon) = columns(&grid(-100.0, 1.0, 301), false, LongitudeRange::East);
        assert_eq!((lon[0], lon[300]), (-100.0, 200.0));
    }

    #[test]
    fn point_longitudes_take_the_range_without_a_jump() {
        let pacific = Array2::from_shape_fn((3, 5), |(_, i)| {
            175.0 + 2.0 * i as f64 - 360.0 * (i >= 3) as i32 as f64
        });
        let out = points(&pacific, LongitudeRange::Auto);
        assert_eq!(out[(0, 0)], 175.0);
        assert_eq!(out[(0, 4)], 183.0);
        let europe = Array2::from_shape_fn((3, 5), |(_, i)| (350.0 + 5.0 * i as f64) % 360.0);
        let out = points(&europe, LongitudeRange::East);
        assert_eq!((out[(0, 0)], out[(0, 4)]), (-10.0, 10.0));
        assert!(points(&europe, LongitudeRange::Auto)
            .iter()
            .all(|x| (-180.0..180.0).contains(x)));
    }
}
