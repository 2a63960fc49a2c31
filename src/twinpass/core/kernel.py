"""Two-pass (forward then backward) filtering of one block on a haloed window.

Conventions: arrays are time-major, shape (samples, channels); lengths are in samples.
A *segment* is a gap-free run of samples filtered as if it were one signal; a *block* is
a span ``[start, stop)`` of it, read with a halo of extra samples on each side (clipped to
the segment). At the segment's ends the signal is extended the way
``scipy.signal.sosfiltfilt`` / ``scipy.signal.filtfilt`` extend it (``padtype``, ``padlen``),
so a window that covers the whole segment reproduces those functions to rounding.

IIR arithmetic runs time-major in float64 through :func:`twinpass.core.loops.sos_cascade`
(the same operations as ``scipy.signal.sosfilt``, bit for bit, without transposing the
window); the backward pass runs in place from the last sample. FIR arithmetic runs
channel-major (channels, samples), as ``scipy.signal.lfilter`` does after moving the time
axis last.
"""

from __future__ import annotations

from functools import lru_cache
import numpy as np
from scipy import signal

from twinpass.core.loops import sos_cascade
from twinpass.core.types import EDGE_MODES
from twinpass.errors import KernelError

__all__ = [
    "extend",
    "filtfilt_window",
    "block_window",
    "block_reach",
    "resolve_edge_samples",
    "autocorrelation",
    "unit_steady_state",
]

_LFILTER_MAX_WORK = 10_000_000
"""Above this many (samples x taps) an FIR pass uses FFT convolution instead of lfilter."""


def _check_edge(edge: str) -> None:
    if edge not in EDGE_MODES:
        raise KernelError(
            f"unknown end extension {edge!r}; use one of {', '.join(EDGE_MODES)}."
        )


def extend(x: np.ndarray, n: int, mode: str) -> np.ndarray:
    """Extend ``x`` by ``n`` samples at both ends of axis 0.

    Same values as ``scipy.signal.sosfiltfilt``'s ``padtype`` extensions:

    * ``"odd"``: point reflection about the end sample, ``2*x[0] - x[n:0:-1]`` in front and
      ``2*x[-1] - x[-2:-(n+2):-1]`` behind;
    * ``"even"``: mirror without repeating the end sample, ``x[n:0:-1]`` / ``x[-2:-(n+2):-1]``;
    * ``"constant"``: the end sample repeated ``n`` times;
    * ``"none"``: no extension (``n`` is ignored).

    The values are computed in float64, so ``2*x[0] - x[k]`` cannot overflow an integer
    dtype: exact for integer input up to 2**51 in magnitude (int16, int32 samples) and for
    float32 input; float64 input rounds as ``scipy.signal.sosfiltfilt`` does.

    Parameters
    ----------
    x : array_like of real numbers, shape (samples, ...)
        Time-major signal.
    n : int
        Samples added at each end. ``"odd"`` and ``"even"`` need ``n <= samples - 1``.
    mode : {"odd", "even", "constant", "none"}
        End extension.

    Returns
    -------
    ndarray of float64, shape (samples + 2 n, ...)
        The extended signal (``x`` itself when it is float64 and nothing is added).

    Raises
    ------
    KernelError
        Unknown mode, negative ``n``, or ``n`` too large for a reflection.
    """
    _check_edge(mode)
    n = int(n)
    if n < 0:
        raise KernelError(f"extension length must be >= 0 samples; got {n}.")
    x = np.asarray(x, dtype=np.float64)
    if mode == "none" or n == 0:
        return x
    length = x.shape[0]
    if mode in ("odd", "even") and n > length - 1:
        raise KernelError(
            f"a {mode} extension of {n} samples needs at least {n + 1} samples; "
            f"got {length}. Use fewer edge samples or a longer segment."
        )
    if mode == "constant":
        if length < 1:
            raise KernelError("a constant extension needs at least 1 sample; got an empty signal.")
        ones = np.ones((n,) + (1,) * (x.ndim - 1), dtype=x.dtype)
        left, right = ones * x[:1], ones * x[-1:]
    else:
        left, right = x[n:0:-1], x[-2 : -(n + 2) : -1]
        if mode == "odd":
            left, right = 2 * x[:1] - left, 2 * x[-1:] - right
    return np.concatenate((left, x, right), axis=0)


def resolve_edge_samples(
    edge_samples: int | str, effective_length: int, segment_length: int, *, edge: str = "odd"
) -> int:
    """Number of samples the end extension adds at each segment end.

    Parameters
    ----------
    edge_samples : int or "auto"
        ``"auto"`` uses the filter's effective length; an int is used as given.
    effective_length : int
        The filter's effective length (samples).
    segment_length : int
        Samples in the segment.
    edge : {"odd", "even", "constant", "none"}
        End extension; ``"none"`` always gives 0.

    Returns
    -------
    int
        The extension length, capped at ``segment_length - 1`` because the extension is
        built from the samples next to the end (and ``scipy.signal.sosfiltfilt`` needs
        ``padlen < len(x)``).

    Raises
    ------
    KernelError
        Negative or non-integer values, or an unknown ``edge``.
    """
    _check_edge(edge)
    if int(segment_length) < 1:
        raise KernelError(f"segment length must be >= 1 sample; got {segment_length}.")
    if edge == "none":
        return 0
    if isinstance(edge_samples, str):
        if edge_samples != "auto":
            raise KernelError(
                f"edge samples must be 'auto' or a number of samples; got {edge_samples!r}."
            )
        n = int(effective_length)
    elif isinstance(edge_samples, (int, np.integer)) and not isinstance(edge_samples, bool):
        n = int(edge_samples)
    else:
        raise KernelError(
            f"edge samples must be 'auto' or a number of samples; got {edge_samples!r}."
        )
    if n < 0:
        raise KernelError(f"edge samples must be >= 0; got {n}.")
    return min(n, int(segment_length) - 1)


def block_window(
    start: int, stop: int, segment_length: int, halo: int, edge_samples: int
) -> tuple[int, int, bool, bool]:
    """The window of a segment to read for the block core ``[start, stop)``.

    The window is the core plus ``halo`` samples on each side, clipped to
    ``[0, segment_length)``. When it touches a segment end it is widened, if needed, to hold
    at least ``edge_samples + 1`` samples from that end, since the end extension reflects
    the ``edge_samples`` samples next to the end sample.

    Parameters
    ----------
    start, stop : int
        Block core, sample indices within the segment, ``0 <= start < stop <= segment_length``.
    segment_length : int
        Samples in the segment.
    halo : int
        Samples per side (the filter's effective length; 0 for none).
    edge_samples : int
        Resolved extension length (see :func:`resolve_edge_samples`), ``< segment_length``.

    Returns
    -------
    win_start, win_stop : int
        Window ``[win_start, win_stop)`` within the segment.
    at_start, at_end : bool
        Whether the window begins at the segment's first sample / ends at its last.
        Pass them, with ``core_start = start - win_start`` and
        ``core_stop = stop - win_start``, to :func:`filtfilt_window`.
    """
    start, stop, segment_length = int(start), int(stop), int(segment_length)
    halo, edge_samples = int(halo), int(edge_samples)
    if not 0 <= start < stop <= segment_length:
        raise KernelError(
            f"block [{start}, {stop}) does not lie within a segment of {segment_length} samples; "
            "blocks must be non-empty and inside their segment."
        )
    if halo < 0:
        raise KernelError(f"halo must be >= 0 samples; got {halo}.")
    if not 0 <= edge_samples < segment_length:
        raise KernelError(
            f"edge samples ({edge_samples}) must be >= 0 and below the segment length "
            f"({segment_length}); resolve them with resolve_edge_samples."
        )
    win_start = max(0, start - halo)
    win_stop = min(segment_length, stop + halo)
    if win_start == 0:
        win_stop = max(win_stop, edge_samples + 1)
    if win_stop == segment_length:
        win_start = min(win_start, segment_length - edge_samples - 1)
    return win_start, win_stop, win_start == 0, win_stop == segment_length


_AUTOCORRELATION_CACHE_MAX_TAPS = 1 << 16
"""Longer responses (e.g. long IIR impulse responses for plots) are not cached."""


def block_reach(start: int, stop: int, segment_frames: int, halo: int, seam_samples: int,
                edge_samples: int) -> tuple[int, int, int, int, bool, bool]:
    """Samples a block computes and reads, in segment samples.

    Parameters
    ----------
    start, stop : int
        The block core [start, stop).
    segment_frames : int
        Samples in the segment.
    halo : int
        Halo per side (samples).
    seam_samples : int
        Outputs computed beyond each core edge for the seam check.
    edge_samples : int
        Resolved end-extension length (samples).

    Returns
    -------
    xs, xe : int
        Outputs computed: the core plus up to ``seam_samples`` on each side.
    ws, we : int
        Input window read (see :func:`block_window`).
    at_start, at_end : bool
        The window touches the segment's first / last sample.
    """
    xs, xe = max(0, start - seam_samples), min(segment_frames, stop + seam_samples)
    ws, we, at_start, at_end = block_window(xs, xe, segment_frames, halo, edge_samples)
    return xs, xe, ws, we, at_start, at_end


def _autocorrelation_of(h: np.ndarray) -> np.ndarray:
    g = signal.fftconvolve(h, h[::-1]) if h.size > 512 else np.convolve(h, h[::-1])
    g.setflags(write=False)
    return g


@lru_cache(maxsize=16)
def _autocorrelation_cached(taps_bytes: bytes) -> np.ndarray:
    return _autocorrelation_of(np.frombuffer(taps_bytes, dtype=np.float64).copy())


def autocorrelation(taps: np.ndarray) -> np.ndarray:
    """``conv(h, h[::-1])``, shape (2M - 1,): the two-pass FIR as one zero-phase filter.

    Its frequency response is ``|H|^2``; index ``M - 1`` is lag 0. Read-only (cached for up
    to 65536 taps).
    """
    h = np.ascontiguousarray(np.asarray(taps, dtype=np.float64))
    if h.size > _AUTOCORRELATION_CACHE_MAX_TAPS:
        return _autocorrelation_of(h)
    return _autocorrelation_cached(h.tobytes())


@lru_cache(maxsize=32)
def _unit_steady_state_cached(coeff_bytes: bytes, is_fir: bool) -> np.ndarray:
    coeffs = np.frombuffer(coeff_bytes, dtype=np.float64)
    if is_fir:
        # lfilter_zi(b, [1.0]) in closed form (it solves an (M-1)-square system): in the
        # transposed direct form after a unit step, delay i holds b[i+1] + ... + b[M-1].
        zi = np.cumsum(coeffs[:0:-1])[::-1].copy()
    else:
        zi = signal.sosfilt_zi(coeffs.reshape(-1, 6).copy())
    zi.setflags(write=False)
    return zi


def unit_steady_state(*, sos: np.ndarray | None = None, taps: np.ndarray | None = None) -> np.ndarray:
    """Filter state after an endless unit input (read-only, cached per coefficients).

    ``scipy.signal.sosfilt_zi(sos)``, shape (n_sections, 2), or
    ``scipy.signal.lfilter_zi(taps, [1.0])``, shape (M - 1,). Scaled by a sample value it is
    the steady-state initial condition used by ``sosfiltfilt`` / ``filtfilt``.
    """
    if (sos is None) == (taps is None):
        raise KernelError("give exactly one of 'sos' (IIR) and 'taps' (FIR).")
    coeffs = np.ascontiguousarray(np.asarray(sos if taps is None else taps, dtype=np.float64))
    return _unit_steady_state_cached(coeffs.tobytes(), taps is not None)


def _as_time_major(window: np.ndarray) -> np.ndarray:
    """The window as a C-contiguous float64 (samples, channels) array (no copy if it is one)."""
    w = np.asarray(window)
    if w.ndim == 1:
        w = w[:, None]
    if w.ndim != 2:
        raise KernelError(
            f"a window must be (samples, channels) or (samples,); got shape {w.shape}."
        )
    if not (np.issubdtype(w.dtype, np.integer) or np.issubdtype(w.dtype, np.floating)):
        raise KernelError(f"window samples must be integers or floats; got dtype {w.dtype}.")
    return np.ascontiguousarray(w, dtype=np.float64)


def _extend_ends(x: np.ndarray, n_left: int, n_right: int, edge: str) -> np.ndarray:
    """Extend a time-major array, each end independently, like :func:`extend`."""
    if n_left == 0 and n_right == 0:
        return x
    parts = []
    if n_left:
        parts.append(extend(x[: n_left + 1], n_left, edge)[:n_left])
    parts.append(x)
    if n_right:
        parts.append(extend(x[-(n_right + 1) :], n_right, edge)[-n_right:])
    return np.concatenate(parts, axis=0)


def _sos_two_pass(
    sos: np.ndarray, x: np.ndarray, n_left: int, n_right: int, edge: str, out_start: int, out_stop: int
) -> np.ndarray:
    """Literal two-pass of time-major ``x`` with sections ``sos``, as ``sosfiltfilt`` does it.

    Same arguments and result as :func:`_fir_two_pass` (outputs ``[out_start, out_stop)`` of
    ``x``), time-major: the forward pass writes a new array and the backward pass runs in
    place over it from the last sample down to the first requested output.
    """
    zi_unit = unit_steady_state(sos=sos)[:, :, None]  # (sections, 2, 1)
    ext = _extend_ends(x, n_left, n_right, edge)
    y = sos_cascade(sos, ext, zi_unit * ext[0])
    lo = n_left + out_start
    back = y[lo:]
    sos_cascade(sos, back, zi_unit * y[-1], back, reverse=True)
    return y[lo : n_left + out_stop]


def _fir_pass(taps: np.ndarray, x: np.ndarray, zi_unit: np.ndarray, first: np.ndarray) -> np.ndarray:
    """One ``lfilter(taps, [1.0])`` pass along axis -1 with state ``zi_unit * first``.

    For long inputs and many taps the same result is computed as a truncated FFT convolution
    plus the initial state (an FIR's state ``z`` adds ``z[k]`` to output ``k``).
    """
    zi = zi_unit[None, :] * first[:, None]  # (channels, taps - 1)
    if x.shape[1] * taps.size <= _LFILTER_MAX_WORK:
        y, _ = signal.lfilter(taps, [1.0], x, axis=-1, zi=zi)
        return y
    y = signal.oaconvolve(x, taps[None, :], axes=-1)[:, : x.shape[1]]
    k = min(zi.shape[1], y.shape[1])
    y[:, :k] += zi[:, :k]
    return y


def _fir_two_pass(
    taps: np.ndarray,
    x: np.ndarray,
    n_left: int,
    n_right: int,
    edge: str,
    out_start: int,
    out_stop: int,
) -> np.ndarray:
    """Literal two-pass FIR on (channels, samples) ``x`` as ``filtfilt`` does it.

    ``n_left``/``n_right`` samples of extension are added at the respective end (0: that
    end is an interior cut and the steady-state initial condition stands in for the
    missing history). Returns output samples ``[out_start, out_stop)`` of ``x``.
    """
    zi_unit = unit_steady_state(taps=taps)
    ext = _extend_ends(x.T, n_left, n_right, edge).T  # channel-major view
    y_f = _fir_pass(taps, ext, zi_unit, ext[:, 0])
    # The backward pass only needs to reach the first requested output sample.
    rev = y_f[:, : n_left + out_start - 1 : -1] if n_left + out_start > 0 else y_f[:, ::-1]
    y_b = _fir_pass(taps, np.ascontiguousarray(rev), zi_unit, y_f[:, -1])
    y = y_b[:, ::-1]  # now y[:, 0] is output sample out_start of x
    return y[:, : out_stop - out_start]


def filtfilt_window(
    window: np.ndarray,
    *,
    sos: np.ndarray | None = None,
    taps: np.ndarray | None = None,
    core_start: int,
    core_stop: int,
    at_start: bool,
    at_end: bool,
    edge: str = "odd",
    edge_samples: int,
) -> np.ndarray:
    """Two-pass (forward then backward) result for a block core from its haloed window.

    Parameters
    ----------
    window : ndarray, shape (samples, channels) or (samples,)
        Samples ``[win_start, win_stop)`` of one segment (see :func:`block_window`), any
        integer or float dtype; the arithmetic is float64.
    sos : ndarray, shape (n_sections, 6), optional
        IIR filter as second-order sections.
    taps : ndarray, shape (M,), optional
        FIR filter. Exactly one of ``sos`` and ``taps`` is given.
    core_start, core_stop : int
        The block's own span within the window (window indices).
    at_start, at_end : bool
        The window begins at the segment's first sample / ends at its last.
    edge : {"odd", "even", "constant", "none"}
        End extension at segment ends (``"none"`` is ``padtype=None``).
    edge_samples : int
        Extension length at segment ends (ignored for ``"none"``); the window needs at
        least ``edge_samples + 1`` samples.

    Returns
    -------
    ndarray, float64, shape (core_stop - core_start, channels) or (core_stop - core_start,)
        The two-pass output of the core (1-D when ``window`` is 1-D).

    Notes
    -----
    At a segment end the signal is extended as ``scipy.signal.sosfiltfilt(sos, x, axis=0,
    padtype=edge, padlen=edge_samples)`` (FIR: ``scipy.signal.filtfilt(taps, [1.0], ...)``)
    does, with the forward state ``zi * ext[0]`` and the backward state ``zi * y_f[-1]``
    (``zi`` from ``sosfilt_zi``/``lfilter_zi``, the steady state for a unit step). At an
    interior cut the same steady-state states are scaled by the first window sample
    (forward) and the last forward output (backward); the halo makes their error fade
    below the tolerance (see :func:`twinpass.core.effective.effective_length`). A window
    touching both ends reproduces ``sosfiltfilt``/``filtfilt`` to rounding.

    With ``taps`` the interior is exact: one convolution with the autocorrelation
    ``conv(h, h[::-1])`` (needs a halo of ``M - 1`` per side); within ``M - 1`` samples of a
    segment end the literal two-pass procedure is used. With a shorter halo the FIR falls
    back to the steady-state two-pass like an IIR filter.
    """
    if (sos is None) == (taps is None):
        raise KernelError("give exactly one of 'sos' (IIR) and 'taps' (FIR) to filtfilt_window.")
    _check_edge(edge)
    one_d = np.ndim(window) == 1
    x = _as_time_major(window)
    length = x.shape[0]
    core_start, core_stop = int(core_start), int(core_stop)
    if not 0 <= core_start < core_stop <= length:
        raise KernelError(
            f"core [{core_start}, {core_stop}) must be a non-empty span inside the window of "
            f"{length} samples; compute the window with block_window."
        )
    n = 0 if edge == "none" else int(edge_samples)
    if n < 0:
        raise KernelError(f"edge samples must be >= 0; got {n}.")
    if (at_start or at_end) and n > 0 and length < n + 1:
        raise KernelError(
            f"the window has {length} samples but the {edge} extension of {n} edge samples "
            f"needs at least {n + 1} at a segment end; widen the window with block_window, "
            "or lower the edge samples below the segment length (resolve_edge_samples)."
        )
    n_left = n if at_start else 0
    n_right = n if at_end else 0

    if sos is not None:
        coeffs = np.asarray(sos, dtype=np.float64)
        if coeffs.ndim != 2 or coeffs.shape[1] != 6:
            raise KernelError(f"sos must have shape (n_sections, 6); got {coeffs.shape}.")
        out = _sos_two_pass(coeffs, x, n_left, n_right, edge, core_start, core_stop)
    else:
        h = np.asarray(taps, dtype=np.float64)
        if h.ndim != 1 or h.size < 1:
            raise KernelError(f"taps must be a non-empty 1-D array; got shape {h.shape}.")
        y = _fir_core(h, np.ascontiguousarray(x.T), core_start, core_stop, at_start, at_end,
                      n_left, n_right, edge)
        out = np.ascontiguousarray(y.T)
    return out[:, 0] if one_d else out


def _fir_core(
    h: np.ndarray,
    x: np.ndarray,
    core_start: int,
    core_stop: int,
    at_start: bool,
    at_end: bool,
    n_left: int,
    n_right: int,
    edge: str,
) -> np.ndarray:
    """Two-pass FIR for the core of a (channels, samples) window.

    Output ``p`` of the two passes is the pure convolution with the autocorrelation when
    ``p - (M-1)`` and ``p + (M-1)`` lie inside the window: the extension and the initial
    states only reach the first and last ``M - 1`` outputs of an extended end. Cores
    closer than that to a segment end get the literal two-pass on a piece long enough
    (``>= 2(M-1)`` and ``>= edge_samples + 1``) that its far-side initial state cannot reach them.
    """
    m1 = h.size - 1
    length = x.shape[1]
    left_ok = at_start or core_start >= m1
    right_ok = at_end or core_stop <= length - m1
    piece = max(2 * m1, n_left + 1, n_right + 1)
    ends = int(at_start) + int(at_end)
    if not (left_ok and right_ok) or (ends and length <= ends * piece):
        # Short halo, or a window at a segment end too short to split: the literal
        # procedure on the whole window.
        return _fir_two_pass(h, x, n_left, n_right, edge, core_start, core_stop)

    parts = []
    lo, hi = core_start, core_stop
    if at_start and lo < m1:
        stop = min(hi, m1)
        parts.append(_fir_two_pass(h, x[:, :piece], n_left, 0, edge, lo, stop))
        lo = stop
    tail = None
    if at_end and hi > length - m1 and hi > lo:
        start = max(lo, length - m1)
        off = length - piece
        tail = _fir_two_pass(h, x[:, off:], 0, n_right, edge, start - off, hi - off)
        hi = start
    if hi > lo:
        g = autocorrelation(h)
        parts.append(signal.oaconvolve(x[:, lo - m1 : hi + m1], g[None, :], mode="valid", axes=-1))
    if tail is not None:
        parts.append(tail)
    return np.concatenate(parts, axis=1)
