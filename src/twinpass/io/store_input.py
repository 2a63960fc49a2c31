"""An earlier job's output store read as the input archive of a later job (multi-stage filtering).

A configuration holds one overall response, so a cascade (a band-pass, then a mains notch)
is two jobs, the second reading the first one's output store. A folder is such a store when
its root group's ``zarr.json`` holds the ``twinpass`` attribute (see :mod:`twinpass.io.store`).
Its recordings are its output arrays, ``<stream>/<file stem>``: one per input file of the
earlier job, time-major ``(samples, channels)``, with the attributes ``sample_rate_hz`` (Hz),
``start_time`` (ISO 8601), ``stream`` and ``complete``. The bookkeeping group ``_twinpass``
and hidden names are never recordings, and neither is an array that holds the attribute
``input_gone`` (:data:`INPUT_GONE`): the kept output of an input the earlier job no longer
has (deleted, renamed, moved to another stream or excluded); its samples no longer belong to
any of that job's streams.

Only metadata documents (``zarr.json``) are read here, with plain file reads: the store is
never opened for writing, locked or modified.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any, Callable, Mapping

from .store_util import RESERVED_PREFIX

__all__ = ["INPUT_GONE", "STORE_ATTRIBUTE", "absent_chunk_frames", "absent_chunk_spans", "array_attributes",
           "gone_since", "is_output_store", "output_arrays"]

STORE_ATTRIBUTE = "twinpass"
"""Attribute of an output store's root group that marks it as written by twinpass."""

INPUT_GONE = "input_gone"
"""Attribute of an output array whose input is no longer in the archive: ``{"since": ISO 8601
time of the run that first found it gone, "run_id": that run, "reason": why, in words}``. The
array's samples are kept as they were; the run that finds the input back removes it."""

_METADATA = "zarr.json"


def _node(folder: Path | str) -> dict[str, Any] | None:
    """The Zarr v3 metadata document of ``folder`` (a JSON object), or ``None`` when it has
    none or it cannot be read as one."""
    try:
        with open(os.path.join(folder, _METADATA), "rb") as fh:
            doc = json.load(fh)
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) else None


def is_output_store(folder: Path | str) -> bool:
    """Whether ``folder`` is a twinpass output store: a Zarr v3 group whose attributes hold
    ``twinpass``."""
    doc = _node(folder)
    if doc is None or doc.get("node_type") != "group":
        return False
    attrs = doc.get("attributes")
    return isinstance(attrs, dict) and isinstance(attrs.get(STORE_ATTRIBUTE), dict)


def output_arrays(folder: Path | str) -> list[str]:
    """Paths (POSIX, relative to the store root) of the arrays of the output store at
    ``folder``, sorted; the ``_twinpass`` group, hidden names and folders that are no Zarr
    node are left out. Symbolic links inside the store are not followed."""
    found: list[str] = []
    root = Path(folder)

    def visit(path: Path, rel: str) -> None:
        try:
            names = sorted(e.name for e in os.scandir(path) if e.is_dir(follow_symlinks=False))
        except OSError:
            return
        for name in names:
            if name.startswith(".") or (not rel and name.startswith(RESERVED_PREFIX)):
                continue
            doc = _node(path / name)
            if doc is None:
                continue
            child = f"{rel}/{name}" if rel else name
            if doc.get("node_type") == "array":
                found.append(child)
            elif doc.get("node_type") == "group":
                visit(path / name, child)

    visit(root, "")
    return found


def array_attributes(folder: Path | str) -> dict[str, Any]:
    """The attributes of the Zarr v3 array at ``folder`` (empty when it has none or its
    metadata cannot be read)."""
    doc = _node(folder)
    attrs = None if doc is None else doc.get("attributes")
    return dict(attrs) if isinstance(attrs, dict) else {}


def absent_chunk_frames(folder: Path | str) -> list[tuple[int, int]]:
    """Frame spans ``[start, stop)`` of the output array at ``folder`` whose chunk files are
    missing or empty: lost after they were written (twinpass writes every chunk of an output),
    so they would read as the fill value. Empty when the metadata is not that of a 2-D array
    chunked along time only (not a twinpass output), or cannot be read."""
    doc = _node(folder)
    try:
        frames, channels = (int(v) for v in doc["shape"])  # type: ignore[index]
        rows, across = (int(v) for v in doc["chunk_grid"]["configuration"]["chunk_shape"])  # type: ignore[index]
        encoding = doc.get("chunk_key_encoding") or {}  # type: ignore[union-attr]
        sep = str((encoding.get("configuration") or {}).get("separator", "/"))
        name = encoding.get("name", "default")
    except (TypeError, KeyError, ValueError):
        return []
    if across != channels or rows <= 0 or name not in ("default", "v2"):
        return []
    return absent_chunk_spans(folder, frames, rows,
                              lambda i: f"c{sep}{i}{sep}0" if name == "default" else f"{i}{sep}0")


def absent_chunk_spans(folder: Path | str, frames: int, rows: int,
                       key_of: Callable[[int], str]) -> list[tuple[int, int]]:
    """Frame spans ``[start, stop)`` of an array in ``folder`` (``frames`` samples in chunks of
    ``rows``) whose chunk file, ``key_of(chunk index)`` relative to ``folder``, is missing or
    empty, neighbouring chunks merged. One ``stat`` per chunk."""
    spans: list[tuple[int, int]] = []
    for i in range(-(-frames // rows)):
        try:
            present = os.stat(os.path.join(folder, *key_of(i).split("/"))).st_size > 0
        except OSError:
            present = False
        if not present:
            a, b = i * rows, min(frames, (i + 1) * rows)
            if spans and spans[-1][1] == a:
                spans[-1] = (spans[-1][0], b)
            else:
                spans.append((a, b))
    return spans


def gone_since(attrs: Mapping[str, Any]) -> str | None:
    """When the output array with attributes ``attrs`` was marked as the output of an input that
    is no longer in the archive (the ``since`` of :data:`INPUT_GONE`, ISO 8601), or ``None``
    when it is not marked. A mark without a readable time counts as marked (``"unknown"``)."""
    mark = attrs.get(INPUT_GONE)
    if mark is None:
        return None
    since = mark.get("since") if isinstance(mark, Mapping) else None
    return since if isinstance(since, str) and since else "unknown"
