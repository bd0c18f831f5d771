//! Files to steps: a finished file is opened (links as the feed allows), catalogued
//! section by section, and its fields given to the steps they belong to; a bad file is
//! quarantined by name; a file still growing is read again once it settles.

use super::*;

/// A step's messages in one file (byte ranges) and the isobaric fields they hold.
pub(super) type Gathered = (Vec<(u64, u64)>, Vec<(crate::ingest::params::Param, i64)>);

/// A file found finished and catalogued.
pub(super) struct Caught {
    pub(super) feed: String,
    pub(super) path: PathBuf,
    /// Its name in the ledger.
    pub(super) key: String,
    pub(super) size: u64,
    pub(super) mtime: i64,
    /// Of the whole file.
    pub(super) checksum: String,
}

/// What became of a file's fields for one step.
pub(super) enum Given {
    /// Added to the step.
    Yes,
    /// Not used: already used, not asked for, or arrived too late.
    No,
    /// Its cycle is older than catch-up: the step is recorded as skipped.
    Skipped,
    /// The step had been made without them: it waits again, with them.
    Reopened,
}

impl Daemon {
    /// A finished file in some feed's directory.
    pub(super) fn ingest(&mut self, path: &Path, force: Option<&ReprocessRequest>) {
        let Some(raw) = path.file_name() else {
            return;
        };
        // A name that is not UTF-8 is matched in its escaped form (`\xff`);
        // the file itself is opened by its bytes.
        let name = crate::escape::path(Path::new(raw));
        let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
        let found = self
            .rules
            .iter()
            .filter(|r| r.dir == dir)
            .find_map(|r| r.role(&name).map(|role| (r.feed.name.clone(), role)));
        let Some((feed, role)) = found else {
            debug!(file = %shown(path), "not a file of any feed");
            return;
        };
        match role {
            FileRole::Marker(parts) => {
                if let Some(c) = parts.cycle {
                    info!(feed = %feed, file = %shown(path), cycle = %cycle_dir_name(c), step = ?parts.step, "marker");
                    self.asm
                        .markers
                        .insert((feed, cycle_dir_name(c), parts.step));
                } else {
                    warn!(feed = %feed, file = %shown(path), "marker file without a readable cycle in its name");
                }
            }
            FileRole::Data(parts) => self.ingest_data(&feed, path, parts, force),
        }
    }

    /// Open a feed's input file as its link policy allows. Whatever is not
    /// read is said in the log once (the watcher hands each file over once per
    /// change); a link the policy refuses is quarantined by its name, its
    /// target never opened.
    pub(super) fn open_feed_input(
        &mut self,
        feed: &str,
        path: &Path,
        size: u64,
        mtime: i64,
    ) -> Option<Opened> {
        let is_link = std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink());
        let target = if is_link {
            let target = match std::fs::canonicalize(path) {
                Ok(t) => t,
                Err(e) => {
                    let to = std::fs::read_link(path)
                        .map(|t| crate::escape::path(&t))
                        .unwrap_or_default();
                    warn!(feed, file = %shown(path), link_to = %to, error = %e, "symbolic link whose target cannot be reached (dangling): skipped until it can");
                    return None;
                }
            };
            let rule = self.rules.iter().find(|r| r.feed.name == feed)?;
            if !rule.link_allowed(&target) {
                let policy = match rule.feed.follow_links {
                    crate::service::settings::FollowLinks::Never => "follow_links = \"never\"".to_string(),
                    _ => format!(
                        "follow_links = \"inside\": the target is not under {} or the feed's link_roots",
                        crate::escape::path(&rule.dir)
                    ),
                };
                let reason = format!(
                    "symbolic link to {} refused ({policy}); its target was not read",
                    crate::escape::path(&target)
                );
                self.quarantine(feed, path, &reason, size, mtime, String::new());
                return None;
            }
            target
        } else {
            path.to_path_buf()
        };
        // The resolved target has no link left in it: opened without following one.
        match open_input(&target, false) {
            Ok(o) => Some(o),
            Err(InputError::NotRegular(kind)) => {
                warn!(feed, file = %shown(path), kind, "not a regular file: skipped");
                None
            }
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                None
            }
        }
    }

    /// A file read with its last message cut off at its end: true once it has
    /// kept that size and mtime for the settle time (a file that settled cut
    /// short), false while it may still be written (it is looked at again).
    pub(super) fn settled_cut_short(&mut self, path: &Path, size: u64, mtime: i64) -> bool {
        let settle = Duration::from_secs_f64(self.cfg.service.settle_s);
        match self.growing.get(path) {
            Some(&(s, m, since)) if (s, m) == (size, mtime) => since.elapsed() >= settle,
            _ => {
                self.growing
                    .insert(path.to_path_buf(), (size, mtime, Instant::now()));
                false
            }
        }
    }

    /// Files cut short at their end are read again once they have settled;
    /// one that changed meanwhile is handed over again by its watcher.
    pub(super) fn recheck_growing(&mut self) {
        let settle = Duration::from_secs_f64(self.cfg.service.settle_s);
        let due: Vec<PathBuf> = self
            .growing
            .iter()
            .filter(|(_, (_, _, since))| since.elapsed() >= settle)
            .map(|(p, _)| p.clone())
            .collect();
        for p in due {
            let (size, mtime, since) = self.growing[&p];
            if std::fs::metadata(&p).is_ok_and(|m| (m.len(), mtime_ns(&m)) == (size, mtime)) {
                self.ingest(&p, None);
            }
            // Read now (or not readable any more): not looked at again unless it changes.
            if self.growing.get(&p).is_some_and(|g| g.2 == since) {
                self.growing.remove(&p);
            }
        }
    }

    pub(super) fn quarantine(
        &mut self,
        feed: &str,
        path: &Path,
        reason: &str,
        size: u64,
        mtime: i64,
        checksum: String,
    ) {
        let moved_to = match self.cfg.service.quarantine {
            QuarantineMode::Move => {
                match publish::quarantine(path, &self.cfg.service.quarantine_dir(), feed, reason) {
                    Ok(d) => Some(crate::escape::path(&d)),
                    Err(e) => {
                        warn!(feed, file = %shown(path), error = %e, "cannot move the file to quarantine; recorded only");
                        None
                    }
                }
            }
            QuarantineMode::Record => None,
        };
        error!(feed, file = %shown(path), reason, moved_to = ?moved_to, "input file quarantined");
        self.metrics().feed(feed).quarantined += 1;
        self.record(Record::Seen {
            feed: feed.into(),
            file: crate::escape::path(path),
            size,
            mtime_ns: mtime,
            checksum,
            steps: Vec::new(),
            digests: Vec::new(),
            at: Utc::now().timestamp(),
        });
        self.record(Record::Quarantined {
            feed: feed.into(),
            file: crate::escape::path(path),
            reason: reason.into(),
            moved_to,
            at: Utc::now().timestamp(),
        });
    }

    pub(super) fn ingest_data(
        &mut self,
        feed: &str,
        path: &Path,
        parts: crate::service::settings::NameParts,
        force: Option<&ReprocessRequest>,
    ) {
        // Its identity as last seen (a link: its target's), without opening it.
        let meta = match std::fs::metadata(path).or_else(|_| std::fs::symlink_metadata(path)) {
            Ok(m) => m,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input vanished before it could be read");
                return;
            }
        };
        let (size, mtime) = (meta.len(), mtime_ns(&meta));
        let key = crate::escape::path(path);
        if force.is_none() {
            if let Some(s) = self.ledger.state.seen.get(&key) {
                if s.size == size
                    && s.mtime_ns == mtime
                    && s.steps.iter().all(|t| self.ledger.state.settled(t))
                {
                    debug!(feed, file = %shown(path), "already done");
                    return;
                }
            }
        }
        let Some(opened) = self.open_feed_input(feed, path, size, mtime) else {
            return;
        };
        let (size, mtime) = (opened.size, opened.mtime_ns);
        let checksum = match checksum_file(&opened.file, size) {
            Ok(c) => c,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                return;
            }
        };
        let cat = catalogue_file(&opened.file, size);
        if cat.cut_at_end && !self.settled_cut_short(path, size, mtime) {
            debug!(feed, file = %shown(path), bytes = size, "last message cut off at the end of the file: still being written; read again when it changes or has settled");
            return;
        }
        self.growing.remove(path);
        for p in &cat.problems {
            warn!(feed, file = %shown(path), field = ?p.field, offset = p.offset, reason = %p.reason, "input problem");
        }
        let usable: Vec<_> = cat.fields.iter().filter(|f| f.unusable.is_none()).collect();
        if usable.is_empty() {
            let reason = cat
                .problems
                .first()
                .map(|p| format!("{} (at byte {})", p.reason, p.offset))
                .or_else(|| cat.fields.iter().find_map(|f| f.unusable.clone()))
                .unwrap_or_else(|| "no GRIB2 message in the file".into());
            self.quarantine(feed, path, &reason, size, mtime, checksum);
            return;
        }
        // Grids leeward cannot use make a file unusable only if every field is on one.
        let mut grid_ok: HashMap<Arc<[u8]>, Result<(), String>> = HashMap::new();
        for f in &usable {
            grid_ok.entry(f.grid_definition.clone()).or_insert_with(|| {
                parse_grid(&f.grid_definition)
                    .map(|_| ())
                    .map_err(|e| e.to_string())
            });
        }
        let good: Vec<_> = usable
            .into_iter()
            .filter(|f| matches!(grid_ok.get(&f.grid_definition), Some(Ok(()))))
            .collect();
        if good.is_empty() {
            let reason = grid_ok
                .values()
                .find_map(|r| r.clone().err())
                .unwrap_or_else(|| "grid not usable".into());
            self.quarantine(
                feed,
                path,
                &format!("unsupported grid: {reason}"),
                size,
                mtime,
                checksum,
            );
            return;
        }
        self.metrics().feed(feed).files_seen += 1;
        // Group the fields into steps.
        let mut by_step: std::collections::BTreeMap<StepKey, Gathered> =
            std::collections::BTreeMap::new();
        for f in &good {
            let k = crate::pipeline::step_key(f);
            let e = by_step.entry(k).or_default();
            // Only the messages the products may use are read again for the
            // step (and the step's first from this file, which names its grid).
            let range = (f.message_offset as u64, f.message_len as u64);
            if (e.0.is_empty() || crate::pipeline::may_use(f)) && !e.0.contains(&range) {
                e.0.push(range);
            }
            if let Some(q) = isobaric(f) {
                e.1.push(q);
            }
        }
        let file = Caught {
            feed: feed.to_string(),
            path: path.to_path_buf(),
            key,
            size,
            mtime,
            checksum,
        };
        self.assign(&file, &opened.file, by_step, &parts, force);
    }

    /// Give a catalogued file's fields to their steps, and record the file.
    pub(super) fn assign(
        &mut self,
        file: &Caught,
        opened: &std::fs::File,
        by_step: std::collections::BTreeMap<StepKey, Gathered>,
        parts: &crate::service::settings::NameParts,
        force: Option<&ReprocessRequest>,
    ) {
        let (feed, path) = (file.feed.as_str(), file.path.as_path());
        // What the file gives each step: the checksum of the step's messages,
        // read again in pieces from the file as it was opened.
        let step_digests: Result<Vec<String>, std::io::Error> = by_step
            .values()
            .map(|(messages, _)| checksum_ranges(opened, messages))
            .collect();
        let step_digests = match step_digests {
            Ok(d) => d,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                return;
            }
        };
        let now = unix_now();
        let mut tags = Vec::new();
        let mut digests = Vec::new();
        let mut skipped = Vec::new();
        let mut reopened = Vec::new();
        if let Some(s) = parts.step {
            let leads: Vec<i64> = by_step
                .keys()
                .map(|k| (k.valid_time - k.reference_time).num_hours())
                .collect();
            if !leads.contains(&s) {
                warn!(feed, file = %shown(path), name_step = s, leads = ?leads, "the file name and the contents disagree on the step; the contents are used");
            }
        }
        for ((k, (messages, fields)), digest) in by_step.into_iter().zip(step_digests) {
            if let Some(c) = parts.cycle {
                if c != k.reference_time {
                    warn!(feed, file = %shown(path), name_cycle = %cycle_dir_name(c), cycle = %cycle_dir_name(k.reference_time), "the file name and the contents disagree on the cycle; the contents are used");
                }
            }
            let tag = StepTag {
                feed: feed.to_string(),
                cycle: cycle_dir_name(k.reference_time),
                lead: (k.valid_time - k.reference_time).num_hours(),
                member: k.member,
                grid: grid_id(&k.grid_key),
            };
            tags.push(tag.clone());
            digests.push(digest.clone());
            let c = Contribution {
                path: path.to_path_buf(),
                size: file.size,
                checksum: file.checksum.clone(),
                messages,
                digest,
                seen_at: now,
            };
            match self.step_input(file, tag.clone(), k, c, &fields, force) {
                Given::Yes | Given::No => {}
                Given::Skipped => skipped.push(tag),
                Given::Reopened => reopened.push(tag),
            }
        }
        let known = self.ledger.state.seen.get(&file.key).is_some_and(|s| {
            s.size == file.size && s.mtime_ns == file.mtime && s.checksum == file.checksum
        });
        if !known {
            self.record(Record::Seen {
                feed: feed.into(),
                file: file.key.clone(),
                size: file.size,
                mtime_ns: file.mtime,
                checksum: file.checksum.clone(),
                steps: tags,
                digests,
                at: now as i64,
            });
        }
        let catch_up = self.cfg.service.catch_up_hours;
        for tag in skipped {
            *self
                .metrics()
                .feed(feed)
                .failed
                .entry(FailKind::Skipped.name())
                .or_default() += 1;
            self.record(Record::Failed {
                step: tag,
                kind: FailKind::Skipped,
                reason: format!(
                    "cycle older than service.catch_up_hours ({catch_up} h) when its input came"
                ),
                at: now as i64,
            });
        }
        // A step made again is made from all its input: its other files are
        // read again (they go to the step, which waits again).
        for tag in reopened {
            for other in self.other_inputs(&tag, &file.key) {
                self.ingest(&other, None);
            }
        }
    }

    /// Give one step a file's fields (see [`Given`]).
    pub(super) fn step_input(
        &mut self,
        file: &Caught,
        tag: StepTag,
        k: StepKey,
        c: Contribution,
        fields: &[(crate::ingest::params::Param, i64)],
        force: Option<&ReprocessRequest>,
    ) -> Given {
        let asked = force.is_some_and(|r| {
            r.feed == tag.feed && r.cycle == tag.cycle && r.lead.is_none_or(|l| l == tag.lead)
        });
        let (feed, path) = (file.feed.as_str(), file.path.as_path());
        if force.is_some() && !asked {
            // A reprocess looks at every file of the feed: the steps not asked
            // for go their normal way, quietly.
            if self.ledger.state.settled(&tag) || self.asm.steps.contains_key(&tag) {
                return Given::No;
            }
        }
        let skipped_before = matches!(
            self.ledger.state.steps.get(&tag).map(|s| &s.outcome),
            Some(Outcome::Failed {
                kind: FailKind::Skipped,
                ..
            })
        );
        if skipped_before && !asked {
            return Given::No;
        }
        let catch_up = self.cfg.service.catch_up_hours;
        let too_old = catch_up > 0
            && TimeDelta::try_hours(i64::from(catch_up))
                .is_some_and(|h| k.reference_time < Utc::now().naive_utc() - h);
        let mut taken = Given::Yes;
        if self.ledger.state.settled(&tag) {
            let used = self.ledger.state.seen.get(&file.key).is_some_and(|s| {
                s.checksum == file.checksum || s.digest_of(&tag) == Some(c.digest.as_str())
            });
            if used {
                return Given::No;
            }
            if let Err(why) = self.may_remake(&tag, &file.key, too_old) {
                warn!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, reason = %why, "input arrived after its step was made; not used (reprocess the cycle to use it)");
                self.metrics().feed(feed).late_files += 1;
                return Given::No;
            }
            info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, "more input for a step already made; made again with all its input");
            self.metrics().feed(feed).remade += 1;
            self.record(Record::Reopened {
                step: tag.clone(),
                file: file.key.clone(),
                in_hand: false,
                at: Utc::now().timestamp(),
            });
            taken = Given::Reopened;
        } else if too_old && !asked {
            if self.too_old.insert((feed.to_string(), tag.cycle.clone())) {
                warn!(feed, cycle = %tag.cycle, file = %shown(path), catch_up_hours = catch_up, "cycle older than service.catch_up_hours; not processed (use leeward reprocess)");
            }
            return Given::Skipped;
        }
        let first_seen = self
            .ledger
            .state
            .steps
            .get(&tag)
            .map_or(c.seen_at, |s| s.first_seen as f64);
        let in_hand = self
            .asm
            .steps
            .get(&tag)
            .is_some_and(|p| matches!(p.phase, Phase::Running { .. }));
        let n = fields.len();
        let more_before = self.ledger.state.steps.get(&tag).is_some_and(|s| s.more);
        if self.asm.add(tag.clone(), k, c, fields, first_seen, asked) {
            if more_before {
                // Reopened in hand before a restart, by input now caught again.
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.more = true;
                }
            }
            let w = self.waiting_step(&tag);
            let missing = w
                .as_ref()
                .map_or_else(|| "nothing: complete".to_string(), |w| w.missing.join("; "));
            let made_by = w.map_or(0, |w| w.made_by);
            let now = unix_now() as i64;
            info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, fields = n, missing = %missing, made_anyway_in_s = made_by.saturating_sub(now).max(0), "input for step");
            if in_hand {
                // Told to the ledger now: the end of the run in hand then
                // leaves the step waiting, whatever stops the service meanwhile.
                info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, "input for a step being made; made again with all its input once this run ends");
                self.record(Record::Reopened {
                    step: tag,
                    file: file.key.clone(),
                    in_hand: true,
                    at: Utc::now().timestamp(),
                });
            }
        }
        taken
    }

    /// May a step already made be made again with more input? Not when its
    /// cycle is older than catch-up, nor when one of the files it was made
    /// from is gone (the new make would lack it).
    pub(super) fn may_remake(
        &self,
        tag: &StepTag,
        file: &str,
        too_old: bool,
    ) -> Result<(), String> {
        if too_old {
            return Err(format!(
                "its cycle is older than service.catch_up_hours ({} h)",
                self.cfg.service.catch_up_hours
            ));
        }
        for other in self.other_inputs(tag, file) {
            if !other.is_file() {
                return Err(format!(
                    "{} it was made from is no longer there",
                    shown(&other)
                ));
            }
        }
        Ok(())
    }

    /// The files a step was made from, as the ledger knows them, but `file`.
    pub(super) fn other_inputs(&self, tag: &StepTag, file: &str) -> Vec<PathBuf> {
        self.ledger
            .state
            .seen
            .iter()
            .filter(|(f, s)| f.as_str() != file && s.steps.contains(tag))
            .filter_map(|(f, _)| crate::escape::unescape_path(f))
            .collect()
    }

    pub(super) fn suffix(&self, tag: &StepTag) -> Option<usize> {
        let k = self
            .ledger
            .state
            .grids
            .get(&tag.feed)
            .and_then(|g| g.iter().position(|x| *x == tag.grid))
            .unwrap_or(0);
        (k > 0).then_some(k + 1)
    }

    /// A product already published whose manifest matches the step's inputs
    /// (a crash after the manifest and before the ledger): adopt it.
    pub(super) fn adopt(&mut self, tag: &StepTag) -> bool {
        let Some(p) = self.asm.steps.get(tag) else {
            return false;
        };
        if p.forced {
            return false;
        }
        let dir = publish::cycle_dir(&self.cfg.service.out_dir, &tag.feed, p.key.reference_time);
        let product = dir.join(output_name(&p.key, self.suffix(tag)));
        let manifest = publish::manifest_path(&product);
        let Some(m) = publish::read_manifest(&manifest) else {
            return false;
        };
        let have: BTreeSet<(String, String)> = p
            .files
            .values()
            .map(|c| (crate::escape::path(&c.path), c.checksum.clone()))
            .collect();
        let had: BTreeSet<(String, String)> = m
            .inputs
            .iter()
            .map(|i| (i.file.clone(), i.checksum.clone()))
            .collect();
        if have != had || !product.exists() {
            return false;
        }
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, manifest = %manifest.display(), "already published before a restart; adopted");
        self.record(Record::Published {
            step: tag.clone(),
            path: product.display().to_string(),
            manifest: manifest.display().to_string(),
            partial: m.state == "partial",
            at: Utc::now().timestamp(),
        });
        self.asm.steps.remove(tag);
        true
    }
}
