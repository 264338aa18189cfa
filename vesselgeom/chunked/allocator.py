"""The C allocator's habits that decide how much memory a chunked run keeps (glibc; no-ops elsewhere).

glibc serves a freed large block's size from its heaps next time (its mmap threshold rises after each
large free, up to 32 MB), and its heaps return memory to the system only from their top. A run that
allocates and frees box after box in worker threads therefore keeps hundreds of MB it no longer uses:
on a 512^3 network with a 32 MB budget, 101 MB of anonymous memory above the budget, 43 MB with the
threshold held at 1 MB (``benchmarks/results_chunked.md``). :func:`prefer_mmap` holds it there, so every
array of 1 MB or more is mapped on its own and returned when freed; :func:`return_freed_memory` trims the
heaps after a stage.
"""

from __future__ import annotations

import ctypes
import functools

__all__ = ["MMAP_THRESHOLD", "prefer_mmap", "return_freed_memory"]

#: Allocations of at least this many bytes get their own mapping (glibc ``M_MMAP_THRESHOLD``).
MMAP_THRESHOLD = 1 << 20
_M_MMAP_THRESHOLD = -3  # mallopt parameter number, glibc <malloc.h>


@functools.cache
def _libc() -> ctypes.CDLL | None:
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt, libc.malloc_trim  # noqa: B018 (both must exist: glibc)
    except (OSError, AttributeError):
        return None
    return libc


def prefer_mmap() -> None:
    """Hold glibc's mmap threshold at :data:`MMAP_THRESHOLD` in this process (idempotent).

    A process-wide setting that stays after the run: large arrays are then mapped and unmapped on their
    own, which costs some speed (not measured on a quiet machine: the recorded 512^3 runs took 138 s
    before and 167 s after, the latter with another job on the cores).
    """
    libc = _libc()
    if libc is not None:
        libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)


def return_freed_memory() -> None:
    """Ask glibc to return freed heap memory to the system (``malloc_trim``)."""
    libc = _libc()
    if libc is not None:
        libc.malloc_trim(0)
