"""Quick start: the stages from Python on the embedded demo data.

Invented scenario: tensile strength (MPa) of test bars from 36 casting suppliers.
Run:  python examples/quickstart.py [OUT_DIR]
"""

import sys

import pooling
from pooling.cli import demo_path
from pooling.output import write_run
from pooling.results import compute

stats = pooling.read_table(demo_path(), group="supplier", value="strength_mpa")
print(f"{stats.J} suppliers, {stats.N} bars")

# defaults: heavy-tailed between-group distribution (df learned), mu flat, tau flat, p(s^2) ∝ 1/s^2, nu on a grid
model = pooling.Model(within="separate")
fit = pooling.fit(stats, model, pooling.Settings(chains=4, draws=1000, seed=7), progress=False)
res = compute(fit, pooling.ReportOptions(level=0.9, threshold=410.0))

for name, s in res.hyper.items():
    print(f"{name:5} mean {s['mean']:9.3f}  90% interval [{s['low']:.3f}, {s['high']:.3f}]  R-hat {s['rhat']:.3f}")
print("diagnostics targets met:", res.targets_met)
print("outlying suppliers:", res.tail["outlying"] or "none")

best = res.table.sort_values("rank_mean").iloc[0]
print(
    f"most likely best: {best['group']} (P(best) {best['p_best']:.2f}); "
    f"above 410 MPa with probability >= 0.95: {int((res.table['threshold_side'] == 'above').sum())} suppliers"
)

theta = fit.idata.posterior["theta"]  # labelled draws in MPa: chain, draw, group
print("draws of theta:", dict(theta.sizes))

if len(sys.argv) > 1:
    print("run folder:", write_run(fit, res, sys.argv[1]))
