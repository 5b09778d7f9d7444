"""Quick start: the four stages from Python on the embedded demo data.

Invented scenario: tensile strength (MPa) of test bars from 36 casting suppliers.
Run:  python examples/quickstart.py [OUT_DIR]
"""
import sys

import pooling
from pooling.cli import demo_path
from pooling.output import write_run

stats = pooling.read_table(demo_path(), group="supplier", value="strength_mpa")
print(f"{stats.J} suppliers, {stats.N} bars")

model = pooling.Model(within="separate")  # defaults: mu flat, tau flat, p(s^2) ∝ 1/s^2, nu on a grid
fit = pooling.fit(stats, model, pooling.Settings(chains=4, draws=1000, seed=7), progress=False)

for name, s in fit.hyper_summary().items():
    print(f"{name:5} mean {s['mean']:9.3f}  95% interval [{s['q025']:.3f}, {s['q975']:.3f}]  R-hat {s['rhat']:.3f}")
print("diagnostics targets met:", fit.targets_met)

theta = fit.idata.posterior["theta"]  # labelled: chain, draw, group
best = theta.mean(("chain", "draw")).idxmax("group").item()
print("highest posterior mean strength:", best)

if len(sys.argv) > 1:
    print("run folder:", write_run(fit, sys.argv[1]))
