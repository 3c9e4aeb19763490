//! The re-estimation targets of the issue, on simulated channels run through the same per-sample path and schedule
//! as `replay` (`Channel` + `reestimate::Learner::run_inline`). Simulated data are invented; the reference is the
//! simulation's own true parameters.
//!
//! - Noise step: a transmitter's observation noise variance steps from 0.5 to 2.0. Within two windows after the
//!   step the accepted estimate is within 10% of 2.0, and the spike detector's false-alarm rate is back at its
//!   designed value.
//! - Drift: a slow bias drift of 3 sigma over one window. The variances grow by less than 20% and the bias (drift)
//!   flag fires: the fault is not learnt away.

use gaugewise::channel::{Channel, SampleStatus};
use gaugewise::detect::{FlagDesign, FlagKind, Threshold};
use gaugewise::model::{ModelParams, ModelSpec};
use gaugewise::reestimate::{LearnSettings, Learner};
use gaugewise::simulate::Noise;

fn settings() -> LearnSettings {
    LearnSettings {
        window: 2000,
        every_s: 500.0,
        ..LearnSettings::default()
    }
}

fn obs_var(spec: &ModelSpec) -> f64 {
    match spec.params {
        ModelParams::Level { obs_var, .. } | ModelParams::Lag { obs_var, .. } => obs_var,
        _ => unreachable!(),
    }
}

#[test]
fn a_noise_step_is_learnt_within_two_windows_and_spike_alarms_return_to_design() {
    // Local level, 1 s samples; level_var 0.01, obs_var 0.5 then 2.0 from sample 4,000.
    let spec = ModelSpec {
        interval: 1.0,
        params: ModelParams::Level {
            obs_var: 0.5,
            level_var: 0.01,
        },
    };
    // A designed spike rate of 1e-3 per sample (86.4 per day at 1 s), so the rate can be measured in a test.
    let alpha = 1e-3;
    let design = FlagDesign {
        spike_threshold: Threshold::PerDay(alpha * 86_400.0),
        spike: gaugewise::detect::AlarmDesign {
            off_delay: 0.0,
            ..FlagDesign::default().spike
        },
        ..FlagDesign::default()
    };
    let mut channel = Channel::with_flags(&spec, &design).unwrap();
    let mut learner = Learner::new(settings());
    let mut noise = Noise::new(2026);
    let (step_at, window) = (4_000usize, settings().window);
    let n = step_at + 2 * window + 100_000;
    let mut level = 10.0;
    let mut accepted = Vec::new();
    let mut spikes_after = 0usize;
    let mut clean_after = 0usize;
    for k in 0..n {
        let t = k as f64;
        level += 0.1 * noise.normal();
        let sd = if k < step_at {
            0.5f64.sqrt()
        } else {
            2.0f64.sqrt()
        };
        let o = channel.on_sample(t, Some(level + sd * noise.normal()));
        if k >= step_at + 2 * window {
            clean_after += 1;
            if o.flags.raised.contains(FlagKind::Spike) {
                spikes_after += 1;
            }
        }
        if let Some(d) = learner.run_inline(&mut channel, &o) {
            if d.accepted() {
                accepted.push((k, obs_var(&d.new)));
            }
        }
    }
    println!("accepted changes (sample, obs_var): {accepted:?}");
    // Before the step nothing meaningful to learn: the first acceptance comes after it.
    assert!(accepted.iter().all(|(k, _)| *k > step_at), "{accepted:?}");
    let by_two_windows = accepted
        .iter()
        .rev()
        .find(|(k, _)| *k <= step_at + 2 * window)
        .expect("an accepted change within two windows of the step");
    assert!(
        (by_two_windows.1 - 2.0).abs() <= 0.2,
        "obs_var {} at sample {}",
        by_two_windows.1,
        by_two_windows.0
    );
    let rate = spikes_after as f64 / clean_after as f64;
    println!("spike raises after learning: {spikes_after} in {clean_after} samples ({rate:.2e}; designed {alpha:.0e})");
    assert!(
        rate > alpha / 2.0 && rate < alpha * 2.0,
        "spike false-alarm rate {rate:.2e} vs designed {alpha:.0e}"
    );
}

#[test]
fn a_slow_drift_is_flagged_not_learnt() {
    // AR(1) + noise as a lag model: phi = 0.9 at 1 s (tau 9.49 s), state_var 0.02, obs_var 1.0.
    let tau = -1.0 / 0.9f64.ln();
    let (state_var, obs) = (0.02, 1.0);
    let spec = ModelSpec {
        interval: 1.0,
        params: ModelParams::Lag {
            mean: 50.0,
            tau,
            state_var,
            obs_var: obs,
        },
    };
    let mut channel = Channel::new(&spec).unwrap();
    let mut learner = Learner::new(settings());
    let mut noise = Noise::new(7);
    let window = settings().window;
    // Clean for one window, then a drift of 3 sigma (sigma: the measurement noise std) over the next window.
    let sigma = obs.sqrt();
    let mut x = 0.0;
    let mut flagged_at = None;
    let mut max_growth: f64 = 1.0;
    for k in 0..3 * window {
        x = 0.9 * x + state_var.sqrt() * noise.normal();
        let drift = if k < window {
            0.0
        } else {
            3.0 * sigma * ((k - window) as f64 / window as f64).min(1.0)
        };
        let o = channel.on_sample(k as f64, Some(50.0 + x + sigma * noise.normal() + drift));
        if flagged_at.is_none() && o.flags.raised.contains(FlagKind::Bias) {
            flagged_at = Some(k);
        }
        if let Some(d) = learner.run_inline(&mut channel, &o) {
            if let ModelParams::Lag {
                state_var: s,
                obs_var: r,
                ..
            } = d.new.params
            {
                max_growth = max_growth.max(s / state_var).max(r / obs);
            }
        }
        assert_ne!(o.status, SampleStatus::Rejected);
    }
    let flagged_at = flagged_at.expect("the bias flag fires on the drift");
    println!(
        "drift from sample {window}: bias flag at {flagged_at} ({:.2} sigma), largest variance growth x{max_growth:.3}",
        3.0 * (flagged_at - window) as f64 / window as f64
    );
    assert!(flagged_at > window && flagged_at < 2 * window);
    assert!(max_growth < 1.2, "variances grew x{max_growth}");
}
