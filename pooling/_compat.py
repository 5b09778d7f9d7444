"""Import arviz without its import-time notice about a coming refactor.

arviz 0.2x emits one FutureWarning when imported, addressed to library authors. Our users cannot
act on it, so it is filtered here, once, by its exact category, module and message start; every
other warning from arviz still shows.
"""

from __future__ import annotations

import warnings

with warnings.catch_warnings():
    warnings.filterwarnings(
        "ignore",
        message=r"\s*ArviZ is undergoing a major refactor",
        category=FutureWarning,
        module=r"arviz(\..*)?",
    )
    import arviz  # noqa: E402

az = arviz
__all__ = ["az"]
