//! The service (`leeward serve`): watch the incoming directories, assemble
//! cycle steps from the files as they land, process each step as soon as it
//! is complete, publish products with a manifest, and keep a ledger so that
//! a restart resumes where it stopped.
//!
//! - [`settings`]: the `[service]` and `[[feed]]` tables.
//! - [`watch`]: which files in an incoming directory are finished.
//! - [`assemble`]: fields grouped into steps; completeness; order.
//! - [`intake`]: a step's messages read again from its files, the step found among them.
//! - [`daemon`]: the main loop, workers, signals, reprocess requests.
//! - [`decide`]: the daemon's decisions (where a step runs, what a run's end means) as pure functions.
//! - [`batch`]: step jobs on a batch scheduler (Slurm): spec, result, taking it.
//! - [`child`]: step processes on this machine, made and taken as batch jobs are.
//! - [`job_state`]: the words a job's state is said in (Slurm's ended states, leeward's own).
//! - [`publish`]: output tree, manifests, temporaries, retention, quarantine.
//! - [`commit`]: a step's publication as one act: recorded, renamed, finished after a crash.
//! - [`ledger`]: the durable journal of what happened.
//! - [`pool`]: the worker threads steps run on, kept for the service's life.
//! - [`metrics`]: the health and metrics endpoint.
//! - [`state_dir`]: every path under the state directory.
//! - [`shutdown`]: the one stop the loop, the workers and the endpoint share.
//! - [`systemd`]: readiness, watchdog and status notifications.
//! - [`status`]: `leeward status`, from the ledger.
//! - [`waiting`]: what each waiting step lacks and when it is made anyway.

pub mod assemble;
pub mod batch;
pub mod child;
pub mod commit;
pub mod daemon;
pub mod decide;
pub mod intake;
pub mod job_state;
pub mod ledger;
pub mod metrics;
pub mod pool;
pub mod publish;
pub mod settings;
pub mod shutdown;
pub mod state_dir;
pub mod status;
pub mod systemd;
pub mod waiting;
pub mod watch;
