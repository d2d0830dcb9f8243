"""Column-by-column work of the parent process spread over threads.

After a run's chunks are written the parent summarizes alone while the workers sit idle.
Most of that work is numpy sorting, partitioning and reductions over whole columns, which
release the GIL, and each column is independent of the others; so with ``jobs`` workers the
parent may use up to ``jobs`` threads (never more than the machine's cores). Every result is
computed exactly as in one thread and collected in the order of its items, so the figures do
not depend on the number of threads (``tests/test_threads.py``).
"""

from __future__ import annotations

import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Iterable, TypeVar

T = TypeVar("T")
R = TypeVar("R")


def parent_threads(jobs: int) -> int:
    """Threads the parent uses for a run with ``jobs`` workers: ``jobs``, at most the number
    of cores, at least one."""
    return max(1, min(int(jobs), os.cpu_count() or 1))


def thread_map(fn: Callable[[T], R], items: Iterable[T], threads: int = 1) -> list[R]:
    """``[fn(item) for item in items]``, with up to ``threads`` calls running at once.

    ``items`` is consumed lazily in the calling thread, one item ahead of the calls at most
    ``threads`` deep: a generator that reads a column from disk per item reads the next one
    while the earlier ones are computed, and no more than ``threads + 1`` items are held at
    once (memory stays flat on long runs). The results keep the order of ``items``; the
    first exception raised by a call is raised here once the calls already started end.
    """
    if threads <= 1:
        return [fn(item) for item in items]
    results: list[R] = []
    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="tolerance-column") as pool:
        pending: deque = deque()
        for item in items:
            pending.append(pool.submit(fn, item))
            del item  # the call holds it; do not keep it alive here as well
            if len(pending) >= threads:
                results.append(pending.popleft().result())
        while pending:
            results.append(pending.popleft().result())
    return results
