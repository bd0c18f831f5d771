//! Output: CF NetCDF files of the products.
//!
//! In: arrays and their grid. Out: files that appear whole or not at all.
//! Names, units and attributes of every variable come from [`variables`].

pub mod cf;
pub mod store;
pub mod variables;
