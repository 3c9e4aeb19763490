//! Parameter transforms between the likelihood optimiser's unconstrained
//! space and model parameters.
//!
//! The maximum-likelihood estimator searches over all of R^k; these bijections
//! map each coordinate onto a valid model parameter (positive variances,
//! stationary AR coefficients, invertible MA coefficients) and back, so the
//! optimiser never proposes a model the Kalman filter cannot run. Diagnostics
//! of the fitted model live in [`crate::stats`].
//!
//! The AR map is Monahan's (1984, Biometrika 71:403) construction via partial
//! autocorrelations (Jones 1980), as in statsmodels
//! `constrain_stationary_univariate`, but with the opposite sign of the
//! unconstrained coordinates: ours satisfies
//! `constrain_stationary(x) == constrain_stationary_univariate(-x)` and
//! `unconstrain_stationary(phi) == -unconstrain_stationary_univariate(phi)`.
//! We prefer the convention in which an AR(1) coefficient has the sign of its
//! unconstrained coordinate. Unconstrained vectors saved by statsmodels must be
//! negated before use here; constrained coefficients mean the same in both.
//!
//! AR and MA orders are limited to [`MAX_ORDER`] so the transforms can work in
//! fixed stack arrays and allocate nothing inside the optimiser's inner loop.

use thiserror::Error;

/// Largest AR or MA order the transforms support.
pub const MAX_ORDER: usize = 4;

/// Why constrained coefficients could not be mapped back to R^p.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum TransformError {
    /// More coefficients than [`MAX_ORDER`].
    #[error("order {order} exceeds the supported maximum {max}", max = MAX_ORDER)]
    OrderTooLarge { order: usize },
    /// Output slice length differs from the input's.
    #[error("input has {input} coefficients but output has {output} slots")]
    LengthMismatch { input: usize, output: usize },
    /// The AR coefficients are on or outside the stationarity boundary: the
    /// partial autocorrelation at `lag` has magnitude >= 1 (or is NaN).
    #[error("AR coefficients are not stationary: partial autocorrelation at lag {lag} is {value}")]
    NotStationary { lag: usize, value: f64 },
    /// The MA coefficients are on or outside the invertibility boundary, as
    /// judged by the partial autocorrelation at `lag` of the sign-flipped
    /// coefficients.
    #[error("MA coefficients are not invertible: partial autocorrelation at lag {lag} is {value}")]
    NotInvertible { lag: usize, value: f64 },
}

/// Maps an unconstrained coordinate to a positive variance, `exp(x)`.
///
/// A variance tending to 0 shows up as `x -> -inf`; the estimator detects and
/// reports that boundary rather than this function clamping it.
pub fn to_positive(x: f64) -> f64 {
    x.exp()
}

/// Inverse of [`to_positive`], `ln(v)`.
///
/// `v = 0` gives `-inf` and negative `v` gives NaN; both mean the caller has
/// a parameter the model cannot use.
pub fn from_positive(v: f64) -> f64 {
    v.ln()
}

/// Unconstrained coordinate to partial autocorrelation in (-1, 1).
fn partial_autocorrelation(x: f64) -> f64 {
    if x.is_infinite() {
        // The limit; `x / hypot` would be inf/inf.
        x.signum()
    } else {
        // hypot rather than sqrt(1 + x^2) so that |x| > 1e154 does not
        // overflow to r = 0.
        x / 1f64.hypot(x)
    }
}

/// One Durbin-Levinson step up: `w[..k]` holds the order-k coefficients;
/// afterwards `w[..=k]` holds order k+1 with partial autocorrelation `r`.
fn step_up(w: &mut [f64], k: usize, r: f64) {
    // Coefficients j and k-1-j depend on each other, so update them as a pair
    // in place rather than keeping a second array.
    for lo in 0..k.div_ceil(2) {
        let hi = k - 1 - lo;
        let (a, b) = (w[lo], w[hi]);
        w[lo] = a - r * b;
        w[hi] = b - r * a;
    }
    w[k] = r;
}

/// One Durbin-Levinson step down, the exact inverse of [`step_up`]:
/// `w[..=k]` holds order k+1 and `r = w[k]`; afterwards `w[..k]` holds order k.
/// Requires `|r| < 1`.
fn step_down(w: &mut [f64], k: usize, r: f64) {
    // (1-r)(1+r) keeps relative accuracy as |r| -> 1, unlike 1 - r*r.
    let d = (1.0 - r) * (1.0 + r);
    for lo in 0..k.div_ceil(2) {
        let hi = k - 1 - lo;
        let (a, b) = (w[lo], w[hi]);
        w[lo] = (a + r * b) / d;
        w[hi] = (b + r * a) / d;
    }
}

/// Runs the recursion down from `w` (AR coefficients, overwritten), storing
/// the partial autocorrelations in `partials` when given. Returns the first
/// lag (1-based) whose partial autocorrelation is not inside (-1, 1).
fn reverse_recursion(w: &mut [f64], mut partials: Option<&mut [f64]>) -> Result<(), (usize, f64)> {
    for k in (0..w.len()).rev() {
        let r = w[k];
        if r.is_nan() || r.abs() >= 1.0 {
            return Err((k + 1, r));
        }
        if let Some(p) = partials.as_deref_mut() {
            p[k] = r;
        }
        step_down(w, k, r);
    }
    Ok(())
}

/// Maps unconstrained coordinates to stationary AR coefficients.
///
/// Each `x_k` becomes a partial autocorrelation `r_k = x_k / sqrt(1 + x_k^2)`
/// and the Durbin-Levinson recursion `phi_{k,k} = r_k`,
/// `phi_{k,j} = phi_{k-1,j} - r_k phi_{k-1,k-j}` builds the coefficients of
/// `u_t = sum_j phi_j u_{t-j} + e_t`. Since every `|r_k| < 1`, the result is
/// stationary for any finite input; for p = 1 it is `x / sqrt(1 + x^2)`.
/// See the module docs for the sign relation to statsmodels.
///
/// This is infallible so the optimiser's objective need not handle errors:
/// only the first `min(unconstrained.len(), out.len(), MAX_ORDER)`
/// coefficients are produced and any remaining `out` entries are set to 0,
/// which is still a stationary model. Callers should validate the order
/// against [`MAX_ORDER`] when the model is built.
///
/// Precision: once `|x|` exceeds about 1e8, `r` rounds to exactly +-1 and the
/// output lies on the boundary; large but smaller `|x|` can leave roots so
/// near the unit circle that round-off decides the side. Infinite inputs
/// give the boundary limit; NaN propagates.
pub fn constrain_stationary(unconstrained: &[f64], out: &mut [f64]) {
    let p = unconstrained.len().min(out.len()).min(MAX_ORDER);
    let mut w = [0.0; MAX_ORDER];
    for (k, &x) in unconstrained[..p].iter().enumerate() {
        step_up(&mut w, k, partial_autocorrelation(x));
    }
    out[..p].copy_from_slice(&w[..p]);
    out[p..].fill(0.0);
}

/// Inverse of [`constrain_stationary`].
///
/// Runs the recursion backwards, `r_k = phi_{k,k}`,
/// `phi_{k-1,j} = (phi_{k,j} + r_k phi_{k,k-j}) / (1 - r_k^2)`, and returns
/// `x_k = r_k / sqrt(1 - r_k^2)`. `out` is left untouched on error.
///
/// # Errors
/// - [`TransformError::OrderTooLarge`] for more than [`MAX_ORDER`] coefficients.
/// - [`TransformError::LengthMismatch`] if `out.len() != constrained.len()`.
/// - [`TransformError::NotStationary`] if some `|r_k| >= 1` or is NaN.
pub fn unconstrain_stationary(constrained: &[f64], out: &mut [f64]) -> Result<(), TransformError> {
    let p = check_lengths(constrained, out)?;
    let mut w = [0.0; MAX_ORDER];
    w[..p].copy_from_slice(constrained);
    let mut r = [0.0; MAX_ORDER];
    reverse_recursion(&mut w[..p], Some(&mut r[..p]))
        .map_err(|(lag, value)| TransformError::NotStationary { lag, value })?;
    for (o, &r) in out.iter_mut().zip(&r[..p]) {
        *o = r / ((1.0 - r) * (1.0 + r)).sqrt();
    }
    Ok(())
}

fn check_lengths(input: &[f64], out: &[f64]) -> Result<usize, TransformError> {
    let p = input.len();
    if p > MAX_ORDER {
        return Err(TransformError::OrderTooLarge { order: p });
    }
    if out.len() != p {
        return Err(TransformError::LengthMismatch {
            input: p,
            output: out.len(),
        });
    }
    Ok(p)
}

/// Whether `u_t = sum_j phi_j u_{t-j} + e_t` is stationary, i.e. all partial
/// autocorrelations from the reverse Durbin-Levinson recursion lie strictly
/// inside (-1, 1). Equivalent to all roots of `1 - phi_1 z - ... - phi_p z^p`
/// lying outside the unit circle. The empty model (white noise) is stationary.
///
/// Works for any order; above [`MAX_ORDER`] it allocates a scratch copy.
pub fn is_stationary(phi: &[f64]) -> bool {
    if phi.len() <= MAX_ORDER {
        let mut w = [0.0; MAX_ORDER];
        w[..phi.len()].copy_from_slice(phi);
        reverse_recursion(&mut w[..phi.len()], None).is_ok()
    } else {
        reverse_recursion(&mut phi.to_vec(), None).is_ok()
    }
}

/// Maps unconstrained coordinates to invertible MA coefficients `theta` of
/// `y_t = e_t + sum_j theta_j e_{t-j}`.
///
/// `1 + theta_1 z + ... + theta_q z^q` has its roots outside the unit circle
/// exactly when `-theta` are stationary AR coefficients, so this is
/// [`constrain_stationary`] followed by a sign flip; for q = 1 it gives
/// `theta = -x / sqrt(1 + x^2)`. Same truncation rule as the AR map.
pub fn constrain_invertible(unconstrained: &[f64], out: &mut [f64]) {
    constrain_stationary(unconstrained, out);
    for t in out.iter_mut() {
        *t = -*t;
    }
}

/// Inverse of [`constrain_invertible`]. `out` is left untouched on error.
///
/// # Errors
/// As [`unconstrain_stationary`], with [`TransformError::NotInvertible`] in
/// place of `NotStationary`.
pub fn unconstrain_invertible(constrained: &[f64], out: &mut [f64]) -> Result<(), TransformError> {
    let p = check_lengths(constrained, out)?;
    let mut neg = [0.0; MAX_ORDER];
    for (n, &t) in neg.iter_mut().zip(constrained) {
        *n = -t;
    }
    unconstrain_stationary(&neg[..p], out).map_err(|e| match e {
        TransformError::NotStationary { lag, value } => TransformError::NotInvertible {
            lag,
            // Report the value in the caller's MA sign convention.
            value: -value,
        },
        other => other,
    })
}

/// Whether `y_t = e_t + sum_j theta_j e_{t-j}` is invertible (see
/// [`constrain_invertible`] for the relation to [`is_stationary`]).
pub fn is_invertible(theta: &[f64]) -> bool {
    if theta.len() <= MAX_ORDER {
        let mut w = [0.0; MAX_ORDER];
        for (w, &t) in w.iter_mut().zip(theta) {
            *w = -t;
        }
        reverse_recursion(&mut w[..theta.len()], None).is_ok()
    } else {
        let mut w: Vec<f64> = theta.iter().map(|t| -t).collect();
        reverse_recursion(&mut w, None).is_ok()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use nalgebra::DMatrix;
    use proptest::prelude::*;

    fn constrained(x: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; x.len()];
        constrain_stationary(x, &mut out);
        out
    }

    fn unconstrained(phi: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; phi.len()];
        unconstrain_stationary(phi, &mut out).unwrap();
        out
    }

    /// Largest root modulus of `z^p - phi_1 z^{p-1} - ... - phi_p`, the
    /// eigenvalues of the AR companion matrix: an independent stationarity
    /// check that does not share code with the recursion.
    fn spectral_radius(phi: &[f64]) -> f64 {
        let p = phi.len();
        if p == 0 {
            return 0.0;
        }
        let mut m = DMatrix::<f64>::zeros(p, p);
        for (j, &c) in phi.iter().enumerate() {
            m[(0, j)] = c;
        }
        for i in 1..p {
            m[(i, i - 1)] = 1.0;
        }
        m.complex_eigenvalues()
            .iter()
            .map(|z| z.norm())
            .fold(0.0, f64::max)
    }

    #[test]
    fn positive_round_trip() {
        assert_eq!(to_positive(0.0), 1.0);
        assert_relative_eq!(
            from_positive(to_positive(-3.25)),
            -3.25,
            max_relative = 1e-15
        );
        assert_eq!(from_positive(0.0), f64::NEG_INFINITY);
        assert!(from_positive(-1.0).is_nan());
    }

    #[test]
    fn ar1_known_value() {
        // By hand: 1 / sqrt(1 + 1) = 1/sqrt(2).
        assert_relative_eq!(
            constrained(&[1.0])[0],
            std::f64::consts::FRAC_1_SQRT_2,
            max_relative = 1e-15
        );
        assert_relative_eq!(
            unconstrained(&[std::f64::consts::FRAC_1_SQRT_2])[0],
            1.0,
            max_relative = 1e-15
        );
    }

    #[test]
    fn ar2_matches_statsmodels() {
        // statsmodels 0.14.6 constrain_stationary_univariate([-0.5, 0.3]);
        // note the negated input, see the module docs.
        let phi = constrained(&[0.5, -0.3]);
        assert_relative_eq!(phi[0], 0.5757194765633937, max_relative = 1e-14);
        assert_relative_eq!(phi[1], -0.2873478855663454, max_relative = 1e-14);
        // statsmodels 0.14.6 unconstrain_stationary_univariate([0.6, -0.2])
        // = [-0.5773502691896258, 0.20412414523193154], negated here.
        let x = unconstrained(&[0.6, -0.2]);
        assert_relative_eq!(x[0], 0.5773502691896258, max_relative = 1e-14);
        assert_relative_eq!(x[1], -0.20412414523193154, max_relative = 1e-14);
    }

    #[test]
    fn ar4_matches_statsmodels() {
        // statsmodels 0.14.6 constrain_stationary_univariate(-[1.2, -0.7, 0.4, 2.0])
        let phi = constrained(&[1.2, -0.7, 0.4, 2.0]);
        let want = [
            1.0895639041068295,
            -0.10793629207044164,
            -0.9002574468943523,
            0.8944271909999159,
        ];
        for (g, w) in phi.iter().zip(want) {
            assert_relative_eq!(*g, w, max_relative = 1e-13);
        }
    }

    #[test]
    fn ma1_sign() {
        // By hand: theta = -x / sqrt(1 + x^2), so 1 + theta z has root 1/|theta| > 1.
        let mut theta = [0.0];
        constrain_invertible(&[1.0], &mut theta);
        assert_relative_eq!(
            theta[0],
            -std::f64::consts::FRAC_1_SQRT_2,
            max_relative = 1e-15
        );
        assert!(is_invertible(&[0.9]) && is_invertible(&[-0.9]));
        assert!(!is_invertible(&[1.0]));
    }

    #[test]
    fn ma_polynomial_roots_outside_unit_circle() {
        // Roots of 1 + theta_1 z + theta_2 z^2 are the reciprocals of the
        // roots of z^2 + theta_1 z + theta_2, i.e. companion of -theta.
        let mut theta = [0.0; 2];
        constrain_invertible(&[2.0, -1.5], &mut theta);
        assert!(spectral_radius(&[-theta[0], -theta[1]]) < 1.0);
        let mut back = [0.0; 2];
        unconstrain_invertible(&theta, &mut back).unwrap();
        assert_relative_eq!(back[0], 2.0, max_relative = 1e-12);
        assert_relative_eq!(back[1], -1.5, max_relative = 1e-12);
    }

    #[test]
    fn non_stationary_inputs_are_rejected() {
        let mut out = [7.0; 2];
        // Unit root: u_t = u_{t-1}.
        assert_eq!(
            unconstrain_stationary(&[1.0], &mut out[..1]),
            Err(TransformError::NotStationary { lag: 1, value: 1.0 })
        );
        // phi = [0.5, 0.5] has a root at z = 1; phi_{2,2} = 0.5 passes but
        // the lag-1 partial is (0.5 + 0.25) / 0.75 = 1.
        let err = unconstrain_stationary(&[0.5, 0.5], &mut out).unwrap_err();
        assert!(
            matches!(err, TransformError::NotStationary { lag: 1, .. }),
            "{err:?}"
        );
        assert_eq!(out, [7.0; 2], "output untouched on error");
        assert!(!is_stationary(&[0.5, 0.5]));
        assert!(!is_stationary(&[f64::NAN]));
        assert!(is_stationary(&[]));
        // MA error carries the MA-side value.
        assert_eq!(
            unconstrain_invertible(&[-1.0], &mut out[..1]),
            Err(TransformError::NotInvertible {
                lag: 1,
                value: -1.0
            })
        );
    }

    #[test]
    fn length_errors() {
        let mut out = [0.0; 5];
        assert_eq!(
            unconstrain_stationary(&[0.1; 5], &mut out),
            Err(TransformError::OrderTooLarge { order: 5 })
        );
        assert_eq!(
            unconstrain_stationary(&[0.1; 2], &mut out[..3]),
            Err(TransformError::LengthMismatch {
                input: 2,
                output: 3
            })
        );
    }

    #[test]
    fn constrain_truncates_above_max_order() {
        let mut out = [9.0; 6];
        constrain_stationary(&[1.0; 6], &mut out);
        assert_eq!(&out[..4], &constrained(&[1.0; 4])[..]);
        assert_eq!(&out[4..], &[0.0, 0.0]);
    }

    #[test]
    fn extreme_inputs_stay_finite() {
        let phi = constrained(&[1e300, f64::NEG_INFINITY]);
        assert!(phi.iter().all(|v| v.is_finite()), "{phi:?}");
        assert_eq!(constrained(&[1e300]), vec![1.0]);
    }

    #[test]
    fn is_stationary_handles_high_orders() {
        // AR(6) with a single small lag-6 coefficient: roots have modulus 0.5^(-1/6) > 1.
        assert!(is_stationary(&[0.0, 0.0, 0.0, 0.0, 0.0, 0.5]));
        assert!(!is_stationary(&[0.0, 0.0, 0.0, 0.0, 0.0, 1.5]));
        assert!(is_invertible(&[0.0, 0.0, 0.0, 0.0, 0.0, -0.5]));
    }

    fn coords(range: f64) -> impl Strategy<Value = Vec<f64>> {
        prop::collection::vec(-range..range, 1..=MAX_ORDER)
    }

    proptest! {
        #[test]
        fn constrained_output_is_stationary(x in coords(5.0)) {
            let phi = constrained(&x);
            prop_assert!(is_stationary(&phi), "{:?} -> {:?}", x, phi);
            let rho = spectral_radius(&phi);
            prop_assert!(rho < 1.0, "{:?} -> {:?}, spectral radius {}", x, phi, rho);
        }

        #[test]
        fn constrain_after_unconstrain_is_identity(x in coords(5.0)) {
            let phi = constrained(&x);
            let back = constrained(&unconstrained(&phi));
            for (a, b) in phi.iter().zip(&back) {
                prop_assert!((a - b).abs() <= 1e-9 * a.abs().max(1.0), "{:?} vs {:?}", phi, back);
            }
        }

        #[test]
        fn unconstrain_after_constrain_is_identity(x in coords(3.0)) {
            let back = unconstrained(&constrained(&x));
            for (a, b) in x.iter().zip(&back) {
                prop_assert!((a - b).abs() <= 1e-9 * a.abs().max(1.0), "{:?} vs {:?}", x, back);
            }
        }

        #[test]
        fn invertible_round_trip(x in coords(5.0)) {
            let mut theta = vec![0.0; x.len()];
            constrain_invertible(&x, &mut theta);
            prop_assert!(is_invertible(&theta));
            let neg: Vec<f64> = theta.iter().map(|t| -t).collect();
            prop_assert!(spectral_radius(&neg) < 1.0);
            let mut back = vec![0.0; x.len()];
            unconstrain_invertible(&theta, &mut back).unwrap();
            let mut again = vec![0.0; x.len()];
            constrain_invertible(&back, &mut again);
            for (a, b) in theta.iter().zip(&again) {
                prop_assert!((a - b).abs() <= 1e-9 * a.abs().max(1.0));
            }
        }

        #[test]
        fn arbitrary_floats_never_panic(
            v in prop::collection::vec(prop::num::f64::ANY, 0..8),
            n in 0usize..8,
        ) {
            let mut out = vec![0.0; n];
            constrain_stationary(&v, &mut out);
            constrain_invertible(&v, &mut out);
            let _ = unconstrain_stationary(&v, &mut out);
            let _ = unconstrain_invertible(&v, &mut out);
            let _ = is_stationary(&v);
            let _ = is_invertible(&v);
        }
    }
}
