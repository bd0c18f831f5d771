//! Watching the incoming directory: which files are finished.
//!
//! In: a directory, a settle time, a scan interval. Out: a stream of paths of
//! files that are finished, each once per (size, mtime). A file counts when it
//! was closed after writing or renamed into place (inotify through `notify`),
//! or when its size and mtime have not changed for the settle time; a periodic
//! scan of the directory is the fallback for missed events and for network
//! file systems, and the first scan catches up with files that arrived while
//! the service was down. Hidden files and temporary names never count.
//! Nothing is opened here: entries are looked at with `lstat` (and `stat`
//! through a link). A symbolic link is handed over like a file, with its
//! target's size and mtime, and the daemon applies the feed's link policy.
//! Every entry that is never an input is said once in the log (again only
//! if the reason changes), at a level that fits: a hidden or temporary name
//! at debug, a directory at info, a dangling link, a FIFO, a socket or a
//! device as a warning. Names need not be UTF-8.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver, RecvTimeoutError, Sender};
use std::thread::JoinHandle;
use std::time::{Duration, Instant, SystemTime};

use notify::event::{AccessKind, AccessMode, ModifyKind, RenameMode};
use notify::{EventKind, RecursiveMode, Watcher as _};
use thiserror::Error;
use tracing::{debug, info, warn};

use crate::ingest::source::kind_of;

/// Why watching could not start.
#[derive(Debug, Error)]
pub enum WatchError {
    /// inotify (or the platform's watcher) refused.
    #[error("cannot watch {path}: {source}")]
    Notify {
        /// The directory.
        path: PathBuf,
        /// The watcher's error.
        source: notify::Error,
    },
}

/// True for names that are never inputs: hidden files and temporary names.
pub fn ignored(name: &str) -> bool {
    name.starts_with('.')
        || name.ends_with('~')
        || [
            ".tmp",
            ".part",
            ".partial",
            ".swp",
            ".filepart",
            ".crdownload",
        ]
        .iter()
        .any(|s| name.ends_with(s))
}

/// Finished files, as they come.
pub struct FinishedFiles {
    rx: Receiver<PathBuf>,
    _watcher: Watcher,
}

impl FinishedFiles {
    /// The next finished file, waiting at most `timeout`.
    pub fn next(&self, timeout: Duration) -> Option<PathBuf> {
        self.rx.recv_timeout(timeout).ok()
    }
}

/// A directory being watched by a thread of its own, which hands each finished file to
/// the function it was given ([`watch_with`]). Dropping it stops and joins the thread.
pub struct Watcher {
    stop: Sender<()>,
    thread: Option<JoinHandle<()>>,
}

impl Drop for Watcher {
    fn drop(&mut self) {
        let _ = self.stop.send(());
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

#[derive(Debug, Clone, Copy)]
struct Candidate {
    size: u64,
    mtime: Option<SystemTime>,
    since: Instant,
    closed: bool,
}

/// What an entry of the incoming directory is to the watcher.
#[derive(Debug, Clone, PartialEq)]
enum Look {
    /// A regular file, or a link to something (the daemon applies the feed's
    /// link policy): its size and mtime (a link's: its target's).
    Candidate(u64, Option<SystemTime>),
    /// Never an input: said once in the log, at this level, with why.
    Skipped(tracing::Level, String),
}

/// Look at an entry without opening it; `None` when it is gone.
fn look(p: &Path) -> Option<Look> {
    let name = crate::escape::path(Path::new(p.file_name()?));
    if ignored(&name) {
        return Some(Look::Skipped(
            tracing::Level::DEBUG,
            "hidden or temporary name: never an input".into(),
        ));
    }
    let m = std::fs::symlink_metadata(p).ok()?;
    let t = m.file_type();
    Some(if t.is_file() {
        Look::Candidate(m.len(), m.modified().ok())
    } else if t.is_symlink() {
        match std::fs::metadata(p) {
            Ok(target) => Look::Candidate(target.len(), target.modified().ok()),
            Err(e) => Look::Skipped(
                tracing::Level::WARN,
                format!("symbolic link whose target cannot be reached (dangling: {e}); taken when it can"),
            ),
        }
    } else if t.is_dir() {
        Look::Skipped(
            tracing::Level::INFO,
            "a directory: not read (subdirectories are not watched)".into(),
        )
    } else {
        Look::Skipped(
            tracing::Level::WARN,
            format!("{}, not a regular file: never read", kind_of(&t)),
        )
    })
}

/// Say once why an entry is skipped (again only if the reason changes).
fn note_skip(said: &mut HashMap<PathBuf, String>, p: &Path, level: tracing::Level, why: String) {
    if said.get(p) == Some(&why) {
        return;
    }
    let file = crate::escape::shown(p);
    match level {
        tracing::Level::WARN => warn!(file = %file, reason = %why, "skipped"),
        tracing::Level::INFO => info!(file = %file, reason = %why, "skipped"),
        _ => debug!(file = %file, reason = %why, "skipped"),
    }
    said.insert(p.to_path_buf(), why);
}

/// The watching thread's memory of one directory.
struct Watching {
    dir: PathBuf,
    settle: Duration,
    /// Files seen and not yet finished.
    cands: HashMap<PathBuf, Candidate>,
    /// Files handed out, with the size and time they had then.
    emitted: HashMap<PathBuf, (u64, Option<SystemTime>)>,
    /// Entries skipped, with the reason already logged.
    said: HashMap<PathBuf, String>,
}

fn fresh(size: u64, mtime: Option<SystemTime>) -> Candidate {
    Candidate {
        size,
        mtime,
        since: Instant::now(),
        closed: false,
    }
}

impl Watching {
    /// List the directory: new files become candidates, skipped entries are
    /// logged once, and files gone from it are forgotten, so that months of
    /// deliveries do not accumulate here.
    fn scan(&mut self) {
        let t_scan = Instant::now();
        let rd = match std::fs::read_dir(&self.dir) {
            Ok(rd) => rd,
            Err(e) => {
                warn!(dir = %self.dir.display(), error = %e, "cannot scan the incoming directory");
                return;
            }
        };
        let mut present = std::collections::HashSet::new();
        for e in rd.flatten() {
            let p = e.path();
            present.insert(p.clone());
            if self.cands.contains_key(&p) {
                continue;
            }
            match look(&p) {
                Some(Look::Candidate(size, mtime)) => {
                    self.said.remove(&p);
                    if self.emitted.get(&p) != Some(&(size, mtime)) {
                        self.cands.insert(p, fresh(size, mtime));
                    }
                }
                Some(Look::Skipped(level, why)) => note_skip(&mut self.said, &p, level, why),
                None => {}
            }
        }
        self.emitted.retain(|p, _| present.contains(p));
        self.said.retain(|p, _| present.contains(p));
        debug!(dir = %self.dir.display(), files = present.len(), pending = self.cands.len(), seconds = t_scan.elapsed().as_secs_f64(), "incoming directory scanned");
    }

    /// An inotify event: its files become (or stay) candidates; a close after
    /// writing or a rename into the directory marks them finished.
    fn on_event(&mut self, ev: notify::Event) {
        let finished = matches!(
            ev.kind,
            EventKind::Access(AccessKind::Close(AccessMode::Write))
                | EventKind::Modify(ModifyKind::Name(RenameMode::To))
                | EventKind::Modify(ModifyKind::Name(RenameMode::Both))
        );
        for p in ev.paths {
            let (size, mtime) = match look(&p) {
                Some(Look::Candidate(size, mtime)) => (size, mtime),
                Some(Look::Skipped(level, why)) => {
                    note_skip(&mut self.said, &p, level, why);
                    continue;
                }
                None => continue,
            };
            let c = self.cands.entry(p).or_insert(fresh(size, mtime));
            if (c.size, c.mtime) != (size, mtime) {
                *c = fresh(size, mtime);
            }
            c.closed |= finished;
        }
    }

    /// Look at every candidate again: one that changed starts over, one
    /// closed or unchanged for the settle time is handed out once for its
    /// size and time. False when nobody listens any more.
    fn pass(&mut self, deliver: &dyn Fn(PathBuf) -> bool) -> bool {
        let mut done = Vec::new();
        for (p, c) in self.cands.iter_mut() {
            match look(p) {
                None | Some(Look::Skipped(..)) => done.push((p.clone(), None)),
                Some(Look::Candidate(size, mtime)) => {
                    if (size, mtime) != (c.size, c.mtime) {
                        *c = fresh(size, mtime);
                    } else if c.closed || c.since.elapsed() >= self.settle {
                        done.push((p.clone(), Some((size, mtime))));
                    }
                }
            }
        }
        for (p, st) in done {
            self.cands.remove(&p);
            if let Some(st) = st {
                if self.emitted.get(&p) != Some(&st) {
                    self.emitted.insert(p.clone(), st);
                    if !deliver(p) {
                        return false;
                    }
                }
            }
        }
        true
    }
}

/// Start watching `dir`.
pub fn watch(
    dir: &Path,
    settle: Duration,
    scan_every: Duration,
) -> Result<FinishedFiles, WatchError> {
    let (out_tx, out_rx) = channel();
    let watcher = watch_with(dir, settle, scan_every, move |p| out_tx.send(p).is_ok())?;
    Ok(FinishedFiles {
        rx: out_rx,
        _watcher: watcher,
    })
}

/// Watch `dir` as [`watch`] does, handing each finished file to `deliver`, on the
/// watcher's thread; the thread ends when `deliver` returns false or the [`Watcher`] is
/// dropped.
pub fn watch_with(
    dir: &Path,
    settle: Duration,
    scan_every: Duration,
    deliver: impl Fn(PathBuf) -> bool + Send + 'static,
) -> Result<Watcher, WatchError> {
    let dir = dir.to_path_buf();
    let (ev_tx, ev_rx) = channel::<notify::Result<notify::Event>>();
    let notify_err = |source| WatchError::Notify {
        path: dir.clone(),
        source,
    };
    let mut watcher = notify::recommended_watcher(ev_tx).map_err(notify_err)?;
    watcher
        .watch(&dir, RecursiveMode::NonRecursive)
        .map_err(notify_err)?;
    let (stop_tx, stop_rx) = channel();
    let thread = std::thread::spawn(move || {
        let _watcher = watcher; // lives as long as the thread
        let mut w = Watching {
            dir,
            settle,
            cands: HashMap::new(),
            emitted: HashMap::new(),
            said: HashMap::new(),
        };
        let mut last_scan: Option<Instant> = None;
        let mut last_pass = Instant::now();
        loop {
            if stop_rx.try_recv().is_ok() {
                return;
            }
            if last_scan.is_none_or(|t| t.elapsed() >= scan_every) {
                last_scan = Some(Instant::now());
                w.scan();
            }
            let mut evented = false;
            match ev_rx.recv_timeout(Duration::from_millis(50)) {
                Ok(Ok(ev)) => {
                    evented = true;
                    w.on_event(ev);
                }
                Ok(Err(e)) => {
                    warn!(dir = %w.dir.display(), error = %e, "watch event error; the periodic scan goes on")
                }
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => return,
            }
            // Candidates are looked at again after an event, or every 200 ms:
            // a backlog of thousands found by a scan is not stat-ed 20 times a second.
            if !evented && last_pass.elapsed() < Duration::from_millis(200) {
                continue;
            }
            last_pass = Instant::now();
            if !w.pass(&deliver) {
                return;
            }
        }
    });
    Ok(Watcher {
        stop: stop_tx,
        thread: Some(thread),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn temporary_and_hidden_names_never_count() {
        for n in [".x.grib2", "x.grib2.tmp", "x.part", "x~", "x.partial"] {
            assert!(ignored(n), "{n}");
        }
        assert!(!ignored("gfs.t00z.f006.grib2"));
    }
}
