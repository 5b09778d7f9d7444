"""How output.write_run writes draws.nc: the internal-unit draws with the CF attributes scale_factor and
add_offset (so every digit survives any offset, and netCDF readers decode the user's units), uncompressed.

Uncompressed is a speed choice measured in benchmarks/README.md (`pooling fit`, whole process); these
tests check that it does not change what is written or leave the interpreter in a changed state.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

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
    from pooling.results import compute

    out = output.write_run(fit, compute(fit), sys.argv[1])
    back = az.from_netcdf(str(out / "draws.nc"))
    for grp in fit.idata.groups():
        assert back[grp].identical(fit.idata[grp]), grp
    with h5py.File(out / "draws.nc", "r") as fh:
        for name in ("theta", "sigma", "mu"):
            assert fh["posterior"][name].compression is None, name
            # stored: the internal-unit draws themselves, bit for bit
            raw = getattr(fit.raw, name)
            assert np.array_equal(fh["posterior"][name][...], raw), name
        assert fh["posterior"]["theta"].attrs["add_offset"] == fit.problem.center
        assert fh["posterior"]["theta"].attrs["scale_factor"] == fit.problem.scale
        assert "add_offset" not in fh["posterior"]["sigma"].attrs
    print("ok")
""")


def test_draws_nc_round_trips_uncompressed(tmp_path):
    # Source: the documented contract of output.write_run (draws.nc holds the InferenceData's
    # groups exactly; re-opened, each group is `identical`, values, coordinates and attributes).
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    p = subprocess.run(
        [sys.executable, "-c", _SCRIPT, str(tmp_path / "run")], env=env, capture_output=True, text=True, timeout=300
    )
    assert p.returncode == 0 and p.stdout.strip().endswith("ok"), p.stderr[-2000:]


# ---------------------------------------------------------------------------------------------
# the command line's path stays light, and the speed measures change nothing that is written

_LIGHT = textwrap.dedent(r"""
    import sys
    import numpy as np
    import pandas as pd
    from pooling import cli
    g = np.random.default_rng(4)  # invented: twelve groups of five measurements
    pd.DataFrame({"g": np.repeat([f"g{j:02d}" for j in range(12)], 5), "y": g.normal(50.0, 2.0, 60)}).to_csv(
        sys.argv[1], index=False)
    code = cli.main(["fit", sys.argv[1], "--group", "g", "--value", "y", "--out", sys.argv[2], "--seed", "2",
                     "--draws", "200", "--warmup", "200", "--max-draws", "200", "--quiet"])
    heavy = sorted(m for m in ("arviz", "xarray", "matplotlib", "scipy.stats") if m in sys.modules)
    print("exit", code, "heavy", ",".join(heavy) or "none")
""")


def test_a_run_from_the_command_line_imports_no_heavy_library(tmp_path):
    # Source: benchmarks/README.md (`pooling fit`, whole process): arviz, xarray, scipy.stats and
    # matplotlib cost ~1.7 s of imports, so the command line must not load them; a regression shows
    # here as a name in the list rather than as a slower benchmark.
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    p = subprocess.run(
        [sys.executable, "-c", _LIGHT, str(tmp_path / "d.csv"), str(tmp_path / "run")],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert p.returncode == 0, p.stderr[-2000:]
    assert p.stdout.split()[-2:] == ["heavy", "none"], p.stdout
    assert (tmp_path / "run" / "draws.nc").exists() and (tmp_path / "run" / "report.html").exists()


def _small_fit(seed=6):
    import numpy as np
    import pandas as pd

    import pooling
    from pooling import model, sampler, stats

    g = np.random.default_rng(seed)  # invented: eight groups of three to six measurements
    n = g.integers(3, 7, 8)
    frame = pd.DataFrame({"g": np.repeat([f"g{j}" for j in range(8)], n), "y": g.normal(5.0, 1.0, n.sum())})
    st = stats.from_frame(frame, "g", "y")
    return pooling.fit(
        st, model.Model(), sampler.Settings(chains=2, draws=120, warmup=100, seed=seed, max_draws=120), progress=False
    )


def test_user_draws_are_the_internal_draws_mapped():
    # Source: the contract of posterior.Fit (every draw kept in internal units; the user's units are
    # center + scale * x for locations and scale * x for spreads, computed on request)
    import numpy as np

    fit = _small_fit()
    p = fit.problem
    np.testing.assert_array_equal(fit.draws("theta"), (fit.raw.theta * p.scale + p.center).reshape(240, -1))
    np.testing.assert_array_equal(fit.draws("sigma"), (fit.raw.sigma * p.scale).reshape(240, -1))
    np.testing.assert_array_equal(fit.parts["posterior"]["mu"], fit.raw.mu * p.scale + p.center)
    assert fit.draws("lambda").dtype == np.float64 and fit.parts["posterior"]["lambda"].dtype == np.float64


def test_a_failed_draws_write_leaves_no_folder(tmp_path, monkeypatch):
    # Source: the documented contract of output.write_run (nothing half-written: the error of the
    # draws.nc writer, which runs on its own thread, reaches the caller and no folder remains).
    import pytest

    from pooling import output
    from pooling.errors import OutputError

    fit = _small_fit()

    def broken(parts, path):
        path.write_bytes(b"partial")
        raise OSError(28, "No space left on device")

    from pooling.results import compute

    monkeypatch.setattr(output, "_write_draws", broken)
    with pytest.raises(OutputError, match="disk is full"):
        output.write_run(fit, compute(fit), tmp_path / "run")
    assert not (tmp_path / "run").exists()
    assert [p.name for p in tmp_path.iterdir()] == []


def test_readable_json_is_the_same_json():
    # Source: RFC 8259 (JSON) and the json module of the standard library as the reference: whatever
    # the layout, json.loads must give back exactly what json.dumps would have written.
    import json

    from hypothesis import given, settings
    from hypothesis import strategies as st

    from pooling.output import dumps_readable

    values = st.recursive(
        st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False) | st.text(),
        lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=5), c, max_size=4),
        max_leaves=30,
    )

    @settings(max_examples=300, deadline=None)
    @given(values)
    def check(x):
        assert json.loads(dumps_readable(x)) == json.loads(json.dumps(x))

    check()
    records = {"rows": [{"a": 1, "b": "é"}, {"a": 2, "b": None}], "run": {"seed": 3}}
    assert dumps_readable(records).splitlines()[2] == '    {"a": 1, "b": "é"},'  # one record per line


# ---------------------------------------------------------------------------------------------
# draws.nc's large variables written around the page cache (output._direct_write)


def _parts_for_direct_write():
    from pooling.posterior import Part

    g = np.random.default_rng(11)
    big = g.normal(size=(2, 37, 53))  # 31,376 bytes: not a multiple of the 4,096-byte block
    strided = g.normal(size=(53, 37, 2)).transpose(2, 1, 0)  # the same shape, not contiguous
    single = g.gamma(2.0, size=(2, 37, 53)).astype(np.float32)
    counts = g.integers(0, 1000, size=(2, 37, 53))
    swapped = g.normal(size=(2, 37, 53)).astype(">f8")  # big-endian: written as little-endian numbers
    post = Part({}, {"chain": np.arange(2), "draw": np.arange(37), "group": np.arange(53)}, {"note": "x"})
    post.add("theta", ("chain", "draw", "group"), big, {"scale_factor": 2.0})
    post.add("sigma", ("chain", "draw", "group"), strided)
    post.add("lambda", ("chain", "draw", "group"), single)
    post.add("hits", ("chain", "draw", "group"), counts)
    post.add("swapped", ("chain", "draw", "group"), swapped)
    post.add("mu", ("chain", "draw"), g.normal(size=(2, 37)))
    return {"posterior": post}


def _read_back(path):
    import h5py

    with h5py.File(path, "r") as fh:
        return {name: fh["posterior"][name][...] for name in fh["posterior"] if name not in ("chain", "draw", "group")}


def _check_written(path, parts):
    back = _read_back(path)
    for name, (_, values, _) in parts["posterior"].variables.items():
        assert back[name].dtype.kind == np.asarray(values).dtype.kind, name
        assert np.array_equal(back[name], values), name  # every bit: no NaN in these arrays


@pytest.mark.parametrize("buffer_bytes", [1 << 20, 8192, 4096 * 3])
def test_large_variables_written_directly_are_read_back_exactly(tmp_path, monkeypatch, buffer_bytes):
    """Large variables (here anything over 1 kB) get an aligned place from HDF5 and their bytes by direct
    writes; a buffer smaller than one row of the array (8,192 bytes < 2 x 53 x 8 ... rows) and one of three
    blocks exercise the flushing in pieces and the partial last block. xarray reads the file as netCDF4."""
    from pooling import output

    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)
    monkeypatch.setattr(output, "DIRECT_BUFFER_BYTES", buffer_bytes)
    parts = _parts_for_direct_write()
    path = tmp_path / "draws.nc"
    output._write_draws(parts, path)
    _check_written(path, parts)
    import h5py

    with h5py.File(path, "r") as fh:
        for name in ("theta", "sigma", "lambda", "hits", "swapped"):
            ds = fh["posterior"][name]
            assert ds.id.get_offset() % output.DIRECT_ALIGN == 0, name
            assert ds.chunks is None and ds.compression is None, name
        assert fh["posterior"]["mu"].id.get_offset() is not None
    import xarray as xr

    ds = xr.open_dataset(path, group="posterior", engine="h5netcdf")
    assert np.array_equal(ds["theta"].values, 2.0 * parts["posterior"].variables["theta"][1])  # CF decoding
    ds.close()


def test_without_direct_io_the_same_file_is_written(tmp_path, monkeypatch):
    """Where the platform has no O_DIRECT, or the file system refuses it (EINVAL), the same bytes go through
    the page cache."""
    import errno

    from pooling import output

    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)
    parts = _parts_for_direct_write()
    monkeypatch.delattr(os, "O_DIRECT", raising=False)
    output._write_draws(parts, tmp_path / "a.nc")
    _check_written(tmp_path / "a.nc", parts)
    monkeypatch.undo()

    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)
    real = os.pwrite
    refused = []

    def pwrite(fd, data, at):
        if fd in direct_fds:
            refused.append(at)
            raise OSError(errno.EINVAL, "Invalid argument")
        return real(fd, data, at)

    real_open = os.open
    direct_fds: set[int] = set()

    def opener(path, flags, *args):
        fd = real_open(path, flags, *args)
        if flags & getattr(os, "O_DIRECT", 0):
            direct_fds.add(fd)
        return fd

    monkeypatch.setattr(os, "pwrite", pwrite)
    monkeypatch.setattr(os, "open", opener)
    output._write_draws(parts, tmp_path / "b.nc")
    monkeypatch.undo()
    _check_written(tmp_path / "b.nc", parts)
    if getattr(os, "O_DIRECT", 0):
        assert len(refused) == 1  # the first direct write was refused; the rest went through the page cache


def test_a_failing_direct_write_is_an_error_not_a_short_file(tmp_path, monkeypatch):
    """A write error other than 'direct I/O refused' (a full disk) propagates; write_run then removes the
    half-written folder (test_a_failed_draws_write_leaves_no_folder)."""
    import errno

    from pooling import output

    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)

    def full(fd, data, at):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "pwrite", full)
    with pytest.raises(OSError) as err:
        output._write_draws(_parts_for_direct_write(), tmp_path / "c.nc")
    assert err.value.errno == errno.ENOSPC


def test_memory_helpers():
    """_memory.empty: a large array in pages of its own, writable, the right shape and type, freed with its
    last user; keep_freed_memory only reports whether glibc took the thresholds."""
    from pooling import _memory

    small = _memory.empty((3, 4), np.int32)
    assert small.shape == (3, 4) and small.dtype == np.int32 and small.flags.writeable
    n = _memory.PLAIN_PAGES_MIN // 8 + 5
    big = _memory.empty((n,), np.float64)
    assert big.shape == (n,) and big.flags.writeable and big.flags.c_contiguous
    big[:] = 1.5
    assert big.sum() == 1.5 * n
    view = big.reshape(5, -1) if n % 5 == 0 else big[:10]
    del big
    view[...] = 2.0  # the pages live as long as a view does
    assert isinstance(_memory.keep_freed_memory(), bool)


def test_a_file_system_that_refuses_direct_opens_gets_the_page_cache(tmp_path, monkeypatch):
    """tmpfs and some network file systems refuse O_DIRECT when the file is opened (EINVAL): the bytes then all go
    through the descriptor opened without it."""
    import errno

    from pooling import output

    if not getattr(os, "O_DIRECT", 0):
        pytest.skip("no O_DIRECT on this platform")
    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)
    real_open = os.open

    def opener(path, flags, *args):
        if flags & os.O_DIRECT:
            raise OSError(errno.EINVAL, "Invalid argument")
        return real_open(path, flags, *args)

    monkeypatch.setattr(os, "open", opener)
    parts = _parts_for_direct_write()
    output._write_draws(parts, tmp_path / "d.nc")
    monkeypatch.undo()
    _check_written(tmp_path / "d.nc", parts)


def test_where_direct_io_works_the_large_variables_go_around_the_page_cache(tmp_path, monkeypatch):
    """On a file system that takes O_DIRECT (the development machine's ext4), the whole blocks of the large
    variables are written by the direct descriptor: the buffer is aligned, so none of them is refused."""
    import errno

    from pooling import output

    if not getattr(os, "O_DIRECT", 0):
        pytest.skip("no O_DIRECT on this platform")
    probe = tmp_path / "probe"
    probe.write_bytes(b"")
    try:
        os.close(os.open(probe, os.O_WRONLY | os.O_DIRECT))
    except OSError as exc:
        if exc.errno in (errno.EINVAL, errno.EOPNOTSUPP):
            pytest.skip("this file system refuses O_DIRECT")
        raise
    monkeypatch.setattr(output, "DIRECT_MIN_BYTES", 1024)
    monkeypatch.setattr(output, "DIRECT_BUFFER_BYTES", 8192)
    direct_fds: set[int] = set()
    written = {"direct": 0, "cached": 0}
    real_open, real_pwrite = os.open, os.pwrite

    def opener(path, flags, *args):
        fd = real_open(path, flags, *args)
        if flags & os.O_DIRECT:
            direct_fds.add(fd)
        return fd

    def pwrite(fd, data, at):
        n = real_pwrite(fd, data, at)
        written["direct" if fd in direct_fds else "cached"] += n
        return n

    monkeypatch.setattr(os, "open", opener)
    monkeypatch.setattr(os, "pwrite", pwrite)
    parts = _parts_for_direct_write()
    output._write_draws(parts, tmp_path / "e.nc")
    monkeypatch.undo()
    _check_written(tmp_path / "e.nc", parts)
    # five variables of 31,376 (or 15,688) bytes: their whole 4,096-byte blocks directly, only the tails cached
    assert written["direct"] >= 5 * 12_000 and written["cached"] < 5 * output.DIRECT_ALIGN
