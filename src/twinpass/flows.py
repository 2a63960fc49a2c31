"""Prefect flow and tasks: the archive run as seen on Prefect's dashboard.

``archive_run`` (flow name ``twinpass-archive-run``): design -> plan -> one task per
segment with work (each wraps the engine's Dask work for its blocks) -> finalise ->
report. Unchanged files are not run; one ``skip-unchanged`` task run, in state
"Skipped", lists them. A failed segment never stops the others; the flow ends Failed
naming the failed files, Completed otherwise. Every future is resolved.

This is the only module (with :mod:`twinpass.prefect_blocks`) that imports prefect.
"""

from __future__ import annotations

from . import _prefect_env  # noqa: F401  (must precede the prefect import)

import contextlib
import re
import threading
import time
import uuid
from pathlib import Path
from typing import Any, Iterator

from prefect import flow, get_run_logger, task
from prefect.artifacts import (
    create_link_artifact,
    create_markdown_artifact,
    create_progress_artifact,
    create_table_artifact,
    update_progress_artifact,
)
from prefect.cache_policies import NO_CACHE
from prefect.states import Completed, Failed

from .config import JobConfig, load_config
from .core.design import format_report
from .engine import ERROR, FileOutcome, SegmentWork, dask_client, run_segment
from .errors import BlockFailedError
from .io.store import OutputStore
from .job import Prepared, RunResult, begin_run, finish_run, now_iso, prepare

FLOW_NAME = "twinpass-archive-run"
ARTIFACT_DESIGN = "twinpass-design"
ARTIFACT_FILES = "twinpass-files"
ARTIFACT_REPORT = "twinpass-report"

# Dask clients shared by the segment tasks of one flow run, by key (tasks run in threads
# of the flow's process; a client is not passed as a task parameter).
_CLIENTS: dict[str, Any] = {}
_CLIENTS_LOCK = threading.Lock()

TERMINAL_PROGRESS: Any = None
"""Optional ``callable(segment_id, done, total, result)`` the CLI sets for a terminal progress bar."""


@contextlib.contextmanager
def _shared_client(scheduler: str, workers: int) -> Iterator[str]:
    key = uuid.uuid4().hex
    with dask_client(scheduler, workers) as client:
        with _CLIENTS_LOCK:
            _CLIENTS[key] = client
        try:
            yield key
        finally:
            with _CLIENTS_LOCK:
                _CLIENTS.pop(key, None)


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
    create_markdown_artifact("\n".join(parts), key=ARTIFACT_DESIGN, description="Overall and per-pass response")
    return {f"{fs:g}": d.report for fs, d in prep.designs.items()}


@task(name="filter-segment", cache_policy=NO_CACHE, retries=1, retry_delay_seconds=5.0)
def filter_segment(seg: SegmentWork, prep: Prepared, store: OutputStore, client_key: str) -> list[FileOutcome]:
    """Run every block a segment needs on the shared Dask client; fail naming failed files.

    A retry reruns only the blocks that are not yet done (the block table persists).
    """
    logger = get_run_logger()
    cfg = prep.cfg
    client = _CLIENTS[client_key]
    design = prep.designs[seg.sample_rate_hz]
    todo = [f.relpath for f in seg.files if f.action != "skip"]
    logger.info("segment %s: %d file(s) to filter: %s", seg.segment_id, len(todo), ", ".join(todo))
    artifact_id = create_progress_artifact(0.0, description=f"blocks of segment {seg.segment_id}")
    last = [0.0]

    def on_block(done: int, total: int, res: Any) -> None:
        if TERMINAL_PROGRESS is not None:
            TERMINAL_PROGRESS(seg.segment_id, done, total, res)
        if res.status == ERROR:
            logger.error("block %d of %s failed after %d attempt(s): %s", res.block_index, res.array_name,
                         res.attempts, (res.error or "").splitlines()[0])
        now = time.monotonic()
        if done == total or now - last[0] > 1.0:
            last[0] = now
            update_progress_artifact(artifact_id, 100.0 * done / max(total, 1))

    outcomes = run_segment(seg, design, cfg, store, client, on_block=on_block)
    update_progress_artifact(artifact_id, 100.0)
    failed = [o for o in outcomes if o.status == "failed"]
    for o in outcomes:
        if o.status == "complete":
            logger.info("%s complete: %d block(s) run, %d done", o.relpath, o.blocks_run, o.blocks_done)
    if failed:
        names = "; ".join(f"{o.relpath} ({o.blocks_failed} block(s) not done: "
                          f"{next(iter(o.errors.values()), 'checks failed').splitlines()[0]})" for o in failed)
        raise BlockFailedError(f"segment {seg.segment_id}: {names}")
    return outcomes


@task(name="skip-unchanged", cache_policy=NO_CACHE)
def skip_unchanged(relpaths: list[str]) -> Any:
    """Say on the dashboard which files were left alone because nothing changed."""
    get_run_logger().info("%d unchanged file(s) skipped", len(relpaths))
    shown = ", ".join(relpaths[:20]) + (f" and {len(relpaths) - 20} more" if len(relpaths) > 20 else "")
    return Completed(name="Skipped", message=f"{len(relpaths)} unchanged file(s) skipped: {shown}",
                     data=relpaths)


@task(name="finalize-run", cache_policy=NO_CACHE)
def finalize_task(store: OutputStore, result: RunResult, cfg: JobConfig, durations: dict[str, float]) -> None:
    """Record the run in the store and publish the per-file table."""
    finish_run(store, result, cfg)
    rows = []
    for o in result.outcomes:
        s = o.summary or {}
        rows.append({
            "file": o.relpath, "status": o.status, "blocks": o.blocks, "blocks run": o.blocks_run,
            "blocks not done": o.blocks_failed, "seconds": round(durations.get(o.relpath, 0.0), 2),
            "worst passband dev (dB)": s.get("passband_dev_db"), "worst phase (deg)": s.get("phase_deg"),
            "stopband att (dB)": s.get("stopband_att_db"), "seam mismatch": s.get("seam_mismatch"),
        })
    for bad in result.invalid:
        rows.append({"file": bad.relpath, "status": "invalid", "blocks": 0, "blocks run": 0,
                     "blocks not done": 0, "seconds": 0.0, "worst passband dev (dB)": None,
                     "worst phase (deg)": None, "stopband att (dB)": None,
                     "seam mismatch": f"{bad.reason}; {bad.remedy}"})
    create_table_artifact(rows, key=ARTIFACT_FILES, description=f"twinpass run {result.run_id}")


@task(name="write-report", cache_policy=NO_CACHE)
def report_task(cfg: JobConfig) -> str:
    """Write the HTML report beside the store and link it on the dashboard."""
    from .report_data import write_report

    path = write_report(cfg)
    create_link_artifact(Path(path).resolve().as_uri(), link_text="twinpass report", key=ARTIFACT_REPORT,
                         description="Self-contained HTML report")
    return str(path)


def _load(config_path: str | None, config_block: str | None) -> JobConfig:
    if config_block:
        from .prefect_blocks import TwinpassJob

        return TwinpassJob.load(config_block).to_job_config()
    if not config_path:
        raise ValueError("give config_path or config_block")
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
    """
    logger = get_run_logger()
    cfg = _load(config_path, config_block)
    run_id = uuid.uuid4().hex[:12]
    started = now_iso()
    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    durations: dict[str, float] = {}
    with store.lock(run_id):
        cleaned = store.clean_partials()
        if cleaned:
            logger.warning("removed %d partial chunk file(s) left by an interrupted run", cleaned)
        prep = prepare(cfg, store, force=force)
        for bad in prep.invalid:
            logger.error("left out %s: %s; %s", bad.relpath, bad.reason, bad.remedy)
        for fp in prep.plan.removed:
            logger.warning("%s: %s", fp.relpath, fp.reason)
        design_task(prep)
        begin_run(store, prep)
        busy = [w for w in prep.work if w.has_work]
        unchanged = [f.relpath for w in prep.work for f in w.files if f.action == "skip"]
        idle = [w for w in prep.work if not w.has_work]
        outcomes: list[FileOutcome] = [FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped")
                                       for w in idle for f in w.files]
        if unchanged:
            skip_unchanged(unchanged)
        failed_files: list[str] = []
        if busy:
            seg_task = filter_segment.with_options(retries=cfg.flow.retries,
                                                   retry_delay_seconds=[cfg.flow.retry_delay_seconds * 2**i
                                                                        for i in range(max(cfg.flow.retries, 1))])
            with _shared_client(scheduler or cfg.engine.scheduler, workers or cfg.engine.workers) as key:
                futures = []
                for w in busy:
                    futures.append((w, time.perf_counter(),
                                    seg_task.with_options(task_run_name=f"filter-{_slug(w.segment_id)}")
                                    .submit(w, prep, store, key)))
                for w, t0, fut in futures:
                    fut.wait()
                    state = fut.state
                    secs = time.perf_counter() - t0
                    if state.is_completed():
                        outs = fut.result()
                    else:
                        outs = _outcomes_from_store(store, w)
                        failed_files += [o.relpath for o in outs if o.status == "failed"]
                    for o in outs:
                        durations[o.relpath] = secs
                    outcomes.extend(outs)
        result = RunResult(run_id, started, now_iso(), outcomes, prep.invalid, prep.designs)
        finalize_task(store, result, cfg, durations)
    report_path = None
    if report:
        report_path = report_task(cfg)
    summary = {"run_id": run_id, "counts": result.counts(), "failed": failed_files,
               "invalid": [b.relpath for b in prep.invalid], "store": cfg.store_location, "report": report_path}
    if failed_files:
        return Failed(message=f"{len(failed_files)} file(s) failed: {', '.join(failed_files)}", data=summary)
    return summary


def _outcomes_from_store(store: OutputStore, seg: SegmentWork) -> list[FileOutcome]:
    """Per-file outcomes of a segment whose task failed, read back from the block tables."""
    out = []
    for f in seg.files:
        if f.action == "skip":
            out.append(FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "skipped"))
            continue
        try:
            t = store.read_block_table(f.array_name, figures=False, seams=False)
        except Exception:
            out.append(FileOutcome(f.relpath, f.array_name, 0, 0, 0, 0, "failed"))
            continue
        c = t.counts()
        done = c["pass"] + c["warn"]
        out.append(FileOutcome(f.relpath, f.array_name, t.n_blocks, 0, done, t.n_blocks - done,
                               "complete" if done == t.n_blocks else "failed", errors=dict(t.errors)))
    return out


__all__ = ["FLOW_NAME", "archive_run", "filter_segment", "design_task", "finalize_task", "report_task"]
