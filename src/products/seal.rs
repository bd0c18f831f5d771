//! Products leave the working set packed as the file will store them.
//!
//! Each product is bit-rounded, shuffled and deflated ([`crate::output::pack`], on every
//! core) as soon as it is made, or once nothing else needs its plain values; only
//! compressed bytes wait for the writer. The seconds spent count as writing.

use std::cell::Cell;
use std::time::Instant;

use ndarray::Array3;
use rayon::prelude::*;

use crate::config::settings::Output;
use crate::output::cf::{Product, Vertical};
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

    /// `p` in SI units and packed.
    pub fn seal(&self, mut p: Product) -> Product {
        let t = Instant::now();
        in_si_units(&mut p);
        p.pack(self.kept.bits(p.spec.name), self.output.deflate_level);
        self.seconds
            .set(self.seconds.get() + t.elapsed().as_secs_f64());
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
        self.seconds
            .set(self.seconds.get() + t.elapsed().as_secs_f64());
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
        self.seconds
            .set(self.seconds.get() + t.elapsed().as_secs_f64());
        p
    }
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
