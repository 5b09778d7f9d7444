"""How output.write_run writes draws.nc: uncompressed.

That is a speed choice measured in benchmarks/README.md (`pooling fit`, whole process); this test
checks that it does not change what is written or leave the interpreter in a changed state.
"""
from __future__ import annotations

import os
import subprocess
import sys
import textwrap

# A fresh interpreter, so that nothing another test did to the process can matter.
_SCRIPT = textwrap.dedent(r"""
    import sys
    import h5py
    import numpy as np
    import pooling
    from pooling import model, output, sampler, stats
    from pooling._compat import az

    # invented: six groups of four measurements
    import pandas as pd
    g = np.random.default_rng(3)
    frame = pd.DataFrame({"g": np.repeat([f"g{j}" for j in range(6)], 4), "y": g.normal(10.0, 1.0, 24)})
    st = stats.from_frame(frame, "g", "y")
    fit = pooling.fit(st, model.Model(), sampler.Settings(chains=2, draws=100, warmup=100, seed=5,
                                                          max_draws=100), progress=False)
    out = output.write_run(fit, sys.argv[1])
    back = az.from_netcdf(str(out / "draws.nc"))
    for grp in fit.idata.groups():
        assert back[grp].identical(fit.idata[grp]), grp
    with h5py.File(out / "draws.nc", "r") as fh:
        for name in ("theta", "sigma", "mu"):
            assert fh["posterior"][name].compression is None, name
    print("ok")
""")


def test_draws_nc_round_trips_uncompressed(tmp_path):
    # Source: the documented contract of output.write_run (draws.nc holds the InferenceData's
    # groups exactly; re-opened, each group is `identical`, values, coordinates and attributes).
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    p = subprocess.run([sys.executable, "-c", _SCRIPT, str(tmp_path / "run")], env=env, capture_output=True,
                       text=True, timeout=300)
    assert p.returncode == 0 and p.stdout.strip().endswith("ok"), p.stderr[-2000:]
