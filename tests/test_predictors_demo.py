"""The demo of examples/method_effect.py says what it shows: on its invented round of 30 labs (demo data, our own
numbers), the method effect is recovered with a 95% interval that covers the truth, tau without the method is much
larger than with it, and each method has its consensus value near its truth. (tests/test_readme_and_examples.py
runs the script as written; this test checks its claims.)"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "examples" / "method_effect.py"


@pytest.fixture(scope="module")
def demo():
    spec = importlib.util.spec_from_file_location("method_effect", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod, mod.main()


def test_method_effect_interval_covers_the_truth(demo):
    mod, res = demo
    effect = res.predictors["coefficients"][0]
    assert effect["name"] == "method: B vs A"
    assert effect["low"] < mod.TRUE_EFFECT < effect["high"]
    assert effect["p_above_0"] > 0.999
    assert res.targets_met


def test_tau_without_the_method_is_much_larger(demo):
    _, res = demo
    sp = res.predictors["spread"]
    # the method's difference (0.31) dwarfs the within-method spread (0.06): without the method tau must take it up
    assert sp["tau_without"]["mean"] > 2.5 * sp["tau_with"]["mean"]
    assert sp["tau_without"]["low"] > sp["tau_with"]["mean"]
    assert sp["share_explained"] > 0.8


def test_each_method_has_its_consensus_value(demo):
    mod, res = demo
    cons = {c["level"]: c for c in res.predictors["consensus"]}
    assert set(cons) == {"A", "B"} and cons["A"]["groups"] == 18 and cons["B"]["groups"] == 12
    # the truths of the invented round; each lab's own between-lab draw moves the consensus of its method by
    # about 0.06 / sqrt(labs) beside the sampling error, so the check is against the interval widened by that
    for level, truth in (("A", mod.TRUE_A), ("B", mod.TRUE_A + mod.TRUE_EFFECT)):
        c = cons[level]
        slack = 3 * mod.BETWEEN_SD / c["groups"] ** 0.5
        assert c["low"] - slack < truth < c["high"] + slack, (level, c, truth)
