//! Time-series diagnostics for filter innovations and raw sensor signals.
//!
//! A well-specified Kalman filter produces innovations that are white noise;
//! the functions here measure how far a series departs from that: sample
//! autocorrelation and partial autocorrelation with their confidence bands,
//! the Ljung-Box portmanteau test, information criteria for comparing fitted
//! models, and quantile wrappers that the fault detectors use for thresholds.
//!
//! Conventions follow statsmodels 0.14 (`acf(adjusted=False, fft=False)`,
//! `pacf(method="ldb")`, `acorr_ljungbox`) so results can be cross-checked
//! against its fixtures. Missing readings are encoded as NaN, the same way the
//! rest of the crate represents sensor dropouts.
//!
//! Everything here is a pure function of its arguments. Parameter transforms
//! for the likelihood optimiser live next door in [`crate::transform`].

use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};
use thiserror::Error;

/// Why a diagnostic could not be computed.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum StatsError {
    /// The chi-square reference distribution would have no degrees of freedom.
    #[error(
        "Ljung-Box test needs at least one degree of freedom, \
         but lag {lag} minus {fitted_params} fitted parameters leaves none"
    )]
    NoDegreesOfFreedom { lag: usize, fitted_params: usize },
    /// Not enough present (non-missing) values for the requested statistic.
    #[error("too few observations: {present} present values, need at least {needed}")]
    TooFewObservations { present: usize, needed: usize },
    /// All present values are equal, so correlations are undefined.
    #[error("series has zero variance over its present values")]
    ZeroVariance,
}

/// Result of the Ljung-Box portmanteau test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LjungBox {
    /// Number of autocorrelation lags summed (m).
    pub lag: usize,
    /// The Q statistic.
    pub q: f64,
    /// Degrees of freedom of the chi-square reference: lag minus fitted parameters.
    pub dof: usize,
    /// Upper-tail p-value of `q`; small values indicate remaining autocorrelation.
    pub p: f64,
}

/// Demeaned present values, rescaled, with missing entries set to zero.
///
/// Zeroed missing entries drop out of every lag product, which is exactly
/// statsmodels' `missing="conservative"` rule. Rescaling by the largest
/// magnitude cannot change a correlation but keeps sums of squares finite for
/// readings near `f64::MAX`. Returns `None` when no present value exists or
/// the present values have zero variance.
fn centred(x: &[f64]) -> Option<(Vec<f64>, f64)> {
    let mut count = 0usize;
    let mut scale = 0.0f64;
    for &v in x.iter().filter(|v| v.is_finite()) {
        count += 1;
        scale = scale.max(v.abs());
    }
    if count == 0 || scale == 0.0 {
        return None;
    }
    let mean = x
        .iter()
        .filter(|v| v.is_finite())
        .map(|v| v / scale)
        .sum::<f64>()
        / count as f64;
    let y: Vec<f64> = x
        .iter()
        .map(|&v| if v.is_finite() { v / scale - mean } else { 0.0 })
        .collect();
    let c0: f64 = y.iter().map(|v| v * v).sum();
    // A constant series gives exactly zero here: `v / scale` is +-1 exactly for
    // every reading and the mean of equal values is exact.
    if c0 > 0.0 {
        Some((y, c0))
    } else {
        None
    }
}

fn present_count(x: &[f64]) -> usize {
    x.iter().filter(|v| v.is_finite()).count()
}

/// Sample autocorrelations `r_0..=r_nlags` with the biased (1/n) estimator.
///
/// Matches statsmodels `acf(x, nlags, adjusted=False, fft=False,
/// missing="conservative")`: the mean is taken over present values, the lag-k
/// sum runs over pairs where both values are present, and the denominators use
/// the count of present values (which cancels in the ratio).
///
/// Our choices beyond statsmodels, so that the output is always finite:
/// - Infinite readings are treated as missing, like NaN. statsmodels would
///   return NaN throughout.
/// - If fewer than two distinct present values exist (empty, all missing, or
///   constant), the autocorrelation is undefined; we return `r_0 = 1` and
///   zeros, i.e. "no detectable correlation". Callers that must distinguish a
///   stuck sensor from white noise should look at the variance directly;
///   [`ljung_box`] reports this case as [`StatsError::ZeroVariance`].
/// - Lags at or beyond the series length have no pairs and are 0.
///
/// Values are clamped to `[-1, 1]` to absorb rounding; in exact arithmetic
/// they already lie there by Cauchy-Schwarz.
///
/// The result always has `nlags + 1` entries.
pub fn acf(x: &[f64], nlags: usize) -> Vec<f64> {
    let mut out = vec![0.0; nlags.saturating_add(1)];
    out[0] = 1.0;
    let Some((y, c0)) = centred(x) else {
        return out;
    };
    for (k, r) in out
        .iter_mut()
        .enumerate()
        .skip(1)
        .take(y.len().saturating_sub(1))
    {
        let s: f64 = y[k..]
            .iter()
            .zip(&y[..y.len() - k])
            .map(|(a, b)| a * b)
            .sum();
        *r = (s / c0).clamp(-1.0, 1.0);
    }
    out
}

/// Half-widths of the `(1 - alpha)` confidence band around each autocorrelation.
///
/// Bartlett's formula as statsmodels `acf(alpha=...)` applies it:
/// `se_0 = 0`, `se_1 = 1/sqrt(n)`, `se_k = sqrt((1 + 2 sum_{j<k} r_j^2) / n)`,
/// half-width `z_{1-alpha/2} * se_k`. The band for lag k assumes the process
/// is MA(k-1), which is why it widens with the earlier correlations.
///
/// `acf` is the output of [`acf`] (including `r_0`); `n` is the number of
/// observations it was computed from. `alpha` outside `(0, 1)` gives NaN
/// widths; `n = 0` gives infinite widths (no information) beyond lag 0.
pub fn acf_band(acf: &[f64], n: usize, alpha: f64) -> Vec<f64> {
    let z = normal_quantile(1.0 - alpha / 2.0);
    let n = n as f64;
    let mut cum = 0.0;
    acf.iter()
        .enumerate()
        .map(|(k, &r)| {
            let var = if k == 0 { 0.0 } else { (1.0 + 2.0 * cum) / n };
            if k >= 1 {
                // r_k enters only from lag k+1 onward.
                cum += r * r;
            }
            z * var.sqrt()
        })
        .collect()
}

/// Partial autocorrelations `p_0 = 1, p_1..=p_nlags`.
///
/// Levinson-Durbin recursion on the biased autocorrelations of [`acf`], which
/// is statsmodels `pacf(method="ldb")` (identical to `"ywm"`). Missing and
/// degenerate inputs are handled as in [`acf`].
///
/// The biased autocorrelation sequence is positive definite, so in exact
/// arithmetic every `|p_k| < 1`. If rounding drives the one-step prediction
/// error to zero, lower orders already explain the series completely and the
/// remaining partial autocorrelations are reported as 0.
pub fn pacf(x: &[f64], nlags: usize) -> Vec<f64> {
    let r = acf(x, nlags);
    levinson_durbin_pacf(&r)
}

fn levinson_durbin_pacf(r: &[f64]) -> Vec<f64> {
    let m = r.len() - 1;
    let mut out = vec![0.0; r.len()];
    out[0] = 1.0;
    let mut phi = vec![0.0; m];
    let mut prev = vec![0.0; m];
    let mut sigma = 1.0;
    for k in 1..=m {
        // r is finite and clamped, so sigma never becomes NaN.
        if sigma <= f64::EPSILON {
            break;
        }
        let num = r[k]
            - phi[..k - 1]
                .iter()
                .zip(r[1..k].iter().rev())
                .map(|(a, b)| a * b)
                .sum::<f64>();
        let a = (num / sigma).clamp(-1.0, 1.0);
        prev[..k - 1].copy_from_slice(&phi[..k - 1]);
        for j in 0..k - 1 {
            phi[j] = prev[j] - a * prev[k - 2 - j];
        }
        phi[k - 1] = a;
        sigma *= 1.0 - a * a;
        out[k] = a;
    }
    out
}

/// Half-width of the `(1 - alpha)` band for partial autocorrelations,
/// `z_{1-alpha/2} / sqrt(n)`, as statsmodels `pacf(alpha=...)`.
pub fn pacf_band(n: usize, alpha: f64) -> f64 {
    normal_quantile(1.0 - alpha / 2.0) / (n as f64).sqrt()
}

/// Ljung-Box test for autocorrelation up to `lag`.
///
/// `Q = n(n+2) sum_{k=1}^{m} r_k^2 / (n-k)` (Ljung & Box 1978, Biometrika
/// 65:297) using [`acf`], referred to chi-square with `m - fitted_params`
/// degrees of freedom, as statsmodels `acorr_ljungbox(lags=[m], model_df=...)`.
/// Pass the number of estimated ARMA coefficients as `fitted_params` when
/// testing model residuals.
///
/// With missing values, `n` is the count of present values: our convention,
/// since statsmodels has no missing-data variant of this test. Gaps reduce
/// the pairs behind each `r_k`, so the test is then approximate.
///
/// # Errors
/// - [`StatsError::NoDegreesOfFreedom`] if `lag <= fitted_params`.
/// - [`StatsError::TooFewObservations`] if there are not more present values
///   than `lag` (the `n - k` weights would vanish).
/// - [`StatsError::ZeroVariance`] for a constant series, where any p-value
///   would be meaningless.
pub fn ljung_box(x: &[f64], lag: usize, fitted_params: usize) -> Result<LjungBox, StatsError> {
    let dof = lag.saturating_sub(fitted_params);
    if dof < 1 {
        return Err(StatsError::NoDegreesOfFreedom { lag, fitted_params });
    }
    let n = present_count(x);
    if n <= lag {
        return Err(StatsError::TooFewObservations {
            present: n,
            needed: lag.saturating_add(1),
        });
    }
    if centred(x).is_none() {
        return Err(StatsError::ZeroVariance);
    }
    let r = acf(x, lag);
    let nf = n as f64;
    let sum: f64 = (1..=lag).map(|k| r[k] * r[k] / (nf - k as f64)).sum();
    let q = nf * (nf + 2.0) * sum;
    let p = ChiSquared::new(dof as f64)
        .map(|d| d.sf(q))
        .unwrap_or(f64::NAN);
    Ok(LjungBox { lag, q, dof, p })
}

/// Our default Ljung-Box lag: `min(10, n / 5)`, at least 1.
///
/// Ten lags covers the short-range dependence a mis-tuned filter leaves in
/// its innovations; the `n / 5` cap keeps each `r_k` backed by enough pairs
/// on short windows. This is a project choice, not a statsmodels default.
pub fn default_ljung_box_lag(n: usize) -> usize {
    (n / 5).clamp(1, 10)
}

/// Akaike information criterion, `-2 loglik + 2k` for `k` estimated parameters.
pub fn aic(loglik: f64, k: usize) -> f64 {
    -2.0 * loglik + 2.0 * k as f64
}

/// Bayesian (Schwarz) information criterion, `-2 loglik + k ln n`.
///
/// `n` is the number of observations that entered the likelihood and should
/// be at least 1.
pub fn bic(loglik: f64, k: usize, n: usize) -> f64 {
    -2.0 * loglik + k as f64 * (n as f64).ln()
}

/// Quantile of the chi-square distribution with `dof` degrees of freedom.
///
/// Returns NaN instead of panicking when `p` is outside `[0, 1]` or `dof` is
/// not finite and positive, the same convention as `scipy.stats.chi2.ppf`.
pub fn chi2_quantile(p: f64, dof: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) || !dof.is_finite() {
        return f64::NAN;
    }
    match ChiSquared::new(dof) {
        Ok(d) => d.inverse_cdf(p),
        Err(_) => f64::NAN,
    }
}

/// Quantile of the standard normal distribution.
///
/// Returns NaN instead of panicking when `p` is outside `[0, 1]`, the same
/// convention as `scipy.stats.norm.ppf`; `p = 0` and `p = 1` give -inf and inf.
pub fn normal_quantile(p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    Normal::standard().inverse_cdf(p)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use proptest::prelude::*;

    /// Fixture shared by the statsmodels checks below.
    const SERIES: [f64; 12] = [2.0, 4.0, 3.0, 6.0, 5.0, 7.0, 4.0, 8.0, 6.0, 9.0, 7.0, 10.0];

    fn assert_all_close(got: &[f64], want: &[f64], eps: f64) {
        assert_eq!(got.len(), want.len(), "length: {got:?} vs {want:?}");
        for (g, w) in got.iter().zip(want) {
            assert_relative_eq!(*g, *w, epsilon = eps, max_relative = eps);
        }
    }

    #[test]
    fn acf_hand_example() {
        // By hand: demeaned [-1.5, -0.5, 0.5, 1.5], sum of squares 5,
        // lag sums 1.25, -1.5, -2.25.
        assert_all_close(
            &acf(&[1.0, 2.0, 3.0, 4.0], 3),
            &[1.0, 0.25, -0.3, -0.45],
            1e-15,
        );
    }

    #[test]
    fn acf_missing_hand_example() {
        // By hand: mean of present values is 3, demeaned [-2, _, 0, 2], sum of
        // squares 8; only lag 3 has a nonzero pair product (-4). statsmodels
        // 0.14.6 acf(missing="conservative", fft=False) gives the same.
        assert_all_close(
            &acf(&[1.0, f64::NAN, 3.0, 5.0], 3),
            &[1.0, 0.0, 0.0, -0.5],
            1e-15,
        );
    }

    #[test]
    fn acf_matches_statsmodels() {
        // statsmodels 0.14.6 acf(SERIES, nlags=4, adjusted=False, fft=False)
        let want = [
            1.0,
            0.21427043217800595,
            0.5697475395806589,
            -0.10815147625160461,
            0.26144629867351304,
        ];
        assert_all_close(&acf(&SERIES, 4), &want, 1e-12);
    }

    #[test]
    fn acf_missing_matches_statsmodels() {
        // statsmodels 0.14.6 acf(..., adjusted=False, fft=False,
        // missing="conservative") with SERIES[2] and SERIES[7] set to NaN
        let mut x = SERIES;
        x[2] = f64::NAN;
        x[7] = f64::NAN;
        let want = [
            1.0,
            0.23076923076923075,
            0.2692307692307692,
            -0.07692307692307693,
            0.05769230769230769,
        ];
        assert_all_close(&acf(&x, 4), &want, 1e-12);
    }

    #[test]
    fn acf_band_matches_statsmodels() {
        // statsmodels 0.14.6 acf(SERIES, nlags=4, fft=False, alpha=0.05):
        // confint upper minus acf
        let want = [
            0.0,
            0.5657928670380858,
            0.5911990314865062,
            0.7465568067334004,
            0.7515556029662727,
        ];
        assert_all_close(&acf_band(&acf(&SERIES, 4), SERIES.len(), 0.05), &want, 1e-9);
    }

    #[test]
    fn acf_degenerate_inputs() {
        for x in [
            &[][..],
            &[f64::NAN, f64::NAN][..],
            &[3.5][..],
            &[2.0, 2.0, f64::NAN, 2.0][..],
        ] {
            assert_eq!(acf(x, 3), vec![1.0, 0.0, 0.0, 0.0], "input {x:?}");
        }
        assert_eq!(acf(&[1.0, 2.0], 0), vec![1.0]);
    }

    #[test]
    fn acf_lags_beyond_length_are_zero() {
        let r = acf(&[1.0, 2.0, 3.0, 4.0], 6);
        assert_eq!(&r[4..], &[0.0, 0.0, 0.0]);
    }

    #[test]
    fn acf_survives_huge_and_infinite_values() {
        let big = f64::MAX;
        let r = acf(&[big, -big, big, f64::INFINITY, -big], 2);
        assert!(r.iter().all(|v| v.is_finite()), "{r:?}");
        // Infinity is treated as missing, so this equals the acf without it.
        assert_all_close(&r, &acf(&[1.0, -1.0, 1.0, f64::NAN, -1.0], 2), 1e-12);
    }

    #[test]
    fn pacf_matches_statsmodels() {
        // statsmodels 0.14.6 pacf(SERIES, nlags=4, method="ldb")
        let want = [
            1.0,
            0.21427043217800595,
            0.5490432974810399,
            -0.42139024274939535,
            0.09339955682755424,
        ];
        assert_all_close(&pacf(&SERIES, 4), &want, 1e-12);
    }

    #[test]
    fn pacf_of_ar1_autocorrelations_cuts_off() {
        // An exact AR(1) autocorrelation sequence 0.5^k has partial
        // autocorrelations 0.5, 0, 0 (textbook identity).
        let p = levinson_durbin_pacf(&[1.0, 0.5, 0.25, 0.125]);
        assert_all_close(&p, &[1.0, 0.5, 0.0, 0.0], 1e-15);
    }

    #[test]
    fn pacf_band_matches_statsmodels() {
        // statsmodels 0.14.6 pacf(SERIES, nlags=4, method="ldb", alpha=0.05)
        assert_relative_eq!(pacf_band(12, 0.05), 0.5657928670380858, max_relative = 1e-9);
    }

    #[test]
    fn ljung_box_hand_example() {
        // By hand from r = [1, 0.25, -0.3]: Q = 4*6*(0.0625/3 + 0.09/2) = 1.58;
        // the chi-square(2) survival function is exp(-q/2).
        let lb = ljung_box(&[1.0, 2.0, 3.0, 4.0], 2, 0).unwrap();
        assert_eq!((lb.lag, lb.dof), (2, 2));
        assert_relative_eq!(lb.q, 1.58, max_relative = 1e-12);
        assert_relative_eq!(lb.p, (-0.79f64).exp(), max_relative = 1e-9);
    }

    #[test]
    fn ljung_box_matches_statsmodels() {
        // statsmodels 0.14.6 acorr_ljungbox(SERIES, lags=[4], model_df=0 / 1)
        let lb = ljung_box(&SERIES, 4, 0).unwrap();
        assert_relative_eq!(lb.q, 7.808461314788013, max_relative = 1e-12);
        assert_relative_eq!(lb.p, 0.09885190822290392, max_relative = 1e-9);
        let lb = ljung_box(&SERIES, 4, 1).unwrap();
        assert_eq!(lb.dof, 3);
        assert_relative_eq!(lb.p, 0.05014061932264681, max_relative = 1e-9);
    }

    #[test]
    fn ljung_box_errors() {
        assert_eq!(
            ljung_box(&SERIES, 2, 2),
            Err(StatsError::NoDegreesOfFreedom {
                lag: 2,
                fitted_params: 2
            })
        );
        assert_eq!(
            ljung_box(&SERIES, 0, 0),
            Err(StatsError::NoDegreesOfFreedom {
                lag: 0,
                fitted_params: 0
            })
        );
        assert_eq!(
            ljung_box(&[1.0, f64::NAN, 2.0, 3.0], 3, 0),
            Err(StatsError::TooFewObservations {
                present: 3,
                needed: 4
            })
        );
        assert_eq!(ljung_box(&[5.0; 8], 3, 0), Err(StatsError::ZeroVariance));
    }

    #[test]
    fn default_lag_rule() {
        assert_eq!(default_ljung_box_lag(0), 1);
        assert_eq!(default_ljung_box_lag(9), 1);
        assert_eq!(default_ljung_box_lag(23), 4);
        assert_eq!(default_ljung_box_lag(50), 10);
        assert_eq!(default_ljung_box_lag(10_000), 10);
    }

    #[test]
    fn information_criteria() {
        // By hand: -2*(-10) + 2*3 = 26; -2*(-10) + 3 ln 100 = 20 + 13.8155...
        assert_eq!(aic(-10.0, 3), 26.0);
        assert_relative_eq!(
            bic(-10.0, 3, 100),
            20.0 + 3.0 * 100f64.ln(),
            max_relative = 1e-15
        );
    }

    #[test]
    fn chi2_quantiles_match_table() {
        // NIST/SEMATECH e-Handbook, table 1.3.6.7.4 (upper critical values of
        // the chi-square distribution), 1 degree of freedom.
        assert_relative_eq!(chi2_quantile(0.95, 1.0), 3.8415, epsilon = 1e-4);
        assert_relative_eq!(chi2_quantile(0.99, 1.0), 6.6349, epsilon = 1e-4);
        assert_relative_eq!(chi2_quantile(0.999, 1.0), 10.8276, epsilon = 1e-4);
        // scipy 1.17.1 stats.chi2.ppf, for tighter agreement
        assert_relative_eq!(
            chi2_quantile(0.95, 1.0),
            3.841458820694124,
            max_relative = 1e-8
        );
        assert_relative_eq!(
            chi2_quantile(0.95, 3.0),
            7.814727903251179,
            max_relative = 1e-8
        );
    }

    #[test]
    fn normal_quantiles_match_table() {
        // NIST/SEMATECH e-Handbook, table 1.3.6.7.1 (standard normal): 1.96;
        // more digits computed with scipy 1.17.1 stats.norm.ppf.
        assert_relative_eq!(
            normal_quantile(0.975),
            1.959963984540054,
            max_relative = 1e-12
        );
        assert_relative_eq!(
            normal_quantile(0.995),
            2.5758293035489004,
            max_relative = 1e-12
        );
        assert_eq!(normal_quantile(0.5), 0.0);
    }

    #[test]
    fn quantiles_reject_bad_arguments_without_panicking() {
        assert!(normal_quantile(1.5).is_nan());
        assert!(normal_quantile(f64::NAN).is_nan());
        assert!(chi2_quantile(-0.1, 1.0).is_nan());
        assert!(chi2_quantile(0.5, 0.0).is_nan());
        assert!(chi2_quantile(0.5, f64::INFINITY).is_nan());
        assert!(chi2_quantile(f64::NAN, 2.0).is_nan());
        assert_eq!(normal_quantile(1.0), f64::INFINITY);
    }

    fn series_with_gaps() -> impl Strategy<Value = Vec<f64>> {
        prop::collection::vec(
            prop_oneof![
                8 => -1e6..1e6f64,
                1 => Just(f64::NAN),
                1 => prop::num::f64::ANY,
            ],
            0..60,
        )
    }

    proptest! {
        #[test]
        fn acf_is_normalised_and_bounded(x in series_with_gaps(), nlags in 0usize..20) {
            let r = acf(&x, nlags);
            prop_assert_eq!(r.len(), nlags + 1);
            prop_assert_eq!(r[0], 1.0);
            for v in &r {
                prop_assert!(v.is_finite() && v.abs() <= 1.0, "{:?}", r);
            }
        }

        #[test]
        fn pacf_lag1_equals_acf_lag1(x in series_with_gaps(), nlags in 1usize..20) {
            let r = acf(&x, nlags);
            let p = pacf(&x, nlags);
            prop_assert_eq!(p.len(), nlags + 1);
            prop_assert_eq!(p[0], 1.0);
            prop_assert_eq!(p[1], r[1]);
            for v in &p {
                prop_assert!(v.is_finite() && v.abs() <= 1.0, "{:?}", p);
            }
        }

        #[test]
        fn ljung_box_never_panics(
            x in series_with_gaps(),
            lag in 0usize..30,
            fitted in 0usize..5,
        ) {
            if let Ok(lb) = ljung_box(&x, lag, fitted) {
                prop_assert!(lb.q >= 0.0 && lb.q.is_finite());
                prop_assert!((0.0..=1.0).contains(&lb.p));
            }
        }

        #[test]
        fn bands_are_nonnegative(x in series_with_gaps(), nlags in 0usize..20, n in 1usize..500) {
            let w = acf_band(&acf(&x, nlags), n, 0.05);
            prop_assert_eq!(w[0], 0.0);
            for pair in w.windows(2).skip(1) {
                prop_assert!(pair[1] >= pair[0], "{:?}", w);
            }
            prop_assert!(pacf_band(n, 0.05) > 0.0);
        }
    }
}
