//! Fault-detection quality: how often each fault flag fires on clean data against its designed rate, how surely and
//! how soon it catches injected faults, and what the robust update does to the estimate (issue 4, part 4).
//!
//! `cargo bench --bench detect_quality` simulates AR(1)-plus-noise (`lag`, tau 10 s) and local-level (`level`)
//! channels sampled every second, each with an observation noise std of 0.3, 1 and 3 times the process disturbance
//! std, and filters them with their true parameters through `channel::Channel`, the daemon's per-sample path. The
//! parts, each printed as a table:
//! 1. clean data at designed false-alarm rates of 1e-3, 1e-4 and 1e-5 per sample (no delays, no deadband, so an
//!    alarm is one raise): raises per detector against the design, with a Poisson 95% interval;
//! 2. faults injected at a random sample of otherwise clean channels (default design, on/off delays 0): detection
//!    probability within a horizon, median and 95th-percentile delay, false raises before the onset, and the same
//!    at other designed rates for the three faults the targets name; then a noise-free look at why a bias step
//!    hides in a filter that tracks it;
//! 3. dropout: the daemon's stale timer over a silence, and the estimate's std growing through it;
//! 4. the estimate against the true state, with and without the robust update: clean, with spikes, and across a
//!    10-sigma level shift.
//!
//! Then the issue's targets with the measured figure and PASS or MISS. Every random draw comes from a seed fixed by
//! the case (`simulate::Noise`), so a run prints the same figures whatever the thread count. Nothing is asserted:
//! these are figures to read.
//!
//! Settings: `GWBENCH_QUICK=1` (a tenth of the samples and trials, a look in seconds), `GWBENCH_CLEAN_SAMPLES`
//! (clean samples per channel, default 50,000,000), `GWBENCH_TRIALS` (per fault case and channel, default 2,000),
//! `GWBENCH_THREADS` (default: every core).

use gaugewise::channel::{Channel, Outcome};
use gaugewise::detect::{FlagDesign, FlagKind, NoiseThreshold, Threshold};
use gaugewise::model::{ModelParams, ModelSpec};
use gaugewise::simulate::Noise;
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Instant;

/// Seconds between samples: designed rates per sample are then rates per second.
const INTERVAL: f64 = 1.0;
const DAY_S: f64 = 86_400.0;
const MEAN: f64 = 50.0;
/// The lag's time constant: phi = exp(-1/10) = 0.905 per sample.
const TAU: f64 = 10.0;
/// Process disturbance std per sample; the observation noise std is a multiple of it.
const Q_SD: f64 = 1.0;
/// Designed false-alarm probabilities per sample for the clean-data part.
const RATES: [f64; 3] = [1e-3, 1e-4, 1e-5];
/// The default design: 0.1 false alarms per day per detector.
const DEFAULT_PER_DAY: f64 = 0.1;
/// The detectors that run on samples (stale and range are not exercised by continuous in-range data).
const DETECTORS: [FlagKind; 4] = [
    FlagKind::Spike,
    FlagKind::Noise,
    FlagKind::Bias,
    FlagKind::Stuck,
];
/// Samples after a fault's onset within which a raise counts as a detection.
const HORIZON: usize = 200;
/// The onset falls uniformly in [PRE_MIN, PRE_MIN + PRE_SPREAD), so it meets every phase of the noise blocks.
const PRE_MIN: usize = 250;
const PRE_SPREAD: usize = 50;
/// Clean samples skipped at the start of each segment (start-up of the filter and of the first noise block).
const BURN_IN: u64 = 100;
/// Clean data is cut into segments of this many samples, each with its own seed, to share out across cores.
const SEGMENT: u64 = 2_000_000;
/// The daemon's defaults: a channel silent for 60 s is stale, re-reported every 10 s.
const STALE_AFTER_S: f64 = 60.0;
const STALE_EVERY_S: f64 = 10.0;
/// Seconds of silence in the dropout case.
const GAP_S: f64 = 300.0;

#[derive(Debug, Clone, Copy, PartialEq)]
enum Model {
    Lag,
    Level,
}

/// One simulated channel: a model and the ratio of its observation noise std to its process disturbance std.
#[derive(Debug, Clone, Copy)]
struct ChanDef {
    model: Model,
    ratio: f64,
}

const CHANNELS: [ChanDef; 6] = [
    ChanDef {
        model: Model::Lag,
        ratio: 0.3,
    },
    ChanDef {
        model: Model::Lag,
        ratio: 1.0,
    },
    ChanDef {
        model: Model::Lag,
        ratio: 3.0,
    },
    ChanDef {
        model: Model::Level,
        ratio: 0.3,
    },
    ChanDef {
        model: Model::Level,
        ratio: 1.0,
    },
    ChanDef {
        model: Model::Level,
        ratio: 3.0,
    },
];

impl ChanDef {
    fn name(&self) -> String {
        let m = match self.model {
            Model::Lag => "lag",
            Model::Level => "level",
        };
        format!("{m} r={}", self.ratio)
    }

    fn obs_sd(&self) -> f64 {
        self.ratio * Q_SD
    }

    fn phi(&self) -> f64 {
        (-INTERVAL / TAU).exp()
    }

    fn spec(&self) -> ModelSpec {
        let obs_var = self.obs_sd().powi(2);
        ModelSpec {
            interval: INTERVAL,
            params: match self.model {
                Model::Lag => ModelParams::Lag {
                    mean: MEAN,
                    tau: TAU,
                    state_var: Q_SD * Q_SD,
                    obs_var,
                },
                Model::Level => ModelParams::Level {
                    obs_var,
                    level_var: Q_SD * Q_SD,
                },
            },
        }
    }

    fn channel(&self, design: &FlagDesign) -> Channel {
        Channel::with_flags(&self.spec(), design).expect("the bench's models and designs are valid")
    }
}

/// The true signal, without observation noise.
struct Truth {
    model: Model,
    phi: f64,
    mean: f64,
    x: f64,
}

impl Truth {
    fn new(def: &ChanDef, rng: &mut Noise) -> Self {
        let phi = def.phi();
        let x = match def.model {
            // The filter starts from the stationary distribution, so the truth does too.
            Model::Lag => MEAN + rng.normal() * Q_SD / (1.0 - phi * phi).sqrt(),
            Model::Level => MEAN,
        };
        Truth {
            model: def.model,
            phi,
            mean: MEAN,
            x,
        }
    }

    fn advance(&mut self, rng: &mut Noise) {
        let w = Q_SD * rng.normal();
        self.x = match self.model {
            Model::Lag => self.mean + self.phi * (self.x - self.mean) + w,
            Model::Level => self.x + w,
        };
    }

    /// A real process change: the level (for a lag, its mean and the state with it) moves by `d`.
    fn shift(&mut self, d: f64) {
        self.mean += d;
        self.x += d;
    }
}

/// A stream seed from a case's coordinates (splitmix64 over them), so every case draws the same numbers in any
/// order and on any thread.
fn seed(tags: &[u64]) -> u64 {
    let mut s = 0x6761_7567_6577_6973_u64;
    for &t in tags {
        s = s.wrapping_add(t).wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = s;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        s = z ^ (z >> 31);
    }
    s
}

fn random_sign(rng: &mut Noise) -> f64 {
    if rng.uniform() < 0.5 {
        -1.0
    } else {
        1.0
    }
}

/// `f` over `items` on `threads` threads, results in the items' order.
fn par_map<T: Sync, R: Send>(items: &[T], threads: usize, f: impl Fn(&T) -> R + Sync) -> Vec<R> {
    let next = AtomicUsize::new(0);
    let mut slots: Vec<Option<R>> = (0..items.len()).map(|_| None).collect();
    std::thread::scope(|s| {
        let workers: Vec<_> = (0..threads.max(1))
            .map(|_| {
                s.spawn(|| {
                    let mut done = Vec::new();
                    loop {
                        let i = next.fetch_add(1, Ordering::Relaxed);
                        if i >= items.len() {
                            break done;
                        }
                        done.push((i, f(&items[i])));
                    }
                })
            })
            .collect();
        for w in workers {
            for (i, r) in w.join().expect("a bench worker panicked") {
                slots[i] = Some(r);
            }
        }
    });
    slots
        .into_iter()
        .map(|r| r.expect("every item was mapped"))
        .collect()
}

/// The design at `alpha` false alarms per sample for spike, noise and bias; on/off delays 0; the deadband given.
fn design(alpha: f64, deadband: Option<f64>) -> FlagDesign {
    let per_day = alpha * DAY_S / INTERVAL;
    let mut d = FlagDesign {
        spike_threshold: Threshold::PerDay(per_day),
        noise_threshold: NoiseThreshold::PerDay(per_day),
        bias_threshold: Threshold::PerDay(per_day),
        ..FlagDesign::default()
    };
    for a in [
        &mut d.spike,
        &mut d.noise,
        &mut d.bias,
        &mut d.stuck,
        &mut d.stale,
        &mut d.range,
    ] {
        a.on_delay = 0.0;
        a.off_delay = 0.0;
        if let Some(db) = deadband {
            a.deadband = db;
        }
    }
    d
}

fn default_alpha() -> f64 {
    DEFAULT_PER_DAY * INTERVAL / DAY_S
}

/// Steady-state figures of a channel's filter: innovation variance F, gain K, estimate variance.
#[derive(Debug, Clone, Copy)]
struct Steady {
    f: f64,
    k: f64,
    est_var: f64,
}

impl Steady {
    fn sigma(&self) -> f64 {
        self.f.sqrt()
    }
}

fn steady(def: &ChanDef) -> Steady {
    let mut c = def.channel(&FlagDesign::disabled());
    let mut last = None;
    for i in 0..2000 {
        last = c.on_sample(i as f64 * INTERVAL, Some(MEAN)).step;
    }
    let s = last.expect("an observed step");
    let r = def.obs_sd().powi(2);
    Steady {
        f: s.predicted_var,
        // One state observed directly: K = P- / F = (F - R) / F.
        k: (s.predicted_var - r) / s.predicted_var,
        est_var: s.estimate_var,
    }
}

fn raised(o: &Outcome, k: FlagKind) -> bool {
    o.flags.raised.contains(k)
}

/// Exact (Garwood) 95% interval on a Poisson mean from a count.
fn poisson_interval(count: u64) -> (f64, f64) {
    let lo = if count == 0 {
        0.0
    } else {
        ChiSquared::new(2.0 * count as f64)
            .expect("dof > 0")
            .inverse_cdf(0.025)
            / 2.0
    };
    let hi = ChiSquared::new(2.0 * count as f64 + 2.0)
        .expect("dof > 0")
        .inverse_cdf(0.975)
        / 2.0;
    (lo, hi)
}

/// Nearest-rank percentile of sorted values.
fn percentile(sorted: &[u32], p: f64) -> Option<u32> {
    if sorted.is_empty() {
        return None;
    }
    let rank = (p * sorted.len() as f64).ceil().max(1.0) as usize;
    Some(sorted[rank.min(sorted.len()) - 1])
}

fn thousands(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

fn opt(v: Option<u32>) -> String {
    v.map_or_else(|| "-".to_string(), |v| v.to_string())
}

fn verdict(pass: bool) -> &'static str {
    if pass {
        "PASS"
    } else {
        "MISS"
    }
}

struct Settings {
    clean_samples: u64,
    trials: usize,
    rmse_samples: u64,
    noise_blocks: u64,
    threads: usize,
    quick: bool,
}

impl Settings {
    fn from_env() -> Self {
        let quick = std::env::var("GWBENCH_QUICK").is_ok_and(|v| v == "1");
        let num = |key: &str, default: u64| -> u64 {
            std::env::var(key)
                .ok()
                .and_then(|v| v.trim().replace('_', "").parse().ok())
                .filter(|n| *n > 0)
                .unwrap_or(default)
        };
        let scale = if quick { 10 } else { 1 };
        let cores = std::thread::available_parallelism().map_or(2, |n| n.get());
        Settings {
            clean_samples: num("GWBENCH_CLEAN_SAMPLES", 50_000_000 / scale).max(BURN_IN + 1),
            trials: num("GWBENCH_TRIALS", 2_000 / scale) as usize,
            rmse_samples: 1_000_000 / scale,
            noise_blocks: 2_000_000 / scale,
            threads: num("GWBENCH_THREADS", cores as u64) as usize,
            quick,
        }
    }
}

// ---------------------------------------------------------------------------------------------------------------
// Part 1: clean data.

#[derive(Debug, Clone, Copy, Default)]
struct CleanCounts {
    samples: u64,
    /// [design][detector] raises.
    raises: [[u64; 4]; 3],
}

impl CleanCounts {
    fn add(&mut self, o: &CleanCounts) {
        self.samples += o.samples;
        for d in 0..3 {
            for j in 0..4 {
                self.raises[d][j] += o.raises[d][j];
            }
        }
    }
}

fn run_clean(ci: usize, segment: u64, n: u64) -> CleanCounts {
    let def = &CHANNELS[ci];
    let mut rng = Noise::new(seed(&[1, ci as u64, segment]));
    let mut channels: Vec<Channel> = RATES
        .iter()
        .map(|a| def.channel(&design(*a, Some(0.0))))
        .collect();
    let mut truth = Truth::new(def, &mut rng);
    let mut counts = CleanCounts::default();
    let obs_sd = def.obs_sd();
    for i in 0..n {
        if i > 0 {
            truth.advance(&mut rng);
        }
        let y = truth.x + obs_sd * rng.normal();
        let t = i as f64 * INTERVAL;
        for (d, c) in channels.iter_mut().enumerate() {
            let o = c.on_sample(t, Some(y));
            if i >= BURN_IN && !o.flags.raised.is_empty() {
                for (j, k) in DETECTORS.iter().enumerate() {
                    if raised(&o, *k) {
                        counts.raises[d][j] += 1;
                    }
                }
            }
        }
    }
    counts.samples = n.saturating_sub(BURN_IN);
    counts
}

/// Per channel, then pooled (last).
fn part_clean(cfg: &Settings) -> Vec<CleanCounts> {
    let mut jobs = Vec::new();
    for ci in 0..CHANNELS.len() {
        let mut left = cfg.clean_samples;
        let mut segment = 0;
        while left > 0 {
            let n = left.min(SEGMENT);
            // A tail too short to pass its burn-in joins the previous segment's count instead.
            jobs.push((ci, segment, n.max(BURN_IN + 1)));
            left -= n;
            segment += 1;
        }
    }
    let results = par_map(&jobs, cfg.threads, |&(ci, seg, n)| run_clean(ci, seg, n));
    let mut per = vec![CleanCounts::default(); CHANNELS.len() + 1];
    for ((ci, _, _), r) in jobs.iter().zip(&results) {
        per[*ci].add(r);
        per[CHANNELS.len()].add(r);
    }
    per
}

/// The noise detector's block test alone on independent N(0, 1) z at the 1e-3 design: the share of blocks below
/// and above the bounds, and raises per block (a run of alarming blocks is one raise), with samples beyond the spike
/// limit kept in the blocks or left out of them as `detect` does.
fn noise_reference(leave_out: bool, blocks: u64) -> [f64; 3] {
    let s = design(RATES[0], Some(0.0))
        .resolve(INTERVAL)
        .expect("a valid design");
    let mut rng = Noise::new(seed(&[7, u64::from(leave_out)]));
    let (mut low, mut high, mut raises, mut before) = (0_u64, 0_u64, 0_u64, false);
    for _ in 0..blocks {
        let (mut sum, mut n) = (0.0, 0);
        while n < s.noise_window {
            let z = rng.normal();
            if leave_out && z.abs() > s.spike_limit {
                continue;
            }
            sum += z * z;
            n += 1;
        }
        let mean = sum / f64::from(s.noise_window);
        let out = mean < s.noise_low || mean > s.noise_high;
        low += u64::from(mean < s.noise_low);
        high += u64::from(mean > s.noise_high);
        raises += u64::from(out && !before);
        before = out;
    }
    let b = blocks as f64;
    [low as f64 / b, high as f64 / b, raises as f64 / b]
}

fn print_clean(per: &[CleanCounts], reference: &[[f64; 3]]) {
    println!("## 1. Clean data: false alarms against the design");
    println!();
    println!(
        "Designs: spike, noise and bias at alpha false alarms per sample (PerDay(alpha x 86,400) at 1 s), \
         on/off delay 0, deadband 0, stuck window 30 (no designed rate)."
    );
    for a in RATES {
        let s = design(a, Some(0.0))
            .resolve(INTERVAL)
            .expect("a valid design");
        println!(
            "  alpha {a:.0e}: spike |z| > {:.3}; noise block of {} with mean z^2 outside [{:.3}, {:.3}]; \
             bias CUSUM k {:.2}, h {:.3}",
            s.spike_limit, s.noise_window, s.noise_low, s.noise_high, s.cusum_k, s.cusum_h
        );
    }
    let pooled = &per[CHANNELS.len()];
    println!();
    println!(
        "All {} channels pooled: {} samples per design (first {BURN_IN} of every {}-sample segment skipped).",
        CHANNELS.len(),
        thousands(pooled.samples),
        thousands(SEGMENT)
    );
    println!();
    println!(
        "{:<7} {:<8} {:>8} {:>11} {:>11} {:>7} {:>17}",
        "alpha", "detector", "raises", "per 10,000", "designed", "ratio", "ratio 95% CI"
    );
    for (d, a) in RATES.iter().enumerate() {
        for (j, k) in DETECTORS.iter().enumerate().take(3) {
            let n = pooled.raises[d][j];
            let expected = a * pooled.samples as f64;
            let (lo, hi) = poisson_interval(n);
            println!(
                "{:<7} {:<8} {:>8} {:>11.4} {:>11.4} {:>7.3} {:>17}",
                format!("{a:.0e}"),
                k.as_str(),
                n,
                n as f64 / pooled.samples as f64 * 1e4,
                a * 1e4,
                n as f64 / expected,
                format!("[{:.3}, {:.3}]", lo / expected, hi / expected)
            );
        }
    }
    let w = f64::from(FlagDesign::default().noise_window);
    println!(
        "noise at 1e-3, the block test alone on independent N(0, 1) z: {:.4} of blocks below and {:.4} above the \
         bounds (design {:.4} each), {:.4} raises per block (ratio {:.3}: runs of alarming blocks make one raise); \
         with the samples beyond the spike limit left out of the blocks, as detect does: {:.4} below, {:.4} above, \
         ratio {:.3}. Leaving spikes out lowers the block mean, so the upper bound is met less often.",
        reference[0][0],
        reference[0][1],
        RATES[0] * w / 2.0,
        reference[0][2],
        reference[0][2] / (RATES[0] * w),
        reference[1][0],
        reference[1][1],
        reference[1][2] / (RATES[0] * w)
    );
    let stuck: u64 = (0..3).map(|d| pooled.raises[d][3]).sum();
    println!(
        "stuck: {stuck} raises in {} samples (3 designs x {}); a continuous signal never repeats within 5% of \
         its forecast std for 30 samples.",
        thousands(3 * pooled.samples),
        thousands(pooled.samples)
    );
    println!();
    println!("Per channel: ratio of raises to the design (95% CI in brackets).");
    println!();
    print!("{:<12} {:>12}", "channel", "samples");
    for a in RATES {
        for k in DETECTORS.iter().take(3) {
            print!(" {:>20}", format!("{} {a:.0e}", k.as_str()));
        }
    }
    println!(" {:>6}", "stuck");
    for (ci, c) in per.iter().enumerate().take(CHANNELS.len()) {
        print!("{:<12} {:>12}", CHANNELS[ci].name(), thousands(c.samples));
        for (d, a) in RATES.iter().enumerate() {
            for j in 0..3 {
                let n = c.raises[d][j];
                let e = a * c.samples as f64;
                let (lo, hi) = poisson_interval(n);
                print!(
                    " {:>20}",
                    format!("{:.2} [{:.2}, {:.2}]", n as f64 / e, lo / e, hi / e)
                );
            }
        }
        let stuck: u64 = (0..3).map(|d| c.raises[d][3]).sum();
        println!(" {stuck:>6}");
    }
    println!();
}

// ---------------------------------------------------------------------------------------------------------------
// Part 2: injected faults.

#[derive(Debug, Clone, Copy, PartialEq)]
enum Fault {
    /// One sample off by this many sigma (random sign).
    Spike(f64),
    /// Every sample from the onset off by this many sigma.
    Bias(f64),
    /// An offset growing by this many sigma per sample from the onset.
    Drift(f64),
    /// The value frozen at the last one before the onset.
    Stuck,
    /// Observation noise variance times this.
    Noise(f64),
}

const FAULTS: [Fault; 11] = [
    Fault::Spike(4.0),
    Fault::Spike(6.0),
    Fault::Spike(10.0),
    Fault::Bias(1.0),
    Fault::Bias(2.0),
    Fault::Bias(3.0),
    Fault::Drift(0.05),
    Fault::Drift(0.01),
    Fault::Stuck,
    Fault::Noise(2.0),
    Fault::Noise(4.0),
];

impl Fault {
    fn label(&self) -> String {
        match self {
            Fault::Spike(s) => format!("spike {s} sigma"),
            Fault::Bias(b) => format!("bias {b} sigma"),
            Fault::Drift(d) => format!("drift {d} sigma/s"),
            Fault::Stuck => "stuck".to_string(),
            Fault::Noise(c) => format!("noise var x{c}"),
        }
    }

    fn id(&self) -> u64 {
        FAULTS.iter().position(|f| f == self).unwrap_or(99) as u64
    }
}

#[derive(Debug, Clone, Default)]
struct FaultStats {
    trials: u32,
    /// Per detector: delays (samples from the onset) of the trials that detected within the horizon.
    delays: [Vec<u32>; 4],
    pre_raises: [u32; 4],
    pre_samples: u64,
}

impl FaultStats {
    fn add(&mut self, o: &FaultStats) {
        self.trials += o.trials;
        for j in 0..4 {
            self.delays[j].extend_from_slice(&o.delays[j]);
            self.pre_raises[j] += o.pre_raises[j];
        }
        self.pre_samples += o.pre_samples;
    }

    fn finish(&mut self) {
        for d in &mut self.delays {
            d.sort_unstable();
        }
    }

    fn p(&self, j: usize) -> f64 {
        self.delays[j].len() as f64 / f64::from(self.trials.max(1))
    }

    fn cell(&self, j: usize) -> String {
        format!(
            "{:.3} {:>3} {:>3}",
            self.p(j),
            opt(percentile(&self.delays[j], 0.5)),
            opt(percentile(&self.delays[j], 0.95))
        )
    }
}

fn run_faults(ci: usize, fault: Fault, alpha: f64, trials: usize, sigma: f64) -> FaultStats {
    let def = &CHANNELS[ci];
    let design = design(alpha, None);
    let mut stats = FaultStats::default();
    for trial in 0..trials {
        // The same signal for a trial at every designed rate: only the detector's thresholds differ.
        let mut rng = Noise::new(seed(&[2, ci as u64, fault.id(), trial as u64]));
        let onset = PRE_MIN + (rng.uniform() * PRE_SPREAD as f64) as usize;
        let sign = random_sign(&mut rng);
        let mut ch = def.channel(&design);
        let mut truth = Truth::new(def, &mut rng);
        let mut frozen = f64::NAN;
        let mut found = [false; 4];
        for i in 0..onset + HORIZON {
            if i > 0 {
                truth.advance(&mut rng);
            }
            let n = rng.normal();
            let mut y = truth.x + def.obs_sd() * n;
            let since = i.saturating_sub(onset);
            if i >= onset {
                match fault {
                    Fault::Spike(s) if i == onset => y += sign * s * sigma,
                    Fault::Spike(_) => {}
                    Fault::Bias(b) => y += sign * b * sigma,
                    Fault::Drift(d) => y += sign * d * sigma * (since + 1) as f64,
                    Fault::Stuck => y = frozen,
                    Fault::Noise(c) => y = truth.x + c.sqrt() * def.obs_sd() * n,
                }
            } else {
                frozen = y;
            }
            let o = ch.on_sample(i as f64 * INTERVAL, Some(y));
            for (j, k) in DETECTORS.iter().enumerate() {
                if !raised(&o, *k) {
                    continue;
                }
                if i < onset {
                    stats.pre_raises[j] += 1;
                } else if !found[j] {
                    // A spike is caught at its own sample or not at all.
                    let counts =
                        !matches!(fault, Fault::Spike(_)) || *k != FlagKind::Spike || i == onset;
                    if counts {
                        found[j] = true;
                        stats.delays[j].push(since as u32);
                    }
                }
            }
        }
        stats.pre_samples += onset as u64;
        stats.trials += 1;
    }
    stats
}

/// Designed rates of the sensitivity table: the default, then the clean-data ones.
fn sensitivity_alphas() -> [f64; 4] {
    [default_alpha(), RATES[2], RATES[1], RATES[0]]
}

const SENSITIVE: [(Fault, FlagKind); 4] = [
    (Fault::Spike(6.0), FlagKind::Spike),
    (Fault::Noise(4.0), FlagKind::Noise),
    (Fault::Bias(2.0), FlagKind::Bias),
    (Fault::Bias(3.0), FlagKind::Bias),
];

struct FaultResults {
    /// [fault][channel], the pooled channels last.
    main: Vec<Vec<FaultStats>>,
    /// [SENSITIVE case][alpha][channel], the pooled channels last.
    sens: Vec<Vec<Vec<FaultStats>>>,
}

fn pool(mut per: Vec<FaultStats>) -> Vec<FaultStats> {
    let mut all = FaultStats::default();
    for s in &per {
        all.add(s);
    }
    per.push(all);
    for s in &mut per {
        s.finish();
    }
    per
}

fn part_faults(cfg: &Settings, steady: &[Steady]) -> FaultResults {
    let alphas = sensitivity_alphas();
    // Jobs: the main table at the default design, then the sensitivity cases at the other rates.
    let mut jobs: Vec<(usize, Fault, f64)> = Vec::new();
    for f in FAULTS {
        for ci in 0..CHANNELS.len() {
            jobs.push((ci, f, alphas[0]));
        }
    }
    for (f, _) in SENSITIVE {
        for a in &alphas[1..] {
            for ci in 0..CHANNELS.len() {
                jobs.push((ci, f, *a));
            }
        }
    }
    let results = par_map(&jobs, cfg.threads, |&(ci, f, a)| {
        run_faults(ci, f, a, cfg.trials, steady[ci].sigma())
    });
    let per_channel = |f: Fault, a: f64| -> Vec<FaultStats> {
        let per: Vec<FaultStats> = (0..CHANNELS.len())
            .map(|ci| {
                let i = jobs
                    .iter()
                    .position(|j| *j == (ci, f, a))
                    .expect("every case ran");
                results[i].clone()
            })
            .collect();
        pool(per)
    };
    FaultResults {
        main: FAULTS.iter().map(|f| per_channel(*f, alphas[0])).collect(),
        sens: SENSITIVE
            .iter()
            .map(|(f, _)| alphas.iter().map(|a| per_channel(*f, *a)).collect())
            .collect(),
    }
}

fn print_faults(cfg: &Settings, steady: &[Steady], r: &FaultResults) {
    let s = design(default_alpha(), None)
        .resolve(INTERVAL)
        .expect("a valid design");
    println!("## 2. Injected faults");
    println!();
    println!(
        "Default design (0.1 false alarms per day per detector at 1 s: alpha {:.3e} per sample), on/off delays 0, \
         deadband 0.1: spike |z| > {:.3}; noise block {} outside [{:.3}, {:.3}]; bias CUSUM k {:.2}, h {:.3}; \
         stuck window {}.",
        default_alpha(),
        s.spike_limit,
        s.noise_window,
        s.noise_low,
        s.noise_high,
        s.cusum_k,
        s.cusum_h,
        s.stuck_window
    );
    println!(
        "{} trials per fault and channel; onset uniform in samples {PRE_MIN}..{}; horizon {HORIZON} samples from \
         the onset (delay 0 = the onset sample). sigma = sqrt(F), the filter's steady innovation std. Spike, bias \
         and drift signs are random.",
        cfg.trials,
        PRE_MIN + PRE_SPREAD - 1
    );
    println!(
        "Each detector: P = detected within the horizon (a spike: raised at the spike sample), then the median \
         and 95th-percentile delay in samples of the detected trials. pre = raises of any detector before the \
         onset, per 10,000 pre-fault samples."
    );
    println!();
    print!("{:<18} {:<12}", "fault", "channel");
    for k in DETECTORS {
        print!(" {:>14}", format!("{} P med p95", k.as_str()));
    }
    println!(" {:>8}", "pre");
    for (fi, f) in FAULTS.iter().enumerate() {
        for (ci, st) in r.main[fi].iter().enumerate() {
            let name = if ci < CHANNELS.len() {
                CHANNELS[ci].name()
            } else {
                "all".to_string()
            };
            let label = if ci == 0 { f.label() } else { String::new() };
            print!("{label:<18} {name:<12}");
            for j in 0..4 {
                print!(" {:>14}", st.cell(j));
            }
            let pre: u32 = st.pre_raises.iter().sum();
            println!(
                " {:>8.4}",
                f64::from(pre) / st.pre_samples.max(1) as f64 * 1e4
            );
        }
    }
    let all = |fi: usize| &r.main[fi][CHANNELS.len()];
    let pre: u32 = (0..FAULTS.len())
        .map(|fi| all(fi).pre_raises.iter().sum::<u32>())
        .sum();
    let pre_n: u64 = (0..FAULTS.len()).map(|fi| all(fi).pre_samples).sum();
    println!(
        "Pre-fault stretches, all cases: {pre} raises in {} samples ({:.2} expected from 3 designed detectors).",
        thousands(pre_n),
        3.0 * default_alpha() * pre_n as f64
    );
    println!();

    // Spike theory: z = s + N(0, 1) at the spike sample.
    let n01 = Normal::standard();
    println!(
        "Spike detection against theory (P(|s + Z| > {:.3}), Z standard normal), all channels pooled:",
        s.spike_limit
    );
    for (fi, f) in FAULTS.iter().enumerate() {
        if let Fault::Spike(a) = f {
            let theory = n01.cdf(a - s.spike_limit) + n01.cdf(-a - s.spike_limit);
            println!(
                "  {:<16} measured {:.3}  theory {:.3}",
                f.label(),
                all(fi).p(0),
                theory
            );
        }
    }
    let after: Vec<String> = FAULTS
        .iter()
        .enumerate()
        .filter(|(_, f)| matches!(f, Fault::Spike(_)))
        .map(|(fi, f)| format!("{} {:.4}", f.label(), all(fi).p(2)))
        .collect();
    println!(
        "  bias raised after a lone spike (pooled): {}. Mechanism: a spike just inside the limit is absorbed at \
         gain K; on a high-gain channel the next true samples then look like outliers of the other sign, two are \
         withheld, the third re-acquires as a confirmed level shift and hands the run to the CUSUM, which raises \
         bias. The estimate ends right, but the spike flag lands on the sample after the spike and bias is \
         raised on a sound signal.",
        after.join(", ")
    );
    println!();

    println!("Detection at other designed rates (all channels pooled; same signals as above):");
    println!();
    let alphas = sensitivity_alphas();
    print!("{:<16} {:<8}", "fault", "detector");
    for a in alphas {
        print!(" {:>16}", format!("alpha {a:.1e}"));
    }
    println!();
    for (si, (f, k)) in SENSITIVE.iter().enumerate() {
        let j = DETECTORS.iter().position(|d| d == k).expect("a detector");
        print!("{:<16} {:<8}", f.label(), k.as_str());
        for ai in 0..alphas.len() {
            print!(" {:>16}", r.sens[si][ai][CHANNELS.len()].cell(j));
        }
        println!();
    }
    println!("(cells: P, median and p95 delay)");
    println!();

    // Why bias steps hide: the innovations' mean after a step, without noise, through the same filter.
    println!(
        "Why a bias step can hide: the noise-free innovation mean (in sigma) after a 2-sigma measurement step, \
         through each channel's filter, and the CUSUM that mean alone would build (k {:.2}, h {:.3}).",
        s.cusum_k, s.cusum_h
    );
    println!();
    println!(
        "{:<12} {:>6} {:>6} {:>8} {:>8} {:>8} {:>8} {:>9} {:>11} {:>10}",
        "channel", "K", "R/F", "onset", "+1", "+5", "+20", "+199", "sum 200", "CUSUM max"
    );
    for (ci, def) in CHANNELS.iter().enumerate() {
        let v = bias_response(def, &steady[ci], 2.0);
        let mut cusum: f64 = 0.0;
        let mut peak: f64 = 0.0;
        for x in &v {
            cusum = (cusum + x - s.cusum_k).max(0.0);
            peak = peak.max(cusum);
        }
        println!(
            "{:<12} {:>6.3} {:>6.3} {:>8.3} {:>8.3} {:>8.3} {:>8.3} {:>9.3} {:>11.2} {:>10.2}",
            def.name(),
            steady[ci].k,
            def.obs_sd().powi(2) / steady[ci].f,
            v[0],
            v[1],
            v[5],
            v[20],
            v[199],
            v.iter().sum::<f64>(),
            peak
        );
    }
    println!(
        "A level filter moves its estimate by K of every innovation, so it takes the step for a real level change \
         and the innovations carry the step only until the estimate has caught up (about b/K sigma in all). A lag \
         filter is pulled back to its mean, so a fraction (1 - phi) / (1 - (1 - K) phi) of the step stays in the \
         innovations for good."
    );
    println!();
}

/// Noise-free innovations (in sigma) of a channel's plain filter for HORIZON samples after a step of `b` sigma.
fn bias_response(def: &ChanDef, st: &Steady, b: f64) -> Vec<f64> {
    let mut c = def.channel(&FlagDesign::disabled());
    let mut t = 0.0;
    for _ in 0..2000 {
        c.on_sample(t, Some(MEAN));
        t += INTERVAL;
    }
    (0..HORIZON)
        .map(|_| {
            let o = c.on_sample(t, Some(MEAN + b * st.sigma()));
            t += INTERVAL;
            o.step.map_or(f64::NAN, |s| s.innovation) / st.sigma()
        })
        .collect()
}

// ---------------------------------------------------------------------------------------------------------------
// Part 3: dropout.

#[derive(Debug, Clone, Default)]
struct DropoutStats {
    trials: u32,
    std_before: f64,
    /// Estimate std at 1, 10, 60 and GAP_S seconds into the silence (from the first trial: deterministic).
    std_at: [f64; 4],
    /// Seconds from the last sample to the stale flag's raise, per trial.
    stale_at: Vec<f64>,
    /// Trials whose returning sample cleared the stale flag.
    cleared: u32,
    /// Trials whose returning sample raised the spike flag.
    spike_on_return: u32,
    /// Sum over trials of |estimate - truth| / std at the returning sample.
    err_over_std: f64,
    /// Raises of spike, noise or bias within HORIZON samples after the return.
    raises_after: u32,
}

const STD_AT: [f64; 4] = [1.0, 10.0, 60.0, GAP_S];

fn run_dropout(ci: usize, trials: usize) -> DropoutStats {
    let def = &CHANNELS[ci];
    let d = design(default_alpha(), None);
    let mut st = DropoutStats::default();
    for trial in 0..trials {
        let mut rng = Noise::new(seed(&[3, ci as u64, trial as u64]));
        let onset = PRE_MIN + (rng.uniform() * PRE_SPREAD as f64) as usize;
        let mut ch = def.channel(&d);
        let mut truth = Truth::new(def, &mut rng);
        let mut last = None;
        for i in 0..onset {
            if i > 0 {
                truth.advance(&mut rng);
            }
            let y = truth.x + def.obs_sd() * rng.normal();
            last = Some(ch.on_sample(i as f64 * INTERVAL, Some(y)));
        }
        let t_last = (onset - 1) as f64 * INTERVAL;
        if trial == 0 {
            st.std_before = last.map_or(f64::NAN, |o| o.std());
            for (g, slot) in STD_AT.iter().zip(st.std_at.iter_mut()) {
                *slot = ch.stale(t_last + g).map_or(f64::NAN, |o| o.std());
            }
        }
        // The daemon's timer: stale after STALE_AFTER_S, then a report every STALE_EVERY_S while silent.
        let mut now = t_last + STALE_AFTER_S;
        let mut stale_at = None;
        while now < t_last + GAP_S {
            if let Some(o) = ch.mark_stale(now) {
                if raised(&o, FlagKind::Stale) && stale_at.is_none() {
                    stale_at = Some(now - t_last);
                }
            }
            now += STALE_EVERY_S;
        }
        if let Some(s) = stale_at {
            st.stale_at.push(s);
        }
        for _ in 0..GAP_S as usize {
            truth.advance(&mut rng);
        }
        let y = truth.x + def.obs_sd() * rng.normal();
        let back = ch.on_sample(t_last + GAP_S, Some(y));
        if back.flags.cleared.contains(FlagKind::Stale) {
            st.cleared += 1;
        }
        if raised(&back, FlagKind::Spike) {
            st.spike_on_return += 1;
        }
        if let Some(s) = back.step {
            st.err_over_std += (s.estimate - truth.x).abs() / back.std();
        }
        for i in 1..=HORIZON {
            truth.advance(&mut rng);
            let y = truth.x + def.obs_sd() * rng.normal();
            let o = ch.on_sample(t_last + GAP_S + i as f64 * INTERVAL, Some(y));
            for k in [FlagKind::Spike, FlagKind::Noise, FlagKind::Bias] {
                if raised(&o, k) {
                    st.raises_after += 1;
                }
            }
        }
        st.trials += 1;
    }
    st
}

fn print_dropout(r: &[DropoutStats]) {
    println!("## 3. Dropout");
    println!();
    println!(
        "The channel falls silent after sample {PRE_MIN}..{} for {GAP_S} s. The daemon's stale timer (stale_after_s \
         {STALE_AFTER_S}, stale_every_s {STALE_EVERY_S}, its defaults) calls Channel::mark_stale; then data returns. \
         A dropout sent as null values instead (missing samples) is no silence: no stale flag, the same std growth.",
        PRE_MIN + PRE_SPREAD - 1
    );
    println!();
    println!(
        "{:<12} {:>7} {:>9} {:>9} {:>9} {:>9} {:>13} {:>9} {:>9} {:>11} {:>11}",
        "channel",
        "std",
        "std +1s",
        "std +10s",
        "std +60s",
        "std +300s",
        "stale raised",
        "cleared",
        "spike",
        "|err|/std",
        "raises+200"
    );
    for (ci, s) in r.iter().enumerate() {
        let n = f64::from(s.trials.max(1));
        let stale = if s.stale_at.len() == s.trials as usize
            && s.stale_at.iter().all(|v| *v == s.stale_at[0])
        {
            format!("all at {:.0} s", s.stale_at[0])
        } else {
            format!("{}/{}", s.stale_at.len(), s.trials)
        };
        println!(
            "{:<12} {:>7.3} {:>9.3} {:>9.3} {:>9.3} {:>9.3} {:>13} {:>9.3} {:>9.3} {:>11.3} {:>11}",
            CHANNELS[ci].name(),
            s.std_before,
            s.std_at[0],
            s.std_at[1],
            s.std_at[2],
            s.std_at[3],
            stale,
            f64::from(s.cleared) / n,
            f64::from(s.spike_on_return) / n,
            s.err_over_std / n,
            s.raises_after
        );
    }
    println!(
        "std: the estimate's std before the silence and at t seconds into it (Channel::stale). cleared, spike: \
         share of trials whose returning sample cleared the stale flag, raised a spike. |err|/std: mean \
         |estimate - truth| / std at the returning sample (about 0.80 when the std is honest). raises+200: spike, \
         noise and bias raises in the {HORIZON} samples after the return, all trials."
    );
    println!();
}

// ---------------------------------------------------------------------------------------------------------------
// Part 4: estimate quality.

#[derive(Debug, Clone, Copy, PartialEq)]
enum Spikes {
    None,
    Every200,
    Random1Pct,
}

#[derive(Debug, Clone, Copy, Default)]
struct Rmse {
    /// Sum of squared errors, robust then plain, and the sample count.
    sse: [f64; 2],
    n: u64,
}

impl Rmse {
    fn get(&self, which: usize) -> f64 {
        (self.sse[which] / self.n.max(1) as f64).sqrt()
    }
}

fn robust_and_plain() -> [FlagDesign; 2] {
    [
        FlagDesign::default(),
        FlagDesign {
            spike_withhold: false,
            ..FlagDesign::default()
        },
    ]
}

fn run_rmse(ci: usize, spikes: Spikes, n: u64, sigma: f64) -> Rmse {
    let def = &CHANNELS[ci];
    // The same signal and noise for every spike pattern: only the spikes differ.
    let mut rng = Noise::new(seed(&[4, ci as u64]));
    let mut spike_rng = Noise::new(seed(&[5, ci as u64, spikes as u64]));
    let mut chans = robust_and_plain().map(|d| def.channel(&d));
    let mut truth = Truth::new(def, &mut rng);
    let mut out = Rmse::default();
    for i in 0..n {
        if i > 0 {
            truth.advance(&mut rng);
        }
        let mut y = truth.x + def.obs_sd() * rng.normal();
        // Spike draws happen on every sample, whatever the pattern, so the patterns share nothing but the signal.
        let (u, m, sgn) = (
            spike_rng.uniform(),
            6.0 + 4.0 * spike_rng.uniform(),
            random_sign(&mut spike_rng),
        );
        let spike = match spikes {
            Spikes::None => false,
            Spikes::Every200 => i % 200 == 199,
            Spikes::Random1Pct => u < 0.01,
        };
        if spike {
            y += sgn * m * sigma;
        }
        for (w, c) in chans.iter_mut().enumerate() {
            let o = c.on_sample(i as f64 * INTERVAL, Some(y));
            if i >= BURN_IN {
                let e = o.step.map_or(f64::NAN, |s| s.estimate) - truth.x;
                out.sse[w] += e * e;
            }
        }
        if i >= BURN_IN {
            out.n += 1;
        }
    }
    out
}

#[derive(Debug, Clone, Default)]
struct ShiftStats {
    /// Per configuration (robust, plain): samples from the shift to the first estimate within 2 std of the truth.
    reacquire: [Vec<u32>; 2],
    never: [u32; 2],
    /// Squared error over the HORIZON samples from the shift, and their count.
    sse: [f64; 2],
    n: u64,
    /// Sum of |estimate - truth| / std over the last END samples of the horizon, and their count.
    end_err: [f64; 2],
    end_n: u64,
    bias_raised: u32,
    trials: u32,
}

/// The last samples of the horizon, where a re-acquired estimate should have settled.
const END: usize = 50;

fn run_shift(ci: usize, trials: usize, sigma: f64) -> ShiftStats {
    let def = &CHANNELS[ci];
    let mut st = ShiftStats::default();
    for trial in 0..trials {
        let mut rng = Noise::new(seed(&[6, ci as u64, trial as u64]));
        let onset = PRE_MIN + (rng.uniform() * PRE_SPREAD as f64) as usize;
        let sign = random_sign(&mut rng);
        let mut chans = robust_and_plain().map(|d| def.channel(&d));
        let mut truth = Truth::new(def, &mut rng);
        let mut found = [None; 2];
        let mut bias = false;
        for i in 0..onset + HORIZON {
            if i > 0 {
                truth.advance(&mut rng);
            }
            if i == onset {
                truth.shift(sign * 10.0 * sigma);
            }
            let y = truth.x + def.obs_sd() * rng.normal();
            for (w, c) in chans.iter_mut().enumerate() {
                let o = c.on_sample(i as f64 * INTERVAL, Some(y));
                if i < onset {
                    continue;
                }
                let e = o.step.map_or(f64::NAN, |s| s.estimate) - truth.x;
                st.sse[w] += e * e;
                if i >= onset + HORIZON - END {
                    st.end_err[w] += e.abs() / o.std();
                }
                if found[w].is_none() && e.abs() <= 2.0 * o.std() {
                    found[w] = Some((i - onset) as u32);
                }
                if w == 0 && raised(&o, FlagKind::Bias) {
                    bias = true;
                }
            }
            if i >= onset {
                st.n += 1;
            }
            if i >= onset + HORIZON - END {
                st.end_n += 1;
            }
        }
        for (w, f) in found.into_iter().enumerate() {
            match f {
                Some(d) => st.reacquire[w].push(d),
                None => st.never[w] += 1,
            }
        }
        st.bias_raised += u32::from(bias);
        st.trials += 1;
    }
    for r in &mut st.reacquire {
        r.sort_unstable();
    }
    st
}

struct EstimateResults {
    /// [channel][spike pattern]
    rmse: Vec<[Rmse; 3]>,
    shift: Vec<ShiftStats>,
}

const PATTERNS: [Spikes; 3] = [Spikes::None, Spikes::Every200, Spikes::Random1Pct];

fn print_estimate(cfg: &Settings, steady: &[Steady], r: &EstimateResults) {
    println!("## 4. Estimate quality: robust update on and off");
    println!();
    println!(
        "RMSE of the estimate against the true state over {} samples per channel (first {BURN_IN} skipped), the same \
         signal in every column. robust = FlagDesign::default() (spikes beyond |z| {:.3} withheld, 3 in a row of \
         one sign re-acquire); plain = the same with spike_withhold false. Spikes are 6..10 sigma, random sign.",
        thousands(cfg.rmse_samples),
        design(default_alpha(), None)
            .resolve(INTERVAL)
            .map_or(f64::NAN, |s| s.spike_limit)
    );
    println!();
    println!(
        "{:<12} {:>8} {:>8} {:>8} | {:>8} {:>8} {:>9} | {:>8} {:>8} {:>9}",
        "channel", "std", "clean", "plain", "1/200", "plain", "x clean", "1%", "plain", "x clean"
    );
    for (ci, rm) in r.rmse.iter().enumerate() {
        let clean = rm[0].get(0);
        println!(
            "{:<12} {:>8.4} {:>8.4} {:>8.4} | {:>8.4} {:>8.4} {:>9.3} | {:>8.4} {:>8.4} {:>9.3}",
            CHANNELS[ci].name(),
            steady[ci].est_var.sqrt(),
            clean,
            rm[0].get(1),
            rm[1].get(0),
            rm[1].get(1),
            rm[1].get(0) / clean,
            rm[2].get(0),
            rm[2].get(1),
            rm[2].get(0) / clean
        );
    }
    println!(
        "std: the filter's steady estimate std (what the RMSE should be on clean data). clean/plain: no spikes; \
         1/200: a spike every 200 samples; 1%: a spike on 1% of samples at random. 'x clean' = robust RMSE with \
         spikes / robust RMSE without."
    );
    println!();
    println!(
        "Level shift of 10 sigma (the process level, for a lag its mean, moves; the filter keeps its parameters), \
         {} trials per channel: samples from the shift to the first estimate within 2 std of the new true state \
         (median, p95, and trials not re-acquired within {HORIZON}), and the RMSE over the {HORIZON} samples from \
         the shift.",
        cfg.trials
    );
    println!();
    println!(
        "{:<12} {:>15} {:>15} {:>8} {:>8} {:>8} {:>8} {:>8} {:>8} {:>6}",
        "channel",
        "robust med p95",
        "plain med p95",
        "never r",
        "never p",
        "RMSE r",
        "RMSE p",
        "end r",
        "end p",
        "bias"
    );
    for (ci, s) in r.shift.iter().enumerate() {
        let cell = |w: usize| {
            format!(
                "{:>3} {:>3}",
                opt(percentile(&s.reacquire[w], 0.5)),
                opt(percentile(&s.reacquire[w], 0.95))
            )
        };
        let rmse = |w: usize| (s.sse[w] / s.n.max(1) as f64).sqrt();
        let end = |w: usize| s.end_err[w] / s.end_n.max(1) as f64;
        println!(
            "{:<12} {:>15} {:>15} {:>8} {:>8} {:>8.3} {:>8.3} {:>8.3} {:>8.3} {:>6.3}",
            CHANNELS[ci].name(),
            cell(0),
            cell(1),
            s.never[0],
            s.never[1],
            rmse(0),
            rmse(1),
            end(0),
            end(1),
            f64::from(s.bias_raised) / f64::from(s.trials.max(1))
        );
    }
    println!(
        "r = robust, p = plain. end: mean |estimate - truth| / std over the last {END} samples of the horizon (about \
         0.80 when the estimate has settled and its std is honest). bias: share of trials whose robust channel raised \
         the bias flag within {HORIZON} samples (the re-acquiring update hands the outlier run to the CUSUM). A lag \
         filter keeps its old mean, so after a shift of the mean it is pulled back towards it and never quite \
         settles: the model no longer fits, which the bias flag says."
    );
    println!();
}

// ---------------------------------------------------------------------------------------------------------------
// Targets.

fn print_targets(
    clean: &[CleanCounts],
    faults: &FaultResults,
    est: &EstimateResults,
) -> Vec<String> {
    let mut lines = Vec::new();
    let nch = CHANNELS.len();
    // 1. Clean false-alarm rates, every channel and design.
    let mut all_ok = true;
    let mut parts = Vec::new();
    for (j, k) in DETECTORS.iter().enumerate().take(3) {
        let (mut lo, mut hi) = (f64::INFINITY, 0.0_f64);
        for c in clean.iter().take(nch) {
            for (d, a) in RATES.iter().enumerate() {
                let ratio = c.raises[d][j] as f64 / (a * c.samples as f64);
                lo = lo.min(ratio);
                hi = hi.max(ratio);
            }
        }
        all_ok &= lo >= 0.5 && hi <= 2.0;
        parts.push(format!("{} {lo:.2}..{hi:.2}", k.as_str()));
    }
    lines.push(format!(
        "clean false-alarm rate within x2 of design (1e-3..1e-5, every channel; ratio range): {}  {}",
        parts.join("  "),
        verdict(all_ok)
    ));
    let stuck: u64 = (0..3).map(|d| clean[nch].raises[d][3]).sum();
    lines.push(format!(
        "stuck raises on clean continuous data: {stuck} in {} samples (expected ~0)  {}",
        thousands(3 * clean[nch].samples),
        verdict(stuck == 0)
    ));
    let at = |f: Fault| {
        let fi = FAULTS.iter().position(|g| *g == f).expect("a fault case");
        &faults.main[fi]
    };
    let worst = |f: Fault, j: usize| -> (f64, String) {
        let per = at(f);
        let (ci, s) = per
            .iter()
            .take(nch)
            .enumerate()
            .min_by(|a, b| a.1.p(j).total_cmp(&b.1.p(j)))
            .expect("channels");
        (s.p(j), CHANNELS[ci].name())
    };
    // 2. Spike 6 sigma.
    let (p_min, who) = worst(Fault::Spike(6.0), 0);
    let pooled = at(Fault::Spike(6.0))[nch].p(0);
    lines.push(format!(
        "spike 6 sigma detected >= 0.99 (default design, every channel): pooled {pooled:.3}, lowest {p_min:.3} \
         ({who})  {}",
        verdict(p_min >= 0.99)
    ));
    // 3. Noise x4.
    let (p_min, who) = worst(Fault::Noise(4.0), 1);
    let per: Vec<String> = at(Fault::Noise(4.0))
        .iter()
        .take(nch)
        .enumerate()
        .map(|(ci, s)| format!("{} {:.3}", CHANNELS[ci].name(), s.p(1)))
        .collect();
    lines.push(format!(
        "noise variance x4 detected >= 0.99 within {HORIZON} samples (every channel): lowest {p_min:.3} ({who}); \
         {}  {}",
        per.join(", "),
        verdict(p_min >= 0.99)
    ));
    // 4. Bias 2 sigma.
    let b = at(Fault::Bias(2.0));
    let mut ok = true;
    let per: Vec<String> = b
        .iter()
        .take(nch)
        .enumerate()
        .map(|(ci, s)| {
            let med = percentile(&s.delays[2], 0.5);
            ok &= s.p(2) >= 0.95 && med.is_some_and(|m| m <= 20);
            format!("{} {:.3}/{}", CHANNELS[ci].name(), s.p(2), opt(med))
        })
        .collect();
    lines.push(format!(
        "bias 2 sigma detected >= 0.95 with median delay <= 20 (every channel; P/median): {}  {}",
        per.join(", "),
        verdict(ok)
    ));
    // 5. Stuck.
    let window = FlagDesign::default().stuck_window;
    let s = at(Fault::Stuck);
    let mut lowest: f64 = 1.0;
    let mut longest = 0;
    for st in s.iter().take(nch) {
        let within = st.delays[3].iter().filter(|d| **d <= window + 5).count();
        lowest = lowest.min(within as f64 / f64::from(st.trials.max(1)));
        longest = longest.max(st.delays[3].last().copied().unwrap_or(u32::MAX));
    }
    lines.push(format!(
        "stuck detected within window + 5 = {} samples (every channel): share {lowest:.3}, longest delay {}  {}",
        window + 5,
        if longest == u32::MAX {
            "-".to_string()
        } else {
            longest.to_string()
        },
        verdict(lowest >= 0.99)
    ));
    // 6. RMSE with a spike every 200 samples.
    let (mut hi, mut who) = (0.0_f64, String::new());
    for (ci, rm) in est.rmse.iter().enumerate() {
        let ratio = rm[1].get(0) / rm[0].get(0);
        if ratio > hi {
            hi = ratio;
            who = CHANNELS[ci].name();
        }
    }
    lines.push(format!(
        "RMSE with a spike every 200 samples <= 1.10 x spike-free (robust update, every channel): highest {hi:.3} \
         ({who})  {}",
        verdict(hi <= 1.10)
    ));
    println!("## Targets (issue 4)");
    println!();
    for l in &lines {
        println!("- {l}");
    }
    lines
}

fn print_diagnosis(lines: &[String], steady: &[Steady], faults: &FaultResults) {
    let missed = |key: &str| {
        lines
            .iter()
            .any(|l| l.starts_with(key) && l.ends_with("MISS"))
    };
    let s = design(default_alpha(), None)
        .resolve(INTERVAL)
        .expect("a valid design");
    let mut notes = Vec::new();
    if missed("spike 6") {
        let n01 = Normal::standard();
        // The rate at which a 6-sigma spike is caught 99% of the time: limit = 6 - Phi^-1(0.99).
        let limit = 6.0 - n01.inverse_cdf(0.99);
        let alpha = 2.0 * (1.0 - n01.cdf(limit));
        notes.push(format!(
            "spike: at 0.1 false alarms per day and 1 s the limit is |z| > {:.2}, and z = 6 + N(0, 1) at a 6-sigma \
             spike, so P = Phi(6 - {:.2}) = {:.3} whatever the detector: the target and the design rate conflict. \
             P >= 0.99 needs a limit <= {limit:.2}, i.e. a design of >= {alpha:.1e} per sample ({:.0} per day at 1 s); \
             see the table at other designed rates.",
            s.spike_limit,
            s.spike_limit,
            n01.cdf(6.0 - s.spike_limit),
            alpha * DAY_S / INTERVAL
        ));
    }
    if missed("noise") {
        let per: Vec<String> = CHANNELS
            .iter()
            .enumerate()
            .map(|(ci, d)| {
                let v = 1.0 + 3.0 * d.obs_sd().powi(2) / steady[ci].f;
                format!("{} {v:.2}", d.name())
            })
            .collect();
        notes.push(format!(
            "noise: the fault scales the observation noise, so the innovation variance grows by 1 + 3 R/F, not 4: \
             {}. A block mean of z^2 must pass {:.3} to be flagged; where R is small against the process \
             disturbance the change is mostly invisible in the innovations (and in the data).",
            per.join(", "),
            s.noise_high
        ));
    }
    if missed("bias") {
        let bi = SENSITIVE
            .iter()
            .position(|(f, _)| *f == Fault::Bias(2.0))
            .expect("bias case");
        let p_hi = faults.sens[bi][3][CHANNELS.len()].p(2);
        notes.push(format!(
            "bias: the filters track a step. A level filter takes it for a level change and absorbs it at rate K, \
             so the innovations carry about b/K sigma in all (table 'Why a bias step can hide'); a lag filter keeps \
             only a fraction in its innovations. With h = {:.2} (0.1/day) the CUSUM needs far more. Even at a \
             design of 1e-3 per sample only {p_hi:.3} of 2-sigma steps are caught (pooled). A step the model can \
             explain as process movement cannot be told from it by innovations alone: detecting it needs a \
             reference (a redundant transmitter, a lab sample) or a model whose level cannot move.",
            s.cusum_h
        ));
    }
    if missed("stuck detected") {
        notes.push("stuck: see the fault table's stuck row.".to_string());
    }
    if missed("RMSE") {
        notes.push(
            "RMSE: spikes that escape the |z| limit enter the update at gain K; see the estimate table.".to_string(),
        );
    }
    if !notes.is_empty() {
        println!();
        println!("Diagnosis of the misses:");
        for n in notes {
            println!("- {n}");
        }
    }
}

fn main() {
    // `cargo bench` passes `--bench`; nothing to parse.
    let cfg = Settings::from_env();
    let started = Instant::now();
    println!("# gaugewise fault-detection quality (cargo bench --bench detect_quality)");
    println!();
    println!(
        "Channels at a 1 s interval, filtered with their true parameters: lag (AR(1) + noise, tau {TAU} s, phi \
         {:.4}, process disturbance std {Q_SD}) and level (random walk, step std {Q_SD}); r = observation noise std \
         / process disturbance std. {} threads{}.",
        (-INTERVAL / TAU).exp(),
        cfg.threads,
        if cfg.quick { ", GWBENCH_QUICK" } else { "" }
    );
    let steady: Vec<Steady> = CHANNELS.iter().map(steady).collect();
    println!();
    println!(
        "{:<12} {:>10} {:>10} {:>8} {:>12}",
        "channel", "R", "F", "K", "estimate std"
    );
    for (ci, d) in CHANNELS.iter().enumerate() {
        println!(
            "{:<12} {:>10.4} {:>10.4} {:>8.4} {:>12.4}",
            d.name(),
            d.obs_sd().powi(2),
            steady[ci].f,
            steady[ci].k,
            steady[ci].est_var.sqrt()
        );
    }
    println!("(steady state: F the innovation variance, sigma = sqrt(F); K the gain)");
    println!();

    let t = Instant::now();
    let clean = part_clean(&cfg);
    let reference = par_map(&[false, true], cfg.threads, |leave_out| {
        noise_reference(*leave_out, cfg.noise_blocks)
    });
    print_clean(&clean, &reference);
    let t_clean = t.elapsed();

    let t = Instant::now();
    let faults = part_faults(&cfg, &steady);
    print_faults(&cfg, &steady, &faults);
    let dropout = par_map(
        &(0..CHANNELS.len()).collect::<Vec<_>>(),
        cfg.threads,
        |ci| run_dropout(*ci, cfg.trials.div_ceil(4)),
    );
    print_dropout(&dropout);
    let t_faults = t.elapsed();

    let t = Instant::now();
    let rmse_jobs: Vec<(usize, usize)> = (0..CHANNELS.len())
        .flat_map(|ci| (0..PATTERNS.len()).map(move |p| (ci, p)))
        .collect();
    let rmse_flat = par_map(&rmse_jobs, cfg.threads, |&(ci, p)| {
        run_rmse(ci, PATTERNS[p], cfg.rmse_samples, steady[ci].sigma())
    });
    let rmse = (0..CHANNELS.len())
        .map(|ci| [0, 1, 2].map(|p| rmse_flat[ci * PATTERNS.len() + p]))
        .collect();
    let shift = par_map(
        &(0..CHANNELS.len()).collect::<Vec<_>>(),
        cfg.threads,
        |ci| run_shift(*ci, cfg.trials, steady[*ci].sigma()),
    );
    let est = EstimateResults { rmse, shift };
    print_estimate(&cfg, &steady, &est);
    let t_est = t.elapsed();

    let lines = print_targets(&clean, &faults, &est);
    print_diagnosis(&lines, &steady, &faults);
    println!();
    println!(
        "Wall time {:.1} s (clean {:.1} s, faults and dropout {:.1} s, estimate {:.1} s) on {} threads.",
        started.elapsed().as_secs_f64(),
        t_clean.as_secs_f64(),
        t_faults.as_secs_f64(),
        t_est.as_secs_f64(),
        cfg.threads
    );
}
