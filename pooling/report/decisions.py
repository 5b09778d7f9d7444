"""The decisions a run was asked for, as the page ('The answer', report/page.py) and the terminal (terminal.py)
both lead with them: for each decision its sides, how many groups stand on each and which, the strongest first;
and the likely best and top K. One place, so the two presenters name the same groups in the same order.

Nothing here is computed from draws: every probability and side is a column of the results table (pooling.results);
this module only selects and orders them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .numbers import given

SCREENING = (
    "statistical screening supports, and never replaces, the applicable standards, local codes and licensed "
    "professional judgment"
)


@dataclass(frozen=True, eq=False)
class Side:
    """One side of a decision: its name ('above', 'outside', 'over', 'action', ...), its tone on the page, what the
    figure beside each name is ('P(above)', '|z|'), the rows of the groups on it (largest `key` first, ties: the
    furthest from the line first), the figure per group, and whether standing on it flags a group."""

    name: str
    tone: str
    what: str
    rows: np.ndarray
    key: np.ndarray
    flags: bool

    @property
    def count(self) -> int:
        return len(self.rows)


@dataclass(frozen=True, eq=False)
class Decision:
    """A decision (`kind`: threshold, limits, z, bias, outlying) and its sides, in the order they are told."""

    kind: str
    sides: tuple[Side, ...]

    def named(self, most: int) -> list[Side]:
        """The sides whose groups are named: every side with a group, but the largest when it holds more than
        `most` (it is given as a count)."""
        counts = [s.count for s in self.sides]
        biggest = int(np.argmax(counts))
        return [s for i, s in enumerate(self.sides) if s.count and not (i == biggest and s.count > most)]

    @property
    def flagged(self) -> int:
        return sum(s.count for s in self.sides if s.flags)

    def side(self, name: str) -> Side:
        return next(s for s in self.sides if s.name == name)


def _side(values: np.ndarray, name: str, tone: str, key: np.ndarray, what: str, then, flags: bool) -> Side:
    idx = np.flatnonzero(values == name)
    if then is None:
        order = idx[np.argsort(-key[idx], kind="stable")]
    else:
        order = idx[np.lexsort((-then[idx], -key[idx]))]
    return Side(name, tone, what, order, key, flags)


def _col(t, name: str) -> np.ndarray:
    return t[name].to_numpy(dtype=float)


def threshold(res) -> Decision:
    t, o = res.table, res.options
    pa, pb = _col(t, "p_above"), _col(t, "p_below")
    far = np.abs(_col(t, "theta_mean") - o.threshold)
    v = t["threshold_side"].to_numpy()
    return Decision(
        "threshold",
        (
            _side(v, "above", "open", pa, "P(above)", far, True),
            _side(v, "below", "open", pb, "P(below)", far, True),
            _side(v, "undecided", "none", np.maximum(pa, pb), "P(above or below)", far, False),
        ),
    )


def _flag_or_keep(kind: str, v, p, far, flag: tuple[str, str], keep: tuple[str, str]) -> Decision:
    """A decision with a flagging side (P = p), a side that keeps (1 - p) and the undecided, each side a (name,
    what) pair; the sides as results.py's column `v` holds them."""
    return Decision(
        kind,
        (
            _side(v, flag[0], "bad", p, flag[1], far, True),
            _side(v, keep[0], "good", 1.0 - p, keep[1], far, False),
            _side(v, "undecided", "none", p, flag[1], far, False),
        ),
    )


def limits(res) -> Decision:
    t, o = res.table, res.options
    th = _col(t, "theta_mean")
    far = np.min(np.abs(np.stack([th - x for x in (o.lower, o.upper) if x is not None])), axis=0)
    return _flag_or_keep(
        "limits",
        t["limits_side"].to_numpy(),
        _col(t, "p_mean_outside"),
        far,
        ("outside", "P(mean outside)"),
        ("inside", "P(mean inside)"),
    )


def z_signals(res) -> Decision:
    t = res.table
    az = np.abs(np.nan_to_num(_col(t, "z_score")))
    v = t["z_signal"].to_numpy()
    return Decision(
        "z",
        (
            _side(v, "action", "bad", az, "|z|", None, True),
            _side(v, "warning", "open", az, "|z|", None, True),
            _side(v, "none", "good", az, "|z|", None, False),
        ),
    )


def bias(res) -> Decision:
    """Each lab's side of the allowed bias (needs ReportOptions.allowed_bias), the furthest from zero first among
    equal probabilities."""
    t = res.table
    return _flag_or_keep(
        "bias",
        t["bias_side"].to_numpy(),
        _col(t, "p_bias_over"),
        np.abs(_col(t, "bias_mean")),
        ("over", "P(|bias| > allowed)"),
        ("within", "P(|bias| ≤ allowed)"),
    )


def bias_excluding_zero(res) -> np.ndarray:
    """Labs whose bias interval excludes zero (without an allowed bias), the largest |bias| first."""
    ex = np.flatnonzero(np.asarray(res.lab["interval_excludes_0"], dtype=bool))
    b = np.abs(_col(res.table, "bias_mean"))
    return ex[np.argsort(-b[ex], kind="stable")]


def outlying(res) -> Decision:
    """Flagged (P(outlying) at least results.OUTLYING_AT) and ordinary groups, the largest P(outlying) first."""
    t = res.table
    po = _col(t, "p_outlying")
    v = np.where(t["outlying"].to_numpy(dtype=bool), "flagged", "ordinary")
    return Decision(
        "outlying",
        (
            _side(v, "flagged", "bad", po, "P(outlying)", None, True),
            _side(v, "ordinary", "none", po, "P(outlying)", None, False),
        ),
    )


def limits_text(o) -> str:
    """'lower 385 and upper 425': each specification limit as the user gave it."""
    return " and ".join(f"{w} {given(x)}" for w, x in (("lower", o.lower), ("upper", o.upper)) if x is not None)


def largest_outside(res) -> int | None:
    """The group with the largest predicted share of measurements outside the limits, or None."""
    t = res.table
    if "outside_mean" not in t:
        return None
    f = _col(t, "outside_mean")
    return int(np.nanargmax(f)) if np.isfinite(f).any() else None


def lab_figures(res) -> dict:
    """The interlaboratory figures the labs view shows: across all labs. With group-level predictors these come
    from the fit without them (results.interlab_view's "overall"), the rest of the view from the fit itself."""
    return dict(res.lab, **res.lab["overall"]) if res.lab.get("overall") else res.lab


def asked(res) -> list[Decision]:
    """Every decision the run's options ask for, in the order the answer tells them."""
    o = res.options
    out = []
    if o.threshold is not None:
        out.append(threshold(res))
    if o.limits:
        out.append(limits(res))
    if o.interlab:
        out.append(z_signals(res))
        if o.allowed_bias is not None:
            out.append(bias(res))
    if res.tail is not None:
        out.append(outlying(res))
    return out


@dataclass(frozen=True, eq=False)
class Ranking:
    """The likely best (the three largest P(best)) and top k (the k largest P(among the k best); empty when k
    is every group), and which groups the limits put outside (the order is no recommendation for those)."""

    k: int
    best: np.ndarray
    top: np.ndarray
    p_best: np.ndarray
    p_top: np.ndarray
    outside: np.ndarray


def ranking(res) -> Ranking:
    t, o = res.table, res.options
    J = res.J
    k = int(min(o.k, J))
    pb, pk = _col(t, "p_best"), _col(t, "p_top_k")
    best = np.argsort(-pb, kind="stable")[:3]
    top = np.argsort(-pk, kind="stable")[:k] if k < J else best[:0]
    out = t["limits_side"].to_numpy() == "outside" if "limits_side" in t else np.zeros(J, dtype=bool)
    return Ranking(k, best, top, pb, pk, out)
