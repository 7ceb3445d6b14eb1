"""Work of a batch shared among this process's cores by threads.

A batch of queries is decoded, described by ORB keypoints and verified one query at a time, and all of
that (Pillow's decoders, OpenCV, FAISS) runs with the GIL released, so threads put every core to work
without the cost of processes. Measured on the quality benchmark's queries (benchmarks/bench_query.py):
verification 25 -> 17 ms a query on 2 cores.
"""

from __future__ import annotations

import os
import sys
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Sequence, TypeVar

T = TypeVar("T")
R = TypeVar("R")

_POOL: ThreadPoolExecutor | None = None
_LOCK = threading.Lock()
_INSIDE = threading.local()  # set in the pool's threads: work they start runs where they are (no deadlock)


def _forget_pool() -> None:
    # A process forked from one whose pool has started must not inherit it: its threads do not exist
    # in the child, and work handed to them would wait for ever. The child starts its own when it needs one.
    global _POOL, _LOCK
    _POOL = None
    _LOCK = threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system tells it, else all of them)."""
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def _mark_pool_thread() -> None:
    _INSIDE.pool = True


def _one_faiss_thread() -> None:
    # FAISS matches keypoints with an OpenMP team per call; on calls of a fraction of a millisecond the team
    # costs about what it gives (the same ms a query with OMP_NUM_THREADS=1), and two teams on two cores
    # would fight. Each of these threads runs its calls alone; libgomp keeps this setting per thread, so the
    # rest of the process keeps its own (index building and range search use every core). Set once FAISS is
    # loaded, by whoever loads it: work that never uses it (resizing a batch) does not pay its import.
    if not getattr(_INSIDE, "faiss_threads", False) and "faiss" in sys.modules:
        sys.modules["faiss"].omp_set_num_threads(1)
        _INSIDE.faiss_threads = True


def each_on_cores(work: Callable[[T], R], items: Sequence[T]) -> list[R]:
    """`work` of every item, results in the items' order, on `usable_cores()` threads at once. One item, one
    core, or a call from one of the pool's own threads (no deadlock) runs in the caller's thread. An exception
    in `work` is raised here, as a loop would raise it. The threads are shared by every caller in the process (a service's request threads included), so
    concurrent batches queue for them instead of multiplying them."""
    global _POOL
    cores = usable_cores()
    if cores <= 1 or len(items) <= 1 or getattr(_INSIDE, "pool", False):
        return [work(item) for item in items]
    with _LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(cores, thread_name_prefix="nearsight-cores", initializer=_mark_pool_thread)

    def run(item: T) -> R:
        _one_faiss_thread()
        return work(item)

    return list(_POOL.map(run, items))
