//! The `gaugewise run` process as the daemon tests drive it: started from a configuration text with its log in a
//! scratch file, waited for with a bound, killed if a test ends without stopping it; plus the status wait and the
//! wall clock those tests share.

use super::broker::Message;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::mpsc::Receiver;
use std::time::{Duration, Instant};

/// The daemon process; killed if a test ends without stopping it.
pub struct Daemon {
    pub child: Child,
    config: PathBuf,
    log: PathBuf,
    _dir: tempfile::TempDir,
}

impl Daemon {
    /// Writes `config` to a scratch file and starts `gaugewise run` on it, logging at info level to a file.
    pub fn start(config: &str) -> Daemon {
        let dir = tempfile::tempdir().expect("scratch dir");
        let path = dir.path().join("daemon.toml");
        std::fs::write(&path, config).expect("write config");
        let log = dir.path().join("daemon.log");
        let child = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
            .args(["run", "--config"])
            .arg(&path)
            .env("GAUGEWISE_LOG", "info")
            .env_remove("RUST_LOG")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&log).expect("log file"))
            .spawn()
            .expect("start gaugewise run");
        Daemon {
            child,
            config: path,
            log,
            _dir: dir,
        }
    }

    /// The configuration file the daemon runs on (so `replay` can be given the very same file).
    pub fn config_path(&self) -> &Path {
        &self.config
    }

    pub fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Waits for the process to exit, at most `timeout`; None if it is still running.
    pub fn wait(&mut self, timeout: Duration) -> Option<ExitStatus> {
        let deadline = Instant::now() + timeout;
        loop {
            if let Some(status) = self.child.try_wait().expect("try_wait") {
                return Some(status);
            }
            if Instant::now() >= deadline {
                return None;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        if self.child.try_wait().ok().flatten().is_none() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// Waits for a status message whose `status` field is `want`.
pub fn wait_status(
    rx: &Receiver<Message>,
    want: &str,
    timeout: Duration,
) -> Option<serde_json::Value> {
    let deadline = Instant::now() + timeout;
    while let Some(left) = deadline.checked_duration_since(Instant::now()) {
        match rx.recv_timeout(left) {
            Ok(m) => {
                let doc = m.json();
                if doc["status"] == want {
                    return Some(doc);
                }
            }
            Err(_) => return None,
        }
    }
    None
}

/// Seconds since the Unix epoch, now.
pub fn epoch_now() -> f64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_secs_f64()
}

/// The daemon sections the end-to-end tests share, after their own `[channels]`/`[flags]` text: the broker on
/// loopback `port`, JSON samples `{"t":..,"v":..}` on `brackenfield/raw/<channel>` at QoS 1, outputs on
/// `brackenfield/clean/<channel>` at QoS 1 (plus `output_extra`, e.g. a `flags_topic = ...` line), the status
/// under the client id, and stale reports off so outputs can be counted exactly.
pub fn plant_daemon_sections(port: u16, client_id: &str, output_extra: &str) -> String {
    format!(
        r#"
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
keep_alive_s = 5

[[inputs]]
topic = "brackenfield/raw/+"
channel = "{{2}}"
payload = "json"
value = "/v"
time = "/t"
qos = 1

[output]
topic = "brackenfield/clean/{{channel}}"
{output_extra}
qos = 1

[status]
topic = "brackenfield/status/{client_id}"

[timing]
stale_after_s = 0
"#
    )
}
