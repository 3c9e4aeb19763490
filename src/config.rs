//! Configuration, read from our own TOML format: channel models for every command, and the daemon's MQTT sections.
//!
//! The file says which model (`model`) each channel runs: a `[channels.default]` table for every channel, and
//! `[[channels.override]]` tables whose `match` glob (globset syntax, case-sensitive, on the channel name) picks
//! channels out. The first override that matches wins, in file order, so put specific patterns (`TT-101`) before
//! general ones (`TT-*`). `gaugewise fit` writes blocks in this format ([`model_to_toml`]). The daemon's sections
//! (`[broker]`, `[[inputs]]`, `[output]`, `[status]`, `[timing]`, `[limits]`) live in `daemon`; `replay` and `fit`
//! ignore them, `check` and `run` need them through [`Config::daemon`]. `config/plant.toml` documents the channel
//! keys and `config/brackenfield.toml` every key.
//!
//! Reading has three stages. Environment variables `GAUGEWISE_<SECTION>__<KEY>` (module `env`) are written into
//! the parsed TOML first, so an override is checked exactly like the key in the file. Serde then fills raw structs
//! that deny unknown keys, because a typo (`obs_vr`) that passed silently would run a channel on a default the
//! engineer believes they overrode. Validation then turns each table into typed values such as [`ModelSpec`]: keys
//! the chosen model does not use are errors too, for the same reason. Every error names the file and the key path,
//! with array tables counted from 0 as in `channels.override[0].tau`, and says `(environment VAR)` when the value
//! came from a variable.
//!
//! We do the environment layer ourselves rather than through the `config` crate: that crate merges sources into
//! its own value tree, which loses TOML's spans (so the line and column of an error) and lowercases keys; it names
//! "the environment" rather than the variable in errors; and an index level (`INPUTS__0`) becomes a table key that
//! conflicts with the file's array.

mod daemon;
mod env;
mod flags;
mod learn;

pub use daemon::{
    check_filter, check_pointer, default_status_topic, BrokerConfig, ChannelTemplate, DaemonConfig,
    InputConfig, JsonPayload, LimitsConfig, OutputConfig, PayloadFormat, Secret, TemplatePart,
    TimeFormat, TimingConfig, TlsConfig, MAX_PACKET_LIMIT,
};
pub use daemon::{InstanceConfig, MAX_INSTANCES};
pub use daemon::{MetricsConfig, DEFAULT_METRICS_LISTEN};
pub use env::{EnvOverride, ENV_NOT_CONFIG, ENV_PREFIX, ENV_SEPARATOR};
pub use flags::FlagRules;
pub use learn::LearnRules;

use crate::model::{ModelError, ModelKind, ModelParams, ModelSpec};
use globset::{Glob, GlobMatcher};
use serde::Deserialize;
use std::ffi::OsString;
use std::path::Path;
use thiserror::Error;

/// Why a configuration could not be used. Every message names the file and, where there is one, the key path.
#[derive(Debug, Error)]
pub enum ConfigError {
    #[error("{path}: cannot read config: {source}")]
    Io {
        path: String,
        #[source]
        source: std::io::Error,
    },
    /// The text is not TOML at all.
    #[error("{file}: line {line}, column {column}: {message}")]
    Syntax {
        file: String,
        line: usize,
        column: usize,
        message: String,
    },
    /// TOML, but not our schema: an unknown key or a value of the wrong type.
    #[error("{file}: {key}: {message} (line {line}, column {column})")]
    Schema {
        file: String,
        key: String,
        line: usize,
        column: usize,
        message: String,
    },
    #[error("{file}: {key}: missing ({hint})")]
    Missing {
        file: String,
        key: String,
        hint: String,
    },
    #[error("{file}: {key}: not a parameter of model {model} (it takes {expected})")]
    NotUsed {
        file: String,
        key: String,
        model: String,
        expected: String,
    },
    /// Present and of the right type, but not a usable value.
    #[error("{file}: {key}: {message}")]
    Invalid {
        file: String,
        key: String,
        message: String,
    },
    /// The value, or the key itself, came from environment variable `var`, not from the file.
    #[error("{file}: {key}: {message} (environment {var})")]
    Env {
        file: String,
        key: String,
        var: String,
        message: String,
    },
}

impl ConfigError {
    /// The key path the error is about, if any (e.g. `channels.override[1].tau`).
    pub fn key(&self) -> Option<&str> {
        match self {
            ConfigError::Io { .. } | ConfigError::Syntax { .. } => None,
            ConfigError::Schema { key, .. }
            | ConfigError::Missing { key, .. }
            | ConfigError::NotUsed { key, .. }
            | ConfigError::Invalid { key, .. }
            | ConfigError::Env { key, .. } => Some(key),
        }
    }
}

/// A whole configuration file, with environment overrides applied.
///
/// Every section present is validated; the daemon's sections are optional here (`replay` and `fit` need only
/// `channels`). [`Config::daemon`] requires them and does the checks that read files.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    pub channels: ChannelConfig,
    pub broker: Option<BrokerConfig>,
    /// Empty when the file has no `[[inputs]]`.
    pub inputs: Vec<InputConfig>,
    pub output: Option<OutputConfig>,
    /// `status.topic` if given; [`Config::daemon`] fills in the default from the client id.
    pub status_topic: Option<String>,
    pub timing: TimingConfig,
    pub limits: LimitsConfig,
    /// `[metrics]`; None when the table is absent (the endpoint is off).
    pub metrics: Option<MetricsConfig>,
    /// `[instance]`: which share of the channels this daemon handles (default: all).
    pub instance: InstanceConfig,
    /// `[state]`: where channel state is kept between runs.
    pub state: daemon::StateConfig,
    /// The name errors use for the file (the path as given).
    pub source: String,
    /// The environment variables that were applied, in the order they were applied.
    pub env: Vec<EnvOverride>,
    /// Directory that relative paths in the file (and in overrides) are resolved against; `None`: the working
    /// directory.
    base: Option<std::path::PathBuf>,
}

/// Which model each channel runs.
#[derive(Debug, Clone)]
pub struct ChannelConfig {
    /// Used by every channel no override matches.
    pub default: ModelSpec,
    /// The default table gave no parameters: channels learn a model of this kind from their data.
    pub default_learn: Option<ModelKind>,
    /// Tried in order; the first whose pattern matches the channel name wins.
    pub overrides: Vec<Override>,
    /// Compiled `overrides[i].pattern`, kept beside the public fields so lookups do not recompile globs.
    matchers: Vec<GlobMatcher>,
    /// Each channel's fault-flag design (`[flags]`).
    pub flags: FlagRules,
    /// Which channels re-estimate their parameters, and how (`[reestimate]`).
    pub learn: LearnRules,
}

/// A model for the channels whose name matches `pattern` (a globset glob).
#[derive(Debug, Clone, PartialEq)]
pub struct Override {
    pub pattern: String,
    pub model: ModelSpec,
    /// The table gave no parameters: the channels learn them (`model` is then the provisional stand-in).
    pub learn: Option<ModelKind>,
}

impl PartialEq for ChannelConfig {
    fn eq(&self, other: &Self) -> bool {
        // The matchers are derived from the patterns, so they need no comparison.
        self.default == other.default
            && self.default_learn == other.default_learn
            && self.overrides == other.overrides
            && self.flags == other.flags
            && self.learn == other.learn
    }
}

impl ChannelConfig {
    /// Builds a configuration in code; fails on the first pattern that is not a valid glob.
    pub fn new(default: ModelSpec, overrides: Vec<Override>) -> Result<Self, globset::Error> {
        let matchers = overrides
            .iter()
            .map(|o| Glob::new(&o.pattern).map(|g| g.compile_matcher()))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Self {
            default,
            default_learn: None,
            overrides,
            matchers,
            flags: FlagRules::default(),
            learn: LearnRules::default(),
        })
    }

    /// The re-estimation settings for `channel`; None when it does not re-estimate.
    pub fn learn_for(&self, channel: &str) -> Option<&crate::reestimate::LearnSettings> {
        self.learn.settings_for(channel)
    }

    /// The fault-flag design for `channel`.
    pub fn flags_for(&self, channel: &str) -> &crate::detect::FlagDesign {
        self.flags.design_for(channel)
    }

    /// The model of the first override whose pattern matches `channel`, else the default.
    pub fn model_for(&self, channel: &str) -> &ModelSpec {
        match self.override_for(channel) {
            Some(o) => &o.model,
            None => &self.default,
        }
    }

    /// The kind of model `channel` must learn from its data (its table gave no parameters); None when its
    /// parameters are configured.
    pub fn learning_for(&self, channel: &str) -> Option<ModelKind> {
        match self.override_for(channel) {
            Some(o) => o.learn,
            None => self.default_learn,
        }
    }

    fn override_for(&self, channel: &str) -> Option<&Override> {
        for (i, o) in self.overrides.iter().enumerate() {
            // The fields are public, so the cached matcher may be stale if a caller edited a pattern; recompile
            // then (an invalid edited pattern matches nothing) rather than match against the wrong glob.
            let hit = match self.matchers.get(i) {
                Some(m) if m.glob().glob() == o.pattern => m.is_match(channel),
                _ => Glob::new(&o.pattern).is_ok_and(|g| g.compile_matcher().is_match(channel)),
            };
            if hit {
                return Some(o);
            }
        }
        None
    }
}

impl Config {
    /// Reads and validates a configuration file, applying `GAUGEWISE_*` variables from the process environment.
    /// Errors name the path as given; relative paths in the file are resolved against the file's directory.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        Config::load_with_env(path, std::env::vars_os())
    }

    /// [`Config::load`] with the environment given explicitly (tests, or to ignore the process environment).
    pub fn load_with_env<I, K, V>(path: &Path, env: I) -> Result<Config, ConfigError>
    where
        I: IntoIterator<Item = (K, V)>,
        K: Into<OsString>,
        V: Into<OsString>,
    {
        let source = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError::Io {
            path: source.clone(),
            source: e,
        })?;
        let base = path.parent().map(Path::to_path_buf);
        Config::parse(&text, &source, env, base)
    }

    /// Parses and validates configuration text; `source` names it in errors (usually the file path). No
    /// environment overrides; relative paths stay relative to the working directory.
    #[allow(clippy::should_implement_trait)] // FromStr cannot carry the source name errors need.
    pub fn from_str(text: &str, source: &str) -> Result<Config, ConfigError> {
        Config::parse(
            text,
            source,
            std::iter::empty::<(OsString, OsString)>(),
            None,
        )
    }

    /// [`Config::from_str`] with environment overrides taken from `env` (name, value pairs; only names starting
    /// with [`ENV_PREFIX`] are looked at).
    pub fn from_str_with_env<I, K, V>(
        text: &str,
        source: &str,
        env: I,
    ) -> Result<Config, ConfigError>
    where
        I: IntoIterator<Item = (K, V)>,
        K: Into<OsString>,
        V: Into<OsString>,
    {
        Config::parse(text, source, env, None)
    }

    /// Everything the daemon needs, validated together: `[broker]`, at least one `[[inputs]]` and `[output]` must
    /// be present. Reads `broker.password_file` and checks that the TLS files can be opened.
    pub fn daemon(&self) -> Result<DaemonConfig, ConfigError> {
        let ctx = daemon::Ctx {
            file: &self.source,
            base: self.base.as_deref(),
        };
        daemon::assemble(self, &ctx).map_err(|e| attribute(e, &self.env, None))
    }

    fn parse<I, K, V>(
        text: &str,
        source: &str,
        env: I,
        base: Option<std::path::PathBuf>,
    ) -> Result<Config, ConfigError>
    where
        I: IntoIterator<Item = (K, V)>,
        K: Into<OsString>,
        V: Into<OsString>,
    {
        let overrides = env::collect(env).map_err(|p| env_problem(p, source))?;
        let (raw, file_doc) = if overrides.is_empty() {
            let raw =
                toml::from_str::<RawConfig>(text).map_err(|e| serde_error(text, source, &e))?;
            (raw, None)
        } else {
            let file_doc: toml::Table =
                toml::from_str(text).map_err(|e| serde_error(text, source, &e))?;
            (
                with_overrides(text, &file_doc, source, &overrides)?,
                Some(file_doc),
            )
        };
        let ctx = daemon::Ctx {
            file: source,
            base: base.as_deref(),
        };
        let built =
            Config::validate(raw, &ctx).map_err(|e| attribute(e, &overrides, file_doc.as_ref()))?;
        Ok(Config {
            env: overrides,
            base,
            ..built
        })
    }

    fn validate(raw: RawConfig, ctx: &daemon::Ctx) -> Result<Config, ConfigError> {
        let source = ctx.file;
        let channels = raw.channels.unwrap_or_default();
        let default = channels.default.ok_or_else(|| ConfigError::Missing {
            file: source.to_string(),
            key: "channels.default".to_string(),
            hint: "every config needs a [channels.default] table, the model of channels no override matches"
                .to_string(),
        })?;
        if default.pattern.is_some() {
            return Err(ConfigError::Invalid {
                file: source.to_string(),
                key: "channels.default.match".to_string(),
                message: "the default applies to every channel; use a [[channels.override]] table to match names"
                    .to_string(),
            });
        }
        let (default, default_learn) = build_spec(&default, "channels.default", source)?;
        let mut overrides = Vec::with_capacity(channels.overrides.len());
        let mut matchers = Vec::with_capacity(channels.overrides.len());
        for (i, raw) in channels.overrides.iter().enumerate() {
            let path = format!("channels.override[{i}]");
            let pattern = raw.pattern.clone().ok_or_else(|| ConfigError::Missing {
                file: source.to_string(),
                key: format!("{path}.match"),
                hint: "a glob on the channel name, e.g. match = \"TT-*\"".to_string(),
            })?;
            let glob = Glob::new(&pattern).map_err(|e| ConfigError::Invalid {
                file: source.to_string(),
                key: format!("{path}.match"),
                message: format!("invalid glob: {}", e.kind()),
            })?;
            let (model, learn) = build_spec(raw, &path, source)?;
            matchers.push(glob.compile_matcher());
            overrides.push(Override {
                pattern,
                model,
                learn,
            });
        }
        let intervals: Vec<f64> = std::iter::once(default.interval)
            .chain(overrides.iter().map(|o: &Override| o.model.interval))
            .collect();
        let flags = flags::rules(raw.flags.as_ref(), &intervals, ctx)?;
        let learn = learn::rules(raw.reestimate.as_ref(), ctx)?;
        let inputs = raw
            .inputs
            .iter()
            .enumerate()
            .map(|(i, r)| daemon::input(r, i, ctx))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Config {
            channels: ChannelConfig {
                default,
                default_learn,
                overrides,
                matchers,
                flags,
                learn,
            },
            broker: raw
                .broker
                .as_ref()
                .map(|b| daemon::broker(b, ctx))
                .transpose()?,
            inputs,
            output: raw
                .output
                .as_ref()
                .map(|o| daemon::output(o, ctx))
                .transpose()?,
            status_topic: match &raw.status {
                Some(s) => daemon::status(s, ctx)?,
                None => None,
            },
            timing: daemon::timing(&raw.timing.unwrap_or_default(), ctx)?,
            limits: daemon::limits(&raw.limits.unwrap_or_default(), ctx)?,
            metrics: raw
                .metrics
                .as_ref()
                .map(|m| daemon::metrics(m, ctx))
                .transpose()?,
            instance: daemon::instance(&raw.instance.unwrap_or_default(), ctx)?,
            state: daemon::state(
                &raw.state.unwrap_or_default(),
                ctx,
                std::env::var("STATE_DIRECTORY").ok().as_deref(),
            )?,
            source: source.to_string(),
            env: Vec::new(),
            base: None,
        })
    }
}

/// Applies the overrides to the parsed file and deserialises the result. Serde errors are attributed to the
/// variable they are about, or else to the key in the file with its line and column there.
fn with_overrides(
    text: &str,
    file_doc: &toml::Table,
    source: &str,
    overrides: &[EnvOverride],
) -> Result<RawConfig, ConfigError> {
    let mut applied: Vec<EnvOverride> = overrides.to_vec();
    // The first error met at a variable's key, kept if reading the value as plain text fails the same way.
    let mut first: Vec<Option<String>> = vec![None; applied.len()];
    loop {
        let mut doc = file_doc.clone();
        for o in &applied {
            env::apply(&mut doc, o).map_err(|p| env_problem(p, source))?;
        }
        let merged = toml::to_string(&doc).map_err(|e| ConfigError::Invalid {
            file: source.to_string(),
            key: "(environment)".to_string(),
            message: format!("the overridden configuration cannot be written back as TOML: {e}"),
        })?;
        let e = match toml::from_str::<RawConfig>(&merged) {
            Ok(raw) => return Ok(raw),
            Err(e) => e,
        };
        let key = error_key(&merged, &e).unwrap_or_default();
        let message = e.message().trim().to_string();
        match owner(&key, &applied, Some(file_doc)) {
            Some(i) => {
                // A variable's text that reads as a number or date may be meant as a string (client_id = 0042).
                if applied[i].typed() && first[i].is_none() {
                    first[i] = Some(message);
                    applied[i] = applied[i].as_text();
                    continue;
                }
                return Err(ConfigError::Env {
                    file: source.to_string(),
                    key,
                    var: applied[i].var.clone(),
                    message: first[i].take().unwrap_or(message),
                });
            }
            None => {
                // The file's own mistake: report it where it is in the file, not in the merged text.
                let (line, column) = key_position(text, &key).unwrap_or((1, 1));
                return Err(ConfigError::Schema {
                    file: source.to_string(),
                    message: hint(&message, &key),
                    key: if key.is_empty() {
                        "(top level)".to_string()
                    } else {
                        key
                    },
                    line,
                    column,
                });
            }
        }
    }
}

/// Which override an error at `key` is about: the one that set `key` or a key inside it, or one that set a key
/// under `key` when the file does not have `key` at all (an unknown section named only by a variable). `file` is
/// the file's own document, for that last test; validation errors pass `None` and so only match the first rule.
fn owner(key: &str, overrides: &[EnvOverride], file: Option<&toml::Table>) -> Option<usize> {
    if let Some(i) = overrides.iter().position(|o| is_under(key, &o.key)) {
        return Some(i);
    }
    let file = file?;
    if key.is_empty() || has_key(file, key) {
        return None;
    }
    overrides.iter().position(|o| is_under(&o.key, key))
}

/// Restates an error whose key came from an environment variable as that variable's error. With the file's own
/// document, a key missing from a table that only variables created (`GAUGEWISE_INPUTS__2__QOS` adding an input
/// without a topic) is put on the variable too.
fn attribute(e: ConfigError, overrides: &[EnvOverride], file: Option<&toml::Table>) -> ConfigError {
    let Some(key) = e.key() else { return e };
    let owner = match (&e, file) {
        (ConfigError::Missing { .. }, Some(doc)) => {
            let parent = &key[..key.rfind(['.', '[']).unwrap_or(0)];
            if parent.is_empty() || has_key(doc, parent) {
                None
            } else {
                overrides.iter().position(|o| is_under(&o.key, parent))
            }
        }
        _ => owner(key, overrides, None),
    };
    let Some(i) = owner else { return e };
    let (file, key, message) = match e {
        ConfigError::Schema {
            file, key, message, ..
        }
        | ConfigError::Invalid { file, key, message } => (file, key, message),
        ConfigError::NotUsed {
            file,
            key,
            model,
            expected,
        } => (
            file,
            key,
            format!("not a parameter of model {model} (it takes {expected})"),
        ),
        ConfigError::Missing { file, key, hint } => (file, key, format!("missing ({hint})")),
        other => return other,
    };
    ConfigError::Env {
        file,
        key,
        var: overrides[i].var.clone(),
        message,
    }
}

/// `inner` is `outer` or a key inside it (`broker.tls.ca` in `broker`, `inputs[0].qos` in `inputs`).
fn is_under(inner: &str, outer: &str) -> bool {
    inner == outer
        || (inner.starts_with(outer)
            && matches!(inner.as_bytes().get(outer.len()), Some(b'.' | b'[')))
}

fn env_problem(p: env::EnvProblem, source: &str) -> ConfigError {
    ConfigError::Env {
        file: source.to_string(),
        key: p.key,
        var: p.var,
        message: p.message,
    }
}

/// Whether the document has a value at `key` (a path as errors print it).
fn has_key(doc: &toml::Table, key: &str) -> bool {
    let mut node: Option<&toml::Value> = None;
    for (i, seg) in split_key(key).into_iter().enumerate() {
        node = match (i, node, seg) {
            (0, _, KeySeg::Key(k)) => doc.get(&k),
            (_, Some(toml::Value::Table(t)), KeySeg::Key(k)) => t.get(&k),
            (_, Some(toml::Value::Array(a)), KeySeg::Index(n)) => a.get(n),
            _ => None,
        };
        if node.is_none() {
            return false;
        }
    }
    node.is_some()
}

enum KeySeg {
    Key(String),
    Index(usize),
}

/// Splits `a.b[2].c` into its levels. Quoted keys (only channel-override patterns would need them, and those are
/// values, not keys) are not expected in our schema's paths.
fn split_key(key: &str) -> Vec<KeySeg> {
    let mut out = Vec::new();
    for part in key.split('.') {
        let mut rest = part;
        if let Some(open) = rest.find('[') {
            out.push(KeySeg::Key(rest[..open].to_string()));
            rest = &rest[open..];
            while let Some(stripped) = rest.strip_prefix('[') {
                let close = stripped.find(']').unwrap_or(stripped.len());
                out.push(match stripped[..close].parse() {
                    Ok(n) => KeySeg::Index(n),
                    Err(_) => KeySeg::Key(stripped[..close].to_string()),
                });
                rest = stripped.get(close + 1..).unwrap_or("");
            }
        } else {
            out.push(KeySeg::Key(rest.to_string()));
        }
    }
    out
}

/// Line and column of `key` in the file's text, or of its nearest enclosing key that is there.
fn key_position(text: &str, key: &str) -> Option<(usize, usize)> {
    let doc = toml::de::DeTable::parse(text).ok()?;
    let mut key = key.to_string();
    loop {
        let mut found = None;
        find_span(doc.get_ref(), &key, String::new(), &mut found);
        if let Some(start) = found {
            return Some(line_column(text, start));
        }
        let cut = key.rfind(['.', '['])?;
        key.truncate(cut);
    }
}

fn find_span(
    table: &toml::de::DeTable<'_>,
    target: &str,
    prefix: String,
    found: &mut Option<usize>,
) {
    for (k, v) in table.iter() {
        if found.is_some() {
            return;
        }
        let name = if prefix.is_empty() {
            key_text(k.get_ref())
        } else {
            format!("{prefix}.{}", key_text(k.get_ref()))
        };
        if name == target {
            *found = Some(k.span().start);
            return;
        }
        find_span_value(v, target, name, found);
    }
}

fn find_span_value(
    value: &toml::Spanned<toml::de::DeValue<'_>>,
    target: &str,
    name: String,
    found: &mut Option<usize>,
) {
    match value.get_ref() {
        toml::de::DeValue::Table(t) => find_span(t, target, name, found),
        toml::de::DeValue::Array(items) => {
            for (i, item) in items.iter().enumerate() {
                let name = format!("{name}[{i}]");
                if name == target {
                    *found = Some(item.span().start);
                    return;
                }
                find_span_value(item, target, name, found);
            }
        }
        _ => {}
    }
}

/// One line describing a model, for `gaugewise check`: `lag, interval 10.0, mean 72.5, ...`.
pub fn model_line(spec: &ModelSpec) -> String {
    let mut out = spec.kind().to_string();
    for line in model_to_toml(spec, "[x]", None).lines().skip(2) {
        if let Some((k, v)) = line.split_once(" = ") {
            out.push_str(&format!(", {k} {v}"));
        }
    }
    out
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a table with a [channels] section")]
struct RawConfig {
    channels: Option<RawChannels>,
    broker: Option<daemon::RawBroker>,
    #[serde(default)]
    inputs: Vec<daemon::RawInput>,
    output: Option<daemon::RawOutput>,
    status: Option<daemon::RawStatus>,
    timing: Option<daemon::RawTiming>,
    limits: Option<daemon::RawLimits>,
    metrics: Option<daemon::RawMetrics>,
    instance: Option<daemon::RawInstance>,
    state: Option<daemon::RawState>,
    flags: Option<flags::RawFlags>,
    reestimate: Option<learn::RawLearn>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a table with default and override")]
struct RawChannels {
    default: Option<RawModel>,
    #[serde(rename = "override", default)]
    overrides: Vec<RawModel>,
}

/// One model table. Default and override tables share it: a `match` in the default is refused in validation,
/// with a better message than serde's unknown-key one.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a table of model settings")]
struct RawModel {
    #[serde(rename = "match")]
    pattern: Option<String>,
    model: Option<String>,
    interval: Option<f64>,
    mean: Option<f64>,
    tau: Option<f64>,
    state_var: Option<f64>,
    obs_var: Option<f64>,
    level_var: Option<f64>,
    slope_var: Option<f64>,
    ar: Option<Vec<f64>>,
    ma: Option<Vec<f64>>,
    var: Option<f64>,
}

impl RawModel {
    /// The model parameter keys present, in the order the format lists them.
    fn given(&self) -> Vec<&'static str> {
        let keys: [(&'static str, bool); 10] = [
            ("interval", self.interval.is_some()),
            ("mean", self.mean.is_some()),
            ("tau", self.tau.is_some()),
            ("state_var", self.state_var.is_some()),
            ("obs_var", self.obs_var.is_some()),
            ("level_var", self.level_var.is_some()),
            ("slope_var", self.slope_var.is_some()),
            ("ar", self.ar.is_some()),
            ("ma", self.ma.is_some()),
            ("var", self.var.is_some()),
        ];
        keys.iter()
            .filter(|(_, present)| *present)
            .map(|(k, _)| *k)
            .collect()
    }
}

/// The parameter keys of a model kind, in the order the format lists them.
fn keys_of(kind: ModelKind) -> &'static [&'static str] {
    match kind {
        ModelKind::Level => &["interval", "obs_var", "level_var"],
        ModelKind::Lag => &["interval", "mean", "tau", "state_var", "obs_var"],
        ModelKind::Trend => &["interval", "obs_var", "level_var", "slope_var"],
        ModelKind::Arma { .. } => &["interval", "mean", "ar", "ma", "var"],
    }
}

/// The model a table describes. A table that gives a model kind and its interval but no parameter at all asks the
/// channels to learn them: the result is then a provisional stand-in (see `channel`) and the kind to learn.
fn build_spec(
    raw: &RawModel,
    path: &str,
    file: &str,
) -> Result<(ModelSpec, Option<ModelKind>), ConfigError> {
    let key = |k: &str| format!("{path}.{k}");
    let text = raw.model.as_deref().ok_or_else(|| ConfigError::Missing {
        file: file.to_string(),
        key: key("model"),
        hint: "one of level, lag, trend, arma(p,q)".to_string(),
    })?;
    let kind = ModelKind::parse(text).map_err(|e| ConfigError::Invalid {
        file: file.to_string(),
        key: key("model"),
        message: e.to_string(),
    })?;
    let allowed = keys_of(kind);
    if let Some(k) = raw.given().into_iter().find(|k| !allowed.contains(k)) {
        return Err(ConfigError::NotUsed {
            file: file.to_string(),
            key: key(k),
            model: kind.to_string(),
            expected: allowed.join(", "),
        });
    }
    let need = |name: &str, value: Option<f64>| {
        value.ok_or_else(|| ConfigError::Missing {
            file: file.to_string(),
            key: key(name),
            hint: format!("model {kind} needs {}", allowed.join(", ")),
        })
    };
    let interval = need("interval", raw.interval)?;
    if raw.given() == ["interval"] {
        return Ok((crate::channel::provisional_model(interval), Some(kind)));
    }
    let params = match kind {
        ModelKind::Level => ModelParams::Level {
            obs_var: need("obs_var", raw.obs_var)?,
            level_var: need("level_var", raw.level_var)?,
        },
        ModelKind::Lag => ModelParams::Lag {
            mean: need("mean", raw.mean)?,
            tau: need("tau", raw.tau)?,
            state_var: need("state_var", raw.state_var)?,
            obs_var: need("obs_var", raw.obs_var)?,
        },
        ModelKind::Trend => ModelParams::Trend {
            obs_var: need("obs_var", raw.obs_var)?,
            level_var: need("level_var", raw.level_var)?,
            slope_var: need("slope_var", raw.slope_var)?,
        },
        ModelKind::Arma { p, q } => {
            let mean = need("mean", raw.mean)?;
            let ar = coefficients("ar", raw.ar.as_deref(), p, kind, path, file)?;
            let ma = coefficients("ma", raw.ma.as_deref(), q, kind, path, file)?;
            let var = need("var", raw.var)?;
            ModelParams::Arma { mean, ar, ma, var }
        }
    };
    let spec = ModelSpec { interval, params };
    spec.validate().map_err(|e| model_error(e, path, file))?;
    Ok((spec, None))
}

/// An ARMA coefficient list: required when its order is > 0 (may be omitted when 0), of exactly that length.
fn coefficients(
    name: &str,
    given: Option<&[f64]>,
    order: usize,
    kind: ModelKind,
    path: &str,
    file: &str,
) -> Result<Vec<f64>, ConfigError> {
    let values = match given {
        Some(v) => v.to_vec(),
        None if order == 0 => Vec::new(),
        None => {
            return Err(ConfigError::Missing {
                file: file.to_string(),
                key: format!("{path}.{name}"),
                hint: format!(
                    "model {kind} needs {order} {name} coefficient(s), e.g. {name} = [0.5]"
                ),
            })
        }
    };
    if values.len() != order {
        return Err(ConfigError::Invalid {
            file: file.to_string(),
            key: format!("{path}.{name}"),
            message: format!(
                "has {} coefficient(s) but model {kind} needs {order}",
                values.len()
            ),
        });
    }
    // TOML allows nan and inf; catching them here names the element, which ModelSpec::validate cannot.
    if let Some((i, v)) = values.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(ConfigError::Invalid {
            file: file.to_string(),
            key: format!("{path}.{name}[{i}]"),
            message: format!("must be finite (got {v})"),
        });
    }
    Ok(values)
}

/// Restates a model error against the key it is about; ModelError names parameters, we name key paths.
fn model_error(e: ModelError, path: &str, file: &str) -> ConfigError {
    let (key, message) = match e {
        ModelError::NotPositive { name, value } => {
            (name, format!("must be a finite number > 0 (got {value})"))
        }
        ModelError::Negative { name, value } => {
            (name, format!("must be a finite number >= 0 (got {value})"))
        }
        ModelError::NotFinite { name, value } => {
            // Coefficients were checked one by one already; this is a fallback naming the lists.
            let key = if name == "arma coefficient" {
                "ar"
            } else {
                name
            };
            (key, format!("must be finite (got {value})"))
        }
        ModelError::NotStationary(ar) => (
            "ar",
            format!("{ar:?} is not stationary: the process would drift without bound"),
        ),
        e @ (ModelError::Order { .. }
        | ModelError::UnknownKind(_)
        | ModelError::ValueCount { .. }) => ("model", e.to_string()),
    };
    ConfigError::Invalid {
        file: file.to_string(),
        key: format!("{path}.{key}"),
        message,
    }
}

/// Turns a serde/TOML error into one naming the key path, found by locating the error's byte span in the parsed
/// document (toml reports spans, not paths).
fn serde_error(text: &str, file: &str, e: &toml::de::Error) -> ConfigError {
    let span = e.span().unwrap_or(0..0);
    let (line, column) = line_column(text, span.start);
    let message = e.message().trim().to_string();
    let Some(path) = error_key(text, e) else {
        return ConfigError::Syntax {
            file: file.to_string(),
            line,
            column,
            message,
        };
    };
    ConfigError::Schema {
        file: file.to_string(),
        key: if path.is_empty() {
            "(top level)".to_string()
        } else {
            path.clone()
        },
        line,
        column,
        message: hint(&message, &path),
    }
}

/// The key path a serde error is about ("" for the top level), or `None` if the text is not TOML at all.
fn error_key(text: &str, e: &toml::de::Error) -> Option<String> {
    let span = e.span().unwrap_or(0..0);
    let doc = toml::de::DeTable::parse(text).ok()?;
    let mut best = (0usize, String::new());
    locate(doc.get_ref(), &span, String::new(), 1, &mut best);
    Some(best.1)
}

/// A single `[table]` where an array of tables is expected is a common slip; say how to write it.
fn hint(message: &str, path: &str) -> String {
    if !message.contains("expected a sequence") {
        return message.to_string();
    }
    if path.ends_with("override") {
        format!("{message}; write each override as a [[channels.override]] table (double brackets)")
    } else if path == "inputs" {
        format!("{message}; write each input as an [[inputs]] table (double brackets)")
    } else {
        message.to_string()
    }
}

/// Deepest key path whose key or value span contains `span`. Children are searched even when their parent's span
/// does not contain it: a `[table]`'s span is only its header line.
fn locate(
    table: &toml::de::DeTable<'_>,
    span: &std::ops::Range<usize>,
    prefix: String,
    depth: usize,
    best: &mut (usize, String),
) {
    for (k, v) in table.iter() {
        let name = if prefix.is_empty() {
            key_text(k.get_ref())
        } else {
            format!("{prefix}.{}", key_text(k.get_ref()))
        };
        if (contains(&k.span(), span) || contains(&v.span(), span)) && depth > best.0 {
            *best = (depth, name.clone());
        }
        descend(v, span, name, depth + 1, best);
    }
}

fn descend(
    value: &toml::Spanned<toml::de::DeValue<'_>>,
    span: &std::ops::Range<usize>,
    name: String,
    depth: usize,
    best: &mut (usize, String),
) {
    match value.get_ref() {
        toml::de::DeValue::Table(t) => locate(t, span, name, depth, best),
        toml::de::DeValue::Array(items) => {
            for (i, item) in items.iter().enumerate() {
                let name = format!("{name}[{i}]");
                if contains(&item.span(), span) && depth > best.0 {
                    *best = (depth, name.clone());
                }
                descend(item, span, name, depth + 1, best);
            }
        }
        _ => {}
    }
}

fn contains(outer: &std::ops::Range<usize>, inner: &std::ops::Range<usize>) -> bool {
    outer.start <= inner.start && inner.end <= outer.end && outer.start < outer.end
}

/// A key as written in a path: bare if TOML allows it bare, else quoted.
fn key_text(key: &str) -> String {
    let bare = !key.is_empty()
        && key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-');
    if bare {
        key.to_string()
    } else {
        toml_string(key)
    }
}

/// 1-based line and column (in characters) of a byte offset.
fn line_column(text: &str, offset: usize) -> (usize, usize) {
    let (mut line, mut column) = (1, 1);
    for (i, c) in text.char_indices() {
        if i >= offset {
            break;
        }
        if c == '\n' {
            line += 1;
            column = 1;
        } else {
            column += 1;
        }
    }
    (line, column)
}

/// Renders `model` as a ready-to-paste table in this module's format, e.g. for `gaugewise fit --emit-config`.
///
/// `table_header` is used verbatim if it starts with `[` (e.g. `"[channels.default]"`); otherwise it is a table
/// name, written `[[name]]` when `pattern` is given (overrides are an array of tables) and `[name]` when not. A
/// pattern becomes the `match` key. Floats are written with Rust's shortest round-trip form (Debug, not Display:
/// Display writes 1e300 as a 301-digit integer, which TOML would read as an out-of-range integer).
pub fn model_to_toml(model: &ModelSpec, table_header: &str, pattern: Option<&str>) -> String {
    let header = table_header.trim();
    let mut out = if header.starts_with('[') {
        header.to_string()
    } else if pattern.is_some() {
        format!("[[{header}]]")
    } else {
        format!("[{header}]")
    };
    out.push('\n');
    if let Some(p) = pattern {
        out.push_str(&format!("match = {}\n", toml_string(p)));
    }
    out.push_str(&format!("model = \"{}\"\n", model.kind()));
    let mut line = |key: &str, value: String| out.push_str(&format!("{key} = {value}\n"));
    line("interval", toml_float(model.interval));
    match &model.params {
        ModelParams::Level { obs_var, level_var } => {
            line("obs_var", toml_float(*obs_var));
            line("level_var", toml_float(*level_var));
        }
        ModelParams::Lag {
            mean,
            tau,
            state_var,
            obs_var,
        } => {
            line("mean", toml_float(*mean));
            line("tau", toml_float(*tau));
            line("state_var", toml_float(*state_var));
            line("obs_var", toml_float(*obs_var));
        }
        ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        } => {
            line("obs_var", toml_float(*obs_var));
            line("level_var", toml_float(*level_var));
            line("slope_var", toml_float(*slope_var));
        }
        ModelParams::Arma { mean, ar, ma, var } => {
            line("mean", toml_float(*mean));
            // An empty list is what the format means by omitting the key, and reads more plainly.
            for (key, list) in [("ar", ar), ("ma", ma)] {
                if !list.is_empty() {
                    let items: Vec<String> = list.iter().map(|v| toml_float(*v)).collect();
                    line(key, format!("[{}]", items.join(", ")));
                }
            }
            line("var", toml_float(*var));
        }
    }
    out
}

fn toml_float(x: f64) -> String {
    if x.is_nan() {
        "nan".to_string()
    } else if x.is_infinite() {
        if x > 0.0 { "inf" } else { "-inf" }.to_string()
    } else {
        // Debug always has a '.' or an exponent, so TOML reads a float, and is the shortest exact form.
        format!("{x:?}")
    }
}

fn toml_string(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\t' => out.push_str("\\t"),
            '\r' => out.push_str("\\r"),
            c if c.is_control() => out.push_str(&format!("\\u{:04X}", c as u32)),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    const FILE: &str = "config/test.toml";

    fn parse(text: &str) -> Result<Config, ConfigError> {
        Config::from_str(text, FILE)
    }

    fn message(text: &str) -> String {
        let e = parse(text).expect_err("expected an error");
        let m = e.to_string();
        assert!(
            m.starts_with(&format!("{FILE}: ")),
            "message does not start with the file: {m}"
        );
        assert!(!m.contains('\n'), "message is not one line: {m}");
        m
    }

    const LAG: &str =
        "[channels.default]\nmodel = \"lag\"\ninterval = 10.0\nmean = 72.5\ntau = 300.0\n\
                       state_var = 0.015\nobs_var = 0.04\n";

    #[test]
    fn brief_example_parses() {
        let text = format!(
            "{LAG}\n[[channels.override]]\nmatch = \"TT-*\"\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.04\n\
             level_var = 0.01\n\n[[channels.override]]\nmatch = \"FT-201\"\nmodel = \"arma(1,1)\"\ninterval = 1.0\n\
             mean = 12.0\nar = [0.8]\nma = [-0.3]\nvar = 0.5\n"
        );
        let c = parse(&text).unwrap().channels;
        assert_eq!(c.default.kind(), ModelKind::Lag);
        assert_eq!(c.overrides.len(), 2);
        assert_eq!(c.model_for("TT-7").kind(), ModelKind::Level);
        assert_eq!(c.model_for("FT-201").kind(), ModelKind::Arma { p: 1, q: 1 });
        assert_eq!(c.model_for("FT-202").kind(), ModelKind::Lag);
        assert_eq!(
            c.model_for("FT-201").params,
            ModelParams::Arma {
                mean: 12.0,
                ar: vec![0.8],
                ma: vec![-0.3],
                var: 0.5
            }
        );
    }

    #[test]
    fn first_matching_override_wins() {
        let text = format!(
            "{LAG}[[channels.override]]\nmatch = \"TT-1*\"\nmodel = \"level\"\ninterval = 1\nobs_var = 1\n\
             level_var = 1\n[[channels.override]]\nmatch = \"TT-*\"\nmodel = \"trend\"\ninterval = 1\nobs_var = 1\n\
             level_var = 1\nslope_var = 1\n"
        );
        let c = parse(&text).unwrap().channels;
        assert_eq!(c.model_for("TT-101").kind(), ModelKind::Level);
        assert_eq!(c.model_for("TT-201").kind(), ModelKind::Trend);
        assert_eq!(
            c.model_for("tt-201").kind(),
            ModelKind::Lag,
            "matching is case-sensitive"
        );
    }

    #[test]
    fn model_for_follows_edited_patterns() {
        let mut c = parse(&format!(
            "{LAG}[[channels.override]]\nmatch = \"A*\"\nmodel = \"level\"\ninterval = 1\nobs_var = 1\nlevel_var = 1\n"
        ))
        .unwrap()
        .channels;
        c.overrides[0].pattern = "B*".to_string();
        assert_eq!(c.model_for("A1").kind(), ModelKind::Lag);
        assert_eq!(c.model_for("B1").kind(), ModelKind::Level);
        let built = ChannelConfig::new(c.default.clone(), c.overrides.clone()).unwrap();
        assert_eq!(built, c);
        assert!(ChannelConfig::new(
            c.default.clone(),
            vec![Override {
                pattern: "a[".into(),
                ..c.overrides[0].clone()
            }]
        )
        .is_err());
    }

    #[test]
    fn plant_example_loads() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/plant.toml");
        let c = Config::load(&path).unwrap().channels;
        assert_eq!(c.model_for("TT-101").kind(), ModelKind::Lag);
        assert_eq!(c.model_for("TT-102").kind(), ModelKind::Level);
        assert_eq!(c.model_for("FT-201").kind(), ModelKind::Arma { p: 1, q: 1 });
        assert_eq!(c.model_for("LT-301").kind(), ModelKind::Trend);
        assert_eq!(c.model_for("PT-999"), &c.default);
    }

    #[test]
    fn missing_file_names_path() {
        let e = Config::load(Path::new("/nonexistent/plant.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            e.starts_with("/nonexistent/plant.toml: cannot read config:"),
            "{e}"
        );
    }

    #[test]
    fn unknown_keys_are_errors() {
        let m = message(&format!("brokr = 1\n{LAG}"));
        assert!(
            m.starts_with("config/test.toml: brokr: unknown field `brokr`"),
            "{m}"
        );
        assert!(m.ends_with("(line 1, column 1)"), "{m}");
        let m = message(&format!("{LAG}obs_vr = 0.1\n"));
        assert!(
            m.starts_with("config/test.toml: channels.default.obs_vr: unknown field `obs_vr`"),
            "{m}"
        );
        let m = message(&format!(
            "{LAG}[[channels.override]]\nmatch = \"a\"\nmodel = \"level\"\n[[channels.override]]\nmatch = \"b\"\n\
             model = \"level\"\nlevel_vr = 1\n"
        ));
        assert!(
            m.starts_with(
                "config/test.toml: channels.override[1].level_vr: unknown field `level_vr`"
            ),
            "{m}"
        );
        let m = message(&format!("{LAG}[channels.extra]\nx = 1\n"));
        assert!(
            m.starts_with("config/test.toml: channels.extra: unknown field `extra`"),
            "{m}"
        );
    }

    #[test]
    fn wrong_types_name_the_key() {
        let m = message(&LAG.replace("tau = 300.0", "tau = \"300\""));
        assert_eq!(
            m,
            "config/test.toml: channels.default.tau: invalid type: string \"300\", expected f64 (line 5, column 7)"
        );
        let m = message(&LAG.replace("model = \"lag\"", "model = 3"));
        assert!(
            m.starts_with("config/test.toml: channels.default.model: invalid type: integer"),
            "{m}"
        );
        let m = message(&format!(
            "{LAG}[[channels.override]]\nmatch = \"a\"\nmodel = \"arma(2,0)\"\nar = [0.5, \"x\"]\n"
        ));
        assert!(
            m.starts_with("config/test.toml: channels.override[0].ar[1]: invalid type: string"),
            "{m}"
        );
        let m = message(&format!("{LAG}[channels.override]\nmatch = \"a\"\n"));
        assert!(
            m.starts_with("config/test.toml: channels.override: invalid type"),
            "{m}"
        );
        assert!(m.contains("[[channels.override]]"), "{m}");
        let m = message("channels = 3\n");
        assert!(
            m.starts_with("config/test.toml: channels: invalid type: integer `3`"),
            "{m}"
        );
    }

    #[test]
    fn syntax_errors_give_line_and_column() {
        let m = message("[channels.default\nmodel = \"lag\"\n");
        assert!(
            m.starts_with("config/test.toml: line 1, column 18: "),
            "{m}"
        );
        let e = parse("[channels.default\n").unwrap_err();
        assert!(matches!(e, ConfigError::Syntax { line: 1, .. }));
        assert_eq!(e.key(), None);
    }

    #[test]
    fn missing_sections_and_keys() {
        assert!(message("").starts_with("config/test.toml: channels.default: missing ("));
        assert!(
            message("[channels]\n").starts_with("config/test.toml: channels.default: missing (")
        );
        assert_eq!(
            message("[channels.default]\ninterval = 1.0\n"),
            "config/test.toml: channels.default.model: missing (one of level, lag, trend, arma(p,q))"
        );
        assert_eq!(
            message(&LAG.replace("tau = 300.0\n", "")),
            "config/test.toml: channels.default.tau: missing (model lag needs interval, mean, tau, state_var, obs_var)"
        );
        assert!(message(&LAG.replace("interval = 10.0\n", ""))
            .starts_with("config/test.toml: channels.default.interval: missing"));
        let m = message(&format!("{LAG}[[channels.override]]\nmodel = \"level\"\n"));
        assert!(
            m.starts_with("config/test.toml: channels.override[0].match: missing"),
            "{m}"
        );
        let m = message(&format!(
            "{LAG}[[channels.override]]\nmatch = \"a\"\nmodel = \"arma(1,1)\"\ninterval = 1\nmean = 0\nar = [0.5]\n\
             var = 1\n"
        ));
        assert!(
            m.starts_with(
                "config/test.toml: channels.override[0].ma: missing (model arma(1,1) needs 1 ma"
            ),
            "{m}"
        );
    }

    #[test]
    fn unknown_model_and_bad_order() {
        assert_eq!(
            message(&LAG.replace("\"lag\"", "\"kalman\"")),
            "config/test.toml: channels.default.model: unknown model 'kalman' (expected level, lag, trend or arma(p,q))"
        );
        let m = message(&LAG.replace("\"lag\"", "\"arma(4,0)\""));
        assert!(
            m.starts_with("config/test.toml: channels.default.model: arma order (4,0)"),
            "{m}"
        );
    }

    #[test]
    fn parameter_of_another_model_is_an_error() {
        assert_eq!(
            message(&format!("{LAG}level_var = 0.01\n")),
            "config/test.toml: channels.default.level_var: not a parameter of model lag \
             (it takes interval, mean, tau, state_var, obs_var)"
        );
        let m = message(&format!(
            "{LAG}[[channels.override]]\nmatch = \"a\"\nmodel = \"level\"\ninterval = 1\nobs_var = 1\n\
             level_var = 1\ntau = 5\n"
        ));
        assert!(
            m.starts_with(
                "config/test.toml: channels.override[0].tau: not a parameter of model level"
            ),
            "{m}"
        );
        let m = message(&LAG.replace(
            "[channels.default]\n",
            "[channels.default]\nmatch = \"x\"\n",
        ));
        assert!(
            m.starts_with("config/test.toml: channels.default.match: "),
            "{m}"
        );
    }

    #[test]
    fn invalid_values_name_the_key() {
        let text = format!(
            "{LAG}[[channels.override]]\nmatch = \"a\"\nmodel = \"level\"\ninterval = 1\nobs_var = 1\nlevel_var = 1\n\
             [[channels.override]]\nmatch = \"b\"\nmodel = \"lag\"\ninterval = 1\nmean = 0\ntau = -3\nstate_var = 1\n\
             obs_var = 1\n"
        );
        assert_eq!(
            message(&text),
            "config/test.toml: channels.override[1].tau: must be a finite number > 0 (got -3)"
        );
        assert_eq!(
            message(&LAG.replace("obs_var = 0.04", "obs_var = -0.5")),
            "config/test.toml: channels.default.obs_var: must be a finite number >= 0 (got -0.5)"
        );
        assert_eq!(
            message(&LAG.replace("mean = 72.5", "mean = nan")),
            "config/test.toml: channels.default.mean: must be finite (got NaN)"
        );
        assert_eq!(
            message(&LAG.replace("interval = 10.0", "interval = 0")),
            "config/test.toml: channels.default.interval: must be a finite number > 0 (got 0)"
        );
    }

    #[test]
    fn arma_coefficient_checks() {
        let arma = |model: &str, ar: &str| {
            format!(
                "[channels.default]\nmodel = \"{model}\"\ninterval = 1\nmean = 0\n{ar}var = 1\n"
            )
        };
        let m = message(&arma("arma(2,0)", "ar = [1.2, -0.1]\n"));
        assert!(
            m.starts_with("config/test.toml: channels.default.ar: [1.2, -0.1] is not stationary"),
            "{m}"
        );
        assert_eq!(
            message(&arma("arma(1,0)", "ar = [0.5, 0.1]\n")),
            "config/test.toml: channels.default.ar: has 2 coefficient(s) but model arma(1,0) needs 1"
        );
        assert_eq!(
            message(&arma("arma(1,0)", "ar = [inf]\n")),
            "config/test.toml: channels.default.ar[0]: must be finite (got inf)"
        );
        assert_eq!(
            message(&arma("arma(1,0)", "ar = [0.5]\nma = [0.1]\n")),
            "config/test.toml: channels.default.ma: has 1 coefficient(s) but model arma(1,0) needs 0"
        );
        // An order of 0 may omit its list or give it empty.
        parse(&arma("arma(0,1)", "ma = [0.3]\n")).unwrap();
        parse(&arma("arma(1,0)", "ar = [0.3]\nma = []\n")).unwrap();
    }

    #[test]
    fn bad_glob_names_the_key() {
        let m = message(&format!(
            "{LAG}[[channels.override]]\nmatch = \"TT-[\"\nmodel = \"level\"\ninterval = 1\nobs_var = 1\nlevel_var = 1\n"
        ));
        assert!(
            m.starts_with("config/test.toml: channels.override[0].match: invalid glob"),
            "{m}"
        );
    }

    #[test]
    fn every_error_has_a_key() {
        for text in [
            "brokr = 1\n".to_string(),
            format!("{LAG}obs_vr = 1\n"),
            LAG.replace("tau = 300.0\n", ""),
            format!("{LAG}level_var = 1\n"),
            LAG.replace("tau = 300.0", "tau = -1"),
        ] {
            let e = parse(&text).unwrap_err();
            let key = e.key().expect("error has a key").to_string();
            assert!(e.to_string().contains(&key));
        }
    }

    fn specs() -> Vec<ModelSpec> {
        vec![
            ModelSpec {
                interval: 10.0,
                params: ModelParams::Level {
                    obs_var: 0.04,
                    level_var: 1e-7,
                },
            },
            ModelSpec {
                interval: 0.1,
                params: ModelParams::Lag {
                    mean: -72.0 - 1.0 / 7.0,
                    tau: 300.0,
                    state_var: 0.015,
                    obs_var: 0.0,
                },
            },
            ModelSpec {
                interval: 60.0,
                params: ModelParams::Trend {
                    obs_var: 1e300,
                    level_var: 2.5e-12,
                    slope_var: 1.0 / 3.0,
                },
            },
            ModelSpec {
                interval: 1.0,
                params: ModelParams::Arma {
                    mean: 12.0,
                    ar: vec![0.8, -0.1],
                    ma: vec![-0.3],
                    var: 0.5,
                },
            },
            ModelSpec {
                interval: 1.0,
                params: ModelParams::Arma {
                    mean: 0.0,
                    ar: vec![],
                    ma: vec![0.4, 0.1, 0.05],
                    var: 2.0,
                },
            },
        ]
    }

    #[test]
    fn rendering_round_trips_every_kind() {
        for spec in specs() {
            let default = model_to_toml(&spec, "[channels.default]", None);
            let over = model_to_toml(&spec, "channels.override", Some("TT-\"1*"));
            let c = parse(&format!("{default}\n{over}"))
                .unwrap_or_else(|e| panic!("{e}\n{default}\n{over}"));
            assert_eq!(c.channels.default, spec);
            assert_eq!(c.channels.overrides[0].model, spec);
            assert_eq!(c.channels.overrides[0].pattern, "TT-\"1*");
        }
    }

    #[test]
    fn rendering_matches_the_format() {
        let spec = ModelSpec {
            interval: 10.0,
            params: ModelParams::Lag {
                mean: 72.5,
                tau: 300.0,
                state_var: 0.015,
                obs_var: 0.04,
            },
        };
        assert_eq!(
            model_to_toml(&spec, "channels.default", None),
            "[channels.default]\nmodel = \"lag\"\ninterval = 10.0\nmean = 72.5\ntau = 300.0\nstate_var = 0.015\n\
             obs_var = 0.04\n"
        );
        let over = model_to_toml(&specs()[3], "channels.override", Some("FT-201"));
        assert_eq!(
            over,
            "[[channels.override]]\nmatch = \"FT-201\"\nmodel = \"arma(2,1)\"\ninterval = 1.0\nmean = 12.0\n\
             ar = [0.8, -0.1]\nma = [-0.3]\nvar = 0.5\n"
        );
    }

    /// A daemon config with two inputs, for environment overrides.
    const DAEMON: &str = "[channels.default]\nmodel = \"level\"\ninterval = 1.0\nobs_var = 1.0\nlevel_var = 0.1\n\
        [[channels.override]]\nmatch = \"TT-*\"\nmodel = \"level\"\ninterval = 1.0\nobs_var = 0.5\nlevel_var = 0.1\n\
        [broker]\nclient_id = \"gw-01\"\n\
        [[inputs]]\ntopic = \"plant/raw/+\"\nchannel = \"{2}\"\npayload = \"number\"\n\
        [[inputs]]\ntopic = \"plant/json/+\"\nchannel = \"{2}\"\npayload = \"json\"\nvalue = \"/v\"\n\
        [output]\ntopic = \"plant/clean/{channel}\"\n";

    fn with_env(text: &str, vars: &[(&str, &str)]) -> Result<Config, ConfigError> {
        Config::from_str_with_env(
            text,
            FILE,
            vars.iter().map(|(k, v)| (k.to_string(), v.to_string())),
        )
    }

    fn env_message(text: &str, vars: &[(&str, &str)]) -> String {
        let e = with_env(text, vars)
            .and_then(|c| c.daemon().map(|_| c))
            .expect_err("expected an error");
        let m = e.to_string();
        assert!(m.starts_with(&format!("{FILE}: ")), "{m}");
        assert!(!m.contains('\n'), "{m}");
        m
    }

    #[test]
    fn environment_overrides_keys() {
        let c = with_env(
            DAEMON,
            &[
                ("GAUGEWISE_BROKER__PORT", "1884"),
                ("GAUGEWISE_BROKER__HOST", "10.0.0.7"),
                ("GAUGEWISE_INPUTS__1__QOS", "0"),
                ("GAUGEWISE_OUTPUT__TOPIC", "site/clean/{channel}"),
                ("GAUGEWISE_OUTPUT__RETAIN", "true"),
                ("GAUGEWISE_CHANNELS__OVERRIDE__0__OBS_VAR", "0.05"),
                ("GAUGEWISE_INPUTS__1__GOOD_QUALITY", "[192, \"good\"]"),
                ("GAUGEWISE_INPUTS__1__QUALITY", "/q"),
                ("GAUGEWISE_TIMING__STALE_AFTER_S", "0"),
                ("GAUGEWISE_LOG", "debug"),
                ("OTHER_BROKER__PORT", "1"),
            ],
        )
        .unwrap();
        let d = c.daemon().unwrap();
        assert_eq!((d.broker.host.as_str(), d.broker.port), ("10.0.0.7", 1884));
        assert_eq!((d.inputs[0].qos, d.inputs[1].qos), (1, 0));
        assert_eq!(d.output.topic, "site/clean/{channel}");
        assert!(d.output.retain);
        assert_eq!(
            d.stale_after_s, None,
            "a section absent from the file can be created"
        );
        assert_eq!(
            c.channels.overrides[0].model.params,
            ModelParams::Level {
                obs_var: 0.05,
                level_var: 0.1
            }
        );
        let crate::config::PayloadFormat::Json(j) = &d.inputs[1].payload else {
            panic!()
        };
        assert_eq!(
            j.good_quality,
            Some(vec![serde_json::json!(192), serde_json::json!("good")])
        );
        // Applied in key order; GAUGEWISE_LOG is not a key; values are not shown.
        assert_eq!(c.env.len(), 9);
        assert_eq!(c.env[0].var, "GAUGEWISE_BROKER__HOST");
        assert!(d
            .env_overrides
            .contains(&"GAUGEWISE_BROKER__PORT -> broker.port".to_string()));
        assert!(d
            .describe()
            .contains("environment: GAUGEWISE_INPUTS__1__QOS -> inputs[1].qos"));
        assert!(!format!("{:?}", c.env).contains("1884"));
    }

    #[test]
    fn environment_text_that_reads_as_a_number_can_be_a_string() {
        let d = with_env(
            DAEMON,
            &[
                ("GAUGEWISE_BROKER__CLIENT_ID", "0042"),
                ("GAUGEWISE_BROKER__USERNAME", "true"),
            ],
        )
        .unwrap()
        .daemon()
        .unwrap();
        assert_eq!(d.broker.client_id, "0042");
        assert_eq!(d.broker.username.as_deref(), Some("true"));
        let d = with_env(DAEMON, &[("GAUGEWISE_BROKER__CLIENT_ID", "\"quoted\"")])
            .unwrap()
            .daemon()
            .unwrap();
        assert_eq!(d.broker.client_id, "quoted");
        // A number where a number belongs keeps the number's message.
        assert_eq!(
            env_message(DAEMON, &[("GAUGEWISE_BROKER__PORT", "1.5")]),
            "config/test.toml: broker.port: invalid type: floating point `1.5`, expected i64 \
             (environment GAUGEWISE_BROKER__PORT)"
        );
        assert_eq!(
            env_message(DAEMON, &[("GAUGEWISE_BROKER__PORT", "http")]),
            "config/test.toml: broker.port: invalid type: string \"http\", expected i64 (environment GAUGEWISE_BROKER__PORT)"
        );
    }

    #[test]
    fn environment_errors_name_the_variable() {
        let cases: [(&str, &str, &str); 12] = [
            ("GAUGEWISE_BROKER__PROT", "1884", "broker.prot: unknown field `prot`"),
            ("GAUGEWISE_BROKR__PORT", "1884", "brokr: unknown field `brokr`"),
            ("GAUGEWISE_BROKER__PORT", "0", "broker.port: must be an integer from 1 to 65535 (got 0)"),
            ("GAUGEWISE_INPUTS__0__QOS", "7", "inputs[0].qos: must be 0, 1 or 2 (got 7)"),
            ("GAUGEWISE_INPUTS__5__QOS", "1", "inputs[5]: inputs has 2 element(s): an override can set one of them or add the next, [2]"),
            ("GAUGEWISE_INPUTS__2__QOS", "1", "inputs[2].topic: missing (an MQTT topic filter"),
            ("GAUGEWISE_BROKER__CLIENT_ID__X", "1", "broker.client_id: is a string in the file, not a table, so it has no key `x`"),
            ("GAUGEWISE_BROKER__PORT__X", "1", "broker.port: invalid type: map, expected i64"),
            ("GAUGEWISE_BROKER____PORT", "1", "broker..port: is not a key path: a level is empty"),
            ("GAUGEWISE_7", "1", "7: is not a key path: it starts with an index"),
            ("GAUGEWISE_CHANNELS__DEFAULT__TAU", "5", "channels.default.tau: not a parameter of model level"),
            ("GAUGEWISE_OUTPUT__TOPIC", "plant/raw/{channel}", "output.topic: \"plant/raw/{channel}\" can be matched by inputs[0]"),
        ];
        for (var, value, expected) in cases {
            let m = env_message(DAEMON, &[(var, value)]);
            assert!(
                m.starts_with(&format!("{FILE}: {expected}"))
                    && m.ends_with(&format!(" (environment {var})")),
                "{var}={value}: {m}"
            );
        }
        let e = with_env(DAEMON, &[("GAUGEWISE_BROKER__PROT", "1")]).unwrap_err();
        assert_eq!(e.key(), Some("broker.prot"));
    }

    #[test]
    fn file_errors_keep_their_line_with_overrides_present() {
        let text = DAEMON.replace("[output]\n", "[output]\nqoss = 1\n");
        let plain = message(&text);
        let with = env_message(&text, &[("GAUGEWISE_BROKER__PORT", "1884")]);
        assert_eq!(plain, with);
        assert!(with.contains("output.qoss: unknown field `qoss`"), "{with}");
        assert!(with.ends_with("(line 24, column 1)"), "{with}");
        // A value the variable replaces is not an error of the file's.
        let text = DAEMON.replace("[broker]\n", "[broker]\nport = \"x\"\n");
        assert!(message(&text).starts_with("config/test.toml: broker.port: invalid type"));
        with_env(&text, &[("GAUGEWISE_BROKER__PORT", "1884")]).unwrap();
        // A variable cannot hide a file error elsewhere.
        let text = DAEMON.replace("[broker]\n", "[broker]\nkeep_alive_s = -5\n");
        assert_eq!(
            env_message(&text, &[("GAUGEWISE_BROKER__PORT", "1884")]),
            "config/test.toml: broker.keep_alive_s: must be an integer from 0 to 65535 (got -5)"
        );
    }

    #[test]
    fn environment_can_add_array_elements_in_index_order() {
        let vars = [
            ("GAUGEWISE_INPUTS__3__TOPIC", "plant/d/+"),
            ("GAUGEWISE_INPUTS__3__CHANNEL", "d-{2}"),
            ("GAUGEWISE_INPUTS__3__PAYLOAD", "number"),
            ("GAUGEWISE_INPUTS__2__TOPIC", "plant/c/+"),
            ("GAUGEWISE_INPUTS__2__CHANNEL", "c-{2}"),
            ("GAUGEWISE_INPUTS__2__PAYLOAD", "number"),
        ];
        let d = with_env(DAEMON, &vars).unwrap().daemon().unwrap();
        let topics: Vec<&str> = d.inputs.iter().map(|i| i.topic.as_str()).collect();
        assert_eq!(
            topics,
            ["plant/raw/+", "plant/json/+", "plant/c/+", "plant/d/+"]
        );
        // With no [[inputs]] in the file at all, variables alone can define one.
        let text = DAEMON.split("[[inputs]]").next().unwrap().to_string()
            + "[output]\ntopic = \"plant/clean/{channel}\"\n";
        let first: Vec<(String, &str)> = vars[3..]
            .iter()
            .map(|(k, v)| (k.replace("__2__", "__0__"), *v))
            .collect();
        let first: Vec<(&str, &str)> = first.iter().map(|(k, v)| (k.as_str(), *v)).collect();
        let d = with_env(&text, &first).unwrap().daemon().unwrap();
        assert_eq!(d.inputs.len(), 1);
        assert_eq!(d.inputs[0].topic, "plant/c/+");
        let m = env_message(&text, &vars[..3]);
        assert!(m.contains("inputs[3]: inputs has 0 element(s)"), "{m}");
    }

    #[test]
    fn environment_non_unicode_is_refused() {
        use std::os::unix::ffi::OsStringExt;
        let bad = OsString::from_vec(vec![0x66, 0x6f, 0x80]);
        let e = Config::from_str_with_env(
            DAEMON,
            FILE,
            [(OsString::from("GAUGEWISE_BROKER__HOST"), bad.clone())],
        )
        .unwrap_err();
        assert!(
            e.to_string()
                .contains("not valid UTF-8 (environment GAUGEWISE_BROKER__HOST)"),
            "{e}"
        );
        // Other variables may hold anything.
        Config::from_str_with_env(DAEMON, FILE, [(OsString::from("PATH_X"), bad)]).unwrap();
    }

    proptest! {
        #[test]
        fn arbitrary_environment_never_panics(
            name in "[A-Z_0-9]{0,30}",
            value in any::<String>(),
            text in "[\\[\\]a-z_.=\"0-9, \n{}/+#]{0,80}",
        ) {
            let vars = [(format!("GAUGEWISE_{name}"), value)];
            if let Ok(c) = Config::from_str_with_env(DAEMON, FILE, vars.clone()) {
                let _ = c.daemon();
            }
            let _ = Config::from_str_with_env(&format!("{DAEMON}{text}"), FILE, vars);
        }

        #[test]
        fn arbitrary_text_never_panics(text in any::<String>()) {
            let _ = parse(&text);
        }

        #[test]
        fn toml_like_text_never_panics(text in "[\\[\\]a-z_.=\"0-9, \n()*-]{0,200}") {
            let _ = parse(&text);
            let _ = parse(&format!("{LAG}{text}"));
        }

        #[test]
        fn lag_round_trips(
            interval in 1e-3f64..1e5,
            mean in -1e6f64..1e6,
            tau in 1e-3f64..1e9,
            state_var in 0.0f64..1e3,
            obs_var in 0.0f64..1e3,
        ) {
            let spec = ModelSpec { interval, params: ModelParams::Lag { mean, tau, state_var, obs_var } };
            let text = model_to_toml(&spec, "channels.default", None);
            prop_assert_eq!(parse(&text).unwrap().channels.default, spec);
        }

        #[test]
        fn any_finite_float_round_trips(x in any::<f64>().prop_filter("finite", |x| x.is_finite())) {
            let spec = ModelSpec {
                interval: 1.0,
                params: ModelParams::Arma { mean: x, ar: vec![0.5], ma: vec![], var: 1.0 },
            };
            let text = model_to_toml(&spec, "channels.default", None);
            let back = parse(&text).unwrap().channels.default;
            match back.params {
                ModelParams::Arma { mean, .. } => prop_assert_eq!(mean.to_bits(), x.to_bits()),
                other => prop_assert!(false, "wrong kind {:?}", other),
            }
        }
    }
}
