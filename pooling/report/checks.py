"""Posterior predictive checks: do data replicated from the fitted model look like the data?

Two checks, both from the draws (thinned to at most MAX_DRAWS evenly spaced draws):

* spread of the group means: T = sd over groups of the raw means. Replicates use fresh group
  means, ybar_rep_j = theta_rep_j + sqrt(v_j) z_j with theta_rep_j ~ N(mu, tau^2), so the check
  asks whether the fitted tau and within-group variances reproduce the observed spread;
* within-group sd (raw data, groups with n_j >= 2): the replicated sample sd of n_j new values
  from N(theta_j, sigma_j^2) is sigma_j * sqrt(chi2(n_j - 1) / (n_j - 1)) exactly.

Each gives a posterior predictive p-value P(T_rep >= T_obs); values near 0 or 1 are the warning.
"""
from __future__ import annotations

import numpy as np

from .draws import View, interval
from .groups import PREDICTION_SEED

MAX_DRAWS = 1000


def _thin(S: int) -> np.ndarray:
    return np.unique(np.linspace(0, S - 1, min(S, MAX_DRAWS)).round().astype(np.int64))


def spread_check(v: View, seed: int = PREDICTION_SEED) -> dict | None:
    """T = sd_j(raw mean_j) against its replicates from new groups (see the module notes); None for one group."""
    if v.J < 2:
        return None
    rng = np.random.default_rng([seed, 1])
    idx = _thin(v.S)
    m = len(idx)
    mu, tau = v.mu[idx, None], v.tau[idx, None]
    if v.sigma is None:
        sd_mean = v.std_error[None, :]
    elif v.sigma.ndim == 1:
        sd_mean = v.sigma[idx, None] / np.sqrt(v.n)[None, :]
    else:
        sd_mean = v.sigma[idx] / np.sqrt(v.n)[None, :]
    rep = mu + tau * rng.standard_normal((m, v.J)) + sd_mean * rng.standard_normal((m, v.J))
    t_rep = rep.std(axis=1, ddof=1)
    t_obs = float(np.std(v.raw_mean, ddof=1))
    return {"observed": t_obs, "replicated": t_rep, "p_value": float(np.mean(t_rep >= t_obs)), "draws": m}


def sd_check(v: View, level: float = 0.9, seed: int = PREDICTION_SEED) -> dict | None:
    """Observed within-group sd against replicated sample sds, per group with n_j >= 2."""
    if v.sigma is None:
        return None
    keep = np.flatnonzero(v.n >= 2)
    if keep.size == 0:
        return None
    rng = np.random.default_rng([seed, 2])
    idx = _thin(v.S)
    sig = v.sigma[idx, None] if v.sigma.ndim == 1 else v.sigma[idx][:, keep]
    df = v.n[keep] - 1
    rep = sig * np.sqrt(rng.chisquare(np.broadcast_to(df, (len(idx), keep.size))) / df)
    obs = v.raw_sd[keep]
    p = np.mean(rep >= obs[None, :], axis=0)
    lo, hi = interval(rep, level)
    return {"groups": keep, "observed": obs, "low": lo, "high": hi, "median": np.median(rep, axis=0),
            "p_value": p, "level": level, "outside": int(np.sum((obs < lo) | (obs > hi))),
            "extreme": int(np.sum((p < 0.01) | (p > 0.99)))}
