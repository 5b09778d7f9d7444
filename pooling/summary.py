"""Summary mode: posterior summaries for 1e5 to 1e7 groups, in memory that grows by about 4 kB a group.

Keeping every draw does not scale: 4 chains x 1,000 draws x 1e6 groups x 8 bytes is 32 GB for theta
alone. In summary mode the chains run the same sweeps (pooling.summary_kernel calls kernel.sweeps
itself, one sweep at a time, on the same Generators), but each draw updates per-chain, per-group
running summaries; only the hyperparameters and a few kept groups keep every draw.

When it is used. `pooling.fit(..., summary=None)` (and `pooling fit --summary auto`, the default)
switches it on when J > AUTO_GROUPS (20,000) or when the full draws at the draw cap would take more
than AUTO_BYTES (8 GiB: chains x draw cap x J x 8 bytes, twice that for the separate structure).
summary=True / False (`--summary on|off`) forces it.

Same seed, same draws. The chains start as the full-draw sampler's do (sampler._Chain), warm up
with the same sweeps and draw the same numbers; accumulating draws nothing. So with the same seed
and the same number of draws, summary-mode means equal the full-draw means to rounding, every
probability and P(top k) is the same count of the same draws, and the interval limits differ
only by the histogram error stated below (tests/test_summary_mode.py checks all three).

How each per-group quantity is computed (user units; S = all draws of all chains):
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
numpy.random.default_rng(KEEP_SEED = 20240715).choice(J, 200, replace=False) (the same for any run on the
same number of groups), and up to TOP_KEEP (100) candidates for the top k chosen after warm-up:
the groups whose optimistic reach (warm-up mean + 4 sd, in the direction of "best") is at least the
k-th largest pessimistic reach (mean - 4 sd), the highest reaches first.

Diagnostics. Run-length control (R-hat < 1.01, bulk and tail ESS >= 400) is applied to mu, tau, the
variance hyperparameters and the kept groups' theta (and sigma), from their stored draws. For every
group a classic (not split, not rank-normalised) R-hat of theta from the chains' running means and
variances is reported beside it, as a screen, not a target: over 1e6 groups some exceed 1.01 by
chance at any run length.
"""
from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from . import summary_kernel as sk
from .errors import InputError
from .model import Problem
from .posterior import Fit, _jsonable_miss, diagnose_raw, to_parts
from .sampler import RawDraws, Settings, _Chain, _progress, _run_phase, draw_until_targets, resolve_seed

AUTO_GROUPS = 20_000
AUTO_BYTES = 8 * 2**30
KEEP_SAMPLE = 200
KEEP_SEED = 20_240_715
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


def summary_bytes(J: int, within: str, chains: int, bins: int = BINS, limits: bool = False,
                  draw_cap: int = 4000) -> int:
    """About how many bytes summary mode holds per run (accumulators and scratch), excluding the data."""
    rows = (1 + (2 if within == "separate" else 0) + (1 if limits and within != "known" else 0)
            + (1 if J < BIAS_HIST_GROUPS else 0))
    count = 2 if draw_cap <= np.iinfo(np.uint16).max else 4
    # per chain: histograms, out-of-grid extremes, running means, counters, bucket index and count,
    # the chain's theta and sigma^2 and kernel.sweeps' two scratch arrays; shared: grid origin and widths
    # and the rank interval's histogram of lower rank bounds and its largest bucket count (uint32)
    rank_bins = len(rank_grid(J, RANK_BINS, RANK_EXACT)) - 1
    per_chain = rows * (bins + 2) * count + rows * 16 + sk.N_R * 8 + sk.N_H * 4 + 4 + 8 + 4 * 8 + rank_bins * count + 4
    return int(J * (chains * per_chain + rows * 24 + 4))  # + 4: the shared rank -> rank-bin table


# ---------------------------------------------------------------------------------------------
# chains

class _SummaryChain(_Chain):
    """A full-draw chain (same start, same stream) whose post-warm-up draws update running summaries."""

    def __init__(self, problem: Problem, seed_seq, init):
        super().__init__(problem, seed_seq, init)
        self.mode = "warm"
        self.count = np.zeros(1)
        self.pilot_mean = self.pilot_msq = None
        self.acc = None  # set by _Shared.attach

    def run(self, p, n_sweeps, store, adapt, chunk, stop, tick):
        if self.mode == "warm":
            return super().run(p, n_sweeps, False, True, chunk, stop, tick)
        if self.mode == "pilot":
            if self.pilot_mean is None:
                self.pilot_mean = np.zeros((sk.N_Q, p.J))
                self.pilot_msq = np.zeros((sk.N_Q, p.J))
            done = 0
            sh = self.shared
            while done < n_sweeps:
                if stop.is_set():
                    return
                k = min(chunk, n_sweeps - done)
                sk.pilot_sweeps(self.rng, k, p.within_code, p.n, p.ybar, p.m2, p.v_known, p.mu_kind, p.mu_loc,
                                p.mu_scale, p.tau_kind, p.tau_scale, p.s2_shape, p.s2_rate, p.nu_grid,
                                p.nu_logprior, p.nu_table, p.layout, self.state, self.theta, self.sigma2, sh.logn, sh.opt,
                                sh.rowmap[sk.Q_BIAS] >= 0, self.count, self.pilot_mean, self.pilot_msq)
                done += k
                tick(k)
            return
        sh, a = self.shared, self.acc
        m = sh.kept.shape[0]
        out = {"hyper": np.empty((n_sweeps, sk.N_Y)), "evals": np.empty(n_sweeps),
               "theta": np.empty((n_sweeps, m)), "sigma": np.empty((n_sweeps, m if p.within_code == 0 else 0)),
               "rank": np.empty((n_sweeps, m), dtype=np.int64)}
        done = 0
        while done < n_sweeps:
            if stop.is_set():
                return
            k = min(chunk, n_sweeps - done)
            sl = slice(done, done + k)
            sk.summary_sweeps(self.rng, k, p.within_code, p.n, p.ybar, p.m2, p.v_known, p.mu_kind, p.mu_loc,
                              p.mu_scale, p.tau_kind, p.tau_scale, p.s2_shape, p.s2_rate, p.nu_grid, p.nu_logprior,
                              p.nu_table, p.layout, self.state, self.theta, self.sigma2, sh.logn, sh.opt, sh.k, self.count,
                              a["run"], a["hits"], sh.rowmap, sh.glo, sh.ginv, a["hist"], a["ext"], sh.bucket,
                              a["bcnt"], a["bidx"], sh.kept, out["hyper"][sl], out["evals"][sl], out["theta"][sl],
                              out["sigma"][sl], out["rank"][sl], sh.rank_bin, a["rhist"], a["wmax"], a["lobin"])
            done += k
            tick(k)
        self.parts.append(out)

    def export_state(self) -> dict:
        # arrays, not lists: at a million groups a list of Python floats costs 30 bytes a number
        return {"state": self.state.copy(), "theta": self.theta.copy(), "sigma2": self.sigma2.copy()}


@dataclass
class _Shared:
    """What every chain reads: options vector, grids, rank buckets and the kept groups."""

    opt: np.ndarray
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


def _options_vector(problem: Problem, o) -> np.ndarray:
    opt = np.zeros(sk.N_O)
    opt[sk.O_CENTER], opt[sk.O_SCALE] = problem.center, problem.scale
    opt[sk.O_SIGN] = 1.0 if o.best == "highest" else -1.0
    if o.threshold is not None:
        opt[sk.O_THR], opt[sk.O_HAS_THR] = float(o.threshold), 1.0
    if o.lower is not None:
        opt[sk.O_LOWER], opt[sk.O_HAS_LOWER] = float(o.lower), 1.0
    if o.upper is not None:
        opt[sk.O_UPPER], opt[sk.O_HAS_UPPER] = float(o.upper), 1.0
    if o.allowed_bias is not None:
        opt[sk.O_BIAS], opt[sk.O_HAS_BIAS] = float(o.allowed_bias), 1.0
    if problem.within_code != 2 and (o.lower is not None or o.upper is not None):
        opt[sk.O_LIMITS] = 1.0
    return opt


def _rowmap(problem: Problem, opt: np.ndarray) -> np.ndarray:
    """The histogram row of each quantity, -1 for those not summarised by a histogram."""
    rows = np.full(sk.N_Q, -1, dtype=np.int64)
    active = [sk.Q_THETA]
    if problem.within_code == 0:
        active += [sk.Q_LOGSIGMA, sk.Q_LOGITW]
    if opt[sk.O_LIMITS] > 0:
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


def _place_grids(sh: _Shared, mean: np.ndarray, sd: np.ndarray) -> dict:
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


def _rank_buckets(sh: _Shared, x_mean: np.ndarray, x_sd: np.ndarray) -> int:
    J = x_mean.shape[0]
    G = max(1024, J)
    lo = float(np.quantile(x_mean - REACH_SD * x_sd, 1e-4))
    hi = float(np.quantile(x_mean + REACH_SD * x_sd, 1 - 1e-4))
    if not hi > lo:
        hi = lo + 1.0
    sh.bucket = np.array([lo, G / (hi - lo)])
    return G


def rank_grid(J: int, bins: int = RANK_BINS, exact: int = RANK_EXACT) -> np.ndarray:
    """Integer edges 1 = e_0 < ... < e_B = J + 1 of the rank grid: unit bins for ranks 1..exact, then
    geometric (rounded, duplicates dropped) up to J; every rank its own bin when J <= bins."""
    if J <= bins:
        return np.arange(1, J + 2, dtype=np.int64)
    exact = min(exact, bins - 1)
    head = np.arange(1, exact + 2, dtype=np.int64)
    tail = np.rint(np.geomspace(exact + 1, J + 1, bins - exact + 1)).astype(np.int64)
    return np.unique(np.concatenate([head, tail, [J + 1]]))


def _choose_kept(problem: Problem, sopts: SummaryOptions, named: np.ndarray, x_mean, x_sd, k: int):
    """Kept groups (sorted by position) and why each is kept: named, sample, or a top-k candidate."""
    J = problem.J
    reason: dict[int, str] = {int(j): "named" for j in named}
    if sopts.sample:
        for j in np.random.default_rng(KEEP_SEED).choice(J, size=min(sopts.sample, J), replace=False):
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
    shared: _Shared
    draws: int  # per chain
    grid: dict
    ranks: np.ndarray  # (chains, draws, kept): exact ranks of the kept groups
    buckets: int
    within_sd: np.ndarray  # (chains, draws): sqrt(mean_j sigma_j^2), internal units (0 for known)
    rhist: np.ndarray | None = None  # (chains, J, rank bins): counts of each draw's lower rank bound
    wmax: np.ndarray | None = None  # (chains, J): largest bucket count - 1 seen


def sample_summary(problem: Problem, settings: Settings | None = None, options=None,
                   summary: SummaryOptions | None = None, progress: bool | None = None,
                   init: list[dict] | None = None) -> tuple[RawDraws, Accumulated]:
    """Warm up, place the grids, draw with running summaries, extend until the kept draws meet the targets.

    Returns the hyperparameter and kept-group draws as a RawDraws (theta and sigma over the kept groups)
    and the accumulated summaries.
    """
    settings = settings or Settings()
    o = _report_options(options)
    sopts = summary or SummaryOptions()
    if settings.warmup < MIN_WARMUP:
        raise InputError(f"bad option: summary mode needs at least {MIN_WARMUP} warm-up sweeps to place its "
                         f"histogram grids; found --warmup {settings.warmup}")
    from .report.groups import check_k, resolve_groups

    k = check_k(o.k, problem.J)
    named = resolve_groups(problem.stats.labels, sopts.keep) if sopts.keep else np.zeros(0, dtype=np.int64)
    seed = resolve_seed(settings)
    streams = np.random.SeedSequence(seed).spawn(settings.chains)
    chains = [_SummaryChain(problem, s, None if init is None else init[i]) for i, s in enumerate(streams)]
    opt = _options_vector(problem, o)
    sh = _Shared(opt=opt, k=k, logn=np.log(np.maximum(problem.n, 1e-300)), rowmap=_rowmap(problem, opt),
                 bins=int(sopts.bins), level=float(o.level))
    for c in chains:
        c.shared = sh
    threads = settings.threads or min(settings.chains, os.cpu_count() or 1)
    start = time.perf_counter()
    bar = _progress(settings.chains * (settings.warmup + settings.draws), progress)
    pilot = max(settings.warmup // 2, min(settings.warmup, 10))
    try:
        for mode, n_sweeps in (("warm", settings.warmup - pilot), ("pilot", pilot)):
            for c in chains:
                c.mode = mode
            if n_sweeps:
                _run_phase(chains, problem, n_sweeps, store=False, adapt=True, threads=threads, bar=bar)
        mean, sd = _merge_pilot(chains)
        for c in chains:
            c.pilot_mean = c.pilot_msq = None
        grid = _place_grids(sh, mean, sd)
        sign = opt[sk.O_SIGN]
        x_mean, x_sd = sign * mean[sk.Q_THETA], sd[sk.Q_THETA]
        del mean, sd
        G = _rank_buckets(sh, x_mean, x_sd)
        sh.rank_edges = rank_grid(problem.J, RANK_BINS, RANK_EXACT)  # read at run time, so a test can shrink it
        sh.rank_bin = (np.searchsorted(sh.rank_edges, np.arange(problem.J + 2), side="right") - 1).astype(np.int32)
        sh.rank_bin[0], sh.rank_bin[-1] = 0, len(sh.rank_edges) - 2
        sh.kept, sh.kept_reason = _choose_kept(problem, sopts, named, x_mean, x_sd, k)
        del x_mean, x_sd
        acc = _allocate(problem, settings, sh, G)
        for i, c in enumerate(chains):
            c.mode = "draw"
            c.count[0] = 0.0
            c.acc = {"run": acc["run"][i], "hits": acc["hits"][i], "hist": acc["hist"][i], "ext": acc["ext"][i],
                     "bcnt": np.zeros(G, dtype=np.int64), "bidx": np.zeros(problem.J, dtype=np.int32),
                     "rhist": acc["rhist"][i], "wmax": acc["wmax"][i], "lobin": np.zeros(G, dtype=np.int64)}
        raw, rounds, have = draw_until_targets(chains, problem, settings, threads, bar, seed, start,
                                               lambda r: diagnose_raw(r, settings.targets), collect=_collect)
    finally:
        if bar is not None:
            bar.close()
    for c in chains:
        c.acc = None
    raw.final_states = [c.export_state() for c in chains]
    raw.seconds = time.perf_counter() - start
    ranks = np.stack([np.concatenate([part["rank"] for part in c.parts], axis=0) for c in chains])
    sr = np.stack([np.concatenate([part["hyper"][:, sk.Y_SR] for part in c.parts]) for c in chains])
    return raw, Accumulated(acc["run"], acc["hits"], acc["hist"], acc["ext"], sh, have, grid, ranks, G, sr,
                            acc["rhist"], acc["wmax"])


def _allocate(problem: Problem, settings: Settings, sh: _Shared, G: int) -> dict:
    C, J = settings.chains, problem.J
    rows = int(sh.rowmap.max()) + 1
    count = np.uint16 if settings.draw_cap <= np.iinfo(np.uint16).max else np.uint32
    ext = np.empty((C, rows, J, 2))
    ext[..., 0], ext[..., 1] = np.inf, -np.inf
    return {"run": np.zeros((C, sk.N_R, J)), "hits": np.zeros((C, sk.N_H, J), dtype=np.uint32),
            "hist": np.zeros((C, rows, J, sh.bins + 2), dtype=count), "ext": ext,
            "rhist": np.zeros((C, J, len(sh.rank_edges) - 1), dtype=count), "wmax": np.zeros((C, J), dtype=np.uint32)}


def _collect(chains, problem: Problem, seed, settings, rounds, start) -> RawDraws:
    def stack(key):
        return np.stack([np.concatenate([part[key] for part in c.parts], axis=0) for c in chains])

    hyper = stack("hyper")
    within = problem.within_code
    sigma = stack("sigma") if within == 0 else hyper[:, :, sk.Y_SIGMA] if within == 1 else None
    return RawDraws(
        mu=hyper[:, :, sk.Y_MU], tau=hyper[:, :, sk.Y_TAU], theta=stack("theta"), sigma=sigma,
        s=hyper[:, :, sk.Y_S] if within == 0 else None, nu=hyper[:, :, sk.Y_NU] if within == 0 else None,
        evals=stack("evals"), seed=seed, settings=settings, rounds=list(rounds),
        seconds=time.perf_counter() - start, final_states=[],
    )


def _report_options(options):
    if options is None:
        from .report.assemble import ReportOptions

        return ReportOptions()
    return options


# ---------------------------------------------------------------------------------------------
# the per-group table

EXTRA_COLUMNS = {
    "kept": "why every draw of this group was kept (named, sample, top candidate); empty when only summaries were kept",
    "theta_limit_error": "largest possible error of theta_low and theta_high (histogram bin width in user units); "
                         "0 for kept groups",
    "sigma_limit_error": "largest possible error of sigma_low and sigma_high; 0 when exact",
    "shrink_limit_error": "largest possible error of shrink_low and shrink_high; 0 when exact",
    "outside_limit_error": "largest possible error of outside_low and outside_high; 0 for kept groups",
    "bias_limit_error": "largest possible error of bias_low and bias_high (above 100,000 groups: theta's bound "
                        "plus max |mu_s - mean mu|)",
    "rank_mean_error": "largest possible error of rank_mean (half the rank bucket's count - 1, averaged over draws); "
                       "0 for kept groups",
    "rank_limit_error": "largest possible error of rank_low and rank_high, in ranks: the exact rank_low is in "
                        "[rank_low, rank_low + e], the exact rank_high in [rank_high - e, rank_high] (rank grid bin "
                        "plus the largest rank-bucket count - 1 seen); 0 for kept groups",
    "theta_rhat_classic": "classic R-hat of theta_j from the chains' means and variances (not split, not "
                          "rank-normalised): a screen for all groups",
}


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


def _classic_rhat(run: np.ndarray, D: int) -> np.ndarray:
    """sqrt(((D - 1) / D W + B / D) / W) from per-chain means and M2 (Gelman and Rubin 1992)."""
    C = run.shape[0]
    if C < 2 or D < 2:
        return np.full(run.shape[2], np.nan)
    means = run[:, sk.R_THETA]
    W = (run[:, sk.R_THETA_M2] / (D - 1)).mean(axis=0)
    b_over_d = means.var(axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt(((D - 1) / D * W + b_over_d) / W)


def build_table(problem: Problem, raw: RawDraws, acc: Accumulated, o, kept_parts) -> tuple[pd.DataFrame, dict]:
    """Every group's row, with the reporter's columns (pooling.report.groups.COLUMNS) where the quantity
    is available, then EXTRA_COLUMNS; and the figures of the methods' errors."""
    from .report.groups import group_table, rank_summary
    from .report.interlab import z_scores

    st = problem.stats
    J, C, D = st.J, raw.mu.shape[0], acc.draws
    S = C * D
    sh = acc.shared
    k_, c_ = problem.scale, problem.center
    within = problem.model.within
    probs = np.array([(1 - o.level) / 2, (1 + o.level) / 2])
    run = acc.run

    def interval(q: int, kind: int, scale: float, center: float):
        est = np.empty((2, J))
        err = np.empty((2, J))
        sk.hist_quantiles(acc.hist, acc.ext, sh.glo, sh.gw, int(sh.rowmap[q]), probs, kind, scale, center, est, err)
        return est[0], est[1], np.maximum(err[0], err[1]) * (1 + 1e-9)  # slack for the rounding of bin edges

    def cmean(row: int) -> np.ndarray:  # equal counts per chain: the mean of the chains' means
        return run[:, row].mean(axis=0)

    mu_u = raw.mu * k_ + c_
    mu_mean = float(mu_u.mean())
    D_mu = float(np.max(np.abs(mu_u - mu_mean)))
    cols: dict[str, np.ndarray] = {"group": np.array(st.labels, dtype=object), "n": st.n.astype(np.int64),
                                   "raw_mean": st.raw_mean}
    if st.kind == "known":
        cols["std_error"] = st.raw_se
    else:
        cols["raw_sd"] = st.raw_sd
    th_mean = cmean(sk.R_THETA)
    m2 = run[:, sk.R_THETA_M2].sum(axis=0) + D * ((run[:, sk.R_THETA] - th_mean) ** 2).sum(axis=0)
    cols["theta_mean"] = th_mean * k_ + c_
    cols["theta_sd"] = np.sqrt(m2 / max(S - 1, 1)) * k_
    del m2
    cols["theta_low"], cols["theta_high"], th_err = interval(sk.Q_THETA, 0, k_, c_)
    errors = {"theta_limit_error": th_err}
    if within == "separate":
        cols["sigma_mean"] = cmean(sk.R_SIGMA) * k_
        cols["sigma_low"], cols["sigma_high"], errors["sigma_limit_error"] = interval(sk.Q_LOGSIGMA, 1, k_, 0.0)
    elif within == "shared":
        sig = raw.sigma.reshape(-1) * k_
        lo, hi = np.quantile(sig, probs)
        cols["sigma_mean"] = np.full(J, float(sig.mean()))
        cols["sigma_low"], cols["sigma_high"] = np.full(J, lo), np.full(J, hi)
        errors["sigma_limit_error"] = np.zeros(J)
    cols["shrink_weight"] = cmean(sk.R_SHRINK)
    if within == "separate":
        cols["shrink_low"], cols["shrink_high"], errors["shrink_limit_error"] = interval(sk.Q_LOGITW, 2, 1.0, 0.0)
    else:
        tau2 = raw.tau.reshape(-1) ** 2
        if within == "shared":  # w = (sigma^2 / n) / (sigma^2 / n + tau^2) = 1 / (1 + n rho), rho = tau^2 / sigma^2
            rho, a = np.sort(tau2 / raw.sigma.reshape(-1) ** 2), 1.0 / problem.n
        else:
            rho, a = np.sort(tau2), problem.v_known
        cols["shrink_low"], cols["shrink_high"] = _exact_weight_interval(rho, a, probs)
        errors["shrink_limit_error"] = np.zeros(J)
    dist = st.raw_mean - mu_mean
    with np.errstate(divide="ignore", invalid="ignore"):
        cols["shrink_realised"] = np.where(dist != 0, (st.raw_mean - cols["theta_mean"]) / dist, np.nan)
    hits = acc.hits.sum(axis=0, dtype=np.int64)
    if o.threshold is not None:
        cols["p_above"] = hits[sk.H_ABOVE] / S
        cols["p_below"] = hits[sk.H_BELOW] / S
    if sh.rowmap[sk.Q_LOGITF] >= 0:
        cols["outside_mean"] = cmean(sk.R_OUT)
        cols["outside_low"], cols["outside_high"], errors["outside_limit_error"] = interval(sk.Q_LOGITF, 2, 1.0, 0.0)
    cols["bias_mean"] = cols["theta_mean"] - mu_mean
    if sh.rowmap[sk.Q_BIAS] >= 0:
        cols["bias_low"], cols["bias_high"], errors["bias_limit_error"] = interval(sk.Q_BIAS, 0, k_, 0.0)
    else:
        cols["bias_low"] = cols["theta_low"] - mu_mean
        cols["bias_high"] = cols["theta_high"] - mu_mean
        errors["bias_limit_error"] = th_err + D_mu
    if o.allowed_bias is not None:
        cols["p_bias_over"] = hits[sk.H_BIAS] / S
    cols["rank_mean"] = run[:, sk.R_RANK].sum(axis=0) / S
    from .report.groups import _quantile_sorted_index

    r_lo, r_hi, r_err = np.empty(J, dtype=np.int64), np.empty(J, dtype=np.int64), np.empty(J, dtype=np.int64)
    sk.rank_intervals(acc.rhist, acc.wmax, sh.rank_edges, _quantile_sorted_index(S, probs[0]),
                      _quantile_sorted_index(S, probs[1]), J, r_lo, r_hi, r_err)
    cols["rank_low"] = r_lo.astype(float)
    cols["rank_high"] = r_hi.astype(float)
    cols["p_best"] = hits[sk.H_BEST] / S
    cols["p_top_k"] = hits[sk.H_TOP] / S
    errors["rank_mean_error"] = run[:, sk.R_RANK_ERR].sum(axis=0) / S
    errors["rank_limit_error"] = r_err.astype(float)
    z, signal, _ = z_scores(st.raw_mean, o.assigned, o.sigma_pt)
    cols["z_score"], cols["z_signal"] = z, signal
    # kept groups: every column from their stored draws, as the reporter computes it (errors 0)
    kept = sh.kept
    exact = group_table(kept_parts, o.level, min(o.k, len(kept)), o.best, o.threshold, o.lower, o.upper,
                        o.allowed_bias)
    for name in ("theta_mean", "theta_sd", "theta_low", "theta_high", "sigma_mean", "sigma_low", "sigma_high",
                 "shrink_weight", "shrink_low", "shrink_high", "outside_mean", "outside_low", "outside_high",
                 "bias_mean", "bias_low", "bias_high", "p_above", "p_below", "p_bias_over"):
        if name in cols and name in exact:
            cols[name][kept] = exact[name].to_numpy()
    for name in errors:
        if name not in ("rank_mean_error", "rank_limit_error"):
            errors[name][kept] = 0.0
    rk = rank_summary(acc.ranks.reshape(-1, len(kept)), o.level, sh.k)
    cols["rank_mean"][kept] = rk["rank_mean"]
    cols["rank_low"][kept] = rk["rank_low"]
    cols["rank_high"][kept] = rk["rank_high"]
    errors["rank_mean_error"][kept] = 0.0
    errors["rank_limit_error"][kept] = 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        cols["shrink_realised"] = np.where(dist != 0, (st.raw_mean - cols["theta_mean"]) / dist, np.nan)
    table = pd.DataFrame(cols)
    table["rank_low"] = table["rank_low"].astype("Int64")
    table["rank_high"] = table["rank_high"].astype("Int64")
    reason = np.full(J, "", dtype=object)
    reason[kept] = sh.kept_reason
    table["kept"] = reason
    for name in ("theta_limit_error", "sigma_limit_error", "shrink_limit_error", "outside_limit_error",
                 "bias_limit_error", "rank_mean_error", "rank_limit_error"):
        if name in errors:
            table[name] = errors[name]
    rhat = _classic_rhat(run, D)
    table["theta_rhat_classic"] = rhat
    finite = rhat[np.isfinite(rhat)]
    figures = {
        "draws_total": S, "kept_groups": int(len(kept)), "bins": sh.bins, "rank_buckets": acc.buckets,
        "grid_half_width_sd": acc.grid["grid_half_width_sd"], "mu_spread_D": D_mu,
        "rank_grid_bins": int(len(sh.rank_edges) - 1),
        "limit_error": {name: {"max": float(np.max(e)), "median": float(np.median(e))} for name, e in errors.items()},
        "classic_rhat": {"max": float(finite.max()) if finite.size else None,
                         "above_1.01": int(np.sum(finite >= 1.01)), "groups": int(finite.size)},
    }
    return table, figures


# ---------------------------------------------------------------------------------------------
# the fit

METHODS = {
    "means_and_sd": "Welford running mean and M2 per chain and group, merged across chains (Chan, Golub and "
                    "LeVeque): equal to the mean and sd of all draws to rounding",
    "probabilities": "exact counts of the draws: P(above / below the threshold), P(|bias| > allowed), P(best), "
                     "P(top k) (a size-k heap scan per draw)",
    "interval_limits": "per group and quantity a histogram of {bins} equal bins on a grid fixed after warm-up "
                       "(centre +- {half:.2f} warm-up sd, in the scale theta, log sigma, logit shrinkage, logit "
                       "outside fraction), with underflow and overflow bins bounded by the extreme draws; each "
                       "order statistic is located exactly and interpolated inside its bin, so a limit is off by "
                       "at most one bin width (the *_limit_error columns)",
    "bias_limits": "{bias}",
    "shrinkage_interval": "histogram of logit w_j (separate); exact from the tau (and sigma) draws for shared and "
                          "known, where w_j is a decreasing function of one hyperparameter ratio",
    "rank_mean": "kept groups exact; others by a bucket count of all groups per draw ({G} buckets): the "
                 "midpoint of the possible ranks, off by at most rank_mean_error",
    "rank_interval": "kept groups exact from their rank in every draw; others from a histogram, per group, of "
                     "each draw's lower rank bound (1 + groups in better buckets) on one rank grid of {RB} bins "
                     "({RGRID}), widened by the largest bucket "
                     "count - 1 seen: the interval contains the exact one, each end off by at most "
                     "rank_limit_error",
    "kept_groups": "named groups, {sample} groups from numpy.random.default_rng({seed}).choice(J, {sample}, "
                   "replace=False), and up to {top} top-k candidates chosen after warm-up",
    "diagnostics": "run-length control on mu, tau, the variance hyperparameters and the kept groups' stored draws; "
                   "a classic R-hat from chain means for every group as a screen",
}


@dataclass
class SummaryFit(Fit):
    """A summary-mode run: `parts` and `idata` (and so `draws`) hold the hyperparameters and the kept groups only,
    `kept` their positions; `table` holds every group's results (the reporter's columns, then
    summary.EXTRA_COLUMNS); `methods` and `figures` say how they were computed and how large each
    error can be."""

    table: pd.DataFrame | None = None
    kept: np.ndarray | None = None
    options: object = None
    summary_options: SummaryOptions | None = None
    figures: dict = field(default_factory=dict)
    methods: dict = field(default_factory=dict)

    summary_mode = True

    @property
    def kept_labels(self) -> list[str]:
        return [self.labels[j] for j in self.kept]

    def diagnostics(self) -> dict:
        d = super().diagnostics()
        names = self.kept_labels
        d["missed"] = [_jsonable_miss(m, names) for m in self.misses[:50]]
        d["per_group_from"] = (f"the stored draws of {len(names)} kept groups (rank-normalised split R-hat, bulk and "
                               "tail ESS); every group: classic R-hat from chain means (a screen)")
        d["classic_rhat_all_groups"] = self.figures.get("classic_rhat")
        return d


def fit_summary(problem: Problem, settings: Settings | None = None, options=None, keep=None,
                progress: bool | None = None, init=None) -> SummaryFit:
    """Run summary mode on a built problem. options: the report options (level, k, best, threshold,
    limits, allowed bias; pooling.report.ReportOptions); keep: a SummaryOptions or a list of labels."""
    o = _report_options(options)
    sopts = keep if isinstance(keep, SummaryOptions) else SummaryOptions(keep=tuple(keep or ()))
    settings = settings or Settings()
    raw, acc = sample_summary(problem, settings, o, sopts, progress=progress, init=init)
    kept = acc.shared.kept
    sub = replace(problem, stats=problem.stats.subset(kept))
    parts = to_parts(raw, sub)
    post = parts["posterior"]
    post.add("rank", ("chain", "draw", "group"), acc.ranks,
             {"meaning": f"rank among all {problem.J} groups, 1 = {o.best} theta"})
    if problem.within_code != 2:  # the typical within-group sd per draw, for the interlaboratory figures
        post.add("within_sd", ("chain", "draw"), acc.within_sd * problem.scale)
    note = {"summary_mode": f"kept groups only: {len(kept)} of {problem.J}; every group is in groups.csv",
            "groups_total": str(problem.J), "data_fingerprint": problem.stats.fingerprint()}
    for part in parts.values():
        part.attrs.update(note)
    parts["constant_data"].add("kept_because", ("group",), np.array(acc.shared.kept_reason, dtype=object))
    misses = raw.rounds[-1]["missed_list"] if raw.rounds else []
    table, figures = build_table(problem, raw, acc, o, parts)
    bias = ("a histogram of theta_j - mu, as for the other limits" if acc.shared.rowmap[sk.Q_BIAS] >= 0 else
            "theta limits minus the posterior mean of mu: off by at most the theta bound plus "
            f"max_s |mu_s - mean mu| = {figures['mu_spread_D']:.3g}")
    methods = {key: text.format(bins=acc.shared.bins, half=acc.grid["grid_half_width_sd"], bias=bias,
                                G=acc.buckets, sample=sopts.sample, seed=KEEP_SEED, top=sopts.top,
                                RB=len(acc.shared.rank_edges) - 1,
                                RGRID="one rank each" if len(acc.shared.rank_edges) - 1 == problem.J else
                                f"one rank each up to rank {RANK_EXACT}, then geometric up to J")
               for key, text in METHODS.items()}
    return SummaryFit(parts, problem, raw, misses, table=table, kept=kept, options=o, summary_options=sopts,
                      figures=figures, methods=methods)
