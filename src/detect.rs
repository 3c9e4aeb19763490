//! Fault flags from a channel's innovations and raw samples, with designed false-alarm rates and alarm hysteresis.
//!
//! A well-specified Kalman filter's standardised innovations `z` are independent N(0, 1), so each departure can be
//! tested with a false-alarm probability chosen in advance. An engineer states what they mean (false alarms per
//! day, the shift to detect in sigmas); [`FlagDesign::resolve`] turns that into thresholds with the proper
//! distributions (statrs). Pure core: no IO, no clock, no allocation per sample; `channel` calls it for every
//! sample, so the daemon and `replay` flag alike.
//!
//! The detectors (each one flag kind):
//! - `spike`: one |z| beyond `Phi^-1(1 - a/2)`, a the designed false-alarm probability per sample.
//! - `noise`: the mean of z^2 over consecutive blocks of N samples; N * mean ~ chi-square(N), so the block is
//!   tested against the two-sided chi-square quantiles at the block's false-alarm probability a * N (one test per
//!   block keeps the rate per sample at a). A mean far below 1 means the sensor varies less than it should.
//! - `bias`: two-sided CUSUM (Page 1954) on z: S+ = max(0, S+ + z - k), S- = max(0, S- - z - k), raised when
//!   either exceeds h. k is half the shift to detect (common practice; Montgomery, Introduction to Statistical
//!   Quality Control, CUSUM chapter); h is chosen so that the in-control average run length is 1/a, using Siegmund's
//!   approximation of the ARL (Siegmund 1985, Sequential Analysis; it reproduces Montgomery's ARL table to about
//!   1%, which the tests check). A linear drift shows up here as well. The sums are capped at 2h so the flag clears
//!   soon after the shift ends, and restart at 0 when the flag clears, so every raise is a fresh Page scheme.
//! - `stuck`: the raw value stays within a tolerance of the first value of the run for `window` samples. The
//!   tolerance is the larger of the configured resolution (a quantised transmitter repeats values) and 5% of the
//!   one-step forecast std: a live sensor's samples differ by about that std each step, so W samples all within
//!   0.05 sigma of each other have a probability far below any designed rate (about 0.03^(W-1)).
//! - `stale`: no sample for longer than the configured limit (the daemon's timer calls [`Detectors::on_stale`]).
//! - `range`: the raw value outside the transmitter's configured engineering limits.
//!
//! Robust update (see [`crate::filter::Gate`]): with `spike.withhold`, a sample beyond the spike threshold does not
//! update the state. `spike.confirm` consecutive outliers of one sign are a level shift, not spikes: the last of
//! them re-acquires (the forecast variance is inflated to the squared innovation, so the estimate moves most of the
//! way to the new level at once) instead of lagging for hundreds of samples. Out-of-range samples and the samples of
//! a channel flagged stuck are withheld too: they say nothing about the process.
//!
//! Alarm hysteresis, as alarm management practice has it (ISA-18.2 / EEMUA 191; common practice): a condition must
//! hold for `on_delay` seconds before the flag is raised, its clear condition for `off_delay` seconds before it
//! clears, and the clear condition has a deadband (a fraction of the threshold the statistic must fall below).
//! Every flag carries a severity.

use crate::filter::{Gate, Step, StepKind};
use serde::{Deserialize, Serialize, Serializer};
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};
use std::fmt;
use std::sync::Arc;
use thiserror::Error;

/// Seconds per day, to turn "false alarms per day" into a probability per sample.
const DAY_S: f64 = 86_400.0;
/// Stuck tolerance as a fraction of the one-step forecast std (see the module notes).
pub const STUCK_FRACTION: f64 = 0.05;
/// The `learning` flag: set and cleared by the channel, no hysteresis.
const LEARNING: AlarmDesign = AlarmDesign {
    enabled: true,
    severity: Severity::Low,
    on_delay: 0.0,
    off_delay: 0.0,
    deadband: 0.0,
};
/// A taken-in |z| above this fraction of the spike limit makes the next opposite outlier a recovery.
const RECOVERY_FRACTION: f64 = 0.75;
/// Siegmund's correction to the decision interval, 2 x 0.583 (Siegmund 1985).
const SIEGMUND_B: f64 = 1.166;

/// The kinds of flag, in the order they are stored and printed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FlagKind {
    Spike,
    Noise,
    Bias,
    Stuck,
    Stale,
    Range,
    /// The channel has no configured parameters yet and runs a provisional model until its first fit.
    Learning,
}

impl FlagKind {
    pub const ALL: [FlagKind; 7] = [
        FlagKind::Spike,
        FlagKind::Noise,
        FlagKind::Bias,
        FlagKind::Stuck,
        FlagKind::Stale,
        FlagKind::Range,
        FlagKind::Learning,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            FlagKind::Spike => "spike",
            FlagKind::Noise => "noise",
            FlagKind::Bias => "bias",
            FlagKind::Stuck => "stuck",
            FlagKind::Stale => "stale",
            FlagKind::Range => "range",
            FlagKind::Learning => "learning",
        }
    }

    fn index(self) -> usize {
        self as usize
    }
}

impl fmt::Display for FlagKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// How urgent a flag is (the three priorities most alarm philosophies start from).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Severity {
    Low,
    Medium,
    High,
}

impl Severity {
    pub fn as_str(self) -> &'static str {
        match self {
            Severity::Low => "low",
            Severity::Medium => "medium",
            Severity::High => "high",
        }
    }

    pub fn parse(text: &str) -> Option<Severity> {
        match text {
            "low" => Some(Severity::Low),
            "medium" => Some(Severity::Medium),
            "high" => Some(Severity::High),
            _ => None,
        }
    }
}

impl Serialize for Severity {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.as_str())
    }
}

/// A set of flag kinds (a bit per kind): what is active, raised or cleared at a sample.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Hash)]
pub struct FlagSet(u8);

impl FlagSet {
    pub const EMPTY: FlagSet = FlagSet(0);

    pub fn contains(self, kind: FlagKind) -> bool {
        self.0 & (1 << kind.index()) != 0
    }

    pub fn insert(&mut self, kind: FlagKind) {
        self.0 |= 1 << kind.index();
    }

    pub fn remove(&mut self, kind: FlagKind) {
        self.0 &= !(1 << kind.index());
    }

    pub fn is_empty(self) -> bool {
        self.0 == 0
    }

    pub fn len(self) -> usize {
        self.0.count_ones() as usize
    }

    pub fn iter(self) -> impl Iterator<Item = FlagKind> {
        FlagKind::ALL.into_iter().filter(move |k| self.contains(*k))
    }
}

impl FromIterator<FlagKind> for FlagSet {
    fn from_iter<I: IntoIterator<Item = FlagKind>>(iter: I) -> Self {
        let mut s = FlagSet::EMPTY;
        for k in iter {
            s.insert(k);
        }
        s
    }
}

impl fmt::Display for FlagSet {
    /// `spike|bias`, empty for no flags (the replay CSV cell).
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, k) in self.iter().enumerate() {
            if i > 0 {
                f.write_str("|")?;
            }
            f.write_str(k.as_str())?;
        }
        Ok(())
    }
}

impl Serialize for FlagSet {
    /// A JSON array of kind names: `["spike","bias"]`.
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(self.iter().map(FlagKind::as_str))
    }
}

/// A design value that makes no sense.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum DesignError {
    #[error("{key}: {message}")]
    Invalid { key: &'static str, message: String },
}

fn invalid(key: &'static str, message: impl Into<String>) -> DesignError {
    DesignError::Invalid {
        key,
        message: message.into(),
    }
}

/// Hysteresis and severity of one flag kind.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AlarmDesign {
    pub enabled: bool,
    pub severity: Severity,
    /// Seconds the raise condition must hold before the flag is raised.
    pub on_delay: f64,
    /// Seconds the clear condition must hold before the flag clears.
    pub off_delay: f64,
    /// Fraction of the threshold the statistic must fall below (beyond, for lower bounds) before it may clear.
    pub deadband: f64,
}

impl AlarmDesign {
    pub const fn new(severity: Severity, off_delay: f64) -> Self {
        AlarmDesign {
            enabled: true,
            severity,
            on_delay: 0.0,
            off_delay,
            deadband: 0.1,
        }
    }

    fn check(&self, key: &'static str) -> Result<(), DesignError> {
        for (v, what) in [(self.on_delay, "on_delay"), (self.off_delay, "off_delay")] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(invalid(
                    key,
                    format!("{what} must be seconds >= 0 (got {v})"),
                ));
            }
        }
        if !(0.0..1.0).contains(&self.deadband) {
            return Err(invalid(
                key,
                format!(
                    "deadband must be a fraction in [0, 1) (got {})",
                    self.deadband
                ),
            ));
        }
        Ok(())
    }
}

/// How a threshold is given: by its meaning, or as the raw number for those who want it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Threshold {
    /// Designed false alarms per day at the channel's nominal sample interval.
    PerDay(f64),
    /// The statistic's limit itself: sigmas for `spike`, h (in sigmas) for `bias`.
    Raw(f64),
}

/// What an engineer configures for a channel's flags (see README, "Fault flags").
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FlagDesign {
    pub spike: AlarmDesign,
    pub spike_threshold: Threshold,
    /// Withhold samples judged spikes from the update (robust update).
    pub spike_withhold: bool,
    /// Consecutive outliers of one sign that are a level shift rather than spikes.
    pub spike_confirm: u32,
    pub noise: AlarmDesign,
    pub noise_window: u32,
    /// Designed rate, or raw bounds on the block mean of z^2.
    pub noise_threshold: NoiseThreshold,
    pub bias: AlarmDesign,
    /// Shift to detect, in innovation sigmas (k = shift / 2).
    pub bias_shift: f64,
    pub bias_threshold: Threshold,
    pub stuck: AlarmDesign,
    pub stuck_window: u32,
    /// Smallest change the transmitter can show (engineering units); 0 for a continuous signal.
    pub stuck_resolution: f64,
    pub stale: AlarmDesign,
    pub range: AlarmDesign,
    pub range_low: Option<f64>,
    pub range_high: Option<f64>,
}

/// The noise detector's threshold: a designed rate, or bounds on the block mean of z^2.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum NoiseThreshold {
    PerDay(f64),
    Bounds(f64, f64),
}

impl Default for FlagDesign {
    /// One false alarm per ten days per detector and channel: with hundreds of tags, more would teach operators
    /// to ignore the flags.
    fn default() -> Self {
        FlagDesign {
            spike: AlarmDesign::new(Severity::Low, 60.0),
            spike_threshold: Threshold::PerDay(0.1),
            spike_withhold: true,
            spike_confirm: 3,
            noise: AlarmDesign::new(Severity::Medium, 0.0),
            noise_window: 50,
            noise_threshold: NoiseThreshold::PerDay(0.1),
            bias: AlarmDesign::new(Severity::High, 0.0),
            bias_shift: 1.0,
            bias_threshold: Threshold::PerDay(0.1),
            stuck: AlarmDesign::new(Severity::High, 0.0),
            stuck_window: 30,
            stuck_resolution: 0.0,
            stale: AlarmDesign::new(Severity::Medium, 0.0),
            range: AlarmDesign::new(Severity::High, 0.0),
            range_low: None,
            range_high: None,
        }
    }
}

impl FlagDesign {
    /// One line for `gaugewise check`: each enabled detector with its threshold as configured.
    pub fn summary(&self) -> String {
        let rate = |t: Threshold, raw_name: &str| match t {
            Threshold::PerDay(r) => format!("{r}/day"),
            Threshold::Raw(v) => format!("{raw_name} {v}"),
        };
        let mut parts = Vec::new();
        let sev = |a: &AlarmDesign| {
            let mut s = a.severity.as_str().to_string();
            if a.on_delay > 0.0 {
                s.push_str(&format!(", on-delay {} s", a.on_delay));
            }
            if a.off_delay > 0.0 {
                s.push_str(&format!(", off-delay {} s", a.off_delay));
            }
            s
        };
        if self.spike.enabled {
            parts.push(format!(
                "spike {} ({}{}, confirm {})",
                rate(self.spike_threshold, "|z| >"),
                sev(&self.spike),
                if self.spike_withhold {
                    ", withheld"
                } else {
                    ""
                },
                self.spike_confirm
            ));
        }
        if self.noise.enabled {
            let t = match self.noise_threshold {
                NoiseThreshold::PerDay(r) => format!("{r}/day"),
                NoiseThreshold::Bounds(lo, hi) => format!("bounds [{lo}, {hi}]"),
            };
            parts.push(format!(
                "noise {t} over {} samples ({})",
                self.noise_window,
                sev(&self.noise)
            ));
        }
        if self.bias.enabled {
            parts.push(format!(
                "bias {} for a {}-sigma shift ({})",
                rate(self.bias_threshold, "h"),
                self.bias_shift,
                sev(&self.bias)
            ));
        }
        if self.stuck.enabled {
            parts.push(format!(
                "stuck after {} samples{} ({})",
                self.stuck_window,
                if self.stuck_resolution > 0.0 {
                    format!(" within {}", self.stuck_resolution)
                } else {
                    String::new()
                },
                sev(&self.stuck)
            ));
        }
        if self.stale.enabled {
            parts.push(format!("stale ({})", sev(&self.stale)));
        }
        if self.range.enabled && (self.range_low.is_some() || self.range_high.is_some()) {
            let b = |v: Option<f64>| v.map_or("-".to_string(), |v| v.to_string());
            parts.push(format!(
                "range [{}, {}] ({})",
                b(self.range_low),
                b(self.range_high),
                sev(&self.range)
            ));
        }
        if parts.is_empty() {
            "all off".to_string()
        } else {
            parts.join("; ")
        }
    }

    /// Every detector off: the channel is then the plain Kalman filter (no sample withheld).
    pub fn disabled() -> Self {
        let mut d = FlagDesign::default();
        for a in [
            &mut d.spike,
            &mut d.noise,
            &mut d.bias,
            &mut d.stuck,
            &mut d.stale,
            &mut d.range,
        ] {
            a.enabled = false;
        }
        d
    }
}

/// The numbers the detectors run on, for one nominal sample interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FlagSettings {
    pub alarms: [AlarmDesign; 7],
    /// |z| limit in sigmas; infinite when the spike flag is off.
    pub spike_limit: f64,
    pub spike_withhold: bool,
    pub spike_confirm: u32,
    pub noise_window: u32,
    pub noise_low: f64,
    pub noise_high: f64,
    pub cusum_k: f64,
    pub cusum_h: f64,
    pub stuck_window: u32,
    pub stuck_resolution: f64,
    pub range_low: f64,
    pub range_high: f64,
}

impl FlagSettings {
    pub fn alarm(&self, kind: FlagKind) -> &AlarmDesign {
        &self.alarms[kind.index()]
    }

    pub fn severity(&self, kind: FlagKind) -> Severity {
        self.alarms[kind.index()].severity
    }
}

/// Probability per sample of `per_day` false alarms at one sample every `interval` seconds.
pub fn per_sample(per_day: f64, interval: f64) -> f64 {
    per_day * interval / DAY_S
}

/// Two-sided normal limit with false-alarm probability `alpha`: Phi^-1(1 - alpha/2).
pub fn spike_limit(alpha: f64) -> f64 {
    let n = Normal::standard();
    n.inverse_cdf(1.0 - alpha / 2.0)
}

/// Bounds on the mean of `n` squared standard normals with two-sided probability `alpha` outside them.
pub fn noise_bounds(n: u32, alpha: f64) -> (f64, f64) {
    let chi = ChiSquared::new(f64::from(n)).expect("n >= 1 degrees of freedom");
    let n = f64::from(n);
    (
        chi.inverse_cdf(alpha / 2.0) / n,
        chi.inverse_cdf(1.0 - alpha / 2.0) / n,
    )
}

/// Siegmund's approximation of a one-sided CUSUM's average run length with reference value `k` and decision
/// interval `h` (both in sigmas) when the mean of z is `mu`.
pub fn cusum_arl_one_sided(k: f64, h: f64, mu: f64) -> f64 {
    let delta = mu - k;
    let b = h + SIEGMUND_B;
    if delta.abs() < 1e-9 {
        return b * b;
    }
    ((-2.0 * delta * b).exp() + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)
}

/// Average run length of the two-sided scheme: 1/ARL = 1/ARL+ + 1/ARL- (the usual combination of two one-sided
/// schemes).
pub fn cusum_arl(k: f64, h: f64, mu: f64) -> f64 {
    let up = cusum_arl_one_sided(k, h, mu);
    let down = cusum_arl_one_sided(k, h, -mu);
    1.0 / (1.0 / up + 1.0 / down)
}

/// The decision interval h whose in-control two-sided ARL is `arl` samples (bisection on Siegmund's formula,
/// which is increasing in h).
pub fn cusum_limit(k: f64, arl: f64) -> f64 {
    let (mut lo, mut hi) = (0.0_f64, 1.0_f64);
    while cusum_arl(k, hi, 0.0) < arl && hi < 1e6 {
        hi *= 2.0;
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if cusum_arl(k, mid, 0.0) < arl {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-10 * hi {
            break;
        }
    }
    0.5 * (lo + hi)
}

fn check_rate(per_day: f64, interval: f64, key: &'static str) -> Result<f64, DesignError> {
    if !(per_day.is_finite() && per_day > 0.0) {
        return Err(invalid(
            key,
            format!("false_alarms_per_day must be > 0 (got {per_day})"),
        ));
    }
    let alpha = per_sample(per_day, interval);
    // Beyond one false alarm per 20 samples a "flag" is noise; below 1e-12 the quantiles lose meaning.
    if !(1e-12..=0.05).contains(&alpha) {
        return Err(invalid(
            key,
            format!(
                "false_alarms_per_day = {per_day} at one sample every {interval} s is {alpha:.3e} per sample; \
                 it must be between 1e-12 and 0.05 per sample"
            ),
        ));
    }
    Ok(alpha)
}

impl FlagDesign {
    /// The thresholds for a channel sampled every `interval` seconds (its model's nominal interval).
    pub fn resolve(&self, interval: f64) -> Result<FlagSettings, DesignError> {
        if !(interval.is_finite() && interval > 0.0) {
            return Err(invalid(
                "interval",
                format!("must be seconds > 0 (got {interval})"),
            ));
        }
        self.spike.check("spike")?;
        self.noise.check("noise")?;
        self.bias.check("bias")?;
        self.stuck.check("stuck")?;
        self.stale.check("stale")?;
        self.range.check("range")?;
        let spike_limit = match self.spike_threshold {
            Threshold::PerDay(r) => spike_limit(check_rate(r, interval, "spike")?),
            Threshold::Raw(z) if z.is_finite() && z > 0.0 => z,
            Threshold::Raw(z) => {
                return Err(invalid(
                    "spike",
                    format!("threshold must be sigmas > 0 (got {z})"),
                ))
            }
        };
        if self.spike_confirm < 2 {
            return Err(invalid(
                "spike",
                "confirm must be at least 2 (one outlier is a spike, not a shift)",
            ));
        }
        if self.noise_window < 5 {
            return Err(invalid("noise", "window must be at least 5 samples"));
        }
        let (noise_low, noise_high) = match self.noise_threshold {
            NoiseThreshold::PerDay(r) => {
                let alpha = check_rate(r, interval, "noise")? * f64::from(self.noise_window);
                if alpha >= 0.5 {
                    return Err(invalid(
                        "noise",
                        format!(
                            "false_alarms_per_day = {r} with window = {} is a false alarm in {:.0}% of windows",
                            self.noise_window,
                            100.0 * alpha
                        ),
                    ));
                }
                noise_bounds(self.noise_window, alpha)
            }
            NoiseThreshold::Bounds(lo, hi) if lo >= 0.0 && hi > lo && hi.is_finite() => (lo, hi),
            NoiseThreshold::Bounds(lo, hi) => {
                return Err(invalid(
                    "noise",
                    format!("bounds must satisfy 0 <= low < high (got [{lo}, {hi}])"),
                ))
            }
        };
        if !(self.bias_shift.is_finite() && self.bias_shift > 0.0) {
            return Err(invalid(
                "bias",
                format!("shift must be sigmas > 0 (got {})", self.bias_shift),
            ));
        }
        let cusum_k = self.bias_shift / 2.0;
        let cusum_h = match self.bias_threshold {
            Threshold::PerDay(r) => cusum_limit(cusum_k, 1.0 / check_rate(r, interval, "bias")?),
            Threshold::Raw(h) if h.is_finite() && h > 0.0 => h,
            Threshold::Raw(h) => {
                return Err(invalid(
                    "bias",
                    format!("limit must be sigmas > 0 (got {h})"),
                ))
            }
        };
        if self.stuck_window < 2 {
            return Err(invalid("stuck", "window must be at least 2 samples"));
        }
        if !(self.stuck_resolution.is_finite() && self.stuck_resolution >= 0.0) {
            return Err(invalid(
                "stuck",
                format!("resolution must be >= 0 (got {})", self.stuck_resolution),
            ));
        }
        let range_low = self.range_low.unwrap_or(f64::NEG_INFINITY);
        let range_high = self.range_high.unwrap_or(f64::INFINITY);
        if range_low.is_nan() || range_high.is_nan() || range_low >= range_high {
            return Err(invalid(
                "range",
                format!("low must be below high (got low = {range_low}, high = {range_high})"),
            ));
        }
        Ok(FlagSettings {
            alarms: [
                self.spike, self.noise, self.bias, self.stuck, self.stale, self.range, LEARNING,
            ],
            spike_limit: if self.spike.enabled {
                spike_limit
            } else {
                f64::INFINITY
            },
            spike_withhold: self.spike_withhold && self.spike.enabled,
            spike_confirm: self.spike_confirm,
            noise_window: self.noise_window,
            noise_low,
            noise_high,
            cusum_k,
            cusum_h,
            stuck_window: self.stuck_window,
            stuck_resolution: self.stuck_resolution,
            range_low,
            range_high,
        })
    }
}

/// Raise and clear conditions of one detector at one sample.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
struct Condition {
    raise: bool,
    clear: bool,
}

/// One flag's hysteresis state.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
struct Alarm {
    active: bool,
    /// Since when the raise (while inactive) or clear (while active) condition has held.
    pending_since: f64,
    pending: bool,
    /// When the flag was last raised.
    since: f64,
}

impl Alarm {
    const IDLE: Alarm = Alarm {
        active: false,
        pending_since: f64::NAN,
        pending: false,
        since: f64::NAN,
    };

    /// Advances to time `t`; returns Some(true) when raised, Some(false) when cleared.
    fn update(&mut self, t: f64, c: Condition, design: &AlarmDesign) -> Option<bool> {
        let (want, delay) = if self.active {
            (c.clear && !c.raise, design.off_delay)
        } else {
            (c.raise, design.on_delay)
        };
        if !want {
            self.pending = false;
            return None;
        }
        if !self.pending {
            self.pending = true;
            self.pending_since = t;
        }
        if t - self.pending_since >= delay {
            self.pending = false;
            self.active = !self.active;
            if self.active {
                self.since = t;
            }
            return Some(self.active);
        }
        None
    }
}

/// What the detectors concluded at one sample.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct FlagUpdate {
    /// Flags active after this sample.
    pub active: FlagSet,
    pub raised: FlagSet,
    pub cleared: FlagSet,
}

impl FlagUpdate {
    pub fn changed(&self) -> bool {
        !(self.raised.is_empty() && self.cleared.is_empty())
    }
}

/// How the channel must treat the next sample's value before filtering it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Admit {
    /// Filter it with this gate.
    Filter(Gate),
    /// Withhold it (predict only): out of range, or the channel is flagged stuck.
    Withhold,
}

/// A channel's detectors and flag states.
#[derive(Debug, Clone, PartialEq)]
pub struct Detectors {
    /// Shared between the channels of one design and interval (see [`SettingsPool`]): ~360 bytes each otherwise.
    settings: Arc<FlagSettings>,
    m: DetectorMemory,
}

/// Resolved flag settings that channels share: the daemon keeps one per distinct design and interval instead of
/// one per channel (about 36 MB at 100,000 channels). Equal settings are found by value, so it needs no key.
#[derive(Debug, Default)]
pub struct SettingsPool {
    shared: Vec<Arc<FlagSettings>>,
}

impl SettingsPool {
    /// Points `settings` at the pool's copy of equal settings, adding them to the pool if new.
    pub fn share(&mut self, settings: &mut Arc<FlagSettings>) {
        match self.shared.iter().find(|p| ***p == **settings) {
            Some(p) => *settings = Arc::clone(p),
            None => self.shared.push(Arc::clone(settings)),
        }
    }

    /// Distinct settings held.
    pub fn len(&self) -> usize {
        self.shared.len()
    }

    pub fn is_empty(&self) -> bool {
        self.shared.is_empty()
    }
}

/// Everything the detectors remember between samples: what a checkpoint saves. The settings are not part of it;
/// they come from the configuration at restore time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DetectorMemory {
    alarms: [Alarm; 7],
    #[serde(with = "flag_bits")]
    active: FlagSet,
    // Outlier run (robust update): sign of the current run of outliers, its length, and the sum of its z clipped
    // at the spike limit, fed to the CUSUM if the run turns out to be a level shift.
    run_sign: f64,
    run_len: u32,
    run_sum: f64,
    // The standardised innovation of the last observed update: a large one may have been a spike just inside the
    // limit that the filter took in, and then the next good value looks like an outlier of the other sign.
    last_z: f64,
    // Noise: the current block and the last completed block's conditions.
    block_sum: f64,
    block_len: u32,
    noise: Condition,
    noise_mean: f64,
    // Bias: the two CUSUM sums.
    s_hi: f64,
    s_lo: f64,
    // Stuck: first value of the current flat run and its length; the forecast std of the last observed sample.
    anchor: f64,
    flat_len: u32,
    forecast_std: f64,
}

/// A [`FlagSet`] in a checkpoint: its bits (the JSON form, a list of names, is for people).
mod flag_bits {
    use super::FlagSet;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(set: &FlagSet, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_u8(set.0)
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<FlagSet, D::Error> {
        let bits = u8::deserialize(d)?;
        if bits >> 7 != 0 {
            return Err(serde::de::Error::custom(format!(
                "flag bits {bits:#x}: no such flag"
            )));
        }
        Ok(FlagSet(bits))
    }
}

impl Detectors {
    pub fn new(settings: FlagSettings) -> Self {
        Detectors {
            settings: Arc::new(settings),
            m: DetectorMemory {
                alarms: [Alarm::IDLE; 7],
                active: FlagSet::EMPTY,
                run_sign: 0.0,
                run_len: 0,
                run_sum: 0.0,
                last_z: 0.0,
                block_sum: 0.0,
                block_len: 0,
                noise: Condition::default(),
                noise_mean: f64::NAN,
                s_hi: 0.0,
                s_lo: 0.0,
                anchor: f64::NAN,
                flat_len: 0,
                forecast_std: f64::NAN,
            },
        }
    }

    /// Detectors that carry on from a saved memory under `settings` (a restart: the caller checks that the
    /// settings are the ones the memory was built under).
    pub fn resume(settings: FlagSettings, memory: DetectorMemory) -> Self {
        Detectors {
            settings: Arc::new(settings),
            m: memory,
        }
    }

    /// Shares the settings with other channels' equal ones through `pool`.
    pub fn share_settings(&mut self, pool: &mut SettingsPool) {
        pool.share(&mut self.settings);
    }

    /// What the detectors remember between samples, for a checkpoint.
    pub fn memory(&self) -> &DetectorMemory {
        &self.m
    }

    pub fn settings(&self) -> &FlagSettings {
        &self.settings
    }

    pub fn active(&self) -> FlagSet {
        self.m.active
    }

    /// When `kind` was last raised (NaN if never); meaningful while it is active.
    pub fn since(&self, kind: FlagKind) -> f64 {
        self.m.alarms[kind.index()].since
    }

    /// The larger CUSUM sum, in sigmas (for reports and tests).
    pub fn cusum(&self) -> f64 {
        self.m.s_hi.max(self.m.s_lo)
    }

    /// Mean of z^2 over the last completed noise block (NaN before the first).
    pub fn noise_mean(&self) -> f64 {
        self.m.noise_mean
    }

    fn in_range(&self, v: f64) -> bool {
        v >= self.settings.range_low && v <= self.settings.range_high
    }

    /// How the next sample with value `value` (None or NaN: missing) is to be filtered.
    pub fn admit(&self, value: Option<f64>) -> Admit {
        let s = &self.settings;
        if let Some(v) = value.filter(|v| !v.is_nan()) {
            let range_on = s.alarm(FlagKind::Range).enabled;
            if (range_on && !self.in_range(v)) || self.m.active.contains(FlagKind::Stuck) {
                return Admit::Withhold;
            }
        }
        if !s.spike_withhold {
            return Admit::Filter(Gate::NONE);
        }
        Admit::Filter(Gate {
            limit: s.spike_limit,
            reacquire: if self.m.run_len + 1 >= s.spike_confirm {
                self.m.run_sign
            } else if self.recovering() {
                -self.m.last_z.signum()
            } else {
                0.0
            },
        })
    }

    /// Whether an outlier now would be the filter's own error coming back: the last update took in a value
    /// nearly large enough to be a spike (|z| > 3/4 of the limit; a healthy sensor does that with probability
    /// below 1e-3 at any designed rate), so an outlier of the other sign is the good signal. Such an outlier
    /// re-acquires at once and is neither a spike nor evidence of a shift.
    fn recovering(&self) -> bool {
        self.m.run_len == 0 && self.m.last_z.abs() > RECOVERY_FRACTION * self.settings.spike_limit
    }

    /// Takes the result of filtering one sample at time `t` with raw value `value` (a value withheld by
    /// [`Detectors::admit`] was filtered as missing: `step` is then a prediction).
    pub fn observe(&mut self, t: f64, value: Option<f64>, step: &Step) -> FlagUpdate {
        let mut conditions = [Condition::default(); 7];
        // A copy on the stack, as before sharing: an Arc clone per sample would bounce its count between cores.
        let s = *self.settings;
        let value = value.filter(|v| !v.is_nan());
        // Any sample ends staleness.
        conditions[FlagKind::Stale.index()].clear = true;
        if let Some(v) = value {
            let range = &mut conditions[FlagKind::Range.index()];
            if !self.in_range(v) {
                range.raise = true;
            } else {
                let band = s.alarm(FlagKind::Range).deadband * (s.range_high - s.range_low);
                let band = if band.is_finite() { band } else { 0.0 };
                range.clear = v >= s.range_low + band && v <= s.range_high - band;
            }
            conditions[FlagKind::Stuck.index()] = self.stuck(v);
        }
        let z = step.standardized;
        let outlier = z.is_finite() && z.abs() > s.spike_limit;
        let recovery = outlier
            && step.kind == StepKind::Observed
            && s.spike_withhold
            && self.recovering()
            && z.signum() == -self.m.last_z.signum();
        if outlier && !recovery {
            conditions[FlagKind::Spike.index()].raise = true;
        } else {
            conditions[FlagKind::Spike.index()].clear = true;
        }
        match step.kind {
            StepKind::Withheld => {
                // An outlier held back from the update: part of a run that may prove to be a level shift.
                let sign = z.signum();
                if sign != self.m.run_sign {
                    self.m.run_sign = sign;
                    self.m.run_len = 0;
                    self.m.run_sum = 0.0;
                }
                self.m.run_len += 1;
                self.m.run_sum += z.clamp(-s.spike_limit, s.spike_limit);
            }
            StepKind::Observed if z.is_finite() => {
                if self.m.forecast_std.is_nan() || !outlier {
                    self.m.forecast_std = step.predicted_var.sqrt();
                }
                if recovery {
                    // Back from a value the filter should not have taken in: nothing to charge anyone with.
                } else if outlier && s.spike_withhold {
                    // The filter re-acquired on a confirmed shift: the whole run goes into the CUSUM.
                    let run = self.m.run_sum + z.clamp(-s.spike_limit, s.spike_limit);
                    let n = f64::from(self.m.run_len + 1);
                    if run > 0.0 {
                        self.m.s_hi =
                            (self.m.s_hi + run - n * s.cusum_k).clamp(0.0, 2.0 * s.cusum_h);
                        self.m.s_lo = 0.0;
                    } else {
                        self.m.s_lo =
                            (self.m.s_lo - run - n * s.cusum_k).clamp(0.0, 2.0 * s.cusum_h);
                        self.m.s_hi = 0.0;
                    }
                } else if !outlier {
                    self.cusum_step(z);
                    self.noise_step(z);
                }
                self.m.run_sign = 0.0;
                self.m.run_len = 0;
                self.m.run_sum = 0.0;
                // After a re-acquisition the state is fresh: no recovery chain from its large z.
                self.m.last_z = if outlier { 0.0 } else { z };
            }
            _ => {}
        }
        if s.alarm(FlagKind::Bias).enabled {
            let c = &mut conditions[FlagKind::Bias.index()];
            let stat = self.cusum();
            c.raise = stat > s.cusum_h;
            c.clear = stat < s.cusum_h * (1.0 - s.alarm(FlagKind::Bias).deadband);
        }
        conditions[FlagKind::Noise.index()] = self.m.noise;
        self.apply(t, &conditions)
    }

    /// Raises (`on`) or clears the `learning` flag at `t`: the channel's own state, not a test.
    pub fn set_learning(&mut self, t: f64, on: bool) -> FlagUpdate {
        let mut update = FlagUpdate {
            active: self.m.active,
            ..FlagUpdate::default()
        };
        let k = FlagKind::Learning;
        if self.m.active.contains(k) != on {
            let a = &mut self.m.alarms[k.index()];
            a.active = on;
            a.pending = false;
            if on {
                a.since = t;
            }
            self.record(k, on, &mut update);
        }
        update.active = self.m.active;
        update
    }

    /// The channel has had no sample for longer than its limit (the daemon's timer).
    pub fn on_stale(&mut self, t: f64) -> FlagUpdate {
        let mut conditions = [Condition::default(); 7];
        conditions[FlagKind::Stale.index()].raise = true;
        // Other flags hold their state: no sample, no evidence either way.
        let mut update = FlagUpdate {
            active: self.m.active,
            ..FlagUpdate::default()
        };
        let k = FlagKind::Stale;
        if !self.settings.alarm(k).enabled {
            return update;
        }
        if let Some(raised) =
            self.m.alarms[k.index()].update(t, conditions[k.index()], self.settings.alarm(k))
        {
            self.record(k, raised, &mut update);
        }
        update.active = self.m.active;
        update
    }

    fn cusum_step(&mut self, z: f64) {
        let s = &self.settings;
        if !s.alarm(FlagKind::Bias).enabled {
            return;
        }
        let cap = 2.0 * s.cusum_h;
        self.m.s_hi = (self.m.s_hi + z - s.cusum_k).clamp(0.0, cap);
        self.m.s_lo = (self.m.s_lo - z - s.cusum_k).clamp(0.0, cap);
    }

    fn noise_step(&mut self, z: f64) {
        let s = &self.settings;
        if !s.alarm(FlagKind::Noise).enabled {
            return;
        }
        self.m.block_sum += z * z;
        self.m.block_len += 1;
        if self.m.block_len >= s.noise_window {
            let mean = self.m.block_sum / f64::from(self.m.block_len);
            let db = s.alarm(FlagKind::Noise).deadband;
            self.m.noise = Condition {
                raise: mean < s.noise_low || mean > s.noise_high,
                clear: mean > s.noise_low / (1.0 - db) && mean < s.noise_high * (1.0 - db),
            };
            self.m.noise_mean = mean;
            self.m.block_sum = 0.0;
            self.m.block_len = 0;
        }
    }

    fn stuck(&mut self, v: f64) -> Condition {
        let s = &self.settings;
        let from_model = STUCK_FRACTION * self.m.forecast_std;
        let tol = if from_model.is_finite() {
            s.stuck_resolution.max(from_model)
        } else {
            s.stuck_resolution
        };
        if (v - self.m.anchor).abs() <= tol {
            self.m.flat_len += 1;
        } else {
            self.m.anchor = v;
            self.m.flat_len = 1;
        }
        let stuck = self.m.flat_len >= s.stuck_window;
        Condition {
            raise: stuck,
            clear: !stuck,
        }
    }

    fn apply(&mut self, t: f64, conditions: &[Condition; 7]) -> FlagUpdate {
        let mut update = FlagUpdate::default();
        for k in FlagKind::ALL {
            let design = self.settings.alarms[k.index()];
            if !design.enabled {
                continue;
            }
            if let Some(raised) = self.m.alarms[k.index()].update(t, conditions[k.index()], &design)
            {
                self.record(k, raised, &mut update);
            }
        }
        update.active = self.m.active;
        update
    }

    fn record(&mut self, k: FlagKind, raised: bool, update: &mut FlagUpdate) {
        if raised {
            self.m.active.insert(k);
            update.raised.insert(k);
        } else {
            self.m.active.remove(k);
            update.cleared.insert(k);
            if k == FlagKind::Bias {
                // A fresh Page scheme after each alarm, so the designed run length holds from here.
                self.m.s_hi = 0.0;
                self.m.s_lo = 0.0;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn channels_with_equal_settings_share_one_copy() {
        let design = FlagDesign::default();
        let mut pool = SettingsPool::default();
        let mut a = Detectors::new(design.resolve(1.0).unwrap());
        let mut b = Detectors::new(design.resolve(1.0).unwrap());
        let mut c = Detectors::new(design.resolve(10.0).unwrap());
        for d in [&mut a, &mut b, &mut c] {
            d.share_settings(&mut pool);
        }
        assert_eq!(pool.len(), 2, "one per interval");
        assert!(Arc::ptr_eq(&a.settings, &b.settings));
        assert!(!Arc::ptr_eq(&a.settings, &c.settings));
        assert_eq!(a.settings(), b.settings());
        assert_eq!(
            format!("{a:?}"),
            format!("{b:?}"),
            "sharing changes nothing a channel does"
        );
    }
    use approx::assert_relative_eq;

    #[test]
    fn quantiles_match_published_tables() {
        // Chi-square(1) upper quantiles, NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.4
        // (via ../shared/REFERENCES.md): a two-sided normal limit squared is the chi-square(1) quantile.
        assert_relative_eq!(spike_limit(0.05).powi(2), 3.8415, max_relative = 1e-4);
        assert_relative_eq!(spike_limit(0.01).powi(2), 6.6349, max_relative = 1e-4);
        assert_relative_eq!(spike_limit(0.001).powi(2), 10.8276, max_relative = 1e-4);
        // Two-sided 95% bounds on the mean of N squared normals (REFERENCES.md, computed values).
        for (n, lo, hi) in [
            (10, 0.3247, 2.0483),
            (20, 0.4795, 1.7085),
            (50, 0.6471, 1.4284),
        ] {
            let (l, h) = noise_bounds(n, 0.05);
            assert_relative_eq!(l, lo, max_relative = 2e-4);
            assert_relative_eq!(h, hi, max_relative = 2e-4);
        }
    }

    #[test]
    fn cusum_run_lengths_match_montgomery() {
        // Two-sided CUSUM ARLs with k = 0.5 (Montgomery, Introduction to Statistical Quality Control, CUSUM ARL
        // table, via ../shared/REFERENCES.md): h = 4: 168 in control, 8.38 at a 1-sigma shift; h = 5: 465 and
        // 10.4. Siegmund's approximation is within 1.5% of these.
        assert_relative_eq!(cusum_arl(0.5, 4.0, 0.0), 168.0, max_relative = 0.015);
        assert_relative_eq!(cusum_arl(0.5, 4.0, 1.0), 8.38, max_relative = 0.015);
        assert_relative_eq!(cusum_arl(0.5, 5.0, 0.0), 465.0, max_relative = 0.015);
        assert_relative_eq!(cusum_arl(0.5, 5.0, 1.0), 10.4, max_relative = 0.015);
        // And the inversion gives h back.
        assert_relative_eq!(
            cusum_limit(0.5, cusum_arl(0.5, 5.0, 0.0)),
            5.0,
            max_relative = 1e-8
        );
    }

    fn settings() -> FlagSettings {
        let mut d = FlagDesign::default();
        d.spike.off_delay = 0.0;
        d.range_low = Some(0.0);
        d.range_high = Some(100.0);
        d.resolve(1.0).unwrap()
    }

    fn observed(z: f64) -> Step {
        Step {
            kind: StepKind::Observed,
            predicted: 0.0,
            predicted_var: 1.0,
            innovation: z,
            standardized: z,
            estimate: 0.0,
            estimate_var: 0.5,
            loglik: 0.0,
        }
    }

    #[test]
    fn default_design_resolves_to_the_documented_numbers() {
        let s = FlagDesign::default().resolve(10.0).unwrap();
        // 0.1 per day at 10 s: 1.157e-5 per sample, |z| limit 4.38 (normal quantile).
        assert_relative_eq!(s.spike_limit, spike_limit(0.1 * 10.0 / 86_400.0));
        assert!(
            s.spike_limit > 4.3 && s.spike_limit < 4.45,
            "{}",
            s.spike_limit
        );
        assert_eq!(s.cusum_k, 0.5);
        assert_relative_eq!(
            cusum_arl(0.5, s.cusum_h, 0.0),
            86_400.0 / 1.0,
            max_relative = 1e-6
        );
        assert!(s.noise_low < 1.0 && s.noise_high > 1.0);
    }

    #[test]
    fn bad_designs_name_the_detector() {
        let mut d = FlagDesign {
            spike_threshold: Threshold::PerDay(1e6),
            ..FlagDesign::default()
        };
        let e = d.resolve(1.0).unwrap_err().to_string();
        assert!(e.starts_with("spike:"), "{e}");
        d.spike_threshold = Threshold::Raw(-1.0);
        assert!(d.resolve(1.0).is_err());
        d = FlagDesign {
            range_low: Some(5.0),
            range_high: Some(1.0),
            ..FlagDesign::default()
        };
        assert!(d
            .resolve(1.0)
            .unwrap_err()
            .to_string()
            .starts_with("range:"));
        d = FlagDesign::default();
        d.bias.deadband = 1.5;
        assert!(d.resolve(1.0).unwrap_err().to_string().starts_with("bias:"));
    }

    #[test]
    fn spike_raises_and_clears() {
        let mut d = Detectors::new(settings());
        let u = d.observe(0.0, Some(50.0), &observed(0.1));
        assert!(u.active.is_empty());
        let u = d.observe(1.0, Some(50.0), &observed(9.0));
        assert_eq!(u.raised, [FlagKind::Spike].into_iter().collect());
        assert!(d.active().contains(FlagKind::Spike));
        let u = d.observe(2.0, Some(50.1), &observed(0.0));
        assert_eq!(u.cleared, [FlagKind::Spike].into_iter().collect());
        assert!(d.active().is_empty());
    }

    #[test]
    fn on_delay_and_off_delay_hold() {
        let mut s = settings();
        s.alarms[FlagKind::Range.index()].on_delay = 2.0;
        s.alarms[FlagKind::Range.index()].off_delay = 3.0;
        let mut d = Detectors::new(s);
        let z = observed(0.0);
        assert!(d.observe(0.0, Some(120.0), &z).raised.is_empty());
        assert!(d.observe(1.0, Some(120.0), &z).raised.is_empty());
        assert!(d
            .observe(2.0, Some(120.0), &z)
            .raised
            .contains(FlagKind::Range));
        // Back in range for less than the off-delay: still active.
        d.observe(3.0, Some(50.0), &z);
        d.observe(4.0, Some(50.0), &z);
        assert!(d.active().contains(FlagKind::Range));
        // Out again resets the clearing clock.
        d.observe(5.0, Some(130.0), &z);
        d.observe(6.0, Some(50.0), &z);
        d.observe(8.0, Some(50.0), &z);
        assert!(d.active().contains(FlagKind::Range));
        assert!(d
            .observe(9.0, Some(50.0), &z)
            .cleared
            .contains(FlagKind::Range));
    }

    #[test]
    fn range_deadband_delays_clearing() {
        let mut d = Detectors::new(settings());
        let z = observed(0.0);
        d.observe(0.0, Some(101.0), &z);
        assert!(d.active().contains(FlagKind::Range));
        // 95 is inside the limits but within the 10% deadband of the 0..100 span.
        d.observe(1.0, Some(95.0), &z);
        assert!(d.active().contains(FlagKind::Range));
        d.observe(2.0, Some(85.0), &z);
        assert!(!d.active().contains(FlagKind::Range));
    }

    #[test]
    fn cusum_detects_a_persistent_shift_and_restarts_after_clearing() {
        let mut d = Detectors::new(settings());
        let h = d.settings().cusum_h;
        let mut t = 0.0;
        let mut raised_at = None;
        for i in 0..100 {
            t += 1.0;
            let u = d.observe(t, Some(50.0 + f64::from(i) * 1e-3), &observed(2.0));
            if u.raised.contains(FlagKind::Bias) {
                raised_at = Some(i);
                break;
            }
        }
        // z - k = 1.5 per sample: the sum first exceeds h at the n-th sample, n = floor(h / 1.5) + 1.
        let k = d.settings().cusum_k;
        assert_eq!(k, 0.5);
        assert_eq!(raised_at, Some((h / (2.0 - k)).floor() as i32));
        // Back to zero-mean innovations: the sum (capped at 2h) drains by k per sample and the flag clears.
        let mut cleared = false;
        for _ in 0..100 {
            t += 1.0;
            if d.observe(t, Some(50.0), &observed(0.0))
                .cleared
                .contains(FlagKind::Bias)
            {
                cleared = true;
                break;
            }
        }
        assert!(cleared);
        assert_eq!(d.cusum(), 0.0, "a fresh scheme after clearing");
    }

    #[test]
    fn noise_blocks_test_the_mean_square() {
        let mut d = Detectors::new(settings());
        let n = d.settings().noise_window;
        let mut t = 0.0;
        for i in 0..n {
            t += 1.0;
            // Alternating +-2: mean z^2 = 4, far above the upper bound; the CUSUM sees a zero mean.
            let z = if i % 2 == 0 { 2.0 } else { -2.0 };
            d.observe(t, Some(50.0 + t), &observed(z));
        }
        assert!(d.active().contains(FlagKind::Noise));
        assert_relative_eq!(d.noise_mean(), 4.0);
        assert!(!d.active().contains(FlagKind::Bias));
        for _ in 0..n {
            t += 1.0;
            d.observe(t, Some(50.0 + t), &observed(1.0));
        }
        assert!(!d.active().contains(FlagKind::Noise));
    }

    #[test]
    fn stuck_after_window_and_withheld_until_it_moves() {
        let mut d = Detectors::new(settings());
        let w = d.settings().stuck_window;
        let mut t = 0.0;
        d.observe(t, Some(50.0), &observed(0.3));
        for k in 1..w {
            t += 1.0;
            let u = d.observe(t, Some(50.0), &observed(0.0));
            assert_eq!(u.raised.contains(FlagKind::Stuck), k == w - 1, "sample {k}");
        }
        assert_eq!(d.admit(Some(50.0)), Admit::Withhold);
        t += 1.0;
        let u = d.observe(t, Some(51.0), &observed(0.0));
        assert!(u.cleared.contains(FlagKind::Stuck));
        assert!(matches!(d.admit(Some(51.0)), Admit::Filter(_)));
    }

    #[test]
    fn outlier_run_asks_for_reacquisition() {
        let mut d = Detectors::new(settings());
        let lim = d.settings().spike_limit;
        let withheld = |z: f64| Step {
            kind: StepKind::Withheld,
            ..observed(z)
        };
        assert_eq!(
            d.admit(Some(1.0)),
            Admit::Filter(Gate {
                limit: lim,
                reacquire: 0.0
            })
        );
        d.observe(0.0, Some(60.0), &withheld(8.0));
        d.observe(1.0, Some(60.0), &withheld(-8.0));
        // A run of one sign: the sign flipped, so the run restarted.
        d.observe(2.0, Some(60.0), &withheld(-8.0));
        assert_eq!(
            d.admit(Some(1.0)),
            Admit::Filter(Gate {
                limit: lim,
                reacquire: -1.0
            })
        );
        // The re-acquiring update carries the run into the CUSUM: a 3-sample shift of 8 sigma raises bias.
        let u = d.observe(3.0, Some(60.0), &observed(-8.0));
        assert!(u.raised.contains(FlagKind::Bias), "{u:?}");
        assert_eq!(
            d.admit(Some(1.0)),
            Admit::Filter(Gate {
                limit: lim,
                reacquire: 0.0
            })
        );
    }

    /// A spike just inside the limit is taken in; the next good value then looks like an outlier of the other
    /// sign. It must re-acquire at once, raise nothing, and not start a run that would end as a false `bias`.
    /// (Found by the detection benchmark: level model, obs_var 0.09, level_var 1.)
    #[test]
    fn recovery_from_an_absorbed_spike_is_not_a_shift() {
        use crate::model::{ModelParams, ModelSpec};
        let spec = ModelSpec {
            interval: 1.0,
            params: ModelParams::Level {
                obs_var: 0.09,
                level_var: 1.0,
            },
        };
        let mut design = FlagDesign::default();
        design.spike.off_delay = 0.0;
        let mut c = crate::channel::Channel::with_flags(&spec, &design).unwrap();
        let mut t = 0.0;
        for k in 0..100 {
            t += 1.0;
            c.on_sample(t, Some(50.0 + if k % 2 == 0 { 0.1 } else { -0.1 }));
        }
        t += 1.0;
        let absorbed = c.on_sample(t, Some(44.8));
        let z = absorbed.step.unwrap().standardized;
        assert!(z.abs() < c.detectors().settings().spike_limit, "{z}");
        t += 1.0;
        let back = c.on_sample(t, Some(50.6));
        assert_eq!(back.status, crate::channel::SampleStatus::Ok, "{back:?}");
        assert!(back.flags.raised.is_empty(), "{back:?}");
        assert!((back.step.unwrap().estimate - 50.6).abs() < 0.5, "{back:?}");
        for _ in 0..5 {
            t += 1.0;
            let o = c.on_sample(t, Some(50.5));
            assert!(o.flags.active.is_empty(), "{o:?}");
        }
        assert!(c.detectors().cusum() < 3.0);
    }

    #[test]
    fn stale_raises_and_any_sample_clears() {
        let mut d = Detectors::new(settings());
        assert!(d.on_stale(100.0).raised.contains(FlagKind::Stale));
        assert!(d.on_stale(110.0).raised.is_empty(), "raised once");
        assert!(d
            .observe(
                120.0,
                None,
                &Step {
                    kind: StepKind::Missing,
                    standardized: f64::NAN,
                    ..observed(0.0)
                }
            )
            .cleared
            .contains(FlagKind::Stale));
    }

    #[test]
    fn flag_sets_print_and_serialise() {
        let s: FlagSet = [FlagKind::Bias, FlagKind::Spike].into_iter().collect();
        assert_eq!(s.to_string(), "spike|bias");
        assert_eq!(serde_json::to_string(&s).unwrap(), r#"["spike","bias"]"#);
        assert_eq!(FlagSet::EMPTY.to_string(), "");
        assert_eq!(s.len(), 2);
    }
}
