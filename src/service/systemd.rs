//! The systemd notification protocol (sd_notify) without libsystemd:
//! `READY=1`, `WATCHDOG=1`, `STATUS=...`, `STOPPING=1` as datagrams to the
//! socket named by `$NOTIFY_SOCKET` (a path, or `@name` in the abstract
//! namespace), and the watchdog interval from `$WATCHDOG_USEC`.
//!
//! Source: systemd's sd_notify(3) and sd_watchdog_enabled(3) manual pages
//! (from memory: one datagram of newline-separated `KEY=VALUE` lines; the
//! watchdog is to be pinged at least every `WATCHDOG_USEC` microseconds,
//! commonly at half of it; `WATCHDOG_PID`, when set, names the process meant).

use std::os::unix::net::{SocketAddr, UnixDatagram};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use tracing::{info, warn};

/// A connection to the service manager, or nothing when not run by one.
pub struct Notifier {
    /// Non-blocking: a manager that does not read (its queue full) must not
    /// stop the service's loop; the notification is dropped and said.
    socket: Option<(UnixDatagram, SocketAddr)>,
    /// Watchdog interval asked for by the manager.
    pub watchdog: Option<Duration>,
    /// Whether the last notification failed (a run of failures is said once).
    failing: AtomicBool,
}

fn address(name: &str) -> std::io::Result<SocketAddr> {
    if let Some(abstract_name) = name.strip_prefix('@') {
        use std::os::linux::net::SocketAddrExt;
        SocketAddr::from_abstract_name(abstract_name.as_bytes())
    } else {
        SocketAddr::from_pathname(name)
    }
}

/// An unbound, non-blocking datagram socket and the manager's address `name`.
fn socket_to(name: &str) -> std::io::Result<(UnixDatagram, SocketAddr)> {
    let s = UnixDatagram::unbound()?;
    s.set_nonblocking(true)?;
    Ok((s, address(name)?))
}

impl Notifier {
    /// From the environment (`NOTIFY_SOCKET`, `WATCHDOG_USEC`, `WATCHDOG_PID`).
    pub fn from_env() -> Notifier {
        let socket = std::env::var("NOTIFY_SOCKET").ok().and_then(|name| {
            match socket_to(&name) {
                Ok(s) => Some(s),
                Err(e) => {
                    warn!(socket = %name, error = %e, "cannot use the service manager's notification socket");
                    None
                }
            }
        });
        let pid_ok = std::env::var("WATCHDOG_PID")
            .ok()
            .and_then(|p| p.parse::<u32>().ok())
            .is_none_or(|p| p == std::process::id());
        let watchdog = std::env::var("WATCHDOG_USEC")
            .ok()
            .and_then(|u| u.parse::<u64>().ok())
            .filter(|u| *u > 0 && pid_ok)
            .map(Duration::from_micros);
        Notifier {
            socket,
            watchdog,
            failing: AtomicBool::new(false),
        }
    }

    /// Send one notification (lines `KEY=VALUE`) without waiting. Never fatal:
    /// the first failure of a run is logged, and the first success after it.
    pub fn send(&self, msg: &str) {
        let Some((s, addr)) = &self.socket else {
            return;
        };
        match s.send_to_addr(msg.as_bytes(), addr) {
            Ok(_) => {
                if self.failing.swap(false, Ordering::Relaxed) {
                    info!("service manager notifications sent again");
                }
            }
            Err(e) => {
                if !self.failing.swap(true, Ordering::Relaxed) {
                    warn!(error = %e, "service manager notification not sent (dropped; the next ones are tried as they come)");
                }
            }
        }
    }

    /// True when a service manager listens.
    pub fn active(&self) -> bool {
        self.socket.is_some()
    }
}

/// A `STATUS=` value kept to one line.
pub fn status_line(s: &str) -> String {
    format!("STATUS={}", s.replace('\n', " "))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn datagrams_reach_a_path_socket() {
        let dir = std::env::temp_dir().join(format!("leeward-sd-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("notify");
        let listener = UnixDatagram::bind(&path).unwrap();
        let n = Notifier {
            socket: Some(socket_to(path.to_str().unwrap()).unwrap()),
            watchdog: None,
            failing: AtomicBool::new(false),
        };
        n.send("READY=1\nSTATUS=ok");
        let mut buf = [0u8; 64];
        let k = listener.recv(&mut buf).unwrap();
        assert_eq!(&buf[..k], b"READY=1\nSTATUS=ok");
        // A manager that stops reading: its queue fills (net.unix.max_dgram_qlen,
        // 10 by default on Linux, from memory), and sending must still return at
        // once, the notification dropped, not wait for room.
        let (done, finished) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for _ in 0..200 {
                n.send("WATCHDOG=1");
            }
            let _ = done.send(n.failing.load(Ordering::Relaxed));
        });
        let failing = finished.recv_timeout(Duration::from_secs(10));
        assert_eq!(
            failing,
            Ok(true),
            "200 notifications to a full queue did not return"
        );
        drop(listener);
        let _ = std::fs::remove_dir_all(&dir);
    }
}
