"""Run the benchmarks, print one table, and write benchmarks/results/latest.json.

    python benchmarks/run.py                 # all of them (about 5 minutes on 2 free cores)
    python benchmarks/run.py --quick         # smaller sizes, fewer repeats (about 2 minutes)
    python benchmarks/run.py sweep threads   # a subset, by name

Names: sweep (kernel vs random-number floor), baseline (ESS/s vs a hand-written numpy Gibbs
sampler), threads (chains on 1 and 2 threads), stats (rows/s building the group statistics),
cli (`pooling fit` whole process), memory (peak memory reading a large CSV), summary_draw (summary mode's
cost per draw against a full-mode sweep at J = 1e5 and 1e6; --quick: 1e5 only).

Every target is a ratio measured within one run, never a wall-clock threshold in the tests.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))  # the benchmark modules import each other by their plain names

ORDER = ("sweep", "baseline", "threads", "stats", "cli", "memory", "summary_draw")
MODULES = {
    "sweep": "bench_sweep",
    "baseline": "baseline",
    "threads": "bench_threads",
    "stats": "bench_stats",
    "cli": "bench_cli",
    "memory": "bench_memory",
    "summary_draw": "bench_summary_mode",
}


def _targets(results: dict) -> list[dict]:
    """One line per target of the issue, from whichever benchmarks ran."""
    out = []
    if "sweep" in results:
        rows = [r for r in results["sweep"]["rows"] if r["target"]]
        worst = max(rows, key=lambda r: r["ratio"])
        out.append(
            {
                "target": "sweep / floor, separate, J >= 1e3",
                "want": "<= 2",
                "got": worst["ratio"],
                "detail": f"worst at J = {worst['J']:,}",
                "met": all(r["met"] for r in rows),
            }
        )
    if "baseline" in results:
        for r in results["baseline"]["rows"]:
            out.append(
                {
                    "target": f"tau ESS/s engine / baseline, {r['case']}",
                    "want": f">= {r['target_tau_ratio']:g}",
                    "got": r["ratio"]["tau"],
                    "detail": f"mu {r['ratio']['mu']:.1f}x, worst theta {r['ratio']['theta_worst']:.1f}x",
                    "met": r["met"],
                }
            )
    if "threads" in results:
        r = results["threads"]
        out.append(
            {
                "target": "2 threads / 1 thread (speed-up)",
                "want": ">= 1.8",
                "got": r["ratio"],
                "detail": f"cores obtained {r['cores_used_2']:.2f}, load {r['load_1min_before']:.1f}",
                "met": r["met"],
            }
        )
    if "cli" in results:
        r = results["cli"]
        out.append(
            {
                "target": "later `pooling fit`, 1,000 groups, whole process",
                "want": "< 3 s",
                "got": r["later_best_s"],
                "detail": f"first run {r['first_run_s']:.1f} s",
                "met": r["met"],
            }
        )
    if "memory" in results:
        r = results["memory"]
        ratios = ", ".join(f"{c['ratio']:.2f}" for c in r["checks"])
        out.append(
            {
                "target": "CSV memory growth, 10x rows at fixed chunk",
                "want": "about 1x (< 1.5)",
                "got": max(c["ratio"] for c in r["checks"]),
                "detail": f"per chunk size: {ratios}",
                "met": r["bounded"],
            }
        )
    if "summary_draw" in results:
        for r in results["summary_draw"]["rows"]:
            if r["target"]:
                out.append(
                    {
                        "target": "summary-mode draw / full-mode sweep, J = 1e6",
                        "want": r["target"],
                        "got": r["ratio"],
                        "detail": f"{r['draw_ns_per_group']:.1f} vs {r['sweep_ns_per_group']:.1f} ns per group",
                        "met": r["met"],
                    }
                )
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Run the pooling benchmarks.")
    ap.add_argument("names", nargs="*", help=f"benchmarks to run (default: all): {', '.join(ORDER)}")
    ap.add_argument("--quick", action="store_true", help="smaller sizes and fewer repeats")
    ap.add_argument("--out", default=str(HERE / "results" / "latest.json"), help="JSON file to write")
    args = ap.parse_args(argv)
    names = args.names or list(ORDER)
    unknown = [n for n in names if n not in MODULES]
    if unknown:
        ap.error(f"unknown benchmark(s) {', '.join(unknown)}; choose from {', '.join(ORDER)}")
    import importlib

    started = time.strftime("%Y-%m-%dT%H:%M:%S")
    results, lines = {}, []
    for name in names:
        t = time.perf_counter()
        mod = importlib.import_module(MODULES[name])
        print(f"[{name}] running ...", file=sys.stderr, flush=True)
        res = mod.run(quick=args.quick)
        res["benchmark_seconds"] = time.perf_counter() - t
        results[name] = res
        part = mod.table(res)
        print("\n".join(part) + "\n", flush=True)
        lines += part + [""]
    targets = _targets(results)
    if targets:
        print("targets (ratios measured in this run)")
        for t in targets:
            print(
                f"  {t['target']:<52} want {t['want']:<16} got {t['got']:8.2f}   {'met' if t['met'] else 'MISSED'}"
                f"   ({t['detail']})"
            )
    import numba
    import numpy

    doc = {
        "started": started,
        "quick": args.quick,
        "benchmarks": names,
        "targets": targets,
        "results": results,
        "machine": {
            "python": platform.python_version(),
            "platform": platform.platform(),
            "cpu_count": os.cpu_count(),
            "numpy": numpy.__version__,
            "numba": numba.__version__,
            "load_1min_end": os.getloadavg()[0],
        },
    }
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(doc, indent=1, default=float))
    os.replace(tmp, out)
    print(f"\nwrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
