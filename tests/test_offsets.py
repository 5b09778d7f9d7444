"""Offsets from 1e9 to 1e15: every reported figure is the one computed at offset 0, shifted.

The engine computes in internal units (the data less the median group mean, over a power of two) and maps
back at the end, so an offset must change no answer but the locations, and those only by the offset. The
data here are chosen so that the offset itself is exact in float64: every value is a multiple of 1/8 and
every group's values sit symmetrically about a multiple of 1/8, so each group mean and sum of squares is
exact at 1e15 too (where float64 steps are 1/8). Then the internal data are the same bits at every offset,
the chains draw the same numbers, and (common practice, IEEE 754 arithmetic):
  * a location (a mean, an interval end, a consensus value) at offset O is the one at 0 plus O, to one
    float64 step of O (the last addition rounds once at O's magnitude);
  * every other figure (sds, widths, biases, shrinkage, probabilities, ranks, z-scores, R-hat, ESS) is equal.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

OFFSETS = (1e9, 1e12, 1e15)
# (centre in eighths, half-spreads in eighths): each group holds its centre and centre +- each half-spread
GROUPS = {
    "A": (0, (1, 3)),
    "B": (6, (2,)),
    "C": (-5, (1, 2, 4)),
    "D": (3, (1,)),
    "E": (11, (3, 5)),
    "F": (-2, (2, 3)),
    "G": (40, (1, 2)),
}  # G sits far out: the heavy tails' weights take part too
THRESHOLD = 2.0  # a multiple of 1/8: exact at every offset


def _table(offset: float) -> pd.DataFrame:
    rows = []
    for g, (c, halves) in GROUPS.items():
        vals = [c] + [c + s * h for h in halves for s in (-1, 1)]
        rows += [(g, offset + v / 8.0) for v in vals]
    df = pd.DataFrame(rows, columns=["lab", "value"])
    assert all((offset + v / 8.0) - offset == v / 8.0 for _, (c, hs) in GROUPS.items() for v in [c])
    return df


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    from pooling.cli import main

    d = tmp_path_factory.mktemp("offsets")
    out = {}
    for offset in (0.0,) + OFFSETS:
        path = d / f"o{offset:.0e}.csv"
        _table(offset).to_csv(path, index=False, float_format="%.17g")
        folder = d / f"run{offset:.0e}"
        code = main(
            [
                "fit",
                str(path),
                "--group",
                "lab",
                "--value",
                "value",
                "--out",
                str(folder),
                "--seed",
                "7",
                "--draws",
                "1000",
                "--max-draws",
                "1000",
                "--quiet",
                "--threshold",
                str(offset + THRESHOLD),
                "--lower-limit",
                str(offset - 1.0),
                "--upper-limit",
                str(offset + 3.0),
                "--allowed-bias",
                "0.5",
                "--labs",
                "--compare",
                "A,G,C",
            ]
        )
        assert code in (0, 3)
        out[offset] = (pd.read_csv(folder / "groups.csv"), json.loads((folder / "summary.json").read_text()))
    return out


def _same_or_shifted(a, b, offset, where):
    """b (at the offset) must equal a, or a + offset to a float64 step of the offset."""
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if a == b or (math.isnan(a) and math.isnan(b)):
            return
        step = 2 * np.spacing(offset)
        assert abs(b - (a + offset)) <= step, (where, a, b)
    elif isinstance(a, dict):
        assert set(a) == set(b), where
        for k in a:
            _same_or_shifted(a[k], b[k], offset, f"{where}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            _same_or_shifted(x, y, offset, f"{where}[{i}]")
    else:
        assert a == b, (where, a, b)


LOCATIONS = {"raw_mean", "theta_mean"} | {f"{c}_{s}_95" for c in ("theta",) for s in ("low", "high")}


@pytest.mark.parametrize("offset", OFFSETS)
def test_groups_csv_is_shifted_exactly(runs, offset):
    base, shifted = runs[0.0][0], runs[offset][0]
    assert list(base.columns) == list(shifted.columns)
    for col in base.columns:
        a, b = base[col], shifted[col]
        if col in LOCATIONS:
            np.testing.assert_array_less(
                np.abs(b.to_numpy() - (a.to_numpy() + offset)), 2 * np.spacing(offset) + 1e-300
            )
        elif pd.api.types.is_numeric_dtype(a):
            np.testing.assert_array_equal(a.to_numpy(), b.to_numpy(), err_msg=col)
        else:
            assert list(a) == list(b), col
    # and the answers are sane at every offset: each mean inside its interval
    assert np.all(shifted["theta_low_95"] <= shifted["theta_mean"]) and np.all(
        shifted["theta_mean"] <= shifted["theta_high_95"]
    )


@pytest.mark.parametrize("offset", OFFSETS)
def test_summary_json_is_shifted_exactly(runs, offset):
    a, b = runs[0.0][1], runs[offset][1]
    for key in (
        "hyperparameters",
        "interlab",
        "heavy_tails",
        "predictive_checks",
        "new_group_outside",
        "diagnostics",
        "groups_table",
        "pairwise",  # P(row > column) and the differences theta_a - theta_b: no location, equal at every offset
    ):
        _same_or_shifted(a[key], b[key], offset, key)
    assert b["run"]["internal_center"] - offset == a["run"]["internal_center"]
    assert b["run"]["internal_scale"] == a["run"]["internal_scale"]
