"""The statsmodels side of cairn's fit benchmark (tests/bench/fits.rs): reads one synthetic
trial written by the bench, times statsmodels' fit of every model family on the same design
cairn fits, and prints one JSON document (times, estimates, iterations, library versions) on
standard output. It owns no data generation and no comparison: the Rust bench does both.
Timings are not reference values and nothing here is stored under tests/reference/.

Usage: python3 tests/bench/statsmodels_side.py DATA.csv --sites K --runs R [--skip a,b]

The design is rebuilt exactly as the bench builds cairn's: intercept, indicators of arms 1
and 2 (arm 0 is the reference), the baseline covariate, and indicators of sites 1..K-1
(site 0 is the reference); the ordinal model drops the intercept (its cut-points take that
role). Each timed call includes building the statsmodels model object from the numpy arrays,
fitting it, and reading the estimates and standard errors, so that any work statsmodels
defers until the standard errors are asked for is counted too.

Fits (what is compared with what):
- linear: OLS(...).fit(method="qr") (Householder QR, as cairn's least squares).
- binomial, poisson: GLM(...).fit() by IRLS with statsmodels' default convergence rule
  (absolute change of the deviance below 1e-8); poisson with exposure= (log offset).
- negative-binomial: the discrete NegativeBinomial model (NB2, loglike_method="nb2") with
  exposure=, maximising the likelihood jointly in (beta, alpha) by Newton's method from
  statsmodels' own Poisson start; alpha = 1/theta. (GLM's NegativeBinomial family needs alpha
  fixed, so it would not estimate what cairn estimates.)
- cumulative: OrderedModel(..., distr="logit") with the method given by --ordinal-method
  (BFGS: the fastest that converged in a pilot at n = 1000 — bfgs 1.2 s, lbfgs 1.6 s,
  newton 273 s, whose Hessian is numerical; OrderedModel's score is numerical too).
- multinomial: MNLogit(...).fit(method="newton").
The thread count of the BLAS is whatever the caller set (the bench sets OPENBLAS_NUM_THREADS=1
and friends so that statsmodels, like cairn, uses one core).
"""

import argparse
import json
import platform
import statistics
import sys
import time
import warnings

import numpy as np
import pandas as pd
import scipy
import statsmodels
from statsmodels.discrete.discrete_model import MNLogit, NegativeBinomial
from statsmodels.genmod import families
from statsmodels.genmod.generalized_linear_model import GLM
from statsmodels.miscmodels.ordinal_model import OrderedModel
from statsmodels.regression.linear_model import OLS

MODELS = ["linear", "binomial", "poisson", "negative-binomial", "cumulative", "multinomial"]


def design(data, n_sites, intercept):
    """Columns in cairn's order (see the module docstring)."""
    n = len(data)
    arm = data["arm"].to_numpy()
    site = data["site"].to_numpy()
    columns = []
    if intercept:
        columns.append(np.ones(n))
    columns.append((arm == 1).astype(float))
    columns.append((arm == 2).astype(float))
    columns.append(data["baseline"].to_numpy(dtype=float))
    for k in range(1, n_sites):
        columns.append((site == k).astype(float))
    return np.asfortranarray(np.column_stack(columns))


def timed(function, runs):
    """Runs function() `runs` times; returns the wall times, the CPU times of the process
    (time.process_time: not counting time spent waiting for a core on a shared machine) and
    the last result."""
    times = []
    cpu_times = []
    result = None
    for _ in range(runs):
        cpu_start = time.process_time()
        start = time.perf_counter()
        result = function()
        times.append(time.perf_counter() - start)
        cpu_times.append(time.process_time() - cpu_start)
    return times, cpu_times, result


def fit_linear(X, y):
    res = OLS(y, X).fit(method="qr")
    return {"estimates": [float(v) for v in res.params], "standard_errors": [float(v) for v in res.bse],
            "iterations": 1, "converged": True, "method": "OLS, method='qr'"}


def fit_glm(X, y, family, exposure=None):
    res = GLM(y, X, family=family, exposure=exposure).fit()
    return {"estimates": [float(v) for v in res.params], "standard_errors": [float(v) for v in res.bse],
            "iterations": int(res.fit_history["iteration"]), "converged": bool(res.converged),
            "method": "GLM IRLS (default tol=1e-8 on the deviance)"}


def fit_negative_binomial(X, y, exposure):
    res = NegativeBinomial(y, X, loglike_method="nb2", exposure=exposure).fit(
        method="newton", maxiter=100, disp=0)
    params = [float(v) for v in res.params]
    alpha = params[-1]
    return {"estimates": params[:-1] + [1.0 / alpha], "standard_errors": [float(v) for v in res.bse],
            "iterations": int(res.mle_retvals.get("iterations", -1)),
            "converged": bool(res.mle_retvals.get("converged", False)),
            "method": "discrete NegativeBinomial nb2, method='newton' (joint MLE of beta and alpha)"}


def fit_cumulative(X, y, method):
    model = OrderedModel(y, X, distr="logit")
    res = model.fit(method=method, maxiter=2000, disp=False)
    params = np.asarray(res.params, dtype=float)
    p = X.shape[1]
    beta = params[:p]
    increments = params[p:]
    # statsmodels stores the first cut-point and then log increments; cairn reports cut-points.
    cut_points = np.cumsum(np.concatenate([[increments[0]], np.exp(increments[1:])]))
    bse = [float(v) for v in res.bse]
    return {"estimates": [float(v) for v in cut_points] + [float(v) for v in beta],
            "standard_errors": bse,
            # BFGS reports gradient evaluations rather than iterations.
            "iterations": int(res.mle_retvals.get("iterations", res.mle_retvals.get("gcalls", -1))),
            "converged": bool(res.mle_retvals.get("converged", False)),
            "method": f"OrderedModel logit, method='{method}'"}


def fit_multinomial(X, y):
    res = MNLogit(y, X).fit(method="newton", maxiter=100, disp=0)
    params = np.asarray(res.params, dtype=float)  # p x (K-1), reference category 0
    bse = np.asarray(res.bse, dtype=float)
    return {"estimates": [float(v) for v in params.T.reshape(-1)],
            "standard_errors": [float(v) for v in bse.T.reshape(-1)],
            "iterations": int(res.mle_retvals.get("iterations", -1)),
            "converged": bool(res.mle_retvals.get("converged", False)),
            "method": "MNLogit, method='newton'"}


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("data")
    parser.add_argument("--sites", type=int, required=True)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--skip", default="")
    parser.add_argument("--only", default="")
    parser.add_argument("--ordinal-method", default="bfgs")
    parser.add_argument("--runs-cumulative", type=int, default=None)
    args = parser.parse_args()
    skip = set(filter(None, args.skip.split(",")))
    only = set(filter(None, args.only.split(",")))

    data = pd.read_csv(args.data)
    X = design(data, args.sites, intercept=True)
    X_no_intercept = np.asfortranarray(X[:, 1:])
    exposure = data["exposure"].to_numpy(dtype=float)
    jobs = {
        "linear": lambda: fit_linear(X, data["linear"].to_numpy(dtype=float)),
        "binomial": lambda: fit_glm(X, data["binary"].to_numpy(dtype=float), families.Binomial()),
        "poisson": lambda: fit_glm(X, data["count"].to_numpy(dtype=float), families.Poisson(),
                                   exposure),
        "negative-binomial": lambda: fit_negative_binomial(
            X, data["nb_count"].to_numpy(dtype=float), exposure),
        "cumulative": lambda: fit_cumulative(X_no_intercept, data["ordinal"].to_numpy(dtype=int),
                                             args.ordinal_method),
        "multinomial": lambda: fit_multinomial(X, data["nominal"].to_numpy(dtype=int)),
    }
    out = {"versions": {"python": platform.python_version(), "statsmodels": statsmodels.__version__,
                        "scipy": scipy.__version__, "numpy": np.__version__,
                        "pandas": pd.__version__},
           "n": int(len(data)), "runs": args.runs, "fits": {}}
    for name in MODELS:
        if name in skip or (only and name not in only):
            continue
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            runs = args.runs_cumulative if name == "cumulative" and args.runs_cumulative else args.runs
            times, cpu_times, result = timed(jobs[name], runs)
        result["times"] = times
        result["cpu_times"] = cpu_times
        result["median_cpu"] = statistics.median(cpu_times)
        result["runs"] = len(times)
        result["median"] = statistics.median(times)
        result["warnings"] = sorted({f"{w.category.__name__}: {w.message}" for w in caught})
        out["fits"][name] = result
        print(f"statsmodels {name} n={len(data)}: median CPU {result['median_cpu']:.4g} s, "
              f"wall {result['median']:.4g} s", file=sys.stderr)
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
