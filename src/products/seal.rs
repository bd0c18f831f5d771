//! Products leave the working set packed as the file will store them.
//!
//! Each product is bit-rounded, shuffled and deflated ([`crate::output::pack`], on every
//! core) as soon as it is made, or once nothing else needs its plain values; only
//! compressed bytes wait for the writer. The seconds spent count as writing.

use std::cell::Cell;
use std::time::Instant;

use ndarray::{Array2, Array3, Axis};
use rayon::prelude::*;

use crate::config::settings::Output;
use crate::output::cf::{Product, Values, Vertical};
use crate::output::pack::Packed;
use crate::output::precision::KeptBits;
use crate::output::variables;

/// Packs products as the output settings say, and counts the seconds it takes.
pub(super) struct Sealer<'a> {
    output: &'a Output,
    pub kept: KeptBits,
    seconds: Cell<f64>,
}

impl<'a> Sealer<'a> {
    pub fn new(output: &'a Output) -> Self {
        Sealer {
            output,
            kept: output.kept_bits(),
            seconds: Cell::new(0.0),
        }
    }

    /// Seconds spent packing so far.
    pub fn seconds(&self) -> f64 {
        self.seconds.get()
    }

    /// Count the seconds since `t` as spent packing.
    fn count(&self, t: Instant) {
        self.seconds
            .set(self.seconds.get() + t.elapsed().as_secs_f64());
    }

    /// `p` in SI units and packed.
    pub fn seal(&self, mut p: Product) -> Product {
        let t = Instant::now();
        in_si_units(&mut p);
        p.pack(self.kept.bits(p.spec.name), self.output.deflate_level);
        self.count(t);
        p
    }

    /// Pack those of `fields` still plain (the single fields, made whole
    /// rather than level by level), the products in parallel.
    pub fn seal_rest(&self, fields: &mut [Product]) {
        let t = Instant::now();
        let (kept, level) = (&self.kept, self.output.deflate_level);
        fields
            .par_iter_mut()
            .for_each(|p| p.pack(kept.bits(p.spec.name), level));
        self.count(t);
    }

    /// A product of `data`, packed.
    pub fn sealed(
        &self,
        spec: variables::VarSpec,
        vertical: Vertical,
        data: Array3<f32>,
    ) -> Product {
        self.seal(Product::new(spec, vertical, data))
    }

    /// `N` products of `shape` (levels, rows, columns) made level by level:
    /// `make(k, levels)` writes level `k` of each (NaN before it starts) in the
    /// products' units. Packed, each level as soon as it is made, on every core
    /// ([`crate::output::pack::Packed::made`]); with deflate off, made whole.
    pub fn made<const N: usize>(
        &self,
        specs: [variables::VarSpec; N],
        vertical: Vertical,
        shape: (usize, usize, usize),
        make: impl Fn(usize, &mut [Array2<f32>; N]) + Sync,
    ) -> Vec<Product> {
        let t = Instant::now();
        let in_si = |k: usize, levels: &mut [Array2<f32>; N]| {
            make(k, levels);
            for (spec, l) in specs.iter().zip(levels.iter_mut()) {
                if spec.units == variables::PV_UNITS {
                    l.mapv_inplace(|x| (f64::from(x) * variables::PVU) as f32);
                }
            }
        };
        let values: Vec<Values> = if self.output.deflate_level > 0 {
            let nsb = specs.map(|s| self.kept.bits(s.name));
            let level = self.output.deflate_level as u32;
            let packed = Packed::made(shape, nsb, level, in_si);
            packed.into_iter().map(Values::Packed).collect()
        } else {
            whole(shape, in_si).into_iter().map(Values::Plain).collect()
        };
        self.count(t);
        let products = specs.into_iter().zip(values);
        products.map(|(s, v)| Product::of(s, vertical, v)).collect()
    }

    /// Values still in use elsewhere: packed from a borrow, without a copy.
    pub fn sealed_copy(
        &self,
        spec: variables::VarSpec,
        vertical: Vertical,
        data: &Array3<f32>,
    ) -> Product {
        if spec.units == variables::PV_UNITS {
            return self.sealed(spec, vertical, data.clone());
        }
        let t = Instant::now();
        let p = Product::packed_copy(spec, vertical, data, self.output);
        self.count(t);
        p
    }
}

/// `N` arrays of `shape` made level by level (levels in parallel) by `make`, as
/// [`Sealer::made`] has them made when nothing is packed.
fn whole<const N: usize>(
    shape: (usize, usize, usize),
    make: impl Fn(usize, &mut [Array2<f32>; N]) + Sync,
) -> [Array3<f32>; N] {
    let (nz, ny, nx) = shape;
    let levels: Vec<[Array2<f32>; N]> = (0..nz)
        .into_par_iter()
        .map(|k| {
            let mut l = std::array::from_fn(|_| Array2::from_elem((ny, nx), f32::NAN));
            make(k, &mut l);
            l
        })
        .collect();
    std::array::from_fn(|n| {
        let mut a = Array3::from_elem(shape, f32::NAN);
        for (k, l) in levels.iter().enumerate() {
            a.index_axis_mut(Axis(0), k).assign(&l[n]);
        }
        a
    })
}

/// PV is computed in PVU and written in SI units ([`variables::PV_UNITS`]):
/// the values of a product in those units are scaled here, once, before packing.
pub(super) fn in_si_units(p: &mut Product) {
    if p.spec.units != variables::PV_UNITS {
        return;
    }
    if let crate::output::cf::Values::Plain(a) = &mut p.values {
        a.mapv_inplace(|x| (f64::from(x) * variables::PVU) as f32);
    }
}
