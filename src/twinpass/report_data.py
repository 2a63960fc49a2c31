"""Gather what the HTML report shows from a configuration and its output store."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np

from .config import JobConfig
from .core import checks as _checks
from .core.design import design_filter, response_report
from .core.types import Design, ResponseSpec
from .errors import TwinpassError
from .io.readers.registry import open_recording
from .io.store import OutputStore
from .report import DEFAULT_CAUTIONS, largest_excursion, render_report
from .core.text import named_list
from .status import (LISTED, collect_status, design_limits, error_groups, failure_groups, parse_spec,
                     root_spec, run_checks, stored_design, usable_filter)

OVERLAY_SECONDS = 4.0
"""Width of the before/after overlay around the largest transient (s)."""


REPORT_SUFFIX = ".report.html"
"""The default report of a store is named after it: ``filtered.zarr`` -> ``filtered.report.html``."""


def default_report_path(cfg: JobConfig) -> Path:
    """The store's name with :data:`REPORT_SUFFIX` for its suffix (``demo-out/filtered.zarr``
    -> ``demo-out/filtered.report.html``): beside a local store, in the working folder for a
    store at a URL. Stores side by side thus keep reports of their own."""
    loc = cfg.store_location
    name = loc.rstrip("/").rsplit("/", 1)[-1] if "://" in loc else Path(loc).name
    stem = (Path(name).stem if Path(name).suffix.lower() == ".zarr" else name) or "twinpass"
    folder = Path.cwd() if "://" in loc else Path(loc).parent
    return folder / f"{stem}{REPORT_SUFFIX}"


def report_failure(cfg: JobConfig, exc: BaseException) -> str:
    """What to say when the report of a run that has finished could not be written (``exc``
    raised by :func:`write_report`): the report's path and the cause, that the run stands,
    and how to write the report once the cause is fixed."""
    path = str(default_report_path(cfg))
    detail = str(exc) if isinstance(exc, TwinpassError) else f"cannot make the report ({type(exc).__name__}: {exc})"
    if path not in detail:
        detail = f"{path}: {detail}"
    config = cfg.source if Path(cfg.source).is_file() else "CONFIG"
    return (f"{detail.rstrip('.')}. The run itself is finished and recorded (`twinpass status "
            f"{cfg.store_location}`); once that is fixed, write the report with `twinpass report {config}` "
            "(add --output FILE to write it elsewhere).")


def _epoch(iso: str | None) -> float | None:
    if not iso:
        return None
    t = _dt.datetime.fromisoformat(iso)
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.timezone.utc)
    return t.timestamp()


def _excursion_window(rec: Any, start: int, stop: int, ch: int, half: int) -> tuple[int, int, int, np.ndarray]:
    """The overlay's window of one channel: ``(a, z, i, x)``, samples ``[a, z)`` of the file
    (``x`` their values) and ``i``, the file sample of the input's largest excursion
    (:func:`twinpass.report.largest_excursion`) within that same window.

    The window (``half`` samples either side, clipped to the file) is centred on the largest
    excursion of the block ``[start, stop)``; ``i`` is then looked for again within the window,
    from the window's own mean, as the overlay draws it. On a drifting input the two differ
    and ``i`` need not be the window's centre, but it is always the sample the overlay's
    marker shows, so its t = 0 and its marker agree.
    """
    x = rec.read(start, stop)[:, ch]
    centre = start + (largest_excursion(x) or 0)
    a, z = max(0, centre - half), min(rec.info.frames, centre + half)
    x = rec.read(a, z)[:, ch]
    return a, z, a + (largest_excursion(x) or 0), x


def _largest_transient(cfg: JobConfig, store: OutputStore, names: list[str]) -> dict[str, Any] | None:
    """Input and output around the block input peak of the whole store (first channel peaking),
    as recorded (the report draws both less their mean over the window, and says so), t = 0
    at the input's largest excursion from that mean (:func:`_excursion_window`).
    Channels are counted from 0, as in twinpass's messages; samples are the file's, inclusive.

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
                a, z, i, before = _excursion_window(rec, int(span[0]), int(span[1]), ch,
                                                    int(OVERLAY_SECONDS * fs / 2))
            after = store.read(name, a, z)[:, ch].astype(np.float64)  # a damaged chunk: a StoreError
        except (TwinpassError, OSError):
            continue
        t = (np.arange(a, z) - i) / fs
        return {"file": f"{attrs['source']} (channel {ch}, counted from 0; samples {a}-{z - 1}; t = 0 at the "
                        "input's largest excursion from its mean over the window shown)",
                "t": t, "before": np.asarray(before, dtype=np.float64), "after": after}
    return None


_SPEC_FIELDS: tuple[tuple[str, str, str], ...] = (
    ("passband_hz", "passband", " Hz"),
    ("stopband_hz", "stopband", " Hz"),
    ("passband_ripple_db", "ripple", " dB"),
    ("stopband_attenuation_db", "attenuation", " dB"),
    ("order", "order", " per pass"),
    ("cutoff_hz", "cutoff", " Hz"),
    ("notch_hz", "notch", " Hz"),
    ("notch_width_hz", "notch width", " Hz"),
    ("notch_q", "notch Q", ""),
)


def describe_response(spec: Mapping[str, Any], tolerance: float | None = None) -> str:
    """One line naming a response spec (a ``ResponseSpec.to_dict()``): kind, family, edges in
    Hz, overall ripple and attenuation in dB, order, cutoff or notch, and the tolerance."""
    parts = [f"a {spec.get('kind')} response ({spec.get('family')} family)"]
    for key, label, unit in _SPEC_FIELDS:
        v = spec.get(key)
        if v is None:
            continue
        text = "-".join(f"{float(x):g}" for x in v) if isinstance(v, (list, tuple)) else f"{v:g}"
        parts.append(f"{label} {text}{unit}" + (f" ({spec.get('cutoff_means')})" if key == "cutoff_hz" else ""))
    if tolerance is not None:
        parts.append(f"tolerance {tolerance:g}")
    return ", ".join(parts)


def _describe_filter(design: Design) -> str:
    return (f"{design.family}, order {design.order} per pass at {design.sample_rate_hz:g} Hz, "
            f"effective length {design.effective_length} samples")


def _same_filter(design: Design, recorded: Design) -> bool:
    """Whether two designs filter alike: the same coefficients (exactly) and tolerance."""
    mine, theirs = (design.sos, recorded.sos) if recorded.sos is not None else (design.taps, recorded.taps)
    return (mine is not None and theirs is not None and np.shape(mine) == np.shape(theirs)
            and bool(np.array_equal(mine, theirs)) and float(design.tolerance) == float(recorded.tolerance))


def outputs_counted(n: int, complete: int, sample_rate_hz: float) -> str:
    """``"10 outputs at 200 Hz, 7 complete"``: outputs counted with how many of them are complete."""
    if n == 1:
        return f"1 output at {sample_rate_hz:g} Hz, " + ("complete" if complete else "not complete")
    state = "all complete" if complete == n else "none complete" if complete == 0 else f"{complete} complete"
    return f"{n} outputs at {sample_rate_hz:g} Hz, {state}"


@dataclass
class OutputDesign:
    """A design the store's outputs were filtered with, and the outputs it served."""

    design: Design
    sources: list[str] = field(default_factory=list)
    """Inputs (relative paths) whose outputs were filtered with it."""
    spec: dict[str, Any] | None = None
    """The response spec it was designed from, where known (``ResponseSpec.to_dict()``)."""
    recorded: bool = True
    """False: the store recorded no design for these outputs (drawn from the configuration)."""
    complete: int = 0
    """How many of those outputs are complete (every block done, see ``twinpass status``)."""

    def note(self) -> str:
        """What the design was used for and where the report's figures of it come from."""
        used = (f"Filtered {outputs_counted(len(self.sources), self.complete, self.design.sample_rate_hz)} "
                f"(e.g. {self.sources[0]}).")
        if not self.recorded:
            return (f"{used} The store recorded no design for these outputs (written by an older twinpass): "
                    "drawn from the configuration as it is now, which may not be what they were filtered with.")
        if self.spec is None:
            return (f"{used} Drawn from the coefficients recorded with the outputs; the response spec they were "
                    "designed from was not recorded, so no spec mask is drawn.")
        return (f"{used} Drawn from the coefficients recorded with the outputs, designed from "
                f"{describe_response(self.spec, self.design.tolerance)} (the spec recorded in the store; "
                "designing from it again gives exactly the recorded coefficients).")


def _recorded_design(fs: float, filt: Mapping[str, Any], spec: ResponseSpec | None) -> tuple[Design, bool]:
    """The design an output was filtered with, from its ``filter`` attribute; (design, spec known?).

    The drawn response always comes from the recorded coefficients. ``spec`` is the response
    spec recorded with the output (its ``filter.response``; outputs written before that was
    recorded have only the store's last run's, in the root attributes). It is attached (for
    the mask and the design report) only when designing from it again at ``fs`` with the
    recorded tolerance gives exactly the recorded coefficients: then it is the spec these
    outputs were designed from. Otherwise the design is drawn without a mask.
    """
    recorded = stored_design(fs, filt)
    if spec is not None:
        try:
            again = design_filter(spec, fs, recorded.tolerance)
        except TwinpassError:
            again = None
        if again is not None and _same_filter(again, recorded) and again.effective_length == recorded.effective_length:
            return again, True
    try:
        report = response_report(recorded)
    except (TwinpassError, ValueError, ArithmeticError):
        report = {"family": recorded.family, "order_per_pass": recorded.order, "sample_rate_hz": float(fs),
                  "effective_length_samples": recorded.effective_length, "tolerance": recorded.tolerance}
    report["response_spec"] = "not recorded"
    return dataclasses.replace(recorded, report=report), False


def output_designs(cfg: JobConfig, store: Any,
                   files: Sequence[Mapping[str, Any]]) -> tuple[list[OutputDesign], list[str]]:
    """Each distinct design the store's outputs were filtered with, in order of sample rate,
    and notices of outputs whose design cannot be shown.

    Outputs are grouped by their recorded design digest, and digests whose coefficients and
    tolerance are the same (they differ only in edge handling or version) are shown as one.
    Outputs with no recorded design (older stores) fall back to the configuration's design
    as it is now, marked as such (and named in a notice).
    """
    spec = root_spec(store.read_root_info())
    by_digest: dict[tuple[float, str | None], list[str]] = {}
    filters: dict[tuple[float, str | None], Mapping[str, Any]] = {}
    complete = {str(f["source"]) for f in files if f.get("complete")}
    for f in files:
        attrs = store.array_attrs(f["name"])
        fs = float(attrs["sample_rate_hz"])
        filt = attrs.get("filter")
        usable = usable_filter(filt)
        key = (fs, str(attrs.get("design_digest")) if usable else None)
        by_digest.setdefault(key, []).append(str(f["source"]))
        if usable:
            filters.setdefault(key, cast(Mapping[str, Any], filt))
    out: dict[tuple[float, str], OutputDesign] = {}
    notices: list[str] = []
    for (fs, digest), sources in sorted(by_digest.items(), key=lambda kv: (kv[0][0], kv[0][1] is None)):
        if digest is None:
            try:
                design = design_filter(cfg.response, fs, cfg.processing.tolerance)
            except TwinpassError as e:
                notices.append(f"{len(sources)} output(s) at {fs:g} Hz (e.g. {sources[0]}) have no design recorded "
                               f"in the store, and the configuration's response cannot be designed at {fs:g} Hz "
                               f"({e}): no design is drawn for them.")
                continue
            notices.append(f"{len(sources)} output(s) at {fs:g} Hz (e.g. {sources[0]}) have no design recorded in "
                           "the store (written by an older twinpass): their design is drawn from the configuration "
                           "as it is now, which may not be what they were filtered with.")
            out[(fs, "configuration")] = OutputDesign(design, sources, cfg.response.to_dict(), recorded=False,
                                                      complete=len(complete.intersection(sources)))
            continue
        filt = filters[(fs, digest)]
        same = json.dumps([filt.get("sos"), filt.get("taps"), filt.get("tolerance")])
        if (fs, same) in out:
            out[(fs, same)].sources += sources
            out[(fs, same)].complete += len(complete.intersection(sources))
            continue
        own = parse_spec(filt.get("response")) or spec  # recorded with the output itself, else the last run's
        design, known = _recorded_design(fs, filt, own)
        out[(fs, same)] = OutputDesign(design, list(sources), own.to_dict() if known and own else None,
                                       complete=len(complete.intersection(sources)))
    return list(out.values()), notices


def design_notices(cfg: JobConfig, designs: Sequence[OutputDesign]) -> list[str]:
    """Notices for the top of the report: outputs filtered with more than one design, and
    outputs filtered with a design other than the one the configuration asks for now."""
    notices: list[str] = []
    if sum(d.recorded for d in designs) > len({d.design.sample_rate_hz for d in designs if d.recorded}):
        notices.append("The outputs were filtered with more than one design (for example, a run after a change "
                       "to the configuration stopped before it refiltered them all): each design is drawn below "
                       "with the outputs it served.")
    asks = describe_response(cfg.response.to_dict(), cfg.processing.tolerance)
    now: dict[float, Design | str] = {}
    for d in designs:
        if not d.recorded:
            continue
        fs = d.design.sample_rate_hz
        if fs not in now:
            try:
                now[fs] = design_filter(cfg.response, fs, cfg.processing.tolerance)
            except TwinpassError as e:
                now[fs] = str(e)
        current = now[fs]
        if isinstance(current, Design) and _same_filter(current, d.design):
            continue
        made = (describe_response(d.spec, d.design.tolerance) + f" ({_describe_filter(d.design)})" if d.spec
                else f"{_describe_filter(d.design)}, tolerance {d.design.tolerance:g} (its response spec was "
                     "not recorded)")
        wants = (f"{asks} ({_describe_filter(current)})" if isinstance(current, Design)
                 else f"{asks}, which cannot be designed at {fs:g} Hz ({current})")
        notices.append(f"The configuration now asks for {wants}; {outputs_counted(len(d.sources), d.complete, fs)}, "
                       f"were filtered with {made}. The figures below show the design the outputs were filtered "
                       "with; rerun to refilter them (twinpass run CONFIG).")
    return notices


def _frames(spans: Sequence[Sequence[int]]) -> str:
    return ", ".join(f"[{a}, {b})" for a, b in spans)


def attention_lists(status: Mapping[str, Any]) -> list[tuple[str, list[str]]]:
    """The report's "Left out, failed or missing" lists from :func:`collect_status`'s result:
    inputs the last run left out (reason; remedy), inputs that failed (reason) and blocks that
    failed (first line of the error, or the figures that failed their checks), outputs whose
    input is gone, outputs with chunk files missing (frame spans [start, stop)), and the last
    run's notes."""
    files = status.get("files") or []
    failed = status.get("failed_inputs") or {}
    return [
        ("Inputs left out by the last run (invalid input; an output made earlier is kept as it was)",
         [f"{k}: {v}" for k, v in sorted((status.get("left_out") or {}).items())]),
        ("Inputs that failed in the last run, by reason",
         [f"{paths[0] if len(paths) == 1 else named_list(paths, LISTED) + f' ({len(paths)} inputs)'}: {reason}"
          for paths, reason in failure_groups(failed)]),
        ("Blocks that failed (the next run tries them again)",
         [f"{f['source']} {blocks}: {msg}" for f in files for blocks, msg in error_groups(f.get("errors") or {})]
         + [f"{k} {line}" for k, v in sorted((status.get("failed_blocks") or {}).items()) for line in v["blocks"]]),
        ("Outputs whose input is no longer in the archive (kept as they were)", list(status.get("gone") or [])),
        ("Outputs with chunk files missing (deleted or lost since written; they read as NaN; the next "
         "run reruns their blocks)",
         [f"{f['source']}: frames {_frames(f['chunks_missing'])}" for f in files if f.get("chunks_missing")]),
        ("Notes of the last run", list(status.get("notes") or [])),
    ]


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


def provenance(store: Any, names: Sequence[str]) -> list[tuple[str, str]]:
    """Rows (label, text) saying which runs and library versions wrote the store's outputs:
    the store, its last run (with its counts of files and blocks), that run's versions, and the outputs whose ``written_by`` names
    other versions (or none, for outputs written before outputs recorded their runs)."""
    info = store.read_root_info()
    runs = [r for r in info.get("runs") or [] if isinstance(r, Mapping)]
    last = runs[-1] if runs else {}
    rows = [("Store", str(store.location))]
    if last:
        stopped = ", stopped before its end" if last.get("interrupted") else ""
        counts = last.get("counts") or {}
        done = "".join(f"{k} {v}, " for k, v in counts.items()) if isinstance(counts, Mapping) else ""
        rows.append(("Last run", f"{last.get('run_id')}, {last.get('start')} to {last.get('end')}{stopped}; "
                                 f"{done}configuration digest {last.get('config_digest')}"))
    now = last.get("versions") or info.get("versions") or {}
    if isinstance(now, Mapping) and now:
        rows.append(("Library versions", ", ".join(f"{k} {v}" for k, v in now.items())))
    other: list[str] = []
    unrecorded = 0
    for name in names:
        entries = [e for e in store.array_attrs(name).get("written_by") or [] if isinstance(e, Mapping)]
        if not entries:
            unrecorded += 1
            continue
        differ = sorted({f"{k} {v} (now {now.get(k)})" for e in entries
                         for k, v in (e.get("versions") or {}).items() if now.get(k) != v})
        if differ:
            other.append(f"{name}: {', '.join(differ)}")
    if other:
        shown = "; ".join(other[:5]) + (f"; and {len(other) - 5} more" if len(other) > 5 else "")
        rows.append(("Outputs written with other versions", f"{len(other)}: {shown}"))
    elif names and unrecorded < len(names):
        rows.append(("Outputs written with other versions", "none"))
    if unrecorded:
        rows.append(("Outputs without a record of their runs",
                     f"{unrecorded} (written before outputs recorded them; see the store's run records)"))
    return rows


def write_report(cfg: JobConfig, output: str | Path | None = None) -> Path:
    """Render the HTML report of ``cfg``'s store; returns the written path."""
    store: Any = _ReadOnce(OutputStore.open(cfg.store_location, mode="r"))
    status = collect_status(store, cfg.checks)
    used, unrecorded = output_designs(cfg, store, status["files"])
    designs = [d.design for d in used]
    checks, checks_from = run_checks(store.read_root_info(), cfg.checks)
    limits = [design_limits(d.design, checks) for d in used]
    files, blocks = [], []
    for f in status["files"]:
        files.append({"file": f["source"], "stream": f["stream"], "blocks_done": f["blocks_done"],
                      "blocks_total": f["blocks"], "blocks_failed": f["blocks_fail"] + f["blocks_error"],
                      "blocks_cancelled": f["blocks_cancelled"],
                      "worst": f["worst"], "edge_zones": f["edge_zone_samples"], "complete": f["complete"],
                      "checks": f["checks"]})
        attrs = store.array_attrs(f["name"])
        fs = float(attrs["sample_rate_hz"])
        t0 = _epoch(attrs.get("start_time")) or 0.0
        try:
            t = store.read_block_table(f["name"], figures=False, seams=False)
        except Exception:
            continue
        # As in `twinpass status`: a block cancelled when a run was stopped is recorded as an
        # error whose text says so; it is not done, but nothing failed in it.
        cancelled = {int(k) for k, v in t.errors.items() if _checks.was_cancelled(v)}
        for i, ((s, e), st) in enumerate(zip(t.span.tolist(), t.status.tolist())):
            blocks.append({"stream": f["stream"], "file": f["source"], "start_time_s": t0 + s / fs,
                           "duration_s": (e - s) / fs, "status": "cancelled" if i in cancelled else int(st)})
    overlay = _largest_transient(cfg, store, [f["name"] for f in status["files"]])
    path = Path(output) if output else default_report_path(cfg)
    return render_report(
        path, design_reports=[d.report for d in designs], designs=designs, files=files, blocks=blocks,
        overlays=[overlay] if overlay else [], title=f"twinpass report: {Path(cfg.source).name}",
        cautions=list(DEFAULT_CAUTIONS), notices=design_notices(cfg, used) + unrecorded, design_notes=[d.note() for d in used],
        listed=attention_lists(status), provenance=provenance(store, [f["name"] for f in status["files"]]),
        limits=limits, limits_from=checks_from, left_out=len(status["left_out"]),
        failed_inputs=len(status["failed_inputs"]),
    )
