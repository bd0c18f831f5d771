//! Starting `leeward serve`: settings checked, the state directory locked and its
//! ledger replayed, directories prepared, the metrics endpoint and signal handling
//! started, unfinished publications and jobs of an earlier run followed.

use super::*;

/// Run the service until SIGTERM or SIGINT. Returns the exit code.
pub fn serve(opts: ServeOptions) -> u8 {
    child::set_log_format(&opts.log_format);
    match start(opts) {
        // The hold on the state directory lives as long as the loop.
        Ok((_held, d)) => run(d),
        Err(code) => code,
    }
}

/// Refuse to start: the reason on standard error, the configuration's exit code.
pub(super) fn refuse(e: &dyn std::fmt::Display) -> u8 {
    eprintln!("leeward: {e}");
    code::CONFIG
}

/// Everything before the loop: the configuration, the state directory held,
/// the ledger, the output tree, the metrics endpoint, the signals, then the
/// recovery of publications and jobs and the watchers' first scan.
pub(super) fn start(opts: ServeOptions) -> Result<(std::os::unix::net::UnixListener, Daemon), u8> {
    let cfg = load(&opts).map_err(|e| {
        error!(error = %e, "cannot start");
        refuse(&e)
    })?;
    let (rules, feed_cfgs) = rules_of(&cfg).map_err(|e| refuse(&e))?;
    let (held, ledger) = open_state(&cfg.service.state_dir)?;
    prepare_dirs(&cfg.service);
    crate::output::limit_hdf5_free_lists();
    let removed = publish::clean_temporaries(&cfg.service.out_dir);
    let shutdown = Shutdown::new();
    let (metrics, endpoint) = start_metrics(&cfg.service, &rules, &shutdown);
    let (events, inbox) = channel();
    signal_events(events.clone()).map_err(|e| refuse(&format!("cannot handle signals: {e}")))?;
    let mut d = Daemon {
        opts,
        cfg,
        rules,
        feed_cfgs,
        ledger,
        asm: Assembly::default(),
        watchers: Vec::new(),
        metrics,
        endpoint,
        shutdown,
        notifier: Notifier::from_env(),
        events,
        inbox,
        deferred: Vec::new(),
        pool: Pool::new("leeward-worker"),
        running: HashMap::new(),
        jobs: HashMap::new(),
        sched_down: None,
        sched_retry: Instant::now(),
        last_poll: Instant::now(),
        locks: HashMap::new(),
        too_old: BTreeSet::new(),
        last_status: String::new(),
        last_published: None,
        last_ping: Instant::now(),
        growing: HashMap::new(),
        last_waiting: Vec::new(),
        state_problem: None,
    };
    d.begin(removed);
    Ok((held, d))
}

/// How long a starting service waits for the state directory's last holder
/// to let go before it refuses. A service killed a moment ago may leave a
/// step process it was starting between fork and exec; that process holds
/// copies of the socket and the lock until its exec closes them, which on a
/// loaded machine can outlast a quick restart by some milliseconds.
const HOLDER_PATIENCE: Duration = Duration::from_secs(5);

/// Try `take` until it holds the directory (`Ok(Some)`) or fails, or until
/// [`HOLDER_PATIENCE`] has passed while another process holds it (`Ok(None)`).
/// Says once that it waits.
fn patiently<T>(
    sdir: &Path,
    mut take: impl FnMut() -> Result<Option<T>, String>,
) -> Result<T, String> {
    let t0 = Instant::now();
    let mut said = false;
    loop {
        if let Some(held) = take()? {
            return Ok(held);
        }
        if t0.elapsed() >= HOLDER_PATIENCE {
            return Err(format!(
                "another leeward serve is using the state directory {} (still held after {} s)",
                sdir.display(),
                HOLDER_PATIENCE.as_secs()
            ));
        }
        if !said {
            info!(state_dir = %sdir.display(), patience_s = HOLDER_PATIENCE.as_secs(),
                "the state directory is held by another process; waiting for it to let go");
            said = true;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// Hold the state directory (one service per directory: a hold that survives
/// the directory's removal, and the lock file that `leeward status` reads)
/// and open its ledger.
pub(super) fn open_state(sdir: &Path) -> Result<(std::os::unix::net::UnixListener, Ledger), u8> {
    let held = patiently(sdir, || {
        match crate::service::ledger::hold_state_dir(sdir) {
            Ok(h) => Ok(Some(h)),
            Err(e) if e.kind() == std::io::ErrorKind::AddrInUse => Ok(None),
            Err(e) => Err(format!(
                "cannot hold the state directory {}: {e}",
                sdir.display()
            )),
        }
    })
    .map_err(|e| refuse(&e))?;
    std::fs::create_dir_all(requests_dir(sdir)).map_err(|e| {
        refuse(&format!(
            "cannot use the state directory {}: {e}",
            sdir.display()
        ))
    })?;
    let lock =
        patiently(sdir, || crate::service::ledger::try_take_lock(sdir)).map_err(|e| refuse(&e))?;
    let mut ledger = Ledger::open(sdir).map_err(|e| refuse(&e))?;
    ledger.hold(lock).map_err(|e| refuse(&e))?;
    Ok((held, ledger))
}

/// The quarantine and the output tree; neither is fatal when it fails.
pub(super) fn prepare_dirs(svc: &crate::service::settings::Service) {
    if svc.quarantine == QuarantineMode::Move {
        if let Err(e) = std::fs::create_dir_all(svc.quarantine_dir()) {
            warn!(dir = %svc.quarantine_dir().display(), error = %e, "cannot create the quarantine directory; bad files are recorded only");
        }
    }
    if let Err(e) = std::fs::create_dir_all(&svc.out_dir) {
        // Not fatal: the output may come back (a mount); steps are retried.
        error!(dir = %svc.out_dir.display(), error = %e, "output directory unusable; steps will be retried");
    }
}

/// The service's metrics, one entry per feed, served at `metrics_listen` if set.
pub(super) fn start_metrics(
    svc: &crate::service::settings::Service,
    rules: &[FeedRule],
    shutdown: &Shutdown,
) -> (Arc<Mutex<Metrics>>, Option<Endpoint>) {
    let metrics = Arc::new(Mutex::new(Metrics {
        started: unix_now(),
        heartbeat: Some(Instant::now()),
        ..Metrics::default()
    }));
    for r in rules {
        let mut m = metrics
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        m.feed(&r.feed.name);
        if r.feed.executor == Executor::Slurm {
            m.scheduler.used = true;
            m.scheduler.reachable = true;
        }
    }
    if svc.metrics_listen.is_empty() {
        return (metrics, None);
    }
    let served =
        crate::service::metrics::serve(&svc.metrics_listen, metrics.clone(), shutdown.clone());
    match served {
        Ok(ep) => (metrics, Some(ep)),
        Err(e) => {
            error!(address = %svc.metrics_listen, error = %e, "metrics endpoint not started");
            (metrics, None)
        }
    }
}

/// SIGTERM, SIGINT and SIGHUP as events of the loop.
pub(super) fn signal_events(tx: Sender<Event>) -> std::io::Result<()> {
    let mut signals = signal_hook::iterator::Signals::new([
        signal_hook::consts::SIGTERM,
        signal_hook::consts::SIGINT,
        signal_hook::consts::SIGHUP,
    ])?;
    std::thread::spawn(move || {
        for s in signals.forever() {
            if tx.send(Event::Signal(s)).is_err() {
                return;
            }
        }
    });
    Ok(())
}

impl Daemon {
    /// The start's last acts: what the ledger knows, the recovery, the
    /// watchers, the log line and systemd's READY.
    pub(super) fn begin(&mut self, removed: usize) {
        for (tag, st) in &self.ledger.state.steps {
            if let Outcome::Published { at, .. } = st.outcome {
                let mut m = self.metrics();
                let f = m.feed(&tag.feed);
                f.last_success = Some(f.last_success.unwrap_or(0.0).max(at as f64));
            }
        }
        self.record(Record::Started {
            version: env!("CARGO_PKG_VERSION").into(),
            pid: std::process::id(),
            at: Utc::now().timestamp(),
        });
        // Steps the ledger knows as waiting keep their first-seen time; their
        // files come back through the watchers' first scan (the catch-up).
        let waiting = self
            .ledger
            .state
            .steps
            .values()
            .filter(|s| matches!(s.outcome, Outcome::Waiting))
            .count();
        self.recover_publications();
        self.recover_jobs();
        self.start_watchers();
        self.retention();
        info!(
            version = env!("CARGO_PKG_VERSION"),
            feeds = %crate::service::settings::describe_dirs(&self.rules),
            out_dir = %self.cfg.service.out_dir.display(),
            state_dir = %self.cfg.service.state_dir.display(),
            workers = self.cfg.service.workers,
            stale_temporaries_removed = removed,
            steps_waiting_from_before = waiting,
            "leeward serve started"
        );
        self.notifier.send("READY=1");
        self.update_status();
    }
}
