//! `gaugewise demo` end to end: the real binary starts its embedded broker, simulated plant and daemon, prints the
//! table, and stops by itself after `--seconds`; at the end it writes the session's HTML report and prints its path.

use scraper::{Html, Selector};
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

#[test]
fn demo_runs_with_nothing_installed_and_stops_on_time() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("session.html");
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["demo", "--seconds", "4", "--report"])
        .arg(&report)
        .env_remove("GAUGEWISE_LOG")
        .env_remove("RUST_LOG")
        .output()
        .expect("run gaugewise demo");
    let elapsed = started.elapsed();
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success(),
        "exit {:?}\n{stdout}\n{stderr}",
        out.status
    );
    assert!(elapsed < Duration::from_secs(15), "took {elapsed:?}");
    assert!(!stderr.contains("panicked"), "{stderr}");
    // The last table lists every simulated tag with a filtered estimate.
    let last = stdout
        .rsplit("gaugewise demo: ")
        .next()
        .expect("at least one table");
    for tag in ["TT-101", "FT-201", "LT-301"] {
        let row = last
            .lines()
            .find(|l| l.starts_with(tag))
            .unwrap_or_else(|| panic!("no row for {tag}:\n{last}"));
        assert!(row.contains(" ± "), "{row}");
    }
    // The raw samples the gateway published came back as outputs; the last few may still be in flight when the
    // demo stops (the daemon stops taking messages first, then drains).
    let summary = stderr
        .lines()
        .find(|l| l.starts_with("demo stopped: "))
        .unwrap_or_else(|| panic!("no summary:\n{stderr}"));
    let numbers: Vec<u64> = summary
        .split(|c: char| !c.is_ascii_digit())
        .filter_map(|w| w.parse().ok())
        .collect();
    assert!(numbers[0] > 10, "{summary}");
    assert!(
        numbers[1] <= numbers[0] && numbers[1] + 10 >= numbers[0],
        "published vs outputs: {summary}"
    );
    // Captured output is not a terminal: plain blocks, no cursor movement, a footer of rates in each.
    assert!(!stdout.contains('\x1b'), "{stdout}");
    assert!(
        last.lines()
            .any(|l| l.starts_with("in ") && l.contains(" samples/s ") && l.contains(" rejects ")),
        "{last}"
    );
    // The report: its path printed last, the file there, valid HTML with a plot per tag and the flag table.
    let printed = stdout
        .lines()
        .rev()
        .find_map(|l| l.strip_prefix("demo report: "))
        .unwrap_or_else(|| panic!("no report path:\n{stdout}"));
    assert_eq!(Path::new(printed), report.as_path());
    let html = std::fs::read_to_string(&report).unwrap();
    let doc = Html::parse_document(&html);
    assert!(doc.errors.is_empty(), "{:?}", doc.errors);
    let plots: Vec<&str> = doc
        .select(&Selector::parse("svg.plot").unwrap())
        .filter_map(|p| p.value().attr("data-plot"))
        .collect();
    assert_eq!(plots, vec!["channel-0", "channel-1", "channel-2"]);
    let channels: Vec<String> = doc
        .select(&Selector::parse("section.channel h2").unwrap())
        .map(|h| h.text().collect())
        .collect();
    assert_eq!(channels, vec!["FT-201", "LT-301", "TT-101"]);
    assert_eq!(
        doc.select(&Selector::parse("table.flag-summary").unwrap())
            .count(),
        1
    );
}

#[test]
fn demo_refuses_a_report_path_it_cannot_write_before_starting() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("no-such-dir").join("session.html");
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["demo", "--seconds", "30", "--report"])
        .arg(&report)
        .output()
        .expect("run gaugewise demo");
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.starts_with("error: cannot write the report ") && stderr.contains("session.html"),
        "{stderr}"
    );
    assert_eq!(stderr.trim().lines().count(), 1, "{stderr}");
    assert!(out.stdout.is_empty());
}

#[test]
fn demo_refuses_a_bad_duration() {
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["demo", "--seconds", "-1"])
        .output()
        .expect("run gaugewise demo");
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(stderr.trim().lines().count(), 1, "{stderr}");
}
