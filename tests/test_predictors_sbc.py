"""Simulation-based calibration with one categorical and one numeric group-level predictor.

Method and conventions as in tests/test_sbc.py (Talts, Betancourt, Simpson, Vehtari and Gelman 2018,
arXiv:1804.06788): parameters from the prior, data given them, a fit, and the rank of each true value among 99
thinned draws of one chain; under a calibrated sampler each rank is uniform on 0..99 (their Theorem 1). Ten
equal bins, chi-square, reject at p < 1e-3, fixed seeds.

Eight groups; the categorical predictor `method` has the levels A (groups 1-4, the reference) and B (5-8), the
numeric predictor `x` is fixed per group and varies within each level. The model's numeric predictor is centred
at its mean over the groups, so the simulation draws

    mu ~ N(0, 1), tau ~ half-normal(1), beta_B ~ N(0, 1), beta_x ~ N(0, 1)   (effects prior normal:1)
    theta_j = mu + beta_B [method_j = B] + beta_x (x_j - mean x) + tau e_j / sqrt(lambda_j),  e_j ~ N(0, 1)

with lambda_j = 1 for the normal between-group distribution, and df and lambda_j ~ Gamma(df/2, rate df/2) from
the default heavy-tailed one (df on its default grid with its default prior weights, README):
  known, heavy:       y_j ~ N(theta_j, se_j^2), se_j given;
  separate, normal:   s^2 ~ Gamma(3, 3), nu = 5, sigma_j^2 ~ Scaled-Inv-chi2(nu, s^2), n_j measurements.
Ranks are taken for mu, tau, both coefficients, theta_1 (and df, sigma_1, s where the model has them). A power
check simulates the effects from N(0, 1) but fits them with normal:0.2: the coefficients' ranks must be rejected.
"""

from __future__ import annotations

import numpy as np
import pytest
from test_sbc import ALPHA, uniformity_pvalue

import pooling
from pooling import posterior, sampler
from pooling.model import Category, HeavyBetween, Numeric, build
from pooling.stats import GroupStats

LABELS = tuple(f"g{j}" for j in range(1, 9))
METHOD = ("A", "A", "A", "A", "B", "B", "B", "B")
X = np.array([1.0, 3.0, 4.5, 6.0, 2.0, 3.5, 5.0, 8.0])
SE = np.array([0.5, 0.8, 1.0, 1.5, 0.6, 0.9, 1.2, 0.7])
N = (2, 3, 4, 6, 2, 3, 4, 6)
MU_PRIOR, TAU_PRIOR, EFFECTS = pooling.Normal(0.0, 1.0), pooling.HalfNormal(1.0), pooling.Normal(0.0, 1.0)
S2_PRIOR = pooling.Gamma(3.0, 3.0)
PREDICTORS = (Category("method", reference="A"), Numeric("x"))
DEFAULT_HEAVY = HeavyBetween()

MODELS = {
    "known-heavy": pooling.Model(within="known", mu=MU_PRIOR, tau=TAU_PRIOR, predictors=PREDICTORS, effects=EFFECTS),
    "separate-normal": pooling.Model(
        within="separate",
        mu=MU_PRIOR,
        tau=TAU_PRIOR,
        s2=S2_PRIOR,
        nu=pooling.NuFixed(5.0),
        between="normal",
        predictors=PREDICTORS,
        effects=EFFECTS,
    ),
}
assert MODELS["known-heavy"].between == DEFAULT_HEAVY  # the default between-group distribution is calibrated


def simulate(structure: str, rng) -> tuple[GroupStats, dict]:
    J = len(LABELS)
    mu = MU_PRIOR.loc + MU_PRIOR.scale * rng.standard_normal()
    tau = abs(TAU_PRIOR.scale * rng.standard_normal())
    b_method, b_x = EFFECTS.scale * rng.standard_normal(2)
    truth = {"mu": mu, "tau": tau, "beta_method": b_method, "beta_x": b_x}
    widen = np.ones(J)
    if structure.endswith("heavy"):
        grid, w = (np.asarray(x, dtype=float) for x in DEFAULT_HEAVY.grid_and_weights())
        df = float(rng.choice(grid, p=w / w.sum()))
        truth["df"] = df
        if np.isfinite(df):
            widen = 1.0 / np.sqrt(rng.gamma(df / 2.0, 2.0 / df, J))
    centre = mu + b_method * (np.array(METHOD) == "B") + b_x * (X - X.mean())
    theta = centre + tau * widen * rng.standard_normal(J)
    truth["theta"] = theta[0]
    columns = {"method": list(METHOD), "x": list(X)}
    if structure.startswith("known"):
        y = theta + SE * rng.standard_normal(J)
        data = GroupStats(
            LABELS, np.zeros(J, dtype=np.int64), y, np.zeros(J), se=SE.copy(), kind="known", source="simulated"
        )
        return data.with_columns(columns), truth
    s2 = rng.gamma(S2_PRIOR.shape, 1.0 / S2_PRIOR.rate)
    sigma2 = 5.0 * s2 / rng.chisquare(5.0, J)  # Scaled-Inv-chi2(5, s^2)
    means, m2s = [], []
    for t, s, k in zip(theta, np.sqrt(sigma2), N):
        y = t + s * rng.standard_normal(k)
        means.append(y.mean())
        m2s.append(np.sum((y - y.mean()) ** 2))
    truth.update(sigma=float(np.sqrt(sigma2[0])), s=float(np.sqrt(s2)))
    data = GroupStats(LABELS, np.asarray(N, dtype=np.int64), np.array(means), np.array(m2s), source="simulated")
    return data.with_columns(columns), truth


def sbc_ranks(
    structure: str, reps: int, seed: int, model=None, kept: int = 99, thin: int = 10, warmup: int = 200
) -> dict[str, np.ndarray]:
    model = model or MODELS[structure]
    ranks: dict[str, list[int]] = {}

    def no_extension(raw):
        return [], {"missed_list": []}

    for r in range(reps):
        sim_seq, fit_seq, tie_seq = np.random.SeedSequence([seed, r]).spawn(3)
        data, truth = simulate(structure, np.random.default_rng(sim_seq))
        ties = np.random.default_rng(tie_seq)
        problem = build(data, model)
        settings = sampler.Settings(
            chains=1, draws=kept * thin, warmup=warmup, seed=int(fit_seq.generate_state(1)[0]), threads=1
        )
        fit = posterior.finish(sampler.sample_raw(problem, settings, progress=False, diagnose=no_extension), problem)
        beta = fit.draws("beta")
        for name, value in truth.items():
            if name == "beta_method":
                x = beta[:, 0]
            elif name == "beta_x":
                x = beta[:, 1]
            else:
                x = fit.draws(name)
                if x.ndim == 2:
                    x = x[:, 0]
            draws = x.reshape(-1)[thin - 1 :: thin]
            # ties only for the discrete df: broken at random, which keeps the rank uniform
            rank = int(np.sum(draws < value)) + int(ties.integers(0, np.sum(draws == value) + 1))
            ranks.setdefault(name, []).append(rank)
    return {k: np.array(v) for k, v in ranks.items()}


REPS = 400


@pytest.mark.parametrize("structure", list(MODELS))
def test_ranks_are_uniform_with_predictors(structure):
    ranks = sbc_ranks(structure, REPS, seed=2016)
    want = {"mu", "tau", "beta_method", "beta_x", "theta"}
    want |= {"df"} if structure.endswith("heavy") else {"sigma", "s"}
    assert set(ranks) == want
    for name, r in ranks.items():
        p = uniformity_pvalue(r)
        # Source: Talts et al. (2018), Theorem 1: ranks are uniform on 0..L under a calibrated sampler
        assert p > ALPHA, (structure, name, p, np.bincount(r * 10 // 100, minlength=10))


def test_sbc_detects_a_wrong_prior_on_the_effects():
    # simulate beta ~ N(0, 1), fit with N(0, 0.2^2): the posterior of beta is pulled to 0, the true values rank at
    # the ends, and the histogram must be rejected
    m = MODELS["known-heavy"]
    wrong = pooling.Model(within="known", mu=m.mu, tau=m.tau, predictors=PREDICTORS, effects=pooling.Normal(0.0, 0.2))
    ranks = sbc_ranks("known-heavy", 200, seed=2016, model=wrong)
    assert min(uniformity_pvalue(ranks["beta_method"]), uniformity_pvalue(ranks["beta_x"])) < ALPHA
