"""pooling: compare many groups at once with a partial-pooling normal model.

The public surface, in the order of the flow:

    stats = pooling.read_table("parts.csv", group="supplier", value="strength")
    model = pooling.Model(within="separate")            # priors: see pooling.model
    fit = pooling.fit(stats, model, pooling.Settings(chains=4, draws=1000, seed=1))
    fit.idata.posterior["theta"]                        # labelled draws (arviz InferenceData)
"""
from __future__ import annotations

from . import _compat  # noqa: F401  (silences arviz's import-time refactor notice, nothing else)
from .errors import InputError, ModelError, PoolingError
from .model import Flat, Gamma, HalfCauchy, HalfNormal, Model, Normal, NuFixed, NuGrid, Reciprocal, build
from .sampler import Settings, Targets
from .stats import GroupStats, from_estimates, from_frame, from_summaries, merge, read_table

__version__ = "0.1.0"


def fit(stats: GroupStats, model: Model | None = None, settings: Settings | None = None,
        progress: bool | None = None, init=None):
    """Build the problem, sample it with run-length control, and return a labelled `Fit`."""
    from .posterior import finish
    from .sampler import sample_raw

    problem = build(stats, model)
    raw = sample_raw(problem, settings, progress=progress, init=init)
    return finish(raw, problem)


__all__ = [
    "GroupStats", "read_table", "from_frame", "from_summaries", "from_estimates", "merge",
    "Model", "Flat", "Normal", "HalfNormal", "HalfCauchy", "Reciprocal", "Gamma", "NuFixed", "NuGrid", "build",
    "Settings", "Targets", "fit", "InputError", "ModelError", "PoolingError", "__version__",
]
