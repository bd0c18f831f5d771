//! The service's part of the configuration file: where it watches, writes
//! and keeps its state, and the model feeds it serves.
//!
//! In: the `[service]` table and the `[[feed]]` tables of the TOML file.
//! Out: validated settings; every problem named by its key. A feed says
//! which files are its own (a file-name pattern with named parts, or every
//! file of its directory, whose GRIB2 contents then say cycle and step), and
//! when a step is complete (the fields the products need, a file count, or
//! a marker file).

use std::path::PathBuf;

use chrono::NaiveDateTime;
use regex::Regex;
use serde::{Deserialize, Serialize};

use crate::config::settings::Products;
use crate::ingest::params::{param_from_words, Param, Quantity};

/// The `[service]` table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Service {
    /// Base of the feeds' incoming directories (a feed's relative `incoming` is under it).
    pub watch_dir: PathBuf,
    /// Root of the output tree: `<out_dir>/<feed>/<cycle>/`. It, the state
    /// directory and the quarantine may not lie inside `watch_dir`.
    pub out_dir: PathBuf,
    /// Where the ledger, requests and quarantine live.
    pub state_dir: PathBuf,
    /// `move` bad input files to the quarantine directory, or only `record` them.
    pub quarantine: QuarantineMode,
    /// Quarantine directory; empty: `<state_dir>/quarantine`.
    pub quarantine_dir: PathBuf,
    /// Steps processed at the same time, each in a process of its own.
    pub workers: u32,
    /// Which ready step goes first: `newest-first` (newest cycle, then lowest
    /// lead) or `oldest-first` (in cycle order; the newest cycle still keeps a
    /// worker, so an old backlog never starves it).
    pub order: Order,
    /// Seconds between scans of the incoming directories (safety net for
    /// missed events, and the only way on network file systems).
    pub scan_interval_s: f64,
    /// Seconds a file's size and mtime must stay unchanged for it to count
    /// when no close or rename event is seen.
    pub settle_s: f64,
    /// Seconds after a step's first input after which it is made with what is
    /// there (partial) or reported missing.
    pub step_timeout_s: f64,
    /// Delete output cycles older than this many days; 0 keeps everything.
    pub retention_days: u32,
    /// Days the ledger remembers settled steps and files gone from the
    /// incoming directories (then forgotten, and the journal compacted); 0:
    /// `retention_days`, or 14 when that is 0. Never less than
    /// `catch_up_hours` and a day.
    pub ledger_days: u32,
    /// Address of the health and metrics endpoint; empty: none.
    pub metrics_listen: String,
    /// Seconds to finish the steps in hand after SIGTERM before abandoning them.
    pub shutdown_grace_s: f64,
    /// First wait before retrying a step whose products could not be written, seconds.
    pub retry_first_s: f64,
    /// Longest wait between retries, seconds (the wait doubles up to it).
    pub retry_max_s: f64,
    /// Cycles older than this many hours are not caught up at start (0: all are).
    pub catch_up_hours: u32,
    /// The batch scheduler for feeds with `executor = "slurm"`.
    pub slurm: Slurm,
}

/// Where a feed's steps run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Executor {
    /// Processes of their own on this machine (`service.workers` at a time),
    /// started and taken by the service as batch jobs are.
    Local,
    /// One Slurm batch job per step (`[service.slurm]`), on nodes that see the
    /// same output tree; the service stays the only one that publishes.
    Slurm,
}

/// What to do with new steps while the scheduler cannot be reached.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Unreachable {
    /// Run them on this machine's workers until the scheduler answers again.
    Local,
    /// Keep them waiting and try the scheduler again.
    Wait,
}

/// The `[service.slurm]` table: how step jobs are submitted.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Slurm {
    /// `--partition`; empty: the cluster's default.
    pub partition: String,
    /// `--account`; empty: the user's default.
    pub account: String,
    /// `--time` of each step job, `[D-]HH:MM:SS` or minutes.
    pub time_limit: String,
    /// `--mem` of each step job (`4G`, `1500M`).
    pub memory: String,
    /// `--cpus-per-task` of each step job; also its thread count.
    pub cpus_per_step: u32,
    /// Step jobs submitted and not yet published at most.
    pub max_jobs: u32,
    /// Runs of a step on the scheduler before it is reported failed.
    pub max_attempts: u32,
    /// While `sbatch`/`squeue` cannot reach the controller: `local` or `wait`.
    pub when_unreachable: Unreachable,
    /// Seconds between looks at the jobs in flight.
    pub poll_s: f64,
    /// Seconds a scheduler command may take before it counts as unreachable.
    pub command_timeout_s: f64,
    /// Seconds to wait for a job's result record to be seen after Slurm says
    /// the job has ended (a shared file system may show it late) before the
    /// run counts as failed.
    pub result_grace_s: f64,
    /// The leeward program the nodes run; empty: the service's own.
    pub program: PathBuf,
    /// Shell lines run in the job before leeward (environment modules, paths).
    pub setup: Vec<String>,
    /// Further `sbatch` options, each one argument (`--qos=high`).
    pub sbatch_args: Vec<String>,
}

impl Default for Slurm {
    fn default() -> Self {
        Slurm {
            partition: String::new(),
            account: String::new(),
            time_limit: "00:30:00".into(),
            memory: "4G".into(),
            cpus_per_step: 2,
            max_jobs: 64,
            max_attempts: 3,
            when_unreachable: Unreachable::Local,
            poll_s: 2.0,
            command_timeout_s: 30.0,
            result_grace_s: 60.0,
            program: PathBuf::new(),
            setup: Vec::new(),
            sbatch_args: Vec::new(),
        }
    }
}

impl Default for Service {
    fn default() -> Self {
        Service {
            watch_dir: PathBuf::from("/srv/leeward/incoming"),
            out_dir: PathBuf::from("/srv/leeward/products"),
            state_dir: PathBuf::from("/var/lib/leeward"),
            quarantine: QuarantineMode::Move,
            quarantine_dir: PathBuf::new(),
            workers: 2,
            order: Order::NewestFirst,
            scan_interval_s: 30.0,
            settle_s: 10.0,
            step_timeout_s: 2700.0,
            retention_days: 0,
            ledger_days: 0,
            metrics_listen: "127.0.0.1:7478".into(),
            shutdown_grace_s: 60.0,
            retry_first_s: 5.0,
            retry_max_s: 300.0,
            catch_up_hours: 72,
            slurm: Slurm::default(),
        }
    }
}

impl Service {
    /// Days the ledger remembers, in effect (see [`Service::ledger_days`]).
    pub fn ledger_days_in_effect(&self) -> u32 {
        let asked = match (self.ledger_days, self.retention_days) {
            (0, 0) => 14,
            (0, r) => r,
            (d, _) => d,
        };
        asked.max(self.catch_up_hours.div_ceil(24) + 1)
    }

    /// The quarantine directory in effect.
    pub fn quarantine_dir(&self) -> PathBuf {
        if self.quarantine_dir.as_os_str().is_empty() {
            super::state_dir::StateDir(&self.state_dir).quarantine()
        } else {
            self.quarantine_dir.clone()
        }
    }
}

/// What to do with a bad input file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum QuarantineMode {
    /// Move it to the quarantine directory with a note of the reason.
    Move,
    /// Leave it, and record it in the ledger and the log.
    Record,
}

/// Order of ready steps.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Order {
    /// Newest cycle first, lowest lead first within it.
    NewestFirst,
    /// Oldest cycle first; the newest cycle keeps a worker.
    OldestFirst,
}

/// When a step counts as complete.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Completeness {
    /// Every quantity the products need on every level of `levels_hpa`.
    Fields,
    /// `files_per_step` files hold fields of the step.
    Files,
    /// A file matching `marker_pattern` for the cycle (and step) has arrived.
    Marker,
}

/// One `[[feed]]` table: a model's files.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Feed {
    /// The feed's name: letters, digits, `-` and `_`; names its output directory.
    pub name: String,
    /// Its incoming directory; relative paths are under `service.watch_dir`,
    /// empty is `service.watch_dir` itself.
    pub incoming: PathBuf,
    /// Regular expression a file name must match to belong to the feed, with
    /// optional named parts `cycle` (read with `cycle_format`), or `date`
    /// (`%Y%m%d`) and `hour`, and `step` (lead hours). Empty: every file.
    pub file_pattern: String,
    /// chrono format of the `cycle` part.
    pub cycle_format: String,
    /// When a step is complete.
    pub complete: Completeness,
    /// Isobaric levels, hPa, a complete step has (for `complete = "fields"`).
    pub levels_hpa: Vec<f64>,
    /// Quantities a complete step has on those levels; empty: those the
    /// products need. Each is the name `leeward inspect` prints (the WMO
    /// code table's words, e.g. "Temperature") or WMO numbers
    /// `discipline/category/number` (e.g. "0/0/0").
    pub require: Vec<String>,
    /// Files per step (for `complete = "files"`).
    pub files_per_step: u32,
    /// Regular expression of the marker file name, with a `cycle` (or `date`
    /// and `hour`) part and optionally `step` (for `complete = "marker"`).
    pub marker_pattern: String,
    /// Products for this feed; absent: the file's `[products]`. A key left out
    /// of a feed's own table takes its built-in default, not the value of
    /// the file's `[products]`.
    pub products: Option<Products>,
    /// Where its steps run: `local` (the service's workers) or `slurm`.
    pub executor: Executor,
    /// Which symbolic links in the incoming directory are read: `inside`
    /// (those whose target lies under the incoming directory or under one of
    /// `link_roots`), `anywhere`, or `never`. A refused link is quarantined
    /// by its name; its target is never opened.
    pub follow_links: FollowLinks,
    /// Absolute directories (beside the incoming directory) that links may
    /// point into with `follow_links = "inside"`, such as a model's own output
    /// file system.
    pub link_roots: Vec<PathBuf>,
}

/// Which symbolic links of an incoming directory are followed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FollowLinks {
    /// Links whose target (every link in its path resolved) is under the
    /// incoming directory or one of the feed's `link_roots`.
    Inside,
    /// Every link, wherever it points.
    Anywhere,
    /// No link: only regular files are read.
    Never,
}

impl Default for Feed {
    fn default() -> Self {
        Feed {
            name: String::new(),
            incoming: PathBuf::new(),
            file_pattern: String::new(),
            cycle_format: "%Y%m%d%H".into(),
            complete: Completeness::Fields,
            levels_hpa: Vec::new(),
            require: Vec::new(),
            files_per_step: 1,
            marker_pattern: String::new(),
            products: None,
            executor: Executor::Local,
            follow_links: FollowLinks::Inside,
            link_roots: Vec::new(),
        }
    }
}

/// What a file name says.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct NameParts {
    /// The cycle, if the pattern has it.
    pub cycle: Option<NaiveDateTime>,
    /// The lead, hours, if the pattern has it.
    pub step: Option<i64>,
}

fn compile(pattern: &str) -> Result<Regex, String> {
    Regex::new(pattern).map_err(|e| e.to_string())
}

fn parts(re: &Regex, name: &str, cycle_format: &str) -> Option<NameParts> {
    let c = re.captures(name)?;
    let cycle = if let Some(m) = c.name("cycle") {
        let s = m.as_str();
        // Formats without minutes parse as a date and hour: add them.
        NaiveDateTime::parse_from_str(s, cycle_format)
            .or_else(|_| {
                NaiveDateTime::parse_from_str(&format!("{s}00"), &format!("{cycle_format}%M"))
            })
            .ok()
    } else if let (Some(d), Some(h)) = (c.name("date"), c.name("hour")) {
        NaiveDateTime::parse_from_str(&format!("{}{:0>2}00", d.as_str(), h.as_str()), "%Y%m%d%H%M")
            .ok()
    } else {
        None
    };
    let step = c.name("step").and_then(|m| m.as_str().parse().ok());
    Some(NameParts { cycle, step })
}

/// A feed ready for use: patterns compiled, directory resolved.
#[derive(Debug, Clone)]
pub struct FeedRule {
    /// The settings.
    pub feed: Feed,
    /// The incoming directory.
    pub dir: PathBuf,
    file_re: Option<Regex>,
    marker_re: Option<Regex>,
    /// Quantities a complete step needs (for `complete = "fields"`).
    pub required: Vec<Param>,
}

/// What a file in a feed's directory is.
#[derive(Debug, Clone, PartialEq)]
pub enum FileRole {
    /// Input data, with what its name says.
    Data(NameParts),
    /// A marker saying a cycle (or step) is complete.
    Marker(NameParts),
}

impl FeedRule {
    /// Resolve a validated feed against the service settings.
    pub fn new(feed: &Feed, service: &Service, products: &Products) -> Result<FeedRule, String> {
        let file_re = (!feed.file_pattern.is_empty())
            .then(|| compile(&feed.file_pattern))
            .transpose()?;
        let marker_re = (!feed.marker_pattern.is_empty())
            .then(|| compile(&feed.marker_pattern))
            .transpose()?;
        let dir = if feed.incoming.as_os_str().is_empty() {
            service.watch_dir.clone()
        } else if feed.incoming.is_absolute() {
            feed.incoming.clone()
        } else {
            service.watch_dir.join(&feed.incoming)
        };
        let products = feed.products.as_ref().unwrap_or(products);
        let required = if feed.require.is_empty() {
            needed_quantities(products)
                .into_iter()
                .map(Quantity::param)
                .collect()
        } else {
            feed.require
                .iter()
                .map(|n| param_from_words(n))
                .collect::<Result<_, _>>()?
        };
        Ok(FeedRule {
            feed: feed.clone(),
            dir,
            file_re,
            marker_re,
            required,
        })
    }

    /// What the file `name` in this feed's directory is, or `None` if it is not the feed's.
    pub fn role(&self, name: &str) -> Option<FileRole> {
        if let Some(m) = &self.marker_re {
            if let Some(p) = parts(m, name, &self.feed.cycle_format) {
                return Some(FileRole::Marker(p));
            }
        }
        match &self.file_re {
            Some(re) => parts(re, name, &self.feed.cycle_format).map(FileRole::Data),
            None => Some(FileRole::Data(NameParts::default())),
        }
    }

    /// May a link in the incoming directory whose target resolves to
    /// `target` (no link left in it) be read? Directories are compared as
    /// they resolve now, links and all.
    pub fn link_allowed(&self, target: &std::path::Path) -> bool {
        match self.feed.follow_links {
            FollowLinks::Anywhere => true,
            FollowLinks::Never => false,
            FollowLinks::Inside => std::iter::once(&self.dir)
                .chain(&self.feed.link_roots)
                .filter_map(|d| std::fs::canonicalize(d).ok())
                .any(|d| target.starts_with(d)),
        }
    }

    /// The isobaric levels a complete step has, Pa.
    pub fn levels_pa(&self) -> Vec<f64> {
        self.feed.levels_hpa.iter().map(|p| p * 100.0).collect()
    }
}

/// The quantities on isobaric levels the switched-on products need.
pub fn needed_quantities(p: &Products) -> Vec<Quantity> {
    let mut q = Vec::new();
    let winds = p.vorticity || p.isobaric_pv || p.isentropic || p.tropopause || p.layer_pv;
    let temperature = p.stability || p.isobaric_pv || p.isentropic || p.tropopause || p.layer_pv;
    if temperature {
        q.push(Quantity::Temperature);
    }
    if winds {
        q.push(Quantity::WindU);
        q.push(Quantity::WindV);
    }
    if p.thickness || p.isentropic || p.tropopause {
        q.push(Quantity::GeopotentialHeight);
    }
    q
}

fn has_cycle_part(pattern: &str) -> bool {
    compile(pattern).is_ok_and(|re| {
        let names: Vec<&str> = re.capture_names().flatten().collect();
        names.contains(&"cycle") || (names.contains(&"date") && names.contains(&"hour"))
    })
}

/// Every problem of the service settings and feeds, as "key: reason".
pub fn problems(service: &Service, feeds: &[Feed]) -> Vec<String> {
    let mut p = Vec::new();
    service_limits(service, &mut p);
    slurm_problems(&service.slurm, &mut p);
    directory_problems(service, &mut p);
    let mut names: Vec<&str> = Vec::new();
    for (k, f) in feeds.iter().enumerate() {
        let key = |k2: &str| format!("feed[{k}].{k2}");
        feed_naming(f, &key, &mut names, &mut p);
        feed_completeness(f, &key, &mut p);
        feed_contents(f, &key, &mut p);
        feed_links(f, &key, &mut p);
    }
    p
}

/// The service's numbers within their ranges.
fn service_limits(s: &Service, p: &mut Vec<String>) {
    if !(1..=64).contains(&s.workers) {
        p.push(format!("service.workers: {} is outside 1 to 64", s.workers));
    }
    for (key, v, lo, hi) in [
        ("scan_interval_s", s.scan_interval_s, 0.1, 86400.0),
        ("settle_s", s.settle_s, 0.0, 3600.0),
        ("step_timeout_s", s.step_timeout_s, 1.0, 7.0 * 86400.0),
        ("shutdown_grace_s", s.shutdown_grace_s, 0.0, 3600.0),
        ("retry_first_s", s.retry_first_s, 0.1, 3600.0),
        ("retry_max_s", s.retry_max_s, 0.1, 86400.0),
    ] {
        if !(lo..=hi).contains(&v) {
            p.push(format!("service.{key}: {v} is outside {lo} to {hi}"));
        }
    }
    if s.ledger_days > 36_500 {
        p.push(format!(
            "service.ledger_days: {} is more than 36500 (100 years)",
            s.ledger_days
        ));
    }
    if s.retry_max_s < s.retry_first_s {
        p.push("service.retry_max_s: smaller than service.retry_first_s".into());
    }
    use std::net::ToSocketAddrs;
    if !s.metrics_listen.is_empty() && s.metrics_listen.to_socket_addrs().is_err() {
        p.push(format!(
            "service.metrics_listen: {:?} is not an address and port such as 127.0.0.1:7478",
            s.metrics_listen
        ));
    }
}

/// The batch scheduler's settings.
fn slurm_problems(b: &Slurm, p: &mut Vec<String>) {
    for (key, v, lo, hi) in [
        ("poll_s", b.poll_s, 0.1, 600.0),
        ("command_timeout_s", b.command_timeout_s, 1.0, 600.0),
        ("result_grace_s", b.result_grace_s, 0.0, 3600.0),
    ] {
        if !(lo..=hi).contains(&v) {
            p.push(format!("service.slurm.{key}: {v} is outside {lo} to {hi}"));
        }
    }
    for (key, v, lo, hi) in [
        ("cpus_per_step", b.cpus_per_step, 1, 1024),
        ("max_jobs", b.max_jobs, 1, 100_000),
        ("max_attempts", b.max_attempts, 1, 100),
    ] {
        if !(lo..=hi).contains(&v) {
            p.push(format!("service.slurm.{key}: {v} is outside {lo} to {hi}"));
        }
    }
    let duration = Regex::new(r"^(\d+-)?\d+(:\d{1,2}){0,2}$").ok();
    if !duration.is_some_and(|re| re.is_match(&b.time_limit)) {
        p.push(format!(
            "service.slurm.time_limit: {:?} is not a Slurm time such as 00:30:00, 1-00:00:00 or 45",
            b.time_limit
        ));
    }
    let memory = Regex::new(r"^\d+[KMGT]?$").ok();
    if !memory.is_some_and(|re| re.is_match(&b.memory)) {
        p.push(format!(
            "service.slurm.memory: {:?} is not a Slurm size such as 4G or 1500M",
            b.memory
        ));
    }
    for (key, v) in [("partition", &b.partition), ("account", &b.account)] {
        if v.chars()
            .any(|c| c.is_whitespace() || c == '\'' || c == '"')
        {
            p.push(format!("service.slurm.{key}: {v:?} has spaces or quotes"));
        }
    }
    if let Some(a) = b.sbatch_args.iter().find(|a| !a.starts_with('-')) {
        p.push(format!(
            "service.slurm.sbatch_args: {a:?} is not an option (each entry is one option such as --qos=high)"
        ));
    }
    if !b.program.as_os_str().is_empty() && !b.program.is_absolute() {
        p.push(format!(
            "service.slurm.program: {} must be an absolute path (the nodes run it)",
            b.program.display()
        ));
    }
}

/// The directories: none empty, and none of the service's own inside the watched one.
fn directory_problems(s: &Service, p: &mut Vec<String>) {
    for (key, path) in [
        ("watch_dir", &s.watch_dir),
        ("out_dir", &s.out_dir),
        ("state_dir", &s.state_dir),
    ] {
        if path.as_os_str().is_empty() {
            p.push(format!("service.{key}: empty"));
        }
    }
    // The service's own files inside what it watches would come back to it
    // as arrivals: products, the ledger and quarantined files beside the
    // model's output (a lexical test, as the paths are written).
    for (key, path) in [
        ("out_dir", &s.out_dir),
        ("state_dir", &s.state_dir),
        ("quarantine_dir", &s.quarantine_dir),
    ] {
        if !path.as_os_str().is_empty()
            && !s.watch_dir.as_os_str().is_empty()
            && path.starts_with(&s.watch_dir)
        {
            p.push(format!(
                "service.{key}: {} is inside service.watch_dir {}: the service would watch its own files",
                path.display(),
                s.watch_dir.display()
            ));
        }
    }
}

/// A feed's name (usable in a path, not taken twice) and its patterns.
fn feed_naming<'a>(
    f: &'a Feed,
    key: &dyn Fn(&str) -> String,
    names: &mut Vec<&'a str>,
    p: &mut Vec<String>,
) {
    if f.name.is_empty()
        || !f
            .name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
    {
        p.push(format!(
            "{}: {:?} must be letters, digits, - and _ only",
            key("name"),
            f.name
        ));
    }
    if names.contains(&f.name.as_str()) {
        p.push(format!(
            "{}: {:?} is used by two feeds",
            key("name"),
            f.name
        ));
    }
    names.push(&f.name);
    for (k2, pat) in [
        ("file_pattern", &f.file_pattern),
        ("marker_pattern", &f.marker_pattern),
    ] {
        if let Err(e) = (!pat.is_empty()).then(|| compile(pat)).transpose() {
            p.push(format!("{}: not a regular expression: {e}", key(k2)));
        }
    }
}

/// What makes a step complete, and what that needs.
fn feed_completeness(f: &Feed, key: &dyn Fn(&str) -> String, p: &mut Vec<String>) {
    match f.complete {
        Completeness::Fields => {
            if f.levels_hpa.is_empty() {
                p.push(format!(
                    "{}: needed when complete = \"fields\" (the isobaric levels a complete step has)",
                    key("levels_hpa")
                ));
            }
            if let Some(l) = f.levels_hpa.iter().find(|l| !(**l > 0.0 && **l <= 1100.0)) {
                p.push(format!(
                    "{}: {l} hPa is outside 0 to 1100",
                    key("levels_hpa")
                ));
            }
        }
        Completeness::Files => {
            if f.files_per_step == 0 {
                p.push(format!("{}: must be at least 1", key("files_per_step")));
            }
        }
        Completeness::Marker => {
            if f.marker_pattern.is_empty() {
                p.push(format!(
                    "{}: needed when complete = \"marker\"",
                    key("marker_pattern")
                ));
            } else if !has_cycle_part(&f.marker_pattern) {
                p.push(format!(
                    "{}: needs a named part (?P<cycle>...), or (?P<date>...) and (?P<hour>...)",
                    key("marker_pattern")
                ));
            }
        }
    }
}

/// A feed's products, required fields and cycle format.
fn feed_contents(f: &Feed, key: &dyn Fn(&str) -> String, p: &mut Vec<String>) {
    if let Some(pr) = &f.products {
        if !pr.any() {
            p.push(format!(
                "{}: every product is switched off; nothing would be made",
                key("products")
            ));
        }
    }
    for (k, n) in f.require.iter().enumerate() {
        if let Err(e) = param_from_words(n) {
            p.push(format!("{}[{k}]: {e}", key("require")));
        }
    }
    let bad_format = f.cycle_format.is_empty()
        || chrono::format::StrftimeItems::new(&f.cycle_format)
            .any(|i| matches!(i, chrono::format::Item::Error));
    if bad_format {
        p.push(format!("{}: not a usable time format", key("cycle_format")));
    }
}

/// A feed's symbolic-link policy.
fn feed_links(f: &Feed, key: &dyn Fn(&str) -> String, p: &mut Vec<String>) {
    for r in &f.link_roots {
        if !r.is_absolute() {
            p.push(format!(
                "{}: {} must be an absolute directory",
                key("link_roots"),
                crate::escape::path(r)
            ));
        } else if r.parent().is_none() {
            p.push(format!(
                "{}: \"/\" would let links point anywhere; say follow_links = \"anywhere\" instead",
                key("link_roots")
            ));
        }
    }
    if !f.link_roots.is_empty() && f.follow_links != FollowLinks::Inside {
        p.push(format!(
            "{}: only used with follow_links = \"inside\"",
            key("link_roots")
        ));
    }
}

/// The directories a feed list watches, for messages.
pub fn describe_dirs(rules: &[FeedRule]) -> String {
    rules
        .iter()
        .map(|r| format!("{} <- {}", r.feed.name, r.dir.display()))
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rule(toml_feed: &str) -> FeedRule {
        let f: Feed = toml::from_str(toml_feed).unwrap();
        FeedRule::new(&f, &Service::default(), &Products::default()).unwrap()
    }

    #[test]
    fn every_group_of_checks_speaks_for_its_own_keys() {
        // One planted error per named check (leeward's own rules); each must
        // be reported by its key, and a clean service and feed by none.
        let clean: Feed =
            toml::from_str("name = \"m\"\ncomplete = \"files\"\nfiles_per_step = 1\n").unwrap();
        let none = problems(&Service::default(), &[clean]);
        assert!(none.is_empty(), "{none:?}");
        let mut s = Service {
            workers: 0,
            ..Service::default()
        };
        s.slurm.time_limit = "soon".into();
        s.out_dir = s.watch_dir.join("products");
        let bad: Feed = toml::from_str(
            "name = \"a b\"\ncomplete = \"marker\"\nrequire = [\"no such field\"]\nlink_roots = [\"relative\"]\nfollow_links = \"inside\"\n",
        )
        .unwrap();
        let p = problems(&s, &[bad]);
        for key in [
            "service.workers",
            "service.slurm.time_limit",
            "service.out_dir",
            "feed[0].name",
            "feed[0].marker_pattern",
            "feed[0].require[0]",
            "feed[0].link_roots",
        ] {
            assert!(p.iter().any(|x| x.starts_with(key)), "{key}: {p:?}");
        }
    }

    #[test]
    fn names_say_cycle_and_step() {
        let r = rule(
            "name = \"m\"\nlevels_hpa = [500.0]\nfile_pattern = '^m_(?P<cycle>\\d{10})_(?P<step>\\d{3})\\.grib2$'\nmarker_pattern = '^m_(?P<cycle>\\d{10})\\.done$'\n",
        );
        let want = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
            .unwrap()
            .and_hms_opt(6, 0, 0);
        match r.role("m_2026031406_012.grib2") {
            Some(FileRole::Data(p)) => {
                assert_eq!(p.cycle, want);
                assert_eq!(p.step, Some(12));
            }
            other => panic!("{other:?}"),
        }
        match r.role("m_2026031406.done") {
            Some(FileRole::Marker(p)) => assert_eq!((p.cycle, p.step), (want, None)),
            other => panic!("{other:?}"),
        }
        assert_eq!(r.role("other.grib2"), None);
        let r = rule("name = \"d\"\nlevels_hpa = [500.0]\nfile_pattern = '^x(?P<date>\\d{8})(?P<hour>\\d\\d)$'\n");
        match r.role("x2026031406") {
            Some(FileRole::Data(p)) => assert_eq!(p.cycle, want),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn products_decide_the_required_quantities() {
        let all = needed_quantities(&Products::default());
        assert_eq!(all.len(), 4);
        let only_thickness = Products {
            vorticity: false,
            stability: false,
            isobaric_pv: false,
            isentropic: false,
            tropopause: false,
            layer_pv: false,
            ..Products::default()
        };
        assert_eq!(
            needed_quantities(&only_thickness),
            vec![Quantity::GeopotentialHeight]
        );
    }

    #[test]
    fn every_feed_problem_is_named() {
        let feeds: Vec<Feed> = vec![
            toml::from_str("name = \"a b\"\nfile_pattern = '('\n").unwrap(),
            toml::from_str(
                "name = \"c\"\ncomplete = \"marker\"\nmarker_pattern = 'done'\nrequire = [\"Temperature\", \"0/2/2\", \"gh\"]\n",
            )
            .unwrap(),
            toml::from_str("name = \"d\"\nlevels_hpa = [500.0]\nlink_roots = [\"data/model\"]\n")
                .unwrap(),
            toml::from_str(
                "name = \"e\"\nlevels_hpa = [500.0]\nfollow_links = \"never\"\nlink_roots = [\"/data\"]\n",
            )
            .unwrap(),
        ];
        let p = problems(
            &Service {
                workers: 0,
                ..Service::default()
            },
            &feeds,
        );
        for key in [
            "service.workers",
            "feed[0].name",
            "feed[0].file_pattern",
            "feed[0].levels_hpa",
            "feed[1].marker_pattern",
            "feed[1].require[2]",
            "feed[2].link_roots: data/model must be an absolute directory",
            "feed[3].link_roots: only used with follow_links = \"inside\"",
        ] {
            assert!(p.iter().any(|x| x.starts_with(key)), "{key}: {p:?}");
        }
        // The quantity words and numbers are taken; the old short name is
        // refused with what to write instead.
        assert!(!p.iter().any(|x| x.starts_with("feed[1].require[0]")
            || x.starts_with("feed[1].require[1]")), "{p:?}");
        let gh = p
            .iter()
            .find(|x| x.starts_with("feed[1].require[2]"))
            .unwrap();
        assert!(gh.contains("\"Geopotential height\" or 0/3/5"), "{gh}");
        assert!(toml::from_str::<Feed>("name = \"f\"\nfollow_links = \"outside\"\n").is_err());
    }

    #[test]
    fn links_are_followed_inside_the_incoming_directory_and_the_roots_only() {
        let base = std::env::temp_dir().join(format!("leeward-links-{}", std::process::id()));
        let (inc, root, other) = (base.join("in"), base.join("model"), base.join("elsewhere"));
        for d in [&inc, &root, &other] {
            std::fs::create_dir_all(d).unwrap();
        }
        let svc = Service {
            watch_dir: base.clone(),
            ..Service::default()
        };
        let feed = |extra: &str| -> FeedRule {
            let f: Feed =
                toml::from_str(&format!("name = \"m\"\nincoming = \"in\"\n{extra}")).unwrap();
            FeedRule::new(&f, &svc, &Products::default()).unwrap()
        };
        let canon = |p: &std::path::Path| std::fs::canonicalize(p).unwrap();
        let inside = feed(&format!("link_roots = [\"{}\"]\n", root.display()));
        assert!(inside.link_allowed(&canon(&inc).join("sub/x.grib2")));
        assert!(inside.link_allowed(&canon(&root).join("x.grib2")));
        assert!(!inside.link_allowed(&canon(&other).join("x.grib2")));
        assert!(!inside.link_allowed(std::path::Path::new("/etc/passwd")));
        // A sibling whose name starts like the directory is not under it.
        assert!(!inside.link_allowed(&canon(&base).join("in-other/x.grib2")));
        assert!(!feed("").link_allowed(&canon(&root).join("x.grib2")));
        assert!(
            feed("follow_links = \"anywhere\"\n").link_allowed(std::path::Path::new("/etc/passwd"))
        );
        assert!(!feed("follow_links = \"never\"\n").link_allowed(&canon(&inc).join("x.grib2")));
        let _ = std::fs::remove_dir_all(&base);
    }
}
