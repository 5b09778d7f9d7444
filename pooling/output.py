"""The run folder: draws.nc, summary.json (and the reporter's files), written atomically.

Everything is written into a hidden sibling folder first and renamed into place at the end, so a
reader never sees a half-written run: after a crash, Ctrl-C or a full disk there is either the
complete folder or no folder. An existing folder is replaced only when asked, and only if it is a
run folder this program wrote: each holds a small marker file, `.pooling-run` (check_target,
clean_leftovers).
"""
from __future__ import annotations

import errno
import json
import math
import os
import re
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

try:  # advisory locks on the markers of folders being written (POSIX)
    import fcntl
except ImportError:  # pragma: no cover
    fcntl = None

from . import __version__
from .errors import InputError, OutputError
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


# ---------------------------------------------------------------------------------------------
# run folders: marked, checked, written atomically, and their leftovers cleaned

#: The marker file in every run folder this program writes (and in its hidden working folders).
#: A folder is replaced only when it holds this marker; a hidden leftover of a killed run is removed
#: only when it holds it and no process holds its lock.
MARKER = ".pooling-run"
MARKER_FORMAT = 1
_LEFTOVER = re.compile(r"^\..*\.(partial|old)-[A-Za-z0-9_]{8}$")
_NAME_MAX = 255


def _lexists(p: Path) -> bool:
    try:
        os.lstat(p)
        return True
    except OSError:
        return False


def _name_max(folder: Path) -> int:
    while not _lexists(folder) and folder != folder.parent:
        folder = folder.parent
    try:
        return os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):
        return _NAME_MAX


def _stem(name: str) -> str:
    """The run's name inside a hidden working folder's name, short enough that the whole fits."""
    return name if len(os.fsencode(name)) <= 160 else name[:40]


def read_marker(folder: Path) -> dict | None:
    """The marker of a folder this program wrote, or None (no marker, or not one of ours)."""
    try:
        with open(Path(folder) / MARKER, "rb") as fh:
            info = json.loads(fh.read(4096).decode("utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(info, dict) or info.get("written_by") != "pooling" or not isinstance(info.get("format"), int):
        return None
    return info


def _locked_marker(folder: Path, info: dict) -> int:
    """Write the marker into `folder` and hold an exclusive lock on it; returns the open descriptor, whose
    closing (or the process's end, however it ends) releases the lock."""
    fd = os.open(folder / MARKER, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        if fcntl is not None:
            # blocking: a cleaner that opened the still-empty file first finds no marker, lets go, and we go on
            fcntl.flock(fd, fcntl.LOCK_EX)
        body = {"written_by": "pooling", "format": MARKER_FORMAT, "pooling_version": __version__, "pid": os.getpid(),
                "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), **info}
        os.write(fd, (json.dumps(body) + "\n").encode("utf-8"))
    except BaseException:
        os.close(fd)
        raise
    return fd


def _marked_folder(parent: Path, prefix: str, info: dict) -> tuple[Path, int]:
    """A fresh hidden folder in `parent` with a locked marker in it."""
    tmp = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
    try:
        return tmp, _locked_marker(tmp, info)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _lock_if_free(folder: Path) -> int | None:
    """The descriptor of folder's marker, locked by us, if the marker is ours and no process holds it."""
    if fcntl is None:
        return None  # no advisory locks here: never remove what might be in use
    try:
        fd = os.open(folder / MARKER, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:  # held by a live process: its run is still being written
        os.close(fd)
        return None
    if read_marker(folder) is None:
        os.close(fd)
        return None
    return fd


def clean_leftovers(parent: Path) -> list[str]:
    """Remove the hidden working folders that killed runs left in `parent` (`.NAME.partial-*`, and
    `.NAME.old-*` holding a replaced run): only folders that hold our marker, and only when no process
    holds the marker's lock. A replaced run whose successor never arrived is put back under its name.
    Returns what was done, one phrase per folder; never raises."""
    done = []
    try:
        entries = [e for e in os.scandir(parent) if _LEFTOVER.match(e.name) and e.is_dir(follow_symlinks=False)]
    except OSError:
        return done
    for entry in entries:
        folder = Path(entry.path)
        fd = _lock_if_free(folder)
        if fd is None:
            continue
        try:
            info = read_marker(folder) or {}
            target = info.get("target")
            if (info.get("kind") == "aside" and isinstance(target, str) and "/" not in target and target
                    and not _lexists(folder.parent / target) and read_marker(folder / "run") is not None):
                os.rename(folder / "run", folder.parent / target)
                done.append(f"put back '{target}'")
            shutil.rmtree(folder, ignore_errors=True)
            done.append(f"removed '{entry.name}'")
        except OSError:
            pass
        finally:
            os.close(fd)
    return done


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def check_target(out: Path, replace: bool, protect=()) -> Path:
    """Refuse, before any work, a run folder that cannot or must not be written.

    protect: (what, path) pairs, for example ("the input file", "data.csv"): `out` may not be, or
    hold, any of them, nor the current folder, since --replace would remove them. An existing `out`
    is taken only with `replace`, and only if it is a run folder this program wrote (its marker).
    """
    if "\x00" in str(out):
        raise InputError("bad option --out: the folder's name holds a NUL character, which no file system allows")
    out = Path(out)
    full = Path(os.path.abspath(out))
    where = _name_max(full.parent)
    for part in full.parts[1:]:
        size = len(os.fsencode(part))
        if size > where:
            shown = part if len(part) <= 40 else part[:39] + "…"
            raise OutputError(f"cannot write the run folder: the name '{shown}' is {size} bytes long, beyond the "
                              f"{where} that the file system allows; choose a shorter --out")
    try:
        real = full.resolve()
        cwd = Path.cwd().resolve()
    except RuntimeError:  # Python 3.11 and 3.12 raise this for a loop of symbolic links
        raise OutputError(f"cannot write the run folder '{out}': it is (or passes through) a symbolic link that "
                          "loops") from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise OutputError(f"cannot write the run folder '{out}': it is (or passes through) a symbolic link "
                              "that loops") from None
        raise OutputError(f"cannot write the run folder '{out}': {exc.strerror or exc}") from None
    if _inside(cwd, real):
        what = "is the current folder" if cwd == real else f"holds the current folder '{cwd}'"
        raise InputError(f"bad option --out: '{out}' {what}; a run writes a folder of its own (and --replace would "
                         "empty it): name a new folder, for example --out runs/NAME")
    for what, path in protect:
        try:
            p = Path(path).resolve()
        except (OSError, RuntimeError, ValueError):
            continue
        if _inside(p, real):
            how = "is" if p == real else "holds"
            raise InputError(f"bad option --out: '{out}' {how} {what} '{path}'; a run writes a folder of its own (and "
                             "--replace would remove what is in it): name a new folder")
    if out.is_symlink():
        raise OutputError(f"cannot write the run folder '{out}': it is a symbolic link; give the folder's own path")
    if _lexists(out):
        if not out.is_dir():
            raise OutputError(f"cannot write the run folder '{out}': a file of that name is in the way")
        if not replace:
            raise OutputError(f"cannot write the run folder '{out}': it exists already; choose another --out or pass "
                              "--replace")
        _check_replaceable(out)
    parent = full.parent
    blocker = parent
    while not _lexists(blocker) and blocker != blocker.parent:
        blocker = blocker.parent
    if not blocker.is_dir():
        raise OutputError(f"cannot write the run folder '{out}': '{blocker}' is a file, in the way of a folder")
    if not parent.exists():
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create the folder '{parent}': {exc.strerror}") from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot write the run folder '{out}': the folder '{parent}' is not writable")
    return out


def _check_replaceable(out: Path) -> None:
    info = read_marker(out)
    if info is None or info.get("kind") != "run":
        raise OutputError(f"cannot replace '{out}': it is not a run folder written by pooling (it has no '{MARKER}' "
                          "marker); remove it yourself, or choose another --out")


def _fsync_folder(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_folder(out: Path, replace: bool, fill, protect=()) -> Path:
    """Create `out` by calling fill(tmp_dir) on a hidden sibling folder, then renaming it into place.

    The sibling holds the marker from its first moment, locked for as long as this process works on
    it, so that a later run can tell a killed run's leftover (ours, unlocked: removed) from a live one.
    A replaced run is moved aside into another marked sibling and removed once the new folder is in place.
    """
    out = check_target(out, replace, protect)
    parent = Path(os.path.abspath(out)).parent
    clean_leftovers(parent)
    stem = _stem(out.name)
    try:  # the access check passed, but ACLs, read-only mounts or quotas can still refuse
        tmp, lock = _marked_folder(parent, f".{stem}.partial-", {"kind": "run"})
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
        if _lexists(out):
            _check_replaceable(out)  # again: it may have changed while this run sampled
            old, old_lock = _marked_folder(parent, f".{stem}.old-", {"kind": "aside", "target": out.name})
            try:
                os.rename(out, old / "run")
                try:
                    os.rename(tmp, out)
                except BaseException:  # Ctrl-C or a failure between the two renames: put the old run back
                    os.rename(old / "run", out)
                    raise
                _fsync_folder(parent)
            except BaseException:
                if not _lexists(old / "run"):  # else it could not be put back: it stays aside, and the next
                    shutil.rmtree(old, ignore_errors=True)  # run in this folder puts it back (clean_leftovers)
                raise
            else:
                shutil.rmtree(old, ignore_errors=True)  # only now, with the new run in place
            finally:
                os.close(old_lock)
        else:
            os.rename(tmp, out)
            _fsync_folder(parent)
    except OutputError:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if exc.errno == errno.ENOSPC:
            why = f" ({exc.strerror})" if exc.strerror and "No space" not in exc.strerror else ""
            raise OutputError(f"cannot write the run folder '{out}': the disk is full{why}; nothing was written") from None
        raise OutputError(f"cannot write the run folder '{out}': {exc.strerror or exc}; nothing was written") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    finally:
        os.close(lock)
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


def write_run(fit: Fit, out, *, replace: bool = False, command: list[str] | None = None, extra=None,
              protect=()) -> Path:
    """Write draws.nc and summary.json (and whatever `extra(fit, folder)` adds) as one atomic folder.
    protect: (what, path) pairs that `out` may not be or hold (check_target)."""

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

    return atomic_folder(Path(out), replace, fill, protect)
