//! Step work on a batch scheduler (Slurm).
//!
//! The service stays the only coordinator: it watches, assembles, decides and
//! publishes. For a feed with `executor = "slurm"` it writes a job's spec into
//! a staging directory inside the feed's output tree (`<out>/<feed>/.jobs/`,
//! hidden, on the same file system so that a rename publishes), submits a
//! job script with `sbatch`, and looks at the jobs with `squeue`. The job runs
//! `leeward process --job DIR` on a node: it makes the step's products into
//! the staging directory (its additions to files already published go to
//! staged copies there), then writes a result record as its last act. The
//! service checks every staged file against the record (size, SHA-256),
//! renames them into place, writes the manifest and the ledger record, and
//! removes the staging directory. A job that is requeued or runs twice can
//! only write into its staging directory; the service takes a result once.
//!
//! In: complete steps from the daemon. Out: published steps, or a job's end
//! with the scheduler's own state and reason and the job's log.

use std::collections::HashMap;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use chrono::NaiveDateTime;
use serde::{Deserialize, Serialize};
use tracing::{info, warn};

use super::assemble::Contribution;
use super::commit;
use super::ledger::{Journal, StepTag};
use super::publish::{self, StepFacts, Timings};
use super::settings::Slurm;
use crate::config::Config;
use crate::outcome::StepOutcome;
use crate::pipeline::{Issue, StepKey, StepReport};
use crate::products::{run_step, Destination};

/// The job's spec, written by the service.
pub const SPEC: &str = "spec.json";
/// The spec once the service has taken the job's result: a job that starts
/// again (requeued) finds no spec and does nothing.
pub const CLAIMED: &str = "spec.taken.json";
/// The job's result record, written by the job as its last act.
pub const RESULT: &str = "result.json";
/// The job script handed to `sbatch`.
pub const SCRIPT: &str = "job.sh";
/// The job's standard output and error.
pub const LOG: &str = "job.log";
/// Directory of a feed's output tree that holds the staging directories.
pub const JOBS_DIR: &str = ".jobs";

const TIME_FORMAT: &str = "%Y-%m-%dT%H:%M:%S";

/// An input of the step, as the service catalogued it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpecInput {
    /// The file (its name escaped in the record: any bytes, see [`crate::escape::serde_path`]).
    #[serde(with = "crate::escape::serde_path")]
    pub path: PathBuf,
    /// Its size then.
    pub size: u64,
    /// Its checksum then (FNV-1a 64, hex).
    pub checksum: String,
    /// Byte ranges (offset, length) of the step's messages.
    pub messages: Vec<(u64, u64)>,
    /// Checksum of those messages (FNV-1a 64, hex); the job reads them only
    /// if they are still these bytes.
    #[serde(default)]
    pub digest: String,
    /// Unix time it was found finished.
    pub seen_at: f64,
}

/// Everything a job needs to make one step, and the service to publish it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct JobSpec {
    /// Format of this record.
    pub spec_version: u32,
    /// The step.
    pub tag: StepTag,
    /// Which run of the step on the scheduler, from 1.
    pub attempt: u32,
    /// Originating centre.
    pub centre: u16,
    /// Cycle, `YYYY-MM-DDTHH:MM:SS`.
    pub reference_time: String,
    /// Valid time, `YYYY-MM-DDTHH:MM:SS`.
    pub valid_time: String,
    /// Ensemble member.
    pub member: Option<u8>,
    /// The grid's section-3 key, hex.
    pub grid_key: String,
    /// The step's inputs.
    pub inputs: Vec<SpecInput>,
    /// The feed's output tree (earlier steps are read from it).
    pub store: PathBuf,
    /// The cycle directory the product goes into.
    pub dir: PathBuf,
    /// Grid number in the file name, when the feed has several grids.
    pub suffix: Option<usize>,
    /// Made at the timeout with what was there.
    pub partial: bool,
    /// Unix time of the last input.
    pub last_input: f64,
    /// What the completeness rule expected and did not get.
    pub not_arrived: Vec<String>,
    /// Threads the job uses.
    pub threads: u32,
    /// The feed's configuration as the service uses it.
    pub config: Config,
}

fn hex(b: &[u8]) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

fn unhex(s: &str) -> Option<Vec<u8>> {
    if !s.len().is_multiple_of(2) {
        return None;
    }
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(s.get(i..i + 2)?, 16).ok())
        .collect()
}

impl JobSpec {
    /// The spec of a step.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        tag: &StepTag,
        attempt: u32,
        key: &StepKey,
        files: &[Contribution],
        store: &Path,
        dir: &Path,
        suffix: Option<usize>,
        partial: bool,
        last_input: f64,
        not_arrived: Vec<String>,
        threads: u32,
        config: Config,
    ) -> JobSpec {
        JobSpec {
            spec_version: 1,
            tag: tag.clone(),
            attempt,
            centre: key.centre,
            reference_time: key.reference_time.format(TIME_FORMAT).to_string(),
            valid_time: key.valid_time.format(TIME_FORMAT).to_string(),
            member: key.member,
            grid_key: hex(&key.grid_key),
            inputs: Self::inputs_of(files),
            store: store.to_path_buf(),
            dir: dir.to_path_buf(),
            suffix,
            partial,
            last_input,
            not_arrived,
            threads,
            config,
        }
    }

    fn inputs_of(files: &[Contribution]) -> Vec<SpecInput> {
        files
            .iter()
            .map(|c| SpecInput {
                path: c.path.clone(),
                size: c.size,
                checksum: c.checksum.clone(),
                messages: c.messages.clone(),
                digest: c.digest.clone(),
                seen_at: c.seen_at,
            })
            .collect()
    }

    /// The step's key.
    pub fn key(&self) -> Option<StepKey> {
        Some(StepKey {
            centre: self.centre,
            reference_time: NaiveDateTime::parse_from_str(&self.reference_time, TIME_FORMAT)
                .ok()?,
            valid_time: NaiveDateTime::parse_from_str(&self.valid_time, TIME_FORMAT).ok()?,
            member: self.member,
            grid_key: unhex(&self.grid_key)?,
        })
    }

    /// The step's inputs as the assembly knows them.
    pub fn contributions(&self) -> Vec<Contribution> {
        self.inputs
            .iter()
            .map(|i| Contribution {
                path: i.path.clone(),
                size: i.size,
                checksum: i.checksum.clone(),
                messages: i.messages.clone(),
                digest: i.digest.clone(),
                seen_at: i.seen_at,
            })
            .collect()
    }

    /// The product's final path.
    pub fn product_path(&self) -> Option<PathBuf> {
        Some(
            self.dir
                .join(crate::pipeline::output_name(&self.key()?, self.suffix)),
        )
    }

    /// What the manifest needs beyond the report.
    pub fn facts(&self) -> Option<StepFacts<'_>> {
        let key = self.key()?;
        Some(StepFacts::of(
            &self.tag.feed,
            &key,
            self.partial,
            &self.contributions(),
            self.last_input,
            self.not_arrived.clone(),
        ))
    }
}

/// The scheduler's name for a step's job: `lw_<feed>_<cycle>_<lead>h[_m<member>]`.
pub fn job_name(tag: &StepTag) -> String {
    let mut n = format!("lw_{}_{}_{:03}h", tag.feed, tag.cycle, tag.lead);
    if let Some(m) = tag.member {
        n.push_str(&format!("_m{m:02}"));
    }
    n
}

/// A new staging directory for a run of a step: `<out>/<feed>/.jobs/<name>_a<attempt>_<ms>`.
pub fn staging_dir(out_dir: &Path, tag: &StepTag, attempt: u32) -> PathBuf {
    let ms = chrono::Utc::now().timestamp_millis();
    let grid: String = tag.grid.chars().take(8).collect();
    out_dir
        .join(&tag.feed)
        .join(JOBS_DIR)
        .join(format!("{}_{grid}_a{attempt}_{ms}", job_name(tag)))
}

fn shell_quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', r"'\''"))
}

/// Write a job's spec into its staging directory (all a step process on
/// this machine needs; a batch job gets its script too, [`prepare`]).
pub fn write_spec(dir: &Path, spec: &JobSpec) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let text = serde_json::to_vec_pretty(spec).map_err(std::io::Error::other)?;
    publish::write_atomic(&dir.join(SPEC), &text)
}

/// Write a job's spec and script into its staging directory.
pub fn prepare(
    dir: &Path,
    spec: &JobSpec,
    program: &Path,
    setup: &[String],
) -> std::io::Result<()> {
    write_spec(dir, spec)?;
    let mut script = String::from("#!/bin/sh\n");
    script.push_str(&format!(
        "# leeward step job: feed {}, cycle {}, lead {} h, attempt {}.\n",
        spec.tag.feed, spec.tag.cycle, spec.tag.lead, spec.attempt
    ));
    script.push_str("# Written by leeward serve; the service publishes what it leaves here.\n");
    for line in setup {
        script.push_str(line);
        script.push('\n');
    }
    script.push_str(&format!(
        "exec {} process --job {}\n",
        shell_quote(&program.display().to_string()),
        shell_quote(&dir.display().to_string())
    ));
    publish::write_atomic(&dir.join(SCRIPT), script.as_bytes())?;
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(dir.join(SCRIPT), std::fs::Permissions::from_mode(0o755))
}

/// A file the job left in its staging directory, and where it goes.
pub use super::commit::StagedFile;

/// A step's products as a job staged them, for the service to check and publish.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Staged {
    /// The step's product file.
    pub product: StagedFile,
    /// Its quicklook images.
    pub images: Vec<StagedFile>,
    /// Copies of files already published with this step's additions.
    pub updated: Vec<StagedFile>,
}

/// How the job ended, as its result record says: made means staged.
pub type Ended = StepOutcome<Staged>;

/// The pipeline's report, as far as the manifest and the log need it.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct JobReport {
    /// Grid description.
    pub grid: String,
    /// What was missing.
    pub missing: Vec<String>,
    /// Variables written.
    pub products: Vec<String>,
    /// Variables left out because no point has a value ("name: why").
    #[serde(default)]
    pub left_out: Vec<String>,
    /// Input problems.
    pub issues: Vec<Issue>,
    /// Seconds of the step on the node (no latency: the service measures that).
    pub timings: Timings,
}

impl JobReport {
    fn of(rep: &StepReport) -> JobReport {
        JobReport {
            grid: rep.grid.clone(),
            missing: rep.missing.clone(),
            products: rep.products.clone(),
            left_out: rep.left_out.clone(),
            issues: rep.issues.clone(),
            timings: Timings {
                decode: rep.decode_seconds,
                diagnostics: rep.compute_seconds,
                write: rep.write_seconds,
                changes: rep.changes_seconds,
                total: rep.seconds,
                latency: 0.0,
            },
        }
    }

    /// Back into a report for the manifest, with the published paths.
    pub fn report(&self, output: &Path, images: Vec<PathBuf>, updated: Vec<PathBuf>) -> StepReport {
        StepReport {
            grid: self.grid.clone(),
            missing: self.missing.clone(),
            products: self.products.clone(),
            left_out: self.left_out.clone(),
            issues: self.issues.clone(),
            seconds: self.timings.total,
            decode_seconds: self.timings.decode,
            compute_seconds: self.timings.diagnostics,
            write_seconds: self.timings.write,
            changes_seconds: self.timings.changes,
            outcome: StepOutcome::Made(output.to_path_buf()),
            images,
            updated,
            ..StepReport::default()
        }
    }
}

/// The result record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct JobResult {
    /// Format of this record.
    pub result_version: u32,
    /// The step.
    pub tag: StepTag,
    /// The run of the step on the scheduler (from the spec).
    pub attempt: u32,
    /// `SLURM_JOB_ID`, when run by Slurm.
    pub job_id: Option<String>,
    /// `SLURM_RESTART_COUNT`: how often the scheduler requeued this job.
    pub restarts: u32,
    /// The node.
    pub host: String,
    /// When the job finished, UTC.
    pub finished_at: String,
    /// How it ended.
    #[serde(flatten)]
    pub ended: Ended,
    /// The pipeline's report.
    pub report: JobReport,
    /// The job process's peak resident memory, KiB (`VmHWM` of proc(5)).
    #[serde(default)]
    pub peak_rss_kib: Option<u64>,
}

/// This process's peak resident memory so far, KiB (`VmHWM` of /proc/self/status).
pub fn peak_rss_kib() -> Option<u64> {
    std::fs::read_to_string("/proc/self/status")
        .ok()?
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))?
        .trim()
        .strip_suffix("kB")?
        .trim()
        .parse()
        .ok()
}

fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .map(|s| s.trim().to_string())
        .unwrap_or_default()
}

/// The job's side: `leeward process --job DIR`. Returns the exit code: 0 when
/// a result record was written (whatever it says) or there was nothing to do.
pub fn run_in_job(dir: &Path) -> u8 {
    let spec_path = dir.join(SPEC);
    let text = match std::fs::read(&spec_path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            if dir.join(CLAIMED).exists() {
                eprintln!(
                    "leeward: {}: the service has already taken this step's result; nothing to do",
                    dir.display()
                );
                return 0;
            }
            eprintln!("leeward: {}: no job spec here", spec_path.display());
            return 2;
        }
        Err(e) => {
            eprintln!("leeward: {}: cannot read: {e}", spec_path.display());
            return 2;
        }
    };
    let spec: JobSpec = match serde_json::from_slice(&text) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("leeward: {}: not a job spec: {e}", spec_path.display());
            return 2;
        }
    };
    // A requeued job starts from a clean directory: what an earlier run left
    // (a partial temporary, an old result) goes.
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if [SPEC, SCRIPT, LOG].contains(&name.as_str()) {
                continue;
            }
            let p = e.path();
            let _ = if p.is_dir() {
                std::fs::remove_dir_all(&p)
            } else {
                std::fs::remove_file(&p)
            };
        }
    }
    let threads = std::env::var("SLURM_CPUS_PER_TASK")
        .ok()
        .and_then(|s| s.parse::<usize>().ok())
        .unwrap_or(spec.threads as usize)
        .max(1);
    let _ = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build_global();
    let job_id = std::env::var("SLURM_JOB_ID").ok();
    let restarts = std::env::var("SLURM_RESTART_COUNT")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    // Every line the step logs says which step it is.
    let _step = tracing::info_span!("step", feed = %spec.tag.feed, cycle = %spec.tag.cycle, lead = spec.tag.lead).entered();
    info!(job = ?job_id, restarts, threads, dir = %dir.display(), "step job started");
    let made = super::pool::guarded(|| make(&spec, dir))
        .unwrap_or_else(|reason| (Ended::Internal { reason }, JobReport::default()));
    let result = JobResult {
        result_version: 1,
        tag: spec.tag.clone(),
        attempt: spec.attempt,
        job_id,
        restarts,
        host: host_name(),
        finished_at: chrono::Utc::now()
            .format("%Y-%m-%dT%H:%M:%S%.3fZ")
            .to_string(),
        ended: made.0,
        report: made.1,
        peak_rss_kib: peak_rss_kib(),
    };
    let text = match serde_json::to_vec_pretty(&result) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("leeward: cannot encode the result record: {e}");
            return 1;
        }
    };
    if let Err(e) = publish::write_atomic(&dir.join(RESULT), &text) {
        eprintln!(
            "leeward: cannot write the result record {}: {e}",
            dir.join(RESULT).display()
        );
        return 1;
    }
    info!(outcome = result.ended.word(), seconds = result.report.timings.total, peak_rss_kib = ?result.peak_rss_kib, "step job finished");
    0
}

fn make(spec: &JobSpec, stage: &Path) -> (Ended, JobReport) {
    let Some(key) = spec.key() else {
        return (
            Ended::Internal {
                reason: "the job spec's times or grid key do not parse".into(),
            },
            JobReport::default(),
        );
    };
    let (step, inputs) = match super::intake::load_step(&spec.contributions(), &key) {
        Ok(Some(x)) => x,
        Ok(None) => {
            return (
                Ended::InputFailed {
                    reason: "the step's fields are no longer in its files".into(),
                },
                JobReport::default(),
            )
        }
        Err((file, reason)) => return (Ended::Vanished { file, reason }, JobReport::default()),
    };
    let dest = Destination {
        store: &spec.store,
        dir: &spec.dir,
        stage: Some(stage),
    };
    let rep = run_step(&step, &inputs, &spec.config, &dest, spec.suffix);
    let report = JobReport::of(&rep);
    let own = match &rep.outcome {
        StepOutcome::Made(own) => own.clone(),
        other => return (other.failure().unwrap_or_default(), report),
    };
    let staged = || -> std::io::Result<Ended> {
        let name = own.file_name().unwrap_or_default();
        let product = StagedFile::read_made(&own, spec.dir.join(name))?;
        let mut images = Vec::new();
        for i in &rep.images {
            images.push(StagedFile::read(
                i,
                spec.dir.join(i.file_name().unwrap_or_default()),
            )?);
        }
        let mut updated = Vec::new();
        for u in rep.updated.iter().filter(|u| **u != own) {
            let Some(target) = super::commit::update_target(stage, &spec.store, u) else {
                return Err(std::io::Error::other(format!(
                    "{}: an update outside the staging layout",
                    u.display()
                )));
            };
            updated.push(StagedFile::read_made(u, target)?);
        }
        Ok(Ended::Made(Staged {
            product,
            images,
            updated,
        }))
    };
    match staged() {
        Ok(e) => (e, report),
        Err(e) => (
            Ended::OutputFailed {
                reason: format!("staged files cannot be read back: {e}"),
            },
            report,
        ),
    }
}

/// A step the service published from a job's result.
#[derive(Debug)]
pub struct Published {
    /// Product.
    pub path: PathBuf,
    /// Manifest.
    pub manifest: PathBuf,
    /// Seconds from the last input to now.
    pub latency: f64,
    /// The report.
    pub report: Box<StepReport>,
}

/// A job's result as the service took it: how the step ended (made means
/// published now) and the job's own account.
pub struct Taken {
    /// How the step ended.
    pub outcome: StepOutcome<Published>,
    /// The job's result record.
    pub result: Box<JobResult>,
}

/// Take a job's result: check each staged file against the record, stage
/// the manifests beside them and publish the whole as one act
/// ([`super::commit`]): recorded in the ledger, renamed into place, finished
/// at the next start if a stop cuts it short. An error says why the result
/// is unusable (unreadable, a staged file missing or changed): the step runs
/// again.
pub fn take(
    spec: &JobSpec,
    stage: &Path,
    lock: &Mutex<()>,
    journal: &Journal,
) -> Result<Taken, String> {
    let result: JobResult = match std::fs::read(stage.join(RESULT))
        .map_err(|e| e.to_string())
        .and_then(|b| serde_json::from_slice(&b).map_err(|e| e.to_string()))
    {
        Ok(r) => r,
        Err(e) => {
            return Err(format!(
                "{}: unreadable result record: {e}",
                stage.join(RESULT).display()
            ))
        }
    };
    if result.tag != spec.tag {
        return Err(format!(
            "{}: the result is for {}, not {}",
            stage.join(RESULT).display(),
            result.tag,
            spec.tag
        ));
    }
    let Ended::Made(Staged {
        product,
        images,
        updated,
    }) = &result.ended
    else {
        return Ok(Taken {
            outcome: result.ended.failure().unwrap_or_default(),
            result: Box::new(result),
        });
    };
    // From here on a job that starts again finds no spec and does nothing.
    if stage.join(SPEC).exists() {
        if let Err(e) = std::fs::rename(stage.join(SPEC), stage.join(CLAIMED)) {
            return Err(format!("{}: cannot take the spec: {e}", stage.display()));
        }
    }
    let expected = spec.product_path();
    if expected.as_deref() != Some(product.target.as_path()) {
        return Err(format!(
            "the job's product {} is not the step's file {}",
            product.target.display(),
            expected
                .map(|p| p.display().to_string())
                .unwrap_or_default()
        ));
    }
    let _publishing = lock
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    for f in std::iter::once(product).chain(images).chain(updated) {
        check_staged(f, stage, &spec.store)?;
    }
    let image_paths: Vec<PathBuf> = images.iter().map(|f| f.target.clone()).collect();
    let updated_paths: Vec<PathBuf> = updated.iter().map(|f| f.target.clone()).collect();
    let report = result
        .report
        .report(&product.target, image_paths, updated_paths);
    let Some(facts) = spec.facts() else {
        return Err("the job spec's times do not parse".into());
    };
    let mut made = commit::Made {
        step: &spec.tag,
        stage,
        product: product.clone(),
        images: images.clone(),
        updated: updated.clone(),
        tracks: Vec::new(),
    };
    // The job could not see the other steps published: the cycle's cyclone
    // tracks are made now, under the lock, by a process of their own, and
    // published with the step.
    stage_tracks(spec, &mut made);
    let intent = commit::stage_manifests(&made, &report, &facts)?;
    commit::publish(journal, &intent)?;
    let latency =
        (chrono::Utc::now().timestamp_millis() as f64 / 1000.0 - spec.last_input).max(0.0);
    Ok(Taken {
        outcome: StepOutcome::Made(Published {
            path: product.target.clone(),
            manifest: PathBuf::from(&intent.publishing.manifest),
            latency,
            report: Box::new(report),
        }),
        result: Box::new(result),
    })
}

/// The file a tracks process leaves in the staging directory: the tracks'
/// staged files ([`StagedFile`], JSON).
pub const TRACKS_LIST: &str = "tracks.json";

/// The cycle's cyclone tracks as they will be once `made` is published, made
/// by a short-lived process of their own ([`super::child::tracks`],
/// `leeward process --tracks`) from the published steps and this
/// publication's staged files, and added to it: the tracks are renamed into
/// place with the step, in the recorded publication, so a stop at any point
/// of it leaves them as a run without the stop would. Called under the feed's
/// publishing lock (the steps read stay as read). The NetCDF and HDF5
/// libraries' memory for the files read and written goes with that process,
/// so the service's own memory does not grow with the steps it publishes.
/// Tracks that cannot be made are said so and left out; the step is
/// published all the same.
pub fn stage_tracks(spec: &JobSpec, made: &mut commit::Made<'_>) {
    if !spec.config.products.cyclones {
        return;
    }
    let stage = made.stage;
    let memo = stage.join(crate::cyclones::memo::FILE);
    let cycle_dir = made.product.target.parent().map(Path::to_path_buf);
    if let Some(text) = cycle_dir.as_deref().and_then(memo_of) {
        if let Err(e) = std::fs::write(&memo, text) {
            warn!(file = %memo.display(), error = %e, "memo of the cycle's centres not passed on");
        }
    }
    let listed = super::child::tracks(stage).and_then(|()| {
        let b = std::fs::read(stage.join(TRACKS_LIST)).map_err(|e| e.to_string())?;
        serde_json::from_slice::<Vec<StagedFile>>(&b).map_err(|e| e.to_string())
    });
    let files = match listed {
        Ok(f) => f,
        Err(e) => {
            warn!(feed = %spec.tag.feed, cycle = %spec.tag.cycle, step = spec.tag.lead, stage = %stage.display(), reason = %e, "cyclone tracks not made");
            return;
        }
    };
    if let (Some(d), Ok(text)) = (cycle_dir, std::fs::read_to_string(&memo)) {
        remember_memo(&d, text);
    }
    for f in files {
        match check_staged(&f, stage, &spec.store) {
            Ok(()) => made.tracks.push(f),
            Err(e) => {
                warn!(feed = %spec.tag.feed, cycle = %spec.tag.cycle, step = spec.tag.lead, reason = %e, "cyclone tracks file not staged")
            }
        }
    }
}

/// Cycle directories whose memo of centres the service keeps: the cycles
/// in hand; a few more cover feeds and members running at once.
const MEMOS_KEPT: usize = 8;

type Memos = crate::recent::ByCycle<PathBuf, String>;

fn memos() -> &'static Mutex<Memos> {
    static MEMOS: std::sync::OnceLock<Mutex<Memos>> = std::sync::OnceLock::new();
    MEMOS.get_or_init(|| Mutex::new(Memos::new(MEMOS_KEPT)))
}

/// The memo of centres ([`crate::cyclones::memo`]) last made for the steps
/// of `cycle_dir`.
fn memo_of(cycle_dir: &Path) -> Option<String> {
    memos()
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .get(cycle_dir)
        .cloned()
}

fn remember_memo(cycle_dir: &Path, text: String) {
    memos()
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .insert(cycle_dir, cycle_dir.to_path_buf(), text);
}

/// The tracks process (`leeward process --tracks DIR`): in the staging
/// directory `dir` of a step whose result the service is taking (its taken
/// spec and its result record), make the cycle's tracks as they will be once
/// the step is published, and list them in [`TRACKS_LIST`]. Exit 0 with the
/// list written (empty when the cycle has no tracks yet), 1 otherwise, with
/// the reason on standard error.
pub fn tracks_in_job(dir: &Path) -> u8 {
    match make_tracks(dir) {
        Ok(files) => match serde_json::to_vec(&files)
            .map_err(|e| e.to_string())
            .and_then(|t| {
                publish::write_atomic(&dir.join(TRACKS_LIST), &t).map_err(|e| e.to_string())
            }) {
            Ok(()) => 0,
            Err(e) => {
                eprintln!(
                    "leeward: {}: cannot write: {e}",
                    dir.join(TRACKS_LIST).display()
                );
                1
            }
        },
        Err(e) => {
            eprintln!("leeward: {}: no cyclone tracks made: {e}", dir.display());
            1
        }
    }
}

fn make_tracks(dir: &Path) -> Result<Vec<StagedFile>, String> {
    let read = |name: &str| {
        std::fs::read(dir.join(name)).map_err(|e| format!("{}: {e}", dir.join(name).display()))
    };
    let spec: JobSpec = serde_json::from_slice(&read(CLAIMED)?)
        .map_err(|e| format!("{}: not a job spec: {e}", dir.join(CLAIMED).display()))?;
    let result: JobResult = serde_json::from_slice(&read(RESULT)?)
        .map_err(|e| format!("{}: not a result record: {e}", dir.join(RESULT).display()))?;
    let Ended::Made(Staged {
        product, updated, ..
    }) = &result.ended
    else {
        return Err("the step made no product".into());
    };
    let key = spec.key().ok_or("the job spec's step does not parse")?;
    let written = tracks_of(&spec.config, &spec.store, &key, product, updated, dir);
    written
        .into_iter()
        .map(|(staged, target)| {
            StagedFile::read_made(&staged, target).map_err(|e| format!("{}: {e}", staged.display()))
        })
        .collect()
}

/// The cycle's tracks with `product` (and the published files `updated`
/// replaces) staged in `stage`: (staged file, its place) of each file written.
fn tracks_of(
    cfg: &Config,
    store: &Path,
    key: &StepKey,
    product: &StagedFile,
    updated: &[StagedFile],
    stage: &Path,
) -> Vec<(PathBuf, PathBuf)> {
    let gid = crate::pipeline::grid_id(&key.grid_key);
    let run = crate::changes::Run {
        out_dir: store,
        centre: key.centre,
        grid_id: &gid,
        member: key.member,
        reference_time: key.reference_time,
        valid_time: key.valid_time,
        stage: None,
    };
    // The grid, for the coastlines of the tracks' quicklook.
    let grid = crate::ingest::grid::parse_grid(&key.grid_key)
        .ok()
        .map(|(g, _)| g);
    let revised: Vec<(&Path, &Path)> = updated
        .iter()
        .map(|u| (u.staged.as_path(), u.target.as_path()))
        .collect();
    crate::cyclones::cycle::staged(
        &run,
        (&product.staged, &product.target),
        &revised,
        stage,
        &cfg.cyclones,
        &cfg.quicklook,
        grid.as_ref(),
    )
}

/// A staged file is checked by its size and, for a NetCDF file, by its
/// having opened in the job that made it (or, with no such word in the
/// record, by opening it here): the job wrote it under a temporary name,
/// fsynced it, renamed it and only then hashed it, opened it again and wrote
/// the record, so a file of the recorded size at the staged name is the one
/// hashed and read back. Reading every product again here
/// would cost the service a second pass over each file (about 1 s for the
/// 0.25-degree step).
fn check_staged(f: &StagedFile, stage: &Path, store: &Path) -> Result<(), String> {
    if !f.staged.starts_with(stage) || !f.target.starts_with(store) {
        return Err(format!(
            "{} -> {}: outside the staging directory or the feed's output tree",
            f.staged.display(),
            f.target.display()
        ));
    }
    let m = std::fs::metadata(&f.staged).map_err(|e| format!("{}: {e}", f.staged.display()))?;
    if m.len() != f.bytes {
        return Err(format!(
            "{}: {} bytes, the result record says {}",
            f.staged.display(),
            m.len(),
            f.bytes
        ));
    }
    // The process that made a NetCDF file read it back (its `netcdf` facts);
    // one whose record has none (it did not open there, or an earlier
    // version made it) is opened here.
    let is_nc = f.staged.extension().is_some_and(|x| x == "nc");
    if is_nc && f.netcdf.is_none() && {
        crate::output::quiet_hdf5_errors();
        netcdf::open(&f.staged).is_err()
    } {
        return Err(format!("{}: does not open as NetCDF", f.staged.display()));
    }
    Ok(())
}

/// Keep a job's log in the state directory (`<state>/job-logs/`) before its
/// staging directory goes; returns where it is.
pub fn keep_log(stage: &Path, state_dir: &Path, tag: &StepTag, job: &str) -> Option<PathBuf> {
    let from = stage.join(LOG);
    if !from.exists() {
        return None;
    }
    let dir = super::state_dir::StateDir(state_dir).job_logs();
    std::fs::create_dir_all(&dir).ok()?;
    let to = dir.join(format!("{}.{job}.log", job_name(tag)));
    std::fs::copy(&from, &to).ok()?;
    Some(to)
}

/// Remove a staging directory, but only one inside a feed's `.jobs`.
pub fn remove_stage(stage: &Path) {
    let inside = stage
        .parent()
        .and_then(|p| p.file_name())
        .is_some_and(|n| n == JOBS_DIR);
    if inside {
        if let Err(e) = std::fs::remove_dir_all(stage) {
            if e.kind() != std::io::ErrorKind::NotFound {
                warn!(dir = %stage.display(), error = %e, "staging directory not removed");
            }
        }
    }
}

/// A scheduler command that did not do its work.
#[derive(Debug, Clone, PartialEq)]
pub enum SchedulerError {
    /// The command is missing, timed out, or cannot reach the controller.
    Unreachable(String),
    /// The controller answered and refused (bad partition, account, limits).
    Refused(String),
}

impl std::fmt::Display for SchedulerError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            SchedulerError::Unreachable(s) => write!(f, "scheduler unreachable: {s}"),
            SchedulerError::Refused(s) => write!(f, "scheduler refused: {s}"),
        }
    }
}

/// What the scheduler says of a job that is no longer queued.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct JobFacts {
    /// `JobState` (`COMPLETED`, `FAILED`, `CANCELLED`, `TIMEOUT`, `NODE_FAIL`, ...).
    pub state: String,
    /// `Reason`.
    pub reason: String,
    /// `ExitCode` (`code:signal`).
    pub exit_code: String,
}

pub use super::job_state::{has_ended, outcome, ENDED_STATES};

/// The Slurm commands, as `[service.slurm]` configures them.
#[derive(Debug, Clone)]
pub struct Scheduler {
    /// The settings.
    pub cfg: Slurm,
}

fn run_command(cmd: &str, args: &[String], timeout: Duration) -> Result<String, SchedulerError> {
    let mut child = Command::new(cmd)
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .map_err(|e| SchedulerError::Unreachable(format!("cannot run {cmd}: {e}")))?;
    let t0 = Instant::now();
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break s,
            Ok(None) if t0.elapsed() < timeout => std::thread::sleep(Duration::from_millis(10)),
            Ok(None) => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(SchedulerError::Unreachable(format!(
                    "{cmd} did not answer within {} s",
                    timeout.as_secs_f64()
                )));
            }
            Err(e) => return Err(SchedulerError::Unreachable(format!("{cmd}: {e}"))),
        }
    };
    let mut out = String::new();
    let mut err = String::new();
    if let Some(mut o) = child.stdout.take() {
        let _ = o.read_to_string(&mut out);
    }
    if let Some(mut e) = child.stderr.take() {
        let _ = e.read_to_string(&mut err);
    }
    if status.success() {
        return Ok(out);
    }
    let msg = format!("{cmd} exited with {status}: {}", err.trim());
    let lower = err.to_ascii_lowercase();
    let unreachable = [
        "unable to contact slurm controller",
        "socket timed out",
        "connection refused",
        "communication connection failure",
        "slurm_load_jobs error",
        "munge",
        "zero bytes were transmitted",
    ]
    .iter()
    .any(|k| lower.contains(k));
    Err(if unreachable {
        SchedulerError::Unreachable(msg)
    } else {
        SchedulerError::Refused(msg)
    })
}

impl Scheduler {
    fn timeout(&self) -> Duration {
        Duration::from_secs_f64(self.cfg.command_timeout_s)
    }

    /// The `sbatch` arguments of a step's job.
    pub fn sbatch_args(&self, tag: &StepTag, stage: &Path) -> Vec<String> {
        let c = &self.cfg;
        let mut a = vec![
            "--parsable".to_string(),
            format!("--job-name={}", job_name(tag)),
            format!("--output={}", stage.join(LOG).display()),
            "--open-mode=append".into(),
            format!("--chdir={}", stage.display()),
            "--requeue".into(),
            "--nodes=1".into(),
            "--ntasks=1".into(),
            format!("--cpus-per-task={}", c.cpus_per_step),
            format!("--mem={}", c.memory),
            format!("--time={}", c.time_limit),
        ];
        if !c.partition.is_empty() {
            a.push(format!("--partition={}", c.partition));
        }
        if !c.account.is_empty() {
            a.push(format!("--account={}", c.account));
        }
        a.extend(c.sbatch_args.iter().cloned());
        a.push(stage.join(SCRIPT).display().to_string());
        a
    }

    /// Submit a prepared staging directory; the job id.
    pub fn submit(&self, tag: &StepTag, stage: &Path) -> Result<String, SchedulerError> {
        let out = run_command("sbatch", &self.sbatch_args(tag, stage), self.timeout())?;
        let id = out
            .trim()
            .split(';')
            .next()
            .unwrap_or("")
            .trim()
            .to_string();
        if id.is_empty() || !id.chars().all(|c| c.is_ascii_digit() || c == '_') {
            return Err(SchedulerError::Refused(format!(
                "sbatch gave no job id (it printed {:?})",
                out.trim()
            )));
        }
        Ok(id)
    }

    /// The service user's jobs the scheduler still holds: id -> (state, reason).
    pub fn queued(&self) -> Result<HashMap<String, (String, String)>, SchedulerError> {
        let args: Vec<String> = ["--me", "--noheader", "--states=all", "--format=%i|%T|%r"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let out = run_command("squeue", &args, self.timeout())?;
        Ok(out
            .lines()
            .filter_map(|l| {
                let mut p = l.trim().splitn(3, '|');
                Some((
                    p.next()?.to_string(),
                    (p.next()?.to_string(), p.next().unwrap_or("").to_string()),
                ))
            })
            .collect())
    }

    /// What the scheduler says of a job that has ended (`scontrol show job`,
    /// then `sacct`): its state, reason and exit code; `None` if neither knows it.
    pub fn facts(&self, job: &str) -> Option<JobFacts> {
        let args = vec![
            "show".to_string(),
            "job".into(),
            "--oneliner".into(),
            job.into(),
        ];
        if let Ok(out) = run_command("scontrol", &args, self.timeout()) {
            let get = |k: &str| {
                out.split_whitespace()
                    .find_map(|w| w.strip_prefix(&format!("{k}=")).map(str::to_string))
                    .unwrap_or_default()
            };
            let state = get("JobState");
            if !state.is_empty() {
                return Some(JobFacts {
                    state,
                    reason: get("Reason"),
                    exit_code: get("ExitCode"),
                });
            }
        }
        let args: Vec<String> = ["-n", "-P", "-X", "-o", "State,ExitCode", "-j", job]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let out = run_command("sacct", &args, self.timeout()).ok()?;
        let line = out.lines().rev().find(|l| !l.trim().is_empty())?;
        let mut p = line.split('|');
        Some(JobFacts {
            state: p.next()?.split_whitespace().next()?.to_string(),
            reason: String::new(),
            exit_code: p.next().unwrap_or("").to_string(),
        })
    }

    /// Cancel a job (best effort).
    pub fn cancel(&self, job: &str) {
        let _ = run_command("scancel", &[job.to_string()], self.timeout());
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tag() -> StepTag {
        StepTag {
            feed: "alps".into(),
            cycle: "20260314T0000Z".into(),
            lead: 24,
            member: Some(3),
            grid: "0123456789abcdef".into(),
        }
    }

    #[test]
    fn names_carry_feed_cycle_step_and_member() {
        assert_eq!(job_name(&tag()), "lw_alps_20260314T0000Z_024h_m03");
        let d = staging_dir(Path::new("/out"), &tag(), 2);
        let n = d.file_name().unwrap().to_string_lossy().into_owned();
        assert!(
            n.starts_with("lw_alps_20260314T0000Z_024h_m03_01234567_a2_"),
            "{n}"
        );
        assert_eq!(d.parent().unwrap(), Path::new("/out/alps/.jobs"));
    }

    #[test]
    fn staged_updates_map_back_to_their_cycle_directory() {
        let stage = Path::new("/out/alps/.jobs/x");
        let run = crate::changes::Run {
            out_dir: Path::new("/out/alps"),
            centre: 98,
            grid_id: "g",
            member: None,
            reference_time: NaiveDateTime::default(),
            valid_time: NaiveDateTime::default(),
            stage: Some(stage),
        };
        let published = Path::new("/out/alps/20260314T0000Z/a_030h.nc");
        let staged = run.staged(published);
        assert_eq!(
            staged,
            Path::new("/out/alps/.jobs/x/updates/20260314T0000Z/a_030h.nc")
        );
        assert_eq!(
            commit::update_target(stage, Path::new("/out/alps"), &staged).as_deref(),
            Some(published)
        );
        // The step's own file, in the staging directory, is written in place.
        let own = stage.join("a_024h.nc");
        assert_eq!(run.staged(&own), own);
    }

    #[test]
    fn the_job_script_quotes_paths_and_runs_the_setup_first() {
        let dir = std::env::temp_dir().join(format!("leeward-batch-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let spec = JobSpec::new(
            &tag(),
            1,
            &StepKey {
                centre: 98,
                reference_time: NaiveDateTime::default(),
                valid_time: NaiveDateTime::default(),
                member: Some(3),
                grid_key: vec![1, 2, 255],
            },
            &[],
            Path::new("/out/alps"),
            Path::new("/out/alps/19700101T0000Z"),
            None,
            false,
            0.0,
            Vec::new(),
            2,
            Config::default(),
        );
        prepare(
            &dir,
            &spec,
            Path::new("/opt/it's/leeward"),
            &["module load netcdf".into()],
        )
        .unwrap();
        let script = std::fs::read_to_string(dir.join(SCRIPT)).unwrap();
        let lines: Vec<&str> = script.lines().collect();
        assert_eq!(lines[0], "#!/bin/sh");
        assert_eq!(lines[3], "module load netcdf");
        assert_eq!(
            lines[4],
            format!(
                "exec '/opt/it'\\''s/leeward' process --job '{}'",
                dir.display()
            )
        );
        let back: JobSpec =
            serde_json::from_slice(&std::fs::read(dir.join(SPEC)).unwrap()).unwrap();
        assert_eq!(back, spec);
        assert_eq!(back.key().unwrap().grid_key, vec![1, 2, 255]);
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn an_input_whose_name_is_not_utf8_goes_through_the_records_byte_for_byte() {
        use std::os::unix::ffi::OsStrExt;
        // A file name is any bytes but NUL and '/' (POSIX.1-2017, 3.170);
        // JSON strings are UTF-8 (RFC 8259, 8.1).
        let path = PathBuf::from(std::ffi::OsStr::from_bytes(b"/in/step\\\xff\n.grib2"));
        let input = SpecInput {
            path: path.clone(),
            size: 1,
            checksum: String::new(),
            messages: vec![(0, 1)],
            digest: String::new(),
            seen_at: 0.0,
        };
        let text = serde_json::to_string(&input).unwrap();
        assert!(text.contains(r#""/in/step\\\\\\xff\\n.grib2""#), "{text}");
        let back: SpecInput = serde_json::from_str(&text).unwrap();
        assert_eq!(
            back.path.as_os_str().as_bytes(),
            path.as_os_str().as_bytes()
        );
        let gone = Ended::Vanished {
            file: path.clone(),
            reason: "gone".into(),
        };
        let back: Ended = serde_json::from_str(&serde_json::to_string(&gone).unwrap()).unwrap();
        assert_eq!(back, gone);
    }

    #[test]
    fn sbatch_gets_the_configured_resources() {
        let s = Scheduler {
            cfg: Slurm {
                partition: "post".into(),
                account: "nwp".into(),
                sbatch_args: vec!["--qos=high".into()],
                ..Slurm::default()
            },
        };
        let a = s.sbatch_args(&tag(), Path::new("/st"));
        for want in [
            "--parsable",
            "--job-name=lw_alps_20260314T0000Z_024h_m03",
            "--output=/st/job.log",
            "--cpus-per-task=2",
            "--mem=4G",
            "--time=00:30:00",
            "--partition=post",
            "--account=nwp",
            "--qos=high",
        ] {
            assert!(a.iter().any(|x| x == want), "{want} not in {a:?}");
        }
        assert_eq!(a.last().unwrap(), "/st/job.sh");
    }

    #[test]
    fn a_missing_command_is_unreachable_and_a_refusal_is_not() {
        let t = Duration::from_secs(5);
        let e = run_command("leeward-no-such-command", &[], t).unwrap_err();
        assert!(matches!(e, SchedulerError::Unreachable(_)), "{e:?}");
        let args = vec![
            "-c".to_string(),
            "echo 'sbatch: error: Invalid partition name specified' >&2; exit 1".into(),
        ];
        let e = run_command("sh", &args, t).unwrap_err();
        assert!(matches!(e, SchedulerError::Refused(_)), "{e:?}");
        let args = vec!["-c".to_string(), "echo 'sbatch: error: Batch job submission failed: Unable to contact slurm controller (connect failure)' >&2; exit 1".into()];
        let e = run_command("sh", &args, t).unwrap_err();
        assert!(matches!(e, SchedulerError::Unreachable(_)), "{e:?}");
        let args = vec!["-c".to_string(), "sleep 5".into()];
        let e = run_command("sh", &args, Duration::from_millis(200)).unwrap_err();
        assert!(matches!(e, SchedulerError::Unreachable(_)), "{e:?}");
    }
}
