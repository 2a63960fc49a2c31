"""Compiled inner loops of the block pipeline, each with a plain numpy/scipy equivalent.

A few loops dominate the cost of a block after reading: the cascade of second-order
sections run twice over the window, the integrity statistics of input and output, the
decoding of packed 24-bit samples, and the preparation and summing of the Welch segments
of the response check. Written with numpy they sweep a time-major
(samples, channels) array several times and transpose it (``scipy.signal.sosfilt`` moves
the time axis last and works one channel at a time, so each sample's state update waits
for the previous one). The compiled versions (numba) make one pass in the arrays' own
layout and run eight (or four) channels side by side as vector instructions, and two
sections at a time (the second one row behind the first), which hides the latency of the
recursion.

Exactness. :func:`sos_cascade` performs, per section and sample, the same operations in
the same order as ``scipy.signal.sosfilt`` (transposed direct form II), so both give
bit-identical outputs and final states; the tests hold them to equality. The numpy
fallback is used when numba cannot be imported or ``TWINPASS_JIT=0`` is set.

Conventions: arrays are time-major, shape (samples, channels), float64; a cascade state
has shape (n_sections, 2, channels), as ``sosfilt(..., axis=0, zi=...)`` takes it.
"""

from __future__ import annotations

import os
import threading
import warnings
from typing import Any, Callable

import numpy as np
from scipy import signal

__all__ = ["jit_enabled", "sos_cascade", "channel_stats", "chunked_stats", "int24_to_float", "segment_rows",
           "spectra_sums"]

# ----------------------------------------------------------------------------- numpy


def _cascade_numpy(sos: np.ndarray, x: np.ndarray, z: np.ndarray, out: np.ndarray, reverse: bool) -> None:
    if reverse:
        y, zf = signal.sosfilt(sos, x[::-1], axis=0, zi=z)
        out[::-1] = y
    else:
        y, zf = signal.sosfilt(sos, x, axis=0, zi=z)
        out[...] = y
    z[...] = zf


def _stats_numpy(a: np.ndarray, chunk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    finite = np.isfinite(a)
    bad = np.count_nonzero(~finite, axis=0).astype(np.float64)
    clean = np.where(finite, a, 0.0)
    if chunk > 0 and a.shape[0]:
        runs = np.add.reduceat(clean, np.arange(0, a.shape[0], chunk), axis=0)
    else:
        runs = np.zeros((0, a.shape[1]))
    return bad, np.sum(clean * clean, axis=0), np.max(np.abs(clean), axis=0, initial=0.0), runs


def _int24_numpy(raw: np.ndarray, scale: float, big_endian: bool, out: np.ndarray | None = None) -> np.ndarray:
    b = raw.reshape(-1, 3)
    if big_endian:
        b = b[:, ::-1]
    wide = np.zeros((b.shape[0], 4), dtype=np.uint8)
    wide[:, 1:] = b  # little-endian int32 holding value << 8
    v = wide.view("<i4").reshape(-1)
    v >>= 8  # arithmetic shift restores the sign
    if out is None:
        out = np.empty(v.shape[0])
    np.multiply(v, scale, out=out)
    return out


def _segment_rows_numpy(v: np.ndarray, start: int, window: np.ndarray, out: np.ndarray, trend: int) -> None:
    rows = np.array(v[start : start + window.shape[0]].T, dtype=np.float64, order="C")
    n = rows.shape[1]
    u = np.arange(n) - 0.5 * (n - 1)
    if trend == 1 and n > 1:  # least-squares line about the segment's centre, one channel at a time
        rows -= (rows @ u)[:, None] / (n * (n * n - 1.0) / 12.0) * u
    weights = window.astype(np.float64)
    w0, w1, w2 = weights.sum(), weights @ u, weights @ (u * u)
    det = w0 * w2 - w1 * w1
    if trend == 2 and n > 1 and det > 0.0:  # the least-squares line weighted by the window
        s0, s1 = rows @ weights, rows @ (weights * u)
        rows -= ((w2 * s0 - w1 * s1) / det)[:, None] + ((w0 * s1 - w1 * s0) / det)[:, None] * u
    else:
        rows -= rows.mean(axis=1, keepdims=True)  # the same sums whatever the channels around it
    rows *= window
    out[...] = rows


def _spectra_sums_numpy(cx: np.ndarray, sy: np.ndarray, sxx: np.ndarray, syy: np.ndarray,
                        sxy: np.ndarray, qxx: np.ndarray, qyy: np.ndarray) -> None:
    a, b = cx.astype(np.complex128), sy.astype(np.complex128)
    px, py = a.real**2 + a.imag**2, b.real**2 + b.imag**2
    sxx += px
    syy += py
    sxy += a * b
    if qxx.size:
        qxx += px**2
        qyy += py**2


# ----------------------------------------------------------------------------- compiled

_impl: dict[str, Callable[..., Any]] = {}
_impl_lock = threading.Lock()


def _loop(name: str) -> Callable[..., Any]:
    """The compiled loop ``name`` (numba imported on first use), else the numpy one."""
    try:
        return _impl[name]
    except KeyError:
        pass
    with _impl_lock:
        if not _impl:
            fallback = {"cascade": _cascade_numpy, "stats": _stats_numpy, "int24": _int24_numpy,
                        "segment_rows": _segment_rows_numpy, "spectra_sums": _spectra_sums_numpy}
            jit = _load_jit()
            if jit is not None:
                fallback.update(stats=jit._stats_jit, int24=jit._int24_jit,
                                segment_rows=jit._segment_rows_jit, spectra_sums=jit._spectra_sums_jit)
                cascade = jit.compile_cascade()
                if _cascade_agrees(cascade):
                    fallback["cascade"] = cascade
                else:  # a miscompiled cascade must never filter data
                    warnings.warn("twinpass: the compiled filter loop disagrees with scipy.signal.sosfilt on "
                                  "this machine; using scipy's (slower). Please report numba's and LLVM's "
                                  "versions.", RuntimeWarning, stacklevel=2)
            _impl.update(fallback)
    return _impl[name]


def _cascade_agrees(cascade: Callable[..., Any]) -> bool:
    """Whether ``cascade`` reproduces :func:`_cascade_numpy` (scipy's sosfilt) bit for bit.

    Checked once per process before first use, on a 3-section band-pass over channel counts
    that exercise every lane width (1, 4, 8 and mixes), forward and backward, in place.
    """
    sos = signal.butter(3, (0.02, 0.3), "bandpass", output="sos")
    rng = np.random.default_rng(20261202)
    for channels in (1, 3, 4, 8, 13):
        x = rng.standard_normal((2 * 2048 + 37, channels))
        zi = rng.standard_normal((sos.shape[0], 2, channels))
        for reverse in (False, True):
            want, want_z = np.empty_like(x), zi.copy()
            _cascade_numpy(sos, x, want_z, want, reverse)
            got, got_z = x.copy(), zi.copy()
            cascade(sos, got, got_z, got, reverse)
            if not (np.array_equal(got, want) and np.array_equal(got_z, want_z)):
                return False
    return True


def jit_requested() -> bool:
    """Whether the compiled loops are wanted (``TWINPASS_JIT`` unset or not 0/false/no/off)."""
    return os.environ.get("TWINPASS_JIT", "1").strip().lower() not in ("0", "false", "no", "off")


def _load_jit() -> Any:
    if not jit_requested():
        return None
    try:
        from twinpass.core import _loops_jit
    except Exception:  # numba missing or broken for this interpreter: numpy it is
        return None
    return _loops_jit


def jit_enabled() -> bool:
    """Whether the compiled loops are in use (numba importable and ``TWINPASS_JIT`` not 0)."""
    return _loop("cascade") is not _cascade_numpy


# ----------------------------------------------------------------------------- public


def sos_cascade(sos: np.ndarray, x: np.ndarray, state: np.ndarray, out: np.ndarray | None = None,
                *, reverse: bool = False) -> np.ndarray:
    """Filter ``x`` along time with second-order sections from ``state``; update ``state``.

    Parameters
    ----------
    sos : ndarray, float64, shape (n_sections, 6)
        Sections ``[b0, b1, b2, a0, a1, a2]`` with ``a0 == 1`` (as ``scipy.signal`` designs them).
    x : ndarray, float64, shape (samples, channels)
        Time-major input.
    state : ndarray, float64, shape (n_sections, 2, channels)
        Initial state, overwritten with the final state.
    out : ndarray, float64, shape of ``x``, optional
        Where to write the output; may be ``x`` itself (in place). New array if None.
    reverse : bool
        Run from the last sample to the first (the backward pass of a two-pass filter
        without reversing copies): ``out[::-1]`` is then the forward filtering of ``x[::-1]``.

    Returns
    -------
    ndarray
        ``out``. Forward it equals ``scipy.signal.sosfilt(sos, x, axis=0, zi=state)[0]``
        bit for bit, and ``state`` its final state.
    """
    if out is None:
        out = np.empty_like(x)
    if not x.shape[0]:
        return out
    arrays = [np.ascontiguousarray(a, dtype=np.float64) for a in (sos, x, state, out)]
    if arrays[1] is not x and np.shares_memory(x, out):
        arrays[3] = arrays[1]  # in place on a copy of a strided array
    _loop("cascade")(*arrays, bool(reverse))
    for given, used in ((state, arrays[2]), (out, arrays[3])):
        if used is not given:
            given[...] = used
    return out


def channel_stats(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per channel of a time-major (samples, channels) float64 array, in one pass.

    Returns
    -------
    nonfinite : ndarray, float64, shape (channels,)
        Count of NaN and infinite samples.
    sum_squares : ndarray, float64
        Sum of the squares of the finite samples.
    peak : ndarray, float64
        Largest magnitude among the finite samples (0 when there is none).
    """
    return _loop("stats")(np.ascontiguousarray(a, dtype=np.float64), 0)[:3]


def chunked_stats(a: np.ndarray, chunk: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`channel_stats` and, in the same pass, the sums of the finite samples over runs of
    ``chunk`` rows: ``(nonfinite, sum_squares, peak, runs)``, ``runs`` of shape
    (ceil(samples / chunk), channels), the last run holding the rows left over."""
    if chunk < 1:
        raise ValueError(f"chunk must be at least one row, not {chunk}")
    bad, ss, peak, runs = _loop("stats")(np.ascontiguousarray(a, dtype=np.float64), int(chunk))
    return bad, ss, peak, runs


def int24_to_float(raw: np.ndarray, scale: float, *, big_endian: bool = False) -> np.ndarray:
    """Packed 24-bit two's-complement samples (``uint8`` bytes) times ``scale``, as float64.

    Parameters
    ----------
    raw : ndarray of uint8, shape (3 n,)
        Interleaved sample bytes.
    scale : float
        Factor applied to each integer value (e.g. ``2**-23`` for full-scale units).
    big_endian : bool
        Byte order of each sample (WAV is little-endian).

    Returns
    -------
    ndarray, float64, shape (n,)
    """
    raw = np.ascontiguousarray(raw, dtype=np.uint8).reshape(-1)
    out = np.empty(raw.shape[0] // 3)
    return _loop("int24")(raw, float(scale), bool(big_endian), out)


def segment_rows(v: np.ndarray, start: int, window: np.ndarray, out: np.ndarray, *,
                 linear: bool = False, weighted: bool = False) -> np.ndarray:
    """One Welch segment of time-major ``v``, detrended and windowed, channel-major in ``out``.

    Parameters
    ----------
    v : ndarray, float64, shape (samples, channels)
        Time-major signal.
    start : int
        First sample of the segment.
    window : ndarray, shape (n,)
        Window samples, in the type of ``out``.
    out : ndarray, float32 or float64, shape (channels, n), C-contiguous
        Receives ``(v[start + i, c] - mean_c) * window[i]`` at ``[c, i]``, where ``mean_c``
        is the segment's mean (computed in float64): scipy's constant detrend.
    linear : bool
        Remove the segment's least-squares line instead of its mean (scipy's linear
        detrend): ``v - mean_c - slope_c * (i - (n - 1) / 2)`` with
        ``slope_c = sum((i - (n - 1) / 2) v) / sum((i - (n - 1) / 2)^2)``.
    weighted : bool
        Remove the segment's least-squares line weighted by ``window`` instead (the line
        ``a_c + b_c (i - (n - 1) / 2)`` minimising ``sum(window[i] (v - line)^2)``): an
        offset or ramp is removed exactly, and the line is not pulled by the segment's
        ends, where the window is small. Takes precedence over ``linear``.

    Returns
    -------
    ndarray
        ``out``.
    """
    if start < 0 or start + window.shape[0] > v.shape[0]:
        raise ValueError(f"segment [{start}, {start + window.shape[0]}) outside the {v.shape[0]} samples")
    _loop("segment_rows")(v, int(start), window, out, 2 if weighted else 1 if linear else 0)
    return out


_NO_SQUARES = np.zeros((0, 0))


def spectra_sums(cx: np.ndarray, sy: np.ndarray, sxx: np.ndarray, syy: np.ndarray, sxy: np.ndarray,
                 squares: tuple[np.ndarray, np.ndarray] | None = None) -> None:
    """Add one segment's auto and cross spectra to running float64 sums, per channel row.

    ``cx`` is ``conj(X)`` and ``sy`` is ``Y`` (complex64 or complex128, shape (channels,
    n_freqs)); adds ``|X|^2`` to ``sxx``, ``|Y|^2`` to ``syy`` (float64) and ``conj(X) Y``
    to ``sxy`` (complex128), each product formed in float64; with ``squares`` (two float64
    arrays like ``sxx``), ``|X|^4`` and ``|Y|^4`` to them.
    """
    qxx, qyy = squares if squares is not None else (_NO_SQUARES, _NO_SQUARES)
    _loop("spectra_sums")(cx, sy, sxx, syy, sxy, qxx, qyy)
