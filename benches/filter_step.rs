//! Cost of one filter step, per model: the daemon's per-sample work.
//!
//! Targets (issue): a 1-state model (level, lag) well under 50 ns per step; trend and arma(2,1) under 200 ns.
//!
//! Every bench steps one long-lived filter through a pre-generated noisy signal (a simulated `lag` process, 4096
//! values cycled), so the data and the branches vary as they do on a real channel and the filter stays in its
//! steady (non-diffuse) state. Variants:
//! - `observed`: regular sampling, every value present (the common case; the transition matrices are cached).
//! - `missing_1pct`: about 1% of values missing (predict-only steps mixed in at random).
//! - `jittered_dt`: the interval varies by up to +-2% from sample to sample, as timestamps from a real gateway do,
//!   so the filter recomputes the transition (exponentials, matrix composition) on every step; ARMA rounds to
//!   whole steps and keeps its cache.
//! - `every_other_missing`: the worst case for the steady-state shortcut, which never engages: the full
//!   recursion on every step (alternately predict-only and predict+update).
//!
//! The `filter` group goes through the run-time `Filter` enum (what `channel` and `estimate` use); the `kalman`
//! group calls the generic `Kalman<M, N>` directly, to show what the enum dispatch costs.
//!
//! The `channel` group times the whole per-sample path of a channel (ordering checks, fault detectors, the gated
//! step) with the flags on and off.
//!
//! Run: `cargo bench --bench filter_step`. That zero allocations happen per step is checked by `tests/no_alloc.rs`.

mod common;

use common::{lag_signal, Rng, INTERVAL, MEAN, OBS_VAR, PHI, STATE_VAR};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use gaugewise::channel::Channel;
use gaugewise::detect::FlagDesign;
use gaugewise::filter::{Filter, Kalman, Step};
use gaugewise::model::{Arma, Lag, Level, ModelParams, ModelSpec, StateSpace, Trend};
use std::hint::black_box;
use std::time::Duration;

/// Signal buffer length (a power of two, so the index wraps with a mask).
const LEN: usize = 4096;
const MASK: usize = LEN - 1;

fn spec(params: ModelParams) -> ModelSpec {
    ModelSpec {
        interval: INTERVAL,
        params,
    }
}

fn tau() -> f64 {
    -INTERVAL / PHI.ln()
}

/// The benchmarked models, with parameters of the size a fit on the simulated signal gives.
fn models() -> Vec<(&'static str, ModelSpec)> {
    vec![
        (
            "level",
            spec(ModelParams::Level {
                obs_var: OBS_VAR,
                level_var: 0.02,
            }),
        ),
        (
            "lag",
            spec(ModelParams::Lag {
                mean: MEAN,
                tau: tau(),
                state_var: STATE_VAR,
                obs_var: OBS_VAR,
            }),
        ),
        (
            "trend",
            spec(ModelParams::Trend {
                obs_var: OBS_VAR,
                level_var: 0.02,
                slope_var: 1e-4,
            }),
        ),
        (
            "arma(1,1)",
            spec(ModelParams::Arma {
                mean: MEAN,
                ar: vec![PHI],
                ma: vec![-0.3],
                var: 0.2,
            }),
        ),
        (
            "arma(2,1)",
            spec(ModelParams::Arma {
                mean: MEAN,
                ar: vec![1.2, -0.3],
                ma: vec![-0.3],
                var: 0.2,
            }),
        ),
    ]
}

/// Intervals for each sample: constant, or jittered by up to +-2%.
fn intervals(jitter: bool) -> Vec<f64> {
    let mut rng = Rng::new(99);
    (0..LEN)
        .map(|_| {
            if jitter {
                INTERVAL * (1.0 + 0.04 * (rng.uniform() - 0.5))
            } else {
                INTERVAL
            }
        })
        .collect()
}

/// Times one step per iteration, cycling through the buffers. `step` owns the (warmed-up) filter.
fn run_steps(
    b: &mut criterion::Bencher,
    dts: &[f64],
    ys: &[f64],
    mut step: impl FnMut(f64, Option<f64>) -> Step,
) {
    assert!(dts.len() == LEN && ys.len() == LEN);
    // One pass first: past the diffuse start, and the transition cache holds the current interval.
    for k in 0..LEN {
        black_box(step(dts[k], Some(ys[k])));
    }
    let mut i = 0usize;
    b.iter(|| {
        let k = i & MASK;
        i = i.wrapping_add(1);
        black_box(step(black_box(dts[k]), black_box(Some(ys[k]))))
    });
}

fn filter_step(c: &mut Criterion) {
    let (_, clean) = lag_signal(LEN, 0.0, 1);
    let (_, gappy) = lag_signal(LEN, 0.01, 1);
    let regular = intervals(false);
    let jittered = intervals(true);
    // Every second value missing: no step can take the steady-state shortcut, so this times the full
    // recursion (a predict-only step and a full predict+update step, alternately).
    let alternating: Vec<f64> = clean
        .iter()
        .enumerate()
        .map(|(i, y)| if i % 2 == 1 { f64::NAN } else { *y })
        .collect();
    let variants: [(&str, &[f64], &[f64]); 4] = [
        ("observed", &regular, &clean),
        ("missing_1pct", &regular, &gappy),
        ("jittered_dt", &jittered, &clean),
        ("every_other_missing", &regular, &alternating),
    ];

    let mut group = c.benchmark_group("filter");
    group.throughput(Throughput::Elements(1));
    for (name, model) in models() {
        for (variant, dts, ys) in variants {
            group.bench_function(BenchmarkId::new(variant, name), |b| {
                let mut f = Filter::new(&model).expect("valid model");
                run_steps(b, dts, ys, |dt, y| f.step(dt, y));
            });
        }
    }
    group.finish();
}

fn kalman_one<M: StateSpace<N> + Clone, const N: usize>(
    c: &mut criterion::BenchmarkGroup<'_, criterion::measurement::WallTime>,
    name: &str,
    model: M,
    dts: &[f64],
    ys: &[f64],
) {
    c.bench_function(BenchmarkId::new("observed", name), |b| {
        let mut k = Kalman::new(model.clone());
        run_steps(b, dts, ys, |dt, y| k.step(dt, y));
    });
}

fn kalman_step(c: &mut Criterion) {
    let (_, clean) = lag_signal(LEN, 0.0, 1);
    let regular = intervals(false);
    let mut group = c.benchmark_group("kalman");
    group.throughput(Throughput::Elements(1));
    let level = Level {
        obs_var: OBS_VAR,
        level_rate: 0.02 / INTERVAL,
    };
    kalman_one(&mut group, "level", level, &regular, &clean);
    let lag = Lag {
        mean: MEAN,
        tau: tau(),
        stationary_var: STATE_VAR / (1.0 - PHI * PHI),
        obs_var: OBS_VAR,
    };
    kalman_one(&mut group, "lag", lag, &regular, &clean);
    let trend = Trend {
        obs_var: OBS_VAR,
        level_var: 0.02,
        slope_var: 1e-4,
        interval: INTERVAL,
    };
    kalman_one(&mut group, "trend", trend, &regular, &clean);
    let arma11 = Arma::<2>::new(MEAN, &[PHI], &[-0.3], 0.2, INTERVAL).expect("stationary");
    kalman_one(&mut group, "arma(1,1)", arma11, &regular, &clean);
    let arma21 = Arma::<2>::new(MEAN, &[1.2, -0.3], &[-0.3], 0.2, INTERVAL).expect("stationary");
    kalman_one(&mut group, "arma(2,1)", arma21, &regular, &clean);
    group.finish();
}

/// The channel's whole per-sample path (ordering checks, detectors, gated filter step), against `filter` above:
/// what the fault flags cost per sample.
fn channel_step(c: &mut Criterion) {
    let (_, clean) = lag_signal(LEN, 0.0, 1);
    let mut group = c.benchmark_group("channel");
    group.throughput(Throughput::Elements(1));
    for (name, model) in models() {
        for (variant, design) in [
            ("flags_on", FlagDesign::default()),
            ("flags_off", FlagDesign::disabled()),
        ] {
            group.bench_function(BenchmarkId::new(variant, name), |b| {
                let mut ch = Channel::with_flags(&model, &design).expect("valid model");
                let mut t = 0.0;
                for y in &clean {
                    t += INTERVAL;
                    black_box(ch.on_sample(t, Some(*y)));
                }
                let mut i = 0usize;
                b.iter(|| {
                    let k = i & MASK;
                    i = i.wrapping_add(1);
                    t += INTERVAL;
                    black_box(ch.on_sample(black_box(t), black_box(Some(clean[k]))))
                });
            });
        }
    }
    group.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default()
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2));
    targets = filter_step, kalman_step, channel_step
}
criterion_main!(benches);
