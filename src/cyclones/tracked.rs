//! A cycle's tracks as made: the steps' centres, the tracks linking them and
//! their deepening rates, the one value the writers
//! ([`super::write`]) and the maker ([`super::cycle`]) share.

use chrono::NaiveDateTime;

use super::read::{Settings, StepCentres};
use super::track::{Deepening, Track};

/// The tracks of one cycle.
#[derive(Debug, Clone)]
pub struct Cycle {
    /// Reference time.
    pub reference_time: NaiveDateTime,
    /// The steps, in time order.
    pub steps: Vec<StepCentres>,
    /// The tracks: (step, centre) in time order, numbered from 1 in this order.
    pub tracks: Vec<Track>,
    /// The deepening rate of each point of each track.
    pub deepening: Vec<Vec<Deepening>>,
    /// How the centres were found and summarised.
    pub settings: Settings,
    /// Search radius of the linking for steps 6 h apart, m.
    pub search_radius_6h: f64,
}
