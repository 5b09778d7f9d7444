"""The whole `pooling fit` against the sampling inside it, at J = 2,000 and J = 20,000, full and summary mode.

Each case runs `pooling fit` as a user does (a fresh process, the default heavy-tailed model, separate
structure with nu fixed at 4, 2 chains x (500 warm-up + 2,000 draws), no run-length extension, --quiet) on
an invented long table, after one run that compiles and caches the kernel. It reports, in one run:
  whole      the process's wall time (start to exit, imports and writing the folder included);
  sampling   the wall time of the sweeps inside it (summary.json run.sweep_seconds);
  ratio      whole / sampling;                     targets: <= 3 at J = 2,000, <= 2 at J = 20,000
  peak       the process's peak resident memory, against the draws' own size (chains x draws x J x 8 bytes
             for theta, sigma and lambda): target, full mode at most the draws plus O(J) working arrays.
Summary mode at J = 20,000 should be no slower than full mode (ratio of whole times <= 1).
Memory beyond the draws: a full run at J = 20,000 (2,000 with --quick) again with twice the draws; when the
working arrays are O(J), the peak grows by the draws' growth alone (ratio of the growths about 1; anything
held per draw and group besides the draws shows as more).

The tau ESS per second of the whole process (full mode, J = 2,000, strong shrinkage data as in
baseline.py) is compared with the numpy baseline's tau ESS per second of sampling: target >= 25x.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
CHAINS, WARMUP, DRAWS = 2, 500, 2000


def _table(path: Path, J: int, tau: float, sigma: float, seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = rng.integers(5, 14, J)
    theta = rng.normal(0.0, tau, J)
    g = np.repeat(np.arange(J), n)
    y = 50.0 + theta[g] + rng.normal(0.0, sigma, g.size)
    pd.DataFrame({"line": np.char.add("L", g.astype(str)), "width": np.round(y, 6)}).to_csv(path, index=False)


# the program `pooling` (pooling.cli.run, which ends the process without the interpreter's teardown) in a
# fresh interpreter that reports its own peak resident memory on its last stderr line: the report is
# registered after run()'s own last exit step, so it runs just before it
_WRAP = (
    "import atexit, resource, sys\nfrom pooling import cli\n_main = cli.main\n"
    "def main(*args, **kwargs):\n"
    "    code = _main(*args, **kwargs)\n"
    "    atexit.register(lambda: print('peak-kb', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, "
    "file=sys.stderr, flush=True))\n"
    "    return code\n"
    "cli.main = main\ncli.run()"
)


def fit_command(program: str, csv: Path, out: Path, mode: str, draws: int = DRAWS) -> list[str]:
    """`pooling fit` of the benchmark's case (separate, nu 4, no run-length extension, --quiet) as `program` runs
    it in a fresh interpreter (python -c program fit ...)."""
    return [sys.executable, "-c", program, "fit", str(csv), "--group", "line", "--value", "width", "--out", str(out)] + [
        "--seed", "1", "--quiet", "--nu", "4", "--chains", str(CHAINS), "--warmup", str(WARMUP),
        "--draws", str(draws), "--max-draws", str(draws), "--summary", mode,
    ]  # fmt: skip


def installed_env(tmp: Path) -> dict:
    """The environment of the measured processes: numba's cache in `tmp`, and the program as installed: pip
    byte-compiles the package it installs, so the program a user runs does not compile its own source at each
    start; a process environment that forbids bytecode (PYTHONDONTWRITEBYTECODE, set on some build machines)
    would add that compiling (about 0.15 s) to every run measured. The warm-up runs write the bytecode, into a
    folder of their own rather than the source tree."""
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp / "numba-cache"), PYTHONWARNINGS="ignore")
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    env["PYTHONPYCACHEPREFIX"] = str(tmp / "bytecode")
    return env


def _fit(csv: Path, out: Path, env: dict, mode: str, draws: int = DRAWS) -> dict:
    cmd = fit_command(_WRAP, csv, out, mode, draws)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    p = subprocess.run(cmd, env=env, capture_output=True, text=True)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if p.returncode not in (0, 3):
        raise RuntimeError(f"pooling fit failed ({p.returncode}): {p.stderr[-500:]}")
    peak = float(p.stderr.strip().splitlines()[-1].split()[-1]) / 1024
    s = json.loads((out / "summary.json").read_text())
    return {
        "whole_s": wall,
        "cpu_s": (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime),
        "sampling_s": s["run"]["sweep_seconds"],
        "peak_mb": peak,
        "summary": s,
    }


def run(quick: bool = False) -> dict:
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        env = installed_env(tmp)  # the warm-up runs below compile the kernel and write the bytecode
        small = tmp / "small.csv"
        _table(small, 50, 0.5, 1.0, 0)
        for mode in ("off", "on"):  # compile and cache both modes' kernels first
            _fit(small, tmp / f"warm-{mode}", env, mode)
        for J in (2_000,) if quick else (2_000, 20_000):
            csv = tmp / f"w{J}.csv"
            _table(csv, J, 0.5, 1.0, J)
            for mode in ("off", "on"):
                r = _fit(csv, tmp / f"run-{J}-{mode}", env, mode)
                draws_mb = CHAINS * DRAWS * J * 8 * 3 / 2**20
                rows.append(
                    {
                        "J": J,
                        "mode": "full" if mode == "off" else "summary",
                        "whole_s": round(r["whole_s"], 2),
                        "cpu_s": round(r["cpu_s"], 2),
                        "sampling_s": round(r["sampling_s"], 2),
                        "ratio": round(r["whole_s"] / r["sampling_s"], 2),
                        "peak_mb": round(r["peak_mb"], 1),
                        "draws_mb": round(draws_mb, 1),
                        "target": 3.0 if J == 2_000 else 2.0,
                    }
                )
        # memory beyond the draws, at twice the draws: what grows with draws x groups besides the draws themselves
        J = 2_000 if quick else 20_000
        extra = []
        for draws in (DRAWS, 2 * DRAWS):
            r = _fit(tmp / f"w{J}.csv", tmp / f"mem-{draws}", env, "off", draws)
            draws_mb = CHAINS * draws * J * 8 * 3 / 2**20
            extra.append({"draws": draws, "peak_mb": round(r["peak_mb"], 1), "draws_mb": round(draws_mb, 1)})
        grow = (extra[1]["peak_mb"] - extra[0]["peak_mb"]) / (extra[1]["draws_mb"] - extra[0]["draws_mb"])
        memory = {"J": J, "runs": extra, "peak_growth_per_draws_growth": round(grow, 3)}
        # tau ESS per second of the whole process against the numpy baseline (strong shrinkage, J = 2,000)
        sys.path.insert(0, str(HERE))
        from baseline import _ess_per_second, _start, gibbs
        from common import invented_groups, problem_of

        strong = tmp / "strong.csv"
        _table(strong, 2_000, 0.3, 3.0, 11)  # sigma 3, n 5..13: standard errors near 1, tau 0.3
        r = _fit(strong, tmp / "run-strong", env, "off")
        from pooling._compat import az

        idata = az.from_netcdf(str(tmp / "run-strong" / "draws.nc"))
        ess_tau = float(np.ravel(az.ess(idata.posterior["tau"].values, method="bulk"))[0])
        engine = ess_tau / r["whole_s"]
        problem = problem_of(invented_groups(2_000, tau=0.3, sigma=3.0, n_lo=5, n_hi=13, seed=11))
        base = [
            gibbs(problem, np.random.default_rng(50 + c), 400, 1500 if quick else 4000, _start(problem, c))
            for c in range(2)
        ]
        b = _ess_per_second([x[0] for x in base], sum(x[1] for x in base))
        mixing = {
            "engine_tau_ess": ess_tau,
            "engine_whole_s": round(r["whole_s"], 2),
            "engine_tau_ess_per_s": round(engine, 1),
            "baseline_tau_ess_per_s": round(b["ess_per_s_tau"], 1),
            "ratio": round(engine / b["ess_per_s_tau"], 1),
            "target": 25.0,
        }
    full = {(r["J"]): r for r in rows if r["mode"] == "full"}
    summ = {(r["J"]): r for r in rows if r["mode"] == "summary"}
    speed = {J: round(summ[J]["whole_s"] / full[J]["whole_s"], 2) for J in full if J in summ}
    return {
        "name": "whole",
        "rows": rows,
        "summary_over_full": speed,
        "mixing": mixing,
        "memory": memory,
        "load_1min": os.getloadavg()[0],
    }


def table(res: dict) -> list[str]:
    out = [
        f"whole `pooling fit` vs the sampling inside it ({CHAINS} chains x ({WARMUP} + {DRAWS}) sweeps, separate, "
        "nu 4, heavy tails)",
        f"  {'J':>7} {'mode':>8} {'whole s':>8} {'cpu s':>7} {'sampling s':>10} {'ratio':>6} {'target':>7} "
        f"{'peak MB':>8} {'draws MB':>9}",
    ]
    for r in res["rows"]:
        ok = "met" if r["ratio"] <= r["target"] else "MISSED"
        out.append(
            f"  {r['J']:>7,} {r['mode']:>8} {r['whole_s']:8.2f} {r['cpu_s']:7.2f} {r['sampling_s']:10.2f} "
            f"{r['ratio']:6.2f} {'<= ' + format(r['target'], 'g'):>7} {r['peak_mb']:8.1f} {r['draws_mb']:9.1f}  {ok}"
        )
    for J, q in res["summary_over_full"].items():
        out.append(f"  summary / full whole time at J = {J:,}: {q:.2f} (target <= 1)")
    mem = res["memory"]
    a, b = mem["runs"]
    out.append(
        f"  peak memory beyond the draws, full mode, J = {mem['J']:,}: {a['peak_mb'] - a['draws_mb']:.0f} MB at {a['draws']:,} "
        f"draws per chain, {b['peak_mb'] - b['draws_mb']:.0f} MB at {b['draws']:,}; peak growth / draws growth "
        f"{mem['peak_growth_per_draws_growth']:.3f} (target: about 1, the draws plus O(J))"
    )
    m = res["mixing"]
    out.append(
        f"  tau ESS per second, whole process (J = 2,000, strong shrinkage): {m['engine_tau_ess_per_s']:.0f} "
        f"against the numpy baseline's {m['baseline_tau_ess_per_s']:.1f}: {m['ratio']:.0f}x (target >= 25x)"
    )
    return out


if __name__ == "__main__":
    res = run(quick="--quick" in sys.argv)
    print("\n".join(table(res)))
    print(json.dumps(res, indent=1, default=float)[:200] if "--json" in sys.argv else "", end="")
