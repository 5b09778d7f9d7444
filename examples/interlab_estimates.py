"""An interlaboratory comparison from estimates with standard errors (the `known` structure).

Invented scenario: 12 labs report the lead content (mg/kg) of one reference soil, each with its
own standard uncertainty. Few labs and a reasonable expectation of the between-lab spread, so tau
gets a proper half-normal prior.
Run:  python examples/interlab_estimates.py
"""

import pandas as pd

import pooling

reports = pd.DataFrame(
    {
        "lab": [f"L{i:02d}" for i in range(1, 13)],
        "lead_mg_kg": [51.2, 49.8, 50.6, 53.9, 50.1, 48.7, 50.9, 47.2, 50.4, 51.7, 49.5, 55.3],
        "std_unc": [0.8, 1.1, 0.6, 1.5, 0.7, 1.0, 0.9, 1.8, 0.5, 1.2, 0.9, 2.0],
    }
)
stats = pooling.from_estimates(reports, group="lab", estimate="lead_mg_kg", std_error="std_unc")
model = pooling.Model(within="known", tau=pooling.HalfNormal(scale=3.0))
fit = pooling.fit(stats, model, pooling.Settings(seed=2026), progress=False)

post = fit.idata.posterior
mu = post["mu"].values.ravel()
print(
    f"consensus value: {mu.mean():.2f} mg/kg, 95% interval [{pd.Series(mu).quantile(0.025):.2f}, "
    f"{pd.Series(mu).quantile(0.975):.2f}]"
)
print(f"between-lab sd tau: {post['tau'].values.mean():.2f} mg/kg")
bias = (post["theta"] - post["mu"]).mean(("chain", "draw"))
for lab, b in zip(stats.labels, bias.values):
    print(f"  {lab}: bias {b:+.2f}")
print("Statistical screening supports, and never replaces, the applicable standards and professional judgment.")
