"""Blocks that failed their checks, in words: which blocks, which figure against which limit,
and what to do.

The figures and limits are those of :func:`twinpass.core.checks.findings` (the rules of
:func:`~twinpass.core.checks.grade`). A seam mismatch is measured where two neighbouring
blocks overlap (the last block of a file and the first of the next file of its segment are
neighbours too); when a block fails only its seam next to a block that failed for another
reason (a wrong response, non-finite output), the seam failure follows from that block and
is said so. Block indices count from 0 in each file; frames are the file's own, inclusive.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from twinpass.core.checks import CLIPPED_REMEDY, FAIL, WARN, Finding, findings, seam_scale
from twinpass.core.types import Design

if TYPE_CHECKING:  # the configuration module is not part of the numeric core
    from twinpass.config import ChecksConfig

SHOWN = 3
"""Failed blocks named in a file's one-line summary; the rest are counted."""

RERUN = "the next `twinpass run` runs failed blocks again"


@dataclass(frozen=True)
class FileBlocks:
    """What the explanation needs of one file's block table."""

    label: str
    """The file as messages name it (its path relative to the archive root)."""
    status: np.ndarray
    """Block status codes, shape (n_blocks,) (:data:`twinpass.core.checks.STATUS_NAMES`)."""
    span: np.ndarray
    """[start, stop) of each block in file frames, shape (n_blocks, 2)."""
    figures: np.ndarray | None
    """Figures, shape (n_blocks, channels, len(FIGURES)); None when not recorded."""
    start: _dt.datetime | None = None
    """Time of the file's first sample (timezone-aware), when known: blocks are then also
    named by the times they cover."""


@dataclass(frozen=True)
class CheckFailures:
    """A file's blocks that failed their checks, in words."""

    blocks: list[str]
    """One line per failed block, in block order."""
    remedy: str
    """What to look at and what to do."""
    summary: str
    """One line: how many blocks failed, the first :data:`SHOWN` (causes first), the count
    of the rest, and the remedy."""


@dataclass(frozen=True)
class _Failed:
    index: int
    text: str
    kinds: frozenset[str]
    """``response``, ``integrity``, ``clipped`` (output beyond the output type's range),
    ``seam``, ``follows`` (a seam failure next to a block
    failing for another reason) or ``unexplained`` (figures within the limits now)."""


def _clock(seconds: float) -> str:
    """``h:mm:ss`` (with a fraction when there is one, to the millisecond)."""
    whole = int(seconds)
    h, rest = divmod(whole, 3600)
    m, s = divmod(rest, 60)
    frac = f"{seconds - whole:.3f}".rstrip("0").rstrip(".")[1:] if seconds - whole >= 0.0005 else ""
    return f"{h}:{m:02d}:{s:02d}{frac}"


def _wall(start: _dt.datetime, a_s: float, b_s: float) -> str:
    """The times ``a_s`` to ``b_s`` seconds after ``start``, in UTC: ``YYYY-mm-dd HH:MM:SS``
    (to the millisecond when there is a fraction), the end's date left out on the same day
    (``HH:MM:SS-HH:MM:SS``), else ``... to YYYY-mm-dd HH:MM:SS``."""
    def at(seconds: float) -> _dt.datetime:
        return (start + _dt.timedelta(seconds=seconds)).astimezone(_dt.timezone.utc)

    def hms(t: _dt.datetime) -> str:
        return t.strftime("%H:%M:%S") + (f".{t.microsecond // 1000:03d}" if t.microsecond >= 500 else "")

    t0, t1 = at(a_s), at(b_s)
    end = f"-{hms(t1)}" if t1.date() == t0.date() else f" to {t1:%Y-%m-%d} {hms(t1)}"
    return f"{t0:%Y-%m-%d} {hms(t0)}{end} UTC"


def _where(fb: FileBlocks, i: int, sample_rate_hz: float) -> str:
    a, b = (int(v) for v in fb.span[i])
    a_s, b_s = a / sample_rate_hz, b / sample_rate_hz
    wall = "" if fb.start is None else f", {_wall(fb.start, a_s, b_s)}"
    return f"block {i} (frames {a:,}-{b - 1:,}, {_clock(a_s)}-{_clock(b_s)} into the file{wall})"


def _failing(fb: FileBlocks | None, i: int, design: Design, cfg: ChecksConfig, tolerance: float) -> list[Finding]:
    if fb is None or fb.figures is None or int(fb.status[i]) != FAIL:
        return []
    return [f for f in findings(fb.figures[i], design, cfg, tolerance) if f.status == FAIL]


def _warned(fb: FileBlocks | None, i: int, design: Design, cfg: ChecksConfig, tolerance: float) -> list[Finding]:
    """Block ``i``'s findings at the warn level other than seams (a block graded warn, or
    one that failed on its seams alone: a wrong output graded warn makes its seams disagree)."""
    if fb is None or fb.figures is None or int(fb.status[i]) not in (WARN, FAIL):
        return []
    return [f for f in findings(fb.figures[i], design, cfg, tolerance) if f.status == WARN and _kind(f) != "seam"]


def _neighbours(files: Sequence[FileBlocks | None], k: int, i: int) -> list[tuple[FileBlocks, int]]:
    """(file, block) of the blocks sharing a seam with block ``i`` of file ``k``."""
    fb, prev, nxt = files[k], files[k - 1] if k > 0 else None, files[k + 1] if k + 1 < len(files) else None
    assert fb is not None
    out = []
    if i > 0:
        out.append((fb, i - 1))
    elif prev is not None and len(prev.status):
        out.append((prev, len(prev.status) - 1))
    if i + 1 < len(fb.status):
        out.append((fb, i + 1))
    elif nxt is not None and len(nxt.status):
        out.append((nxt, 0))
    return out


_REMEDIES = {
    "response": "compare input and output at those frames and rerun; a failure that a rerun repeats with the "
                "same figures is no passing fault of the run: either the output there is wrong, or the input there "
                "is one the check cannot judge (the report lists what it cannot see)",
    "integrity": "look at the input at those frames and at [processing] nonfinite, then rerun",
    "clipped": f"set {CLIPPED_REMEDY}: the output there is larger than float32 can hold",
    "seam": "rerun; a seam mismatch that stays means the halo is too short for this filter (see the design "
            "report's effective length)",
    "follows": "a seam failure that follows from another block's failure or warning passes once that block's "
               "output is right",
    "unexplained": "rerun (the figures recorded are within the limits now)",
}
_ORDER = ("response", "integrity", "clipped", "seam", "unexplained", "follows")
_CAUSE = {"response": "response check", "integrity": "integrity check"}


def _seam_remedy(design: Design, tolerance: float) -> str:
    """The seam remedy: the halo, or the design's float64 rounding when its estimate exceeds
    the tolerance (see :func:`twinpass.core.checks.seam_scale`)."""
    scale = seam_scale(design, tolerance)
    if scale <= float(tolerance):
        return _REMEDIES["seam"]
    return (f"rerun; a seam mismatch that stays means this filter's float64 rounding (estimated at "
            f"{scale:.2g} of full scale, above the tolerance {float(tolerance):g}: see the design report's "
            "caution and its remedies) is larger than estimated, or the halo is too short for it")


def _kind(f: Finding) -> str:
    if f.response:
        return "response"
    return {"seam_mismatch": "seam", "clipped": "clipped"}.get(f.figure, "integrity")


def explain(files: Sequence[FileBlocks | None], design: Design, cfg: ChecksConfig,
            tolerance: float) -> dict[str, CheckFailures]:
    """Why the failed blocks of a segment's files failed.

    Parameters
    ----------
    files : sequence of FileBlocks or None
        The segment's files in time order; None for a file whose table is not at hand (it
        is neither explained nor named as a neighbour).
    design : Design
        The filter the blocks were graded against (its sample rate gives the times).
    cfg : ChecksConfig
        The thresholds.
    tolerance : float
        Relative blockwise tolerance (see :func:`twinpass.core.checks.grade`).

    Returns
    -------
    dict
        ``label -> CheckFailures`` for each file with a block whose status is ``FAIL``
        (blocks that raised an error are reported by their error, not here).
    """
    fs = float(design.sample_rate_hz)
    out: dict[str, CheckFailures] = {}
    for k, fb in enumerate(files):
        if fb is None or not np.any(np.asarray(fb.status) == FAIL):
            continue
        failed: list[_Failed] = []
        for i in np.flatnonzero(np.asarray(fb.status) == FAIL).tolist():
            found = _failing(fb, i, design, cfg, tolerance)
            kinds = {_kind(f) for f in found}
            if len(kinds) > 1:
                kinds.discard("seam")  # its own seams follow from its other failure
            text = "; ".join(f.describe() for f in found) or "failed its checks"
            own = _warned(fb, i, design, cfg, tolerance) if kinds == {"seam"} else []
            if own:  # its seams disagree because its own output is wrong, short of failing its check
                kinds = {_kind(f) for f in own}
                text += f"; its {_CAUSE['response' if 'response' in kinds else 'integrity']} graded warn: {'; '.join(f.describe() for f in own)}"
            elif kinds == {"seam"}:
                causes = []
                for other, j in _neighbours(files, k, i):
                    of = "" if other is fb else f" of {other.label}"
                    cause = {_kind(f) for f in _failing(other, j, design, cfg, tolerance)} - {"seam"}
                    warned = {_kind(f) for f in _warned(other, j, design, cfg, tolerance)}
                    if cause or warned:
                        check = _CAUSE["response" if "response" in (cause or warned) else "integrity"]
                        causes.append(f"the failed {check} of block {j}{of}" if cause
                                      else f"the {check} of block {j}{of}, graded warn")
                if causes:
                    kinds = {"follows"}
                    text += f", following from {' and '.join(causes)}"
            failed.append(_Failed(i, f"{_where(fb, i, fs)}: {text}", frozenset(kinds or {"unexplained"})))
        rank = {"response": 0, "integrity": 0, "clipped": 0, "seam": 1, "unexplained": 1, "follows": 2}
        first = sorted(failed, key=lambda f: (min(rank[kd] for kd in f.kinds), f.index))
        present = set().union(*(f.kinds for f in failed))
        remedies = {**_REMEDIES, "seam": _seam_remedy(design, tolerance)}
        remedy = "; ".join(remedies[kd] for kd in _ORDER if kd in present) + f"; {RERUN}"
        n = len(failed)
        shown = "; ".join(f.text for f in first[:SHOWN])
        more = f"; and {n - SHOWN} more (`twinpass status` lists them)" if n > SHOWN else ""
        out[fb.label] = CheckFailures(
            blocks=[f.text for f in failed], remedy=remedy,
            summary=f"{n} of {len(fb.status)} block(s) failed their checks: {shown}{more}. What to do: {remedy}")
    return out


__all__ = ["FileBlocks", "CheckFailures", "explain", "SHOWN"]
