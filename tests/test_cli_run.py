"""The run folder and exit codes of `pooling fit` (the README's "Exit codes" table is the contract)."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np

from pooling._compat import az


def _fit(run_cli, data, out, *extra):
    return run_cli(
        "fit",
        data,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        out,
        "--seed",
        "5",
        "--draws",
        "300",
        "--warmup",
        "200",
        "--quiet",
        *extra,
    )


def test_run_folder_contents(run_cli, small_csv, tmp_path):
    out = tmp_path / "run"
    code, _, err = _fit(run_cli, small_csv, out, "--max-draws", "300")
    assert code in (0, 3), err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["data"]["file_sha256"] == hashlib.sha256(small_csv.read_bytes()).hexdigest()
    assert summary["data"]["groups"] == 5 and summary["data"]["measurements"] == 16
    assert summary["model"]["within"] == "separate"
    assert summary["model"]["priors"]["mu"] == "flat" and summary["model"]["priors"]["tau"] == "flat"
    assert summary["model"]["priors"]["s2"].startswith("p(s^2)")
    assert summary["run"]["seed"] == 5 and summary["run"]["chains"] == 4
    assert set(summary["hyperparameters"]) == {"mu", "tau", "s", "nu"}
    assert "met" in summary["diagnostics"] and "worst" in summary["diagnostics"]
    idata = az.from_netcdf(str(out / "draws.nc"))
    assert list(idata.posterior["group"].values) == ["P1", "P2", "P3", "P4", "P5"]
    assert idata.posterior["theta"].shape == (4, 300, 5)
    # the summary's numbers are those of the stored draws
    tau = idata.posterior["tau"].values
    assert np.isclose(summary["hyperparameters"]["tau"]["mean"], tau.mean(), rtol=1e-12)
    assert not list(tmp_path.glob(".run.*"))


def test_same_seed_same_folder_contents(run_cli, small_csv, tmp_path):
    _fit(run_cli, small_csv, tmp_path / "a", "--max-draws", "300")
    _fit(run_cli, small_csv, tmp_path / "b", "--max-draws", "300", "--threads", "1")
    a = az.from_netcdf(str(tmp_path / "a" / "draws.nc")).posterior
    b = az.from_netcdf(str(tmp_path / "b" / "draws.nc")).posterior
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values)


def test_existing_folder_is_not_overwritten(run_cli, small_csv, tmp_path):
    out = tmp_path / "run"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    code, _, err = _fit(run_cli, small_csv, out)
    assert code == 6 and "exists" in err and "--replace" in err
    assert (out / "keep.txt").read_text() == "mine"
    # --replace takes only a run folder that pooling wrote (its marker): a folder of the user's is kept
    code, _, err = _fit(run_cli, small_csv, out, "--replace", "--max-draws", "300")
    assert code == 6 and "not a run folder written by pooling" in err
    assert (out / "keep.txt").read_text() == "mine" and not (out / "summary.json").exists()
    run = tmp_path / "run2"
    assert _fit(run_cli, small_csv, run, "--max-draws", "300")[0] in (0, 3)
    code, _, err = _fit(run_cli, small_csv, run, "--replace", "--max-draws", "300", "--seed", "2")
    assert code in (0, 3) and (run / "summary.json").exists()
    assert json.loads((run / "summary.json").read_text())["run"]["seed"] == 2


def test_missed_targets_exit_3_with_results_written(run_cli, small_csv, tmp_path):
    """20 draws per chain cannot reach an ESS of 400 (4 x 20 = 80 draws in all)."""
    out = tmp_path / "run"
    code, _, err = run_cli(
        "fit",
        small_csv,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        out,
        "--draws",
        "20",
        "--max-draws",
        "20",
        "--warmup",
        "50",
        "--seed",
        "1",
        "--quiet",
    )
    assert code == 3
    assert "warning" in err and "missed" in err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["diagnostics"]["met"] is False and summary["diagnostics"]["missed_count"] > 0


def test_demo_writes_a_complete_folder(run_cli, tmp_path):
    out = tmp_path / "demo"
    code, stdout, err = run_cli("demo", "--out", out, "--draws", "300", "--warmup", "300")
    assert code in (0, 3), err
    assert "36 invented casting suppliers" in stdout and "S12" in stdout
    for name in ("draws.nc", "summary.json"):
        assert (out / name).exists()


def _long_fit(tmp_path, small_csv):
    env = dict(os.environ)
    return subprocess.Popen(
        [
            sys.executable,
            "-m",
            "pooling.cli",
            "fit",
            str(small_csv),
            "--group",
            "plant",
            "--value",
            "thickness",
            "--out",
            str(tmp_path / "run"),
            "--draws",
            "3000000",
            "--max-draws",
            "3000000",
            "--warmup",
            "10",
            "--quiet",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )


def _interrupt(tmp_path, small_csv, sig):
    proc = _long_fit(tmp_path, small_csv)
    time.sleep(6.0)  # past start-up and compilation, inside the sampling
    assert proc.poll() is None, proc.communicate()
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 5, err
    assert "Traceback" not in err and "stopped" in err
    assert not (tmp_path / "run").exists()
    assert not list(tmp_path.glob(".run.*"))


def test_ctrl_c_leaves_nothing(tmp_path, small_csv):
    _interrupt(tmp_path, small_csv, signal.SIGINT)


def test_sigterm_leaves_nothing(tmp_path, small_csv):
    _interrupt(tmp_path, small_csv, signal.SIGTERM)
