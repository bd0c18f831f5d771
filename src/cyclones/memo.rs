//! The centres of a cycle's step files as last read, so that the
//! short-lived process that makes a cycle's tracks (one per published step)
//! reads again only the step files that changed since the last one: the new
//! step and the earlier steps it revised.
//!
//! The memo is a small text file, [`FILE`] in the staging directory of the
//! step being published: the service keeps the text of the cycles it
//! published last in memory (bounded; no library state, so its memory does
//! not grow with the steps), puts it there before the tracks process starts
//! and takes it back after. Its first line holds the settings the centres
//! were found with; then per step file a `file` line (name, size,
//! modification time in ns, cycle and valid time, budget interval, earth
//! radius, source of the pressure) and one `centre` line per centre (grid
//! point, position, pressures, the facts). A file is taken from the memo only
//! when its name, size and modification time all match (a revised file is a
//! new file renamed into place, with a new modification time); otherwise it
//! is read again. Numbers are written in Rust's shortest round-trip form, so
//! a centre read from the memo is the very centre read from the file. A memo
//! that does not parse, or holds other settings, is passed over whole.
//!
//! In: a memo path and the settings. Out: [`StepCentres`] per file, the
//! memo written back with what it knew and what was read.

use std::collections::HashMap;
use std::path::Path;
use std::time::UNIX_EPOCH;

use chrono::NaiveDateTime;

use super::detect::Centre;
use super::facts::Facts;
use super::read::{step_centres, Settings, StepCentres};

const TIME: &str = "%Y%m%dT%H%M%S";

/// The memo's name in a staging directory.
pub const FILE: &str = "centres.memo";

/// What the memo knows of one file: size, modification time (ns), centres.
type Entry = (u64, u128, StepCentres);

/// The memo of one cycle's step files.
#[derive(Debug)]
pub struct Memo {
    settings: String,
    known: HashMap<String, Entry>,
    used: HashMap<String, Entry>,
    /// Files read from the memo and files read again, for the log.
    pub hits: usize,
    pub reads: usize,
}

fn settings_key(set: &Settings) -> String {
    format!(
        "settings\t{}\t{}\t{}",
        set.detect.interval, set.detect.max_radius, set.radius
    )
}

/// The file in a staging directory that holds the centres of the step staged
/// there, found from its products while it was written ([`write_made`]); the
/// memo beside it takes them ([`Memo::load`]).
pub const MADE: &str = "centres.made";

/// Write the centres `c` of the step file staged at `path` (published as
/// `name`) into [`MADE`] beside it, as a memo of that file alone, so that the
/// tracks made when it is published do not read it back.
pub fn write_made(path: &Path, name: &str, set: &Settings, c: &StepCentres) -> Result<(), String> {
    let (size, mtime) = stamp(path)?;
    let entry = (size, mtime, c.clone());
    let text = format!("{}\n{}", settings_key(set), encode(name, &entry));
    let made = path.parent().unwrap_or(Path::new(".")).join(MADE);
    crate::output::write_file_atomic(&made, text.as_bytes()).map_err(|e| e.to_string())
}

/// A file's size and modification time in ns since 1970.
fn stamp(path: &Path) -> Result<(u64, u128), String> {
    let m = std::fs::metadata(path).map_err(|e| format!("cannot read: {e}"))?;
    let t = m
        .modified()
        .ok()
        .and_then(|t| t.duration_since(UNIX_EPOCH).ok())
        .map_or(0, |d| d.as_nanos());
    Ok((m.len(), t))
}

fn facts_values(f: &Facts) -> [f64; 16] {
    [
        f.steer_u,
        f.steer_v,
        f.eady_max,
        f.thick_gradient_max,
        f.stretch_max,
        f.zeta_stretch_max,
        f.orog_upstream_max,
        f.orog_centre,
        f.low_pv_max,
        f.zeta_diff_max,
        f.theta_e_850_max,
        f.trop_theta,
        f.upper_theta,
        f.upper_pv_max,
        f.upper_pv_distance,
        f.upper_pv_along_flow,
    ]
}

fn facts_from(v: &[f64; 16]) -> Facts {
    Facts {
        steer_u: v[0],
        steer_v: v[1],
        eady_max: v[2],
        thick_gradient_max: v[3],
        stretch_max: v[4],
        zeta_stretch_max: v[5],
        orog_upstream_max: v[6],
        orog_centre: v[7],
        low_pv_max: v[8],
        zeta_diff_max: v[9],
        theta_e_850_max: v[10],
        trop_theta: v[11],
        upper_theta: v[12],
        upper_pv_max: v[13],
        upper_pv_distance: v[14],
        upper_pv_along_flow: v[15],
    }
}

/// Tabs and line ends would break the lines: they become spaces.
fn clean(s: &str) -> String {
    s.replace(['\t', '\n', '\r'], " ")
}

fn encode(name: &str, e: &Entry) -> String {
    let (size, mtime, s) = e;
    let mut o = format!(
        "file\t{}\t{size}\t{mtime}\t{}\t{}\t{}\t{}\t{}\n",
        clean(name),
        s.reference_time.format(TIME),
        s.valid_time.format(TIME),
        s.budget_interval_h,
        s.radius,
        clean(&s.source)
    );
    for (c, f) in &s.centres {
        let head = [c.lat, c.lon, c.pressure, c.grid_pressure, c.outer, c.depth];
        let nums: Vec<String> = head
            .iter()
            .chain(facts_values(f).iter())
            .map(f64::to_string)
            .collect();
        o.push_str(&format!("centre\t{}\t{}\t{}\n", c.j, c.i, nums.join("\t")));
    }
    o
}

fn parse_file(cols: &[&str], dir: &Path) -> Option<(String, Entry)> {
    let [name, size, mtime, r, v, bi, radius, source] = cols else {
        return None;
    };
    let s = StepCentres {
        path: dir.join(name),
        reference_time: NaiveDateTime::parse_from_str(r, TIME).ok()?,
        valid_time: NaiveDateTime::parse_from_str(v, TIME).ok()?,
        source: source.to_string(),
        budget_interval_h: bi.parse().ok()?,
        radius: radius.parse().ok()?,
        centres: Vec::new(),
    };
    Some((
        name.to_string(),
        (size.parse().ok()?, mtime.parse().ok()?, s),
    ))
}

fn parse_centre(cols: &[&str]) -> Option<(Centre, Facts)> {
    let (j, i) = (cols.first()?.parse().ok()?, cols.get(1)?.parse().ok()?);
    let nums: Vec<f64> = cols[2..]
        .iter()
        .map(|x| x.parse::<f64>())
        .collect::<Result<_, _>>()
        .ok()?;
    let facts: [f64; 16] = nums.get(6..)?.try_into().ok()?;
    let c = Centre {
        j,
        i,
        lat: nums[0],
        lon: nums[1],
        pressure: nums[2],
        grid_pressure: nums[3],
        outer: nums[4],
        depth: nums[5],
    };
    Some((c, facts_from(&facts)))
}

/// The memo's entries in `text`, or `None` when any line does not parse or
/// the settings differ (the whole memo is then passed over).
fn decode(text: &str, settings: &str, dir: &Path) -> Option<HashMap<String, Entry>> {
    let mut lines = text.lines();
    if lines.next()? != settings {
        return None;
    }
    let mut known: HashMap<String, Entry> = HashMap::new();
    let mut last: Option<String> = None;
    for line in lines {
        let cols: Vec<&str> = line.split('\t').collect();
        match cols.first() {
            Some(&"file") => {
                let (name, e) = parse_file(&cols[1..], dir)?;
                known.insert(name.clone(), e);
                last = Some(name);
            }
            Some(&"centre") => {
                let c = parse_centre(&cols[1..])?;
                known.get_mut(last.as_ref()?)?.2.centres.push(c);
            }
            _ => return None,
        }
    }
    Some(known)
}

impl Memo {
    /// The memo at `path` for `set` (empty when it is missing, unreadable or
    /// for other settings).
    pub fn load(path: &Path, set: &Settings) -> Memo {
        let settings = settings_key(set);
        let dir = path.parent().unwrap_or(Path::new("."));
        let read = |p: &Path| {
            std::fs::read_to_string(p)
                .ok()
                .and_then(|t| decode(&t, &settings, dir))
        };
        let mut known = read(path).unwrap_or_default();
        // The step staged beside the memo, as found while it was written.
        known.extend(read(&dir.join(MADE)).unwrap_or_default());
        Memo {
            settings,
            known,
            used: HashMap::new(),
            hits: 0,
            reads: 0,
        }
    }

    /// The centres of the step file `name`, read at `path` (its place or a
    /// staged copy of it with the same size and time): from the memo when it
    /// knows the file as it is, otherwise read from the file.
    pub fn centres(
        &mut self,
        path: &Path,
        name: &str,
        set: &Settings,
    ) -> Result<StepCentres, String> {
        let (size, mtime) = stamp(path)?;
        let known = self
            .known
            .get(name)
            .filter(|(s, t, _)| *s == size && *t == mtime);
        let centres = match known {
            Some((_, _, c)) => {
                self.hits += 1;
                StepCentres {
                    path: path.to_path_buf(),
                    ..c.clone()
                }
            }
            None => {
                self.reads += 1;
                step_centres(path, set)?
            }
        };
        self.used
            .insert(name.to_string(), (size, mtime, centres.clone()));
        Ok(centres)
    }

    /// Write what the memo knew and what was read since [`Memo::load`] to
    /// `path` (hidden name, fsync, rename). A file of the cycle directory not
    /// used this time (another member's, say) keeps its entry.
    pub fn save(&self, path: &Path) -> std::io::Result<()> {
        let mut all: HashMap<&String, &Entry> = self.known.iter().collect();
        all.extend(self.used.iter());
        let mut names: Vec<&String> = all.keys().copied().collect();
        names.sort();
        let mut text = format!("{}\n", self.settings);
        for n in names {
            text.push_str(&encode(n, all[n]));
        }
        crate::output::write_file_atomic(path, text.as_bytes())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> StepCentres {
        let t = |h| {
            chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
                .and_then(|d| d.and_hms_opt(0, 0, 0))
                .expect("time")
                + chrono::TimeDelta::hours(h)
        };
        let f = Facts {
            eady_max: 1.0 / 3.0,
            upper_pv_along_flow: -123.456_789_012_345,
            ..Facts::default()
        };
        StepCentres {
            path: "/x/a.nc".into(),
            reference_time: t(0),
            valid_time: t(6),
            source: "passed through\tfrom 0/3/1".into(),
            budget_interval_h: f64::NAN,
            radius: 6_371_229.0,
            centres: vec![(
                Centre {
                    j: 12,
                    i: 345,
                    lat: -61.123_456_789,
                    lon: 179.999_999_999,
                    pressure: 97_012.345_678_9,
                    grid_pressure: 97_050.0,
                    outer: 98_400.0,
                    depth: 1_350.0,
                },
                f,
            )],
        }
    }

    #[test]
    fn a_memo_gives_back_every_number_bit_for_bit() {
        let s = sample();
        let set = Settings {
            detect: super::super::detect::Settings {
                interval: 200.0,
                max_radius: 1.5e6,
            },
            radius: 5e5,
        };
        let key = settings_key(&set);
        let text = format!(
            "{key}\n{}",
            encode("a.nc", &(10, 1_700_000_000_123_456_789, s.clone()))
        );
        let known = decode(&text, &key, Path::new("/x")).expect("decodes");
        let (size, mtime, back) = &known["a.nc"];
        assert_eq!((*size, *mtime), (10, 1_700_000_000_123_456_789));
        let (c, f) = &back.centres[0];
        let (c0, f0) = &s.centres[0];
        assert_eq!(c, c0);
        let bits = |a: [f64; 16]| a.map(f64::to_bits);
        assert_eq!(bits(facts_values(f)), bits(facts_values(f0)));
        assert_eq!(back.valid_time, s.valid_time);
        assert!(back.budget_interval_h.is_nan());
        assert_eq!(back.source, "passed through from 0/3/1");
        // Other settings: the memo is passed over as a whole.
        let other = settings_key(&Settings { radius: 6e5, ..set });
        assert!(decode(&text, &other, Path::new("/x")).is_none());
        // A cut line: passed over, not half believed.
        let cut = &text[..text.len() - 20];
        assert!(decode(cut, &key, Path::new("/x")).is_none());
    }
}
