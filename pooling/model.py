"""Model specifications: the within-group variance structure, the between-group distribution and the
priors, as frozen values.

    level 1   y_ij    ~ N(theta_j, sigma_j^2)
    level 2   theta_j ~ N(mu, tau^2)                                       (between = normal)
              theta_j ~ N(mu, tau^2 / lambda_j), lambda_j ~ Gamma(df/2, rate df/2)  (between = heavy:
              a Student-t with df degrees of freedom, centre mu and scale tau, as a scale mixture)
    with group-level predictors (method, instrument, region, age) the centre of group j is mu + x_j' beta:
    x_j holds the group's contrasts against a reference level for each categorical predictor (`Category`)
    and its numeric predictors centred at their mean over the groups (`Numeric`), so mu is the centre of the
    reference level at the numeric predictors' means; beta has a flat or normal prior (`effects`).

Structures for the within-group variance:

    separate  sigma_j^2 ~ Scaled-Inv-chi2(nu, s^2), with priors on s^2 and on nu
    shared    sigma_j = sigma for every group, p(log sigma) flat (or sigma^2 ~ Scaled-Inv-chi2(dof, scale2))
    known     v_j = se_j^2 given with each group's estimate

`build` checks a specification against the data, refuses improper or unidentifiable set-ups
with a message that says what to do instead, and returns a `Problem`: the data centred and scaled
to order one (so that 1e12 offsets and tiny or huge units sample alike) with the priors carried
into the same units. Every result is mapped back to the user's units in the posterior stage.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

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
class ScaledInvChi2:
    """Scaled-Inv-chi2(dof, scale2) on the shared sigma^2: p(sigma^2) ∝ (sigma^2)^-(dof/2 + 1) exp(-dof scale2 /
    (2 sigma^2)), an inverse gamma with shape dof/2 and scale dof scale2 / 2; scale2 in units^2. It weighs as
    much as dof earlier degrees of freedom that gave the variance estimate scale2."""

    dof: float
    scale2: float

    def describe(self) -> str:
        return f"scaled-inv-chi2(dof={self.dof:g}, scale2={self.scale2:g}) on sigma^2"


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
        w = (
            "uniform over the points"
            if self.weights is None
            else "weights " + ", ".join(f"{x:g}" for x in self.weights)
        )
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


def gamma_df_weights(
    grid: tuple[float, ...], rate: float = DF_PRIOR_RATE, normal_from: float = DF_NORMAL_FROM
) -> tuple[float, ...]:
    """Prior weights on a df grid from the Gamma(2, rate) density on df: each finite point gets the mass of
    its cell (edges at the geometric midpoints between neighbours; the first cell from 0, the last finite
    one up to `normal_from`, or up to the last finite point if that is larger), and df = inf gets the mass
    above that edge.

    >>> w = gamma_df_weights((1.0, 4.0, math.inf))
    >>> round(sum(w), 12), w[-1] == 1.0 - _gamma2_cdf(DF_NORMAL_FROM, DF_PRIOR_RATE)
    (1.0, True)
    """
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
                raise ModelError(
                    f"bad model: the degrees of freedom of the between-group distribution must be a "
                    f"number above 0 (or inf for the normal); found {self.df!r}"
                )
            return
        vals = tuple(float(x) for x in self.grid)
        if not vals or any(math.isnan(x) or x <= 0 for x in vals) or len(set(vals)) != len(vals):
            raise ModelError(
                f"bad model: the df grid must hold distinct numbers above 0 (inf allowed); found {self.grid}"
            )
        object.__setattr__(self, "grid", vals)
        if self.weights is not None:
            w = tuple(float(x) for x in self.weights)
            if len(w) != len(vals) or any(not math.isfinite(x) or x < 0 for x in w) or sum(w) <= 0:
                raise ModelError(
                    "bad model: the df grid weights must be one non-negative number per grid point, "
                    f"not all zero; found {self.weights}"
                )
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
            how = (
                f"prior weights from Gamma(2, rate {DF_PRIOR_RATE:g}) on df over each point's cell, the mass above "
                f"{DF_NORMAL_FROM:g} on df = inf (the normal); P(df = inf) = {w[-1]:.3f}"
                if math.isinf(grid[-1])
                else f"prior weights from Gamma(2, rate {DF_PRIOR_RATE:g}) on df over each point's cell"
            )
        else:
            how = "prior weights " + ", ".join(f"{x:g}" for x in w)
        return f"heavy tails: theta_j ~ Student-t(df, mu, tau), df learned on the grid {{{points}}}; {how}"


def parse_between(text) -> NormalBetween | HeavyBetween:
    """'normal', 'heavy' (df learned) or 'heavy:DF' (df fixed; 'heavy:inf' is the normal limit as a t model).

    >>> parse_between("normal").name, parse_between("heavy").name, parse_between("heavy:4").name
    ('normal', 'heavy', 'heavy:4')
    """
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
            raise ModelError(
                f"bad model: heavy:DF needs a number of degrees of freedom after ':'; found '{text}'"
            ) from None
        return HeavyBetween(df=df)
    raise ModelError(f"bad model: the between-group distribution must be normal, heavy or heavy:DF; found '{text}'")


# ---------------------------------------------------------------------------------------------
# group-level predictors


@dataclass(frozen=True)
class Category:
    """A categorical group-level predictor: the level of each group in `column` (a method, an instrument, a region).
    Every level but the reference gets a coefficient: its difference from the reference level (a contrast).

    reference: the level the others are compared with (default: the level with the most groups; ties: the first
    in sorted order). levels: optionally every level expected; a stated level with no groups is refused.
    prior: the prior of this predictor's coefficients (default: Model.effects).
    """

    column: str
    reference: str | None = None
    levels: tuple[str, ...] | None = None
    prior: Flat | Normal | None = None

    def __post_init__(self):
        if not isinstance(self.column, str) or not self.column:
            raise ModelError(f"bad model: a categorical predictor needs a column name; found {self.column!r}")
        if self.reference is not None:
            object.__setattr__(self, "reference", str(self.reference))
        if self.levels is not None:
            lv = tuple(str(x) for x in self.levels)
            if len(set(lv)) != len(lv):
                raise ModelError(f"bad model: the levels of '{self.column}' are listed more than once: {lv}")
            object.__setattr__(self, "levels", lv)
        _check_effect_prior(self.prior, self.column)

    kind = "category"


@dataclass(frozen=True)
class Numeric:
    """A numeric group-level predictor (a machine's age, a site's altitude): the value of each group in `column`,
    centred at its mean over the groups and kept in its own units, so its coefficient is the change of a group's
    centre per unit of the column. prior: the prior of its coefficient (default: Model.effects)."""

    column: str
    prior: Flat | Normal | None = None

    def __post_init__(self):
        if not isinstance(self.column, str) or not self.column:
            raise ModelError(f"bad model: a numeric predictor needs a column name; found {self.column!r}")
        _check_effect_prior(self.prior, self.column)

    kind = "numeric"


def _check_effect_prior(prior, what: str) -> None:
    if prior is None:
        return
    if not isinstance(prior, (Flat, Normal)):
        raise ModelError(f"bad model: the prior on the effects of '{what}' must be flat or normal; found {prior!r}")
    if isinstance(prior, Normal) and not (math.isfinite(prior.scale) and prior.scale > 0 and math.isfinite(prior.loc)):
        raise ModelError(
            f"bad model: the normal prior on the effects of '{what}' needs a finite centre and a positive "
            f"scale; found loc={prior.loc}, scale={prior.scale}"
        )


def _decode_predictor(d: dict):
    d = dict(d)
    kind = d.pop("kind")
    prior = d.pop("prior", None)
    if prior is not None:
        prior = Normal(prior["loc"], prior["scale"]) if prior["kind"] == "Normal" else Flat()
    if kind == "category":
        levels = d.get("levels")
        return Category(d["column"], d.get("reference"), None if levels is None else tuple(levels), prior)
    return Numeric(d["column"], prior)


@dataclass(frozen=True)
class Model:
    """A complete specification: within-group structure and every prior. Defaults are stated here.

    Defaults: between heavy (Student-t, df learned on DEFAULT_DF_GRID with Gamma(2, 0.1) prior weights);
    mu flat; tau flat (needs at least 3 groups); s^2 ∝ 1/s^2; nu on the grid DEFAULT_NU_GRID with equal
    weights; shared log sigma flat (sigma2: Reciprocal(), p(sigma^2) ∝ 1/sigma^2; or a proper ScaledInvChi2, for
    the shared structure only). `between` also takes the strings 'normal', 'heavy' and 'heavy:DF'.
    predictors: group-level predictors (`Category`, `Numeric`; none by default), whose columns the statistics
    carry (GroupStats.columns); effects: the prior on their coefficients, flat by default (or Normal(0, scale):
    the scale in the units of the data for a contrast, per unit of the column for a numeric predictor).
    """

    within: str = "separate"
    mu: Flat | Normal = field(default_factory=Flat)
    tau: Flat | HalfNormal | HalfCauchy = field(default_factory=Flat)
    s2: Reciprocal | Gamma = field(default_factory=Reciprocal)
    nu: NuFixed | NuGrid = field(default_factory=NuGrid)
    between: NormalBetween | HeavyBetween = field(default_factory=HeavyBetween)  # a text such as "heavy:4" is parsed
    predictors: tuple[Category | Numeric, ...] = ()
    effects: Flat | Normal = field(default_factory=Flat)
    sigma2: Reciprocal | ScaledInvChi2 = field(default_factory=Reciprocal)

    def __post_init__(self):
        object.__setattr__(self, "between", parse_between(self.between))
        preds = (self.predictors,) if isinstance(self.predictors, (Category, Numeric)) else tuple(self.predictors)
        for x in preds:
            if not isinstance(x, (Category, Numeric)):
                raise ModelError(f"bad model: a predictor must be a Category(column) or a Numeric(column); found {x!r}")
        cols = [x.column for x in preds]
        for c in cols:
            if cols.count(c) > 1:
                raise ModelError(f"bad model: the column '{c}' is named as a predictor twice")
        object.__setattr__(self, "predictors", preds)
        _check_effect_prior(self.effects, "the predictors")
        if self.within not in STRUCTURES:
            raise ModelError(
                f"bad model: within-group structure must be one of {', '.join(STRUCTURES)}; found '{self.within}'"
            )
        if not isinstance(self.mu, (Flat, Normal)):
            raise ModelError(f"bad model: the prior on mu must be flat or normal; found {self.mu!r}")
        if not isinstance(self.tau, (Flat, HalfNormal, HalfCauchy)):
            raise ModelError(
                f"bad model: the prior on tau must be flat, half-normal or half-Cauchy; found {self.tau!r}"
            )
        if not isinstance(self.s2, (Reciprocal, Gamma)):
            raise ModelError(f"bad model: the prior on s^2 must be 1/s^2 or gamma; found {self.s2!r}")
        for name, p in (("mu", self.mu), ("tau", self.tau)):
            scale = getattr(p, "scale", 1.0)
            if not (math.isfinite(scale) and scale > 0):
                raise ModelError(
                    f"bad model: the scale of the prior on {name} must be a positive number; found {scale}"
                )
        if isinstance(self.mu, Normal) and not math.isfinite(self.mu.loc):
            raise ModelError(f"bad model: the centre of the prior on mu must be a finite number; found {self.mu.loc}")
        if isinstance(self.s2, Gamma) and not (self.s2.shape > 0 and self.s2.rate > 0):
            raise ModelError(
                "bad model: the gamma prior on s^2 needs shape > 0 and rate > 0; "
                f"found shape={self.s2.shape}, rate={self.s2.rate}"
            )
        if not isinstance(self.sigma2, (Reciprocal, ScaledInvChi2)):
            raise ModelError(
                f"bad model: the prior on the shared sigma^2 must be 1/sigma^2 or scaled-inv-chi2; "
                f"found {self.sigma2!r}"
            )
        if isinstance(self.sigma2, ScaledInvChi2):
            if self.within != "shared":
                raise ModelError(
                    "bad model: a prior on sigma^2 (sigma2) is for the shared structure only; found "
                    f"within='{self.within}' (separate: priors s2 and nu; known: no sigma to give a "
                    "prior)"
                )
            if not all(
                isinstance(x, (int, float)) and math.isfinite(x) and x > 0
                for x in (self.sigma2.dof, self.sigma2.scale2)
            ):
                raise ModelError(
                    "bad model: the scaled-inv-chi2 prior on sigma^2 needs dof > 0 and scale2 > 0, "
                    f"both finite; found dof={self.sigma2.dof!r}, scale2={self.sigma2.scale2!r}"
                )
        if isinstance(self.nu, NuFixed) and not (math.isfinite(self.nu.value) and self.nu.value > 0):
            raise ModelError(f"bad model: nu must be a positive number; found {self.nu.value}")
        if isinstance(self.nu, NuGrid):
            vals = np.asarray(self.nu.values, dtype=float)
            if vals.size == 0 or not np.all(np.isfinite(vals)) or np.any(vals <= 0):
                raise ModelError(f"bad model: the nu grid must hold positive numbers; found {self.nu.values}")
            if self.nu.weights is not None:
                w = np.asarray(self.nu.weights, dtype=float)
                if w.shape != vals.shape or np.any(w < 0) or not np.isfinite(w).all() or w.sum() <= 0:
                    raise ModelError(
                        "bad model: the nu grid weights must be one non-negative number per grid point, "
                        f"not all zero; found {self.nu.weights}"
                    )

    def priors(self) -> dict[str, str]:
        """Plain statements of every prior in force, for summaries and reports."""
        out = {"between": self.between.describe(), "mu": self.mu.describe(), "tau": self.tau.describe()}
        for x in self.predictors:
            prior = (x.prior or self.effects).describe()
            what = (
                f"categorical '{x.column}', contrasts against the reference level "
                + (f"'{x.reference}'" if x.reference is not None else "with the most groups")
                if isinstance(x, Category)
                else f"numeric '{x.column}', centred at its mean over the groups"
            )
            out[f"effects of {x.column}"] = f"{prior} ({what})"
        if self.within == "separate":
            out["s2"] = self.s2.describe()
            out["nu"] = self.nu.describe()
        elif self.within == "shared":
            out["sigma"] = "p(log sigma) flat" if isinstance(self.sigma2, Reciprocal) else self.sigma2.describe()
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

        out = {
            "within": self.within,
            "between": enc_between(self.between),
            "mu": enc(self.mu),
            "tau": enc(self.tau),
            "s2": enc(self.s2),
            "nu": enc(self.nu),
        }
        if self.predictors:  # written only when there are predictors: earlier records stay as they were

            def enc_pred(x):
                d = {"kind": x.kind, "column": x.column}
                if x.kind == "category":
                    d["reference"] = x.reference
                    d["levels"] = None if x.levels is None else list(x.levels)
                d["prior"] = None if x.prior is None else enc(x.prior)
                return d

            out["predictors"] = [enc_pred(x) for x in self.predictors]
            out["effects"] = enc(self.effects)
        if isinstance(self.sigma2, ScaledInvChi2):  # written only when proper: earlier records stay as they were
            out["sigma2"] = enc(self.sigma2)
        return out

    @staticmethod
    def from_dict(d: dict) -> Model:
        """The inverse of to_dict. A record without 'between' (written before heavy tails existed) was a normal fit."""
        kinds = {
            c.__name__: c
            for c in (
                Flat,
                Normal,
                HalfNormal,
                HalfCauchy,
                Reciprocal,
                Gamma,
                NuFixed,
                NuGrid,
                NormalBetween,
                HeavyBetween,
                ScaledInvChi2,
            )
        }

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
        preds = tuple(_decode_predictor(x) for x in d.get("predictors", ()))
        effects = dec(d["effects"]) if "effects" in d else Flat()
        sigma2 = dec(d["sigma2"]) if "sigma2" in d else Reciprocal()
        return Model(
            d["within"],
            dec(d["mu"]),
            dec(d["tau"]),
            dec(d["s2"]),
            dec(d["nu"]),
            between=between,
            predictors=preds,
            effects=effects,
            sigma2=sigma2,
        )


# ---------------------------------------------------------------------------------------------
# the problem handed to the sampler

MU_FLAT, MU_NORMAL = 0, 1
TAU_FLAT, TAU_HALFNORMAL, TAU_HALFCAUCHY = 0, 1, 2
WITHIN_CODE = {"separate": 0, "shared": 1, "known": 2}


@dataclass(frozen=True, eq=False)
class Design:
    """The group-level predictors of a problem, as the kernel reads them and as the answers name them.

    X (J, p), internal units, one column per coefficient: a contrast column is 1 for the groups of its level and 0
    for the others; a numeric column is (x - centre) / unit_scale, unit_scale a power of two near the column's
    spread (so the rescaling is lossless). A coefficient in the user's units is its internal value times
    to_user: the data's scale for a contrast, scale / unit_scale for a numeric column (per unit of the column).

    coefficients: per column {name, column, kind, level, reference} or {name, column, kind, centre, unit_scale};
    categories: per categorical predictor {column, levels (reference first, then sorted), reference, index (J,)};
    numerics: per numeric predictor {column, centre, unit_scale, values (J,), in the user's units};
    levels: the combined level of each group over the categorical predictors ('B', or 'B / north'), their names
    (`level_names`, the reference combination first), each group's index (`level_of`) and each level's x row
    at the numeric predictors' means (`level_x`, (L, p)); empty without a categorical predictor.
    """

    X: np.ndarray
    coefficients: tuple[dict, ...]
    to_user: np.ndarray
    categories: tuple[dict, ...]
    numerics: tuple[dict, ...]
    level_names: tuple[str, ...]
    level_of: np.ndarray
    level_x: np.ndarray

    @property
    def p(self) -> int:
        return int(self.X.shape[1])

    @property
    def names(self) -> list[str]:
        return [c["name"] for c in self.coefficients]

    def subset(self, idx) -> Design:
        idx = np.asarray(idx, dtype=np.int64)
        cats = tuple(dict(c, index=c["index"][idx]) for c in self.categories)
        nums = tuple(dict(c, values=c["values"][idx]) for c in self.numerics)
        return Design(
            np.ascontiguousarray(self.X[idx]),
            self.coefficients,
            self.to_user,
            cats,
            nums,
            self.level_names,
            self.level_of[idx] if self.level_of.size else self.level_of,
            self.level_x,
        )


@dataclass(frozen=True, eq=False)
class Problem:
    """Data and priors in internal units, y' = (y - center) / scale, as the kernel reads them (`data`, one
    kernel.Data), with the statistics and the specification they came from; `design` holds the group-level
    predictors (None without)."""

    model: Model
    stats: GroupStats
    center: float
    scale: float
    data: kernel.Data
    design: Design | None = None

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

    def subset(self, idx) -> Problem:
        """The same problem restricted to the groups at positions `idx` (the same centre, scale and priors):
        what the answers of a subset of groups (summary mode's kept groups) are computed against."""
        from . import kernel

        idx = np.asarray(idx, dtype=np.int64)
        d = self.data
        n = np.ascontiguousarray(d.n[idx])
        table, layout = kernel.prepare(n, d.nu_grid)
        design = None if self.design is None else self.design.subset(idx)
        data = d._replace(
            n=n,
            ybar=np.ascontiguousarray(d.ybar[idx]),
            m2=np.ascontiguousarray(d.m2[idx]),
            v_known=np.ascontiguousarray(d.v_known[idx]),
            nu_table=table,
            layout=layout,
        )
        if design is not None:
            data = data._replace(X=design.X, XT=np.ascontiguousarray(design.X.T))
        return Problem(self.model, self.stats.subset(idx), self.center, self.scale, data, design)


def _refuse(msg: str):
    raise ModelError(msg)


def _check_statistics(stats: GroupStats):
    """Statistics made by hand (not by the readers, which check their input) are checked once here:
    a NaN or a zero n would otherwise reach the kernel and come back as meaningless draws."""
    if len(set(stats.labels)) != stats.J or not all(isinstance(lab, str) for lab in stats.labels):
        _refuse("bad model: the group labels must be distinct strings")
    check_unicode_twins(stats.labels, stats.source)  # every path to the sampler passes here
    checks: list[tuple[str, Any, Any, str]] = [
        ("n", stats.n, stats.n > 0 if stats.kind == "raw" else stats.n >= 0, "a size above 0"),
        ("mean", stats.mean + stats.mean_lo, None, "a finite mean"),
        ("m2", stats.m2, stats.m2 >= 0, "a sum of squared deviations >= 0"),
    ]
    if stats.kind == "known":
        checks.append(("se", _se(stats), _se(stats) > 0, "a standard error above 0"))
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
        _refuse(
            "bad model: the 'known' structure needs one estimate and one standard error per group; "
            "these data are measurements: use --within separate or shared"
        )
    if model.within != "known" and stats.kind == "known":
        _refuse(
            f"bad model: estimates with standard errors can only be fitted with the 'known' structure; found '{model.within}'"
        )
    if isinstance(model.tau, Flat) and J < 3:
        _refuse(
            f"bad model: a flat prior on tau gives an improper posterior with fewer than 3 groups (found {J}); "
            "use a proper prior instead, for example a half-Cauchy or half-normal with a scale near the spread "
            "you expect between groups (--tau half-cauchy:SCALE or --tau half-normal:SCALE)"
        )
    if model.within == "shared":
        df = stats.N - J
        if df < 1 or float(np.sum(stats.m2)) <= 0.0:
            _refuse(
                "bad model: a shared within-group variance needs replication (some group with two or more "
                f"measurements that differ); found {stats.N} measurements in {J} groups with "
                f"{'no spread' if df >= 1 else 'one measurement each'}. Supply replicated measurements, or give "
                "each group's standard error and use --within known"
            )
    if model.within == "separate" and isinstance(model.s2, Reciprocal):
        if not np.any((stats.n >= 2) & (stats.m2 > 0)):
            _refuse(
                "bad model: separate within-group variances with p(s^2) ∝ 1/s^2 need at least one group with two "
                "or more measurements that differ; found none. Supply replicated measurements, put a proper "
                "gamma prior on s^2 (--s2 gamma:SHAPE:RATE), or use --within known with standard errors"
            )


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
    design = _design(stats, model, scale * stats.unit) if model.predictors else None
    ybar = ((stats.mean - center) + stats.mean_lo) / scale
    n = stats.n.astype(np.float64)
    m2 = stats.m2 / (scale * scale)
    v_known = (_se(stats) / scale) ** 2 if stats.kind == "known" else np.zeros(stats.J)
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
    if model.within == "separate" and isinstance(model.s2, Gamma):
        s2_shape, s2_rate = model.s2.shape, model.s2.rate * scale * scale
    if model.within == "shared" and isinstance(model.sigma2, ScaledInvChi2):
        # the same two inputs carry the shared sigma^2's inverse gamma (shape dof/2, scale dof scale2 / 2); in
        # internal units sigma^2 / scale^2, so the inverse gamma's scale is divided by scale^2
        s2_shape = 0.5 * model.sigma2.dof
        s2_rate = 0.5 * model.sigma2.dof * model.sigma2.scale2 / (scale * scale)
        if not (math.isfinite(s2_rate) and s2_rate > 0):
            _refuse(
                f"bad model: the prior on sigma^2, {model.sigma2.describe()}, is out of range for these data (its "
                f"scale is {model.sigma2.scale2:g} against a data spread near {scale:g}); give scale2 near the "
                "variance you expect within a group"
            )
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
        within=int(WITHIN_CODE[model.within]),
        n=np.ascontiguousarray(n),
        ybar=np.ascontiguousarray(ybar, dtype=np.float64),
        m2=np.ascontiguousarray(m2, dtype=np.float64),
        v_known=np.ascontiguousarray(v_known, dtype=np.float64),
        mu_kind=int(mu_kind),
        mu_loc=float(mu_loc),
        mu_scale=float(mu_scale),
        tau_kind=int(tau_kind),
        tau_scale=float(tau_scale),
        s2_shape=float(s2_shape),
        s2_rate=float(s2_rate),
        nu_grid=grid,
        nu_logprior=np.asarray(logp, dtype=np.float64),
        nu_table=table,
        layout=layout,
        between=int(between),
        df_grid=df_grid,
        df_logprior=df_logprior,
        df_const=kernel.t_constants(df_grid),
        df_logq=kernel.t_quartile_logs(df_grid),
    )
    if design is not None:
        loc, prec = _effect_priors(model, design)
        data = data._replace(X=design.X, XT=np.ascontiguousarray(design.X.T), beta_loc=loc, beta_prec=prec)
    return Problem(model, stats, center, scale, data, design)


# ---------------------------------------------------------------------------------------------
# group-level predictors: the design, and what the data cannot identify


def _design(stats: GroupStats, model: Model, scale: float) -> Design:
    """The design of `model`'s predictors on `stats` (see Design), refusing what the data cannot identify:
    a column not read, a stated level with no groups, a predictor with one value, predictors that cannot be
    told apart, and more coefficients than the groups allow."""
    J = stats.J
    have = stats.columns
    cols: list[np.ndarray] = []
    coefs: list[dict] = []
    to_user: list[float] = []
    cats: list[dict] = []
    nums: list[dict] = []
    for x in model.predictors:
        if x.column not in have:
            read = ", ".join(f"'{c}'" for c in have) or "none were read"
            _refuse(
                f"bad model: the predictor '{x.column}' is not among the data's group-level columns ({read}); "
                "read it with the statistics (--category or --numeric on the command line; group_columns=[...] "
                "in pooling.read_table and the other readers)"
            )
        values = have[x.column]
        if isinstance(x, Category):
            counts: dict[str, int] = {}
            for v in values:
                counts[v] = counts.get(v, 0) + 1
            found = sorted(counts)
            if x.levels is not None:
                empty = [lv for lv in x.levels if lv not in counts]
                if empty:
                    _refuse(
                        f"bad model: the level {_show(empty[0])} of '{x.column}' has no groups (the levels found "
                        f"are {_levels_text(found)}); a level without groups has no effect to estimate: drop it "
                        "from the stated levels"
                    )
                extra = [lv for lv in found if lv not in x.levels]
                if extra:
                    _refuse(
                        f"bad model: groups hold the level {_show(extra[0])} of '{x.column}', which is not among "
                        f"the stated levels {_levels_text(x.levels)}; state every level, or none"
                    )
            if x.reference is not None and x.reference not in counts:
                _refuse(
                    f"bad model: the reference level {_show(x.reference)} of '{x.column}' has no groups (the "
                    f"levels found are {_levels_text(found)}); choose one of those"
                )
            if len(found) < 2:
                _refuse(
                    f"bad model: the categorical predictor '{x.column}' has the one level {_show(found[0])} in "
                    "every group, so it cannot explain why groups differ; drop it"
                )
            ref = x.reference if x.reference is not None else max(found, key=lambda lv: (counts[lv], -found.index(lv)))
            order = [ref] + [lv for lv in found if lv != ref]
            index = np.array([order.index(v) for v in values], dtype=np.int64)
            for k, lv in enumerate(order[1:], start=1):
                cols.append((index == k).astype(np.float64))
                coefs.append(
                    {
                        "name": f"{x.column}: {lv} vs {ref}",
                        "column": x.column,
                        "kind": "category",
                        "level": lv,
                        "reference": ref,
                        "groups": counts[lv],
                    }
                )
                to_user.append(scale)
            cats.append(
                {
                    "column": x.column,
                    "levels": tuple(order),
                    "reference": ref,
                    "index": index,
                    "groups": tuple(counts[lv] for lv in order),
                }
            )
        else:
            nv = np.empty(J)
            for j, v in enumerate(values):
                try:
                    nv[j] = float(v)
                except ValueError:
                    nv[j] = np.nan
                if not math.isfinite(nv[j]):
                    _refuse(
                        f"bad model: the numeric predictor '{x.column}' has {_show(v)} for group "
                        f"{_show(stats.labels[j])}; expected a finite number (make it a categorical predictor if "
                        "its values are names)"
                    )
            centre = float(np.mean(nv))
            spread = float(np.sqrt(np.mean((nv - centre) ** 2)))
            if not spread > 1e-12 * max(1.0, abs(centre)):
                _refuse(
                    f"bad model: the numeric predictor '{x.column}' is {nv[0]:g} in every group, so it cannot "
                    "explain why groups differ (it cannot be told apart from mu); drop it"
                )
            unit_scale = 2.0 ** round(math.log2(spread))
            cols.append((nv - centre) / unit_scale)
            coefs.append(
                {"name": x.column, "column": x.column, "kind": "numeric", "centre": centre, "unit_scale": unit_scale}
            )
            to_user.append(scale / unit_scale)
            nums.append({"column": x.column, "centre": centre, "unit_scale": unit_scale, "values": nv})
    X = np.ascontiguousarray(np.column_stack(cols), dtype=np.float64)
    _check_design(X, coefs, stats, model)
    if cats:
        combo = np.stack([c["index"] for c in cats], axis=1)
        uniq, level_of = np.unique(combo, axis=0, return_inverse=True)  # sorted: the reference combination first
        names = tuple(" / ".join(c["levels"][i] for c, i in zip(cats, row)) for row in uniq)
        level_x = np.zeros((len(uniq), X.shape[1]))  # numeric columns stay 0: their mean over the groups
        where = {c["column"]: i for i, c in enumerate(cats)}
        for k, coef in enumerate(coefs):
            if coef["kind"] == "category":
                i = where[coef["column"]]
                level_x[:, k] = (uniq[:, i] == cats[i]["levels"].index(coef["level"])).astype(float)
        level_of = np.asarray(level_of, dtype=np.int64).reshape(-1)
    else:
        names, level_of, level_x = (), np.zeros(0, dtype=np.int64), np.zeros((0, X.shape[1]))
    return Design(X, tuple(coefs), np.asarray(to_user), tuple(cats), tuple(nums), names, level_of, level_x)


def _levels_text(levels) -> str:
    shown = ", ".join(_show(lv, 30) for lv in list(levels)[:10])
    return shown + (", ..." if len(levels) > 10 else "")


def _check_design(X: np.ndarray, coefs: list[dict], stats: GroupStats, model: Model) -> None:
    """Refuse predictors the groups cannot tell apart (a column that is a combination of mu and the columns
    before it) and more coefficients than the groups allow (see the README's model section)."""
    J, p = X.shape
    Z = np.column_stack([np.ones(J), X])
    for k in range(1, p + 1):
        sv = np.linalg.svd(Z[:, : k + 1], compute_uv=False)
        if sv[-1] <= 1e-9 * sv[0]:
            _refuse(
                f"bad model: the predictor column '{coefs[k - 1]['name']}' cannot be told apart from mu and the "
                "predictors before it in these groups (two categorical columns that split the groups the same "
                "way, or a numeric column that follows a categorical one); drop one of them"
            )
    flat = 1 + sum(1 for prior in _prior_of_each(model, coefs) if isinstance(prior, Flat))
    need = flat + (2 if isinstance(model.tau, Flat) else 1)
    if J < need:
        tau_txt = (
            "a flat prior on tau needs at least 2 groups beyond the flat coefficients"
            if isinstance(model.tau, Flat)
            else "the between-group spread needs at least 1 group beyond the flat coefficients"
        )
        _refuse(
            f"bad model: {flat} coefficients with flat priors (mu and {flat - 1} effects) are too many for {J} "
            f"groups: {tau_txt}. Use fewer predictors or levels"
            + (", a proper prior on tau (--tau half-normal:SCALE)" if isinstance(model.tau, Flat) else "")
            + ", or a normal prior on the effects (--effects normal:SCALE)"
        )


def _prior_of_each(model: Model, coefs: list[dict]) -> list:
    by_column = {x.column: (x.prior or model.effects) for x in model.predictors}
    return [by_column[c["column"]] for c in coefs]


def _effect_priors(model: Model, design: Design) -> tuple[np.ndarray, np.ndarray]:
    """Per coefficient, the prior's centre and precision in internal units (precision 0: flat). A normal prior stated
    in the user's units, N(loc, scale^2), is N(loc / to_user, (scale / to_user)^2) on the internal coefficient."""
    p = design.p
    loc, prec = np.zeros(p), np.zeros(p)
    for k, prior in enumerate(_prior_of_each(model, list(design.coefficients))):
        if isinstance(prior, Normal):
            u = design.to_user[k]
            loc[k] = prior.loc / u
            prec[k] = (u / prior.scale) ** 2
    return loc, prec


def _se(stats: GroupStats) -> np.ndarray:
    """The standard errors of a table of known-variance groups (checked present by `check_stats`)."""
    if stats.se is None:
        raise ValueError("a table of kind 'known' without standard errors")
    return stats.se


def _center_scale(stats: GroupStats) -> tuple[float, float]:
    """An offset and scale (in the stored unit) that make the data of order one; a power-of-two scale keeps
    rescaling lossless."""
    w = stats.n.astype(float) if stats.kind == "raw" and stats.N > 0 else np.ones(stats.J)
    center = float(np.median(stats.mean))
    dev = (stats.mean - center) + stats.mean_lo
    if stats.kind == "known":
        spread2 = float(np.mean(dev * dev) + np.mean(_se(stats) ** 2))
    else:
        spread2 = float((np.sum(stats.m2) + np.sum(w * dev * dev)) / max(np.sum(w), 1.0))
    if not (spread2 > 0 and math.isfinite(spread2)):
        spread2 = 1.0 if center == 0 else (abs(center) * 1e-3) ** 2 if math.isfinite(center) else 1.0
    scale = 2.0 ** round(math.log2(math.sqrt(spread2)))
    return center, scale
