//! The diagnostics: pure functions on arrays and geometry.
//!
//! In: arrays (NaN where missing) and coordinates. Out: owned arrays. They do
//! no I/O and log nothing; the same input gives the same bits out. Each
//! function carries its equation and source in its doc comment and a
//! closed-form test beside it.

pub mod baroclinic;
pub mod budget;
pub mod change;
pub mod constants;
pub mod divergence;
pub mod elementary;
pub mod horizontal;
pub mod isentropic;
pub mod moisture;
pub mod pv;
pub mod sea_level;
pub mod stability;
pub mod thickness;
pub mod tropopause;
pub mod vorticity;
