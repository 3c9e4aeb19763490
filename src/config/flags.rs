//! The `[flags]` section: each channel's fault-flag design (`detect::FlagDesign`), a default for every channel and
//! `[[flags.override]]` tables picked by a glob on the channel name, like `[channels]`.
//!
//! An override starts from the file's `[flags]` (which starts from the built-in defaults) and changes only the keys
//! it gives, so a tag's engineering range can be set without repeating the rest. A key that a detector does not
//! use (`window` under `[flags.stale]`) is an error, as elsewhere: a typo must not pass as a setting.

use super::daemon::Ctx;
use super::ConfigError;
use crate::detect::{AlarmDesign, FlagDesign, NoiseThreshold, Severity, Threshold};
use globset::{Glob, GlobMatcher};
use serde::Deserialize;

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [flags] table")]
pub(super) struct RawFlags {
    #[serde(rename = "match")]
    pattern: Option<String>,
    false_alarms_per_day: Option<f64>,
    spike: Option<RawDetector>,
    noise: Option<RawDetector>,
    bias: Option<RawDetector>,
    stuck: Option<RawDetector>,
    stale: Option<RawDetector>,
    range: Option<RawDetector>,
    #[serde(rename = "override", default)]
    overrides: Vec<RawFlags>,
}

/// Every key any detector takes; [`apply`] refuses those the detector at hand does not use.
#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a detector table")]
struct RawDetector {
    enabled: Option<bool>,
    severity: Option<String>,
    on_delay: Option<f64>,
    off_delay: Option<f64>,
    deadband: Option<f64>,
    false_alarms_per_day: Option<f64>,
    threshold: Option<f64>,
    withhold: Option<bool>,
    confirm: Option<i64>,
    window: Option<i64>,
    bounds: Option<Vec<f64>>,
    shift: Option<f64>,
    limit: Option<f64>,
    resolution: Option<f64>,
    low: Option<f64>,
    high: Option<f64>,
}

impl RawDetector {
    /// Names of the detector-specific keys that are set.
    fn specific_keys(&self) -> Vec<&'static str> {
        let mut keys = Vec::new();
        let mut add = |set: bool, name| {
            if set {
                keys.push(name)
            }
        };
        add(self.false_alarms_per_day.is_some(), "false_alarms_per_day");
        add(self.threshold.is_some(), "threshold");
        add(self.withhold.is_some(), "withhold");
        add(self.confirm.is_some(), "confirm");
        add(self.window.is_some(), "window");
        add(self.bounds.is_some(), "bounds");
        add(self.shift.is_some(), "shift");
        add(self.limit.is_some(), "limit");
        add(self.resolution.is_some(), "resolution");
        add(self.low.is_some(), "low");
        add(self.high.is_some(), "high");
        keys
    }
}

/// Per-channel values chosen by glob: the first override whose pattern matches the channel name wins, else the
/// default. `[flags]` and `[reestimate]` both use it, with their own value type.
#[derive(Debug, Clone, Default)]
pub struct GlobRules<T> {
    pub default: T,
    /// Tried in order, with their patterns as written.
    pub overrides: Vec<(String, T)>,
    matchers: Vec<GlobMatcher>,
}

impl<T: PartialEq> PartialEq for GlobRules<T> {
    /// Compiled matchers follow from the patterns, so they are not compared.
    fn eq(&self, other: &Self) -> bool {
        self.default == other.default && self.overrides == other.overrides
    }
}

impl<T> GlobRules<T> {
    /// Rules from a default and (pattern, compiled matcher, value) overrides in order.
    pub(super) fn new(default: T, overrides: Vec<(String, GlobMatcher, T)>) -> Self {
        let mut rules = GlobRules {
            default,
            overrides: Vec::with_capacity(overrides.len()),
            matchers: Vec::with_capacity(overrides.len()),
        };
        for (pattern, matcher, value) in overrides {
            rules.matchers.push(matcher);
            rules.overrides.push((pattern, value));
        }
        rules
    }

    /// The value of the first override whose pattern matches `channel`, else the default.
    pub fn for_channel(&self, channel: &str) -> &T {
        for (m, (_, value)) in self.matchers.iter().zip(&self.overrides) {
            if m.is_match(channel) {
                return value;
            }
        }
        &self.default
    }
}

/// Which flag design each channel runs.
pub type FlagRules = GlobRules<FlagDesign>;

impl FlagRules {
    /// The design of the first override whose pattern matches `channel`, else the default.
    pub fn design_for(&self, channel: &str) -> &FlagDesign {
        self.for_channel(channel)
    }
}

/// Builds the rules and checks every design resolves at each of the sample `intervals` the models use (the
/// false-alarm conversion depends on the interval).
pub(super) fn rules(
    raw: Option<&RawFlags>,
    intervals: &[f64],
    ctx: &Ctx,
) -> Result<FlagRules, ConfigError> {
    let Some(raw) = raw else {
        return Ok(FlagRules::default());
    };
    if raw.pattern.is_some() {
        return Err(ctx.invalid(
            "flags.match",
            "[flags] applies to every channel; use a [[flags.override]] table to match names",
        ));
    }
    let default = design(raw, FlagDesign::default(), "flags", ctx)?;
    check(&default, intervals, "flags", ctx)?;
    let mut overrides = Vec::with_capacity(raw.overrides.len());
    for (i, o) in raw.overrides.iter().enumerate() {
        let path = format!("flags.override[{i}]");
        let (pattern, matcher) = override_pattern(
            o.pattern.as_deref(),
            !o.overrides.is_empty(),
            "flags",
            &path,
            ctx,
        )?;
        let d = design(o, default, &path, ctx)?;
        check(&d, intervals, &path, ctx)?;
        overrides.push((pattern, matcher, d));
    }
    Ok(FlagRules::new(default, overrides))
}

/// The `match` glob of an override table of `section` (`flags`, `reestimate`) at `path`, compiled; refuses a
/// missing pattern, an invalid glob and nested overrides.
pub(super) fn override_pattern(
    pattern: Option<&str>,
    nested: bool,
    section: &str,
    path: &str,
    ctx: &Ctx,
) -> Result<(String, GlobMatcher), ConfigError> {
    if nested {
        return Err(ctx.invalid(
            format!("{path}.override"),
            format!("overrides do not nest; list every [[{section}.override]] at the top level"),
        ));
    }
    let pattern = pattern.ok_or_else(|| {
        ctx.missing(
            format!("{path}.match"),
            "a glob on the channel name, e.g. match = \"TT-*\"",
        )
    })?;
    let glob = Glob::new(pattern).map_err(|e| {
        ctx.invalid(
            format!("{path}.match"),
            format!("invalid glob: {}", e.kind()),
        )
    })?;
    Ok((pattern.to_string(), glob.compile_matcher()))
}

fn check(d: &FlagDesign, intervals: &[f64], path: &str, ctx: &Ctx) -> Result<(), ConfigError> {
    for &interval in intervals {
        if let Err(crate::detect::DesignError::Invalid { key, message }) = d.resolve(interval) {
            return Err(ctx.invalid(format!("{path}.{key}"), message));
        }
    }
    Ok(())
}

fn design(
    raw: &RawFlags,
    base: FlagDesign,
    path: &str,
    ctx: &Ctx,
) -> Result<FlagDesign, ConfigError> {
    let mut d = base;
    if let Some(r) = raw.false_alarms_per_day {
        d.spike_threshold = Threshold::PerDay(r);
        d.noise_threshold = NoiseThreshold::PerDay(r);
        d.bias_threshold = Threshold::PerDay(r);
    }
    let sections = [
        ("spike", &raw.spike),
        ("noise", &raw.noise),
        ("bias", &raw.bias),
        ("stuck", &raw.stuck),
        ("stale", &raw.stale),
        ("range", &raw.range),
    ];
    for (name, section) in sections {
        if let Some(det) = section {
            apply(&mut d, name, det, &format!("{path}.{name}"), ctx)?;
        }
    }
    Ok(d)
}

fn count(v: i64, key: String, min: i64, ctx: &Ctx) -> Result<u32, ConfigError> {
    if v < min || v > i64::from(u32::MAX) {
        return Err(ctx.invalid(key, format!("must be a whole number >= {min} (got {v})")));
    }
    Ok(v as u32)
}

fn apply(
    d: &mut FlagDesign,
    name: &str,
    r: &RawDetector,
    path: &str,
    ctx: &Ctx,
) -> Result<(), ConfigError> {
    let allowed: &[&str] = match name {
        "spike" => &["false_alarms_per_day", "threshold", "withhold", "confirm"],
        "noise" => &["false_alarms_per_day", "bounds", "window"],
        "bias" => &["false_alarms_per_day", "limit", "shift"],
        "stuck" => &["window", "resolution"],
        "range" => &["low", "high"],
        _ => &[],
    };
    for key in r.specific_keys() {
        if !allowed.contains(&key) {
            let takes = if allowed.is_empty() {
                "only enabled, severity, on_delay, off_delay and deadband".to_string()
            } else {
                format!("{} besides the common keys", allowed.join(", "))
            };
            return Err(ctx.invalid(
                format!("{path}.{key}"),
                format!("not a setting of the {name} flag (it takes {takes})"),
            ));
        }
    }
    let alarm: &mut AlarmDesign = match name {
        "spike" => &mut d.spike,
        "noise" => &mut d.noise,
        "bias" => &mut d.bias,
        "stuck" => &mut d.stuck,
        "stale" => &mut d.stale,
        _ => &mut d.range,
    };
    if let Some(v) = r.enabled {
        alarm.enabled = v;
    }
    if let Some(s) = &r.severity {
        alarm.severity = Severity::parse(s).ok_or_else(|| {
            ctx.invalid(
                format!("{path}.severity"),
                format!("unknown severity {s:?} (expected \"low\", \"medium\" or \"high\")"),
            )
        })?;
    }
    let seconds = |v: f64, key: &str| -> Result<f64, ConfigError> {
        if v.is_finite() && v >= 0.0 {
            Ok(v)
        } else {
            Err(ctx.invalid(
                format!("{path}.{key}"),
                format!("must be seconds >= 0 (got {v})"),
            ))
        }
    };
    if let Some(v) = r.on_delay {
        alarm.on_delay = seconds(v, "on_delay")?;
    }
    if let Some(v) = r.off_delay {
        alarm.off_delay = seconds(v, "off_delay")?;
    }
    if let Some(v) = r.deadband {
        if !(0.0..1.0).contains(&v) {
            return Err(ctx.invalid(
                format!("{path}.deadband"),
                format!("must be a fraction in [0, 1) (got {v})"),
            ));
        }
        alarm.deadband = v;
    }
    let either = |a: &str, b: &str| {
        ctx.invalid(
            format!("{path}.{b}"),
            format!("give either {a} or {b}, not both"),
        )
    };
    match name {
        "spike" => {
            match (r.false_alarms_per_day, r.threshold) {
                (Some(_), Some(_)) => return Err(either("false_alarms_per_day", "threshold")),
                (Some(v), None) => d.spike_threshold = Threshold::PerDay(v),
                (None, Some(v)) => d.spike_threshold = Threshold::Raw(v),
                (None, None) => {}
            }
            if let Some(v) = r.withhold {
                d.spike_withhold = v;
            }
            if let Some(v) = r.confirm {
                d.spike_confirm = count(v, format!("{path}.confirm"), 2, ctx)?;
            }
        }
        "noise" => {
            match (r.false_alarms_per_day, &r.bounds) {
                (Some(_), Some(_)) => return Err(either("false_alarms_per_day", "bounds")),
                (Some(v), None) => d.noise_threshold = NoiseThreshold::PerDay(v),
                (None, Some(b)) => {
                    let [lo, hi] = b[..] else {
                        return Err(ctx.invalid(
                            format!("{path}.bounds"),
                            "must be two numbers [low, high] for the mean of squared standardised innovations",
                        ));
                    };
                    d.noise_threshold = NoiseThreshold::Bounds(lo, hi);
                }
                (None, None) => {}
            }
            if let Some(v) = r.window {
                d.noise_window = count(v, format!("{path}.window"), 5, ctx)?;
            }
        }
        "bias" => {
            match (r.false_alarms_per_day, r.limit) {
                (Some(_), Some(_)) => return Err(either("false_alarms_per_day", "limit")),
                (Some(v), None) => d.bias_threshold = Threshold::PerDay(v),
                (None, Some(v)) => d.bias_threshold = Threshold::Raw(v),
                (None, None) => {}
            }
            if let Some(v) = r.shift {
                d.bias_shift = v;
            }
        }
        "stuck" => {
            if let Some(v) = r.window {
                d.stuck_window = count(v, format!("{path}.window"), 2, ctx)?;
            }
            if let Some(v) = r.resolution {
                d.stuck_resolution = v;
            }
        }
        "range" => {
            if r.low.is_some() {
                d.range_low = r.low;
            }
            if r.high.is_some() {
                d.range_high = r.high;
            }
        }
        _ => {}
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use crate::config::Config;
    use crate::detect::{FlagDesign, NoiseThreshold, Severity, Threshold};

    const CHANNELS: &str = "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.25\nlevel_var = 0.01\n";

    fn load(flags: &str) -> Result<Config, String> {
        Config::from_str(&format!("{CHANNELS}{flags}"), "f.toml").map_err(|e| e.to_string())
    }

    #[test]
    fn absent_section_is_the_default_design() {
        let c = load("").unwrap();
        assert_eq!(c.channels.flags_for("TT-101"), &FlagDesign::default());
    }

    #[test]
    fn overrides_inherit_from_the_file_default() {
        let c = load(
            "[flags]\nfalse_alarms_per_day = 0.5\n[flags.spike]\nthreshold = 5.0\noff_delay = 30\n\
             [flags.bias]\nshift = 2.0\n\
             [[flags.override]]\nmatch = \"TT-*\"\n[flags.override.range]\nlow = 0.0\nhigh = 150.0\n\
             [flags.override.noise]\nbounds = [0.4, 2.0]\nseverity = \"high\"\n",
        )
        .unwrap();
        let d = c.channels.flags_for("FT-201");
        assert_eq!(d.spike_threshold, Threshold::Raw(5.0));
        assert_eq!(d.spike.off_delay, 30.0);
        assert_eq!(d.bias_threshold, Threshold::PerDay(0.5));
        assert_eq!(d.noise_threshold, NoiseThreshold::PerDay(0.5));
        assert_eq!(d.bias_shift, 2.0);
        assert_eq!(d.range_low, None);
        let t = c.channels.flags_for("TT-101");
        assert_eq!((t.range_low, t.range_high), (Some(0.0), Some(150.0)));
        assert_eq!(t.noise_threshold, NoiseThreshold::Bounds(0.4, 2.0));
        assert_eq!(t.noise.severity, Severity::High);
        // Inherited from [flags], not from the built-in defaults.
        assert_eq!(t.spike_threshold, Threshold::Raw(5.0));
        assert_eq!(t.bias_shift, 2.0);
    }

    #[test]
    fn mistakes_name_the_key_and_file() {
        let cases = [
            (
                "[flags]\nfalse_alarm_per_day = 1\n",
                "f.toml: flags.false_alarm_per_day: unknown field",
            ),
            (
                "[flags.stale]\nwindow = 3\n",
                "f.toml: flags.stale.window: not a setting of the stale flag",
            ),
            (
                "[flags.spike]\nwindow = 3\n",
                "f.toml: flags.spike.window: not a setting of the spike flag",
            ),
            (
                "[flags.spike]\nthreshold = 4\nfalse_alarms_per_day = 1\n",
                "f.toml: flags.spike.threshold: give either",
            ),
            (
                "[flags.noise]\nbounds = [1.0]\n",
                "f.toml: flags.noise.bounds: must be two numbers",
            ),
            (
                "[flags.noise]\nbounds = [2.0, 1.0]\n",
                "f.toml: flags.noise: bounds must satisfy",
            ),
            (
                "[flags.bias]\nseverity = \"urgent\"\n",
                "f.toml: flags.bias.severity: unknown severity",
            ),
            (
                "[flags.bias]\ndeadband = 1.0\n",
                "f.toml: flags.bias.deadband: must be a fraction",
            ),
            (
                "[flags.stuck]\nwindow = 1\n",
                "f.toml: flags.stuck.window: must be a whole number >= 2",
            ),
            (
                "[flags.spike]\non_delay = -1\n",
                "f.toml: flags.spike.on_delay: must be seconds >= 0",
            ),
            (
                "[flags]\nfalse_alarms_per_day = 10000\n",
                "f.toml: flags.spike: false_alarms_per_day = 10000",
            ),
            (
                "[flags]\nmatch = \"x\"\n",
                "f.toml: flags.match: [flags] applies to every channel",
            ),
            (
                "[[flags.override]]\n[flags.override.range]\nlow = 1\n",
                "f.toml: flags.override[0].match: missing",
            ),
            (
                "[[flags.override]]\nmatch = \"TT-*\"\n[flags.override.range]\nlow = 5\nhigh = 1\n",
                "f.toml: flags.override[0].range: low must be below high",
            ),
        ];
        for (text, expected) in cases {
            let m = load(text).expect_err(text);
            assert!(
                m.starts_with(expected),
                "{text}\nexpected {expected}\ngot {m}"
            );
        }
    }

    #[test]
    fn environment_overrides_reach_the_flags() {
        let c = Config::from_str_with_env(
            CHANNELS,
            "f.toml",
            [("GAUGEWISE_FLAGS__SPIKE__THRESHOLD", "6.5")],
        )
        .unwrap();
        assert_eq!(
            c.channels.flags_for("x").spike_threshold,
            Threshold::Raw(6.5)
        );
    }
}
