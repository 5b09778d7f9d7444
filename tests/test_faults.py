"""Faults: Ctrl-C, SIGTERM, an unwritable folder, a full disk, an existing run folder.

The contract is the project's own (README, "Exit codes"): exit 5 when stopped, exit 6 when the
output cannot be written, one line on stderr, and never a half-written or overwritten run folder.

The tests run as root, for whom chmod does not make a folder unwritable. An unwritable folder is
therefore made three ways: a path under a regular file (ENOTDIR), a read-only tmpfs mount, and a
monkeypatched mkdtemp that raises EACCES. A full disk is a 64 KiB tmpfs, and, where mounting is not
allowed, a monkeypatched disk_usage or write that raises ENOSPC. Mount tests skip (and say why) when
mount(8) is refused.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import os
import pty
import re
import select
import shutil
import signal
import struct
import subprocess
import sys
import termios
import time
from pathlib import Path

import pytest

TINY = ["--chains", "2", "--draws", "30", "--warmup", "30", "--seed", "1", "--quiet"]


def _fit(run_cli, data, out, *extra):
    return run_cli("fit", data, "--group", "plant", "--value", "thickness", "--out", out, *TINY, *extra)


def _one_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if ".partial-" in p.name or ".old-" in p.name)


def _digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


# ---------------------------------------------------------------------------------------------
# Ctrl-C and SIGTERM to a real process, while it samples


def _stop_while_sampling(tmp_path, small_csv, sig):
    """Start `pooling fit` with its stderr on a pseudo-terminal, so the progress bar shows when the
    sweeps have begun; then send `sig` and collect what the process says and returns."""
    out = tmp_path / "run"
    master, slave = pty.openpty()
    # a terminal of 0 columns (a fresh pty) gets an empty progress bar: give it a size
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))
    cmd = [
        sys.executable,
        "-m",
        "pooling.cli",
        "fit",
        str(small_csv),
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        str(out),
        "--chains",
        "2",
        "--warmup",
        "10000000",
        "--draws",
        "10",
        "--seed",
        "1",
    ]  # the largest warm-up allowed
    proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=slave, close_fds=True)
    os.close(slave)
    seen, deadline = b"", time.monotonic() + 60
    try:
        # wait for the bar to count sweeps: the kernel is compiled (or loaded) and running
        while not any(int(k) > 0 for k in re.findall(rb"\| *(\d+)/\d+ ", seen)):
            assert time.monotonic() < deadline, seen
            ready, _, _ = select.select([master], [], [], 0.5)
            if ready:
                try:
                    seen += os.read(master, 4096)
                except OSError:
                    break
            assert proc.poll() is None, seen
        time.sleep(0.3)  # well inside the warm-up, which takes far longer than this test waits
        t0 = time.monotonic()
        proc.send_signal(sig)
        rc = proc.wait(timeout=60)
        stopped_in = time.monotonic() - t0
        while True:
            ready, _, _ = select.select([master], [], [], 0.2)
            if not ready:
                break
            try:
                chunk = os.read(master, 4096)
            except OSError:
                break
            if not chunk:
                break
            seen += chunk
    finally:
        if proc.poll() is None:
            proc.kill()
        os.close(master)
    return rc, seen.decode("utf-8", "replace"), out, stopped_in


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_during_sampling_leaves_nothing_and_exits_5(tmp_path, small_csv, sig):
    rc, said, out, stopped_in = _stop_while_sampling(tmp_path, small_csv, sig)
    assert rc == 5, said
    assert "stopped by the user" in said and "Traceback" not in said
    assert not out.exists() and _leftovers(tmp_path) == []
    assert stopped_in < 10  # chains stop between chunks of about 0.1 s


def test_interrupt_while_writing_leaves_no_folder(run_cli, small_csv, tmp_path, monkeypatch):
    """Ctrl-C after sampling, while the files are being written (the reporter's step)."""
    import pooling.output as output

    def stopped(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(output, "write_results_files", stopped)
    out = tmp_path / "run"
    code, _, err = _fit(run_cli, small_csv, out)
    assert code == 5 and "stopped by the user" in _one_line(err)
    assert not out.exists() and _leftovers(tmp_path) == []


def test_interrupt_after_the_folder_is_in_place_says_so(run_cli, small_csv, tmp_path, monkeypatch):
    """Ctrl-C while the run's table is printed: the folder is complete, and the message must not
    claim that nothing was written (source: the documented exit codes and messages, README)."""
    import pooling.terminal as terminal

    def stopped(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(terminal, "print_results", stopped)
    out = tmp_path / "run"
    code, _, err = run_cli(
        "fit",
        small_csv,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        out,
        "--seed",
        "1",
        "--draws",
        "200",
        "--warmup",
        "200",
        "--max-draws",
        "200",
    )
    line = _one_line(err)
    assert code == 5 and "after the run folder" in line and "was written" in line and "nothing" not in line
    assert (out / "draws.nc").exists() and (out / "report.html").exists()


def test_interrupt_while_replacing_keeps_the_old_folder(run_cli, small_csv, tmp_path, monkeypatch):
    out = tmp_path / "run"
    assert _fit(run_cli, small_csv, out)[0] in (0, 3)
    before = _digest(out)
    real_rename = os.rename
    calls = []

    def rename(a, b):  # the swap is two renames: old aside, new in; stop between them
        calls.append((a, b))
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real_rename(a, b)

    import pooling.output as output

    monkeypatch.setattr(output.os, "rename", rename)
    code, _, err = _fit(run_cli, small_csv, out, "--replace", "--seed", "2")
    monkeypatch.undo()
    assert code == 5, err
    assert _digest(out) == before and _leftovers(tmp_path) == []


# ---------------------------------------------------------------------------------------------
# an unwritable output folder


def test_out_below_a_regular_file(run_cli, small_csv, tmp_path):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("x")
    code, _, err = _fit(run_cli, small_csv, blocker / "run")
    line = _one_line(err)
    assert code == 6 and "not-a-folder" in line
    assert blocker.read_text() == "x" and _leftovers(tmp_path) == []


def test_out_is_a_file_even_with_replace(run_cli, small_csv, tmp_path):
    f = tmp_path / "run"
    f.write_text("keep me")
    code, _, err = _fit(run_cli, small_csv, f, "--replace")
    assert code == 6 and "in the way" in _one_line(err)
    assert f.read_text() == "keep me"


def test_permission_denied_is_exit_6(run_cli, small_csv, tmp_path, monkeypatch):
    import pooling.output as output

    def denied(*a, **k):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(output.tempfile, "mkdtemp", denied)
    out = tmp_path / "run"
    code, _, err = _fit(run_cli, small_csv, out)
    assert code == 6 and "Permission denied" in _one_line(err)
    assert not out.exists() and _leftovers(tmp_path) == []


@pytest.fixture
def mount_tmpfs(tmp_path):
    """Mount a small tmpfs at a fresh folder (root only); unmounted afterwards."""
    mounted = []

    def mount(options: str) -> Path:
        where = tmp_path / f"mnt{len(mounted)}"
        where.mkdir()
        if os.geteuid() != 0 or shutil.which("mount") is None:
            pytest.skip("mounting a tmpfs needs root and mount(8)")
        r = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(where)], capture_output=True, text=True)
        if r.returncode != 0:
            pytest.skip(f"mount refused here ({r.stderr.strip()}); the monkeypatched tests cover the same paths")
        mounted.append(where)
        return where

    yield mount
    for where in mounted:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


def test_read_only_folder_is_refused_before_sampling(run_cli, small_csv, mount_tmpfs):
    ro = mount_tmpfs("ro,size=64k")
    t0 = time.monotonic()
    code, _, err = _fit(run_cli, small_csv, ro / "run", "--warmup", "200000")  # would take minutes if sampled
    assert code == 6 and "not writable" in _one_line(err)
    assert time.monotonic() - t0 < 20
    assert list(ro.iterdir()) == []


# ---------------------------------------------------------------------------------------------
# a full disk


def test_full_disk_real_tmpfs(run_cli, small_csv, mount_tmpfs):
    """A 64 KiB tmpfs: HDF5 would crash the process writing draws.nc there (seen with h5py 3.16:
    a segmentation fault and a partial folder), so the space is checked before the write."""
    full = mount_tmpfs("size=64k")
    code, _, err = _fit(run_cli, small_csv, full / "run")
    line = _one_line(err)
    assert code == 6 and "disk is full" in line and "nothing was written" in line
    assert list(full.iterdir()) == []


def test_full_disk_preflight_without_mount(run_cli, small_csv, tmp_path, monkeypatch):
    import pooling.output as output

    usage = shutil.disk_usage(tmp_path)
    monkeypatch.setattr(output.shutil, "disk_usage", lambda p: usage._replace(free=50_000))
    out = tmp_path / "run"
    code, _, err = _fit(run_cli, small_csv, out)
    assert code == 6 and "disk is full" in _one_line(err) and "MiB free" in err
    assert not out.exists() and _leftovers(tmp_path) == []


@pytest.mark.parametrize("where", ["summary", "report"])
def test_disk_fills_during_the_write(run_cli, small_csv, tmp_path, monkeypatch, where):
    """ENOSPC from an ordinary write after the check passed (another process filled the disk)."""
    import pooling.output as output
    import pooling.report.export as export

    def full(*a, **k):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    if where == "summary":
        monkeypatch.setattr(output, "write_json", full)
    else:
        monkeypatch.setattr(export, "write_csv", full)
    out = tmp_path / "run"
    code, _, err = _fit(run_cli, small_csv, out)
    assert code == 6 and "disk is full" in _one_line(err)
    assert not out.exists() and _leftovers(tmp_path) == []


def test_disk_full_while_replacing_keeps_the_old_folder(run_cli, small_csv, tmp_path, monkeypatch):
    import pooling.output as output

    out = tmp_path / "run"
    assert _fit(run_cli, small_csv, out)[0] in (0, 3)
    before = _digest(out)

    def full(*a, **k):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(output, "write_json", full)
    code, _, err = _fit(run_cli, small_csv, out, "--replace", "--seed", "2")
    assert code == 6 and "disk is full" in _one_line(err)
    assert _digest(out) == before and _leftovers(tmp_path) == []


# ---------------------------------------------------------------------------------------------
# a run folder is never overwritten without --replace


def test_existing_folder_is_never_overwritten(run_cli, small_csv, tmp_path):
    out = tmp_path / "run"
    assert _fit(run_cli, small_csv, out)[0] in (0, 3)
    before = _digest(out)
    code, _, err = _fit(run_cli, small_csv, out, "--seed", "2")
    line = _one_line(err)
    assert code == 6 and "exists already" in line and "--replace" in line
    assert _digest(out) == before
    code, _, err = _fit(run_cli, small_csv, out, "--seed", "2", "--replace")
    assert code in (0, 3), err
    after = _digest(out)
    assert after["draws.nc"] != before["draws.nc"] and _leftovers(tmp_path) == []


def test_existing_empty_folder_or_foreign_folder_is_not_taken(run_cli, small_csv, tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    code, _, err = _fit(run_cli, small_csv, empty)
    assert code == 6 and "exists already" in _one_line(err)
    assert list(empty.iterdir()) == []


def test_folder_made_by_someone_else_during_the_fit_is_not_overwritten(small_csv, tmp_path):
    """check_target runs again at write time: a folder that appeared while sampling is refused."""
    import pooling
    from pooling.errors import OutputError
    from pooling.output import write_run
    from pooling.results import compute

    fit = pooling.fit(
        pooling.read_table(small_csv, "plant", "thickness"),
        settings=pooling.Settings(chains=2, draws=30, warmup=30, seed=1),
        progress=False,
    )
    out = tmp_path / "run"
    out.mkdir()
    (out / "theirs.txt").write_text("theirs")
    with pytest.raises(OutputError, match="exists already"):
        write_run(fit, compute(fit), out)
    assert [p.name for p in out.iterdir()] == ["theirs.txt"] and _leftovers(tmp_path) == []


def test_run_folder_mode_follows_the_umask(run_cli, small_csv, tmp_path):
    old = os.umask(0o022)
    try:
        out = tmp_path / "run"
        assert _fit(run_cli, small_csv, out)[0] in (0, 3)
    finally:
        os.umask(old)
    assert (out.stat().st_mode & 0o777) == 0o755  # mkdtemp's 0700 would hide the run from colleagues
