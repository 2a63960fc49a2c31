"""One run over an archive, without Prefect: design -> discover -> plan -> blocks -> finalise.

The Prefect flow (:mod:`twinpass.flows`) calls the same steps as tasks; the CLI's
``--no-flow`` path calls :func:`run_job` directly.
"""

from __future__ import annotations

import collections
import dataclasses
import datetime as _dt
import logging
import os
import threading
import traceback
import uuid
from concurrent.futures import Future, ThreadPoolExecutor, wait
from dataclasses import dataclass, field
from typing import Any, Callable

from .config import JobConfig, check_run_overrides
from .core.checks import was_cancelled
from .core.design import design_filter, response_report
from .core.plan import FilePlan, Plan, fingerprint_changed, make_plan
from .core.segments import InvalidFile, Segment
from .core.types import Design, FileRecord
from .engine import (
    DONE,
    CancellableClient,
    FileOutcome,
    FileWork,
    SegmentWork,
    design_digest_for,
    run_segment,
    segment_notes,
)
from .errors import ArchiveError, RunNotRecordedError, SpecError, TwinpassError, failure_text
from .io.archive import Discovery, check_archive_root, discover, output_name
from .io.channels import LABEL_ATTRS
from .io.store import OutputStore
from .io.store_input import INPUT_GONE
from .io.store_util import library_versions

log = logging.getLogger("twinpass.job")


@dataclass
class Prepared:
    """Everything decided before any block runs."""

    cfg: JobConfig
    discovery: Discovery
    designs: dict[float, Design]
    design_errors: dict[float, str]
    plan: Plan
    work: list[SegmentWork]
    invalid: list[FilePlan] = field(default_factory=list)


def designs_for(cfg: JobConfig, rates: set[float]) -> tuple[dict[float, Design], dict[float, str]]:
    """One design per distinct sample rate; a rate the spec cannot serve is reported, not raised."""
    designs: dict[float, Design] = {}
    errors: dict[float, str] = {}
    for fs in sorted(rates):
        try:
            designs[fs] = design_filter(cfg.response, fs, cfg.processing.tolerance)
        except SpecError as e:
            errors[fs] = str(e)
    return designs, errors


def _action(fp: FilePlan) -> Any:
    if fp.redo is None:
        return "skip"
    if fp.redo == "all":
        return "resume" if fp.resume else "all"
    return tuple(tuple(s) for s in fp.redo)


def segment_work(seg: Segment, plan: Plan) -> SegmentWork:
    """The engine's view of a planned segment."""
    plans = {fp.relpath: fp for fp in plan.for_segment(seg.id)}
    files = []
    for f, off in zip(seg.files, seg.offsets):
        fp = plans.get(f.relpath)
        files.append(FileWork(
            relpath=f.relpath, array_name=output_name(f), spec=f.spec, frames=f.frames, seg_offset=off,
            stream=seg.stream, start_time=None if f.start_time is None else f.start_time.isoformat(),
            fingerprint=f.fingerprint or {}, action="skip" if fp is None else _action(fp),
            full_scale=f.info.full_scale, fill=f.nonfinite_fill, filled_spans=f.filled_spans, nan_spans=f.holes,
            channel_names=f.channel_names, units=f.units,
        ))
    return SegmentWork(seg.id, seg.stream, seg.sample_rate_hz, seg.channels, seg.frames, tuple(files),
                       holes=seg.holes)


def prepare(cfg: JobConfig, store: OutputStore, *, force: bool = False) -> Prepared:
    """Discover the archive, design per rate and plan against what ``store`` records.

    Float files are scanned for NaN/Inf only when the store's scan cache holds nothing valid
    for them (:func:`twinpass.io.archive.discover`); a writable store then gets the updated
    cache (files gone from the archive drop out). A read-only store is never written.
    """
    read_cache = getattr(store, "read_scan_cache", None)
    cache = read_cache() if read_cache is not None else {}
    records = store.file_records()
    owners = {rec.array_name: rec.source for rec in records.values() if rec.array_name}
    disc = discover(cfg, scan_cache=cache, owners=owners)
    if not disc.files and not disc.invalid:
        raise ArchiveError(nothing_selected(cfg, disc, len(records)), path=str(cfg.archive_root))
    segments, invalid = disc.segments()
    rates = {s.sample_rate_hz for s in segments}
    designs, design_errors = designs_for(cfg, rates)
    bad_rates = set(design_errors)
    if bad_rates:
        keep = []
        for s in segments:
            if s.sample_rate_hz in bad_rates:
                invalid.extend(InvalidFile(f.relpath, f"no filter for {s.sample_rate_hz:g} Hz: "
                                           f"{design_errors[s.sample_rate_hz].rstrip('.')}",
                                           "adjust [response] so that it suits this rate, or leave these files "
                                           "out with [archive] exclude", stream=s.stream)
                               for f in s.files)
            else:
                keep.append(s)
        segments = keep
    digests = {fs: design_digest_for(d, cfg) for fs, d in designs.items()}
    halos = {fs: d.effective_length for fs, d in designs.items()}
    plan = make_plan(segments, invalid, records, digests, halos, force=force, notes=disc.warnings,
                     out_dtype=cfg.output.dtype)
    if disc.scans != cache and hasattr(store, "write_scan_cache") and getattr(store, "read_only", True) is False:
        store.write_scan_cache(disc.scans)
    work = [segment_work(s, plan) for s in plan.segments]
    notes = [n for w in work for n in segment_notes(w, designs[w.sample_rate_hz], cfg)]
    notes += relabel_note(plan, work)
    if notes:
        plan = dataclasses.replace(plan, notes=tuple(plan.notes) + tuple(notes))
    return Prepared(cfg, disc, designs, design_errors, plan, work, list(plan.invalid))


CENSUS_ENTRIES = 100_000
"""Entries of the archive root looked at, at most, to say what it holds when nothing matched."""


def nothing_selected(cfg: JobConfig, disc: Discovery, outputs: int) -> str:
    """The error for an archive in which no path matches the include globs: what the root
    holds (files by suffix; a ``.zarr`` folder counts as one), the globs, what to check."""
    census: dict[str, int] = {}
    seen = 0
    for folder, dirs, files in os.walk(cfg.archive_root):
        kept = []
        for d in dirs:
            if d.lower().endswith(".zarr"):
                census["*.zarr"] = census.get("*.zarr", 0) + 1
            else:
                kept.append(d)
        dirs[:] = kept
        for f in files:
            suffix = os.path.splitext(f)[1].lower()
            key = f"*{suffix}" if suffix else "names without a suffix"
            census[key] = census.get(key, 0) + 1
        seen += len(files) + len(dirs)
        if seen > CENSUS_ENTRIES:
            break
    if census:
        top = sorted(census.items(), key=lambda kv: (-kv[1], kv[0]))
        held = "it holds " + ", ".join(f"{n} {key}" for key, n in top[:8]) + (" and more" if len(top) > 8 else "")
    else:
        held = "it holds no files"
    exclude = f", exclude = {list(cfg.archive.exclude)}" if cfg.archive.exclude else ""
    earlier = (f" The store holds {outputs} output(s) of earlier runs; nothing was changed." if outputs else "")
    notes = "".join(f" {w}." for w in disc.warnings)
    return (f"no input file in the archive {cfg.archive_root} matches [archive] include = "
            f"{list(cfg.archive.include)}{exclude} (in {cfg.source}): {held}. Check that the archive is there "
            "(a mounted disk or share) and that include names the recordings' suffixes (globs match letter "
            "case exactly; a Zarr array is a folder: \"**/*.zarr\")." + earlier + notes)


def warned_line(summary: dict[str, Any]) -> str:
    """One line for a complete file whose blocks warned, from its outcome's ``summary``
    (``blocks``, ``blocks_warn`` and the worst figures of
    :func:`~twinpass.core.checks.summarise`)."""
    worst = []
    if summary.get("passband_dev_db") is not None:
        worst.append(f"passband deviation {summary['passband_dev_db']:+.2f} dB")
    if summary.get("phase_deg") is not None:
        worst.append(f"phase {summary['phase_deg']:+.2g} deg")
    figures = f" (worst of the file: {', '.join(worst)})" if worst else ""
    return (f"{summary.get('blocks_warn')} of {summary.get('blocks')} block(s) graded warn{figures}; "
            "complete all the same: `twinpass status` shows each figure against its limits")


@dataclass
class RunResult:
    run_id: str
    started: str
    ended: str
    outcomes: list[FileOutcome]
    invalid: list[FilePlan]
    designs: dict[float, Design]
    removed: list[FilePlan] = field(default_factory=list)
    """Files the store has outputs of that are no longer in the archive."""
    notes: list[str] = field(default_factory=list)
    """The plan's notes (:attr:`twinpass.core.plan.Plan.notes`)."""
    interrupted: bool = False
    """The run was stopped (Ctrl-C) before its end: ``outcomes`` are what it did until then
    (:meth:`RunTally.result`), files it did not finish ``"unfinished"``; their finished
    blocks are kept, and the next run does the rest."""

    @classmethod
    def ending_now(cls, run_id: str, started: str, prep: Prepared, outcomes: list[FileOutcome]) -> RunResult:
        """The result of the run ``run_id`` of ``prep`` ending now with ``outcomes``."""
        return cls(run_id, started, now_iso(), outcomes, prep.invalid, prep.designs, list(prep.plan.removed),
                   list(prep.plan.notes))

    @property
    def failed(self) -> list[str]:
        return [o.relpath for o in self.outcomes if o.status == "failed"]

    def failure_reasons(self) -> dict[str, str]:
        """Why each failed file failed, one line each: the first line of its first recorded
        error, and its blocks that failed their checks (the first few, with figure, limit and
        remedy; :class:`~twinpass.core.failures.CheckFailures`)."""
        out = {}
        for o in self.outcomes:
            if o.status == "failed":
                first = next((str(e) for _, e in sorted(o.errors.items()) if e), "")
                parts = [first.splitlines()[0]] if first else []
                if o.check_failures is not None:
                    parts.append(o.check_failures.summary)
                out[o.relpath] = "; also ".join(parts) or (f"{o.blocks_failed} block(s) not done; the next run does "
                                                       "them (`twinpass status` shows the file's blocks)")
        return out

    def warnings(self) -> dict[str, str]:
        """The complete files with blocks graded warn, each with one line: how many blocks,
        and the worst passband deviation (dB), phase (degrees) and clipped samples among the
        file's blocks (:func:`~twinpass.core.checks.summarise`). A warned block counts as
        passed (the file is complete); the line says it all the same."""
        return {o.relpath: warned_line(o.summary) for o in self.outcomes
                if o.status == "complete" and int(o.summary.get("blocks_warn") or 0)}

    def failed_blocks(self) -> dict[str, dict[str, Any]]:
        """Each failed file's blocks that failed their checks: ``{"blocks": [one line per
        block], "remedy": text}`` by source path (files with such blocks only)."""
        return {o.relpath: {"blocks": list(o.check_failures.blocks), "remedy": o.check_failures.remedy}
                for o in self.outcomes if o.status == "failed" and o.check_failures is not None}

    def retried(self) -> dict[str, int]:
        """Files with blocks done only after a failed attempt (:meth:`RunTally.retried`): how
        many blocks, by source path. Not failures; :func:`twinpass.status.retried_line` says them."""
        return {o.relpath: o.blocks_retried for o in self.outcomes if o.blocks_retried}

    def exit_status(self) -> int:
        """The command's exit status: 1 some files failed, 3 none failed but inputs were left
        out (invalid input, or no filter for their sample rate), 0 otherwise."""
        return 1 if self.failed else 3 if self.invalid else 0

    def counts(self) -> dict[str, int]:
        """Files per status (``complete``, ``failed``, ``skipped``, ``invalid``, and for an
        interrupted run ``unfinished``), ``blocks_run``, the blocks the run ran (a block run
        again by a retry of its segment's task counts once, as in the flow run's per-file
        table), and ``blocks_retried``, the blocks done only after a failed attempt
        (:meth:`retried`)."""
        c: dict[str, int] = {"complete": 0, "failed": 0, "skipped": 0, "invalid": len(self.invalid)}
        if self.interrupted:
            c["unfinished"] = 0
        for o in self.outcomes:
            c[o.status] = c.get(o.status, 0) + 1
        c["blocks_run"] = sum(o.blocks_run - o.blocks_rerun for o in self.outcomes)
        c["blocks_retried"] = sum(o.blocks_retried for o in self.outcomes)
        return c

    @property
    def ok(self) -> bool:
        return not self.failed


class RunTally:
    """What a run's segment drivers report while they run, for the record of a run stopped
    before its end (their outcomes never reach the code that waited for them).

    Fed from the drivers' threads: :meth:`block` with each block the engine has recorded
    in the store (its per-block callback), :meth:`ended` with a driver's outcomes when it
    returns (a stopped run's drivers return too, their unfinished blocks recorded as
    cancelled). Thread-safe.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._ran: dict[str, collections.Counter[str]] = {}
        self._ended: dict[str, list[FileOutcome]] = {}
        self._seen: dict[str, set[tuple[str, int]]] = {}
        """Blocks (output array, block index) run so far, by segment."""
        self._failed: dict[str, set[tuple[str, int]]] = {}
        """Blocks recorded failed (error or failed checks) by an attempt of the segment's task."""
        self._retried: dict[str, set[tuple[str, int]]] = {}
        """Blocks done only after a failed attempt (see :meth:`retried`)."""

    def block(self, segment_id: str, res: Any) -> None:
        """Count a recorded block of ``segment_id`` (a ``BlockResult``) as run, unless its task was
        cancelled (the run was stopped: nothing ran, or what ran was not recorded); note it
        as retried when it is done after a failed attempt (see :meth:`retried`)."""
        if was_cancelled(res.error):
            return
        key = (res.array_name, int(res.block_index))
        with self._lock:
            self._ran.setdefault(segment_id, collections.Counter())[res.array_name] += 1
            self._seen.setdefault(segment_id, set()).add(key)
            failed = self._failed.setdefault(segment_id, set())
            if res.status in DONE:
                if res.attempts > 1 or key in failed:
                    self._retried.setdefault(segment_id, set()).add(key)
            else:
                failed.add(key)

    def ran(self, segment_id: str) -> dict[str, int]:
        """Blocks run so far for ``segment_id`` (every attempt), by output array."""
        with self._lock:
            return dict(self._ran.get(segment_id, {}))

    def _per_array(self, table: dict[str, set[tuple[str, int]]], segment_id: str) -> dict[str, int]:
        with self._lock:
            return dict(collections.Counter(name for name, _ in table.get(segment_id, ())))

    def retried(self, segment_id: str) -> dict[str, int]:
        """Blocks of ``segment_id`` done only after a failed attempt, by output array: the
        block's task retried it (``BlockResult.attempts`` > 1), or an earlier attempt of the
        segment's task recorded it failed. Done all the same, but a sign of trouble in
        reaching the input or the store (a flaky mount, a worker lost)."""
        return self._per_array(self._retried, segment_id)

    def with_blocks(self, segment_id: str, outcomes: list[FileOutcome]) -> list[FileOutcome]:
        """``outcomes`` of ``segment_id`` with the blocks counted here: ``blocks_run`` (every
        attempt; at least what the outcome counts), ``blocks_rerun`` (runs of blocks run
        before) and ``blocks_retried`` (:meth:`retried`)."""
        ran, distinct = self.ran(segment_id), self._per_array(self._seen, segment_id)
        retried = self.retried(segment_id)
        out = []
        for o in outcomes:
            runs = max(o.blocks_run, ran.get(o.array_name, 0))
            out.append(dataclasses.replace(o, blocks_run=runs,
                                           blocks_rerun=max(0, runs - distinct.get(o.array_name, runs)),
                                           blocks_retried=retried.get(o.array_name, 0)))
        return out

    def ended(self, segment_id: str, outcomes: list[FileOutcome]) -> None:
        """Note the outcomes a driver of ``segment_id`` returned (a later attempt's replace them)."""
        with self._lock:
            self._ended[segment_id] = list(outcomes)

    def outcomes(self, prep: Prepared) -> list[FileOutcome]:
        """Per-file outcomes of the run so far, every file of ``prep`` once.

        A segment whose driver returned has its outcomes, each with the blocks counted here
        as run, and a file that failed only because its blocks were cancelled (no block
        failed its checks or raised) counted ``"unfinished"``. The files with work of a
        segment whose driver did not return (not started, or raised) are ``"unfinished"``
        with the blocks counted here; files without work are ``"skipped"``.
        """
        out: list[FileOutcome] = []
        for w in prep.work:
            with self._lock:
                ended = self._ended.get(w.segment_id)
            if ended is None:
                out += self.with_blocks(w.segment_id, [
                    FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped") if f.action == "skip"
                    else FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "unfinished") for f in w.files])
                continue
            for o in self.with_blocks(w.segment_id, [dataclasses.replace(o, blocks_run=0) for o in ended]):
                stopped = (o.status == "failed" and o.check_failures is None and not o.summary.get("blocks_fail")
                           and all(was_cancelled(e) for e in o.errors.values()))
                out.append(dataclasses.replace(o, status="unfinished" if stopped else o.status))
        return out

    def result(self, run_id: str, started: str, prep: Prepared) -> RunResult:
        """The result of the run ``run_id`` of ``prep`` stopped now (:meth:`outcomes`), for
        :func:`finish_interrupted_run`."""
        return RunResult.ending_now(run_id, started, prep, self.outcomes(prep))


def open_run_store(cfg: JobConfig) -> OutputStore:
    """The output store a run of ``cfg`` writes, created if missing, once its archive is there.

    Raises
    ------
    ArchiveError
        The archive root is not a folder (or the configured manifest is not a file): the run
        cannot begin, and nothing is created.
    UnsafePathError, StoreError
        As :meth:`OutputStore.open`.
    """
    check_archive_root(cfg)
    return OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)


def now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def begin_run(store: OutputStore, prep: Prepared) -> None:
    """Root provenance before any block runs, and where unchanged files now sit."""
    store.set_root_info({"response": prep.cfg.response.to_dict(),
                         "processing": prep.cfg.to_dict()["processing"],
                         "checks": prep.cfg.to_dict()["checks"],
                         "designs": {f"{fs:g}": d.report for fs, d in prep.designs.items()}},
                        library_versions())
    update_placement(store, prep)
    mark_inputs_gone(store, prep)


def _label_changes(fw: FileWork, rec: FileRecord) -> dict[str, tuple[str, ...] | None]:
    """The labels (``channel_names``, ``units``) of ``fw`` that differ from those its output
    holds (None: no longer given)."""
    now = {"channel_names": fw.channel_names, "units": fw.units}
    was = {"channel_names": rec.channel_names, "units": rec.units}
    return {key: value for key, value in now.items() if value != was[key]}


RELABEL_NAMED = 3
"""Files named in the note on relabelled outputs (the rest are counted)."""


def relabel_note(plan: Plan, work: list[SegmentWork]) -> list[str]:
    """A note naming the unchanged files whose channel names or units changed (the
    configuration or a sidecar edited): their outputs' attributes are rewritten, no block
    runs for them (:func:`update_placement`). Empty when there are none."""
    records = plan.records()
    files = [fw.relpath for w in work for fw in w.files
             if fw.action == "skip" and fw.relpath in records and _label_changes(fw, records[fw.relpath])]
    if not files:
        return []
    more = f" and {len(files) - RELABEL_NAMED} more" if len(files) > RELABEL_NAMED else ""
    return [f"channel names or units changed for {len(files)} unchanged file(s) ({', '.join(files[:RELABEL_NAMED])}"
            f"{more}): their outputs' attributes channel_names and units are rewritten; nothing is refiltered"]


def update_placement(store: OutputStore, prep: Prepared) -> None:
    """Rewrite the ``stream``, ``start_time`` and ``segment`` attributes of the outputs of
    unchanged files whose stream or start time changed without their samples (a manifest or
    a file name corrected; the plan's reason says so), and their ``channel_names`` and
    ``units`` where those changed (the configuration or a sidecar edited; a label given no
    more is removed). Their values stand, so no block runs for them; a join the change moves
    is refiltered as the plan says."""
    records = prep.plan.records()
    for w in prep.work:
        for fw in w.files:
            rec = records.get(fw.relpath)
            if fw.action != "skip" or rec is None:
                continue
            now = {"stream": w.stream, "start_time": fw.start_time, "segment": w.segment_id}
            was = {"stream": rec.stream, "start_time": rec.start_time, "segment": rec.segment}
            moved = {key: value for key, value in now.items() if value != was[key]}
            moved.update(_label_changes(fw, rec))
            dropped = [key for key in LABEL_ATTRS if key in moved and moved[key] is None]
            moved = {key: list(value) if isinstance(value, tuple) else value
                     for key, value in moved.items() if key not in dropped}
            if moved:
                store.update_attrs(fw.array_name, **moved)
            if dropped:
                store.drop_attrs(fw.array_name, *dropped)


def _same_content_now(rec: FileRecord, prep: Prepared) -> str | None:
    """A new input of ``prep`` whose fingerprint matches the one ``rec`` was filtered from
    (the file renamed or moved to another stream), or ``None``."""
    new = {fp.relpath for fp in prep.plan.files if fp.record is None}
    for entry in prep.discovery.files:
        if entry.relpath in new and entry.fingerprint and rec.source_fingerprint:
            if not fingerprint_changed(rec.source_fingerprint, entry.fingerprint)[0]:
                return entry.relpath
    return None


def mark_inputs_gone(store: OutputStore, prep: Prepared) -> None:
    """Mark the outputs of inputs no longer in the archive or left out of this run (invalid),
    and unmark those whose input is back.

    An output of a removed input (:attr:`~twinpass.core.plan.Plan.removed`: deleted, renamed,
    moved to another stream, or left out by ``[archive] exclude``) keeps its samples, but they
    are no longer part of any stream: its neighbours are refiltered as segment ends. It gets
    the attribute ``input_gone`` (:data:`~twinpass.io.store_input.INPUT_GONE`: since this run,
    and why), once, so that a later job reading this store leaves it out. An output whose input
    is in the archive again (to be skipped as unchanged, or refiltered) loses the mark before
    any block runs.
    """
    def unmarked(fp: FilePlan) -> bool:
        rec = fp.record
        return rec is not None and rec.array_name is not None and rec.gone_since is None

    marks: list[tuple[FilePlan, str]] = []
    for fp in filter(unmarked, prep.plan.removed):
        why = (f"its input {fp.relpath} is no longer in the archive (deleted, renamed, moved to another stream, "
               "or left out by [archive] exclude); the samples are kept as they were, but no stream of the "
               "archive holds them any more")
        twin = _same_content_now(fp.record, prep)  # type: ignore[arg-type]
        if twin is not None:
            why += f"; the input {twin}, with the same content, is filtered as a new file"
        marks.append((fp, why))
    for fp in filter(unmarked, prep.plan.invalid):  # left out of this run: its neighbours are segment ends too
        marks.append((fp, f"its input {fp.relpath} is left out of this run ({fp.reason}); the samples are kept as "
                          "they were filtered before, but no stream of the archive holds them now"))
    for fp, why in marks:
        store.update_attrs(fp.record.array_name,  # type: ignore[union-attr]
                           **{INPUT_GONE: {"since": now_iso(), "run_id": store.lock_run_id or None, "reason": why}})
    for fp in prep.plan.files:
        rec = fp.record
        if rec is not None and rec.array_name is not None and rec.gone_since is not None:
            store.drop_attrs(rec.array_name, INPUT_GONE)


def finish_run(store: OutputStore, result: RunResult, cfg: JobConfig) -> None:
    """Record the run: its entry, and in its own record the files it left out (invalid:
    reason and remedy) and the outputs whose input is gone (see ``twinpass status``)."""
    entry = {"run_id": result.run_id, "start": result.started, "end": result.ended,
             "counts": result.counts(), "config_digest": cfg.digest(), "failed": result.failed,
             "versions": library_versions()}
    if result.interrupted:
        entry["interrupted"] = True
    store.append_run(entry, details={"left_out": {b.relpath: b.explained for b in result.invalid},
                                     "gone": [r.relpath for r in result.removed],
                                     "notes": list(result.notes),
                                     "failed": result.failure_reasons(),
                                     "failed_blocks": result.failed_blocks(),
                                     "retried": result.retried()})


def finish_interrupted_run(store: OutputStore, result: RunResult, cfg: JobConfig) -> None:
    """Record a run stopped before its end (Ctrl-C) as interrupted; never raises.

    Called on the way out of an interrupted run, still holding the lock, so that the
    store's last run is this one and ``twinpass status`` does not show the run before it.
    """
    try:
        finish_run(store, dataclasses.replace(result, ended=now_iso(), interrupted=True), cfg)
    except Exception:  # the interruption is what the caller reports
        log.warning("the interrupted run %s could not be recorded in the store", result.run_id, exc_info=True)


def segment_failed(w: SegmentWork, exc: BaseException, say: Callable[[str], None]) -> list[FileOutcome]:
    """Outcomes of a segment whose driver raised: its files with work failed, naming the error."""
    msg = failure_text(exc)
    if not isinstance(exc, TwinpassError):
        msg += "\n" + "".join(traceback.format_exception(exc, limit=6))
    say(f"segment {w.segment_id} failed: {msg.splitlines()[0]}")
    return [FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped") if f.action == "skip"
            else FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "failed", errors={-1: msg})
            for f in w.files]


def expect_segments(progress: Any, busy: list[SegmentWork]) -> None:
    """Tell ``progress`` (a block callback) the segments whose blocks are about to run, when it
    has an ``expect(segment_ids)`` method (the terminal's progress bar does): it then knows
    which segments have not reported their block totals yet."""
    expect = getattr(progress, "expect", None)
    if expect is not None:
        expect([w.segment_id for w in busy])


def _stop_drivers(pool: ThreadPoolExecutor, drivers: list[Future[Any]], client: CancellableClient) -> None:
    """Stop a run's segment drivers: segments not started are dropped, and the blocks of
    those running are cancelled until every driver has returned (each records its
    unfinished blocks as not done). Only then may the cluster close."""
    pool.shutdown(wait=False, cancel_futures=True)
    client.cancel_until(lambda timeout: not wait(drivers, timeout=timeout).not_done)


def run_job(cfg: JobConfig, *, force: bool = False, scheduler: str | None = None, workers: int | None = None,
            on_block: Callable[[str, int, int, Any], None] | None = None,
            log_fn: Callable[[str], None] | None = None) -> RunResult:
    """Run the whole job with the engine alone (no Prefect).

    Parameters
    ----------
    cfg : JobConfig
    force : bool
        Recompute every valid file, changed or not.
    scheduler, workers : optional
        Override ``[engine] scheduler`` / ``workers`` (see :func:`twinpass.engine.dask_client`).
    on_block : callable, optional
        ``on_block(segment_id, done, total, result)`` after each block (from driver threads,
        one per segment running); first told the segments to run if it can be
        (:func:`expect_segments`).
    log_fn : callable, optional
        Receives one-line messages (invalid inputs, clean-up, failed segments).

    Returns
    -------
    RunResult
        Per-file outcomes; a segment whose driver raised has its files ``"failed"`` with
        the error under block index -1, and the other segments still run.

    Raises
    ------
    RunNotRecordedError
        The blocks ended but the run could not be recorded in the store; its ``result``
        holds the outcomes.
    TwinpassError
        The run could not begin (configuration, archive, a locked or unusable store); a
        ``scheduler`` or ``workers`` that cannot run is refused before anything is recorded.
    """

    check_run_overrides(scheduler, workers)  # before the store is locked or the run recorded
    say = log_fn or log.info
    run_id = uuid.uuid4().hex[:12]
    started = now_iso()
    store = open_run_store(cfg)
    with store.lock(run_id):
        n = store.clean_partials()
        if n:
            say(f"removed {n} partial chunk file(s) left by an interrupted run")
        prep = prepare(cfg, store, force=force)
        for bad in prep.invalid:
            say(f"invalid: {bad.relpath}: {bad.explained}")
        for fp in prep.plan.removed:
            say(f"{fp.relpath}: {fp.reason}")
        for note in prep.plan.notes:
            say(f"note: {note}")
        begin_run(store, prep)
        outcomes: list[FileOutcome] = []
        busy = [w for w in prep.work if w.has_work]
        for w in prep.work:
            if not w.has_work:
                outcomes.extend(FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped") for f in w.files)
        tally = RunTally()
        expect_segments(on_block, busy)
        try:
            _run_busy(busy, prep, cfg, store, outcomes, scheduler, workers, on_block, say, tally)
        except BaseException:  # Ctrl-C: the run is recorded as interrupted, then the interrupt goes on
            finish_interrupted_run(store, tally.result(run_id, started, prep), cfg)
            raise
        result = RunResult.ending_now(run_id, started, prep, outcomes)
        try:
            finish_run(store, result, cfg)
        except TwinpassError as e:  # the store's own error, with the outcome the caller shows first
            raise RunNotRecordedError(str(e), result) from e
    return result


def _run_busy(busy: list[SegmentWork], prep: Prepared, cfg: JobConfig, store: OutputStore,
              outcomes: list[FileOutcome], scheduler: str | None, workers: int | None,
              on_block: Callable[[str, int, int, Any], None] | None, say: Callable[[str], None],
              tally: RunTally) -> None:
    """Run the segments with work on a Dask cluster, adding their outcomes to ``outcomes``;
    ``tally`` sees each block and each driver's outcomes as they come."""
    if not busy:
        return
    from .engine import dask_client  # imports distributed: only when there is work
    with dask_client(scheduler or cfg.engine.scheduler, workers or cfg.engine.workers) as dask:
        client = CancellableClient(dask)

        def one(w: SegmentWork) -> list[FileOutcome]:
            def cb(done: int, total: int, res: Any) -> None:
                tally.block(w.segment_id, res)
                if on_block is not None:
                    on_block(w.segment_id, done, total, res)

            try:
                outs = run_segment(w, prep.designs[w.sample_rate_hz], cfg, store, client, on_block=cb)
            except Exception as e:  # one segment's trouble (e.g. its store arrays) must not stop the others
                outs = segment_failed(w, e, say)
            tally.ended(w.segment_id, outs)
            return tally.with_blocks(w.segment_id, outs)

        with ThreadPoolExecutor(max_workers=4) as pool:
            drivers = [pool.submit(one, w) for w in busy]
            try:
                for d in drivers:
                    outcomes.extend(d.result())
            except BaseException:  # Ctrl-C: stop the drivers before the cluster closes
                _stop_drivers(pool, drivers, client)
                raise


__all__ = ["Prepared", "RunResult", "RunTally", "designs_for", "expect_segments", "open_run_store", "prepare",
           "run_job", "segment_work", "segment_failed", "library_versions", "response_report"]
