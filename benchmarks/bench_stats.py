"""Building the group statistics: rows per second from CSV and Parquet files, against pandas.

Cases, on the same invented long table (1,000 groups; 2e6 rows, 2e5 with --quick):
  pandas groupby   df.groupby(group)[value].agg(["count", "mean", "var"]) on a frame already in
                   memory: the practitioner's one-liner, with no file reading at all
  from_frame       pooling.from_frame on the same in-memory frame (checks plus two-pass moments)
  read_table CSV   pooling.read_table on the CSV file (parsing, checks, chunked merge, file hash)
  read_table Parq  pooling.read_table on the Parquet file
  dask CSV         pooling.dask_stats.read_table_dask on the CSV, Dask's local threads (if installed)

No target is set in the issue; the table shows what each step costs. Wall time, best of repeats
(pyarrow and Dask use several threads, which a thread's CPU time would not count). The files are
in the page cache, so the figures are for parsing, not for the disk.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from common import best, load

from pooling import stats as S


def _table(rows: int, J: int, seed: int) -> pd.DataFrame:
    """Invented: group labels drawn uniformly, values 50 + N(0, 5^2) with three decimals."""
    g = np.random.default_rng(seed)
    lab = np.array([f"supplier-{j:04d}" for j in range(J)])[g.integers(0, J, rows)]
    return pd.DataFrame({"supplier": lab, "strength": np.round(50.0 + 5.0 * g.standard_normal(rows), 3)})


def run(quick: bool = False) -> dict:
    rows, J, repeats = (200_000, 1000, 3) if quick else (2_000_000, 1000, 3)
    df = _table(rows, J, seed=1)
    with tempfile.TemporaryDirectory() as tmp:
        csv, pq = Path(tmp) / "parts.csv", Path(tmp) / "parts.parquet"
        df.to_csv(csv, index=False)
        df.to_parquet(pq, write_page_checksum=True)  # as pooling asks of Parquet files: pages verified on reading
        cases = {
            "pandas groupby (in memory)": lambda: df.groupby("supplier")["strength"].agg(["count", "mean", "var"]),
            "from_frame (in memory)": lambda: S.from_frame(df, "supplier", "strength"),
            "read_table CSV": lambda: S.read_table(csv, "supplier", "strength"),
            "read_table Parquet": lambda: S.read_table(pq, "supplier", "strength"),
        }
        try:
            from pooling import dask_stats

            dask_stats._dask()
            cases["dask CSV (local threads)"] = lambda: dask_stats.read_table_dask(csv, "supplier", "strength")
        except Exception:  # dask not installed: the row is left out and the table says so
            pass
        out = []
        for name, fn in cases.items():
            fn()  # first call: imports, caches
            t = best(fn, repeats, clock=time.perf_counter)
            out.append({"case": name, "seconds": t, "rows_per_s": rows / t})
        ref = out[0]["seconds"]
        for r in out:
            r["vs_pandas_groupby"] = r["seconds"] / ref
        size = {"csv_bytes": csv.stat().st_size, "parquet_bytes": pq.stat().st_size}
    return {"name": "stats", "rows": rows, "groups": J, "cases": out, **size, "load_1min": load()}


def table(res: dict) -> list[str]:
    out = [
        f"group statistics: {res['rows']:,} rows, {res['groups']:,} groups (wall time, best of repeats; "
        f"CSV {res['csv_bytes'] / 1e6:.0f} MB, Parquet {res['parquet_bytes'] / 1e6:.0f} MB)",
        f"  {'case':>28} {'seconds':>8} {'rows/s':>12} {'time vs pandas groupby':>24}",
    ]
    for r in res["cases"]:
        out.append(f"  {r['case']:>28} {r['seconds']:8.3f} {r['rows_per_s']:12,.0f} {r['vs_pandas_groupby']:23.1f}x")
    return out


if __name__ == "__main__":
    import sys

    print("\n".join(table(run(quick="--quick" in sys.argv))))
