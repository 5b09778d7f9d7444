"""Summary mode's sink: after each sweep of kernel.sweep, running per-group summaries instead of stored draws.

The sweep itself is kernel.sweep, called on the chain's own State, Work and Generator, so a chain run
here consumes its random stream draw for draw like a full-draw chain with the same seed: the draws are
the same, only what is kept of them differs. Nothing is allocated per sweep.

What each draw updates, per chain and per group j (internal units):

* pooling.answers.accumulate: Welford running means of theta_j (and its M2), sigma_j, the shrinkage
  weight, the out-of-specification fraction and lambda_j, and the counts of theta_j above / below the
  threshold, |theta_j - mu| above the allowed bias and lambda_j below its outlying cut (the same
  function a full run applies to its stored draws);
* counters of membership of the top k and of being the best;
* a histogram of x_q,j on a per-group grid fixed after warm-up, for theta_j (x = theta_j),
  sigma_j (x = log sigma_j), the shrinkage weight (x = its logit), the outside fraction (x = its
  logit) and, when asked, the bias theta_j - mu, with an underflow and an overflow bin and the
  smallest and largest x seen;
* the mid-rank of j in a bucket count of all groups (see below).

Ranks. Top k: a size-k min-heap scan over all J values (one comparison per group unless the
value enters the heap), exact. Mid-rank for every group: sign*theta is counted into G equal-width
buckets fixed after warm-up; a group's rank is between 1 + (groups in better buckets) and that plus
(its bucket's count - 1); the kernel adds the midpoint and half the width, so the mean rank carries
its own error bound. Rank intervals for every group: each draw counts the group's lower rank bound
into a per-group histogram on one shared rank grid (unit bins for the first ranks, then geometric)
and keeps the largest bucket count - 1 seen, which bounds upper - lower in every draw; see
rank_intervals. Kept groups: exact ranks each draw from their sorted values and one O(J) pass
that counts how many kept values each group exceeds (a lookup table over the kept range).

Ranks within levels (group-level categorical predictors): the same bucket count, one set of buckets per level
(max(1024, groups of the level) of them, placed after warm-up), gives each group's mid-rank among the groups of
its level and the half-width that bounds its error; P(best in the level) is an exact count (the largest value of
each level, a stable first-wins scan as for P(best)).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit

from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)
from . import answers as A
from .kernel import DF_IDX, ETA, MU, NU_IDX, S2, SIGMA2, sweep

# summarised quantities: rows of the pilot arrays and (through rowmap) of the histograms
Q_THETA, Q_LOGSIGMA, Q_LOGITW, Q_LOGITF, Q_BIAS = range(5)
N_Q = 5
# columns of the hyperparameter draws; Y_SR is the typical within-group sd sqrt(mean_j sigma_j^2)
Y_MU, Y_TAU, Y_S, Y_NU, Y_SIGMA, Y_SR, Y_DF = range(7)
N_Y = 7


class Shared(NamedTuple):
    """Read by every chain: what was asked (answers.A_* vector), the outlying cut per df grid point, k of the
    top k, log n_j, the histogram rows of the quantities, the grids, the rank buckets (lo, 1/width), the
    kept groups and the rank -> rank-bin table."""

    asked: np.ndarray
    cuts: np.ndarray
    k_top: int
    logn: np.ndarray
    rowmap: np.ndarray
    glo: np.ndarray
    ginv: np.ndarray
    bucket: np.ndarray
    kept: np.ndarray
    rank_bin: np.ndarray
    lev: np.ndarray = np.zeros(0, dtype=np.int64)
    lev_off: np.ndarray = np.zeros(1, dtype=np.int64)
    lev_bucket: np.ndarray = np.zeros((0, 2))


NB = 512  # groups per block of the per-draw passes (summarise)
HBUF = 16  # draws whose histogram bins are held in Acc.hbuf before they are counted (see flush)
_C_BITS = 27  # a bucket's packed entry (see summarise): count and first rank below 2**27, the rank bin below 2**8
_C_MASK = (1 << _C_BITS) - 1
MAX_GROUPS = _C_MASK  # summary mode's largest J (the packed rank buckets' limit; far beyond the memory of a machine)


class Acc(NamedTuple):
    """One chain's running summaries and scratch: run (N_R, J), hits (N_H, J), hist (rows, J, B + 2),
    ext (rows, J, 2), rhist (J, RB), wmax (J,); scratch sg (J,), bcnt (G,) int64, bidx (J,) int32, count (1,);
    hbuf (HBUF, rows + 1, J) the bins of the draws not yet counted into hist (rows 0 .. rows - 1) and rhist (the
    last row), uint8 or uint16, and nbuf (1,) int64 how many draws it holds (see flush).
    Ranks within levels (empty without levels): lrun (3, J) sums of the mid-rank, of its half-width and the count
    of being the best of the level; scratch lcnt and labove (all levels' buckets), lidx (J,), lbest and lbest_j (L,)."""

    run: np.ndarray
    hits: np.ndarray
    hist: np.ndarray
    ext: np.ndarray
    rhist: np.ndarray
    wmax: np.ndarray
    sg: np.ndarray
    bcnt: np.ndarray
    bidx: np.ndarray
    count: np.ndarray
    hbuf: np.ndarray
    nbuf: np.ndarray
    lrun: np.ndarray = np.zeros((3, 0))
    lcnt: np.ndarray = np.zeros(0, dtype=np.int64)
    lidx: np.ndarray = np.zeros(0, dtype=np.int64)
    labove: np.ndarray = np.zeros(0, dtype=np.int64)
    lbest: np.ndarray = np.zeros(0)
    lbest_j: np.ndarray = np.zeros(0, dtype=np.int64)


class KeptRows(NamedTuple):
    """Stored rows of one chain: hyper (rows, N_Y + p: the predictors' coefficients after the fixed columns),
    evals (rows,), and the kept groups' theta, sigma,
    lambda and exact rank (rows, m) (sigma and lambda have 0 columns when the model has none per group)."""

    hyper: np.ndarray
    evals: np.ndarray
    theta: np.ndarray
    sigma: np.ndarray
    lam: np.ndarray
    rank: np.ndarray


@njit(nogil=True, cache=True)
def fill_sigma(d, st, sg):
    """sg[j] = sigma_j (separate) or sg[0] = sigma (shared); nothing for known."""
    if d.within == 0:
        for j in range(sg.shape[0]):
            sg[j] = math.sqrt(st.sigma2[j])
    elif d.within == 1:
        sg[0] = math.sqrt(st.scalars[SIGMA2])


@njit(nogil=True, cache=True)
def pilot(rng, n_sweeps, d, st, wk, sg, asked, logn, bias_on, limits, count, mean, msq):
    """Warm-up sweeps (the slice width still adapting) that keep, per group, the Welford mean and M2 of
    x_q for every summarised quantity q; the histogram grids are placed from them after warm-up.

    count[0] is the number of sweeps accumulated so far; mean and msq are (N_Q, J).
    """
    J = d.ybar.shape[0]
    heavy = st.lam.shape[0] > 0
    for _ in range(n_sweeps):
        sweep(rng, True, d, st, wk)
        fill_sigma(d, st, sg)
        count[0] += 1.0
        inv = 1.0 / count[0]
        tau2 = math.exp(2.0 * st.scalars[ETA])
        for j in range(J):
            x = st.theta[j]
            dl = x - mean[Q_THETA, j]
            mean[Q_THETA, j] += dl * inv
            msq[Q_THETA, j] += dl * (x - mean[Q_THETA, j])
            if bias_on:
                x = st.theta[j] - A.centre_of(st.scalars[MU], d.X, st.beta, j)
                dl = x - mean[Q_BIAS, j]
                mean[Q_BIAS, j] += dl * inv
                msq[Q_BIAS, j] += dl * (x - mean[Q_BIAS, j])
            if d.within == 0:
                x = math.log(sg[j])
                dl = x - mean[Q_LOGSIGMA, j]
                mean[Q_LOGSIGMA, j] += dl * inv
                msq[Q_LOGSIGMA, j] += dl * (x - mean[Q_LOGSIGMA, j])
            if d.within == 0 or heavy:  # else the weight is one function of tau (and sigma): exact from their draws
                t = tau2 / st.lam[j] if heavy else tau2
                x = A.logit_shrink(A.v_of(d.within, d.n, d.v_known, j, sg[j] if d.within == 0 else sg[0]), t)
                dl = x - mean[Q_LOGITW, j]
                mean[Q_LOGITW, j] += dl * inv
                msq[Q_LOGITW, j] += dl * (x - mean[Q_LOGITW, j])
            if limits:
                s = sg[j] if d.within == 0 else sg[0]
                f, g = A.outside(st.theta[j], s, asked)
                x = A.logit_pair(f, g)
                dl = x - mean[Q_LOGITF, j]
                mean[Q_LOGITF, j] += dl * inv
                msq[Q_LOGITF, j] += dl * (x - mean[Q_LOGITF, j])


@njit(nogil=True, cache=True)
def _extreme(ext, i, x, below):
    """Keep x if it is the smallest value seen below grid i (below) or the largest above it; ext (n, 2)."""
    if below:
        if x < ext[i, 0]:
            ext[i, 0] = x
    elif x > ext[i, 1]:
        ext[i, 1] = x


@njit(nogil=True, cache=True)
def _bins(x, lo, inv, ext, out, B):
    """out[i] = the bin of x[i] in its grid (lo[i], inv[i] = 1 / bin width): 0 below, 1..B inside, B + 1 above,
    for a block of groups of one histogram row (ext, out: the same block). The smallest value below the grid and
    the largest above it bound the outer bins (inner bins need no such bound) and are kept here, at once; the bin
    is counted later (flush). The bin is chosen by selects and the rare outer bins tested on the result, in a
    loop of its own: branching on u, or calling a function per group, made this loop ten times slower."""
    for i in range(x.shape[0]):
        u = (x[i] - lo[i]) * inv[i]
        b = 0 if u < 0.0 else (B + 1 if u >= B else int(u) + 1)
        if b == 0 or b == B + 1:
            _extreme(ext, i, x[i], b == 0)
        out[i] = b


@njit(nogil=True, cache=True)
def _hist_add(hist, ext, glo, ginv, row, j, x, B):
    """Count x into group j's grid of row `row` at once: what summarise does through _bins, the buffer and flush."""
    b = np.empty(1, dtype=np.int64)
    _bins(np.full(1, x), glo[row, j : j + 1], ginv[row, j : j + 1], ext[row, j : j + 1], b, B)
    hist[row, j, b[0]] += 1


@njit(nogil=True, cache=True)
def flush(acc):
    """Count the bins held in acc.hbuf into the histograms (hist, rhist) and empty it.

    Why a buffer: at a million groups the histograms (hundreds of MB) are far beyond the caches, so counting
    each draw at once costs a cache miss per group and histogram in every draw. The draw writes its bins in
    rows of J small integers instead (a sequential write), and every HBUF draws each group's histograms are
    updated together, a block of groups at a time, while they are in cache. Counts are sums, so the histograms
    are the same, only filled later: summarise flushes when the buffer is full, and the chain's run at the end
    of every call (pooling.summary._SummaryChain.run), before anything reads them.
    """
    n = acc.nbuf[0]
    if n == 0:
        return
    hist, rhist, buf = acc.hist, acc.rhist, acc.hbuf
    rows = hist.shape[0]
    J = hist.shape[1]
    step = 2048
    for j0 in range(0, J, step):
        j1 = min(j0 + step, J)
        for r in range(rows):
            for s in range(n):
                for j in range(j0, j1):
                    hist[r, j, buf[s, r, j]] += 1
        for s in range(n):
            for j in range(j0, j1):
                rhist[j, buf[s, rows, j]] += 1
    acc.nbuf[0] = 0


@njit(nogil=True, cache=True)
def _sift_down(hx, hi, size):
    """Restore the min-heap property of (hx, hi)[:size] after its root was replaced."""
    p = 0
    while True:
        c = 2 * p + 1
        if c >= size:
            return
        if c + 1 < size and hx[c + 1] < hx[c]:
            c += 1
        if hx[c] < hx[p]:
            hx[p], hx[c] = hx[c], hx[p]
            hi[p], hi[c] = hi[c], hi[p]
            p = c
        else:
            return


@njit(nogil=True, cache=True)
def _sift_up(hx, hi, pos):
    """Restore the min-heap property after an element was added at `pos` (moves it toward the root)."""
    while pos > 0:
        parent = (pos - 1) // 2
        if hx[pos] < hx[parent]:
            hx[pos], hx[parent] = hx[parent], hx[pos]
            hi[pos], hi[parent] = hi[parent], hi[pos]
            pos = parent
        else:
            return


@njit(nogil=True, cache=True)
def summarise(rng, n_sweeps, d, st, wk, sh, acc, out):
    """Run n_sweeps post-warm-up sweeps, updating the running summaries (see the module notes) and storing
    the hyperparameters and the kept groups' draws in rows 0 .. n_sweeps - 1 of `out` (KeptRows)."""
    J = d.ybar.shape[0]
    hist = acc.hist
    ext = acc.ext
    B = hist.shape[2] - 2
    hbuf = acc.hbuf
    r_rank = hist.shape[0]  # the buffer's row of the rank bins
    bcnt = acc.bcnt
    bidx = acc.bidx
    G = bcnt.shape[0]
    kept = sh.kept
    m = kept.shape[0]
    glo, ginv, rowmap = sh.glo, sh.ginv, sh.rowmap
    asked = sh.asked
    sign = asked[A.A_SIGN]
    limits = asked[A.A_LIMITS] > 0.0
    r_sig, r_w, r_f, r_bias = rowmap[Q_LOGSIGMA], rowmap[Q_LOGITW], rowmap[Q_LOGITF], rowmap[Q_BIAS]
    heavy = st.lam.shape[0] > 0
    sg = acc.sg
    run, hits = acc.run, acc.hits
    k = min(sh.k_top, J)
    hx = np.empty(k)
    hi = np.empty(k, dtype=np.int64)
    blo, binv = sh.bucket[0], sh.bucket[1]
    # kept groups: sorted values, and a lookup table from a value to its count of smaller kept values
    # cells: a group's count is cell[c] corrected by the walks below, whose iterations (a branch the processor
    # cannot predict) are rarer the finer the cells; up to 32 a kept group where J is large enough to pay for them
    L = max(4 * m, min(32 * m, J // 16)) if m > 0 else 1
    sv = np.empty(m)
    ss = np.empty(m)
    cell = np.empty(L, dtype=np.int64)
    poscnt = np.empty(m + 1, dtype=np.int64)
    xs = np.empty(NB)
    xw = np.empty(NB)
    xq = np.empty(NB)
    eb = np.empty(NB, dtype=np.int64)
    theta = st.theta
    sc = st.scalars
    for it in range(n_sweeps):
        ev = sweep(rng, False, d, st, wk)
        fill_sigma(d, st, sg)
        acc.count[0] += 1.0
        inv = 1.0 / acc.count[0]
        eta = sc[ETA]
        tau2 = math.exp(2.0 * eta)
        mu = sc[MU]
        cut = sh.cuts[int(sc[DF_IDX])] if heavy else 0.0
        A.accumulate(d.within, d.n, d.v_known, mu, tau2, theta, sg, st.lam, cut, asked, inv, run, hits, d.X, st.beta)
        row = it
        h = out.hyper
        h[row, Y_MU] = mu
        h[row, Y_TAU] = math.exp(eta)
        h[row, Y_S] = math.sqrt(sc[S2]) if d.within == 0 else 0.0
        h[row, Y_NU] = d.nu_grid[int(sc[NU_IDX])] if d.within == 0 else 0.0
        h[row, Y_SIGMA] = sg[0] if d.within == 1 else 0.0
        h[row, Y_DF] = d.df_grid[int(sc[DF_IDX])] if heavy else math.inf
        for a_ in range(st.beta.shape[0]):  # the predictors' coefficients follow the fixed columns
            h[row, N_Y + a_] = st.beta[a_]
        out.evals[row] = ev
        # kept groups first: their sorted values set up the exact-rank lookup for the pass over J
        for i in range(m):
            sv[i] = sign * theta[kept[i]]
            out.theta[row, i] = theta[kept[i]]
            if d.within == 0:
                out.sigma[row, i] = sg[kept[i]]
            if heavy:
                out.lam[row, i] = st.lam[kept[i]]
        order = np.argsort(sv)
        for r in range(m):
            ss[r] = sv[order[r]]
        cinv = 0.0
        if m > 0 and ss[m - 1] > ss[0]:
            cinv = L / (ss[m - 1] - ss[0])
            p = 0
            for c in range(L):
                edge = ss[0] + c / cinv
                while p < m and ss[p] < edge:
                    p += 1
                cell[c] = p
        for r in range(m + 1):
            poscnt[r] = 0
        for b in range(G):
            bcnt[b] = 0
        slot = acc.nbuf[0]
        size = 0
        best_x = -np.inf
        best_j = 0
        s2_sum = 0.0
        # a block of groups at a time, each step a short loop of its own: in one long loop body the
        # processor cannot overlap one group's logs, divisions and cache misses with the next group's
        for j0 in range(0, J, NB):
            j1 = min(j0 + NB, J)
            # the transformed quantities (the same expressions as always, so the same numbers)
            if d.within == 0:
                for j in range(j0, j1):
                    xs[j - j0] = math.log(sg[j])
            if r_w >= 0:  # separate, or heavy tails: lambda_j moves each group's weight on its own
                for j in range(j0, j1):
                    t = tau2 / st.lam[j] if heavy else tau2
                    v = A.v_of(d.within, d.n, d.v_known, j, sg[j] if d.within == 0 else sg[0])
                    xw[j - j0] = A.logit_shrink(v, t)
            # the rank buckets: a count per bucket (read back in the second pass)
            for j in range(j0, j1):
                u = (sign * theta[j] - blo) * binv
                b = 0 if u < 0.0 else (G - 1 if u >= G else int(u))
                bidx[j] = b
                bcnt[b] += 1
            n_ = j1 - j0
            _bins(theta[j0:j1], glo[0, j0:j1], ginv[0, j0:j1], ext[0, j0:j1], hbuf[slot, 0, j0:j1], B)
            if r_bias >= 0:
                for j in range(j0, j1):
                    xq[j - j0] = theta[j] - A.centre_of(mu, d.X, st.beta, j)
                _bins(
                    xq[:n_], glo[r_bias, j0:j1], ginv[r_bias, j0:j1], ext[r_bias, j0:j1], hbuf[slot, r_bias, j0:j1], B
                )
            if d.within == 0:
                for j in range(j0, j1):
                    s = sg[j]
                    s2_sum += s * s
                _bins(xs[:n_], glo[r_sig, j0:j1], ginv[r_sig, j0:j1], ext[r_sig, j0:j1], hbuf[slot, r_sig, j0:j1], B)
            if r_w >= 0:
                _bins(xw[:n_], glo[r_w, j0:j1], ginv[r_w, j0:j1], ext[r_w, j0:j1], hbuf[slot, r_w, j0:j1], B)
            if limits:
                for j in range(j0, j1):
                    f, g = A.outside(theta[j], sg[j] if d.within == 0 else sg[0], asked)
                    xq[j - j0] = A.logit_pair(f, g)
                _bins(xq[:n_], glo[r_f, j0:j1], ginv[r_f, j0:j1], ext[r_f, j0:j1], hbuf[slot, r_f, j0:j1], B)
            # ranks: x = sign * theta, larger is better
            for j in range(j0, j1):
                x = sign * theta[j]
                if x > best_x:  # strict: among equal values the first group wins, as a stable sort does
                    best_x = x
                    best_j = j
                if size < k:
                    hx[size] = x
                    hi[size] = j
                    _sift_up(hx, hi, size)
                    size += 1
                elif x > hx[0]:
                    hx[0] = x
                    hi[0] = j
                    _sift_down(hx, hi, size)
                if m > 0:
                    if x <= ss[0]:
                        pos = 0
                    elif x > ss[m - 1]:
                        pos = m
                    else:
                        c = int((x - ss[0]) * cinv)
                        if c >= L:
                            c = L - 1
                        pos = cell[c]
                        while pos > 0 and ss[pos - 1] >= x:  # guards a cell edge rounded past x
                            pos -= 1
                        while pos < m and ss[pos] < x:
                            pos += 1
                    poscnt[pos] += 1
        if d.within == 0:
            h[row, Y_SR] = math.sqrt(s2_sum / J)
        elif d.within == 1:
            h[row, Y_SR] = sg[0]
        else:
            h[row, Y_SR] = 0.0
        for t_ in range(size):
            hits[A.H_TOP, hi[t_]] += 1
        hits[A.H_BEST, best_j] += 1
        # each bucket's count becomes one packed entry: (groups in better buckets) << 35 | (the rank bin of
        # 1 + that) << 27 | count, so that the pass over the groups reads one number per group (at a million
        # buckets, three tables read at random cost three cache misses a group)
        cum = 0
        for b in range(G - 1, -1, -1):
            c = bcnt[b]
            # 1 + cum <= J + 1 always; the rank bin is only used when the bucket holds a group
            bcnt[b] = (cum << (_C_BITS + 8)) | (sh.rank_bin[1 + cum] << _C_BITS) | c
            cum += c
        wmax = acc.wmax
        for j0 in range(0, J, NB):
            j1 = min(j0 + NB, J)
            for j in range(j0, j1):  # the reads at random first, in a loop of their own, so that they overlap
                eb[j - j0] = bcnt[bidx[j]]
            for j in range(j0, j1):
                e = eb[j - j0]
                c = e & _C_MASK
                run[A.R_RANK, j] += (e >> (_C_BITS + 8)) + 0.5 * (c + 1)
                run[A.R_RANK_ERR, j] += 0.5 * (c - 1)
                hbuf[slot, r_rank, j] = (e >> _C_BITS) & 255
                if c - 1 > wmax[j]:
                    wmax[j] = c - 1
        # exact ranks of the kept groups: poscnt[p] counts the groups that exceed exactly p kept values,
        # so the kept value ss[r - 1] is exceeded by the groups with p >= r, and its rank is 1 + that
        cum = 0
        for r in range(m, 0, -1):
            cum += poscnt[r]
            out.rank[row, order[r - 1]] = 1 + cum
        if sh.lev.shape[0] > 0:
            level_ranks(theta, sign, sh, acc)
        acc.nbuf[0] = slot + 1
        if slot + 1 == hbuf.shape[0]:
            flush(acc)


@njit(nogil=True, cache=True)
def level_ranks(theta, sign, sh, acc):
    """One draw's ranks within levels (see the module notes): each group counted into its level's buckets, then
    its mid-rank among its level and the half-width added to acc.lrun, and each level's best group counted."""
    lev, off, lb = sh.lev, sh.lev_off, sh.lev_bucket
    L = lb.shape[0]
    lcnt, lidx, labove = acc.lcnt, acc.lidx, acc.labove
    for b in range(lcnt.shape[0]):
        lcnt[b] = 0
    for i in range(L):
        acc.lbest[i] = -np.inf
        acc.lbest_j[i] = -1
    for j in range(theta.shape[0]):
        i = lev[j]
        x = sign * theta[j]
        G = off[i + 1] - off[i]
        u = (x - lb[i, 0]) * lb[i, 1]
        if u < 0.0:
            b = 0
        elif u >= G:
            b = G - 1
        else:
            b = int(u)
        lidx[j] = off[i] + b
        lcnt[off[i] + b] += 1
        if x > acc.lbest[i]:  # strict: among equal values the first group wins
            acc.lbest[i] = x
            acc.lbest_j[i] = j
    for i in range(L):
        cum = 0
        for b in range(off[i + 1] - 1, off[i] - 1, -1):
            labove[b] = cum
            cum += lcnt[b]
        if acc.lbest_j[i] >= 0:
            acc.lrun[2, acc.lbest_j[i]] += 1.0
    for j in range(theta.shape[0]):
        b = lidx[j]
        c = lcnt[b]
        acc.lrun[0, j] += labove[b] + 0.5 * (c + 1)
        acc.lrun[1, j] += 0.5 * (c - 1)


@njit(nogil=True, cache=True)
def _order_stat(counts, r, mn, mx, lo0, w, B):
    """(estimate, left, right): the bin [left, right] that holds the r-th smallest draw (0-based) and a
    linear interpolation inside it."""
    cum = 0
    for b in range(B + 2):
        c = counts[b]
        if r < cum + c:
            if b == 0:
                left, right = mn, lo0
            elif b == B + 1:
                left, right = lo0 + B * w, mx
            else:
                left, right = lo0 + (b - 1) * w, lo0 + b * w
            if right < left:  # values beyond an edge by less than its rounding
                left, right = right, left
            frac = (r - cum + 0.5) / c
            return left + frac * (right - left), left, right
        cum += c
    return mx, mx, mx


@njit(nogil=True, cache=True)
def _to_quantity(x, kind):
    """x in the histogram's scale -> the quantity in internal units: 0 theta or bias (x), 1 sigma
    (exp(x)), 2 a weight or a fraction (1 / (1 + exp(-x)))."""
    if kind == 0:
        return x
    if kind == 1:
        return math.exp(x)
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


@njit(nogil=True, cache=True)
def hist_quantiles(hist, ext, glo, gw, row, probs, kind, est, err):
    """Per group, the quantiles `probs` of the pooled draws of one quantity, estimated from the chains'
    histograms; est and err are (len(probs), J), in internal units.

    The quantile is numpy's default (linear): with S draws, h = (S - 1) p, i = floor(h), g = h - i,
    q = x_(i) + g (x_(i+1) - x_(i)). Each order statistic x_(i) is located exactly in its bin by the
    counts and estimated by linear interpolation inside the bin, so it is off by at most the bin's
    width; err is (1 - g) e_i + g e_(i+1), e_i the largest distance, in the quantity's units, from the
    estimate to either end of x_(i)'s bin (the transform to the quantity is monotone).
    """
    C = hist.shape[0]
    J = hist.shape[2]
    B = hist.shape[3] - 2
    counts = np.empty(B + 2, dtype=np.int64)
    for j in range(J):
        total = 0
        for b in range(B + 2):
            s = 0
            for c in range(C):
                s += hist[c, row, j, b]
            counts[b] = s
            total += s
        mn = np.inf
        mx = -np.inf
        for c in range(C):
            mn = min(mn, ext[c, row, j, 0])
            mx = max(mx, ext[c, row, j, 1])
        lo0 = glo[row, j]
        w = gw[row, j]
        for q in range(probs.shape[0]):
            h = (total - 1) * probs[q]
            i0 = int(math.floor(h))
            g = h - i0
            i1 = min(i0 + 1, total - 1)
            e0, a0, b0 = _order_stat(counts, i0, mn, mx, lo0, w, B)
            e1, a1, b1 = _order_stat(counts, i1, mn, mx, lo0, w, B)
            u0 = _to_quantity(e0, kind)
            u1 = _to_quantity(e1, kind)
            d0 = max(abs(_to_quantity(b0, kind) - u0), abs(u0 - _to_quantity(a0, kind)))
            d1 = max(abs(_to_quantity(b1, kind) - u1), abs(u1 - _to_quantity(a1, kind)))
            est[q, j] = u0 + g * (u1 - u0)
            err[q, j] = (1.0 - g) * d0 + g * d1


@njit(nogil=True, cache=True)
def rank_intervals(rhist, wmax, edges, i_lo, i_hi, J, low, high, err):
    """Per group, an interval [low, high] that contains the exact rank interval [r_(i_lo), r_(i_hi)]
    (order statistics, 0-based, of the group's ranks over all draws), and err, the largest distance
    from either reported end to the exact one.

    In every draw s, lo_s <= r_s <= lo_s + W (W = wmax over chains), so the i-th smallest r lies
    between the i-th smallest lo and that plus W. The counts locate the i-th smallest lo exactly in
    its bin [edges[b], edges[b + 1] - 1]: so r_(i_lo) is in [edges[b], edges[b + 1] - 1 + W] and
    r_(i_hi) in [edges[b'], edges[b' + 1] - 1 + W]; low is the first end, high the last (at most J).
    rhist (C, J, RB), wmax (C, J).
    """
    C = rhist.shape[0]
    RB = rhist.shape[2]
    counts = np.empty(RB, dtype=np.int64)
    for j in range(J):
        W = 0
        for c in range(C):
            if wmax[c, j] > W:
                W = wmax[c, j]
        for b in range(RB):
            s = 0
            for c in range(C):
                s += rhist[c, j, b]
            counts[b] = s
        cum = 0
        b_lo = -1
        b_hi = -1
        for b in range(RB):
            cum += counts[b]
            if b_lo < 0 and cum > i_lo:
                b_lo = b
            if cum > i_hi:
                b_hi = b
                break
        if b_lo < 0:  # fewer counts than draws (an interrupted chain): the widest honest answer
            b_lo = 0
        if b_hi < 0:
            b_hi = RB - 1
        a_lo = edges[b_lo]
        z_lo = min(edges[b_lo + 1] - 1 + W, J)
        a_hi = edges[b_hi]
        z_hi = min(edges[b_hi + 1] - 1 + W, J)
        low[j] = a_lo
        high[j] = z_hi
        err[j] = max(z_lo - a_lo, z_hi - a_hi)
