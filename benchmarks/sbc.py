"""Simulation-based calibration with more replications than the test suite runs.

Runs the calibration of tests/test_sbc.py (same simulations, priors and rank computation; see
that file for the method, after Talts et al. 2018, arXiv:1804.06788) for every structure, prints
one line per parameter and writes benchmarks/results/sbc.json (written to a temporary sibling
first, then renamed, so a stopped run leaves no half-written file).

    python benchmarks/sbc.py                 # 2000 replications per structure, a few minutes
    python benchmarks/sbc.py --reps 500 --seed 7

A parameter is flagged when the chi-square test of its 10-bin rank histogram gives p < 1e-3.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def _load_sbc():
    spec = importlib.util.spec_from_file_location("sbc_core", HERE.parent / "tests" / "test_sbc.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000, help="replications per structure (default 2000)")
    ap.add_argument("--seed", type=int, default=20180418, help="base seed (default 20180418)")
    ap.add_argument("--out", type=Path, default=HERE / "results" / "sbc.json", help="where the JSON goes")
    args = ap.parse_args(argv)
    sbc = _load_sbc()
    results = {
        "method": "simulation-based calibration, Talts et al. 2018 (arXiv:1804.06788)",
        "reps_per_structure": args.reps,
        "seed": args.seed,
        "kept_draws": 99,
        "thin": 10,
        "bins": sbc.BINS,
        "reject_below": sbc.ALPHA,
        "python": platform.python_version(),
        "structures": {},
    }
    flagged = 0
    for structure in sbc.MODELS:
        start = time.perf_counter()
        ranks = sbc.sbc_ranks(structure, args.reps, seed=args.seed)
        seconds = time.perf_counter() - start
        entry = {"seconds": round(seconds, 2), "priors": sbc.MODELS[structure].priors(), "parameters": {}}
        for name, r in ranks.items():
            p = sbc.uniformity_pvalue(r)
            counts = np.bincount(r * sbc.BINS // 100, minlength=sbc.BINS)
            ok = p > sbc.ALPHA
            flagged += not ok
            entry["parameters"][name] = {"chi2_pvalue": p, "bin_counts": counts.tolist(), "uniform": ok}
            print(
                f"{structure:18s} {name:15s} p = {p:7.4f}  bins {' '.join(f'{c:4d}' for c in counts)}"
                f"  {'ok' if ok else 'NOT UNIFORM'}"
            )
        print(f"{structure:18s} {args.reps} replications in {seconds:.1f} s")
        results["structures"][structure] = entry
    results["flagged"] = flagged
    args.out.parent.mkdir(parents=True, exist_ok=True)
    tmp = args.out.with_name(args.out.name + f".tmp-{os.getpid()}")
    tmp.write_text(json.dumps(results, indent=2) + "\n")
    os.replace(tmp, args.out)
    print(f"wrote {args.out}; {flagged} parameter(s) flagged")
    return 1 if flagged else 0


if __name__ == "__main__":
    sys.exit(main())
