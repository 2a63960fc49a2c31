"""The run report: one self-contained HTML file.

Figures are drawn with matplotlib's Agg renderer and embedded as base64 PNG images;
styles are inline; the file loads nothing from anywhere and needs no JavaScript.

Sections: notices (such as a configuration that no longer asks for the design the
outputs were filtered with), summary, cautions, filter design (per design: what it was
used for, overall response against the spec mask beside the per-pass response, overall
zero phase against the per-pass phase, the limits its blocks are graded against, two-pass
impulse response with its effective length, the design report table), the per-block check map, inputs left out, failed or
missing, before/after overlays around the largest transient, and the file table.

Conventions: frequencies in Hz, levels in dB (overall level ``20 log10 |H|^2``), times
in seconds.
"""

from __future__ import annotations

import base64
import contextlib
import datetime as _dt
import html
import io
import math
import os
import tempfile
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from scipy import signal

from twinpass.core.blocks import samples_text
from twinpass.core.checks import LIMITS_EXPLAINED, STATUS_NAMES
from twinpass.core.design import HALF_AMPLITUDE_DB, HALF_POWER_DB, overall_response, per_pass_response
from twinpass.core.design import _bands as _spec_bands
from twinpass.core.kernel import autocorrelation
from twinpass.core.types import UNRECORDED_KIND, Design
from twinpass.errors import TwinpassError

__all__ = ["DEFAULT_CAUTIONS", "LISTED", "STATUS_COLORS", "UNRECORDED_KIND", "largest_excursion", "render_report",
           "response_figure_png", "two_pass_impulse"]

DEFAULT_CAUTIONS: tuple[str, ...] = (
    "The filtering is non-causal: running the filter forward and then backward cancels the "
    "phase but spreads every event both ways in time, so a transient shows a pre-response "
    "before it happens (as far ahead as the effective length shown with the impulse response).",
    "Do not use the filtered output for onset or arrival-time picking, nor for real-time "
    "alarms or triggering: the pre-response moves apparent onsets earlier, and each output "
    "sample depends on input that comes after it.",
    "Edge zones: near the ends of a segment (the start and end of a stream, both sides of a gap) "
    "the output depends on how the signal was extended beyond them ([processing] edge); the "
    "files table gives, per output, how many samples at each end that affects (edge zones).",
    "Keep the raw archive: the filtered output is derived data, not a replacement for the "
    "recordings; another response, a recheck or a later review needs the originals.",
    "For structural or medical safety decisions, defer to local codes and licensed practice: "
    "these checks show that the processing did what was asked, not that the data or the "
    "chosen response are fit for such a decision.",
)
"""Cautions printed in every report (further ones passed to :func:`render_report` follow)."""

STATUS_COLORS: dict[str, str] = {
    "pass": "#2e7d32",
    "warn": "#f9a825",
    "fail": "#c62828",
    "pending": "#9e9e9e",
    "error": "#6a1b9a",
    "cancelled": "#00838f",
}
"""Fill colours of the block check map, by block status. ``cancelled``: the block's task was
cancelled because a run was stopped (recorded as an error whose text says so); it is not
done, nothing failed in it, and the next run does it."""

LISTED = 50
"""Entries shown under each heading of the report's lists (the rest are counted)."""

IMPULSE_PLOT_MAX: int = 1 << 18
"""Longest single-pass impulse response computed for the plot (samples per side)."""
_PLOT_POINTS = 4000
_DPI = 100

_FIGURE_UNITS: dict[str, str] = {
    "rms_in": "",
    "rms_out": "",
    "peak_in": "",
    "peak_out": "",
    "passband_dev_db": " dB",
    "phase_deg": " deg",
    "stopband_att_db": " dB",
    "seam_mismatch": " (rel.)",
}


# ----------------------------------------------------------------------------- figures


def _png(fig: Figure) -> bytes:
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI, metadata={"Software": None})
    return buf.getvalue()


def _db(values: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(values))


def _spec_edges(design: Design) -> list[float]:
    spec = design.spec
    edges: list[float] = []
    for name in ("passband_hz", "stopband_hz", "cutoff_hz"):
        edges += [float(v) for v in getattr(spec, name) or ()]
    if spec.kind == "notch" and spec.notch_hz:
        f0 = float(spec.notch_hz)
        width = _notch_width(design)
        edges += [f0 - width / 2.0, f0, f0 + width / 2.0] if width else [f0]
    return [e for e in edges if e > 0]


def _notch_width(design: Design) -> float | None:
    spec = design.spec
    if spec.notch_width_hz:
        return float(spec.notch_width_hz)
    if spec.notch_q and spec.notch_hz:
        return float(spec.notch_hz) / float(spec.notch_q)
    return None


def _frequency_grid(design: Design) -> tuple[np.ndarray, bool]:
    """(frequencies in Hz, log axis?) covering the design's edges."""
    nyq = design.sample_rate_hz / 2.0
    edges = _spec_edges(design)
    low = min(edges) if edges else nyq / 10.0
    if low < nyq / 50.0:
        f = np.geomspace(low / 50.0, nyq, _PLOT_POINTS)
        return np.unique(np.concatenate([f, edges])), True
    f = np.linspace(0.0, nyq, _PLOT_POINTS)
    return np.unique(np.concatenate([f, edges])), False


def _mask_bands(design: Design) -> tuple[list[tuple[float, float]], list[tuple[float, float]]]:
    """Passband and stopband frequency ranges (Hz) of a tolerance spec (none otherwise)."""
    spec = design.spec
    if spec.mode != "tolerance" or spec.kind == "notch" or not spec.passband_hz or not spec.stopband_hz:
        return [], []
    return _spec_bands(spec, design.sample_rate_hz / 2.0)


def _draw_mask(ax: Any, design: Design, ymin: float, ymax: float) -> None:
    spec = design.spec
    passbands, stopbands = _mask_bands(design)
    ripple = spec.passband_ripple_db
    atten = spec.stopband_attenuation_db
    for i, (a, b) in enumerate(passbands):
        if ripple is not None:
            ax.fill_between([a, b], -float(ripple), 0.0, color="#4caf50", alpha=0.25, lw=0,
                            label=f"ripple band (0 to -{float(ripple):g} dB)" if i == 0 else None)
    for i, (a, b) in enumerate(stopbands):
        if atten is not None:
            ax.fill_between([a, b], -float(atten), ymax, color="#e53935", alpha=0.18, lw=0,
                            label=f"above stopband floor (-{float(atten):g} dB)" if i == 0 else None)
    if spec.mode == "fixed" and spec.cutoff_hz:
        level = HALF_POWER_DB if spec.cutoff_means == "overall-3db" else HALF_AMPLITUDE_DB
        for i, fc in enumerate(spec.cutoff_hz):
            ax.axvline(float(fc), color="#1565c0", ls=":", lw=1,
                       label=f"cutoff ({level:.2f} dB)" if i == 0 else None)
        ax.axhline(level, color="#1565c0", ls=":", lw=1)
    if spec.kind == "notch" and spec.notch_hz:
        width = _notch_width(design)
        f0 = float(spec.notch_hz)
        if width:
            ax.axvspan(f0 - width / 2.0, f0 + width / 2.0, color="#1565c0", alpha=0.12, lw=0,
                       label=f"notch width {width:g} Hz (-3.01 dB)")
        ax.axhline(HALF_POWER_DB, color="#1565c0", ls=":", lw=1)


def _response_figure(design: Design) -> Figure:
    f, log_axis = _frequency_grid(design)
    overall_db = _db(overall_response(design, f))
    per_pass_db = _db(per_pass_response(design, f))
    spec = design.spec
    atten = spec.stopband_attenuation_db
    ymin = -max(float(atten) + 40.0, 80.0) if atten is not None else -100.0
    ymax = 5.0
    fig = Figure(figsize=(15, 4.6))
    ax1, ax3, ax2 = fig.subplots(1, 3, gridspec_kw={"width_ratios": [1.25, 0.9, 1.0]})
    _draw_mask(ax1, design, ymin, ymax)
    ax1.plot(f, np.maximum(overall_db, ymin - 10), color="#0d47a1", lw=1.4, label="overall |H|^2 (two passes)")
    ax1.set_title("Overall (two-pass) response against the spec")
    ax2.plot(f, np.maximum(per_pass_db, ymin / 2 - 10), color="#6d4c41", lw=1.4, label="one pass |H|")
    ax2.set_title("Per-pass response (one direction)")
    # Passband detail: the ripple band is too thin to see on the full scale.
    depth = max(float(spec.passband_ripple_db or 0.0), -HALF_POWER_DB if spec.mode != "tolerance" else 0.0)
    depth = depth or 1.0
    passbands, _ = _mask_bands(design)
    lo_f, hi_f = (min(a for a, _ in passbands), max(b for _, b in passbands)) if passbands else (f[0], f[-1])
    lo_f = max(lo_f, f[0])
    _draw_mask(ax3, design, -2.0 * depth, 0.5 * depth)
    ax3.plot(f, overall_db, color="#0d47a1", lw=1.4)
    ax3.set_title("Passband detail (overall)")
    ax3.set_ylim(-2.0 * depth, 0.5 * depth)
    margin = 0.1 * (hi_f - lo_f) if not log_axis else 0.0
    ax3.set_xlim(lo_f / (1.5 if log_axis else 1.0) - margin, min(hi_f * (1.5 if log_axis else 1.0) + margin, f[-1]))
    for ax, bottom in ((ax1, ymin), (ax2, ymin / 2.0)):
        ax.set_ylim(bottom, ymax)
        ax.set_xlim(f[0], f[-1])
        ax.legend(loc="lower left", fontsize=8)
    for ax in (ax1, ax2, ax3):
        ax.set_xlabel("Frequency (Hz)")
        ax.set_ylabel("Gain (dB)")
        if log_axis:
            ax.set_xscale("log")
        ax.grid(True, which="both", alpha=0.3)
    fig.suptitle(_design_label(design), fontsize=11)
    fig.tight_layout()
    return fig


def response_figure_png(design: Design) -> bytes:
    """PNG of the overall response against the spec mask beside the per-pass response.

    Parameters
    ----------
    design : Design

    Returns
    -------
    bytes
        A PNG image (frequency in Hz, gain in dB).
    """
    return _png(_response_figure(design))


def _phase_figure(design: Design) -> Figure:
    f, log_axis = _frequency_grid(design)
    h = per_pass_response(design, f)
    g = overall_response(design, f)
    per_pass_deg = np.degrees(np.unwrap(np.angle(h)))
    overall_deg = np.degrees(np.angle(g.astype(complex)))
    fig = Figure(figsize=(12, 3.8))
    ax = fig.subplots()
    ax.plot(f, per_pass_deg, color="#6d4c41", lw=1.2, label="one pass (unwrapped)")
    ax.plot(f, overall_deg, color="#0d47a1", lw=2.0, label="overall, forward + backward (zero)")
    ax.axhline(0.0, color="k", lw=0.6)
    ax.set_title("Phase: zero overall against the per-pass phase")
    ax.set_xlabel("Frequency (Hz)")
    ax.set_ylabel("Phase (degrees)")
    ax.set_xlim(f[0], f[-1])
    if log_axis:
        ax.set_xscale("log")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    return fig


def two_pass_impulse(design: Design, max_samples: int = IMPULSE_PLOT_MAX) -> tuple[np.ndarray, np.ndarray]:
    """Impulse response of the forward-backward filter, symmetric about t = 0.

    Parameters
    ----------
    design : Design
    max_samples : int
        Largest number of single-pass samples computed (IIR: the effective length, capped).

    Returns
    -------
    t : ndarray
        Time in seconds, from ``-(M - 1) / fs`` to ``(M - 1) / fs``.
    g : ndarray
        Two-pass impulse response (the autocorrelation of the single-pass response).
    """
    fs = float(design.sample_rate_hz)
    if design.taps is not None:
        h = np.asarray(design.taps, dtype=np.float64)
    else:
        n = int(min(max(design.effective_length, 16), max_samples)) + 1
        impulse = np.zeros(n)
        impulse[0] = 1.0
        h = signal.sosfilt(design.sos, impulse)
    g = np.asarray(autocorrelation(h))
    m = h.size
    t = (np.arange(g.size) - (m - 1)) / fs
    return t, g


def _envelope(t: np.ndarray, v: np.ndarray, points: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(t, min, max) per bucket, for drawing long traces without losing peaks."""
    if v.size <= points:
        return t, v, v
    step = math.ceil(v.size / points)
    pad = (-v.size) % step
    vv = np.concatenate([v, np.full(pad, v[-1])]).reshape(-1, step)
    tt = np.concatenate([t, np.full(pad, t[-1])]).reshape(-1, step)
    return tt.mean(axis=1), vv.min(axis=1), vv.max(axis=1)


def _impulse_figure(design: Design) -> Figure:
    fs = float(design.sample_rate_hz)
    t, g = two_pass_impulse(design)
    mag = np.abs(g)
    peak = float(np.max(mag)) or 1.0
    length_s = design.effective_length / fs
    # Left: linear, zoomed to where the response is visible (above 1e-3 of its peak).
    visible = np.nonzero(mag >= 1e-3 * peak)[0]
    reach = max(abs(t[visible[-1]]) if visible.size else 0.0, 10.0 / fs) * 1.3
    zoom = np.abs(t) <= reach
    fig = Figure(figsize=(12, 4.2))
    ax1, ax2 = fig.subplots(1, 2)
    tz, lo, hi = _envelope(t[zoom], g[zoom] / peak, 4000)
    ax1.axvspan(-reach, 0.0, color="#ff9800", alpha=0.15, lw=0, label="pre-response (t < 0)")
    if tz.size == lo.size and np.array_equal(lo, hi):
        ax1.plot(tz, hi, color="#0d47a1", lw=1.0, marker="." if tz.size < 200 else None, ms=3)
    else:
        ax1.fill_between(tz, lo, hi, color="#0d47a1", lw=0.8)
    ax1.set_xlim(-reach, reach)
    ax1.set_ylabel("Amplitude (relative to peak)")
    ax1.set_title("Two-pass impulse response (symmetric about t = 0)")
    # Right: decay in dB over the whole effective length.
    tt, _, hi_db = _envelope(t, mag / peak, 4000)
    with np.errstate(divide="ignore"):
        ax2.plot(tt, 20.0 * np.log10(np.maximum(hi_db, 1e-300)), color="#0d47a1", lw=0.8)
    ax2.axhline(20.0 * math.log10(design.tolerance), color="#6a1b9a", ls=":", lw=1,
                label=f"relative tolerance {design.tolerance:g}")
    span = max(length_s * 1.1, abs(t[-1]) * 1.02, 1.0 / fs)
    ax2.set_xlim(-span, span)
    ax2.set_ylim(max(20.0 * math.log10(design.tolerance) - 40.0, -320.0), 5.0)
    ax2.set_ylabel("|Amplitude| (dB relative to peak)")
    ax2.set_title("Decay of the two-pass impulse response")
    label = f"effective length +/- {design.effective_length} samples ({length_s:.4g} s)"
    for ax in (ax1, ax2):
        lo_x, hi_x = ax.get_xlim()
        for sign in (-1, 1):
            if lo_x <= sign * length_s <= hi_x:
                ax.axvline(sign * length_s, color="#c62828", ls="--", lw=1, label=label if sign < 0 else None)
        ax.axvline(0.0, color="#9e9e9e", lw=0.6, zorder=0)
        ax.set_xlabel("Time relative to the impulse (s)")
        ax.grid(True, alpha=0.3)
    if not -reach <= -length_s:
        ax1.plot([], [], color="#c62828", ls="--", lw=1, label=label + ", beyond this view")
    for ax in (ax1, ax2):
        ax.legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    return fig


def _status_name(status: Any) -> str:
    if status is None:
        return "pending"
    if isinstance(status, str):
        return status if status in STATUS_COLORS else "error"
    return STATUS_NAMES.get(int(status), "error")


def _time_axis(origin: float, span: float) -> tuple[float, str]:
    """(divisor, label) for block times ``origin``-relative, in s, h or days."""
    if span > 2 * 86400:
        div, unit = 86400.0, "days"
    elif span > 2 * 3600:
        div, unit = 3600.0, "h"
    else:
        div, unit = 1.0, "s"
    if origin > 1e8:  # absolute epoch seconds
        when = _dt.datetime.fromtimestamp(origin, tz=_dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
        return div, f"Time since {when} ({unit})"
    return div, f"Time since the earliest block start ({unit})"


def _block_map_figure(blocks: Sequence[Mapping[str, Any]]) -> Figure:
    streams = sorted({str(b.get("stream", "")) for b in blocks})
    starts = np.array([float(b["start_time_s"]) for b in blocks])
    ends = starts + np.array([float(b.get("duration_s", 0.0)) for b in blocks])
    origin = float(starts.min())
    div, xlabel = _time_axis(origin, float(ends.max() - origin))
    bars: dict[tuple[int, str], list[tuple[float, float]]] = {}
    for b, s, e in zip(blocks, starts, ends):
        row = streams.index(str(b.get("stream", "")))
        bars.setdefault((row, _status_name(b.get("status"))), []).append(((s - origin) / div, (e - s) / div))
    height = min(2.2 + 0.4 * len(streams), 20.0)
    fig = Figure(figsize=(12, height))
    ax = fig.subplots()
    for (row, name), spans in bars.items():
        ax.broken_barh(spans, (row - 0.4, 0.8), facecolors=STATUS_COLORS[name], edgecolor="white", linewidth=0.3)
    handles = [Patch(facecolor=c, label=n) for n, c in STATUS_COLORS.items()]
    ax.set_yticks(range(len(streams)))
    ax.set_yticklabels(streams)
    ax.set_ylim(-0.6, len(streams) - 0.4)
    ax.invert_yaxis()
    ax.set_xlabel(xlabel)
    ax.set_ylabel("Stream")
    ax.set_title("Per-block checks over the archive")
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize=8, title="status",
              title_fontsize=8, frameon=False)
    ax.grid(True, axis="x", alpha=0.3)
    fig.tight_layout()
    return fig


def _lag_of_peak(before: np.ndarray, after: np.ndarray) -> int | None:
    """Lag (samples) of the cross-correlation peak of after against before; None if unusable."""
    if before.size != after.size or before.size < 3:
        return None
    a = before - np.mean(before)
    b = after - np.mean(after)
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))) or not np.any(a) or not np.any(b):
        return None
    xc = signal.correlate(b, a, mode="full")
    lags = signal.correlation_lags(b.size, a.size, mode="full")
    return int(lags[int(np.argmax(np.abs(xc)))])


def _window_mean(x: np.ndarray) -> float:
    """Mean of the finite samples (0 when there is none)."""
    finite = x[np.isfinite(x)]
    return float(np.mean(finite)) if finite.size else 0.0


def largest_excursion(x: np.ndarray) -> int | None:
    """Index of the input's largest excursion: the sample of largest ``|x - mean|``, the mean
    taken over the finite samples of ``x`` (NaN/Inf samples are passed over).

    This is the one definition the overlay uses: the report's data puts t = 0 there and the
    overlay draws its marker there, both over the window shown, each trace drawn less that
    same mean.

    Parameters
    ----------
    x : ndarray, shape (samples,)
        One channel of input (input units).

    Returns
    -------
    int or None
        The index into ``x`` (the first one on ties); None when no sample is finite.
    """
    x = np.asarray(x, dtype=np.float64)
    finite = np.isfinite(x)
    if not finite.any():
        return None
    return int(np.argmax(np.where(finite, np.abs(x - _window_mean(x)), -np.inf)))


OVERLAY_TITLE_CHARS = 120
"""Characters per line of the overlay's title, which fit its 12 inch width at 10 points."""


def _overlay_figure(entry: Mapping[str, Any]) -> tuple[Figure, str]:
    """The overlay of input and output, each less its mean over the window, and its caption.

    The overlay compares the shape and timing of an event before and after filtering; an
    offset the filter removes (a high-pass or band-pass) would otherwise part the traces, so
    both are drawn less their window means, which the legend and caption state.
    """
    t = np.asarray(entry["t"], dtype=np.float64)
    raw_before = np.asarray(entry["before"], dtype=np.float64)
    raw_after = np.asarray(entry["after"], dtype=np.float64)
    mean_before, mean_after = _window_mean(raw_before), _window_mean(raw_after)
    before, after = raw_before - mean_before, raw_after - mean_after
    fig = Figure(figsize=(12, 3.8))
    ax = fig.subplots()
    ax.plot(t, before, color="#9e9e9e", lw=1.0, label="before (input, less its window mean)")
    ax.plot(t, after, color="#0d47a1", lw=1.0, label="after (zero-phase filtered, less its window mean)")
    caption = (f"Both traces are drawn less their mean over the window shown (input {mean_before:.4g}, output "
               f"{mean_after:.4g}, in input units), so that an offset the filter removes does not part them. ")
    i = largest_excursion(raw_before)
    if i is not None:
        ax.axvline(t[i], color="#c62828", ls="--", lw=0.8,
                   label=f"largest |input - window mean| at {t[i]:.6g} s")
    lag = _lag_of_peak(before, after)
    if lag is not None and t.size > 1:
        dt = float(np.median(np.diff(t)))
        caption += (f"Cross-correlation of output against input peaks at a lag of {samples_text(lag)} "
                    f"({lag * dt:.3g} s)" + (": no time shift." if lag == 0 else "."))
    # Wrapped to the figure's width: the label names the file, channel, samples and t = 0
    label = textwrap.fill(str(entry.get("file", "")), OVERLAY_TITLE_CHARS)
    ax.set_title(f"Before and after around the largest transient\n{label}", fontsize=10)
    ax.set_xlabel("Time (s)")
    ax.set_ylabel("Amplitude (input units)")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    return fig, caption


# ----------------------------------------------------------------------------- HTML


_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:2em auto;max-width:1250px;
color:#212121;line-height:1.45;padding:0 1em}
h1{font-size:1.6em;border-bottom:2px solid #0d47a1;padding-bottom:.2em}
h2{font-size:1.3em;margin-top:2em;border-bottom:1px solid #bdbdbd}
h3{font-size:1.1em;margin-top:1.5em}
table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
th,td{border:1px solid #cfd8dc;padding:.25em .5em;text-align:left;vertical-align:top}
th{background:#eceff1}
td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1em 0}
figure img{max-width:100%;height:auto;border:1px solid #eceff1}
figcaption{font-size:.9em;color:#455a64}
.cautions{background:#fff8e1;border-left:5px solid #f9a825;padding:.6em 1.2em}
.status{display:inline-block;padding:0 .5em;border-radius:3px;color:#fff}
.muted{color:#757575}
.notices{background:#ffebee;border-left:5px solid #c62828;padding:.6em 1.2em;font-weight:600}
"""


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _fmt(value: Any, digits: int = 6) -> str:
    if value is None:
        return "-"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return f"{v:.{digits}g}" if math.isfinite(v) else ("-" if math.isnan(v) else str(v))
    return str(value)


def _img(png: bytes, alt: str, caption: str = "") -> str:
    data = base64.b64encode(png).decode("ascii")
    cap = f"<figcaption>{_esc(caption)}</figcaption>" if caption else ""
    return f'<figure><img alt="{_esc(alt)}" src="data:image/png;base64,{data}">{cap}</figure>'


def _value_html(value: Any, depth: int = 0) -> str:
    """A value of a report dict as HTML (nested dicts and lists of dicts become tables)."""
    if isinstance(value, Mapping):
        if not value:
            return "-"
        rows = "".join(f"<tr><th>{_esc(k)}</th><td>{_value_html(v, depth + 1)}</td></tr>" for k, v in value.items())
        return f"<table>{rows}</table>"
    if isinstance(value, (list, tuple, np.ndarray)):
        items = list(value)
        if not items:
            return "-"
        if all(isinstance(i, Mapping) for i in items):
            cols: list[str] = []
            for i in items:
                cols += [str(k) for k in i if str(k) not in cols]
            head = "".join(f"<th>{_esc(c)}</th>" for c in cols)
            body = "".join(
                "<tr>" + "".join(f"<td>{_value_html(dict(i).get(c), depth + 1)}</td>" for c in cols) + "</tr>"
                for i in items
            )
            return f"<table><tr>{head}</tr>{body}</table>"
        if all(isinstance(i, (list, tuple)) and len(i) == 2 for i in items):
            return "; ".join(f"{_esc(_fmt(a))} to {_esc(_fmt(b))}" for a, b in items[:12]) + (
                f" ... ({len(items)} ranges)" if len(items) > 12 else ""
            )
        shown = ", ".join(_esc(_fmt(i)) if not isinstance(i, (list, tuple, Mapping)) else _value_html(i, depth + 1)
                          for i in items[:12])
        more = f" ... ({len(items)} values)" if len(items) > 12 else ""
        return shown + more
    return _esc(_fmt(value))


def _design_label(design: Design) -> str:
    spec = design.spec
    if spec.kind == UNRECORDED_KIND:
        return (f"{design.family}, order {design.order} per pass, {design.sample_rate_hz:g} Hz sample rate "
                "(response spec not recorded)")
    return (f"{spec.kind} {design.family}, order {design.order} per pass, "
            f"{design.sample_rate_hz:g} Hz sample rate")


def _worst_html(worst: Any) -> str:
    if not isinstance(worst, Mapping):
        return _value_html(worst)
    parts = []
    for key, value in worst.items():
        if value is None:
            continue
        parts.append(f"{_esc(key)}: {_esc(_fmt(value, 4))}{_esc(_FIGURE_UNITS.get(str(key), ''))}")
    return "<br>".join(parts) if parts else "-"


_FILE_COLUMNS: tuple[tuple[str, str], ...] = (
    ("file", "File"),
    ("stream", "Stream"),
    ("blocks_done", "Blocks done"),
    ("blocks_failed", "Blocks failed"),
    ("blocks_cancelled", "Blocks cancelled"),
    ("worst", "Worst figures"),
    ("edge_zones", "Edge zones"),
    ("complete", "Complete"),
)


_LIMIT_UNITS: dict[str, str] = {
    "dB": "dB", "deg": "degrees", "relative": "relative to the segment's input peak", "samples": "samples (count)",
    "fraction": "fraction of the passband bins with input energy",
}


def _limits_html(rules: Sequence[Mapping[str, Any]] | None, source: str) -> str:
    """One design's check limits (``Limit.to_dict()`` rows) as a table, with where the
    ``[checks]`` settings come from and why a figure short of the spec can pass."""
    if rules is None:
        return ('<p class="muted">Check limits not shown: the response spec these outputs were designed from was not '
                "recorded, so the passband and stopband limits they were graded against are not known.</p>")
    head = "".join(f"<th>{_esc(h)}</th>" for h in ("Figure", "Unit", "Warns", "Fails", "How the limit is made"))
    rows = []
    for r in rules:
        side = "below " if r.get("below") else "beyond ±" if r.get("either_way") else "above "
        cells = [_esc(r.get("label")), _esc(_LIMIT_UNITS.get(str(r.get("unit")), r.get("unit")))]
        cells += [_esc(f"{side}{_fmt(r.get(k), 4)}") if r.get(k) is not None else "-" for k in ("warn", "fail")]
        cells.append(_esc(r.get("basis")))
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return (f"<p>The limits each block's figures are graded against (pass / warn / fail; from {_esc(source)}). "
            "NaN figures are not measured and not graded.</p>"
            f"<table><tr>{head}</tr>{''.join(rows)}</table><p>{_esc(LIMITS_EXPLAINED)}</p>")


def _file_table(files: Sequence[Mapping[str, Any]]) -> str:
    if not files:
        return '<p class="muted">No files.</p>'
    known = {k for k, _ in _FILE_COLUMNS} | {"blocks_total"}
    extra: list[str] = []
    for f in files:
        extra += [str(k) for k in f if k not in known and str(k) not in extra]
    head = "".join(f"<th>{_esc(label)}</th>" for _, label in _FILE_COLUMNS) + "".join(
        f"<th>{_esc(k)}</th>" for k in extra
    )
    rows = []
    for f in files:
        cells = []
        for key, _ in _FILE_COLUMNS:
            value = f.get(key)
            if key == "blocks_done" and f.get("blocks_total") is not None:
                cells.append(f'<td class="num">{_esc(_fmt(value))} / {_esc(_fmt(f.get("blocks_total")))}</td>')
            elif key == "worst":
                cells.append(f"<td>{_worst_html(value)}</td>")
            elif key in ("blocks_done", "blocks_failed", "blocks_cancelled"):
                cells.append(f'<td class="num">{_esc(_fmt(value))}</td>')
            else:
                cells.append(f"<td>{_value_html(value)}</td>")
        cells += [f"<td>{_value_html(f.get(k))}</td>" for k in extra]
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _summary(designs: Sequence[Design], files: Sequence[Mapping[str, Any]], blocks: Sequence[Mapping[str, Any]],
             left_out: int = 0, failed_inputs: int = 0) -> str:
    """The summary: designs, output files, blocks, and the inputs the last run left out or
    failed (``left_out``, ``failed_inputs``); then the blocks by status."""
    counts = {name: 0 for name in STATUS_COLORS}
    for b in blocks:
        counts[_status_name(b.get("status"))] += 1
    badges = " ".join(
        f'<span class="status" style="background:{STATUS_COLORS[n]}">{_esc(n)}: {c}</span>'
        for n, c in counts.items()
    )
    complete = sum(1 for f in files if f.get("complete"))
    stopped = (f'<p>{counts["cancelled"]} block(s) cancelled: a run was stopped before they finished. They are '
               "not done, nothing failed in them, and the next run does them.</p>" if counts["cancelled"] else "")
    listed = _esc(' (listed below, under "Left out, failed or missing")') if left_out or failed_inputs else ""
    return (f"<p>{len(designs)} design(s), {len(files)} file(s) ({complete} complete), "
            f"{len(blocks)} block(s); inputs left out by the last run: {left_out}, failed: {failed_inputs}"
            f"{listed}.</p><p>{badges}</p>{stopped}")


def _listed_html(sections: Sequence[tuple[str, Sequence[str]]]) -> str:
    """Titled lists, each capped at :data:`LISTED` entries with a count of the rest."""
    parts = []
    for title, entries in sections:
        if not entries:
            continue
        parts.append(f"<h3>{_esc(title)}: {len(entries)}</h3><ul>")
        parts += [f"<li>{_esc(e)}</li>" for e in entries[:LISTED]]
        if len(entries) > LISTED:
            parts.append(f'<li class="muted">... and {len(entries) - LISTED} more '
                         "(<code>twinpass status --json</code> lists them all)</li>")
        parts.append("</ul>")
    if not parts:
        return '<p class="muted">Nothing left out, failed, gone or missing, and no notes, at the last run.</p>'
    return "".join(parts)


def _umask() -> int:
    """The process's file mode creation mask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def render_report(
    path: str | os.PathLike[str],
    *,
    design_reports: list[dict[str, Any]],
    designs: list[Design],
    files: list[dict[str, Any]],
    blocks: list[dict[str, Any]],
    overlays: list[dict[str, Any]],
    title: str,
    cautions: list[str],
    notices: Sequence[str] = (),
    design_notes: Sequence[str] = (),
    listed: Sequence[tuple[str, Sequence[str]]] | None = None,
    provenance: Sequence[tuple[str, str]] = (),
    limits: Sequence[Sequence[Mapping[str, Any]] | None] = (),
    limits_from: str = "the [checks] settings",
    left_out: int = 0,
    failed_inputs: int = 0,
) -> Path:
    """Write the run report as one self-contained HTML file.

    Parameters
    ----------
    path : path-like
        The HTML file to write (its folder is created; an existing file is replaced).
    design_reports : list of dict
        One ``response_report`` dict per design (``designs[i].report`` is used where
        missing); shown as the design report tables.
    designs : list of Design
        Designs to draw: overall response against the spec mask beside the per-pass
        response, zero overall phase against the per-pass phase, two-pass impulse response.
    files : list of dict
        File table rows: ``file``, ``stream``, ``blocks_done`` (with optional
        ``blocks_total``), ``blocks_failed``, ``worst`` (a ``summarise`` dict),
        ``edge_zones``, ``complete``; further keys become extra columns.
    blocks : list of dict
        Check map entries: ``stream``, ``file``, ``start_time_s`` (s since the earliest
        start, or absolute epoch seconds), ``duration_s`` (s), ``status`` (a status code
        or pass/warn/fail/pending/error/cancelled).
    overlays : list of dict
        ``file``, ``t`` (s), ``before`` and ``after`` (1-D, same length as ``t``; drawn each
        less its mean over the window, as the caption says).
    title : str
        Page title.
    cautions : list of str
        Cautions shown after :data:`DEFAULT_CAUTIONS` (duplicates dropped).
    notices : sequence of str
        Shown first, above the summary, in a box of their own (e.g. the configuration no
        longer asks for the design the outputs were filtered with).
    design_notes : sequence of str
        One per design (where missing, none): what the design was used for and where it
        comes from, shown under the design's heading.
    listed : sequence of (title, entries), optional
        The section "Left out, failed or missing" (inputs left out, failed, gone, missing
        chunks, notes), each list capped at :data:`LISTED` with a count of the rest; omitted
        when None.
    provenance : sequence of (label, text)
        The section "Provenance" (store, last run, library versions, outputs written with
        other versions); omitted when empty.
    limits : sequence
        One per design (where missing, none shown): the limits its blocks are graded against,
        ``Limit.to_dict()`` rows of :func:`twinpass.core.checks.grading_limits`, or None when
        they are not known (the design's response spec was not recorded).
    limits_from : str
        Where the ``[checks]`` settings of the limits come from, in words.
    left_out, failed_inputs : int
        Inputs the last run left out (invalid, or no filter for their rate) and inputs it
        failed, counted in the summary.

    Returns
    -------
    Path
        The written file.

    Notes
    -----
    Images: three per design, one check map when ``blocks`` is not empty, one per overlay.
    """
    out = Path(path)
    parts: list[str] = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_esc(title)}</h1>",
        f'<p class="muted">Written {_esc(_dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC"))}.</p>',
    ]
    if notices:
        parts.append('<div class="notices"><ul>' + "".join(f"<li>{_esc(n)}</li>" for n in notices) + "</ul></div>")
    parts += [
        "<h2>Summary</h2>",
        _summary(designs, files, blocks, left_out, failed_inputs),
        "<h2>Cautions</h2>",
        '<div class="cautions"><ul>',
    ]
    shown: list[str] = []
    for c in list(DEFAULT_CAUTIONS) + [str(c) for c in cautions]:
        if c not in shown:
            shown.append(c)
    parts += [f"<li>{_esc(c)}</li>" for c in shown]
    parts.append("</ul></div>")

    parts.append("<h2>Filter design</h2>")
    if not designs:
        parts.append('<p class="muted">No designs.</p>')
    for i, design in enumerate(designs):
        parts.append(f"<h3>Design {i + 1}: {_esc(_design_label(design))}</h3>")
        if i < len(design_notes) and design_notes[i]:
            parts.append(f"<p>{_esc(design_notes[i])}</p>")
        parts.append("<h4>Overall response</h4>")
        parts.append(_img(_png(_response_figure(design)), "overall and per-pass response",
                          "Overall two-pass gain |H|^2 against the spec mask (green: allowed ripple band; "
                          "red: above the stopband floor), its passband in detail, and the gain of one pass."))
        parts.append("<h4>Phase</h4>")
        parts.append(_img(_png(_phase_figure(design)), "phase",
                          "Forward-backward filtering cancels the phase: the overall phase is zero at "
                          "every frequency, while one pass alone shifts the phase."))
        if i < len(limits):
            parts.append("<h4>Check limits</h4>")
            parts.append(_limits_html(limits[i], limits_from))
        parts.append("<h4>Impulse response</h4>")
        parts.append(_img(_png(_impulse_figure(design)), "two-pass impulse response",
                          "The two-pass impulse response is symmetric about t = 0: the response starts "
                          "before the impulse (pre-response). Dashed: the effective length (the halo)."))
    parts.append("<h3>Design report</h3>")
    reports = [design_reports[i] if i < len(design_reports) else d.report for i, d in enumerate(designs)]
    reports += list(design_reports[len(designs):])
    if not reports:
        parts.append('<p class="muted">No design report.</p>')
    for i, rep in enumerate(reports):
        parts.append(f"<p><b>Design {i + 1}</b></p>{_value_html(rep)}")

    parts.append("<h2>Block check map</h2>")
    if blocks:
        parts.append(_img(_png(_block_map_figure(blocks)), "block check map",
                          "Each rectangle is one block of one stream, coloured by the outcome of its checks; "
                          "cancelled: a run was stopped before the block finished (not done, nothing failed; "
                          "the next run does it)."))
    else:
        parts.append('<p class="muted">No blocks recorded.</p>')

    if listed is not None:
        parts.append("<h2>Left out, failed or missing</h2>")
        parts.append(_listed_html(listed))

    parts.append("<h2>Before and after filtering</h2>")
    if not overlays:
        parts.append('<p class="muted">No overlay.</p>')
    for entry in overlays:
        fig, caption = _overlay_figure(entry)
        parts.append(_img(_png(fig), f"before and after: {entry.get('file', '')}", caption))

    parts.append("<h2>Files</h2>")
    parts.append(_file_table(files))
    if provenance:
        parts.append("<h2>Provenance</h2><table>"
                     + "".join(f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in provenance)
                     + "</table>")
    parts.append("</body></html>")

    text = "\n".join(parts)
    tmp: str | None = None
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".html", dir=out.parent)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        # mkstemp makes the file readable by its owner alone; the report is for handing on,
        # so it gets the permissions any new file gets under the process's umask.
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, out)
    except OSError as exc:
        if tmp is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        raise TwinpassError(
            f"{out}: cannot write the report ({exc.strerror or exc}); choose a writable folder."
        ) from exc
    return out
