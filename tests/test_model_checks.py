"""model.py's checks and statements at their edges: what `build` accepts and refuses, what the default
between-group prior says of itself, and that a Problem cannot be changed after it is built.

Written for the mutants of model.py that survived the mutation run (DEVELOPERS.md, "Mutation testing"); each
test names the one it was written for.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import pooling
from pooling.errors import ModelError
from pooling.model import HeavyBetween, Model, _levels_text, build


def _frame(groups):
    rows = [(g, y) for g, ys in groups.items() for y in ys]
    return pooling.from_frame(pd.DataFrame(rows, columns=["g", "y"]), "g", "y")


def test_a_shared_variance_needs_one_degree_of_freedom_and_no_more():
    # Source: with p(sigma^2) ∝ 1/sigma^2 the shared variance's posterior given theta is
    # Scaled-Inv-chi2(N - J, S / (N - J)), proper as soon as N - J >= 1 with S > 0 (BDA3 section 3.2; from
    # memory). One group with two different values among three is enough; no replication at all is refused.
    # Written for model.py:619 `df < 2`, which refused N - J = 1.
    model = Model(within="shared", tau=pooling.HalfNormal(1.0))
    p = build(_frame({"a": [1.0, 1.4], "b": [2.0], "c": [1.7]}), model)
    assert p.stats.N - p.J == 1
    with pytest.raises(ModelError, match="shared within-group variance needs replication"):
        build(_frame({"a": [1.0], "b": [2.0], "c": [1.7]}), model)


def test_statistics_made_by_hand_with_a_non_finite_value_are_refused():
    # Statistics made in Python, not read by the checked readers, are checked once in build: a NaN or an
    # infinity in any of them names the group (written for model.py:595 `ok | np.isfinite(arr)`, which let a
    # non-finite value through wherever its other condition held).
    n = np.array([3, 4, 5])
    for name, bad in (("mean", np.array([1.0, np.nan, 2.0])), ("m2", np.array([0.5, np.inf, 0.7]))):
        kw = {"mean": np.array([1.0, 1.5, 2.0]), "m2": np.array([0.5, 0.6, 0.7])}
        kw[name] = bad
        st = pooling.GroupStats(("a", "b", "c"), n, kw["mean"], kw["m2"])
        with pytest.raises(ModelError, match=rf"group 'b' has {name} = (nan|inf)"):
            build(st, Model(within="separate"))


def test_the_default_df_prior_describes_itself_as_the_readme_states():
    # Source: the README's default (Gamma(2, rate 0.1) on df, the mass above 40 on df = inf); that mass is
    # scipy.stats.gamma(2, scale=10).sf(40) = 5 e^-4 = 0.092. Written for model.py:224 `weights is not None`,
    # which described the default as a list of hand-given weights.
    text = HeavyBetween().describe()
    assert "Gamma(2, rate 0.1)" in text and "the mass above 40 on df = inf" in text
    assert f"P(df = inf) = {stats.gamma(2, scale=10).sf(40):.3f}" in text


def test_a_problem_cannot_be_changed_once_built():
    # Common practice (frozen value objects, as every specification in model.py): a Problem carries the units
    # every answer is mapped back with; changing one after the draws were made would silently misreport them.
    # Written for model.py:513 `frozen=False`.
    p = build(_frame({"a": [1.0, 1.4], "b": [2.0, 2.2], "c": [1.7, 1.5]}), Model(within="shared"))
    with pytest.raises(dataclasses.FrozenInstanceError):
        p.center = 0.0


def test_a_list_of_levels_ends_with_an_ellipsis_only_when_some_are_left_out():
    # Common practice: "..." says that something was left out. Ten levels are all shown; the eleventh is not.
    # Written for model.py:786 `len(levels) >= 10`.
    ten = [f"L{i}" for i in range(10)]
    assert not _levels_text(ten).endswith("...")
    assert _levels_text(ten + ["L10"]).endswith(", ...")
