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
    values = {
        "P1": [10.1, 10.4, 9.8, 10.0],
        "P2": [10.9, 11.2],
        "P3": [9.5, 9.9, 9.7, 9.6, 9.8],
        "P4": [10.3, 10.2, 10.6],
        "P5": [10.0, 10.8],
    }
    for g, vs in values.items():
        rows += [f"{g},{v}" for v in vs]
    p = tmp_path / "plants.csv"
    p.write_text("\n".join(rows) + "\n")
    return p


# ---------------------------------------------------------------------------------------------
# the store tests run on both stores: the embedded SQLite file and a throwaway PostgreSQL cluster

STORE_BACKENDS = ["sqlite", "postgresql"]


@pytest.fixture(scope="session")
def pg_cluster():
    """A PostgreSQL cluster of our own for the whole session (tests/pg_cluster.py), or a skip that says why.
    With CI set, a missing server is a failure: CI must run these tests."""
    from pg_cluster import Cluster, why_unavailable

    why = why_unavailable()
    if why:
        if os.environ.get("CI"):
            pytest.fail(f"the PostgreSQL store tests cannot run: {why}")
        pytest.skip(f"the PostgreSQL store tests need a server: {why}")
    cluster = Cluster()
    before = os.environ.get("PGPASSFILE")
    os.environ.update(cluster.env())  # the password file; subprocesses inherit it
    try:
        yield cluster
    finally:
        cluster.destroy()
        if before is None:
            os.environ.pop("PGPASSFILE", None)
        else:
            os.environ["PGPASSFILE"] = before


@pytest.fixture(scope="module", params=STORE_BACKENDS)
def backend(request):
    """The store implementation a store test runs on."""
    if request.param == "postgresql":
        request.getfixturevalue("pg_cluster")
    return request.param


def _new_location(request, backend: str, folder, name: str) -> str:
    if backend == "postgresql":
        return request.getfixturevalue("pg_cluster").new_url()
    return str(folder / f"{name}.store")


@pytest.fixture
def new_store(request, backend, tmp_path):
    """A factory of fresh, not yet existing stores on this test's backend: new_store() -> store argument."""
    return lambda name="s": _new_location(request, backend, tmp_path, name)


@pytest.fixture(scope="module")
def new_module_store(request, backend, tmp_path_factory):
    """The same, for module-scoped fixtures."""
    folder = tmp_path_factory.mktemp("stores")
    return lambda name="s": _new_location(request, backend, folder, name)
