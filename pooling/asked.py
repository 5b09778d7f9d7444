"""What the reader asks of a run: the interval level, the top-k size, which end is best, a threshold,
specification limits, an allowed bias, groups to compare head to head, the z-score basis and the
probability at which a statement counts as decided. One frozen value, checked once where it is made.

The same value serves both ways of running: a full run answers it from the stored draws after
sampling; summary mode (many groups) has to count some answers while the chains run, so it reads the
internal-unit vector `internal(center, scale)` (pooling.answers) while sampling.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import InputError

BEST = ("highest", "lowest")
TOP_DEFAULT = 3  # the size of the top group when none is asked for (every group, when there are fewer)


def check_level(level) -> None:
    if not (isinstance(level, (float, int, np.floating)) and not isinstance(level, bool) and 0 < level < 1):
        raise InputError(
            f"bad option: the interval level must be a number between 0 and 1 (for example 0.95); found {level}"
        )


def check_k(k, J: int, option: str = "k (the size of the top group)") -> int:
    """The size of the top group for J groups. None (not asked) is TOP_DEFAULT, or J when there are fewer groups; a
    k that was asked for must be a whole number from 1 to J: more than J would make P(top k) 1 for every group, so
    it is refused rather than quietly cut to J. `option` names it in the message (the command line: '--top')."""
    if k is None:
        return min(TOP_DEFAULT, J)
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise InputError(f"bad option {option}: expected a whole number of at least 1; found {k!r}")
    if k > J:
        raise InputError(
            f"bad option {option}: asked for the top {int(k)}, but the data hold {J} group{'' if J == 1 else 's'}; "
            f"give at most {J}, or leave it out (the top {TOP_DEFAULT}, or every group when there are fewer)"
        )
    return int(k)


def check_limits(lower, upper) -> None:
    if lower is not None and upper is not None and not lower < upper:
        raise InputError(f"bad option: the lower specification limit ({lower:g}) must be below the upper ({upper:g})")


def level_label(level: float) -> str:
    """'95%' for 0.95, '97.5%' for 0.975: how the level names an interval.

    >>> level_label(0.95), level_label(0.975), level_label(0.9995)
    ('95%', '97.5%', '99.95%')
    """
    pct = level * 100
    return (
        f"{pct:.0f}%"
        if abs(pct - round(pct)) < 1e-9
        else f"{pct:.1f}%"
        if abs(pct * 10 - round(pct * 10)) < 1e-9
        else f"{pct:.2f}%"
    )


def level_key(level: float) -> str:
    """The suffix of interval columns and keys for a level: '95' for 0.95, '97_5' for 0.975.

    >>> level_key(0.95), level_key(0.975)
    ('95', '97_5')
    """
    return level_label(level).rstrip("%").replace(".", "_")


@dataclass(frozen=True)
class ReportOptions:
    """What the reader asked for. level: credible interval level; k: size of the top group (None, the default: not
    asked, which means the top 3, or every group when there are fewer; a k above the number of groups is refused
    when the answers are computed, pooling.results.compute, and by the command line before sampling); best:
    'highest' or 'lowest'; threshold; lower/upper specification limits; allowed_bias; compare: group
    labels for the head-to-head matrix; assigned/sigma_pt: x_pt and sigma_pt of the z-scores (default:
    ISO 13528 Algorithm A on the group means); decide_at: the probability from which a statement
    (above a threshold, outside the limits, outlying) counts as decided; labs: the groups are
    laboratories in a round (the report then shows the interlaboratory view; None: only when x_pt or
    sigma_pt is given)."""

    level: float = 0.95
    k: int | None = None
    best: str = "highest"
    threshold: float | None = None
    lower: float | None = None
    upper: float | None = None
    allowed_bias: float | None = None
    compare: tuple[str, ...] = ()
    assigned: float | None = None
    sigma_pt: float | None = None
    decide_at: float = 0.95
    labs: bool | None = None

    def __post_init__(self):
        if isinstance(self.compare, str):  # one string is one label (or one comma-separated list)
            object.__setattr__(self, "compare", (self.compare,))
        object.__setattr__(self, "compare", tuple(str(x) for x in self.compare))
        check_level(self.level)
        if self.k is not None and (isinstance(self.k, bool) or not isinstance(self.k, (int, np.integer)) or self.k < 1):
            raise InputError(
                f"bad option: k (the size of the top group) must be a whole number of at least 1; found {self.k!r}"
            )
        if self.best not in BEST:
            raise InputError(f"bad option: best must be 'highest' or 'lowest'; found '{self.best}'")
        for name in ("threshold", "lower", "upper", "allowed_bias", "assigned", "sigma_pt"):
            x = getattr(self, name)
            if x is not None and (
                isinstance(x, bool) or not isinstance(x, (int, float, np.floating)) or not math.isfinite(x)
            ):
                raise InputError(f"bad option: {name} must be a finite number; found {x!r}")
        check_limits(self.lower, self.upper)
        if self.allowed_bias is not None and not self.allowed_bias > 0:
            raise InputError(f"bad option: the allowed bias must be positive; found {self.allowed_bias:g}")
        if self.sigma_pt is not None and not self.sigma_pt > 0:
            raise InputError(f"bad option: sigma_pt must be positive; found {self.sigma_pt:g}")
        if not (isinstance(self.decide_at, (int, float, np.floating)) and 0.5 < self.decide_at < 1):
            raise InputError(
                f"bad option: decide_at must be a probability above 0.5 and below 1; found {self.decide_at!r}"
            )

    @property
    def limits(self) -> bool:
        return self.lower is not None or self.upper is not None

    @property
    def interlab(self) -> bool:
        """Whether the groups are treated as laboratories in a round."""
        if self.labs is not None:
            return bool(self.labs)
        return self.assigned is not None or self.sigma_pt is not None

    def to_dict(self) -> dict:
        return {
            "level": self.level,
            "k": self.k,
            "best": self.best,
            "threshold": self.threshold,
            "lower_limit": self.lower,
            "upper_limit": self.upper,
            "allowed_bias": self.allowed_bias,
            "compare": list(self.compare),
            "assigned_value": self.assigned,
            "sigma_pt": self.sigma_pt,
            "decide_at": self.decide_at,
            "labs": self.interlab,
        }

    @staticmethod
    def from_args(args) -> ReportOptions:
        """From the command line's namespace; options it lacks keep their defaults."""

        def get(name, default=None):
            v = getattr(args, name, None)
            return default if v is None else v

        return ReportOptions(
            level=get("level", 0.95),
            k=get("top"),
            best=get("best", "highest"),
            threshold=get("threshold"),
            lower=get("lower_limit"),
            upper=get("upper_limit"),
            allowed_bias=get("allowed_bias"),
            compare=tuple(get("compare", ())),
            assigned=get("assigned_value"),
            sigma_pt=get("sigma_pt"),
            decide_at=float(get("decide_at", 0.95)),
            labs=True if get("labs") else None,
        )

    def internal(self, center: float, scale: float, limits_apply: bool = True) -> np.ndarray:
        """The vector pooling.answers reads, in internal units: (x - center) / scale for the threshold and
        limits, allowed bias / scale. limits_apply: False for the known structure (no sigma_j)."""
        from . import answers as A

        a = np.zeros(A.N_A)
        a[A.A_SIGN] = 1.0 if self.best == "highest" else -1.0
        if self.threshold is not None:
            a[A.A_THR], a[A.A_HAS_THR] = (self.threshold - center) / scale, 1.0
        if self.lower is not None:
            a[A.A_LOWER], a[A.A_HAS_LOWER] = (self.lower - center) / scale, 1.0
        if self.upper is not None:
            a[A.A_UPPER], a[A.A_HAS_UPPER] = (self.upper - center) / scale, 1.0
        if self.allowed_bias is not None:
            a[A.A_BIAS], a[A.A_HAS_BIAS] = self.allowed_bias / scale, 1.0
        if limits_apply and self.limits:
            a[A.A_LIMITS] = 1.0
        return a


# Randomness derived from a run's draws (predictions for a new group, replicated data of the model checks,
# the sample of kept groups in summary mode, the seed of the fit without predictors) comes from the run's
# own seed: stream `purpose` is
# SeedSequence(seed, spawn_key=(DERIVED + purpose,)), apart from the chains' streams (spawn keys 0, 1, ...).
DERIVED = 1_000_000
PURPOSE_PREDICTION, PURPOSE_CHECKS, PURPOSE_KEPT, PURPOSE_WITHOUT = 1, 2, 3, 4


def derived_rng(seed: int, purpose: int) -> np.random.Generator:
    """The generator of one derived purpose, from the run's recorded seed."""
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(DERIVED + purpose,)))


def split_compare(items, labels: tuple[str, ...]) -> tuple[str, ...]:
    """Each --compare value is one label, or (when it is not a label) a comma-separated list of labels."""
    known = set(labels)
    out: list[str] = []
    for item in items:
        parts = [item] if item in known else [p.strip() for p in item.split(",") if p.strip()]
        out.extend(parts)
    return tuple(out)


def resolve_groups(labels: tuple[str, ...], wanted) -> np.ndarray:
    """Positions of the wanted labels; each given once, in the order asked; unknown labels refused."""
    index = {lab: i for i, lab in enumerate(labels)}
    out: list[int] = []
    for lab in wanted:
        lab = str(lab)
        if lab not in index:
            shown = ", ".join(f"'{x}'" for x in labels[:8]) + (", ..." if len(labels) > 8 else "")
            raise InputError(f"bad option: no group '{lab}' in the data; the groups are {shown}")
        if index[lab] not in out:
            out.append(index[lab])
    return np.asarray(out, dtype=np.int64)
