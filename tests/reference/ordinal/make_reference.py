"""Cross-check references from statsmodels for cairn's multinomial and ordinal engines.

Run from this folder after make_reference.R (it reads the *_data.csv files that script wrote):
    python3 make_reference.py
Writes reference_values_statsmodels.csv (case,quantity,index,value; values as repr) and appends
the library versions to versions_statsmodels.txt.

MNLogit: baseline-category logit with the first category as reference, design with an
intercept column in front; frequency weights are applied by repeating rows. Newton with a tight
tolerance, SEs (bse) from the inverse Hessian.
OrderedModel: cumulative logit/probit; statsmodels parametrises the cut-points as the first one
followed by log increments, so they are converted back to cut-points here
(theta_j = theta_0 + sum exp(increments)). Its model is P(Y <= j) = F(theta_j - x'beta), the same
sign convention as cairn.
"""
import csv
import sys

import numpy as np
import scipy
import statsmodels
from statsmodels.discrete.discrete_model import MNLogit
from statsmodels.miscmodels.ordinal_model import OrderedModel


def load(name):
    with open(f"{name}_data.csv") as handle:
        rows = list(csv.reader(handle))
    header, body = rows[0], rows[1:]
    response = np.array([int(r[0]) for r in body])
    weights = np.array([float(r[1]) for r in body])
    design = np.array([[float(v) for v in r[2:]] for r in body])
    # Frequency weights here are whole numbers; expand rows so every library sees the same data.
    repeats = weights.astype(int)
    assert np.all(repeats == weights)
    return np.repeat(response, repeats), np.repeat(design, repeats, axis=0), header[2:]


out = []


def add(case, quantity, values):
    for index, value in enumerate(np.atleast_1d(values)):
        out.append((case, quantity, index, repr(float(value))))


for name in ["housing", "warpbreaks"]:
    response, design, _ = load(name)
    x = np.column_stack([np.ones(len(response)), design])
    fit = MNLogit(response, x).fit(method="newton", maxiter=200, tol=1e-14, disp=False)
    # params is p x (K-1); cairn's order is category-major (each non-reference category's p).
    add(f"{name}_mnlogit", "coefficient", np.asarray(fit.params).T.ravel())
    add(f"{name}_mnlogit", "se_coefficient", np.asarray(fit.bse).T.ravel())
    add(f"{name}_mnlogit", "log_likelihood", fit.llf)

for name in ["housing", "wine"]:
    response, design, _ = load(name)
    for distr in ["logit", "probit"]:
        model = OrderedModel(response, design, distr=distr)
        fit = model.fit(method="bfgs", maxiter=10000, gtol=1e-12, disp=False)
        fit = model.fit(method="newton", start_params=fit.params, maxiter=100, tol=1e-14, disp=False)
        n_beta = design.shape[1]
        params = np.asarray(fit.params)
        cut_points = model.transform_threshold_params(params)[1:-1]
        add(f"{name}_{distr}_orderedmodel", "coefficient", params[:n_beta])
        add(f"{name}_{distr}_orderedmodel", "cut_point", cut_points)
        add(f"{name}_{distr}_orderedmodel", "se_coefficient", np.asarray(fit.bse)[:n_beta])
        add(f"{name}_{distr}_orderedmodel", "log_likelihood", fit.llf)

with open("reference_values_statsmodels.csv", "w", newline="") as handle:
    handle.write("case,quantity,index,value\n")
    for row in out:
        handle.write(",".join(str(v) for v in row) + "\n")
versions = [f"Python {sys.version.split()[0]}", f"numpy {np.__version__}",
            f"scipy {scipy.__version__}", f"statsmodels {statsmodels.__version__}"]
with open("versions_statsmodels.txt", "w") as handle:
    handle.write("\n".join(versions) + "\n")
print("\n".join(versions))
print(f"wrote {len(out)} reference values")
