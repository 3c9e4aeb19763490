//! Scale-out: two `gaugewise run` processes share one broker's channels (`[instance]` 0 and 1 of 2). Both subscribe
//! to the same input topics; each publishes under its own output prefix (`brackenfield/clean/a/...` and `.../b/...`),
//! so an output tells which instance made it. Against the embedded broker, and Mosquitto when installed.
//!
//! Checked: every sample of every channel comes out exactly once in all, in order; each channel's outputs come from
//! one instance, the one `runtime::shard::instance_of` names; each instance counts the other's messages as
//! `not_ours` (in its exit summary and on `/metrics`) and never reads their payloads (a malformed payload is refused
//! by its owner only). Every wait is bounded.

mod common;

use common::broker::{free_port, recv_n, send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, plant_inputs, wait_status, Daemon};
use gaugewise::publish::OutputMessage;
use gaugewise::runtime::shard::instance_of;
use rumqttc::QoS;
use std::collections::{BTreeMap, BTreeSet};
use std::io::{Read, Write};
use std::net::TcpStream;
use std::time::Duration;

/// Samples per channel.
const PER_CHANNEL: usize = 8;
/// The output prefix of instance 0 and of instance 1.
const PREFIX: [&str; 2] = ["a", "b"];

/// 51 channel names: vessel temperatures, flows and levels of the Brackenfield Works.
fn channels() -> Vec<String> {
    let mut names = Vec::new();
    for n in 0..17 {
        names.push(format!("TT-{}", 101 + n));
        names.push(format!("FT-{}", 201 + n));
        names.push(format!("LT-{}", 301 + n));
    }
    names
}

fn config_text(port: u16, index: usize, client_id: &str, metrics_port: u16) -> String {
    let prefix = PREFIX[index];
    let models = level_default!(obs_var = 0.25, level_var = 0.01);
    let inputs = plant_inputs(1);
    format!(
        r#"{models}
[broker]
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
keep_alive_s = 5
reconnect_min_s = 0.1
reconnect_max_s = 1.0

{inputs}
[output]
topic = "brackenfield/clean/{prefix}/{{channel}}"
qos = 1

[timing]
stale_after_s = 0

[metrics]
listen = "127.0.0.1:{metrics_port}"

[instance]
index = {index}
count = 2
"#
    )
}

/// `GET path` on the loopback metrics endpoint; the body.
fn http_get(port: u16, path: &str) -> String {
    let mut stream =
        TcpStream::connect(("127.0.0.1", port)).expect("connect to the metrics endpoint");
    stream.set_read_timeout(Some(WAIT)).unwrap();
    write!(
        stream,
        "GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n"
    )
    .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).expect("read the answer");
    text.split_once("\r\n\r\n")
        .map(|(_, body)| body.to_string())
        .unwrap_or_default()
}

/// The value of an unlabelled metric in a Prometheus text body.
fn metric(body: &str, name: &str) -> Option<u64> {
    body.lines()
        .find_map(|l| l.strip_prefix(name)?.strip_prefix(' ')?.trim().parse().ok())
}

/// The `stopped:` summary line of a daemon's log.
fn summary(log: &str) -> String {
    log.lines()
        .find(|l| l.contains("stopped:"))
        .unwrap_or_else(|| panic!("no summary; log:\n{log}"))
        .to_string()
}

fn two_instances_split_the_channels(broker: &TestBroker) {
    let name = broker.name();
    let names = channels();
    let owner: BTreeMap<&str, usize> = names
        .iter()
        .map(|n| (n.as_str(), instance_of(n, 2) as usize))
        .collect();
    let owned = |i: usize| owner.values().filter(|&&o| o == i).count();
    // A fixed hash over fixed names: both instances get a share (18 and 33 of the 51).
    assert!(owned(0) >= 15 && owned(1) >= 15, "{owner:?}");

    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let mut daemons = Vec::new();
    let mut metrics_ports = Vec::new();
    for (index, prefix) in PREFIX.iter().enumerate() {
        // Each instance needs its own client id: the broker would otherwise drop one connection for the other.
        let client_id = format!("gaugewise-scaleout-{prefix}-{}-{name}", std::process::id());
        let status = watcher.subscribe(&format!("gaugewise/{client_id}/status"), QoS::AtLeastOnce);
        let metrics_port = free_port();
        let daemon = Daemon::start(&config_text(broker.port(), index, &client_id, metrics_port));
        assert!(
            wait_status(&status, "online", Duration::from_secs(10)).is_some(),
            "{name}: instance {index} not online; log:\n{}",
            daemon.log()
        );
        daemons.push(daemon);
        metrics_ports.push(metrics_port);
    }

    // Interleaved over the channels, as a plant publishes; whole seconds in the past, so none is in the future.
    let t0 = (epoch_now() - 100_000.0).floor();
    let publisher = TestClient::connect(broker.port());
    let mut sent: BTreeMap<String, Vec<f64>> = BTreeMap::new();
    for k in 0..PER_CHANNEL {
        for (c, channel) in names.iter().enumerate() {
            let t = t0 + 10.0 * k as f64 + 0.01 * c as f64;
            let v = 50.0 + c as f64 + ((k * 7 + c) % 5) as f64 * 0.1;
            publisher.publish(
                &format!("brackenfield/raw/{channel}"),
                format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
                QoS::AtLeastOnce,
                false,
            );
            sent.entry(channel.clone()).or_default().push(t);
        }
    }
    // One malformed payload per instance's channel: refused by its owner, never read by the other.
    let garbage: Vec<&str> = (0..2)
        .map(|i| *owner.iter().find(|(_, &o)| o == i).unwrap().0)
        .collect();
    for channel in &garbage {
        publisher.publish(
            &format!("brackenfield/raw/{channel}"),
            "not json {",
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT), "{name}: inputs not acknowledged");
    let total = names.len() * PER_CHANNEL;
    let received = total + garbage.len();

    let got = recv_n(&outputs, total, Duration::from_secs(20));
    let logs = || {
        daemons
            .iter()
            .map(|d| d.log())
            .collect::<Vec<_>>()
            .join("\n----\n")
    };
    assert_eq!(got.len(), total, "{name}: outputs; logs:\n{}", logs());
    if let Ok(extra) = outputs.recv_timeout(Duration::from_millis(300)) {
        panic!(
            "{name}: an output too many: {} {}",
            extra.topic,
            extra.text()
        );
    }

    // Each channel: its samples exactly once, in order, all from its owner.
    let mut by_channel: BTreeMap<String, (BTreeSet<&str>, Vec<f64>)> = BTreeMap::new();
    for m in &got {
        let out = OutputMessage::parse(&m.payload)
            .unwrap_or_else(|e| panic!("{name}: {}: {e}: {}", m.topic, m.text()));
        let prefix = m
            .topic
            .strip_prefix("brackenfield/clean/")
            .and_then(|rest| rest.strip_suffix(out.channel.as_str()))
            .and_then(|p| p.strip_suffix('/'))
            .unwrap_or_else(|| panic!("{name}: unexpected topic {}", m.topic));
        let prefix = PREFIX
            .iter()
            .find(|p| **p == prefix)
            .unwrap_or_else(|| panic!("{name}: unknown instance prefix in {}", m.topic));
        let entry = by_channel.entry(out.channel.clone()).or_default();
        entry.0.insert(prefix);
        entry.1.push(out.time);
    }
    assert_eq!(
        by_channel.keys().collect::<Vec<_>>(),
        sent.keys().collect::<Vec<_>>(),
        "{name}: every channel has outputs"
    );
    for (channel, (instances, times)) in &by_channel {
        let expected = PREFIX[owner[channel.as_str()]];
        assert_eq!(
            instances.iter().copied().collect::<Vec<_>>(),
            vec![expected],
            "{name}: {channel} must come from one instance, its owner"
        );
        assert_eq!(
            times, &sent[channel],
            "{name}: {channel}: each sample once, in order"
        );
    }

    // The counters, on /metrics while running.
    for (index, port) in metrics_ports.iter().enumerate() {
        let others = (total - owned(index) * PER_CHANNEL + 1) as u64;
        let body = http_get(*port, "/metrics");
        assert_eq!(
            metric(&body, "gaugewise_samples_received_total"),
            Some(received as u64),
            "{name}: instance {index}:\n{body}"
        );
        assert_eq!(
            metric(&body, "gaugewise_samples_not_ours_total"),
            Some(others),
            "{name}: instance {index}:\n{body}"
        );
    }

    // And in the exit summary.
    for (index, daemon) in daemons.iter_mut().enumerate() {
        assert!(send_signal(daemon.child.id(), "TERM"), "cannot signal");
        let exit = daemon.wait(Duration::from_secs(5));
        let log = daemon.log();
        let exit = exit.unwrap_or_else(|| panic!("{name}: still running after SIGTERM:\n{log}"));
        assert!(exit.success(), "{name}: exit {exit:?}:\n{log}");
        let line = summary(&log);
        let mine = owned(index) * PER_CHANNEL;
        for needle in [
            format!("received={received} "),
            format!("published={mine} "),
            "rejected=1 (not_json=1)".to_string(),
            format!("not_ours={} ", total - mine + 1),
        ] {
            assert!(
                line.contains(&needle),
                "{name}: instance {index}: {needle} not in {line}"
            );
        }
        eprintln!("{name}: instance {index}: {line}");
        // Never one log line per ignored message.
        assert!(
            !log.contains(garbage[1 - index]),
            "{name}: instance {index} mentions a channel it does not own:\n{log}"
        );
    }
}

#[test]
fn two_instances_split_the_channels_between_them() {
    for broker in TestBroker::all() {
        two_instances_split_the_channels(&broker);
    }
}
