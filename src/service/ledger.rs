//! The ledger: a durable record of what the service has seen, published,
//! failed and quarantined, kept as an append-only journal in the state
//! directory.
//!
//! In: records to append. Out: the state replayed from the journal at start.
//! Each record is one JSON line, written and fsynced before the call returns,
//! so a crash (kill -9 at any moment) loses at most the line being written; a
//! torn last line is dropped at replay and cut from the file. Why a journal
//! and not an embedded database: one writer, a few records per step, no
//! queries beyond "what happened to this step" -- a journal an operator can
//! read with `tail` does that with no dependency and no schema to migrate.

use std::collections::BTreeMap;
use std::fs::{File, OpenOptions};
use std::io::{BufRead, BufReader, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use thiserror::Error;

/// Why the ledger could not be used.
#[derive(Debug, Error)]
pub enum LedgerError {
    /// The file system refused.
    #[error("ledger {path}: {source}")]
    Io {
        /// The journal.
        path: PathBuf,
        /// The system's error.
        source: std::io::Error,
    },
}

/// One event in the journal.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "event", rename_all = "snake_case")]
pub enum Record {
    /// An input file was found finished.
    Seen {
        /// Its path.
        file: String,
        /// Its size in bytes.
        size: u64,
        /// Its checksum (FNV-1a 64, hex).
        checksum: String,
    },
    /// A step's product was published.
    Published {
        /// Step key: model, cycle, step.
        step: String,
        /// The published file.
        path: String,
        /// Unix time of publication.
        at: i64,
    },
    /// A step failed, with the reason.
    Failed {
        /// Step key.
        step: String,
        /// What went wrong.
        reason: String,
    },
    /// An input file was set aside.
    Quarantined {
        /// Its path.
        file: String,
        /// Why.
        reason: String,
    },
    /// An operator asked for a step to be made again.
    Reprocess {
        /// Step key.
        step: String,
    },
}

/// The state replayed from the journal.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct State {
    /// Input files seen: path -> (size, checksum).
    pub seen: BTreeMap<String, (u64, String)>,
    /// Steps published: step -> path.
    pub published: BTreeMap<String, String>,
    /// Steps failed: step -> last reason.
    pub failed: BTreeMap<String, String>,
    /// Files quarantined: path -> reason.
    pub quarantined: BTreeMap<String, String>,
}

impl State {
    fn apply(&mut self, r: &Record) {
        match r {
            Record::Seen {
                file,
                size,
                checksum,
            } => {
                self.seen.insert(file.clone(), (*size, checksum.clone()));
            }
            Record::Published { step, path, .. } => {
                self.failed.remove(step);
                self.published.insert(step.clone(), path.clone());
            }
            Record::Failed { step, reason } => {
                self.failed.insert(step.clone(), reason.clone());
            }
            Record::Quarantined { file, reason } => {
                self.quarantined.insert(file.clone(), reason.clone());
            }
            Record::Reprocess { step } => {
                self.published.remove(step);
                self.failed.remove(step);
            }
        }
    }
}

/// An open journal.
pub struct Ledger {
    path: PathBuf,
    file: File,
    /// The state, kept in step with the journal.
    pub state: State,
}

impl Ledger {
    /// Open (or create) the journal in `state_dir`, replay it, and cut a torn last line.
    pub fn open(state_dir: &Path) -> Result<Ledger, LedgerError> {
        let path = state_dir.join("ledger.jsonl");
        let io = |source| LedgerError::Io {
            path: path.clone(),
            source,
        };
        std::fs::create_dir_all(state_dir).map_err(io)?;
        let mut file = OpenOptions::new()
            .create(true)
            .read(true)
            .append(true)
            .open(&path)
            .map_err(io)?;
        let mut state = State::default();
        let mut good_len = 0u64;
        {
            let mut reader = BufReader::new(&file);
            let mut line = String::new();
            loop {
                line.clear();
                let n = reader.read_line(&mut line).map_err(io)?;
                if n == 0 {
                    break;
                }
                // Only a whole line that parses counts: a crash mid-write leaves a torn tail.
                match (
                    line.ends_with('\n'),
                    serde_json::from_str::<Record>(line.trim_end()),
                ) {
                    (true, Ok(r)) => {
                        state.apply(&r);
                        good_len += n as u64;
                    }
                    _ => break,
                }
            }
        }
        let len = file.seek(SeekFrom::End(0)).map_err(io)?;
        if len != good_len {
            file.set_len(good_len).map_err(io)?;
            file.sync_all().map_err(io)?;
        }
        Ok(Ledger { path, file, state })
    }

    /// Append one record, fsynced before returning, and apply it to the state.
    pub fn append(&mut self, r: Record) -> Result<(), LedgerError> {
        let io = |source| LedgerError::Io {
            path: self.path.clone(),
            source,
        };
        let mut line = serde_json::to_string(&r).map_err(|e| io(std::io::Error::other(e)))?;
        line.push('\n');
        self.file.write_all(line.as_bytes()).map_err(io)?;
        self.file.sync_data().map_err(io)?;
        self.state.apply(&r);
        Ok(())
    }

    /// Where the journal lives.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// Checksum of an input file's bytes (FNV-1a 64, hex; a fingerprint, not a security hash).
pub fn checksum(bytes: &[u8]) -> String {
    crate::ingest::bytes::fnv1a_hex(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("leeward-ledger-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    #[test]
    fn replay_gives_back_the_state() {
        let d = dir("replay");
        {
            let mut l = Ledger::open(&d).unwrap();
            l.append(Record::Seen {
                file: "a.grib2".into(),
                size: 10,
                checksum: checksum(b"x"),
            })
            .unwrap();
            l.append(Record::Failed {
                step: "m/2026031400/006".into(),
                reason: "disk full".into(),
            })
            .unwrap();
            l.append(Record::Published {
                step: "m/2026031400/006".into(),
                path: "out/x.nc".into(),
                at: 1,
            })
            .unwrap();
        }
        let l = Ledger::open(&d).unwrap();
        assert_eq!(
            l.state
                .published
                .get("m/2026031400/006")
                .map(String::as_str),
            Some("out/x.nc")
        );
        assert!(
            l.state.failed.is_empty(),
            "a later publication clears the failure"
        );
        assert_eq!(l.state.seen["a.grib2"].0, 10);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_torn_last_line_is_dropped_and_cut() {
        let d = dir("torn");
        {
            let mut l = Ledger::open(&d).unwrap();
            l.append(Record::Reprocess { step: "s".into() }).unwrap();
        }
        let path = d.join("ledger.jsonl");
        let good = std::fs::metadata(&path).unwrap().len();
        // What a kill -9 in the middle of a write leaves behind.
        std::fs::OpenOptions::new()
            .append(true)
            .open(&path)
            .unwrap()
            .write_all(b"{\"event\":\"publ")
            .unwrap();
        let mut l = Ledger::open(&d).unwrap();
        assert_eq!(std::fs::metadata(&path).unwrap().len(), good);
        l.append(Record::Quarantined {
            file: "bad".into(),
            reason: "garbage".into(),
        })
        .unwrap();
        let l = Ledger::open(&d).unwrap();
        assert_eq!(l.state.quarantined["bad"], "garbage");
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn checksum_is_fnv1a() {
        // FNV-1a 64 test vectors (Fowler, Noll and Vo; from memory): "" and "a".
        assert_eq!(checksum(b""), "cbf29ce484222325");
        assert_eq!(checksum(b"a"), "af63dc4c8601ec8c");
    }
}
