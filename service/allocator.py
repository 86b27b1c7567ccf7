"""Process-wide settings of the C allocator, applied once when a command starts.

numpy takes every array's buffer from the C library's ``malloc``. glibc serves
a request above its mmap threshold with fresh pages from the kernel and hands
the top of its heap back once more than its trim threshold lies free there. Its
defaults adapt the first threshold but keep the second low, so a step that
allocates and frees tens of megabytes of temporaries every day gets its pages
back zeroed and faults them in again on every step. Measured on a daily step of
1,000 towns x 20,000 people (``casecloud bench --sections individual``): 8,000
page faults and 15-20 ms of a 75-80 ms step; with the thresholds below, none.

The thresholds (glibc ``mallopt(3)``): requests up to 32 MiB come from the heap
(above every temporary of a step of 1,000 x 20,000) and up to 256 MiB may stay free at its top.
The process keeps pages it has used once instead of returning them, so its
resident size stays near its peak between steps; the peak itself does not grow.

Settings an operator gives in the environment (``MALLOC_MMAP_THRESHOLD_``,
``MALLOC_TRIM_THRESHOLD_``, ``GLIBC_TUNABLES``) win: nothing is changed then.
Elsewhere than glibc nothing is changed either.
"""

from __future__ import annotations

import ctypes
import os
import platform

__all__ = ["MMAP_THRESHOLD", "TRIM_THRESHOLD", "tune_allocator", "allocator_setting"]

MMAP_THRESHOLD = 32 << 20
TRIM_THRESHOLD = 256 << 20
_M_TRIM_THRESHOLD = -1  # glibc <malloc.h>
_M_MMAP_THRESHOLD = -3
_OPERATOR_SETTINGS = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_", "GLIBC_TUNABLES")
_applied: str | None = None


def tune_allocator() -> str:
    """Apply the thresholds above if this is glibc and the environment sets none.

    Returns what happened: ``"tuned"``, ``"environment"`` (the operator's
    settings kept) or ``"not glibc"``."""
    global _applied
    if any(name in os.environ for name in _OPERATOR_SETTINGS):
        _applied = "environment"
    elif platform.libc_ver()[0] != "glibc":
        _applied = "not glibc"
    else:
        libc = ctypes.CDLL(None)
        ok = libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1 and libc.mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD) == 1
        _applied = "tuned" if ok else "not glibc"
    return _applied


def allocator_setting() -> str:
    """What :func:`tune_allocator` did in this process (``"default"`` if it never ran)."""
    return _applied or "default"
