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
import shlex
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
from .runmark import MARKER, read_marker  # noqa: F401 -- read_marker: part of this module's interface

SUMMARY_FORMAT = 1


def _clean(x):
    """JSON-safe values: NaN and infinities become null, numpy scalars plain numbers."""
    t = type(x)  # the plain types first: summary.json holds every group's row, some 30 values each
    if t is float:
        return x if math.isfinite(x) else None
    if t is str or t is int or t is bool or x is None:
        return x
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


def summary_dict(res, command: list[str] | None = None) -> dict:
    """What summary.json holds, from a results.Results: model, priors, data fingerprint, run settings,
    diagnostics, hyperparameters (mean, sd, median and the level's interval), every group's row, the
    interlaboratory view, heavy tails, checks and predictions. Written once per run."""
    from .asked import level_key
    from .report.export import records

    p = res.problem
    L = level_key(res.options.level)
    hyper = {}
    for name, h in res.hyper.items():
        h = dict(h)
        h[f"low_{L}"] = h.pop("low")
        h[f"high_{L}"] = h.pop("high")
        hyper[name] = h
    # every interval's ends named by the level (low -> low_95), the overall view's too
    lab = _level_named({k: v for k, v in res.lab.items() if k != "interval_excludes_0"}, L)
    checks = None
    if res.checks is not None:
        ch = res.checks
        checks = {"draws": ch["draws"]}
        if "spread" in ch:
            checks["spread_of_means"] = {"observed": ch["spread"]["observed"], "p_value": ch["spread"]["p_value"]}
        if "extreme" in ch:
            ex = ch["extreme"]
            checks["most_extreme_group"] = {
                "p_value": ex["p_value"],
                "observed_median": ex["observed_median"],
                "group": res.labels[ex["group"]],
                "group_share": ex["group_share"],
            }
        if "sd" in ch:
            sd = ch["sd"]
            checks["within_sd"] = {
                "groups_checked": int(len(sd["groups"])),
                "outside_interval": sd["outside"],
                "extreme_p": sd["extreme"],
                "level": sd["level"],
            }
    out = {
        "format": SUMMARY_FORMAT,
        "pooling_version": __version__,
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "command": command,
        "mode": res.mode,
        "model": {
            "within": p.model.within,
            "between": p.model.between.name,
            "priors": p.model.priors(),
            "spec": p.model.to_dict(),
        },
        "data": res.data,
        "run": res.run,
        "report_options": res.options.to_dict(),
        "diagnostics": res.diagnostics,
        "hyperparameters": hyper,
        "heavy_tails": res.tail,
        "interlab": lab,
        "new_group_outside": res.new_group,
        "predictive_checks": checks,
        "predictors": _level_named(res.predictors, L),
        "groups_table": None,  # filled below: records() makes the rows JSON-safe a column at a time
    }
    if res.pairs is not None:
        out["pairwise"] = {"groups": list(res.pairs.index), "p_row_greater": res.pairs.to_numpy()}
        if res.pair_diff is not None:  # theta_row - theta_column: its mean and interval
            out["pairwise"].update(
                {
                    "difference_mean": res.pair_diff["mean"].to_numpy(),
                    f"difference_low_{L}": res.pair_diff["low"].to_numpy(),
                    f"difference_high_{L}": res.pair_diff["high"].to_numpy(),
                }
            )
    if res.summary is not None:
        out["summary_mode"] = {k: v for k, v in res.summary.items() if k != "kept_labels"}
    out = _clean(out)
    out["groups_table"] = records(res.table)
    return out


def _level_named(x, L: str):
    """Answers (the predictors', the interlaboratory view's) with each interval's ends named by the level
    (low -> low_95), as for the hyperparameters; None stays None."""
    if isinstance(x, dict):
        out = {}
        for k, v in x.items():
            out[f"{k}_{L}" if k in ("low", "high") and isinstance(v, float) else k] = _level_named(v, L)
        return out
    if isinstance(x, list):
        return [_level_named(v, L) for v in x]
    return x


def write_results_files(res, folder: Path, command: list[str] | None = None, changes: dict | None = None) -> dict:
    """summary.json, groups.csv and report.html of a Results, into `folder`; returns the summary. `changes`: a
    refit's change report (store/changes.py), which the page then opens with."""
    from .report import render_html
    from .report.export import write_csv

    summary = summary_dict(res, command)
    write_json(folder / "summary.json", summary)
    write_csv(res.table, folder / "groups.csv")
    (folder / "report.html").write_text(render_html(res, summary["created_utc"], command, changes), encoding="utf-8")
    return summary


def write_json(path: Path, obj) -> None:
    """JSON laid out for reading: nested objects indented, a list of records one record per line."""
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(dumps_readable(obj))
        fh.write("\n")


# no indent, so the json module's C encoder does the work (with indent it falls back to Python, ~0.2 s for a
# summary.json of 1,000 groups); one encoder for every record (json.dumps with options makes one per call)
_FLAT = json.JSONEncoder(ensure_ascii=False, allow_nan=False, separators=(", ", ": "))


def _flat(x) -> str:
    return _FLAT.encode(x)


def dumps_readable(x, level: int = 0) -> str:
    """Valid JSON equal to json.dumps(x): objects (to depth 4) are indented by two spaces per level,
    a list of objects or lists has one element per line, everything else is written on one line."""
    pad, inner = "  " * level, "  " * (level + 1)
    if isinstance(x, dict) and x and level < 4:
        items = [
            f"{inner}{json.dumps(str(k), ensure_ascii=False)}: {dumps_readable(v, level + 1)}" for k, v in x.items()
        ]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(x, list) and x and all(isinstance(v, (dict, list)) for v in x):
        return "[\n" + ",\n".join(inner + _flat(v) for v in x) + "\n" + pad + "]"
    return _flat(x)


def check_parent(path: Path) -> Path:
    """Refuse, before any work, a single output file that cannot be written: a folder in its place, or a parent
    folder that cannot be created or written. An existing file is replaced (atomically, by the writer)."""
    path = Path(path)
    if path.is_dir():
        raise OutputError(f"cannot write '{path}': it is a folder; give a file name such as history.html")
    parent = path.resolve().parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the folder '{parent}': {exc.strerror}") from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot write '{path}': the folder '{parent}' is not writable")
    return path


# ---------------------------------------------------------------------------------------------
# run folders: marked, checked, written atomically, and their leftovers cleaned

#: MARKER (runmark.py) is the marker file in every run folder this program writes (and in its hidden
#: working folders). A folder is replaced only when it holds this marker; a hidden leftover of a killed
#: run is removed only when it holds it and no process holds its lock.
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


def _locked_marker(folder: Path, info: dict) -> int:
    """Write the marker into `folder` and hold an exclusive lock on it; returns the open descriptor, whose
    closing (or the process's end, however it ends) releases the lock."""
    fd = os.open(folder / MARKER, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        if fcntl is not None:
            # blocking: a cleaner that opened the still-empty file first finds no marker, lets go, and we go on
            fcntl.flock(fd, fcntl.LOCK_EX)
        body = {
            "written_by": "pooling",
            "format": MARKER_FORMAT,
            "pooling_version": __version__,
            "pid": os.getpid(),
            "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            **info,
        }
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
            if (
                info.get("kind") == "aside"
                and isinstance(target, str)
                and "/" not in target
                and target
                and not _lexists(folder.parent / target)
                and read_marker(folder / "run") is not None
            ):
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
            raise OutputError(
                f"cannot write the run folder: the name '{shown}' is {size} bytes long, beyond the "
                f"{where} that the file system allows; choose a shorter --out"
            )
    try:
        real = full.resolve()
        cwd = Path.cwd().resolve()
    except RuntimeError:  # Python 3.11 and 3.12 raise this for a loop of symbolic links
        raise OutputError(
            f"cannot write the run folder '{out}': it is (or passes through) a symbolic link that loops"
        ) from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise OutputError(
                f"cannot write the run folder '{out}': it is (or passes through) a symbolic link that loops"
            ) from None
        raise OutputError(f"cannot write the run folder '{out}': {exc.strerror or exc}") from None
    if _inside(cwd, real):
        what = "is the current folder" if cwd == real else f"holds the current folder '{cwd}'"
        raise InputError(
            f"bad option --out: '{out}' {what}; a run writes a folder of its own (and --replace would "
            "empty it): name a new folder, for example --out runs/NAME"
        )
    for what, path in protect:
        try:
            p = Path(path).resolve()
        except (OSError, RuntimeError, ValueError):
            continue
        if _inside(p, real):
            how = "is" if p == real else "holds"
            raise InputError(
                f"bad option --out: '{out}' {how} {what} '{path}'; a run writes a folder of its own (and "
                "--replace would remove what is in it): name a new folder"
            )
        if p.is_dir() and _inside(real, p):  # its groups.csv would sit among the data of a later run
            raise InputError(
                f"bad option --out: '{out}' is inside {what} '{path}', whose files are all read as data; "
                "write the run folder outside it, for example --out runs/NAME"
            )
    if out.is_symlink():
        raise OutputError(f"cannot write the run folder '{out}': it is a symbolic link; give the folder's own path")
    if _lexists(out):
        if not out.is_dir():
            raise OutputError(f"cannot write the run folder '{out}': a file of that name is in the way")
        if not replace:
            raise OutputError(
                f"cannot write the run folder '{out}': it exists already; choose another --out or pass --replace"
            )
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


#: the files a run folder of pooling held before run folders were marked (with a refit's extras)
_UNMARKED_RUN = ("summary.json", "draws.nc", "groups.csv", "report.html", "changes.json", "changes.csv", "history.html")


def _unmarked_run(out: Path) -> str | None:
    """The pooling version named by the summary.json of a run folder written before run folders were
    marked, when `out` holds such a folder's files and nothing else; else None."""
    try:
        names = {e.name for e in os.scandir(out)}
        with open(out / "summary.json", "rb") as fh:
            head = fh.read(4096).decode("utf-8", "replace")  # the version is among summary.json's first keys
    except OSError:
        return None
    if not names <= set(_UNMARKED_RUN) or not {"summary.json", "draws.nc"} <= names:
        return None
    m = re.search(r'"pooling_version"\s*:\s*"([^"\\]{1,40})"', head)
    return m.group(1) if m else None


def _check_replaceable(out: Path) -> None:
    info = read_marker(out)
    if info is not None and info.get("kind") == "run":
        return
    version = _unmarked_run(out) if info is None else None
    if version is not None:
        raise OutputError(
            f"cannot replace '{out}': it has no '{MARKER}' marker but holds only a run's files "
            f"(summary.json of pooling {version}, draws.nc, ...): a run folder written before run folders "
            "were marked. pooling replaces only marked folders: if it holds nothing you need, remove it "
            f"(rm -r -- {shlex.quote(str(out))}) and run again, or choose another --out"
        )
    raise OutputError(
        f"cannot replace '{out}': it is not a run folder written by pooling (it has no '{MARKER}' "
        "marker, nor only the files of a run from before markers: summary.json, draws.nc, groups.csv, "
        "report.html); remove it yourself, or choose another --out"
    )


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
            raise OutputError(
                f"cannot write the run folder '{out}': the disk is full{why}; nothing was written"
            ) from None
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


def draws_parts(fit) -> dict:
    """What draws.nc holds: the draws in internal units with the CF attributes scale_factor and add_offset
    (readers decode the user's units; the file keeps every digit at any offset). A summary-mode fit: its
    kept groups and hyperparameters, the kept groups' exact ranks among all groups, the typical within-group
    sd per draw, and why each group was kept."""
    from .posterior import parts

    if not getattr(fit, "summary_mode", False):
        return parts(fit.raw, fit.problem, packed=True)
    kept = fit.kept
    out = parts(kept.raw, kept.problem, packed=True)
    post = out["posterior"]
    acc = fit.acc
    post.add(
        "rank",
        ("chain", "draw", "group"),
        acc.ranks,
        {"meaning": f"rank among all {fit.J} groups, 1 = {fit.options.best} theta"},
    )
    if fit.problem.within_code != 2:
        post.add("within_sd", ("chain", "draw"), acc.within_sd, {"scale_factor": float(fit.problem.scale)})
    note = {
        "summary_mode": f"kept groups only: {len(fit.kept_index)} of {fit.J}; every group is in groups.csv",
        "groups_total": str(fit.J),
    }
    for part in out.values():
        part.attrs.update(note)
    out["constant_data"].add("kept_because", ("group",), np.array(acc.setup.kept_reason, dtype=object))
    return out


def _check_space(parts: dict, labels, folder: Path) -> None:
    need = REPORT_ROOM + sum(part.nbytes for part in parts.values())
    need += 3 * sum(len(lab.encode("utf-8", "surrogatepass")) for lab in labels)
    free = shutil.disk_usage(folder).free
    if free < need:
        raise OSError(errno.ENOSPC, f"{free / 2**20:.1f} MiB free, the run needs up to {need / 2**20:.1f} MiB")


#: Variables of at least this many bytes are written around the page cache (see _write_draws).
DIRECT_MIN_BYTES = 8 << 20
#: File offsets and lengths of direct writes are multiples of this (the largest logical block size in use).
DIRECT_ALIGN = 4096
#: What a file system that does not do direct I/O answers to a direct write (then the page cache is used).
_DIRECT_REFUSED = {errno.EINVAL, getattr(errno, "EOPNOTSUPP", errno.EINVAL), getattr(errno, "ENOTSUP", errno.EINVAL)}
#: The aligned buffer that the arrays pass through on their way to the disk.
DIRECT_BUFFER_BYTES = 16 << 20


def _write_draws(parts: dict, path: Path) -> None:
    """draws.nc: the parts (posterior, sample_stats, constant_data) as netCDF4 (HDF5) through h5netcdf,
    uncompressed; arviz.from_netcdf and xarray.open_dataset(group=...) read it back in the user's units.

    The large per-group variables (theta, sigma, lambda: at least DIRECT_MIN_BYTES) are given their place in
    the file by HDF5 (contiguous, allocated at creation, never filled, aligned to DIRECT_ALIGN) and their bytes
    are then written there by `_direct_write`, around the page cache: on the development machine a buffered
    write cost about 3 ms of CPU per MB (6 s for the 1.9 GB of 20,000 groups) and a direct one next to
    nothing (benchmarks/README.md). The file is the same netCDF4 file either way."""
    # Written with h5netcdf itself rather than through xarray: xarray asks dask (when installed) for a
    # scheduler before each group, which imports dask.distributed, ~0.3 s of every run.
    # Uncompressed on purpose: draws of theta and sigma are float64 noise that zlib shrinks by only
    # ~9% (64 -> 59 MB at 1,000 groups x 4,000 draws) for ~2.0 s of CPU, most of a later run's
    # write time; shuffle + zlib level 1 gives 52 MB for ~0.9 s. Measured in benchmarks/README.md.
    import h5netcdf

    later: list = []  # (variable, values) whose bytes go in after the file is closed
    with h5netcdf.File(str(path), "w", alignment_threshold=DIRECT_MIN_BYTES, alignment_interval=DIRECT_ALIGN) as f:
        for name, part in parts.items():
            g = f.create_group(name)
            for dim, values in part.coords.items():
                g.dimensions[dim] = len(values)
            for dim, values in part.coords.items():
                _variable(g, dim, (dim,), values)
            for var, (dims, values, attrs) in part.variables.items():
                v = _variable(g, var, dims, values, later)
                for key, val in attrs.items():
                    v.attrs[key] = val
            for key, val in part.attrs.items():
                g.attrs[key] = val
        places = [(v._h5ds.id.get_offset(), values) for v, values in later]
    _direct_write(path, places)


def _variable(g, name: str, dims, values: np.ndarray, later: list | None = None):
    values = np.asarray(values)
    if values.dtype == object or values.dtype.kind == "U":  # labels: variable-length UTF-8 strings
        import h5py

        data = np.asarray([str(x) for x in values.ravel()], dtype=object).reshape(values.shape)
        return g.create_variable(name, dims, dtype=h5py.string_dtype("utf-8"), data=data)
    if later is None or values.nbytes < DIRECT_MIN_BYTES or values.dtype.kind not in "fiu":
        return g.create_variable(name, dims, data=values)
    import h5py

    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)  # its place in the file is fixed now
    dcpl.set_fill_time(h5py.h5d.FILL_TIME_NEVER)  # and nothing is written there but the draws
    v = g.create_variable(name, dims, dtype=values.dtype.newbyteorder("<"), dcpl=dcpl)
    later.append((v, values))
    return v


def _chunks(values: np.ndarray, step: int):
    """The array's bytes in C order (little-endian), as arrays of at most `step` elements (views or copies of
    a slice along the first axis, so a strided or big-endian array needs no whole copy)."""
    values = values.astype(values.dtype.newbyteorder("<"), copy=False)
    if values.ndim == 0 or values.size <= step:
        yield np.ascontiguousarray(values).reshape(-1)
        return
    row = max(1, values[0].size)
    if row > step:  # a single slice along the first axis is larger than the buffer: go one axis down
        for sub in values:
            yield from _chunks(sub, step)
        return
    per = step // row
    for i in range(0, values.shape[0], per):
        yield np.ascontiguousarray(values[i : i + per]).reshape(-1)


def _direct_write(path: Path, places: list) -> None:
    """Write each array's bytes at its offset in `path`: whole aligned blocks with O_DIRECT through one
    aligned buffer, the last partial block (and everything, where O_DIRECT is refused: tmpfs, some network
    file systems) through the page cache."""
    if not places:
        return
    direct = getattr(os, "O_DIRECT", 0)
    fd = os.open(str(path), os.O_WRONLY)
    dfd = -1
    if direct:
        try:
            dfd = os.open(str(path), os.O_WRONLY | direct)
        except OSError:
            dfd = -1
    room = np.empty(DIRECT_BUFFER_BYTES + DIRECT_ALIGN, dtype=np.uint8)
    start = -room.ctypes.data % DIRECT_ALIGN
    buf = room[start : start + DIRECT_BUFFER_BYTES]  # O_DIRECT needs an aligned address too
    try:
        for offset, values in places:
            if offset is None or offset % DIRECT_ALIGN:
                raise OSError(errno.EIO, f"HDF5 gave draws.nc an unaligned place for a variable ({offset})")
            size = np.dtype(values.dtype).itemsize
            at = offset
            fill = 0  # bytes waiting in buf; buf is flushed in whole aligned blocks
            for piece in _chunks(values, max(1, DIRECT_BUFFER_BYTES // size // 2)):
                data = piece.view(np.uint8)
                while data.size:
                    take = min(data.size, DIRECT_BUFFER_BYTES - fill)
                    buf[fill : fill + take] = data[:take]
                    fill += take
                    data = data[take:]
                    if fill == DIRECT_BUFFER_BYTES:
                        dfd = _flush(fd, dfd, buf, fill, at)
                        at += fill
                        fill = 0
            whole = fill - fill % DIRECT_ALIGN
            if whole:
                dfd = _flush(fd, dfd, buf, whole, at)
                at += whole
            if fill > whole:
                _write_all(fd, buf[whole:fill], at)
    finally:
        if dfd >= 0:
            os.close(dfd)
        os.close(fd)


def _write_all(fd: int, data: np.ndarray, at: int) -> None:
    done = 0
    while done < data.size:
        done += os.pwrite(fd, data[done:], at + done)


def _flush(fd: int, dfd: int, buf: np.ndarray, nbytes: int, at: int) -> int:
    """Write buf[:nbytes] at offset `at`, directly when dfd is open; falls back to fd for good when the file
    system refuses direct writes. Returns the direct descriptor still in use (or -1)."""
    if dfd >= 0:
        try:
            _write_all(dfd, buf[:nbytes], at)
            return dfd
        except OSError as exc:
            if exc.errno not in _DIRECT_REFUSED:
                raise
            os.close(dfd)
            dfd = -1
    _write_all(fd, buf[:nbytes], at)
    return dfd


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


def write_run(
    fit, res, out, *, replace: bool = False, command: list[str] | None = None, extra=None, protect=()
) -> Path:
    """Write the run folder as one atomic folder: draws.nc (from the fit), summary.json, groups.csv and
    report.html (from its results), and whatever `extra(folder)` adds. When `extra` returns a dict (a refit's
    change report), report.html opens with it, so extra runs first.

    `res` may also be a function of no arguments that computes the results: it is then called while draws.nc
    is being written on the second thread (the write and the answers overlap), and the command line gets the
    results back through it (pooling.cli.run_fit). protect: (what, path) pairs that `out` may not be or hold
    (check_target)."""
    parts = draws_parts(fit)

    def fill(tmp: Path):
        _check_space(parts, fit.labels, tmp)
        # draws.nc is written on a second thread while the answers, summary.json and the report are made:
        # h5py and the kernel's page cache do most of that write without the GIL. Nothing is renamed into
        # place before both are done.
        writer = _Background(_write_draws, parts, tmp / "draws.nc")
        try:
            results = res() if callable(res) else res
            added = extra(tmp) if extra is not None else None
            write_results_files(results, tmp, command, added if isinstance(added, dict) else None)
        finally:
            writer.join()  # also on Ctrl-C or an error, so the folder is never removed under the writer
        writer.reraise()

    return atomic_folder(Path(out), replace, fill, protect)


def write_report(fit, folder, options=None, command: list[str] | None = None):
    """Write groups.csv, summary.json and report.html of a run (a posterior.Fit or a summary.SummaryFit) into
    `folder` (created if absent; those files are replaced). Returns the computed results. The command line's
    run folder, with draws.nc and written atomically, is `write_run`."""
    from .results import compute

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    res = compute(fit, options)
    write_results_files(res, folder, command)
    return res
