"""Deterministic chunked execution of independent groups, optionally on threads.

The core splits the groups of a normalization (channels, rows, samples) into
chunks along one axis. Chunk bounds depend only on the array's shape, never on
the number of threads, and every group lies in exactly one chunk, so each
group's reductions run on one thread in one fixed order and the results carry
the same bits for any thread count. Partial sums that cross chunks are
combined by the caller in chunk order.

NumPy releases the GIL inside its loops, so a few threads over chunks give
real parallelism. The thread count is ``os.sched_getaffinity`` (or
``os.cpu_count()``), capped at 8, and can be set with the environment variable
``REFNORM_NUM_THREADS`` (1 disables threading). Inputs below
``PARALLEL_MIN_ELEMS`` elements stay on the calling thread.
"""

from __future__ import annotations

import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, TypeVar

import numpy as np

T = TypeVar("T")

#: Target elements per chunk: 2^18 float64 = 2 MiB, so that a chunk and its
#: few scratch buffers stay in a thread's share of the last-level cache while
#: every pass of the fused core runs over it.
CHUNK_ELEMS = 1 << 18
#: Below this many elements one thread is faster than handing work out.
PARALLEL_MIN_ELEMS = 1 << 16
_MAX_THREADS = 8

# NumPy 2 buffers a broadcast operand in blocks of bufsize elements when the
# inner loop is shorter than that (8192 by default), which makes per-group
# broadcasts over rows of ~1000 elements 2x slower. A smaller buffer, scoped to
# the chunk by np.errstate (NumPy >= 2.0), avoids it; it changes no result bits
# (checked for the reductions the core uses).
_BUFSIZE = 1024
_SCOPED_BUFSIZE = int(np.__version__.split(".")[0]) >= 2

_lock = threading.Lock()
_pool: ThreadPoolExecutor | None = None
_pool_size = 0


def max_threads() -> int:
    """Threads the core may use: REFNORM_NUM_THREADS, else the usable CPUs (at most 8)."""
    env = os.environ.get("REFNORM_NUM_THREADS", "").strip()
    if env:
        try:
            n = int(env)
        except ValueError:
            n = 1
        return max(1, min(n, 64))
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return max(1, min(n, _MAX_THREADS))


def chunk_bounds(extent: int, item_elems: int, target: int = CHUNK_ELEMS) -> list[tuple[int, int]]:
    """[lo, hi) bounds splitting ``extent`` items of ``item_elems`` elements into chunks of about ``target``.

    A function of the shape only (never of the thread count); chunks are as
    even as the item granularity allows.
    """
    per = max(1, target // max(1, item_elems))
    count = math.ceil(extent / per)
    per = math.ceil(extent / count)
    return [(lo, min(lo + per, extent)) for lo in range(0, extent, per)]


def _executor(n: int) -> ThreadPoolExecutor:
    global _pool, _pool_size
    with _lock:
        if _pool is None or _pool_size != n:
            if _pool is not None:
                _pool.shutdown(wait=False)
            _pool = ThreadPoolExecutor(max_workers=n, thread_name_prefix="refnorm")
            _pool_size = n
        return _pool


def _reset_after_fork() -> None:
    # Worker threads do not survive fork(); start a fresh pool in the child.
    global _pool, _pool_size
    _pool, _pool_size = None, 0


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_reset_after_fork)


def _scoped(fn: Callable[[int, int], T], lo: int, hi: int, err: dict) -> T:
    # Worker threads start from NumPy's default error state: run each chunk
    # under the caller's, so np.errstate(...) around a call still applies.
    with np.errstate(**err):
        if _SCOPED_BUFSIZE:
            np.setbufsize(_BUFSIZE)
        return fn(lo, hi)


def run_chunks(fn: Callable[[int, int], T], bounds: list[tuple[int, int]], total_elems: int) -> list[T]:
    """[fn(lo, hi) for each chunk], in chunk order; on threads when worthwhile.

    ``fn`` must write only to its own chunk's slices; its return values are
    combined by the caller in the order of ``bounds``. The calling thread
    works through the chunks together with up to max_threads() - 1 pool
    threads, each taking the next chunk not yet started, so no thread waits
    for work it could do itself (waking a sleeping thread costs tens of
    microseconds or more on a virtual machine).
    """
    err = np.geterr()
    n = min(max_threads(), len(bounds))
    if (n <= 1 or total_elems < PARALLEL_MIN_ELEMS
            or threading.current_thread().name.startswith("refnorm")):
        return [_scoped(fn, lo, hi, err) for lo, hi in bounds]
    results: list = [None] * len(bounds)
    pending = iter(range(len(bounds)))
    take = threading.Lock()
    failed = threading.Event()

    def loop() -> None:
        while not failed.is_set():
            with take:
                i = next(pending, None)
            if i is None:
                return
            try:
                results[i] = _scoped(fn, bounds[i][0], bounds[i][1], err)
            except BaseException:
                failed.set()
                raise

    pool = _executor(max(1, max_threads() - 1))
    helpers = [pool.submit(loop) for _ in range(n - 1)]
    first_error = None
    try:
        loop()
    except BaseException as e:  # noqa: BLE001 - re-raised below, after the helpers stop
        first_error = e
    for h in helpers:
        try:
            h.result()
        except BaseException as e:  # noqa: BLE001
            first_error = first_error or e
    if first_error is not None:
        raise first_error
    return results
