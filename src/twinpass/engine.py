"""Dask execution of block work and the per-segment driver.

Block tasks are hand written: each receives a small, picklable :class:`BlockJob`
(reader descriptions, the window to read, the coefficients) and reads its own window,
so no whole-file array ever enters the task graph. The same code path serves local
threads, local processes and an existing distributed scheduler: all three go through a
:class:`distributed.Client`.

The driver (the thread that calls :func:`run_segment`) is the only writer of attributes
and block tables; block tasks write only their own whole chunks of one output array.
A block's status is recorded after its data, so a crash never leaves a block marked
done without its data.
"""

from __future__ import annotations

import contextlib
import logging
import time
import traceback
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterator

import numpy as np

from . import faults
from .config import ChecksConfig, JobConfig
from .core import checks as _checks
from .core.blocks import Layout, blocks_touching, choose_layout
from .core.kernel import block_window, filtfilt_window, resolve_edge_samples
from .core.types import Design
from .errors import BlockFailedError, InputError, TwinpassError
from .io.readers.base import ReaderSpec

log = logging.getLogger("twinpass.engine")

PENDING, PASS, WARN, FAIL, ERROR = 0, 1, 2, 3, 4
STATUS_NAMES = {PENDING: "pending", PASS: "pass", WARN: "warn", FAIL: "fail", ERROR: "error"}
DONE = (PASS, WARN)


# --------------------------------------------------------------------------- jobs
@dataclass(frozen=True)
class SourceSlice:
    """One input file of a segment: where it sits in segment coordinates."""

    spec: ReaderSpec
    seg_offset: int
    frames: int


def read_segment_window(sources: tuple[SourceSlice, ...], a: int, b: int, channels: int) -> np.ndarray:
    """Read segment samples [a, b) across file joins; float64 (b - a, channels)."""
    out = np.empty((b - a, channels), dtype=np.float64)
    filled = 0
    for src in sources:
        lo = max(a, src.seg_offset)
        hi = min(b, src.seg_offset + src.frames)
        if lo >= hi:
            continue
        with src.spec.open() as rec:
            out[lo - a : hi - a] = rec.read(lo - src.seg_offset, hi - src.seg_offset)
        filled += hi - lo
    if filled != b - a:
        raise InputError(f"segment window [{a}, {b}) is not covered by its files (read {filled} samples)")
    return out


@dataclass(frozen=True)
class BlockJob:
    """Everything one block task needs; small and picklable."""

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
    attempts: int = 1
    seconds: float = 0.0
    window_samples: int = 0


def _filter_block(job: BlockJob, tamper: set[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Return (x_core, y_core, seams, window_samples) for a job."""
    s, e = job.core
    n = job.segment_frames
    k = job.seam_samples
    xs, xe = max(0, s - k), min(n, e + k)
    halo = 0 if "halo0" in tamper else job.halo
    ws, we, at_start, at_end = block_window(xs, xe, n, halo, job.edge_samples)
    window = read_segment_window(job.sources, ws, we, job.channels)
    sos, taps = job.design.sos, job.design.taps
    if "perturb" in tamper:
        if sos is not None:
            sos = sos.copy()
            sos[0, :3] *= np.sqrt(2.0)  # +3 dB per pass, +6 dB overall
        elif taps is not None:
            taps = taps * np.sqrt(2.0)
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


def run_block(job: BlockJob) -> BlockResult:
    """Filter, check and write one block, retrying with backoff. Never raises for block errors."""
    t0 = time.perf_counter()
    last = ""
    for attempt in range(job.retries + 1):
        try:
            tamper = faults.apply(job.array_name, job.block_index)
            x, y, seams, wlen = _filter_block(job, tamper)
            figs = _checks.block_figures(
                x, y, job.design, job.checks_cfg, out_dtype=job.out_dtype, response=job.check_response
            )
            status = _checks.grade(figs, job.design, job.checks_cfg, job.design.tolerance)
            if job.write:
                from .io.store import write_block_data

                write_block_data(job.store_location, job.array_name, job.core[0] - job.file_offset,
                                 y.astype(job.out_dtype))
            return BlockResult(job.array_name, job.block_index, status, figs, seams, None,
                               attempt + 1, time.perf_counter() - t0, wlen)
        except Exception as exc:  # a block failure must never stop the others
            last = f"{type(exc).__name__}: {exc}"
            if not isinstance(exc, TwinpassError):
                last += "\n" + traceback.format_exc(limit=4)
            if attempt < job.retries:
                time.sleep(job.retry_backoff_seconds * 2**attempt)
    return BlockResult(job.array_name, job.block_index, ERROR, None, None, last,
                       job.retries + 1, time.perf_counter() - t0, 0)


# ----------------------------------------------------------------------- clients
@contextlib.contextmanager
def dask_client(scheduler: str = "threads", workers: int = 2) -> Iterator[Any]:
    """A :class:`distributed.Client` for ``threads``, ``processes`` or an address."""
    from distributed import Client, LocalCluster

    if "://" in scheduler:
        client = Client(scheduler, timeout="20s")
        try:
            yield client
        finally:
            client.close()
        return
    processes = scheduler == "processes"
    cluster = LocalCluster(
        n_workers=workers if processes else 1,
        threads_per_worker=1 if processes else workers,
        processes=processes,
        dashboard_address=None,
        silence_logs=logging.ERROR,
    )
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


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


@dataclass(frozen=True)
class SegmentWork:
    segment_id: str
    stream: str
    sample_rate_hz: float
    channels: int
    frames: int
    files: tuple[FileWork, ...]

    @property
    def has_work(self) -> bool:
        return any(f.action != "skip" for f in self.files)


@dataclass
class FileOutcome:
    relpath: str
    array_name: str
    blocks: int
    blocks_run: int
    blocks_done: int
    blocks_failed: int
    status: str
    """"complete", "failed", "skipped"."""
    seconds: float = 0.0
    errors: dict[int, str] = field(default_factory=dict)
    summary: dict[str, Any] = field(default_factory=dict)


def _layout(seg: SegmentWork, design: Design, cfg: JobConfig) -> Layout:
    return choose_layout(
        sample_rate_hz=seg.sample_rate_hz,
        channels=seg.channels,
        halo=design.effective_length,
        block_seconds=cfg.processing.block_seconds,
        chunk_seconds=cfg.output.chunk_seconds,
        memory_budget_mib=cfg.processing.memory_budget_mib,
    )


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
        "start_time": fw.start_time,
        "edge_zone_samples": [int(zone_start), int(zone_end)],
        "filter": {
            "family": design.family,
            "order": int(design.order),
            **design.coefficients(),
            "edge": cfg.processing.edge,
            "edge_samples": int(edge_samples),
            "tolerance": float(design.tolerance),
            "effective_length_samples": int(L),
        },
        "design_digest": design_digest_for(design, cfg),
        "blocks": {"block_samples": layout.block_samples, "chunk_samples": layout.chunk_for(fw.frames),
                   "halo_samples": layout.halo},
    }


def design_digest_for(design: Design, cfg: JobConfig) -> str:
    from . import __version__

    return design.digest({"edge": cfg.processing.edge, "edge_samples": str(cfg.processing.edge_samples),
                          "version": __version__})


ProgressFn = Callable[[int, int, BlockResult], None]


def run_segment(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, client: Any,
                *, on_block: ProgressFn | None = None) -> list[FileOutcome]:
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
    """
    from distributed import as_completed

    t0 = time.perf_counter()
    layout = _layout(seg, design, cfg)
    edge_samples = segment_edge_samples(seg.frames, design, cfg)
    k = cfg.checks.seam_samples
    columns = list(_checks.FIGURES)
    sources = tuple(SourceSlice(f.spec, f.seg_offset, f.frames) for f in seg.files)
    jobs: list[BlockJob] = []
    spans_by_file: dict[str, list[tuple[int, int]]] = {}
    for fw in seg.files:
        spans = layout.spans(fw.frames)
        spans_by_file[fw.array_name] = spans
        if fw.action == "skip":
            continue
        attrs = file_attrs(seg, fw, design, cfg, layout, edge_samples)
        table = store.prepare_file(
            fw.array_name, frames=fw.frames, channels=seg.channels, dtype=cfg.output.dtype,
            chunk_samples=layout.chunk_for(fw.frames), compression=cfg.output.compression, attrs=attrs,
            spans=spans, n_figures_columns=columns, seam_samples=k, keep_done=fw.action != "all",
        )
        status = np.asarray(table.status)
        todo = [i for i in range(len(spans)) if status[i] not in DONE]
        if isinstance(fw.action, tuple):
            redo = blocks_touching(spans, fw.action)
            if redo:
                store.invalidate_blocks(fw.array_name, redo)
            todo = sorted(set(todo) | set(redo))
        every = cfg.checks.every
        for i in todo:
            s, e = spans[i]
            a, b = fw.seg_offset + s - layout.halo - k, fw.seg_offset + e + layout.halo + k
            job_sources = tuple(src for src in sources
                                if src.seg_offset < b and a < src.seg_offset + src.frames)
            jobs.append(BlockJob(
                store_location=store.location, array_name=fw.array_name, block_index=i,
                core=(fw.seg_offset + s, fw.seg_offset + e), file_offset=fw.seg_offset,
                segment_frames=seg.frames, channels=seg.channels, sources=job_sources, design=design,
                halo=layout.halo, edge=cfg.processing.edge, edge_samples=edge_samples,
                out_dtype=cfg.output.dtype, seam_samples=k,
                check_response=bool(every) and i % every == 0, checks_cfg=cfg.checks,
                retries=cfg.engine.retries, retry_backoff_seconds=cfg.engine.retry_backoff_seconds,
            ))
    total = len(jobs)
    run_count: dict[str, int] = {}
    if jobs:
        futures = [client.submit(run_block, j, pure=False, retries=cfg.engine.retries,
                                 key=f"twinpass-block-{j.array_name}-{j.block_index}-{time.time_ns()}")
                   for j in jobs]
        by_key = {f.key: j for f, j in zip(futures, jobs)}
        done = 0
        for fut in as_completed(futures):
            job = by_key[fut.key]
            try:
                res: BlockResult = fut.result()
            except Exception as exc:  # worker lost repeatedly, cancelled...
                res = BlockResult(job.array_name, job.block_index, ERROR, error=f"{type(exc).__name__}: {exc}")
            store.record_block(res.array_name, res.block_index, res.status, res.figures, res.seams, res.error)
            run_count[res.array_name] = run_count.get(res.array_name, 0) + 1
            done += 1
            if res.status == ERROR:
                log.error("block %d of %s failed: %s", res.block_index, res.array_name,
                          (res.error or "").splitlines()[0])
            if on_block is not None:
                on_block(done, total, res)
            fut.release()
    touched = {fw.array_name for fw in seg.files if fw.action != "skip"}
    if touched:
        # Unchanged files of a busy segment: keep their segment id and edge zones current,
        # so the next plan sees how files are joined now.
        for fw in seg.files:
            if fw.action == "skip":
                a = file_attrs(seg, fw, design, cfg, layout, edge_samples)
                store.update_attrs(fw.array_name, segment=a["segment"], edge_zone_samples=a["edge_zone_samples"])
    _seam_pass(seg, store, spans_by_file, touched, design, cfg)
    outcomes = []
    elapsed = time.perf_counter() - t0
    for fw in seg.files:
        spans = spans_by_file[fw.array_name]
        if fw.array_name not in touched:
            outcomes.append(FileOutcome(fw.relpath, fw.array_name, len(spans), 0, len(spans), 0, "skipped"))
            continue
        table = store.read_block_table(fw.array_name)
        st = np.asarray(table.status)
        ok = bool(np.all(np.isin(st, DONE)))
        summary = _checks.summarise(table.figures)
        summary["blocks_pass"] = int(np.sum(st == PASS))
        summary["blocks_warn"] = int(np.sum(st == WARN))
        summary["blocks_fail"] = int(np.sum(st == FAIL))
        summary["blocks_error"] = int(np.sum(st == ERROR))
        store.set_complete(fw.array_name, ok, summary)
        outcomes.append(FileOutcome(
            fw.relpath, fw.array_name, len(spans), run_count.get(fw.array_name, 0),
            int(np.sum(np.isin(st, DONE))), int(np.sum(~np.isin(st, DONE))),
            "complete" if ok else "failed", elapsed, dict(table.errors), summary,
        ))
    return outcomes


class _MutableTable:
    """Writable copies of a block table's status, figures and seams."""

    def __init__(self, table: Any) -> None:
        self.status = np.array(table.status)
        self.figures = None if table.figures is None else np.array(table.figures)
        self.seams = table.seams
        self.errors = dict(table.errors)


def _seam_pass(seg: SegmentWork, store: Any, spans_by_file: dict[str, list[tuple[int, int]]],
               touched: set[str], design: Design, cfg: JobConfig) -> None:
    """Compare each block's samples beyond its edges with its neighbours' own samples."""
    if not touched or cfg.checks.seam_samples == 0:
        return
    tables = {fw.array_name: _MutableTable(store.read_block_table(fw.array_name)) for fw in seg.files}
    order: list[tuple[str, int]] = [(fw.array_name, i) for fw in seg.files
                                    for i in range(len(spans_by_file[fw.array_name]))]
    col = list(_checks.FIGURES).index("seam_mismatch")
    peak_col = list(_checks.FIGURES).index("peak_in")
    scales = [fw.full_scale for fw in seg.files if fw.full_scale]
    if scales:
        full_scale = max(scales)
    else:
        peaks = [np.nanmax(t.figures[..., peak_col]) for t in tables.values()
                 if t.figures is not None and np.isfinite(t.figures[..., peak_col]).any()]
        full_scale = max(peaks) if peaks else 1.0
    full_scale = full_scale if full_scale > 0 else 1.0
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
        for name, idx, t in ((na, ia, ta), (nb, ib, tb)):
            figs = np.array(t.figures[idx], dtype=np.float64)
            prev = figs[:, col]
            figs[:, col] = np.fmax(prev, mism)
            status = int(t.status[idx])
            if status in DONE:
                status = max(status, _checks.grade(figs, design, cfg.checks, design.tolerance))
            store.record_block(name, idx, status, figs, None, t.errors.get(idx))
            t.figures[idx] = figs
            t.status[idx] = status
