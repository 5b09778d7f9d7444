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
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(obj, fh, indent=2, ensure_ascii=False, allow_nan=False)
        fh.write("\n")


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
    need = REPORT_ROOM + sum(
        int(v.nbytes) for g in fit.idata.groups() for v in fit.idata[g].variables.values())
    need += 3 * sum(len(lab.encode("utf-8", "surrogatepass")) for lab in fit.labels)
    free = shutil.disk_usage(folder).free
    if free < need:
        raise OSError(errno.ENOSPC, f"{free / 2**20:.1f} MiB free, the run needs up to {need / 2**20:.1f} MiB")


def _write_draws(fit: Fit, path: Path) -> None:
    """draws.nc: the InferenceData's groups as netCDF4 (HDF5) through h5netcdf, uncompressed."""
    # Uncompressed on purpose: draws of theta and sigma are float64 noise that zlib shrinks by only
    # ~9% (64 -> 59 MB at 1,000 groups x 4,000 draws) for ~2.0 s of CPU, most of a later run's
    # write time; shuffle + zlib level 1 gives 52 MB for ~0.9 s. Measured in benchmarks/README.md.
    fit.idata.to_netcdf(str(path), engine="h5netcdf", compress=False)


def write_run(fit: Fit, out, *, replace: bool = False, command: list[str] | None = None, extra=None) -> Path:
    """Write draws.nc and summary.json (and whatever `extra(fit, folder)` adds) as one atomic folder."""

    def fill(tmp: Path):
        _check_space(fit, tmp)
        _write_draws(fit, tmp / "draws.nc")
        write_json(tmp / "summary.json", summary_dict(fit, command))
        if extra is not None:
            extra(fit, tmp)

    return atomic_folder(Path(out), replace, fill)
