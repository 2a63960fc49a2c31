"""Dask execution of block work and the per-segment driver.

Block tasks are hand written: each receives a small, picklable :class:`BlockJob`
(reader descriptions, the window to read, the coefficients) and reads its own window,
so no whole-file array ever enters the task graph. The same code path serves local
threads, local processes and an existing distributed scheduler: all three go through a
:class:`distributed.Client`.

The driver (the thread that calls :func:`run_segment`) is the only writer of attributes
and block tables; block tasks write only their own whole chunks of one output array.

Crash safety. A run may be killed at any instant; the next run must resume to the output
an uninterrupted run writes, and no file may ever be marked complete with a block missing.
The driver therefore orders its writes so that every prefix of them is safe:

1. blocks a neighbour's change reaches are set pending *before* any file of the segment
   records its new input fingerprint (else a kill in between would leave them done with
   stale data while the plan no longer sees the change);
2. a file recomputed from scratch records its design digest only after its block table
   is reset (until then it carries :data:`RESETTING_DIGEST`, which the plan never matches);
3. a block's status is recorded after its data are written, and with ``[output] sync``
   on the disk (the store refuses "done" for a block whose chunks are missing);
4. a file is marked complete only when every block is done (the store checks it) and,
   with ``[output] sync``, only after the block records are synced to disk.

Block tasks are idempotent (same input, same bytes), so a block written but not recorded
before a kill is simply computed again.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import dataclasses
import datetime as _dt
import functools
import logging
import threading
import time
import uuid
import traceback
import weakref
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator, TypeVar

import numpy as np

from . import allocator, faults
from .config import ChecksConfig, JobConfig
from .core import checks as _checks
from .core.checks import CANCELLED, was_cancelled
from .core.failures import CheckFailures, FileBlocks, explain
from .core.blocks import BYTES_PER_WINDOW_SAMPLE, Layout, block_list, blocks_touching, choose_layout
from .core.kernel import block_reach, filtfilt_window, resolve_edge_samples
from .core.nonfinite import FillSpan, apply_fill, filter_with_holes, hole_mask
from .core.plan import SegmentReads
from .core.types import RESETTING_DIGEST, Design
from .errors import (ConfigError, CorruptInputError, DamagedInputError, InputError, RunStoppedError, StoreError,
                     TwinpassError)
from .io.channels import ChannelLabels
from .io.fingerprint import BYTE_FIELDS, changed_since
from .io.readers._common import SHORT_READ_HINT, with_config_keys
from .io.readers.base import ReaderSpec

log = logging.getLogger("twinpass.engine")

PENDING, PASS, WARN, FAIL, ERROR = 0, 1, 2, 3, 4
STATUS_NAMES = {PENDING: "pending", PASS: "pass", WARN: "warn", FAIL: "fail", ERROR: "error"}
DONE = (PASS, WARN)



# --------------------------------------------------------------------------- jobs
@dataclass(frozen=True)
class SourceSlice:
    """One input file of a segment: where it sits in segment coordinates (samples)."""

    spec: ReaderSpec
    seg_offset: int
    frames: int
    fill: tuple[FillSpan, ...] = ()
    """Linear fills of the file's NaN/Inf runs (file samples), applied to every read."""
    planned: tuple[tuple[str, Any], ...] = ()
    """The byte fields of the file's fingerprint when the run planned it (size, modification
    time, digest: :func:`twinpass.io.fingerprint.changed_since`), to tell a file that changed
    since from one damaged as it was; empty: not known."""


def segment_sources(seg: SegmentWork) -> tuple[SourceSlice, ...]:
    """The files of ``seg`` as its block tasks read them."""
    return tuple(SourceSlice(f.spec, f.seg_offset, f.frames, f.fill, _byte_fields(f.fingerprint)) for f in seg.files)


def _byte_fields(fingerprint: dict[str, Any] | None) -> tuple[tuple[str, Any], ...]:
    return tuple((k, fingerprint[k]) for k in BYTE_FIELDS if k in fingerprint) if fingerprint else ()


def _changed_during_run(path: str, exc: InputError) -> InputError:
    """The error for an input that opened or read as planned no longer: what its reader found,
    with its options named as the configuration keys, and what follows for its blocks."""
    found = with_config_keys(str(exc)).removeprefix(f"{path}: ").removesuffix(
        f"; {SHORT_READ_HINT}")
    kind = CorruptInputError if isinstance(exc, DamagedInputError) else type(exc)  # changed: retried
    return kind(f"{path}: the file changed while this run used it: {found}; its blocks are recorded as "
                "not done: rerun to filter it afresh", path=path)


def _read_failed(src: SourceSlice, exc: CorruptInputError) -> InputError:
    """The error for a window of ``src`` that its reader could not read although it opened as
    planned: damage in the file as the run planned it (the reader's error, with the remedy; not
    retried), the reader's own error for a file that did not change, or the file's change."""
    if not src.planned or changed_since(src.spec.path, dict(src.planned)) is not None:
        return _changed_during_run(src.spec.path, exc)
    if isinstance(exc, DamagedInputError):
        return DamagedInputError(
            f"{exc}; the input has not changed since the run planned it, so a rerun meets the same damage: restore "
            "the damaged part from a copy (or repair it), or leave the input out with [archive] exclude",
            path=src.spec.path)
    return exc


def read_segment_window(sources: tuple[SourceSlice, ...], a: int, b: int, channels: int) -> np.ndarray:
    """Read segment samples [a, b) across file joins.

    Returns
    -------
    ndarray, float64, shape (b - a, channels)
        Time-major, in the readers' full-scale units.

    Raises
    ------
    InputError
        ``sources`` do not cover [a, b), or a file no longer has the frames and channels
        the run planned with (it changed while the run used it).
    """
    out: np.ndarray | None = None
    filled = 0
    for src in sources:
        lo = max(a, src.seg_offset)
        hi = min(b, src.seg_offset + src.frames)
        if lo >= hi:
            continue
        try:
            opened = src.spec.open()
        except InputError as exc:  # it opened when the run planned it
            raise _changed_during_run(src.spec.path, exc) from None
        with opened as rec:
            if (rec.info.frames, rec.info.channels) != (src.frames, channels):
                raise InputError(
                    f"{src.spec.path}: the file changed while this run used it: it now holds {rec.info.frames} "
                    f"frames x {rec.info.channels} channel(s), against {src.frames} x {channels} when the run "
                    "planned it; its blocks are recorded as not done: rerun to filter it afresh"
                )
            try:
                part = rec.read(lo - src.seg_offset, hi - src.seg_offset)
            except CorruptInputError as exc:  # cut short while this block read it, or damaged
                raise _read_failed(src, exc) from None
        if src.fill:
            apply_fill(part, lo - src.seg_offset, src.fill)
        if (lo, hi) == (a, b) and part.dtype == np.float64 and part.flags.c_contiguous and part.flags.writeable:
            out = part  # one file holds the whole window: the reader's own new array, no copy
        else:
            if out is None:
                out = np.empty((b - a, channels), dtype=np.float64)
            out[lo - a : hi - a] = part
        filled += hi - lo
    if filled != b - a or out is None:
        files = ", ".join(src.spec.path for src in sources[:3]) + (" ..." if len(sources) > 3 else "")
        raise InputError(f"segment window [{a}, {b}) is not covered by its files ({files}: read {filled} "
                         "samples); rerun so that the plan is made afresh")
    return out


@dataclass(frozen=True)
class BlockJob:
    """Everything one block task needs; small and picklable (no sample data)."""

    store_location: str
    array_name: str
    block_index: int
    core: tuple[int, int]
    """Block core [start, stop) in segment samples."""
    file_offset: int
    """Segment sample of the output file's first frame."""
    segment_frames: int
    channels: int
    sources: tuple[SourceSlice, ...]
    """The files the block's window reaches."""
    design: Design
    halo: int
    edge: str
    edge_samples: int
    out_dtype: str
    seam_samples: int
    check_response: bool
    checks_cfg: ChecksConfig
    retries: int = 0
    retry_backoff_seconds: float = 0.5
    write: bool = True
    holes: tuple[tuple[int, int], ...] = ()
    """Segment spans left out of filtering (NaN/Inf runs under nonfinite = "split")."""
    sync: bool = True
    """Sync the output to disk in the task (``[output] sync``), before it returns. False also
    when the driver syncs it instead, before recording the block (see :func:`run_jobs`)."""
    fence: str = ""
    """The run lock's token; the output is written only while the store's lock holds it
    (see :func:`~twinpass.io.store.write_block_data`). Empty: written unchecked."""


@dataclass
class BlockResult:
    """What a block task returns to the driver."""

    array_name: str
    block_index: int
    status: int
    figures: np.ndarray | None = None
    """(channels, len(FIGURES)) float64."""
    seams: np.ndarray | None = None
    """(4, seam_samples, channels): own first, own last, beyond left, beyond right (NaN where none)."""
    error: str | None = None
    attempts: int = 0
    """Attempts the block's task made (0: not counted: the task was lost, or the block never
    ran because an earlier step failed)."""
    seconds: float = 0.0
    window_samples: int = 0


def retry_delays(retries: int, first_seconds: float) -> list[float]:
    """Waits before each retry of a failing block, seconds: ``first * 2**i`` (exponential backoff)."""
    return [float(first_seconds) * 2.0**i for i in range(max(0, int(retries)))]


def _filter_block(job: BlockJob, tamper: set[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Return (x_core, y_core, seams, window_samples) for a job."""
    s, e = job.core
    k = job.seam_samples
    halo = 0 if "halo0" in tamper else job.halo
    sos, taps = job.design.sos, job.design.taps
    gain = faults.perturb_factor(tamper)  # per pass: sqrt(2) (+6 dB overall) or the rule's db
    if gain is not None:
        if sos is not None:
            sos = np.array(sos, dtype=np.float64)
            sos[0, :3] *= gain
        elif taps is not None:
            taps = np.asarray(taps, dtype=np.float64) * gain
    if job.holes:  # nonfinite = "split": each piece between holes is filtered as its own signal
        xs, xe = max(0, s - k), min(job.segment_frames, e + k)
        window, y_ext, wlen = filter_with_holes(
            lambda a, b: read_segment_window(job.sources, a, b, job.channels), xs, xe, job.segment_frames,
            job.holes, halo=halo, edge=job.edge, edge_samples=job.edge_samples, channels=job.channels,
            sos=sos, taps=taps,
        )
        ws, we = xs, xs + wlen
    else:
        xs, xe, ws, we, at_start, at_end = block_reach(s, e, job.segment_frames, halo, k, job.edge_samples)
        window = read_segment_window(job.sources, ws, we, job.channels)
        y_ext = filtfilt_window(
            window, sos=sos, taps=taps, core_start=xs - ws, core_stop=xe - ws,
            at_start=at_start, at_end=at_end, edge=job.edge, edge_samples=job.edge_samples,
        )
    y = y_ext[s - xs : s - xs + (e - s)]
    x = window[s - ws : e - ws]
    seams = np.full((4, k, job.channels), np.nan)
    if k:
        m = min(k, e - s)
        seams[0, :m] = y[:m]
        seams[1, k - m :] = y[e - s - m :]
        left = y_ext[: s - xs]
        right = y_ext[s - xs + (e - s) :]
        seams[2, k - len(left) :] = left
        seams[3, : len(right)] = right
    return x, y, seams, we - ws


T = TypeVar("T")


def was_damaged(error: str | None) -> bool:
    """Whether a block's recorded error text (as :func:`with_retries` gives it) is damage of its
    input that reading again cannot clear (:class:`DamagedInputError`)."""
    return bool(error) and str(error).startswith(f"{DamagedInputError.__name__}: ")


def with_retries(work: Callable[[], T], retries: int, first_delay_s: float) -> tuple[T | None, str | None, int]:
    """Run ``work``, retrying it ``retries`` times after the waits of :func:`retry_delays`.

    Returns ``(result, None, attempts)``, or ``(None, error, attempts)`` when every attempt
    raised: the last error's type and message and, for errors that are not twinpass's own,
    a short traceback. A :class:`RunStoppedError` (another run holds the store) is not
    retried: no retry could write; nor a :class:`DamagedInputError` (input that decodes no
    better when read again). Never raises for an ``Exception``.
    """
    delays = retry_delays(retries, first_delay_s)
    last = ""
    for attempt in range(retries + 1):
        try:
            return work(), None, attempt + 1
        except Exception as exc:  # a block failure must never stop the others
            last = f"{type(exc).__name__}: {exc}"
            if not isinstance(exc, TwinpassError):
                last += "\n" + traceback.format_exc(limit=4)
            if isinstance(exc, (RunStoppedError, DamagedInputError)):
                return None, last, attempt + 1
            if attempt < retries:
                time.sleep(delays[attempt])
    return None, last, retries + 1


_RUNNING_LOCK = threading.Lock()
_blocks_running = 0


def blocks_running() -> int:
    """Blocks this process is running now (:func:`run_block` calls in its own threads; blocks
    of worker processes are not counted)."""
    return _blocks_running


def run_block(job: BlockJob) -> BlockResult:
    """Filter, check and write one block, retrying with backoff (:func:`with_retries`).
    Never raises for block errors: the last error is returned with status ``ERROR``."""
    t0 = time.perf_counter()

    def attempt() -> tuple[int, np.ndarray, np.ndarray, int]:
        tamper = faults.apply(job.array_name, job.block_index)
        x, y, seams, wlen = _filter_block(job, tamper)
        hole = hole_mask(job.core[0], job.core[1], job.holes) if job.holes else None
        examined = True
        if hole is None or not hole.any():
            figs = _checks.block_figures(
                x, y, job.design, job.checks_cfg, out_dtype=job.out_dtype, response=job.check_response
            )
        else:  # the response of each finite piece long enough; integrity and levels outside the holes
            figs, examined = _checks.split_block_figures(x, y, hole, job.design, job.checks_cfg,
                                                         out_dtype=job.out_dtype, response=job.check_response)
        status = _checks.grade(figs, job.design, job.checks_cfg, job.design.tolerance)
        if not examined:  # no piece long enough to measure: not a pass on no evidence (see split_unchecked)
            status = max(status, WARN)
        if job.write:
            from .io.store import write_block_data

            with np.errstate(over="ignore"):  # beyond the output type: stored as inf, counted as clipped (fails)
                stored = y.astype(job.out_dtype)
            write_block_data(job.store_location, job.array_name, job.core[0] - job.file_offset,
                             stored, sync=job.sync, fence=job.fence)
        return status, figs, seams, wlen

    global _blocks_running
    with _RUNNING_LOCK:
        _blocks_running += 1
    try:
        out, err, attempts = with_retries(attempt, job.retries, job.retry_backoff_seconds)
    finally:
        with _RUNNING_LOCK:
            _blocks_running -= 1
    if out is None:
        return BlockResult(job.array_name, job.block_index, ERROR, None, None, err, attempts,
                           time.perf_counter() - t0, 0)
    status, figs, seams, wlen = out
    return BlockResult(job.array_name, job.block_index, status, figs, seams, None, attempts,
                       time.perf_counter() - t0, wlen)


# ----------------------------------------------------------------------- clients
@contextlib.contextmanager
def dask_client(scheduler: str = "threads", workers: int = 2) -> Iterator[Any]:
    """A :class:`distributed.Client` for ``threads``, ``processes`` or an address.

    Parameters
    ----------
    scheduler : str
        ``threads`` (one local worker with ``workers`` threads), ``processes`` (``workers``
        local worker processes of one thread) or the address of a running scheduler,
        e.g. ``tcp://127.0.0.1:8786`` (its own workers are used; ``workers`` is ignored).
    workers : int
        Local threads or processes (>= 1).

    Raises
    ------
    ConfigError
        An unknown scheduler name, ``workers < 1``, or an address nobody answers at.

    Notes
    -----
    With ``threads`` the block tasks run in this process, which from then on keeps freed
    block-sized arrays in its heap for reuse; when the client closes, the heap's free
    memory is returned to the system (:mod:`twinpass.allocator`).
    """
    import dask

    from .startup import start_up_imports

    with start_up_imports():  # imported here, when blocks are to run: an unchanged rerun never needs it
        from distributed import Client

    if "://" in scheduler:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, asyncio.TimeoutError) as e:
            raise ConfigError(f"cannot reach the Dask scheduler at {scheduler} ({e}); start it, or set "
                              "[engine] scheduler (or --scheduler) to threads or processes") from None
        except (TypeError, ValueError) as e:  # distributed's answer to an address it cannot use as given
            tls = ("; a tls:// address needs Dask's TLS settings (distributed.comm.tls: ca-file, and the "
                   "client's cert and key) in its configuration or environment") if scheduler.startswith("tls://") else ""
            raise ConfigError(f"cannot connect to the Dask scheduler at {scheduler} ({e}){tls}; or set [engine] "
                              "scheduler (or --scheduler) to threads or processes") from None
        try:
            yield client
        finally:
            client.close()
        return
    if scheduler not in ("threads", "processes"):
        raise ConfigError(f"scheduler {scheduler!r} is not threads, processes or an address like "
                          "tcp://127.0.0.1:8786; fix [engine] scheduler or --scheduler")
    if int(workers) < 1:
        raise ConfigError(f"workers = {workers}: at least one worker is needed ([engine] workers or --workers)")
    processes = scheduler == "processes"
    if not processes:
        # Loaded beside the cluster's start and the first files' preparation; the block tasks
        # (threads of this process) wait for it on first use. Not for worker processes: they
        # load their own, and numba and LLVM would add about 100 MiB to this process's peak.
        threading.Thread(target=warm_compiled_loops, name="twinpass-loops", daemon=True).start()
        # Block arrays reused from the heap instead of mapped and zeroed afresh for every block.
        allocator.keep_block_memory()
    with dask.config.set(_LOCAL_CLUSTER_CONFIG):
        cluster = _local_cluster(workers, processes)
    try:
        client = Client(cluster)
    except BaseException:
        cluster.close()
        raise
    try:
        yield client
    finally:
        # Blocks still running when the run is over were cancelled (a stopped run) and are
        # stuck: not worth waiting long for.
        wait_s = CLUSTER_CLOSE_STOPPED_S if blocks_running() else CLUSTER_CLOSE_S
        with _quiet_worker_heartbeats():
            client.close()
            try:
                cluster.close(timeout=wait_s)
            except (TimeoutError, asyncio.TimeoutError):  # a block that never returns (a stalled read)
                log.warning("the local Dask cluster did not close within %.0f s: a block is still running (a read "
                            "or write that does not return?); going on without it", wait_s)
        if not processes:
            allocator.release_free_memory()


CLUSTER_CLOSE_S = 20.0
"""Seconds a local Dask cluster is given to close after a run. Closing waits for the blocks
its workers run; a block stuck in a read or write that never returns (a stalled network
mount) would otherwise hold the command forever."""
CLUSTER_CLOSE_STOPPED_S = 5.0
"""The same when blocks of this process are still running then (a stopped run: they were
cancelled, and what still runs is stuck)."""


class _ClosingHeartbeat(logging.Filter):
    """Drops the error a local worker logs, with its traceback, when its heartbeat meets a
    scheduler that is closing (a known race of closing a local cluster in distributed; the
    run's work is over by then, so it says nothing about the run)."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not str(record.msg).startswith("Failed to communicate with scheduler during heartbeat")


@contextlib.contextmanager
def _quiet_worker_heartbeats() -> Iterator[None]:
    """While a local cluster closes, its in-process workers' heartbeat errors are not logged."""
    worker_log, quiet = logging.getLogger("distributed.worker"), _ClosingHeartbeat()
    worker_log.addFilter(quiet)
    try:
        yield
    finally:
        worker_log.removeFilter(quiet)


class ClientStart:
    """:func:`dask_client` entered on a thread of its own, so that a local cluster's start-up
    (about 0.2-0.3 s of interpreter time, 1-2 s with worker processes) overlaps other work.

    The constructor returns at once; :meth:`client` waits for the client (and raises what
    starting it raised); :meth:`close` closes it (safe to repeat, after a failed start, and
    while the start still goes on: it waits for the start to end, then closes what it
    started).

    Waiting is on an event the start sets when it ends, not on the start's thread: a
    ``Thread.join`` interrupted by Ctrl-C can leave the thread marked as ended while it
    still runs (Python 3.11's ``threading``), and a later join then returns at once.

    Parameters
    ----------
    scheduler, workers
        As for :func:`dask_client`.
    """

    def __init__(self, scheduler: str = "threads", workers: int = 2) -> None:
        self.scheduler = scheduler
        self.workers = int(workers)
        self._cm = dask_client(scheduler, self.workers)
        self._client: Any = None
        self._error: BaseException | None = None
        self._closed = False
        self._ended = threading.Event()
        """Set when the start has ended, with a client or an error."""
        self._abandoned = False
        """:meth:`close` was interrupted while it waited: the start's thread closes what it started."""
        self._state_lock = threading.Lock()
        self._thread = threading.Thread(target=self._enter, name="twinpass-dask-start", daemon=True)
        self._thread.start()

    def _enter(self) -> None:
        try:
            self._client = self._cm.__enter__()
        except BaseException as e:  # handed to the caller by client()
            self._error = e
        with self._state_lock:
            self._ended.set()
            abandoned = self._abandoned
        if abandoned:
            self._exit()

    def client(self) -> Any:
        """The started :class:`distributed.Client` (waits for the start)."""
        self._ended.wait()
        if self._error is not None:
            raise self._error
        if self._closed:
            raise RuntimeError("this Dask client was closed")
        return self._client

    def close(self) -> None:
        """Close the client and its local cluster (waits for the start first).

        Interrupted while it waits for the start (Ctrl-C again), it raises that interrupt
        and leaves the closing to the start's thread, once the start has ended.
        """
        with self._state_lock:
            if self._closed:
                return
            self._closed = True
        try:
            self._ended.wait()
        except BaseException:
            with self._state_lock:
                ended = self._ended.is_set()
                self._abandoned = not ended
            if ended:
                self._exit()
            raise
        self._exit()

    def _exit(self) -> None:
        """Leave :func:`dask_client` after a start that ended (nothing to close after a failed one)."""
        if self._error is None:
            self._cm.__exit__(None, None, None)


COMPILE_NOTICE = ("compiling twinpass's filter loops for this machine (first use after installing; "
                  "this takes a minute or so, and later runs load them from numba's cache)")


def warm_compiled_loops(notice_after_s: float = 3.0) -> bool:
    """Load the compiled loops in this process (:func:`dask_client` starts it on a thread for local threads).

    On a machine's first run after installing, numba compiles them (about 40 s of one core
    on the bench machine; a fraction of a second to load from its cache afterwards); when
    that takes longer than ``notice_after_s`` seconds, :data:`COMPILE_NOTICE` is logged as a
    warning, so that a first run does not look stuck. Returns whether the compiled loops are
    in use (see :func:`twinpass.core.loops.jit_enabled`).
    """
    from .core import loops

    if not _WARMING.acquire(blocking=False):  # another thread loads them, and gives the notice
        with _WARMING:
            return loops.jit_enabled()
    timer = threading.Timer(notice_after_s, log.warning, args=(COMPILE_NOTICE,))
    timer.daemon = True
    timer.start()
    try:
        return loops.jit_enabled()
    finally:
        timer.cancel()
        _WARMING.release()


_WARMING = threading.Lock()
"""Held by the thread loading the compiled loops (:func:`warm_compiled_loops`): a flow
command loads them from two threads at once, and the notice is said once."""


_LOCAL_CLUSTER_CONFIG = {
    # Dask's statistical profiler samples every worker thread each 10 ms (for its dashboard,
    # which local clusters here do not serve): a few per cent of the CPU.
    "distributed.worker.profile.enabled": False,
    # The host monitors feed that dashboard too; polled less often (and disks not at all)
    # they leave the event loop idle. Block tasks keep no results in Dask's memory, so the
    # worker's memory monitor need not look ten times a second.
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.admin.system-monitor.disk": False,
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.admin.tick.interval": "500ms",
    # Worker processes keep one thread per numeric library, as Dask sets them, but not Dask's
    # MALLOC_TRIM_THRESHOLD_=65536: setting it turns off glibc's adaptive mmap threshold, so
    # every block array is mapped fresh and faulted in page by page. On the 2 GiB bench
    # archive (one worker process) 37 -> 25 s of worker CPU, 42 -> 30 s wall; two processes
    # peak at about 70 MiB more (934 against 860 MiB for the process tree). Threads keep
    # glibc's defaults anyway. A value already in this process's environment is inherited
    # (set by the user, or written there by a Dask cluster started earlier in the process).
    "distributed.nanny.pre-spawn-environ": {"OMP_NUM_THREADS": 1, "MKL_NUM_THREADS": 1, "OPENBLAS_NUM_THREADS": 1},
}
"""Dask settings of the local clusters twinpass starts (not of a scheduler given by address)."""


def _local_cluster(workers: int, processes: bool) -> Any:
    from distributed import LocalCluster

    return LocalCluster(
        n_workers=workers if processes else 1,
        threads_per_worker=1 if processes else workers,
        processes=processes,
        dashboard_address=None,
        # The scheduler's HTTP endpoint (health, metrics) on a free local port, no dashboard:
        # a fixed default port would clash with any other cluster on the machine.
        scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"},
        silence_logs=logging.ERROR,
    )


# ------------------------------------------------------------------- the driver
@dataclass(frozen=True)
class FileWork:
    """One output file of a segment and what to do with it."""

    relpath: str
    array_name: str
    spec: ReaderSpec
    frames: int
    seg_offset: int
    stream: str
    start_time: str | None
    fingerprint: dict[str, Any]
    action: str | tuple[tuple[int, int], ...]
    """"all" (recompute), "resume" (finish pending/failed blocks), "skip", or frame spans."""
    full_scale: float | None = None
    fill: tuple[FillSpan, ...] = ()
    """Linear fills of NaN/Inf runs (nonfinite = "interpolate"), file samples."""
    filled_spans: tuple[tuple[int, int], ...] = ()
    nan_spans: tuple[tuple[int, int], ...] = ()
    """File spans written as NaN (nonfinite = "split")."""
    channel_names: tuple[str, ...] | None = None
    """One name per channel (attribute ``channel_names``), or None when none is given."""
    units: tuple[str, ...] | None = None
    """One unit per channel (attribute ``units``), or None when none is given."""

    def labels(self) -> dict[str, list[str]]:
        """The attributes ``channel_names`` and ``units`` of the output, the given ones only."""
        return ChannelLabels(self.channel_names, self.units).attrs()


@dataclass(frozen=True)
class SegmentWork:
    segment_id: str
    stream: str
    sample_rate_hz: float
    channels: int
    frames: int
    files: tuple[FileWork, ...]
    holes: tuple[tuple[int, int], ...] = ()
    """Segment spans left out of filtering (nonfinite = "split")."""

    @property
    def has_work(self) -> bool:
        return any(f.action != "skip" for f in self.files)

    def joins(self, relpath: str) -> tuple[str | None, str | None]:
        """The previous and next file (source paths; None at the segment's ends) of the file
        ``relpath`` of this segment."""
        k = self._positions[relpath]
        return (self.files[k - 1].relpath if k > 0 else None,
                self.files[k + 1].relpath if k + 1 < len(self.files) else None)

    @functools.cached_property
    def _positions(self) -> dict[str, int]:
        return {f.relpath: k for k, f in enumerate(self.files)}


@dataclass
class FileOutcome:
    relpath: str
    array_name: str
    blocks: int
    blocks_run: int
    blocks_done: int
    blocks_failed: int
    status: str
    """"complete", "failed", "skipped"; "unfinished" in the record of a run stopped before its
    end (:class:`twinpass.job.RunTally`)."""
    seconds: float = 0.0
    errors: dict[int, str] = field(default_factory=dict)
    summary: dict[str, Any] = field(default_factory=dict)
    check_failures: CheckFailures | None = None
    """Its blocks that failed their checks, in words (:func:`explain_check_failures`)."""
    blocks_rerun: int = 0
    """Runs counted in ``blocks_run`` of blocks an earlier attempt of the segment's task had
    run already: ``blocks_run - blocks_rerun`` blocks of the file ran (:class:`twinpass.job.RunTally`)."""
    blocks_retried: int = 0
    """Blocks done only after a failed attempt: a retry within the block's task, or a later
    attempt of the segment's task (:class:`twinpass.job.RunTally`)."""


def file_summary(table: Any) -> dict[str, Any]:
    """A file's check summary from its block table (read with figures): the worst figures
    (:func:`~twinpass.core.checks.summarise`) and ``blocks_pass``, ``blocks_warn``,
    ``blocks_fail`` and ``blocks_error``, the blocks of each status."""
    st = np.asarray(table.status)
    summary = _checks.summarise(table.figures)
    for name, code in (("pass", PASS), ("warn", WARN), ("fail", FAIL), ("error", ERROR)):
        summary[f"blocks_{name}"] = int(np.sum(st == code))
    return summary


def segment_layout(seg: SegmentWork, cfg: JobConfig, halo: int, carry: bool = True) -> Layout:
    """The block layout of ``seg`` under ``cfg`` with halos of ``halo`` samples (0 in carry
    mode); ``carry`` says whether carry mode could filter the segment instead (for the error
    when no halo-mode block fits). See :func:`~twinpass.core.blocks.choose_layout`."""
    return choose_layout(
        sample_rate_hz=seg.sample_rate_hz,
        channels=seg.channels,
        halo=halo,
        block_seconds=cfg.processing.block_seconds,
        chunk_seconds=cfg.output.chunk_seconds,
        memory_budget_mib=cfg.processing.memory_budget_mib,
        carry=carry,
        seam_samples=cfg.checks.seam_samples,
        response_checks=cfg.checks.every > 0,
        source=cfg.source,
    )


def _layout(seg: SegmentWork, design: Design, cfg: JobConfig) -> Layout:
    """The halo-mode layout of ``seg`` (pieces between holes always use halos)."""
    return segment_layout(seg, cfg, design.effective_length, carry=not design.is_fir and not seg.holes)


def segment_block_samples(seg: SegmentWork, layout: Layout) -> int:
    """The longest block core (samples) the halo mode would run in ``seg``.

    The layout's block length, or less when every file of the segment is shorter (blocks
    never cross a file's end): a segment of files shorter than the halo is then carried
    in ``mode = "auto"``, instead of reading many neighbouring files for each block.
    """
    return max((b - a for f in seg.files for a, b in layout.spans(f.frames)), default=layout.block_samples)


def segment_edge_samples(seg_frames: int, design: Design, cfg: JobConfig) -> int:
    return resolve_edge_samples(cfg.processing.edge_samples, design.effective_length, seg_frames,
                                edge=cfg.processing.edge)


def file_attrs(seg: SegmentWork, fw: FileWork, design: Design, cfg: JobConfig, layout: Layout,
               edge_samples: int) -> dict[str, Any]:
    """The array attributes of one output file (see the store layout)."""
    L = design.effective_length
    zone_start = min(fw.frames, max(0, L - fw.seg_offset))
    zone_end = min(fw.frames, max(0, L - (seg.frames - fw.seg_offset - fw.frames)))
    return {
        "sample_rate_hz": float(seg.sample_rate_hz),
        "source": fw.relpath,
        "source_fingerprint": fw.fingerprint,
        "stream": seg.stream,
        "segment": seg.segment_id,
        "joins": dict(zip(("previous", "next"), seg.joins(fw.relpath))),
        "start_time": fw.start_time,
        "edge_zone_samples": [int(zone_start), int(zone_end)],
        "filled_spans": [list(sp) for sp in fw.filled_spans],
        "nan_spans": [list(sp) for sp in fw.nan_spans],
        **fw.labels(),
        "filter": {
            "family": design.family,
            "order": int(design.order),
            **design.coefficients(),
            "edge": cfg.processing.edge,
            "edge_samples": int(edge_samples),
            "tolerance": float(design.tolerance),
            "effective_length_samples": int(L),
            "response": cfg.response.to_dict(),  # the overall response asked for, which the design meets
        },
        "design_digest": design_digest_for(design, cfg),
        "blocks": {"block_samples": layout.block_for(fw.frames), "chunk_samples": layout.chunk_for(fw.frames),
                   "halo_samples": layout.halo},
    }


def design_digest_for(design: Design, cfg: JobConfig) -> str:
    from . import __version__

    return design.digest({"edge": cfg.processing.edge, "edge_samples": str(cfg.processing.edge_samples),
                          "nonfinite": cfg.processing.nonfinite,
                          "max_fill_samples": cfg.processing.max_fill_samples, "version": __version__})


ProgressFn = Callable[[int, int, BlockResult], None]


def _stored_table(store: Any, name: str) -> Any:
    """The block table of ``name`` (statuses and spans only), or None when there is none."""
    try:
        return store.read_block_table(name, figures=False, seams=False)
    except StoreError:
        return None


def _set_pending(store: Any, name: str, status: np.ndarray, indices: list[int]) -> None:
    """Invalidate those of ``indices`` that are not pending already."""
    idx = [i for i in indices if int(status[i]) != PENDING]
    if idx:
        store.invalidate_blocks(name, idx)


def _kept_layout(store: Any, fw: FileWork, seg: SegmentWork, layout: Layout,
                 cfg: JobConfig) -> tuple[list[tuple[int, int]], int, str] | None:
    """The blocks, chunk length and compression an output was written in, for part of it to
    be rerun in them (a neighbour's change, a resume, lost chunks): ``block_seconds``,
    ``chunk_seconds`` and ``compression`` apply to files written whole from then on, and
    the rest of the file keeps its values. None when the array or its table is missing or
    of another length, or its blocks with their halos no longer fit the memory budget: the
    file is then written whole in the current layout."""
    table = _stored_table(store, fw.array_name)
    stored = getattr(store, "stored_layout", lambda _name: None)(fw.array_name)
    if table is None or stored is None or not len(table.span):
        return None
    spans = [(int(a), int(b)) for a, b in table.span]
    chunk, compression = stored
    if spans[0][0] != 0 or spans[-1][1] != fw.frames or any(b <= a for a, b in spans):
        return None
    if (spans, chunk, compression) == (layout.spans(fw.frames), layout.chunk_for(fw.frames), cfg.output.compression):
        return None  # nothing to keep: the current layout
    window = max(b - a for a, b in spans) + 2 * layout.halo  # as choose_layout counts it
    if window * seg.channels * BYTES_PER_WINDOW_SAMPLE > cfg.processing.memory_budget_mib * 2**20:
        return None
    return spans, chunk, compression


def prepare_segment(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, layout: Layout,
                    edge_samples: int, *, mode: str | None = None,
                    on_file: Callable[[str, list[tuple[int, int]], list[int]], None] | None = None,
                    ) -> tuple[dict[str, list[tuple[int, int]]], dict[str, list[int]]]:
    """Create or update the output arrays and block tables of a segment's files.

    Writes in the crash-safe order of the module notes (points 1 and 2). ``mode``, when
    given, is recorded as the ``blocks.mode`` attribute (e.g. ``"carry"``). ``on_file``,
    when given, is called as ``on_file(array_name, spans, todo)`` as soon as each file with
    work is prepared (its array and block table are current), before the next file is.

    Returns
    -------
    spans_by_file : dict
        Block cores [start, stop) in file frames, per array name (every file).
    todo_by_file : dict
        Indices of the blocks to run, per array name (files with work only).
    """
    # 1. Blocks a neighbour's change reaches become pending before any file records its
    #    new fingerprint (module notes, point 1).
    for fw in seg.files:
        if isinstance(fw.action, tuple):
            old = _stored_table(store, fw.array_name)
            if old is not None:
                spans = [(int(a), int(b)) for a, b in old.span]
                _set_pending(store, fw.array_name, old.status, blocks_touching(spans, fw.action))
    # 2. Arrays and tables.
    spans_by_file: dict[str, list[tuple[int, int]]] = {}
    todo_by_file: dict[str, list[int]] = {}
    columns = list(_checks.FIGURES)
    for fw in seg.files:
        if fw.action == "skip":
            # An unchanged file keeps the blocks it was written in (a later block_seconds or
            # chunk_seconds applies to files written from then on): the seam checks of its
            # neighbours compare with those blocks.
            old = _stored_table(store, fw.array_name)
            spans_by_file[fw.array_name] = ([(int(a), int(b)) for a, b in old.span] if old is not None
                                            else layout.spans(fw.frames))
            continue
        fresh = fw.action == "all"
        kept = None if fresh else _kept_layout(store, fw, seg, layout, cfg)
        spans, chunk, compression = kept or (layout.spans(fw.frames), layout.chunk_for(fw.frames),
                                             cfg.output.compression)
        spans_by_file[fw.array_name] = spans
        attrs = file_attrs(seg, fw, design, cfg, layout, edge_samples)
        if kept:
            attrs["blocks"].update(block_samples=max(b - a for a, b in spans), chunk_samples=chunk)
        if mode is not None:
            attrs["blocks"]["mode"] = mode
        digest = attrs["design_digest"]
        if fresh:
            attrs["design_digest"] = RESETTING_DIGEST  # module notes, point 2
        table = store.prepare_file(
            fw.array_name, frames=fw.frames, channels=seg.channels, dtype=cfg.output.dtype,
            chunk_samples=chunk, compression=compression, attrs=attrs,
            spans=spans, n_figures_columns=columns, seam_samples=cfg.checks.seam_samples, keep_done=not fresh,
        )
        if fresh:
            store.update_attrs(fw.array_name, design_digest=digest)
        status = np.asarray(table.status)
        todo = {i for i in range(len(spans)) if status[i] not in DONE}
        redo = blocks_touching(spans, fw.action) if isinstance(fw.action, tuple) else []
        if not fresh:  # blocks recorded done whose chunk files have gone since: run again
            lost = getattr(store, "absent_chunks", lambda _name: ())(fw.array_name)
            redo = sorted(set(redo) | {i for i in blocks_touching(spans, list(lost)) if status[i] in DONE})
        if redo:
            _set_pending(store, fw.array_name, status, redo)
            todo |= set(redo)
        todo_by_file[fw.array_name] = sorted(todo)
        if on_file is not None:
            on_file(fw.array_name, spans, todo_by_file[fw.array_name])
    return spans_by_file, todo_by_file


def block_jobs(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, layout: Layout, edge_samples: int,
               spans_by_file: dict[str, list[tuple[int, int]]], todo_by_file: dict[str, list[int]], *,
               sync_in_task: bool) -> list[BlockJob]:
    """One :class:`BlockJob` per block to run, in segment order (files in ``todo_by_file`` only).

    ``sync_in_task`` says whether the tasks sync their output themselves (``[output] sync``
    and workers elsewhere); False when the driver does (:func:`run_jobs` with
    ``sync_before_record``) or nothing is synced.
    """
    k = cfg.checks.seam_samples
    every = cfg.checks.every
    sources = segment_sources(seg)
    jobs: list[BlockJob] = []
    for fw in seg.files:
        todo = todo_by_file.get(fw.array_name)
        if not todo:
            continue
        spans = spans_by_file[fw.array_name]
        for i in todo:
            s, e = fw.seg_offset + spans[i][0], fw.seg_offset + spans[i][1]
            _, _, ws, we, _, _ = block_reach(s, e, seg.frames, layout.halo, k, edge_samples)
            if seg.holes:  # a piece end may widen the window by the end extension
                ws, we = ws - edge_samples, we + edge_samples
            jobs.append(BlockJob(
                store_location=store.location, array_name=fw.array_name, block_index=i, core=(s, e),
                file_offset=fw.seg_offset, segment_frames=seg.frames, channels=seg.channels,
                sources=tuple(src for src in sources if src.seg_offset < we and ws < src.seg_offset + src.frames),
                design=design, halo=layout.halo, edge=cfg.processing.edge, edge_samples=edge_samples,
                out_dtype=cfg.output.dtype, seam_samples=k, check_response=bool(every) and i % every == 0,
                checks_cfg=cfg.checks, retries=cfg.engine.retries,
                retry_backoff_seconds=cfg.engine.retry_backoff_seconds, holes=seg.holes, sync=sync_in_task,
                fence=getattr(store, "lock_token", ""),
            ))
    return jobs


def record_result(store: Any, res: BlockResult) -> BlockResult:
    """Record a block's outcome in its block table (driver only; after its data are written).

    A record the store refuses (e.g. "done" while a data chunk is missing) is recorded as
    status ``ERROR`` with the store's message instead; the result actually recorded is returned.
    """
    try:
        store.record_block(res.array_name, res.block_index, res.status, res.figures, res.seams, res.error)
        return res
    except StoreError as e:
        res = BlockResult(res.array_name, res.block_index, ERROR, error=f"{type(e).__name__}: {e}",
                          attempts=res.attempts, seconds=res.seconds)
        store.record_block(res.array_name, res.block_index, ERROR, None, None, res.error)
        return res


class _BatchRecorder:
    """Block results waiting to be recorded; written to the block tables together (driver only).

    :func:`run_jobs` adds every result that has finished by the time it looks, then flushes:
    no result waits for a later one, and when results arrive faster than the driver records
    them, one write per block-table array records them all. A result the driver has not
    recorded when it dies is run again on resume: a block table never claims more than is
    written. A batch the store refuses is recorded one result at a time, so that only the
    refused results become errors (:func:`record_result`).
    """

    def __init__(self, store: Any, on_recorded: Callable[[BlockResult], None], *,
                 sync_before_record: bool = False) -> None:
        self.store = store
        self.on_recorded = on_recorded
        self.sync_before_record = sync_before_record
        self.pending: list[tuple[BlockResult, BlockJob | None]] = []

    def add(self, res: BlockResult, job: BlockJob | None = None) -> None:
        self.pending.append((res, job))

    def flush(self) -> None:
        from .io.store import BlockRecord

        by_name: dict[str, list[BlockResult]] = {}
        for res, job in self.pending:
            if self.sync_before_record and job is not None:
                res = _synced(res, job)
            by_name.setdefault(res.array_name, []).append(res)
        self.pending = []
        for name, results in by_name.items():
            try:
                self.store.record_blocks(name, [BlockRecord(r.block_index, r.status, r.figures, r.seams, r.error)
                                                for r in results])
            except StoreError:
                results = [record_result(self.store, r) for r in results]
            for res in results:
                self.on_recorded(res)


def _synced(res: BlockResult, job: BlockJob) -> BlockResult:
    """``res`` once its output chunks are on the disk; an ``ERROR`` result if they cannot be synced."""
    if res.status not in DONE or not job.write or job.sync:
        return res
    from .io.store import sync_block_data

    start = job.core[0] - job.file_offset
    try:
        sync_block_data(job.store_location, job.array_name, start, start + job.core[1] - job.core[0])
    except StoreError as e:
        return BlockResult(res.array_name, res.block_index, ERROR, error=f"{type(e).__name__}: {e}",
                           attempts=res.attempts, seconds=res.seconds, window_samples=res.window_samples)
    return res


def shares_this_machine(client: Any) -> bool:
    """Whether ``client``'s workers run on this machine (a local cluster :func:`dask_client` started).

    Their writes then sit in this machine's page cache, and the driver can sync them.
    """
    return getattr(client, "cluster", None) is not None


def submit_jobs(jobs: list[BlockJob], client: Any) -> list[tuple[Any, BlockJob]]:
    """Submit block jobs to ``client``; (future, job) pairs for :func:`run_jobs`."""
    stamp = uuid.uuid4().hex  # keys unique to this call: Dask gives a known key the result it has
    return [(client.submit(run_block, j, pure=False, retries=j.retries,
                           key=f"twinpass-block-{j.array_name}-{j.block_index}-{stamp}"), j)
            for j in jobs]


STOP_POLL_S = 0.1
"""Seconds between rounds of cancelling the drivers' blocks while a stopped run waits for them."""


def _cancel_ignoring_errors(client: Any, futures: list[Any]) -> None:
    with contextlib.suppress(Exception):
        client.cancel(futures)


def cancel_soon(futures: list[Any]) -> None:
    """Ask for the unfinished ``futures`` to be cancelled, without waiting and without raising.

    For a driver giving up on its blocks because of an error: the request goes out from a
    thread of its own, since distributed's cancel waits on the client's event loop, which
    may have stopped under a client being closed. A client already closing or closed is not
    asked (its blocks end with its cluster).
    """
    with contextlib.suppress(Exception):
        pending = [f for f in futures if not f.done()]
        client = pending[0].client if pending else None
        if client is not None and getattr(client, "status", None) == "running":
            threading.Thread(target=_cancel_ignoring_errors, args=(client, pending), name="twinpass-cancel",
                             daemon=True).start()


class CancellableClient:
    """The cluster's client as the segment drivers see it: the blocks they submit can all be cancelled.

    Stopping a run (Ctrl-C) must stop its drivers before the cluster closes: closing a
    cluster under a driver that still submits or waits on blocks can leave the driver
    waiting forever on a client whose event loop is gone. :meth:`cancel_until` cancels
    their blocks, round after round until the drivers have returned (a driver may still be
    submitting), so that each records its unfinished blocks as not done and returns.
    """

    def __init__(self, client: Any) -> None:
        self._client = client
        self._futures: weakref.WeakSet[Any] = weakref.WeakSet()  # forgotten once the driver drops them
        self._guard = threading.Lock()

    def submit(self, *args: Any, **kwargs: Any) -> Any:
        fut = self._client.submit(*args, **kwargs)
        with self._guard:
            self._futures.add(fut)
        return fut

    def cancel_all(self) -> None:
        """Cancel every block submitted so far that has not finished (a client no longer
        running is not asked; an error is ignored: the next round asks again)."""
        with self._guard:
            pending = [f for f in self._futures if not f.done()]
        if pending and getattr(self._client, "status", "running") == "running":
            _cancel_ignoring_errors(self._client, pending)

    def cancel_until(self, ended: Callable[[float], bool]) -> None:
        """Cancel the unfinished blocks, round after round, until the drivers have returned.

        ``ended(timeout)`` waits up to ``timeout`` seconds for the drivers and says whether
        every one has returned; it is asked with 0 first, then between rounds with
        :data:`STOP_POLL_S`.
        """
        while not ended(0.0):
            self.cancel_all()
            ended(STOP_POLL_S)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._client, name)


class _CancelledBlockNotice(logging.Filter):
    """Drops distributed's warning for each twinpass task it cancelled while running.

    Stopping a run cancels its running blocks, and each worker then logs "Async
    instruction for <Task ... execute('twinpass-block-...')> ended with CancelledError":
    expected, and said once per segment by :class:`BlockErrorLog`. Other tasks' warnings
    pass.
    """

    def filter(self, record: logging.LogRecord) -> bool:
        msg = record.getMessage()
        return not ("ended with CancelledError" in msg and "execute('twinpass-" in msg)


# Installed wherever this module is imported, worker processes included (they import it to run blocks).
logging.getLogger("distributed.worker.state_machine").addFilter(_CancelledBlockNotice())


SCHEDULER_LOST_REASONS = frozenset({"scheduler-connection-lost", "scheduler-restart"})
"""Reasons distributed gives when it cancels a client's futures because their scheduler went away."""


def lost_task_error(exc: BaseException) -> str:
    """The error text recorded for a block whose Dask task raised ``exc`` instead of a result.

    A cancelled task (the run was stopped: Ctrl-C, a run begun before its flow run and not
    taken over) gets a text beginning with :data:`CANCELLED`; a task cancelled because the
    client lost its scheduler counts as failed, with what to check; anything else (a worker
    lost more often than the scheduler allows) gets the exception's type and message.
    """
    if isinstance(exc, (concurrent.futures.CancelledError, asyncio.CancelledError)):
        # distributed cancels every future of a client whose scheduler went away, naming why
        if getattr(exc, "reason", None) in SCHEDULER_LOST_REASONS:
            return ("SchedulerLost: the connection to the Dask scheduler was lost before this block finished (the "
                    "scheduler stopped, restarted or became unreachable); check it ([engine] scheduler or "
                    "--scheduler) and rerun: the next run does this block")
        return f"{CANCELLED}: the run was stopped before this block finished; the next run does it"
    text = f"{type(exc).__name__}: {exc}".strip() or type(exc).__name__
    if type(exc).__name__ == "KilledWorker":  # distributed's: the workers running it died, again and again
        text += ("; the workers running this block died each time (often the system ending them for lack "
                 "of memory): lower [processing] memory_budget_mib or the number of workers, check the "
                 "system log for out-of-memory kills, and rerun")
    return text


class BlockErrorLog:
    """Logs the blocks of one segment recorded ``ERROR``: each failure of a file in a line of
    its own, the further blocks of that file failing with the same error in one line, and the
    cancelled ones in a single line.

    Stopping a run cancels every block not finished, and a file that cannot be read fails
    every block alike; a line for each would bury the failures that matter. Call
    :meth:`block` with each block result and :meth:`close` once the segment's results are in.

    Parameters
    ----------
    segment_id : str
        The segment named in the cancellation line ("" for none).
    logger : logging.Logger or logging.LoggerAdapter or None, optional
        Where the lines go (default the engine's logger; a flow task passes its run logger).
        None logs nothing: the caller logs the blocks another way (see ``log_blocks`` of
        :func:`run_segment`).
    """

    def __init__(self, segment_id: str, logger: logging.Logger | logging.LoggerAdapter[Any] | None = log) -> None:
        self.segment_id = segment_id
        self.log = logger
        self.cancelled = 0
        self.repeats: dict[tuple[str, str], list[int]] = {}
        """(array name, first line of the error) logged -> the blocks failing alike since."""

    def block(self, res: BlockResult) -> None:
        """Log ``res`` if it failed (naming its attempts where counted); count it if it was cancelled."""
        if res.status != ERROR or self.log is None:
            return
        first = (res.error or "").splitlines()[0] if res.error else ""
        if was_cancelled(first):
            self.cancelled += 1
        elif (res.array_name, first) in self.repeats:
            self.repeats[res.array_name, first].append(res.block_index)
        else:
            self.repeats[res.array_name, first] = []
            self._failed(res, first)

    def _failed(self, res: BlockResult, first: str) -> None:
        assert self.log is not None
        if res.attempts:
            self.log.error("block %d of %s failed after %d attempt(s): %s", res.block_index, res.array_name,
                           res.attempts, first)
        else:
            self.log.error("block %d of %s failed: %s", res.block_index, res.array_name, first)

    def close(self) -> None:
        """Log the blocks that failed as one logged before them, a line per file and error, and
        the cancelled blocks counted so far, in one line (nothing if none)."""
        for (name, _first), blocks in self.repeats.items():
            if blocks and self.log is not None:
                self.log.error("%d more block(s) of %s failed with the same error: %s", len(blocks), name,
                               block_list(blocks))
        self.repeats = {}
        if self.cancelled and self.log is not None:
            where = f"segment {self.segment_id}: " if self.segment_id else ""
            self.log.warning("%s%d block(s) cancelled before they finished (the run was stopped); they are "
                             "recorded as not done and the next run does them", where, self.cancelled)
            self.cancelled = 0


def run_jobs(submitted: list[tuple[Any, BlockJob]], store: Any, *,
             on_block: ProgressFn | None = None, sync_before_record: bool = False,
             segment_id: str = "", log_blocks: bool = True) -> dict[str, int]:
    """Record the results of block jobs submitted with :func:`submit_jobs` as they arrive.

    Returns the number of blocks run per array name. A block whose task is lost (its
    worker died more often than the scheduler allows, or it was cancelled) is recorded
    with status ``ERROR`` and the reason; the others carry on. ``on_block`` is called for
    each result once it is recorded.

    With ``sync_before_record``, the output of every finished block whose task did not sync
    it (``BlockJob.sync`` False) is synced to disk here before the block is recorded (a block
    whose chunks cannot be synced is recorded ``ERROR``). The workers then never wait on the
    disk; this thread does, while they compute the next blocks. Only for workers on this
    machine (:func:`shares_this_machine`): their writes are in this machine's page cache.

    With ``log_blocks`` the failed and cancelled blocks are logged here (:class:`BlockErrorLog`,
    naming ``segment_id``); a caller whose ``on_block`` logs them itself passes False.
    """
    from distributed import as_completed

    run_count: dict[str, int] = {}
    if not submitted:
        return run_count
    total = len(submitted)
    futures = [f for f, _ in submitted]
    by_key = {f.key: j for f, j in submitted}
    done = 0
    errors = BlockErrorLog(segment_id, log if log_blocks else None)

    def recorded(res: BlockResult) -> None:
        nonlocal done
        run_count[res.array_name] = run_count.get(res.array_name, 0) + 1
        done += 1
        errors.block(res)
        if on_block is not None:
            on_block(done, total, res)

    recorder = _BatchRecorder(store, recorded, sync_before_record=sync_before_record)
    try:
        for batch in as_completed(futures).batches():  # everything finished so far, at least one
            for fut in batch:
                job = by_key[fut.key]
                try:
                    res: BlockResult = fut.result()
                except (Exception, asyncio.CancelledError) as exc:  # worker lost repeatedly, cancelled...
                    res = BlockResult(job.array_name, job.block_index, ERROR, error=lost_task_error(exc))
                fut.release()
                recorder.add(res, job)
            recorder.flush()
    except BaseException:
        with contextlib.suppress(Exception):  # keep what finished; the first error is the one to report
            recorder.flush()
        # Blocks nobody will record: cancelled, so that a retry of the segment does not run
        # beside them (those already running finish unrecorded, and the retry redoes them).
        cancel_soon(futures)
        raise
    finally:
        errors.close()
    recorder.flush()
    return run_count


def finish_segment(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, layout: Layout,
                   edge_samples: int, spans_by_file: dict[str, list[tuple[int, int]]],
                   run_count: dict[str, int], t0: float) -> list[FileOutcome]:
    """Seam checks, segment attributes of unchanged files, completion flags and outcomes."""
    touched = {fw.array_name for fw in seg.files if fw.action != "skip"}
    if touched:
        # Unchanged files of a busy segment: keep their segment id and edge zones current,
        # so the next plan sees how files are joined now.
        for fw in seg.files:
            if fw.action == "skip":
                a = file_attrs(seg, fw, design, cfg, layout, edge_samples)
                store.update_attrs(fw.array_name, segment=a["segment"], joins=a["joins"],
                                   edge_zone_samples=a["edge_zone_samples"])
    # An unchanged file whose block fails a seam now is reported (and rerun next time).
    checked = touched | seam_pass(seg, store, spans_by_file, touched, design, cfg)
    if cfg.output.sync and checked:
        # Block records durable before any completion flag: a power cut may lose a flag
        # (the file is checked again), never keep one whose records are lost.
        store.sync_records()
    outcomes = []
    elapsed = time.perf_counter() - t0
    moved = inputs_changed_during_run(seg) if checked else {}
    for fw in seg.files:
        spans = spans_by_file[fw.array_name]
        if fw.array_name not in checked:
            outcomes.append(FileOutcome(fw.relpath, fw.array_name, len(spans), 0, len(spans), 0, "skipped"))
            continue
        table = store.read_block_table(fw.array_name, seams=False)  # outcome: statuses and figures
        st = np.asarray(table.status)
        finished = np.isin(st, DONE)
        ok = bool(np.all(finished))
        errors = dict(table.errors)
        if moved:  # its blocks, or their halos, may have read the input half rewritten
            ok = False
            if not errors:  # (blocks that could not read it say so themselves)
                errors[-1] = _moved_message(fw.relpath, moved)
        summary = file_summary(table)
        store.set_complete(fw.array_name, ok, summary)
        if not ok and np.isin(st, (PENDING, ERROR)).any():
            # Values an earlier design or join left in blocks not written now would read
            # as results: they read as NaN until a run writes them.
            store.clear_unwritten(fw.array_name)
        outcomes.append(FileOutcome(
            fw.relpath, fw.array_name, len(spans), run_count.get(fw.array_name, 0),
            int(np.sum(finished)), int(np.sum(~finished)),
            "complete" if ok else "failed", elapsed, errors, summary,
        ))
    return with_check_failures(outcomes, seg, store, design, cfg)


def inputs_changed_during_run(seg: SegmentWork) -> dict[str, str]:
    """The input files of ``seg`` that changed since the run planned them (fingerprint
    taken at discovery), their sidecars included, with how:
    :func:`twinpass.io.fingerprint.changed_since`."""
    out = {}
    for fw in seg.files:
        how = changed_since(fw.spec.path, fw.fingerprint, fw.spec)
        if how is not None:
            out[fw.relpath] = how
    return out


def _moved_message(relpath: str, moved: dict[str, str]) -> str:
    """Why ``relpath`` is not marked complete: inputs of its segment (``moved``: path -> how)
    changed while the run read them."""
    outcome = ("the output is not marked complete, since it was filtered, in part or in whole, from the file as it "
               "was before the change: rerun to filter the new contents")
    if set(moved) == {relpath}:
        return f"the file changed while this run read it ({moved[relpath]}); {outcome}"
    which = "; ".join(f"{rel}: {how}" for rel, how in sorted(moved.items()))
    return (f"input(s) of its segment changed while this run read them ({which}); its blocks read them across "
            f"the joins, so {outcome}")


def explain_check_failures(seg: SegmentWork, store: Any, design: Design, cfg: JobConfig,
                           relpaths: set[str]) -> dict[str, CheckFailures]:
    """Why the blocks of the files ``relpaths`` of ``seg`` that failed their checks failed
    (:func:`twinpass.core.failures.explain`), by source path; the block tables of those files
    and of their neighbours in the segment are read (a table that cannot be read is passed over)."""
    wanted = {k for k, fw in enumerate(seg.files) if fw.relpath in relpaths}
    views: list[FileBlocks | None] = []
    for k, fw in enumerate(seg.files):
        view = None
        if wanted & {k - 1, k, k + 1}:
            try:
                t = store.read_block_table(fw.array_name, seams=False)
                start = _dt.datetime.fromisoformat(fw.start_time) if fw.start_time else None
                view = FileBlocks(fw.relpath, np.asarray(t.status), np.asarray(t.span), t.figures, start)
            except StoreError:
                pass
        views.append(view)
    found = explain(views, design, cfg.checks, design.tolerance)
    return {rel: found[rel] for rel in relpaths if rel in found}


def with_check_failures(outcomes: list[FileOutcome], seg: SegmentWork, store: Any, design: Design,
                        cfg: JobConfig) -> list[FileOutcome]:
    """``outcomes`` of ``seg``, each failed one with its blocks' check failures in words."""
    failed = {o.relpath for o in outcomes if o.status == "failed"}
    found = explain_check_failures(seg, store, design, cfg, failed) if failed else {}
    return [dataclasses.replace(o, check_failures=found[o.relpath]) if o.relpath in found else o for o in outcomes]


def run_segment(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, client: Any,
                *, on_block: ProgressFn | None = None, log_blocks: bool = True) -> list[FileOutcome]:
    """Filter every block a segment needs, record results, run seam checks, finalise files.

    Parameters
    ----------
    seg : SegmentWork
        The segment's files in time order with their actions.
    design : Design
        The per-pass design for the segment's sample rate.
    cfg : JobConfig
    store : twinpass.io.store.OutputStore
        Opened for writing; this thread is its only writer for these files.
    client : distributed.Client
    on_block : callable, optional
        Called as ``on_block(done, total, result)`` from this thread after each block.
    log_blocks : bool
        Log failed blocks (a line each) and cancelled ones (a line for the segment) on the
        engine's logger. False when ``on_block`` logs them (a flow task does, on its run
        logger), so that each appears once.

    Returns
    -------
    list of FileOutcome
        One per file of the segment, in order. A block that keeps failing leaves its
        file ``"failed"`` (its error in :attr:`FileOutcome.errors`); the other files of
        the segment are still completed.

    Notes
    -----
    ``[processing] mode`` ``"carry"``, or ``"auto"`` with a halo longer than
    ``carry_threshold`` blocks or with no block whose halos fit ``memory_budget_mib``,
    hands the segment to :func:`twinpass.engine_carry.run_segment_carry` (same contract,
    no halos) unless it has holes.
    """
    t0 = time.perf_counter()
    mode, layout = segment_mode(seg, design, cfg, carry_layout=False)
    if mode == "carry":
        from .engine_carry import run_segment_carry  # it imports this module

        return run_segment_carry(seg, design, cfg, store, client, on_block=on_block, log_blocks=log_blocks)
    assert layout is not None
    edge_samples = segment_edge_samples(seg.frames, design, cfg)
    # Workers on this machine leave syncing their output to this thread, which waits on the
    # disk while they compute; workers elsewhere sync their own.
    sync_here = cfg.output.sync and shares_this_machine(client)
    # Each file's blocks go to the workers as soon as the file is prepared, while the next
    # files are; their results are recorded once every file is prepared.
    submitted: list[tuple[Any, BlockJob]] = []

    def submit_file(name: str, spans: list[tuple[int, int]], todo: list[int]) -> None:
        submitted.extend(submit_jobs(block_jobs(seg, design, cfg, store, layout, edge_samples,
                                                {name: spans}, {name: todo},
                                                sync_in_task=cfg.output.sync and not sync_here), client))

    try:
        spans_by_file, _ = prepare_segment(seg, design, cfg, store, layout, edge_samples, on_file=submit_file)
    except BaseException:
        cancel_soon([f for f, _ in submitted])  # nothing is recorded for these blocks; stop them
        raise
    run_count = run_jobs(submitted, store, on_block=on_block, sync_before_record=sync_here,
                         segment_id=seg.segment_id, log_blocks=log_blocks)
    return finish_segment(seg, design, cfg, store, layout, edge_samples, spans_by_file, run_count, t0)


def segment_mode(seg: SegmentWork, design: Design, cfg: JobConfig, *,
                 carry_layout: bool = True) -> tuple[str, Layout | None]:
    """How a segment runs: ``("halo", layout)`` or ``("carry", layout)``, as :func:`run_segment` decides.

    ``[processing] mode = "carry"``, or ``"auto"`` with a halo longer than
    ``carry_threshold`` blocks or with no block whose halos fit ``memory_budget_mib``, gives
    carry mode (IIR designs, segments without holes: the pieces between holes use halos).
    With ``carry_layout`` False the carry layout is not computed (None: carry mode computes
    its own).

    Raises
    ------
    ConfigError
        No layout works for the segment (blocks too long for the memory budget, or too
        short for the checks), or carry mode asked of an FIR design; the message names the
        settings to change.
    """
    if cfg.processing.mode != "halo" and not seg.holes:
        from .engine_carry import carry_layout as carry_blocks
        from .engine_carry import use_carry  # it imports this module

        try:
            layout = _layout(seg, design, cfg)
        except ConfigError:
            # No block with its halos fits the memory budget; carry mode needs no halos
            # (and refuses an FIR design in mode "carry").
            if design.is_fir and cfg.processing.mode == "auto":
                raise
            use_carry(design, 1, cfg)  # an FIR design in mode "carry" is refused here
            return "carry", carry_blocks(seg, cfg) if carry_layout else None
        if use_carry(design, segment_block_samples(seg, layout), cfg):
            return "carry", carry_blocks(seg, cfg) if carry_layout else None
        return "halo", layout
    if cfg.processing.mode != "halo" and not design.is_fir:  # holes: carry mode cannot run it
        try:
            return "halo", _layout(seg, design, cfg)
        except ConfigError as e:
            cause = HOLES_FORCE_HALOS[0].upper() + HOLES_FORCE_HALOS[1:]
            raise ConfigError(f"{str(e).rstrip('.')}. {cause}; remedies: {HOLES_REMEDIES}") from None
    return "halo", _layout(seg, design, cfg)


def segment_reads(seg: SegmentWork, design: Design, cfg: JobConfig) -> SegmentReads:
    """How :func:`run_segment` runs ``seg``'s blocks, for the plan's estimate of what they
    read (:meth:`twinpass.core.plan.Plan.totals`): the mode and layout of
    :func:`segment_mode`, the seam samples and the end extension.

    Blocks are those of the current layout (a file rerun in part keeps the blocks it was
    written in, which may differ); a segment with NaN/Inf holes reads its pieces between
    the holes, which this counts as one window per block.

    Raises
    ------
    ConfigError
        As :func:`segment_mode`.
    """
    mode, layout = segment_mode(seg, design, cfg)
    assert layout is not None  # segment_mode computes the carry layout by default
    return SegmentReads(mode=mode, halo=layout.halo if mode == "halo" else 0, seam_samples=cfg.checks.seam_samples,
                        edge_samples=segment_edge_samples(seg.frames, design, cfg),
                        spans={fw.relpath: layout.spans(fw.frames) for fw in seg.files})


HOLES_FORCE_HALOS = ('this segment holds NaN/Inf runs (nonfinite = "split"), which carry mode does not '
                     "handle, so it runs with halos")
"""Why a segment with holes runs in halo mode whatever ``[processing] mode`` says."""
HOLES_REMEDIES = ('interpolate short holes with [processing] nonfinite = "interpolate" (max_fill_samples), '
                  "raise [processing] memory_budget_mib, or repair the file")
"""What to do when such a segment's haloed blocks do not fit the memory budget."""


def segment_notes(seg: SegmentWork, design: Design, cfg: JobConfig) -> list[str]:
    """Notes on how a segment with holes (``nonfinite = "split"``) runs, for the plan and run
    output (empty for segments without holes or without work, and for segments no layout fits,
    which are reported as errors instead).

    * ``mode = "carry"`` asked of an IIR design: the segment runs with halos
      (:data:`HOLES_FORCE_HALOS`); ``"auto"`` is named only where it would have carried.
    * Blocks due a response check (``[checks] every``) whose finite pieces between holes are
      all shorter than :data:`~twinpass.core.checks.SPLIT_MIN_PIECE` samples: their response
      cannot be measured, so they are graded warn, never pass on no evidence (block indices
      of the layout a fresh file gets).
    """
    if not seg.holes or not seg.has_work:
        return []
    try:
        _, layout = segment_mode(seg, design, cfg, carry_layout=False)
    except ConfigError:
        return []
    assert layout is not None
    notes = []
    if not design.is_fir and cfg.processing.mode != "halo":
        from .engine_carry import use_carry  # it imports this module

        if cfg.processing.mode == "carry" or use_carry(design, segment_block_samples(seg, layout), cfg):
            notes.append(f"stream {seg.stream} segment {seg.segment_id}: [processing] mode = "
                         f"\"{cfg.processing.mode}\" asked for carry mode, but {HOLES_FORCE_HALOS} "
                         f"({layout.halo:,} samples each side)")
    every = cfg.checks.every
    if every <= 0:
        return notes
    for fw in seg.files:
        if fw.action == "skip":
            continue
        blind = []
        for i, (a, b) in enumerate(layout.spans(fw.frames)):
            hole = hole_mask(fw.seg_offset + a, fw.seg_offset + b, seg.holes)
            if i % every == 0 and hole.any() and not _checks.measurable_pieces(hole, design):
                blind.append(i)
        if blind:
            notes.append(f"{fw.relpath}: response not checked in {block_list(blind)} (graded warn): "
                         f"every finite piece between their NaN/Inf runs (nonfinite = \"split\") is shorter than "
                         f"the {_checks.SPLIT_MIN_PIECE} samples the response check needs; integrity and seams "
                         f"are still checked (interpolate short runs with nonfinite = \"interpolate\" to check them)")
    return notes


class _MutableTable:
    """Writable copies of a block table's status, figures and seams."""

    def __init__(self, table: Any) -> None:
        self.status = np.array(table.status)
        self.figures = None if table.figures is None else np.array(table.figures)
        self.seams = table.seams
        self.errors = dict(table.errors)


def seam_pass(seg: SegmentWork, store: Any, spans_by_file: dict[str, list[tuple[int, int]]],
              touched: set[str], design: Design, cfg: JobConfig) -> set[str]:
    """Compare each block's samples beyond its edges with its neighbours' own samples.

    Mismatches are relative to the segment's largest |input| (the reference of the
    blockwise tolerance), measured by the blocks themselves; the format's full scale is
    used only when no block has measured it. Joins with at least one block of a file in
    ``touched`` are checked; each block is recorded once, with the worse of its seams.

    Returns
    -------
    set of str
        Arrays in which a block done before this check now fails it (also files outside
        ``touched``: an unchanged neighbour whose output no longer joins).
    """
    failed: set[str] = set()
    if not touched or cfg.checks.seam_samples == 0:
        return failed
    tables = {fw.array_name: _MutableTable(store.read_block_table(fw.array_name)) for fw in seg.files}
    order: list[tuple[str, int]] = [(fw.array_name, i) for fw in seg.files
                                    for i in range(len(spans_by_file[fw.array_name]))]
    col = list(_checks.FIGURES).index("seam_mismatch")
    peak_col = list(_checks.FIGURES).index("peak_in")
    peaks = [float(np.nanmax(t.figures[..., peak_col])) for t in tables.values()
             if t.figures is not None and np.isfinite(t.figures[..., peak_col]).any()]
    scales = [fw.full_scale for fw in seg.files if fw.full_scale]
    full_scale = max(peaks) if peaks else (max(scales) if scales else 1.0)
    full_scale = full_scale if full_scale > 0 else 1.0
    worst: dict[tuple[str, int], float] = {}
    for (na, ia), (nb, ib) in zip(order, order[1:]):
        if na not in touched and nb not in touched:
            continue
        ta, tb = tables[na], tables[nb]
        if ta.seams is None or tb.seams is None:
            continue
        if ta.status[ia] not in DONE and ta.status[ia] != FAIL:
            continue
        if tb.status[ib] not in DONE and tb.status[ib] != FAIL:
            continue
        sa, sb = np.asarray(ta.seams[ia]), np.asarray(tb.seams[ib])
        right = _checks.seam_mismatch(sa[3], sb[0], full_scale)
        left = _checks.seam_mismatch(sb[2], sa[1], full_scale)
        mism = np.nanmax([right, left]) if np.isfinite([right, left]).any() else np.nan
        for key in ((na, ia), (nb, ib)):
            worst[key] = np.fmax(worst.get(key, np.nan), mism)
    # One record per block, with the worse of its two seams; one write per array.
    from .io.store import BlockRecord

    records: dict[str, list[BlockRecord]] = {}
    for (name, idx), mism in worst.items():
        t = tables[name]
        figs = np.array(t.figures[idx], dtype=np.float64)
        prev = figs[:, col].copy()
        figs[:, col] = np.fmax(prev, mism)
        status = int(t.status[idx])
        if status in DONE:
            status = max(status, _checks.grade(figs, design, cfg.checks, design.tolerance))
        if status == int(t.status[idx]) and np.array_equal(prev, figs[:, col], equal_nan=True):
            continue  # checked before with the same outcome (a rerun or a resumed file)
        records.setdefault(name, []).append(BlockRecord(idx, status, figs, None, t.errors.get(idx)))
        if status == FAIL and int(t.status[idx]) in DONE:
            failed.add(name)
    for name, recs in records.items():
        store.record_blocks(name, recs)
    return failed
