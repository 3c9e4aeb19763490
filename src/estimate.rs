//! Maximum-likelihood estimation of a model's parameters from a history, and comparison of candidate models.
//!
//! The estimator holds no filter of its own: it maps an unconstrained parameter vector to a [`ModelSpec`]
//! (variance log-ratios, AR/MA coefficients through the stationarity/invertibility transforms of `transform`) and
//! runs `filter::run` for the exact Gaussian log-likelihood, with the common scale of the variances concentrated
//! out. The optimiser is argmin's L-BFGS on forward-difference gradients. Several starting points are screened
//! because single starts stop at local optima of ARMA likelihoods; the most promising is polished, and a run whose
//! line search fails is retried from a Nelder-Mead simplex. A fit is reported only if it ended where the central
//! difference gradient is below `GRADIENT_TOLERANCE`.
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
const SCREEN_ITERATIONS: u64 = 6;
/// Iteration budget of the final optimisation.
const POLISH_ITERATIONS: u64 = 300;
/// Largest log-ratio between two variances the optimiser can express (e^60 = 1.1e26). Beyond it the cost is flat
/// and the smaller variance counts as zero. The limit must be far beyond anything the likelihood can see: a slope
/// variance acts through the integrated slope, whose variance grows like n^3 times it, so a ratio of e^-60 stays
/// invisible (n^3 e^-60 < 1e-5) up to n = 1e7.
const LN_RATIO_LIMIT: f64 = 60.0;
/// ln(2 pi)
const LN_2PI: f64 = 1.837_877_066_409_345_3;
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

/// Variance shares from log-ratios to the first variance: `[1, e^x1, e^x2, ...] / sum`. Clamping the log-ratios
/// makes the cost flat beyond e^-60, so a variance heading to zero stops there instead of walking to minus
/// infinity, and is reported at its zero boundary.
fn shares<const M: usize, const K: usize>(x: [f64; M]) -> [f64; K] {
    debug_assert_eq!(K, M + 1);
    let mut w = [1.0; K];
    for (wi, xi) in w[1..].iter_mut().zip(x) {
        *wi = xi.clamp(-LN_RATIO_LIMIT, LN_RATIO_LIMIT).exp();
    }
    let total: f64 = w.iter().sum();
    w.map(|v| v / total)
}

impl Param {
    /// The model at `x` with its variances relative: they sum to 1, and the concentrated scale multiplies them.
    fn spec(&self, x: &[f64]) -> ModelSpec {
        let params = match self.kind {
            ModelKind::Level => {
                let [obs_var, level_var] = shares([x[0]]);
                ModelParams::Level { obs_var, level_var }
            }
            ModelKind::Lag => {
                let phi = logistic(x[1]);
                let [obs_var, state_var] = shares([x[2]]);
                ModelParams::Lag {
                    mean: x[0],
                    tau: -self.interval / phi.ln(),
                    state_var,
                    obs_var,
                }
            }
            ModelKind::Trend => {
                let [obs_var, level_var, slope_var] = shares([x[0], x[1]]);
                ModelParams::Trend {
                    obs_var,
                    level_var,
                    slope_var,
                }
            }
            ModelKind::Arma { p, q } => {
                let mut ar = vec![0.0; p];
                let mut ma = vec![0.0; q];
                transform::constrain_stationary(&x[1..1 + p], &mut ar);
                transform::constrain_invertible(&x[1 + p..1 + p + q], &mut ma);
                ModelParams::Arma {
                    mean: x[0],
                    ar,
                    ma,
                    var: 1.0,
                }
            }
        };
        ModelSpec {
            interval: self.interval,
            params,
        }
    }

    /// Inverse of `spec` (the scale drops out), for starting points. None when the model is outside the
    /// transforms' range.
    fn unconstrained(&self, spec: &ModelSpec) -> Option<Vec<f64>> {
        let ratio = |v: f64, reference: f64| {
            if v > 0.0 && reference > 0.0 {
                Some((v / reference).ln())
            } else {
                None
            }
        };
        match &spec.params {
            ModelParams::Level { obs_var, level_var } => Some(vec![ratio(*level_var, *obs_var)?]),
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
                Some(vec![*mean, logit(phi), ratio(*state_var, *obs_var)?])
            }
            ModelParams::Trend {
                obs_var,
                level_var,
                slope_var,
            } => Some(vec![
                ratio(*level_var, *obs_var)?,
                ratio(*slope_var, *obs_var)?,
            ]),
            ModelParams::Arma { mean, ar, ma, .. } => {
                let mut x = vec![0.0; 1 + ar.len() + ma.len()];
                x[0] = *mean;
                let p = ar.len();
                transform::unconstrain_stationary(ar, &mut x[1..1 + p]).ok()?;
                transform::unconstrain_invertible(ma, &mut x[1 + p..1 + p + ma.len()]).ok()?;
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
    /// The last point evaluated and its cost: argmin asks for the cost and then the gradient at the same point,
    /// and a forward difference needs that cost again.
    last: std::cell::RefCell<(Vec<f64>, f64)>,
}

impl Objective<'_> {
    fn eval(&self, x: &[f64]) -> f64 {
        self.evaluations.set(self.evaluations.get() + 1);
        if x.iter().any(|v| !v.is_finite()) {
            return REFUSED_COST;
        }
        match self.concentrated(x) {
            Some((ll, _)) => -ll / self.n_obs,
            None => REFUSED_COST,
        }
    }

    /// The log-likelihood maximised over the common scale of the variances, and that scale.
    ///
    /// Every variance of the model (and so P, F and the stationary prior) is proportional to a common scale s2,
    /// while innovations and the diffuse part F_inf are not. Filtering with relative variances (F = s2 F~) gives
    ///   ln L(s2) = sum_diffuse -0.5 (ln 2pi + ln F_inf) - 0.5 sum_obs (ln 2pi + ln s2 + ln F~ + v^2 / (s2 F~)),
    /// maximised at s2 = mean of v^2 / F~ (D&K 2012, sec. 2.10.2, from memory; checked by a unit test). The optimiser then
    /// searches one dimension fewer.
    fn concentrated(&self, x: &[f64]) -> Option<(f64, f64)> {
        let spec = self.param.spec(x);
        let (mut diffuse_ll, mut m, mut sum_s2, mut sum_ln_f) = (0.0, 0usize, 0.0, 0.0);
        let mut degenerate = false;
        filter::run(&spec, self.times, self.values, |_, st| match st.kind {
            StepKind::Observed => {
                let s2 = st.standardized * st.standardized;
                m += 1;
                sum_s2 += s2;
                // ln F~ recovered from the step's log-density: cheaper than another logarithm per step.
                sum_ln_f += -2.0 * st.loglik - LN_2PI - s2;
            }
            StepKind::Diffuse => diffuse_ll += st.loglik,
            StepKind::Degenerate => degenerate = true,
            StepKind::Missing | StepKind::Withheld => {}
        })
        .ok()?;
        if degenerate || m == 0 {
            return None;
        }
        let scale = sum_s2 / m as f64;
        if !(scale > 0.0 && scale.is_finite()) {
            return None;
        }
        let m = m as f64;
        let ll = diffuse_ll - 0.5 * (m * (LN_2PI + scale.ln() + 1.0) + sum_ln_f);
        ll.is_finite().then_some((ll, scale))
    }

    /// Forward differences: half the evaluations of central ones, accurate to ~1e-8, plenty to steer the
    /// optimiser; the acceptance test uses the central gradient.
    fn forward_gradient(&self, x: &[f64]) -> Vec<f64> {
        let cached = {
            let last = self.last.borrow();
            (last.0.as_slice() == x).then_some(last.1)
        };
        let f0 = cached.unwrap_or_else(|| self.eval(x));
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
        let c = self.eval(x);
        let mut last = self.last.borrow_mut();
        last.0.clear();
        last.0.extend_from_slice(x);
        last.1 = c;
        Ok(c)
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
        last: std::cell::RefCell::new((Vec::new(), f64::NAN)),
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
    let Some((_, scale)) = obj.concentrated(&x) else {
        return Ok(unconverged(kind, data, evaluations));
    };
    let spec = rescale(&with_scale(&param.spec(&x), scale), mean, sd, false);
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

/// The model with every variance multiplied by `scale` (the concentrated scale of `Objective::concentrated`).
fn with_scale(spec: &ModelSpec, scale: f64) -> ModelSpec {
    let mut out = spec.clone();
    match &mut out.params {
        ModelParams::Level { obs_var, level_var } => {
            *obs_var *= scale;
            *level_var *= scale;
        }
        ModelParams::Lag {
            state_var, obs_var, ..
        } => {
            *state_var *= scale;
            *obs_var *= scale;
        }
        ModelParams::Trend {
            obs_var,
            level_var,
            slope_var,
        } => {
            *obs_var *= scale;
            *level_var *= scale;
            *slope_var *= scale;
        }
        ModelParams::Arma { var, .. } => *var *= scale,
    }
    out
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

    /// The concentrated log-likelihood equals the full one at the concentrated scale, and that scale is the
    /// maximum over scales: for every model family, diffuse and stationary, with missing values.
    #[test]
    fn concentrated_likelihood_is_the_profile_maximum() {
        let n = 300;
        let times: Vec<f64> = (0..n).map(|i| i as f64 * 10.0).collect();
        let values: Vec<f64> = (0..n)
            .map(|i| {
                if i % 37 == 5 {
                    f64::NAN
                } else {
                    (i as f64 * 0.05).sin() + ((i * 7919) % 11) as f64 * 0.05
                }
            })
            .collect();
        for (kind, x) in [
            (ModelKind::Level, vec![-1.0]),
            (ModelKind::Lag, vec![0.2, 2.0, 0.5]),
            (ModelKind::Trend, vec![-2.0, -6.0]),
            (ModelKind::Arma { p: 1, q: 1 }, vec![0.1, 1.5, -0.3]),
        ] {
            let param = Param {
                kind,
                interval: 10.0,
            };
            let obj = Objective {
                param,
                times: &times,
                values: &values,
                n_obs: 1.0,
                evaluations: std::cell::Cell::new(0),
                last: std::cell::RefCell::new((Vec::new(), f64::NAN)),
            };
            let (ll, scale) = obj.concentrated(&x).unwrap();
            let full =
                |s: f64| filter::loglik(&with_scale(&param.spec(&x), s), &times, &values).unwrap();
            assert_relative_eq!(ll, full(scale), max_relative = 1e-12);
            assert!(full(scale * 1.01) < ll && full(scale * 0.99) < ll, "{kind}");
        }
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
