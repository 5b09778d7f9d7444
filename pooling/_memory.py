"""How the process gets its memory: the draws in plain pages, and freed work arrays kept for reuse.

Two costs measured on the development machine (2 cores, Linux, glibc; benchmarks/README.md, "Where a whole
run's time went"), neither of them arithmetic:

* numpy asks the kernel for transparent huge pages on every large array. When free memory is fragmented
  (after a few gigabytes of files went through the page cache, as in any nightly job) the kernel compacts
  memory to make each huge page, in the faulting thread: the 1.9 GB of draws of 20,000 groups cost 3.4 to
  5.7 s of system time during sampling, against 0.7 to 1.3 s in ordinary pages. `empty` gives large
  arrays ordinary pages (an anonymous mapping, which the kernel gives huge pages only when asked).
* glibc returns freed blocks above a threshold to the kernel and maps them afresh on the next allocation, so
  work arrays that are made and dropped block after block (the diagnostics' sorted copies on two threads)
  are faulted in again each time: 690,000 page faults in one run at 20,000 groups. `keep_freed_memory`
  raises glibc's thresholds for a process that exits when its run is done: the program `pooling`
  (pooling.cli.run), not pooling.cli.main, which tests and other Python callers run in their own process.
"""

from __future__ import annotations

import mmap
import sys

import numpy as np

#: Arrays of at least this many bytes get pages of their own (`empty`); smaller ones come from numpy.
PLAIN_PAGES_MIN = 64 << 20
#: glibc's largest mmap threshold on 64-bit systems (HEAP_MAX_SIZE / 2): blocks below it come from the heap.
MMAP_THRESHOLD = 32 << 20
#: Freed memory at the top of a heap is given back to the kernel only above this much.
TRIM_THRESHOLD = 1 << 30

_M_TRIM_THRESHOLD = -1  # glibc's mallopt parameter numbers (malloc.h)
_M_MMAP_THRESHOLD = -3


def empty(shape, dtype=np.float64) -> np.ndarray:
    """np.empty(shape, dtype), in ordinary pages when it is large (see the module's text); the memory is
    returned to the system when the last array using it is gone."""
    dtype = np.dtype(dtype)
    count = int(np.prod(shape, dtype=np.int64))
    nbytes = count * dtype.itemsize
    if nbytes < PLAIN_PAGES_MIN:
        return np.empty(shape, dtype=dtype)
    pages = mmap.mmap(-1, nbytes)
    return np.frombuffer(pages, dtype=dtype, count=count).reshape(shape)


def keep_freed_memory() -> bool:
    """Raise glibc's mmap and trim thresholds (mallopt), so that freed work arrays are reused rather than
    given back and faulted in again. Does nothing off glibc; returns whether the thresholds were set."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL(None)
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # musl and other C libraries have no mallopt
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
