//! One tag's streaming state: its model's filter and the time of its last sample.
//!
//! `Channel::on_sample(t, value)` is the single entry point for a sample, whatever its source: `gaugewise replay`
//! feeds it from a CSV, the daemon from MQTT. It decides what a sample is (usable, missing, late, duplicate,
//! rejected) and never lets a bad one touch the filter state. Pure core: no IO, no clock; time arrives as an
//! argument in seconds.

use crate::filter::{Filter, Step, StepKind};
use crate::model::{ModelError, ModelSpec};
use serde::Serialize;

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
}

impl SampleStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            SampleStatus::Ok => "ok",
            SampleStatus::Missing => "missing",
            SampleStatus::Late => "late",
            SampleStatus::Duplicate => "duplicate",
            SampleStatus::Rejected => "rejected",
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
}

impl Outcome {
    /// Standard deviation of the estimate (infinite while the model is still diffuse, NaN when dropped).
    pub fn std(&self) -> f64 {
        self.step
            .map_or(f64::NAN, |s| s.estimate_var.max(0.0).sqrt())
    }
}

/// A channel's filter plus ordering state.
#[derive(Debug, Clone)]
pub struct Channel {
    spec: ModelSpec,
    filter: Filter,
    last_time: Option<f64>,
}

impl Channel {
    pub fn new(spec: &ModelSpec) -> Result<Self, ModelError> {
        Ok(Self {
            filter: Filter::new(spec)?,
            spec: spec.clone(),
            last_time: None,
        })
    }

    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }

    pub fn last_time(&self) -> Option<f64> {
        self.last_time
    }

    /// Takes one sample at time `t` (seconds); `None` or NaN is a missing value.
    pub fn on_sample(&mut self, t: f64, value: Option<f64>) -> Outcome {
        let raw = value.unwrap_or(f64::NAN);
        let dropped = |status| Outcome {
            time: t,
            raw,
            status,
            step: None,
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
        let step = self.filter.step(dt, Some(raw));
        let status = if step.kind == StepKind::Missing {
            SampleStatus::Missing
        } else {
            SampleStatus::Ok
        };
        Outcome {
            time: t,
            raw,
            status,
            step: Some(step),
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
    fn missing_value_predicts_and_advances_time() {
        let mut c = channel();
        c.on_sample(0.0, Some(71.0));
        let o = c.on_sample(10.0, None);
        assert_eq!(o.status, SampleStatus::Missing);
        assert!(o.std().is_finite());
        assert_eq!(c.last_time(), Some(10.0));
    }
}
