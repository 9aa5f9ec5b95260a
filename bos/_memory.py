"""Keep freed memory in the process instead of returning it to the kernel after every array.

An estimate allocates and frees arrays of one to tens of MB many times per
frame (window stacks, spectra, warped blocks).  glibc's ``malloc`` serves
blocks above its mmap threshold with fresh ``mmap`` pages and gives them
back on ``free``, so each new array of that size page-faults its memory in
again.  On the virtual machines this project is measured on a page fault is
expensive: a loop of 1 MP float32 ``rfft2``/``irfft2`` ran 70 -> 123 per
second with the thresholds raised (system time 4.2 -> 0.05 s in 10 s), the
displacement stage of ``benchmarks/bench_batch.py`` frames spent 10-17 % of
its time in the kernel before, 3-4 % after, at the same peak resident memory
(308 vs 310 MB).

The tuning is process-wide; it is applied once when :mod:`bos` is imported
on Linux with glibc and can be switched off with the environment variable
``BOS_RETAIN_FREED_MEMORY=0``.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os

# glibc's mallopt parameter numbers (malloc.h)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3

MMAP_THRESHOLD_BYTES = 1 << 30
"""Blocks below this come from malloc's heap (not fresh mmap pages)."""
TRIM_THRESHOLD_BYTES = 2 * MMAP_THRESHOLD_BYTES
"""Free memory at the top of the heap is given back to the kernel only beyond this."""

_applied: bool | None = None


def retain_freed_memory() -> bool:
    """Raise glibc's mmap and trim thresholds for this process (once).

    Returns
    -------
    bool
        True when the thresholds are in effect (glibc found, not switched off
        by ``BOS_RETAIN_FREED_MEMORY=0``), else False (other C libraries and
        platforms: nothing is changed).
    """
    global _applied
    if _applied is not None:
        return _applied
    _applied = False
    if os.environ.get("BOS_RETAIN_FREED_MEMORY", "1").strip().lower() in {"0", "no", "false", "off"}:
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        libc.gnu_get_libc_version  # glibc only (mallopt's parameter numbers are glibc's)
        ok = libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
        ok = libc.mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES) == 1 and ok
    except (OSError, AttributeError):
        return False
    _applied = bool(ok)
    return _applied
