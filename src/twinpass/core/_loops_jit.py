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
"""Rows per cache block: each section (or pair of sections) sweeps this many rows (128 KiB at
8 channels) before the next runs on them, so the cascade's data stays in the L2 cache."""

_jit = numba.njit(nogil=True, cache=True, boundscheck=False)

_CASCADE_SIGNATURE = "void(f8[:, ::1], f8[:, ::1], f8[:, :, ::1], f8[:, ::1], b1)"
"""The one specialisation :func:`compile_cascade` builds: C-contiguous float64 arrays."""


@_jit
def _pair8(sa, sb, src, dst, z, q, c, i0, n, reverse):  # type: ignore[no-untyped-def]
    # Sections q (coefficients sa) and q + 1 (sb) together over n >= 1 rows from row i0
    # for channels c..c+7: section q + 1 runs one row behind section q and takes its
    # output from registers, so the two recursions overlap in the pipeline (each alone
    # waits on its own latency) and section q's output is never stored. Per section the
    # operations are sosfilt's, in its order. Indices as in _rows8. In place (src is
    # dst) is safe: row r - 1 is written after row r is read.
    b0, b1, b2, a1, a2 = sa[0], sa[1], sa[2], sa[4], sa[5]
    d0, d1, d2, e1, e2 = sb[0], sb[1], sb[2], sb[4], sb[5]
    s = src.ravel(); d = dst.ravel()
    nc = np.uint64(src.shape[1]); cu = np.uint64(c)
    sgn = -1 if reverse else 1
    pa0 = z[q, 0, c]; pb0 = z[q, 0, c + 1]; pc0 = z[q, 0, c + 2]; pd0 = z[q, 0, c + 3]
    pe0 = z[q, 0, c + 4]; pf0 = z[q, 0, c + 5]; pg0 = z[q, 0, c + 6]; ph0 = z[q, 0, c + 7]
    pa1 = z[q, 1, c]; pb1 = z[q, 1, c + 1]; pc1 = z[q, 1, c + 2]; pd1 = z[q, 1, c + 3]
    pe1 = z[q, 1, c + 4]; pf1 = z[q, 1, c + 5]; pg1 = z[q, 1, c + 6]; ph1 = z[q, 1, c + 7]
    ra0 = z[q + 1, 0, c]; rb0 = z[q + 1, 0, c + 1]; rc0 = z[q + 1, 0, c + 2]; rd0 = z[q + 1, 0, c + 3]
    re0 = z[q + 1, 0, c + 4]; rf0 = z[q + 1, 0, c + 5]; rg0 = z[q + 1, 0, c + 6]; rh0 = z[q + 1, 0, c + 7]
    ra1 = z[q + 1, 1, c]; rb1 = z[q + 1, 1, c + 1]; rc1 = z[q + 1, 1, c + 2]; rd1 = z[q + 1, 1, c + 3]
    re1 = z[q + 1, 1, c + 4]; rf1 = z[q + 1, 1, c + 5]; rg1 = z[q + 1, 1, c + 6]; rh1 = z[q + 1, 1, c + 7]
    # section q, first row
    k = np.uint64(i0) * nc + cu
    xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
    xe = s[k + np.uint64(4)]; xf = s[k + np.uint64(5)]; xg = s[k + np.uint64(6)]; xh = s[k + np.uint64(7)]
    ya = b0 * xa + pa0; yb = b0 * xb + pb0; yc = b0 * xc + pc0; yd = b0 * xd + pd0
    ye = b0 * xe + pe0; yf = b0 * xf + pf0; yg = b0 * xg + pg0; yh = b0 * xh + ph0
    pa0 = b1 * xa - a1 * ya + pa1; pb0 = b1 * xb - a1 * yb + pb1
    pc0 = b1 * xc - a1 * yc + pc1; pd0 = b1 * xd - a1 * yd + pd1
    pe0 = b1 * xe - a1 * ye + pe1; pf0 = b1 * xf - a1 * yf + pf1
    pg0 = b1 * xg - a1 * yg + pg1; ph0 = b1 * xh - a1 * yh + ph1
    pa1 = b2 * xa - a2 * ya; pb1 = b2 * xb - a2 * yb
    pc1 = b2 * xc - a2 * yc; pd1 = b2 * xd - a2 * yd
    pe1 = b2 * xe - a2 * ye; pf1 = b2 * xf - a2 * yf
    pg1 = b2 * xg - a2 * yg; ph1 = b2 * xh - a2 * yh
    ua = ya; ub = yb; uc = yc; ud = yd
    ue = ye; uf = yf; ug = yg; uh = yh
    kb = k
    for r in range(1, n):  # section q row r, section q + 1 row r - 1
        k = np.uint64(i0 + sgn * r) * nc + cu
        xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
        xe = s[k + np.uint64(4)]; xf = s[k + np.uint64(5)]; xg = s[k + np.uint64(6)]; xh = s[k + np.uint64(7)]
        ya = b0 * xa + pa0; yb = b0 * xb + pb0; yc = b0 * xc + pc0; yd = b0 * xd + pd0
        ye = b0 * xe + pe0; yf = b0 * xf + pf0; yg = b0 * xg + pg0; yh = b0 * xh + ph0
        pa0 = b1 * xa - a1 * ya + pa1; pb0 = b1 * xb - a1 * yb + pb1
        pc0 = b1 * xc - a1 * yc + pc1; pd0 = b1 * xd - a1 * yd + pd1
        pe0 = b1 * xe - a1 * ye + pe1; pf0 = b1 * xf - a1 * yf + pf1
        pg0 = b1 * xg - a1 * yg + pg1; ph0 = b1 * xh - a1 * yh + ph1
        pa1 = b2 * xa - a2 * ya; pb1 = b2 * xb - a2 * yb
        pc1 = b2 * xc - a2 * yc; pd1 = b2 * xd - a2 * yd
        pe1 = b2 * xe - a2 * ye; pf1 = b2 * xf - a2 * yf
        pg1 = b2 * xg - a2 * yg; ph1 = b2 * xh - a2 * yh
        va = d0 * ua + ra0; vb = d0 * ub + rb0; vc = d0 * uc + rc0; vd = d0 * ud + rd0
        ve = d0 * ue + re0; vf = d0 * uf + rf0; vg = d0 * ug + rg0; vh = d0 * uh + rh0
        ra0 = d1 * ua - e1 * va + ra1; rb0 = d1 * ub - e1 * vb + rb1
        rc0 = d1 * uc - e1 * vc + rc1; rd0 = d1 * ud - e1 * vd + rd1
        re0 = d1 * ue - e1 * ve + re1; rf0 = d1 * uf - e1 * vf + rf1
        rg0 = d1 * ug - e1 * vg + rg1; rh0 = d1 * uh - e1 * vh + rh1
        ra1 = d2 * ua - e2 * va; rb1 = d2 * ub - e2 * vb
        rc1 = d2 * uc - e2 * vc; rd1 = d2 * ud - e2 * vd
        re1 = d2 * ue - e2 * ve; rf1 = d2 * uf - e2 * vf
        rg1 = d2 * ug - e2 * vg; rh1 = d2 * uh - e2 * vh
        d[kb] = va; d[kb + np.uint64(1)] = vb; d[kb + np.uint64(2)] = vc; d[kb + np.uint64(3)] = vd
        d[kb + np.uint64(4)] = ve; d[kb + np.uint64(5)] = vf; d[kb + np.uint64(6)] = vg; d[kb + np.uint64(7)] = vh
        ua = ya; ub = yb; uc = yc; ud = yd
        ue = ye; uf = yf; ug = yg; uh = yh
        kb = k
    # section q + 1, last row
    va = d0 * ua + ra0; vb = d0 * ub + rb0; vc = d0 * uc + rc0; vd = d0 * ud + rd0
    ve = d0 * ue + re0; vf = d0 * uf + rf0; vg = d0 * ug + rg0; vh = d0 * uh + rh0
    ra0 = d1 * ua - e1 * va + ra1; rb0 = d1 * ub - e1 * vb + rb1
    rc0 = d1 * uc - e1 * vc + rc1; rd0 = d1 * ud - e1 * vd + rd1
    re0 = d1 * ue - e1 * ve + re1; rf0 = d1 * uf - e1 * vf + rf1
    rg0 = d1 * ug - e1 * vg + rg1; rh0 = d1 * uh - e1 * vh + rh1
    ra1 = d2 * ua - e2 * va; rb1 = d2 * ub - e2 * vb
    rc1 = d2 * uc - e2 * vc; rd1 = d2 * ud - e2 * vd
    re1 = d2 * ue - e2 * ve; rf1 = d2 * uf - e2 * vf
    rg1 = d2 * ug - e2 * vg; rh1 = d2 * uh - e2 * vh
    d[kb] = va; d[kb + np.uint64(1)] = vb; d[kb + np.uint64(2)] = vc; d[kb + np.uint64(3)] = vd
    d[kb + np.uint64(4)] = ve; d[kb + np.uint64(5)] = vf; d[kb + np.uint64(6)] = vg; d[kb + np.uint64(7)] = vh
    z[q, 0, c] = pa0; z[q, 0, c + 1] = pb0; z[q, 0, c + 2] = pc0; z[q, 0, c + 3] = pd0
    z[q, 0, c + 4] = pe0; z[q, 0, c + 5] = pf0; z[q, 0, c + 6] = pg0; z[q, 0, c + 7] = ph0
    z[q, 1, c] = pa1; z[q, 1, c + 1] = pb1; z[q, 1, c + 2] = pc1; z[q, 1, c + 3] = pd1
    z[q, 1, c + 4] = pe1; z[q, 1, c + 5] = pf1; z[q, 1, c + 6] = pg1; z[q, 1, c + 7] = ph1
    z[q + 1, 0, c] = ra0; z[q + 1, 0, c + 1] = rb0; z[q + 1, 0, c + 2] = rc0; z[q + 1, 0, c + 3] = rd0
    z[q + 1, 0, c + 4] = re0; z[q + 1, 0, c + 5] = rf0; z[q + 1, 0, c + 6] = rg0; z[q + 1, 0, c + 7] = rh0
    z[q + 1, 1, c] = ra1; z[q + 1, 1, c + 1] = rb1; z[q + 1, 1, c + 2] = rc1; z[q + 1, 1, c + 3] = rd1
    z[q + 1, 1, c + 4] = re1; z[q + 1, 1, c + 5] = rf1; z[q + 1, 1, c + 6] = rg1; z[q + 1, 1, c + 7] = rh1


@_jit
def _pair4(sa, sb, src, dst, z, q, c, i0, n, reverse):  # type: ignore[no-untyped-def]
    # As _pair8, for channels c..c+3.
    b0, b1, b2, a1, a2 = sa[0], sa[1], sa[2], sa[4], sa[5]
    d0, d1, d2, e1, e2 = sb[0], sb[1], sb[2], sb[4], sb[5]
    s = src.ravel(); d = dst.ravel()
    nc = np.uint64(src.shape[1]); cu = np.uint64(c)
    sgn = -1 if reverse else 1
    pa0 = z[q, 0, c]; pb0 = z[q, 0, c + 1]; pc0 = z[q, 0, c + 2]; pd0 = z[q, 0, c + 3]
    pa1 = z[q, 1, c]; pb1 = z[q, 1, c + 1]; pc1 = z[q, 1, c + 2]; pd1 = z[q, 1, c + 3]
    ra0 = z[q + 1, 0, c]; rb0 = z[q + 1, 0, c + 1]; rc0 = z[q + 1, 0, c + 2]; rd0 = z[q + 1, 0, c + 3]
    ra1 = z[q + 1, 1, c]; rb1 = z[q + 1, 1, c + 1]; rc1 = z[q + 1, 1, c + 2]; rd1 = z[q + 1, 1, c + 3]
    # section q, first row
    k = np.uint64(i0) * nc + cu
    xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
    ya = b0 * xa + pa0; yb = b0 * xb + pb0; yc = b0 * xc + pc0; yd = b0 * xd + pd0
    pa0 = b1 * xa - a1 * ya + pa1; pb0 = b1 * xb - a1 * yb + pb1
    pc0 = b1 * xc - a1 * yc + pc1; pd0 = b1 * xd - a1 * yd + pd1
    pa1 = b2 * xa - a2 * ya; pb1 = b2 * xb - a2 * yb
    pc1 = b2 * xc - a2 * yc; pd1 = b2 * xd - a2 * yd
    ua = ya; ub = yb; uc = yc; ud = yd
    kb = k
    for r in range(1, n):  # section q row r, section q + 1 row r - 1
        k = np.uint64(i0 + sgn * r) * nc + cu
        xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
        ya = b0 * xa + pa0; yb = b0 * xb + pb0; yc = b0 * xc + pc0; yd = b0 * xd + pd0
        pa0 = b1 * xa - a1 * ya + pa1; pb0 = b1 * xb - a1 * yb + pb1
        pc0 = b1 * xc - a1 * yc + pc1; pd0 = b1 * xd - a1 * yd + pd1
        pa1 = b2 * xa - a2 * ya; pb1 = b2 * xb - a2 * yb
        pc1 = b2 * xc - a2 * yc; pd1 = b2 * xd - a2 * yd
        va = d0 * ua + ra0; vb = d0 * ub + rb0; vc = d0 * uc + rc0; vd = d0 * ud + rd0
        ra0 = d1 * ua - e1 * va + ra1; rb0 = d1 * ub - e1 * vb + rb1
        rc0 = d1 * uc - e1 * vc + rc1; rd0 = d1 * ud - e1 * vd + rd1
        ra1 = d2 * ua - e2 * va; rb1 = d2 * ub - e2 * vb
        rc1 = d2 * uc - e2 * vc; rd1 = d2 * ud - e2 * vd
        d[kb] = va; d[kb + np.uint64(1)] = vb; d[kb + np.uint64(2)] = vc; d[kb + np.uint64(3)] = vd
        ua = ya; ub = yb; uc = yc; ud = yd
        kb = k
    # section q + 1, last row
    va = d0 * ua + ra0; vb = d0 * ub + rb0; vc = d0 * uc + rc0; vd = d0 * ud + rd0
    ra0 = d1 * ua - e1 * va + ra1; rb0 = d1 * ub - e1 * vb + rb1
    rc0 = d1 * uc - e1 * vc + rc1; rd0 = d1 * ud - e1 * vd + rd1
    ra1 = d2 * ua - e2 * va; rb1 = d2 * ub - e2 * vb
    rc1 = d2 * uc - e2 * vc; rd1 = d2 * ud - e2 * vd
    d[kb] = va; d[kb + np.uint64(1)] = vb; d[kb + np.uint64(2)] = vc; d[kb + np.uint64(3)] = vd
    z[q, 0, c] = pa0; z[q, 0, c + 1] = pb0; z[q, 0, c + 2] = pc0; z[q, 0, c + 3] = pd0
    z[q, 1, c] = pa1; z[q, 1, c + 1] = pb1; z[q, 1, c + 2] = pc1; z[q, 1, c + 3] = pd1
    z[q + 1, 0, c] = ra0; z[q + 1, 0, c + 1] = rb0; z[q + 1, 0, c + 2] = rc0; z[q + 1, 0, c + 3] = rd0
    z[q + 1, 1, c] = ra1; z[q + 1, 1, c + 1] = rb1; z[q + 1, 1, c + 2] = rc1; z[q + 1, 1, c + 3] = rd1


@_jit
def _rows8(b0, b1, b2, a1, a2, src, dst, z, q, c, i0, n, reverse):  # type: ignore[no-untyped-def]
    # One section over n rows from row i0 (upwards, or downwards when reversing) for
    # channels c..c+7; the operations are sosfilt's, in its order, with the state in
    # registers. Eight independent recursions in straight-line code, which LLVM's SLP
    # vectorizer turns into vector instructions. The flat unsigned indices matter: with
    # signed ones numba emits a wraparound select per index, the lanes' loads and stores
    # are then not seen as adjacent, and the code stays scalar.
    s = src.ravel(); d = dst.ravel()
    nc = np.uint64(src.shape[1]); cu = np.uint64(c)
    sgn = -1 if reverse else 1
    za0 = z[q, 0, c]; zb0 = z[q, 0, c + 1]; zc0 = z[q, 0, c + 2]; zd0 = z[q, 0, c + 3]
    ze0 = z[q, 0, c + 4]; zf0 = z[q, 0, c + 5]; zg0 = z[q, 0, c + 6]; zh0 = z[q, 0, c + 7]
    za1 = z[q, 1, c]; zb1 = z[q, 1, c + 1]; zc1 = z[q, 1, c + 2]; zd1 = z[q, 1, c + 3]
    ze1 = z[q, 1, c + 4]; zf1 = z[q, 1, c + 5]; zg1 = z[q, 1, c + 6]; zh1 = z[q, 1, c + 7]
    for r in range(n):
        k = np.uint64(i0 + sgn * r) * nc + cu
        xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
        xe = s[k + np.uint64(4)]; xf = s[k + np.uint64(5)]; xg = s[k + np.uint64(6)]; xh = s[k + np.uint64(7)]
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
        d[k] = ya; d[k + np.uint64(1)] = yb; d[k + np.uint64(2)] = yc; d[k + np.uint64(3)] = yd
        d[k + np.uint64(4)] = ye; d[k + np.uint64(5)] = yf; d[k + np.uint64(6)] = yg; d[k + np.uint64(7)] = yh
    z[q, 0, c] = za0; z[q, 0, c + 1] = zb0; z[q, 0, c + 2] = zc0; z[q, 0, c + 3] = zd0
    z[q, 0, c + 4] = ze0; z[q, 0, c + 5] = zf0; z[q, 0, c + 6] = zg0; z[q, 0, c + 7] = zh0
    z[q, 1, c] = za1; z[q, 1, c + 1] = zb1; z[q, 1, c + 2] = zc1; z[q, 1, c + 3] = zd1
    z[q, 1, c + 4] = ze1; z[q, 1, c + 5] = zf1; z[q, 1, c + 6] = zg1; z[q, 1, c + 7] = zh1


@_jit
def _rows4(b0, b1, b2, a1, a2, src, dst, z, q, c, i0, n, reverse):  # type: ignore[no-untyped-def]
    # As _rows8, for channels c..c+3.
    s = src.ravel(); d = dst.ravel()
    nc = np.uint64(src.shape[1]); cu = np.uint64(c)
    sgn = -1 if reverse else 1
    za0 = z[q, 0, c]; zb0 = z[q, 0, c + 1]; zc0 = z[q, 0, c + 2]; zd0 = z[q, 0, c + 3]
    za1 = z[q, 1, c]; zb1 = z[q, 1, c + 1]; zc1 = z[q, 1, c + 2]; zd1 = z[q, 1, c + 3]
    for r in range(n):
        k = np.uint64(i0 + sgn * r) * nc + cu
        xa = s[k]; xb = s[k + np.uint64(1)]; xc = s[k + np.uint64(2)]; xd = s[k + np.uint64(3)]
        ya = b0 * xa + za0; yb = b0 * xb + zb0; yc = b0 * xc + zc0; yd = b0 * xd + zd0
        za0 = b1 * xa - a1 * ya + za1; zb0 = b1 * xb - a1 * yb + zb1
        zc0 = b1 * xc - a1 * yc + zc1; zd0 = b1 * xd - a1 * yd + zd1
        za1 = b2 * xa - a2 * ya; zb1 = b2 * xb - a2 * yb
        zc1 = b2 * xc - a2 * yc; zd1 = b2 * xd - a2 * yd
        d[k] = ya; d[k + np.uint64(1)] = yb; d[k + np.uint64(2)] = yc; d[k + np.uint64(3)] = yd
    z[q, 0, c] = za0; z[q, 0, c + 1] = zb0; z[q, 0, c + 2] = zc0; z[q, 0, c + 3] = zd0
    z[q, 1, c] = za1; z[q, 1, c + 1] = zb1; z[q, 1, c + 2] = zc1; z[q, 1, c + 3] = zd1


@_jit
def _sections(sos, src, dst, z, c, width, i0, n, reverse):  # type: ignore[no-untyped-def]
    # Every section over n rows from row i0 for the lane group c..c+width-1 (width 8 or 4):
    # in pairs, an odd last section alone; the first reads src, the rest work in dst.
    ns = sos.shape[0]
    q = 0
    while q < ns:
        s = src if q == 0 else dst
        if q + 1 < ns:
            if width == 8:
                _pair8(sos[q], sos[q + 1], s, dst, z, q, c, i0, n, reverse)
            else:
                _pair4(sos[q], sos[q + 1], s, dst, z, q, c, i0, n, reverse)
            q += 2
        else:
            b0, b1, b2, a1, a2 = sos[q, 0], sos[q, 1], sos[q, 2], sos[q, 4], sos[q, 5]
            if width == 8:
                _rows8(b0, b1, b2, a1, a2, s, dst, z, q, c, i0, n, reverse)
            else:
                _rows4(b0, b1, b2, a1, a2, s, dst, z, q, c, i0, n, reverse)
            q += 1


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
def _copy_lanes(x, scratch, c, width, i0, n, sgn, into_scratch):  # type: ignore[no-untyped-def]
    # scratch[r, j] = x[i0 + sgn * r, c + j] (or back when not into_scratch), r < n,
    # j < width; flat unsigned indices, as in _rows8.
    xs = x.ravel(); ss = scratch.ravel()
    nc = np.uint64(x.shape[1]); cu = np.uint64(c); w = np.uint64(width)
    for r in range(n):
        k = np.uint64(i0 + sgn * r) * nc + cu
        t = np.uint64(r) * np.uint64(4)
        for j in range(w):
            if into_scratch:
                ss[t + j] = xs[k + j]
            else:
                xs[k + j] = ss[t + j]


@_jit
def _cascade_jit(sos, x, z, out, reverse):  # type: ignore[no-untyped-def]
    # Cache block by cache block (from the last row when reversing): groups of eight and
    # four channels in place; two or three channels left over are copied, in the order
    # they are processed, into a four-lane scratch block (the spare lanes hold zeros), run
    # as a group of four and copied back; a single one left over runs every section per
    # sample (faster for one lane than the copies).
    n, nc = x.shape
    ns = sos.shape[0]
    eights = nc // 8
    fours = (nc - 8 * eights) // 4
    c_rest = 8 * eights + 4 * fours
    rest = nc - c_rest  # channels c_rest.. left over
    in_scratch = rest if rest > 1 else 0  # channels run in the scratch block
    scratch = np.zeros((_CHUNK_ROWS if in_scratch else 0, 4))
    zs = np.zeros((ns, 2, 4))
    for q in range(ns):
        for j in range(in_scratch):
            zs[q, 0, j] = z[q, 0, c_rest + j]
            zs[q, 1, j] = z[q, 1, c_rest + j]
    sgn = -1 if reverse else 1
    for k in range((n + _CHUNK_ROWS - 1) // _CHUNK_ROWS):
        lo = k * _CHUNK_ROWS
        rows = min(_CHUNK_ROWS, n - lo)
        i0 = n - 1 - lo if reverse else lo
        for g in range(eights):
            _sections(sos, x, out, z, 8 * g, 8, i0, rows, reverse)
        if fours:
            _sections(sos, x, out, z, 8 * eights, 4, i0, rows, reverse)
        if rest == 1:
            _rows_all_sections(sos, x, out, z, c_rest, i0, i0 + sgn * rows, sgn)
        elif in_scratch:
            _copy_lanes(x, scratch, c_rest, rest, i0, rows, sgn, True)
            _sections(sos, scratch, scratch, zs, 0, 4, 0, rows, False)
            _copy_lanes(out, scratch, c_rest, rest, i0, rows, sgn, False)
    for q in range(ns):
        for j in range(in_scratch):
            z[q, 0, c_rest + j] = zs[q, 0, j]
            z[q, 1, c_rest + j] = zs[q, 1, j]


@_jit
def _stats_jit(a, chunk):  # type: ignore[no-untyped-def]
    # Fast pass without a branch per sample; a non-finite sum means some channel holds a
    # NaN/Inf (or squares overflow), and only then the careful pass counts and skips them.
    # With chunk > 0 the sums over runs of chunk rows are added up too.
    n, nc = a.shape
    ss = np.zeros(nc)
    peak = np.zeros(nc)
    runs = np.zeros(((n + chunk - 1) // chunk if chunk > 0 else 0, nc))
    if chunk > 0:  # one channel at a time over each run, whose rows stay in the L1 cache;
        # four rows side by side, so the sums do not wait on each other
        for r in range(runs.shape[0]):
            lo, hi = r * chunk, min(n, (r + 1) * chunk)
            top = lo + (hi - lo) // 4 * 4
            for c in range(nc):
                t0 = t1 = t2 = t3 = 0.0
                q0 = q1 = q2 = q3 = 0.0
                p = peak[c]
                for i in range(lo, top, 4):
                    x0 = a[i, c]; x1 = a[i + 1, c]; x2 = a[i + 2, c]; x3 = a[i + 3, c]
                    t0 += x0; t1 += x1; t2 += x2; t3 += x3
                    q0 += x0 * x0; q1 += x1 * x1; q2 += x2 * x2; q3 += x3 * x3
                    p = max(p, max(max(abs(x0), abs(x1)), max(abs(x2), abs(x3))))
                for i in range(top, hi):
                    x0 = a[i, c]
                    t0 += x0
                    q0 += x0 * x0
                    p = max(p, abs(x0))
                runs[r, c] = (t0 + t1) + (t2 + t3)
                ss[c] += (q0 + q1) + (q2 + q3)
                peak[c] = p
    else:
        for i in range(n):
            for c in range(nc):
                x = a[i, c]
                ss[c] += x * x
                m = abs(x)
                peak[c] = m if m > peak[c] else peak[c]
    bad = np.zeros(nc)
    if np.all(np.isfinite(ss)):
        return bad, ss, peak, runs
    ss[:] = 0.0
    peak[:] = 0.0
    runs[:, :] = 0.0
    for i in range(n):
        for c in range(nc):
            x = a[i, c]
            if np.isfinite(x):
                ss[c] += x * x
                m = abs(x)
                if m > peak[c]:
                    peak[c] = m
                if chunk > 0:
                    runs[i // chunk, c] += x
            else:
                bad[c] += 1.0
    return bad, ss, peak, runs


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
def _segment_rows_jit(v, start, window, out, trend):  # type: ignore[no-untyped-def]
    # The segment's trend in float64 (trend 0: its mean; 1: its least-squares line about
    # the segment's centre; 2: that line weighted by the window), then the residual times
    # the window written channel-major in out's type; reads the time-major rows once for
    # the sums and once for the copy.
    n = window.shape[0]
    nc = v.shape[1]
    s0 = np.zeros(nc)
    s1 = np.zeros(nc)
    centre = 0.5 * (n - 1)
    w0 = 0.0
    w1 = 0.0
    w2 = 0.0
    for i in range(n):
        u = i - centre
        q = np.float64(window[i]) if trend == 2 else 1.0
        w0 += q
        w1 += q * u
        w2 += q * u * u
        for c in range(nc):
            a = v[start + i, c]
            s0[c] += q * a
            s1[c] += q * u * a
    level = np.zeros(nc)
    slope = np.zeros(nc)
    det = w0 * w2 - w1 * w1
    for c in range(nc):
        if trend == 1 and n > 1:
            level[c] = s0[c] / n
            slope[c] = s1[c] / (n * (n * n - 1.0) / 12.0)  # sum of (i - centre)^2
        elif trend == 2 and n > 1 and det > 0.0:
            level[c] = (w2 * s0[c] - w1 * s1[c]) / det
            slope[c] = (w0 * s1[c] - w1 * s0[c]) / det
        else:
            level[c] = s0[c] / w0
    for i in range(n):
        w = window[i]
        u = i - centre
        for c in range(nc):
            out[c, i] = (v[start + i, c] - level[c] - slope[c] * u) * w


@_jit
def _spectra_sums_jit(cx, sy, sxx, syy, sxy, qxx, qyy):  # type: ignore[no-untyped-def]
    # cx = conj(X), sy = Y (rows = channels); sums in float64 whatever the spectra's type;
    # qxx and qyy (empty: not wanted) receive |X|^4 and |Y|^4.
    nc, nf = cx.shape
    fourth = qxx.size > 0
    for c in range(nc):
        for k in range(nf):
            ar = np.float64(cx[c, k].real); ai = np.float64(cx[c, k].imag)
            br = np.float64(sy[c, k].real); bi = np.float64(sy[c, k].imag)
            px = ar * ar + ai * ai
            py = br * br + bi * bi
            sxx[c, k] += px
            syy[c, k] += py
            sxy[c, k] += complex(ar * br - ai * bi, ar * bi + ai * br)
            if fourth:
                qxx[c, k] += px * px
                qyy[c, k] += py * py


def compile_cascade():  # type: ignore[no-untyped-def]
    """Build the cascade for C-contiguous float64 arrays with LLVM's SLP vectorizer on.

    numba leaves SLP vectorization off by default, because it has miscompiled other code;
    the cascade's side-by-side channels need it to become vector instructions. One pass of
    a 4-section cascade over 607k x 8 samples on a 2-core x86-64 machine with AVX2: 30 ms
    scalar, 12 ms vectorised one section at a time, 8.5 ms with sections in pairs
    (:func:`_pair8`). The switch is on only while this function compiles, under
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
