"""Per-block checks against reference computations.

Reference library: scipy.signal (``csd``, ``welch``, ``coherence``, ``spectrogram`` for the
Welch estimate; ``sosfiltfilt`` / ``filtfilt`` for correct two-pass processing; ``sosfilt``
for a single forward pass; ``ellip`` / ``ellipord`` / ``butter`` / ``firwin`` for the
filters, built here independently of twinpass's own designer).
"""

from __future__ import annotations

import functools
import json
import math

import numpy as np
import pytest
from scipy import signal

from twinpass.config import ChecksConfig
from twinpass.core import checks
from twinpass.core.checks import FAIL, FIGURE_INDEX, FIGURES, PASS, WARN
from twinpass.core.effective import effective_length
from twinpass.core.types import Design, ResponseSpec
from twinpass.errors import KernelError

FS = 100.0
TOL = 1e-9
CFG = ChecksConfig()


def make_design(spec: ResponseSpec, family: str, order: int, *, sos=None, taps=None) -> Design:
    """A Design wrapping coefficients designed directly with scipy.signal."""
    return Design(
        spec=spec,
        family=family,
        sample_rate_hz=FS,
        order=order,
        sos=sos,
        taps=taps,
        effective_length=effective_length(sos=sos, taps=taps, tolerance=TOL),
        tolerance=TOL,
    )


def bandpass_elliptic() -> Design:
    """Overall 0.5-30 Hz passband, 0.1/45 Hz stopband, 1 dB ripple, 60 dB attenuation.

    Two passes double the dB figures, so each pass gets 0.5 dB / 30 dB (scipy.signal.ellipord).
    """
    spec = ResponseSpec(kind="bandpass", family="elliptic", passband_hz=(0.5, 30.0), stopband_hz=(0.1, 45.0),
                        passband_ripple_db=1.0, stopband_attenuation_db=60.0)
    n, wn = signal.ellipord([0.5, 30.0], [0.1, 45.0], 0.5, 30.0, fs=FS)
    return make_design(spec, "elliptic", n, sos=signal.ellip(n, 0.5, 30.0, wn, "bandpass", output="sos", fs=FS))


def lowpass_butterworth() -> Design:
    """Order 4 per pass, overall -3.01 dB at 10 Hz.

    Butterworth magnitude |H|^2 = 1 / (1 + (f/fc)^(2N)) (textbook formula); the two-pass
    amplitude is that value, so it is 1/sqrt(2) at 10 Hz when fc = 10 / (sqrt(2) - 1)^(1/(2N)).
    """
    spec = ResponseSpec(kind="lowpass", order=4, cutoff_hz=(10.0,))
    fc = 10.0 / (math.sqrt(2.0) - 1.0) ** (1.0 / 8.0)
    return make_design(spec, "butterworth", 4, sos=signal.butter(4, fc, output="sos", fs=FS))


def lowpass_fir() -> Design:
    """101-tap Hamming-window lowpass at 12.5 Hz: overall 0.1 dB / 80 dB, 10 / 15 Hz edges."""
    spec = ResponseSpec(kind="lowpass", family="fir", passband_hz=(10.0,), stopband_hz=(15.0,),
                        passband_ripple_db=0.1, stopband_attenuation_db=80.0)
    return make_design(spec, "fir", 100, taps=signal.firwin(101, 12.5, fs=FS))


def two_pass(design: Design, x: np.ndarray) -> np.ndarray:
    """Whole-signal forward-backward filtering (scipy.signal reference)."""
    if design.sos is not None:
        return signal.sosfiltfilt(design.sos, x, axis=0)
    return signal.filtfilt(design.taps, [1.0], x, axis=0)


def block(design: Design, core: int = 65536, channels: int = 2, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(input core, output core) of white noise filtered as a whole, cores 2 halos from the ends.

    Far from the ends the whole-signal result is what a blockwise run reproduces (within
    the tolerance), so the core is a correctly processed block.
    """
    pad = 2 * design.effective_length + 64
    x = np.random.default_rng(seed).standard_normal((core + 2 * pad, channels))
    y = two_pass(design, x)
    return x[pad:-pad], y[pad:-pad]


def col(figures: np.ndarray, name: str) -> np.ndarray:
    return figures[:, FIGURE_INDEX[name]]


# ----------------------------------------------------------------------------- estimate


def _window_weighted_line(segment: np.ndarray) -> np.ndarray:
    """``segment`` minus its least-squares line weighted by the Hann window (numpy.polyfit,
    whose weights multiply the residuals, so they are the window's square root)."""
    t = np.arange(segment.shape[-1], dtype=np.float64)
    root = np.sqrt(signal.get_window("hann", t.size))
    flat = segment.reshape(-1, t.size)
    fitted = [np.polyval(np.polyfit(t, row, 1, w=root), t) for row in flat]
    return segment - np.reshape(fitted, segment.shape)


@pytest.mark.parametrize("detrend, difference",
                         [("constant", False), ("linear", False), ("linear", True), ("weighted", False)])
def test_transfer_estimate_agrees_with_scipy_csd_welch(detrend: str, difference: bool) -> None:
    # Reference: scipy.signal.csd / welch / coherence / spectrogram called directly with the
    # documented parameters (Hann window, 50 % overlap, the same detrend, density), on the
    # first differences (numpy.diff) when the estimate is asked for them; the window-weighted
    # line as a detrend callable built on numpy.polyfit. A ramp under both signals makes a
    # wrong or missing line removal show.
    design = lowpass_butterworth()
    x, y = block(design, core=20001, channels=2, seed=3)  # segments do not fill the block exactly
    ramp = np.linspace(0.0, 300.0, x.shape[0])[:, None] * [1.0, -0.5]
    x, y = x + ramp, y + ramp
    nperseg = 512
    est = checks.transfer_estimate(x, y, FS, nperseg, detrend=detrend, difference=difference)
    if difference:
        x, y = np.diff(x, axis=0), np.diff(y, axis=0)
    kw = dict(fs=FS, window="hann", nperseg=nperseg, noverlap=nperseg // 2, axis=0,
              detrend=_window_weighted_line if detrend == "weighted" else detrend)
    f, pxy = signal.csd(x, y, **kw)
    _, pxx = signal.welch(x, **kw)
    _, pyy = signal.welch(y, **kw)
    _, coh = signal.coherence(x, y, **kw)
    # Equal up to FFT rounding (relative 1e-9 of each value, 1e-13 of the largest).
    np.testing.assert_allclose(est.freqs_hz, f)
    np.testing.assert_allclose(est.pxx, pxx, rtol=1e-9, atol=1e-13 * pxx.max())
    np.testing.assert_allclose(est.pyy, pyy, rtol=1e-9, atol=1e-13 * pyy.max())
    np.testing.assert_allclose(est.pxy, pxy, rtol=1e-9, atol=1e-13 * np.abs(pxy).max())
    # The window-weighted line leaves no 0 Hz content: its ratios there are rounding noise.
    k = slice(1, None) if detrend == "weighted" else slice(None)
    np.testing.assert_allclose(est.h[k], (pxy / pxx)[k], rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(est.coherence[k], coh[k], rtol=1e-6, atol=1e-9)
    _, t, _ = signal.spectrogram(x[:, 0], fs=FS, window="hann", nperseg=nperseg, noverlap=nperseg // 2)
    assert est.segments == t.size
    # Effective segments: (sum of the segments' periodograms)^2 / sum of their squares, the
    # periodograms from scipy.signal.spectrogram with the same detrend; the smaller of input's
    # and output's.
    spread = []
    for v in (x, y):
        _, _, per = signal.spectrogram(v.T, **{**kw, "axis": -1})  # (channels, n_freqs, segments)
        spread.append((per.sum(axis=-1) ** 2 / (per**2).sum(axis=-1)).T)
    np.testing.assert_allclose(est.effective_segments[k], np.minimum(*spread)[k], rtol=1e-6)
    with pytest.raises(KernelError, match="detrend"):
        checks.transfer_estimate(x, y, FS, nperseg, detrend="quadratic")


def test_float32_transforms_agree_with_scipy_where_the_output_is_strong() -> None:
    # Reference: scipy.signal.csd / welch in float64 (as above). Single precision rounds at
    # 1.2e-7 relative (IEEE 754 binary32), so bins within 60 dB of each channel's strongest
    # output bin must agree to 1e-4 relative; deeper bins are what float32 cannot resolve,
    # which is why block_figures uses float32 only when no stopband figure is measured.
    design = lowpass_butterworth()
    x, y = block(design, core=20001, channels=3, seed=8)
    nperseg = 512
    est = checks.transfer_estimate(x, y, FS, nperseg, precision="float32")
    kw = dict(fs=FS, window="hann", nperseg=nperseg, noverlap=nperseg // 2, axis=0)
    _, pxy = signal.csd(x, y, **kw)
    _, pxx = signal.welch(x, **kw)
    _, pyy = signal.welch(y, **kw)
    _, coh = signal.coherence(x, y, **kw)
    strong = pyy >= pyy.max(axis=0) * 1e-6
    assert strong.sum() > 50
    for got, ref in ((est.pxx, pxx), (est.pyy, pyy), (est.pxy, pxy), (est.h, pxy / pxx)):
        np.testing.assert_array_less(np.abs(got - ref)[strong], 1e-4 * np.abs(ref)[strong])
    np.testing.assert_array_less(np.abs(est.coherence - coh)[strong], 1e-4)
    with pytest.raises(KernelError, match="precision"):
        checks.transfer_estimate(x, y, FS, nperseg, precision="float16")


@pytest.mark.parametrize(
    "n_samples, step",
    [
        (3000, 512),  # few enough half-overlapping segments: scipy's own hop
        (5000, 795),  # spread: overlap below half
        (20000, 3795),  # spread: gaps between segments
    ],
)
def test_spread_segments_agree_with_scipy_csd_per_segment(n_samples: int, step: int, monkeypatch) -> None:
    # Reference: scipy.signal.csd / scipy.signal.welch (Hann window, constant detrend, density)
    # of each segment on its own, averaged over the segments the estimate uses (the Welch
    # average). Three channels of very different offsets and levels, all estimated together.
    nperseg, max_segments = 1024, 6
    rng = np.random.default_rng(5)
    x = rng.standard_normal((n_samples, 3)) * [1.0, 1e-3, 50.0] + [0.0, 7.0, -2e3]
    y = two_pass(lowpass_butterworth(), x)  # a lowpass keeps the offsets
    est = checks.transfer_estimate(x, y, FS, nperseg, max_segments)
    starts = range(0, n_samples - nperseg + 1, step)
    assert est.segments == len(starts) <= max_segments
    kw = dict(fs=FS, window="hann", nperseg=nperseg, noverlap=0, axis=0)
    pxy = np.mean([signal.csd(x[s : s + nperseg], y[s : s + nperseg], **kw)[1] for s in starts], axis=0)
    pxx = np.mean([signal.welch(x[s : s + nperseg], **kw)[1] for s in starts], axis=0)
    pyy = np.mean([signal.welch(y[s : s + nperseg], **kw)[1] for s in starts], axis=0)

    def close(a: np.ndarray, b: np.ndarray) -> None:  # relative 1e-9, or 1e-13 of the channel's largest
        np.testing.assert_array_less(np.abs(a - b), 1e-9 * np.abs(b) + 1e-13 * np.abs(b).max(axis=0))

    close(est.pxx, pxx)
    close(est.pyy, pyy)
    close(est.pxy, pxy)
    # Channels estimated one at a time (the buffer bound split into groups) give the same numbers.
    monkeypatch.setattr(checks, "_GROUP_BYTES", 8 * nperseg)
    single = checks.transfer_estimate(x, y, FS, nperseg, max_segments)
    close(single.pxy, pxy)
    np.testing.assert_allclose(single.coherence, est.coherence, rtol=1e-12, atol=1e-15)


def test_transfer_estimate_rejects_mismatched_shapes() -> None:
    with pytest.raises(KernelError, match="shape"):
        checks.transfer_estimate(np.zeros((1000, 2)), np.zeros((1000, 1)), FS, 256)


# ----------------------------------------------------------------------------- correct blocks


@pytest.mark.parametrize(
    "make, stopband_measurable",
    [
        (bandpass_elliptic, True),
        (lowpass_butterworth, False),  # fixed order: no attenuation figure to check
        # about 106 dB overall (twice the ~53 dB of a Hamming window, from memory): below the
        # Hann window's leakage at this resolution, so not measured (NaN), never a false figure
        (lowpass_fir, False),
    ],
)
def test_correct_two_pass_block_passes(make, stopband_measurable: bool) -> None:
    # Reference: scipy.signal.sosfiltfilt / filtfilt of broadband noise. The measured response
    # must match the designed |H|^2 within the design ripple plus the estimator error, with
    # ~0 phase, and reach the spec attenuation where it can be measured.
    design = make()
    x, y = block(design)
    fig = checks.block_figures(x, y, design, CFG)
    assert fig.shape == (2, len(FIGURES))
    ripple = design.spec.passband_ripple_db or 0.0
    assert np.all(col(fig, "coherent_bins") > 10)
    assert np.all(np.abs(col(fig, "passband_dev_db")) <= ripple + checks.ESTIMATOR_ERROR_DB)
    assert np.all(np.abs(col(fig, "phase_deg")) <= checks.ESTIMATOR_ERROR_DEG)
    att = col(fig, "stopband_att_db")
    if stopband_measurable:
        assert np.all(np.isfinite(att)), "white noise has energy in the stopband: attenuation must be measured"
        assert np.all(att >= design.spec.stopband_attenuation_db - CFG.stopband_margin_db)
    else:
        assert np.all(np.isnan(att) | (att >= (design.spec.stopband_attenuation_db or 0.0) - CFG.stopband_margin_db))
    assert np.all(np.isnan(col(fig, "seam_mismatch")))
    assert checks.grade(fig, design, CFG, TOL) == PASS


def test_correct_block_with_realistic_input_passes() -> None:
    # Offset + random walk + a tone + a spike: a correct two-pass result (scipy.signal.sosfiltfilt)
    # must not be flagged even though the input is far from white.
    design = bandpass_elliptic()
    pad = 2 * design.effective_length
    n = 65536 + 2 * pad
    rng = np.random.default_rng(7)
    t = np.arange(n) / FS
    x = 500.0 + np.cumsum(rng.standard_normal(n)) * 0.05 + 3.0 * np.sin(2 * np.pi * 16.3 * t)
    x += 0.01 * rng.standard_normal(n)
    x[n // 2] += 200.0
    y = two_pass(design, x)
    fig = checks.block_figures(x[pad:-pad], y[pad:-pad], design, CFG)
    assert checks.grade(fig, design, CFG, TOL) == PASS


@pytest.mark.parametrize("side", ["start", "end"])
@pytest.mark.parametrize("within", [100, 500])
def test_an_event_after_silence_at_a_block_edge_is_not_failed(side: str, within: int) -> None:
    # Exact zeros, then noise starting (or, mirrored, ending) `within` samples of the block's
    # edge: one Welch segment carries all the passband power, so its coherence is near 1
    # whatever the output; such bins are not assessed. The output is the correct two-pass
    # result (scipy.signal.sosfiltfilt), which must not fail.
    design = bandpass_elliptic()
    pad, core = 3 * design.effective_length, 60000
    n = core + 2 * pad
    x = np.zeros(n)
    rng = np.random.default_rng(11)
    if side == "end":
        x[pad + core - within:] = rng.standard_normal(n - (pad + core - within))
    else:
        x[: pad + within] = rng.standard_normal(pad + within)
    y = two_pass(design, x)
    fig = checks.block_figures(x[pad:-pad, None], y[pad:-pad, None], design, CFG)
    assert checks.grade(fig, design, CFG, TOL) == PASS


def test_short_block_is_not_measured() -> None:
    # Too short for a usable Welch segment: response figures are NaN and do not grade.
    design = bandpass_elliptic()
    x, y = block(design, core=200, channels=1)
    fig = checks.block_figures(x, y, design, CFG)
    for name in ("passband_dev_db", "phase_deg", "stopband_att_db"):
        assert np.isnan(col(fig, name)).all()
    assert checks.grade(fig, design, CFG, TOL) == PASS


def test_response_false_leaves_response_figures_nan() -> None:
    design = lowpass_fir()
    x, y = block(design, core=8192, channels=1)
    fig = checks.block_figures(x, y, design, CFG, response=False)
    assert np.isnan(col(fig, "passband_dev_db")).all()
    assert np.isfinite(col(fig, "rms_out")).all()


def _design(spec: ResponseSpec, fs: float) -> Design:
    from twinpass.core.design import design_filter

    return design_filter(spec, fs)


def elliptic_narrow_lowpass() -> Design:
    """Overall 2 Hz / 2.2 Hz, 0.1 dB / 120 dB at 1 kHz: effective length about 142,000 samples."""
    return _design(ResponseSpec(kind="lowpass", family="elliptic", passband_hz=(2.0,), stopband_hz=(2.2,),
                                passband_ripple_db=0.1, stopband_attenuation_db=120.0), 1000.0)


def elliptic_lowpass_40() -> Design:
    """Overall 40 Hz / 48 Hz, 0.1 dB / 100 dB at 997.3 Hz (poles close to the unit circle
    near 40 Hz: a step response that rings for thousands of samples)."""
    return _design(ResponseSpec(kind="lowpass", family="elliptic", passband_hz=(40.0,), stopband_hz=(48.0,),
                                passband_ripple_db=0.1, stopband_attenuation_db=100.0), 997.3)


def _stopband_ok(fig: np.ndarray, design: Design) -> bool:
    att = col(fig, "stopband_att_db")
    return bool(np.all(np.isnan(att) | (att >= design.spec.stopband_attenuation_db - CFG.stopband_margin_db)))


@pytest.mark.parametrize("core", [2001, 5000])
def test_strong_slow_sine_does_not_fail_the_stopband(core: int) -> None:
    # Reference: scipy.signal.sosfiltfilt of a 0.3 Hz sine of amplitude 1000 on unit white
    # noise. The sine passes and is 10^6 times the noise's amplitude; in a Hann-windowed
    # segment of a few tenths of a second it is a large ramp or bow whose spectral tail
    # (falling as 1/k^3 in amplitude, the Hann side lobes' rate, from memory) sits far above
    # the output's true stopband level (120 dB under the noise). The figure must be the
    # filter's attenuation or NaN (not measured), never that tail.
    design = elliptic_narrow_lowpass()
    n = 200000
    t = np.arange(n) / design.sample_rate_hz
    x = 1000.0 * np.sin(2 * np.pi * 0.3 * t) + np.random.default_rng(0).standard_normal(n)
    y = signal.sosfiltfilt(design.sos, x, padlen=design.effective_length)
    s = 100000
    fig = checks.block_figures(x[s : s + core, None], y[s : s + core, None], design, CFG, out_dtype="float64")
    assert _stopband_ok(fig, design), col(fig, "stopband_att_db")
    assert checks.grade(fig, design, CFG, design.tolerance) == PASS


def _stepped(design: Design, step_at: int, n: int = 40000, channels: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """An offset of 1000 with an 11 Hz sine and noise, stepping down by 300 at ``step_at``,
    and its scipy.signal.sosfiltfilt output."""
    t = np.arange(n) / design.sample_rate_hz
    rng = np.random.default_rng(1)
    x = 1000.0 + np.sin(2 * np.pi * 11.0 * t)[:, None] + 0.3 * rng.standard_normal((n, channels))
    x[step_at:] -= 300.0
    return x, signal.sosfiltfilt(design.sos, x, axis=0, padlen=design.effective_length)


@pytest.mark.parametrize("offset", [-1, 0, 33, 1967, 2000])
def test_step_near_or_inside_a_short_block_does_not_fail_it(offset: int) -> None:
    # Reference: scipy.signal.sosfiltfilt. A step of 300 against a signal of about 1: just
    # outside the block (offset -1, 2000) its ringing fills the block's output without any
    # cause in the block's input; inside it (33, 1967) the smoothed step's tail in a Welch
    # segment dwarfs the true stopband output. A correct output passes (or is not measured).
    design = elliptic_lowpass_40()
    s, core = 20000, 2000
    x, y = _stepped(design, s + offset)
    fig = checks.block_figures(x[s : s + core], y[s : s + core], design, CFG, out_dtype="float64")
    assert _stopband_ok(fig, design), col(fig, "stopband_att_db")
    assert checks.grade(fig, design, CFG, design.tolerance) == PASS


@pytest.mark.parametrize("fault", ["swapped", "forward"])
def test_faults_next_to_a_step_still_fail(fault: str) -> None:
    # The same step just before a short block, with a wrong output: each channel given the
    # other's correct output (the channels differ only in their noise), or a single causal
    # pass (scipy.signal.sosfilt). Input outside the block can only add free responses of the
    # filter's poles at the block's ends; these outputs differ by far more.
    design = elliptic_lowpass_40()
    s, core = 20000, 2000
    x, y = _stepped(design, s - 1, channels=2)
    if fault == "swapped":
        y = y[:, ::-1]
    else:
        y = signal.sosfilt(design.sos, x, axis=0)
    fig = checks.block_figures(x[s : s + core], y[s : s + core], design, CFG, out_dtype="float64")
    assert checks.grade(fig, design, CFG, design.tolerance) == FAIL


def highpass_5hz() -> Design:
    """Overall stopband below 1 Hz (60 dB), passband above 5 Hz (1 dB ripple) at 200 Hz."""
    return _design(ResponseSpec(kind="highpass", passband_hz=(5.0,), stopband_hz=(1.0,), passband_ripple_db=1.0,
                                stopband_attenuation_db=60.0), 200.0)


def _highpass_blocks(leak: float = 0.0) -> list[tuple[np.ndarray, np.ndarray]]:
    """Three 20,000-sample blocks of unit white noise (two channels) and their
    scipy.signal.sosfiltfilt output, plus ``leak`` times the input."""
    design = highpass_5hz()
    x = np.random.default_rng(4).standard_normal((120000, 2))
    y = signal.sosfiltfilt(design.sos, x, axis=0, padlen=design.effective_length) + leak * x
    return [(x[s : s + 20000], y[s : s + 20000]) for s in (30000, 50000, 70000)]


def test_highpass_stopband_near_0_hz_is_measured() -> None:
    # Reference: scipy.signal.sosfiltfilt output of white noise; spectra as scipy.signal.welch /
    # csd take them. The stopband (below 1 Hz) lies where the first difference weakens the
    # input by 40 dB or more, so only the estimate of the signals themselves measures it: the
    # figure must be finite and meet the specification (60 dB, less the margin).
    design = highpass_5hz()
    for x, y in _highpass_blocks():
        fig = checks.block_figures(x, y, design, CFG, out_dtype="float64")
        att = col(fig, "stopband_att_db")
        assert np.all(np.isfinite(att)) and np.all(att >= 60.0 - CFG.stopband_margin_db), att
        assert checks.grade(fig, design, CFG, design.tolerance) == PASS


def test_highpass_stopband_leak_fails() -> None:
    # The same blocks with 1 % of the input added to the output (a 40 dB floor instead of 60 dB):
    # a real leak in the stopband near 0 Hz must fail.
    design = highpass_5hz()
    for x, y in _highpass_blocks(leak=1e-2):
        fig = checks.block_figures(x, y, design, CFG, out_dtype="float64")
        assert np.all(col(fig, "stopband_att_db") < 45.0), col(fig, "stopband_att_db")
        assert checks.grade(fig, design, CFG, design.tolerance) == FAIL


def test_leakage_bound_covers_a_tone_anywhere_in_its_bin() -> None:
    # Reference: the one-sided periodogram of a Hann-windowed real tone (numpy.fft), tone
    # frequencies spread over one bin, near 0 Hz (where the tone's image is close) and
    # inside. Three or more bins from the tone and its image, every bin must stay within
    # the bound computed from the periodogram itself; a tone within a bin of 0 Hz partly
    # cancels against its own image in the main lobe, which hides up to a factor 3 of its
    # power from the bound: still well inside the leakage margin (10 dB = factor 10).
    assert 3.0 < 10.0 ** (checks.LEAKAGE_MARGIN_DB / 10.0)
    nperseg = 256
    window = signal.get_window("hann", nperseg)
    t = np.arange(nperseg)
    for centre in (1.0, 40.0):
        for offset in np.linspace(-0.5, 0.5, 21):
            f = centre + offset
            for phase in (0.0, 0.7, 1.6):
                power = np.abs(np.fft.rfft(window * np.cos(2 * np.pi * f * t / nperseg + phase))) ** 2
                power[1:-1] *= 2.0  # one-sided
                bound = checks._leakage(power[:, None], nperseg)[:, 0]
                far = np.abs(np.arange(power.size) - abs(f)) >= 3.0
                far &= np.abs(np.arange(power.size) + abs(f)) >= 3.0
                factor = 1.0 if f >= 1.0 else 3.0
                assert np.all(power[far] <= factor * bound[far] * (1 + 1e-9)), (f, phase)


# ----------------------------------------------------------------------------- wrong blocks


def test_single_forward_pass_fails() -> None:
    # Reference: scipy.signal.sosfilt, one causal pass: its phase is far from zero in the passband.
    design = bandpass_elliptic()
    x, _ = block(design, channels=1)
    y = signal.sosfilt(design.sos, x, axis=0)
    fig = checks.block_figures(x, y, design, CFG)
    assert np.abs(col(fig, "phase_deg")).max() > CFG.phase_fail_deg
    assert checks.grade(fig, design, CFG, TOL) == FAIL


def test_perturbed_coefficients_fail() -> None:
    # The block was processed with a different design (upper passband edge 25 Hz instead of
    # 30 Hz, scipy.signal.ellip): the 25-30 Hz part of the passband is attenuated.
    design = bandpass_elliptic()
    n, wn = signal.ellipord([0.5, 25.0], [0.1, 37.0], 0.5, 30.0, fs=FS)
    wrong = signal.ellip(n, 0.5, 30.0, wn, "bandpass", output="sos", fs=FS)
    pad = 2 * design.effective_length + 64
    x = np.random.default_rng(1).standard_normal((65536 + 2 * pad, 1))
    y = signal.sosfiltfilt(wrong, x, axis=0)
    fig = checks.block_figures(x[pad:-pad], y[pad:-pad], design, CFG)
    assert np.abs(col(fig, "passband_dev_db")).max() > 10.0
    assert checks.grade(fig, design, CFG, TOL) == FAIL


def test_unfiltered_block_fails_on_stopband() -> None:
    # Output = input: the stopband is not attenuated at all (about 0 dB against 60 dB).
    design = bandpass_elliptic()
    x, _ = block(design, channels=1)
    fig = checks.block_figures(x, x.copy(), design, CFG)
    assert col(fig, "stopband_att_db")[0] < 1.0
    assert checks.grade(fig, design, CFG, TOL) == FAIL


def test_swapped_channels_fail() -> None:
    # Each output channel is the other channel's correct result: not explained by its input.
    design = bandpass_elliptic()
    x, y = block(design, channels=2)
    fig = checks.block_figures(x, y[:, ::-1], design, CFG)
    assert np.all(col(fig, "coherent_bins") < checks.COHERENT_FRACTION_MIN * col(fig, "passband_bins"))
    assert checks.grade(fig, design, CFG, TOL) == FAIL


def test_seam_mismatch_beyond_tolerance_fails() -> None:
    design = bandpass_elliptic()
    x, y = block(design, core=16384, channels=1)
    fig = checks.block_figures(x, y, design, CFG, response=False)
    full_scale = float(np.max(np.abs(x)))
    own = y[:8]
    # max |difference| / full scale, computed by hand.
    bad = own + 1e-6 * full_scale
    value = checks.seam_mismatch(own, bad, full_scale)
    assert value == pytest.approx(1e-6, rel=1e-9)
    fig[:, FIGURE_INDEX["seam_mismatch"]] = value
    assert checks.grade(fig, design, CFG, TOL) == FAIL
    fig[:, FIGURE_INDEX["seam_mismatch"]] = checks.seam_mismatch(own, own * (1 + 1e-13), full_scale)
    assert checks.grade(fig, design, CFG, TOL) == PASS
    # Just above and below the documented limit SEAM_FACTOR * tolerance.
    fig[:, FIGURE_INDEX["seam_mismatch"]] = checks.SEAM_FACTOR * TOL * 1.01
    assert checks.grade(fig, design, CFG, TOL) == FAIL
    fig[:, FIGURE_INDEX["seam_mismatch"]] = checks.SEAM_FACTOR * TOL * 0.99
    assert checks.grade(fig, design, CFG, TOL) == PASS


def test_seam_mismatch_edge_cases() -> None:
    a = np.array([[1.0, 2.0], [3.0, np.nan]])
    b = np.array([[1.0, 2.5], [3.0, np.nan]])
    assert checks.seam_mismatch(a, b, 5.0) == pytest.approx(0.1)  # NaN = not computed, ignored
    assert math.isnan(checks.seam_mismatch(np.full(3, np.nan), np.full(3, np.nan), 1.0))
    assert checks.seam_mismatch(np.array([1.0, np.inf]), np.array([1.0, 2.0]), 1.0) == math.inf
    with pytest.raises(KernelError, match="seam"):
        checks.seam_mismatch(np.zeros(3), np.zeros(4), 1.0)


# ------------------------------------------------------- designs without a stated attenuation


def _sensor_record(n: int, fs: float, seed: int, *, swell_hz: float | None = None,
                   creep: float = 0.5) -> np.ndarray:
    """An invented sensor record, shape (n, 1): broadband noise, 50 Hz mains hum with its
    150 Hz harmonic, a 120 Hz machine tone, 3.1 Hz and 17 Hz structural modes, a creep that
    levels off over a minute (``creep`` at most), an optional slow swell at ``swell_hz``
    (amplitude 0.1), and no steps (the cases add theirs)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs
    x = 0.05 * rng.standard_normal(n) + 0.3 * np.sin(2 * np.pi * 50.0 * t + 0.4)
    x += 0.05 * np.sin(2 * np.pi * 150.0 * t) + 0.1 * np.sin(2 * np.pi * 120.0 * t + 1.0)
    x += 0.2 * np.sin(2 * np.pi * 3.1 * t) + 0.1 * np.sin(2 * np.pi * 17.0 * t + 1.0)
    x += creep * (1.0 - np.exp(-t / 60.0))
    if swell_hz is not None:
        x += 0.1 * np.sin(2 * np.pi * swell_hz * t)
    return x[:, None]


# Each case: the response, sample rate (Hz), block (samples), samples of record before the
# block, the signal's extra arguments, and a wrong filter built with scipy.signal alone.
_NARROW_CASES = {
    # configs/hydrophone-mains-notch.toml's response; wrong: the notch at 60 Hz
    # (scipy.signal.iirnotch, Q 30: 2 Hz wide per pass).
    "notch-50Hz-2Hz": (ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=2.0), 1000.0, 65536, 40000, {},
                       lambda fs: signal.tf2sos(*signal.iirnotch(60.0, 30.0, fs=fs))),
    # Fixed-order Butterworth band-stop, 4 per pass, overall -3 dB at 45 and 55 Hz; wrong:
    # the same band-stop at 115-125 Hz (scipy.signal.butter).
    "bandstop-45-55Hz": (ResponseSpec(kind="bandstop", family="butterworth", order=4, cutoff_hz=(45.0, 55.0)),
                         1000.0, 65536, 40000, {},
                         lambda fs: signal.butter(4, (115.0, 125.0), "bandstop", output="sos", fs=fs)),
    # Fixed-order Butterworth band-pass, 2 per pass, overall -3 dB at 48 and 52 Hz; wrong:
    # the band-pass at 118-122 Hz (scipy.signal.butter).
    "bandpass-48-52Hz": (ResponseSpec(kind="bandpass", family="butterworth", order=2, cutoff_hz=(48.0, 52.0)),
                         1000.0, 65536, 40000, {},
                         lambda fs: signal.butter(2, (118.0, 122.0), "bandpass", output="sos", fs=fs)),
    # configs/lab-drift-highpass.toml's design and block: 0.1 Hz, 4 per pass, at 10 kHz, 60 s
    # blocks, the block a minute into the record while the creep still rises; wrong: the
    # cutoff a hundred times too low (scipy.signal.butter at 0.001 Hz).
    "lab-highpass-0.1Hz": (ResponseSpec(kind="highpass", family="butterworth", order=4, cutoff_hz=(0.1,)),
                           10000.0, 600000, 600000, {"creep": 2.0},
                           lambda fs: signal.butter(4, 0.001, "highpass", output="sos", fs=fs)),
    # A tolerance high-pass whose stopband (below 0.5 Hz) holds a 0.38 Hz swell; wrong: the
    # stopband edge ten times too low (scipy.signal.cheby2 at 0.05 Hz).
    "highpass-tolerance": (ResponseSpec(kind="highpass", family="chebyshev2", passband_hz=(2.0,), stopband_hz=(0.5,),
                                        passband_ripple_db=1.0, stopband_attenuation_db=40.0),
                           1000.0, 65536, 40000, {"swell_hz": 0.38},
                           lambda fs: signal.cheby2(4, 20.0, 0.05, "highpass", output="sos", fs=fs)),
}


@functools.lru_cache(maxsize=2)
def _narrow_case(name: str) -> tuple[Design, np.ndarray, dict[str, np.ndarray], slice]:
    """(design, record, outputs by kind, block) of a case of :data:`_NARROW_CASES`.

    The record has a step of 0.4 just before the block and one of -0.3 in its middle; the
    outputs are the correct two-pass result (scipy.signal.sosfiltfilt with the design's
    sections over the whole record), the record itself (unfiltered) and the wrong filter's
    two-pass result.
    """
    from twinpass.core.design import design_filter

    spec, fs, core, before, extra, wrong = _NARROW_CASES[name]
    design = design_filter(spec, fs)
    x = _sensor_record(before + core + 20000, fs, seed=5, **extra)
    x[before - 20:] += 0.4
    x[before + core // 2:] -= 0.3
    outputs = {"correct": signal.sosfiltfilt(design.sos, x, axis=0), "unfiltered": x,
               "wrong band": signal.sosfiltfilt(wrong(fs), x, axis=0)}
    return design, x, outputs, slice(before, before + core)


@pytest.mark.parametrize("kind", ["unfiltered", "wrong band"])
@pytest.mark.parametrize("name", list(_NARROW_CASES))
def test_wrong_outputs_of_narrow_and_fixed_order_designs_fail(name: str, kind: str) -> None:
    # An unfiltered block and a block filtered in the wrong band, whose input has power in
    # the bands that tell them from the correct output (the hum in a notch's band, the tones
    # and noise around a narrow band, the creep and steps below a high-pass's cutoff, a
    # swell in its stopband), must fail, and on what the design removes: the stopband figure
    # (rejection bins and power gates) below what the grading accepts (REJECTION_DB, or the
    # stated attenuation, less the margin; product rule).
    design, x, outputs, core = _narrow_case(name)
    fig = checks.block_figures(x[core], outputs[kind][core], design, CFG, out_dtype="float64")
    required = design.spec.stopband_attenuation_db or checks.REJECTION_DB
    assert col(fig, "stopband_att_db")[0] < required - CFG.stopband_margin_db, fig
    assert checks.grade(fig, design, CFG, TOL) == FAIL


@pytest.mark.parametrize("name", list(_NARROW_CASES))
def test_correct_outputs_of_narrow_and_fixed_order_designs_pass(name: str) -> None:
    # Guard (passes before and after the rejection bins and gates came): the correct output
    # (scipy.signal.sosfiltfilt over the whole record, a step just before the block and one
    # inside it) passes.
    design, x, outputs, core = _narrow_case(name)
    fig = checks.block_figures(x[core], outputs["correct"][core], design, CFG, out_dtype="float64")
    assert checks.grade(fig, design, CFG, TOL) == PASS, fig


def test_segments_resolve_a_fixed_order_band_and_a_notch_band() -> None:
    # The 4 Hz passband of a fixed-order band-pass (48-52 Hz) and the rejected band of a 2 Hz
    # notch (overall level at or below -REJECTION_DB) hold graded bins of a long block. The
    # band edges come from scipy.signal.sosfreqz of the design's sections (|H|^2 of one
    # pass, squared for two), independently of the check's own grid.
    from twinpass.core.design import design_filter

    for spec, passband in ((ResponseSpec(kind="bandpass", family="butterworth", order=2, cutoff_hz=(48.0, 52.0)), True),
                           (ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=2.0), False)):
        design = design_filter(spec, 1000.0)
        nperseg = checks.segment_length(1 << 20, design)
        masks = checks._design_masks(design, nperseg)
        bins = masks.passband if passband else masks.stopband
        f, h = signal.sosfreqz(design.sos, worN=np.fft.rfftfreq(nperseg, 1e-3), fs=1000.0)
        level = 20.0 * np.log10(np.abs(h) ** 2 + 1e-300)
        assert bins.sum() >= 2, (spec.kind, nperseg)
        if passband:
            assert np.all(level[bins] >= -3.02)
        else:
            assert np.all(level[bins] <= -checks.REJECTION_DB + 0.01)


def test_power_gate_ignores_a_step_response_outlasting_its_segment() -> None:
    # Guard (passes before and after): a band-pass reaching down to 0.5 Hz rings for seconds
    # after a step; in a short block the step's response fills segments whose input holds
    # no step. That output is not explained by the segment's input and must not count as
    # power a correct output cannot hold (the correct output: scipy.signal.sosfiltfilt).
    from twinpass.core.design import design_filter

    design = design_filter(ResponseSpec(kind="bandpass", family="butterworth", order=4, cutoff_hz=(0.5, 40.0)), 1000.0)
    pad, core = 3 * design.effective_length, 5000
    for height in (40.0, 300.0):
        x = np.random.default_rng(1).standard_normal((core + 2 * pad, 2))
        x[pad + 100:] += height
        y = signal.sosfiltfilt(design.sos, x, axis=0)
        fig = checks.block_figures(x[pad : pad + core], y[pad : pad + core], design, CFG, out_dtype="float64")
        assert checks.grade(fig, design, CFG, TOL) == PASS, (height, fig)


# ----------------------------------------------------------------------------- integrity


def test_nan_input_fails() -> None:
    design = lowpass_fir()
    x, y = block(design, core=8192, channels=2)
    x[[10, 20, 30], 1] = np.nan
    fig = checks.block_figures(x, y, design, CFG)
    np.testing.assert_array_equal(col(fig, "nonfinite_in"), np.count_nonzero(~np.isfinite(x), axis=0))
    assert np.isnan(col(fig, "passband_dev_db")[1])  # no response estimate on a non-finite channel
    assert checks.grade(fig, design, CFG, TOL) == FAIL


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nonfinite_output_fails(bad: float) -> None:
    design = lowpass_fir()
    x, y = block(design, core=8192, channels=1)
    y[100, 0] = bad
    fig = checks.block_figures(x, y, design, CFG)
    assert col(fig, "nonfinite_out")[0] == 1
    assert checks.grade(fig, design, CFG, TOL) == FAIL


def test_values_beyond_float32_range_count_as_clipped() -> None:
    # IEEE 754 binary32: largest finite value 3.4028235e38 (numpy.finfo); 1e39 becomes inf
    # when cast to float32.
    assert np.finfo(np.float32).max == pytest.approx(3.4028235e38, rel=1e-7)
    with np.errstate(over="ignore"):
        assert np.isinf(np.float32(1e39))
    design = lowpass_fir()
    x, y = block(design, core=8192, channels=2)
    y[[5, 6, 7], 0] = [1e39, -2e39, 3.4e38]  # the last one still fits
    fig = checks.block_figures(x, y, design, CFG, out_dtype="float32", response=False)
    np.testing.assert_array_equal(col(fig, "clipped"), [2, 0])
    # Twinpass rule: an infinity stored for a finite result is not the filtered value: the
    # block fails, on the channel that clipped, with the setting that holds the values.
    assert checks.grade(fig, design, CFG, TOL) == FAIL
    (found,) = checks.findings(fig, design, CFG, TOL)
    assert (found.figure, found.channel, found.value, found.status) == ("clipped", 0, 2.0, FAIL)
    assert found.describe() == "2 output sample(s) beyond the output type's range, stored as infinity, on channel 0"
    fig64 = checks.block_figures(x, y, design, CFG, out_dtype="float64", response=False)
    np.testing.assert_array_equal(col(fig64, "clipped"), [0, 0])
    assert checks.grade(fig64, design, CFG, TOL) == PASS


def test_levels_of_a_sine() -> None:
    # RMS of a sinusoid of amplitude A over whole periods is A / sqrt(2) (textbook formula).
    design = lowpass_fir()
    t = np.arange(10000) / FS
    x = 2.0 * np.sin(2 * np.pi * 5.0 * t)
    fig = checks.block_figures(x, 0.5 * x, design, CFG, response=False)
    assert col(fig, "rms_in")[0] == pytest.approx(2.0 / math.sqrt(2.0), rel=1e-9)
    assert col(fig, "rms_out")[0] == pytest.approx(1.0 / math.sqrt(2.0), rel=1e-9)
    assert col(fig, "peak_in")[0] == pytest.approx(2.0, rel=1e-6)
    assert col(fig, "peak_out")[0] == pytest.approx(1.0, rel=1e-6)


def test_shape_mismatch_is_an_error() -> None:
    with pytest.raises(KernelError, match="shape"):
        checks.block_figures(np.zeros((100, 2)), np.zeros((100, 3)), lowpass_fir(), CFG)


# ----------------------------------------------------------------------------- grading rules


def _figures(**values: float) -> np.ndarray:
    row = np.full((1, len(FIGURES)), np.nan)
    for name in ("nonfinite_in", "nonfinite_out", "clipped"):
        row[0, FIGURE_INDEX[name]] = 0.0
    for name, v in values.items():
        row[0, FIGURE_INDEX[name]] = v
    return row


def test_grading_thresholds_follow_the_configuration() -> None:
    # Product rule: thresholds from ChecksConfig; the passband limits sit on top of half the
    # spec ripple plus the estimator allowance.
    design = bandpass_elliptic()
    base = 1.0 / 2.0 + checks.ESTIMATOR_ERROR_DB
    cases = [
        (dict(passband_dev_db=base + CFG.passband_warn_db - 0.01), PASS),
        (dict(passband_dev_db=-(base + CFG.passband_warn_db + 0.01)), WARN),
        (dict(passband_dev_db=base + CFG.passband_fail_db + 0.01), FAIL),
        (dict(phase_deg=CFG.phase_warn_deg - 0.1), PASS),
        (dict(phase_deg=-(CFG.phase_warn_deg + 0.1)), WARN),
        (dict(phase_deg=CFG.phase_fail_deg + 0.1), FAIL),
        (dict(stopband_att_db=60.0 - CFG.stopband_margin_db + 0.1), PASS),
        (dict(stopband_att_db=60.0 - CFG.stopband_margin_db - 0.1), FAIL),
        (dict(clipped=1.0), FAIL),
        (dict(passband_bins=100.0, coherent_bins=49.0), FAIL),
        (dict(passband_bins=100.0, coherent_bins=51.0), PASS),
    ]
    for values, expected in cases:
        assert checks.grade(_figures(**values), design, CFG, TOL) == expected, values


def test_designs_without_a_stated_attenuation_are_graded_on_rejection() -> None:
    # Product rule: a fixed-order design states no attenuation; its stopband figure (rejection
    # bins and power gates) fails below REJECTION_DB less the configured margin.
    design = lowpass_butterworth()
    assert design.spec.stopband_attenuation_db is None
    limit = checks.REJECTION_DB - CFG.stopband_margin_db
    assert checks.grade(_figures(stopband_att_db=limit + 0.1), design, CFG, TOL) == PASS
    assert checks.grade(_figures(stopband_att_db=limit - 0.1), design, CFG, TOL) == FAIL


def test_grade_file() -> None:
    assert checks.grade_file([PASS, PASS]) == "pass"
    assert checks.grade_file([PASS, WARN]) == "warn"
    assert checks.grade_file([PASS, FAIL, None]) == "fail"
    assert checks.grade_file([PASS, checks.ERROR]) == "fail"
    assert checks.grade_file([PASS, checks.PENDING]) == "incomplete"
    assert checks.grade_file(["pass", None]) == "incomplete"
    assert checks.grade_file([]) == "incomplete"


def test_summarise_is_json_safe_and_takes_the_worst() -> None:
    a = _figures(passband_dev_db=0.2, phase_deg=-3.0, stopband_att_db=70.0, passband_bins=50, coherent_bins=50)
    b = _figures(passband_dev_db=-0.4, phase_deg=1.0, stopband_att_db=65.0, passband_bins=50, coherent_bins=40)
    b[0, FIGURE_INDEX["clipped"]] = 2
    empty = np.full((1, len(FIGURES)), np.nan)
    s = checks.summarise({0: a, 1: b, 2: empty})
    json.dumps(s, allow_nan=False)  # raises on NaN or infinity
    assert s["blocks"] == 3 and s["blocks_measured"] == 2
    assert s["passband_dev_db"] == pytest.approx(-0.4)
    assert s["phase_deg"] == pytest.approx(-3.0)
    assert s["stopband_att_db"] == pytest.approx(65.0)
    assert s["coherent_bins"] == pytest.approx(40.0)
    assert s["clipped"] == 2
    assert s["seam_mismatch"] is None
    stacked = checks.summarise(np.stack([a, b]))  # a (blocks, channels, figures) array
    assert stacked["passband_dev_db"] == pytest.approx(-0.4)


def test_seam_limit_widens_to_the_rounding_of_a_design_that_cannot_meet_the_tolerance() -> None:
    # A 2nd-order high-pass at 2e-6 of the sample rate (pole radius 1 - 7.1e-6): float64
    # rounding alone makes blocks and the whole signal differ by about 2.5e-9 of full scale
    # (measured against scipy.signal.sosfiltfilt; see test_effective for the estimate's
    # calibration against extended precision), so a 1e-9 tolerance cannot be held and the
    # seam limit follows the rounding estimate instead; the report says so.
    from twinpass.core.design import design_filter
    from twinpass.core.effective import rounding_estimate
    from twinpass.core.types import ResponseSpec

    design = design_filter(ResponseSpec(kind="highpass", family="butterworth", order=2, cutoff_hz=(0.002,)),
                           1000.0, tolerance=TOL)
    estimate = rounding_estimate(sos=design.sos)
    assert estimate > 10 * TOL and design.report["rounding_estimate"] == pytest.approx(estimate)
    assert "Caution: float64 rounding" in design.report["statement"]
    fig = np.full((1, len(checks.FIGURES)), np.nan)
    fig[:, FIGURE_INDEX["seam_mismatch"]] = checks.SEAM_FACTOR * TOL * 2  # beyond the tolerance's limit
    assert checks.grade(fig, design, CFG, TOL) == PASS
    fig[:, FIGURE_INDEX["seam_mismatch"]] = checks.SEAM_FACTOR * estimate * 1.01
    assert checks.grade(fig, design, CFG, TOL) == FAIL
    # An ordinary design keeps the tolerance's limit and no caution.
    ordinary = bandpass_elliptic()
    assert rounding_estimate(sos=ordinary.sos) < TOL / 100
    assert "Caution" not in design_filter(ordinary.spec, ordinary.sample_rate_hz, tolerance=TOL).report["statement"]


def test_a_seam_failure_of_a_design_whose_rounding_exceeds_the_tolerance_does_not_blame_the_halo_alone() -> None:
    # Three blocks failing on their seams alone (1e-3 of the input peak). For an ordinary
    # design (Chebyshev I of order 8) the tolerance sets the seam limit and the remedy points
    # at the halo; for a Chebyshev I of order 35, whose float64 rounding estimate (checked
    # against np.longdouble in test_design) is above the tolerance, it names that rounding.
    from twinpass.core.design import design_filter
    from twinpass.core.failures import FileBlocks, explain

    fig = np.zeros((3, 1, len(checks.FIGURES)))
    fig[:, :, FIGURE_INDEX["seam_mismatch"]] = 1e-3
    fig[:, :, FIGURE_INDEX["stopband_att_db"]] = 100.0
    blocks = FileBlocks("s1/a.npy", np.array([FAIL, FAIL, FAIL]), np.array([[0, 100], [100, 200], [200, 300]]), fig)
    remedies = {}
    for order in (8, 35):
        spec = ResponseSpec(kind="lowpass", family="chebyshev1", order=order, cutoff_hz=(100.0,), passband_ripple_db=0.1)
        design = design_filter(spec, 1000.0, tolerance=TOL)
        remedies[order] = explain([blocks], design, CFG, TOL)["s1/a.npy"].remedy
    assert "means the halo is too short for this filter" in remedies[8], remedies[8]
    assert "float64 rounding" not in remedies[8]
    estimate = f"{checks.seam_scale(design, TOL):.2g}"
    assert f"float64 rounding (estimated at {estimate} of full scale, above the tolerance 1e-09" in remedies[35]
    assert "means the halo is too short" not in remedies[35], remedies[35]


# ----------------------------------------------------------------------------- blocks with holes

SPLIT_SPECS = {
    "lowpass": ResponseSpec(kind="lowpass", passband_hz=(20.0,), stopband_hz=(40.0,), passband_ripple_db=1.0,
                            stopband_attenuation_db=60.0),
    "bandpass": ResponseSpec(kind="bandpass", passband_hz=(0.5, 30.0), stopband_hz=(0.1, 45.0),
                             passband_ripple_db=1.0, stopband_attenuation_db=60.0),
    "notch": ResponseSpec(kind="notch", notch_hz=50.0, notch_width_hz=2.0),
    "highpass": ResponseSpec(kind="highpass", passband_hz=(5.0,), stopband_hz=(1.0,), passband_ripple_db=1.0,
                             stopband_attenuation_db=60.0),
}
SPLIT_FS = 200.0


def _split_block(design: Design, gain: float, holes: list[tuple[int, int]], n: int = 12000):
    """A block with holes whose pieces are each filtered as their own signal by
    scipy.signal.sosfiltfilt (odd extension of min(effective length, piece - 1) samples, as the
    README states), with the first section's numerator times ``gain`` (sqrt(2): +6 dB overall)."""
    rng = np.random.default_rng(3)
    t = np.arange(n)[:, None] / SPLIT_FS
    x = 0.3 * rng.standard_normal((n, 2)) + 0.2 * np.sin(2 * np.pi * 2.3 * t) + 0.2 * np.sin(2 * np.pi * 50 * t) + 0.1
    hole = np.zeros(n, dtype=bool)
    for a, b in holes:
        hole[a:b] = True
    x[hole] = np.nan
    sos = np.array(design.sos)
    sos[0, :3] *= gain
    y = np.full_like(x, np.nan)
    edges = [0] + [e for a, b in holes for e in (a, b)] + [n]
    for a, b in ((a, b) for a, b in zip(edges[::2], edges[1::2]) if b > a):
        y[a:b] = signal.sosfiltfilt(sos, x[a:b], axis=0, padtype="odd", padlen=min(design.effective_length, b - a - 1))
    return x, y, hole


@pytest.mark.parametrize("kind", sorted(SPLIT_SPECS))
def test_a_block_with_holes_is_graded_on_its_pieces(kind: str) -> None:
    # Correct per-piece outputs (scipy.signal.sosfiltfilt on each finite piece) pass; the same
    # with +6 dB overall fail, their passband deviation being the one scipy.signal.sosfreqz
    # gives for the changed section (|H'|^2 / |H|^2 = 2: 20 log10 2 = 6.02 dB).
    from twinpass.core.design import design_filter

    design = design_filter(SPLIT_SPECS[kind], SPLIT_FS)
    holes = [(3000, 3001), (7000, 7050), (11900, 11905)]
    x, y, hole = _split_block(design, 1.0, holes)
    figs, examined = checks.split_block_figures(x, y, hole, design, CFG, out_dtype="float64")
    assert examined and checks.grade(figs, design, CFG, design.tolerance) == PASS
    assert np.all(figs[:, FIGURE_INDEX["passband_bins"]] >= checks.MIN_CANDIDATE_BINS)
    assert np.all(figs[:, FIGURE_INDEX["nonfinite_in"]] == 0)
    x, y, hole = _split_block(design, math.sqrt(2.0), holes)
    figs, examined = checks.split_block_figures(x, y, hole, design, CFG, out_dtype="float64")
    assert examined and checks.grade(figs, design, CFG, design.tolerance) == FAIL
    wrong = np.array(design.sos)
    wrong[0, :3] *= math.sqrt(2.0)
    f = np.array([10.0])
    _, h = signal.sosfreqz(design.sos, f, fs=SPLIT_FS)
    _, hw = signal.sosfreqz(wrong, f, fs=SPLIT_FS)
    expected_db = 20.0 * math.log10(abs(hw[0]) ** 2 / abs(h[0]) ** 2)
    assert figs[:, FIGURE_INDEX["passband_dev_db"]] == pytest.approx(expected_db, abs=0.5)


def test_a_block_whose_pieces_are_all_too_short_is_not_examined() -> None:
    # Pieces of 199 samples hold fewer than four Welch segments of 64 samples (the shortest the
    # check measures; common practice: at least four averaged segments).
    from twinpass.core.design import design_filter

    design = design_filter(SPLIT_SPECS["lowpass"], SPLIT_FS)
    holes = [(a, a + 1) for a in range(199, 2000, 200)]
    x, y, hole = _split_block(design, math.sqrt(2.0), holes, n=2000)
    assert checks.measurable_pieces(hole, design) == []
    figs, examined = checks.split_block_figures(x, y, hole, design, CFG, out_dtype="float64")
    assert not examined
    assert np.all(np.isnan(figs[:, FIGURE_INDEX["passband_dev_db"]]))
    assert checks.measurable_pieces(np.zeros(checks.SPLIT_MIN_PIECE, dtype=bool), design) == [(0, checks.SPLIT_MIN_PIECE)]
    assert checks.measurable_pieces(np.zeros(checks.SPLIT_MIN_PIECE - 1, dtype=bool), design) == []


def test_the_limits_shown_are_the_limits_grading_uses():
    # Reference: the README's configuration reference ([checks] defaults: passband_warn_db 0.5,
    # passband_fail_db 1.0, phase_warn_deg 5, phase_fail_deg 20, stopband_margin_db 10) and its
    # rule "fails below the spec's stopband_attenuation_db less stopband_margin_db"; the
    # passband allowance ripple / 2 + 0.3 dB is the grade() docstring's. Each limit is then
    # put through grade(): a figure just inside passes (or warns), just outside warns or fails.
    from twinpass.core.design import design_filter

    spec = ResponseSpec(kind="lowpass", passband_hz=(20.0,), stopband_hz=(40.0,), passband_ripple_db=0.5,
                        stopband_attenuation_db=60.0)
    design = design_filter(spec, 500.0)
    cfg = ChecksConfig()
    tol = design.tolerance
    lim = checks.grading_limits(design, cfg, tol)
    assert lim["stopband_att_db"].fail == pytest.approx(60.0 - 10.0)
    assert lim["stopband_att_db"].unit == "dB" and lim["stopband_att_db"].below
    assert lim["passband_dev_db"].warn == pytest.approx(0.25 + 0.3 + 0.5)
    assert lim["passband_dev_db"].fail == pytest.approx(0.25 + 0.3 + 1.0)
    assert (lim["phase_deg"].warn, lim["phase_deg"].fail) == (5.0, 20.0)
    assert lim["seam_mismatch"].unit == "relative"

    def graded(**values: float) -> int:
        row = np.full((1, len(FIGURES)), np.nan)
        for k, v in values.items():
            row[0, FIGURE_INDEX[k]] = v
        return checks.grade(row, design, cfg, tol)

    eps = 1e-6
    stop = lim["stopband_att_db"].fail
    assert graded(stopband_att_db=58.65) == PASS  # short of the 60 dB spec, inside the limit
    assert graded(stopband_att_db=stop + eps) == PASS and graded(stopband_att_db=stop - eps) == FAIL
    for name in ("passband_dev_db", "phase_deg"):
        warn, fail = lim[name].warn, lim[name].fail
        for sign in (1.0, -1.0):  # either way
            assert graded(**{name: sign * (warn - eps)}) == PASS
            assert graded(**{name: sign * (warn + eps)}) == WARN
            assert graded(**{name: sign * (fail - eps)}) == WARN
            assert graded(**{name: sign * (fail + eps)}) == FAIL
    seam = lim["seam_mismatch"].fail
    assert graded(seam_mismatch=seam * (1 - 1e-6)) == PASS and graded(seam_mismatch=seam * (1 + 1e-6)) == FAIL
    share = lim["coherent_bins"].fail
    assert graded(passband_bins=100.0, coherent_bins=100.0 * share) == PASS
    assert graded(passband_bins=100.0, coherent_bins=100.0 * share - 1.0) == FAIL
    assert graded(nonfinite_out=0.0) == PASS and graded(nonfinite_out=1.0) == FAIL
    assert graded(clipped=0.0) == PASS and graded(clipped=1.0) == FAIL
    # A design that states no attenuation is graded against the rejection level instead.
    fixed = design_filter(ResponseSpec(kind="lowpass", family="butterworth", order=4, cutoff_hz=(20.0,)), 500.0)
    assert checks.grading_limits(fixed, cfg, tol)["stopband_att_db"].fail == pytest.approx(30.0 - 10.0)
