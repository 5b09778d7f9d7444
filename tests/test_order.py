"""The compiled order statistics (pooling.order, the diagnostics' sort) against numpy, to the bit.

pooling.order replaced numpy calls whose answers the reports already carried: np.quantile's default linear
method for the interval ends, a stable argsort per draw for the ranks, an argsort per parameter for the
rank-normalised diagnostics. Nothing may move, so each check here is exact equality with numpy on the
awkward cases as well as the smooth ones: ties, NaN, +-inf, all values equal, values crowded into one
bucket of the counting sort, signed zeros, one or two values.
"""

from __future__ import annotations

import numpy as np
import pytest

from pooling import diagnostics as dg
from pooling import order as O
from pooling.results import _quantiles, rank_draws, rank_summary


def _same_bits(a, b) -> bool:
    """Equal as IEEE doubles (NaN equals NaN; -0.0 and 0.0 differ)."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return a.shape == b.shape and np.array_equal(a.view(np.int64), b.view(np.int64))


def _same_number(a, b) -> bool:
    """Equal as numbers (NaN equals NaN), a zero of either sign."""
    return bool(np.array_equal(a, b, equal_nan=True))


SIGNED_ZEROS = 4  # the row of _awkward_rows holding -0.0 and 0.0 only


def _awkward_rows(rng, S: int) -> list[np.ndarray]:
    rows = [
        rng.normal(size=S),
        rng.standard_cauchy(size=S),  # heavy tails: most values crowded into a few buckets
        np.round(rng.normal(size=S), 1),  # many ties
        np.full(S, 3.25),  # all equal
        np.where(rng.random(S) < 0.5, -0.0, 0.0),  # signed zeros only
        np.r_[rng.normal(size=S - 1), 1e300],  # one far value: everything else in one bucket
        np.r_[rng.normal(size=S - 1) * 1e-300, 1e-290],  # subnormal spread
        np.r_[rng.normal(size=S - 1), np.inf],
        np.r_[rng.normal(size=S - 1), -np.inf],
        np.r_[np.inf, rng.normal(size=S - 2), -np.inf],
        np.r_[rng.normal(size=S - 1), np.nan],
        np.r_[np.nan, rng.normal(size=S - 1)],
        np.full(S, np.inf),
        np.r_[np.full(S - 1, -1.7976931348623157e308), 1.7976931348623157e308],  # span overflows
        np.exp(rng.normal(size=S) * 30),  # values over many decades
    ]
    return [r.copy() for r in rows]


# ------------------------------------------------------------------ quantiles


@pytest.mark.parametrize("S", [1, 2, 3, 7, 400, 4001])
def test_sorted_quantiles_equal_numpy_linear_quantiles_bit_for_bit(S):
    # Source: numpy.quantile, default method 'linear' (the reference computed by numpy itself).
    rng = np.random.default_rng(S)
    rows = _awkward_rows(rng, max(S, 2))
    rows = [r[:S] for r in rows]
    x = np.array(rows)  # (m, S)
    for probs in ([0.025, 0.975], [0.05, 0.95], [0.0, 1.0], [0.5, 0.5], [1e-9, 1 - 1e-9], [0.3, 0.7]):
        ref = np.quantile(x, probs, axis=1)
        got = _quantiles(x.T, probs)
        for i in range(len(rows)):
            for q in range(2):
                # np.quantile selects by partition, which leaves equal values in another order than a sort:
                # between -0.0 and 0.0 the interpolated end can differ in the sign of its zero, nothing else
                same = _same_number if i == SIGNED_ZEROS else _same_bits
                assert same(got[q, i], ref[q, i]), (S, probs, i, q, got[q, i], ref[q, i])


def test_sorted_quantiles_writes_only_its_block():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(10, 50))
    buf = np.sort(x, axis=1)
    low, high = np.full(20, -7.0), np.full(20, -7.0)
    O.sorted_quantiles(buf, 6, np.array([49 * 0.1, 49 * 0.9]), low, high, 5)
    ref = np.quantile(x[:6], [0.1, 0.9], axis=1)
    assert _same_bits(low[5:11], ref[0]) and _same_bits(high[5:11], ref[1])
    assert np.all(low[:5] == -7.0) and np.all(low[11:] == -7.0) and np.all(high[11:] == -7.0)


@pytest.mark.parametrize("S", [1, 2, 3, 7, 400, 4001])
@pytest.mark.parametrize("buckets", [1, 2, 3, 64, 100_000])
def test_quantiles_by_selection_equal_a_sort_then_sorted_quantiles(S, buckets):
    # Source: numpy's own sort and numpy.quantile's linear method (sorted_quantiles, checked above): the
    # selection must give the same bits with any number of buckets, one bucket (a plain sort of the row),
    # few (crowded buckets) or more buckets than values, and leave the rows it does not hand back unchanged.
    rng = np.random.default_rng(100 + S)
    x = np.array([r[:S] for r in _awkward_rows(rng, max(S, 2))])
    m = x.shape[0]
    for probs in ([0.025, 0.975], [0.0, 1.0], [0.5, 0.5], [1e-9, 1 - 1e-9], [0.3, 0.7]):
        h = np.array([(S - 1) * q for q in probs])
        srt = np.sort(x, axis=1)
        ref_lo, ref_hi = np.empty(m), np.empty(m)
        O.sorted_quantiles(srt, m, h, ref_lo, ref_hi, 0)
        buf = x.copy()
        lo, hi = np.full(m + 3, -7.0), np.full(m + 3, -7.0)
        # scratch filled with NaN: a value read that the selection did not write would show as a NaN end
        count, pick, bad = (
            np.empty(min(buckets, S) + 1, dtype=np.int64),
            np.full(S, np.nan),
            np.empty(m, dtype=np.bool_),
        )
        O.select_quantiles(buf, m, h, lo, hi, 2, count, pick, bad)
        handed = np.flatnonzero(bad)
        for i in handed:
            buf[i].sort()
            O.sorted_quantiles(buf[i : i + 1], 1, h, lo, hi, 2 + i)
        assert _same_bits(lo[2 : m + 2], ref_lo) and _same_bits(hi[2 : m + 2], ref_hi), (S, buckets, probs)
        assert np.all(lo[:2] == -7.0) and lo[-1] == -7.0 and hi[-1] == -7.0
        kept = np.setdiff1d(np.arange(m), handed)
        assert _same_bits(buf[kept], x[kept])  # only read
        if S >= 400:  # a smooth row is never handed back; signed zeros of both signs always are
            assert not bad[0] and bad[SIGNED_ZEROS]


def test_selection_hands_back_only_rows_holding_both_zeros():
    # a zero of one sign is an ordinary value; -0.0 beside 0.0 is the one order only a sort settles
    rng = np.random.default_rng(7)
    base = rng.normal(size=400)
    rows = []
    for zeros in ([-0.0], [0.0], [-0.0, -0.0], [0.0, -0.0]):
        r = base.copy()
        r[: len(zeros)] = zeros
        rows.append(r)
    x = np.array(rows)
    h = np.array([399 * 0.025, 399 * 0.975])
    lo, hi, bad = np.empty(4), np.empty(4), np.empty(4, dtype=np.bool_)
    O.select_quantiles(x, 4, h, lo, hi, 0, np.empty(65, dtype=np.int64), np.empty(400), bad)
    assert list(bad) == [False, False, False, True]


def test_gather_is_the_transpose_of_a_block_of_columns():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(37, 21))
    out = np.full((8, 37), np.nan)
    O.gather(x, 5, 12, out)
    assert _same_bits(out[:7], x[:, 5:12].T)
    assert np.isnan(out[7]).all()


# ------------------------------------------------------------------ ranks per draw


def _stable_ranks(x: np.ndarray, highest: bool) -> np.ndarray:
    # Source: ranks as the code before pooling.order computed them: a stable argsort of each draw of -x
    # (highest) or x (lowest), the sorted position + 1 (ties go to the earlier group).
    key = -x if highest else x
    order = np.argsort(key, axis=1, kind="stable")
    ranks = np.empty(x.shape, dtype=np.int64)
    np.put_along_axis(ranks, order, np.arange(1, x.shape[1] + 1)[None, :].repeat(x.shape[0], 0), axis=1)
    return ranks


@pytest.mark.parametrize("J", [1, 2, 3, 50, 1500])
@pytest.mark.parametrize("highest", [True, False])
def test_rank_draws_equal_a_stable_argsort(J, highest):
    rng = np.random.default_rng(J)
    rows = [r[:J] for r in _awkward_rows(rng, max(J, 2))]
    # draws like a posterior's: a smooth spread around group means that differ
    base = rng.normal(size=J) * 2
    rows += [base + rng.normal(size=J) * 0.3 for _ in range(20)]
    x = np.array(rows)
    got = rank_draws(x, highest=highest)
    ref = _stable_ranks(x, highest)
    np.testing.assert_array_equal(got.astype(np.int64), ref)


def test_rank_draws_threaded_blocks_equal_a_stable_argsort():
    # many draws x groups: the ranking runs in blocks on two threads, with a few awkward draws among them
    rng = np.random.default_rng(9)
    S, J = 700, 2000
    x = rng.normal(size=J)[None, :] + rng.normal(size=(S, J)) * 0.5
    x[10, 5] = np.nan
    x[300] = np.round(x[300])
    x[301, :] = 2.0
    x[650, 7] = np.inf
    for highest in (True, False):
        got = rank_draws(x, highest=highest)
        np.testing.assert_array_equal(got.astype(np.int64), _stable_ranks(x, highest))


def test_rank_summary_equals_numpy():
    # Source: numpy means and numpy.quantile(method='inverted_cdf') of the ranks, group by group.
    rng = np.random.default_rng(2)
    S, J = 999, 300
    x = rng.normal(size=J)[None, :] + rng.normal(size=(S, J))
    ranks = rank_draws(x)
    got = rank_summary(ranks, 0.9, 5)
    r = ranks.astype(np.float64)
    assert _same_bits(got["rank_mean"], ranks.mean(axis=0, dtype=np.float64))
    assert _same_bits(got["p_best"], (ranks == 1).mean(axis=0))
    assert _same_bits(got["p_top_k"], (ranks <= 5).mean(axis=0))
    assert _same_bits(got["rank_low"], np.quantile(r, 0.05, axis=0, method="inverted_cdf"))
    assert _same_bits(got["rank_high"], np.quantile(r, 0.95, axis=0, method="inverted_cdf"))


@pytest.mark.parametrize(
    "S, J, level, k, rows",
    [
        (999, 300, 0.9, 5, None),  # a block of 512 draws and a part; the picture: the best 40 over ranks 1..60, >60
        (700, 2000, 0.95, 3, None),  # threaded: draws x groups >= 1e6
        (40, 7, 0.5, 2, None),  # every group in the picture; heaps of a quarter of the draws each
        (4, 1, 0.95, 1, None),  # one group, four draws
        (1500, 61, 0.8, 10, 200),  # blocks of 200 draws; 61 groups: the picture's overflow column
    ],
)
def test_rank_answers_equal_the_ranks_held_whole(S, J, level, k, rows, monkeypatch):
    """rank_answers (blocks of draws folded into heaps and counts) gives the numbers of rank_summary and
    rank_matrix over every draw's ranks, to the bit, for both directions, with awkward draws among them."""
    # Source: the ranks held whole, as the code before rank_answers computed them (rank_draws, which the tests
    # above check against numpy's stable argsort; rank_summary, checked against numpy's quantiles).
    from pooling import results as R

    if rows is not None:
        monkeypatch.setattr(R, "RANK_ROWS", rows)
    rng = np.random.default_rng(S + J)
    x = rng.normal(size=J)[None, :] * 2 + rng.normal(size=(S, J))
    if S > 10 and J > 5:
        x[3, 1] = np.nan
        x[5] = np.round(x[5])
        x[6, :] = 1.0
        x[S - 2, 0] = -np.inf
    for highest in (True, False):
        ranked, heat = R.rank_answers(x, highest, level, k)
        ranks = rank_draws(x, highest=highest)
        ref = rank_summary(ranks, level, k)
        for key in ("rank_mean", "rank_low", "rank_high", "p_best", "p_top_k"):
            assert _same_bits(ranked[key], ref[key]), key
        order = np.argsort(ref["rank_mean"], kind="stable")
        picked, max_rank = (order, None) if J <= R.HEAT_ALL else (order[: R.HEAT_ROWS_MANY], R.HEAT_ALL)
        np.testing.assert_array_equal(heat["rows"], picked)
        assert _same_bits(heat["matrix"], R.rank_matrix(ranks, picked, max_rank))
        assert len(heat["columns"]) == heat["matrix"].shape[1]


# ------------------------------------------------------------------ the counting sort itself


@pytest.mark.parametrize("S", [2, 3, 400, 4001])
@pytest.mark.parametrize("buckets", [1, 2, "half", "one each", "three each", "seven each"])
def test_counting_sort_is_the_stable_sort_whatever_its_buckets(S, buckets):
    # Source: numpy.argsort(kind="stable") as the reference. The number of buckets changes only how much the
    # insertion sort has to move; the permutation of a row the sort keeps must be numpy's stable one, and the
    # rows it hands back are those the callers pass to numpy (a NaN or an infinity, all values equal).
    rng = np.random.default_rng(11)
    nb = {"half": max(1, S // 2), "one each": S, "three each": 3 * S, "seven each": 7 * S}.get(buckets, buckets)
    count = np.empty(nb + 1, dtype=np.int64)
    extra = [np.round(rng.normal(size=S), 2).cumsum(), np.sort(rng.normal(size=S))]  # a walk; a sorted row
    kept = []
    for i, x in enumerate(_awkward_rows(rng, S) + extra):
        for sign in (1.0, -1.0):
            row, order = np.full(S, np.nan), np.full(S, -1, dtype=np.int64)
            if O.sort_bucketed(x, sign, row, order, count):
                kept.append(i)
                np.testing.assert_array_equal(order, np.argsort(sign * x, kind="stable"))
                assert _same_bits(row, (sign * x)[order])
    # all values equal, +-0 only, an infinity or a NaN: always handed back (to numpy's stable argsort)
    assert not set(kept) & {3, 4, 7, 8, 9, 10, 11, 12, 13}
    assert 16 in kept  # a sorted row needs no moves, whatever the buckets
    if 2 * nb >= S:  # enough buckets: the smooth rows (normal, ties, a walk) are kept
        assert {0, 2, 15} <= set(kept)


def test_counting_sort_hands_back_a_span_too_narrow_for_its_buckets():
    # (nb - 1) / span overflows (2 / 1e-308): the bucket index is not a number, so the row goes to numpy's
    # argsort; one bucket fewer would still divide (1 / 1e-308 is finite), so the check must use nb - 1
    x = np.array([0.0, 1e-308])
    row, order = np.empty(2), np.empty(2, dtype=np.int64)
    assert not O.sort_bucketed(x, 1.0, row, order, np.empty(3 + 1, dtype=np.int64))
    assert O.sort_bucketed(x, 1.0, row, order, np.empty(2 + 1, dtype=np.int64))  # 1 / 1e-308 divides
    np.testing.assert_array_equal(order, [0, 1])


def test_sort_counts_sizes():
    assert O.sort_counts(4000).shape == (O.BUCKETS_PER_VALUE * 4000 + 1,)
    assert O.sort_counts(2).shape == (O.BUCKETS_PER_VALUE * 2 + 1,)
    big = 10 * O._SORT_BUCKETS_MAX
    assert O.sort_counts(big).shape == (big + 1,)  # the cap never leaves fewer buckets than values
    assert O.sort_counts(O._SORT_BUCKETS_MAX // 2).shape == (O._SORT_BUCKETS_MAX + 1,)


# ------------------------------------------------------------------ the diagnostics' sort


def test_diagnostics_sort_gives_a_sorting_permutation_and_argsorts_scores():
    # _sort_rows replaces numpy's argsort per parameter; any permutation that sorts a row must give the
    # rank-normalised scores numpy's argsort gives (tied values share their average rank).
    rng = np.random.default_rng(6)
    S = 400
    rows = _awkward_rows(rng, S) + [rng.normal(size=S).cumsum() for _ in range(5)]
    xs = np.ascontiguousarray(np.array(rows))
    P = xs.shape[0]
    srt, orders, bad = np.empty((P, S)), np.empty((P, S), dtype=np.int64), np.empty(P, dtype=np.bool_)
    dg._sort_rows(xs, srt, orders, bad, O.sort_counts(S))
    s1 = srt.copy()
    for p in range(P):
        if bad[p]:
            continue
        assert _same_bits(np.sort(xs[p]), xs[p][orders[p]]) or np.array_equal(np.sort(xs[p]), xs[p][orders[p]])
        assert np.array_equal(np.sort(orders[p]), np.arange(S))
    finite_smooth = [0, 2, 15, 16, 17, 18, 19]
    assert not bad[finite_smooth].any()  # the smooth rows take the compiled path
    assert bad[[3, 4, 7, 10, 12, 13]].all()  # all equal, inf, NaN, a span that overflows: handed to numpy
    orders[bad] = np.argsort(xs[bad], axis=1)
    table = dg._score_table(S)
    z1, zf1 = np.empty((P, S)), np.empty((P, S))
    z2, zf2, s2 = np.empty((P, S)), np.empty((P, S)), np.empty((P, S))
    s1[bad] = np.nan  # the rows _sort_rows handed back are sorted by _rank_block through numpy's permutation
    dg._rank_block(xs, orders, table, z1, zf1, s1, bad)
    dg._rank_block(xs, np.argsort(xs, axis=1), table, z2, zf2, s2, np.ones(P, dtype=np.bool_))
    assert _same_bits(z1, z2) and _same_bits(zf1, zf2)
    assert np.array_equal(s1, s2, equal_nan=True)
