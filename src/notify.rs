//! The daemon's side of systemd's notification protocol: `READY=1` once it serves, `RELOADING=1` and `READY=1`
//! around a configuration reload, `STOPPING=1` at shutdown, `WATCHDOG=1` pings and free-text `STATUS=` lines.
//!
//! systemd passes the address of its notification socket in `NOTIFY_SOCKET` (a file-system path, or an abstract
//! socket written with a leading `@`); each message is one datagram of `KEY=VALUE` lines. Without that variable
//! (a terminal, a container, tests) every call is a no-op, so the runtime calls these unconditionally.
//!
//! With `WatchdogSec=` in the unit, systemd sets `WATCHDOG_USEC` (and `WATCHDOG_PID`): the service must ping at
//! least that often or be killed and restarted. [`watchdog_interval`] turns these into a ping period of half the
//! timeout, the margin systemd's documentation recommends. Ping from the event loop itself, never from a timer
//! thread of its own, or a hung loop would keep being reported alive.
//!
//! Written over `std::os::unix::net::UnixDatagram` instead of the `sd-notify` crate: the protocol is a few lines,
//! and taking the environment as arguments lets the tests run without touching the process environment.

use std::ffi::OsStr;
use std::io;
use std::os::unix::ffi::OsStrExt;
use std::os::unix::net::{SocketAddr, UnixDatagram};
use std::time::{Duration, Instant};

/// Longest `STATUS=` text sent; systemd shows it in one line of `systemctl status`.
const MAX_STATUS_LEN: usize = 200;

/// What can go wrong talking to systemd. The daemon logs these and carries on: a lost notification must not stop
/// the filter.
#[derive(Debug, thiserror::Error)]
pub enum NotifyError {
    #[error("NOTIFY_SOCKET={value:?}: {reason}")]
    BadSocket { value: String, reason: &'static str },
    #[error("cannot create a socket to notify systemd: {0}")]
    Socket(#[source] io::Error),
    #[error("cannot notify systemd ({what}): {source}")]
    Send { what: String, source: io::Error },
    #[error("{name}={value:?} is not a positive whole number")]
    BadWatchdog { name: &'static str, value: String },
}

/// One notification; several can go in one datagram.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Message<'a> {
    /// Start-up finished (and, after `Reloading`, the reload finished).
    Ready,
    /// A configuration reload began; send `Ready` when it is done.
    Reloading,
    /// Shutdown began.
    Stopping,
    /// The watchdog ping.
    Watchdog,
    /// A one-line status for `systemctl status`; control characters become spaces.
    Status(&'a str),
}

impl Message<'_> {
    fn write_to(&self, out: &mut String) {
        match self {
            Message::Ready => out.push_str("READY=1"),
            Message::Reloading => out.push_str("RELOADING=1"),
            Message::Stopping => out.push_str("STOPPING=1"),
            Message::Watchdog => out.push_str("WATCHDOG=1"),
            Message::Status(text) => {
                out.push_str("STATUS=");
                // A newline would start a new assignment: a status text must not be able to forge one.
                out.extend(text.chars().take(MAX_STATUS_LEN).map(|c| {
                    if c.is_control() {
                        ' '
                    } else {
                        c
                    }
                }));
            }
        }
    }
}

/// A connection to systemd's notification socket, or nothing when not run by systemd.
#[derive(Debug)]
pub struct Notifier {
    target: Option<(UnixDatagram, SocketAddr)>,
}

impl Notifier {
    /// A notifier that sends nothing.
    pub fn disabled() -> Notifier {
        Notifier { target: None }
    }

    /// From the process environment (`NOTIFY_SOCKET`).
    pub fn from_env() -> Result<Notifier, NotifyError> {
        Notifier::from_socket_var(std::env::var_os("NOTIFY_SOCKET").as_deref())
    }

    /// From the value of `NOTIFY_SOCKET`: unset or empty means not under systemd.
    pub fn from_socket_var(value: Option<&OsStr>) -> Result<Notifier, NotifyError> {
        let Some(value) = value.filter(|v| !v.is_empty()) else {
            return Ok(Notifier::disabled());
        };
        let addr = socket_addr(value.as_bytes()).map_err(|reason| NotifyError::BadSocket {
            value: value.to_string_lossy().into_owned(),
            reason,
        })?;
        let socket = UnixDatagram::unbound().map_err(NotifyError::Socket)?;
        // A stuck service manager must never stall the event loop; a notification that does not fit is dropped
        // with an error instead.
        socket.set_nonblocking(true).map_err(NotifyError::Socket)?;
        Ok(Notifier {
            target: Some((socket, addr)),
        })
    }

    /// True when run by systemd with notifications on.
    pub fn is_enabled(&self) -> bool {
        self.target.is_some()
    }

    /// Sends `messages` as one datagram; a no-op when disabled or when `messages` is empty.
    pub fn send(&self, messages: &[Message<'_>]) -> Result<(), NotifyError> {
        let Some((socket, addr)) = &self.target else {
            return Ok(());
        };
        if messages.is_empty() {
            return Ok(());
        }
        let mut text = String::with_capacity(32);
        for (i, m) in messages.iter().enumerate() {
            if i > 0 {
                text.push('\n');
            }
            m.write_to(&mut text);
        }
        match socket.send_to_addr(text.as_bytes(), addr) {
            Ok(n) if n == text.len() => Ok(()),
            Ok(_) => Err(NotifyError::Send {
                what: text,
                source: io::Error::new(io::ErrorKind::WriteZero, "datagram truncated"),
            }),
            Err(source) => Err(NotifyError::Send { what: text, source }),
        }
    }

    pub fn ready(&self) -> Result<(), NotifyError> {
        self.send(&[Message::Ready])
    }

    pub fn reloading(&self) -> Result<(), NotifyError> {
        self.send(&[Message::Reloading])
    }

    pub fn stopping(&self) -> Result<(), NotifyError> {
        self.send(&[Message::Stopping])
    }

    pub fn watchdog(&self) -> Result<(), NotifyError> {
        self.send(&[Message::Watchdog])
    }

    pub fn status(&self, text: &str) -> Result<(), NotifyError> {
        self.send(&[Message::Status(text)])
    }
}

fn socket_addr(value: &[u8]) -> Result<SocketAddr, &'static str> {
    match value.first() {
        Some(b'/') => SocketAddr::from_pathname(std::path::Path::new(OsStr::from_bytes(value)))
            .map_err(|_| "the path is too long for a Unix socket"),
        Some(b'@') => abstract_addr(&value[1..]),
        _ => Err("neither an absolute path nor an abstract socket name starting with '@'"),
    }
}

#[cfg(any(target_os = "linux", target_os = "android"))]
fn abstract_addr(name: &[u8]) -> Result<SocketAddr, &'static str> {
    use std::os::linux::net::SocketAddrExt;
    SocketAddr::from_abstract_name(name).map_err(|_| "the abstract socket name is too long")
}

#[cfg(not(any(target_os = "linux", target_os = "android")))]
fn abstract_addr(_name: &[u8]) -> Result<SocketAddr, &'static str> {
    Err("abstract sockets exist only on Linux")
}

/// The watchdog ping period from the process environment; see [`watchdog_interval`].
pub fn watchdog_interval_from_env() -> Result<Option<Duration>, NotifyError> {
    watchdog_interval(
        std::env::var_os("WATCHDOG_USEC").as_deref(),
        std::env::var_os("WATCHDOG_PID").as_deref(),
        std::process::id(),
    )
}

/// How often to send `WATCHDOG=1`: half of `WATCHDOG_USEC`. `None` when no watchdog is asked for, or when
/// `WATCHDOG_PID` names another process (the variables were inherited from a parent that is the watched one).
pub fn watchdog_interval(
    usec: Option<&OsStr>,
    pid: Option<&OsStr>,
    own_pid: u32,
) -> Result<Option<Duration>, NotifyError> {
    let Some(usec) = usec.filter(|v| !v.is_empty()) else {
        return Ok(None);
    };
    let usec = positive("WATCHDOG_USEC", usec)?;
    if let Some(pid) = pid.filter(|v| !v.is_empty()) {
        if positive("WATCHDOG_PID", pid)? != u64::from(own_pid) {
            return Ok(None);
        }
    }
    Ok(Some(Duration::from_micros(usec / 2)))
}

fn positive(name: &'static str, value: &OsStr) -> Result<u64, NotifyError> {
    value
        .to_str()
        .and_then(|s| s.parse::<u64>().ok())
        .filter(|&n| n > 0)
        .ok_or_else(|| NotifyError::BadWatchdog {
            name,
            value: value.to_string_lossy().into_owned(),
        })
}

/// Decides when the next watchdog ping is due, for a loop that wakes up for other reasons too. The clock is an
/// argument so the loop's own notion of "now" is used and tests need no sleeping.
#[derive(Debug, Clone)]
pub struct WatchdogTimer {
    interval: Duration,
    last: Option<Instant>,
}

impl WatchdogTimer {
    pub fn new(interval: Duration) -> WatchdogTimer {
        WatchdogTimer {
            interval,
            last: None,
        }
    }

    pub fn interval(&self) -> Duration {
        self.interval
    }

    /// True if a ping is due at `now` (always true the first time); the caller then pings, and the next one is due
    /// an interval later.
    pub fn due(&mut self, now: Instant) -> bool {
        let due = self
            .last
            .is_none_or(|last| now.saturating_duration_since(last) >= self.interval);
        if due {
            self.last = Some(now);
        }
        due
    }

    /// When the next ping is due, for a `sleep_until`.
    pub fn next_due(&self, now: Instant) -> Instant {
        self.last.map_or(now, |last| last + self.interval)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::ffi::OsString;

    /// A datagram socket in a temp dir playing systemd's part.
    fn fake_systemd() -> (tempfile::TempDir, UnixDatagram, OsString) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("notify");
        let server = UnixDatagram::bind(&path).unwrap();
        // Bounds the test if a datagram never arrives.
        server
            .set_read_timeout(Some(Duration::from_secs(10)))
            .unwrap();
        (dir, server, path.into_os_string())
    }

    fn recv(server: &UnixDatagram) -> String {
        let mut buf = [0u8; 512];
        let n = server.recv(&mut buf).unwrap();
        String::from_utf8(buf[..n].to_vec()).unwrap()
    }

    #[test]
    fn sends_each_message_as_systemd_expects() {
        let (_dir, server, path) = fake_systemd();
        let n = Notifier::from_socket_var(Some(&path)).unwrap();
        assert!(n.is_enabled());
        n.ready().unwrap();
        assert_eq!(recv(&server), "READY=1");
        n.reloading().unwrap();
        assert_eq!(recv(&server), "RELOADING=1");
        n.watchdog().unwrap();
        assert_eq!(recv(&server), "WATCHDOG=1");
        n.stopping().unwrap();
        assert_eq!(recv(&server), "STOPPING=1");
        n.status("3 channels, broker connected").unwrap();
        assert_eq!(recv(&server), "STATUS=3 channels, broker connected");
        n.send(&[
            Message::Ready,
            Message::Status("reloaded: TT-101, FT-201, LT-301"),
        ])
        .unwrap();
        assert_eq!(
            recv(&server),
            "READY=1\nSTATUS=reloaded: TT-101, FT-201, LT-301"
        );
    }

    #[test]
    fn status_text_cannot_inject_assignments() {
        let (_dir, server, path) = fake_systemd();
        let n = Notifier::from_socket_var(Some(&path)).unwrap();
        n.status("bad\nREADY=1\r\u{7}").unwrap();
        assert_eq!(recv(&server), "STATUS=bad READY=1  ");
        n.status(&"x".repeat(1000)).unwrap();
        assert_eq!(recv(&server).len(), "STATUS=".len() + MAX_STATUS_LEN);
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn abstract_socket() {
        use std::os::linux::net::SocketAddrExt;
        let name = format!("gaugewise-test-{}-{:?}", std::process::id(), Instant::now());
        let server =
            UnixDatagram::bind_addr(&SocketAddr::from_abstract_name(name.as_bytes()).unwrap())
                .unwrap();
        server
            .set_read_timeout(Some(Duration::from_secs(10)))
            .unwrap();
        let var = OsString::from(format!("@{name}"));
        let n = Notifier::from_socket_var(Some(&var)).unwrap();
        n.ready().unwrap();
        assert_eq!(recv(&server), "READY=1");
    }

    #[test]
    fn not_under_systemd_is_a_no_op() {
        for v in [None, Some(OsStr::new(""))] {
            let n = Notifier::from_socket_var(v).unwrap();
            assert!(!n.is_enabled());
            n.ready().unwrap();
            n.watchdog().unwrap();
            n.status("x").unwrap();
        }
        Notifier::disabled().stopping().unwrap();
    }

    #[test]
    fn unusable_socket_values_are_errors() {
        for v in [
            "run/systemd/notify",
            "vsock:2:1234",
            &format!("/{}", "a".repeat(200)),
        ] {
            let e = Notifier::from_socket_var(Some(OsStr::new(v))).unwrap_err();
            assert!(matches!(e, NotifyError::BadSocket { .. }), "{v}: {e:?}");
            assert!(e.to_string().starts_with("NOTIFY_SOCKET="), "{e}");
        }
    }

    #[test]
    fn vanished_systemd_is_an_error_not_a_panic() {
        let (dir, server, path) = fake_systemd();
        let n = Notifier::from_socket_var(Some(&path)).unwrap();
        drop(server);
        drop(dir);
        let e = n.watchdog().unwrap_err();
        assert!(matches!(e, NotifyError::Send { .. }), "{e:?}");
        assert!(e.to_string().contains("WATCHDOG=1"), "{e}");
    }

    #[test]
    fn watchdog_interval_is_half_the_timeout_for_this_process_only() {
        let s = |v: &str| Some(OsString::from(v));
        let w = |usec: Option<OsString>, pid: Option<OsString>| {
            watchdog_interval(usec.as_deref(), pid.as_deref(), 4242)
        };
        assert_eq!(w(None, None).unwrap(), None);
        assert_eq!(w(s(""), None).unwrap(), None);
        assert_eq!(
            w(s("30000000"), None).unwrap(),
            Some(Duration::from_secs(15))
        );
        assert_eq!(
            w(s("30000000"), s("4242")).unwrap(),
            Some(Duration::from_secs(15))
        );
        assert_eq!(w(s("30000000"), s("1")).unwrap(), None);
        assert_eq!(w(s("1"), None).unwrap(), Some(Duration::ZERO));
        for bad in ["0", "-5", "30s", "1e6", " 30000000"] {
            let e = w(s(bad), None).unwrap_err();
            assert!(
                matches!(
                    e,
                    NotifyError::BadWatchdog {
                        name: "WATCHDOG_USEC",
                        ..
                    }
                ),
                "{bad}"
            );
        }
        assert!(matches!(
            w(s("30000000"), s("me")).unwrap_err(),
            NotifyError::BadWatchdog {
                name: "WATCHDOG_PID",
                ..
            }
        ));
    }

    #[test]
    fn watchdog_timer_pings_once_per_interval() {
        let t0 = Instant::now();
        let mut timer = WatchdogTimer::new(Duration::from_secs(15));
        assert_eq!(timer.next_due(t0), t0);
        assert!(timer.due(t0));
        assert!(!timer.due(t0 + Duration::from_secs(14)));
        assert_eq!(timer.next_due(t0), t0 + Duration::from_secs(15));
        assert!(timer.due(t0 + Duration::from_secs(15)));
        assert!(!timer.due(t0 + Duration::from_secs(29)));
        assert!(timer.due(t0 + Duration::from_secs(31)));
        // A stale `now` from before the last ping is simply not due.
        assert!(!timer.due(t0));
        assert!(timer.due(t0 + Duration::from_secs(46)));
    }
}
