//! Cost of fitting: `estimate::compare` with the default candidates (level, lag, trend, arma(1,1)) on 10,000 samples.
//!
//! Target (issue): under 1 s on one core for the whole comparison. The data is a simulated `lag` process (AR(1)
//! around a mean plus measurement noise, 10 s interval) with about 1% of values missing, generated from a fixed seed.
//!
//! Groups:
//! - `compare/default4`: the whole comparison (what `gaugewise fit` spends in the library).
//! - `fit/<model>`: one candidate's fit.
//! - `loglik/<model>`: one likelihood evaluation over the 10,000 samples at the true-ish parameters: the optimiser's
//!   unit of work. A fit costs about (evaluations x this).
//!
//! Before criterion runs, a summary table prints one timed fit per model with the number of likelihood evaluations
//! it spent, so the fit time can be split into "how many evaluations" and "how much each costs".
//!
//! Run: `cargo bench --bench fit_speed`. The side-by-side comparison with statsmodels is `benches/statsmodels_speed.py`.

mod common;

use common::{lag_signal, INTERVAL, MEAN, OBS_VAR, PHI, STATE_VAR};
use criterion::{BenchmarkId, Criterion, SamplingMode};
use gaugewise::estimate::{self, Data};
use gaugewise::filter;
use gaugewise::model::{ModelKind, ModelParams, ModelSpec};
use std::hint::black_box;
use std::time::{Duration, Instant};

const N: usize = 10_000;
const MISSING: f64 = 0.01;
const SEED: u64 = 2024;

const DEFAULT_KINDS: [ModelKind; 4] = [
    ModelKind::Level,
    ModelKind::Lag,
    ModelKind::Trend,
    ModelKind::Arma { p: 1, q: 1 },
];

/// A model of each kind with parameters near what a fit of the simulated data gives, for the loglik benches.
fn near_fit(kind: ModelKind) -> ModelSpec {
    let params = match kind {
        ModelKind::Level => ModelParams::Level {
            obs_var: 0.1,
            level_var: 0.01,
        },
        ModelKind::Lag => ModelParams::Lag {
            mean: MEAN,
            tau: -INTERVAL / PHI.ln(),
            state_var: STATE_VAR,
            obs_var: OBS_VAR,
        },
        ModelKind::Trend => ModelParams::Trend {
            obs_var: 0.1,
            level_var: 0.01,
            slope_var: 1e-6,
        },
        ModelKind::Arma { p, q } => ModelParams::Arma {
            mean: MEAN,
            ar: vec![PHI; p.min(1)],
            ma: vec![-0.3; q.min(1)],
            var: 0.2,
        },
    };
    ModelSpec {
        interval: INTERVAL,
        params,
    }
}

/// One timed fit per model (single run, so a rough figure) with its likelihood evaluations.
fn summary(data: &Data) {
    println!(
        "fit summary: n = {N}, ~{:.0}% missing, one run each",
        MISSING * 100.0
    );
    println!(
        "{:<10} {:>10} {:>7} {:>14} {:>13} {:>10}  at boundary",
        "model", "fit ms", "evals", "loglik us/eval", "evals x cost", "converged"
    );
    let mut total = 0.0;
    for kind in DEFAULT_KINDS {
        let spec = near_fit(kind);
        // Per-evaluation cost: median of a few evaluations.
        let mut per_eval: Vec<f64> = (0..7)
            .map(|_| {
                let t = Instant::now();
                black_box(filter::loglik(&spec, data.times, data.values).unwrap());
                t.elapsed().as_secs_f64()
            })
            .collect();
        per_eval.sort_by(f64::total_cmp);
        let eval_s = per_eval[per_eval.len() / 2];
        let t = Instant::now();
        let fit = estimate::fit(data, kind, None).expect("fit");
        let fit_s = t.elapsed().as_secs_f64();
        total += fit_s;
        println!(
            "{:<10} {:>10.1} {:>7} {:>14.1} {:>12.1}ms {:>10}  {:?}",
            kind.to_string(),
            fit_s * 1e3,
            fit.evaluations,
            eval_s * 1e6,
            fit.evaluations as f64 * eval_s * 1e3,
            fit.converged,
            fit.boundary
        );
    }
    let t = Instant::now();
    let cmp = estimate::compare(data, &DEFAULT_KINDS).expect("compare");
    let cmp_s = t.elapsed().as_secs_f64();
    println!(
        "sum of fits {:.1} ms; compare (default 4) {:.1} ms, best = {}",
        total * 1e3,
        cmp_s * 1e3,
        cmp.best().map(|f| f.kind.to_string()).unwrap_or("-".into())
    );
    println!();
}

fn benches(c: &mut Criterion, data: &Data) {
    let mut group = c.benchmark_group("loglik");
    group
        .sample_size(20)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2));
    for kind in DEFAULT_KINDS {
        let spec = near_fit(kind);
        group.bench_function(BenchmarkId::from_parameter(kind), |b| {
            b.iter(|| filter::loglik(black_box(&spec), data.times, data.values).unwrap())
        });
    }
    group.finish();

    // Fits take 50-600 ms: ten single-iteration samples each (flat sampling), with time enough that criterion
    // does not have to stretch it.
    let mut group = c.benchmark_group("fit");
    group
        .sample_size(10)
        .sampling_mode(SamplingMode::Flat)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(6));
    for kind in DEFAULT_KINDS {
        group.bench_function(BenchmarkId::from_parameter(kind), |b| {
            b.iter(|| estimate::fit(black_box(data), kind, None).unwrap())
        });
    }
    group.finish();

    let mut group = c.benchmark_group("compare");
    group
        .sample_size(10)
        .sampling_mode(SamplingMode::Flat)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(12));
    group.bench_function("default4", |b| {
        b.iter(|| estimate::compare(black_box(data), &DEFAULT_KINDS).unwrap())
    });
    group.finish();
}

fn main() {
    let (times, values) = lag_signal(N, MISSING, SEED);
    let data = Data {
        times: &times,
        values: &values,
        interval: INTERVAL,
    };
    // `cargo bench` passes --bench; `cargo test --benches` runs each bench once without it: skip the table there.
    if std::env::args().any(|a| a == "--bench") {
        summary(&data);
    }
    let mut c = Criterion::default().configure_from_args();
    benches(&mut c, &data);
    c.final_summary();
}
