"""Model specifications: the within-group variance structure and the priors, as frozen values.

    level 1   y_ij    ~ N(theta_j, sigma_j^2)
    level 2   theta_j ~ N(mu, tau^2)

Structures for the within-group variance:

    separate  sigma_j^2 ~ Scaled-Inv-chi2(nu, s^2), with priors on s^2 and on nu
    shared    sigma_j = sigma for every group, p(log sigma) flat
    known     v_j = se_j^2 given with each group's estimate

`build` checks a specification against the data, refuses improper or unidentifiable set-ups
with a message that says what to do instead, and returns a `Problem`: the data centred and scaled
to order one (so that 1e12 offsets and tiny or huge units sample alike) with the priors carried
into the same units. Every result is mapped back to the user's units in the posterior stage.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np

from .errors import ModelError
from .stats import GroupStats, _show, check_unicode_twins

# ---------------------------------------------------------------------------------------------
# priors


@dataclass(frozen=True)
class Flat:
    """Improper uniform density: p(x) ∝ 1 on the parameter's support."""

    def describe(self) -> str:
        return "flat"


@dataclass(frozen=True)
class Normal:
    """Normal(loc, scale): p(x) ∝ exp(-(x - loc)^2 / (2 scale^2)); scale is a standard deviation."""

    loc: float
    scale: float

    def describe(self) -> str:
        return f"normal(loc={self.loc:g}, scale={self.scale:g})"


@dataclass(frozen=True)
class HalfNormal:
    """Half-normal on x > 0: p(x) ∝ exp(-x^2 / (2 scale^2)); scale is a standard deviation."""

    scale: float

    def describe(self) -> str:
        return f"half-normal(scale={self.scale:g})"


@dataclass(frozen=True)
class HalfCauchy:
    """Half-Cauchy on x > 0: p(x) ∝ 1 / (1 + (x / scale)^2)."""

    scale: float

    def describe(self) -> str:
        return f"half-Cauchy(scale={self.scale:g})"


@dataclass(frozen=True)
class Reciprocal:
    """p(s^2) ∝ 1 / s^2 on s^2 > 0 (flat on log s^2); improper."""

    def describe(self) -> str:
        return "p(s^2) ∝ 1/s^2"


@dataclass(frozen=True)
class Gamma:
    """Gamma(shape, rate) on s^2: p(s^2) ∝ (s^2)^(shape - 1) exp(-rate s^2); rate in 1/(units^2)."""

    shape: float
    rate: float

    def describe(self) -> str:
        return f"gamma(shape={self.shape:g}, rate={self.rate:g}) on s^2"


@dataclass(frozen=True)
class NuFixed:
    """nu held at one value (degrees of freedom of the scaled inverse-chi-square)."""

    value: float

    def describe(self) -> str:
        return f"fixed at {self.value:g}"


DEFAULT_NU_GRID = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0, 14.0, 20.0, 30.0, 50.0, 100.0)


@dataclass(frozen=True)
class NuGrid:
    """nu drawn from a finite grid with prior weights (normalised; uniform on the points by default)."""

    values: tuple[float, ...] = DEFAULT_NU_GRID
    weights: tuple[float, ...] | None = None

    def describe(self) -> str:
        w = "uniform over the points" if self.weights is None else "weights " + ", ".join(f"{x:g}" for x in self.weights)
        return "grid {" + ", ".join(f"{x:g}" for x in self.values) + "}, " + w

    def log_prior(self) -> np.ndarray:
        w = np.ones(len(self.values)) if self.weights is None else np.asarray(self.weights, dtype=float)
        return np.log(w / w.sum())


STRUCTURES = ("separate", "shared", "known")


@dataclass(frozen=True)
class Model:
    """A complete specification: within-group structure and every prior. Defaults are stated here.

    Defaults: mu flat; tau flat (needs at least 3 groups); s^2 ∝ 1/s^2; nu on the grid
    DEFAULT_NU_GRID with equal weights; shared log sigma flat.
    """

    within: str = "separate"
    mu: Flat | Normal = field(default_factory=Flat)
    tau: Flat | HalfNormal | HalfCauchy = field(default_factory=Flat)
    s2: Reciprocal | Gamma = field(default_factory=Reciprocal)
    nu: NuFixed | NuGrid = field(default_factory=NuGrid)

    def __post_init__(self):
        if self.within not in STRUCTURES:
            raise ModelError(f"bad model: within-group structure must be one of {', '.join(STRUCTURES)}; found '{self.within}'")
        if not isinstance(self.mu, (Flat, Normal)):
            raise ModelError(f"bad model: the prior on mu must be flat or normal; found {self.mu!r}")
        if not isinstance(self.tau, (Flat, HalfNormal, HalfCauchy)):
            raise ModelError(f"bad model: the prior on tau must be flat, half-normal or half-Cauchy; found {self.tau!r}")
        if not isinstance(self.s2, (Reciprocal, Gamma)):
            raise ModelError(f"bad model: the prior on s^2 must be 1/s^2 or gamma; found {self.s2!r}")
        for name, p in (("mu", self.mu), ("tau", self.tau)):
            scale = getattr(p, "scale", 1.0)
            if not (math.isfinite(scale) and scale > 0):
                raise ModelError(f"bad model: the scale of the prior on {name} must be a positive number; found {scale}")
        if isinstance(self.mu, Normal) and not math.isfinite(self.mu.loc):
            raise ModelError(f"bad model: the centre of the prior on mu must be a finite number; found {self.mu.loc}")
        if isinstance(self.s2, Gamma) and not (self.s2.shape > 0 and self.s2.rate > 0):
            raise ModelError("bad model: the gamma prior on s^2 needs shape > 0 and rate > 0; "
                             f"found shape={self.s2.shape}, rate={self.s2.rate}")
        if isinstance(self.nu, NuFixed) and not (math.isfinite(self.nu.value) and self.nu.value > 0):
            raise ModelError(f"bad model: nu must be a positive number; found {self.nu.value}")
        if isinstance(self.nu, NuGrid):
            vals = np.asarray(self.nu.values, dtype=float)
            if vals.size == 0 or not np.all(np.isfinite(vals)) or np.any(vals <= 0):
                raise ModelError(f"bad model: the nu grid must hold positive numbers; found {self.nu.values}")
            if self.nu.weights is not None:
                w = np.asarray(self.nu.weights, dtype=float)
                if w.shape != vals.shape or np.any(w < 0) or not np.isfinite(w).all() or w.sum() <= 0:
                    raise ModelError("bad model: the nu grid weights must be one non-negative number per grid point, "
                                     f"not all zero; found {self.nu.weights}")

    def priors(self) -> dict[str, str]:
        """Plain statements of every prior in force, for summaries and reports."""
        out = {"mu": self.mu.describe(), "tau": self.tau.describe()}
        if self.within == "separate":
            out["s2"] = self.s2.describe()
            out["nu"] = self.nu.describe()
        elif self.within == "shared":
            out["sigma"] = "p(log sigma) flat"
        else:
            out["sigma"] = "given: each group's standard error"
        return out

    def to_dict(self) -> dict:
        def enc(p):
            d = asdict(p)
            d["kind"] = type(p).__name__
            return d

        return {"within": self.within, "mu": enc(self.mu), "tau": enc(self.tau), "s2": enc(self.s2), "nu": enc(self.nu)}

    @staticmethod
    def from_dict(d: dict) -> "Model":
        kinds = {c.__name__: c for c in (Flat, Normal, HalfNormal, HalfCauchy, Reciprocal, Gamma, NuFixed, NuGrid)}

        def dec(x):
            x = dict(x)
            cls = kinds[x.pop("kind")]
            for k, v in x.items():
                if isinstance(v, list):
                    x[k] = tuple(v)
            return cls(**x)

        return Model(d["within"], dec(d["mu"]), dec(d["tau"]), dec(d["s2"]), dec(d["nu"]))


# ---------------------------------------------------------------------------------------------
# the problem handed to the sampler

MU_FLAT, MU_NORMAL = 0, 1
TAU_FLAT, TAU_HALFNORMAL, TAU_HALFCAUCHY = 0, 1, 2
WITHIN_CODE = {"separate": 0, "shared": 1, "known": 2}


@dataclass(frozen=True, eq=False)
class Problem:
    """Data and priors in internal units: y' = (y - center) / scale. Arrays are float64.

    For `known`, v holds se_j^2 in internal units and n/m2 are unused.
    """

    model: Model
    stats: GroupStats
    center: float
    scale: float
    n: np.ndarray
    ybar: np.ndarray
    m2: np.ndarray
    v_known: np.ndarray
    within_code: int
    mu_kind: int
    mu_loc: float
    mu_scale: float
    tau_kind: int
    tau_scale: float
    s2_shape: float
    s2_rate: float
    nu_grid: np.ndarray
    nu_logprior: np.ndarray
    nu_table: np.ndarray = None  # kernel.prepare(n, nu_grid): computed once here, read by every sweep
    layout: np.ndarray = None

    def __post_init__(self):
        if self.nu_table is None or self.layout is None:
            from .kernel import prepare

            table, layout = prepare(self.n, self.nu_grid)
            object.__setattr__(self, "nu_table", table)
            object.__setattr__(self, "layout", layout)

    @property
    def J(self) -> int:
        return self.stats.J


def _refuse(msg: str):
    raise ModelError(msg)


def _check_statistics(stats: GroupStats):
    """Statistics made by hand (not by the readers, which check their input) are checked once here:
    a NaN or a zero n would otherwise reach the kernel and come back as meaningless draws."""
    if len(set(stats.labels)) != stats.J or not all(isinstance(lab, str) for lab in stats.labels):
        _refuse("bad model: the group labels must be distinct strings")
    check_unicode_twins(stats.labels, stats.source)  # every path to the sampler passes here
    checks = [("n", stats.n, stats.n > 0 if stats.kind == "raw" else stats.n >= 0, "a size above 0"),
              ("mean", stats.mean + stats.mean_lo, None, "a finite mean"),
              ("m2", stats.m2, stats.m2 >= 0, "a sum of squared deviations >= 0")]
    if stats.kind == "known":
        checks.append(("se", stats.se, stats.se > 0, "a standard error above 0"))
    for name, arr, ok, what in checks:
        ok = np.isfinite(arr) if ok is None else ok & np.isfinite(arr)
        if not np.all(ok):
            j = int(np.argmin(ok))
            _refuse(f"bad model: group {_show(stats.labels[j])} has {name} = {float(arr[j]):g}; expected {what}")


def _check_identifiable(stats: GroupStats, model: Model):
    J = stats.J
    if J == 0:
        _refuse("bad model: the data hold no groups")
    if stats.kind == "known" and stats.se is None:
        _refuse("bad model: estimates need a standard error per group")
    _check_statistics(stats)
    if model.within == "known" and stats.kind != "known":
        _refuse("bad model: the 'known' structure needs one estimate and one standard error per group; "
                "these data are measurements: use --within separate or shared")
    if model.within != "known" and stats.kind == "known":
        _refuse(f"bad model: estimates with standard errors can only be fitted with the 'known' structure; found '{model.within}'")
    if isinstance(model.tau, Flat) and J < 3:
        _refuse(f"bad model: a flat prior on tau gives an improper posterior with fewer than 3 groups (found {J}); "
                "use a proper prior instead, for example a half-Cauchy or half-normal with a scale near the spread "
                "you expect between groups (--tau half-cauchy:SCALE or --tau half-normal:SCALE)")
    if model.within == "shared":
        df = stats.N - J
        if df < 1 or float(np.sum(stats.m2)) <= 0.0:
            _refuse("bad model: a shared within-group variance needs replication (some group with two or more "
                    f"measurements that differ); found {stats.N} measurements in {J} groups with "
                    f"{'no spread' if df >= 1 else 'one measurement each'}. Supply replicated measurements, or give "
                    "each group's standard error and use --within known")
    if model.within == "separate" and isinstance(model.s2, Reciprocal):
        if not np.any((stats.n >= 2) & (stats.m2 > 0)):
            _refuse("bad model: separate within-group variances with p(s^2) ∝ 1/s^2 need at least one group with two "
                    "or more measurements that differ; found none. Supply replicated measurements, put a proper "
                    "gamma prior on s^2 (--s2 gamma:SHAPE:RATE), or use --within known with standard errors")


def build(stats: GroupStats, model: Model | None = None) -> Problem:
    """Check `model` against `stats` and return the sampler's problem in internal units.

    >>> import numpy as np
    >>> from pooling.stats import GroupStats
    >>> s = GroupStats(("a", "b", "c"), np.array([3, 3, 3]), np.array([1.0, 2.0, 3.0]), np.array([2.0, 2.0, 2.0]))
    >>> build(s, Model(within="shared")).J
    3
    """
    model = model or Model()
    _check_identifiable(stats, model)
    center, scale = _center_scale(stats)
    ybar = ((stats.mean - center) + stats.mean_lo) / scale
    n = stats.n.astype(np.float64)
    m2 = stats.m2 / (scale * scale)
    v_known = (stats.se / scale) ** 2 if stats.kind == "known" else np.zeros(stats.J)
    # from here on centre and scale are in the user's units (the stored unit folded in)
    center, scale = center * stats.unit, scale * stats.unit
    mu_kind, mu_loc, mu_scale = MU_FLAT, 0.0, 1.0
    if isinstance(model.mu, Normal):
        mu_kind, mu_loc, mu_scale = MU_NORMAL, (model.mu.loc - center) / scale, model.mu.scale / scale
    tau_kind, tau_scale = TAU_FLAT, 1.0
    if isinstance(model.tau, HalfNormal):
        tau_kind, tau_scale = TAU_HALFNORMAL, model.tau.scale / scale
    elif isinstance(model.tau, HalfCauchy):
        tau_kind, tau_scale = TAU_HALFCAUCHY, model.tau.scale / scale
    s2_shape, s2_rate = 0.0, 0.0  # Reciprocal: Gamma(J nu / 2, nu / 2 sum 1/sigma_j^2) exactly
    if isinstance(model.s2, Gamma):
        s2_shape, s2_rate = model.s2.shape, model.s2.rate * scale * scale
    if isinstance(model.nu, NuFixed):
        grid, logp = np.array([model.nu.value], dtype=float), np.zeros(1)
    else:
        grid, logp = np.asarray(model.nu.values, dtype=float), model.nu.log_prior()
    return Problem(model, stats, center, scale, n, ybar, m2, v_known, WITHIN_CODE[model.within], mu_kind, mu_loc,
                   mu_scale, tau_kind, tau_scale, s2_shape, s2_rate, grid, logp)


def _center_scale(stats: GroupStats) -> tuple[float, float]:
    """An offset and scale (in the stored unit) that make the data of order one; a power-of-two scale keeps
    rescaling lossless."""
    w = stats.n.astype(float) if stats.kind == "raw" and stats.N > 0 else np.ones(stats.J)
    center = float(np.median(stats.mean))
    dev = (stats.mean - center) + stats.mean_lo
    if stats.kind == "known":
        spread2 = float(np.mean(dev * dev) + np.mean(stats.se ** 2))
    else:
        spread2 = float((np.sum(stats.m2) + np.sum(w * dev * dev)) / max(np.sum(w), 1.0))
    if not (spread2 > 0 and math.isfinite(spread2)):
        spread2 = 1.0 if center == 0 else (abs(center) * 1e-3) ** 2 if math.isfinite(center) else 1.0
    scale = 2.0 ** round(math.log2(math.sqrt(spread2)))
    return center, scale
