"""model.py's checks and statements at their edges: what `build` and Model accept and refuse, what the priors
say of themselves, that a Problem cannot be changed after it is built, and that a numeric predictor's coefficient
maps back to the user's units.

Written for the mutants of model.py that survived the mutation run (DEVELOPERS.md, "Mutation testing"); each
test names the one it was written for.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from bcg_data import PUBLISHED, frame
from scipy import stats

import pooling
from pooling.errors import ModelError
from pooling.model import (
    Category,
    HeavyBetween,
    Model,
    NuGrid,
    Numeric,
    ScaledInvChi2,
    _levels_text,
    build,
    gamma_df_weights,
    parse_between,
)


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
    # the README's grid, "1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24, 32, inf" (written for model.py:162, a grid point 25)
    assert "df learned on the grid {1, 1.5, 2, 3, 4, 6, 8, 12, 16, 24, 32, inf};" in text
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


def test_a_numeric_predictors_coefficient_maps_back_to_the_published_slope():
    # Source: Viechtbauer (2010), JSS 36(3), the BCG trials' meta-regression on absolute latitude (tests/bcg_data.py,
    # from memory): at the REML tau^2 = 0.0764 the slope is -0.0291 per degree, printed to 4 decimals; and
    # statsmodels' WLS at that tau^2 on the user's numbers. The generalised least squares fit is computed on the
    # internal design (y and x centred and scaled by powers of two) and mapped back with Design.to_user; the two
    # must agree to rounding. Latitude's spread (about 14 degrees) makes its unit scale 16, not 1. Written for
    # model.py:956 `scale * unit_scale`, which reported the slope 256 times too steep.
    t = frame()
    st = pooling.from_estimates(t, "trial", "yi", "sei", group_columns=["ablat"])
    p = build(st, Model(within="known", predictors=(Numeric("ablat"),)))
    assert p.design.numerics[0]["unit_scale"] == 16.0
    tau2 = PUBLISHED["tau2_latitude"] / p.scale**2
    Z = np.column_stack([np.ones(p.J), p.design.X])
    w = 1.0 / (p.v_known + tau2)
    b = np.linalg.solve(Z.T @ (w[:, None] * Z), Z.T @ (w * p.ybar))
    slope = b[1] * p.design.to_user[0]
    x = sm.add_constant(t.ablat.to_numpy(dtype=float))
    ref = sm.WLS(t.yi.to_numpy(), x, weights=1.0 / (t.vi.to_numpy() + PUBLISHED["tau2_latitude"])).fit()
    assert slope == pytest.approx(ref.params[1], rel=1e-9)
    assert slope == pytest.approx(PUBLISHED["slope"], abs=5e-5)


def test_unusable_priors_on_sigma2_and_nu_are_refused():
    # Source: Scaled-Inv-chi2(dof, s^2) is Inv-Gamma(dof/2, dof s^2 / 2) (BDA3 appendix A; from memory), a
    # distribution only for dof > 0 and s^2 > 0: scipy.stats.invgamma has no density for the finite cases below
    # (checked); nu is the degrees of freedom of the same family, so a nu grid must hold numbers above 0, not 0
    # (scipy.stats.chi2 with 0 degrees of freedom has no density either).
    finite = ((-1, 2.0), (3.0, -0.5), (0, 1.0), (4.0, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        for dof, scale2 in finite:
            assert np.isnan(stats.invgamma(dof / 2, scale=dof * scale2 / 2).pdf(1.0)), (dof, scale2)
        assert np.isnan(stats.chi2(0.0).pdf(1.0))
    # Written for model.py:441 `isinstance(x, (int, float)) or ...`, which let any int or float through.
    for dof, scale2 in finite + ((math.inf, 1.0), (4, math.nan)):
        with pytest.raises(ModelError, match=r"scaled-inv-chi2 prior on sigma\^2 needs dof > 0 and scale2 > 0"):
            Model(within="shared", sigma2=ScaledInvChi2(dof, scale2))
    Model(within="shared", sigma2=ScaledInvChi2(1, 0.25))  # the smallest whole dof is usable
    # Written for model.py:452 `np.any(vals < 0)`, which let a grid point of exactly 0 through.
    for grid in ((0.0, 1.0, 4.0), (-2.0, 3.0), (1.0, math.inf)):
        with pytest.raises(ModelError, match="the nu grid must hold positive numbers"):
            Model(within="separate", nu=NuGrid(grid))
    Model(within="separate", nu=NuGrid((0.5, 1.0, 4.0)))


def test_a_bad_specification_is_refused_saying_what_was_expected_and_found():
    # Common practice for bad input: one message, marked as a model error, saying what was expected and what was
    # found. Written for model.py:290 (an unknown between-group distribution), model.py:320 (levels listed twice)
    # and model.py:887 (a stated level without groups), changes to those messages.
    for text in ("cauchy", "heavy-4", "t"):
        with pytest.raises(ModelError) as err:
            parse_between(text)
        assert str(err.value) == (
            f"bad model: the between-group distribution must be normal, heavy or heavy:DF; found '{text}'"
        )
    with pytest.raises(ModelError) as err:
        Category("kit", levels=("A", "B", "A"))
    assert str(err.value) == "bad model: the levels of 'kit' are listed more than once: ('A', 'B', 'A')"
    # model.py:887, the middle of the refusal of a stated level that no group holds
    st = pooling.from_estimates(frame(), "trial", "yi", "sei", group_columns=["alloc"])
    stated = ("random", "alternate", "systematic", "cluster")
    with pytest.raises(ModelError) as err:
        build(st, Model(within="known", predictors=(Category("alloc", levels=stated),)))
    assert str(err.value) == (
        "bad model: the level 'cluster' of 'alloc' has no groups (the levels found are 'alternate', 'random', "
        "'systematic'); a level without groups has no effect to estimate: drop it from the stated levels"
    )


def test_the_priors_statement_says_how_each_predictor_enters():
    # Source: README.md, the options table: a numeric predictor is "centred at its mean over the groups", a
    # categorical one enters as contrasts against a reference level (the one with the most groups unless named).
    # Written for model.py:472 `what = None`, which left the statement of each predictor's coding empty.
    said = Model(predictors=(Category("alloc", reference="random"), Category("site"), Numeric("ablat"))).priors()
    assert said["effects of alloc"].endswith("(categorical 'alloc', contrasts against the reference level 'random')")
    assert said["effects of site"].endswith(
        "(categorical 'site', contrasts against the reference level with the most groups)"
    )
    assert said["effects of ablat"].endswith("(numeric 'ablat', centred at its mean over the groups)")


def test_the_priors_statement_of_each_structure_is_the_readmes_default():
    # Source: README.md, the table of model options: separate, p(s^2) ∝ 1/s^2 and nu on the grid 1, 1.5, 2, 3, 4,
    # 5, 6, 8, 10, 14, 20, 30, 50, 100 with equal weights; shared, p(log sigma) flat; known, each group's standard
    # error as given. Only the structure's own priors are stated. Written for model.py:474 `within == "XXseparateXX"`,
    # which stated the separate structure's sigma as given standard errors and left out s^2 and nu.
    sep = Model(within="separate").priors()
    assert sep["s2"] == "p(s^2) ∝ 1/s^2"
    assert sep["nu"] == "grid {1, 1.5, 2, 3, 4, 5, 6, 8, 10, 14, 20, 30, 50, 100}, uniform over the points"
    assert "sigma" not in sep
    shared = Model(within="shared").priors()
    assert shared["sigma"] == "p(log sigma) flat" and not {"s2", "nu"} & set(shared)
    known = Model(within="known").priors()
    assert known["sigma"] == "given: each group's standard error" and not {"s2", "nu"} & set(known)


def test_a_predictor_cannot_be_changed_once_made():
    # Common practice (frozen value objects, as every specification in model.py): a Model, and the predictors in it,
    # are what a run was made with; they must not change under it, and equal specifications are equal and hash
    # alike. Written for model.py:297 `@dataclass(frozen=False)` on Category.
    kit = Category("kit", reference="A")
    with pytest.raises(dataclasses.FrozenInstanceError):
        kit.reference = "B"
    with pytest.raises(dataclasses.FrozenInstanceError):
        Numeric("age").column = "height"
    a = Model(predictors=(Category("kit", reference="A"), Numeric("age")))
    b = Model(predictors=(Category("kit", reference="A"), Numeric("age")))
    assert a == b and hash(a) == hash(b)


def test_df_prior_weights_are_the_gamma_masses_of_their_cells():
    # Source: scipy.stats.gamma(2, scale=1/0.1), the README's Gamma(2, rate 0.1) on df, and the cells of
    # gamma_df_weights' docstring: edges at the geometric midpoints, the first cell from 0, the last finite one up to
    # 40 or up to the last finite point if that is larger; df = inf takes the mass above that edge. Written for
    # model.py:179 `finite[-2]`, which ended the last cell at 40 when the last finite point lies beyond it.
    g = stats.gamma(2, scale=10.0)
    for grid, last in (((1.0, 4.0, 16.0, math.inf), 40.0), ((1.0, 4.0, 60.0, math.inf), 60.0)):
        edges = [0.0, math.sqrt(grid[0] * grid[1]), math.sqrt(grid[1] * grid[2]), last]
        want = [g.cdf(b) - g.cdf(a) for a, b in zip(edges, edges[1:])] + [g.sf(last)]
        np.testing.assert_allclose(gamma_df_weights(grid), want, rtol=1e-12, atol=1e-15)


def test_a_numeric_predictor_with_one_value_is_refused_even_for_a_single_group():
    # Common practice for bad input: a clear message, never a traceback. One group is the smallest input that reaches
    # this refusal. Written for model.py:948 `nv[1]`, which failed with an IndexError there.
    for ys, xs in (([1.0], [3.0]), ([1.0, 2.0, 1.5], [3.0, 3.0, 3.0])):
        groups = [f"g{i}" for i in range(len(ys))]
        st = pooling.from_estimates(
            pd.DataFrame({"g": groups, "y": ys, "se": 0.5, "x": xs}), "g", "y", "se", group_columns=["x"]
        )
        model = Model(within="known", between="normal", tau=pooling.HalfNormal(1.0), predictors=(Numeric("x"),))
        with pytest.raises(ModelError, match="^bad model: the numeric predictor 'x' is 3 in every group, so it cannot"):
            build(st, model)


def test_a_df_fixed_at_infinity_is_written_as_strict_json():
    # Source: RFC 8259, section 6 (JSON numbers have no infinity or NaN): the model record writes inf as the string
    # "inf" and reads it back. Written for model.py:492 `key == "XXdfXX"` and model.py:494 `"XXgridXX" in d`, which
    # left a float inf in the record (the df, the default grid's last point).
    for m in (Model(between=HeavyBetween(df=math.inf)), Model(between=HeavyBetween())):
        text = json.dumps(m.to_dict(), allow_nan=False)
        assert Model.from_dict(json.loads(text)) == m


def test_hand_given_df_weights_are_stated_as_given():
    # Common practice: a prior is stated as given. Written for model.py:262, a change to the separator of the list.
    text = HeavyBetween(grid=(2.0, 4.0, math.inf), weights=(1.0, 2.5, 1.0)).describe()
    assert text.endswith("df learned on the grid {2, 4, inf}; prior weights 1, 2.5, 1")


def test_one_group_is_a_problem_and_no_group_is_refused():
    # Source: with one estimate y, known se and a flat mu, p(mu, tau | y) ∝ N(y; mu, se^2 + tau^2) p(tau): mu
    # integrates to 1 for every tau, so the posterior of tau is its prior, proper under a half-normal (a
    # derivation, common practice). One group is a problem to fit; no group at all is refused. Written for
    # model.py:729 `J == 1`, which refused one group as if it were none.
    one = pooling.from_estimates(pd.DataFrame({"g": ["a"], "y": [1.0], "se": [0.5]}), "g", "y", "se")
    p = build(one, Model(within="known", between="normal", tau=pooling.HalfNormal(1.0)))
    assert p.J == 1
    with pytest.raises(ModelError, match="^bad model: the data hold no groups$"):
        build(one.subset(np.array([], dtype=np.int64)), Model(within="known", tau=pooling.HalfNormal(1.0)))
