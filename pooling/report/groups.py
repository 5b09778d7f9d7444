"""Per-group answers computed from the draws: posterior summaries, shrinkage, ranks, thresholds,
specification limits, bias against the consensus value and head-to-head probabilities.

Nothing here uses a normal approximation: every probability is a fraction of draws and every
interval is a pair of quantiles of draws. Work over groups is done in column blocks (draws.BLOCK)
and ranks are stored as small integers, so a fit with 10,000 groups and 4,000 draws stays within
a few hundred megabytes.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import ndtr

from .._blocks import each_block
from ..errors import InputError
from .draws import BLOCK, View, interval, view

# The draws of a group not yet seen (theta_new, sigma_new) come from this fixed seed, so that a
# report made twice from the same draws.nc is identical. It is stated in every report.
PREDICTION_SEED = 20240611

BEST = ("highest", "lowest")


# ---------------------------------------------------------------------------------------------
# ranks


def _whole_or_fraction(n):
    """Group sizes as whole numbers, unless down-weighting (a store's half-life) made them fractional."""
    n = np.asarray(n)
    return n.astype(np.int64) if np.all(n == np.round(n)) else n.astype(np.float64)


def rank_draws(theta: np.ndarray, best: str = "highest", chunk: int = 256) -> np.ndarray:
    """Rank of each group within each draw, 1 = best: R[s, j] = 1 + #{k : theta_sk better than theta_sj}."""
    if best not in BEST:
        raise InputError(f"bad option: best must be 'highest' or 'lowest'; found '{best}'")
    S, J = theta.shape
    dtype = np.uint16 if J < np.iinfo(np.uint16).max else np.int32
    ranks = np.empty((S, J), dtype=dtype)
    counting = np.broadcast_to(np.arange(1, J + 1, dtype=dtype), (chunk, J))
    for a in range(0, S, chunk):
        block = theta[a:a + chunk]
        order = np.argsort(-block if best == "highest" else block, axis=1)
        np.put_along_axis(ranks[a:a + chunk], order, counting[: block.shape[0]], axis=1)
    return ranks


def _quantile_sorted_index(S: int, q: float) -> int:
    """Index into the sorted draws of the q quantile by the inverted empirical CDF (an integer rank)."""
    return int(min(S - 1, max(0, np.ceil(q * S) - 1)))


def rank_summary(ranks: np.ndarray, level: float, k: int) -> dict[str, np.ndarray]:
    """Mean rank, the central rank interval (inverted empirical CDF, so the bounds are whole ranks),
    P(rank = 1) and P(rank <= k), per group."""
    S, J = ranks.shape
    i_lo = _quantile_sorted_index(S, (1 - level) / 2)
    i_hi = _quantile_sorted_index(S, (1 + level) / 2)
    out = {"rank_mean": np.empty(J), "rank_low": np.empty(J), "rank_high": np.empty(J),
           "p_best": np.empty(J), "p_top_k": np.empty(J)}
    for a in range(0, J, BLOCK):
        r = np.ascontiguousarray(ranks[:, a:a + BLOCK].T)  # (groups, draws): selection runs along memory
        out["rank_mean"][a:a + BLOCK] = r.mean(axis=1, dtype=np.float64)
        out["p_best"][a:a + BLOCK] = (r == 1).mean(axis=1)
        out["p_top_k"][a:a + BLOCK] = (r <= k).mean(axis=1)
        r.partition([i_lo, i_hi], axis=1)
        out["rank_low"][a:a + BLOCK] = r[:, i_lo]
        out["rank_high"][a:a + BLOCK] = r[:, i_hi]
    return out


def rank_matrix(ranks: np.ndarray, rows: np.ndarray | None = None, max_rank: int | None = None) -> np.ndarray:
    """P(rank_j = r) for the groups `rows` (default all) and r = 1..max_rank; when max_rank < J one
    more column holds P(rank_j > max_rank), so every row sums to 1."""
    S, J = ranks.shape
    rows = np.arange(J) if rows is None else np.asarray(rows, dtype=np.int64)
    m = J if max_rank is None else int(min(max_rank, J))
    width = m + (1 if m < J else 0)
    sub = np.minimum(ranks[:, rows].astype(np.int64), m + 1) - 1  # ranks beyond m share the last column
    codes = np.arange(len(rows))[None, :] * width + sub
    counts = np.bincount(codes.ravel(), minlength=len(rows) * width).reshape(len(rows), width)
    return counts / S


def rank_probabilities(fit, best: str = "highest", groups=None, max_rank: int | None = None) -> pd.DataFrame:
    """Table of P(rank_j = r): one row per group, one column per rank (1 = best).

    With many groups, ask for a few rows (`groups`) or ranks (`max_rank`); the full J x J table is
    refused above 2,000 groups. A last column '>m' holds P(rank > m) when max_rank = m < J.
    """
    v = view(fit)
    rows = None if groups is None else resolve_groups(v.labels, groups)
    if rows is None and max_rank is None and v.J > 2000:
        raise InputError(f"rank_probabilities: {v.J} groups would make a {v.J} x {v.J} table; "
                         "pass groups=[...] or max_rank=...")
    mat = rank_matrix(rank_draws(v.theta, best), rows, max_rank)
    m = mat.shape[1] if max_rank is None or max_rank >= v.J else int(max_rank)
    cols = list(range(1, m + 1)) + ([f">{m}"] if mat.shape[1] > m else [])
    idx = [v.labels[j] for j in (range(v.J) if rows is None else rows)]
    return pd.DataFrame(mat, index=pd.Index(idx, name="group"), columns=pd.Index(cols, name="rank"))


# ---------------------------------------------------------------------------------------------
# head to head

def resolve_groups(labels: tuple[str, ...], wanted) -> np.ndarray:
    """Positions of the wanted labels; each given once, in the order asked; unknown labels refused."""
    index = {lab: i for i, lab in enumerate(labels)}
    out: list[int] = []
    for lab in wanted:
        lab = str(lab)
        if lab not in index:
            shown = ", ".join(f"'{x}'" for x in labels[:8]) + (", ..." if len(labels) > 8 else "")
            raise InputError(f"bad option: no group '{lab}' in the data; the groups are {shown}")
        if index[lab] not in out:
            out.append(index[lab])
    return np.asarray(out, dtype=np.int64)


def prob_greater(theta: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """M[a, b] = P(theta_a > theta_b) = fraction of draws with theta_a > theta_b; NaN on the diagonal."""
    sub = theta[:, idx]
    m = len(idx)
    out = np.empty((m, m))
    for a in range(m):
        out[a] = (sub[:, a:a + 1] > sub).mean(axis=0)
    out[np.arange(m), np.arange(m)] = np.nan
    return out


MAX_PAIRWISE = 400


def pairwise(fit, groups) -> pd.DataFrame:
    """P(theta_row > theta_column) for the listed groups (at most 400), from the draws."""
    v = view(fit)
    idx = resolve_groups(v.labels, groups)
    if len(idx) > MAX_PAIRWISE:
        raise InputError(f"bad option: at most {MAX_PAIRWISE} groups can be compared pairwise; found {len(idx)}")
    names = [v.labels[j] for j in idx]
    return pd.DataFrame(prob_greater(v.theta, idx), index=pd.Index(names, name="group"), columns=names)


# ---------------------------------------------------------------------------------------------
# specification limits

def outside_fraction(theta, sigma, lower: float | None, upper: float | None) -> np.ndarray:
    """Per draw, P(y_new outside [lower, upper] | theta, sigma) = Phi((lower - theta)/sigma) + Phi((theta - upper)/sigma)
    for y_new ~ N(theta, sigma^2); a missing limit contributes nothing."""
    theta = np.asarray(theta, dtype=np.float64)
    out = np.zeros(np.broadcast_shapes(np.shape(theta), np.shape(sigma)))
    with np.errstate(over="ignore"):  # a limit near 1e308: the z overflows to +-inf, and Phi(+-inf) is exact
        if lower is not None:
            out += ndtr((lower - theta) / sigma)
        if upper is not None:
            out += ndtr((theta - upper) / sigma)
    return out


def new_group_draws(v: View, seed: int = PREDICTION_SEED) -> tuple[np.ndarray, np.ndarray | None]:
    """One (theta_new, sigma_new) per draw: theta_new ~ N(mu, tau^2); for `separate`
    sigma_new^2 ~ Scaled-Inv-chi2(nu, s^2) = nu s^2 / chi2(nu); for `shared` sigma_new = sigma;
    None for `known` (no within-group sd)."""
    rng = np.random.default_rng(seed)
    theta_new = v.mu + v.tau * rng.standard_normal(v.S)
    if v.within == "separate":
        sigma_new = np.sqrt(v.nu * v.s ** 2 / rng.chisquare(v.nu))
    elif v.within == "shared":
        sigma_new = v.sigma
    else:
        sigma_new = None
    return theta_new, sigma_new


def new_group_outside(v: View, lower, upper, level: float, seed: int = PREDICTION_SEED) -> dict | None:
    """Posterior mean and interval of the out-of-spec fraction of a group not yet seen, with its MC error."""
    if v.within == "known" or (lower is None and upper is None):
        return None
    theta_new, sigma_new = new_group_draws(v, seed)
    f = outside_fraction(theta_new, sigma_new, lower, upper)
    lo, hi = interval(f, level)
    return {"mean": float(f.mean()), "low": float(lo), "high": float(hi),
            "mc_error": float(f.std(ddof=1) / np.sqrt(len(f))), "seed": seed,
            "theta_new": _summ(theta_new, level), "sigma_new_median": float(np.median(sigma_new))}


def _summ(x: np.ndarray, level: float) -> dict:
    lo, hi = interval(x, level)
    return {"mean": float(x.mean()), "sd": float(x.std(ddof=1)), "low": float(lo), "high": float(hi)}


# ---------------------------------------------------------------------------------------------
# the table

def check_limits(lower, upper):
    if lower is not None and upper is not None and not lower < upper:
        raise InputError(f"bad option: the lower specification limit ({lower:g}) must be below the upper ({upper:g})")


def group_table(fit, level: float = 0.95, k: int = 3, best: str = "highest", threshold: float | None = None,
                lower: float | None = None, upper: float | None = None, allowed_bias: float | None = None,
                assigned: float | None = None, sigma_pt: float | None = None, ranks: np.ndarray | None = None
                ) -> pd.DataFrame:
    """One row per group (in the fit's group order) with every per-group answer; see COLUMNS.

    Intervals are central credible intervals at `level`; ranks count 1 as the best group, by the
    highest or the lowest theta (`best`); p_top_k is P(rank <= k). z-scores use x_pt = `assigned`
    and sigma_pt, each defaulting to the ISO 13528 Algorithm A robust mean / sd of the group means.

    >>> # doctest: +SKIP
    >>> table = group_table(fit, level=0.9, k=5, threshold=400.0, lower=380.0)
    >>> table.sort_values("rank_mean").head()
    """
    from .interlab import z_scores

    v = view(fit)
    check_level(level)
    check_limits(lower, upper)
    k = check_k(k, v.J)
    if allowed_bias is not None and not allowed_bias > 0:
        raise InputError(f"bad option: the allowed bias must be a positive number; found {allowed_bias:g}")
    J = v.J
    cols: dict[str, np.ndarray] = {"group": np.array(v.labels, dtype=object), "n": _whole_or_fraction(v.n),
                                   "raw_mean": v.raw_mean}
    if v.within == "known":
        cols["std_error"] = v.std_error
    else:
        cols["raw_sd"] = v.raw_sd
    names = ["theta_mean", "theta_sd", "theta_low", "theta_high"]
    if v.within != "known":
        names += ["sigma_mean", "sigma_low", "sigma_high"]
    names += ["shrink_weight", "shrink_low", "shrink_high"]
    if threshold is not None:
        names += ["p_above", "p_below"]
    if v.within != "known" and (lower is not None or upper is not None):
        names += ["outside_mean", "outside_low", "outside_high"]
    names += ["bias_mean", "bias_low", "bias_high"] + (["p_bias_over"] if allowed_bias is not None else [])
    acc = {name: np.empty(J) for name in names}
    tau2 = (v.tau ** 2)[:, None]

    def block(a: int) -> None:
        b = min(J, a + TABLE_BLOCK)
        th = v.theta[:, a:b]
        acc["theta_mean"][a:b] = th.mean(axis=0)
        acc["theta_sd"][a:b] = th.std(axis=0, ddof=1)
        acc["theta_low"][a:b], acc["theta_high"][a:b] = interval(th, level)
        if v.within != "known":
            sig = v.sigma_block(a, b)  # (S, b - a), or (S, 1) when shared
            acc["sigma_mean"][a:b] = sig.mean(axis=0)
            lo, hi = interval(sig, level)
            acc["sigma_low"][a:b], acc["sigma_high"][a:b] = lo, hi
        vj = v.v_block(a, b)
        w = np.broadcast_to(vj / (vj + tau2), th.shape)
        acc["shrink_weight"][a:b] = w.mean(axis=0)
        acc["shrink_low"][a:b], acc["shrink_high"][a:b] = interval(w, level)
        if threshold is not None:
            acc["p_above"][a:b] = (th > threshold).mean(axis=0)
            acc["p_below"][a:b] = (th < threshold).mean(axis=0)
        if "outside_mean" in acc:
            f = outside_fraction(th, v.sigma_block(a, b), lower, upper)
            acc["outside_mean"][a:b] = f.mean(axis=0)
            acc["outside_low"][a:b], acc["outside_high"][a:b] = interval(f, level)
        bias = th - v.mu[:, None]
        acc["bias_mean"][a:b] = bias.mean(axis=0)
        acc["bias_low"][a:b], acc["bias_high"][a:b] = interval(bias, level)
        if allowed_bias is not None:
            acc["p_bias_over"][a:b] = (np.abs(bias) > allowed_bias).mean(axis=0)

    each_block(block, range(0, J, TABLE_BLOCK), threaded=v.S * J >= _THREADED_MIN)
    mu_mean = float(v.mu.mean())
    dist = v.raw_mean - mu_mean
    with np.errstate(divide="ignore", invalid="ignore"):
        # the share of the way from the raw mean to the pooled mean that the group travelled;
        # undefined for a group whose raw mean sits on the pooled mean
        realised = np.where(dist != 0, (v.raw_mean - acc["theta_mean"]) / dist, np.nan)
    # `ranks` may be passed in by a caller that needs them again (rank_draws(theta, best) of this fit)
    rk = rank_summary(rank_draws(v.theta, best) if ranks is None else ranks, level, k)
    z, signal, _ = z_scores(v.raw_mean, assigned, sigma_pt)
    out = dict(cols)
    for name in names:
        out[name] = acc[name]
        if name == "shrink_high":
            out["shrink_realised"] = realised
    out.update(rk)
    out["rank_low"] = rk["rank_low"].astype(np.int64)
    out["rank_high"] = rk["rank_high"].astype(np.int64)
    out["z_score"] = z
    out["z_signal"] = signal
    return pd.DataFrame(out)


# Columns per block of the group table: temporaries of 4,000 draws x 128 groups (4 MB) stay in cache
# and are reused from one block to the next; 1,024-column blocks were ~40% slower at 1,000 groups
# (mostly first-touch page faults of 32 MB temporaries). benchmarks/README.md has the figures.
TABLE_BLOCK = 128
_THREADED_MIN = 1_000_000  # draws x groups from which the blocks are shared between two threads (pooling._blocks)


def check_level(level: float):
    if not (isinstance(level, (float, int)) and 0 < level < 1):
        raise InputError(f"bad option: the interval level must be a number between 0 and 1 (for example 0.95); found {level}")


def check_k(k, J: int) -> int:
    if not isinstance(k, (int, np.integer)) or k < 1:
        raise InputError(f"bad option: k (the size of the top group) must be a whole number of at least 1; found {k!r}")
    return int(min(k, J))


COLUMNS = {
    "group": "group label, exactly as in the data (in groups.csv, text cells beginning with = + - @, a tab or a "
             "carriage return carry a leading apostrophe so that spreadsheets do not run them as formulas)",
    "n": "number of measurements in the group",
    "raw_mean": "the group's own mean (or its given estimate, for the known structure)",
    "raw_sd": "the group's own standard deviation (n - 1 divisor); empty for a single measurement",
    "std_error": "the given standard error of the estimate (known structure)",
    "theta_mean": "posterior mean of the group mean theta_j",
    "theta_sd": "posterior standard deviation of theta_j",
    "theta_low": "lower end of the central credible interval of theta_j",
    "theta_high": "upper end of the central credible interval of theta_j",
    "sigma_mean": "posterior mean of the within-group sd sigma_j",
    "sigma_low": "lower end of the credible interval of sigma_j",
    "sigma_high": "upper end of the credible interval of sigma_j",
    "shrink_weight": "posterior mean of v_j / (v_j + tau^2), v_j = sigma_j^2 / n_j (se_j^2 when known): "
                     "0 keeps the group's own mean, 1 replaces it with the pooled mean",
    "shrink_low": "lower end of the credible interval of the shrinkage weight",
    "shrink_high": "upper end of the credible interval of the shrinkage weight",
    "shrink_realised": "(raw mean - posterior mean) / (raw mean - posterior mean of mu): the share of the way "
                       "to the pooled mean the estimate moved; unstable for raw means close to mu",
    "p_above": "P(theta_j > threshold)",
    "p_below": "P(theta_j < threshold)",
    "outside_mean": "predicted fraction of the group's future measurements outside the specification limits "
                    "(posterior mean of P(y_new outside | theta_j, sigma_j))",
    "outside_low": "lower end of the credible interval of that fraction",
    "outside_high": "upper end of the credible interval of that fraction",
    "bias_mean": "posterior mean of theta_j - mu (bias against the consensus value)",
    "bias_low": "lower end of the credible interval of the bias",
    "bias_high": "upper end of the credible interval of the bias",
    "p_bias_over": "P(|theta_j - mu| > allowed bias)",
    "rank_mean": "posterior mean rank (1 = best)",
    "rank_low": "lower end of the rank interval (whole ranks)",
    "rank_high": "upper end of the rank interval (whole ranks)",
    "p_best": "probability of being the best group",
    "p_top_k": "probability of being among the k best",
    "z_score": "(raw mean - assigned value) / sigma_pt",
    "z_signal": "ISO 13528: none for |z| <= 2, warning for 2 < |z| < 3, action for |z| >= 3",
}
