"""Every answer of a run, computed once, in the engine's internal units, and mapped to the user's at the end.

    res = results.compute(fit, ReportOptions(level=0.9, threshold=400.0))
    res.table            # one row per group, every group, user units (also for summary mode)
    res.hyper            # mu, tau, ... : mean, sd, median, the level's interval, MC error, R-hat, ESS
    res.tail             # heavy tails: the posterior of df and the outlying groups
    res.lab, res.checks, res.new_group, res.pairs, res.heat, res.diagnostics, res.methods

Both ways of running produce the same `Results`: a full run (`posterior.Fit`) from its stored draws, a
summary-mode run (`summary.SummaryFit`) from the running summaries its chains kept, with its kept groups'
columns from their stored draws. The page (report/page.py), the terminal (terminal.py) and the run folder
(output.py) only present a Results; nothing there computes a number from draws.

Internal units: y' = (y - center) / scale with scale a power of two (model.build). Means, intervals,
probabilities and ranks are computed from internal-unit draws; thresholds, limits and the allowed bias are
carried into those units (asked.ReportOptions.internal); a location x maps back as center + scale * x,
a spread as scale * x. At offsets of 1e12 this is the difference between the right answer and one off by
tens of posterior sds (a float64 near 1e12 has steps of 1.2e-4).

Where a new per-group answer goes: its per-draw formula in pooling/answers.py (accumulate for means and
counts, derived for exact intervals), summary mode's histogram in summary_kernel.py if it needs an
interval there, and its column in `_assemble` below, with its description in COLUMNS. Both modes then
have it.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from . import answers as A
from . import order as O
from ._blocks import Scratch, each_block
from .asked import (
    PURPOSE_CHECKS,
    PURPOSE_PREDICTION,
    ReportOptions,
    check_k,
    derived_rng,
    level_key,
    level_label,
    resolve_groups,
    split_compare,
)
from .errors import InputError
from .posterior import SCALED, Fit, hyper_names, hyper_summary, summarize_draws

MAX_PAIRWISE = 400
HEAT_ROWS_MANY = 40  # above HEAT_ALL groups the heat map shows the best 40 over ranks 1..HEAT_ALL
HEAT_ALL = 60
#: groups per block of the per-group computations (a block of 4,000 draws is 2 MB). 256 made the gather of a
#: block's columns 23 % faster (512 bytes of each draw's row at 64 groups: the reads wait on memory) but held
#: 50 MB more per 2,000 draws per chain, and the whole run gained too little to pay for it (2026-12-04).
TABLE_BLOCK = 64
ACC_BLOCK = 4096  # groups per block of the running summaries over the stored draws
OUTLYING_AT = 0.5  # a group is flagged outlying when P(outlying) is at least this
CHECK_DRAWS = 400  # the model checks use at most this many evenly spaced draws (a p-value's MC error <= 0.025)
CHECK_ROWS = 16  # draws per block of the model checks' arithmetic


# ---------------------------------------------------------------------------------------------
# the column guide: every column of groups.csv, in words ({L} is the interval level, e.g. 95%)

COLUMNS = {
    "group": "group label, exactly as in the data (in groups.csv, text cells beginning with = + - @, a tab or a "
    "carriage return carry a leading apostrophe so that spreadsheets do not run them as formulas)",
    "n": "number of measurements in the group (fractional when a store's half-life down-weights old batches)",
    "raw_mean": "the group's own mean (or its given estimate, for the known structure)",
    "raw_sd": "the group's own standard deviation (n - 1 divisor); empty for a single measurement",
    "std_error": "the given standard error of the estimate (known structure)",
    "theta_mean": "posterior mean of the group mean theta_j",
    "theta_sd": "posterior standard deviation of theta_j",
    "theta_low": "lower end of the central {L} credible interval of theta_j",
    "theta_high": "upper end of the central {L} credible interval of theta_j",
    "sigma_mean": "posterior mean of the within-group sd sigma_j",
    "sigma_low": "lower end of the {L} credible interval of sigma_j",
    "sigma_high": "upper end of the {L} credible interval of sigma_j",
    "shrink_weight": "posterior mean of the shrinkage weight v_j / (v_j + tau^2 / lambda_j), v_j = sigma_j^2 / n_j "
    "(se_j^2 when known; lambda_j = 1 for the normal between-group distribution): 0 keeps the "
    "group's own mean, 1 replaces it with the pooled mean",
    "shrink_low": "lower end of the {L} credible interval of the shrinkage weight",
    "shrink_high": "upper end of the {L} credible interval of the shrinkage weight",
    "shrink_realised": "(own mean - posterior mean) / (own mean - posterior mean of mu): the share of the way "
    "to the pooled mean the estimate actually moved (0: not at all, 1: all the way); unsteady "
    "for own means close to mu",
    "p_above": "P(theta_j > threshold)",
    "p_below": "P(theta_j < threshold)",
    "threshold_side": "above or below the threshold when P(above) or P(below) is at least decide_at, else undecided",
    "p_mean_outside": "P(theta_j outside the specification limits): the group's mean, not its single measurements",
    "limits_side": "outside when p_mean_outside is at least decide_at, inside when it is at most 1 - decide_at, "
    "else undecided",
    "outside_mean": "predicted fraction of the group's future measurements outside the specification limits "
    "(posterior mean of P(y_new outside | theta_j, sigma_j))",
    "outside_low": "lower end of the {L} credible interval of that fraction",
    "outside_high": "upper end of the {L} credible interval of that fraction",
    "bias_mean": "posterior mean of theta_j - c_j, the bias against the consensus value of the group's own level: "
    "c_j = mu, or with group-level predictors c_j = mu + x_j' beta (the consensus_mean column)",
    "bias_low": "lower end of the {L} credible interval of the bias",
    "bias_high": "upper end of the {L} credible interval of the bias",
    "p_bias_over": "P(|theta_j - mu| > allowed bias)",
    "bias_side": "over when p_bias_over is at least decide_at, within when it is at most 1 - decide_at, else undecided",
    "tail_weight": "posterior mean of lambda_j, the group's weight in the heavy-tailed between-group distribution "
    "theta_j ~ N(mu, tau^2 / lambda_j): about 1 for an ordinary group; a weight w lets the group's "
    "deviation from mu be about 1/sqrt(w) times as wide as tau (0.04: five times)",
    "p_outlying": "P(lambda_j is below the 5% point of its prior at the drawn df): the probability that the group "
    "needs a wider allowance than 95% of groups would get",
    "outlying": "true when p_outlying is at least 0.5: the group sits outside the between-group distribution of "
    "the others, more likely than not",
    "level": "with categorical predictors: the group's level (its value of each categorical predictor, joined "
    "by ' / ')",
    "consensus_mean": "with group-level predictors: posterior mean of c_j = mu + x_j' beta, the consensus value of "
    "groups like this one (its level, and its own values of the numeric predictors)",
    "consensus_low": "lower end of the {L} credible interval of c_j",
    "consensus_high": "upper end of the {L} credible interval of c_j",
    "rank_in_level_mean": "with categorical predictors: posterior mean rank among the groups of the same level "
    "(1 = best)",
    "rank_in_level_low": "lower end of the {L} interval of the rank within the level (whole ranks)",
    "rank_in_level_high": "upper end of the {L} interval of the rank within the level (whole ranks)",
    "p_best_in_level": "probability of being the best group of its level",
    "rank_in_level_mean_error": "summary mode: largest possible error of rank_in_level_mean; 0 for kept groups",
    "rank_mean": "posterior mean rank (1 = best)",
    "rank_low": "lower end of the {L} rank interval (whole ranks)",
    "rank_high": "upper end of the {L} rank interval (whole ranks)",
    "p_best": "probability of being the best group",
    "p_top_k": "probability of being among the k best",
    "z_score": "(own mean - assigned value) / sigma_pt",
    "z_signal": "ISO 13528: none for |z| <= 2, warning for 2 < |z| < 3, action for |z| >= 3",
    "kept": "summary mode: why every draw of this group was kept (named, sample, top candidate); empty when only "
    "summaries were kept",
    "theta_limit_error": "summary mode: largest possible error of theta_low and theta_high (histogram bin width); "
    "0 for kept groups",
    "sigma_limit_error": "summary mode: largest possible error of sigma_low and sigma_high; 0 when exact",
    "shrink_limit_error": "summary mode: largest possible error of shrink_low and shrink_high; 0 when exact",
    "outside_limit_error": "summary mode: largest possible error of outside_low and outside_high; 0 for kept groups",
    "bias_limit_error": "summary mode: largest possible error of bias_low and bias_high (above 100,000 groups: "
    "theta's bound plus max |mu_s - mean mu|)",
    "rank_mean_error": "summary mode: largest possible error of rank_mean (half the rank bucket's count - 1, "
    "averaged over draws); 0 for kept groups",
    "rank_limit_error": "summary mode: largest possible error of rank_low and rank_high, in ranks: the exact "
    "rank_low is in [rank_low, rank_low + e], the exact rank_high in [rank_high - e, rank_high]; "
    "0 for kept groups",
    "theta_rhat_classic": "summary mode: classic R-hat of theta_j from the chains' means and variances (not split, "
    "not rank-normalised): a screen for all groups",
}


def column_base(name: str) -> str:
    """'theta_low_95' -> 'theta_low' (the COLUMNS key of a level-named column)."""
    head, _, tail = name.rpartition("_")
    if head and head.endswith(("_low", "_high")) and tail.replace("_", "").isdigit():
        return head
    for stem in ("_low_", "_high_"):
        i = name.find(stem)
        if i > 0 and name[i + len(stem) :].replace("_", "").isdigit():
            return name[: i + len(stem) - 1]
    return name


def describe_column(name: str, level: float) -> str | None:
    text = COLUMNS.get(column_base(name))
    return None if text is None else text.replace("{L}", level_label(level))


# ---------------------------------------------------------------------------------------------
# the results object


@dataclass
class Results:
    """Every answer of one run, in the user's units (see the module notes)."""

    options: ReportOptions
    mode: str  # "full" or "summary"
    model: object
    problem: object
    table: pd.DataFrame
    hyper: dict
    hyper_draws: dict
    diagnostics: dict
    run: dict
    data: dict
    lab: dict
    tail: dict | None
    new_group: dict | None
    checks: dict | None
    pairs: pd.DataFrame | None
    heat: dict | None
    # --compare: theta_row - theta_column, data units: "mean", "low", "high" (DataFrames like pairs), "level"
    pair_diff: dict | None = None
    methods: dict = field(default_factory=dict)
    predictors: dict | None = None  # group-level predictors: coefficients, contrasts, consensus per level, spread
    summary: dict | None = None  # summary mode: kept groups, error figures, classic R-hat screen
    seconds: dict = field(default_factory=dict)

    @property
    def J(self) -> int:
        return len(self.table)

    @property
    def labels(self) -> tuple[str, ...]:
        # asked for some fifty times while a run's files are written: made once per table (at 20,000 groups each
        # tuple of an Arrow string column took 30 ms)
        held = self.__dict__.get("_labels_of")
        if held is None or held[0] is not self.table:
            held = (self.table, tuple(self.table["group"]))
            self.__dict__["_labels_of"] = held
        return held[1]

    @property
    def targets_met(self) -> bool:
        return bool(self.diagnostics["met"])

    @property
    def key(self) -> str:
        """The suffix of this run's interval columns: '95' at level 0.95."""
        return level_key(self.options.level)

    def col(self, base: str) -> str:
        """The table column of an interval end at this run's level: col('theta_low') -> 'theta_low_95'."""
        return f"{base}_{self.key}"


# ---------------------------------------------------------------------------------------------
# the internal-unit view of a full run's draws


@dataclass(frozen=True, eq=False)
class Draws:
    """A full run's draws stacked over chains, internal units: mu, tau (S,); theta (S, J); sigma (S, J), (S, 1)
    or (S, 0); lam (S, J) or (S, 0); df (S,) or None; per-chain shapes kept for the accumulators."""

    mu: np.ndarray
    tau: np.ndarray
    theta: np.ndarray
    sigma: np.ndarray
    lam: np.ndarray
    df: np.ndarray | None
    chains: int
    per_chain: int
    beta: np.ndarray | None = None  # (S, p) with group-level predictors, else (S, 0)

    @property
    def S(self) -> int:
        return self.mu.shape[0]


def _stacked(raw) -> Draws:
    C, D = raw.mu.shape
    J = raw.theta.shape[2]
    S = C * D
    if raw.sigma is None:
        sigma = np.empty((S, 0))
    elif raw.sigma.ndim == 2:
        sigma = raw.sigma.reshape(S, 1)
    else:
        sigma = raw.sigma.reshape(S, J)
    lam = raw.lam.reshape(S, J) if raw.lam is not None else np.empty((S, 0))
    beta = raw.beta.reshape(S, -1) if raw.beta is not None else np.empty((S, 0))
    return Draws(
        raw.mu.reshape(S),
        raw.tau.reshape(S),
        raw.theta.reshape(S, J),
        sigma,
        lam,
        None if raw.df is None else raw.df.reshape(S),
        C,
        D,
        beta,
    )


def _quantiles(x: np.ndarray, probs) -> np.ndarray:
    """numpy's default (linear) quantiles of each column of x (S, m), equal to np.quantile's to the bit: rows of
    the result follow probs (two of them)."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    S, m = x.shape
    buf = np.empty((m, S))
    O.gather(x, 0, m, buf)
    out = np.empty((2, m))
    O.Selection(S, m).quantiles(buf, m, np.array([(S - 1) * q for q in probs]), out[0], out[1], 0)
    return out


def quantile_index(S: int, q: float) -> int:
    """Index into the sorted draws of the q quantile by the inverted empirical CDF (an integer rank)."""
    return int(min(S - 1, max(0, np.ceil(q * S) - 1)))


RANK_BLOCK = 256  # draws per block of the ranking (two threads share the blocks)


def rank_draws(x: np.ndarray, highest: bool = True) -> np.ndarray:
    """Rank of each group within each draw of x (S, J), 1 = best (the largest x, or the smallest when not
    `highest`): R[s, j] = 1 + #{k : x_sk better than x_sj}, ties broken by position (the order of a stable
    sort). A compiled counting sort per draw (pooling.order.rank_rows); a draw it hands back (a NaN, an
    infinite value, values crowded together) is ranked by numpy's stable argsort."""
    x = np.ascontiguousarray(x)
    S, J = x.shape
    dtype = np.uint16 if J < np.iinfo(np.uint16).max else np.int32
    ranks = np.empty((S, J), dtype=dtype)
    bad = np.zeros(S, dtype=np.bool_)
    sign = 1.0 if highest else -1.0

    def block(s0: int) -> None:
        O.rank_rows(
            x,
            sign,
            s0,
            min(S, s0 + RANK_BLOCK),
            ranks,
            np.empty(J),
            np.empty(J, dtype=np.int64),
            O.sort_counts(J),
            bad,
        )

    each_block(block, range(0, S, RANK_BLOCK), threaded=S * J >= 1_000_000)
    for s in np.flatnonzero(bad):
        order = np.argsort(-x[s] if highest else x[s], kind="stable")
        ranks[s, order] = np.arange(1, J + 1, dtype=dtype)
    return ranks


RANK_ROWS = 512  # draws ranked, or folded, at a time
FOLD_GROUPS = 64  # groups laid out together by order.fold_ranks
FOLD_WIDTH = 4  # room for this many times the ranks a group keeps at each end, between selections


class _RankFold:
    """Per-group rank figures gathered from blocks of draws' ranks (order.fold_ranks): the sums, the draws ranked
    first and within the first k, the draws at each rank 1..m, and per group candidates for its kl = i_lo + 1
    smallest ranks and kh = S - i_hi largest, whose kl-th smallest and kh-th largest are the central interval's
    ends (inverted empirical CDF)."""

    def __init__(self, S: int, J: int, level: float, k: int, m: int, dtype, rows: int):
        self.S, self.J, self.k, self.m = S, J, k, m
        i_lo = quantile_index(S, (1 - level) / 2)
        i_hi = quantile_index(S, (1 + level) / 2)
        self.total, self.best, self.top = (np.zeros(J, dtype=np.int64) for _ in range(3))
        self.first = np.zeros((J, m), dtype=np.int64)
        self.kl, self.kh = i_lo + 1, S - i_hi
        wide = FOLD_WIDTH
        self.low, self.high = np.empty((J, wide * self.kl), dtype=dtype), np.empty((J, wide * self.kh), dtype=dtype)
        self.nlow, self.nhigh = np.zeros(J, dtype=np.int64), np.zeros(J, dtype=np.int64)
        # thresholds: every rank passes until a group has twice the ranks it keeps (ranks are 1..J)
        self.tlow, self.thigh = np.full(J, np.iinfo(np.int64).max), np.full(J, -1, dtype=np.int64)
        self.threaded = S * J >= 1_000_000
        self.scratch = Scratch(lambda: np.empty((FOLD_GROUPS, rows), dtype=dtype))

    def add(self, blk: np.ndarray, n: int) -> None:
        """Fold the ranks of the draws blk[:n] (draws x groups)."""

        def fold(j0: int) -> None:
            with self.scratch.lend() as tbuf:
                O.fold_ranks(
                    blk,
                    n,
                    j0,
                    min(self.J, j0 + 8 * FOLD_GROUPS),
                    self.k,
                    self.m,
                    self.total,
                    self.best,
                    self.top,
                    self.first,
                    self.kl,
                    self.low,
                    self.nlow,
                    self.tlow,
                    self.kh,
                    self.high,
                    self.nhigh,
                    self.thigh,
                    tbuf,
                )

        each_block(fold, range(0, self.J, 8 * FOLD_GROUPS), self.threaded)

    def summary(self) -> dict[str, np.ndarray]:
        S = self.S
        low, high = np.empty(self.J), np.empty(self.J)
        O.interval_ends(self.low, self.nlow, self.kl, self.high, self.nhigh, self.kh, low, high)
        # sums of whole numbers below 2**53 are exact in float64, so these equal numpy's means of the ranks
        return {
            "rank_mean": self.total / S,
            "rank_low": low,
            "rank_high": high,
            "p_best": self.best / S,
            "p_top_k": self.top / S,
        }


def rank_summary(ranks: np.ndarray, level: float, k: int) -> dict[str, np.ndarray]:
    """Mean rank, the central rank interval (inverted empirical CDF, so the bounds are whole ranks),
    P(rank = 1) and P(rank <= k), per group, from the ranks of every draw (S x J)."""
    ranks = np.ascontiguousarray(ranks)
    S, J = ranks.shape
    rows = max(1, min(S, RANK_ROWS))
    fold = _RankFold(S, J, level, k, 0, ranks.dtype, rows)
    for s0 in range(0, S, rows):
        fold.add(ranks[s0 : s0 + rows], min(rows, S - s0))
    return fold.summary()


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


def prob_greater(theta: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """M[a, b] = P(theta_a > theta_b) = fraction of draws with theta_a > theta_b; NaN on the diagonal."""
    sub = theta[:, idx]
    m = len(idx)
    out = np.empty((m, m))
    for a in range(m):
        out[a] = (sub[:, a : a + 1] > sub).mean(axis=0)
    out[np.arange(m), np.arange(m)] = np.nan
    return out


def pair_differences(theta: np.ndarray, idx: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mean, low, high)[a, b] of theta_a - theta_b over the draws theta (S, J) of the groups idx: the mean and the
    central `level` interval (numpy's linear quantiles, to the bit); NaN on the diagonal."""
    sub = theta[:, idx]
    m = len(idx)
    mean, low, high = (np.full((m, m), np.nan) for _ in range(3))
    for a in range(m):
        others = [b for b in range(m) if b != a]
        if not others:
            continue
        d = sub[:, a : a + 1] - sub[:, others]
        mean[a, others] = d.mean(axis=0)
        low[a, others], high[a, others] = _quantiles(d, [(1 - level) / 2, (1 + level) / 2])
    return mean, low, high


# ---------------------------------------------------------------------------------------------
# per-group answers, internal units


def _merge_chains(run: np.ndarray, D: int) -> dict[str, np.ndarray]:
    """Means over all chains of the running means (equal counts per chain) and the pooled sd of theta
    (Chan, Golub and LeVeque's merge of the chains' M2)."""
    C = run.shape[0]
    S = C * D
    th_mean = run[:, A.R_THETA].mean(axis=0)
    m2 = run[:, A.R_THETA_M2].sum(axis=0) + D * ((run[:, A.R_THETA] - th_mean) ** 2).sum(axis=0)
    return {
        "theta_mean": th_mean,
        "theta_sd": np.sqrt(m2 / max(S - 1, 1)),
        "sigma_mean": run[:, A.R_SIGMA].mean(axis=0),
        "shrink_weight": run[:, A.R_SHRINK].mean(axis=0),
        "outside_mean": run[:, A.R_OUT].mean(axis=0),
        "tail_weight": run[:, A.R_LAM].mean(axis=0),
    }


def _df_cuts(problem, df: np.ndarray | None, S: int) -> np.ndarray:
    """The outlying cut on lambda for each draw's df (0 when the model has no lambda)."""
    if df is None:
        return np.zeros(S)
    grid = problem.df_grid
    cuts = A.lambda_cuts(grid)
    idx = np.searchsorted(grid, df)  # the grid is increasing and every draw is one of its points
    idx = np.minimum(idx, len(grid) - 1)
    return cuts[idx]


def _full_group_answers(fit: Fit, o: ReportOptions, k: int) -> tuple[dict, dict]:
    """Per-group answers of a full run, internal units: means and counts by answers.accumulate over the stored
    draws (the function summary mode runs while sampling), intervals exact from the stored draws.

    The draws are read a block of TABLE_BLOCK groups at a time: the running summaries over the block's
    columns, then its draws copied into buffers laid out by group (pooling.order.gather), where the derived
    quantities and the interval ends are computed (pooling.order.sorted_quantiles, equal to np.quantile's).
    Blocks run on two threads, each writing only its own groups, so the numbers do not depend on the threads."""
    p = fit.problem
    raw = fit.raw
    d = p.data
    J = p.J
    C, D = raw.mu.shape
    S = C * D
    a = o.internal(p.center, p.scale, limits_apply=p.within_code != 2)
    dr = _stacked(raw)
    run = np.zeros((C, A.N_R, J))
    hits = np.zeros((C, A.N_H, J), dtype=np.uint32)
    cuts = _df_cuts(p, dr.df, S)
    probs = [(1 - o.level) / 2, (1 + o.level) / 2]
    h = np.array([(S - 1) * q for q in probs])  # numpy's virtual indexes of the linear method
    names = ("theta", "sigma", "shrink", "outside", "bias")
    lows = {name: np.empty(J) for name in names}
    highs = {name: np.empty(J) for name in names}
    kinds = (("shrink", A.D_SHRINK), ("bias", A.D_BIAS)) + ((("outside", A.D_OUT),) if a[A.A_LIMITS] > 0 else ())
    theta = np.ascontiguousarray(dr.theta)
    separate = p.within_code == 0
    sigma = np.ascontiguousarray(dr.sigma) if separate else None
    sig1 = np.ascontiguousarray(dr.sigma[:, 0]) if p.within_code == 1 else np.empty(0)
    heavy = dr.lam.shape[1] > 0
    lam = np.ascontiguousarray(dr.lam) if heavy else None
    mu, tau = np.ascontiguousarray(dr.mu), np.ascontiguousarray(dr.tau)
    X, beta = np.ascontiguousarray(d.X), np.ascontiguousarray(dr.beta)
    sig_all, lam_all = np.ascontiguousarray(dr.sigma), np.ascontiguousarray(dr.lam)
    none = np.empty((0, S))

    def buffers():
        return (
            np.empty((TABLE_BLOCK, S)),
            np.empty((TABLE_BLOCK, S)) if separate else none,
            np.empty((TABLE_BLOCK, S)) if heavy else none,
            np.empty((TABLE_BLOCK, S)),
            O.Selection(S, TABLE_BLOCK),
        )

    scratch = Scratch(buffers)

    def accumulate(j0: int) -> None:  # wide blocks: accumulate's loop over groups runs at memory speed
        A.accumulate_stored(
            d.within,
            d.n,
            d.v_known,
            mu,
            tau,
            theta,
            sig_all,
            lam_all,
            cuts,
            a,
            D,
            j0,
            min(J, j0 + ACC_BLOCK),
            run,
            hits,
            X,
            beta,
        )

    def block(j0: int) -> None:
        j1 = min(J, j0 + TABLE_BLOCK)
        m = j1 - j0

        with scratch.lend() as (tb, sb, lb, buf, sel):

            def ends(x, name):
                sel.quantiles(x, m, h, lows[name], highs[name], j0)

            O.gather(theta, j0, j1, tb)
            if separate:
                O.gather(sigma, j0, j1, sb)
            if heavy:
                O.gather(lam, j0, j1, lb)
            for name, kind in kinds:
                A.derived(kind, d.within, d.n, d.v_known, mu, tau, tb, sb, sig1, lb, a, j0, m, buf, X, beta)
                ends(buf, name)
            ends(tb, "theta")  # after the derived quantities, which read the buffers in draw order
            if separate:
                ends(sb, "sigma")

    threaded = S * J >= 1_000_000
    each_block(accumulate, range(0, J, ACC_BLOCK), threaded)
    each_block(block, range(0, J, TABLE_BLOCK), threaded)
    out: dict[str, Any] = _merge_chains(run, D)
    out["hits"] = hits.sum(axis=0, dtype=np.int64)
    if p.within_code == 1:
        lo, hi = np.quantile(dr.sigma[:, 0], probs)
        lows["sigma"][:], highs["sigma"][:] = lo, hi
    out["low"], out["high"] = lows, highs
    ranked, out["heat"] = rank_answers(theta, o.best == "highest", o.level, k)
    out.update(ranked)
    if p.design is not None and p.design.level_names:
        out["in_level"] = ranks_in_level(theta, p.design.level_of, o.level, highest=o.best == "highest")
    return out, {"draws_total": S}


def rank_answers(x: np.ndarray, highest: bool, level: float, k: int) -> tuple[dict[str, np.ndarray], dict]:
    """rank_summary(rank_draws(x), level, k) and the page's rank picture (P(rank = r) for every group by mean
    rank, or above HEAT_ALL groups for the best HEAT_ROWS_MANY over ranks 1..HEAT_ALL and beyond), the same
    numbers, without holding every draw's ranks (S x J): RANK_ROWS draws at a time are ranked as rank_draws
    ranks them and folded into per-group figures (_RankFold). The candidates for the interval's ends are at most
    J x 2 (S (1 - level) + 2) ranks, a tenth of the S x J ranks at the 95 % level; the rest is O(J)."""
    x = np.ascontiguousarray(x)
    S, J = x.shape
    dtype = np.uint16 if J < np.iinfo(np.uint16).max else np.int32
    m = min(J, HEAT_ALL)
    rows = min(S, RANK_ROWS)
    fold = _RankFold(S, J, level, k, m, dtype, rows)
    blk = np.empty((rows, J), dtype=dtype)
    bad = np.zeros(rows, dtype=np.bool_)
    sign = 1.0 if highest else -1.0
    ranking = Scratch(lambda: (np.empty(J), np.empty(J, dtype=np.int64), O.sort_counts(J)))
    for s0 in range(0, S, rows):
        s1 = min(S, s0 + rows)
        part = x[s0:s1]

        def rank(a: int, part=part) -> None:
            with ranking.lend() as (slot_v, slot_i, count):
                O.rank_rows(part, sign, a, min(part.shape[0], a + RANK_BLOCK), blk, slot_v, slot_i, count, bad)

        each_block(rank, range(0, s1 - s0, RANK_BLOCK), fold.threaded)
        for s in np.flatnonzero(bad[: s1 - s0]):  # ranked by numpy's stable argsort, as rank_draws does
            order = np.argsort(-part[s] if highest else part[s], kind="stable")
            blk[s, order] = np.arange(1, J + 1, dtype=dtype)
        fold.add(blk, s1 - s0)
    ranked = fold.summary()
    order = np.argsort(ranked["rank_mean"], kind="stable")
    first = fold.first
    if J <= HEAT_ALL:
        picked, counts = order, first[order]
    else:
        picked = order[:HEAT_ROWS_MANY]
        counts = np.concatenate([first[picked], (S - first[picked].sum(axis=1))[:, None]], axis=1)
    heat = {
        "rows": picked,
        "matrix": counts / S,
        "columns": [str(i) for i in range(1, m + 1)] + ([f">{m}"] if counts.shape[1] > m else []),
    }
    return ranked, heat


def ranks_in_level(x: np.ndarray, level_of: np.ndarray, level: float, highest: bool = True) -> dict[str, np.ndarray]:
    """Per group, its rank among the groups of its own level in every draw (x: (S, J), larger is better, or
    smaller when not `highest`), and the mean rank, the central rank interval and P(best in the level), as
    rank_summary gives them overall."""
    J = x.shape[1]
    out = {
        "rank_in_level_mean": np.empty(J),
        "rank_in_level_low": np.empty(J),
        "rank_in_level_high": np.empty(J),
        "p_best_in_level": np.empty(J),
    }
    for lv in np.unique(level_of):
        idx = np.flatnonzero(level_of == lv)
        rs = rank_summary(rank_draws(np.ascontiguousarray(x[:, idx]), highest), level, 1)
        out["rank_in_level_mean"][idx] = rs["rank_mean"]
        out["rank_in_level_low"][idx] = rs["rank_low"]
        out["rank_in_level_high"][idx] = rs["rank_high"]
        out["p_best_in_level"][idx] = rs["p_best"]
    return out


def centre_means(p, raw) -> tuple[np.ndarray, np.ndarray]:
    """Per group, the posterior mean of its centre c_j = mu + x_j' beta (mu without predictors) and a bound on
    max_s |c_js - mean c_j| over the draws: D_mu + sum_k |x_jk| D_k, D the largest distance of a draw from its mean
    (internal units)."""
    mu_mean = float(raw.mu.mean())
    bound = np.full(p.J, float(np.max(np.abs(raw.mu - mu_mean))))
    if raw.beta is None:
        return np.full(p.J, mu_mean), bound
    b = raw.beta.reshape(-1, raw.beta.shape[-1])
    b_mean = b.mean(axis=0)
    X = p.data.X
    bound = bound + np.abs(X) @ np.max(np.abs(b - b_mean), axis=0)
    return mu_mean + X @ b_mean, bound


def centre_interval(p, raw, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Per group, the central interval of its centre c_j = mu + x_j' beta over the draws (internal units); groups
    with the same predictor values share one computation."""
    mu = raw.mu.reshape(-1)
    b = raw.beta.reshape(mu.shape[0], -1)
    rows, inverse = np.unique(p.data.X, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    lo, hi = np.empty(len(rows)), np.empty(len(rows))
    probs = [(1 - level) / 2, (1 + level) / 2]
    for a in range(0, len(rows), TABLE_BLOCK):
        c = mu[:, None] + b @ rows[a : a + TABLE_BLOCK].T
        lo[a : a + TABLE_BLOCK], hi[a : a + TABLE_BLOCK] = _quantiles(c, probs)
    return lo[inverse], hi[inverse]


def _classic_rhat(run: np.ndarray, D: int) -> np.ndarray:
    """sqrt(((D - 1) / D W + B / D) / W) from per-chain means and M2 (Gelman and Rubin 1992)."""
    C = run.shape[0]
    if C < 2 or D < 2:
        return np.full(run.shape[2], np.nan)
    means = run[:, A.R_THETA]
    W = (run[:, A.R_THETA_M2] / (D - 1)).mean(axis=0)
    b_over_d = means.var(axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt(((D - 1) / D * W + b_over_d) / W)


def _exact_weight_interval(rho_sorted: np.ndarray, a: np.ndarray, probs) -> tuple[np.ndarray, ...]:
    """Quantiles over draws of w_j = a_j / (a_j + rho) (decreasing in rho), exactly as numpy's linear
    quantile of the w draws: the i-th smallest w is w at the (S - 1 - i)-th smallest rho."""
    S = rho_sorted.shape[0]
    out = []
    for p in probs:
        h = (S - 1) * p
        i = int(math.floor(h))
        g = h - i
        i1 = min(i + 1, S - 1)
        w0 = a / (a + rho_sorted[S - 1 - i])
        w1 = a / (a + rho_sorted[S - 1 - i1])
        out.append(w0 + g * (w1 - w0))
    return tuple(out)


def _summary_group_answers(fit, o: ReportOptions, k: int) -> tuple[dict, dict]:
    """Per-group answers of a summary-mode run, internal units: means and counts from the chains' running
    summaries, intervals from their histograms (each with its error bound), ranks from the bucket counts;
    then every column of the kept groups from their stored draws (exact)."""
    from . import summary_kernel as sk
    from .summary import BIAS_HIST_GROUPS, RANK_EXACT

    p = fit.problem
    acc = fit.acc
    sh = acc.setup
    raw = fit.raw
    J = p.J
    C, D = raw.mu.shape[0], acc.draws
    S = C * D
    probs = np.array([(1 - o.level) / 2, (1 + o.level) / 2])
    out: dict[str, Any] = _merge_chains(acc.run, D)
    h = acc.hits.sum(axis=0, dtype=np.int64)
    out["hits"] = h
    errors: dict[str, np.ndarray] = {}

    def hist_interval(q: int, kind: int):
        est = np.empty((2, J))
        err = np.empty((2, J))
        sk.hist_quantiles(acc.hist, acc.ext, sh.glo, sh.gw, int(sh.rowmap[q]), probs, kind, est, err)
        return est[0], est[1], np.maximum(err[0], err[1]) * (1 + 1e-9)  # slack for the rounding of bin edges

    lows, highs = {}, {}
    lows["theta"], highs["theta"], errors["theta"] = hist_interval(sk.Q_THETA, 0)
    if p.within_code == 0:
        lows["sigma"], highs["sigma"], errors["sigma"] = hist_interval(sk.Q_LOGSIGMA, 1)
    elif p.within_code == 1:
        lo, hi = np.quantile(raw.sigma.reshape(-1), probs)
        lows["sigma"], highs["sigma"], errors["sigma"] = np.full(J, lo), np.full(J, hi), np.zeros(J)
    if p.within_code == 0 or p.heavy:  # sigma_j or lambda_j moves each group's weight: its histogram
        lows["shrink"], highs["shrink"], errors["shrink"] = hist_interval(sk.Q_LOGITW, 2)
    else:
        tau2 = raw.tau.reshape(-1) ** 2
        if p.within_code == 1:  # w = 1 / (1 + n rho), rho = tau^2 / sigma^2
            rho, av = np.sort(tau2 / raw.sigma.reshape(-1) ** 2), 1.0 / p.n
        else:
            rho, av = np.sort(tau2), p.v_known
        lows["shrink"], highs["shrink"] = _exact_weight_interval(rho, av, probs)
        errors["shrink"] = np.zeros(J)
    if sh.rowmap[sk.Q_LOGITF] >= 0:
        lows["outside"], highs["outside"], errors["outside"] = hist_interval(sk.Q_LOGITF, 2)
    mu_mean = float(raw.mu.mean())
    D_mu = float(np.max(np.abs(raw.mu - mu_mean)))
    if sh.rowmap[sk.Q_BIAS] >= 0:
        lows["bias"], highs["bias"], errors["bias"] = hist_interval(sk.Q_BIAS, 0)
    else:
        # the theta limits minus the posterior mean of the centre c_j = mu + x_j' beta; |c_js - mean c_j| is at
        # most D_mu + sum_k |x_jk| max_s |beta_sk - mean beta_k|
        cmean, cbound = centre_means(p, raw)
        lows["bias"], highs["bias"] = lows["theta"] - cmean, highs["theta"] - cmean
        errors["bias"] = errors["theta"] + cbound
    out["rank_mean"] = acc.run[:, A.R_RANK].sum(axis=0) / S
    r_lo, r_hi, r_err = np.empty(J, dtype=np.int64), np.empty(J, dtype=np.int64), np.empty(J, dtype=np.int64)
    sk.rank_intervals(
        acc.rhist,
        acc.wmax,
        sh.rank_edges,
        quantile_index(S, probs[0]),
        quantile_index(S, probs[1]),
        J,
        r_lo,
        r_hi,
        r_err,
    )
    out["rank_low"], out["rank_high"] = r_lo.astype(float), r_hi.astype(float)
    out["p_best"] = h[A.H_BEST] / S
    out["p_top_k"] = h[A.H_TOP] / S
    errors["rank_mean"] = acc.run[:, A.R_RANK_ERR].sum(axis=0) / S
    errors["rank_limit"] = r_err.astype(float)
    if acc.lrun is not None and acc.lrun.shape[2]:  # ranks within levels: bucket mid-ranks, an exact P(best)
        nan = np.full(J, np.nan)
        out["in_level"] = {
            "rank_in_level_mean": acc.lrun[:, 0].sum(axis=0) / S,
            "rank_in_level_low": nan,
            "rank_in_level_high": nan,
            "p_best_in_level": acc.lrun[:, 2].sum(axis=0) / S,
        }
        errors["rank_in_level_mean"] = acc.lrun[:, 1].sum(axis=0) / S
    # kept groups: every column from their stored draws, as a full run computes it (error 0)
    kept = sh.kept
    ex, _ = _full_group_answers(fit.kept, o, min(k, len(kept)))
    for name in ("theta_mean", "theta_sd", "sigma_mean", "shrink_weight", "outside_mean", "tail_weight"):
        out[name][kept] = ex[name]
    for name in lows:
        lows[name][kept] = ex["low"][name]
        highs[name][kept] = ex["high"][name]
        errors[name][kept] = 0.0
    kh = ex["hits"]
    for row in (A.H_ABOVE, A.H_BELOW, A.H_BIAS, A.H_OUTLYING, A.H_MEAN_OUT):
        h[row, kept] = kh[row]
    rk = rank_summary(acc.ranks.reshape(-1, len(kept)), o.level, sh.k)  # ranks among all groups, exact
    out["rank_mean"][kept] = rk["rank_mean"]
    out["rank_low"][kept] = rk["rank_low"]
    out["rank_high"][kept] = rk["rank_high"]
    errors["rank_mean"][kept] = 0.0
    errors["rank_limit"][kept] = 0.0
    out["low"], out["high"] = lows, highs
    rhat = _classic_rhat(acc.run, D)
    finite = rhat[np.isfinite(rhat)]
    figures = {
        "draws_total": S,
        "kept_groups": int(len(kept)),
        "bins": int(sh.bins),
        "rank_buckets": int(acc.buckets),
        "grid_half_width_sd": acc.grid["grid_half_width_sd"],
        "mu_spread_D": D_mu * p.scale,
        "rank_grid_bins": int(len(sh.rank_edges) - 1),
        "bias_from_histogram": bool(sh.rowmap[sk.Q_BIAS] >= 0),
        "classic_rhat": {
            "max": float(finite.max()) if finite.size else None,
            "above_1.01": int(np.sum(finite >= 1.01)),
            "groups": int(finite.size),
        },
        "rank_exact_up_to": RANK_EXACT,
        "bias_hist_groups": BIAS_HIST_GROUPS,
    }
    out["errors"] = errors
    out["classic_rhat"] = rhat
    return out, figures


# ---------------------------------------------------------------------------------------------
# the table in the user's units


def _decide(p_yes: np.ndarray, p_no: np.ndarray, at: float, yes: str, no: str) -> np.ndarray:
    out = np.full(len(p_yes), "undecided", dtype=object)
    out[p_no >= at] = no
    out[p_yes >= at] = yes
    return out


def _assemble(p, o: ReportOptions, g: dict, S: int, summary_fit=None) -> pd.DataFrame:
    """The per-group table, every group, user units; interval columns named by the level."""
    c, k = p.center, p.scale
    st = p.stats
    L = level_key(o.level)
    J = p.J
    within = p.model.within
    h = g["hits"]
    cols: dict[str, Any] = {"group": np.array(st.labels, dtype=object)}
    des = p.design
    if des is not None and des.level_names:
        cols["level"] = np.array(des.level_names, dtype=object)[des.level_of]
    cols.update({"n": _whole_or_fraction(st.n), "raw_mean": st.raw_mean})
    if st.kind == "known":
        cols["std_error"] = st.raw_se
    else:
        cols["raw_sd"] = st.raw_sd
    cols["theta_mean"] = g["theta_mean"] * k + c
    cols["theta_sd"] = g["theta_sd"] * k
    cols[f"theta_low_{L}"] = g["low"]["theta"] * k + c
    cols[f"theta_high_{L}"] = g["high"]["theta"] * k + c
    if within != "known":
        cols["sigma_mean"] = g["sigma_mean"] * k
        cols[f"sigma_low_{L}"] = g["low"]["sigma"] * k
        cols[f"sigma_high_{L}"] = g["high"]["sigma"] * k
    cols["shrink_weight"] = g["shrink_weight"]
    cols[f"shrink_low_{L}"] = g["low"]["shrink"]
    cols[f"shrink_high_{L}"] = g["high"]["shrink"]
    centre_i = g["centre_mean"]  # mu, or mu + x_j' beta with predictors: what each group is pulled toward
    ybar = p.ybar  # internal own means: their digits survive any offset
    dist = ybar - centre_i
    with np.errstate(divide="ignore", invalid="ignore"):
        cols["shrink_realised"] = np.where(dist != 0, (ybar - g["theta_mean"]) / dist, np.nan)
    if o.threshold is not None:
        cols["p_above"] = h[A.H_ABOVE] / S
        cols["p_below"] = h[A.H_BELOW] / S
        cols["threshold_side"] = _decide(cols["p_above"], cols["p_below"], o.decide_at, "above", "below")
    if o.limits:
        pm = h[A.H_MEAN_OUT] / S
        cols["p_mean_outside"] = pm
        cols["limits_side"] = _decide(pm, 1.0 - pm, o.decide_at, "outside", "inside")
        if within != "known":
            cols["outside_mean"] = g["outside_mean"]
            cols[f"outside_low_{L}"] = g["low"]["outside"]
            cols[f"outside_high_{L}"] = g["high"]["outside"]
    cols["bias_mean"] = (g["theta_mean"] - centre_i) * k
    cols[f"bias_low_{L}"] = g["low"]["bias"] * k
    cols[f"bias_high_{L}"] = g["high"]["bias"] * k
    if des is not None:
        cols["consensus_mean"] = centre_i * k + c
        cols[f"consensus_low_{L}"] = g["centre_low"] * k + c
        cols[f"consensus_high_{L}"] = g["centre_high"] * k + c
    if o.allowed_bias is not None:
        cols["p_bias_over"] = h[A.H_BIAS] / S
        cols["bias_side"] = _decide(cols["p_bias_over"], 1.0 - cols["p_bias_over"], o.decide_at, "over", "within")
    if p.heavy:
        cols["tail_weight"] = g["tail_weight"]
        cols["p_outlying"] = h[A.H_OUTLYING] / S
        cols["outlying"] = cols["p_outlying"] >= OUTLYING_AT
    cols["rank_mean"] = g["rank_mean"]
    cols[f"rank_low_{L}"] = np.asarray(g["rank_low"]).astype(np.int64)
    cols[f"rank_high_{L}"] = np.asarray(g["rank_high"]).astype(np.int64)
    cols["p_best"] = g["p_best"]
    cols["p_top_k"] = g["p_top_k"]
    if "in_level" in g:
        il = g["in_level"]
        cols["rank_in_level_mean"] = il["rank_in_level_mean"]
        cols[f"rank_in_level_low_{L}"] = _whole_or_missing(il["rank_in_level_low"])
        cols[f"rank_in_level_high_{L}"] = _whole_or_missing(il["rank_in_level_high"])
        cols["p_best_in_level"] = il["p_best_in_level"]
    z, signal, _ = z_basis(p, o)
    cols["z_score"], cols["z_signal"] = z, signal
    table = pd.DataFrame(cols)
    if summary_fit is not None:
        e = g["errors"]
        reason = np.full(J, "", dtype=object)
        reason[summary_fit.kept_index] = summary_fit.acc.setup.kept_reason
        table["kept"] = reason
        table["theta_limit_error"] = e["theta"] * k
        if "sigma" in e:
            table["sigma_limit_error"] = e["sigma"] * k
        table["shrink_limit_error"] = e["shrink"]
        if "outside" in e and "outside_mean" in table:
            table["outside_limit_error"] = e["outside"]
        table["bias_limit_error"] = e["bias"] * k
        table["rank_mean_error"] = e["rank_mean"]
        if "rank_in_level_mean" in e:
            table["rank_in_level_mean_error"] = e["rank_in_level_mean"]
        table["rank_limit_error"] = e["rank_limit"]
        table["theta_rhat_classic"] = g["classic_rhat"]
    return table


def _whole_or_missing(x):
    """Whole ranks as integers; a column with a missing value (summary mode) stays float, the gaps empty cells."""
    x = np.asarray(x, dtype=np.float64)
    return x.astype(np.int64) if np.all(np.isfinite(x)) else x


def _whole_or_fraction(n):
    """Group sizes as whole numbers, unless down-weighting (a store's half-life) made them fractional."""
    n = np.asarray(n)
    return n.astype(np.int64) if np.all(n == np.round(n)) else n.astype(np.float64)


def z_basis(p, o: ReportOptions):
    """z-scores of the own means with their signals and basis, computed on the internal means (ISO 13528
    Algorithm A is location-scale equivariant) and the basis mapped to the user's units."""
    from .report.interlab import z_scores

    c, k = p.center, p.scale
    assigned = None if o.assigned is None else (o.assigned - c) / k
    spt = None if o.sigma_pt is None else o.sigma_pt / k
    z, signal, basis = z_scores(p.ybar, assigned, spt)
    basis = dict(basis)
    basis["assigned"] = basis["assigned"] * k + c
    basis["sigma_pt"] = basis["sigma_pt"] * k
    return z, signal, basis


# ---------------------------------------------------------------------------------------------
# beyond the table: heavy tails, the interlaboratory view, predictions, checks


def tail_summary(problem, raw, table: pd.DataFrame) -> dict | None:
    """The posterior of df (how heavy the between-group tail is) and the outlying groups."""
    if not problem.heavy:
        return None
    between = problem.model.between
    grid = problem.df_grid
    df = raw.df.reshape(-1)
    post = np.array([np.mean(df == g) for g in grid])
    _, prior = between.grid_and_weights()
    prior = np.asarray(prior, dtype=float)
    prior = prior / prior.sum()
    cum = np.cumsum(post)
    median = float(grid[min(int(np.searchsorted(cum, 0.5)), len(grid) - 1)])
    flagged = table.loc[table["outlying"], "group"].tolist()
    return {
        "between": between.name,
        "fixed_df": between.df,
        "grid": [float(x) for x in grid],
        "prior": prior.tolist(),
        "posterior": post.tolist(),
        "p_normal": float(post[np.isinf(grid)].sum()) if np.isinf(grid).any() else 0.0,
        "p_df_at_most_4": float(post[grid <= 4].sum()),
        "median_df": median,
        "outlying": flagged,
        "outlying_rule": f"p_outlying >= {OUTLYING_AT:g}",
        "cut_tail": A.OUTLYING_PRIOR_TAIL,
    }


def _summ(x: np.ndarray, level: float, scale: float = 1.0, center: float = 0.0) -> dict:
    lo, med, hi = np.quantile(x, [(1 - level) / 2, 0.5, (1 + level) / 2])
    return {
        "mean": float(x.mean()) * scale + center,
        "median": float(med) * scale + center,
        "sd": float(x.std(ddof=1)) * scale,
        "low": float(lo) * scale + center,
        "high": float(hi) * scale + center,
    }


def _repeatability_draws(problem, raw, within_sd=None) -> np.ndarray | None:
    """Per draw, the typical within-group sd s_r = sqrt(mean_j sigma_j^2) (separate), sigma (shared); None when
    known. Internal units, so the squares neither under- nor overflow."""
    if problem.within_code == 2:
        return None
    if within_sd is not None:
        return within_sd.reshape(-1)
    if problem.within_code == 1:
        return raw.sigma.reshape(-1)
    sig = raw.sigma.reshape(-1, raw.sigma.shape[2])
    return np.sqrt(np.einsum("ij,ij->i", sig, sig) / sig.shape[1])


def _components(problem, raw, level: float, within_sd=None) -> dict:
    """The consensus value, tau, and the ISO 5725 components (repeatability and reproducibility sd, ICC, the limits
    2.8 s) of one fit, from its draws; internal units, mapped to the user's with the fit's own centre and scale."""
    from .report.interlab import LIMIT_FACTOR

    c, k = problem.center, problem.scale
    mu, tau = raw.mu.reshape(-1), raw.tau.reshape(-1)
    out: dict = {"consensus": _summ(mu, level, k, c), "between_sd": _summ(tau, level, k)}
    sr = _repeatability_draws(problem, raw, within_sd)
    if sr is not None:
        sR = np.hypot(tau, sr)
        with np.errstate(divide="ignore"):  # tau = 0 in a draw: s_r / tau = inf, icc = 0
            icc = 1.0 / (1.0 + (sr / tau) ** 2)
        out["repeatability_sd"] = _summ(sr, level, k)
        out["reproducibility_sd"] = _summ(sR, level, k)
        out["icc"] = _summ(icc, level)
        out["repeatability_limit"] = _summ(LIMIT_FACTOR * sr, level, k)
        out["reproducibility_limit"] = _summ(LIMIT_FACTOR * sR, level, k)
    else:
        out["repeatability_sd"] = out["reproducibility_sd"] = out["icc"] = None
        out["repeatability_limit"] = out["reproducibility_limit"] = None
    if raw.s is not None:
        out["s"] = _summ(raw.s.reshape(-1), level, k)
    return out


def interlab_view(problem, raw, table: pd.DataFrame, o: ReportOptions, within_sd=None, without=None) -> dict:
    """Consensus value, tau, repeatability and reproducibility sd, ICC and limits from the draws; the classical
    comparators (one-way ANOVA for measurements, DerSimonian-Laird for estimates with standard errors); the
    per-lab bias table and its agreement with the z-scores. Internal units, mapped at the end.

    With group-level predictors this fit's mu is the reference level's consensus and its tau the spread left
    within a level: labs of two methods that differ look more alike than they are. `without` (a Fit or
    SummaryFit of the same data without the predictors, which pooling.fit makes) then gives "overall": the
    consensus value and ISO 5725 components across all labs, one consensus and every lab-to-lab difference
    counted, as ISO 5725's model y = m + B + e and the ANOVA count them. "overall" is None without predictors
    (this fit's figures are the overall ones) and when `without` is not given."""
    from .report.interlab import oneway_anova, random_effects_dl

    c, k = problem.center, problem.scale
    level = o.level
    L = level_key(level)
    out: dict = {
        "level": level,
        "structure": problem.model.within,
        "between": problem.model.between.name,
    }
    out.update(_components(problem, raw, level, within_sd))
    out["overall"] = None
    if problem.design is not None and without is not None:
        plain_sd = without.acc.within_sd if getattr(without, "summary_mode", False) else None
        out["overall"] = _components(without.problem, without.raw, level, plain_sd)
    if problem.within_code != 2:
        an = oneway_anova(problem.n, problem.ybar, problem.m2)
        if an is not None:
            an["grand_mean"] = an["grand_mean"] * k + c
            for key in ("between_sd", "repeatability_sd", "reproducibility_sd"):
                an[key] *= k
            for key in ("ss_between", "ss_within", "ms_between", "ms_within", "between_var", "within_var"):
                an[key] *= k * k  # may under- or overflow for data near 1e-300 or 1e300: shown as given
        out["anova"] = an
        out["random_effects"] = None
    else:
        out["anova"] = None
        re_ = random_effects_dl(problem.ybar, np.sqrt(problem.v_known))
        if re_ is not None:
            for key in ("consensus", "fixed_effect"):
                re_[key] = re_[key] * k + c
            for key in ("consensus_se", "between_sd", "fixed_effect_se"):
                re_[key] *= k
        out["random_effects"] = re_
    _, _, basis = z_basis(problem, o)
    out["z_basis"] = basis
    lo, hi = table[f"bias_low_{L}"].to_numpy(), table[f"bias_high_{L}"].to_numpy()
    excludes = (lo > 0) | (hi < 0)
    signal = table["z_signal"].to_numpy()
    flagged_z = signal == "action"
    out["allowed_bias"] = o.allowed_bias
    out["agreement"] = {
        "z_action": int(np.sum(flagged_z)),
        "z_warning": int(np.sum(signal == "warning")),
        "interval_excludes_0": int(excludes.sum()),
        "both": int(np.sum(flagged_z & excludes)),
    }
    out["interval_excludes_0"] = excludes
    return out


def new_group_outside(problem, raw, o: ReportOptions, seed: int) -> dict | None:
    """The out-of-specification fraction of a group not yet seen: per draw theta_new from the between-group
    distribution (N(mu, tau^2), or Student-t(df, mu, tau) for heavy tails), sigma_new^2 ~ Scaled-Inv-chi2(nu, s^2)
    (separate) or the shared sigma; the fraction's posterior mean, interval and MC error. Internal units. With
    group-level predictors the new group is of the reference level, at the numeric predictors' means (centre mu)."""
    if problem.within_code == 2 or not o.limits:
        return None
    rng = derived_rng(seed, PURPOSE_PREDICTION)
    mu, tau = raw.mu.reshape(-1), raw.tau.reshape(-1)
    S = mu.shape[0]
    z = rng.standard_normal(S)
    if raw.df is not None:
        df = raw.df.reshape(-1)
        lam = np.ones(S)
        finite = np.isfinite(df)
        lam[finite] = rng.standard_gamma(df[finite] / 2.0) / (df[finite] / 2.0)
        z = z / np.sqrt(lam)
    theta_new = mu + tau * z
    if problem.within_code == 0:
        nu, s = raw.nu.reshape(-1), raw.s.reshape(-1)
        sigma_new = np.sqrt(nu * s**2 / rng.chisquare(nu))
    else:
        sigma_new = raw.sigma.reshape(-1)
    a = o.internal(problem.center, problem.scale)
    from scipy.special import ndtr

    f = np.zeros(S)
    if o.lower is not None:
        f += ndtr((a[A.A_LOWER] - theta_new) / sigma_new)
    if o.upper is not None:
        f += ndtr((theta_new - a[A.A_UPPER]) / sigma_new)
    lo, hi = np.quantile(f, [(1 - o.level) / 2, (1 + o.level) / 2])
    k, c = problem.scale, problem.center
    return {
        "mean": float(f.mean()),
        "low": float(lo),
        "high": float(hi),
        "mc_error": float(f.std(ddof=1) / np.sqrt(S)),
        "theta_new": _summ(theta_new, o.level, k, c),
        "sigma_new_median": float(np.median(sigma_new)) * k,
    }


def _thin(S: int) -> np.ndarray:
    return np.unique(np.linspace(0, S - 1, min(S, CHECK_DRAWS)).round().astype(np.int64))


def model_checks(problem, raw, seed: int, level: float = 0.9) -> dict:
    """Posterior predictive checks (Gelman, Meng and Stern 1996, Statistica Sinica 6), each a p-value
    P(T_rep >= T_obs) over at most CHECK_DRAWS draws, with replicates from the fitted model:

    * spread of the group means, T = sd_j(own mean_j); replicated group means ybar_rep_j = theta_rep_j +
      sqrt(v_j) z_j with theta_rep_j from the fitted between-group distribution (normal, or Student-t);
    * the most extreme group against the typical one, T = max_j |d_j| / median_j |d_j| with the standardised
      deviations d_j = (ybar_j - mu) / sqrt(tau^2 + v_j), against the same with replicated group means. The
      ratio does not depend on tau, so a normal between-group distribution that widened tau to take in one
      far group still fails it (its replicates seldom hold a group that far beyond the typical one); with group-level
      predictors mu is each group's centre mu + x_j' beta in both checks;
    * within-group sd (measurements, groups with n_j >= 2): the replicated sample sd of n_j new values is
      sigma_j sqrt(chi2(n_j - 1) / (n_j - 1)).
    """
    rng = derived_rng(seed, PURPOSE_CHECKS)
    mu, tau = raw.mu.reshape(-1), raw.tau.reshape(-1)
    S = mu.shape[0]
    J = problem.J
    idx = _thin(S)
    m = len(idx)
    ybar = problem.ybar
    n = problem.n
    within = problem.within_code
    # sigma per checked draw: (S, J) separate, (S,) shared, none for known
    sig_rows = np.empty(0) if raw.sigma is None else raw.sigma.reshape(S, J) if within == 0 else raw.sigma.reshape(-1)

    def v_of(r0: int, r1: int) -> np.ndarray:
        """v_j of the checked draws r0 .. r1 - 1."""
        if within == 2:
            return np.broadcast_to(problem.v_known[None, :], (r1 - r0, J))
        if within == 1:
            return (sig_rows[idx[r0:r1]] ** 2)[:, None] / n[None, :]
        return sig_rows[idx[r0:r1]] ** 2 / n[None, :]

    mu_t, tau_t = mu[idx, None], tau[idx, None]
    if raw.beta is not None:  # each group about its own centre mu + x_j' beta
        mu_t = mu_t + raw.beta.reshape(S, -1)[idx] @ problem.data.X.T
    # The random numbers are drawn in this order: z for every checked draw, lambda for the draws with a finite
    # df, the noise, then the within-group sds. Only z is held whole: lambda, the noise and the sds are drawn
    # CHECK_ROWS draws at a time, which gives the same numbers (numpy draws an array's elements in order), and
    # everything is computed a few draws at a time (a fraction of the memory, while it is in cache).
    z = rng.standard_normal((m, J))
    if raw.df is not None:
        df = raw.df.reshape(-1)[idx]
        fin_rows = np.flatnonzero(np.isfinite(df))  # the other draws divide by sqrt(1) = 1, which changes nothing
        for f0 in range(0, len(fin_rows), CHECK_ROWS):
            rows = fin_rows[f0 : f0 + CHECK_ROWS]
            half = df[rows, None] / 2.0
            lam = rng.standard_gamma(np.broadcast_to(half, (len(rows), J)))
            lam /= half
            np.sqrt(lam, out=lam)
            z[rows] = z[rows] / lam
            del lam
    rep = z  # rep = mu + tau z + sqrt(v) noise, made in place
    t_spread = np.empty(m)
    t_obs_draw, t_rep, who = np.empty(m), np.empty(m), np.empty(m, dtype=np.int64)
    for r0 in range(0, m, CHECK_ROWS):
        r1 = min(m, r0 + CHECK_ROWS)
        v = v_of(r0, r1)
        mu_c, tau_c = mu_t[r0:r1], tau_t[r0:r1]
        rc = rep[r0:r1]
        np.multiply(tau_c, rc, out=rc)
        np.add(mu_c, rc, out=rc)
        nc = rng.standard_normal((r1 - r0, J))
        np.multiply(np.sqrt(v), nc, out=nc)
        np.add(rc, nc, out=rc)
        if J >= 2:
            t_spread[r0:r1] = rc.std(axis=1, ddof=1)
        scale_j = np.sqrt(tau_c**2 + v)
        dev_obs = np.abs(ybar[None, :] - mu_c) / scale_j
        dev_rep = np.abs(rc - mu_c) / scale_j
        with np.errstate(divide="ignore", invalid="ignore"):
            t_obs_draw[r0:r1] = dev_obs.max(axis=1) / np.median(dev_obs, axis=1)
            t_rep[r0:r1] = dev_rep.max(axis=1) / np.median(dev_rep, axis=1)
        who[r0:r1] = dev_obs.argmax(axis=1)
    del rep, z
    out: dict = {"draws": m}
    if J >= 2:
        t_obs = float(np.std(ybar, ddof=1))
        out["spread"] = {
            "observed": t_obs * problem.scale,
            "replicated": t_spread * problem.scale,
            "p_value": float(np.mean(t_spread >= t_obs)),
        }
    counts = np.bincount(who, minlength=J)
    out["extreme"] = {
        "observed": t_obs_draw,
        "replicated": t_rep,
        "p_value": float(np.mean(t_rep >= t_obs_draw)),
        "observed_median": float(np.median(t_obs_draw)),
        "group": int(np.argmax(counts)),
        "group_share": float(counts.max() / m),
    }
    if within != 2:
        keep = np.flatnonzero(n >= 2)
        if keep.size:
            dfw = n[keep] - 1
            obs = np.sqrt(problem.m2[keep] / dfw)
            above = np.zeros(keep.size, dtype=np.int64)
            by_group = np.empty((keep.size, m))  # the replicated sds laid out by group
            for r0 in range(0, m, CHECK_ROWS):
                r1 = min(m, r0 + CHECK_ROWS)
                sig = sig_rows[idx[r0:r1]][:, None] if within == 1 else sig_rows[np.ix_(idx[r0:r1], keep)]
                rep_sd = rng.chisquare(np.broadcast_to(dfw, (r1 - r0, keep.size)))  # sig sqrt(chi2 / dfw), in place
                rep_sd /= dfw
                np.sqrt(rep_sd, out=rep_sd)
                np.multiply(sig, rep_sd, out=rep_sd)
                above += (rep_sd >= obs[None, :]).sum(axis=0)
                by_group[:, r0:r1] = rep_sd.T
                del sig, rep_sd
            p = above / m  # whole counts, so the same numbers as the mean of the indicators
            # a sort per group gives numpy's quantiles (order.sorted_quantiles) and median to the bit
            by_group.sort(axis=1)
            lo, hi = np.empty(keep.size), np.empty(keep.size)
            O.sorted_quantiles(
                by_group, keep.size, np.array([(m - 1) * ((1 - level) / 2), (m - 1) * ((1 + level) / 2)]), lo, hi, 0
            )
            mid = by_group[:, m // 2] if m % 2 else (by_group[:, m // 2 - 1] + by_group[:, m // 2]) / 2.0
            mid = np.where(np.isnan(by_group[:, -1]), np.nan, mid)  # np.median of a row holding NaN is NaN
            k = problem.scale
            out["sd"] = {
                "groups": keep,
                "observed": obs * k,
                "low": lo * k,
                "high": hi * k,
                "median": mid * k,
                "p_value": p,
                "level": level,
                "outside": int(np.sum((obs < lo) | (obs > hi))),
                "extreme": int(np.sum((p < 0.01) | (p > 0.99))),
            }
    return out


# ---------------------------------------------------------------------------------------------
# group-level predictors: why groups differ

MAX_CONTRAST_LEVELS = 12  # up to this many levels every pair is listed; above, each level against the reference


def _coef_index(design, column: str, level_name: str) -> int | None:
    """The column of X of a level's contrast (None for the reference level); refuses an unknown column or level."""
    cats = {c["column"]: c for c in design.categories}
    if column not in cats:
        raise InputError(
            f"bad option: '{column}' is not a categorical predictor of this fit; the categorical "
            f"predictors are {', '.join(repr(c) for c in cats) or 'none'}"
        )
    levels = cats[column]["levels"]
    if level_name not in levels:
        raise InputError(
            f"bad option: '{column}' has no level '{level_name}'; its levels are " + ", ".join(repr(x) for x in levels)
        )
    if level_name == cats[column]["reference"]:
        return None
    return next(k for k, c in enumerate(design.coefficients) if c["column"] == column and c.get("level") == level_name)


def _level_draws(design, beta: np.ndarray, column: str, level_name: str) -> np.ndarray:
    """The internal coefficient of a level in every draw (0 for the reference level)."""
    k = _coef_index(design, column, level_name)
    return np.zeros(beta.shape[:-1]) if k is None else beta[..., k]


def level_contrast(fit, column: str, a: str, b: str, level: float = 0.95) -> dict:
    """The difference between two levels of a categorical predictor, level a minus level b, in the user's units:
    posterior mean, sd, median, the central interval at `level`, P(a - b > 0) and its Monte Carlo error.
    Works for both ways of running (the coefficients' every draw is kept)."""
    p = fit.problem
    if p.design is None:
        raise InputError("bad option: this fit has no group-level predictors")
    beta = fit.raw.beta
    d = _level_draws(p.design, beta, column, a) - _level_draws(p.design, beta, column, b)
    out = summarize_draws(d, level, p.scale)
    out.update({"column": column, "a": a, "b": b, "p_above_0": float(np.mean(d > 0))})
    return out


def predictor_answers(p, raw, o: ReportOptions, without=None) -> dict | None:
    """Why groups differ: each coefficient with its interval and P(> 0); the contrasts between the levels of each
    categorical predictor; the consensus value per level; and the between-group spread with and without the
    predictors (tau of this fit and of `without`, the same data fitted without predictors), in the user's units.

    With predictors mu is the centre of the reference level at the numeric predictors' means, and the consensus
    value of level l is mu + x_l' beta (x_l: the level's contrasts, numeric columns at their means). The share of
    the between-group spread the predictors explain is 1 - E[tau^2 | with] / E[tau^2 | without], from the two fits'
    posterior means of tau^2: their draws come from two different fits and cannot be paired, so the share has no
    interval of its own; the intervals of tau with and without show its uncertainty. It is below 0 when the
    predictors explain nothing (they then only take information away from tau)."""
    des = p.design
    if des is None:
        return None
    level = o.level
    k, c = p.scale, p.center
    beta = raw.beta
    coefs = []
    for i, info in enumerate(des.coefficients):
        x = beta[:, :, i]
        sm = summarize_draws(x, level, float(des.to_user[i]))
        sm["p_above_0"] = float(np.mean(x > 0))
        coefs.append(
            {
                **{key: info[key] for key in ("name", "column", "kind")},
                **(
                    {"level": info["level"], "reference": info["reference"], "unit": "data units"}
                    if info["kind"] == "category"
                    else {"centred_at": info["centre"], "unit": f"data units per unit of '{info['column']}'"}
                ),
                **sm,
            }
        )
    contrasts = []
    for cat in des.categories:
        levels = cat["levels"]
        if len(levels) <= MAX_CONTRAST_LEVELS:
            pairs = [(levels[j], levels[i]) for i in range(len(levels)) for j in range(i + 1, len(levels))]
        else:
            pairs = [(lv, levels[0]) for lv in levels[1:]]
        for a, b in pairs:
            d = _level_draws(des, beta, cat["column"], a) - _level_draws(des, beta, cat["column"], b)
            sm = summarize_draws(d, level, k)
            contrasts.append({"column": cat["column"], "a": a, "b": b, "p_above_0": float(np.mean(d > 0)), **sm})
    counts = np.bincount(des.level_of, minlength=len(des.level_names)) if des.level_names else np.zeros(0, int)
    consensus = []
    for i, name in enumerate(des.level_names):
        x = raw.mu + beta @ des.level_x[i]
        consensus.append({"level": name, "groups": int(counts[i]), **summarize_draws(x, level, k, c)})
    tau2 = float(np.mean(raw.tau**2))
    spread = {
        "tau_with": summarize_draws(raw.tau, level, k),
        "tau_without": None,
        "share_explained": None,
        "share_rule": "1 - E[tau^2 | with] / E[tau^2 | without]; no interval (two fits' draws cannot be "
        "paired); the intervals of tau with and without show the uncertainty",
        "without_fit": None,
    }
    if without is not None:
        wr = without.raw
        spread["tau_without"] = summarize_draws(wr.tau, level, without.problem.scale)
        tau2_wo = float(np.mean(wr.tau**2)) * (without.problem.scale / k) ** 2
        spread["share_explained"] = 1.0 - tau2 / tau2_wo if tau2_wo > 0 else None
        mode = "summary" if getattr(without, "summary_mode", False) else "full"
        spread["without_fit"] = {
            "seed": wr.seed,
            "draws_per_chain": int(wr.mu.shape[1]),
            "chains": int(wr.mu.shape[0]),
            "targets_met": bool(without.targets_met),
            "mode": mode,
            "mu": summarize_draws(wr.mu, level, without.problem.scale, without.problem.center),
        }
    return {
        "coefficients": coefs,
        "contrasts": contrasts,
        "consensus": consensus,
        "spread": spread,
        "categories": [
            {
                "column": cat["column"],
                "levels": list(cat["levels"]),
                "reference": cat["reference"],
                "groups": list(cat["groups"]),
            }
            for cat in des.categories
        ],
        "numeric": [{"column": x["column"], "centred_at": x["centre"]} for x in des.numerics],
        "prior": {f"{x.column}": (x.prior or p.model.effects).describe() for x in p.model.predictors},
        "mu_means": "the consensus value of the reference level"
        + (", at the numeric predictors' means" if des.numerics else "")
        if des.categories
        else "the centre at the numeric predictors' means",
        "level": level,
    }


# ---------------------------------------------------------------------------------------------
# the methods text of summary mode

SUMMARY_METHODS = {
    "means_and_sd": "Welford running mean and M2 per chain and group, merged across chains (Chan, Golub and "
    "LeVeque): equal to the mean and sd of all draws to rounding",
    "probabilities": "exact counts of the draws: P(above / below the threshold), P(|bias| > allowed), P(outside "
    "the limits), P(outlying), P(best), P(top k) (a size-k heap scan per draw)",
    "interval_limits": "per group and quantity a histogram of {bins} equal bins on a grid fixed after warm-up "
    "(centre +- {half:.2f} warm-up sd, in the scale theta, log sigma, logit shrinkage, logit "
    "outside fraction), with underflow and overflow bins bounded by the extreme draws; each "
    "order statistic is located exactly and interpolated inside its bin, so a limit is off by "
    "at most one bin width (the *_limit_error columns)",
    "bias_limits": "{bias}",
    "shrinkage_interval": "histogram of logit w_j (separate, and every structure with heavy tails, where lambda_j "
    "moves each group's weight); exact from the tau (and sigma) draws for shared and known with "
    "the normal between-group distribution, where w_j is a decreasing function of one "
    "hyperparameter ratio",
    "rank_mean": "kept groups exact; others by a bucket count of all groups per draw ({G} buckets): the "
    "midpoint of the possible ranks, off by at most rank_mean_error",
    "rank_interval": "kept groups exact from their rank in every draw; others from a histogram, per group, of "
    "each draw's lower rank bound (1 + groups in better buckets) on one rank grid of {RB} bins "
    "({RGRID}), widened by the largest bucket count - 1 seen: the interval contains the exact "
    "one, each end off by at most rank_limit_error",
    "kept_groups": "named groups, {sample} groups drawn from the run's own seed, and up to {top} top-k candidates "
    "chosen after warm-up",
    "diagnostics": "run-length control on mu, tau, the variance hyperparameters and the kept groups' stored draws; "
    "a classic R-hat from chain means for every group as a screen",
}
SUMMARY_LEVEL_METHOD = (
    "ranks within levels: a bucket count per level (max(1024, groups of the level) buckets) "
    "gives the mid-rank among the groups of the level, off by at most rank_in_level_mean_error; "
    "P(best in level) is an exact count; the rank interval within a level needs every group's "
    "draws and is left empty (refit with --summary off)"
)


# ---------------------------------------------------------------------------------------------
# compute


def _check_summary_options(fit, o: ReportOptions) -> ReportOptions:
    """Summary mode counted some answers while sampling: those options cannot change afterwards."""
    applied = fit.options
    for name in ("level", "k", "best", "threshold", "lower", "upper", "allowed_bias"):
        a, b = getattr(o, name), getattr(applied, name)
        if a != b and not (name == "k" and check_k(a, fit.J) == check_k(b, fit.J)):
            raise InputError(
                f"bad option: summary mode applied {name} = {b!r} while sampling; a report with "
                f"{name} = {a!r} needs a new run"
            )
    return o


def compute(fit, options: ReportOptions | None = None, without=None) -> Results:
    """Every answer of a run (a posterior.Fit or a summary.SummaryFit) for the given options. With group-level
    predictors, `without` (default: fit.without, made by pooling.fit) is the same data fitted without them, for
    tau with and without the predictors."""
    clock = [time.perf_counter()]
    summary_mode = getattr(fit, "summary_mode", False)
    if options is None:
        options = fit.options if summary_mode else ReportOptions()
    o = options
    if summary_mode:
        _check_summary_options(fit, o)
    p = fit.problem
    J = p.J
    k = check_k(o.k, J)
    compare = split_compare(o.compare, p.stats.labels)
    o = replace(o, compare=compare, k=k)  # as resolved, for the summary
    if len(compare) > MAX_PAIRWISE:
        raise InputError(f"bad option: at most {MAX_PAIRWISE} groups can be compared pairwise; found {len(compare)}")
    pair_idx = resolve_groups(p.stats.labels, compare) if compare else None
    raw = fit.raw  # every draw (full), or the hyperparameters and the kept groups (summary)
    if summary_mode:
        g, figures = _summary_group_answers(fit, o, k)
        checks_later = None
    else:
        # the predictive checks (random numbers and medians: numpy, without the GIL) on a thread of their own
        # while the per-group answers are computed; their random numbers come from their own stream
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(1) as side:
            checks_later = side.submit(model_checks, p, raw, raw.seed)
            g, figures = _full_group_answers(fit, o, k)
            checks_later.result()
    S = figures["draws_total"]
    g["mu_mean"] = float(raw.mu.mean())
    g["centre_mean"], _ = centre_means(p, raw)
    if p.design is not None:
        g["centre_low"], g["centre_high"] = centre_interval(p, raw, o.level)
    clock.append(time.perf_counter())
    table = _assemble(p, o, g, S, fit if summary_mode else None)
    hyper = hyper_summary(raw, p, o.level)
    hyper_draws = {}
    for name in hyper_names(p):
        x = getattr(raw, name)
        hyper_draws[name] = x * p.scale + (p.center if SCALED.get(name) else 0.0) if name in SCALED else x
    within_sd = fit.acc.within_sd if summary_mode else None
    if without is None:
        without = getattr(fit, "without", None)
    lab = interlab_view(p, raw, table, o, within_sd, without)
    if within_sd is not None:
        hyper_draws["within_sd"] = within_sd * p.scale
    tail = tail_summary(p, raw, table)
    new_group = new_group_outside(p, raw, o, raw.seed)
    checks = None if checks_later is None else checks_later.result()
    predictors = predictor_answers(p, raw, o, without)
    clock.append(time.perf_counter())
    heat = None
    pairs = None
    th_pairs = idx_pairs = None
    if summary_mode:
        if pair_idx is not None:
            kept = {lab: i for i, lab in enumerate(fit.kept_labels)}
            missing = [lab for lab in compare if lab not in kept]
            if missing:
                raise InputError(
                    f"bad option: summary mode compares only groups whose draws were kept; "
                    f"'{missing[0]}' was not kept (name it with --keep, or pass it to --compare before "
                    "the run)"
                )
            idx = np.array([kept[lab] for lab in compare], dtype=np.int64)
            th = fit.raw.theta.reshape(-1, fit.raw.theta.shape[2])
            pairs = pd.DataFrame(
                prob_greater(th, idx), index=pd.Index(list(compare), name="group"), columns=list(compare)
            )
            th_pairs, idx_pairs = th, idx
    else:
        heat = g.pop("heat")
        if pair_idx is not None:
            th = fit.raw.theta.reshape(-1, J)
            pairs = pd.DataFrame(
                prob_greater(th, pair_idx), index=pd.Index(list(compare), name="group"), columns=list(compare)
            )
            th_pairs, idx_pairs = th, pair_idx
    pair_diff = None
    if th_pairs is not None and idx_pairs is not None:
        # internal units to data units: a difference takes the scale, not the centre
        def frame(x: np.ndarray) -> pd.DataFrame:
            return pd.DataFrame(x * p.scale, index=pd.Index(list(compare), name="group"), columns=list(compare))

        dm, dl, dh = pair_differences(th_pairs, idx_pairs, o.level)
        pair_diff = {"mean": frame(dm), "low": frame(dl), "high": frame(dh), "level": o.level}
    clock.append(time.perf_counter())
    st = p.stats
    s = raw.settings
    run = {
        "chains": s.chains,
        "warmup": s.warmup,
        "draws_requested": s.draws,
        "draws_per_chain": int(raw.mu.shape[1]),
        "draw_cap": s.draw_cap,
        "seed": raw.seed,
        "seconds": round(raw.seconds, 3),
        "sweep_seconds": round(float(raw.sweep_seconds), 3),
        "tau_evaluations_per_sweep": float(raw.evals.mean()),
        "internal_center": p.center,
        "internal_scale": p.scale,
        "draws_total": S,
    }
    data = {
        "source": st.source,
        "file_sha256": st.file_sha256,
        "files": st.meta.get("file_list"),  # several files (a folder, a glob): each one's path, size and SHA-256
        "statistics_sha256": st.fingerprint(),
        "groups": st.J,
        "measurements": float(st.N) if st.kind == "raw" else None,
        "kind": st.kind,
    }
    methods: dict = {}
    summary_info = None
    if summary_mode:
        sh = fit.acc.setup
        bias = (
            "a histogram of theta_j - mu, as for the other limits"
            if figures["bias_from_histogram"]
            else "theta limits minus the posterior mean of mu: off by at most the theta bound plus "
            f"max_s |mu_s - mean mu| = {figures['mu_spread_D']:.3g}"
        )
        RB = figures["rank_grid_bins"]
        methods = {
            key: text.format(
                bins=sh.bins,
                half=figures["grid_half_width_sd"],
                bias=bias,
                G=fit.acc.buckets,
                sample=fit.summary_options.sample,
                top=fit.summary_options.top,
                RB=RB,
                RGRID="one rank each"
                if RB == J
                else f"one rank each up to rank {figures['rank_exact_up_to']}, then geometric up to J",
            )
            for key, text in SUMMARY_METHODS.items()
        }
        if "in_level" in g:
            methods["ranks_within_levels"] = SUMMARY_LEVEL_METHOD
        errs = {c: table[c].to_numpy(dtype=float) for c in table.columns if c.endswith("_error")}
        figures["limit_error"] = {
            name: {
                "max": float(np.nanmax(e)) if np.isfinite(e).any() else None,
                "median": float(np.nanmedian(e)) if np.isfinite(e).any() else None,
            }
            for name, e in errs.items()
        }
        summary_info = {
            "groups": J,
            "kept_groups": int(len(fit.kept_index)),
            "kept_labels": fit.kept_labels,
            "figures": figures,
            "methods": methods,
            "settings": {
                "bins": fit.summary_options.bins,
                "sample": fit.summary_options.sample,
                "top_candidates": fit.summary_options.top,
                "named": list(fit.summary_options.keep),
            },
        }
    diag = fit.diagnostics()
    if summary_mode:
        diag["classic_rhat_all_groups"] = figures["classic_rhat"]
    names = ("groups", "interlab_and_checks", "ranks_and_pairs")
    seconds = {n: round(b - a, 3) for n, a, b in zip(names, clock, clock[1:])}
    return Results(
        options=o,
        mode="summary" if summary_mode else "full",
        model=p.model,
        problem=p,
        table=table,
        hyper=hyper,
        hyper_draws=hyper_draws,
        diagnostics=diag,
        run=run,
        data=data,
        lab=lab,
        tail=tail,
        new_group=new_group,
        checks=checks,
        pairs=pairs,
        pair_diff=pair_diff,
        heat=heat,
        methods=methods,
        summary=summary_info,
        seconds=seconds,
        predictors=predictors,
    )


def needs_draws(fit, what: str) -> None:
    """Refuse a summary-mode fit where every group's draws are needed, pointing to its table."""
    if getattr(fit, "summary_mode", False):
        raise InputError(
            f"{what} needs every group's draws, which a summary-mode run does not keep; use the "
            "per-group table (pooling.results.compute(fit).table, groups.csv), or refit with "
            "--summary off"
        )
