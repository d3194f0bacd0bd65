"""The model core's threads: how many it may use, and one small pool to run blocks on.

scipy's sparse-times-dense products and numpy's ufuncs release the GIL, so large products,
logarithms and exponentials can be cut into blocks that run on several cores at once.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

T = TypeVar("T")


def _default_threads() -> int:
    try:
        available = len(os.sched_getaffinity(0))  # honours CPU sets in containers
    except AttributeError:  # pragma: no cover - platforms without sched_getaffinity
        available = os.cpu_count() or 1
    return max(1, min(available, 8))


_threads = _default_threads()
_pool: ThreadPoolExecutor | None = None
_pool_pid = 0  # a forked child inherits the executor but not its threads: it needs its own
_lock = threading.Lock()
_inside = threading.local()  # set in the pool's threads: a block must not wait on the pool


def worker_threads() -> int:
    """Threads the model core uses for large arrays (the CPUs this process may run on, <= 8)."""
    return _threads


def set_worker_threads(count: int) -> int:
    """Set how many threads the model core may use; returns the previous setting.

    One thread runs everything inline (useful beside other CPU-bound work, and to measure the
    single-core cost).
    """
    global _threads, _pool
    if count < 1:
        raise ValueError(f"thread count must be >= 1; got {count}")
    with _lock:
        previous = _threads
        if count != _threads and _pool is not None:
            _pool.shutdown(wait=True)
            _pool = None
        _threads = count
    return previous


def _mark_pool_thread() -> None:
    _inside.active = True


def _get_pool() -> ThreadPoolExecutor:
    global _pool, _pool_pid
    with _lock:
        if _pool is None or _pool_pid != os.getpid():
            _pool = ThreadPoolExecutor(
                max_workers=max(1, _threads - 1),
                thread_name_prefix="mixture",
                initializer=_mark_pool_thread,
            )
            _pool_pid = os.getpid()
        return _pool


def run_blocks(task: Callable[[int], T], n_blocks: int) -> list[T]:
    """Run ``task(i)`` for every block, block 0 in the calling thread and the rest on the pool.

    Called from one of the pool's own threads it runs every block inline: a block that waited
    for the pool could wait for itself.
    """
    if n_blocks == 1 or getattr(_inside, "active", False):
        return [task(i) for i in range(n_blocks)]
    futures = [_get_pool().submit(task, i) for i in range(1, n_blocks)]
    first = task(0)
    return [first, *(future.result() for future in futures)]
