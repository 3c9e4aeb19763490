//! Live re-estimation in the daemon: `gaugewise run` against the embedded broker (and a real Mosquitto when
//! installed) on a channel whose configured observation noise is four times too small. The daemon must refit on
//! its window off the message path, publish each accepted change retained on the params topic, and its first
//! decision must equal what `replay` (the same schedule, run inline) decides on the same samples.

mod common;

use common::broker::{recv_n, send_signal, TestBroker, TestClient, WAIT};
use common::daemon::{epoch_now, wait_status, Daemon, PlantSections};
use gaugewise::config::Config;
use gaugewise::history::Series;
use gaugewise::replay::Replay;
use gaugewise::simulate::Noise;
use rumqttc::QoS;
use std::time::Duration;

const MODELS: &str = r#"
[channels.default]
model = "level"
interval = 1.0
obs_var = 0.5
level_var = 0.01

[reestimate]
enabled = true
window = 400
every_s = 100
min_samples = 100
"#;

fn config_text(port: u16, client_id: &str) -> String {
    let sections = PlantSections {
        output_extra: "params_topic = \"brackenfield/params/{channel}\"",
        ..PlantSections::new(port, client_id)
    };
    format!("{MODELS}{}", sections.render())
}

fn run_against(broker: &TestBroker) {
    let client_id = format!(
        "gaugewise-test-learn-{}-{}",
        broker.name(),
        std::process::id()
    );
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let params = watcher.subscribe("brackenfield/params/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = Daemon::start(&config_text(broker.port(), &client_id));
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "log:\n{}",
        daemon.log()
    );

    // A level wandering slowly, seen with noise variance 2.0 (the config says 0.5).
    let t0 = (epoch_now() - 100_000.0).floor();
    let mut noise = Noise::new(42);
    let mut level = 20.0;
    let n = 450;
    let (times, values): (Vec<f64>, Vec<f64>) = (0..n)
        .map(|k| {
            level += 0.1 * noise.normal();
            (t0 + k as f64, level + 2.0f64.sqrt() * noise.normal())
        })
        .unzip();
    let publisher = TestClient::connect(broker.port());
    for (t, v) in times.iter().zip(&values) {
        publisher.publish(
            "brackenfield/raw/PT-401",
            format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
            QoS::AtLeastOnce,
            false,
        );
    }
    assert!(publisher.flush(WAIT), "inputs not acknowledged");
    let got = recv_n(&outputs, n, Duration::from_secs(20));
    assert_eq!(
        got.len(),
        n,
        "one output per sample; log:\n{}",
        daemon.log()
    );

    // The first accepted change, published retained.
    let changes = recv_n(&params, 1, Duration::from_secs(20));
    assert_eq!(
        changes.len(),
        1,
        "no parameter change; log:\n{}",
        daemon.log()
    );
    let m = &changes[0];
    assert_eq!(m.topic, "brackenfield/params/PT-401");
    let first = m.json();
    assert_eq!(first["channel"], "PT-401");
    assert_eq!(first["model"], "level");
    assert_eq!(first["old"]["obs_var"], 0.5);
    assert!(first["gain"].as_f64().unwrap() >= 3.0, "{first}");
    assert_eq!(first["window"]["from"], t0);

    // replay, with the same configuration and samples, takes the same first decision.
    let cfg = Config::from_str(MODELS, "models").unwrap().channels;
    let series = vec![Series {
        name: "PT-401".into(),
        times: times.clone(),
        values: values.clone(),
    }];
    let decision = Replay::new(&cfg, &series)
        .unwrap()
        .find_map(|row| row.reestimated.filter(|d| d.accepted()))
        .expect("replay accepts a change too");
    let new_obs = first["new"]["obs_var"].as_f64().unwrap();
    match decision.new.params {
        gaugewise::model::ModelParams::Level { obs_var, level_var } => {
            assert_eq!(new_obs, obs_var, "daemon and replay agree");
            assert_eq!(first["new"]["level_var"].as_f64().unwrap(), level_var);
        }
        _ => unreachable!(),
    }
    assert_eq!(first["window"]["to"].as_f64().unwrap(), decision.to);
    assert!(new_obs > 0.5, "the noise grew: {new_obs}");

    // A subscriber arriving later sees it retained.
    let late = TestClient::connect(broker.port());
    let retained = late.subscribe("brackenfield/params/#", QoS::AtLeastOnce);
    let r = retained
        .recv_timeout(WAIT)
        .expect("retained parameter change");
    assert!(r.retain);

    assert!(send_signal(daemon.child.id(), "TERM"));
    assert!(daemon.wait(Duration::from_secs(5)).is_some());
    let log = daemon.log();
    assert!(log.contains("parameters re-estimated"), "{log}");
    let summary = log
        .lines()
        .find(|l| l.contains("stopped:"))
        .unwrap_or_default();
    assert!(summary.contains("reestimated="), "{summary}");
}

#[test]
fn the_daemon_learns_its_noise_and_publishes_the_change() {
    for broker in TestBroker::all() {
        run_against(&broker);
    }
}

/// A channel whose table gives no parameters: outputs carry the `learning` flag until the first fit, the first
/// model is published retained (first = true), the flag clears on the flags topic, and the model equals replay's.
#[test]
fn a_channel_without_parameters_learns_them_live() {
    const LEARN: &str = r#"
[channels.default]
model = "level"
interval = 1.0
obs_var = 0.5
level_var = 0.01

[[channels.override]]
match = "LT-*"
model = "level"
interval = 1.0
"#;
    let broker = TestBroker::embedded();
    let client_id = format!("gaugewise-test-learning-{}", std::process::id());
    let sections = PlantSections {
        output_extra: "flags_topic = \"brackenfield/flags/{channel}\"\nparams_topic = \"brackenfield/params/{channel}\"",
        ..PlantSections::new(broker.port(), &client_id)
    };
    let config = format!("{LEARN}{}", sections.render());
    let watcher = TestClient::connect(broker.port());
    let outputs = watcher.subscribe("brackenfield/clean/#", QoS::AtLeastOnce);
    let params = watcher.subscribe("brackenfield/params/#", QoS::AtLeastOnce);
    let flags = watcher.subscribe("brackenfield/flags/#", QoS::AtLeastOnce);
    let status = watcher.subscribe(
        &format!("brackenfield/status/{client_id}"),
        QoS::AtLeastOnce,
    );
    let mut daemon = Daemon::start(&config);
    assert!(
        wait_status(&status, "online", Duration::from_secs(10)).is_some(),
        "log:\n{}",
        daemon.log()
    );
    let t0 = (epoch_now() - 100_000.0).floor();
    let mut noise = Noise::new(9);
    let mut level = 3.0;
    let n = 260;
    let (times, values): (Vec<f64>, Vec<f64>) = (0..n)
        .map(|k| {
            level += 0.02 * noise.normal();
            (t0 + k as f64, level + 0.1 * noise.normal())
        })
        .unzip();
    let publisher = TestClient::connect(broker.port());
    for (t, v) in times.iter().zip(&values) {
        publisher.publish(
            "brackenfield/raw/LT-301",
            format!(r#"{{"t":{t:?},"v":{v:?}}}"#),
            QoS::AtLeastOnce,
            false,
        );
        // Pace the samples a little so the first fit lands while samples still arrive.
        std::thread::sleep(Duration::from_micros(500));
    }
    assert!(publisher.flush(WAIT));
    let got = recv_n(&outputs, n, Duration::from_secs(20));
    assert_eq!(got.len(), n, "log:\n{}", daemon.log());
    assert_eq!(got[0].json()["flags"][0], "learning", "{}", got[0].text());
    assert!(
        got[n - 1].json()["flags"].as_array().unwrap().is_empty(),
        "{}",
        got[n - 1].text()
    );

    let change = recv_n(&params, 1, Duration::from_secs(20));
    assert_eq!(change.len(), 1, "log:\n{}", daemon.log());
    let first = change[0].json();
    assert_eq!(first["first"], true, "{first}");
    let cfg = Config::from_str(LEARN, "models").unwrap().channels;
    let series = vec![Series {
        name: "LT-301".into(),
        times,
        values,
    }];
    let decision = Replay::new(&cfg, &series)
        .unwrap()
        .find_map(|row| row.reestimated)
        .expect("replay learns too");
    match decision.new.params {
        gaugewise::model::ModelParams::Level { obs_var, level_var } => {
            assert_eq!(first["new"]["obs_var"].as_f64().unwrap(), obs_var);
            assert_eq!(first["new"]["level_var"].as_f64().unwrap(), level_var);
        }
        _ => unreachable!(),
    }
    // The flags topic saw learning raised, then cleared.
    let f = recv_n(&flags, 2, Duration::from_secs(10));
    assert_eq!(f.len(), 2, "log:\n{}", daemon.log());
    assert_eq!(f[0].json()["raised"][0], "learning");
    assert_eq!(f[1].json()["cleared"][0], "learning");
    assert!(send_signal(daemon.child.id(), "TERM"));
    assert!(daemon.wait(Duration::from_secs(5)).is_some());
}
