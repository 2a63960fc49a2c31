"""Effective length of a filter run forward then backward: the halo a block needs.

Conventions: lengths in samples; ``sos`` is a second-order-section array of shape
(n_sections, 6) as produced by ``scipy.signal`` (``output="sos"``); ``taps`` is an FIR
impulse response of shape (M,). The tolerance is relative to the segment's largest
absolute input value.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import signal, special

from twinpass.errors import DesignError

__all__ = [
    "effective_length",
    "dominant_pole_radius",
    "rounding_estimate",
    "analytic_rounding_estimate",
    "measured_rounding",
    "rounding_dominant_pole",
    "ERROR_FACTOR",
    "ROUNDING_FLOOR",
    "ROUNDING_SAFETY",
    "ROUNDING_PROBE_SAMPLES",
    "MEASURED_MIN_SECTIONS",
    "NEAR_EDGE_RATIO",
    "pole_near_edge",
    "zeros_and_poles",
]

ERROR_FACTOR: float = 10.0
"""Constant ``K`` of the bound ``|blockwise - whole| <= K * ||h||_1 * T(L) * max|x|``."""

_FIRST_CHUNK = 4096
_MAX_CHUNK = 1 << 20
_NEGLIGIBLE = 1e-3
"""The estimated uncomputed tail must be this fraction of the threshold before we stop."""


def _check_sos(sos: np.ndarray) -> np.ndarray:
    sos = np.asarray(sos, dtype=np.float64)
    if sos.ndim != 2 or sos.shape[1] != 6 or sos.shape[0] < 1:
        raise DesignError(
            f"second-order sections must have shape (n_sections, 6); got {sos.shape}. "
            "Design the filter with output='sos'."
        )
    if not np.all(np.isfinite(sos)):
        raise DesignError("second-order sections contain NaN or infinity; redesign the filter.")
    if not np.allclose(sos[:, 3], 1.0):
        raise DesignError(
            "every second-order section must have a0 == 1 (column 3); normalise each row by its a0."
        )
    return sos


def zeros_and_poles(sos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Zeros and poles of second-order sections (``scipy.signal.sos2zpk``), without scipy's
    ``BadCoefficients`` warning: the tiny numerators of very low or very narrow designs only
    concern the zeros' accuracy, and twinpass judges a design's conditioning itself
    (:func:`twinpass.core.design.check_sos`)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", signal.BadCoefficients)
        zeros, poles, _ = signal.sos2zpk(sos)
    return zeros, poles


def dominant_pole_radius(sos: np.ndarray) -> float:
    """Largest pole magnitude of a cascade of second-order sections.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
        Second-order sections (``scipy.signal`` layout, a0 == 1).

    Returns
    -------
    float
        ``max |p|`` over all poles (0 for a filter whose poles all sit at the origin).
        A value >= 1 means the filter is unstable or marginally stable.
    """
    sos = _check_sos(sos)
    _, poles = zeros_and_poles(sos)
    return float(np.max(np.abs(poles))) if poles.size else 0.0


ROUNDING_FLOOR: float = 1e4
"""Smallest :func:`analytic_rounding_estimate`, in units of float64's machine epsilon (about 2.2e-12)."""


NEAR_EDGE_RATIO: float = 50.0
"""A pole with ``|sin(angle)| <= NEAR_EDGE_RATIO * (1 - r)`` counts as near z = 1 or -1: a
resonance within about 25 of its own bandwidths of 0 Hz or Nyquist (see :func:`analytic_rounding_estimate`)."""


def _rounding_terms(sos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Poles (one of each conjugate pair, real poles each) and their rounding growth terms.

    With ``rho = 1 - r`` and ``s = max(|sin(angle)|, rho)`` the term is ``rho**-1 * s**-0.5``,
    and at least ``rho**-1.5`` for a pole near z = 1 or -1 (``NEAR_EDGE_RATIO``); infinite
    for ``rho <= 0``. See :func:`analytic_rounding_estimate`.
    """
    poles = np.concatenate([np.roots(row[3:]).astype(complex) for row in _check_sos(sos)])
    poles = poles[poles.imag >= 0.0]
    rho = 1.0 - np.abs(poles)
    sine = np.abs(np.sin(np.angle(poles)))
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = 1.0 / (rho * np.sqrt(np.maximum(sine, rho)))
        terms = np.where(pole_near_edge(poles), np.maximum(terms, rho**-1.5), terms)
    return poles, np.where(rho > 0.0, terms, np.inf)


def pole_near_edge(poles: complex | np.ndarray) -> np.ndarray:
    """Whether each pole lies near z = 1 or -1: ``|sin(angle)| <= NEAR_EDGE_RATIO * (1 - r)``."""
    p = np.asarray(poles, dtype=complex)
    return np.abs(np.sin(np.angle(p))) <= NEAR_EDGE_RATIO * (1.0 - np.abs(p))


def rounding_dominant_pole(sos: np.ndarray) -> complex:
    """The pole with the largest term in :func:`analytic_rounding_estimate` (0 when there is none)."""
    poles, terms = _rounding_terms(sos)
    return complex(poles[int(np.argmax(terms))]) if poles.size else 0j


def analytic_rounding_estimate(*, sos: np.ndarray | None = None, taps: np.ndarray | None = None) -> float:
    """Rounding estimate of two-pass filtering from the poles alone, relative to full scale.

    Blocks filtered with halos and the whole signal filtered at once are two computations in
    float64; besides the halo's truncation (the tolerance), they differ by their rounding,
    and so does either from the exact result. Rounding injected into a recursive section's
    states is amplified by its all-pole part. For a pole at radius ``r`` and angle
    ``theta`` (rad), with ``rho = 1 - r`` and ``s = max(|sin theta|, rho)``:

    * rounding that behaves like noise (a noisy input) grows as that part's rms gain,
      about ``rho**-0.5 / s``;
    * rounding that repeats with a tone at the pole's frequency whose period is a whole
      number of samples (hum at a notch) gathers at the resonance and grows as
      ``rho**-1 * s**-0.5`` (measured: the exponent of ``rho`` was -1.0 for notches at
      50 Hz and 12 kHz at 48 kHz, -0.4 to -0.6 on noise).

    The second is the larger. Near z = 1 or -1 (low cutoffs, edges near Nyquist) ``s`` is
    ``rho`` and both give ``rho**-1.5``, the law low-cutoff designs were first calibrated
    against; it stays the least term of every pole near there (``|sin theta| <=
    NEAR_EDGE_RATIO * rho``), so high-order low-cutoff designs, whose dominant poles lie a
    few ``rho`` off the real axis, keep it. This returns ``eps * max(sum of the terms,
    ROUNDING_FLOOR)``, one term per conjugate pair (``eps * max(n_taps, ROUNDING_FLOOR)``
    for an FIR filter, a bound on the rounding of its sums), an order-of-magnitude
    estimate. Against the two-pass result computed in numpy.longdouble (x86-64 extended
    precision, same coefficients) for 42 designs (notches from 0.5 Hz to 23 kHz, narrow
    band-passes, Butterworth, Chebyshev and elliptic low-, high-, band-pass and band-stop
    designs, ``1 - r`` from 7e-6 to 4e-2) and six inputs (noise; noise with a tone, a step
    and a slow sine; a full-scale square wave; a logarithmic chirp; a full-scale tone at the
    pole frequency, with and without an offset), the largest difference lay 1.8 to 310 times
    below the estimate (2.6 to 860 times for the noise-tone-step input), except for
    high-order designs with low cutoffs or an edge near Nyquist driven by a full-scale square
    wave or a tone at their edge, whose rounding gathers at 0 Hz or Nyquist: up to 6 times
    above it there (9 times above the earlier ``eps * (1 - r)**-1.5`` of the dominant pole).

    It treats each pole on its own, so it misses what a long cascade of sharp sections does
    to rounding (high-order Chebyshev I designs: many poles close together near the band
    edge); :func:`rounding_estimate` adds a measurement for that.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6), optional
        Second-order sections of one pass (``scipy.signal`` layout).
    taps : ndarray, shape (n_taps,), optional
        FIR coefficients of one pass (when ``sos`` is None).

    Returns
    -------
    float
        The estimate, as a fraction of the signal's full scale (its largest magnitude).
    """
    eps = float(np.finfo(np.float64).eps)
    if sos is not None:
        growth = float(np.sum(_rounding_terms(sos)[1]))
    else:
        growth = float(np.asarray(taps).size) if taps is not None else 1.0
    return eps * max(growth, ROUNDING_FLOOR)


ROUNDING_SAFETY: float = 10.0
"""Factor on :func:`measured_rounding` in :func:`rounding_estimate` (common practice: an
order of magnitude of headroom). Against the probe's noise with an offset and a step, a
full-scale square wave rounded up to 4 times more in Chebyshev I low-passes of order 24 to
48 (measured, numpy.longdouble reference)."""

ROUNDING_PROBE_SAMPLES: int = 65536
"""Length (samples) of the probe signal of :func:`measured_rounding`."""

MEASURED_MIN_SECTIONS: int = 8
"""Cascades of fewer sections are not measured (:func:`measured_rounding` gives 0): the
measurement costs some 0.05-0.15 s per design, paid by every command, and their rounding is
small. Measured on Chebyshev I low-passes of orders 8 to 14 (0.05 to 1 dB ripple per pass,
cutoffs from 1/100 to 2/5 of the rate), the largest difference was 1e-11 of full scale (order
14, 1 dB, at 1/100 of the rate), where the analytic estimate says 7e-12: within a factor of
two of it, and a hundred times below the default tolerance."""

_MEASURED: dict[bytes, float] = {}
_MEASURED_KEEP = 256


def _probe_two_pass(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Forward then backward ``scipy.signal.sosfilt`` from rest, in the dtype of the inputs."""
    y = signal.sosfilt(sos, x)
    return signal.sosfilt(sos, y[::-1])[::-1]


def measured_rounding(sos: np.ndarray) -> float:
    """Measured float64 rounding of two-pass filtering with ``sos``, relative to full scale.

    Both passes run over a probe signal of ``ROUNDING_PROBE_SAMPLES`` samples (seeded
    noise of standard deviation 0.3 on an offset of 0.5 that steps to 1.0 halfway, from
    rest) with ``scipy.signal.sosfilt`` in float64 and again in numpy.longdouble on the same
    coefficients (x86-64 extended precision, 11 more bits); the result is the largest
    difference over the probe's largest magnitude. Where numpy.longdouble is no more precise
    than float64, the reference is the same filtering with the sections in reverse order
    (the same filter, rounded differently). Results are kept per coefficient array.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
        Second-order sections of one pass (``scipy.signal`` layout).

    Returns
    -------
    float
        The difference as a fraction of the probe's full scale; infinite if float64
        filtering overflows.
    """
    sos = np.ascontiguousarray(_check_sos(sos), dtype=np.float64)
    if sos.shape[0] < MEASURED_MIN_SECTIONS:
        return 0.0
    key = sos.tobytes()
    if key in _MEASURED:
        return _MEASURED[key]
    n = ROUNDING_PROBE_SAMPLES
    rng = np.random.default_rng(0)
    x = 0.3 * rng.standard_normal(n) + 0.5 + 0.5 * (np.arange(n) >= n // 2)
    extended = np.finfo(np.longdouble).eps < np.finfo(np.float64).eps / 100.0
    with np.errstate(all="ignore"):
        y = _probe_two_pass(sos, x)
        if extended:
            ref = _probe_two_pass(sos.astype(np.longdouble), x.astype(np.longdouble))
        else:
            ref = _probe_two_pass(np.ascontiguousarray(sos[::-1]), x)
        diff = float(np.max(np.abs(y - ref))) / float(np.max(np.abs(x)))
    value = diff if math.isfinite(diff) else math.inf
    if len(_MEASURED) >= _MEASURED_KEEP:
        _MEASURED.clear()
    _MEASURED[key] = value
    return value


def rounding_estimate(*, sos: np.ndarray | None = None, taps: np.ndarray | None = None) -> float:
    """Estimated largest float64 rounding difference of two-pass filtering, relative to full scale.

    The larger of :func:`analytic_rounding_estimate` (from the poles, one at a time) and,
    for second-order sections, ``ROUNDING_SAFETY`` times :func:`measured_rounding` (the
    whole cascade, measured). The analytic estimate is the larger, so the result is the
    analytic estimate unchanged, for ordinary designs (measured on low-passes at a tenth of
    the rate: Butterworth up to order 32, Chebyshev II up to 32, elliptic up to 20,
    Chebyshev I up to 8; notches); long, sharp Chebyshev I cascades round far more than their
    poles one at a time suggest (a 100 Hz low-pass at 1 kHz with 0.05 dB ripple per pass:
    measured 1.5e-9 of full scale at order 32, 1.1e-5 at order 48, against an analytic
    2.2e-12).

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6), optional
        Second-order sections of one pass (``scipy.signal`` layout).
    taps : ndarray, shape (n_taps,), optional
        FIR coefficients of one pass (when ``sos`` is None).

    Returns
    -------
    float
        The estimate, as a fraction of the signal's full scale (its largest magnitude).
    """
    analytic = analytic_rounding_estimate(sos=sos, taps=taps)
    if sos is None:
        return analytic
    return max(analytic, ROUNDING_SAFETY * measured_rounding(sos))


def _pole_multiplicity(sos: np.ndarray, radius: float) -> int:
    """Number of poles within one ``1 - radius`` of the dominant radius (margin for repeats)."""
    _, poles = zeros_and_poles(sos)
    band = max(1.0 - radius, 1e-12)
    return max(1, int(np.count_nonzero(np.abs(poles) >= radius - band)))


def _tail_estimate(radius: float, h_last: np.ndarray, end: int, multiplicity: int) -> float:
    """Estimated ``T(end) = sum_{k>=end} |h[k]|`` from the last computed chunk ``h_last``.

    Two estimates, the smaller is used:

    (a) chunk-geometric: the last chunk's sum times ``q / (1 - q)``, with
        ``q = r^c (end / (end - c))^(m-1)`` for a chunk of ``c`` samples (exact for a pure
        geometric decay; infinite unless ``q < 1``);
    (b) envelope: the last chunk's max |h| as the envelope ``A`` at ``end``, continued as
        ``A ((end + j) / end)^(m-1) r^j`` (``m`` poles at the dominant radius), summed:
        ``A (1 + integral_0^inf (1 + t/end)^(m-1) r^t dt)``.
    """
    if radius == 0.0:
        return 0.0
    c = h_last.size
    log_r = math.log(radius)
    estimates = [math.inf]
    log_q = c * log_r + (multiplicity - 1) * math.log(end / max(end - c, 1))
    if log_q < 0.0:
        q = math.exp(log_q)
        estimates.append(float(np.sum(np.abs(h_last))) * q / (1.0 - q))
    estimates.append(float(np.max(np.abs(h_last))) * (1.0 + _envelope_integral(-log_r, end, multiplicity)))
    return min(estimates)


def _envelope_integral(a: float, n: int, m: int) -> float:
    """``integral_0^inf (1 + t/n)^(m-1) exp(-a t) dt`` (a > 0), in closed form.

    Substituting ``u = n + t`` gives ``e^(a n) n^(1-m) Gamma(m, a n) / a^m``; for ``m = 1``
    it is ``1 / a``. Evaluated in logarithms to avoid overflow.
    """
    if m <= 1:
        return 1.0 / a
    x = a * n
    upper = special.gammaincc(m, x)
    if upper > 0.0:
        log_val = x + (1 - m) * math.log(n) + special.gammaln(m) + math.log(upper) - m * math.log(a)
        return math.exp(log_val)
    # Gamma(m, x) underflowed: x >> m, where the integrand is ~geometric with ratio
    # exp(-a + (m-1)/n) and the integral tends to 1 / (a - (m-1)/n).
    return 1.0 / (a - (m - 1) / n)


def effective_length(
    *,
    sos: np.ndarray | None = None,
    taps: np.ndarray | None = None,
    tolerance: float = 1e-9,
    max_computed_length: int = 1 << 25,
) -> int:
    """Halo, in samples per side, for blockwise two-pass filtering within ``tolerance``.

    A block filtered forward then backward on a window with this many extra samples on
    each side (steady-state initial conditions: ``scipy.signal.sosfilt_zi`` scaled by the
    first window sample forward, and by the last forward output backward) differs from the
    whole-signal two-pass result by at most ``tolerance * max|x|``.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6), optional
        IIR filter as second-order sections.
    taps : ndarray, shape (M,), optional
        FIR impulse response. Exactly one of ``sos`` and ``taps`` is given.
    tolerance : float
        Largest allowed error relative to the segment's max |input| (dimensionless).
    max_computed_length : int
        Longest impulse response computed explicitly (samples); beyond it the tail is
        extrapolated from the dominant pole radius.

    Returns
    -------
    int
        The effective length ``L`` (samples per side). For FIR taps it is exactly ``M - 1``
        (the two passes equal one convolution with the length ``2M - 1`` autocorrelation).

    Raises
    ------
    DesignError
        Both or neither of ``sos``/``taps`` given, a tolerance outside (0, 1), or an
        unstable IIR filter (a pole at radius >= 1).

    Notes
    -----
    Error analysis (IIR). Let ``h`` be the impulse response of one pass,
    ``||h||_1 = sum |h[k]|`` and ``T(n) = sum_{k>=n} |h[k]|``, ``M = max|x|``.

    * The filter state after sample ``m`` produces, ``n`` samples later, the output
      ``sum_{j>=0} h[n+j] u[m-j]`` of the past inputs ``u``. The steady state
      ``sosfilt_zi * c`` is the state reached by an endless constant history ``c``. So the
      forward state error at the window start is the state of the difference history
      (true history minus the constant first window sample). The true history includes the
      end extension (``|odd extension| <= 3M``), so the difference is at most ``4M`` and the
      forward output error in the core and the right halo is at most ``4 M T(L)``.
    * The backward pass maps that error through ``h`` again: at most ``||h||_1 4 M T(L)``.
    * The backward initial state is the steady state of the last forward window output,
      while the truth is the state of the forward output beyond the window
      (``|y_f| <= 3 M ||h||_1``): a difference history of at most ``6 M ||h||_1``, giving
      at most ``6 M ||h||_1 T(L)`` in the core.

    In total ``|error| <= 10 ||h||_1 T(L) M``; ``L`` is the smallest length with
    ``10 ||h||_1 T(L) <= tolerance``. ``h`` is computed by ``sosfilt`` of an impulse in
    growing chunks (state carried, memory bounded) until the tail beyond the computed part,
    estimated geometrically from the dominant pole radius ``r`` (with a polynomial margin for
    repeated poles), is negligible. Beyond ``max_computed_length`` the tail is extrapolated
    with the same estimate. The result grows like ``ln(tolerance) / ln(r)``.
    """
    if (sos is None) == (taps is None):
        raise DesignError("give exactly one of 'sos' (IIR) and 'taps' (FIR) to effective_length.")
    if not (0.0 < float(tolerance) < 1.0):
        raise DesignError(
            f"tolerance must lie in (0, 1) (relative to max |input|); got {tolerance!r}."
        )
    if taps is not None:
        taps_arr = np.asarray(taps)
        if taps_arr.ndim != 1 or taps_arr.size < 1:
            raise DesignError(f"FIR taps must be a non-empty 1-D array; got shape {taps_arr.shape}.")
        return int(taps_arr.size - 1)

    assert sos is not None
    sos = _check_sos(sos)
    radius = dominant_pole_radius(sos)
    if not radius < 1.0:
        raise DesignError(
            f"the filter is unstable: its largest pole radius is {radius:.12g} (must be < 1). "
            "Raise the cutoff, lower the order, or design in second-order sections "
            "(output='sos') rather than transfer-function form."
        )
    return _iir_effective_length(sos, radius, float(tolerance), int(max_computed_length))


def _iir_effective_length(sos: np.ndarray, radius: float, tolerance: float, cap: int) -> int:
    multiplicity = _pole_multiplicity(sos, radius)
    zi = np.zeros((sos.shape[0], 2))
    starts: list[int] = []
    states: list[np.ndarray] = []
    sums: list[float] = []
    end = 0
    chunk = _FIRST_CHUNK
    while True:
        x = np.zeros(chunk)
        if end == 0:
            x[0] = 1.0
        starts.append(end)
        states.append(zi)
        h, zi = signal.sosfilt(sos, x, zi=zi)
        sums.append(float(np.sum(np.abs(h))))
        end += chunk
        tail_est = 0.0 if not np.any(zi) else _tail_estimate(radius, h, end, multiplicity)
        threshold = tolerance / (ERROR_FACTOR * (sum(sums) + tail_est))
        if tail_est <= _NEGLIGIBLE * threshold or end >= cap:
            break
        chunk = min(2 * chunk, _MAX_CHUNK, cap - end)

    if tail_est > threshold:
        # Still above the threshold at the end of the computed response: extrapolate.
        return end + _extrapolate(radius, end, multiplicity, tail_est, threshold)

    # Tail sums at the chunk starts: T(start_i) = later chunks + estimated tail.
    tails = np.cumsum(np.asarray(sums[::-1]))[::-1] + tail_est
    above = np.nonzero(tails > threshold)[0]
    if above.size == 0:
        return 0
    # The last chunk whose start still has T > threshold holds the crossing: recompute it.
    i = int(above[-1])
    stop = starts[i + 1] if i + 1 < len(starts) else end
    x = np.zeros(stop - starts[i])
    if starts[i] == 0:
        x[0] = 1.0
    h, _ = signal.sosfilt(sos, x, zi=states[i])
    later = float(tails[i + 1]) if i + 1 < len(tails) else tail_est
    within = np.cumsum(np.abs(h)[::-1])[::-1] + later  # T(start_i + k)
    return int(starts[i] + np.count_nonzero(within > threshold))


def _extrapolate(
    radius: float, end: int, multiplicity: int, tail_est: float, threshold: float
) -> int:
    """Samples ``j`` beyond ``end`` until ``tail_est r^j ((end + j) / end)^(m-1) <= threshold``."""
    if math.isinf(tail_est):
        raise DesignError(
            f"cannot bound the impulse response tail of a filter with pole radius {radius:.15g} "
            f"after {end} samples; raise the cutoff or the tolerance."
        )
    log_r = math.log(radius)
    target = math.log(threshold / tail_est)
    j = max(0, math.ceil(target / log_r))
    while j * log_r + (multiplicity - 1) * math.log((end + j) / end) > target:
        j = max(j + 1, int(j * 1.05))
    return j
