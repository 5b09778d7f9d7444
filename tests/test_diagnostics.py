"""Tests of pooling.diagnostics against arviz (a general-purpose reference implementation of the
same definitions) and against known properties of the estimators."""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.signal import lfilter

from pooling import diagnostics as dg
from pooling._compat import az

RTOL = 1e-8


def _ref(x, func, **kw):
    """arviz's value for each parameter of draws x (chains, draws, *rest), as an array."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # arviz warns about short chains; the values still count
        ds = az.convert_to_dataset(np.asarray(x, dtype=float))
        return np.asarray(func(ds, **kw)["x"])


def _arviz_all(x):
    return {
        "rhat": _ref(x, az.rhat, method="rank"),
        "bulk": _ref(x, az.ess, method="bulk"),
        "tail": _ref(x, az.ess, method="tail"),
        "mean": _ref(x, az.ess, method="mean"),
        "mcse": _ref(x, az.mcse, method="mean"),
    }


def _ours_all(x):
    return {
        "rhat": np.asarray(dg.split_rhat(x)),
        "bulk": np.asarray(dg.bulk_ess(x)),
        "tail": np.asarray(dg.tail_ess(x)),
        "mean": np.asarray(dg.mean_ess(x)),
        "mcse": np.asarray(dg.mean_mc_error(x)),
    }


def _assert_match(x, keys=("rhat", "bulk", "tail", "mean", "mcse")):
    ref, ours = _arviz_all(x), _ours_all(x)
    together = dict(zip(("rhat", "bulk", "tail"), (np.asarray(v) for v in dg.rhat_ess(x))))
    for k in keys:
        for got in (ours[k], together.get(k, ours[k])):  # the separate and the shared-work paths
            assert got.shape == ref[k].shape, k
            np.testing.assert_allclose(got, ref[k], rtol=RTOL, atol=0, equal_nan=True, err_msg=k)


def _ar1(rng, phi, shape, burn=200):
    """Stationary AR(1) draws x_t = phi x_{t-1} + e_t along axis 1 of `shape`."""
    c, n = shape[:2]
    e = rng.standard_normal((c, n + burn) + tuple(shape[2:]))
    return lfilter([1.0], [1.0, -phi], e, axis=1)[:, burn:]


# ---------------------------------------------------------------------------------------------
# agreement with arviz


@functools.cache
def _posterior(dataset):
    return az.load_arviz_data(dataset).posterior


@pytest.mark.parametrize("dataset", ["centered_eight", "non_centered_eight"])
@pytest.mark.parametrize("var", ["mu", "tau", "theta"])
def test_eight_schools_match_arviz(dataset, var):
    x = _posterior(dataset)[var].values
    # Source: arviz 0.23 az.rhat(method="rank"), az.ess(method="bulk"/"tail"/"mean"),
    # az.mcse(method="mean") on arviz's own example posteriors.
    _assert_match(x)


def test_random_arrays_match_arviz():
    rng = np.random.default_rng(20240611)
    cases = {
        "normal, two trailing dims": rng.standard_normal((4, 200, 3, 2)),
        "odd number of draws": rng.standard_normal((3, 101, 5)) * 3.0 + 1.0,
        "ties (Poisson counts)": rng.poisson(1.5, size=(4, 150, 4)).astype(float),
        "rare indicator": (rng.random((4, 120, 3)) < 0.04).astype(float),
        "heavy tails": rng.standard_cauchy((4, 300, 3)),
        "AR(1) phi=0.8": _ar1(rng, 0.8, (4, 400, 3)),
        "AR(1) phi=-0.6 (antithetic)": _ar1(rng, -0.6, (4, 400, 3)),
        "random walk (sum cut by the length bound)": np.cumsum(rng.standard_normal((2, 300, 3)), axis=1),
        "short chains": rng.standard_normal((2, 6, 4)),
        "four draws": rng.standard_normal((3, 4, 2)),
        "one chain": rng.standard_normal((1, 80, 3)),
    }
    for name, x in cases.items():
        # Source: arviz 0.23 rhat/ess/mcse with the same methods, parameter by parameter.
        try:
            _assert_match(x)
        except AssertionError as err:
            raise AssertionError(f"{name}: {err}") from None


def test_blocks_and_fft_fallback_match_arviz(monkeypatch):
    # Several column blocks, each mixing parameters that settle within the directly computed
    # lags with strongly autocorrelated ones that need the FFT.
    rng = np.random.default_rng(7)
    x = np.concatenate([rng.standard_normal((4, 300, 11)), _ar1(rng, 0.95, (4, 300, 10))], axis=2)
    x = x[:, :, rng.permutation(21)].reshape(4, 300, 3, 7)
    monkeypatch.setattr(dg, "_BLOCK", 4)
    # Source: arviz 0.23 rhat/ess/mcse (no blocking there).
    _assert_match(x)


def test_constant_parameter_matches_arviz():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((4, 100, 3))
    x[:, :, 1] = 2.5
    ours = _ours_all(x)
    # Source: arviz 0.23 gives R-hat NaN and every ESS = chains*draws for a constant quantity.
    _assert_match(x)
    assert np.isnan(ours["rhat"][1]) and ours["bulk"][1] == ours["tail"][1] == 400.0


def test_nan_and_inf_draws_follow_arviz():
    rng = np.random.default_rng(4)
    x = rng.standard_normal((2, 40, 4))
    x[0, 3, 0] = np.inf
    x[1, 7, 1] = -np.inf
    x[1, 9, 2] = np.nan
    # Source: arviz 0.23: a NaN draw gives NaN; an infinite draw is ranked (R-hat, bulk and tail
    # ESS are finite) while the mean ESS and MCSE are NaN.
    _assert_match(x)


def test_tail_ess_uses_numpy_quantiles():
    # 1 chain of 41 draws: (S - 1) * 0.95 = 38 lands exactly on a draw. There arviz's own
    # quantile can fall an ulp below that draw; tail_ess follows numpy's quantile instead, and is
    # checked here against arviz's mean-ESS of the two indicators built with np.quantile.
    rng = np.random.default_rng(5)
    x = rng.standard_normal((1, 41, 30))
    flat = x.reshape(41, 30)
    lo, hi = np.quantile(flat, [0.05, 0.95], axis=0)
    # Source: arviz 0.23 az.ess(method="mean") of I(x <= q05) and I(x <= q95).
    ref = np.minimum(_ref(x <= lo, az.ess, method="mean"), _ref(x <= hi, az.ess, method="mean"))
    np.testing.assert_allclose(dg.tail_ess(x), ref, rtol=RTOL)


# ---------------------------------------------------------------------------------------------
# known values


def test_iid_ess_near_total_draws():
    # For iid draws every lag-t autocorrelation estimate is about N(0, 1/S) (Bartlett), so
    # S/ESS = tau = 1 + 2*rho_1 + (the few noise pairs kept) has a leading term with sd 2/sqrt(S);
    # the kept positive noise biases tau up by less than that. So the average of ESS/S over R
    # replicate parameters must be within 2/sqrt(S) of 1, plus 4 Monte Carlo standard errors
    # (measured from the replicates) for the noise of the average itself. The tail ESS is the
    # minimum of two such estimates, which lowers it by about sd/sqrt(pi): its budget is doubled.
    rng = np.random.default_rng(11)
    c, n, reps = 4, 1000, 400
    size = c * n
    x = rng.standard_normal((c, n, reps))
    _, bulk, tail = dg.rhat_ess(x)
    for name, ess, budget in [
        ("bulk", bulk, 2 / np.sqrt(size)),
        ("mean", dg.mean_ess(x), 2 / np.sqrt(size)),
        ("tail", tail, 4 / np.sqrt(size)),
    ]:
        ratio = ess / size
        mcse = ratio.std(ddof=1) / np.sqrt(reps)
        # Source: true ESS of iid draws is the number of draws, S = chains*draws.
        assert abs(ratio.mean() - 1.0) < budget + 4 * mcse, (name, ratio.mean(), budget, mcse)


def test_ar1_ess_matches_known_autocorrelation():
    # ESS of the mean of a stationary AR(1) chain of length n: Var(xbar) = gamma_0 / n * tau_n with
    # tau_n = 1 + 2 * sum_{t<n} (1 - t/n) phi^t, so independent chains give ESS = chains*n/tau_n.
    rng = np.random.default_rng(12)
    c, n, reps, phi = 4, 1000, 400, 0.5
    t = np.arange(1, n)
    true = c * n / (1 + 2 * np.sum((1 - t / n) * phi**t))
    x = _ar1(rng, phi, (c, n, reps))
    ratio = dg.mean_ess(x) / true
    mcse = ratio.std(ddof=1) / np.sqrt(reps)
    # Source: the variance of the mean of a stationary AR(1) process (e.g. Box, Jenkins and
    # Reinsel, Time Series Analysis, the autocorrelation rho_t = phi^t); tolerance 4 Monte
    # Carlo standard errors measured from the replicates.
    assert abs(ratio.mean() - 1.0) < 4 * mcse, (ratio.mean(), mcse)
    # Source: arviz 0.23 az.ess(method="mean") on a few of the same chains.
    np.testing.assert_allclose(dg.mean_ess(x[:, :, :5]), _ref(x[:, :, :5], az.ess, method="mean"), rtol=RTOL)


def test_stuck_chain_gives_large_rhat():
    rng = np.random.default_rng(13)
    x = rng.standard_normal((4, 500, 2))
    x[3, :, 0] += 3.0  # one chain at another level
    x[3, :, 1] *= 4.0  # one chain with another scale: the bulk agrees, the folded draws do not
    r = dg.split_rhat(x)
    # Source: Vehtari et al. (2021): a chain at a different location or scale must show in the
    # rank-normalised split R-hat (the scale only through the folded draws); arviz as reference.
    assert r[0] > 1.3 and r[1] > 1.1
    np.testing.assert_allclose(r, _ref(x, az.rhat, method="rank"), rtol=RTOL)
    well = dg.split_rhat(rng.standard_normal((4, 500, 50)))
    # Source: arviz 0.23 on the same well-mixed draws; and R-hat is about 1 there.
    assert np.all(well < 1.01)


def test_constant_chains_at_different_levels_give_infinite_rhat():
    x = np.zeros((3, 50, 1))
    x[1] = 1.0
    x[2] = 2.0
    # W = 0 < var+ exactly, so R-hat = sqrt(var+/W) = inf. arviz 0.23 returns, depending on the
    # rounding error of its chain variances, NaN or a huge finite number: never a value that passes.
    assert np.isinf(dg.split_rhat(x)[0])
    ref = _ref(x, az.rhat, method="rank")[0]
    # Source: arviz 0.23 on the same draws.
    assert np.isnan(ref) or ref > 1e6
    # Source: the same for chains stuck at 0 and 1, where arviz's rounding gives a finite value.
    y = np.zeros((4, 100, 1))
    y[1:] = 1.0
    assert np.isinf(dg.split_rhat(y)[0]) and _ref(y, az.rhat, method="rank")[0] > 1e6


# ---------------------------------------------------------------------------------------------
# properties


@st.composite
def _draws(draw):
    chains = draw(st.integers(1, 4))
    n = draw(st.integers(4, 40))
    rest = tuple(draw(st.lists(st.integers(1, 3), max_size=3)))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((chains, n) + rest)
    if draw(st.booleans()):
        x = np.round(x * 2)  # ties
    return x


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_draws())
def test_shapes_and_values_for_any_trailing_dims(x):
    rest = x.shape[2:]
    for f in (dg.split_rhat, dg.bulk_ess, dg.tail_ess, dg.mean_ess, dg.mean_mc_error):
        v = f(x)
        if rest:
            assert isinstance(v, np.ndarray) and v.shape == rest
        else:
            assert isinstance(v, float)
    # Source: arviz 0.23 az.rhat(method="rank") and az.ess(method="bulk"/"mean") on the same draws.
    # Rounded draws (the ties case) are for the rank-based figures: on small integers a pair of Geyer's
    # autocorrelation sums can be exactly 0, and which side of 0 it lands on is then decided by the order of
    # the floating-point sums (a tie found by hypothesis: 11 draws x 3 chains, mean ESS 32.1 vs 36.7), so
    # the mean ESS is compared on continuous draws only.
    rounded = bool(np.all(x == np.round(x)))
    _assert_match(x, keys=("rhat", "bulk") if rounded else ("rhat", "bulk", "mean"))


@settings(max_examples=20, deadline=None)
@given(_draws(), st.sampled_from(["exp", "cube", "arctan", "logistic"]))
def test_bulk_and_tail_ess_invariant_under_increasing_transforms(x, how):
    f = {"exp": np.exp, "cube": lambda v: v**3 + v, "arctan": np.arctan, "logistic": lambda v: 1 / (1 + np.exp(-v))}[
        how
    ]
    y = f(x)
    # Source: Vehtari et al. (2021): bulk ESS is computed from ranks only, so any strictly
    # increasing transform leaves it unchanged; the tail ESS uses indicators of order statistics.
    np.testing.assert_allclose(dg.bulk_ess(y), dg.bulk_ess(x), rtol=1e-12)
    np.testing.assert_allclose(dg.tail_ess(y), dg.tail_ess(x), rtol=1e-12)
    # The raw-scale mean ESS is not rank-based; arviz's value on the transformed draws confirms
    # the transform itself was applied as intended.
    np.testing.assert_allclose(dg.mean_ess(y), _ref(y, az.ess, method="mean"), rtol=RTOL, equal_nan=True)


@settings(max_examples=20, deadline=None)
@given(st.integers(2, 4), st.integers(4, 40), st.integers(0, 2**32 - 1), st.integers(1, 3))
def test_rhat_invariant_under_increasing_transforms_odd_about_the_median(chains, n, seed, power):
    # Split R-hat = max(bulk, folded) where the folded draws are |x - median|. A strictly increasing
    # f keeps every rank; it also keeps the ranks of the folded draws when it is odd about the
    # median: f(x) = m + g(x - m) with g odd. (For other increasing f the folded part may change.)
    # Integer draws and g(u) = u^(2p+1) + u make every step exact in floating point.
    rng = np.random.default_rng(seed)
    x = rng.integers(-20, 21, size=(chains, n, 3)).astype(float)
    h = n // 2
    m = np.median(np.concatenate([x[:, :h], x[:, n - h :]], axis=1).reshape(-1, 3), axis=0)
    u = x - m
    y = m + u ** (2 * power + 1) + u
    # Source: Vehtari et al. (2021), rank normalisation and folding; arviz 0.23 on both arrays.
    np.testing.assert_allclose(dg.split_rhat(y), dg.split_rhat(x), rtol=1e-12, equal_nan=True)
    np.testing.assert_allclose(dg.split_rhat(y), _ref(y, az.rhat, method="rank"), rtol=RTOL, equal_nan=True)
    np.testing.assert_allclose(dg.split_rhat(2.0**7 * x), dg.split_rhat(x), rtol=1e-12, equal_nan=True)


# ---------------------------------------------------------------------------------------------
# the run-length check


def test_check_targets_and_worst():
    rng = np.random.default_rng(21)
    theta = rng.standard_normal((4, 500, 6))
    theta[2, :, 4] += 2.0  # one group's chain stuck elsewhere
    mu = rng.standard_normal((4, 500))
    tau = _ar1(rng, 0.97, (4, 500))  # low ESS
    named = {"mu": mu, "tau": tau, "theta": theta}
    misses = dg.check_targets(named, rhat_max=1.01, ess_min=400)
    ref = {
        k: (_ref(v, az.rhat, method="rank"), _ref(v, az.ess, method="bulk"), _ref(v, az.ess, method="tail"))
        for k, v in named.items()
    }
    # Source: arviz 0.23 rhat(method="rank") and ess(method="bulk"/"tail") decide which entries miss.
    expected = []
    for k, (r, b, t) in ref.items():
        bad = ~(r < 1.01) | ~(b >= 400) | ~(t >= 400)
        expected += [
            (k, tuple(int(i) for i in np.unravel_index(j, r.shape)) if r.ndim else ())
            for j in np.flatnonzero(np.ravel(bad))
        ]
    assert [(m["name"], m["index"]) for m in misses] == expected
    assert ("theta", (4,)) in expected and ("tau", ()) in expected and ("mu", ()) not in expected
    for m in misses:
        r, b, t = (
            np.ravel(a)[np.ravel_multi_index(m["index"], np.shape(a)) if m["index"] else 0] for a in ref[m["name"]]
        )
        np.testing.assert_allclose([m["rhat"], m["bulk_ess"], m["tail_ess"]], [r, b, t], rtol=RTOL)
    w = dg.worst(named)
    for k, (r, b, t) in ref.items():
        # Source: arviz 0.23, the extremes over each variable's entries.
        np.testing.assert_allclose(
            [w[k]["rhat_max"], w[k]["bulk_ess_min"], w[k]["tail_ess_min"]], [np.max(r), np.min(b), np.min(t)], rtol=RTOL
        )


def test_bad_shapes_are_refused():
    # Source: the documented contract, draws shaped (chains, draws, *rest).
    with pytest.raises(ValueError):
        dg.split_rhat(np.zeros(10))
    with pytest.raises(ValueError):
        dg.bulk_ess(np.array([["a", "b"]]))


# --- blocks on threads (benchmarks/README.md, `pooling fit` whole process) ---------------------


def test_threaded_blocks_give_the_same_numbers(monkeypatch):
    # Source: the documented contract of diagnostics._run: blocks are independent and each writes
    # its own slice, so the threaded path must equal the one-thread path bit for bit; an AR(1)
    # draw (lfilter) makes the FFT fall-back run in some blocks too. Checked against arviz 0.23
    # on a few columns as well (same tolerance as the tests above).
    g = np.random.default_rng(11)
    x = lfilter([1.0], [1.0, -0.9], g.standard_normal((4, 1000, 300)), axis=1)
    x[:, :, 7] = 2.5  # a constant column in the threaded path
    assert x.size >= dg._THREADED_MIN
    from pooling import _blocks

    monkeypatch.setattr(_blocks, "THREADS", 1)
    one = dg.rhat_ess(x), dg.mean_ess(x), dg.mean_mc_error(x)
    monkeypatch.setattr(_blocks, "THREADS", 2)
    two = dg.rhat_ess(x), dg.mean_ess(x), dg.mean_mc_error(x)
    for a, b in zip((*one[0], one[1], one[2]), (*two[0], two[1], two[2])):
        np.testing.assert_array_equal(a, b)
    for j in (0, 150, 299):
        np.testing.assert_allclose(
            [two[0][0][j], two[0][1][j], two[0][2][j]],
            [
                _ref(x[:, :, j], az.rhat, method="rank"),
                _ref(x[:, :, j], az.ess, method="bulk"),
                _ref(x[:, :, j], az.ess, method="tail"),
            ],
            rtol=RTOL,
        )


def test_draws_that_are_not_real_numbers_are_refused():
    # Common practice (numpy's dtype kinds): strings, objects and complex numbers are not draws of a real
    # parameter; booleans are (an indicator's draws). Written for diagnostics.py:369 `x.dtype != bool`, which
    # let strings and objects through to fail later with an unrelated message, or not at all.
    for bad in (
        np.array([["a", "b", "c"], ["d", "e", "f"]]),
        np.full((2, 3), None, dtype=object),
        np.ones((2, 3)) + 1j,
    ):
        with pytest.raises(ValueError, match="draws must be real numbers"):
            dg.split_rhat(bad)
    flags = np.random.default_rng(0).random((2, 50)) < 0.5
    assert np.isfinite(dg.split_rhat(flags))
