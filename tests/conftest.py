"""Shared fixtures. Data here are small invented tables for exercising the edges (not for checking
statistics: the statistical tests name their outside references)."""
from __future__ import annotations

import os

import pytest
from hypothesis import settings

# Property tests explore new examples on a developer's machine; in CI (the environment variable CI set)
# the examples are derandomised, so that a run on a clean clone cannot fail by the luck of the draw.
settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")

# Keep numba's compiled kernel in one cache for the whole run (and the CLI subprocesses).
os.environ.setdefault("NUMBA_CACHE_DIR", os.path.join(os.path.dirname(__file__), "..", ".numba-cache"))


@pytest.fixture
def run_cli(capsys):
    """Run the command line in-process; return (exit code, stdout, stderr)."""
    from pooling.cli import main

    def run(*argv):
        code = main([str(a) for a in argv])
        out, err = capsys.readouterr()
        return code, out, err

    return run


@pytest.fixture
def small_csv(tmp_path):
    """A tiny long table: five groups of uneven size."""
    rows = ["plant,thickness"]
    values = {"P1": [10.1, 10.4, 9.8, 10.0], "P2": [10.9, 11.2], "P3": [9.5, 9.9, 9.7, 9.6, 9.8],
              "P4": [10.3, 10.2, 10.6], "P5": [10.0, 10.8]}
    for g, vs in values.items():
        rows += [f"{g},{v}" for v in vs]
    p = tmp_path / "plants.csv"
    p.write_text("\n".join(rows) + "\n")
    return p
