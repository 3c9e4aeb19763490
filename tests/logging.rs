//! The daemon's log formats end to end: `gaugewise run --log-format ...` against the embedded broker, its stderr
//! in a scratch file (so never a terminal), stopped with SIGTERM. JSON gives one parseable object per line with
//! the event's fields beside `level` and `message`; text has no JSON and no escape codes off a terminal; `auto`
//! picks the journal only when `JOURNAL_STREAM` names stderr's own device and inode, and the journal path falls
//! back to JSON with one warning where no journal socket exists; an unknown format is a one-line usage error.
//! The pure choice is unit tested in `src/logformat.rs`; every wait here is bounded.

mod common;

use common::broker::{send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{wait_status, PlantSections};
use rumqttc::QoS;
use serde_json::Value;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

/// Where tracing-journald sends its datagrams (fixed in that crate). Where it exists, the journald cases are
/// skipped: they would write into the machine's real journal.
const JOURNAL_SOCKET: &str = "/run/systemd/journal/socket";

/// How long a stopping daemon may take: its own bound is 5 s (README, "Stopping"), plus start-up slack.
const STOP_WAIT: Duration = Duration::from_secs(15);

/// What the child's `JOURNAL_STREAM` is.
enum JournalStream {
    Unset,
    /// A fixed value (one that names no file of this test).
    Value(&'static str),
    /// `<dev>:<ino>` of the very file its stderr is, as systemd sets it for a unit logging to the journal.
    MatchingStderr,
}

/// Runs the daemon until it has connected, stops it with SIGTERM, checks it exited 0 and returns its log.
fn connect_and_stop(
    broker: &TestBroker,
    client_id: &str,
    format: Option<&str>,
    journal: JournalStream,
    name: &str,
) -> String {
    let run = Run::start(&config(broker.port(), client_id), format, journal);
    assert!(
        run.wait_log("connected", WAIT),
        "{name}: not connected:\n{}",
        run.log()
    );
    let (exit, log) = run.stop();
    assert_eq!(exit.and_then(|s| s.code()), Some(0), "{name}: log:\n{log}");
    log
}

/// `gaugewise run` with its stderr in a scratch file; killed if a test ends without stopping it.
struct Run {
    child: Child,
    log: PathBuf,
    _dir: tempfile::TempDir,
}

impl Run {
    fn start(config: &str, log_format: Option<&str>, journal: JournalStream) -> Run {
        let dir = tempfile::tempdir().expect("scratch dir");
        let config_path = dir.path().join("daemon.toml");
        std::fs::write(&config_path, config).expect("write config");
        let log = dir.path().join("stderr.log");
        let stderr = std::fs::File::create(&log).expect("log file");
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_gaugewise"));
        cmd.arg("run").arg("--config").arg(&config_path);
        if let Some(f) = log_format {
            cmd.args(["--log-format", f]);
        }
        cmd.env("GAUGEWISE_LOG", "info").env_remove("RUST_LOG");
        match journal {
            JournalStream::Unset => {
                cmd.env_remove("JOURNAL_STREAM");
            }
            JournalStream::Value(v) => {
                cmd.env("JOURNAL_STREAM", v);
            }
            JournalStream::MatchingStderr => {
                let meta = stderr.metadata().expect("fstat the log file");
                cmd.env("JOURNAL_STREAM", format!("{}:{}", meta.dev(), meta.ino()));
            }
        }
        let child = cmd
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(stderr)
            .spawn()
            .expect("start gaugewise run");
        Run {
            child,
            log,
            _dir: dir,
        }
    }

    fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Waits until the log contains `needle`, at most `timeout`.
    fn wait_log(&self, needle: &str, timeout: Duration) -> bool {
        let deadline = Instant::now() + timeout;
        loop {
            if self.log().contains(needle) {
                return true;
            }
            if Instant::now() >= deadline {
                return false;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// SIGTERM, then the exit status (None if it did not stop within `STOP_WAIT`), then the whole log.
    fn stop(mut self) -> (Option<ExitStatus>, String) {
        assert!(send_signal(self.child.id(), "TERM"), "cannot send SIGTERM");
        let deadline = Instant::now() + STOP_WAIT;
        let status = loop {
            if let Some(s) = self.child.try_wait().expect("try_wait") {
                break Some(s);
            }
            if Instant::now() >= deadline {
                break None;
            }
            std::thread::sleep(Duration::from_millis(20));
        };
        (status, self.log())
    }
}

impl Drop for Run {
    fn drop(&mut self) {
        if self.child.try_wait().ok().flatten().is_none() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

fn config(port: u16, client_id: &str) -> String {
    // Variances are the test's own round numbers: any valid level model serves, nothing is checked against them.
    format!(
        "{}{}",
        level_default!(obs_var = 0.25, level_var = 0.01),
        PlantSections::new(port, client_id).render()
    )
}

/// Every line of `log` as a JSON object with a string `level` and `message`; panics naming the first that is not.
fn json_lines(log: &str) -> Vec<serde_json::Map<String, Value>> {
    assert!(!log.is_empty(), "no log at all");
    log.lines()
        .map(|line| {
            let v: Value = serde_json::from_str(line)
                .unwrap_or_else(|e| panic!("not a JSON line ({e}): {line:?}\nwhole log:\n{log}"));
            let obj = v
                .as_object()
                .unwrap_or_else(|| panic!("not a JSON object: {line:?}"))
                .clone();
            for key in ["timestamp", "level", "target", "message"] {
                assert!(
                    obj.get(key).is_some_and(Value::is_string),
                    "no string {key:?} in {line:?}"
                );
            }
            assert!(
                ["ERROR", "WARN", "INFO", "DEBUG", "TRACE"]
                    .contains(&obj["level"].as_str().unwrap()),
                "unknown level in {line:?}"
            );
            obj
        })
        .collect()
}

/// Text lines as tracing-subscriber's plain formatter writes them; no JSON object and no ANSI escape anywhere.
fn assert_plain_text(log: &str) {
    assert!(!log.is_empty(), "no log at all");
    assert!(
        !log.contains('\u{1b}'),
        "escape codes with stderr not a terminal:\n{log:?}"
    );
    for line in log.lines() {
        assert!(
            serde_json::from_str::<Value>(line).is_err(),
            "a JSON line in the text log: {line:?}"
        );
    }
    assert!(
        log.lines()
            .any(|l| l.contains(" INFO ") && l.contains("starting")),
        "no INFO starting line:\n{log}"
    );
}

fn journal_socket_present() -> bool {
    let present = Path::new(JOURNAL_SOCKET).exists();
    if present {
        eprintln!(
            "skipped: {JOURNAL_SOCKET} exists, and this case would log into the machine's journal"
        );
    }
    present
}

#[test]
fn json_lines_carry_level_message_and_the_event_fields() {
    let broker = TestBroker::embedded();
    let client_id = "gw-logging-json";
    let watcher = TestClient::connect(broker.port());
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let run = Run::start(
        &config(broker.port(), client_id),
        Some("json"),
        JournalStream::Unset,
    );
    assert!(
        wait_status(&status, "online", WAIT).is_some(),
        "daemon not online:\n{}",
        run.log()
    );
    // One refused message (its payload is not JSON) gives a WARN event with fields of its own.
    watcher.publish(
        "brackenfield/raw/TT-101",
        "seventy-two",
        QoS::AtLeastOnce,
        false,
    );
    assert!(
        run.wait_log("input refused", WAIT),
        "no refusal logged:\n{}",
        run.log()
    );
    let (exit, log) = run.stop();
    assert_eq!(exit.and_then(|s| s.code()), Some(0), "log:\n{log}");

    let lines = json_lines(&log);
    let starting = lines
        .iter()
        .find(|l| {
            l["message"]
                .as_str()
                .is_some_and(|m| m.ends_with(" starting"))
        })
        .unwrap_or_else(|| panic!("no starting line:\n{log}"));
    assert_eq!(starting["level"], "INFO");
    assert!(
        starting["config"]
            .as_str()
            .is_some_and(|c| c.ends_with("daemon.toml")),
        "the event's own field is not beside the message: {starting:?}"
    );
    let refused = lines
        .iter()
        .find(|l| {
            l["message"]
                .as_str()
                .is_some_and(|m| m.starts_with("input refused"))
        })
        .unwrap_or_else(|| panic!("no refusal line:\n{log}"));
    assert_eq!(refused["level"], "WARN");
    // The reason label is the one README's "Bad messages" lists for a payload that is not JSON.
    assert_eq!(refused["reason"], "not_json", "{refused:?}");
    assert!(
        lines.iter().any(|l| l["message"]
            .as_str()
            .is_some_and(|m| m.starts_with("stopped"))),
        "no stopped line:\n{log}"
    );
}

#[test]
fn text_has_no_json_and_no_escape_codes_off_a_terminal() {
    let broker = TestBroker::embedded();
    // Explicit text, then auto with no JOURNAL_STREAM, then auto with one inherited from elsewhere (it names a
    // device and inode that are not this stderr's): all three are the same plain text.
    let cases = [
        ("text", Some("text"), JournalStream::Unset),
        ("auto, unset", None, JournalStream::Unset),
        ("auto, other stream", None, JournalStream::Value("1:2")),
    ];
    for (i, (name, format, journal)) in cases.into_iter().enumerate() {
        let log = connect_and_stop(
            &broker,
            &format!("gw-logging-text-{i}"),
            format,
            journal,
            name,
        );
        assert_plain_text(&log);
    }
}

#[test]
fn journal_without_its_socket_falls_back_to_json_with_one_warning() {
    if journal_socket_present() {
        return;
    }
    let broker = TestBroker::embedded();
    // auto with JOURNAL_STREAM naming this very stderr (as systemd sets it) chooses the journal; so does the
    // explicit format whatever the variable says.
    let cases = [
        ("auto, matching stream", None, JournalStream::MatchingStderr),
        ("journald", Some("journald"), JournalStream::Unset),
    ];
    for (i, (name, format, journal)) in cases.into_iter().enumerate() {
        let log = connect_and_stop(
            &broker,
            &format!("gw-logging-journal-{i}"),
            format,
            journal,
            name,
        );
        let lines = json_lines(&log);
        let warnings: Vec<_> = lines
            .iter()
            .filter(|l| {
                l["message"]
                    .as_str()
                    .is_some_and(|m| m.contains("systemd journal"))
            })
            .collect();
        assert_eq!(warnings.len(), 1, "{name}: log:\n{log}");
        assert_eq!(warnings[0]["level"], "WARN", "{name}");
        assert_eq!(warnings[0]["socket"], JOURNAL_SOCKET, "{name}");
        // It comes first, so whoever reads the log learns at once why it is not in the journal.
        assert_eq!(&lines[0], warnings[0], "{name}: log:\n{log}");
    }
}

#[test]
fn an_unknown_format_is_a_one_line_usage_error() {
    // Rejected while parsing the arguments, before the configuration is read, so the file need not exist.
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args([
            "run",
            "--config",
            "no-such-file.toml",
            "--log-format",
            "syslog",
        ])
        .env_remove("JOURNAL_STREAM")
        .output()
        .expect("binary runs");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "stderr: {err}");
    assert_eq!(err.lines().count(), 1, "not one line: {err}");
    assert!(err.starts_with("error: "), "{err}");
    for needle in ["'syslog'", "--log-format", "auto, text, json, journald"] {
        assert!(err.contains(needle), "{needle:?} not in: {err}");
    }
}
