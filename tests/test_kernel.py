"""Block kernel: stitched blocks against whole-signal two-pass filtering.

Reference library: scipy.signal (``sosfiltfilt`` / ``filtfilt`` on the whole segment, with
the same ``padtype``/``padlen``), and numpy.pad for the end extensions.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import signal

from twinpass.core import kernel
from twinpass.core.effective import effective_length
from twinpass.core.kernel import (
    autocorrelation,
    block_window,
    extend,
    filtfilt_window,
    resolve_edge_samples,
    unit_steady_state,
)
from twinpass.errors import KernelError

FS = 1000.0
EDGES = ("odd", "even", "constant", "none")
DTYPES = (np.int16, np.int32, np.float32, np.float64)


def _padtype(edge: str) -> str | None:
    return None if edge == "none" else edge


def make_signal(n: int, channels: int, dtype: type, seed: int = 0) -> np.ndarray:
    """DC offset + noise + tones + a step, scaled to the dtype's range (time-major)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    cols = []
    for c in range(channels):
        x = (
            0.4 * (c + 1)
            + 0.2 * rng.standard_normal(n)
            + 0.3 * np.sin(2 * np.pi * (7 + 11 * c) * t)
            + 0.2 * np.sin(2 * np.pi * 150 * t + c)
            + 0.2 * (t > t[n // 3])
        )
        cols.append(x)
    x = np.stack(cols, axis=1)
    if np.issubdtype(dtype, np.integer):
        scale = 0.45 * np.iinfo(dtype).max / np.abs(x).max()
        return np.round(x * scale).astype(dtype)
    return (x * 1000.0).astype(dtype)


def stitched(
    x: np.ndarray,
    *,
    block: int,
    halo: int,
    edge: str,
    edge_samples: int,
    sos: np.ndarray | None = None,
    taps: np.ndarray | None = None,
) -> np.ndarray:
    """Filter ``x`` block by block with block_window + filtfilt_window and concatenate."""
    n = x.shape[0]
    out = []
    for start in range(0, n, block):
        stop = min(n, start + block)
        ws, we, at_start, at_end = block_window(start, stop, n, halo, edge_samples)
        out.append(
            filtfilt_window(
                x[ws:we],
                sos=sos,
                taps=taps,
                core_start=start - ws,
                core_stop=stop - ws,
                at_start=at_start,
                at_end=at_end,
                edge=edge,
                edge_samples=edge_samples,
            )
        )
    return np.concatenate(out, axis=0)


DESIGNS = {
    "butter": lambda kind, wn: signal.butter(4, wn, kind, fs=FS, output="sos"),
    "cheby1": lambda kind, wn: signal.cheby1(4, 0.5, wn, kind, fs=FS, output="sos"),
    "cheby2": lambda kind, wn: signal.cheby2(4, 50, wn, kind, fs=FS, output="sos"),
    "ellip": lambda kind, wn: signal.ellip(4, 0.5, 50, wn, kind, fs=FS, output="sos"),
}
KIND_EDGES = {
    "lowpass": 40.0,
    "highpass": 5.0,
    "bandpass": (5.0, 40.0),
    "bandstop": (45.0, 60.0),
}
CASES = list(itertools.product(DESIGNS, KIND_EDGES))


@pytest.mark.parametrize("index", range(len(CASES)), ids=[f"{f}-{k}" for f, k in CASES])
def test_stitched_blocks_match_sosfiltfilt(index: int) -> None:
    family, kind = CASES[index]
    sos = DESIGNS[family](kind, KIND_EDGES[kind])
    n = 12000
    # Cycle the other dimensions so every value appears across the cases.
    for j, edge in enumerate(EDGES):
        k = index + j
        tol = (1e-6, 1e-9)[k % 2]
        dtype = DTYPES[k % 4]
        channels = (1, 3, 8, 2)[(index // 2 + j) % 4]
        halo = effective_length(sos=sos, tolerance=tol)
        edge_samples = resolve_edge_samples("auto" if k % 3 else 27, halo, n, edge=edge)
        x = make_signal(n, channels, dtype, seed=index)
        x64 = x.astype(np.float64)
        # Reference: scipy.signal.sosfiltfilt on the whole segment, in float64.
        ref = signal.sosfiltfilt(sos, x64, axis=0, padtype=_padtype(edge), padlen=edge_samples)
        bound = tol * np.abs(x64).max()
        for block in (max(halo // 8, n // 150), 3 * halo + 7, n):
            y = stitched(x, sos=sos, block=block, halo=halo, edge=edge, edge_samples=edge_samples)
            assert y.shape == x.shape and y.dtype == np.float64
            err = np.abs(y - ref).max()
            assert err <= bound, (family, kind, edge, tol, block, err / np.abs(x64).max())


@pytest.mark.parametrize("edge", ["odd", "constant"])
def test_very_low_highpass_stitched(edge: str) -> None:
    # 0.1 Hz high-pass at 1 kHz: effective length ~1e5 samples.
    sos = signal.butter(4, 0.1, "highpass", fs=FS, output="sos")
    tol = 1e-9
    halo = effective_length(sos=sos, tolerance=tol)
    n = 230_000
    x = make_signal(n, 2, np.float32, seed=5)
    x64 = x.astype(np.float64)
    edge_samples = resolve_edge_samples("auto", halo, n, edge=edge)
    # Reference: scipy.signal.sosfiltfilt on the whole segment.
    ref = signal.sosfiltfilt(sos, x64, axis=0, padtype=edge, padlen=edge_samples)
    for block in (20_000, 70_000):
        y = stitched(x, sos=sos, block=block, halo=halo, edge=edge, edge_samples=edge_samples)
        assert np.abs(y - ref).max() <= tol * np.abs(x64).max()


@pytest.mark.parametrize("edge", EDGES)
@pytest.mark.parametrize("edge_samples", [0, 27, 500, 19_999])
def test_whole_window_equals_sosfiltfilt(edge: str, edge_samples: int) -> None:
    # A window covering the whole segment is scipy.signal.sosfiltfilt, bit for bit: the
    # same extension, the same steady-state initial conditions and sosfilt's operations in
    # sosfilt's order (twinpass.core.loops). 5 channels: one group of four plus a lone one.
    sos = signal.ellip(6, 0.5, 60, (20, 90), "bandpass", fs=FS, output="sos")
    x = make_signal(20_000, 5, np.float64, seed=2)
    ref = signal.sosfiltfilt(sos, x, axis=0, padtype=_padtype(edge), padlen=edge_samples)
    y = filtfilt_window(
        x, sos=sos, core_start=0, core_stop=x.shape[0], at_start=True, at_end=True,
        edge=edge, edge_samples=edge_samples,
    )
    np.testing.assert_array_equal(y, ref)
    # A sub-span of the core gives the same samples.
    part = filtfilt_window(
        x, sos=sos, core_start=123, core_stop=4567, at_start=True, at_end=True,
        edge=edge, edge_samples=edge_samples,
    )
    np.testing.assert_array_equal(part, ref[123:4567])


def test_one_dimensional_window() -> None:
    # 1-D input is one channel; reference scipy.signal.sosfiltfilt.
    sos = signal.butter(3, 30, fs=FS, output="sos")
    x = make_signal(3000, 1, np.int16)[:, 0]
    y = filtfilt_window(
        x, sos=sos, core_start=0, core_stop=3000, at_start=True, at_end=True, edge_samples=50
    )
    assert y.shape == (3000,)
    ref = signal.sosfiltfilt(sos, x.astype(float), padlen=50)
    np.testing.assert_allclose(y, ref, rtol=0, atol=1e-12 * np.abs(x).max())


@pytest.mark.parametrize("mode", ["odd", "even", "constant", "none"])
@pytest.mark.parametrize("n", [0, 1, 5, 9])
def test_extend_matches_numpy_pad(mode: str, n: int) -> None:
    # numpy.pad: odd = reflect/odd, even = reflect (no repeat of the end sample), constant = edge.
    x = np.arange(10.0)[:, None] ** 2 + np.array([[0.0, 1.0]])
    y = extend(x, n, mode)
    if mode == "none":
        ref = x
    elif mode == "odd":
        ref = np.pad(x, ((n, n), (0, 0)), mode="reflect", reflect_type="odd")
    elif mode == "even":
        ref = np.pad(x, ((n, n), (0, 0)), mode="reflect")
    else:
        ref = np.pad(x, ((n, n), (0, 0)), mode="edge")
    np.testing.assert_array_equal(y, ref)


@pytest.mark.parametrize("mode", ["odd", "even", "constant"])
@pytest.mark.parametrize("dtype", DTYPES)
def test_extend_is_exact_for_every_input_dtype(mode: str, dtype: type) -> None:
    # Reference: scipy.signal._arraytools.odd_ext / even_ext / const_ext (the end extensions
    # sosfiltfilt applies), run on a float64 copy: on int16 itself odd_ext wraps around
    # (2 * 30000 - (-30000) gives 24464). Values at the ends of the dtype's range make
    # 2 * x[0] - x[k] leave it; the extension must be exact, in float64.
    from scipy.signal._arraytools import const_ext, even_ext, odd_ext

    big = np.iinfo(dtype).max if np.issubdtype(dtype, np.integer) else 0.9 * np.finfo(np.float32).max
    x = np.array([[1.0, -1.0], [-1.0, 1.0], [0.0, 0.5], [0.25, -0.25], [-1.0, 1.0]]) * big
    x = x.astype(dtype)
    reference = {"odd": odd_ext, "even": even_ext, "constant": const_ext}[mode]
    for n in (1, 2, 4):
        y = extend(x, n, mode)
        assert y.dtype == np.float64
        np.testing.assert_array_equal(y, reference(x.astype(np.float64), n, axis=0))
    # the case of the int16 overflow: 2 * 30000 - (-30000) = 90000
    if mode == "odd" and dtype is np.int16:
        assert extend(np.array([[30000], [-30000], [0]], dtype=np.int16), 1, "odd")[0, 0] == 90000


def test_extend_rejects_too_long_reflection() -> None:
    # scipy.signal's odd/even extensions need n <= len - 1 (their own validation).
    with pytest.raises(KernelError, match="at least 11 samples"):
        extend(np.zeros((10, 1)), 10, "odd")
    with pytest.raises(KernelError, match="unknown end extension"):
        extend(np.zeros((10, 1)), 1, "wrap")


def test_resolve_edge_samples_respects_scipy_limit() -> None:
    sos = signal.butter(2, 10, fs=FS, output="sos")
    x = np.ones(100)
    n = resolve_edge_samples("auto", 5000, 100)
    assert n == 99
    # scipy.signal.sosfiltfilt accepts padlen = n and rejects n + 1 (needs padlen < len).
    signal.sosfiltfilt(sos, x, padlen=n)
    with pytest.raises(ValueError):
        signal.sosfiltfilt(sos, x, padlen=n + 1)
    assert resolve_edge_samples("auto", 40, 100) == 40
    assert resolve_edge_samples(27, 40, 100) == 27
    assert resolve_edge_samples(500, 40, 100) == 99
    assert resolve_edge_samples("auto", 40, 100, edge="none") == 0
    with pytest.raises(KernelError):
        resolve_edge_samples(-1, 40, 100)
    with pytest.raises(KernelError):
        resolve_edge_samples("all", 40, 100)


@pytest.mark.parametrize(
    "start, stop, length, halo, edge",
    [(0, 10, 1000, 50, 200), (500, 510, 1000, 50, 200), (990, 1000, 1000, 5, 300),
     (0, 1000, 1000, 0, 999), (400, 600, 1000, 800, 10), (30, 40, 100, 0, 0)],
)
def test_block_window_contract(start: int, stop: int, length: int, halo: int, edge: int) -> None:
    ws, we, at_start, at_end = block_window(start, stop, length, halo, edge)
    # Core plus halo, clipped to the segment, lies inside the window.
    assert ws <= max(0, start - halo) and we >= min(length, stop + halo)
    assert at_start == (ws == 0) and at_end == (we == length)
    # At a segment end the extension's edge_samples + 1 samples are inside the window
    # (scipy.signal's odd/even extensions read x[1..n] next to the end sample).
    if at_start:
        assert we >= edge + 1
    if at_end:
        assert length - ws >= edge + 1
    # Elsewhere the window is core + halo, widened only for the other end's extension.
    if not at_start:
        assert ws == min(start - halo, length - edge - 1 if at_end else length)
    if not at_end:
        assert we == max(stop + halo, edge + 1 if at_start else 0)


def test_block_window_rejects_bad_spans() -> None:
    with pytest.raises(KernelError):
        block_window(10, 10, 100, 5, 0)
    with pytest.raises(KernelError):
        block_window(0, 101, 100, 5, 0)
    with pytest.raises(KernelError, match="resolve_edge_samples"):
        block_window(0, 10, 100, 5, 100)


def test_window_too_short_for_edge_samples() -> None:
    sos = signal.butter(2, 10, fs=FS, output="sos")
    with pytest.raises(KernelError, match=r"50 samples.*at least 101"):
        filtfilt_window(
            np.ones((50, 1)), sos=sos, core_start=0, core_stop=10, at_start=True,
            at_end=False, edge="odd", edge_samples=100,
        )


def test_filtfilt_window_validates_arguments() -> None:
    sos = signal.butter(2, 10, fs=FS, output="sos")
    w = np.ones((50, 2))
    common = dict(at_start=False, at_end=False, edge_samples=0)
    with pytest.raises(KernelError, match="exactly one"):
        filtfilt_window(w, core_start=0, core_stop=10, **common)
    with pytest.raises(KernelError, match="exactly one"):
        filtfilt_window(w, sos=sos, taps=np.ones(3), core_start=0, core_stop=10, **common)
    with pytest.raises(KernelError, match="core"):
        filtfilt_window(w, sos=sos, core_start=40, core_stop=60, **common)
    with pytest.raises(KernelError, match="shape"):
        filtfilt_window(np.ones((5, 2, 2)), sos=sos, core_start=0, core_stop=5, **common)
    with pytest.raises(KernelError, match="sos"):
        filtfilt_window(w, sos=np.ones((2, 5)), core_start=0, core_stop=5, **common)


# --- FIR ------------------------------------------------------------------------------


def test_fir_two_passes_equal_one_convolution_with_autocorrelation() -> None:
    # Time reversal: h then reversed h is one convolution with conv(h, h[::-1]).
    rng = np.random.default_rng(3)
    h = signal.firwin(151, 40, fs=FS)
    x = rng.standard_normal(5000)
    forward = signal.lfilter(h, [1.0], np.concatenate([x, np.zeros(300)]))
    two_pass = signal.lfilter(h, [1.0], forward[::-1])[::-1]
    g = autocorrelation(h)
    assert g.shape == (2 * h.size - 1,)
    one_conv = np.convolve(x, g)
    # Output of the two passes at n corresponds to one_conv at n + (M - 1).
    np.testing.assert_allclose(two_pass[: 5000 - 150], one_conv[150:5000], rtol=0, atol=1e-12)
    # Its frequency response is |H|^2 with a linear phase of M - 1 samples (scipy.signal.freqz).
    w, hg = signal.freqz(g, worN=512)
    _, hh = signal.freqz(h, worN=512)
    np.testing.assert_allclose(hg * np.exp(1j * w * 150), np.abs(hh) ** 2, atol=1e-12)


@pytest.mark.parametrize("taps_count, fft_path", [(101, False), (1001, False), (1001, True)])
@pytest.mark.parametrize("edge", EDGES)
def test_fir_blockwise_equals_filtfilt(
    taps_count: int, fft_path: bool, edge: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    if fft_path:
        # Route every FIR pass through the FFT convolution instead of lfilter.
        monkeypatch.setattr(kernel, "_LFILTER_MAX_WORK", 0)
    h = signal.firwin(taps_count, 60, fs=FS)
    n = 30_000
    x = make_signal(n, 3, np.float64, seed=4)
    halo = effective_length(taps=h)
    assert halo == taps_count - 1
    edge_samples = (0, 200, taps_count - 1, 5000)[EDGES.index(edge)]
    # Reference: scipy.signal.filtfilt(taps, [1.0], ...) on the whole signal.
    ref = signal.filtfilt(h, [1.0], x, axis=0, padtype=_padtype(edge), padlen=edge_samples)
    for block in (37 if taps_count < 1000 else 300, 4096, 11_111, n):
        y = stitched(x, taps=h, block=block, halo=halo, edge=edge, edge_samples=edge_samples)
        assert np.abs(y - ref).max() <= 1e-12 * np.abs(x).max(), (block, edge)


def test_fir_short_halo_falls_back_to_steady_state() -> None:
    # With less than M - 1 samples of halo the FIR behaves like any recursive filter: at a
    # cut inside the segment the missing history is stood in for by the steady-state initial
    # condition, as scipy.signal.filtfilt(padtype=None) does at both ends of what it is given
    # (lfilter_zi scaled by the first sample, then by the forward output's last sample).
    # So each block must equal scipy.signal.filtfilt run on its own window (with the odd
    # extension where the window touches a segment end, built by scipy's odd_ext) to rounding,
    # the 1e-12 x max|x| of test_fir_blockwise_equals_filtfilt; and differ from the whole
    # signal's filtfilt by far more, since 100 of the 200 samples each pass reaches are missing.
    from scipy.signal._arraytools import odd_ext

    h = signal.firwin(201, 60, fs=FS)
    n, block, halo, edge_samples = 6000, 1000, 100, 200
    x = make_signal(n, 2, np.float64, seed=6)
    y = stitched(x, taps=h, block=block, halo=halo, edge="odd", edge_samples=edge_samples)
    padded = odd_ext(x, edge_samples, axis=0)  # padded[i + edge_samples] = x[i]
    per_window = []
    for start in range(0, n, block):
        ws, we, at_start, at_end = block_window(start, start + block, n, halo, edge_samples)
        lo, hi = ws + (0 if at_start else edge_samples), we + (2 * edge_samples if at_end else edge_samples)
        out = signal.filtfilt(h, [1.0], padded[lo:hi], axis=0, padtype=None)
        offset = start - ws + (edge_samples if at_start else 0)
        per_window.append(out[offset : offset + block])
    scale = np.abs(x).max()
    assert np.abs(y - np.concatenate(per_window)).max() <= 1e-12 * scale
    whole = signal.filtfilt(h, [1.0], x, axis=0, padlen=edge_samples)
    assert np.abs(y - whole).max() > 1e-3 * scale  # 2.3e-2 measured: the halo is too short


@pytest.mark.parametrize("taps_count", [2, 7, 64])
def test_fir_unit_steady_state_matches_lfilter_zi(taps_count: int) -> None:
    # Reference: scipy.signal.lfilter_zi(b, [1.0]) (solves the steady-state system).
    h = np.random.default_rng(taps_count).standard_normal(taps_count)
    np.testing.assert_allclose(
        unit_steady_state(taps=h), signal.lfilter_zi(h, [1.0]), rtol=1e-12, atol=1e-14
    )
    sos = signal.cheby1(5, 1, 0.2, output="sos")
    np.testing.assert_array_equal(unit_steady_state(sos=sos), signal.sosfilt_zi(sos))


def test_single_tap_fir_is_a_squared_gain() -> None:
    # A one-tap filter run twice multiplies by h0^2 (definition of the two passes; scipy's
    # lfilter_zi does not accept a single tap, so there is no library reference here).
    x = make_signal(500, 2, np.float64)
    assert unit_steady_state(taps=np.array([0.5])).shape == (0,)
    for at_start, at_end in [(True, True), (False, False)]:
        y = filtfilt_window(
            x, taps=np.array([0.5]), core_start=100, core_stop=400, at_start=at_start,
            at_end=at_end, edge_samples=20,
        )
        np.testing.assert_allclose(y, 0.25 * x[100:400], rtol=1e-15)
