"""Two changes to the work after sampling, each against the code before it, in one process on one fit.

* Interval ends (2026-12-04): the per-group answers of a full run (`pooling.results.compute`) with the interval
  ends taken by selection (`order.select_quantiles`, the code as it is) against the same answers with every
  group's draws sorted by numpy first (the code before).
* Counting-sort buckets (2026-12-04, later): `order.sort_bucketed`, which sorts each quantity's draws for the
  rank-normalised diagnostics and each draw's groups for the ranks, with three buckets per value (as it is)
  against one per value (before): the sampler's diagnostics of every checked quantity
  (`diagnostics.rhat_ess` of each of `sampler.checked`, as `sampler.diagnose_raw` runs them) and
  `results.compute`.

    python benchmarks/bench_answers.py            # J = 20,000, 2 chains x 2,000 draws (about 3 minutes)
    python benchmarks/bench_answers.py --quick    # J = 2,000

The fit is made once (separate, nu held at 4, the default heavy tails; the invented data of bench_whole.py),
then each way runs `repeats` times, alternating, so that a busy spell hits both alike; the figure is the best
wall and process CPU time of each, and their ratio. Both ways must give the same answers to the bit (the
table; the diagnostics' records), which the benchmark checks before it reports.
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
from pooling import diagnostics as dg  # noqa: E402
from pooling import order as O  # noqa: E402
from pooling import results as R  # noqa: E402
from pooling._memory import keep_freed_memory  # noqa: E402
from pooling.model import Model, NuFixed  # noqa: E402
from pooling.sampler import Settings, checked  # noqa: E402
from pooling.stats import from_frame  # noqa: E402


def _sorting(self, buf, m, h, low, high, j0) -> None:
    """The interval ends as they were taken before: each row sorted by numpy, then sorted_quantiles."""
    buf[:m].sort(axis=1)
    O.sorted_quantiles(buf, m, h, low, high, j0)


def _same_table(a: pd.DataFrame, b: pd.DataFrame) -> bool:
    return list(a.columns) == list(b.columns) and all(
        a[c].equals(b[c])
        if not pd.api.types.is_float_dtype(a[c])
        else np.array_equal(a[c].to_numpy().view(np.int64), b[c].to_numpy().view(np.int64))
        for c in a.columns
    )


def _alternate(ways: dict, work, repeats: int) -> tuple[dict, dict]:
    """Run work() under each way's setting (a function that sets it and returns its undoing), alternating;
    the best (wall, CPU) of each way and each way's last result."""
    times: dict[str, list[tuple[float, float]]] = {k: [] for k in ways}
    last = {}
    for _ in range(repeats):
        for name, setting in ways.items():
            undo = setting()
            try:
                w, c = time.perf_counter(), time.process_time()
                last[name] = work()
                times[name].append((time.perf_counter() - w, time.process_time() - c))
            finally:
                undo()
    return {k: (min(t[0] for t in v), min(t[1] for t in v)) for k, v in times.items()}, last


def _patch(obj, name: str, value):
    def setting():
        old = getattr(obj, name)
        setattr(obj, name, value)
        return lambda: setattr(obj, name, old)

    return setting


def run(quick: bool = False, repeats: int = 3) -> dict:
    keep_freed_memory()  # as the program `pooling` does
    J = 2_000 if quick else 20_000
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "data.csv"
        _table(path, J, 1.0, 2.0, 5)
        stats = from_frame(pd.read_csv(path), "line", "width")
    settings = Settings(chains=2, warmup=500, draws=2000, max_draws=2000, seed=1)
    fit = pooling.fit(stats, Model(nu=NuFixed(4.0)), settings, progress=False, summary=False)
    out: dict = {"J": J, "draws": 2 * 2000}
    ends, last = _alternate(
        {"selection": lambda: lambda: None, "numpy sort": _patch(O.Selection, "quantiles", _sorting)},
        lambda: R.compute(fit).table,
        repeats,
    )
    out["ends"] = {"times": ends, "same": _same_table(last["selection"], last["numpy sort"])}
    per_value = {
        "three per value": _patch(O, "BUCKETS_PER_VALUE", 3),
        "one per value": _patch(O, "BUCKETS_PER_VALUE", 1),
    }
    diag, last_d = _alternate(per_value, lambda: {k: dg.rhat_ess(x) for k, x in checked(fit.raw).items()}, repeats)
    comp, last_c = _alternate(per_value, lambda: R.compute(fit).table, repeats)
    out["buckets"] = {
        "diagnostics": diag,
        "compute": comp,
        "same": all(
            np.array_equal(np.asarray(a).view(np.int64), np.asarray(b).view(np.int64))
            for k in last_d["one per value"]
            for a, b in zip(last_d["three per value"][k], last_d["one per value"][k])
        )
        and _same_table(last_c["three per value"], last_c["one per value"]),
    }
    return out


def table(res: dict) -> list[str]:
    e, b = res["ends"], res["buckets"]
    lines = [f"J = {res['J']:,}, {res['draws']:,} draws; best of the alternating repeats, wall and process CPU"]

    def pair(title: str, times: dict, new: str, old: str) -> None:
        (nw, nc), (ow, oc) = times[new], times[old]
        lines.append(
            f"  {title}: {new} {nw:.2f} s wall, {nc:.2f} s CPU; {old} {ow:.2f} s, {oc:.2f} s; CPU {oc / nc:.2f}x"
        )

    pair("results.compute, interval ends", e["times"], "selection", "numpy sort")
    lines.append(f"    the same table to the bit: {e['same']}")
    pair("diagnostics of every checked quantity, sort buckets", b["diagnostics"], "three per value", "one per value")
    pair("results.compute, sort buckets", b["compute"], "three per value", "one per value")
    lines.append(f"    the same diagnostics and table to the bit: {b['same']}")
    return lines


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    res = run(a.quick, a.repeats)
    print("\n".join(table(res)))
    return 0 if res["ends"]["same"] and res["buckets"]["same"] else 1


if __name__ == "__main__":
    sys.exit(main())
