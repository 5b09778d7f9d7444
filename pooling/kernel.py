"""The blocked Gibbs sweep, compiled with numba. Pure functions of (data, state, rng).

Internal units only (see model.build). The kernel's inputs are one `Data` (statistics and priors),
one `State` per chain (the chain's scalars and per-group arrays) and one `Work` per chain (scratch,
allocated once); a sweep allocates nothing. With v_j = sigma_j^2 / n_j and, for the heavy-tailed
between-group distribution, a latent precision lambda_j per group (t_j = tau^2 / lambda_j; for the
normal one lambda_j = 1, t_j = tau^2), one sweep is:

Block A, (tau, mu, theta) jointly given the within-group variances and the lambda_j:
  1. log tau by slice sampling (stepping out and shrinkage, Neal 2003, Ann. Statist. 31(3)) on
         p(tau | v, lambda, y) ∝ p(tau) V^(1/2) prod_j (v_j + t_j)^(-1/2) exp(-1/2 sum_j (ybar_j - m)^2 / (v_j + t_j)),
     1/V = sum_j 1/(v_j + t_j) [+ 1/s0^2],  m = V (sum_j ybar_j / (v_j + t_j) [+ m0 / s0^2]).
     theta and mu are integrated out, which removes the tau-theta dependence that makes the
     one-at-a-time sampler crawl when tau is small against the standard errors.
  2. mu | tau, v, lambda, y ~ N(m, V).
  3. theta_j | mu, tau, lambda_j ~ N((mu v_j + ybar_j t_j) / (v_j + t_j), v_j t_j / (v_j + t_j)).
Heavy tails (between = 1): theta_j | mu, tau, lambda_j ~ N(mu, tau^2 / lambda_j), lambda_j ~ Gamma(df/2, rate df/2),
  so that theta_j | mu, tau, df is Student-t(df, mu, tau) (a scale mixture of normals).
  4. df | theta, mu, tau with every lambda_j integrated out: an exact draw from its discrete
     conditional p(df_k) prod_j t_df_k(theta_j | mu, tau) (df = inf is the normal), restricted to a
     random window of DF_WINDOW neighbouring grid points around the current one (a move that keeps
     the conditional invariant; see tail_step);
  5. lambda_j | theta_j, mu, tau, df ~ Gamma((df + 1)/2, rate (df + (theta_j - mu)^2 / tau^2) / 2)
     (lambda_j = 1 at df = inf). 4 then 5 is an exact partially collapsed update of (df, lambda).
     Between 4 and 5, a joint move of (df, tau) with the lambda_j still integrated out: df to a
     neighbouring grid point and tau rescaled so that the quartiles of the t stay put (tail_step): given
     theta the data fix the spread of the groups, so df and tau are tied and the draws of each given the
     other move along that ridge only slowly.
Separate variances: step 3 is taken by pair_step, right after 2, and for every group of at most PAIR_MAX_N
  measurements it first moves sigma_j^2 with theta_j integrated out (as 1 and 2 are drawn): an independence
  Metropolis-Hastings step proposing Scaled-Inv-chi2(nu + n_j - 1, (nu s^2 + M2_j) / (nu + n_j - 1)) and
  accepting with the ratio of N(ybar_j | c_j, t_j + sigma_j^2 / n_j); then theta_j from 3. A group of a few
  measurements that agree but lie far from the others crosses in one move between theta_j near its own mean
  (small sigma_j) and theta_j pulled in (large sigma_j).
Block B, the variances given theta:
  separate: sigma_j^2 ~ Scaled-Inv-chi2(nu + n_j, (nu s^2 + M2_j + n_j (ybar_j - theta_j)^2) / (nu + n_j)),
            s^2 ~ Gamma(shape J nu / 2 + a, rate nu / 2 sum_j 1/sigma_j^2 + b),
            nu  ~ its exact discrete conditional on the grid (plus two exact moves, see below).
  shared:   sigma^2 ~ Scaled-Inv-chi2(N, (sum_j M2_j + sum_j n_j (ybar_j - theta_j)^2) / N) if p(sigma^2) ∝ 1/sigma^2;
            under a proper inverse-gamma prior (shape a, scale b; a Scaled-Inv-chi2(nu0, s0^2) is a = nu0/2,
            b = nu0 s0^2 / 2) the conjugate Inv-Gamma(N/2 + a, SS/2 + b), SS the sum above.
  known:    no block B.

A Scaled-Inv-chi2(k, S/k) draw is S / chi2(k) = S / (2 Gamma(k/2, 1)).

Group-level predictors (p > 0 columns of X): the centre of group j is c_j = mu + x_j' beta. Block A then
integrates (mu, beta) out jointly, a (p + 1)-dimensional Gaussian given tau, v and lambda. With Z = [1, X],
W = diag(w_j), w_j = 1 / (v_j + t_j), and the normal priors (mu ~ N(m0, s0^2), beta_k ~ N(b0_k, 1/a_k); flat:
a_k = 0) as pseudo-observations, P = Z'WZ + diag(1/s0^2, a) and the sums are taken about the current
(mu, beta), r_j = ybar_j - c_j:
  1. log tau by the same slice sampler on
         p(tau | v, lambda, y) ∝ p(tau) |P|^(-1/2) prod_j (v_j + t_j)^(-1/2) exp(-1/2 (r'Wr - g'P^(-1)g)),  g = Z'Wr
     (p = 0 is the formula above: |P|^(-1/2) = V^(1/2));
  2. (mu, beta) | tau, v, lambda, y ~ N((mu, beta) + P^(-1) g, P^(-1)), drawn through the Cholesky factor of P;
  3. theta_j | mu, beta, tau, lambda_j as in 3 above with c_j for mu; the tail move uses z_j = (theta_j - c_j)/tau.
Each density evaluation is O(J p^2) (the p(p+1)/2 + 2p + 2 weighted sums) plus O(p^3) for the factor.

With the normal between-group distribution and no predictors the sweep consumes the random stream exactly as
it did before heavy tails existed, draw for draw (tests/test_kernel_api.py pins the draws of a fixed seed);
predictors take a separate branch (p > 0) and leave that path untouched.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit

from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)

# layout of the per-chain scalar state vector
ETA, MU, S2, NU_IDX, WIDTH, SIGMA2, JUMP_SUM, JUMP_COUNT, DF_IDX = range(9)
N_SCALARS = 9
ETA_MIN, ETA_MAX = -40.0, 40.0  # log tau in internal units: tau from 4e-18 to 2e17 data spreads
MAX_STEPS = 60
DF_WINDOW = 16  # at most this many grid points of df are evaluated per sweep (see tail_step): the default grid
# (12 points) is drawn from its whole conditional; a longer grid given by the user gets random windows
LOG_BLOCK = 16  # terms multiplied (in 4 interleaved products) before one log is taken (see sum_log_shifted)
PAIR_MAX_N = 3.0  # groups of at most this many measurements get the joint (sigma_j^2, theta_j) move (pair_step):
# their sigma_j rests on 0 to 2 degrees of freedom of their own. Moving larger groups too (tried: up to 10) kept the
# posterior but slowed tau 2.5x under strong shrinkage (sigma_j then answers ybar_j - mu, trading with tau)
_PROD_MIN, _PROD_MAX = 1e-300, 1e300
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
# Speed (see benchmarks/README.md). error_model="numpy" on the hot functions: a float division by
# zero gives inf instead of raising, so numba emits no zero test per division and the elementwise
# loops vectorise; no division here can have a zero divisor in a valid state. weighted_sums (and, for
# group-level predictors, weights, dot_pair and dot3) add fastmath "reassoc" only, so that their sums
# vectorise (they are summed in another order, to the same accuracy); no other function has any fastmath flag.

WITHIN_SEPARATE, WITHIN_SHARED, WITHIN_KNOWN = 0, 1, 2
BETWEEN_NORMAL, BETWEEN_HEAVY = 0, 1


class Data(NamedTuple):
    """Everything a sweep reads and never writes: statistics and priors in internal units.

    within: 0 separate, 1 shared, 2 known. n, ybar, m2: group sizes, means and sums of squared
    deviations; v_known: se_j^2 (known). mu prior: kind 0 flat, 1 Normal(mu_loc, mu_scale).
    tau prior: kind 0 flat, 1 half-normal, 2 half-Cauchy, scale tau_scale. separate: s^2 prior Gamma(s2_shape,
    s2_rate) (0, 0: p(s^2) ∝ 1/s^2); shared: the same two numbers are the shape and scale of an inverse gamma on
    sigma^2, p(sigma^2) ∝ (sigma^2)^-(s2_shape + 1) exp(-s2_rate / sigma^2) (0, 0: p(sigma^2) ∝ 1/sigma^2).
    nu on nu_grid with log prior weights nu_logprior; nu_table and layout from `prepare`. between: 0 normal,
    1 heavy (Student-t by a scale mixture); df_grid (inf is the normal limit) with log prior weights df_logprior,
    df_const[k] = log of the t density's constant, lgamma((df+1)/2) - lgamma(df/2) - log(df pi)/2 (-log(2 pi)/2
    at df = inf), and df_logq[k] the log of the standard t's upper quartile (t_quartile_logs). X (J, p): the
    group-level predictors (p = 0: none), beta_loc and beta_prec (p,): the centre and precision of each
    coefficient's normal prior (precision 0: flat); XT (p, J): X transposed, contiguous by column for the sums.
    """

    within: int
    n: np.ndarray
    ybar: np.ndarray
    m2: np.ndarray
    v_known: np.ndarray
    mu_kind: int
    mu_loc: float
    mu_scale: float
    tau_kind: int
    tau_scale: float
    s2_shape: float
    s2_rate: float
    nu_grid: np.ndarray
    nu_logprior: np.ndarray
    nu_table: np.ndarray
    layout: np.ndarray
    between: int
    df_grid: np.ndarray
    df_logprior: np.ndarray
    df_const: np.ndarray
    df_logq: np.ndarray
    X: np.ndarray = np.zeros((0, 0))
    XT: np.ndarray = np.zeros((0, 0))
    beta_loc: np.ndarray = np.zeros(0)
    beta_prec: np.ndarray = np.zeros(0)


class State(NamedTuple):
    """One chain's state: the scalars (ETA ... DF_IDX), theta_j, sigma_j^2 (separate), lambda_j (heavy) and the
    predictors' coefficients beta (p,)."""

    scalars: np.ndarray
    theta: np.ndarray
    sigma2: np.ndarray
    lam: np.ndarray
    beta: np.ndarray = np.zeros(0)


class Work(NamedTuple):
    """Scratch of one chain, allocated once (make_work): v_j, (m, V), nu and df weights, SS_j / 2 by size
    class, 1/lambda_j and z_j^2 = (theta_j - c_j)^2 / tau^2; with predictors (p > 0, else empty) the residuals
    r_j about the current centres, the centres c_j = mu + x_j' beta, the Cholesky factor of P ((p+1)^2, lower
    triangle by rows), P^(-1) g (the move of (mu, beta)'s mean), p + 1 normals, and w_j and w_j r_j of the last
    density evaluation."""

    v: np.ndarray
    mv: np.ndarray
    lp: np.ndarray
    half_ss: np.ndarray
    inv_lam: np.ndarray
    z2: np.ndarray
    lpd: np.ndarray
    resid: np.ndarray
    centre: np.ndarray
    chol: np.ndarray
    shift: np.ndarray
    zq: np.ndarray
    wj: np.ndarray
    wr: np.ndarray


class Draws(NamedTuple):
    """Where stored sweeps go: row i of every array (sigma as a standard deviation, s as sqrt(s^2),
    nu and df as their values, lam as lambda_j). Arrays of 0 rows store nothing; unused ones have 0 columns."""

    mu: np.ndarray
    tau: np.ndarray
    theta: np.ndarray
    sigma: np.ndarray
    s: np.ndarray
    nu: np.ndarray
    df: np.ndarray
    lam: np.ndarray
    evals: np.ndarray
    beta: np.ndarray


def t_constants(df_grid: np.ndarray) -> np.ndarray:
    """log of the Student-t density's normalising constant for each df (the normal's at df = inf)."""
    out = np.empty(len(df_grid))
    for k, df in enumerate(df_grid):
        if math.isinf(df):
            out[k] = -_HALF_LOG_2PI
        else:
            out[k] = math.lgamma(0.5 * (df + 1.0)) - math.lgamma(0.5 * df) - 0.5 * math.log(df * math.pi)
    return out


def t_quartile_logs(df_grid: np.ndarray) -> np.ndarray:
    """log of the upper quartile of the standard Student-t for each df (the normal's at df = inf)."""
    from scipy.special import stdtrit

    return np.array(
        [math.log(float(stdtrit(df, 0.75))) if math.isfinite(df) else math.log(0.6744897501960817) for df in df_grid]
    )


def make_work(d: Data) -> Work:
    J = d.ybar.shape[0]
    collapsed = d.within == WITHIN_SEPARATE and d.nu_grid.shape[0] > 1
    heavy = d.between == BETWEEN_HEAVY
    p = d.X.shape[1]
    q = p + 1 if p > 0 else 0
    return Work(
        np.empty(J),
        np.empty(2),
        np.empty(d.nu_grid.shape[0]),
        np.empty(J if collapsed else 0),
        np.ones(J if heavy else 0),
        np.empty(J if heavy else 0),
        np.empty(d.df_grid.shape[0]),
        np.empty(J if p > 0 else 0),
        np.empty(J if p > 0 else 0),
        np.zeros(q * q),
        np.zeros(q),
        np.zeros(q),
        np.empty(J if p > 0 else 0),
        np.empty(J if p > 0 else 0),
    )


def draws_shape(d: Data, rows: int) -> dict[str, tuple[int, ...]]:
    """Shapes of the Draws arrays for `rows` stored sweeps of one chain."""
    J = d.ybar.shape[0]
    sep = d.within == WITHIN_SEPARATE
    heavy = d.between == BETWEEN_HEAVY
    return {
        "mu": (rows,),
        "tau": (rows,),
        "theta": (rows, J),
        "sigma": (rows, J if sep else 1 if d.within == WITHIN_SHARED else 0),
        "s": (rows if sep else 0,),
        "nu": (rows if sep else 0,),
        "df": (rows if heavy else 0,),
        "lam": (rows, J if heavy else 0),
        "evals": (rows,),
        "beta": (rows, d.X.shape[1]),
    }


DRAW_DTYPES: dict = {}  # every stored draw is float64 (lambda too: summary mode's running sums read the state's
# float64 lambda_j, and both modes must give the same answers to rounding)


def empty_draws(d: Data, rows: int) -> Draws:
    return Draws(**{k: np.empty(s, dtype=DRAW_DTYPES.get(k, np.float64)) for k, s in draws_shape(d, rows).items()})


def no_draws(d: Data) -> Draws:
    """A Draws that stores nothing (0 rows), for warm-up."""
    return empty_draws(d, 0)


# ---------------------------------------------------------------------------------------------
# sums over groups


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


@njit(nogil=True, cache=True, error_model="numpy", fastmath={"reassoc"})
def weighted_sums_scaled(ybar, v, il, tau2, shift):
    """weighted_sums with w_j = 1 / (v_j + tau^2 il_j): the heavy-tailed model, il_j = 1 / lambda_j."""
    sw = 0.0
    swd = 0.0
    swdd = 0.0
    for j in range(ybar.shape[0]):
        w = 1.0 / (v[j] + tau2 * il[j])
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


@njit(nogil=True, cache=True, error_model="numpy")
def sum_log_scaled(x, il, c):
    """sum_j log(x_j + c il_j), one log per block of LOG_BLOCK products (see sum_log_shifted)."""
    J = x.shape[0]
    total = 0.0
    top = J - J % LOG_BLOCK
    for b in range(0, top, LOG_BLOCK):
        p0 = 1.0
        p1 = 1.0
        p2 = 1.0
        p3 = 1.0
        for j in range(b, b + LOG_BLOCK, 4):
            p0 *= x[j] + c * il[j]
            p1 *= x[j + 1] + c * il[j + 1]
            p2 *= x[j + 2] + c * il[j + 2]
            p3 *= x[j + 3] + c * il[j + 3]
        prod = (p0 * p1) * (p2 * p3)
        if prod > _PROD_MIN and prod < _PROD_MAX:
            total += math.log(prod)
        else:
            for j in range(b, b + LOG_BLOCK):
                total += math.log(x[j] + c * il[j])
    for j in range(top, J):
        total += math.log(x[j] + c * il[j])
    return total


@njit(nogil=True, cache=True)
def sum_log(x):
    """sum_j log(x_j) for x_j > 0 (see sum_log_shifted)."""
    return sum_log_shifted(x, 0.0)


# ---------------------------------------------------------------------------------------------
# block A


@njit(nogil=True, cache=True, error_model="numpy")
def log_tau_density(eta, d, v, il, shift, out):
    """log p(eta = log tau | v, lambda, y) up to a constant, with theta and mu integrated out.

    il holds 1/lambda_j (heavy tails; ignored for the normal model). Writes m and V (the conditional
    mean and variance of mu given tau) into out[0], out[1]. Sums are taken about `shift` (the
    current mu) so that the quadratic form keeps its digits.
    """
    if eta < ETA_MIN or eta > ETA_MAX:
        return -np.inf
    tau2 = math.exp(2.0 * eta)
    # two O(J) passes: the weighted sums (vectorised) and sum_j log(v_j + t_j) (one log per block
    # of products); the fused loop with one log per group cost about 5x as much
    if d.between == BETWEEN_HEAVY:
        sw, swd, swdd = weighted_sums_scaled(d.ybar, v, il, tau2, shift)
        slog = sum_log_scaled(v, il, tau2)
    else:
        sw, swd, swdd = weighted_sums(d.ybar, v, tau2, shift)
        slog = sum_log_shifted(v, tau2)
    if d.mu_kind == 1:
        w0 = 1.0 / (d.mu_scale * d.mu_scale)
        r0 = d.mu_loc - shift
        sw += w0
        swd += w0 * r0
        swdd += w0 * r0 * r0
    V = 1.0 / sw
    mr = swd * V
    q = swdd - sw * mr * mr
    out[0] = shift + mr
    out[1] = V
    lp = eta + 0.5 * math.log(V) - 0.5 * slog - 0.5 * q  # "eta +": the Jacobian of tau = exp(eta)
    if d.tau_kind == 1:
        lp -= 0.5 * tau2 / (d.tau_scale * d.tau_scale)
    elif d.tau_kind == 2:
        lp -= math.log1p(tau2 / (d.tau_scale * d.tau_scale))
    return lp


@njit(nogil=True, cache=True, error_model="numpy")
def log_tau_density_reg(eta, d, v, il, mu, beta, wk):
    """log p(eta = log tau | v, lambda, y) up to a constant with (mu, beta) integrated out: the predictors' form
    (see the module notes), sums about the current (mu, beta), whose residuals r_j are in wk.resid.

    Writes the Cholesky factor L of P (P = L L', lower triangle by rows) into wk.chol and P^(-1) g into wk.shift.
    A factor that is not positive definite (rounding at an extreme tau) gives -inf.
    """
    if eta < ETA_MIN or eta > ETA_MAX:
        return -np.inf
    tau2 = math.exp(2.0 * eta)
    X = d.X
    p = X.shape[1]
    q = p + 1
    L = wk.chol
    g = wk.shift
    r = wk.resid
    heavy = d.between == BETWEEN_HEAVY
    for a in range(q * q):
        L[a] = 0.0
    for a in range(q):
        g[a] = 0.0
    rr = 0.0
    # P (upper triangle, row 0 the intercept), g = Z'Wr and r'Wr: the weights in one pass, then each entry as
    # its own sum over the groups along the columns of X' (contiguous), so that every pass vectorises; this
    # took a third of the time of one fused loop that updated the (p + 1)^2 entries group by group
    L[0], g[0], rr = weights(v, il, tau2, r, wk.wj, wk.wr, heavy)
    XT = d.XT
    for a in range(p):
        xa = XT[a]
        L[a + 1], g[a + 1] = dot_pair(wk.wj, wk.wr, xa)
        row = (a + 1) * q
        for c in range(a, p):
            L[row + c + 1] = dot3(wk.wj, xa, XT[c])
    slog = sum_log_scaled(v, il, tau2) if heavy else sum_log_shifted(v, tau2)
    if d.mu_kind == 1:  # mu ~ N(m0, s0^2) as one more observation of the intercept
        w0 = 1.0 / (d.mu_scale * d.mu_scale)
        r0 = d.mu_loc - mu
        L[0] += w0
        g[0] += w0 * r0
        rr += w0 * r0 * r0
    for a in range(p):
        a0 = d.beta_prec[a]
        if a0 > 0.0:  # beta_a ~ N(b0_a, 1/a0)
            r0 = d.beta_loc[a] - beta[a]
            L[(a + 1) * q + a + 1] += a0
            g[a + 1] += a0 * r0
            rr += a0 * r0 * r0
    # Cholesky in place: the upper triangle of P (by rows) becomes L' (by rows), i.e. L by columns
    logdet = 0.0
    for a in range(q):
        s_ = L[a * q + a]
        for k in range(a):
            s_ -= L[k * q + a] * L[k * q + a]
        if not s_ > 0.0:
            return -np.inf
        piv = math.sqrt(s_)
        L[a * q + a] = piv
        logdet += 2.0 * math.log(piv)
        for c in range(a + 1, q):
            s_ = L[a * q + c]
            for k in range(a):
                s_ -= L[k * q + a] * L[k * q + c]
            L[a * q + c] = s_ / piv
    # solve L y = g (forward; L[a, k] is stored at k * q + a), then L' x = y (backward); x = P^(-1) g
    quad = 0.0
    for a in range(q):
        s_ = g[a]
        for k in range(a):
            s_ -= L[k * q + a] * g[k]
        g[a] = s_ / L[a * q + a]
        quad += g[a] * g[a]
    for a in range(q - 1, -1, -1):
        s_ = g[a]
        for k in range(a + 1, q):
            s_ -= L[a * q + k] * g[k]
        g[a] = s_ / L[a * q + a]
    lp = eta - 0.5 * logdet - 0.5 * slog - 0.5 * (rr - quad)
    if d.tau_kind == 1:
        lp -= 0.5 * tau2 / (d.tau_scale * d.tau_scale)
    elif d.tau_kind == 2:
        lp -= math.log1p(tau2 / (d.tau_scale * d.tau_scale))
    return lp


@njit(nogil=True, cache=True, error_model="numpy", fastmath={"reassoc"})
def weights(v, il, tau2, r, w, wr, heavy):
    """w_j = 1 / (v_j + t_j) and wr_j = w_j r_j into w and wr; returns (sum_j w_j, sum_j w_j r_j, sum_j w_j r_j^2)."""
    sw = 0.0
    swr = 0.0
    swrr = 0.0
    for j in range(v.shape[0]):
        t = tau2 * il[j] if heavy else tau2
        wj = 1.0 / (v[j] + t)
        w[j] = wj
        wr[j] = wj * r[j]
        sw += wj
        swr += wr[j]
        swrr += wr[j] * r[j]
    return sw, swr, swrr


@njit(nogil=True, cache=True, error_model="numpy", fastmath={"reassoc"})
def dot_pair(w, wr, x):
    """(sum_j w_j x_j, sum_j wr_j x_j) in one pass."""
    a = 0.0
    b = 0.0
    for j in range(x.shape[0]):
        a += w[j] * x[j]
        b += wr[j] * x[j]
    return a, b


@njit(nogil=True, cache=True, error_model="numpy", fastmath={"reassoc"})
def dot3(w, x, y):
    """sum_j w_j x_j y_j."""
    a = 0.0
    for j in range(x.shape[0]):
        a += w[j] * x[j] * y[j]
    return a


@njit(nogil=True, cache=True)
def _density(eta, d, v, il, shift, mv, beta, wk):
    """log p(eta | ...): the form without predictors (writing (m, V) into mv) or with them (log_tau_density_reg)."""
    if d.X.shape[1] == 0:
        return log_tau_density(eta, d, v, il, shift, mv)
    return log_tau_density_reg(eta, d, v, il, shift, beta, wk)


@njit(nogil=True, cache=True)
def slice_eta(rng, eta0, width, d, v, il, shift, mv, beta, wk):
    """One slice-sampling update of eta (stepping out, then shrinkage). Returns (eta, evaluations).

    On return mv holds (m, V) (with predictors: wk.chol and wk.shift hold their factor and move) evaluated at the
    returned eta. shift and beta are the current mu and beta, about which the sums are taken.
    """
    f0 = _density(eta0, d, v, il, shift, mv, beta, wk)
    level = f0 - rng.standard_exponential()
    evals = 1
    left = eta0 - width * rng.random()
    right = left + width
    steps_left = int(MAX_STEPS * rng.random())
    steps_right = MAX_STEPS - 1 - steps_left
    # every evaluation is counted, the one that ends a stepping-out loop included
    while steps_left > 0:
        evals += 1
        if not _density(left, d, v, il, shift, mv, beta, wk) > level:
            break
        left -= width
        steps_left -= 1
    while steps_right > 0:
        evals += 1
        if not _density(right, d, v, il, shift, mv, beta, wk) > level:
            break
        right += width
        steps_right -= 1
    while True:
        eta1 = left + (right - left) * rng.random()
        f1 = _density(eta1, d, v, il, shift, mv, beta, wk)
        evals += 1
        if f1 > level:
            return eta1, evals
        if eta1 < eta0:
            left = eta1
        else:
            right = eta1
        if right - left < 1e-12:  # numerically collapsed: keep the current point (a valid draw)
            _density(eta0, d, v, il, shift, mv, beta, wk)
            return eta0, evals


@njit(nogil=True, cache=True, error_model="numpy")
def fill_v(d, scalars, sigma2, v):
    """v_j = sigma_j^2 / n_j (separate), sigma^2 / n_j (shared) or se_j^2 (known)."""
    J = v.shape[0]
    if d.within == WITHIN_SEPARATE:
        for j in range(J):
            v[j] = sigma2[j] / d.n[j]
    elif d.within == WITHIN_SHARED:
        for j in range(J):
            v[j] = scalars[SIGMA2] / d.n[j]
    else:
        for j in range(J):
            v[j] = d.v_known[j]


@njit(nogil=True, cache=True, error_model="numpy")
def block_a(rng, adapt, d, st, wk):
    """(tau, mu, theta) jointly given v (wk.v) and lambda (wk.inv_lam): slice update of log tau, then
    mu | tau, then theta | mu, tau. Returns the number of density evaluations the slice update used."""
    if d.X.shape[1] > 0:
        return block_a_reg(rng, adapt, d, st, wk)
    sc = st.scalars
    v = wk.v
    mv = wk.mv
    eta_old = sc[ETA]
    eta, ev = slice_eta(rng, eta_old, sc[WIDTH], d, v, wk.inv_lam, sc[MU], mv, st.beta, wk)
    sc[ETA] = eta
    if adapt:
        sc[JUMP_SUM] += abs(eta - eta_old)
        sc[JUMP_COUNT] += 1.0
        if sc[JUMP_COUNT] >= 20.0:
            sc[WIDTH] = min(10.0, max(0.02, 3.0 * sc[JUMP_SUM] / sc[JUMP_COUNT]))
    mu = mv[0] + math.sqrt(mv[1]) * rng.standard_normal()
    sc[MU] = mu
    if d.within == WITHIN_SEPARATE:
        return ev  # theta_j next, with sigma_j^2: pair_step
    tau2 = math.exp(2.0 * eta)
    theta = st.theta
    ybar = d.ybar
    if d.between == BETWEEN_HEAVY:
        il = wk.inv_lam
        for j in range(ybar.shape[0]):
            t = tau2 * il[j]
            inv_d = 1.0 / (v[j] + t)
            theta[j] = (mu * v[j] + ybar[j] * t) * inv_d + math.sqrt(v[j] * t * inv_d) * rng.standard_normal()
    else:
        for j in range(ybar.shape[0]):
            inv_d = 1.0 / (v[j] + tau2)  # one division serves the mean and the variance
            theta[j] = (mu * v[j] + ybar[j] * tau2) * inv_d + math.sqrt(v[j] * tau2 * inv_d) * rng.standard_normal()
    return ev


@njit(nogil=True, cache=True, error_model="numpy")
def block_a_reg(rng, adapt, d, st, wk):
    """block_a with predictors: the slice update of log tau with (mu, beta) integrated out, then (mu, beta) | tau
    jointly (N(current + P^(-1) g, P^(-1)), as (current + P^(-1) g) + L'^(-1) z with z ~ N(0, I)), then theta | c_j,
    tau. Leaves the centres c_j = mu + x_j' beta in wk.centre. Returns the density evaluations."""
    sc = st.scalars
    v = wk.v
    X = d.X
    p = X.shape[1]
    q = p + 1
    beta = st.beta
    ybar = d.ybar
    J = ybar.shape[0]
    mu = sc[MU]
    for j in range(J):
        c = mu
        for a in range(p):
            c += X[j, a] * beta[a]
        wk.resid[j] = ybar[j] - c
    eta_old = sc[ETA]
    eta, ev = slice_eta(rng, eta_old, sc[WIDTH], d, v, wk.inv_lam, mu, wk.mv, beta, wk)
    sc[ETA] = eta
    if adapt:
        sc[JUMP_SUM] += abs(eta - eta_old)
        sc[JUMP_COUNT] += 1.0
        if sc[JUMP_COUNT] >= 20.0:
            sc[WIDTH] = min(10.0, max(0.02, 3.0 * sc[JUMP_SUM] / sc[JUMP_COUNT]))
    L = wk.chol
    z = wk.zq
    for a in range(q):
        z[a] = rng.standard_normal()
    # x = L'^(-1) z: L' is upper triangular, its row a stored at a * q (back substitution)
    for a in range(q - 1, -1, -1):
        s_ = z[a]
        for k in range(a + 1, q):
            s_ -= L[a * q + k] * z[k]
        z[a] = s_ / L[a * q + a]
    mu = mu + wk.shift[0] + z[0]
    sc[MU] = mu
    for a in range(p):
        beta[a] += wk.shift[a + 1] + z[a + 1]
    tau2 = math.exp(2.0 * eta)
    theta = st.theta
    heavy = d.between == BETWEEN_HEAVY
    il = wk.inv_lam
    cen = wk.centre
    draw = d.within != WITHIN_SEPARATE  # separate: theta_j next, with sigma_j^2 (pair_step)
    for j in range(J):
        c = mu
        for a in range(p):
            c += X[j, a] * beta[a]
        cen[j] = c
        if draw:
            t = tau2 * il[j] if heavy else tau2
            inv_d = 1.0 / (v[j] + t)
            theta[j] = (c * v[j] + ybar[j] * t) * inv_d + math.sqrt(v[j] * t * inv_d) * rng.standard_normal()
    return ev


# ---------------------------------------------------------------------------------------------
# heavy tails: df and lambda


@njit(nogil=True, cache=True, error_model="numpy")
def df_loglik(k, d, z2, sz, J):
    """log p(df_k) + sum_j log t_df_k(z_j), z_j = (theta_j - mu) / tau, every lambda_j integrated out
    (the -log tau per group is the same for every df and left out):

        log t_df(z) = c(df) - (df + 1)/2 log(1 + z^2 / df),   c(df) = lgamma((df+1)/2) - lgamma(df/2) - log(df pi)/2,

    summed as J c + J (df+1)/2 log df - (df+1)/2 sum_j log(df + z_j^2) (one log per block of products);
    at df = inf the normal, J c - sum_j z_j^2 / 2. sz is sum_j z_j^2.
    """
    df = d.df_grid[k]
    if math.isinf(df):
        return d.df_logprior[k] + J * d.df_const[k] - 0.5 * sz
    h = 0.5 * (df + 1.0)
    return d.df_logprior[k] + J * (d.df_const[k] + h * math.log(df)) - h * sum_log_shifted(z2, df)


@njit(nogil=True, cache=True, error_model="numpy")
def tau_part(eta, d, J):
    """The terms of log p(df, eta = log tau | theta, mu) that depend on tau but not on the t's shape:
    log p_tau(tau) + eta (the Jacobian of tau = exp(eta)) - J eta (each group's t density carries 1/tau)."""
    tau2 = math.exp(2.0 * eta)
    lp = eta - J * eta
    if d.tau_kind == 1:
        lp -= 0.5 * tau2 / (d.tau_scale * d.tau_scale)
    elif d.tau_kind == 2:
        lp -= math.log1p(tau2 / (d.tau_scale * d.tau_scale))
    return lp


@njit(nogil=True, cache=True, error_model="numpy")
def df_tau_step(rng, d, sc, z2, sz):
    """Metropolis move of (df, tau) jointly, every lambda_j integrated out: df to a neighbouring grid point
    (each side with probability 1/2; off the grid is rejected) and log tau shifted by log q(df) - log q(df'),
    q the upper quartile of the standard t (d.df_logq), so that the t's quartiles, which the groups fix,
    stay put. The proposal is its own inverse with a unit Jacobian in (k, log tau), so the acceptance
    ratio is the ratio of p(df, tau | theta, mu). z2 and sz hold (theta_j - mu)^2 / tau^2 at the current tau.
    Returns whether the move was accepted (tau then changed)."""
    K = d.df_grid.shape[0]
    J = z2.shape[0]
    k = int(sc[DF_IDX])
    k_new = k - 1 if rng.random() < 0.5 else k + 1
    if k_new < 0 or k_new >= K:
        return False
    eta = sc[ETA]
    shift = d.df_logq[k] - d.df_logq[k_new]
    eta_new = eta + shift
    if eta_new < ETA_MIN or eta_new > ETA_MAX:
        return False
    # the t terms at (df', tau'): z'^2 = z2 e^(-a), a = 2 shift, and
    # sum_j log(df' + z'^2) = sum_j log(df' e^a + z2) - J a (one log per block of products, as in df_loglik)
    a = 2.0 * shift
    old = df_loglik(k, d, z2, sz, J) + tau_part(eta, d, J)
    df_new = d.df_grid[k_new]
    if math.isinf(df_new):
        t_new = d.df_logprior[k_new] + J * d.df_const[k_new] - 0.5 * sz * math.exp(-a)
    else:
        h = 0.5 * (df_new + 1.0)
        t_new = (
            d.df_logprior[k_new]
            + J * (d.df_const[k_new] + h * math.log(df_new))
            - h * (sum_log_shifted(z2, df_new * math.exp(a)) - J * a)
        )
    new = t_new + tau_part(eta_new, d, J)
    if math.log(rng.random()) < new - old:
        sc[DF_IDX] = k_new
        sc[ETA] = eta_new
        return True
    return False


@njit(nogil=True, cache=True, error_model="numpy", inline="always")
def gamma_mt(rng, dd, cc):
    """A Gamma(a, 1) draw for a >= 1 by Marsaglia and Tsang (2000, ACM TOMS 26(3)), with dd = a - 1/3 and
    cc = 1 / sqrt(9 dd) computed once for many draws of the same shape (numpy's standard_gamma uses the
    same method but recomputes them at every call, which made the lambda_j draws twice as costly)."""
    while True:
        x = rng.standard_normal()
        v = 1.0 + cc * x
        if v <= 0.0:
            continue
        v = v * v * v
        u = rng.random()
        x2 = x * x
        if u < 1.0 - 0.0331 * x2 * x2:
            return dd * v
        if math.log(u) < 0.5 * x2 + dd * (1.0 - v + math.log(v)):
            return dd * v


@njit(nogil=True, cache=True, error_model="numpy")
def fill_z2(d, st, wk, z2):
    """z2_j = (theta_j - c_j)^2 / tau^2 with c_j = mu, or c_j = mu + x_j' beta with predictors (block_a_reg
    left them in wk.centre); returns their sum."""
    sc = st.scalars
    mu = sc[MU]
    inv_tau2 = math.exp(-2.0 * sc[ETA])
    sz = 0.0
    theta = st.theta
    J = z2.shape[0]
    if d.X.shape[1] == 0:
        for j in range(J):
            r = theta[j] - mu
            z2[j] = r * r * inv_tau2
            sz += z2[j]
    else:
        cen = wk.centre
        for j in range(J):
            r = theta[j] - cen[j]
            z2[j] = r * r * inv_tau2
            sz += z2[j]
    return sz


@njit(nogil=True, cache=True, error_model="numpy")
def df_draw(rng, d, sc, z2, sz, lp):
    """df | theta, mu, tau with every lambda_j integrated out: an exact draw from its discrete conditional.

    A grid longer than DF_WINDOW is drawn within a random window of DF_WINDOW neighbouring points that
    holds the current one (its start uniform among the DF_WINDOW starts that do, cells off the grid left
    out). Every state of a window chooses that window with the same probability, so the move keeps
    p(df | theta, mu, tau) invariant (detailed balance), at DF_WINDOW sums over the groups instead of K.
    """
    K = d.df_grid.shape[0]
    J = z2.shape[0]
    lo, hi = 0, K
    if K > DF_WINDOW:
        start = int(sc[DF_IDX]) - int(rng.random() * DF_WINDOW)
        lo, hi = max(start, 0), min(start + DF_WINDOW, K)
    top = -np.inf
    for k in range(lo, hi):
        lp[k] = df_loglik(k, d, z2, sz, J)
        top = max(top, lp[k])
    total = 0.0
    for k in range(lo, hi):
        lp[k] = math.exp(lp[k] - top)
        total += lp[k]
    u = rng.random() * total
    k_new = hi - 1
    acc = 0.0
    for k in range(lo, hi):
        acc += lp[k]
        if u < acc:
            k_new = k
            break
    sc[DF_IDX] = k_new


@njit(nogil=True, cache=True, error_model="numpy")
def lambda_draw(rng, d, st, wk):
    """Every lambda_j | theta_j, mu, tau, df ~ Gamma((df + 1)/2, rate (df + z_j^2)/2) (1 at df = inf), with
    wk.z2 holding z_j^2 at the current mu and tau; wk.inv_lam gets 1 / lambda_j."""
    df = d.df_grid[int(st.scalars[DF_IDX])]
    lam = st.lam
    il = wk.inv_lam
    z2 = wk.z2
    J = lam.shape[0]
    if math.isinf(df):
        for j in range(J):
            lam[j] = 1.0
            il[j] = 1.0
        return
    a = 0.5 * (df + 1.0)
    if a >= 1.0:
        dd = a - 1.0 / 3.0
        cc = 1.0 / math.sqrt(9.0 * dd)
        for j in range(J):
            x = 2.0 * gamma_mt(rng, dd, cc) / (df + z2[j])
            lam[j] = x
            il[j] = 1.0 / x
    else:
        for j in range(J):
            x = 2.0 * rng.standard_gamma(a) / (df + z2[j])
            lam[j] = x
            il[j] = 1.0 / x


@njit(nogil=True, cache=True, error_model="numpy")
def tail_step(rng, d, st, wk):
    """The heavy tails' moves after block A, every lambda_j integrated out until the last: df | theta, mu, tau
    (df_draw), then (df, tau) jointly (df_tau_step), then every lambda_j | df, theta, mu, tau (lambda_draw).
    The first two keep p(df, tau | theta, mu) invariant and the last draws lambda from its conditional:
    together an exact partially collapsed update of (df, tau, lambda)."""
    sc = st.scalars
    z2 = wk.z2
    sz = fill_z2(d, st, wk, z2)
    if d.df_grid.shape[0] > 1:
        df_draw(rng, d, sc, z2, sz, wk.lpd)
        if df_tau_step(rng, d, sc, z2, sz):
            sz = fill_z2(d, st, wk, z2)  # tau moved
    lambda_draw(rng, d, st, wk)


# ---------------------------------------------------------------------------------------------
# block B


@njit(nogil=True, cache=True, error_model="numpy")
def block_b(rng, d, scalars, theta, sigma2, lp):
    """The variances given theta: sigma_j^2, s^2 and nu (separate) or sigma^2 (shared); nothing for known."""
    ybar, n, m2 = d.ybar, d.n, d.m2
    nu_grid, nu_logprior = d.nu_grid, d.nu_logprior
    J = ybar.shape[0]
    K = nu_grid.shape[0]
    if d.within == WITHIN_SEPARATE:
        nu = nu_grid[int(scalars[NU_IDX])]
        nus2 = nu * scalars[S2]
        inv_sum = 0.0
        for j in range(J):
            r = ybar[j] - theta[j]
            ss = nus2 + m2[j] + n[j] * r * r
            sigma2[j] = ss / (2.0 * rng.standard_gamma(0.5 * (nu + n[j])))
            inv_sum += 1.0 / sigma2[j]
        scalars[S2] = rng.standard_gamma(0.5 * J * nu + d.s2_shape) / (0.5 * nu * inv_sum + d.s2_rate)
        if K > 1:
            log_sum = sum_log(sigma2)
            s2 = scalars[S2]
            top = -np.inf
            for k in range(K):
                h = 0.5 * nu_grid[k]
                lp[k] = (
                    nu_logprior[k]
                    + J * (h * math.log(h * s2) - math.lgamma(h))
                    - (h + 1.0) * log_sum
                    - h * s2 * inv_sum
                )
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
            scalars[NU_IDX] = k_new
    elif d.within == WITHIN_SHARED:
        ss = 0.0
        n_tot = 0.0
        for j in range(J):
            r = ybar[j] - theta[j]
            ss += m2[j] + n[j] * r * r
            n_tot += n[j]
        # with 0, 0 (p(sigma^2) ∝ 1/sigma^2) this is the flat-prior draw, bit for bit
        scalars[SIGMA2] = (ss + 2.0 * d.s2_rate) / (2.0 * rng.standard_gamma(0.5 * n_tot + d.s2_shape))


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
    """What a sweep needs beyond the statistics and priors, computed once per problem: the lgamma
    table of the collapsed nu move and the groups' size layout, one int64 array [C, starts (C + 1),
    sizes (C), pos (J)] from size_classes, or [-1] (sums group by group) when the sizes are not whole
    numbers or the classes hold fewer than LOG_BLOCK groups on average."""
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
            acc += (h + 0.5 * sizes[c]) * sum_log_shifted(half_ss[starts[c] : starts[c + 1]], hs2)
    else:
        for j in range(n.shape[0]):
            acc += (h + 0.5 * n[j]) * math.log(hs2 + half_ss[j])
    return nu_logprior[k] + J * (h * math.log(hs2) - math.lgamma(h)) + table[k] - acc


@njit(nogil=True, cache=True)
def collapsed_nu_step(rng, d, scalars, theta, half_ss):
    """Metropolis move of nu to a neighbouring grid point, with the sigma_j^2 integrated out.

    With many groups the sigma_j^2 pin nu down, so the draw of nu given them barely moves; this
    move targets p(nu | s^2, theta, y) instead. It must be followed at once by the draw of every
    sigma_j^2 given the new nu (block_b does that first), which makes the pair an exact
    partially collapsed update of (nu, sigma^2). The proposal (k - 1 or k + 1, each with
    probability 1/2; off the grid is rejected) is symmetric. The size classes come from d.layout
    (n_classes = -1: group by group); half_ss is work space of J numbers.
    """
    n, ybar, m2 = d.n, d.ybar, d.m2
    layout = d.layout
    n_classes = layout[0]
    c = max(n_classes, 0)
    starts = layout[1 : c + 2]
    sizes = layout[c + 2 : 2 * c + 2]
    pos = layout[2 * c + 2 :]
    J = n.shape[0]
    K = d.nu_grid.shape[0]
    k = int(scalars[NU_IDX])
    k_new = k - 1 if rng.random() < 0.5 else k + 1
    if k_new < 0 or k_new >= K:
        return
    for j in range(J):
        r = ybar[j] - theta[j]
        half_ss[pos[j] if n_classes >= 0 else j] = 0.5 * (m2[j] + n[j] * r * r)
    s2 = scalars[S2]
    diff = collapsed_nu_loglik(
        k_new, J, d.nu_grid, d.nu_logprior, d.nu_table, s2, n, half_ss, n_classes, starts, sizes
    ) - collapsed_nu_loglik(k, J, d.nu_grid, d.nu_logprior, d.nu_table, s2, n, half_ss, n_classes, starts, sizes)
    if math.log(rng.random()) < diff:
        scalars[NU_IDX] = k_new


@njit(nogil=True, cache=True, error_model="numpy")
def scale_step(rng, d, scalars, theta, sigma2):
    """Rescale s^2 and every sigma_j^2 by one factor c drawn from its conditional (a group move).

    Under (s^2, sigma_j^2) -> (c s^2, c sigma_j^2), with the Jacobian c^(J+1) and the invariant
    measure dc/c (Liu and Sabatti 2000, JASA 95), the density of c is
        c^(-N/2 - 1) exp(-A / c) * c^a exp(-b c s^2),   A = sum_j SS_j / (2 sigma_j^2),
    an inverse gamma(N/2, A) for p(s^2) ∝ 1/s^2 (a = b = 0), drawn exactly; for a gamma(a, b) prior
    the inverse gamma is an independence proposal, accepted with min(1, w(c) / w(1)),
    w(c) = c^a exp(-b c s^2). It moves the common scale that the Gibbs draws shift only slowly.
    """
    n, ybar, m2 = d.n, d.ybar, d.m2
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
    if d.s2_shape > 0.0 or d.s2_rate > 0.0:
        s2 = scalars[S2]
        log_w = d.s2_shape * math.log(c) - d.s2_rate * s2 * (c - 1.0)
        if math.log(rng.random()) >= log_w:
            return
    scalars[S2] *= c
    for j in range(J):
        sigma2[j] *= c


@njit(nogil=True, cache=True, error_model="numpy")
def pair_step(rng, d, st, wk):
    """theta_j of every group, and for the groups of at most PAIR_MAX_N measurements (sigma_j^2, theta_j) jointly
    (separate structure), given mu, tau, beta and lambda as block A left them.

    Block A draws (tau, mu) with every theta_j integrated out; this step completes it. For a small group, with
    theta_j integrated out p(sigma_j^2 | rest) is proportional to
        (sigma_j^2)^(-(a/2 + 1)) exp(-b / (2 sigma_j^2)) * N(ybar_j | c_j, t_j + sigma_j^2 / n_j),
    a = nu + n_j - 1, b = nu s^2 + M2_j, c_j the group's centre (mu, or mu + x_j' beta) and t_j its prior variance
    (tau^2, or tau^2 / lambda_j with heavy tails): sigma_j^2 takes an independence Metropolis-Hastings step that
    proposes from the first part, Scaled-Inv-chi2(a, b / a), and accepts with the ratio of the normal factor. Then
    every theta_j is drawn from its normal conditional given sigma_j^2 (block A's formula 3). Block A's draw of
    (tau, mu) and this step's of sigma_j^2 both target the distribution with theta integrated out, and theta comes
    last from its exact conditional, so the pair keeps the joint posterior invariant.
    Why: a group whose few measurements agree closely but lie far from the others has two explanations, theta_j near
    its own mean with a small sigma_j, or theta_j pulled in with a large sigma_j; drawn one given the other (block A,
    block B) the chain crosses between them only rarely, this step in one move. A group of more measurements pins
    sigma_j with its own M2_j and is left to block B (PAIR_MAX_N says why). wk.v is kept equal to sigma_j^2 / n_j."""
    sc = st.scalars
    nu = d.nu_grid[int(sc[NU_IDX])]
    nus2 = nu * sc[S2]
    tau2 = math.exp(2.0 * sc[ETA])
    heavy = d.between == BETWEEN_HEAVY
    il = wk.inv_lam
    reg = d.X.shape[1] > 0  # with predictors block_a_reg left each centre c_j = mu + x_j' beta in wk.centre
    cen = wk.centre
    mu = sc[MU]
    ybar, n, m2 = d.ybar, d.n, d.m2
    theta, sigma2, v = st.theta, st.sigma2, wk.v
    for j in range(ybar.shape[0]):
        c = cen[j] if reg else mu
        t = tau2 * il[j] if heavy else tau2
        a = nu + n[j] - 1.0
        if n[j] <= PAIR_MAX_N and a > 0.0:  # a <= 0: a down-weighted group (n_j <= 1 - nu) has no proper proposal
            r = ybar[j] - c
            h = 0.5 * a
            if h >= 1.0:
                dd = h - 1.0 / 3.0
                g = gamma_mt(rng, dd, 1.0 / math.sqrt(9.0 * dd))
            else:
                g = rng.standard_gamma(h)
            s_new = (nus2 + m2[j]) / (2.0 * g)
            v_old = t + sigma2[j] / n[j]
            v_new = t + s_new / n[j]
            # accept when log U < log ratio, -log U being a standard exponential draw
            if -rng.standard_exponential() < 0.5 * (math.log(v_old / v_new) + r * r * (1.0 / v_old - 1.0 / v_new)):
                sigma2[j] = s_new
                v[j] = s_new / n[j]
        vj = v[j]
        inv_d = 1.0 / (vj + t)
        theta[j] = (c * vj + ybar[j] * t) * inv_d + math.sqrt(vj * t * inv_d) * rng.standard_normal()


# ---------------------------------------------------------------------------------------------
# the sweep


@njit(nogil=True, cache=True)
def sweep(rng, adapt, d, st, wk):
    """One sweep from `st` (updated in place). Returns the slice update's density evaluations."""
    fill_v(d, st.scalars, st.sigma2, wk.v)
    ev = block_a(rng, adapt, d, st, wk)
    if d.within == WITHIN_SEPARATE:
        pair_step(rng, d, st, wk)
    if d.between == BETWEEN_HEAVY:
        tail_step(rng, d, st, wk)
    if d.within == WITHIN_SEPARATE:
        if d.nu_grid.shape[0] > 1:
            collapsed_nu_step(rng, d, st.scalars, st.theta, wk.half_ss)
        block_b(rng, d, st.scalars, st.theta, st.sigma2, wk.lp)
        scale_step(rng, d, st.scalars, st.theta, st.sigma2)
    else:
        block_b(rng, d, st.scalars, st.theta, st.sigma2, wk.lp)
    return ev


@njit(nogil=True, cache=True)
def store(d, st, ev, out, row):
    """Write the state after a sweep into row `row` of the Draws."""
    sc = st.scalars
    J = st.theta.shape[0]
    out.mu[row] = sc[MU]
    out.tau[row] = math.exp(sc[ETA])
    for j in range(J):
        out.theta[row, j] = st.theta[j]
    if d.within == WITHIN_SEPARATE:
        for j in range(J):
            out.sigma[row, j] = math.sqrt(st.sigma2[j])
        out.s[row] = math.sqrt(sc[S2])
        out.nu[row] = d.nu_grid[int(sc[NU_IDX])]
    elif d.within == WITHIN_SHARED:
        out.sigma[row, 0] = math.sqrt(sc[SIGMA2])
    if d.between == BETWEEN_HEAVY:
        out.df[row] = d.df_grid[int(sc[DF_IDX])]
        for j in range(J):
            out.lam[row, j] = st.lam[j]
    for a in range(st.beta.shape[0]):
        out.beta[row, a] = st.beta[a]
    out.evals[row] = ev


@njit(nogil=True, cache=True)
def sweeps(rng, n_sweeps, adapt, d, st, wk, out, offset):
    """Run `n_sweeps` sweeps from `st`; when out has rows, sweep i is stored in row offset + i."""
    keep = out.mu.shape[0] > 0
    for it in range(n_sweeps):
        ev = sweep(rng, adapt, d, st, wk)
        if keep:
            store(d, st, ev, out, offset + it)
