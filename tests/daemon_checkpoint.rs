//! Restart without forgetting: `gaugewise run` keeps its channels' state in `[state] dir` and takes it back at
//! start. Against the embedded broker and, when installed, a real Mosquitto:
//!
//! - SIGKILL mid-stream, then restart: every channel continues from the last periodic checkpoint, and every
//!   estimate after the restart is within one std of an uninterrupted run (the issue's target; the reference is
//!   `Channel` fed every sample without a break, the path `replay` takes). Samples the killed daemon took in after
//!   its last checkpoint are lost to its state, which is why the bound is the std and not equality. Samples sent
//!   while it is down wait in its persistent session and are filtered after the restart; nothing is published
//!   twice.
//! - SIGTERM, then restart: the state saved at shutdown holds every sample, so the continuation equals the
//!   uninterrupted run to rounding.
//!
//! And against the embedded broker only (the broker plays no part in it): a corrupt checkpoint is moved aside
//! with a warning and the daemon starts fresh; a state directory that cannot be written is reported once, the
//! daemon keeps filtering, and saving resumes once the directory can be written again.
//!
//! Every wait is bounded; a few hundred messages per test on loopback.

mod common;

use common::broker::{recv_n, send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use gaugewise::channel::Channel;
use gaugewise::config::Config;
use gaugewise::publish::OutputMessage;
use gaugewise::runtime::persist::{self, Saved};
use rumqttc::QoS;
use std::collections::HashMap;
use std::path::Path;
use std::time::{Duration, Instant, SystemTime};

const MODELS: &str = concat!(
    level_default!(obs_var = 0.0004, level_var = 1e-6),
    tt101_lag!(mean = 72.0),
    ft201_arma11!(),
    lt_trend!("LT-301"),
);

const CHANNELS: [&str; 3] = ["TT-101", "FT-201", "LT-301"];

fn config_text(port: u16, client_id: &str, state_dir: &Path, save_every_s: f64) -> String {
    format!(
        "{MODELS}\n[state]\ndir = {:?}\nsave_every_s = {save_every_s}\n{}",
        state_dir.display().to_string(),
        PlantSections::new(port, client_id).render()
    )
}

/// Sample k of `channel`, drawn from the channel's own model (seeded), so the filter's std is an honest
/// account of its error: TT-101 a lag around 72 degC (every 17th sample missing), FT-201 an ARMA(1,1) flow around
/// 12 m3/h, LT-301 a level rising about 1 mm per sample.
fn sample(channel: &str, t0: f64, k: usize) -> (f64, Option<f64>) {
    let t = t0 + 10.0 * k as f64;
    let seed = match channel {
        "TT-101" => 101,
        "FT-201" => 201,
        _ => 301,
    };
    let mut n = gaugewise::simulate::Noise::new(seed);
    let (mut x, mut slope, mut e_prev) = (0.0_f64, 0.001_f64, 0.0_f64);
    let mut y = 0.0;
    for _ in 0..=k {
        match channel {
            "TT-101" => {
                let phi = (-10.0_f64 / 300.0).exp();
                x = phi * x + 0.015_f64.sqrt() * n.normal();
                y = 72.0 + x + 0.2 * n.normal();
            }
            "FT-201" => {
                let e = 0.5_f64.sqrt() * n.normal();
                x = 0.8 * x + e - 0.3 * e_prev;
                e_prev = e;
                y = 12.0 + x;
            }
            _ => {
                x += slope + 1e-3 * n.normal();
                slope += 1e-4 * n.normal();
                y = 1.5 + x + 0.02 * n.normal();
            }
        }
    }
    match channel {
        "TT-101" => (t, (k % 17 != 5).then_some(y)),
        "FT-201" => (t + 0.25, Some(y)),
        _ => (t + 0.5, Some(y)),
    }
}

fn payload(t: f64, v: Option<f64>) -> String {
    match v {
        Some(v) => format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
        None => format!(r#"{{"t":{t:?},"v":null}}"#),
    }
}

/// Publishes samples `ks` of every channel and returns the outputs they produced, by channel and time.
fn publish(broker: &TestBroker, t0: f64, ks: std::ops::Range<usize>) -> usize {
    let publisher = TestClient::connect(broker.port());
    let n = ks.len() * CHANNELS.len();
    for k in ks {
        for ch in CHANNELS {
            let (t, v) = sample(ch, t0, k);
            publisher.publish(
                &format!("brackenfield/raw/{ch}"),
                payload(t, v),
                QoS::AtLeastOnce,
                false,
            );
        }
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");
    publisher.disconnect();
    n
}

/// Outputs by channel and time.
type Outputs = HashMap<(String, u64), OutputMessage>;

fn collect(
    outputs: &std::sync::mpsc::Receiver<common::broker::Message>,
    n: usize,
    daemon: &Daemon,
) -> Outputs {
    let got = recv_n(outputs, n, Duration::from_secs(20));
    assert_eq!(got.len(), n, "outputs missing; log:\n{}", daemon.log());
    got.iter()
        .map(|m| {
            let o = OutputMessage::parse(&m.payload).expect("output JSON");
            ((o.channel.clone(), o.time.to_bits()), o)
        })
        .collect()
}

/// Publishes samples `ks` of every channel and returns the outputs they produced, by channel and time.
fn feed(
    broker: &TestBroker,
    outputs: &std::sync::mpsc::Receiver<common::broker::Message>,
    t0: f64,
    ks: std::ops::Range<usize>,
    daemon: &Daemon,
) -> Outputs {
    let n = publish(broker, t0, ks);
    collect(outputs, n, daemon)
}

/// The uninterrupted run: each channel fed samples 0..n without a break.
fn reference(t0: f64, n: usize) -> HashMap<(String, u64), (f64, f64)> {
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    let mut out = HashMap::new();
    for ch in CHANNELS {
        let mut c = Channel::with_flags(models.model_for(ch), models.flags_for(ch)).unwrap();
        for k in 0..n {
            let (t, v) = sample(ch, t0, k);
            let o = c.on_sample(t, v);
            out.insert(
                (ch.to_string(), t.to_bits()),
                (o.step.unwrap().estimate, o.std()),
            );
        }
    }
    out
}

/// The checkpoint as the daemon last wrote it (read without disturbing the daemon's saves).
fn checkpoint(dir: &Path) -> Option<Saved> {
    persist::read(dir, "channels")
}

/// Waits until the checkpoint holds sample `k` of every channel.
fn wait_checkpoint_at(dir: &Path, t0: f64, k: usize, daemon: &Daemon) -> Saved {
    let deadline = Instant::now() + Duration::from_secs(15);
    loop {
        if let Some(saved) = checkpoint(dir) {
            let at = |ch: &str| {
                saved
                    .channels
                    .iter()
                    .find(|e| e.name == ch)
                    .and_then(|e| e.channel.last_time())
            };
            if CHANNELS
                .iter()
                .all(|ch| at(ch) == Some(sample(ch, t0, k).0))
            {
                return saved;
            }
        }
        assert!(
            Instant::now() < deadline,
            "no checkpoint with sample {k}; log:\n{}",
            daemon.log()
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn start(
    broker: &TestBroker,
    client_id: &str,
    state: &Path,
    save_every_s: f64,
    status: &std::sync::mpsc::Receiver<common::broker::Message>,
) -> Daemon {
    let daemon = Daemon::start(&config_text(broker.port(), client_id, state, save_every_s));
    assert!(
        wait_status(status, "online", Duration::from_secs(10)).is_some(),
        "{}: no online status; log:\n{}",
        broker.name(),
        daemon.log()
    );
    daemon
}

fn kill_and_restart_against(broker: &TestBroker) {
    let client_id = format!(
        "gaugewise-test-ckpt-{}-{}",
        broker.name(),
        std::process::id()
    );
    let state = tempfile::tempdir().unwrap();
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let t0 = (epoch_now() - 100_000.0).floor();
    let reference = reference(t0, 260);

    // Run 1: 120 samples per channel, a checkpoint that holds them all, 6 more, then SIGKILL. Saves every 2 s
    // and the 6 samples take a fraction of that, so the kill almost always comes before the next save and those
    // samples are lost to the state: as many as one default save period (60 s) holds at this 10 s interval.
    let mut daemon = start(broker, &client_id, state.path(), 2.0, &status);
    let before = feed(broker, &outputs, t0, 0..120, &daemon);
    wait_checkpoint_at(state.path(), t0, 119, &daemon);
    let before_kill = feed(broker, &outputs, t0, 120..126, &daemon);
    assert!(send_signal(daemon.child.id(), "KILL"));
    daemon.wait(Duration::from_secs(5)).expect("killed");
    let saved = checkpoint(state.path()).expect("a checkpoint survives the kill");
    let saved_k: Vec<u64> = saved
        .channels
        .iter()
        .map(|e| ((e.channel.last_time().unwrap() - t0) / 10.0) as u64)
        .collect();
    drop(daemon);
    // Before the kill, the daemon matched the uninterrupted run exactly (it is the same code path).
    for (key, out) in before.iter().chain(&before_kill) {
        let (est, _) = reference[key];
        assert!((out.estimate.unwrap() - est).abs() <= 1e-9 * est.abs().max(1.0));
    }

    // While it is down, samples 126..132 arrive: the broker keeps them for its persistent session.
    let queued = publish(broker, t0, 126..132);

    // Run 2: restored from the last checkpoint; the queued samples first, then 132..220.
    let mut daemon = start(broker, &client_id, state.path(), 1.0, &status);
    let log = daemon.log();
    assert!(
        log.contains("channels taken back from the saved state") && log.contains("restored=3"),
        "{log}"
    );
    let mut after = collect(&outputs, queued, &daemon);
    after.extend(feed(broker, &outputs, t0, 132..220, &daemon));
    // Nothing the first run published is published again (its samples were taken from the broker).
    for key in after.keys() {
        assert!(
            !before.contains_key(key) && !before_kill.contains_key(key),
            "{key:?} published twice"
        );
    }
    let mut worst: f64 = 0.0;
    for (key, out) in &after {
        let (est, _) = reference[key];
        // The restarted channel's own std: its honest uncertainty, grown over the samples it lost.
        let std = out.std.unwrap();
        let d = (out.estimate.unwrap() - est).abs();
        // An ARMA channel observes its signal exactly (std 0): there, rounding is the bound.
        let rounding = 1e-9 * est.abs().max(1.0);
        assert!(
            d <= std.max(rounding),
            "{key:?}: {} after the restart, {est} uninterrupted, std {std}",
            out.estimate.unwrap()
        );
        if std > 0.0 {
            worst = worst.max(d / std);
        }
    }
    println!(
        "{}: SIGKILL after sample 125, the last checkpoint held samples up to {saved_k:?}; \
         after the restart the largest |estimate - uninterrupted| is {worst:.3} std",
        broker.name()
    );

    // SIGTERM saves everything: run 3 carries on exactly.
    assert!(send_signal(daemon.child.id(), "TERM"));
    let code = daemon
        .wait(Duration::from_secs(5))
        .expect("stops on SIGTERM");
    assert!(code.success(), "log:\n{}", daemon.log());
    drop(daemon);
    let saved = checkpoint(state.path()).expect("saved at shutdown");
    assert!(saved
        .channels
        .iter()
        .all(|e| e.channel.last_time() == Some(sample(&e.name, t0, 219).0)));
    let daemon = start(broker, &client_id, state.path(), 1.0, &status);
    let resumed = feed(broker, &outputs, t0, 220..260, &daemon);
    // After the kill, run 2 was no longer the uninterrupted run, so run 3 is compared with a channel restored
    // from the shutdown checkpoint and fed the same samples.
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    for e in &saved.channels {
        let mut c = Channel::resume(&e.channel, models.flags_for(&e.name)).unwrap();
        for k in 220..260 {
            let (t, v) = sample(&e.name, t0, k);
            let want = c.on_sample(t, v);
            let got = &resumed[&(e.name.clone(), t.to_bits())];
            let (a, b) = (got.estimate.unwrap(), want.step.unwrap().estimate);
            assert!(
                (a - b).abs() <= 1e-9 * b.abs().max(1.0),
                "{}: sample {k}: {a} after a clean restart, {b} from the saved state",
                e.name
            );
        }
    }
    drop(daemon);
}

#[test]
fn sigkill_and_restart_continue_from_the_last_checkpoint() {
    for broker in TestBroker::all() {
        kill_and_restart_against(&broker);
    }
}

#[test]
fn a_corrupt_checkpoint_is_moved_aside_and_the_daemon_starts_fresh() {
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-ckpt-corrupt-{}", std::process::id());
    let state = tempfile::tempdir().unwrap();
    std::fs::write(
        state.path().join("channels"),
        b"GWSTATE\n this is not what the daemon wrote",
    )
    .unwrap();
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let daemon = start(&broker, &client_id, state.path(), 1.0, &status);
    let log = daemon.log();
    assert!(
        log.contains("is corrupt") && log.contains("moved aside"),
        "{log}"
    );
    let aside: Vec<String> = std::fs::read_dir(state.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with("channels.corrupt-"))
        .collect();
    assert_eq!(aside.len(), 1, "the damaged file is kept for a look");
    // Fresh start: the channels filter like new ones, and a good checkpoint replaces the damaged one.
    let t0 = (epoch_now() - 100_000.0).floor();
    let got = feed(&broker, &outputs, t0, 0..10, &daemon);
    let reference = reference(t0, 10);
    for (key, out) in &got {
        assert!((out.estimate.unwrap() - reference[key].0).abs() <= 1e-9 * 72.0);
    }
    wait_checkpoint_at(state.path(), t0, 9, &daemon);
}

#[test]
fn an_unwritable_state_directory_is_reported_once_and_retried() {
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-ckpt-ro-{}", std::process::id());
    let scratch = tempfile::tempdir().unwrap();
    // A regular file where the state directory's parent should be: no save can succeed, whoever runs the test
    // (file permissions would not stop root).
    let blocker = scratch.path().join("blocker");
    std::fs::write(&blocker, b"in the way").unwrap();
    let state = blocker.join("state");
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = start(&broker, &client_id, &state, 1.0, &status);
    let t0 = (epoch_now() - 100_000.0).floor();
    feed(&broker, &outputs, t0, 0..10, &daemon);
    // At least three failed saves, logged once.
    std::thread::sleep(Duration::from_millis(3500));
    let log = daemon.log();
    assert_eq!(
        log.matches("cannot save channel state").count(),
        1,
        "one error line for a repeated failure; log:\n{log}"
    );
    // Still filtering.
    feed(&broker, &outputs, t0, 10..20, &daemon);
    // The way is cleared: the next save creates the directory and says so.
    let cleared = SystemTime::now();
    std::fs::remove_file(&blocker).unwrap();
    wait_checkpoint_at(&state, t0, 19, &daemon);
    assert!(std::fs::metadata(state.join("channels"))
        .unwrap()
        .modified()
        .unwrap()
        .duration_since(cleared)
        .is_ok());
    // The line follows the write by a moment.
    assert!(
        daemon.wait_log("channel state saved again after", 1, Duration::from_secs(5)),
        "recovery is logged; log:\n{}",
        daemon.log()
    );
    assert!(send_signal(daemon.child.id(), "TERM"));
    let code = daemon.wait(Duration::from_secs(5)).expect("stops");
    assert!(code.success());
}
