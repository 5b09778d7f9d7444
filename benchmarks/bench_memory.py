"""Bounded memory: a CSV is read in chunks and reduced on the fly, so peak memory follows the
number of groups and the chunk size, not the number of rows.

Invented long tables are written to a temporary folder: 1e6 and 1e7 rows with 1,000 groups, and
1e7 rows with 100,000 groups (--quick: 1e6 and 3e6 rows). Each read runs in a fresh process, which
reports its resident memory after importing pooling (the baseline) and its peak resident memory
while pooling.read_table runs (VmHWM, reset after the imports); the growth is the difference. For contrast, pandas reads
the largest file whole (pd.read_csv), which needs memory in proportion to the rows.

What it shows: at a fixed chunk size the growth is the same for 1e6 and 1e7 rows (within the
allocator's noise), grows with the chunk size, and grows a little with the groups (their labels
and running statistics), while the file, and pandas' whole-file read, grow with the rows.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from common import load

_READ = r"""
import json, re, sys, time
import pooling
from pooling import stats

def status(key):
    # /proc/self/status, not getrusage: ru_maxrss of a child starts from its parent's peak at fork
    return int(re.search(key + r":\s+(\d+)", open("/proc/self/status").read()).group(1))

import pandas, pyarrow  # imported by the reader anyway: part of the baseline, not of the growth
base = status("VmRSS")
open("/proc/self/clear_refs", "w").write("5")  # reset the peak to the current size (Linux >= 4.0)
t = time.perf_counter()
if sys.argv[2] == "pandas":
    df = pandas.read_csv(sys.argv[1], dtype={"lab": str})
    J = df["lab"].nunique()
else:
    J = stats.read_table(sys.argv[1], "lab", "y", chunk_rows=int(sys.argv[2])).J
peak = status("VmHWM")
print(json.dumps({"base_kb": base, "peak_kb": peak, "groups": J, "seconds": time.perf_counter() - t}))
"""


def _write(path: Path, rows: int, J: int, seed: int, block: int = 1_000_000):
    """Invented: labels 'm-00042' drawn uniformly from J, values 1000 + N(0, 1) with four decimals."""
    g = np.random.default_rng(seed)
    names = np.array([f"m-{j:06d}" for j in range(J)])
    with open(path, "w") as fh:
        fh.write("lab,y\n")
        for start in range(0, rows, block):
            k = min(block, rows - start)
            lab = names[g.integers(0, J, k)]
            y = np.char.mod("%.4f", 1000.0 + g.standard_normal(k))
            fh.write("\n".join(np.char.add(np.char.add(lab, ","), y)) + "\n")


def _measure(path: Path, how) -> dict:
    p = subprocess.run([sys.executable, "-c", _READ, str(path), str(how)], capture_output=True, text=True)
    if p.returncode != 0:
        raise RuntimeError(p.stderr.strip().splitlines()[-1])
    r = json.loads(p.stdout.strip().splitlines()[-1])
    return {
        "base_mb": r["base_kb"] / 1024,
        "peak_mb": r["peak_kb"] / 1024,
        "growth_mb": (r["peak_kb"] - r["base_kb"]) / 1024,
        "groups_read": r["groups"],
        "seconds": r["seconds"],
    }


def run(quick: bool = False) -> dict:
    files = (
        [(1_000_000, 1000), (3_000_000, 1000)]
        if quick
        else [(1_000_000, 1000), (10_000_000, 1000), (10_000_000, 100_000)]
    )
    chunks = (100_000, 1_000_000)
    rows_out = []
    with tempfile.TemporaryDirectory() as tmp:
        paths = {}
        for rows, J in files:
            path = Path(tmp) / f"m-{rows}-{J}.csv"
            _write(path, rows, J, seed=rows + J)
            paths[(rows, J)] = path
        for (rows, J), path in paths.items():
            size = path.stat().st_size / 2**20
            for chunk in chunks:
                r = _measure(path, chunk)
                rows_out.append(
                    {
                        "rows": rows,
                        "groups": J,
                        "file_mb": size,
                        "reader": f"read_table, chunk_rows={chunk:,}",
                        "chunk_rows": chunk,
                        **r,
                    }
                )
        rows, J = files[-2] if not quick else files[-1]
        path = paths[(rows, J)]
        rows_out.append(
            {
                "rows": rows,
                "groups": J,
                "file_mb": path.stat().st_size / 2**20,
                "reader": "pandas read_csv, whole file",
                "chunk_rows": None,
                **_measure(path, "pandas"),
            }
        )
    # the claim, checked on the numbers: same chunk and groups, 10x (or 3x) the rows, about the same growth
    checks = []
    small, big = files[0], files[1]
    for chunk in chunks:
        a = next(r for r in rows_out if (r["rows"], r["groups"], r["chunk_rows"]) == (*small, chunk))
        b = next(r for r in rows_out if (r["rows"], r["groups"], r["chunk_rows"]) == (*big, chunk))
        checks.append(
            {
                "chunk_rows": chunk,
                "rows": [small[0], big[0]],
                "growth_mb": [a["growth_mb"], b["growth_mb"]],
                "ratio": b["growth_mb"] / max(a["growth_mb"], 1e-9),
                "rows_ratio": big[0] / small[0],
            }
        )
    bounded = all(c["ratio"] < 1.5 for c in checks)
    return {"name": "memory", "cases": rows_out, "checks": checks, "bounded": bounded, "load_1min": load()}


def table(res: dict) -> list[str]:
    out = [
        "bounded memory: peak resident memory of a fresh process reading a CSV (MB; growth = peak - after imports)",
        f"  {'rows':>11} {'groups':>8} {'file':>7} {'reader':>32} {'growth':>7} {'peak':>7} {'sec':>6}",
    ]
    for r in res["cases"]:
        out.append(
            f"  {r['rows']:>11,} {r['groups']:>8,} {r['file_mb']:7.0f} {r['reader']:>32} {r['growth_mb']:7.0f} "
            f"{r['peak_mb']:7.0f} {r['seconds']:6.1f}"
        )
    for c in res["checks"]:
        out.append(f"  chunk_rows={c['chunk_rows']:,}: {c['rows_ratio']:.0f}x the rows -> {c['ratio']:.2f}x the growth")
    out.append(f"  memory bounded by chunk size and groups, not rows: {'yes' if res['bounded'] else 'NO'}")
    return out


if __name__ == "__main__":
    print("\n".join(table(run(quick="--quick" in sys.argv))))
