"""Prefect flow and tasks: the archive run as seen on Prefect's dashboard.

``archive_run`` (flow name ``twinpass-archive-run``): design -> plan -> one task per
segment with work (each wraps the engine's Dask work for its blocks) -> finalise ->
report. Unchanged files are not run; one ``skip-unchanged`` task run, in state
"Skipped", lists them. A failed segment never stops the others; the flow ends Failed
naming the failed files, else in state ``LeftOut`` (type COMPLETED, :data:`STATE_LEFT_OUT`)
naming the inputs left out, if any, else Completed. Every future is resolved.

``twinpass run`` begins the run before the flow run exists (:mod:`twinpass.headstart`:
lock, preparation, cluster, segment drivers); the flow body takes it over, and each
segment task follows its running driver. Other callers (deployments, Python) run the body
from the start.

Ctrl-C (or an error leaving the body while segment tasks run) stops the run in this order:
no segment task starts or is retried any more (each ends in state Cancelled, its message
that of the ``RunStoppedError`` that says what was left undone), the
run's blocks are cancelled until every task driving or following a segment has returned
(its unfinished blocks recorded as cancelled), and only then does the cluster close.
A flow run of ``twinpass run`` cancelled from the Prefect server (the dashboard's Cancel,
``prefect flow-run cancel``) is stopped the same way (:mod:`twinpass.server_cancel`
notices it) and ends Cancelled, the run recorded as stopped before its end.

:func:`build_deployment` / :func:`serve_deployment` turn the flow into a scheduled
deployment (cron expression in a given time zone) served by this process.

Task parameters are passed through ``prefect.utilities.annotations.quote``: they hold no
futures, and without it Prefect walks every object inside them (the whole plan, every
file) to look for some, about 0.2 s per task call on a 24-file archive.

This is the only module (with :mod:`twinpass.prefect_blocks`) that imports prefect.
"""

from __future__ import annotations

from . import _prefect_env  # noqa: F401  (must precede the prefect import)

import contextlib
import contextvars
import dataclasses
import re
import threading
import time
import uuid
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator

import httpx
from prefect import flow, get_run_logger, task
from prefect.artifacts import (
    create_link_artifact,
    create_markdown_artifact,
    create_progress_artifact,
    create_table_artifact,
    update_progress_artifact,
)
from prefect.cache_policies import NO_CACHE
from prefect.runtime import flow_run as flow_run_runtime
from prefect.states import Cancelled, Completed, Failed
from prefect.utilities.annotations import quote

from .config import JobConfig, check_run_overrides, load_config
from .core.checks import was_cancelled
from .core.design import format_report
from .core.plan import fingerprint_changed
from .engine import (
    DONE,
    BlockErrorLog,
    CancellableClient,
    ClientStart,
    FileOutcome,
    SegmentWork,
    file_summary,
    retry_delays,
    run_segment,
    warm_compiled_loops,
    was_damaged,
    with_check_failures,
)
from .errors import (BlockFailedError, ChecksFailedError, ConfigError, DamagedInputError, FlowRunCancelledError,
                     RunStoppedError, TwinpassError, failure_text)
from .headstart import HeadStart, claim
from .heartbeats import flow_heartbeats
from .io.store import OutputStore
from .job import (Prepared, RunResult, RunTally, begin_run, expect_segments, finish_interrupted_run, finish_run,
                  now_iso, open_run_store, prepare)
from .server_cancel import CancelWatch, cancel_watch
from .status import retried_line

if TYPE_CHECKING:
    from prefect.deployments.runner import RunnerDeployment

FLOW_NAME = "twinpass-archive-run"
ARTIFACT_DESIGN = "twinpass-design"
ARTIFACT_FILES = "twinpass-files"
ARTIFACT_REPORT = "twinpass-report"
STATE_LEFT_OUT = "LeftOut"
"""Name of the final state (of type COMPLETED) of a flow run in which no file failed but input
files were left out (invalid input, or no filter for their sample rate): the dashboard shows
it apart from a clean run's ``Completed``, and automations can match it (event
``prefect.flow-run.LeftOut``). The command exits 3 for such a run."""

_CLIENTS_LOCK = threading.Lock()


def server_unreachable(error: object) -> bool:
    """Whether ``error`` says the Prefect API stopped answering: no connection, a timeout or a
    broken exchange (httpx's transport errors), or a server error (HTTP status 500-599)."""
    if isinstance(error, httpx.TransportError):
        return True
    return isinstance(error, httpx.HTTPStatusError) and error.response.status_code >= 500


_UNPUBLISHED: set[str] = set()
"""Flow runs (ids) whose dashboard artifacts are no longer sent: the server stopped answering."""


def _publish(what: str, create: Any, *args: Any, **kwargs: Any) -> Any:
    """``create(*args, **kwargs)``, an artifact showing ``what`` on the dashboard, in a task;
    returns what ``create`` returns (None when not created).

    The run's records are in the store, not on the dashboard: an artifact the server refuses
    is a warning and the run goes on, its outcome unchanged; when the Prefect server does not
    answer at all (after Prefect's own retries), the flow run's later artifacts are not tried
    either (each would wait for the same retries).
    """
    run_id = str(flow_run_runtime.id)
    if run_id in _UNPUBLISHED:
        return None
    try:
        return create(*args, **kwargs)
    except Exception as e:
        if server_unreachable(e):
            _UNPUBLISHED.add(run_id)
            get_run_logger().warning("could not show %s on the dashboard: the Prefect server does not answer "
                                     "(%s: %s); the run goes on, and its records are in the store",
                                     what, type(e).__name__, e)
        else:
            get_run_logger().warning("could not show %s on the dashboard (%s: %s); the run's records in the "
                                     "store stand (`twinpass status`)", what, type(e).__name__, e)
        return None


@dataclasses.dataclass
class _RunCluster:
    """The cluster the segment tasks of one flow run share, and the tasks using it.

    Tasks run in threads of the flow's process; the client is not passed as a task
    parameter but found here by key. ``drivers`` counts the tasks between
    :meth:`enter` and :meth:`leave` (those driving or following a segment's blocks); once
    ``stopping`` is set no task enters, so that :meth:`stop` can wait for those inside.
    """

    client: CancellableClient
    tally: RunTally
    """Blocks run by every attempt of each segment's task, and the outcomes of its last
    attempt: the run's summary counts them for a segment whose task failed or was retried,
    and the record of a stopped run is made of them."""
    head: HeadStart | None = None
    """The head start whose running segments the tasks follow, if any."""
    stopping: bool = False
    drivers: int = 0
    left: threading.Condition = dataclasses.field(default_factory=lambda: threading.Condition(_CLIENTS_LOCK))
    prepared: set[str] = dataclasses.field(default_factory=set)
    """Segments whose files a first attempt has prepared in the store (their block tables are
    current): a retry resumes them instead of starting over."""

    def enter(self) -> bool:
        """Count a task in (call holding ``_CLIENTS_LOCK``); False when the run is stopping."""
        if self.stopping:
            return False
        self.drivers += 1
        return True

    def leave(self) -> None:
        """Count a task out (it touches the cluster no more)."""
        with _CLIENTS_LOCK:
            self.drivers -= 1
            self.left.notify_all()

    def _drivers_ended(self, timeout: float = 0.0) -> bool:
        """Whether every task counted in has left, waiting up to ``timeout`` seconds for it."""
        with self.left:
            return self.left.wait_for(lambda: self.drivers == 0, timeout)

    def stop(self) -> None:
        """Refuse tasks from now on and cancel the run's blocks, round after round, until
        every task inside has returned (each records its unfinished blocks as cancelled)."""
        with _CLIENTS_LOCK:
            self.stopping = True
        self.client.cancel_until(self._drivers_ended)


# The clusters of the flow runs of this process, by key.
_RUNS: dict[str, _RunCluster] = {}


class _StopRequest:
    """A stop of one flow run asked from another thread (its flow run cancelled from the server).

    :meth:`ask` stops the run's segments (:meth:`_RunCluster.stop`) if they run, else makes
    them refuse to start once registered (:meth:`attach`); the flow body then ends the run
    as stopped before its end.
    """

    def __init__(self) -> None:
        self.asked = False
        self._run: _RunCluster | None = None

    def ask(self) -> None:
        """Stop the run; returns once every segment task inside has returned."""
        with _CLIENTS_LOCK:
            self.asked = True
            run = self._run
        if run is not None:
            run.stop()

    def attach(self, run: _RunCluster) -> None:
        """Register the run's cluster (call holding ``_CLIENTS_LOCK``); a stop asked already
        refuses its tasks at once."""
        self._run = run
        if self.asked:
            run.stopping = True


PROGRESS_INTERVAL_S = 3.0
"""Seconds between updates of a segment's progress artifact on the dashboard (and one at the
end). Each update costs the Prefect server about 12 ms of CPU, the run's own cores when the
server is local: at one a second, four segments running together cost about 0.5 s per 10 s."""

TERMINAL_PROGRESS: Any = None
"""Optional ``callable(segment_id, done, total, result)`` the CLI sets for a terminal progress bar
(told the segments to run first, when it has an ``expect`` method: :func:`twinpass.job.expect_segments`)."""


_EARLY: ClientStart | None = None
"""A local Dask client the command line started before its flow call (see
:func:`start_client_early`), for the next flow run with the same scheduler and workers."""


def start_client_early(scheduler: str | None, workers: int | None) -> None:
    """Start the local Dask cluster of the next flow call in this process now, on a thread.

    The command line calls it while Prefect's temporary server starts for a run of a saved
    configuration block (a run from a configuration file has begun already, with its own
    cluster: :mod:`twinpass.headstart`), so that the flow run finds its cluster up instead
    of starting it after preparing the archive. Only for the
    ``threads`` scheduler: worker processes would cost a run with nothing to filter (an
    unchanged archive) seconds of start-up. A client the flow run does not take is closed
    by :func:`close_early_client`.
    """
    global _EARLY
    if scheduler == "threads" and workers is not None and int(workers) >= 1:
        with _CLIENTS_LOCK:
            if _EARLY is None:
                _EARLY = ClientStart(scheduler, int(workers))


def close_early_client() -> None:
    """Close the client :func:`start_client_early` started, if no flow run took it."""
    global _EARLY
    with _CLIENTS_LOCK:
        early, _EARLY = _EARLY, None
    if early is not None:
        early.close()


def _client_start(scheduler: str, workers: int) -> ClientStart:
    """The early client if it matches, else a client starting now on its own thread."""
    global _EARLY
    with _CLIENTS_LOCK:
        early = _EARLY
        if early is not None and early.scheduler == scheduler and early.workers == int(workers):
            _EARLY = None
            return early
    return ClientStart(scheduler, workers)


@contextlib.contextmanager
def _shared_client(start: ClientStart, tally: RunTally, head: HeadStart | None = None,
                   stop: _StopRequest | None = None) -> Iterator[str]:
    """Register the started client (and the head start whose drivers the tasks follow) for
    the segment tasks under a new key, for the ``with`` block; the caller closes them.

    Left with an exception (Ctrl-C included), the run is stopped first (:meth:`_RunCluster.stop`):
    no task starts or retries its segment any more, and the blocks are cancelled until
    every task driving or following one has returned, so that the caller closes the
    cluster under none of them. ``stop``, when given, can stop the run from another thread.
    """
    key = uuid.uuid4().hex
    try:
        client = head.client if head is not None and head.client is not None else CancellableClient(start.client())
        run = _RunCluster(client, tally, head)
        with _CLIENTS_LOCK:
            _RUNS[key] = run
            if stop is not None:
                stop.attach(run)
        try:
            yield key
        except BaseException:
            run.stop()
            raise
    finally:
        with _CLIENTS_LOCK:
            _RUNS.pop(key, None)


def _as_resume(seg: SegmentWork) -> SegmentWork:
    """The segment with every file that has work set to finish its not-done blocks only."""
    files = tuple(f if f.action == "skip" else dataclasses.replace(f, action="resume") for f in seg.files)
    return dataclasses.replace(seg, files=files)


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9-]+", "-", text.lower()).strip("-")[:60] or "x"


@task(name="design-filters", cache_policy=NO_CACHE)
def design_task(prep: Prepared) -> dict[str, Any]:
    """Publish the design report (one per sample rate) as a markdown artifact."""
    logger = get_run_logger()
    parts = ["# twinpass design report", ""]
    for fs, d in sorted(prep.designs.items()):
        logger.info("design for %g Hz: %s order %d, halo %d samples (%.3g s)", fs, d.family, d.order,
                    d.effective_length, d.effective_length / fs)
        parts += [f"## {fs:g} Hz", "", "```text", format_report(d.report), "```", ""]
    for fs, err in prep.design_errors.items():
        logger.error("no design for %g Hz: %s", fs, err)
        parts += [f"## {fs:g} Hz: no design", "", err, ""]
    _publish("the design report", create_markdown_artifact, "\n".join(parts), key=ARTIFACT_DESIGN,
             description="Overall and per-pass response")
    return {f"{fs:g}": d.report for fs, d in prep.designs.items()}


def _worth_retrying(task: Any, task_run: Any, state: Any) -> bool:
    """Retry a failed segment unless only checks failed (the same blocks give the same
    figures), its blocks failed only on damaged input (a retry reads the same), or the
    configuration does not suit it (e.g. blocks too large for the memory budget). A segment
    of a stopped run ends Cancelled, which is never retried."""
    return not isinstance(getattr(state, "data", None), (ChecksFailedError, DamagedInputError, ConfigError))


@task(name="filter-segment", cache_policy=NO_CACHE, retries=1, retry_delay_seconds=5.0,
      retry_condition_fn=_worth_retrying)
def filter_segment(seg: SegmentWork, prep: Prepared, store: OutputStore, client_key: str) -> Any:
    """Run every block a segment needs on the shared Dask client; fail naming failed files.

    Returns the segment's :class:`FileOutcome` list, or a Cancelled state when the run was
    stopped (Ctrl-C, a cancelled flow run) before the segment finished: its message says
    what was left undone, and the dashboard shows the task cancelled, not failed.

    A retry reruns only the blocks that are not yet done: once a first attempt has
    prepared the segment's files (and invalidated the blocks a neighbour's change reaches),
    their block tables are current, so a retry resumes every file instead of resetting it.
    """
    try:
        return _run_segment_task(seg, prep, store, client_key)
    except RunStoppedError as stopped:
        return Cancelled(message=str(stopped))


def _run_segment_task(seg: SegmentWork, prep: Prepared, store: OutputStore, client_key: str) -> list[FileOutcome]:
    """The body of :func:`filter_segment`; :class:`RunStoppedError` when the run was stopped."""
    with _CLIENTS_LOCK:
        run = _RUNS.get(client_key)
        if run is None or not run.enter():  # the flow body is stopping the run, or has closed its cluster
            raise RunStoppedError.before_start(seg.segment_id)
        retry = seg.segment_id in run.prepared
    try:
        return _filter_segment(seg, prep, store, run, retry)
    except RunStoppedError:
        raise
    except Exception as exc:
        if run.stopping:  # whatever went wrong, the run is stopping: the segment is not retried
            raise RunStoppedError(f"segment {seg.segment_id}: the run was stopped while this segment ran "
                                  f"({type(exc).__name__}); finished blocks are kept; rerun to finish it") from exc
        raise
    finally:
        run.leave()


def _filter_segment(seg: SegmentWork, prep: Prepared, store: OutputStore, run: _RunCluster,
                    retry: bool) -> list[FileOutcome]:
    """The body of :func:`filter_segment` for a task counted in on the run's cluster."""
    logger = get_run_logger()
    cfg = prep.cfg
    client, head = run.client, run.head
    # Taken first thing: a driver a stopped head start gave up is refused (RunStoppedError),
    # so that the segment does not start again on a cluster being closed.
    early = head.take_segment(seg.segment_id) if head is not None else None
    if retry:
        seg = _as_resume(seg)
        logger.info("segment %s: retry; running only the blocks not done yet", seg.segment_id)
    design = prep.designs[seg.sample_rate_hz]
    todo = [f.relpath for f in seg.files if f.action != "skip"]
    logger.info("segment %s: %d file(s) to filter: %s", seg.segment_id, len(todo), ", ".join(todo))
    shown = f"blocks of segment {seg.segment_id}" + (" not done before (retry)" if retry else "")
    progress = DashboardProgress(_publish(f"the progress of segment {seg.segment_id}", create_progress_artifact, 0.0,
                                          description=shown), logger)
    last = [time.monotonic()]
    blocks_done = [0, 0]  # blocks recorded done (passed or warned), blocks to run
    block_errors = BlockErrorLog(seg.segment_id, logger)
    terminal = TERMINAL_PROGRESS if early is None or not early.watched else None  # else shown as they came

    def on_block(done: int, total: int, res: Any) -> None:
        if early is None:  # a driver begun before the flow run counts its own blocks
            run.tally.block(seg.segment_id, res)
        # Blocks are submitted only after every file of the segment is prepared.
        if done == 1:
            with _CLIENTS_LOCK:
                run.prepared.add(seg.segment_id)
        if terminal is not None:
            terminal(seg.segment_id, done, total, res)
        block_errors.block(res)
        blocks_done[0] += res.status in DONE
        blocks_done[1] = total
        now = time.monotonic()
        if done < total and now - last[0] >= PROGRESS_INTERVAL_S:  # its share done is set once it ends
            last[0] = now
            progress.show(100.0 * done / max(total, 1))

    try:
        if early is not None:  # begun before the flow run: follow it (a retry runs as usual)
            outcomes = early.follow(on_block)
        else:
            outcomes = run_segment(seg, design, cfg, store, client, on_block=on_block, log_blocks=False)
    except BaseException as e:
        progress.close(*progress_at_end(shown, *blocks_done, None, run.stopping or isinstance(e, RunStoppedError)))
        raise
    finally:
        block_errors.close()
    run.tally.ended(seg.segment_id, outcomes)
    progress.close(*progress_at_end(shown, *blocks_done, outcomes, run.stopping))
    failed = [o for o in outcomes if o.status == "failed"]
    for o in outcomes:
        if o.status == "complete":
            logger.info("%s complete: %d block(s) run, %d done", o.relpath, o.blocks_run, o.blocks_done)
    if failed:
        names = "; ".join(f"{o.relpath} ({o.blocks_failed} block(s) not done: "
                          + (next(iter(o.errors.values())).splitlines()[0] if o.errors
                             else o.check_failures.summary if o.check_failures is not None else "checks failed")
                          + ")" for o in failed)
        reasons = [str(e) for o in failed for e in o.errors.values()]
        if run.stopping or (reasons and all(was_cancelled(r) for r in reasons)):
            raise RunStoppedError(f"segment {seg.segment_id}: the run was stopped before "
                                  f"{sum(o.blocks_failed for o in failed)} block(s) finished; they are recorded as "
                                  "not done; rerun to finish them")
        if not any(o.errors for o in failed):  # every block ran; only their checks failed
            raise ChecksFailedError(f"segment {seg.segment_id}: {names}; not retried (the same blocks give "
                                    "the same figures): see `twinpass status` or the report")
        if all(was_damaged(r) for r in reasons):  # (and checks failed): a retry reads the same
            raise DamagedInputError(f"segment {seg.segment_id}: {names}; not retried (its input is damaged: a "
                                    "retry reads the same)")
        raise BlockFailedError(f"segment {seg.segment_id}: {names}")
    return outcomes


class DashboardProgress:
    """A segment's progress artifact, updated from a thread of its own.

    The blocks never wait on the Prefect API: :meth:`show` only notes the latest
    percentage, and the sender thread passes on the latest one it finds (older ones are
    dropped). Prefect's client retries a failed request for about a minute, so an update to
    a server that went away would otherwise hold up the segment's driver that long for each
    block. After a failed update the rest are dropped, with one warning; with no artifact
    (``artifact_id`` None: it could not be created) none is sent. The thread runs in a copy
    of the task's context (Prefect's settings and run context live there).
    """

    CLOSE_WAIT_S = 10.0
    """Seconds :meth:`close` waits for the final update before going on without it."""

    def __init__(self, artifact_id: Any, logger: Any) -> None:
        self.artifact_id = artifact_id
        self._logger = logger
        self._latest: tuple[float, str | None] | None = None
        """The update to send: percentage, and a new description (None: unchanged)."""
        self._closed = False
        self._failed = artifact_id is None  # not created: nothing to update
        self._cv = threading.Condition()
        context = contextvars.copy_context()
        self._thread = threading.Thread(target=context.run, args=(self._send,), daemon=True,
                                        name="twinpass-dashboard-progress")
        self._thread.start()

    def show(self, percent: float) -> None:
        """Note ``percent`` (0-100) for the sender; returns at once."""
        with self._cv:
            self._latest = (float(percent), None)
            self._cv.notify()

    def close(self, percent: float | None, description: str | None = None, *, wait_s: float | None = None) -> None:
        """Stop the sender, first showing ``percent`` (0-100: the share of the segment's
        blocks done at its end) and ``description`` if given (None: the artifact's own stays),
        or with ``percent`` None dropping any pending update; wait for it up to ``wait_s``
        seconds (default :attr:`CLOSE_WAIT_S`). Only the first call counts."""
        with self._cv:
            if self._closed:
                return
            self._latest = None if percent is None else (float(percent), description)
            self._closed = True
            self._cv.notify()
        self._thread.join(self.CLOSE_WAIT_S if wait_s is None else wait_s)

    def _send(self) -> None:
        while True:
            with self._cv:
                while self._latest is None and not self._closed:
                    self._cv.wait()
                if self._latest is None:
                    return
                (percent, description), self._latest = self._latest, None
            if self._failed:
                continue
            try:
                update_progress_artifact(self.artifact_id, percent, description=description)
            except Exception as e:  # the blocks and their records do not depend on the dashboard
                self._failed = True
                self._logger.warning("could not update the progress shown on the dashboard (%s: %s); the segment "
                                     "goes on without it", type(e).__name__, e)


def progress_at_end(shown: str, done: int, total: int, outcomes: list[FileOutcome] | None,
                    stopping: bool) -> tuple[float, str | None]:
    """What a segment's progress artifact shows once its task's attempt ends: (percentage,
    description or None to keep the artifact's own).

    The percentage is 100 when no file failed, else the share of the ``total`` blocks the
    attempt had to run that are done (``done`` recorded passed or warned, less the blocks
    its failed files have not done: a seam check may fail blocks after they ran). When the attempt raised (``outcomes`` None) or a file failed, the description
    (``shown`` is the artifact's own) says failed, or stopped when the run was
    (``stopping``) or every error of its failed files is a cancelled block.
    """
    failed = [o for o in outcomes or [] if o.status == "failed"]
    if outcomes is not None and not failed:
        return 100.0, None
    if failed:
        done = min(done, total - sum(o.blocks_failed for o in failed))
    done = max(0, done)
    percent = 100.0 * done / total if total else 0.0
    reasons = [str(e) for o in failed for e in o.errors.values()]
    if stopping or (reasons and all(was_cancelled(r) for r in reasons)):
        return percent, f"{shown}: stopped, {done} of {total} done (the next run does the rest)"
    return percent, f"{shown}: failed, {done} of {total} done"


@task(name="skip-unchanged", cache_policy=NO_CACHE)
def skip_unchanged(relpaths: list[str]) -> Any:
    """Say on the dashboard which files were left alone because nothing changed."""
    get_run_logger().info("%d unchanged file(s) skipped", len(relpaths))
    shown = ", ".join(relpaths[:20]) + (f" and {len(relpaths) - 20} more" if len(relpaths) > 20 else "")
    return Completed(name="Skipped", message=f"{len(relpaths)} unchanged file(s) skipped: {shown}",
                     data=relpaths)


FIGURE_COLUMNS = {"worst passband dev (dB)": "passband_dev_db", "worst phase (deg)": "phase_deg",
                  "stopband att (dB)": "stopband_att_db", "seam mismatch": "seam_mismatch"}
"""The per-file table's figure columns: the worst of the file's blocks (summary keys of
:func:`~twinpass.core.checks.summarise`)."""


def _recorded(store: OutputStore, o: FileOutcome) -> FileOutcome:
    """An unchanged file's outcome with its blocks, blocks done and check summary as the
    store recorded them when it was made complete (its ``checks`` attribute: the outcome's
    own summary when the plan's record gave it, else read from the store), when the outcome
    has no block counts; unreadable attributes leave it as it is."""
    if o.status != "skipped" or o.blocks:
        return o
    summary = o.summary or None
    if summary is None:
        try:
            summary = store.array_attrs(o.array_name).get("checks")
        except Exception:
            return o
    if not isinstance(summary, dict) or "blocks" not in summary:
        return o
    blocks = int(summary["blocks"])
    done = int(summary.get("blocks_pass") or 0) + int(summary.get("blocks_warn") or 0)
    return dataclasses.replace(o, blocks=blocks, blocks_done=done, blocks_failed=blocks - done, summary=summary)


def files_table(store: OutputStore, result: RunResult, durations: dict[str, float]) -> list[dict[str, Any]]:
    """The rows of the per-file table artifact, one per file of the run, then one per input left out.

    ``reason``: why a file failed (:meth:`~twinpass.job.RunResult.failure_reasons`) or was
    left out (reason and remedy), in one line, as ``twinpass status`` says them. ``blocks``,
    ``blocks done`` (passed or warned) and ``blocks not done``: the file's block table at
    the run's end (an unchanged file's as recorded when it was made complete). ``blocks
    run``: blocks of the file this run ran, each once however often a retry ran it again;
    ``blocks retried``: those done only after a failed attempt
    (:meth:`~twinpass.job.RunTally.retried`). The figures are the worst of the file's blocks.
    """
    reasons = result.failure_reasons()
    rows = []
    for o in (_recorded(store, o) for o in result.outcomes):
        s = o.summary or {}
        reason = reasons.get(o.relpath) if o.status == "failed" else None
        rows.append({
            "file": o.relpath, "status": o.status, "reason": _one_line(reason), "blocks": o.blocks,
            "blocks done": o.blocks_done, "blocks not done": o.blocks_failed,
            "blocks run": o.blocks_run - o.blocks_rerun, "blocks retried": o.blocks_retried,
            "seconds": round(durations.get(o.relpath, 0.0), 2),
            **{column: s.get(key) for column, key in FIGURE_COLUMNS.items()},
        })
    for bad in result.invalid:
        rows.append({"file": bad.relpath, "status": "invalid", "reason": _one_line(bad.explained), "blocks": 0,
                     "blocks done": 0, "blocks not done": 0, "blocks run": 0, "blocks retried": 0, "seconds": 0.0,
                     **{column: None for column in FIGURE_COLUMNS}})
    return rows


def _one_line(text: str | None) -> str | None:
    return None if text is None else " ".join(text.split())


@task(name="finalize-run", cache_policy=NO_CACHE)
def finalize_task(store: OutputStore, result: RunResult, cfg: JobConfig, durations: dict[str, float]) -> None:
    """Record the run in the store and publish the per-file table (:func:`files_table`; a
    table that cannot be published is logged as a warning: the run's outcome is in its records)."""
    finish_run(store, result, cfg)
    _publish("the per-file table", create_table_artifact, files_table(store, result, durations), key=ARTIFACT_FILES,
             description=f"twinpass run {result.run_id}: one row per file; blocks as its block table records them "
                         "(blocks run: each once, however often a retry ran it)")


@task(name="write-report", cache_policy=NO_CACHE)
def report_task(cfg: JobConfig) -> Any:
    """Write the HTML report beside the store and link it on the dashboard; returns its path.

    A report that cannot be written ends the task run Failed, its message saying why and
    what to do (:func:`~twinpass.report_data.report_failure`); the flow body reports it
    without changing the run's outcome.
    """
    from .report_data import report_failure, write_report

    try:
        path = write_report(cfg)
    except Exception as e:
        get_run_logger().debug("the report was not written", exc_info=True)
        return Failed(message=report_failure(cfg, e))
    _publish("the report's link", create_link_artifact, Path(path).resolve().as_uri(), link_text="twinpass report",
             key=ARTIFACT_REPORT, description="Self-contained HTML report")
    return str(path)


def _write_report(cfg: JobConfig) -> tuple[str | None, str | None]:
    """Run :func:`report_task` after the run is recorded: (the report's path, None), or
    (None, what went wrong and what to do) when it was not written, logged as a warning."""
    written = report_task(quote(cfg), return_state=True)
    value = written.result(raise_on_failure=False)
    if written.is_completed() and isinstance(value, str):
        return value, None
    problem = written.message or f"{type(value).__name__}: {value}"
    get_run_logger().warning("the report was not written: %s", problem)
    return None, problem


def load_job(config_path: str | None, config_block: str | None) -> JobConfig:
    """The run's configuration: a TOML file, or a saved :class:`~twinpass.prefect_blocks.TwinpassJob` block.

    Raises
    ------
    ConfigError
        Neither or both given, no block of that name on the Prefect server, or a bad
        configuration.
    """
    if config_path and config_block:
        raise ConfigError(f"give config_path ({config_path}) or config_block ({config_block}), not both")
    if config_block:
        from .prefect_blocks import TwinpassJob

        try:
            block = TwinpassJob.load(config_block)
        except ValueError as e:  # Prefect's "Unable to find block document named ..."
            raise ConfigError(f"no TwinpassJob block named {config_block!r} on the Prefect server ({e}); save one "
                              f"with `twinpass save CONFIG --name {config_block}`, or list them with "
                              "`prefect block ls`") from None
        return block.to_job_config()
    if not config_path:
        raise ConfigError("no configuration: give config_path (a twinpass TOML file) or config_block "
                          "(the name of a saved TwinpassJob block)")
    return load_config(config_path)


@flow(name=FLOW_NAME, log_prints=False, validate_parameters=True)
def archive_run(config_path: str | None = None, force: bool = False, scheduler: str | None = None,
                workers: int | None = None, config_block: str | None = None, report: bool = True) -> dict[str, Any]:
    """Zero-phase filter an archive into its Zarr store, rerunning only what changed.

    Parameters
    ----------
    config_path : str, optional
        Path of a twinpass TOML configuration.
    force : bool
        Reprocess every file, changed or not.
    scheduler : str, optional
        ``threads``, ``processes`` or a Dask scheduler address; default from the config.
    workers : int, optional
        Local Dask workers; default from the config.
    config_block : str, optional
        Name of a saved :class:`~twinpass.prefect_blocks.TwinpassJob` block to use instead
        of ``config_path``.
    report : bool
        Write the HTML report at the end.

    Returns
    -------
    dict
        ``run_id``, ``counts`` (files per status, ``blocks_run``, ``blocks_retried``), ``failed``
        and ``invalid`` (input paths), ``retried`` (blocks done only after a failed attempt, by
        input path), ``store``, ``report`` (path or None) and ``report_error`` (why the
        report asked for could not be written, and what to do; None if it was, or if none
        was asked for: the run's outcome stands either way, and the state's message says so). When files fail the flow
        ends Failed, naming them, with this summary as the state's data; when none failed
        but inputs were left out, in a COMPLETED state named ``LeftOut`` (:data:`STATE_LEFT_OUT`)
        whose message names them. When the blocks ended but the run could not be recorded in
        the store (its file system gone read-only, say), the flow ends Failed, its message
        :data:`RUN_UNRECORDED` and the store's error, with this summary (no report) and that
        error under ``unrecorded`` as the state's data.
    """
    stop = _StopRequest()
    # Heartbeats, and the watch for a cancel from the server: only when the caller asked for
    # them (see twinpass.heartbeats and twinpass.server_cancel).
    with flow_heartbeats(), cancel_watch(stop.ask) as watch:
        try:
            ended = _archive_run(config_path, force, scheduler, workers, config_block, report, stop, watch)
        except FlowRunCancelledError as e:
            return Cancelled(message=str(e))
        except BaseException as e:
            # An error ending a flow run that is being cancelled from the server: the server
            # accepts no final state but Cancelled for it.
            if isinstance(e, (KeyboardInterrupt, SystemExit)) or server_unreachable(e) or not watch.read_now():
                raise
            return Cancelled(message=f"{CANCELLED_FROM_SERVER}; the run was stopped before its end "
                                     f"({type(e).__name__}: {e}); finished blocks are kept, rerun to finish the rest")
        if watch.read_now():  # too late to stop anything: the run is recorded, its outcome stands
            summary = ended.data if hasattr(ended, "data") else ended
            return Cancelled(message=f"{CANCELLED_FROM_SERVER} after the run was recorded; its outcome stands "
                                     "(`twinpass status`)", data=summary)
        return ended


CANCELLED_FROM_SERVER = "the flow run was cancelled from the Prefect server"
"""How the message of a flow run of the command line cancelled from the server begins."""


def _archive_run(config_path: str | None, force: bool, scheduler: str | None, workers: int | None,
                 config_block: str | None, report: bool, stop: _StopRequest | None = None,
                 watch: CancelWatch | None = None) -> Any:
    """The body of :func:`archive_run` (same parameters and result).

    ``stop`` stops the run from another thread, and ``watch`` tells whether the flow run is
    being cancelled from the server: the run then ends as stopped before its end (recorded
    so in the store), raising :class:`FlowRunCancelledError`.
    """
    stop = stop if stop is not None else _StopRequest()
    watch = watch if watch is not None else CancelWatch()

    def cancelled() -> FlowRunCancelledError:
        return FlowRunCancelledError(f"{CANCELLED_FROM_SERVER}; the run was stopped before its end: finished blocks "
                                     "are kept, rerun to finish the rest")

    logger = get_run_logger()
    cfg = load_job(config_path, config_block)
    check_run_overrides(scheduler, workers)  # before the store is locked or the run recorded
    # A run the command line began before this flow run existed (twinpass.headstart), if it
    # is this one: its lock, preparation, root record, cluster and running segments.
    head = claim(cfg, force=force, scheduler=scheduler, workers=workers)
    if head is not None:
        run_id, started, store, held = head.run_id, head.started, head.store, head.held()
    else:
        run_id, started = uuid.uuid4().hex[:12], now_iso()
        store = open_run_store(cfg)
        held = store.lock(run_id)
    durations: dict[str, float] = {}
    failed_files: list[str] = []
    with held:
        for gone in store.stale_locks_recovered:  # said on the terminal by the store; here on the dashboard
            logger.warning("recovered a stale lock on the output store: %s is no longer running", gone.describe())
            _crash_flow_run_of(store, gone, run_id)
        _note_flow_run(store)
        cleaned = store.clean_partials() if head is None else head.cleaned
        if cleaned:
            logger.warning("removed %d partial chunk file(s) left by an interrupted run", cleaned)
        prep = prepare(cfg, store, force=force) if head is None else head.prep
        for bad in prep.invalid:
            logger.error("left out %s: %s", bad.relpath, bad.explained)
        for fp in prep.plan.removed:
            logger.warning("%s: %s", fp.relpath, fp.reason)
        for note in prep.plan.notes:
            logger.warning("note: %s", note)
        busy = [w for w in prep.work if w.has_work]
        expect_segments(TERMINAL_PROGRESS, busy)
        if head is not None:
            start = head.client_start
        elif busy:  # the cluster starts on its own thread while the design task and the run's records go
            start = _client_start(scheduler or cfg.engine.scheduler, workers or cfg.engine.workers)
        else:
            start = None
        if start is None:
            close_early_client()  # nothing to filter here: a cluster the command started is not needed
        outcomes: list[FileOutcome] = []
        tally = head.tally if head is not None else RunTally()
        begun = head is not None
        try:
            # Closed on the way out: a head start stops its drivers before its cluster closes.
            with contextlib.closing(head or start) if start is not None else contextlib.nullcontext():
                design_task(quote(prep))
                if head is None:
                    begin_run(store, prep)
                    begun = True
                unchanged = [f.relpath for w in prep.work for f in w.files if f.action == "skip"]
                idle = [w for w in prep.work if not w.has_work]
                # Unchanged files keep the check summary their record holds (the dashboard's table).
                records = prep.plan.records()
                outcomes += [FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped",
                                         summary=dict(getattr(records.get(f.relpath), "checks", None) or {}))
                             for w in idle for f in w.files]
                if unchanged:
                    skip_unchanged(quote(unchanged))
                if start is not None:
                    if stop.asked:
                        raise cancelled()
                    done, failed_files, durations = _filter_segments(busy, prep, store, start, tally, head, stop)
                    outcomes.extend(done)
            # A cancel from the server stops the run until it is recorded as finished (the
            # server accepts no final state but Cancelled for the flow run).
            if stop.asked or watch.read_now():
                raise cancelled()
        except BaseException:  # Ctrl-C (or an error ending the run): recorded as interrupted, then raised
            if begun:  # every driver has returned (the cluster is closed): what they did is in the tally
                finish_interrupted_run(store, tally.result(run_id, started, prep), cfg)
            raise
        result = RunResult.ending_now(run_id, started, prep, outcomes)
        retried = retried_line(result.retried())
        if retried:
            logger.warning(retried)
        unrecorded: str | None = None
        try:
            finalize_task(quote(store), quote(result), quote(cfg), quote(durations))
        except TwinpassError as e:  # the store's own error: the run ends with it, its summary kept
            unrecorded = str(e)
    summary = {"run_id": run_id, "counts": result.counts(), "failed": failed_files,
               "failed_reasons": result.failure_reasons(), "warned": result.warnings(), "retried": result.retried(),
               "invalid": [b.relpath for b in prep.invalid], "store": cfg.store_location, "report": None,
               "report_error": None}
    if unrecorded is not None:  # no report: it would show the run recorded before this one
        return Failed(message=f"{RUN_UNRECORDED}{unrecorded}", data={**summary, "unrecorded": unrecorded})
    # The run is recorded: a report that cannot be written is said, and changes nothing else.
    report_path, report_error = _write_report(cfg) if report else (None, None)
    summary.update(report=report_path, report_error=report_error)
    also = f"{REPORT_UNWRITTEN}{report_error}" if report_error else ""
    if failed_files:
        return Failed(message=f"{len(failed_files)} file(s) failed: {', '.join(failed_files)}{also}", data=summary)
    if prep.invalid:
        return Completed(name=STATE_LEFT_OUT, message=left_out_message(prep, cfg) + also, data=summary)
    if report_error:
        return Completed(message=f"the report was not written: {report_error}", data=summary)
    return summary


RUN_UNRECORDED = "the run could not be recorded in the output store: "
"""What the message of a flow run whose record could not be written begins with, followed by
the store's error; its state's data is the summary, with that error under ``unrecorded``."""


def _api_url() -> str:
    """The API URL of the Prefect server this flow run belongs to ("" when none is set)."""
    from prefect.settings import PREFECT_API_URL

    return str(PREFECT_API_URL.value() or "")


def _note_flow_run(store: OutputStore) -> None:
    """Note this flow run beside the store's run lock, for a run that may recover the lock
    should this process die (see :func:`_crash_flow_run_of`); a note that cannot be written
    is a warning."""
    try:
        store.note_flow_run(str(flow_run_runtime.id), _api_url())
    except Exception as e:
        get_run_logger().warning("could not note this flow run beside the store's lock (%s: %s); should this "
                                 "process die, the next run cannot mark the flow run crashed", type(e).__name__, e)


def _crash_flow_run_of(store: OutputStore, gone: Any, run_id: str) -> None:
    """Set the flow run of ``gone`` (the holder of a stale lock this run recovered: a run
    whose process died) to Crashed on the Prefect server, if it noted one on this same
    server (same API URL) and it has not ended there; else leave it. A server that refuses
    is a warning: the run goes on."""
    from prefect import get_client
    from prefect.states import Crashed

    noted = store.noted_flow_run(gone.run_id)
    if noted is None or not noted["api_url"] or noted["api_url"] != _api_url():
        return
    logger = get_run_logger()
    try:
        with get_client(sync_client=True) as client:
            dead = client.read_flow_run(uuid.UUID(noted["flow_run_id"]))
            if dead.state is None or dead.state.is_final():
                return
            client.set_flow_run_state(dead.id, Crashed(message=(
                f"the process of twinpass {gone.describe()} ended before this flow run did; run {run_id} "
                f"recovered its stale lock on the output store {store.location} (flow run "
                f"{flow_run_runtime.id}); rerun to finish what it left")), force=True)
    except Exception as e:
        logger.warning("could not set flow run %s of %s to Crashed (%s: %s); the dashboard may keep showing it "
                       "running", noted["flow_run_id"], gone.describe(), type(e).__name__, e)
        return
    logger.warning("set flow run %s (%s) of %s to Crashed: its process is gone", noted["flow_run_id"], dead.name,
                   gone.describe())


REPORT_UNWRITTEN = "; the report was not written: "
"""What a flow run's message adds, followed by the reason, when its report could not be written."""

LEFT_OUT_NAMED = 3
"""Inputs left out that the message of a flow run in state :data:`STATE_LEFT_OUT` names, with their reasons."""
REASON_CHARS = 200
"""Characters of each reason shown there (the rest is in ``twinpass status``)."""


def left_out_message(prep: Prepared, cfg: JobConfig) -> str:
    """The message of a flow run that left inputs out: how many, the first few with their
    reasons (shortened to :data:`REASON_CHARS`), and where the full list is."""
    named = []
    for bad in prep.invalid[:LEFT_OUT_NAMED]:
        reason = bad.reason if len(bad.reason) <= REASON_CHARS else bad.reason[:REASON_CHARS - 3] + "..."
        named.append(f"{bad.relpath} ({reason})")
    more = len(prep.invalid) - len(named)
    return (f"{len(prep.invalid)} input(s) left out, not filtered: " + "; ".join(named)
            + (f"; and {more} more" if more > 0 else "")
            + f". `twinpass status {cfg.store_location}` lists them with the remedy (a file left out on purpose "
            "belongs in [archive] exclude)")


def _filter_segments(busy: list[SegmentWork], prep: Prepared, store: OutputStore, start: ClientStart,
                     tally: RunTally, head: HeadStart | None = None, stop: _StopRequest | None = None
                     ) -> tuple[list[FileOutcome], list[str], dict[str, float]]:
    """One filter-segment task per segment with work, all resolved: (outcomes, failed files, seconds per file).

    ``tally`` sees every block and every task's outcomes as they come. With a head start,
    each task follows its segment's running driver instead of starting one. ``stop``, when
    given, can stop the segments from another thread (see :class:`_StopRequest`).
    """
    logger = get_run_logger()
    cfg = prep.cfg
    outcomes: list[FileOutcome] = []
    failed_files: list[str] = []
    durations: dict[str, float] = {}
    seg_task = filter_segment.with_options(
        retries=cfg.flow.retries,
        retry_delay_seconds=retry_delays(max(cfg.flow.retries, 1), cfg.flow.retry_delay_seconds),
    )
    with _shared_client(start, tally, head, stop) as key:
        futures = []
        for w in busy:
            futures.append((w, time.perf_counter(),
                            seg_task.with_options(task_run_name=f"filter-{_slug(w.segment_id)}")
                            .submit(quote(w), quote(prep), quote(store), key)))
        # Resolve every future, failed or not, before deciding the run's outcome.
        for w, t0, fut in futures:
            value = fut.result(raise_on_failure=False)
            secs = time.perf_counter() - t0
            state = fut.state
            if state.is_completed() and isinstance(value, list):
                # Blocks run by every attempt: a retry's own outcomes count only its own.
                outs = tally.with_blocks(w.segment_id, value)
            else:
                outs = with_check_failures(tally.with_blocks(w.segment_id, _outcomes_from_store(store, w)), w, store,
                                           prep.designs[w.sample_rate_hz], cfg)
                # A file with no error or check failure of its own failed with its task: say why.
                why = failure_text(value) if isinstance(value, BaseException) else state.message or state.name
                outs = [dataclasses.replace(o, errors={-1: why}) if o.status == "failed" and not any(o.errors.values())
                        and o.check_failures is None else o for o in outs]
                bad = [o.relpath for o in outs if o.status == "failed"]
                if not (stop is not None and stop.asked and state.is_cancelled()):  # a stop: said by the task
                    logger.error("segment %s failed (%s); failed file(s): %s", w.segment_id,
                                 state.message or state.name, ", ".join(bad))
                failed_files += bad
            for o in outs:
                durations[o.relpath] = o.seconds or secs
            outcomes.extend(outs)
    return outcomes, failed_files, durations


def preload(scheduler: str | None) -> None:
    """Load now what the first flow call and its first block would load.

    A flow call makes Prefect import its flow and task engines and serialise the flow's
    parameters (which imports FastAPI's encoders); the first segment with blocks imports
    Dask's ``distributed`` for its client (about 0.1 s); with the ``threads`` scheduler the
    first block loads the engine's compiled loops in this process (and checks them against
    scipy's). Together about 0.8 s. The command line calls this while the temporary Prefect
    server starts, when it would otherwise wait, so that the run starts that much sooner
    once the server answers. Nothing is started here (the run's blocks may be running
    meanwhile: :mod:`twinpass.headstart`; or the command line starts a threads cluster
    beside it with :func:`start_client_early`).

    Parameters
    ----------
    scheduler : str or None
        The run's Dask scheduler (``threads``, ``processes`` or an address), None if not
        known yet. The compiled loops are loaded only for ``threads``, as
        :func:`~twinpass.engine.dask_client` does: worker processes load their own.
    """
    import prefect.flow_engine  # noqa: F401
    import prefect.task_engine  # noqa: F401
    import prefect.utilities.visualization  # noqa: F401

    import distributed  # noqa: F401

    archive_run.serialize_parameters({"config_path": None, "force": False})
    if scheduler == "threads":
        warm_compiled_loops()


def _outcomes_from_store(store: OutputStore, seg: SegmentWork) -> list[FileOutcome]:
    """Per-file outcomes of a segment whose task failed, read back from the store (blocks
    run: 0; :meth:`~twinpass.job.RunTally.with_blocks` counts them).

    Each file's blocks, blocks done and check summary are its block table's
    (:func:`~twinpass.engine.file_summary`). A file counts as complete only when the store
    marks it complete for its current input (same fingerprint) and every block is done.
    When the task failed but no file looks failed by that measure (the failure came from
    outside the blocks), every file the segment had to compute counts as failed.
    """
    out = []
    for f in seg.files:
        if f.action == "skip":
            out.append(FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped"))
            continue
        try:
            t = store.read_block_table(f.array_name, figures=True, seams=False)
            attrs = store.array_attrs(f.array_name)
        except Exception:
            out.append(FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "failed"))
            continue
        c = t.counts()
        done = c["pass"] + c["warn"]
        current = not fingerprint_changed(attrs.get("source_fingerprint"), f.fingerprint)[0]
        ok = done == t.n_blocks and attrs.get("complete") is True and current
        out.append(FileOutcome(f.relpath, f.array_name, t.n_blocks, 0, done, t.n_blocks - done,
                               "complete" if ok else "failed", errors=dict(t.errors), summary=file_summary(t)))
    if not any(o.status == "failed" for o in out):
        out = [o if o.status == "skipped" else dataclasses.replace(o, status="failed") for o in out]
    return out


# ------------------------------------------------------------------ deployments
def schedule(cron: str, timezone: str | None = None) -> Any:
    """A Prefect cron schedule, validated.

    Parameters
    ----------
    cron : str
        Five-field cron expression (minute hour day-of-month month day-of-week), e.g.
        ``"30 2 * * *"`` for 02:30 every day.
    timezone : str, optional
        IANA time zone the expression is read in (e.g. ``"Europe/Berlin"``, so runs follow
        daylight saving time); default UTC.

    Raises
    ------
    ConfigError
        The expression or the time zone is not valid.
    """
    from prefect.client.schemas.schedules import CronSchedule
    from prefect.schedules import Cron
    from pydantic import ValidationError

    try:
        CronSchedule(cron=cron, timezone=timezone)
    except ValidationError as e:
        detail = "; ".join(str(err.get("msg", "")).removeprefix("Value error, ") for err in e.errors())
        raise ConfigError(f"schedule: cron {cron!r}, time zone {timezone or 'UTC'}: {detail}; use a five-field "
                          "cron expression such as \"30 2 * * *\" and an IANA time zone such as Europe/Berlin"
                          ) from None
    return Cron(cron, timezone=timezone)


def build_deployment(config_path: str | None = None, *, cron: str, timezone: str | None = None,
                     name: str = "nightly", config_block: str | None = None) -> "RunnerDeployment":
    """A deployment of :func:`archive_run` on a cron schedule (not yet applied or served).

    Parameters
    ----------
    config_path : str, optional
        The job configuration; stored as an absolute path in the deployment's parameters.
    cron, timezone : str
        The schedule, see :func:`schedule`.
    name : str
        Deployment name.
    config_block : str, optional
        Name of a saved :class:`~twinpass.prefect_blocks.TwinpassJob` block, instead of
        ``config_path``.

    Raises
    ------
    ConfigError
        Bad schedule, or the configuration cannot be read or is invalid.
    """
    from prefect.types.entrypoint import EntrypointType

    if config_path and config_block:
        raise ConfigError(f"give a configuration file ({config_path}) or a block ({config_block}), not both")
    if config_block:
        parameters: dict[str, Any] = {"config_block": config_block}
    elif config_path:
        path = str(Path(config_path).resolve())
        load_config(path)  # fail now on a bad configuration, not at 02:30
        parameters = {"config_path": path}
    else:
        raise ConfigError("a deployment needs a configuration file or the name of a saved TwinpassJob block")
    # The module path (not a file path relative to the working folder) lets the runner
    # load the flow from wherever it is started.
    return archive_run.to_deployment(name=name, schedules=[schedule(cron, timezone)], parameters=parameters,
                                     description=f"twinpass archive run, cron {cron!r} ({timezone or 'UTC'})",
                                     entrypoint_type=EntrypointType.MODULE_PATH)


def serve_deployment(deployment: "RunnerDeployment") -> None:
    """Register ``deployment`` with the Prefect server and run its scheduled runs here until stopped."""
    from prefect import serve

    serve(deployment)


__all__ = ["ARTIFACT_DESIGN", "ARTIFACT_FILES", "ARTIFACT_REPORT", "FLOW_NAME", "STATE_LEFT_OUT", "archive_run",
           "build_deployment", "design_task", "files_table", "filter_segment", "finalize_task", "left_out_message",
           "preload", "progress_at_end",
           "report_task", "schedule", "serve_deployment", "skip_unchanged"]
