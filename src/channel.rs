//! One tag's streaming state: its model's filter and the time of its last sample.
//!
//! `Channel::on_sample(t, value)` is the single entry point for a sample, whatever its source: `gaugewise replay`
//! feeds it from a CSV, the daemon from MQTT. It decides what a sample is (usable, missing, late, duplicate,
//! rejected) and never lets a bad one touch the filter state. Pure core: no IO, no clock; time arrives as an
//! argument in seconds.
//!
//! `Channel::stale(now)` is the daemon's answer for a channel that has gone quiet: the filter's forecast from the
//! last sample to `now`, with its growing uncertainty, computed without touching the state, so a stale report
//! never changes what the next real sample does. [`Channel::mark_stale`] is the same forecast plus the `stale`
//! flag.
//!
//! Every sample also goes through the channel's fault detectors (`detect`): they decide beforehand whether the
//! value may update the state (robust update), and afterwards which flags are raised or cleared.

use crate::detect::{Admit, DesignError, DetectorMemory, Detectors, FlagDesign, FlagUpdate};
use crate::filter::{Filter, FilterState, StateError, Step, StepKind};
use crate::model::{ModelError, ModelKind, ModelSpec};
use serde::{Deserialize, Serialize};
use thiserror::Error;

/// Why a saved channel could not be resumed.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ResumeError {
    #[error("saved model: {0}")]
    Model(#[from] ModelError),
    #[error("saved filter state: {0}")]
    State(#[from] StateError),
    #[error("flags.{0}")]
    Flags(#[from] DesignError),
    #[error("saved time of the last sample is not finite ({0})")]
    Time(f64),
}

/// A channel's state as a checkpoint keeps it: the model it runs now (re-estimated parameters included), its
/// filter state, its detectors' memory, the time of its last sample and, while it learns, the learning state.
/// What it does not hold is configuration (the flag design): that is read again at restore.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SavedChannel {
    kind: ModelKind,
    interval: f64,
    /// In the order of [`ModelSpec::values`].
    values: Vec<f64>,
    filter: FilterState,
    detectors: DetectorMemory,
    last_time: Option<f64>,
    learning: Option<Learning>,
}

impl SavedChannel {
    /// Channel time of the last sample the saved state has taken in.
    pub fn last_time(&self) -> Option<f64> {
        self.last_time
    }
}

/// Why a channel could not be built.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ChannelError {
    #[error(transparent)]
    Model(#[from] ModelError),
    #[error("flags.{0}")]
    Flags(#[from] DesignError),
}

/// How a sample was treated.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum SampleStatus {
    /// Used to update the estimate.
    Ok,
    /// No value (empty, null, NaN or bad quality): the estimate is a prediction.
    Missing,
    /// Older than the channel's last sample: dropped, state untouched.
    Late,
    /// Same time as the channel's last sample: dropped, state untouched.
    Duplicate,
    /// Unusable (non-finite time, infinite value): dropped, state untouched.
    Rejected,
    /// No sample for longer than the staleness limit: a forecast from the last sample, state untouched.
    Stale,
    /// A value that did not update the estimate: a spike, outside the engineering range, or from a channel
    /// flagged stuck (the flags say which). Time advances as for a missing sample.
    Withheld,
}

impl SampleStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            SampleStatus::Ok => "ok",
            SampleStatus::Missing => "missing",
            SampleStatus::Late => "late",
            SampleStatus::Duplicate => "duplicate",
            SampleStatus::Rejected => "rejected",
            SampleStatus::Stale => "stale",
            SampleStatus::Withheld => "withheld",
        }
    }
}

/// What the channel reports for one sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Outcome {
    pub time: f64,
    /// The value as received (NaN when missing).
    pub raw: f64,
    pub status: SampleStatus,
    /// The filter's account; None for dropped samples.
    pub step: Option<Step>,
    /// Flags active after this sample, and those it raised or cleared.
    pub flags: FlagUpdate,
}

impl Outcome {
    /// Standard deviation of the estimate (infinite while the model is still diffuse, NaN when dropped).
    pub fn std(&self) -> f64 {
        self.step
            .map_or(f64::NAN, |s| s.estimate_var.max(0.0).sqrt())
    }
}

/// The stand-in a channel runs while it learns its parameters: a local level whose two variances are both set
/// from the data seen so far (see [`Learning`]). A level assumes nothing about the signal's mean or dynamics, so
/// the estimate follows the data, and equal variances make its std a fair, not an optimistic, account.
pub fn provisional_model(interval: f64) -> ModelSpec {
    ModelSpec {
        interval,
        params: crate::model::ModelParams::Level {
            obs_var: 1.0,
            level_var: 1.0,
        },
    }
}

/// A channel with no configured parameters, until its first fit: the kind it is to learn and the running mean
/// square of its first differences, which sizes the provisional model (for a level with equal variances s,
/// E[(y_t - y_t-1)^2] = 3 s).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct Learning {
    target: ModelKind,
    last: f64,
    sum_d2: f64,
    n_d: u32,
    /// The variance the provisional model runs with now.
    scale: f64,
}

/// A channel's filter, detectors and ordering state.
#[derive(Debug, Clone)]
pub struct Channel {
    spec: ModelSpec,
    filter: Filter,
    detectors: Detectors,
    last_time: Option<f64>,
    learning: Option<Box<Learning>>,
}

impl Channel {
    /// A channel with the default flag design.
    pub fn new(spec: &ModelSpec) -> Result<Self, ChannelError> {
        Channel::with_flags(spec, &FlagDesign::default())
    }

    /// A channel whose flags follow `design`, resolved at the model's nominal interval.
    pub fn with_flags(spec: &ModelSpec, design: &FlagDesign) -> Result<Self, ChannelError> {
        Ok(Self {
            filter: Filter::new(spec)?,
            detectors: Detectors::new(design.resolve(spec.interval)?),
            spec: spec.clone(),
            last_time: None,
            learning: None,
        })
    }

    /// A channel with no configured parameters: it runs [`provisional_model`] with the `learning` flag raised
    /// and no other flag (their thresholds would mean nothing on a stand-in model) until [`Channel::learned`]
    /// gives it a fitted model of kind `target`.
    pub fn learning(
        target: ModelKind,
        interval: f64,
        design: &FlagDesign,
    ) -> Result<Self, ChannelError> {
        let mut c = Channel::with_flags(&provisional_model(interval), design)?;
        c.learning = Some(Box::new(Learning {
            target,
            last: f64::NAN,
            sum_d2: 0.0,
            n_d: 0,
            scale: 1.0,
        }));
        Ok(c)
    }

    /// The model kind the channel is still learning, if it is.
    pub fn learning_target(&self) -> Option<ModelKind> {
        self.learning.as_ref().map(|l| l.target)
    }

    /// Ends learning at channel time `t`: runs `spec` from the next sample (the filter carries its state over
    /// when the kind allows, else starts from the new model's prior) and clears the `learning` flag. The flag
    /// change is returned for publishing.
    pub fn learned(&mut self, spec: &ModelSpec, t: f64) -> Result<FlagUpdate, ChannelError> {
        self.set_model(spec)?;
        self.learning = None;
        Ok(self.detectors.set_learning(t, false))
    }

    pub fn detectors(&self) -> &Detectors {
        &self.detectors
    }

    /// Shares its resolved flag settings with other channels' equal ones (memory, not behaviour).
    pub fn share_flag_settings(&mut self, pool: &mut crate::detect::SettingsPool) {
        self.detectors.share_settings(pool);
    }

    /// The channel's state for a checkpoint (allocates; called at save time, not per sample).
    pub fn save(&self) -> SavedChannel {
        SavedChannel {
            kind: self.spec.kind(),
            interval: self.spec.interval,
            values: self.spec.values(),
            filter: self.filter.save_state(),
            detectors: self.detectors.memory().clone(),
            last_time: self.last_time,
            learning: self.learning.as_deref().cloned(),
        }
    }

    /// A channel that carries on from `saved`, with flags designed by `design` (the caller checks that the
    /// configuration is the one the state was saved under). The next sample's gap is measured from the saved
    /// last sample time, so the time the daemon was down is a gap like any other: predicted over, never filled.
    pub fn resume(saved: &SavedChannel, design: &FlagDesign) -> Result<Self, ResumeError> {
        let spec = ModelSpec::from_values(saved.kind, saved.interval, &saved.values)?;
        let mut filter = Filter::new(&spec)?;
        filter.restore_state(&saved.filter)?;
        if let Some(t) = saved.last_time.filter(|t| !t.is_finite()) {
            return Err(ResumeError::Time(t));
        }
        let learning = saved.learning.clone().map(Box::new);
        Ok(Channel {
            detectors: Detectors::resume(design.resolve(spec.interval)?, saved.detectors.clone()),
            spec,
            filter,
            last_time: saved.last_time,
            learning,
        })
    }

    /// Runs `spec` from the next sample on (re-estimated parameters). The filter's state carries over when the
    /// model family and state size are unchanged; otherwise the new model starts from its prior. The flags keep
    /// their state (their thresholds depend only on the nominal interval, which a re-estimation keeps).
    pub fn set_model(&mut self, spec: &ModelSpec) -> Result<(), ChannelError> {
        let mut filter = Filter::new(spec)?;
        filter.adopt(&self.filter);
        self.filter = filter;
        self.spec = spec.clone();
        Ok(())
    }

    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }

    pub fn last_time(&self) -> Option<f64> {
        self.last_time
    }

    /// The forecast at time `now` (seconds, the channel's own clock) from the last sample, as a `stale` outcome:
    /// estimate and std of the predicted signal, no raw value, no innovation. The state is not changed, so the
    /// next real sample is filtered exactly as if no stale report had been made. None before the first sample
    /// (there is nothing to be stale about) or for a non-finite `now`. A `now` before the last sample forecasts
    /// zero seconds ahead.
    pub fn stale(&self, now: f64) -> Option<Outcome> {
        let last = self.last_time?;
        if !now.is_finite() {
            return None;
        }
        let f = self.filter.forecast((now - last).max(0.0));
        Some(Outcome {
            time: now,
            raw: f64::NAN,
            status: SampleStatus::Stale,
            step: Some(Step {
                kind: StepKind::Missing,
                predicted: f.signal,
                predicted_var: f.obs_var,
                innovation: f64::NAN,
                standardized: f64::NAN,
                estimate: f.signal,
                estimate_var: f.signal_var,
                loglik: 0.0,
            }),
            flags: FlagUpdate {
                active: self.detectors.active(),
                ..FlagUpdate::default()
            },
        })
    }

    /// [`Channel::stale`], and the `stale` flag raised (once) at `now`. The filter state is untouched.
    pub fn mark_stale(&mut self, now: f64) -> Option<Outcome> {
        let mut outcome = self.stale(now)?;
        outcome.flags = self.detectors.on_stale(now);
        Some(outcome)
    }

    /// Takes one sample at time `t` (seconds); `None` or NaN is a missing value.
    pub fn on_sample(&mut self, t: f64, value: Option<f64>) -> Outcome {
        let raw = value.unwrap_or(f64::NAN);
        let flags = FlagUpdate {
            active: self.detectors.active(),
            ..FlagUpdate::default()
        };
        let dropped = |status| Outcome {
            time: t,
            raw,
            status,
            step: None,
            flags,
        };
        if !t.is_finite() || raw.is_infinite() {
            return dropped(SampleStatus::Rejected);
        }
        let dt = match self.last_time {
            Some(last) if t < last => return dropped(SampleStatus::Late),
            Some(last) if t == last => return dropped(SampleStatus::Duplicate),
            Some(last) => t - last,
            None => 0.0,
        };
        self.last_time = Some(t);
        if self.learning.is_some() {
            return self.on_learning_sample(t, dt, raw);
        }
        let step = match self.detectors.admit(value) {
            Admit::Filter(gate) => self.filter.step_gated(dt, Some(raw), gate),
            Admit::Withhold => self.filter.step(dt, None),
        };
        let status = match step.kind {
            StepKind::Missing if raw.is_nan() => SampleStatus::Missing,
            StepKind::Missing | StepKind::Withheld => SampleStatus::Withheld,
            _ => SampleStatus::Ok,
        };
        let flags = self.detectors.observe(t, value, &step);
        Outcome {
            time: t,
            raw,
            status,
            step: Some(step),
            flags,
        }
    }
}

impl Channel {
    /// A sample while learning: the provisional model is resized from the data, then filters the value; only
    /// the `learning` flag is kept (and raised at the first sample).
    fn on_learning_sample(&mut self, t: f64, dt: f64, raw: f64) -> Outcome {
        let mut flags = self.detectors.set_learning(t, true);
        let l = self.learning.as_mut().expect("learning");
        if !raw.is_nan() {
            if !l.last.is_nan() {
                l.sum_d2 += (raw - l.last).powi(2);
                l.n_d += 1;
            }
            l.last = raw;
        }
        if l.n_d > 0 {
            let s = (l.sum_d2 / f64::from(l.n_d) / 3.0).max(f64::MIN_POSITIVE);
            // Resize only on a real change: each resize leaves the steady-state shortcut.
            if (s / l.scale - 1.0).abs() > 0.1 {
                l.scale = s;
                let mut spec = provisional_model(self.spec.interval);
                spec.params = crate::model::ModelParams::Level {
                    obs_var: s,
                    level_var: s,
                };
                if let Ok(f) = Filter::new(&spec) {
                    let mut f = f;
                    f.adopt(&self.filter);
                    self.filter = f;
                    self.spec = spec;
                }
            }
        }
        let step = self.filter.step(dt, Some(raw));
        let status = if step.kind == StepKind::Missing {
            SampleStatus::Missing
        } else {
            SampleStatus::Ok
        };
        flags.active = self.detectors.active();
        Outcome {
            time: t,
            raw,
            status,
            step: Some(step),
            flags,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::ModelParams;

    fn channel() -> Channel {
        Channel::new(&ModelSpec {
            interval: 10.0,
            params: ModelParams::Lag {
                mean: 70.0,
                tau: 300.0,
                state_var: 0.01,
                obs_var: 0.04,
            },
        })
        .unwrap()
    }

    #[test]
    fn late_duplicate_and_rejected_leave_state_alone() {
        let mut c = channel();
        assert_eq!(c.on_sample(100.0, Some(71.0)).status, SampleStatus::Ok);
        let reference = c.clone().on_sample(110.0, Some(71.5));
        assert_eq!(c.on_sample(90.0, Some(50.0)).status, SampleStatus::Late);
        assert_eq!(
            c.on_sample(100.0, Some(50.0)).status,
            SampleStatus::Duplicate
        );
        assert_eq!(
            c.on_sample(f64::NAN, Some(50.0)).status,
            SampleStatus::Rejected
        );
        assert_eq!(
            c.on_sample(105.0, Some(f64::INFINITY)).status,
            SampleStatus::Rejected
        );
        assert_eq!(c.on_sample(110.0, Some(71.5)), reference);
    }

    #[test]
    fn stale_forecasts_without_touching_state() {
        let mut c = channel();
        assert!(
            c.stale(50.0).is_none(),
            "nothing to forecast before a sample"
        );
        c.on_sample(0.0, Some(71.0));
        c.on_sample(10.0, Some(71.4));
        let reference = c.clone();
        let near = c.stale(20.0).unwrap();
        let far = c.stale(600.0).unwrap();
        assert_eq!(near.status, SampleStatus::Stale);
        assert_eq!(near.status.as_str(), "stale");
        assert!(near.raw.is_nan() && near.step.unwrap().innovation.is_nan());
        assert!(near.std() < far.std(), "uncertainty grows with silence");
        // A lag relaxes towards its mean: the far forecast is closer to 70 than the near one.
        let est = |o: &Outcome| o.step.unwrap().estimate;
        assert!((est(&far) - 70.0).abs() < (est(&near) - 70.0).abs());
        assert!(c.stale(f64::NAN).is_none());
        assert_eq!(c.stale(5.0).unwrap().std(), c.stale(10.0).unwrap().std());
        // The forecast equals a missing sample at that time, which is what the filter would do with one.
        let mut probe = c.clone();
        let missing = probe.on_sample(20.0, None).step.unwrap();
        assert_eq!(near.step.unwrap().estimate, missing.estimate);
        assert!((near.std() - missing.estimate_var.sqrt()).abs() < 1e-12);
        // And the state did not move.
        assert_eq!(
            c.on_sample(30.0, Some(71.2)),
            reference.clone().on_sample(30.0, Some(71.2))
        );
    }

    #[test]
    fn missing_value_predicts_and_advances_time() {
        let mut c = channel();
        c.on_sample(0.0, Some(71.0));
        let o = c.on_sample(10.0, None);
        assert_eq!(o.status, SampleStatus::Missing);
        assert!(o.std().is_finite());
        assert_eq!(c.last_time(), Some(10.0));
    }

    /// Noise with a spike every 97 samples and a step at 400, so the detectors hold state (an outlier run, CUSUM
    /// sums, raised flags) when the channel is saved.
    fn signal(k: usize) -> Option<f64> {
        let mut n = crate::simulate::Noise::new(7 + k as u64);
        let base = 70.0 + 0.3 * n.normal() + if k >= 400 { 1.5 } else { 0.0 };
        match k {
            _ if k % 131 == 0 => None,
            _ if k % 97 == 0 => Some(base + 9.0),
            _ => Some(base),
        }
    }

    fn assert_same_course(mut a: Channel, mut b: Channel, from: usize, what: &str) {
        for k in from..from + 600 {
            let t = 10.0 * k as f64 + if k >= from + 5 { 3600.0 } else { 0.0 };
            let (x, y) = (a.on_sample(t, signal(k)), b.on_sample(t, signal(k)));
            assert_eq!(x.status, y.status, "{what}: status at {k}");
            assert_eq!(x.flags, y.flags, "{what}: flags at {k}");
            let (sx, sy) = (x.step.unwrap(), y.step.unwrap());
            // Not bit for bit: a restored filter leaves the steady-state shortcut until it converges again.
            for (u, v, name) in [
                (sx.estimate, sy.estimate, "estimate"),
                (sx.estimate_var, sy.estimate_var, "variance"),
                (sx.standardized, sy.standardized, "z"),
            ] {
                let ok = (u.is_nan() && v.is_nan()) || (u - v).abs() <= 1e-9 * (1.0 + u.abs());
                assert!(ok, "{what}: {name} at {k}: {u} against {v}");
            }
        }
    }

    #[test]
    fn a_resumed_channel_carries_on_like_the_uninterrupted_one() {
        let interval = 10.0;
        let specs = [
            ModelParams::Level {
                obs_var: 0.09,
                level_var: 0.01,
            },
            ModelParams::Lag {
                mean: 70.0,
                tau: 300.0,
                state_var: 0.01,
                obs_var: 0.09,
            },
            ModelParams::Trend {
                obs_var: 0.09,
                level_var: 0.01,
                slope_var: 1e-6,
            },
            ModelParams::Arma {
                mean: 70.0,
                ar: vec![0.8, -0.1],
                ma: vec![0.3],
                var: 0.1,
            },
        ];
        for params in specs {
            let spec = ModelSpec { interval, params };
            let what = spec.kind().to_string();
            let mut c = Channel::new(&spec).unwrap();
            for k in 0..450 {
                c.on_sample(interval * k as f64, signal(k));
            }
            // Through the checkpoint's own encoding (MessagePack with field names).
            let bytes = rmp_serde::to_vec_named(&c.save()).unwrap();
            let saved: SavedChannel = rmp_serde::from_slice(&bytes).unwrap();
            let resumed = Channel::resume(&saved, &FlagDesign::default()).unwrap();
            assert_eq!(resumed.spec(), c.spec(), "{what}");
            // Debug, because the memory holds NaNs ("never"), which PartialEq says differ.
            assert_eq!(
                format!("{:?}", resumed.detectors()),
                format!("{:?}", c.detectors()),
                "{what}"
            );
            assert_eq!(resumed.last_time(), c.last_time(), "{what}");
            assert_same_course(c, resumed, 450, &what);
        }
    }

    #[test]
    fn a_learning_channel_resumes_learning() {
        let mut c = Channel::learning(ModelKind::Lag, 10.0, &FlagDesign::default()).unwrap();
        for k in 0..50 {
            c.on_sample(10.0 * k as f64, signal(k));
        }
        let resumed = Channel::resume(&c.save(), &FlagDesign::default()).unwrap();
        assert_eq!(resumed.learning_target(), Some(ModelKind::Lag));
        assert_same_course(c, resumed, 50, "learning");
    }

    #[test]
    fn a_saved_state_that_does_not_fit_is_refused() {
        let mut c = channel();
        c.on_sample(0.0, Some(71.0));
        let good = c.save();
        let mut bad = good.clone();
        bad.filter.a.push(1.0);
        assert!(matches!(
            Channel::resume(&bad, &FlagDesign::default()),
            Err(ResumeError::State(StateError::Size { .. }))
        ));
        let mut bad = good.clone();
        bad.filter.p[0] = f64::NAN;
        assert!(Channel::resume(&bad, &FlagDesign::default()).is_err());
        let mut bad = good.clone();
        bad.values.pop();
        assert!(matches!(
            Channel::resume(&bad, &FlagDesign::default()),
            Err(ResumeError::Model(ModelError::ValueCount { .. }))
        ));
        // An unknown model kind does not even decode.
        let mut bytes = rmp_serde::to_vec(&good).unwrap();
        let at = bytes.windows(3).position(|w| w == b"lag").unwrap();
        bytes[at + 1] = b'u';
        assert!(rmp_serde::from_slice::<SavedChannel>(&bytes).is_err());
        let mut bad = good;
        bad.last_time = Some(f64::INFINITY);
        assert!(matches!(
            Channel::resume(&bad, &FlagDesign::default()),
            Err(ResumeError::Time(_))
        ));
    }
}
