"""Single-bit flips in a Parquet file: how many does pooling's reader refuse, and how many read silently?

    python benchmarks/parquet_flips.py            # every bit of a small file, a random sample of a larger one
    python benchmarks/parquet_flips.py --quick    # fewer bits

For each flip the file is read with pooling.read_table (page checksums verified, the footer's counts and
types checked) and the outcome sorted into: refused (one InputError line), the same statistics as the
undamaged file (a flip in bytes that do not change the data: statistics, padding, unused metadata),
silently different statistics (the damage this counts), or an internal error (any other exception). Each
file is written twice, with and without page checksums (pyarrow's write_page_checksum), so the two counts
show what the checksums buy. Invented data: 5 groups (small file) or 40 groups (large file), values on
a grid of quarters so that a changed value is an exact difference.
"""

from __future__ import annotations

import argparse
import io
import json
import random
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _table(rows: int, groups: int):
    import pyarrow as pa

    return pa.table(
        {"lab": [f"G{i % groups}" for i in range(rows)], "y": [float(i % 13) + 0.25 * (i % 7) for i in range(rows)]}
    )


def _write(table, checksums: bool, **kw) -> bytes:
    import pyarrow.parquet as pq

    buf = io.BytesIO()
    pq.write_table(table, buf, write_page_checksum=checksums, **kw)
    return buf.getvalue()


def _same(a, b) -> bool:
    return (
        a.labels == b.labels
        and np.array_equal(a.n, b.n)
        and np.array_equal(a.mean, b.mean)
        and np.array_equal(a.mean_lo, b.mean_lo)
        and np.array_equal(a.m2, b.m2)
    )


def flips(data: bytes, bits, folder: Path) -> dict:
    """Outcomes of flipping each bit in `bits` (one at a time) of the file `data`."""
    import warnings

    from pooling.errors import InputError
    from pooling.stats import read_table

    ref_path = folder / "ref.parquet"
    ref_path.write_bytes(data)
    ref = read_table(ref_path, "lab", "y")
    out = {"flips": 0, "refused": 0, "same": 0, "silent": 0, "internal": 0, "silent_bits": [], "internal_bits": []}
    path = folder / "flipped.parquet"
    for bit in bits:
        damaged = bytearray(data)
        damaged[bit // 8] ^= 1 << (bit % 8)
        path.write_bytes(bytes(damaged))
        out["flips"] += 1
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error")  # a warning would reach a nightly log: count it as internal
                got = read_table(path, "lab", "y")
        except InputError:
            out["refused"] += 1
            continue
        except Exception:  # noqa: BLE001 -- every other exception is an internal error, counted
            out["internal"] += 1
            out["internal_bits"].append(bit)
            continue
        if _same(got, ref):
            out["same"] += 1
        else:
            out["silent"] += 1
            out["silent_bits"].append(bit)
    return out


def run(quick: bool = False) -> dict:
    rng = random.Random(13)  # fixed: the same sample of bits every run
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        small = _table(3000, 5)
        large = _table(200_000, 40)
        for checksums in (True, False):
            key = "with checksums" if checksums else "without checksums"
            data = _write(small, checksums)
            every = range(len(data) * 8) if not quick else rng.sample(range(len(data) * 8), 2000)
            t0 = time.perf_counter()
            results[f"small file ({len(data):,} bytes), {key}"] = flips(data, every, folder)
            big = _write(large, checksums, row_group_size=50_000, data_page_size=64 * 1024)
            sample = rng.sample(range(len(big) * 8), 500 if quick else 4000)
            results[f"large file ({len(big):,} bytes, 4 row groups), {key}"] = flips(big, sample, folder)
            results[f"seconds, {key}"] = round(time.perf_counter() - t0, 1)
    return results


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    res = run(args.quick)
    for name, r in res.items():
        if isinstance(r, dict):
            print(
                f"{name}: {r['flips']} flips: {r['refused']} refused, {r['same']} read the same data, "
                f"{r['silent']} read silently different data, {r['internal']} internal errors"
            )
    out = Path(__file__).resolve().parent / "results"
    out.mkdir(exist_ok=True)
    (out / "parquet_flips.json").write_text(json.dumps(res, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
