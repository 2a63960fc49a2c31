"""Streams and segments: grouping recordings that are contiguous in time.

A *stream* is the recordings of one source ordered by start time. A *segment* is a
maximal run of recordings of one stream in which each file starts where the previous
one ends and sample rate, channel count and sample format agree; it is filtered as one
signal, so file joins inside it leave no trace.

Rules (all lengths in samples, times in seconds, datetimes timezone-aware UTC):

* Two consecutive files A, B of a stream are *contiguous* when
  ``|B.start - (A.start + A.frames / fs)| <= 1 / (2 fs)`` (half a sample period; never less
  than one microsecond, the resolution of a :class:`datetime.datetime`).
* A later start (a gap) or any change of sample rate, channel count or sample format
  starts a new segment. The new segment's :attr:`Segment.break_reason` says why; for a
  change of rate, channels or format it names both files and what to do.
* A file that starts before the previous kept file of its stream ends (an *overlap*) is
  left out of the segments and reported as an :class:`InvalidFile` naming both files;
  the stream goes on with the next file, compared against the last file kept.
* Files without a start time form single-file segments.
* Non-finite input (``[processing] nonfinite = "split"``): the runs of a file that are not
  filled (:attr:`FileEntry.holes`) become :attr:`Segment.holes` in segment coordinates
  (runs meeting at a file join are merged). A hole does not end the segment: its id, files
  and offsets stay as they are, and the engine filters the pieces between holes separately
  (each piece end extended like a segment end) and writes NaN inside the holes.

Segment ids are stable across runs: ``f"{stream}@{start.isoformat()}"`` of the first
file, or the file's relative path when it has no start time.

This module is pure: it imports no I/O layer at run time (the reader types are used
for annotations only).
"""

from __future__ import annotations

import bisect
import datetime as _dt
from collections import defaultdict
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Iterable

from twinpass.core.nonfinite import FillSpan, merge_runs
from twinpass.core.nonfinite import pieces as _pieces
from twinpass.errors import ArchiveError

if TYPE_CHECKING:  # pragma: no cover - annotations only
    from twinpass.io.readers.base import ReaderSpec, RecordingInfo

__all__ = [
    "FileEntry",
    "InvalidFile",
    "Segment",
    "build_segments",
    "join_offset_samples",
    "segment_id",
]

_DATETIME_RESOLUTION_S = 1e-6


@dataclass(frozen=True, slots=True)
class InvalidFile:
    """A file left out of processing, with the reason and what to do about it."""

    path: str
    """Path relative to the archive root (POSIX separators)."""
    reason: str
    """What is wrong, naming the place (header field, frame, other file)."""
    remedy: str
    """What the user can do (repair, rename, set a configuration key, exclude the file)."""
    stream: str | None = None
    """The stream the file belongs to, where that is known without using the file (its
    name pattern or manifest row, or the segment of a rate no filter was designed for)."""

    def message(self) -> str:
        """One line: ``path: reason; remedy``."""
        return f"{self.path}: {self.reason}; {self.remedy}"


@dataclass(frozen=True, slots=True)
class FileEntry:
    """One valid input file of the archive, as found by discovery."""

    relpath: str
    """Path relative to the archive root, POSIX separators; the file's identity."""
    spec: "ReaderSpec"
    """How to reopen the recording (format, absolute path, reader options)."""
    info: "RecordingInfo"
    """Frames, channels, sample rate (Hz) and sample format as read from the header."""
    stream: str
    """Name of the stream the file belongs to."""
    start_time: _dt.datetime | None
    """Time of the first sample (timezone-aware UTC), or ``None`` when unknown."""
    fingerprint: dict[str, Any] | None = field(default=None, compare=False)
    """Content fingerprint (see ``twinpass.io.fingerprint``), or ``None`` when not taken."""
    nonfinite_runs: tuple[tuple[int, int], ...] = field(default=(), compare=False)
    """Spans ``[start, stop)`` (file samples) in which at least one channel is NaN or
    infinite, as found by the scan of a float file (empty for integer formats)."""
    nonfinite_fill: tuple[FillSpan, ...] = field(default=(), compare=False)
    """Per-channel linear fills of those runs (``[processing] nonfinite = "interpolate"``),
    with the finite neighbour values taken when the file was scanned; empty otherwise."""
    output_name: str | None = field(default=None, compare=False)
    """Name of the file's output array when it is not derived from :attr:`relpath` (an array
    of an earlier job's output store keeps its path); ``None`` otherwise."""
    channel_names: tuple[str, ...] | None = field(default=None, compare=False)
    """One name per channel for the output's attributes (``twinpass.io.channels``), or ``None``."""
    units: tuple[str, ...] | None = field(default=None, compare=False)
    """One unit per channel for the output's attributes, or ``None``."""
    start_source: str | None = field(default=None, compare=False)
    """Where :attr:`start_time` was read, for messages (``"the file's bext chunk"``, ``"the
    manifest /data/manifest.csv"``...), or ``None`` when unknown or there is no start time."""

    @property
    def holes(self) -> tuple[tuple[int, int], ...]:
        """Runs of :attr:`nonfinite_runs` that no fill covers (file samples): the samples
        left out of filtering (``"split"``)."""
        return tuple(
            (a, b) for a, b in self.nonfinite_runs
            if not any(a <= f.start and f.stop <= b for f in self.nonfinite_fill)
        )

    @property
    def filled_spans(self) -> tuple[tuple[int, int], ...]:
        """Runs of :attr:`nonfinite_runs` replaced by interpolation (file samples)."""
        holes = set(self.holes)
        return tuple(r for r in self.nonfinite_runs if r not in holes)

    @property
    def frames(self) -> int:
        """Samples per channel."""
        return int(self.info.frames)

    @property
    def sample_rate_hz(self) -> float:
        """Sample rate in Hz (discovery guarantees it is known and positive)."""
        return float(self.info.sample_rate_hz)  # type: ignore[arg-type]

    @property
    def channels(self) -> int:
        return int(self.info.channels)

    @property
    def end_time(self) -> _dt.datetime | None:
        """Time just after the last sample: ``start + frames / fs``; ``None`` without a start."""
        if self.start_time is None:
            return None
        return self.start_time + _dt.timedelta(seconds=self.frames / self.sample_rate_hz)


def segment_id(stream: str, first: FileEntry) -> str:
    """Stable id of a segment whose first file is ``first``.

    ``f"{stream}@{start.isoformat()}"``, or the file's relative path when it has no start time.
    """
    if first.start_time is None:
        return first.relpath
    return f"{stream}@{first.start_time.isoformat()}"


@dataclass(frozen=True, slots=True)
class Segment:
    """A run of contiguous files of one stream, filtered as one signal.

    Segment coordinates are sample indices counted from the first sample of the first
    file; file ``k`` covers ``[offsets[k], offsets[k] + files[k].frames)``.
    """

    id: str
    """Stable id, see :func:`segment_id`."""
    stream: str
    files: tuple[FileEntry, ...]
    """The files in time order."""
    offsets: tuple[int, ...]
    """First sample of each file in segment coordinates (``offsets[0] == 0``)."""
    frames: int
    """Total samples per channel."""
    sample_rate_hz: float
    channels: int
    sample_format: str = ""
    break_reason: str | None = None
    """Why this segment does not continue the previous one of its stream (``None`` for the
    first segment of a stream): a gap, or a change of rate, channels or format."""
    break_kind: str | None = None
    """``None`` (first segment of its stream), ``"gap"``, ``"layout"`` (sample rate, channel
    count or sample format changed; worth reporting) or ``"untimed"`` (no start time)."""
    holes: tuple[tuple[int, int], ...] = ()
    """Spans ``[start, stop)`` in segment coordinates left out of filtering (unfilled
    non-finite runs of its files); sorted, merged. The output is NaN there."""
    join_notes: tuple[str, ...] = ()
    """Joins of this segment whose files' start times are more than half a sample from
    contiguous, joined because the start times' resolution (1 us) cannot tell them apart
    at this rate (above 500 kHz): a gap or overlap of a sample or so there goes unseen."""

    def pieces(self) -> list[tuple[int, int]]:
        """Spans ``[start, stop)`` between :attr:`holes`, each filtered as a signal of its own."""
        return _pieces(self.frames, self.holes)

    @property
    def start_time(self) -> _dt.datetime | None:
        return self.files[0].start_time

    @property
    def end_time(self) -> _dt.datetime | None:
        return self.files[-1].end_time

    @property
    def relpaths(self) -> tuple[str, ...]:
        return tuple(f.relpath for f in self.files)

    def index_of(self, relpath: str) -> int:
        """Position of the file ``relpath`` in :attr:`files`; :class:`ArchiveError` if absent."""
        for k, f in enumerate(self.files):
            if f.relpath == relpath:
                return k
        raise ArchiveError(f"segment {self.id}: no file {relpath!r} in it", path=relpath)

    def locate(self, a: int, b: int) -> list[tuple[int, int, int]]:
        """Map the segment window [a, b) to windows of its files.

        Parameters
        ----------
        a, b : int
            Window in segment coordinates (samples), ``0 <= a <= b <= frames``.

        Returns
        -------
        list of (file_index, file_a, file_b)
            One entry per file the window overlaps, in order; ``[file_a, file_b)`` are
            sample indices within that file. An empty window gives an empty list.
        """
        a, b = int(a), int(b)
        if not (0 <= a <= b <= self.frames):
            raise ArchiveError(
                f"segment {self.id}: window [{a}, {b}) is outside [0, {self.frames}); "
                "clip the window to the segment's length"
            )
        out: list[tuple[int, int, int]] = []
        if a == b:
            return out
        k = bisect.bisect_right(self.offsets, a) - 1
        while k < len(self.files) and self.offsets[k] < b:
            off = self.offsets[k]
            fa = max(a, off) - off
            fb = min(b, off + self.files[k].frames) - off
            if fb > fa:
                out.append((k, fa, fb))
            k += 1
        return out


def join_offset_samples(prev: FileEntry, nxt: FileEntry) -> float:
    """How far ``nxt`` starts after the end of ``prev``, in samples of ``prev``'s rate.

    Zero for a perfect join, positive for a gap, negative for an overlap. Both files
    must have start times.
    """
    assert prev.start_time is not None and nxt.start_time is not None
    delta_us = (nxt.start_time - prev.start_time) // _dt.timedelta(microseconds=1)
    return delta_us * 1e-6 * prev.sample_rate_hz - prev.frames


def _tolerance_samples(fs: float) -> float:
    """Half a sample period, never below the datetime resolution (in samples at ``fs``)."""
    return max(0.5, _DATETIME_RESOLUTION_S * fs)


def _mismatch(prev: FileEntry, nxt: FileEntry) -> list[str]:
    what = []
    if prev.sample_rate_hz != nxt.sample_rate_hz:
        what.append(f"sample rate {prev.sample_rate_hz:g} Hz -> {nxt.sample_rate_hz:g} Hz")
    if prev.channels != nxt.channels:
        what.append(f"channels {prev.channels} -> {nxt.channels}")
    if prev.info.sample_format != nxt.info.sample_format:
        what.append(f"sample format {prev.info.sample_format} -> {nxt.info.sample_format}")
    return what


def _make_segment(stream: str, files: list[FileEntry], why: tuple[str | None, str | None],
                  join_notes: list[str] | None = None) -> Segment:
    offsets = []
    holes: list[tuple[int, int]] = []
    total = 0
    for f in files:
        offsets.append(total)
        holes.extend((total + a, total + b) for a, b in f.holes)
        total += f.frames
    first = files[0]
    return Segment(
        id=segment_id(stream, first),
        stream=stream,
        files=tuple(files),
        offsets=tuple(offsets),
        frames=total,
        sample_rate_hz=first.sample_rate_hz,
        channels=first.channels,
        sample_format=str(first.info.sample_format),
        break_kind=why[0],
        break_reason=why[1],
        holes=tuple(merge_runs(holes)),
        join_notes=tuple(join_notes or ()),
    )


def start_sources(a: FileEntry, b: FileEntry) -> str:
    """Where the start times of two files were read, for a remedy that asks to correct one:
    ``"in the file's bext chunk"`` when both come from one kind of place, else each by file."""
    if a.start_source is None or b.start_source is None:
        return "where it was read: the file name, the manifest or the file itself"
    if a.start_source == b.start_source:
        return f"in {a.start_source}"
    return f"{a.relpath}: in {a.start_source}; {b.relpath}: in {b.start_source}"


def _sort_key(f: FileEntry) -> tuple[_dt.datetime, str]:
    assert f.start_time is not None
    return (f.start_time, f.relpath)


def _stream_segments(stream: str, files: list[FileEntry]) -> tuple[list[Segment], list[InvalidFile]]:
    segments: list[Segment] = []
    invalid: list[InvalidFile] = []
    timed = sorted((f for f in files if f.start_time is not None), key=_sort_key)
    untimed = sorted((f for f in files if f.start_time is None), key=lambda f: f.relpath)

    run: list[FileEntry] = []
    run_why: tuple[str | None, str | None] = (None, None)
    run_notes: list[str] = []
    for f in timed:
        if not run:
            run = [f]
            continue
        prev = run[-1]
        off = join_offset_samples(prev, f)
        tol = _tolerance_samples(prev.sample_rate_hz)
        if off < -tol:
            invalid.append(
                InvalidFile(
                    f.relpath,
                    f"overlaps {prev.relpath} of stream {stream!r} by {-off:.1f} samples: it starts at "
                    f"{f.start_time.isoformat()} before {prev.relpath} ends at "  # type: ignore[union-attr]
                    f"{prev.end_time.isoformat()}",  # type: ignore[union-attr]
                    f"correct the start time of one of the two files ({start_sources(prev, f)}), "
                    "or remove the repeated data / exclude one of them with [archive] exclude",
                )
            )
            continue
        changes = _mismatch(prev, f)
        gap = f"gap of {off / prev.sample_rate_hz:.6g} s ({off:.1f} samples) after {prev.relpath}"
        if changes:
            why: tuple[str | None, str | None] = (
                "layout",
                ("" if off <= tol else gap + "; ")
                + f"{', '.join(changes)} between {prev.relpath} and {f.relpath}; a segment needs one "
                "rate, channel count and format: if these files belong together, convert them to a "
                "common rate/layout, otherwise give them different streams (file name pattern or manifest)",
            )
        elif off > tol:
            why = ("gap", gap)
        else:
            if abs(off) > 0.5:  # within the start times' resolution, not within half a sample
                run_notes.append(
                    f"{f.relpath} joined to {prev.relpath} although its start time is {off:+.2f} samples from "
                    f"contiguous: at {prev.sample_rate_hz:g} Hz the start times' resolution (1 us) is "
                    f"{_DATETIME_RESOLUTION_S * prev.sample_rate_hz:g} samples, so a gap or overlap of that size "
                    "cannot be told from rounding; if the recorder may drop or repeat samples there, give the "
                    "files different streams, or check the join in the output"
                )
            run.append(f)
            continue
        segments.append(_make_segment(stream, run, run_why, run_notes))
        run, run_why, run_notes = [f], why, []
    if run:
        segments.append(_make_segment(stream, run, run_why, run_notes))
    for f in untimed:
        segments.append(_make_segment(stream, [f], ("untimed", "no start time: the file is a segment of its own")))
    return segments, invalid


def build_segments(entries: Iterable[FileEntry]) -> tuple[list[Segment], list[InvalidFile]]:
    """Group files into streams and streams into contiguous segments.

    Parameters
    ----------
    entries : iterable of FileEntry
        Valid files (any order). Sample rates must be known and positive.

    Returns
    -------
    segments : list of Segment
        Ordered by stream name, then start time; segments of files without a start time
        follow the timed ones of their stream, by path.
    invalid : list of InvalidFile
        Files left out because they overlap an earlier file of their stream (the later
        file is the one reported; the message names both).
    """
    by_stream: dict[str, list[FileEntry]] = defaultdict(list)
    for e in entries:
        by_stream[e.stream].append(e)
    segments: list[Segment] = []
    invalid: list[InvalidFile] = []
    for stream in sorted(by_stream):
        segs, bad = _stream_segments(stream, by_stream[stream])
        segments.extend(segs)
        invalid.extend(bad)
    return segments, invalid
