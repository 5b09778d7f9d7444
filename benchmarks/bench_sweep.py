"""One sweep of the kernel against the random-number floor, per group, at J = 10 .. 1e6.

The floor is what a sweep must draw, drawn alone with the same Generator inside numba. For the
`separate` structure: one standard normal (theta_j) and one standard gamma (sigma_j^2, shape
(nu + n_j) / 2) per group, and for each group of at most kernel.PAIR_MAX_N measurements the joint move's
proposal (one standard gamma, shape (nu + n_j - 1) / 2) and its acceptance (an exponential; since 2026-12-03, kernel.pair_step);
with the heavy-tailed between-group distribution (the default) one more standard gamma per group (lambda_j,
shape (df + 1) / 2). Everything else in a sweep (the slice update
of log tau with its O(J) density evaluations, the conditional means, the nu and df grids) is overhead
against that floor.

Target: a sweep within 2x its floor for J >= 1e3, for the default (separate, heavy tails) and for the
normal between-group distribution. The `shared` and `known` structures draw only one normal per group
(and one gamma with heavy tails); their rows are reported for information.

Group-level predictors: the `separate` sweep at J = 1e3 .. 1e5 with 0, 1 (a numeric column) and 3 (a
categorical column of 3 levels and a numeric one: 3 coefficients) predictor columns, against the same floor
(a predictor draws only p + 1 more normals per sweep, not per group). The collapsed (mu, beta) block costs
O(J p^2) per density evaluation; the ratio to the sweep without predictors is reported beside the floor's.

The sweeps run exactly as in the sampler's warm-up: kernel.sweeps with zero-row out arrays (no
draws stored, so J = 1e6 needs no memory for draws) in the sampler's chunks of sweeps per call.
Times are thread CPU time, best of interleaved repeats (see common.py).
"""

from __future__ import annotations

import numpy as np
from common import KernelChain, best, invented_estimates, invented_groups, load, problem_of
from numba import njit

from pooling import kernel
from pooling.model import Category, Model, Numeric

J_ALL = (10, 100, 1_000, 10_000, 100_000, 1_000_000)
J_QUICK = (10, 1_000, 100_000)


@njit(nogil=True, cache=True)
def floor_separate(rng, n_sweeps, shape, pair):
    """What a `separate` sweep must draw: z ~ N(0, 1) and g ~ Gamma(shape_j, 1) for every group, and for the groups
    of the joint move (pair_j > 0) q ~ Gamma(pair_j, 1) and e ~ Exp(1) (its acceptance)."""
    acc = 0.0
    for _ in range(n_sweeps):
        for j in range(shape.shape[0]):
            acc += rng.standard_normal() + rng.standard_gamma(shape[j])
            if pair[j] > 0.0:
                acc += rng.standard_gamma(pair[j]) + rng.standard_exponential()
    return acc


@njit(nogil=True, cache=True)
def floor_separate_heavy(rng, n_sweeps, shape, pair, shape_lam):
    """What a heavy-tailed `separate` sweep must draw: those of floor_separate and l ~ Gamma(shape_lam, 1)."""
    acc = 0.0
    for _ in range(n_sweeps):
        for j in range(shape.shape[0]):
            acc += rng.standard_normal() + rng.standard_gamma(shape[j]) + rng.standard_gamma(shape_lam)
            if pair[j] > 0.0:
                acc += rng.standard_gamma(pair[j]) + rng.standard_exponential()
    return acc


@njit(nogil=True, cache=True)
def floor_normal_heavy(rng, n_sweeps, J, shape_lam):
    """What a heavy-tailed `shared` or `known` sweep must draw per group: z and l ~ Gamma(shape_lam, 1)."""
    acc = 0.0
    for _ in range(n_sweeps):
        for _j in range(J):
            acc += rng.standard_normal() + rng.standard_gamma(shape_lam)
    return acc


@njit(nogil=True, cache=True)
def floor_normal(rng, n_sweeps, J):
    """What a `shared` or `known` sweep must draw per group: z ~ N(0, 1)."""
    acc = 0.0
    for _ in range(n_sweeps):
        for _j in range(J):
            acc += rng.standard_normal()
    return acc


def with_predictors(stats, p: int, seed: int):
    """The invented statistics with p predictor columns (1: a numeric column; 3: a categorical column of 3 levels
    and a numeric one) and the separate model that uses them."""
    g = np.random.default_rng(seed)
    J = stats.J
    cols = {"age": [f"{x:.3f}" for x in g.uniform(0.0, 10.0, J)], "kit": list(g.choice(["k1", "k2", "k3"], J))}
    preds = {0: (), 1: (Numeric("age"),), 3: (Category("kit"), Numeric("age"))}[p]
    return stats.with_columns(cols), Model(predictors=preds)


def _measure(chain: KernelChain, structure: str, budget: float, repeats: int) -> dict:
    p = chain.problem
    J = p.J
    # two warm-up windows: the slice width follows the mean jump of log tau, and the first window's
    # jumps include the walk from the starting point, which would leave the width too wide
    warm = int(np.clip(2_000_000 // J, 40, 500))
    chain.run(warm // 2, adapt=True)
    chain.state[kernel.JUMP_SUM] = chain.state[kernel.JUMP_COUNT] = 0.0
    chain.run(warm // 2, adapt=True)
    per_group = 50e-9  # rough cost of a sweep per group, only to size the runs
    k = max(2, int(budget / (per_group * J)))
    heavy = p.heavy
    df = p.df_grid[int(chain.state[kernel.DF_IDX])] if heavy else np.inf
    shape_lam = 0.5 * (df + 1.0) if np.isfinite(df) else 2.0  # at df = inf no lambda is drawn; time one anyway
    if structure == "separate":
        nu = p.nu_grid[int(chain.state[kernel.NU_IDX])]
        shape = 0.5 * (nu + p.n)
        pair = np.where((p.n <= kernel.PAIR_MAX_N) & (nu + p.n - 1.0 > 0.0), 0.5 * (nu + p.n - 1.0), 0.0)
        floor = (
            (lambda: floor_separate_heavy(chain.rng, k, shape, pair, shape_lam))
            if heavy
            # noqa: E731
            else (lambda: floor_separate(chain.rng, k, shape, pair))
        )
    else:
        floor = (
            (lambda: floor_normal_heavy(chain.rng, k, J, shape_lam))
            if heavy
            # noqa: E731
            else (lambda: floor_normal(chain.rng, k, J))
        )
    floor_separate(chain.rng, 1, np.ones(1), np.ones(1))  # compile (or load from the cache) before timing
    floor_normal(chain.rng, 1, 1)
    floor_separate_heavy(chain.rng, 1, np.ones(1), np.ones(1), 2.0)
    floor_normal_heavy(chain.rng, 1, 1, 2.0)
    t_sweep = t_floor = np.inf
    for _ in range(repeats):  # interleaved, so a busy spell of the machine hits both alike
        t_sweep = min(t_sweep, best(lambda: chain.run(k), 1))
        t_floor = min(t_floor, best(floor, 1))
    evals = chain.run(max(3, min(200, 20_000 // J)), store=True)["evals"]
    return {
        "J": J,
        "structure": structure,
        "between": p.model.between.name,
        "df_at_end": float(df),
        "sweeps_timed": k,
        "sweep_ns_per_group": t_sweep / k / J * 1e9,
        "floor_ns_per_group": t_floor / k / J * 1e9,
        "ratio": t_sweep / t_floor,
        "density_evals_per_sweep": float(np.mean(evals)),
        "target": "<= 2" if structure == "separate" and J >= 1000 else None,
        "met": bool(t_sweep / t_floor <= 2.0) if structure == "separate" and J >= 1000 else None,
    }


def run(quick: bool = False) -> dict:
    budget, repeats = (0.04, 3) if quick else (0.1, 9)
    rows = []
    for J in J_QUICK if quick else J_ALL:
        stats = invented_groups(J, tau=0.5, sigma=1.0, n_lo=2, n_hi=20, seed=J)
        rows.append(_measure(KernelChain.start(problem_of(stats), seed=1), "separate", budget, repeats))
        if J >= 1000:
            rows.append(
                _measure(
                    KernelChain.start(problem_of(stats, Model(between="normal")), seed=1), "separate", budget, repeats
                )
            )
        del stats
    J = 10_000
    shared = problem_of(invented_groups(J, 0.5, 1.0, 2, 20, seed=7), Model(within="shared"))
    rows.append(_measure(KernelChain.start(shared, seed=2), "shared", budget, repeats))
    known = problem_of(invented_estimates(J, 0.5, seed=8))
    rows.append(_measure(KernelChain.start(known, seed=3), "known", budget, repeats))
    for J in (1_000, 100_000) if quick else (1_000, 10_000, 100_000):
        base = invented_groups(J, tau=0.5, sigma=1.0, n_lo=2, n_hi=20, seed=J)
        per_p = {}
        for p in (0, 1, 3):
            stats, model = with_predictors(base, p, seed=J + p)
            r = _measure(KernelChain.start(problem_of(stats, model), seed=4), "separate", budget, repeats)
            r["predictors"] = p
            r["target"] = r["met"] = None  # reported, not a target
            per_p[p] = r
        for p in (1, 3):
            per_p[p]["vs_no_predictors"] = per_p[p]["sweep_ns_per_group"] / per_p[0]["sweep_ns_per_group"]
        rows += [per_p[p] for p in (0, 1, 3)]
    return {"name": "sweep", "rows": rows, "load_1min": load()}


def table(res: dict) -> list[str]:
    out = [
        "sweep vs random-number floor (ns per group and sweep; thread CPU time, best of repeats)",
        f"  {'J':>9} {'structure':>9} {'between':>8} {'sweep':>8} {'floor':>8} {'ratio':>6} {'evals':>6}  target",
    ]
    for r in res["rows"]:
        if "predictors" in r:
            continue
        tgt = "" if r["target"] is None else f"{r['target']}  {'met' if r['met'] else 'MISSED'}"
        out.append(
            f"  {r['J']:>9,} {r['structure']:>9} {r['between']:>8} {r['sweep_ns_per_group']:8.1f} "
            f"{r['floor_ns_per_group']:8.1f} {r['ratio']:6.2f} {r['density_evals_per_sweep']:6.2f}  {tgt}"
        )
    pred = [r for r in res["rows"] if "predictors" in r]
    if pred:
        out.append("group-level predictors, separate structure (ns per group and sweep; the same floor)")
        out.append(f"  {'J':>9} {'columns':>8} {'sweep':>8} {'floor':>8} {'ratio':>6} {'evals':>6} {'vs none':>8}")
        for r in pred:
            vs = f"{r['vs_no_predictors']:8.2f}" if "vs_no_predictors" in r else f"{'1':>8}"
            out.append(
                f"  {r['J']:>9,} {r['predictors']:>8} {r['sweep_ns_per_group']:8.1f} "
                f"{r['floor_ns_per_group']:8.1f} {r['ratio']:6.2f} {r['density_evals_per_sweep']:6.2f} {vs}"
            )
    return out


if __name__ == "__main__":
    import sys

    print("\n".join(table(run(quick="--quick" in sys.argv))))
