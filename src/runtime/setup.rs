//! From the validated configuration to what the runtime runs on: [`Settings`] for the connection and limits, and a
//! [`Pipeline`] (the `ingest` router and the `publish` output topic).
//!
//! `config` validates every key, but it describes inputs in its own terms; this is the one place that restates them
//! as `ingest`'s rules, so a mismatch between the two shows up here as an error before connecting, never as a
//! silently different reading of a payload.

use super::{Pipeline, RuntimeError, Settings, TlsFiles};
use crate::config::{self, DaemonConfig, InputConfig};
use crate::ingest::{self, InputRule, Router};
use crate::publish::{self, OutputTopic};
use rumqttc::QoS;
use std::time::Duration;

/// Samples queued per worker between the event loop and the worker. At about a microsecond per sample a full
/// queue is a few milliseconds of work; bigger only adds latency under overload.
pub const WORKER_QUEUE: usize = 4096;
/// Period of the counter summary line in the log.
pub const SUMMARY_EVERY: Duration = Duration::from_secs(60);

/// The runtime's view of `config`. `started_at` (epoch seconds) goes into the status messages, so subscribers
/// can tell one run of the daemon from the next.
pub fn from_config(
    config: &DaemonConfig,
    started_at: f64,
) -> Result<(Settings, Pipeline), RuntimeError> {
    let b = &config.broker;
    let rules = config
        .inputs
        .iter()
        .enumerate()
        .map(|(i, input)| {
            rule(input).map_err(|e| RuntimeError::Settings(format!("inputs[{i}]: {e}")))
        })
        .collect::<Result<Vec<_>, _>>()?;
    let output = OutputTopic::parse(&config.output.topic)
        .map_err(|e| RuntimeError::Settings(format!("output.topic: {e}")))?;
    let flags = OutputTopic::parse(&config.flags_topic)
        .map_err(|e| RuntimeError::Settings(format!("output.flags_topic: {e}")))?;
    let params = OutputTopic::parse(&config.params_topic)
        .map_err(|e| RuntimeError::Settings(format!("output.params_topic: {e}")))?;
    let subscriptions = config
        .inputs
        .iter()
        .map(|input| (input.topic.clone(), qos(input.qos)))
        .collect();
    let workers = std::thread::available_parallelism().map_or(2, |n| n.get());
    let settings = Settings {
        host: b.host.clone(),
        port: b.port,
        client_id: b.client_id.clone(),
        keep_alive: b.keep_alive,
        clean_session: b.clean_session,
        credentials: b.username.as_ref().map(|user| {
            (
                user.clone(),
                b.password
                    .as_ref()
                    .map(|p| p.expose().to_string())
                    .unwrap_or_default(),
            )
        }),
        tls: b.tls.as_ref().map(|t| TlsFiles {
            ca: t.ca.clone(),
            cert: t.cert.clone(),
            key: t.key.clone(),
        }),
        max_packet_size: b.max_packet_bytes,
        subscriptions,
        output_qos: qos(config.output.qos),
        output_retain: config.output.retain,
        status_topic: config.status_topic.clone(),
        status_online: publish::status_payload(true, &b.client_id, started_at),
        status_offline: publish::status_payload(false, &b.client_id, started_at),
        reconnect_min: b.reconnect_min,
        reconnect_max: b.reconnect_max,
        stale_after: config
            .stale_after_s
            .filter(|s| s.is_finite() && *s > 0.0)
            .map(Duration::from_secs_f64),
        stale_every: Duration::from_secs_f64(
            if config.stale_every_s.is_finite() && config.stale_every_s > 0.0 {
                config.stale_every_s
            } else {
                10.0
            },
        ),
        workers,
        worker_queue: WORKER_QUEUE,
        request_queue: b.request_queue,
        max_channels: config.max_channels,
        instance: super::shard::Instance {
            index: config.instance.index,
            count: config.instance.count,
        },
        summary_every: SUMMARY_EVERY,
        state: config.state.dir.as_ref().map(|dir| super::StateSettings {
            dir: dir.clone(),
            every: Duration::from_secs_f64(config.state.save_every_s),
        }),
    };
    Ok((
        settings,
        Pipeline {
            router: Router::new(rules),
            output,
            flags,
            params,
        },
    ))
}

/// QoS from its number; config validation allows 0, 1 and 2 only, anything else reads as 1.
fn qos(level: u8) -> QoS {
    match level {
        0 => QoS::AtMostOnce,
        2 => QoS::ExactlyOnce,
        _ => QoS::AtLeastOnce,
    }
}

/// One configured input as an `ingest` rule.
fn rule(input: &InputConfig) -> Result<InputRule, ingest::IngestConfigError> {
    let format = match &input.payload {
        config::PayloadFormat::Number => ingest::PayloadFormat::Number,
        config::PayloadFormat::Json(j) => ingest::PayloadFormat::Json {
            value: j.value.clone(),
            time: j.time.clone(),
            time_format: match j.time_format {
                config::TimeFormat::Auto => ingest::TimeFormat::Auto,
                config::TimeFormat::EpochS => ingest::TimeFormat::Seconds,
                config::TimeFormat::EpochMs => ingest::TimeFormat::Milliseconds,
                config::TimeFormat::Rfc3339 => ingest::TimeFormat::Rfc3339,
            },
            quality: j.quality.clone(),
            good_quality: j.good_quality.clone().unwrap_or_default(),
        },
    };
    InputRule::new(
        &input.topic,
        &input.channel.text,
        format,
        input.max_payload_bytes,
    )?
    .with_qos(input.qos)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;

    const TOML: &str = r#"
[channels.default]
model = "level"
interval = 10.0
obs_var = 0.25
level_var = 0.01

[broker]
host = "127.0.0.1"
port = 18830
client_id = "brackenfield-gw-01"
clean_session = false

[[inputs]]
topic = "brackenfield/raw/+/+"
channel = "{3}"
payload = "json"
value = "/v"
time = "/t"
qos = 1

[[inputs]]
topic = "brackenfield/plain/#"
channel = "{2}"
payload = "number"
qos = 0

[output]
topic = "brackenfield/clean/{channel}"
qos = 0
"#;

    #[test]
    fn settings_follow_the_config() {
        let config = Config::from_str(TOML, "test.toml")
            .unwrap()
            .daemon()
            .unwrap();
        let (s, pipeline) = from_config(&config, 1_772_409_600.0).unwrap();
        assert_eq!(s.client_id, "brackenfield-gw-01");
        assert!(!s.clean_session);
        assert_eq!(
            s.subscriptions,
            vec![
                ("brackenfield/raw/+/+".to_string(), QoS::AtLeastOnce),
                ("brackenfield/plain/#".to_string(), QoS::AtMostOnce)
            ]
        );
        assert_eq!(s.output_qos, QoS::AtMostOnce);
        assert_eq!(s.status_topic, config.status_topic);
        let online: serde_json::Value = serde_json::from_slice(&s.status_online).unwrap();
        assert_eq!(online["status"], "online");
        let offline: serde_json::Value = serde_json::from_slice(&s.status_offline).unwrap();
        assert_eq!(offline["status"], "offline");
        assert_eq!(offline["started"], online["started"]);
        assert!(s.workers >= 1);
        assert_eq!(s.instance, super::super::shard::Instance::ALL);

        let sample = pipeline
            .router
            .route(
                "brackenfield/raw/area1/TT-101",
                br#"{"v": 72.5, "t": 1772409600}"#,
                1_772_409_601.0,
            )
            .unwrap();
        assert_eq!(sample.channel, "TT-101");
        assert_eq!(sample.time, 1_772_409_600.0);
        assert_eq!(sample.value, Some(72.5));
        let plain = pipeline
            .router
            .route("brackenfield/plain/FT-201", b"12.5", 5.0)
            .unwrap();
        assert_eq!(
            (plain.channel.as_str(), plain.time, plain.value),
            ("FT-201", 5.0, Some(12.5))
        );
        let mut topic = String::new();
        pipeline.output.render("TT-101", &mut topic).unwrap();
        assert_eq!(topic, "brackenfield/clean/TT-101");
    }
}
