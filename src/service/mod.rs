//! The service's parts: the incoming-directory watcher and the ledger. The
//! daemon that joins them to the pipeline comes on top of these.

pub mod ledger;
pub mod watch;
