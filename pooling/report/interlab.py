"""The classical comparators of the interlaboratory view (pooling.results.interlab_view computes the view
itself from the draws): one-way ANOVA by the method of moments, the DerSimonian-Laird random-effects
estimate, ISO 13528 Algorithm A and z-scores with their signal limits.

ISO 5725 terms used here: repeatability sd s_r (within a lab), between-lab sd s_L, reproducibility
sd s_R = sqrt(s_L^2 + s_r^2); the repeatability and reproducibility limits are 2.8 s_r and 2.8 s_R
(ISO 5725-6; 2.8 ≈ 1.96 * sqrt(2), the 95 % limit for the difference of two results).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import chdtrc, fdtrc

from ..errors import InputError

LIMIT_FACTOR = 2.8  # ISO 5725-6: repeatability limit r = 2.8 s_r, reproducibility limit R = 2.8 s_R
Z_WARNING, Z_ACTION = 2.0, 3.0  # ISO 13528:2015, 9.4.1


# ---------------------------------------------------------------------------------------------
# classical comparators


def random_effects_dl(estimate, std_error) -> dict | None:
    """The classical random-effects comparator for estimates with standard errors (the known
    structure): DerSimonian and Laird (1986, Controlled Clinical Trials 7), by moments.

    w_j = 1/se_j^2, Q = sum_j w_j (x_j - x_w)^2 about the weighted mean x_w, on k - 1 df;
    tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w)); the consensus is the mean weighted by
    1/(se_j^2 + tau^2), with standard error (sum of those weights)^(-1/2); I^2 = max(0, (Q - df)/Q).
    Computed about the median and in units of the largest standard error, so that offsets of 1e9
    and magnitudes of 1e-300 keep their digits. None with fewer than two estimates, and None when the
    weights or Q overflow double precision (standard errors some 1e150 times smaller than the spread
    of the estimates, or than each other), where the moments cannot be formed.
    """
    x = np.asarray(estimate, dtype=np.float64)
    se = np.asarray(std_error, dtype=np.float64)
    k = len(x)
    if k < 2:
        return None
    c, u = float(np.median(x)), float(np.max(se))
    # overflow is a possible outcome here, tested for below, not a fault to warn about
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        y, e = (x - c) / u, se / u
        w = 1.0 / (e * e)
        sw = float(w.sum())
        mean_w = float((w * y).sum() / sw)
        q = float((w * (y - mean_w) ** 2).sum())
        df = k - 1
        raw_tau2 = (q - df) / (sw - float((w * w).sum()) / sw)
        tau2 = max(0.0, raw_tau2)
        ws = 1.0 / (e * e + tau2)
        sws = float(ws.sum())
    if not (math.isfinite(q) and math.isfinite(sw) and math.isfinite(raw_tau2) and 0.0 < sws < math.inf):
        return None
    mu = float((ws * y).sum() / sws)
    return {
        "consensus": c + u * mu,
        "consensus_se": u / math.sqrt(sws),
        "between_sd": u * math.sqrt(tau2),
        "truncated": bool(raw_tau2 < 0),
        "fixed_effect": c + u * mean_w,
        "fixed_effect_se": u / math.sqrt(sw),
        "q": q,
        "df": df,
        "p_value": float(chdtrc(df, q)),
        "i2": max(0.0, (q - df) / q) if q > 0 else 0.0,
        "k": k,
    }


def oneway_anova(n, mean, m2, mean_lo=None) -> dict | None:
    """One-way ANOVA from group sufficient statistics, with the method-of-moments variance components.

    SS_between = sum_j n_j (ybar_j - ybar)^2, SS_within = sum_j M2_j, MS = SS / df with df = J - 1 and
    N - J; n0 = (N - sum_j n_j^2 / N) / (J - 1); s_L^2 = max(0, (MS_between - MS_within) / n0),
    s_r^2 = MS_within, s_R^2 = s_L^2 + s_r^2 (ISO 5725-2 for unequal n, where n0 is its n-bar).
    Returns None without replication (N <= J) or with fewer than two groups.
    """
    n = np.asarray(n, dtype=np.float64)
    mean = np.asarray(mean, dtype=np.float64)
    m2 = np.asarray(m2, dtype=np.float64)
    J, N = len(n), float(n.sum())
    if J < 2 or N <= J:
        return None
    c = float(np.median(mean))  # deviations from a central value keep the digits of data near 1e9
    d = mean - c
    if mean_lo is not None:  # the low part of a double-double mean (pooling.stats)
        d = d + np.asarray(mean_lo, dtype=np.float64)
    grand = float(np.sum(n * d) / N)
    ssb = float(np.sum(n * (d - grand) ** 2))
    ssw = float(np.sum(m2))
    dfb, dfw = J - 1, N - J
    msb, msw = ssb / dfb, ssw / dfw
    n0 = float(np.sum(n * ((N - n) / N))) / dfb  # = (N - sum n^2 / N) / (J - 1), without the cancellation
    f = msb / msw if msw > 0 else math.inf
    p = float(fdtrc(dfb, dfw, f)) if math.isfinite(f) else 0.0  # P(F > f), F(dfb, dfw) tail
    s_l2 = max(0.0, (msb - msw) / n0)
    return {
        "df_between": dfb,
        "df_within": dfw,
        "ss_between": ssb,
        "ss_within": ssw,
        "ms_between": msb,
        "ms_within": msw,
        "f": f,
        "p_value": p,
        "n0": n0,
        "grand_mean": grand + c,
        "between_var": s_l2,
        "within_var": msw,
        "between_sd": math.sqrt(s_l2),
        "repeatability_sd": math.sqrt(msw),
        "reproducibility_sd": math.sqrt(s_l2 + msw),
        "icc": s_l2 / (s_l2 + msw) if s_l2 + msw > 0 else math.nan,
        "truncated": (msb - msw) < 0,
    }


def algorithm_a(x, tol: float = 1e-12, max_iter: int = 1000) -> tuple[float, float]:
    """Robust mean x* and sd s* of ISO 13528:2015 Annex C.3 (Algorithm A), stated from memory:
    start x* = median, s* = 1.483 * median|x - x*|; repeat delta = 1.5 s*, x_i* = clip(x_i, x* - delta,
    x* + delta), x* = mean(x_i*), s* = 1.134 * sd(x_i*) (n - 1 divisor), until both settle."""
    x = np.asarray(x, dtype=np.float64)
    xs = float(np.median(x))
    ss = 1.483 * float(np.median(np.abs(x - xs)))
    if ss == 0.0:  # more than half the values equal: start from the plain sd instead (common practice)
        ss = float(x.std(ddof=1)) if len(x) > 1 else 0.0
    if ss == 0.0:
        return xs, 0.0
    for _ in range(max_iter):
        delta = 1.5 * ss
        c = np.clip(x, xs - delta, xs + delta)
        new_x, new_s = float(c.mean()), 1.134 * float(c.std(ddof=1))
        done = abs(new_x - xs) <= tol * max(abs(xs), ss) and abs(new_s - ss) <= tol * ss
        xs, ss = new_x, new_s
        if done:
            break
    return xs, ss


def z_signal(z) -> np.ndarray:
    """ISO 13528:2015, 9.4.1: |z| <= 2.0 no signal ('none'); 2.0 < |z| < 3.0 'warning'; |z| >= 3.0 'action'."""
    a = np.abs(np.asarray(z, dtype=np.float64))
    out = np.where(a >= Z_ACTION, "action", np.where(a > Z_WARNING, "warning", "none")).astype(object)
    out[np.isnan(a)] = ""
    return out


def z_scores(x, assigned: float | None = None, sigma_pt: float | None = None):
    """z_j = (x_j - x_pt) / sigma_pt with their ISO 13528 signals. x_pt and sigma_pt default to the
    Algorithm A robust mean and sd of the x_j; returns (z, signal, {'assigned', 'sigma_pt', 'basis'})."""
    x = np.asarray(x, dtype=np.float64)
    if sigma_pt is not None and not sigma_pt > 0:
        raise InputError(f"bad option: the proficiency sd sigma_pt must be a positive number; found {sigma_pt:g}")
    rx, rs = algorithm_a(x) if (assigned is None or sigma_pt is None) else (math.nan, math.nan)
    x_pt = rx if assigned is None else float(assigned)
    s_pt = rs if sigma_pt is None else float(sigma_pt)
    basis = {
        "assigned": x_pt,
        "sigma_pt": s_pt,
        "assigned_from": "given" if assigned is not None else "robust mean of the group means (ISO 13528 Algorithm A)",
        "sigma_pt_from": "given" if sigma_pt is not None else "robust sd of the group means (ISO 13528 Algorithm A)",
    }
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (x - x_pt) / s_pt if s_pt > 0 else np.full(len(x), np.nan)
    return z, z_signal(z), basis
