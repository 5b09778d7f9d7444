"""Model specifications: the within-group variance structure, the between-group distribution and the
priors, as frozen values.

    level 1   y_ij    ~ N(theta_j, sigma_j^2)
    level 2   theta_j ~ N(mu, tau^2)                                       (between = normal)
              theta_j ~ N(mu, tau^2 / lambda_j), lambda_j ~ Gamma(df/2, rate df/2)  (between = heavy:
              a Student-t with df degrees of freedom, centre mu and scale tau, as a scale mixture)

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
from typing import TYPE_CHECKING

import numpy as np

from .errors import ModelError
from .stats import GroupStats, _show, check_unicode_twins

if TYPE_CHECKING:
    from . import kernel

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

# ---------------------------------------------------------------------------------------------
# the between-group distribution


def _gamma2_cdf(x: float, rate: float) -> float:
    """CDF of Gamma(shape 2, rate): 1 - exp(-rate x) (1 + rate x)."""
    if math.isinf(x):
        return 1.0
    return 1.0 - math.exp(-rate * x) * (1.0 + rate * x)


DF_PRIOR_RATE = 0.1
DF_NORMAL_FROM = 40.0  # prior mass of df above this goes to df = inf (the normal limit)
DEFAULT_DF_GRID = (1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 32.0, math.inf)


def gamma_df_weights(grid: tuple[float, ...], rate: float = DF_PRIOR_RATE, normal_from: float = DF_NORMAL_FROM
                     ) -> tuple[float, ...]:
    """Prior weights on a df grid from the Gamma(2, rate) density on df: each finite point gets the mass of
    its cell (edges at the geometric midpoints between neighbours; the first cell from 0, the last finite
    one up to `normal_from`, or up to the last finite point if that is larger), and df = inf gets the mass
    above that edge."""
    finite = sorted(g for g in grid if not math.isinf(g))
    if finite:
        normal_from = max(normal_from, finite[-1])
    edges = [0.0] + [math.sqrt(a * b) for a, b in zip(finite, finite[1:])] + [normal_from]
    out = []
    for g in grid:
        if math.isinf(g):
            out.append(1.0 - _gamma2_cdf(normal_from, rate))
        else:
            i = finite.index(g)
            out.append(_gamma2_cdf(edges[i + 1], rate) - _gamma2_cdf(edges[i], rate))
    return tuple(out)


@dataclass(frozen=True)
class NormalBetween:
    """theta_j | mu, tau ~ N(mu, tau^2): the normal between-group distribution."""

    def describe(self) -> str:
        return "normal: theta_j ~ N(mu, tau^2)"

    @property
    def name(self) -> str:
        return "normal"


@dataclass(frozen=True)
class HeavyBetween:
    """theta_j | mu, tau, lambda_j ~ N(mu, tau^2 / lambda_j), lambda_j ~ Gamma(df/2, rate df/2): theta_j is
    Student-t(df) about mu with scale tau, so that one far group neither drags the others nor is dragged.

    df: a fixed number of degrees of freedom, or None to learn it on `grid` (inf is the normal limit)
    with prior `weights` (default: Gamma(2, rate 0.1) on df, discretised on the grid; see README).
    """

    df: float | None = None
    grid: tuple[float, ...] = DEFAULT_DF_GRID
    weights: tuple[float, ...] | None = None

    def __post_init__(self):
        if self.df is not None:
            if not (isinstance(self.df, (int, float)) and not math.isnan(self.df) and self.df > 0):
                raise ModelError(f"bad model: the degrees of freedom of the between-group distribution must be a "
                                 f"number above 0 (or inf for the normal); found {self.df!r}")
            return
        vals = tuple(float(x) for x in self.grid)
        if not vals or any(math.isnan(x) or x <= 0 for x in vals) or len(set(vals)) != len(vals):
            raise ModelError(f"bad model: the df grid must hold distinct numbers above 0 (inf allowed); found {self.grid}")
        object.__setattr__(self, "grid", vals)
        if self.weights is not None:
            w = tuple(float(x) for x in self.weights)
            if len(w) != len(vals) or any(not math.isfinite(x) or x < 0 for x in w) or sum(w) <= 0:
                raise ModelError("bad model: the df grid weights must be one non-negative number per grid point, "
                                 f"not all zero; found {self.weights}")
            object.__setattr__(self, "weights", w)

    @property
    def name(self) -> str:
        return "heavy" if self.df is None else f"heavy:{self.df:g}"

    def grid_and_weights(self) -> tuple[tuple[float, ...], tuple[float, ...]]:
        if self.df is not None:
            return (float(self.df),), (1.0,)
        w = self.weights if self.weights is not None else gamma_df_weights(self.grid)
        return self.grid, w

    def describe(self) -> str:
        if self.df is not None:
            return f"heavy tails: theta_j ~ Student-t(df = {self.df:g}, mu, tau), df fixed"
        grid, w = self.grid_and_weights()
        points = ", ".join("inf" if math.isinf(g) else f"{g:g}" for g in grid)
        if self.weights is None:
            how = (f"prior weights from Gamma(2, rate {DF_PRIOR_RATE:g}) on df over each point's cell, the mass above "
                   f"{DF_NORMAL_FROM:g} on df = inf (the normal); P(df = inf) = {w[-1]:.3f}" if math.isinf(grid[-1]) else
                   f"prior weights from Gamma(2, rate {DF_PRIOR_RATE:g}) on df over each point's cell")
        else:
            how = "prior weights " + ", ".join(f"{x:g}" for x in w)
        return f"heavy tails: theta_j ~ Student-t(df, mu, tau), df learned on the grid {{{points}}}; {how}"


def parse_between(text) -> NormalBetween | HeavyBetween:
    """'normal', 'heavy' (df learned) or 'heavy:DF' (df fixed; 'heavy:inf' is the normal limit as a t model)."""
    if isinstance(text, (NormalBetween, HeavyBetween)):
        return text
    if not isinstance(text, str):
        raise ModelError(f"bad model: the between-group distribution must be normal, heavy or heavy:DF; found {text!r}")
    t = text.strip().lower()
    if t == "normal":
        return NormalBetween()
    if t == "heavy":
        return HeavyBetween()
    if t.startswith("heavy:"):
        raw = t[6:]
        try:
            df = float(raw)
        except ValueError:
            raise ModelError(f"bad model: heavy:DF needs a number of degrees of freedom after ':'; found '{text}'") from None
        return HeavyBetween(df=df)
    raise ModelError(f"bad model: the between-group distribution must be normal, heavy or heavy:DF; found '{text}'")


@dataclass(frozen=True)
class Model:
    """A complete specification: within-group structure and every prior. Defaults are stated here.

    Defaults: between heavy (Student-t, df learned on DEFAULT_DF_GRID with Gamma(2, 0.1) prior weights);
    mu flat; tau flat (needs at least 3 groups); s^2 ∝ 1/s^2; nu on the grid DEFAULT_NU_GRID with equal
    weights; shared log sigma flat. `between` also takes the strings 'normal', 'heavy' and 'heavy:DF'.
    """

    within: str = "separate"
    mu: Flat | Normal = field(default_factory=Flat)
    tau: Flat | HalfNormal | HalfCauchy = field(default_factory=Flat)
    s2: Reciprocal | Gamma = field(default_factory=Reciprocal)
    nu: NuFixed | NuGrid = field(default_factory=NuGrid)
    between: NormalBetween | HeavyBetween | str = field(default_factory=HeavyBetween)

    def __post_init__(self):
        object.__setattr__(self, "between", parse_between(self.between))
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
        out = {"between": self.between.describe(), "mu": self.mu.describe(), "tau": self.tau.describe()}
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

        def enc_between(b):
            d = enc(b)
            for key in ("df", "grid"):  # inf is not JSON: written as the string "inf"
                if key == "df" and d.get("df") is not None and math.isinf(d["df"]):
                    d["df"] = "inf"
                if key == "grid" and "grid" in d:
                    d["grid"] = ["inf" if math.isinf(g) else g for g in d["grid"]]
            return d

        return {"within": self.within, "between": enc_between(self.between), "mu": enc(self.mu), "tau": enc(self.tau),
                "s2": enc(self.s2), "nu": enc(self.nu)}

    @staticmethod
    def from_dict(d: dict) -> "Model":
        """The inverse of to_dict. A record without 'between' (written before heavy tails existed) was a normal fit."""
        kinds = {c.__name__: c for c in (Flat, Normal, HalfNormal, HalfCauchy, Reciprocal, Gamma, NuFixed, NuGrid,
                                         NormalBetween, HeavyBetween)}

        def num(v):
            return math.inf if v == "inf" else v

        def dec(x):
            x = dict(x)
            cls = kinds[x.pop("kind")]
            for k, v in x.items():
                if isinstance(v, list):
                    x[k] = tuple(num(e) for e in v)
                else:
                    x[k] = num(v)
            return cls(**x)

        between = dec(d["between"]) if "between" in d else NormalBetween()
        return Model(d["within"], dec(d["mu"]), dec(d["tau"]), dec(d["s2"]), dec(d["nu"]), between=between)


# ---------------------------------------------------------------------------------------------
# the problem handed to the sampler

MU_FLAT, MU_NORMAL = 0, 1
TAU_FLAT, TAU_HALFNORMAL, TAU_HALFCAUCHY = 0, 1, 2
WITHIN_CODE = {"separate": 0, "shared": 1, "known": 2}


@dataclass(frozen=True, eq=False)
class Problem:
    """Data and priors in internal units, y' = (y - center) / scale, as the kernel reads them (`data`, one
    kernel.Data), with the statistics and the specification they came from."""

    model: Model
    stats: GroupStats
    center: float
    scale: float
    data: "kernel.Data"

    @property
    def J(self) -> int:
        return self.stats.J

    # the statistics in internal units, read by the sampler's starting points and the reporter
    @property
    def n(self) -> np.ndarray:
        return self.data.n

    @property
    def ybar(self) -> np.ndarray:
        return self.data.ybar

    @property
    def m2(self) -> np.ndarray:
        return self.data.m2

    @property
    def v_known(self) -> np.ndarray:
        return self.data.v_known

    @property
    def within_code(self) -> int:
        return self.data.within

    @property
    def nu_grid(self) -> np.ndarray:
        return self.data.nu_grid

    @property
    def df_grid(self) -> np.ndarray:
        return self.data.df_grid

    @property
    def heavy(self) -> bool:
        return self.data.between == 1

    def subset(self, idx) -> "Problem":
        """The same problem restricted to the groups at positions `idx` (the same centre, scale and priors):
        what the answers of a subset of groups (summary mode's kept groups) are computed against."""
        from . import kernel

        idx = np.asarray(idx, dtype=np.int64)
        d = self.data
        n = np.ascontiguousarray(d.n[idx])
        table, layout = kernel.prepare(n, d.nu_grid)
        data = d._replace(n=n, ybar=np.ascontiguousarray(d.ybar[idx]), m2=np.ascontiguousarray(d.m2[idx]),
                          v_known=np.ascontiguousarray(d.v_known[idx]), nu_table=table, layout=layout)
        return Problem(self.model, self.stats.subset(idx), self.center, self.scale, data)


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
    from . import kernel

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
    table, layout = kernel.prepare(n, grid)
    if isinstance(model.between, HeavyBetween):
        dfg, dfw = model.between.grid_and_weights()
        df_grid = np.asarray(dfg, dtype=np.float64)
        w = np.asarray(dfw, dtype=np.float64)
        with np.errstate(divide="ignore"):
            df_logprior = np.log(w / w.sum())
        between = kernel.BETWEEN_HEAVY
    else:
        df_grid, df_logprior, between = np.array([math.inf]), np.zeros(1), kernel.BETWEEN_NORMAL
    data = kernel.Data(
        within=int(WITHIN_CODE[model.within]), n=np.ascontiguousarray(n), ybar=np.ascontiguousarray(ybar, dtype=np.float64),
        m2=np.ascontiguousarray(m2, dtype=np.float64), v_known=np.ascontiguousarray(v_known, dtype=np.float64),
        mu_kind=int(mu_kind), mu_loc=float(mu_loc), mu_scale=float(mu_scale), tau_kind=int(tau_kind),
        tau_scale=float(tau_scale), s2_shape=float(s2_shape), s2_rate=float(s2_rate), nu_grid=grid,
        nu_logprior=np.asarray(logp, dtype=np.float64), nu_table=table, layout=layout, between=int(between),
        df_grid=df_grid, df_logprior=df_logprior, df_const=kernel.t_constants(df_grid),
        df_logq=kernel.t_quartile_logs(df_grid))
    return Problem(model, stats, center, scale, data)


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
