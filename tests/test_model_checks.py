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
    # the message says what to do instead (written for model.py:623, a change to that advice's text)
    with pytest.raises(
        ModelError,
        match="shared within-group variance needs replication.*each group's standard error and use --within known$",
    ):
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


def test_estimates_far_apart_with_small_errors_come_to_internal_units_of_order_one():
    # Common practice (model.py's contract: `build` centres and scales the data so that the kernel works on numbers
    # of order one, whatever their units): five estimates spread over about 1000 with standard errors near 1 (an
    # odd count, so that the median estimate sits at the centre itself) must have internal estimates of spread
    # between 1/4 and 4. Written for model.py:837 `dev / dev`, a 0/0 at the median estimate that left the scale
    # at a fallback far from the data's.
    data = pd.DataFrame(
        {"g": list("abcde"), "y": [-1500.0, -400.0, 0.0, 700.0, 1300.0], "se": [1.0, 1.2, 0.8, 1.1, 0.9]}
    )
    p = build(pooling.from_estimates(data, "g", "y", "se"), Model(within="known"))
    rms = float(np.sqrt(np.mean(p.ybar**2)))
    assert 0.25 <= rms <= 4.0, (p.scale, rms)


def test_separate_variances_need_one_group_with_two_different_values():
    # Common practice: two different measurements of one group already estimate a variance (one degree of freedom),
    # which is what p(s^2) ∝ 1/s^2 needs to be proper; groups of one value each estimate none and are refused.
    # Written for model.py:625 `stats.n >= 3`, which asked for three.
    model = Model(within="separate", tau=pooling.HalfNormal(1.0))
    build(_frame({"a": [1.0, 1.4], "b": [2.0], "c": [1.7]}), model)
    with pytest.raises(ModelError, match="need at least one group with two or more measurements that differ"):
        build(_frame({"a": [1.0, 1.0], "b": [2.0], "c": [1.7]}), model)
