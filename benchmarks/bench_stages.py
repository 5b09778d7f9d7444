"""Where one `pooling fit` spends its time: the wall and process CPU time at the start and end of each stage.

    python benchmarks/bench_stages.py                # J = 20,000, full mode (bench_whole.py's case)
    python benchmarks/bench_stages.py --groups 2000  # any size; --summary on for summary mode

The program runs as a user runs it (`pooling.cli.run` in a fresh process, bytecode kept as bench_whole.py
keeps it, after one run that compiles and caches the kernel), with the functions of each stage wrapped so
that their start and end are stamped: the problem built (model.build), the sweeps (sampler.draw_until_targets,
whose end includes the diagnostics of the last round), the diagnostics (sampler.diagnose_raw), the answers
(results.compute, while draws.nc is written on its own thread: output._write_draws), the three files
(output.write_results_files) and the folder put in place (output.atomic_folder). The stamps are printed on
stderr as the process leaves; the table gives each stage's wall and CPU seconds and what lies between them.
The figures move by 20-30 % from one run to the next on a shared machine: compare stages within one run.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_whole import _table, fit_command, installed_env  # noqa: E402

# (module, function) pairs stamped, in the order a run reaches them
STAGES = (
    ("pooling.model", "build"),
    ("pooling.sampler", "draw_until_targets"),
    ("pooling.sampler", "diagnose_raw"),
    ("pooling.output", "atomic_folder"),
    ("pooling.results", "compute"),
    ("pooling.output", "_write_draws"),
    ("pooling.output", "write_results_files"),
)

# run inside the measured process: stamps kept in a list, printed by the last atexit function but one
_STAMP = """
import atexit, importlib, sys, threading, time
T0, C0 = time.perf_counter(), time.process_time()
marks = []
def mark(what):
    marks.append((time.perf_counter() - T0, time.process_time() - C0, what, threading.current_thread().name))
from pooling import cli
mark("pooling.cli loaded (the other imports and reading the data come before start build)")
for mod, name in STAGES:
    m = importlib.import_module(mod)
    f = getattr(m, name)
    def wrapped(*a, _f=f, _n=name, **k):
        mark("start " + _n)
        try:
            return _f(*a, **k)
        finally:
            mark("end " + _n)
    setattr(m, name, wrapped)
def report():
    mark("exit")
    for t, c, what, thread in marks:
        print("stage", f"{t:.3f}", f"{c:.3f}", what, thread, sep="\\t", file=sys.stderr, flush=True)
_main = cli.main
def main(*args, **kwargs):
    code = _main(*args, **kwargs)
    atexit.register(report)
    return code
cli.main = main
cli.run()
"""


def _fit(csv: Path, out: Path, env: dict, summary: str) -> tuple[list[tuple[float, float, str, str]], str]:
    cmd = fit_command(f"STAGES = {STAGES!r}\n" + _STAMP, csv, out, summary)
    p = subprocess.run(cmd, env=env, capture_output=True, text=True)
    if p.returncode not in (0, 3):
        raise SystemExit(f"pooling fit failed ({p.returncode}): {p.stderr[-2000:]}")
    marks = []
    for line in p.stderr.splitlines():
        if line.startswith("stage\t"):
            _, t, c, what, thread = line.split("\t")
            marks.append((float(t), float(c), what, thread))
    sweep = ""
    summary_json = out / "summary.json"
    if summary_json.exists():
        sweep = f"{json.loads(summary_json.read_text())['run']['sweep_seconds']:.2f}"
    return marks, sweep


def table(marks: list[tuple[float, float, str, str]], sweep: str) -> list[str]:
    lines = [f"{'wall s':>8} {'CPU s':>8}  stamp (thread)"]
    prev_t = prev_c = 0.0
    for t, c, what, thread in marks:
        lines.append(f"{t:8.3f} {c:8.3f}  {what} ({thread}); +{t - prev_t:.3f} s wall, +{c - prev_c:.3f} s CPU")
        prev_t, prev_c = t, c
    lines.append(f"sweeps inside (summary.json run.sweep_seconds): {sweep} s")
    return lines


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--groups", type=int, default=20_000)
    ap.add_argument("--summary", choices=("on", "off"), default="off")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        env = installed_env(tmp)
        small, csv = tmp / "small.csv", tmp / "data.csv"
        _table(small, 50, 0.5, 1.0, 0)
        _fit(small, tmp / "warm", env, a.summary)  # compiles and caches the kernel, writes the bytecode
        _table(csv, a.groups, 0.5, 1.0, a.groups)
        marks, sweep = _fit(csv, tmp / "run", env, a.summary)
    print(f"`pooling fit`, J = {a.groups:,}, summary {a.summary}: stamps from the process's start (after Python's)")
    print("\n".join(table(marks, sweep)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
