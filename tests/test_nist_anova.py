"""The NIST StRD one-way ANOVA data sets through the whole program: the classical figures against their
certified values, and each group's posterior against an exact posterior by quadrature.

Source: NIST Statistical Reference Datasets, one-way ANOVA (SiRstv, SmLs01-09, AtmWtAg; Simon and Lesage
1989 for SmLs), with certified sums of squares, mean squares, F, R^2 and residual sd. We read the copies
that scipy ships with its own tests (scipy/stats/tests/data/nist_anova); without them the test skips.

1. Classical figures. The data are decimals (1000000000000.4) that float64 cannot hold exactly: at 1e12
   a value is off by up to 6e-5, which moves a within-group sum of squares of 1.8 by about 1e-3 of itself.
   So the check is to the digits a float64 reader can reach: the bound on how far any computation on the
   parsed values may be from the certified figure is derived from the exact representation errors
   (Fractions of the parsed floats against the decimal text), and our figures, from pooling's statistics,
   must be within that bound (plus 1e-12 relative).
2. Posterior. `pooling fit --within shared --between normal` (flat mu and tau, p(log sigma) flat; AtmWtAg
   has two groups, so tau gets a half-Cauchy prior there). The exact posterior: p(tau, sigma | y) on a fine
   grid of (log tau, log sigma) with mu and every theta_j integrated out in closed form (a normal model),
   then theta_j | tau, sigma, y normal (its mean and variance mixed over the grid). Computed in the engine's
   internal units, where the data carry every digit, and mapped to the user's. groups.csv and summary.json
   must agree with it: each posterior mean within 4 Monte Carlo standard errors (plus one float64 step of
   the printed value), each posterior sd within 10% (the sd of an sd estimate from a few thousand effective
   draws is about 1-2%).
"""

from __future__ import annotations

import csv
import json
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import scipy

from pooling import diagnostics as dg

NIST = Path(scipy.__file__).parent / "stats" / "tests" / "data" / "nist_anova"
NAMES = ["SiRstv", "SmLs01", "SmLs02", "SmLs03", "AtmWtAg", "SmLs04", "SmLs05", "SmLs06", "SmLs07", "SmLs08", "SmLs09"]
pytestmark = pytest.mark.skipif(
    not (NIST / "SmLs07.dat").exists(), reason=f"scipy's copy of the NIST StRD ANOVA data is not installed ({NIST})"
)


def read_nist(name):
    """(certified figures, groups as lists of decimal texts) from a NIST StRD ANOVA file."""
    lines = (NIST / f"{name}.dat").read_text().splitlines()
    cert = {}
    for ln in lines[:60]:
        parts = ln.split()
        if ln.startswith("Between"):
            cert["df_between"], cert["ss_between"], cert["ms_between"], cert["f"] = (
                int(parts[2]),
                float(parts[3]),
                float(parts[4]),
                float(parts[5]),
            )
        elif ln.startswith("Within"):
            cert["df_within"], cert["ss_within"], cert["ms_within"] = int(parts[2]), float(parts[3]), float(parts[4])
        elif "R-Squared" in ln:
            cert["r2"] = float(parts[-1])
        elif "Standard Deviation" in ln:
            cert["resid_sd"] = float(parts[-1])
    groups: dict[str, list[str]] = {}
    start = next(i for i, ln in enumerate(lines) if ln.strip().startswith("Data:") and i > 40) + 1
    for ln in lines[start:]:
        parts = ln.split()
        if len(parts) == 2:
            groups.setdefault(parts[0], []).append(parts[1])
    return cert, groups


def exact_sums(groups, as_float: bool):
    """Between and within sums of squares in exact rational arithmetic, of the decimal texts (as_float False)
    or of the float64 values they parse to (as_float True)."""
    vals = {g: [Fraction(float(x)) if as_float else Fraction(x) for x in xs] for g, xs in groups.items()}
    N = sum(len(v) for v in vals.values())
    means = {g: sum(v) / len(v) for g, v in vals.items()}
    grand = sum(sum(v) for v in vals.values()) / N
    ssb = sum(len(v) * (means[g] - grand) ** 2 for g, v in vals.items())
    ssw = sum(sum((x - means[g]) ** 2 for x in v) for g, v in vals.items())
    return ssb, ssw


def _write_csv(groups, path):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["treatment", "response"])
        for g, xs in groups.items():
            for x in xs:
                w.writerow([f"T{g}", x])  # the decimal text exactly as NIST writes it


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    from pooling.cli import main

    out = {}
    d = tmp_path_factory.mktemp("nist")
    for name in NAMES:
        cert, groups = read_nist(name)
        _write_csv(groups, d / f"{name}.csv")
        extra = ["--tau", "half-cauchy:0.001"] if len(groups) < 3 else []
        code = main(
            [
                "fit",
                str(d / f"{name}.csv"),
                "--group",
                "treatment",
                "--value",
                "response",
                "--within",
                "shared",
                "--between",
                "normal",
                "--out",
                str(d / name),
                "--seed",
                "5",
                "--chains",
                "4",
                "--draws",
                "4000",
                "--max-draws",
                "4000",
                "--quiet",
                *extra,
            ]
        )
        out[name] = (code, cert, groups, d / name)
    return out


@pytest.mark.parametrize("name", NAMES)
def test_classical_figures_match_the_certified_values(runs, name):
    import pooling
    from pooling.report.interlab import oneway_anova

    code, cert, groups, folder = runs[name]
    st = pooling.read_table(folder.parent / f"{name}.csv", "treatment", "response")
    an = oneway_anova(st.n, st.mean, st.m2, st.mean_lo)
    assert an["df_between"] == cert["df_between"] and an["df_within"] == cert["df_within"]
    # the certified figures are those of the decimals; float64 values differ from them by their
    # representation error, which bounds how close any float64 computation can get
    ssb_dec, ssw_dec = exact_sums(groups, as_float=False)
    ssb_flt, ssw_flt = exact_sums(groups, as_float=True)
    assert float(ssb_dec) == pytest.approx(cert["ss_between"], rel=1e-14)  # the certified values are exact
    assert float(ssw_dec) == pytest.approx(cert["ss_within"], rel=1e-14)
    reach_b = abs(float(ssb_flt - ssb_dec)) + 1e-12 * cert["ss_between"]
    reach_w = abs(float(ssw_flt - ssw_dec)) + 1e-12 * cert["ss_within"]
    assert abs(an["ss_between"] - cert["ss_between"]) <= reach_b
    assert abs(an["ss_within"] - cert["ss_within"]) <= reach_w
    for key, _ss, df, reach in (
        ("ms_between", "ss_between", "df_between", reach_b),
        ("ms_within", "ss_within", "df_within", reach_w),
    ):
        assert abs(an[key] - cert[key]) <= reach / cert[df] + 1e-12 * cert[key]
    # F and R^2 through the same bounds (first-order propagation of both sums' errors)
    rel = reach_b / cert["ss_between"] + reach_w / cert["ss_within"]
    assert an["f"] == pytest.approx(cert["f"], rel=rel + 1e-12)
    r2 = an["ss_between"] / (an["ss_between"] + an["ss_within"])
    assert r2 == pytest.approx(cert["r2"], rel=rel + 1e-12)
    assert an["repeatability_sd"] == pytest.approx(cert["resid_sd"], rel=rel / 2 + 1e-12)
    # and the run folder's interlaboratory view carries the same ANOVA, in the user's units
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["interlab"]["anova"]["ss_within"] == pytest.approx(an["ss_within"], rel=1e-12)


def exact_posterior(n, ybar, W, tau_prior_scale=None, grid=(900, 500)):
    """Exact posterior of the shared normal model, flat mu, p(log sigma) flat, flat tau (or half-Cauchy),
    on a grid of (log tau, log sigma) cells: (mean and sd of each theta_j), in the units of the inputs.

    p(tau, sigma | y) ∝ p(tau) sigma^-(N - J) exp(-W / (2 sigma^2)) V^(1/2) prod_j d_j^(-1/2) exp(-Q/2) (1/sigma),
    d_j = sigma^2 / n_j + tau^2, 1/V = sum_j 1/d_j, m = V sum_j ybar_j / d_j, Q = sum_j (ybar_j - m)^2 / d_j
    (mu and the theta_j integrated out; the 1/sigma is p(sigma) for p(log sigma) flat), evaluated at cell
    centres with the cell's width as weight (the Jacobians of the logs). Given (tau, sigma), theta_j is
    normal with mean (1 - B_j) ybar_j + B_j m and variance (1 - B_j) v_j + B_j^2 V, B_j = v_j / d_j.
    """
    n = np.asarray(n, dtype=float)
    J, N = len(n), n.sum()
    s_hat = np.sqrt(W / (N - J))
    spread = max(float(np.std(ybar)), s_hat / np.sqrt(n.max()))
    le = np.linspace(np.log(spread) - 14.0, np.log(spread) + (4.0 if tau_prior_scale is None else 16.0), grid[0] + 1)
    width = 8.0 / np.sqrt(2 * (N - J))
    ll = np.linspace(np.log(s_hat) - width, np.log(s_hat) + width, grid[1] + 1)
    e, s = 0.5 * (le[1:] + le[:-1]), 0.5 * (ll[1:] + ll[:-1])
    tau, sig = np.exp(e)[:, None], np.exp(s)[None, :]
    sw = swy = logd = 0.0
    for j in range(J):
        d = sig**2 / n[j] + tau**2
        sw, swy, logd = sw + 1 / d, swy + ybar[j] / d, logd + np.log(d)
    m, V = swy / sw, 1.0 / sw
    Q = sum((ybar[j] - m) ** 2 / (sig**2 / n[j] + tau**2) for j in range(J))
    lp = (
        -(N - J) * np.log(sig)
        - W / (2 * sig**2)
        + 0.5 * np.log(V)
        - 0.5 * logd
        - 0.5 * Q
        + e[:, None]
        - s[None, :]
        + s[None, :]
    )  # + log tau: Jacobian of log tau; - log sigma + log sigma: p(sigma) and its Jacobian
    if tau_prior_scale is not None:
        lp = lp - np.log1p((tau / tau_prior_scale) ** 2)
    w = np.exp(lp - lp.max())
    w /= w.sum()
    edge = float(w[[0, -1], :].sum() + w[:, [0, -1]].sum())
    means, sds = np.empty(J), np.empty(J)
    for j in range(J):
        v = sig**2 / n[j]
        B = v / (v + tau**2)
        cm = (1 - B) * ybar[j] + B * m
        cv = (1 - B) * v + B * B * V
        means[j] = (w * cm).sum()
        sds[j] = np.sqrt((w * (cv + cm**2)).sum() - means[j] ** 2)
    return means, sds, edge


@pytest.mark.parametrize("name", NAMES)
def test_posterior_of_every_group_matches_the_exact_one(runs, name):
    import pandas as pd

    import pooling

    code, cert, groups, folder = runs[name]
    assert code == 0
    st = pooling.read_table(folder.parent / f"{name}.csv", "treatment", "response")
    model = pooling.Model(
        within="shared", between="normal", **({"tau": pooling.HalfCauchy(0.001)} if len(groups) < 3 else {})
    )
    p = pooling.build(st, model)
    # exact, in internal units (where the data keep every digit), then mapped to the user's
    means_i, sds_i, edge = exact_posterior(
        p.n, p.ybar, float(np.sum(p.m2)), None if len(groups) >= 3 else 0.001 / p.scale
    )
    assert edge < 1e-6
    c, k = p.center, p.scale
    table = pd.read_csv(folder / "groups.csv")
    summary = json.loads((folder / "summary.json").read_text())
    rows = pd.DataFrame(summary["groups_table"])
    assert list(table["group"]) == list(st.labels) == list(rows["group"])
    # Monte Carlo standard errors from the run's own draws (draws.nc, internal units as stored)
    import h5py

    with h5py.File(folder / "draws.nc", "r") as fh:
        theta = fh["posterior"]["theta"][...]
        assert fh["posterior"]["theta"].attrs["add_offset"] == c
    mcse = np.asarray(dg.mean_mc_error(theta), dtype=float).ravel() * k
    exact_mean = c + k * means_i
    exact_sd = k * sds_i
    step = np.spacing(np.abs(exact_mean))
    for got in (table["theta_mean"].to_numpy(), rows["theta_mean"].to_numpy()):
        assert np.all(np.abs(got - exact_mean) <= 4 * mcse + 2 * step), (name, np.max(np.abs(got - exact_mean) / mcse))
    for got in (table["theta_sd"].to_numpy(), rows["theta_sd"].to_numpy()):
        assert np.all(np.abs(got / exact_sd - 1) < 0.1), (name, got, exact_sd)
    # the intervals hold the mean (they did not at 1e12 when the answers were computed in user units)
    assert np.all(table["theta_low_95"] < table["theta_mean"]) and np.all(table["theta_mean"] < table["theta_high_95"])
    assert np.all(np.abs(table["shrink_realised"].fillna(0)) <= 1.5)
