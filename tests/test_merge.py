"""The merge of group statistics against numpy and exact arithmetic on the concatenated data.

References:
  - numpy on the concatenated data: np.mean and M2 = n * np.var (numpy's two-pass variance) on
    the fixed sets; on random data the corrected two-pass form in numpy (see numpy_two_pass),
    because plain n * np.var is itself off by far more than 1e-12 on, say, 1e12 +- 1e-3;
  - exact rational arithmetic (fractions.Fraction) on the very same float64 values: the true
    mean and M2 of the stored doubles, with no rounding at all;
  - the certified values of the NIST StRD univariate summary statistics sets NumAcc1-NumAcc4
    (Statistical Reference Datasets, NIST Information Technology Laboratory). From memory:
    NumAcc1 is 10000001, 10000003, 10000002 (mean 10000002, sd 1); NumAcc2, 3 and 4 are 1001 values,
    c + 0.2 followed by 500 pairs c + 0.1, c + 0.3, with c = 1, 1e6, 1e7 (mean c + 0.2, sd 0.1).
    The same pattern about c = 1e9 is the case the issue names (values near 1e9 with a spread of
    0.1); it is not a NIST set.

Tolerances. Against exact arithmetic and against numpy, the mean (hi + lo) and M2 must agree to
1e-12 relative (the issue's requirement). The implementation reaches about 1e-15 on these data,
numpy's two-pass M2 about 4e-13 at 1e9, so 1e-12 leaves room for neither to fail by rounding
alone. Against the certified decimals the bound is the representation error of the inputs: each
value is stored within half an ulp, which moves the sd by at most ulp(c) / 0.1 relative.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pooling import stats as ps

REL = 1e-12


def numacc(center: float, pairs: int = 500) -> np.ndarray:
    """The NumAcc layout (from memory): center + 0.2, then `pairs` times (center + 0.1, center + 0.3)."""
    return np.array([center + 0.2] + [center + 0.1, center + 0.3] * pairs)


# Source: NIST StRD univariate summary statistics, certified values (from memory).
CERTIFIED = [
    ("NumAcc1", np.array([10000001.0, 10000003.0, 10000002.0]), 10000002.0, 1.0),
    ("NumAcc2", numacc(1.0), 1.2, 0.1),
    ("NumAcc3", numacc(1e6), 1000000.2, 0.1),
    ("NumAcc4", numacc(1e7), 10000000.2, 0.1),
    ("near 1e9 (not NIST)", numacc(1e9), 1000000000.2, 0.1),
]


def exact_moments(x) -> tuple[Fraction, Fraction]:
    """Exact mean and M2 = sum (x - mean)^2 of the float64 values x, in rational arithmetic."""
    xs = [Fraction(float(v)) for v in x]
    mean = sum(xs, Fraction(0)) / len(xs)
    return mean, sum(((v - mean) ** 2 for v in xs), Fraction(0))


def numpy_two_pass(x) -> tuple[Fraction, float]:
    """numpy's mean m, refined by the mean of the deviations, and M2 = sum d^2 - (sum d)^2 / n, d = x - m.

    The corrected two-pass algorithm (Chan, Golub and LeVeque 1983, The American Statistician
    37(3), eq. 1.7; from memory): the second term removes the first-order effect of the rounding of m, which on
    data near 1e12 with a spread of 1e-3 would otherwise cost plain n * np.var several digits.
    The refined mean is returned exactly, as m + mean(d).
    """
    m = np.mean(x)
    d = x - m
    return Fraction(float(m)) + Fraction(float(np.mean(d))), float(np.sum(d * d) - np.sum(d) ** 2 / len(x))


def merged_mean(s: ps.GroupStats, i: int) -> Fraction:
    """The double-double mean hi + lo of group i, exactly."""
    return Fraction(float(s.mean[i])) + Fraction(float(s.mean_lo[i]))


def merge_in_parts(df: pd.DataFrame, cuts) -> ps.GroupStats:
    """from_frame on consecutive slices of df, then merged left to right."""
    edges = [0, *cuts, len(df)]
    parts = [ps.from_frame(df.iloc[a:b], "g", "y") for a, b in zip(edges[:-1], edges[1:]) if b > a]
    total = parts[0]
    for p in parts[1:]:
        total = ps.merge(total, p)
    return total


def assert_close_rel(got, want, rel=REL, floor=0.0):
    got, want = Fraction(float(got)) if not isinstance(got, Fraction) else got, want
    assert abs(got - want) <= rel * abs(want) + floor, (float(got), float(want))


@pytest.mark.parametrize("name,x,mean_cert,sd_cert", CERTIFIED, ids=[c[0] for c in CERTIFIED])
def test_numacc_sets_merged_from_chunks(name, x, mean_cert, sd_cert):
    df = pd.DataFrame({"g": "a", "y": x})
    cuts = list(range(7, len(x), 7)) if len(x) > 3 else [1, 2]  # chunks of 7 rows (1 row for NumAcc1)
    s = merge_in_parts(df, cuts)
    n = len(x)
    assert s.n[0] == n
    mean, m2 = exact_moments(x)
    # exact arithmetic on the stored doubles
    assert_close_rel(merged_mean(s, 0), mean)
    assert_close_rel(s.m2[0], m2)
    # numpy on the concatenated data
    assert_close_rel(merged_mean(s, 0), Fraction(float(np.mean(x))), rel=REL)
    assert_close_rel(s.m2[0], Fraction(float(n * np.var(x))), rel=REL)
    # the certified values, within the representation error of the inputs
    ulp = float(np.spacing(abs(mean_cert)))
    assert abs(float(s.mean[0]) - mean_cert) <= ulp
    sd = float(np.sqrt(s.m2[0] / (n - 1)))
    assert sd == pytest.approx(sd_cert, rel=max(ulp / sd_cert, 1e-14))


def test_textbook_formula_would_fail_near_1e9():
    # The test has teeth: the one-pass E[y^2] - E[y]^2 formula that DESIGN.md forbids loses
    # every digit of these data, so it cannot pass the checks above.
    x = numacc(1e9)
    naive = float(np.sum(x * x) - np.sum(x) ** 2 / len(x))
    _, m2 = exact_moments(x)
    assert abs(Fraction(naive) - m2) > 0.5 * m2


def test_chunked_csv_reading_equals_whole(tmp_path):
    x = numacc(1e9, pairs=150)
    g = np.array(["lab-1", "lab-2", "lab-3"])[np.arange(len(x)) % 3]
    path = tmp_path / "near1e9.csv"
    path.write_text("lab,value\n" + "".join(f"{a},{float(v)!r}\n" for a, v in zip(g, x)))
    s = ps.read_table(path, group="lab", value="value", chunk_rows=11)
    for i, lab in enumerate(s.labels):
        xi = x[g == lab]
        mean, m2 = exact_moments(xi)
        assert s.n[i] == len(xi)
        assert_close_rel(merged_mean(s, i), mean)
        assert_close_rel(s.m2[i], m2)


def test_chunked_reading_with_groups_that_come_and_go(tmp_path):
    # Source: exact rational arithmetic (fractions) as the reference, and the documented order of
    # groups (first appearance). Groups appear late, skip chunks or appear in one chunk only, so
    # the running index must grow and leave absent groups exactly as they were.
    g = np.random.default_rng(12)
    rows = []
    for block in range(9):  # 9 chunks of 40 rows; labels drawn from a pool that widens block by block
        pool = [f"s{j:03d}" for j in range(3 + 30 * block)]
        labs = g.choice(pool[-25:] if block % 3 == 2 else pool, size=40)
        vals = 1e9 + g.normal(0.0, 0.1, 40).round(6)
        rows += list(zip(labs, vals))
    path = tmp_path / "come_and_go.csv"
    path.write_text("lab,value\n" + "".join(f"{a},{float(v)!r}\n" for a, v in rows))
    s = ps.read_table(path, group="lab", value="value", chunk_rows=40)
    first_seen = list(dict.fromkeys(a for a, _ in rows))
    assert list(s.labels) == first_seen
    for i, lab in enumerate(s.labels):
        xi = np.array([v for a, v in rows if a == lab])
        mean, m2 = exact_moments(xi)
        assert s.n[i] == len(xi)
        assert_close_rel(merged_mean(s, i), mean)
        if len(xi) > 1:
            assert_close_rel(s.m2[i], m2)
        else:
            assert s.m2[i] == 0.0


def test_merge_moments_with_an_empty_side_is_exact():
    n, hi, lo, m2 = ps.merge_moments(0, 0.0, 0.0, 0.0, 4, 1e9 + 0.25, 1e-8, 0.125)
    assert (float(n), float(hi), float(lo), float(m2)) == (4.0, 1e9 + 0.25, 1e-8, 0.125)
    n, hi, lo, m2 = ps.merge_moments(4, 1e9 + 0.25, 1e-8, 0.125, 0, 0.0, 0.0, 0.0)
    assert (float(n), float(hi), float(lo), float(m2)) == (4.0, 1e9 + 0.25, 1e-8, 0.125)


# ---------------------------------------------------------------------------------------------
# property tests on random data and random splits


@st.composite
def split_data(draw):
    center = draw(st.sampled_from([0.0, 1.0, 1e3, 1e6, 1e9, -1e9, 1e12]))
    spread = draw(st.sampled_from([1e-3, 0.1, 1.0, 50.0]))
    size = draw(st.integers(2, 120))
    unit = draw(st.lists(st.floats(-1.0, 1.0, allow_nan=False), min_size=size, max_size=size))
    x = center + spread * np.array(unit)
    n_groups = draw(st.integers(1, 4))
    groups = draw(st.lists(st.integers(0, n_groups - 1), min_size=size, max_size=size))
    cuts = sorted(set(draw(st.lists(st.integers(1, size - 1), max_size=5))))
    return x, np.array([f"g{k}" for k in groups]), cuts


@settings(max_examples=150, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(split_data())
def test_random_splits_equal_exact_and_numpy(data):
    x, g, cuts = data
    s = merge_in_parts(pd.DataFrame({"g": g, "y": x}), cuts)
    assert sorted(s.labels) == sorted(set(g))
    assert int(s.n.sum()) == len(x)
    for i, lab in enumerate(s.labels):
        xi = x[g == lab]
        mean, m2 = exact_moments(xi)
        assert s.n[i] == len(xi)
        # the double-double mean to 1e-12 relative -- and in fact to 1e-12 of one ulp of the
        # mean's magnitude, far finer than any float64 mean could be
        floor = 1e-12 * float(np.spacing(max(abs(float(mean)), 1.0)))
        assert_close_rel(merged_mean(s, i), mean, floor=floor)
        # M2; the floor covers groups whose values are all equal (exact M2 = 0)
        assert_close_rel(s.m2[i], m2, floor=1e-12 * len(xi) * float(np.spacing(max(abs(float(mean)), 1.0))) ** 2)
        # numpy on the concatenated data of the group, by the corrected two-pass formulas
        np_mean, np_m2 = numpy_two_pass(xi)
        assert_close_rel(merged_mean(s, i), np_mean, floor=floor)
        assert_close_rel(s.m2[i], np_m2, floor=1e-12 * len(xi) * float(np.spacing(max(abs(float(mean)), 1.0))) ** 2)
