//! Step inputs from the files the service catalogued: a step's messages
//! read again by their byte ranges, checked against the catalogue, and the
//! step found among them by the pipeline's planner. Used where a step is
//! made (a step process, a batch job), never by the main loop.
//!
//! In: a step's contributions (file, byte ranges, digest) and its key. Out:
//! the step and its inputs, or the file that cannot be read and why.

use std::path::PathBuf;
use std::sync::Arc;

use super::assemble::Contribution;
use crate::ingest::catalogue::catalogue;
use crate::ingest::source::open_input;
use crate::pipeline::{plan, InputFile, Step, StepKey};

/// Read a step's messages from a file as they were catalogued, opened
/// without blocking and refused unless it is a regular file. With their
/// digest known, the messages must be the very bytes catalogued (a file
/// written in place may have grown by other steps' messages since); without
/// it (a spec of an earlier version), the file must have its size of then.
fn read_messages(c: &Contribution) -> Result<Vec<u8>, String> {
    let o = open_input(&c.path, true).map_err(|e| e.to_string())?;
    let expect = if c.digest.is_empty() { c.size } else { o.size };
    let out = crate::ingest::source::read_ranges(&o.file, expect, &c.messages).map_err(|e| {
        if c.digest.is_empty() {
            e.to_string()
        } else {
            format!(
                "changed since it was catalogued ({} bytes then, {} now: {e})",
                c.size, o.size
            )
        }
    })?;
    if !c.digest.is_empty() {
        let now = super::ledger::checksum(&out);
        if now != c.digest {
            return Err(format!(
                "changed since it was catalogued (the step's messages {} then, {now} now)",
                c.digest
            ));
        }
    }
    Ok(out)
}

/// Read a step's messages from its files as they were catalogued, and find
/// the step among them: the inputs and the step, or the file that cannot be
/// read (with why), or `Ok(None)` when the step's fields are no longer there.
#[allow(clippy::type_complexity)]
pub fn load_step(
    files: &[Contribution],
    key: &StepKey,
) -> Result<Option<(Step, Vec<InputFile>)>, (PathBuf, String)> {
    let mut inputs = Vec::new();
    for c in files {
        match read_messages(c) {
            Ok(bytes) => {
                let cat = catalogue(&bytes);
                inputs.push(InputFile {
                    path: c.path.clone(),
                    bytes: Arc::new(bytes),
                    catalogue: cat,
                });
            }
            Err(e) => return Err((c.path.clone(), e)),
        }
    }
    let (steps, _) = plan(&inputs);
    Ok(steps
        .into_iter()
        .find(|s| s.key == *key)
        .map(|s| (s, inputs)))
}
