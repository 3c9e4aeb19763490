//! State-space models of one sensor channel.
//!
//! A model says how the hidden state moves over an interval `dt` (transition `T`, intercept `c`, state noise
//! covariance `Q`), how it is seen (`y = z'a + d + eps`, `Var eps = h`), and where it starts (a stationary
//! distribution, or an exact diffuse prior for states without one). The filter (`filter`) only consumes these
//! matrices; the estimator (`estimate`) only maps parameter vectors to [`ModelSpec`]s. Neither knows which model it
//! runs.
//!
//! Time is in seconds. Every model carries a nominal sample `interval`: the variances of `level`, `trend` and the
//! `state_var` of `lag` are per nominal interval, so a fit on a 10 s history reads like the AR(1) or random-walk
//! variances an engineer would compute per sample. The continuous-time models (`level`, `lag`, `trend`) are exact for
//! any `dt`: a gap of k intervals equals one prediction over `k * interval`. `arma` is a discrete-time model; a `dt`
//! is rounded to a whole number of steps and the k-step transition is composed exactly.

use nalgebra::{SMatrix, SVector};
use serde::Serialize;
use std::fmt;
use thiserror::Error;

/// Largest ARMA order per side; state dimension max(p, q+1) stays at most 4.
pub const MAX_ARMA_ORDER: usize = 3;

/// What can be wrong with a model's parameters.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ModelError {
    #[error("{name} must be a finite number > 0 (got {value})")]
    NotPositive { name: &'static str, value: f64 },
    #[error("{name} must be a finite number >= 0 (got {value})")]
    Negative { name: &'static str, value: f64 },
    #[error("{name} must be finite (got {value})")]
    NotFinite { name: &'static str, value: f64 },
    #[error("arma order ({p},{q}) is outside 0..=3 for each side, or both are 0")]
    Order { p: usize, q: usize },
    #[error("ar coefficients {0:?} are not stationary")]
    NotStationary(Vec<f64>),
    #[error("unknown model '{0}' (expected level, lag, trend or arma(p,q))")]
    UnknownKind(String),
    #[error("a {kind} model has {expected} parameters, got {got}")]
    ValueCount {
        kind: String,
        expected: usize,
        got: usize,
    },
}

/// Which family a model belongs to, with ARMA orders.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ModelKind {
    Level,
    Lag,
    Trend,
    Arma { p: usize, q: usize },
}

impl ModelKind {
    /// Number of free parameters that ML estimates (the nominal interval is not one).
    pub fn n_params(self) -> usize {
        match self {
            ModelKind::Level => 2,
            ModelKind::Lag => 4,
            ModelKind::Trend => 3,
            ModelKind::Arma { p, q } => p + q + 2,
        }
    }

    /// States with an exact diffuse prior (counted as parameters in AIC/BIC, as statsmodels does).
    pub fn n_diffuse(self) -> usize {
        match self {
            ModelKind::Level => 1,
            ModelKind::Trend => 2,
            ModelKind::Lag | ModelKind::Arma { .. } => 0,
        }
    }

    /// ARMA coefficients of the model's reduced form, used as the Ljung-Box degrees-of-freedom correction:
    /// level is ARIMA(0,1,1), lag ARMA(1,1), trend ARIMA(0,2,2).
    pub fn reduced_form_coefficients(self) -> usize {
        match self {
            ModelKind::Level => 1,
            ModelKind::Lag | ModelKind::Trend => 2,
            ModelKind::Arma { p, q } => p + q,
        }
    }

    pub fn parse(text: &str) -> Result<Self, ModelError> {
        let t = text.trim().to_ascii_lowercase();
        match t.as_str() {
            "level" => return Ok(ModelKind::Level),
            "lag" => return Ok(ModelKind::Lag),
            "trend" => return Ok(ModelKind::Trend),
            _ => {}
        }
        let inner = t
            .strip_prefix("arma(")
            .and_then(|r| r.strip_suffix(')'))
            .ok_or_else(|| ModelError::UnknownKind(text.to_string()))?;
        let mut it = inner.split(',').map(|s| s.trim().parse::<usize>());
        match (it.next(), it.next(), it.next()) {
            (Some(Ok(p)), Some(Ok(q)), None) => {
                if p > MAX_ARMA_ORDER || q > MAX_ARMA_ORDER || p + q == 0 {
                    Err(ModelError::Order { p, q })
                } else {
                    Ok(ModelKind::Arma { p, q })
                }
            }
            _ => Err(ModelError::UnknownKind(text.to_string())),
        }
    }
}

/// In saved state a kind is its text (`level`, `arma(1,1)`), the same words the configuration uses.
impl serde::Serialize for ModelKind {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

impl<'de> serde::Deserialize<'de> for ModelKind {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let text = String::deserialize(d)?;
        ModelKind::parse(&text).map_err(serde::de::Error::custom)
    }
}

impl fmt::Display for ModelKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ModelKind::Level => write!(f, "level"),
            ModelKind::Lag => write!(f, "lag"),
            ModelKind::Trend => write!(f, "trend"),
            ModelKind::Arma { p, q } => write!(f, "arma({p},{q})"),
        }
    }
}

/// Parameters of one model, in the units an engineer reads (variances per nominal interval).
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum ModelParams {
    Level {
        obs_var: f64,
        level_var: f64,
    },
    Lag {
        mean: f64,
        /// Time constant in seconds; phi(dt) = exp(-dt/tau).
        tau: f64,
        /// State noise variance over one nominal interval (the AR(1) innovation variance q).
        state_var: f64,
        obs_var: f64,
    },
    Trend {
        obs_var: f64,
        level_var: f64,
        slope_var: f64,
    },
    Arma {
        mean: f64,
        ar: Vec<f64>,
        ma: Vec<f64>,
        var: f64,
    },
}

/// A fully specified model for one channel: parameters plus the nominal sample interval (seconds).
#[derive(Debug, Clone, PartialEq)]
pub struct ModelSpec {
    pub interval: f64,
    pub params: ModelParams,
}

fn positive(name: &'static str, value: f64) -> Result<(), ModelError> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(ModelError::NotPositive { name, value })
    }
}

fn non_negative(name: &'static str, value: f64) -> Result<(), ModelError> {
    if value.is_finite() && value >= 0.0 {
        Ok(())
    } else {
        Err(ModelError::Negative { name, value })
    }
}

fn finite(name: &'static str, value: f64) -> Result<(), ModelError> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(ModelError::NotFinite { name, value })
    }
}

impl ModelSpec {
    /// The parameters as a flat list in a fixed order per kind (level: obs_var, level_var; lag: mean, tau,
    /// state_var, obs_var; trend: obs_var, level_var, slope_var; arma: mean, ar.., ma.., var), so a checkpoint
    /// can store any model as its kind's name, its interval and numbers.
    pub fn values(&self) -> Vec<f64> {
        match &self.params {
            ModelParams::Level { obs_var, level_var } => vec![*obs_var, *level_var],
            ModelParams::Lag {
                mean,
                tau,
                state_var,
                obs_var,
            } => vec![*mean, *tau, *state_var, *obs_var],
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => vec![*obs_var, *level_var, *slope_var],
            ModelParams::Arma { mean, ar, ma, var } => std::iter::once(*mean)
                .chain(ar.iter().copied())
                .chain(ma.iter().copied())
                .chain(std::iter::once(*var))
                .collect(),
        }
    }

    /// The inverse of [`ModelSpec::values`], validated.
    pub fn from_values(kind: ModelKind, interval: f64, v: &[f64]) -> Result<ModelSpec, ModelError> {
        if v.len() != kind.n_params() {
            return Err(ModelError::ValueCount {
                kind: kind.to_string(),
                expected: kind.n_params(),
                got: v.len(),
            });
        }
        let params = match kind {
            ModelKind::Level => ModelParams::Level {
                obs_var: v[0],
                level_var: v[1],
            },
            ModelKind::Lag => ModelParams::Lag {
                mean: v[0],
                tau: v[1],
                state_var: v[2],
                obs_var: v[3],
            },
            ModelKind::Trend => ModelParams::Trend {
                obs_var: v[0],
                level_var: v[1],
                slope_var: v[2],
            },
            ModelKind::Arma { p, q } => ModelParams::Arma {
                mean: v[0],
                ar: v[1..1 + p].to_vec(),
                ma: v[1 + p..1 + p + q].to_vec(),
                var: v[1 + p + q],
            },
        };
        let spec = ModelSpec { interval, params };
        spec.validate()?;
        Ok(spec)
    }

    pub fn kind(&self) -> ModelKind {
        match &self.params {
            ModelParams::Level { .. } => ModelKind::Level,
            ModelParams::Lag { .. } => ModelKind::Lag,
            ModelParams::Trend { .. } => ModelKind::Trend,
            ModelParams::Arma { ar, ma, .. } => ModelKind::Arma {
                p: ar.len(),
                q: ma.len(),
            },
        }
    }

    /// Checks every parameter; a spec that passes builds a filter that cannot produce NaN from finite data.
    pub fn validate(&self) -> Result<(), ModelError> {
        positive("interval", self.interval)?;
        match &self.params {
            ModelParams::Level { obs_var, level_var } => {
                non_negative("obs_var", *obs_var)?;
                non_negative("level_var", *level_var)?;
            }
            ModelParams::Lag {
                mean,
                tau,
                state_var,
                obs_var,
            } => {
                finite("mean", *mean)?;
                positive("tau", *tau)?;
                non_negative("state_var", *state_var)?;
                non_negative("obs_var", *obs_var)?;
            }
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => {
                non_negative("obs_var", *obs_var)?;
                non_negative("level_var", *level_var)?;
                non_negative("slope_var", *slope_var)?;
            }
            ModelParams::Arma { mean, ar, ma, var } => {
                finite("mean", *mean)?;
                positive("var", *var)?;
                let (p, q) = (ar.len(), ma.len());
                if p > MAX_ARMA_ORDER || q > MAX_ARMA_ORDER || p + q == 0 {
                    return Err(ModelError::Order { p, q });
                }
                for c in ar.iter().chain(ma.iter()) {
                    finite("arma coefficient", *c)?;
                }
                if !ar_is_stationary(ar) {
                    return Err(ModelError::NotStationary(ar.clone()));
                }
            }
        }
        Ok(())
    }

    /// AR(1) coefficient of a `lag` model at a given interval.
    pub fn lag_phi(tau: f64, dt: f64) -> f64 {
        (-dt / tau).exp()
    }
}

/// Stationarity by the reverse Durbin-Levinson recursion: all partial autocorrelations inside (-1, 1).
fn ar_is_stationary(ar: &[f64]) -> bool {
    let mut phi = [0.0f64; MAX_ARMA_ORDER + 1];
    let p = ar.len();
    phi[..p].copy_from_slice(ar);
    for k in (1..=p).rev() {
        let r = phi[k - 1];
        // NaN fails this test too, which is what we want.
        if r.is_nan() || r.abs() >= 1.0 {
            return false;
        }
        let mut prev = [0.0f64; MAX_ARMA_ORDER + 1];
        for j in 1..k {
            prev[j - 1] = (phi[j - 1] + r * phi[k - j - 1]) / (1.0 - r * r);
        }
        phi = prev;
    }
    true
}

/// Transition over one interval: `a' = t a + c`, state noise covariance `q`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Transition<const N: usize> {
    pub t: SMatrix<f64, N, N>,
    pub c: SVector<f64, N>,
    pub q: SMatrix<f64, N, N>,
}

impl<const N: usize> Transition<N> {
    pub fn identity() -> Self {
        Self {
            t: SMatrix::identity(),
            c: SVector::zeros(),
            q: SMatrix::zeros(),
        }
    }

    /// The transition `self` followed by `next`.
    pub fn then(&self, next: &Self) -> Self {
        Self {
            t: next.t * self.t,
            c: next.t * self.c + next.c,
            q: next.t * self.q * next.t.transpose() + next.q,
        }
    }

    /// `k` consecutive steps composed by repeated squaring: exact, O(log k) products.
    pub fn power(&self, mut k: u64) -> Self {
        let mut result = Self::identity();
        let mut base = *self;
        while k > 0 {
            if k & 1 == 1 {
                result = result.then(&base);
            }
            k >>= 1;
            if k > 0 {
                base = base.then(&base);
            }
        }
        result
    }
}

/// Observation equation `y = z'a + d + eps`, `Var eps = h`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation<const N: usize> {
    pub z: SVector<f64, N>,
    pub d: f64,
    pub h: f64,
}

/// Prior of the first state: mean `a`, proper covariance `p_star` and diffuse part `p_inf` (kappa -> infinity).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Prior<const N: usize> {
    pub a: SVector<f64, N>,
    pub p_star: SMatrix<f64, N, N>,
    pub p_inf: SMatrix<f64, N, N>,
}

/// A model realised in state-space form with state dimension `N`.
pub trait StateSpace<const N: usize> {
    /// Exact transition over `dt` seconds (dt >= 0).
    fn transition(&self, dt: f64) -> Transition<N>;
    /// The spacing the model actually uses for `dt`: two spacings with the same key have the same transition.
    /// Continuous-time models use dt itself; a discrete model rounds to whole steps, so timestamp jitter does not
    /// defeat the transition cache and the steady state.
    #[inline]
    fn step_key(&self, dt: f64) -> f64 {
        dt
    }
    fn observation(&self) -> Observation<N>;
    fn prior(&self) -> Prior<N>;
}

/// Random walk level seen through noise. Diffuse: a level has no stationary distribution.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Level {
    pub obs_var: f64,
    /// Level variance per second.
    pub level_rate: f64,
}

impl StateSpace<1> for Level {
    #[inline]
    fn transition(&self, dt: f64) -> Transition<1> {
        Transition {
            t: SMatrix::identity(),
            c: SVector::zeros(),
            q: SMatrix::from_element(self.level_rate * dt),
        }
    }
    #[inline]
    fn observation(&self) -> Observation<1> {
        Observation {
            z: SVector::from_element(1.0),
            d: 0.0,
            h: self.obs_var,
        }
    }
    fn prior(&self) -> Prior<1> {
        Prior {
            a: SVector::zeros(),
            p_star: SMatrix::zeros(),
            p_inf: SMatrix::identity(),
        }
    }
}

/// First-order lag (Ornstein-Uhlenbeck) around a mean: the discretised heat-loss process. Stationary prior.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Lag {
    pub mean: f64,
    pub tau: f64,
    /// Stationary variance of the state.
    pub stationary_var: f64,
    pub obs_var: f64,
}

impl StateSpace<1> for Lag {
    #[inline]
    fn transition(&self, dt: f64) -> Transition<1> {
        // One expm1 gives both: phi = 1 + em, and 1 - phi^2 = -em (2 + em) without the cancellation that
        // 1 - phi^2 suffers for dt << tau, where the state noise is tiny.
        let em = (-dt / self.tau).exp_m1();
        let phi = 1.0 + em;
        let q = self.stationary_var * (-em * (2.0 + em));
        Transition {
            t: SMatrix::from_element(phi),
            c: SVector::zeros(),
            q: SMatrix::from_element(q),
        }
    }
    #[inline]
    fn observation(&self) -> Observation<1> {
        Observation {
            z: SVector::from_element(1.0),
            d: self.mean,
            h: self.obs_var,
        }
    }
    fn prior(&self) -> Prior<1> {
        Prior {
            a: SVector::zeros(),
            p_star: SMatrix::from_element(self.stationary_var),
            p_inf: SMatrix::zeros(),
        }
    }
}

/// Local linear trend with the slope an integrated random walk in continuous time, exact for any dt.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Trend {
    pub obs_var: f64,
    pub level_var: f64,
    pub slope_var: f64,
    pub interval: f64,
}

impl StateSpace<2> for Trend {
    #[inline]
    fn transition(&self, dt: f64) -> Transition<2> {
        // u counts nominal intervals; the slope is per interval, so T = [[1, u], [0, 1]].
        let u = dt / self.interval;
        let (u2, u3) = (u * u, u * u * u);
        let s = self.slope_var;
        Transition {
            t: SMatrix::<f64, 2, 2>::new(1.0, u, 0.0, 1.0),
            c: SVector::zeros(),
            q: SMatrix::<f64, 2, 2>::new(
                self.level_var * u + s * u3 / 3.0,
                s * u2 / 2.0,
                s * u2 / 2.0,
                s * u,
            ),
        }
    }
    #[inline]
    fn observation(&self) -> Observation<2> {
        Observation {
            z: SVector::<f64, 2>::new(1.0, 0.0),
            d: 0.0,
            h: self.obs_var,
        }
    }
    fn prior(&self) -> Prior<2> {
        Prior {
            a: SVector::zeros(),
            p_star: SMatrix::zeros(),
            p_inf: SMatrix::identity(),
        }
    }
}

/// ARMA(p,q) with mean in Harvey's state-space form, state dimension N = max(p, q+1). Stationary prior.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Arma<const N: usize> {
    pub mean: f64,
    pub interval: f64,
    step: Transition<N>,
    p0: SMatrix<f64, N, N>,
}

impl<const N: usize> Arma<N> {
    /// `ar` and `ma` must fit in N (p <= N, q <= N-1) and `ar` must be stationary.
    pub fn new(
        mean: f64,
        ar: &[f64],
        ma: &[f64],
        var: f64,
        interval: f64,
    ) -> Result<Self, ModelError> {
        if ar.len() > N || ma.len() + 1 > N {
            return Err(ModelError::Order {
                p: ar.len(),
                q: ma.len(),
            });
        }
        let mut t = SMatrix::<f64, N, N>::zeros();
        for (i, phi) in ar.iter().enumerate() {
            t[(i, 0)] = *phi;
        }
        for i in 0..N - 1 {
            t[(i, i + 1)] = 1.0;
        }
        let mut r = SVector::<f64, N>::zeros();
        r[0] = 1.0;
        for (j, theta) in ma.iter().enumerate() {
            r[j + 1] = *theta;
        }
        let q = r * r.transpose() * var;
        let p0 =
            stationary_covariance(&t, &q).ok_or_else(|| ModelError::NotStationary(ar.to_vec()))?;
        Ok(Self {
            mean,
            interval,
            step: Transition {
                t,
                c: SVector::zeros(),
                q,
            },
            p0,
        })
    }
}

impl<const N: usize> StateSpace<N> for Arma<N> {
    #[inline]
    fn transition(&self, dt: f64) -> Transition<N> {
        let k = (self.step_key(dt) / self.interval).round() as u64;
        if k == 1 {
            self.step
        } else {
            self.step.power(k)
        }
    }
    /// Whole model steps, in seconds: round(dt / interval) * interval; 0 for anything not finite or below half
    /// a step.
    #[inline]
    fn step_key(&self, dt: f64) -> f64 {
        let k = (dt / self.interval).round();
        if k.is_finite() && k > 0.0 {
            k * self.interval
        } else {
            0.0
        }
    }
    #[inline]
    fn observation(&self) -> Observation<N> {
        let mut z = SVector::zeros();
        z[0] = 1.0;
        Observation {
            z,
            d: self.mean,
            h: 0.0,
        }
    }
    fn prior(&self) -> Prior<N> {
        Prior {
            a: SVector::zeros(),
            p_star: self.p0,
            p_inf: SMatrix::zeros(),
        }
    }
}

/// Solves P = T P T' + Q by the doubling algorithm (fixed-size, no allocation). None if T is not stable.
pub fn stationary_covariance<const N: usize>(
    t: &SMatrix<f64, N, N>,
    q: &SMatrix<f64, N, N>,
) -> Option<SMatrix<f64, N, N>> {
    let mut p = *q;
    let mut a = *t;
    for _ in 0..200 {
        let next = p + a * p * a.transpose();
        a = a * a;
        let delta = (next - p).abs().max();
        p = next;
        if !p.iter().all(|v| v.is_finite()) {
            return None;
        }
        if a.abs().max() < 1e-300 || delta <= 1e-15 * p.abs().max() {
            if a.abs().max() > 1e-3 {
                // Converged numerically but T^(2^k) has not vanished: unit root or worse.
                return None;
            }
            return Some(0.5 * (p + p.transpose()));
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn parses_kinds() {
        assert_eq!(ModelKind::parse("level").unwrap(), ModelKind::Level);
        assert_eq!(
            ModelKind::parse(" ARMA(2, 1)").unwrap(),
            ModelKind::Arma { p: 2, q: 1 }
        );
        assert!(ModelKind::parse("arma(4,0)").is_err());
        assert!(ModelKind::parse("arma(0,0)").is_err());
        assert!(ModelKind::parse("arma(1)").is_err());
        assert!(ModelKind::parse("kalman").is_err());
        assert_eq!(ModelKind::Arma { p: 1, q: 1 }.to_string(), "arma(1,1)");
    }

    #[test]
    fn lag_semigroup() {
        // Q(a+b) = phi(b)^2 Q(a) + Q(b): the property of an exact discretisation (REFERENCES.md, OU section).
        let m = Lag {
            mean: 3.0,
            tau: 37.0,
            stationary_var: 2.5,
            obs_var: 0.1,
        };
        for (a, b) in [(1.0, 2.0), (0.01, 400.0), (13.0, 0.5)] {
            let whole = m.transition(a + b);
            let composed = m.transition(a).then(&m.transition(b));
            assert_relative_eq!(whole.t[0], composed.t[0], max_relative = 1e-12);
            assert_relative_eq!(whole.q[0], composed.q[0], max_relative = 1e-12);
        }
    }

    #[test]
    fn trend_semigroup() {
        let m = Trend {
            obs_var: 1.0,
            level_var: 0.3,
            slope_var: 0.02,
            interval: 10.0,
        };
        let whole = m.transition(70.0);
        let composed = m.transition(30.0).then(&m.transition(40.0));
        for i in 0..4 {
            assert_relative_eq!(whole.t[i], composed.t[i], max_relative = 1e-12);
            assert_relative_eq!(whole.q[i], composed.q[i], max_relative = 1e-12);
        }
    }

    #[test]
    fn arma_stationary_covariance_ar1() {
        // AR(1): Var = var / (1 - phi^2), a textbook identity.
        let m = Arma::<1>::new(0.0, &[0.7], &[], 2.0, 1.0).unwrap();
        assert_relative_eq!(
            m.prior().p_star[0],
            2.0 / (1.0 - 0.49),
            max_relative = 1e-12
        );
    }

    #[test]
    fn arma_power_matches_repeated_steps() {
        let m = Arma::<3>::new(1.0, &[0.5, -0.3, 0.1], &[0.4, 0.2], 1.5, 1.0).unwrap();
        let mut manual = Transition::<3>::identity();
        for _ in 0..13 {
            manual = manual.then(&m.transition(1.0));
        }
        let fast = m.transition(13.0);
        for i in 0..9 {
            assert_relative_eq!(manual.t[i], fast.t[i], epsilon = 1e-12);
            assert_relative_eq!(manual.q[i], fast.q[i], epsilon = 1e-12);
        }
    }

    #[test]
    fn non_stationary_arma_is_refused() {
        assert!(Arma::<1>::new(0.0, &[1.0], &[], 1.0, 1.0).is_err());
        assert!(Arma::<2>::new(0.0, &[1.2, -0.1], &[], 1.0, 1.0).is_err());
        let spec = ModelSpec {
            interval: 1.0,
            params: ModelParams::Arma {
                mean: 0.0,
                ar: vec![0.5, 0.6],
                ma: vec![],
                var: 1.0,
            },
        };
        assert!(spec.validate().is_err());
    }
}
