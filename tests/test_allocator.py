"""The allocator settings for block-sized arrays (:mod:`twinpass.allocator`).

Each check runs in a fresh interpreter: the settings last for a process's life. Page
faults are counted, not timed (``getrusage(RUSAGE_THREAD).ru_minflt``, Linux).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from twinpass import allocator

pytestmark = pytest.mark.skipif(allocator._glibc() is None, reason="glibc's malloc only")

# A block-sized array, allocated, touched and freed again and again on a thread other than the
# main one (as Dask's worker threads do): 48 MiB is above glibc's largest adaptive mmap
# threshold on 64-bit machines, 32 MiB (DEFAULT_MMAP_THRESHOLD_MAX = 4 * 1024 * 1024 *
# sizeof(long), mallopt(3) man page), and below the 64 MiB heaps of glibc's thread arenas.
_CHURN = """
import json, resource, threading
import numpy as np
from twinpass import allocator

def churn():
    a = np.empty(6 * 2**20)  # 48 MiB of float64
    a[:] = 1.0
    del a

def faults_of(n):
    f0 = resource.getrusage(resource.RUSAGE_THREAD).ru_minflt
    for _ in range(n):
        churn()
    return resource.getrusage(resource.RUSAGE_THREAD).ru_minflt - f0

def on_one_thread(out):
    churn()  # warm: this thread's arena and the pages it keeps
    out["before"] = faults_of(20)
    out["applied"] = allocator.keep_block_memory()
    churn()
    out["after"] = faults_of(20)

out = {}
t = threading.Thread(target=on_one_thread, args=(out,))
t.start(); t.join()
out["released"] = allocator.release_free_memory()
print(json.dumps(out))
"""


def _run(code: str, **env: str) -> dict:
    clean = {k: v for k, v in os.environ.items() if k not in allocator.USER_SETTINGS_ENV}
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                          env={**clean, **env}, timeout=300)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_freed_block_arrays_are_reused_instead_of_faulted_in_again() -> None:
    r = _run(_CHURN)
    assert r["applied"] is True
    # By default every 48 MiB array is mapped afresh and faulted in again: at least one page
    # fault per array (24 with 2 MiB transparent huge pages, 12,288 with 4 KiB pages). Kept
    # in the heap, the arrays after the first reuse pages already in place.
    assert r["before"] >= 20, r
    assert r["after"] * 10 <= r["before"], r
    assert r["released"] is True  # the 48 MiB freed last goes back to the system


@pytest.mark.parametrize("name, value", [("MALLOC_MMAP_THRESHOLD_", "131072"), ("MALLOC_TRIM_THRESHOLD_", "65536"),
                                         ("GLIBC_TUNABLES", "glibc.malloc.trim_threshold=65536")])
def test_the_users_own_allocator_settings_are_left_alone(name: str, value: str) -> None:
    r = _run(_CHURN, **{name: value})
    assert r["applied"] is False and r["released"] is False, r


def test_tunables_of_other_parts_of_glibc_do_not_count_as_allocator_settings() -> None:
    r = _run(_CHURN, GLIBC_TUNABLES="glibc.pthread.rseq=1")
    assert r["applied"] is True, r


_CLIENT = """
import json, sys
from twinpass import allocator
from twinpass.engine import dask_client

scheduler = sys.argv[1]
with dask_client(scheduler, 1) as client:
    during = allocator._applied
    client.submit(sum, [1, 2]).result()
print(json.dumps({"during": during, "after": allocator._applied}))
"""


@pytest.mark.parametrize("scheduler, expected", [("threads", True), ("processes", False)])
def test_the_threads_scheduler_keeps_block_memory_and_worker_processes_do_not(scheduler: str,
                                                                              expected: bool) -> None:
    # With worker processes the command's own process runs no block task; the workers keep
    # glibc's defaults (their peak memory is the one closest to the 1 GiB budget).
    r = _run(_CLIENT.replace("sys.argv[1]", repr(scheduler)))
    assert r == {"during": expected, "after": expected}, r
