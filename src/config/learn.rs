//! The `[reestimate]` section: live re-estimation settings (`reestimate::LearnSettings`), off unless `enabled`, a
//! default for every channel and `[[reestimate.override]]` tables picked by a glob on the channel name. An override
//! changes only the keys it gives.

use super::daemon::Ctx;
use super::ConfigError;
use crate::reestimate::LearnSettings;
use serde::Deserialize;

#[derive(Debug, Default, Clone, Deserialize)]
#[serde(deny_unknown_fields, expecting = "a [reestimate] table")]
pub(super) struct RawLearn {
    #[serde(rename = "match")]
    pattern: Option<String>,
    enabled: Option<bool>,
    window: Option<i64>,
    every_s: Option<f64>,
    min_samples: Option<i64>,
    min_gain: Option<f64>,
    max_factor: Option<f64>,
    margin: Option<i64>,
    #[serde(rename = "override", default)]
    overrides: Vec<RawLearn>,
}

/// Which channels re-estimate, and how; a None value: off for the channels it matches.
pub type LearnRules = super::flags::GlobRules<Option<LearnSettings>>;

impl LearnRules {
    /// The settings of the first override whose pattern matches `channel`, else the default; None: off.
    pub fn settings_for(&self, channel: &str) -> Option<&LearnSettings> {
        self.for_channel(channel).as_ref()
    }
}

/// Largest window: 16 bytes per sample per channel, so a million samples is 16 MB for one channel.
const MAX_WINDOW: i64 = 1_000_000;

pub(super) fn rules(raw: Option<&RawLearn>, ctx: &Ctx) -> Result<LearnRules, ConfigError> {
    let Some(raw) = raw else {
        return Ok(LearnRules::default());
    };
    if raw.pattern.is_some() {
        return Err(ctx.invalid(
            "reestimate.match",
            "[reestimate] applies to every channel; use a [[reestimate.override]] table to match names",
        ));
    }
    let (on, base) = settings(raw, (false, LearnSettings::default()), "reestimate", ctx)?;
    let mut overrides = Vec::with_capacity(raw.overrides.len());
    for (i, o) in raw.overrides.iter().enumerate() {
        let path = format!("reestimate.override[{i}]");
        let (pattern, matcher) = super::flags::override_pattern(
            o.pattern.as_deref(),
            !o.overrides.is_empty(),
            "reestimate",
            &path,
            ctx,
        )?;
        let (o_on, s) = settings(o, (on, base), &path, ctx)?;
        overrides.push((pattern, matcher, o_on.then_some(s)));
    }
    Ok(LearnRules::new(on.then_some(base), overrides))
}

fn settings(
    raw: &RawLearn,
    (on, base): (bool, LearnSettings),
    path: &str,
    ctx: &Ctx,
) -> Result<(bool, LearnSettings), ConfigError> {
    let mut s = base;
    let whole = |v: i64, key: &str, min: i64, max: i64| -> Result<usize, ConfigError> {
        if v < min || v > max {
            return Err(ctx.invalid(
                format!("{path}.{key}"),
                format!("must be a whole number from {min} to {max} (got {v})"),
            ));
        }
        Ok(v as usize)
    };
    let positive = |v: f64, key: &str| -> Result<f64, ConfigError> {
        if v.is_finite() && v > 0.0 {
            Ok(v)
        } else {
            Err(ctx.invalid(
                format!("{path}.{key}"),
                format!("must be a number > 0 (got {v})"),
            ))
        }
    };
    if let Some(v) = raw.window {
        s.window = whole(v, "window", 20, MAX_WINDOW)?;
    }
    if let Some(v) = raw.every_s {
        s.every_s = positive(v, "every_s")?;
    }
    if let Some(v) = raw.min_samples {
        s.min_samples = whole(v, "min_samples", 10, MAX_WINDOW)?;
    }
    if let Some(v) = raw.min_gain {
        if !(v.is_finite() && v >= 0.0) {
            return Err(ctx.invalid(
                format!("{path}.min_gain"),
                format!("must be nats >= 0 (got {v})"),
            ));
        }
        s.min_gain = v;
    }
    if let Some(v) = raw.max_factor {
        if !(v.is_finite() && v > 1.0) {
            return Err(ctx.invalid(
                format!("{path}.max_factor"),
                format!("must be a factor > 1 (got {v})"),
            ));
        }
        s.max_factor = v;
    }
    if let Some(v) = raw.margin {
        s.margin = whole(v, "margin", 0, 10_000)?;
    }
    if s.min_samples > s.window {
        return Err(ctx.invalid(
            format!("{path}.min_samples"),
            format!(
                "{} is more than the window ({} samples): no fit would ever run",
                s.min_samples, s.window
            ),
        ));
    }
    Ok((raw.enabled.unwrap_or(on), s))
}

#[cfg(test)]
mod tests {
    use crate::config::Config;

    const CHANNELS: &str =
        "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.25\nlevel_var = 0.01\n";

    fn load(text: &str) -> Result<Config, String> {
        Config::from_str(&format!("{CHANNELS}{text}"), "r.toml").map_err(|e| e.to_string())
    }

    #[test]
    fn off_unless_enabled_and_overrides_inherit() {
        assert!(load("").unwrap().channels.learn.settings_for("x").is_none());
        let c = load(
            "[reestimate]\nwindow = 500\nmin_samples = 100\n\
             [[reestimate.override]]\nmatch = \"TT-*\"\nenabled = true\nevery_s = 60\n",
        )
        .unwrap();
        let rules = &c.channels.learn;
        assert!(rules.settings_for("FT-201").is_none());
        let s = rules.settings_for("TT-101").unwrap();
        assert_eq!((s.window, s.min_samples, s.every_s), (500, 100, 60.0));
    }

    #[test]
    fn a_table_without_parameters_learns_and_a_partial_one_is_an_error() {
        let c = Config::from_str(
            "[channels.default]\nmodel = \"trend\"\ninterval = 5.0\n\
             [[channels.override]]\nmatch = \"TT-*\"\nmodel = \"lag\"\ninterval = 10.0\nmean = 70.0\n\
             tau = 300.0\nstate_var = 0.1\nobs_var = 0.04\n",
            "r.toml",
        )
        .unwrap();
        assert_eq!(
            c.channels.learning_for("LT-301"),
            Some(crate::model::ModelKind::Trend)
        );
        assert_eq!(c.channels.learning_for("TT-101"), None);
        let m = Config::from_str(
            "[channels.default]\nmodel = \"level\"\ninterval = 5.0\nobs_var = 1.0\n",
            "r.toml",
        )
        .unwrap_err()
        .to_string();
        assert!(
            m.starts_with("r.toml: channels.default.level_var: missing"),
            "{m}"
        );
    }

    #[test]
    fn mistakes_name_the_key() {
        for (text, expected) in [
            (
                "[reestimate]\nwindw = 3\n",
                "r.toml: reestimate.windw: unknown field",
            ),
            (
                "[reestimate]\nwindow = 5\n",
                "r.toml: reestimate.window: must be a whole number from 20",
            ),
            (
                "[reestimate]\nmax_factor = 1.0\n",
                "r.toml: reestimate.max_factor: must be a factor > 1",
            ),
            (
                "[reestimate]\nevery_s = 0\n",
                "r.toml: reestimate.every_s: must be a number > 0",
            ),
            (
                "[reestimate]\nwindow = 100\nmin_samples = 200\n",
                "r.toml: reestimate.min_samples: 200 is more",
            ),
        ] {
            let m = load(text).expect_err(text);
            assert!(
                m.starts_with(expected),
                "{text}\nexpected {expected}\ngot {m}"
            );
        }
    }
}
