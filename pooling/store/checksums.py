"""Checksums over everything a store keeps and reads back (pure; the same in every implementation).

A store verifies what it reads, so that a damaged file or a row changed by hand is refused with
one line instead of reaching a refit as wrong numbers. Four kinds of checksum, all SHA-256:

    stats_sum   over one batch's per-group statistics, in position order: the labels (UTF-8, each
                with its length), then n (int64), mean, mean_lo and M2 (IEEE 754 float64 bit
                patterns), all little-endian, then, only when the batch keeps group-level columns
                (schema version 3), each column's name and its value per group (UTF-8 with lengths),
                columns in code-point order of their names; written with the batch, never changed.
                A batch without group-level columns has the sum it had in schema version 2, so the
                upgrade to version 3 leaves every stored checksum as it was
    line_sum    over one ledger line: every field (id, name, content hash, source, columns, rows,
                groups, dates, status, when and why it changed) and its stats_sum, as compact JSON;
                rewritten in the same transaction whenever the line's status changes
    run sums    a recorded run's line (every field, its summary text and the checksum of its group
                results), its group results (JSON of every number, NULL kept as null) and its
                chains' final state (the stored JSON text)
    the head    a count of ledger lines and of run lines, and the sum modulo 2^64 of the first 64
                bits of their line sums: a line that vanished, or one that was added or altered by
                hand, shows as a disagreement between the lines and the head. The head is updated
                by adding and subtracting, never recomputed from the lines, so damage is not
                laundered by a later write.

Numbers enter a checksum exactly as they are stored: -0.0 is stored as 0.0 (SQLite does so
anyway), and a run's non-finite numbers as NULL. Two stores holding the same content therefore
have the same checksums whatever the implementation, which is how a copy is verified.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np

_STATS_TAG = b"pooling batch statistics 1\n"
_COLUMNS_TAG = b"pooling group-level columns 1\n"
_LINE_TAG = "pooling ledger line 1"
_RUN_TAG = "pooling run line 1"
_GROUPS_TAG = "pooling run groups 1"
_STATE_TAG = b"pooling final state 1\n"
_MOD = 1 << 64


def stored_floats(x) -> np.ndarray:
    """float64 as a store keeps them: -0.0 becomes 0.0 (x + 0.0 changes nothing else, NaN included)."""
    return np.asarray(x, dtype=np.float64) + 0.0


def _texts(h, texts) -> None:
    enc = [t.encode("utf-8") for t in texts]
    h.update(len(enc).to_bytes(8, "little"))
    h.update(np.fromiter((len(e) for e in enc), dtype="<i8", count=len(enc)).tobytes())
    h.update(b"".join(enc))


def stats_sum(labels, n, mean, mean_lo, m2, columns=None) -> str:
    """SHA-256 of one batch's statistics (arrays of equal length; n int64, the rest float64) and its group-level
    columns (`columns`: name -> one text per group, aligned with the labels; none: the version-2 sum)."""
    h = hashlib.sha256(_STATS_TAG)
    _texts(h, labels)
    h.update(np.ascontiguousarray(n, dtype="<i8").tobytes())
    for x in (mean, mean_lo, m2):
        h.update(np.ascontiguousarray(x, dtype="<f8").tobytes())
    if columns:
        h.update(_COLUMNS_TAG)
        names = sorted(columns)
        _texts(h, names)
        for name in names:
            _texts(h, columns[name])
    return h.hexdigest()


def _json_sum(tag: str, values) -> str:
    text = json.dumps([tag, *values], ensure_ascii=False, separators=(",", ":"), allow_nan=True)
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()


def line_sum(fields) -> str:
    """SHA-256 of one ledger line: (id, name, sha256, source, group_column, value_column, rows, groups,
    dated_at, ingested_at, status, changed_at, note, stats_sum), each as stored (int, str or None).
    JSON keeps the types apart: 5 and 5.0 and '5' give different sums."""
    return _json_sum(_LINE_TAG, fields)


def run_line_sum(fields) -> str:
    """SHA-256 of one run line: (id, created_at, folder, state_sha256, batch_ids, reference_at,
    half_life_days, targets_met, summary, groups_sum), each as stored."""
    return _json_sum(_RUN_TAG, fields)


def run_groups_sum(rows) -> str:
    """SHA-256 of a run's group results: rows of (position, label, n, raw_mean, post_mean, post_sd, q_lo,
    q_hi, rank_mean, rank_sd, p_above, p_outside), numbers as stored (float or None)."""
    return _json_sum(_GROUPS_TAG, [list(r) for r in rows])


def state_sum(text: str | None) -> str | None:
    """SHA-256 of a run's stored final-state text (None when the run keeps none)."""
    if text is None:
        return None
    return hashlib.sha256(_STATE_TAG + text.encode("utf-8", "surrogatepass")).hexdigest()


def acc_add(acc: str, line: str, sign: int = 1) -> str:
    """The head's running sum: acc +/- the first 64 bits of a line sum, modulo 2^64, as 16 hex digits."""
    return f"{(int(acc, 16) + sign * int(line[:16], 16)) % _MOD:016x}"


def acc_of(lines) -> str:
    """The head's sum over line sums, computed afresh (for checking, and for a new or copied store)."""
    total = 0
    for s in lines:
        total = (total + int(s[:16], 16)) % _MOD
    return f"{total:016x}"


ZERO = "0" * 16
