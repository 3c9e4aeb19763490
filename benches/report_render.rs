//! How long a 100,000-sample replay report takes to make and to render in a browser, and how big it is.
//!
//! `cargo bench --bench report_render` builds replay reports of synthetic Brackenfield Works traces (one channel of
//! 100,000 one-second samples with 200 flags, then three such channels), times `html_report::replay_report`, and
//! renders each report with headless Chromium (`/usr/bin/chromium`) to a screenshot several times. The browser
//! time is the page's own: a copy of the report gets a one-line script that logs, two animation frames after the
//! load event (so after the first paint), the time since navigation started. The report itself has no script. A
//! near-empty page is measured the same way for comparison, and the whole browser run (start-up, render,
//! screenshot) is printed too. Medians of the runs are printed; nothing is asserted.
//!
//! Set GWBENCH_REPORT_DIR to keep the generated reports and screenshots in that directory.

use gaugewise::html_report::{replay_report, ChannelTrace, FlagSpan};
use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const CHROMIUM: &str = "/usr/bin/chromium";
const RUNS: usize = 5;
const START: f64 = 1_772_409_600.0;

fn trace(channel: &str, level: f64, n: usize, flags: usize, seed: u64) -> ChannelTrace {
    let mut state = seed;
    let mut noise = move || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((state >> 11) as f64 / (1u64 << 53) as f64) - 0.5
    };
    let times: Vec<f64> = (0..n).map(|i| START + i as f64).collect();
    let estimate: Vec<f64> = (0..n)
        .map(|i| level + 2.0 * (i as f64 / 900.0).sin() + 0.3 * noise())
        .collect();
    let raw = estimate
        .iter()
        .enumerate()
        .map(|(i, e)| if i % 97 == 13 { f64::NAN } else { e + noise() })
        .collect();
    let std = (0..n)
        .map(|i| if i == 0 { f64::INFINITY } else { 0.2 })
        .collect();
    let spacing = (n / (flags + 1)).max(1) as f64;
    let kinds = ["spike", "drift", "stuck"];
    let flags = (0..flags)
        .map(|k| {
            let start = START + spacing * (k as f64 + 0.5);
            FlagSpan {
                kind: kinds[k % 3].into(),
                severity: "warning".into(),
                start,
                end: Some(start + 0.3 * spacing),
            }
        })
        .collect();
    ChannelTrace {
        channel: channel.into(),
        times,
        raw,
        estimate,
        std,
        flags,
        changes: vec![(START + n as f64 / 2.0, "obs_var 0.04 -> 0.05".into())],
    }
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Added to a copy of each page (the reports themselves have no scripts): two animation frames after the load
/// event the page has been laid out and painted once; it logs the time since navigation started.
const PROBE: &str =
    "<script>window.addEventListener('load',()=>requestAnimationFrame(()=>requestAnimationFrame(\
()=>console.log('gw-painted '+performance.now().toFixed(1)))));</script>";

/// One headless screenshot of `page`: the process's wall time and the page's own time to first paint after load
/// (ms), both in seconds; None if the browser failed, took over 60 s or logged no time.
fn chromium_run(page: &Path, dir: &Path, tag: &str) -> Option<(f64, f64)> {
    let log = dir.join(format!("{tag}.log"));
    let started = Instant::now();
    let mut child = Command::new(CHROMIUM)
        .args([
            "--headless",
            "--disable-gpu",
            "--no-sandbox",
            "--no-first-run",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
            // Tall enough for the whole three-channel report, so all of it is painted.
            "--window-size=1200,4000",
        ])
        .arg(format!(
            "--user-data-dir={}",
            dir.join(format!("{tag}-profile")).display()
        ))
        .arg(format!(
            "--screenshot={}",
            dir.join(format!("{tag}.png")).display()
        ))
        .arg(format!("file://{}", page.display()))
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(File::create(&log).ok()?)
        .spawn()
        .ok()?;
    let wall = loop {
        if let Some(status) = child.try_wait().ok()? {
            if !status.success() {
                return None;
            }
            break started.elapsed().as_secs_f64();
        }
        if started.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            let _ = child.wait();
            return None;
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    let text = std::fs::read_to_string(&log).ok()?;
    let painted = text.split("gw-painted ").nth(1)?;
    let ms: f64 = painted
        .split(|c: char| !(c.is_ascii_digit() || c == '.'))
        .next()?
        .parse()
        .ok()?;
    Some((wall, ms / 1e3))
}

/// Medians of the wall time and the page's paint time over [`RUNS`] runs on a probed copy of `page`.
fn browser_median(page: &Path, dir: &Path, tag: &str) -> Option<(f64, f64)> {
    let html = std::fs::read_to_string(page).ok()?;
    let probed = dir.join(format!("{tag}-probed.html"));
    std::fs::write(&probed, html.replace("</body>", &format!("{PROBE}</body>"))).ok()?;
    // One unmeasured run first: the first start of the browser reads its files from disk.
    chromium_run(&probed, dir, tag)?;
    let runs: Option<Vec<(f64, f64)>> =
        (0..RUNS).map(|_| chromium_run(&probed, dir, tag)).collect();
    let runs = runs?;
    Some((
        median(runs.iter().map(|r| r.0).collect()),
        median(runs.iter().map(|r| r.1).collect()),
    ))
}

fn main() {
    // `cargo bench` passes --bench; `cargo test --benches` runs this too and must stay quick.
    if std::env::args().any(|a| a == "--list" || a == "--test") {
        return;
    }
    let keep = std::env::var_os("GWBENCH_REPORT_DIR").map(PathBuf::from);
    let scratch = tempfile::tempdir().expect("temporary directory");
    let dir = keep.clone().unwrap_or_else(|| scratch.path().to_path_buf());
    std::fs::create_dir_all(&dir).expect("report directory");

    let blank = dir.join("blank.html");
    std::fs::write(
        &blank,
        "<!DOCTYPE html><html><head><title>blank</title></head><body><p>blank</p></body></html>",
    )
    .expect("write blank page");
    let have_browser = Path::new(CHROMIUM).exists();
    let baseline = if have_browser {
        browser_median(&blank, &dir, "blank")
    } else {
        println!("{CHROMIUM} not found (Debian package chromium): browser times skipped");
        None
    };
    if let Some((wall, painted)) = baseline {
        println!(
            "near-empty page: painted {:.0} ms after navigation start; whole chromium run {wall:.3} s \
             (medians of {RUNS})",
            painted * 1e3
        );
    }

    let cases: [(&str, Vec<ChannelTrace>); 2] = [
        (
            "1 channel x 100,000 samples",
            vec![trace("TT-101", 72.0, 100_000, 200, 1)],
        ),
        (
            "3 channels x 100,000 samples",
            vec![
                trace("TT-101", 72.0, 100_000, 200, 1),
                trace("FT-201", 12.5, 100_000, 200, 2),
                trace("LT-301", 55.0, 100_000, 200, 3),
            ],
        ),
    ];
    for (i, (name, traces)) in cases.iter().enumerate() {
        let mut made = Vec::new();
        let mut html = String::new();
        for _ in 0..RUNS {
            let t = Instant::now();
            html = replay_report(traces, "Brackenfield Works replay");
            made.push(t.elapsed().as_secs_f64());
        }
        let page = dir.join(format!("replay-{i}.html"));
        std::fs::write(&page, &html).expect("write report");
        println!(
            "{name}: report {:.2} MB, made in {:.1} ms (median of {RUNS})",
            html.len() as f64 / 1e6,
            median(made) * 1e3
        );
        if baseline.is_some() {
            match browser_median(&page, &dir, &format!("replay-{i}")) {
                Some((wall, painted)) => println!(
                    "{name}: painted {:.0} ms after navigation start; whole chromium run {wall:.3} s",
                    painted * 1e3
                ),
                None => println!("{name}: chromium failed, timed out or logged no time"),
            }
        }
    }
    if let Some(d) = keep {
        println!("reports and screenshots kept in {}", d.display());
    }
}
