"""Driving the kernel through model.build, as a run does: data sets and helpers for the conditional tests.

The data here are published inputs (the references are in each test): the eight schools (Rubin 1981) and
an unbalanced cut of the dyestuff batches (Davies 1947, via Box and Tiao 1973). Priors are stated in the
user's units, as a user states them; `internal` converts them to the kernel's units independently of
model.build, so that a wrong conversion (or a wrong default) in model.build fails the tests that use it.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from pooling import kernel
from pooling.model import Flat, Gamma, HalfCauchy, HalfNormal, Model, Normal, NuFixed, NuGrid, Reciprocal, build
from pooling.stats import from_estimates, from_frame

# Source: Rubin (1981), Table 2 (eight schools; estimate and standard error), from memory.
SCHOOLS_Y = np.array([28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0])
SCHOOLS_SE = np.array([15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0])

# Source: Davies (1947) dyestuff yields, 6 batches of 5 (Box and Tiao 1973, Table 5.1.1), from
# memory. We keep the first n_j of each batch (n = 1..5, 5) so that the group sizes differ and a
# group with one observation (M2 = 0) is included.
DYESTUFF = [
    [1545, 1440, 1440, 1520, 1580],
    [1540, 1555, 1490, 1560, 1495],
    [1595, 1550, 1605, 1510, 1560],
    [1445, 1440, 1595, 1465, 1545],
    [1595, 1630, 1515, 1635, 1625],
    [1520, 1455, 1450, 1480, 1445],
]
CUT = [1, 2, 3, 4, 5, 5]

# The defaults as the README states them (a mismatch with Model() is what the default tests catch).
README_DEFAULT = {
    "mu": Flat(),
    "tau": Flat(),
    "s2": Reciprocal(),
    "nu_grid": (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0, 14.0, 20.0, 30.0, 50.0, 100.0),
}


def dyestuff_stats():
    rows = [(f"batch {chr(65 + i)}", float(v)) for i, (b, k) in enumerate(zip(DYESTUFF, CUT)) for v in b[:k]]
    return from_frame(pd.DataFrame(rows, columns=["batch", "yield"]), "batch", "yield")


def schools_stats():
    return from_estimates(
        pd.DataFrame({"school": list("ABCDEFGH"), "y": SCHOOLS_Y, "se": SCHOOLS_SE}), "school", "y", "se"
    )


def internal(problem, model: Model) -> dict:
    """The priors of `model` (user units) in the problem's internal units, converted here by hand:
    a location maps to (x - center) / scale, a scale to x / scale, a rate per squared unit to rate * scale^2."""
    c, k = problem.center, problem.scale
    mu = model.mu
    tau = model.tau
    out = {
        "mu": (0, 0.0, 1.0) if isinstance(mu, Flat) else (1, (mu.loc - c) / k, mu.scale / k),
        "tau": (0, 1.0) if isinstance(tau, Flat) else (1 if isinstance(tau, HalfNormal) else 2, tau.scale / k),
        "s2": (0.0, 0.0) if isinstance(model.s2, Reciprocal) else (model.s2.shape, model.s2.rate * k * k),
    }
    if isinstance(model.nu, NuFixed):
        out["nu_grid"], out["nu_weights"] = np.array([model.nu.value]), np.ones(1)
    else:
        out["nu_grid"] = np.asarray(model.nu.values, dtype=float)
        w = np.ones(len(out["nu_grid"])) if model.nu.weights is None else np.asarray(model.nu.weights, dtype=float)
        out["nu_weights"] = w / w.sum()
    return out


def start_state(problem, *, eta=0.0, s2=1.0, nu_idx=None, sigma2=None, df_idx=None) -> kernel.State:
    J = problem.J
    sc = np.zeros(kernel.N_SCALARS)
    sc[kernel.ETA] = eta
    sc[kernel.MU] = float(np.mean(problem.ybar))
    sc[kernel.S2] = s2
    sc[kernel.NU_IDX] = len(problem.nu_grid) // 2 if nu_idx is None else nu_idx
    sc[kernel.WIDTH] = 1.0
    sc[kernel.SIGMA2] = 1.0
    sc[kernel.DF_IDX] = len(problem.df_grid) // 2 if df_idx is None else df_idx
    return kernel.State(
        sc, problem.ybar.copy(), np.ones(J) if sigma2 is None else sigma2.copy(), np.ones(J if problem.heavy else 0)
    )


def run(problem, *, n_sweeps, seed, state=None, adapt=False) -> dict:
    """kernel.sweeps from a fixed start; returns the stored arrays (internal units) and the final state."""
    d = problem.data
    st = state or start_state(problem)
    wk = kernel.make_work(d)
    if problem.heavy:
        wk.inv_lam[:] = 1.0 / st.lam
    out = kernel.empty_draws(d, n_sweeps)
    kernel.sweeps(np.random.default_rng(seed), n_sweeps, adapt, d, st, wk, out, 0)
    res = {k: np.asarray(v, dtype=np.float64) for k, v in out._asdict().items()}
    res["state"] = st
    return res


def dyestuff_problem(model: Model):
    return build(dyestuff_stats(), model)


def schools_problem(model: Model):
    return build(schools_stats(), model)


__all__ = [
    "SCHOOLS_Y",
    "SCHOOLS_SE",
    "DYESTUFF",
    "CUT",
    "README_DEFAULT",
    "dyestuff_stats",
    "schools_stats",
    "internal",
    "start_state",
    "run",
    "dyestuff_problem",
    "schools_problem",
    "Model",
    "Normal",
    "HalfCauchy",
    "HalfNormal",
    "Gamma",
    "NuGrid",
    "NuFixed",
    "Flat",
    "Reciprocal",
    "math",
]
