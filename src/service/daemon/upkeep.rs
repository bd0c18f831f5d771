//! The daemon's rounds besides files and jobs: waiting steps explained and timed out,
//! reprocess requests, retention and forgetting, the status file, reloading the
//! configuration.

use super::*;

impl Daemon {
    /// A step still waiting for input: what it lacks and when it is made anyway;
    /// `None` when it is not waiting or lacks nothing.
    pub(super) fn waiting_step(&self, tag: &StepTag) -> Option<WaitingStep> {
        let p = self.asm.steps.get(tag)?;
        if p.phase != Phase::Waiting {
            return None;
        }
        let rule = self.rules.iter().find(|r| r.feed.name == tag.feed)?;
        let missing = self.asm.waiting_for(p, rule);
        if missing.is_empty() {
            return None;
        }
        Some(WaitingStep {
            step: tag.clone(),
            missing,
            first_seen: p.first_seen.ceil() as i64,
            made_by: (p.first_seen + self.cfg.service.step_timeout_s).ceil() as i64,
        })
    }

    /// Say what the waiting steps lack, in the state directory (for `leeward
    /// status`) and on /health, whenever that changes.
    pub(super) fn report_waiting(&mut self) {
        let now: Vec<WaitingStep> = self
            .asm
            .steps
            .keys()
            .filter_map(|t| self.waiting_step(t))
            .collect();
        if now == self.last_waiting {
            return;
        }
        let w = Waiting {
            written: Utc::now().timestamp(),
            pid: std::process::id(),
            steps: now.clone(),
        };
        if let Err(e) = waiting::write(&self.cfg.service.state_dir, &w) {
            warn!(file = %waiting::path(&self.cfg.service.state_dir).display(), error = %e, "waiting steps not written to the state directory");
        }
        self.metrics().waiting = now.clone();
        self.last_waiting = now;
    }

    pub(super) fn timeouts(&mut self) {
        let ready = self.asm.promote(
            &self.rules,
            unix_now(),
            Instant::now(),
            self.cfg.service.step_timeout_s,
        );
        for tag in ready {
            if let Some(p) = self.asm.steps.get(&tag) {
                if matches!(p.phase, Phase::Ready { partial: true }) && p.attempts == 0 {
                    warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, files = p.files.len(), "step still incomplete at the timeout; made with what is there");
                }
            }
        }
    }

    pub(super) fn requests(&mut self) {
        let dir = requests_dir(&self.cfg.service.state_dir);
        let Ok(rd) = std::fs::read_dir(&dir) else {
            return;
        };
        let mut files: Vec<PathBuf> = rd
            .flatten()
            .map(|e| e.path())
            .filter(|p| p.extension().is_some_and(|x| x == "json"))
            .collect();
        files.sort();
        for f in files {
            let req: Option<ReprocessRequest> = std::fs::read(&f)
                .ok()
                .and_then(|b| serde_json::from_slice(&b).ok());
            let _ = std::fs::remove_file(&f);
            let Some(req) = req else {
                warn!(file = %f.display(), "unreadable reprocess request removed");
                continue;
            };
            let Some(rule) = self.rules.iter().find(|r| r.feed.name == req.feed).cloned() else {
                warn!(feed = %req.feed, "reprocess request for an unknown feed ignored");
                continue;
            };
            info!(feed = %req.feed, cycle = %req.cycle, step = ?req.lead, "reprocess requested");
            self.record(Record::Reprocess {
                feed: req.feed.clone(),
                cycle: req.cycle.clone(),
                lead: req.lead,
                at: Utc::now().timestamp(),
            });
            self.too_old.remove(&(req.feed.clone(), req.cycle.clone()));
            // Look at every file of the feed again; only the asked steps are reopened.
            let Ok(rd) = std::fs::read_dir(&rule.dir) else {
                warn!(feed = %req.feed, dir = %rule.dir.display(), "incoming directory unreadable; nothing to reprocess from");
                continue;
            };
            let mut paths: Vec<PathBuf> = rd
                .flatten()
                .map(|e| e.path())
                .filter(|p| p.is_file())
                .collect();
            paths.sort();
            for p in paths {
                if p.file_name().is_some_and(|n| {
                    !crate::service::watch::ignored(&crate::escape::path(Path::new(n)))
                }) {
                    self.ingest(&p, Some(&req));
                    self.keepalive();
                }
            }
            let n = self
                .asm
                .steps
                .values()
                .filter(|p| {
                    p.forced
                        && p.tag.feed == req.feed
                        && p.tag.cycle == req.cycle
                        && req.lead.is_none_or(|l| l == p.tag.lead)
                })
                .count();
            info!(feed = %req.feed, cycle = %req.cycle, steps = n, "reprocess: steps to make again");
            if n == 0 {
                warn!(feed = %req.feed, cycle = %req.cycle, "reprocess: no input of the cycle is in the incoming directory");
            }
        }
    }

    pub(super) fn retention(&mut self) {
        let days = self.cfg.service.retention_days;
        if days > 0 {
            let now = Utc::now().naive_utc();
            for r in &self.rules {
                publish::apply_retention(&self.cfg.service.out_dir.join(&r.feed.name), days, now);
            }
        }
        self.forget_old();
    }

    /// Forget what settled longer ago than `service.ledger_days` and compact
    /// the journal when anything was forgotten or it has grown to more than
    /// twice what its state needs: memory and restart time stay bounded by
    /// that window, not by how long the service has run.
    pub(super) fn forget_old(&mut self) {
        let days = i64::from(self.cfg.service.ledger_days_in_effect());
        let forgotten = self
            .ledger
            .state
            .forget(Utc::now().timestamp() - days * 86_400, |file| {
                crate::escape::unescape_path(file).is_some_and(|p| p.symlink_metadata().is_ok())
            });
        // Cycles already said to be too old are said again at most once a window.
        let cutoff = cycle_dir_name((Utc::now() - TimeDelta::days(days)).naive_utc());
        self.too_old.retain(|(_, c)| *c >= cutoff);
        let live = self.ledger.state.snapshot().len();
        if forgotten == 0 && self.ledger.lines() <= 2 * live + 10_000 {
            return;
        }
        if self.state_problem.is_some() || self.ledger.in_trouble() {
            return; // compacted once the state directory can be written again
        }
        let t = Instant::now();
        match self.ledger.compact() {
            Ok((was, now)) => info!(
                steps_forgotten = forgotten,
                lines_before = was,
                lines_after = now,
                seconds = t.elapsed().as_secs_f64(),
                ledger_days = days,
                "ledger compacted"
            ),
            Err(e) => {
                error!(error = %e, "ledger not compacted; the state directory needs attention");
                self.metrics().ledger_errors += 1;
            }
        }
    }

    pub(super) fn update_status(&mut self) {
        let mut tot = (0, 0, 0, 0);
        {
            let names: Vec<String> = self.rules.iter().map(|r| r.feed.name.clone()).collect();
            let counts: Vec<(String, (usize, usize, usize, usize))> = names
                .iter()
                .map(|n| (n.clone(), self.asm.counts(n)))
                .collect();
            let in_flight = self.jobs.len();
            let mut m = self.metrics();
            m.heartbeat = Some(Instant::now());
            m.scheduler.in_flight = in_flight;
            for (n, c) in counts {
                m.feed(&n).queue = c;
                tot = (tot.0 + c.0, tot.1 + c.1, tot.2 + c.2, tot.3 + c.3);
            }
        }
        let mut s = format!(
            "{} feed(s): {} running, {} ready, {} waiting for input, {} retrying",
            self.rules.len(),
            tot.2,
            tot.1,
            tot.0,
            tot.3
        );
        if !self.jobs.is_empty() {
            s.push_str(&format!("; {} on the scheduler", self.jobs.len()));
        }
        if let Some((_, why)) = &self.sched_down {
            s.push_str(&format!("; {why}"));
        }
        if let Some((_, why)) = &self.state_problem {
            s.push_str(&format!("; no new work: state directory unusable ({why})"));
        }
        if let Some(l) = &self.last_published {
            s.push_str(&format!("; last published {l}"));
        }
        if s != self.last_status {
            self.notifier.send(&status_line(&s));
            self.last_status = s;
        }
    }

    pub(super) fn reload(&mut self) {
        match load(&self.opts).and_then(|c| rules_of(&c).map(|r| (c, r))) {
            Ok((cfg, (rules, cfgs))) => {
                if cfg.service.state_dir != self.cfg.service.state_dir {
                    warn!(old = %self.cfg.service.state_dir.display(), new = %cfg.service.state_dir.display(), "service.state_dir changes only at a restart; the old one is kept");
                }
                let state_dir = self.cfg.service.state_dir.clone();
                self.cfg = cfg;
                self.cfg.service.state_dir = state_dir;
                self.rules = rules;
                self.feed_cfgs = cfgs;
                let names: Vec<String> = self.rules.iter().map(|r| r.feed.name.clone()).collect();
                self.asm.steps.retain(|t, p| {
                    names.contains(&t.feed) || matches!(p.phase, Phase::Running { .. })
                });
                self.start_watchers();
                self.metrics().reloads.0 += 1;
                info!(config = %self.opts.config.display(), feeds = %crate::service::settings::describe_dirs(&self.rules), "configuration reloaded");
            }
            Err(e) => {
                self.metrics().reloads.1 += 1;
                error!(config = %self.opts.config.display(), error = %e, "configuration not reloaded: the running one is kept");
            }
        }
    }
}
