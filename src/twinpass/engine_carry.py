"""Carry mode: exact blockwise two-pass filtering of long IIR filters without halos.

A filter whose effective length (its halo) is many times the block length makes the halo
mode re-filter far more samples than each block owns. Carry mode instead cuts a segment
into blocks with no halo and carries the filter's state from block to block, which
reproduces the whole-segment two-pass result (``scipy.signal.sosfiltfilt``) to rounding,
whatever the effective length. Conventions: signals are time-major, shape
(samples, channels), float64; lengths are in samples; a filter *state* has the shape
(n_sections, 2, channels) of ``scipy.signal.sosfilt(sos, x, axis=0, zi=...)``.

The extended signal
-------------------
The segment ``x`` of ``N`` samples is extended at both ends by ``n`` samples (``edge``,
``edge_samples``) exactly as ``sosfiltfilt`` does it (see :func:`twinpass.core.kernel.extend`).
The extended signal is cut into *pieces*: the start extension and the end extension in
pieces of at most one block each (they produce no output, so no task ever holds an
extension longer than a block), and between them the output blocks of the segment's files
in order. Every piece task reads only its own samples (an extension piece reads the
samples it mirrors).

Steps (the block-wise recursive filtering with carried states of D. Nehab, A. Maximo,
R. S. Lima and H. Hoppe, "GPU-efficient recursive filtering and summed-area tables",
ACM Transactions on Graphics 30(6), 2011; the carries are a scan of a linear recurrence,
G. E. Blelloch, "Prefix sums and their applications", CMU-CS-90-190, Carnegie Mellon
University, 1990):

1. per piece, in parallel: the final state of a forward pass from the zero state (and the
   piece's first sample, which starts the scan for the first piece);
2. in the driver, a sequential scan: the forward state at the start of every piece
   (:func:`twinpass.core.carry.carry_states` with :func:`~twinpass.core.carry.transition_matrix`
   per distinct piece length), starting from ``sosfilt_zi * ext[0]``;
3. per non-start-extension piece, in parallel: the forward output from its carried state,
   then a zero-state backward pass over the reversed forward output, reporting the last
   forward output sample and the backward final state (and, for a block followed by a block, the
   forward state ``seam_samples`` before its end, for the seam check);
4. in the driver, the backward scan in reverse piece order, starting from
   ``sosfilt_zi * y_f[-1]`` (``y_f[-1]``: the last forward output of the extended signal);
5. per output block, in parallel: forward output (recomputed, see ``forward_output``) and
   backward output from the carried states; checks; the block's chunks are written.

Numerics. As in :mod:`twinpass.core.carry`, the zero-state passes of steps 1 and 3 run
in extended precision (``numpy.longdouble``) and the scans combine them with the
transition matrices in extended precision; the passes that produce output run in float64.
Measured on the pieces of ``tests/test_engine_carry.py`` (2nd-order Butterworth high-pass,
poles at radius 0.99999, 360000 samples, blocks of 40000, odd/constant/even extensions):
float64 zero-state passes reach up to 3x, and float64 passes started from each piece's
steady state up to 80x, the whole-signal rounding error of ``sosfiltfilt`` (its own
float64 result against the same steps in extended precision); with extended precision the
blockwise result stays below that error. The extended-precision passes are about 5 times
slower than float64 ones and make most of carry mode's arithmetic. Arithmetic runs
channel-major (channels, samples).

Persistence and resume. The driver alone writes the carried quantities (small arrays)
under ``_twinpass/carry/<segment>/`` in the output store (:class:`CarryRecord`), keyed by a
digest of the design, the edge handling, the files (with fingerprints) and the pieces; a
changed key starts over. Every step is idempotent and deterministic, so a rerun skips the
pieces whose step results are recorded, recomputes the scans bit for bit and writes
output identical to an uninterrupted run. Block statuses, figures and seams go to the
normal block tables through the store API, as in the halo mode. Output arrays and block
tables are prepared and finished by the halo mode's own
:func:`twinpass.engine.prepare_segment` and :func:`twinpass.engine.finish_segment`, so a run
killed between any two driver writes is as safe as there (see the crash-safety notes of
:mod:`twinpass.engine`): blocks a neighbour's change reaches are set pending before any file
records its new input, and a file recomputed from scratch carries
:data:`twinpass.core.types.RESETTING_DIGEST` until its block table is reset.

Seams. With exact carrying a block's output equals the whole-segment output, so the
samples beyond its edges are its neighbours' own samples. The seam check still tests the
carries: each block computes the ``seam_samples`` outputs *before* its start from the
previous block's recorded forward state and its own backward final state, and the
driver's seam pass compares them with the previous block's own last outputs (row
``SEAM_BEFORE``); the row ``SEAM_AFTER`` is left NaN. A block filtered from a wrong state,
with wrong input or with wrong coefficients fails that comparison on one of its seams.
"""

from __future__ import annotations

import functools
import hashlib
import json
import logging
import re
import threading
import time
import uuid
import zlib
import dataclasses
from dataclasses import dataclass
from typing import Any, Callable, TypeVar

import numpy as np
from scipy import signal

from . import faults
from .config import ChecksConfig, JobConfig
from .core import checks as _checks
from .core.blocks import Layout
from .core.carry import carry_states, seam_before, steady_state, transition_matrix
from .core.checks import was_cancelled
from .core.types import Design
from .engine import (
    ERROR,
    BlockErrorLog,
    BlockResult,
    FileOutcome,
    ProgressFn,
    SegmentWork,
    SourceSlice,
    cancel_soon,
    design_digest_for,
    finish_segment,
    lost_task_error,
    prepare_segment,
    read_segment_window,
    record_result,
    segment_edge_samples,
    segment_layout,
    segment_sources,
    with_retries,
)
from .errors import ConfigError, KernelError
from .io.store import array_metadata, write_rows
from .io.store_util import RESERVED_PREFIX, json_safe, local_path

__all__ = [
    "CarryRecord",
    "FORWARD_OUTPUT",
    "Piece",
    "carry_layout",
    "carry_pieces",
    "run_segment_carry",
    "use_carry",
    "zarr_store_like",
]

log = logging.getLogger("twinpass.engine.carry")

FORWARD_OUTPUT = "recompute"
"""How step 5 gets a block's forward output: ``"recompute"`` (filter the input again from
the carried state) or ``"scratch"`` (read what step 3 wrote under
``_twinpass/carry/<segment>/forward``). Measured with ``bench/bench_carry.py`` (2.1 M frames
x 8 channels, blocks of 65536, 2 threads, six filters): recomputing took 72.5 s in all,
the scratch array 79.3 s, and recomputing was faster in 5 of 6 runs; it also needs no
scratch space (8 bytes per sample and channel), so it is the default."""

CARRY_FORMAT = 2
"""Version of the persisted carry layout (part of the key)."""
_FLUSH_SECONDS = 2.0
_RECORD_CHUNK = 256
_BATCH_PIECES = 32
"""At most this many pieces run in one Dask task (see :func:`_batches`)."""
_MIN_BATCHES = 4
"""Pieces of a step are spread over at least this many Dask tasks, when there are that many."""

T = TypeVar("T")


# --------------------------------------------------------------------------- decision
def use_carry(design: Design, halo_block_samples: int, cfg: JobConfig) -> bool:
    """Whether a segment runs in carry mode.

    Parameters
    ----------
    design : Design
        The per-pass design of the segment's sample rate.
    halo_block_samples : int
        Block core length (samples) the halo mode would use for the segment, i.e.
        ``choose_layout(halo=design.effective_length, ...).block_samples``.
    cfg : JobConfig
        ``[processing] mode`` and ``carry_threshold`` decide.

    Returns
    -------
    bool
        ``mode = "carry"``: True (IIR designs only). ``mode = "auto"``: True when the design
        is IIR and its effective length exceeds ``carry_threshold * halo_block_samples``.
        ``mode = "halo"``: False.

    Raises
    ------
    ConfigError
        ``mode = "carry"`` with an FIR design (an FIR filter has no recursive state to carry).
    """
    mode = cfg.processing.mode
    if mode == "carry":
        if design.is_fir:
            taps = 0 if design.taps is None else int(np.asarray(design.taps).size)
            raise ConfigError(
                f"{cfg.source}: [processing] mode = \"carry\" needs an IIR design, but the design for "
                f"{design.sample_rate_hz:g} Hz is an FIR filter ({taps} taps), which has no recursive "
                "state to carry between blocks; use mode = \"auto\" or \"halo\", or an IIR family in [response]"
            )
        return True
    if mode == "auto":
        return not design.is_fir and design.effective_length > cfg.processing.carry_threshold * int(halo_block_samples)
    return False


def carry_layout(seg: SegmentWork, cfg: JobConfig) -> Layout:
    """The block layout of carry mode: :func:`~twinpass.engine.segment_layout` with no halo."""
    return segment_layout(seg, cfg, halo=0)


# ----------------------------------------------------------------------------- pieces
@dataclass(frozen=True)
class Piece:
    """A span of the extended signal processed by one task.

    ``start``/``stop`` are extended-signal indices (segment sample + ``edge_samples``).
    ``kind`` is ``"head"`` (start extension), ``"core"`` (an output block) or ``"tail"`` (end
    extension). Core pieces name their output array, block index and the segment sample of
    the file's first frame.
    """

    index: int
    kind: str
    start: int
    stop: int
    array_name: str | None = None
    block_index: int = -1
    file_offset: int = 0

    @property
    def length(self) -> int:
        return self.stop - self.start


def carry_pieces(seg: SegmentWork, spans_by_file: dict[str, list[tuple[int, int]]], edge_samples: int,
                 piece_samples: int) -> list[Piece]:
    """Pieces of a segment's extended signal in order.

    Parameters
    ----------
    seg : SegmentWork
    spans_by_file : dict
        Block spans [start, stop) in file frames per array name (every file of ``seg``).
    edge_samples : int
        Extension length per end (samples), ``< seg.frames``.
    piece_samples : int
        Longest extension piece (samples), normally the block length.
    """
    n, total = int(edge_samples), int(seg.frames)
    step = max(1, int(piece_samples))
    bounds: list[tuple[str, int, int, str | None, int, int]] = [
        ("head", a, min(a + step, n), None, -1, 0) for a in range(0, n, step)]
    for fw in seg.files:
        for i, (s, e) in enumerate(spans_by_file[fw.array_name]):
            bounds.append(("core", n + fw.seg_offset + s, n + fw.seg_offset + e, fw.array_name, i, fw.seg_offset))
    bounds += [("tail", a, min(a + step, total + 2 * n), None, -1, 0) for a in range(n + total, total + 2 * n, step)]
    return [Piece(i, *b) for i, b in enumerate(bounds)]


def _mirror_range(piece: Piece, n: int, total: int) -> tuple[int, int, int]:
    """Segment samples [lo, hi) an extension piece mirrors, and the end sample it reflects about."""
    if piece.kind == "head":
        return n - piece.stop + 1, n - piece.start + 1, 0
    return 2 * total + n - piece.stop - 1, 2 * total + n - piece.start - 1, total - 1


def _read_ranges(piece: Piece, n: int, total: int, edge: str, before: int = 0) -> list[tuple[int, int]]:
    """Segment sample ranges a piece task reads."""
    if piece.kind == "core":
        return [(piece.start - n - before, piece.stop - n)]
    lo, hi, end = _mirror_range(piece, n, total)
    return [(end, end + 1)] if edge == "constant" else [(lo, hi), (end, end + 1)]


# ------------------------------------------------------------------------------ tasks
@dataclass(frozen=True)
class PieceJob:
    """Everything one piece task needs; small and picklable."""

    piece: Piece
    segment_frames: int
    edge_samples: int
    edge: str
    channels: int
    sources: tuple[SourceSlice, ...]
    sos: np.ndarray
    retries: int = 0
    retry_backoff_seconds: float = 0.5
    seam_split: int = 0
    """Step 3: also report the forward state this many samples before the piece's end (0: no)."""
    before: int = 0
    """Step 5: seam samples computed before the block's start (0: none)."""
    store_location: str = ""
    scratch: str | None = None
    """Path (inside the store) of the piece's forward output, or None to recompute it."""
    design: Design | None = None
    checks_cfg: ChecksConfig | None = None
    check_response: bool = False
    out_dtype: str = "float32"
    seam_samples: int = 0
    sync: bool = True
    """Sync the output to disk before the block counts as done (``[output] sync``)."""
    fence: str = ""
    """The run lock's token (see :attr:`twinpass.engine.BlockJob.fence`)."""


def _to_cm(state: np.ndarray) -> np.ndarray:
    """A state (n_sections, 2, channels) as ``sosfilt(..., axis=-1)`` takes it: (n_sections, channels, 2)."""
    return np.ascontiguousarray(np.moveaxis(np.asarray(state, dtype=np.float64), 2, 1))


def _pass(sos: np.ndarray, u: np.ndarray, state: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One forward pass over channel-major ``u`` (channels, samples) from ``state``.

    Returns the output (channels, samples) and the final state (n_sections, 2, channels).
    No samples leave the state as it is (``sosfilt`` refuses an empty input with a state).
    """
    if u.shape[1] == 0:
        return np.empty(u.shape, dtype=np.result_type(u, state, np.float64)), np.array(state, dtype=np.float64)
    y, zf = signal.sosfilt(sos, u, axis=-1, zi=_to_cm(state))
    return y, np.ascontiguousarray(np.moveaxis(zf, 1, 2))


def _reversed(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a[:, ::-1])


def _read_piece(job: PieceJob, before: int = 0) -> np.ndarray:
    """The piece's extended-signal samples (with ``before`` samples ahead for cores), time-major."""
    p, n, total = job.piece, job.edge_samples, job.segment_frames
    if p.kind == "core":
        return read_segment_window(job.sources, p.start - n - before, p.stop - n, job.channels)
    lo, hi, end = _mirror_range(p, n, total)
    edge_value = read_segment_window(job.sources, end, end + 1, job.channels)
    if job.edge == "constant":
        return np.repeat(edge_value, p.length, axis=0)
    mirrored = read_segment_window(job.sources, lo, hi, job.channels)[::-1]
    if job.edge == "odd":
        return 2 * edge_value - mirrored
    if job.edge == "even":
        return np.ascontiguousarray(mirrored)
    raise KernelError(f"piece {p.index}: unknown end extension {job.edge!r}; use odd, even or constant")


def _fault_flags(job: PieceJob) -> set[str]:
    """Injected faults (tests) fire for output blocks only, keyed by array name and block index."""
    p = job.piece
    return faults.apply(p.array_name, p.block_index) if p.kind == "core" and p.array_name else set()


def _with_retries(job: PieceJob, work: Callable[[], T]) -> tuple[T | None, str | None, int]:
    """Run ``work`` with ``job.retries`` extra attempts and doubling backoff; never raises
    (:func:`twinpass.engine.with_retries`)."""
    return with_retries(work, job.retries, job.retry_backoff_seconds)


def _zero_state_final(sos: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Final state (n_sections, 2, channels) of a pass over channel-major ``u`` from the zero
    state, computed in extended precision (``numpy.longdouble``) and returned as float64."""
    ld = np.longdouble
    zi = np.zeros((sos.shape[0], u.shape[0], 2), dtype=ld)
    _, zf = signal.sosfilt(sos.astype(ld), u.astype(ld), axis=-1, zi=zi)
    return np.ascontiguousarray(np.moveaxis(zf, 1, 2)).astype(np.float64)


def step_forward_final(job: PieceJob) -> dict[str, Any]:
    """Step 1 task: first sample (channels,) and zero-state forward final state of a piece."""

    def work() -> dict[str, Any]:
        _fault_flags(job)
        u = np.ascontiguousarray(_read_piece(job).T)
        return {"first": u[:, 0].copy(), "final": _zero_state_final(job.sos, u)}

    out, err, attempts = _with_retries(job, work)
    return {"index": job.piece.index, "error": err, "attempts": attempts, **(out or {})}


def _forward_output(job: PieceJob, u: np.ndarray, state: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Forward output of a piece from its carried state, and the state ``seam_split`` samples before its end."""
    split = min(job.seam_split, u.shape[1])
    if split <= 0:
        return _pass(job.sos, u, state)[0], None
    head, mid = _pass(job.sos, u[:, : u.shape[1] - split], state)
    tail, _ = _pass(job.sos, u[:, u.shape[1] - split :], mid)
    return np.concatenate((head, tail), axis=1), mid


def step_backward_final(job: PieceJob, state_f: np.ndarray) -> dict[str, Any]:
    """Step 3 task: forward output from the carried state, then a backward pass over it.

    Returns the last forward output sample (channels,), the zero-state backward final
    state, and the seam state (or None); writes the forward output
    to the scratch array when ``job.scratch`` is set.
    """

    def work() -> dict[str, Any]:
        _fault_flags(job)
        u = np.ascontiguousarray(_read_piece(job).T)
        y_f, seam = _forward_output(job, u, state_f)
        if job.scratch:
            _write_scratch(job.store_location, job.scratch, y_f.T)
        return {"last": y_f[:, -1].copy(), "final": _zero_state_final(job.sos, _reversed(y_f)), "seam": seam}

    out, err, attempts = _with_retries(job, work)
    return {"index": job.piece.index, "error": err, "attempts": attempts, **(out or {})}


def step_output(job: PieceJob, state_f: np.ndarray, state_b: np.ndarray,
                seam_state: np.ndarray | None) -> BlockResult:
    """Step 5 task: the block's two-pass output from carried states; checks; write its chunks."""
    p = job.piece
    assert job.design is not None and job.checks_cfg is not None and p.array_name is not None
    t0 = time.perf_counter()
    k = job.seam_samples

    def work() -> BlockResult:
        tamper = _fault_flags(job)
        window = _read_piece(job, job.before)
        x = window[job.before :]
        u = np.ascontiguousarray(x.T)
        sos = job.sos
        gain = faults.perturb_factor(tamper)  # per pass: sqrt(2) (+6 dB overall) or the rule's db
        if gain is not None:
            sos = sos.copy()
            sos[0, :3] *= gain
        start_f = steady_state(sos, u[:, 0]) if "halo0" in tamper else state_f
        y_f = _read_scratch(job.store_location, job.scratch) if job.scratch and not tamper else None
        if y_f is None:
            y_f = _pass(sos, u, start_f)[0]
        start_b = steady_state(sos, y_f[:, -1]) if "halo0" in tamper else state_b
        y_rev, zb_start = _pass(sos, _reversed(y_f), start_b)
        y = np.ascontiguousarray(y_rev[:, ::-1].T)
        seams = np.full((4, k, job.channels), np.nan)
        if k:
            m = min(k, y.shape[0])
            seams[0, :m] = y[:m]
            seams[1, k - m :] = y[y.shape[0] - m :]
            if job.before and seam_state is not None:
                # The previous block's last outputs, from its recorded forward state and this
                # block's own backward chain: equal to that block's tail when the carries agree.
                prev_f, _ = _pass(sos, np.ascontiguousarray(window[: job.before].T), seam_state)
                prev_rev, _ = _pass(sos, _reversed(prev_f), zb_start)
                seams[2, k - job.before :] = prev_rev[:, ::-1].T
        figs = _checks.block_figures(x, y, job.design, job.checks_cfg, out_dtype=job.out_dtype,
                                     response=job.check_response)
        status = _checks.grade(figs, job.design, job.checks_cfg, job.design.tolerance)
        from .io.store import write_block_data

        with np.errstate(over="ignore"):  # beyond the output type: stored as inf, counted as clipped (fails)
            stored = y.astype(job.out_dtype)
        write_block_data(job.store_location, p.array_name, p.start - job.edge_samples - p.file_offset,
                         stored, sync=job.sync, fence=job.fence)
        return BlockResult(p.array_name, p.block_index, status, figs, seams, None, 1, 0.0, window.shape[0])

    res, err, attempts = _with_retries(job, work)
    if res is None:
        return BlockResult(p.array_name, p.block_index, ERROR, None, None, err, attempts,
                           time.perf_counter() - t0, 0)
    res.attempts, res.seconds = attempts, time.perf_counter() - t0
    return res


# ------------------------------------------------------------------- scratch arrays
def zarr_store_like(location: str) -> str:
    """An output store location as Zarr's own ``store`` argument (a documented ``StoreLike``).

    Plain paths and ``file://`` URLs become the resolved local folder, which Zarr opens as a
    :class:`zarr.storage.LocalStore`; other fsspec URLs (e.g. ``memory://out.zarr``) are kept,
    and Zarr opens them as a :class:`zarr.storage.FsspecStore`: the same stores
    :class:`twinpass.io.store.OutputStore` uses for that location. Open with ``mode="r"``
    for reading only.
    """
    path = local_path(location)
    return location if path is None else str(path)


def _write_scratch(location: str, path: str, data: np.ndarray) -> None:
    import zarr

    arr = zarr.create_array(zarr_store_like(location), name=path, shape=data.shape, chunks=data.shape,
                            dtype="float64", fill_value=0.0, compressors=None, overwrite=True)
    arr[...] = data


def _read_scratch(location: str, path: str | None) -> np.ndarray | None:
    """The scratch forward output (channels, samples), or None when it is not there."""
    import zarr

    try:
        arr = zarr.open_array(zarr_store_like(location), path=path, mode="r")
    except (FileNotFoundError, KeyError, zarr.errors.BaseZarrError):
        return None
    return np.ascontiguousarray(np.asarray(arr[...]).T)


# ----------------------------------------------------------------- persisted carries
class CarryRecord:
    """The persisted carry steps of one segment: ``_twinpass/carry/<segment>/`` (driver only).

    Arrays (``m`` pieces, ``S`` sections, ``C`` channels; float64, NaN = not known):
    ``fwd_first`` (m, C) first sample of each piece; ``fwd_final`` (m, S, 2, C) its step-1
    final state; ``fwd_state`` (m, S, 2, C) the carried forward states; ``bwd_last``
    (m, C) last forward output; ``bwd_final`` (m, S, 2, C) step-3 backward final state;
    ``bwd_seam`` (m, S, 2, C) forward state ``seam_samples`` before a block's end;
    ``bwd_state`` (m, S, 2, C) carried backward states; ``fwd_done`` / ``bwd_done`` (m,)
    int64 flags, written after the values: 0 for a step not done, else 1 + the CRC-32 of
    the piece's step values (:meth:`_check_value`). Attributes: ``key`` (the digest the
    values belong to), ``forward_scan`` / ``backward_scan`` (True once the scans are stored).

    What a resumed record is trusted with. The values and flags are not synced to the disk
    one after the other, so after a crash of the operating system a flag may be on the disk
    without its values (which then read as NaN, the fill value, or, on some file systems,
    as zeros), and a chunk file may be cut short. A piece counts as done only if its flag
    matches the values read back (:meth:`done`); a record that cannot be read starts
    afresh; and the scans are always computed again in the process that resumes
    (:meth:`scanned`): they take the driver a few matrix products per piece and give the
    same states bit for bit from the same step results, so stored scan states are never
    used after a restart.
    """

    STATE_ARRAYS = ("fwd_final", "fwd_state", "bwd_final", "bwd_seam", "bwd_state")
    SAMPLE_ARRAYS = ("fwd_first", "bwd_last")
    FLAGS = ("fwd_done", "bwd_done")

    def __init__(self, location: str, slug: str, key: str, pieces: int, sections: int, channels: int) -> None:
        import zarr
        from zarr.core.group import GroupMetadata

        self.location, self.path, self.key = location, f"{RESERVED_PREFIX}/carry/{slug}", key
        self.m = pieces
        metas = _record_metadata(pieces, sections, channels)
        root = zarr.open_group(zarr_store_like(location), mode="a", zarr_format=3)
        parent = _carry_parent(root)
        group = parent.get(slug)
        arrays: dict[str, Any] = {}
        if isinstance(group, zarr.Group) and group.attrs.get("key") == key:
            for name, meta in metas.items():
                arr = group.get(name)
                if not isinstance(arr, zarr.Array) or arr.shape != meta.shape:
                    break
                arrays[name] = arr
        self.values: dict[str, np.ndarray] = {}
        if len(arrays) == len(metas):  # resume: the steps recorded so far
            try:
                self.values = {name: np.asarray(arr[...]) for name, arr in arrays.items()}
            except Exception as exc:  # a chunk cut short or unreadable: the steps run again
                log.warning("carry record %s of %s cannot be read (%s: %s); its steps are computed again",
                            self.path, location, type(exc).__name__, exc)
                self.values = {}
        if not self.values:
            if group is not None:
                del parent[slug]
            # The group (its key written with it) and its arrays in one call; an array cut
            # short is missing next time, and the record starts afresh.
            nodes: dict[str, Any] = {self.path: GroupMetadata(
                attributes={"key": key, "forward_scan": False, "backward_scan": False})}
            # each array its own attributes: Zarr updates an opened node's attributes in place
            nodes.update({f"{self.path}/{name}": dataclasses.replace(meta, attributes=dict(meta.attributes))
                          for name, meta in metas.items()})
            made = dict(zarr.create_hierarchy(store=root.store, nodes=nodes, overwrite=False))
            group = made[self.path]
            arrays = {name: made[f"{self.path}/{name}"] for name in metas}
            self.values = {name: np.full(meta.shape, meta.fill_value, dtype=meta.dtype.to_native_dtype())
                           for name, meta in metas.items()}
        self.group, self.arrays = group, arrays
        self._dirty: set[int] = set()
        self._last_flush = time.monotonic()
        self._scanned: set[str] = set()

    _STEP_VALUES = {"fwd_done": ("fwd_first", "fwd_final"), "bwd_done": ("bwd_last", "bwd_final", "bwd_seam")}

    def _check_value(self, flag: str, index: int) -> int:
        """The flag of a done step: 1 + CRC-32 of the piece's step values (their bytes)."""
        crc = 0
        for name in self._STEP_VALUES[flag]:
            crc = zlib.crc32(np.ascontiguousarray(self.values[name][index]).tobytes(), crc)
        return crc + 1

    def done(self, flag: str) -> np.ndarray:
        """Pieces whose step (``fwd_done``: 1, ``bwd_done``: 3) is recorded: a flag that
        matches the step's values as they read back."""
        flags = self.values[flag]
        return np.array([f != 0 and int(f) == self._check_value(flag, i) for i, f in enumerate(flags)], dtype=bool)

    def scanned(self, direction: str) -> bool:
        """Whether this object has stored the scan (``forward`` / ``backward``); a resumed
        record's stored scan states are not used (see the class notes)."""
        return direction in self._scanned

    def put(self, flag: str, index: int, **values: np.ndarray | None) -> None:
        """Record a piece's step results in memory; :meth:`flush` writes them (values, then flags)."""
        for name, v in values.items():
            if v is not None:
                self.values[name][index] = v
        self.values[flag][index] = self._check_value(flag, index)
        self._dirty.add(index // _RECORD_CHUNK)
        if time.monotonic() - self._last_flush > _FLUSH_SECONDS:
            self.flush()

    def flush(self) -> None:
        for names in ((*self.STATE_ARRAYS, *self.SAMPLE_ARRAYS), self.FLAGS):
            for c in sorted(self._dirty):
                sl = slice(c * _RECORD_CHUNK, min(self.m, (c + 1) * _RECORD_CHUNK))
                for name in names:
                    write_rows(self.arrays[name], sl.start, self.values[name][sl])
        self._dirty.clear()
        self._last_flush = time.monotonic()

    def store_scan(self, direction: str, states: dict[int, np.ndarray]) -> None:
        """Store the carried states of a scan and mark it done."""
        name = "fwd_state" if direction == "forward" else "bwd_state"
        for i, s in states.items():
            self.values[name][i] = s
        write_rows(self.arrays[name], 0, self.values[name])
        self.group.update_attributes({f"{direction}_scan": True})
        self._scanned.add(direction)

    def scratch_path(self, index: int) -> str:
        return f"{self.path}/forward/{index}"


_PARENT_LOCK = threading.Lock()


def _carry_parent(root: Any) -> Any:
    """The group holding every segment's record, created if missing.

    Segment drivers start together: Zarr's ``require_group`` looks, then creates, so two
    drivers of a new store could both create it and one fail ("a group exists"). Drivers of
    this process take turns; another process creating it meanwhile is taken as created.
    """
    import zarr

    path = f"{RESERVED_PREFIX}/carry"
    with _PARENT_LOCK:
        try:
            return root.require_group(path)
        except zarr.errors.ContainsGroupError:
            return root[path]


@functools.lru_cache(maxsize=16)
def _record_metadata(pieces: int, sections: int, channels: int) -> dict[str, Any]:
    """Zarr metadata of a :class:`CarryRecord`'s arrays, made by Zarr itself, by name."""
    shape_state = (pieces, sections, 2, channels)
    shapes = {**{a: shape_state for a in CarryRecord.STATE_ARRAYS},
              **{a: (pieces, channels) for a in CarryRecord.SAMPLE_ARRAYS}, **{a: (pieces,) for a in CarryRecord.FLAGS}}
    metas = {}
    for name, shp in shapes.items():
        flag = name in CarryRecord.FLAGS
        metas[name] = array_metadata(shape=shp, dtype="int64" if flag else "float64",
                                     chunks=(min(max(1, pieces), _RECORD_CHUNK),) + shp[1:],
                                     fill_value=0 if flag else float("nan"), compressors=None)
    return metas


def _slug(segment_id: str) -> str:
    digest = hashlib.sha256(segment_id.encode()).hexdigest()[:12]
    return f"{re.sub(r'[^A-Za-z0-9._-]', '_', segment_id)[:80]}-{digest}"


def _carry_key(seg: SegmentWork, design: Design, cfg: JobConfig, edge_samples: int, pieces: list[Piece]) -> str:
    payload = json_safe({
        "format": CARRY_FORMAT,
        "design": design_digest_for(design, cfg),
        "edge": cfg.processing.edge,
        "edge_samples": int(edge_samples),
        "seam_samples": int(cfg.checks.seam_samples),
        "channels": int(seg.channels),
        "files": [[f.array_name, f.seg_offset, f.frames, f.fingerprint] for f in seg.files],
        "pieces": [[p.start, p.stop] for p in pieces],
    })
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()


def _scan(sos: np.ndarray, order: list[Piece], initial: np.ndarray, finals: np.ndarray) -> dict[int, np.ndarray]:
    """Carried state at the start of each piece of ``order`` (step 2 or 4), by piece index.

    ``finals[p.index]`` is the zero-state final state of piece ``p``; transition matrices
    are computed once per distinct piece length.
    """
    cache: dict[int, np.ndarray] = {}
    for p in order[:-1]:
        if p.length not in cache:
            cache[p.length] = transition_matrix(sos, p.length)
    zero = np.zeros_like(initial)  # the last piece's final is not needed
    states = carry_states(initial, [finals[p.index] for p in order[:-1]] + [zero],
                          [cache[p.length] for p in order[:-1]])
    return {p.index: s for p, s in zip(order, states)}


# ----------------------------------------------------------------------------- driver
def _sources_for(sources: tuple[SourceSlice, ...], ranges: list[tuple[int, int]]) -> tuple[SourceSlice, ...]:
    return tuple(s for s in sources
                 if any(s.seg_offset < b and a < s.seg_offset + s.frames for a, b in ranges))


def _batches(calls: list[tuple[Any, ...]], batch_samples: int) -> list[list[tuple[Any, ...]]]:
    """Consecutive calls grouped into Dask tasks: pieces of whole blocks alone, short pieces
    (files shorter than a block) together, up to ``batch_samples`` samples and
    :data:`_BATCH_PIECES` pieces a task, and at least :data:`_MIN_BATCHES` tasks when there
    are that many pieces, so that every worker has some."""
    per_task = min(_BATCH_PIECES, max(1, -(-len(calls) // _MIN_BATCHES)))
    out: list[list[tuple[Any, ...]]] = []
    size = 0
    for args in calls:
        length = args[0].piece.length
        if not out or len(out[-1]) >= per_task or size + length > batch_samples:
            out.append([])
            size = 0
        out[-1].append(args)
        size += length
    return out


def _run_batch(fn: Callable[..., Any], calls: list[tuple[Any, ...]]) -> list[Any]:
    """Dask task: ``fn(*args)`` for each call in turn; an exception is returned as its text."""
    out: list[Any] = []
    for args in calls:
        try:
            out.append(fn(*args))
        except Exception as exc:  # the step functions catch their own; never lose the others
            out.append(f"{type(exc).__name__}: {exc}")
    return out


def _run_tasks(client: Any, fn: Callable[..., Any], calls: list[tuple[Any, ...]], retries: int,
               label: str, batch_samples: int) -> Any:
    """Run ``fn(*args)`` for each call on the Dask client, short pieces several to a task
    (:func:`_batches`): a Dask task costs the process about 10 ms of the interpreter, as much
    as a one-second piece's own work. Yields (args, result or exception text) as they finish.
    """
    from distributed import as_completed

    batches = _batches(calls, batch_samples)
    stamp = uuid.uuid4().hex  # keys unique to this call: Dask gives a known key the result it has
    futures = [client.submit(_run_batch, fn, batch, pure=False, retries=retries,
                             key=f"twinpass-carry-{label}-{batch[0][0].piece.index}-{stamp}")
               for batch in batches]
    by_key = {f.key: batch for f, batch in zip(futures, batches)}
    finished = False
    try:
        for fut in as_completed(futures):
            batch = by_key[fut.key]
            try:
                results = fut.result()
            except Exception as exc:  # worker lost repeatedly, cancelled...
                results = [lost_task_error(exc)] * len(batch)
            fut.release()
            yield from zip(batch, results)
        finished = True
    finally:
        if not finished:  # the caller gave up (an error, Ctrl-C): the tasks nobody will record are cancelled
            cancel_soon(futures)


def _run_state_step(client: Any, record: CarryRecord, fn: Callable[..., dict[str, Any]],
                    calls: list[tuple[Any, ...]], flag: str, names: dict[str, str], retries: int,
                    label: str, batch_samples: int) -> dict[int, str]:
    """Run step 1 or 3 tasks, recording their results; return errors by piece index."""
    errors: dict[int, str] = {}
    try:
        for args, out in _run_tasks(client, fn, calls, retries, label, batch_samples):
            index = args[0].piece.index
            if isinstance(out, str) or out.get("error"):
                errors[index] = out if isinstance(out, str) else str(out["error"])
                continue
            record.put(flag, index, **{target: out.get(source) for source, target in names.items()})
    finally:
        record.flush()
    return errors


def run_segment_carry(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, client: Any,
                      *, on_block: ProgressFn | None = None, log_blocks: bool = True,
                      forward_output: str = FORWARD_OUTPUT) -> list[FileOutcome]:
    """Filter a segment in carry mode; same contract as :func:`twinpass.engine.run_segment`.

    Parameters
    ----------
    seg : SegmentWork
        The segment's files in time order with their actions.
    design : Design
        The per-pass IIR design for the segment's sample rate.
    cfg : JobConfig
    store : twinpass.io.store.OutputStore
        Opened for writing; this thread is its only writer for these files.
    client : distributed.Client
    on_block : callable, optional
        Called as ``on_block(done, total, result)`` from this thread after each output block.
    log_blocks : bool
        Log failed and cancelled blocks on the engine's logger (False when ``on_block`` does).
    forward_output : {"recompute", "scratch"}
        How the output step gets each block's forward output (see :data:`FORWARD_OUTPUT`).

    Returns
    -------
    list of FileOutcome
        One per file of the segment, in order.

    Raises
    ------
    ConfigError
        The design is FIR.
    """
    if design.sos is None:
        raise ConfigError(f"{cfg.source}: carry mode needs an IIR design; the design for "
                          f"{design.sample_rate_hz:g} Hz is FIR; use [processing] mode = \"halo\"")
    if forward_output not in ("recompute", "scratch"):
        raise ConfigError(f"forward_output = {forward_output!r}: use \"recompute\" or \"scratch\"")
    t0 = time.perf_counter()
    layout = carry_layout(seg, cfg)
    n = segment_edge_samples(seg.frames, design, cfg)
    sos = np.asarray(design.sos, dtype=np.float64)
    # The crash-safe preparation of the halo mode (neighbours' blocks pending first, a reset
    # file marked by RESETTING_DIGEST until its table is reset), with blocks.mode = "carry".
    spans_by_file, todo_by_file = prepare_segment(seg, design, cfg, store, layout, n, mode="carry")
    run_count: dict[str, int] = {}
    if any(todo_by_file.values()):
        pieces = carry_pieces(seg, spans_by_file, n, layout.block_samples)
        record = CarryRecord(store.location, _slug(seg.segment_id), _carry_key(seg, design, cfg, n, pieces),
                             len(pieces), sos.shape[0], seg.channels)
        run_count = _run_carry(seg, design, cfg, store, client, pieces, record, todo_by_file, n, sos,
                               forward_output, on_block, layout.block_samples, log_blocks)
    outcomes = finish_segment(seg, design, cfg, store, layout, n, spans_by_file, run_count, t0)
    if seg.has_work and not any(o.status == "failed" for o in outcomes):
        _drop_scratch(store.location, _slug(seg.segment_id))
    return outcomes


def _run_carry(seg: SegmentWork, design: Design, cfg: JobConfig, store: Any, client: Any, pieces: list[Piece],
               record: CarryRecord, todo_by_file: dict[str, list[int]], n: int, sos: np.ndarray,
               forward_output: str, on_block: ProgressFn | None, batch_samples: int,
               log_blocks: bool = True) -> dict[str, int]:
    """Steps 1-5 for one segment; returns the number of blocks run per array.

    Short pieces share Dask tasks, up to ``batch_samples`` samples a task (a block's length).
    """
    k = cfg.checks.seam_samples
    m = len(pieces)
    sources = segment_sources(seg)
    retries = cfg.engine.retries

    def job(p: Piece, before: int = 0, **extra: Any) -> PieceJob:
        ranges = _read_ranges(p, n, seg.frames, cfg.processing.edge, before)
        return PieceJob(p, seg.frames, n, cfg.processing.edge, seg.channels, _sources_for(sources, ranges), sos,
                        retries, cfg.engine.retry_backoff_seconds, before=before,
                        store_location=store.location, fence=getattr(store, "lock_token", ""), **extra)

    def is_core(i: int) -> bool:
        return 0 <= i < m and pieces[i].kind == "core"

    def seam_len(i: int) -> int:
        """Seam samples shared by core piece ``i`` and the core piece after it."""
        return seam_before(pieces[i].length if is_core(i) and is_core(i + 1) else None, k)

    errors: dict[int, str] = {}
    t0 = time.perf_counter()
    # Step 1 (parallel): every piece but the last (and the first, whose first sample starts the scan).
    fwd_done = record.done("fwd_done")
    calls1 = [(job(p),) for p in pieces if (p.index < m - 1 or p.index == 0) and not fwd_done[p.index]]
    errors |= _run_state_step(client, record, step_forward_final, calls1, "fwd_done",
                              {"first": "fwd_first", "final": "fwd_final"}, retries, "forward", batch_samples)
    v = record.values
    log.info("segment %s: step 1 ran %d of %d pieces in %.2f s", seg.segment_id, len(calls1), m,
             time.perf_counter() - t0)
    if not errors:
        # Step 2 (driver): forward states from sosfilt_zi * ext[0].
        if not record.scanned("forward"):
            initial = steady_state(sos, v["fwd_first"][0])
            record.store_scan("forward", _scan(sos, pieces, initial, v["fwd_final"]))
        # Step 3 (parallel): forward output, backward final state, seam states.
        bwd_done = record.done("bwd_done")
        scratch = forward_output == "scratch"
        calls3 = [(job(p, seam_split=seam_len(p.index),
                       scratch=record.scratch_path(p.index) if scratch and p.kind == "core" else None),
                   np.array(v["fwd_state"][p.index]))
                  for p in pieces if p.kind != "head" and not bwd_done[p.index]]
        errors |= _run_state_step(client, record, step_backward_final, calls3, "bwd_done",
                                  {"last": "bwd_last", "final": "bwd_final", "seam": "bwd_seam"}, retries,
                                  "backward", batch_samples)
        log.info("segment %s: step 3 ran %d pieces, at %.2f s", seg.segment_id, len(calls3), time.perf_counter() - t0)
    if not errors and not record.scanned("backward"):
        # Step 4 (driver): backward states in reverse order from sosfilt_zi * y_f[-1].
        order = [p for p in reversed(pieces) if p.kind != "head"]
        initial = steady_state(sos, v["bwd_last"][order[0].index])
        record.store_scan("backward", _scan(sos, order, initial, v["bwd_final"]))
    blocks = [p for p in pieces if p.kind == "core" and p.block_index in set(todo_by_file.get(p.array_name, ()))]
    total = len(blocks)
    run_count: dict[str, int] = {}
    done = 0
    block_errors = BlockErrorLog(seg.segment_id, log if log_blocks else None)

    def report(res: BlockResult) -> None:
        nonlocal done
        res = record_result(store, res)
        run_count[res.array_name] = run_count.get(res.array_name, 0) + 1
        done += 1
        block_errors.block(res)
        if on_block is not None:
            on_block(done, total, res)

    if errors:
        first = min(errors)
        reason = errors[first].splitlines()[0]
        at = pieces[first]
        where = f"block {at.block_index} of {at.array_name}, " if at.array_name else ""
        msg = (f"carry mode: the filter state could not be carried past piece {first} of segment "
               f"{seg.segment_id} ({where}{at.kind}, samples [{at.start - n}, "
               f"{at.stop - n}) of the segment): {reason}; rerun to resume (finished steps are kept)")
        if was_cancelled(reason):
            msg = f"{reason} (carry mode: finished steps are kept)"
        for p in blocks:
            report(BlockResult(p.array_name or "", p.block_index, ERROR, error=msg))
        block_errors.close()
        return run_count
    # Step 5 (parallel): outputs of the blocks to do.
    every = cfg.checks.every
    calls5 = []
    for p in blocks:
        before = seam_len(p.index - 1)
        seam = v["bwd_seam"][p.index - 1] if before else None
        calls5.append((job(p, before, scratch=record.scratch_path(p.index) if forward_output == "scratch" else None,
                           design=design, checks_cfg=cfg.checks, check_response=bool(every) and p.block_index % every == 0,
                           out_dtype=cfg.output.dtype, seam_samples=k, sync=cfg.output.sync),
                       np.array(v["fwd_state"][p.index]), np.array(v["bwd_state"][p.index]),
                       None if seam is None else np.array(seam)))
    for args, res in _run_tasks(client, step_output, calls5, retries, "output", batch_samples):
        if isinstance(res, str):
            p = args[0].piece
            res = BlockResult(p.array_name, p.block_index, ERROR, error=res)
        report(res)
    block_errors.close()
    log.info("segment %s: step 5 wrote %d blocks, at %.2f s", seg.segment_id, total, time.perf_counter() - t0)
    return run_count


def _drop_scratch(location: str, slug: str) -> None:
    """Delete a finished segment's scratch forward outputs (the small carried states stay)."""
    import zarr

    try:
        group = zarr.open_group(zarr_store_like(location), path=f"{RESERVED_PREFIX}/carry/{slug}", mode="r+")
    except (FileNotFoundError, KeyError, zarr.errors.BaseZarrError):
        return
    if "forward" in group:
        del group["forward"]
