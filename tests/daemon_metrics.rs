//! The metrics and health endpoint of `gaugewise run` (`[metrics]`), against the embedded broker: the scrape is
//! parsed strictly as Prometheus text exposition (families declared once and before their samples, names and
//! label syntax, no duplicate series, histogram buckets cumulative up to `+Inf` = `_count`), and its counters are
//! checked against what the test sent. Health is 200 with the broker up and 503, with the reason, while the broker
//! cannot be reached; a broker that is down at boot still gives `READY=1`. Malformed and oversized requests get
//! their 4xx answers. Every wait is bounded; nothing is timed.

mod common;

use common::broker::{free_port, recv_n, wait_for_port, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use rumqttc::QoS;
use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::net::TcpStream;
use std::os::unix::net::UnixDatagram;
use std::time::{Duration, Instant};

const MODELS: &str = concat!(
    level_default!(obs_var = 0.25, level_var = 0.01),
    tt101_lag!(mean = 72.5),
);

fn config(broker_port: u16, metrics_port: u16, client_id: &str) -> String {
    let sections = PlantSections {
        reconnect: Some((0.1, 0.5)),
        extra: &format!("\n[metrics]\nlisten = \"127.0.0.1:{metrics_port}\"\n"),
        ..PlantSections::new(broker_port, client_id)
    };
    format!("{MODELS}{}", sections.render())
}

/// A response: status code, header block (lower-cased names), body.
struct Reply {
    status: u16,
    headers: String,
    body: String,
}

/// Sends `request` as is and reads the answer until the server closes the connection.
fn http_raw(port: u16, request: &[u8]) -> Reply {
    let mut s = TcpStream::connect(("127.0.0.1", port)).expect("connect to the metrics endpoint");
    s.set_read_timeout(Some(WAIT)).unwrap();
    s.set_write_timeout(Some(WAIT)).unwrap();
    // The server may answer (and close) before reading everything of an oversized request.
    let _ = s.write_all(request);
    let mut bytes = Vec::new();
    let _ = s.read_to_end(&mut bytes);
    let text = String::from_utf8(bytes).expect("UTF-8 response");
    let (head, body) = text.split_once("\r\n\r\n").expect("a complete response");
    let status = head
        .split(' ')
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or_else(|| panic!("no status in {head:?}"));
    Reply {
        status,
        headers: head.to_ascii_lowercase(),
        body: body.to_string(),
    }
}

fn get(port: u16, path: &str) -> Reply {
    http_raw(
        port,
        format!("GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nUser-Agent: gaugewise-test\r\n\r\n")
            .as_bytes(),
    )
}

/// One metric family's samples: series (name plus sorted labels) to value.
type Series = BTreeMap<String, f64>;

/// Parses Prometheus text exposition (format 0.0.4) strictly enough to catch what a scraper would reject or
/// misread; panics with the offending line.
fn parse_exposition(text: &str) -> Series {
    fn valid_name(n: &str) -> bool {
        let mut chars = n.chars();
        chars
            .next()
            .is_some_and(|c| c.is_ascii_alphabetic() || c == '_' || c == ':')
            && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':')
    }
    /// `{a="x",b="y"}` into sorted pairs, with escapes undone.
    fn labels(text: &str, line: &str) -> Vec<(String, String)> {
        let mut out = Vec::new();
        let mut rest = text;
        while !rest.is_empty() {
            let (name, after) = rest
                .split_once("=\"")
                .unwrap_or_else(|| panic!("label without =\": {line}"));
            assert!(valid_name(name), "label name {name:?}: {line}");
            let mut value = String::new();
            let mut chars = after.char_indices();
            let end = loop {
                match chars.next() {
                    Some((_, '\\')) => match chars.next() {
                        Some((_, 'n')) => value.push('\n'),
                        Some((_, c @ ('\\' | '"'))) => value.push(c),
                        other => panic!("bad escape {other:?}: {line}"),
                    },
                    Some((i, '"')) => break i,
                    Some((_, c)) => {
                        assert!(c != '\n', "raw newline in a label: {line}");
                        value.push(c)
                    }
                    None => panic!("unterminated label value: {line}"),
                }
            };
            out.push((name.to_string(), value));
            rest = &after[end + 1..];
            rest = rest.strip_prefix(',').unwrap_or(rest);
        }
        out.sort();
        out
    }

    assert!(
        text.ends_with('\n'),
        "the exposition must end with a newline"
    );
    let mut types: BTreeMap<String, String> = BTreeMap::new();
    let mut helps: BTreeMap<String, ()> = BTreeMap::new();
    let mut series = Series::new();
    // Histogram family -> its buckets in order, as (le, cumulative count).
    let mut buckets: BTreeMap<String, Vec<(f64, f64)>> = BTreeMap::new();
    let mut seen_samples: BTreeMap<String, ()> = BTreeMap::new();
    for line in text.lines() {
        assert!(!line.is_empty(), "empty line in the exposition");
        if let Some(rest) = line.strip_prefix("# HELP ") {
            let name = rest.split(' ').next().unwrap();
            assert!(valid_name(name), "{line}");
            assert!(
                helps.insert(name.to_string(), ()).is_none(),
                "HELP twice: {line}"
            );
            continue;
        }
        if let Some(rest) = line.strip_prefix("# TYPE ") {
            let mut parts = rest.split(' ');
            let (name, kind) = (parts.next().unwrap(), parts.next().unwrap_or(""));
            assert!(parts.next().is_none(), "{line}");
            assert!(
                ["counter", "gauge", "histogram", "summary", "untyped"].contains(&kind),
                "{line}"
            );
            assert!(
                !seen_samples.contains_key(name),
                "TYPE after its samples: {line}"
            );
            assert!(
                types.insert(name.to_string(), kind.to_string()).is_none(),
                "TYPE twice: {line}"
            );
            continue;
        }
        assert!(!line.starts_with('#'), "unknown comment form: {line}");
        let (series_text, value) = line
            .rsplit_once(' ')
            .unwrap_or_else(|| panic!("no value: {line}"));
        let value: f64 = match value {
            "+Inf" => f64::INFINITY,
            "-Inf" => f64::NEG_INFINITY,
            v => v.parse().unwrap_or_else(|_| panic!("bad value: {line}")),
        };
        let (name, pairs) = match series_text.split_once('{') {
            Some((n, l)) => (
                n,
                labels(
                    l.strip_suffix('}')
                        .unwrap_or_else(|| panic!("unclosed labels: {line}")),
                    line,
                ),
            ),
            None => (series_text, Vec::new()),
        };
        assert!(valid_name(name), "{line}");
        // The family a sample belongs to: itself, or a histogram's _bucket/_sum/_count.
        let family = if types.contains_key(name) {
            name.to_string()
        } else {
            ["_bucket", "_sum", "_count"]
                .iter()
                .find_map(|s| {
                    name.strip_suffix(s)
                        .filter(|f| types.get(*f).is_some_and(|k| k == "histogram"))
                })
                .unwrap_or_else(|| panic!("sample of an undeclared family: {line}"))
                .to_string()
        };
        assert!(helps.contains_key(&family), "no HELP for {family}");
        seen_samples.insert(family.clone(), ());
        if name.ends_with("_bucket") {
            let le = pairs
                .iter()
                .find(|(k, _)| k == "le")
                .unwrap_or_else(|| panic!("bucket without le: {line}"));
            let le = if le.1 == "+Inf" {
                f64::INFINITY
            } else {
                le.1.parse().unwrap()
            };
            buckets.entry(family.clone()).or_default().push((le, value));
        }
        let key = if pairs.is_empty() {
            name.to_string()
        } else {
            let l: Vec<String> = pairs.iter().map(|(k, v)| format!("{k}={v}")).collect();
            format!("{name}{{{}}}", l.join(","))
        };
        assert!(
            series.insert(key, value).is_none(),
            "duplicate series: {line}"
        );
    }
    for (family, b) in &buckets {
        assert!(
            b.windows(2).all(|w| w[0].0 < w[1].0),
            "{family}: le not increasing"
        );
        assert!(
            b.windows(2).all(|w| w[0].1 <= w[1].1),
            "{family}: buckets not cumulative"
        );
        let last = b.last().unwrap();
        assert_eq!(last.0, f64::INFINITY, "{family}: no +Inf bucket");
        assert_eq!(
            Some(&last.1),
            series.get(&format!("{family}_count")),
            "{family}: +Inf != _count"
        );
        assert!(
            series.contains_key(&format!("{family}_sum")),
            "{family}: no _sum"
        );
    }
    series
}

fn scrape(port: u16) -> Series {
    let r = get(port, "/metrics");
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(
        r.headers
            .contains("content-type: text/plain; version=0.0.4"),
        "{}",
        r.headers
    );
    parse_exposition(&r.body)
}

/// Scrapes until `done` holds for the parsed metrics, at most `timeout`; returns the last scrape.
fn scrape_until(port: u16, timeout: Duration, done: impl Fn(&Series) -> bool) -> Series {
    let deadline = Instant::now() + timeout;
    loop {
        let m = scrape(port);
        if done(&m) || Instant::now() >= deadline {
            return m;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn value(m: &Series, key: &str) -> f64 {
    *m.get(key)
        .unwrap_or_else(|| panic!("no series {key} in {:#?}", m.keys().collect::<Vec<_>>()))
}

#[test]
fn metrics_count_what_the_daemon_does_and_health_is_ok() {
    let broker = TestBroker::embedded();
    let port = free_port();
    let client_id = format!("gaugewise-test-metrics-{}", std::process::id());
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let daemon = Daemon::start(&config(broker.port(), port, &client_id));
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "no online status; daemon log:\n{}",
        daemon.log()
    );
    assert!(
        wait_for_port(port, WAIT),
        "metrics port not open:\n{}",
        daemon.log()
    );

    // Health follows the connection: wait for the daemon's own view of it (the ConnAck comes just before
    // `online` is queued, but over another path than this request).
    let deadline = Instant::now() + Duration::from_secs(10);
    let health = loop {
        let r = get(port, "/health");
        if r.status == 200 || Instant::now() >= deadline {
            break r;
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    assert_eq!(health.status, 200, "{}", health.body);
    let doc: serde_json::Value = serde_json::from_str(&health.body).unwrap();
    assert_eq!(doc["status"], "ok");
    assert_eq!(doc["broker_connected"], true);

    let before = scrape(port);
    assert_eq!(value(&before, "gaugewise_samples_received_total"), 0.0);
    assert_eq!(value(&before, "gaugewise_channels"), 0.0);
    assert_eq!(value(&before, "gaugewise_broker_connected"), 1.0);
    assert_eq!(
        value(&before, "gaugewise_processing_latency_seconds_count"),
        0.0
    );
    for kind in ["spike", "noise", "bias", "stuck", "stale", "range"] {
        assert_eq!(
            value(
                &before,
                &format!("gaugewise_flags_raised_total{{kind={kind}}}")
            ),
            0.0
        );
    }
    assert_eq!(
        value(&before, "gaugewise_rejected_total{reason=not_json}"),
        0.0
    );

    // 3 channels x 20 samples, one late and one duplicate sample (an output each, status late/duplicate), two
    // payloads that are not JSON and one without the value (refused, no output).
    let t0 = (epoch_now() - 100_000.0).floor();
    let publisher = TestClient::connect(broker.port());
    let mut samples = 0;
    for k in 0..20 {
        for (j, c) in ["TT-101", "FT-201", "LT-301"].iter().enumerate() {
            let t = t0 + 10.0 * k as f64 + j as f64;
            let v = 10.0 * (j + 1) as f64 + ((k * 7 % 5) as f64 - 2.0) * 0.1;
            publisher.publish(
                &format!("brackenfield/raw/{c}"),
                format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
                QoS::AtLeastOnce,
                false,
            );
            samples += 1;
        }
    }
    let t_last = t0 + 190.0;
    for (payload, _) in [
        (format!(r#"{{"t":{:?},"v":9.5}}"#, t_last - 50.0), "late"),
        (format!(r#"{{"t":{t_last:?},"v":9.5}}"#), "duplicate"),
    ] {
        publisher.publish("brackenfield/raw/TT-101", payload, QoS::AtLeastOnce, false);
        samples += 1;
    }
    for bad in ["not json {", "[1, 2", r#"{"t": 1}"#] {
        publisher.publish("brackenfield/raw/FT-201", bad, QoS::AtLeastOnce, false);
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");
    let got = recv_n(&outputs, samples, Duration::from_secs(15));
    assert_eq!(got.len(), samples, "daemon log:\n{}", daemon.log());

    let received = (samples + 3) as f64;
    let m = scrape_until(port, Duration::from_secs(10), |m| {
        m.get("gaugewise_samples_received_total") == Some(&received)
            && m.get("gaugewise_processing_latency_seconds_count") == Some(&(samples as f64))
            && m.get("gaugewise_outputs_published_total") == Some(&(samples as f64))
    });
    assert_eq!(value(&m, "gaugewise_samples_received_total"), received);
    assert_eq!(
        value(&m, "gaugewise_outputs_published_total"),
        samples as f64
    );
    assert_eq!(value(&m, "gaugewise_outputs_dropped_total"), 0.0);
    assert_eq!(value(&m, "gaugewise_rejected_total{reason=not_json}"), 2.0);
    assert_eq!(
        value(&m, "gaugewise_rejected_total{reason=missing_field}"),
        1.0
    );
    assert_eq!(value(&m, "gaugewise_rejected_total{reason=too_large}"), 0.0);
    assert_eq!(value(&m, "gaugewise_samples_late_total"), 1.0);
    assert_eq!(value(&m, "gaugewise_samples_duplicate_total"), 1.0);
    assert_eq!(value(&m, "gaugewise_channels"), 3.0);
    assert_eq!(value(&m, "gaugewise_channels_stale"), 0.0);
    assert_eq!(value(&m, "gaugewise_reconnects_total"), 0.0);
    assert_eq!(
        value(&m, "gaugewise_config_reloads_total{result=applied}"),
        0.0
    );
    // Every sample that reached a worker was measured once; the refused ones never got that far.
    assert_eq!(
        value(&m, "gaugewise_processing_latency_seconds_count"),
        samples as f64
    );
    assert!(value(&m, "gaugewise_processing_latency_seconds_sum") > 0.0);
    assert!(value(&m, "gaugewise_event_loop_tick_age_seconds") >= 0.0);
    // Only fixed label sets: no series carries a channel or topic name.
    for key in m.keys() {
        assert!(
            !key.contains("TT-101") && !key.contains("brackenfield"),
            "{key}"
        );
    }

    // HEAD, unknown paths, other methods, garbage and an oversized head.
    let head = http_raw(port, b"HEAD /metrics HTTP/1.1\r\nHost: x\r\n\r\n");
    assert_eq!(head.status, 200);
    assert!(head.body.is_empty() && head.headers.contains("content-length: "));
    assert_eq!(get(port, "/nothing").status, 404);
    assert_eq!(get(port, "/metrics?x=1").status, 200);
    let post = http_raw(port, b"POST /metrics HTTP/1.1\r\nContent-Length: 0\r\n\r\n");
    assert_eq!(post.status, 405);
    assert!(post.headers.contains("allow: get, head"));
    assert_eq!(http_raw(port, b"\x16\x03\x01 hello\r\n\r\n").status, 400);
    let huge = format!(
        "GET /metrics HTTP/1.1\r\nX-Filler: {}\r\n\r\n",
        "a".repeat(20_000)
    );
    assert_eq!(http_raw(port, huge.as_bytes()).status, 431);
    // Still serving after all that.
    assert_eq!(get(port, "/health").status, 200);

    let mut daemon = daemon;
    let exit = daemon.stop();
    assert!(
        exit.is_some_and(|s| s.success()),
        "{exit:?}:\n{}",
        daemon.log()
    );
    assert!(!daemon.log().contains("panicked"));
}

#[test]
fn broker_down_at_boot_is_ready_but_unhealthy() {
    // Nothing listens on the broker port: the start must not fail, READY=1 must come, health must say why it is
    // not healthy, and the daemon keeps retrying until stopped.
    let broker_port = free_port();
    let port = free_port();
    let dir = tempfile::tempdir().unwrap();
    let notify_path = dir.path().join("notify.sock");
    let systemd = UnixDatagram::bind(&notify_path).unwrap();
    systemd
        .set_read_timeout(Some(Duration::from_millis(200)))
        .unwrap();
    let notify = notify_path.display().to_string();
    let mut daemon = Daemon::start_with_env(
        &config(broker_port, port, "gaugewise-test-metrics-down"),
        &[("NOTIFY_SOCKET", notify.as_str())],
    );
    let ready = recv_until(&systemd, "READY=1", Duration::from_secs(10));
    assert!(
        ready.is_some(),
        "no READY=1 with the broker down:\n{}",
        daemon.log()
    );
    assert!(
        wait_for_port(port, WAIT),
        "metrics port not open:\n{}",
        daemon.log()
    );
    let r = get(port, "/health");
    assert_eq!(r.status, 503, "{}", r.body);
    assert!(r.headers.contains("content-type: application/json"));
    let doc: serde_json::Value = serde_json::from_str(&r.body).unwrap();
    assert_eq!(doc["status"], "unhealthy");
    assert_eq!(doc["broker_connected"], false);
    assert!(
        doc["reasons"]
            .as_array()
            .unwrap()
            .iter()
            .any(|r| r.as_str() == Some("not connected to the MQTT broker")),
        "{doc}"
    );
    let m = scrape(port);
    assert_eq!(value(&m, "gaugewise_broker_connected"), 0.0);
    // The status line tells the operator what is going on.
    let status = recv_matching(
        &systemd,
        |m| m.contains("STATUS=reconnecting to 127.0.0.1:"),
        Duration::from_secs(10),
    );
    assert!(
        status.is_some(),
        "no reconnecting status line:\n{}",
        daemon.log()
    );

    let exit = daemon.stop();
    assert!(
        exit.is_some_and(|s| s.success()),
        "{exit:?}:\n{}",
        daemon.log()
    );
    assert!(recv_until(&systemd, "STOPPING=1", Duration::from_secs(5)).is_some());
}

/// One datagram, or None after the socket's read timeout.
fn recv_one(socket: &UnixDatagram) -> Option<String> {
    let mut buf = [0u8; 4096];
    let n = socket.recv(&mut buf).ok()?;
    Some(String::from_utf8_lossy(&buf[..n]).into_owned())
}

/// The first datagram with the assignment `line`, within `timeout`.
fn recv_until(socket: &UnixDatagram, line: &str, timeout: Duration) -> Option<String> {
    recv_matching(socket, |m| m.lines().any(|l| l == line), timeout)
}

/// The first datagram for which `want` holds, within `timeout`.
fn recv_matching(
    socket: &UnixDatagram,
    want: impl Fn(&str) -> bool,
    timeout: Duration,
) -> Option<String> {
    let deadline = Instant::now() + timeout;
    while Instant::now() < deadline {
        if let Some(m) = recv_one(socket) {
            if want(&m) {
                return Some(m);
            }
        }
    }
    None
}
