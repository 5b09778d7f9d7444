"""The run folder: draws.nc, summary.json (and the reporter's files), written atomically.

Everything is written into a hidden sibling folder first and renamed into place at the end, so a
reader never sees a half-written run: after a crash, Ctrl-C or a full disk there is either the
complete folder or no folder. An existing folder is replaced only when asked.
"""
from __future__ import annotations

import errno
import json
import math
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from . import __version__
from .errors import OutputError
from .posterior import Fit

SUMMARY_FORMAT = 1


def _clean(x):
    """JSON-safe values: NaN and infinities become null, numpy scalars plain numbers."""
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, (np.floating, float)):
        x = float(x)
        return x if math.isfinite(x) else None
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.ndarray):
        return _clean(x.tolist())
    return x


def summary_dict(fit: Fit, command: list[str] | None = None) -> dict:
    """What summary.json holds: model, priors, data fingerprint, run settings, diagnostics, hyperparameters."""
    p = fit.problem
    st = p.stats
    s = fit.raw.settings
    return _clean({
        "format": SUMMARY_FORMAT,
        "pooling_version": __version__,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "command": command,
        "model": {"within": p.model.within, "priors": p.model.priors(), "spec": p.model.to_dict()},
        "data": {
            "source": st.source, "file_sha256": st.file_sha256, "statistics_sha256": st.fingerprint(),
            "groups": st.J, "measurements": st.N if st.kind == "raw" else None, "kind": st.kind,
        },
        "run": {
            "chains": s.chains, "warmup": s.warmup, "draws_requested": s.draws,
            "draws_per_chain": int(fit.raw.mu.shape[1]), "draw_cap": s.draw_cap, "seed": fit.raw.seed,
            "seconds": round(fit.raw.seconds, 3), "tau_evaluations_per_sweep": float(fit.raw.evals.mean()),
            "internal_center": p.center, "internal_scale": p.scale,
        },
        "diagnostics": fit.diagnostics(),
        "hyperparameters": fit.hyper_summary(),
    })


def write_json(path: Path, obj) -> None:
    """JSON laid out for reading: nested objects indented, a list of records one record per line."""
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(dumps_readable(obj))
        fh.write("\n")


def _flat(x) -> str:
    # no indent, so the json module's C encoder does the work (with indent it falls back to Python,
    # ~0.2 s for a summary.json of 1,000 groups)
    return json.dumps(x, ensure_ascii=False, allow_nan=False, separators=(", ", ": "))


def dumps_readable(x, level: int = 0) -> str:
    """Valid JSON equal to json.dumps(x): objects (to depth 4) are indented by two spaces per level,
    a list of objects or lists has one element per line, everything else is written on one line."""
    pad, inner = "  " * level, "  " * (level + 1)
    if isinstance(x, dict) and x and level < 4:
        items = [f"{inner}{json.dumps(str(k), ensure_ascii=False)}: {dumps_readable(v, level + 1)}" for k, v in x.items()]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(x, list) and x and all(isinstance(v, (dict, list)) for v in x):
        return "[\n" + ",\n".join(inner + _flat(v) for v in x) + "\n" + pad + "]"
    return _flat(x)


def check_target(out: Path, replace: bool) -> Path:
    """Refuse an existing run folder unless `replace`, and a parent that cannot take one; before any work."""
    out = Path(out)
    if out.exists() and not replace:
        raise OutputError(f"cannot write the run folder '{out}': it exists already; choose another --out or pass --replace")
    if out.exists() and not out.is_dir():
        raise OutputError(f"cannot write the run folder '{out}': a file of that name is in the way")
    parent = out.resolve().parent
    if not parent.exists():
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create the folder '{parent}': {exc.strerror}") from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot write the run folder '{out}': the folder '{parent}' is not writable")
    return out


def atomic_folder(out: Path, replace: bool, fill) -> Path:
    """Create `out` by calling fill(tmp_dir) on a sibling temporary folder, then renaming it into place."""
    out = check_target(out, replace)
    parent = out.resolve().parent
    try:  # the access check passed, but ACLs, read-only mounts or quotas can still refuse
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=parent))
    except OSError as exc:
        raise OutputError(f"cannot write the run folder '{out}': {exc.strerror or exc}; nothing was written") from None
    try:
        fill(tmp)
        mask = os.umask(0)  # mkdtemp makes the folder private (0700); a run folder gets the usual mode
        os.umask(mask)
        os.chmod(tmp, 0o777 & ~mask)
        for f in tmp.iterdir():  # the data must be on disk before the rename makes the folder visible
            with open(f, "rb") as fh:
                os.fsync(fh.fileno())
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=parent))
            os.rename(out, old / "run")
            try:
                os.rename(tmp, out)
            except BaseException:  # Ctrl-C or a failure between the two renames: put the old run back
                os.rename(old / "run", out)
                shutil.rmtree(old, ignore_errors=True)
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if exc.errno == errno.ENOSPC:
            why = f" ({exc.strerror})" if exc.strerror and "No space" not in exc.strerror else ""
            raise OutputError(f"cannot write the run folder '{out}': the disk is full{why}; nothing was written") from None
        raise OutputError(f"cannot write the run folder '{out}': {exc.strerror or exc}; nothing was written") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


# HDF5 does not fail cleanly on a full disk: the process crashes inside the library (seen with h5py
# 3.16 on a full tmpfs), leaving a partial folder. So the space is checked before draws.nc is started,
# against an upper bound: the uncompressed arrays plus room for the reporter's files. A disk that
# another process fills during the write can still defeat this.
REPORT_ROOM = 8 << 20


def _check_space(fit: Fit, folder: Path) -> None:
    need = REPORT_ROOM + sum(part.nbytes for part in fit.parts.values())
    need += 3 * sum(len(lab.encode("utf-8", "surrogatepass")) for lab in fit.labels)
    free = shutil.disk_usage(folder).free
    if free < need:
        raise OSError(errno.ENOSPC, f"{free / 2**20:.1f} MiB free, the run needs up to {need / 2**20:.1f} MiB")


def _write_draws(fit: Fit, path: Path) -> None:
    """draws.nc: the fit's groups (posterior, sample_stats, constant_data) as netCDF4 (HDF5) through
    h5netcdf, uncompressed; arviz.from_netcdf and xarray.open_dataset(group=...) read it back."""
    # Written with h5netcdf itself rather than through xarray: xarray asks dask (when installed) for a
    # scheduler before each group, which imports dask.distributed, ~0.3 s of every run.
    # Uncompressed on purpose: draws of theta and sigma are float64 noise that zlib shrinks by only
    # ~9% (64 -> 59 MB at 1,000 groups x 4,000 draws) for ~2.0 s of CPU, most of a later run's
    # write time; shuffle + zlib level 1 gives 52 MB for ~0.9 s. Measured in benchmarks/README.md.
    import h5netcdf

    with h5netcdf.File(str(path), "w") as f:
        for name, part in fit.parts.items():
            g = f.create_group(name)
            for dim, values in part.coords.items():
                g.dimensions[dim] = len(values)
            for dim, values in part.coords.items():
                _variable(g, dim, (dim,), values)
            for var, (dims, values, attrs) in part.variables.items():
                v = _variable(g, var, dims, values)
                for key, val in attrs.items():
                    v.attrs[key] = val
            for key, val in part.attrs.items():
                g.attrs[key] = val


def _variable(g, name: str, dims, values: np.ndarray):
    values = np.asarray(values)
    if values.dtype == object or values.dtype.kind == "U":  # labels: variable-length UTF-8 strings
        import h5py

        data = np.asarray([str(x) for x in values.ravel()], dtype=object).reshape(values.shape)
        return g.create_variable(name, dims, dtype=h5py.string_dtype("utf-8"), data=data)
    return g.create_variable(name, dims, data=values)


class _Background:
    """fn(*args) on a thread of its own; join() waits, reraise() raises what fn raised, if anything."""

    def __init__(self, fn, *args):
        import threading

        self.error: BaseException | None = None

        def run():
            try:
                fn(*args)
            except BaseException as exc:  # handed to the main thread by reraise()
                self.error = exc

        self.thread = threading.Thread(target=run, name="pooling-write-draws", daemon=True)
        self.thread.start()

    def join(self) -> None:
        """Wait for the thread; a Ctrl-C meanwhile is raised once the thread is done (it is a short
        write), so that the caller never removes a folder the thread is still writing into."""
        stopped = None
        while self.thread.is_alive():
            try:
                self.thread.join(0.1)
            except KeyboardInterrupt as exc:
                stopped = exc
        if stopped is not None:
            raise stopped

    def reraise(self) -> None:
        if self.error is not None:
            raise self.error


def write_run(fit: Fit, out, *, replace: bool = False, command: list[str] | None = None, extra=None) -> Path:
    """Write draws.nc and summary.json (and whatever `extra(fit, folder)` adds) as one atomic folder."""

    def fill(tmp: Path):
        _check_space(fit, tmp)
        # draws.nc is written on a second thread while summary.json and the reporter's files are made:
        # h5py and the kernel's page cache do most of that write without the GIL, so at 1,000 groups
        # this hides ~0.2 s of a later run. Nothing is renamed into place before both are done.
        writer = _Background(_write_draws, fit, tmp / "draws.nc")
        try:
            write_json(tmp / "summary.json", summary_dict(fit, command))
            if extra is not None:
                extra(fit, tmp)
        finally:
            writer.join()  # also on Ctrl-C or an error, so the folder is never removed under the writer
        writer.reraise()

    return atomic_folder(Path(out), replace, fill)
