"""The process's compute-thread budget: all cores, unless ``bos batch`` gave this worker a share.

Every threaded stage (the displacement estimators, the direct Poisson solver and its Monte Carlo
pipeline) asks :func:`resolve_workers` how many threads to use, so a batch worker that shares the
machine with others does not oversubscribe it.
"""

from __future__ import annotations

import os

_BUDGET: dict[str, int | None] = {"n": None}


def set_budget(threads: int | None) -> None:
    """Threads this process may use for computing (None: all cores)."""
    _BUDGET["n"] = None if threads is None else max(1, int(threads))


def resolve_workers(workers: int | None = None) -> int:
    """Number of threads to use: ``workers``, or the budget / all cores when None or <= 0."""
    if workers is None or workers <= 0:
        return _BUDGET["n"] or max(1, os.cpu_count() or 1)
    return int(workers)
