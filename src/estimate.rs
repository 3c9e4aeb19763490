//! Maximum-likelihood estimation of a model's parameters from a history, and comparison of candidate models.
//!
//! The estimator holds no filter of its own: it maps an unconstrained parameter vector to a [`ModelSpec`]
//! (variances through exp, AR/MA coefficients through the stationarity/invertibility transforms of `transform`)
//! and asks `filter::loglik` for the exact Gaussian log-likelihood. The optimiser is argmin's L-BFGS on central
//! finite-difference gradients, started from several points because single starts stop at local optima of ARMA
//! likelihoods; a start whose quasi-Newton run fails is retried from a Nelder-Mead simplex. A fit is reported only
//! if the best run ended at a stationary point.
//!
//! Fitting runs on the series standardised to mean 0 and variance 1, so one set of starting values and tolerances
//! serves every engineering unit; parameters are mapped back and the log-likelihood is re-evaluated on the raw data.

use crate::filter::{self, Likelihood, StepKind};
use crate::model::{ModelError, ModelKind, ModelParams, ModelSpec};
use crate::stats::{self, LjungBox};
use crate::transform;
use argmin::core::{
    CostFunction, Error as ArgminError, Executor, Gradient, State, TerminationReason,
};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::neldermead::NelderMead;
use argmin::solver::quasinewton::LBFGS;
use thiserror::Error;

/// Fewer values than this and a fit is refused: the likelihood surface is too flat to mean anything.
pub const MIN_OBSERVATIONS: usize = 10;
/// A variance below this fraction of the series variance is reported as sitting at its zero boundary.
pub const BOUNDARY_FRACTION: f64 = 1e-6;
/// Largest gradient norm (of the mean negative log-likelihood per value, unconstrained space) accepted as converged.
const GRADIENT_TOLERANCE: f64 = 1e-4;
/// Quasi-Newton iterations each starting point gets before the most promising one is polished.
const SCREEN_ITERATIONS: u64 = 4;
/// Iteration budget of the final optimisation.
const POLISH_ITERATIONS: u64 = 300;
/// Smallest variance on the standardised scale (series variance 1). An optimiser walking ln(variance) towards
/// minus infinity would spend hundreds of evaluations getting there; below the floor the cost is flat and it stops.
/// The floor must be far below anything the likelihood can see: a slope variance acts through the integrated
/// slope, whose variance grows like n^3 times it, so e^-60 = 8.8e-27 keeps n^3 x floor below 1e-5 up to n = 1e7.
/// A variance at the floor is reported as at its zero boundary.
const LN_VARIANCE_FLOOR: f64 = -60.0;
/// Cost returned for parameters the model refuses: large but finite so line searches stay well defined.
const REFUSED_COST: f64 = 1e10;

#[derive(Debug, Error, Clone, PartialEq)]
pub enum EstimateError {
    #[error("series has {present} values present; at least {needed} are needed to fit")]
    TooShort { present: usize, needed: usize },
    #[error("series is constant: there is no variability to model")]
    Constant,
    #[error("times must be finite and strictly increasing (problem at index {0})")]
    Times(usize),
    #[error("sample interval must be a finite number > 0 (got {0})")]
    Interval(f64),
    #[error(transparent)]
    Model(#[from] ModelError),
}

/// A history ready for fitting: times in seconds, NaN for missing values, nominal interval.
#[derive(Debug, Clone, Copy)]
pub struct Data<'a> {
    pub times: &'a [f64],
    pub values: &'a [f64],
    pub interval: f64,
}

/// Outcome of fitting one candidate model.
#[derive(Debug, Clone, PartialEq)]
pub struct Fit {
    pub kind: ModelKind,
    /// The estimated model; `None` when no start converged (nothing is reported then).
    pub spec: Option<ModelSpec>,
    pub converged: bool,
    /// Why the fit is not reported, when it is not.
    pub failure: Option<String>,
    /// Exact log-likelihood (statsmodels' exact-diffuse convention).
    pub loglik: f64,
    /// Parameters counted by AIC/BIC: model parameters plus diffuse states.
    pub k: usize,
    pub n_obs: usize,
    pub n_diffuse: usize,
    pub aic: f64,
    pub bic: f64,
    /// Log-likelihood of the values after the first `common_skip` present ones: the same data for every candidate.
    pub loglik_common: f64,
    pub aic_common: f64,
    pub bic_common: f64,
    /// Variance parameters that sit at their zero boundary.
    pub boundary: Vec<&'static str>,
    /// Ljung-Box on the standardised innovations (None if too few).
    pub ljung_box: Option<LjungBox>,
    /// Likelihood evaluations spent.
    pub evaluations: usize,
}

/// A set of fitted candidates ranked for a fair comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// Sorted by `aic_common`, best first; unconverged fits last.
    pub fits: Vec<Fit>,
    /// Present values conditioned on before the common log-likelihood starts (largest diffuse count).
    pub common_skip: usize,
    pub n: usize,
    pub n_missing: usize,
}

impl Comparison {
    pub fn best(&self) -> Option<&Fit> {
        self.fits.first().filter(|f| f.converged)
    }
}

/// Checks the data and returns (mean, std, present count) of the values.
fn describe(data: &Data) -> Result<(f64, f64, usize), EstimateError> {
    if !(data.interval.is_finite() && data.interval > 0.0) {
        return Err(EstimateError::Interval(data.interval));
    }
    for i in 0..data.times.len() {
        let ok = data.times[i].is_finite() && (i == 0 || data.times[i] > data.times[i - 1]);
        if !ok {
            return Err(EstimateError::Times(i));
        }
    }
    let present: Vec<f64> = data
        .values
        .iter()
        .copied()
        .filter(|v| !v.is_nan())
        .collect();
    if present.len() < MIN_OBSERVATIONS {
        return Err(EstimateError::TooShort {
            present: present.len(),
            needed: MIN_OBSERVATIONS,
        });
    }
    let n = present.len() as f64;
    let mean = present.iter().sum::<f64>() / n;
    let var = present.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    if var.is_nan() || var <= 0.0 || !var.is_finite() {
        return Err(EstimateError::Constant);
    }
    Ok((mean, var.sqrt(), present.len()))
}

/// Maps unconstrained vectors to models for one kind, on the standardised scale.
#[derive(Debug, Clone, Copy)]
struct Param {
    kind: ModelKind,
    interval: f64,
}

fn logistic(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

fn logit(p: f64) -> f64 {
    (p / (1.0 - p)).ln()
}

impl Param {
    fn spec(&self, x: &[f64]) -> ModelSpec {
        let var = |u: f64| u.max(LN_VARIANCE_FLOOR).exp();
        let params = match self.kind {
            ModelKind::Level => ModelParams::Level {
                obs_var: var(x[0]),
                level_var: var(x[1]),
            },
            ModelKind::Lag => {
                let phi = logistic(x[1]);
                ModelParams::Lag {
                    mean: x[0],
                    tau: -self.interval / phi.ln(),
                    state_var: var(x[2]),
                    obs_var: var(x[3]),
                }
            }
            ModelKind::Trend => ModelParams::Trend {
                obs_var: var(x[0]),
                level_var: var(x[1]),
                slope_var: var(x[2]),
            },
            ModelKind::Arma { p, q } => {
                let mut ar = vec![0.0; p];
                let mut ma = vec![0.0; q];
                transform::constrain_stationary(&x[1..1 + p], &mut ar);
                transform::constrain_invertible(&x[1 + p..1 + p + q], &mut ma);
                ModelParams::Arma {
                    mean: x[0],
                    ar,
                    ma,
                    var: var(x[1 + p + q]),
                }
            }
        };
        ModelSpec {
            interval: self.interval,
            params,
        }
    }

    /// Inverse of `spec`, for warm starts. None when the model is outside the transforms' range.
    fn unconstrained(&self, spec: &ModelSpec) -> Option<Vec<f64>> {
        let ln = |v: f64| if v > 0.0 { Some(v.ln()) } else { None };
        match &spec.params {
            ModelParams::Level { obs_var, level_var } => Some(vec![ln(*obs_var)?, ln(*level_var)?]),
            ModelParams::Lag {
                mean,
                tau,
                state_var,
                obs_var,
            } => {
                let phi = (-self.interval / tau).exp();
                if !(phi > 0.0 && phi < 1.0) {
                    return None;
                }
                Some(vec![*mean, logit(phi), ln(*state_var)?, ln(*obs_var)?])
            }
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => Some(vec![ln(*obs_var)?, ln(*level_var)?, ln(*slope_var)?]),
            ModelParams::Arma { mean, ar, ma, var } => {
                let mut x = vec![0.0; 2 + ar.len() + ma.len()];
                x[0] = *mean;
                let p = ar.len();
                transform::unconstrain_stationary(ar, &mut x[1..1 + p]).ok()?;
                transform::unconstrain_invertible(ma, &mut x[1 + p..1 + p + ma.len()]).ok()?;
                x[1 + p + ma.len()] = ln(*var)?;
                Some(x)
            }
        }
    }

    /// Starting points on the standardised scale (mean 0, variance 1), spread over the plausible signal/noise splits.
    fn starts(&self, lag1: f64) -> Vec<ModelSpec> {
        let interval = self.interval;
        let r1 = lag1.clamp(0.05, 0.98);
        let mk = |params| ModelSpec { interval, params };
        match self.kind {
            ModelKind::Level => [0.01, 0.1, 1.0]
                .iter()
                .map(|q| {
                    mk(ModelParams::Level {
                        obs_var: 0.5 / (1.0 + q),
                        level_var: 0.5 * q / (1.0 + q),
                    })
                })
                .collect(),
            ModelKind::Lag => [(r1, 0.2), (r1, 0.7), (0.99, 0.5)]
                .iter()
                .map(|&(phi, noise_share)| {
                    let s2 = 1.0 - noise_share;
                    mk(ModelParams::Lag {
                        mean: 0.0,
                        tau: -interval / f64::ln(phi),
                        state_var: s2 * (1.0 - phi * phi),
                        obs_var: noise_share,
                    })
                })
                .collect(),
            ModelKind::Trend => [(0.1, 0.001), (0.01, 1e-4), (1.0, 0.01)]
                .iter()
                .map(|&(lv, sv)| {
                    mk(ModelParams::Trend {
                        obs_var: 0.5,
                        level_var: lv,
                        slope_var: sv,
                    })
                })
                .collect(),
            ModelKind::Arma { p, q } => {
                let mut out = Vec::new();
                for (a1, m1) in [(r1, 0.0), (0.5 * r1, 0.3), (0.9, -0.5)] {
                    let mut ar = vec![0.0; p];
                    let mut ma = vec![0.0; q];
                    if p > 0 {
                        ar[0] = a1;
                    }
                    if q > 0 {
                        ma[0] = if p > 0 { m1 } else { r1.min(0.8) };
                    }
                    out.push(mk(ModelParams::Arma {
                        mean: 0.0,
                        ar,
                        ma,
                        var: if p > 0 { 1.0 - a1 * a1 } else { 0.8 },
                    }));
                }
                out
            }
        }
    }
}

/// The optimiser's view: mean negative log-likelihood per present value, in unconstrained space.
struct Objective<'a> {
    param: Param,
    times: &'a [f64],
    values: &'a [f64],
    n_obs: f64,
    evaluations: std::cell::Cell<usize>,
}

impl Objective<'_> {
    fn eval(&self, x: &[f64]) -> f64 {
        self.evaluations.set(self.evaluations.get() + 1);
        if x.iter().any(|v| !v.is_finite()) {
            return REFUSED_COST;
        }
        let spec = self.param.spec(x);
        match filter::loglik(&spec, self.times, self.values) {
            Ok(ll) if ll.is_finite() => -ll / self.n_obs,
            _ => REFUSED_COST,
        }
    }

    /// Forward differences: half the evaluations of central ones, accurate to ~1e-8, plenty to steer the
    /// optimiser; the acceptance test uses the central gradient.
    fn forward_gradient(&self, x: &[f64]) -> Vec<f64> {
        let f0 = self.eval(x);
        let mut g = vec![0.0; x.len()];
        let mut xp = x.to_vec();
        for i in 0..x.len() {
            let h = 1e-7 * x[i].abs().max(1.0);
            xp[i] = x[i] + h;
            g[i] = (self.eval(&xp) - f0) / h;
            xp[i] = x[i];
        }
        g
    }

    fn gradient_of(&self, x: &[f64]) -> Vec<f64> {
        // Central differences: truncation error O(h^2) ~ 1e-10, rounding ~ 1e-16 / h ~ 1e-11.
        let mut g = vec![0.0; x.len()];
        let mut xp = x.to_vec();
        for i in 0..x.len() {
            let h = 1e-5 * x[i].abs().max(1.0);
            xp[i] = x[i] + h;
            let up = self.eval(&xp);
            xp[i] = x[i] - h;
            let down = self.eval(&xp);
            xp[i] = x[i];
            g[i] = (up - down) / (2.0 * h);
        }
        g
    }
}

impl CostFunction for &Objective<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, x: &Self::Param) -> Result<f64, ArgminError> {
        Ok(self.eval(x))
    }
}

impl Gradient for &Objective<'_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, x: &Self::Param) -> Result<Vec<f64>, ArgminError> {
        Ok(self.forward_gradient(x))
    }
}

fn norm(v: &[f64]) -> f64 {
    v.iter().map(|g| g * g).sum::<f64>().sqrt()
}

/// Quasi-Newton from `x0`; returns the end point, its cost and whether argmin declared convergence.
fn quasi_newton(obj: &Objective, x0: Vec<f64>, max_iters: u64) -> Option<(Vec<f64>, f64, bool)> {
    let linesearch = MoreThuenteLineSearch::new();
    // The cost is a mean per value of order 1, so 1e-11 is far below any difference a comparison could see
    // (n * 1e-11 in log-likelihood); the acceptance test is the gradient norm, checked by the caller.
    let solver = LBFGS::new(linesearch, 7)
        .with_tolerance_grad(1e-7)
        .ok()?
        .with_tolerance_cost(1e-11)
        .ok()?;
    let res = Executor::new(obj, solver)
        .configure(|s| s.param(x0).max_iters(max_iters))
        .run()
        .ok()?;
    let state = res.state();
    let converged = matches!(
        state.get_termination_reason(),
        Some(TerminationReason::SolverConverged)
    );
    let x = state.get_best_param()?.clone();
    Some((x, state.get_best_cost(), converged))
}

fn simplex(obj: &Objective, x0: &[f64]) -> Option<Vec<f64>> {
    let mut vertices = vec![x0.to_vec()];
    for i in 0..x0.len() {
        let mut v = x0.to_vec();
        v[i] += 0.5;
        vertices.push(v);
    }
    let solver = NelderMead::new(vertices).with_sd_tolerance(1e-9).ok()?;
    let res = Executor::new(obj, solver)
        .configure(|s| s.max_iters(500 * x0.len() as u64))
        .run()
        .ok()?;
    res.state().get_best_param().cloned()
}

/// Fits one model kind by maximum likelihood. `warm` adds a caller's starting point (e.g. current parameters).
pub fn fit(data: &Data, kind: ModelKind, warm: Option<&ModelSpec>) -> Result<Fit, EstimateError> {
    let (mean, sd, _) = describe(data)?;
    let standardised: Vec<f64> = data.values.iter().map(|v| (v - mean) / sd).collect();
    let lag1 = stats::acf(&standardised, 1).get(1).copied().unwrap_or(0.0);
    let param = Param {
        kind,
        interval: data.interval,
    };
    let n_present = standardised.iter().filter(|v| !v.is_nan()).count();
    let obj = Objective {
        param,
        times: data.times,
        values: &standardised,
        n_obs: n_present as f64,
        evaluations: std::cell::Cell::new(0),
    };
    let mut starts: Vec<Vec<f64>> = Vec::new();
    if let Some(w) = warm {
        if let Some(x) = param.unconstrained(&rescale(w, mean, sd, true)) {
            starts.push(x);
        }
    }
    starts.extend(
        param
            .starts(lag1)
            .iter()
            .filter_map(|s| param.unconstrained(s)),
    );

    // Screen every start with a few quasi-Newton iterations, then polish from the most promising end point. The
    // screening keeps the protection of several starts (ARMA likelihoods have local optima a single start stops
    // at) without paying for a full optimisation from each: on ordinary data all starts reach the same optimum.
    let mut screened: Vec<(Vec<f64>, f64)> = starts
        .into_iter()
        .map(
            |x0| match quasi_newton(&obj, x0.clone(), SCREEN_ITERATIONS) {
                Some((x, cost, _)) if cost.is_finite() => (x, cost),
                _ => {
                    let cost = obj.eval(&x0);
                    (x0, cost)
                }
            },
        )
        .collect();
    screened.sort_by(|a, b| a.1.total_cmp(&b.1));
    let accepted = |o: &Option<(Vec<f64>, f64, bool)>| {
        o.as_ref()
            .map(|(x, _, _)| norm(&obj.gradient_of(x)) < GRADIENT_TOLERANCE)
            .unwrap_or(false)
    };
    let mut best: Option<(Vec<f64>, f64)> = None;
    for (x0, _) in screened {
        let mut outcome = quasi_newton(&obj, x0.clone(), POLISH_ITERATIONS);
        if !accepted(&outcome) {
            // Line searches fail on ridges and near boundaries: a simplex gets past them, then polish again.
            if let Some(xs) = simplex(&obj, &x0) {
                outcome = quasi_newton(&obj, xs, POLISH_ITERATIONS);
            }
        }
        if accepted(&outcome) {
            if let Some((x, cost, _)) = outcome {
                best = Some((x, cost));
                break;
            }
        }
    }
    let evaluations = obj.evaluations.get();
    let Some((x, _)) = best else {
        return Ok(unconverged(kind, data, evaluations));
    };
    let spec = rescale(&param.spec(&x), mean, sd, false);
    let boundary = boundary_params(&spec, sd * sd);
    let mut result = evaluate(&spec, data, 0)?;
    result.boundary = boundary;
    result.evaluations = evaluations;
    Ok(result)
}

fn unconverged(kind: ModelKind, data: &Data, evaluations: usize) -> Fit {
    Fit {
        kind,
        spec: None,
        converged: false,
        failure: Some("no starting point reached a maximum of the likelihood".into()),
        loglik: f64::NAN,
        k: kind.n_params() + kind.n_diffuse(),
        n_obs: data.values.iter().filter(|v| !v.is_nan()).count(),
        n_diffuse: kind.n_diffuse(),
        aic: f64::NAN,
        bic: f64::NAN,
        loglik_common: f64::NAN,
        aic_common: f64::NAN,
        bic_common: f64::NAN,
        boundary: Vec::new(),
        ljung_box: None,
        evaluations,
    }
}

/// Maps a model between the raw scale and the standardised one (`to_standard`) or back.
fn rescale(spec: &ModelSpec, mean: f64, sd: f64, to_standard: bool) -> ModelSpec {
    let (shift, scale) = if to_standard {
        (-mean / sd, 1.0 / sd)
    } else {
        (mean, sd)
    };
    let m = |x: f64| x * scale + shift;
    let v = |x: f64| x * scale * scale;
    let params = match &spec.params {
        ModelParams::Level { obs_var, level_var } => ModelParams::Level {
            obs_var: v(*obs_var),
            level_var: v(*level_var),
        },
        ModelParams::Lag {
            mean,
            tau,
            state_var,
            obs_var,
        } => ModelParams::Lag {
            mean: m(*mean),
            tau: *tau,
            state_var: v(*state_var),
            obs_var: v(*obs_var),
        },
        ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        } => ModelParams::Trend {
            obs_var: v(*obs_var),
            level_var: v(*level_var),
            slope_var: v(*slope_var),
        },
        ModelParams::Arma { mean, ar, ma, var } => ModelParams::Arma {
            mean: m(*mean),
            ar: ar.clone(),
            ma: ma.clone(),
            var: v(*var),
        },
    };
    ModelSpec {
        interval: spec.interval,
        params,
    }
}

fn boundary_params(spec: &ModelSpec, series_var: f64) -> Vec<&'static str> {
    let limit = BOUNDARY_FRACTION * series_var;
    let named: Vec<(&'static str, f64)> = match &spec.params {
        ModelParams::Level { obs_var, level_var } => {
            vec![("obs_var", *obs_var), ("level_var", *level_var)]
        }
        ModelParams::Lag {
            state_var, obs_var, ..
        } => vec![("state_var", *state_var), ("obs_var", *obs_var)],
        ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        } => vec![
            ("obs_var", *obs_var),
            ("level_var", *level_var),
            ("slope_var", *slope_var),
        ],
        ModelParams::Arma { var, .. } => vec![("var", *var)],
    };
    named
        .into_iter()
        .filter(|(_, v)| *v < limit)
        .map(|(n, _)| n)
        .collect()
}

/// Likelihood, information criteria and residual diagnostics of a given model on the data. `common_skip` present
/// values are conditioned on for the common log-likelihood.
pub fn evaluate(spec: &ModelSpec, data: &Data, common_skip: usize) -> Result<Fit, EstimateError> {
    let kind = spec.kind();
    let mut std_innov = Vec::with_capacity(data.values.len());
    let mut seen = 0usize;
    let mut loglik_common = 0.0;
    let Likelihood {
        loglik,
        n_obs,
        n_diffuse,
    } = filter::run(spec, data.times, data.values, |_, s| {
        if s.kind != StepKind::Missing {
            seen += 1;
            if seen > common_skip {
                loglik_common += s.loglik;
            }
        }
        if s.kind == StepKind::Observed {
            std_innov.push(s.standardized);
        }
    })?;
    let k = kind.n_params() + n_diffuse;
    let n_common = n_obs.saturating_sub(common_skip);
    let lb_lag = stats::default_ljung_box_lag(std_innov.len());
    let ljung_box = stats::ljung_box(&std_innov, lb_lag, kind.reduced_form_coefficients())
        .or_else(|_| stats::ljung_box(&std_innov, lb_lag, 0))
        .ok();
    Ok(Fit {
        kind,
        spec: Some(spec.clone()),
        converged: true,
        failure: None,
        loglik,
        k,
        n_obs,
        n_diffuse,
        aic: stats::aic(loglik, k),
        bic: stats::bic(loglik, k, n_obs),
        loglik_common,
        aic_common: stats::aic(loglik_common, kind.n_params()),
        bic_common: stats::bic(loglik_common, kind.n_params(), n_common),
        boundary: Vec::new(),
        ljung_box,
        evaluations: 0,
    })
}

/// Fits every candidate and ranks them on the common log-likelihood: every model is scored on the same values,
/// those after the first `max(diffuse states)` present ones, so a diffuse model's arbitrary first terms never
/// decide against a stationary one.
pub fn compare(data: &Data, kinds: &[ModelKind]) -> Result<Comparison, EstimateError> {
    describe(data)?;
    let common_skip = kinds.iter().map(|k| k.n_diffuse()).max().unwrap_or(0);
    let mut fits = Vec::with_capacity(kinds.len());
    for &kind in kinds {
        // A problem with the data stops the comparison; a problem with one candidate only marks that candidate,
        // so the engineer still sees the others.
        let attempt = fit(data, kind, None).and_then(|mut f| {
            if let Some(spec) = f.spec.clone() {
                let again = evaluate(&spec, data, common_skip)?;
                f.loglik_common = again.loglik_common;
                f.aic_common = again.aic_common;
                f.bic_common = again.bic_common;
            }
            Ok(f)
        });
        let f = match attempt {
            Ok(f) => f,
            Err(e @ EstimateError::Model(_)) => Fit {
                failure: Some(e.to_string()),
                ..unconverged(kind, data, 0)
            },
            Err(e) => return Err(e),
        };
        fits.push(f);
    }
    fits.sort_by(|a, b| match (a.converged, b.converged) {
        (true, false) => std::cmp::Ordering::Less,
        (false, true) => std::cmp::Ordering::Greater,
        _ => a.aic_common.total_cmp(&b.aic_common),
    });
    let n_missing = data.values.iter().filter(|v| v.is_nan()).count();
    Ok(Comparison {
        fits,
        common_skip,
        n: data.values.len(),
        n_missing,
    })
}

/// ARMA(1,1) equivalent of an AR(1)-plus-noise model (phi, q, r): returns (theta, innovation variance).
/// (1 - phi L) y is MA(1) with gamma0 = q + (1 + phi^2) r and gamma1 = -phi r; theta is its invertible root
/// (standard result, e.g. Harvey 1989; check values in REFERENCES.md).
pub fn ar1_noise_to_arma11(phi: f64, q: f64, r: f64) -> (f64, f64) {
    let gamma0 = q + (1.0 + phi * phi) * r;
    let gamma1 = -phi * r;
    if gamma1 == 0.0 {
        return (0.0, gamma0);
    }
    let rho = gamma1 / gamma0;
    let theta = (1.0 - (1.0 - 4.0 * rho * rho).sqrt()) / (2.0 * rho);
    (theta, gamma1 / theta)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn arma11_equivalent_matches_reference_values() {
        // REFERENCES.md (computed): phi=0.9,q=1,r=1 -> theta=-0.3623334415, sigma2_a=2.4838999027.
        let (theta, s2) = ar1_noise_to_arma11(0.9, 1.0, 1.0);
        assert_relative_eq!(theta, -0.3623334415, max_relative = 1e-9);
        assert_relative_eq!(s2, 2.4838999027, max_relative = 1e-9);
        // phi=0.5, q=1, r=4 -> theta=-0.3819660113.
        assert_relative_eq!(
            ar1_noise_to_arma11(0.5, 1.0, 4.0).0,
            -0.3819660113,
            max_relative = 1e-9
        );
    }

    #[test]
    fn param_round_trip() {
        for kind in [
            ModelKind::Level,
            ModelKind::Lag,
            ModelKind::Trend,
            ModelKind::Arma { p: 2, q: 1 },
            ModelKind::Arma { p: 3, q: 3 },
        ] {
            let param = Param {
                kind,
                interval: 10.0,
            };
            for s in param.starts(0.6) {
                let x = param.unconstrained(&s).unwrap();
                let back = param.spec(&x);
                let x2 = param.unconstrained(&back).unwrap();
                for (a, b) in x.iter().zip(&x2) {
                    assert_relative_eq!(a, b, epsilon = 1e-9);
                }
            }
        }
    }

    #[test]
    fn refuses_short_and_constant_series() {
        let t: Vec<f64> = (0..5).map(|i| i as f64).collect();
        let v = vec![1.0; 5];
        let d = Data {
            times: &t,
            values: &v,
            interval: 1.0,
        };
        assert!(matches!(
            fit(&d, ModelKind::Level, None),
            Err(EstimateError::TooShort { .. })
        ));
        let t: Vec<f64> = (0..50).map(|i| i as f64).collect();
        let v = vec![2.0; 50];
        let d = Data {
            times: &t,
            values: &v,
            interval: 1.0,
        };
        assert!(matches!(
            fit(&d, ModelKind::Level, None),
            Err(EstimateError::Constant)
        ));
    }
}
