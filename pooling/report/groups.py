"""Per-draw helpers kept for Python users of earlier versions: the fraction of a group's future measurements
outside specification limits. Every per-group answer is computed in pooling.answers and pooling.results."""

from __future__ import annotations

import numpy as np
from scipy.special import ndtr


def outside_fraction(theta, sigma, lower: float | None, upper: float | None) -> np.ndarray:
    """Per draw, P(y_new outside [lower, upper] | theta, sigma) = Phi((lower - theta)/sigma) + Phi((theta - upper)/sigma)
    for y_new ~ N(theta, sigma^2); a missing limit contributes nothing."""
    theta = np.asarray(theta, dtype=np.float64)
    out = np.zeros(np.broadcast_shapes(np.shape(theta), np.shape(sigma)))
    with np.errstate(over="ignore"):  # a limit near 1e308: the z overflows to +-inf, and Phi(+-inf) is exact
        if lower is not None:
            out += ndtr((lower - theta) / sigma)
        if upper is not None:
            out += ndtr((theta - upper) / sigma)
    return out
