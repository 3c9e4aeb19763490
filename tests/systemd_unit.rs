//! Guards `systemd/gaugewise.service`: the keys the daemon's supervision and hardening rely on must stay in the
//! unit, so an edit cannot silently drop `Type=notify`, the watchdog or a sandboxing line. The unit is parsed with a
//! small INI reader here (sections, `Key=Value`, comments, backslash continuations, repeated keys), enough for
//! systemd's syntax as this file uses it; `systemd-analyze verify` remains the full check (README).

use std::collections::BTreeMap;

/// Section -> key -> every assignment in file order (systemd lets most keys repeat, and an empty one resets).
type Unit = BTreeMap<String, BTreeMap<String, Vec<String>>>;

fn parse(text: &str) -> Result<Unit, String> {
    let mut unit = Unit::new();
    let mut section: Option<String> = None;
    let mut pending = String::new();
    for (n, raw) in text.lines().enumerate() {
        let line = raw.trim();
        if pending.is_empty() && (line.is_empty() || line.starts_with('#') || line.starts_with(';'))
        {
            continue;
        }
        if let Some(cont) = line.strip_suffix('\\') {
            pending.push_str(cont);
            pending.push(' ');
            continue;
        }
        let line = format!("{pending}{line}");
        pending.clear();
        if let Some(name) = line.strip_prefix('[').and_then(|l| l.strip_suffix(']')) {
            section = Some(name.to_string());
            unit.entry(name.to_string()).or_default();
            continue;
        }
        let Some(s) = &section else {
            return Err(format!("line {}: assignment before any section", n + 1));
        };
        let Some((key, value)) = line.split_once('=') else {
            return Err(format!("line {}: not a Key=Value line: {line:?}", n + 1));
        };
        let key = key.trim();
        if key.is_empty() || !key.chars().all(|c| c.is_ascii_alphanumeric()) {
            return Err(format!("line {}: bad key {key:?}", n + 1));
        }
        unit.get_mut(s)
            .expect("section was inserted when it opened")
            .entry(key.to_string())
            .or_default()
            .push(value.trim().to_string());
    }
    if !pending.is_empty() {
        return Err("file ends inside a continued line".to_string());
    }
    Ok(unit)
}

fn unit() -> Unit {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/systemd/gaugewise.service");
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{path}: {e}"));
    parse(&text).unwrap_or_else(|e| panic!("{path}: {e}"))
}

/// The effective value of a single-valued key: the last assignment wins.
fn last<'a>(unit: &'a Unit, section: &str, key: &str) -> &'a str {
    unit.get(section)
        .and_then(|s| s.get(key))
        .and_then(|v| v.last())
        .unwrap_or_else(|| panic!("[{section}] {key}= is missing"))
}

fn all<'a>(unit: &'a Unit, section: &str, key: &str) -> &'a [String] {
    unit.get(section)
        .and_then(|s| s.get(key))
        .map(Vec::as_slice)
        .unwrap_or_else(|| panic!("[{section}] {key}= is missing"))
}

/// systemd time spans as used in the unit: "30s", "1min", "1min 30s", or plain seconds.
fn seconds(span: &str) -> f64 {
    let mut total = 0.0;
    for part in span.split_whitespace() {
        let digits = part
            .find(|c: char| !c.is_ascii_digit() && c != '.')
            .unwrap_or(part.len());
        let (num, unit) = part.split_at(digits);
        let num: f64 = num
            .parse()
            .unwrap_or_else(|_| panic!("bad time span {span:?}"));
        let scale = match unit {
            "" | "s" | "sec" => 1.0,
            "ms" | "msec" => 1e-3,
            "m" | "min" => 60.0,
            "h" | "hr" => 3600.0,
            _ => panic!("unknown unit in time span {span:?}"),
        };
        total += num * scale;
    }
    total
}

#[test]
fn parser_handles_the_syntax_it_claims() {
    let u = parse("# c\n; c\n[A]\nK=1\nK=\nL=a \\\n  b\n[B]\nM = x=y\n").unwrap();
    assert_eq!(u["A"]["K"], vec!["1", ""]);
    // systemd replaces the backslash by a space and keeps the text before it as written.
    assert_eq!(u["A"]["L"], vec!["a  b"]);
    assert_eq!(u["B"]["M"], vec!["x=y"]);
    assert!(parse("K=1\n").is_err());
    assert!(parse("[A]\nnot an assignment\n").is_err());
    assert!(parse("[A]\nK=1 \\\n").is_err());
    assert_eq!(seconds("30s"), 30.0);
    assert_eq!(seconds("1min 30s"), 90.0);
    assert_eq!(seconds("45"), 45.0);
}

#[test]
fn only_known_sections() {
    let u = unit();
    let sections: Vec<&str> = u.keys().map(String::as_str).collect();
    assert_eq!(sections, vec!["Install", "Service", "Unit"]);
}

#[test]
fn supervision_notify_watchdog_restart() {
    let u = unit();
    assert_eq!(last(&u, "Service", "Type"), "notify");
    assert_eq!(last(&u, "Service", "NotifyAccess"), "main");
    let watchdog = seconds(last(&u, "Service", "WatchdogSec"));
    assert!(
        watchdog >= 2.0,
        "WatchdogSec={watchdog}s leaves no room for the event loop's pings"
    );
    assert_eq!(last(&u, "Service", "Restart"), "on-failure");
    // Exit code 2 means bad configuration or input (README, "Bad input"): a restart cannot fix it.
    assert_eq!(last(&u, "Service", "RestartPreventExitStatus"), "2");
    // The daemon promises to exit within 5 s of SIGTERM; systemd must give it at least that.
    assert!(seconds(last(&u, "Service", "TimeoutStopSec")) > 5.0);
    assert_eq!(last(&u, "Install", "WantedBy"), "multi-user.target");
    assert!(all(&u, "Unit", "After")
        .iter()
        .any(|v| v.contains("network-online.target")));
    assert!(all(&u, "Unit", "Wants")
        .iter()
        .any(|v| v.contains("network-online.target")));
}

#[test]
fn commands_and_directories() {
    let u = unit();
    let start: Vec<&str> = last(&u, "Service", "ExecStart")
        .split_whitespace()
        .collect();
    assert_eq!(
        start,
        vec![
            "/usr/local/bin/gaugewise",
            "run",
            "--config",
            "${CONFIGURATION_DIRECTORY}/gaugewise.toml"
        ]
    );
    assert_eq!(last(&u, "Service", "ExecReload"), "/bin/kill -HUP $MAINPID");
    assert_eq!(last(&u, "Service", "StateDirectory"), "gaugewise");
    assert_eq!(last(&u, "Service", "ConfigurationDirectory"), "gaugewise");
    assert_eq!(last(&u, "Service", "StateDirectoryMode"), "0700");
}

#[test]
fn hardening_keys_are_present() {
    let u = unit();
    for (key, value) in [
        ("DynamicUser", "yes"),
        ("NoNewPrivileges", "yes"),
        ("ProtectSystem", "strict"),
        ("ProtectHome", "yes"),
        ("PrivateTmp", "yes"),
        ("PrivateDevices", "yes"),
        ("PrivateUsers", "yes"),
        ("ProtectKernelTunables", "yes"),
        ("ProtectKernelModules", "yes"),
        ("ProtectKernelLogs", "yes"),
        ("ProtectControlGroups", "yes"),
        ("ProtectClock", "yes"),
        ("ProtectHostname", "yes"),
        ("ProtectProc", "invisible"),
        ("ProcSubset", "pid"),
        ("RestrictNamespaces", "yes"),
        ("RestrictRealtime", "yes"),
        ("RestrictSUIDSGID", "yes"),
        ("MemoryDenyWriteExecute", "yes"),
        ("LockPersonality", "yes"),
        ("SystemCallArchitectures", "native"),
        ("UMask", "0077"),
    ] {
        assert_eq!(last(&u, "Service", key), value, "{key}=");
    }
    // An empty CapabilityBoundingSet= drops every capability; a later non-empty line would add some back.
    assert_eq!(all(&u, "Service", "CapabilityBoundingSet"), [""]);
    assert_eq!(last(&u, "Service", "AmbientCapabilities"), "");

    let mut families: Vec<&str> = all(&u, "Service", "RestrictAddressFamilies")
        .iter()
        .flat_map(|v| v.split_whitespace())
        .collect();
    families.sort();
    assert_eq!(families, vec!["AF_INET", "AF_INET6", "AF_UNIX"]);

    let filters = all(&u, "Service", "SystemCallFilter");
    assert!(
        filters.first().is_some_and(|f| f == "@system-service"),
        "{filters:?}"
    );
    assert!(
        !filters.iter().any(String::is_empty),
        "an empty SystemCallFilter= resets the filter: {filters:?}"
    );
}
