"""Per-block checks: integrity, levels and the achieved two-pass response.

Each filtered block is checked against its own input. The figures are plain numbers per
channel (a row of :data:`FIGURES`), graded per block by :func:`grade` into pass / warn /
fail. Nothing here does I/O.

Conventions: signal arrays are time-major, shape (samples, channels) (1-D is one channel);
frequencies in Hz, levels in dB, lengths in samples. The designed overall response is the
two-pass amplitude ``G(f) = |H(f)|^2`` (real, non-negative); its level in dB is
``20 log10 G``.

The transfer estimate
---------------------
Between the block input ``x`` and output ``y`` the frequency response is estimated with
Welch-averaged spectra (``scipy.signal.csd`` / ``scipy.signal.welch``; Hann window, 50 %
overlap, one-sided density; long blocks spread :data:`MAX_SEGMENTS` segments evenly
instead, see :func:`transfer_estimate`)::

    H(f) = Pxy(f) / Pxx(f)          coherence = |Pxy|^2 / (Pxx Pyy)

Two estimates are formed on the same bins; both are unbiased for the same ``|H|^2`` where
they are clear of leakage (below), so a real fault shows in both:

* the *plain* one, between ``x`` and ``y``, each segment losing its least-squares line
  weighted by the window (``detrend="weighted"``). The window-weighted line removes an
  offset or ramp exactly, and, unlike scipy's unweighted mean or line, is not pulled by the
  segment's strong passband content, whose removal would add a windowed line (a high-pass
  output's) of that size to the bins next to 0 Hz;
* the *differenced* one, between the first differences ``x[t + 1] - x[t]`` and ``y[t + 1] -
  y[t]``, each segment losing its (unweighted) least-squares line. The difference ``D = 1 -
  z^-1`` is prewhitening (Blackman & Tukey, from memory): applied to both signals it
  multiplies ``Pxx``, ``Pyy`` and ``Pxy`` by the same ``|D(f)|^2 = 4 sin^2(pi f / fs)``, so
  ``H``, the coherence and ``Pxx / Pyy`` are those of ``x`` and ``y``, but the strong slow
  content of sensor records (offsets, drifts, steps, slow waves: about ``|D|^2 ~ (2 pi f /
  fs)^2`` weaker) no longer leaks through the window's side lobes into the bins where the
  output is faint. Its input's energy is judged on ``Pxx / |D|^2``. The same factor buries
  the input's own low-frequency bins, so it cannot measure a stopband near 0 Hz (a
  high-pass's).

The rule: a stopband bin takes the plain estimate's attenuation where that bin is usable
in it (see below), otherwise the differenced one's where usable there, otherwise none; the
passband figures (deviation, phase, bin counts) are the plain estimate's unless it fails
the coherent-fraction rule (see :func:`grade`) and the differenced one does not. The
differenced estimate is computed only for the channels where the plain one fails that
rule, leaves the stopband figure short of what it must reach, or leaves a stated
attenuation unmeasured: a stopband the plain one measures as met is taken as it is, since
a real fault shows in the bins it measures, and the check costs about twice as much on
blocks that compute both.

The figures compare the chosen ``H`` with the designed ``G(f)``:

* passband deviation: ``20 log10 |H| - 20 log10 G`` over *coherent* passband bins, the
  signed value of largest magnitude (dB); a passband bin is a candidate only where the
  input has energy and its power is spread over at least :data:`MIN_EFFECTIVE_SEGMENTS`
  segments (one segment's coherence is near 1 whatever the output: an event after silence
  at the block's edge);
* phase: ``angle(H)`` over the same bins, the signed value of largest magnitude
  (degrees; zero-phase filtering means about 0);
* stopband attenuation: ``10 log10(Pxx / Pyy)`` over stopband bins where the input has
  energy (within :data:`INPUT_FLOOR_DB` of its peak PSD) and the output is measurable
  (coherent with the input and above the estimator's leakage, see below), and the figures
  of the two power gates (below); the smallest value (dB).

Passband bins are those where the designed overall level is within the designed ripple
of 0 dB (``passband_ripple_db``; -3.0103 dB when the response has no ripple figure, i.e.
fixed-order and notch designs), leaving out every bin closer than
:data:`EDGE_ALLOWANCE_BINS` bins to a band edge, to 0 Hz and to the Nyquist frequency.
Stopband bins are those where the designed level is at or below ``-required`` over the
window's whole main lobe around the bin (2 bins either side), and not within
:data:`EDGE_ALLOWANCE_BINS` bins of 0 Hz or Nyquist; ``required`` is the response's
``stopband_attenuation_db``, or :data:`REJECTION_DB` (30 dB) for designs that state none
(fixed-order and notch designs: their stopband bins are *rejection bins*). :func:`grade`
fails a stopband figure below ``required - stopband_margin_db``. Levels are taken on a grid
:data:`OVERSAMPLE` times finer than the bins, so narrow notches are not skipped.

The two power gates compare how much power the output holds with the most a correct output
can hold, so that an unfiltered or wrongly filtered block fails wherever its input has
power the design removes, even where no bin can be graded (a narrow notch, a band
narrower than the bins resolve):

* the Welch gate, on the plain estimate: a correct output's power is at most ``U = sum_k
  B_k Pxx_k`` over all bins, ``B_k`` the largest designed power gain ``G(f)^2`` over the
  main lobe around bin ``k``. The window spreads the power of each frequency ``f`` of the
  input over the bins, those whose main lobe holds ``f`` taking all but about 5e-4 of it
  (the energy of the Hann window's side lobes, computed), and each of those has ``B_k >=
  G(f)^2``: so ``U`` is at least what the design passes, but for that share. The output's measured
  power ``M`` counts ``coherence * Pyy`` (the power its input explains) over bins spread
  over at least :data:`MIN_EFFECTIVE_SEGMENTS` segments, so output that input outside a
  segment left (the tail of a step's response) does not count;
* the slow gate, over the whole block: the energies of input and output in a
  two-dimensional slow subspace (a smooth taper over the block and the tapered line) are
  compared with the design's largest gain over the band they cover (a few bins of the
  whole block) plus the taper's leakage (:func:`_slow_gate`); it sees offsets, drifts and
  the slowest waves that the per-segment lines remove from the Welch estimate, which is
  where a high-pass output left unfiltered differs, and applies to designs that remove that
  band (high-pass and band-pass).

A gate shows a fault where ``M`` exceeds its bound by more than :data:`GATE_SLACK`; its
figure is then ``10 log10((P - U) / (M - U))`` (``P`` the input's power): the attenuation of
the power the design removes that the output achieved, 0 dB for an unfiltered block.

A passband bin is *coherent* when its coherence is at least ``ChecksConfig.coherence_min``
and the normalised random error of ``|H|`` (Bendat & Piersol, *Random Data*, chapter on
frequency-response estimates, from memory)
``eps = sqrt(1 - coh) / (sqrt(coh) sqrt(2 n_d))`` is at most :data:`RANDOM_ERROR_MAX`;
``n_d`` is the number of Welch segments divided by ``1 + 2 c^2`` with the Hann
50 %-overlap correlation ``c = 0.167`` (Harris 1978, from memory).

Estimator bias and the error allowance
--------------------------------------
* The filter is non-causal: every output sample depends on input on both sides. The part
  of a segment's output that comes from input outside the segment is not explained by the
  segment's input; this lowers the coherence and biases ``|H|`` slightly low (the bias
  grows with impulse-response length / segment length). It is symmetric in time, so it
  adds no phase bias.
* A Welch window with a long impulse response underestimates sharp features: the estimate
  is the true response smoothed over about two bins (the Hann main lobe). Ripple peaks of
  equiripple designs are flattened by up to about half their height and transition bands
  are smeared; hence the edge allowance and the ``ripple / 2`` term in the grading.
* The segment length (:func:`segment_length`) is :data:`SEGMENT_CYCLES` periods of the
  smallest spectral feature of the spec (lowest band edge, narrowest transition band or
  notch width, distance of the top edge to Nyquist), and long enough that each band of the
  designed response between two edges holds graded bins (:data:`BAND_CYCLES` periods of a
  passband's width, :data:`STOPBAND_CYCLES` of a stopband's: a fixed-order band-pass's
  passband, a notch's rejected band), a power of two of at least :data:`MIN_NPERSEG`
  samples, capped at :data:`MAX_NPERSEG` and at a quarter of the block so that at least
  seven segments are averaged. A capped segment resolves less: fewer bins survive the edge
  allowance (none: the figures are NaN). Long segments are averaged fewer times
  (:data:`SEGMENT_BUDGET`), so that the transforms cost about the same whatever the design.
* Stopband bins are used only where the coherence passes ``coherence_min`` (output that
  came from input outside the segment, e.g. the ringing of a transient in the previous
  segment, is not coherent and would understate the attenuation), where the output and
  the input are each at least :data:`LEAKAGE_MARGIN_DB` above a bound on the Hann
  window's leakage from the rest of their own spectrum, where the output is within
  :data:`NUMERIC_RANGE_DB` of its peak, and where input and output each spread their power
  over at least :data:`MIN_EFFECTIVE_SEGMENTS` segments (a step or burst inside one segment
  makes that segment's ratio, leakage included, the whole estimate, with a coherence near
  1). The bound convolves the spectrum, laid out with
  its mirror image at negative frequencies, with the window's spectral side lobes at their
  largest over each bin (a tone anywhere in its bin), and doubles it (a component and its
  image adding in phase); a tone within a bin of 0 Hz can exceed it by a factor of about
  3, inside the margin. A correct filter whose stopband output is buried in leakage
  therefore reports NaN (not measured) rather than a figure set by the estimator's own
  floor.
* Edges of the block. Input outside the block (a step just before it, the carried state,
  an end extension) reaches into its output: for sections with simple poles ``p`` the
  two-pass impulse response beyond its centre is ``sum_p R_p p^|m|``, so that input adds
  only combinations of ``p^t`` from the first sample and ``p^(n - 1 - t)`` from the last
  (:func:`_edge_modes`). When a channel fails the coherent-fraction rule (see
  :func:`grade`) or its stopband figure (bins and gates alike) is short of what the grading
  accepts, its figures are estimated again from the output minus the least-squares
  fit of those free responses to the difference between the output and the design's
  two-pass response to the block's own input (``scipy.signal.sosfiltfilt``, no padding).
  A correct output then differs from that response only by the fitted part and is
  coherent again; a wrong one (other channel's data, a causal pass, an unfiltered block)
  differs by far more and still fails. For an FIR filter that input reaches ``M - 1`` samples into the block:
  the figures are estimated again without them, and are NaN (not measured) for the
  coherent fraction when nothing is left. The re-estimate runs only for such channels.

With ``eps <= 0.01`` the random error is at most ``3 eps`` (three standard deviations):
``20 log10(1.03) = 0.26 dB`` and ``0.03 rad = 1.7 deg``. The grading allows
:data:`ESTIMATOR_ERROR_DB` (0.3 dB) for the magnitude; :data:`ESTIMATOR_ERROR_DEG` (2 deg)
bounds the phase error and lies below the default ``phase_warn_deg`` of 5 deg.

The figures are tests of the processing, not calibrations: an unfiltered, wrongly filtered
(different cutoff or band, a single forward pass, swapped channels) or corrupted block shows
as a passband deviation, a phase, a missing stopband attenuation or a loss of coherence far
beyond these allowances, wherever the block's input has power in the bands that tell right
from wrong.

What the check cannot see: a band where right and wrong differ but the input has no power,
or power more than :data:`INPUT_FLOOR_DB` below its strongest spectral peak (a noise floor
under a strong tone); a band narrower than the bins resolve, unless it holds a fair share of
the power the output may hold (the Welch gate shows a fault only beyond :data:`GATE_SLACK`
of it): segments are at most a quarter of the block and :data:`MAX_NPERSEG`, so a 2 Hz
notch's rejected band (30 dB down, 0.23 Hz wide) holds bins only with segments of 32768
samples, blocks of about two minutes at 1 kHz, and never at 48 kHz, where a wrong notch
fails only if the hum is a large part of the block's power; content between the slow
gate's band (a few bins of the whole block) and about four bins of a segment, which only
the Welch gate sees; and a wrong output that still removes most of what the design removes
(it is graded like a stopband, on what it leaves). An event that one segment carries (a
block silent but for a burst at its edge, a lone step) is not assessed in the bins it
dominates.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage, signal

from twinpass.core.loops import channel_stats, chunked_stats, segment_rows, spectra_sums
from twinpass.core.design import HALF_POWER_DB, overall_level_grid, overall_response
from twinpass.core.effective import rounding_estimate
from twinpass.core.types import Design
from twinpass.errors import KernelError, TwinpassError

if TYPE_CHECKING:  # the configuration module is not part of the numeric core
    from twinpass.config import ChecksConfig

__all__ = [
    "FIGURES",
    "FIGURE_INDEX",
    "PENDING",
    "PASS",
    "WARN",
    "FAIL",
    "ERROR",
    "STATUS_NAMES",
    "TransferEstimate",
    "transfer_estimate",
    "segment_length",
    "block_figures",
    "split_block_figures",
    "measurable_pieces",
    "SPLIT_MIN_PIECE",
    "grade",
    "grade_file",
    "Finding",
    "findings",
    "Limit",
    "grading_limits",
    "stopband_limit_db",
    "LIMITS_EXPLAINED",
    "summarise",
    "seam_mismatch",
    "SEAM_FACTOR",
    "CLIPPED_REMEDY",
    "ESTIMATOR_ERROR_DB",
    "ESTIMATOR_ERROR_DEG",
]

FIGURES: tuple[str, ...] = (
    "nonfinite_in",
    "nonfinite_out",
    "clipped",
    "rms_in",
    "rms_out",
    "peak_in",
    "peak_out",
    "passband_dev_db",
    "phase_deg",
    "stopband_att_db",
    "passband_bins",
    "coherent_bins",
    "seam_mismatch",
)
"""Columns of :func:`block_figures` (one row per channel).

``nonfinite_in`` / ``nonfinite_out``: NaN or infinite samples (count); ``clipped``: finite
output samples beyond the output type's range (count); ``rms_*`` / ``peak_*``: RMS and
largest |value| of the finite samples (input units); ``passband_dev_db`` (dB),
``phase_deg`` (degrees), ``stopband_att_db`` (dB): see the module notes, NaN when not
measured; ``passband_bins``: passband bins with input energy; ``coherent_bins``: those of
them that passed the coherence gate; ``seam_mismatch``: filled by the caller with
:func:`seam_mismatch`, NaN when not computed.
"""

FIGURE_INDEX: dict[str, int] = {name: i for i, name in enumerate(FIGURES)}

PENDING, PASS, WARN, FAIL, ERROR = 0, 1, 2, 3, 4
"""Block status codes: not yet done, passed, warned, failed a check, raised an error."""
STATUS_NAMES: dict[int, str] = {PENDING: "pending", PASS: "pass", WARN: "warn", FAIL: "fail", ERROR: "error"}

SEGMENT_CYCLES: float = 8.0
"""Welch segment length in periods of the design's smallest spec feature (edge, transition
band, notch width)."""
BAND_CYCLES: float = 16.0
"""Welch segment length in periods of the width of a passband (or stated stopband) between
two edges: 16 bins across it, 8 of them clear of the :data:`EDGE_ALLOWANCE_BINS` on either
side."""
STOPBAND_CYCLES: float = 6.0
"""Welch segment length in periods of the width of a stopband between two edges (a band-stop's
or notch's rejected band): its bins lose only the window's main lobe (2 bins) at each edge, so
6 bins across leave 2."""
REJECTION_DB: float = 30.0
"""Designs that state no attenuation (fixed-order and notch designs) are graded on their
rejection bins: bins where the designed overall level is at or below ``-REJECTION_DB`` over
the window's whole main lobe. They fail below ``REJECTION_DB - stopband_margin_db``."""
MIN_NPERSEG: int = 256
"""Shortest Welch segment aimed for (samples)."""
MIN_USABLE_NPERSEG: int = 64
"""Below this segment length (samples) the response is not measured."""
MAX_NPERSEG: int = 1 << 18
"""Longest Welch segment (samples); bounds the memory of the spectra (about 50 bytes per bin
and channel)."""
MIN_SEGMENTS: int = 4
"""The segment is at most ``block length / MIN_SEGMENTS`` (7 segments at 50 % overlap)."""
EDGE_ALLOWANCE_BINS: int = 4
"""Bins left out next to band edges, 0 Hz and Nyquist (Hann main lobe: +/- 2 bins)."""
OVERSAMPLE: int = 8
"""Fine-grid factor for locating band edges of the designed response."""
INPUT_FLOOR_DB: float = 60.0
"""Bins whose input PSD is more than this below the input's peak PSD are not used."""
LEAKAGE_MARGIN_DB: float = 10.0
"""A stopband bin's output must exceed the estimated window leakage by this much."""
MIN_EFFECTIVE_SEGMENTS: float = 2.0
"""A bin, passband or stopband, counts only where its power is spread over at least about this many Welch
segments (:attr:`TransferEstimate.effective_segments`), in input and output alike: the
coherence of a bin that one segment dominates (a step or burst inside it) is near 1 whatever
the output, and the ratio is that one segment's, leakage included."""
NUMERIC_RANGE_DB: float = 200.0
"""A stopband bin's output must be within this range of the output's peak PSD."""
RANDOM_ERROR_MAX: float = 0.01
"""Largest normalised random error of |H| accepted for a passband bin."""
HANN_OVERLAP_CORRELATION: float = 0.167
"""Correlation of Hann-windowed segments at 50 % overlap (Harris 1978, from memory)."""
ESTIMATOR_ERROR_DB: float = 0.3
"""Passband estimator error allowance (dB) added to the thresholds in :func:`grade`."""
ESTIMATOR_ERROR_DEG: float = 2.0
"""Bound on the phase estimator error (degrees) of a coherent bin (documentation)."""
COHERENT_FRACTION_MIN: float = 0.5
"""A block whose coherent passband bins are fewer than this fraction of the passband
bins with input energy fails: its output is not explained by its input."""
MIN_CANDIDATE_BINS: int = 8
"""The coherent-fraction rule applies only with at least this many passband bins."""
CLIPPED_REMEDY: str = '[output] dtype = "float64"'
"""The setting that holds output values beyond float32's range (about 3.4e38 in magnitude),
which a float32 output stores as infinity: the remedy of a block that fails on clipped samples."""
SEAM_FACTOR: float = 10.0
"""A seam mismatch above ``SEAM_FACTOR * tolerance`` fails.

Each block is within ``tolerance`` (relative to the segment's max |input|) of the
whole-signal result, so two neighbours agree within ``2 * tolerance``; the remaining
factor 5 is headroom for floating-point rounding in the recursions. Compare float64
outputs, before any cast to the output type."""

_MAIN_LOBE_BINS = 2
GATE_SLACK: float = 0.25
"""A power gate (see the module notes) shows a fault only where the output's power exceeds
the most a correct output holds by more than this share (+0.97 dB): room for the estimate's
own errors (input from outside a segment, rounding)."""
_RESPONSE_FIGURES = ("passband_dev_db", "phase_deg", "stopband_att_db", "passband_bins", "coherent_bins")
_WINDOW = "hann"


# ----------------------------------------------------------------------------- estimate


@dataclass(frozen=True)
class TransferEstimate:
    """Welch estimate of the response from ``x`` to ``y`` (per channel).

    Arrays have shape (n_freqs, channels); frequencies in Hz; PSDs in units^2/Hz.
    """

    freqs_hz: np.ndarray
    h: np.ndarray
    """``Pxy / Pxx`` (complex, dimensionless)."""
    coherence: np.ndarray
    pxx: np.ndarray
    pyy: np.ndarray
    pxy: np.ndarray
    nperseg: int
    segments: int
    """Number of Welch segments averaged."""
    effective_segments: np.ndarray | None = None
    """Per bin, the smaller over input and output of ``(sum_i P_i)^2 / sum_i P_i^2`` (``P_i``:
    segment ``i``'s periodogram): about the number of segments that carry the bin's power,
    1 where a single segment does (see :data:`MIN_EFFECTIVE_SEGMENTS`); shape (n_freqs,
    channels)."""


def _as_2d(a: np.ndarray) -> np.ndarray:
    arr = np.asarray(a)
    return arr[:, None] if arr.ndim == 1 else arr


MAX_SEGMENTS: int = 16
"""Welch segments a block's response check averages at most. Longer blocks spread this many
segments evenly over the block instead of overlapping them by half, which bounds the cost of
the check per block (the estimate's random error depends on the number of segments, about
1/sqrt(segments) relative, not on the block length)."""

SEGMENT_BUDGET: int = 16 * 16384
"""Samples per channel and signal the Welch segments of one estimate hold at most, where more
than 7 segments fit: long segments are averaged fewer times (:func:`_segments_for`), so a
design that needs them (a narrow notch) costs about as much as the others."""


def _segments_for(nperseg: int) -> int:
    """Segments averaged with segments of ``nperseg`` samples: :data:`MAX_SEGMENTS`, fewer where
    they would exceed :data:`SEGMENT_BUDGET`, but at least 7 (what a segment of a quarter block
    gives at half overlap)."""
    return max(7, min(MAX_SEGMENTS, SEGMENT_BUDGET // max(1, int(nperseg))))


_GROUP_BYTES: int = 1 << 23
"""Largest segment buffer (bytes) per signal: more channels than fit are estimated in groups."""
_FFT_CHANNELS: int = 8
"""Channels transformed per call: pocketfft runs several rows side by side in vector
registers (float32 needs at least four rows to gain from it)."""


def _segment_plan(n_samples: int, nperseg: int, max_segments: int | None) -> tuple[int, int]:
    """(hop, number of segments) in samples: half overlap, or spread to ``max_segments``."""
    step = nperseg - nperseg // 2
    if max_segments is not None and max_segments >= 2:
        step = max(step, (n_samples - nperseg) // (int(max_segments) - 1))
    return step, 1 + (n_samples - nperseg) // step


def transfer_estimate(x: np.ndarray, y: np.ndarray, sample_rate_hz: float, nperseg: int,
                      max_segments: int | None = None, *, precision: str = "float64",
                      detrend: str = "constant", difference: bool = False) -> TransferEstimate:
    """Welch estimate of the frequency response from ``x`` to ``y``.

    Parameters
    ----------
    x, y : ndarray, shape (samples,) or (samples, channels)
        Input and output, time-major, same shape, finite.
    sample_rate_hz : float
        Sample rate (Hz).
    nperseg : int
        Segment length (samples); Hann window.
    max_segments : int, optional
        Average at most this many segments. Segments start every ``nperseg - nperseg // 2``
        samples (half overlap, as scipy does) from the first sample; when that gives more
        than ``max_segments`` (>= 2), ``max_segments`` segments are spread evenly instead,
        with the hop ``(samples - nperseg) // (max_segments - 1)`` (overlap below half, or
        gaps). Segments never overlap by more than half. None uses every half-overlapping
        segment.
    precision : {"float64", "float32"}
        Type of the windowed segments and their transforms. float32 transforms run about
        twice as fast, but their rounding errors (near single precision's 1.2e-7 times the
        segment's largest amplitudes) bury bins far below the strongest one, so
        :func:`block_figures` uses them only where no stopband figure is measured. The
        averages are float64 either way.
    detrend : {"constant", "linear", "weighted"}
        What each segment loses before the window: its mean or its least-squares line, as
        scipy's ``detrend`` argument, or (``"weighted"``) its least-squares line weighted by
        the window (its residual is orthogonal to constants and lines under the window's
        weights; see the module notes for why the response check uses it).
    difference : bool
        Estimate between the first differences ``x[t + 1] - x[t]`` and ``y[t + 1] - y[t]``
        (one sample fewer) instead of ``x`` and ``y``; each segment is differenced from
        its own ``nperseg + 1`` samples, so nothing else of the block is copied.

    Returns
    -------
    TransferEstimate
        ``h = Pxy / Pxx`` and coherence ``|Pxy|^2 / (Pxx Pyy)`` (0 where a PSD is 0). The
        spectra are the averages over segments of ``conj(X) Y``, ``|X|^2``, ``|Y|^2``
        (one-sided densities), the same numbers as ``scipy.signal.csd(x, y)`` and
        ``scipy.signal.welch`` with these parameters (``detrend`` included, as a callable
        for ``"weighted"``; up to rounding), but each segment is transformed only once, all
        channels together.
    """
    x2 = np.asarray(_as_2d(x), dtype=np.float64)
    y2 = np.asarray(_as_2d(y), dtype=np.float64)
    if x2.shape != y2.shape:
        raise KernelError(f"transfer estimate: input shape {x2.shape} and output shape {y2.shape} differ.")
    nperseg = int(nperseg)
    n_samples = x2.shape[0] - int(bool(difference))
    if not 2 <= nperseg <= n_samples:
        raise KernelError(
            f"transfer estimate: segment length {nperseg} must lie in [2, {n_samples}] samples "
            "(the block length, one fewer for differences)."
        )
    if precision not in ("float64", "float32"):
        raise KernelError(f"transfer estimate: precision {precision!r} is not 'float64' or 'float32'.")
    if detrend not in ("constant", "linear", "weighted"):
        raise KernelError(f"transfer estimate: detrend {detrend!r} is not 'constant', 'linear' or 'weighted'.")
    fs = float(sample_rate_hz)
    step, segments = _segment_plan(n_samples, nperseg, max_segments)
    window = _hann(nperseg)
    n_ch = x2.shape[1]
    # Channel-major (channels, n_freqs) inside; the estimate holds the transposed views.
    pxx = np.empty((n_ch, nperseg // 2 + 1))
    pyy = np.empty_like(pxx)
    pxy = np.empty(pxx.shape, dtype=complex)
    qxx, qyy = np.empty_like(pxx), np.empty_like(pxx)
    group = max(1, _GROUP_BYTES // (8 * nperseg))  # channels per group: bounds the buffers
    for c0 in range(0, n_ch, group):
        c = slice(c0, min(n_ch, c0 + group))
        _welch_sums(x2[:, c], y2[:, c], window, step, segments, pxx[c], pyy[c], pxy[c],
                    np.dtype(precision).type, detrend=detrend, difference=difference, squares=(qxx[c], qyy[c]))
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = np.minimum(np.where(qxx > 0, pxx**2 / qxx, 0.0), np.where(qyy > 0, pyy**2 / qyy, 0.0))
    # Mean over segments; one-sided density: double every bin but 0 Hz (and Nyquist for an
    # even length).
    scale = 1.0 / (fs * float(np.sum(window * window)) * segments)
    fold = np.full(pxx.shape[1], 2.0 * scale)
    fold[0] = scale
    if nperseg % 2 == 0:
        fold[-1] = scale
    pxx *= fold
    pyy *= fold
    pxy *= fold
    f = np.fft.rfftfreq(nperseg, 1.0 / fs)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.where(pxx > 0, pxy / np.where(pxx > 0, pxx, 1.0), 0.0)
        denom = pxx * pyy
        coh = np.where(denom > 0, np.abs(pxy) ** 2 / np.where(denom > 0, denom, 1.0), 0.0)
    np.minimum(coh, 1.0, out=coh)
    return TransferEstimate(f, h.T, coh.T, pxx.T, pyy.T, pxy.T, nperseg, int(segments), spread.T)


@lru_cache(maxsize=8)
def _hann(nperseg: int) -> np.ndarray:
    w = signal.get_window(_WINDOW, nperseg)  # periodic Hann, as scipy.signal.welch uses
    w.setflags(write=False)
    return w


def _welch_sums(x: np.ndarray, y: np.ndarray, window: np.ndarray, step: int, segments: int,
                sxx: np.ndarray, syy: np.ndarray, sxy: np.ndarray, dtype: type = np.float64, *,
                detrend: str = "constant", difference: bool = False,
                squares: tuple[np.ndarray, np.ndarray] | None = None) -> None:
    """Sums over segments of ``|X|^2``, ``|Y|^2``, ``conj(X) Y`` into ``sxx``, ``syy``, ``sxy``.

    ``x``, ``y``: time-major (samples, channels); ``sxx`` ... channel-major (channels,
    n_freqs), float64. ``X``, ``Y``: rfft of each segment (``window.size`` samples, every
    ``step`` samples) detrended as :func:`transfer_estimate`'s ``detrend`` says, times the
    window, transformed in ``dtype`` (float64, or float32 where :func:`block_figures` chooses
    it); with ``difference`` the segment is the first difference of ``window.size + 1``
    samples. Each segment is copied channel-major once, so the transforms run along
    contiguous rows. ``squares``, when given, receives the sums of ``|X|^4`` and ``|Y|^4``.
    """
    n = window.size
    n_ch = x.shape[1]
    w = window.astype(dtype)
    linear, weighted = detrend == "linear", detrend == "weighted"
    bx, by = np.empty((n_ch, n), dtype), np.empty((n_ch, n), dtype)
    for a in (sxx, syy, sxy, *(squares or ())):
        a[...] = 0.0
    for start in range(0, segments * step, step):
        for v, buf in ((x, bx), (y, by)):
            if difference:
                segment_rows(np.diff(v[start : start + n + 1], axis=0), 0, w, buf, linear=linear, weighted=weighted)
            else:
                segment_rows(v, start, w, buf, linear=linear, weighted=weighted)
        for c0 in range(0, n_ch, _FFT_CHANNELS):
            c = slice(c0, min(n_ch, c0 + _FFT_CHANNELS))
            # ihfft with norm="forward" is conj(rfft) of real input: the conjugate the cross
            # product needs comes out of the transform itself.
            cx = sp_fft.ihfft(bx[c], axis=1, norm="forward")
            sy = sp_fft.rfft(by[c], axis=1)
            spectra_sums(cx, sy, sxx[c], syy[c], sxy[c],
                         None if squares is None else (squares[0][c], squares[1][c]))


def _spec_features(design: Design) -> list[float]:
    """Widths (Hz) the spec names: band edges, transition bands, notch width, Nyquist distance."""
    spec = design.spec
    nyq = design.sample_rate_hz / 2.0
    edges: list[float] = []
    for name in ("passband_hz", "stopband_hz", "cutoff_hz"):
        edges += [float(v) for v in getattr(spec, name) or ()]
    widths: list[float] = []
    if spec.passband_hz and spec.stopband_hz and len(spec.passband_hz) == len(spec.stopband_hz):
        widths += [abs(float(p) - float(s)) for p, s in zip(spec.passband_hz, spec.stopband_hz)]
    if spec.kind == "notch" and spec.notch_hz:
        f0 = float(spec.notch_hz)
        width = spec.notch_width_hz or (f0 / float(spec.notch_q) if spec.notch_q else None)
        edges.append(f0)
        if width:
            widths.append(float(width))
    if edges:
        widths.append(nyq - max(edges))
    return [v for v in edges + widths if math.isfinite(v) and v > 0]


def _required_db(design: Design) -> float:
    """Attenuation (dB) the stopband bins are graded against: the spec's, else :data:`REJECTION_DB`."""
    attenuation = design.spec.stopband_attenuation_db
    return float(attenuation) if attenuation is not None else REJECTION_DB


def _pass_level_db(design: Design) -> float:
    """Overall level (dB) at or above which a frequency is in the passband."""
    spec = design.spec
    ripple = spec.passband_ripple_db if spec.mode == "tolerance" else None
    return -float(ripple) if ripple is not None else HALF_POWER_DB


def _bands(design: Design) -> tuple[tuple[float, float], ...]:
    """(width in Hz, cycles) of the bands of the designed response the segment must resolve.

    A band is a run of frequencies where the designed overall level is in the passband (at
    or above :func:`_pass_level_db`) or in the stopband (at or below minus
    :func:`_required_db`), found on the design's verification grid
    (:func:`~twinpass.core.design.overall_level_grid`, which resolves narrow notches).
    Only bands between two edges count (a band reaching 0 Hz or Nyquist ends at a spec edge,
    which :data:`SEGMENT_CYCLES` resolves; a finer resolution there would cost more than the
    gates leave to gain). Passbands lose :data:`EDGE_ALLOWANCE_BINS` bins at each edge and
    want :data:`BAND_CYCLES` periods of their width; stopbands lose only the main lobe and
    want :data:`STOPBAND_CYCLES`. Cached by content, as :func:`_design_masks`.
    """
    return _cached(_design_key(design, "bands"), lambda: _band_widths(design))


def _band_widths(design: Design) -> tuple[tuple[float, float], ...]:
    f, level_db = overall_level_grid(design)
    bands: list[tuple[float, float]] = []
    for inside, passband in ((level_db >= _pass_level_db(design) - 0.01, True),
                             (level_db <= -_required_db(design) + 0.01, False)):
        step = np.diff(np.concatenate([[0], inside.astype(np.int8), [0]]))
        firsts, lasts = np.flatnonzero(step == 1), np.flatnonzero(step == -1) - 1
        inner = (firsts > 0) & (lasts < f.size - 1)
        widths = f[lasts[inner]] - f[firsts[inner]]
        bands += [(float(w), BAND_CYCLES if passband else STOPBAND_CYCLES) for w in widths if w > 0.0]
    return tuple(bands)


def segment_length(n_samples: int, design: Design) -> int:
    """Welch segment length (samples) for a block of ``n_samples``; 0 = too short to measure.

    The longest of :data:`SEGMENT_CYCLES` periods of the design's smallest spec feature
    (lowest edge, narrowest transition band or notch width, distance of the top edge to
    Nyquist) and the periods each band of the designed response wants (:func:`_bands`: a
    fixed-order band-pass's passband, a band-stop's, notch's or high-pass's stopband), rounded up
    to a power of two, at least :data:`MIN_NPERSEG`, at most :data:`MAX_NPERSEG` and
    ``n_samples // MIN_SEGMENTS`` (made even).
    """
    fs = float(design.sample_rate_hz)
    cycles = [SEGMENT_CYCLES / w for w in _spec_features(design)]
    cycles += [c / w for w, c in _bands(design)]
    target = fs * max(cycles) if cycles else float(MIN_NPERSEG)
    n = 1 << max(0, math.ceil(math.log2(max(target, 1.0))))
    n = min(max(n, MIN_NPERSEG), MAX_NPERSEG, int(n_samples) // MIN_SEGMENTS)
    n -= n % 2
    return n if n >= MIN_USABLE_NPERSEG else 0


def _eroded(mask: np.ndarray, width: int) -> np.ndarray:
    """``mask`` shrunk by ``width`` points on each side; outside the array counts as False."""
    if width <= 0 or not mask.any():
        return mask
    return ndimage.binary_erosion(mask, structure=np.ones(2 * width + 1, dtype=bool), border_value=0)


@dataclass(frozen=True)
class _Masks:
    """What the design makes of each Welch bin of one segment length (read-only arrays, n_freqs).

    ``db``: designed overall level at the bin (dB); ``passband`` / ``stopband``: the bins
    graded as such (see the module notes; without a stated attenuation the stopband bins are
    the rejection bins); ``bound``: the largest designed power gain ``G(f)^2`` over the
    window's main lobe around the bin (``f`` within :data:`_MAIN_LOBE_BINS` bins), which
    bounds what a correct filter passes of the power the bin holds.
    """

    db: np.ndarray
    passband: np.ndarray
    stopband: np.ndarray
    bound: np.ndarray


_MASK_CACHE: dict[Any, Any] = {}
_SLOW_CACHE: dict[Any, Any] = {}
_MASK_CACHE_SIZE = 32


def _cached(key: Any, compute: Any, cache: dict[Any, Any] = _MASK_CACHE) -> Any:
    """``compute()``, kept under ``key`` in a small cache of design-derived tables (keyed by
    content, not by object: every block task receives its own copy of the design)."""
    hit = cache.get(key)
    if hit is None:
        hit = compute()
        if len(cache) >= _MASK_CACHE_SIZE:
            cache.pop(next(iter(cache)), None)
        cache[key] = hit
    return hit


def _design_key(design: Design, *extra: Any) -> tuple[Any, ...]:
    return (design.digest({"spec": design.spec.to_dict(), "fs": float(design.sample_rate_hz)}), *extra)


def _design_masks(design: Design, nperseg: int) -> _Masks:
    """The bins' designed levels, masks and gain bounds for segments of ``nperseg`` (cached)."""
    return _cached(_design_key(design, "masks", int(nperseg)), lambda: _compute_design_masks(design, int(nperseg)))


def _compute_design_masks(design: Design, nperseg: int) -> _Masks:
    fs = float(design.sample_rate_hz)
    n_bins = nperseg // 2 + 1
    fine = np.linspace(0.0, fs / 2.0, (n_bins - 1) * OVERSAMPLE + 1)
    with np.errstate(divide="ignore"):
        level_db = 20.0 * np.log10(overall_response(design, fine))
    allowance = EDGE_ALLOWANCE_BINS * OVERSAMPLE
    passband = _eroded(level_db >= _pass_level_db(design) - 0.01, allowance)[::OVERSAMPLE]
    # The largest level over the main lobe around each bin, the spectrum mirrored at 0 Hz and
    # Nyquist as a real signal's is.
    lobe = _MAIN_LOBE_BINS * OVERSAMPLE
    mirrored = np.concatenate([level_db[lobe:0:-1], level_db, level_db[-2 : -lobe - 2 : -1]])
    top_db = ndimage.maximum_filter1d(mirrored, 2 * lobe + 1)[lobe:-lobe][::OVERSAMPLE]
    # Stopband bins: the whole main lobe at or below the required level, clear of 0 Hz and Nyquist.
    stopband = top_db <= -_required_db(design) + 0.01
    stopband[:EDGE_ALLOWANCE_BINS] = False
    stopband[-EDGE_ALLOWANCE_BINS:] = False
    bound = 10.0 ** (top_db / 10.0)
    db = level_db[::OVERSAMPLE].copy()
    for a in (db, passband, stopband, bound):
        a.setflags(write=False)
    return _Masks(db, passband, stopband, bound)


@lru_cache(maxsize=8)
def _leakage_kernel(nperseg: int) -> np.ndarray:
    """Hann spectral window's largest value over each bin, main lobe zeroed; lags -n/2..n/2.

    Lag ``k`` holds the largest ``|W(f)|^2`` for ``f`` within half a bin of ``k`` bins,
    relative to the window's total spectral power (the sum over bins of its mean over each
    bin): the share of a tone's measured power that can leak ``k`` bins away wherever in
    its bin the tone lies.
    """
    w = signal.get_window(_WINDOW, nperseg)
    spectrum = np.abs(np.fft.fft(w, nperseg * OVERSAMPLE)) ** 2
    spectrum = np.roll(spectrum, OVERSAMPLE // 2).reshape(nperseg, OVERSAMPLE)  # bin k: lags k -/+ 1/2
    per_bin = spectrum.max(axis=1) / spectrum.mean(axis=1).sum()
    half = nperseg // 2
    kernel = np.concatenate([per_bin[-half:], per_bin[: half + 1]])  # lags -half..half
    kernel[half - _MAIN_LOBE_BINS : half + _MAIN_LOBE_BINS + 1] = 0.0
    kernel.setflags(write=False)
    return kernel


@lru_cache(maxsize=8)
def _leakage_spectrum(nperseg: int) -> np.ndarray:
    """rfft of :func:`_leakage_kernel` laid out circularly over ``nperseg`` lags."""
    kernel = _leakage_kernel(nperseg)
    half = nperseg // 2
    circular = np.zeros(nperseg)
    circular[: nperseg - half] = kernel[half : half + nperseg - half]  # lags 0 .. n - half - 1
    circular[nperseg - half :] = kernel[:half]  # lags -half .. -1
    spectrum = sp_fft.rfft(circular)
    spectrum.setflags(write=False)
    return spectrum


def _leakage(pyy: np.ndarray, nperseg: int) -> np.ndarray:
    """Bound on the Hann window leakage into each bin, per column of ``pyy`` (n_freqs, channels).

    The one-sided spectrum is laid out over all ``nperseg`` bins (each bin also at its
    mirror frequency, where a real signal's image lies) and convolved circularly with
    :func:`_leakage_kernel`; the result is doubled, because a component and its image can
    add in phase (``|a + b|^2 <= 2 |a|^2 + 2 |b|^2``).
    """
    n_bins = pyy.shape[0]
    two_sided = np.concatenate([pyy, pyy[1 : nperseg - n_bins + 1][::-1]], axis=0)
    spread = sp_fft.irfft(sp_fft.rfft(two_sided, axis=0) * _leakage_spectrum(nperseg)[:, None], nperseg, axis=0)
    return 2.0 * spread[:n_bins]


def _prewhitener_gain(nperseg: int) -> np.ndarray:
    """``|D(f)|^2 = 4 sin^2(pi f / fs)`` of the first difference ``D = 1 - z^-1`` on the bins."""
    return 4.0 * np.sin(np.pi * np.arange(nperseg // 2 + 1) / nperseg) ** 2


@dataclass(frozen=True)
class _BinFigures:
    """Response figures of one Welch estimate, before the two estimates are combined.

    ``figures`` (channels, 5): the columns ``_RESPONSE_FIGURES``, the stopband column from
    this estimate's stopband bins alone; ``att`` (n_freqs, channels): ``10 log10(Pxx / Pyy)``
    where the bin is a usable stopband bin (see the module notes), NaN elsewhere; ``gate``
    (channels,): the power gate's figure (:func:`_gate_attenuation`), NaN where it passes.
    """

    figures: np.ndarray
    att: np.ndarray
    gate: np.ndarray


def _response_figures(
    est: TransferEstimate, cfg: ChecksConfig, masks: _Masks, *, differenced: bool,
) -> _BinFigures:
    """Figures of one estimate; ``masks`` from :func:`_design_masks`.

    With ``differenced`` the estimate is between the first differences of input and output
    (see the module notes): ``h``, the coherence and ``pxx / pyy`` are those of the signals
    themselves, and the input's energy is judged on ``pxx / |D|^2``.
    """
    db, passband, stopband = masks.db, masks.passband, masks.stopband
    pxx, pyy, h, coh = est.pxx, est.pyy, est.h, est.coherence
    out = np.full((pxx.shape[1], 5), np.nan)
    att = np.full(pxx.shape, np.nan)
    n_d = est.segments / (1.0 + 2.0 * HANN_OVERLAP_CORRELATION**2)
    level_in = pxx
    if differenced:
        gain = _prewhitener_gain(est.nperseg)[:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            level_in = np.where(gain > 0.0, pxx / gain, 0.0)  # the input's own PSD (0 Hz: unknown)
    peak_in = np.max(level_in, axis=0)
    live = peak_in > 0.0
    energetic = level_in >= peak_in * 10.0 ** (-INPUT_FLOOR_DB / 10.0)
    candidates = passband[:, None] & energetic
    if est.effective_segments is not None:
        # A bin whose power one segment carries has a coherence near 1 whatever the output
        # (an event starting or ending near the block's edge after silence): not a candidate.
        candidates &= est.effective_segments >= MIN_EFFECTIVE_SEGMENTS
    with np.errstate(divide="ignore", invalid="ignore"):
        eps = np.sqrt(np.maximum(1.0 - coh, 0.0)) / (np.sqrt(coh) * math.sqrt(2.0 * n_d))
    gated = coh >= cfg.coherence_min
    coherent = candidates & gated & (eps <= RANDOM_ERROR_MAX)
    out[:, 3] = np.count_nonzero(candidates, axis=0)
    out[:, 4] = np.count_nonzero(coherent, axis=0)
    for c in np.flatnonzero(live & coherent.any(axis=0)):
        sel = coherent[:, c]
        hc = h[sel, c]
        with np.errstate(divide="ignore"):
            dev = 20.0 * np.log10(np.abs(hc)) - db[sel]
        phase = np.degrees(np.angle(hc))
        out[c, 0] = dev[np.argmax(np.abs(dev))]
        out[c, 1] = phase[np.argmax(np.abs(phase))]
    if stopband.any():
        margin = 10.0 ** (LEAKAGE_MARGIN_DB / 10.0)
        peak_out = np.max(pyy, axis=0)
        usable = (
            stopband[:, None]
            & energetic
            & gated
            & (pyy >= _leakage(pyy, est.nperseg) * margin)
            & (pxx >= _leakage(pxx, est.nperseg) * margin)
            & (pyy > peak_out * 10.0 ** (-NUMERIC_RANGE_DB / 10.0))
            & (est.effective_segments >= MIN_EFFECTIVE_SEGMENTS)
            & live
        )
        with np.errstate(divide="ignore", invalid="ignore"):
            att = np.where(usable, 10.0 * np.log10(pxx / pyy), np.nan)
        out[:, 2] = _stopband_minimum(att)
    out[~live] = np.nan  # no input: nothing measured
    # The power gate counts the output's power that its input explains (coherence times Pyy),
    # in bins whose power is spread over several segments: output that input outside a
    # segment left (the tail of a step's response) is not explained, nor decided by one segment.
    spread = est.effective_segments >= MIN_EFFECTIVE_SEGMENTS
    explained = np.sum(np.where(spread, coh * pyy, 0.0), axis=0)
    gate = _gate_attenuation(np.sum(pxx, axis=0), masks.bound @ pxx, explained)
    return _BinFigures(out, att, np.where(live, gate, np.nan))


def _gate_attenuation(power_in: np.ndarray, passed: np.ndarray, power_out: np.ndarray) -> np.ndarray:
    """The power gate's figure per channel (dB): how much of the power the design removes the
    output lacks, where the output holds more than a correct one can.

    ``power_in`` and ``power_out`` are the powers of input and output, ``passed`` the most a
    correct output can hold of them (same units; see the module notes). Where ``power_out >
    (1 + GATE_SLACK) passed``, the figure is ``10 log10((power_in - passed) / (power_out -
    passed))``: 0 dB for an output that removed nothing of what it should; elsewhere NaN
    (nothing wrong shown).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        value = 10.0 * np.log10((power_in - passed) / (power_out - passed))
    return np.where((power_out > (1.0 + GATE_SLACK) * passed) & (power_in > passed), value, np.nan)


def _stopband_minimum(att: np.ndarray) -> np.ndarray:
    """Per column of ``att`` (n_freqs, channels), its smallest value other than NaN; NaN if none."""
    measured = ~np.isnan(att)
    return np.where(measured.any(axis=0), np.min(np.where(measured, att, np.inf), axis=0), np.nan)


_Sums = tuple[tuple[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]
"""Sums of squares and sums over runs of input and output per channel (see :func:`_slow_gate`)."""


def _sums(x: np.ndarray, y: np.ndarray) -> _Sums:
    """:data:`_Sums` of ``x`` and ``y``."""
    chunk = _slow_chunk(x.shape[0])
    _, ssx, _, rx = chunked_stats(x, chunk)
    _, ssy, _, ry = chunked_stats(y, chunk)
    return (ssx, ssy), (rx, ry)


def _estimated_figures(x: np.ndarray, y: np.ndarray, design: Design, cfg: ChecksConfig,
                       sums: _Sums | None = None) -> np.ndarray:
    """Response figures (channels, 5) of time-major ``x`` -> ``y``; NaN when too short.

    Two Welch estimates, each segment with its least-squares line removed: the plain one
    between ``x`` and ``y``, and, for the channels where the plain one fails the
    coherent-fraction rule or leaves a graded stopband unmeasured or short of the spec, the
    differenced one between their first differences. They are combined by the rule of the
    module notes.
    """
    figures = np.full((x.shape[1], len(_RESPONSE_FIGURES)), np.nan)
    nperseg = segment_length(x.shape[0] - 1, design)  # one length for both estimates: the same bins
    if not nperseg:
        return figures
    masks = _design_masks(design, nperseg)
    stopband = masks.stopband
    attenuation = design.spec.stopband_attenuation_db

    def estimate(xs: np.ndarray, ys: np.ndarray, differenced: bool) -> _BinFigures:
        # float32 transforms suffice for passband figures (relative errors near 1e-7) and for
        # rejection bins (graded some 20 dB down); a stated attenuation needs float64's range
        # below the output's strongest bin.
        est = transfer_estimate(xs, ys, design.sample_rate_hz, nperseg, _segments_for(nperseg),
                                precision="float64" if attenuation is not None and stopband.any() else "float32",
                                detrend="linear" if differenced else "weighted", difference=differenced)
        return _response_figures(est, cfg, masks, differenced=differenced)

    plain = estimate(x, y, False)
    figures[...] = plain.figures
    figures[:, 2] = np.fmin(plain.figures[:, 2], plain.gate)
    plain_lost = _coherence_lost(plain.figures[:, 3], plain.figures[:, 4])
    # The differenced estimate where the plain one leaves the verdict open: its coherence
    # lost, or the stopband short of what it must reach, or a stated attenuation not
    # measured (its unmeasured bins may be leakage the differenced one sees past). A
    # stopband the plain one measures as met is taken as it is: a real fault shows in the
    # bins it measures (twice the check's cost on every block otherwise).
    open_stop = _stopband_short(figures[:, 2], design, cfg)
    if attenuation is not None and stopband.any():
        open_stop |= np.isnan(figures[:, 2])
    again = np.flatnonzero(plain_lost | open_stop)
    if again.size:
        diff = estimate(x[:, again], y[:, again], True)
        # Passband figures: the differenced estimate's where the plain one loses the
        # coherence and the differenced one does not.
        swap = plain_lost[again] & ~_coherence_lost(diff.figures[:, 3], diff.figures[:, 4])
        figures[again[swap]] = diff.figures[swap]
        # Stopband: per bin, the plain estimate where it is usable, else the differenced one.
        bins = _stopband_minimum(np.where(np.isnan(plain.att[:, again]), diff.att, plain.att[:, again]))
        figures[again, 2] = np.fmin(bins, plain.gate[again])
    figures[:, 2] = np.fmin(figures[:, 2], _slow_gate(design, x, y, sums))
    return figures


SLOW_TAPER_POWER: int = 3
"""The slow gate's taper over the whole block is ``(1 - u^2)^SLOW_TAPER_POWER`` for ``u`` from -1
to 1 (its spectrum falls as ``1/f^4``)."""
SLOW_BANDS: tuple[float, ...] = (2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0)
"""Candidate widths of the slow band, in bins of the whole block (``fs / samples`` Hz)."""
SLOW_RUNS: int = 4096
"""The slow gate weighs the block in runs of ``samples // SLOW_RUNS`` rows (at least one),
summed in the pass that takes the levels."""
SLOW_STAIR_LEAKAGE: float = 2e-3
"""Added to the taper's leakage (amplitude) for the staircase the runs make of it."""
SLOW_GAIN_MAX: float = 0.3
"""The slow gate is skipped where the design passes more than this (amplitude, plus the
taper's leakage) of the slowest content: it could not tell right from wrong there."""


@lru_cache(maxsize=1)
def _slow_leakage() -> np.ndarray:
    """Per width in :data:`SLOW_BANDS`, the largest root share of energy the slow basis
    functions (see :func:`_slow_gate`) hold beyond it (amplitude; computed once on 4096
    samples, zero-padded 64 times: the shares hardly depend on the block length)."""
    n, pad = 4096, 64
    u = (np.arange(n) - 0.5 * (n - 1)) / (0.5 * n)
    w = (1.0 - u * u) ** SLOW_TAPER_POWER
    basis = np.stack([w, w * u], axis=1)
    power = np.abs(np.fft.rfft(basis, n * pad, axis=0)) ** 2
    power[1:] *= 2.0
    total = power.sum(axis=0)
    beyond = [power[int(m * pad) :].sum(axis=0) / total for m in SLOW_BANDS]
    return np.sqrt(np.max(beyond, axis=1))


def _slow_chunk(n: int) -> int:
    """Rows per run whose sums the slow gate weighs alike (:data:`SLOW_RUNS` runs at least)."""
    return max(1, int(n) // SLOW_RUNS)


def _slow_energy(n: int, runs: np.ndarray) -> np.ndarray:
    """Energies in the slow subspace per channel, from the sums over runs of
    :func:`_slow_chunk` rows (:func:`~twinpass.core.loops.chunked_stats`).

    Each run is weighed by the taper at its centre: ``w = (1 - u^2)^SLOW_TAPER_POWER`` and
    ``w u`` with ``u = (t - (n - 1) / 2) / (n / 2)``, a staircase through the smooth taper
    (its extra leakage, below 1e-3 in amplitude with :data:`SLOW_RUNS` runs or more, is in
    :data:`SLOW_STAIR_LEAKAGE`); the energy is the sum of the two projections' squares, each
    divided by its basis function's squared norm (the two are orthogonal by symmetry).
    """
    chunk = _slow_chunk(n)
    first = np.arange(runs.shape[0]) * chunk
    count = np.minimum(first + chunk, n) - first
    u = (first + 0.5 * (count - 1) - 0.5 * (n - 1)) / (0.5 * n)
    w = (1.0 - u * u) ** SLOW_TAPER_POWER
    basis = np.stack([w, w * u])  # (2, runs)
    norms = (basis * basis) @ count
    return np.sum((basis @ runs) ** 2 / norms[:, None], axis=0)


def _slow_gate(design: Design, x: np.ndarray, y: np.ndarray, sums: _Sums | None = None) -> np.ndarray:
    """The slow gate's figure per channel of time-major ``x`` -> ``y`` (dB; NaN where it
    passes or does not apply, see :func:`_slow_band`).

    ``sums`` (:func:`_sums`), when given, holds the sums of squares of ``x`` and ``y`` and
    their sums over runs of :func:`_slow_chunk` rows, taken with their levels.

    The energies ``E`` of input and output in the slow subspace (spanned by the taper ``w``
    over the whole block and by ``w u``, a tapered line; :func:`_slow_energy`) are compared:
    of the input's content within the slow band (``0 .. m fs / n`` Hz for ``n`` samples) a
    correct output holds at most the design's largest gain ``G_b`` there, and of its own
    content beyond the band the subspace picks up at most the taper's leakage ``s``
    (:func:`_slow_leakage`); so ``E_y <= 2 (G_b |x| + s |y|)^2`` (``|.|``: the norm over the
    block), the bound passed to :func:`_gate_attenuation` with ``E_x`` as the input's power.
    Input outside the block is taken to be like the block's own, which the edge rule
    (:func:`_block_response`) makes so where it is not.
    """
    n = x.shape[0]
    band = _slow_band(design, n)
    if band is None:
        return np.full(x.shape[1], np.nan)
    (ssx, ssy), runs = sums if sums is not None and sums[1][0].shape[0] else _sums(x, y)
    gain, leak = band
    ex, ey = (_slow_energy(n, r) for r in runs)
    bound = 2.0 * (gain * np.sqrt(ssx) + leak * np.sqrt(ssy)) ** 2
    return _gate_attenuation(ex, bound, ey)


def _slow_band(design: Design, n: int) -> tuple[float, float] | None:
    """(``G_b``, ``s``) of :func:`_slow_gate` for blocks of ``n`` samples, or None where the
    gate does not apply (their sum at least :data:`SLOW_GAIN_MAX`, or fewer than 2 samples).

    The band width ``m`` (bins of the block, ``fs / n`` Hz) is the one of :data:`SLOW_BANDS`
    with the least ``G_b + s``; ``G_b`` is the largest designed amplitude ``G(f)`` from 0 Hz to
    ``m fs / n`` (sampled on 257 points; designs that reject slow content rise steadily there).
    """

    def compute() -> tuple[float, float] | None:
        if n < 2:
            return None
        fs = float(design.sample_rate_hz)
        bands = np.asarray(SLOW_BANDS)
        f = np.linspace(0.0, min(bands[-1] * fs / n, fs / 2.0), 257)
        peak = np.maximum.accumulate(overall_response(design, f))
        gain = peak[np.minimum(np.searchsorted(f, bands * fs / n), f.size - 1)]
        leak = _slow_leakage() + SLOW_STAIR_LEAKAGE
        best = int(np.argmin(gain + leak))
        return None if gain[best] + leak[best] >= SLOW_GAIN_MAX else (float(gain[best]), float(leak[best]))

    return _cached(_design_key(design, int(n)), compute, _SLOW_CACHE)


def stopband_limit_db(design: Design, cfg: ChecksConfig) -> float:
    """The smallest stopband attenuation (dB) :func:`grade` passes: the spec's
    ``stopband_attenuation_db`` (else :data:`REJECTION_DB`) less ``stopband_margin_db``."""
    return _required_db(design) - float(cfg.stopband_margin_db)


def _stopband_short(att: np.ndarray, design: Design, cfg: ChecksConfig) -> np.ndarray:
    """Stopband figures (dB) below what :func:`grade` accepts (False where NaN)."""
    with np.errstate(invalid="ignore"):
        return att < stopband_limit_db(design, cfg)


def _coherence_lost(bins: np.ndarray, coherent: np.ndarray) -> np.ndarray:
    """Fewer than :data:`COHERENT_FRACTION_MIN` of at least :data:`MIN_CANDIDATE_BINS`
    passband bins coherent (False where either count is NaN)."""
    with np.errstate(invalid="ignore"):
        return (bins >= MIN_CANDIDATE_BINS) & (coherent < COHERENT_FRACTION_MIN * bins)


_MODE_FLOOR: float = 1e-18
"""A pole's power ``|p|^t`` below this (relative to 1 at the block's edge) is left out of the
fit of :func:`_edge_modes`: far below float64's resolution of the output."""


def _edge_modes(sos: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """(rows, basis): what input outside ``n`` samples can add to a two-pass output.

    The two-pass impulse response ``g(m) = g(-m)`` of sections with simple poles ``p``
    (inside the unit circle) is, for ``m >= 1``, a sum ``sum_p R_p p^m`` (partial fractions of
    ``H(z) H(1/z)``, whose polynomial part is a constant). Input before the first sample
    therefore adds a combination of ``p^t`` to samples ``t >= 0``, and input after the last
    one a combination of ``p^(n - 1 - t)``: the real and imaginary parts of those powers,
    one column per pole and end. Initial states and end extensions are such input too.
    ``rows`` are the samples within reach of an end (where some ``|p|^t`` is at least
    :data:`_MODE_FLOOR`); ``basis`` (rows, columns) holds the powers there.
    """
    _, poles, _ = signal.sos2zpk(sos)
    poles = poles[(np.abs(poles) > 1e-12) & (poles.imag >= 0.0)].astype(complex)
    slowest = float(np.max(np.abs(poles))) if poles.size else 0.0
    reach = n if slowest >= 1.0 else min(n, 1 + math.ceil(math.log(_MODE_FLOOR) / math.log(max(slowest, 1e-300))))
    rows = np.unique(np.concatenate([np.arange(reach), np.arange(n - reach, n)]))
    columns = []
    for t in (rows, n - 1 - rows):
        powers = np.exp(t[:, None] * np.log(poles)[None, :])  # p^t, decaying (|p| < 1)
        columns += [powers.real, powers.imag[:, poles.imag > 0.0]]
    return rows, np.concatenate(columns, axis=1)


def _block_response(x: np.ndarray, y: np.ndarray, design: Design, cfg: ChecksConfig,
                    sums: _Sums | None = None) -> np.ndarray:
    """Response figures (channels, 5) of a block core, with the edge rule (module notes);
    ``sums`` of ``x`` and ``y`` as :func:`_sums` gives them, when already computed."""
    figures = _estimated_figures(x, y, design, cfg, sums)
    lost = np.flatnonzero(_coherence_lost(figures[:, 3], figures[:, 4]) | _stopband_short(figures[:, 2], design, cfg))
    if not lost.size:
        return figures
    xl, yl = x[:, lost], y[:, lost]
    n = x.shape[0]
    if design.sos is not None:
        own = signal.sosfiltfilt(design.sos, xl, axis=0, padtype=None)
        rows, modes = _edge_modes(np.asarray(design.sos, dtype=np.float64), n)
        fit, *_ = np.linalg.lstsq(modes, yl[rows] - own[rows], rcond=None)
        cleaned = yl.copy()
        cleaned[rows] -= modes @ fit
        figures[lost] = _estimated_figures(xl, cleaned, design, cfg)
        return figures
    reach = np.asarray(design.taps).size - 1  # an FIR's outside input reaches M - 1 samples in
    if segment_length(n - 2 * reach - 1, design):
        inner = slice(reach, n - reach)
        figures[lost] = _estimated_figures(xl[inner], yl[inner], design, cfg)
    else:  # no sample of the output is the block's own: the coherence cannot tell
        figures[np.ix_(lost, [3, 4])] = np.nan
    return figures


# ----------------------------------------------------------------------------- figures


def _finite_stats(a: np.ndarray, chunk: int) -> tuple[np.ndarray, ...]:
    """(non-finite count, RMS of finite samples, peak |finite sample|, sum of squares, sums
    over runs of ``chunk`` rows, none when ``chunk`` is 0) per channel.

    One pass over the time-major array (:func:`twinpass.core.loops.chunked_stats`); RMS and
    peak are NaN for a channel without any finite sample.
    """
    if chunk:
        n_bad, sum_sq, peak, runs = chunked_stats(a, chunk)
    else:
        (n_bad, sum_sq, peak), runs = channel_stats(a), np.zeros((0, a.shape[1]))
    n_ok = a.shape[0] - n_bad
    with np.errstate(invalid="ignore", divide="ignore"):
        rms = np.sqrt(sum_sq / n_ok)
    rms = np.where(n_ok > 0, rms, np.nan)
    peak = np.where(n_ok > 0, peak, np.nan)
    return n_bad, rms, peak, sum_sq, runs


def block_figures(
    x_core: np.ndarray,
    y_core: np.ndarray,
    design: Design,
    cfg: ChecksConfig,
    *,
    out_dtype: str | np.dtype = "float32",
    response: bool = True,
) -> np.ndarray:
    """Check figures of one filtered block, one row per channel.

    Parameters
    ----------
    x_core : ndarray, shape (samples,) or (samples, channels)
        The block's input, core only (no halo), time-major.
    y_core : ndarray, same shape
        The block's output for the same samples, before the cast to ``out_dtype``
        (float64 as computed).
    design : Design
        The filter the block was processed with.
    cfg : ChecksConfig
        Thresholds; ``coherence_min`` gates the response estimate.
    out_dtype : str or dtype
        Type the output is written as; finite samples beyond its range count as clipped.
    response : bool
        Estimate the response (see the module notes). False leaves those figures NaN.

    Returns
    -------
    ndarray of float64, shape (channels, len(FIGURES))
        Columns as :data:`FIGURES`; ``seam_mismatch`` is NaN (filled by the caller).
        Channels with non-finite samples have NaN response figures.

    Raises
    ------
    KernelError
        Input and output shapes differ.
    """
    x = np.asarray(_as_2d(x_core), dtype=np.float64)
    y = np.asarray(_as_2d(y_core), dtype=np.float64)
    if x.shape != y.shape or x.ndim != 2:
        raise KernelError(
            f"block checks: input core shape {x.shape} and output core shape {y.shape} must be equal "
            "(samples, channels); pass the core of the block without its halo."
        )
    n_ch = x.shape[1]
    figures = np.full((n_ch, len(FIGURES)), np.nan)
    chunk = _slow_chunk(x.shape[0]) if response and _slow_band(design, x.shape[0]) else 0
    bad_in, rms_in, peak_in, ss_in, runs_in = _finite_stats(x, chunk)
    bad_out, rms_out, peak_out, ss_out, runs_out = _finite_stats(y, chunk)
    dt = np.dtype(out_dtype)
    limit = float(np.finfo(dt).max) if dt.kind == "f" else float(np.iinfo(dt).max)
    if not np.any(peak_out > limit):  # NaN peaks (no finite sample) compare False
        clipped = np.zeros(n_ch)
    else:
        with np.errstate(invalid="ignore"):
            clipped = np.count_nonzero(np.isfinite(y) & (np.abs(y) > limit), axis=0)
    for name, value in (
        ("nonfinite_in", bad_in),
        ("nonfinite_out", bad_out),
        ("clipped", clipped),
        ("rms_in", rms_in),
        ("rms_out", rms_out),
        ("peak_in", peak_in),
        ("peak_out", peak_out),
    ):
        figures[:, FIGURE_INDEX[name]] = value
    if response and x.shape[0] > 1:
        clean = np.flatnonzero((bad_in == 0) & (bad_out == 0))
        if clean.size:
            if clean.size < n_ch:
                x, y = x[:, clean], y[:, clean]
            sums = ((ss_in[clean], ss_out[clean]), (runs_in[:, clean], runs_out[:, clean]))
            cols = [FIGURE_INDEX[k] for k in _RESPONSE_FIGURES]
            figures[np.ix_(clean, cols)] = _block_response(x, y, design, cfg, sums)
    return figures


SPLIT_MIN_PIECE: int = MIN_USABLE_NPERSEG * MIN_SEGMENTS + 1
"""Shortest finite piece (samples) of a block with holes that the response check can measure:
:func:`segment_length` of one less must be non-zero."""


def measurable_pieces(hole: np.ndarray, design: Design) -> list[tuple[int, int]]:
    """The runs of a block outside its holes that the response check can measure.

    ``hole`` is a boolean mask over the block's core samples (True inside a NaN/Inf run
    that ``nonfinite = "split"`` cut out). Returns ``[(start, stop))`` sample spans of the
    core, in order, of the finite pieces whose Welch segment length
    (:func:`segment_length`) is non-zero: at least :data:`SPLIT_MIN_PIECE` samples.
    """
    step = np.diff(np.concatenate([[0], (~np.asarray(hole, dtype=bool)).astype(np.int8), [0]]))
    starts, stops = np.flatnonzero(step == 1), np.flatnonzero(step == -1)
    return [(int(a), int(b)) for a, b in zip(starts, stops) if segment_length(int(b - a) - 1, design)]


def _worst_of_pieces(parts: list[np.ndarray]) -> np.ndarray:
    """Response figures (channels, 5) of several pieces of one block, the worst per channel:
    the deviation and phase of largest magnitude, the smallest attenuation, and the bin
    counts of the piece that falls furthest short of the coherent-fraction rule (among
    pieces with at least :data:`MIN_CANDIDATE_BINS` passband bins; else the piece with the
    most bins). NaN where no piece measured a figure."""
    stack = np.stack(parts)  # (pieces, channels, 5)
    out = np.full(stack.shape[1:], np.nan)
    with np.errstate(invalid="ignore"):
        for col in (0, 1):
            mag = np.where(np.isnan(stack[..., col]), -np.inf, np.abs(stack[..., col]))
            pick = np.argmax(mag, axis=0)
            out[:, col] = np.take_along_axis(stack[..., col], pick[None], axis=0)[0]
        att = stack[..., 2]
        out[:, 2] = np.where(np.all(np.isnan(att), axis=0), np.nan,
                             np.nanmin(np.where(np.isnan(att), np.inf, att), axis=0))
        bins, coherent = stack[..., 3], stack[..., 4]
        shortfall = np.where(bins >= MIN_CANDIDATE_BINS, COHERENT_FRACTION_MIN * bins - coherent, -np.inf)
        most = np.where(np.isnan(bins), -np.inf, bins)
        pick = np.where(np.isfinite(shortfall).any(axis=0), np.argmax(shortfall, axis=0), np.argmax(most, axis=0))
    out[:, 3] = np.take_along_axis(bins, pick[None], axis=0)[0]
    out[:, 4] = np.take_along_axis(coherent, pick[None], axis=0)[0]
    return out


def split_block_figures(x_core: np.ndarray, y_core: np.ndarray, hole: np.ndarray, design: Design,
                        cfg: ChecksConfig, *, out_dtype: str | np.dtype = "float32",
                        response: bool = True) -> tuple[np.ndarray, bool]:
    """Check figures of a block with holes (``nonfinite = "split"``), one row per channel.

    Each finite piece between holes was filtered as a signal of its own, so the response is
    estimated on each piece separately, on those long enough for the Welch estimate
    (:func:`measurable_pieces`), and the block takes the worst figures of its pieces
    (:func:`_worst_of_pieces`); integrity and levels are those of all samples outside the
    holes. Input from beyond a piece's ends (its end extension at a hole, the neighbouring
    block at the core's edges) is handled by the edge rule as for any block.

    Parameters
    ----------
    x_core, y_core : ndarray, shape (samples, channels)
        The block's input and output over its core, time-major, NaN inside the holes.
    hole : ndarray of bool, shape (samples,)
        True inside a hole.
    design, cfg, out_dtype, response
        As for :func:`block_figures`.

    Returns
    -------
    (figures, examined)
        ``figures`` as :func:`block_figures` gives them; ``examined`` is False when the
        response was asked for but no piece is long enough to measure it (the response
        figures are then NaN: not measured), else True.
    """
    keep = ~np.asarray(hole, dtype=bool)
    x, y = _as_2d(x_core), _as_2d(y_core)
    figures = block_figures(x[keep], y[keep], design, cfg, out_dtype=out_dtype, response=False)
    if not response:
        return figures, True
    spans = measurable_pieces(hole, design)
    if not spans:
        return figures, False
    cols = [FIGURE_INDEX[k] for k in _RESPONSE_FIGURES]
    parts = [block_figures(x[a:b], y[a:b], design, cfg, out_dtype=out_dtype)[:, cols] for a, b in spans]
    figures[:, cols] = _worst_of_pieces(parts)
    return figures, True


# ----------------------------------------------------------------------------- grading


def _column(figures: np.ndarray, name: str) -> np.ndarray:
    return np.atleast_2d(np.asarray(figures, dtype=np.float64))[:, FIGURE_INDEX[name]]


def seam_scale(design: Design, tolerance: float) -> float:
    """The relative agreement two filterings of one signal can reach: the larger of the
    tolerance and the design's float64 rounding estimate (from its report when there)."""
    rounding = design.report.get("rounding_estimate")
    if rounding is None:
        rounding = rounding_estimate(sos=design.sos, taps=design.taps)
    return max(float(tolerance), float(rounding))


@dataclass(frozen=True)
class Finding:
    """One rule of :func:`grade` that a block's figures break, on its worst channel."""

    figure: str
    """The figure the rule judges (a name in :data:`FIGURES`; ``coherent_bins`` for the
    coherent-fraction rule)."""
    value: float
    """The worst channel's figure (its unit: see :data:`FIGURES`)."""
    limit: float
    """The rule's limit in the same unit: the largest value allowed (for ``stopband_att_db``
    and ``coherent_bins``, the smallest)."""
    channel: int
    """The worst channel, counted from 0 (the column of the time-major output)."""
    status: int
    """:data:`WARN` or :data:`FAIL`."""
    of: float | None = None
    """``coherent_bins`` only: the passband bins with input energy on that channel."""

    @property
    def response(self) -> bool:
        """Whether the response check (not the integrity or seam check) found it."""
        return self.figure in _RESPONSE_FIGURES

    def describe(self) -> str:
        """The finding in words, e.g. ``"passband deviation +6.04 dB on channel 0, limit 1.3 dB
        either way"`` (channels counted from 0)."""
        on = f" on channel {self.channel}"
        if self.figure in ("nonfinite_in", "nonfinite_out", "clipped"):
            what = {"nonfinite_in": "non-finite input sample(s)", "nonfinite_out": "non-finite output sample(s)",
                    "clipped": "output sample(s) beyond the output type's range, stored as infinity,"}[self.figure]
            return f"{self.value:,.0f} {what}{on}"
        if self.figure == "passband_dev_db":
            return f"passband deviation {self.value:+.3g} dB{on}, limit {self.limit:.3g} dB either way"
        if self.figure == "phase_deg":
            return f"passband phase {self.value:+.3g} deg{on}, limit {self.limit:.3g} deg either way"
        if self.figure == "stopband_att_db":
            return (f"stopband attenuation {self.value:.3g} dB{on}, at least {self.limit:.3g} dB needed (in the "
                    "stopband bins, or over the block where its output holds more power than the design passes, "
                    "as a passband gain error makes it)")
        if self.figure == "coherent_bins":
            return (f"output not explained by its input{on} (coherent passband bins {self.value:.0f} of "
                    f"{self.of:.0f}, at least {self.limit:.3g} needed)")
        return f"seam mismatch {self.value:.2g} of the segment's input peak{on}, limit {self.limit:.2g}"


@dataclass(frozen=True)
class Limit:
    """The limits one rule of :func:`grade` judges a figure against, for one design."""

    figure: str
    """The figure (a name in :data:`FIGURES`; ``coherent_bins`` for the coherent-fraction rule)."""
    label: str
    """The figure in words."""
    unit: str
    """Its unit: ``"dB"``, ``"deg"``, ``"relative"`` (of the segment's input peak),
    ``"samples"`` (a count) or ``"fraction"`` (of the passband bins with input energy)."""
    warn: float | None
    """Beyond this the block warns (None: the rule has no warn level)."""
    fail: float | None
    """Beyond this the block fails (None: the rule has no fail level)."""
    below: bool = False
    """True: the figure must not fall below the limits (stopband attenuation, coherent
    fraction); False: it must not exceed them."""
    either_way: bool = False
    """The magnitude is judged (signed figures: passband deviation, phase)."""
    basis: str = ""
    """How the limit is made, in words (spec, allowances, ``[checks]`` settings)."""

    def rule(self) -> str:
        """The rule in words, e.g. ``"warn beyond ±0.8 dB, fail beyond ±1.3 dB"``."""
        unit = {"samples": "", "fraction": "", "relative": " (relative)"}.get(self.unit, f" {self.unit}")
        sign = "±" if self.either_way else ""
        word = "below" if self.below else "beyond" if self.either_way else "above"
        return ", ".join(f"{name} {word} {sign}{value:.3g}{unit}"
                         for name, value in (("warn", self.warn), ("fail", self.fail)) if value is not None)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: figure, label, unit, warn, fail, below, either_way, rule, basis."""
        return {"figure": self.figure, "label": self.label, "unit": self.unit, "warn": self.warn,
                "fail": self.fail, "below": self.below, "either_way": self.either_way, "rule": self.rule(),
                "basis": self.basis}


LIMITS_EXPLAINED: str = (
    "The response figures are estimates from each block's own input and output (Welch spectra), "
    "tests of the processing rather than calibrations, so the grading allows for the estimator: "
    "the passband deviation may reach half the designed ripple (the estimate smooths the response "
    "over about two bins, flattening ripple peaks by up to about half their height) plus "
    f"{ESTIMATOR_ERROR_DB:g} dB of random error before the [checks] passband_warn_db and "
    "passband_fail_db are added; and a stopband fails only below the spec's attenuation less "
    "[checks] stopband_margin_db, because the estimate of a deep attenuation is limited by the "
    "window's leakage, the few segments averaged and the response smoothed over about two bins, "
    "and can measure a correct filter short of its design. A stopband figure below the nominal "
    "spec but above that limit therefore passes: the check shows the blocks were filtered as "
    "designed (a wrong or unfiltered block falls far below it), not that the output meets the spec "
    "to that accuracy; the design's own attenuation is in the design report."
)
"""Why a figure below the nominal spec can pass, for the report and ``twinpass status``."""


def grading_limits(design: Design, cfg: ChecksConfig, tolerance: float) -> dict[str, Limit]:
    """The limits :func:`grade` (through :func:`findings`) judges a block's figures against.

    Parameters are those of :func:`grade`. Returns one :class:`Limit` per rule, keyed by
    figure: ``nonfinite_in``, ``nonfinite_out``, ``clipped`` (counts), ``passband_dev_db`` (dB,
    either way), ``phase_deg`` (degrees, either way), ``stopband_att_db`` (dB, at least),
    ``coherent_bins`` (fraction of the passband bins with input energy, at least; judged only
    where there are :data:`MIN_CANDIDATE_BINS` or more) and ``seam_mismatch`` (relative to the
    segment's input peak). NaN figures are not measured and never judged.
    """
    spec = design.spec
    ripple = float(spec.passband_ripple_db or 0.0)
    base = ripple / 2.0 + ESTIMATOR_ERROR_DB
    required = _required_db(design)
    stated = spec.stopband_attenuation_db is not None
    scale = seam_scale(design, tolerance)
    return {
        "nonfinite_in": Limit("nonfinite_in", "non-finite input samples", "samples", None, 0.0,
                              basis="any NaN or infinite input sample fails"),
        "nonfinite_out": Limit("nonfinite_out", "non-finite output samples", "samples", None, 0.0,
                               basis="any NaN or infinite output sample fails"),
        "clipped": Limit("clipped", "clipped output samples", "samples", None, 0.0,
                         basis=("any output sample beyond the output type's range fails: it is stored as "
                                f"infinity, not as the filtered value ({CLIPPED_REMEDY} holds it)")),
        "passband_dev_db": Limit(
            "passband_dev_db", "passband deviation", "dB", base + cfg.passband_warn_db, base + cfg.passband_fail_db,
            either_way=True,
            basis=(f"half the designed ripple ({ripple:g} dB / 2) + estimator allowance {ESTIMATOR_ERROR_DB:g} dB "
                   f"+ [checks] passband_warn_db {cfg.passband_warn_db:g} dB / passband_fail_db "
                   f"{cfg.passband_fail_db:g} dB")),
        "phase_deg": Limit("phase_deg", "passband phase", "deg", float(cfg.phase_warn_deg), float(cfg.phase_fail_deg),
                           either_way=True, basis="[checks] phase_warn_deg / phase_fail_deg (zero phase: about 0)"),
        "stopband_att_db": Limit(
            "stopband_att_db", "stopband attenuation", "dB", None, stopband_limit_db(design, cfg), below=True,
            basis=(f"{'the spec' if stated else 'the rejection level of designs that state none'} {required:g} dB "
                   f"less [checks] stopband_margin_db {cfg.stopband_margin_db:g} dB")),
        "coherent_bins": Limit(
            "coherent_bins", "coherent passband bins", "fraction", None, COHERENT_FRACTION_MIN, below=True,
            basis=(f"share of the passband bins with input energy whose coherence reaches [checks] coherence_min "
                   f"{cfg.coherence_min:g} (judged with {MIN_CANDIDATE_BINS} such bins or more)")),
        "seam_mismatch": Limit(
            "seam_mismatch", "seam mismatch", "relative", None, SEAM_FACTOR * scale,
            basis=(f"{SEAM_FACTOR:g} x the larger of the tolerance {float(tolerance):g} and the design's float64 "
                   "rounding estimate, of the segment's input peak")),
    }


def _worst(values: np.ndarray, above: float, status: int, figure: str, *, sign: float = 1.0,
           judged: np.ndarray | None = None) -> list[Finding]:
    """A :class:`Finding` for the channel whose ``judged`` (default ``values``) exceeds
    ``above`` the most (NaN: not measured), or none; ``sign`` -1 judges ``-values``."""
    judged = sign * values if judged is None else judged
    over = np.where(np.isnan(judged), -np.inf, judged)
    if not np.any(over > above):
        return []
    ch = int(np.argmax(over))
    return [Finding(figure, float(values[ch]), sign * above, ch, status)]


def findings(figures: np.ndarray, design: Design, cfg: ChecksConfig, tolerance: float) -> list[Finding]:
    """The rules of :func:`grade` that a block's figures break, each on its worst channel.

    Parameters are those of :func:`grade`; a rule with a warn and a fail limit gives one
    finding, at the fail limit when it is beyond it, else at the warn limit. Empty when the
    block passes.
    """
    found: list[Finding] = []
    lim = grading_limits(design, cfg, tolerance)
    for name in ("nonfinite_in", "nonfinite_out"):
        found += _worst(_column(figures, name), float(lim[name].fail or 0.0), FAIL, name)
    found += _worst(_column(figures, "clipped"), float(lim["clipped"].fail or 0.0), FAIL, "clipped")
    for name in ("passband_dev_db", "phase_deg"):
        values, rule = _column(figures, name), lim[name]
        found += (_worst(values, float(rule.fail or 0.0), FAIL, name, judged=np.abs(values))
                  or _worst(values, float(rule.warn or 0.0), WARN, name, judged=np.abs(values)))
    found += _worst(_column(figures, "stopband_att_db"), -float(lim["stopband_att_db"].fail or 0.0), FAIL,
                    "stopband_att_db",
                    sign=-1.0)
    bins, coherent = _column(figures, "passband_bins"), _column(figures, "coherent_bins")
    lost = _coherence_lost(bins, coherent)
    if np.any(lost):
        share = float(lim["coherent_bins"].fail or 0.0)
        shortfall = np.where(lost, share * bins - coherent, -np.inf)
        ch = int(np.argmax(shortfall))
        found.append(Finding("coherent_bins", float(coherent[ch]), share * float(bins[ch]), ch, FAIL,
                             of=float(bins[ch])))
    found += _worst(_column(figures, "seam_mismatch"), float(lim["seam_mismatch"].fail or 0.0), FAIL,
                    "seam_mismatch")
    return found


def grade(figures: np.ndarray, design: Design, cfg: ChecksConfig, tolerance: float) -> int:
    """Status of one block from its figures: :data:`PASS`, :data:`WARN` or :data:`FAIL`.

    Parameters
    ----------
    figures : ndarray, shape (channels, len(FIGURES))
        As from :func:`block_figures` (with ``seam_mismatch`` filled when computed).
    design : Design
        The filter; its spec gives the ripple (dB) and stopband attenuation (dB, else
        :data:`REJECTION_DB`).
    cfg : ChecksConfig
        Thresholds.
    tolerance : float
        Relative blockwise tolerance (the seam limit is ``SEAM_FACTOR`` times the larger of
        it and the design's float64 rounding estimate,
        :func:`~twinpass.core.effective.rounding_estimate`).

    Returns
    -------
    int
        The worst over channels of these rules (NaN figures are not measured and ignored):

        * non-finite input or output samples: fail;
        * clipped output samples (beyond the output type's range, stored as infinity): fail;
        * ``|passband_dev_db| > ripple/2 + ESTIMATOR_ERROR_DB + passband_warn_db``: warn;
          ``... + passband_fail_db``: fail (``ripple`` is the spec's overall passband
          ripple, 0 when not given);
        * ``|phase_deg| > phase_warn_deg``: warn; ``> phase_fail_deg``: fail;
        * ``stopband_att_db < required - stopband_margin_db``: fail, ``required`` being the
          spec's ``stopband_attenuation_db`` or, for designs that state none,
          :data:`REJECTION_DB`;
        * fewer than ``COHERENT_FRACTION_MIN`` of at least ``MIN_CANDIDATE_BINS`` passband
          bins with input energy coherent: fail (the output is not a linear function of
          the input);
        * ``seam_mismatch > SEAM_FACTOR * max(tolerance, rounding estimate)``: fail (a
          design whose rounding exceeds the tolerance cannot agree more closely; its report
          says so).
    """
    return max((f.status for f in findings(figures, design, cfg, tolerance)), default=PASS)


_BY_NAME = {name: code for code, name in STATUS_NAMES.items()}


CANCELLED = "cancelled"
"""How the error text of a block whose task was cancelled begins (the run was stopped
meanwhile; see ``twinpass.engine.lost_task_error``)."""


def was_cancelled(error: str | None) -> bool:
    """Whether a block's recorded error text says its task was cancelled: the block is not
    done, but nothing failed in it."""
    return bool(error) and str(error).startswith(CANCELLED)


def grade_file(statuses: Iterable[int | str | None]) -> str:
    """Status of a file from its blocks' statuses.

    Parameters
    ----------
    statuses : iterable of int, str or None
        Block status codes (:data:`STATUS_NAMES`) or their names; ``None`` = pending.

    Returns
    -------
    str
        ``"fail"`` if any block failed or raised an error; otherwise ``"incomplete"`` if
        there are no blocks or any is pending; otherwise ``"warn"`` if any warned, else
        ``"pass"``.
    """
    codes = []
    for s in statuses:
        if s is None:
            codes.append(PENDING)
        elif isinstance(s, str):
            if s not in _BY_NAME:
                raise TwinpassError(f"unknown block status {s!r}; use a status code or one of {', '.join(_BY_NAME)}")
            codes.append(_BY_NAME[s])
        else:
            codes.append(int(s))
    if any(c in (FAIL, ERROR) for c in codes):
        return "fail"
    if not codes or any(c == PENDING for c in codes):
        return "incomplete"
    return "warn" if any(c == WARN for c in codes) else "pass"


_SUMMARY_RULE: dict[str, str] = {
    "nonfinite_in": "sum",
    "nonfinite_out": "sum",
    "clipped": "sum",
    "rms_in": "max",
    "rms_out": "max",
    "peak_in": "max",
    "peak_out": "max",
    "passband_dev_db": "absmax",
    "phase_deg": "absmax",
    "stopband_att_db": "min",
    "passband_bins": "min",
    "coherent_bins": "min",
    "seam_mismatch": "max",
}


def summarise(figures_by_block: Mapping[Any, np.ndarray] | Iterable[np.ndarray]) -> dict[str, Any]:
    """Worst figures over blocks and channels, JSON-safe.

    Parameters
    ----------
    figures_by_block : mapping or iterable of ndarray, shape (channels, len(FIGURES))
        One array per block (a mapping's values are used).

    Returns
    -------
    dict
        ``blocks`` (count), ``blocks_measured`` (blocks with a response estimate) and one
        key per name in :data:`FIGURES`: counts summed (int); RMS, peak and seam mismatch
        the largest; passband deviation and phase the signed value of largest magnitude;
        stopband attenuation and bin counts the smallest. ``None`` where nothing was
        measured (no NaN or infinity).
    """
    arrays = list(figures_by_block.values() if isinstance(figures_by_block, Mapping) else figures_by_block)
    rows = [np.atleast_2d(np.asarray(a, dtype=np.float64)) for a in arrays]
    stacked = np.concatenate(rows, axis=0) if rows else np.empty((0, len(FIGURES)))
    measured = sum(1 for r in rows if np.any(~np.isnan(r[:, FIGURE_INDEX["passband_bins"]])))
    out: dict[str, Any] = {"blocks": len(rows), "blocks_measured": measured}
    for name, rule in _SUMMARY_RULE.items():
        col = stacked[:, FIGURE_INDEX[name]]
        col = col[~np.isnan(col)]
        value: float | None
        if col.size == 0:
            value = None
        elif rule == "sum":
            out[name] = int(np.sum(col))
            continue
        elif rule == "max":
            value = float(np.max(col))
        elif rule == "min":
            value = float(np.min(col))
        else:
            value = float(col[np.argmax(np.abs(col))])
        out[name] = value if value is not None and math.isfinite(value) else None
    return out


def seam_mismatch(own_tail_beyond: np.ndarray, neighbour_head: np.ndarray, full_scale: float) -> float:
    """Largest |difference| between two blocks' outputs for the same samples, relative.

    Parameters
    ----------
    own_tail_beyond : ndarray, shape (samples,) or (samples, channels)
        This block's output computed for samples beyond its core (float64, before cast).
    neighbour_head : ndarray, same shape
        The neighbouring block's output for those samples.
    full_scale : float
        Reference level, the segment's max |input| (input units).

    Returns
    -------
    float
        ``max |a - b| / full_scale`` over the samples where neither value is NaN (NaN
        marks a sample that was not computed); NaN if no sample is comparable; ``inf``
        if a difference is infinite or ``full_scale`` is not positive while the outputs
        differ.

    Raises
    ------
    KernelError
        The two arrays have different shapes.
    """
    a = np.asarray(own_tail_beyond, dtype=np.float64)
    b = np.asarray(neighbour_head, dtype=np.float64)
    if a.shape != b.shape:
        raise KernelError(
            f"seam check: this block's samples beyond its edge have shape {a.shape} but the "
            f"neighbour's have shape {b.shape}; compute the same number of seam samples on both sides."
        )
    both = ~(np.isnan(a) | np.isnan(b))
    if not both.any():
        return math.nan
    with np.errstate(invalid="ignore", over="ignore"):
        diff = np.abs(a[both] - b[both])
    if not np.all(np.isfinite(diff)):
        return math.inf
    worst = float(np.max(diff))
    if worst == 0.0:
        return 0.0
    scale = float(full_scale)
    if not (math.isfinite(scale) and scale > 0.0):
        return math.inf
    return worst / scale
