//! The test brokers themselves: the embedded broker and a test-started Mosquitto carry QoS 0 and QoS 1
//! messages, retained messages and persistent sessions the way the daemon's tests rely on, Mosquitto restarts
//! on the same port without losing a persistent session's queue, and the null relay relays.
//! The Mosquitto half is skipped, with the reason printed, when Mosquitto is not installed.

mod common;

use common::broker::{
    assert_quiet, recv_n, ClientOptions, Mosquitto, TestBroker, TestClient, WAIT,
};
use gaugewise::broker::{null_relay, BrokerError, EmbeddedBroker};
use rumqttc::QoS;
use std::time::Duration;

const QUIET: Duration = Duration::from_millis(300);

fn round_trip(broker: &TestBroker) {
    let name = broker.name();
    let subscriber = TestClient::connect(broker.port());
    let values = subscriber.subscribe("brackenfield/raw/#", QoS::AtLeastOnce);
    let publisher = TestClient::connect(broker.port());

    for i in 0..20 {
        let qos = if i % 2 == 0 {
            QoS::AtMostOnce
        } else {
            QoS::AtLeastOnce
        };
        publisher.publish(
            &format!("brackenfield/raw/TT-10{}", i % 3),
            format!("{i}"),
            qos,
            false,
        );
    }
    assert!(
        publisher.flush(WAIT),
        "{name}: QoS 1 publishes not acknowledged"
    );
    let got = recv_n(&values, 20, WAIT);
    assert_eq!(got.len(), 20, "{name}: received {got:?}");
    // Per-topic order is preserved (MQTT only promises it per topic and QoS; one publisher, one connection).
    for tag in 0..3 {
        let topic = format!("brackenfield/raw/TT-10{tag}");
        let seen: Vec<usize> = got
            .iter()
            .filter(|m| m.topic == topic)
            .map(|m| m.text().parse().unwrap())
            .collect();
        let sent: Vec<usize> = (0..20).filter(|i| i % 3 == tag).collect();
        assert_eq!(seen, sent, "{name}: {topic}");
    }
    assert!(
        got.iter().all(|m| !m.retain),
        "{name}: live messages are not flagged retained"
    );
    // MQTT delivers at the lower of publish and subscription QoS. rumqttd 0.20 delivers at the subscription's
    // QoS instead (QoS 0 publishes arrive as QoS 1): harmless for the daemon, but a known difference.
    let qos1 = got.iter().filter(|m| m.qos == QoS::AtLeastOnce).count();
    match broker {
        TestBroker::Mosquitto(_) => assert_eq!(qos1, 10, "{name}"),
        TestBroker::Embedded(_) => assert_eq!(
            qos1, 20,
            "{name}: rumqttd's QoS upgrade went away; update this note"
        ),
    }
    // A topic outside the filter does not arrive.
    publisher.publish(
        "brackenfield/status/gw-1",
        "online",
        QoS::AtLeastOnce,
        false,
    );
    assert!(publisher.flush(WAIT));
    assert_quiet(&values, QUIET);
}

fn retained(broker: &TestBroker) {
    let name = broker.name();
    let publisher = TestClient::connect(broker.port());
    publisher.publish(
        "brackenfield/status/gaugewise",
        r#"{"state":"online"}"#,
        QoS::AtLeastOnce,
        true,
    );
    assert!(publisher.flush(WAIT), "{name}");

    let late = TestClient::connect(broker.port());
    let status = late.subscribe("brackenfield/status/#", QoS::AtLeastOnce);
    let got = recv_n(&status, 1, WAIT);
    assert_eq!(
        got.len(),
        1,
        "{name}: the retained message reaches a later subscriber"
    );
    assert!(got[0].retain, "{name}: and is flagged retained");
    assert_eq!(got[0].json()["state"], "online", "{name}");

    // A new retained message replaces the old one for the next subscriber.
    publisher.publish(
        "brackenfield/status/gaugewise",
        r#"{"state":"offline"}"#,
        QoS::AtLeastOnce,
        true,
    );
    assert!(publisher.flush(WAIT), "{name}");
    let live = recv_n(&status, 1, WAIT);
    assert_eq!(live.len(), 1, "{name}");
    assert_eq!(live[0].json()["state"], "offline", "{name}");
    let later = TestClient::connect(broker.port());
    let status2 = later.subscribe("brackenfield/status/#", QoS::AtLeastOnce);
    let got = recv_n(&status2, 2, Duration::from_secs(1));
    assert_eq!(
        got.len(),
        1,
        "{name}: one retained message per topic, got {got:?}"
    );
    assert_eq!(got[0].json()["state"], "offline", "{name}");
}

/// A persistent QoS 1 session gets, on return, what was published while it was away.
fn persistent_session(broker: &TestBroker, client_id: &str) {
    let name = broker.name();
    let away = TestClient::connect_with(broker.port(), ClientOptions::persistent(client_id));
    let _ = away.subscribe("brackenfield/raw/#", QoS::AtLeastOnce);
    away.disconnect();

    let publisher = TestClient::connect(broker.port());
    for i in 0..50 {
        publisher.publish(
            "brackenfield/raw/FT-201",
            format!("{i}"),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT), "{name}");

    let back = TestClient::connect_with(broker.port(), ClientOptions::persistent(client_id));
    assert!(
        back.session_present(),
        "{name}: the broker kept the session"
    );
    let got = recv_n(back.inbox(), 50, WAIT);
    let values: Vec<usize> = got.iter().map(|m| m.text().parse().unwrap()).collect();
    assert_eq!(
        values,
        (0..50).collect::<Vec<_>>(),
        "{name}: queued messages, in order"
    );
    assert_quiet(back.inbox(), QUIET);
}

#[test]
fn embedded_round_trip_qos0_and_qos1() {
    round_trip(&TestBroker::embedded());
}

#[test]
fn embedded_retained_messages() {
    retained(&TestBroker::embedded());
}

#[test]
fn embedded_persistent_session_keeps_queued_qos1() {
    persistent_session(
        &TestBroker::embedded(),
        "gaugewise-harness-embedded-session",
    );
}

#[test]
fn embedded_brokers_get_their_own_ports_and_free_them() {
    let a = EmbeddedBroker::start().unwrap();
    let b = EmbeddedBroker::start().unwrap();
    assert_ne!(a.port(), b.port());
    assert_ne!(a.port(), 1883, "never the system broker's port");
    let port = a.port();
    let client = TestClient::connect(port);
    a.shutdown();
    assert!(
        std::net::TcpStream::connect(("127.0.0.1", port)).is_err(),
        "nothing listens on the port after shutdown"
    );
    drop(client);
    // The other broker is untouched.
    let c = TestClient::connect(b.port());
    let rx = c.subscribe("x/#", QoS::AtMostOnce);
    c.publish("x/1", "still here", QoS::AtMostOnce, false);
    assert_eq!(recv_n(&rx, 1, WAIT).len(), 1);
}

#[test]
fn embedded_broker_takes_large_payloads() {
    let broker = TestBroker::embedded();
    let client = TestClient::connect(broker.port());
    let rx = client.subscribe("big", QoS::AtLeastOnce);
    let payload = vec![b'7'; 300 * 1024];
    client.publish("big", payload.clone(), QoS::AtLeastOnce, false);
    let got = recv_n(&rx, 1, WAIT);
    assert_eq!(got.len(), 1);
    assert_eq!(got[0].payload, payload);
}

#[test]
fn mosquitto_round_trip_retained_and_session() {
    let Some(broker) = TestBroker::mosquitto() else {
        return;
    };
    round_trip(&broker);
    retained(&broker);
    persistent_session(&broker, "gaugewise-harness-mosquitto-session");
}

/// Queued QoS 1 messages of an absent persistent session survive a broker restart (Mosquitto saves its
/// database on SIGTERM), and a connected client reconnects by itself and keeps receiving.
#[test]
fn mosquitto_restart_keeps_persistent_sessions() {
    let Some(mut mosquitto) = Mosquitto::start() else {
        return;
    };
    let port = mosquitto.port();

    // A client that stays connected through the restart.
    let steady =
        TestClient::connect_with(port, ClientOptions::persistent("gaugewise-harness-steady"));
    let steady_rx = steady.subscribe("brackenfield/raw/#", QoS::AtLeastOnce);
    // A client that is away during the restart.
    let away = TestClient::connect_with(port, ClientOptions::persistent("gaugewise-harness-away"));
    let _ = away.subscribe("brackenfield/raw/#", QoS::AtLeastOnce);
    away.disconnect();

    let publisher = TestClient::connect(port);
    for i in 0..10 {
        publisher.publish(
            "brackenfield/raw/LT-301",
            format!("{i}"),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT));
    assert_eq!(recv_n(&steady_rx, 10, WAIT).len(), 10);
    drop(publisher);

    mosquitto.restart();
    assert_eq!(mosquitto.port(), port, "same port after restart");
    assert!(
        steady.wait_connections(2, WAIT),
        "the connected client reconnected"
    );
    assert!(
        steady.session_present(),
        "its session survived the restart: {}",
        mosquitto.log()
    );

    let publisher = TestClient::connect(port);
    for i in 10..20 {
        publisher.publish(
            "brackenfield/raw/LT-301",
            format!("{i}"),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT));
    let after: Vec<usize> = recv_n(&steady_rx, 10, WAIT)
        .iter()
        .map(|m| m.text().parse().unwrap())
        .collect();
    assert_eq!(after, (10..20).collect::<Vec<_>>());

    let back = TestClient::connect_with(port, ClientOptions::persistent("gaugewise-harness-away"));
    assert!(back.session_present());
    let got: Vec<usize> = recv_n(back.inbox(), 20, WAIT)
        .iter()
        .map(|m| m.text().parse().unwrap())
        .collect();
    assert_eq!(
        got,
        (0..20).collect::<Vec<_>>(),
        "queued before and after the restart, in order"
    );
}

#[test]
fn mosquitto_stop_is_seen_by_clients() {
    let Some(mut mosquitto) = Mosquitto::start() else {
        return;
    };
    let client = TestClient::connect(mosquitto.port());
    mosquitto.stop();
    assert!(mosquitto.pid().is_none());
    assert!(std::net::TcpStream::connect(("127.0.0.1", mosquitto.port())).is_err());
    mosquitto.start_again();
    assert!(
        client.wait_connections(2, WAIT),
        "the client comes back once the broker does"
    );
}

fn relay_through(broker: &TestBroker, qos: QoS) {
    let name = broker.name();
    let relay = null_relay(
        broker.host(),
        broker.port(),
        "brackenfield/raw/#",
        "relay/",
        qos,
    )
    .unwrap();
    let reader = TestClient::connect(broker.port());
    let out = reader.subscribe("relay/#", QoS::AtLeastOnce);
    let publisher = TestClient::connect(broker.port());
    let n = 200;
    for i in 0..n {
        publisher.publish(
            &format!("brackenfield/raw/TT-{}", 100 + i % 4),
            format!("{{\"v\":{i}}}"),
            qos,
            false,
        );
    }
    assert!(publisher.flush(WAIT), "{name}");
    let got = recv_n(&out, n, WAIT);
    assert_eq!(got.len(), n, "{name}: relayed {}", relay.relayed());
    for tag in 0..4 {
        let topic = format!("relay/brackenfield/raw/TT-{}", 100 + tag);
        let seen: Vec<String> = got
            .iter()
            .filter(|m| m.topic == topic)
            .map(|m| m.text())
            .collect();
        let sent: Vec<String> = (0..n)
            .filter(|i| i % 4 == tag)
            .map(|i| format!("{{\"v\":{i}}}"))
            .collect();
        assert_eq!(
            seen, sent,
            "{name}: payloads unchanged, in order, on {topic}"
        );
    }
    let report = relay.stop();
    assert_eq!(report.relayed, n as u64, "{name}");
    if cfg!(target_os = "linux") {
        assert!(
            report.cpu.is_some_and(|c| c > Duration::ZERO),
            "{name}: {report:?}"
        );
    }
    assert_quiet(&out, QUIET);
}

#[test]
fn null_relay_republishes_unchanged() {
    relay_through(&TestBroker::embedded(), QoS::AtMostOnce);
    relay_through(&TestBroker::embedded(), QoS::AtLeastOnce);
    if let Some(mosquitto) = TestBroker::mosquitto() {
        relay_through(&mosquitto, QoS::AtMostOnce);
        relay_through(&mosquitto, QoS::AtLeastOnce);
    }
}

#[test]
fn null_relay_refuses_loops_and_bad_filters() {
    let broker = EmbeddedBroker::start().unwrap();
    for (filter, prefix) in [
        ("a/#", "a/"),
        ("#", "out/"),
        ("a/#/b", "out/"),
        ("", "out/"),
        ("a/+", "o+/"),
    ] {
        let err =
            null_relay("127.0.0.1", broker.port(), filter, prefix, QoS::AtMostOnce).unwrap_err();
        assert!(
            matches!(err, BrokerError::RelayTopic(_)),
            "{filter} {prefix}: {err}"
        );
    }
}

#[test]
fn null_relay_reports_an_absent_broker() {
    let port = common::broker::free_port();
    let start = std::time::Instant::now();
    let err = null_relay("127.0.0.1", port, "a/#", "out/", QoS::AtMostOnce).unwrap_err();
    assert!(matches!(err, BrokerError::RelayNotReady { .. }), "{err}");
    assert!(start.elapsed() < Duration::from_secs(10));
}
