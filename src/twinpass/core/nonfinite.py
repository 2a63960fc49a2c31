"""Non-finite input samples (NaN, +Inf, -Inf): finding runs, filling them, filtering around them.

Conventions: arrays are time-major, shape (samples, channels) (1-D is one channel); sample
indices count from the first sample of the array (or of the file, where a function says so);
spans are half-open ``[start, stop)``.

Three policies (``[processing] nonfinite``) use these pieces:

``"fail"``
    A float file holding a non-finite sample is left out and reported.
``"split"``
    Every *run* (a maximal span of samples in which at least one channel is non-finite) is a
    *hole*: the samples on either side are filtered as separate pieces, each with the end
    extension of a segment end (``[processing] edge``) at the hole, and every channel of the
    output is NaN inside the hole (:func:`filter_with_holes`).
``"interpolate"``
    Each channel's own runs of non-finite samples are replaced by the straight line between
    that channel's finite samples just before and just after the run (linear interpolation);
    finite samples are never changed. A run longer than ``max_fill_samples`` or touching the
    first or last sample of the file (no finite neighbour on that side) is refused. The
    neighbour values are taken once, when the file is scanned, and kept in :class:`FillSpan`,
    so a block that sees only part of a run fills it exactly as any other block does
    (:func:`apply_fill`).

This module is pure numpy (plus the block kernel for :func:`filter_with_holes`); no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import numpy as np

from twinpass.core.kernel import block_window, filtfilt_window
from twinpass.errors import InputError

__all__ = [
    "FillSpan",
    "apply_fill",
    "channel_runs",
    "describe_run",
    "fill_problem",
    "fill_runs",
    "fill_spans",
    "filter_with_holes",
    "find_runs",
    "hole_mask",
    "join_channel_runs",
    "merge_runs",
    "pieces",
    "union_runs",
]

Span = tuple[int, int]
ChannelRun = tuple[int, int, int]
"""``(channel, start, stop)``: samples ``[start, stop)`` of one channel are all non-finite."""


@dataclass(frozen=True, slots=True)
class FillSpan:
    """One channel's run of non-finite samples and the finite values that bound it.

    Samples ``[start, stop)`` of ``channel`` (file coordinates) become
    ``left + (right - left) * (i - (start - 1)) / (stop - start + 1)`` for sample ``i``:
    the straight line through ``(start - 1, left)`` and ``(stop, right)``.
    """

    channel: int
    start: int
    stop: int
    left: float
    """Value of sample ``start - 1`` of the channel (finite)."""
    right: float
    """Value of sample ``stop`` of the channel (finite)."""

    def values(self, a: int, b: int) -> np.ndarray:
        """Fill values for samples ``[a, b)`` (clipped to the span), float64, 1-D."""
        a, b = max(a, self.start), min(b, self.stop)
        if b <= a:
            return np.empty(0)
        t = (np.arange(a, b, dtype=np.float64) - (self.start - 1)) / (self.stop - self.start + 1)
        return self.left + (self.right - self.left) * t


def _as_2d(x: np.ndarray) -> np.ndarray:
    a = np.asarray(x)
    return a[:, None] if a.ndim == 1 else a


def merge_runs(runs: Iterable[Span]) -> list[Span]:
    """Sort spans and merge those that overlap or touch; empty spans are dropped."""
    out: list[list[int]] = []
    for a, b in sorted((int(a), int(b)) for a, b in runs if b > a):
        if out and a <= out[-1][1]:
            out[-1][1] = max(out[-1][1], b)
        else:
            out.append([a, b])
    return [(a, b) for a, b in out]


def channel_runs(x: np.ndarray, offset: int = 0) -> list[ChannelRun]:
    """Runs of non-finite samples of each channel.

    Parameters
    ----------
    x : ndarray, shape (samples, channels) or (samples,)
        Float samples (integer arrays have no non-finite values: the result is empty).
    offset : int
        Added to every sample index (the position of ``x[0]`` in the file).

    Returns
    -------
    list of (channel, start, stop)
        Maximal runs, sorted by channel then start.
    """
    a = _as_2d(x)
    if a.dtype.kind not in "fc":
        return []
    finite = np.isfinite(a)
    if finite.all():  # the usual case, and a contiguous reduction far faster than any(axis=0)
        return []
    bad = np.logical_not(finite, out=finite)
    out: list[ChannelRun] = []
    for c in np.flatnonzero(bad.any(axis=0)):
        d = np.diff(np.concatenate(([0], bad[:, c].view(np.int8), [0])))
        starts, stops = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
        out.extend((int(c), int(s) + offset, int(e) + offset) for s, e in zip(starts, stops))
    return out


def join_channel_runs(runs: Iterable[ChannelRun]) -> list[ChannelRun]:
    """Merge runs of the same channel that touch (e.g. found in consecutive chunks)."""
    by_channel: dict[int, list[Span]] = {}
    for c, a, b in runs:
        by_channel.setdefault(int(c), []).append((a, b))
    return [(c, a, b) for c in sorted(by_channel) for a, b in merge_runs(by_channel[c])]


def union_runs(runs: Iterable[ChannelRun]) -> list[Span]:
    """Spans where at least one channel is non-finite, from per-channel runs."""
    return merge_runs((a, b) for _c, a, b in runs)


def find_runs(x: np.ndarray) -> list[Span]:
    """Maximal spans ``[start, stop)`` of samples in which any channel is non-finite.

    Parameters
    ----------
    x : ndarray, shape (samples, channels) or (samples,)

    Returns
    -------
    list of (start, stop)
        Sorted, non-overlapping, non-touching.
    """
    a = _as_2d(x)
    if a.dtype.kind not in "fc" or a.shape[0] == 0:
        return []
    finite = np.isfinite(a)
    if finite.all():
        return []
    bad = (~finite).any(axis=1).view(np.int8)
    d = np.diff(np.concatenate(([0], bad, [0])))
    return [(int(s), int(e)) for s, e in zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1))]


def describe_run(run: ChannelRun) -> str:
    """``"samples 100-149 (50 samples) of channel 0"`` (inclusive sample numbers)."""
    c, a, b = run
    where = f"sample {a}" if b - a == 1 else f"samples {a}-{b - 1} ({b - a} samples)"
    return f"{where} of channel {c}"


def fill_problem(run: ChannelRun, frames: int, max_fill: int) -> str | None:
    """Why a channel run cannot be filled by interpolation, or ``None`` when it can.

    A run can be filled when it has a finite neighbour on both sides (it touches neither
    sample 0 nor sample ``frames - 1``) and is at most ``max_fill`` samples long.
    """
    c, a, b = run
    if a <= 0:
        return f"NaN/Inf at {describe_run(run)} reaches the first sample: there is no finite sample before it"
    if b >= frames:
        return f"NaN/Inf at {describe_run(run)} reaches the last sample: there is no finite sample after it"
    if b - a > max_fill:
        return (
            f"NaN/Inf at {describe_run(run)} is longer than [processing] max_fill_samples = {max_fill}"
        )
    return None


def fill_spans(x: np.ndarray, max_fill: int, within: Sequence[Span] | None = None) -> list[FillSpan]:
    """The fills of the non-finite runs of an in-memory signal.

    Parameters
    ----------
    x : ndarray, shape (samples, channels) or (samples,)
    max_fill : int
        Longest channel run that may be filled, samples.
    within : sequence of (start, stop), optional
        Only channel runs overlapping these spans; all runs when omitted.

    Raises
    ------
    InputError
        A run cannot be filled (see :func:`fill_problem`).
    """
    a = _as_2d(x)
    spans = []
    for run in channel_runs(a):
        c, s, e = run
        if within is not None and not any(s < hi and lo < e for lo, hi in within):
            continue
        why = fill_problem(run, a.shape[0], max_fill)
        if why is not None:
            raise InputError(why)
        spans.append(FillSpan(c, s, e, float(a[s - 1, c]), float(a[e, c])))
    return spans


def fill_runs(x: np.ndarray, runs: Sequence[Span], max_fill: int) -> tuple[np.ndarray, list[Span]]:
    """Fill non-finite samples inside ``runs`` by linear interpolation, per channel.

    Parameters
    ----------
    x : ndarray, shape (samples, channels) or (samples,)
        The whole signal (e.g. one file).
    runs : sequence of (start, stop)
        Spans to fill, as from :func:`find_runs`. Non-finite samples outside them are left.
    max_fill : int
        Longest run of one channel that may be filled, samples.

    Returns
    -------
    x_filled : ndarray, float64, same shape as ``x``
        A copy with each channel's non-finite samples inside ``runs`` replaced by the line
        between its finite neighbours; finite samples unchanged.
    filled_spans : list of (start, stop)
        The spans actually filled: the union over channels of the filled runs (merged,
        sorted).

    Raises
    ------
    InputError
        A channel's run is longer than ``max_fill`` or touches the first or last sample;
        the message names the samples and the channel.
    """
    one_d = np.ndim(x) == 1
    out = np.array(_as_2d(x), dtype=np.float64, copy=True)
    fills = fill_spans(out, max_fill, merge_runs(runs))
    apply_fill(out, 0, fills)
    done = union_runs((f.channel, f.start, f.stop) for f in fills)
    return (out[:, 0] if one_d else out), done


def apply_fill(window: np.ndarray, window_start: int, fills: Iterable[FillSpan]) -> np.ndarray:
    """Fill, in place, the parts of ``fills`` that fall inside a window of a file.

    Parameters
    ----------
    window : ndarray, float, shape (samples, channels)
        Samples ``[window_start, window_start + len(window))`` of one file.
    window_start : int
        File sample index of ``window[0]``.
    fills : iterable of FillSpan
        The file's fills (file coordinates), as found when the file was scanned.

    Returns
    -------
    ndarray
        ``window`` itself. Every fill value depends only on the :class:`FillSpan`, so any
        window over the same samples gets the same values.
    """
    w = _as_2d(window)
    a, b = int(window_start), int(window_start) + w.shape[0]
    for f in fills:
        lo, hi = max(a, f.start), min(b, f.stop)
        if hi > lo:
            w[lo - a : hi - a, f.channel] = f.values(lo, hi)
    return window


# -- holes ("split") ----------------------------------------------------------


def pieces(frames: int, holes: Iterable[Span]) -> list[Span]:
    """The spans of ``[0, frames)`` outside ``holes`` (sorted, non-empty)."""
    out, pos = [], 0
    for a, b in merge_runs(holes):
        a, b = max(0, a), min(frames, b)
        if a > pos:
            out.append((pos, a))
        pos = max(pos, b)
    if pos < frames:
        out.append((pos, frames))
    return out


def hole_mask(start: int, stop: int, holes: Iterable[Span]) -> np.ndarray:
    """Boolean mask over samples ``[start, stop)``: True inside a hole."""
    m = np.zeros(stop - start, dtype=bool)
    for a, b in holes:
        lo, hi = max(a, start), min(b, stop)
        if hi > lo:
            m[lo - start : hi - start] = True
    return m


def filter_with_holes(
    read: Callable[[int, int], np.ndarray],
    start: int,
    stop: int,
    segment_frames: int,
    holes: Sequence[Span],
    *,
    halo: int,
    edge: str,
    edge_samples: int,
    channels: int,
    sos: np.ndarray | None = None,
    taps: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Two-pass output of samples ``[start, stop)`` of a segment whose holes are cut out.

    Each piece between holes is filtered as if it were a segment of its own: blocks read a
    halo inside the piece only, and a piece end (at a hole or at the segment end) gets the
    end extension ``edge`` of ``min(edge_samples, piece length - 1)`` samples. So the result
    equals ``scipy.signal.sosfiltfilt`` (or ``filtfilt``) run on each piece separately with
    ``padtype=edge, padlen=min(edge_samples, len(piece) - 1)``, to within the blockwise
    tolerance.

    Parameters
    ----------
    read : callable
        ``read(a, b)`` returns segment samples ``[a, b)`` as float64 (samples, channels).
    start, stop : int
        Span wanted, segment samples, ``0 <= start < stop <= segment_frames``.
    segment_frames : int
        Samples in the segment.
    holes : sequence of (start, stop)
        Excluded spans, segment samples.
    halo : int
        Halo per side, samples.
    edge : {"odd", "even", "constant", "none"}
    edge_samples : int
        End extension length resolved for the whole segment (capped per piece here).
    channels : int
    sos, taps : ndarray
        The per-pass filter (exactly one).

    Returns
    -------
    x : ndarray, float64, shape (stop - start, channels)
        The input over ``[start, stop)``, NaN in holes.
    y : ndarray, float64, same shape
        The output, NaN in holes.
    window_samples : int
        Samples read (all pieces).
    """
    x = np.full((stop - start, channels), np.nan)
    y = np.full((stop - start, channels), np.nan)
    read_total = 0
    for pa, pb in pieces(segment_frames, holes):
        lo, hi = max(start, pa), min(stop, pb)
        if hi <= lo:
            continue
        m = pb - pa
        es = 0 if edge == "none" else min(int(edge_samples), m - 1)
        ws, we, at_s, at_e = block_window(lo - pa, hi - pa, m, halo, es)
        w = read(pa + ws, pa + we)
        read_total += we - ws
        y[lo - start : hi - start] = filtfilt_window(
            w, sos=sos, taps=taps, core_start=lo - pa - ws, core_stop=hi - pa - ws,
            at_start=at_s, at_end=at_e, edge=edge, edge_samples=es,
        )
        x[lo - start : hi - start] = w[lo - pa - ws : hi - pa - ws]
    return x, y, read_total
