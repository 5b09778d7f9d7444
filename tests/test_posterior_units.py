"""posterior.py's mapping back to the user's units, against numpy on the draws in the user's units.

The engine summarises in internal units (y - center) / scale and maps back at the end (posterior.summarize_draws,
hyper_summary); the references are numpy's mean, sd (ddof 1) and quantiles (linear interpolation, its default)
of the user-unit draws (Fit.draws), so they agree to rounding. The eight-schools estimates are used because
their internal scale is far from 1 and their centre far from 0, where a scale applied the wrong way, or a
centre added to a spread, shows at once. Written for the mutants that survived the mutation run of
posterior.py (DEVELOPERS.md, "Mutation testing"): :258 `mean / scale`, :224 the known structure's constants.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling.posterior import hyper_summary
from tests.kernel_helpers import SCHOOLS_SE, SCHOOLS_Y


@pytest.fixture(scope="module")
def schools():
    # Source: the eight-schools estimates and standard errors (Rubin 1981, J. Educational Statistics 6(4),
    # Table 2; from memory, cross-checked in tests/test_eight_schools.py).
    data = pd.DataFrame({"school": list("ABCDEFGH"), "y": SCHOOLS_Y, "se": SCHOOLS_SE})
    st = pooling.from_estimates(data, "school", "y", "se")
    settings = pooling.Settings(chains=2, warmup=200, draws=500, max_draws=500, seed=3)
    return pooling.fit(st, pooling.Model(within="known", between="normal"), settings, progress=False)


def test_hyperparameter_summaries_are_numpy_on_the_user_unit_draws(schools):
    fit = schools
    p = fit.problem
    assert abs(p.scale - 1.0) > 0.5 and abs(p.center) > 1.0  # the mapping has something to do
    got = hyper_summary(fit.raw, p, level=0.9)
    for name in ("mu", "tau"):
        x = fit.draws(name)
        lo, med, hi = np.quantile(x, [0.05, 0.5, 0.95])
        ref = {"mean": x.mean(), "sd": x.std(ddof=1), "median": med, "low": lo, "high": hi}
        for k, v in ref.items():
            assert got[name][k] == pytest.approx(v, rel=1e-12, abs=1e-12 * p.scale), (name, k)


def test_constant_data_carry_what_the_groups_were_given(schools):
    # the known structure's constants are the given standard errors (no raw sd: there were no measurements)
    const = schools.parts["constant_data"]
    names = set(const.variables)
    assert "std_error" in names and "raw_sd" not in names
    np.testing.assert_array_equal(const["std_error"], SCHOOLS_SE)
    np.testing.assert_array_equal(const["raw_mean"], SCHOOLS_Y)
