"""A finished run: its draws in the engine's internal units, labelled, and their layout in the user's units.

A full run (`Fit`) keeps every draw in internal units (y' = (y - center) / scale, model.build): that is
what every answer is computed from (pooling.results) and what draws.nc stores, with the CF attributes
`scale_factor` and `add_offset` so that netCDF readers (xarray, arviz) decode the user's units. At an
offset of 1e12 a float64 in user units keeps only about four digits of a spread of 1e-2; the internal
draws keep all of them.

The user's layout (an arviz InferenceData, `Fit.idata`, or plain numpy parts, `Fit.parts`) is built on
first use:

    posterior     mu, tau (chain, draw); theta (chain, draw, group);
                  sigma (chain, draw, group) for `separate`, (chain, draw) for `shared`;
                  s, nu (chain, draw) for `separate`; df (chain, draw) and lambda (chain, draw, group)
                  for the heavy-tailed between-group distribution; beta (chain, draw, coefficient) for
                  group-level predictors, in the user's units (per unit of a numeric column)
    sample_stats  tau_evaluations (chain, draw): density evaluations of the slice update of log tau
    constant_data n, raw_mean, raw_sd (or std_error for `known`), each (group)

Group labels are the `group` coordinate, kept exactly as they came in. A summary-mode run (pooling.summary)
is a different object that holds a `Fit` of its kept groups.
"""

from __future__ import annotations

import functools
import json
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from . import diagnostics as dg
from .model import Problem
from .sampler import RawDraws

if TYPE_CHECKING:
    from ._compat import az

# how each posterior variable maps to the user's units: x_user = x * scale (+ center)
SCALED = {"mu": True, "theta": True, "tau": False, "sigma": False, "s": False}


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
        return sum(int(v.nbytes) for _, v, _ in self.variables.values()) + sum(
            int(c.nbytes) for c in self.coords.values()
        )


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


@dataclass(eq=False)
class Fit:
    """A finished full run: the problem, every draw in internal units (`raw`), and what missed the targets."""

    problem: Problem
    raw: RawDraws
    misses: list[dict]
    without: object = None  # with group-level predictors: the same data fitted without them (pooling.fit)

    summary_mode = False

    @property
    def targets_met(self) -> bool:
        return not self.misses

    @property
    def labels(self) -> tuple[str, ...]:
        return self.problem.stats.labels

    @property
    def J(self) -> int:
        return self.problem.J

    @functools.cached_property
    def parts(self) -> dict[str, Part]:
        """The draws in the user's units, labelled (copies of the internal draws, made on first use)."""
        return user_parts(self.raw, self.problem)

    @functools.cached_property
    def idata(self) -> az.InferenceData:
        """The posterior as an arviz InferenceData in the user's units (built on first use; imports arviz)."""
        return idata_from_parts(self.parts)

    def draws(self, name: str) -> np.ndarray:
        """Draws of a posterior variable in the user's units, chains stacked: shape (samples, ...)."""
        x = internal_draws(self.raw, name)
        p = self.problem
        if name in SCALED:
            x = x * p.scale + (p.center if SCALED[name] else 0.0)
        elif name == "beta":
            x = x * _design(p).to_user
        elif name == "lambda":
            x = x.astype(np.float64)
        return x.reshape((-1,) + x.shape[2:])

    def diagnostics(self) -> dict:
        """Worst R-hat and ESS per checked variable, the targets, and what still misses."""
        last = self.raw.rounds[-1] if self.raw.rounds else {}
        return {
            "targets": {
                "rhat_below": self.raw.settings.targets.rhat_max,
                "ess_at_least": self.raw.settings.targets.ess_min,
            },
            "met": self.targets_met,
            "worst": last.get("worst", {}),
            "missed": [_jsonable_miss(m, self.labels) for m in self.misses[:50]],
            "missed_count": len(self.misses),
            "rounds": [{"draws_per_chain": r["draws_per_chain"], "misses": r["misses"]} for r in self.raw.rounds],
        }


def internal_draws(raw: RawDraws, name: str) -> np.ndarray:
    """A posterior variable's draws as the sampler left them, (chains, draws, ...), internal units."""
    key = "lam" if name == "lambda" else name
    x = getattr(raw, key, None)
    if x is None:
        raise KeyError(f"this fit has no draws of '{name}'")
    return x


def hyper_names(problem: Problem) -> list[str]:
    """The hyperparameters of a fit, in the order a report shows them."""
    names = ["mu", "tau"]
    if problem.model.within == "separate":
        names += ["s", "nu"]
    elif problem.model.within == "shared":
        names += ["sigma"]
    return names


def _base_attrs(raw: RawDraws, problem: Problem) -> dict:
    return {
        "created_by": "pooling",
        "model": json.dumps(problem.model.to_dict()),
        "seed": str(raw.seed),
        "data_fingerprint": problem.stats.fingerprint(),
        "internal_center": repr(problem.center),
        "internal_scale": repr(problem.scale),
    }


def parts(raw: RawDraws, problem: Problem, packed: bool) -> dict[str, Part]:
    """The layout of draws.nc. packed=True: the internal draws themselves, each scaled variable carrying the
    CF attributes scale_factor (and add_offset), which netCDF readers apply to give the user's units;
    packed=False: the user's units (new arrays)."""
    c, k = problem.center, problem.scale
    st = problem.stats
    labels = np.array(st.labels, dtype=object)
    C, D = raw.mu.shape
    chain, draw = np.arange(C), np.arange(D)
    attrs = _base_attrs(raw, problem)
    post = Part({}, {"chain": chain, "draw": draw, "group": labels}, dict(attrs))

    def add(name, dims, x):
        if name not in SCALED:
            post.add(name, dims, x)
            return
        offset = c if SCALED[name] else 0.0
        if packed:
            cf = {"scale_factor": float(k)}
            if SCALED[name]:
                cf["add_offset"] = float(offset)
            post.add(name, dims, x, cf)
        else:
            out = np.multiply(x, k)
            if offset != 0.0:
                out += offset
            post.add(name, dims, out)

    add("mu", ("chain", "draw"), raw.mu)
    add("tau", ("chain", "draw"), raw.tau)
    add("theta", ("chain", "draw", "group"), raw.theta)
    within = problem.model.within
    if within == "separate":
        add("sigma", ("chain", "draw", "group"), raw.sigma)
        add("s", ("chain", "draw"), raw.s)
        add("nu", ("chain", "draw"), raw.nu)
    elif within == "shared":
        add("sigma", ("chain", "draw"), raw.sigma)
    if raw.df is not None:
        post.add(
            "df",
            ("chain", "draw"),
            raw.df,
            {"meaning": "degrees of freedom of the between-group Student-t; inf is the normal limit"},
        )
        post.add(
            "lambda",
            ("chain", "draw", "group"),
            raw.lam,
            {
                "meaning": "latent precision of each group in the between-group distribution: "
                "theta_j ~ N(mu, tau^2 / lambda_j)"
            },
        )
    if raw.beta is not None:
        # each coefficient has its own unit (the data's, or the data's per unit of a numeric column), and CF allows
        # one scale_factor per variable, so beta is written in the user's units (differences: no offset to lose)
        post.coords["coefficient"] = np.array(_design(problem).names, dtype=object)
        post.add(
            "beta",
            ("chain", "draw", "coefficient"),
            raw.beta * _design(problem).to_user,
            {
                "meaning": "effects of the group-level predictors: each group's centre is mu + x_j' beta (contrasts "
                "against the reference level; numeric predictors centred at their mean over the groups)"
            },
        )
    sstats = Part({}, {"chain": chain, "draw": draw}, dict(attrs))
    sstats.add("tau_evaluations", ("chain", "draw"), raw.evals)
    const = Part({}, {"group": labels}, dict(attrs))
    const.add("n", ("group",), st.n)
    const.add("raw_mean", ("group",), st.raw_mean)
    if st.kind == "known":
        const.add("std_error", ("group",), st.raw_se)
    else:
        const.add("raw_sd", ("group",), st.raw_sd)
    return {"posterior": post, "sample_stats": sstats, "constant_data": const}


def user_parts(raw: RawDraws, problem: Problem) -> dict[str, Part]:
    """The draws in the user's units, labelled (new arrays)."""
    return parts(raw, problem, packed=False)


def idata_from_parts(parts_: dict[str, Part]) -> az.InferenceData:
    """An arviz InferenceData holding the same arrays (not copied)."""
    import xarray as xr

    from ._compat import az

    groups = {}
    for name, part in parts_.items():
        data = {v: xr.Variable(dims, values, attrs) for v, (dims, values, attrs) in part.variables.items()}
        used = {d for dims, _, _ in part.variables.values() for d in dims}
        coords = {d: values for d, values in part.coords.items() if d in used}
        groups[name] = xr.Dataset(data, coords=coords, attrs=dict(part.attrs))
    return az.InferenceData(**groups)  # type: ignore[arg-type]  # arviz's stub types the groups' keywords as bool


def summarize_draws(x: np.ndarray, level: float = 0.95, scale: float = 1.0, center: float = 0.0) -> dict:
    """Summary of one scalar quantity's draws shaped (chains, draws), computed on x (internal units) and
    mapped to x * scale + center at the end: mean, sd, median, the central interval at `level` (keys
    low and high), the Monte Carlo error of the mean, R-hat, bulk and tail ESS."""
    flat = x.reshape(-1)
    lo, med, hi = np.quantile(flat, [(1 - level) / 2, 0.5, (1 + level) / 2])
    return {
        "mean": float(flat.mean()) * scale + center,
        "sd": float(flat.std(ddof=1)) * scale,
        "median": float(med) * scale + center,
        "low": float(lo) * scale + center,
        "high": float(hi) * scale + center,
        "mean_mc_error": float(dg.mean_mc_error(x)) * scale,
        "rhat": float(dg.split_rhat(x)),
        "bulk_ess": float(dg.bulk_ess(x)),
        "tail_ess": float(dg.tail_ess(x)),
    }


def hyper_summary(raw: RawDraws, problem: Problem, level: float = 0.95) -> dict[str, dict]:
    """Summaries of mu, tau and the variance hyperparameters, computed in internal units."""
    c, k = problem.center, problem.scale
    out = {}
    for name in hyper_names(problem):
        x = internal_draws(raw, name)
        if name == "nu":
            out[name] = summarize_draws(x, level)
        else:
            out[name] = summarize_draws(x, level, k, c if SCALED.get(name) else 0.0)
    return out


def finish(raw: RawDraws, problem: Problem) -> Fit:
    """A Fit of the sampler's draws; the misses are those of its last diagnostics round."""
    misses = raw.rounds[-1]["missed_list"] if raw.rounds else []
    return Fit(problem, raw, misses)


def _design(problem):
    """The predictors' design of a problem that has coefficients (their draws exist only then)."""
    if problem.design is None:
        raise ValueError("coefficient draws for a problem without group-level predictors")
    return problem.design
