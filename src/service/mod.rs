//! The service (`leeward serve`): watch the incoming directories, assemble
//! cycle steps from the files as they land, process each step as soon as it
//! is complete, publish products with a manifest, and keep a ledger so that
//! a restart resumes where it stopped.
//!
//! - [`settings`]: the `[service]` and `[[feed]]` tables.
//! - [`watch`]: which files in an incoming directory are finished.
//! - [`assemble`]: fields grouped into steps; completeness; order.
//! - [`daemon`]: the main loop, workers, signals, reprocess requests.
//! - [`batch`]: step jobs on a batch scheduler (Slurm): spec, result, taking it.
//! - [`child`]: step processes on this machine, made and taken as batch jobs are.
//! - [`publish`]: output tree, manifests, temporaries, retention, quarantine.
//! - [`commit`]: a step's publication as one act: recorded, renamed, finished after a crash.
//! - [`ledger`]: the durable journal of what happened.
//! - [`metrics`]: the health and metrics endpoint.
//! - [`systemd`]: readiness, watchdog and status notifications.
//! - [`status`]: `leeward status`, from the ledger.
//! - [`waiting`]: what each waiting step lacks and when it is made anyway.

pub mod assemble;
pub mod batch;
pub mod child;
pub mod commit;
pub mod daemon;
pub mod ledger;
pub mod metrics;
pub mod publish;
pub mod settings;
pub mod status;
pub mod systemd;
pub mod waiting;
pub mod watch;
