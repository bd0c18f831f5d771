//! A step's publication as one act, whatever stops the process part of the
//! way through.
//!
//! A step may change several published files: its own product and images,
//! earlier or later steps' files to which it adds changes in time or its
//! PV budget (each of those has a manifest), and the cycle's cyclone tracks,
//! made from the published steps and this step's staged files. Everything is first written
//! into a staging directory on the output tree's file system (a local
//! step's `<out>/<feed>/.publish/<step>_<ms>/`, or a batch job's staging
//! directory): the files, then the manifests that will describe them. Then:
//!
//! 1. the ledger records `publishing`: every rename, in order, with each
//!    file's size and SHA-256, fsynced;
//! 2. the files are renamed into place: data files first, then the revised
//!    manifests of the other files, the step's own manifest last;
//! 3. each directory renamed into is fsynced, and the daemon records
//!    `published`, which closes the record.
//!
//! At start, [`finish`] completes every `publishing` record without its
//! `published`: a file still in the staging directory is renamed, a file
//! already moved is recognised at its place by its size and SHA-256. So a
//! kill at any instant leaves, after the restart, every manifest describing
//! its file, and no revision half made.
//!
//! In: staged files and the step's report. Out: renamed files, the ledger
//! records. Never: a rename before its record.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use tracing::{error, info, warn};

use super::ledger::{Journal, Move, Publishing, Record, StepTag};
use super::publish::{self, file_checksum, NcFacts, StepFacts};
use crate::pipeline::StepReport;

/// Directory of a feed's output tree that holds local steps' staging directories.
pub const STAGE_DIR: &str = ".publish";

/// Environment variable naming a point of the publication sequence at which
/// the process aborts, for the crash tests: `before-intent`, `after-intent`,
/// `after-move-N` (N from 1), `before-record`. Unset in normal running.
pub const CRASH_ENV: &str = "LEEWARD_TEST_CRASH_AT";

/// Abort the process here if the crash tests asked for it (see [`CRASH_ENV`]).
pub fn crash_point(name: &str) {
    static AT: std::sync::OnceLock<Option<String>> = std::sync::OnceLock::new();
    let at = AT.get_or_init(|| std::env::var(CRASH_ENV).ok().filter(|s| !s.is_empty()));
    if at.as_deref() == Some(name) {
        eprintln!("leeward: {CRASH_ENV}={name}: aborting here");
        std::process::abort();
    }
}

/// A file in a staging directory and its place in the output tree.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StagedFile {
    /// In the staging directory.
    pub staged: PathBuf,
    /// Its place in the output tree.
    pub target: PathBuf,
    /// Size, bytes.
    pub bytes: u64,
    /// SHA-256, hex.
    pub sha256: String,
    /// For a NetCDF file, what the process that made it read back from it
    /// (absent in records of earlier versions, and where it did not open):
    /// the service then need not open the file itself.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub netcdf: Option<NcFacts>,
}

impl StagedFile {
    /// A staged file, its size and SHA-256 read from it.
    pub fn read(staged: &Path, target: PathBuf) -> std::io::Result<StagedFile> {
        let (bytes, sha256) = file_checksum(staged)?;
        Ok(StagedFile {
            staged: staged.to_path_buf(),
            target,
            bytes,
            sha256,
            netcdf: None,
        })
    }

    /// [`StagedFile::read`], and for a NetCDF file (`.nc`) its [`NcFacts`],
    /// read back from it: for the process that made the file.
    pub fn read_made(staged: &Path, target: PathBuf) -> std::io::Result<StagedFile> {
        let mut f = StagedFile::read(staged, target)?;
        if staged.extension().is_some_and(|x| x == "nc") {
            f.netcdf = NcFacts::of(staged);
        }
        Ok(f)
    }

    fn as_move(&self) -> Move {
        Move {
            staged: self.staged.display().to_string(),
            target: self.target.display().to_string(),
            bytes: self.bytes,
            sha256: self.sha256.clone(),
        }
    }
}

/// A new staging directory for a local step: `<store>/.publish/<name>_<ms>`.
pub fn local_stage(store: &Path, tag: &StepTag) -> PathBuf {
    let ms = chrono::Utc::now().timestamp_millis();
    let grid: String = tag.grid.chars().take(8).collect();
    let mut name = format!("{}_{:03}h", tag.cycle, tag.lead);
    if let Some(m) = tag.member {
        name.push_str(&format!("_m{m:02}"));
    }
    store
        .join(STAGE_DIR)
        .join(format!("{name}_{grid}_{}_{ms}", std::process::id()))
}

/// Where a staged update of a published file goes back to: the staging
/// layout is `<stage>/updates/<cycle directory>/<name>` (see [`crate::changes::Run::staged`]).
pub fn update_target(stage: &Path, store: &Path, staged: &Path) -> Option<PathBuf> {
    let rel = staged.strip_prefix(stage.join("updates")).ok()?;
    let mut parts = rel.components();
    let cycle = parts.next()?.as_os_str();
    let name = parts.next()?.as_os_str();
    if parts.next().is_some() {
        return None;
    }
    Some(store.join(cycle).join(name))
}

/// A step's publication, staged and ready to be recorded and renamed.
#[derive(Debug, Clone, PartialEq)]
pub struct Intent {
    /// The step.
    pub step: StepTag,
    /// The renames and what they publish.
    pub publishing: Publishing,
}

impl Intent {
    /// The ledger record of this intent.
    pub fn record(&self) -> Record {
        let p = &self.publishing;
        Record::Publishing {
            step: self.step.clone(),
            stage: p.stage.clone(),
            product: p.product.clone(),
            manifest: p.manifest.clone(),
            partial: p.partial,
            moves: p.moves.clone(),
            at: p.at,
        }
    }
}

/// The files of a made step, staged: its product, its images, and copies of
/// published files with its additions.
pub struct Made<'a> {
    /// The step.
    pub step: &'a StepTag,
    /// The staging directory.
    pub stage: &'a Path,
    /// The step's product.
    pub product: StagedFile,
    /// Its quicklook images.
    pub images: Vec<StagedFile>,
    /// Copies of published files with this step's additions.
    pub updated: Vec<StagedFile>,
    /// The cycle's cyclone tracks with this step.
    pub tracks: Vec<StagedFile>,
}

/// Stage the manifests of a made step (its own, and the revised ones of the
/// files it updates) beside its files, and list every rename in order. The
/// caller holds the feed's publishing lock, so the manifests read for their
/// revisions stay as read until the renames.
pub fn stage_manifests(
    made: &Made<'_>,
    rep: &StepReport,
    facts: &StepFacts<'_>,
) -> Result<Intent, String> {
    let write = |path: &Path, m: &publish::Manifest| -> Result<StagedFile, String> {
        publish::write_manifest(path, m)
            .and_then(|()| StagedFile::read(path, PathBuf::new()))
            .map_err(|e| format!("cannot stage the manifest {}: {e}", path.display()))
    };
    // A later file may be updated twice by one step (a thickness change and
    // a budget): one staged copy, one rename, one revision.
    let mut updated: Vec<&StagedFile> = Vec::new();
    for u in &made.updated {
        if !updated.iter().any(|x| x.staged == u.staged) {
            updated.push(u);
        }
    }
    let mut moves: Vec<Move> = std::iter::once(&made.product)
        .chain(&made.images)
        .chain(&made.tracks)
        .chain(updated.iter().copied())
        .map(StagedFile::as_move)
        .collect();
    for u in updated {
        let known = (u.bytes, u.sha256.clone());
        if let Some(m) = publish::revised_manifest(&u.target, &u.staged, known, u.netcdf.as_ref()) {
            let mut f = write(&publish::manifest_path(&u.staged), &m)?;
            f.target = publish::manifest_path(&u.target);
            moves.push(f.as_move());
        }
    }
    let p = &made.product;
    let m = publish::new_manifest(
        &p.target,
        &p.staged,
        (p.bytes, p.sha256.clone()),
        p.netcdf.as_ref(),
        rep,
        facts,
    );
    let mut own = write(&publish::manifest_path(&p.staged), &m)?;
    own.target = publish::manifest_path(&p.target);
    moves.push(own.as_move());
    Ok(Intent {
        step: made.step.clone(),
        publishing: Publishing {
            stage: made.stage.display().to_string(),
            product: p.target.display().to_string(),
            manifest: own.target.display().to_string(),
            partial: facts.partial,
            moves,
            at: chrono::Utc::now().timestamp(),
        },
    })
}

/// Why a publication could not be finished.
#[derive(Debug, Clone, PartialEq)]
pub enum Unfinished {
    /// The file system refused a rename: try again.
    Retry(String),
    /// A file is neither in the staging directory nor, as recorded, at its
    /// place: the publication cannot be finished.
    Lost(String),
}

impl std::fmt::Display for Unfinished {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Unfinished::Retry(s) | Unfinished::Lost(s) => f.write_str(s),
        }
    }
}

/// Publish a staged step: record the intent, then [`finish`]; if the file system refuses a
/// rename once the intent is recorded, keep trying (the tree must not stay
/// half changed; the feed's other steps wait on its lock meanwhile; a stop
/// leaves it to the next start). `Err` when nothing was renamed (the intent
/// could not be recorded), or when the publication had to be abandoned.
pub fn publish(journal: &Journal, intent: &Intent) -> Result<(), String> {
    crash_point("before-intent");
    journal
        .write(&intent.record())
        .map_err(|e| format!("the publication was not recorded: {e}"))?;
    crash_point("after-intent");
    let mut wait = std::time::Duration::from_millis(500);
    loop {
        match finish(&intent.publishing) {
            Ok(()) => {
                publish::refresh_cycle_page(Path::new(&intent.publishing.product));
                return Ok(());
            }
            Err(Unfinished::Retry(e)) => {
                error!(feed = %intent.step.feed, cycle = %intent.step.cycle, step = intent.step.lead, error = %e, retry_in_s = wait.as_secs_f64(), "publication half made: a rename failed; trying again");
                std::thread::sleep(wait);
                wait = (wait * 2).min(std::time::Duration::from_secs(60));
            }
            Err(Unfinished::Lost(e)) => {
                let repaired = abandon(&intent.publishing);
                error!(feed = %intent.step.feed, cycle = %intent.step.cycle, step = intent.step.lead, reason = %e, repaired = ?repaired, "publication cannot be finished; manifests made to match their files");
                let _ = journal.write(&Record::Abandoned {
                    step: intent.step.clone(),
                    reason: e.clone(),
                    at: chrono::Utc::now().timestamp(),
                });
                return Err(format!("publication abandoned: {e}"));
            }
        }
    }
}

/// Make the renames of a recorded publication that are not made yet, then
/// fsync the directories renamed into. Safe to run again at any point.
pub fn finish(p: &Publishing) -> Result<(), Unfinished> {
    let mut dirs: Vec<PathBuf> = Vec::new();
    for (k, m) in p.moves.iter().enumerate() {
        let (staged, target) = (Path::new(&m.staged), Path::new(&m.target));
        let dir = target.parent().unwrap_or(Path::new(".")).to_path_buf();
        match std::fs::metadata(staged) {
            Ok(meta) if meta.len() == m.bytes => {
                std::fs::create_dir_all(&dir)
                    .and_then(|()| std::fs::rename(staged, target))
                    .map_err(|e| {
                        Unfinished::Retry(format!(
                            "cannot move {} to {}: {e}",
                            staged.display(),
                            target.display()
                        ))
                    })?;
            }
            Ok(meta) => {
                return Err(Unfinished::Lost(format!(
                    "{}: {} bytes, {} recorded",
                    staged.display(),
                    meta.len(),
                    m.bytes
                )))
            }
            Err(_) => match file_checksum(target) {
                Ok((n, sum)) if n == m.bytes && sum == m.sha256 => {}
                Ok(_) => {
                    return Err(Unfinished::Lost(format!(
                        "{} is no longer staged and {} is not the file recorded",
                        staged.display(),
                        target.display()
                    )))
                }
                Err(e) => {
                    return Err(Unfinished::Lost(format!(
                        "{} is no longer staged and {}: {e}",
                        staged.display(),
                        target.display()
                    )))
                }
            },
        }
        if !dirs.contains(&dir) {
            dirs.push(dir);
        }
        crash_point(&format!("after-move-{}", k + 1));
    }
    for d in dirs {
        std::fs::File::open(&d)
            .and_then(|f| f.sync_all())
            .map_err(|e| Unfinished::Retry(format!("cannot sync {}: {e}", d.display())))?;
    }
    Ok(())
}

/// A publication that cannot be finished: make every manifest of its files
/// describe the file as it is (so that none is left wrong), and say which.
pub fn abandon(p: &Publishing) -> Vec<PathBuf> {
    let mut repaired = Vec::new();
    for m in p
        .moves
        .iter()
        .filter(|m| m.target.ends_with(".nc"))
        .map(|m| PathBuf::from(&m.target))
    {
        match publish::repair_manifest(&m) {
            Ok(true) => repaired.push(m),
            Ok(false) => {}
            Err(e) => warn!(file = %m.display(), error = %e, "manifest not repaired"),
        }
    }
    repaired
}

/// Remove a staging directory, but only one inside a feed's `.publish`.
pub fn remove_stage(stage: &Path) {
    let inside = stage
        .parent()
        .and_then(|p| p.file_name())
        .is_some_and(|n| n == STAGE_DIR);
    if inside {
        if let Err(e) = std::fs::remove_dir_all(stage) {
            if e.kind() != std::io::ErrorKind::NotFound {
                warn!(dir = %stage.display(), error = %e, "staging directory not removed");
            }
        }
    }
}

/// Finish, at start, a publication that a stop cut short. `Ok(true)`:
/// finished; `Ok(false)`: it cannot be, its manifests were made to match
/// their files and it is to be abandoned; `Err`: the file system refused,
/// try again later.
pub fn recover(step: &StepTag, p: &Publishing) -> Result<bool, String> {
    match finish(p) {
        Ok(()) => {
            publish::refresh_cycle_page(Path::new(&p.product));
            info!(feed = %step.feed, cycle = %step.cycle, step = step.lead, files = p.moves.len(), "publication cut short by a stop finished");
            Ok(true)
        }
        Err(Unfinished::Retry(e)) => Err(e),
        Err(Unfinished::Lost(e)) => {
            let repaired = abandon(p);
            error!(feed = %step.feed, cycle = %step.cycle, step = step.lead, reason = %e, repaired = ?repaired, "publication cut short cannot be finished; manifests made to match their files; the step is made again");
            Ok(false)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("leeward-commit-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    fn staged(stage: &Path, out: &Path, name: &str, text: &str) -> Move {
        std::fs::write(stage.join(name), text).unwrap();
        let f = StagedFile::read(&stage.join(name), out.join(name)).unwrap();
        f.as_move()
    }

    #[test]
    fn finishing_again_at_any_point_gives_the_same_tree() {
        let d = dir("finish");
        let (stage, out) = (d.join("stage"), d.join("out"));
        std::fs::create_dir_all(&stage).unwrap();
        std::fs::create_dir_all(&out).unwrap();
        let moves = vec![
            staged(&stage, &out, "a.nc", "product"),
            staged(&stage, &out, "b.nc", "later product"),
            staged(&stage, &out, "a.json", "manifest"),
        ];
        let p = Publishing {
            stage: stage.display().to_string(),
            product: out.join("a.nc").display().to_string(),
            manifest: out.join("a.json").display().to_string(),
            partial: false,
            moves,
            at: 0,
        };
        // A stop after the first rename: the second run finishes the rest.
        std::fs::rename(stage.join("a.nc"), out.join("a.nc")).unwrap();
        finish(&p).unwrap();
        finish(&p).unwrap();
        for (n, t) in [
            ("a.nc", "product"),
            ("b.nc", "later product"),
            ("a.json", "manifest"),
        ] {
            assert_eq!(std::fs::read_to_string(out.join(n)).unwrap(), t);
        }
        // A file at its place that is not the one recorded cannot be taken for it.
        std::fs::write(out.join("b.nc"), "something else").unwrap();
        assert!(matches!(finish(&p), Err(Unfinished::Lost(_))));
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_made_netcdf_file_carries_its_variables_read_back() {
        let d = dir("ncfacts");
        let nc = d.join("a_006h.nc");
        {
            let mut f = netcdf::create(&nc).unwrap();
            f.add_dimension("x", 3).unwrap();
            f.add_variable::<f32>("relative_vorticity", &["x"]).unwrap();
            f.add_variable::<f64>("x", &["x"]).unwrap();
        }
        let s = StagedFile::read_made(&nc, d.join("out.nc")).unwrap();
        let mut vars = s.netcdf.as_ref().unwrap().variables.clone();
        vars.sort();
        assert_eq!(vars, ["relative_vorticity", "x"]);
        // No budget variables: no count of unconverged trajectories.
        assert_eq!(s.netcdf.as_ref().unwrap().not_converged, None);
        // The facts go through the result record and come back the same.
        let back: StagedFile = serde_json::from_str(&serde_json::to_string(&s).unwrap()).unwrap();
        assert_eq!(back, s);
        // A record of an earlier version (no facts) still reads, as None.
        let mut old = serde_json::to_value(&s).unwrap();
        old.as_object_mut().unwrap().remove("netcdf");
        let old: StagedFile = serde_json::from_value(old).unwrap();
        assert_eq!(old.netcdf, None);
        // A file that does not open as NetCDF has none (the service then opens
        // it itself and refuses it); nor has a file that is not NetCDF.
        let bad = d.join("b_006h.nc");
        std::fs::write(&bad, b"CDF\x01 cut short").unwrap();
        assert_eq!(
            StagedFile::read_made(&bad, d.join("b.nc")).unwrap().netcdf,
            None
        );
        let png = d.join("a_006h.png");
        std::fs::write(&png, b"picture").unwrap();
        assert_eq!(
            StagedFile::read_made(&png, d.join("a.png")).unwrap().netcdf,
            None
        );
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn staged_updates_map_back_to_their_cycle_directory() {
        let stage = Path::new("/out/alps/.publish/x");
        assert_eq!(
            update_target(
                stage,
                Path::new("/out/alps"),
                Path::new("/out/alps/.publish/x/updates/20260314T0000Z/a_030h.nc")
            )
            .as_deref(),
            Some(Path::new("/out/alps/20260314T0000Z/a_030h.nc"))
        );
        assert_eq!(
            update_target(stage, Path::new("/out/alps"), Path::new("/elsewhere/a.nc")),
            None
        );
    }
}
