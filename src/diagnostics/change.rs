//! Changes in time of a field at fixed points: the field at one time minus the
//! same field at another (a later step of a cycle against an earlier one, or a
//! cycle against the previous cycle at the same valid time).
//!
//! In: the two fields on the same grid and levels (NaN where missing). Out: their
//! difference. Pure: no I/O, no logging.

use ndarray::{Array3, ArrayView3};

/// Change of a field between two times, per point: d = f(later) - f(earlier) (NaN
/// where either is missing); None when the two fields differ in shape.
pub fn difference(later: ArrayView3<f32>, earlier: ArrayView3<f32>) -> Option<Array3<f32>> {
    (later.dim() == earlier.dim()).then(|| &later - &earlier)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn difference_of_two_known_fields() {
        // Heights rising by 2 m per level and 0.5 m per column between the times:
        // later - earlier is that field exactly (small integers and halves are exact in f32).
        let earlier = Array3::from_shape_fn((3, 2, 4), |(k, j, i)| {
            5500.0 + 10.0 * k as f32 - 3.0 * j as f32 + i as f32
        });
        let rise = Array3::from_shape_fn((3, 2, 4), |(k, _, i)| 2.0 * k as f32 + 0.5 * i as f32);
        let mut later = &earlier + &rise;
        later[(1, 1, 2)] = f32::NAN;
        let d = difference(later.view(), earlier.view()).expect("same shape");
        for ((k, j, i), v) in d.indexed_iter() {
            if (k, j, i) == (1, 1, 2) {
                assert!(v.is_nan());
            } else {
                assert_eq!(*v, rise[(k, j, i)], "({k}, {j}, {i})");
            }
        }
        // A fall is negative: earlier minus later is minus the rise.
        let back = difference(earlier.view(), later.view()).expect("same shape");
        assert_eq!(back[(2, 0, 3)], -rise[(2, 0, 3)]);
        // Fields of different shapes have no difference.
        let other = Array3::<f32>::zeros((2, 2, 4));
        assert!(difference(later.view(), other.view()).is_none());
    }
}
