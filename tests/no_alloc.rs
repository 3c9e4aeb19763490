//! The per-sample path allocates nothing (DESIGN: "Per-sample work: no allocation").
//!
//! A counting global allocator counts the allocations made by the current thread (a thread-local counter, so the
//! test harness's other threads cannot disturb the count). Building a filter may allocate; stepping it may not, for
//! any model, with missing values, gaps and irregular intervals mixed in. The estimator's inner loop
//! (`filter::loglik`) may allocate per evaluation but not per sample.

use gaugewise::filter::{self, Filter};
use gaugewise::model::{ModelKind, ModelParams, ModelSpec};
use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;

struct Counting;

thread_local! {
    static ALLOCATIONS: Cell<usize> = const { Cell::new(0) };
}

fn bump() {
    // try_with: the slot may already be gone while a thread is exiting.
    let _ = ALLOCATIONS.try_with(|c| c.set(c.get() + 1));
}

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        bump();
        unsafe { System.alloc(layout) }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        bump();
        unsafe { System.alloc_zeroed(layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        bump();
        unsafe { System.realloc(ptr, layout, new_size) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

/// Allocations made by this thread while `f` runs.
fn allocations_in<R>(f: impl FnOnce() -> R) -> (usize, R) {
    let before = ALLOCATIONS.with(Cell::get);
    let r = f();
    (ALLOCATIONS.with(Cell::get) - before, r)
}

const INTERVAL: f64 = 10.0;

fn specs() -> Vec<ModelSpec> {
    let mk = |params| ModelSpec {
        interval: INTERVAL,
        params,
    };
    vec![
        mk(ModelParams::Level {
            obs_var: 0.05,
            level_var: 0.02,
        }),
        mk(ModelParams::Lag {
            mean: 72.0,
            tau: 195.0,
            state_var: 0.1,
            obs_var: 0.05,
        }),
        mk(ModelParams::Trend {
            obs_var: 0.05,
            level_var: 0.02,
            slope_var: 1e-4,
        }),
        mk(ModelParams::Arma {
            mean: 72.0,
            ar: vec![0.95],
            ma: vec![],
            var: 0.2,
        }),
        mk(ModelParams::Arma {
            mean: 72.0,
            ar: vec![0.95],
            ma: vec![-0.3],
            var: 0.2,
        }),
        mk(ModelParams::Arma {
            mean: 72.0,
            ar: vec![1.2, -0.3],
            ma: vec![-0.3],
            var: 0.2,
        }),
        mk(ModelParams::Arma {
            mean: 72.0,
            ar: vec![0.8],
            ma: vec![0.3, 0.2],
            var: 0.2,
        }),
        mk(ModelParams::Arma {
            mean: 72.0,
            ar: vec![0.5, 0.2, -0.1],
            ma: vec![0.3, 0.2, 0.1],
            var: 0.2,
        }),
    ]
}

/// A deterministic wobbly signal with every kind of step: regular, jittered, gaps of several intervals, missing
/// values as None and as NaN.
fn samples(n: usize) -> Vec<(f64, Option<f64>)> {
    (0..n)
        .map(|i| {
            let x = i as f64;
            let dt = match i % 97 {
                13 => 3.0 * INTERVAL,
                14 => 0.5 * INTERVAL,
                k if k % 2 == 0 => INTERVAL * (1.0 + 0.01 * (x * 0.37).sin()),
                _ => INTERVAL,
            };
            let y = match i % 89 {
                7 => None,
                8 => Some(f64::NAN),
                _ => Some(72.0 + (x * 0.01).sin() + 0.3 * (x * 1.7).cos()),
            };
            (dt, y)
        })
        .collect()
}

#[test]
fn counter_sees_allocations() {
    let (n, v) = allocations_in(|| vec![1u8; 64]);
    assert!(n >= 1, "the counting allocator is not in use");
    drop(v);
}

#[test]
fn filter_step_never_allocates() {
    let data = samples(10_000);
    for spec in specs() {
        let mut f = Filter::new(&spec).unwrap();
        let (n, sum) = allocations_in(|| {
            let mut sum = 0.0;
            for &(dt, y) in &data {
                let s = f.step(dt, y);
                sum += s.estimate + s.loglik;
                sum += f.forecast(dt).signal;
            }
            sum
        });
        assert!(sum.is_finite(), "{:?}: non-finite output", spec.kind());
        assert_eq!(n, 0, "{:?}: {n} allocations in 10,000 steps", spec.kind());
    }
}

/// The whole per-sample path of a channel: detectors before and after the filter, flags, robust update (spikes
/// and a stuck stretch are in the data so the withholding and re-acquiring branches run too).
#[test]
fn channel_sample_never_allocates() {
    let data = samples(10_000);
    for spec in specs() {
        let mut c = gaugewise::channel::Channel::new(&spec).unwrap();
        let (n, raised) = allocations_in(|| {
            let (mut t, mut raised) = (0.0, 0);
            for (k, &(dt, y)) in data.iter().enumerate() {
                t += dt;
                let y = match k % 2_000 {
                    500 => y.map(|v| v + 1e3),
                    1_000..=1_004 => y.map(|v| v - 1e3),
                    1_500..=1_600 => Some(3.0),
                    _ => y,
                };
                let o = c.on_sample(t, y);
                raised += o.flags.raised.len();
                if k % 1_000 == 999 {
                    let _ = c.mark_stale(t + 1e4);
                }
            }
            raised
        });
        assert!(raised > 0, "{:?}: the faults raised no flag", spec.kind());
        assert_eq!(n, 0, "{:?}: {n} allocations in 10,000 samples", spec.kind());
    }
}

#[test]
fn loglik_allocations_do_not_grow_with_the_series() {
    let short = samples(1_000);
    let long = samples(10_000);
    let split = |d: &[(f64, Option<f64>)]| {
        let mut t = 0.0;
        let times: Vec<f64> = d
            .iter()
            .map(|(dt, _)| {
                t += dt;
                t
            })
            .collect();
        let values: Vec<f64> = d.iter().map(|(_, y)| y.unwrap_or(f64::NAN)).collect();
        (times, values)
    };
    let (ts, vs) = split(&short);
    let (tl, vl) = split(&long);
    for spec in specs() {
        let (a, ll_short) = allocations_in(|| filter::loglik(&spec, &ts, &vs).unwrap());
        let (b, ll_long) = allocations_in(|| filter::loglik(&spec, &tl, &vl).unwrap());
        assert!(ll_short.is_finite() && ll_long.is_finite());
        assert_eq!(
            a,
            b,
            "{:?}: loglik allocates per sample ({a} allocations for 1,000 values, {b} for 10,000)",
            spec.kind()
        );
    }
    // Sanity: the kinds above cover every state dimension the run-time filter has.
    let dims: Vec<usize> = specs()
        .iter()
        .map(|s| match s.kind() {
            ModelKind::Level | ModelKind::Lag => 1,
            ModelKind::Trend => 2,
            ModelKind::Arma { p, q } => p.max(q + 1),
        })
        .collect();
    for d in 1..=4 {
        assert!(dims.contains(&d), "no model with {d} states");
    }
}
