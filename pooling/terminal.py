"""The short table printed after a run (plain text, no colours)."""
from __future__ import annotations

import sys

import numpy as np

from .posterior import Fit

MAX_ROWS = 12


def _fmt(x: float) -> str:
    if x is None or not np.isfinite(x):
        return "-"
    return f"{x:.4g}"


def _clip(label: str, width: int = 24) -> str:
    label = label.replace("\n", " ").replace("\r", " ").replace("\t", " ")
    return label if len(label) <= width else label[: width - 1] + "…"


# --- reporter columns: shrinkage weight and P(best), read from the run's summary.json ----------
def _report_columns(out, J: int):
    """(shrink_weight, p_best) arrays in group order from the reporter's summary keys, or (None, None)."""
    import json
    from pathlib import Path

    try:
        with open(Path(out) / "summary.json", encoding="utf-8") as fh:
            rows = json.load(fh).get("groups_table")
    except (OSError, ValueError, TypeError):
        return None, None
    if not rows or len(rows) != J:
        return None, None
    nan = float("nan")
    shrink = np.array([nan if r.get("shrink_weight") is None else r["shrink_weight"] for r in rows], dtype=float)
    p_best = np.array([nan if r.get("p_best") is None else r["p_best"] for r in rows], dtype=float)
    return shrink, p_best


def _fmt_p(x: float) -> str:
    if not np.isfinite(x):
        return "-"
    return "<0.001" if x < 0.0005 else ">0.999" if x > 0.9995 else f"{x:.3f}"
# --- end of reporter columns --------------------------------------------------------------------


def print_fit(fit: Fit, out, stream=None) -> None:
    stream = stream or sys.stdout
    p = fit.problem
    w = print
    w(f"model: {p.model.within} within-group variances; priors: "
      + "; ".join(f"{k} {v}" for k, v in p.model.priors().items()), file=stream)
    w(f"data: {p.stats.J} groups" + (f", {p.stats.N} measurements" if p.stats.kind == "raw" else "")
      + f"; {fit.raw.settings.chains} chains x {fit.raw.mu.shape[1]} draws, seed {fit.raw.seed}", file=stream)
    w("", file=stream)
    w(f"{'':8}{'mean':>11}{'sd':>11}{'2.5%':>11}{'97.5%':>11}{'R-hat':>8}{'bulk ESS':>10}{'tail ESS':>10}", file=stream)
    for name, s in fit.hyper_summary().items():
        w(f"{name:8}{_fmt(s['mean']):>11}{_fmt(s['sd']):>11}{_fmt(s['q025']):>11}{_fmt(s['q975']):>11}"
          f"{s['rhat']:>8.3f}{s['bulk_ess']:>10.0f}{s['tail_ess']:>10.0f}", file=stream)
    theta = fit.draws("theta")
    post_mean = theta.mean(axis=0)
    lo, hi = np.quantile(theta, [0.025, 0.975], axis=0)
    order = np.argsort(-post_mean)
    rows = order if len(order) <= MAX_ROWS else np.concatenate([order[: MAX_ROWS // 2], order[-MAX_ROWS // 2:]])
    w("", file=stream)
    st = p.stats
    shrink, p_best = _report_columns(out, st.J)
    more = f"{'shrink':>8}{'P(best)':>9}" if shrink is not None else ""
    w(f"{'group':24}{'n':>7}{'raw mean':>11}{'posterior':>11}{'2.5%':>11}{'97.5%':>11}{more}", file=stream)
    for k, j in enumerate(rows):
        if len(order) > MAX_ROWS and k == MAX_ROWS // 2:
            w(f"{'...':24}", file=stream)
        more = f"{shrink[j]:>8.2f}{_fmt_p(p_best[j]):>9}" if shrink is not None else ""
        w(f"{_clip(st.labels[j]):24}{st.n[j]:>7.6g}{_fmt(st.raw_mean[j]):>11}{_fmt(post_mean[j]):>11}"
          f"{_fmt(lo[j]):>11}{_fmt(hi[j]):>11}{more}", file=stream)
    status = "met" if fit.targets_met else f"MISSED for {len(fit.misses)} quantities"
    w("", file=stream)
    w(f"diagnostics targets (R-hat < {fit.raw.settings.targets.rhat_max}, ESS >= {fit.raw.settings.targets.ess_min:g}): "
      f"{status}", file=stream)
    w(f"run folder: {out}", file=stream)
