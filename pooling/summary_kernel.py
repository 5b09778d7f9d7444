"""Summary mode's kernel: the sweeps of kernel.py, with running per-group summaries instead of stored draws.

Each draw is one call of kernel.sweeps itself (n_sweeps = 1) on the chain's Generator, so the sweep's
mathematics exist once, in kernel.py, whatever changes there, and a chain run here consumes its random
stream draw for draw like a full-draw chain with the same seed: the draws are the same, only what is
kept of them differs.

What each draw updates, per chain and per group j (internal units unless said otherwise):

* Welford running mean (and M2 for theta) of theta_j, sigma_j, the shrinkage weight
  w_j = v_j / (v_j + tau^2) and the out-of-specification fraction
  f_j = Phi((L - theta_j) / sigma_j) + Phi((theta_j - U) / sigma_j) (user units);
* counters of theta_j > threshold, theta_j < threshold, |theta_j - mu| > allowed bias (user units,
  the same arithmetic as the reporter's), membership of the top k and being the best;
* a histogram of x_q,j on a per-group grid fixed after warm-up, for theta_j (x = theta_j),
  sigma_j (x = log sigma_j), w_j (x = logit w_j = log v_j - log tau^2), f_j (x = logit f_j) and,
  when asked, the bias theta_j - mu, with an underflow and an overflow bin and the smallest and
  largest x seen;
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
"""
from __future__ import annotations
from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)

import math

import numpy as np
from numba import njit

from .kernel import ETA, MU, SIGMA2, sweeps

# summarised quantities: rows of the pilot arrays and (through rowmap) of the histograms
Q_THETA, Q_LOGSIGMA, Q_LOGITW, Q_LOGITF, Q_BIAS = range(5)
N_Q = 5
# running means, rows of `run`
R_THETA, R_THETA_M2, R_SIGMA, R_SHRINK, R_OUT, R_RANK, R_RANK_ERR = range(7)
N_R = 7
# counters, rows of `hits`
H_ABOVE, H_BELOW, H_BIAS, H_TOP, H_BEST = range(5)
N_H = 5
# the options vector
(O_CENTER, O_SCALE, O_SIGN, O_THR, O_LOWER, O_UPPER, O_BIAS, O_HAS_THR, O_HAS_LOWER, O_HAS_UPPER, O_HAS_BIAS,
 O_LIMITS) = range(12)
N_O = 12
# columns of the hyperparameter draws; Y_SR is the typical within-group sd sqrt(mean_j sigma_j^2)
Y_MU, Y_TAU, Y_S, Y_NU, Y_SIGMA, Y_SR = range(6)
N_Y = 6
# the smallest probability kept apart from 0 on the logit scale of f (ndtr underflows below ~1e-300 anyway)
TINY = 1e-300
_SQRT1_2 = 0.7071067811865476


@njit(nogil=True, cache=True)
def phi(x):
    """Standard normal cdf Phi(x) = erfc(-x / sqrt(2)) / 2."""
    return 0.5 * math.erfc(-x * _SQRT1_2)


@njit(nogil=True, cache=True)
def outside(th_u, sg_u, opt):
    """(f, 1 - f) for f = P(y outside [L, U] | theta, sigma) = Phi((L - theta)/sigma) + Phi((theta - U)/sigma),
    y ~ N(theta, sigma^2), each with its own relative precision: when f >= 1/2 the inside probability
    Phi((U - theta)/sigma) - Phi((L - theta)/sigma) is computed, not formed as 1 - f."""
    has_l = opt[O_HAS_LOWER] > 0.0
    has_u = opt[O_HAS_UPPER] > 0.0
    a = (opt[O_LOWER] - th_u) / sg_u
    b = (th_u - opt[O_UPPER]) / sg_u
    pa = phi(a) if has_l else 0.0
    pb = phi(b) if has_u else 0.0
    f = pa + pb
    if f < 0.5:
        return f, 1.0 - f  # 1 - f >= 1/2 carries full relative precision
    g = (phi(-b) if has_u else 1.0) - pa
    return f, g


@njit(nogil=True, cache=True)
def logit_pair(f, g):
    """log(f / g) with both floored at TINY: the logit of f when g = 1 - f."""
    return math.log(max(f, TINY)) - math.log(max(g, TINY))


@njit(nogil=True, cache=True)
def _buffers(within, J, rows):
    """Output rows for kernel.sweeps, shaped as the sampler's (rows = 0: nothing is stored)."""
    sig = J if within == 0 else 1 if within == 1 else 0
    hyp = rows if within == 0 else 0
    return (np.empty(rows), np.empty(rows), np.empty((rows, J)), np.empty((rows, sig)), np.empty(hyp),
            np.empty(hyp), np.empty(rows))


@njit(nogil=True, cache=True)
def pilot_sweeps(rng, n_sweeps, within, n, ybar, m2, v_known, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale,
                 s2_shape, s2_rate, nu_grid, nu_logprior, nu_table, layout, state, theta, sigma2, logn, opt, bias_on, count,
                 mean, msq):
    """Warm-up sweeps (the slice width still adapting) that keep, per group, the Welford mean and M2 of
    x_q for every summarised quantity q; the histogram grids are placed from them after warm-up.

    count[0] is the number of sweeps accumulated so far; mean and msq are (N_Q, J); bias_on: keep
    the bias row too.
    """
    J = ybar.shape[0]
    o_mu, o_tau, o_theta, o_sigma, o_s, o_nu, o_ev = _buffers(within, J, 0)
    center, scale = opt[O_CENTER], opt[O_SCALE]
    limits = opt[O_LIMITS] > 0.0
    for it in range(n_sweeps):
        sweeps(rng, 1, True, within, n, ybar, m2, v_known, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale,
               s2_shape, s2_rate, nu_grid, nu_logprior, nu_table, layout, state, theta, sigma2, o_mu, o_tau, o_theta, o_sigma, o_s,
               o_nu, o_ev, 0)
        count[0] += 1.0
        inv = 1.0 / count[0]
        eta = state[ETA]
        for j in range(J):
            x = theta[j]
            d = x - mean[Q_THETA, j]
            mean[Q_THETA, j] += d * inv
            msq[Q_THETA, j] += d * (x - mean[Q_THETA, j])
            if bias_on:
                x = theta[j] - state[MU]
                d = x - mean[Q_BIAS, j]
                mean[Q_BIAS, j] += d * inv
                msq[Q_BIAS, j] += d * (x - mean[Q_BIAS, j])
            if within == 0:
                ls = math.log(sigma2[j])
                x = 0.5 * ls
                d = x - mean[Q_LOGSIGMA, j]
                mean[Q_LOGSIGMA, j] += d * inv
                msq[Q_LOGSIGMA, j] += d * (x - mean[Q_LOGSIGMA, j])
                x = ls - logn[j] - 2.0 * eta
                d = x - mean[Q_LOGITW, j]
                mean[Q_LOGITW, j] += d * inv
                msq[Q_LOGITW, j] += d * (x - mean[Q_LOGITW, j])
            if limits:
                s2j = sigma2[j] if within == 0 else state[SIGMA2]
                f, g = outside(theta[j] * scale + center, math.sqrt(s2j) * scale, opt)
                x = logit_pair(f, g)
                d = x - mean[Q_LOGITF, j]
                mean[Q_LOGITF, j] += d * inv
                msq[Q_LOGITF, j] += d * (x - mean[Q_LOGITF, j])


@njit(nogil=True, cache=True, inline="always")
def _hist_add(hist, ext, glo, ginv, row, j, x, B):
    """Count x into group j's grid of row `row`: bin 0 below, 1..B inside, B + 1 above. The smallest
    value below the grid and the largest above it bound the outer bins (inner bins need no such bound)."""
    u = (x - glo[row, j]) * ginv[row, j]
    if u < 0.0:
        hist[row, j, 0] += 1
        if x < ext[row, j, 0]:
            ext[row, j, 0] = x
    elif u >= B:
        hist[row, j, B + 1] += 1
        if x > ext[row, j, 1]:
            ext[row, j, 1] = x
    else:
        hist[row, j, int(u) + 1] += 1


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
    while pos > 0:
        parent = (pos - 1) // 2
        if hx[pos] < hx[parent]:
            hx[pos], hx[parent] = hx[parent], hx[pos]
            hi[pos], hi[parent] = hi[parent], hi[pos]
            pos = parent
        else:
            return


@njit(nogil=True, cache=True)
def summary_sweeps(rng, n_sweeps, within, n, ybar, m2, v_known, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale,
                   s2_shape, s2_rate, nu_grid, nu_logprior, nu_table, layout, state, theta, sigma2, logn, opt, k_top, count,
                   run, hits, rowmap, glo, ginv, hist, ext, bucket, bcnt, bidx, kept, out_hyper, out_evals,
                   out_theta, out_sigma, out_rank, rank_bin, rhist, wmax, lobin):
    """Run n_sweeps post-warm-up sweeps, updating the running summaries (see the module notes).

    count[0]: draws accumulated so far by this chain. run (N_R, J) float64; hits (N_H, J) unsigned;
    rowmap (N_Q,) the histogram row of each quantity or -1; glo, ginv (rows, J) grid origin and
    1 / bin width; hist (rows, J, B + 2); ext (rows, J, 2) min and max; bucket = (lo, 1 / width) of
    the rank buckets, bcnt (G,) and bidx (J,) scratch; kept (m,) group indices whose draws are stored
    row by row into out_theta, out_sigma (separate) and out_rank (m,); out_hyper (rows, N_Y) holds
    mu, tau, s, nu, shared sigma and sqrt(mean_j sigma_j^2); out_evals the slice evaluations.
    Rank intervals of every group: rank_bin (J + 2,) maps a rank to its bin of the shared rank grid;
    rhist (J, RB) counts the bins of each draw's lower rank bound 1 + (groups in better buckets); wmax
    (J,) keeps the largest (bucket count - 1) seen, so upper bound <= lower bound + wmax in every draw;
    lobin (G,) scratch.
    """
    J = ybar.shape[0]
    B = hist.shape[2] - 2
    G = bcnt.shape[0]
    m = kept.shape[0]
    # one stored row, so that kernel.sweeps reports its slice evaluations
    o_mu, o_tau, o_theta, o_sigma, o_s, o_nu, o_ev = _buffers(within, J, 1)
    center, scale, sign = opt[O_CENTER], opt[O_SCALE], opt[O_SIGN]
    has_thr = opt[O_HAS_THR] > 0.0
    has_bias = opt[O_HAS_BIAS] > 0.0
    limits = opt[O_LIMITS] > 0.0
    thr, allowed = opt[O_THR], opt[O_BIAS]
    r_sig, r_w, r_f, r_bias = rowmap[Q_LOGSIGMA], rowmap[Q_LOGITW], rowmap[Q_LOGITF], rowmap[Q_BIAS]
    k = min(k_top, J)
    hx = np.empty(k)
    hi = np.empty(k, dtype=np.int64)
    blo, binv = bucket[0], bucket[1]
    above = np.empty(G, dtype=np.int64)
    # kept groups: sorted values, and a lookup table from a value to its count of smaller kept values
    L = 4 * m if m > 0 else 1
    sv = np.empty(m)
    ss = np.empty(m)
    cell = np.empty(L, dtype=np.int64)
    poscnt = np.empty(m + 1, dtype=np.int64)
    for it in range(n_sweeps):
        sweeps(rng, 1, False, within, n, ybar, m2, v_known, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale,
               s2_shape, s2_rate, nu_grid, nu_logprior, nu_table, layout, state, theta, sigma2, o_mu, o_tau, o_theta, o_sigma, o_s,
               o_nu, o_ev, 0)
        ev = o_ev[0]
        count[0] += 1.0
        inv = 1.0 / count[0]
        eta = state[ETA]
        tau2 = math.exp(2.0 * eta)
        mu_u = state[MU] * scale + center
        row = it
        # the stored draws are what kernel.sweeps stores in a full run
        out_hyper[row, Y_MU] = o_mu[0]
        out_hyper[row, Y_TAU] = o_tau[0]
        out_hyper[row, Y_S] = o_s[0] if within == 0 else 0.0
        out_hyper[row, Y_NU] = o_nu[0] if within == 0 else 0.0
        out_hyper[row, Y_SIGMA] = o_sigma[0, 0] if within == 1 else 0.0
        out_evals[row] = ev
        # kept groups first: their sorted values set up the exact-rank lookup for the pass over J
        for i in range(m):
            sv[i] = sign * theta[kept[i]]
            out_theta[row, i] = o_theta[0, kept[i]]
            if within == 0:
                out_sigma[row, i] = o_sigma[0, kept[i]]
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
        size = 0
        best_x = -np.inf
        best_j = 0
        s2_shared = state[SIGMA2]
        s2_sum = 0.0
        for j in range(J):
            th = theta[j]
            d = th - run[R_THETA, j]
            run[R_THETA, j] += d * inv
            run[R_THETA_M2, j] += d * (th - run[R_THETA, j])
            _hist_add(hist, ext, glo, ginv, 0, j, th, B)
            if r_bias >= 0:
                _hist_add(hist, ext, glo, ginv, r_bias, j, th - state[MU], B)
            if within == 0:
                s2j = sigma2[j]
                vj = s2j / n[j]
            elif within == 1:
                s2j = s2_shared
                vj = s2j / n[j]
            else:
                s2j = 1.0
                vj = v_known[j]
            w = vj / (vj + tau2)
            run[R_SHRINK, j] += (w - run[R_SHRINK, j]) * inv
            if within == 0:
                s2_sum += s2j
                ls = math.log(s2j)
                sg = math.sqrt(s2j)
                run[R_SIGMA, j] += (sg - run[R_SIGMA, j]) * inv
                _hist_add(hist, ext, glo, ginv, r_sig, j, 0.5 * ls, B)
                _hist_add(hist, ext, glo, ginv, r_w, j, ls - logn[j] - 2.0 * eta, B)
            th_u = th * scale + center  # the reporter's arithmetic on draws in user units
            if limits:
                f, g = outside(th_u, math.sqrt(s2j) * scale, opt)
                run[R_OUT, j] += (f - run[R_OUT, j]) * inv
                _hist_add(hist, ext, glo, ginv, r_f, j, logit_pair(f, g), B)
            if has_thr:
                if th_u > thr:
                    hits[H_ABOVE, j] += 1
                if th_u < thr:
                    hits[H_BELOW, j] += 1
            if has_bias and abs(th_u - mu_u) > allowed:
                hits[H_BIAS, j] += 1
            # ranks: x = sign * theta, larger is better
            x = sign * th
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
            u = (x - blo) * binv
            if u < 0.0:
                b = 0
            elif u >= G:
                b = G - 1
            else:
                b = int(u)
            bidx[j] = b
            bcnt[b] += 1
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
        if within == 0:
            out_hyper[row, Y_SR] = math.sqrt(s2_sum / J)
        elif within == 1:
            out_hyper[row, Y_SR] = math.sqrt(s2_shared)
        else:
            out_hyper[row, Y_SR] = 0.0
        for t in range(size):
            hits[H_TOP, hi[t]] += 1
        hits[H_BEST, best_j] += 1
        acc = 0
        for b in range(G - 1, -1, -1):
            above[b] = acc
            lobin[b] = rank_bin[1 + acc]  # 1 + acc <= J + 1 always; only used when the bucket holds a group
            acc += bcnt[b]
        for j in range(J):
            b = bidx[j]
            c = bcnt[b]
            run[R_RANK, j] += above[b] + 0.5 * (c + 1)
            run[R_RANK_ERR, j] += 0.5 * (c - 1)
            rhist[j, lobin[b]] += 1
            if c - 1 > wmax[j]:
                wmax[j] = c - 1
        # exact ranks of the kept groups: poscnt[p] counts the groups that exceed exactly p kept values,
        # so the kept value ss[r - 1] is exceeded by the groups with p >= r, and its rank is 1 + that
        acc = 0
        for r in range(m, 0, -1):
            acc += poscnt[r]
            out_rank[row, order[r - 1]] = 1 + acc


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
def _to_user(x, kind, scale, center):
    """x in the histogram's scale -> the user's quantity: 0 theta (x scale + center), 1 sigma
    (exp(x) scale), 2 a weight or a fraction (1 / (1 + exp(-x)))."""
    if kind == 0:
        return x * scale + center
    if kind == 1:
        return math.exp(x) * scale
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


@njit(nogil=True, cache=True)
def hist_quantiles(hist, ext, glo, gw, row, probs, kind, scale, center, est, err):
    """Per group, the quantiles `probs` of the pooled draws of one quantity, estimated from the chains'
    histograms; est and err are (len(probs), J).

    The quantile is numpy's default (linear): with S draws, h = (S - 1) p, i = floor(h), g = h - i,
    q = x_(i) + g (x_(i+1) - x_(i)). Each order statistic x_(i) is located exactly in its bin by the
    counts and estimated by linear interpolation inside the bin, so it is off by at most the bin's
    width; err is (1 - g) e_i + g e_(i+1), e_i the largest distance, in the user's units, from the
    estimate to either end of x_(i)'s bin (the transform to user units is monotone).
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
            u0 = _to_user(e0, kind, scale, center)
            u1 = _to_user(e1, kind, scale, center)
            d0 = max(abs(_to_user(b0, kind, scale, center) - u0), abs(u0 - _to_user(a0, kind, scale, center)))
            d1 = max(abs(_to_user(b1, kind, scale, center) - u1), abs(u1 - _to_user(a1, kind, scale, center)))
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
