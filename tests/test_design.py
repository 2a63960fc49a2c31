"""Tests of twinpass.core.design: overall (two-pass) filter design.

External references: scipy.signal (sosfreqz/freqz, sosfiltfilt/filtfilt, *ord functions)
as the reference library; textbook order formulas; published Butterworth correction.
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
import warnings
from dataclasses import replace
from decimal import Decimal, localcontext

import numpy as np
import pytest
from scipy import signal
from scipy.optimize import minimize_scalar
from scipy.special import ellipk

from twinpass.core.design import (
    FIR_PREFERENCE,
    HALF_POWER_DB,
    REPORT_FLOOR_DB,
    check_sos,
    cost_per_sample,
    design_filter,
    design_for_rates,
    format_report,
    overall_response,
    per_pass_response,
    response_report,
    validate_spec,
)
from twinpass.core.types import Design, ResponseSpec
from twinpass.errors import DesignError, SpecError
from test_effective import brute_force_lengths, definition_slack

FS = 1000.0
RIPPLE_DB = 1.0
ATTEN_DB = 60.0
EDGES = {
    "lowpass": dict(passband_hz=(40.0,), stopband_hz=(60.0,)),
    "highpass": dict(passband_hz=(60.0,), stopband_hz=(40.0,)),
    "bandpass": dict(passband_hz=(100.0, 200.0), stopband_hz=(80.0, 230.0)),
    "bandstop": dict(passband_hz=(80.0, 220.0), stopband_hz=(100.0, 200.0)),
}
FAMILIES = ("butterworth", "chebyshev1", "chebyshev2", "elliptic", "fir")


def tolerance_spec(kind: str, family: str, **kw) -> ResponseSpec:
    return ResponseSpec(
        kind=kind,
        family=family,
        passband_ripple_db=RIPPLE_DB,
        stopband_attenuation_db=ATTEN_DB,
        **{**EDGES[kind], **kw},
    )


def scipy_overall_db(design, freqs: np.ndarray) -> np.ndarray:
    """Two-pass gain in dB computed with scipy.signal directly (the reference library)."""
    if design.sos is not None:
        _, h = signal.sosfreqz(design.sos, worN=freqs, fs=design.sample_rate_hz)
    else:
        _, h = signal.freqz(design.taps, 1.0, worN=freqs, fs=design.sample_rate_hz)
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(h) ** 2)


def bands(kind: str, nyq: float):
    p, s = EDGES[kind]["passband_hz"], EDGES[kind]["stopband_hz"]
    if kind == "lowpass":
        return [(0.0, p[0])], [(s[0], nyq)]
    if kind == "highpass":
        return [(p[0], nyq)], [(0.0, s[0])]
    if kind == "bandpass":
        return [p], [(0.0, s[0]), (s[1], nyq)]
    return [(0.0, p[0]), (p[1], nyq)], [s]


def independent_figures(design, kind: str) -> tuple[float, float]:
    """Overall ripple (peak-to-trough) and attenuation on 2**16 points plus the exact edges."""
    nyq = FS / 2
    passbands, stopbands = bands(kind, nyq)
    edges = [e for b in passbands + stopbands for e in b]
    f = np.unique(np.concatenate([np.linspace(0, nyq, 2**16 + 1), edges]))
    g = scipy_overall_db(design, f)
    in_pass = np.any([(f >= lo) & (f <= hi) for lo, hi in passbands], axis=0)
    in_stop = np.any([(f >= lo) & (f <= hi) for lo, hi in stopbands], axis=0)
    return float(g[in_pass].max() - g[in_pass].min()), float(-g[in_stop].max())


# ----------------------------------------------------------------------------- overall -> per pass


@pytest.mark.parametrize("kind", list(EDGES))
@pytest.mark.parametrize("family", FAMILIES)
def test_overall_spec_is_halved_per_pass_and_met_by_two_passes(kind: str, family: str) -> None:
    # Common practice: dB figures add over cascaded passes, so 60 dB overall needs 30 dB per
    # pass and 1 dB overall ripple needs 0.5 dB per pass. Reference: scipy.signal.sosfreqz /
    # freqz, squared (forward + backward = |H|^2), on a dense grid.
    design = design_filter(tolerance_spec(kind, family), FS)
    report = design.report
    for edge in report["edges"]:
        assert edge["overall_db"] == pytest.approx(2 * edge["per_pass_db"], abs=1e-9)
        if edge["edge"] == "passband":
            assert edge["per_pass_db"] >= -RIPPLE_DB / 2 - 1e-6
        else:
            assert edge["per_pass_db"] <= -ATTEN_DB / 2 + 1e-6
    ripple, attenuation = independent_figures(design, kind)
    assert ripple <= RIPPLE_DB + 1e-6
    assert attenuation >= ATTEN_DB - 1e-6
    assert report["passband_ripple_db"] == pytest.approx(ripple, abs=1e-3)
    assert report["stopband_attenuation_db"] == pytest.approx(attenuation, abs=1e-3)
    assert report["passband_ripple_margin_db"] >= -1e-6
    assert report["stopband_attenuation_margin_db"] >= -1e-6


@pytest.mark.parametrize("family", ["elliptic", "fir"])
def test_overall_response_matches_forward_backward_filtering_of_tones(family: str) -> None:
    # Reference: scipy.signal.sosfiltfilt / filtfilt. In steady state a tone's amplitude is
    # scaled by the overall gain |H(f)|^2.
    design = design_filter(tolerance_spec("lowpass", family), FS)
    n = 20000
    t = np.arange(n) / FS
    for f in (25.0, 40.0, 60.0, 90.0):
        x = np.sin(2 * np.pi * f * t)
        if design.sos is not None:
            y = signal.sosfiltfilt(design.sos, x)
        else:
            y = signal.filtfilt(design.taps, [1.0], x)
        core = slice(5000, n - 5000)
        gain = float(overall_response(design, [f])[0])
        assert np.max(np.abs(y[core] - gain * x[core])) < 1e-6


def test_fir_response_of_long_taps_matches_scipy_freqz() -> None:
    # Reference: scipy.signal.freqz (Horner's rule at the given frequencies).
    fs = 48000.0
    spec = ResponseSpec(
        kind="bandpass", family="fir", order=20000, cutoff_hz=(1000.0, 1100.0),
        cutoff_means="per-pass", max_taps=200001,
    )
    design = design_filter(spec, fs)
    rng = np.random.default_rng(3)
    f = np.concatenate([[0.0, 1050.0, fs / 2], rng.uniform(0.0, fs / 2, 500)])
    expected = signal.freqz(design.taps, 1.0, worN=f, fs=fs)[1]
    assert np.max(np.abs(per_pass_response(design, f) - expected)) < 1e-11


# Reference: the same float64 coefficients evaluated in 60-digit decimal arithmetic (Python's
# decimal module; each float converted exactly by Decimal(float), cos and sin by their Taylor
# series, pi to 80 digits, a published constant). float64 rounding of the evaluation itself
# is what this measures; the coefficients' own rounding is common to both.
_PI = Decimal("3.1415926535897932384626433832795028841971693993751058209749445923078164062862")


def _decimal_cos_sin(x: Decimal) -> tuple[Decimal, Decimal]:
    c = s = Decimal(0)
    term = Decimal(1)
    for n in range(400):
        if n % 4 == 0:
            c += term
        elif n % 4 == 1:
            s += term
        elif n % 4 == 2:
            c -= term
        else:
            s -= term
        term = term * x / (n + 1)
        if abs(term) < Decimal(10) ** -75:
            break
    return c, s


def exact_sos_response(sos: np.ndarray, f_hz: float, fs: float) -> complex:
    """Per-pass response of ``sos`` at ``f_hz`` from its exact coefficients (60 digits)."""
    with localcontext() as ctx:
        ctx.prec = 60
        w = -2 * _PI * Decimal(float(f_hz)) / Decimal(float(fs))
        c1, s1 = _decimal_cos_sin(w)
        c2, s2 = _decimal_cos_sin(2 * w)
        hr, hi = Decimal(1), Decimal(0)
        for row in np.asarray(sos, dtype=float):
            b0, b1, b2, a0, a1, a2 = (Decimal(float(v)) for v in row)
            nr, ni = b0 + b1 * c1 + b2 * c2, b1 * s1 + b2 * s2
            dr, di = a0 + a1 * c1 + a2 * c2, a1 * s1 + a2 * s2
            mag = dr * dr + di * di
            qr, qi = (nr * dr + ni * di) / mag, (ni * dr - nr * di) / mag
            hr, hi = hr * qr - hi * qi, hr * qi + hi * qr
        return complex(float(hr), float(hi))


def exact_overall_db(sos: np.ndarray, f_hz: float, fs: float) -> float:
    return 40.0 * math.log10(abs(exact_sos_response(sos, f_hz, fs)))


def exact_extreme_db(sos: np.ndarray, fs: float, lo: float, hi: float, sign: int) -> float:
    """Largest (sign=1) or smallest (sign=-1) exact overall gain (dB) over [lo, hi] Hz: 160
    points (logarithmic from lo, or from 1e-9 of Nyquist when lo is 0 Hz), the best refined
    with scipy.optimize.minimize_scalar (bounded) between its neighbours."""
    f = np.geomspace(max(lo, fs * 5e-10), hi, 160)
    v = np.array([sign * exact_overall_db(sos, x, fs) for x in f])
    i = int(np.argmax(v))
    res = minimize_scalar(lambda x: -sign * exact_overall_db(sos, x, fs),
                          bounds=(f[max(i - 1, 0)], f[min(i + 1, f.size - 1)]), method="bounded",
                          options={"xatol": 1e-12 * hi})
    return sign * max(float(v[i]), -float(res.fun))


RESPONSE_CASES = {
    # Sections with poles and zeros near z = 1 (cutoffs far below the sample rate) or z = -1
    # (near Nyquist), where the plain polynomial in z^-1 cancels; and one ordinary design.
    "Butterworth high-pass 0.05 Hz at 10 kHz": lambda: (signal.butter(4, 0.05, "highpass", fs=1e4, output="sos"), 1e4),
    "Butterworth low-pass 0.05 Hz at 48 kHz": lambda: (signal.butter(2, 0.05, "lowpass", fs=48e3, output="sos"), 48e3),
    "Chebyshev I high-pass 0.05 Hz at 10 kHz": lambda: (signal.cheby1(2, 0.5, 0.05, "highpass", fs=1e4, output="sos"), 1e4),
    "Chebyshev II high-pass 0.02 Hz at 10 kHz": lambda: (signal.cheby2(2, 20, 0.02, "highpass", fs=1e4, output="sos"), 1e4),
    "Butterworth band-stop 0.05-0.5 Hz at 10 kHz": lambda: (signal.butter(3, (0.05, 0.5), "bandstop", fs=1e4, output="sos"), 1e4),
    "Butterworth low-pass 4999.95 Hz at 10 kHz": lambda: (signal.butter(4, 4999.95, "lowpass", fs=1e4, output="sos"), 1e4),
    "Butterworth high-pass 4999.95 Hz at 10 kHz": lambda: (signal.butter(3, 4999.95, "highpass", fs=1e4, output="sos"), 1e4),
    "notch 50 Hz at 48 kHz": lambda: (signal.tf2sos(*signal.iirnotch(50.0, 400.0, fs=48e3)), 48e3),
    "elliptic band-pass 10-200 Hz at 48 kHz": lambda: (
        signal.ellip(8, 0.25, 30, (10.0, 200.0), "bandpass", fs=48e3, output="sos"), 48e3),
}


def response_case(name: str) -> tuple[np.ndarray, float]:
    with warnings.catch_warnings():  # scipy's BadCoefficients for the tiny numerators
        warnings.simplefilter("ignore", signal.BadCoefficients)
        sos, fs = RESPONSE_CASES[name]()
    return np.asarray(sos), fs


@pytest.mark.parametrize("name", list(RESPONSE_CASES))
def test_sos_response_matches_exact_evaluation_down_to_1e_7_of_the_sample_rate(name: str) -> None:
    # Reference: exact_sos_response (decimal arithmetic, above), on f / fs from 1e-7 to 1/2 and
    # as close to Nyquist, plus 0 Hz, fs / 4 and Nyquist themselves. The float64 evaluation
    # must agree to 1e-12 of each value (the 1e-60 absolute term covers exact zeros at
    # Nyquist, which the reference's 80-digit pi leaves at about 1e-70).
    sos, fs = response_case(name)
    design = Design(spec=ResponseSpec(kind="lowpass", order=2, cutoff_hz=(1.0,)), family="butterworth",
                    sample_rate_hz=fs, order=2, sos=np.asarray(sos), taps=None, effective_length=0, tolerance=1e-9)
    ratios = np.geomspace(1e-7, 0.25, 60)
    f = np.concatenate([[0.0, fs / 4, fs / 2], fs * ratios, fs / 2 - fs * ratios])
    expected = np.array([exact_sos_response(sos, x, fs) for x in f])
    got = per_pass_response(design, f)
    err = np.abs(got - expected)
    assert np.all(err <= 1e-12 * np.abs(expected) + 1e-60), (name, float(np.max(err / np.abs(expected))))


def test_plain_polynomial_evaluation_misses_where_low_cutoff_designs_are_checked() -> None:
    # Guard on the reference: scipy.signal.sosfreqz, which sums b0 + b1 z^-1 + b2 z^-2 in
    # float64, misses the exact value of a 0.05 Hz high-pass at 10 kHz by far more than
    # 1e-12 near its cutoff, so the test above can tell the two evaluations apart (passes on
    # both the old and the new code).
    sos, fs = response_case("Butterworth high-pass 0.05 Hz at 10 kHz")
    f = np.array([0.01, 0.05, 0.2])
    expected = np.array([exact_sos_response(sos, x, fs) for x in f])
    plain = signal.sosfreqz(sos, worN=f, fs=fs)[1]
    assert np.max(np.abs(plain - expected) / np.abs(expected)) > 1e-8


@pytest.mark.parametrize("kind, fs, within", [("highpass", 1e4, 1e-6), ("highpass", 48e3, 1e-4),
                                               ("lowpass", 48e3, 1e-4)])
def test_low_cutoff_overall_3db_design_is_accepted_and_exact(kind: str, fs: float, within: float) -> None:
    # A 4th-order Butterworth, -3.0103 dB overall at 0.05 Hz: its float64 coefficients put
    # the exact overall gain (exact_overall_db) this close to 10 log10(0.5) (half power,
    # textbook): 2e-7 dB at 10 kHz, 1.7e-6 to 1e-5 dB at 48 kHz, where rounding the
    # coefficients moves it; the design allows 0.001 dB (CUTOFF_SLACK_DB), far below what
    # matters for a half-power point and far above float64 evaluation error.
    spec = ResponseSpec(kind=kind, family="butterworth", order=4, cutoff_hz=(0.05,))
    design = design_filter(spec, fs)
    assert abs(exact_overall_db(design.sos, 0.05, fs) - 10 * math.log10(0.5)) <= within


LOW_CUT_TOLERANCE = {
    "chebyshev1": dict(passband_hz=(0.05,), stopband_hz=(0.01,)),
    "chebyshev2": dict(passband_hz=(0.1,), stopband_hz=(0.02,)),
}


@pytest.mark.parametrize("family", list(LOW_CUT_TOLERANCE))
def test_low_cutoff_equiripple_designs_meet_the_spec_when_measured_exactly(family: str) -> None:
    # High-pass, overall ripple 1 dB and attenuation 40 dB with edges at 0.01 to 0.1 Hz at
    # 10 kHz. The design must be accepted at an order near scipy's minimum (cheb1ord /
    # cheb2ord for the halved figures: 2), and its exact response (exact_extreme_db) meet the
    # spec within the 1e-6 dB the design allows. Chebyshev II at order 2 misses by 1.4e-6 dB
    # measured exactly (its float64 coefficients), so order 3 is right there.
    fs = 1e4
    spec = ResponseSpec(kind="highpass", family=family, passband_ripple_db=1.0, stopband_attenuation_db=40.0,
                        **LOW_CUT_TOLERANCE[family])
    order, _ = {"chebyshev1": signal.cheb1ord, "chebyshev2": signal.cheb2ord}[family](
        spec.passband_hz[0], spec.stopband_hz[0], 0.5, 20.0, fs=fs)
    design = design_filter(spec, fs)
    assert order <= design.order <= order + 1
    (p,), (s,) = spec.passband_hz, spec.stopband_hz
    ripple = exact_extreme_db(design.sos, fs, p, fs / 2, 1) - exact_extreme_db(design.sos, fs, p, fs / 2, -1)
    attenuation = -exact_extreme_db(design.sos, fs, 0.0, s, 1)
    assert ripple <= 1.0 + 1e-6 and attenuation >= 40.0 - 1e-6, (ripple, attenuation)
    assert design.report["passband_ripple_db"] == pytest.approx(ripple, abs=1e-8)


def test_auto_considers_low_cutoff_chebyshev_designs() -> None:
    # The Chebyshev I design above meets the spec at order 2 (one section, 10 multiply-adds
    # per sample by the module's cost model); auto must not pick a costlier Butterworth.
    spec = ResponseSpec(kind="highpass", family="auto", passband_ripple_db=1.0, stopband_attenuation_db=40.0,
                        **LOW_CUT_TOLERANCE["chebyshev1"])
    design = design_filter(spec, 1e4)
    chebyshev = design_filter(replace(spec, family="chebyshev1"), 1e4)
    assert design.report["cost_per_sample"] <= chebyshev.report["cost_per_sample"] == 10.0


def test_cutoff_refusal_prints_the_difference_it_refuses() -> None:
    # 0.002 Hz at 48 kHz: rounding the sections' coefficients to float64 moves the overall
    # gain at the cutoff by about 0.004 dB, beyond the 0.001 dB allowed. The message must show
    # both figures to enough digits to differ, and the target as 10 log10(0.5) (textbook).
    spec = ResponseSpec(kind="lowpass", family="butterworth", order=2, cutoff_hz=(0.002,))
    with pytest.raises(DesignError) as info:
        design_filter(spec, 48e3)
    got, target = (float(x) for x in re.findall(r"(-\d+\.\d+) dB", str(info.value))[:2])
    assert target == pytest.approx(10 * math.log10(0.5), abs=1e-9)
    assert abs(got - target) > 1e-3


# ----------------------------------------------------------------------------- narrow features

NARROW = {
    # A 14000-tap FIR: ripple peaks about fs / M = 3.3 Hz apart in a 100 Hz passband.
    "fir-1khz": ResponseSpec(
        kind="bandpass", family="fir", passband_hz=(1000.0, 1100.0), stopband_hz=(990.0, 1110.0),
        passband_ripple_db=0.1, stopband_attenuation_db=80.0, max_taps=200001,
    ),
    # An elliptic band-pass 2 Hz wide at 48 kHz: poles within 1e-5 of the unit circle.
    "elliptic-100hz": ResponseSpec(
        kind="bandpass", family="elliptic", passband_hz=(100.0, 102.0), stopband_hz=(99.5, 102.5),
        passband_ripple_db=0.5, stopband_attenuation_db=100.0,
    ),
}
NARROW_FS = 48000.0
REFERENCE_POINTS = 2**20


def reference_gain_db(design, f_hz: float) -> float:
    """Overall gain (dB) at one frequency: scipy.signal.sosfreqz for sections, the DTFT sum
    ``sum_n h[n] exp(-2j pi f n / fs)`` written out for taps."""
    fs = design.sample_rate_hz
    if design.sos is not None:
        h = signal.sosfreqz(design.sos, worN=[f_hz], fs=fs)[1][0]
    else:
        n = np.arange(design.taps.size)
        h = np.exp(-2j * np.pi * f_hz / fs * n) @ design.taps
    return 40.0 * math.log10(abs(h))


def reference_extreme(design, lo: float, hi: float, sign: int) -> float:
    """Largest (sign=1) or smallest (sign=-1) overall gain (dB) over [lo, hi] Hz.

    Reference: scipy.signal.sosfreqz (sections) or scipy.signal.zoom_fft (taps, chirp-z) on
    2**20 equally spaced points of the band; the 16 best local extrema within 0.5 dB of the
    best are refined with scipy.optimize.minimize_scalar (bounded, xatol 1e-9 Hz) between
    their grid neighbours.
    """
    fs = design.sample_rate_hz
    f = np.linspace(lo, hi, REFERENCE_POINTS)
    if design.sos is not None:
        h = signal.sosfreqz(design.sos, worN=f, fs=fs)[1]
    else:
        h = signal.zoom_fft(design.taps, [lo, hi], m=REFERENCE_POINTS, fs=fs, endpoint=True)
    v = sign * 40.0 * np.log10(np.abs(h))
    best = float(v.max())
    inner = np.arange(1, f.size - 1)
    peaks = inner[(v[inner] >= v[inner - 1]) & (v[inner] >= v[inner + 1]) & (v[inner] >= best - 0.5)]
    for i in peaks[np.argsort(-v[peaks])][:16]:
        res = minimize_scalar(
            lambda x: -sign * reference_gain_db(design, x),
            bounds=(f[i - 1], f[i + 1]), method="bounded", options={"xatol": 1e-9},
        )
        best = max(best, -float(res.fun))
    return sign * best


@pytest.fixture(scope="module", params=list(NARROW))
def narrow_design(request):
    spec = NARROW[request.param]
    design = design_filter(spec, NARROW_FS)
    (p_lo, p_hi), (s_lo, s_hi) = spec.passband_hz, spec.stopband_hz
    ripple = reference_extreme(design, p_lo, p_hi, 1) - reference_extreme(design, p_lo, p_hi, -1)
    attenuation = -max(
        reference_extreme(design, 0.0, s_lo, 1), reference_extreme(design, s_hi, NARROW_FS / 2, 1)
    )
    return spec, design, ripple, attenuation


def test_narrow_designs_meet_the_overall_spec_by_the_true_response(narrow_design) -> None:
    # Ripple peaks (FIR: about fs / M apart) and resonances (IIR: about (1 - r) fs / pi wide)
    # narrower than a fixed grid must still be measured; the order (taps) is raised until
    # the true two-pass response meets the overall figures.
    # Reference: reference_extreme (scipy.signal.sosfreqz / zoom_fft on 2**20 points per
    # band, refined with scipy.optimize.minimize_scalar).
    spec, design, ripple, attenuation = narrow_design
    assert ripple <= spec.passband_ripple_db + 1e-6
    assert attenuation >= spec.stopband_attenuation_db - 1e-6


def test_narrow_designs_report_the_true_ripple_and_attenuation(narrow_design) -> None:
    # Reference: as above. The figures agree to 1e-6 dB (rounding of the response itself
    # near poles within 1e-5 of the unit circle is about 1e-9 dB).
    spec, design, ripple, attenuation = narrow_design
    report = design.report
    assert report["passband_ripple_db"] == pytest.approx(ripple, abs=1e-6)
    assert report["stopband_attenuation_db"] == pytest.approx(attenuation, abs=1e-6)
    assert report["passband_ripple_margin_db"] == pytest.approx(spec.passband_ripple_db - ripple, abs=1e-6)
    assert report["stopband_attenuation_margin_db"] == pytest.approx(
        attenuation - spec.stopband_attenuation_db, abs=1e-6
    )


# ----------------------------------------------------------------------------- minimum orders


def test_minimum_orders_match_textbook_formulas_and_worked_example() -> None:
    # Order formulas (Oppenheim & Schafer, Discrete-Time Signal Processing, sec. 7.2; from
    # memory): Butterworth N >= log10(D) / (2 log10 k), Chebyshev N >= acosh(sqrt(D)) / acosh(k),
    # D = (10^(As/10) - 1) / (10^(Ap/10) - 1), k = ratio of the prewarped edges. Elliptic:
    # N >= K(k') K(sqrt(1 - k1^2)) / (K(sqrt(1 - k'^2)) K(k1)), k' = 1/k, k1 = 1/sqrt(D)
    # (standard elliptic order formula, e.g. Parks & Burrus, Digital Filter Design; from memory).
    # Worked example (from memory), fs = 1000 Hz, low-pass 40 -> 60 Hz: 1 dB / 60 dB in one pass
    # needs Butterworth 19, Chebyshev 9, elliptic 6; 0.5 / 30 dB per pass needs 11, 6 and 4.
    # The formulas and scipy.signal's *ord functions agree with every recalled number.
    k = math.tan(math.pi * 60 / FS) / math.tan(math.pi * 40 / FS)
    expected = {(1.0, 60.0): (19, 9, 6), (0.5, 30.0): (11, 6, 4)}
    for (ap, as_), (n_butter, n_cheb, n_ellip) in expected.items():
        d = (10 ** (as_ / 10) - 1) / (10 ** (ap / 10) - 1)
        assert math.ceil(math.log10(d) / (2 * math.log10(k))) == n_butter
        assert math.ceil(math.acosh(math.sqrt(d)) / math.acosh(k)) == n_cheb
        k1 = 1 / math.sqrt(d)
        n_e = ellipk(1 / k**2) * ellipk(1 - k1**2) / (ellipk(1 - 1 / k**2) * ellipk(k1**2))
        assert math.ceil(n_e) == n_ellip
        assert signal.buttord(40, 60, ap, as_, fs=FS)[0] == n_butter
        assert signal.cheb1ord(40, 60, ap, as_, fs=FS)[0] == n_cheb
        assert signal.cheb2ord(40, 60, ap, as_, fs=FS)[0] == n_cheb
        assert signal.ellipord(40, 60, ap, as_, fs=FS)[0] == n_ellip
    # The designer asked for 1 dB / 60 dB OVERALL designs the 0.5 / 30 dB per-pass orders.
    per_pass = {"butterworth": 11, "chebyshev1": 6, "chebyshev2": 6, "elliptic": 4}
    for family, order in per_pass.items():
        design = design_filter(tolerance_spec("lowpass", family), FS)
        assert design.order == order, family
        assert design.report["order_per_pass"] == order


# ----------------------------------------------------------------------------- zero phase


@pytest.fixture(scope="module")
def bandpass_design():
    return design_filter(tolerance_spec("bandpass", "elliptic"), FS)


def test_passband_tone_has_zero_lag(bandpass_design) -> None:
    # Reference: scipy.signal.sosfiltfilt; zero phase means no delay (common practice).
    n = 8000
    t = np.arange(n) / FS
    x = np.sin(2 * np.pi * 150.0 * t) * np.hanning(n)
    y = signal.sosfiltfilt(bandpass_design.sos, x)
    xc = signal.correlate(y, x, mode="full")
    lags = signal.correlation_lags(n, n, mode="full")
    assert lags[np.argmax(xc)] == 0


def test_step_response_starts_before_the_step() -> None:
    # Reference: scipy.signal.sosfiltfilt; forward-backward filtering is non-causal (common
    # practice): the output moves before the input does, within the effective length.
    design = design_filter(ResponseSpec(kind="lowpass", family="butterworth", order=4, cutoff_hz=(20.0,)), FS)
    n, n0 = 4000, 2000
    x = np.zeros(n)
    x[n0:] = 1.0
    y = signal.sosfiltfilt(design.sos, x)
    assert np.max(np.abs(y[n0 - 20 : n0])) > 0.05
    assert np.max(np.abs(y[: n0 - design.effective_length])) < 1e-8
    assert f"{design.effective_length} samples" in design.report["statement"]


def test_overall_response_is_real_and_non_negative(bandpass_design) -> None:
    # Reference: scipy.signal.sosfiltfilt of an impulse. Its two-pass impulse response is
    # symmetric about the impulse, so its spectrum is real (phase 0) and equals |H|^2 >= 0.
    n = 8192
    c = n // 2
    x = np.zeros(n)
    x[c] = 1.0
    h2 = signal.sosfiltfilt(bandpass_design.sos, x, padtype=None)
    assert np.allclose(h2[c + 1 : c + 2000], h2[c - 1 : c - 2000 : -1], atol=1e-14)
    spectrum = np.fft.rfft(np.roll(h2, -c))
    freqs = np.fft.rfftfreq(n, d=1 / FS)
    assert np.max(np.abs(spectrum.imag)) < 1e-10
    assert np.min(spectrum.real) > -1e-10
    assert np.allclose(spectrum.real, overall_response(bandpass_design, freqs), atol=1e-8)
    per_pass = per_pass_response(bandpass_design, freqs)
    assert np.allclose(per_pass * np.conj(per_pass), overall_response(bandpass_design, freqs))


# ----------------------------------------------------------------------------- cutoff meaning


def test_butterworth_twice_is_half_at_per_pass_cutoff() -> None:
    # Common practice: a Butterworth filter run twice has gain 0.5 (-6.02 dB) at its own
    # cutoff. Reference: scipy.signal.sosfreqz.
    for kind in ("lowpass", "highpass"):
        spec = ResponseSpec(kind=kind, family="butterworth", order=2, cutoff_hz=(10.0,), cutoff_means="per-pass")
        design = design_filter(spec, FS)
        _, h = signal.sosfreqz(design.sos, worN=[10.0], fs=FS)
        assert abs(h[0]) ** 2 == pytest.approx(0.5, abs=1e-12)


@pytest.mark.parametrize("family, per_pass_db, within_db", [
    ("butterworth", -3.0103, 0.01),  # scipy.signal.butter: -3 dB (half power) at Wn
    ("chebyshev1", -1.0, 0.01),      # scipy.signal.cheby1: Wn is where the gain first drops below -rp
    ("elliptic", -1.0, 0.01),        # scipy.signal.ellip: as cheby1
    ("chebyshev2", -40.0, 0.01),     # scipy.signal.cheby2: Wn is where the gain first reaches -rs
    ("fir", -6.0206, 0.1),           # scipy.signal.firwin: a windowed ideal response, about 0.5 at the cutoff
])
def test_per_pass_cutoff_means_scipy_critical_frequency_doubled(family: str, per_pass_db: float,
                                                                within_db: float) -> None:
    # README "How the response is specified": with cutoff_means = "per-pass" the overall gain
    # at the cutoff is twice (in dB) the per-pass gain scipy.signal's design function gives
    # at its critical frequency (references in the parameters). Reference: sosfreqz/freqz.
    spec = ResponseSpec(kind="lowpass", family=family, order=201 if family == "fir" else 4, cutoff_hz=(10.0,),
                        cutoff_means="per-pass", passband_ripple_db=2.0, stopband_attenuation_db=80.0)
    design = design_filter(spec, FS)
    assert scipy_overall_db(design, np.array([10.0]))[0] == pytest.approx(2 * per_pass_db, abs=2 * within_db)


def test_overall_3db_correction_matches_published_factor() -> None:
    # D. A. Winter, Biomechanics and Motor Control of Human Movement, 4th ed., 2009 (from
    # memory): a 2nd-order low-pass run twice is corrected with the factor 0.802, i.e. the
    # per-pass cutoff is f_c / 0.802. Closed form: tan(pi f_d/fs) = tan(pi f_c/fs) / C,
    # C = (sqrt(2) - 1)^(1/(2N)). Reference response: scipy.signal.sosfreqz.
    fc = 6.0
    design = design_filter(ResponseSpec(kind="lowpass", family="butterworth", order=2, cutoff_hz=(fc,)), FS)
    _, h = signal.sosfreqz(design.sos, worN=[fc], fs=FS)
    assert 20 * np.log10(abs(h[0]) ** 2) == pytest.approx(HALF_POWER_DB, abs=1e-6)
    # The per-pass -3.0103 dB point (the overall -6.02 dB point) is the design cutoff.
    (f_design,) = design.report["overall_minus6db_hz"]
    c = (math.sqrt(2) - 1) ** (1 / 4)
    assert c == pytest.approx(0.802, abs=5e-4)
    assert math.tan(math.pi * f_design / FS) == pytest.approx(math.tan(math.pi * fc / FS) / c, rel=1e-9)
    assert fc / f_design == pytest.approx(0.802, abs=1e-3)
    # High-pass mirror: the per-pass cutoff is lower, tan(pi f_d/fs) = tan(pi f_c/fs) * C.
    hp = design_filter(ResponseSpec(kind="highpass", family="butterworth", order=2, cutoff_hz=(fc,)), FS)
    (f_design_hp,) = hp.report["overall_minus6db_hz"]
    assert math.tan(math.pi * f_design_hp / FS) == pytest.approx(math.tan(math.pi * fc / FS) * c, rel=1e-9)


CUTOFFS = {"lowpass": (10.0,), "highpass": (10.0,), "bandpass": (20.0, 80.0), "bandstop": (45.0, 55.0)}


@pytest.mark.parametrize("kind", list(CUTOFFS))
@pytest.mark.parametrize("family", FAMILIES)
def test_overall_3db_lands_on_every_cutoff(kind: str, family: str) -> None:
    # Reference: scipy.signal.sosfreqz / freqz, squared: -3.0103 dB overall at each cutoff.
    spec = ResponseSpec(
        kind=kind,
        family=family,
        order=400 if family == "fir" else 4,
        cutoff_hz=CUTOFFS[kind],
        passband_ripple_db=1.0,
        stopband_attenuation_db=60.0,
    )
    design = design_filter(spec, FS)
    g = scipy_overall_db(design, np.asarray(CUTOFFS[kind]))
    assert np.allclose(g, 10 * np.log10(0.5), atol=1e-6)
    assert design.report["overall_minus3db_hz"] == pytest.approx(list(CUTOFFS[kind]), abs=1e-6)


def test_notch_overall_width_and_q() -> None:
    # Reference: scipy.signal.sosfreqz. The overall (two-pass) -3.0103 dB points are the
    # requested width apart around the notch; Q = notch_hz / width; gain 1 far from it.
    for width_hz, q in ((3.0, None), (None, 25.0)):
        spec = ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=width_hz, notch_q=q)
        design = design_filter(spec, FS)
        expected = width_hz if width_hz is not None else 50.0 / q
        lo, hi = design.report["overall_minus3db_hz"]
        assert lo < 50.0 < hi
        assert hi - lo == pytest.approx(expected, rel=1e-9)
        g = scipy_overall_db(design, np.array([lo, hi, 50.0, 0.0, FS / 2]))
        assert np.allclose(g[:2], HALF_POWER_DB, atol=1e-6)
        assert g[2] < -100.0
        assert np.allclose(g[3:], 0.0, atol=1e-9)


# ----------------------------------------------------------------------------- errors


ERROR_CASES = [
    (dict(kind="lowpass", order=4, cutoff_hz=(10.0,)), None, "sample rate"),
    (dict(kind="lowpass", order=4, cutoff_hz=(500.0,)), FS, "500"),
    (dict(kind="lowpass", order=4, cutoff_hz=(0.0,)), FS, "edge 0 Hz"),
    (dict(kind="lowpass", order=4, cutoff_hz=(-5.0,)), FS, "-5"),
    (dict(kind="bandpass", order=4, cutoff_hz=(80.0, 20.0)), FS, "(80, 20)"),
    (dict(kind="bandpass", order=4, cutoff_hz=(20.0,)), FS, "cutoff_hz=(20)"),
    (dict(kind="lowpass", order=4, cutoff_hz=(10.0, 20.0)), FS, "cutoff_hz=(10, 20)"),
    (dict(kind="lowpass", passband_hz=(40.0,), stopband_hz=(30.0,), passband_ripple_db=1.0,
          stopband_attenuation_db=60.0), FS, "stopband_hz=(30)"),
    (dict(kind="bandpass", passband_hz=(100.0, 200.0), stopband_hz=(120.0, 230.0),
          passband_ripple_db=1.0, stopband_attenuation_db=60.0), FS, "stopband_hz=(120, 230)"),
    (dict(kind="lowpass", passband_hz=(40.0,), stopband_hz=(60.0,), passband_ripple_db=3.0,
          stopband_attenuation_db=2.0), FS, "stopband_attenuation_db=2"),
    (dict(kind="lowpass", passband_hz=(40.0,), stopband_hz=(60.0,), passband_ripple_db=1.0,
          stopband_attenuation_db=60.0, order=4), FS, "order"),
    (dict(kind="lowpass"), FS, "neither"),
    (dict(kind="lowpass", order=4, cutoff_hz=(10.0,), cutoff_means="half-power"), FS, "half-power"),
    (dict(kind="notch", notch_width_hz=2.0), FS, "notch_hz"),
    (dict(kind="notch", notch_hz=50.0), FS, "notch_width_hz"),
    (dict(kind="lowpass", order=70, cutoff_hz=(10.0,)), FS, "order=70"),
    (dict(kind="lowpass", family="butterworth", passband_hz=(40.0,), stopband_hz=(41.0,),
          passband_ripple_db=0.1, stopband_attenuation_db=120.0), FS, "needs order"),
    (dict(kind="lowpass", family="fir", passband_hz=(40.0,), stopband_hz=(40.05,),
          passband_ripple_db=0.1, stopband_attenuation_db=120.0), FS, "max_taps=20001"),
]


@pytest.mark.parametrize(("fields", "fs", "needle"), ERROR_CASES)
def test_errors_name_the_offending_value(fields: dict, fs, needle: str) -> None:
    # Each invalid request raises our SpecError naming the value to change.
    with pytest.raises(SpecError) as info:
        design_filter(ResponseSpec(**fields), fs)
    assert needle in str(info.value)
    if fs is not None and "needs order" not in needle and "max_taps" not in needle:
        with pytest.raises(SpecError):
            validate_spec(ResponseSpec(**fields), fs)


def test_unstable_and_badly_conditioned_designs_raise_design_error() -> None:
    # A hand-made section with a pole pair at radius 1.01 (a2 = r^2) is unstable.
    unstable = np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 1.01**2]])
    with pytest.raises(DesignError, match="unstable"):
        check_sos(unstable)
    # A cutoff 1e-8 Hz at 1 kHz puts the poles within ~4.4e-11 of the unit circle: by the
    # bilinear transform a 2nd-order Butterworth's pole radius is 1 - sqrt(2) * pi * fc / fs
    # to first order (from memory; scipy.signal.sos2zpk of this design gives 4.44e-11).
    spec = ResponseSpec(kind="lowpass", family="butterworth", order=2, cutoff_hz=(1e-8,))
    with pytest.raises(DesignError, match="badly conditioned") as info:
        design_filter(spec, FS)
    # The design is refused before any processing mode applies, so the remedies must hold
    # whatever [processing] mode says: carrying states is no way out (README "Long filters").
    assert "every processing mode" in str(info.value) and "use the carry" not in str(info.value)


# ----------------------------------------------------------------------------- auto, rates, report


def test_auto_picks_an_iir_that_meets_the_spec() -> None:
    # Reference: scipy.signal.sosfreqz on a dense grid. For this spec the cheapest design is
    # an elliptic band-pass from a prototype of order 4 (4 sections, 40 multiply-adds per
    # sample); Chebyshev designs cost 60, Butterworth 110.
    design = design_filter(tolerance_spec("bandpass", "auto"), FS)
    assert design.family in ("butterworth", "chebyshev1", "chebyshev2", "elliptic")
    assert design.sos is not None and design.taps is None
    ripple, attenuation = independent_figures(design, "bandpass")
    assert ripple <= RIPPLE_DB + 1e-6 and attenuation >= ATTEN_DB - 1e-6
    # Cost model: the cheapest IIR; FIR only if it costs less than half as much.
    cost = design.report["cost_per_sample"]
    for family in FAMILIES:
        other = design_filter(tolerance_spec("bandpass", family), FS).report["cost_per_sample"]
        assert cost <= other if family != "fir" else FIR_PREFERENCE * cost <= other


def test_cost_model() -> None:
    # IIR: 5 multiply-adds per section per pass; FIR: min(2M - 1, 4 log2 N_fft).
    sos = signal.butter(4, 10.0, fs=FS, output="sos")
    assert cost_per_sample(sos=sos) == 20.0
    assert cost_per_sample(taps=np.ones(5)) == 9.0  # direct: 2*5 - 1
    assert cost_per_sample(taps=np.ones(1000)) == 4.0 * 12  # FFT of 4096 >= 2 * 1999


def test_design_for_rates_one_design_per_distinct_rate() -> None:
    spec = ResponseSpec(kind="highpass", family="butterworth", order=4, cutoff_hz=(1.0,))
    designs = design_for_rates(spec, [250, 1000.0, 250.0, 500], tolerance=1e-6)
    assert sorted(designs) == [250.0, 500.0, 1000.0]
    for rate, design in designs.items():
        assert design.sample_rate_hz == rate
        g = scipy_overall_db(design, np.array([1.0]))
        assert g[0] == pytest.approx(HALF_POWER_DB, abs=1e-6)
    with pytest.raises(SpecError, match="at sample rate 100 Hz"):
        design_for_rates(ResponseSpec(kind="lowpass", order=4, cutoff_hz=(60.0,)), [1000.0, 100.0])


def _plain(value) -> bool:
    if isinstance(value, dict):
        return all(isinstance(k, str) and _plain(v) for k, v in value.items())
    if isinstance(value, list):
        return all(_plain(v) for v in value)
    return value is None or type(value) in (str, int, float, bool)


@pytest.mark.parametrize(
    "spec",
    [
        tolerance_spec("bandstop", "chebyshev2"),
        tolerance_spec("lowpass", "fir"),
        ResponseSpec(kind="notch", notch_hz=60.0, notch_q=30.0),
    ],
)
def test_report_is_plain_json_and_formats(spec: ResponseSpec) -> None:
    design = design_filter(spec, FS, tolerance=1e-7)
    report = response_report(design)
    assert _plain(report)
    json.dumps(report, allow_nan=False)
    assert report == design.report
    # Halo for the design's tolerance: for FIR exactly M - 1 (the two passes are one
    # convolution with the 2M - 1 sample autocorrelation); for IIR the length defined in
    # twinpass.core.effective, summed outright from scipy.signal.sosfilt's impulse response.
    if design.taps is not None:
        assert report["effective_length_samples"] == design.taps.size - 1
        assert report["max_pole_radius"] is None
    else:
        defined, _, _ = brute_force_lengths(design.sos, 1e-7)
        assert defined <= report["effective_length_samples"] <= defined + definition_slack(design.sos)
    assert report["effective_length_seconds"] == pytest.approx(report["effective_length_samples"] / FS)
    text = format_report(report)
    assert report["kind"] in text and report["family"] in text
    assert "non-causal" in text


def test_report_margins_show_rounding_as_zero_and_a_true_miss_as_negative() -> None:
    # The demo's band-pass (elliptic, 1 dB / 60 dB overall at 200 Hz) meets its ripple exactly:
    # the overall ripple measured independently (scipy.signal.sosfreqz on 2**18 points across
    # the passband, squared: two passes) is 1 dB to within rounding, so its margin is shown as 0,
    # never as a negative number for a spec the design meets.
    spec = ResponseSpec(kind="bandpass", family="elliptic", passband_hz=(0.5, 30.0), stopband_hz=(0.1, 45.0),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    design = design_filter(spec, 200.0, tolerance=1e-9)
    f = np.linspace(0.5, 30.0, 2**18)
    _, h = signal.sosfreqz(design.sos, worN=f, fs=200.0)
    overall_db = 2.0 * 20.0 * np.log10(np.abs(h))
    assert overall_db.max() - overall_db.min() == pytest.approx(1.0, abs=1e-4)
    report = design.report
    assert report["passband_ripple_margin_db"] == 0.0 and report["stopband_attenuation_margin_db"] >= 0.0
    ripple_line = next(line for line in format_report(report).splitlines() if "required / margin" in line)
    assert ripple_line.split()[-4:] == ["1", "/", "0", "dB"], ripple_line
    # The same filter against a spec asking for half that ripple misses it by about 0.5 dB:
    # the margin stays negative.
    tighter = dataclasses.replace(design, spec=dataclasses.replace(spec, passband_ripple_db=0.5))
    missed = response_report(tighter)["passband_ripple_margin_db"]
    assert missed == pytest.approx(0.5 - (overall_db.max() - overall_db.min()), abs=1e-3) and missed < -0.4


def test_report_text_shows_a_gain_below_what_float64_resolves_as_below_the_floor() -> None:
    # Reference: scipy.signal.sos2zpk puts the notch's zeros on the unit circle at exactly 50 Hz
    # (an exact zero of the gain), and scipy.signal.sosfreqz evaluates the two-pass gain there
    # far below -300 dB: an amplitude ratio under 1e-15, a few float64 steps (2**-52) of a unit
    # value, which only rounding produces. The text says "< -300"; the JSON keeps the number.
    # Gains above the floor (the -3 dB points) print as numbers.
    design = design_filter(ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=2.0), 48000.0)
    zeros, _, _ = signal.sos2zpk(design.sos)
    assert np.allclose(np.abs(zeros), 1.0, atol=1e-12) and np.allclose(np.abs(np.angle(zeros)) * 48000.0 / (2 * np.pi), 50.0)
    _, h = signal.sosfreqz(design.sos, worN=[50.0], fs=48000.0)
    assert 2.0 * 20.0 * np.log10(np.abs(h[0])) < REPORT_FLOOR_DB == -300.0
    report = design.report
    notch = next(e for e in report["edges"] if e["edge"] == "notch")
    assert isinstance(notch["overall_db"], float) and notch["overall_db"] < REPORT_FLOOR_DB
    assert json.loads(json.dumps(report))["edges"] == report["edges"]
    text = format_report(report)
    row = next(line for line in text.splitlines() if line.split()[:2] == ["notch", "50"])
    assert row.split()[-2:] == ["<", "-300"], row
    assert f"{notch['per_pass_db']:.6g}" in row  # above the floor: the number
    assert f"{notch['overall_db']:.6g}" not in text
    low, high = report["overall_minus3db_hz"]
    assert f"{low:.6g}, {high:.6g} Hz" in text


def test_notch_rounding_stays_within_the_default_tolerance() -> None:
    # A 50 Hz notch 0.2 Hz wide at 48 kHz: its float64 rounding, measured against
    # np.longdouble in test_effective, is at most 7.6e-11 of full scale (a tone exactly at
    # the notch), below the default tolerance 1e-9: no caution, and the seam limit stays the
    # tolerance's (README "Checks, status and report": the seam check).
    from twinpass.core.checks import seam_scale

    design = design_filter(ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=0.2), 48000.0)
    assert "Caution" not in design.report["statement"]
    assert seam_scale(design, 1e-9) == 1e-9


@pytest.mark.parametrize("spec, fs, tol, remedy, not_remedy", [
    # A notch: poles at 50 Hz, far from z = 1 (scipy.signal.sos2zpk); only a wider notch or
    # a lower sample rate moves them off the unit circle (1 - r is about pi * width / fs).
    (ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=0.2), 48000.0, 1e-11,
     "Widen the notch", "Raise the cutoff"),
    # A narrow band-pass at 100 Hz: likewise, its band is what to widen.
    (ResponseSpec(kind="bandpass", family="butterworth", order=4, cutoff_hz=(99.0, 101.0)), 48000.0, 1e-13,
     "Widen the narrowest band", "Raise the cutoff"),
    # A low-pass with its edge 0.01 Hz below Nyquist: poles near z = -1.
    (ResponseSpec(kind="lowpass", family="butterworth", order=4, cutoff_hz=(499.99,)), 1000.0, 1e-12,
     "Lower the band edge near Nyquist", "decimate"),
    # A high-pass at 2e-6 of the sample rate: poles near z = 1 (guard: the remedy was right
    # for it before and must stay so).
    (ResponseSpec(kind="highpass", family="butterworth", order=2, cutoff_hz=(0.002,)), 1000.0, 1e-9,
     "Raise the cutoff", "Widen"),
])
def test_rounding_caution_names_a_remedy_that_fits_the_design(spec, fs, tol, remedy, not_remedy) -> None:
    statement = design_filter(spec, fs, tolerance=tol).report["statement"]
    assert "Caution: float64 rounding" in statement
    assert remedy in statement and not_remedy not in statement, statement


# ----------------------------------------------------------------------------- README: scipy's padlen


def test_readme_default_padlen_matches_scipy_for_an_odd_order_design() -> None:
    # README "Halos and the tolerance" names scipy's default padlen for a 3rd-order
    # Butterworth (two sections, one first-order) and for four second-order sections.
    # Reference: scipy.signal.sosfiltfilt itself, whose default must equal an explicit
    # padlen of that many samples; and twinpass's end extension with edge_samples set to
    # it must then reproduce scipy's default output, as the README says.
    from pathlib import Path

    from twinpass.core.kernel import filtfilt_window

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    odd = int(re.search(r"(\d+) for a 3rd-order Butterworth", readme).group(1))
    four = int(re.search(r"(\d+) for four second-order sections", readme).group(1))
    x = np.random.default_rng(5).standard_normal(4000)
    for order, padlen in ((3, odd), (8, four)):
        design = design_filter(ResponseSpec(kind="lowpass", family="butterworth", order=order, cutoff_hz=(30.0,),
                                            cutoff_means="per-pass"), 200.0)
        default = signal.sosfiltfilt(design.sos, x)
        assert np.array_equal(default, signal.sosfiltfilt(design.sos, x, padlen=padlen)), (order, padlen)
        assert not np.array_equal(default, signal.sosfiltfilt(design.sos, x, padlen=padlen + 3)), (order, padlen)
        ours = filtfilt_window(x, sos=design.sos, core_start=0, core_stop=x.size, at_start=True, at_end=True,
                               edge="odd", edge_samples=padlen)
        np.testing.assert_allclose(ours, default, rtol=0, atol=1e-12)


# ----------------------------------------------------------------------------- float64 rounding of long cascades


def _longdouble_rounding(sos: np.ndarray, x: np.ndarray) -> float:
    """Largest difference of two-pass scipy.signal.sosfilt in float64 from the same in
    np.longdouble (x86-64 extended precision), relative to max |x|."""
    def two_pass(s: np.ndarray, xs: np.ndarray) -> np.ndarray:
        y = signal.sosfilt(s, xs)
        return signal.sosfilt(s, y[::-1])[::-1]

    exact = two_pass(sos.astype(np.longdouble), x.astype(np.longdouble))
    return float(np.max(np.abs(two_pass(sos, x) - exact)) / np.max(np.abs(x)))


@pytest.mark.skipif(np.finfo(np.longdouble).eps > 1e-18, reason="needs an extended-precision long double")
def test_a_long_chebyshev1_cascade_gets_the_rounding_caution_and_a_remedy_for_cascades() -> None:
    # A Chebyshev I low-pass of order 35 at 100 Hz, 1 kHz: its float64 rounding (measured
    # against np.longdouble on a full-scale square wave, the reference above) is far above
    # a 1e-9 tolerance, so the report cautions, its estimate covers the measurement, the
    # remedy is to shorten the cascade (not to move poles), and the seam limit follows it.
    from twinpass.core.checks import seam_scale

    spec = ResponseSpec(kind="lowpass", family="chebyshev1", order=35, cutoff_hz=(100.0,), passband_ripple_db=0.1)
    design = design_filter(spec, 1000.0, tolerance=1e-9)
    t = np.arange(80_000)
    measured = _longdouble_rounding(design.sos, np.sign(np.sin(2 * np.pi * t / 740.0 + 0.2)))
    assert measured > 1e-9
    assert measured < design.report["rounding_estimate"] < 100 * measured
    statement = design.report["statement"]
    assert "Caution: float64 rounding" in statement and "cascade of sections" in statement, statement
    assert "'elliptic' or 'auto'" in statement and "Raise the cutoff" not in statement, statement
    assert seam_scale(design, 1e-9) == design.report["rounding_estimate"]


@pytest.mark.parametrize("spec", [
    ResponseSpec(kind="lowpass", family="chebyshev1", order=40, cutoff_hz=(100.0,), passband_ripple_db=0.1),
    ResponseSpec(kind="lowpass", family="chebyshev1", passband_hz=(100.0,), stopband_hz=(101.0,),
                 passband_ripple_db=0.1, stopband_attenuation_db=100.0),
])
def test_a_cascade_whose_rounding_is_hopeless_is_refused_with_its_cause(spec: ResponseSpec) -> None:
    # Chebyshev I low-passes at 100 Hz, 1 kHz of order 40 (fixed) and 60 (the minimum order
    # for 100/101 Hz, 0.1/100 dB overall, scipy.signal.cheb1ord with 0.05/50 dB per pass):
    # measured against np.longdouble their float64 rounding is 1.3e-7 and 1e-2 of full scale,
    # at or above a 24-bit recording's resolution (2**-23 = 1.2e-7): refused, naming the
    # cause and the families that reach the spec at a lower order.
    assert spec.order == 40 or signal.cheb1ord(100.0, 101.0, 0.05, 50.0, fs=1000.0)[0] == 60
    with pytest.raises(DesignError) as err:
        design_filter(spec, 1000.0)
    text = str(err.value)
    assert "float64 rounding" in text and "cascade" in text and "lower the order" in text, text
    assert "'elliptic' or 'auto'" in text, text


def test_auto_meets_a_spec_whose_chebyshev1_cascade_is_refused() -> None:
    # The same 100/101 Hz, 0.1/100 dB spec: scipy.signal.ellipord gives order 13 per pass
    # (0.05/50 dB); `auto` takes it, with no rounding caution.
    spec = ResponseSpec(kind="lowpass", family="auto", passband_hz=(100.0,), stopband_hz=(101.0,),
                        passband_ripple_db=0.1, stopband_attenuation_db=100.0)
    design = design_filter(spec, 1000.0)
    assert design.family == "elliptic"
    assert design.order == signal.ellipord(100.0, 101.0, 0.05, 50.0, fs=1000.0)[0]
    assert "Caution" not in design.report["statement"]


# ----------------------------------------------------------------------------- equiripple stopbands and rounding


def test_chebyshev2_at_a_very_low_cutoff_is_designed_near_the_order_scipy_gives() -> None:
    # A Chebyshev II high-pass, pass 0.5 Hz, stop 0.25 Hz at 48 kHz, 1/60 dB overall:
    # scipy.signal.cheb2ord gives order 4 (0.5/30 dB per pass). Its stopband ripples at
    # exactly the designed attenuation, and rounding its float64 coefficients lifts it a
    # few 1e-6 dB above that, so the exact design misses by a hair at every order; designed
    # 0.01 dB deeper per pass it meets the spec (order 4 or, where the deeper stopband
    # costs passband, 5), not "raise max_order".
    spec = ResponseSpec(kind="highpass", family="chebyshev2", passband_hz=(0.5,), stopband_hz=(0.25,),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    n = signal.cheb2ord(0.5, 0.25, 0.5, 30.0, fs=48000.0)[0]
    assert n == 4
    design = design_filter(spec, 48000.0)
    assert n <= design.order <= n + 1
    assert design.report["stopband_attenuation_margin_db"] >= 0.0
    assert design.report["passband_ripple_margin_db"] >= 0.0


def test_an_equiripple_design_that_met_the_spec_keeps_scipys_coefficients() -> None:
    # A Chebyshev II high-pass, pass 10 Hz, stop 5 Hz at 1 kHz, 1/60 dB overall meets the spec
    # at scipy.signal.cheb2ord's order: its coefficients are scipy.signal.cheby2's at the
    # per-pass 30 dB, unchanged.
    spec = ResponseSpec(kind="highpass", family="chebyshev2", passband_hz=(10.0,), stopband_hz=(5.0,),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    n, wn = signal.cheb2ord(10.0, 5.0, 0.5, 30.0, fs=1000.0)
    design = design_filter(spec, 1000.0)
    assert design.order == n
    np.testing.assert_array_equal(design.sos, signal.cheby2(n, 30.0, wn, "highpass", fs=1000.0, output="sos"))


def test_an_equiripple_miss_that_a_deeper_design_cannot_mend_names_rounding_not_max_order(monkeypatch) -> None:
    # With no extra depth allowed (the margin set to 0 dB), the Chebyshev II high-pass above
    # (0.5/0.25 Hz at 48 kHz) misses by coefficient rounding at the order scipy.signal.cheb2ord
    # gives; the error says so and suggests decimating or another family, not a higher order.
    import twinpass.core.design as design_module

    monkeypatch.setattr(design_module, "STOPBAND_MARGIN_DB", 0.0)
    spec = ResponseSpec(kind="highpass", family="chebyshev2", passband_hz=(0.5,), stopband_hz=(0.25,),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    with pytest.raises(DesignError) as err:
        design_filter(spec, 48000.0)
    text = str(err.value)
    assert "at order 4" in text and "rounding" in text and "decimate first" in text, text
    assert "max_order" not in text, text


# ----------------------------------------------------------------------------- validation before the rate is known


def test_a_notch_too_wide_before_the_rate_is_known_names_no_nyquist_figure(tmp_path) -> None:
    # A 50 Hz notch of Q 0.2 is 250 Hz wide (width = f0 / Q, the definition of Q): it does not
    # fit above 0 Hz at any sample rate, so the configuration is refused when read, without a
    # Nyquist frequency (none is known yet); at a known rate a notch too wide for Nyquist
    # names it (fs / 2).
    from twinpass.config import load_config
    from twinpass.errors import ConfigError

    path = tmp_path / "job.toml"
    path.write_text('[response]\nkind = "notch"\nnotch_hz = 50.0\nnotch_q = 0.2\n')
    with pytest.raises(ConfigError) as err:
        load_config(path)
    text = str(err.value)
    assert "does not fit around notch_hz=50 above 0 Hz; use a width below 100 Hz" in text, text
    assert "Nyquist" not in text and "e+14" not in text, text
    with pytest.raises(SpecError, match=r"between 0 Hz and Nyquist 500 Hz; use a width below 100 Hz"):
        validate_spec(ResponseSpec(kind="notch", notch_hz=450.0, notch_width_hz=150.0), 1000.0)


@pytest.mark.parametrize("spec", [
    ResponseSpec(kind="lowpass", order=4, cutoff_hz=(20.0,)),
    ResponseSpec(kind="bandpass", family="elliptic", passband_hz=(0.5, 30.0), stopband_hz=(0.1, 45.0),
                 passband_ripple_db=1.0, stopband_attenuation_db=60.0),
])
def test_a_rate_far_above_the_band_edges_is_refused_without_floating_point_warnings(spec):
    # At 1e300 Hz the edges are ~1e-299 of the Nyquist frequency: scipy's design arithmetic
    # (scipy.signal.ellipord, tf2zpk) divides by values that underflow to 0 there, and warns.
    # The design is refused with its reason (a pole on the unit circle; an order estimate that
    # failed); the floating-point warnings on the way say nothing more and are not shown.
    with np.errstate(divide="warn", invalid="warn"), warnings.catch_warnings():
        warnings.simplefilter("error")  # a warning would be raised here instead of the SpecError
        with pytest.raises(SpecError):
            design_filter(spec, 1e300)
