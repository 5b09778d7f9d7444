"""Chains on threads, warm-up, draws, and run-length control until the diagnostics meet their targets.

Each chain owns a numpy Generator from SeedSequence(seed).spawn(chains) and its own state, so
the draws are the same whatever the number of threads. Sweeps run in chunks: between chunks the
main thread reports progress and can stop the run cleanly (Ctrl-C), in which case nothing is
returned and nothing is written.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from concurrent.futures import FIRST_EXCEPTION, ThreadPoolExecutor, wait
from dataclasses import dataclass, field
from typing import cast

import numpy as np

from . import _memory, kernel
from . import diagnostics as dg
from .errors import InputError, Interrupted
from .model import Problem


@dataclass(frozen=True)
class Targets:
    """Run-length targets: rank-normalised split R-hat below rhat_max, bulk and tail ESS at least ess_min."""

    rhat_max: float = 1.01
    ess_min: float = 400.0


@dataclass(frozen=True)
class Settings:
    """How long to run. max_draws caps the draws per chain that run-length control may reach."""

    chains: int = 4
    draws: int = 1000
    warmup: int = 1000
    seed: int | None = None
    max_draws: int | None = None
    threads: int | None = None
    targets: Targets = field(default_factory=Targets)

    def __post_init__(self):
        for name in ("chains", "draws"):
            val = getattr(self, name)
            if not isinstance(val, (int, np.integer)) or val < 1:
                raise InputError(f"bad option: {name} must be a whole number of at least 1; found {val!r}")
        if not isinstance(self.warmup, (int, np.integer)) or self.warmup < 0:
            raise InputError(f"bad option: warmup must be a whole number of at least 0; found {self.warmup!r}")
        if self.max_draws is not None and self.max_draws < self.draws:
            raise InputError(f"bad option: max_draws ({self.max_draws}) is below draws ({self.draws})")
        if self.threads is not None and self.threads < 1:
            raise InputError(f"bad option: threads must be at least 1; found {self.threads}")
        if self.seed is not None and (not isinstance(self.seed, (int, np.integer)) or self.seed < 0):
            raise InputError(f"bad option: seed must be a whole number >= 0; found {self.seed!r}")

    @property
    def draw_cap(self) -> int:
        return self.max_draws if self.max_draws is not None else 4 * self.draws


@dataclass
class RawDraws:
    """Internal-unit draws, arrays shaped (chains, draws, ...), plus what the run did.

    In the `raw` of a Fit made by pooling.fit, theta (and sigma for `separate`) are None: those draws
    were moved into the fit's posterior, in the user's units (posterior.finish with consume=True)."""

    mu: np.ndarray
    tau: np.ndarray
    theta: np.ndarray
    sigma: np.ndarray | None
    s: np.ndarray | None
    nu: np.ndarray | None
    evals: np.ndarray
    seed: int
    settings: Settings
    rounds: list[dict]
    seconds: float
    final_states: list[dict]
    df: np.ndarray | None = None  # heavy tails: df per draw (inf: the normal limit)
    sweep_seconds: float = float("nan")  # wall time in the sweeps alone (warm-up and draws), without diagnostics
    lam: np.ndarray | None = None  # heavy tails: lambda_j per draw
    beta: np.ndarray | None = None  # group-level predictors: the coefficients per draw (chains, draws, p), internal


class _Chain:
    """One chain's generator, kernel state and scratch, and where its stored draws go."""

    def __init__(self, problem: Problem, seed_seq: np.random.SeedSequence, init: dict | None):
        self.rng = np.random.default_rng(seed_seq)
        p = problem
        J = p.J
        sc = np.zeros(kernel.N_SCALARS)
        theta = p.ybar.copy()
        sigma2 = np.ones(J)
        rng = self.rng
        pooled = float(np.sum(p.m2) / max(np.sum(p.n) - J, 1.0)) if p.within_code != 2 else 1.0
        if not pooled > 0:
            pooled = 1.0
        spread = float(np.std(p.ybar)) if J > 1 else 1.0
        # over-dispersed starting points, so that R-hat can see chains that have not met
        sc[kernel.ETA] = np.clip(np.log(max(spread, 0.05)) + rng.normal(0.0, 1.0), -10.0, 10.0)
        sc[kernel.MU] = float(np.mean(p.ybar)) + rng.normal(0.0, max(spread, 0.1))
        sc[kernel.S2] = pooled * np.exp(rng.normal(0.0, 0.5))
        sc[kernel.NU_IDX] = len(p.nu_grid) // 2
        sc[kernel.WIDTH] = 1.0
        sc[kernel.SIGMA2] = pooled * np.exp(rng.normal(0.0, 0.5))
        if p.within_code == 0:
            own = np.where(p.n >= 2, p.m2 / np.maximum(p.n - 1.0, 1.0), pooled)
            sigma2 = (0.5 * own + 0.5 * pooled) * np.exp(rng.normal(0.0, 0.5, J))
            sigma2 = np.maximum(sigma2, 1e-12 * pooled)
        # heavy tails start at the grid's middle with every lambda_j = 1 (no random numbers: the normal
        # model's chains start exactly as they always did)
        sc[kernel.DF_IDX] = len(p.df_grid) // 2
        lam = np.ones(J if p.heavy else 0)
        # the predictors' coefficients start at 0: block A draws (mu, beta) afresh given tau in the first sweep,
        # so the start only sets the point the first sums are taken about
        beta = np.zeros(p.data.X.shape[1])
        if init is not None:
            st = np.asarray(init["state"], dtype=float)
            sc[: len(st)] = st
            sc[kernel.JUMP_SUM] = 0.0
            sc[kernel.JUMP_COUNT] = 0.0
            if len(st) <= kernel.DF_IDX or not 0 <= sc[kernel.DF_IDX] < len(p.df_grid):
                sc[kernel.DF_IDX] = len(p.df_grid) // 2
            theta[:] = init["theta"]
            sigma2[:] = init["sigma2"]
            saved_lam, saved_beta = init.get("lam"), init.get("beta")
            if p.heavy and saved_lam is not None and len(saved_lam) == J:
                lam[:] = saved_lam
            if beta.size and saved_beta is not None and len(saved_beta) == beta.size:
                beta[:] = saved_beta
        self.state = kernel.State(sc, theta, sigma2, lam, beta)
        self.work = kernel.make_work(p.data)
        if p.heavy:
            self.work.inv_lam[:] = 1.0 / lam
        self.parts: list[dict] = []
        self.into: dict | None = None  # set by _preallocate: where the next stored run writes its draws

    @property
    def theta(self) -> np.ndarray:
        return self.state.theta

    @property
    def sigma2(self) -> np.ndarray:
        return self.state.sigma2

    def run(self, p: Problem, n_sweeps: int, store: bool, adapt: bool, chunk: int, stop: threading.Event, tick):
        d = p.data
        into, self.into = self.into, None
        out: dict | None = None
        if store:  # this chain's slice of arrays shared by all chains (_preallocate), or arrays of its own
            out = into if into is not None else kernel.empty_draws(d, n_sweeps)._asdict()
        none = kernel.no_draws(d)
        done = 0
        while done < n_sweeps:
            if stop.is_set():
                return
            k = min(chunk, n_sweeps - done)
            rows = kernel.Draws(**{key: arr[done : done + k] for key, arr in out.items()}) if out is not None else none
            kernel.sweeps(self.rng, k, adapt, d, self.state, self.work, rows, 0)
            done += k
            tick(k)
        if out is not None:
            self.parts.append(out)

    def export_state(self) -> dict:
        st = self.state
        return {
            "state": st.scalars.tolist(),
            "theta": st.theta.tolist(),
            "sigma2": st.sigma2.tolist(),
            "lam": st.lam.tolist(),
            "beta": st.beta.tolist(),
        }


def load_sweep(chain: _Chain, problem: Problem) -> None:
    """Have numba load the sweep from its cache, or compile it, before the clock starts: a call of no sweeps,
    which changes nothing, so that the sampling time (`run.sweep_seconds`, "sampling took") is the sweeps' own
    and not the half minute of a first compilation."""
    kernel.sweeps(chain.rng, 0, False, problem.data, chain.state, chain.work, kernel.no_draws(problem.data), 0)


def _preallocate(chains, problem: Problem, n_sweeps: int) -> dict[str, np.ndarray]:
    """Arrays shaped (chains, n_sweeps, ...) that the chains fill in place, so that collecting the
    draws afterwards copies nothing (at 1,000 groups x 4 x 1,000 draws a stack of the chains' own
    arrays cost ~0.25 s, mostly touching fresh memory)."""
    shapes = kernel.draws_shape(problem.data, n_sweeps)
    block = {
        key: _memory.empty((len(chains),) + shape, dtype=kernel.DRAW_DTYPES.get(key, np.float64))
        for key, shape in shapes.items()
    }
    for i, c in enumerate(chains):
        c.into = {key: arr[i] for key, arr in block.items()}
    return block


def _chunk_size(J: int) -> int:
    # about 0.05 s of work per chunk at ~40-50 ns per group and sweep
    return int(np.clip(1_000_000 // max(J, 1), 1, 500))


def _progress(total: int, enabled: bool | None):
    if enabled is None:
        enabled = sys.stderr.isatty()
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=total, unit="sweep", file=sys.stderr, leave=False, dynamic_ncols=True, desc="sampling")


def _run_phase(chains, problem, n_sweeps, store, adapt, threads, bar, timer: list | None = None):
    """Run every chain for n_sweeps in a thread pool; Ctrl-C stops all of them between chunks. The phase's
    wall time is added to timer[0] when a timer is given (the sampling time that benchmarks compare with)."""
    t0 = time.perf_counter()
    try:
        _run_phase_timed(chains, problem, n_sweeps, store, adapt, threads, bar)
    finally:
        if timer is not None:
            timer[0] += time.perf_counter() - t0


def _run_phase_timed(chains, problem, n_sweeps, store, adapt, threads, bar):
    stop = threading.Event()
    lock = threading.Lock()
    counter = [0]

    def tick(k):
        with lock:
            counter[0] += k

    chunk = _chunk_size(problem.J)
    shown = 0
    with ThreadPoolExecutor(max_workers=threads) as pool:
        futures = [pool.submit(c.run, problem, n_sweeps, store, adapt, chunk, stop, tick) for c in chains]
        try:
            pending = set(futures)
            while pending:
                _, pending = wait(pending, timeout=0.1, return_when=FIRST_EXCEPTION)
                if bar is not None:
                    with lock:
                        now = counter[0]
                    bar.update(now - shown)
                    shown = now
                for f in futures:
                    if f.done() and f.exception() is not None:
                        stop.set()
                        raise f.exception()
        except KeyboardInterrupt:
            stop.set()
            wait(futures)
            raise Interrupted("stopped by the user; the draws so far were discarded and nothing was written") from None


def resolve_seed(settings: Settings) -> int:
    """The run's seed: the one given, or a fresh one (recorded in the summary so the run can be repeated)."""
    return (
        settings.seed if settings.seed is not None else cast(int, np.random.SeedSequence().entropy) % (2**63)
    )  # drawn fresh: an int


def draw_until_targets(
    chains,
    problem: Problem,
    settings: Settings,
    threads: int,
    bar,
    seed: int,
    start: float,
    diagnose,
    collect=None,
    timer: list | None = None,
) -> tuple[RawDraws, list[dict], int]:
    """Draw `settings.draws` per chain, then extend until `diagnose` reports no misses or the cap is reached.

    `collect(chains, problem, seed, settings, rounds, start)` gathers the chains' draws (default: every
    draw of every group). Returns the collected draws, the record of each round and the draws per chain.
    """
    blocks: list[dict] = []  # the default collection: arrays shared by the chains, one set per round
    own = collect is None
    if own:
        collect = lambda *args: _collect(blocks, *args)  # noqa: E731
    rounds: list[dict] = []
    todo, have = settings.draws, 0
    while True:
        if own:
            blocks.append(_preallocate(chains, problem, todo))
        _run_phase(chains, problem, todo, store=True, adapt=False, threads=threads, bar=bar, timer=timer)
        have += todo
        raw = collect(chains, problem, seed, settings, rounds, start)
        misses, record = diagnose(raw)
        record["draws_per_chain"] = have
        rounds.append(record)
        if not misses or have >= settings.draw_cap:
            raw.rounds = rounds
            raw.seconds = time.perf_counter() - start
            raw.sweep_seconds = timer[0] if timer is not None else float("nan")
            return raw, rounds, have
        want = int(np.ceil(have * record.get("growth", 1.5)))
        todo = int(min(max(want - have, have // 4, 1), settings.draw_cap - have))
        if bar is not None:
            bar.total += settings.chains * todo
            bar.refresh()


def sample_raw(
    problem: Problem,
    settings: Settings | None = None,
    progress: bool | None = None,
    init: list[dict] | None = None,
    diagnose=None,
) -> RawDraws:
    """Warm up, draw, and extend until `diagnose(draws)` reports no misses or the cap is reached.

    diagnose takes a RawDraws and returns (misses, round_record); by default `diagnose_raw` with the
    settings' targets.
    """
    settings = settings or Settings()
    if diagnose is None:
        diagnose = lambda raw: diagnose_raw(raw, settings.targets)  # noqa: E731
    seed = resolve_seed(settings)
    streams = np.random.SeedSequence(seed).spawn(settings.chains)
    chains = [_Chain(problem, s, None if init is None else init[i]) for i, s in enumerate(streams)]
    threads = settings.threads or min(settings.chains, os.cpu_count() or 1)
    load_sweep(chains[0], problem)
    start = time.perf_counter()
    bar = _progress(settings.chains * (settings.warmup + settings.draws), progress)
    timer = [0.0]
    try:
        if settings.warmup:
            _run_phase(chains, problem, settings.warmup, store=False, adapt=True, threads=threads, bar=bar, timer=timer)
        raw, _, _ = draw_until_targets(chains, problem, settings, threads, bar, seed, start, diagnose, timer=timer)
        return raw
    finally:
        if bar is not None:
            bar.close()


def _collect(blocks, chains, problem, seed, settings, rounds, start) -> RawDraws:
    """Every draw of every group: the preallocated blocks of each round, joined along the draws."""

    def stack(key):
        parts = [b[key] for b in blocks]
        return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=1)

    within = problem.within_code
    sigma = None if within == 2 else stack("sigma")[:, :, 0] if within == 1 else stack("sigma")
    heavy = problem.heavy
    return RawDraws(
        mu=stack("mu"),
        tau=stack("tau"),
        theta=stack("theta"),
        sigma=sigma,
        s=stack("s") if within == 0 else None,
        nu=stack("nu") if within == 0 else None,
        evals=stack("evals"),
        seed=seed,
        settings=settings,
        rounds=list(rounds),
        seconds=time.perf_counter() - start,
        final_states=[c.export_state() for c in chains],
        df=stack("df") if heavy else None,
        lam=stack("lam") if heavy else None,
        beta=stack("beta") if problem.data.X.shape[1] else None,
    )


# ---------------------------------------------------------------------------------------------
# run-length control


def checked(raw: RawDraws) -> dict[str, np.ndarray]:
    """What run-length control checks: mu, tau, every theta_j and sigma_j, s and nu (separate), the
    tail index 1/df (heavy tails with df learned; 0 is the normal limit, so the draws stay finite) and every
    coefficient of the group-level predictors."""
    named = {"mu": raw.mu, "tau": raw.tau, "theta": raw.theta}
    if raw.sigma is not None:
        named["sigma"] = raw.sigma
    if raw.s is not None and raw.nu is not None:
        named["s"] = raw.s
        named["nu"] = raw.nu
    if raw.df is not None:
        named["1/df"] = 1.0 / raw.df
    if raw.beta is not None:
        named["beta"] = raw.beta
    return named


def diagnose_raw(raw: RawDraws, targets: Targets) -> tuple[list[dict], dict]:
    """Misses of the run-length targets on the checked quantities, and a record of this round.

    The record's `growth` is how many times longer the chains should be for the worst ESS to
    reach its target (ESS grows about linearly with the draws), used to size an extension.
    R-hat and ESS do not depend on the units, so the internal-unit draws serve.
    """
    misses, worst = [], {}
    for name, x in checked(raw).items():  # one ranking pass per variable serves both views
        rhat, bulk, tail = (np.atleast_1d(np.asarray(v, dtype=float)) for v in dg.rhat_ess(x))
        flat_x = x.reshape(x.shape[0] * x.shape[1], -1)
        # a quantity that never moved (nu pinned at one grid point) has nothing left to converge
        constant = (flat_x.max(axis=0) == flat_x.min(axis=0)).reshape(rhat.shape)
        # R-hat needs two chains; with one, only the ESS targets can be checked (the README says so)
        rhat_bad = ~(rhat < targets.rhat_max) if x.shape[0] >= 2 else np.zeros(rhat.shape, dtype=bool)
        bad = ~constant & (rhat_bad | ~(bulk >= targets.ess_min) | ~(tail >= targets.ess_min))
        misses += dg.miss_records(name, x.shape[2:], bad, rhat, bulk, tail)
        live = ~constant
        worst[name] = {
            "rhat_max": float(np.max(rhat[live])) if live.any() else float("nan"),
            "bulk_ess_min": float(np.min(bulk[live])) if live.any() else float("nan"),
            "tail_ess_min": float(np.min(tail[live])) if live.any() else float("nan"),
        }
    low = min(
        (
            min(w["bulk_ess_min"], w["tail_ess_min"])
            for w in worst.values()
            if np.isfinite(w["bulk_ess_min"]) and np.isfinite(w["tail_ess_min"])
        ),
        default=np.inf,
    )
    growth = float(np.clip(1.15 * targets.ess_min / low, 1.25, 4.0)) if low > 0 else 4.0
    record = {"worst": worst, "misses": len(misses), "growth": growth, "missed_list": misses}
    return misses, record
