"""A run's first steps, taken by the command line before its Prefect flow run exists.

Before the flow body of :func:`twinpass.flows.archive_run` can start a block, the command
imports Prefect (about 0.6 s of interpreter time) and creates the flow run (about 0.4 s
against a running server; with a temporary server it first waits about 3 s for the server
to answer). A :class:`HeadStart` takes the body's first steps meanwhile, the same steps and
in the same order as the body: it takes the store's run lock, removes partial chunk files,
prepares the run (discovery, designs, plan), records the run's root provenance, starts the
Dask cluster when there are blocks to run, and starts each segment's driver
(:func:`twinpass.engine.run_segment`) on a thread of its own.

The command line offers it (:func:`offer`) before the flow call; the flow body takes it
(:func:`claim`) when it is for the same configuration, ``force`` flag, scheduler and
workers, and then owns the lock, the prepared run and the cluster. Each ``filter-segment``
task follows its segment's driver (:meth:`EarlySegment.follow`): the driver's block events
reach the task's own thread (its log lines, progress artifact and the mark that makes a
retry resume), and the task returns the driver's outcomes or raises its error, so the flow
run records, reports and retries what it would have done itself. A second attempt runs as
usual. The terminal's progress bar need not wait for the flow run: it watches the drivers
(``watch``) and sees each block as it is recorded.

Nothing is marked complete before the flow run records it: the drivers write block
results and file records exactly as in the flow body, and the run itself is recorded by
the flow's ``finalize-run`` task. If no flow run takes the head start (the temporary
server did not start, the command was interrupted), :func:`withdraw` stops it: the cluster
closes, the drivers record their unfinished blocks as not done, and the lock is released.

Prefect is not imported here: the command line starts a head start before importing it.
"""

from __future__ import annotations

import contextlib
import logging
import queue
import threading
import uuid
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

from .config import JobConfig, check_run_overrides
from .engine import BlockErrorLog, CancellableClient, ClientStart, FileOutcome, ProgressFn, SegmentWork, run_segment
from .errors import RunStoppedError
from .io.store import OutputStore
from .job import (Prepared, RunTally, begin_run, expect_segments, finish_interrupted_run, now_iso, open_run_store,
                  prepare)

log = logging.getLogger(__name__)

WatchFn = Callable[[str, int, int, Any], None]
"""``watch(segment_id, done, total, result)``: sees every segment's blocks as they are recorded."""

_END = object()


class EarlySegment:
    """One segment's driver, started on a thread of its own before any flow task exists.

    The driver's block events wait in a queue until a task follows the segment
    (:meth:`follow`); ``watch``, when given, also sees each of them at once, in the
    driver's thread (the terminal's progress bar, which need not wait for the flow run), and
    ``tally`` (the run's :class:`~twinpass.job.RunTally`) counts them and notes the
    driver's outcomes.
    """

    def __init__(self, seg: SegmentWork, prep: Prepared, store: OutputStore, client: Any,
                 watch: WatchFn | None = None, tally: RunTally | None = None) -> None:
        self.seg = seg
        self._tally = tally if tally is not None else RunTally()
        self.watched = watch is not None
        """Whether a watcher has seen the driver's blocks already (a follower need not show them again)."""
        self._watch = watch
        self._events: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._outcomes: list[FileOutcome] | None = None
        self._error: BaseException | None = None
        self._ended = threading.Event()
        """Set once the driver has ended. Waited on instead of the thread: on Python 3.11 a
        ``Thread.join`` interrupted by Ctrl-C can mark the thread stopped while it still runs."""
        self._thread = threading.Thread(target=self._drive, args=(prep, store, client),
                                        name=f"twinpass-early-{seg.segment_id}"[:60], daemon=True)
        self._thread.start()

    def _event(self, done: int, total: int, res: Any) -> None:
        self._tally.block(self.seg.segment_id, res)
        self._events.put((done, total, res))
        if self._watch is not None:
            try:
                self._watch(self.seg.segment_id, done, total, res)
            except Exception:  # a display must never stop the blocks
                log.debug("a watcher of segment %s failed", self.seg.segment_id, exc_info=True)

    def _drive(self, prep: Prepared, store: OutputStore, client: Any) -> None:
        try:
            # The follower logs failed and cancelled blocks (a flow task, on its run logger);
            # for a driver never followed, log_unfollowed() does.
            self._outcomes = run_segment(self.seg, prep.designs[self.seg.sample_rate_hz], prep.cfg, store, client,
                                         on_block=self._event, log_blocks=False)
            self._tally.ended(self.seg.segment_id, self._outcomes)
        except BaseException as e:  # handed to the follower
            self._error = e
        finally:
            self._events.put(_END)
            self._ended.set()

    def follow(self, on_block: ProgressFn | None = None) -> list[FileOutcome]:
        """Wait for the driver, calling ``on_block`` in this thread for each of its blocks.

        Returns the driver's outcomes (as :func:`~twinpass.engine.run_segment` returns
        them) or raises what the driver raised. Events that came before the call are
        passed on first, in order. If ``on_block`` raises an exception, it is called no
        more, but this still waits for the driver to end before raising that exception: a
        retry of the segment must not run beside a driver still writing it. (An interrupt,
        Ctrl-C, is not held back: stopping the run stops the driver.)
        """
        failed: Exception | None = None
        while (event := self._events.get()) is not _END:
            if on_block is not None and failed is None:
                try:
                    on_block(*event)
                except Exception as e:  # raised once the driver has ended
                    failed = e
        self._ended.wait()
        if self._error is not None:
            raise self._error
        if failed is not None:
            raise failed
        assert self._outcomes is not None
        return self._outcomes

    def log_unfollowed(self) -> None:
        """Log the failed and cancelled blocks of a driver no task followed (after it has ended).

        On the engine's logger, as :func:`~twinpass.engine.run_segment` logs them; a
        follower logs them itself instead, so that each appears once.
        """
        errors = BlockErrorLog(self.seg.segment_id)
        with contextlib.suppress(queue.Empty):
            while (event := self._events.get_nowait()) is not _END:
                errors.block(event[2])
        errors.close()

    def join(self, timeout: float | None = None) -> bool:
        """Wait for the driver to end (at most ``timeout`` seconds); whether it has ended."""
        return self._ended.wait(timeout)


@dataclass
class HeadStart:
    """A run begun before its flow run (see the module notes); make one with :meth:`begin`.

    Attributes
    ----------
    run_id, started : str
        The run's id and start time (ISO 8601, UTC), used by the flow run that claims it.
    store : OutputStore
        Opened for writing, its run lock held.
    cleaned : int
        Partial chunk files removed.
    prep : Prepared
        The prepared run.
    client_start : ClientStart or None
        The cluster, when there are blocks to run.
    segments : dict
        :class:`EarlySegment` by segment id, one per segment with work, until its task takes it.
    tally : RunTally
        The blocks and outcomes of the run's drivers (these, and those of the flow run's
        tasks), for the record of a run stopped before its end.
    """

    cfg: JobConfig
    force: bool
    scheduler: str
    workers: int
    run_id: str
    started: str
    store: OutputStore
    cleaned: int
    prep: Prepared
    client_start: ClientStart | None
    segments: dict[str, EarlySegment] = field(default_factory=dict)
    tally: RunTally = field(default_factory=RunTally)
    _drivers: list[EarlySegment] = field(default_factory=list)
    _client: CancellableClient | None = None
    _lock: contextlib.ExitStack = field(default_factory=contextlib.ExitStack)
    _stopped: bool = False

    @classmethod
    def begin(cls, cfg: JobConfig, *, force: bool = False, scheduler: str | None = None,
              workers: int | None = None, watch: WatchFn | None = None) -> HeadStart:
        """Take the run's first steps now; returns with the segments' drivers running.

        Parameters are those of the flow call to come (``scheduler`` and ``workers``
        default to the configuration's ``[engine]`` settings), and ``watch``:
        ``watch(segment_id, done, total, result)`` called in the drivers' threads for each
        block recorded (the terminal's progress bar), before any task follows them.

        Raises
        ------
        TwinpassError
            What the flow body would raise at these steps (a locked or unusable store, an
            unreadable archive...); nothing is left held.
        KeyboardInterrupt
            Ctrl-C; once the run's root provenance is recorded (waiting for the cluster,
            starting the drivers), the run is recorded as stopped before its end, as the
            flow body records it. Nothing is left held: a cluster still starting is closed
            once its start ends.
        """
        check_run_overrides(scheduler, workers)
        run_id, started = uuid.uuid4().hex[:12], now_iso()
        scheduler, workers = scheduler or cfg.engine.scheduler, int(workers or cfg.engine.workers)
        store = open_run_store(cfg)
        with contextlib.ExitStack() as held:
            held.enter_context(store.lock(run_id))
            cleaned = store.clean_partials()
            prep = prepare(cfg, store, force=bool(force))
            busy = [w for w in prep.work if w.has_work]
            head = cls(cfg, bool(force), scheduler, workers, run_id, started, store, cleaned, prep,
                       ClientStart(scheduler, workers) if busy else None)
            held.callback(head.close)  # runs before the lock is released
            begin_run(store, prep)
            expect_segments(watch, busy)
            try:
                if head.client_start is not None:
                    head._client = CancellableClient(head.client_start.client())
                    for w in busy:  # one by one: if a later driver cannot start, close() stops those running
                        driver = EarlySegment(w, prep, store, head._client, watch, head.tally)
                        head.segments[w.segment_id] = driver
                        head._drivers.append(driver)
            except KeyboardInterrupt:  # Ctrl-C: recorded as stopped before its end, as a run of the flow would be
                head.stop_interrupted()
                raise
            head._lock = held.pop_all()  # held from now on until release() or withdraw()
        return head

    @property
    def client(self) -> CancellableClient | None:
        """The cluster's client as the drivers use it (None when there are no blocks to run)."""
        return self._client

    def matches(self, cfg: JobConfig, force: bool, scheduler: str | None, workers: int | None) -> bool:
        """Whether a flow call with these settings is the run this head start began."""
        return (cfg.digest() == self.cfg.digest() and bool(force) == self.force
                and (scheduler or cfg.engine.scheduler) == self.scheduler
                and int(workers or cfg.engine.workers) == self.workers)

    def take_segment(self, segment_id: str) -> EarlySegment | None:
        """The segment's driver, once (None for a segment not started here, or taken already).

        Raises
        ------
        RunStoppedError
            The head start has been stopped (:meth:`close`) and this task did not take the
            driver before: the segment must not start again on the closing cluster.
        """
        driver = self.segments.pop(segment_id, None)
        if driver is None and self._stopped:
            raise RunStoppedError.before_start(segment_id)
        return driver

    @contextlib.contextmanager
    def held(self) -> Iterator[HeadStart]:
        """The ``with`` block runs holding the run lock; on exit every driver has ended and the lock is released."""
        try:
            yield self
        finally:
            self.release()

    def close(self) -> None:
        """Stop the drivers still running and close the cluster (safe to repeat).

        Blocks not finished are cancelled (again, until every driver has ended: a driver
        may still be submitting), so their drivers record them as not done and return;
        then the cluster closes. After a normal run every driver has been followed to its
        end, and this only closes the cluster. The blocks of drivers no task took are
        logged here (:meth:`EarlySegment.log_unfollowed`); a task that comes for one of
        them afterwards is refused (:meth:`take_segment`).
        """
        self._stopped = True  # before the drivers are taken away, so that a late task sees it
        unfollowed = []
        with contextlib.suppress(KeyError):
            while True:  # one at a time: a task taking a segment meanwhile gets it whole
                unfollowed.append(self.segments.popitem()[1])
        if self._client is not None:
            self._client.cancel_until(self._drivers_ended)
        for driver in unfollowed:
            driver.log_unfollowed()
        if self.client_start is not None:
            self.client_start.close()

    def _drivers_ended(self, timeout: float = 0.0) -> bool:
        """Whether every driver has returned, waiting up to ``timeout`` seconds for each one still running."""
        return all(d.join(timeout) for d in self._drivers)

    def release(self) -> None:
        """:meth:`close`, then release the run lock (safe to repeat)."""
        self._lock.close()

    def stop_interrupted(self) -> None:
        """:meth:`close`, then record the run as stopped before its end (call it while the run lock is held)."""
        self.close()
        finish_interrupted_run(self.store, self.tally.result(self.run_id, self.started, self.prep), self.cfg)


_pending: HeadStart | None = None
_pending_lock = threading.Lock()


def offer(head: HeadStart) -> None:
    """Make ``head`` the head start the next :func:`claim` in this process can take."""
    global _pending
    with _pending_lock:
        previous, _pending = _pending, head
    if previous is not None:
        previous.release()


def claim(cfg: JobConfig, *, force: bool, scheduler: str | None, workers: int | None) -> HeadStart | None:
    """Take the offered head start if it is for this run; else stop any offered one and return None."""
    global _pending
    with _pending_lock:
        head, _pending = _pending, None
    if head is None:
        return None
    if head.matches(cfg, force, scheduler, workers):
        return head
    log.warning("a run begun for other settings was stopped; this run starts afresh")
    head.release()
    return None


def withdraw() -> None:
    """Stop the offered head start if no flow run took it (see :meth:`HeadStart.release`)."""
    global _pending
    with _pending_lock:
        head, _pending = _pending, None
    if head is not None:
        if not head._drivers_ended():
            log.warning("no flow run took over run %s; stopping it: its unfinished blocks are recorded as not "
                        "done, and the next run of the same configuration finishes them", head.run_id)
        head.stop_interrupted()  # the drivers have ended: the run is recorded as interrupted, then the lock released
        head.release()


__all__ = ["EarlySegment", "HeadStart", "claim", "offer", "withdraw"]
