"""Cross-check references for cairn's GLM engine from statsmodels (one dataset per family).

Run from the crate root, after make_reference.R (it reads the *_data.csv design files that
script writes):   python3 tests/reference/glm/make_reference.py
Writes statsmodels_<name>.json with every number as repr() (17 significant digits) and the
library versions in "source".  The Rust test glm_reference.rs compares cairn against these
values as well as against R.

Cases: birthwt_logit (GLM Binomial), insurance_poisson (GLM Poisson with offset), quine_nb
(statsmodels.discrete NegativeBinomial, NB2, joint ML of beta and alpha = 1/theta),
clotting_both_inverse (GLM Gamma, scale = Pearson chi-square / df).
"""
import csv
import json
import os
import sys

import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
from statsmodels.discrete.discrete_model import NegativeBinomial

OUT = os.path.join("tests", "reference", "glm")
SOURCE = (f"statsmodels {statsmodels.__version__}; scipy {scipy.__version__}; "
          f"numpy {np.__version__}; Python {sys.version.split()[0]}")


def load(name):
    with open(os.path.join(OUT, f"{name}_data.csv")) as handle:
        rows = list(csv.reader(handle))
    values = np.array([[float(v) for v in row] for row in rows[1:]])
    return values[:, 0], values[:, 1], values[:, 2], values[:, 3:]


def write(name, values):
    values = {"source": SOURCE, "name": name, **values}
    text = json.dumps(values, indent=2)
    with open(os.path.join(OUT, f"statsmodels_{name}.json"), "w") as handle:
        handle.write(text + "\n")
    print(name, "written")


def floats(array):
    return [float(v) for v in np.asarray(array).ravel()]


def glm_case(name, family):
    y, weights, offset, x = load(name)
    model = sm.GLM(y, x, family=family, offset=offset, var_weights=None, freq_weights=weights)
    fit = model.fit(method="IRLS", tol=1e-14, maxiter=500, scale="X2" if isinstance(family, sm.families.Gamma) else None)
    values = {
        "coefficients": floats(fit.params),
        "standard_errors": floats(fit.bse),
        "deviance": float(fit.deviance),
        "pearson_chi_square": float(fit.pearson_chi2),
        "dispersion": float(fit.scale),
    }
    if not isinstance(family, sm.families.Gamma):
        # statsmodels' Gamma llf uses its own scale; the binomial/Poisson llf are full ones.
        values["log_likelihood"] = float(fit.llf)
    write(name, values)


glm_case("birthwt_logit", sm.families.Binomial())
glm_case("insurance_poisson", sm.families.Poisson())
glm_case("clotting_both_inverse", sm.families.Gamma(sm.families.links.InversePower()))

y, weights, offset, x = load("quine_nb")
nb = NegativeBinomial(y, x, loglike_method="nb2")
start = np.append(sm.GLM(y, x, family=sm.families.Poisson()).fit().params, 0.5)
fit = nb.fit(start_params=start, method="newton", maxiter=200, tol=1e-14, disp=False)
alpha = float(fit.params[-1])
write("quine_nb", {
    "coefficients": floats(fit.params[:-1]),
    "theta": 1.0 / alpha,
    "log_likelihood": float(fit.llf),
})
