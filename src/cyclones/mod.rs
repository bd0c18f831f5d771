//! Cyclones: centres of closed lows on the mean sea-level pressure of each
//! step, tracked through the cycle, each with its deepening rate and what the
//! diagnostics say round it about the three mechanisms that deepen
//! extratropical cyclones (baroclinicity, stretching in the lee of mountains,
//! latent heat release) and the upper-level PV above.
//!
//! - [`detect`]: centres on one field (pure).
//! - [`track`]: centres linked from step to step, deepening rates (pure).
//!
//! These are facts of the diagnostics, guidance for trained forecasters, not
//! warnings.

pub mod cycle;
pub mod detect;
pub mod facts;
pub mod memo;
pub mod read;
pub mod source;
pub mod track;
pub mod tracked;
pub mod write;
