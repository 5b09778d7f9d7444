"""Packaging details a user would notice."""

from __future__ import annotations

import subprocess
import sys


def test_arviz_refactor_notice_is_silenced_but_other_warnings_are_not():
    """arviz 0.2x prints a FutureWarning on import; our users never see it (issue: engine, set-up).

    The filter must be targeted: a FutureWarning raised afterwards by anyone still shows.
    """
    code = "import warnings, pooling.posterior, pooling.report\nwarnings.warn('still shown', FutureWarning)\n"
    proc = subprocess.run([sys.executable, "-W", "default", "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "refactor" not in proc.stderr
    assert "still shown" in proc.stderr


def test_package_imports_lightly():
    """`pooling --help` must not wait for numba: the package namespace loads its parts on first use."""
    code = "import sys, pooling.cli; print('numba' in sys.modules, 'arviz' in sys.modules)"
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.stdout.split() == ["False", "False"], proc.stdout + proc.stderr


def test_the_version_is_kept_in_one_place():
    # pyproject.toml reads the version from pooling/__init__.py; the installed metadata and the module agree
    import tomllib
    from importlib.metadata import version
    from pathlib import Path

    import pooling

    project = tomllib.loads((Path(__file__).resolve().parents[1] / "pyproject.toml").read_text())["project"]
    assert "version" not in project and "version" in project["dynamic"]
    assert version("pooling") == pooling.__version__
