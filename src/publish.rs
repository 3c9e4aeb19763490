//! What the daemon publishes: one JSON message per input sample on a topic named after its channel, and the
//! retained online/offline status message.
//!
//! Pure and synchronous: `runtime` owns the MQTT client and calls these per outcome with buffers it reuses, so the
//! per-sample path allocates nothing here. The field names are the same as the columns of `gaugewise replay`'s
//! CSV, so a message and a replay row read alike. An example message (one line on the wire):
//!
//! ```text
//! {"channel":"TT-101","time":1772409600.0,"estimate":72.07,"std":0.18,"raw":72.0,"innovation":-0.5,
//!  "std_innovation":-0.96,"status":"ok","flags":[],"model":"lag"}
//! ```
//!
//! - `time`: epoch seconds of the sample (the payload's time, else the receive time), as a JSON number.
//! - `estimate`, `std`: the filtered signal and its standard deviation, in the signal's units.
//! - `raw`: the value as received; `null` for a missing sample.
//! - `innovation`, `std_innovation`: the value minus its one-step forecast, and that divided by the forecast's
//!   standard deviation (|std_innovation| above 3 is rare for a healthy sensor).
//! - `status`: `ok`, `missing`, `withheld`, `late`, `duplicate`, `rejected` or `stale`
//!   (`channel::SampleStatus::as_str`). Late, duplicate and rejected samples never touch the filter; their
//!   `estimate` and `std` are `null`. A withheld value (a spike, out of range, a stuck transmitter) did not update
//!   the estimate, which is then a prediction.
//! - `flags`: the fault flags active after this sample, e.g. `["spike","bias"]` (`detect::FlagKind`).
//! - `model`: the channel's model (`level`, `lag`, `trend`, `arma(p,q)`).
//!
//! A number that is not finite (a missing raw value, the infinite std of a model still fixing its initial state) is
//! `null`, never `NaN`: JSON has no NaN. Finite numbers are written in the shortest form that reads back to the same
//! f64, bit for bit.
//!
//! Flag changes go to a second, retained topic per channel (`output.flags_topic`), so a subscriber that connects
//! later still sees what is raised:
//!
//! ```text
//! {"channel":"TT-101","time":1772409600.0,"raised":["bias"],"cleared":[],
//!  "active":[{"kind":"bias","severity":"high","since":1772409600.0}]}
//! ```
//!
//! Output topics come from a template such as `brackenfield/clean/{channel}`. A channel name may contain `/` (the
//! topic then has more levels, which subscribers can filter with wildcards); a name with `+`, `#` or NUL, or a topic
//! that would start with `$` (reserved for the broker), is refused rather than escaped: an escaped name would no
//! longer be the name engineers search for, and `ingest` never produces such names.

use crate::channel::Outcome;
use crate::detect::{Detectors, FlagSet, FlagUpdate, Severity};
use crate::ingest::{split_template, write_escaped, TemplatePiece, MAX_TOPIC_BYTES};
use crate::model::ModelKind;
use serde::{Deserialize, Serialize, Serializer};
use std::fmt;
use thiserror::Error;

/// A mistake in the output topic template, found when the configuration is built.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
#[error("output topic '{template}' is not valid: {why}")]
pub struct OutputTopicError {
    pub template: String,
    pub why: String,
}

/// Why no output topic could be formed for a channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Error)]
pub enum TopicError {
    #[error("channel name is empty")]
    EmptyChannel,
    #[error("channel name contains '+', '#' or NUL, which MQTT topics cannot carry")]
    BadChannel,
    #[error("output topic would start with '$', which is reserved for the broker")]
    Reserved,
    #[error("output topic would be longer than 65535 bytes")]
    TooLong,
}

#[derive(Debug, Clone, PartialEq, Eq)]
enum Part {
    Literal(String),
    Channel,
}

/// The output topic template, e.g. `brackenfield/clean/{channel}`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutputTopic {
    parts: Vec<Part>,
}

impl OutputTopic {
    pub fn parse(text: &str) -> Result<Self, OutputTopicError> {
        let bad = |why: &str| OutputTopicError {
            template: text.to_string(),
            why: why.to_string(),
        };
        let pieces = split_template(text).map_err(|why| bad(&why))?;
        let mut parts = Vec::with_capacity(pieces.len());
        for piece in pieces {
            match piece {
                TemplatePiece::Literal(s) => {
                    if s.contains(['+', '#', '\0']) {
                        return Err(bad("a topic cannot contain '+', '#' or NUL"));
                    }
                    parts.push(Part::Literal(s));
                }
                TemplatePiece::Placeholder("channel") => parts.push(Part::Channel),
                TemplatePiece::Placeholder(_) => {
                    return Err(bad("the only placeholder is {channel}"))
                }
            }
        }
        if !parts.contains(&Part::Channel) {
            return Err(bad(
                "it must contain {channel}, or every channel would share one topic",
            ));
        }
        if matches!(parts.first(), Some(Part::Literal(s)) if s.starts_with('$')) {
            return Err(bad("topics starting with '$' are reserved for the broker"));
        }
        Ok(Self { parts })
    }

    /// Writes the topic for `channel` into `buf` (cleared first).
    pub fn render(&self, channel: &str, buf: &mut String) -> Result<(), TopicError> {
        buf.clear();
        if channel.is_empty() {
            return Err(TopicError::EmptyChannel);
        }
        if channel.contains(['+', '#', '\0']) {
            return Err(TopicError::BadChannel);
        }
        for part in &self.parts {
            buf.push_str(match part {
                Part::Literal(s) => s,
                Part::Channel => channel,
            });
        }
        if buf.starts_with('$') {
            buf.clear();
            return Err(TopicError::Reserved);
        }
        if buf.len() > MAX_TOPIC_BYTES {
            buf.clear();
            return Err(TopicError::TooLong);
        }
        Ok(())
    }
}

impl fmt::Display for OutputTopic {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for part in &self.parts {
            match part {
                Part::Literal(s) => write_escaped(f, s)?,
                Part::Channel => f.write_str("{channel}")?,
            }
        }
        Ok(())
    }
}

/// The model label, written straight into the output without an intermediate String.
struct Label(ModelKind);

impl Serialize for Label {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(&self.0)
    }
}

#[derive(Serialize)]
struct Payload<'a> {
    channel: &'a str,
    time: f64,
    estimate: f64,
    std: f64,
    raw: f64,
    innovation: f64,
    std_innovation: f64,
    status: &'static str,
    flags: FlagSet,
    model: Label,
}

/// Writes the output message for one outcome into `buf` (cleared first).
pub fn write_payload(buf: &mut Vec<u8>, channel: &str, model: ModelKind, outcome: &Outcome) {
    buf.clear();
    let step = outcome.step;
    let payload = Payload {
        channel,
        time: outcome.time,
        estimate: step.map_or(f64::NAN, |s| s.estimate),
        std: outcome.std(),
        raw: outcome.raw,
        innovation: step.map_or(f64::NAN, |s| s.innovation),
        std_innovation: step.map_or(f64::NAN, |s| s.standardized),
        status: outcome.status.as_str(),
        flags: outcome.flags.active,
        model: Label(model),
    };
    // Serialising plain numbers and strings into a Vec cannot fail; serde_json writes non-finite f64 as null.
    serde_json::to_writer(&mut *buf, &payload).expect("writing JSON into a Vec");
}

/// An output message read back, for subscribers written in Rust (the tests, the demo's table).
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputMessage {
    pub channel: String,
    pub time: f64,
    pub estimate: Option<f64>,
    pub std: Option<f64>,
    pub raw: Option<f64>,
    pub innovation: Option<f64>,
    pub std_innovation: Option<f64>,
    pub status: String,
    pub flags: Vec<String>,
    pub model: String,
}

impl OutputMessage {
    pub fn parse(payload: &[u8]) -> Result<Self, serde_json::Error> {
        serde_json::from_slice(payload)
    }
}

#[derive(Serialize)]
struct ActiveFlag {
    kind: &'static str,
    severity: Severity,
    since: f64,
}

/// The active flags with their severity and raise time, serialised straight from the detectors.
struct Active<'a>(&'a Detectors);

impl Serialize for Active<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let d = self.0;
        s.collect_seq(d.active().iter().map(|k| ActiveFlag {
            kind: k.as_str(),
            severity: d.settings().severity(k),
            since: d.since(k),
        }))
    }
}

#[derive(Serialize)]
struct FlagsPayload<'a> {
    channel: &'a str,
    time: f64,
    raised: FlagSet,
    cleared: FlagSet,
    active: Active<'a>,
}

/// Writes the retained flag-change message for a sample at `time` whose `update` raised or cleared flags.
pub fn write_flags_payload(
    buf: &mut Vec<u8>,
    channel: &str,
    time: f64,
    update: &FlagUpdate,
    detectors: &Detectors,
) {
    buf.clear();
    let payload = FlagsPayload {
        channel,
        time,
        raised: update.raised,
        cleared: update.cleared,
        active: Active(detectors),
    };
    serde_json::to_writer(&mut *buf, &payload).expect("writing JSON into a Vec");
}

/// A flag-change message read back.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FlagsMessage {
    pub channel: String,
    pub time: f64,
    pub raised: Vec<String>,
    pub cleared: Vec<String>,
    pub active: Vec<ActiveFlagMessage>,
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ActiveFlagMessage {
    pub kind: String,
    pub severity: String,
    pub since: f64,
}

impl FlagsMessage {
    pub fn parse(payload: &[u8]) -> Result<Self, serde_json::Error> {
        serde_json::from_slice(payload)
    }
}

#[derive(Serialize)]
struct Status<'a> {
    status: &'static str,
    client_id: &'a str,
    started: f64,
    version: &'static str,
}

/// The retained status message: `{"status":"online","client_id":"gw-01","started":1772409600.0,"version":"0.1.0"}`.
/// The offline form is also the Last Will, so a crash and a clean stop read the same to subscribers; `started`
/// (epoch seconds) tells one run of the daemon from the next.
pub fn status_payload(online: bool, client_id: &str, started_at: f64) -> Vec<u8> {
    serde_json::to_vec(&Status {
        status: if online { "online" } else { "offline" },
        client_id,
        started: started_at,
        version: env!("CARGO_PKG_VERSION"),
    })
    .expect("writing JSON into a Vec")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::channel::SampleStatus;
    use crate::filter::{Step, StepKind};

    fn step(estimate: f64, estimate_var: f64, innovation: f64, standardized: f64) -> Step {
        Step {
            kind: StepKind::Observed,
            predicted: estimate - innovation,
            predicted_var: 1.0,
            innovation,
            standardized,
            estimate,
            estimate_var,
            loglik: 0.0,
        }
    }

    fn payload(channel: &str, model: ModelKind, outcome: &Outcome) -> String {
        let mut buf = b"stale bytes from the last message".to_vec();
        write_payload(&mut buf, channel, model, outcome);
        String::from_utf8(buf).unwrap()
    }

    #[test]
    fn golden_ok() {
        let o = Outcome {
            time: 1_772_409_600.0,
            raw: 72.0,
            status: SampleStatus::Ok,
            step: Some(step(72.07, 0.0324, -0.5, -0.96)),
            flags: FlagUpdate::default(),
        };
        assert_eq!(
            payload("TT-101", ModelKind::Lag, &o),
            r#"{"channel":"TT-101","time":1772409600.0,"estimate":72.07,"std":0.18,"raw":72.0,"innovation":-0.5,"std_innovation":-0.96,"status":"ok","flags":[],"model":"lag"}"#
        );
    }

    #[test]
    fn golden_missing_diffuse_and_dropped() {
        let missing = Outcome {
            time: 1_772_409_610.25,
            raw: f64::NAN,
            status: SampleStatus::Missing,
            step: Some(step(1.5, 0.25, f64::NAN, f64::NAN)),
            flags: FlagUpdate::default(),
        };
        assert_eq!(
            payload("FT-201", ModelKind::Arma { p: 2, q: 1 }, &missing),
            r#"{"channel":"FT-201","time":1772409610.25,"estimate":1.5,"std":0.5,"raw":null,"innovation":null,"std_innovation":null,"status":"missing","flags":[],"model":"arma(2,1)"}"#
        );
        let diffuse = Outcome {
            time: 0.0,
            raw: 3.0,
            status: SampleStatus::Ok,
            step: Some(step(3.0, f64::INFINITY, f64::NAN, f64::NAN)),
            flags: FlagUpdate::default(),
        };
        assert_eq!(
            payload("LT-301", ModelKind::Trend, &diffuse),
            r#"{"channel":"LT-301","time":0.0,"estimate":3.0,"std":null,"raw":3.0,"innovation":null,"std_innovation":null,"status":"ok","flags":[],"model":"trend"}"#
        );
        let late = Outcome {
            time: 5.0,
            raw: f64::NEG_INFINITY,
            status: SampleStatus::Rejected,
            step: None,
            flags: FlagUpdate::default(),
        };
        assert_eq!(
            payload("a\"b\\c/d", ModelKind::Level, &late),
            r#"{"channel":"a\"b\\c/d","time":5.0,"estimate":null,"std":null,"raw":null,"innovation":null,"std_innovation":null,"status":"rejected","flags":[],"model":"level"}"#
        );
    }

    #[test]
    fn numbers_round_trip_bit_for_bit() {
        let values = [
            0.1 + 0.2,
            1.0 / 3.0,
            -1e-300,
            5e-324,
            f64::MAX,
            1_772_409_600.123_456_7,
            -0.0,
            123_456_789.012_345_68,
        ];
        for (i, &x) in values.iter().enumerate() {
            let y = values[(i + 3) % values.len()];
            let o = Outcome {
                time: x.abs(),
                raw: y,
                status: SampleStatus::Ok,
                step: Some(step(x, y.abs(), -x, y)),
                flags: FlagUpdate::default(),
            };
            let mut buf = Vec::new();
            write_payload(&mut buf, "TT-101", ModelKind::Lag, &o);
            let m = OutputMessage::parse(&buf).unwrap();
            assert_eq!(m.time.to_bits(), x.abs().to_bits());
            assert_eq!(m.raw.unwrap().to_bits(), y.to_bits());
            assert_eq!(m.estimate.unwrap().to_bits(), x.to_bits());
            assert_eq!(m.std.unwrap().to_bits(), o.std().to_bits());
            assert_eq!(m.innovation.unwrap().to_bits(), (-x).to_bits());
            assert_eq!(m.std_innovation.unwrap().to_bits(), y.to_bits());
            assert_eq!(
                (m.status.as_str(), m.model.as_str(), m.channel.as_str()),
                ("ok", "lag", "TT-101")
            );
        }
    }

    #[test]
    fn every_status_has_its_label() {
        for status in [
            SampleStatus::Ok,
            SampleStatus::Missing,
            SampleStatus::Late,
            SampleStatus::Duplicate,
            SampleStatus::Rejected,
            SampleStatus::Stale,
            SampleStatus::Withheld,
        ] {
            let o = Outcome {
                time: 1.0,
                raw: f64::NAN,
                status,
                step: None,
                flags: FlagUpdate::default(),
            };
            let m = OutputMessage::parse(payload("x", ModelKind::Level, &o).as_bytes()).unwrap();
            assert_eq!(m.status, status.as_str());
            assert_eq!(m.estimate, None);
        }
    }

    #[test]
    fn output_topics() {
        let t = OutputTopic::parse("brackenfield/clean/{channel}").unwrap();
        let mut buf = String::from("old");
        t.render("TT-101", &mut buf).unwrap();
        assert_eq!(buf, "brackenfield/clean/TT-101");
        t.render("area1/TT-101", &mut buf).unwrap();
        assert_eq!(buf, "brackenfield/clean/area1/TT-101");
        assert_eq!(t.render("", &mut buf), Err(TopicError::EmptyChannel));
        assert_eq!(t.render("a+b", &mut buf), Err(TopicError::BadChannel));
        assert_eq!(t.render("a#", &mut buf), Err(TopicError::BadChannel));
        assert_eq!(t.render("a\0", &mut buf), Err(TopicError::BadChannel));
        assert_eq!(
            t.render(&"x".repeat(70_000), &mut buf),
            Err(TopicError::TooLong)
        );
        assert!(buf.is_empty());

        let bare = OutputTopic::parse("{channel}").unwrap();
        assert_eq!(bare.render("$SYS", &mut buf), Err(TopicError::Reserved));
        let twice = OutputTopic::parse("bw/{channel}/clean/{channel}{{v}}").unwrap();
        twice.render("FT-201", &mut buf).unwrap();
        assert_eq!(buf, "bw/FT-201/clean/FT-201{v}");
        assert_eq!(twice.to_string(), "bw/{channel}/clean/{channel}{{v}}");
        assert_eq!(OutputTopic::parse(&twice.to_string()).unwrap(), twice);

        for bad in [
            "",
            "brackenfield/clean",
            "bw/+/{channel}",
            "bw/#",
            "bw/{channel}/#",
            "$SYS/{channel}",
            "bw/{name}",
            "bw/{channel",
            "bw/}{channel}",
        ] {
            assert!(OutputTopic::parse(bad).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn status_messages() {
        assert_eq!(
            String::from_utf8(status_payload(true, "gw-01", 1_772_409_600.0)).unwrap(),
            format!(
                r#"{{"status":"online","client_id":"gw-01","started":1772409600.0,"version":"{}"}}"#,
                env!("CARGO_PKG_VERSION")
            )
        );
        let off: serde_json::Value =
            serde_json::from_slice(&status_payload(false, "gw \"2\"", 1.5)).unwrap();
        assert_eq!(off["status"], "offline");
        assert_eq!(off["client_id"], "gw \"2\"");
        assert_eq!(off["started"], 1.5);
    }
}
