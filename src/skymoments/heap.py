"""Keep freed memory inside the process: glibc ``malloc`` settings for array work.

By default glibc serves an allocation above a threshold (128 KiB at start, raised as
large blocks are freed) with a fresh ``mmap``, and gives freed memory at the top of the
heap back to the system once more than 128 KiB of it is free (``mallopt(3)``,
``M_MMAP_THRESHOLD`` and ``M_TRIM_THRESHOLD``). Torch allocates and frees arrays of a few
MiB many times per step (the WPH evaluation's wavelet stack, the networks' activations);
each time the memory comes back from the system it is zero-filled page by page, one page
fault per 4 KiB. Measured on the project's 2-core machine: 6,700 page faults per WPH loss
evaluation of 2 maps without these settings, 13 with them; a bank of 8 syntheses 41-42 s
without, 38-39 s with (``SKYMOMENTS_KEEP_HEAP=0`` and ``=1`` of
``experiments/synthesis_speed/bench.py --parts 3 --bank 8``, alternated).

:func:`keep_freed_memory` serves allocations up to 32 MiB from the heap and keeps up to
1 GiB of freed memory for reuse. The peak memory of a run does not change; memory freed
after the peak stays with the process until it ends. Only on Linux with glibc; elsewhere
(and with ``SKYMOMENTS_KEEP_HEAP=0``) it does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

# mallopt(3) parameter numbers, from glibc's malloc.h.
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD = 32 * 2**20  # glibc's largest (DEFAULT_MMAP_THRESHOLD_MAX, 64-bit)
TRIM_THRESHOLD = 2**30

_done: bool | None = None


def keep_freed_memory() -> bool:
    """Apply the settings once per process; True when they are in force."""
    global _done
    if _done is not None:
        return _done
    _done = False
    if not sys.platform.startswith("linux") or os.environ.get("SKYMOMENTS_KEEP_HEAP") == "0":
        return _done
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return _done
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    _done = bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(
        mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD)
    )
    return _done
