//! Cyclone centres linked from step to step through a cycle, and how fast
//! each deepens.
//!
//! In: the centres of every step of a cycle ([`Step`]s in time order), each
//! with its position, central pressure and the steering wind there. Out:
//! tracks (which centre of which step belongs to which track) and, per point
//! of a track, its deepening rate. Pure: no I/O, no logging; the same steps
//! give the same tracks whatever order they were made in.
//!
//! Linking: a track's first guess at the next step moves its last centre with
//! the steering wind there and, once the track has two points, with its own
//! last motion, the mean of the two where both are known (a first guess from
//! the steering flow and from persistence is common practice in cyclone
//! tracking). The pairs of track and centre within the search radius of the
//! guess are taken nearest first, each track and each centre at most once; a
//! centre left over starts a track, a track left over ends.

use super::detect::distance;

/// One centre of one step, as the tracker sees it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fix {
    /// Position, degrees.
    pub lat: f64,
    pub lon: f64,
    /// Central pressure, Pa.
    pub pressure: f64,
    /// Steering wind at the centre, toward east and north, m s-1 (NaN: unknown).
    pub steer: (f64, f64),
}

/// The centres of one step.
#[derive(Debug, Clone, PartialEq)]
pub struct Step {
    /// Valid time, hours after the cycle's reference time.
    pub hours: f64,
    /// Its centres.
    pub fixes: Vec<Fix>,
}

/// How centres are linked.
#[derive(Debug, Clone, Copy)]
pub struct Settings {
    /// Farthest a centre may lie from its first guess for steps 6 h apart, m;
    /// in proportion for longer intervals.
    pub search_radius_6h: f64,
    /// Earth's radius, m.
    pub radius: f64,
}

/// A track: (step index, centre index) in time order.
pub type Track = Vec<(usize, usize)>;

/// Move (lat, lon) by (dx east, dy north) metres on a sphere of radius `a`
/// (a short step: local east and north; common practice).
pub fn displace(a: f64, lat: f64, lon: f64, dx: f64, dy: f64) -> (f64, f64) {
    let lat2 = (lat + (dy / a).to_degrees()).clamp(-90.0, 90.0);
    let c = ((lat + lat2) / 2.0).to_radians().cos().max(1e-6);
    let lon2 = lon + (dx / (a * c)).to_degrees();
    (lat2, (lon2 + 540.0).rem_euclid(360.0) - 180.0)
}

/// East and north distance (m) from (lat1, lon1) to (lat2, lon2), locally.
fn separation(a: f64, lat1: f64, lon1: f64, lat2: f64, lon2: f64) -> (f64, f64) {
    let dl = (lon2 - lon1 + 540.0).rem_euclid(360.0) - 180.0;
    let c = ((lat1 + lat2) / 2.0).to_radians().cos();
    (a * c * dl.to_radians(), a * (lat2 - lat1).to_radians())
}

/// Where the track is expected at `hours`.
pub fn first_guess(steps: &[Step], track: &Track, hours: f64, a: f64) -> (f64, f64) {
    let &(s1, c1) = track.last().unwrap_or(&(0, 0));
    let last = steps[s1].fixes[c1];
    let dt = (hours - steps[s1].hours) * 3600.0;
    let mut moves = Vec::with_capacity(2);
    if last.steer.0.is_finite() && last.steer.1.is_finite() {
        moves.push((last.steer.0 * dt, last.steer.1 * dt));
    }
    if track.len() >= 2 {
        let (s0, c0) = track[track.len() - 2];
        let before = steps[s0].fixes[c0];
        let dt0 = (steps[s1].hours - steps[s0].hours) * 3600.0;
        if dt0 > 0.0 {
            let (ex, ny) = separation(a, before.lat, before.lon, last.lat, last.lon);
            moves.push((ex * dt / dt0, ny * dt / dt0));
        }
    }
    if moves.is_empty() {
        return (last.lat, last.lon);
    }
    let n = moves.len() as f64;
    let dx = moves.iter().map(|m| m.0).sum::<f64>() / n;
    let dy = moves.iter().map(|m| m.1).sum::<f64>() / n;
    displace(a, last.lat, last.lon, dx, dy)
}

/// Link the centres of `steps` (in time order) into tracks.
pub fn link(steps: &[Step], set: &Settings) -> Vec<Track> {
    let mut tracks: Vec<Track> = Vec::new();
    let mut open: Vec<usize> = Vec::new(); // tracks that reached the previous step
    for (s, step) in steps.iter().enumerate() {
        let mut taken = vec![false; step.fixes.len()];
        let mut next_open = Vec::new();
        if s > 0 {
            let dt_h = step.hours - steps[s - 1].hours;
            let reach = set.search_radius_6h * (dt_h / 6.0).max(1.0);
            let mut pairs: Vec<(f64, usize, usize)> = Vec::new();
            for &t in &open {
                let (glat, glon) = first_guess(steps, &tracks[t], step.hours, set.radius);
                for (c, f) in step.fixes.iter().enumerate() {
                    let d = distance(set.radius, glat, glon, f.lat, f.lon);
                    if d <= reach {
                        pairs.push((d, t, c));
                    }
                }
            }
            pairs.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)).then(a.2.cmp(&b.2)));
            let mut continued = vec![false; tracks.len()];
            for (_, t, c) in pairs {
                if !continued[t] && !taken[c] {
                    continued[t] = true;
                    taken[c] = true;
                    tracks[t].push((s, c));
                    next_open.push(t);
                }
            }
        }
        for (c, _) in step.fixes.iter().enumerate().filter(|(c, _)| !taken[*c]) {
            next_open.push(tracks.len());
            tracks.push(vec![(s, c)]);
        }
        next_open.sort_unstable();
        open = next_open;
    }
    tracks
}

/// A point's deepening rate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Deepening {
    /// Fall of the central pressure per 24 h, Pa (positive: deepening).
    pub rate: f64,
    /// The same scaled to 60 degrees of latitude, rate sin(60) / sin(|mean latitude|)
    /// (Sanders and Gyakum 1980, Mon. Wea. Rev. 108, 1589-1606; from memory), Pa per 24 h;
    /// NaN within [`NORMALISED_FROM`] degrees of the equator, where the scaling
    /// has no meaning.
    pub rate_60: f64,
    /// rate_60 in bergerons: 1 bergeron is 24 hPa in 24 h at 60 degrees (Sanders and Gyakum 1980).
    pub bergeron: f64,
    /// The interval the rate is taken over, hours.
    pub hours: f64,
}

/// Nearest latitude to the equator at which the rate is scaled to 60 degrees.
pub const NORMALISED_FROM: f64 = 15.0;

/// One bergeron, Pa per 24 h at 60 degrees (Sanders and Gyakum 1980).
pub const BERGERON: f64 = 2400.0;

/// The deepening rate at each point of `track`: over the longest interval of at
/// most 24 h that ends at the point (from the earliest point of the track no
/// more than 24 h before it), or, at the track's first point, that starts there.
pub fn deepening(steps: &[Step], track: &Track) -> Vec<Deepening> {
    let fix = |k: usize| {
        let (s, c) = track[k];
        (steps[s].hours, steps[s].fixes[c])
    };
    (0..track.len())
        .map(|k| {
            let (t, _) = fix(k);
            let back = (0..k).find(|&m| fix(m).0 >= t - 24.0 - 1e-9);
            let pair = match back {
                Some(m) => Some((m, k)),
                None => (k + 1..track.len())
                    .take_while(|&m| fix(m).0 <= t + 24.0 + 1e-9)
                    .last()
                    .map(|m| (k, m)),
            };
            let Some((a, b)) = pair else {
                return Deepening {
                    rate: f64::NAN,
                    rate_60: f64::NAN,
                    bergeron: f64::NAN,
                    hours: f64::NAN,
                };
            };
            let ((ta, fa), (tb, fb)) = (fix(a), fix(b));
            let rate = (fa.pressure - fb.pressure) / (tb - ta) * 24.0;
            let mean_lat = ((fa.lat + fb.lat) / 2.0).abs();
            let rate_60 = if mean_lat >= NORMALISED_FROM {
                rate * 60f64.to_radians().sin() / mean_lat.to_radians().sin()
            } else {
                f64::NAN
            };
            Deepening {
                rate,
                rate_60,
                bergeron: rate_60 / BERGERON,
                hours: tb - ta,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: f64 = 6_371_229.0;

    fn fix(lat: f64, lon: f64, hpa: f64, steer: (f64, f64)) -> Fix {
        Fix {
            lat,
            lon,
            pressure: hpa * 100.0,
            steer,
        }
    }

    fn settings() -> Settings {
        Settings {
            search_radius_6h: 600e3,
            radius: A,
        }
    }

    /// A low moving east at `u` m/s along `lat` from `lon0`, deepening by `r` hPa/h.
    fn moving(lat: f64, lon0: f64, u: f64, r: f64, t: f64) -> Fix {
        let (la, lo) = displace(A, lat, lon0, u * t * 3600.0, 0.0);
        fix(la, lo, 1000.0 - r * t, (u, 0.0))
    }

    #[test]
    fn one_moving_deepening_low_is_one_track_with_its_rate() {
        let steps: Vec<Step> = (0..9)
            .map(|k| {
                let t = 6.0 * k as f64;
                Step {
                    hours: t,
                    fixes: vec![moving(50.0, -30.0, 15.0, 1.0, t)],
                }
            })
            .collect();
        let tracks = link(&steps, &settings());
        assert_eq!(tracks.len(), 1, "{tracks:?}");
        assert_eq!(tracks[0].len(), 9);
        // Closed form: 1 hPa/h is 24 hPa per 24 h; scaled to 60 degrees from 50,
        // 24 sin 60 / sin 50 = 27.13 hPa, 1.13 bergeron (Sanders and Gyakum 1980).
        for d in deepening(&steps, &tracks[0]) {
            assert!((d.rate - 2400.0).abs() < 1e-6, "{d:?}");
            let want = 2400.0 * 60f64.to_radians().sin() / 50f64.to_radians().sin();
            assert!((d.rate_60 - want).abs() < 1e-6, "{d:?}");
            assert!((d.bergeron - 1.1306).abs() < 1e-3);
        }
        let d = deepening(&steps, &tracks[0]);
        assert_eq!(d[0].hours, 24.0); // first point: forward over 24 h
        assert_eq!(d[1].hours, 6.0); // then back to the start
        assert_eq!(d[8].hours, 24.0);
        // In the south the same low gives the same rate.
        let south: Vec<Step> = steps
            .iter()
            .map(|s| Step {
                hours: s.hours,
                fixes: s.fixes.iter().map(|f| Fix { lat: -f.lat, ..*f }).collect(),
            })
            .collect();
        let d = deepening(&south, &link(&south, &settings())[0]);
        assert!(d.iter().all(|d| (d.bergeron - 1.1306).abs() < 1e-3));
    }

    #[test]
    fn two_lows_passing_each_other_keep_their_tracks() {
        // One low moves east along 52 N, the other west along 48 N, at 20 m/s; they pass
        // 445 km apart at hour 24. Each has the steering of its own latitude.
        let steps: Vec<Step> = (0..9)
            .map(|k| {
                let t = 6.0 * k as f64;
                Step {
                    hours: t,
                    // Listed in a different order at each step.
                    fixes: if k % 2 == 0 {
                        vec![
                            moving(52.0, -14.0, 20.0, 0.5, t),
                            moving(48.0, 14.0, -20.0, 0.0, t),
                        ]
                    } else {
                        vec![
                            moving(48.0, 14.0, -20.0, 0.0, t),
                            moving(52.0, -14.0, 20.0, 0.5, t),
                        ]
                    },
                }
            })
            .collect();
        let tracks = link(&steps, &settings());
        assert_eq!(tracks.len(), 2, "{tracks:?}");
        for tr in &tracks {
            assert_eq!(tr.len(), 9);
            let lats: Vec<f64> = tr.iter().map(|&(s, c)| steps[s].fixes[c].lat).collect();
            let first = lats[0];
            assert!(
                lats.iter().all(|l| (l - first).abs() < 0.01),
                "swapped: {lats:?}"
            );
        }
    }

    #[test]
    fn a_gap_longer_than_the_search_ends_a_track() {
        let steps = vec![
            Step {
                hours: 0.0,
                fixes: vec![fix(50.0, 0.0, 1000.0, (0.0, 0.0))],
            },
            Step {
                hours: 6.0,
                fixes: vec![fix(50.0, 12.0, 1000.0, (0.0, 0.0))],
            },
        ];
        // 857 km away with no steering: a new track.
        assert_eq!(link(&steps, &settings()).len(), 2);
        // With a steering wind that carries it there, one track.
        let steps = vec![
            Step {
                hours: 0.0,
                fixes: vec![fix(50.0, 0.0, 1000.0, (40.0, 0.0))],
            },
            steps[1].clone(),
        ];
        assert_eq!(link(&steps, &settings()).len(), 1);
    }
}
