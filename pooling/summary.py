"""Summary mode: posterior summaries for 1e5 to 1e7 groups, in memory that grows by about 4 kB a group.

Keeping every draw does not scale: 4 chains x 1,000 draws x 1e6 groups x 8 bytes is 32 GB for theta
alone. In summary mode the chains run the same sweeps (pooling.summary_kernel calls kernel.sweep itself
on the same Generators, States and Work arrays), but each draw updates per-chain, per-group running
summaries (pooling.answers.accumulate, the function a full run applies to its stored draws); only the
hyperparameters and a few kept groups keep every draw. The result is a `SummaryFit`, which holds a full
`Fit` of the kept groups; pooling.results turns either into the same answers.

When it is used. `pooling.fit(..., summary=None)` (and `pooling fit --summary auto`, the default)
switches it on when J > AUTO_GROUPS (20,000) or when the full draws at the draw cap would take more
than AUTO_BYTES (8 GiB: chains x draw cap x J x 8 bytes, twice that for the separate structure).
summary=True / False (`--summary on|off`) forces it.

Same seed, same draws. The chains start as the full-draw sampler's do (sampler._Chain), warm up
with the same sweeps and draw the same numbers; accumulating draws nothing. So with the same seed
and the same number of draws, summary-mode means equal the full-draw means to rounding, every
probability and P(top k) is the same count of the same draws, and the interval limits differ
only by the histogram error stated below (tests/test_summary_mode.py checks all three).

How each per-group quantity is computed (internal units, mapped to the user's at the end; S = all draws):
  means, sd          Welford running mean and M2 per chain, merged across chains in chain order
                     (Chan, Golub and LeVeque 1979): the mean of all draws to rounding.
  probabilities      P(theta_j above / below a threshold), P(|theta_j - mu| > allowed bias),
                     P(best), P(top k): exact counts of the draws (top k by a size-k heap scan).
  interval limits    a histogram per group and quantity: BINS (64) equal bins on a grid fixed after
                     warm-up at centre +- (z + 2.5) sd of the second half of the warm-up draws, in the
                     quantity's own scale (theta; log sigma_j; logit of the shrinkage weight; logit
                     of the out-of-specification fraction), plus an underflow and an overflow bin
                     bounded by the smallest and largest draw. The limit is numpy's default (linear)
                     quantile of all S draws; each order statistic it uses is located exactly in its
                     bin by the counts and interpolated linearly inside it, so a limit is off by at
                     most one bin width (mapped to user units). Each group's bound is written beside
                     it (*_limit_error columns); benchmarks/README.md records bound and actual error.
  bias limits        below BIAS_HIST_GROUPS (100,000) groups: a histogram of theta_j - mu as above.
                     From there on: the theta limits minus the posterior mean of mu, off by at most the
                     theta bound plus D = max_s |mu_s - mean(mu)|, which shrinks like 1 / sqrt(J).
  shrinkage          mean: running mean of v_j / (v_j + tau^2). Interval: histogram (separate);
                     exact for shared and known, where the weight is a decreasing function of one
                     hyperparameter ratio (tau^2 / sigma^2, or tau^2), so its order statistics are
                     those of the stored hyperparameter draws.
  sigma (shared)     exact, from the stored draws of the one sigma.
  rank mean          kept groups: exact. Other groups: per draw the groups are counted into
                     G = max(1024, J) equal buckets of sign * theta; a group's rank lies between
                     1 + (groups in better buckets) and that plus its bucket's count - 1; the midpoint
                     is averaged and so is the half-width, which bounds the error (rank_mean_error).
  rank interval      kept groups: exact (their rank is counted exactly in every draw). Every other group:
                     the interval [rank_low, rank_high] contains the exact one (the inverted-CDF
                     quantiles of the group's ranks over all S draws, as the reporter computes them).
                     Per draw, lo = 1 + (groups in better buckets) <= rank <= lo + (bucket count - 1)
                     <= lo + W_j, W_j the largest bucket count - 1 seen by j. lo is counted into a
                     per-group histogram on one rank grid of RANK_BINS (96) bins: one rank a bin for
                     ranks 1..RANK_EXACT (32), then geometric edges up to J (at J = 1e6 each bin about
                     18% wider than the one before). The quantile's order statistic of lo is located
                     in its bin [a, z] exactly, so the exact rank quantile is in [a, z + W_j]; rank_low
                     is the a of the lower one, rank_high the z + W_j of the upper one, and
                     rank_limit_error = max over both ends of (z + W_j - a): how far each end can be
                     from the exact one. Memory: RANK_BINS uint16 counts + one uint32 per group and chain.
  kept groups        every draw of theta_j (and sigma_j), so every column of theirs is computed as
                     the reporter computes it from full draws (error 0).

Kept groups: those named by the user, a default sample of KEEP_SAMPLE (200) groups drawn with
asked.derived_rng(seed, PURPOSE_KEPT).choice(J, 200, replace=False) (a stream of the run's own seed, apart
from the chains'), and up to TOP_KEEP (100) candidates for the top k chosen after warm-up:
the groups whose optimistic reach (warm-up mean + 4 sd, in the direction of "best") is at least the
k-th largest pessimistic reach (mean - 4 sd), the highest reaches first.

Diagnostics. Run-length control (R-hat < 1.01, bulk and tail ESS >= 400) is applied to mu, tau, the
variance hyperparameters and the kept groups' theta (and sigma), from their stored draws. For every
group a classic (not split, not rank-normalised) R-hat of theta from the chains' running means and
variances is reported beside it, as a screen, not a target: over 1e6 groups some exceed 1.01 by
chance at any run length.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import numpy as np

from . import answers as A
from . import summary_kernel as sk
from .asked import PURPOSE_KEPT, ReportOptions, check_k, derived_rng, resolve_groups
from .errors import InputError
from .model import Problem
from .posterior import Fit, _jsonable_miss
from .sampler import (
    RawDraws,
    Settings,
    _Chain,
    _progress,
    _run_phase,
    diagnose_raw,
    draw_until_targets,
    load_sweep,
    resolve_seed,
)

AUTO_GROUPS = 20_000
AUTO_BYTES = 8 * 2**30
KEEP_SAMPLE = 200
TOP_KEEP = 100
BINS = 64
RANK_BINS = 96  # bins of the shared rank grid for every group's rank interval
RANK_EXACT = 32  # of which the first hold one rank each (ranks 1..32), the rest are geometric up to J
MIN_WARMUP = 20
BIAS_HIST_GROUPS = 100_000  # below this many groups the bias theta_j - mu gets its own histogram
MAX_NAMED = 5_000
REACH_SD = 4.0  # warm-up sds for "can reach the top k"
GRID_EXTRA_SD = 2.5  # the grid spans centre +- (z + this) warm-up sds


@dataclass(frozen=True)
class SummaryOptions:
    """keep: labels whose every draw is kept; sample: size of the default sample of kept groups;
    bins: histogram bins per group and quantity; top: how many top-k candidates are kept."""

    keep: tuple[str, ...] = ()
    sample: int = KEEP_SAMPLE
    bins: int = BINS
    top: int = TOP_KEEP

    def __post_init__(self):
        if isinstance(self.keep, str):
            object.__setattr__(self, "keep", (self.keep,))
        object.__setattr__(self, "keep", tuple(str(x) for x in self.keep))
        for name, low in (("sample", 0), ("bins", 4), ("top", 0)):
            x = getattr(self, name)
            if not isinstance(x, (int, np.integer)) or x < low:
                raise InputError(f"bad option: summary {name} must be a whole number of at least {low}; found {x!r}")
        if self.bins > 4000:
            raise InputError(f"bad option: summary bins must be at most 4000; found {self.bins}")
        if len(self.keep) > MAX_NAMED:
            raise InputError(f"bad option: at most {MAX_NAMED} groups can be kept by name; found {len(self.keep)}")


def full_draw_bytes(J: int, within: str, settings: Settings | None) -> int:
    """Bytes of theta (and per-group sigma, separate) draws at the draw cap: chains x cap x J x 8 (x 2)."""
    s = settings or Settings()
    return int(s.chains * s.draw_cap * J * 8 * (2 if within == "separate" else 1))


def wants_summary(problem: Problem, settings: Settings | None, choice=None) -> bool:
    """Summary mode or not: choice True/'on' or False/'off' decides; None/'auto' switches it on when
    J > AUTO_GROUPS or the full draws at the cap would exceed AUTO_BYTES."""
    if choice in (True, "on"):
        return True
    if choice in (False, "off"):
        return False
    if choice not in (None, "auto"):
        raise InputError(f"bad option: summary mode must be auto, on or off; found {choice!r}")
    J = problem.J
    return J > AUTO_GROUPS or full_draw_bytes(J, problem.model.within, settings) > AUTO_BYTES


def summary_bytes(
    J: int, within: str, chains: int, bins: int = BINS, limits: bool = False, draw_cap: int = 4000, levels: bool = False
) -> int:
    """About how many bytes summary mode holds per run (accumulators and scratch), excluding the data; levels:
    ranks within the levels of categorical predictors (3 running sums, a bucket index and about two bucket
    counts per group and chain)."""
    rows = (
        1
        + (2 if within == "separate" else 0)
        + (1 if limits and within != "known" else 0)
        + (1 if J < BIAS_HIST_GROUPS else 0)
    )
    count = 2 if draw_cap <= np.iinfo(np.uint16).max else 4
    # per chain: histograms, out-of-grid extremes, running means, counters, bucket index and count,
    # the chain's theta, sigma^2 and lambda, the sweep's scratch (v, 1/lambda, z^2, SS/2) and sigma_j,
    # rank histogram, largest bucket count, the bins of the draws not yet counted (summary_kernel.flush);
    # shared: grid origin and widths and the rank -> rank-bin table
    rank_bins = len(rank_grid(J, RANK_BINS, RANK_EXACT)) - 1
    per_chain = (
        rows * (bins + 2) * count
        + rows * 16
        + A.N_R * 8
        + A.N_H * 4
        + 4
        + 8
        + 8 * 8
        + rank_bins * count
        + 4
        + sk.HBUF * (rows + 1) * (1 if bins + 2 <= 256 else 2)
        + (3 * 8 + 8 + 2 * 8 if levels else 0)
    )
    return int(J * (chains * per_chain + rows * 24 + 4))


# ---------------------------------------------------------------------------------------------
# chains


class _SummaryChain(_Chain):
    """A full-draw chain (same start, same stream) whose post-warm-up draws update running summaries."""

    def __init__(self, problem: Problem, seed_seq, init):
        super().__init__(problem, seed_seq, init)
        self.mode = "warm"
        self.count = np.zeros(1)
        self.sg = np.empty(problem.J if problem.within_code == 0 else 1)
        self.pilot_mean = self.pilot_msq = None
        self.shared: _Setup | None = None
        self.acc: sk.Acc | None = None

    def run(self, p, n_sweeps, store, adapt, chunk, stop, tick):
        if self.mode == "warm":
            return super().run(p, n_sweeps, False, True, chunk, stop, tick)
        d = p.data
        setup = self.shared
        if self.mode == "pilot":
            if self.pilot_mean is None:
                self.pilot_mean = np.zeros((sk.N_Q, p.J))
                self.pilot_msq = np.zeros((sk.N_Q, p.J))
            done = 0
            while done < n_sweeps:
                if stop.is_set():
                    return
                k = min(chunk, n_sweeps - done)
                self.pilot_sweeps(p, k, self.pilot_mean, self.pilot_msq)
                done += k
                tick(k)
            return
        out = kept_rows(p, setup, n_sweeps)
        sh = setup.frozen()
        done = 0
        while done < n_sweeps:
            if stop.is_set():
                return
            k = min(chunk, n_sweeps - done)
            rows = sk.KeptRows(*(x[done : done + k] for x in out))
            sk.summarise(self.rng, k, d, self.state, self.work, sh, self.acc, rows)
            done += k
            tick(k)
        sk.flush(self.acc)  # the histograms hold every draw of this call from here on
        self.parts.append(out._asdict())

    def pilot_sweeps(self, p, n_sweeps: int, mean: np.ndarray, msq: np.ndarray) -> None:
        """n_sweeps pilot sweeps into the running means and M2 `mean`, `msq` (N_Q, J)."""
        setup = self.shared
        sk.pilot(
            self.rng,
            n_sweeps,
            p.data,
            self.state,
            self.work,
            self.sg,
            setup.asked,
            setup.logn,
            setup.rowmap[sk.Q_BIAS] >= 0,
            setup.asked[A.A_LIMITS] > 0,
            self.count,
            mean,
            msq,
        )

    def export_state(self) -> dict:
        # arrays, not lists: at a million groups a list of Python floats costs 30 bytes a number
        st = self.state
        return {
            "state": st.scalars.copy(),
            "theta": st.theta.copy(),
            "sigma2": st.sigma2.copy(),
            "lam": st.lam.copy(),
            "beta": st.beta.copy(),
        }


@dataclass
class _Setup:
    """What every chain reads, built up during warm-up: what was asked, grids, rank buckets, kept groups."""

    asked: np.ndarray
    cuts: np.ndarray
    k: int
    logn: np.ndarray
    rowmap: np.ndarray
    bins: int
    level: float
    glo: np.ndarray | None = None
    ginv: np.ndarray | None = None
    gw: np.ndarray | None = None
    bucket: np.ndarray | None = None
    kept: np.ndarray | None = None
    rank_edges: np.ndarray | None = None  # (RB + 1,) rank grid: bin b holds ranks edges[b] .. edges[b + 1] - 1
    rank_bin: np.ndarray | None = None  # (J + 2,) the bin of each rank 1..J (0 and J + 1 unused)
    kept_reason: list[str] = field(default_factory=list)
    lev: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))  # level of each group (predictors)
    lev_off: np.ndarray = field(default_factory=lambda: np.zeros(1, dtype=np.int64))  # each level's first bucket
    lev_bucket: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))  # each level's bucket (lo, 1/width)

    def frozen(self) -> sk.Shared:
        return sk.Shared(
            self.asked,
            self.cuts,
            int(self.k),
            self.logn,
            self.rowmap,
            self.glo,
            self.ginv,
            self.bucket,
            self.kept,
            self.rank_bin,
            self.lev,
            self.lev_off,
            self.lev_bucket,
        )


def _rowmap(problem: Problem, asked: np.ndarray) -> np.ndarray:
    """The histogram row of each quantity, -1 for those not summarised by a histogram."""
    rows = np.full(sk.N_Q, -1, dtype=np.int64)
    active = [sk.Q_THETA]
    if problem.within_code == 0:
        active.append(sk.Q_LOGSIGMA)
    if problem.within_code == 0 or problem.heavy:  # the shrinkage weight varies with sigma_j or lambda_j
        active.append(sk.Q_LOGITW)
    if asked[A.A_LIMITS] > 0:
        active.append(sk.Q_LOGITF)
    if problem.J < BIAS_HIST_GROUPS:
        active.append(sk.Q_BIAS)
    rows[active] = np.arange(len(active))
    return rows


def _merge_pilot(chains):
    """Mean and sd over all chains' pilot draws (equal counts per chain), per quantity and group."""
    n = chains[0].count[0]
    C = len(chains)
    mean = sum(c.pilot_mean for c in chains) / C
    m2 = sum(c.pilot_msq for c in chains)
    for c in chains:
        m2 += n * (c.pilot_mean - mean) ** 2
    sd = np.sqrt(np.maximum(m2, 0.0) / max(C * n - 1.0, 1.0))
    return mean, sd


def _place_grids(sh: _Setup, mean: np.ndarray, sd: np.ndarray) -> dict:
    from scipy.special import ndtri

    z = float(ndtri(0.5 + sh.level / 2))
    half = z + GRID_EXTRA_SD
    rows = int(sh.rowmap.max()) + 1
    J = mean.shape[1]
    sh.glo, sh.gw = np.empty((rows, J)), np.empty((rows, J))
    for q in range(sk.N_Q):
        r = sh.rowmap[q]
        if r < 0:
            continue
        s = np.maximum(sd[q], 1e-9 * np.maximum(1.0, np.abs(mean[q])))  # a grid needs a width
        sh.glo[r] = mean[q] - half * s
        sh.gw[r] = 2.0 * half * s / sh.bins
    sh.ginv = 1.0 / sh.gw
    return {"grid_half_width_sd": half, "z": z}


def _rank_buckets(sh: _Setup, x_mean: np.ndarray, x_sd: np.ndarray) -> int:
    J = x_mean.shape[0]
    G = max(1024, J)
    lo = float(np.quantile(x_mean - REACH_SD * x_sd, 1e-4))
    hi = float(np.quantile(x_mean + REACH_SD * x_sd, 1 - 1e-4))
    if not hi > lo:
        hi = lo + 1.0
    sh.bucket = np.array([lo, G / (hi - lo)])
    return G


def _level_buckets(sh: _Setup, problem: Problem, x_mean: np.ndarray, x_sd: np.ndarray) -> None:
    """Buckets for the ranks within levels: per level max(1024, its groups) equal buckets over the range its groups
    can reach (as _rank_buckets does for all groups)."""
    des = problem.design
    if des is None or not des.level_names:
        return
    lev = des.level_of
    L = len(des.level_names)
    sizes = np.bincount(lev, minlength=L)
    G = np.maximum(1024, sizes)
    sh.lev = np.ascontiguousarray(lev, dtype=np.int64)
    sh.lev_off = np.concatenate([[0], np.cumsum(G)]).astype(np.int64)
    sh.lev_bucket = np.empty((L, 2))
    for i in range(L):
        sel = lev == i
        lo = float(np.quantile(x_mean[sel] - REACH_SD * x_sd[sel], 1e-4))
        hi = float(np.quantile(x_mean[sel] + REACH_SD * x_sd[sel], 1 - 1e-4))
        if not hi > lo:
            hi = lo + 1.0
        sh.lev_bucket[i] = (lo, G[i] / (hi - lo))


def rank_grid(J: int, bins: int = RANK_BINS, exact: int = RANK_EXACT) -> np.ndarray:
    """Integer edges 1 = e_0 < ... < e_B = J + 1 of the rank grid: unit bins for ranks 1..exact, then
    geometric (rounded, duplicates dropped) up to J; every rank its own bin when J <= bins."""
    if J <= bins:
        return np.arange(1, J + 2, dtype=np.int64)
    exact = min(exact, bins - 1)
    head = np.arange(1, exact + 2, dtype=np.int64)
    tail = np.rint(np.geomspace(exact + 1, J + 1, bins - exact + 1)).astype(np.int64)
    return np.unique(np.concatenate([head, tail, [J + 1]]))


def _choose_kept(problem: Problem, sopts: SummaryOptions, named: np.ndarray, x_mean, x_sd, k: int, seed: int):
    """Kept groups (sorted by position) and why each is kept: named, sample, or a top-k candidate."""
    J = problem.J
    reason: dict[int, str] = {int(j): "named" for j in named}
    if sopts.sample:
        for j in derived_rng(seed, PURPOSE_KEPT).choice(J, size=min(sopts.sample, J), replace=False):
            reason.setdefault(int(j), "sample")
    if sopts.top:
        reach = x_mean + REACH_SD * x_sd
        floor = x_mean - REACH_SD * x_sd
        kk = min(k, J)
        floor_k = np.partition(floor, J - kk)[J - kk]  # the k-th largest pessimistic value
        cand = np.flatnonzero(reach >= floor_k)
        if cand.size > sopts.top:
            cand = cand[np.argsort(-reach[cand], kind="stable")[: sopts.top]]
        for j in cand:
            reason.setdefault(int(j), "top candidate")
    if not reason:  # every run keeps at least one group, so that diagnostics have per-group draws
        reason[int(np.argmax(x_mean))] = "top candidate"
    kept = np.array(sorted(reason), dtype=np.int64)
    return kept, [reason[int(j)] for j in kept]


# ---------------------------------------------------------------------------------------------
# the run


@dataclass
class Accumulated:
    """Every chain's running summaries, stacked on a leading chain axis, and what was shared."""

    run: np.ndarray
    hits: np.ndarray
    hist: np.ndarray
    ext: np.ndarray
    setup: _Setup
    draws: int  # per chain
    grid: dict
    ranks: np.ndarray  # (chains, draws, kept): exact ranks of the kept groups
    buckets: int
    within_sd: np.ndarray  # (chains, draws): sqrt(mean_j sigma_j^2), internal units (0 for known)
    rhist: np.ndarray | None = None  # (chains, J, rank bins): counts of each draw's lower rank bound
    wmax: np.ndarray | None = None  # (chains, J): largest bucket count - 1 seen
    lrun: np.ndarray | None = None  # (chains, 3, J or 0): ranks within levels (summary_kernel.level_ranks)


def _load_pilot(c: _SummaryChain, p: Problem, setup: _Setup) -> None:
    """Have numba load (or compile) the pilot kernel: a call of no sweeps, which changes nothing."""
    c.pilot_sweeps(p, 0, np.zeros((sk.N_Q, p.J)), np.zeros((sk.N_Q, p.J)))


def _load_summarise(c: _SummaryChain, p: Problem, setup: _Setup) -> None:
    """Have numba load (or compile) the draw phase's kernels: summarise with no sweeps and flush with nothing
    buffered, which change nothing; the zero-row outputs have the types of _SummaryChain.run's."""
    sk.summarise(c.rng, 0, p.data, c.state, c.work, setup.frozen(), c.acc, kept_rows(p, setup, 0))
    sk.flush(c.acc)


def kept_rows(p: Problem, setup: _Setup, n_sweeps: int) -> sk.KeptRows:
    """Room for n_sweeps draws of the hyperparameters and the kept groups (theta, sigma, lambda, rank)."""
    m = setup.kept.shape[0]
    return sk.KeptRows(
        np.empty((n_sweeps, sk.N_Y + p.data.X.shape[1])),
        np.empty(n_sweeps),
        np.empty((n_sweeps, m)),
        np.empty((n_sweeps, m if p.within_code == 0 else 0)),
        np.empty((n_sweeps, m if p.heavy else 0)),
        np.empty((n_sweeps, m), dtype=np.int64),
    )


def sample_summary(
    problem: Problem,
    settings: Settings | None = None,
    options: ReportOptions | None = None,
    summary: SummaryOptions | None = None,
    progress: bool | None = None,
    init: list[dict] | None = None,
) -> tuple[RawDraws, Accumulated]:
    """Warm up, place the grids, draw with running summaries, extend until the kept draws meet the targets.

    Returns the hyperparameter and kept-group draws as a RawDraws (theta, sigma and lambda over the kept
    groups) and the accumulated summaries.
    """
    settings = settings or Settings()
    threads = settings.threads or min(settings.chains, os.cpu_count() or 1)
    start = time.perf_counter()
    bar = _progress(settings.chains * (settings.warmup + settings.draws), progress)
    timer = [0.0]
    try:
        ready = prepare(problem, settings, options, summary, init, threads=threads, bar=bar, timer=timer)
        chains, setup, acc = ready.chains, ready.setup, ready.acc
        _load_summarise(chains[0], problem, setup)  # outside the sampling time, as the sweep
        raw, rounds, have = draw_until_targets(
            chains,
            problem,
            settings,
            threads,
            bar,
            ready.seed,
            start,
            lambda r: diagnose_raw(r, settings.targets),
            collect=_collect,
            timer=timer,
        )
    finally:
        if bar is not None:
            bar.close()
    for c in chains:
        c.acc = None
    raw.final_states = [c.export_state() for c in chains]
    raw.seconds = time.perf_counter() - start
    ranks = np.stack([np.concatenate([part["rank"] for part in c.parts], axis=0) for c in chains])
    sr = np.stack([np.concatenate([part["hyper"][:, sk.Y_SR] for part in c.parts]) for c in chains])
    return raw, Accumulated(
        acc["run"],
        acc["hits"],
        acc["hist"],
        acc["ext"],
        setup,
        have,
        ready.grid,
        ranks,
        ready.buckets,
        sr,
        acc["rhist"],
        acc["wmax"],
        acc["lrun"],
    )


@dataclass
class Ready:
    """Chains warmed up, grids and rank buckets placed, kept groups chosen, accumulators allocated: each chain's
    next `run` draws with running summaries (what sample_summary does next; benchmarks time it)."""

    chains: list
    setup: _Setup
    acc: dict
    grid: dict
    buckets: int
    seed: int


def prepare(
    problem: Problem,
    settings: Settings,
    options: ReportOptions | None,
    summary: SummaryOptions | None,
    init: list[dict] | None = None,
    threads: int = 1,
    bar=None,
    timer: list | None = None,
) -> Ready:
    """The warm-up and set-up half of sample_summary (see there)."""
    o = options or ReportOptions()
    sopts = summary or SummaryOptions()
    if settings.warmup < MIN_WARMUP:
        raise InputError(
            f"bad option: summary mode needs at least {MIN_WARMUP} warm-up sweeps to place its "
            f"histogram grids; found --warmup {settings.warmup}"
        )
    if problem.J > sk.MAX_GROUPS:
        raise InputError(f"bad input: summary mode handles at most {sk.MAX_GROUPS:,} groups; found {problem.J:,}")
    k = check_k(o.k, problem.J)
    named = resolve_groups(problem.stats.labels, sopts.keep) if sopts.keep else np.zeros(0, dtype=np.int64)
    seed = resolve_seed(settings)
    streams = np.random.SeedSequence(seed).spawn(settings.chains)
    chains = [_SummaryChain(problem, s, None if init is None else init[i]) for i, s in enumerate(streams)]
    asked = o.internal(problem.center, problem.scale, limits_apply=problem.within_code != 2)
    cuts = A.lambda_cuts(problem.df_grid) if problem.heavy else np.zeros(1)
    setup = _Setup(
        asked=asked,
        cuts=cuts,
        k=k,
        logn=np.log(np.maximum(problem.n, 1e-300)),
        rowmap=_rowmap(problem, asked),
        bins=int(sopts.bins),
        level=float(o.level),
    )
    for c in chains:
        c.shared = setup
    load_sweep(chains[0], problem)  # the sweep and the pilot loaded or compiled outside the sampling time
    _load_pilot(chains[0], problem, setup)
    pilot = max(settings.warmup // 2, min(settings.warmup, 10))
    for mode, n_sweeps in (("warm", settings.warmup - pilot), ("pilot", pilot)):
        for c in chains:
            c.mode = mode
        if n_sweeps:
            _run_phase(chains, problem, n_sweeps, store=False, adapt=True, threads=threads, bar=bar, timer=timer)
    mean, sd = _merge_pilot(chains)
    for c in chains:
        c.pilot_mean = c.pilot_msq = None
    grid = _place_grids(setup, mean, sd)
    sign = asked[A.A_SIGN]
    x_mean, x_sd = sign * mean[sk.Q_THETA], sd[sk.Q_THETA]
    del mean, sd
    G = _rank_buckets(setup, x_mean, x_sd)
    _level_buckets(setup, problem, x_mean, x_sd)
    setup.rank_edges = rank_grid(problem.J, RANK_BINS, RANK_EXACT)  # read at run time, so a test can shrink it
    rank_bin = (np.searchsorted(setup.rank_edges, np.arange(problem.J + 2), side="right") - 1).astype(np.int64)
    rank_bin[0], rank_bin[-1] = 0, len(setup.rank_edges) - 2
    setup.rank_bin = rank_bin
    setup.kept, setup.kept_reason = _choose_kept(problem, sopts, named, x_mean, x_sd, k, seed)
    del x_mean, x_sd
    acc = _allocate(problem, settings, setup, G)
    rows = acc["hist"].shape[1]
    small = setup.bins + 2 <= 256 and len(setup.rank_edges) - 1 <= 256
    for i, c in enumerate(chains):
        c.mode = "draw"
        L = setup.lev_bucket.shape[0]
        nb = int(setup.lev_off[-1])
        c.acc = sk.Acc(
            acc["run"][i],
            acc["hits"][i],
            acc["hist"][i],
            acc["ext"][i],
            acc["rhist"][i],
            acc["wmax"][i],
            c.sg,
            np.zeros(G, dtype=np.int64),
            np.zeros(problem.J, dtype=np.int32),
            np.zeros(1),
            np.zeros((sk.HBUF, rows + 1, problem.J), dtype=np.uint8 if small else np.uint16),
            np.zeros(1, dtype=np.int64),
            acc["lrun"][i],
            np.zeros(nb, dtype=np.int64),
            np.zeros(problem.J if L else 0, dtype=np.int64),
            np.zeros(nb, dtype=np.int64),
            np.zeros(L),
            np.zeros(L, dtype=np.int64),
        )
    return Ready(chains, setup, acc, grid, G, seed)


def _allocate(problem: Problem, settings: Settings, sh: _Setup, G: int) -> dict:
    C, J = settings.chains, problem.J
    rows = int(sh.rowmap.max()) + 1
    count = np.uint16 if settings.draw_cap <= np.iinfo(np.uint16).max else np.uint32
    ext = np.empty((C, rows, J, 2))
    ext[..., 0], ext[..., 1] = np.inf, -np.inf
    return {
        "run": np.zeros((C, A.N_R, J)),
        "hits": np.zeros((C, A.N_H, J), dtype=np.uint32),
        "hist": np.zeros((C, rows, J, sh.bins + 2), dtype=count),
        "ext": ext,
        "rhist": np.zeros((C, J, len(sh.rank_edges) - 1), dtype=count),
        "wmax": np.zeros((C, J), dtype=np.uint32),
        "lrun": np.zeros((C, 3, J if sh.lev.shape[0] else 0)),
    }


def _collect(chains, problem: Problem, seed, settings, rounds, start) -> RawDraws:
    def stack(key):
        return np.stack([np.concatenate([part[key] for part in c.parts], axis=0) for c in chains])

    hyper = stack("hyper")
    within = problem.within_code
    sigma = stack("sigma") if within == 0 else hyper[:, :, sk.Y_SIGMA] if within == 1 else None
    heavy = problem.heavy
    return RawDraws(
        mu=hyper[:, :, sk.Y_MU],
        tau=hyper[:, :, sk.Y_TAU],
        theta=stack("theta"),
        sigma=sigma,
        s=hyper[:, :, sk.Y_S] if within == 0 else None,
        nu=hyper[:, :, sk.Y_NU] if within == 0 else None,
        evals=stack("evals"),
        seed=seed,
        settings=settings,
        rounds=list(rounds),
        seconds=time.perf_counter() - start,
        final_states=[],
        df=hyper[:, :, sk.Y_DF] if heavy else None,
        lam=stack("lam") if heavy else None,
        beta=np.ascontiguousarray(hyper[:, :, sk.N_Y :]) if problem.data.X.shape[1] else None,
    )


# ---------------------------------------------------------------------------------------------
# the fit


@dataclass(eq=False)
class SummaryFit:
    """A summary-mode run: `problem` has every group; `kept` is a full Fit of the kept groups (their every draw,
    and the run's hyperparameter draws); `acc` holds every group's running summaries. pooling.results turns
    it into the same answers as a full run (every group's row). Anything that needs every group's draws
    refuses it, pointing to the table."""

    problem: Problem
    kept: Fit
    acc: Accumulated
    options: ReportOptions
    summary_options: SummaryOptions
    without: object = None  # with group-level predictors: the same data fitted without them (pooling.fit)

    summary_mode = True

    @property
    def raw(self) -> RawDraws:
        return self.kept.raw

    @property
    def misses(self) -> list[dict]:
        return self.kept.misses

    @property
    def targets_met(self) -> bool:
        return self.kept.targets_met

    @property
    def labels(self) -> tuple[str, ...]:
        return self.problem.stats.labels

    @property
    def J(self) -> int:
        return self.problem.J

    @property
    def kept_index(self) -> np.ndarray:
        return self.acc.setup.kept

    @property
    def kept_labels(self) -> list[str]:
        return list(self.kept.labels)

    def diagnostics(self) -> dict:
        d = self.kept.diagnostics()
        names = self.kept_labels
        d["missed"] = [_jsonable_miss(m, names) for m in self.misses[:50]]
        d["per_group_from"] = (
            f"the stored draws of {len(names)} kept groups (rank-normalised split R-hat, bulk and "
            "tail ESS); every group: classic R-hat from chain means (a screen)"
        )
        return d


def fit_summary(
    problem: Problem,
    settings: Settings | None = None,
    options: ReportOptions | None = None,
    keep=None,
    progress: bool | None = None,
    init=None,
) -> SummaryFit:
    """Run summary mode on a built problem. options: what will be asked of the run (pooling.asked.ReportOptions;
    its level, k, best, threshold, limits and allowed bias are counted while sampling); keep: a SummaryOptions
    or a list of labels."""
    from .posterior import finish

    o = options or ReportOptions()
    sopts = keep if isinstance(keep, SummaryOptions) else SummaryOptions(keep=tuple(keep or ()))
    settings = settings or Settings()
    raw, acc = sample_summary(problem, settings, o, sopts, progress=progress, init=init)
    kept_fit = finish(raw, problem.subset(acc.setup.kept))
    return SummaryFit(problem, kept_fit, acc, o, sopts)
