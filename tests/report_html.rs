//! The HTML reports (`html_report`): each is valid HTML holding one SVG per expected plot with the expected series,
//! a 100,000-sample replay report stays under 5 MB, `fit --report` writes one without changing what fit prints, and
//! headless Chromium renders the reports without console errors to a picture that is not blank.
//!
//! The browser test needs `/usr/bin/chromium` (Debian package `chromium`, installed by .ci/run). Without it the
//! test prints a note and passes, unless the environment variable CI is set: on CI a missing browser fails.

use gaugewise::estimate::{compare, Comparison, Data};
use gaugewise::history::{self, Series};
use gaugewise::html_report::{fit_report, replay_report, ChannelTrace, FlagSpan};
use gaugewise::report::{interval_of, single_series, DEFAULT_MODELS};
use scraper::{ElementRef, Html, Selector};
use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const CHROMIUM: &str = "/usr/bin/chromium";
const BROWSER_DEADLINE: Duration = Duration::from_secs(60);
const START: f64 = 1_772_409_600.0;

fn example_path() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("config/examples/vessel_temperature.csv")
}

fn example_fit() -> (Series, Comparison, f64) {
    let (series, _) = history::read_path(&example_path(), None, None).unwrap();
    let series = single_series(series, "example").unwrap();
    let interval = interval_of(&series).unwrap();
    let cmp = compare(
        &Data {
            times: &series.times,
            values: &series.values,
            interval,
        },
        &DEFAULT_MODELS,
    )
    .unwrap();
    (series, cmp, interval)
}

/// A seeded uniform source in [-0.5, 0.5), so the synthetic traces are the same on every run.
struct Noise(u64);

impl Noise {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 / (1u64 << 53) as f64) - 0.5
    }
}

/// A Brackenfield Works channel over `n` one-second samples: a slow wave with noise, dropouts every 97th sample,
/// `flags` flags of three kinds alternating along the trace (the last one still on) and two parameter changes.
fn trace(channel: &str, level: f64, n: usize, flags: usize, seed: u64) -> ChannelTrace {
    let mut noise = Noise(seed);
    let times: Vec<f64> = (0..n).map(|i| START + i as f64).collect();
    let signal: Vec<f64> = (0..n)
        .map(|i| level + 2.0 * (i as f64 / 900.0).sin() + 0.3 * noise.next())
        .collect();
    let raw: Vec<f64> = signal
        .iter()
        .enumerate()
        .map(|(i, s)| {
            if i % 97 == 13 {
                f64::NAN
            } else {
                s + noise.next()
            }
        })
        .collect();
    let std: Vec<f64> = (0..n)
        .map(|i| {
            if i == 0 {
                f64::INFINITY
            } else if i % 97 == 13 {
                0.35
            } else {
                0.2
            }
        })
        .collect();
    let kinds = [
        ("spike", "warning"),
        ("drift", "alarm"),
        ("stuck", "warning"),
    ];
    let spacing = (n / (flags + 1)).max(1) as f64;
    let flags = (0..flags)
        .map(|k| {
            let start = START + spacing * (k as f64 + 0.5);
            let (kind, severity) = kinds[k % kinds.len()];
            FlagSpan {
                kind: kind.into(),
                severity: severity.into(),
                start,
                end: (k + 1 < flags).then_some(start + 0.3 * spacing),
            }
        })
        .collect();
    ChannelTrace {
        channel: channel.into(),
        times,
        raw,
        estimate: signal,
        std,
        flags,
        changes: vec![
            (
                START + n as f64 * 0.4,
                "obs_var 0.04 -> 0.05 (re-estimated)".into(),
            ),
            (
                START + n as f64 * 0.8,
                "level_var 0.010 -> 0.012 (re-estimated)".into(),
            ),
        ],
    }
}

fn plant(n: usize, flags: usize) -> Vec<ChannelTrace> {
    vec![
        trace("TT-101", 72.0, n, flags, 1),
        trace("FT-201", 12.5, n, flags, 2),
        trace("LT-301", 55.0, n, flags, 3),
    ]
}

fn sel(s: &str) -> Selector {
    Selector::parse(s).unwrap()
}

/// Parses a report, insisting on no parse errors, and returns it.
fn parse_valid(html: &str) -> Html {
    let doc = Html::parse_document(html);
    assert!(
        doc.errors.is_empty(),
        "HTML parse errors: {:?}",
        &doc.errors[..doc.errors.len().min(10)]
    );
    assert!(html.starts_with("<!DOCTYPE html>"));
    doc
}

/// The plots of a report, by their data-plot name, each with its series names in drawing order.
fn plots(doc: &Html) -> Vec<(String, Vec<String>)> {
    doc.select(&sel("svg.plot"))
        .map(|svg| {
            let series = svg
                .select(&sel("g.series"))
                .map(|g| g.value().attr("data-series").unwrap_or("").to_string())
                .collect();
            (
                svg.value().attr("data-plot").unwrap_or("").to_string(),
                series,
            )
        })
        .collect()
}

fn series_group<'a>(doc: &'a Html, plot: &str, series: &str) -> ElementRef<'a> {
    doc.select(&sel(&format!(
        "svg.plot[data-plot=\"{plot}\"] g.series[data-series=\"{series}\"]"
    )))
    .next()
    .unwrap_or_else(|| panic!("no series {series} in plot {plot}"))
}

fn count(el: ElementRef, what: &str) -> usize {
    el.select(&sel(what)).count()
}

/// Nothing in a report may reach outside the file: no scripts, no links to load, no external references.
fn self_contained(doc: &Html) {
    assert_eq!(
        doc.select(&sel("script, link, img, iframe, object"))
            .count(),
        0
    );
    assert_eq!(doc.select(&sel("[src], [href]")).count(), 0);
}

#[test]
fn fit_report_has_every_plot_and_series() {
    let (series, cmp, interval) = example_fit();
    let html = fit_report(&series, &cmp, interval, "vessel_temperature.csv").unwrap();
    let doc = parse_valid(&html);
    self_contained(&doc);
    let two = vec!["band".to_string(), "coefficients".to_string()];
    assert_eq!(
        plots(&doc),
        vec![
            (
                "data".to_string(),
                vec!["missing", "band", "raw", "estimate"]
                    .into_iter()
                    .map(String::from)
                    .collect()
            ),
            (
                "innovations".to_string(),
                vec!["bounds".to_string(), "innovations".to_string()]
            ),
            ("acf-data".to_string(), two.clone()),
            ("pacf-data".to_string(), two.clone()),
            ("acf-innovations".to_string(), two.clone()),
            ("pacf-innovations".to_string(), two),
        ]
    );
    // The example has 37 missing values and a gap in time: both are shaded.
    assert!(count(series_group(&doc, "data", "missing"), "rect") >= 2);
    assert!(count(series_group(&doc, "data", "band"), "polygon") >= 1);
    assert!(count(series_group(&doc, "data", "raw"), "polyline") >= 2);
    assert_eq!(count(series_group(&doc, "data", "estimate"), "polyline"), 1);
    assert_eq!(
        count(series_group(&doc, "innovations", "bounds"), "polyline"),
        2
    );
    // One bar per lag.
    let lags = count(series_group(&doc, "acf-data", "coefficients"), "polyline");
    assert_eq!(lags, 20);
    // The comparison table lists every candidate, the best first; the configuration is there, escaped as text.
    let rows: Vec<String> = doc
        .select(&sel("table.models tbody tr td:first-child"))
        .map(|td| td.text().collect())
        .collect();
    assert_eq!(rows.len(), 4, "{rows:?}");
    let best = cmp.best().unwrap().kind.to_string();
    assert_eq!(rows[0], best);
    let config: String = doc
        .select(&sel("pre.config"))
        .next()
        .unwrap()
        .text()
        .collect();
    assert!(config.contains("[[channels.override]]"), "{config}");
    assert!(config.contains("match = \"TT-101\""), "{config}");
    assert!(config.contains(&format!("model = \"{best}\"")), "{config}");
}

#[test]
fn replay_report_has_a_plot_per_channel_and_the_flag_summary() {
    let mut traces = plant(20_000, 7);
    traces[2].channel = "LT-301 <bottom> & \"tank\"".into();
    let html = replay_report(&traces, "Brackenfield Works replay");
    let doc = parse_valid(&html);
    self_contained(&doc);
    let want: Vec<String> = ["flags", "band", "raw", "estimate", "changes"]
        .into_iter()
        .map(String::from)
        .collect();
    let found = plots(&doc);
    assert_eq!(found.len(), 3);
    for (i, (name, series)) in found.iter().enumerate() {
        assert_eq!(name, &format!("channel-{i}"));
        assert_eq!(series, &want);
    }
    // Seven flags, none touching another: seven shaded stretches. Two changes: two lines, two numbers.
    let flags = series_group(&doc, "channel-0", "flags");
    assert_eq!(count(flags, "rect"), 7);
    let changes = series_group(&doc, "channel-0", "changes");
    assert_eq!(count(changes, "polyline"), 2);
    assert_eq!(count(changes, "text"), 2);
    assert!(count(series_group(&doc, "channel-1", "band"), "polygon") >= 1);
    // Summary: per channel, one row per kind (spike, drift, stuck), with counts 3, 2, 2.
    let rows: Vec<Vec<String>> = doc
        .select(&sel("table.flag-summary tbody tr"))
        .map(|tr| {
            tr.select(&sel("td"))
                .map(|td| td.text().collect::<String>().trim().to_string())
                .collect()
        })
        .collect();
    assert_eq!(rows.len(), 9);
    assert_eq!(rows[0][0], "TT-101");
    let tt: Vec<(&str, &str)> = rows[..3]
        .iter()
        .map(|r| (r[1].as_str(), r[3].as_str()))
        .collect();
    assert_eq!(tt, vec![("drift", "2"), ("spike", "3"), ("stuck", "2")]);
    // The last flag (a spike) is still on, and its kind's "last off" says so. Stuck: on at 6,250 s and
    // 13,750 s, 750 s each.
    assert_eq!(rows[1][6], "still on at the end");
    let stuck = &rows[2];
    assert_eq!(stuck[2], "warning");
    assert_eq!(stuck[4], "25.0 min");
    assert_eq!(stuck[5], "2026-03-02 01:44:10");
    assert_eq!(stuck[6], "2026-03-02 04:01:40");
    // Channel names are text, never markup.
    assert_eq!(rows[6][0], "LT-301 <bottom> & \"tank\"");
    assert!(html.contains("LT-301 &lt;bottom&gt; &amp; &quot;tank&quot;"));
    // Per-channel on/off table: one row per flag.
    assert_eq!(doc.select(&sel("table.flags")).count(), 3);
    assert_eq!(
        doc.select(&sel("table.flags"))
            .next()
            .unwrap()
            .select(&sel("tbody tr"))
            .count(),
        7
    );
}

#[test]
fn replay_report_of_100000_samples_is_under_5_mb() {
    // One channel of 100,000 samples with 2,000 flags: the flag edges add kept samples on top of the
    // per-column extremes.
    let traces = vec![trace("TT-101", 72.0, 100_000, 2_000, 7)];
    let html = replay_report(&traces, "Brackenfield Works: 100,000 samples");
    let size = html.len();
    println!("100,000-sample replay report: {size} bytes");
    assert!(size < 5_000_000, "{size} bytes");
    let doc = parse_valid(&html);
    // Downsampled: the raw line holds far fewer points than samples, yet every flag is drawn.
    let points: usize = series_group(&doc, "channel-0", "raw")
        .select(&sel("polyline"))
        .map(|p| {
            p.value()
                .attr("points")
                .unwrap_or("")
                .split_whitespace()
                .count()
        })
        .sum();
    assert!(points < 20_000, "{points} points");
    assert!(points > 1_000, "{points} points");
    assert!(count(series_group(&doc, "channel-0", "flags"), "rect") >= 1_000);
}

#[test]
fn fit_cli_writes_the_report_and_prints_the_same() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("tt101.html");
    let bin = env!("CARGO_BIN_EXE_gaugewise");
    let plain = Command::new(bin).arg("fit").output().unwrap();
    assert!(plain.status.success());
    let with = Command::new(bin)
        .args(["fit", "--report"])
        .arg(&path)
        .output()
        .unwrap();
    assert!(
        with.status.success(),
        "{}",
        String::from_utf8_lossy(&with.stderr)
    );
    assert_eq!(with.stdout, plain.stdout);
    let html = std::fs::read_to_string(&path).unwrap();
    let doc = parse_valid(&html);
    assert_eq!(plots(&doc).len(), 6);

    let bad = dir.path().join("no-such-dir").join("tt101.html");
    let failed = Command::new(bin)
        .args(["fit", "--report"])
        .arg(&bad)
        .output()
        .unwrap();
    assert_eq!(failed.status.code(), Some(1));
    let err = String::from_utf8_lossy(&failed.stderr);
    assert!(
        err.starts_with("error: cannot write the report ") && err.contains("tt101.html"),
        "{err}"
    );
    assert_eq!(err.lines().count(), 1, "{err}");
    assert_eq!(failed.stdout, plain.stdout);
}

/// A Brackenfield Works history for `replay`: TT-101 every 10 s with three single spikes (at rows 50, 53 and 56)
/// and a stuck stretch (rows 120 to 169 repeat row 119), FT-201 healthy, and a configuration for both.
fn faulty_history(dir: &Path) -> (PathBuf, PathBuf) {
    let mut noise = Noise(42);
    let mut normal = || (0..12).map(|_| noise.next()).sum::<f64>();
    let n = 240;
    let mut tt: Vec<f64> = (0..n).map(|_| 70.0 + 0.3 * normal()).collect();
    let ft: Vec<f64> = (0..n).map(|_| 12.0 + 0.3 * normal()).collect();
    for k in [50, 53, 56] {
        tt[k] += 6.0;
    }
    for k in 120..170 {
        tt[k] = tt[119];
    }
    let mut csv = String::from("time,TT-101,FT-201\n");
    for i in 0..n {
        csv.push_str(&format!(
            "{},{},{}\n",
            START + 10.0 * i as f64,
            tt[i],
            ft[i]
        ));
    }
    let input = dir.join("brackenfield.csv");
    std::fs::write(&input, csv).unwrap();
    let config = dir.join("plant.toml");
    std::fs::write(
        &config,
        "[channels.default]\nmodel = \"level\"\ninterval = 10.0\nobs_var = 0.09\nlevel_var = 0.0001\n\n\
         [[channels.override]]\nmatch = \"TT-*\"\nmodel = \"lag\"\ninterval = 10.0\nmean = 70.0\ntau = 300.0\n\
         state_var = 0.001\nobs_var = 0.09\n",
    )
    .unwrap();
    (input, config)
}

#[test]
fn replay_cli_writes_a_report_with_the_flag_spans() {
    let dir = tempfile::tempdir().unwrap();
    let (input, config) = faulty_history(dir.path());
    let path = dir.path().join("replay.html");
    let bin = env!("CARGO_BIN_EXE_gaugewise");
    let replay = |extra: &[&std::ffi::OsStr]| {
        Command::new(bin)
            .arg("replay")
            .arg("--config")
            .arg(&config)
            .arg("--input")
            .arg(&input)
            .args(extra)
            .output()
            .unwrap()
    };
    let plain = replay(&[]);
    assert!(
        plain.status.success(),
        "{}",
        String::from_utf8_lossy(&plain.stderr)
    );
    let with = replay(&["--report".as_ref(), path.as_os_str()]);
    assert!(
        with.status.success(),
        "{}",
        String::from_utf8_lossy(&with.stderr)
    );
    // The report changes nothing else: same CSV, same summary.
    assert_eq!(with.stdout, plain.stdout);
    assert_eq!(with.stderr, plain.stderr);

    let html = std::fs::read_to_string(&path).unwrap();
    let doc = parse_valid(&html);
    self_contained(&doc);
    let found = plots(&doc);
    assert_eq!(
        found.iter().map(|p| p.0.as_str()).collect::<Vec<_>>(),
        vec!["channel-0", "channel-1"]
    );
    // The summary table names the injected faults' kinds on TT-101, each raised once.
    let rows: Vec<Vec<String>> = doc
        .select(&sel("table.flag-summary tbody tr"))
        .map(|tr| {
            tr.select(&sel("td"))
                .map(|td| td.text().collect::<String>().trim().to_string())
                .collect()
        })
        .collect();
    let tt: Vec<(&str, &str, &str)> = rows
        .iter()
        .filter(|r| r[0] == "TT-101" && r.len() == 7)
        .map(|r| (r[1].as_str(), r[2].as_str(), r[3].as_str()))
        .collect();
    assert!(tt.contains(&("spike", "low", "1")), "{rows:?}");
    assert!(tt.contains(&("stuck", "high", "1")), "{rows:?}");
    // Spikes from row 50 (2026-03-02 00:08:20 UTC); the stuck value moves again at row 170 (00:28:20).
    let spike = rows
        .iter()
        .find(|r| r[0] == "TT-101" && r[1] == "spike")
        .unwrap();
    assert_eq!(spike[5], "2026-03-02 00:08:20");
    let stuck = rows
        .iter()
        .find(|r| r[0] == "TT-101" && r[1] == "stuck")
        .unwrap();
    assert_eq!(stuck[6], "2026-03-02 00:28:20");
    // Both spans are shaded on TT-101's plot, and listed in its on/off table.
    assert!(count(series_group(&doc, "channel-0", "flags"), "rect") >= 2);
    let on_off: Vec<String> = doc
        .select(&sel(
            "section#channel-0 table.flags tbody tr td:first-child",
        ))
        .map(|td| td.text().collect())
        .collect();
    assert!(
        on_off.contains(&"spike".to_string()) && on_off.contains(&"stuck".to_string()),
        "{on_off:?}"
    );
    // Every sample is drawn or summarised: the raw line exists and nothing is parameter-changed yet.
    assert!(count(series_group(&doc, "channel-0", "raw"), "polyline") >= 1);
    assert_eq!(
        count(series_group(&doc, "channel-0", "changes"), "polyline"),
        0
    );

    // A report that cannot be written: exit 1, one line, after the CSV as usual.
    let bad = dir.path().join("no-such-dir").join("replay.html");
    let failed = replay(&["--report".as_ref(), bad.as_os_str()]);
    assert_eq!(failed.status.code(), Some(1));
    assert_eq!(failed.stdout, plain.stdout);
    let err = String::from_utf8_lossy(&failed.stderr);
    let last = err.lines().last().unwrap_or("");
    assert!(
        last.starts_with("error: cannot write the report ") && last.contains("replay.html"),
        "{err}"
    );
}

/// What one headless Chromium run left behind.
struct Rendering {
    console: Vec<String>,
    png: PathBuf,
}

/// Renders `html` (a file) to a PNG in headless Chromium, within [`BROWSER_DEADLINE`], and collects the console
/// messages it logged. Every console message counts: the reports have no scripts, so any message is a fault.
fn render(html: &Path, dir: &Path, name: &str) -> Rendering {
    let png = dir.join(format!("{name}.png"));
    let log = dir.join(format!("{name}.log"));
    let profile = dir.join(format!("{name}-profile"));
    let mut child = Command::new(CHROMIUM)
        .args([
            "--headless",
            "--disable-gpu",
            "--no-sandbox",
            "--no-first-run",
            "--no-default-browser-check",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
            "--window-size=1200,1600",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .arg(format!("--screenshot={}", png.display()))
        .arg(format!("file://{}", html.display()))
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(File::create(&log).unwrap())
        .spawn()
        .unwrap();
    let started = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if started.elapsed() > BROWSER_DEADLINE {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within {BROWSER_DEADLINE:?} on {name}");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    let stderr = std::fs::read_to_string(&log).unwrap_or_default();
    assert!(status.success(), "chromium failed on {name}: {stderr}");
    let console = stderr
        .lines()
        .filter(|l| l.contains(":CONSOLE") || l.contains("Uncaught"))
        .map(String::from)
        .collect();
    Rendering { console, png }
}

/// Distinct colours and the share of pixels that differ from the most common colour (the background).
fn pixel_variety(png: &Path) -> (usize, f64) {
    let decoder = png::Decoder::new(std::io::BufReader::new(File::open(png).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut buf).unwrap();
    let channels = info.color_type.samples();
    assert_eq!(info.bit_depth, png::BitDepth::Eight);
    let mut counts = std::collections::HashMap::new();
    for px in buf[..info.buffer_size()].chunks_exact(channels) {
        let rgb = (px[0], px[1 % channels], px[2 % channels]);
        *counts.entry(rgb).or_insert(0usize) += 1;
    }
    let total: usize = counts.values().sum();
    let background = counts.values().copied().max().unwrap_or(0);
    (counts.len(), 1.0 - background as f64 / total.max(1) as f64)
}

#[test]
fn chromium_renders_the_reports() {
    if !Path::new(CHROMIUM).exists() {
        if std::env::var_os("CI").is_some() {
            panic!("{CHROMIUM} is missing on CI: .ci/run installs the Debian package chromium");
        }
        eprintln!("note: {CHROMIUM} not found (Debian package chromium); browser check skipped");
        return;
    }
    let dir = tempfile::tempdir().unwrap();

    // The check must be able to fail: a page that logs an error and throws is caught.
    let control = dir.path().join("control.html");
    std::fs::write(
        &control,
        "<!DOCTYPE html><html><head><title>control</title></head><body><p>control</p>\
         <script>console.error('control message'); throw new Error('control throw');</script></body></html>",
    )
    .unwrap();
    let seen = render(&control, dir.path(), "control");
    assert!(
        seen.console.iter().any(|l| l.contains("Uncaught")),
        "the console check does not see a thrown error: {:?}",
        seen.console
    );

    let (series, cmp, interval) = example_fit();
    let fit = dir.path().join("fit.html");
    std::fs::write(
        &fit,
        fit_report(&series, &cmp, interval, "vessel_temperature.csv").unwrap(),
    )
    .unwrap();
    let replay = dir.path().join("replay.html");
    std::fs::write(
        &replay,
        replay_report(&plant(100_000, 40), "Brackenfield Works replay"),
    )
    .unwrap();
    for (name, path) in [("fit", &fit), ("replay", &replay)] {
        let seen = render(path, dir.path(), name);
        assert!(
            seen.console.is_empty(),
            "{name}: console messages: {:?}",
            seen.console
        );
        let (colours, inked) = pixel_variety(&seen.png);
        println!(
            "{name}: {colours} colours, {:.1}% of pixels not background",
            inked * 100.0
        );
        assert!(colours >= 16, "{name}: only {colours} colours: blank?");
        assert!(inked > 0.03, "{name}: {:.2}% inked: blank?", inked * 100.0);
    }
}
