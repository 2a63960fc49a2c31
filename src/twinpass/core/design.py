"""Filter design from the OVERALL (two-pass, |H|^2) response.

A designed filter is run forward then backward over the signal, so the overall response
is ``|H(f)|^2``: its phase is zero and its gain in dB is twice the per-pass gain in dB.
Everything the user specifies (band edges, ripple, attenuation, -3 dB cutoffs, notch
width) refers to that overall response; this module translates it into a per-pass design,
verifies the two-pass result and reports what was achieved.

Conventions: frequencies in Hz, levels in dB (negative = attenuation), lengths in samples.
IIR filters are second-order sections of shape (n_sections, 6) (``scipy.signal`` layout);
FIR filters are taps of shape (M,). The IIR "order" follows ``scipy.signal``: it is the
order of the low-pass prototype, so band-pass and band-stop filters have ``2 * order``
poles per pass and ``order`` sections.

Cost model (used by ``family="auto"``), in multiply-adds per output sample, both passes:

* IIR: 5 multiply-adds per second-order section per pass, ``10 * n_sections``;
* FIR: the two passes equal one convolution with the length ``L = 2M - 1``
  autocorrelation of the taps; direct form costs ``L``; FFT (overlap-add with an FFT of
  ``N = next power of two >= 2L``, about half of it new output per block) costs about
  ``4 * log2(N)``; the cheaper of the two is used.

``auto`` designs every IIR family and takes the cheapest (ties: the smaller largest pole
radius, which means a shorter halo); FIR replaces it only when it costs less than half as
much, since block halos, start-up and memory traffic are not part of the model.
"""

from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
from scipy import optimize, signal

from twinpass.core.effective import (
    dominant_pole_radius,
    ROUNDING_SAFETY,
    analytic_rounding_estimate,
    effective_length,
    measured_rounding,
    pole_near_edge,
    rounding_dominant_pole,
    rounding_estimate,
    zeros_and_poles,
)
from twinpass.core.types import FAMILIES, KINDS, Design, ResponseSpec
from twinpass.errors import DesignError, SpecError

__all__ = [
    "validate_spec",
    "validate_spec_without_rate",
    "design_filter",
    "design_for_rates",
    "response_report",
    "format_report",
    "overall_response",
    "overall_level_grid",
    "per_pass_response",
    "cost_per_sample",
    "check_sos",
    "HALF_POWER_DB",
    "FIR_PREFERENCE",
    "HALF_AMPLITUDE_DB",
    "REPORT_FLOOR_DB",
    "ROUNDING_LIMIT",
]

HALF_POWER_DB: float = 10.0 * math.log10(0.5)
"""-3.0103 dB: the overall level a cutoff marks with ``cutoff_means="overall-3db"``."""
HALF_AMPLITUDE_DB: float = 20.0 * math.log10(0.5)
"""-6.0206 dB: overall level of a Butterworth run twice at its per-pass cutoff."""
REPORT_FLOOR_DB: float = -300.0
"""Lowest gain (dB) :func:`format_report` prints as a number; lower ones read ``< -300``.

-300 dB is an amplitude ratio of 1e-15, about 4.5 float64 steps of a unit value (2**-52,
2.2e-16): filtering in float64 resolves no such level, so a lower figure (an exact zero,
such as a notch's centre, computes to about -379 dB overall) is an artefact of rounding.
:func:`response_report` keeps the number computed."""

IIR_FAMILIES: tuple[str, ...] = ("butterworth", "chebyshev1", "chebyshev2", "elliptic")
CUTOFF_MEANINGS: tuple[str, ...] = ("overall-3db", "per-pass")
POLE_RADIUS_LIMIT: float = 1.0 - 1e-9
"""Designs with a pole radius above this are rejected as badly conditioned."""
ROUNDING_LIMIT: float = 1e-6
"""Designs whose cascade's measured rounding estimate (``ROUNDING_SAFETY`` times
:func:`~twinpass.core.effective.measured_rounding`, of full scale) exceeds this are refused:
with the estimate's tenfold headroom their rounding reaches 1e-7 of full scale on ordinary
input, the resolution of a 24-bit recording (2**-23 = 1.2e-7) and twice a float32 output's
(2**-24 = 6e-8), so the filter would add noise above the recording's own; and it grows by
orders of magnitude with a few more orders (Chebyshev I low-pass, 100 Hz at 1 kHz: 2.3e-8 at
order 32, 2.3e-6 at 40, 1.9e-4 at 48)."""
SPEC_SLACK_DB: float = 1e-6
"""Rounding slack (dB) allowed when checking a design against the overall spec."""
CUTOFF_SLACK_DB: float = 1e-3
"""Largest accepted distance (dB) of the overall gain from -3.0103 dB at a corrected cutoff."""
EQUIRIPPLE_STOPBAND: tuple[str, ...] = ("chebyshev2", "elliptic")
"""Families whose stopband ripples at exactly the designed attenuation."""
ROUNDING_MISS_DB: float = 0.01
"""A tolerance design of an ``EQUIRIPPLE_STOPBAND`` family that misses the overall
attenuation by at most this (dB) misses by coefficient rounding: its stopband peaks sit at
exactly the designed attenuation, and a higher order cannot lift them."""
STOPBAND_MARGIN_DB: float = 0.01
"""Per-pass attenuation (dB) added to such a design after a miss of at most
``ROUNDING_MISS_DB`` (0.02 dB overall, twice the largest miss it answers)."""
FIR_PREFERENCE: float = 0.5
"""``auto`` takes FIR only if its cost is below this fraction of the best IIR cost."""

_FTYPE = {"butterworth": "butter", "chebyshev1": "cheby1", "chebyshev2": "cheby2", "elliptic": "ellip"}
_ORDFUNC = {
    "butterworth": signal.buttord,
    "chebyshev1": signal.cheb1ord,
    "chebyshev2": signal.cheb2ord,
    "elliptic": signal.ellipord,
}
_N_EDGES = {"lowpass": 1, "highpass": 1, "bandpass": 2, "bandstop": 2}
_PER_PASS_HALF_POWER = 2.0**-0.25
"""Per-pass amplitude whose square (two passes) is 1/sqrt(2), i.e. -3.0103 dB overall."""
_GRID_LINEAR = 2**16
_GRID_LOG = 2**12
_FIR_GRID_PER_RIPPLE = 16
"""An FIR of M taps is sampled at least this many times per ``fs / M`` Hz (its ripple spacing)."""
_GRID_STEPS_PER_DISTANCE = 16
"""Near a pole or zero the grid step is at most 1/16 of the distance to it on the unit circle."""
_SECTIONS_AT_ONCE = 2**9
"""Up to this many (frequency, section) pairs are evaluated in one 2-D array, more section by section."""
_ZOOM_POINTS = 17
"""Points per bracket and round of the local re-evaluation of an extremum."""
_ZOOM_ROUNDS = 4
"""Rounds of local re-evaluation; each narrows a bracket ``(_ZOOM_POINTS - 1) / 2`` = 8 times."""
_REFINE_MAX = 64
"""Most extrema refined per band and direction (the largest on the grid first)."""
_PASS_REFINE_FRACTION = 0.1
"""Passband extrema within this fraction of the band's peak-to-trough (on the grid) are refined."""
_STOP_REFINE_DB = 1.0
"""Stopband peaks within this many dB (overall) of the band's largest on the grid are refined."""


# ----------------------------------------------------------------------------- validation


def _fmt(value: Any) -> str:
    if isinstance(value, (tuple, list)):
        return "(" + ", ".join(_fmt(v) for v in value) + ")"
    if isinstance(value, (float, np.floating)):
        return f"{float(value):g}"
    return repr(value)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


def _check_edges(name: str, edges: Any, kind: str, nyquist: float) -> tuple[float, ...]:
    """Count, range and order of a tuple of edges in Hz."""
    need = _N_EDGES[kind]
    if isinstance(edges, (int, float, np.integer, np.floating)) and not isinstance(edges, bool):
        edges = (edges,)
    try:
        values = tuple(float(e) for e in edges)
    except (TypeError, ValueError):
        raise SpecError(f"{name}={edges!r} must be a list of frequencies in Hz.") from None
    if len(values) != need:
        raise SpecError(
            f"{name}={_fmt(values)} has {len(values)} edge(s); a {kind} filter needs {need} "
            f"({'one frequency' if need == 1 else 'a lower and an upper frequency'}, Hz)."
        )
    for v in values:
        if not math.isfinite(v) or v <= 0.0:
            raise SpecError(f"{name}={_fmt(values)}: edge {v:g} Hz must be above 0 Hz.")
        if v >= nyquist:
            raise SpecError(
                f"{name}={_fmt(values)}: edge {v:g} Hz is not below the Nyquist frequency "
                f"{nyquist:g} Hz (half the sample rate), as every edge must be."
            )
    if need == 2 and not values[0] < values[1]:
        raise SpecError(
            f"{name}={_fmt(values)}: band edges must be in increasing order (lower, upper)."
        )
    return values


def _check_band_layout(kind: str, p: tuple[float, ...], s: tuple[float, ...]) -> None:
    """Stopband edges must lie on the correct side of the passband edges."""
    if kind == "lowpass" and not s[0] > p[0]:
        raise SpecError(
            f"stopband_hz={_fmt(s)} must lie above passband_hz={_fmt(p)} for a lowpass filter."
        )
    if kind == "highpass" and not s[0] < p[0]:
        raise SpecError(
            f"stopband_hz={_fmt(s)} must lie below passband_hz={_fmt(p)} for a highpass filter."
        )
    if kind == "bandpass" and not (s[0] < p[0] and p[1] < s[1]):
        raise SpecError(
            f"stopband_hz={_fmt(s)} must enclose passband_hz={_fmt(p)} for a bandpass filter "
            "(lower stop < lower pass < upper pass < upper stop)."
        )
    if kind == "bandstop" and not (p[0] < s[0] and s[1] < p[1]):
        raise SpecError(
            f"passband_hz={_fmt(p)} must enclose stopband_hz={_fmt(s)} for a bandstop filter "
            "(lower pass < lower stop < upper stop < upper pass)."
        )


def _check_positive(name: str, value: Any) -> float:
    if not _is_number(value) or not math.isfinite(float(value)) or float(value) <= 0.0:
        raise SpecError(f"{name}={value!r} must be a positive number (dB).")
    return float(value)


def _check_sample_rate(sample_rate_hz: float | None) -> float:
    if sample_rate_hz is None:
        raise SpecError(
            "no sample rate: the filter cannot be designed without the recording's sample rate "
            "in Hz; pass sample_rate_hz or set it for the input."
        )
    if not _is_number(sample_rate_hz) or not math.isfinite(float(sample_rate_hz)) or sample_rate_hz <= 0:
        raise SpecError(f"sample_rate_hz={sample_rate_hz!r} must be a positive number of Hz.")
    return float(sample_rate_hz)


def validate_spec(spec: ResponseSpec, sample_rate_hz: float | None) -> None:
    """Check that ``spec`` can be designed at ``sample_rate_hz``.

    Parameters
    ----------
    spec : ResponseSpec
        The requested overall (two-pass) response.
    sample_rate_hz : float or None
        Sample rate in Hz; ``None`` (unknown) is an error.

    Raises
    ------
    SpecError
        With a message naming the offending field and value and what to change: missing
        sample rate; unknown kind/family/cutoff meaning; edges <= 0 Hz, at or above
        Nyquist, out of order or of the wrong count; stopband on the wrong side of the
        passband; attenuation not above ripple; both or neither of a tolerance spec
        (``passband_hz``/``stopband_hz``) and a fixed order (``order``/``cutoff_hz``);
        notch without ``notch_hz`` or without exactly one of width and Q; an order above
        ``max_order``.
    """
    _validate(spec, _check_sample_rate(sample_rate_hz) / 2.0)


def validate_spec_without_rate(spec: ResponseSpec) -> None:
    """Check what :func:`validate_spec` checks that holds at every sample rate.

    The checks against the Nyquist frequency wait for a rate; no message names one.

    Raises
    ------
    SpecError
        As :func:`validate_spec`, but never for an edge at or above Nyquist.
    """
    _validate(spec, math.inf)


def _validate(spec: ResponseSpec, nyq: float) -> None:
    """:func:`validate_spec` at Nyquist frequency ``nyq`` (Hz; infinite: not known yet)."""
    if spec.kind not in KINDS:
        raise SpecError(f"kind={spec.kind!r} is not known; use one of {', '.join(KINDS)}.")
    if spec.family not in FAMILIES:
        raise SpecError(f"family={spec.family!r} is not known; use one of {', '.join(FAMILIES)}.")
    if spec.cutoff_means not in CUTOFF_MEANINGS:
        raise SpecError(
            f"cutoff_means={spec.cutoff_means!r} is not known; use 'overall-3db' (the two-pass "
            "response is -3 dB at the cutoff) or 'per-pass' (the single-pass design cutoff)."
        )
    if not isinstance(spec.max_order, (int, np.integer)) or spec.max_order < 1:
        raise SpecError(f"max_order={spec.max_order!r} must be a positive integer.")
    if not isinstance(spec.max_taps, (int, np.integer)) or spec.max_taps < 3:
        raise SpecError(f"max_taps={spec.max_taps!r} must be an integer of at least 3.")

    if spec.kind == "notch":
        _validate_notch(spec, nyq)
        return

    tolerance_given = [n for n in ("passband_hz", "stopband_hz") if getattr(spec, n) is not None]
    fixed_given = [n for n in ("order", "cutoff_hz") if getattr(spec, n) is not None]
    if tolerance_given and fixed_given:
        raise SpecError(
            f"both a tolerance spec ({', '.join(tolerance_given)}) and a fixed order "
            f"({', '.join(fixed_given)}) are given; keep passband_hz/stopband_hz with ripple and "
            "attenuation (minimum order), or order with cutoff_hz, not both."
        )
    if not tolerance_given and not fixed_given:
        raise SpecError(
            f"the {spec.kind} filter has neither a tolerance spec (passband_hz, stopband_hz, "
            "passband_ripple_db, stopband_attenuation_db) nor a fixed order (order, cutoff_hz); "
            "give one of them."
        )
    if tolerance_given:
        _validate_tolerance(spec, nyq)
    else:
        _validate_fixed(spec, nyq)


def _validate_tolerance(spec: ResponseSpec, nyq: float) -> None:
    missing = [
        n
        for n in ("passband_hz", "stopband_hz", "passband_ripple_db", "stopband_attenuation_db")
        if getattr(spec, n) is None
    ]
    if missing:
        raise SpecError(
            f"the tolerance spec of the {spec.kind} filter lacks {', '.join(missing)}; give the "
            "passband and stopband edges (Hz) with the overall ripple and attenuation (dB)."
        )
    p = _check_edges("passband_hz", spec.passband_hz, spec.kind, nyq)
    s = _check_edges("stopband_hz", spec.stopband_hz, spec.kind, nyq)
    _check_band_layout(spec.kind, p, s)
    rp = _check_positive("passband_ripple_db", spec.passband_ripple_db)
    rs = _check_positive("stopband_attenuation_db", spec.stopband_attenuation_db)
    if not rs > rp:
        raise SpecError(
            f"stopband_attenuation_db={rs:g} must be larger than passband_ripple_db={rp:g}."
        )


def _validate_fixed(spec: ResponseSpec, nyq: float) -> None:
    if spec.order is None or spec.cutoff_hz is None:
        lacking = "order" if spec.order is None else "cutoff_hz"
        raise SpecError(
            f"a fixed-order {spec.kind} filter needs both order (per pass) and cutoff_hz; "
            f"{lacking} is missing."
        )
    if not isinstance(spec.order, (int, np.integer)) or isinstance(spec.order, bool) or spec.order < 1:
        raise SpecError(f"order={spec.order!r} must be a positive integer (per pass).")
    _check_edges("cutoff_hz", spec.cutoff_hz, spec.kind, nyq)
    family = _fixed_family(spec)
    if family == "fir":
        if spec.order + 1 > spec.max_taps:
            raise SpecError(
                f"order={spec.order} means {spec.order + 1} FIR taps, above max_taps="
                f"{spec.max_taps}; lower the order or raise max_taps."
            )
        if spec.kind in ("highpass", "bandstop") and spec.order % 2 == 1:
            raise SpecError(
                f"order={spec.order}: a {spec.kind} FIR filter needs an even order (odd number "
                f"of taps); use order={spec.order + 1}."
            )
        return
    if spec.order > spec.max_order:
        raise SpecError(
            f"order={spec.order} per pass is above max_order={spec.max_order}; lower the order, "
            "raise max_order, or use family 'fir'."
        )
    rp = rs = None
    if family in ("chebyshev1", "elliptic"):
        if spec.passband_ripple_db is None:
            raise SpecError(
                f"a fixed-order {family} filter needs passband_ripple_db (overall dB)."
            )
        rp = _check_positive("passband_ripple_db", spec.passband_ripple_db)
    if family in ("chebyshev2", "elliptic"):
        if spec.stopband_attenuation_db is None:
            raise SpecError(
                f"a fixed-order {family} filter needs stopband_attenuation_db (overall dB)."
            )
        rs = _check_positive("stopband_attenuation_db", spec.stopband_attenuation_db)
    if rp is not None and rs is not None and not rs > rp:
        raise SpecError(
            f"stopband_attenuation_db={rs:g} must be larger than passband_ripple_db={rp:g}."
        )
    if spec.cutoff_means == "overall-3db":
        if rp is not None and not rp < -HALF_POWER_DB:
            raise SpecError(
                f"passband_ripple_db={rp:g} reaches the -3.0103 dB level that "
                "cutoff_means='overall-3db' places at the cutoff; use a smaller ripple or "
                "cutoff_means='per-pass'."
            )
        if rs is not None and not rs > -HALF_POWER_DB:
            raise SpecError(
                f"stopband_attenuation_db={rs:g} does not reach the -3.0103 dB level that "
                "cutoff_means='overall-3db' places at the cutoff; use a larger attenuation."
            )


def _validate_notch(spec: ResponseSpec, nyq: float) -> None:
    if spec.notch_hz is None:
        raise SpecError(
            "a notch filter needs notch_hz, the frequency to remove (Hz), e.g. the mains "
            "frequency."
        )
    f0 = float(spec.notch_hz)
    if not math.isfinite(f0) or not 0.0 < f0 < nyq:
        upper = f"the Nyquist frequency {nyq:g} Hz" if math.isfinite(nyq) else "the Nyquist frequency"
        raise SpecError(f"notch_hz={_fmt(spec.notch_hz)} must lie between 0 Hz and {upper}.")
    if (spec.notch_width_hz is None) == (spec.notch_q is None):
        raise SpecError(
            "a notch filter needs exactly one of notch_width_hz (overall -3 dB width, Hz) and "
            f"notch_q (notch_hz / width); got notch_width_hz={spec.notch_width_hz!r}, "
            f"notch_q={spec.notch_q!r}."
        )
    if spec.notch_q is not None:
        q = spec.notch_q
        if not _is_number(q) or not math.isfinite(float(q)) or float(q) <= 0:
            raise SpecError(f"notch_q={q!r} must be a positive number.")
        width = f0 / float(q)
        name = f"notch_q={float(q):g} (width {width:g} Hz)"
    else:
        w = spec.notch_width_hz
        if not _is_number(w) or not math.isfinite(float(w)) or float(w) <= 0:
            raise SpecError(f"notch_width_hz={w!r} must be a positive number of Hz.")
        width = float(w)
        name = f"notch_width_hz={width:g}"
    limit = 2.0 * min(f0, nyq - f0)
    if not width < limit:
        room = f"between 0 Hz and Nyquist {nyq:g} Hz" if nyq - f0 < f0 else "above 0 Hz"
        raise SpecError(f"{name} does not fit around notch_hz={f0:g} {room}; use a width below {limit:g} Hz.")
    others = [
        n for n in ("passband_hz", "stopband_hz", "order", "cutoff_hz") if getattr(spec, n) is not None
    ]
    if others:
        raise SpecError(
            f"a notch filter is set by notch_hz and its width or Q only; remove {', '.join(others)} "
            "or use kind 'bandstop'."
        )
    if spec.family == "fir":
        raise SpecError(
            "family='fir' cannot make a notch: the notch is a second-order IIR section; use "
            "family 'auto', or kind 'bandstop' with a tolerance spec for an FIR band-stop."
        )


# ----------------------------------------------------------------------------- responses


def _per_pass(sos: np.ndarray | None, taps: np.ndarray | None, freqs: np.ndarray, fs: float) -> np.ndarray:
    if sos is not None:
        return _sos_response(sos, freqs, fs)
    assert taps is not None
    return _fir_response(taps, freqs, fs)


def _shifted_coefficients(b0: float, b1: float, b2: float, u0: float) -> tuple[float, float, float]:
    """Coefficients of ``b0 + b1 u + b2 u^2`` in powers of ``u - u0`` for ``u0 = +1`` or ``-1``.

    ``B(u) = B(u0) + B'(u0) (u - u0) + b2 (u - u0)^2`` with ``B(u0) = b0 + u0 b1 + b2`` and
    ``B'(u0) = b1 + 2 u0 b2``. Each is summed by ``math.fsum`` (correctly rounded; ``2 b2``
    and the sign changes are exact), so a section with roots near ``u0``, whose ``B(u0)`` is
    a small difference of nearly equal coefficients, keeps it to the last bit.
    """
    return math.fsum((b0, u0 * b1, b2)), math.fsum((b1, 2.0 * u0 * b2)), b2


@functools.lru_cache(maxsize=64)
def _shifted_sections(raw: bytes) -> tuple[np.ndarray, np.ndarray]:
    """Sections (float64 bytes of an (n, 6) array) expanded about u = 1 and about u = -1.

    Returns two arrays of shape (6, n): rows are the numerator's then the denominator's
    coefficients of ``(u - u0)^0``, ``^1``, ``^2`` (:func:`_shifted_coefficients`).
    Cached: the design loops evaluate one set of sections many times.
    """
    sos = np.frombuffer(raw, dtype=float).reshape(-1, 6)
    tables = []
    for u0 in (1.0, -1.0):
        rows = [
            _shifted_coefficients(*row[:3], u0) + _shifted_coefficients(*row[3:], u0)
            for row in sos.tolist()
        ]
        tables.append(np.array(rows, dtype=float).T.copy())
    return tables[0], tables[1]


def _sos_response(sos: np.ndarray, freqs: np.ndarray, fs: float) -> np.ndarray:
    """Response of second-order sections at frequencies ``freqs`` (Hz, 1-D).

    The product over sections of ``(b0 + b1 u + b2 u^2) / (a0 + a1 u + a2 u^2)`` at
    ``u = z^-1 = exp(-2j pi f / fs)``, what ``scipy.signal.sosfreqz`` computes, evaluated so
    that it stays accurate near 0 Hz and Nyquist. There the plain polynomial cancels: a
    section with roots near ``z = 1`` (a cutoff far below the sample rate) has coefficients
    summing to nearly zero, and summing them at ``u`` close to 1 loses the digits that make
    the response (float64 put a 0.05 Hz high-pass at 10 kHz 3e-6 dB off). Instead each
    quadratic is expanded about ``u0 = 1`` for ``f < fs / 4`` and about ``u0 = -1`` above
    (:func:`_shifted_coefficients`, correctly rounded sums of the coefficients) and
    evaluated in ``d = u - u0``, which is computed without cancellation from ``x = f / fs``
    (or ``y = 1/2 - f / fs`` near Nyquist, with ``fs / 2 - f`` exact there):
    ``u - 1 = -2j sin(pi x) exp(-j pi x)`` and ``u + 1 = -2j sin(pi y) exp(j pi y)``.
    Each section is then correct to a few units of float64 rounding relative to its value
    (the polynomial's own conditioning at ``u`` apart) down to ``f / fs`` of 1e-7 and below.
    """
    f = np.asarray(freqs, dtype=float)
    fs = float(fs)
    about_plus, about_minus = _shifted_sections(np.ascontiguousarray(sos, dtype=float).tobytes())
    h = np.empty(f.shape, dtype=complex)
    low = f < fs / 4.0
    for where, table, sign in ((low, about_plus, -1.0), (~low, about_minus, 1.0)):
        if not np.any(where):
            continue
        fw = f[where]
        x = fw / fs if sign < 0 else (fs / 2.0 - fw) / fs
        s, c = np.sin(math.pi * x), np.cos(math.pi * x)
        d = sign * 2.0 * s * s - 2j * s * c  # -2j sin(pi x) exp(-+j pi x)
        if d.size * table.shape[1] <= _SECTIONS_AT_ONCE:  # few points: one 2-D pass
            dd = d[:, None]
            num = table[0] + dd * (table[1] + dd * table[2])
            h[where] = np.prod(num / (table[3] + dd * (table[4] + dd * table[5])), axis=1)
            continue
        hw = np.ones(d.shape, dtype=complex)
        for k0, k1, k2, m0, m1, m2 in table.T.tolist():
            hw *= (k0 + d * (k1 + d * k2)) / (m0 + d * (m1 + d * m2))
        h[where] = hw
    return h


def _fir_response(taps: np.ndarray, freqs: np.ndarray, fs: float) -> np.ndarray:
    """Response ``sum_n taps[n] exp(-2j pi f n / fs)`` of FIR taps at frequencies ``freqs`` (Hz, 1-D).

    The tap index is split as ``n = a B + b`` with blocks of ``B ~ sqrt(M)`` of the M taps, so
    the sum is ``sum_a exp(-j w a B) (E @ taps[aB:aB + B])`` with ``E[:, b] = exp(-j w b)``:
    M multiply-adds per frequency in one matrix product and about ``2 sqrt(M)`` complex
    exponentials, where Horner's rule (``scipy.signal.freqz`` at given frequencies) makes
    M passes over the frequencies. Each exponent is computed directly, not by repeated
    multiplication; the products are real (cosine and sine apart), which multi-threaded BLAS
    runs far faster than a complex-by-real one for few frequencies.
    """
    taps = np.asarray(taps, dtype=float)
    w = 2.0 * math.pi * np.asarray(freqs, dtype=float) / fs
    block = max(1, math.isqrt(taps.size))
    n_blocks = -(-taps.size // block)
    table = np.zeros(n_blocks * block)
    table[: taps.size] = taps
    table = table.reshape(n_blocks, block).T  # table[b, a] = taps[a * block + b]
    inner_n = np.arange(block, dtype=float)
    outer_n = np.arange(n_blocks, dtype=float) * block
    out = np.empty(w.shape, dtype=complex)
    chunk = max(1, 2**20 // max(block, n_blocks))
    for start in range(0, w.size, chunk):
        wc = w[start : start + chunk, None]
        phase = wc * inner_n
        partial = np.cos(phase) @ table - 1j * (np.sin(phase) @ table)  # real products
        out[start : start + chunk] = np.sum(partial * np.exp(-1j * wc * outer_n), axis=1)
    return out


def per_pass_response(design: Design, freqs_hz: Any) -> np.ndarray:
    """Complex frequency response of ONE pass of the designed filter.

    Parameters
    ----------
    design : Design
    freqs_hz : array_like
        Frequencies in Hz (0 to Nyquist).

    Returns
    -------
    ndarray of complex, same shape as ``freqs_hz``
    """
    f = np.asarray(freqs_hz, dtype=float)
    h = _per_pass(design.sos, design.taps, f.ravel(), design.sample_rate_hz)
    return h.reshape(f.shape)


def overall_response(design: Design, freqs_hz: Any) -> np.ndarray:
    """Overall (forward + backward) magnitude response ``|H(f)|^2``, linear.

    Takes the arguments of :func:`per_pass_response` (``freqs_hz`` in Hz) and returns a
    float array of the same shape: the overall response is real and non-negative (zero
    phase).
    """
    return np.abs(per_pass_response(design, freqs_hz)) ** 2


def overall_level_grid(design: Design) -> tuple[np.ndarray, np.ndarray]:
    """The overall level on the grid that verifies the design: (frequencies in Hz, level in dB).

    The grid (increasing, 0 Hz to Nyquist) follows the design as its verification does:
    linear and logarithmic over the band, crowding around every pole and zero (IIR), or at
    least 16 points per ripple spacing (FIR), so narrow notches and bands are resolved. The
    level is ``20 log10 |H(f)|^2`` of the two passes (``-inf`` at a zero of the response).
    """
    f, h = _grid_response(design.sos, design.taps, design.sample_rate_hz)
    return f, 2.0 * _db_amplitude(h)


def _db_amplitude(h: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(h))


def _pole_zero_grid(sos: np.ndarray, fs: float) -> np.ndarray:
    """Frequencies (Hz) crowding around every pole and zero of ``sos``.

    Around a pole or zero at angle ``theta`` (rad) and distance ``d = |1 - r|`` from the unit
    circle (at least ``1 - POLE_RADIUS_LIMIT`` = 1e-9) the points are
    ``theta + d sinh(k / _GRID_STEPS_PER_DISTANCE)``, so the step at ``theta + x`` is about
    ``sqrt(d^2 + x^2) / 16``: 1/16 of the distance to the pole or zero. They stop where that
    step reaches the linear grid's (Nyquist / 2**16), so a design whose poles lie within
    ``1 - r`` of the unit circle is sampled at least 16 times across its narrowest
    resonance (about ``(1 - r) fs / pi`` Hz wide), at a cost logarithmic in ``1 / (1 - r)``.
    """
    zeros, poles = zeros_and_poles(sos)
    points = np.concatenate([np.asarray(poles, dtype=complex), np.asarray(zeros, dtype=complex)])
    theta = np.abs(np.angle(points))
    distance = np.maximum(np.abs(1.0 - np.abs(points)), 1.0 - POLE_RADIUS_LIMIT)
    base = math.pi / _GRID_LINEAR
    step = 1.0 / _GRID_STEPS_PER_DISTANCE
    pieces = [np.empty(0)]
    for th, d in np.unique(np.stack([theta, distance], axis=1), axis=0):
        u_max = math.asinh(base / (step * d))
        u = np.arange(-math.ceil(u_max / step), math.ceil(u_max / step) + 1) * step
        pieces.append(th + d * np.sinh(u))
    w = np.concatenate(pieces)
    return w[(w >= 0.0) & (w <= math.pi)] * fs / (2.0 * math.pi)


def _grid_response(
    sos: np.ndarray | None, taps: np.ndarray | None, fs: float, extra: Iterable[float] = ()
) -> tuple[np.ndarray, np.ndarray]:
    """Per-pass response on a grid that follows the design: (frequencies in Hz, complex response).

    The grid holds the frequencies ``extra`` exactly and its spacing follows the narrowest
    feature of the design:

    * FIR of M taps: one real FFT of length ``N``, the next power of two >= ``16 M`` (at
      least ``2**17``), i.e. a linear grid over 0..Nyquist with at least 16 points per
      ripple spacing ``fs / M`` Hz;
    * IIR: a linear grid over 0..Nyquist (``2**16 + 1`` points), a logarithmic one towards
      0 Hz (``2**12`` points down to 1e-7 of Nyquist) and points crowding around every pole
      and zero (see ``_pole_zero_grid``), with steps below 1/16 of the distance to them.

    Extremes between grid points are found by ``_extreme``.
    """
    nyq = fs / 2.0
    extra_hz = np.asarray(list(extra), dtype=float)
    if taps is not None:
        n_fft = max(2 * _GRID_LINEAR, 1 << int(math.ceil(math.log2(_FIR_GRID_PER_RIPPLE * taps.size))))
        f_lin = np.linspace(0.0, nyq, n_fft // 2 + 1)
        f = np.concatenate([f_lin, extra_hz])
        h = np.concatenate([np.fft.rfft(taps, n=n_fft), _per_pass(None, taps, extra_hz, fs)])
    else:
        assert sos is not None
        f = np.concatenate(
            [
                np.linspace(0.0, nyq, _GRID_LINEAR + 1),
                np.geomspace(nyq * 1e-7, nyq, _GRID_LOG),
                _pole_zero_grid(sos, fs),
                extra_hz,
            ]
        )
        h = _per_pass(sos, None, f, fs)
    f, index = np.unique(f, return_index=True)
    return f, h[index]


def _refine_peaks(
    evaluate: Callable[[np.ndarray], np.ndarray], lo: np.ndarray, hi: np.ndarray, start: np.ndarray
) -> np.ndarray:
    """Largest value of ``evaluate`` in each bracket ``[lo[k], hi[k]]`` (Hz).

    Dense local re-evaluation: each round samples every bracket at ``_ZOOM_POINTS``
    equally spaced frequencies (one vectorised call of ``evaluate``) and narrows it to the
    two steps around its best sample; ``_ZOOM_ROUNDS`` rounds narrow a bracket 8**4 = 4096
    times. A bracket holding a single smooth maximum converges on it; the result is never
    below ``start`` (the grid values) nor below any value sampled.
    """
    best = np.asarray(start, dtype=float).copy()
    t = np.linspace(0.0, 1.0, _ZOOM_POINTS)
    rows = np.arange(best.size)
    for _ in range(_ZOOM_ROUNDS):
        width = hi - lo
        f = lo[:, None] + width[:, None] * t
        v = np.asarray(evaluate(f.ravel()), dtype=float).reshape(f.shape)
        v = np.where(np.isnan(v), -np.inf, v)
        j = np.argmax(v, axis=1)
        best = np.maximum(best, v[rows, j])
        centre = f[rows, j]
        step = width / (_ZOOM_POINTS - 1)
        lo, hi = np.maximum(centre - step, lo), np.minimum(centre + step, hi)
    return best


def _extreme(
    evaluate: Callable[[np.ndarray], np.ndarray], f: np.ndarray, values: np.ndarray, sign: float, margin: float
) -> float:
    """Largest (``sign=1``) or smallest (``sign=-1``) value of ``evaluate`` over ``[f[0], f[-1]]``.

    Parameters
    ----------
    evaluate : callable
        Frequencies (Hz, 1-D array) -> values (e.g. overall gain in dB).
    f : ndarray
        Increasing grid (Hz) covering one band, its edges included.
    values : ndarray
        ``evaluate(f)``.
    sign : float
        1 for the maximum, -1 for the minimum.
    margin : float
        Grid extrema within ``margin`` of the grid's best are refined (at most
        ``_REFINE_MAX``, best first) by ``_refine_peaks`` between their grid neighbours.
    """
    v = sign * values
    top = float(np.max(v))
    if not math.isfinite(top):
        return sign * top
    rising = np.concatenate([[True], v[1:] >= v[:-1]])
    falling = np.concatenate([v[:-1] >= v[1:], [True]])
    peaks = np.nonzero(rising & falling & (v >= top - margin))[0]
    peaks = peaks[np.argsort(-v[peaks], kind="stable")[:_REFINE_MAX]]
    lo = f[np.maximum(peaks - 1, 0)]
    hi = f[np.minimum(peaks + 1, f.size - 1)]
    best = _refine_peaks(lambda x: sign * evaluate(x), lo, hi, v[peaks])
    return sign * float(np.max(best))


def _crossings(
    sos: np.ndarray | None,
    taps: np.ndarray | None,
    fs: float,
    level_db: float,
    grid: np.ndarray,
    per_pass_db: np.ndarray,
) -> list[float]:
    """Frequencies (Hz) where the overall gain crosses ``level_db``, refined by ``brentq``.

    ``per_pass_db`` is the per-pass gain (dB) already evaluated on ``grid`` (Hz). A grid
    point lying on the level (a cutoff placed there) may change sign between the grid's
    evaluation and a single one by rounding; when the single evaluations of a bracket's ends
    then agree in sign, the end nearer the level is the crossing.
    """
    g = 2.0 * per_pass_db - level_db
    g = np.where(np.isfinite(g), g, -1e3)

    def fun(x: float) -> float:
        v = 2.0 * float(_db_amplitude(_per_pass(sos, taps, np.array([x]), fs))[0]) - level_db
        return v if math.isfinite(v) else -1e3

    out = [float(grid[i]) for i in np.nonzero(g == 0.0)[0]]
    for i in np.nonzero((g[:-1] * g[1:]) < 0.0)[0]:
        a, b = float(grid[i]), float(grid[i + 1])
        fa, fb = fun(a), fun(b)
        if fa * fb > 0.0:
            out.append(a if abs(fa) <= abs(fb) else b)
        else:
            out.append(float(optimize.brentq(fun, a, b, xtol=1e-12, rtol=1e-14)))
    return sorted(out)


def _bands(spec: ResponseSpec, nyq: float) -> tuple[list[tuple[float, float]], list[tuple[float, float]]]:
    """Passband and stopband intervals (Hz) of a tolerance spec."""
    p = tuple(float(x) for x in spec.passband_hz or ())
    s = tuple(float(x) for x in spec.stopband_hz or ())
    if spec.kind == "lowpass":
        return [(0.0, p[0])], [(s[0], nyq)]
    if spec.kind == "highpass":
        return [(p[0], nyq)], [(0.0, s[0])]
    if spec.kind == "bandpass":
        return [(p[0], p[1])], [(0.0, s[0]), (s[1], nyq)]
    return [(0.0, p[0]), (p[1], nyq)], [(s[0], s[1])]


def _measure(
    sos: np.ndarray | None, taps: np.ndarray | None, spec: ResponseSpec, fs: float
) -> tuple[float, float]:
    """Achieved overall passband ripple (peak-to-trough, dB) and stopband attenuation (dB).

    The overall gain is sampled on the design's grid (``_grid_response``, band edges
    included) and, in each band, the grid's largest and smallest passband values and its
    largest stopband values are refined between their grid neighbours (``_extreme``), so
    ripple peaks and stopband lobes narrower than the grid are measured at their tops.
    The ripple is infinite if the passband holds a zero of the response.
    """
    nyq = fs / 2.0
    passbands, stopbands = _bands(spec, nyq)
    edges = [e for band in passbands + stopbands for e in band]
    f, h = _grid_response(sos, taps, fs, edges)
    overall_db = 2.0 * _db_amplitude(h)

    def evaluate(x: np.ndarray) -> np.ndarray:
        return 2.0 * _db_amplitude(_per_pass(sos, taps, x, fs))

    def in_band(lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
        inside = (f >= lo) & (f <= hi)
        return f[inside], overall_db[inside]

    peak = max(_extreme(evaluate, *in_band(lo, hi), 1.0, _STOP_REFINE_DB) for lo, hi in stopbands)
    highs, lows = [], []
    for fb, db in (in_band(lo, hi) for lo, hi in passbands):
        if not np.all(np.isfinite(db)):
            return math.inf, -peak
        margin = _PASS_REFINE_FRACTION * float(np.max(db) - np.min(db))
        highs.append(_extreme(evaluate, fb, db, 1.0, margin))
        lows.append(_extreme(evaluate, fb, db, -1.0, margin))
    return max(highs) - min(lows), -peak


# ----------------------------------------------------------------------------- checks & cost


def check_sos(sos: np.ndarray) -> float:
    """Reject unstable or badly conditioned second-order sections.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)

    Returns
    -------
    float
        The largest pole radius.

    Raises
    ------
    DesignError
        Non-finite coefficients, a pole radius >= 1 (unstable) or above
        ``POLE_RADIUS_LIMIT`` = 1 - 1e-9 (badly conditioned), each with a remedy.
    """
    sos = np.asarray(sos, dtype=float)
    if not np.all(np.isfinite(sos)):
        raise DesignError(
            "the designed second-order sections contain NaN or infinity (the design is badly "
            "conditioned); lower the order, widen the transition band, or use family 'fir'."
        )
    with warnings.catch_warnings():
        # tiny numerators (very low cutoffs) only concern the zeros, not the pole radius
        warnings.simplefilter("ignore", signal.BadCoefficients)
        radius = dominant_pole_radius(sos)
    if radius >= 1.0:
        raise DesignError(
            f"the designed filter is unstable: largest pole radius {radius:.12g} >= 1; lower the "
            "order, widen the transition band or move the band edges away from 0 Hz and "
            "Nyquist, or use family 'fir'."
        )
    if radius > POLE_RADIUS_LIMIT:
        raise DesignError(
            f"the designed filter is badly conditioned: largest pole radius {radius:.15g} is "
            f"within {1.0 - radius:.3g} of 1 (limit 1e-9), so float64 rounding would dominate its "
            "output and its halo would be impractically long; the limit holds in every processing "
            "mode (carrying states does not lift it): raise the cutoff relative to the sample rate "
            "(decimate first), lower the order, widen the transition band, or use family 'fir'."
        )
    return radius


def cost_per_sample(*, sos: np.ndarray | None = None, taps: np.ndarray | None = None) -> float:
    """Estimated multiply-adds per output sample of forward + backward filtering.

    IIR: ``10 * n_sections`` (5 per section per pass). FIR of M taps: the cheaper of the
    direct convolution with the autocorrelation (``2M - 1``) and FFT overlap-add
    (``4 * log2(N)``, ``N`` the next power of two >= ``2 (2M - 1)``).
    """
    if (sos is None) == (taps is None):
        raise DesignError("give exactly one of 'sos' and 'taps' to cost_per_sample.")
    if sos is not None:
        return 10.0 * float(np.asarray(sos).shape[0])
    return _fir_cost(int(np.asarray(taps).size))


def _fir_cost(n_taps: int) -> float:
    length = 2 * n_taps - 1
    n_fft = 1 << int(math.ceil(math.log2(2 * length)))
    return float(min(length, 4.0 * math.log2(n_fft)))


# ----------------------------------------------------------------------------- IIR design


def _iir(family: str, order: int, wn: Any, kind: str, rp: float | None, rs: float | None, fs: float) -> np.ndarray:
    try:
        sos = signal.iirfilter(
            int(order), wn, rp=rp, rs=rs, btype=kind, ftype=_FTYPE[family], output="sos", fs=fs
        )
    except (ValueError, ZeroDivisionError, FloatingPointError) as exc:
        raise DesignError(
            f"scipy could not design the {family} {kind} of order {order} at {_fmt(wn)} Hz "
            f"({exc}); lower the order, widen the transition band or use family 'fir'."
        ) from exc
    return np.asarray(sos, dtype=float)


def _halved(spec: ResponseSpec) -> tuple[float | None, float | None]:
    """Per-pass ripple and attenuation (dB): half the overall figures (dB add over two passes)."""
    rp = None if spec.passband_ripple_db is None else float(spec.passband_ripple_db) / 2.0
    rs = None if spec.stopband_attenuation_db is None else float(spec.stopband_attenuation_db) / 2.0
    return rp, rs


def _edges_arg(values: Sequence[float]) -> float | list[float]:
    v = [float(x) for x in values]
    return v[0] if len(v) == 1 else v


def _meets(ripple: float, attenuation: float, spec: ResponseSpec) -> bool:
    return (
        ripple <= float(spec.passband_ripple_db) + SPEC_SLACK_DB
        and attenuation >= float(spec.stopband_attenuation_db) - SPEC_SLACK_DB
    )


def _iir_tolerance(spec: ResponseSpec, family: str, fs: float) -> tuple[np.ndarray, int]:
    """Minimum-order IIR meeting the overall tolerance spec: (sos, order per pass)."""
    rp, rs = _halved(spec)
    wp = _edges_arg(spec.passband_hz or ())
    ws = _edges_arg(spec.stopband_hz or ())
    try:
        order, wn = _ORDFUNC[family](wp, ws, rp, rs, fs=fs)
    except (ValueError, ZeroDivisionError) as exc:
        raise SpecError(
            f"the {family} order estimate failed for passband_hz={_fmt(spec.passband_hz)}, "
            f"stopband_hz={_fmt(spec.stopband_hz)} ({exc}); widen the transition band."
        ) from exc
    order = int(order)
    if order > spec.max_order:
        raise SpecError(
            f"a {family} {spec.kind} meeting {spec.passband_ripple_db:g} dB ripple and "
            f"{spec.stopband_attenuation_db:g} dB attenuation overall ({rp:g} / {rs:g} dB per pass) "
            f"needs order {order} per pass, above max_order={spec.max_order}; widen the transition "
            "band, relax ripple or attenuation, raise max_order, or use family 'elliptic' or 'fir'."
        )
    wn_arg = _edges_arg(np.atleast_1d(wn))
    last = (math.inf, -math.inf)
    raised, margin = False, 0.0
    while order <= spec.max_order:
        sos = _iir(family, order, wn_arg, spec.kind, rp, rs + margin, fs)
        check_sos(sos)
        last = _measure(sos, None, spec, fs)
        if _meets(*last, spec):
            return sos, order
        short = float(spec.stopband_attenuation_db) - last[1]
        if family in EQUIRIPPLE_STOPBAND and 0.0 < short <= ROUNDING_MISS_DB:
            if not raised:  # the same order again, its stopband a little deeper
                raised, margin = True, STOPBAND_MARGIN_DB
                continue
            raise DesignError(
                f"the {family} {spec.kind} misses the overall attenuation by {short:.3g} dB at order {order} "
                f"({last[1]:.9g} dB for {spec.stopband_attenuation_db:g}) even designed for "
                f"{STOPBAND_MARGIN_DB:g} dB more per pass: its stopband ripples at the designed attenuation, "
                "and rounding its coefficients to float64 lifts it at these band edges relative to the "
                "sample rate, which a higher order cannot help; lower the sample rate (decimate first) so "
                "the band edges lie further from 0 Hz and Nyquist, or use family 'chebyshev1' or "
                "'butterworth' (a stopband falling away from its edge) or 'fir'."
            )
        order += 1
    raise DesignError(
        f"the {family} {spec.kind} misses the overall spec at every order up to max_order="
        f"{spec.max_order} (last: ripple {last[0]:.9g} dB for {spec.passband_ripple_db:g}, "
        f"attenuation {last[1]:.9g} dB for {spec.stopband_attenuation_db:g}); order "
        f"{spec.max_order + 1} or more is needed: raise max_order, widen the transition band, "
        "or use family 'fir'."
    )


def _prototype_half_power(family: str, order: int, rp: float | None, rs: float | None) -> float:
    """Normalised analog prototype frequency where the two-pass gain is -3.0103 dB.

    The prototypes are those ``scipy.signal.iirfilter`` maps onto the requested edge
    frequencies (Butterworth: -3 dB at 1 rad/s; Chebyshev I and elliptic: passband edge at
    1; Chebyshev II: stopband edge at 1). For Butterworth the root is closed form,
    ``(sqrt(2) - 1)^(1 / (2N))``; otherwise it is the first crossing (from 0 rad/s) of the
    per-pass gain through 2^(-1/4), found with ``brentq``.
    """
    if family == "butterworth":
        return float((math.sqrt(2.0) - 1.0) ** (1.0 / (2.0 * order)))
    if family == "chebyshev1":
        z, p, k = signal.cheb1ap(order, rp)
    elif family == "chebyshev2":
        z, p, k = signal.cheb2ap(order, rs)
    else:
        z, p, k = signal.ellipap(order, rp, rs)

    def excess(w: Any) -> Any:
        _, h = signal.freqs_zpk(z, p, k, worN=np.atleast_1d(w))
        return np.abs(h) - _PER_PASS_HALF_POWER

    w = np.geomspace(1e-6, 1e6, 6001)
    below = np.nonzero(excess(w) < 0.0)[0]
    if below.size == 0 or below[0] == 0:
        raise DesignError(
            f"the {family} prototype of order {order} never crosses -3.0103 dB overall; adjust "
            "passband_ripple_db / stopband_attenuation_db or use cutoff_means='per-pass'."
        )
    i = int(below[0])
    return float(optimize.brentq(lambda x: float(excess(x)[0]), w[i - 1], w[i], xtol=1e-15, rtol=1e-15))


def _design_edges_for_overall_3db(kind: str, cutoffs: Sequence[float], p3: float, fs: float) -> list[float]:
    """Per-pass design edges (Hz) so the two-pass -3.0103 dB points land on ``cutoffs``.

    Works in prewarped frequencies ``W = tan(pi f / fs)`` (the bilinear transform maps the
    prototype exactly). Low-pass ``W_d = W_c / p3``; high-pass ``W_d = W_c * p3``; band-pass
    keeps the geometric centre and sets the width to ``(W_c2 - W_c1) / p3``; band-stop
    likewise with width ``(W_c2 - W_c1) * p3``. For a Butterworth low-pass this is
    ``tan(pi f_d / fs) = tan(pi f_c / fs) / C`` with ``C = (sqrt(2) - 1)^(1/(2N))``.
    """
    wc = [math.tan(math.pi * f / fs) for f in cutoffs]
    if kind == "lowpass":
        wd = [wc[0] / p3]
    elif kind == "highpass":
        wd = [wc[0] * p3]
    else:
        centre2 = wc[0] * wc[1]
        width = (wc[1] - wc[0]) / p3 if kind == "bandpass" else (wc[1] - wc[0]) * p3
        lower = -width / 2.0 + math.sqrt(width * width / 4.0 + centre2)
        wd = [lower, lower + width]
    return [fs / math.pi * math.atan(x) for x in wd]


def _check_cutoffs(sos: np.ndarray | None, taps: np.ndarray | None, cutoffs: Sequence[float], fs: float, family: str) -> None:
    """Require the overall gain at each cutoff (Hz) within ``CUTOFF_SLACK_DB`` of -3.0103 dB.

    The message prints the gain and the target to 1e-9 dB and the distance between them, so
    a miss just beyond the slack reads as one. An IIR design's edges are placed from the
    exact prototype (:func:`_design_edges_for_overall_3db`), so its miss is what rounding its
    coefficients to float64 did; that grows as the cutoff falls relative to the sample rate.
    """
    h = _per_pass(sos, taps, np.asarray(cutoffs, dtype=float), fs)
    overall_db = 2.0 * _db_amplitude(h)
    miss = np.abs(overall_db - HALF_POWER_DB)
    if not np.all(miss <= CUTOFF_SLACK_DB):
        worst = int(np.argmax(miss))
        if taps is not None:
            remedy = "use more taps (a higher order) or cutoff_means='per-pass'"
        else:
            remedy = (
                "its float64 coefficients cannot place it closer at this cutoff relative to the "
                "sample rate; raise the cutoff or lower the sample rate (decimate first), use "
                "cutoff_means='per-pass', or a different family"
            )
        raise DesignError(
            f"the {family} design puts the overall gain at {cutoffs[worst]:g} Hz at "
            f"{overall_db[worst]:.9f} dB instead of {HALF_POWER_DB:.9f} dB ({miss[worst]:.2g} dB "
            f"off, more than the {CUTOFF_SLACK_DB:g} dB allowed); {remedy}."
        )


def _iir_fixed(spec: ResponseSpec, family: str, fs: float) -> np.ndarray:
    rp, rs = _halved(spec)
    rp = rp if family in ("chebyshev1", "elliptic") else None
    rs = rs if family in ("chebyshev2", "elliptic") else None
    cutoffs = [float(c) for c in spec.cutoff_hz or ()]
    order = int(spec.order or 0)
    if spec.cutoff_means == "per-pass":
        sos = _iir(family, order, _edges_arg(cutoffs), spec.kind, rp, rs, fs)
        check_sos(sos)
        return sos
    p3 = _prototype_half_power(family, order, rp, rs)
    edges = _design_edges_for_overall_3db(spec.kind, cutoffs, p3, fs)
    sos = _iir(family, order, _edges_arg(edges), spec.kind, rp, rs, fs)
    check_sos(sos)
    _check_cutoffs(sos, None, cutoffs, fs, family)
    return sos


def _notch(spec: ResponseSpec, fs: float) -> np.ndarray:
    """Second-order notch whose OVERALL (two-pass) -3.0103 dB width is the requested one.

    The bilinear notch ``H = g (1 - 2 cos w0 z^-1 + z^-2) / (1 - 2 g cos w0 z^-1 + (2g - 1) z^-2)``
    with ``g = 1 / (1 + beta)`` has ``|H|^2 = X^2 / (X^2 + beta^2)`` for a frequency variable
    ``X`` in which the points ``|X| = beta`` are exactly ``2 atan(beta)`` rad apart (the width
    of ``scipy.signal.iirnotch``). Two passes are -3.0103 dB where the per-pass power is
    ``2^(-1/2)``, i.e. ``|X| = beta * sqrt(a / (1 - a))`` with ``a = 2^(-1/2)``; so the per-pass
    ``beta = tan(pi W / fs) * sqrt((1 - a) / a)`` (about 0.644 * tan(pi W / fs)) gives the
    overall width ``W`` exactly. ``notch_q`` means ``notch_hz / W``.
    """
    f0 = float(spec.notch_hz or 0.0)
    width = float(spec.notch_width_hz) if spec.notch_width_hz is not None else f0 / float(spec.notch_q or 1.0)
    a = 2.0**-0.5
    beta = math.tan(math.pi * width / fs) * math.sqrt((1.0 - a) / a)
    per_pass_width = fs / math.pi * math.atan(beta)
    b, den = signal.iirnotch(f0, f0 / per_pass_width, fs=fs)
    sos = np.asarray(signal.tf2sos(b, den), dtype=float)
    check_sos(sos)
    return sos


# ----------------------------------------------------------------------------- FIR design


def _kaiser_params(spec: ResponseSpec, fs: float) -> tuple[int, float, list[float]]:
    """Kaiser-window estimate for the halved per-pass figures: (n_taps, beta, cutoffs Hz).

    The window method gives equal deviations ``d`` in both bands; per pass the passband
    ripple ``20 log10((1 + d) / (1 - d))`` must be at most R/2 and ``20 log10(d)`` at most
    -A/2, so ``d`` is the smaller of the two limits.
    """
    rp, rs = _halved(spec)
    assert rp is not None and rs is not None
    r = 10.0 ** (rp / 20.0)
    d = min((r - 1.0) / (r + 1.0), 10.0 ** (-rs / 20.0))
    p = [float(x) for x in spec.passband_hz or ()]
    s = [float(x) for x in spec.stopband_hz or ()]
    transitions = [abs(a_ - b_) for a_, b_ in zip(p, s)]
    cutoffs = [(a_ + b_) / 2.0 for a_, b_ in zip(p, s)]
    n_taps, beta = signal.kaiserord(-20.0 * math.log10(d), min(transitions) / (fs / 2.0))
    n_taps = int(n_taps) | 1  # odd: type I linear phase works for every kind
    return n_taps, float(beta), cutoffs


def _firwin(n_taps: int, cutoffs: Sequence[float], kind: str, fs: float, window: Any = "hamming") -> np.ndarray:
    try:
        taps = signal.firwin(
            n_taps, _edges_arg(cutoffs), window=window, pass_zero=kind, fs=fs
        )
    except ValueError as exc:
        raise DesignError(
            f"scipy could not design the {n_taps}-tap FIR {kind} at {_fmt(tuple(cutoffs))} Hz "
            f"({exc}); adjust the number of taps or the cutoff."
        ) from exc
    return np.asarray(taps, dtype=float)


def _fir_tolerance(spec: ResponseSpec, fs: float) -> np.ndarray:
    """Kaiser-window FIR, grown until the two-pass response meets the overall spec."""
    n_taps, beta, cutoffs = _kaiser_params(spec, fs)
    if n_taps > spec.max_taps:
        raise SpecError(
            f"an FIR {spec.kind} meeting {spec.passband_ripple_db:g} dB ripple and "
            f"{spec.stopband_attenuation_db:g} dB attenuation overall needs about {n_taps} taps, "
            f"above max_taps={spec.max_taps}; widen the transition band, raise max_taps, or use "
            "an IIR family."
        )
    window = ("kaiser", beta)

    def attempt(n: int) -> tuple[np.ndarray, bool, tuple[float, float]]:
        taps = _firwin(n, cutoffs, spec.kind, fs, window)
        figures = _measure(None, taps, spec, fs)
        return taps, _meets(*figures, spec), figures

    taps, ok, figures = attempt(n_taps)
    failed = n_taps
    while not ok:
        failed = n_taps
        n_taps = (n_taps + max(2, int(0.02 * n_taps))) | 1
        if n_taps > spec.max_taps:
            raise DesignError(
                f"the FIR {spec.kind} still misses the overall spec at {failed} taps (ripple "
                f"{figures[0]:.9g} dB for {spec.passband_ripple_db:g}, attenuation {figures[1]:.9g} "
                f"dB for {spec.stopband_attenuation_db:g}); more than max_taps={spec.max_taps} "
                "are needed: raise max_taps, widen the transition band, or use an IIR family."
            )
        taps, ok, figures = attempt(n_taps)
    # The step may have overshot: bisect (odd counts) between the last miss and the first hit.
    while n_taps - failed > 2:
        mid = ((failed + n_taps) // 2) | 1
        if mid in (failed, n_taps):
            break
        cand, cand_ok, _ = attempt(mid)
        if cand_ok:
            taps, n_taps = cand, mid
        else:
            failed = mid
    return taps


def _fir_fixed(spec: ResponseSpec, fs: float) -> np.ndarray:
    """FIR of ``order + 1`` taps (Hamming window); the cutoff corrected numerically if asked.

    ``firwin`` puts the per-pass gain 0.5 near its cutoff; for ``overall-3db`` each design
    edge is moved (``brentq`` for one edge, ``scipy.optimize.root`` for two) until the
    per-pass gain at each requested cutoff is 2^(-1/4), i.e. -3.0103 dB overall.
    """
    n_taps = int(spec.order or 0) + 1
    cutoffs = [float(c) for c in spec.cutoff_hz or ()]
    kind = spec.kind
    if spec.cutoff_means == "per-pass":
        return _firwin(n_taps, cutoffs, kind, fs)
    nyq = fs / 2.0
    eps = nyq * 1e-9

    def gain(edges: Sequence[float], band_kind: str, at: Sequence[float]) -> np.ndarray:
        taps = _firwin(n_taps, edges, band_kind, fs)
        return np.abs(_per_pass(None, taps, np.asarray(at, dtype=float), fs)) - _PER_PASS_HALF_POWER

    def one_edge(fc: float, edge_kind: str) -> float:
        # lowpass: gain at fc rises as the edge moves up; highpass: it rises as it moves down.
        lo, hi = eps, nyq - eps
        f_lo = float(gain([lo], edge_kind, [fc])[0])
        f_hi = float(gain([hi], edge_kind, [fc])[0])
        if f_lo * f_hi > 0.0:
            raise DesignError(
                f"{n_taps} FIR taps cannot place the overall -3.0103 dB point at {fc:g} Hz; use "
                "more taps (a higher order) or cutoff_means='per-pass'."
            )
        return float(optimize.brentq(lambda e: float(gain([e], edge_kind, [fc])[0]), lo, hi, xtol=1e-10))

    try:
        if kind in ("lowpass", "highpass"):
            edges = [one_edge(cutoffs[0], kind)]
        else:
            lower_kind, upper_kind = ("highpass", "lowpass") if kind == "bandpass" else ("lowpass", "highpass")
            guess = [one_edge(cutoffs[0], lower_kind), one_edge(cutoffs[1], upper_kind)]
            sol = optimize.root(lambda e: gain(sorted(np.clip(e, eps, nyq - eps)), kind, cutoffs), guess, tol=1e-12)
            edges = sorted(float(x) for x in np.clip(sol.x, eps, nyq - eps))
    except DesignError:
        raise
    except ValueError as exc:
        raise DesignError(
            f"could not place the overall -3.0103 dB points of the {n_taps}-tap FIR at "
            f"{_fmt(tuple(cutoffs))} Hz ({exc}); use more taps or cutoff_means='per-pass'."
        ) from exc
    taps = _firwin(n_taps, edges, kind, fs)
    _check_cutoffs(None, taps, cutoffs, fs, "fir")
    return taps


# ----------------------------------------------------------------------------- main entry


def _fixed_family(spec: ResponseSpec) -> str:
    """Family used for a fixed-order design: ``auto`` means Butterworth (maximally flat)."""
    return "butterworth" if spec.family == "auto" else spec.family


def _cascade_remedy(spec: ResponseSpec) -> str:
    """What shortens a cascade whose rounding is too large (lower case, no final stop)."""
    if spec.mode == "tolerance":
        return (
            "lower the order (widen the transition band or relax ripple or attenuation), or use "
            "family 'elliptic' or 'auto', which reach the same spec at a far lower order"
        )
    return (
        "lower the order, or give the response as a tolerance spec (passband_hz, stopband_hz, "
        "passband_ripple_db, stopband_attenuation_db) with family 'elliptic' or 'auto', which "
        "reach a given transition band at a far lower order"
    )


def _check_cascade_rounding(sos: np.ndarray, spec: ResponseSpec, family: str, order: int) -> None:
    """Refuse a cascade whose measured float64 rounding estimate exceeds ``ROUNDING_LIMIT``.

    Raises
    ------
    DesignError
        Naming the cause (float64 rounding of a long, sharp cascade) and the remedies.
    """
    cascade = ROUNDING_SAFETY * measured_rounding(sos)
    if cascade <= ROUNDING_LIMIT:
        return
    remedy = _cascade_remedy(spec)
    raise DesignError(
        f"the {family} {spec.kind} of order {order} per pass cannot be computed in float64: its "
        f"cascade of {sos.shape[0]} sections is so long and sharp that float64 rounding grows to an "
        f"estimated {cascade:.2g} of full scale (limit {ROUNDING_LIMIT:g}; measured by running both "
        f"passes in float64 and in extended precision); {remedy}."
    )


def _candidate(spec: ResponseSpec, family: str, fs: float) -> tuple[np.ndarray | None, np.ndarray | None, int]:
    """(sos, taps, order per pass) for one resolved family.

    An IIR design (not a notch) whose cascade rounds beyond ``ROUNDING_LIMIT`` raises
    :class:`~twinpass.errors.DesignError` (see :func:`_check_cascade_rounding`).
    """
    if spec.kind == "notch":
        return _notch(spec, fs), None, 2
    if spec.mode == "tolerance":
        if family == "fir":
            taps = _fir_tolerance(spec, fs)
            return None, taps, int(taps.size - 1)
        sos, order = _iir_tolerance(spec, family, fs)
        _check_cascade_rounding(sos, spec, family, order)
        return sos, None, order
    if family == "fir":
        taps = _fir_fixed(spec, fs)
        return None, taps, int(taps.size - 1)
    sos = _iir_fixed(spec, family, fs)
    _check_cascade_rounding(sos, spec, family, int(spec.order or 0))
    return sos, None, int(spec.order or 0)


def _auto(spec: ResponseSpec, fs: float) -> tuple[str, np.ndarray | None, np.ndarray | None, int]:
    """Cheapest design meeting a tolerance spec (see the module's cost model)."""
    best: tuple[float, float, str, np.ndarray | None, np.ndarray | None, int] | None = None
    reasons: list[str] = []
    for family in IIR_FAMILIES:
        try:
            sos, _, order = _candidate(spec, family, fs)
        except SpecError as exc:  # includes DesignError
            reasons.append(f"{family}: {exc}")
            continue
        assert sos is not None
        key = (cost_per_sample(sos=sos), dominant_pole_radius(sos))
        if best is None or key < best[:2]:
            best = (*key, family, sos, None, order)
    # FIR only when its estimated cost is genuinely lower.
    n_est, _, _ = _kaiser_params(spec, fs)
    if best is None or _fir_cost(n_est) < FIR_PREFERENCE * best[0]:
        try:
            _, taps, order = _candidate(spec, "fir", fs)
        except SpecError as exc:
            reasons.append(f"fir: {exc}")
        else:
            assert taps is not None
            cost = cost_per_sample(taps=taps)
            if best is None or cost < FIR_PREFERENCE * best[0]:
                best = (cost, 0.0, "fir", None, taps, order)
    if best is None:
        raise SpecError("no family can meet the spec: " + " | ".join(reasons))
    return best[2], best[3], best[4], best[5]


# A rate far above the band edges (1e300 Hz) makes scipy divide by coefficients that underflow
# to 0; whatever that gives is refused by the checks of the design (a NaN or unstable section,
# a response that misses the spec) and reported with its remedy, so the floating-point warnings
# of the arithmetic on the way are not printed.
@np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore")
def design_filter(spec: ResponseSpec, sample_rate_hz: float, tolerance: float = 1e-9) -> Design:
    """Design the per-pass filter whose two-pass response meets ``spec``.

    Parameters
    ----------
    spec : ResponseSpec
        Overall (two-pass) response: tolerance spec (mode A), fixed order + cutoff
        (mode B) or notch.
    sample_rate_hz : float
        Sample rate in Hz.
    tolerance : float
        Relative accuracy of blockwise filtering (sets the halo, ``effective_length``).

    Returns
    -------
    Design
        With ``report`` filled by :func:`response_report`.

    Raises
    ------
    SpecError
        Invalid spec, or the minimum order exceeds ``max_order`` (``max_taps`` for FIR).
    DesignError
        The design is unstable, badly conditioned, rounds in float64 beyond
        ``ROUNDING_LIMIT`` (a long, sharp cascade), or misses the overall spec.

    Notes
    -----
    Mode A: dB figures add over the two passes, so each pass gets half the overall ripple
    and attenuation; the minimum order comes from ``scipy.signal.buttord`` / ``cheb1ord`` /
    ``cheb2ord`` / ``ellipord`` (FIR: ``kaiserord`` with ``firwin``), the two-pass response
    is verified on a grid that follows the design (FIR: at least 16 points per ripple spacing
    ``fs / M``; IIR: steps below 1/16 of the distance to the nearest pole or zero) plus the
    exact band edges, each band's extremes refined between grid points, and the order (taps)
    raised until it meets the spec. Mode B: ``per-pass`` designs at the cutoff as given;
    ``overall-3db`` moves the design edges so the two-pass gain is -3.0103 dB at each cutoff
    (verified);
    for Chebyshev and elliptic families ``passband_ripple_db`` / ``stopband_attenuation_db``
    are overall figures here too and are halved per pass; ``family="auto"`` means
    Butterworth.
    Notch: a second-order section with the requested overall -3 dB width (see ``_notch``).
    """
    validate_spec(spec, sample_rate_hz)
    fs = float(sample_rate_hz)
    if not (_is_number(tolerance) and 0.0 < float(tolerance) < 1.0):
        raise SpecError(f"tolerance={tolerance!r} must lie in (0, 1) (relative to max |input|).")
    if spec.kind == "notch":
        family = "notch"
        sos, taps, order = _candidate(spec, family, fs)
    elif spec.mode == "tolerance" and spec.family == "auto":
        family, sos, taps, order = _auto(spec, fs)
    else:
        family = _fixed_family(spec) if spec.mode == "fixed" else spec.family
        sos, taps, order = _candidate(spec, family, fs)
    halo = effective_length(sos=sos, taps=taps, tolerance=float(tolerance))
    design = Design(
        spec=spec,
        family=family,
        sample_rate_hz=fs,
        order=int(order),
        sos=sos,
        taps=taps,
        effective_length=int(halo),
        tolerance=float(tolerance),
    )
    return replace(design, report=response_report(design))


def design_for_rates(spec: ResponseSpec, rates: Iterable[float], tolerance: float = 1e-9) -> dict[float, Design]:
    """One design per distinct sample rate (Hz), keyed by the rate as ``float``.

    Raises
    ------
    SpecError
        Prefixed with the sample rate whose design failed.
    """
    out: dict[float, Design] = {}
    for rate in rates:
        key = float(rate)
        if key in out:
            continue
        try:
            out[key] = design_filter(spec, key, tolerance)
        except DesignError as exc:
            raise DesignError(f"at sample rate {key:g} Hz: {exc}") from exc
        except SpecError as exc:
            raise SpecError(f"at sample rate {key:g} Hz: {exc}") from exc
    return out


# ----------------------------------------------------------------------------- report


def _num(x: Any) -> float | None:
    """Plain float, or ``None`` for NaN/infinity (JSON has neither)."""
    v = float(x)
    return v if math.isfinite(v) else None


def _margin(db: float) -> float | None:
    """A margin to the spec (dB, negative: missed) as reported: one within the verification's
    own slack (``|margin| <= SPEC_SLACK_DB``, rounding of the measured response) is 0.0, the
    spec met exactly; a larger miss stays negative."""
    v = _num(db)
    return 0.0 if v is not None and abs(v) <= SPEC_SLACK_DB else v


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return _num(value)
    return value


def _named_edges(design: Design) -> list[tuple[str, float]]:
    spec = design.spec
    if spec.kind == "notch":
        return [("notch", float(spec.notch_hz or 0.0))]
    if spec.mode == "fixed":
        return [("cutoff", float(c)) for c in spec.cutoff_hz or ()]
    edges = [("passband", float(f)) for f in spec.passband_hz or ()]
    edges += [("stopband", float(f)) for f in spec.stopband_hz or ()]
    return sorted(edges, key=lambda e: e[1])


def _rounding_remedy(design: Design) -> str:
    """What lowers the rounding estimate: a shorter cascade when its measured rounding
    dominates, else moving the poles that dominate it away from the unit circle.

    Their distance from it is about pi times the width of the feature they shape over the
    sample rate: a notch or narrow band away from 0 Hz and Nyquist is widened (or the rate
    lowered); a cutoff near 0 Hz is raised relative to the rate (decimating first); an edge
    near Nyquist is lowered relative to it ("near" as in
    :func:`~twinpass.core.effective.pole_near_edge`).
    """
    if design.spec.kind == "notch":
        return "Widen the notch (notch_width_hz, or a lower notch_q) or lower the sample rate (decimate first)"
    if design.sos is None:
        return "Use fewer taps (a wider transition band)"
    if ROUNDING_SAFETY * measured_rounding(design.sos) > analytic_rounding_estimate(sos=design.sos):
        remedy = _cascade_remedy(design.spec)
        return f"The rounding comes from the length and sharpness of the cascade of sections: {remedy}"
    pole = rounding_dominant_pole(design.sos)
    hz = abs(math.atan2(pole.imag, pole.real)) * design.sample_rate_hz / (2.0 * math.pi)
    if not pole_near_edge(pole):
        return (
            f"Widen the narrowest band or transition (poles at {hz:.6g} Hz) or lower the sample "
            "rate (decimate first)"
        )
    if pole.real >= 0.0:
        return f"Raise the cutoff near 0 Hz (poles at {hz:.3g} Hz) or lower the sample rate (decimate first)"
    return f"Lower the band edge near Nyquist (poles at {hz:.6g} Hz) or raise the sample rate"


def response_report(design: Design) -> dict[str, Any]:
    """JSON-serialisable summary of what the design achieves (plain Python types, no NaN).

    Keys: ``kind``, ``family``, ``requested_family``, ``mode``, ``order_per_pass``,
    ``n_sections`` / ``n_taps``, ``sample_rate_hz``, ``edges`` (per-pass and overall gain in
    dB at each band edge, cutoff or notch frequency; ``None`` for -infinity),
    ``passband_ripple_db`` / ``stopband_attenuation_db`` achieved overall with their
    ``*_required_db`` and ``*_margin_db`` (tolerance mode, else ``None``; a margin within
    :data:`SPEC_SLACK_DB` of 0 is 0.0, negative only for a true miss),
    ``overall_minus3db_hz`` / ``overall_minus6db_hz`` (-3.0103 / -6.0206 dB crossings, Hz;
    the overall -6.0206 dB points are the per-pass -3.0103 dB points), ``notch_width_hz`` (notch: achieved overall -3 dB width),
    ``max_pole_radius`` (IIR, else ``None``), ``cost_per_sample``,
    ``effective_length_samples``, ``effective_length_seconds``, ``tolerance``,
    ``rounding_estimate`` (see :func:`~twinpass.core.effective.rounding_estimate`) and
    ``statement`` (with a caution when the rounding estimate exceeds the tolerance).
    """
    spec = design.spec
    fs = float(design.sample_rate_hz)
    sos, taps = design.sos, design.taps
    edges = _named_edges(design)
    h = _per_pass(sos, taps, np.asarray([f for _, f in edges], dtype=float), fs)
    per_db = _db_amplitude(h)
    edge_rows = [
        {"edge": name, "hz": f, "per_pass_db": _num(g), "overall_db": _num(2.0 * g)}
        for (name, f), g in zip(edges, per_db)
    ]
    grid, grid_h = _grid_response(sos, taps, fs, [f for _, f in edges])
    grid_db = _db_amplitude(grid_h)
    minus3 = _crossings(sos, taps, fs, HALF_POWER_DB, grid, grid_db)
    minus6 = _crossings(sos, taps, fs, HALF_AMPLITUDE_DB, grid, grid_db)
    ripple = attenuation = None
    ripple_margin = attenuation_margin = None
    if spec.mode == "tolerance":
        r, a = _measure(sos, taps, spec, fs)
        ripple, attenuation = _num(r), _num(a)
        ripple_margin = _margin(float(spec.passband_ripple_db) - r)
        attenuation_margin = _margin(a - float(spec.stopband_attenuation_db))
    halo = int(design.effective_length)
    seconds = halo / fs
    rounding = rounding_estimate(sos=sos, taps=taps)
    statement = (
        "The overall phase is zero (forward-backward filtering). The filter is non-causal: "
        f"a transient appears up to {halo} samples ({seconds:.6g} s) before it occurs, and "
        f"its effect lasts as long after it (to a relative tolerance of {design.tolerance:g})."
    )
    if rounding > design.tolerance:
        statement += (
            f" Caution: float64 rounding in this design is estimated at {rounding:.2g} of full scale, "
            f"above the tolerance: blocks agree with filtering the whole signal at once only to about "
            f"that. {_rounding_remedy(design)}, or raise the tolerance."
        )
    report: dict[str, Any] = {
        "kind": spec.kind,
        "family": design.family,
        "requested_family": spec.family,
        "mode": spec.mode,
        "cutoff_means": spec.cutoff_means if spec.mode == "fixed" else None,
        "order_per_pass": int(design.order),
        "n_sections": design.n_sections if not design.is_fir else None,
        "n_taps": int(taps.size) if taps is not None else None,
        "sample_rate_hz": fs,
        "edges": edge_rows,
        "passband_ripple_db": ripple,
        "passband_ripple_required_db": spec.passband_ripple_db if spec.mode == "tolerance" else None,
        "passband_ripple_margin_db": ripple_margin,
        "stopband_attenuation_db": attenuation,
        "stopband_attenuation_required_db": (
            spec.stopband_attenuation_db if spec.mode == "tolerance" else None
        ),
        "stopband_attenuation_margin_db": attenuation_margin,
        "overall_minus3db_hz": minus3,
        "overall_minus6db_hz": minus6,
        "notch_width_hz": (minus3[-1] - minus3[0]) if spec.kind == "notch" and len(minus3) >= 2 else None,
        "max_pole_radius": dominant_pole_radius(sos) if sos is not None else None,
        "cost_per_sample": cost_per_sample(sos=sos, taps=taps),
        "effective_length_samples": halo,
        "effective_length_seconds": seconds,
        "tolerance": float(design.tolerance),
        "rounding_estimate": rounding,
        "statement": statement,
    }
    return _jsonable(report)


def _cell(value: Any, digits: int = 6) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    if isinstance(value, list):
        return ", ".join(_cell(v, digits) for v in value) if value else "-"
    return str(value)


def _gain_cell(db: float | None) -> str:
    """A gain (dB) for the text report: ``-inf`` for an exact zero, ``< -300`` below
    :data:`REPORT_FLOOR_DB`, else six significant digits."""
    if db is None:
        return "-inf"
    return f"< {REPORT_FLOOR_DB:g}" if db < REPORT_FLOOR_DB else _cell(db, 6)


def format_report(report: dict[str, Any]) -> str:
    """Plain-text table of a :func:`response_report` dict for the terminal (gains below
    :data:`REPORT_FLOOR_DB` as ``< -300``, since float64 resolves none)."""
    rows: list[tuple[str, str]] = []
    order_label = "taps" if report.get("n_taps") is not None else "sections"
    order_count = report.get("n_taps") if report.get("n_taps") is not None else report.get("n_sections")
    fields = [
        ("kind", "kind", ""),
        ("family", "family", ""),
        ("mode", "mode", ""),
        ("cutoff means", "cutoff_means", ""),
        ("order per pass", "order_per_pass", ""),
        (order_label, None, ""),
        ("sample rate", "sample_rate_hz", "Hz"),
        ("overall passband ripple", "passband_ripple_db", "dB"),
        ("  required / margin", ("passband_ripple_required_db", "passband_ripple_margin_db"), "dB"),
        ("overall stopband attenuation", "stopband_attenuation_db", "dB"),
        ("  required / margin", ("stopband_attenuation_required_db", "stopband_attenuation_margin_db"), "dB"),
        ("overall -3 dB at", "overall_minus3db_hz", "Hz"),
        ("overall -6 dB at", "overall_minus6db_hz", "Hz"),
        ("notch width (overall -3 dB)", "notch_width_hz", "Hz"),
        ("max pole radius", "max_pole_radius", ""),
        ("cost per sample", "cost_per_sample", "mult-adds"),
        ("effective length", "effective_length_samples", "samples"),
        ("effective length (time)", "effective_length_seconds", "s"),
        ("tolerance", "tolerance", ""),
        ("float64 rounding (estimate)", "rounding_estimate", "of full scale"),
    ]
    for label, key, unit in fields:
        if key is None:
            text = _cell(order_count)
        elif isinstance(key, tuple):
            if report.get(key[0]) is None:
                continue
            text = f"{_cell(report.get(key[0]))} / {_cell(report.get(key[1]), 4)}"
        else:
            if report.get(key) is None:
                continue
            text = _cell(report.get(key), {"max_pole_radius": 12, "rounding_estimate": 2}.get(key, 6))
        rows.append((label, f"{text} {unit}".rstrip()))
    width = max(len(label) for label, _ in rows)
    lines = [f"{label:<{width}}  {text}" for label, text in rows]
    edges = report.get("edges") or []
    if edges:
        header = ("edge", "Hz", "per pass dB", "overall dB")
        table = [header] + [
            (
                str(e["edge"]),
                _cell(e["hz"], 8),
                _gain_cell(e["per_pass_db"]),
                _gain_cell(e["overall_db"]),
            )
            for e in edges
        ]
        widths = [max(len(r[i]) for r in table) for i in range(4)]
        lines.append("")
        for r in table:
            lines.append(
                "  ".join(
                    r[i].ljust(widths[i]) if i == 0 else r[i].rjust(widths[i]) for i in range(4)
                )
            )
    statement = report.get("statement")
    if statement:
        lines += ["", str(statement)]
    return "\n".join(lines)
