//! The Kalman filter: one recursive step per sample, for any model in state-space form.
//!
//! `Kalman<M, N>` is generic over the model and its state dimension, so the 1-state models compile to scalar
//! arithmetic and larger ones use fixed-size nalgebra matrices: no allocation per step. [`Filter`] wraps the
//! concrete models behind one enum for code that picks a model at run time (`channel`, `estimate`, the CLI).
//!
//! Conventions (documented in README, "Likelihood convention"):
//! - A step predicts from the previous sample's time over `dt`, then updates with the value. The first sample
//!   updates the prior directly.
//! - A missing value (None or NaN) is predict-only and adds nothing to the log-likelihood.
//! - Diffuse states use the exact diffuse filter of Koopman (1997, JASA 92:1630) in the univariate form of Durbin &
//!   Koopman (2012, sections 5.2 and 6.4): while the diffuse part F_inf of the forecast variance is non-zero, a step
//!   adds -0.5 (ln 2pi + ln F_inf) to the log-likelihood, which is the convention of statsmodels with exact diffuse
//!   initialisation.
//! - The covariance update is Joseph's form, symmetrised, so P stays symmetric positive semi-definite over millions
//!   of steps.
//! - Steady state: with a constant dt and no missing values, the covariance of a time-invariant model converges.
//!   Once the predicted covariance repeats to within rounding, the gain, F and ln F are frozen and a step costs
//!   only the mean update (as statsmodels' steady-state mode). Any missing value, change of dt or diffuse state
//!   leaves that mode and runs the full recursion again, so the results are those of the full filter to ~1e-14.

use crate::model::{
    Arma, Lag, Level, ModelError, ModelParams, ModelSpec, Observation, Prior, StateSpace,
    Transition, Trend,
};
use nalgebra::{SMatrix, SVector};

/// ln(2 pi), the constant of every Gaussian log-density term.
const LN_2PI: f64 = 1.837_877_066_409_345_3;
/// Below this a diffuse forecast variance (dimensionless: P_inf starts as the identity) counts as zero.
const DIFFUSE_TOL: f64 = 1e-9;

/// What happened to one sample.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StepKind {
    /// Value used to update the state; proper innovation.
    Observed,
    /// Value used while the state is still (partly) diffuse: no standardised innovation yet.
    Diffuse,
    /// No value: prediction only.
    Missing,
    /// Forecast variance was zero (a model with no noise at all): the value could not be weighed.
    Degenerate,
    /// An outlier held back by the step's [`Gate`]: prediction only, but the innovation is reported.
    Withheld,
}

/// Robust-update rule for one step (`detect` decides it per sample; plain [`Kalman::step`] uses [`Gate::NONE`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Gate {
    /// |standardised innovation| beyond which a value is an outlier and does not update the state; infinite: none.
    pub limit: f64,
    /// Sign (+1 or -1) of an outlier that is a confirmed level shift: instead of being withheld it re-acquires,
    /// the forecast variance being inflated to the squared innovation before the update. 0: no re-acquisition.
    pub reacquire: f64,
}

impl Gate {
    pub const NONE: Gate = Gate {
        limit: f64::INFINITY,
        reacquire: 0.0,
    };
}

/// The filter's account of one sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Step {
    pub kind: StepKind,
    /// One-step forecast of the observation, z'a_{t|t-1} + d.
    pub predicted: f64,
    /// Its variance F_t (observation noise included); infinite while diffuse.
    pub predicted_var: f64,
    /// y_t minus the forecast; NaN when missing.
    pub innovation: f64,
    /// innovation / sqrt(F_t); NaN when missing or diffuse.
    pub standardized: f64,
    /// Filtered signal z'a_{t|t} + d: the clean value to publish.
    pub estimate: f64,
    /// Variance of the filtered signal (observation noise excluded); infinite while the signal is diffuse.
    pub estimate_var: f64,
    /// This sample's log-likelihood contribution.
    pub loglik: f64,
}

/// Forecast of the signal and of the next observation `dt` seconds ahead of the last sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Forecast {
    pub signal: f64,
    pub signal_var: f64,
    /// Variance of a future observation (signal plus observation noise).
    pub obs_var: f64,
}

/// Generic Kalman filter over a model `M` with `N` states.
#[derive(Debug, Clone)]
pub struct Kalman<M, const N: usize> {
    model: M,
    obs: Observation<N>,
    a: SVector<f64, N>,
    p: SMatrix<f64, N, N>,
    p_inf: SMatrix<f64, N, N>,
    diffuse: bool,
    started: bool,
    cached_dt: f64,
    cached: Transition<N>,
    /// Predicted covariance of the previous observed step at the same dt, to detect convergence.
    p_pred_prev: SMatrix<f64, N, N>,
    steady: Option<Steady<N>>,
}

/// Frozen quantities of a converged filter (see the module notes).
#[derive(Debug, Clone, Copy)]
struct Steady<const N: usize> {
    gain: SVector<f64, N>,
    f: f64,
    inv_sqrt_f: f64,
    /// -0.5 (ln 2pi + ln F)
    ll_const: f64,
    estimate_var: f64,
}

impl<M: StateSpace<N>, const N: usize> Kalman<M, N> {
    pub fn new(model: M) -> Self {
        let obs = model.observation();
        let Prior { a, p_star, p_inf } = model.prior();
        let cached = model.transition(0.0);
        Self {
            diffuse: p_inf.iter().any(|v| *v != 0.0),
            model,
            obs,
            a,
            p: p_star,
            p_inf,
            started: false,
            cached_dt: 0.0,
            cached,
            p_pred_prev: SMatrix::repeat(f64::NAN),
            steady: None,
        }
    }

    pub fn model(&self) -> &M {
        &self.model
    }

    /// True while some state still has a diffuse (infinite) variance.
    pub fn is_diffuse(&self) -> bool {
        self.diffuse
    }

    #[inline]
    fn transition(&mut self, dt: f64) -> Transition<N> {
        // Regular sampling repeats the same dt: reuse the matrices instead of recomputing exponentials.
        if dt != self.cached_dt {
            self.cached = self.model.transition(dt);
            self.cached_dt = dt;
        }
        self.cached
    }

    #[inline]
    fn predict(&mut self, dt: f64) {
        let tr = self.transition(dt);
        self.a = tr.t * self.a + tr.c;
        self.p = tr.t * self.p * tr.t.transpose() + tr.q;
        if self.diffuse {
            self.p_inf = tr.t * self.p_inf * tr.t.transpose();
        }
    }

    /// One sample `dt` seconds after the previous one (ignored for the first sample); `None` or NaN is missing.
    #[inline]
    pub fn step(&mut self, dt: f64, y: Option<f64>) -> Step {
        self.step_gated(dt, y, Gate::NONE)
    }

    /// [`Kalman::step`] under a robust-update [`Gate`]. Outliers are judged only once the state is proper (a
    /// diffuse step has no forecast variance to judge by).
    pub fn step_gated(&mut self, dt: f64, y: Option<f64>, gate: Gate) -> Step {
        let dt = self.model.step_key(dt);
        if let (Some(st), Some(y)) = (self.steady, y) {
            if dt == self.cached_dt && !y.is_nan() {
                if let Some(step) = self.step_steady(&st, y, gate) {
                    return step;
                }
                return self.observe(y, false, gate);
            }
        }
        self.steady = None;
        let same_dt = self.started && dt == self.cached_dt;
        if self.started {
            self.predict(dt);
        }
        self.started = true;
        self.observe(y.unwrap_or(f64::NAN), same_dt, gate)
    }

    /// The update half of a step, from the predicted state; `y` NaN is missing.
    #[inline]
    fn observe(&mut self, y: f64, same_dt: bool, gate: Gate) -> Step {
        let z = self.obs.z;
        let h = self.obs.h;
        let predicted = z.dot(&self.a) + self.obs.d;
        let m = self.p * z;
        let signal_var = z.dot(&m);
        let f = signal_var + h;
        let f_inf = if self.diffuse {
            z.dot(&(self.p_inf * z))
        } else {
            0.0
        };
        let y = match y {
            v if !v.is_nan() => v,
            _ => {
                // Convergence is judged only between consecutive observed steps.
                self.p_pred_prev = SMatrix::repeat(f64::NAN);
                let infinite = f_inf > DIFFUSE_TOL;
                return Step {
                    kind: StepKind::Missing,
                    predicted,
                    predicted_var: if infinite { f64::INFINITY } else { f },
                    innovation: f64::NAN,
                    standardized: f64::NAN,
                    estimate: predicted,
                    estimate_var: if infinite { f64::INFINITY } else { signal_var },
                    loglik: 0.0,
                };
            }
        };
        let v = y - predicted;
        if f_inf > DIFFUSE_TOL {
            return self.update_diffuse(v, predicted, m, f, f_inf);
        }
        if f.is_nan() || f <= 0.0 {
            return Step {
                kind: StepKind::Degenerate,
                predicted,
                predicted_var: f,
                innovation: v,
                standardized: f64::NAN,
                estimate: predicted,
                estimate_var: signal_var,
                loglik: if v == 0.0 { 0.0 } else { f64::NEG_INFINITY },
            };
        }
        // One division serves the gain, the standardised innovation and the likelihood (divisions are the slow
        // part of a 1-state step).
        let mut inv_f = 1.0 / f;
        let standardized = v * inv_f.sqrt();
        let (mut m, mut f, mut same_dt) = (m, f, same_dt);
        if standardized.abs() > gate.limit {
            if standardized.signum() != gate.reacquire {
                self.p_pred_prev = SMatrix::repeat(f64::NAN);
                return Step {
                    kind: StepKind::Withheld,
                    predicted,
                    predicted_var: f,
                    innovation: v,
                    standardized,
                    estimate: predicted,
                    estimate_var: signal_var,
                    loglik: 0.0,
                };
            }
            // Re-acquire: grow the variance along the observed direction until F equals v^2, so the update
            // believes the new level about as much as the data say.
            let zz = z.dot(&z);
            let e = z / zz;
            self.p += e * e.transpose() * (v * v - f).max(0.0);
            m = self.p * z;
            f = z.dot(&m) + h;
            inv_f = 1.0 / f;
            same_dt = false;
            self.p_pred_prev = SMatrix::repeat(f64::NAN);
        }
        let k = m * inv_f;
        if same_dt && !self.diffuse {
            let tol = 1e-12 * self.p.abs().max();
            if (self.p - self.p_pred_prev).abs().max() <= tol {
                self.steady = Some(Steady {
                    gain: k,
                    f,
                    inv_sqrt_f: 1.0 / f.sqrt(),
                    ll_const: -0.5 * (LN_2PI + f.ln()),
                    estimate_var: 0.0,
                });
            }
        }
        self.p_pred_prev = self.p;
        self.a += k * v;
        // Joseph form: (I - k z') P (I - k z')' + k h k'. Costs a few more flops than P - k m', but cannot lose
        // positive semi-definiteness to rounding.
        let ikz = SMatrix::<f64, N, N>::identity() - k * z.transpose();
        let p = ikz * self.p * ikz.transpose() + k * k.transpose() * h;
        self.p = if N > 1 { (p + p.transpose()) * 0.5 } else { p };
        if self.diffuse {
            // Diffuse states not seen by this observation (F_inf = 0) stay diffuse.
            self.end_diffuse_if_done();
        }
        let estimate_var = if self.diffuse && z.dot(&(self.p_inf * z)) > DIFFUSE_TOL {
            f64::INFINITY
        } else {
            // A state the observation pins down exactly (ARMA has no measurement noise) has a variance of zero
            // up to rounding; never report a negative one.
            z.dot(&(self.p * z)).max(0.0)
        };
        if let Some(st) = self.steady.as_mut() {
            st.estimate_var = estimate_var;
        }
        Step {
            kind: StepKind::Observed,
            predicted,
            predicted_var: f,
            innovation: v,
            standardized,
            estimate: z.dot(&self.a) + self.obs.d,
            estimate_var,
            loglik: -0.5 * (LN_2PI + f.ln() + v * v * inv_f),
        }
    }

    /// A step of the converged filter: same dt as before, value present. P is unchanged by construction. An
    /// outlier under `gate` leaves the steady mode with the state predicted and returns None: the full update
    /// then judges it.
    #[inline]
    fn step_steady(&mut self, st: &Steady<N>, y: f64, gate: Gate) -> Option<Step> {
        let tr = self.cached;
        self.a = tr.t * self.a + tr.c;
        let z = self.obs.z;
        let predicted = z.dot(&self.a) + self.obs.d;
        let v = y - predicted;
        let standardized = v * st.inv_sqrt_f;
        if standardized.abs() > gate.limit {
            // self.p holds the filtered covariance of the steady state; predict it like the state.
            self.p = tr.t * self.p * tr.t.transpose() + tr.q;
            self.steady = None;
            self.p_pred_prev = SMatrix::repeat(f64::NAN);
            return None;
        }
        self.a += st.gain * v;
        Some(Step {
            kind: StepKind::Observed,
            predicted,
            predicted_var: st.f,
            innovation: v,
            standardized,
            estimate: z.dot(&self.a) + self.obs.d,
            estimate_var: st.estimate_var,
            loglik: st.ll_const - 0.5 * standardized * standardized,
        })
    }

    fn update_diffuse(
        &mut self,
        v: f64,
        predicted: f64,
        m_star: SVector<f64, N>,
        f_star: f64,
        f_inf: f64,
    ) -> Step {
        let z = self.obs.z;
        let m_inf = self.p_inf * z;
        let k_inf = m_inf / f_inf;
        self.a += k_inf * v;
        // Durbin & Koopman (2012), eq. 5.12 in univariate form.
        let p = self.p + k_inf * k_inf.transpose() * f_star
            - (m_star * k_inf.transpose() + k_inf * m_star.transpose());
        self.p = (p + p.transpose()) * 0.5;
        let pi = self.p_inf - m_inf * k_inf.transpose();
        self.p_inf = (pi + pi.transpose()) * 0.5;
        self.end_diffuse_if_done();
        let signal_inf = if self.diffuse {
            z.dot(&(self.p_inf * z))
        } else {
            0.0
        };
        Step {
            kind: StepKind::Diffuse,
            predicted,
            predicted_var: f64::INFINITY,
            innovation: v,
            standardized: f64::NAN,
            estimate: z.dot(&self.a) + self.obs.d,
            estimate_var: if signal_inf > DIFFUSE_TOL {
                f64::INFINITY
            } else {
                z.dot(&(self.p * z)).max(0.0)
            },
            loglik: -0.5 * (LN_2PI + f_inf.ln()),
        }
    }

    fn end_diffuse_if_done(&mut self) {
        if self.p_inf.abs().max() <= DIFFUSE_TOL {
            self.p_inf = SMatrix::zeros();
            self.diffuse = false;
        }
    }

    /// Forecast `dt` seconds past the last sample (or from the prior before any sample), without changing state.
    pub fn forecast(&self, dt: f64) -> Forecast {
        let tr = if self.started {
            self.model.transition(dt)
        } else {
            Transition::identity()
        };
        let z = self.obs.z;
        let a = tr.t * self.a + tr.c;
        let p = tr.t * self.p * tr.t.transpose() + tr.q;
        let diffuse_var = if self.diffuse {
            z.dot(&(tr.t * self.p_inf * tr.t.transpose() * z))
        } else {
            0.0
        };
        let signal_var = if diffuse_var > DIFFUSE_TOL {
            f64::INFINITY
        } else {
            z.dot(&(p * z))
        };
        Forecast {
            signal: z.dot(&a) + self.obs.d,
            signal_var,
            obs_var: signal_var + self.obs.h,
        }
    }

    /// Takes over the state of `other` (a filter of the same model family with other parameters), so a
    /// parameter change does not restart the channel: the mean and covariances carry on, and the new parameters
    /// act from the next step. The steady-state shortcut is left, since the gain belongs to the old parameters.
    pub fn adopt(&mut self, other: &Self) {
        self.a = other.a;
        self.p = other.p;
        self.p_inf = other.p_inf;
        self.diffuse = other.diffuse;
        self.started = other.started;
        self.steady = None;
        self.p_pred_prev = SMatrix::repeat(f64::NAN);
    }

    /// Filtered state mean and covariance (proper part), for tests and checkpoints.
    pub fn state(&self) -> (SVector<f64, N>, SMatrix<f64, N, N>) {
        (self.a, self.p)
    }

    fn save(&self) -> FilterState {
        FilterState {
            a: self.a.iter().copied().collect(),
            p: self.p.iter().copied().collect(),
            p_inf: self.p_inf.iter().copied().collect(),
            diffuse: self.diffuse,
            started: self.started,
        }
    }

    fn restore(&mut self, s: &FilterState) -> Result<(), StateError> {
        if s.a.len() != N || s.p.len() != N * N || s.p_inf.len() != N * N {
            return Err(StateError::Size {
                states: s.a.len(),
                expected: N,
            });
        }
        if s.a
            .iter()
            .chain(&s.p)
            .chain(&s.p_inf)
            .any(|v| !v.is_finite())
        {
            return Err(StateError::NotFinite);
        }
        let p = SMatrix::<f64, N, N>::from_column_slice(&s.p);
        if (0..N).any(|i| p[(i, i)] < 0.0) {
            return Err(StateError::NegativeVariance);
        }
        self.a = SVector::from_column_slice(&s.a);
        self.p = p;
        self.p_inf = SMatrix::from_column_slice(&s.p_inf);
        self.diffuse = s.diffuse;
        self.started = s.started;
        self.steady = None;
        self.p_pred_prev = SMatrix::repeat(f64::NAN);
        Ok(())
    }
}

/// A filter's state as a checkpoint keeps it: state mean, proper and diffuse covariances (column-major), and
/// where the filter is in its start-up. The model is not part of it: a state is restored into a filter of the
/// same model, built from the saved parameters. The steady-state shortcut is not saved; a restored filter
/// finds it again within a few samples.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FilterState {
    pub a: Vec<f64>,
    pub p: Vec<f64>,
    pub p_inf: Vec<f64>,
    pub diffuse: bool,
    pub started: bool,
}

/// Why a saved filter state does not fit a filter.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StateError {
    #[error("the saved state has {states} states, the model has {expected}")]
    Size { states: usize, expected: usize },
    #[error("the saved state holds a non-finite number")]
    NotFinite,
    #[error("the saved state has a negative variance")]
    NegativeVariance,
}

/// A Kalman filter for any configured model, chosen at run time.
// The 2- to 4-state ARMA filters are boxed: unboxed, every channel's filter took the size of the largest (about
// 1.3 KB, measured by benches/daemon_e2e.rs as 157 MB for 100,000 channels), while most channels run a 1- or
// 2-state model. The box costs one pointer chase per sample on those ARMA channels only.
#[derive(Debug, Clone)]
pub enum Filter {
    Level(Kalman<Level, 1>),
    Lag(Kalman<Lag, 1>),
    Trend(Kalman<Trend, 2>),
    Arma1(Kalman<Arma<1>, 1>),
    Arma2(Box<Kalman<Arma<2>, 2>>),
    Arma3(Box<Kalman<Arma<3>, 3>>),
    Arma4(Box<Kalman<Arma<4>, 4>>),
}

macro_rules! each_filter {
    ($self:expr, $k:ident => $body:expr) => {
        match $self {
            Filter::Level($k) => $body,
            Filter::Lag($k) => $body,
            Filter::Trend($k) => $body,
            Filter::Arma1($k) => $body,
            Filter::Arma2($k) => $body,
            Filter::Arma3($k) => $body,
            Filter::Arma4($k) => $body,
        }
    };
}

impl Filter {
    /// [`Kalman::adopt`] when both filters are of one variant (same model family and state size); false, and
    /// nothing changed, otherwise.
    pub fn adopt(&mut self, other: &Filter) -> bool {
        match (self, other) {
            (Filter::Level(a), Filter::Level(b)) => a.adopt(b),
            (Filter::Lag(a), Filter::Lag(b)) => a.adopt(b),
            (Filter::Trend(a), Filter::Trend(b)) => a.adopt(b),
            (Filter::Arma1(a), Filter::Arma1(b)) => a.adopt(b),
            (Filter::Arma2(a), Filter::Arma2(b)) => a.adopt(b),
            (Filter::Arma3(a), Filter::Arma3(b)) => a.adopt(b),
            (Filter::Arma4(a), Filter::Arma4(b)) => a.adopt(b),
            _ => return false,
        }
        true
    }

    /// Realises a validated model in state-space form.
    pub fn new(spec: &ModelSpec) -> Result<Self, ModelError> {
        spec.validate()?;
        let interval = spec.interval;
        Ok(match &spec.params {
            ModelParams::Level { obs_var, level_var } => Filter::Level(Kalman::new(Level {
                obs_var: *obs_var,
                level_rate: level_var / interval,
            })),
            ModelParams::Lag {
                mean,
                tau,
                state_var,
                obs_var,
            } => Filter::Lag(Kalman::new(Lag {
                mean: *mean,
                tau: *tau,
                stationary_var: lag_stationary_var(*state_var, *tau, interval),
                obs_var: *obs_var,
            })),
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => Filter::Trend(Kalman::new(Trend {
                obs_var: *obs_var,
                level_var: *level_var,
                slope_var: *slope_var,
                interval,
            })),
            ModelParams::Arma { mean, ar, ma, var } => {
                let (m, v) = (*mean, *var);
                match ar.len().max(ma.len() + 1) {
                    1 => Filter::Arma1(Kalman::new(Arma::new(m, ar, ma, v, interval)?)),
                    2 => Filter::Arma2(Box::new(Kalman::new(Arma::new(m, ar, ma, v, interval)?))),
                    3 => Filter::Arma3(Box::new(Kalman::new(Arma::new(m, ar, ma, v, interval)?))),
                    _ => Filter::Arma4(Box::new(Kalman::new(Arma::new(m, ar, ma, v, interval)?))),
                }
            }
        })
    }

    #[inline]
    pub fn step(&mut self, dt: f64, y: Option<f64>) -> Step {
        each_filter!(self, k => k.step(dt, y))
    }

    pub fn step_gated(&mut self, dt: f64, y: Option<f64>, gate: Gate) -> Step {
        each_filter!(self, k => k.step_gated(dt, y, gate))
    }

    pub fn forecast(&self, dt: f64) -> Forecast {
        each_filter!(self, k => k.forecast(dt))
    }

    pub fn is_diffuse(&self) -> bool {
        each_filter!(self, k => k.is_diffuse())
    }

    /// The state a checkpoint keeps (allocates; not for the per-sample path).
    pub fn save_state(&self) -> FilterState {
        each_filter!(self, k => k.save())
    }

    /// Carries on from a saved state; on an error the filter is unchanged.
    pub fn restore_state(&mut self, state: &FilterState) -> Result<(), StateError> {
        each_filter!(self, k => k.restore(state))
    }

    /// Filtered state mean and covariance (proper part, row-major), for diagnostics and checkpoints.
    /// Allocates; not for the per-sample path.
    pub fn snapshot(&self) -> (Vec<f64>, Vec<f64>) {
        each_filter!(self, k => {
            let (a, p) = k.state();
            (a.iter().copied().collect(), p.transpose().iter().copied().collect())
        })
    }
}

/// Stationary variance of a `lag` state from its per-interval noise: q / (1 - exp(-2 interval / tau)).
pub fn lag_stationary_var(state_var: f64, tau: f64, interval: f64) -> f64 {
    state_var / -(-2.0 * interval / tau).exp_m1()
}

/// Log-likelihood summary of one pass over a series.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Likelihood {
    pub loglik: f64,
    /// Values present.
    pub n_obs: usize,
    /// Values consumed by the diffuse part of the filter.
    pub n_diffuse: usize,
}

/// Runs a fresh filter over a whole series (times in seconds, NaN = missing) and sums the log-likelihood.
/// `visit` sees every step, for callers that keep innovations or estimates.
pub fn run<F: FnMut(usize, &Step)>(
    spec: &ModelSpec,
    times: &[f64],
    values: &[f64],
    mut visit: F,
) -> Result<Likelihood, ModelError> {
    let mut filter = Filter::new(spec)?;
    let mut lik = Likelihood {
        loglik: 0.0,
        n_obs: 0,
        n_diffuse: 0,
    };
    let mut prev = times.first().copied().unwrap_or(0.0);
    for (i, (&t, &y)) in times.iter().zip(values).enumerate() {
        let step = filter.step(t - prev, Some(y));
        prev = t;
        lik.loglik += step.loglik;
        match step.kind {
            StepKind::Missing | StepKind::Withheld => {}
            StepKind::Diffuse => {
                lik.n_obs += 1;
                lik.n_diffuse += 1;
            }
            StepKind::Observed | StepKind::Degenerate => lik.n_obs += 1,
        }
        visit(i, &step);
    }
    Ok(lik)
}

/// Only the log-likelihood: the estimator's inner loop.
pub fn loglik(spec: &ModelSpec, times: &[f64], values: &[f64]) -> Result<f64, ModelError> {
    run(spec, times, values, |_, _| {}).map(|l| l.loglik)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use std::f64::consts::PI;

    /// Per-channel memory: a daemon holds one filter per channel (100,000 must fit in 200 MB with everything
    /// else), so the enum must not grow to the largest model's size.
    #[test]
    fn filter_stays_small() {
        let size = std::mem::size_of::<Filter>();
        assert!(size <= 400, "Filter is {size} bytes");
    }

    /// The steady-state shortcut engages on regular data, leaves on a gap, and matches the textbook scalar
    /// recursion (D&K 2012, eq. 2.15) computed in full at every step.
    #[test]
    fn steady_state_matches_full_recursion() {
        let (h, q) = (2.0, 0.3);
        let mut k = Kalman::new(Level {
            obs_var: h,
            level_rate: q,
        });
        let (mut a, mut p) = (0.0f64, 0.0f64);
        let mut engaged = 0;
        for i in 0..5000usize {
            let y = (i as f64 * 0.01).sin() * 10.0 + ((i * 7919) % 13) as f64 * 0.1;
            let missing = i % 1000 == 500;
            let s = k.step(1.0, (!missing).then_some(y));
            engaged += k.steady.is_some() as usize;
            if i == 0 {
                (a, p) = (y, h); // exact diffuse start: a_1|1 = y_1, P = h
                continue;
            }
            p += q;
            if missing {
                assert_eq!(s.kind, StepKind::Missing);
                assert!(k.steady.is_none());
                continue;
            }
            let f = p + h;
            let v = y - a;
            assert_relative_eq!(s.innovation, v, max_relative = 1e-12, epsilon = 1e-10);
            assert_relative_eq!(s.predicted_var, f, max_relative = 1e-12);
            assert_relative_eq!(
                s.loglik,
                -0.5 * (LN_2PI + f.ln() + v * v / f),
                max_relative = 1e-12
            );
            a += p / f * v;
            p -= p * p / f;
            assert_relative_eq!(s.estimate, a, max_relative = 1e-12, epsilon = 1e-10);
            assert_relative_eq!(s.estimate_var, p, max_relative = 1e-12);
        }
        assert!(
            engaged > 4500,
            "steady state engaged on only {engaged} of 5000 steps"
        );
    }

    fn level(obs: f64, lvl: f64) -> ModelSpec {
        ModelSpec {
            interval: 1.0,
            params: ModelParams::Level {
                obs_var: obs,
                level_var: lvl,
            },
        }
    }

    #[test]
    fn ln_2pi_is_right() {
        assert_relative_eq!(LN_2PI, (2.0 * PI).ln(), max_relative = 1e-15);
    }

    #[test]
    fn local_level_first_steps_are_the_textbook_ones() {
        // Durbin & Koopman (2012) ch. 5 / REFERENCES.md: exact diffuse local level gives a2 = y1, P2 = eps + eta.
        let mut f = Filter::new(&level(15099.0, 1469.1)).unwrap();
        let s1 = f.step(0.0, Some(1120.0));
        assert_eq!(s1.kind, StepKind::Diffuse);
        assert_relative_eq!(s1.loglik, -0.5 * LN_2PI, max_relative = 1e-15);
        assert_eq!(s1.estimate, 1120.0);
        let s2 = f.step(1.0, Some(1160.0));
        assert_eq!(s2.kind, StepKind::Observed);
        assert_relative_eq!(s2.predicted, 1120.0);
        assert_relative_eq!(
            s2.predicted_var,
            15099.0 + 15099.0 + 1469.1,
            max_relative = 1e-12
        );
    }

    #[test]
    fn missing_is_predict_only() {
        let mut f = Filter::new(&level(1.0, 0.5)).unwrap();
        f.step(0.0, Some(3.0));
        let before = f.forecast(2.0);
        f.step(1.0, None);
        let s = f.step(1.0, Some(f64::NAN));
        assert_eq!(s.kind, StepKind::Missing);
        assert_eq!(s.loglik, 0.0);
        assert_relative_eq!(s.estimate, before.signal);
        assert_relative_eq!(s.estimate_var, before.signal_var, max_relative = 1e-12);
    }

    #[test]
    fn trend_diffuse_ends_after_two_values() {
        let spec = ModelSpec {
            interval: 1.0,
            params: ModelParams::Trend {
                obs_var: 1.0,
                level_var: 0.1,
                slope_var: 0.01,
            },
        };
        let mut f = Filter::new(&spec).unwrap();
        assert_eq!(f.step(0.0, Some(1.0)).kind, StepKind::Diffuse);
        assert!(f.is_diffuse());
        assert_eq!(f.step(1.0, Some(2.0)).kind, StepKind::Diffuse);
        assert!(!f.is_diffuse());
        let s = f.step(1.0, Some(3.0));
        assert_eq!(s.kind, StepKind::Observed);
        // Two exact points on a line: the trend forecasts the third on it.
        assert_relative_eq!(s.predicted, 3.0, max_relative = 1e-12);
    }
}
