"""Value objects shared by the numeric core.

Conventions: frequencies in Hz, levels in dB, lengths in samples; signal arrays are
time-major, shape (samples, channels).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

Kind = Literal["lowpass", "highpass", "bandpass", "bandstop", "notch"]
Family = Literal["butterworth", "chebyshev1", "chebyshev2", "elliptic", "fir", "auto"]
CutoffMeaning = Literal["overall-3db", "per-pass"]
EdgeMode = Literal["odd", "even", "constant", "none"]

KINDS: tuple[str, ...] = ("lowpass", "highpass", "bandpass", "bandstop", "notch")
FAMILIES: tuple[str, ...] = ("butterworth", "chebyshev1", "chebyshev2", "elliptic", "fir", "auto")
EDGE_MODES: tuple[str, ...] = ("odd", "even", "constant", "none")


@dataclass(frozen=True)
class ResponseSpec:
    """What the user asks of the OVERALL (two-pass, |H|^2) response.

    Two ways to specify it:

    * mode A (tolerance spec): ``passband_hz``, ``stopband_hz``, ``passband_ripple_db``,
      ``stopband_attenuation_db`` -- all overall figures; the designer halves the dB
      figures per pass and picks the minimum order.
    * mode B (fixed order): ``order`` (per pass) and ``cutoff_hz`` with ``cutoff_means``
      ``"overall-3db"`` (the two-pass response is -3 dB at the cutoff) or ``"per-pass"``
      (the single-pass design's own cutoff; the two-pass response is -6 dB there for
      Butterworth).

    ``notch`` uses ``notch_hz`` plus ``notch_width_hz`` (overall -3 dB width) or ``notch_q``.
    Edges are one value for lowpass/highpass and two for band kinds, in Hz.
    """

    kind: str = "bandpass"
    family: str = "auto"
    passband_hz: tuple[float, ...] | None = None
    stopband_hz: tuple[float, ...] | None = None
    passband_ripple_db: float | None = None
    stopband_attenuation_db: float | None = None
    order: int | None = None
    cutoff_hz: tuple[float, ...] | None = None
    cutoff_means: str = "overall-3db"
    notch_hz: float | None = None
    notch_width_hz: float | None = None
    notch_q: float | None = None
    max_order: int = 64
    """Largest per-pass order (IIR) accepted; FIR designs are limited by ``max_taps``."""
    max_taps: int = 20001

    @property
    def mode(self) -> str:
        """``"fixed"`` when an order is given, ``"notch"`` for notches, else ``"tolerance"``."""
        if self.kind == "notch":
            return "notch"
        return "fixed" if self.order is not None else "tolerance"

    def to_dict(self) -> dict[str, Any]:
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.__dict__.items()}


@dataclass(frozen=True, eq=False)
class Design:
    """A designed per-pass filter and what it means for block processing.

    Exactly one of ``sos`` (IIR, shape (n_sections, 6)) and ``taps`` (FIR, shape (M,)) is set.
    The filter is run forward then backward; the overall response is |H|^2.
    """

    spec: ResponseSpec
    family: str
    """Resolved family (never ``auto``)."""
    sample_rate_hz: float
    order: int
    """Per-pass order (IIR filter order; for FIR the number of taps minus one)."""
    sos: np.ndarray | None
    taps: np.ndarray | None
    effective_length: int
    """Samples after which the impulse response's influence falls below ``tolerance``; the halo."""
    tolerance: float
    """Largest allowed |blockwise - whole signal| relative to the segment's max |input|."""
    report: dict[str, Any] = field(default_factory=dict)
    """JSON-serialisable response report (see ``twinpass.core.design.response_report``)."""

    @property
    def is_fir(self) -> bool:
        return self.taps is not None

    @property
    def n_sections(self) -> int:
        return 0 if self.sos is None else int(self.sos.shape[0])

    def coefficients(self) -> dict[str, Any]:
        """The coefficients as JSON-ready nested lists (``sos`` or ``taps``)."""
        if self.sos is not None:
            return {"sos": np.asarray(self.sos, dtype=float).tolist()}
        assert self.taps is not None
        return {"taps": np.asarray(self.taps, dtype=float).tolist()}

    def digest(self, extra: dict[str, Any] | None = None) -> str:
        """SHA-256 hex digest of coefficients, tolerance and ``extra`` (edge handling, version).

        Kept per ``extra`` on the design (every output file records it; a long FIR's
        coefficients take a while to serialise).
        """
        key = json.dumps(extra or {}, sort_keys=True, separators=(",", ":"))
        kept: dict[str, str] = self.__dict__.setdefault("_digests", {})  # a frozen dataclass's own cache
        if key not in kept:
            kept[key] = self._digest(extra)
        return kept[key]

    def _digest(self, extra: dict[str, Any] | None) -> str:
        payload = {
            "family": self.family,
            "sample_rate_hz": float(self.sample_rate_hz),
            "tolerance": float(self.tolerance),
            "effective_length": int(self.effective_length),
            **self.coefficients(),
            "extra": extra or {},
        }
        blob = json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()
        return hashlib.sha256(blob).hexdigest()


UNRECORDED_KIND = "unrecorded"
"""``ResponseSpec.kind`` of a design rebuilt from an output's recorded coefficients whose
response spec is not known: the report draws it without a spec mask and shows no response
limits for it."""

RESETTING_DIGEST = "resetting"
"""Design digest an output carries while it is being written anew, until its block table is
reset (:mod:`twinpass.engine`, module notes): no design has it, so a rewrite cut short is
planned again whole."""


@dataclass(frozen=True)
class FileRecord:
    """What the output store remembers of one input file (used by the planner).

    ``source`` is the input path relative to the archive root (POSIX separators).
    """

    source: str
    source_fingerprint: dict[str, Any]
    """As produced by ``twinpass.io.fingerprint.fingerprint_file`` (size, mtime_ns, digest, mode)."""
    design_digest: str
    complete: bool
    frames: int
    segment: str | None = None
    array_name: str | None = None
    """Path of the output array inside the store."""
    start_time: str | None = None
    """The file's start time when it was filtered (ISO 8601, as the array's ``start_time``
    attribute holds it); None when unknown."""
    dtype: str | None = None
    """Sample type of the output array (e.g. ``"float32"``); None when unknown."""
    absent: tuple[tuple[int, int], ...] = ()
    """Frame spans [start, stop) of a complete output whose chunk files are missing or empty
    (deleted or lost since they were written); checked in local stores only."""
    stream: str | None = None
    """The stream the file was filtered in; None when not recorded."""
    joins: tuple[str | None, str | None] | None = None
    """The files this one was filtered next to: the previous and the next file of its segment
    (source paths; None at a segment's start or end), as the last run that wrote or checked
    its output saw them; None when not recorded (outputs written before it was)."""
    gone_since: str | None = None
    """When the store marked this output as that of an input no longer in the archive (ISO
    8601; attribute ``input_gone`` of the array); None when it is not marked."""
    channel_names: tuple[str, ...] | None = None
    """The output's attribute ``channel_names`` (one name per channel); None when absent."""
    units: tuple[str, ...] | None = None
    """The output's attribute ``units`` (one unit per channel); None when absent."""
    checks: dict[str, Any] | None = None
    """The output's attribute ``checks``: its blocks' counts and worst figures when it was last
    marked (see ``twinpass.engine.finish_segment``); None when absent."""
