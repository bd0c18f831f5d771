//! `leeward status`: the recent cycles of each feed and where their steps
//! stand, read from the ledger (without changing it, so it can run beside
//! the service).
//!
//! In: a state directory. Out: a report for people, or JSON for scripts.

use std::collections::BTreeMap;
use std::path::Path;

use chrono::DateTime;
use serde::Serialize;

use super::daemon::lock_path;
use super::ledger::{read_state, FailKind, LedgerError, Outcome, State};
use super::waiting::WaitingStep;

/// One cycle of one feed.
#[derive(Debug, Default, Clone, Serialize, PartialEq)]
pub struct CycleSummary {
    /// Feed.
    pub feed: String,
    /// Cycle, `YYYYMMDDTHHMMZ`.
    pub cycle: String,
    /// Steps published complete.
    pub complete: usize,
    /// Steps published partial.
    pub partial: usize,
    /// Steps waiting for input (or in hand).
    pub waiting: usize,
    /// Of the waiting steps, those with a batch job in flight: (lead, job id, attempt).
    pub on_scheduler: Vec<(i64, String, u32)>,
    /// Of the waiting steps, those the service said it waits for input for:
    /// what each lacks and when it is made anyway.
    pub waiting_for: Vec<WaitingStep>,
    /// Steps that produced nothing, with lead and reason.
    pub failed: Vec<(i64, String, String)>,
    /// Leads published, ascending.
    pub leads: Vec<i64>,
    /// Unix time of the last event.
    pub last: i64,
}

/// The whole report.
#[derive(Debug, Default, Clone, Serialize, PartialEq)]
pub struct Report {
    /// Whether a service holds the state directory, and its pid.
    pub running: Option<u32>,
    /// Last start: version and time.
    pub started: Option<(String, i64)>,
    /// Cycles, newest first within each feed.
    pub cycles: Vec<CycleSummary>,
    /// Quarantined files: (file, reason, moved to, time), newest first.
    pub quarantined: Vec<(String, String, Option<String>, i64)>,
    /// When the service last said what its steps wait for (Unix time).
    pub waiting_as_of: Option<i64>,
    /// Published products of the cycles shown whose manifest does not
    /// describe them: (product, what differs).
    pub manifests_not_matching: Vec<(String, String)>,
    /// Publications recorded and not finished: (step, files to rename). In
    /// progress, or cut short by a stop (the service finishes them at start).
    pub publishing: Vec<(String, usize)>,
}

/// Is a service holding the state directory? Its pid if so.
pub fn service_running(state_dir: &Path) -> Option<u32> {
    let f = std::fs::File::open(lock_path(state_dir)).ok()?;
    match f.try_lock_shared() {
        Ok(()) => None,
        Err(_) => std::fs::read_to_string(lock_path(state_dir))
            .ok()
            .and_then(|s| s.trim().parse().ok())
            .or(Some(0)),
    }
}

/// Summarise a state, the `cycles` newest cycles of each feed.
pub fn summarise(state: &State, cycles: usize) -> Vec<CycleSummary> {
    let mut by: BTreeMap<(String, String), CycleSummary> = BTreeMap::new();
    for (tag, st) in &state.steps {
        let c = by
            .entry((tag.feed.clone(), tag.cycle.clone()))
            .or_insert_with(|| CycleSummary {
                feed: tag.feed.clone(),
                cycle: tag.cycle.clone(),
                ..CycleSummary::default()
            });
        let at = match &st.outcome {
            Outcome::Waiting => {
                c.waiting += 1;
                if let Some(j) = &st.job {
                    c.on_scheduler.push((tag.lead, j.job.clone(), j.attempt));
                }
                st.first_seen
            }
            Outcome::Published { partial, at, .. } => {
                if *partial {
                    c.partial += 1;
                } else {
                    c.complete += 1;
                }
                c.leads.push(tag.lead);
                *at
            }
            Outcome::Failed { kind, reason, at } => {
                let k = match kind {
                    FailKind::Missing => "missing",
                    FailKind::Input => "input",
                    FailKind::Output => "output (retrying)",
                    FailKind::Internal => "internal",
                    FailKind::Skipped => "skipped (older than catch_up_hours)",
                    FailKind::Job => "batch job (attempts used up)",
                };
                c.failed.push((tag.lead, k.to_string(), reason.clone()));
                *at
            }
        };
        c.last = c.last.max(at);
    }
    let mut out: Vec<CycleSummary> = Vec::new();
    let mut per_feed: BTreeMap<String, Vec<CycleSummary>> = BTreeMap::new();
    for ((feed, _), mut c) in by {
        c.leads.sort_unstable();
        per_feed.entry(feed).or_default().push(c);
    }
    for (_, mut v) in per_feed {
        v.sort_by(|a, b| b.cycle.cmp(&a.cycle));
        out.extend(v.into_iter().take(cycles));
    }
    out
}

/// The published products of the cycles shown whose manifest does not
/// describe them (size; and SHA-256 with `verify`).
fn manifests_not_matching(
    state: &State,
    shown: &[CycleSummary],
    verify: bool,
) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for (tag, st) in &state.steps {
        let Outcome::Published { path, .. } = &st.outcome else {
            continue;
        };
        if !shown
            .iter()
            .any(|c| c.feed == tag.feed && c.cycle == tag.cycle)
        {
            continue;
        }
        if let Err(why) = super::publish::check_manifest(Path::new(path), verify) {
            out.push((path.clone(), why));
        }
    }
    out
}

/// Build the report of a state directory: the `cycles` newest cycles of each
/// feed, their published products checked against their manifests by size
/// (and by SHA-256 with `verify`, a read of every file).
pub fn report(state_dir: &Path, cycles: usize, verify: bool) -> Result<Report, LedgerError> {
    let state = read_state(state_dir)?;
    let mut q: Vec<(String, String, Option<String>, i64)> = state
        .quarantined
        .iter()
        .map(|(f, q)| (f.clone(), q.reason.clone(), q.moved_to.clone(), q.at))
        .collect();
    q.sort_by_key(|x| std::cmp::Reverse(x.3));
    q.truncate(20);
    let mut shown = summarise(&state, cycles);
    let waiting = super::waiting::read(state_dir);
    if let Some(w) = &waiting {
        for ws in &w.steps {
            let still = state
                .steps
                .get(&ws.step)
                .is_some_and(|s| matches!(s.outcome, Outcome::Waiting));
            if let Some(c) = shown
                .iter_mut()
                .find(|c| still && c.feed == ws.step.feed && c.cycle == ws.step.cycle)
            {
                c.waiting_for.push(ws.clone());
            }
        }
    }
    Ok(Report {
        running: service_running(state_dir),
        started: state.started.as_ref().map(|(v, _, at)| (v.clone(), *at)),
        manifests_not_matching: manifests_not_matching(&state, &shown, verify),
        cycles: shown,
        quarantined: q,
        waiting_as_of: waiting.map(|w| w.written),
        publishing: state
            .publishing
            .iter()
            .map(|(t, p)| (t.to_string(), p.moves.len()))
            .collect(),
    })
}

fn when(t: i64) -> String {
    DateTime::from_timestamp(t, 0)
        .map(|d| d.format("%Y-%m-%d %H:%M:%SZ").to_string())
        .unwrap_or_else(|| t.to_string())
}

fn leads(v: &[i64]) -> String {
    // Runs of evenly spaced leads as first-last/step.
    let mut parts = Vec::new();
    let mut i = 0;
    while i < v.len() {
        let mut j = i;
        let step = if i + 1 < v.len() { v[i + 1] - v[i] } else { 0 };
        while j + 1 < v.len() && v[j + 1] - v[j] == step && step > 0 {
            j += 1;
        }
        if j >= i + 2 {
            parts.push(format!("+{}..+{}h every {}h", v[i], v[j], step));
            i = j + 1;
        } else {
            parts.push(format!("+{}h", v[i]));
            i += 1;
        }
    }
    parts.join(", ")
}

/// The report as text.
pub fn render(state_dir: &Path, r: &Report) -> String {
    let mut o = format!("leeward state in {}\n", state_dir.display());
    match r.running {
        Some(0) => o.push_str("service: running\n"),
        Some(pid) => o.push_str(&format!("service: running (pid {pid})\n")),
        None => o.push_str("service: not running\n"),
    }
    if let Some((v, at)) = &r.started {
        o.push_str(&format!("last start: {} (leeward {v})\n", when(*at)));
    }
    if r.cycles.is_empty() {
        o.push_str("no cycles yet\n");
    }
    let mut feed = "";
    for c in &r.cycles {
        if c.feed != feed {
            feed = &c.feed;
            o.push_str(&format!("\nfeed {feed}\n"));
        }
        o.push_str(&format!(
            "  {}  {} complete, {} partial, {} waiting, {} failed  (last event {})\n",
            c.cycle,
            c.complete,
            c.partial,
            c.waiting,
            c.failed.len(),
            when(c.last)
        ));
        if !c.leads.is_empty() {
            o.push_str(&format!("      published {}\n", leads(&c.leads)));
        }
        let now = chrono::Utc::now().timestamp();
        for w in &c.waiting_for {
            let line = w.line(now);
            // The step is named by the cycle above: from its lead on.
            let from_lead = line.split_once(' ').map_or(line.as_str(), |(_, rest)| rest);
            o.push_str(&format!("      +{}h {from_lead}\n", w.step.lead));
        }
        for (lead, job, attempt) in &c.on_scheduler {
            o.push_str(&format!(
                "      +{lead}h on the scheduler: job {job}, attempt {attempt}\n"
            ));
        }
        for (lead, kind, reason) in &c.failed {
            o.push_str(&format!("      +{lead}h failed ({kind}): {reason}\n"));
        }
    }
    if let (Some(at), None) = (r.waiting_as_of, r.running) {
        if r.cycles.iter().any(|c| !c.waiting_for.is_empty()) {
            o.push_str(&format!(
                "\n(what the steps wait for as the service last said it, at {})\n",
                when(at)
            ));
        }
    }
    if !r.manifests_not_matching.is_empty() {
        o.push_str("\nmanifests that do not match their files\n");
        for (_, why) in &r.manifests_not_matching {
            o.push_str(&format!("  {}\n", crate::escape::text(why)));
        }
    }
    if !r.publishing.is_empty() {
        o.push_str("\npublications recorded and not finished (in progress, or cut short by a stop: the service finishes them when it starts)\n");
        for (step, n) in &r.publishing {
            o.push_str(&format!("  {step}: {n} file(s) to rename\n"));
        }
    }
    if !r.quarantined.is_empty() {
        o.push_str("\nquarantined files (newest first)\n");
        for (f, reason, moved, at) in &r.quarantined {
            o.push_str(&format!(
                "  {} {}: {}",
                when(*at),
                crate::escape::text(f),
                crate::escape::text(reason)
            ));
            if let Some(m) = moved {
                o.push_str(&format!(" (now {m})"));
            }
            o.push('\n');
        }
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn leads_are_shown_as_runs() {
        assert_eq!(leads(&[0, 6, 12, 18, 30]), "+0..+18h every 6h, +30h");
        assert_eq!(leads(&[3]), "+3h");
    }
}
