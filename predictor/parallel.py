"""Running independent work items (scans, participants) in worker processes.

Workers are *spawned*, not forked: a process that has already run PyTorch or
ITK holds thread pools whose locks a fork would copy in a locked state, and a
forked worker can then wait forever. The ``jobs`` workers share the cores:
each runs PyTorch (and OpenMP) on its share of them. Two workers of two
threads each on two cores ran held-out forecasts ten times slower (47.7 s
against 4.5 s for ten participants, 2026-12-05).
"""

from __future__ import annotations

import multiprocessing
import os
import sys
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor


def run_all(
    function: Callable,
    arguments: Sequence[tuple],
    jobs: int = 1,
    progress: Callable[[], None] | None = None,
    initializer: Callable[[], None] | None = None,
) -> list:
    """``[function(*a) for a in arguments]``, in ``jobs`` processes when ``jobs > 1``.

    Results keep the order of ``arguments``; ``progress()`` is called after
    each item; ``initializer()`` runs once in each worker, after PyTorch is set to the
    worker's share of the cores (or once here when the items run in this process,
    PyTorch's threads unchanged). ``function`` and ``initializer`` must be importable
    (defined at module level).
    """
    results = []
    if jobs > 1 and len(arguments) > 1:
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(
            max_workers=jobs, mp_context=context, initializer=_start_worker,
            initargs=(max(1, cores() // jobs), initializer),
        ) as pool:  # fmt: skip
            for future in [pool.submit(function, *argument) for argument in arguments]:
                results.append(future.result())
                if progress:
                    progress()
        return results
    if initializer:
        initializer()
    for argument in arguments:
        results.append(function(*argument))
        if progress:
            progress()
    return results


def cores() -> int:
    """CPU cores this process may run on (its affinity where the system reports one)."""
    if hasattr(os, "sched_getaffinity"):  # Linux; not macOS or Windows
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1


def _start_worker(threads: int, initializer: Callable[[], None] | None) -> None:
    """A worker's start: ``threads`` threads for OpenMP and PyTorch (read when PyTorch is
    imported, or set where it already is), then ``initializer()``."""
    os.environ["OMP_NUM_THREADS"] = str(threads)
    if "torch" in sys.modules:
        sys.modules["torch"].set_num_threads(threads)
    if initializer:
        initializer()
