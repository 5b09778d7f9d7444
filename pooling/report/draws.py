"""A flat view of a fit's draws for the reporter: every array is (samples, ...) in user units.

The reporter reads a `Fit` (or an arviz InferenceData with the layout of pooling.posterior, for
example one re-opened from a run's draws.nc) and never touches the sampler. The within-group
structure is read from the draws themselves: sigma per group means `separate`, one sigma means
`shared`, no sigma means `known`.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Groups are processed in column blocks of this many, so that per-draw quantities such as
# v_j / (v_j + tau^2) never need a second (samples x groups) array at J = 10,000.
BLOCK = 1024


@dataclass(frozen=True, eq=False)
class View:
    """Draws stacked over chains: mu, tau (S,); theta (S, J); sigma (S, J), (S,) or None; s, nu (S,) or None."""

    labels: tuple[str, ...]
    within: str
    mu: np.ndarray
    tau: np.ndarray
    theta: np.ndarray
    sigma: np.ndarray | None
    s: np.ndarray | None
    nu: np.ndarray | None
    n: np.ndarray
    raw_mean: np.ndarray
    raw_sd: np.ndarray | None
    std_error: np.ndarray | None
    chains: int

    @property
    def S(self) -> int:
        return self.mu.shape[0]

    @property
    def J(self) -> int:
        return self.theta.shape[1]

    def sigma_block(self, a: int, b: int) -> np.ndarray | None:
        """Within-group sd draws for groups a..b-1, broadcastable to (S, b - a); None for `known`."""
        if self.sigma is None:
            return None
        if self.sigma.ndim == 1:
            return self.sigma[:, None]
        return self.sigma[:, a:b]

    def v_block(self, a: int, b: int) -> np.ndarray:
        """v_j = sigma_j^2 / n_j per draw (separate, shared), or se_j^2 (known), for groups a..b-1."""
        if self.sigma is None:
            return (self.std_error[a:b] ** 2)[None, :]
        sig = self.sigma_block(a, b)
        return sig * sig / self.n[a:b][None, :]


def _stack(x: np.ndarray) -> np.ndarray:
    return x.reshape((-1,) + x.shape[2:])


def parts_of(fit) -> dict:
    """The draws of a `Fit` (its `parts`), of a dict of posterior.Part, or of an InferenceData laid out as
    pooling writes it, as {group: Part}."""
    if isinstance(fit, dict):
        return fit
    parts = getattr(fit, "parts", None)
    if parts is not None:
        return parts
    from ..posterior import parts_from_idata

    return parts_from_idata(fit)


def view(fit) -> View:
    """Build the reporter's view of a `Fit`, of its parts, or of an InferenceData laid out as pooling writes it."""
    parts = parts_of(fit)
    post, const = parts["posterior"], parts["constant_data"]
    labels = tuple(str(x) for x in post.coords["group"])
    theta = _stack(post["theta"])
    sigma = _stack(post["sigma"]) if "sigma" in post else None
    if sigma is None:
        within = "known"
    else:
        within = "separate" if sigma.ndim == 2 else "shared"
    get = lambda name: _stack(post[name]) if name in post else None  # noqa: E731
    return View(
        labels=labels, within=within, mu=_stack(post["mu"]), tau=_stack(post["tau"]),
        theta=theta, sigma=sigma, s=get("s"), nu=get("nu"),
        n=np.asarray(const["n"], dtype=np.float64), raw_mean=np.asarray(const["raw_mean"], dtype=np.float64),
        raw_sd=np.asarray(const["raw_sd"], dtype=np.float64) if "raw_sd" in const else None,
        std_error=np.asarray(const["std_error"], dtype=np.float64) if "std_error" in const else None,
        chains=int(post.coords["chain"].shape[0]),
    )


def interval(x: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Central credible interval over the draws (axis 0): the (1 - level)/2 and (1 + level)/2
    quantiles, numpy's default linear interpolation between order statistics."""
    x = np.asarray(x)
    if x.ndim == 2:
        # selecting along contiguous memory is several times faster than down the columns
        x = np.array(x.T, order="C")  # always a fresh copy, so numpy may partition it in place
        lo, hi = np.quantile(x, [(1 - level) / 2, (1 + level) / 2], axis=1, overwrite_input=True)
    else:
        lo, hi = np.quantile(x, [(1 - level) / 2, (1 + level) / 2], axis=0)
    return lo, hi
