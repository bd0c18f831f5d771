//! Cycle assembly: fields from many files grouped into steps, each step's
//! completeness judged by its feed's rule, and the order in which ready
//! steps go to the workers.
//!
//! In: catalogued input files (which fields, at which byte ranges), marker
//! files, the clock. Out: steps that are ready (complete, or timed out and
//! to be made with what is there) and the next one to run. No I/O here: the
//! daemon reads files and runs steps; this keeps the bookkeeping.

use std::collections::{BTreeMap, BTreeSet};
use std::path::PathBuf;
use std::time::Instant;

use chrono::NaiveDateTime;

use super::ledger::StepTag;
use super::settings::{Completeness, FeedRule, Order};
use crate::ingest::catalogue::FieldEntry;
use crate::ingest::params::{parameter, surface, Param, Quantity};
use crate::pipeline::StepKey;

/// What one input file gives to one step.
#[derive(Debug, Clone, PartialEq)]
pub struct Contribution {
    /// The file.
    pub path: PathBuf,
    /// Its size when catalogued.
    pub size: u64,
    /// Its checksum when catalogued.
    pub checksum: String,
    /// Byte ranges (offset, length) of the GRIB2 messages holding the step's fields.
    pub messages: Vec<(u64, u64)>,
    /// Checksum of those messages' bytes, in order (FNV-1a 64, hex; see
    /// [`digest`]): what this file gives the step, whatever else it holds or
    /// gains later. Empty for a spec written by a version that had none.
    pub digest: String,
    /// Unix time the file was found finished.
    pub seen_at: f64,
}

/// The checksum of the messages `ranges` of `bytes`, in order: what a file
/// gives one step. A file written in place that grows by other steps'
/// messages keeps this step's digest; one whose messages for it change does not.
pub fn digest(bytes: &[u8], ranges: &[(u64, u64)]) -> String {
    let mut parts = Vec::with_capacity(ranges.len());
    for &(off, len) in ranges {
        let part = usize::try_from(off)
            .ok()
            .zip(usize::try_from(off.saturating_add(len)).ok())
            .and_then(|(a, b)| bytes.get(a..b))
            .unwrap_or(&[]);
        parts.push(part);
    }
    super::ledger::checksum_parts(&parts)
}

/// Where a pending step stands.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Phase {
    /// Waiting for more input.
    Waiting,
    /// Ready to run; `partial` when made at the timeout with what is there.
    Ready {
        /// Incomplete at the timeout.
        partial: bool,
    },
    /// A worker has it.
    Running {
        /// Incomplete at the timeout.
        partial: bool,
    },
    /// Waiting to be tried again after a failure to write or read.
    Retry {
        /// Not before.
        at: Instant,
        /// Incomplete at the timeout.
        partial: bool,
    },
}

/// Has the quantity `q` arrived at the level? Geopotential (0/3/4) counts as geopotential
/// height (0/3/5): the pipeline divides it by standard gravity.
fn arrived(p: &Pending, q: Param, level: i64) -> bool {
    p.have.contains(&(q, level))
        || (q == Quantity::GeopotentialHeight.param()
            && p.have.contains(&(Quantity::Geopotential.param(), level)))
}

/// What a step lacks by its feed's rule (see `Assembly::lacks`).
#[derive(Debug, Clone, PartialEq)]
pub enum Lack {
    /// Required quantities with the level keys they lack, in the order of
    /// `require`; `wanted` are the rule's level keys, `elsewhere` the keys
    /// that arrived for required quantities but are not among them.
    Fields {
        wanted: Vec<i64>,
        lacking: Vec<(Param, Vec<i64>)>,
        elsewhere: Vec<i64>,
    },
    /// Fewer files than a step has.
    Files { have: usize, want: usize },
    /// The marker of the cycle has not arrived.
    Marker { cycle: String, pattern: String },
}

/// A level key (Pa times 100, see `level_key`) in hPa.
fn hpa(k: i64) -> String {
    format!("{}", k as f64 / 1e4)
}

/// A quantity's name as `leeward inspect` prints it.
fn quantity_name(q: Param) -> String {
    parameter(q).map_or_else(|| q.to_string(), |e| e.name.to_string())
}

impl Lack {
    /// One item per quantity and level, level by level ("Temperature at
    /// 500 hPa (not arrived)"), as a manifest lists them.
    pub fn items(&self) -> Vec<String> {
        match self {
            Lack::Fields {
                wanted, lacking, ..
            } => wanted
                .iter()
                .flat_map(|k| {
                    lacking
                        .iter()
                        .filter(move |(_, ks)| ks.contains(k))
                        .map(move |(q, _)| {
                            format!("{} at {} hPa (not arrived)", quantity_name(*q), hpa(*k))
                        })
                })
                .collect(),
            Lack::Files { have, want } => {
                vec![format!("{} of {want} files (not arrived)", want - have)]
            }
            Lack::Marker { .. } => vec!["the marker file (not arrived)".into()],
        }
    }

    /// Briefly, for a step still waiting: each quantity with its levels, and
    /// the levels that arrived but are not the rule's.
    pub fn brief(&self) -> Vec<String> {
        match self {
            Lack::Fields {
                lacking, elsewhere, ..
            } => {
                let mut out: Vec<String> = lacking
                    .iter()
                    .map(|(q, ks)| {
                        let levels: Vec<String> = ks.iter().map(|k| hpa(*k)).collect();
                        format!("{} at {} hPa", quantity_name(*q), levels.join(", "))
                    })
                    .collect();
                if !elsewhere.is_empty() {
                    let levels: Vec<String> = elsewhere.iter().map(|k| hpa(*k)).collect();
                    out.push(format!(
                        "(arrived on levels not in levels_hpa: {} hPa)",
                        levels.join(", ")
                    ));
                }
                out
            }
            Lack::Files { have, want } => {
                vec![format!(
                    "{} more file(s): {have} of {want} arrived",
                    want - have
                )]
            }
            Lack::Marker { cycle, pattern } => {
                vec![format!(
                    "the marker file of cycle {cycle} (a name matching {pattern:?})"
                )]
            }
        }
    }
}

/// A step being assembled.
#[derive(Debug, Clone)]
pub struct Pending {
    /// Its identity in the ledger.
    pub tag: StepTag,
    /// Its identity in the pipeline.
    pub key: StepKey,
    /// Files that hold its fields.
    pub files: BTreeMap<PathBuf, Contribution>,
    /// (WMO parameter, isobaric level in 0.01 Pa) present.
    pub have: BTreeSet<(Param, i64)>,
    /// Unix time its first input was seen (kept across restarts by the ledger).
    pub first_seen: f64,
    /// Phase.
    pub phase: Phase,
    /// Failed attempts so far.
    pub attempts: u32,
    /// Made again on an operator's request: never adopted from an existing manifest.
    pub forced: bool,
    /// Input came while it was being made (a worker or a job had it): once
    /// that run ends it is made again with everything, never left short.
    pub more: bool,
}

impl Pending {
    /// Unix time the last of its inputs was found finished.
    pub fn last_input(&self) -> f64 {
        self.files
            .values()
            .map(|c| c.seen_at)
            .fold(self.first_seen, f64::max)
    }
}

/// The key used for an isobaric level (0.01 Pa), as in the pipeline.
pub fn level_key(pa: f64) -> i64 {
    (pa * 100.0).round() as i64
}

/// The (WMO parameter, isobaric level) of a field on an isobaric level.
pub fn isobaric(e: &FieldEntry) -> Option<(Param, i64)> {
    let q = Param::new(e.discipline, e.category, e.number);
    match (e.level.kind, e.level.value) {
        (surface::ISOBARIC, Some(p)) if p > 0.0 => Some((q, level_key(p))),
        _ => None,
    }
}

/// All pending steps and the markers seen.
#[derive(Debug, Default)]
pub struct Assembly {
    /// Steps not yet settled.
    pub steps: BTreeMap<StepTag, Pending>,
    /// Markers: (feed, cycle `YYYYMMDDTHHMMZ`, lead if the marker names one).
    pub markers: BTreeSet<(String, String, Option<i64>)>,
    /// Cycle of the step last handed to a worker.
    pub last_dispatched: Option<NaiveDateTime>,
}

impl Assembly {
    /// Add a file's fields to a step (created if new). Returns false if this
    /// very file (same path and checksum) was already there.
    #[allow(clippy::too_many_arguments)]
    pub fn add(
        &mut self,
        tag: StepTag,
        key: StepKey,
        c: Contribution,
        fields: &[(Param, i64)],
        first_seen: f64,
        forced: bool,
    ) -> bool {
        let p = self.steps.entry(tag.clone()).or_insert_with(|| Pending {
            tag,
            key,
            files: BTreeMap::new(),
            have: BTreeSet::new(),
            first_seen,
            phase: Phase::Waiting,
            attempts: 0,
            forced,
            more: false,
        });
        p.forced |= forced;
        p.first_seen = p.first_seen.min(first_seen);
        // The same messages from the same file (the file grew by other
        // steps' fields, or was caught again) are nothing new for this step.
        if p.files.get(&c.path).is_some_and(|o| {
            o.checksum == c.checksum || (!c.digest.is_empty() && o.digest == c.digest)
        }) {
            return false;
        }
        p.have.extend(fields.iter().copied());
        p.files.insert(c.path.clone(), c);
        if matches!(p.phase, Phase::Running { .. }) {
            p.more = true;
        }
        true
    }

    /// Is the step complete by its feed's rule?
    pub fn complete(&self, p: &Pending, rule: &FeedRule) -> bool {
        self.lacks(p, rule).is_none()
    }

    /// Has the marker of the step's cycle (or of the step itself) arrived?
    fn marker_seen(&self, p: &Pending) -> bool {
        let (feed, cycle) = (p.tag.feed.clone(), p.tag.cycle.clone());
        self.markers.contains(&(feed.clone(), cycle.clone(), None))
            || self.markers.contains(&(feed, cycle, Some(p.tag.lead)))
    }

    /// What the step still lacks by its feed's rule; `None` when complete.
    /// The one judgement behind `complete`, the manifest's list of what did
    /// not arrive (`not_arrived`) and a waiting step's reason (`waiting_for`).
    pub fn lacks(&self, p: &Pending, rule: &FeedRule) -> Option<Lack> {
        let lack = match rule.feed.complete {
            Completeness::Fields => {
                let wanted: Vec<i64> = rule.levels_pa().iter().map(|&pa| level_key(pa)).collect();
                let lacking: Vec<(Param, Vec<i64>)> = rule
                    .required
                    .iter()
                    .map(|q| {
                        (
                            *q,
                            wanted
                                .iter()
                                .copied()
                                .filter(|k| !arrived(p, *q, *k))
                                .collect(),
                        )
                    })
                    .filter(|(_, ks): &(Param, Vec<i64>)| !ks.is_empty())
                    .collect();
                if lacking.is_empty() {
                    return None;
                }
                let mut elsewhere: Vec<i64> = p
                    .have
                    .iter()
                    .filter(|(q, k)| rule.required.contains(q) && !wanted.contains(k))
                    .map(|(_, k)| *k)
                    .collect();
                elsewhere.sort_unstable();
                elsewhere.dedup();
                Lack::Fields {
                    wanted,
                    lacking,
                    elsewhere,
                }
            }
            Completeness::Files => {
                let (have, want) = (p.files.len(), rule.feed.files_per_step as usize);
                if have >= want {
                    return None;
                }
                Lack::Files { have, want }
            }
            Completeness::Marker => {
                if self.marker_seen(p) {
                    return None;
                }
                Lack::Marker {
                    cycle: p.tag.cycle.clone(),
                    pattern: rule.feed.marker_pattern.clone(),
                }
            }
        };
        Some(lack)
    }

    /// What the feed's rule expected of a step and did not get, one item per
    /// quantity and level (the manifest's `missing`).
    pub fn not_arrived(&self, p: &Pending, rule: &FeedRule) -> Vec<String> {
        self.lacks(p, rule).map_or_else(Vec::new, |l| l.items())
    }

    /// What a waiting step still lacks by its feed's rule, said briefly: each
    /// quantity with the levels it lacks (and the levels that arrived but are
    /// not among `levels_hpa`), the files not yet there, or the marker.
    pub fn waiting_for(&self, p: &Pending, rule: &FeedRule) -> Vec<String> {
        self.lacks(p, rule).map_or_else(Vec::new, |l| l.brief())
    }

    /// Move waiting steps that are complete, or past the timeout, to ready;
    /// retries whose time has come too. Returns the steps made ready.
    pub fn promote(
        &mut self,
        rules: &[FeedRule],
        now_unix: f64,
        now: Instant,
        timeout_s: f64,
    ) -> Vec<StepTag> {
        // One pass over the steps without copying them; only the few that
        // change phase are named (this runs every turn of the main loop, with
        // thousands of steps in hand during a backlog).
        let mut changes: Vec<(StepTag, Phase)> = Vec::new();
        for (tag, p) in &self.steps {
            let Some(rule) = rules.iter().find(|r| r.feed.name == tag.feed) else {
                continue;
            };
            let next = match p.phase {
                Phase::Waiting => {
                    if self.complete(p, rule) {
                        Some(Phase::Ready { partial: false })
                    } else if now_unix - p.first_seen >= timeout_s {
                        Some(Phase::Ready { partial: true })
                    } else {
                        None
                    }
                }
                Phase::Retry { at, partial } if at <= now => Some(Phase::Ready { partial }),
                _ => None,
            };
            if let Some(n) = next {
                changes.push((tag.clone(), n));
            }
        }
        let mut out = Vec::with_capacity(changes.len());
        for (tag, n) in changes {
            if let Some(p) = self.steps.get_mut(&tag) {
                p.phase = n;
                out.push(tag);
            }
        }
        out
    }

    /// The ready step to run next. `newest-first`: the newest cycle, lowest
    /// lead. `oldest-first`: the oldest cycle, lowest lead, except that when
    /// neither a running step nor the step last handed out belongs to the
    /// newest cycle with ready work (or a newer one), that cycle goes first,
    /// so a backlog never starves a new cycle, even with one worker.
    pub fn next(&self, order: Order, running: &[StepTag]) -> Option<StepTag> {
        self.next_where(order, running, |_| true)
    }

    /// [`Assembly::next`] among the ready steps that `may` allows (a free
    /// worker or job slot for their feed, no other step of their run in hand).
    pub fn next_where(
        &self,
        order: Order,
        running: &[StepTag],
        may: impl Fn(&Pending) -> bool,
    ) -> Option<StepTag> {
        let ready: Vec<&Pending> = self
            .steps
            .values()
            .filter(|p| {
                matches!(p.phase, Phase::Ready { .. }) && may(p) && !running.contains(&p.tag)
            })
            .collect();
        let cycle = |p: &Pending| -> NaiveDateTime { p.key.reference_time };
        let newest = ready.iter().map(|p| cycle(p)).max()?;
        let by_lead = |a: &&&Pending, b: &&&Pending| {
            (a.key.valid_time, &a.tag).cmp(&(b.key.valid_time, &b.tag))
        };
        let pick_cycle = match order {
            Order::NewestFirst => newest,
            Order::OldestFirst => {
                // A running step of this cycle or a newer one already serves the
                // newest work; with one worker, the turns alternate.
                let newest_running = running
                    .iter()
                    .filter_map(|t| self.steps.get(t).map(|p| p.key.reference_time))
                    .chain(self.last_dispatched)
                    .max()
                    .is_some_and(|c| c >= newest);
                if newest_running {
                    ready.iter().map(|p| cycle(p)).min()?
                } else {
                    newest
                }
            }
        };
        ready
            .iter()
            .filter(|p| cycle(p) == pick_cycle)
            .min_by(by_lead)
            .map(|p| p.tag.clone())
    }

    /// Count of steps in each phase: (waiting, ready, running, retrying), for one feed.
    pub fn counts(&self, feed: &str) -> (usize, usize, usize, usize) {
        let mut c = (0, 0, 0, 0);
        for p in self.steps.values().filter(|p| p.tag.feed == feed) {
            match p.phase {
                Phase::Waiting => c.0 += 1,
                Phase::Ready { .. } => c.1 += 1,
                Phase::Running { .. } => c.2 += 1,
                Phase::Retry { .. } => c.3 += 1,
            }
        }
        c
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Products;
    use crate::service::settings::{Feed, Service};

    fn t(h: u32) -> NaiveDateTime {
        chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
            .unwrap()
            .and_hms_opt(0, 0, 0)
            .unwrap()
            + chrono::TimeDelta::hours(i64::from(h))
    }

    fn step(cycle_h: u32, lead: u32) -> (StepTag, StepKey) {
        (
            StepTag {
                feed: "m".into(),
                cycle: t(cycle_h).format("%Y%m%dT%H%MZ").to_string(),
                lead: i64::from(lead),
                member: None,
                grid: "g".into(),
            },
            StepKey {
                centre: 1,
                reference_time: t(cycle_h),
                valid_time: t(cycle_h + lead),
                member: None,
                grid_key: vec![],
            },
        )
    }

    fn contribution(name: &str) -> Contribution {
        Contribution {
            path: PathBuf::from(name),
            size: 1,
            checksum: name.into(),
            messages: vec![(0, 1)],
            digest: format!("d{name}"),
            seen_at: 0.0,
        }
    }

    use crate::ingest::params::Quantity;

    fn rule(toml_feed: &str) -> FeedRule {
        let f: Feed = toml::from_str(toml_feed).unwrap();
        FeedRule::new(&f, &Service::default(), &Products::default()).unwrap()
    }

    #[test]
    fn a_step_split_over_files_is_complete_when_the_last_field_comes() {
        let r = rule("name = \"m\"\nlevels_hpa = [500.0, 300.0]\n");
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        let lv = |p: f64| level_key(p * 100.0);
        let first = [Quantity::Temperature, Quantity::WindU, Quantity::WindV]
            .iter()
            .flat_map(|q| [(q.param(), lv(500.0)), (q.param(), lv(300.0))])
            .collect::<Vec<_>>();
        assert!(a.add(
            tag.clone(),
            key.clone(),
            contribution("a"),
            &first,
            0.0,
            false
        ));
        assert!(!a.add(
            tag.clone(),
            key.clone(),
            contribution("a"),
            &first,
            0.0,
            false
        ));
        let now = Instant::now();
        assert!(a
            .promote(std::slice::from_ref(&r), 10.0, now, 100.0)
            .is_empty());
        let gh = [
            (Quantity::GeopotentialHeight.param(), lv(500.0)),
            (Quantity::GeopotentialHeight.param(), lv(300.0)),
        ];
        a.add(tag.clone(), key, contribution("b"), &gh, 5.0, false);
        assert_eq!(a.promote(&[r], 10.0, now, 100.0), vec![tag.clone()]);
        assert_eq!(a.steps[&tag].phase, Phase::Ready { partial: false });
    }

    #[test]
    fn a_file_written_in_place_brings_news_only_when_the_steps_messages_change() {
        let (tag, key) = step(0, 6);
        let mut a = Assembly::default();
        let grown = |checksum: &str, digest: &str| Contribution {
            checksum: checksum.into(),
            digest: digest.into(),
            ..contribution("a")
        };
        assert!(a.add(tag.clone(), key.clone(), grown("c1", "d1"), &[], 0.0, false));
        assert!(!a.steps[&tag].more);
        a.steps.get_mut(&tag).unwrap().phase = Phase::Running { partial: false };
        // The file grew by another step's messages: nothing new for this one.
        assert!(!a.add(tag.clone(), key.clone(), grown("c2", "d1"), &[], 0.0, false));
        assert!(!a.steps[&tag].more);
        // Its own messages grew while it was being made: made again after.
        assert!(a.add(tag.clone(), key, grown("c3", "d2"), &[], 0.0, false));
        assert!(a.steps[&tag].more);
        assert_eq!(a.steps[&tag].files[&PathBuf::from("a")].digest, "d2");
        // The digest is of the step's messages only, in order.
        let bytes = b"xxAAyyBBzz";
        assert_eq!(
            digest(bytes, &[(2, 2), (6, 2)]),
            crate::ingest::bytes::fnv1a_hex(b"AABB")
        );
        assert_ne!(
            digest(bytes, &[(6, 2), (2, 2)]),
            digest(bytes, &[(2, 2), (6, 2)])
        );
        assert_eq!(
            digest(bytes, &[(8, 5)]),
            crate::ingest::bytes::fnv1a_hex(b"")
        );
    }

    #[test]
    fn geopotential_completes_a_step_that_needs_heights() {
        // Geopotential (0/3/4) instead of geopotential height (0/3/5): the step is
        // complete, and nothing is said not to have arrived.
        let r = rule("name = \"m\"\nlevels_hpa = [500.0]\n");
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        let lv = level_key(500.0 * 100.0);
        let mut fields: Vec<(Param, i64)> = [
            Quantity::Temperature,
            Quantity::WindU,
            Quantity::WindV,
            Quantity::Geopotential,
        ]
        .iter()
        .map(|q| (q.param(), lv))
        .collect();
        a.add(
            tag.clone(),
            key.clone(),
            contribution("a"),
            &fields,
            0.0,
            false,
        );
        assert!(a.complete(&a.steps[&tag], &r));
        assert!(a.not_arrived(&a.steps[&tag], &r).is_empty());
        assert!(a.waiting_for(&a.steps[&tag], &r).is_empty());
        // Without it, heights are still awaited, and both renderings say so.
        fields.pop();
        let (tag2, key2) = step(0, 12);
        a.add(tag2.clone(), key2, contribution("b"), &fields, 0.0, false);
        assert!(!a.complete(&a.steps[&tag2], &r));
        assert_eq!(
            a.not_arrived(&a.steps[&tag2], &r),
            vec!["Geopotential height at 500 hPa (not arrived)".to_string()]
        );
        assert_eq!(
            a.waiting_for(&a.steps[&tag2], &r),
            vec!["Geopotential height at 500 hPa".to_string()]
        );
    }

    #[test]
    fn timeout_makes_a_partial_step_and_markers_and_counts_complete_others() {
        let now = Instant::now();
        let r = rule("name = \"m\"\nlevels_hpa = [500.0]\n");
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        a.add(tag.clone(), key, contribution("a"), &[], 0.0, false);
        assert!(a
            .promote(std::slice::from_ref(&r), 99.0, now, 100.0)
            .is_empty());
        assert_eq!(a.promote(&[r], 100.0, now, 100.0), vec![tag.clone()]);
        assert_eq!(a.steps[&tag].phase, Phase::Ready { partial: true });

        let m = rule(
            "name = \"m\"\ncomplete = \"marker\"\nmarker_pattern = '^(?P<cycle>\\d{10})\\.done$'\n",
        );
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        a.add(tag.clone(), key, contribution("a"), &[], 0.0, false);
        assert!(a
            .promote(std::slice::from_ref(&m), 1.0, now, 100.0)
            .is_empty());
        a.markers.insert(("m".into(), tag.cycle.clone(), None));
        assert_eq!(a.promote(&[m], 1.0, now, 100.0), vec![tag]);

        let f = rule("name = \"m\"\ncomplete = \"files\"\nfiles_per_step = 2\n");
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        a.add(tag.clone(), key.clone(), contribution("a"), &[], 0.0, false);
        assert!(a
            .promote(std::slice::from_ref(&f), 1.0, now, 100.0)
            .is_empty());
        a.add(tag.clone(), key, contribution("b"), &[], 0.0, false);
        assert_eq!(a.promote(&[f], 1.0, now, 100.0), vec![tag]);
    }

    #[test]
    fn a_waiting_step_says_what_it_lacks_and_levels_that_do_not_match() {
        let r = rule(
            "name = \"m\"\nlevels_hpa = [925.0, 500.0]\nrequire = [\"Temperature\", \"u-component of wind\"]\n",
        );
        let mut a = Assembly::default();
        let (tag, key) = step(0, 6);
        let lv = |p: f64| level_key(p * 100.0);
        // Temperature at 500 and 920 hPa (the model's level is not 925), u at 925 and 500.
        let have = [
            (Quantity::Temperature.param(), lv(500.0)),
            (Quantity::Temperature.param(), lv(920.0)),
            (Quantity::WindU.param(), lv(925.0)),
            (Quantity::WindU.param(), lv(500.0)),
        ];
        a.add(tag.clone(), key, contribution("a"), &have, 0.0, false);
        assert_eq!(
            a.waiting_for(&a.steps[&tag], &r),
            vec![
                "Temperature at 925 hPa".to_string(),
                "(arrived on levels not in levels_hpa: 920 hPa)".to_string()
            ]
        );
        let f = rule("name = \"m\"\ncomplete = \"files\"\nfiles_per_step = 3\n");
        assert_eq!(
            a.waiting_for(&a.steps[&tag], &f),
            vec!["2 more file(s): 1 of 3 arrived".to_string()]
        );
        let m = rule(
            "name = \"m\"\ncomplete = \"marker\"\nmarker_pattern = '^(?P<cycle>\\d{10})\\.done$'\n",
        );
        assert!(a.waiting_for(&a.steps[&tag], &m)[0]
            .starts_with("the marker file of cycle 20260314T0000Z"));
        a.markers.insert(("m".into(), tag.cycle.clone(), None));
        assert!(a.waiting_for(&a.steps[&tag], &m).is_empty());
    }

    #[test]
    fn newest_first_and_no_starvation_oldest_first() {
        let mut a = Assembly::default();
        for (c, l) in [(0, 6), (0, 0), (6, 12), (6, 0), (12, 6)] {
            let (tag, key) = step(c, l);
            a.add(tag.clone(), key, contribution("x"), &[], 0.0, false);
            if let Some(p) = a.steps.get_mut(&tag) {
                p.phase = Phase::Ready { partial: false };
            }
        }
        let pick = |a: &Assembly, o, running: &[StepTag]| {
            let t = a.next(o, running).unwrap();
            (t.cycle.clone(), t.lead)
        };
        assert_eq!(
            pick(&a, Order::NewestFirst, &[]),
            ("20260314T1200Z".to_string(), 6)
        );
        // Oldest first still gives the newest cycle a worker when none has it.
        assert_eq!(
            pick(&a, Order::OldestFirst, &[]),
            ("20260314T1200Z".to_string(), 6)
        );
        let (running, _) = step(12, 6);
        if let Some(p) = a.steps.get_mut(&running) {
            p.phase = Phase::Running { partial: false };
        }
        assert_eq!(
            pick(&a, Order::OldestFirst, std::slice::from_ref(&running)),
            ("20260314T0000Z".to_string(), 0)
        );
        assert_eq!(
            pick(&a, Order::NewestFirst, std::slice::from_ref(&running)),
            ("20260314T0600Z".to_string(), 0)
        );
        // One worker, nothing running: turns alternate between the newest and the oldest.
        a.steps.remove(&running);
        a.last_dispatched = Some(t(12));
        assert_eq!(
            pick(&a, Order::OldestFirst, &[]),
            ("20260314T0000Z".to_string(), 0)
        );
        a.last_dispatched = Some(t(0));
        assert_eq!(
            pick(&a, Order::OldestFirst, &[]),
            ("20260314T0600Z".to_string(), 0)
        );
    }
}
