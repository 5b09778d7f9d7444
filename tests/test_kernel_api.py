"""The kernel's contract with earlier versions and its inputs.

With the normal between-group distribution (`--between normal`) a run must give the draws the kernel
gave before heavy tails existed, for the same seed: the sweep consumes the random stream in the same
order, draw for draw. REFERENCE holds the first stored draws (after 30 warm-up sweeps, 2 chains, seed
11) printed by the kernel of commit 5f29304 (the last version without heavy tails) for one invented
data set per structure; for `separate`, by the kernel of 2026-12-03, whose joint move of (sigma_j^2,
theta_j) changed that structure's stream on purpose (DEVELOPERS.md, "A joint move of (sigma_j^2,
theta_j)"): a run of an earlier version with the same seed gives other, equally valid draws. Chains are chaotic: a change in the stream or the order of updates gives
entirely different numbers from the first sweeps on, while a rounding difference between CPUs (numba
compiles for the host; a summation may be vectorised differently) moves them by a few ulps only in
the first sweeps. Hence 1e-9 relative: far above rounding, far below any real change.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pooling.model import Model, NuFixed, build
from pooling.sampler import Settings, sample_raw
from pooling.stats import from_estimates, from_frame

REFERENCE = {
    # separate: printed by the kernel of 2026-12-03 with the joint move of (sigma_j^2, theta_j) (kernel.pair_step),
    # which the separate structure makes every sweep, in both between-group distributions
    "separate": {
        "mu": [-0.4216095637228649, -0.17791600623478027, -0.3510307271149378, 0.011562749021725716],
        "tau": [1.1843641242855114, 1.0297139704744822, 1.7070166022535287, 0.7794123380719844],
        "theta": [
            [-1.296792482990023, 1.4848589380568147, -0.6219630742033687],
            [-0.07251235568750491, 0.9041367396959124, 0.9870460460650633],
            [-0.799112442648824, 1.558293031183047, -0.48835034495060786],
            [-0.6048922210074452, 2.027408671541127, -0.5683325325475128],
        ],
    },
    "separate_fixed": {
        "mu": [0.5741630082075568, -0.42383816166823746, 0.9995644099927199, 0.7838370405580435],
        "tau": [1.838125132956337, 1.3737787675111692, 2.0979471633170146, 0.789730767542707],
        "theta": [
            [-0.1153685959096656, 0.9399131330916615, 0.13185205234824965],
            [-0.8186175185409782, 0.468267240372846, 0.02705606676777332],
            [-1.2036360396508698, 2.1731337383129974, -0.030650834700838597],
            [-2.478596321100004, 2.9938746463549832, 0.5967198841295985],
        ],
    },
    "shared": {
        "mu": [-0.034918435475228216, 0.9482807592254259, 0.28264694129982204, 1.169590093148656],
        "tau": [1.7838746092741253, 1.054530128473897, 1.4318274270330986, 1.1863034303527622],
        "theta": [
            [-0.9210713404825164, 1.861651281758663, -0.06558960845677242],
            [-0.8247244860090354, 1.7304956612582274, 0.07379525280686809],
            [-0.5137741062017442, 1.6452526552107871, 0.31366225468857306],
            [-1.0290078678712173, 2.0614514837503743, 0.560002534343654],
        ],
    },
    "known": {
        "mu": [0.006340766300841842, 0.16500137944754598, 0.702442395578927, -0.18692895676586083],
        "tau": [0.7025339512456201, 0.1612213631502232, 0.30080054466894357, 0.5853805430933123],
        "theta": [
            [0.9904494898644561, -0.25152694680579757, 0.47333599088486744],
            [0.19893161296083064, 0.21623806867686865, 0.29952818397622566],
            [1.3551784180528743, 0.2598171979445081, -0.08411095376282512],
            [-0.42091703390728225, 0.06556287637672195, 0.10301663984853732],
        ],
    },
}


def _data():
    rng = np.random.default_rng(5)  # invented data: the property checked is equality with the old kernel
    rows = []
    for j in range(7):
        th = 10 + rng.normal(0, 1.5)
        for _ in range(2 + j % 4):
            rows.append((f"g{j}", th + rng.normal(0, 0.8)))
    raw = from_frame(pd.DataFrame(rows, columns=["g", "y"]), "g", "y")
    est = pd.DataFrame(
        {
            "g": [f"s{j}" for j in range(8)],
            "e": [28.0, 8, -3, 7, -1, 1, 18, 12],
            "se": [15.0, 10, 16, 11, 9, 11, 10, 18],
        }
    )
    return raw, from_estimates(est, "g", "e", "se")


@pytest.mark.parametrize("name", list(REFERENCE))
def test_normal_model_gives_the_earlier_draws(name):
    raw, known = _data()
    models = {
        "separate": (raw, Model(between="normal")),
        "separate_fixed": (raw, Model(nu=NuFixed(4.0), between="normal")),
        "shared": (raw, Model(within="shared", between="normal")),
        "known": (known, Model(within="known", between="normal")),
    }
    stats, model = models[name]
    p = build(stats, model)
    r = sample_raw(
        p,
        Settings(chains=2, draws=4, warmup=30, seed=11, max_draws=4),
        progress=False,
        diagnose=lambda raw: ([], {"worst": {}, "misses": 0, "growth": 1, "missed_list": []}),
    )
    ref = REFERENCE[name]
    np.testing.assert_allclose(r.mu[0], ref["mu"], rtol=1e-9)
    np.testing.assert_allclose(r.tau[1], ref["tau"], rtol=1e-9)
    np.testing.assert_allclose(r.theta[0, :, :3], ref["theta"], rtol=1e-9)
    # and the heavy-tailed default is a different stream (it draws lambda_j and df every sweep)
    h = build(stats, Model(within=model.within, nu=model.nu))
    rh = sample_raw(
        h,
        Settings(chains=2, draws=4, warmup=30, seed=11, max_draws=4),
        progress=False,
        diagnose=lambda raw: ([], {"worst": {}, "misses": 0, "growth": 1, "missed_list": []}),
    )
    assert not np.allclose(rh.mu[0], ref["mu"])
