"""The per-group answers of a full run (`pooling.results.compute`) with the interval ends taken by selection
(`order.select_quantiles`, the code as it is) against the same answers with every group's draws sorted by
numpy first (the code before 2026-12-04), in one process on one fit.

    python benchmarks/bench_answers.py            # J = 20,000, 2 chains x 2,000 draws (about 2 minutes)
    python benchmarks/bench_answers.py --quick    # J = 2,000

The fit is made once (separate, nu held at 4, the default heavy tails; the invented data of bench_whole.py),
then `compute` runs `repeats` times each way, alternating, so that a busy spell hits both alike; the figure is
the best wall and process CPU time of each, and their ratio. Both ways must give the same table to the bit,
which the benchmark checks before it reports.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_whole import _table  # noqa: E402

import pooling  # noqa: E402
from pooling import order as O  # noqa: E402
from pooling import results as R  # noqa: E402
from pooling._memory import keep_freed_memory  # noqa: E402
from pooling.model import Model, NuFixed  # noqa: E402
from pooling.sampler import Settings  # noqa: E402
from pooling.stats import from_frame  # noqa: E402


def _sorting(self, buf, m, h, low, high, j0) -> None:
    """The interval ends as they were taken before: each row sorted by numpy, then sorted_quantiles."""
    buf[:m].sort(axis=1)
    O.sorted_quantiles(buf, m, h, low, high, j0)


def run(quick: bool = False, repeats: int = 3) -> dict:
    keep_freed_memory()  # as the program `pooling` does
    J = 2_000 if quick else 20_000
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "data.csv"
        _table(path, J, 1.0, 2.0, 5)
        stats = from_frame(pd.read_csv(path), "line", "width")
    settings = Settings(chains=2, warmup=500, draws=2000, max_draws=2000, seed=1)
    fit = pooling.fit(stats, Model(nu=NuFixed(4.0)), settings, progress=False, summary=False)
    selecting = O.Selection.quantiles
    ways = {"selection": selecting, "numpy sort": _sorting}
    times: dict[str, list[tuple[float, float]]] = {k: [] for k in ways}
    tables = {}
    try:
        for _ in range(repeats):
            for name, fn in ways.items():
                O.Selection.quantiles = fn  # type: ignore[method-assign]
                w, c = time.perf_counter(), time.process_time()
                res = R.compute(fit)
                times[name].append((time.perf_counter() - w, time.process_time() - c))
                tables[name] = res.table
    finally:
        O.Selection.quantiles = selecting  # type: ignore[method-assign]
    a, b = tables["selection"], tables["numpy sort"]
    same = list(a.columns) == list(b.columns) and all(
        a[c].equals(b[c])
        if not pd.api.types.is_float_dtype(a[c])
        else np.array_equal(a[c].to_numpy().view(np.int64), b[c].to_numpy().view(np.int64))
        for c in a.columns
    )
    best = {k: (min(t[0] for t in v), min(t[1] for t in v)) for k, v in times.items()}
    return {
        "J": J,
        "draws": 2 * 2000,
        "same_table": bool(same),
        "selection_wall": best["selection"][0],
        "selection_cpu": best["selection"][1],
        "sort_wall": best["numpy sort"][0],
        "sort_cpu": best["numpy sort"][1],
        "cpu_ratio": best["numpy sort"][1] / best["selection"][1],
    }


def table(res: dict) -> list[str]:
    return [
        f"results.compute, J = {res['J']:,}, {res['draws']:,} draws: best of the alternating repeats",
        f"  interval ends by selection: {res['selection_wall']:.2f} s wall, {res['selection_cpu']:.2f} s CPU",
        f"  each group's draws sorted by numpy first: {res['sort_wall']:.2f} s wall, {res['sort_cpu']:.2f} s CPU",
        f"  CPU saved: the sorting way costs {res['cpu_ratio']:.2f}x; the two tables the same bits: {res['same_table']}",
    ]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    res = run(a.quick, a.repeats)
    print("\n".join(table(res)))
    return 0 if res["same_table"] else 1


if __name__ == "__main__":
    sys.exit(main())
