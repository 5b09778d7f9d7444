"""Summary mode: peak memory and time per sweep against the number of groups J, from 1e3 to 1e6.

Each case runs in a subprocess of its own, so that resource.getrusage(RUSAGE_SELF).ru_maxrss is that
run's peak resident memory. A case is what `pooling fit --summary on` does: invented statistics
(benchmarks/common.invented_groups, separate structure), pooling.fit with 4 chains on 2 threads,
then the whole run folder (draws.nc, summary.json, groups.csv with every group, report.html).

Reported per case:
  rss_before_mb     resident memory after the data are built, before sampling (interpreter,
                    libraries, compiled kernels, the statistics)
  peak_mb           peak resident memory of the whole case
  per_group_bytes   (peak - before) / J: what the run costs per group
  sweep_seconds     sampling wall time / (warm-up + draws): one sweep of all 4 chains on 2 threads
  ns_per_group      sweep_seconds * threads / (chains * J): the cost of one group in one chain's sweep,
                    in wall time (inflated when others use the cores)
  cpu_ns_per_group  the same from the process's CPU time during the fit (all threads), which
                    other people's work does not inflate
  write_seconds     the run folder
  full_draw_gb      what the draws of theta and sigma alone would take at the same length in full-draw mode
A comparison row runs the full-draw mode where it fits (J <= 1e4), and an accuracy row compares
summary mode with full draws of the same seed at J = 1e4 (largest limit error against its bound).

    python benchmarks/bench_summary_mode.py          # J = 1e3, 1e4, 1e5 and the comparison rows
    python benchmarks/bench_summary_mode.py --big    # adds J = 1e6 (a few minutes; run it once)

Writes benchmarks/results/bench_summary_mode.json and prints a table.

Cost per draw (`--draw`, and `python benchmarks/run.py summary_draw`). Target from the issue: at J = 1e6 one
draw of summary mode costs at most 1.3x one full-mode sweep of the same size. One chain on one thread, separate
structure, the default heavy-tailed between model, the invented statistics of bench_sweep.py; summary mode's own
warm-up (pooling.summary.prepare: slice-width adaptation, pilot, grids, rank buckets, kept groups, accumulators).
Then, on that chain, alternately: k draws of summary mode's draw phase (the chain's `run` as the sampler calls
it: kernel.sweep plus every per-draw summary, in the sampler's chunks) and k sweeps of the full-mode sweep
without storage (kernel.sweeps with zero-row outputs, as bench_sweep.py times it). Thread CPU time, best of the
interleaved repeats of each (k a multiple of the 16 draws whose histogram bins are buffered, so that the timed
draws count them as often as the sampler's); the ratio is draw time / sweep time. Each J runs in a process of its own, whose
peak resident memory (VmHWM) is reported.

    python benchmarks/bench_summary_mode.py --draw            # J = 1e5 and 1e6 (about a minute)
    python benchmarks/bench_summary_mode.py --draw --quick    # J = 1e5 only
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
CHAINS, THREADS, WARMUP, DRAWS = 4, 2, 100, 200


def _rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def child(J: int, mode: str) -> dict:
    """One case, in this process (run by the parent in a subprocess)."""
    sys.path.insert(0, str(HERE))
    import numpy as np
    from common import invented_groups

    import pooling
    from pooling import summary
    from pooling.asked import ReportOptions
    from pooling.output import write_run
    from pooling.results import compute

    stats = invented_groups(J, tau=1.0, sigma=2.0, n_lo=2, n_hi=12, seed=1)
    settings = pooling.Settings(chains=CHAINS, warmup=WARMUP, draws=DRAWS, max_draws=DRAWS, seed=1, threads=THREADS)
    options = ReportOptions(threshold=0.5)
    # compile outside the measurement: a tiny fit of the same mode
    pooling.fit(invented_groups(50, 1.0, 2.0, 2, 12, seed=2), None, settings, summary=mode != "full", options=options)
    before = _rss_mb()
    t0, c0 = time.perf_counter(), time.process_time()
    fit = pooling.fit(stats, None, settings, summary=mode != "full", options=options)
    t1, c1 = time.perf_counter(), time.process_time()
    out = {
        "J": J,
        "mode": mode,
        "chains": CHAINS,
        "threads": THREADS,
        "warmup": WARMUP,
        "draws": DRAWS,
        "rss_before_mb": round(before, 1),
        "fit_seconds": round(t1 - t0, 2),
        "fit_cpu_seconds": round(c1 - c0, 2),
        "sampling_seconds": round(fit.raw.seconds, 2),
    }
    if mode == "accuracy":
        full = pooling.fit(stats, None, settings, summary=False)
        out.update(_accuracy(fit, full, options))
    else:
        with tempfile.TemporaryDirectory() as tmp:
            t2 = time.perf_counter()
            write_run(fit, lambda: compute(fit, options), Path(tmp) / "run")
            out["write_seconds"] = round(time.perf_counter() - t2, 2)
            out["folder_mb"] = round(sum(p.stat().st_size for p in (Path(tmp) / "run").iterdir()) / 2**20, 1)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux
    sweeps = WARMUP + DRAWS
    out.update(
        peak_mb=round(peak, 1),
        per_group_bytes=round((peak - before) * 2**20 / J),
        sweep_seconds=round(fit.raw.seconds / sweeps, 4),
        ns_per_group=round(fit.raw.seconds / sweeps * THREADS / (CHAINS * J) * 1e9, 1),
        cpu_ns_per_group=round((c1 - c0) / (sweeps * CHAINS * J) * 1e9, 1),
        accumulator_mb_estimate=round(summary.summary_bytes(J, "separate", CHAINS) / 2**20, 1),
        full_draw_gb=round(CHAINS * DRAWS * J * 8 * 2 / 2**30, 3),
        load=round(os.getloadavg()[0], 2),
    )
    del np
    return out


def _vm(key: str) -> float:
    """A line of /proc/self/status in MB (VmHWM: this process's own peak; ru_maxrss would start from the parent's)."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024
    return float("nan")


DRAW_J, DRAW_J_QUICK = (100_000, 1_000_000), (100_000,)
DRAW_TARGET = 1.3  # at J = 1e6: one summary-mode draw <= 1.3 full-mode sweeps


def draw_child(J: int, repeats: int, budget: float) -> dict:
    """Summary mode's cost per draw against a full-mode sweep, one chain on this thread (see the module notes)."""
    sys.path.insert(0, str(HERE))
    import threading

    import numpy as np
    from common import KernelChain, best, chunk_size, invented_groups, problem_of

    import pooling
    from pooling import summary
    from pooling import summary_kernel as sk
    from pooling.asked import ReportOptions

    problem = problem_of(invented_groups(J, tau=0.5, sigma=1.0, n_lo=2, n_hi=20, seed=J))  # as bench_sweep.py
    warm = int(np.clip(2_000_000 // J, 40, 500))  # bench_sweep.py's warm-up length
    settings = pooling.Settings(chains=1, warmup=warm, draws=100, seed=1, threads=1)
    ready = summary.prepare(problem, settings, ReportOptions(), summary.SummaryOptions(), threads=1)
    chain = ready.chains[0]
    sweeper = KernelChain(problem, chain)  # the same chain, state and Generator, swept without storing
    chunk = chunk_size(J)
    stop = threading.Event()
    # whole buffers of histogram bins (summary_kernel.HBUF draws), so that the timed draws flush as often as the
    # sampler's do; the chain's run also flushes at its end, where the sampler has hundreds of draws per call
    k = sk.HBUF * max(1, round(budget / (50e-9 * J) / sk.HBUF))

    def draws():
        chain.run(problem, k, True, False, chunk, stop, lambda n: None)
        chain.parts.clear()

    def sweeps():
        sweeper.run(k)

    draws()  # compile (or load from the cache) and touch every accumulator once before timing
    sweeps()
    t_draw = t_sweep = np.inf
    for _ in range(repeats):  # interleaved, so a busy spell of the machine hits both alike
        t_sweep = min(t_sweep, best(sweeps, 1))
        t_draw = min(t_draw, best(draws, 1))
    acc_mb = sum(a.nbytes for a in ready.acc.values()) / 2**20
    return {
        "J": J,
        "structure": problem.model.within,
        "between": problem.model.between.name,
        "draws_timed": k,
        "repeats": repeats,
        "kept_groups": int(ready.setup.kept.shape[0]),
        "histogram_rows": int(ready.setup.rowmap.max()) + 1,
        "draw_ns_per_group": t_draw / k / J * 1e9,
        "sweep_ns_per_group": t_sweep / k / J * 1e9,
        "extra_ns_per_group": (t_draw - t_sweep) / k / J * 1e9,
        "ratio": t_draw / t_sweep,
        "target": f"<= {DRAW_TARGET}" if J >= 1_000_000 else None,
        "met": bool(t_draw / t_sweep <= DRAW_TARGET) if J >= 1_000_000 else None,
        "accumulators_mb": round(acc_mb, 1),
        "peak_mb": round(_vm("VmHWM"), 1),
        "load": round(os.getloadavg()[0], 2),
    }


def run(quick: bool = False) -> dict:
    """The cost per draw at each J, each in a process of its own (for benchmarks/run.py)."""
    repeats, budget = (3, 0.1) if quick else (5, 0.2)
    rows = []
    env = dict(os.environ)
    env.setdefault("NUMBA_CACHE_DIR", str(HERE.parent / ".numba-cache"))
    for J in DRAW_J_QUICK if quick else DRAW_J:
        cmd = [sys.executable, __file__, "--draw-child", str(J), str(repeats), str(budget)]
        proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
        if proc.returncode != 0:
            raise RuntimeError(f"draw cost at J={J} failed:\n{proc.stderr[-3000:]}")
        rows.append(json.loads(proc.stdout.strip().splitlines()[-1]))
    return {"name": "summary_draw", "rows": rows}


def table(res: dict) -> list[str]:
    out = [
        "summary mode: one draw against one full-mode sweep (ns per group; thread CPU time, best of repeats)",
        f"  {'J':>9} {'draw':>8} {'sweep':>8} {'extra':>8} {'ratio':>6} {'peak MB':>8} {'load':>5}  target",
    ]
    for r in res["rows"]:
        tgt = "" if r["target"] is None else f"{r['target']}  {'met' if r['met'] else 'MISSED'}"
        out.append(
            f"  {r['J']:>9,} {r['draw_ns_per_group']:8.1f} {r['sweep_ns_per_group']:8.1f} "
            f"{r['extra_ns_per_group']:8.1f} {r['ratio']:6.2f} {r['peak_mb']:8.0f} {r['load']:5.1f}  {tgt}"
        )
    return out


def _accuracy(fit, full, options) -> dict:
    """Summary against full draws of the same seed: means, probabilities, and limits against their bounds."""
    import numpy as np

    from pooling.report.groups import group_table

    ref = group_table(full, options.level, options.k, options.best, options.threshold)
    t = fit.table
    others = np.setdiff1d(np.arange(len(t)), fit.kept)
    sd = ref["theta_sd"].to_numpy()[others]
    res = {
        "mean_max_abs_diff": float(np.max(np.abs(t["theta_mean"] - ref["theta_mean"]))),
        "p_top_k_equal": bool(np.array_equal(t["p_top_k"], ref["p_top_k"])),
        "p_above_equal": bool(np.array_equal(t["p_above"], ref["p_above"])),
    }
    for col, err in (
        ("theta_low", "theta_limit_error"),
        ("theta_high", "theta_limit_error"),
        ("sigma_low", "sigma_limit_error"),
        ("shrink_high", "shrink_limit_error"),
    ):
        d = np.abs(t[col].to_numpy() - ref[col].to_numpy())[others]
        b = t[err].to_numpy()[others]
        res[col] = {
            "within_bound": bool(np.all(d <= b + 1e-12)),
            "max_error_over_bound": float(np.max(d / b)),
            "median_error_over_bound": float(np.median(d / b)),
        }
        if col.startswith("theta"):
            res[col].update(median_error_sd=float(np.median(d / sd)), median_bound_sd=float(np.median(b / sd)))
    d = np.abs(t["rank_mean"] - ref["rank_mean"]).to_numpy()[others]
    res["rank_mean"] = {
        "within_bound": bool(np.all(d <= t["rank_mean_error"].to_numpy()[others] + 1e-9)),
        "max_abs_error": float(d.max()),
        "median_bound": float(np.median(t["rank_mean_error"])),
    }
    # rank intervals of the groups not kept: contain the exact (full-draw) interval, ends within rank_limit_error
    lo, hi = ref["rank_low"].to_numpy()[others], ref["rank_high"].to_numpy()[others]
    g_lo, g_hi = t["rank_low"].to_numpy()[others].astype(float), t["rank_high"].to_numpy()[others].astype(float)
    e = t["rank_limit_error"].to_numpy()[others]
    res["rank_interval"] = {
        "contains_exact": bool(np.all(g_lo <= lo) and np.all(g_hi >= hi)),
        "within_bound": bool(np.all(lo - g_lo <= e) and np.all(g_hi - hi <= e)),
        "median_bound": float(np.median(e)),
        "max_bound": float(np.max(e)),
        "median_extra_width": float(np.median((g_hi - g_lo) - (hi - lo))),
        "median_exact_width": float(np.median(hi - lo)),
        "max_end_error": float(max(np.max(lo - g_lo), np.max(g_hi - hi))),
    }
    return res


def run_case(J: int, mode: str) -> dict:
    env = dict(os.environ)
    env.setdefault("NUMBA_CACHE_DIR", str(HERE.parent / ".numba-cache"))
    proc = subprocess.run([sys.executable, __file__, "--child", str(J), mode], capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"case J={J} {mode} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--child", nargs=2, metavar=("J", "MODE"))
    ap.add_argument("--big", action="store_true", help="add J = 1e6")
    ap.add_argument("--draw", action="store_true", help="only the cost per draw against a full-mode sweep")
    ap.add_argument("--quick", action="store_true", help="with --draw: J = 1e5 only, fewer repeats")
    ap.add_argument("--draw-child", nargs=3, metavar=("J", "REPEATS", "BUDGET"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(int(args.child[0]), args.child[1])))
        return 0
    if args.draw_child:
        J, repeats, budget = args.draw_child
        print(json.dumps(draw_child(int(J), int(repeats), float(budget))))
        return 0
    if args.draw:
        print("\n".join(table(run(quick=args.quick))))
        return 0
    cases = [(1_000, "summary"), (10_000, "summary"), (100_000, "summary")] + (
        [(1_000_000, "summary")] if args.big else []
    )
    cases += [(1_000, "full"), (10_000, "full"), (10_000, "accuracy")]
    rows = []
    for J, mode in cases:
        r = run_case(J, mode)
        rows.append(r)
        print(
            f"J={J:>9,} {mode:9} peak {r['peak_mb']:8.1f} MB  before {r['rss_before_mb']:7.1f} MB  "
            f"{r['per_group_bytes']:>7} B/group  sweep {r['sweep_seconds']:.4f} s  {r['cpu_ns_per_group']:7.1f} cpu ns/group  "
            f"write {r.get('write_seconds', float('nan')):6.2f} s  full draws {r['full_draw_gb']:7.3f} GB  load {r['load']}",
            flush=True,
        )
    result = {
        "machine": {"python": platform.python_version(), "cpus": os.cpu_count(), "platform": platform.platform()},
        "settings": {"chains": CHAINS, "threads": THREADS, "warmup": WARMUP, "draws": DRAWS},
        "cases": rows,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    out = HERE / "results" / "bench_summary_mode.json"
    out.parent.mkdir(exist_ok=True)
    if out.exists() and not args.big:  # keep an earlier J = 1e6 case when re-running the small ones
        old = json.loads(out.read_text())
        result["cases"] += [c for c in old.get("cases", []) if c["J"] >= 1_000_000]
    out.write_text(json.dumps(result, indent=2) + "\n")
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
