"""Order statistics of stored draws: blocks of groups laid out by group, numpy's linear quantiles, ranks per draw.

A full run keeps its draws shaped (draws, groups), one draw per row. Per-group answers want columns (a
group's draws) and ranks want rows (one draw's groups). The building blocks, each exact:

* `gather` copies a block of columns into a buffer shaped (groups, draws), a few rows at a time, so that
  whole row segments are read and whole cache lines written (numpy's copy of a transposed slice went
  through memory one number per cache line);
* `sorted_quantiles` takes numpy's default (linear) quantile from a sorted row: the order statistics at
  floor(h) and floor(h) + 1, h = (S - 1) p, interpolated with numpy's own arithmetic (`_lerp`: a + (b - a) g
  below g = 1/2, b - (b - a)(1 - g) from there), so that every end equals np.quantile's to the bit. A row
  holding a NaN (sorted last) gives NaN, as np.quantile does;
* `select_quantiles` (through `Selection`) gives the same ends without sorting the row: it counts the row into
  equal-width buckets and sorts only the few values of the buckets holding the order statistics it needs,
  about 20 us for 4,000 draws where numpy's sort took 85-105 us on the 2-core AMD EPYC machine of 2026-12-04
  (numpy 2.4; 18 us on an earlier machine whose numpy sort was vectorised). Rows it cannot bucket exactly
  (an infinite value, all values equal, both -0.0 and 0.0, whose order only a sort settles) go to numpy's sort;
* `rank_rows` ranks each draw's groups, 1 = the largest: R[s, j] = 1 + #{k : x_sk > x_sj} + #{k < j :
  x_sk == x_sj} (ties by position: the order of a stable sort of -x). A counting sort of the values into
  J equal-width buckets, then an insertion sort that moves a value only past strictly smaller ones (which
  keeps ties in position order), costs O(J) for the smooth spread of a draw's group values (a stable
  argsort per draw was six times slower at 20,000 groups). A draw with a NaN or an infinite value, with
  all values equal, or whose values crowd into few buckets (the insertion sort's moves passing 16 J) is
  handed back, to be ranked by numpy's stable argsort. Either way the ranks are those defined above;
* `fold_ranks` folds blocks of ranks into per-group sums and counts and keeps candidates for the ends of each
  group's rank interval, which `select_kth` (Hoare's selection) and `interval_ends` pick: the same numbers as
  sorting every draw's ranks, without holding them.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)

_TILE = 16  # rows of the source read together by `gather`
_MOVES_PER_VALUE = 16  # insertion-sort moves per value before `rank_rows` hands a draw back
_SELECT_BUCKETS = 512  # buckets of `select_quantiles` (at most one per value)
#: buckets per value of `sort_bucketed` (up to _SORT_BUCKETS_MAX): with one per value about a third of the values
#: share a bucket with an earlier one and the insertion sort moves them (a mispredicted jump each); with three,
#: the sort of 2,000 to 20,000 values took 21-28 % less time (benchmarks/README.md, "Time to answer, 2026-12-04,
#: later")
BUCKETS_PER_VALUE = 3
_SORT_BUCKETS_MAX = 1 << 20  # 8 MB of counts: beyond, the counts leave the cache and more buckets stop paying


@njit(nogil=True, cache=True)
def gather(x, j0, j1, out):
    """out[i, s] = x[s, j0 + i] for the columns j0 .. j1 - 1 of x (S, J): a block of columns, laid out by column."""
    S = x.shape[0]
    m = j1 - j0
    for s0 in range(0, S, _TILE):
        s1 = min(S, s0 + _TILE)
        for i in range(m):
            for s in range(s0, s1):
                out[i, s] = x[s, j0 + i]


@njit(nogil=True, cache=True, inline="always")
def _lerp(a, b, g):
    """numpy's _lerp: a + (b - a) g for g < 1/2, else b - (b - a)(1 - g)."""
    diff = b - a
    if g < 0.5:
        return a + diff * g
    return b - diff * (1.0 - g)


@njit(nogil=True, cache=True)
def sorted_quantiles(buf, m, h, low, high, j0):
    """low[j0 + i], high[j0 + i] = numpy's linear quantiles at the virtual indexes h[0], h[1] ((S - 1) p) of row i
    of buf, each row sorted ascending (NaN last), i < m: exactly np.quantile(row, p)."""
    S = buf.shape[1]
    for i in range(m):
        row = buf[i]
        for q in range(2):
            hq = h[q]
            if row[S - 1] != row[S - 1]:
                v = np.nan
            elif hq >= S - 1:  # numpy: both neighbours are the largest value, and g = h - (-1)
                v = _lerp(row[S - 1], row[S - 1], hq + 1.0)
            else:
                i0 = int(np.floor(hq))
                v = _lerp(row[i0], row[i0 + 1], hq - i0)
            if q == 0:
                low[j0 + i] = v
            else:
                high[j0 + i] = v


@njit(nogil=True, cache=True, inline="always")
def _bucket(v, lo, inv, nb):
    return min(int((v - lo) * inv), nb - 1)


@njit(nogil=True, cache=True)
def _rank_bucket(count, nb, k):
    """(the bucket holding the value of rank k, 0-based, of the counted values, and how many values lie in
    the buckets before it)."""
    below = 0
    for b in range(nb - 1):
        c = count[b]
        if below + c > k:
            return b, below
        below += c
    return nb - 1, below


@njit(nogil=True, cache=True)
def _pick_sorted(row, lo, inv, nb, b0, b1, pick):
    """The values of row in the buckets b0..b1, sorted ascending into pick; returns how many."""
    c = 0
    for s in range(row.shape[0]):
        v = row[s]
        b = _bucket(v, lo, inv, nb)
        if b0 <= b <= b1:
            pick[c] = v
            c += 1
    part = pick[:c]
    if c <= 32:  # an insertion sort for the few values of a smooth spread
        for i in range(1, c):
            v = part[i]
            q = i
            while q > 0 and part[q - 1] > v:
                part[q] = part[q - 1]
                q -= 1
            part[q] = v
    else:
        part.sort()
    return c


@njit(nogil=True, cache=True)
def select_quantiles(buf, m, h, low, high, j0, count, pick, bad):
    """low[j0 + i], high[j0 + i] = numpy's linear quantiles at the virtual indexes h[0], h[1] ((S - 1) p) of row i
    of buf (i < m), as sorted_quantiles gives them from the sorted row, without sorting it: the four order
    statistics needed are found by counting the row into equal-width buckets (count: nb + 1 of them, nb >= 1)
    and sorting only the values of the buckets that hold them (pick: scratch of S). buf is only read. A row
    holding a NaN gives NaN (numpy sorts NaN last). Bucketing is monotone, so each order statistic is exact;
    the one ambiguity of a sort, the order of -0.0 and 0.0, and the rows the buckets cannot span (an infinite
    value, all values equal, a span that overflows) are flagged in bad[i], with low and high unset, for
    numpy's sort and sorted_quantiles."""
    S = buf.shape[1]
    nb = count.shape[0] - 1
    for i in range(m):
        row = buf[i]
        bad[i] = False
        lo = np.inf
        hi = -np.inf
        nan = False
        inf = False
        negz = False
        posz = False
        for s in range(S):
            v = row[s]
            if not (abs(v) < np.inf):
                if v != v:
                    nan = True
                    break
                inf = True
            elif v == 0.0:
                if np.signbit(v):
                    negz = True
                else:
                    posz = True
            lo = min(lo, v)
            hi = max(hi, v)
        if nan:
            low[j0 + i] = np.nan
            high[j0 + i] = np.nan
            continue
        span = hi - lo
        if inf or (negz and posz) or not (span > 0.0) or not (span < np.inf) or not (nb / span < np.inf):
            bad[i] = True
            continue
        inv = nb / span
        for b in range(nb):
            count[b] = 0
        for s in range(S):
            count[_bucket(row[s], lo, inv, nb)] += 1
        for q in range(2):
            hq = h[q]
            if hq >= S - 1:  # numpy: both neighbours are the largest value, and g = h - (-1)
                k0, g = S - 1, hq + 1.0
                k1 = k0
            else:
                k0 = int(np.floor(hq))
                k1, g = k0 + 1, hq - k0
            b0, before = _rank_bucket(count, nb, k0)
            b1, _ = _rank_bucket(count, nb, k1)
            _pick_sorted(row, lo, inv, nb, b0, b1, pick)
            v = _lerp(pick[k0 - before], pick[k1 - before], g)
            if q == 0:
                low[j0 + i] = v
            else:
                high[j0 + i] = v


class Selection:
    """Scratch for `select_quantiles` on rows of S values, blocks of up to m rows, with numpy's sort for the rows
    it hands back: `quantiles` is sorting each row and taking sorted_quantiles, to the bit."""

    def __init__(self, S: int, m: int) -> None:
        self.count = np.empty(min(S, _SELECT_BUCKETS) + 1, dtype=np.int64)
        self.pick = np.empty(S)
        self.bad = np.empty(m, dtype=np.bool_)

    def quantiles(self, buf, m: int, h, low, high, j0: int) -> None:
        """low[j0 + i], high[j0 + i] = np.quantile(buf[i], p) for the virtual indexes h = (S - 1) p, i < m; the
        rows handed back are sorted in place (the others are only read)."""
        select_quantiles(buf, m, h, low, high, j0, self.count, self.pick, self.bad)
        for i in np.flatnonzero(self.bad[:m]):
            buf[i].sort()
            sorted_quantiles(buf[i : i + 1], 1, h, low, high, j0 + i)


@njit(nogil=True, cache=True)
def sort_bucketed(x, sign, row, order, count):
    """row = sign * x sorted ascending, order the positions it came from, ties kept in position order (a stable
    sort): a counting sort into nb equal-width buckets, then an insertion sort that moves a value only past
    strictly larger ones, O(n) for a smooth spread. Returns False, leaving row and order unusable, for a NaN or
    an infinite value, all values equal, or values crowded into few buckets (the insertion sort's moves passing
    16 n): those are for numpy's stable argsort. sign is 1 or -1 (exact); count is scratch of nb + 1, nb >= 1
    (the result is the stable sort whatever nb is; more buckets than values leave fewer values for the insertion
    sort to move: see BUCKETS_PER_VALUE)."""
    n = x.shape[0]
    lo = np.inf
    hi = -np.inf
    for i in range(n):
        v = sign * x[i]
        if not (abs(v) < np.inf):  # NaN or +-inf
            return False
        lo = min(lo, v)
        hi = max(hi, v)
    nb = count.shape[0] - 1
    span = hi - lo
    if not (span > 0.0) or not (span < np.inf) or not ((nb - 1) / span < np.inf):
        return False
    inv = (nb - 1) / span
    for b in range(nb + 1):
        count[b] = 0
    for i in range(n):
        count[_bucket(sign * x[i], lo, inv, nb) + 1] += 1
    for b in range(nb):
        count[b + 1] += count[b]
    for i in range(n):
        v = sign * x[i]
        b = _bucket(v, lo, inv, nb)
        q = count[b]
        count[b] = q + 1
        row[q] = v
        order[q] = i
    budget = _MOVES_PER_VALUE * n
    for i in range(1, n):
        v = row[i]
        if v < row[i - 1]:
            k = order[i]
            q = i
            while q > 0 and row[q - 1] > v:
                row[q] = row[q - 1]
                order[q] = order[q - 1]
                q -= 1
            row[q] = v
            order[q] = k
            budget -= i - q
            if budget < 0:
                return False
    return True


def sort_counts(n: int) -> np.ndarray:
    """Scratch counts for `sort_bucketed` of n values: BUCKETS_PER_VALUE buckets per value, at most
    _SORT_BUCKETS_MAX (but never fewer than n)."""
    return np.empty(max(n, min(BUCKETS_PER_VALUE * n, _SORT_BUCKETS_MAX)) + 1, dtype=np.int64)


@njit(nogil=True, cache=True)
def rank_rows(x, sign, s0, s1, ranks, slot_v, slot_i, count, bad):
    """ranks[s, j] for the draws s0 .. s1 - 1 of x (S, J), ranked by sign * x (see the module notes); bad[s] is
    set for a draw handed back. Scratch: slot_v (J,), slot_i (J,), count (`sort_counts(J)`)."""
    J = x.shape[1]
    for s in range(s0, s1):
        if J == 1:
            bad[s] = not (abs(x[s, 0]) < np.inf)
            ranks[s, 0] = 1
            continue
        # largest first, ties in position order: an ascending stable sort of -sign * x
        bad[s] = not sort_bucketed(x[s], -sign, slot_v, slot_i, count)
        if not bad[s]:
            for i in range(J):
                ranks[s, slot_i[i]] = i + 1


@njit(nogil=True, cache=True)
def select_kth(a, n, kth, sign):
    """Reorder a[:n] so that a[kth] is its (kth + 1)-th smallest value (largest when sign is -1), with nothing
    after it smaller (larger) and nothing before it larger (smaller); returns a[kth]. Hoare's selection, in
    place."""
    lo = 0
    hi = n - 1
    while lo < hi:
        mid = (lo + hi) // 2
        x, y, z = sign * a[lo], sign * a[mid], sign * a[hi]  # the median of three as the pivot
        pivot = max(min(x, y), min(max(x, y), z))
        i = lo
        j = hi
        while i <= j:
            while sign * a[i] < pivot:
                i += 1
            while sign * a[j] > pivot:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if kth <= j:
            hi = j
        elif kth >= i:
            lo = i
        else:
            break
    return a[kth]


@njit(nogil=True, cache=True)
def fold_ranks(blk, rows, j0, j1, k, m, total, best, top, first, kl, low, nlow, tlow, kh, high, nhigh, thigh, tbuf):
    """Fold the ranks of draws blk[:rows] (draws x groups) into running per-group figures for the groups j0 .. j1
    - 1: the sum of the ranks, the draws ranked first and within the first k, the draws at each rank 1..m
    (first[j, r - 1]), and candidates for a group's kl smallest and kh largest ranks: a rank below the group's
    threshold tlow[j] (the kl-th smallest when low[j] was last full) is appended to low[j], and when low[j] is
    full its kl smallest are selected to its front and the threshold lowered (select_kth); the same for the
    largest. The wider low and high are than kl and kh, the rarer the selections. Almost every rank fails both thresholds, so the loop over the ranks
    is a few comparisons that are seldom true. The block's columns are laid out by group in tbuf first."""
    cap_l = low.shape[1]
    cap_h = high.shape[1]
    for c0 in range(j0, j1, tbuf.shape[0]):
        c1 = min(j1, c0 + tbuf.shape[0])
        for s0 in range(0, rows, _TILE):
            s1 = min(rows, s0 + _TILE)
            for i in range(c1 - c0):
                for s in range(s0, s1):
                    tbuf[i, s] = blk[s, c0 + i]
        for i in range(c1 - c0):
            j = c0 + i
            lo = low[j]
            hi = high[j]
            nl = nlow[j]
            nh = nhigh[j]
            tl = tlow[j]
            th = thigh[j]
            t = 0
            b = 0
            c = 0
            for s in range(rows):
                r = tbuf[i, s]
                t += r
                if r == 1:
                    b += 1
                if r <= k:
                    c += 1
                if r <= m:
                    first[j, r - 1] += 1
                if r < tl:
                    lo[nl] = r
                    nl += 1
                    if nl == cap_l:
                        tl = select_kth(lo, nl, kl - 1, 1)
                        nl = kl
                if r > th:
                    hi[nh] = r
                    nh += 1
                    if nh == cap_h:
                        th = select_kth(hi, nh, kh - 1, -1)
                        nh = kh
            total[j] += t
            best[j] += b
            top[j] += c
            nlow[j] = nl
            nhigh[j] = nh
            tlow[j] = tl
            thigh[j] = th


@njit(nogil=True, cache=True)
def interval_ends(low, nlow, kl, high, nhigh, kh, lo_end, hi_end):
    """lo_end[j] = the kl-th smallest of low[j, :nlow[j]], hi_end[j] = the kh-th largest of high[j, :nhigh[j]]
    (fold_ranks' candidates; reordered in place)."""
    for j in range(low.shape[0]):
        lo_end[j] = select_kth(low[j], nlow[j], kl - 1, 1)
        hi_end[j] = select_kth(high[j], nhigh[j], kh - 1, -1)
