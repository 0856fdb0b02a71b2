"""Allocator settings for the ``aoi-fix`` program (not applied on library import).

Every stage works on whole columns: at 4 million samples one float64 column is
32 MB.  glibc's ``malloc`` serves blocks that large with ``mmap`` and gives them
back with ``munmap`` when freed, so the next column of the same size is new
memory again and every one of its pages is faulted in by the kernel.  On the
virtual machines we measured (``benchmarks/run.py``), that made up to a third
of ``convert``'s wall time (system time 0.3-1.2 s of 1.8-2.3 s at 4M samples).

:func:`keep_freed_memory` asks glibc to serve large blocks from its heap and
not to hand freed heap memory back to the operating system, so later columns
reuse pages that are already mapped.  It also keeps every thread on that one
heap (one arena): the block workers and side threads (``convert`` places
samples and counts them beside detection and summaries) would otherwise each
get an arena of their own, whose freed blocks the other threads cannot reuse;
at 4M samples that raised ``convert``'s peak by 20-75 MB (one arena: 525-540
MB, as before the side threads; ``benchmarks/run.py``'s measure), at no cost
in time that we could measure (the arena lock is taken once per block-sized
allocation, not per sample).  The peak memory (the high-water mark)
stays the same or lower; the process keeps that much until it exits, which is
right for a short-lived command.  A library user keeps control of their own
process: :mod:`aoi_fix` does not call this on import; ``aoi-fix`` does at
start-up.  ``AOI_FIX_MALLOC=default`` turns it off.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

# mallopt parameters (glibc <malloc.h>)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
_M_ARENA_MAX = -8

#: Blocks up to this size come from the heap instead of their own mmap.
MMAP_THRESHOLD_BYTES = 1 << 30
#: Freed memory at the top of the heap is kept up to this size.
TRIM_THRESHOLD_BYTES = 1 << 30


def keep_freed_memory() -> bool:
    """Let glibc reuse freed large blocks (one heap for all threads); True if applied.

    Does nothing (False) off Linux/glibc or when ``AOI_FIX_MALLOC=default``.
    Results never depend on it, only the time spent in page faults.
    """
    if os.environ.get("AOI_FIX_MALLOC", "").strip().lower() == "default":
        return False
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # musl or another libc: leave it alone
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
    ok &= mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES) == 1
    ok &= mallopt(_M_ARENA_MAX, 1) == 1
    return bool(ok)
