//! Property tests of the Kalman filter: covariance stays symmetric positive semi-definite, missing samples are
//! handled as pure prediction, and a gap of k samples equals one prediction over k times the interval.

use gaugewise::filter::{self, Filter, StepKind};
use gaugewise::model::{ModelParams, ModelSpec};
use gaugewise::simulate::Noise;
use nalgebra::{DMatrix, SymmetricEigen};
use proptest::prelude::*;
use proptest::test_runner::TestCaseError;

fn level(obs_var: f64, level_var: f64, interval: f64) -> ModelSpec {
    ModelSpec {
        interval,
        params: ModelParams::Level { obs_var, level_var },
    }
}

fn lag(mean: f64, tau: f64, state_var: f64, obs_var: f64, interval: f64) -> ModelSpec {
    ModelSpec {
        interval,
        params: ModelParams::Lag {
            mean,
            tau,
            state_var,
            obs_var,
        },
    }
}

fn trend(obs_var: f64, level_var: f64, slope_var: f64, interval: f64) -> ModelSpec {
    ModelSpec {
        interval,
        params: ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        },
    }
}

fn arma(mean: f64, ar: &[f64], ma: &[f64], var: f64) -> ModelSpec {
    ModelSpec {
        interval: 1.0,
        params: ModelParams::Arma {
            mean,
            ar: ar.to_vec(),
            ma: ma.to_vec(),
            var,
        },
    }
}

/// Variances spread over many orders of magnitude: the filter must not care about units.
fn variance() -> impl Strategy<Value = f64> {
    (-6.0f64..4.0).prop_map(|e| 10f64.powf(e))
}

/// Models whose time axis is continuous: a gap is one longer prediction.
fn continuous_spec() -> impl Strategy<Value = ModelSpec> {
    let interval = 0.5f64..30.0;
    prop_oneof![
        (variance(), variance(), interval.clone()).prop_map(|(o, l, i)| level(o, l, i)),
        (
            -50.0f64..50.0,
            1.0f64..1000.0,
            variance(),
            variance(),
            interval.clone()
        )
            .prop_map(|(m, t, s, o, i)| lag(m, t, s, o, i)),
        (variance(), variance(), variance(), interval).prop_map(|(o, l, s, i)| trend(o, l, s, i)),
    ]
}

/// Any model, ARMA included (stationary AR(2) by its PACF, invertible MA(1)).
fn any_spec() -> impl Strategy<Value = ModelSpec> {
    prop_oneof![
        continuous_spec(),
        (-0.95f64..0.95, -0.95f64..0.95, -0.95f64..0.95, variance()).prop_map(|(r1, r2, m, v)| {
            // AR(2) from partial autocorrelations r1, r2: always stationary.
            let ar = [r1 * (1.0 - r2), r2];
            arma(3.0, &ar, &[m], v)
        }),
    ]
}

/// Largest noise variance of a model: the scale against which rounding in its covariance is judged.
fn noise_scale(spec: &ModelSpec) -> f64 {
    match spec.params {
        ModelParams::Level { obs_var, level_var } => obs_var.max(level_var),
        ModelParams::Lag {
            state_var, obs_var, ..
        } => state_var.max(obs_var),
        ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        } => obs_var.max(level_var).max(slope_var),
        ModelParams::Arma { var, .. } => var,
    }
}

/// Checks symmetry and positive semi-definiteness of a row-major n x n covariance, to rounding relative to the
/// larger of its own entries and the model's noise variances (an exactly known state has variance 0 +- 1e-25).
fn assert_psd(cov: &[f64], noise: f64, what: &str) {
    let n = (cov.len() as f64).sqrt() as usize;
    let m = DMatrix::from_row_slice(n, n, cov);
    let scale = m.iter().fold(noise, |a, v| a.max(v.abs()));
    for i in 0..n {
        for j in 0..n {
            assert!(
                (m[(i, j)] - m[(j, i)]).abs() <= 1e-12 * scale,
                "{what}: not symmetric: {m}"
            );
        }
    }
    let eig = SymmetricEigen::new(m.clone()).eigenvalues;
    let min = eig.iter().fold(f64::INFINITY, |a, v| a.min(*v));
    assert!(min >= -1e-9 * scale, "{what}: eigenvalue {min} < 0 in {m}");
}

#[test]
fn covariance_stays_symmetric_psd_over_millions_of_steps() {
    // Irregular sampling (dt from 0.1 to 3 intervals), 1% missing, and a signal far from the model's
    // assumptions (a slow sine plus spikes), so that any loss of symmetry or definiteness would accumulate.
    let specs = [
        level(1e-4, 1e-8, 1.0),
        lag(20.0, 50.0, 1e-6, 1e2, 1.0),
        trend(1e-2, 1e-9, 1e-12, 1.0),
        arma(0.0, &[0.9, -0.2, 0.1], &[0.5, 0.3, -0.2], 1.0),
    ];
    for spec in &specs {
        let mut f = Filter::new(spec).unwrap();
        let mut noise = Noise::new(0x9E37_79B9_7F4A_7C15);
        let discrete = matches!(spec.params, ModelParams::Arma { .. });
        for i in 0..2_000_000u64 {
            let dt = if discrete {
                1.0 + (noise.uniform() < 0.05) as u64 as f64
            } else {
                0.1 + 2.9 * noise.uniform()
            };
            let y = if noise.uniform() < 0.01 {
                None
            } else {
                let spike = if i % 100_003 == 0 { 1e4 } else { 0.0 };
                Some(20.0 + 5.0 * (i as f64 * 1e-4).sin() + noise.normal() + spike)
            };
            let s = f.step(dt, y);
            assert!(
                s.estimate.is_finite() && s.estimate_var >= 0.0,
                "{spec:?} step {i}: {s:?}"
            );
            if i % 250_000 == 0 {
                assert_psd(
                    &f.snapshot().1,
                    noise_scale(spec),
                    &format!("{spec:?} at step {i}"),
                );
            }
        }
        assert_psd(
            &f.snapshot().1,
            noise_scale(spec),
            &format!("{spec:?} at the end"),
        );
    }
}

/// Bit-for-bit equality of two steps (NaN equal to NaN: the same computation must give the same bits).
fn same(a: &gaugewise::filter::Step, b: &gaugewise::filter::Step) -> bool {
    let bits = |s: &gaugewise::filter::Step| {
        [
            s.predicted,
            s.predicted_var,
            s.innovation,
            s.standardized,
            s.estimate,
            s.estimate_var,
            s.loglik,
        ]
        .map(f64::to_bits)
    };
    a.kind == b.kind && bits(a) == bits(b)
}

/// The gap property for one case (see `gap_of_k_missing_equals_one_prediction_over_k_dt`).
fn check_gap(
    spec: &ModelSpec,
    head: &[f64],
    k: usize,
    dt: f64,
    next: f64,
) -> Result<(), TestCaseError> {
    let (mut a, mut b) = (Filter::new(spec).unwrap(), Filter::new(spec).unwrap());
    let mut ll = [0.0f64; 2];
    for &y in head {
        ll[0] += a.step(dt, Some(y)).loglik;
        ll[1] += b.step(dt, Some(y)).loglik;
    }
    for _ in 0..k - 1 {
        let s = a.step(dt, None);
        prop_assert_eq!(s.kind, StepKind::Missing);
        prop_assert_eq!(s.loglik, 0.0);
    }
    let sa = a.step(dt, Some(next));
    let sb = b.step(k as f64 * dt, Some(next));
    ll[0] += sa.loglik;
    ll[1] += sb.loglik;
    // Relative to `scale`: a filtered variance is P - P^2/F, so its rounding error is relative to the predicted
    // variance P, not to the (possibly far smaller) result.
    let near = |x: f64, y: f64, scale: f64| {
        x == y || (x - y).abs() <= 1e-8 * x.abs().max(y.abs()).max(scale).max(1e-6)
    };
    let close = |x: f64, y: f64| near(x, y, 0.0);
    prop_assert!(close(sa.predicted, sb.predicted), "{:?} vs {:?}", sa, sb);
    prop_assert!(
        close(sa.predicted_var, sb.predicted_var),
        "{:?} vs {:?}",
        sa,
        sb
    );
    prop_assert!(close(sa.estimate, sb.estimate), "{:?} vs {:?}", sa, sb);
    prop_assert!(
        near(sa.estimate_var, sb.estimate_var, sa.predicted_var),
        "{:?} vs {:?}",
        sa,
        sb
    );
    prop_assert!(close(ll[0], ll[1]), "loglik {} vs {}", ll[0], ll[1]);
    let (fa, fb) = (a.forecast(dt), b.forecast(dt));
    prop_assert!(close(fa.signal, fb.signal) && close(fa.signal_var, fb.signal_var));
    Ok(())
}

/// A case proptest found: a near-noiseless trend (obs_var 3e-6 against a slope variance of 29), where the filtered
/// variance is a small difference of large numbers.
#[test]
fn gap_property_holds_for_a_nearly_noiseless_trend() {
    let spec = trend(3.0577e-6, 1.0, 29.35, 0.5);
    for head in [vec![0.0], vec![0.0, 1.0], vec![-20.0, 5.0, 40.0]] {
        check_gap(&spec, &head, 2, 1.3107 * 0.5, 3.0).unwrap();
        check_gap(&spec, &head, 2, 1.3107, 3.0).unwrap();
    }
}

fn series() -> impl Strategy<Value = Vec<(f64, f64, bool)>> {
    // (dt in intervals, value, missing?)
    prop::collection::vec(
        (0.2f64..3.0, -100.0f64..100.0, prop::bool::weighted(0.15)),
        2..200,
    )
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    #[test]
    fn covariance_is_psd_at_every_step(spec in any_spec(), xs in series()) {
        let mut f = Filter::new(&spec).unwrap();
        let discrete = matches!(spec.params, ModelParams::Arma { .. });
        for (i, (dt, y, missing)) in xs.iter().enumerate() {
            let dt = if discrete { dt.round().max(1.0) } else { dt * spec.interval };
            let s = f.step(dt, (!missing).then_some(*y));
            prop_assert!(s.estimate_var >= 0.0 && s.predicted_var >= 0.0, "step {}: {:?}", i, s);
            assert_psd(&f.snapshot().1, noise_scale(&spec), &format!("step {i}"));
        }
    }

    /// With no sample missing, every way of presenting the data gives the same result: `Some(y)` step by step,
    /// the batch `run`, and the streaming channel; and NaN is the same as `None`.
    #[test]
    fn all_present_equals_none_missing(spec in any_spec(), xs in series()) {
        let discrete = matches!(spec.params, ModelParams::Arma { .. });
        let mut t = 0.0;
        let (mut times, mut values) = (Vec::new(), Vec::new());
        for (dt, y, _) in &xs {
            t += if discrete { dt.round().max(1.0) } else { dt * spec.interval };
            times.push(t);
            values.push(*y);
        }
        let mut batch = Vec::new();
        let lik = filter::run(&spec, &times, &values, |_, s| batch.push(*s)).unwrap();
        prop_assert_eq!(lik.n_obs, values.len());
        prop_assert!(batch.iter().all(|s| s.kind != StepKind::Missing));
        let mut f = Filter::new(&spec).unwrap();
        // Flags off: with them, the channel withholds outliers (robust update) and stops equalling the filter.
        let mut channel = gaugewise::channel::Channel::with_flags(
            &spec,
            &gaugewise::detect::FlagDesign::disabled(),
        )
        .unwrap();
        let mut prev = times[0];
        for (i, (&t, &y)) in times.iter().zip(&values).enumerate() {
            let s = f.step(t - prev, Some(y));
            prev = t;
            prop_assert!(same(&s, &batch[i]), "{:?} vs {:?}", s, batch[i]);
            let out = channel.on_sample(t, Some(y));
            prop_assert!(out.step.is_some_and(|c| same(&c, &batch[i])), "{:?} vs {:?}", out, batch[i]);
        }
        // A NaN value is a missing sample, exactly like None.
        let (mut a, mut b) = (Filter::new(&spec).unwrap(), Filter::new(&spec).unwrap());
        for (i, (dt, y, missing)) in xs.iter().enumerate() {
            let dt = if discrete { dt.round().max(1.0) } else { dt * spec.interval };
            let (sa, sb) = if *missing {
                (a.step(dt, None), b.step(dt, Some(f64::NAN)))
            } else {
                (a.step(dt, Some(*y)), b.step(dt, Some(*y)))
            };
            prop_assert_eq!(sa.kind, sb.kind, "step {}", i);
            prop_assert_eq!(sa.estimate.to_bits(), sb.estimate.to_bits());
            prop_assert_eq!(sa.loglik.to_bits(), sb.loglik.to_bits());
        }
    }

    /// k missing samples at spacing dt, then a sample: the same state, variance and likelihood as one step of k*dt.
    #[test]
    fn gap_of_k_missing_equals_one_prediction_over_k_dt(
        spec in continuous_spec(),
        head in prop::collection::vec(-50.0f64..50.0, 1..20),
        k in 1usize..30,
        dt in 0.1f64..3.0,
        next in -50.0f64..50.0,
    ) {
        check_gap(&spec, &head, k, dt * spec.interval, next)?;
    }

    /// The same for ARMA, whose time axis is the sample index: a gap of k intervals is k one-step predictions.
    #[test]
    fn arma_gap_equals_missing_rows(
        r1 in -0.9f64..0.9, m in -0.9f64..0.9,
        head in prop::collection::vec(-5.0f64..5.0, 1..20),
        k in 1usize..12,
        next in -5.0f64..5.0,
    ) {
        let spec = arma(0.5, &[r1], &[m], 1.3);
        let (mut a, mut b) = (Filter::new(&spec).unwrap(), Filter::new(&spec).unwrap());
        for &y in &head {
            a.step(1.0, Some(y));
            b.step(1.0, Some(y));
        }
        for _ in 0..k - 1 {
            a.step(1.0, None);
        }
        let sa = a.step(1.0, Some(next));
        let sb = b.step(k as f64, Some(next));
        prop_assert!((sa.predicted - sb.predicted).abs() < 1e-9 && (sa.loglik - sb.loglik).abs() < 1e-9,
            "{:?} vs {:?}", sa, sb);
    }
}
