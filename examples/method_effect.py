"""Why labs differ: a round of 30 labs that use two methods, with the method as a group-level predictor.

Invented scenario (our own numbers, a demo): 30 labs measure the fat content (g/100 g) of one milk powder, 4 to 6
replicates each. 18 labs use method A, 12 use method B, and B reads 0.31 g/100 g higher than A. Within a method the
labs differ with a between-lab sd of 0.06; replicates scatter with an sd of 0.12. Fitted without the method, the
method's difference inflates tau and every B lab looks biased; fitted with it, tau is the spread of labs within a
method, the method effect comes out with its interval, and each method has its own consensus value.

Run:  python examples/method_effect.py [OUT_DIR]
"""

import sys

import numpy as np
import pandas as pd

import pooling
from pooling.results import compute

TRUE_A, TRUE_EFFECT, BETWEEN_SD, REPEAT_SD = 26.40, 0.31, 0.06, 0.12


def round_of_labs(seed: int = 2026) -> pd.DataFrame:
    """The invented round: one row per replicate (lab, method, fat)."""
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(30):
        method = "A" if j < 18 else "B"
        lab_mean = TRUE_A + (TRUE_EFFECT if method == "B" else 0.0) + rng.normal(0.0, BETWEEN_SD)
        for _ in range(int(rng.integers(4, 7))):
            rows.append((f"lab {j + 1:02d}", method, round(lab_mean + rng.normal(0.0, REPEAT_SD), 3)))
    return pd.DataFrame(rows, columns=["lab", "method", "fat"])


def main(out_dir=None, seed: int = 7):
    stats = pooling.from_frame(round_of_labs(), group="lab", value="fat", group_columns=["method"])
    model = pooling.Model(predictors=(pooling.Category("method", reference="A"),))
    # pooling.fit also fits the same data without the method (fit.without): tau with and without it
    fit = pooling.fit(stats, model, pooling.Settings(seed=seed), progress=False)
    res = compute(fit, pooling.ReportOptions(labs=True))
    pr = res.predictors
    effect = pr["coefficients"][0]
    print(
        f"method B vs A: {effect['mean']:+.3f} g/100 g, 95% interval {effect['low']:+.3f} to "
        f"{effect['high']:+.3f}, P(B reads higher) {effect['p_above_0']:.3f}; the truth is {TRUE_EFFECT:+.2f}"
    )
    for c in pr["consensus"]:
        print(
            f"consensus value, method {c['level']}: {c['mean']:.3f} (95% interval {c['low']:.3f} to "
            f"{c['high']:.3f}), {c['groups']} labs"
        )
    sp = pr["spread"]
    print(
        f"between-lab sd tau without the method: {sp['tau_without']['mean']:.3f} (95% interval "
        f"{sp['tau_without']['low']:.3f} to {sp['tau_without']['high']:.3f}); with it: {sp['tau_with']['mean']:.3f} "
        f"({sp['tau_with']['low']:.3f} to {sp['tau_with']['high']:.3f}); the method explains "
        f"{100 * sp['share_explained']:.0f}% of tau^2 (truth: the within-method sd is {BETWEEN_SD})"
    )
    t = res.table.sort_values("rank_in_level_mean")
    for method, sub in t.groupby("level"):
        best = sub.iloc[0]
        print(
            f"best lab using method {method}: {best['group']} (P(best among method {method} labs) "
            f"{best['p_best_in_level']:.2f}; bias against its method's consensus {best['bias_mean']:+.3f})"
        )
    print("diagnostics targets met:", res.targets_met)
    if out_dir:
        from pooling.output import write_run

        print("run folder:", write_run(fit, res, out_dir))
    return res


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else None)
