//! The `gaugewise run` process as the daemon tests drive it: started from a configuration text with its log in a
//! scratch file, waited for with a bound, killed if a test ends without stopping it; the status wait and the wall
//! clock those tests share; and the configuration text they share (the plant's daemon sections and model tables).

use super::broker::{send_signal, Message};
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
        Daemon::start_with_env(config, &[])
    }

    /// As `start`, with `env` set in the daemon's environment (e.g. `NOTIFY_SOCKET` for a fake systemd).
    pub fn start_with_env(config: &str, env: &[(&str, &str)]) -> Daemon {
        let dir = tempfile::tempdir().expect("scratch dir");
        let path = dir.path().join("daemon.toml");
        std::fs::write(&path, config).expect("write config");
        let log = dir.path().join("daemon.log");
        let child = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
            .args(["run", "--config"])
            .arg(&path)
            .env("GAUGEWISE_LOG", "info")
            .env_remove("RUST_LOG")
            // A test run under systemd (or inside another test's fake) must not hand the daemon its notify
            // socket or watchdog: only a test that sets them in `env` gets them.
            .env_remove("NOTIFY_SOCKET")
            .env_remove("WATCHDOG_USEC")
            .env_remove("WATCHDOG_PID")
            .envs(env.iter().copied())
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

    /// Replaces the configuration file for a reload. Written beside and renamed, as an editor or a configuration
    /// tool would: the daemon never reads half a file.
    pub fn rewrite_config(&self, config: &str) {
        let tmp = self.config.with_extension("toml.new");
        std::fs::write(&tmp, config).expect("write the new config");
        std::fs::rename(&tmp, &self.config).expect("move the new config in place");
    }

    pub fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Waits until the log has `needle` at least `n` times, at most `timeout`.
    pub fn wait_log(&self, needle: &str, n: usize, timeout: Duration) -> bool {
        let deadline = Instant::now() + timeout;
        loop {
            if self.log().matches(needle).count() >= n {
                return true;
            }
            if Instant::now() >= deadline {
                return false;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Sends the signal `name` (`TERM`, `HUP`, ...) to the daemon.
    pub fn signal(&self, name: &str) {
        assert!(send_signal(self.child.id(), name), "kill -{name} failed");
    }

    /// SIGTERM, then waits for the exit, at most 10 s; None if it is still running.
    pub fn stop(&mut self) -> Option<ExitStatus> {
        self.signal("TERM");
        self.wait(Duration::from_secs(10))
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

// The shared configuration text. Every number in it is the tests' own construction for the invented Brackenfield
// Works (round values near each tag's level), not a published reference. The model tables are macros so that a
// test's `const MODELS` stays a constant (`concat!` of them) and its text is exactly what the test had before.

/// `[channels.default]`: a local level every 10 s with the given variances, for every channel no override names.
#[macro_export]
macro_rules! level_default {
    (obs_var = $obs:literal, level_var = $level:literal) => {
        concat!(
            "\n[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = ",
            stringify!($obs),
            "\nlevel_var = ",
            stringify!($level),
            "\n"
        )
    };
}

/// TT-101, the vessel temperature: a first-order lag around `mean` degC with a 300 s time constant.
#[macro_export]
macro_rules! tt101_lag {
    (mean = $mean:literal) => {
        concat!(
            "\n[[channels.override]]\nmatch = \"TT-101\"\nmodel = \"lag\"\ninterval = 10.0\nmean = ",
            stringify!($mean),
            "\ntau = 300.0\nstate_var = 0.015\nobs_var = 0.04\n"
        )
    };
}

/// FT-201, the feed flow: ARMA(1,1) around 12 m3/h.
#[macro_export]
macro_rules! ft201_arma11 {
    () => {
        "\n[[channels.override]]\nmatch = \"FT-201\"\nmodel = \"arma(1,1)\"\ninterval = 10.0\nmean = 12.0\nar = [0.8]\nma = [-0.3]\nvar = 0.5\n"
    };
}

/// The tank level as a local linear trend, for the channels `pattern` matches (`LT-301`, or a glob).
#[macro_export]
macro_rules! lt_trend {
    ($pattern:literal) => {
        concat!(
            "\n[[channels.override]]\nmatch = \"",
            $pattern,
            "\"\nmodel = \"trend\"\ninterval = 10.0\nobs_var = 0.0004\nlevel_var = 1e-6\nslope_var = 1e-8\n"
        )
    };
}

/// The daemon sections the end-to-end tests share, after their own `[channels]`/`[flags]` text: the broker on
/// loopback `port`, JSON samples `{"t":..,"v":..}` on `brackenfield/raw/<channel>` at QoS 1, outputs on
/// `brackenfield/clean/<channel>` at QoS 1, the status under the client id. Set the fields a test needs beside
/// `PlantSections::new(..)` and call `render`.
pub struct PlantSections<'a> {
    pub port: u16,
    pub client_id: &'a str,
    pub keep_alive_s: u32,
    /// `reconnect_min_s`, `reconnect_max_s`; None leaves the daemon's own backoff.
    pub reconnect: Option<(f64, f64)>,
    /// `stale_after_s`, `stale_every_s`; None turns stale reports off, so outputs can be counted exactly.
    pub stale: Option<(f64, f64)>,
    /// Lines added to `[output]`, e.g. a `flags_topic = ...` line.
    pub output_extra: &'a str,
    /// Tables after `[timing]`, e.g. `[metrics]`; starts with a newline to leave a blank line before them.
    pub extra: &'a str,
}

impl<'a> PlantSections<'a> {
    /// Keep-alive 5 s, the daemon's own backoff, no stale reports, nothing extra.
    pub fn new(port: u16, client_id: &'a str) -> PlantSections<'a> {
        PlantSections {
            port,
            client_id,
            keep_alive_s: 5,
            reconnect: None,
            stale: None,
            output_extra: "",
            extra: "",
        }
    }

    pub fn render(&self) -> String {
        let PlantSections {
            port,
            client_id,
            keep_alive_s,
            reconnect,
            stale,
            output_extra,
            extra,
        } = *self;
        // `{:?}` keeps a whole backoff a TOML float (`1.0`); the stale times are written as the tests always had
        // them (`0`, `0.5`): the daemon reads either form.
        let reconnect = reconnect.map_or(String::new(), |(min, max)| {
            format!("reconnect_min_s = {min:?}\nreconnect_max_s = {max:?}\n")
        });
        let output_extra = if output_extra.is_empty() {
            String::new()
        } else {
            format!("{output_extra}\n")
        };
        let inputs = plant_inputs(1);
        let stale = match stale {
            None => "stale_after_s = 0\n".to_string(),
            Some((after, every)) => format!("stale_after_s = {after}\nstale_every_s = {every}\n"),
        };
        format!(
            r#"
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
keep_alive_s = {keep_alive_s}
{reconnect}
{inputs}
[output]
topic = "brackenfield/clean/{{channel}}"
{output_extra}qos = 1

[status]
topic = "brackenfield/status/{client_id}"

[timing]
{stale}{extra}"#
        )
    }
}

/// The `[[inputs]]` table every daemon test uses: JSON samples `{"t":..,"v":..}` on `brackenfield/raw/<channel>`
/// at QoS `qos`.
pub fn plant_inputs(qos: u8) -> String {
    format!(
        r#"[[inputs]]
topic = "brackenfield/raw/+"
channel = "{{2}}"
payload = "json"
value = "/v"
time = "/t"
qos = {qos}
"#
    )
}
