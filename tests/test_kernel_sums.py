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
    x = np.concatenate(
        [
            g.uniform(0.5, 2.0, 16) * 1e-200,
            g.uniform(0.5, 2.0, 16) * 1e200,
            g.uniform(0.5, 2.0, 16),
            np.array([1e-300, 1e300, 3.0]),
        ]
    )
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


def _known_data(ybar, v, between=0, df_grid=(math.inf,)):
    """kernel.Data for the known structure with flat priors on mu and tau."""
    J = len(ybar)
    grid = np.asarray(df_grid, dtype=float)
    table, layout = kernel.prepare(np.ones(J), np.array([4.0]))
    return kernel.Data(
        2,
        np.ones(J),
        np.asarray(ybar, dtype=float),
        np.zeros(J),
        np.asarray(v, dtype=float),
        0,
        0.0,
        1.0,
        0,
        1.0,
        0.0,
        0.0,
        np.array([4.0]),
        np.zeros(1),
        table,
        layout,
        between,
        grid,
        np.full(len(grid), -math.log(len(grid))),
        kernel.t_constants(grid),
        kernel.t_quartile_logs(grid),
    )


def test_log_tau_density_with_heavy_tails_equals_its_formula():
    # with lambda_j: each group's marginal variance is v_j + tau^2 / lambda_j (the same formula, t_j for tau^2)
    g = np.random.default_rng(4)
    J = 131
    ybar, v, lam = g.normal(0.0, 1.0, J), g.uniform(0.05, 2.0, J), g.gamma(2.0, 0.5, J)
    out = np.empty(2)
    d = _known_data(ybar, v, between=1, df_grid=(4.0,))
    for eta in (-2.0, 0.3):
        t = math.exp(2 * eta) / lam
        w = 1.0 / (v + t)
        V = 1.0 / w.sum()
        m = V * np.sum(w * ybar)
        ref = eta + 0.5 * math.log(V) - 0.5 * np.sum(np.log(v + t)) - 0.5 * np.sum(w * (ybar - m) ** 2)
        got = kernel.log_tau_density(eta, d, v, 1.0 / lam, 0.05, out)
        assert got == pytest.approx(ref, rel=1e-12, abs=1e-9)
        assert out[0] == pytest.approx(m, rel=1e-12, abs=1e-12)


def test_df_loglik_is_a_sum_of_t_log_densities():
    # Source: scipy.stats.t.logpdf and norm.logpdf; the kernel's sum takes one log per block of products
    from scipy import stats

    g = np.random.default_rng(9)
    z = g.standard_t(3.0, 200)
    grid = np.array([1.0, 2.5, 7.0, math.inf])
    d = _known_data(np.zeros(200), np.ones(200), between=1, df_grid=grid)
    z2 = z * z
    for k, df in enumerate(grid):
        ref = d.df_logprior[k] + (stats.norm.logpdf(z).sum() if math.isinf(df) else stats.t(df).logpdf(z).sum())
        assert kernel.df_loglik(k, d, z2, float(z2.sum()), 200) == pytest.approx(ref, rel=1e-12)


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
        d = _known_data(ybar, v)
        got = kernel.log_tau_density(eta, d, v, np.empty(0), 0.05, out)
        assert got == pytest.approx(ref, rel=1e-12, abs=1e-9)
        assert out[0] == pytest.approx(m, rel=1e-12, abs=1e-12)
        assert out[1] == pytest.approx(V, rel=1e-12)


def _classes(n):
    J = len(n)
    pos, starts, sizes = np.empty(J, dtype=np.int64), np.empty(J + 1, dtype=np.int64), np.empty(J)
    c = kernel.size_classes(np.asarray(n, dtype=float), pos, starts, sizes)
    return c, pos, starts[: c + 1], sizes[: max(c, 0)]


def test_size_classes_are_a_stable_counting_sort():
    # Source: definition of a stable sort by key (common practice), checked against numpy's stable argsort.
    g = np.random.default_rng(3)
    n = g.integers(1, 40, 997).astype(float)
    c, pos, starts, sizes = _classes(n)
    order = np.argsort(n, kind="stable")
    np.testing.assert_array_equal(pos[order], np.arange(len(n)))  # group order[i] goes to place i
    np.testing.assert_array_equal(sizes, np.unique(n))
    np.testing.assert_array_equal(np.diff(starts), np.unique(n, return_counts=True)[1])
    assert c == len(np.unique(n)) and starts[-1] == len(n)
    assert _classes(np.array([2.0, 3.5, 4.0]))[0] == -1  # a down-weighted (fractional) size: no classes


@pytest.mark.parametrize("by_size", [True, False])
def test_collapsed_nu_loglik_equals_the_plain_formula(by_size):
    # Source: the closed form in collapsed_nu_loglik's docstring (the Scaled-Inv-chi2 marginal of
    # a group's data, BDA3 Appendix A), evaluated with math.fsum and math.lgamma as the reference.
    g = np.random.default_rng(8)
    J = 1003
    n = g.integers(1, 25, J).astype(float)
    ss = g.gamma(2.0, 1.5, J)  # SS_j
    grid = np.array([1.0, 2.0, 4.0, 8.0, 30.0])
    logprior = np.log(np.full(len(grid), 1 / len(grid)))
    table = np.empty(len(grid))
    kernel.nu_lgamma_table(n, grid, table)
    c, pos, starts, sizes = _classes(n) if by_size else (-1, np.arange(J), np.empty(1, dtype=np.int64), np.empty(0))
    half = np.empty(J)
    half[pos if by_size else np.arange(J)] = ss / 2.0
    s2 = 0.9
    for k, nu in enumerate(grid):
        h = nu / 2.0
        terms = [
            h * math.log(h * s2)
            - math.lgamma(h)
            + math.lgamma(h + n[j] / 2.0)
            - (h + n[j] / 2.0) * math.log(h * s2 + ss[j] / 2.0)
            for j in range(J)
        ]
        ref = logprior[k] + math.fsum(terms)
        got = kernel.collapsed_nu_loglik(k, J, grid, logprior, table, s2, n, half, c, starts, sizes)
        assert abs(got - ref) <= 1e-12 * math.fsum(abs(t) for t in terms)


def test_prepare_uses_classes_only_where_they_pay():
    grid = np.array([2.0, 4.0])
    assert kernel.prepare(np.arange(1.0, 11.0), grid)[1].tolist() == [-1]  # ten sizes of one group each
    layout = kernel.prepare(np.repeat([3.0, 7.0], 40), grid)[1]
    assert layout[:6].tolist() == [2, 0, 40, 80, 3, 7]  # C, starts, sizes
    assert kernel.prepare(np.full(50, 2.5), grid)[1].tolist() == [-1]  # down-weighted sizes
    table = kernel.prepare(np.repeat([3.0, 7.0], 40), grid)[0]
    # Source: definition of the table, sum_j lgamma(nu/2 + n_j/2), with math.lgamma as the reference
    assert abs(table[1] - 40 * (math.lgamma(2.0 + 1.5) + math.lgamma(2.0 + 3.5))) < 1e-12 * abs(table[1])


def test_lgamma_table_of_down_weighted_sizes_is_its_definition():
    # Source: the definition of the table, sum_j lgamma(nu_k/2 + n_j/2), with math.lgamma and math.fsum as the
    # reference. Down-weighted (fractional) sizes take the group-by-group branch, which whole-number sizes never
    # reach. Written for kernel.py:950 `lgamma(1.5 * (nu + n_j))` in that branch.
    g = np.random.default_rng(12)
    n = g.integers(2, 30, 200) * g.uniform(0.3, 1.0, 200)
    grid = np.array([1.0, 2.5, 4.0, 30.0, 100.0])
    table, layout = kernel.prepare(n, grid)
    assert layout.tolist() == [-1]
    for k, nu in enumerate(grid):
        terms = [math.lgamma(0.5 * (nu + nj)) for nj in n]
        assert abs(table[k] - math.fsum(terms)) <= 1e-12 * math.fsum(abs(t) for t in terms)
