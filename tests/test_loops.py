"""Compiled inner loops against scipy.signal and numpy.

Reference library: ``scipy.signal.sosfilt`` (output and final state of a cascade of
second-order sections, transposed direct form II) and numpy for the statistics and the
24-bit decoding. The compiled loops perform sosfilt's operations in its order, so the
comparisons are exact, and the numpy fallback (used without numba) must agree with them.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from twinpass.core import loops

FS = 1000.0


@pytest.mark.parametrize("channels", [1, 3, 4, 5, 8, 9, 12, 19])
@pytest.mark.parametrize("reverse", [False, True])
def test_cascade_equals_sosfilt_bit_for_bit(channels: int, reverse: bool) -> None:
    # Reference: scipy.signal.sosfilt (output and final state). Channel counts cover lone
    # channels, groups of eight and of four, and mixes of them.
    sos = signal.ellip(5, 0.5, 60, (15, 120), "bandpass", fs=FS, output="sos")
    rng = np.random.default_rng(channels)
    n = 3 * 2048 + 77  # several cache blocks plus a partial one
    x = rng.standard_normal((n, channels)) * 1e3
    zi = rng.standard_normal((sos.shape[0], 2, channels))
    src = x[::-1] if reverse else x
    ref, ref_state = signal.sosfilt(sos, src, axis=0, zi=zi)
    state = zi.copy()
    y = loops.sos_cascade(sos, x, state, reverse=reverse)
    np.testing.assert_array_equal(y[::-1] if reverse else y, ref)
    np.testing.assert_array_equal(state, ref_state)
    # In place gives the same, and so does the numpy fallback.
    inplace, st2 = x.copy(), zi.copy()
    loops.sos_cascade(sos, inplace, st2, inplace, reverse=reverse)
    np.testing.assert_array_equal(inplace, y)
    out3, st3 = np.empty_like(x), zi.copy()
    loops._cascade_numpy(sos, x, st3, out3, reverse)
    np.testing.assert_array_equal(out3, y)
    np.testing.assert_array_equal(st3, ref_state)


@pytest.mark.parametrize("sections", [1, 2, 4, 7, 8])
@pytest.mark.parametrize("n", [1, 2, 2047, 2048, 2049, 2 * 2048 + 1])
def test_cascade_in_section_pairs_equals_sosfilt_bit_for_bit(sections: int, n: int) -> None:
    # Reference: scipy.signal.sosfilt (output and final state). The compiled cascade runs
    # sections two at a time (the second one row behind) with a lone last section when
    # the count is odd; lengths cover a single row, and cache blocks ending with one row.
    sos = signal.butter(2 * sections, (0.01, 0.2), "bandpass", output="sos")[:sections]
    rng = np.random.default_rng(100 * sections + n)
    for channels in (4, 8, 13):
        x = rng.standard_normal((n, channels))
        zi = rng.standard_normal((sections, 2, channels))
        for reverse in (False, True):
            ref, ref_state = signal.sosfilt(sos, x[::-1] if reverse else x, axis=0, zi=zi)
            got, state = x.copy(), zi.copy()
            loops.sos_cascade(sos, got, state, got, reverse=reverse)  # in place
            np.testing.assert_array_equal(got[::-1] if reverse else got, ref)
            np.testing.assert_array_equal(state, ref_state)


def test_cascade_on_strided_arrays_equals_sosfilt() -> None:
    # Reference: scipy.signal.sosfilt. Views that are not C-contiguous (every other sample,
    # a reversed view) go through contiguous copies; the results and the state written back
    # are sosfilt's.
    sos = signal.butter(4, (1.0, 40.0), "bandpass", fs=FS, output="sos")
    rng = np.random.default_rng(7)
    base = rng.standard_normal((6000, 8))
    for x in (base[::2], base[::-1]):
        zi = rng.standard_normal((sos.shape[0], 2, 8))
        ref, ref_state = signal.sosfilt(sos, x, axis=0, zi=zi)
        state = zi.copy()
        np.testing.assert_array_equal(loops.sos_cascade(sos, x, state), ref)
        np.testing.assert_array_equal(state, ref_state)
        inplace, st2 = x.copy()[::1], zi.copy()
        view = np.asfortranarray(inplace)  # strided in time, written in place
        loops.sos_cascade(sos, view, st2, view)
        np.testing.assert_array_equal(view, ref)
        np.testing.assert_array_equal(st2, ref_state)


def test_a_cascade_that_differs_from_sosfilt_is_refused() -> None:
    # Reference: scipy.signal.sosfilt (through the numpy fallback). The compiled cascade is
    # verified against it before first use; a loop off by one unit in the last place in a
    # single output is rejected (injected fault).
    def off_by_one_ulp(sos, x, z, out, reverse):  # type: ignore[no-untyped-def]
        loops._cascade_numpy(sos, x, z, out, reverse)
        out[5, 0] = np.nextafter(out[5, 0], np.inf)

    assert loops._cascade_agrees(loops._cascade_numpy)
    assert not loops._cascade_agrees(off_by_one_ulp)
    if loops._load_jit() is not None:  # numba present: its cascade passed and is the one in use
        assert loops.jit_enabled()
        assert loops._cascade_agrees(loops._loop("cascade"))


def test_cascade_of_an_empty_signal_keeps_the_state() -> None:
    sos = signal.butter(2, 10, fs=FS, output="sos")
    state = np.ones((1, 2, 3))
    y = loops.sos_cascade(sos, np.zeros((0, 3)), state)
    assert y.shape == (0, 3)
    np.testing.assert_array_equal(state, 1.0)


def test_channel_stats_match_numpy() -> None:
    rng = np.random.default_rng(4)
    a = rng.standard_normal((5000, 6))
    a[10, 1] = np.nan
    a[11, 1] = np.inf
    a[:, 4] = np.nan  # a channel without any finite sample
    a[7, 5] = -50.0
    bad, ss, peak = loops.channel_stats(a)
    finite = np.isfinite(a)
    clean = np.where(finite, a, 0.0)
    np.testing.assert_array_equal(bad, [0, 2, 0, 0, 5000, 0])
    np.testing.assert_allclose(ss, np.sum(clean**2, axis=0), rtol=1e-12)
    np.testing.assert_array_equal(peak, np.max(np.abs(clean), axis=0))
    assert peak[5] == 50.0 and peak[4] == 0.0
    for got, ref in zip((bad, ss, peak), loops._stats_numpy(a, 0)[:3]):
        np.testing.assert_allclose(got, ref, rtol=1e-12)


@pytest.mark.parametrize("chunk", [1, 7, 64, 5000])
def test_chunked_stats_match_numpy(chunk: int) -> None:
    # Reference: numpy sums of each run of `chunk` rows (numpy.add.reduceat), squares and
    # magnitudes over the finite samples; the last run holds the rows left over.
    rng = np.random.default_rng(6)
    a = rng.standard_normal((4999, 5)) * [1.0, 1e3, 1e-3, 1.0, 5.0] + [0.0, 7.0, 0.0, -300.0, 0.0]
    a[17, 3] = np.nan
    bad, ss, peak, runs = loops.chunked_stats(a, chunk)
    clean = np.where(np.isfinite(a), a, 0.0)
    want = np.add.reduceat(clean, np.arange(0, a.shape[0], chunk), axis=0)
    assert runs.shape == (-(-a.shape[0] // chunk), 5)
    np.testing.assert_allclose(runs, want, rtol=1e-11, atol=1e-9 * np.abs(clean).max())
    np.testing.assert_array_equal(bad, [0, 0, 0, 1, 0])
    np.testing.assert_allclose(ss, np.sum(clean**2, axis=0), rtol=1e-12)
    np.testing.assert_array_equal(peak, np.max(np.abs(clean), axis=0))
    for got, ref in zip((bad, ss, peak, runs), loops._stats_numpy(a, chunk)):
        np.testing.assert_allclose(got, ref, rtol=1e-11, atol=1e-9 * np.abs(clean).max())
    with pytest.raises(ValueError, match="chunk"):
        loops.chunked_stats(a, 0)


@pytest.mark.parametrize("big_endian", [False, True])
def test_int24_decoding_matches_integer_arithmetic(big_endian: bool) -> None:
    # Two's complement of 24-bit values, built with Python's int.to_bytes (the definition).
    values = [0, 1, -1, 2**23 - 1, -(2**23), 12345, -54321]
    order = "big" if big_endian else "little"
    raw = np.frombuffer(b"".join(v.to_bytes(3, order, signed=True) for v in values), dtype=np.uint8)
    got = loops.int24_to_float(raw, 2.0**-23, big_endian=big_endian)
    np.testing.assert_array_equal(got, np.array(values, dtype=np.float64) * 2.0**-23)
    np.testing.assert_array_equal(loops._int24_numpy(raw, 2.0**-23, big_endian), got)


def test_numba_is_used_when_importable_and_can_be_switched_off() -> None:
    # numba is a dependency, so the compiled loops are active; TWINPASS_JIT=0 selects the
    # numpy loops (checked in a fresh interpreter, since the choice is made on first use).
    import subprocess
    import sys

    pytest.importorskip("numba")
    if __import__("os").environ.get("TWINPASS_JIT", "1") == "0":
        pytest.skip("the compiled loops are switched off in this environment")
    assert loops.jit_enabled()
    code = "from twinpass.core import loops; print(loops.jit_enabled())"
    env = {**__import__("os").environ, "TWINPASS_JIT": "0"}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_welch_segment_loops_match_numpy(dtype: type) -> None:
    # Reference: numpy's mean, product and complex arithmetic (the fallback loops are the
    # plain numpy expressions): constant detrend and window, then the sums of |X|^2,
    # |Y|^2 and conj(X) Y.
    rng = np.random.default_rng(11)
    v = rng.standard_normal((3000, 5)) * [1.0, 10.0, 1e-3, 5.0, 1.0] + [0.0, 3.0, -1.0, 100.0, 0.0]
    window = signal.get_window("hann", 1024).astype(dtype)
    out = np.empty((5, 1024), dtype)
    loops.segment_rows(v, 700, window, out)
    seg = v[700:1724]
    want = ((seg - seg.mean(axis=0)) * window.astype(np.float64)[:, None]).T
    tol = 1e-12 if dtype is np.float64 else 1e-5
    np.testing.assert_allclose(out, want, rtol=tol, atol=tol * np.abs(want).max())
    # Linear detrend: scipy.signal.detrend(type="linear") removes each column's least-squares
    # line; a steep ramp on top of the offsets shows a missing or wrong slope at once.
    ramped = v + np.arange(3000)[:, None] * [0.5, -2.0, 1e-4, 0.0, 3.0]
    seg = ramped[700:1724]
    want = (signal.detrend(seg, axis=0, type="linear") * window.astype(np.float64)[:, None]).T
    for impl in (loops.segment_rows, lambda *a, linear: loops._segment_rows_numpy(*a, 1)):
        got = np.empty((5, 1024), dtype)
        impl(ramped, 700, window, got, linear=True)
        np.testing.assert_allclose(got, want, rtol=tol, atol=tol * np.abs(want).max())
    # Window-weighted line: numpy.polyfit with weights sqrt(window) (it minimises the sum of
    # (w_i r_i)^2 for weights w_i) fits the line minimising sum(window_i r_i^2).
    u = np.arange(1024) - 511.5
    weights = np.sqrt(window.astype(np.float64))
    line = np.stack([np.polyval(np.polyfit(u, seg[:, c], 1, w=weights), u) for c in range(5)], axis=1)
    want = ((seg - line) * window.astype(np.float64)[:, None]).T
    for impl in (loops.segment_rows, lambda *a, weighted: loops._segment_rows_numpy(*a, 2)):
        got = np.empty((5, 1024), dtype)
        impl(ramped, 700, window, got, weighted=True)
        np.testing.assert_allclose(got, want, rtol=tol, atol=tol * np.abs(want).max())
    with pytest.raises(ValueError, match="outside"):
        loops.segment_rows(v, 2000, window, out)
    cx = np.conj(np.fft.rfft(out, axis=1))
    sy = np.fft.rfft(out[::-1], axis=1)
    sums = [np.ones((5, 513)), np.zeros((5, 513)), np.zeros((5, 513), dtype=complex)]
    loops.spectra_sums(cx, sy, *sums)
    a, b = cx.astype(complex), sy.astype(complex)
    np.testing.assert_allclose(sums[0], 1.0 + np.abs(a) ** 2, rtol=1e-12)
    np.testing.assert_allclose(sums[1], np.abs(b) ** 2, rtol=1e-12)
    np.testing.assert_allclose(sums[2], a * b, rtol=1e-12)
    fallback = [np.ones((5, 513)), np.zeros((5, 513)), np.zeros((5, 513), dtype=complex)]
    loops._spectra_sums_numpy(cx, sy, *fallback, np.zeros((0, 0)), np.zeros((0, 0)))
    for got, ref in zip(sums, fallback):
        np.testing.assert_allclose(got, ref, rtol=1e-12)
    # With the fourth powers asked for, compiled and numpy loops alike: |X|^4 and |Y|^4
    # (numpy.abs) added beside the same sums.
    for impl in (loops.spectra_sums, lambda *a, squares: loops._spectra_sums_numpy(*a, *squares)):
        fourth = (np.full((5, 513), 2.0), np.zeros((5, 513)))
        again = [np.zeros((5, 513)), np.zeros((5, 513)), np.zeros((5, 513), dtype=complex)]
        impl(cx, sy, *again, squares=fourth)
        np.testing.assert_allclose(fourth[0], 2.0 + np.abs(a) ** 4, rtol=1e-12)
        np.testing.assert_allclose(fourth[1], np.abs(b) ** 4, rtol=1e-12)
        np.testing.assert_allclose(again[1], np.abs(b) ** 2, rtol=1e-12)
