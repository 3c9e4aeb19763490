"""Generate gaugewise's JSON reference fixtures with statsmodels.

What it generates (all in tests/reference/ unless noted):

  nile.csv             Nile annual flow 1871-1970 (statsmodels.datasets.nile)
  nile_level.json      local level model on Nile: ML fit, diagnostics, and the
                       filter at Durbin & Koopman's published parameters
  nile_missing.json    the same with observations 21-40 and 61-80 missing
  lag_arma11.json      simulated "lag" model (AR(1) state + noise, with mean),
                       fitted as lag and as ARMA(1,1); the two are the same
                       process at the implied MA coefficient
  arma.json            simulated ARMA(p,q)-with-mean series, fits and
                       fixed-parameter evaluations (one series with NaNs)
  trend.json           simulated continuous-time local linear trend (dt=1),
                       fitted with a custom MLEModel (exact diffuse init)
  acf.json             acf / pacf / Ljung-Box reference values
  config/examples/vessel_temperature.csv
                       invented demo data (fictional Brackenfield Works plant)

The model definitions are gaugewise's (see tests/reference/README.md); the
"lag" and "trend" models are implemented below as statsmodels MLEModel
subclasses, "level" uses UnobservedComponents and "arma" uses SARIMAX.

How to run (from the repository root):

    python3 -m venv .venv && .venv/bin/pip install -r tests/reference/requirements.txt && .venv/bin/python tests/reference/make_fixtures.py

It is deterministic (every random draw comes from
numpy.random.default_rng(seed) with a fixed seed). The outputs are committed;
they are generated, never hand-edited: change this script and re-run it.
"""

import csv
import datetime
import json
import math
import os
import re
import sys
import warnings

import numpy as np
import pandas as pd
import patsy
import scipy
import scipy.signal
import statsmodels
import statsmodels.api as sm
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.tools.sm_exceptions import ConvergenceWarning
from statsmodels.tsa.statespace.mlemodel import MLEModel
from statsmodels.tsa.statespace.sarimax import SARIMAX
from statsmodels.tsa.statespace.structural import UnobservedComponents
from statsmodels.tsa.stattools import acf, pacf

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
EXAMPLES = os.path.join(ROOT, "config", "examples")

SM = "statsmodels %s" % statsmodels.__version__
VERSIONS = {
    "python": sys.version.split()[0],
    "statsmodels": statsmodels.__version__,
    "numpy": np.__version__,
    "scipy": scipy.__version__,
    "pandas": pd.__version__,
    "patsy": patsy.__version__,
}
DK = ("Durbin & Koopman, Time Series Analysis by State Space Methods, "
      "2nd ed. (2012)")

warnings.simplefilter("ignore", ConvergenceWarning)


# ---------------------------------------------------------------------------
# gaugewise models as statsmodels state space models
# ---------------------------------------------------------------------------

class LagModel(MLEModel):
    """gaugewise "lag": y_t = mean + x_t + eps_t, x_{t+1} = phi x_t + w_t.

    eps ~ N(0, obs_var), w ~ N(0, state_var), x_1 ~ N(0, state_var/(1-phi^2)).
    Parameters (constrained): mean, phi (|phi|<1), state_var, obs_var.
    Transforms: phi = u/sqrt(1+u^2); variances = u^2.
    """

    param_names_gw = ["mean", "phi", "state_var", "obs_var"]

    def __init__(self, endog):
        super().__init__(endog, k_states=1)
        self["design", 0, 0] = 1.0
        self["selection", 0, 0] = 1.0
        self.ssm.initialize_stationary()

    @property
    def param_names(self):
        return list(self.param_names_gw)

    @property
    def start_params(self):
        y = self.endog[:, 0]
        y = y[~np.isnan(y)]
        v = np.var(y)
        r1 = np.corrcoef(y[1:], y[:-1])[0, 1]
        phi = min(max(r1, -0.9), 0.95)
        return np.array([np.mean(y), phi, 0.5 * v * (1 - phi ** 2), 0.5 * v])

    def transform_params(self, unconstrained):
        u = np.asarray(unconstrained)
        c = u.copy()
        c[1] = u[1] / np.sqrt(1.0 + u[1] ** 2)
        c[2] = u[2] ** 2
        c[3] = u[3] ** 2
        return c

    def untransform_params(self, constrained):
        c = np.asarray(constrained)
        u = c.copy()
        u[1] = c[1] / np.sqrt(1.0 - c[1] ** 2)
        u[2] = c[2] ** 0.5
        u[3] = c[3] ** 0.5
        return u

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        self["obs_intercept", 0] = params[0]
        self["transition", 0, 0] = params[1]
        self["state_cov", 0, 0] = params[2]
        self["obs_cov", 0, 0] = params[3]


def trend_q(level_var, slope_var):
    """gaugewise trend state noise covariance at dt=1."""
    return (level_var * np.array([[1.0, 0.0], [0.0, 0.0]])
            + slope_var * np.array([[1.0 / 3.0, 0.5], [0.5, 1.0]]))


class TrendModel(MLEModel):
    """gaugewise "trend" (continuous-time local linear trend at dt=1).

    state (level, slope), T = [[1,1],[0,1]],
    Q = level_var*[[1,0],[0,0]] + slope_var*[[1/3,1/2],[1/2,1]],
    y_t = level_t + eps_t, eps ~ N(0, obs_var); exact diffuse init.
    Parameters (constrained): obs_var, level_var, slope_var; transforms u^2.
    """

    param_names_gw = ["obs_var", "level_var", "slope_var"]

    def __init__(self, endog):
        super().__init__(endog, k_states=2, k_posdef=2)
        self["design"] = np.array([[1.0, 0.0]])
        self["transition"] = np.array([[1.0, 1.0], [0.0, 1.0]])
        self["selection"] = np.eye(2)
        self.ssm.initialize_diffuse()  # exact diffuse in statsmodels 0.14

    @property
    def param_names(self):
        return list(self.param_names_gw)

    @property
    def start_params(self):
        y = self.endog[:, 0]
        y = y[~np.isnan(y)]
        d2 = np.diff(y, 2)
        v = np.var(d2)
        return np.array([v / 6.0, v / 6.0, v / 60.0])

    def transform_params(self, unconstrained):
        return np.asarray(unconstrained) ** 2

    def untransform_params(self, constrained):
        return np.asarray(constrained) ** 0.5

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        self["obs_cov", 0, 0] = params[0]
        self["state_cov"] = trend_q(params[1], params[2])


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------

def clean(obj):
    """Convert numpy scalars/arrays to JSON values; NaN/inf -> None."""
    if isinstance(obj, dict):
        return {str(k): clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [clean(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    return obj


def write_json(name, obj, directory=HERE):
    path = os.path.join(directory, name)
    obj = dict(obj)
    obj.setdefault("generated_by", "tests/reference/make_fixtures.py")
    obj.setdefault("versions", VERSIONS)
    with open(path, "w") as f:
        text = json.dumps(clean(obj), indent=1, allow_nan=False)
        # one line per array of scalars (smaller files, still plain JSON)
        text = re.sub(r"\[\n\s+([^\[\]{}\n]*(?:\n[^\[\]{}\n]*)*?)\n\s*\]",
                      lambda m: "[" + re.sub(r",\n\s*", ", ", m.group(1)) + "]",
                      text)
        json.loads(text)
        f.write(text)
        f.write("\n")
    print("wrote", os.path.relpath(path, ROOT))


def gw_params(kind, params, order=None):
    """Map statsmodels' constrained parameter vector to gaugewise names."""
    p = [float(v) for v in params]
    if kind == "level":
        return {"obs_var": p[0], "level_var": p[1]}
    if kind == "lag":
        return dict(zip(LagModel.param_names_gw, p))
    if kind == "trend":
        return dict(zip(TrendModel.param_names_gw, p))
    if kind == "arma":
        ar_p, ma_q = order
        return {"mean": p[0], "ar": p[1:1 + ar_p],
                "ma": p[1 + ar_p:1 + ar_p + ma_q], "var": p[-1]}
    raise ValueError(kind)


def sm_params(kind, gw):
    """Inverse of gw_params: gaugewise dict -> statsmodels vector."""
    if kind == "level":
        return np.array([gw["obs_var"], gw["level_var"]])
    if kind == "lag":
        return np.array([gw[k] for k in LagModel.param_names_gw])
    if kind == "trend":
        return np.array([gw[k] for k in TrendModel.param_names_gw])
    if kind == "arma":
        return np.r_[gw["mean"], gw["ar"], gw["ma"], gw["var"]]
    raise ValueError(kind)


def series_record(res):
    """Per-observation outputs of a filtered statsmodels results object."""
    fr = res.filter_results
    n = res.nobs
    y = np.asarray(res.model.endog)[:, 0]
    missing = np.isnan(y)
    Z = np.asarray(fr.design)
    if Z.ndim == 2:
        Z = Z[:, :, None]
    if Z.shape[2] == 1:
        Z = np.repeat(Z, n, axis=2)
    d = np.asarray(fr.obs_intercept, dtype=float)
    d = d[0] if d.ndim == 2 else np.atleast_1d(d)
    d = np.broadcast_to(d, (n,))
    a = fr.filtered_state
    P = fr.filtered_state_cov
    filt = np.array([Z[0, :, t] @ a[:, t] for t in range(n)]) + d
    filt_var = np.array([Z[0, :, t] @ P[:, :, t] @ Z[0, :, t]
                         for t in range(n)])
    Pp = fr.predicted_state_cov
    pred_sig_var = np.array([Z[0, :, t] @ Pp[:, :, t] @ Z[0, :, t]
                             for t in range(n)])
    pred = np.array(res.forecasts[0], dtype=float)
    pred_var = np.array(res.forecasts_error_cov[0, 0], dtype=float)
    innov = np.array(res.forecasts_error[0], dtype=float)
    innov[missing] = np.nan
    nd = int(res.nobs_diffuse)
    std = innov / np.sqrt(pred_var)
    std[:nd] = np.nan  # not defined in the exact diffuse periods
    out = {
        "llf_obs": res.llf_obs,
        "filtered_signal": filt,
        "filtered_signal_var": filt_var,
        "pred": pred,
        "pred_var": pred_var,
        "pred_signal_var": pred_sig_var,
        "innovations": innov,
        "std_innovations": std,
    }
    if nd > 0:
        fd = res.forecasts_error_diffuse_cov[0, 0, :]
        out["pred_diffuse_var"] = fd
    return out


def eval_record(kind, model, gw, order=None):
    """Filter at fixed (gaugewise) parameters."""
    params = sm_params(kind, gw)
    res = model.filter(params)
    assert abs(res.llf - model.loglike(params)) < 1e-8
    return {
        "params": gw_params(kind, params, order),
        "llf": res.llf,
        "nobs": res.nobs,
        "nobs_diffuse": res.nobs_diffuse,
        "series": series_record(res),
    }, res


def fit_best(model, starts, note=""):
    """Multi-start ML: lbfgs, then Nelder-Mead and BFGS polish; best llf."""
    best = None
    tried = []
    for s in starts:
        s = np.asarray(s, dtype=float)
        stages = []
        try:
            r = model.fit(s, method="lbfgs", maxiter=2000, disp=False,
                          optim_complex_step=False, pgtol=1e-10, factr=10.0)
            stages.append(("lbfgs", r))
            r2 = model.fit(r.params, method="nm", maxiter=20000, disp=False,
                           xtol=1e-12, ftol=1e-14)
            stages.append(("nm", r2))
            r3 = model.fit(r2.params, method="bfgs", maxiter=2000,
                           disp=False, gtol=1e-7)
            stages.append(("bfgs", r3))
        except (np.linalg.LinAlgError, ValueError) as e:  # pragma: no cover
            tried.append({"start": s, "error": str(e)})
            continue
        # the best of the stages (a polish step never loses to its start in
        # exact arithmetic, but keep the best one to be safe)
        name, rb = max(stages, key=lambda st: st[1].llf)
        tried.append({"start": s, "llf": rb.llf, "params": rb.params})
        if best is None or rb.llf > best[1].llf:
            best = (name, rb, stages)
    name, res, stages = best
    score = model.score(res.params)
    converged = {n: bool(r.mle_retvals.get("converged", False))
                 for n, r in stages}
    llfs = [t["llf"] for t in tried if "llf" in t]
    spread = max(llfs) - min(llfs)
    info = {
        "method": ("statsmodels fit(method='lbfgs', maxiter=2000, "
                   "optim_complex_step=False, pgtol=1e-10, factr=10) then "
                   "fit(method='nm', xtol=1e-12, ftol=1e-14) then "
                   "fit(method='bfgs', gtol=1e-7); best llf over %d starts"
                   % len(starts)),
        "best_stage": name,
        "converged": converged,
        "any_stage_converged": any(converged.values()),
        "score_max_abs": float(np.max(np.abs(score))),
        "n_starts": len(starts),
        "llf_spread_over_starts": spread,
    }
    if spread > 1e-6:
        info["local_optima"] = [{"start": t["start"], "llf": t["llf"],
                                 "params": t["params"]} for t in tried]
    print("  fit %s: llf=%.10f stage=%s conv=%s |score|=%.2e spread=%.2e"
          % (note, res.llf, name, converged, info["score_max_abs"], spread))
    return res, info


def fit_record(kind, res, info, order=None):
    return {
        "params": gw_params(kind, res.params, order),
        "params_statsmodels": dict(zip(res.model.param_names,
                                       [float(v) for v in res.params])),
        "llf": res.llf,
        "llf_nondiffuse": float(np.sum(res.llf_obs[int(res.nobs_diffuse):])),
        "aic": res.aic,
        "bic": res.bic,
        "nobs": res.nobs,
        "nobs_effective": res.nobs_effective,
        "nobs_observed": int(np.sum(~np.isnan(res.model.endog[:, 0]))),
        "nobs_diffuse": res.nobs_diffuse,
        "k_diffuse_states": res.k_diffuse_states,
        "df_model": res.df_model,
        "optimizer": info,
        "series": series_record(res),
    }


def nanlist(y):
    return [None if np.isnan(v) else float(v) for v in y]


# ---------------------------------------------------------------------------
# simulators (gaugewise definitions)
# ---------------------------------------------------------------------------

def sim_lag(n, mean, phi, state_var, obs_var, rng):
    x = np.empty(n)
    x[0] = rng.normal(0.0, math.sqrt(state_var / (1 - phi ** 2)))
    w = rng.normal(0.0, math.sqrt(state_var), n)
    e = rng.normal(0.0, math.sqrt(obs_var), n)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + w[t - 1]
    return mean + x + e


def sim_arma(n, mean, ar, ma, var, rng, burn=1000):
    e = rng.normal(0.0, math.sqrt(var), n + burn)
    u = scipy.signal.lfilter(np.r_[1.0, ma], np.r_[1.0, -np.asarray(ar)], e)
    return mean + u[burn:]


def sim_trend(n, level0, slope0, obs_var, level_var, slope_var, rng):
    T = np.array([[1.0, 1.0], [0.0, 1.0]])
    L = np.linalg.cholesky(trend_q(level_var, slope_var))
    a = np.array([level0, slope0])
    y = np.empty(n)
    for t in range(n):
        y[t] = a[0] + math.sqrt(obs_var) * rng.standard_normal()
        a = T @ a + L @ rng.standard_normal(2)
    return y


def lag_implied_ma(phi, state_var, obs_var):
    """MA(1) coefficient and innovation variance of the lag model's ARMA(1,1)
    form: (1 - phi L)(y - mean) = (1 + theta L) a_t."""
    g0 = state_var + (1 + phi ** 2) * obs_var
    g1 = -phi * obs_var
    rho = g1 / g0
    theta = (1 - math.sqrt(1 - 4 * rho ** 2)) / (2 * rho)
    return theta, g1 / theta


# ---------------------------------------------------------------------------
# fixtures
# ---------------------------------------------------------------------------

DK_PARAMS = {"obs_var": 15099.0, "level_var": 1469.1}


def nile():
    data = sm.datasets.nile.load_pandas().data
    years = data["year"].astype(int).to_numpy()
    flow = data["volume"].astype(float).to_numpy()
    assert len(flow) == 100 and years[0] == 1871 and years[-1] == 1970
    with open(os.path.join(HERE, "nile.csv"), "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["year", "flow"])
        for yr, v in zip(years, flow):
            w.writerow([yr, int(v) if v == int(v) else v])
    print("wrote tests/reference/nile.csv")
    return years, flow


def level_starts(y):
    v = np.nanvar(y)
    return [None, [v / 2, v / 20], [v / 10, v / 10], [v, v / 100],
            [DK_PARAMS["obs_var"], DK_PARAMS["level_var"]]]


def fit_level(y, note):
    m = UnobservedComponents(y, "local level", use_exact_diffuse=True)
    starts = [m.start_params if s is None else s for s in level_starts(y)]
    res, info = fit_best(m, starts, note)
    return m, res, info


def make_nile(years, flow):
    print("nile_level.json")
    m, res, info = fit_level(flow, "nile level")
    rec = fit_record("level", res, info)
    lb = res.test_serial_correlation("ljungbox", lags=[9])
    het = res.test_heteroskedasticity("breakvar")
    nd = int(res.nobs_diffuse)
    rec["diagnostics"] = {
        "ljungbox_lags": [9],
        "ljungbox_stat": lb[0, 0, :],
        "ljungbox_pvalue": lb[0, 1, :],
        "ljungbox_note": ("results.test_serial_correlation('ljungbox', "
                          "lags=[9]): Ljung-Box on std_innovations[%d:] "
                          "(diffuse periods dropped), model_df=0" % nd),
        "heteroskedasticity_h": int(round((res.nobs - nd) / 3)),
        "heteroskedasticity_stat": het[0, 0],
        "heteroskedasticity_pvalue": het[0, 1],
        "heteroskedasticity_note": (
            "results.test_heteroskedasticity('breakvar'): sum of squared "
            "std_innovations over the last h divided by the first h of "
            "std_innovations[%d:], h = round((nobs - nobs_diffuse)/3); "
            "two-sided F(h,h) p-value" % nd),
        "published": {"Q(9)": 8.84, "H(33)": 0.61,
                      "source": DK + ", section 2.12"},
    }
    fixed, _ = eval_record("level", m, DK_PARAMS)
    write_json("nile_level.json", {
        "source": (
            "%s UnobservedComponents(flow, 'local level', "
            "use_exact_diffuse=True) fitted by maximum likelihood (multi-start "
            "lbfgs + Nelder-Mead + BFGS polish, best llf) on the Nile annual "
            "flow (statsmodels.datasets.nile, 1871-1970, = nile.csv); "
            "'fixed' is the same model filtered at the published ML estimates "
            "sigma2_eps=15099, sigma2_eta=1469.1 of %s, section 2.10; "
            "diagnostics vs section 2.12 (Q(9)=8.84, H(33)=0.61)." % (SM, DK)),
        "model": "level",
        "dt": 1.0,
        "init": "exact_diffuse",
        "data": {"year": years, "y": flow},
        "published": {"obs_var": 15099.0, "level_var": 1469.1,
                      "source": DK + ", section 2.10"},
        "fit": rec,
        "fixed": fixed,
    })

    print("nile_missing.json")
    ym = flow.copy()
    ym[20:40] = np.nan
    ym[60:80] = np.nan
    mm, resm, infom = fit_level(ym, "nile missing")
    fixedm, _ = eval_record("level", mm, DK_PARAMS)
    write_json("nile_missing.json", {
        "source": (
            "%s UnobservedComponents(flow, 'local level', "
            "use_exact_diffuse=True) on the Nile flow with observations "
            "21-40 and 61-80 (1-based; 0-based 20..39 and 60..79) set to NaN "
            "(the missing-data example of %s, section 2.7 / fig. 2.5); "
            "'fixed' = filter at sigma2_eps=15099, sigma2_eta=1469.1 "
            "(section 2.10), 'fit' = ML fit on the gappy series." % (SM, DK)),
        "model": "level",
        "dt": 1.0,
        "init": "exact_diffuse",
        "missing_index0": [i for i in range(100) if np.isnan(ym[i])],
        "data": {"year": years, "y": nanlist(ym)},
        "fixed": fixedm,
        "fit": fit_record("level", resm, infom),
    })


def make_lag_arma11():
    print("lag_arma11.json")
    true = {"mean": 50.0, "phi": 0.9, "state_var": 1.0, "obs_var": 1.0}
    rng = np.random.default_rng(7)
    y = sim_lag(2000, true["mean"], true["phi"], true["state_var"],
                true["obs_var"], rng)

    ml = LagModel(y)
    s0 = ml.start_params
    lag_starts = [s0, [np.mean(y), 0.5, 1.0, 1.0], [np.mean(y), 0.99, 0.1, 2.0],
                  [np.mean(y), 0.8, 2.0, 0.1]]
    rl, il = fit_best(ml, lag_starts, "lag")

    ma = SARIMAX(y, exog=np.ones(len(y)), order=(1, 0, 1), trend="n")
    arma_starts = [ma.start_params, [np.mean(y), 0.5, 0.0, np.var(y)],
                   [np.mean(y), 0.95, -0.5, 2.0], [np.mean(y), 0.2, 0.5, 5.0]]
    ra, ia = fit_best(ma, arma_starts, "arma11")

    theta0, s2a0 = lag_implied_ma(0.9, 1.0, 1.0)
    assert abs(theta0 - (-0.3623334415)) < 1e-10, theta0
    assert abs(s2a0 - 2.4838999027) < 1e-10, s2a0
    fl, _ = eval_record("lag", ml, true)
    arma_true = {"mean": 50.0, "ar": [0.9], "ma": [theta0], "var": s2a0}
    fa, _ = eval_record("arma", ma, arma_true, (1, 1))
    diff = fl["llf"] - fa["llf"]
    print("  fixed llf lag=%.12f arma=%.12f diff=%.2e" % (fl["llf"], fa["llf"],
                                                          diff))
    assert abs(diff) < 1e-6

    p = rl.params
    theta, s2a = lag_implied_ma(p[1], p[2], p[3])
    implied = {"mean": p[0], "ar": [p[1]], "ma": [theta], "var": s2a}
    fai, _ = eval_record("arma", ma, implied, (1, 1))
    write_json("lag_arma11.json", {
        "source": (
            "%s: y simulated from gaugewise's lag model (mean=50, phi=0.9, "
            "state_var=1, obs_var=1, stationary x_1, n=2000, "
            "numpy.random.default_rng(7)); 'lag_fit' = custom "
            "statsmodels.tsa.statespace.mlemodel.MLEModel subclass (1 state, "
            "obs_intercept=mean, initialize_stationary(), phi=u/sqrt(1+u^2), "
            "variances=u^2) fitted by ML; 'arma_fit' = SARIMAX(y, "
            "exog=ones, order=(1,0,1), trend='n') (exact likelihood, "
            "stationary init) fitted by ML; 'lag_fixed'/'arma_fixed' = "
            "llf at the true lag parameters and at the equivalent ARMA(1,1) "
            "(theta, sigma2_a from gamma0=q+(1+phi^2)r, gamma1=-phi r, "
            "rho=gamma1/gamma0, theta=(1-sqrt(1-4rho^2))/(2rho), "
            "sigma2_a=gamma1/theta); they are the same Gaussian likelihood." %
            SM),
        "model": ["lag", "arma"],
        "dt": 1.0,
        "seed": 7,
        "true": true,
        "data": {"y": y},
        "lag_fit": fit_record("lag", rl, il),
        "arma_fit": fit_record("arma", ra, ia, (1, 1)),
        "lag_fit_implied_arma": {
            "params": implied,
            "llf": fai["llf"],
            "note": ("ARMA(1,1) parameters implied by lag_fit.params and the "
                     "SARIMAX llf there; equals lag_fit.llf"),
        },
        "implied_ma_check": {"phi": 0.9, "state_var": 1.0, "obs_var": 1.0,
                             "theta": theta0, "sigma2_a": s2a0},
        "lag_fixed": fl,
        "arma_fixed": fa,
        "fixed_llf_difference": diff,
    })
    assert abs(fai["llf"] - rl.llf) < 1e-6


ARMA_CASES = [
    # name, order, true params, seed
    ("arma10", (1, 0), {"mean": 10.0, "ar": [0.7], "ma": [], "var": 2.0}, 101),
    ("arma11", (1, 1), {"mean": -3.0, "ar": [0.6], "ma": [0.3], "var": 1.0},
     102),
    ("arma21", (2, 1), {"mean": 0.0, "ar": [0.5, -0.3], "ma": [0.4],
                        "var": 1.5}, 103),
    ("arma02", (0, 2), {"mean": 5.0, "ar": [], "ma": [0.5, 0.2], "var": 1.0},
     104),
    ("arma33", (3, 3), {"mean": 1.0, "ar": [0.8, -0.5, 0.3],
                        "ma": [-0.4, 0.4, 0.3], "var": 1.0}, 105),
]


def arma_starts(model, y, order):
    p, q = order
    s = [model.start_params]
    m, v = np.nanmean(y), np.nanvar(y)
    s.append(np.r_[m, [0.1] * p, [0.1] * q, v / 2])
    s.append(np.r_[m, [0.0] * p, [0.0] * q, v])
    s.append(np.r_[m, [0.5 / (i + 1) for i in range(p)],
                   [-0.3 / (i + 1) for i in range(q)], v / 3])
    return s


def arma_entry(name, order, true, seed, y, missing=None):
    model = SARIMAX(y, exog=np.ones(len(y)), order=(order[0], 0, order[1]),
                    trend="n")
    res, info = fit_best(model, arma_starts(model, y, order), name)
    fixed, _ = eval_record("arma", model, true, order)
    e = {
        "order": list(order),
        "seed": seed,
        "true": true,
        "data": {"y": nanlist(y)},
        "fit": fit_record("arma", res, info, order),
        "fixed": fixed,
    }
    if missing is not None:
        e["missing_index0"] = missing
    return e


def make_arma():
    print("arma.json")
    cases = {}
    ys = {}
    for name, order, true, seed in ARMA_CASES:
        rng = np.random.default_rng(seed)
        y = sim_arma(500, true["mean"], true["ar"], true["ma"], true["var"],
                     rng)
        ys[name] = y
        cases[name] = arma_entry(name, order, true, seed, y)
    # arma(1,1) with 10% missing at seeded positions
    name, order, true, seed = ARMA_CASES[1]
    rng = np.random.default_rng(106)
    miss = np.sort(rng.choice(500, size=50, replace=False))
    ym = ys[name].copy()
    ym[miss] = np.nan
    cases["arma11_missing"] = arma_entry("arma11_missing", order, true, seed,
                                         ym, [int(i) for i in miss])
    cases["arma11_missing"]["missing_seed"] = 106
    write_json("arma.json", {
        "source": (
            "%s SARIMAX(y, exog=numpy.ones(n), order=(p,0,q), trend='n') "
            "(exog coefficient = mean; default enforce_stationarity/"
            "enforce_invertibility; default stationary initialisation, exact "
            "likelihood) fitted by ML (multi-start lbfgs + Nelder-Mead + BFGS "
            "polish, best llf); 'fixed' = model.filter(true params). Series "
            "simulated with numpy.random.default_rng(seed): "
            "e~N(0,var), u = scipy.signal.lfilter([1,ma...],[1,-ar...],e), "
            "first 1000 values dropped, y = mean + u, n=500. "
            "arma11_missing = the arma11 series with 50 positions "
            "(default_rng(106).choice(500, 50, replace=False)) set to NaN. "
            "Sign convention: "
            "u_t = sum ar_i u_{t-i} + e_t + sum ma_j e_{t-j}." % SM),
        "model": "arma",
        "dt": 1.0,
        "cases": cases,
    })
    return ys


def make_trend():
    print("trend.json")
    true = {"obs_var": 4.0, "level_var": 0.5, "slope_var": 0.01}
    rng = np.random.default_rng(11)
    y = sim_trend(300, 100.0, 0.2, true["obs_var"], true["level_var"],
                  true["slope_var"], rng)
    m = TrendModel(y)
    starts = [m.start_params, [4.0, 0.5, 0.01], [1.0, 1.0, 0.1],
              [10.0, 0.1, 0.001], [np.var(np.diff(y)), 0.01, 0.01]]
    res, info = fit_best(m, starts, "trend")
    fixed, rf = eval_record("trend", m, true)
    assert rf.nobs_diffuse == 2 and rf.k_diffuse_states == 2

    rng_m = np.random.default_rng(12)
    miss = np.sort(rng_m.choice(np.arange(2, 300), size=15, replace=False))
    ym = y.copy()
    ym[miss] = np.nan
    mm = TrendModel(ym)
    fixedm, _ = eval_record("trend", mm, true)
    write_json("trend.json", {
        "source": (
            "%s custom statsmodels.tsa.statespace.mlemodel.MLEModel "
            "subclass for gaugewise's trend model at dt=1: state (level, "
            "slope), T=[[1,1],[0,1]], Q=level_var*[[1,0],[0,0]]+slope_var*"
            "[[1/3,1/2],[1/2,1]], Z=[1,0], H=obs_var, "
            "ssm.initialize_diffuse() (exact diffuse on both states), "
            "variances = u^2; fitted by ML (multi-start lbfgs + Nelder-Mead + "
            "BFGS polish, best llf); 'fixed' = filter at the true params. "
            "Data simulated with numpy.random.default_rng(11): n=300, "
            "initial level 100, slope 0.2, obs_var=4, level_var=0.5, "
            "slope_var=0.01 (state noise drawn as chol(Q) @ N(0,I2)). "
            "'missing' = same series with 15 positions "
            "(default_rng(12).choice(arange(2,300), 15, replace=False)) "
            "set to NaN, filtered at the true params." % SM),
        "model": "trend",
        "dt": 1.0,
        "init": "exact_diffuse",
        "seed": 11,
        "true": true,
        "initial_state": {"level": 100.0, "slope": 0.2},
        "data": {"y": y},
        "fit": fit_record("trend", res, info),
        "fixed": fixed,
        "missing": {
            "missing_index0": [int(i) for i in miss],
            "missing_seed": 12,
            "data": {"y": nanlist(ym)},
            "fixed": fixedm,
        },
    })


def acf_entry(x):
    a, a_ci = acf(x, nlags=20, fft=False, alpha=0.05)
    p, p_ci = pacf(x, nlags=20, method="ldb", alpha=0.05)
    pw, pw_ci = pacf(x, nlags=20, method="ywm", alpha=0.05)
    assert np.allclose(p, pw, rtol=0, atol=1e-10)
    out = {
        "n": len(x),
        "acf": a, "acf_confint": a_ci,
        "pacf_ldb": p, "pacf_ldb_confint": p_ci,
        "pacf_ywm": pw, "pacf_ywm_confint": pw_ci,
        "pacf_ldb_ywm_max_abs_diff": float(np.max(np.abs(p - pw))),
    }
    for df in (0, 2):
        lb = acorr_ljungbox(x, lags=[10, 20], model_df=df)
        out["ljungbox_model_df_%d" % df] = {
            "lags": [10, 20],
            "model_df": df,
            "lb_stat": lb["lb_stat"].to_numpy(),
            "lb_pvalue": lb["lb_pvalue"].to_numpy(),
        }
    return out


def make_acf(flow, ys):
    print("acf.json")
    write_json("acf.json", {
        "source": (
            "%s statsmodels.tsa.stattools.acf(x, nlags=20, fft=False, "
            "alpha=0.05) (values and confint; Bartlett intervals), "
            "pacf(x, nlags=20, method='ldb', alpha=0.05) and "
            "pacf(x, nlags=20, method='ywm', alpha=0.05) (they agree; "
            "intervals +-1.96/sqrt(n)), statsmodels.stats.diagnostic."
            "acorr_ljungbox(x, lags=[10, 20], model_df=0 and model_df=2). "
            "Series: arma.json cases.arma11.data.y and the Nile flow "
            "(nile.csv). Index 0 of every acf/pacf array is lag 0; confint "
            "rows are [lower, upper]." % SM),
        "series": {
            "arma11": {"data": {"y": ys["arma11"]}, **acf_entry(ys["arma11"])},
            "nile": {"data": {"y": flow}, **acf_entry(flow)},
        },
    })


def make_vessel():
    print("vessel_temperature.csv")
    rng = np.random.default_rng(2026)
    t0 = int(datetime.datetime(2026, 3, 2, tzinfo=datetime.timezone.utc)
             .timestamp())
    n_total, gap_len = 2040, 40
    jitter = rng.integers(-2, 3, n_total)  # -2..2 s
    jitter[0] = 0
    times = t0 + 10 * np.arange(n_total) + jitter
    assert np.all(np.diff(times) > 0)
    mean, tau, sd, obs_sd = 72.5, 300.0, 1.5, 0.2
    x = np.empty(n_total)
    x[0] = rng.normal(0.0, sd)
    for i in range(1, n_total):
        phi = math.exp(-(times[i] - times[i - 1]) / tau)
        x[i] = phi * x[i - 1] + rng.normal(0.0, sd * math.sqrt(1 - phi ** 2))
    vals = mean + x + rng.normal(0.0, obs_sd, n_total)
    gap_start = int(rng.integers(600, 1400))
    keep = np.ones(n_total, bool)
    keep[gap_start:gap_start + gap_len] = False
    empty = rng.random(n_total) < 0.02
    os.makedirs(EXAMPLES, exist_ok=True)
    path = os.path.join(EXAMPLES, "vessel_temperature.csv")
    n_rows = n_empty = 0
    with open(path, "w", newline="") as f:
        f.write("time,TT-101\n")
        for i in range(n_total):
            if not keep[i]:
                continue
            n_rows += 1
            if empty[i]:
                n_empty += 1
                f.write("%d,\n" % times[i])
            else:
                f.write("%d,%.2f\n" % (times[i], vals[i]))
    assert n_rows == 2000
    print("wrote config/examples/vessel_temperature.csv (%d rows, %d empty, "
          "gap of %d rows after row %d)" % (n_rows, n_empty, gap_len,
                                            gap_start))
    return {"rows": n_rows, "empty": n_empty, "gap_start_index0": gap_start,
            "gap_len": gap_len}


def main():
    print(SM, "numpy", np.__version__, "scipy", scipy.__version__)
    years, flow = nile()
    make_nile(years, flow)
    make_lag_arma11()
    ys = make_arma()
    make_trend()
    make_acf(flow, ys)
    make_vessel()


if __name__ == "__main__":
    main()
