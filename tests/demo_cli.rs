//! `gaugewise demo` end to end: the real binary starts its embedded broker, simulated plant and daemon, prints the
//! table, and stops by itself after `--seconds`.

use std::process::Command;
use std::time::{Duration, Instant};

#[test]
fn demo_runs_with_nothing_installed_and_stops_on_time() {
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_gaugewise"))
        .args(["demo", "--seconds", "4"])
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
