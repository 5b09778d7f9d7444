"""Labelled draws in the user's units, their diagnostics, and summaries of the hyperparameters.

The posterior of a fit is an arviz InferenceData:

    posterior     mu, tau (chain, draw); theta (chain, draw, group);
                  sigma (chain, draw, group) for `separate`, (chain, draw) for `shared`;
                  s, nu (chain, draw) for `separate`
    sample_stats  tau_evaluations (chain, draw): density evaluations of the slice update of log tau
    constant_data n, raw_mean, raw_sd (or std_error for `known`), each (group)

Group labels are the `group` coordinate, kept exactly as they came in.
"""
from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import xarray as xr

from . import diagnostics as dg
from ._compat import az
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
                           "ess_bulk": float(bulk.ravel()[flat]), "ess_tail": float(tail.ravel()[flat])})
        live = ~constant
        worst[name] = {"rhat_max": float(np.max(rhat[live])) if live.any() else float("nan"),
                       "ess_bulk_min": float(np.min(bulk[live])) if live.any() else float("nan"),
                       "ess_tail_min": float(np.min(tail[live])) if live.any() else float("nan")}
    low = min((min(w["ess_bulk_min"], w["ess_tail_min"]) for w in worst.values()
               if np.isfinite(w["ess_bulk_min"]) and np.isfinite(w["ess_tail_min"])), default=np.inf)
    growth = float(np.clip(1.15 * targets.ess_min / low, 1.25, 4.0)) if low > 0 else 4.0
    record = {"worst": worst, "misses": len(misses), "growth": growth, "missed_list": misses}
    return misses, record


@dataclass
class Fit:
    """A finished run: the labelled posterior, the problem it came from, and what the run did."""

    idata: "az.InferenceData"
    problem: Problem
    raw: RawDraws
    misses: list[dict]

    @property
    def targets_met(self) -> bool:
        return not self.misses

    @property
    def labels(self) -> tuple[str, ...]:
        return self.problem.stats.labels

    def draws(self, name: str) -> np.ndarray:
        """Draws of a posterior variable in user units, chains stacked: shape (samples, ...)."""
        x = self.idata.posterior[name].values
        return x.reshape((-1,) + x.shape[2:])

    def hyper_summary(self) -> dict[str, dict]:
        """Posterior mean, sd, quantiles, MCSE, R-hat and ESS of mu, tau and the variance hyperparameters."""
        post = self.idata.posterior
        names = ["mu", "tau"]
        if self.problem.model.within == "separate":
            names += ["s", "nu"]
        elif self.problem.model.within == "shared":
            names += ["sigma"]
        out = {}
        for name in names:
            x = post[name].values
            out[name] = summarize_draws(x)
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
    for k in ("rhat", "ess_bulk", "ess_tail"):
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
        "mcse_mean": float(dg.mcse_mean(x)), "rhat": float(dg.split_rhat(x)),
        "ess_bulk": float(dg.ess_bulk(x)), "ess_tail": float(dg.ess_tail(x)),
    }


def to_idata(raw: RawDraws, problem: Problem) -> "az.InferenceData":
    """Map internal-unit draws back to the user's units and label them."""
    c, k = problem.center, problem.scale
    st = problem.stats
    labels = np.array(st.labels, dtype=object)
    C, D = raw.mu.shape
    coords = {"chain": np.arange(C), "draw": np.arange(D), "group": labels}
    post = {
        "mu": (("chain", "draw"), raw.mu * k + c),
        "tau": (("chain", "draw"), raw.tau * k),
        "theta": (("chain", "draw", "group"), raw.theta * k + c),
    }
    within = problem.model.within
    if within == "separate":
        post["sigma"] = (("chain", "draw", "group"), raw.sigma * k)
        post["s"] = (("chain", "draw"), raw.s * k)
        post["nu"] = (("chain", "draw"), raw.nu)
    elif within == "shared":
        post["sigma"] = (("chain", "draw"), raw.sigma * k)
    posterior = xr.Dataset(post, coords=coords)
    sample_stats = xr.Dataset({"tau_evaluations": (("chain", "draw"), raw.evals)},
                              coords={"chain": coords["chain"], "draw": coords["draw"]})
    const = {"n": (("group",), st.n), "raw_mean": (("group",), st.raw_mean)}
    if st.kind == "known":
        const["std_error"] = (("group",), st.raw_se)
    else:
        const["raw_sd"] = (("group",), st.raw_sd)
    constant = xr.Dataset(const, coords={"group": labels})
    attrs = {
        "created_by": "pooling",
        "model": json.dumps(problem.model.to_dict()),
        "seed": str(raw.seed),
        "data_fingerprint": st.fingerprint(),
    }
    for ds in (posterior, sample_stats, constant):
        ds.attrs.update(attrs)
    return az.InferenceData(posterior=posterior, sample_stats=sample_stats, constant_data=constant)


def finish(raw: RawDraws, problem: Problem) -> Fit:
    """Label the draws; the misses are those of the sampler's last diagnostics round."""
    misses = raw.rounds[-1]["missed_list"] if raw.rounds else []
    return Fit(to_idata(raw, problem), problem, raw, misses)
