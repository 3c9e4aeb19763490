//! The daemon's sections of the configuration: `[broker]`, `[[inputs]]`, `[output]`, `[status]`, `[timing]`,
//! `[limits]` and `[instance]`, as raw strict structs and as the typed, validated values `run` and `check` use.
//!
//! `config` deserialises these sections with the rest of the file (unknown keys are errors there) and calls the
//! validators here, which need no IO: every present section is checked whatever the command. What needs the file
//! system or the whole picture (reading `password_file`, opening the TLS files, a payload limit against the packet
//! limit, an output topic that an input would subscribe to) waits for [`super::Config::daemon`], so `replay` can
//! share a file whose secrets only the daemon's user may read. The values here are plain data: `ingest`, `publish`
//! and `runtime` build their own state from them.

use super::ConfigError;
use serde::Deserialize;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::time::Duration;

/// Largest `broker.max_packet_bytes`: well above any sample, small enough that a bad peer cannot make us buffer
/// a huge packet.
pub const MAX_PACKET_LIMIT: usize = 16 * 1024 * 1024;
/// Largest topic or topic filter MQTT can carry (a two-byte length prefix).
const MAX_TOPIC_BYTES: usize = 65_535;

/// How to reach and authenticate with the MQTT broker.
#[derive(Debug, Clone, PartialEq)]
pub struct BrokerConfig {
    pub host: String,
    pub port: u16,
    /// Fixed and non-empty whenever `clean_session` is false.
    pub client_id: String,
    /// Zero disables keep-alive pings; otherwise whole seconds, at least 1.
    pub keep_alive: Duration,
    /// False: a persistent session; the broker keeps subscriptions and QoS 1/2 samples while the daemon is away.
    pub clean_session: bool,
    pub username: Option<String>,
    /// After [`super::Config::daemon`] this holds the password however it was given (inline or from the file).
    pub password: Option<Secret>,
    /// Where the password was read from, if from a file (already resolved against the config's directory).
    pub password_file: Option<PathBuf>,
    /// Present: connect with TLS.
    pub tls: Option<TlsConfig>,
    /// Largest MQTT packet accepted or sent, in bytes.
    pub max_packet_bytes: usize,
    /// Capacity of the bounded queue of outgoing publishes; what does not fit is refused and counted.
    pub request_queue: usize,
    /// Backoff between reconnection attempts: starts at `reconnect_min`, doubles up to `reconnect_max`.
    pub reconnect_min: Duration,
    pub reconnect_max: Duration,
}

/// TLS settings. Paths are resolved against the config file's directory. `cert` and `key` are both set or both
/// unset (validated); without `ca` the runtime uses the system's trust store.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TlsConfig {
    pub ca: Option<PathBuf>,
    pub cert: Option<PathBuf>,
    pub key: Option<PathBuf>,
}

/// A password: printed as `***` by `Debug`, so logging a config never leaks it.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(String);

impl Secret {
    pub fn new(text: impl Into<String>) -> Self {
        Secret(text.into())
    }

    /// The secret itself, for the one place that needs it (the MQTT CONNECT).
    pub fn expose(&self) -> &str {
        &self.0
    }
}

impl std::fmt::Debug for Secret {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Secret(***)")
    }
}

/// One subscription and how its messages become samples.
#[derive(Debug, Clone, PartialEq)]
pub struct InputConfig {
    /// MQTT topic filter (syntax validated; `+` and `#` wildcards).
    pub topic: String,
    /// How the channel name is built from the topic's levels.
    pub channel: ChannelTemplate,
    /// 0, 1 or 2.
    pub qos: u8,
    pub payload: PayloadFormat,
    /// Larger payloads are refused and counted, before any parsing.
    pub max_payload_bytes: usize,
}

/// A channel-name template such as `{2}`, `{1}-{2}` or `{topic}`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ChannelTemplate {
    /// As written in the configuration.
    pub text: String,
    /// Literal text and placeholders, in order; never empty.
    pub parts: Vec<TemplatePart>,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub enum TemplatePart {
    /// Copied as is.
    Text(String),
    /// The topic level at this index, counted from 0 (`{2}`).
    Level(usize),
    /// The whole topic (`{topic}`).
    Topic,
}

/// What an input's payload looks like.
#[derive(Debug, Clone, PartialEq)]
pub enum PayloadFormat {
    /// The payload is the value as text (`72.4`); the sample time is the receive time.
    Number,
    Json(JsonPayload),
}

/// Where the fields of a JSON payload are. Pointers are RFC 6901 (syntax validated): `""` is the whole document,
/// otherwise they start with `/`.
#[derive(Debug, Clone, PartialEq)]
pub struct JsonPayload {
    pub value: String,
    /// Without it, the sample time is the receive time.
    pub time: Option<String>,
    pub time_format: TimeFormat,
    pub quality: Option<String>,
    /// Quality values that make a good sample (strings, numbers or booleans); `None`: any. Never an empty list.
    /// A sample whose quality is not in the list is a missing sample.
    pub good_quality: Option<Vec<serde_json::Value>>,
}

/// How a payload's timestamp is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeFormat {
    EpochS,
    EpochMs,
    Rfc3339,
    /// Strings as RFC 3339; numbers as epoch seconds, or epoch milliseconds when too large to be seconds.
    Auto,
}

impl TimeFormat {
    pub fn name(self) -> &'static str {
        match self {
            TimeFormat::EpochS => "epoch_s",
            TimeFormat::EpochMs => "epoch_ms",
            TimeFormat::Rfc3339 => "rfc3339",
            TimeFormat::Auto => "auto",
        }
    }
}

/// Where and how estimates are published.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutputConfig {
    /// A topic with `{channel}` in it (at least once), e.g. `brackenfield/clean/{channel}`; no other placeholder,
    /// no wildcard.
    pub topic: String,
    pub qos: u8,
    pub retain: bool,
    /// `output.flags_topic` if given; [`DaemonConfig::flags_topic`] has the default filled in.
    pub flags_topic: Option<String>,
    /// `output.params_topic` if given; [`DaemonConfig::params_topic`] has the default filled in.
    pub params_topic: Option<String>,
}

/// Staleness: a channel silent for `stale_after_s` publishes predictions every `stale_every_s`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TimingConfig {
    /// `None` (written as 0) disables stale publishing.
    pub stale_after_s: Option<f64>,
    pub stale_every_s: f64,
}

impl Default for TimingConfig {
    fn default() -> Self {
        TimingConfig {
            stale_after_s: Some(60.0),
            stale_every_s: 10.0,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LimitsConfig {
    /// Samples for new channels beyond this many are refused and counted.
    pub max_channels: usize,
}

impl Default for LimitsConfig {
    fn default() -> Self {
        LimitsConfig {
            max_channels: 100_000,
        }
    }
}

/// Scale-out: this daemon is instance `index` of `count` that share the channels, and handles only the channels
/// whose stable hash modulo `count` is `index` (`runtime::shard::instance_hash`). The default, 0 of 1, is every
/// channel. Always `count >= 1` and `index < count`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct InstanceConfig {
    pub index: u64,
    pub count: u64,
}

impl Default for InstanceConfig {
    fn default() -> Self {
        InstanceConfig { index: 0, count: 1 }
    }
}

/// Most instances one deployment may split its channels over: far beyond any plant, small enough that a typo
/// (an id pasted into `count`) is caught.
pub const MAX_INSTANCES: i64 = 1024;

/// The HTTP endpoint for Prometheus metrics (`/metrics`) and health (`/health`): on only when a `[metrics]` table is
/// given, and then on the loopback interface unless `listen` says otherwise.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MetricsConfig {
    pub listen: std::net::SocketAddr,
}

/// Where channel state is kept between runs (`[state]`): saved every `save_every_s` and at shutdown, restored at
/// start. Kept by default when a directory is known: `state.dir`, else systemd's `$STATE_DIRECTORY`.
#[derive(Debug, Clone, PartialEq)]
pub struct StateConfig {
    /// None: channel state is not kept (no directory known, or `keep = false`).
    pub dir: Option<PathBuf>,
    /// Where `dir` came from, for `check` and the log.
    pub origin: &'static str,
    pub save_every_s: f64,
}

impl Default for StateConfig {
    fn default() -> Self {
        StateConfig {
            dir: None,
            origin: "no state.dir and no $STATE_DIRECTORY",
            save_every_s: DEFAULT_SAVE_EVERY_S,
        }
    }
}

/// Checkpoint period when `[state]` gives none: at most a minute of a channel's history is replayed from nothing
/// after a crash, for one small write a minute.
pub const DEFAULT_SAVE_EVERY_S: f64 = 60.0;

/// Where the metrics endpoint listens when `[metrics]` gives no `listen`.
pub const DEFAULT_METRICS_LISTEN: &str = "127.0.0.1:9464";

// ---------------------------------------------------------------------------------------------------------------
// Raw sections, as serde reads them.

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a table of MQTT connection settings")]
pub(super) struct RawBroker {
    host: Option<String>,
    port: Option<i64>,
    client_id: Option<String>,
    keep_alive_s: Option<i64>,
    clean_session: Option<bool>,
    username: Option<String>,
    password: Option<String>,
    password_file: Option<String>,
    tls: Option<RawTls>,
    max_packet_bytes: Option<i64>,
    request_queue: Option<i64>,
    reconnect_min_s: Option<f64>,
    reconnect_max_s: Option<f64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(
    deny_unknown_fields,
    expecting = "a table of TLS file paths (ca, cert, key)"
)]
struct RawTls {
    ca: Option<String>,
    cert: Option<String>,
    key: Option<String>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "an [[inputs]] table")]
pub(super) struct RawInput {
    topic: Option<String>,
    channel: Option<String>,
    qos: Option<i64>,
    payload: Option<String>,
    value: Option<String>,
    time: Option<String>,
    time_format: Option<String>,
    quality: Option<String>,
    good_quality: Option<Vec<serde_json::Value>>,
    max_payload_bytes: Option<i64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "an [output] table")]
pub(super) struct RawOutput {
    topic: Option<String>,
    flags_topic: Option<String>,
    params_topic: Option<String>,
    qos: Option<i64>,
    retain: Option<bool>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [status] table")]
pub(super) struct RawStatus {
    topic: Option<String>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [timing] table")]
pub(super) struct RawTiming {
    stale_after_s: Option<f64>,
    stale_every_s: Option<f64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [limits] table")]
pub(super) struct RawLimits {
    max_channels: Option<i64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "an [instance] table")]
pub(super) struct RawInstance {
    index: Option<i64>,
    count: Option<i64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [state] table")]
pub(super) struct RawState {
    keep: Option<bool>,
    dir: Option<String>,
    save_every_s: Option<f64>,
}

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [metrics] table")]
pub(super) struct RawMetrics {
    listen: Option<String>,
}

// ---------------------------------------------------------------------------------------------------------------
// Validation of one section at a time (no IO).

/// Names the file in errors and resolves relative paths against the config's directory.
pub(super) struct Ctx<'a> {
    pub file: &'a str,
    pub base: Option<&'a Path>,
}

impl Ctx<'_> {
    pub(super) fn invalid(
        &self,
        key: impl Into<String>,
        message: impl Into<String>,
    ) -> ConfigError {
        ConfigError::Invalid {
            file: self.file.to_string(),
            key: key.into(),
            message: message.into(),
        }
    }

    pub(super) fn missing(&self, key: impl Into<String>, hint: impl Into<String>) -> ConfigError {
        ConfigError::Missing {
            file: self.file.to_string(),
            key: key.into(),
            hint: hint.into(),
        }
    }

    fn path(&self, key: &str, text: &str) -> Result<PathBuf, ConfigError> {
        if text.is_empty() {
            return Err(self.invalid(key, "is empty; give a file path"));
        }
        let p = Path::new(text);
        Ok(match self.base {
            Some(base) if p.is_relative() => base.join(p),
            _ => p.to_path_buf(),
        })
    }

    fn int(&self, key: &str, value: i64, lo: i64, hi: i64) -> Result<i64, ConfigError> {
        if (lo..=hi).contains(&value) {
            Ok(value)
        } else {
            Err(self.invalid(
                key,
                format!("must be an integer from {lo} to {hi} (got {value})"),
            ))
        }
    }

    fn seconds(&self, key: &str, value: f64, zero_ok: bool) -> Result<f64, ConfigError> {
        // A week bounds every interval we have: anything larger is a unit mistake (milliseconds?).
        const MAX: f64 = 7.0 * 86_400.0;
        let ok = value.is_finite() && value <= MAX && (value > 0.0 || (zero_ok && value == 0.0));
        if ok {
            Ok(value)
        } else {
            let cmp = if zero_ok { ">= 0" } else { "> 0" };
            Err(self.invalid(
                key,
                format!("must be a number of seconds {cmp} and at most {MAX} (got {value})"),
            ))
        }
    }

    fn qos(&self, key: &str, value: Option<i64>, default: u8) -> Result<u8, ConfigError> {
        match value {
            None => Ok(default),
            Some(q @ 0..=2) => Ok(q as u8),
            Some(q) => Err(self.invalid(key, format!("must be 0, 1 or 2 (got {q})"))),
        }
    }
}

pub(super) fn broker(raw: &RawBroker, ctx: &Ctx) -> Result<BrokerConfig, ConfigError> {
    let host = raw.host.clone().unwrap_or_else(|| "127.0.0.1".to_string());
    if host.is_empty() || host.chars().any(|c| c.is_whitespace() || c.is_control()) {
        return Err(ctx.invalid(
            "broker.host",
            format!("must be a host name or IP address without spaces (got {host:?})"),
        ));
    }
    let tls = raw.tls.as_ref().map(|t| tls(t, ctx)).transpose()?;
    let default_port = if tls.is_some() { 8883 } else { 1883 };
    let port = ctx.int("broker.port", raw.port.unwrap_or(default_port), 1, 65_535)? as u16;
    let clean_session = raw.clean_session.unwrap_or(false);
    let client_id = match &raw.client_id {
        Some(id) => {
            check_client_id(id).map_err(|m| ctx.invalid("broker.client_id", m))?;
            id.clone()
        }
        None if clean_session => default_client_id(),
        None => {
            return Err(ctx.missing(
                "broker.client_id",
                "a persistent session (clean_session = false, the default) needs a fixed client id, under which \
                 the broker keeps subscriptions and queued samples while the daemon is away; \
                 e.g. client_id = \"brackenfield-gw-01\"",
            ))
        }
    };
    let keep_alive = ctx.int(
        "broker.keep_alive_s",
        raw.keep_alive_s.unwrap_or(30),
        0,
        65_535,
    )?;
    if let Some(user) = &raw.username {
        if user.is_empty() || user.chars().any(char::is_control) {
            return Err(ctx.invalid(
                "broker.username",
                "must be non-empty text without control characters",
            ));
        }
    }
    if raw.password.is_some() && raw.password_file.is_some() {
        return Err(ctx.invalid(
            "broker.password_file",
            "give either password or password_file, not both",
        ));
    }
    for (key, given) in [
        ("broker.password", raw.password.is_some()),
        ("broker.password_file", raw.password_file.is_some()),
    ] {
        if given && raw.username.is_none() {
            return Err(ctx.invalid(
                key,
                "MQTT sends a password only with a user name: set broker.username too",
            ));
        }
    }
    let password_file = raw
        .password_file
        .as_deref()
        .map(|p| ctx.path("broker.password_file", p))
        .transpose()?;
    let max_packet_bytes = ctx.int(
        "broker.max_packet_bytes",
        raw.max_packet_bytes.unwrap_or(262_144),
        1024,
        MAX_PACKET_LIMIT as i64,
    )? as usize;
    let request_queue = ctx.int(
        "broker.request_queue",
        raw.request_queue.unwrap_or(10_000),
        1,
        1_000_000,
    )? as usize;
    let reconnect_min = ctx.seconds(
        "broker.reconnect_min_s",
        raw.reconnect_min_s.unwrap_or(0.5),
        false,
    )?;
    let reconnect_max = ctx.seconds(
        "broker.reconnect_max_s",
        raw.reconnect_max_s.unwrap_or(30.0),
        false,
    )?;
    if reconnect_max < reconnect_min {
        return Err(ctx.invalid(
            "broker.reconnect_max_s",
            format!("must be >= reconnect_min_s ({reconnect_min}) (got {reconnect_max})"),
        ));
    }
    Ok(BrokerConfig {
        host,
        port,
        client_id,
        keep_alive: Duration::from_secs(keep_alive as u64),
        clean_session,
        username: raw.username.clone(),
        password: raw.password.clone().map(Secret),
        password_file,
        tls,
        max_packet_bytes,
        request_queue,
        reconnect_min: Duration::from_secs_f64(reconnect_min),
        reconnect_max: Duration::from_secs_f64(reconnect_max),
    })
}

fn tls(raw: &RawTls, ctx: &Ctx) -> Result<TlsConfig, ConfigError> {
    let path = |key: &str, v: &Option<String>| {
        v.as_deref()
            .map(|p| ctx.path(&format!("broker.tls.{key}"), p))
            .transpose()
    };
    let t = TlsConfig {
        ca: path("ca", &raw.ca)?,
        cert: path("cert", &raw.cert)?,
        key: path("key", &raw.key)?,
    };
    match (&t.cert, &t.key) {
        (Some(_), None) => Err(ctx.missing(
            "broker.tls.key",
            "a client certificate needs its private key: give cert and key together",
        )),
        (None, Some(_)) => Err(ctx.missing(
            "broker.tls.cert",
            "a private key needs its client certificate: give cert and key together",
        )),
        _ => Ok(t),
    }
}

/// Letters, digits and `-_.:`, 1 to 128 of them: every broker takes these, and the id can sit in a topic level
/// (the default status topic) without adding levels or wildcards.
fn check_client_id(id: &str) -> Result<(), String> {
    if id.is_empty() {
        return Err(
            "is empty; a persistent session needs a fixed, non-empty client id".to_string(),
        );
    }
    if id.chars().count() > 128 {
        return Err(format!(
            "is {} characters long; at most 128",
            id.chars().count()
        ));
    }
    if let Some(c) = id.chars().find(|c| !client_id_char(*c)) {
        return Err(format!(
            "contains {c:?}; use letters, digits, '-', '_', '.' and ':' only"
        ));
    }
    Ok(())
}

fn client_id_char(c: char) -> bool {
    c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.' | ':')
}

/// `gaugewise-<hostname>` for clean sessions without a client id: stable across restarts on one gateway, which
/// keeps the default status topic stable. Falls back to the process id if the host name cannot be read.
fn default_client_id() -> String {
    let host = ["/proc/sys/kernel/hostname", "/etc/hostname"]
        .iter()
        .find_map(|p| std::fs::read_to_string(p).ok())
        .map(|h| h.trim().to_string())
        .filter(|h| !h.is_empty());
    match host {
        Some(h) => {
            let clean: String = h
                .chars()
                .map(|c| if client_id_char(c) { c } else { '-' })
                .take(100)
                .collect();
            format!("gaugewise-{clean}")
        }
        None => format!("gaugewise-{}", std::process::id()),
    }
}

pub(super) fn input(raw: &RawInput, i: usize, ctx: &Ctx) -> Result<InputConfig, ConfigError> {
    let key = |k: &str| format!("inputs[{i}].{k}");
    let topic = raw.topic.clone().ok_or_else(|| {
        ctx.missing(
            key("topic"),
            "an MQTT topic filter to subscribe to, e.g. topic = \"brackenfield/raw/+/+\"",
        )
    })?;
    check_filter(&topic).map_err(|m| ctx.invalid(key("topic"), m))?;
    let template_text = raw.channel.clone().unwrap_or_else(|| "{topic}".to_string());
    let channel = ChannelTemplate::parse(&template_text)
        .and_then(|t| t.check_against(&topic).map(|()| t))
        .map_err(|m| ctx.invalid(key("channel"), m))?;
    let qos = ctx.qos(&key("qos"), raw.qos, 1)?;
    let max_payload_bytes = ctx.int(
        &key("max_payload_bytes"),
        raw.max_payload_bytes.unwrap_or(4096),
        1,
        MAX_PACKET_LIMIT as i64,
    )? as usize;
    let kind = raw.payload.as_deref().ok_or_else(|| {
        ctx.missing(
            key("payload"),
            "\"number\" (the payload is the value as text) or \"json\"",
        )
    })?;
    let payload = match kind {
        "number" => {
            let json_only = [
                ("value", raw.value.is_some()),
                ("time", raw.time.is_some()),
                ("time_format", raw.time_format.is_some()),
                ("quality", raw.quality.is_some()),
                ("good_quality", raw.good_quality.is_some()),
            ];
            if let Some((k, _)) = json_only.iter().find(|(_, given)| *given) {
                return Err(ctx.invalid(
                    key(k),
                    "is only used with payload = \"json\" (this input's payload is a plain number)",
                ));
            }
            PayloadFormat::Number
        }
        "json" => PayloadFormat::Json(json_payload(raw, &key, ctx)?),
        other => {
            return Err(ctx.invalid(
                key("payload"),
                format!("unknown payload format {other:?} (expected \"number\" or \"json\")"),
            ))
        }
    };
    Ok(InputConfig {
        topic,
        channel,
        qos,
        payload,
        max_payload_bytes,
    })
}

fn json_payload(
    raw: &RawInput,
    key: &dyn Fn(&str) -> String,
    ctx: &Ctx,
) -> Result<JsonPayload, ConfigError> {
    let value = raw.value.clone().ok_or_else(|| {
        ctx.missing(
            key("value"),
            "a JSON pointer to the value, e.g. value = \"/v\" (\"\" if the whole payload is the value)",
        )
    })?;
    for (k, p) in [
        ("value", Some(&value)),
        ("time", raw.time.as_ref()),
        ("quality", raw.quality.as_ref()),
    ] {
        if let Some(p) = p {
            check_pointer(p).map_err(|m| ctx.invalid(key(k), m))?;
        }
    }
    let time_format = match raw.time_format.as_deref() {
        None => TimeFormat::Auto,
        Some(_) if raw.time.is_none() => {
            return Err(ctx.invalid(
                key("time_format"),
                "is only used with a time pointer (time = \"/t\"); without one the receive time is used",
            ))
        }
        Some("epoch_s") => TimeFormat::EpochS,
        Some("epoch_ms") => TimeFormat::EpochMs,
        Some("rfc3339") => TimeFormat::Rfc3339,
        Some("auto") => TimeFormat::Auto,
        Some(other) => {
            return Err(ctx.invalid(
                key("time_format"),
                format!(
                    "unknown time format {other:?} (expected \"epoch_s\", \"epoch_ms\", \"rfc3339\" or \"auto\")"
                ),
            ))
        }
    };
    let good_quality = match &raw.good_quality {
        None => None,
        Some(_) if raw.quality.is_none() => {
            return Err(ctx.invalid(
                key("good_quality"),
                "is only used with a quality pointer (quality = \"/q\")",
            ))
        }
        Some(list) if list.is_empty() => return Err(ctx.invalid(
            key("good_quality"),
            "is empty, which would make every sample missing; leave it out to accept any quality",
        )),
        Some(list) => {
            for (j, v) in list.iter().enumerate() {
                if !(v.is_string() || v.is_number() || v.is_boolean()) {
                    return Err(ctx.invalid(
                        format!("{}[{j}]", key("good_quality")),
                        "must be a string, a number or a boolean",
                    ));
                }
            }
            Some(list.clone())
        }
    };
    Ok(JsonPayload {
        value,
        time: raw.time.clone(),
        time_format,
        quality: raw.quality.clone(),
        good_quality,
    })
}

pub(super) fn output(raw: &RawOutput, ctx: &Ctx) -> Result<OutputConfig, ConfigError> {
    let topic = raw.topic.clone().ok_or_else(|| {
        ctx.missing(
            "output.topic",
            "where estimates go, with {channel} for the channel name, e.g. topic = \"brackenfield/clean/{channel}\"",
        )
    })?;
    check_channel_template(&topic, "output.topic", ctx)?;
    if let Some(flags) = &raw.flags_topic {
        check_channel_template(flags, "output.flags_topic", ctx)?;
        if *flags == topic {
            return Err(ctx.invalid(
                "output.flags_topic",
                "must differ from output.topic: subscribers tell estimates from flag changes by topic",
            ));
        }
    }
    if let Some(params) = &raw.params_topic {
        check_channel_template(params, "output.params_topic", ctx)?;
        if *params == topic || Some(params) == raw.flags_topic.as_ref() {
            return Err(ctx.invalid(
                "output.params_topic",
                "must differ from output.topic and output.flags_topic: subscribers tell messages apart by topic",
            ));
        }
    }
    Ok(OutputConfig {
        topic,
        qos: ctx.qos("output.qos", raw.qos, 0)?,
        retain: raw.retain.unwrap_or(false),
        flags_topic: raw.flags_topic.clone(),
        params_topic: raw.params_topic.clone(),
    })
}

fn check_channel_template(topic: &str, key: &str, ctx: &Ctx) -> Result<(), ConfigError> {
    if !topic.contains("{channel}") {
        return Err(ctx.invalid(
            key,
            format!(
                "{topic:?} has no {{channel}}: every channel would publish to the same topic; \
                 e.g. \"brackenfield/clean/{{channel}}\""
            ),
        ));
    }
    let rest = topic.replace("{channel}", "");
    if rest.contains(['{', '}']) {
        return Err(ctx.invalid(
            key,
            format!("{topic:?} has a placeholder other than {{channel}}, the only one it takes"),
        ));
    }
    check_topic_name(&rest).map_err(|m| ctx.invalid(key, m))
}

pub(super) fn status(raw: &RawStatus, ctx: &Ctx) -> Result<Option<String>, ConfigError> {
    match &raw.topic {
        None => Ok(None),
        Some(t) if t.is_empty() => Err(ctx.invalid("status.topic", "is empty")),
        Some(t) => {
            check_topic_name(t).map_err(|m| ctx.invalid("status.topic", m))?;
            Ok(Some(t.clone()))
        }
    }
}

pub(super) fn timing(raw: &RawTiming, ctx: &Ctx) -> Result<TimingConfig, ConfigError> {
    let after = ctx.seconds(
        "timing.stale_after_s",
        raw.stale_after_s.unwrap_or(60.0),
        true,
    )?;
    let every = ctx.seconds(
        "timing.stale_every_s",
        raw.stale_every_s.unwrap_or(10.0),
        false,
    )?;
    Ok(TimingConfig {
        stale_after_s: (after > 0.0).then_some(after),
        stale_every_s: every,
    })
}

pub(super) fn limits(raw: &RawLimits, ctx: &Ctx) -> Result<LimitsConfig, ConfigError> {
    let n = ctx.int(
        "limits.max_channels",
        raw.max_channels.unwrap_or(100_000),
        1,
        10_000_000,
    )?;
    Ok(LimitsConfig {
        max_channels: n as usize,
    })
}

/// `[state]`; `state_directory` is systemd's `$STATE_DIRECTORY` (colon-separated when the unit names several).
pub(super) fn state(
    raw: &RawState,
    ctx: &Ctx,
    state_directory: Option<&str>,
) -> Result<StateConfig, ConfigError> {
    let save_every_s = ctx.seconds(
        "state.save_every_s",
        raw.save_every_s.unwrap_or(DEFAULT_SAVE_EVERY_S),
        false,
    )?;
    if save_every_s < 1.0 {
        return Err(ctx.invalid(
            "state.save_every_s",
            format!(
                "must be at least 1 s: each save writes every channel's state (got {save_every_s})"
            ),
        ));
    }
    if raw.keep == Some(false) {
        if raw.dir.is_some() {
            return Err(ctx.invalid(
                "state.dir",
                "is given but state.keep is false: remove one of them",
            ));
        }
        return Ok(StateConfig {
            dir: None,
            origin: "state.keep = false",
            save_every_s,
        });
    }
    let systemd = state_directory
        .and_then(|v| v.split(':').next())
        .filter(|d| !d.is_empty());
    let (dir, origin) = match (&raw.dir, systemd) {
        (Some(d), _) => (Some(ctx.path("state.dir", d)?), "state.dir"),
        (None, Some(d)) => (Some(PathBuf::from(d)), "$STATE_DIRECTORY"),
        (None, None) if raw.keep == Some(true) => {
            return Err(ctx.missing(
                "state.dir",
                "state.keep is true but no directory is known: set state.dir (systemd sets $STATE_DIRECTORY \
                 from StateDirectory=)",
            ))
        }
        (None, None) => (None, StateConfig::default().origin),
    };
    Ok(StateConfig {
        dir,
        origin,
        save_every_s,
    })
}

pub(super) fn instance(raw: &RawInstance, ctx: &Ctx) -> Result<InstanceConfig, ConfigError> {
    let count = ctx.int("instance.count", raw.count.unwrap_or(1), 1, MAX_INSTANCES)?;
    let index = raw.index.unwrap_or(0);
    if !(0..count).contains(&index) {
        let range = if count == 1 {
            "must be 0 when instance.count is 1 (the default)".to_string()
        } else {
            format!(
                "must be an integer from 0 to {} (instance.count is {count}; instances are numbered from 0)",
                count - 1
            )
        };
        return Err(ctx.invalid("instance.index", format!("{range} (got {index})")));
    }
    Ok(InstanceConfig {
        index: index as u64,
        count: count as u64,
    })
}

pub(super) fn metrics(raw: &RawMetrics, ctx: &Ctx) -> Result<MetricsConfig, ConfigError> {
    let text = raw.listen.as_deref().unwrap_or(DEFAULT_METRICS_LISTEN);
    let listen: std::net::SocketAddr = text.trim().parse().map_err(|_| {
        ctx.invalid(
            "metrics.listen",
            format!(
                "must be an IP address and port such as \"127.0.0.1:9464\" or \"[::1]:9464\" (got {text:?}); host \
                 names are not resolved"
            ),
        )
    })?;
    if listen.port() == 0 {
        return Err(ctx.invalid(
            "metrics.listen",
            format!("needs a fixed port, 1 to 65535, that the scraper can be told (got {text:?})"),
        ));
    }
    Ok(MetricsConfig { listen })
}

/// The default status topic of a daemon with this client id.
pub fn default_status_topic(client_id: &str) -> String {
    format!("gaugewise/{client_id}/status")
}

/// Where flag changes go when `output.flags_topic` is not set.
pub fn default_flags_topic(client_id: &str) -> String {
    format!("gaugewise/{client_id}/flags/{{channel}}")
}

/// Where accepted parameter changes go when `output.params_topic` is not set.
pub fn default_params_topic(client_id: &str) -> String {
    format!("gaugewise/{client_id}/params/{{channel}}")
}

// ---------------------------------------------------------------------------------------------------------------
// Topics.

/// Checks MQTT topic filter syntax: not empty, `+` and `#` each a whole level, `#` only as the last level.
pub fn check_filter(filter: &str) -> Result<(), String> {
    if filter.is_empty() {
        return Err("is empty; give an MQTT topic filter such as \"plant/+/value\"".to_string());
    }
    if filter.len() > MAX_TOPIC_BYTES {
        return Err(format!(
            "is {} bytes long; MQTT allows {MAX_TOPIC_BYTES}",
            filter.len()
        ));
    }
    if filter.contains('\0') {
        return Err("contains a NUL character".to_string());
    }
    let levels: Vec<&str> = filter.split('/').collect();
    for (i, level) in levels.iter().enumerate() {
        if level.contains('#') && (*level != "#" || i + 1 != levels.len()) {
            return Err(format!(
                "{filter:?}: '#' must be a whole level and the last one (as in \"plant/#\")"
            ));
        }
        if level.contains('+') && *level != "+" {
            return Err(format!(
                "{filter:?}: '+' must be a whole level (as in \"plant/+/value\"), not part of {level:?}"
            ));
        }
    }
    Ok(())
}

/// A topic we publish to (placeholders already removed): not empty, no wildcard, no NUL.
fn check_topic_name(topic: &str) -> Result<(), String> {
    if topic.contains(['+', '#']) {
        return Err(format!(
            "{topic:?} contains a wildcard ('+' or '#'); a topic to publish to cannot"
        ));
    }
    if topic.contains('\0') {
        return Err("contains a NUL character".to_string());
    }
    if topic.len() > MAX_TOPIC_BYTES / 2 {
        return Err(format!(
            "is {} bytes long; too long for a topic",
            topic.len()
        ));
    }
    Ok(())
}

/// Checks a JSON pointer (RFC 6901): empty for the whole document, else `/` then reference tokens in which `~` is
/// only ever `~0` or `~1`.
pub fn check_pointer(p: &str) -> Result<(), String> {
    if p.is_empty() {
        return Ok(());
    }
    if !p.starts_with('/') {
        return Err(format!(
            "{p:?} is not a JSON pointer: it must be empty (the whole payload) or start with '/', e.g. \"/{p}\""
        ));
    }
    let bytes = p.as_bytes();
    for (i, b) in bytes.iter().enumerate() {
        if *b == b'~' && !matches!(bytes.get(i + 1), Some(b'0' | b'1')) {
            return Err(format!(
                "{p:?}: in a JSON pointer '~' must be followed by 0 (for '~') or 1 (for '/')"
            ));
        }
    }
    Ok(())
}

impl ChannelTemplate {
    /// Parses `{N}` (topic level N, from 0), `{topic}` and literal text.
    pub fn parse(text: &str) -> Result<ChannelTemplate, String> {
        if text.is_empty() {
            return Err(
                "is empty; e.g. \"{2}\" for the third topic level or \"{topic}\" for the whole topic"
                    .to_string(),
            );
        }
        let mut parts = Vec::new();
        let mut literal = String::new();
        let mut chars = text.char_indices();
        while let Some((at, c)) = chars.next() {
            match c {
                '{' => {
                    let inner: String = chars.by_ref().map(|(_, c)| c).take_while(|c| *c != '}').collect();
                    let closed = text[at + 1..].contains('}');
                    if !closed {
                        return Err(format!("{text:?}: '{{' at position {at} is never closed"));
                    }
                    let part = if inner == "topic" {
                        TemplatePart::Topic
                    } else if !inner.is_empty() && inner.bytes().all(|b| b.is_ascii_digit()) {
                        TemplatePart::Level(inner.parse().map_err(|_| {
                            format!("{text:?}: level index {inner} is too large")
                        })?)
                    } else {
                        return Err(format!(
                            "{text:?}: unknown placeholder {{{inner}}}; use {{N}} for topic level N (counted from \
                             0) or {{topic}} for the whole topic"
                        ));
                    };
                    if !literal.is_empty() {
                        parts.push(TemplatePart::Text(std::mem::take(&mut literal)));
                    }
                    parts.push(part);
                }
                '}' => return Err(format!("{text:?}: '}}' at position {at} has no '{{'")),
                '+' | '#' | '\0' => {
                    return Err(format!(
                        "{text:?}: {c:?} cannot be part of a channel name (it ends up in the output topic)"
                    ))
                }
                c => literal.push(c),
            }
        }
        if !literal.is_empty() {
            parts.push(TemplatePart::Text(literal));
        }
        Ok(ChannelTemplate {
            text: text.to_string(),
            parts,
        })
    }

    /// Every level the template names exists in topics matching `filter`, and the template tells the topics the
    /// filter matches apart (else all of them would feed one channel).
    pub fn check_against(&self, filter: &str) -> Result<(), String> {
        let levels: Vec<&str> = filter.split('/').collect();
        let open = levels.last() == Some(&"#");
        let fixed = if open { levels.len() - 1 } else { levels.len() };
        let mut distinguishes = false;
        for part in &self.parts {
            match part {
                TemplatePart::Topic => distinguishes = true,
                TemplatePart::Level(i) if *i >= fixed && !open => {
                    return Err(format!(
                        "{{{i}}} names topic level {i}, but topics matching {filter:?} have levels 0 to {}",
                        fixed - 1
                    ))
                }
                TemplatePart::Level(i) => {
                    if *i >= fixed || levels[*i] == "+" {
                        distinguishes = true;
                    }
                }
                TemplatePart::Text(_) => {}
            }
        }
        let wild = levels.iter().any(|l| *l == "+" || *l == "#");
        if wild && !distinguishes {
            return Err(format!(
                "{:?} names no wildcard level of {filter:?}, so every topic it matches would feed the same channel; \
                 use the '+' level's index, e.g. \"{{{}}}\", or {{topic}}",
                self.text,
                levels.iter().position(|l| *l == "+" || *l == "#").unwrap_or(0)
            ));
        }
        Ok(())
    }

    /// Whether a name built from this template can contain '/', i.e. span several levels of an output topic.
    fn may_contain_slash(&self) -> bool {
        self.parts.iter().any(|p| match p {
            TemplatePart::Topic => true,
            TemplatePart::Text(t) => t.contains('/'),
            TemplatePart::Level(_) => false,
        })
    }
}

/// One level of a topic we will publish to, for matching against filters: literal, or built around a channel name.
enum OutLevel<'a> {
    Literal(&'a str),
    /// `prefix{channel}suffix` (a channel name without '/').
    Around(&'a str, &'a str),
    /// Any number (at least one) of levels of any content.
    Many,
}

/// Could some topic of the output `template` (with `{channel}` standing for any channel name) be matched by
/// `filter`? Over-approximates where a name may contain '/', which can only refuse more configurations.
pub(super) fn filter_may_receive(filter: &str, template: &str, slash_names: bool) -> bool {
    let out: Vec<OutLevel> = template
        .split('/')
        .map(|level| match level.find("{channel}") {
            None => OutLevel::Literal(level),
            Some(_) if slash_names => OutLevel::Many,
            Some(at) => {
                let last = level.rfind("{channel}").unwrap_or(at);
                OutLevel::Around(&level[..at], &level[last + "{channel}".len()..])
            }
        })
        .collect();
    let f: Vec<&str> = filter.split('/').collect();
    // MQTT: a filter starting with a wildcard does not match topics starting with '$'.
    if let (Some(first), Some(OutLevel::Literal(l))) = (f.first(), out.first()) {
        if (*first == "+" || *first == "#") && l.starts_with('$') {
            return false;
        }
    }
    matches_from(&f, &out)
}

fn matches_from(f: &[&str], out: &[OutLevel]) -> bool {
    match (f.first(), out.first()) {
        (Some(&"#"), _) => true,
        (None, None) => true,
        (None, Some(_)) | (Some(_), None) => false,
        (Some(fl), Some(ol)) => match ol {
            OutLevel::Literal(l) => (*fl == "+" || fl == l) && matches_from(&f[1..], &out[1..]),
            OutLevel::Around(pre, post) => {
                let fits = *fl == "+"
                    || (fl.len() > pre.len() + post.len()
                        && fl.starts_with(pre)
                        && fl.ends_with(post));
                fits && matches_from(&f[1..], &out[1..])
            }
            OutLevel::Many => {
                (1..=f.len()).any(|k| f[..k].contains(&"#") || matches_from(&f[k..], &out[1..]))
            }
        },
    }
}

// ---------------------------------------------------------------------------------------------------------------
// The whole daemon configuration.

/// Everything `run` needs, validated together: what [`super::Config::daemon`] returns.
#[derive(Debug, Clone, PartialEq)]
pub struct DaemonConfig {
    /// The configuration file, as named on the command line (for logs).
    pub source: String,
    pub channels: super::ChannelConfig,
    pub broker: BrokerConfig,
    /// At least one; filters are pairwise different.
    pub inputs: Vec<InputConfig>,
    pub output: OutputConfig,
    /// Retained `online`/`offline` messages and the Last Will go here.
    pub status_topic: String,
    /// Retained flag-change messages, a template with `{channel}`.
    pub flags_topic: String,
    /// Retained parameter-change messages of re-estimation, a template with `{channel}`.
    pub params_topic: String,
    pub stale_after_s: Option<f64>,
    pub stale_every_s: f64,
    pub max_channels: usize,
    /// The metrics endpoint; None: off (no `[metrics]` table).
    pub metrics: Option<MetricsConfig>,
    /// Where channel state is kept between runs.
    pub state: StateConfig,
    /// Which share of the channels this daemon handles (`[instance]`; default: all).
    pub instance: InstanceConfig,
    /// Environment variables that overrode keys, as `VAR -> key` (values are not kept: one may be a password).
    pub env_overrides: Vec<String>,
}

/// Checks that need IO or several sections at once, and fills in the password from its file.
pub(super) fn assemble(config: &super::Config, ctx: &Ctx) -> Result<DaemonConfig, ConfigError> {
    let mut broker = config.broker.clone().ok_or_else(|| {
        ctx.missing(
            "broker",
            "check and run connect to an MQTT broker: add a [broker] table, at least with client_id",
        )
    })?;
    if config.inputs.is_empty() {
        return Err(ctx.missing(
            "inputs",
            "add at least one [[inputs]] table: the topic filter to subscribe to and how to read it",
        ));
    }
    let output = config.output.clone().ok_or_else(|| {
        ctx.missing(
            "output",
            "add an [output] table with topic = \"…/{channel}\", where estimates are published",
        )
    })?;
    if let Some(path) = &broker.password_file {
        let text = std::fs::read_to_string(path).map_err(|e| {
            ctx.invalid(
                "broker.password_file",
                format!("cannot read {}: {e}", path.display()),
            )
        })?;
        let text = text
            .strip_suffix('\n')
            .map(|t| t.strip_suffix('\r').unwrap_or(t))
            .unwrap_or(&text);
        if text.is_empty() {
            return Err(ctx.invalid(
                "broker.password_file",
                format!("{} is empty", path.display()),
            ));
        }
        broker.password = Some(Secret(text.to_string()));
    }
    if let Some(tls) = &broker.tls {
        for (key, path) in [("ca", &tls.ca), ("cert", &tls.cert), ("key", &tls.key)] {
            if let Some(path) = path {
                readable_file(path).map_err(|m| ctx.invalid(format!("broker.tls.{key}"), m))?;
            }
        }
    }
    for (i, input) in config.inputs.iter().enumerate() {
        if input.max_payload_bytes > broker.max_packet_bytes {
            return Err(ctx.invalid(
                format!("inputs[{i}].max_payload_bytes"),
                format!(
                    "is {} but broker.max_packet_bytes is {}: a payload cannot be larger than its packet",
                    input.max_payload_bytes, broker.max_packet_bytes
                ),
            ));
        }
        if let Some(j) = config.inputs[..i]
            .iter()
            .position(|o| o.topic == input.topic)
        {
            return Err(ctx.invalid(
                format!("inputs[{i}].topic"),
                format!("{:?} is already the topic of inputs[{j}]", input.topic),
            ));
        }
    }
    let status_topic = config
        .status_topic
        .clone()
        .unwrap_or_else(|| default_status_topic(&broker.client_id));
    let flags_topic = output
        .flags_topic
        .clone()
        .unwrap_or_else(|| default_flags_topic(&broker.client_id));
    let params_topic = output
        .params_topic
        .clone()
        .unwrap_or_else(|| default_params_topic(&broker.client_id));
    let slash_names = config.inputs.iter().any(|i| i.channel.may_contain_slash());
    for (i, input) in config.inputs.iter().enumerate() {
        if filter_may_receive(&input.topic, &output.topic, slash_names) {
            return Err(ctx.invalid(
                "output.topic",
                format!(
                    "{:?} can be matched by inputs[{i}].topic {:?}: the daemon would read its own estimates back \
                     as samples",
                    output.topic, input.topic
                ),
            ));
        }
        if filter_may_receive(&input.topic, &status_topic, false) {
            let key = if config.status_topic.is_some() {
                "status.topic".to_string()
            } else {
                format!("inputs[{i}].topic")
            };
            return Err(ctx.invalid(
                key,
                format!(
                    "the status topic {status_topic:?} is matched by inputs[{i}].topic {:?}: the daemon would read \
                     its own status messages as samples",
                    input.topic
                ),
            ));
        }
    }
    for (i, input) in config.inputs.iter().enumerate() {
        if filter_may_receive(&input.topic, &flags_topic, slash_names) {
            let key = if output.flags_topic.is_some() {
                "output.flags_topic".to_string()
            } else {
                format!("inputs[{i}].topic")
            };
            return Err(ctx.invalid(
                key,
                format!(
                    "the flags topic {flags_topic:?} can be matched by inputs[{i}].topic {:?}: the daemon would \
                     read its own flag messages back as samples",
                    input.topic
                ),
            ));
        }
        if filter_may_receive(&input.topic, &params_topic, slash_names) {
            let key = if output.params_topic.is_some() {
                "output.params_topic".to_string()
            } else {
                format!("inputs[{i}].topic")
            };
            return Err(ctx.invalid(
                key,
                format!(
                    "the params topic {params_topic:?} can be matched by inputs[{i}].topic {:?}: the daemon would \
                     read its own parameter messages back as samples",
                    input.topic
                ),
            ));
        }
    }
    Ok(DaemonConfig {
        source: ctx.file.to_string(),
        channels: config.channels.clone(),
        broker,
        inputs: config.inputs.clone(),
        output,
        status_topic,
        flags_topic,
        params_topic,
        stale_after_s: config.timing.stale_after_s,
        stale_every_s: config.timing.stale_every_s,
        max_channels: config.limits.max_channels,
        metrics: config.metrics,
        state: config.state.clone(),
        instance: config.instance,
        env_overrides: config
            .env
            .iter()
            .map(|o| format!("{} -> {}", o.var, o.key))
            .collect(),
    })
}

fn readable_file(path: &Path) -> Result<(), String> {
    let file =
        std::fs::File::open(path).map_err(|e| format!("cannot read {}: {e}", path.display()))?;
    let meta = file
        .metadata()
        .map_err(|e| format!("cannot read {}: {e}", path.display()))?;
    if meta.is_file() {
        Ok(())
    } else {
        Err(format!("{} is not a file", path.display()))
    }
}

impl InstanceConfig {
    /// For `check`: `1 of 2 (channels whose stable hash mod 2 == 1)`, or `0 of 1 (every channel)`.
    pub fn describe(&self) -> String {
        if self.count <= 1 {
            format!("{} of {} (every channel)", self.index, self.count)
        } else {
            format!(
                "{} of {} (channels whose stable hash mod {} == {})",
                self.index, self.count, self.count, self.index
            )
        }
    }
}

impl DaemonConfig {
    /// A human-readable account of the resolved configuration, as `gaugewise check` prints it. Never prints the
    /// password.
    pub fn describe(&self) -> String {
        let mut s = String::new();
        let b = &self.broker;
        let _ = writeln!(s, "config: {} (valid)", self.source);
        for o in &self.env_overrides {
            let _ = writeln!(s, "environment: {o}");
        }
        let session = if b.clean_session {
            "clean session (nothing kept while away)"
        } else {
            "persistent session (the broker keeps subscriptions and QoS 1/2 samples while away)"
        };
        let _ = writeln!(
            s,
            "broker: {}:{}, client id {}, {session}",
            b.host, b.port, b.client_id
        );
        let keep_alive = match b.keep_alive.as_secs() {
            0 => "off".to_string(),
            n => format!("{n} s"),
        };
        let tls = match &b.tls {
            None => "off".to_string(),
            Some(t) => {
                let ca = t.ca.as_ref().map_or("system trust store".to_string(), |p| {
                    format!("CA {}", p.display())
                });
                let client = t.cert.as_ref().map_or(String::new(), |p| {
                    format!(", client certificate {}", p.display())
                });
                format!("on ({ca}{client})")
            }
        };
        let auth = match (&b.username, &b.password_file, &b.password) {
            (None, _, _) => "no user name".to_string(),
            (Some(u), Some(f), _) => format!("user {u}, password from {}", f.display()),
            (Some(u), None, Some(_)) => format!("user {u}, password set"),
            (Some(u), None, None) => format!("user {u}, no password"),
        };
        let _ = writeln!(s, "  TLS {tls}; {auth}; keep-alive {keep_alive}");
        let _ = writeln!(
            s,
            "  max packet {} bytes, request queue {}, reconnect backoff {} s to {} s",
            b.max_packet_bytes,
            b.request_queue,
            b.reconnect_min.as_secs_f64(),
            b.reconnect_max.as_secs_f64()
        );
        let _ = writeln!(s, "inputs:");
        for (i, input) in self.inputs.iter().enumerate() {
            let payload = match &input.payload {
                PayloadFormat::Number => "number".to_string(),
                PayloadFormat::Json(j) => {
                    let mut p = format!("json, value {:?}", j.value);
                    if let Some(t) = &j.time {
                        let _ = write!(p, ", time {t:?} ({})", j.time_format.name());
                    }
                    if let Some(q) = &j.quality {
                        let good = j.good_quality.as_ref().map_or("any".to_string(), |g| {
                            g.iter()
                                .map(|v| v.to_string())
                                .collect::<Vec<_>>()
                                .join(", ")
                        });
                        let _ = write!(p, ", quality {q:?} (good: {good})");
                    }
                    p
                }
            };
            let _ = writeln!(
                s,
                "  [{i}] {} -> channel {}, QoS {}, payload {payload}, at most {} bytes",
                input.topic, input.channel.text, input.qos, input.max_payload_bytes
            );
        }
        let _ = writeln!(
            s,
            "output: {}, QoS {}, {}",
            self.output.topic,
            self.output.qos,
            if self.output.retain {
                "retained"
            } else {
                "not retained"
            }
        );
        let _ = writeln!(
            s,
            "status: {} (retained online/offline, offline as Last Will)",
            self.status_topic
        );
        let _ = writeln!(
            s,
            "flags: {} (retained, QoS 1, on every flag change)",
            self.flags_topic
        );
        match self.stale_after_s {
            Some(after) => {
                let _ = writeln!(
                    s,
                    "timing: a channel silent for {after} s publishes a prediction every {} s",
                    self.stale_every_s
                );
            }
            None => {
                let _ = writeln!(s, "timing: stale publishing off");
            }
        }
        let _ = writeln!(s, "limits: at most {} channels", self.max_channels);
        let _ = writeln!(s, "instance: {}", self.instance.describe());
        match &self.state.dir {
            Some(dir) => {
                let _ = writeln!(
                    s,
                    "state: kept in {} (from {}), saved every {} s and at shutdown",
                    dir.display(),
                    self.state.origin,
                    self.state.save_every_s
                );
            }
            None => {
                let _ = writeln!(s, "state: not kept across restarts ({})", self.state.origin);
            }
        }
        match &self.metrics {
            None => {
                let _ = writeln!(s, "metrics: off");
            }
            Some(m) => {
                let reach = if m.listen.ip().is_loopback() {
                    "this host only"
                } else {
                    "reachable from other hosts, without authentication"
                };
                let _ = writeln!(
                    s,
                    "metrics: http://{}/metrics and /health ({reach})",
                    m.listen
                );
            }
        }
        let _ = writeln!(
            s,
            "channels (the first matching override wins, else the default):"
        );
        let _ = writeln!(
            s,
            "  default: {}",
            super::model_line(&self.channels.default)
        );
        for (i, o) in self.channels.overrides.iter().enumerate() {
            let _ = writeln!(
                s,
                "  override[{i}] {}: {}",
                o.pattern,
                super::model_line(&o.model)
            );
        }
        let flags = &self.channels.flags;
        let _ = writeln!(
            s,
            "flags (the first matching override wins, else the default):"
        );
        let _ = writeln!(s, "  default: {}", flags.default.summary());
        for (i, (pattern, design)) in flags.overrides.iter().enumerate() {
            let _ = writeln!(s, "  override[{i}] {pattern}: {}", design.summary());
        }
        let learn = &self.channels.learn;
        let line = |l: Option<&crate::reestimate::LearnSettings>| {
            match l {
            None => "off".to_string(),
            Some(l) => format!(
                "every {} s on the last {} samples (from {} usable), gain >= {} nats, variances x{} at most per step",
                l.every_s, l.window, l.min_samples, l.min_gain, l.max_factor
            ),
        }
        };
        let _ = writeln!(
            s,
            "re-estimation (the first matching override wins, else the default):"
        );
        let _ = writeln!(s, "  default: {}", line(learn.default.as_ref()));
        for (i, (pattern, l)) in learn.overrides.iter().enumerate() {
            let _ = writeln!(s, "  override[{i}] {pattern}: {}", line(l.as_ref()));
        }
        let _ = writeln!(
            s,
            "params: {} (retained, QoS 1, on every accepted re-estimation)",
            self.params_topic
        );
        s
    }
}

#[cfg(test)]
mod tests {
    use super::super::{Config, ConfigError};
    use super::*;

    const FILE: &str = "gw.toml";
    const CHANNELS: &str =
        "[channels.default]\nmodel = \"level\"\ninterval = 1.0\nobs_var = 1.0\nlevel_var = 0.1\n";
    const BROKER: &str = "[broker]\nclient_id = \"gw-01\"\n";
    const INPUT: &str =
        "[[inputs]]\ntopic = \"plant/raw/+\"\nchannel = \"{2}\"\npayload = \"number\"\n";
    const OUTPUT: &str = "[output]\ntopic = \"plant/clean/{channel}\"\n";

    fn full(extra: &str) -> String {
        format!("{CHANNELS}{BROKER}{INPUT}{OUTPUT}{extra}")
    }

    fn load(text: &str) -> Result<DaemonConfig, ConfigError> {
        Config::from_str(text, FILE).and_then(|c| c.daemon())
    }

    /// The one-line message of a configuration that must fail, checked to name the file.
    fn message(text: &str) -> String {
        let m = load(text).expect_err("expected an error").to_string();
        assert!(m.starts_with(&format!("{FILE}: ")), "{m}");
        assert!(!m.contains('\n'), "{m}");
        m
    }

    /// The config text with `line` put into the table whose header is `header` (added at the end if absent).
    fn with(header: &str, line: &str) -> String {
        let text = full("");
        match text.find(&format!("{header}\n")) {
            Some(at) => {
                let end = at + header.len() + 1;
                format!("{}{line}\n{}", &text[..end], &text[end..])
            }
            None => format!("{text}{header}\n{line}\n"),
        }
    }

    fn root() -> std::path::PathBuf {
        std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR"))
    }

    #[test]
    fn minimal_config_gets_the_defaults() {
        let d = load(&full("")).unwrap();
        let b = &d.broker;
        assert_eq!((b.host.as_str(), b.port), ("127.0.0.1", 1883));
        assert_eq!(b.client_id, "gw-01");
        assert!(!b.clean_session);
        assert_eq!(b.keep_alive, Duration::from_secs(30));
        assert_eq!(
            (b.username.as_ref(), b.password.as_ref(), b.tls.as_ref()),
            (None, None, None)
        );
        assert_eq!(b.max_packet_bytes, 262_144);
        assert_eq!(b.request_queue, 10_000);
        assert_eq!(b.reconnect_min, Duration::from_millis(500));
        assert_eq!(b.reconnect_max, Duration::from_secs(30));
        let i = &d.inputs[0];
        assert_eq!(i.topic, "plant/raw/+");
        assert_eq!(i.channel.parts, vec![TemplatePart::Level(2)]);
        assert_eq!((i.qos, i.max_payload_bytes), (1, 4096));
        assert_eq!(i.payload, PayloadFormat::Number);
        assert_eq!(
            d.output,
            OutputConfig {
                topic: "plant/clean/{channel}".into(),
                qos: 0,
                retain: false,
                flags_topic: None,
                params_topic: None,
            }
        );
        assert_eq!(d.status_topic, "gaugewise/gw-01/status");
        assert_eq!(d.flags_topic, "gaugewise/gw-01/flags/{channel}");
        assert_eq!(
            (d.stale_after_s, d.stale_every_s, d.max_channels),
            (Some(60.0), 10.0, 100_000)
        );
        assert!(d.env_overrides.is_empty());
    }

    #[test]
    fn brackenfield_example_is_complete() {
        let path = root().join("config/brackenfield.toml");
        let c = Config::load_with_env(&path, std::iter::empty::<(String, String)>()).unwrap();
        let d = c.daemon().unwrap();
        assert_eq!(d.broker.client_id, "brackenfield-gw-01");
        assert_eq!(d.broker.username.as_deref(), Some("gaugewise"));
        assert_eq!(d.inputs.len(), 2);
        match &d.inputs[0].payload {
            PayloadFormat::Json(j) => {
                assert_eq!(
                    (j.value.as_str(), j.time.as_deref(), j.quality.as_deref()),
                    ("/v", Some("/t"), Some("/q"))
                );
                assert_eq!(j.time_format, TimeFormat::Auto);
                assert_eq!(
                    j.good_quality,
                    Some(vec![serde_json::json!("good"), serde_json::json!(192)])
                );
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(d.inputs[1].payload, PayloadFormat::Number);
        assert_eq!(d.status_topic, "gaugewise/brackenfield-gw-01/status");
        assert_eq!(d.channels.overrides.len(), 4);
        let text = d.describe();
        for needle in [
            "127.0.0.1:1883",
            "brackenfield-gw-01",
            "persistent session",
            "TLS off",
            "brackenfield/raw/+/+",
            "brackenfield/clean/{channel}",
            "override[3] LT-30?: trend",
        ] {
            assert!(text.contains(needle), "{needle} not in\n{text}");
        }
    }

    #[test]
    fn plant_example_is_channels_only() {
        let c = Config::load_with_env(
            &root().join("config/plant.toml"),
            std::iter::empty::<(String, String)>(),
        )
        .unwrap();
        assert_eq!(c.broker, None);
        assert_eq!(c.daemon().unwrap_err().key(), Some("broker"));
    }

    #[test]
    fn missing_daemon_sections_name_the_key() {
        let m = message(CHANNELS);
        assert!(m.starts_with("gw.toml: broker: missing ("), "{m}");
        assert!(message(&format!("{CHANNELS}{BROKER}{OUTPUT}"))
            .starts_with("gw.toml: inputs: missing ("));
        assert!(message(&format!("inputs = []\n{CHANNELS}{BROKER}{OUTPUT}"))
            .starts_with("gw.toml: inputs: missing"));
        assert!(message(&format!("{CHANNELS}{BROKER}{INPUT}"))
            .starts_with("gw.toml: output: missing ("));
        assert!(
            message(&format!("{CHANNELS}{BROKER}{INPUT}[output]\nqos = 1\n"))
                .starts_with("gw.toml: output.topic: missing (")
        );
        // The daemon sections are optional for replay, but validated when present.
        assert!(Config::from_str(CHANNELS, FILE).is_ok());
        let e = Config::from_str(
            &format!("{CHANNELS}[broker]\nport = 0\nclient_id = \"a\"\n"),
            FILE,
        )
        .unwrap_err();
        assert_eq!(e.key(), Some("broker.port"));
    }

    #[test]
    fn unknown_keys_in_every_section() {
        for (header, key) in [
            ("[broker]", "broker.hots"),
            ("[[inputs]]", "inputs[0].chanel"),
            ("[output]", "output.retained"),
            ("[status]", "status.topics"),
            ("[timing]", "timing.stale_s"),
            ("[limits]", "limits.channels"),
            ("[instance]", "instance.shard"),
        ] {
            let name = key.rsplit('.').next().unwrap();
            let m = message(&with(header, &format!("{name} = 1")));
            assert!(
                m.starts_with(&format!("gw.toml: {key}: unknown field `{name}`")),
                "{m}"
            );
        }
        let m = message(&with("[broker.tls]", "crt = \"x\""));
        assert!(
            m.starts_with("gw.toml: broker.tls.crt: unknown field"),
            "{m}"
        );
        let m = message(&format!(
            "{CHANNELS}{BROKER}[inputs]\ntopic = \"a\"\n{OUTPUT}"
        ));
        assert!(m.contains("[[inputs]] table (double brackets)"), "{m}");
    }

    #[test]
    fn broker_values_are_checked() {
        let cases = [
            ("host = \"\"", "broker.host: must be a host name"),
            ("host = \"plc gw\"", "broker.host: must be a host name"),
            (
                "port = 0",
                "broker.port: must be an integer from 1 to 65535 (got 0)",
            ),
            (
                "port = 70000",
                "broker.port: must be an integer from 1 to 65535 (got 70000)",
            ),
            (
                "port = \"1883\"",
                "broker.port: invalid type: string \"1883\", expected i64",
            ),
            (
                "keep_alive_s = -1",
                "broker.keep_alive_s: must be an integer from 0 to 65535 (got -1)",
            ),
            (
                "max_packet_bytes = 100",
                "broker.max_packet_bytes: must be an integer from 1024 to 16777216",
            ),
            (
                "max_packet_bytes = 16777217",
                "broker.max_packet_bytes: must be an integer from 1024 to 16777216",
            ),
            (
                "request_queue = 0",
                "broker.request_queue: must be an integer from 1 to 1000000",
            ),
            (
                "reconnect_min_s = 0",
                "broker.reconnect_min_s: must be a number of seconds > 0",
            ),
            (
                "reconnect_max_s = 0.1",
                "broker.reconnect_max_s: must be >= reconnect_min_s (0.5) (got 0.1)",
            ),
            (
                "reconnect_max_s = nan",
                "broker.reconnect_max_s: must be a number of seconds > 0",
            ),
            (
                "password = \"x\"",
                "broker.password: MQTT sends a password only with a user name",
            ),
            (
                "password_file = \"x\"",
                "broker.password_file: MQTT sends a password only with a user name",
            ),
            (
                "username = \"u\"\npassword = \"x\"\npassword_file = \"y\"",
                "broker.password_file: give either password or password_file, not both",
            ),
            ("username = \"\"", "broker.username: must be non-empty"),
            (
                "clean_session = \"no\"",
                "broker.clean_session: invalid type: string \"no\", expected a boolean",
            ),
        ];
        for (line, expected) in cases {
            let m = message(&with("[broker]", line));
            assert!(
                m.starts_with(&format!("gw.toml: {expected}")),
                "{line}: {m}"
            );
        }
    }

    #[test]
    fn persistent_sessions_need_a_fixed_client_id() {
        let text = full("").replace("client_id = \"gw-01\"\n", "");
        let m = message(&text);
        assert!(
            m.starts_with("gw.toml: broker.client_id: missing (a persistent session"),
            "{m}"
        );
        let m = message(&full("").replace("\"gw-01\"", "\"\""));
        assert!(m.starts_with("gw.toml: broker.client_id: is empty"), "{m}");
        for bad in ["gw/01", "gw 01", "gw+", "gw#", " gw"] {
            let m = message(&full("").replace("gw-01", bad));
            assert!(
                m.starts_with("gw.toml: broker.client_id: contains"),
                "{bad}: {m}"
            );
        }
        let m = message(&full("").replace("gw-01", &"x".repeat(129)));
        assert!(m.contains("at most 128"), "{m}");
        // A clean session may leave it out: it gets a stable name of its own.
        let d = load(&text.replace("[broker]\n", "[broker]\nclean_session = true\n")).unwrap();
        assert!(
            d.broker.client_id.starts_with("gaugewise-"),
            "{}",
            d.broker.client_id
        );
        check_client_id(&d.broker.client_id).unwrap();
        assert_eq!(
            d.status_topic,
            format!("gaugewise/{}/status", d.broker.client_id)
        );
    }

    #[test]
    fn password_file_is_read_and_trimmed() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("pw"), "s3cret\r\n").unwrap();
        std::fs::write(dir.path().join("pw2"), "two\nlines\n\n").unwrap();
        std::fs::write(dir.path().join("empty"), "\n").unwrap();
        let config = dir.path().join("gw.toml");
        let run = |file: &str| {
            let text = with(
                "[broker]",
                &format!("username = \"u\"\npassword_file = \"{file}\""),
            );
            std::fs::write(&config, text).unwrap();
            Config::load_with_env(&config, std::iter::empty::<(String, String)>())
                .and_then(|c| c.daemon())
        };
        // Relative to the config file's directory, not the working directory.
        let d = run("pw").unwrap();
        assert_eq!(
            d.broker.password.as_ref().map(Secret::expose),
            Some("s3cret")
        );
        assert_eq!(d.broker.password_file, Some(dir.path().join("pw")));
        assert!(!format!("{d:?}").contains("s3cret"));
        assert!(!d.describe().contains("s3cret"));
        assert!(d.describe().contains("password from "));
        // Only one trailing newline goes.
        assert_eq!(
            run("pw2").unwrap().broker.password.unwrap().expose(),
            "two\nlines\n"
        );
        let m = run("empty").unwrap_err().to_string();
        assert!(
            m.contains("gw.toml: broker.password_file: ") && m.ends_with("empty is empty"),
            "{m}"
        );
        let m = run("nope").unwrap_err().to_string();
        assert!(
            m.contains("broker.password_file: cannot read ") && m.contains("nope"),
            "{m}"
        );
        // replay does not read it: loading alone succeeds even when the file is missing.
        let text = with("[broker]", "username = \"u\"\npassword_file = \"nope\"");
        assert!(Config::from_str(&text, FILE).is_ok());
        let d = load(&with("[broker]", "username = \"u\"\npassword = \"inline\"")).unwrap();
        assert_eq!(d.broker.password, Some(Secret::new("inline")));
        assert_eq!(format!("{:?}", Secret::new("inline")), "Secret(***)");
    }

    #[test]
    fn tls_settings() {
        let d = load(&with("[broker.tls]", "")).unwrap();
        assert_eq!(d.broker.port, 8883, "TLS changes the default port");
        assert_eq!(
            d.broker.tls,
            Some(TlsConfig {
                ca: None,
                cert: None,
                key: None
            })
        );
        assert!(d.describe().contains("TLS on (system trust store)"));
        let m = message(&with("[broker.tls]", "cert = \"c.pem\""));
        assert!(
            m.starts_with(
                "gw.toml: broker.tls.key: missing (a client certificate needs its private key"
            ),
            "{m}"
        );
        let m = message(&with("[broker.tls]", "key = \"k.pem\""));
        assert!(m.starts_with("gw.toml: broker.tls.cert: missing"), "{m}");
        let m = message(&with("[broker.tls]", "ca = \"no-such-ca.pem\""));
        assert!(
            m.starts_with("gw.toml: broker.tls.ca: cannot read no-such-ca.pem"),
            "{m}"
        );
        let m = message(&with("[broker.tls]", "ca = \"src\""));
        assert!(m.starts_with("gw.toml: broker.tls.ca:"), "{m}");
        let dir = tempfile::tempdir().unwrap();
        for f in ["ca.pem", "c.pem", "k.pem"] {
            std::fs::write(dir.path().join(f), "x").unwrap();
        }
        let p = |f: &str| dir.path().join(f).display().to_string();
        let d = load(&with(
            "[broker.tls]",
            &format!(
                "ca = '{}'\ncert = '{}'\nkey = '{}'",
                p("ca.pem"),
                p("c.pem"),
                p("k.pem")
            ),
        ))
        .unwrap();
        assert_eq!(d.broker.tls.unwrap().key, Some(dir.path().join("k.pem")));
    }

    #[test]
    fn topic_filter_syntax() {
        for good in [
            "a", "a/b", "+", "#", "a/+/c", "a/#", "+/+/#", "/a", "a//b", "$SYS/#",
        ] {
            check_filter(good).unwrap_or_else(|e| panic!("{good}: {e}"));
        }
        for bad in [
            "", "a/#/b", "a#", "a/b#", "#/a", "a+/b", "a/+b", "a/b+/c", "a\0b",
        ] {
            assert!(check_filter(bad).is_err(), "{bad:?} accepted");
        }
        assert!(check_filter(&"a".repeat(70_000)).is_err());
        let m = message(&full("").replace("plant/raw/+", "plant/#/raw"));
        assert!(
            m.starts_with("gw.toml: inputs[0].topic: \"plant/#/raw\": '#' must be a whole level"),
            "{m}"
        );
        let m = message(&full("").replace("plant/raw/+", "plant/raw+"));
        assert!(m.starts_with("gw.toml: inputs[0].topic: "), "{m}");
        let m = message(&full("").replace("topic = \"plant/raw/+\"\n", ""));
        assert!(m.starts_with("gw.toml: inputs[0].topic: missing"), "{m}");
    }

    #[test]
    fn channel_templates() {
        let t = ChannelTemplate::parse("{1}-{2}").unwrap();
        assert_eq!(
            t.parts,
            vec![
                TemplatePart::Level(1),
                TemplatePart::Text("-".into()),
                TemplatePart::Level(2)
            ]
        );
        let t = ChannelTemplate::parse("line.{topic}.x").unwrap();
        assert_eq!(
            t.parts,
            vec![
                TemplatePart::Text("line.".into()),
                TemplatePart::Topic,
                TemplatePart::Text(".x".into())
            ]
        );
        for bad in [
            "",
            "{",
            "{2",
            "}",
            "a}",
            "{}",
            "{x}",
            "{-1}",
            "{1.5}",
            "{99999999999999999999999}",
            "a+b",
            "#",
        ] {
            assert!(ChannelTemplate::parse(bad).is_err(), "{bad:?} accepted");
        }
        let check = |template: &str, filter: &str| {
            ChannelTemplate::parse(template)
                .unwrap()
                .check_against(filter)
        };
        check("{2}", "a/b/+").unwrap();
        check("{1}-{2}", "a/+/+").unwrap();
        check("{topic}", "a/#").unwrap();
        check("{7}", "a/#").unwrap();
        check("TT-101", "a/b/tt101").unwrap();
        check("{1}", "a/b").unwrap();
        let e = check("{3}", "a/b/+").unwrap_err();
        assert!(e.contains("levels 0 to 2"), "{e}");
        let e = check("{0}", "a/+/c").unwrap_err();
        assert!(e.contains("same channel"), "{e}");
        assert!(check("TT-101", "a/+").is_err());
        let m = message(&full("").replace("\"{2}\"", "\"{3}\""));
        assert!(
            m.starts_with("gw.toml: inputs[0].channel: {3} names topic level 3"),
            "{m}"
        );
        let m = message(&full("").replace("\"{2}\"", "\"{tag}\""));
        assert!(
            m.starts_with("gw.toml: inputs[0].channel: \"{tag}\": unknown placeholder {tag}"),
            "{m}"
        );
        // Left out, the channel is the whole topic.
        let d = load(&full("").replace("channel = \"{2}\"\n", "")).unwrap();
        assert_eq!(d.inputs[0].channel.parts, vec![TemplatePart::Topic]);
    }

    #[test]
    fn payload_settings() {
        let json = |extra: &str| {
            full("").replace(
                "payload = \"number\"\n",
                &format!("payload = \"json\"\n{extra}\n"),
            )
        };
        let d = load(&json(
            "value = \"\"\ntime = \"/ts\"\ntime_format = \"epoch_ms\"",
        ))
        .unwrap();
        let PayloadFormat::Json(j) = &d.inputs[0].payload else {
            panic!()
        };
        assert_eq!(
            (j.value.as_str(), j.time.as_deref(), j.time_format),
            ("", Some("/ts"), TimeFormat::EpochMs)
        );
        assert_eq!((j.quality.as_ref(), j.good_quality.as_ref()), (None, None));
        for (name, format) in [
            ("epoch_s", TimeFormat::EpochS),
            ("rfc3339", TimeFormat::Rfc3339),
            ("auto", TimeFormat::Auto),
        ] {
            let d = load(&json(&format!(
                "value = \"/v\"\ntime = \"/t\"\ntime_format = \"{name}\""
            )))
            .unwrap();
            let PayloadFormat::Json(j) = &d.inputs[0].payload else {
                panic!()
            };
            assert_eq!(j.time_format, format);
            assert_eq!(format.name(), name);
        }
        let d = load(&json(
            "value = \"/a~1b/0\"\nquality = \"/q\"\ngood_quality = [\"good\", 192, true]",
        ))
        .unwrap();
        let PayloadFormat::Json(j) = &d.inputs[0].payload else {
            panic!()
        };
        assert_eq!(j.good_quality.as_ref().map(Vec::len), Some(3));
        let cases = [
            (json(""), "inputs[0].value: missing (a JSON pointer"),
            (
                json("value = \"v\""),
                "inputs[0].value: \"v\" is not a JSON pointer",
            ),
            (
                json("value = \"/a~2\""),
                "inputs[0].value: \"/a~2\": in a JSON pointer '~' must be followed",
            ),
            (
                json("value = \"/v\"\ntime = \"t\""),
                "inputs[0].time: \"t\" is not a JSON pointer",
            ),
            (
                json("value = \"/v\"\nquality = \"q~\""),
                "inputs[0].quality: \"q~\" is not a JSON pointer",
            ),
            (
                json("value = \"/v\"\ntime_format = \"epoch_s\""),
                "inputs[0].time_format: is only used with a time pointer",
            ),
            (
                json("value = \"/v\"\ntime = \"/t\"\ntime_format = \"unix\""),
                "inputs[0].time_format: unknown time format \"unix\"",
            ),
            (
                json("value = \"/v\"\ngood_quality = [1]"),
                "inputs[0].good_quality: is only used with a quality pointer",
            ),
            (
                json("value = \"/v\"\nquality = \"/q\"\ngood_quality = []"),
                "inputs[0].good_quality: is empty",
            ),
            (
                json("value = \"/v\"\nquality = \"/q\"\ngood_quality = [1, [2]]"),
                "inputs[0].good_quality[1]: must be a string, a number or a boolean",
            ),
            (
                json("value = \"/v\"\nquality = \"/q\"\ngood_quality = [1979-05-27]"),
                "inputs[0].good_quality[0]: must be a string",
            ),
            (
                full("").replace(
                    "payload = \"number\"\n",
                    "value = \"/v\"\npayload = \"number\"\n",
                ),
                "inputs[0].value: is only used with payload = \"json\"",
            ),
            (
                full("").replace(
                    "payload = \"number\"\n",
                    "payload = \"number\"\ngood_quality = [1]\n",
                ),
                "inputs[0].good_quality: is only used with payload = \"json\"",
            ),
            (
                full("").replace("payload = \"number\"\n", "payload = \"xml\"\n"),
                "inputs[0].payload: unknown payload format \"xml\"",
            ),
            (
                full("").replace("payload = \"number\"\n", ""),
                "inputs[0].payload: missing",
            ),
            (
                full("").replace("payload = \"number\"\n", "payload = \"number\"\nqos = 3\n"),
                "inputs[0].qos: must be 0, 1 or 2 (got 3)",
            ),
            (
                full("").replace(
                    "payload = \"number\"\n",
                    "payload = \"number\"\nmax_payload_bytes = 0\n",
                ),
                "inputs[0].max_payload_bytes: must be an integer from 1",
            ),
            (
                full("").replace(
                    "payload = \"number\"\n",
                    "payload = \"number\"\nmax_payload_bytes = 300000\n",
                ),
                "inputs[0].max_payload_bytes: is 300000 but broker.max_packet_bytes is 262144",
            ),
        ];
        for (text, expected) in cases {
            let m = message(&text);
            assert!(
                m.starts_with(&format!("gw.toml: {expected}")),
                "expected {expected}\ngot {m}"
            );
        }
    }

    #[test]
    fn inputs_must_differ() {
        let m = message(&full(INPUT));
        assert!(
            m.starts_with(
                "gw.toml: inputs[1].topic: \"plant/raw/+\" is already the topic of inputs[0]"
            ),
            "{m}"
        );
        let two = full("[[inputs]]\ntopic = \"plant/legacy/+\"\nchannel = \"legacy-{2}\"\npayload = \"number\"\nqos = 0\n");
        let d = load(&two).unwrap();
        assert_eq!((d.inputs.len(), d.inputs[1].qos), (2, 0));
    }

    #[test]
    fn output_and_status_topics() {
        let cases = [
            ("plant/clean", "output.topic: \"plant/clean\" has no {channel}"),
            ("plant/{chanel}/{channel}", "output.topic: \"plant/{chanel}/{channel}\" has a placeholder other than"),
            ("plant/+/{channel}", "output.topic: \"plant/+/\" contains a wildcard"),
            ("plant/raw/{channel}", "output.topic: \"plant/raw/{channel}\" can be matched by inputs[0].topic \"plant/raw/+\""),
        ];
        for (topic, expected) in cases {
            let m = message(&full("").replace("plant/clean/{channel}", topic));
            assert!(
                m.starts_with(&format!("gw.toml: {expected}")),
                "expected {expected}\ngot {m}"
            );
        }
        let d = load(&full("[output.x]\n").replace("[output.x]\n", "")).unwrap();
        assert_eq!(d.output.topic, "plant/clean/{channel}");
        let d = load(&with("[output]", "qos = 2\nretain = true")).unwrap();
        assert_eq!((d.output.qos, d.output.retain), (2, true));
        let m = message(&with("[output]", "qos = -1"));
        assert!(
            m.starts_with("gw.toml: output.qos: must be 0, 1 or 2"),
            "{m}"
        );

        let d = load(&full("[status]\ntopic = \"plant/gw-01/state\"\n")).unwrap();
        assert_eq!(d.status_topic, "plant/gw-01/state");
        let m = message(&full("[status]\ntopic = \"plant/raw/status\"\n"));
        assert!(m.starts_with("gw.toml: status.topic: the status topic \"plant/raw/status\" is matched by inputs[0]"), "{m}");
        let m = message(&full("[status]\ntopic = \"\"\n"));
        assert!(m.starts_with("gw.toml: status.topic: is empty"), "{m}");
        let m = message(&full("[status]\ntopic = \"plant/#\"\n"));
        assert!(
            m.starts_with("gw.toml: status.topic: \"plant/#\" contains a wildcard"),
            "{m}"
        );
        // The default status topic is checked too, against an input that takes everything.
        let m = message(
            &full("[[inputs]]\ntopic = \"#\"\npayload = \"number\"\n")
                .replace("plant/clean/{channel}", "$out/{channel}"),
        );
        assert!(
            m.starts_with("gw.toml: inputs[1].topic: the status topic \"gaugewise/gw-01/status\""),
            "{m}"
        );
        // The flags topic: set, defaulted, and checked like the output topic.
        let d = load(&with("[output]", "flags_topic = \"plant/flags/{channel}\"")).unwrap();
        assert_eq!(d.flags_topic, "plant/flags/{channel}");
        let m = message(&with("[output]", "flags_topic = \"plant/flags\""));
        assert!(
            m.starts_with("gw.toml: output.flags_topic: \"plant/flags\" has no {channel}"),
            "{m}"
        );
        let m = message(&with("[output]", "flags_topic = \"plant/clean/{channel}\""));
        assert!(
            m.starts_with("gw.toml: output.flags_topic: must differ from output.topic"),
            "{m}"
        );
        let m = message(&with("[output]", "flags_topic = \"plant/raw/{channel}\""));
        assert!(
            m.starts_with("gw.toml: output.flags_topic: the flags topic"),
            "{m}"
        );
    }

    #[test]
    fn feedback_loops_are_found() {
        let may =
            |filter: &str, template: &str, slash: bool| filter_may_receive(filter, template, slash);
        assert!(may("plant/+/+", "plant/clean/{channel}", false));
        assert!(may("plant/#", "plant/clean/{channel}", false));
        assert!(may("#", "plant/clean/{channel}", false));
        assert!(!may("plant/raw/+", "plant/clean/{channel}", false));
        assert!(!may("plant/+", "plant/clean/{channel}", false));
        assert!(may("plant/+", "plant/{channel}", false));
        assert!(!may("plant/+/x", "plant/{channel}", false));
        assert!(
            may("plant/+/x", "plant/{channel}", true),
            "a channel with '/' spans levels"
        );
        assert!(may("plant/clean-TT-1", "plant/clean-{channel}", false));
        assert!(!may("plant/raw-TT-1", "plant/clean-{channel}", false));
        assert!(
            !may("plant/clean-", "plant/clean-{channel}", false),
            "a channel name is not empty"
        );
        assert!(may("plant/TT-1/est", "plant/{channel}/est", false));
        assert!(!may("plant/TT-1/raw", "plant/{channel}/est", false));
        assert!(
            !may("#", "$gw/{channel}", false),
            "wildcards at the start skip $ topics"
        );
        assert!(may("$gw/#", "$gw/{channel}", false));
        assert!(!may("a/b", "a/b/{channel}", false));
        assert!(may("a/b/#", "a/b/{channel}", false));
        // {topic} names carry slashes, so they count as several levels.
        let text = full("")
            .replace("channel = \"{2}\"", "channel = \"{topic}\"")
            .replace("plant/clean/{channel}", "clean/{channel}");
        load(&text).unwrap();
        let m = message(&format!(
            "{text}[[inputs]]\ntopic = \"clean/+/raw/+\"\nchannel = \"{{3}}\"\npayload = \"number\"\n"
        ));
        assert!(m.starts_with("gw.toml: output.topic: "), "{m}");
    }

    #[test]
    fn timing_and_limits() {
        let d = load(&full(
            "[timing]\nstale_after_s = 0\nstale_every_s = 2.5\n[limits]\nmax_channels = 5\n",
        ))
        .unwrap();
        assert_eq!(
            (d.stale_after_s, d.stale_every_s, d.max_channels),
            (None, 2.5, 5)
        );
        let cases = [
            (
                "[timing]\nstale_after_s = -1\n",
                "timing.stale_after_s: must be a number of seconds >= 0",
            ),
            (
                "[timing]\nstale_after_s = inf\n",
                "timing.stale_after_s: must be a number of seconds >= 0",
            ),
            (
                "[timing]\nstale_every_s = 0\n",
                "timing.stale_every_s: must be a number of seconds > 0",
            ),
            (
                "[timing]\nstale_every_s = 1e9\n",
                "timing.stale_every_s: must be a number of seconds > 0 and at most",
            ),
            (
                "[limits]\nmax_channels = 0\n",
                "limits.max_channels: must be an integer from 1 to 10000000 (got 0)",
            ),
            (
                "[limits]\nmax_channels = 1.5\n",
                "limits.max_channels: invalid type: floating point",
            ),
        ];
        for (extra, expected) in cases {
            let m = message(&full(extra));
            assert!(
                m.starts_with(&format!("gw.toml: {expected}")),
                "expected {expected}\ngot {m}"
            );
        }
    }

    #[test]
    fn state_directory_from_the_file_or_systemd() {
        let ctx = Ctx {
            file: "gw.toml",
            base: Some(Path::new("/etc/gaugewise")),
        };
        let raw = |text: &str| -> RawState { toml::from_str(text).unwrap() };
        // Nothing known: not kept, and said why.
        let s = state(&raw(""), &ctx, None).unwrap();
        assert_eq!((s.dir, s.save_every_s), (None, DEFAULT_SAVE_EVERY_S));
        // systemd's StateDirectory= (the first of several).
        let s = state(&raw(""), &ctx, Some("/var/lib/gaugewise:/var/lib/other")).unwrap();
        assert_eq!(s.dir.as_deref(), Some(Path::new("/var/lib/gaugewise")));
        assert_eq!(s.origin, "$STATE_DIRECTORY");
        // The file wins, relative to the config's directory.
        let s = state(
            &raw("dir = \"state\"\nsave_every_s = 5"),
            &ctx,
            Some("/var/lib/gaugewise"),
        )
        .unwrap();
        assert_eq!(s.dir.as_deref(), Some(Path::new("/etc/gaugewise/state")));
        assert_eq!(s.save_every_s, 5.0);
        // keep = false overrides systemd.
        let s = state(&raw("keep = false"), &ctx, Some("/var/lib/gaugewise")).unwrap();
        assert_eq!(s.dir, None);
        let err =
            |text: &str, sd: Option<&str>| state(&raw(text), &ctx, sd).unwrap_err().to_string();
        assert!(err("keep = true", None).contains("state.dir"));
        assert!(err("keep = false\ndir = \"x\"", None).contains("state.dir"));
        assert!(
            err("save_every_s = 0.5", None).contains("state.save_every_s: must be at least 1 s")
        );
        assert!(err("save_every_s = 0", None).contains("state.save_every_s"));
        assert!(err("dir = \"\"", None).contains("state.dir: is empty"));
        // In the whole file, the key errors name the file.
        let m = message(&full("[state]\nsave_every = 60\n"));
        assert!(
            m.contains("gw.toml") && m.contains("state.save_every"),
            "{m}"
        );
        let d = load(&full("[state]\ndir = \"/srv/gw-state\"\n")).unwrap();
        assert!(
            d.describe()
                .contains("state: kept in /srv/gw-state (from state.dir)"),
            "{}",
            d.describe()
        );
    }

    #[test]
    fn metrics_are_off_unless_the_table_is_given() {
        let d = load(&full("")).unwrap();
        assert_eq!(d.metrics, None);
        assert!(d.describe().contains("metrics: off"), "{}", d.describe());

        let d = load(&full("[metrics]\n")).unwrap();
        let m = d.metrics.unwrap();
        assert_eq!(m.listen.to_string(), DEFAULT_METRICS_LISTEN);
        assert!(m.listen.ip().is_loopback());
        assert!(d
            .describe()
            .contains("metrics: http://127.0.0.1:9464/metrics and /health (this host only)"));

        let d = load(&with("[metrics]", "listen = \"[::1]:9100\"")).unwrap();
        assert_eq!(d.metrics.unwrap().listen.to_string(), "[::1]:9100");
        let d = load(&with("[metrics]", "listen = \"0.0.0.0:9464\"")).unwrap();
        assert!(d.describe().contains("reachable from other hosts"));
    }

    #[test]
    fn metrics_errors_name_the_key() {
        for (value, needle) in [
            ("\"localhost:9464\"", "host names are not resolved"),
            ("\"127.0.0.1\"", "an IP address and port"),
            ("\"127.0.0.1:0\"", "needs a fixed port"),
            ("9464", "invalid type"),
        ] {
            let m = message(&with("[metrics]", &format!("listen = {value}")));
            assert!(m.contains("metrics.listen"), "{m}");
            assert!(m.contains(needle), "{value}: {m}");
        }
        let m = message(&with("[metrics]", "port = 9464"));
        assert!(
            m.contains("metrics.port") && m.contains("unknown field"),
            "{m}"
        );
    }

    #[test]
    fn metrics_from_the_environment() {
        let c = Config::from_str_with_env(
            &full(""),
            FILE,
            [("GAUGEWISE_METRICS__LISTEN", "127.0.0.1:9500")],
        )
        .unwrap();
        assert_eq!(c.metrics.unwrap().listen.port(), 9500);
        let e =
            Config::from_str_with_env(&full(""), FILE, [("GAUGEWISE_METRICS__LISTEN", "nowhere")])
                .unwrap_err()
                .to_string();
        assert!(
            e.contains("metrics.listen") && e.contains("(environment GAUGEWISE_METRICS__LISTEN)"),
            "{e}"
        );
    }

    #[test]
    fn instance_defaults_to_every_channel() {
        let d = load(&full("")).unwrap();
        assert_eq!(d.instance, InstanceConfig { index: 0, count: 1 });
        assert!(
            d.describe().contains("instance: 0 of 1 (every channel)"),
            "{}",
            d.describe()
        );
        let d = load(&full(
            "[instance]
index = 1
count = 2
",
        ))
        .unwrap();
        assert_eq!(d.instance, InstanceConfig { index: 1, count: 2 });
        assert!(
            d.describe()
                .contains("instance: 1 of 2 (channels whose stable hash mod 2 == 1)"),
            "{}",
            d.describe()
        );
        // count alone: this is instance 0 of them.
        let d = load(&full(
            "[instance]
count = 3
",
        ))
        .unwrap();
        assert_eq!(d.instance, InstanceConfig { index: 0, count: 3 });
    }

    #[test]
    fn instance_errors_name_the_key() {
        let cases = [
            (
                "count = 0",
                "instance.count: must be an integer from 1 to 1024 (got 0)",
            ),
            (
                "count = -2",
                "instance.count: must be an integer from 1 to 1024 (got -2)",
            ),
            (
                "count = 2.0",
                "instance.count: invalid type: floating point",
            ),
            (
                "index = 2\ncount = 2",
                "instance.index: must be an integer from 0 to 1 (instance.count is 2; instances are numbered from \
                 0) (got 2)",
            ),
            (
                "index = -1\ncount = 2",
                "instance.index: must be an integer from 0 to 1",
            ),
            (
                "index = 1",
                "instance.index: must be 0 when instance.count is 1 (the default) (got 1)",
            ),
            ("index = \"1\"", "instance.index: invalid type: string"),
        ];
        for (body, expected) in cases {
            let m = message(&with("[instance]", body));
            assert!(
                m.starts_with(&format!("gw.toml: {expected}")),
                "expected {expected}\ngot {m}"
            );
        }
    }

    #[test]
    fn instance_from_the_environment() {
        let c = Config::from_str_with_env(
            &full(""),
            FILE,
            [
                ("GAUGEWISE_INSTANCE__INDEX", "2"),
                ("GAUGEWISE_INSTANCE__COUNT", "3"),
            ],
        )
        .unwrap();
        assert_eq!(c.instance, InstanceConfig { index: 2, count: 3 });
        let e = Config::from_str_with_env(
            &full("[instance]\ncount = 2\n"),
            FILE,
            [("GAUGEWISE_INSTANCE__INDEX", "2")],
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("instance.index") && e.contains("(environment GAUGEWISE_INSTANCE__INDEX)"),
            "{e}"
        );
    }
}
