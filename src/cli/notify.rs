//! The systemd notification protocol (`sd_notify`): a datagram to the
//! socket named by `$NOTIFY_SOCKET`, when systemd set one. Without it every
//! call does nothing, so the daemon runs the same by hand.

use std::os::unix::net::UnixDatagram;
use std::time::{Duration, Instant};

use burlwatch::daemon::Status;

pub struct Notifier {
    socket: Option<(UnixDatagram, String)>,
    /// Half the watchdog interval systemd asked for, if any.
    watchdog: Option<Duration>,
    last_ping: Option<Instant>,
}

impl Notifier {
    pub fn from_env() -> Notifier {
        let path = std::env::var("NOTIFY_SOCKET")
            .ok()
            .filter(|p| !p.is_empty());
        let socket = path.and_then(|p| UnixDatagram::unbound().ok().map(|s| (s, p)));
        let watchdog = std::env::var("WATCHDOG_USEC")
            .ok()
            .and_then(|v| v.parse::<u64>().ok())
            .filter(|&us| us > 0)
            .map(|us| Duration::from_micros(us / 2));
        Notifier {
            socket,
            watchdog,
            last_ping: None,
        }
    }

    fn send(&self, msg: &str) {
        let Some((sock, path)) = &self.socket else {
            return;
        };
        let result = if let Some(name) = path.strip_prefix('@') {
            use std::os::linux::net::SocketAddrExt;
            std::os::unix::net::SocketAddr::from_abstract_name(name)
                .and_then(|addr| sock.send_to_addr(msg.as_bytes(), &addr))
        } else {
            sock.send_to(msg.as_bytes(), path)
        };
        if let Err(e) = result {
            tracing::debug!("cannot notify systemd: {e}");
        }
    }

    pub fn status(&mut self, s: Status) {
        match s {
            Status::Ready | Status::Reloaded { .. } => {
                self.send("READY=1\nSTATUS=watching the inbox")
            }
            Status::Reloading => {
                let mut ts = libc::timespec {
                    tv_sec: 0,
                    tv_nsec: 0,
                };
                // SAFETY: clock_gettime writes into the timespec we own.
                unsafe { libc::clock_gettime(libc::CLOCK_MONOTONIC, &mut ts) };
                let usec = ts.tv_sec as u64 * 1_000_000 + ts.tv_nsec as u64 / 1000;
                self.send(&format!("RELOADING=1\nMONOTONIC_USEC={usec}"));
            }
            Status::Stopping => self.send("STOPPING=1"),
            // `systemctl status` shows the latest.
            Status::Summary { last, seconds } => self.send(&format!(
                "STATUS=watching the inbox; last {seconds} s: {} frames, {} objects, {} rejected",
                last.logged + last.already_logged,
                last.objects,
                last.rejected
            )),
            // The daemon's own log line says where.
            Status::Listening(_) => {}
            Status::Alive => {
                let Some(every) = self.watchdog else { return };
                if self.last_ping.is_none_or(|t| t.elapsed() >= every) {
                    self.last_ping = Some(Instant::now());
                    self.send("WATCHDOG=1");
                }
            }
        }
    }
}
