"""pooling: compare many groups at once with a partial-pooling normal model.

The public surface, in the order of the flow:

    stats = pooling.read_table("parts.csv", group="supplier", value="strength")
    model = pooling.Model(within="separate")            # priors: see pooling.model
    fit = pooling.fit(stats, model, pooling.Settings(chains=4, draws=1000, seed=1))
    res = pooling.results.compute(fit, pooling.ReportOptions(threshold=400.0))
    res.table                                           # every group's answers
    fit.idata.posterior["theta"]                        # labelled draws (arviz InferenceData)
"""

from __future__ import annotations

import importlib

__version__ = "0.2.0"  # the one place the version is kept (pyproject.toml reads it)

# Names are imported on first use: `pooling --help` and a Ctrl-C at start-up do not wait for numpy,
# numba and arviz to load.
_LAZY = {
    "InputError": "errors",
    "ModelError": "errors",
    "PoolingError": "errors",
    "Flat": "model",
    "Gamma": "model",
    "HalfCauchy": "model",
    "HalfNormal": "model",
    "Model": "model",
    "Normal": "model",
    "NuFixed": "model",
    "NuGrid": "model",
    "Reciprocal": "model",
    "build": "model",
    "NormalBetween": "model",
    "HeavyBetween": "model",
    "ReportOptions": "asked",
    "Category": "model",
    "Numeric": "model",
    "ScaledInvChi2": "model",
    "Settings": "sampler",
    "Targets": "sampler",
    "GroupStats": "stats",
    "from_estimates": "stats",
    "from_frame": "stats",
    "from_summaries": "stats",
    "merge": "stats",
    "read_table": "stats",
}


_SUBMODULES = ("results", "report", "posterior", "summary", "sampler", "model", "stats", "diagnostics")


def __getattr__(name: str):
    if name in _SUBMODULES:
        return importlib.import_module(f".{name}", __name__)
    if name in _LAZY:
        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'pooling' has no attribute '{name}'")


def fit(
    stats,
    model=None,
    settings=None,
    progress: bool | None = None,
    init=None,
    *,
    summary=None,
    options=None,
    keep=None,
    without: bool = True,
):
    """Build the problem, sample it with run-length control, and return the run.

    stats: a GroupStats; model: a Model (default Model()); settings: a Settings (default Settings()).
    summary: None (automatic above pooling.summary.AUTO_GROUPS groups), True or False: summary mode,
    which returns a pooling.summary.SummaryFit; options (pooling.ReportOptions) and keep (labels, or a
    pooling.summary.SummaryOptions) are read in summary mode only, where some answers are counted while
    the chains run. Otherwise a pooling.posterior.Fit. pooling.results.compute(run, options) gives the answers.

    With group-level predictors (model.predictors) the same data are also fitted without them (the same model
    and settings, no predictors, a seed derived from the run's own and no warm start), kept as `run.without`:
    the between-group spread with and without the predictors is what they explain. without=False skips it.
    """
    from .model import build
    from .posterior import finish
    from .sampler import sample_raw

    problem = build(stats, model)
    from .summary import fit_summary, wants_summary

    if wants_summary(problem, settings, summary):
        run = fit_summary(problem, settings, options, keep, progress=progress, init=init)
    else:
        run = finish(sample_raw(problem, settings, progress=progress, init=init), problem)
    if problem.design is not None and without:
        run.without = _fit_without(stats, problem.model, settings, run.raw.seed, progress, summary, options, keep)
    return run


def _fit_without(stats, model, settings, seed: int, progress, summary, options, keep):
    """The plain fit beside a fit with predictors: the model without them, the settings with a derived seed."""
    import dataclasses

    from .asked import PURPOSE_WITHOUT, derived_rng
    from .sampler import Settings

    plain = dataclasses.replace(model, predictors=())
    derived = int(derived_rng(seed, PURPOSE_WITHOUT).integers(2**62))
    settings = dataclasses.replace(settings or Settings(), seed=derived)
    return fit(stats, plain, settings, progress, None, summary=summary, options=options, keep=keep, without=False)


__all__ = [
    "GroupStats",
    "read_table",
    "from_frame",
    "from_summaries",
    "from_estimates",
    "merge",
    "Model",
    "Flat",
    "Normal",
    "HalfNormal",
    "HalfCauchy",
    "Reciprocal",
    "Gamma",
    "NuFixed",
    "NuGrid",
    "build",
    "NormalBetween",
    "HeavyBetween",
    "ReportOptions",
    "Category",
    "Numeric",
    "ScaledInvChi2",
    "Settings",
    "Targets",
    "fit",
    "InputError",
    "ModelError",
    "PoolingError",
    "__version__",
]
