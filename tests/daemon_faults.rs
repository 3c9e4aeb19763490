//! Fault injection against `gaugewise run` as a process: the security failures an edge gateway meets in the field
//! (a broker certificate from the wrong CA, a wrong broker password) and a flood of distinct topic names, each test
//! with its own Mosquitto on free loopback ports (tests/common/broker.rs, `Mosquitto::start_with`).
//!
//! - **TLS.** A throwaway CA, a server certificate for 127.0.0.1 and localhost signed by it, and a second,
//!   unrelated CA are made at test time (rcgen). Mosquitto keeps its plain listener for the test's own client and
//!   opens a TLS listener for the daemon. With the right CA the daemon comes online and answers samples. With the
//!   unrelated CA it stays up, each attempt's log line names the certificate problem, the attempts within the
//!   window are no more than the configured backoff allows, each logged pause lies in the backoff's documented
//!   range, and SIGTERM ends it with exit 0 within the README's 5 s.
//! - **Password.** Mosquitto refuses anonymous clients and reads a password file made with `mosquitto_passwd`. The
//!   right password (from `password_file`) works. A wrong one (inline) is refused: the daemon logs the broker's
//!   refusal, backs off as above, never writes the password anywhere in its log (run at `trace`, the most verbose
//!   level), and exits 0 on SIGTERM.
//! - **Flood.** With `limits.max_channels = 1000`, one valid sample on each of 100,000 distinct channel topics at
//!   QoS 0, throttled on the daemon's own received counter so the broker drops none. The daemon stays alive and
//!   healthy, its channel gauge never passes the limit, every sample past the limit is counted as
//!   `too_many_channels` (and logged at most once per 10 s), its VmRSS stays under a stated bound, and a channel it
//!   knew before still gets its outputs. The figures are printed (`-- --nocapture`).
//! - **Payload reader.** src/ingest.rs already has property tests over random bytes (`routing_never_panics`:
//!   up to 80 bytes, non-UTF-8 included, through `Router::route`) and over generated JSON nested up to 4 levels
//!   (`json_payloads_never_panic`). They are not repeated here. What they leave out is covered by the bounded
//!   property tests at the end: payloads far longer (up to 256 KiB, on both sides of the size limit) and JSON nested
//!   far deeper (up to 20,000 levels: beside the fields, as the value, as the whole document; cut off or not), read
//!   through the public `InputRule::read`.
//!
//! Not here: a broker killed and restarted mid-stream, and SIGKILL with the Last Will (daemon_mosquitto.rs).
//! Without `mosquitto` (or `mosquitto_passwd` for the password tests) a test prints why and passes; with CI=true
//! it fails. Every wait is bounded; the only time limit asserted is the README's "exit 0 within 5 s" on SIGTERM.

mod common;

use common::broker::{
    free_port, recv_n, send_signal, wait_for_port, ClientOptions, Message, Mosquitto, TestClient,
    WAIT,
};
use common::daemon::{epoch_now, plant_inputs, wait_status};
use gaugewise::ingest::{InputRule, PayloadFormat, Reject, TimeFormat};
use proptest::prelude::*;
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose,
};
use rumqttc::QoS;
use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::mpsc::Receiver;
use std::time::{Duration, Instant};

/// The plant's vessel temperature (a first-order lag) and the default local level for every other channel.
const MODELS: &str = concat!(
    level_default!(obs_var = 0.25, level_var = 0.01),
    tt101_lag!(mean = 72.5),
);

/// Backoff of the failing tests: short enough that a 6 s window holds several attempts, long enough that a tight
/// loop (hundreds of attempts) cannot hide inside the bound.
const RECONNECT_MIN_S: f64 = 0.5;
const RECONNECT_MAX_S: f64 = 2.0;
/// How long a failing daemon is watched before its attempts are counted (the brief's example window).
const FAILING_WINDOW: Duration = Duration::from_secs(6);
/// README, "Stopping": SIGTERM gives exit 0 within 5 s.
const STOP_LIMIT: Duration = Duration::from_secs(5);

// ---------------------------------------------------------------------------------------------------------------
// The daemon process

/// `gaugewise run` on a configuration in its own scratch directory (which also holds its CA or password file),
/// logging at a chosen level to a file; killed if a test ends without stopping it.
struct Gateway {
    child: Child,
    log: PathBuf,
    started: Instant,
    _dir: tempfile::TempDir,
}

impl Gateway {
    fn start(dir: tempfile::TempDir, config: &str, level: &str) -> Gateway {
        let path = dir.path().join("gaugewise.toml");
        std::fs::write(&path, config).expect("write the daemon configuration");
        let log = dir.path().join("daemon.log");
        let child = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
            .args(["run", "--config"])
            .arg(&path)
            .env("GAUGEWISE_LOG", level)
            .env_remove("RUST_LOG")
            // Plain text lines on stderr, whatever the environment the tests run in.
            .env_remove("JOURNAL_STREAM")
            .env_remove("NOTIFY_SOCKET")
            .env_remove("WATCHDOG_USEC")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&log).expect("daemon log file"))
            .spawn()
            .expect("start gaugewise run");
        Gateway {
            child,
            log,
            started: Instant::now(),
            _dir: dir,
        }
    }

    fn pid(&self) -> u32 {
        self.child.id()
    }

    fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    fn running(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    /// SIGTERM, then waits for the exit (at most `limit`); the exit status and how long it took.
    fn terminate(&mut self, limit: Duration) -> (Option<ExitStatus>, Duration) {
        let asked = Instant::now();
        assert!(send_signal(self.pid(), "TERM"), "cannot signal the daemon");
        while asked.elapsed() < limit {
            if let Ok(Some(status)) = self.child.try_wait() {
                return (Some(status), asked.elapsed());
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        (None, asked.elapsed())
    }
}

impl Drop for Gateway {
    fn drop(&mut self) {
        if matches!(self.child.try_wait(), Ok(None)) {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// The daemon's configuration: the models, `[broker]` on loopback `port` with `broker_lines` added, JSON samples
/// `{"t":..,"v":..}` on `brackenfield/raw/<channel>` at `input_qos`, outputs on `brackenfield/clean/<channel>` at
/// QoS 0, the status under the client id, no stale reports (outputs are counted exactly), then `tail` (more
/// tables: `[broker.tls]`, `[limits]`, `[metrics]`).
fn gateway_config(
    port: u16,
    client_id: &str,
    broker_lines: &str,
    input_qos: u8,
    tail: &str,
) -> String {
    assert_ne!(port, 1883, "tests never use the system broker's port");
    format!(
        r#"{MODELS}
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
clean_session = true
keep_alive_s = 5
reconnect_min_s = {RECONNECT_MIN_S:?}
reconnect_max_s = {RECONNECT_MAX_S:?}
{broker_lines}

{inputs}
[output]
topic = "brackenfield/clean/{{channel}}"
qos = 0

[status]
topic = "{status}"

[timing]
stale_after_s = 0
{tail}
"#,
        status = status_topic(client_id),
        inputs = plant_inputs(input_qos),
    )
}

fn status_topic(client_id: &str) -> String {
    format!("brackenfield/status/{client_id}")
}

fn client_id(name: &str) -> String {
    format!("gaugewise-faults-{name}-{}", std::process::id())
}

/// A TOML string holding a path (the scratch paths hold no quote or backslash).
fn toml_path(path: &Path) -> String {
    let text = path.display().to_string();
    assert!(!text.contains(['"', '\\']), "{text}");
    format!("\"{text}\"")
}

/// `n` samples of TT-101 every 10 s from `t0`, close to its configured mean, so each one updates the estimate.
fn publish_tt101(publisher: &TestClient, t0: f64, from: usize, n: usize) {
    for k in from..from + n {
        let t = t0 + 10.0 * k as f64;
        let v = 72.5 + 0.1 * ((k as f64) * 0.7).sin();
        publisher.publish(
            "brackenfield/raw/TT-101",
            format!(r#"{{"t":{t:.1},"v":{v:.4}}}"#),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(
        publisher.flush(WAIT),
        "the broker did not acknowledge the samples"
    );
}

/// Sample times well in the past (the daemon refuses times more than 1 h ahead), a whole number of seconds.
fn past_t0() -> f64 {
    (epoch_now() - 50_000.0).floor()
}

/// Asserts `n` outputs of TT-101, each an accepted sample.
fn expect_tt101_outputs(outputs: &Receiver<Message>, n: usize, gateway: &Gateway) {
    let got = recv_n(outputs, n, Duration::from_secs(20));
    assert_eq!(
        got.len(),
        n,
        "one output per sample; daemon log:\n{}",
        gateway.log()
    );
    for m in &got {
        let doc = m.json();
        assert_eq!(doc["channel"], "TT-101", "{}", m.text());
        assert_eq!(doc["status"], "ok", "{}", m.text());
        assert!(doc["estimate"].is_number(), "{}", m.text());
    }
}

/// Stops a daemon with SIGTERM and checks the README's contract: exit 0 within 5 s. Returns the time it took.
fn stop_cleanly(gateway: &mut Gateway, what: &str) -> Duration {
    let (exit, took) = gateway.terminate(STOP_LIMIT);
    let log = gateway.log();
    let exit = exit.unwrap_or_else(|| {
        panic!("{what}: still running {STOP_LIMIT:?} after SIGTERM; log:\n{log}")
    });
    assert!(exit.success(), "{what}: exit {exit:?}; log:\n{log}");
    assert!(log.contains("SIGTERM received"), "{what}: log:\n{log}");
    took
}

// ---------------------------------------------------------------------------------------------------------------
// Counting connection attempts against the backoff

/// The log lines of failed connection attempts: one per attempt (src/runtime.rs, `poll_loop`: a refusal by the
/// broker is an ERROR "the broker refused the connection", any other failure before a connection a WARN "cannot
/// connect to the broker").
fn attempt_lines(log: &str) -> Vec<&str> {
    log.lines()
        .filter(|l| {
            l.contains("cannot connect to the broker")
                || l.contains("the broker refused the connection")
        })
        .collect()
}

/// The `retry_in_s=` field of an attempt line.
fn retry_in_s(line: &str) -> f64 {
    let value = line
        .split_once("retry_in_s=")
        .unwrap_or_else(|| panic!("no retry_in_s in {line}"))
        .1;
    let end = value
        .find(|c: char| c.is_whitespace())
        .unwrap_or(value.len());
    value[..end]
        .parse()
        .unwrap_or_else(|_| panic!("retry_in_s is not a number in {line}"))
}

/// The range of the n-th pause after a reset (n from 0), as src/runtime/backoff.rs documents it: uniform in
/// `[max(c/2, min), c]` with `c = min(max, min * 2^n)`.
fn backoff_range(n: usize, min: f64, max: f64) -> (f64, f64) {
    let c = (min * 2f64.powi(n.min(60) as i32)).min(max);
    ((c / 2.0).max(min), c)
}

/// Most attempts that fit in `window` seconds when every pause takes its shortest possible value: the first
/// attempt at once, the next after the shortest first pause, and so on. Handshakes only add time, so a daemon that
/// follows its backoff makes at most this many; a tight loop makes far more.
fn most_attempts(window: f64, min: f64, max: f64) -> usize {
    let mut attempts = 1;
    let mut at = 0.0;
    loop {
        at += backoff_range(attempts - 1, min, max).0;
        if at > window {
            return attempts;
        }
        attempts += 1;
    }
}

/// Checks a failing daemon's attempts after `window`: more than one (it retries), no more than the backoff allows
/// in the time it has run, each logged pause within its documented range. Returns the attempt lines.
fn check_backoff<'l>(log: &'l str, ran_for: Duration, what: &str) -> Vec<&'l str> {
    let lines = attempt_lines(log);
    let bound = most_attempts(ran_for.as_secs_f64(), RECONNECT_MIN_S, RECONNECT_MAX_S);
    assert!(
        lines.len() >= 2,
        "{what}: the daemon should have retried within {ran_for:?}; log:\n{log}"
    );
    assert!(
        lines.len() <= bound,
        "{what}: {} attempts in {ran_for:?}, more than the {bound} the backoff ({RECONNECT_MIN_S} s to \
         {RECONNECT_MAX_S} s) allows; log:\n{log}",
        lines.len()
    );
    for (n, line) in lines.iter().enumerate() {
        let (low, high) = backoff_range(n, RECONNECT_MIN_S, RECONNECT_MAX_S);
        let pause = retry_in_s(line);
        // The log prints the f64 in full; 1e-9 covers the Duration round trip.
        assert!(
            pause >= low - 1e-9 && pause <= high + 1e-9,
            "{what}: pause {n} is {pause} s, outside [{low}, {high}]: {line}"
        );
    }
    lines
}

// ---------------------------------------------------------------------------------------------------------------
// TLS

/// What Mosquitto and the daemon need: the CA that signed the broker's certificate, the certificate and its key,
/// and a CA that signed nothing here.
struct Pki {
    ca_pem: String,
    server_cert_pem: String,
    server_key_pem: String,
    unrelated_ca_pem: String,
}

/// A self-signed CA certificate and its issuer (for signing).
fn make_ca(common_name: &str) -> (String, Issuer<'static, KeyPair>) {
    let key = KeyPair::generate().expect("CA key");
    let mut params = CertificateParams::new(Vec::<String>::new()).expect("CA parameters");
    params
        .distinguished_name
        .push(DnType::CommonName, common_name);
    params
        .distinguished_name
        .push(DnType::OrganizationName, "Brackenfield Works (test)");
    params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    params.key_usages = vec![
        KeyUsagePurpose::KeyCertSign,
        KeyUsagePurpose::CrlSign,
        KeyUsagePurpose::DigitalSignature,
    ];
    let cert = params.self_signed(&key).expect("self-sign the CA");
    (cert.pem(), Issuer::new(params, key))
}

fn make_pki() -> Pki {
    let (ca_pem, ca) = make_ca("Brackenfield Works test CA");
    let (unrelated_ca_pem, _) = make_ca("Unrelated test CA");
    // The daemon connects to 127.0.0.1, so the IP address must be a subject alternative name; localhost too, for
    // anyone who points a host name at the same broker.
    let key = KeyPair::generate().expect("server key");
    let mut params = CertificateParams::new(vec!["127.0.0.1".to_string(), "localhost".to_string()])
        .expect("server parameters");
    params
        .distinguished_name
        .push(DnType::CommonName, "brackenfield-broker.test");
    params.key_usages = vec![KeyUsagePurpose::DigitalSignature];
    params.extended_key_usages = vec![ExtendedKeyUsagePurpose::ServerAuth];
    let cert = params.signed_by(&key, &ca).expect("sign the server cert");
    Pki {
        ca_pem,
        server_cert_pem: cert.pem(),
        server_key_pem: key.serialize_pem(),
        unrelated_ca_pem,
    }
}

/// A Mosquitto with its plain listener (for the test's client) and a TLS listener on `tls_port`; None when not
/// installed.
fn tls_broker(pki: &Pki, tls_port: u16) -> Option<Mosquitto> {
    let extra = format!(
        "# A second listener, with TLS, for the daemon; cafile/certfile/keyfile apply to it alone.\n\
         listener {tls_port} 127.0.0.1\n\
         cafile {{dir}}/ca.pem\n\
         certfile {{dir}}/server.pem\n\
         keyfile {{dir}}/server.key\n"
    );
    let broker = Mosquitto::start_with(
        &extra,
        &[
            ("ca.pem", pki.ca_pem.as_bytes()),
            ("server.pem", pki.server_cert_pem.as_bytes()),
            ("server.key", pki.server_key_pem.as_bytes()),
        ],
    )?;
    assert!(
        wait_for_port(tls_port, WAIT),
        "no TLS listener on {tls_port}; mosquitto log:\n{}",
        broker.log()
    );
    Some(broker)
}

/// A daemon that trusts `ca_pem` and connects to the TLS listener.
fn tls_gateway(tls_port: u16, name: &str, ca_pem: &str, metrics_port: Option<u16>) -> Gateway {
    let dir = tempfile::tempdir().expect("scratch dir");
    let ca = dir.path().join("broker-ca.pem");
    std::fs::write(&ca, ca_pem).expect("write the CA file");
    let mut tail = format!("\n[broker.tls]\nca = {}\n", toml_path(&ca));
    if let Some(p) = metrics_port {
        tail.push_str(&format!("\n[metrics]\nlisten = \"127.0.0.1:{p}\"\n"));
    }
    Gateway::start(
        dir,
        &gateway_config(tls_port, &client_id(name), "", 1, &tail),
        "info",
    )
}

#[test]
fn tls_with_the_right_ca_connects_and_processes_samples() {
    let pki = make_pki();
    let tls_port = free_port();
    let Some(broker) = tls_broker(&pki, tls_port) else {
        return;
    };
    let observer = TestClient::connect(broker.port());
    let id = client_id("tls-good");
    let status = observer.subscribe(&status_topic(&id), QoS::AtLeastOnce);
    let outputs = observer.subscribe("brackenfield/clean/TT-101", QoS::AtLeastOnce);
    let mut gateway = tls_gateway(tls_port, "tls-good", &pki.ca_pem, None);
    let online = wait_status(&status, "online", Duration::from_secs(10));
    assert!(
        online.is_some(),
        "no online status over TLS; daemon log:\n{}\nmosquitto log:\n{}",
        gateway.log(),
        broker.log()
    );

    let publisher = TestClient::connect(broker.port());
    publish_tt101(&publisher, past_t0(), 0, 5);
    expect_tt101_outputs(&outputs, 5, &gateway);

    let log = gateway.log();
    assert!(attempt_lines(&log).is_empty(), "no failed attempt: {log}");
    let took = stop_cleanly(&mut gateway, "TLS, right CA");
    println!(
        "TLS, right CA: online, 5 samples in, 5 outputs out, stopped in {took:.2?} after SIGTERM"
    );
}

#[test]
fn tls_with_an_unrelated_ca_fails_clearly_backs_off_and_stops_on_sigterm() {
    let pki = make_pki();
    let tls_port = free_port();
    let Some(broker) = tls_broker(&pki, tls_port) else {
        return;
    };
    let metrics_port = free_port();
    let mut gateway = tls_gateway(
        tls_port,
        "tls-bad",
        &pki.unrelated_ca_pem,
        Some(metrics_port),
    );
    std::thread::sleep(FAILING_WINDOW);
    let ran_for = gateway.started.elapsed();
    assert!(
        gateway.running(),
        "the daemon exited on a certificate error; log:\n{}",
        gateway.log()
    );
    // Health says why it is not ready, and the connection gauge is 0.
    let health = http_get(metrics_port, "/health");
    assert!(
        health.starts_with("HTTP/1.1 503") && health.contains("not connected to the MQTT broker"),
        "{health}"
    );
    let scrape = http_get(metrics_port, "/metrics");
    assert_eq!(metric(&scrape, "gaugewise_broker_connected"), Some(0.0));

    let log = gateway.log();
    let lines = check_backoff(&log, ran_for, "TLS, unrelated CA");
    for line in &lines {
        assert!(
            line.contains("cannot connect to the broker") && line.contains("certificate"),
            "each attempt's line should name the certificate problem: {line}"
        );
    }
    // The broker's side, an independent count: OpenSSL logs each handshake the client ended with an "unknown CA"
    // alert (the test's own port probe ends with an EOF instead, so it is not counted).
    let broker_log = broker.log();
    let on_tls = broker_log
        .lines()
        .filter(|l| l.contains("alert unknown ca"))
        .count();
    let bound_now = most_attempts(
        gateway.started.elapsed().as_secs_f64(),
        RECONNECT_MIN_S,
        RECONNECT_MAX_S,
    );
    assert!(
        (1..=bound_now).contains(&on_tls),
        "mosquitto saw {on_tls} handshakes refused for an unknown CA, expected 1 to {bound_now}; its log:\n{broker_log}"
    );

    let took = stop_cleanly(&mut gateway, "TLS, unrelated CA");
    println!(
        "TLS, unrelated CA: {} attempts in {ran_for:.2?} (backoff bound {}; mosquitto saw {on_tls} \"unknown ca\" alerts), pauses {:?} s; \
         stopped in {took:.2?} after SIGTERM; first attempt line:\n  {}",
        lines.len(),
        most_attempts(ran_for.as_secs_f64(), RECONNECT_MIN_S, RECONNECT_MAX_S),
        lines.iter().map(|l| retry_in_s(l)).collect::<Vec<_>>(),
        lines[0]
    );
}

// ---------------------------------------------------------------------------------------------------------------
// Password

/// Invented accounts: the test's own observer, and the gateway. The wrong password is a distinctive string so
/// that finding it anywhere in the log cannot be a coincidence.
const OBSERVER: (&str, &str) = ("bw-observer", "Obs3rver-TT101-pw");
const GATEWAY: (&str, &str) = ("brackenfield-gw", "Gw-FT201-s3cret-pw");
const WRONG_PASSWORD: &str = "Wr0ng-LT301-Pa55word-9f1c";

/// Where `mosquitto_passwd` is: on PATH, else where Debian puts it.
fn mosquitto_passwd_binary() -> Option<PathBuf> {
    let on_path = std::env::var_os("PATH")
        .map(|paths| {
            std::env::split_paths(&paths)
                .map(|d| d.join("mosquitto_passwd"))
                .collect::<Vec<_>>()
        })
        .unwrap_or_default();
    on_path
        .into_iter()
        .chain([PathBuf::from("/usr/bin/mosquitto_passwd")])
        .find(|p| p.is_file())
}

/// A Mosquitto that refuses anonymous clients and knows the observer and the gateway; None (with the reason
/// printed, or a failure with CI=true) when `mosquitto` or `mosquitto_passwd` is missing.
fn password_broker() -> Option<Mosquitto> {
    let Some(tool) = mosquitto_passwd_binary() else {
        let reason = "mosquitto_passwd is not installed (Debian package mosquitto): skipping the password test";
        if std::env::var("CI").is_ok_and(|v| v == "true") {
            panic!("{reason}; on CI .ci/run installs it");
        }
        eprintln!("{reason}");
        return None;
    };
    let dir = tempfile::tempdir().expect("scratch dir");
    let file = dir.path().join("passwd");
    for (i, (user, password)) in [OBSERVER, GATEWAY].iter().enumerate() {
        let mut cmd = Command::new(&tool);
        if i == 0 {
            cmd.arg("-c");
        }
        let out = cmd
            .arg("-b")
            .arg(&file)
            .arg(user)
            .arg(password)
            .output()
            .expect("run mosquitto_passwd");
        assert!(
            out.status.success(),
            "mosquitto_passwd: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let hashed = std::fs::read(&file).expect("read the password file");
    Mosquitto::start_with(
        "allow_anonymous false\npassword_file {dir}/passwd\n",
        &[("passwd", &hashed)],
    )
}

fn observer_options() -> ClientOptions {
    ClientOptions {
        credentials: Some((OBSERVER.0.to_string(), OBSERVER.1.to_string())),
        ..ClientOptions::default()
    }
}

#[test]
fn the_right_password_from_a_file_connects() {
    let Some(broker) = password_broker() else {
        return;
    };
    let observer = TestClient::connect_with(broker.port(), observer_options());
    let id = client_id("pw-good");
    let status = observer.subscribe(&status_topic(&id), QoS::AtLeastOnce);
    let outputs = observer.subscribe("brackenfield/clean/TT-101", QoS::AtLeastOnce);

    let dir = tempfile::tempdir().expect("scratch dir");
    let secret = dir.path().join("broker-password");
    // One trailing newline, as an editor leaves it: the daemon drops it (config/brackenfield.toml).
    std::fs::write(&secret, format!("{}\n", GATEWAY.1)).expect("write the password file");
    let broker_lines = format!(
        "username = \"{}\"\npassword_file = {}",
        GATEWAY.0,
        toml_path(&secret)
    );
    let mut gateway = Gateway::start(
        dir,
        &gateway_config(broker.port(), &id, &broker_lines, 1, ""),
        "debug",
    );
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "no online status with the right password; daemon log:\n{}\nmosquitto log:\n{}",
        gateway.log(),
        broker.log()
    );
    let publisher = TestClient::connect_with(broker.port(), observer_options());
    publish_tt101(&publisher, past_t0(), 0, 5);
    expect_tt101_outputs(&outputs, 5, &gateway);
    stop_cleanly(&mut gateway, "right password");
    let log = gateway.log();
    assert!(
        !log.contains(GATEWAY.1),
        "the password is in the daemon's log:\n{log}"
    );
}

#[test]
fn a_wrong_password_is_refused_with_backoff_and_never_logged() {
    let Some(broker) = password_broker() else {
        return;
    };
    let observer = TestClient::connect_with(broker.port(), observer_options());
    let id = client_id("pw-bad");
    let status = observer.subscribe(&status_topic(&id), QoS::AtLeastOnce);

    let broker_lines = format!(
        "username = \"{}\"\npassword = \"{WRONG_PASSWORD}\"",
        GATEWAY.0
    );
    // trace: the most verbose level, so no debug line of ours or of a dependency can carry the password unseen.
    let mut gateway = Gateway::start(
        tempfile::tempdir().expect("scratch dir"),
        &gateway_config(broker.port(), &id, &broker_lines, 1, ""),
        "trace",
    );
    std::thread::sleep(FAILING_WINDOW);
    let ran_for = gateway.started.elapsed();
    assert!(
        gateway.running(),
        "the daemon exited on a refused password; log:\n{}",
        gateway.log()
    );
    let log = gateway.log();
    let lines = check_backoff(&log, ran_for, "wrong password");
    // MQTT 3.1.1 has two return codes for this: 4 (bad user name or password) and 5 (not authorised); the daemon
    // logs either in words (src/runtime.rs, `refusal_text`). Mosquitto's choice is its own business.
    for line in &lines {
        assert!(
            line.contains("the broker refused the connection")
                && (line.contains("bad user name or password") || line.contains("not authorised")),
            "each attempt's line should say the broker refused the credentials: {line}"
        );
    }
    assert!(
        status.try_recv().is_err(),
        "a refused daemon published a status"
    );

    let took = stop_cleanly(&mut gateway, "wrong password");
    let log = gateway.log();
    assert!(
        !log.contains(WRONG_PASSWORD),
        "the wrong password is in the daemon's log:\n{log}"
    );
    println!(
        "wrong password: {} refusals in {ran_for:.2?} (backoff bound {}), pauses {:?} s; stopped in {took:.2?} \
         after SIGTERM; {} log lines at trace, none with the password; first refusal line:\n  {}",
        lines.len(),
        most_attempts(ran_for.as_secs_f64(), RECONNECT_MIN_S, RECONNECT_MAX_S),
        lines.iter().map(|l| retry_in_s(l)).collect::<Vec<_>>(),
        log.lines().count(),
        lines[0]
    );
}

// ---------------------------------------------------------------------------------------------------------------
// Flood of topic names

/// Sends a GET and returns the whole answer (status line, headers, body); the server closes after one answer.
fn http_get(port: u16, path: &str) -> String {
    let mut s = TcpStream::connect(("127.0.0.1", port)).expect("connect to the metrics endpoint");
    s.set_read_timeout(Some(WAIT)).expect("read timeout");
    s.set_write_timeout(Some(WAIT)).expect("write timeout");
    s.write_all(format!("GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n").as_bytes())
        .expect("send the request");
    let mut bytes = Vec::new();
    let _ = s.read_to_end(&mut bytes);
    String::from_utf8(bytes).expect("UTF-8 answer")
}

/// The value of one series (`name` or `name{label="value"}`) in a scrape, if present.
fn metric(scrape: &str, series: &str) -> Option<f64> {
    scrape.lines().find_map(|l| {
        l.strip_prefix(series)
            .and_then(|rest| rest.strip_prefix(' '))
            .and_then(|v| v.trim().parse().ok())
    })
}

/// A process's resident set (VmRSS in /proc/PID/status), in KiB.
fn rss_kib(pid: u32) -> u64 {
    let status =
        std::fs::read_to_string(format!("/proc/{pid}/status")).expect("read /proc/PID/status");
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .expect("VmRSS in /proc/PID/status")
}

const FLOOD_TOPICS: usize = 100_000;
const MAX_CHANNELS: usize = 1_000;
/// Publishes are sent in batches of this many; the next batch waits until the daemon has received all but one
/// batch of what was sent, so at most two batches are ever queued in the broker (QoS 0 may be dropped there).
const BATCH: usize = 2_000;
/// Samples of the known channel before the flood.
const WARM_UP: usize = 20;
/// The VmRSS the flood may add, by the test's own construction: 1,000 channels at a generous 8 KiB of state each
/// (a filter, its detectors, an output topic and map entries) is 8 MiB, plus 8 MiB for the rejection counters (at
/// most 1,024 keys of at most 200 bytes, src/runtime/counters.rs), the queues and the allocator's slack. A
/// per-topic leak of 200 bytes or more over the 99,001 refused samples would break it (the growth measured
/// on the shared 2-core machine was about 2.5 MiB).
const RSS_GROWTH_BOUND_KIB: u64 = 16 * 1024;

#[test]
fn a_flood_of_distinct_topics_is_held_at_max_channels() {
    let Some(broker) = Mosquitto::start() else {
        return;
    };
    let id = client_id("flood");
    let metrics_port = free_port();
    let observer = TestClient::connect(broker.port());
    let status = observer.subscribe(&status_topic(&id), QoS::AtLeastOnce);
    let outputs = observer.subscribe("brackenfield/clean/TT-101", QoS::AtLeastOnce);
    let tail = format!(
        "\n[limits]\nmax_channels = {MAX_CHANNELS}\n\n[metrics]\nlisten = \"127.0.0.1:{metrics_port}\"\n"
    );
    // Inputs at QoS 0, as the flood is sent: nothing is acknowledged or stored for it.
    let mut gateway = Gateway::start(
        tempfile::tempdir().expect("scratch dir"),
        &gateway_config(broker.port(), &id, "", 0, &tail),
        "info",
    );
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "no online status; daemon log:\n{}",
        gateway.log()
    );

    // A channel the daemon knows before the flood: one of the 1,000 slots is its.
    let t0 = past_t0();
    let publisher = TestClient::connect(broker.port());
    publish_tt101(&publisher, t0, 0, WARM_UP);
    expect_tt101_outputs(&outputs, WARM_UP, &gateway);
    let rss_before = rss_kib(gateway.pid());

    let scrape = |gateway: &Gateway| -> String {
        let text = http_get(metrics_port, "/metrics");
        assert!(
            text.starts_with("HTTP/1.1 200"),
            "metrics: {text}\nlog:\n{}",
            gateway.log()
        );
        text
    };
    let received =
        |text: &str| metric(text, "gaugewise_samples_received_total").unwrap_or(0.0) as usize;
    let mut max_channels_seen = 0.0f64;
    let mut rss_peak = rss_before;
    let mut scrapes = 0usize;
    let flood_started = Instant::now();
    let mut sent = 0usize;
    while sent < FLOOD_TOPICS {
        let batch = BATCH.min(FLOOD_TOPICS - sent);
        for i in sent..sent + batch {
            publisher.publish(
                &format!("brackenfield/raw/FX-{i:06}"),
                format!(r#"{{"t":{t0:.1},"v":{:.2}}}"#, 10.0 + (i % 97) as f64 * 0.1),
                QoS::AtMostOnce,
                false,
            );
        }
        sent += batch;
        // Bounded: a daemon that stops taking messages fails the count checks below instead of hanging the test.
        let want = WARM_UP + sent.saturating_sub(BATCH);
        let deadline = Instant::now() + Duration::from_secs(20);
        loop {
            let text = scrape(&gateway);
            scrapes += 1;
            max_channels_seen =
                max_channels_seen.max(metric(&text, "gaugewise_channels").unwrap_or(0.0));
            rss_peak = rss_peak.max(rss_kib(gateway.pid()));
            if received(&text) >= want || Instant::now() >= deadline {
                break;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
    }
    // Everything sent has arrived when the received counter stops short of nothing; bounded as above.
    let want = WARM_UP + FLOOD_TOPICS;
    let deadline = Instant::now() + Duration::from_secs(30);
    // Received is counted where messages are routed; the workers publish or refuse them a moment later, so wait
    // until every received sample has been accounted for one way or the other.
    let settled = |text: &str| {
        let accounted = metric(text, "gaugewise_outputs_published_total").unwrap_or(0.0)
            + metric(
                text,
                r#"gaugewise_rejected_total{reason="too_many_channels"}"#,
            )
            .unwrap_or(0.0);
        received(text) >= want && accounted >= want as f64
    };
    let mut text = scrape(&gateway);
    while !settled(&text) && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(20));
        text = scrape(&gateway);
    }
    let flood_took = flood_started.elapsed();
    rss_peak = rss_peak.max(rss_kib(gateway.pid()));
    let rss_after = rss_kib(gateway.pid());
    assert!(
        gateway.running(),
        "the daemon died in the flood; log:\n{}",
        gateway.log()
    );

    let got = |series: &str| metric(&text, series).unwrap_or(f64::NAN);
    let received_total = got("gaugewise_samples_received_total");
    let too_many = got(r#"gaugewise_rejected_total{reason="too_many_channels"}"#);
    let published = got("gaugewise_outputs_published_total");
    let channels = got("gaugewise_channels");
    max_channels_seen = max_channels_seen.max(channels);
    assert_eq!(
        received_total,
        want as f64,
        "the broker delivered every sample (the throttle keeps it from dropping QoS 0); mosquitto log:\n{}",
        broker.log()
    );
    assert_eq!(
        channels, MAX_CHANNELS as f64,
        "the channel gauge is at the limit"
    );
    assert_eq!(
        max_channels_seen, MAX_CHANNELS as f64,
        "the channel gauge never passed the limit"
    );
    // TT-101 took one slot, the first 999 flood channels the rest; every other flood sample is refused.
    let admitted = (MAX_CHANNELS - 1) as f64;
    assert_eq!(too_many, FLOOD_TOPICS as f64 - admitted, "{text}");
    assert_eq!(published, (WARM_UP as f64) + admitted, "{text}");
    for reason in Reject::REASONS {
        assert_eq!(
            metric(
                &text,
                &format!("gaugewise_rejected_total{{reason=\"{reason}\"}}")
            ),
            Some(0.0),
            "no sample was refused as {reason}"
        );
    }
    assert!(
        rss_after <= rss_before + RSS_GROWTH_BOUND_KIB && rss_peak <= rss_before + RSS_GROWTH_BOUND_KIB,
        "VmRSS grew from {rss_before} KiB to {rss_after} KiB (peak {rss_peak} KiB), over the bound of +{RSS_GROWTH_BOUND_KIB} KiB"
    );
    let health = http_get(metrics_port, "/health");
    assert!(health.starts_with("HTTP/1.1 200"), "{health}");

    // Refusals are logged at most once per reason every 10 s (README, "Bad messages"), not once per sample.
    let log = gateway.log();
    let refusal_lines = log
        .lines()
        .filter(|l| l.contains("too_many_channels"))
        .count();
    let allowed = 2 + (gateway.started.elapsed().as_secs() / 10) as usize;
    assert!(
        (1..=allowed).contains(&refusal_lines),
        "{refusal_lines} refusal lines, expected 1 to {allowed}; log:\n{log}"
    );

    // The known channel carries on; a new one is still refused.
    publish_tt101(&publisher, t0, WARM_UP, 5);
    expect_tt101_outputs(&outputs, 5, &gateway);
    publisher.publish(
        "brackenfield/raw/LT-301",
        format!(r#"{{"t":{t0:.1},"v":3.2}}"#),
        QoS::AtLeastOnce,
        false,
    );
    assert!(publisher.flush(WAIT));
    let deadline = Instant::now() + WAIT;
    let mut after = scrape(&gateway);
    while metric(
        &after,
        r#"gaugewise_rejected_total{reason="too_many_channels"}"#,
    ) == Some(too_many)
        && Instant::now() < deadline
    {
        std::thread::sleep(Duration::from_millis(20));
        after = scrape(&gateway);
    }
    assert_eq!(
        metric(
            &after,
            r#"gaugewise_rejected_total{reason="too_many_channels"}"#
        ),
        Some(too_many + 1.0),
        "a new channel after the flood is refused"
    );
    assert_eq!(
        metric(&after, "gaugewise_channels"),
        Some(MAX_CHANNELS as f64)
    );

    let took = stop_cleanly(&mut gateway, "flood");
    println!(
        "flood: {FLOOD_TOPICS} distinct topics at QoS 0 in batches of {BATCH}, {flood_took:.2?} until all received \
         ({scrapes} scrapes); received {received_total}, channels {channels} (max seen {max_channels_seen}), \
         too_many_channels {too_many}, outputs {published}; VmRSS before {rss_before} KiB, peak {rss_peak} KiB, \
         after {rss_after} KiB (bound +{RSS_GROWTH_BOUND_KIB} KiB); {refusal_lines} refusal log lines; stopped \
         in {took:.2?}"
    );
}

// ---------------------------------------------------------------------------------------------------------------
// The payload reader on what src/ingest.rs's property tests leave out

const NOW: f64 = 1_772_409_600.0; // 2026-03-02T00:00:00Z, the tests' fixed receive time

fn json_rule(limit: usize) -> InputRule {
    InputRule::new(
        "brackenfield/raw/+",
        "{2}",
        PayloadFormat::Json {
            value: "/v".to_string(),
            time: Some("/t".to_string()),
            time_format: TimeFormat::Auto,
            quality: Some("/q".to_string()),
            good_quality: vec![serde_json::json!("good")],
        },
        limit,
    )
    .expect("a valid rule")
}

fn number_rule(limit: usize) -> InputRule {
    InputRule::new("brackenfield/legacy/+", "{2}", PayloadFormat::Number, limit)
        .expect("a valid rule")
}

/// A read either gives a finite sample (or a missing one) or a refusal with one of the documented reasons.
fn check_read(result: Result<gaugewise::ingest::Reading, Reject>) -> Result<(), TestCaseError> {
    match result {
        Ok(r) => {
            prop_assert!(r.time.is_finite() && r.time >= 0.0 && r.time <= NOW + 3600.0);
            prop_assert!(r.value.is_none_or(f64::is_finite));
        }
        Err(reject) => prop_assert!(Reject::REASONS.contains(&reject.reason())),
    }
    Ok(())
}

/// Where a deeply nested value sits in a sample.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Deep {
    /// In a member the rule does not read, beside the sample's fields.
    Beside,
    /// As the value itself (`/v`).
    AsValue,
    /// As the whole document.
    Whole,
}

/// Arrays or objects nested `depth` levels, placed as `place` says; with `close` false the text is cut off at the
/// bottom, so it is never valid JSON.
fn nested(depth: usize, objects: bool, place: Deep, close: bool) -> String {
    let (open, shut) = if objects {
        (r#"{"x":"#, "}")
    } else {
        ("[", "]")
    };
    let (head, foot) = match place {
        Deep::Beside => (r#"{"t":1772400000,"v":71.5,"deep":"#, "}"),
        Deep::AsValue => (r#"{"t":1772400000,"v":"#, "}"),
        Deep::Whole => ("", ""),
    };
    let mut s = String::with_capacity(depth * 6 + 40);
    s.push_str(head);
    for _ in 0..depth {
        s.push_str(open);
    }
    s.push('1');
    if close {
        for _ in 0..depth {
            s.push_str(shut);
        }
        s.push_str(foot);
    }
    s
}

proptest! {
    // Few cases: each may build a quarter-megabyte payload; the reach is in the sizes, not the count.
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn arbitrary_bytes_of_any_length_are_read_or_refused(
        bytes in prop::collection::vec(any::<u8>(), 0..4096),
        repeat in 1usize..64,
        limit in prop_oneof![Just(64usize), Just(4096), Just(262_144)],
    ) {
        // Up to 256 KiB of random bytes, non-UTF-8 included, around each limit.
        let payload = bytes.repeat(repeat);
        for rule in [json_rule(limit), number_rule(limit)] {
            let result = rule.read(&payload, NOW);
            if payload.len() > limit {
                prop_assert_eq!(result, Err(Reject::TooLarge { bytes: payload.len(), limit }));
            } else {
                check_read(result)?;
            }
        }
    }

    #[test]
    fn long_valid_documents_are_read_up_to_the_limit(pad in 0usize..300_000) {
        let payload = format!(r#"{{"t":1772400000,"pad":"{}","v":72.25,"q":"good"}}"#, "p".repeat(pad));
        let limit = 262_144;
        let result = json_rule(limit).read(payload.as_bytes(), NOW);
        if payload.len() > limit {
            prop_assert_eq!(result, Err(Reject::TooLarge { bytes: payload.len(), limit }));
        } else {
            prop_assert_eq!(result.map(|r| r.value), Ok(Some(72.25)));
        }
    }

    #[test]
    fn deeply_nested_json_is_read_or_refused_not_a_crash(
        depth in prop_oneof![1usize..200, 200usize..20_000],
        objects in any::<bool>(),
        place in prop_oneof![Just(Deep::Beside), Just(Deep::AsValue), Just(Deep::Whole)],
        close in any::<bool>(),
    ) {
        // Far past serde_json's recursion limit of 128: the reader descends only along its pointers and skips
        // everything else (serde's IgnoredAny, which serde_json walks with a loop, not recursion), so depth costs
        // nothing and a valid document is read whatever its nesting.
        let payload = nested(depth, objects, place, close);
        let result = json_rule(1 << 20).read(payload.as_bytes(), NOW);
        check_read(result)?;
        let expected = match (close, place) {
            (false, _) => Err(Reject::NotJson),
            (true, Deep::Beside) => Ok(Some(71.5)),
            (true, Deep::AsValue) => Err(Reject::WrongType("value")),
            (true, Deep::Whole) => Err(Reject::MissingField("value")),
        };
        prop_assert_eq!(result.map(|r| r.value), expected);
    }
}
