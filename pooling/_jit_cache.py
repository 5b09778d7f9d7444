"""Where numba keeps the compiled kernel: imported before numba by every module that compiles.

The kernels are compiled with `cache=True`. numba looks for a writable folder in this order:
$NUMBA_CACHE_DIR, the package's own __pycache__, then the user's cache folder
($XDG_CACHE_HOME or ~/.cache, "numba" below it). When none is writable it refuses to decorate the
function at all ("cannot cache function ...: no locator available"), so every fit fails. That is
the usual situation of a scheduler's service user: no home folder (or HOME unset) and a venv
installed by another user.

This module checks those places the way numba does (create the folder, create a file in it) and,
only when none works, points NUMBA_CACHE_DIR at a folder of this user's own under the temporary
folder, `pooling-numba-cache-<uid>`. numba's cache files are pickles that it loads and runs, so
that folder is used only if this user created it: a real folder (not a symbolic link), owned by
this user, writable by nobody else. Otherwise (another user made it first, or it cannot be made)
the kernel is compiled into a private folder that is removed at exit, and one line says so: the
run works, it only compiles afresh (several seconds).
"""

from __future__ import annotations

import atexit
import os
import shutil
import stat
import sys
import tempfile

NOTE_PREFIX = "pooling: note:"
SHARED_NAME = "pooling-numba-cache-{uid}"

#: what was decided, for tests and for `pooling` to mention: "numba" (numba's own places),
#: "shared" (the per-user folder under the temporary folder) or "private" (compiled afresh)
choice: str | None = None
folder: str | None = None


def _usable(path: str) -> bool:
    """numba's own test of a cache folder: make it if needed, then create a file in it."""
    try:
        os.makedirs(path, exist_ok=True)
        tempfile.TemporaryFile(dir=path).close()
        return True
    except OSError:
        return False


def _user_cache() -> str | None:
    """numba's user-wide cache folder (its appdirs rule for Linux and macOS); None where it would be
    relative (no HOME and no passwd entry: expanduser leaves '~' as it is)."""
    if sys.platform == "darwin":
        base = os.path.expanduser("~/Library/Caches")
    elif sys.platform.startswith("win"):
        return None  # numba finds its own place there; nothing here to improve
    else:
        base = os.getenv("XDG_CACHE_HOME", os.path.expanduser("~/.cache"))
    return os.path.join(base, "numba") if os.path.isabs(base) else None


def _numba_finds_a_place() -> bool:
    given = os.environ.get("NUMBA_CACHE_DIR")
    if given and _usable(given):
        return True
    if _usable(os.path.join(os.path.dirname(os.path.abspath(__file__)), "__pycache__")):
        return True
    user = _user_cache()
    return user is not None and _usable(user)


def _own_folder(path: str) -> bool:
    """Create `path` private to this user, or accept it if this user made it so; never follow a link."""
    try:
        os.mkdir(path, 0o700)
    except FileExistsError:
        pass
    except OSError:
        return False
    try:
        st = os.lstat(path)
    except OSError:
        return False
    uid = os.getuid() if hasattr(os, "getuid") else None
    return (
        stat.S_ISDIR(st.st_mode)
        and (uid is None or st.st_uid == uid)
        and not st.st_mode & (stat.S_IWGRP | stat.S_IWOTH)
        and _usable(path)
    )


def _use(path: str) -> None:
    os.environ["NUMBA_CACHE_DIR"] = path
    config = sys.modules.get("numba.core.config")
    if config is not None:  # numba was imported already (by the caller's own code): let it see the change
        config.reload_config()


def ensure() -> None:
    """Decide once per process, before numba decorates the kernels."""
    global choice, folder
    if choice is not None:
        return
    if _numba_finds_a_place():
        choice = "numba"
        return
    try:
        tmp = tempfile.gettempdir()
    except (OSError, FileNotFoundError):
        tmp = None
    uid = os.getuid() if hasattr(os, "getuid") else os.getpid()
    shared = os.path.join(tmp, SHARED_NAME.format(uid=uid)) if tmp else None
    if shared and _own_folder(shared):
        choice, folder = "shared", shared
        _use(shared)
        return
    try:
        private = tempfile.mkdtemp(prefix="pooling-numba-")
    except OSError:
        from .errors import OutputError

        raise OutputError(
            "cannot prepare the sampling kernel: numba needs a writable folder for its compiled code and "
            "none was found (the package folder, the home folder and the temporary folder are all "
            "read-only); set NUMBA_CACHE_DIR to a writable folder"
        ) from None
    atexit.register(shutil.rmtree, private, True)
    choice, folder = "private", private
    _use(private)
    why = f"'{shared}' is not a private folder of this user" if shared else "there is no temporary folder"
    print(
        f"{NOTE_PREFIX} the compiled kernel cannot be cached ({why}); it is compiled afresh for this run, which "
        "takes several seconds; set NUMBA_CACHE_DIR to a folder of your own to keep it",
        file=sys.stderr,
    )


ensure()
