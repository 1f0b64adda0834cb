"""Keep freed memory in the process for reuse, so the per-block work never waits for the kernel.

The engine allocates and frees arrays of a few megabytes on every update
(the MVDR repacking, the steered sums of a large fan). glibc hands blocks
that large back to the system as soon as they are freed (its mmap and trim
thresholds), and the next allocation faults every page in again: on the
machines measured here that turned a 64-sensor MVDR update's repacking into
blocks of 40–120 ms instead of 11 ms (2026-12-05, ``bench/mvdr_bench.py``),
and a Dask worker (started with ``MALLOC_TRIM_THRESHOLD_=65536``) 40 % slower.
Raising both thresholds keeps such blocks in the heap. Other C libraries:
nothing is changed.
"""

from __future__ import annotations

#: glibc's mallopt parameters (malloc.h).
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3


def keep_freed_memory(mmap_threshold_bytes: int = 32 << 20, trim_threshold_bytes: int = 256 << 20) -> bool:
    """Blocks below ``mmap_threshold_bytes`` come from the heap, and up to ``trim_threshold_bytes``
    of free heap is kept; returns True where the C library took the settings (glibc)."""
    try:
        import ctypes  # noqa: PLC0415

        libc = ctypes.CDLL(None)
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (macOS, musl without mallopt): nothing to do
        return False
    return bool(mallopt(_M_MMAP_THRESHOLD, int(mmap_threshold_bytes))) and \
        bool(mallopt(_M_TRIM_THRESHOLD, int(trim_threshold_bytes)))
