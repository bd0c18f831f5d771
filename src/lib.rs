//! leeward turns GRIB2 numerical weather model output into the dynamical
//! diagnostics forecasters read every cycle, computed on the model's own grid
//! and written as CF-convention NetCDF.
//!
//! These diagnostics are guidance for trained forecasters, not warnings. Local
//! procedures and the responsible national meteorological service take
//! precedence.
//!
//! # Layout
//! - [`config`]: the TOML file, defaults, validation naming each key.
//! - [`ingest`]: GRIB2 bytes to a catalogue of fields, grids and decoded values.
//! - [`geometry`]: grids, projections and derivative operators; no GRIB, no NetCDF.
//! - [`diagnostics`]: pure functions, each written as its formula.
//! - [`output`]: CF NetCDF files, written whole or not at all.
//! - [`changes`]: changes within a cycle and between runs, and the PV budget, from published files.
//! - [`pipeline`]: input files read, catalogued and planned into steps.
//! - [`products`]: one step made and published, family by family, shared by `process` and the service.
//! - [`outcome`]: how a step ended, one type from the pipeline to the ledger.
//! - [`cyclones`]: cyclone centres found, tracked through the cycle and described.
//! - [`demo`]: an invented scenario written as GRIB2 by our own encoder.
//! - [`service`]: the watcher of the incoming directory and the ledger of the daemon.
//! - [`recent`]: facts read from files, remembered for the cycles used last.
//! - [`escape`]: paths and texts made safe to print in logs, listings and manifests.
//! - [`cli`]: the command line, kept thin.

pub mod changes;
pub mod cli;
pub mod config;
pub mod cyclones;
pub mod demo;
pub mod diagnostics;
pub mod escape;
pub mod geometry;
pub mod ingest;
pub mod outcome;
pub mod output;
pub mod pipeline;
pub mod products;
pub mod recent;
pub mod service;
