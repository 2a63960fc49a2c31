"""The archive's status as recorded in an output store: per stream and file.

Reads only; safe to run while a job is writing (figures may lag the data).
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path
from collections.abc import Mapping, Sequence
from typing import Any, cast

import numpy as np

from .config import ChecksConfig, load_config, parse_response
from .core import checks as _checks
from .core.types import UNRECORDED_KIND, Design, ResponseSpec
from .core.blocks import block_list
from .core.failures import SHOWN
from .core.text import named_list
from .errors import CONFIG_FAILED, StoreError, TwinpassError
from .io.store_input import gone_since
from .io.store_util import RESERVED_PREFIX as RESERVED
from .io.store import OutputStore
from .io.store_lock import LockInfo
from .verify import REMEDY


def open_target(target: str) -> tuple[OutputStore, str]:
    """Open the store named by ``target``: a config file (its [output] store) or a store path/URL."""
    p = Path(target)
    if p.suffix.lower() == ".toml" and "://" not in target and not p.is_dir():
        cfg = load_config(p)  # a missing file is said as a missing configuration, not a missing store
        return OutputStore.open(cfg.store_location, mode="r"), cfg.store_location
    if "://" not in target and p.is_dir() and not (p / RESERVED).is_dir():
        # A group inside a store reads like a store of its own, with no block tables: refuse it.
        store_root = next((q for q in p.resolve().parents if (q / RESERVED).is_dir()), None)
        if store_root is not None:
            raise StoreError(f"{target} is a group inside the output store {store_root}, not a store; give the "
                             f"store itself: twinpass status {store_root}")
    return OutputStore.open(target, mode="r"), target


LISTED = 20
"""Files listed by name under each note of the status table (``--json`` has them all)."""


def error_groups(errors: Mapping[str, str]) -> list[tuple[str, str]]:
    """A file's block errors (block index -> error), the blocks failing with the same error
    together: ``[(blocks, error)]`` in block order, ``blocks`` as :func:`block_list` says them."""
    alike: dict[str, list[int]] = {}
    for b, msg in sorted(errors.items(), key=lambda e: int(e[0])):
        alike.setdefault(msg, []).append(int(b))
    return [(block_list(blocks), msg) for msg, blocks in alike.items()]


def _worst(summary: dict[str, Any], key: str) -> Any:
    v = summary.get(key)
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else v


def parse_spec(doc: Any) -> ResponseSpec | None:
    """A recorded response spec (``ResponseSpec.to_dict()``), None if absent or unusable."""
    if not isinstance(doc, Mapping):
        return None
    try:
        return parse_response(doc, "the store's recorded specification")
    except TwinpassError:
        return None


def root_spec(root: Mapping[str, Any]) -> ResponseSpec | None:
    """The response spec of the store's last run (root ``spec.response``), None if unusable."""
    doc = (root.get("spec") or {}).get("response") if isinstance(root.get("spec"), Mapping) else None
    return parse_spec(doc)


def stored_design(fs: float, filt: Mapping[str, Any], spec: ResponseSpec | None = None) -> Design:
    """The design an output's ``filter`` attribute records (coefficients, tolerance, effective
    length), with ``spec`` for its response spec (None: one of kind :data:`UNRECORDED_KIND`)."""
    sos = np.asarray(filt["sos"], dtype=np.float64) if filt.get("sos") is not None else None
    taps = np.asarray(filt["taps"], dtype=np.float64) if sos is None else None
    order = int(filt.get("order", 0))
    unknown = ResponseSpec(kind=cast(Any, UNRECORDED_KIND), family=cast(Any, str(filt.get("family"))), order=order)
    return Design(spec=spec or unknown, family=str(filt.get("family")), sample_rate_hz=float(fs), order=order,
                  sos=sos, taps=taps, effective_length=int(filt["effective_length_samples"]),
                  tolerance=float(filt["tolerance"]))


def usable_filter(filt: Any) -> bool:
    """Whether an output's ``filter`` attribute records a design (coefficients, tolerance, length)."""
    return (isinstance(filt, Mapping) and ("sos" in filt or "taps" in filt)
            and "tolerance" in filt and "effective_length_samples" in filt)


def run_checks(root: Mapping[str, Any], configured: ChecksConfig | None = None) -> tuple[ChecksConfig, str]:
    """The ``[checks]`` settings blocks were graded with, and where they come from: those the
    store's last run recorded (root ``spec.checks``), else ``configured`` (the configuration
    as it is now), else the defaults."""
    doc = (root.get("spec") or {}).get("checks") if isinstance(root.get("spec"), Mapping) else None
    if isinstance(doc, Mapping):
        names = {f.name for f in dataclasses.fields(ChecksConfig)}
        try:
            recorded = ChecksConfig(**{k: v for k, v in doc.items() if k in names})
            return recorded, "the [checks] settings the store's last run recorded"
        except TypeError:
            pass
    if configured is not None:
        return configured, "the configuration's [checks] (the store recorded none)"
    return ChecksConfig(), "the default [checks] (the store recorded none; give the configuration for its own)"


def design_limits(design: Design, checks: ChecksConfig) -> list[dict[str, Any]] | None:
    """The limits a design's blocks are graded against (:func:`twinpass.core.checks.grading_limits`,
    JSON-ready, one dict per rule); None when the design's response spec is not known."""
    if design.spec.kind == UNRECORDED_KIND:
        return None
    return [lim.to_dict() for lim in _checks.grading_limits(design, checks, design.tolerance).values()]


def _limits(outputs: list[Mapping[str, Any]], root: Mapping[str, Any],
            configured: ChecksConfig | None) -> dict[str, Any]:
    """``limits`` of :func:`collect_status`: per distinct recorded design (sample rate and
    design digest), the outputs it served and its limits; ``outputs`` are the attributes of
    the outputs listed."""
    checks, source = run_checks(root, configured)
    last = root_spec(root)
    designs: dict[tuple[float, str], dict[str, Any]] = {}
    for attrs in outputs:
        filt = attrs.get("filter")
        if not usable_filter(filt):
            continue
        fs = float(attrs["sample_rate_hz"])
        key = (fs, str(attrs.get("design_digest")))
        if key not in designs:
            spec = parse_spec(filt.get("response")) or last
            limits = design_limits(stored_design(fs, filt, spec), checks)
            designs[key] = {"sample_rate_hz": fs, "design_digest": key[1], "outputs": 0, "limits": limits,
                            "note": None if limits is not None else
                            "the response spec these outputs were designed from was not recorded"}
        designs[key]["outputs"] += 1
    return {"checks_from": source, "explained": _checks.LIMITS_EXPLAINED,
            "designs": sorted(designs.values(), key=lambda d: (d["sample_rate_hz"], d["design_digest"]))}


def rate_text(hz: float) -> str:
    """A sample rate in Hz as short text that still tells it from any other: ``"500"``, but
    ``"200.00000001"`` where six significant digits would show two rates alike."""
    short = f"{float(hz):g}"
    return short if float(short) == float(hz) else repr(float(hz))


def limits_line(entry: Mapping[str, Any]) -> str:
    """One design's limits in a line: ``"limits at 500 Hz: passband deviation warn beyond ±0.8 dB, ..."``."""
    rules = entry.get("limits")
    head = f"limits at {rate_text(entry['sample_rate_hz'])} Hz ({entry['outputs']} output(s))"
    if not rules:
        return f"{head}: not known ({entry.get('note')})"
    shown = [r for r in rules if r["figure"] in ("passband_dev_db", "phase_deg", "stopband_att_db", "seam_mismatch")]
    return f"{head}: " + "; ".join(f"{r['label']} {r['rule']}" for r in shown)


def collect_status(store: OutputStore, checks: ChecksConfig | None = None) -> dict[str, Any]:
    """A JSON-ready status: {store, files: [...], totals: {...}, limits: {...}, ...}.

    ``limits``: the limits blocks are graded against, per recorded design (``checks`` is the
    configuration's ``[checks]``, used where the store recorded none)."""
    files = []
    outputs = []  # the attributes of each output listed, for its design's limits
    for name in store.list_arrays():
        attrs = store.array_attrs(name)
        if "source" not in attrs:
            continue
        outputs.append(attrs)
        try:
            t = store.read_block_table(name, figures=True, seams=False)
            counts = t.counts()
            summary = _checks.summarise(t.figures) if t.figures is not None else {}
            # Blocks cancelled when a run was stopped are not done, but nothing failed in them.
            cancelled = {int(k) for k, v in t.errors.items() if _checks.was_cancelled(v)}
            errors = {str(k): v.splitlines()[0] for k, v in t.errors.items() if int(k) not in cancelled}
            grade = _checks.grade_file([None if i in cancelled else s for i, s in enumerate(t.status.tolist())])
        except StoreError:
            counts, summary, errors, grade, cancelled = {}, {}, {}, "incomplete", set()
        n = sum(counts.values())
        done = counts.get("pass", 0) + counts.get("warn", 0)
        marked = attrs.get("complete") is True
        lost = store.absent_chunks(name) if marked else ()
        files.append({
            "name": name, "source": attrs.get("source"), "stream": attrs.get("stream"),
            "segment": attrs.get("segment"), "start_time": attrs.get("start_time"),
            "blocks": n, "blocks_done": done, "blocks_pending": counts.get("pending", 0),
            "blocks_warn": counts.get("warn", 0), "blocks_fail": counts.get("fail", 0),
            "blocks_error": counts.get("error", 0) - len(cancelled), "blocks_cancelled": len(cancelled),
            "checks": grade,
            "complete": marked and not lost,
            "chunks_missing": [list(span) for span in lost],
            "edge_zone_samples": attrs.get("edge_zone_samples"),
            "worst": {k: _worst(summary, k) for k in ("passband_dev_db", "phase_deg", "stopband_att_db",
                                                      "seam_mismatch", "clipped", "nonfinite_out")},
            "errors": errors,
            "input_gone_since": gone_since(attrs),
            "channel_names": attrs.get("channel_names"),
            "units": attrs.get("units"),
        })
    files.sort(key=lambda f: (str(f["stream"]), str(f["start_time"] or ""), f["name"]))
    root = store.read_root_info()
    runs = root.get("runs", [])
    details = store.read_run_details(str(runs[-1].get("run_id"))) if runs else {}
    left_out = {str(k): str(v) for k, v in (details.get("left_out") or {}).items()}
    # the last run's list, and every output marked input_gone (by that run or an earlier one),
    # but for inputs the last run left out (invalid now: listed as such)
    gone = ({str(r) for r in details.get("gone") or []}
            | {str(f["source"]) for f in files if f["input_gone_since"]}) - set(left_out)
    notes = [str(n) for n in details.get("notes") or []]
    retried = {str(k): int(v) for k, v in (details.get("retried") or {}).items()}
    failed_inputs = {str(k): str(v) for k, v in (details.get("failed") or {}).items()}
    failed_blocks = {str(k): {"blocks": [str(b) for b in v.get("blocks") or []], "remedy": str(v.get("remedy") or "")}
                     for k, v in (details.get("failed_blocks") or {}).items() if isinstance(v, Mapping)}
    for f in files:
        src = str(f["source"])
        f["input"] = ("left out at the last run: " + left_out[src] if src in left_out
                      else "no longer in the archive" if src in gone else None)
    totals = {
        "files": len(files),
        "complete": sum(f["complete"] for f in files),
        "incomplete": sum(not f["complete"] for f in files),
        "blocks": sum(f["blocks"] for f in files),
        "blocks_done": sum(f["blocks_done"] for f in files),
        "blocks_failed": sum(f["blocks_fail"] + f["blocks_error"] for f in files),
        "blocks_cancelled": sum(f["blocks_cancelled"] for f in files),
        "checks_failed": sum(f["checks"] == "fail" for f in files),
        "checks_warned": sum(f["checks"] == "warn" for f in files),
        "inputs_left_out": len(left_out),
        "inputs_failed": len(failed_inputs),
    }
    return {"store": store.location, "files": files, "totals": totals, "last_run": runs[-1] if runs else None,
            "lock": store.lock_holder(),
            "runs_total": int(root.get("runs_total", len(runs))),
            "left_out": left_out, "gone": sorted(gone), "notes": notes, "failed_inputs": failed_inputs,
            "failed_blocks": failed_blocks, "retried": retried, "limits": _limits(outputs, root, checks)}


RETRIED_SHOWN = 3
"""Files :func:`retried_line` names (the rest are counted)."""


def failure_groups(failed: Mapping[str, str]) -> list[tuple[list[str], str]]:
    """Failed inputs (path -> reason) failed for the same reason together: ``[(paths,
    reason)]``, paths sorted, each group where its first path comes. One configuration
    error fails every file of a segment, often of every segment, alike."""
    alike: dict[str, list[str]] = {}
    for path, reason in sorted(failed.items()):
        alike.setdefault(reason, []).append(path)
    return [(paths, reason) for reason, paths in alike.items()]


def retried_line(retried: Mapping[str, int]) -> str:
    """One line for the blocks done only after a failed attempt (``retried``: blocks by
    source path, :meth:`twinpass.job.RunResult.retried`); "" when there were none."""
    n = sum(int(v) for v in retried.values())
    if not n:
        return ""
    files = named_list(sorted(retried), RETRIED_SHOWN, " file(s)")
    return f"{n} block(s) succeeded only after a retry: their input may be on a flaky mount (in {files})"


def inputs_left_out_text(totals: Mapping[str, Any]) -> str:
    """The inputs the last run left out and those it failed, from :func:`collect_status`'s
    ``totals``: ``"inputs left out by the last run: 8, failed: 0 (listed below)"``."""
    left_out, failed = int(totals.get("inputs_left_out") or 0), int(totals.get("inputs_failed") or 0)
    return (f"inputs left out by the last run: {left_out}, failed: {failed}"
            + (" (listed below)" if left_out or failed else ""))


def _fmt(v: Any, spec: str = ".3g") -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return format(v, spec)
    return str(v)


def _input_note(f: Mapping[str, Any]) -> str:
    """What the COMPLETE column adds about an output's input: left out by the last run, or gone."""
    if str(f.get("input") or "").startswith("left out"):
        return ", input left out"
    return ", input gone" if f.get("input_gone_since") else ""


def _gone_line(source: str, since: Mapping[str, str | None]) -> str:
    """One output whose input is gone: its source, and since when it is marked so (when it is)."""
    return source + (f" (since {since[source]})" if since.get(source) else "")


def _block_lines(failed: Mapping[str, Any] | None) -> str:
    """A failed file's blocks that failed their checks, one indented line each (leading
    newlines), when the file's one-line reason names only some of them; else ""."""
    blocks = list((failed or {}).get("blocks") or [])
    if len(blocks) <= SHOWN:
        return ""
    more = (f"\n    ... and {len(blocks) - LISTED} more (twinpass status --json lists them all)"
            if len(blocks) > LISTED else "")
    return "".join(f"\n    {b}" for b in blocks[:LISTED]) + more


def _failed_entries(failed: Mapping[str, str], failed_blocks: Mapping[str, Any]) -> list[str]:
    """The status lines of the inputs the last run failed: ``path: reason`` (with the file's
    failed blocks below it), and for a reason several inputs failed for, the reason once
    with the inputs below it (the first :data:`LISTED`, then a count of the rest)."""
    out = []
    for paths, reason in failure_groups(failed):
        if len(paths) == 1:
            out.append(f"{paths[0]}: {reason}" + _block_lines(failed_blocks.get(paths[0])))
            continue
        more = (f"\n    ... and {len(paths) - LISTED} more (twinpass status --json lists them all)"
                if len(paths) > LISTED else "")
        out.append(f"{len(paths)} inputs, all for the same reason: {reason}"
                   + "".join(f"\n    {p}" + _block_lines(failed_blocks.get(p)).replace("\n    ", "\n      ")
                             for p in paths[:LISTED]) + more)
    return out


def _labels_text(files: list[dict[str, Any]]) -> str:
    """The channels of a stream's outputs as their labels say them (``": vertical (m/s^2),
    lateral (m/s^2)"``), when every output of the stream has the same labels; else ""."""
    labels = {(tuple(f.get("channel_names") or ()), tuple(f.get("units") or ())) for f in files}
    if len(labels) != 1:
        return ""
    names, units = next(iter(labels))
    if not names and not units:
        return ""
    n = max(len(names), len(units))
    parts = [(names[i] if i < len(names) else f"channel {i}") + (f" ({units[i]})" if i < len(units) else "")
             for i in range(n)]
    return ": " + ", ".join(parts)


COLUMNS_EXPLAINED = ("SEAM: the largest mismatch where neighbouring blocks overlap, relative to the segment's input "
                     "peak; EDGE ZONE: samples at the file's start / end within one effective filter length of its "
                     "segment's ends, where the output depends on the end extension")
"""What the status table's SEAM and EDGE ZONE columns hold, said under the table."""


def format_status(status: dict[str, Any]) -> str:
    """The status as a plain-text table grouped by stream."""
    header = ("FILE", "BLOCKS", "FAILED", "CHECKS", "PB DEV dB", "PHASE deg", "STOP dB", "SEAM rel",
              "EDGE ZONE samples", "COMPLETE")
    lines = [f"store: {status['store']}"]
    by_stream: dict[str, list[dict[str, Any]]] = {}
    for f in status["files"]:
        by_stream.setdefault(str(f["stream"]), []).append(f)
    rows: list[tuple[str, ...] | str] = []
    for stream, files in by_stream.items():
        rows.append(f"stream {stream}" + _labels_text(files))
        for f in files:
            w = f["worst"]
            ez = f["edge_zone_samples"] or [0, 0]
            rows.append((f["name"], f"{f['blocks_done']}/{f['blocks']}", str(f["blocks_fail"] + f["blocks_error"]),
                         f["checks"], _fmt(w["passband_dev_db"]), _fmt(w["phase_deg"]), _fmt(w["stopband_att_db"]),
                         _fmt(w["seam_mismatch"], ".1e"), f"{ez[0]}/{ez[1]}",
                         ("yes" if f["complete"] else "NO") + _input_note(f)))
    table = [header] + [r for r in rows if isinstance(r, tuple)]
    widths = [max(len(r[i]) for r in table) for i in range(len(header))]

    def line(r: tuple[str, ...]) -> str:
        return "  ".join(c.ljust(widths[i]) for i, c in enumerate(r)).rstrip()

    lines.append(line(header))
    for r in rows:
        lines.append(r if isinstance(r, str) else "  " + line(r))
    if rows:
        lines.append(f"  ({COLUMNS_EXPLAINED})")
    t = status["totals"]
    lines.append(f"files: {t['files']} ({t['complete']} complete, {t['incomplete']} incomplete); "
                 + inputs_left_out_text(t) + "; "
                 f"blocks: {t['blocks_done']}/{t['blocks']} done, {t['blocks_failed']} failed"
                 + (f", {t['blocks_cancelled']} cancelled (a run was stopped; the next run does them)"
                    if t.get("blocks_cancelled") else "")
                 + f"; files with failed checks or blocks: {t['checks_failed']}"
                 + (f"; files with blocks graded warn (complete, see CHECKS): {t['checks_warned']}"
                    if t.get("checks_warned") else ""))
    last = status.get("last_run")
    if last:
        counts = last.get("counts") or {}
        stopped = " (stopped before its end; the next run does the rest)" if last.get("interrupted") else ""
        lines.append(f"runs recorded: {status.get('runs_total', 1)}; last {last.get('run_id')} "
                     f"{last.get('start')} to {last.get('end') or '-'}{stopped}: "
                     + ", ".join(f"{k} {v}" for k, v in counts.items()))
        if retried_line(status.get("retried") or {}):
            lines.append(f"  {retried_line(status['retried'])}")
    limits = status.get("limits") or {}
    for entry in limits.get("designs") or []:
        lines.append(limits_line(entry))
    if limits.get("designs"):
        lines.append(f"  (from {limits.get('checks_from')}; twinpass status --json and the report give every limit "
                     "and why a figure short of the spec can pass)")
    held = lock_line(status.get("lock"))
    if held:
        lines.append(held)
    for f in status["files"]:
        for blocks, msg in error_groups(f["errors"]):
            lines.append(f"  error {f['name']} {blocks}: {msg}")
    lost = [f for f in status["files"] if f.get("chunks_missing")]
    if lost:
        lines.append(f"outputs with chunk files missing (deleted or lost since written; they would read as the fill value; "
                     f"the next run reruns their blocks): {len(lost)}")
        lines += [f"  {f['name']}: frames " + ", ".join(f"[{a}, {b})" for a, b in f["chunks_missing"])
                  for f in lost[:LISTED]]
        if len(lost) > LISTED:
            lines.append(f"  ... and {len(lost) - LISTED} more (twinpass status --json lists them all)")
    verified = status.get("verified")
    if verified:
        damaged = verified.get("damaged") or {}
        lines.append(f"verified: {verified['files']} complete output(s), {verified['blocks']} block(s), "
                     f"{verified['frames']:,} frames ({verified['values']:,} values over all channels) read back "
                     "against the levels recorded when written: "
                     + (f"{len(damaged)} output(s) do not match" if damaged else "all match"))
        for name, found in sorted(damaged.items())[:LISTED]:
            lines += [f"  {name}: {line}" for line in found]
        if len(damaged) > LISTED:
            lines.append(f"  ... and {len(damaged) - LISTED} more (twinpass status --json lists them all)")
        if damaged:
            lines.append(f"  what to do: {REMEDY}")
    failed_blocks = status.get("failed_blocks") or {}
    since = {str(f["source"]): f.get("input_gone_since") for f in status["files"]}
    failed = status.get("failed_inputs") or {}
    rerun = ("the next run tries them again" + ("; where a configuration error is the cause, once the configuration "
                                                "is fixed" if any(CONFIG_FAILED in v for v in failed.values()) else ""))
    for title, count, entries in ((f"failed at the last run ({rerun})", len(failed),
                                   _failed_entries(failed, failed_blocks)),
                                  ("left out by the last run (invalid input; an output made earlier is kept as it was)",
                                   None, [f"{k}: {v}" for k, v in sorted((status.get("left_out") or {}).items())]),
                                  ("outputs whose input is no longer in the archive (kept as they were, marked "
                                   "input_gone: a later job reading this store leaves them out)",
                                   None, [_gone_line(src, since) for src in status.get("gone") or []]),
                                  ("notes of the last run", None, list(status.get("notes") or []))):
        if entries:
            lines.append(f"{title}: {len(entries) if count is None else count}")
            lines += [f"  {e}" for e in entries[:LISTED]]
            if len(entries) > LISTED:
                lines.append(f"  ... and {len(entries) - LISTED} more (twinpass status --json lists them all)")
    return "\n".join(lines)


def lock_line(lock: Mapping[str, Any] | None) -> str:
    """What the store's run lock says, in one line ("" when no run holds it)."""
    if not lock:
        return ""
    if lock.get("state") == "unreadable":
        return (f"the store's lock {lock.get('where')} cannot be read (a run may have been killed while taking "
                "it); if no run is using the store, delete it")
    who = LockInfo(pid=int(lock["pid"]), host=str(lock["host"]), run_id=str(lock["run_id"]),
                   started=str(lock["started"]), token="").describe()
    if lock.get("state") == "running":
        return f"{who} is writing to the store now: its files may be incomplete until it ends"
    if lock.get("state") == "gone":
        return (f"{who} stopped without ending (killed, or its machine went down) and left the store's lock: "
                "its unfinished files stay incomplete; the next run takes the lock over and finishes them")
    return (f"{who} holds the store's lock from another host: it is running there, or stopped without ending "
            f"(a run started on {lock.get('host')} recovers the lock automatically once that process is no longer "
            f"running; delete {lock.get('where')} by hand only if that host is gone for good)")


def all_passed(status: dict[str, Any]) -> bool:
    """Every file complete, no block failed its checks, and the last run left no input out
    and failed none (see :func:`shortfalls`)."""
    return not shortfalls(status)


SHORTFALL_NAMED = 3
"""Inputs a phrase of :func:`shortfalls` names (the rest are counted; the status lists them all)."""


def shortfalls(status: dict[str, Any]) -> list[str]:
    """What keeps the archive's output from being complete with passed checks, one phrase each
    (empty when nothing does)."""
    t = status["totals"]
    out = []
    if t["files"] == 0:
        out.append("the store holds no output file")
    if t["incomplete"]:
        out.append(f"{t['incomplete']} file(s) incomplete")
    if t["checks_failed"] or t["blocks_failed"]:
        out.append(f"{t['checks_failed']} file(s) with failed checks or blocks")
    failed = sorted(status.get("failed_inputs") or {})
    if failed:
        out.append(f"{len(failed)} input(s) failed at the last run ({named_list(failed, SHORTFALL_NAMED)})")
    lock = status.get("lock")
    if lock:
        out.append("a run is writing to the store now" if lock.get("state") == "running"
                   else "a run stopped without ending and left the store's lock")
    left_out = sorted(status.get("left_out") or {})
    if left_out:
        out.append(f"{len(left_out)} input(s) left out by the last run ({named_list(left_out, SHORTFALL_NAMED)}; "
                   "exclude them in [archive] exclude if that is intended)")
    damaged = (status.get("verified") or {}).get("damaged") or {}
    if damaged:
        out.append(f"{len(damaged)} output(s) whose stored samples no longer match what the run recorded")
    return out


__all__ = ["open_target", "collect_status", "format_status", "all_passed", "shortfalls", "lock_line", "retried_line"]
