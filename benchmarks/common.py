"""Helpers shared by the benchmarks: timers, invented data, and a direct call of the kernel.

Timing on a shared machine. The machine these benchmarks were written on has 2 cores shared
with other developers, so a single wall-clock reading can be inflated by a factor of two by
someone else's job. Single-threaded measurements therefore use the thread's CPU time
(CLOCK_THREAD_CPUTIME_ID), which time-slicing by the operating system does not inflate, and
every figure is the best of several interleaved repeats: the least disturbed run is the one
closest to what the code costs. Only the thread-scaling benchmark must use wall time.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass

import numpy as np

from pooling import kernel
from pooling.model import Model, build
from pooling.stats import GroupStats


def cpu_now() -> float:
    return time.thread_time()


def best(fn, repeats: int, clock=cpu_now) -> float:
    """Smallest time of `repeats` calls of fn() (the least disturbed run)."""
    out = math.inf
    for _ in range(repeats):
        t = clock()
        fn()
        out = min(out, clock() - t)
    return out


def load() -> float:
    """One-minute load average: how busy the shared machine was while measuring."""
    try:
        return os.getloadavg()[0]
    except OSError:
        return float("nan")


def labels(J: int) -> tuple[str, ...]:
    return tuple(f"g{j:07d}" for j in range(J))


def invented_groups(J: int, tau: float, sigma: float, n_lo: int, n_hi: int, seed: int) -> GroupStats:
    """Invented raw-measurement statistics: theta_j ~ N(0, tau^2), n_j ~ U{n_lo..n_hi},
    ybar_j ~ N(theta_j, sigma^2 / n_j), M2_j ~ sigma^2 chi2(n_j - 1). For benchmarks only."""
    g = np.random.default_rng(seed)
    n = g.integers(n_lo, n_hi + 1, J)
    theta = g.normal(0.0, tau, J)
    mean = theta + g.normal(0.0, 1.0, J) * sigma / np.sqrt(n)
    m2 = sigma**2 * g.chisquare(np.maximum(n - 1, 1)) * (n > 1)
    return GroupStats(labels(J), n, mean, m2)


def invented_estimates(J: int, tau: float, seed: int) -> GroupStats:
    """Invented estimates with standard errors (known structure): se_j ~ U(0.5, 1.5)."""
    g = np.random.default_rng(seed)
    se = g.uniform(0.5, 1.5, J)
    est = g.normal(0.0, tau, J) + g.normal(0.0, 1.0, J) * se
    return GroupStats(labels(J), np.zeros(J, dtype=np.int64), est, np.zeros(J), se=se, kind="known")


@dataclass
class KernelChain:
    """One chain's state for calling kernel.sweeps directly, as the sampler does: the sampler's own chain set-up
    (pooling.sampler._Chain: Generator, kernel.State, kernel.Work), driven in the sampler's chunks. `state` is
    the chain's scalar state vector (kernel.ETA ...)."""

    problem: object
    chain: object

    @classmethod
    def start(cls, problem, seed: int) -> KernelChain:
        from pooling.sampler import _Chain

        return cls(problem, _Chain(problem, np.random.SeedSequence(seed), None))

    @property
    def rng(self) -> np.random.Generator:
        return self.chain.rng

    @property
    def state(self) -> np.ndarray:
        return self.chain.state.scalars

    @property
    def theta(self) -> np.ndarray:
        return self.chain.state.theta

    @property
    def sigma2(self) -> np.ndarray:
        return self.chain.state.sigma2

    def run(self, n_sweeps: int, adapt: bool = False, store: bool = False, chunk: int | None = None):
        """n_sweeps sweeps in calls of `chunk` sweeps (the sampler's chunking by default).

        With store=False nothing is kept (zero-row Draws, as in the sampler's warm-up), so that J = 1e6
        needs no room for draws. With store=True returns a dict of draws.
        """
        d = self.problem.data
        chunk = chunk or chunk_size(self.problem.J)
        out = kernel.empty_draws(d, n_sweeps) if store else kernel.no_draws(d)
        done = 0
        while done < n_sweeps:
            k = min(chunk, n_sweeps - done)
            rows = kernel.Draws(*(a[done : done + k] for a in out)) if store else out
            kernel.sweeps(self.chain.rng, k, adapt, d, self.chain.state, self.chain.work, rows, 0)
            done += k
        return out._asdict() if store else None


def chunk_size(J: int) -> int:
    """The sampler's sweeps per kernel call (pooling.sampler._chunk_size), copied if it moves."""
    try:
        from pooling.sampler import _chunk_size

        return int(_chunk_size(J))
    except ImportError:
        return int(np.clip(1_000_000 // max(J, 1), 1, 500))


def problem_of(stats: GroupStats, model: Model | None = None):
    return build(stats, model or Model(within="known" if stats.kind == "known" else "separate"))
