"""The two stores under load: 500 batches x 200 groups ingested from 4 processes at once, then a refit.

The same work on each store: 500 invented deliveries of 200 groups (3 measurements per group, 600
rows per file) are dealt to 4 worker processes, which ingest their 125 files one after another
(each ingest opens the store, reads its file and lands it in one transaction, as `pooling ingest`
does), all four at the same time. Then one `pooling refit` of the whole store (4 chains, 500
warm-up sweeps and 500 draws, no run-length extension) in a process of its own. Reported per
store: the wall time of the concurrent ingest (and batches per second), the peak memory (RSS) of
an ingest worker, the wall time of the refit process and of its store read and merge, the refit's
peak memory, and a check that nothing was lost (500 active batches whose statistics equal their
files', and a sound checkup).

PostgreSQL runs in a throwaway cluster of its own (tests/pg_cluster.py: a unix socket, default
durability settings, i.e. fsync on, beside SQLite's synchronous=FULL). The machine is shared, so
the figures are wall times of one run; compare the two stores within a run.

    python benchmarks/bench_store_backends.py            # writes benchmarks/results/bench_store_backends.json
    python benchmarks/bench_store_backends.py --quick    # 100 batches
"""

from __future__ import annotations

import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))  # the throwaway cluster lives with the tests

WORKERS = 4
GROUPS = 200
PER_GROUP = 3
REFIT = ["--chains", "4", "--warmup", "500", "--draws", "500", "--max-draws", "500", "--seed", "1", "--quiet"]


def make_files(folder: Path, batches: int) -> list[Path]:
    rng = np.random.default_rng(2026)
    labels = np.repeat([f"line-{j:03d}" for j in range(GROUPS)], PER_GROUP)
    centre = np.repeat(rng.normal(410.0, 6.0, GROUPS), PER_GROUP)
    files = []
    for b in range(batches):
        y = centre + rng.normal(0.0, 4.0, len(labels))
        p = folder / f"delivery-{b:04d}.csv"
        pd.DataFrame({"line": labels, "strength": y}).to_csv(p, index=False, float_format="%.10g")
        files.append(p)
    return files


WORKER = """
import sys
from pooling.store import jobs
store, peak_file, files = sys.argv[1], sys.argv[2], sys.argv[3:]
for f in files:
    jobs.ingest_file(store, f, "line", "strength")
open(peak_file, "w").write(open("/proc/self/status").read())
"""

REFIT_WRAPPER = """
import sys
from pooling.cli import main
code = main(sys.argv[2:])
open(sys.argv[1], "w").write(open("/proc/self/status").read())
sys.exit(code)
"""


def _peak_mib(status_file: Path) -> float:
    """The process's own peak resident memory (VmHWM of /proc/PID/status). Not ru_maxrss: on Linux that
    also counts the parent's resident memory at the fork, which here would hide the child's own."""
    for line in status_file.read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024.0
    raise RuntimeError(f"no VmHWM in {status_file}")


def _wait(proc: subprocess.Popen) -> int:
    proc.wait()
    return proc.returncode


def run_case(store: str, files: list[Path], folder: Path, env: dict) -> dict:
    chunks = [files[i::WORKERS] for i in range(WORKERS)]
    peaks_at = [folder / f"peak-{i}-{abs(hash(store)) % 10_000}" for i in range(WORKERS)]
    t0 = time.perf_counter()
    procs = [
        subprocess.Popen([sys.executable, "-c", WORKER, store, str(at), *map(str, c)], env=env, stderr=subprocess.PIPE)
        for c, at in zip(chunks, peaks_at)
    ]
    for p in procs:
        if _wait(p) != 0:
            raise RuntimeError(f"an ingest worker failed: {p.stderr.read().decode()[-2000:]}")
    ingest_s = time.perf_counter() - t0
    peaks = [_peak_mib(at) for at in peaks_at]
    out = folder / f"refit-{abs(hash(store)) % 10_000}"
    peak_at = folder / f"peak-refit-{abs(hash(store)) % 10_000}"
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, "-c", REFIT_WRAPPER, str(peak_at), "refit", store, "--out", str(out), *REFIT],
        env=env,
        stderr=subprocess.PIPE,
    )
    code = _wait(proc)
    refit_s = time.perf_counter() - t0
    if code not in (0, 3):
        raise RuntimeError(f"the refit failed ({code}): {proc.stderr.read().decode()[-2000:]}")
    refit_peak = _peak_mib(peak_at)
    # nothing lost: every batch active, each with exactly its file's statistics, and a sound store
    from pooling.stats import read_table
    from pooling.store import jobs, open_store

    t0 = time.perf_counter()
    jobs.plan_refit(store, force=True)
    read_s = time.perf_counter() - t0
    with open_store(store) as st:
        snap = st.snapshot()
    by_name = {f.name: f for f in files}
    exact = 0
    for b, s in zip(snap.batches, snap.stats):
        ref = read_table(by_name[b.name], "line", "strength")
        exact += bool(
            s.labels == ref.labels
            and np.array_equal(s.n, ref.n)
            and np.array_equal(s.m2, ref.m2)
            and np.array_equal(s.mean, ref.mean)
        )
    problems = jobs.check_store(store)[1]
    return {
        "ingest_wall_s": round(ingest_s, 2),
        "batches_per_s": round(len(files) / ingest_s, 1),
        "ingest_worker_peak_mib": [round(p, 1) for p in peaks],
        "refit_wall_s": round(refit_s, 2),
        "refit_read_and_merge_s": round(read_s, 3),
        "refit_peak_mib": round(refit_peak, 1),
        "active_batches": len(snap.batches),
        "batches_exact": exact,
        "group_rows": sum(len(s.labels) for s in snap.stats),
        "checkup_problems": len(problems),
    }


def main(argv=None) -> dict:
    argv = list(sys.argv[1:] if argv is None else argv)
    batches = 100 if "--quick" in argv else 500
    from pg_cluster import Cluster, why_unavailable

    why = why_unavailable()
    with tempfile.TemporaryDirectory(prefix="bench-store-") as tmp:
        folder = Path(tmp)
        files = make_files(folder, batches)
        env = dict(os.environ, NUMBA_CACHE_DIR=os.environ.get("NUMBA_CACHE_DIR", str(ROOT / ".numba-cache")))
        results = {
            "batches": batches,
            "groups": GROUPS,
            "rows_per_file": GROUPS * PER_GROUP,
            "workers": WORKERS,
            "machine": platform.machine(),
            "cores": os.cpu_count(),
            "load_before": os.getloadavg()[0],
        }
        results["sqlite"] = run_case(str(folder / "plant.store"), files, folder, env)
        if why:
            results["postgresql"] = f"not run: {why}"
        else:
            cluster = Cluster()
            try:
                os.environ.update(cluster.env())
                env.update(cluster.env())
                results["postgresql"] = run_case(cluster.url("bench"), files, folder, env)
                results["postgresql_server_version"] = cluster.psql_admin("SHOW server_version").stdout.strip()
            finally:
                cluster.destroy()
        results["load_after"] = os.getloadavg()[0]
        results["own_peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(json.dumps(results, indent=2))
    out = ROOT / "benchmarks" / "results" / "bench_store_backends.json"
    out.parent.mkdir(exist_ok=True)
    out.write_text(json.dumps(results, indent=2))
    return results


if __name__ == "__main__":
    main()
