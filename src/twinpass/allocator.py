"""How this process's C allocator treats block-sized arrays (glibc on Linux only).

Every block allocates a few arrays of tens of MiB (its window in float64, the filtered
window, the output in its stored dtype). glibc serves allocations above its mmap threshold
with a fresh ``mmap`` and unmaps them again on ``free``; the threshold adapts upwards with
freed chunks, but only to 32 MiB on 64-bit machines (``DEFAULT_MMAP_THRESHOLD_MAX``,
mallopt(3)). A block window of 600,000 frames x 8 channels in float64 is 37 MiB, so every
such array is mapped afresh and the kernel zeroes it as it is first touched: on the 2 GiB
bench archive with two threads, 10 % of all CPU time was the kernel clearing pages, and
system time 6-7 s of 26-29 s of CPU.

:func:`keep_block_memory` raises the mmap threshold and the trim threshold, so that freed
block arrays stay in the allocator's heap and the next block reuses them already mapped
(on the same run: pages cleared 3 % of CPU time, system time 3.5-5 s; peak RSS 40-80 MiB
higher, the more the larger the blocks).
:func:`release_free_memory` hands free heap memory back to the system when a run ends, so
a long-lived process (a Prefect worker, a notebook) does not keep it.

Only the process that runs block tasks on its own threads applies this (the ``threads``
scheduler); Dask worker processes keep glibc's defaults (their peak memory with two of them
is the closest of twinpass's figures to the 1 GiB budget). Settings the user made through
the environment (``MALLOC_MMAP_THRESHOLD_``, ``MALLOC_TRIM_THRESHOLD_``, a ``glibc.malloc.``
tunable in ``GLIBC_TUNABLES``) are left alone. Elsewhere (macOS, Windows, musl) both
functions do nothing.
"""

from __future__ import annotations

import ctypes
import functools
import os
import sys
import threading

M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
"""mallopt(3) parameter numbers (glibc's malloc.h)."""

MMAP_THRESHOLD_BYTES = 256 * 2**20
"""Allocations up to this size come from the heap (bytes); larger ones are still mapped apart."""
TRIM_THRESHOLD_BYTES = 128 * 2**20
"""Free memory at the top of a heap kept for reuse instead of returned at once (bytes): a
few block arrays. 512 MiB saved a little more system time (elliptic bench design, two
threads: 2.8-3.0 s against 2.9-3.9 s) but raised peak RSS by 130 MiB instead of 80 MiB."""

USER_SETTINGS_ENV = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_", "GLIBC_TUNABLES")
"""Environment variables through which a user sets glibc's malloc (``GLIBC_TUNABLES`` counts
only when it names a ``glibc.malloc.`` tunable)."""


def _user_settings() -> bool:
    env = os.environ
    return bool(env.get("MALLOC_MMAP_THRESHOLD_") or env.get("MALLOC_TRIM_THRESHOLD_")
                or "glibc.malloc." in env.get("GLIBC_TUNABLES", ""))


_lock = threading.Lock()
_applied = False


@functools.lru_cache(maxsize=1)
def _glibc() -> ctypes.CDLL | None:
    """This process's C library if it is glibc (on Linux), else None."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        # glibc's soname on x86-64, arm64 and the other common Linux machines (elsewhere this
        # does nothing); ctypes.util.find_library would run ldconfig first (60 ms).
        libc = ctypes.CDLL("libc.so.6")
        libc.gnu_get_libc_version  # glibc only; musl has no such symbol  # noqa: B018
        libc.mallopt  # noqa: B018
        libc.malloc_trim  # noqa: B018
    except (OSError, AttributeError):
        return None
    return libc


def keep_block_memory() -> bool:
    """Keep freed block-sized arrays in this process's heap for reuse.

    Sets glibc's mmap threshold to :data:`MMAP_THRESHOLD_BYTES` and its trim threshold to
    :data:`TRIM_THRESHOLD_BYTES` (both fixed from then on, for the process's life). Does
    nothing if a previous call applied them, if the environment holds the user's own
    allocator settings, or off glibc.

    Returns
    -------
    bool
        Whether the settings are in force (applied now or before).
    """
    global _applied
    with _lock:
        if _applied:
            return True
        if _user_settings():
            return False
        libc = _glibc()
        if libc is None:
            return False
        ok = bool(libc.mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))
        ok = bool(libc.mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES)) and ok
        _applied = ok
        return ok


def release_free_memory() -> bool:
    """Return the heap's free memory to the system (glibc ``malloc_trim(0)``), if :func:`keep_block_memory` applied.

    Returns
    -------
    bool
        Whether any memory was released.
    """
    with _lock:
        if not _applied:
            return False
        libc = _glibc()
        return bool(libc.malloc_trim(0)) if libc is not None else False
