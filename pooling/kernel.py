"""The blocked Gibbs sweep, compiled with numba. Pure functions of (state, statistics, rng).

Internal units only (see model.build). With v_j = sigma_j^2 / n_j, one sweep is:

Block A, (tau, mu, theta) jointly given the within-group variances:
  1. log tau by slice sampling (stepping out and shrinkage, Neal 2003, Ann. Statist. 31(3)) on
         p(tau | v, y) ∝ p(tau) V^(1/2) prod_j (v_j + tau^2)^(-1/2) exp(-1/2 sum_j (ybar_j - m)^2 / (v_j + tau^2)),
     1/V = sum_j 1/(v_j + tau^2) [+ 1/s0^2],  m = V (sum_j ybar_j / (v_j + tau^2) [+ m0 / s0^2]).
     theta and mu are integrated out, which removes the tau-theta dependence that makes the
     one-at-a-time sampler crawl when tau is small against the standard errors.
  2. mu | tau, v, y ~ N(m, V).
  3. theta_j | mu, tau ~ N((mu v_j + ybar_j tau^2) / (v_j + tau^2), v_j tau^2 / (v_j + tau^2)).
Block B, the variances given theta:
  separate: sigma_j^2 ~ Scaled-Inv-chi2(nu + n_j, (nu s^2 + M2_j + n_j (ybar_j - theta_j)^2) / (nu + n_j)),
            s^2 ~ Gamma(shape J nu / 2 + a, rate nu / 2 sum_j 1/sigma_j^2 + b),
            nu  ~ its exact discrete conditional on the grid.
  shared:   sigma^2 ~ Scaled-Inv-chi2(N, (sum_j M2_j + sum_j n_j (ybar_j - theta_j)^2) / N).
  known:    no block B.

A Scaled-Inv-chi2(k, S/k) draw is S / chi2(k) = S / (2 Gamma(k/2, 1)).
"""
from __future__ import annotations
from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)

import math

import numpy as np
from numba import njit

# layout of the per-chain scalar state vector
ETA, MU, S2, NU_IDX, WIDTH, SIGMA2, JUMP_SUM, JUMP_COUNT = range(8)
N_SCALARS = 8
ETA_MIN, ETA_MAX = -40.0, 40.0  # log tau in internal units: tau from 4e-18 to 2e17 data spreads
MAX_STEPS = 60
LOG_BLOCK = 16  # terms multiplied (in 4 interleaved products) before one log is taken (see sum_log_shifted)
_PROD_MIN, _PROD_MAX = 1e-300, 1e300
# Speed (see benchmarks/README.md). error_model="numpy" on the hot functions: a float division by
# zero gives inf instead of raising, so numba emits no zero test per division and the elementwise
# loops vectorise; no division here can have a zero divisor in a valid state. weighted_sums adds
# fastmath "reassoc" only, so that its three sums vectorise (they are summed in another order, to
# the same accuracy); no other function has any fastmath flag.


@njit(nogil=True, cache=True, error_model="numpy")
def log_tau_density(eta, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, out):
    """log p(eta = log tau | v, y) up to a constant, with theta and mu integrated out.

    Writes m and V (the conditional mean and variance of mu given tau) into out[0], out[1].
    Sums are taken about `shift` (the current mu) so that the quadratic form keeps its digits.
    """
    if eta < ETA_MIN or eta > ETA_MAX:
        return -np.inf
    tau2 = math.exp(2.0 * eta)
    # two O(J) passes: the weighted sums (vectorised) and sum_j log(v_j + tau^2) (one log per block
    # of products); the fused loop with one log per group cost about 5x as much
    sw, swd, swdd = weighted_sums(ybar, v, tau2, shift)
    slog = sum_log_shifted(v, tau2)
    if mu_kind == 1:
        w0 = 1.0 / (mu_scale * mu_scale)
        r0 = mu_loc - shift
        sw += w0
        swd += w0 * r0
        swdd += w0 * r0 * r0
    V = 1.0 / sw
    mr = swd * V
    q = swdd - sw * mr * mr
    out[0] = shift + mr
    out[1] = V
    lp = eta + 0.5 * math.log(V) - 0.5 * slog - 0.5 * q  # "eta +": the Jacobian of tau = exp(eta)
    if tau_kind == 1:
        lp -= 0.5 * tau2 / (tau_scale * tau_scale)
    elif tau_kind == 2:
        lp -= math.log1p(tau2 / (tau_scale * tau_scale))
    return lp


@njit(nogil=True, cache=True, error_model="numpy", fastmath={"reassoc"})
def weighted_sums(ybar, v, tau2, shift):
    """(sum_j w_j, sum_j w_j r_j, sum_j w_j r_j^2) with w_j = 1 / (v_j + tau^2), r_j = ybar_j - shift."""
    sw = 0.0
    swd = 0.0
    swdd = 0.0
    for j in range(ybar.shape[0]):
        w = 1.0 / (v[j] + tau2)
        r = ybar[j] - shift
        sw += w
        swd += w * r
        swdd += w * r * r
    return sw, swd, swdd


@njit(nogil=True, cache=True, error_model="numpy")
def sum_log_shifted(x, c):
    """sum_j log(x_j + c) for x_j + c > 0, taking one log per block of LOG_BLOCK products.

    The log call, not the arithmetic, dominated such a loop. The block's terms are multiplied in
    four interleaved products (independent chains of multiplications run in parallel); a block whose
    product leaves the normal range (extreme values) falls back to the plain sum of its logs, so
    nothing can overflow or lose digits to underflow.
    """
    J = x.shape[0]
    total = 0.0
    top = J - J % LOG_BLOCK
    for b in range(0, top, LOG_BLOCK):
        p0 = 1.0
        p1 = 1.0
        p2 = 1.0
        p3 = 1.0
        for j in range(b, b + LOG_BLOCK, 4):
            p0 *= x[j] + c
            p1 *= x[j + 1] + c
            p2 *= x[j + 2] + c
            p3 *= x[j + 3] + c
        prod = (p0 * p1) * (p2 * p3)
        if prod > _PROD_MIN and prod < _PROD_MAX:
            total += math.log(prod)
        else:
            for j in range(b, b + LOG_BLOCK):
                total += math.log(x[j] + c)
    for j in range(top, J):
        total += math.log(x[j] + c)
    return total


@njit(nogil=True, cache=True)
def sum_log(x):
    """sum_j log(x_j) for x_j > 0 (see sum_log_shifted)."""
    return sum_log_shifted(x, 0.0)


@njit(nogil=True, cache=True)
def slice_eta(rng, eta0, width, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv):
    """One slice-sampling update of eta (stepping out, then shrinkage). Returns (eta, evaluations).

    On return mv holds (m, V) evaluated at the returned eta.
    """
    f0 = log_tau_density(eta0, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv)
    level = f0 - rng.standard_exponential()
    evals = 1
    left = eta0 - width * rng.random()
    right = left + width
    steps_left = int(MAX_STEPS * rng.random())
    steps_right = MAX_STEPS - 1 - steps_left
    # every evaluation is counted, the one that ends a stepping-out loop included
    while steps_left > 0:
        evals += 1
        if not log_tau_density(left, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv) > level:
            break
        left -= width
        steps_left -= 1
    while steps_right > 0:
        evals += 1
        if not log_tau_density(right, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv) > level:
            break
        right += width
        steps_right -= 1
    while True:
        eta1 = left + (right - left) * rng.random()
        f1 = log_tau_density(eta1, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv)
        evals += 1
        if f1 > level:
            return eta1, evals
        if eta1 < eta0:
            left = eta1
        else:
            right = eta1
        if right - left < 1e-12:  # numerically collapsed: keep the current point (a valid draw)
            log_tau_density(eta0, ybar, v, shift, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, mv)
            return eta0, evals


@njit(nogil=True, cache=True, error_model="numpy")
def fill_v(within, n, v_known, state, sigma2, v):
    """v_j = sigma_j^2 / n_j (separate), sigma^2 / n_j (shared) or se_j^2 (known)."""
    J = v.shape[0]
    if within == 0:
        for j in range(J):
            v[j] = sigma2[j] / n[j]
    elif within == 1:
        for j in range(J):
            v[j] = state[SIGMA2] / n[j]
    else:
        for j in range(J):
            v[j] = v_known[j]


@njit(nogil=True, cache=True, error_model="numpy")
def block_a(rng, adapt, ybar, v, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, state, theta, mv):
    """(tau, mu, theta) jointly given v: slice update of log tau, then mu | tau, then theta | mu, tau.

    Returns the number of density evaluations the slice update used.
    """
    eta_old = state[ETA]
    eta, ev = slice_eta(rng, eta_old, state[WIDTH], ybar, v, state[MU], mu_kind, mu_loc, mu_scale,
                        tau_kind, tau_scale, mv)
    state[ETA] = eta
    if adapt:
        state[JUMP_SUM] += abs(eta - eta_old)
        state[JUMP_COUNT] += 1.0
        if state[JUMP_COUNT] >= 20.0:
            state[WIDTH] = min(10.0, max(0.02, 3.0 * state[JUMP_SUM] / state[JUMP_COUNT]))
    mu = mv[0] + math.sqrt(mv[1]) * rng.standard_normal()
    state[MU] = mu
    tau2 = math.exp(2.0 * eta)
    for j in range(ybar.shape[0]):
        inv_d = 1.0 / (v[j] + tau2)  # one division serves the mean and the variance
        theta[j] = (mu * v[j] + ybar[j] * tau2) * inv_d + math.sqrt(v[j] * tau2 * inv_d) * rng.standard_normal()
    return ev


@njit(nogil=True, cache=True, error_model="numpy")
def block_b(rng, within, n, ybar, m2, s2_shape, s2_rate, nu_grid, nu_logprior, state, theta, sigma2, lp):
    """The variances given theta: sigma_j^2, s^2 and nu (separate) or sigma^2 (shared); nothing for known."""
    J = ybar.shape[0]
    K = nu_grid.shape[0]
    if within == 0:
        nu = nu_grid[int(state[NU_IDX])]
        nus2 = nu * state[S2]
        inv_sum = 0.0
        for j in range(J):
            r = ybar[j] - theta[j]
            ss = nus2 + m2[j] + n[j] * r * r
            sigma2[j] = ss / (2.0 * rng.standard_gamma(0.5 * (nu + n[j])))
            inv_sum += 1.0 / sigma2[j]
        state[S2] = rng.standard_gamma(0.5 * J * nu + s2_shape) / (0.5 * nu * inv_sum + s2_rate)
        if K > 1:
            log_sum = sum_log(sigma2)
            s2 = state[S2]
            top = -np.inf
            for k in range(K):
                h = 0.5 * nu_grid[k]
                lp[k] = (nu_logprior[k] + J * (h * math.log(h * s2) - math.lgamma(h))
                         - (h + 1.0) * log_sum - h * s2 * inv_sum)
                top = max(top, lp[k])
            total = 0.0
            for k in range(K):
                lp[k] = math.exp(lp[k] - top)
                total += lp[k]
            u = rng.random() * total
            k_new = K - 1
            acc = 0.0
            for k in range(K):
                acc += lp[k]
                if u < acc:
                    k_new = k
                    break
            state[NU_IDX] = k_new
    elif within == 1:
        ss = 0.0
        n_tot = 0.0
        for j in range(J):
            r = ybar[j] - theta[j]
            ss += m2[j] + n[j] * r * r
            n_tot += n[j]
        state[SIGMA2] = ss / (2.0 * rng.standard_gamma(0.5 * n_tot))


@njit(nogil=True, cache=True)
def nu_lgamma_table(n, nu_grid, table):
    """table[k] = sum_j lgamma(nu_k / 2 + n_j / 2), by size class (size_classes) when the sizes are whole numbers.

    Group sizes repeat, so grouping them first costs O(J) plus one lgamma per distinct size and
    grid point; down-weighted (fractional) sizes fall back to one lgamma per group and grid point.
    """
    J = n.shape[0]
    K = nu_grid.shape[0]
    pos, starts, sizes = np.empty(J, dtype=np.int64), np.empty(J + 1, dtype=np.int64), np.empty(J)
    c = size_classes(n, pos, starts, sizes)
    for k in range(K):
        acc = 0.0
        if c >= 0:
            for i in range(c):
                acc += (starts[i + 1] - starts[i]) * math.lgamma(0.5 * (nu_grid[k] + sizes[i]))
        else:
            for j in range(J):
                acc += math.lgamma(0.5 * (nu_grid[k] + n[j]))
        table[k] = acc


@njit(nogil=True, cache=True)
def size_classes(n, pos, starts, sizes):
    """Groups by size, so that sums over groups can be taken class by class: with whole-number sizes,
    pos[j] is the place of group j when the groups are ordered by size (a stable counting sort),
    class c covers places starts[c] to starts[c + 1] - 1 and has size sizes[c]. Returns the number
    of classes, or -1 when a size is fractional (down-weighted) or above 1e7: then sums go group by
    group. pos, starts and sizes need room for J, J + 1 and J entries."""
    J = n.shape[0]
    top = 0.0
    for j in range(J):
        if n[j] != math.floor(n[j]) or n[j] < 0:
            return -1
        top = max(top, n[j])
    if top > 10_000_000:
        return -1
    counts = np.zeros(int(top) + 1, dtype=np.int64)
    for j in range(J):
        counts[int(n[j])] += 1
    first = np.empty(counts.shape[0], dtype=np.int64)  # first place of each size
    c = 0
    place = 0
    for size in range(counts.shape[0]):
        first[size] = place
        if counts[size] > 0:
            starts[c] = place
            sizes[c] = size
            c += 1
            place += counts[size]
    starts[c] = J
    for j in range(J):
        size = int(n[j])
        pos[j] = first[size]
        first[size] += 1
    return c


def prepare(n: np.ndarray, nu_grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """What `sweeps` needs beyond the statistics and priors, computed once per problem (not per call:
    at 1e6 groups the sampler calls sweeps once per sweep): the lgamma table of the collapsed nu
    move and the groups' size layout, one int64 array [C, starts (C + 1), sizes (C), pos (J)] from
    size_classes, or [-1] (sums group by group) when the sizes are not whole numbers or the classes
    hold fewer than LOG_BLOCK groups on average."""
    n = np.ascontiguousarray(n, dtype=np.float64)
    nu_grid = np.ascontiguousarray(nu_grid, dtype=np.float64)
    table = np.empty(nu_grid.shape[0])
    nu_lgamma_table(n, nu_grid, table)
    J = n.shape[0]
    pos, starts, sizes = np.empty(J, dtype=np.int64), np.empty(J + 1, dtype=np.int64), np.empty(J)
    c = size_classes(n, pos, starts, sizes)
    if c < 0 or J < LOG_BLOCK * c:  # classes pay only when they hold a block of products on average
        return table, np.array([-1], dtype=np.int64)
    return table, np.concatenate([[c], starts[: c + 1], sizes[:c].astype(np.int64), pos]).astype(np.int64)


@njit(nogil=True, cache=True)
def collapsed_nu_loglik(k, J, nu_grid, nu_logprior, table, s2, n, half_ss, n_classes, starts, sizes):
    """log p(nu_k | s^2, theta, y) + const with every sigma_j^2 integrated out:

        sum_j [ h log(h s^2) - lgamma(h) + lgamma(h + n_j/2) - (h + n_j/2) log(h s^2 + SS_j/2) ],  h = nu_k / 2,

    SS_j = M2_j + n_j (ybar_j - theta_j)^2: the marginal of a group's data under a normal
    likelihood and a Scaled-Inv-chi2(nu, s^2) variance. half_ss holds SS_j / 2, in the order of
    size_classes when n_classes >= 0; then the last sum is taken per size class, as
    (h + size/2) times a sum of logs that takes one log per block of products (sum_log_shifted):
    this sum, twice per sweep, was a fifth of a sweep with one log per group.
    """
    h = 0.5 * nu_grid[k]
    hs2 = h * s2
    acc = 0.0
    if n_classes >= 0:
        for c in range(n_classes):
            acc += (h + 0.5 * sizes[c]) * sum_log_shifted(half_ss[starts[c]:starts[c + 1]], hs2)
    else:
        for j in range(n.shape[0]):
            acc += (h + 0.5 * n[j]) * math.log(hs2 + half_ss[j])
    return nu_logprior[k] + J * (h * math.log(hs2) - math.lgamma(h)) + table[k] - acc


@njit(nogil=True, cache=True)
def collapsed_nu_step(rng, n, ybar, m2, nu_grid, nu_logprior, table, state, theta, half_ss, n_classes, pos, starts,
                      sizes):
    """Metropolis move of nu to a neighbouring grid point, with the sigma_j^2 integrated out.

    With many groups the sigma_j^2 pin nu down, so the draw of nu given them barely moves; this
    move targets p(nu | s^2, theta, y) instead. It must be followed at once by the draw of every
    sigma_j^2 given the new nu (block_b does that first), which makes the pair an exact
    partially collapsed update of (nu, sigma^2). The proposal (k - 1 or k + 1, each with
    probability 1/2; off the grid is rejected) is symmetric. n_classes, pos, starts and sizes come
    from size_classes (n_classes = -1: group by group); half_ss is work space of J numbers.
    """
    J = n.shape[0]
    K = nu_grid.shape[0]
    k = int(state[NU_IDX])
    k_new = k - 1 if rng.random() < 0.5 else k + 1
    if k_new < 0 or k_new >= K:
        return
    for j in range(J):
        r = ybar[j] - theta[j]
        half_ss[pos[j] if n_classes >= 0 else j] = 0.5 * (m2[j] + n[j] * r * r)
    s2 = state[S2]
    diff = (collapsed_nu_loglik(k_new, J, nu_grid, nu_logprior, table, s2, n, half_ss, n_classes, starts, sizes)
            - collapsed_nu_loglik(k, J, nu_grid, nu_logprior, table, s2, n, half_ss, n_classes, starts, sizes))
    if math.log(rng.random()) < diff:
        state[NU_IDX] = k_new


@njit(nogil=True, cache=True, error_model="numpy")
def scale_step(rng, n, ybar, m2, s2_shape, s2_rate, state, theta, sigma2):
    """Rescale s^2 and every sigma_j^2 by one factor c drawn from its conditional (a group move).

    Under (s^2, sigma_j^2) -> (c s^2, c sigma_j^2), with the Jacobian c^(J+1) and the invariant
    measure dc/c (Liu and Sabatti 2000, JASA 95), the density of c is
        c^(-N/2 - 1) exp(-A / c) * c^a exp(-b c s^2),   A = sum_j SS_j / (2 sigma_j^2),
    an inverse gamma(N/2, A) for p(s^2) ∝ 1/s^2 (a = b = 0), drawn exactly; for a gamma(a, b) prior
    the inverse gamma is an independence proposal, accepted with min(1, w(c) / w(1)),
    w(c) = c^a exp(-b c s^2). It moves the common scale that the Gibbs draws shift only slowly.
    """
    J = n.shape[0]
    A = 0.0
    n_tot = 0.0
    for j in range(J):
        r = ybar[j] - theta[j]
        A += (m2[j] + n[j] * r * r) / (2.0 * sigma2[j])
        n_tot += n[j]
    if A <= 0.0:
        return
    c = A / rng.standard_gamma(0.5 * n_tot)
    if s2_shape > 0.0 or s2_rate > 0.0:
        s2 = state[S2]
        log_w = s2_shape * math.log(c) - s2_rate * s2 * (c - 1.0)
        if math.log(rng.random()) >= log_w:
            return
    state[S2] *= c
    for j in range(J):
        sigma2[j] *= c


@njit(nogil=True, cache=True)
def sweeps(rng, n_sweeps, adapt, within, n, ybar, m2, v_known, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale,
           s2_shape, s2_rate, nu_grid, nu_logprior, nu_table, layout, state, theta, sigma2,
           out_mu, out_tau, out_theta, out_sigma, out_s, out_nu, out_evals, offset):
    """Run `n_sweeps` sweeps from `state`, `theta` and `sigma2` (updated in place).

    nu_table and layout are `prepare(n, nu_grid)` (used by `separate` with a grid of nu only).

    When out_mu has rows, sweep i writes row offset + i of every out_* array (sigma as a standard
    deviation, s as sqrt(s^2), nu as its value). With adapt set (warm-up), the slice width follows
    three times the mean absolute jump of log tau.
    """
    J = ybar.shape[0]
    v = np.empty(J)
    mv = np.empty(2)
    lp = np.empty(nu_grid.shape[0])
    store = out_mu.shape[0] > 0
    collapsed = within == 0 and nu_grid.shape[0] > 1
    ss = np.empty(J if collapsed else 0)
    n_classes = layout[0]
    c = max(n_classes, 0)
    starts = layout[1:c + 2]
    sizes = layout[c + 2:2 * c + 2]
    pos = layout[2 * c + 2:]
    for it in range(n_sweeps):
        fill_v(within, n, v_known, state, sigma2, v)
        ev = block_a(rng, adapt, ybar, v, mu_kind, mu_loc, mu_scale, tau_kind, tau_scale, state, theta, mv)
        if within == 0:
            if nu_grid.shape[0] > 1:
                collapsed_nu_step(rng, n, ybar, m2, nu_grid, nu_logprior, nu_table, state, theta, ss, n_classes, pos,
                                  starts, sizes)
            block_b(rng, within, n, ybar, m2, s2_shape, s2_rate, nu_grid, nu_logprior, state, theta, sigma2, lp)
            scale_step(rng, n, ybar, m2, s2_shape, s2_rate, state, theta, sigma2)
        else:
            block_b(rng, within, n, ybar, m2, s2_shape, s2_rate, nu_grid, nu_logprior, state, theta, sigma2, lp)
        if store:
            row = offset + it
            out_mu[row] = state[MU]
            out_tau[row] = math.exp(state[ETA])
            for j in range(J):
                out_theta[row, j] = theta[j]
            if within == 0:
                for j in range(J):
                    out_sigma[row, j] = math.sqrt(sigma2[j])
                out_s[row] = math.sqrt(state[S2])
                out_nu[row] = nu_grid[int(state[NU_IDX])]
            elif within == 1:
                out_sigma[row, 0] = math.sqrt(state[SIGMA2])
            out_evals[row] = ev
