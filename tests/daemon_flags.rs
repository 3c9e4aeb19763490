//! Fault flags end to end: `gaugewise run` against the embedded broker and, when installed, a real Mosquitto. A
//! spike and an out-of-range value are sent; the outputs must carry the flags `Channel` gives for the same
//! samples (the replay path), the withheld samples must be marked, and the retained flags topic must hold each
//! change, so a subscriber arriving later sees the current flags.

mod common;

use common::broker::{recv_n, send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use gaugewise::channel::Channel;
use gaugewise::config::Config;
use gaugewise::publish::{FlagsMessage, OutputMessage};
use rumqttc::QoS;
use std::time::Duration;

const MODELS: &str = concat!(
    level_default!(obs_var = 0.0004, level_var = 1e-6),
    tt101_lag!(mean = 72.0),
    r#"
[flags.spike]
off_delay = 0.0

[[flags.override]]
match = "LT-*"
[flags.override.range]
low = 0.0
high = 5.0
"#
);

fn config_text(port: u16, client_id: &str) -> String {
    let sections = PlantSections {
        output_extra: "flags_topic = \"brackenfield/flags/{channel}\"",
        ..PlantSections::new(port, client_id)
    };
    format!("{MODELS}{}", sections.render())
}

/// 40 samples per channel; TT-101 gets a 30-degree spike at sample 25, LT-301 an out-of-range value at 30.
fn inputs(t0: f64) -> Vec<(&'static str, f64, f64)> {
    let mut out = Vec::new();
    for k in 0..40 {
        let t = t0 + 10.0 * k as f64;
        let wobble = ((k * 37 % 11) as f64 - 5.0) / 50.0;
        let tt = if k == 25 { 102.0 } else { 72.0 + wobble };
        let lt = if k == 30 { 9.9 } else { 1.5 + 0.001 * k as f64 };
        out.push(("TT-101", t, tt));
        out.push(("LT-301", t + 0.5, lt));
    }
    out
}

fn run_against(broker: &TestBroker) {
    let client_id = format!(
        "gaugewise-test-flags-{}-{}",
        broker.name(),
        std::process::id()
    );
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let flags = watcher.subscribe("brackenfield/flags/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = Daemon::start(&config_text(broker.port(), &client_id));
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "{}: no online status; log:\n{}",
        broker.name(),
        daemon.log()
    );

    let samples = inputs((epoch_now() - 100_000.0).floor());
    let publisher = TestClient::connect(broker.port());
    for (channel, t, v) in &samples {
        publisher.publish(
            &format!("brackenfield/raw/{channel}"),
            format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");
    let got = recv_n(&outputs, samples.len(), Duration::from_secs(15));
    assert_eq!(got.len(), samples.len(), "log:\n{}", daemon.log());

    // Every output carries the flags and status the channel gives for the same samples.
    let models = Config::from_str(MODELS, "models").unwrap().channels;
    let mut expected_changes = 0;
    for name in ["TT-101", "LT-301"] {
        let mut reference =
            Channel::with_flags(models.model_for(name), models.flags_for(name)).unwrap();
        let outs: Vec<OutputMessage> = got
            .iter()
            .map(|m| OutputMessage::parse(&m.payload).unwrap())
            .filter(|o| o.channel == name)
            .collect();
        let sent: Vec<_> = samples.iter().filter(|s| s.0 == name).collect();
        assert_eq!(outs.len(), sent.len());
        for (k, ((_, t, v), out)) in sent.iter().zip(&outs).enumerate() {
            let want = reference.on_sample(*t, Some(*v));
            let want_flags: Vec<String> = want
                .flags
                .active
                .iter()
                .map(|f| f.as_str().to_string())
                .collect();
            assert_eq!(out.flags, want_flags, "{name} sample {k}");
            assert_eq!(out.status, want.status.as_str(), "{name} sample {k}");
            if want.flags.changed() {
                expected_changes += 1;
            }
        }
        match name {
            "TT-101" => {
                assert_eq!(outs[25].status, "withheld", "the spike does not update");
                assert_eq!(outs[25].flags, ["spike"]);
                // The estimate stays near 72 instead of following the spike.
                assert!(
                    (outs[25].estimate.unwrap() - 72.0).abs() < 1.0,
                    "{:?}",
                    outs[25]
                );
                assert!(
                    outs[26].flags.is_empty(),
                    "off_delay 0: cleared by the next sample"
                );
            }
            _ => {
                assert_eq!(outs[30].status, "withheld");
                assert_eq!(outs[30].flags, ["range"]);
            }
        }
    }

    // One retained flags message per change, on the channel's flags topic.
    let changes = recv_n(&flags, expected_changes, Duration::from_secs(10));
    assert_eq!(changes.len(), expected_changes, "log:\n{}", daemon.log());
    let parsed: Vec<FlagsMessage> = changes
        .iter()
        .map(|m| {
            assert_eq!(
                m.topic,
                format!(
                    "brackenfield/flags/{}",
                    m.json()["channel"].as_str().unwrap()
                )
            );
            FlagsMessage::parse(&m.payload).unwrap_or_else(|e| panic!("{e}: {}", m.text()))
        })
        .collect();
    let spike = parsed
        .iter()
        .find(|f| f.channel == "TT-101" && f.raised == ["spike"])
        .expect("a spike raise message");
    assert_eq!(spike.active.len(), 1);
    assert_eq!(spike.active[0].kind, "spike");
    assert_eq!(spike.active[0].severity, "low");
    assert_eq!(spike.active[0].since, spike.time);
    assert!(parsed
        .iter()
        .any(|f| f.channel == "LT-301" && f.raised == ["range"]));

    // A subscriber arriving later gets the latest retained change per channel.
    let late = TestClient::connect(broker.port());
    let retained = late.subscribe("brackenfield/flags/#", QoS::AtLeastOnce);
    let msgs = recv_n(&retained, 2, WAIT);
    assert_eq!(msgs.len(), 2, "one retained flags message per channel");
    for m in &msgs {
        assert!(m.retain);
        let f = FlagsMessage::parse(&m.payload).unwrap();
        let last = parsed
            .iter()
            .rev()
            .find(|p| p.channel == f.channel)
            .unwrap();
        assert_eq!(&f, last, "the retained message is the last change");
    }

    // The summary at exit counts the withheld samples and the flags raised.
    assert!(send_signal(daemon.child.id(), "TERM"));
    assert!(
        daemon.wait(Duration::from_secs(5)).is_some(),
        "still running after SIGTERM"
    );
    let log = daemon.log();
    let summary = log
        .lines()
        .find(|l| l.contains("stopped:"))
        .unwrap_or_else(|| panic!("no summary; log:\n{log}"));
    assert!(summary.contains("withheld=2"), "{summary}");
    assert!(log.contains("flag raised"), "{log}");
}

#[test]
fn flags_ride_in_outputs_and_on_a_retained_topic() {
    for broker in TestBroker::all() {
        run_against(&broker);
    }
}
