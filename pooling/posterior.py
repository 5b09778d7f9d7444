"""Labelled draws in the user's units, their diagnostics, and summaries of the hyperparameters.

The posterior of a fit is laid out as an arviz InferenceData (`Fit.idata`, built on first use):

    posterior     mu, tau (chain, draw); theta (chain, draw, group);
                  sigma (chain, draw, group) for `separate`, (chain, draw) for `shared`;
                  s, nu (chain, draw) for `separate`
    sample_stats  tau_evaluations (chain, draw): density evaluations of the slice update of log tau
    constant_data n, raw_mean, raw_sd (or std_error for `known`), each (group)

Group labels are the `group` coordinate, kept exactly as they came in.

The same layout is kept as plain numpy arrays (`Fit.parts`, one `Part` per group of the file), which is
what the reporter and the writer of draws.nc read: building the InferenceData costs importing arviz,
xarray and scipy.stats (~1.2 s of a run), so the command line never does it.
"""
from __future__ import annotations

import functools
import json
from dataclasses import dataclass, field

import numpy as np

from . import diagnostics as dg
from .model import Problem
from .sampler import RawDraws, Targets

QUANTILES = (0.025, 0.25, 0.5, 0.75, 0.975)


def _checked(raw: RawDraws) -> dict[str, np.ndarray]:
    """What run-length control checks: mu, tau, every theta_j and sigma_j, and s and nu (separate)."""
    named = {"mu": raw.mu, "tau": raw.tau, "theta": raw.theta}
    if raw.sigma is not None:
        named["sigma"] = raw.sigma
    if raw.s is not None:
        named["s"] = raw.s
        named["nu"] = raw.nu
    return named


def diagnose_raw(raw: RawDraws, targets: Targets) -> tuple[list[dict], dict]:
    """Misses of the run-length targets on mu, tau, theta and sigma, and a record of this round.

    The record's `growth` is how many times longer the chains should be for the worst ESS to
    reach its target (ESS grows about linearly with the draws), used to size an extension.
    """
    misses, worst = [], {}
    for name, x in _checked(raw).items():  # one ranking pass per variable serves both views
        rhat, bulk, tail = (np.atleast_1d(np.asarray(v, dtype=float)) for v in dg.rhat_ess(x))
        flat_x = x.reshape(x.shape[0] * x.shape[1], -1)
        # a quantity that never moved (nu pinned at one grid point) has nothing left to converge
        constant = (flat_x.max(axis=0) == flat_x.min(axis=0)).reshape(rhat.shape)
        # R-hat needs two chains; with one, only the ESS targets can be checked (the README says so)
        rhat_bad = ~(rhat < targets.rhat_max) if x.shape[0] >= 2 else np.zeros(rhat.shape, dtype=bool)
        bad = ~constant & (rhat_bad | ~(bulk >= targets.ess_min) | ~(tail >= targets.ess_min))
        rest = x.shape[2:]
        for flat in np.flatnonzero(bad.ravel()):
            idx = tuple(int(i) for i in np.unravel_index(flat, rest)) if rest else ()
            misses.append({"name": name, "index": idx, "rhat": float(rhat.ravel()[flat]),
                           "bulk_ess": float(bulk.ravel()[flat]), "tail_ess": float(tail.ravel()[flat])})
        live = ~constant
        worst[name] = {"rhat_max": float(np.max(rhat[live])) if live.any() else float("nan"),
                       "bulk_ess_min": float(np.min(bulk[live])) if live.any() else float("nan"),
                       "tail_ess_min": float(np.min(tail[live])) if live.any() else float("nan")}
    low = min((min(w["bulk_ess_min"], w["tail_ess_min"]) for w in worst.values()
               if np.isfinite(w["bulk_ess_min"]) and np.isfinite(w["tail_ess_min"])), default=np.inf)
    growth = float(np.clip(1.15 * targets.ess_min / low, 1.25, 4.0)) if low > 0 else 4.0
    record = {"worst": worst, "misses": len(misses), "growth": growth, "missed_list": misses}
    return misses, record


@dataclass
class Part:
    """One group of the draws file (posterior, sample_stats, constant_data) as numpy arrays.

    variables: name -> (dims, values, attributes); coords: dimension name -> values (every dimension
    used has one); attrs: the group's attributes."""

    variables: dict[str, tuple[tuple[str, ...], np.ndarray, dict]]
    coords: dict[str, np.ndarray]
    attrs: dict[str, str] = field(default_factory=dict)

    def __contains__(self, name: str) -> bool:
        return name in self.variables

    def __getitem__(self, name: str) -> np.ndarray:
        return self.variables[name][1]

    def add(self, name: str, dims: tuple[str, ...], values, attrs: dict | None = None) -> None:
        values = np.asarray(values)
        for d, size in zip(dims, values.shape):
            if d not in self.coords or len(self.coords[d]) != size:
                raise ValueError(f"variable {name}: dimension {d} of size {size} has no matching coordinate")
        self.variables[name] = (tuple(dims), values, dict(attrs or {}))

    @property
    def nbytes(self) -> int:
        return sum(int(v.nbytes) for _, v, _ in self.variables.values()) + sum(int(c.nbytes) for c in self.coords.values())


@dataclass(eq=False)
class Fit:
    """A finished run: the labelled posterior, the problem it came from, and what the run did."""

    parts: dict[str, Part]
    problem: Problem
    raw: RawDraws
    misses: list[dict]

    @functools.cached_property
    def idata(self) -> "az.InferenceData":
        """The posterior as an arviz InferenceData (built on first use; imports arviz)."""
        return idata_from_parts(self.parts)

    @property
    def targets_met(self) -> bool:
        return not self.misses

    @property
    def labels(self) -> tuple[str, ...]:
        return self.problem.stats.labels

    def draws(self, name: str) -> np.ndarray:
        """Draws of a posterior variable in user units, chains stacked: shape (samples, ...)."""
        x = self.parts["posterior"][name]
        return x.reshape((-1,) + x.shape[2:])

    def hyper_summary(self) -> dict[str, dict]:
        """Posterior mean, sd, quantiles, MCSE, R-hat and ESS of mu, tau and the variance hyperparameters."""
        post = self.parts["posterior"]
        names = ["mu", "tau"]
        if self.problem.model.within == "separate":
            names += ["s", "nu"]
        elif self.problem.model.within == "shared":
            names += ["sigma"]
        out = {}
        for name in names:
            out[name] = summarize_draws(post[name])
        return out

    def diagnostics(self) -> dict:
        """Worst R-hat and ESS per checked variable, the targets, and what still misses."""
        last = self.raw.rounds[-1] if self.raw.rounds else {}
        return {
            "targets": {"rhat_below": self.raw.settings.targets.rhat_max, "ess_at_least": self.raw.settings.targets.ess_min},
            "met": self.targets_met,
            "worst": last.get("worst", {}),
            "missed": [_jsonable_miss(m, self.labels) for m in self.misses[:50]],
            "missed_count": len(self.misses),
            "rounds": [{"draws_per_chain": r["draws_per_chain"], "misses": r["misses"]} for r in self.raw.rounds],
        }


def _jsonable_miss(m: dict, labels) -> dict:
    out = dict(m)
    idx = out.get("index")
    if idx is not None and out.get("name") in ("theta", "sigma") and len(idx) == 1:
        out["group"] = labels[int(idx[0])]
    if idx is not None:
        out["index"] = [int(i) for i in idx]
    for k in ("rhat", "bulk_ess", "tail_ess"):
        if k in out:
            out[k] = float(out[k])
    return out


def summarize_draws(x: np.ndarray) -> dict:
    """Summary of one scalar quantity's draws shaped (chains, draws)."""
    flat = x.reshape(-1)
    q = np.quantile(flat, QUANTILES)
    return {
        "mean": float(flat.mean()), "sd": float(flat.std(ddof=1)),
        **{f"q{int(round(p * 1000)):03d}": float(v) for p, v in zip(QUANTILES, q)},
        "mean_mc_error": float(dg.mean_mc_error(x)), "rhat": float(dg.split_rhat(x)),
        "bulk_ess": float(dg.bulk_ess(x)), "tail_ess": float(dg.tail_ess(x)),
    }


def _affine(x: np.ndarray, k: float, c: float, in_place: bool = False) -> np.ndarray:
    """x * k + c (the same numbers as the expression), into a new array or into x itself."""
    out = np.multiply(x, k, out=x if in_place else None)
    if c != 0.0:
        out += c
    return out


def to_parts(raw: RawDraws, problem: Problem, consume: bool = False) -> dict[str, Part]:
    """Map internal-unit draws back to the user's units and label them: the layout of draws.nc.

    consume=True converts raw.theta and raw.sigma (the large arrays) in place and hands them over:
    they are set to None in `raw`, so nothing is copied (at 1,000 groups x 4 x 1,000 draws a copy
    is 64 MB of fresh memory and ~0.2 s)."""
    c, k = problem.center, problem.scale
    st = problem.stats
    labels = np.array(st.labels, dtype=object)
    C, D = raw.mu.shape
    chain, draw = np.arange(C), np.arange(D)
    attrs = {
        "created_by": "pooling",
        "model": json.dumps(problem.model.to_dict()),
        "seed": str(raw.seed),
        "data_fingerprint": st.fingerprint(),
    }
    post = Part({}, {"chain": chain, "draw": draw, "group": labels}, dict(attrs))
    post.add("mu", ("chain", "draw"), raw.mu * k + c)
    post.add("tau", ("chain", "draw"), raw.tau * k)
    post.add("theta", ("chain", "draw", "group"), _affine(raw.theta, k, c, consume))
    within = problem.model.within
    if within == "separate":
        post.add("sigma", ("chain", "draw", "group"), _affine(raw.sigma, k, 0.0, consume))
        post.add("s", ("chain", "draw"), raw.s * k)
        post.add("nu", ("chain", "draw"), raw.nu)
    elif within == "shared":
        post.add("sigma", ("chain", "draw"), raw.sigma * k)
    stats = Part({}, {"chain": chain, "draw": draw}, dict(attrs))
    stats.add("tau_evaluations", ("chain", "draw"), raw.evals)
    const = Part({}, {"group": labels}, dict(attrs))
    const.add("n", ("group",), st.n)
    const.add("raw_mean", ("group",), st.raw_mean)
    if st.kind == "known":
        const.add("std_error", ("group",), st.raw_se)
    else:
        const.add("raw_sd", ("group",), st.raw_sd)
    if consume:
        raw.theta = None
        if within == "separate":
            raw.sigma = None
    return {"posterior": post, "sample_stats": stats, "constant_data": const}


def idata_from_parts(parts: dict[str, Part]) -> "az.InferenceData":
    """An arviz InferenceData holding the same arrays (not copied)."""
    import xarray as xr

    from ._compat import az

    groups = {}
    for name, part in parts.items():
        data = {v: xr.Variable(dims, values, attrs) for v, (dims, values, attrs) in part.variables.items()}
        used = {d for dims, _, _ in part.variables.values() for d in dims}
        coords = {d: values for d, values in part.coords.items() if d in used}
        groups[name] = xr.Dataset(data, coords=coords, attrs=dict(part.attrs))
    return az.InferenceData(**groups)


def parts_from_idata(idata) -> dict[str, Part]:
    """The reverse of idata_from_parts, for an InferenceData laid out as pooling writes it."""
    out = {}
    for name in idata.groups():
        ds = idata[name]
        coords = {d: np.asarray(ds[d].values) for d in ds.dims}
        out[name] = Part({v: (tuple(ds[v].dims), ds[v].values, dict(ds[v].attrs)) for v in ds.data_vars},
                         coords, dict(ds.attrs))
    return out


def to_idata(raw: RawDraws, problem: Problem) -> "az.InferenceData":
    """The labelled draws as an arviz InferenceData (imports arviz)."""
    return idata_from_parts(to_parts(raw, problem))


def finish(raw: RawDraws, problem: Problem, consume: bool = False) -> Fit:
    """Label the draws; the misses are those of the sampler's last diagnostics round.

    consume=True (what pooling.fit does, as it owns `raw`) moves the per-group draws into the fit
    instead of copying them: raw.theta and raw.sigma (separate) become None; see to_parts."""
    misses = raw.rounds[-1]["missed_list"] if raw.rounds else []
    return Fit(to_parts(raw, problem, consume), problem, raw, misses)
