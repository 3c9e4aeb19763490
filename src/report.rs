//! What `gaugewise fit` shows: a [`Comparison`] from `estimate` turned into a text table, a JSON document, verdicts
//! in plain words, and a ready-to-paste `config` block for the winner. Also the small pieces of input handling that
//! belong to `fit` alone: parsing the `--models` list and picking the one series to fit from a history.
//!
//! Nothing here computes a statistic; every number comes from `estimate`, so the table and the JSON can never
//! disagree with each other or with the library. The binary only chooses which of these to print.

use crate::config;
use crate::estimate::{Comparison, EstimateError, Fit, MIN_OBSERVATIONS};
use crate::history::Series;
use crate::model::{ModelError, ModelKind, ModelParams, ModelSpec};
use crate::stats;
use serde::Serialize;
use thiserror::Error;

/// Candidates fitted when `--models` is not given.
pub const DEFAULT_MODELS: [ModelKind; 4] = [
    ModelKind::Level,
    ModelKind::Lag,
    ModelKind::Trend,
    ModelKind::Arma { p: 1, q: 1 },
];

/// Ljung-Box p-values below this fail the white-noise check in the verdict.
pub const WHITE_NOISE_ALPHA: f64 = 0.05;

/// Why the `fit` inputs could not be used (before any fitting starts).
#[derive(Debug, Error)]
pub enum FitInputError {
    #[error("--models: {0}")]
    Model(#[from] ModelError),
    #[error("--models: empty entry in '{0}' (expected e.g. level,lag,arma(1,1))")]
    EmptyModel(String),
    #[error("--models: '{0}' is listed twice")]
    Duplicate(String),
    #[error("{file} has several value columns ({columns}); choose one with --column")]
    SeveralColumns { file: String, columns: String },
    #[error("{file} has no value column to fit")]
    NoSeries { file: String },
}

/// Parses a comma-separated list of model kinds. Commas inside parentheses belong to the entry, so
/// `level,arma(1,1)` is two models.
pub fn parse_model_list(text: &str) -> Result<Vec<ModelKind>, FitInputError> {
    let mut items = Vec::new();
    let mut depth = 0usize;
    let mut start = 0;
    for (i, c) in text.char_indices() {
        match c {
            '(' => depth += 1,
            ')' => depth = depth.saturating_sub(1),
            ',' if depth == 0 => {
                items.push(&text[start..i]);
                start = i + 1;
            }
            _ => {}
        }
    }
    items.push(&text[start..]);
    let mut kinds = Vec::with_capacity(items.len());
    for item in items {
        if item.trim().is_empty() {
            return Err(FitInputError::EmptyModel(text.to_string()));
        }
        let kind = ModelKind::parse(item)?;
        if kinds.contains(&kind) {
            return Err(FitInputError::Duplicate(kind.to_string()));
        }
        kinds.push(kind);
    }
    Ok(kinds)
}

/// The one series `fit` works on: a history with several value columns needs `--column` to say which.
pub fn single_series(mut series: Vec<Series>, file: &str) -> Result<Series, FitInputError> {
    match series.len() {
        0 => Err(FitInputError::NoSeries {
            file: file.to_string(),
        }),
        1 => Ok(series.remove(0)),
        _ => Err(FitInputError::SeveralColumns {
            file: file.to_string(),
            columns: series
                .iter()
                .map(|s| s.name.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        }),
    }
}

/// A series too short to have a median interval is refused with the estimator's own too-short error, which says
/// what is actually wrong (too few values) rather than that an interval is undefined.
pub fn interval_of(series: &Series) -> Result<f64, EstimateError> {
    crate::history::median_interval(&series.times).ok_or_else(|| EstimateError::TooShort {
        present: series.values.iter().filter(|v| !v.is_nan()).count(),
        needed: MIN_OBSERVATIONS,
    })
}

/// Parameters as `fit` reports them. `lag` adds `phi`, its AR(1) coefficient at the nominal interval, because that
/// is the number an engineer compares with an autocorrelation plot.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum ReportedParams {
    Level {
        obs_var: f64,
        level_var: f64,
    },
    Lag {
        mean: f64,
        phi: f64,
        tau: f64,
        state_var: f64,
        obs_var: f64,
    },
    Trend {
        obs_var: f64,
        level_var: f64,
        slope_var: f64,
    },
    Arma {
        mean: f64,
        ar: Vec<f64>,
        ma: Vec<f64>,
        var: f64,
    },
}

impl ReportedParams {
    pub fn of(spec: &ModelSpec) -> Self {
        match &spec.params {
            ModelParams::Level { obs_var, level_var } => ReportedParams::Level {
                obs_var: *obs_var,
                level_var: *level_var,
            },
            ModelParams::Lag {
                mean,
                tau,
                state_var,
                obs_var,
            } => ReportedParams::Lag {
                mean: *mean,
                phi: ModelSpec::lag_phi(*tau, spec.interval),
                tau: *tau,
                state_var: *state_var,
                obs_var: *obs_var,
            },
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => ReportedParams::Trend {
                obs_var: *obs_var,
                level_var: *level_var,
                slope_var: *slope_var,
            },
            ModelParams::Arma { mean, ar, ma, var } => ReportedParams::Arma {
                mean: *mean,
                ar: ar.clone(),
                ma: ma.clone(),
                var: *var,
            },
        }
    }

    /// `name=value` pairs, four significant digits, for the table.
    pub fn compact(&self) -> String {
        let list = |v: &[f64]| {
            let items: Vec<String> = v.iter().map(|x| sig(*x)).collect();
            format!("[{}]", items.join(","))
        };
        let pairs: Vec<(&str, String)> = match self {
            ReportedParams::Level { obs_var, level_var } => {
                vec![("obs_var", sig(*obs_var)), ("level_var", sig(*level_var))]
            }
            ReportedParams::Lag {
                mean,
                phi,
                tau,
                state_var,
                obs_var,
            } => vec![
                ("mean", sig(*mean)),
                ("phi", sig(*phi)),
                ("tau", sig(*tau)),
                ("state_var", sig(*state_var)),
                ("obs_var", sig(*obs_var)),
            ],
            ReportedParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => vec![
                ("obs_var", sig(*obs_var)),
                ("level_var", sig(*level_var)),
                ("slope_var", sig(*slope_var)),
            ],
            ReportedParams::Arma { mean, ar, ma, var } => {
                let mut v = vec![("mean", sig(*mean))];
                if !ar.is_empty() {
                    v.push(("ar", list(ar)));
                }
                if !ma.is_empty() {
                    v.push(("ma", list(ma)));
                }
                v.push(("var", sig(*var)));
                v
            }
        };
        pairs
            .iter()
            .map(|(k, v)| format!("{k}={v}"))
            .collect::<Vec<_>>()
            .join(" ")
    }
}

/// A number with four significant digits, plain where that stays readable and in exponent form otherwise.
pub fn sig(x: f64) -> String {
    if !x.is_finite() {
        return "-".to_string();
    }
    if x == 0.0 {
        return "0".to_string();
    }
    let mag = x.abs().log10().floor() as i32;
    if (-3..6).contains(&mag) {
        let decimals = (3 - mag).max(0) as usize;
        let s = format!("{x:.decimals$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        let s = format!("{x:.3e}");
        // 1.500e-7 -> 1.5e-7
        match s.split_once('e') {
            Some((m, e)) if m.contains('.') => {
                format!("{}e{e}", m.trim_end_matches('0').trim_end_matches('.'))
            }
            _ => s,
        }
    }
}

/// The verdict on one fit, in words: rank first, then anything that should make an engineer wary of it.
pub fn verdict(fit: &Fit, best: Option<&Fit>) -> String {
    if !fit.converged {
        return format!(
            "not converged: {}",
            fit.failure.as_deref().unwrap_or("no reason given")
        );
    }
    let mut parts = Vec::new();
    match best {
        Some(b) if b.kind == fit.kind => parts.push("best".to_string()),
        Some(b) => parts.push(format!("ΔAIC {:.1}", fit.aic_common - b.aic_common)),
        None => {}
    }
    if let Some(lb) = &fit.ljung_box {
        if lb.p < WHITE_NOISE_ALPHA {
            parts.push(format!("white-noise check failed (p<{WHITE_NOISE_ALPHA})"));
        }
    }
    if !fit.boundary.is_empty() {
        parts.push(format!("variance at zero: {}", fit.boundary.join(", ")));
    }
    parts.join("; ")
}

/// A finite number, or None so that JSON gets `null` rather than an invalid NaN.
fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

#[derive(Debug, Serialize)]
pub struct LjungBoxJson {
    pub lag: usize,
    pub q: Option<f64>,
    pub p: Option<f64>,
}

/// One model in the JSON document; every number is null when the fit did not converge.
#[derive(Debug, Serialize)]
pub struct ModelJson {
    pub model: String,
    pub params: Option<ReportedParams>,
    pub loglik: Option<f64>,
    pub aic: Option<f64>,
    pub bic: Option<f64>,
    pub ljung_box: Option<LjungBoxJson>,
    pub converged: bool,
    pub loglik_common: Option<f64>,
    pub aic_common: Option<f64>,
    pub bic_common: Option<f64>,
    pub n_diffuse: usize,
    pub boundary: Vec<&'static str>,
    pub failure: Option<String>,
}

/// The whole `fit --format json` document. Field order is the documented layout.
#[derive(Debug, Serialize)]
pub struct FitJson {
    pub n: usize,
    pub missing: usize,
    pub interval: f64,
    pub models: Vec<ModelJson>,
    pub best: Option<String>,
    pub common_skip: usize,
    /// Sample ACF and PACF of the history, with their 95% bands: the usual first look for choosing ARMA orders.
    pub correlogram: Option<Correlogram>,
    /// The `--emit-config` block, present only when asked for (null if no model converged).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub config: Option<Option<String>>,
}

impl ModelJson {
    pub fn of(fit: &Fit) -> Self {
        let spec = fit.spec.as_ref().filter(|_| fit.converged);
        let num = |x: f64| spec.and_then(|_| finite(x));
        ModelJson {
            model: fit.kind.to_string(),
            params: spec.map(ReportedParams::of),
            loglik: num(fit.loglik),
            aic: num(fit.aic),
            bic: num(fit.bic),
            ljung_box: spec.and(fit.ljung_box.as_ref()).map(|lb| LjungBoxJson {
                lag: lb.lag,
                q: finite(lb.q),
                p: finite(lb.p),
            }),
            converged: fit.converged,
            loglik_common: num(fit.loglik_common),
            aic_common: num(fit.aic_common),
            bic_common: num(fit.bic_common),
            n_diffuse: fit.n_diffuse,
            boundary: fit.boundary.clone(),
            failure: fit.failure.clone(),
        }
    }
}

/// Sample autocorrelations and partial autocorrelations of a history, lags 1..=`lags`, by sample order (with
/// missing values skipped pairwise, as statsmodels' `missing="conservative"`), and their 95% half-widths:
/// Bartlett's band for the ACF (it widens with the earlier correlations) and 1.96/sqrt(n) for the PACF.
#[derive(Debug, Clone, Serialize)]
pub struct Correlogram {
    pub lags: usize,
    pub acf: Vec<f64>,
    pub acf_band: Vec<f64>,
    pub pacf: Vec<f64>,
    pub pacf_band: f64,
}

/// Lags shown: 20, or a quarter of the values present on a short history; None below 8 values.
pub fn correlogram(values: &[f64]) -> Option<Correlogram> {
    let n = values.iter().filter(|v| v.is_finite()).count();
    if n < 8 {
        return None;
    }
    let lags = (n / 4).min(20);
    let acf = stats::acf(values, lags);
    let band = stats::acf_band(&acf, n, 0.05);
    let pacf = stats::pacf(values, lags);
    Some(Correlogram {
        lags,
        acf: acf[1..].to_vec(),
        acf_band: band[1..].to_vec(),
        pacf: pacf[1..].to_vec(),
        pacf_band: stats::pacf_band(n, 0.05),
    })
}

/// The JSON document for a comparison of models fitted to `values`; `config` is `Some(block)` when
/// `--emit-config` was given.
pub fn to_json(
    cmp: &Comparison,
    interval: f64,
    values: &[f64],
    config: Option<Option<String>>,
) -> FitJson {
    FitJson {
        n: cmp.n,
        missing: cmp.n_missing,
        interval,
        models: cmp.fits.iter().map(ModelJson::of).collect(),
        best: cmp.best().map(|f| f.kind.to_string()),
        common_skip: cmp.common_skip,
        correlogram: correlogram(values),
        config,
    }
}

/// The text report: a header line, the history's first autocorrelations, the aligned table, and a note on how to
/// read it.
pub fn table(cmp: &Comparison, interval: f64, series_name: &str, values: &[f64]) -> String {
    let best = cmp.best();
    let header = [
        "model",
        "parameters",
        "loglik",
        "AIC",
        "BIC",
        "Ljung-Box p",
        "verdict",
    ];
    let mut rows: Vec<[String; 7]> = Vec::with_capacity(cmp.fits.len());
    for f in &cmp.fits {
        let spec = f.spec.as_ref().filter(|_| f.converged);
        let num = |x: f64| match spec {
            Some(_) if x.is_finite() => format!("{x:.2}"),
            _ => "-".to_string(),
        };
        rows.push([
            f.kind.to_string(),
            spec.map_or("-".to_string(), |s| ReportedParams::of(s).compact()),
            num(f.loglik_common),
            num(f.aic_common),
            num(f.bic_common),
            match (&f.ljung_box, spec) {
                (Some(lb), Some(_)) => format!("{:.3}", lb.p),
                _ => "-".to_string(),
            },
            verdict(f, best),
        ]);
    }
    let width = |i: usize| {
        rows.iter()
            .map(|r| r[i].chars().count())
            .chain(std::iter::once(header[i].chars().count()))
            .max()
            .unwrap_or(0)
    };
    let widths: Vec<usize> = (0..header.len()).map(width).collect();
    // Text columns read left-aligned, numbers right-aligned so their decimal points line up.
    let numeric = [false, false, true, true, true, true, false];
    let line = |cells: &[String]| {
        let mut s = String::new();
        for (i, c) in cells.iter().enumerate() {
            let pad = widths[i].saturating_sub(c.chars().count());
            if i > 0 {
                s.push_str("  ");
            }
            if numeric[i] {
                s.push_str(&" ".repeat(pad));
                s.push_str(c);
            } else {
                s.push_str(c);
                if i + 1 < cells.len() {
                    s.push_str(&" ".repeat(pad));
                }
            }
        }
        s.push('\n');
        s
    };
    let mut out = format!(
        "{series_name}: n={} values, {} missing, median interval {} s\n\n",
        cmp.n,
        cmp.n_missing,
        sig(interval)
    );
    if let Some(c) = correlogram(values) {
        let first = |v: &[f64]| {
            v.iter()
                .take(5)
                .map(|r| format!("{r:.2}"))
                .collect::<Vec<_>>()
                .join(" ")
        };
        out.push_str(&format!(
            "autocorrelation at lags 1-5: {} (95% band ±{:.2} at lag 1); partial: {} (±{:.2})\n\n",
            first(&c.acf),
            c.acf_band[0],
            first(&c.pacf),
            c.pacf_band
        ));
    }
    out.push_str(&line(&header.map(String::from)));
    out.push_str(&line(
        &widths.iter().map(|w| "-".repeat(*w)).collect::<Vec<_>>(),
    ));
    for r in &rows {
        out.push_str(&line(r));
    }
    out.push('\n');
    out.push_str(&note(cmp.common_skip));
    out
}

fn note(common_skip: usize) -> String {
    format!(
        "loglik, AIC and BIC are on the common sample: every model is scored on the same observations, those\n\
         after the first {common_skip} present value(s), which diffuse models (level, trend) spend on their initial\n\
         state. Ranked by that AIC, lowest first. Ljung-Box tests the standardised innovations for leftover\n\
         autocorrelation (p<{WHITE_NOISE_ALPHA} fails). gaugewise is advisory: check the model against the process.\n"
    )
}

/// Characters a globset pattern treats specially, escaped as one-character classes so that a channel name used
/// as a `match` pattern matches that name only.
pub fn glob_literal(name: &str) -> String {
    let mut out = String::with_capacity(name.len());
    for c in name.chars() {
        match c {
            '*' | '?' | '[' | ']' | '{' | '}' | '\\' => {
                out.push('[');
                out.push(c);
                out.push(']');
            }
            c => out.push(c),
        }
    }
    out
}

/// A `[[channels.override]]` block running `spec` on the channel `channel`, to paste into a config before any
/// broader pattern (the first matching override wins).
pub fn emit_config(spec: &ModelSpec, channel: &str) -> String {
    let mut out = format!(
        "# gaugewise fit: best model for '{}'. Paste into the [channels] config, above broader patterns.\n",
        channel.replace(['\n', '\r'], " ")
    );
    out.push_str(&config::model_to_toml(
        spec,
        "channels.override",
        Some(&glob_literal(channel)),
    ));
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::estimate::{compare, Data};
    use crate::stats::LjungBox;

    fn series_fit(kind: ModelKind, aic_common: f64) -> Fit {
        let spec = ModelSpec {
            interval: 10.0,
            params: match kind {
                ModelKind::Level => ModelParams::Level {
                    obs_var: 0.04,
                    level_var: 0.01,
                },
                ModelKind::Lag => ModelParams::Lag {
                    mean: 72.5,
                    tau: 300.0,
                    state_var: 0.015,
                    obs_var: 0.04,
                },
                ModelKind::Trend => ModelParams::Trend {
                    obs_var: 0.04,
                    level_var: 0.0,
                    slope_var: 1e-8,
                },
                ModelKind::Arma { .. } => ModelParams::Arma {
                    mean: 72.5,
                    ar: vec![0.95],
                    ma: vec![-0.3],
                    var: 0.05,
                },
            },
        };
        Fit {
            kind,
            spec: Some(spec),
            converged: true,
            failure: None,
            loglik: -aic_common / 2.0,
            k: 3,
            n_obs: 100,
            n_diffuse: kind.n_diffuse(),
            aic: aic_common + 1.0,
            bic: aic_common + 5.0,
            loglik_common: -aic_common / 2.0,
            aic_common,
            bic_common: aic_common + 4.0,
            boundary: Vec::new(),
            ljung_box: Some(LjungBox {
                lag: 10,
                q: 8.0,
                dof: 8,
                p: 0.43,
            }),
            evaluations: 0,
        }
    }

    fn unconverged(kind: ModelKind) -> Fit {
        Fit {
            spec: None,
            converged: false,
            failure: Some("no starting point reached a maximum of the likelihood".into()),
            loglik: f64::NAN,
            aic: f64::NAN,
            bic: f64::NAN,
            loglik_common: f64::NAN,
            aic_common: f64::NAN,
            bic_common: f64::NAN,
            ljung_box: None,
            ..series_fit(kind, 0.0)
        }
    }

    fn comparison() -> Comparison {
        let mut trend = series_fit(ModelKind::Trend, 110.3);
        trend.boundary = vec!["level_var"];
        trend.ljung_box.as_mut().unwrap().p = 0.01;
        Comparison {
            fits: vec![
                series_fit(ModelKind::Lag, 100.0),
                series_fit(ModelKind::Level, 103.2),
                trend,
                unconverged(ModelKind::Arma { p: 1, q: 1 }),
            ],
            common_skip: 2,
            n: 120,
            n_missing: 3,
        }
    }

    #[test]
    fn model_lists_split_outside_parentheses() {
        assert_eq!(
            parse_model_list("level, arma(1,1),lag").unwrap(),
            vec![
                ModelKind::Level,
                ModelKind::Arma { p: 1, q: 1 },
                ModelKind::Lag
            ]
        );
        assert_eq!(
            parse_model_list("ARMA( 2 , 0 )").unwrap(),
            vec![ModelKind::Arma { p: 2, q: 0 }]
        );
        let e = parse_model_list("level,wiggle").unwrap_err().to_string();
        assert_eq!(
            e,
            "--models: unknown model 'wiggle' (expected level, lag, trend or arma(p,q))"
        );
        assert!(parse_model_list("arma(1,1").is_err());
        assert!(parse_model_list("arma(4,0)")
            .unwrap_err()
            .to_string()
            .contains("outside 0..=3"));
        assert!(matches!(
            parse_model_list("level,,lag"),
            Err(FitInputError::EmptyModel(_))
        ));
        assert!(matches!(
            parse_model_list(""),
            Err(FitInputError::EmptyModel(_))
        ));
        assert_eq!(
            parse_model_list("lag,LAG").unwrap_err().to_string(),
            "--models: 'lag' is listed twice"
        );
    }

    #[test]
    fn several_columns_need_a_choice() {
        let s = |name: &str| Series {
            name: name.into(),
            times: vec![0.0],
            values: vec![1.0],
        };
        assert_eq!(single_series(vec![s("a")], "f.csv").unwrap().name, "a");
        assert_eq!(
            single_series(vec![s("a"), s("b")], "f.csv")
                .unwrap_err()
                .to_string(),
            "f.csv has several value columns (a, b); choose one with --column"
        );
    }

    #[test]
    fn short_series_without_interval_is_too_short() {
        let s = Series {
            name: "x".into(),
            times: vec![5.0],
            values: vec![1.0],
        };
        assert_eq!(
            interval_of(&s),
            Err(EstimateError::TooShort {
                present: 1,
                needed: MIN_OBSERVATIONS
            })
        );
    }

    #[test]
    fn significant_digits() {
        assert_eq!(sig(72.49312), "72.49");
        assert_eq!(sig(0.015234), "0.01523");
        assert_eq!(sig(301.26), "301.3");
        assert_eq!(sig(10.0), "10");
        assert_eq!(sig(123456.0), "123456");
        assert_eq!(sig(1.5e-7), "1.5e-7");
        assert_eq!(sig(-2.0e9), "-2e9");
        assert_eq!(sig(0.0), "0");
        assert_eq!(sig(f64::NAN), "-");
    }

    #[test]
    fn verdicts_in_words() {
        let c = comparison();
        let best = c.best();
        assert_eq!(verdict(&c.fits[0], best), "best");
        assert_eq!(verdict(&c.fits[1], best), "ΔAIC 3.2");
        assert_eq!(
            verdict(&c.fits[2], best),
            "ΔAIC 10.3; white-noise check failed (p<0.05); variance at zero: level_var"
        );
        assert_eq!(
            verdict(&c.fits[3], best),
            "not converged: no starting point reached a maximum of the likelihood"
        );
    }

    #[test]
    fn table_lists_every_model_with_header_and_note() {
        let t = table(&comparison(), 10.0, "TT-101", &[]);
        assert!(
            t.starts_with("TT-101: n=120 values, 3 missing, median interval 10 s\n"),
            "{t}"
        );
        for m in ["level", "lag", "trend", "arma(1,1)"] {
            assert!(t.lines().any(|l| l.starts_with(m)), "{m} missing:\n{t}");
        }
        assert!(t.contains("mean=72.5 phi=0.9672 tau=300 state_var=0.015 obs_var=0.04"));
        assert!(t.contains("first 2 present value(s)"));
        assert!(t.contains("advisory"));
        let arma = t.lines().find(|l| l.starts_with("arma")).unwrap();
        assert!(arma.contains("not converged"), "{arma}");
        // Every table line is aligned: the verdict column starts at the same character for all rows.
        let col = |l: &str| l.find("verdict").or_else(|| l.find("best"));
        let head = t.lines().nth(2).unwrap();
        let first = t.lines().nth(4).unwrap();
        assert_eq!(
            col(head).map(|i| head[..i].chars().count()),
            col(first).map(|i| first[..i].chars().count())
        );
    }

    #[test]
    fn json_layout_and_nulls() {
        let doc = to_json(&comparison(), 10.0, &[], None);
        let v = serde_json::to_value(&doc).unwrap();
        let keys: Vec<&str> = v.as_object().unwrap().keys().map(|k| k.as_str()).collect();
        let mut want = vec![
            "n",
            "missing",
            "interval",
            "models",
            "best",
            "common_skip",
            "correlogram",
        ];
        want.sort();
        let mut got = keys.clone();
        got.sort();
        assert_eq!(got, want);
        assert_eq!(v["best"], "lag");
        assert_eq!(v["common_skip"], 2);
        // Too few values for a correlogram: null, not an empty or invented one.
        assert_eq!(v["correlogram"], serde_json::Value::Null);
        let lag = &v["models"][0];
        assert_eq!(lag["model"], "lag");
        assert_eq!(lag["ljung_box"]["lag"], 10);
        assert_eq!(lag["failure"], serde_json::Value::Null);
        let phi = lag["params"]["phi"].as_f64().unwrap();
        assert!((phi - (-10.0f64 / 300.0).exp()).abs() < 1e-12);
        let arma = &v["models"][3];
        assert_eq!(arma["converged"], false);
        for k in ["params", "loglik", "aic", "bic", "ljung_box", "aic_common"] {
            assert!(arma[k].is_null(), "{k}: {}", arma[k]);
        }
        assert!(arma["failure"].is_string());
        // Text serialisation keeps the documented field order.
        let text = serde_json::to_string(&doc).unwrap();
        assert!(text.starts_with(
            "{\"n\":120,\"missing\":3,\"interval\":10.0,\"models\":[{\"model\":\"lag\""
        ));
        let with_config =
            serde_json::to_value(to_json(&comparison(), 10.0, &[], Some(None))).unwrap();
        assert!(with_config["config"].is_null() && with_config.get("config").is_some());
    }

    #[test]
    fn no_converged_model_means_no_best() {
        let c = Comparison {
            fits: vec![unconverged(ModelKind::Level)],
            common_skip: 1,
            n: 20,
            n_missing: 0,
        };
        let v = serde_json::to_value(to_json(&c, 1.0, &[], None)).unwrap();
        assert!(v["best"].is_null());
        assert!(table(&c, 1.0, "x", &[]).contains("not converged"));
    }

    #[test]
    fn emitted_config_round_trips() {
        let c = comparison();
        for fit in &c.fits[..3] {
            let spec = fit.spec.as_ref().unwrap();
            for name in ["TT-101", "odd*name[1]{a,b}?\\"] {
                let block = emit_config(spec, name);
                let text = format!(
                    "{block}\n[channels.default]\nmodel = \"level\"\ninterval = 1.0\nobs_var = 1.0\n\
                     level_var = 1.0\n"
                );
                let cfg = Config::from_str(&text, "emitted.toml")
                    .unwrap_or_else(|e| panic!("{e}\n{text}"));
                assert_eq!(cfg.channels.model_for(name), spec, "{text}");
                assert_eq!(cfg.channels.model_for("TT-1010"), &cfg.channels.default);
                assert_eq!(
                    cfg.channels.model_for("odd-name1a?\\"),
                    &cfg.channels.default
                );
            }
        }
    }

    #[test]
    fn real_comparison_serialises() {
        // A short AR(1) series: the whole path from compare to JSON and table, with whatever converges.
        let mut x = 0.0f64;
        let mut state = 12345u64;
        let mut noise = || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((state >> 11) as f64 / (1u64 << 53) as f64) - 0.5
        };
        let times: Vec<f64> = (0..200).map(|i| i as f64 * 10.0).collect();
        let values: Vec<f64> = (0..200)
            .map(|i| {
                x = 0.9 * x + noise();
                if i % 17 == 5 {
                    f64::NAN
                } else {
                    20.0 + x + 0.2 * noise()
                }
            })
            .collect();
        let data = Data {
            times: &times,
            values: &values,
            interval: 10.0,
        };
        let cmp = compare(&data, &DEFAULT_MODELS).unwrap();
        let text = serde_json::to_string(&to_json(&cmp, 10.0, &[], None)).unwrap();
        let v: serde_json::Value = serde_json::from_str(&text).unwrap();
        assert_eq!(v["models"].as_array().unwrap().len(), 4);
        assert!(table(&cmp, 10.0, "x", &[]).lines().count() > 6);
    }
}
