"""Independent blocks of numpy work, on two threads when they are worth it.

numpy's sorts, partitions, reductions, ufuncs and FFTs release the GIL, so blocks of columns run
side by side. Each call writes only its own slice of the results, so the numbers do not depend on
the number of threads; an error in a block is raised in the caller.
"""

from __future__ import annotations

import contextlib
import os
import queue

THREADS = min(2, os.cpu_count() or 1)  # more gained nothing on the 2-core benchmark machine


def each_block(fn, starts, threaded: bool) -> None:
    """fn(s) for every s in `starts`: on THREADS threads when `threaded` and there are two or more."""
    starts = list(starts)
    workers = min(THREADS, len(starts))
    if threaded and workers > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(workers) as pool:
            for f in [pool.submit(fn, s) for s in starts]:
                f.result()
    else:
        for s in starts:
            fn(s)


class Scratch:
    """Work arrays for blocks run by each_block, made at most once per thread running at the same time (fresh
    memory is slow to touch: ~0.1 s per 64 MB here). `with scratch.lend() as arrays:` borrows one set."""

    def __init__(self, make):
        self._make = make
        self._free = queue.SimpleQueue()

    @contextlib.contextmanager
    def lend(self):
        try:
            held = self._free.get_nowait()
        except queue.Empty:
            held = self._make()
        try:
            yield held
        finally:
            self._free.put(held)
