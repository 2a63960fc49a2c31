"""Gather what the HTML report shows from a configuration and its output store."""

from __future__ import annotations

import datetime as _dt
from pathlib import Path
from typing import Any

import numpy as np

from .config import JobConfig
from .core import checks as _checks
from .core.design import design_filter
from .errors import TwinpassError
from .io.readers.registry import open_recording
from .io.store import OutputStore
from .report import DEFAULT_CAUTIONS, render_report
from .status import collect_status

OVERLAY_SECONDS = 4.0
"""Width of the before/after overlay around the largest transient (s)."""


def default_report_path(cfg: JobConfig) -> Path:
    """``twinpass-report.html`` beside a local store; in the working folder otherwise."""
    loc = cfg.store_location
    if "://" in loc:
        return Path.cwd() / "twinpass-report.html"
    return Path(loc).parent / "twinpass-report.html"


def _epoch(iso: str | None) -> float | None:
    if not iso:
        return None
    t = _dt.datetime.fromisoformat(iso)
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.timezone.utc)
    return t.timestamp()


def _largest_transient(cfg: JobConfig, store: OutputStore, names: list[str]) -> dict[str, Any] | None:
    """Input and output around the block input peak of the whole store (first channel peaking).

    Files whose input can no longer be read (removed from the archive since, or unreadable
    now) are passed over for the next largest peak; None when no file has one.
    """
    peak_col = list(_checks.FIGURES).index("peak_in")
    peaks: list[tuple[float, str, int, int]] = []
    for name in names:
        try:
            t = store.read_block_table(name, figures=True, seams=False)
        except Exception:
            continue
        if t.figures is None or not np.isfinite(t.figures[..., peak_col]).any():
            continue
        figs = np.nan_to_num(t.figures[..., peak_col], nan=-1.0)
        b, ch = np.unravel_index(int(np.argmax(figs)), figs.shape)
        peaks.append((float(figs[b, ch]), name, int(b), int(ch)))
    for _, name, b, ch in sorted(peaks, key=lambda p: -p[0]):
        attrs = store.array_attrs(name)
        fs = float(attrs["sample_rate_hz"])
        span = store.read_block_table(name, figures=False, seams=False).span[b]
        src = cfg.archive_root / attrs["source"]
        try:
            with open_recording(str(src)) as rec:
                x = rec.read(int(span[0]), int(span[1]))[:, ch]
                i = int(span[0]) + int(np.argmax(np.abs(x - np.median(x))))
                half = int(OVERLAY_SECONDS * fs / 2)
                a, z = max(0, i - half), min(rec.info.frames, i + half)
                before = rec.read(a, z)[:, ch]
        except (TwinpassError, OSError):
            continue
        after = store.read(name, a, z)[:, ch].astype(np.float64)
        t = (np.arange(a, z) - i) / fs
        return {"file": f"{attrs['source']} (channel {ch}, samples {a}-{z}; t = 0 at the input's largest excursion)",
                "t": t, "before": before - np.mean(before), "after": after}
    return None


class _ReadOnce:
    """A read-only :class:`OutputStore` whose block tables and array attributes are read once.

    The report looks at each file's table and attributes several times (status, block map,
    largest transient); on archives of thousands of files every Zarr read counts.
    """

    def __init__(self, store: OutputStore) -> None:
        self._store = store
        self._tables: dict[str, Any] = {}
        self._attrs: dict[str, dict[str, Any]] = {}

    def __getattr__(self, name: str) -> Any:
        return getattr(self._store, name)

    def read_block_table(self, name: str, *, figures: bool = True, seams: bool = True) -> Any:
        if seams:  # not kept: the report does not show seams
            return self._store.read_block_table(name, figures=figures, seams=True)
        if name not in self._tables:
            self._tables[name] = self._store.read_block_table(name, figures=True, seams=False)
        return self._tables[name]

    def array_attrs(self, name: str) -> dict[str, Any]:
        if name not in self._attrs:
            self._attrs[name] = self._store.array_attrs(name)
        return self._attrs[name]


def write_report(cfg: JobConfig, output: str | Path | None = None) -> Path:
    """Render the HTML report of ``cfg``'s store; returns the written path."""
    store: Any = _ReadOnce(OutputStore.open(cfg.store_location, mode="r"))
    status = collect_status(store)
    rates = sorted({float(store.array_attrs(f["name"])["sample_rate_hz"]) for f in status["files"]})
    designs = [design_filter(cfg.response, fs, cfg.processing.tolerance) for fs in rates]
    files, blocks = [], []
    for f in status["files"]:
        files.append({"file": f["source"], "stream": f["stream"], "blocks_done": f["blocks_done"],
                      "blocks_total": f["blocks"], "blocks_failed": f["blocks_fail"] + f["blocks_error"],
                      "worst": f["worst"], "edge_zones": f["edge_zone_samples"], "complete": f["complete"],
                      "checks": f["checks"]})
        attrs = store.array_attrs(f["name"])
        fs = float(attrs["sample_rate_hz"])
        t0 = _epoch(attrs.get("start_time")) or 0.0
        try:
            t = store.read_block_table(f["name"], figures=False, seams=False)
        except Exception:
            continue
        for (s, e), st in zip(t.span.tolist(), t.status.tolist()):
            blocks.append({"stream": f["stream"], "file": f["source"], "start_time_s": t0 + s / fs,
                           "duration_s": (e - s) / fs, "status": int(st)})
    overlay = _largest_transient(cfg, store, [f["name"] for f in status["files"]])
    path = Path(output) if output else default_report_path(cfg)
    return render_report(
        path, design_reports=[d.report for d in designs], designs=designs, files=files, blocks=blocks,
        overlays=[overlay] if overlay else [], title=f"twinpass report: {Path(cfg.source).name}",
        cautions=list(DEFAULT_CAUTIONS),
    )
