//! `gaugewise run` as a process, against the embedded broker: a real MQTT client publishes samples for three
//! channels and reads the outputs. Checks one output per input, estimates equal to feeding the same samples to
//! `Channel` directly (the path `replay` takes), garbage counted and not fatal, the retained online/offline
//! status, the Last Will, and SIGTERM handling. Two tests run the daemon in-process through the library entry
//! (`runtime::run`) to see its report: a broker outage (a forwarder that drops the connections) with a persistent
//! session, and a stop while the broker is unreachable. Every wait is bounded.

mod common;

use common::broker::{recv_n, send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use gaugewise::channel::Channel;
use gaugewise::config::Config;
use gaugewise::publish::OutputMessage;
use gaugewise::runtime::{self, RunReport};
use rumqttc::QoS;
use std::collections::{BTreeMap, HashMap};
use std::net::{Shutdown, TcpListener, TcpStream};
use std::path::Path;
use std::process::Command;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

const CHANNELS: [&str; 3] = ["TT-101", "FT-201", "LT-301"];

/// The channel models of the test: one of each continuous-time family plus ARMA, as in `config/plant.toml`.
const MODELS: &str = concat!(
    level_default!(obs_var = 0.25, level_var = 0.01),
    tt101_lag!(mean = 72.5),
    ft201_arma11!(),
    lt_trend!("LT-30?"),
);

fn config_text(port: u16, client_id: &str, stale_after_s: f64) -> String {
    let sections = PlantSections {
        reconnect: Some((0.1, 1.0)),
        stale: Some((stale_after_s, 0.5)),
        ..PlantSections::new(port, client_id)
    };
    format!("{MODELS}{}", sections.render())
}

/// One input sample: channel, time, value (None: JSON null, a missing sample).
type Input = (&'static str, f64, Option<f64>);

/// About 200 samples over three channels, interleaved, with missing values, a late and a duplicate sample.
fn inputs(t0: f64) -> Vec<Input> {
    let mut out = Vec::new();
    for k in 0..66 {
        let t = t0 + 10.0 * k as f64;
        let wobble = ((k * 37 % 11) as f64 - 5.0) / 10.0;
        out.push(("TT-101", t, (k % 17 != 5).then_some(72.0 + wobble)));
        out.push((
            "FT-201",
            t + 0.25,
            (k % 23 != 7).then_some(12.0 + 0.8 * wobble),
        ));
        out.push((
            "LT-301",
            t + 0.5,
            Some(1.5 + 0.001 * k as f64 + 0.01 * wobble),
        ));
        if k == 30 {
            out.push(("TT-101", t - 25.0, Some(70.0))); // late
            out.push(("FT-201", t + 0.25, Some(12.3))); // duplicate
        }
    }
    out
}

fn payload(t: f64, v: Option<f64>) -> String {
    match v {
        Some(v) => format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
        None => format!(r#"{{"t":{t:?},"v":null}}"#),
    }
}

/// Relative closeness for the replay comparison; both None (JSON null) also counts.
fn close(a: Option<f64>, b: f64, what: &str) {
    match a {
        None => assert!(!b.is_finite(), "{what}: got null, expected {b}"),
        Some(a) => {
            let tol = 1e-12 * b.abs().max(1.0);
            assert!((a - b).abs() <= tol, "{what}: got {a}, expected {b}");
        }
    }
}

#[test]
fn daemon_filters_like_replay_and_stops_cleanly_on_sigterm() {
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-daemon-{}", std::process::id());
    let status_topic = format!("brackenfield/status/{client_id}");
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(&status_topic, QoS::AtLeastOnce);

    // Stale reports off (0): this test counts outputs exactly.
    let mut daemon = Daemon::start(&config_text(broker.port(), &client_id, 0.0));
    let online = wait_status(&status, "online", Duration::from_secs(10));
    assert!(
        online.is_some(),
        "no online status; daemon log:\n{}",
        daemon.log()
    );
    assert_eq!(online.unwrap()["client_id"], client_id.as_str());

    // Whole seconds in the past, so no sample is "in the future" of the receive time whatever the clock.
    let t0 = (epoch_now() - 100_000.0).floor();
    let samples = inputs(t0);
    let publisher = TestClient::connect(broker.port());
    for (i, (channel, t, v)) in samples.iter().enumerate() {
        publisher.publish(
            &format!("brackenfield/raw/{channel}"),
            payload(*t, *v),
            QoS::AtLeastOnce,
            false,
        );
        if i == 100 {
            // Garbage in the middle of the stream: refused and counted, the run goes on.
            publisher.publish(
                "brackenfield/raw/TT-101",
                "not json {",
                QoS::AtLeastOnce,
                false,
            );
            publisher.publish(
                "brackenfield/raw/FT-201",
                r#"{"t":1,"v":"#,
                QoS::AtLeastOnce,
                false,
            );
        }
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");

    let got = recv_n(&outputs, samples.len(), Duration::from_secs(15));
    assert_eq!(
        got.len(),
        samples.len(),
        "one output per input sample; daemon log:\n{}",
        daemon.log()
    );
    // Nothing more: the garbage produced no output.
    if let Ok(extra) = outputs.recv_timeout(Duration::from_millis(300)) {
        panic!("unexpected output {}: {}", extra.topic, extra.text());
    }

    // Per channel, the outputs must be what the channel's filter gives for the same samples in the same order.
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    let mut by_channel: HashMap<String, Vec<OutputMessage>> = HashMap::new();
    for m in &got {
        let out = OutputMessage::parse(&m.payload)
            .unwrap_or_else(|e| panic!("{}: {e}: {}", m.topic, m.text()));
        assert_eq!(m.topic, format!("brackenfield/clean/{}", out.channel));
        by_channel.entry(out.channel.clone()).or_default().push(out);
    }
    let mut statuses: HashMap<String, usize> = HashMap::new();
    for name in CHANNELS {
        let mut reference =
            Channel::with_flags(models.model_for(name), models.flags_for(name)).unwrap();
        let sent: Vec<&Input> = samples.iter().filter(|s| s.0 == name).collect();
        let outs = &by_channel[name];
        assert_eq!(outs.len(), sent.len(), "{name}");
        for (k, ((_, t, v), out)) in sent.iter().zip(outs).enumerate() {
            let want = reference.on_sample(*t, *v);
            let what = format!("{name} sample {k}");
            assert_eq!(out.time, *t, "{what}");
            assert_eq!(out.status, want.status.as_str(), "{what}");
            assert_eq!(out.model, reference.spec().kind().to_string(), "{what}");
            *statuses.entry(out.status.clone()).or_default() += 1;
            match want.step {
                Some(step) => {
                    close(out.estimate, step.estimate, &format!("{what} estimate"));
                    close(out.std, want.std(), &format!("{what} std"));
                    if step.innovation.is_finite() {
                        close(
                            out.innovation,
                            step.innovation,
                            &format!("{what} innovation"),
                        );
                    } else {
                        assert_eq!(out.innovation, None, "{what}");
                    }
                    if step.standardized.is_finite() {
                        close(
                            out.std_innovation,
                            step.standardized,
                            &format!("{what} std_innovation"),
                        );
                    } else {
                        assert_eq!(out.std_innovation, None, "{what}");
                    }
                }
                None => assert!(
                    out.estimate.is_none() && out.std.is_none(),
                    "{what}: dropped sample"
                ),
            }
            match v {
                Some(v) => assert_eq!(out.raw, Some(*v), "{what}"),
                None => assert_eq!(out.raw, None, "{what}"),
            }
        }
    }
    assert_eq!(statuses.get("late"), Some(&1), "{statuses:?}");
    assert_eq!(statuses.get("duplicate"), Some(&1), "{statuses:?}");
    assert!(
        statuses.get("missing").copied().unwrap_or(0) >= 4,
        "{statuses:?}"
    );

    // SIGTERM: exit 0 within 5 s, the retained status says offline.
    let pid = daemon.child.id();
    let asked = Instant::now();
    assert!(send_signal(pid, "TERM"), "cannot signal the daemon");
    let exit = daemon.wait(Duration::from_secs(5));
    let log = daemon.log();
    let exit = exit.unwrap_or_else(|| panic!("still running 5 s after SIGTERM; log:\n{log}"));
    assert!(exit.success(), "exit {exit:?}; log:\n{log}");
    assert!(asked.elapsed() < Duration::from_secs(5));
    assert!(
        wait_status(&status, "offline", WAIT).is_some(),
        "no offline status after SIGTERM; log:\n{log}"
    );
    // A subscriber arriving later sees the retained offline status.
    let late = TestClient::connect(broker.port());
    let retained = late.subscribe(&status_topic, QoS::AtLeastOnce);
    let m = retained.recv_timeout(WAIT).expect("retained status");
    assert!(m.retain, "status is retained");
    assert_eq!(m.json()["status"], "offline");

    // The garbage was counted by reason, and the summary at exit says so.
    assert!(log.contains("not_json"), "log:\n{log}");
    let summary = log
        .lines()
        .find(|l| l.contains("stopped:"))
        .unwrap_or_else(|| panic!("no summary; log:\n{log}"));
    assert!(
        summary.contains(&format!("received={}", samples.len() + 2)),
        "{summary}"
    );
    assert!(
        summary.contains(&format!("published={}", samples.len())),
        "{summary}"
    );
    assert!(summary.contains("rejected=2"), "{summary}");
    assert!(summary.contains("late=1 duplicate=1"), "{summary}");
    assert!(summary.contains("publish_dropped=0"), "{summary}");
}

#[test]
fn a_quiet_channel_reports_stale_forecasts_until_data_returns() {
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-stale-{}", std::process::id());
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/TT-101", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = Daemon::start(&config_text(broker.port(), &client_id, 0.5));
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "{}",
        daemon.log()
    );

    let publisher = TestClient::connect(broker.port());
    let t = (epoch_now() - 10.0).floor();
    publisher.publish(
        "brackenfield/raw/TT-101",
        payload(t, Some(72.0)),
        QoS::AtLeastOnce,
        false,
    );
    let first = recv_n(&outputs, 1, WAIT);
    assert_eq!(first.len(), 1, "{}", daemon.log());
    // Silence: after 0.5 s, stale reports every 0.5 s with a growing std and the forecast's time moving on.
    let stale = recv_n(&outputs, 3, Duration::from_secs(5));
    assert_eq!(stale.len(), 3, "{}", daemon.log());
    let docs: Vec<OutputMessage> = stale
        .iter()
        .map(|m| OutputMessage::parse(&m.payload).unwrap())
        .collect();
    for pair in docs.windows(2) {
        assert!(
            pair.iter().all(|d| d.status == "stale" && d.raw.is_none()),
            "{docs:?}"
        );
        assert!(pair[1].time > pair[0].time, "{docs:?}");
        assert!(pair[1].std.unwrap() > pair[0].std.unwrap(), "{docs:?}");
    }
    assert!(docs[0].time > t, "forecast ahead of the last sample");
    // Data returns: the next output is a real sample, filtered as if no stale report had been made.
    publisher.publish(
        "brackenfield/raw/TT-101",
        payload(t + 1.0, Some(72.2)),
        QoS::AtLeastOnce,
        false,
    );
    let back = loop {
        let m = recv_n(&outputs, 1, WAIT);
        assert_eq!(m.len(), 1, "{}", daemon.log());
        let doc = OutputMessage::parse(&m[0].payload).unwrap();
        if doc.status != "stale" {
            break doc;
        }
    };
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    let mut reference =
        Channel::with_flags(models.model_for("TT-101"), models.flags_for("TT-101")).unwrap();
    reference.on_sample(t, Some(72.0));
    let want = reference.on_sample(t + 1.0, Some(72.2));
    assert_eq!(back.status, "ok");
    close(
        back.estimate,
        want.step.unwrap().estimate,
        "estimate after the silence",
    );

    assert!(send_signal(daemon.child.id(), "TERM"));
    let exit = daemon
        .wait(Duration::from_secs(5))
        .expect("exit within 5 s");
    assert!(exit.success(), "{}", daemon.log());
    assert!(daemon.log().contains("stale="), "{}", daemon.log());
}

#[test]
fn a_crash_leaves_the_last_will_offline() {
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-will-{}", std::process::id());
    let watcher = TestClient::connect(broker.port());
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = Daemon::start(&config_text(broker.port(), &client_id, 0.0));
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "{}",
        daemon.log()
    );
    // SIGKILL: no clean shutdown, the broker publishes the Last Will.
    daemon.child.kill().expect("kill");
    daemon.wait(WAIT).expect("killed");
    let will = wait_status(&status, "offline", Duration::from_secs(10));
    assert!(will.is_some(), "no Last Will after a crash");
    assert_eq!(will.unwrap()["client_id"], client_id.as_str());
}

#[test]
fn config_errors_exit_2_before_connecting() {
    let dir = tempfile::tempdir().unwrap();
    let path: &Path = &dir.path().join("no-broker.toml");
    std::fs::write(path, MODELS).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["run", "--config"])
        .arg(path)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("broker"), "{err}");
    assert_eq!(err.lines().count(), 1, "one line: {err}");
}

/// A TCP forwarder between the daemon and the broker that can drop every connection and refuse new ones for a
/// while: a broker outage as the daemon sees it, while the broker itself (and the daemon's persistent session in
/// it) lives on.
struct Outage {
    port: u16,
    down: Arc<AtomicBool>,
    open: Arc<Mutex<Vec<TcpStream>>>,
    stop: Arc<AtomicBool>,
}

impl Outage {
    fn new(broker_port: u16) -> Outage {
        let listener = TcpListener::bind("127.0.0.1:0").expect("bind proxy");
        listener.set_nonblocking(true).expect("nonblocking");
        let port = listener.local_addr().unwrap().port();
        let down = Arc::new(AtomicBool::new(false));
        let open: Arc<Mutex<Vec<TcpStream>>> = Arc::default();
        let stop = Arc::new(AtomicBool::new(false));
        let (d, o, s) = (down.clone(), open.clone(), stop.clone());
        std::thread::spawn(move || {
            while !s.load(Ordering::Relaxed) {
                let Ok((client, _)) = listener.accept() else {
                    std::thread::sleep(Duration::from_millis(5));
                    continue;
                };
                if d.load(Ordering::Relaxed) {
                    drop(client); // refused while the "broker" is down
                    continue;
                }
                client.set_nonblocking(false).unwrap();
                let Ok(upstream) = TcpStream::connect(("127.0.0.1", broker_port)) else {
                    continue;
                };
                let mut open = o.lock().unwrap();
                for (mut from, mut to) in [
                    (client.try_clone().unwrap(), upstream.try_clone().unwrap()),
                    (upstream.try_clone().unwrap(), client.try_clone().unwrap()),
                ] {
                    std::thread::spawn(move || {
                        let _ = std::io::copy(&mut from, &mut to);
                        let _ = to.shutdown(Shutdown::Both);
                    });
                }
                open.push(client);
                open.push(upstream);
            }
        });
        Outage {
            port,
            down,
            open,
            stop,
        }
    }

    /// Drops every connection and refuses new ones until `restore`.
    fn cut(&self) {
        self.down.store(true, Ordering::Relaxed);
        for s in self.open.lock().unwrap().drain(..) {
            let _ = s.shutdown(Shutdown::Both);
        }
    }

    fn restore(&self) {
        self.down.store(false, Ordering::Relaxed);
    }
}

impl Drop for Outage {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        self.cut();
    }
}

/// Runs the daemon in this process (the library entry `gaugewise run` uses) until the returned sender fires.
fn start_in_process(
    config: &str,
) -> (
    tokio::sync::oneshot::Sender<()>,
    std::thread::JoinHandle<RunReport>,
) {
    let daemon = Config::from_str(config, "in-process.toml")
        .unwrap()
        .daemon()
        .unwrap();
    let (settings, pipeline) = runtime::from_config(&daemon, runtime::wall_clock()).unwrap();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let thread = std::thread::spawn(move || {
        let rt = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .enable_all()
            .build()
            .unwrap();
        rt.block_on(runtime::run(
            settings,
            Arc::new(daemon.channels),
            pipeline,
            async {
                let _ = stop_rx.await;
            },
        ))
        .expect("run")
    });
    (stop_tx, thread)
}

fn join_within(thread: std::thread::JoinHandle<RunReport>, timeout: Duration) -> RunReport {
    let deadline = Instant::now() + timeout;
    while !thread.is_finished() {
        assert!(
            Instant::now() < deadline,
            "the daemon did not stop within {timeout:?}"
        );
        std::thread::sleep(Duration::from_millis(10));
    }
    thread.join().expect("daemon thread")
}

#[test]
fn broker_loss_reconnects_keeps_state_and_loses_no_qos1_sample() {
    let broker = TestBroker::embedded();
    let outage = Outage::new(broker.port());
    let client_id = format!("gaugewise-test-outage-{}", std::process::id());
    let config = config_text(outage.port, &client_id, 0.0).replace(
        &format!("client_id = \"{client_id}\""),
        &format!("client_id = \"{client_id}\"\nclean_session = false"),
    );
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let (stop, daemon) = start_in_process(&config);
    assert!(wait_status(&status, "online", Duration::from_secs(10)).is_some());

    let publisher = TestClient::connect(broker.port());
    let t0 = (epoch_now() - 10_000.0).floor();
    let values: Vec<f64> = (0..80)
        .map(|k| 72.0 + ((k * 13 % 7) as f64 - 3.0) / 10.0)
        .collect();
    let send = |range: std::ops::Range<usize>| {
        for k in range {
            let t = t0 + 10.0 * k as f64;
            publisher.publish(
                "brackenfield/raw/TT-101",
                payload(t, Some(values[k])),
                QoS::AtLeastOnce,
                false,
            );
        }
        assert!(publisher.flush(WAIT));
    };
    // QoS 1 is "at least once": an input whose acknowledgement was lost in the cut comes again (the daemon reports
    // it `duplicate` or `late`, state untouched), and an output whose acknowledgement was lost is sent again. So
    // collect until every sample has its `ok` output, and check that repeats are only ever these.
    let mut ok: BTreeMap<usize, OutputMessage> = BTreeMap::new();
    let mut repeats = 0;
    let mut collect = |ok: &mut BTreeMap<usize, OutputMessage>, want: usize, timeout: Duration| {
        let deadline = Instant::now() + timeout;
        while ok.len() < want {
            let left = deadline.saturating_duration_since(Instant::now());
            let Ok(m) = outputs.recv_timeout(left) else {
                break;
            };
            let out = OutputMessage::parse(&m.payload).unwrap();
            let k = ((out.time - t0) / 10.0).round() as usize;
            match out.status.as_str() {
                "ok" => match ok.get(&k) {
                    Some(seen) => {
                        assert_eq!(seen, &out, "a repeated output is the same message");
                        repeats += 1;
                    }
                    None => {
                        ok.insert(k, out);
                    }
                },
                "duplicate" | "late" if ok.contains_key(&k) => repeats += 1,
                _ => panic!("unexpected output {out:?}"),
            }
        }
    };
    send(0..40);
    collect(&mut ok, 40, WAIT);
    assert_eq!(ok.len(), 40);

    // The broker disappears for the daemon; samples published meanwhile wait in its persistent session.
    outage.cut();
    assert!(
        wait_status(&status, "offline", WAIT).is_some(),
        "the Last Will marks the daemon offline"
    );
    send(40..80);
    std::thread::sleep(Duration::from_millis(700));
    outage.restore();
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "online again after reconnecting"
    );
    collect(&mut ok, 80, Duration::from_secs(10));
    assert_eq!(
        ok.len(),
        80,
        "every QoS 1 sample processed after the outage"
    );

    // State survived: the outputs continue the same filter, sample for sample.
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    let mut reference =
        Channel::with_flags(models.model_for("TT-101"), models.flags_for("TT-101")).unwrap();
    for (k, out) in &ok {
        let want = reference.on_sample(t0 + 10.0 * *k as f64, Some(values[*k]));
        close(
            out.estimate,
            want.step.unwrap().estimate,
            &format!("sample {k} estimate"),
        );
        close(out.std, want.std(), &format!("sample {k} std"));
    }

    let _ = stop.send(());
    let report = join_within(daemon, Duration::from_secs(5));
    assert!(report.counters.reconnects >= 1, "{:?}", report.counters);
    assert!(report.counters.published >= 80, "{:?}", report.counters);
    assert!(report.flushed);
}

#[test]
fn shutdown_while_the_broker_is_unreachable_is_still_prompt() {
    // Nothing listens on this port: every connect fails, the daemon backs off, and a stop must not wait for it.
    let port = common::broker::free_port();
    let (stop, daemon) = start_in_process(&config_text(port, "gaugewise-test-unreachable", 0.0));
    std::thread::sleep(Duration::from_millis(800));
    let asked = Instant::now();
    let _ = stop.send(());
    let report = join_within(daemon, Duration::from_secs(5));
    assert!(asked.elapsed() < Duration::from_secs(5));
    assert!(!report.flushed);
    assert_eq!(report.counters.received, 0);
}
