"""Which deliveries the store takes: a withdrawn batch ingested again, one delivery in two files, another quantity.

Every test that takes `new_store` runs on both stores (SQLite and PostgreSQL; conftest.py). The data are
small invented tables; no sampling here. "Nothing written" is checked on every refusal with the rows of
every table (store_helpers.sql_dump), and the store's own checkup after every change.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from store_helpers import execute
from store_helpers import sql_dump as _dump

from pooling import cli
from pooling.errors import InputError, NothingNew
from pooling.store import jobs, open_store
from pooling.store.ledger import PAUSE_AT_ENV, PAUSE_ENV, PAUSE_SECONDS_ENV, RESUME_ENV

BOUND = 120  # seconds any one subprocess may take before the test fails


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> Path:
    """Three deliveries of diameters by supplier (CSV), one of them also as Parquet, and a delivery of
    another quantity (results by lab)."""
    d = tmp_path_factory.mktemp("deliveries")
    rng = np.random.default_rng(29)
    for k in (1, 2, 3):
        df = pd.DataFrame(
            {"supplier": rng.choice([f"S{i}" for i in range(6)], 80), "diameter": rng.normal(12.0, 0.05, 80)}
        )
        df.to_csv(d / f"batch{k}.csv", index=False, float_format="%.17g")
    back = pd.read_csv(d / "batch3.csv", dtype={"supplier": str})  # the same doubles the CSV holds
    back.to_parquet(d / "batch3.parquet", index=False)
    pd.DataFrame({"lab": rng.choice(["L1", "L2", "L3"], 30), "result": rng.normal(3.0, 1.0, 30)}).to_csv(
        d / "labs.csv", index=False, float_format="%.17g"
    )
    return d


def _ingest(store, file, *extra, group="supplier", value="diameter"):
    return cli.main(["ingest", str(store), str(file), "--group", group, "--value", value, "--quiet", *extra])


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert "Traceback" not in err[0]
    return err[0]


def _sound(store) -> None:
    with open_store(store) as st:
        assert st.check() == []


def _store_of_three(new_store, files) -> str:
    store = new_store()
    for k in (1, 2, 3):
        assert _ingest(store, files / f"batch{k}.csv") == 0
    return store


def _by_id(store) -> list:
    with open_store(store) as st:
        return st.batches()


# -- 1. a withdrawn batch ingested again -----------------------------------------------------------------


def test_a_withdrawn_batch_ingested_again_is_named_as_such_and_taken_back_with_its_record(
    files, capsys, new_store, tmp_path
):
    store = _store_of_three(new_store, files)
    assert cli.main(["withdraw", store, "batch2.csv", "--reason", "gauge drift"]) == 0
    withdrawn = next(b for b in _by_id(store) if b.name == "batch2.csv")
    capsys.readouterr()
    before = _dump(store)

    # the same file again: refused (2) naming the withdrawal, its time and reason, not "other content"
    assert _ingest(store, files / "batch2.csv", "--at", "2026-11-29") == 2
    line = _one_line(capsys)
    assert "same content" in line and "other content" not in line
    assert f"withdrawn from the store '{store}' at {withdrawn.changed_at}" in line
    assert "'gauge drift'" in line and "--replace to take it back" in line
    assert _dump(store) == before

    # other content under that name: refused, and said to be other content of a withdrawn batch
    other = tmp_path / "batch2.csv"
    other.write_text((files / "batch1.csv").read_text().replace("S1,", "S9,"))
    assert _ingest(store, other) == 2
    line = _one_line(capsys)
    assert "other content" in line and "was withdrawn" in line and "'gauge drift'" in line
    assert _dump(store) == before

    # --replace takes it back; the replaced line keeps the withdrawal's time and reason in its note
    assert _ingest(store, files / "batch2.csv", "--at", "2026-11-29", "--replace") == 0
    ledger = _by_id(store)
    old, new = ledger[1], ledger[-1]
    assert (old.id, old.status) == (withdrawn.id, "replaced")
    assert old.note.startswith(f"withdrawn at {withdrawn.changed_at}: gauge drift; taken back at {old.changed_at}")
    assert (new.name, new.status, new.sha256) == ("batch2.csv", "active", withdrawn.sha256)
    assert new.dated_at.startswith("2026-11-29")
    _sound(store)

    # the note is covered by the line's checksum: changed by hand, checkup and every read find it
    execute(store, "UPDATE batches SET note = ? WHERE id = ?", ("replaced", old.id))
    with open_store(store) as st:
        assert any(f"batch {old.id} ('batch2.csv')" in p for p in st.check())
        with pytest.raises(InputError, match="does not match its checksum"):
            st.batches()


def test_replacing_a_withdrawn_batch_by_other_content_keeps_the_withdrawal(files, new_store, tmp_path):
    store = _store_of_three(new_store, files)
    # withdrawn with no reason: the note says so
    assert cli.main(["withdraw", store, "batch1.csv"]) == 0
    gone = next(b for b in _by_id(store) if b.name == "batch1.csv")
    fresh = tmp_path / "fresh.csv"
    pd.DataFrame({"supplier": ["S1", "S2", "S2"], "diameter": [12.01, 11.98, 12.03]}).to_csv(fresh, index=False)
    assert _ingest(store, fresh, "--batch", "batch1.csv", "--replace") == 0
    old = next(b for b in _by_id(store) if b.id == gone.id)
    assert old.status == "replaced"
    assert old.note == (
        f"withdrawn at {gone.changed_at} (no reason given); "
        f"replaced by a new delivery of the same name at {old.changed_at}"
    )
    # an active batch replaced: the note as before (nothing to keep)
    assert _ingest(store, files / "batch1.csv", "--batch", "batch3.csv", "--replace") == 0
    three = next(b for b in _by_id(store) if b.name == "batch3.csv" and b.status == "replaced")
    assert three.note == f"replaced by a new delivery of the same name at {three.changed_at}"
    _sound(store)


# -- 2. one delivery in two files -------------------------------------------------------------------------


def test_the_same_delivery_in_another_file_is_nothing_new(files, capsys, new_store, tmp_path):
    store = _store_of_three(new_store, files)
    crlf = tmp_path / "batch3_crlf.csv"
    crlf.write_bytes((files / "batch3.csv").read_bytes().replace(b"\n", b"\r\n"))
    capsys.readouterr()
    before = _dump(store)
    for dup in (crlf, files / "batch3.parquet"):
        assert _ingest(store, dup) == 4  # nothing new
        line = _one_line(capsys)
        assert f"'{dup}'" in line and "active batch 'batch3.csv'" in line
        assert "withdraw 'batch3.csv'" in line and "--batch 'batch3.csv' --replace" in line
        assert _dump(store) == before
    with pytest.raises(NothingNew, match="equal those of the active batch 'batch3.csv'"):
        jobs.ingest_file(store, crlf, "supplier", "diameter", batch="another-name")
    assert _dump(store) == before

    # the two ways on that the message names: replace it by name ...
    assert _ingest(store, crlf, "--batch", "batch3.csv", "--replace") == 0
    active = [b for b in _by_id(store) if b.status == "active"]
    assert [b.name for b in active] == ["batch1.csv", "batch2.csv", "batch3.csv"]
    assert active[-1].source == str(crlf)
    # ... or withdraw it first
    assert cli.main(["withdraw", store, "batch3.csv"]) == 0
    assert _ingest(store, files / "batch3.parquet") == 0
    _sound(store)


def test_statistics_are_compared_exactly_and_in_any_group_order(new_store, tmp_path, capsys):
    store = new_store()
    first = tmp_path / "first.csv"
    first.write_text("supplier,diameter\nA,1.5\nB,2.25\nA,1.75\nB,2.5\n")
    assert _ingest(store, first) == 0
    # the groups first seen in the other order, each group's rows in the same order: the same statistics
    swapped = tmp_path / "swapped.csv"
    swapped.write_text("supplier,diameter\nB,2.25\nA,1.5\nB,2.5\nA,1.75\n")
    assert _ingest(store, swapped) == 4
    assert "active batch 'first.csv'" in _one_line(capsys)
    # one value one unit in the last place away (1.75 -> the next double up): other statistics, taken.
    # The first group (B) is the same, so the database's first look finds the batch and the whole
    # comparison must tell them apart
    near = tmp_path / "near.csv"
    near.write_text(f"supplier,diameter\nB,2.25\nA,1.5\nB,2.5\nA,{float(np.nextafter(1.75, 2.0))!r}\n")
    assert _ingest(store, near) == 0
    # the same rows plus one more row in one group: taken
    more = tmp_path / "more.csv"
    more.write_text("supplier,diameter\nA,1.5\nB,2.25\nA,1.75\nB,2.5\nB,2.5\n")
    assert _ingest(store, more) == 0
    # a withdrawn batch's statistics are no obstacle
    assert cli.main(["withdraw", store, "first.csv"]) == 0
    assert _ingest(store, swapped) == 0
    assert [b.status for b in _by_id(store)] == ["withdrawn", "active", "active", "active"]
    _sound(store)


# -- 3. a delivery of another quantity --------------------------------------------------------------------


def test_a_delivery_of_another_quantity_is_refused_unless_the_column_was_renamed(files, capsys, new_store, tmp_path):
    store = _store_of_three(new_store, files)
    capsys.readouterr()
    before = _dump(store)
    assert _ingest(store, files / "labs.csv", "--batch", "labsb", group="lab", value="result") == 2
    line = _one_line(capsys)
    assert "the value column 'result' and the group column 'lab' are named otherwise" in line
    assert "'diameter' and 'supplier'" in line and "latest active batch 'batch3.csv'" in line
    assert "--same-quantity" in line
    assert _dump(store) == before

    # the value column renamed only
    renamed = tmp_path / "renamed.csv"
    renamed.write_text((files / "batch1.csv").read_text().replace("supplier,diameter", "supplier,diam_mm", 1))
    renamed.write_text(renamed.read_text().replace("S1,", "S7,"))  # another delivery, not batch1 again
    assert _ingest(store, renamed, value="diam_mm") == 2
    line = _one_line(capsys)
    assert "the value column 'diam_mm' is named otherwise" in line and "has 'diameter'" in line
    assert "group column" not in line
    assert _dump(store) == before
    # the group column renamed only: the same rule
    regrouped = tmp_path / "regrouped.csv"
    regrouped.write_text(renamed.read_text().replace("supplier,diam_mm", "vendor,diameter", 1).replace("S3,", "S6,"))
    assert _ingest(store, regrouped, group="vendor") == 2
    assert "the group column 'vendor' is named otherwise" in _one_line(capsys)
    assert _dump(store) == before

    # told it was only renamed: taken, and later deliveries under either name are taken without it
    assert _ingest(store, renamed, "--same-quantity", value="diam_mm") == 0
    later = tmp_path / "later.csv"
    later.write_text(renamed.read_text().replace("S2,", "S8,"))
    assert _ingest(store, later, value="diam_mm") == 0
    assert _ingest(store, regrouped, "--same-quantity", group="vendor") == 0
    _sound(store)


def test_the_quantity_check_looks_at_active_batches_only(files, new_store, capsys):
    store = new_store()
    assert _ingest(store, files / "batch1.csv") == 0
    # the only active batch replaced by another quantity: nothing left to compare with, so it is taken
    assert _ingest(store, files / "labs.csv", "--batch", "batch1.csv", "--replace", group="lab", value="result") == 0
    assert _ingest(store, files / "batch2.csv") == 2
    assert "'diameter' and the group column 'supplier' are named otherwise" in _one_line(capsys)
    # once every batch of the other quantity is withdrawn, the store takes the first quantity again
    assert cli.main(["withdraw", store, "batch1.csv"]) == 0
    assert _ingest(store, files / "batch2.csv") == 0
    _sound(store)


# -- two ingests at once (one paused inside its transaction) ----------------------------------------------


def _spawn_paused(store, file, tmp_path, group="supplier", value="diameter", *extra):
    marker, resume = tmp_path / "paused", tmp_path / "resume"
    env = dict(
        os.environ,
        **{PAUSE_ENV: str(marker), PAUSE_AT_ENV: "middle", PAUSE_SECONDS_ENV: "100", RESUME_ENV: str(resume)},
    )
    cmd = [sys.executable, "-m", "pooling.cli", "ingest", str(store), str(file), "--group", group, "--value", value]
    proc = subprocess.Popen([*cmd, *extra], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    end = time.monotonic() + BOUND
    while not marker.exists():
        if proc.poll() is not None or time.monotonic() > end:
            proc.kill()
            raise AssertionError(f"the ingest never reached its pause: {proc.communicate()[1]}")
        time.sleep(0.05)
    return proc, resume


def _resume_later(resume: Path, seconds: float):
    import threading

    timer = threading.Timer(seconds, resume.touch)
    timer.start()
    return timer


@pytest.mark.parametrize("case", ["same statistics", "first quantity"])
def test_two_ingests_at_once_do_not_both_pass_a_check(files, new_store, tmp_path, case):
    """The first ingest stops inside its transaction, after its checks; the second starts meanwhile and must
    wait for it (SQLite: its one writer; PostgreSQL: the advisory lock on the statistics' checksum, or on the
    store's quantity while it has no active batch), then see it and refuse. Without the wait both would land."""
    store = new_store()
    if case == "same statistics":
        assert _ingest(store, files / "batch1.csv") == 0
        first, resume = _spawn_paused(store, files / "batch3.csv", tmp_path)
        second = ("batch3.parquet", "supplier", "diameter", NothingNew)
    else:
        first, resume = _spawn_paused(store, files / "batch1.csv", tmp_path)
        second = ("labs.csv", "lab", "result", InputError)
    timer = _resume_later(resume, 2.0)
    try:
        with pytest.raises(second[3]):
            jobs.ingest_file(store, files / second[0], second[1], second[2])
    finally:
        timer.join()
        out, err = first.communicate(timeout=BOUND)
    assert first.returncode == 0, err
    active = [b.name for b in _by_id(store) if b.status == "active"]
    assert active == (["batch1.csv", "batch3.csv"] if case == "same statistics" else ["batch1.csv"])
    _sound(store)
