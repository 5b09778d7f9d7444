"""The BCG vaccine trials: a published meta-regression with group-level predictors, used as test input.

Source: Colditz, Brewer, Berkey, Wilson, Burdick, Fineberg and Mosteller (1994), "Efficacy of BCG vaccine in the
prevention of tuberculosis: meta-analysis of the published literature", JAMA 271(9), 698-702: 13 trials, each
with the tuberculosis cases and non-cases in the vaccinated and the control arm, the absolute latitude of the
trial site and how the arms were allocated. The numbers are typed from memory as the metafor package ships them
(data set dat.bcg); Viechtbauer (2010), "Conducting meta-analyses in R with the metafor package", Journal of
Statistical Software 36(3), fits them as a worked example. The published figures used in the tests (from memory):

* effect size: log risk ratio y = log(tpos / (tpos + tneg)) - log(cpos / (cpos + cneg)), sampling variance
  v = 1/tpos - 1/(tpos + tneg) + 1/cpos - 1/(cpos + cneg);
* random-effects model without moderators, REML: tau^2 = 0.3132, estimate -0.7145 (se 0.1798);
* mixed-effects model with absolute latitude, REML: tau^2 = 0.0764, intercept 0.2515 (se 0.2491), slope on
  latitude -0.0291 (se 0.0072); test for residual heterogeneity QE = 30.7331 on 11 df; R^2 = 75.62%.

tests/test_predictors_exact.py recomputes these with statsmodels and checks that the typed data reproduce them,
so a typing error in the numbers below would fail there.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

# trial, tpos, tneg, cpos, cneg, absolute latitude (degrees), year, allocation
TRIALS = [
    ("Aronson 1948", 4, 119, 11, 128, 44, 1948, "random"),
    ("Ferguson & Simes 1949", 6, 300, 29, 274, 55, 1949, "random"),
    ("Rosenthal et al 1960", 3, 228, 11, 209, 42, 1960, "random"),
    ("Hart & Sutherland 1977", 62, 13536, 248, 12619, 52, 1977, "random"),
    ("Frimodt-Moller et al 1973", 33, 5036, 47, 5761, 13, 1973, "alternate"),
    ("Stein & Aronson 1953", 180, 1361, 372, 1079, 44, 1953, "alternate"),
    ("Vandiviere et al 1973", 8, 2537, 10, 619, 19, 1973, "random"),
    ("TPT Madras 1980", 505, 87886, 499, 87892, 13, 1980, "random"),
    ("Coetzee & Berjak 1968", 29, 7470, 45, 7232, 27, 1968, "random"),
    ("Rosenthal et al 1961", 17, 1699, 65, 1600, 42, 1961, "systematic"),
    ("Comstock et al 1974", 186, 50448, 141, 27197, 18, 1974, "systematic"),
    ("Comstock & Webster 1969", 5, 2493, 3, 2338, 33, 1969, "systematic"),
    ("Comstock et al 1976", 27, 16886, 29, 17825, 33, 1976, "systematic"),
]

# Source: Viechtbauer (2010), JSS 36(3), the mixed-effects model with latitude (metafor's printout; from memory)
PUBLISHED = {
    "tau2_latitude": 0.0764,
    "intercept": 0.2515,
    "intercept_se": 0.2491,
    "slope": -0.0291,
    "slope_se": 0.0072,
    "qe": 30.7331,
    "tau2_none": 0.3132,
    "estimate_none": -0.7145,
    "estimate_none_se": 0.1798,
    "r2": 0.7562,
}


def frame() -> pd.DataFrame:
    """One row per trial: the log risk ratio, its sampling variance and standard error, latitude and allocation."""
    t = pd.DataFrame(TRIALS, columns=["trial", "tpos", "tneg", "cpos", "cneg", "ablat", "year", "alloc"])
    t["yi"] = np.log(t.tpos / (t.tpos + t.tneg)) - np.log(t.cpos / (t.cpos + t.cneg))
    t["vi"] = 1 / t.tpos - 1 / (t.tpos + t.tneg) + 1 / t.cpos - 1 / (t.cpos + t.cneg)
    t["sei"] = np.sqrt(t.vi)
    return t
