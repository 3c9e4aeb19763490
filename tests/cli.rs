//! The `gaugewise` binary end to end: `fit` and `replay` on the bundled example, and every kind of bad input
//! ending in exit code 2 with one line on stderr that names the problem (never a panic).

use gaugewise::config::Config;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(args)
        .current_dir(root())
        .output()
        .expect("binary runs")
}

fn stdout(o: &Output) -> String {
    String::from_utf8(o.stdout.clone()).expect("stdout is UTF-8")
}

fn stderr(o: &Output) -> String {
    String::from_utf8(o.stderr.clone()).expect("stderr is UTF-8")
}

/// Runs and expects success; returns stdout.
fn ok(args: &[&str]) -> String {
    let o = run(args);
    assert!(
        o.status.success(),
        "{args:?} failed with {:?}: {}",
        o.status.code(),
        stderr(&o)
    );
    assert!(!stderr(&o).contains("panicked"), "{}", stderr(&o));
    stdout(&o)
}

/// Runs and expects exit code 2 with a one-line `error: ...` message containing every one of `needles`.
fn bad_input(args: &[&str], needles: &[&str]) {
    let o = run(args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: stderr {err}");
    assert!(!err.contains("panicked"), "{args:?}: {err}");
    assert_eq!(err.lines().count(), 1, "{args:?}: not one line: {err}");
    assert!(err.starts_with("error: "), "{args:?}: {err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: '{n}' not in: {err}");
    }
}

/// A file in a fresh temporary directory (kept alive by the returned guard).
fn temp_file(name: &str, text: &str) -> (tempfile::TempDir, String) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join(name);
    std::fs::write(&path, text).unwrap();
    (dir, path.display().to_string())
}

fn example() -> String {
    root()
        .join("config/examples/vessel_temperature.csv")
        .display()
        .to_string()
}

const MODELS: [&str; 4] = ["level", "lag", "trend", "arma(1,1)"];

#[test]
fn fit_bundled_example_table() {
    let out = ok(&["fit"]);
    assert!(
        out.starts_with("TT-101: n=2000 values, "),
        "header line: {out}"
    );
    for m in MODELS {
        assert!(
            out.lines().any(|l| l.starts_with(&format!("{m} "))),
            "{m} missing:\n{out}"
        );
    }
    for col in [
        "parameters",
        "loglik",
        "AIC",
        "BIC",
        "Ljung-Box p",
        "verdict",
    ] {
        assert!(out.contains(col), "{col} missing:\n{out}");
    }
    assert_eq!(out.matches(" best").count(), 1, "{out}");
    assert!(out.contains("common sample") && out.contains("advisory"));
}

#[test]
fn fit_json_layout() {
    let out = ok(&["fit", "--format", "json"]);
    assert_eq!(out.trim_end().lines().count(), 1, "one document");
    let v: Value = serde_json::from_str(&out).unwrap();
    let top: Vec<&str> = v.as_object().unwrap().keys().map(|s| s.as_str()).collect();
    assert!(out.starts_with("{\"n\":2000,\"missing\":"), "{out}");
    for k in [
        "n",
        "missing",
        "interval",
        "models",
        "best",
        "common_skip",
        "correlogram",
    ] {
        assert!(top.contains(&k), "{k} missing: {top:?}");
    }
    assert_eq!(top.len(), 7, "{top:?}");
    assert_eq!(v["common_skip"], 2);
    assert!((v["interval"].as_f64().unwrap() - 10.0).abs() < 1e-9);
    let models = v["models"].as_array().unwrap();
    let names: Vec<&str> = models
        .iter()
        .map(|m| m["model"].as_str().unwrap())
        .collect();
    for m in MODELS {
        assert!(names.contains(&m), "{m} not in {names:?}");
    }
    let fields = [
        "model",
        "params",
        "loglik",
        "aic",
        "bic",
        "ljung_box",
        "converged",
        "loglik_common",
        "aic_common",
        "bic_common",
        "n_diffuse",
        "boundary",
        "failure",
    ];
    let param_names = |m: &str| -> &[&str] {
        match m {
            "level" => &["obs_var", "level_var"],
            "lag" => &["mean", "phi", "tau", "state_var", "obs_var"],
            "trend" => &["obs_var", "level_var", "slope_var"],
            _ => &["mean", "ar", "ma", "var"],
        }
    };
    for m in models {
        let obj = m.as_object().unwrap();
        assert_eq!(obj.len(), fields.len(), "{m}");
        for f in fields {
            assert!(obj.contains_key(f), "{f} missing in {m}");
        }
        if m["converged"] == true {
            let p = m["params"].as_object().unwrap();
            let want = param_names(m["model"].as_str().unwrap());
            assert_eq!(p.len(), want.len(), "{m}");
            for k in want {
                assert!(p.contains_key(*k), "{k} missing in {m}");
            }
            for k in ["lag", "q", "p"] {
                assert!(m["ljung_box"][k].is_number(), "{m}");
            }
            assert!(m["aic_common"].is_number() && m["failure"].is_null());
        } else {
            assert!(m["params"].is_null() && m["aic_common"].is_null());
        }
    }
    let lag = models.iter().find(|m| m["model"] == "lag").unwrap();
    let (phi, tau) = (
        lag["params"]["phi"].as_f64().unwrap(),
        lag["params"]["tau"].as_f64().unwrap(),
    );
    assert!((phi - (-10.0 / tau).exp()).abs() < 1e-12);
    let best = v["best"].as_str().unwrap();
    assert!(MODELS.contains(&best));
    let lowest = models
        .iter()
        .filter(|m| m["converged"] == true)
        .min_by(|a, b| {
            let x = a["aic_common"].as_f64().unwrap();
            x.total_cmp(&b["aic_common"].as_f64().unwrap())
        })
        .unwrap();
    assert_eq!(lowest["model"], best);
    assert_eq!(models[0]["model"], best, "sorted best first");
}

/// `fit --emit-config` prints an override block; pasted into a config with a default, it gives the channel the
/// fitted model, parameters exactly as the JSON reports them.
#[test]
fn emit_config_round_trips() {
    let out = ok(&["fit", "--emit-config", "--models", "lag"]);
    let block = &out[out.find("# gaugewise fit: best model").expect("block")..];
    let plant = std::fs::read_to_string(root().join("config/plant.toml")).unwrap();
    // Above plant.toml's own TT-101 override, as the comment says (the first match wins).
    let text = format!("{block}\n{plant}");
    let cfg = Config::from_str(&text, "pasted.toml").unwrap_or_else(|e| panic!("{e}\n{text}"));
    let spec = cfg.channels.model_for("TT-101");
    assert_eq!(spec.kind().to_string(), "lag");

    let json: Value = serde_json::from_str(&ok(&[
        "fit",
        "--format",
        "json",
        "--emit-config",
        "--models",
        "lag",
    ]))
    .unwrap();
    let config = json["config"].as_str().expect("config field");
    assert_eq!(config, block);
    let p = &json["models"][0]["params"];
    match &spec.params {
        gaugewise::model::ModelParams::Lag {
            mean,
            tau,
            state_var,
            obs_var,
        } => {
            assert_eq!(*mean, p["mean"].as_f64().unwrap());
            assert_eq!(*tau, p["tau"].as_f64().unwrap());
            assert_eq!(*state_var, p["state_var"].as_f64().unwrap());
            assert_eq!(*obs_var, p["obs_var"].as_f64().unwrap());
        }
        other => panic!("{other:?}"),
    }
    assert_eq!(spec.interval, json["interval"].as_f64().unwrap());
}

#[test]
fn fit_chosen_models_with_arma_comma() {
    let out = ok(&["fit", "--models", "level,arma(1,1)", "--input", &example()]);
    let rows: Vec<&str> = out
        .lines()
        .filter(|l| MODELS.iter().any(|m| l.starts_with(&format!("{m} "))))
        .collect();
    assert_eq!(rows.len(), 2, "{out}");
    assert!(rows.iter().any(|l| l.starts_with("level ")));
    assert!(rows.iter().any(|l| l.starts_with("arma(1,1) ")));
}

#[test]
fn fit_named_column_of_a_wide_file() {
    let mut text = String::from("time,a,b\n");
    for i in 0..60 {
        let x = (i as f64 * 0.7).sin() + 0.1 * (i as f64 * 3.1).cos();
        text.push_str(&format!("{},{x},{}\n", i * 10, i % 7));
    }
    let (_dir, path) = temp_file("two.csv", &text);
    bad_input(
        &["fit", "--input", &path],
        &["two.csv", "several value columns (a, b)", "--column"],
    );
    let out = ok(&[
        "fit", "--input", &path, "--column", "a", "--models", "level",
    ]);
    assert!(
        out.starts_with("a: n=60 values, 0 missing, median interval 10 s"),
        "{out}"
    );
}

#[test]
fn replay_plant_config_on_example() {
    let dir = tempfile::tempdir().unwrap();
    let output = dir.path().join("out.csv");
    let o = run(&[
        "replay",
        "--config",
        "config/plant.toml",
        "--input",
        &example(),
        "--output",
        output.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(o.stdout.is_empty());
    let summary = stderr(&o);
    assert_eq!(summary.lines().count(), 1, "{summary}");
    assert!(
        summary.starts_with("replayed 1 channel(s), 2000 rows: "),
        "{summary}"
    );

    let mut rdr = csv::Reader::from_path(&output).unwrap();
    assert_eq!(
        rdr.headers().unwrap().iter().collect::<Vec<_>>(),
        [
            "time",
            "channel",
            "raw",
            "estimate",
            "std",
            "innovation",
            "std_innovation",
            "status",
            "flags"
        ]
    );
    let rows: Vec<csv::StringRecord> = rdr.records().map(|r| r.unwrap()).collect();
    assert_eq!(rows.len(), 2000, "one row per sample");
    let mut previous = f64::NEG_INFINITY;
    let mut missing = 0;
    for r in &rows {
        assert_eq!(&r[1], "TT-101");
        let t: f64 = r[0].parse().unwrap();
        assert!(t > previous);
        previous = t;
        let std: f64 = r[4].parse().unwrap();
        assert!(std > 0.0 && std.is_finite(), "{r:?}");
        assert!(r[3].parse::<f64>().unwrap().is_finite());
        match &r[7] {
            "ok" => {
                assert!(
                    r[2].parse::<f64>().is_ok() && r[6].parse::<f64>().is_ok(),
                    "{r:?}"
                );
            }
            "missing" => {
                missing += 1;
                assert!(
                    r[2].is_empty() && r[5].is_empty() && r[6].is_empty(),
                    "{r:?}"
                );
            }
            s => panic!("unexpected status {s}"),
        }
    }
    assert!(
        summary.contains(&format!(": {missing} missing, 0 rejected")),
        "{summary}"
    );

    // Without --output the same CSV goes to stdout.
    let same = ok(&[
        "replay",
        "--config",
        "config/plant.toml",
        "--input",
        &example(),
    ]);
    assert_eq!(same, std::fs::read_to_string(&output).unwrap());
}

#[test]
fn replay_merges_channels_in_time_order() {
    let text =
        "time,channel,value\n0,TT-101,72\n0,FT-201,12\n5,FT-201,12.5\n10,TT-101,\n10,LT-301,3\n";
    let (_dir, path) = temp_file("long.csv", text);
    let out = ok(&["replay", "--config", "config/plant.toml", "--input", &path]);
    let keys: Vec<(String, String, String)> = out
        .lines()
        .skip(1)
        .map(|l| {
            let c: Vec<&str> = l.split(',').collect();
            (c[0].to_string(), c[1].to_string(), c[7].to_string())
        })
        .collect();
    let want = [
        ("0", "TT-101", "ok"),
        ("0", "FT-201", "ok"),
        ("5", "FT-201", "ok"),
        ("10", "TT-101", "missing"),
        ("10", "LT-301", "ok"),
    ];
    assert_eq!(keys.len(), want.len());
    for (got, want) in keys.iter().zip(want) {
        assert_eq!((got.0.as_str(), got.1.as_str(), got.2.as_str()), want);
    }
}

#[test]
fn bad_history_files() {
    let cases: [(&str, &str, &[&str]); 5] = [
        (
            "fields.csv",
            "time,x\n1,2\n2,3,4\n",
            &["fields.csv", "row 3", "3 fields"],
        ),
        (
            "text.csv",
            "time,x\n1,2\n2,abc\n",
            &["text.csv", "row 3", "column 'x'", "'abc'"],
        ),
        ("empty.csv", "", &["empty.csv", "is empty"]),
        (
            "short.csv",
            "time,x\n1,2\n2,3\n3,5\n4,1\n",
            &["short.csv", "'x'", "4 values", "at least 10"],
        ),
        (
            "back.csv",
            "time,x\n1,2\n3,3\n2,4\n",
            &["back.csv", "row 4", "not after"],
        ),
    ];
    for (name, text, needles) in cases {
        let (_dir, path) = temp_file(name, text);
        bad_input(&["fit", "--input", &path], needles);
        if name != "short.csv" {
            bad_input(
                &["replay", "--config", "config/plant.toml", "--input", &path],
                needles,
            );
        }
    }
}

#[test]
fn constant_series_is_bad_input() {
    let text: String = std::iter::once("time,x\n".to_string())
        .chain((0..30).map(|i| format!("{i},5\n")))
        .collect();
    let (_dir, path) = temp_file("flat.csv", &text);
    bad_input(&["fit", "--input", &path], &["flat.csv", "constant"]);
}

#[test]
fn bad_fit_options() {
    bad_input(
        &["fit", "--column", "TT-999"],
        &["unknown column 'TT-999'", "TT-101"],
    );
    bad_input(
        &["fit", "--time-column", "when"],
        &["unknown column 'when'"],
    );
    bad_input(
        &["fit", "--models", "level,wiggle"],
        &["--models", "'wiggle'"],
    );
    bad_input(&["fit", "--models", "arma(4,1)"], &["--models", "(4,1)"]);
    bad_input(&["fit", "--models", "lag,,level"], &["--models", "empty"]);
    bad_input(&["fit", "--format", "xml"], &["'xml'", "table, json"]);
    bad_input(
        &["fit", "--input", "/nonexistent/h.csv"],
        &["/nonexistent/h.csv", "cannot read"],
    );
    bad_input(&["fit", "--bogus"], &["--bogus"]);
    bad_input(&[], &["no command"]);
}

#[test]
fn bad_configs() {
    let ex = example();
    bad_input(
        &[
            "replay",
            "--config",
            "/nonexistent/plant.toml",
            "--input",
            &ex,
        ],
        &["/nonexistent/plant.toml", "cannot read config"],
    );
    let (_dir, path) = temp_file(
        "typo.toml",
        "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.1\nlevel_vr = 0.01\n",
    );
    bad_input(
        &["replay", "--config", &path, "--input", &ex],
        &["typo.toml", "channels.default.level_vr", "unknown field"],
    );
    let (_dir2, path) = temp_file(
        "unused.toml",
        "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.1\nlevel_var = 0.01\ntau = 3.0\n",
    );
    bad_input(
        &["replay", "--config", &path, "--input", &ex],
        &["unused.toml", "channels.default.tau"],
    );
    bad_input(&["replay", "--input", &ex], &["--config"]);
}

#[test]
fn unwritable_output_is_not_bad_input() {
    let o = run(&[
        "replay",
        "--config",
        "config/plant.toml",
        "--input",
        &example(),
        "--output",
        "/nonexistent/dir/out.csv",
    ]);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    let err = stderr(&o);
    assert_eq!(err.lines().count(), 1);
    assert!(
        err.starts_with("error: cannot create /nonexistent/dir/out.csv"),
        "{err}"
    );
}

#[test]
fn help_mentions_bundled_example() {
    let out = ok(&["fit", "--help"]);
    assert!(out.contains("bundled example"), "{out}");
    assert!(Path::new(&example()).exists());
}

/// The JSON carries the history's correlogram: the same numbers the `stats` module gives (checked there against
/// statsmodels), for the values of the fitted column, and the table shows its first lags.
#[test]
fn fit_reports_the_history_correlogram() {
    let doc: Value =
        serde_json::from_str(&ok(&["fit", "--format", "json", "--models", "level"])).unwrap();
    let c = &doc["correlogram"];
    let lags = c["lags"].as_u64().unwrap() as usize;
    assert_eq!(lags, 20);
    let text =
        std::fs::read_to_string(root().join("config/examples/vessel_temperature.csv")).unwrap();
    let (series, _) = gaugewise::history::read_any(text.as_bytes(), "example", None, None).unwrap();
    let values = &series[0].values;
    let acf = gaugewise::stats::acf(values, lags);
    let pacf = gaugewise::stats::pacf(values, lags);
    for k in 1..=lags {
        assert_eq!(c["acf"][k - 1].as_f64().unwrap(), acf[k], "acf lag {k}");
        assert_eq!(c["pacf"][k - 1].as_f64().unwrap(), pacf[k], "pacf lag {k}");
    }
    let present = values.iter().filter(|v| !v.is_nan()).count();
    assert_eq!(
        c["pacf_band"].as_f64().unwrap(),
        gaugewise::stats::pacf_band(present, 0.05)
    );
    // A slow first-order process: the PACF cuts off after lag 1 or 2 while the ACF decays slowly.
    assert!(acf[1] > 0.8 && acf[5] > 0.6);
    let table = ok(&["fit", "--models", "level"]);
    assert!(table.contains("autocorrelation at lags 1-5: "), "{table}");
}
