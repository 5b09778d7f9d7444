"""The kernel's fast O(J) sums against plain numpy and math.fsum (general-purpose references).

sum_log_shifted takes one log per block of products and falls back to single logs for a block
whose product leaves the normal range; weighted_sums is vectorised (its sums reassociated). Both
must agree with the plain formulas to rounding: the tolerance, 1e-13 relative to the sum of the
absolute terms, is about J * 2^-52 for the J <= 1003 used here, the error bound of a float64 sum.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from pooling import kernel


def _fsum_log(x, c):
    return math.fsum(math.log(a + c) for a in x)


@pytest.mark.parametrize("J", [1, 15, 16, 17, 1003])
def test_sum_log_shifted_equals_the_plain_sum(J):
    g = np.random.default_rng(J)
    x = g.uniform(0.01, 3.0, J)
    for c in (0.0, 1e-30, 0.7):
        ref = _fsum_log(x, c)
        scale = math.fsum(abs(math.log(a + c)) for a in x)
        assert abs(kernel.sum_log_shifted(x, c) - ref) <= 1e-13 * scale
    assert abs(kernel.sum_log(x) - _fsum_log(x, 0.0)) <= 1e-13 * math.fsum(abs(math.log(a)) for a in x)


def test_blocks_beyond_the_normal_range_fall_back_to_single_logs():
    # products of 16 terms near 1e-200 or 1e200 under- or overflow; the result must not
    g = np.random.default_rng(1)
    x = np.concatenate([g.uniform(0.5, 2.0, 16) * 1e-200, g.uniform(0.5, 2.0, 16) * 1e200,
                        g.uniform(0.5, 2.0, 16), np.array([1e-300, 1e300, 3.0])])
    got = kernel.sum_log_shifted(x, 0.0)
    ref = _fsum_log(x, 0.0)
    assert np.isfinite(got)
    assert abs(got - ref) <= 1e-13 * math.fsum(abs(math.log(a)) for a in x)


def test_weighted_sums_equal_the_plain_sums():
    g = np.random.default_rng(2)
    J = 1003
    ybar, v = g.normal(0.0, 1.0, J), g.uniform(0.05, 2.0, J)
    tau2, shift = 0.3, 0.1
    w = 1.0 / (v + tau2)
    r = ybar - shift
    got = kernel.weighted_sums(ybar, v, tau2, shift)
    for a, terms in zip(got, (w, w * r, w * r * r)):
        assert abs(a - math.fsum(terms)) <= 1e-13 * math.fsum(np.abs(terms))


def test_log_tau_density_equals_its_formula():
    # log p(eta | v, y) = eta + log V / 2 - sum log(v_j + tau^2) / 2 - sum (ybar_j - m)^2 / (v_j + tau^2) / 2
    # for a flat mu and tau prior (the design notes' formula), written here with numpy directly
    g = np.random.default_rng(3)
    J = 257
    ybar, v = g.normal(0.0, 1.0, J), g.uniform(0.05, 2.0, J)
    out = np.empty(2)
    for eta in (-3.0, -0.4, 1.2):
        tau2 = math.exp(2 * eta)
        w = 1.0 / (v + tau2)
        V = 1.0 / w.sum()
        m = V * np.sum(w * ybar)
        ref = eta + 0.5 * math.log(V) - 0.5 * np.sum(np.log(v + tau2)) - 0.5 * np.sum(w * (ybar - m) ** 2)
        got = kernel.log_tau_density(eta, ybar, v, 0.05, 0, 0.0, 1.0, 0, 1.0, out)
        assert got == pytest.approx(ref, rel=1e-12, abs=1e-9)
        assert out[0] == pytest.approx(m, rel=1e-12, abs=1e-12)
        assert out[1] == pytest.approx(V, rel=1e-12)
