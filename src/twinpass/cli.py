"""The ``twinpass`` command line.

Commands: ``design``, ``plan``, ``run``, ``status``, ``report``, ``demo``, ``serve``, ``save``.
Exit status: 0 success; 1 some files failed or are incomplete; 2 bad configuration or input
(nothing run); 3 ``run`` finished, no file failed, but input files were left out (invalid
input, or no filter for their sample rate: listed with reasons; exclude them in
``[archive] exclude`` if that is intended); 130 interrupted (Ctrl-C, or the flow run cancelled
from the Prefect server). A report that ``run`` cannot write after the run is recorded is
an error line after the summary, and the run's own status stands.
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import json
import logging
import math
import os
import re
import sys
import threading
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, Sequence

from . import __version__
from .errors import ConfigError, ReportNotWrittenError, RunNotRecordedError, TwinpassError
from .startup import start_up_imports

EXIT_LEFT_OUT = 3
"""Exit status of a run that finished with no file failed but input files left out."""


def _eprint(*a: Any) -> None:
    print(*a, file=sys.stderr, flush=True)


class _ProgressBar:
    """A one-line terminal progress bar for blocks (stderr; plain lines when not a TTY).

    Called from the segments' driver threads as blocks are recorded. A segment's total is
    known once its files are prepared, so the total grows as segments report theirs: told
    the segments to come (:meth:`expect`), the bar says its total is the total so far until
    each has reported (``blocks 1/6 so far, 3 more segment(s) to come``). Its line is ended
    by :meth:`close` (after the run), not when the blocks seen so far are all done. While
    :meth:`over_logs` is active, a log record (Prefect's, twinpass's) first clears the bar's
    line, so that the log line starts on a line of its own; the next block draws the bar
    again below it. Without a TTY it prints a line at most every 5 s, and the final count on
    :meth:`close`.
    """

    def __init__(self) -> None:
        self.total: dict[str, int] = {}
        self.seen: dict[str, int] = {}
        self.expected: set[str] = set()
        self._after = ""  # the text drawn after the count on the bar's line, if any
        self.tty = sys.stderr.isatty()
        self._last = 0.0
        self._shown: tuple[int, int] | None = None
        self._lock = threading.Lock()

    def __call__(self, segment: str, done: int, total: int, result: Any) -> None:
        with self._lock:
            self.total[segment] = total
            self.seen[segment] = done
            d, t = sum(self.seen.values()), sum(self.total.values())
            now = time.monotonic()
            if not self.tty:
                if now - self._last > 5:
                    self._last = now
                    self._shown, self._after = (d, t), self._to_come()
                    _eprint(f"blocks {d}/{t}{self._after}")
                return
            self._draw(d, t, self._to_come())
            self._shown = (d, t)

    def expect(self, segments: Iterable[str]) -> None:
        """The segments whose blocks are to run (their ids): until each has reported its
        total, the total shown is the total so far, and the bar says so."""
        with self._lock:
            self.expected = set(segments)

    def _to_come(self) -> str:
        """What follows the count while expected segments have not reported their totals."""
        pending = len(self.expected - set(self.total))
        return f" so far, {pending} more segment(s) to come" if pending else ""

    def _draw(self, done: int, total: int, after: str = "", end: str = "") -> None:
        width = 30
        fill = int(width * done / max(total, 1))
        # After a line with ``after`` text, a shorter one first erases it ("\r" + ECMA-48 EL)
        erase = "\r\033[K" if self._after and not after else ""
        self._after = after
        sys.stderr.write(f"{erase}\rblocks [{'#' * fill}{'.' * (width - fill)}] {done}/{total}{after}{end}")
        sys.stderr.flush()

    def clear_line(self) -> None:
        """Erase the bar from its line, if drawn (a TTY), so that other output starts on a clean line."""
        with self._lock:
            if self.tty and self._shown is not None:
                sys.stderr.write("\r\033[K")
                sys.stderr.flush()
                self._shown = None
                self._after = ""

    @contextlib.contextmanager
    def over_logs(self) -> Iterator[None]:
        """While active, every log record made in this process clears the bar first (a TTY only);
        the bar is cleared on leaving too, and :meth:`close` draws it a last time."""
        if not self.tty:
            yield
            return
        previous = logging.getLogRecordFactory()

        def factory(*args: Any, **kwargs: Any) -> logging.LogRecord:
            self.clear_line()
            return previous(*args, **kwargs)

        logging.setLogRecordFactory(factory)
        try:
            yield
        finally:
            logging.setLogRecordFactory(previous)
            self.clear_line()  # what is written next (until close) starts on a clean line too

    def close(self, *, count: bool = True) -> None:
        """End the bar's line (a TTY) or print the final count (otherwise); nothing if no block
        was seen. With ``count`` False (the run was interrupted: its stopped blocks were
        counted as they were recorded) only the bar's line is ended."""
        with self._lock:
            if not self.seen:
                return
            d, t = sum(self.seen.values()), sum(self.total.values())
            if self.tty:
                if count:
                    self._draw(d, t, end="\n")
                elif self._shown is not None:
                    sys.stderr.write("\n")
                    sys.stderr.flush()
            elif count and (self._shown != (d, t) or self._after):
                _eprint(f"blocks {d}/{t}")
            self.seen.clear()
            self.total.clear()
            self.expected = set()
            self._after = ""
            self._shown = None


# ------------------------------------------------------------------- commands
def cmd_design(args: argparse.Namespace) -> int:
    from .config import load_config
    from .core.design import design_filter, format_report

    from .errors import SpecError

    cfg = load_config(args.config)
    try:
        d = design_filter(cfg.response, args.fs, cfg.processing.tolerance)
    except SpecError as e:
        raise type(e)(f"{cfg.source}: [response] at {args.fs:g} Hz: {e}") from None
    if args.json:
        r = dict(d.report)
        r.update(family=d.family, order=int(d.order), **d.coefficients(),
                 effective_length_samples=int(d.effective_length), tolerance=float(d.tolerance),
                 overall_passband_ripple_db=d.report.get("passband_ripple_db"),
                 overall_stopband_attenuation_db=d.report.get("stopband_attenuation_db"))
        print(json.dumps(r, indent=2))
    else:
        print(format_report(d.report))
    return 0


def cmd_plan(args: argparse.Namespace) -> int:
    from .config import load_config
    from .core.plan import format_plan
    from .errors import StoreError, UnsafePathError
    from .io.store import OutputStore
    from .job import prepare

    cfg = load_config(args.config)
    try:
        store = OutputStore.open(cfg.store_location, mode="r", archive_root=cfg.archive_root)
    except UnsafePathError:
        raise
    except StoreError:
        store = None  # no store yet: everything is new
    prep = prepare(cfg, store if store is not None else _EmptyStore(), force=args.force)
    reads, problems = _segment_reads(prep)
    if args.json:
        print(json.dumps({"files": prep.plan.to_json(), "totals": prep.plan.totals(reads),
                          "notes": list(prep.plan.notes), "problems": problems}, indent=2))
    else:
        print(format_plan(prep.plan, reads))
        for segment, message in problems.items():
            print(f"cannot run segment {segment}: {message}")
    # the status a run would end with for what the plan can tell: inputs left out
    return 2 if problems else EXIT_LEFT_OUT if prep.plan.invalid else 0


def _segment_reads(prep: Any) -> tuple[dict[str, Any], dict[str, str]]:
    """How the engine runs each segment with work (``SegmentReads`` by segment id), and the
    segments whose blocks no layout fits, by segment id: what to change."""
    from .engine import segment_reads

    reads, problems = {}, {}
    for w in prep.work:
        if w.has_work:
            try:
                reads[w.segment_id] = segment_reads(w, prep.designs[w.sample_rate_hz], prep.cfg)
            except ConfigError as e:
                problems[w.segment_id] = str(e)
    return reads, problems


class _EmptyStore:
    """Stands for a store that does not exist yet (planning only reads records)."""

    def file_records(self) -> dict[str, Any]:
        return {}

    def read_scan_cache(self) -> dict[str, Any]:
        return {}


def cmd_run(args: argparse.Namespace) -> int:
    if (args.config is None) == (args.block is None):
        raise ConfigError("twinpass run: give either a configuration file or --block NAME (a saved TwinpassJob)")
    if args.block is not None and args.no_flow:
        raise ConfigError("twinpass run: --block needs the Prefect flow; drop --no-flow")
    if not args.no_flow:
        from .prefect_server import early_start

        early_start()  # a temporary Prefect server (if one is needed) starts while this process prepares
    with start_up_imports(freeze=args.own_process):
        from .config import SCHEDULER_ADVICE, load_config, scheduler_usable

        if args.no_flow:
            from . import job  # noqa: F401
        else:
            from . import flows  # noqa: F401

    if args.scheduler is not None and not scheduler_usable(args.scheduler):  # before any lock or record
        raise ConfigError(f"twinpass run: --scheduler {args.scheduler!r}: {SCHEDULER_ADVICE}")
    if args.block is not None:
        return _run_flow(None, None, force=args.force, scheduler=args.scheduler, workers=args.workers,
                         report=not args.no_report, progress=_ProgressBar(), config_block=args.block)
    cfg = load_config(args.config)
    if not args.no_flow:
        return _run_flow(cfg, args.config, force=args.force, scheduler=args.scheduler, workers=args.workers,
                         report=not args.no_report, progress=_ProgressBar())
    from .job import run_job

    bar = _ProgressBar()

    def say(message: str) -> None:  # the engine's messages, on a line of their own
        bar.clear_line()
        _eprint(message)

    try:
        with bar.over_logs():
            res = run_job(cfg, force=args.force, scheduler=args.scheduler, workers=args.workers, on_block=bar,
                          log_fn=say)
    except RunNotRecordedError as e:  # what the run did, then the store's error (exit status 2)
        if e.result is not None:
            _print_result(e.result)
            print(f"store: {cfg.store_location}")
        raise
    finally:
        bar.close(count=sys.exc_info()[0] is None)
    _print_result(res)
    unwritten = None
    if not args.no_report:  # the run is recorded: a report that cannot be written does not change its status
        from .report_data import report_failure, write_report

        try:
            print(f"report: {write_report(cfg)}")
        except Exception as e:
            unwritten = ReportNotWrittenError(report_failure(cfg, e), res.exit_status())
    print(f"store: {cfg.store_location}")
    if unwritten is not None:
        raise unwritten
    return res.exit_status()


def _print_result(res: Any) -> None:
    """The summary lines of a run of the engine alone (a :class:`twinpass.job.RunResult`):
    counts, failed files with their reasons, warned files, blocks done only after a retry."""
    c = res.counts()
    print(f"complete {c['complete']}, skipped (unchanged) {c['skipped']}, failed {c['failed']}, "
          f"invalid {c['invalid']}; blocks run {c['blocks_run']}")
    _print_failed(res.failure_reasons())
    _print_warned(res.warnings())
    _print_retried(res.retried())


def _head_start(cfg: Any, *, force: bool, scheduler: str | None, workers: int | None,
                progress: _ProgressBar) -> bool:
    """Begin the run before its flow run exists and offer it to the flow run; whether that worked.

    ``progress`` (the terminal's progress bar) sees the blocks as they are recorded, before
    the flow run follows them.

    See :mod:`twinpass.headstart`. A failure here (a locked store, an unusable archive, or
    an error of twinpass's own) is left to the flow run, which meets it again at the same
    step and reports it on the dashboard as usual; an unexpected one is logged as a warning
    first. Ctrl-C is never left to the flow run: the interrupt goes on (exit status 130),
    also when an error in the clean-up after it took its place.
    """
    from .headstart import HeadStart, offer

    try:
        offer(HeadStart.begin(cfg, force=force, scheduler=scheduler, workers=workers, watch=progress))
    except TwinpassError as e:  # the flow run meets it again and reports it
        logging.getLogger(__name__).debug("the run was not begun before its flow run: %s", e, exc_info=True)
        return False
    except Exception as e:
        if _follows_interrupt(e):
            raise KeyboardInterrupt from e
        logging.getLogger(__name__).warning(  # with its traceback: a fault to report if the flow run does not meet it
            "the run could not be begun before its flow run (%s: %s); the flow run starts it afresh",
            type(e).__name__, e, exc_info=True)
        return False
    return True


def _follows_interrupt(error: BaseException) -> bool:
    """Whether ``error`` was raised while a KeyboardInterrupt (Ctrl-C) was being handled."""
    seen: set[int] = set()
    cause: BaseException | None = error
    while cause is not None and id(cause) not in seen:
        if isinstance(cause, KeyboardInterrupt):
            return True
        seen.add(id(cause))
        cause = cause.__context__
    return False


def _check_utf8_paths(paths: dict[str, str | None]) -> None:
    """Refuse, before anything starts, a path the Prefect flow could not send to its API.

    Prefect sends a flow run's parameters, logs and artifacts as UTF-8 JSON; a path with a
    name that is not UTF-8 (kept by Python as surrogate escapes) cannot be encoded, and the
    flow call would fail with a bare encoding error.

    Raises
    ------
    ConfigError
        Naming the path and what to do.
    """
    for what, path in paths.items():
        if path is None:
            continue
        try:
            path.encode("utf-8")
        except UnicodeEncodeError:
            shown = path.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
            raise ConfigError(
                f"the {what} {shown} has a name that is not UTF-8 text; a Prefect flow run sends its "
                "parameters, logs and artifacts as UTF-8, so it cannot name it. Rename the folder (or file) "
                "to a UTF-8 name, or run the engine alone with --no-flow") from None


def _run_flow(cfg: Any, config_path: str | None, *, force: bool, scheduler: str | None, workers: int | None,
              report: bool, progress: _ProgressBar, config_block: str | None = None) -> int:
    from . import flows
    from .errors import BlockFailedError
    from .headstart import withdraw
    from .heartbeats import prompt_heartbeats
    from .job import now_iso
    from .prefect_server import check_api_reachable, configured_api, prefect_api
    from .server_cancel import server_cancels

    # The configured Prefect API, else a temporary local server; while that starts, load
    # what the flow call would load after it and, unless the run has begun (it has its
    # cluster), start its local Dask cluster (a saved block's scheduler and workers are not
    # known yet).
    if cfg is not None:
        _check_utf8_paths({"configuration file": str(Path(config_path).resolve()) if config_path else None,
                           "archive root": str(cfg.archive_root), "output store": cfg.store_location})
    api = configured_api()
    if api is not None:  # a server that is down stops the command before the run begins
        check_api_reachable(api)
    run_scheduler = scheduler or (cfg.engine.scheduler if cfg is not None else None)
    run_workers = workers or (cfg.engine.workers if cfg is not None else None)
    head = False
    since = now_iso()  # the run's record in the store begins at or after this
    lost: Exception | None = None  # the Prefect API's error, when the server stopped answering
    state: Any = None

    def while_starting() -> None:
        if not head:
            flows.start_client_early(run_scheduler, run_workers)
        flows.preload(run_scheduler)

    try:
        with progress.over_logs():  # log lines start on a line of their own, not after the bar
            # With a configuration at hand, the run's first blocks start before the flow run
            # exists: the flow run's creation (and the wait for a temporary server) goes on beside
            # them, and the flow run takes them over. Only after Prefect's import: begun before
            # it, the import competed with the blocks for the interpreter lock and took 1.6 s
            # instead of 0.6 s.
            head = cfg is not None and _head_start(cfg, force=force, scheduler=scheduler, workers=workers,
                                                   progress=progress)
            with prefect_api(while_starting=while_starting) as api_url:
                if config_block is not None:  # a name with no saved block stops here, before any flow run
                    cfg = flows.load_job(None, config_block)
                flows.TERMINAL_PROGRESS = progress
                try:
                    # Heartbeats that do not hold up the end of the run; a lost server explained in one
                    # line; on a server others reach (a dashboard), a cancel from it stops the run.
                    watched = server_cancels() if api is not None else contextlib.nullcontext()
                    with prompt_heartbeats(), watched, _without_tracebacks_of(_explained_here):
                        state = flows.archive_run(
                            config_path=None if config_path is None else str(Path(config_path).resolve()),
                            config_block=config_block, force=force, scheduler=scheduler, workers=workers,
                            report=report, return_state=True)
                except Exception as e:
                    if not flows.server_unreachable(e):
                        raise
                    lost = e  # the store tells how the run ended
                finally:
                    flows.TERMINAL_PROGRESS = None
                if lost is None:
                    try:
                        summary = state.result(raise_on_failure=False)
                    except Exception as e:  # the result could not be read back
                        summary = e
                    if flows.server_unreachable(summary):
                        lost = summary
    finally:
        withdraw()  # a head start the flow run did not take (a failed server start, Ctrl-C): stop it
        flows.close_early_client()  # likewise a cluster started early
        # An interrupted run's count would mislead, as would a cancelled one's.
        progress.close(count=sys.exc_info()[0] is None and not (state is not None and state.is_cancelled()))
    if lost is not None:
        return _after_server_lost(cfg, since, lost, api_url, report=report)
    if state.is_cancelled() and not isinstance(summary, dict):  # stopped before its end, as by Ctrl-C
        _eprint("twinpass: the flow run was cancelled from the Prefect server; finished blocks are kept, rerun to "
                "resume")
        return EXIT_INTERRUPTED
    if isinstance(summary, TwinpassError) and not isinstance(summary, BlockFailedError):
        raise summary  # bad configuration, input or store: exit status 2, as without the flow
    if isinstance(summary, dict):
        _print_summary(summary)
        if summary.get("unrecorded"):  # the run's blocks ended, its record could not be written
            raise RunNotRecordedError(str(summary["unrecorded"]))
    report_error = summary.get("report_error") if isinstance(summary, dict) else None
    if state.is_completed():
        code = EXIT_LEFT_OUT if isinstance(summary, dict) and summary.get("invalid") else 0
    elif state.is_cancelled():  # cancelled once the run was recorded: the run's own status
        _eprint(f"twinpass: {state.message}")
        code = 1 if summary.get("failed") else EXIT_LEFT_OUT if summary.get("invalid") else 0
    else:
        # The report's failure is the command's last line (below), not also part of this one.
        message = (state.message or "").removesuffix(f"{flows.REPORT_UNWRITTEN}{report_error}")
        print(f"run ended {state.name}: {message}")
        code = 1
    if report_error:
        raise ReportNotWrittenError(report_error, code)
    return code


def _explained_here(error: object) -> bool:
    """Whether the flow command explains ``error`` in a line of its own, so that Prefect's log
    line about it needs no traceback: a lost Prefect server, or a bad configuration, input or
    store (exit status 2, as without the flow)."""
    from . import flows
    from .errors import BlockFailedError

    return flows.server_unreachable(error) or (isinstance(error, TwinpassError)
                                               and not isinstance(error, BlockFailedError))


@contextlib.contextmanager
def _without_tracebacks_of(matches: Callable[[object], bool]) -> Iterator[None]:
    """While active, Prefect's flow and task run log lines keep their message but lose the
    traceback of an exception ``matches(exception)`` accepts (one the command explains itself)."""

    def strip(record: logging.LogRecord) -> bool:
        if record.exc_info and matches(record.exc_info[1]):
            record.exc_info = record.exc_text = None
        return True

    loggers = [logging.getLogger(name) for name in ("prefect.flow_runs", "prefect.task_runs")]
    for lg in loggers:
        lg.addFilter(strip)
    try:
        yield
    finally:
        for lg in loggers:
            lg.removeFilter(strip)


FAILED_NAMED = 3
"""Files one line of the run's summary names for a reason several files failed for (``twinpass
status`` names them all)."""


def _print_failed(reasons: dict[str, str]) -> None:
    """The run's failed files (path -> reason), one line a reason: ``failed: PATH: REASON``,
    or the first :data:`FAILED_NAMED` paths and a count of the rest when several failed alike."""
    from .core.text import named_list
    from .status import failure_groups

    for paths, reason in failure_groups(reasons):
        shown = paths[0] if len(paths) == 1 else f"{named_list(paths, FAILED_NAMED)} ({len(paths)} files)"
        print(f"failed: {shown}" + (f": {reason}" if reason else ""))


WARNED_SHOWN = 10
"""Files with warned blocks the run's summary names, one line each (``twinpass status`` has all)."""


def _print_warned(warned: dict[str, str]) -> None:
    """The run's complete files whose blocks warned, one line each (the first :data:`WARNED_SHOWN`)."""
    for f in sorted(warned)[:WARNED_SHOWN]:
        print(f"warned: {f}: {warned[f]}")
    if len(warned) > WARNED_SHOWN:
        print(f"warned: and {len(warned) - WARNED_SHOWN} more file(s) (`twinpass status` lists them)")


def _print_retried(retried: dict[str, int]) -> None:
    """The run's blocks done only after a failed attempt, in one line (none if there were none)."""
    from .status import retried_line

    line = retried_line(retried)
    if line:
        print(f"retried: {line}")


def _print_summary(summary: dict[str, Any]) -> None:
    """Print a flow run's summary (see :func:`twinpass.flows.archive_run`): counts, failed and left-out files, paths."""
    c = summary["counts"]
    print(f"complete {c['complete']}, skipped (unchanged) {c['skipped']}, failed {c['failed']}, "
          f"invalid {c['invalid']}; blocks run {c['blocks_run']}")
    reasons = summary.get("failed_reasons") or {}
    _print_failed({f: reasons.get(f) or "" for f in summary.get("failed", [])})
    for f in summary.get("invalid", []):
        print(f"left out (invalid input): {f}")
    _print_warned(summary.get("warned") or {})
    _print_retried(summary.get("retried") or {})
    if summary.get("report"):
        print(f"report: {summary['report']}")
    print(f"store: {summary['store']}")


def _after_server_lost(cfg: Any, since: str, error: Exception, api_url: str | None, *, report: bool) -> int:
    """End a flow command whose Prefect server stopped answering (``error``): the exit status
    the run earned, from its record in the store (README "Exit statuses").

    A run recorded as finished (begun at or after ``since``, ISO 8601 UTC, and not stopped
    before its end) gets its summary printed and, with ``report``, its HTML report (written
    here unless the flow run got to it); otherwise the run did not finish, and the
    status is 1 (files incomplete). Either way one line on stderr says what happened.
    """
    global _server_lost
    _server_lost = True
    server = f"the Prefect server at {api_url}" if api_url else "the Prefect server"
    why = f"{type(error).__name__}: {error}"
    entry, details = _run_recorded_since(cfg, since) if cfg is not None else (None, {})
    if entry is None or entry.get("interrupted"):
        _eprint(f"twinpass: {server} stopped answering before the run finished ({why}); finished blocks are "
                "kept: rerun once the server answers again (or run the engine alone with --no-flow) to do the rest")
        return 1
    summary = {"counts": entry["counts"], "failed": list(entry.get("failed") or []),
               "failed_reasons": dict(details.get("failed") or {}), "invalid": list(details.get("left_out") or {}),
               "retried": dict(details.get("retried") or {}),
               "store": cfg.store_location, "report": _report_after(cfg, str(entry.get("end", ""))) if report else None}
    _print_summary(summary)
    _eprint(f"twinpass: {server} stopped answering before the flow run ended ({why}); the run finished and is "
            "recorded in the store (twinpass status shows it), but the dashboard lacks the run's end; see why that "
            "server stopped before the next run")
    return 1 if summary["failed"] else EXIT_LEFT_OUT if summary["invalid"] else 0


def _report_after(cfg: Any, ended: str) -> str:
    """The path of ``cfg``'s HTML report at its default place, written now unless the flow
    run wrote it after the run ``ended`` (ISO 8601)."""
    import datetime as dt

    from .report_data import default_report_path, write_report

    path = default_report_path(cfg)
    with contextlib.suppress(OSError, ValueError):
        if path.stat().st_mtime >= dt.datetime.fromisoformat(ended).timestamp():
            return str(path)
    return str(write_report(cfg))


def _run_recorded_since(cfg: Any, since: str) -> tuple[dict[str, Any] | None, dict[str, Any]]:
    """The store's last run entry and its details, if that run began at or after ``since`` (else None, {})."""
    from .io.store import OutputStore

    try:
        store = OutputStore.open(cfg.store_location, mode="r", archive_root=cfg.archive_root)
        runs = store.read_root_info().get("runs") or []
        if not runs or str(runs[-1].get("start", "")) < since:
            return None, {}
        return dict(runs[-1]), store.read_run_details(str(runs[-1].get("run_id")))
    except TwinpassError:  # no store, or none readable: nothing recorded
        return None, {}


def cmd_status(args: argparse.Namespace) -> int:
    from .status import collect_status, format_status, open_target, shortfalls

    store, _ = open_target(args.target)
    st = collect_status(store, _configured_checks(args.target))
    if args.verify:
        from .verify import verify_store

        st["verified"] = verify_store(store, st["files"]).to_dict()
    print(json.dumps(st, indent=2) if args.json else format_status(st))
    missing = shortfalls(st) if args.require_complete else []
    if missing:
        _eprint("not complete: " + "; ".join(missing))
        return 1
    warned = st["totals"].get("checks_warned")
    if args.require_complete and warned:
        _eprint(f"complete, with {warned} file(s) whose blocks were graded warn (counted as passed; their CHECKS "
                "column and figures above say which)")
    return 0


def _configured_checks(target: str) -> Any:
    """The ``[checks]`` of a configuration given as ``twinpass status``'s target (None for a store)."""
    from .config import load_config

    p = Path(target)
    return load_config(p).checks if p.is_file() and p.suffix.lower() == ".toml" else None


def cmd_report(args: argparse.Namespace) -> int:
    from .config import load_config
    from .report_data import write_report

    cfg = load_config(args.config)
    print(write_report(cfg, args.output))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    if not args.no_run:
        from .prefect_server import early_start

        early_start()  # a temporary Prefect server (if one is needed) starts while the archive is written
    with start_up_imports(freeze=args.own_process):
        from .demo import DEMO_SCENARIO, DEMO_TRUNCATED_FILE, write_demo_archive

        if not args.no_run:
            from . import flows  # noqa: F401

    folder = Path(args.folder).resolve()
    t0 = time.perf_counter()
    config = write_demo_archive(folder, hours=args.hours)
    print(DEMO_SCENARIO)
    print(f"demo archive: {folder / 'archive'} (written in {time.perf_counter() - t0:.1f} s)")
    print(f"configuration: {config}")
    if args.no_run:
        return 0
    from .config import load_config

    cfg = load_config(config)
    unwritten: ReportNotWrittenError | None = None
    try:
        rc = _run_flow(cfg, str(config), force=False, scheduler=None, workers=None, report=True,
                       progress=_ProgressBar())
    except ReportNotWrittenError as e:  # the run stands: its closing lines, then the report's error
        unwritten, rc = e, e.exit_status
    if rc == EXIT_LEFT_OUT and _left_out_by_last_run(cfg) == {DEMO_TRUNCATED_FILE}:
        rc = 0  # the one file the demo leaves out on purpose
    _demo_closing_lines(config, rc, time.perf_counter() - t0)
    if unwritten is not None:
        raise ReportNotWrittenError(str(unwritten), rc)
    return rc


def _demo_closing_lines(config: Path, rc: int, seconds: float) -> None:
    """What the demo prints once its run has ended: its time and status, and what to try next."""
    print(f"demo finished in {seconds:.1f} s (exit status {rc}; the truncated file is left out "
          "on purpose and reported above)")
    print("next: run the same command again to see unchanged files skipped;")
    print(f"      twinpass status {config}    (per-file table)")
    print("      prefect server start         (dashboard at http://127.0.0.1:4200; then set")
    print("      PREFECT_API_URL=http://127.0.0.1:4200/api and rerun to watch the run there)")


def _left_out_by_last_run(cfg: Any) -> set[str]:
    """Input paths the store's last run left out."""
    from .status import collect_status, open_target

    return set(collect_status(open_target(cfg.store_location)[0]).get("left_out") or {})


def cmd_compile(args: argparse.Namespace) -> int:
    import time

    from .core import loops
    from .engine import warm_compiled_loops

    t0 = time.perf_counter()
    in_use = warm_compiled_loops()
    took = time.perf_counter() - t0
    if in_use:
        print(f"compiled filter loops ready for this machine ({took:.1f} s; later runs load them from "
              "numba's cache)")
        return 0
    if not loops.jit_requested():
        print("compiled filter loops are turned off (TWINPASS_JIT=0); twinpass uses numpy and scipy's loops")
        return 0
    _eprint("twinpass: the compiled filter loops are not available on this machine (numba missing, broken, "
            "or its result differs from scipy's; see any warning above); twinpass still runs, with numpy "
            "and scipy's slower loops. Reinstall numba or report its and LLVM's versions.")
    return 1


def cmd_serve(args: argparse.Namespace) -> int:
    if (args.config is None) == (args.block is None):
        raise ConfigError("twinpass serve: give either a configuration file or --block NAME (a saved TwinpassJob)")
    from . import flows  # sets twinpass's Prefect defaults before prefect is imported

    if args.block is not None:  # a name with no saved block stops here, not at the first scheduled run
        flows.load_job(None, args.block)
    deployment = flows.build_deployment(args.config, cron=args.cron, timezone=args.timezone, name=args.name,
                                        config_block=args.block)
    flows.serve_deployment(deployment)
    return 0


def cmd_save(args: argparse.Namespace) -> int:
    from .prefect_server import early_start, prefect_api

    # With no Prefect API configured the block goes to a temporary server's database, the one
    # under PREFECT_HOME that `prefect server start` uses too, so the block stays.
    early_start()
    from .prefect_blocks import TwinpassJob

    if not args.name or not re.fullmatch(r"[a-z0-9-]+", args.name):  # Prefect's rule for block names
        raise ConfigError(f"twinpass save: block name {args.name!r}: use lower case letters, digits and dashes "
                          "only, e.g. deck-monitoring")
    block = TwinpassJob.from_file(args.config)
    with prefect_api():
        block.save(args.name, overwrite=True)
    print(f"saved configuration {args.config} as TwinpassJob block {args.name!r}; run it with "
          f"`twinpass run --block {args.name}`, or name it in a deployment with config_block={args.name!r}")
    return 0


# ------------------------------------------------------------------- parser
def _at_least_one(text: str) -> int:
    """A whole number >= 1 (argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} is not at least 1")
    return value


def _sample_rate_hz(text: str) -> float:
    """A sample rate in Hz: a finite number above 0 (argparse type)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number (the sample rate in Hz)") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"{text} is not a sample rate: give a finite number of Hz above 0")
    return value


_CONFIG_HELP = "the job configuration (TOML)"


def _command(sub: Any, name: str, text: str) -> argparse.ArgumentParser:
    """The subcommand ``name``, saying ``text`` in ``twinpass --help`` and in its own ``--help``."""
    return sub.add_parser(name, help=text, description=text)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="twinpass", description="Zero-phase filtering of large sensor archives.")
    p.add_argument("--version", action="version", version=f"twinpass {__version__}")
    p.add_argument("-v", "--verbose", action="store_true", help="more log output")
    sub = p.add_subparsers(dest="command", required=True)

    s = _command(sub, "design", "design the filter for a sample rate and print the response report")
    s.add_argument("config", metavar="CONFIG", help=_CONFIG_HELP)
    s.add_argument("--fs", type=_sample_rate_hz, required=True, metavar="HZ", help="sample rate in Hz")
    s.add_argument("--json", action="store_true", help="print the report as JSON (for scripts)")
    s.set_defaults(func=cmd_design)

    s = _command(sub, "plan", "show what a run would do, and why; runs nothing")
    s.add_argument("config", metavar="CONFIG", help=_CONFIG_HELP)
    s.add_argument("--json", action="store_true", help="print the plan as JSON (for scripts)")
    s.add_argument("--force", action="store_true", help="plan as if every file changed")
    s.set_defaults(func=cmd_plan)

    s = _command(sub, "run", "filter the archive (through the Prefect flow unless --no-flow)")
    s.add_argument("config", nargs="?", metavar="CONFIG", help=_CONFIG_HELP + "; or --block instead")
    s.add_argument("--block", metavar="NAME", help="run a configuration saved on the Prefect server (twinpass save) "
                                                   "instead of CONFIG; needs the flow, so not with --no-flow")
    s.add_argument("--workers", type=_at_least_one, metavar="N", help="local Dask workers (default from the config)")
    s.add_argument("--scheduler", metavar="S",
                   help="threads | processes | tcp://HOST:PORT (default from the config)")
    s.add_argument("--force", action="store_true", help="reprocess every file, changed or not")
    s.add_argument("--no-flow", action="store_true", help="run the engine alone, without Prefect (not with --block)")
    s.add_argument("--no-report", action="store_true", help="do not write the HTML report")
    s.set_defaults(func=cmd_run)

    s = _command(sub, "status", "per-file status of an output store")
    s.add_argument("target", metavar="TARGET",
                   help="a job configuration (TOML; its [output] store) or an output store (path or URL)")
    s.add_argument("--json", action="store_true", help="print the status as JSON (for scripts)")
    s.add_argument("--require-complete", action="store_true",
                   help="exit 1 unless the store holds output files, every one complete with passed checks "
                        "(blocks graded warn count as passed), the last run left no input out and failed none, "
                        "no run holds the store's lock (one writing now, or one that stopped without ending), "
                        "and, with --verify, no output's stored samples changed since they were written")
    s.add_argument("--verify", action="store_true",
                   help="read every complete output back and compare each block's RMS and peak with those "
                        "recorded when it was written (finds chunk files changed or damaged since)")
    s.set_defaults(func=cmd_status)

    s = _command(sub, "report", "write the self-contained HTML report")
    s.add_argument("config", metavar="CONFIG", help=_CONFIG_HELP)
    s.add_argument("--output", metavar="FILE", help="HTML file to write (default: named after the store, "
                   "STORE.zarr -> STORE.report.html, beside a local store, else in the working folder)")
    s.set_defaults(func=cmd_report)

    s = _command(sub, "demo", "write the built-in demo archive and run the full flow on it")
    s.add_argument("folder", nargs="?", default="twinpass-demo", metavar="FOLDER",
                   help="folder for the archive, its configuration and the output (default %(default)s)")
    s.add_argument("--hours", type=int, default=3, metavar="N",
                   help="hours of recording per stream (default %(default)s)")
    s.add_argument("--no-run", action="store_true", help="only write the archive and its configuration")
    s.set_defaults(func=cmd_demo)

    s = _command(sub, "compile", "compile the filter loops for this machine ahead of the first run "
                                 "(e.g. while building a container image)")
    s.set_defaults(func=cmd_compile)

    s = _command(sub, "serve", "serve a scheduled deployment of the flow and run its scheduled runs here until "
                               "stopped, on the Prefect server of PREFECT_API_URL or, without one, on a temporary "
                               "local server (no dashboard; runs kept in the database under PREFECT_HOME)")
    s.add_argument("config", nargs="?", metavar="CONFIG", help=_CONFIG_HELP + "; or --block instead")
    s.add_argument("--block", metavar="NAME", help="serve a configuration saved on the Prefect server "
                                                   "(twinpass save) instead of CONFIG")
    s.add_argument("--cron", required=True, metavar="EXPR", help='cron expression, e.g. "30 2 * * *"')
    s.add_argument("--timezone", default=None, metavar="TZ", help="IANA time zone of the cron expression (default UTC)")
    s.add_argument("--name", default="nightly", metavar="NAME", help="deployment name (default %(default)s)")
    s.set_defaults(func=cmd_serve)

    s = _command(sub, "save", "save a configuration to the Prefect server as a Twinpass Job block (without "
                              "PREFECT_API_URL, into the database under PREFECT_HOME through a temporary server)")
    s.add_argument("config", metavar="CONFIG", help=_CONFIG_HELP)
    s.add_argument("--name", required=True, metavar="NAME",
                   help="block name (lower case letters, digits and dashes)")
    s.set_defaults(func=cmd_save)
    return p


_exit_code: int | None = None
"""The command's exit status once :func:`main` has returned it (the command line only)."""
_server_lost = False
"""The flow run's Prefect server stopped answering (:func:`_after_server_lost`)."""


def _end_without_finalizing() -> None:
    """The command's last exit handler: end the process without finalising the interpreter.

    Finalising frees every remaining object one by one (module by module, then the garbage
    collector's generations): 0.35 s after an engine run and 0.65 s after a flow run on the
    bench machine, work the operating system does at once when the process ends. Registered
    first, this runs after every exit handler registered later (Prefect's flushes of events
    and logs, the temporary server's stop, Dask's and multiprocessing's clean-up); logging
    and the standard streams are flushed here. Python does not promise to run ``__del__``
    methods of objects alive at exit, so nothing twinpass keeps relies on them: chunks,
    records and the report are written and closed before :func:`main` returns.

    Does nothing, and the interpreter finalises as usual, when :func:`main` did not return
    (an uncaught exception) or when a tracer or profiler is active (coverage and profilers
    write their data at exit, after this handler).
    """
    if _exit_code is None or sys.gettrace() is not None or sys.getprofile() is not None:
        return
    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # closed or broken stream: nothing more to show
            pass
    os._exit(_exit_code)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``twinpass`` command with ``argv`` (default: the command line); return the exit status.

    Called with the command line (``argv`` None), the process ends without finalising the
    interpreter once every exit handler has run (see :func:`_end_without_finalizing`). When
    the Prefect server stopped answering, it ends at once instead: at the interpreter's exit
    Prefect would try to send it each event still queued (about 7 s each) before the exit
    handlers run, and nothing they do can reach it (the temporary server, if any, is
    stopped already).
    """
    global _exit_code
    if argv is None:
        atexit.register(_end_without_finalizing)
    code = _main(argv)
    if argv is None:
        _exit_code = code
        if _server_lost:
            _end_without_finalizing()
        if code == EXIT_INTERRUPTED and _blocks_still_running(STOP_GRACE_S):
            _eprint(f"twinpass: blocks still running did not stop within {STOP_GRACE_S:.0f} s (a read or write "
                    "that does not return?); ending without them: they are recorded as not done, and the next "
                    "run does them")
            _end_without_finalizing()
    return code


EXIT_INTERRUPTED = 130
"""Exit status of a command stopped by Ctrl-C (128 + SIGINT, as a shell reports it)."""
STOP_GRACE_S = 5.0
"""Seconds an interrupted command waits for its running blocks to end before it ends without them."""


def _blocks_still_running(grace_s: float) -> int:
    """Blocks this process still runs after waiting up to ``grace_s`` seconds for them to end
    (0 when the engine was never loaded). At the interpreter's exit Python waits for every
    thread of its thread pools, so one block stuck in a read would hold the command forever."""
    engine = sys.modules.get("twinpass.engine")
    if engine is None:
        return 0
    deadline = time.monotonic() + grace_s
    while engine.blocks_running() and time.monotonic() < deadline:
        time.sleep(0.05)
    return int(engine.blocks_running())


def _main(argv: Sequence[str] | None) -> int:
    args = build_parser().parse_args(argv)
    args.own_process = argv is None  # the command line itself, not a call from a caller's Python
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "INFO")
    if not args.verbose:
        # dask reads this when distributed is first imported (later, lazily)
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")
    try:
        return int(args.func(args) or 0)
    except ReportNotWrittenError as e:  # after the run's summary: the run's own status stands
        _eprint(f"twinpass: error: {e}")
        return e.exit_status
    except TwinpassError as e:
        _eprint(f"twinpass: error: {e}")
        return 2
    except KeyboardInterrupt:
        _eprint("twinpass: interrupted; finished blocks are kept, rerun to resume")
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # The reader of the output went away (`twinpass design ... | head`): no traceback,
        # and nothing more written to that pipe at exit (the Python documentation's advice
        # on SIGPIPE); 141 = 128 + SIGPIPE, as a shell reports such a command.
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 141


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
