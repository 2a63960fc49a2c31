"""The work plan: which files (and which spans of them) a run must filter.

The planner compares what discovery found with what the output store remembers
(:class:`~twinpass.core.types.FileRecord`, one per input file) and the design digest of
each sample rate. Every file gets one status:

========== ==================================================================
new        no record in the store: filter the whole file
changed    fingerprint, frame count, design digest or output sample type differs
           (or ``force``): filter the whole file; but a Zarr input whose fingerprint
           names the rows of chunks that changed (:func:`changed_spans`; an earlier
           job's output rewritten near a join), its output otherwise current: filter
           those samples and a halo on each side, here and in its neighbours
unchanged  same fingerprint and design, output complete: nothing to do
incomplete same fingerprint and design, output not complete: resume (blocks
           already marked done are kept); or output complete but some of its chunk
           files missing (:attr:`FileRecord.absent`): rerun the blocks they held
neighbour  unchanged itself, but its output near a file join depends on input
           that changed: recompute the given spans
removed    a record whose input is no longer in the archive
invalid    reported by discovery or segment building; not processed (also a record
           under a folder discovery could not list, reported as ``FOLDER/``: its
           output is kept, it is not taken as removed)
========== ==================================================================

Neighbours. A block is filtered with a halo of ``halo`` samples (the filter's effective
length) on each side, so the output within ``halo`` samples of a change depends on it.
In segment coordinates, a changed file covering ``[x0, x1)`` invalidates
``[x0 - halo, x1 + halo)`` (clipped to the segment): the previous file gets
``[frames - halo, frames)`` and the next ``[0, halo)``, further files too when a file is
shorter than the halo. A changed *join* at segment position ``x`` (segment membership
changed: a file appended after today's last one, whose end was edge-extended before; a file
removed from the middle, so both neighbours now end a segment) invalidates
``[x - halo, x + halo)``.

Membership changes are found from the records alone: each record names its segment
(``FileRecord.segment``) and the start time its file had then, so a file was first (last)
of its old segment when no other member started before (after) it (a file alone in its old
segment was both first and last). Records without start times (stores written before they
were kept) place a file from its present start time instead: its old position is
``(start - segment start) * fs``, with the segment start from the segment id, and its old
segment's length is the sum of its members' frames (a file whose start time moved lands at
an impossible position, so both its ends count as changed). Records without a segment name
are taken as unchanged in membership.

``redo`` of a file is ``None`` (nothing to compute), ``"all"``, or a tuple of
``(start, stop)`` sample spans within the file, sorted and merged. ``resume`` is true when
blocks already marked done in the store may be kept (status ``incomplete``).

This module is pure (no I/O).
"""

from __future__ import annotations

import datetime as _dt
from collections import defaultdict
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

from twinpass.core.segments import InvalidFile, Segment
from twinpass.core.types import RESETTING_DIGEST, FileRecord
from twinpass.errors import ArchiveError

__all__ = [
    "STATUSES",
    "FilePlan",
    "Plan",
    "SegmentReads",
    "Redo",
    "changed_spans",
    "fingerprint_changed",
    "format_plan",
    "make_plan",
]

STATUSES: tuple[str, ...] = ("new", "changed", "unchanged", "incomplete", "neighbour", "removed", "invalid")
"""Every status a file can have in a plan, in display order."""

Span = tuple[int, int]
Redo = None | str | tuple[Span, ...]
"""``None`` (nothing), ``"all"``, or sorted, merged ``(start, stop)`` spans in samples."""


# -- fingerprints ------------------------------------------------------------


def fingerprint_changed(old: Mapping[str, Any] | None, new: Mapping[str, Any] | None) -> tuple[bool, str]:
    """Compare two file fingerprints.

    Parameters
    ----------
    old, new : mapping or None
        As produced by ``twinpass.io.fingerprint.fingerprint_file``: ``size`` (bytes),
        ``mtime_ns``, ``mode`` (``"fast"`` or ``"full"``), ``digest`` (hex) and ``whole``
        (the digest covers every byte).

    Returns
    -------
    changed : bool
    reason : str
        Why the file counts as changed, or what matched.

    Notes
    -----
    Changed when the size or the digest differ (the digest is compared first, so a file whose
    bytes changed is said to have changed content, whatever its modification time). A digest
    that covers every byte (``full`` mode, and files under 2 MiB in ``fast`` mode) decides
    alone: a new modification time with the same bytes (``touch``, a copy) is no change. A
    digest of part of the file (``fast`` mode, larger files: the first and last MiB) cannot
    see the middle, so there a new modification time counts as a change. Fingerprints taken
    in different modes compare their digests only when both cover the whole file; otherwise
    the file counts as changed.

    Then ``decoding`` (how the file decodes to samples: sample format, byte order, gain,
    offset, header bytes, rate, start time..., see ``twinpass.io.fingerprint.decoding_of``):
    changed when it differs, the reason naming the fields (and the sidecar, for raw files).
    A fingerprint without ``decoding`` (taken before fingerprints recorded it) is compared
    on its bytes alone, except that a file decoded through a sidecar (``sidecar`` in
    ``new``) counts as changed once: its sidecar may have been edited unseen.
    """
    if not old or not new or "digest" not in old or "digest" not in new:
        return True, "no fingerprint to compare with"
    if old.get("size") != new.get("size"):
        return True, f"size changed ({old.get('size')} -> {new.get('size')} bytes)"
    if old.get("algorithm") != new.get("algorithm"):
        return True, f"fingerprint algorithm changed ({old.get('algorithm')} -> {new.get('algorithm')})"
    mode_old, mode_new = old.get("mode"), new.get("mode")
    whole = bool(old.get("whole") and new.get("whole"))
    if mode_old != mode_new and not whole:
        return True, f"fingerprint mode changed ({mode_old} -> {mode_new}); the file is compared afresh"
    if old["digest"] != new["digest"]:
        return True, "content changed (digest differs)"
    partial = mode_old == mode_new == "fast" and not whole
    if partial and old.get("mtime_ns") != new.get("mtime_ns"):
        return True, ("modification time changed, same first and last MiB (fast mode hashes no more of a file "
                      'this large; [archive] fingerprint = "full" compares every byte)')
    decoded = _decoding_changed(old, new)
    if decoded is not None:
        return True, decoded
    if partial:
        return False, "same size, modification time and digest"
    return False, "same size and digest (of every byte)"


def changed_spans(old: Mapping[str, Any] | None, new: Mapping[str, Any] | None, frames: int) -> tuple[Span, ...] | None:
    """The frames of a Zarr array input whose chunks changed between two fingerprints.

    Parameters
    ----------
    old, new : mapping or None
        Fingerprints of the array as ``twinpass.io.fingerprint.fingerprint_file`` takes them
        for Zarr arrays: ``meta`` (digest of the metadata without attributes), ``row_frames``
        (samples per row of chunks along time) and ``rows`` (one digest per row).
    frames : int
        Samples per channel of the array now.

    Returns
    -------
    tuple of (int, int) or None
        Sorted, merged ``[start, stop)`` spans (samples) of the rows whose digests differ;
        ``None`` when the fingerprints cannot say (not both row-wise, taken in different
        modes, metadata, row length, row count or decoding changed, or no row differs): the
        whole file then counts as changed.
    """
    if not old or not new:
        return None
    if any(old.get(k) != new.get(k) for k in ("algorithm", "mode", "meta", "row_frames")):
        return None
    was, now, step = old.get("rows"), new.get("rows"), new.get("row_frames")
    if not isinstance(was, list) or not isinstance(now, list) or not isinstance(step, int) or step <= 0:
        return None
    if len(was) != len(now) or len(now) != -(-int(frames) // step) or _decoding_changed(old, new) is not None:
        return None
    spans = _merge((i * step, min(int(frames), (i + 1) * step)) for i, (a, b) in enumerate(zip(was, now)) if a != b)
    return spans or None


def _decoding_changed(old: Mapping[str, Any], new: Mapping[str, Any]) -> str | None:
    """Why the file decodes otherwise than when ``old`` was taken, or ``None``."""
    was, now = old.get("decoding"), new.get("decoding")
    side = new.get("sidecar") or old.get("sidecar")
    if not isinstance(now, Mapping):
        return None
    if not isinstance(was, Mapping):
        if not new.get("sidecar"):
            return None  # how it decodes is in its own bytes, which were compared
        return (
            f"its output was written by an older twinpass that did not record the content of its "
            f"sidecar {side}, so an edit of the sidecar since then cannot be ruled out; it is "
            "filtered again once"
        )
    keys = sorted(set(was) | set(now))
    diffs = [f"{k} {was.get(k)!r} -> {now.get(k)!r}" for k in keys if was.get(k) != now.get(k)]
    if not diffs:
        return None
    what = "; ".join(diffs)
    if side:
        return f"its sidecar {side} changed ({what})"
    return f"how it decodes changed ({what})"


# -- plan value objects ------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FilePlan:
    """What a run does with one file."""

    relpath: str
    """Path relative to the archive root (POSIX)."""
    stream: str | None
    """Stream name; ``None`` for removed files (the store does not keep it)."""
    segment: str | None
    """Id of the file's segment now (for removed files: the segment its record names)."""
    status: str
    """One of :data:`STATUSES`."""
    reason: str
    redo: Redo = None
    """Samples of the file to (re)compute; see :data:`Redo`."""
    record: FileRecord | None = None
    """The store's record of the file before this run, if any."""
    resume: bool = False
    """Blocks already marked done in the store may be kept (only with ``redo == "all"``)."""
    frames: int = 0
    """Samples per channel of the file now (of the record for removed files)."""
    remedy: str | None = None
    """What to do, for invalid files."""

    @property
    def explained(self) -> str:
        """The reason, then the remedy when there is one (``"reason; remedy"``)."""
        return self.reason if not self.remedy else f"{self.reason}; {self.remedy}"

    @property
    def redo_frames(self) -> int:
        """Samples per channel to compute (an upper bound when :attr:`resume`)."""
        if self.redo is None:
            return 0
        if self.redo == "all":
            return self.frames
        return sum(b - a for a, b in self.redo)  # type: ignore[misc]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (spans as lists)."""
        redo: Any = self.redo
        if isinstance(redo, tuple):
            redo = [list(s) for s in redo]
        return {
            "path": self.relpath,
            "stream": self.stream,
            "segment": self.segment,
            "status": self.status,
            "reason": self.reason,
            "redo": redo,
            "resume": self.resume,
            "frames": self.frames,
            "remedy": self.remedy,
        }


@dataclass(frozen=True)
class SegmentReads:
    """How the engine runs a segment's blocks, for the plan's estimate of what they read.

    The engine decides it (``twinpass.engine.segment_reads``) and passes it in; nothing here
    reads files or stores.
    """

    mode: str
    """``"halo"`` (each block reads its core, a halo on each side and the seam samples,
    clipped at the segment's ends) or ``"carry"`` (filter states carried: each block reads
    its core and the seam samples before it, no halo)."""
    halo: int
    """Halo per side (samples); 0 in carry mode."""
    seam_samples: int
    """``[checks] seam_samples``."""
    edge_samples: int
    """Resolved end-extension length (samples): a halo window touching a segment end is
    widened to hold that many samples and one more."""
    spans: Mapping[str, Sequence[Span]]
    """Block cores ``[start, stop)`` in file frames, per file (relative path), every file of
    the segment."""

    def window(self, start: int, stop: int, segment_frames: int, previous_core: int | None) -> int:
        """Samples per channel the block with core ``[start, stop)`` (segment samples) reads.

        ``previous_core`` is the core length of the segment's block before it (None for the
        first). Halo mode: :func:`~twinpass.core.kernel.block_reach`'s window; carry mode: the
        core plus :func:`~twinpass.core.carry.seam_before`.
        """
        if self.mode == "carry":
            from .carry import seam_before  # imported here: carry imports the kernel

            return (stop - start) + seam_before(previous_core, self.seam_samples)
        from .kernel import block_reach

        _, _, ws, we, _, _ = block_reach(start, stop, segment_frames, self.halo, self.seam_samples,
                                         self.edge_samples)
        return we - ws


@dataclass(frozen=True)
class Plan:
    """The result of :func:`make_plan`."""

    files: tuple[FilePlan, ...]
    """Plans of the valid files, in segment order (stream, start time, position)."""
    segments: tuple[Segment, ...]
    removed: tuple[FilePlan, ...]
    """Records whose input is gone (status ``removed``)."""
    invalid: tuple[FilePlan, ...]
    """Files that cannot be processed (status ``invalid``), with their remedy."""
    halos: Mapping[float, int] = field(default_factory=dict)
    """Halo in samples per sample rate (Hz), as given to :func:`make_plan`."""
    notes: tuple[str, ...] = ()
    """Things worth a look that are not errors: discovery's findings (a file read up to its
    last whole frame, NaN runs filled...) and rate or channel changes inside a stream."""

    def all_files(self) -> tuple[FilePlan, ...]:
        """Valid, removed and invalid file plans, in that order."""
        return self.files + self.removed + self.invalid

    def file(self, relpath: str) -> FilePlan:
        """The plan of ``relpath``; :class:`ArchiveError` when the plan does not know it."""
        for fp in self.all_files():
            if fp.relpath == relpath:
                return fp
        raise ArchiveError(f"{relpath}: not part of this plan", path=relpath)

    def for_segment(self, segment_id: str) -> tuple[FilePlan, ...]:
        """Plans of the files of one segment, in order."""
        return tuple(fp for fp in self.files if fp.segment == segment_id)

    def segments_with_work(self) -> tuple[Segment, ...]:
        """Segments with at least one file to compute."""
        busy = {fp.segment for fp in self.files if fp.redo is not None}
        return tuple(s for s in self.segments if s.id in busy)

    def records(self) -> dict[str, FileRecord]:
        """The store's record of each planned file that has one, by input path."""
        return {fp.relpath: fp.record for fp in self.files if fp.record is not None}

    def to_json(self) -> list[dict[str, Any]]:
        """A JSON-ready list of every file: path, stream, segment, status, reason, redo, ..."""
        return [fp.to_dict() for fp in self.all_files()]

    def totals(self, reads: Mapping[str, SegmentReads] | None = None) -> dict[str, Any]:
        """Counts and work estimates.

        Parameters
        ----------
        reads : mapping, optional
            How the engine runs each segment (by segment id), see :class:`SegmentReads`.
            Segments it does not name are estimated from their halo alone (as if in halo
            mode, one window per run of samples to compute).

        Returns
        -------
        dict
            ``files``: files per status (every status, zeros included); ``segments`` and
            ``segments_with_work``; ``samples``: samples per channel to compute (whole
            files for resumed ones, so an upper bound); ``resumed``: how many files resume
            (redone whole but for their done blocks); ``block_work_samples``: an estimate
            of what the blocks to run read, in samples per channel: for a segment in
            ``reads``, the sum of the windows of its blocks whose cores hold samples to
            compute (:meth:`SegmentReads.window`; every block of a resumed file, so an
            upper bound); for another, each run of consecutive samples to compute (file
            joins inside a segment do not break a run) with a halo on each side, clipped at
            the segment's ends; ``carry_segments``: segments with work that ``reads`` runs
            in carry mode (they also pass over their whole segment twice to carry the
            filter states, which ``block_work_samples`` does not count).
        """
        counts = {s: 0 for s in STATUSES}
        for fp in self.all_files():
            counts[fp.status] += 1
        samples = sum(fp.redo_frames for fp in self.files)
        work = 0
        by_id = {s.id: s for s in self.segments}
        per_segment: dict[str, list[Span]] = defaultdict(list)
        for fp in self.files:
            seg = by_id.get(fp.segment or "")
            if seg is None or fp.redo is None:
                continue
            off = seg.offsets[seg.index_of(fp.relpath)]
            spans = ((0, fp.frames),) if fp.redo == "all" else fp.redo
            per_segment[seg.id].extend((off + a, off + b) for a, b in spans)  # type: ignore[union-attr]
        carry = 0
        for sid in per_segment:
            seg = by_id[sid]
            how = (reads or {}).get(sid)
            if how is not None:
                work += self._block_reads(seg, how)
                carry += how.mode == "carry"
                continue
            halo = int(self.halos.get(seg.sample_rate_hz, 0))
            for a, b in _merge(per_segment[sid]):
                work += min(seg.frames, b + halo) - max(0, a - halo)
        return {
            "files": counts,
            "segments": len(self.segments),
            "segments_with_work": len(per_segment),
            "samples": int(samples),
            "resumed": sum(1 for fp in self.files if fp.redo == "all" and fp.resume),
            "block_work_samples": int(work),
            "carry_segments": carry,
        }

    def _block_reads(self, seg: Segment, how: SegmentReads) -> int:
        """Samples per channel the blocks to run of ``seg`` read (see :meth:`totals`)."""
        from .blocks import blocks_touching

        plans = {fp.relpath: fp for fp in self.for_segment(seg.id)}
        total = 0
        previous: int | None = None
        for f, off in zip(seg.files, seg.offsets):
            spans = list(how.spans.get(f.relpath, ()))
            fp = plans.get(f.relpath)
            redo = None if fp is None else fp.redo
            todo = (set(range(len(spans))) if redo == "all"
                    else set(blocks_touching(spans, redo)) if isinstance(redo, tuple) else set())
            for i, (a, b) in enumerate(spans):
                if i in todo:
                    total += how.window(off + a, off + b, seg.frames, previous)
                previous = b - a
        return total


# -- planning ----------------------------------------------------------------


def _merge(spans: Iterable[Span]) -> tuple[Span, ...]:
    """Sort spans and merge the ones that overlap or touch; drop empty ones."""
    from .nonfinite import merge_runs  # imported here: nonfinite imports the kernel

    return tuple(merge_runs(spans))


def _parse_time(text: str | None) -> _dt.datetime | None:
    """An ISO 8601 time (UTC when it names no zone); ``None`` when absent or unreadable."""
    if not text:
        return None
    try:
        t = _dt.datetime.fromisoformat(text)
    except ValueError:
        return None
    return t if t.tzinfo is not None else t.replace(tzinfo=_dt.timezone.utc)


def _old_ends(members: Mapping[str, list[FileRecord]]) -> dict[str, tuple[str, str]]:
    """First and last member (source paths) of each recorded segment whose members all have
    recorded start times. By the start times, not by the sums of the frames: joins allow half
    a sample each, so times drift from those sums along a long segment, but their order does not."""
    out: dict[str, tuple[str, str]] = {}
    for segment, recs in members.items():
        starts = [_parse_time(r.start_time) for r in recs]
        if recs and all(t is not None for t in starts):
            order = sorted(zip(starts, (r.source for r in recs)))
            out[segment] = (order[0][1], order[-1][1])
    return out


def _segment_start(segment_id: str | None) -> _dt.datetime | None:
    """Start time encoded in a segment id ``stream@ISO``; ``None`` when there is none."""
    if not segment_id or "@" not in segment_id:
        return None
    return _parse_time(segment_id.rpartition("@")[2])


def _own_status(rec: FileRecord | None, entry: Any, digest: str, force: bool,
                out_dtype: str | None = None) -> tuple[str, str]:
    """Status of a file judged on its own content: new, changed, incomplete or unchanged."""
    if force:
        return "changed", "forced"
    if rec is None:
        return "new", "no output yet"
    changed, why = fingerprint_changed(rec.source_fingerprint, entry.fingerprint)
    if changed:
        return "changed", why
    if int(rec.frames) != entry.frames:
        return "changed", f"frame count changed ({rec.frames} -> {entry.frames})"
    if rec.design_digest == RESETTING_DIGEST:
        return "changed", "a run stopped while writing its output anew: written whole again"
    if rec.design_digest != digest:
        return "changed", "filter design or processing settings changed"
    if out_dtype is not None and rec.dtype is not None and rec.dtype != out_dtype:
        return "changed", f"output sample type changed ({rec.dtype} -> {out_dtype})"
    if not rec.complete:
        return "incomplete", "output incomplete: resume (blocks already done are kept)"
    moved = _identity_change(rec, entry)
    if moved:
        return "unchanged", f"same fingerprint and design; output complete; {moved}: its attributes are updated"
    return "unchanged", "same fingerprint and design; output complete"


def _identity_change(rec: FileRecord, entry: Any) -> str:
    """What changed of where a file sits (its stream, its start time: a manifest or a file
    name corrected) since its output was written, or "". Its samples are the same; where the
    change moves a join, the planner refilters that join, and the run updates the output's
    attributes."""
    changes = []
    if rec.stream is not None and rec.stream != entry.stream:
        changes.append(f"stream changed ({rec.stream} -> {entry.stream})")
    if rec.start_time is not None and _parse_time(rec.start_time) != entry.start_time:
        now = "none" if entry.start_time is None else entry.start_time.isoformat()
        changes.append(f"start time changed ({rec.start_time} -> {now})")
    return "; ".join(changes)


class _SegmentPlanner:
    """Statuses and redo spans of the files of one segment."""

    def __init__(
        self,
        seg: Segment,
        records: Mapping[str, FileRecord],
        members: Mapping[str, list[FileRecord]],
        old_ends: Mapping[str, tuple[str, str]],
        digest: str,
        halo: int,
        force: bool,
        out_dtype: str | None = None,
    ) -> None:
        self.seg = seg
        self.members = members
        self.old_ends = old_ends
        self.halo = int(halo)
        self.recs = [records.get(f.relpath) for f in seg.files]
        self.own = [_own_status(r, f, digest, force, out_dtype) for r, f in zip(self.recs, seg.files)]
        self.part = [None if force else _changed_in_part(r, f, s, digest, out_dtype)
                     for r, f, s in zip(self.recs, seg.files, self.own)]
        """Per file: the spans of a changed Zarr input whose other rows of chunks are as its
        output was filtered from (only those spans, with halos, are filtered again), else None."""
        self.spans: list[list[Span]] = [[] for _ in seg.files]
        self.causes: list[list[str]] = [[] for _ in seg.files]

    def _dirty(self, k: int) -> bool:
        """File ``k`` is filtered whole (new, or changed throughout)."""
        return self.own[k][0] in ("new", "changed") and self.part[k] is None

    def _invalidate(self, a: int, b: int, cause_at: int | None, cause: str) -> None:
        """Mark the segment window [a, b) (clipped) for recomputation; skip file ``cause_at``."""
        a, b = max(0, a), min(self.seg.frames, b)
        for j, fa, fb in self.seg.locate(a, b) if b > a else []:
            if j == cause_at or self._dirty(j):
                continue
            self.spans[j].append((fa, fb))
            text = cause
            if cause_at is not None:
                rel = "next" if cause_at == j + 1 else "previous" if cause_at == j - 1 else (
                    "later" if cause_at > j else "earlier"
                )
                text = f"{rel} file {cause}"
            if text not in self.causes[j]:
                self.causes[j].append(text)

    def _old_position(self, k: int) -> tuple[bool, bool]:
        """Was file ``k`` first / last of the segment its record names?"""
        f, rec = self.seg.files[k], self.recs[k]
        assert rec is not None and rec.segment is not None and f.start_time is not None
        members = self.members.get(rec.segment, [rec])
        if len(members) == 1:
            return True, True
        ends = self.old_ends.get(rec.segment)
        if ends is not None:
            return ends[0] == rec.source, ends[1] == rec.source
        t0 = _segment_start(rec.segment)
        if t0 is None:
            return True, True
        fs = self.seg.sample_rate_hz
        # a start time that moved gives an impossible position: both ends count as changed
        offset = ((f.start_time - t0) // _dt.timedelta(microseconds=1)) * 1e-6 * fs
        total = sum(int(r.frames) for r in members)
        tol = max(0.5, 1e-6 * fs)
        return abs(offset) <= tol, abs(offset + f.frames - total) <= tol

    def _gone(self, k: int) -> str:
        """Members of file ``k``'s old segment that are not in this segment now."""
        rec = self.recs[k]
        assert rec is not None
        here = set(self.seg.relpaths)
        gone = sorted(r.source for r in self.members.get(rec.segment or "", []) if r.source not in here)
        if not gone:
            return ""
        more = f" and {len(gone) - 3} more" if len(gone) > 3 else ""
        return f" (no longer in it: {', '.join(gone[:3])}{more})"

    def _check_joins(self, k: int) -> None:
        """Invalidate the joins of file ``k`` whose neighbour changed by membership."""
        f, rec = self.seg.files[k], self.recs[k]
        if self._dirty(k) or rec is None:
            return
        if rec.joins is not None:
            self._check_recorded_joins(k, rec.joins)
            return
        if rec.segment is None or f.start_time is None:
            return
        was_first, was_last = self._old_position(k)
        off = self.seg.offsets[k]
        n = len(self.seg.files)
        for side, is_end, was_end, j in (("start", k == 0, was_first, k - 1), ("end", k == n - 1, was_last, k + 1)):
            x = off if side == "start" else off + f.frames
            if is_end:
                if not was_end:
                    self._invalidate(
                        x - self.halo, x + self.halo, None,
                        f"the segment now {'starts at' if side == 'start' else 'ends after'} {f.relpath} "
                        f"(its old segment {rec.segment} continued{self._gone(k)})",
                    )
                continue
            if self._dirty(j):
                continue  # the neighbour's own change already covers this join
            other = self.recs[j]
            if was_end or other is None or (other.segment is not None and other.segment != rec.segment):
                a, b = sorted((j, k))
                self._invalidate(
                    x - self.halo, x + self.halo, None,
                    f"{self.seg.files[a].relpath} and {self.seg.files[b].relpath} are now joined "
                    "(they were not neighbours before)",
                )

    def _check_recorded_joins(self, k: int, joins: tuple[str | None, str | None]) -> None:
        """Invalidate the output on file ``k``'s side of each of its joins whose neighbour is
        not the one it was filtered next to (``joins``: previous and next source paths, None at
        a segment's start or end). Judged by each file's own record, so that a file back after
        a run without it (excluded, moved away, invalid for a while) is not taken for a member
        of the segment that went on without it; the other side of the join is judged by the
        other file's record (its output may still be that of the same neighbours)."""
        f, seg = self.seg.files[k], self.seg
        n = len(seg.files)
        for side, j, was in (("start", k - 1, joins[0]), ("end", k + 1, joins[1])):
            now = seg.files[j].relpath if 0 <= j < n else None
            if now == was or (now is not None and self._dirty(j)):  # a changed neighbour covers the join
                continue
            word, other = ("preceded", "before") if side == "start" else ("followed", "after")
            if now is None:
                why = (f"the segment now {'starts at' if side == 'start' else 'ends after'} {f.relpath} "
                       f"(it was filtered with {was} {other} it)")
            elif was is None:
                why = f"{f.relpath} is now {word} by {now} (it was filtered as the segment's {side})"
            else:
                why = f"{f.relpath} is now {word} by {now} (it was filtered with {was} {other} it)"
            x = seg.offsets[k] + (0 if side == "start" else f.frames)
            self._invalidate(*((x, x + self.halo) if side == "start" else (x - self.halo, x)), None, why)

    def run(self) -> list[FilePlan]:
        seg = self.seg
        for k, f in enumerate(seg.files):
            x0 = seg.offsets[k]
            if self._dirty(k):
                self._invalidate(x0 - self.halo, x0 + f.frames + self.halo, k, f"{f.relpath} is {self.own[k][0]}")
            for a, b in self.part[k] or ():
                # the output within a halo of a changed sample depends on it, in this file and beyond
                self._invalidate(x0 + a - self.halo, x0 + b + self.halo, k,
                                 f"{f.relpath} changed in samples {_spans_text(self.part[k])}")
                self.spans[k].append((max(0, a - self.halo), min(f.frames, b + self.halo)))
        for k in range(len(seg.files)):
            self._check_joins(k)
        out = []
        for k, f in enumerate(seg.files):
            status, reason = self.own[k]
            redo: Redo = None
            resume = False
            rec = self.recs[k]
            lost = _merge(rec.absent) if rec is not None and status == "unchanged" else ()
            spans = _merge([*self.spans[k], *lost])
            if lost:
                self.causes[k].append(_lost_text(lost))
            why = "; ".join(self.causes[k])
            part = self.part[k]
            if part is not None:
                redo = "all" if spans == ((0, f.frames),) else spans
                n = sum(b - a for a, b in part)
                reason = (f"{reason}, in samples {_spans_text(part)} only ({n} of {f.frames}; the other rows of "
                          f"chunks are as they were): those and {self.halo} samples on each side are filtered again"
                          + (f"; {why}" if why else ""))
            elif status in ("new", "changed"):
                redo = "all"
            elif status == "incomplete":
                redo, resume = "all", not spans
                if spans:
                    reason = f"output incomplete, and {why}: recompute the whole file"
            elif lost and spans == lost:  # only chunks lost: rerun their blocks, keep the rest
                status, redo, resume, reason = "incomplete", spans, True, f"{why}: their blocks are rerun"
            elif spans:
                status, redo, reason = "neighbour", spans, why
            out.append(
                FilePlan(
                    relpath=f.relpath, stream=seg.stream, segment=seg.id, status=status, reason=reason,
                    redo=redo, record=self.recs[k], resume=resume, frames=f.frames,
                )
            )
        return out


def _spans_text(spans: Sequence[Span] | None) -> str:
    """``[a, b), [c, d), [e, f) and N more``."""
    spans = spans or ()
    return ", ".join(f"[{a}, {b})" for a, b in spans[:3]) + (f" and {len(spans) - 3} more" if len(spans) > 3 else "")


def _lost_text(lost: tuple[Span, ...]) -> str:
    """What to say of a complete output whose chunk files are missing (frame spans ``lost``)."""
    frames = sum(b - a for a, b in lost)
    return (f"output chunk files missing for {frames} frames at {_spans_text(lost)} (deleted or lost since they "
            "were written; they read as NaN, the fill value)")


def _changed_in_part(rec: FileRecord | None, entry: Any, own: tuple[str, str], digest: str,
                     out_dtype: str | None) -> tuple[Span, ...] | None:
    """The spans (samples) of a changed Zarr input that alone changed, when its output is
    otherwise current (complete, same length, design and sample type), else ``None``: the
    rows of chunks whose digests differ (:func:`changed_spans`), unless that is every one."""
    if own[0] != "changed" or rec is None or not rec.complete or int(rec.frames) != entry.frames:
        return None
    if rec.design_digest != digest or (out_dtype is not None and rec.dtype is not None and rec.dtype != out_dtype):
        return None
    spans = changed_spans(rec.source_fingerprint, entry.fingerprint, entry.frames)
    return None if spans is None or spans == ((0, entry.frames),) else spans


def _lookup(table: Mapping[float, Any], fs: float, what: str, seg: Segment) -> Any:
    try:
        return table[fs]
    except KeyError:
        known = ", ".join(f"{r:g}" for r in sorted(table)) or "none"
        raise ArchiveError(
            f"segment {seg.id}: no {what} for sample rate {fs:g} Hz (known rates: {known}); "
            "design the filter for every sample rate found in the archive",
            path=seg.files[0].relpath,
        ) from None


def make_plan(
    segments: Sequence[Segment],
    invalid: Sequence[InvalidFile],
    records: Mapping[str, FileRecord],
    design_digests: Mapping[float, str],
    halos: Mapping[float, int],
    force: bool = False,
    notes: Sequence[str] = (),
    out_dtype: str | None = None,
) -> Plan:
    """Decide what a run must compute.

    Parameters
    ----------
    segments : sequence of Segment
        From :func:`twinpass.core.segments.build_segments`.
    invalid : sequence of InvalidFile
        Everything discovery and segment building left out.
    records : mapping of str to FileRecord
        The store's records, keyed by input path relative to the archive root.
    design_digests : mapping of float to str
        Design digest per sample rate (Hz); a record with another digest is stale.
    halos : mapping of float to int
        Halo per sample rate, samples (the design's effective length).
    force : bool
        Recompute every valid file (status ``changed``, reason ``"forced"``).
    notes : sequence of str
        Findings of discovery worth a look (e.g. a truncated file read up to its last whole
        frame); they open :attr:`Plan.notes`.
    out_dtype : str, optional
        The output sample type asked for (``[output] dtype``); a file whose output has
        another is ``changed``.

    Returns
    -------
    Plan
    """
    members: dict[str, list[FileRecord]] = defaultdict(list)
    for rec in records.values():
        if rec.segment is not None:
            members[rec.segment].append(rec)
    old_ends = _old_ends(members)
    files: list[FilePlan] = []
    notes = list(notes)
    present: set[str] = set()
    for seg in segments:
        digest = _lookup(design_digests, seg.sample_rate_hz, "design digest", seg)
        halo = _lookup(halos, seg.sample_rate_hz, "halo", seg)
        files.extend(_SegmentPlanner(seg, records, members, old_ends, digest, halo, force, out_dtype).run())
        present.update(seg.relpaths)
        if seg.break_kind == "layout":
            notes.append(f"stream {seg.stream}: new segment {seg.id}: {seg.break_reason}")
        notes.extend(f"stream {seg.stream}: {note}" for note in seg.join_notes)
    bad: list[FilePlan] = []
    for inv in invalid:
        if inv.path in present or any(b.relpath == inv.path for b in bad):
            continue
        rec = records.get(inv.path)
        bad.append(
            FilePlan(
                relpath=inv.path, stream=inv.stream, segment=None if rec is None else rec.segment, status="invalid",
                reason=inv.reason, record=rec, frames=0 if rec is None else int(rec.frames), remedy=inv.remedy,
            )
        )
    # A folder discovery could not list (reported as "FOLDER/"): files recorded under it are
    # unknown, not gone; their outputs are kept and they are reported with the folder's remedy.
    unlisted = [inv for inv in invalid if inv.path.endswith("/")]
    reported = {b.relpath for b in bad}
    for path, rec in sorted(records.items()) if unlisted else ():
        if path in present or path in reported:
            continue
        folder = next((inv for inv in unlisted if path.startswith(inv.path)), None)
        if folder is not None:
            bad.append(
                FilePlan(
                    relpath=path, stream=None, segment=rec.segment, status="invalid",
                    reason=f"not examined: its folder {folder.path} cannot be listed, so whether it changed or "
                    "was removed is unknown; its output is kept as it is",
                    record=rec, frames=int(rec.frames), remedy=folder.remedy,
                )
            )
    known = present | {b.relpath for b in bad}
    removed = tuple(
        FilePlan(
            relpath=path, stream=None, segment=rec.segment, status="removed",
            reason="no longer in the archive; its output is out of date", record=rec, frames=int(rec.frames),
        )
        for path, rec in sorted(records.items())
        if path not in known
    )
    return Plan(
        files=tuple(files), segments=tuple(segments), removed=removed, invalid=tuple(bad),
        halos=dict(halos), notes=tuple(notes),
    )


# -- terminal table ----------------------------------------------------------


def _redo_text(fp: FilePlan) -> str:
    if fp.redo is None:
        return "-"
    if fp.redo == "all":
        return "resume" if fp.resume else "all"
    spans = [f"[{a}, {b})" for a, b in fp.redo]  # type: ignore[union-attr]
    if len(spans) > 2:
        spans = spans[:2] + [f"+{len(spans) - 2} more"]
    return " ".join(spans)


def format_plan(plan: Plan, reads: Mapping[str, SegmentReads] | None = None) -> str:
    """The plan as a plain-text table (one row per file) followed by totals and notes
    (``reads``: see :meth:`Plan.totals`)."""
    header = ("STATUS", "STREAM", "FILE", "REDO (samples)", "REASON")
    rows = []
    for fp in plan.all_files():
        rows.append((fp.status, fp.stream or "-", fp.relpath, _redo_text(fp), fp.explained))
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(4)]
    lines = []
    for r in [header, *rows]:
        lines.append("  ".join(c.ljust(w) for c, w in zip(r[:4], widths)) + "  " + r[4])
    t = plan.totals(reads)
    counts = ", ".join(f"{s} {n}" for s, n in t["files"].items() if n)
    lines.append("")
    lines.append(f"files: {counts or 'none'}")
    lines.append(f"segments: {t['segments']} ({t['segments_with_work']} with work)")
    at_most = (f" (at most: {t['resumed']} resumed file(s) keep the blocks already done)"
               if t["resumed"] else "")
    lines.append(
        f"samples to compute: {t['samples']:,} per channel{at_most}; "
        f"estimated block work (samples the blocks read, halos included): {t['block_work_samples']:,}"
    )
    if t["carry_segments"]:
        lines.append(f"{t['carry_segments']} segment(s) run in carry mode (no halos); each also passes over its "
                     "whole segment twice to carry the filter states, not counted above")
    for note in plan.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)
