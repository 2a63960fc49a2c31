"""Streaming scans of input recordings for non-finite samples (NaN, +Inf, -Inf).

A scan reads a recording window after window (memory follows the window, never the file)
and reports where samples are non-finite. Integer formats cannot hold such values and are
not read at all. Spans are half-open ``[start, stop)`` in file samples.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from twinpass.core.nonfinite import ChannelRun, FillSpan, channel_runs, join_channel_runs, union_runs
from twinpass.io.readers.base import Recording, RecordingInfo

__all__ = [
    "DEFAULT_SCAN_MIB",
    "fill_spans_for",
    "holds_floats",
    "scan_channel_runs",
    "scan_nonfinite",
]

DEFAULT_SCAN_MIB = 16.0
"""Default size of one scan window (float64 samples), MiB."""


def holds_floats(info: RecordingInfo) -> bool:
    """True when the stored samples are floating point (and so may be NaN or infinite).

    Readers report ``full_scale = None`` exactly for float data (integer PCM has a full
    scale); a ``sample_format`` naming a float type counts too.
    """
    return info.full_scale is None or str(info.sample_format).lower().startswith("float")


def _chunk_frames(info: RecordingInfo, chunk_frames: int | None) -> int:
    if chunk_frames is not None:
        return max(1, int(chunk_frames))
    return max(1, int(DEFAULT_SCAN_MIB * 2**20) // (8 * max(1, info.channels)))


def scan_channel_runs(recording: Recording, chunk_frames: int | None = None) -> list[ChannelRun]:
    """Every channel's runs of non-finite samples, reading ``chunk_frames`` samples at a time.

    Parameters
    ----------
    recording : Recording
        An open recording.
    chunk_frames : int, optional
        Samples per read; default about :data:`DEFAULT_SCAN_MIB` MiB of float64 samples.

    Returns
    -------
    list of (channel, start, stop)
        Maximal runs (runs crossing a read boundary are joined), sorted by channel, then
        start. Empty for integer formats, which are not read.
    """
    info = recording.info
    if not holds_floats(info):
        return []
    step = _chunk_frames(info, chunk_frames)
    found: list[ChannelRun] = []
    for a in range(0, info.frames, step):
        b = min(info.frames, a + step)
        found.extend(channel_runs(recording.read(a, b), offset=a))
    return join_channel_runs(found)


def scan_nonfinite(recording: Recording, chunk_frames: int | None = None) -> list[tuple[int, int]]:
    """Spans ``[start, stop)`` of samples in which at least one channel is non-finite.

    Streams over the recording like :func:`scan_channel_runs`; empty for integer formats.
    """
    return union_runs(scan_channel_runs(recording, chunk_frames))


def fill_spans_for(recording: Recording, runs: Sequence[ChannelRun]) -> tuple[FillSpan, ...]:
    """The :class:`FillSpan` of each channel run: reads the finite sample on each side.

    Every run must have a sample before and after it (check with
    :func:`twinpass.core.nonfinite.fill_problem` first).
    """
    out = []
    cache: dict[int, Any] = {}

    def sample(i: int) -> np.ndarray:
        if i not in cache:
            cache[i] = recording.read(i, i + 1)[0]
        return cache[i]

    for c, a, b in runs:
        out.append(FillSpan(int(c), int(a), int(b), float(sample(a - 1)[c]), float(sample(b)[c])))
    return tuple(out)
