"""numba versions of the loops in :mod:`twinpass.core.loops` (imported on first use).

Compiled machine code is cached on disk beside this file (numba's ``cache=True``; where that
folder is read-only numba uses its user-wide cache folder), so a process pays for compiling
only once per machine and for loading (a fraction of a second) once per process.
"""

# ruff: noqa: E702
from __future__ import annotations

import numba
import numpy as np

_CHUNK_ROWS = 2048
"""Rows per cache block: each section sweeps this many rows (128 KiB at 8 channels) before
the next section runs on them, so the cascade's data stays in the L2 cache."""

_jit = numba.njit(nogil=True, cache=True, boundscheck=False)

_CASCADE_SIGNATURE = "void(f8[:, ::1], f8[:, ::1], f8[:, :, ::1], f8[:, ::1], b1)"
"""The one specialisation :func:`compile_cascade` builds: C-contiguous float64 arrays."""


@_jit
def _rows8(b0, b1, b2, a1, a2, src, dst, z, q, c, i0, i1, step):  # type: ignore[no-untyped-def]
    # As _rows4, for channels c..c+7: eight independent recursions in straight-line code,
    # which the SLP vectorizer turns into one 8-lane (or two 4-lane) operation per line.
    za0 = z[q, 0, c]; zb0 = z[q, 0, c + 1]; zc0 = z[q, 0, c + 2]; zd0 = z[q, 0, c + 3]
    ze0 = z[q, 0, c + 4]; zf0 = z[q, 0, c + 5]; zg0 = z[q, 0, c + 6]; zh0 = z[q, 0, c + 7]
    za1 = z[q, 1, c]; zb1 = z[q, 1, c + 1]; zc1 = z[q, 1, c + 2]; zd1 = z[q, 1, c + 3]
    ze1 = z[q, 1, c + 4]; zf1 = z[q, 1, c + 5]; zg1 = z[q, 1, c + 6]; zh1 = z[q, 1, c + 7]
    i = i0
    while i != i1:
        xa = src[i, c]; xb = src[i, c + 1]; xc = src[i, c + 2]; xd = src[i, c + 3]
        xe = src[i, c + 4]; xf = src[i, c + 5]; xg = src[i, c + 6]; xh = src[i, c + 7]
        ya = b0 * xa + za0; yb = b0 * xb + zb0; yc = b0 * xc + zc0; yd = b0 * xd + zd0
        ye = b0 * xe + ze0; yf = b0 * xf + zf0; yg = b0 * xg + zg0; yh = b0 * xh + zh0
        za0 = b1 * xa - a1 * ya + za1; zb0 = b1 * xb - a1 * yb + zb1
        zc0 = b1 * xc - a1 * yc + zc1; zd0 = b1 * xd - a1 * yd + zd1
        ze0 = b1 * xe - a1 * ye + ze1; zf0 = b1 * xf - a1 * yf + zf1
        zg0 = b1 * xg - a1 * yg + zg1; zh0 = b1 * xh - a1 * yh + zh1
        za1 = b2 * xa - a2 * ya; zb1 = b2 * xb - a2 * yb
        zc1 = b2 * xc - a2 * yc; zd1 = b2 * xd - a2 * yd
        ze1 = b2 * xe - a2 * ye; zf1 = b2 * xf - a2 * yf
        zg1 = b2 * xg - a2 * yg; zh1 = b2 * xh - a2 * yh
        dst[i, c] = ya; dst[i, c + 1] = yb; dst[i, c + 2] = yc; dst[i, c + 3] = yd
        dst[i, c + 4] = ye; dst[i, c + 5] = yf; dst[i, c + 6] = yg; dst[i, c + 7] = yh
        i += step
    z[q, 0, c] = za0; z[q, 0, c + 1] = zb0; z[q, 0, c + 2] = zc0; z[q, 0, c + 3] = zd0
    z[q, 0, c + 4] = ze0; z[q, 0, c + 5] = zf0; z[q, 0, c + 6] = zg0; z[q, 0, c + 7] = zh0
    z[q, 1, c] = za1; z[q, 1, c + 1] = zb1; z[q, 1, c + 2] = zc1; z[q, 1, c + 3] = zd1
    z[q, 1, c + 4] = ze1; z[q, 1, c + 5] = zf1; z[q, 1, c + 6] = zg1; z[q, 1, c + 7] = zh1


@_jit
def _rows4(b0, b1, b2, a1, a2, src, dst, z, q, c, i0, i1, step):  # type: ignore[no-untyped-def]
    # One section over rows i0, i0+step, ... (i1 excluded) for channels c..c+3; the
    # operations are sosfilt's, in its order, with the state held in registers.
    za0 = z[q, 0, c]; zb0 = z[q, 0, c + 1]; zc0 = z[q, 0, c + 2]; zd0 = z[q, 0, c + 3]
    za1 = z[q, 1, c]; zb1 = z[q, 1, c + 1]; zc1 = z[q, 1, c + 2]; zd1 = z[q, 1, c + 3]
    i = i0
    while i != i1:
        xa = src[i, c]; xb = src[i, c + 1]; xc = src[i, c + 2]; xd = src[i, c + 3]
        ya = b0 * xa + za0; yb = b0 * xb + zb0; yc = b0 * xc + zc0; yd = b0 * xd + zd0
        za0 = b1 * xa - a1 * ya + za1; zb0 = b1 * xb - a1 * yb + zb1
        zc0 = b1 * xc - a1 * yc + zc1; zd0 = b1 * xd - a1 * yd + zd1
        za1 = b2 * xa - a2 * ya; zb1 = b2 * xb - a2 * yb
        zc1 = b2 * xc - a2 * yc; zd1 = b2 * xd - a2 * yd
        dst[i, c] = ya; dst[i, c + 1] = yb; dst[i, c + 2] = yc; dst[i, c + 3] = yd
        i += step
    z[q, 0, c] = za0; z[q, 0, c + 1] = zb0; z[q, 0, c + 2] = zc0; z[q, 0, c + 3] = zd0
    z[q, 1, c] = za1; z[q, 1, c + 1] = zb1; z[q, 1, c + 2] = zc1; z[q, 1, c + 3] = zd1


@_jit
def _rows_all_sections(sos, src, dst, z, c, i0, i1, step):  # type: ignore[no-untyped-def]
    # One channel, every section per sample (sosfilt's own loop order): the sections
    # of one sample overlap in the pipeline, which suits a lone channel.
    ns = sos.shape[0]
    i = i0
    while i != i1:
        v = src[i, c]
        for q in range(ns):
            y = sos[q, 0] * v + z[q, 0, c]
            z[q, 0, c] = sos[q, 1] * v - sos[q, 4] * y + z[q, 1, c]
            z[q, 1, c] = sos[q, 2] * v - sos[q, 5] * y
            v = y
        dst[i, c] = v
        i += step


@_jit
def _cascade_jit(sos, x, z, out, reverse):  # type: ignore[no-untyped-def]
    n, nc = x.shape
    ns = sos.shape[0]
    eights = nc // 8
    fours = (nc - 8 * eights) // 4
    lone = 8 * eights + 4 * fours
    for k in range((n + _CHUNK_ROWS - 1) // _CHUNK_ROWS):
        if reverse:
            hi = n - k * _CHUNK_ROWS
            lo = max(0, hi - _CHUNK_ROWS)
            i0, i1, step = hi - 1, lo - 1, -1
        else:
            lo = k * _CHUNK_ROWS
            hi = min(n, lo + _CHUNK_ROWS)
            i0, i1, step = lo, hi, 1
        if lone:
            for q in range(ns):
                b0, b1, b2, a1, a2 = sos[q, 0], sos[q, 1], sos[q, 2], sos[q, 4], sos[q, 5]
                src = x if q == 0 else out
                for g in range(eights):
                    _rows8(b0, b1, b2, a1, a2, src, out, z, q, 8 * g, i0, i1, step)
                if fours:
                    _rows4(b0, b1, b2, a1, a2, src, out, z, q, 8 * eights, i0, i1, step)
        for c in range(lone, nc):
            _rows_all_sections(sos, x, out, z, c, i0, i1, step)


@_jit
def _stats_jit(a):  # type: ignore[no-untyped-def]
    # Fast pass without a branch per sample; a non-finite sum means some channel holds a
    # NaN/Inf (or squares overflow), and only then the careful pass counts and skips them.
    n, nc = a.shape
    ss = np.zeros(nc)
    peak = np.zeros(nc)
    for i in range(n):
        for c in range(nc):
            v = a[i, c]
            ss[c] += v * v
            m = abs(v)
            peak[c] = m if m > peak[c] else peak[c]
    bad = np.zeros(nc)
    if np.all(np.isfinite(ss)):
        return bad, ss, peak
    ss[:] = 0.0
    peak[:] = 0.0
    for i in range(n):
        for c in range(nc):
            v = a[i, c]
            if np.isfinite(v):
                ss[c] += v * v
                m = abs(v)
                if m > peak[c]:
                    peak[c] = m
            else:
                bad[c] += 1.0
    return bad, ss, peak


@_jit
def _int24_jit(raw, scale, big_endian, out):  # type: ignore[no-untyped-def]
    # out: float64, raw.shape[0] // 3 items, allocated by the caller (numpy asks the kernel
    # for huge pages on large arrays; numba's own allocator does not).
    n = raw.shape[0] // 3
    for i in range(n):
        if big_endian:
            v = (np.int32(raw[3 * i]) << 16) | (np.int32(raw[3 * i + 1]) << 8) | np.int32(raw[3 * i + 2])
        else:
            v = np.int32(raw[3 * i]) | (np.int32(raw[3 * i + 1]) << 8) | (np.int32(raw[3 * i + 2]) << 16)
        if v >= 8388608:
            v -= 16777216
        out[i] = v * scale
    return out


@_jit
def _segment_rows_jit(v, start, window, out):  # type: ignore[no-untyped-def]
    # Mean over the segment in float64, then (v - mean) * window written channel-major in
    # out's type; reads the time-major rows once for the mean and once for the copy.
    n = window.shape[0]
    nc = v.shape[1]
    mean = np.zeros(nc)
    for i in range(start, start + n):
        for c in range(nc):
            mean[c] += v[i, c]
    for c in range(nc):
        mean[c] /= n
    for i in range(n):
        w = window[i]
        for c in range(nc):
            out[c, i] = (v[start + i, c] - mean[c]) * w


@_jit
def _spectra_sums_jit(cx, sy, sxx, syy, sxy):  # type: ignore[no-untyped-def]
    # cx = conj(X), sy = Y (rows = channels); sums in float64 whatever the spectra's type.
    nc, nf = cx.shape
    for c in range(nc):
        for k in range(nf):
            ar = np.float64(cx[c, k].real); ai = np.float64(cx[c, k].imag)
            br = np.float64(sy[c, k].real); bi = np.float64(sy[c, k].imag)
            sxx[c, k] += ar * ar + ai * ai
            syy[c, k] += br * br + bi * bi
            sxy[c, k] += complex(ar * br - ai * bi, ar * bi + ai * br)


def compile_cascade():  # type: ignore[no-untyped-def]
    """Build the cascade for C-contiguous float64 arrays with LLVM's SLP vectorizer on.

    numba leaves SLP vectorization off by default, because it has miscompiled other code;
    the cascade's side-by-side channels need it to become vector instructions (about 1.8x
    faster on 8 channels). The switch is on only while this function compiles, under
    numba's global compiler lock, and :mod:`twinpass.core.loops` compares the result with
    ``scipy.signal.sosfilt`` before it uses it. Returns the compiled dispatcher.
    """
    from numba.core import config
    from numba.core.compiler_lock import global_compiler_lock

    with global_compiler_lock:
        saved = config.SLP_VECTORIZE
        config.SLP_VECTORIZE = 1
        try:
            _cascade_jit.compile(_CASCADE_SIGNATURE)
        finally:
            config.SLP_VECTORIZE = saved
    return _cascade_jit
