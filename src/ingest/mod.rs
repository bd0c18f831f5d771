//! Ingest: GRIB2 bytes to fields on grids.
//!
//! In: the bytes of GRIB2 files. Out: a [`catalogue::Catalogue`] per file (what
//! is where, no values decoded), grids from section 3, and decoded values of
//! the fields asked for. Ingest never panics on input and never writes.

pub mod bytes;
pub mod catalogue;
pub mod decode;
pub mod grid;
pub mod inspect;
pub mod params;
pub mod source;
pub mod unpack;
#[rustfmt::skip]
pub mod wmo_tables;
