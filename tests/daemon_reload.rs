//! `gaugewise run` as a service: configuration reload on SIGHUP and the systemd notifications, against the embedded
//! broker, with a datagram socket in a scratch directory playing systemd's part (`NOTIFY_SOCKET`).
//!
//! One daemon runs through a whole story: samples under the first configuration; a new file that gives TT-101 a
//! different model, adds a pattern for channels not seen yet and changes a broker key; SIGHUP; samples again (TT-101
//! restarted with its new model, FT-201 carrying on with its state, LT-301 on the new pattern); an invalid file and
//! SIGHUP (refused, nothing changes); samples again; SIGTERM. The outputs are compared with `Channel` fed the same
//! samples, so "kept its state" and "restarted" are checked to the last bit, not guessed from the model field.
//! Every wait is bounded; nothing is timed.

mod common;

use common::broker::{recv_n, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use gaugewise::channel::Channel;
use gaugewise::config::Config;
use gaugewise::publish::OutputMessage;
use rumqttc::QoS;
use std::collections::HashMap;
use std::os::unix::net::UnixDatagram;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{self, Receiver};
use std::time::{Duration, Instant};

/// systemd's side of the notification protocol: every datagram received, in order.
struct FakeSystemd {
    path: PathBuf,
    messages: Receiver<String>,
    seen: Vec<String>,
}

impl FakeSystemd {
    fn start(dir: &Path) -> FakeSystemd {
        let path = dir.join("notify.sock");
        let socket = UnixDatagram::bind(&path).expect("bind the notify socket");
        socket
            .set_read_timeout(Some(Duration::from_millis(100)))
            .unwrap();
        let (tx, messages) = mpsc::channel();
        std::thread::spawn(move || {
            let mut buf = [0u8; 4096];
            loop {
                match socket.recv(&mut buf) {
                    Ok(n) => {
                        if tx
                            .send(String::from_utf8_lossy(&buf[..n]).into_owned())
                            .is_err()
                        {
                            return;
                        }
                    }
                    Err(e)
                        if matches!(
                            e.kind(),
                            std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut
                        ) => {}
                    Err(_) => return,
                }
            }
        });
        FakeSystemd {
            path,
            messages,
            seen: Vec::new(),
        }
    }

    /// Waits for a datagram with the assignment `line` (e.g. `READY=1`); returns the whole datagram.
    fn wait_for(&mut self, line: &str, timeout: Duration) -> Option<String> {
        let deadline = Instant::now() + timeout;
        while let Some(left) = deadline.checked_duration_since(Instant::now()) {
            let m = self.messages.recv_timeout(left).ok()?;
            self.seen.push(m.clone());
            if m.lines().any(|l| l == line) {
                return Some(m);
            }
        }
        None
    }

    fn count(&mut self, line: &str) -> usize {
        while let Ok(m) = self.messages.try_recv() {
            self.seen.push(m);
        }
        self.seen
            .iter()
            .filter(|m| m.lines().any(|l| l == line))
            .count()
    }
}

const MODELS_V1: &str = concat!(
    level_default!(obs_var = 0.25, level_var = 0.01),
    tt101_lag!(mean = 72.5),
);

/// TT-101 gets another model; LT-* channels (none seen yet) get one of their own; the default is unchanged.
const MODELS_V2: &str = concat!(
    level_default!(obs_var = 0.25, level_var = 0.01),
    r#"
[[channels.override]]
match = "TT-101"
model = "trend"
interval = 10.0
obs_var = 0.04
level_var = 0.001
slope_var = 1e-6

[[channels.override]]
match = "LT-*"
model = "lag"
interval = 10.0
mean = 1.5
tau = 600.0
state_var = 0.0001
obs_var = 0.0004
"#
);

fn daemon_sections(port: u16, client_id: &str, keep_alive_s: u32) -> String {
    PlantSections {
        keep_alive_s,
        reconnect: Some((0.1, 1.0)),
        ..PlantSections::new(port, client_id)
    }
    .render()
}

fn payload(t: f64, v: f64) -> String {
    format!(r#"{{"t":{t:?},"v":{v:?}}}"#)
}

/// Sample k of a channel: a value near the channel's level with a deterministic wobble.
fn value(channel: &str, k: usize) -> f64 {
    let wobble = ((k * 37 % 11) as f64 - 5.0) / 10.0;
    match channel {
        "TT-101" => 72.0 + wobble,
        "FT-201" => 12.0 + 0.8 * wobble,
        _ => 1.5 + 0.001 * k as f64 + 0.01 * wobble,
    }
}

/// Publishes samples `ks` of `channels` and returns the outputs, grouped by channel in arrival order.
fn exchange(
    publisher: &TestClient,
    outputs: &Receiver<common::broker::Message>,
    channels: &[&str],
    ks: std::ops::Range<usize>,
    t0: f64,
    log: impl Fn() -> String,
) -> HashMap<String, Vec<OutputMessage>> {
    let mut n = 0;
    for k in ks {
        for (j, c) in channels.iter().enumerate() {
            let t = t0 + 10.0 * k as f64 + 0.25 * j as f64;
            publisher.publish(
                &format!("brackenfield/raw/{c}"),
                payload(t, value(c, k)),
                QoS::AtLeastOnce,
                false,
            );
            n += 1;
        }
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");
    let got = recv_n(outputs, n, Duration::from_secs(15));
    assert_eq!(
        got.len(),
        n,
        "one output per sample; daemon log:\n{}",
        log()
    );
    let mut by: HashMap<String, Vec<OutputMessage>> = HashMap::new();
    for m in got {
        let out = OutputMessage::parse(&m.payload).unwrap();
        by.entry(out.channel.clone()).or_default().push(out);
    }
    by
}

/// Feeds `reference` the samples `ks` of `channel` and checks each against the daemon's output.
fn check(
    reference: &mut Channel,
    channel: &str,
    channel_index: usize,
    ks: std::ops::Range<usize>,
    t0: f64,
    outs: &[OutputMessage],
    phase: &str,
) {
    assert_eq!(outs.len(), ks.len(), "{phase} {channel}");
    for (k, out) in ks.zip(outs) {
        let t = t0 + 10.0 * k as f64 + 0.25 * channel_index as f64;
        let want = reference.on_sample(t, Some(value(channel, k)));
        let what = format!("{phase} {channel} sample {k}");
        assert_eq!(out.time, t, "{what}");
        assert_eq!(out.model, reference.spec().kind().to_string(), "{what}");
        assert_eq!(out.status, want.status.as_str(), "{what}");
        let step = want.step.expect("every sample here is filtered");
        close(out.estimate, step.estimate, &format!("{what} estimate"));
        close(out.std, want.std(), &format!("{what} std"));
    }
}

/// Equal to rounding (the JSON carries every bit; the margin is for nothing but safety); JSON null for a value
/// that is not finite (a std while a model is still diffuse).
fn close(got: Option<f64>, want: f64, what: &str) {
    match got {
        None => assert!(!want.is_finite(), "{what}: got null, expected {want}"),
        Some(g) => assert!(
            (g - want).abs() <= 1e-12 * want.abs().max(1.0),
            "{what}: got {g}, expected {want}"
        ),
    }
}

#[test]
fn sighup_applies_new_models_keeps_unchanged_channels_and_refuses_a_bad_file() {
    let broker = TestBroker::embedded();
    let dir = tempfile::tempdir().unwrap();
    let mut systemd = FakeSystemd::start(dir.path());
    let client_id = format!("gaugewise-test-reload-{}", std::process::id());
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );

    let v1 = format!(
        "{MODELS_V1}{}",
        daemon_sections(broker.port(), &client_id, 5)
    );
    // A broker key changes too: not applied by a reload, and the log must say so.
    let v2 = format!(
        "{MODELS_V2}{}",
        daemon_sections(broker.port(), &client_id, 7)
    );
    // A typo in a key: the whole file is refused.
    let v3 = v2.replacen("obs_var = 0.04", "obs_vr = 0.04", 1);
    assert_ne!(v3, v2);

    let notify = systemd.path.display().to_string();
    let mut daemon = Daemon::start_with_env(
        &v1,
        &[
            ("NOTIFY_SOCKET", notify.as_str()),
            // 0.4 s: a ping every 0.2 s.
            ("WATCHDOG_USEC", "400000"),
        ],
    );
    let ready = systemd.wait_for("READY=1", Duration::from_secs(10));
    assert!(ready.is_some(), "no READY=1; daemon log:\n{}", daemon.log());
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "no online status; daemon log:\n{}",
        daemon.log()
    );
    assert!(
        systemd
            .wait_for("WATCHDOG=1", Duration::from_secs(10))
            .is_some(),
        "no watchdog ping"
    );

    let t0 = (epoch_now() - 100_000.0).floor();
    let publisher = TestClient::connect(broker.port());
    let log = || daemon.log();
    let v1_models = Config::from_str(&v1, "v1").unwrap().channels;
    let v2_models = Config::from_str(&v2, "v2").unwrap().channels;
    let channel = |models: &gaugewise::config::ChannelConfig, name: &str| {
        Channel::with_flags(models.model_for(name), models.flags_for(name)).unwrap()
    };

    // Phase A: the first configuration.
    let mut tt = channel(&v1_models, "TT-101");
    let mut ft = channel(&v1_models, "FT-201");
    let a = exchange(&publisher, &outputs, &["TT-101", "FT-201"], 0..12, t0, log);
    check(&mut tt, "TT-101", 0, 0..12, t0, &a["TT-101"], "A");
    check(&mut ft, "FT-201", 1, 0..12, t0, &a["FT-201"], "A");
    assert_eq!(a["TT-101"][0].model, "lag");

    // Reload with the second configuration.
    daemon.rewrite_config(&v2);
    daemon.signal("HUP");
    assert!(
        daemon.wait_log("configuration reloaded", 1, Duration::from_secs(10)),
        "no reload; daemon log:\n{}",
        daemon.log()
    );
    let reloading = systemd.wait_for("RELOADING=1", Duration::from_secs(5));
    assert!(reloading.is_some(), "no RELOADING=1: {:?}", systemd.seen);
    let ready = systemd.wait_for("READY=1", Duration::from_secs(5));
    assert!(
        ready
            .as_deref()
            .is_some_and(|m| m.contains("STATUS=reloaded: 1 channel restarted, 1 kept")),
        "no READY=1 with the reload's status after RELOADING=1: {ready:?}"
    );
    let text = daemon.log();
    assert!(
        text.contains("channel restarts with its new configuration (model lag -> trend)")
            && text.contains("TT-101"),
        "{text}"
    );
    assert!(
        text.contains("reload: [broker] changed")
            && text.contains("not applied until the daemon restarts"),
        "{text}"
    );

    // Phase B: TT-101 starts again with its new model; FT-201 carries on; LT-301 is new and gets the new pattern.
    let mut tt = channel(&v2_models, "TT-101");
    let mut lt = channel(&v2_models, "LT-301");
    let b = exchange(
        &publisher,
        &outputs,
        &["TT-101", "FT-201", "LT-301"],
        12..24,
        t0,
        log,
    );
    check(&mut tt, "TT-101", 0, 12..24, t0, &b["TT-101"], "B");
    check(&mut ft, "FT-201", 1, 12..24, t0, &b["FT-201"], "B");
    check(&mut lt, "LT-301", 2, 12..24, t0, &b["LT-301"], "B");
    assert_eq!(b["TT-101"][0].model, "trend");
    assert_eq!(b["LT-301"][0].model, "lag");
    assert_eq!(b["FT-201"][0].model, "level");

    // An invalid file: refused, with the key named, and everything runs on as before.
    daemon.rewrite_config(&v3);
    daemon.signal("HUP");
    assert!(
        daemon.wait_log("configuration reload refused", 1, Duration::from_secs(10)),
        "no refusal; daemon log:\n{}",
        daemon.log()
    );
    let text = daemon.log();
    let refusal = text
        .lines()
        .find(|l| l.contains("configuration reload refused"))
        .unwrap();
    assert!(
        refusal.contains("ERROR")
            && refusal.contains("still running on the previous configuration")
            && refusal.contains("obs_vr"),
        "{refusal}"
    );
    assert!(systemd
        .wait_for("RELOADING=1", Duration::from_secs(5))
        .is_some());
    let ready = systemd.wait_for("READY=1", Duration::from_secs(5));
    assert!(
        ready
            .as_deref()
            .is_some_and(|m| m.contains("STATUS=reload refused")),
        "{ready:?}"
    );

    let c = exchange(
        &publisher,
        &outputs,
        &["TT-101", "FT-201", "LT-301"],
        24..30,
        t0,
        log,
    );
    check(&mut tt, "TT-101", 0, 24..30, t0, &c["TT-101"], "C");
    check(&mut ft, "FT-201", 1, 24..30, t0, &c["FT-201"], "C");
    check(&mut lt, "LT-301", 2, 24..30, t0, &c["LT-301"], "C");

    daemon.signal("TERM");
    let exit = daemon.wait(Duration::from_secs(10));
    assert!(
        exit.is_some_and(|s| s.success()),
        "exit {exit:?}; daemon log:\n{}",
        daemon.log()
    );
    assert!(
        systemd
            .wait_for("STOPPING=1", Duration::from_secs(2))
            .is_some(),
        "no STOPPING=1: {:?}",
        systemd.seen
    );
    assert!(systemd.count("WATCHDOG=1") >= 1);
    assert_eq!(systemd.count("READY=1"), 3, "start and two reloads");
    let text = daemon.log();
    assert!(!text.contains("panicked"), "{text}");
}

#[test]
fn without_systemd_a_reload_still_works_and_nothing_is_sent() {
    // No NOTIFY_SOCKET: the daemon must not try to notify anyone, and SIGHUP must not end the process.
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-reload-plain-{}", std::process::id());
    let watcher = TestClient::connect(broker.port());
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let v1 = format!(
        "{MODELS_V1}{}",
        daemon_sections(broker.port(), &client_id, 5)
    );
    let mut daemon = Daemon::start(&v1);
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "no online status; daemon log:\n{}",
        daemon.log()
    );
    // The same file again: valid, nothing to change.
    daemon.signal("HUP");
    assert!(
        daemon.wait_log("configuration reloaded", 1, Duration::from_secs(10)),
        "{}",
        daemon.log()
    );
    assert!(daemon.log().contains("0 channels restarted"));
    assert!(
        daemon.child.try_wait().unwrap().is_none(),
        "SIGHUP ended the daemon"
    );
    // A file that is not there any more: refused, the daemon runs on.
    std::fs::remove_file(daemon.config_path()).unwrap();
    daemon.signal("HUP");
    assert!(
        daemon.wait_log("configuration reload refused", 1, Duration::from_secs(10)),
        "{}",
        daemon.log()
    );
    assert!(
        daemon.log().contains("cannot read config"),
        "{}",
        daemon.log()
    );
    daemon.signal("TERM");
    assert!(daemon
        .wait(Duration::from_secs(10))
        .is_some_and(|s| s.success()));
    let text = daemon.log();
    assert!(
        !text.contains("notifications off") && !text.contains("cannot notify"),
        "{text}"
    );
}
