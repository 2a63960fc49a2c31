"""Effective length (halo) of two-pass filtering.

References: the FIR support length (M - 1 per side, from the length 2M - 1 autocorrelation);
the pole-radius estimate n = ln(tol) / ln(r) (common practice); scipy.signal.sosfiltfilt on
the whole signal for the halo's actual error; impulse responses computed by
scipy.signal.sosfilt for brute-force lengths (:func:`brute_force_lengths`).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from twinpass.core.effective import ERROR_FACTOR, dominant_pole_radius, effective_length
from twinpass.core.kernel import block_window, filtfilt_window
from twinpass.errors import DesignError

FS = 1000.0


def pole_estimate(sos: np.ndarray, tol: float) -> float:
    """Common practice: samples until r^n falls to the tolerance."""
    return math.log(tol) / math.log(dominant_pole_radius(sos))


def brute_force_lengths(sos: np.ndarray, tol: float) -> tuple[int, int, float]:
    """Halo lengths (samples per side) from impulse responses computed by scipy.signal.sosfilt.

    Returns
    -------
    defined : int
        The smallest ``L`` with ``ERROR_FACTOR * ||h||_1 * T(L) <= tol``, where ``h`` is one
        pass's impulse response and ``T(L) = sum_{k>=L} |h[k]|`` (the definition stated in
        ``twinpass.core.effective``, one pass, one-sided, relative to max|input|), by summing
        a long enough ``h`` outright.
    two_pass : int
        The smallest ``L`` whose two-sided tail ``sum_{|k|>L} |g[k]|`` of the two-pass
        impulse response ``g`` (forward sosfilt of an impulse, then sosfilt backward) is at
        most ``tol``: the least halo for which truncating ``g`` alone stays within ``tol``.
    tail_at : float
        ``sum_{|k|>L} |g[k]|`` at ``L = defined``.
    """
    n = int(4 * pole_estimate(sos, tol)) + 4096
    impulse = np.zeros(2 * n + 1)
    impulse[n] = 1.0
    h = signal.sosfilt(sos, impulse[n:])
    magnitude = np.abs(h)
    tails = np.append(np.cumsum(magnitude[::-1])[::-1], 0.0)  # tails[L] = T(L)
    # the part of h left out must be far too small to move the crossing
    assert ERROR_FACTOR * magnitude.sum() * tails[-(n // 10)] < 1e-6 * tol
    defined = int(np.argmax(ERROR_FACTOR * magnitude.sum() * tails <= tol))
    g = signal.sosfilt(sos, signal.sosfilt(sos, impulse)[::-1])[::-1]  # g[n + k], k = -n..n
    by_lag = np.abs(g[n:]) + np.append(0.0, np.abs(g[:n][::-1]))  # |g[k]| + |g[-k]|, k = 0..n
    beyond = np.append(np.cumsum(by_lag[::-1])[::-1][1:], 0.0)  # beyond[L] = sum_{|k|>L} |g[k]|
    return defined, int(np.argmax(beyond <= tol)), float(beyond[defined])


def definition_slack(sos: np.ndarray) -> int:
    """Samples by which effective_length may exceed the brute-force ``defined`` length.

    It stops computing ``h`` once its estimate of the uncomputed tail is below 1e-3 of the
    threshold and adds that estimate, which can lower the threshold by 0.1 %: the crossing of
    a tail decaying like r^L moves by at most ln(1.001) / -ln(r) samples, plus one for the
    rounding of the sums.
    """
    return math.ceil(math.log(1.001) / -math.log(dominant_pole_radius(sos))) + 1


IIR_DESIGNS = {
    "high-Q notch": lambda: signal.tf2sos(*signal.iirnotch(50.0, 100.0, fs=FS)),
    "narrow elliptic band-pass": lambda: signal.ellip(4, 0.5, 60, (99.0, 101.0), "bandpass", fs=FS, output="sos"),
    "Chebyshev band-stop": lambda: signal.cheby1(4, 0.5, (45.0, 55.0), "bandstop", fs=FS, output="sos"),
    "Chebyshev II high-pass": lambda: signal.cheby2(6, 60, 20.0, "highpass", fs=FS, output="sos"),
    "Butterworth high-pass 0.5 Hz": lambda: signal.butter(4, 0.5, "highpass", fs=FS, output="sos"),
}


@pytest.mark.parametrize("name", list(IIR_DESIGNS))
@pytest.mark.parametrize("tol", [1e-6, 1e-9])
def test_effective_length_against_brute_force(name: str, tol: float) -> None:
    sos = IIR_DESIGNS[name]()
    length = effective_length(sos=sos, tolerance=tol)
    defined, two_pass, tail = brute_force_lengths(sos, tol)
    # The documented definition, summed outright from scipy.signal.sosfilt's impulse response.
    assert defined <= length <= defined + definition_slack(sos), (length, defined)
    # At least the two-pass minimum; its two-sided tail there is at most 2 ||h||_1 T(L) <=
    # 2 tol / ERROR_FACTOR (g[k] = sum_j h[j] h[j + k] for k >= 0, and g is symmetric).
    assert length >= two_pass and tail <= 2 * tol / ERROR_FACTOR, (length, two_pass, tail)
    # Not wildly larger: the definition's margin ERROR_FACTOR * ||h||_1 (effective.py's error
    # analysis) costs about ln(ERROR_FACTOR ||h||_1^2) / -ln(r) samples over a two-pass minimum
    # of about ln(1 / tol) / -ln(r): a third of it or less for ||h||_1 <= 5 and tol <= 1e-6
    # (1.15 to 1.31 times measured here). 1.5 times allows that; a doubled halo fails.
    assert length <= 1.5 * two_pass, (length, two_pass)


@pytest.mark.parametrize("taps_count", [1, 2, 31, 1000])
def test_fir_effective_length_is_taps_minus_one(taps_count: int) -> None:
    # conv(h, h[::-1]) has 2M - 1 samples centred on lag 0: M - 1 per side.
    taps = np.ones(taps_count) / taps_count
    assert effective_length(taps=taps, tolerance=1e-6) == taps_count - 1
    assert effective_length(taps=taps, tolerance=1e-12) == taps_count - 1


def test_dominant_pole_radius_known_values() -> None:
    # A first-order section y[n] = x[n] + 0.9 y[n-1] has its pole at 0.9 (textbook).
    assert dominant_pole_radius(np.array([[1.0, 0, 0, 1.0, -0.9, 0]])) == pytest.approx(0.9)
    # Butterworth: radius from numpy.roots of the transfer-function denominator.
    b, a = signal.butter(4, 0.1)
    sos = signal.butter(4, 0.1, output="sos")
    assert dominant_pole_radius(sos) == pytest.approx(np.abs(np.roots(a)).max(), rel=1e-9)


def test_grows_as_cutoff_falls_and_tracks_pole_estimate() -> None:
    lengths = []
    for fc in (30.0, 10.0, 3.0, 1.0, 0.3):
        sos = signal.butter(4, fc, "highpass", fs=FS, output="sos")
        n = effective_length(sos=sos, tolerance=1e-9)
        est = pole_estimate(sos, 1e-9)
        # Same order as the pole-radius estimate (common practice), a little above it
        # because of the ||h||_1 safety factor and the slower-than-r^n onset.
        assert est <= n <= 2.0 * est, (fc, n, est)
        lengths.append(n)
    assert lengths == sorted(lengths) and lengths[-1] > 50 * lengths[0]


def test_log_linear_in_tolerance() -> None:
    sos = signal.cheby1(4, 0.5, (2.0, 40.0), "bandpass", fs=FS, output="sos")
    tols = (1e-4, 1e-6, 1e-8, 1e-10, 1e-12)
    lengths = [effective_length(sos=sos, tolerance=t) for t in tols]
    steps = np.diff(lengths)
    # Each factor 100 in tolerance adds about ln(100) / -ln(r) samples (geometric decay, r^n).
    expected = math.log(100.0) / -math.log(dominant_pole_radius(sos))
    assert np.all(steps > 0)
    np.testing.assert_allclose(steps, expected, rtol=0.25)


def _stitched_error(x: np.ndarray, sos: np.ndarray, halo: int, block: int, edge_samples: int) -> float:
    n = x.shape[0]
    # Reference: scipy.signal.sosfiltfilt on the whole signal.
    ref = signal.sosfiltfilt(sos, x, axis=0, padtype="odd", padlen=edge_samples)
    err = 0.0
    for start in range(0, n, block):
        stop = min(n, start + block)
        ws, we, a, b = block_window(start, stop, n, halo, edge_samples)
        y = filtfilt_window(
            x[ws:we], sos=sos, core_start=start - ws, core_stop=stop - ws, at_start=a,
            at_end=b, edge="odd", edge_samples=edge_samples,
        )
        err = max(err, float(np.abs(y - ref[start:stop]).max()))
    return err / float(np.abs(x).max())


@pytest.mark.parametrize(
    "design",
    [
        lambda: signal.butter(4, 2.0, "highpass", fs=FS, output="sos"),
        lambda: signal.butter(4, (5.0, 40.0), "bandpass", fs=FS, output="sos"),
        lambda: signal.ellip(3, 1, 40, 20.0, "lowpass", fs=FS, output="sos"),
    ],
)
@pytest.mark.parametrize("tol", [1e-6, 1e-9])
def test_halo_meets_tolerance_and_half_of_it_does_not(design, tol: float) -> None:
    sos = design()
    halo = effective_length(sos=sos, tolerance=tol)
    n = 10 * halo
    t = np.arange(n)
    # Adversarial step-like signal: a square wave whose edges fall everywhere relative to
    # the block boundaries.
    x = np.sign(np.sin(2 * np.pi * t / (0.77 * halo)))[:, None] + 0.5
    block = halo // 3
    assert _stitched_error(x, sos, halo, block, halo) <= tol
    # Not wildly oversized: half the halo misses the tolerance.
    assert _stitched_error(x, sos, halo // 2, block, halo) > tol


def test_very_long_filter_is_computed() -> None:
    # 0.1 Hz high-pass at 30 kHz: effective length of millions of samples.
    sos = signal.butter(4, 0.1, "highpass", fs=30_000.0, output="sos")
    n = effective_length(sos=sos, tolerance=1e-9)
    est = pole_estimate(sos, 1e-9)
    assert 1e6 < n and est <= n <= 2.0 * est


def test_extrapolation_beyond_computed_length_is_conservative() -> None:
    sos = signal.butter(4, 0.5, "highpass", fs=FS, output="sos")
    capped = effective_length(sos=sos, tolerance=1e-9, max_computed_length=4096)
    defined, _, _ = brute_force_lengths(sos, 1e-9)  # 20431 samples, summed outright (scipy)
    # The tail extrapolated from the pole radius (with a margin for repeated poles) beyond
    # the 4096 samples computed must not undercut the length summed outright, and stays of
    # the same order.
    assert 4096 < defined <= capped <= 2.0 * defined, (defined, capped)


def test_first_order_section_closed_form() -> None:
    # h[k] = (1 - a) a^k: ||h||_1 = 1, T(n) = a^n, so the bound 10 T(L) <= tol gives
    # L = ceil(ln(tol / 10) / ln(a)) (geometric series).
    a = 0.99
    sos = np.array([[1 - a, 0, 0, 1.0, -a, 0]])
    expected = math.ceil(math.log(1e-9 / 10) / math.log(a))
    assert abs(effective_length(sos=sos, tolerance=1e-9) - expected) <= 1


def test_unstable_filter_is_rejected() -> None:
    # |p| >= 1: not BIBO stable (textbook criterion).
    with pytest.raises(DesignError, match="unstable"):
        effective_length(sos=np.array([[1.0, 0, 0, 1.0, -1.0, 0]]))
    with pytest.raises(DesignError, match="unstable"):
        effective_length(sos=np.array([[1.0, 0, 0, 1.0, -2.0, 1.01]]))


def test_argument_errors() -> None:
    sos = signal.butter(2, 0.2, output="sos")
    with pytest.raises(DesignError, match="exactly one"):
        effective_length()
    with pytest.raises(DesignError, match="exactly one"):
        effective_length(sos=sos, taps=np.ones(3))
    with pytest.raises(DesignError, match="tolerance"):
        effective_length(sos=sos, tolerance=0.0)
    with pytest.raises(DesignError, match="shape"):
        effective_length(sos=np.ones((2, 5)))


def _two_pass(sos: np.ndarray, x: np.ndarray, dtype: type) -> np.ndarray:
    """Forward-backward filtering in ``dtype`` from steady-state initial conditions
    (scipy.signal.sosfilt_zi scaled by the first sample, as scipy.signal.sosfiltfilt does)."""
    s, xd = sos.astype(dtype), x.astype(dtype)
    zi = signal.sosfilt_zi(sos).astype(dtype)
    y, _ = signal.sosfilt(s, xd, zi=zi * xd[0])
    y, _ = signal.sosfilt(s, y[::-1], zi=zi * y[-1])
    return y[::-1]


@pytest.mark.skipif(np.finfo(np.longdouble).eps > 1e-18, reason="needs an extended-precision long double")
@pytest.mark.parametrize("name, sos", [
    ("Butterworth high-pass, 1 - r = 8.9e-5", signal.butter(2, 4e-5, "highpass", output="sos")),
    ("elliptic high-pass, 1 - r = 8.0e-5", signal.ellip(4, 0.5, 40, 2e-4, "highpass", output="sos")),
    ("elliptic band-pass, 1 - r = 3.1e-3", signal.ellip(4, 0.5, 30, [0.01, 0.3], "bandpass", output="sos")),
])
def test_rounding_estimate_bounds_float64_against_extended_precision(name: str, sos: np.ndarray) -> None:
    # Reference: the same two-pass filtering by scipy.signal.sosfilt in np.longdouble (x86-64
    # extended precision, 11 more bits than float64), on a signal as long as the halo plus
    # twice its settling. The largest float64 difference must stay below the estimate and,
    # where the estimate is above its floor, within 100 times of it (an estimate, not a
    # loose bound).
    from twinpass.core.effective import ROUNDING_FLOOR, rounding_estimate

    n = max(3 * effective_length(sos=sos, tolerance=1e-9), 200_000)
    rng = np.random.default_rng(0)
    t = np.arange(n)
    x = 0.3 * rng.standard_normal(n) + 0.3 * np.sin(t / 50.0) + 0.2 * (t > n // 2)
    err = np.max(np.abs(_two_pass(sos, x, np.float64) - _two_pass(sos, x, np.longdouble))) / np.max(np.abs(x))
    estimate = rounding_estimate(sos=sos)
    assert err < estimate, (name, err, estimate)
    if estimate > ROUNDING_FLOOR * np.finfo(np.float64).eps:
        assert err > estimate / 100, (name, err, estimate)


NOTCHES = {
    # The notches of twinpass's own design (kind "notch"), poles at the notch frequency.
    "50 Hz, 0.2 Hz wide, at 48 kHz": (50.0, 0.2, 48000.0),
    "50 Hz, 2 Hz wide, at 48 kHz": (50.0, 2.0, 48000.0),
    "1 kHz, 0.5 Hz wide, at 48 kHz": (1000.0, 0.5, 48000.0),
}


@pytest.mark.skipif(np.finfo(np.longdouble).eps > 1e-18, reason="needs an extended-precision long double")
@pytest.mark.parametrize("name", list(NOTCHES))
def test_rounding_estimate_of_notches_follows_the_pole_angle(name: str) -> None:
    # Reference: the same two-pass filtering in np.longdouble (as above), on (a) hum at the
    # notch frequency with noise, a step and a slow sine, and (b) a full-scale tone exactly
    # at the notch frequency, whose period is a whole number of samples: its rounding
    # repeats with the tone and gathers at the resonance, the worst input measured for
    # notches. Poles far from z = 1 amplify rounding far less than (1 - r)**-1.5, so the
    # estimate must bound both differences and stay within 30 times the larger (the former
    # (1 - r)**-1.5 law was 66 to 1300 times above it).
    from twinpass.core.design import design_filter
    from twinpass.core.effective import rounding_estimate
    from twinpass.core.types import ResponseSpec

    f0, width, fs = NOTCHES[name]
    sos = design_filter(ResponseSpec(kind="notch", notch_hz=f0, notch_width_hz=width), fs).sos
    n = 600_000
    t = np.arange(n) / fs
    rng = np.random.default_rng(1)
    signals = {
        "hum, noise, step": 0.3 * np.sin(2 * np.pi * f0 * t) + 0.1 * rng.standard_normal(n)
        + 0.5 * (t > t[n // 2]) + 0.2 * np.sin(2 * np.pi * 0.3 * t),
        "tone at the notch": np.sin(2 * np.pi * f0 * t + 0.3),
    }
    errors = {
        k: float(np.max(np.abs(_two_pass(sos, x, np.float64) - _two_pass(sos, x, np.longdouble))) / np.max(np.abs(x)))
        for k, x in signals.items()
    }
    estimate = rounding_estimate(sos=sos)
    assert max(errors.values()) <= estimate <= 30 * max(errors.values()), (name, errors, estimate)


def test_designs_with_tiny_numerators_do_not_print_scipys_coefficient_warning() -> None:
    # A 4th-order Butterworth band-pass 2 Hz wide at 48 kHz: scipy.signal.sos2zpk warns
    # (BadCoefficients) about its tiny numerators; the warning concerns the zeros only, and
    # twinpass judges the design's conditioning itself, so designing it prints nothing.
    import warnings

    from twinpass.core.design import design_filter
    from twinpass.core.types import ResponseSpec

    spec = ResponseSpec(kind="bandpass", family="butterworth", order=4, cutoff_hz=(99.0, 101.0))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        design_filter(spec, 48000.0, tolerance=1e-9)


# ----------------------------------------------------------------------------- long, sharp cascades


@pytest.mark.skipif(np.finfo(np.longdouble).eps > 1e-18, reason="needs an extended-precision long double")
@pytest.mark.parametrize("order", [28, 32, 35])
def test_rounding_estimate_covers_long_chebyshev1_cascades(order: int) -> None:
    # A Chebyshev I low-pass at 100 Hz, 1 kHz, 0.05 dB ripple per pass (scipy.signal.cheby1):
    # its poles one at a time suggest float64 rounding at the floor (2.2e-12), but the cascade
    # rounds far more. Reference: the same two-pass filtering by scipy.signal.sosfilt in
    # np.longdouble (x86-64 extended precision), from steady state as scipy.signal.sosfiltfilt
    # starts, on inputs unlike the estimate's probe: a full-scale square wave (the input that
    # rounded most in the design's measurements) and noise with a slow sine. The estimate
    # must bound both and stay within 100 times the larger (an estimate, not a loose bound).
    from twinpass.core.effective import analytic_rounding_estimate, rounding_estimate

    sos = signal.cheby1(order, 0.05, 100.0, fs=1000.0, output="sos")
    n = 100_000
    t = np.arange(n)
    rng = np.random.default_rng(3)
    inputs = {
        "square": np.sign(np.sin(2 * np.pi * t / 740.0 + 0.2)),
        "noise, sine": 0.4 * rng.standard_normal(n) + 0.4 * np.sin(t / 300.0),
    }
    errors = {
        k: float(np.max(np.abs(_two_pass(sos, x, np.float64) - _two_pass(sos, x, np.longdouble))) / np.max(np.abs(x)))
        for k, x in inputs.items()
    }
    estimate = rounding_estimate(sos=sos)
    assert analytic_rounding_estimate(sos=sos) < max(errors.values())  # the poles alone miss it
    assert max(errors.values()) < estimate < 100 * max(errors.values()), (order, errors, estimate)


@pytest.mark.parametrize("name, sos", [
    ("Butterworth low-pass, order 8", signal.butter(8, 100.0, fs=1000.0, output="sos")),
    ("Chebyshev I low-pass, order 8", signal.cheby1(8, 0.05, 100.0, fs=1000.0, output="sos")),
    ("Chebyshev II low-pass, order 24", signal.cheby2(24, 60.0, 100.0, fs=1000.0, output="sos")),
    ("elliptic low-pass, order 12", signal.ellip(12, 0.05, 60.0, 100.0, fs=1000.0, output="sos")),
    ("Butterworth high-pass at 2e-6 of the rate", signal.butter(2, 0.002, "highpass", fs=1000.0, output="sos")),
])
def test_rounding_estimate_of_ordinary_designs_is_the_analytic_one(name: str, sos: np.ndarray) -> None:
    # Designs whose poles dominate their rounding keep the analytic estimate exactly (its
    # calibration against extended precision is above); the cascade's measurement is
    # below it for them.
    from twinpass.core.effective import ROUNDING_SAFETY, analytic_rounding_estimate, measured_rounding, rounding_estimate

    assert ROUNDING_SAFETY * measured_rounding(sos) < analytic_rounding_estimate(sos=sos), name
    assert rounding_estimate(sos=sos) == analytic_rounding_estimate(sos=sos), name


def test_measured_rounding_of_a_cascade_that_overflows_is_infinite() -> None:
    # A section with a pole pair at radius 1.05 (unstable, textbook criterion): float64
    # filtering grows as 1.05**n and overflows within 65536 samples (1.05**14600 > 1.8e308,
    # float64's largest); the measurement says infinity rather than NaN. Eight such sections:
    # cascades shorter than MEASURED_MIN_SECTIONS are not measured.
    from twinpass.core.effective import MEASURED_MIN_SECTIONS, measured_rounding

    sos = np.array([[1.0, 0.0, 0.0, 1.0, -1.05 * 2 * np.cos(0.1), 1.05**2]] * MEASURED_MIN_SECTIONS)
    assert measured_rounding(sos) == math.inf


def test_short_cascades_are_not_measured_and_their_rounding_stays_near_the_analytic_estimate():
    # Reference: the same two passes in numpy.longdouble (x86-64 extended precision), as
    # measured_rounding does them, forced here for cascades under MEASURED_MIN_SECTIONS.
    import twinpass.core.effective as eff
    from scipy import signal

    sos = signal.cheby1(14, 1.0, 10.0, fs=1000.0, output="sos")  # 7 sections
    assert sos.shape[0] < eff.MEASURED_MIN_SECTIONS
    assert eff.measured_rounding(sos) == 0.0
    assert eff.rounding_estimate(sos=sos) == eff.analytic_rounding_estimate(sos=sos)
    saved = eff.MEASURED_MIN_SECTIONS
    try:
        eff.MEASURED_MIN_SECTIONS = 0
        eff._MEASURED.clear()
        measured = eff.measured_rounding(sos)
    finally:
        eff.MEASURED_MIN_SECTIONS = saved
        eff._MEASURED.clear()
    assert measured < 2.0 * eff.analytic_rounding_estimate(sos=sos) < 1e-10
