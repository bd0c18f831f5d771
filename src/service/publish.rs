//! Publishing: the output tree, the per-step manifest, clean-up of stale
//! temporaries, retention, and the quarantine of bad input files.
//!
//! In: a step's report and product file. Out: files in the tree
//! `<out_dir>/<feed>/<cycle YYYYMMDDTHHMMZ>/`: the product `<name>.nc` and,
//! written last, its manifest `<name>.json`, which downstream systems
//! trigger on. Every file is written under a hidden temporary name, fsynced
//! and renamed into place, so a reader never sees a partial file.

use std::path::{Path, PathBuf};

use chrono::{NaiveDateTime, TimeDelta, Utc};
use serde::{Deserialize, Serialize};
use tracing::{info, warn};

use crate::output::store::cycle_dir_name;
use crate::pipeline::StepReport;

/// The directory of one cycle of one feed.
pub fn cycle_dir(out_dir: &Path, feed: &str, reference_time: NaiveDateTime) -> PathBuf {
    out_dir.join(feed).join(cycle_dir_name(reference_time))
}

/// The manifest's path for a product file.
pub fn manifest_path(product: &Path) -> PathBuf {
    product.with_extension("json")
}

/// One input file in a manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ManifestInput {
    /// Its path.
    pub file: String,
    /// Its size, bytes.
    pub bytes: u64,
    /// Its checksum (FNV-1a 64, hex).
    pub checksum: String,
}

/// Timings of a step, seconds.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Timings {
    /// Decoding the fields.
    pub decode: f64,
    /// Computing the diagnostics.
    pub diagnostics: f64,
    /// Writing the file.
    pub write: f64,
    /// Changes in time and PV budget.
    pub changes: f64,
    /// The whole step in the worker.
    pub total: f64,
    /// From the last input file found finished to publication.
    pub latency: f64,
}

/// The per-step manifest (JSON).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// Format version of this manifest.
    pub manifest_version: u32,
    /// The feed.
    pub feed: String,
    /// Cycle (reference time), ISO 8601.
    pub cycle: String,
    /// Lead time, hours.
    pub lead_hours: i64,
    /// Valid time, ISO 8601.
    pub valid_time: String,
    /// Ensemble member, if any.
    pub member: Option<u8>,
    /// `complete`, or `partial` (made at the timeout with what was there).
    pub state: String,
    /// The product file, name only (it sits beside the manifest).
    pub product: String,
    /// Its size, bytes.
    pub product_bytes: u64,
    /// Its SHA-256, hex (what `sha256sum` prints).
    pub product_checksum: String,
    /// Variables in the product file.
    pub variables: Vec<String>,
    /// Quicklook images beside it (file names).
    #[serde(default)]
    pub images: Vec<String>,
    /// The grid.
    pub grid: String,
    /// Inputs used.
    pub inputs: Vec<ManifestInput>,
    /// What was looked for and not found.
    pub missing: Vec<String>,
    /// Variables made but left out of the file because no point has a value,
    /// each as "name: why".
    #[serde(default)]
    pub left_out: Vec<String>,
    /// Problems met with the input.
    pub issues: Vec<String>,
    /// leeward's version.
    pub software: String,
    /// Timings.
    pub timings_s: Timings,
    /// When this publication was made, ISO 8601.
    pub published_at: String,
    /// 1 at publication, +1 each time a later step or cycle adds changes to the file.
    pub revision: u32,
    /// When last revised, ISO 8601.
    pub revised_at: String,
    /// Points whose PV budget trajectories did not converge (flagged 1 in the file's
    /// `bud_unconverged` and `bud_dpvdt_unconverged`), when the file has a budget.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub budget_not_converged: Option<u64>,
}

fn now_iso() -> String {
    Utc::now().format("%Y-%m-%dT%H:%M:%S%.3fZ").to_string()
}

/// Write `bytes` to `path` atomically (see [`crate::output::write_file_atomic`]).
pub use crate::output::write_file_atomic as write_atomic;

/// Size and SHA-256 (FIPS 180-4), hex, of a published file, read in blocks
/// so that a file of any size costs one block of memory; `sha256sum` gives
/// the same digest.
pub fn file_checksum(path: &Path) -> std::io::Result<(u64, String)> {
    use sha2::Digest;
    use std::io::Read;
    let mut f = std::fs::File::open(path)?;
    let mut h = sha2::Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut n = 0u64;
    loop {
        let k = f.read(&mut buf)?;
        if k == 0 {
            break;
        }
        h.update(&buf[..k]);
        n += k as u64;
    }
    let digest = h.finalize();
    Ok((n, digest.iter().map(|b| format!("{b:02x}")).collect()))
}

/// What a staged NetCDF file holds, as its manifest tells it, read back by
/// the step process that wrote it. Opening files costs the opening process
/// memory that libnetcdf and libhdf5 keep; the step process ends, the service
/// runs for months, so the service takes these facts from the result record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NcFacts {
    /// Its variables' names.
    pub variables: Vec<String>,
    /// Points whose budget trajectories did not converge (None: no budget).
    pub not_converged: Option<u64>,
}

impl NcFacts {
    /// The facts of the NetCDF file at `path`; None when it does not open.
    pub fn of(path: &Path) -> Option<NcFacts> {
        crate::output::quiet_hdf5_errors();
        let variables = netcdf::open(path)
            .ok()?
            .variables()
            .map(|v| v.name())
            .collect();
        Some(NcFacts {
            variables,
            not_converged: crate::changes::not_converged_in(path),
        })
    }
}

/// The manifest's variables and budget flag count of the NetCDF file at
/// `path`: as its maker reported them (`known`), else read from the file.
fn nc_facts(path: &Path, known: Option<&NcFacts>) -> (Vec<String>, Option<u64>) {
    match known {
        Some(k) => (k.variables.clone(), k.not_converged),
        None => NcFacts::of(path)
            .map(|k| (k.variables, k.not_converged))
            .unwrap_or_default(),
    }
}

/// What the service knows of a step beyond the pipeline's report.
pub struct StepFacts<'a> {
    /// The feed.
    pub feed: &'a str,
    /// Cycle.
    pub reference_time: NaiveDateTime,
    /// Valid time.
    pub valid_time: NaiveDateTime,
    /// Member.
    pub member: Option<u8>,
    /// Made at the timeout.
    pub partial: bool,
    /// Inputs.
    pub inputs: Vec<ManifestInput>,
    /// Unix time of the last input.
    pub last_input: f64,
    /// What the feed's completeness rule expected and did not get (a partial step).
    pub not_arrived: Vec<String>,
}

impl<'a> StepFacts<'a> {
    /// The facts of a step of `feed` made from `files`.
    pub fn of(
        feed: &'a str,
        key: &crate::pipeline::StepKey,
        partial: bool,
        files: &[super::assemble::Contribution],
        last_input: f64,
        not_arrived: Vec<String>,
    ) -> StepFacts<'a> {
        StepFacts {
            feed,
            reference_time: key.reference_time,
            valid_time: key.valid_time,
            member: key.member,
            partial,
            inputs: files
                .iter()
                .map(|c| ManifestInput {
                    file: crate::escape::path(&c.path),
                    bytes: c.size,
                    checksum: c.checksum.clone(),
                })
                .collect(),
            last_input,
            not_arrived,
        }
    }
}

/// The manifest of a step's product, to be published at `target` (the
/// product's place in the output tree) once the staged file `staged` is
/// renamed there: `bytes` and `sha256` are the staged file's. The revision
/// goes on from the manifest at `target`'s place, if there is one (a step
/// made again). `nc`: the staged file's variables and budget flags as the
/// process that made it read them back (else they are read here).
pub fn new_manifest(
    target: &Path,
    staged: &Path,
    (bytes, checksum): (u64, String),
    nc: Option<&NcFacts>,
    rep: &StepReport,
    facts: &StepFacts<'_>,
) -> Manifest {
    let now = now_iso();
    let (variables, budget_not_converged) = nc_facts(staged, nc);
    let latency = (Utc::now().timestamp_millis() as f64 / 1000.0 - facts.last_input).max(0.0);
    Manifest {
        manifest_version: 1,
        feed: facts.feed.to_string(),
        cycle: facts
            .reference_time
            .format("%Y-%m-%dT%H:%M:%SZ")
            .to_string(),
        lead_hours: (facts.valid_time - facts.reference_time).num_hours(),
        valid_time: facts.valid_time.format("%Y-%m-%dT%H:%M:%SZ").to_string(),
        member: facts.member,
        state: if facts.partial { "partial" } else { "complete" }.into(),
        product: target
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default(),
        product_bytes: bytes,
        product_checksum: checksum,
        variables,
        images: rep
            .images
            .iter()
            .filter_map(|p| p.file_name().map(|n| n.to_string_lossy().into_owned()))
            .collect(),
        grid: rep.grid.clone(),
        inputs: facts.inputs.clone(),
        missing: rep
            .missing
            .iter()
            .cloned()
            .chain(facts.not_arrived.iter().cloned())
            .collect(),
        left_out: rep.left_out.clone(),
        issues: rep.issues.iter().map(ToString::to_string).collect(),
        software: format!("leeward {}", env!("CARGO_PKG_VERSION")),
        timings_s: Timings {
            decode: rep.decode_seconds,
            diagnostics: rep.compute_seconds,
            write: rep.write_seconds,
            changes: rep.changes_seconds,
            total: rep.seconds,
            latency,
        },
        published_at: now.clone(),
        // A step made again (reprocess, late input) goes on from the revision it had.
        revision: read_manifest(&manifest_path(target)).map_or(1, |m| m.revision + 1),
        revised_at: now,
        budget_not_converged,
    }
}

/// The manifest of the published `target` once its staged copy `staged`
/// (with a later step's additions) replaces it: size, checksum and
/// variables of the copy, the revision one higher. `None` when `target` has
/// no manifest (its own step writes one when it is published). `nc` as for
/// [`new_manifest`].
pub fn revised_manifest(
    target: &Path,
    staged: &Path,
    (bytes, checksum): (u64, String),
    nc: Option<&NcFacts>,
) -> Option<Manifest> {
    let mut m = read_manifest(&manifest_path(target))?;
    m.product_bytes = bytes;
    m.product_checksum = checksum;
    (m.variables, m.budget_not_converged) = nc_facts(staged, nc);
    m.revision += 1;
    m.revised_at = now_iso();
    Some(m)
}

/// Write the cycle page beside a product again, now that its step is
/// published; a page that cannot be written is logged and the step stands.
pub fn refresh_cycle_page(product: &Path) {
    let Some(dir) = product.parent() else {
        return;
    };
    if let Err(e) = crate::output::page::refresh(dir) {
        warn!(file = %dir.display(), error = %e, "cycle page not written");
    }
}

/// Write a manifest atomically at `path`.
pub fn write_manifest(path: &Path, m: &Manifest) -> std::io::Result<()> {
    let text = serde_json::to_vec_pretty(m).map_err(std::io::Error::other)?;
    write_atomic(path, &text)
}

/// Does the manifest beside `product` describe it? `Ok` when it does;
/// otherwise what differs. `verify`: compare the SHA-256 too (a read of the
/// whole file), not only the size.
pub fn check_manifest(product: &Path, verify: bool) -> Result<(), String> {
    let path = manifest_path(product);
    let m =
        read_manifest(&path).ok_or_else(|| format!("{}: no readable manifest", path.display()))?;
    let size = std::fs::metadata(product)
        .map_err(|e| format!("{}: {e}", product.display()))?
        .len();
    if size != m.product_bytes {
        return Err(format!(
            "{}: {size} bytes, its manifest says {}",
            product.display(),
            m.product_bytes
        ));
    }
    if verify {
        let (_, sum) = file_checksum(product).map_err(|e| format!("{}: {e}", product.display()))?;
        if sum != m.product_checksum {
            return Err(format!(
                "{}: SHA-256 {sum}, its manifest says {}",
                product.display(),
                m.product_checksum
            ));
        }
    }
    Ok(())
}

/// Make the manifest beside `product` describe the file as it is (size,
/// SHA-256, variables), one revision higher; nothing when it already does or
/// when there is no manifest.
pub fn repair_manifest(product: &Path) -> std::io::Result<bool> {
    if check_manifest(product, true).is_ok() {
        return Ok(false);
    }
    let known = file_checksum(product)?;
    match revised_manifest(product, product, known, None) {
        Some(m) => write_manifest(&manifest_path(product), &m).map(|()| true),
        None => Ok(false),
    }
}

/// Read a manifest.
pub fn read_manifest(path: &Path) -> Option<Manifest> {
    serde_json::from_slice(&std::fs::read(path).ok()?).ok()
}

/// True for the hidden temporaries leeward writes (product, update, manifest).
pub fn is_temporary(name: &str) -> bool {
    name.starts_with('.')
        && (name.contains(".partial-")
            || name.contains(".update-")
            || name.contains(".manifest-")
            || name.starts_with(".probe-"))
}

/// Remove temporaries left by a crash anywhere in the output tree
/// (`<out>/<feed>/<cycle>/`). Returns how many were removed.
pub fn clean_temporaries(out_dir: &Path) -> usize {
    let mut n = 0;
    let mut dirs = vec![(out_dir.to_path_buf(), 0)];
    while let Some((d, depth)) = dirs.pop() {
        let Ok(rd) = std::fs::read_dir(&d) else {
            continue;
        };
        for e in rd.flatten() {
            let p = e.path();
            let name = e.file_name().to_string_lossy().into_owned();
            let Ok(ft) = e.file_type() else { continue };
            if ft.is_dir() && depth < 2 && !name.starts_with('.') {
                dirs.push((p, depth + 1));
            } else if ft.is_file() && is_temporary(&name) {
                match std::fs::remove_file(&p) {
                    Ok(()) => {
                        info!(file = %p.display(), "stale temporary removed");
                        n += 1;
                    }
                    Err(e) => {
                        warn!(file = %p.display(), error = %e, "cannot remove a stale temporary")
                    }
                }
            }
        }
    }
    n
}

/// Delete the cycle directories of `feed_dir` whose cycle is older than `days`
/// days before `now`. Returns the directories removed.
pub fn apply_retention(feed_dir: &Path, days: u32, now: NaiveDateTime) -> Vec<PathBuf> {
    let mut removed = Vec::new();
    if days == 0 {
        return removed;
    }
    let Some(limit) = TimeDelta::try_days(i64::from(days)).map(|d| now - d) else {
        return removed;
    };
    let Ok(rd) = std::fs::read_dir(feed_dir) else {
        return removed;
    };
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let Ok(t) = NaiveDateTime::parse_from_str(&name, "%Y%m%dT%H%MZ") else {
            continue;
        };
        if t < limit && e.path().is_dir() {
            // Manifests first, so that nothing downstream is pointed at a file being deleted.
            if let Ok(files) = std::fs::read_dir(e.path()) {
                for f in files.flatten() {
                    if f.path().extension().is_some_and(|x| x == "json") {
                        let _ = std::fs::remove_file(f.path());
                    }
                }
            }
            match std::fs::remove_dir_all(e.path()) {
                Ok(()) => {
                    info!(dir = %e.path().display(), cycle = %name, days, "output cycle removed by retention");
                    removed.push(e.path());
                }
                Err(err) => {
                    warn!(dir = %e.path().display(), error = %err, "cannot remove an old output cycle")
                }
            }
        }
    }
    removed
}

/// Move a bad input file into `qdir/<feed>/` with a note of the reason beside
/// it. Returns where it went.
pub fn quarantine(path: &Path, qdir: &Path, feed: &str, reason: &str) -> std::io::Result<PathBuf> {
    let dir = qdir.join(feed);
    std::fs::create_dir_all(&dir)?;
    // The name's own bytes: a name that is not UTF-8 keeps them.
    let name = path
        .file_name()
        .map(std::ffi::OsStr::to_os_string)
        .unwrap_or_else(|| "unnamed".into());
    let mut dest = dir.join(&name);
    let mut k = 1;
    while dest.symlink_metadata().is_ok() {
        let mut n = name.clone();
        n.push(format!(".{k}"));
        dest = dir.join(n);
        k += 1;
    }
    if std::fs::rename(path, &dest).is_err() {
        // Another file system: copy, then remove the original. A symbolic
        // link is made again as a link: its target is never read.
        let is_link = std::fs::symlink_metadata(path)?.file_type().is_symlink();
        if is_link {
            std::os::unix::fs::symlink(std::fs::read_link(path)?, &dest)?;
        } else {
            std::fs::copy(path, &dest)?;
        }
        std::fs::remove_file(path)?;
    }
    let note = format!(
        "{}\nfrom: {}\nfeed: {feed}\nat: {}\nreason: {}\n",
        crate::escape::path(&dest),
        crate::escape::path(path),
        now_iso(),
        crate::escape::text(reason)
    );
    let mut note_path = dest.clone().into_os_string();
    note_path.push(".reason.txt");
    write_atomic(Path::new(&note_path), note.as_bytes())?;
    Ok(dest)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("leeward-publish-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    #[test]
    fn the_manifest_takes_what_the_maker_read_back_without_opening_the_file() {
        let d = dir("ncfacts");
        // A path with no file at all: only the record's facts can give these.
        let absent = d.join("gone.nc");
        let known = super::NcFacts {
            variables: vec!["relative_vorticity".into(), "latitude".into()],
            not_converged: Some(7),
        };
        assert_eq!(
            nc_facts(&absent, Some(&known)),
            (known.variables.clone(), Some(7))
        );
        // Without them the file is read, here in vain.
        assert_eq!(nc_facts(&absent, None), (Vec::new(), None));
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn temporaries_are_cleaned_and_nothing_else() {
        let d = dir("clean");
        let c = d.join("m").join("20260314T0000Z");
        std::fs::create_dir_all(&c).unwrap();
        for n in [
            ".a.nc.partial-12",
            ".a.nc.update-3",
            ".a.json.manifest-9",
            "a.nc",
            ".keep",
        ] {
            std::fs::write(c.join(n), b"x").unwrap();
        }
        assert_eq!(clean_temporaries(&d), 3);
        let left: Vec<String> = std::fs::read_dir(&c)
            .unwrap()
            .flatten()
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(left.len(), 2, "{left:?}");
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn retention_removes_old_cycles_only() {
        let d = dir("retention");
        for c in ["20260301T0000Z", "20260313T1200Z", "notacycle"] {
            std::fs::create_dir_all(d.join(c)).unwrap();
            std::fs::write(d.join(c).join("x.json"), b"{}").unwrap();
        }
        let now = NaiveDateTime::parse_from_str("20260314T0000Z", "%Y%m%dT%H%MZ").unwrap();
        let removed = apply_retention(&d, 2, now);
        assert_eq!(removed, vec![d.join("20260301T0000Z")]);
        assert!(d.join("20260313T1200Z").exists() && d.join("notacycle").exists());
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn quarantine_moves_and_notes_the_reason() {
        let d = dir("quarantine");
        let f = d.join("bad.grib2");
        std::fs::write(&f, b"junk").unwrap();
        let q = quarantine(&f, &d.join("q"), "m", "no GRIB2 message").unwrap();
        assert!(!f.exists() && q.exists());
        let note = std::fs::read_to_string(format!("{}.reason.txt", q.display())).unwrap();
        assert!(note.contains("no GRIB2 message"), "{note}");
        std::fs::write(&f, b"junk").unwrap();
        let q2 = quarantine(&f, &d.join("q"), "m", "again").unwrap();
        assert_ne!(
            q, q2,
            "a second file of the same name does not overwrite the first"
        );
        let _ = std::fs::remove_dir_all(&d);
    }
}
