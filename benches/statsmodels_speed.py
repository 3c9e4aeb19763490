#!/usr/bin/env python3
"""Side-by-side speed of `gaugewise fit` and statsmodels fitting the same four models on the same data.

Target (issue): `gaugewise fit` with the default candidates (level, lag, trend, arma(1,1)) on 10,000 samples runs
in under 1 s on one core, and at least 20 times faster than statsmodels fitting the same models on the same data.

What it does, in one run:
1. Simulates a `lag` process (AR(1) around a mean plus measurement noise, 10 s interval; about 1% of values
   missing) with a seeded numpy generator and writes it as `time,value` CSV (missing = empty cell) to a temporary
   directory.
2. Times `target/release/gaugewise fit --input data.csv --format json` as a whole process (start-up, CSV read,
   the four fits, JSON out): one untimed warm-up, then the median of --repeats runs.
3. Times statsmodels fitting the equivalent models on the same values (model construction plus `fit()` with
   statsmodels' defaults, i.e. L-BFGS), the median of --sm-repeats runs per model:
     level     -> UnobservedComponents(y, 'llevel', use_exact_diffuse=True)
     lag       -> SARIMAX(y, order=(1,0,0), trend='c', measurement_error=True)
     trend     -> UnobservedComponents(y, 'lltrend', use_exact_diffuse=True)
     arma(1,1) -> SARIMAX(y, order=(1,0,1), trend='c')
   (gaugewise's level and trend use the exact diffuse likelihood, hence use_exact_diffuse; SARIMAX's intercept
   `c` is gaugewise's mean in another parameterisation, so the maximised log-likelihoods are comparable.)
4. Prints a table: per-model statsmodels time, converged flag and log-likelihood next to gaugewise's, the
   statsmodels total, the gaugewise total and the ratio statsmodels / gaugewise.

Both sides run on one core: the process pins itself to one CPU (the gaugewise child inherits it) and the BLAS
thread pools are limited to one thread. Numbers on a shared machine are noisy; compare the ratio, which is measured
in one run.

Set-up, from the repository root (the same environment the reference fixtures use):

    python3 -m venv .venv && .venv/bin/pip install -r tests/reference/requirements.txt
    cargo build --release
    .venv/bin/python benches/statsmodels_speed.py

Options: --n, --missing, --seed, --repeats (gaugewise), --sm-repeats (statsmodels), --binary, --keep DIR (keep the
CSV), --no-pin (use every core), --json FILE (write the figures as JSON).
"""

import os

# Before numpy loads: one BLAS thread, so statsmodels runs on one core like gaugewise.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "VECLIB_MAXIMUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import json
import platform
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent

# The simulated process: the same constants as benches/common/mod.rs (the Rust benches use their own generator,
# so the values differ but the process is the same).
MEAN, PHI, STATE_VAR, OBS_VAR, INTERVAL = 72.0, 0.95, 0.1, 0.05, 10.0

MODELS = ["level", "lag", "trend", "arma(1,1)"]


def simulate(n, missing, seed):
    rng = np.random.default_rng(seed)
    x = np.empty(n)
    x[0] = rng.normal() * np.sqrt(STATE_VAR / (1.0 - PHI * PHI))
    w = rng.normal(size=n) * np.sqrt(STATE_VAR)
    for i in range(1, n):
        x[i] = PHI * x[i - 1] + w[i]
    y = MEAN + x + rng.normal(size=n) * np.sqrt(OBS_VAR)
    y[rng.random(n) < missing] = np.nan
    times = np.arange(n) * INTERVAL
    return times, y


def write_csv(path, times, y):
    with open(path, "w") as f:
        f.write("time,value\n")
        for t, v in zip(times, y):
            f.write(f"{t:.0f},{'' if np.isnan(v) else repr(float(v))}\n")


def time_gaugewise(binary, csv_path, repeats):
    cmd = [str(binary), "fit", "--input", str(csv_path), "--format", "json"]
    times, out = [], None
    for i in range(repeats + 1):
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True)
        elapsed = time.perf_counter() - t0
        if proc.returncode != 0:
            raise RuntimeError(f"{' '.join(cmd)} exited {proc.returncode}: {proc.stderr.strip()}")
        if i > 0:  # the first run only warms the page cache
            times.append(elapsed)
        out = proc.stdout
    try:
        doc = json.loads(out)
    except json.JSONDecodeError as e:
        raise RuntimeError(f"gaugewise fit did not print JSON ({e}): {out[:200]!r}")
    return times, doc


def gaugewise_logliks(doc):
    """{model: loglik} from the fit JSON (`models[].model`, `models[].loglik`); empty if the layout differs."""
    found = {}
    for m in doc.get("models", []) if isinstance(doc, dict) else []:
        if isinstance(m, dict) and "model" in m:
            found[m["model"]] = m.get("loglik")
    return found


def statsmodels_fits(y):
    from statsmodels.tsa.statespace.sarimax import SARIMAX
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    return {
        "level": lambda: UnobservedComponents(y, "llevel", use_exact_diffuse=True),
        "lag": lambda: SARIMAX(y, order=(1, 0, 0), trend="c", measurement_error=True),
        "trend": lambda: UnobservedComponents(y, "lltrend", use_exact_diffuse=True),
        "arma(1,1)": lambda: SARIMAX(y, order=(1, 0, 1), trend="c"),
    }


def time_statsmodels(y, repeats):
    builders = statsmodels_fits(y)
    results = {}
    for name in MODELS:
        times, res = [], None
        for _ in range(repeats):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # convergence and start-parameter warnings; recorded below
                t0 = time.perf_counter()
                res = builders[name]().fit(disp=False)
                times.append(time.perf_counter() - t0)
        results[name] = {
            "times": times,
            "median": statistics.median(times),
            "converged": bool(res.mle_retvals.get("converged", False)),
            "iterations": res.mle_retvals.get("iterations"),
            "llf": float(res.llf),
        }
    return results


def pin_to_one_cpu():
    if not hasattr(os, "sched_setaffinity"):
        return None
    cpu = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {cpu})
    return cpu


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--missing", type=float, default=0.01)
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--repeats", type=int, default=7, help="timed gaugewise runs (after one warm-up)")
    ap.add_argument("--sm-repeats", type=int, default=3, help="timed statsmodels fits per model")
    ap.add_argument("--binary", type=Path, default=REPO / "target" / "release" / "gaugewise")
    ap.add_argument("--keep", type=Path, help="write the CSV into this directory and keep it")
    ap.add_argument("--no-pin", action="store_true", help="do not pin to one CPU")
    ap.add_argument("--json", type=Path, help="also write the figures to this file")
    args = ap.parse_args()

    cpu = None if args.no_pin else pin_to_one_cpu()
    import statsmodels

    print(
        f"python {platform.python_version()}, numpy {np.__version__}, statsmodels {statsmodels.__version__}; "
        f"{os.cpu_count()} CPUs, " + (f"pinned to CPU {cpu}" if cpu is not None else "not pinned")
    )
    times, y = simulate(args.n, args.missing, args.seed)
    print(f"data: n = {args.n}, {int(np.isnan(y).sum())} missing, seed {args.seed}")

    with tempfile.TemporaryDirectory() as tmp:
        directory = args.keep if args.keep else Path(tmp)
        directory.mkdir(parents=True, exist_ok=True)
        csv_path = directory / "data.csv"
        write_csv(csv_path, times, y)

        gw_error, gw_times, gw_doc = None, None, {}
        if not args.binary.exists():
            gw_error = f"{args.binary} not found (run `cargo build --release` first)"
        else:
            try:
                gw_times, gw_doc = time_gaugewise(args.binary, csv_path, args.repeats)
            except RuntimeError as e:
                gw_error = str(e)

    sm = time_statsmodels(y, args.sm_repeats)
    gw_llf = gaugewise_logliks(gw_doc)

    print()
    print(f"{'model':<10} {'statsmodels s':>14} {'converged':>9} {'iters':>6} {'sm loglik':>14} {'gw loglik':>14}")
    for name in MODELS:
        r = sm[name]
        g = gw_llf.get(name)
        g_text = f"{g:14.3f}" if isinstance(g, (int, float)) else f"{'-':>14}"
        print(
            f"{name:<10} {r['median']:14.3f} {str(r['converged']):>9} {str(r['iterations']):>6} "
            f"{r['llf']:14.3f} {g_text}"
        )
    sm_total = sum(sm[name]["median"] for name in MODELS)
    print(f"{'statsmodels total (sum of medians)':<40} {sm_total:8.3f} s")
    figures = {
        "n": args.n,
        "missing": int(np.isnan(y).sum()),
        "statsmodels": sm,
        "statsmodels_total_s": sm_total,
    }
    if gw_error:
        print(f"gaugewise: not measured: {gw_error}")
        status = 1
    else:
        gw = statistics.median(gw_times)
        ratio = sm_total / gw
        print(
            f"{'gaugewise fit, whole process (median)':<40} {gw:8.3f} s "
            f"(min {min(gw_times):.3f}, max {max(gw_times):.3f}, {len(gw_times)} runs)"
        )
        print(f"{'ratio statsmodels / gaugewise':<40} {ratio:8.1f} x   (targets: gaugewise < 1 s, ratio >= 20)")
        figures.update({"gaugewise_times_s": gw_times, "gaugewise_median_s": gw, "ratio": ratio})
        status = 0
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n")
    return status


if __name__ == "__main__":
    sys.exit(main())
