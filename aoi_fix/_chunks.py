"""Running element-wise work over a long recording in blocks, on a few threads.

Why blocks: a chain of numpy operations over a whole 4-million-sample column
makes a fresh 32 MB temporary per step; memory that size comes straight from
the operating system and is given back after each step, so every step pays
for page faults and the data never stays in cache.  Blocks of ~128k samples
keep the temporaries small (reused by the allocator, resident in cache), and
the peak memory of a stage is its outputs plus a few blocks.

Why threads: numpy ufuncs and gathers and shapely's vectorised predicates
release the GIL, so independent blocks run on all cores.  The number of
threads is ``AOI_FIX_THREADS`` when set (``1`` turns threading off, which
``sweep -j`` and ``batch -j`` workers do so that processes do not compete),
else the number of CPUs this process may use, at most 4.

Results never depend on the number of threads: each block writes its own
slice of a preallocated output, and reductions are done by the caller over
the blocks in order.  Counts and labels do not depend on the block size
either; a running mean (``clean.fixation_average``) takes its prefix sums
within a block, so between block sizes it may differ in the last bits (far
below 1e-9 px; prefix sums over a whole 4-million-sample column lose more).
"""

from __future__ import annotations

import os
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Callable, Sequence, TypeVar

import numpy as np

R = TypeVar("R")
T = TypeVar("T")

#: Samples per block (a few MB per float64 temporary).
BLOCK = 1 << 17


def threads() -> int:
    """Worker threads for block work (``AOI_FIX_THREADS`` or the usable CPUs, at most 4)."""
    env = os.environ.get("AOI_FIX_THREADS", "").strip()
    if env:
        try:
            return max(1, int(env))
        except ValueError:
            return 1
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        n = os.cpu_count() or 1
    return max(1, min(n, 4))


def blocks(n: int, size: int = BLOCK) -> list[tuple[int, int]]:
    """Consecutive ``(start, stop)`` ranges covering ``0 .. n``.

    >>> blocks(5, 2)
    [(0, 2), (2, 4), (4, 5)]
    """
    return [(a, min(a + size, n)) for a in range(0, n, size)]


def map_blocks(func: Callable[[int, int], R], n: int, *, size: int | None = None) -> list[R]:
    """``[func(a, b) for (a, b) in blocks(n, size)]``, on :func:`threads` threads.

    ``func`` must only write its own ``[a, b)`` slice of shared outputs.
    Results come back in block order.

    >>> out = np.zeros(10)
    >>> def fill(a, b):
    ...     out[a:b] = np.arange(a, b) * 2.0
    ...     return b - a
    >>> map_blocks(fill, 10, size=3), float(out[-1])
    ([3, 3, 3, 1], 18.0)
    """
    return map_items(lambda ab: func(*ab), blocks(n, BLOCK if size is None else size))


def map_items(func: Callable[[T], R], items: Sequence[T]) -> list[R]:
    """``[func(x) for x in items]`` on :func:`threads` threads, results in order.

    For independent pieces of GIL-free work (numpy, Arrow kernels) that each
    write only their own output.

    >>> map_items(len, ["a", "bb", "ccc"])
    [1, 2, 3]
    """
    k = min(threads(), len(items))
    if k <= 1:
        return [func(x) for x in items]
    with ThreadPoolExecutor(max_workers=k) as ex:
        return list(ex.map(func, items))


class side_thread:
    """A context with one side thread for work that overlaps the caller's.

    ``submit(fn, *args, **kwargs)`` returns a future.  With :func:`threads`
    == 1 (``AOI_FIX_THREADS=1``, the workers of ``sweep -j``/``batch -j``)
    the work runs at once in the caller's thread instead, its result or
    error kept in the future, so the caller sees the same thing in the same
    place either way.  Leaving the context waits for the side work (work not
    yet started is dropped when the context is left by an error).

    >>> with side_thread() as side:
    ...     f = side.submit(sum, [1, 2, 3])
    >>> f.result()
    6
    """

    def __init__(self, name: str = "aoi_fix-side") -> None:
        self._name = name
        self._pool: ThreadPoolExecutor | None = None

    def __enter__(self) -> "side_thread":
        if threads() > 1:
            self._pool = ThreadPoolExecutor(1, thread_name_prefix=self._name)
        return self

    def submit(self, fn: Callable[..., R], *args, **kwargs) -> "Future[R]":
        if self._pool is not None:
            return self._pool.submit(fn, *args, **kwargs)
        done: Future = Future()
        try:
            done.set_result(fn(*args, **kwargs))
        except Exception as e:  # kept for .result(), as a thread would (not Ctrl-C)
            done.set_exception(e)
        return done

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._pool is not None:  # on an error, work not yet started is dropped
            self._pool.shutdown(wait=True, cancel_futures=exc_type is not None)


def split(idx: np.ndarray, size: int = BLOCK) -> list[np.ndarray]:
    """``idx`` cut into consecutive pieces of at most ``size`` (views)."""
    return [idx[a:b] for a, b in blocks(len(idx), size)]


def single_thread_worker() -> None:
    """Process-pool initializer: one thread per worker (the pool gives the parallelism)."""
    os.environ["AOI_FIX_THREADS"] = "1"
