//! `gaugewise run` as a process against a real Mosquitto that each test starts on a free loopback port with a
//! generated configuration (tests/common/broker.rs). A real MQTT client publishes samples and reads the outputs.
//!
//! The reference for every output is `gaugewise replay` run on the same configuration file and the same samples
//! written as CSV: each output's estimate, std, innovation, standardised innovation, raw value and status must equal
//! the replay row bit for bit. Covered: a clean stream over three models; missing (null, bad quality), late,
//! duplicate and garbage payloads (counted per reason, no output, no state change); a broker restart mid-stream
//! with persistent QoS 1 sessions (reconnected to the kept session, no channel state lost, no sample lost); a
//! broker crash that loses every session (the daemon subscribes again, its channels carry on); SIGTERM (exit 0
//! within 5 s, retained offline status) and the Last Will on SIGKILL.
//!
//! Without the `mosquitto` binary each test prints why and passes; with CI=true it fails instead (see
//! `Mosquitto::start`). Every wait is bounded; the traffic is a few hundred messages per test on loopback.

mod common;

use common::broker::{recv_n, send_signal, ClientOptions, Message, Mosquitto, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon};
use gaugewise::config::Config;
use gaugewise::publish::OutputMessage;
use gaugewise::replay::CSV_HEADER;
use rumqttc::QoS;
use std::collections::{BTreeMap, HashMap};
use std::path::Path;
use std::process::Command;
use std::sync::mpsc::Receiver;
use std::time::{Duration, Instant};

const CHANNELS: [&str; 3] = ["TT-101", "FT-201", "LT-301"];

/// Three model families: a first-order lag (TT-101), ARMA(1,1) (FT-201) and the default local level (LT-301).
const MODELS: &str = concat!(
    level_default!(obs_var = 0.0004, level_var = 1e-6),
    tt101_lag!(mean = 72.5),
    ft201_arma11!(),
);

/// How a test wants the daemon connected.
struct Setup {
    port: u16,
    client_id: String,
    output_qos: u8,
    reconnect_min_s: f64,
    reconnect_max_s: f64,
}

impl Setup {
    fn new(port: u16, name: &str) -> Setup {
        assert_ne!(port, 1883, "tests never use the system broker's port");
        Setup {
            port,
            client_id: format!("gaugewise-test-{name}-{}", std::process::id()),
            output_qos: 1,
            reconnect_min_s: 0.1,
            reconnect_max_s: 1.0,
        }
    }

    fn status_topic(&self) -> String {
        format!("brackenfield/status/{}", self.client_id)
    }

    /// The daemon's configuration: a persistent session under a fixed id, QoS 1 inputs carrying their time and
    /// a quality field, no stale reports (these tests count outputs exactly).
    fn config(&self) -> String {
        format!(
            r#"{MODELS}
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
clean_session = false
keep_alive_s = 5
reconnect_min_s = {min:?}
reconnect_max_s = {max:?}

[[inputs]]
topic = "brackenfield/raw/+"
channel = "{{2}}"
qos = 1
payload = "json"
value = "/v"
time = "/t"
quality = "/q"
good_quality = ["good"]
max_payload_bytes = 512

[output]
topic = "brackenfield/clean/{{channel}}"
qos = {qos}

[status]
topic = "{status}"

[timing]
stale_after_s = 0
"#,
            port = self.port,
            client_id = self.client_id,
            min = self.reconnect_min_s,
            max = self.reconnect_max_s,
            qos = self.output_qos,
            status = self.status_topic(),
        )
    }
}

/// One input message, in the order the test publishes it.
#[derive(Debug, Clone)]
enum Input {
    /// A sample: time, value (None: JSON null), quality field (None: absent).
    Sample {
        channel: &'static str,
        t: f64,
        v: Option<f64>,
        q: Option<&'static str>,
    },
    /// A payload the daemon must refuse and count under `reason`, with no output.
    Garbage {
        topic: String,
        payload: String,
        reason: &'static str,
    },
}

impl Input {
    fn sample(channel: &'static str, t: f64, v: Option<f64>) -> Input {
        Input::Sample {
            channel,
            t,
            v,
            q: None,
        }
    }

    fn garbage(channel: &str, payload: impl Into<String>, reason: &'static str) -> Input {
        Input::Garbage {
            topic: format!("brackenfield/raw/{channel}"),
            payload: payload.into(),
            reason,
        }
    }

    fn topic(&self) -> String {
        match self {
            Input::Sample { channel, .. } => format!("brackenfield/raw/{channel}"),
            Input::Garbage { topic, .. } => topic.clone(),
        }
    }

    fn payload(&self) -> String {
        match self {
            Input::Sample { t, v, q, .. } => {
                let v = v.map_or("null".to_string(), |v| format!("{v:?}"));
                match q {
                    Some(q) => format!(r#"{{"t":{t:?},"v":{v},"q":"{q}"}}"#),
                    None => format!(r#"{{"t":{t:?},"v":{v}}}"#),
                }
            }
            Input::Garbage { payload, .. } => payload.clone(),
        }
    }
}

/// A small deterministic noise in [-1, 1) for sample `k` of series `s`.
fn noise(k: usize, s: u64) -> f64 {
    let mut x = (k as u64)
        .wrapping_mul(0x9E37_79B9_7F4A_7C15)
        .wrapping_add(s.wrapping_mul(0xBF58_476D_1CE4_E5B9));
    x ^= x >> 31;
    x = x.wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^= x >> 29;
    (x >> 11) as f64 / (1u64 << 52) as f64 - 1.0
}

/// Sample `k`'s time offset from `t0` (whole quarters of a second, exact in binary and in the replay CSV):
/// about 10 s apart with jitter, and a 30 s gap now and then.
fn offset(k: usize) -> f64 {
    let jitter = [0.0, 0.5, -0.25, 0.25, 1.0][k % 5];
    10.0 * k as f64 + 20.0 * (k / 17) as f64 + jitter
}

/// Sample `k` of each channel, interleaved: TT-101, FT-201, LT-301 at 0, 0.25 and 0.5 s past the step.
fn step(t0: f64, k: usize) -> [Input; 3] {
    let t = t0 + offset(k);
    let x = k as f64;
    [
        Input::sample(
            "TT-101",
            t,
            Some(72.0 + 0.8 * (x / 9.0).sin() + 0.3 * noise(k, 1)),
        ),
        Input::sample("FT-201", t + 0.25, Some(12.0 + 0.7 * noise(k, 2))),
        Input::sample(
            "LT-301",
            t + 0.5,
            Some(1.5 + 0.002 * x + 0.02 * noise(k, 3)),
        ),
    ]
}

/// `n` samples per channel, interleaved, nothing unusual.
fn clean_stream(t0: f64, n: usize) -> Vec<Input> {
    (0..n).flat_map(|k| step(t0, k)).collect()
}

/// Whole seconds far enough in the past that no sample is "in the future" of its receive time.
fn past_t0() -> f64 {
    (epoch_now() - 100_000.0).floor()
}

/// What the daemon must answer to one sample.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Expect {
    /// Filtered: the next replay row of its channel.
    Replay,
    /// Dropped with this status, state untouched.
    Dropped(&'static str),
}

/// Per channel, in publishing order: each sample's time, value and expected treatment.
type Plan = HashMap<&'static str, Vec<(f64, Option<f64>, Expect)>>;

/// Splits the inputs into what each channel must answer and the CSV that `replay` reads (long format, only the
/// samples a channel takes: late and duplicate ones cannot be written to a history, and are dropped live).
fn plan(inputs: &[Input]) -> (Plan, String) {
    let mut plan: Plan = HashMap::new();
    let mut last: HashMap<&str, f64> = HashMap::new();
    let mut csv = String::from("time,channel,value\n");
    for input in inputs {
        let Input::Sample { channel, t, v, q } = input else {
            continue;
        };
        let expect = match last.get(channel) {
            Some(&l) if *t < l => Expect::Dropped("late"),
            Some(&l) if *t == l => Expect::Dropped("duplicate"),
            _ => Expect::Replay,
        };
        // A bad quality makes the sample missing whatever its value.
        let value = if q.is_none_or(|q| q == "good") {
            *v
        } else {
            None
        };
        if expect == Expect::Replay {
            last.insert(channel, *t);
            let cell = value.map_or(String::new(), |v| format!("{v:?}"));
            csv.push_str(&format!("{t:?},{channel},{cell}\n"));
        }
        plan.entry(channel).or_default().push((*t, value, expect));
    }
    (plan, csv)
}

/// One row of `gaugewise replay` output, cells as written.
#[derive(Debug, Clone)]
struct ReplayRow {
    time: f64,
    cells: HashMap<&'static str, String>,
}

impl ReplayRow {
    fn cell(&self, name: &str) -> &str {
        &self.cells[name]
    }
}

/// Runs `gaugewise replay` on the daemon's own configuration file and `csv`; rows grouped by channel, in order.
fn replay(config: &Path, csv: &str) -> HashMap<String, Vec<ReplayRow>> {
    let dir = tempfile::tempdir().expect("scratch dir");
    let input = dir.path().join("samples.csv");
    let output = dir.path().join("replayed.csv");
    std::fs::write(&input, csv).expect("write samples.csv");
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["replay", "--config"])
        .arg(config)
        .arg("--input")
        .arg(&input)
        .arg("--output")
        .arg(&output)
        .output()
        .expect("run gaugewise replay");
    assert!(
        out.status.success(),
        "replay failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut reader = csv::Reader::from_path(&output).expect("replay output");
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    assert_eq!(header, CSV_HEADER, "replay's columns");
    let mut rows: HashMap<String, Vec<ReplayRow>> = HashMap::new();
    for record in reader.records() {
        let record = record.expect("replay row");
        let cells: HashMap<&'static str, String> = CSV_HEADER
            .iter()
            .zip(record.iter())
            .map(|(k, v)| (*k, v.to_string()))
            .collect();
        let row = ReplayRow {
            time: cells["time"].parse().expect("replay time"),
            cells,
        };
        rows.entry(row.cell("channel").to_string())
            .or_default()
            .push(row);
    }
    rows
}

/// The daemon's JSON number against replay's CSV cell, bit for bit. JSON has no infinity, so an infinite std
/// (a diffuse start) is null there and `inf` in the CSV; NaN is null and an empty cell.
fn same(got: Option<f64>, cell: &str, what: &str) {
    let want: Option<f64> = if cell.is_empty() {
        None
    } else {
        let x: f64 = cell
            .parse()
            .unwrap_or_else(|e| panic!("{what}: replay cell '{cell}': {e}"));
        x.is_finite().then_some(x)
    };
    let equal = match (got, want) {
        (None, None) => true,
        (Some(a), Some(b)) => a.to_bits() == b.to_bits(),
        _ => false,
    };
    assert!(equal, "{what}: daemon {got:?}, replay '{cell}'");
}

/// One daemon output against the replay row for the same sample.
fn matches_replay(out: &OutputMessage, row: &ReplayRow, what: &str) {
    assert_eq!(out.time, row.time, "{what}: time");
    assert_eq!(out.channel, row.cell("channel"), "{what}: channel");
    assert_eq!(out.status, row.cell("status"), "{what}: status");
    same(out.raw, row.cell("raw"), &format!("{what}: raw"));
    same(
        out.estimate,
        row.cell("estimate"),
        &format!("{what}: estimate"),
    );
    same(out.std, row.cell("std"), &format!("{what}: std"));
    same(
        out.innovation,
        row.cell("innovation"),
        &format!("{what}: innovation"),
    );
    same(
        out.std_innovation,
        row.cell("std_innovation"),
        &format!("{what}: std_innovation"),
    );
}

fn model_name(channel: &str) -> String {
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    models.model_for(channel).kind().to_string()
}

fn parse(m: &Message) -> OutputMessage {
    let out = OutputMessage::parse(&m.payload)
        .unwrap_or_else(|e| panic!("{}: {e}: {}", m.topic, m.text()));
    assert_eq!(m.topic, format!("brackenfield/clean/{}", out.channel));
    out
}

/// Every output, per channel in arrival order, checked against the plan and the replay: filtered samples equal
/// their replay row, dropped ones carry their status, their raw value and nothing else.
fn check_against_replay(got: &[Message], plan: &Plan, rows: &HashMap<String, Vec<ReplayRow>>) {
    let mut by_channel: HashMap<String, Vec<OutputMessage>> = HashMap::new();
    for m in got {
        let out = parse(m);
        by_channel.entry(out.channel.clone()).or_default().push(out);
    }
    for name in CHANNELS {
        let outs = by_channel.get(name).map_or(&[][..], Vec::as_slice);
        let want = &plan[name];
        assert_eq!(outs.len(), want.len(), "{name}: one output per sample");
        let mut replayed = rows[name].iter();
        for (k, (out, (t, v, expect))) in outs.iter().zip(want).enumerate() {
            let what = format!("{name} sample {k}");
            assert_eq!(out.model, model_name(name), "{what}");
            match expect {
                Expect::Replay => {
                    let row = replayed
                        .next()
                        .unwrap_or_else(|| panic!("{what}: replay has no row for it"));
                    matches_replay(out, row, &what);
                }
                Expect::Dropped(status) => {
                    assert_eq!(out.status, *status, "{what}");
                    assert_eq!(out.time, *t, "{what}");
                    assert_eq!(out.raw, *v, "{what}");
                    assert!(
                        out.estimate.is_none()
                            && out.std.is_none()
                            && out.innovation.is_none()
                            && out.std_innovation.is_none(),
                        "{what}: a dropped sample has no estimate: {out:?}"
                    );
                }
            }
        }
        assert!(replayed.next().is_none(), "{name}: replay rows left over");
    }
}

/// Publishes every input at QoS 1 and waits for the broker's acknowledgements.
fn publish_all(publisher: &TestClient, inputs: &[Input]) {
    for input in inputs {
        publisher.publish(&input.topic(), input.payload(), QoS::AtLeastOnce, false);
    }
    assert!(
        publisher.flush(Duration::from_secs(15)),
        "inputs not acknowledged by the broker"
    );
}

/// The daemon and a watcher of its outputs and status, connected to `broker` and announced online.
struct Running {
    daemon: Daemon,
    /// Kept so its connection lives as long as the test needs the receivers.
    _watcher: TestClient,
    outputs: Receiver<Message>,
    status: Receiver<Message>,
}

fn start(broker: &Mosquitto, setup: &Setup, watcher: ClientOptions) -> Running {
    let watcher = TestClient::connect_with(broker.port(), watcher);
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(&setup.status_topic(), QoS::AtLeastOnce);
    let daemon = Daemon::start(&setup.config());
    let online = wait_status(&status, "online", Duration::from_secs(10));
    let online = online.unwrap_or_else(|| {
        panic!(
            "no online status; daemon log:\n{}\nmosquitto log:\n{}",
            daemon.log(),
            broker.log()
        )
    });
    assert_eq!(online["client_id"], setup.client_id.as_str());
    Running {
        daemon,
        _watcher: watcher,
        outputs,
        status,
    }
}

/// SIGTERM: exit 0 within 5 s, then the retained status reads offline, also to a subscriber that comes later.
/// Returns the daemon's log, whose last lines hold the counter summary.
fn stop_with_sigterm(run: &mut Running, broker: &Mosquitto, setup: &Setup) -> String {
    let asked = Instant::now();
    assert!(
        send_signal(run.daemon.child.id(), "TERM"),
        "cannot signal the daemon"
    );
    let exit = run.daemon.wait(Duration::from_secs(5));
    let log = run.daemon.log();
    let exit = exit.unwrap_or_else(|| panic!("still running 5 s after SIGTERM; log:\n{log}"));
    assert!(exit.success(), "exit {exit:?}; log:\n{log}");
    assert!(asked.elapsed() < Duration::from_secs(5));
    assert!(
        wait_status(&run.status, "offline", WAIT).is_some(),
        "no offline status after SIGTERM; log:\n{log}"
    );
    let later = TestClient::connect(broker.port());
    let retained = later.subscribe(&setup.status_topic(), QoS::AtLeastOnce);
    let m = retained.recv_timeout(WAIT).expect("retained status");
    assert!(m.retain, "the status is retained");
    assert_eq!(m.json()["status"], "offline");
    assert_eq!(m.json()["client_id"], setup.client_id.as_str());
    log
}

/// The counter summary the daemon logs when it stops.
fn summary(log: &str) -> &str {
    log.lines()
        .rev()
        .find(|l| l.contains("stopped:"))
        .unwrap_or_else(|| panic!("no summary; log:\n{log}"))
}

#[test]
fn estimates_equal_replay_bit_for_bit_and_sigterm_stops_cleanly() {
    let Some(broker) = Mosquitto::start() else {
        return;
    };
    let mut setup = Setup::new(broker.port(), "replay");
    // Outputs at QoS 0 (the configuration's default) here; the other tests use QoS 1.
    setup.output_qos = 0;
    let mut run = start(&broker, &setup, ClientOptions::default());

    let inputs = clean_stream(past_t0(), 100);
    let publisher = TestClient::connect(broker.port());
    publish_all(&publisher, &inputs);
    let got = recv_n(&run.outputs, inputs.len(), Duration::from_secs(20));
    assert_eq!(
        got.len(),
        inputs.len(),
        "one output per input; daemon log:\n{}",
        run.daemon.log()
    );
    if let Ok(extra) = run.outputs.recv_timeout(Duration::from_millis(300)) {
        panic!("unexpected output {}: {}", extra.topic, extra.text());
    }

    let (plan, csv) = plan(&inputs);
    let rows = replay(run.daemon.config_path(), &csv);
    check_against_replay(&got, &plan, &rows);
    assert!(
        got.iter().all(|m| parse(m).status == "ok"),
        "a clean stream is all ok"
    );

    let log = stop_with_sigterm(&mut run, &broker, &setup);
    let summary = summary(&log);
    let n = inputs.len();
    assert!(
        summary.contains(&format!("received={n} published={n} rejected=0")),
        "{summary}"
    );
    assert!(summary.contains("publish_dropped=0"), "{summary}");
}

#[test]
fn missing_late_duplicate_and_garbage_inputs() {
    let Some(broker) = Mosquitto::start() else {
        return;
    };
    let setup = Setup::new(broker.port(), "garbage");
    let mut run = start(&broker, &setup, ClientOptions::default());

    let t0 = past_t0();
    // Garbage carries a time after every sample: if a refused message touched a channel's clock, every later
    // sample of it would come out late.
    let t_far = t0 + offset(60);
    let mut inputs = Vec::new();
    for k in 0..40 {
        let [tt, ft, lt] = step(t0, k);
        let (Input::Sample { t: t_tt, .. }, Input::Sample { t: t_ft, .. }) = (&tt, &ft) else {
            unreachable!()
        };
        let (t_tt, t_ft) = (*t_tt, *t_ft);
        let with = |input: Input, v: Option<f64>, q: Option<&'static str>| match input {
            Input::Sample { channel, t, .. } => Input::Sample { channel, t, v, q },
            other => other,
        };
        match k {
            5 => inputs.extend([with(tt, None, None), ft, lt]),
            8 => inputs.extend([tt, with(ft, Some(999.0), Some("bad")), lt]),
            9 => inputs.extend([tt, ft, with(lt, Some(1.52), Some("good"))]),
            12 => inputs.extend([
                tt,
                Input::sample("TT-101", t_tt - 25.0, Some(70.0)),
                ft,
                Input::sample("FT-201", t_ft, Some(12.3)),
                lt,
            ]),
            15 => inputs.extend([tt, ft, with(lt, None, Some("bad"))]),
            20 => {
                inputs.extend([tt, ft, lt]);
                inputs.extend([
                    Input::garbage("TT-101", "not json {", "not_json"),
                    Input::garbage(
                        "FT-201",
                        format!(r#"{{"t":{t_far:?},"v":true}}"#),
                        "wrong_type",
                    ),
                    Input::garbage(
                        "LT-301",
                        format!(r#"{{"t":{t_far:?},"v":1.5,"pad":"{}"}}"#, "x".repeat(2000)),
                        "too_large",
                    ),
                    Input::garbage(
                        "TT-101",
                        format!(r#"{{"t":{t_far:?},"v":"NaN"}}"#),
                        "non_finite",
                    ),
                    Input::garbage("FT-201", format!(r#"{{"t":{t_far:?}}}"#), "missing_field"),
                    Input::garbage(
                        "LT-301",
                        format!(r#"{{"t":{t_far:?},"v":"high"}}"#),
                        "not_number",
                    ),
                    // An empty last level names no channel.
                    Input::garbage("", format!(r#"{{"t":{t_far:?},"v":1.0}}"#), "no_channel"),
                ]);
            }
            25 => inputs.extend([tt, ft, lt, Input::sample("LT-301", t0, Some(1.5))]),
            30 => inputs.extend([tt.clone(), tt, ft, lt]),
            _ => inputs.extend([tt, ft, lt]),
        }
    }
    let samples = inputs
        .iter()
        .filter(|i| matches!(i, Input::Sample { .. }))
        .count();
    let garbage = inputs.len() - samples;

    let publisher = TestClient::connect(broker.port());
    publish_all(&publisher, &inputs);
    let got = recv_n(&run.outputs, samples, Duration::from_secs(20));
    assert_eq!(
        got.len(),
        samples,
        "one output per sample, none for garbage; daemon log:\n{}",
        run.daemon.log()
    );
    if let Ok(extra) = run.outputs.recv_timeout(Duration::from_millis(300)) {
        panic!("unexpected output {}: {}", extra.topic, extra.text());
    }
    assert!(
        run.daemon.child.try_wait().unwrap().is_none(),
        "garbage is never fatal"
    );

    let (plan, csv) = plan(&inputs);
    let rows = replay(run.daemon.config_path(), &csv);
    check_against_replay(&got, &plan, &rows);
    let mut statuses: BTreeMap<String, usize> = BTreeMap::new();
    for m in &got {
        *statuses.entry(parse(m).status).or_default() += 1;
    }
    let count = |s: &str| statuses.get(s).copied().unwrap_or(0);
    assert_eq!(
        (
            count("missing"),
            count("late"),
            count("duplicate"),
            count("ok")
        ),
        (3, 2, 2, samples - 7),
        "{statuses:?}"
    );

    let log = stop_with_sigterm(&mut run, &broker, &setup);
    let summary = summary(&log);
    let mut reasons: Vec<&str> = inputs
        .iter()
        .filter_map(|i| match i {
            Input::Garbage { reason, .. } => Some(*reason),
            _ => None,
        })
        .collect();
    reasons.sort_unstable();
    let by_reason: Vec<String> = reasons.iter().map(|r| format!("{r}=1")).collect();
    assert!(
        summary.contains(&format!(
            "received={} published={samples} rejected={garbage} ({})",
            inputs.len(),
            by_reason.join(" ")
        )),
        "{summary}"
    );
    assert!(
        summary.contains("late=2 duplicate=2 stale=0 publish_dropped=0"),
        "{summary}"
    );
}

/// Which sample an output answers: channel and time.
type Key = (String, u64);

fn key(channel: &str, t: f64) -> Key {
    (channel.to_string(), t.to_bits())
}

/// Reads outputs into `first` (the first output per sample) until every sample in `want` has one or `timeout`
/// passes. QoS 1 is "at least once": after a restart a sample may come again (the daemon answers it `duplicate` or
/// `late`, state untouched) and an output may be delivered again (the same message); those are counted in
/// `repeats`, anything else fails the test.
fn collect(
    rx: &Receiver<Message>,
    first: &mut HashMap<Key, OutputMessage>,
    repeats: &mut usize,
    want: &[Key],
    timeout: Duration,
) {
    let deadline = Instant::now() + timeout;
    while !want.iter().all(|k| first.contains_key(k)) {
        let left = deadline.saturating_duration_since(Instant::now());
        let Ok(m) = rx.recv_timeout(left) else {
            break;
        };
        let out = parse(&m);
        let k = key(&out.channel, out.time);
        match first.get(&k) {
            None => {
                assert!(want.contains(&k), "output for a sample never sent: {out:?}");
                first.insert(k, out);
            }
            Some(seen) if *seen == out => *repeats += 1,
            Some(_) if out.status == "duplicate" || out.status == "late" => *repeats += 1,
            Some(seen) => panic!("a second, different output {out:?} after {seen:?}"),
        }
    }
}

#[test]
fn broker_restart_mid_stream_keeps_state_and_loses_no_qos1_sample() {
    let Some(mut broker) = Mosquitto::start() else {
        return;
    };
    let mut setup = Setup::new(broker.port(), "restart");
    // A first reconnect attempt a second after the loss: the restarted broker is usually back, and the
    // publisher's samples usually in the daemon's session, before the daemon returns.
    setup.reconnect_min_s = 1.0;
    setup.reconnect_max_s = 2.0;
    let pid = std::process::id();
    let mut run = start(
        &broker,
        &setup,
        ClientOptions::persistent(&format!("gaugewise-test-reader-{pid}")),
    );
    let publisher = TestClient::connect_with(
        broker.port(),
        ClientOptions::persistent(&format!("gaugewise-test-publisher-{pid}")),
    );

    let t0 = past_t0();
    let inputs = clean_stream(t0, 50);
    let half = inputs.len() / 2;
    let wanted: Vec<Key> = inputs
        .iter()
        .map(|i| match i {
            Input::Sample { channel, t, .. } => key(channel, *t),
            Input::Garbage { .. } => unreachable!(),
        })
        .collect();

    let mut first: HashMap<Key, OutputMessage> = HashMap::new();
    let mut repeats = 0;
    publish_all(&publisher, &inputs[..half]);
    collect(
        &run.outputs,
        &mut first,
        &mut repeats,
        &wanted[..half],
        Duration::from_secs(15),
    );
    assert_eq!(first.len(), half, "outputs before the restart");

    // The broker goes down (saving its persistence database, as an operator's restart does) with the daemon, the
    // reader and the publisher connected. Samples published meanwhile wait in the publisher's client until the
    // broker is back, then in the daemon's persistent session until the daemon is.
    broker.stop();
    for input in &inputs[half..] {
        publisher.publish(&input.topic(), input.payload(), QoS::AtLeastOnce, false);
    }
    broker.start_again();
    assert!(
        publisher.flush(Duration::from_secs(15)),
        "the publisher's QoS 1 samples not acknowledged after the restart"
    );
    // Mosquitto logs each connection; one of the daemon's so far means its samples wait in its session.
    let daemon_connections = broker
        .log()
        .matches(&format!(" as {} (", setup.client_id))
        .count();
    if daemon_connections > 1 {
        eprintln!(
            "note: the daemon was back before the samples published during the restart were acknowledged; \
             they reached it live rather than from its session"
        );
    }
    assert!(
        wait_status(&run.status, "online", Duration::from_secs(15)).is_some(),
        "the daemon did not announce itself online again; log:\n{}\nmosquitto log:\n{}",
        run.daemon.log(),
        broker.log()
    );
    collect(
        &run.outputs,
        &mut first,
        &mut repeats,
        &wanted,
        Duration::from_secs(20),
    );
    assert_eq!(
        first.len(),
        inputs.len(),
        "every QoS 1 sample processed after the restart; daemon log:\n{}\nmosquitto log:\n{}",
        run.daemon.log(),
        broker.log()
    );

    // No channel state lost: the outputs continue the same filters, equal to one replay of the whole sequence.
    let (plan, csv) = plan(&inputs);
    let rows = replay(run.daemon.config_path(), &csv);
    for name in CHANNELS {
        assert_eq!(rows[name].len(), plan[name].len(), "{name}");
        for (k, row) in rows[name].iter().enumerate() {
            let out = &first[&key(name, row.time)];
            assert_eq!(
                out.status, "ok",
                "{name} sample {k}: {out:?} (repeats {repeats})"
            );
            matches_replay(out, row, &format!("{name} sample {k}"));
        }
    }

    // The daemon saw the loss and came back to the session the broker kept across its restart.
    let log = run.daemon.log();
    assert!(
        log.lines()
            .any(|l| l.contains("reconnected") && l.contains("session_present=true")),
        "no reconnect to a kept session; log:\n{log}"
    );
    assert!(log.contains("connection to the broker lost"), "log:\n{log}");
    let log = stop_with_sigterm(&mut run, &broker, &setup);
    let summary = summary(&log);
    assert!(summary.contains("reconnects=1"), "{summary}");
    assert!(summary.contains("publish_dropped=0"), "{summary}");
}

#[test]
fn sigkill_leaves_the_last_will_offline() {
    let Some(broker) = Mosquitto::start() else {
        return;
    };
    let setup = Setup::new(broker.port(), "will");
    let mut run = start(&broker, &setup, ClientOptions::default());
    // No clean shutdown: Mosquitto publishes the Last Will, which is the retained offline status.
    run.daemon.child.kill().expect("kill");
    run.daemon.wait(WAIT).expect("killed");
    let will = wait_status(&run.status, "offline", Duration::from_secs(10));
    let will = will.unwrap_or_else(|| panic!("no Last Will; mosquitto log:\n{}", broker.log()));
    assert_eq!(will["client_id"], setup.client_id.as_str());
    let later = TestClient::connect(broker.port());
    let retained = later.subscribe(&setup.status_topic(), QoS::AtLeastOnce);
    let m = retained.recv_timeout(WAIT).expect("retained status");
    assert!(m.retain, "the Last Will is retained");
    assert_eq!(m.json()["status"], "offline");
}

#[test]
fn broker_crash_loses_the_session_and_the_daemon_subscribes_again() {
    let Some(mut broker) = Mosquitto::start() else {
        return;
    };
    let setup = Setup::new(broker.port(), "crash");
    let mut run = start(&broker, &setup, ClientOptions::default());
    let publisher = TestClient::connect(broker.port());
    let inputs = clean_stream(past_t0(), 30);
    let half = inputs.len() / 2;

    publish_all(&publisher, &inputs[..half]);
    let mut got = recv_n(&run.outputs, half, Duration::from_secs(15));
    assert_eq!(got.len(), half, "{}", run.daemon.log());

    // A crash: SIGKILL, nothing saved, so the broker comes back with no session, subscription or retained status.
    // The daemon must subscribe again; the watcher does too, and once it sees the daemon's new online status
    // (sent after the daemon's subscriptions) both are in place.
    broker.kill();
    broker.start_again();
    assert!(
        wait_status(&run.status, "online", Duration::from_secs(15)).is_some(),
        "the daemon did not come back online; log:\n{}\nmosquitto log:\n{}",
        run.daemon.log(),
        broker.log()
    );
    publish_all(&publisher, &inputs[half..]);
    got.extend(recv_n(
        &run.outputs,
        inputs.len() - half,
        Duration::from_secs(15),
    ));
    assert_eq!(
        got.len(),
        inputs.len(),
        "every sample published after the daemon is back; log:\n{}",
        run.daemon.log()
    );

    // The channels' state lives in the daemon, not the broker: the outputs continue the same filters.
    let (plan, csv) = plan(&inputs);
    let rows = replay(run.daemon.config_path(), &csv);
    check_against_replay(&got, &plan, &rows);

    let log = run.daemon.log();
    assert!(
        log.lines()
            .any(|l| l.contains("reconnected") && l.contains("session_present=false")),
        "no reconnect to a fresh session; log:\n{log}"
    );
    let log = stop_with_sigterm(&mut run, &broker, &setup);
    assert!(summary(&log).contains("reconnects=1"), "{}", summary(&log));
}
