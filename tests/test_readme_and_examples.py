"""Every command in the README and every script in examples/ runs as written.

The README's shell blocks are run in a scratch folder where `.venv/bin/pooling` points at the
installed entry point and the files they name are small invented tables (FILES below). The demo
set-up command is run for real in a fresh venv (slow: it installs the package). The test command
is run by CI itself (.ci/run reads it out of the README); here we check that .ci/run does read it.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _blocks(lang: str) -> list[str]:
    return [m.group(1) for m in re.finditer(rf"```{lang}\n(.*?)```", README, re.S)]


def _marked(name: str) -> str:
    m = re.search(rf"<!-- {name} -->\s*```sh\n(.*?)```\s*<!-- /{name} -->", README, re.S)
    assert m, f"README has no {name} block"
    return m.group(1).strip()


def _long_table(n_groups=6, group="supplier", value="strength", seed=0) -> str:
    rng = np.random.default_rng(seed)
    rows = [f"{group},{value}"]
    for j in range(n_groups):
        for _ in range(int(rng.integers(2, 9))):
            rows.append(f"G{j},{rng.normal(400 + 3 * j, 8):.2f}")
    return "\n".join(rows) + "\n"


FILES = {
    "parts.csv": lambda: _long_table(),
    "summary.csv": lambda: (
        "lab,n,mean,sd\n" + "".join(f"L{j},{4 + j},{50 + 0.4 * j:.2f},{1 + 0.1 * j:.2f}\n" for j in range(7))
    ),
    "estimates.csv": lambda: (
        "site,effect,se\n" + "".join(f"S{j},{0.3 * (j % 4) - 0.2:.2f},{0.2 + 0.05 * j:.2f}\n" for j in range(9))
    ),
}
FILES["labs.csv"] = lambda: (
    "lab,method,age,fat\n"
    + "".join(
        f"L{j:02d},{'AB'[j % 2]},{2 + j % 5},{26.4 + 0.3 * (j % 2) + 0.01 * (j % 5) + 0.05 * ((i * 7 + j) % 3 - 1):.3f}\n"
        for j in range(10)
        for i in range(3)
    )
)
for day, reps in ((1, (0, 1)), (2, (2,))):  # the same labs with their method and age, on two days
    FILES[f"round-day-{day}.csv"] = lambda reps=reps: (
        "lab,method,age,fat\n"
        + "".join(
            f"L{j:02d},{'AB'[j % 2]},{2 + j % 5},{26.4 + 0.3 * (j % 2) + 0.01 * (j % 5) + 0.05 * ((i * 7 + j) % 3 - 1):.3f}\n"
            for j in range(10)
            for i in reps
        )
    )
for day in range(1, 4):
    FILES[f"batch-2026-12-0{day}.csv"] = lambda d=day: _long_table(group="supplier", value="strength", seed=d)


@pytest.fixture
def scratch(tmp_path):
    for name, make in FILES.items():
        (tmp_path / name).write_text(make())
    bin_dir = tmp_path / ".venv" / "bin"
    bin_dir.mkdir(parents=True)
    entry = Path(sys.executable).with_name("pooling")
    assert entry.exists(), "the pooling entry point is not installed beside this Python"
    (bin_dir / "pooling").symlink_to(entry)
    (bin_dir / "python").symlink_to(sys.executable)
    return tmp_path


def _run_sh(block: str, cwd: Path):
    env = dict(os.environ, NUMBA_CACHE_DIR=os.environ.get("NUMBA_CACHE_DIR", str(cwd / ".numba")))
    lines = [ln for ln in block.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    for line in lines:
        if ".venv/bin/pooling" not in line:
            pytest.fail(f"README shell line not covered by this test: {line}")
        cmd = line.replace(".venv/bin/pooling", ".venv/bin/pooling")
        if " fit " in f" {cmd} " or " refit " in f" {cmd} " or " demo" in cmd:
            cmd += " --draws 200 --warmup 200 --quiet" if "--quiet" not in cmd else ""
        proc = subprocess.run(["bash", "-c", cmd], cwd=cwd, capture_output=True, text=True, timeout=600, env=env)
        assert proc.returncode in (0, 3), f"{cmd}\n{proc.stdout}\n{proc.stderr}"
        assert "Traceback" not in proc.stderr


def test_every_readme_shell_block_runs(scratch):
    special = {_marked("demo-command"), _marked("test-command")}
    blocks = [b for b in _blocks("sh") if b.strip() not in special]
    assert blocks, "the README should show how to fit one's own data"
    for block in blocks:
        _run_sh(block, scratch)
    assert (scratch / "runs" / "parts-2026-12-01" / "summary.json").exists()


def test_readme_python_block_runs(scratch):
    for block in _blocks("python"):
        proc = subprocess.run([sys.executable, "-c", block], cwd=scratch, capture_output=True, text=True, timeout=600)
        assert proc.returncode == 0, proc.stderr


def test_ci_runs_the_readme_test_command():
    ci = (ROOT / ".ci" / "run").read_text()
    assert "test-command" in ci and "README.md" in ci
    cmd = _marked("test-command")
    assert "pip install" in cmd and "pytest" in cmd and "python3 -m venv" in cmd


@pytest.mark.slow
def test_demo_command_on_a_fresh_venv(tmp_path):
    """The README's first command, as written, in a copy of the checkout with no venv."""
    work = tmp_path / "checkout"
    files = subprocess.run(
        ["git", "ls-files", "--cached", "--others", "--exclude-standard"],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
    ).stdout.split()
    for f in files:
        src = ROOT / f
        if src.is_file():
            (work / f).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, work / f)
    cmd = _marked("demo-command")
    env = {k: v for k, v in os.environ.items() if not k.startswith(("VIRTUAL_ENV", "PYTHONPATH"))}
    proc = subprocess.run(["bash", "-c", cmd], cwd=work, capture_output=True, text=True, timeout=1500, env=env)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    for name in ("draws.nc", "summary.json", "groups.csv", "report.html"):
        assert (work / "demo-run" / name).exists(), name


EXAMPLES = sorted((ROOT / "examples").glob("*.py"))


@pytest.mark.parametrize("script", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_example_script_runs(script, tmp_path):
    args = [str(tmp_path / "example-run")] if "OUT_DIR" in script.read_text() else []
    proc = subprocess.run(
        [sys.executable, str(script), *args], cwd=tmp_path, capture_output=True, text=True, timeout=600
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip()
