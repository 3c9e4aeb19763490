//! `gaugewise check` end to end: the real binary on the example configuration, with environment overrides, and on
//! broken configurations, where it must exit 2 with one line naming the file and the key.

use std::path::PathBuf;
use std::process::{Command, Output};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Runs `gaugewise check --config FILE` with only the given GAUGEWISE_* variables (any in the test's own
/// environment are removed, so a developer's shell cannot change the outcome).
fn check(config: &str, vars: &[(&str, &str)]) -> Output {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_gaugewise"));
    cmd.args(["check", "--config", config]).current_dir(root());
    for (name, _) in std::env::vars_os() {
        if name.to_string_lossy().starts_with("GAUGEWISE_") {
            cmd.env_remove(name);
        }
    }
    cmd.envs(vars.iter().copied());
    cmd.output().expect("binary runs")
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8(bytes.to_vec()).expect("UTF-8")
}

fn ok(config: &str, vars: &[(&str, &str)]) -> String {
    let o = check(config, vars);
    assert!(
        o.status.success(),
        "{config}: exit {:?}: {}",
        o.status.code(),
        text(&o.stderr)
    );
    text(&o.stdout)
}

/// Exit code 2, nothing on stdout, one `error: ` line on stderr containing every needle.
fn bad(config: &str, vars: &[(&str, &str)], needles: &[&str]) -> String {
    let o = check(config, vars);
    let err = text(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{config}: {err}");
    assert!(o.stdout.is_empty(), "{}", text(&o.stdout));
    assert!(!err.contains("panicked"), "{err}");
    assert_eq!(err.lines().count(), 1, "not one line: {err}");
    assert!(err.starts_with("error: "), "{err}");
    for n in needles {
        assert!(err.contains(n), "'{n}' not in: {err}");
    }
    err
}

/// The example configuration with `from` replaced by `to`, in a temporary directory.
fn edited(from: &str, to: &str) -> (tempfile::TempDir, String) {
    let original = std::fs::read_to_string(root().join("config/brackenfield.toml")).unwrap();
    assert!(original.contains(from), "example has no {from:?}");
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("gw.toml");
    std::fs::write(&path, original.replacen(from, to, 1)).unwrap();
    (dir, path.display().to_string())
}

#[test]
fn example_config_checks_and_lists_everything() {
    let out = ok("config/brackenfield.toml", &[]);
    for needle in [
        "config: config/brackenfield.toml (valid)",
        "broker: 127.0.0.1:1883, client id brackenfield-gw-01, persistent session",
        "TLS off",
        "[0] brackenfield/raw/+/+ -> channel {3}, QoS 1, payload json, value \"/v\"",
        "[1] brackenfield/legacy/+ -> channel {2}, QoS 0, payload number",
        "output: brackenfield/clean/{channel}, QoS 0, not retained",
        "status: gaugewise/brackenfield-gw-01/status",
        "limits: at most 100000 channels",
        "  default: level, interval 10.0, obs_var 0.25, level_var 0.01",
        "  override[0] TT-101: lag, interval 10.0, mean 72.5, tau 300.0",
        "  override[1] TT-*: level",
        "  override[2] FT-201: arma(1,1)",
        "  override[3] LT-30?: trend",
    ] {
        assert!(out.contains(needle), "'{needle}' not in:\n{out}");
    }
    // Overrides are listed in the order they are tried.
    let at = |s: &str| out.find(s).unwrap();
    assert!(at("override[0]") < at("override[1]") && at("override[1]") < at("override[3]"));
    assert!(!out.contains("environment:"), "{out}");
}

#[test]
fn environment_overrides_show_in_the_output() {
    let out = ok(
        "config/brackenfield.toml",
        &[
            ("GAUGEWISE_BROKER__PORT", "1884"),
            ("GAUGEWISE_INPUTS__1__QOS", "1"),
            (
                "GAUGEWISE_OUTPUT__TOPIC",
                "brackenfield/estimates/{channel}",
            ),
        ],
    );
    assert!(out.contains("broker: 127.0.0.1:1884,"), "{out}");
    assert!(
        out.contains("[1] brackenfield/legacy/+ -> channel {2}, QoS 1"),
        "{out}"
    );
    assert!(
        out.contains("output: brackenfield/estimates/{channel}"),
        "{out}"
    );
    assert!(
        out.contains("environment: GAUGEWISE_BROKER__PORT -> broker.port"),
        "{out}"
    );
}

#[test]
fn the_password_is_never_printed() {
    let out = ok(
        "config/brackenfield.toml",
        &[("GAUGEWISE_BROKER__PASSWORD", "hunter2-brackenfield")],
    );
    assert!(!out.contains("hunter2"), "{out}");
    assert!(out.contains("user gaugewise, password set"), "{out}");
}

#[test]
fn typo_in_a_key_names_the_key() {
    let (_dir, path) = edited("keep_alive_s = 30", "keep_alive = 30");
    let err = bad(
        &path,
        &[],
        &[
            "gw.toml",
            "broker.keep_alive: unknown field `keep_alive`",
            "line ",
        ],
    );
    assert!(err.contains("expected one of"), "{err}");
}

#[test]
fn unknown_environment_key_names_the_variable() {
    bad(
        "config/brackenfield.toml",
        &[("GAUGEWISE_BROKER__KEEPALIVE_S", "10")],
        &[
            "config/brackenfield.toml: broker.keepalive_s: unknown field",
            "(environment GAUGEWISE_BROKER__KEEPALIVE_S)",
        ],
    );
    bad(
        "config/brackenfield.toml",
        &[("GAUGEWISE_BROKER__PORT", "99999")],
        &[
            "broker.port: must be an integer from 1 to 65535 (got 99999)",
            "(environment GAUGEWISE_BROKER__PORT)",
        ],
    );
}

#[test]
fn missing_broker_names_broker() {
    // config/plant.toml has channels only: fine for replay, not for the daemon.
    bad(
        "config/plant.toml",
        &[],
        &["error: config/plant.toml: broker: missing ("],
    );
    let (_dir, path) = edited("[broker]\n", "[brokers]\n");
    bad(&path, &[], &["gw.toml: brokers: unknown field `brokers`"]);
}

#[test]
fn other_errors_exit_2_with_one_line() {
    let cases: [(&str, &str, &str); 6] = [
        (
            "channel = \"{3}\"",
            "channel = \"{4}\"",
            "inputs[0].channel: {4} names topic level 4",
        ),
        (
            "topic = \"brackenfield/raw/+/+\"",
            "topic = \"brackenfield/raw/#/+\"",
            "inputs[0].topic: ",
        ),
        (
            "topic = \"brackenfield/clean/{channel}\"",
            "topic = \"brackenfield/raw/clean/{channel}\"",
            "output.topic: ",
        ),
        (
            "client_id = \"brackenfield-gw-01\"",
            "",
            "broker.client_id: missing (a persistent session",
        ),
        (
            "# password_file = \"/etc/gaugewise/broker-password\"",
            "password_file = \"no-such-password-file\"",
            "broker.password_file: cannot read ",
        ),
        (
            "tau = 300.0",
            "tau = -300.0",
            "channels.override[0].tau: must be",
        ),
    ];
    for (from, to, needle) in cases {
        let (_dir, path) = edited(from, to);
        bad(&path, &[], &["gw.toml: ", needle]);
    }
    bad("no/such/config.toml", &[], &["no/such/config.toml"]);
}
