"""Per-group answers, draw by draw: the formula of every per-draw quantity, and their running summaries.

This is the one place where a per-group answer is defined. Both ways of running use it:

* summary mode (pooling.summary) calls `accumulate` after every post-warm-up sweep, on the chain's
  state, and keeps nothing else of the draw but histograms and rank counts;
* a full run (pooling.results) calls the same `accumulate` over its stored draws, a block of groups at a time
  (`accumulate_stored`), and takes the exact intervals of the same quantities from `derived`, which applies
  the same formulas to stored draws.

Everything is in the engine's internal units (y' = (y - center) / scale, model.build): thresholds,
limits and the allowed bias are carried into those units once (`Asked.internal`), and results are
mapped back to the user's units at the very end (pooling.results).

Per draw and group j (v_j = sigma_j^2 / n_j, or se_j^2; t_j = tau^2 / lambda_j, tau^2 for the normal model):
    shrinkage weight  w_j = v_j / (v_j + t_j)      (0 keeps the group's own mean, 1 the pooled mean)
    outside fraction  f_j = Phi((L - theta_j) / sigma_j) + Phi((theta_j - U) / sigma_j)
    bias              b_j = theta_j - c_j, c_j the consensus value of the group's own level: mu without
                      predictors, mu + x_j' beta with them (see centre_of)
    outlying          lambda_j below the 5% point of its prior Gamma(df/2, rate df/2) at the draw's df
    mean outside      theta_j below the lower or above the upper specification limit
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)

# running means (rows of `run`); M2 for theta
R_THETA, R_THETA_M2, R_SIGMA, R_SHRINK, R_OUT, R_LAM, R_RANK, R_RANK_ERR = range(8)
N_R = 8
# counters (rows of `hits`)
H_ABOVE, H_BELOW, H_BIAS, H_TOP, H_BEST, H_OUTLYING, H_MEAN_OUT = range(7)
N_H = 7
# the asked-for constants in internal units (a float vector, see Asked.internal)
(A_THR, A_LOWER, A_UPPER, A_BIAS, A_HAS_THR, A_HAS_LOWER, A_HAS_UPPER, A_HAS_BIAS, A_LIMITS, A_SIGN) = range(10)
N_A = 10
# the smallest probability kept apart from 0 on the logit scale of f (erfc underflows below ~1e-300 anyway)
TINY = 1e-300
_SQRT1_2 = 0.7071067811865476
OUTLYING_PRIOR_TAIL = 0.05  # a group is outlying in a draw when lambda_j is below this quantile of its prior


@njit(nogil=True, cache=True)
def phi(x):
    """Standard normal cdf Phi(x) = erfc(-x / sqrt(2)) / 2."""
    return 0.5 * math.erfc(-x * _SQRT1_2)


@njit(nogil=True, cache=True)
def outside(th, sg, a):
    """(f, 1 - f) for f = P(y outside [L, U] | theta, sigma) = Phi((L - theta)/sigma) + Phi((theta - U)/sigma),
    y ~ N(theta, sigma^2), each with its own relative precision: when f >= 1/2 the inside probability
    Phi((U - theta)/sigma) - Phi((L - theta)/sigma) is computed, not formed as 1 - f. A missing limit adds nothing."""
    has_l = a[A_HAS_LOWER] > 0.0
    has_u = a[A_HAS_UPPER] > 0.0
    lo = (a[A_LOWER] - th) / sg
    hi = (th - a[A_UPPER]) / sg
    pa = phi(lo) if has_l else 0.0
    pb = phi(hi) if has_u else 0.0
    f = pa + pb
    if f < 0.5:
        return f, 1.0 - f  # 1 - f >= 1/2 carries full relative precision
    g = (phi(-hi) if has_u else 1.0) - pa
    return f, g


@njit(nogil=True, cache=True)
def logit_pair(f, g):
    """log(f / g) with both floored at TINY: the logit of f when g = 1 - f."""
    return math.log(max(f, TINY)) - math.log(max(g, TINY))


@njit(nogil=True, cache=True, inline="always")
def v_of(within, n, v_known, j, sg):
    """v_j: sigma^2 / n_j (separate, shared) or se_j^2 (known)."""
    if within == 2:
        return v_known[j]
    return sg * sg / n[j]


@njit(nogil=True, cache=True, inline="always")
def shrink(v, t):
    """w = v / (v + t): the shrinkage weight."""
    return v / (v + t)


@njit(nogil=True, cache=True, inline="always")
def logit_shrink(v, t):
    """log(w / (1 - w)) = log v - log t, without forming w (keeps its digits near 0 and 1)."""
    return math.log(v) - math.log(t)


@njit(nogil=True, cache=True, inline="always")
def centre_of(mu, X, beta, j):
    """c_j = mu + x_j' beta: the centre of group j's level (mu when there are no predictors, X of 0 columns),
    summed in the order the kernel sums it (kernel.block_a_reg), so both give the same number."""
    c = mu
    for k in range(X.shape[1]):
        c += X[j, k] * beta[k]
    return c


@njit(nogil=True, cache=True)
def accumulate(within, n, v_known, mu, tau2, theta, sig, lam, cut, a, inv, run, hits, X, beta):
    """Add one draw to the running summaries of every group (internal units).

    theta (J,); sig: sigma_j (J,), the shared sigma (1,) or nothing (known); lam: lambda_j (J,) or
    nothing (normal model); cut: the draw's outlying cut on lambda; a: Asked.internal; inv = 1 / (draws
    so far, this one included). run (N_R, J): Welford means (and M2 of theta); hits (N_H, J): counts.
    X (J, p), beta (p,): the group-level predictors and the draw's coefficients (p = 0: none); the bias is
    taken about each group's own centre mu + x_j' beta.
    """
    J = theta.shape[0]
    heavy = lam.shape[0] > 0
    limits = a[A_LIMITS] > 0.0
    has_thr = a[A_HAS_THR] > 0.0
    has_bias = a[A_HAS_BIAS] > 0.0
    has_lo = a[A_HAS_LOWER] > 0.0
    has_hi = a[A_HAS_UPPER] > 0.0
    thr = a[A_THR]
    allowed = a[A_BIAS]
    for j in range(J):
        th = theta[j]
        d = th - run[R_THETA, j]
        run[R_THETA, j] += d * inv
        run[R_THETA_M2, j] += d * (th - run[R_THETA, j])
        if within == 0:
            sg = sig[j]
        elif within == 1:
            sg = sig[0]
        else:
            sg = 0.0
        vj = v_of(within, n, v_known, j, sg)
        t = tau2 / lam[j] if heavy else tau2
        w = shrink(vj, t)
        run[R_SHRINK, j] += (w - run[R_SHRINK, j]) * inv
        if within != 2:
            run[R_SIGMA, j] += (sg - run[R_SIGMA, j]) * inv
            if limits:
                f, _ = outside(th, sg, a)
                run[R_OUT, j] += (f - run[R_OUT, j]) * inv
        if has_thr:
            if th > thr:
                hits[H_ABOVE, j] += 1
            if th < thr:
                hits[H_BELOW, j] += 1
        if has_bias and abs(th - centre_of(mu, X, beta, j)) > allowed:
            hits[H_BIAS, j] += 1
        if (has_lo and th < a[A_LOWER]) or (has_hi and th > a[A_UPPER]):
            hits[H_MEAN_OUT, j] += 1
        if heavy:
            x = lam[j]
            run[R_LAM, j] += (x - run[R_LAM, j]) * inv
            if x < cut:
                hits[H_OUTLYING, j] += 1


# A full run's stored draws are read a block of groups at a time, laid out by group (pooling.order.gather):
# theta (m, S) and, when the model has them, sigma_j (m, S) and lambda_j (m, S), S = chains x D draws with
# the chains one after another; the shared sigma is one value per draw (S,). Unused arrays have no rows.


@njit(nogil=True, cache=True)
def accumulate_stored(within, n, v_known, mu, tau, theta, sig, lam, cut, a, D, j0, j1, run, hits, X, beta):
    """`accumulate` over every stored draw of the groups j0 .. j1 - 1, chain by chain in draw order, so that each
    group sees exactly the operations summary mode applies while sampling: mu, tau, cut (S,); theta (S, J); sig
    (S, J), (S, 1) or (S, 0); lam (S, J) or (S, 0); run (C, N_R, J), hits (C, N_H, J); S = C x D; X (J, p) and
    beta (S, p) the group-level predictors and their coefficients (p = 0: none)."""
    C = run.shape[0]
    shared = within == 1
    heavy = lam.shape[1] > 0
    for c in range(C):
        for t in range(D):
            s = c * D + t
            accumulate(
                within,
                n[j0:j1] if within != 2 else n,
                v_known[j0:j1] if within == 2 else v_known,
                mu[s],
                tau[s] * tau[s],
                theta[s, j0:j1],
                sig[s] if shared else sig[s, j0:j1],
                lam[s, j0:j1] if heavy else lam[s],
                cut[s],
                a,
                1.0 / (t + 1.0),
                run[c, :, j0:j1],
                hits[c, :, j0:j1],
                X[j0:j1],
                beta[s],
            )


# derived quantities of stored draws (full runs), by kind
D_SHRINK, D_OUT, D_BIAS, D_LOGIT_SHRINK, D_LOGIT_OUT = range(5)


@njit(nogil=True, cache=True, error_model="numpy")
def derived(kind, within, n, v_known, mu, tau, theta, sig, sig1, lam, a, j0, m, out, X, beta):
    """out[i, s] = the quantity `kind` of group j0 + i in draw s (i < m), internal units, from a block of stored
    draws laid out by group (see above): mu, tau (S,); theta, sig, lam (m, S); sig1 the shared sigma (S,);
    X (J, p) and beta (S, p) the group-level predictors and their coefficients (p = 0: none)."""
    S = mu.shape[0]
    heavy = lam.shape[0] > 0
    for i in range(m):
        j = j0 + i
        for s in range(S):
            th = theta[i, s]
            if kind == D_BIAS:
                out[i, s] = th - centre_of(mu[s], X, beta[s], j)
                continue
            if within == 0:
                sg = sig[i, s]
            elif within == 1:
                sg = sig1[s]
            else:
                sg = 0.0
            if kind == D_OUT or kind == D_LOGIT_OUT:
                f, g = outside(th, sg, a)
                out[i, s] = f if kind == D_OUT else logit_pair(f, g)
                continue
            vj = v_of(within, n, v_known, j, sg)
            t = tau[s] * tau[s] / lam[i, s] if heavy else tau[s] * tau[s]
            out[i, s] = shrink(vj, t) if kind == D_SHRINK else logit_shrink(vj, t)


def lambda_cuts(df_grid: np.ndarray, tail: float = OUTLYING_PRIOR_TAIL) -> np.ndarray:
    """Per df grid point, the `tail` quantile of lambda's prior Gamma(df/2, rate df/2) (0 at df = inf, where
    lambda = 1 and no group is outlying)."""
    from scipy.special import gammaincinv

    out = np.zeros(len(df_grid))
    for k, df in enumerate(np.asarray(df_grid, dtype=float)):
        if math.isfinite(df):
            out[k] = float(gammaincinv(0.5 * df, tail)) / (0.5 * df)
    return out
