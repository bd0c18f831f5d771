//! Step processes on this machine.
//!
//! A step of a feed with `executor = "local"` is made by a process of its
//! own, `leeward process --job DIR`, which the service starts and waits for,
//! the way a batch job runs on a node: the same spec in a staging directory
//! (a local step's, under `<out>/<feed>/.publish/`), the same result record,
//! and the service takes and publishes the result the same way
//! ([`super::batch::take`], the recorded publication of [`super::commit`]). So:
//!
//! - what the NetCDF and HDF5 libraries keep for each file written stays in
//!   the step's process and is returned when it ends: the service's own
//!   memory does not grow with the steps it publishes;
//! - a defect that kills a step's process (a crash in a library, memory
//!   exhausted) fails that step and nothing else;
//! - the service writes no product itself: a step's goes with the step's
//!   process, and the cycle's cyclone tracks, made from the published steps
//!   when the service takes a result, are made by a short-lived process of
//!   their own ([`tracks`]), so a failed write's held disk space goes with
//!   the process that wrote.
//!
//! The step's process is the service's own program (`/proc/self/exe`, the
//! binary the service started from even when a newer one has been installed
//! since) and dies with the service (`PR_SET_PDEATHSIG`); its log lines go
//! where the service's go. A step in hand when the service stops is made
//! again at the next start.
//!
//! In: a staging directory with a job spec. Out: the result record in it and
//! the process's peak memory, or why the process ended without a result.

use std::os::unix::process::{CommandExt, ExitStatusExt};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Instant;

/// The program a step's process runs: this very binary.
pub const PROGRAM: &str = "/proc/self/exe";

/// The service's own environment that must not reach a step process: what a
/// batch job reads from its scheduler, and what systemd gives the service
/// alone (sd_notify(3): the notification socket and the watchdog).
const NOT_INHERITED: [&str; 6] = [
    "SLURM_CPUS_PER_TASK",
    "SLURM_JOB_ID",
    "SLURM_RESTART_COUNT",
    "NOTIFY_SOCKET",
    "WATCHDOG_USEC",
    "WATCHDOG_PID",
];

/// A step process that ended with its result record written.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ran {
    /// Seconds from its start to its end.
    pub seconds: f64,
}

/// The command that makes the step staged in `stage`.
pub fn command(stage: &Path, log_format: &str) -> Command {
    on_stage("--job", stage, log_format)
}

/// `leeward process <option> <stage>`, this very binary, in the service's
/// log format, without the service's own environment, dying with its parent.
fn on_stage(option: &str, stage: &Path, log_format: &str) -> Command {
    let mut cmd = Command::new(PROGRAM);
    cmd.arg0("leeward")
        .args(["--log-format", log_format, "process", option])
        .arg(stage)
        .stdin(Stdio::null());
    for v in NOT_INHERITED {
        cmd.env_remove(v);
    }
    die_with_parent(&mut cmd);
    cmd
}

/// Have the process `cmd` starts killed when the thread that starts it
/// ends, as it does when the whole service ends (prctl(2), `PR_SET_PDEATHSIG`).
pub fn die_with_parent(cmd: &mut Command) {
    let parent = rustix::process::getpid();
    // SAFETY: the closure runs in the child between fork and exec, where only
    // async-signal-safe calls are allowed: it makes two system calls (prctl,
    // getppid) through rustix's raw syscall wrappers and builds its errors
    // from error numbers, so it allocates nothing and takes no lock. If the
    // parent died before the prctl took effect, the child's parent is no
    // longer the service and the child does not start (ESRCH).
    unsafe {
        cmd.pre_exec(move || {
            rustix::process::set_parent_process_death_signal(Some(rustix::process::Signal::KILL))?;
            if rustix::process::getppid() != Some(parent) {
                return Err(std::io::Error::from_raw_os_error(libc::ESRCH));
            }
            Ok(())
        });
    }
}

/// The log format the service's processes write in (its `--log-format`),
/// for the processes it starts without a step's own (the tracks').
static LOG_FORMAT: std::sync::OnceLock<String> = std::sync::OnceLock::new();

/// Set once, when the service starts: the log format of its processes.
pub fn set_log_format(f: &str) {
    let _ = LOG_FORMAT.set(f.to_string());
}

/// Make the cycle's cyclone tracks for the step whose result is being taken
/// in `stage`, in a short-lived process of its own (`leeward process
/// --tracks`, [`super::batch::tracks_in_job`]), and wait for it. `Ok` when it
/// listed what it made.
pub fn tracks(stage: &Path) -> Result<(), String> {
    let format = LOG_FORMAT.get().map_or("text", String::as_str);
    let t0 = Instant::now();
    let status = on_stage("--tracks", stage, format)
        .status()
        .map_err(|e| format!("the tracks' process could not be started: {e}"))?;
    if status.success() {
        return Ok(());
    }
    Err(format!(
        "the tracks' process ended with {} after {:.1} s (its messages are in this log just before)",
        ended(status),
        t0.elapsed().as_secs_f64()
    ))
}

/// How a process ended, in words.
pub fn ended(status: std::process::ExitStatus) -> String {
    if let Some(code) = status.code() {
        return format!("exit code {code}");
    }
    match status.signal() {
        Some(s) => {
            let name = match s {
                libc::SIGKILL => " (SIGKILL: killed, perhaps for want of memory)",
                libc::SIGSEGV => " (SIGSEGV)",
                libc::SIGABRT => " (SIGABRT)",
                libc::SIGBUS => " (SIGBUS)",
                libc::SIGTERM => " (SIGTERM)",
                _ => "",
            };
            format!("signal {s}{name}")
        }
        None => format!("{status}"),
    }
}

/// Make the step staged in `stage` in a process of its own and wait for it.
/// `Ok` when the process wrote its result record, the file `record` in
/// `stage` (whatever that says); otherwise why there is none.
pub fn run(stage: &Path, log_format: &str, record: &str) -> Result<Ran, String> {
    let t0 = Instant::now();
    let status = command(stage, log_format)
        .status()
        .map_err(|e| format!("the step's process could not be started: {e}"))?;
    let seconds = t0.elapsed().as_secs_f64();
    if status.success() && stage.join(record).is_file() {
        return Ok(Ran { seconds });
    }
    Err(format!(
        "the step's process ended with {} after {seconds:.1} s without a result \
         (a defect in leeward or a library it uses; its messages are in this log just before)",
        ended(status)
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn endings_are_said_in_words() {
        use std::os::unix::process::ExitStatusExt;
        let s = |raw: i32| ended(std::process::ExitStatus::from_raw(raw));
        // wait(2) status words: exit code in the high byte, signal in the low bits.
        assert_eq!(s(2 << 8), "exit code 2");
        assert_eq!(s(libc::SIGSEGV), "signal 11 (SIGSEGV)");
        assert_eq!(
            s(libc::SIGKILL),
            "signal 9 (SIGKILL: killed, perhaps for want of memory)"
        );
    }

    #[test]
    fn a_step_process_dies_with_its_parent() {
        // A child started from a short-lived thread: PR_SET_PDEATHSIG fires
        // when the thread that forked it ends (prctl(2)), as when the whole
        // service ends.
        let pid = std::thread::spawn(|| {
            let mut c = Command::new("sleep");
            c.arg("60");
            die_with_parent(&mut c);
            let child = c.spawn().expect("sleep");
            let pid = child.id();
            drop(child); // not waited for here: the loop below reaps it
            pid
        })
        .join()
        .expect("thread");
        let t = Instant::now();
        let mut status = 0;
        loop {
            // SAFETY: waitpid(2) on a child of this process, with a valid
            // pointer to an int it writes the status word into.
            let r = unsafe { libc::waitpid(pid as i32, &mut status, libc::WNOHANG) };
            if r == pid as i32 {
                break;
            }
            assert!(
                t.elapsed().as_secs() < 30,
                "the child outlived the thread that started it"
            );
            std::thread::sleep(std::time::Duration::from_millis(20));
        }
        assert!(libc::WIFSIGNALED(status) && libc::WTERMSIG(status) == libc::SIGKILL);
    }
}
