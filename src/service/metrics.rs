//! Health and metrics: counters kept by the daemon and served over HTTP on
//! a local address in the Prometheus text exposition format.
//!
//! In: events from the daemon (a step published, failed, retried; a file
//! quarantined; queue depths). Out: `GET /metrics` (text format 0.0.4) and
//! `GET /health` (200 while the main loop turns, 503 when it has stalled).
//! Source of the format: the Prometheus exposition format documentation
//! (from memory: `# HELP`, `# TYPE`, one `name{labels} value` per line;
//! histograms as cumulative `_bucket{le=...}`, `_sum`, `_count`).

use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpListener, TcpStream};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use tracing::{debug, info, warn};

use super::shutdown::Shutdown;

/// Upper bounds of the latency histogram, seconds.
pub const LATENCY_BUCKETS: [f64; 9] = [5.0, 10.0, 20.0, 30.0, 60.0, 120.0, 300.0, 600.0, 1800.0];

/// Counters of one feed.
#[derive(Debug, Default, Clone)]
pub struct FeedCounters {
    /// Steps published complete.
    pub published_complete: u64,
    /// Steps published partial.
    pub published_partial: u64,
    /// Steps failed, by kind.
    pub failed: BTreeMap<&'static str, u64>,
    /// Retries scheduled after output or read failures.
    pub retries: u64,
    /// Files quarantined.
    pub quarantined: u64,
    /// Input files catalogued.
    pub files_seen: u64,
    /// Input files that came after their step was published and were not
    /// used (its cycle older than catch-up, or its other inputs gone).
    pub late_files: u64,
    /// Steps made again because input came after they were made (or while).
    pub remade: u64,
    /// Unix time of the last publication.
    pub last_success: Option<f64>,
    /// Latency histogram counts (per bucket, not cumulative), +Inf last.
    pub latency_counts: [u64; LATENCY_BUCKETS.len() + 1],
    /// Sum of latencies.
    pub latency_sum: f64,
    /// Last latency.
    pub last_latency: Option<f64>,
    /// Steps waiting for input, ready, running, waiting to retry.
    pub queue: (usize, usize, usize, usize),
}

impl FeedCounters {
    /// Count a publication with its latency.
    pub fn published(&mut self, partial: bool, latency: f64, at: f64) {
        if partial {
            self.published_partial += 1;
        } else {
            self.published_complete += 1;
        }
        let k = LATENCY_BUCKETS
            .iter()
            .position(|b| latency <= *b)
            .unwrap_or(LATENCY_BUCKETS.len());
        self.latency_counts[k] += 1;
        self.latency_sum += latency;
        self.last_latency = Some(latency);
        self.last_success = Some(at);
    }
}

/// The batch scheduler, for feeds that use one.
#[derive(Debug, Default, Clone)]
pub struct SchedulerCounters {
    /// A feed uses the scheduler.
    pub used: bool,
    /// Its commands answered last time.
    pub reachable: bool,
    /// Why not, when not.
    pub problem: String,
    /// Unix time it became unusable.
    pub down_since: Option<f64>,
    /// New steps run on this machine while it is unusable.
    pub fallback: bool,
    /// Step jobs submitted and not yet ended.
    pub in_flight: usize,
    /// Step jobs submitted.
    pub submitted: u64,
    /// Step jobs that ended without a result, by the scheduler's state or
    /// leeward's own outcome word (`crate::service::job_state::outcome`).
    pub ended: BTreeMap<String, u64>,
    /// Step jobs submitted again after one ended without a result.
    pub retries: u64,
    /// Steps of scheduler feeds run on this machine instead.
    pub local_fallback: u64,
}

/// Everything the endpoint serves.
#[derive(Debug, Default)]
pub struct Metrics {
    /// The batch scheduler.
    pub scheduler: SchedulerCounters,
    /// Per feed.
    pub feeds: BTreeMap<String, FeedCounters>,
    /// Ledger or state-directory write failures.
    pub ledger_errors: u64,
    /// Config reloads: (accepted, refused).
    pub reloads: (u64, u64),
    /// When the main loop last turned.
    pub heartbeat: Option<Instant>,
    /// Why the state directory cannot be used, while it cannot (no new work
    /// is taken).
    pub state_problem: Option<String>,
    /// Unix time of start.
    pub started: f64,
    /// Steps waiting for input: what each lacks and when it is made anyway.
    pub waiting: Vec<crate::service::waiting::WaitingStep>,
}

fn esc(s: &str) -> String {
    s.replace('\\', "\\\\")
        .replace('"', "\\\"")
        .replace('\n', "\\n")
}

impl Metrics {
    /// Counters of a feed, created on first use.
    pub fn feed(&mut self, name: &str) -> &mut FeedCounters {
        self.feeds.entry(name.to_string()).or_default()
    }

    /// The Prometheus text exposition.
    pub fn render(&self) -> String {
        let mut o = String::new();
        self.render_feeds(&mut o);
        self.render_latency(&mut o);
        self.render_service(&mut o);
        o
    }

    /// The build, the start and each feed's counters and gauges.
    fn render_feeds(&self, o: &mut String) {
        family(
            o,
            "leeward_build_info",
            "gauge",
            "leeward version.",
            vec![(
                format!("{{version=\"{}\"}}", env!("CARGO_PKG_VERSION")),
                "1".into(),
            )],
        );
        family(
            o,
            "leeward_start_time_seconds",
            "gauge",
            "Unix time the service started.",
            vec![(String::new(), format!("{:.3}", self.started))],
        );
        let per = |f: &dyn Fn(&FeedCounters) -> Vec<(String, String)>| -> Vec<(String, String)> {
            self.feeds
                .iter()
                .flat_map(|(n, c)| {
                    f(c).into_iter()
                        .map(move |(extra, v)| (format!("{{feed=\"{}\"{extra}}}", esc(n)), v))
                })
                .collect()
        };
        family(
            o,
            "leeward_steps_published_total",
            "counter",
            "Steps published, complete or partial (made at the timeout with what was there).",
            per(&|c| {
                vec![
                    (
                        ",state=\"complete\"".into(),
                        c.published_complete.to_string(),
                    ),
                    (",state=\"partial\"".into(), c.published_partial.to_string()),
                ]
            }),
        );
        family(
            o,
            "leeward_steps_failed_total",
            "counter",
            "Steps that produced nothing, by reason: missing (incomplete at the timeout), input, output (retried), internal, skipped (older than catch_up_hours).",
            per(&|c| {
                crate::service::ledger::FailKind::ALL
                    .iter()
                    .map(|k| k.name())
                    .map(|k| {
                        (
                            format!(",reason=\"{k}\""),
                            c.failed.get(k).copied().unwrap_or(0).to_string(),
                        )
                    })
                    .collect()
            }),
        );
        family(
            o,
            "leeward_step_retries_total",
            "counter",
            "Retries scheduled after a step could not be written or its input read.",
            per(&|c| vec![(String::new(), c.retries.to_string())]),
        );
        family(
            o,
            "leeward_files_quarantined_total",
            "counter",
            "Input files set aside as corrupt or unsupported.",
            per(&|c| vec![(String::new(), c.quarantined.to_string())]),
        );
        family(
            o,
            "leeward_files_seen_total",
            "counter",
            "Input files found finished and catalogued.",
            per(&|c| vec![(String::new(), c.files_seen.to_string())]),
        );
        family(
            o,
            "leeward_late_files_total",
            "counter",
            "Input files that arrived after their step was made and were not used (cycle older than catch_up_hours, or the step's other inputs gone; reprocess to use them).",
            per(&|c| vec![(String::new(), c.late_files.to_string())]),
        );
        family(
            o,
            "leeward_steps_remade_total",
            "counter",
            "Steps made again because more input came after, or while, they were made (each a new revision of its manifest).",
            per(&|c| vec![(String::new(), c.remade.to_string())]),
        );
        family(
            o,
            "leeward_queue_steps",
            "gauge",
            "Steps by phase: waiting for input, ready, running, waiting to retry.",
            per(&|c| {
                vec![
                    (",phase=\"waiting\"".into(), c.queue.0.to_string()),
                    (",phase=\"ready\"".into(), c.queue.1.to_string()),
                    (",phase=\"running\"".into(), c.queue.2.to_string()),
                    (",phase=\"retry\"".into(), c.queue.3.to_string()),
                ]
            }),
        );
        family(
            o,
            "leeward_last_success_timestamp_seconds",
            "gauge",
            "Unix time of the feed's last publication (0: none yet).",
            per(&|c| {
                vec![(
                    String::new(),
                    format!("{:.3}", c.last_success.unwrap_or(0.0)),
                )]
            }),
        );
        family(
            o,
            "leeward_last_publish_latency_seconds",
            "gauge",
            "Seconds from the last input file of the last published step to its publication.",
            per(&|c| {
                vec![(
                    String::new(),
                    format!("{:.3}", c.last_latency.unwrap_or(0.0)),
                )]
            }),
        );
    }

    /// Each feed's histogram of publication latency.
    fn render_latency(&self, o: &mut String) {
        o.push_str("# HELP leeward_publish_latency_seconds Seconds from a step's last input file to its publication.\n# TYPE leeward_publish_latency_seconds histogram\n");
        for (n, c) in &self.feeds {
            let mut cum = 0;
            for (k, b) in LATENCY_BUCKETS.iter().enumerate() {
                cum += c.latency_counts[k];
                o.push_str(&format!(
                    "leeward_publish_latency_seconds_bucket{{feed=\"{}\",le=\"{b}\"}} {cum}\n",
                    esc(n)
                ));
            }
            cum += c.latency_counts[LATENCY_BUCKETS.len()];
            o.push_str(&format!(
                "leeward_publish_latency_seconds_bucket{{feed=\"{0}\",le=\"+Inf\"}} {cum}\nleeward_publish_latency_seconds_sum{{feed=\"{0}\"}} {1:.3}\nleeward_publish_latency_seconds_count{{feed=\"{0}\"}} {cum}\n",
                esc(n),
                c.latency_sum
            ));
        }
    }

    /// The scheduler's, the ledger's, the state directory's and the
    /// configuration's own figures.
    fn render_service(&self, o: &mut String) {
        if self.scheduler.used {
            let c = &self.scheduler;
            single(
                o,
                "leeward_scheduler_up",
                "gauge",
                "1 when the batch scheduler's commands answered at the last try.",
                u8::from(c.reachable).to_string(),
            );
            single(
                o,
                "leeward_scheduler_jobs_in_flight",
                "gauge",
                "Step jobs submitted and not yet published or ended.",
                c.in_flight.to_string(),
            );
            single(
                o,
                "leeward_scheduler_jobs_submitted_total",
                "counter",
                "Step jobs submitted to the scheduler.",
                c.submitted.to_string(),
            );
            single(
                o,
                "leeward_scheduler_job_retries_total",
                "counter",
                "Step jobs submitted again after a run ended without a result.",
                c.retries.to_string(),
            );
            single(
                o,
                "leeward_scheduler_local_fallback_total",
                "counter",
                "Steps of scheduler feeds run on this machine because the scheduler was unusable.",
                c.local_fallback.to_string(),
            );
        }
        single(
            o,
            "leeward_ledger_errors_total",
            "counter",
            "Failures to write the ledger in the state directory.",
            self.ledger_errors.to_string(),
        );
        single(
            o,
            "leeward_state_dir_usable",
            "gauge",
            "1 while the state directory and its ledger are this service's and writable; 0 while not (no new work is taken).",
            u8::from(self.state_problem.is_none()).to_string(),
        );
        single(
            o,
            "leeward_config_reloads_total",
            "counter",
            "Configuration reloads accepted (SIGHUP).",
            self.reloads.0.to_string(),
        );
        single(
            o,
            "leeward_config_reloads_refused_total",
            "counter",
            "Configuration reloads refused because the new file was invalid.",
            self.reloads.1.to_string(),
        );
        if self.scheduler.used {
            o.push_str("# HELP leeward_scheduler_jobs_ended_total Step jobs that ended without a result, by the scheduler's state or leeward's own outcome.\n# TYPE leeward_scheduler_jobs_ended_total counter\n");
            for (state, n) in &self.scheduler.ended {
                // leeward's own words go under their own label, apart from the scheduler's states.
                let label = if crate::service::job_state::outcome::ALL.contains(&state.as_str()) {
                    "outcome"
                } else {
                    "state"
                };
                o.push_str(&format!(
                    "leeward_scheduler_jobs_ended_total{{{label}=\"{}\"}} {n}\n",
                    esc(state)
                ));
            }
        }
    }
}

/// One metric family of labelled rows, in the Prometheus text format.
fn family(o: &mut String, name: &str, kind: &str, help: &str, rows: Vec<(String, String)>) {
    o.push_str(&format!("# HELP {name} {help}\n# TYPE {name} {kind}\n"));
    for (labels, v) in rows {
        o.push_str(&format!("{name}{labels} {v}\n"));
    }
}

/// One metric family of a single unlabelled value.
fn single(o: &mut String, name: &str, kind: &str, help: &str, v: String) {
    o.push_str(&format!(
        "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} {v}\n"
    ));
}

/// How long the main loop may be silent before /health says 503.
pub const STALL: Duration = Duration::from_secs(30);

/// Connections served at once. Further ones are closed at once, so that the
/// threads and sockets held never grow past this, whatever clients do.
pub const MAX_CONNECTIONS: usize = 64;

/// A client has this long from connecting to the end of its request line and
/// headers, however slowly it sends them.
pub const REQUEST_DEADLINE: Duration = Duration::from_secs(2);

/// ... and this long to take the whole answer, however slowly it reads.
pub const ANSWER_DEADLINE: Duration = Duration::from_secs(5);

/// Largest request read (a request line and a few headers).
const MAX_REQUEST: usize = 8192;

/// Read the request's head within `deadline`; what was read (possibly partial).
fn read_request(s: &mut TcpStream, deadline: Instant) -> Vec<u8> {
    let mut buf = vec![0u8; MAX_REQUEST];
    let mut n = 0;
    while n < buf.len() {
        let Some(left) = deadline.checked_duration_since(Instant::now()) else {
            break;
        };
        if left.is_zero() || s.set_read_timeout(Some(left)).is_err() {
            break;
        }
        match s.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => {
                n += k;
                let head = &buf[..n];
                if head.windows(4).any(|w| w == b"\r\n\r\n")
                    || head.windows(2).any(|w| w == b"\n\n")
                {
                    break;
                }
            }
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(_) => break,
        }
    }
    buf.truncate(n);
    buf
}

/// Write all of `bytes` by `deadline`, or give up (a client too slow to read).
fn write_by(s: &mut TcpStream, mut bytes: &[u8], deadline: Instant) -> std::io::Result<()> {
    while !bytes.is_empty() {
        let left = deadline
            .checked_duration_since(Instant::now())
            .filter(|d| !d.is_zero())
            .ok_or_else(|| std::io::Error::from(std::io::ErrorKind::TimedOut))?;
        s.set_write_timeout(Some(left))?;
        match s.write(bytes) {
            Ok(0) => return Err(std::io::ErrorKind::WriteZero.into()),
            Ok(k) => bytes = &bytes[k..],
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(())
}

/// The answer to a request: status, content type, body.
fn answer(req: &[u8], metrics: &Mutex<Metrics>) -> (&'static str, &'static str, String) {
    let req = String::from_utf8_lossy(req);
    let mut words = req.split_whitespace();
    let (method, target) = (words.next().unwrap_or(""), words.next().unwrap_or(""));
    let m = metrics
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    match (method, target) {
        ("GET", "/metrics") => (
            "200 OK",
            "text/plain; version=0.0.4; charset=utf-8",
            m.render(),
        ),
        ("GET", "/health") | ("GET", "/healthz") => {
            let alive = m.heartbeat.is_some_and(|h| h.elapsed() < STALL);
            if let (true, Some(why)) = (alive, &m.state_problem) {
                (
                    "503 Service Unavailable",
                    "text/plain; charset=utf-8",
                    format!("state directory unusable: {why}; no new work is taken\n"),
                )
            } else if alive {
                let mut body = health_body(&m);
                body.push_str(&waiting_lines(&m.waiting));
                ("200 OK", "text/plain; charset=utf-8", body)
            } else {
                (
                    "503 Service Unavailable",
                    "text/plain; charset=utf-8",
                    "stalled: the main loop has not turned for 30 s\n".to_string(),
                )
            }
        }
        ("GET", _) => (
            "404 Not Found",
            "text/plain; charset=utf-8",
            "try /metrics or /health\n".into(),
        ),
        _ => (
            "405 Method Not Allowed",
            "text/plain; charset=utf-8",
            "GET only\n".into(),
        ),
    }
}

/// How many waiting steps /health names; the rest are counted.
const WAITING_SHOWN: usize = 20;

fn waiting_lines(w: &[crate::service::waiting::WaitingStep]) -> String {
    let now = chrono::Utc::now().timestamp();
    let mut o = String::new();
    for s in w.iter().take(WAITING_SHOWN) {
        o.push_str(&format!("waiting: {}\n", s.line(now)));
    }
    if w.len() > WAITING_SHOWN {
        o.push_str(&format!(
            "waiting: and {} more step(s) (leeward status shows them all)\n",
            w.len() - WAITING_SHOWN
        ));
    }
    o
}

fn health_body(m: &Metrics) -> String {
    let c = &m.scheduler;
    if c.used && !c.reachable {
        format!(
            "ok\nscheduler: unusable for {:.0} s ({}); new steps {}\n",
            c.down_since.map_or(0.0, |t| {
                chrono::Utc::now().timestamp_millis() as f64 / 1000.0 - t
            }),
            c.problem,
            if c.fallback {
                "run on this machine"
            } else {
                "wait"
            }
        )
    } else if c.used {
        format!(
            "ok\nscheduler: reachable; {} job(s) in flight\n",
            c.in_flight
        )
    } else {
        "ok\n".to_string()
    }
}

/// One connection, start to end, within the deadlines.
fn respond(mut s: TcpStream, metrics: &Mutex<Metrics>) {
    let t0 = Instant::now();
    let req = read_request(&mut s, t0 + REQUEST_DEADLINE);
    if req.is_empty() {
        return; // connected and said nothing in time: closed
    }
    let (code, ctype, body) = answer(&req, metrics);
    let head = format!(
        "HTTP/1.1 {code}\r\nContent-Type: {ctype}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n",
        body.len()
    );
    let deadline = Instant::now() + ANSWER_DEADLINE;
    let _ = write_by(&mut s, head.as_bytes(), deadline)
        .and_then(|()| write_by(&mut s, body.as_bytes(), deadline));
}

/// Counts a connection in hand for as long as it lives.
struct Slot(Arc<AtomicUsize>);

impl Drop for Slot {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::AcqRel);
    }
}

/// Serve `/metrics` and `/health` on `addr`. Returns the bound address.
///
/// One thread accepts; each connection is answered on a thread of its own,
/// so an idle or slow client holds up only itself: it has
/// [`REQUEST_DEADLINE`] to send its request and [`ANSWER_DEADLINE`] to read
/// the answer, and at most [`MAX_CONNECTIONS`] are served at once (beyond
/// that a connection is closed at once, so that whoever floods the port
/// cannot make the service hold more). The protocol is the small part of
/// HTTP/1.1 these two answers need (a GET, `Connection: close`); a general
/// HTTP server would bring more than it serves here.
pub fn serve(
    addr: &str,
    metrics: Arc<Mutex<Metrics>>,
    shutdown: Shutdown,
) -> std::io::Result<Endpoint> {
    let listener = TcpListener::bind(addr)?;
    let bound = listener.local_addr()?;
    if !bound.ip().is_loopback() {
        warn!(address = %bound, "metrics endpoint listens beyond localhost");
    }
    // Accepting without blocking, so that the thread sees the stop.
    listener.set_nonblocking(true)?;
    info!(address = %bound, "metrics and health endpoint listening");
    let in_hand = Arc::new(AtomicUsize::new(0));
    let thread = std::thread::Builder::new()
        .name("leeward-http".into())
        .spawn(move || {
            let mut refused_said = false;
            while !shutdown.is_ended() {
                let s = match listener.accept() {
                    Ok((s, _)) => s,
                    Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => {
                        wait_for_connection(&listener);
                        continue;
                    }
                    Err(e) => {
                        warn!(error = %e, "metrics endpoint: a connection could not be accepted");
                        // Out of descriptors, say: do not spin.
                        std::thread::sleep(Duration::from_millis(10));
                        continue;
                    }
                };
                // The connection itself is read and written with time-outs.
                if s.set_nonblocking(false).is_err() {
                    continue;
                }
                if in_hand.fetch_add(1, Ordering::AcqRel) >= MAX_CONNECTIONS {
                    in_hand.fetch_sub(1, Ordering::AcqRel);
                    if !refused_said {
                        warn!(limit = MAX_CONNECTIONS, "metrics endpoint: too many connections at once; further ones closed until some end");
                        refused_said = true;
                    }
                    drop(s);
                    continue;
                }
                refused_said = false;
                let slot = Slot(in_hand.clone());
                let m = metrics.clone();
                let spawned = std::thread::Builder::new()
                    .name("leeward-http-conn".into())
                    .spawn(move || {
                        let _slot = slot;
                        respond(s, &m);
                    });
                if let Err(e) = spawned {
                    warn!(error = %e, "metrics endpoint: no thread for a connection");
                }
            }
            debug!("metrics endpoint closed");
        })?;
    Ok(Endpoint {
        addr: bound,
        thread,
    })
}

/// How long the endpoint's thread waits for a connection before it looks at the stop
/// again: a connection wakes it at once, so this only bounds how late the stop is seen
/// (and makes 4 wake-ups a second while idle).
const ACCEPT_WAIT: Duration = Duration::from_millis(250);

/// Wait until a connection is there to be accepted, or [`ACCEPT_WAIT`] has passed,
/// with poll(2) on the listening socket.
fn wait_for_connection(listener: &TcpListener) {
    use rustix::event::{poll, PollFd, PollFlags, Timespec};
    let wait = Timespec {
        tv_sec: 0,
        tv_nsec: ACCEPT_WAIT.as_nanos() as _,
    };
    let mut fds = [PollFd::new(listener, PollFlags::IN)];
    if poll(&mut fds, Some(&wait)).is_err() {
        // Interrupted, say: do not spin.
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// The running endpoint: its address, and its thread, which ends once the service's
/// [`Shutdown`] has ended.
pub struct Endpoint {
    /// The address it listens on.
    pub addr: SocketAddr,
    thread: std::thread::JoinHandle<()>,
}

impl Endpoint {
    /// Wait for the endpoint's thread to end (after [`Shutdown::end`]); connections in
    /// hand end on their own time-outs.
    pub fn join(self) {
        let _ = self.thread.join();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn get(addr: SocketAddr, path: &str) -> std::io::Result<String> {
        let mut c = TcpStream::connect(addr)?;
        c.set_read_timeout(Some(Duration::from_secs(10)))?;
        c.write_all(format!("GET {path} HTTP/1.1\r\nHost: x\r\n\r\n").as_bytes())?;
        let mut out = String::new();
        c.read_to_string(&mut out)?;
        Ok(out)
    }

    #[test]
    fn a_reader_that_never_reads_holds_up_only_itself() {
        let mut metrics = Metrics {
            heartbeat: Some(Instant::now()),
            ..Metrics::default()
        };
        for k in 0..3000 {
            metrics
                .feed(&format!("feed{k:05}"))
                .published(false, 12.0, 1.0);
        }
        let body_len = metrics.render().len();
        assert!(
            body_len > 4 << 20,
            "{body_len}: more than the socket buffers hold"
        );
        let addr = serve(
            "127.0.0.1:0",
            Arc::new(Mutex::new(metrics)),
            Shutdown::new(),
        )
        .unwrap()
        .addr;
        let mut stuck = TcpStream::connect(addr).unwrap();
        stuck.write_all(b"GET /metrics HTTP/1.1\r\n\r\n").unwrap();
        std::thread::sleep(Duration::from_millis(300));
        let t = Instant::now();
        let r = get(addr, "/health").unwrap();
        assert!(r.ends_with("ok\n"), "{r}");
        assert!(
            t.elapsed() < Duration::from_secs(1),
            "health waited for the stuck reader"
        );
        // The stuck reader is given up at its deadline: what it can read then ends short.
        std::thread::sleep(ANSWER_DEADLINE + Duration::from_millis(500));
        stuck
            .set_read_timeout(Some(Duration::from_secs(10)))
            .unwrap();
        let mut got = Vec::new();
        let _ = stuck.read_to_end(&mut got);
        assert!(got.len() < body_len, "{} of {body_len}", got.len());
    }

    #[test]
    fn connections_are_bounded_and_idle_ones_closed_at_their_deadline() {
        let m = Arc::new(Mutex::new(Metrics {
            heartbeat: Some(Instant::now()),
            ..Metrics::default()
        }));
        let addr = serve("127.0.0.1:0", m.clone(), Shutdown::new())
            .unwrap()
            .addr;
        let idle: Vec<TcpStream> = (0..MAX_CONNECTIONS)
            .map(|_| TcpStream::connect(addr).unwrap())
            .collect();
        // One more than the limit: closed at once, nothing held for it.
        let mut extra = TcpStream::connect(addr).unwrap();
        extra
            .set_read_timeout(Some(Duration::from_secs(10)))
            .unwrap();
        let t = Instant::now();
        let mut b = [0u8; 16];
        assert!(matches!(extra.read(&mut b), Ok(0) | Err(_)));
        assert!(t.elapsed() < REQUEST_DEADLINE, "not closed at once");
        // The idle ones are closed at their deadline; then /health answers again.
        let mut first = idle.into_iter().next().unwrap();
        first.set_read_timeout(Some(REQUEST_DEADLINE * 5)).unwrap();
        assert!(matches!(first.read(&mut b), Ok(0) | Err(_)));
        let t = Instant::now();
        let mut answered = None;
        while t.elapsed() < Duration::from_secs(20) {
            if let Ok(r) = get(addr, "/health") {
                if !r.is_empty() {
                    answered = Some(r);
                    break;
                }
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        let r = answered.expect("health answers once the idle clients are gone");
        assert!(
            r.starts_with("HTTP/1.1 200 OK\r\n") && r.ends_with("\r\n\r\nok\n"),
            "{r}"
        );
        m.lock().unwrap().heartbeat = Some(Instant::now() - STALL - Duration::from_secs(1));
        assert!(get(addr, "/health").unwrap().starts_with("HTTP/1.1 503"));
        assert!(get(addr, "/nothing").unwrap().starts_with("HTTP/1.1 404"));
    }

    #[test]
    fn exposition_has_the_families_and_a_cumulative_histogram() {
        let mut m = Metrics::default();
        m.feed("m").published(false, 3.0, 100.0);
        m.feed("m").published(true, 45.0, 200.0);
        *m.feed("m").failed.entry("output").or_default() += 1;
        let t = m.render();
        assert!(
            t.contains("leeward_steps_published_total{feed=\"m\",state=\"complete\"} 1"),
            "{t}"
        );
        assert!(t.contains("leeward_steps_published_total{feed=\"m\",state=\"partial\"} 1"));
        assert!(t.contains("leeward_steps_failed_total{feed=\"m\",reason=\"output\"} 1"));
        assert!(t.contains("leeward_publish_latency_seconds_bucket{feed=\"m\",le=\"5\"} 1"));
        assert!(t.contains("leeward_publish_latency_seconds_bucket{feed=\"m\",le=\"60\"} 2"));
        assert!(t.contains("leeward_publish_latency_seconds_count{feed=\"m\"} 2"));
        assert!(t.contains("leeward_last_success_timestamp_seconds{feed=\"m\"} 200.000"));
        // Every sample line belongs to a declared family.
        let declared: Vec<&str> = t
            .lines()
            .filter_map(|l| l.strip_prefix("# TYPE "))
            .filter_map(|l| l.split_whitespace().next())
            .collect();
        for l in t.lines().filter(|l| !l.starts_with('#')) {
            let name = l.split(['{', ' ']).next().unwrap();
            assert!(
                declared.iter().any(|d| name == *d
                    || name
                        .strip_prefix(d)
                        .is_some_and(|s| ["_bucket", "_sum", "_count"].contains(&s))),
                "{name}"
            );
        }
    }

    #[test]
    fn job_ends_leeward_found_itself_are_labelled_apart_from_the_schedulers_states() {
        let mut m = Metrics::default();
        m.scheduler.used = true;
        for s in ["TIMEOUT", "unwritten", "lost"] {
            *m.scheduler.ended.entry(s.into()).or_default() += 1;
        }
        let t = m.render();
        assert!(
            t.contains("leeward_scheduler_jobs_ended_total{state=\"TIMEOUT\"} 1"),
            "{t}"
        );
        for word in ["unwritten", "lost"] {
            assert!(
                t.contains(&format!(
                    "leeward_scheduler_jobs_ended_total{{outcome=\"{word}\"}} 1"
                )),
                "{t}"
            );
            assert!(!t.contains(&format!("state=\"{word}\"")), "{t}");
        }
        // leeward's words are lower case, the scheduler's upper case: never the same.
        for w in crate::service::job_state::outcome::ALL {
            assert_eq!(w, w.to_lowercase());
            assert!(!crate::service::job_state::has_ended(w), "{w}");
        }
    }

    #[test]
    fn the_endpoint_thread_ends_with_the_service() {
        let stop = Shutdown::new();
        let m = Arc::new(Mutex::new(Metrics::default()));
        let ep = serve("127.0.0.1:0", m, stop.clone()).unwrap();
        assert!(
            get(ep.addr, "/health").unwrap().starts_with("HTTP/1.1"),
            "answers while running"
        );
        stop.begin(Duration::from_secs(60));
        assert!(
            get(ep.addr, "/health").is_ok(),
            "still answers while the steps in hand finish"
        );
        stop.end();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            ep.join();
            let _ = tx.send(());
        });
        // Generous: the thread looks every 250 ms; this only fails if it never ends.
        assert!(
            rx.recv_timeout(Duration::from_secs(30)).is_ok(),
            "the endpoint's thread did not end"
        );
    }
}
