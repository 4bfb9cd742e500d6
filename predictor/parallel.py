"""Running independent work items (scans, participants) in worker processes.

Workers are *spawned*, not forked: a process that has already run PyTorch or
ITK holds thread pools whose locks a fork would copy in a locked state, and a
forked worker can then wait forever.
"""

from __future__ import annotations

import multiprocessing
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
    each item; ``initializer()`` runs once in each worker (or once here when
    the items run in this process). ``function`` and ``initializer`` must be
    importable (defined at module level).
    """
    results = []
    if jobs > 1 and len(arguments) > 1:
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(
            max_workers=jobs, mp_context=context, initializer=initializer
        ) as pool:
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


def single_threaded_torch() -> None:
    """One PyTorch thread in this process (for workers that share the cores)."""
    import torch

    torch.set_num_threads(1)
