"""Content fingerprints of input files and the digest of a filter design.

A fingerprint says whether an input file changed since its output was written:

* ``fast`` (default): size, modification time (ns) and a BLAKE2b digest of the first and
  the last MiB;
* ``full``: size and a BLAKE2b digest of every byte (read in 1 MiB chunks).

Files under 2 MiB are hashed whole in both modes (``whole`` is then true), and a digest of
every byte decides alone: the modification time of such a file is kept but not compared, so
``touch`` or a copy that keeps the bytes does not make it changed. Folders that
hold one recording are fingerprinted by their file list (fast) or by every byte of every
file (full). The comparison rules live in
:func:`twinpass.core.plan.fingerprint_changed` (re-exported here).

Zarr arrays (a folder whose ``zarr.json`` is an array's, or that holds ``.zarray``) are
fingerprinted row by row of chunks along time (algorithm :data:`ZARR_ALGORITHM`): ``meta``
digests the array's metadata without its attributes (shape, data type, chunk grid, codecs,
fill value: what decides the samples; attributes such as ``complete`` or ``checks`` do not)
plus any file that is no chunk, and ``rows`` holds one short digest per row of chunks
(``row_frames`` samples each; the files of its chunks with their sizes and, fast, their
modification times or, full, their bytes; an absent chunk counts as one). ``digest`` covers
both. So an array that an earlier twinpass job rewrote in part (the blocks near a changed
neighbour) names the rows that changed, and the planner filters those frames again
(:func:`twinpass.core.plan.changed_spans`) instead of the whole file. Arrays of more than
:data:`MAX_ROWS` rows keep no ``rows`` (a change refilters the whole file).

Bytes alone do not fix the samples a file decodes to: a raw file's sidecar (``NAME.toml``
/ ``NAME.json``) sets its dtype, byte order, gain, offset, header length, rate and start
time, and reader options (e.g. ``[archive] sample_rate_hz``) add to what a header says.
So a fingerprint taken with the reader's :class:`~twinpass.io.readers.base.RecordingInfo`
also holds ``decoding`` (:func:`decoding_of`: format, sample format, channels, rate, full
scale, start time and the reader's own layout fields such as byte order, gain, offset and
header bytes) and, for a raw file, ``sidecar`` (the sidecar's file name, for messages): any
change of how the file decodes makes it changed, with the fields that differ named.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any, BinaryIO, Mapping, NamedTuple

from twinpass.core.plan import fingerprint_changed
from twinpass.errors import ConfigError, InputError, TwinpassError

__all__ = [
    "BYTE_FIELDS", "CHUNK_BYTES", "ALGORITHM", "MAX_ROWS", "ZARR_ALGORITHM", "changed_since", "decoding_of",
    "fingerprint_file", "fingerprint_changed", "design_digest",
]

CHUNK_BYTES = 1 << 20
"""Read size and the length of the head and tail hashed in fast mode (1 MiB)."""
ALGORITHM = "blake2b-256"
ZARR_ALGORITHM = "blake2b-256/zarr-rows"
"""Algorithm name of the fingerprints of Zarr arrays, which digest rows of chunks apart."""
MAX_ROWS = 10_000
"""Most rows of chunks (along time) whose digests a Zarr array's fingerprint keeps."""
_ROW_DIGEST_CHARS = 16
"""Hex characters kept of each row's digest (64 bits)."""
_WHOLE_BELOW = 2 * CHUNK_BYTES
_ZARR_METADATA = frozenset({"zarr.json", ".zarray", ".zattrs", ".zgroup"})


def _hash_file(fh: BinaryIO, size: int, whole: bool, h: Any) -> None:
    if whole:
        while chunk := fh.read(CHUNK_BYTES):
            h.update(chunk)
    else:
        h.update(fh.read(CHUNK_BYTES))
        fh.seek(size - CHUNK_BYTES)
        h.update(fh.read(CHUNK_BYTES))


def _tree_files(root: Path) -> list[tuple[str, os.stat_result]]:
    out = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames.sort()
        for name in sorted(filenames):
            full = os.path.join(dirpath, name)
            out.append((Path(full).relative_to(root).as_posix(), os.stat(full)))
    return sorted(out)


class _ZarrLayout(NamedTuple):
    """What a Zarr array's metadata says of where its chunks lie."""

    meta: dict[str, Any]
    """The metadata document without attributes."""
    frames: int
    """Samples along time (the first dimension)."""
    row_frames: int
    """Samples along time per chunk (per shard, for a sharded array)."""
    v2_keys: bool
    """Chunk keys without the ``c`` prefix (format 2, or the ``v2`` key encoding)."""
    separator: str


def _zarr_layout(folder: Path) -> _ZarrLayout | None:
    """The chunk layout of the Zarr array in ``folder``, or ``None`` when ``folder`` holds none
    (or metadata this module cannot follow: it is then fingerprinted as a plain folder)."""
    try:
        if (folder / "zarr.json").is_file():
            meta = json.loads((folder / "zarr.json").read_bytes())
            if meta.get("node_type") != "array" or meta["chunk_grid"].get("name") != "regular":
                return None
            rows = int(meta["chunk_grid"]["configuration"]["chunk_shape"][0])
            enc = meta.get("chunk_key_encoding") or {}
            v2 = enc.get("name", "default") == "v2"
            sep = str((enc.get("configuration") or {}).get("separator", "." if v2 else "/"))
        elif (folder / ".zarray").is_file():
            meta = json.loads((folder / ".zarray").read_bytes())
            rows, v2, sep = int(meta["chunks"][0]), True, str(meta.get("dimension_separator") or ".")
        else:
            return None
        frames = int(meta["shape"][0])
    except (OSError, ValueError, TypeError, KeyError, IndexError, AttributeError):
        return None
    if rows <= 0 or frames < 0 or sep not in ("/", "."):
        return None
    meta = {k: v for k, v in meta.items() if k != "attributes"}
    return _ZarrLayout(meta, frames, rows, v2, sep)


def _row_of(key: str, layout: _ZarrLayout) -> int | None:
    """The row (chunk index along time) of the chunk file ``key`` (POSIX path inside the
    array's folder), or ``None`` when it is no chunk of the array."""
    if not layout.v2_keys:
        if not key.startswith("c" + layout.separator):
            return None
        key = key[2:]
    first = key.split(layout.separator)[0]
    if not first.isdigit():
        return None
    row = int(first)
    return row if row * layout.row_frames < max(layout.frames, 1) else None


def _fingerprint_zarr(p: Path, layout: _ZarrLayout, mode: str) -> dict[str, Any]:
    """The row-wise fingerprint of the Zarr array in folder ``p`` (module notes)."""
    whole = mode == "full"
    n_rows = -(-layout.frames // layout.row_frames)
    rows: list[Any] = [hashlib.blake2b(digest_size=32) for _ in range(n_rows)]
    meta = hashlib.blake2b(digest_size=32)
    meta.update(json.dumps(layout.meta, sort_keys=True, separators=(",", ":")).encode())
    size, mtime_ns = 0, None
    for rel, st in _tree_files(p):
        if rel in _ZARR_METADATA:
            continue
        row = _row_of(rel, layout)
        h = meta if row is None else rows[row]
        h.update(f"{rel}\0{st.st_size}\0".encode())
        if whole:
            with open(p / rel, "rb") as fh:
                _hash_file(fh, st.st_size, True, h)
        else:
            h.update(f"{st.st_mtime_ns}\0".encode())
        size += st.st_size
        mtime_ns = st.st_mtime_ns if mtime_ns is None else max(mtime_ns, st.st_mtime_ns)
    row_digests = [h.hexdigest() for h in rows]
    total = hashlib.blake2b(digest_size=32)
    total.update(meta.digest())
    for d in row_digests:
        total.update(bytes.fromhex(d))
    out: dict[str, Any] = {
        "size": int(size),
        "mtime_ns": int(p.stat().st_mtime_ns if mtime_ns is None else mtime_ns),
        "mode": mode,
        "algorithm": ZARR_ALGORITHM,
        "whole": whole,
        "digest": total.hexdigest(),
        "meta": meta.hexdigest()[:_ROW_DIGEST_CHARS],
        "row_frames": int(layout.row_frames),
    }
    if n_rows <= MAX_ROWS:
        out["rows"] = [d[:_ROW_DIGEST_CHARS] for d in row_digests]
    return out


_PATH_FIELDS = frozenset({"sidecar", "store"})
"""Fields of ``RecordingInfo.extra`` that hold where a file lies, not how it decodes (an
archive moved elsewhere decodes alike)."""

LABEL_FIELDS = frozenset({"channel_names", "units"})
"""Fields of ``RecordingInfo.extra`` that label the channels (a sidecar's names and units):
they are written to the outputs' attributes and change no sample, so they are not part of
how a file decodes (editing them refilters nothing)."""


def _plain(value: Any) -> Any:
    """``value`` as it reads back from JSON (tuples as lists, odd floats and objects as text)."""
    if value is None or isinstance(value, (bool, int, str)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else repr(value)
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if hasattr(value, "item"):  # numpy scalars
        return _plain(value.item())
    return str(value)


def decoding_of(info: Any) -> dict[str, Any]:
    """How a recording decodes to samples, as plain JSON data (compared by the planner).

    Parameters
    ----------
    info : twinpass.io.readers.base.RecordingInfo
        What the reader found (with the sidecar and options it was opened with).

    Returns
    -------
    dict
        ``format``, ``sample_format``, ``channels``, ``sample_rate_hz`` (Hz), ``full_scale``,
        ``start_time`` (ISO 8601 or ``None``) and every field of ``info.extra`` but paths
        (raw: ``byte_order``, ``gain``, ``offset``, ``header_bytes``; WAV: container, format
        tag, data offset...) and channel labels (:data:`LABEL_FIELDS`). The frame count is left out: the planner compares it apart.
    """
    out: dict[str, Any] = {
        "format": str(info.format),
        "sample_format": str(info.sample_format),
        "channels": int(info.channels),
        "sample_rate_hz": None if info.sample_rate_hz is None else float(info.sample_rate_hz),
        "full_scale": None if info.full_scale is None else float(info.full_scale),
        "start_time": None if info.start_time is None else info.start_time.isoformat(),
    }
    for key in sorted(info.extra or {}):
        if key not in _PATH_FIELDS and key not in LABEL_FIELDS and key not in out:
            out[str(key)] = _plain(info.extra[key])
    return out


def fingerprint_file(
    path: str | os.PathLike[str], mode: str = "fast", info: Any = None
) -> dict[str, Any]:
    """Fingerprint one file (or a folder holding one recording, e.g. a Zarr array).

    Parameters
    ----------
    path : path-like
        The file (opened read-only).
    mode : {"fast", "full"}
        ``fast`` hashes the first and last MiB, ``full`` every byte (in 1 MiB chunks);
        files under 2 MiB are hashed whole either way. For a folder, ``fast`` hashes the
        list of its files with their sizes (the newest modification time is compared
        separately) and ``full`` the names and every byte of its files; a Zarr array is
        digested row by row of chunks (module notes).
    info : RecordingInfo, optional
        What the reader found in the file; adds ``decoding`` (:func:`decoding_of`) and, when
        the reader used a sidecar, ``sidecar`` (its file name).

    Returns
    -------
    dict
        ``size`` (bytes; for a folder the sum over its files), ``mtime_ns`` (for a folder
        the newest of its files), ``mode``, ``algorithm``, ``whole`` (the digest covers
        every byte) and ``digest`` (hex); for a Zarr array also ``meta``, ``row_frames``
        (samples) and ``rows``; with ``info`` also ``decoding`` (and ``sidecar``).
        JSON-serialisable.

    Raises
    ------
    ConfigError
        For an unknown ``mode``.
    InputError
        When the file cannot be read.
    """
    if mode not in ("fast", "full"):
        raise ConfigError(f"fingerprint mode {mode!r} is not one of: fast, full ([archive] fingerprint)")
    p = Path(path)
    h = hashlib.blake2b(digest_size=32)
    out: dict[str, Any]
    try:
        layout = _zarr_layout(p) if p.is_dir() else None
        if layout is not None:
            out = _fingerprint_zarr(p, layout, mode)
        elif p.is_dir():
            files = _tree_files(p)
            size = sum(st.st_size for _, st in files)
            mtime_ns = max((st.st_mtime_ns for _, st in files), default=p.stat().st_mtime_ns)
            whole = mode == "full"
            for rel, st in files:
                h.update(f"{rel}\0{st.st_size}\0".encode())
                if whole:
                    with open(p / rel, "rb") as fh:
                        _hash_file(fh, st.st_size, True, h)
        else:
            with open(p, "rb") as fh:
                st = os.fstat(fh.fileno())
                size, mtime_ns = st.st_size, st.st_mtime_ns
                whole = mode == "full" or size < _WHOLE_BELOW
                _hash_file(fh, size, whole, h)
    except OSError as e:
        raise InputError(
            f"{p}: cannot read it to take its fingerprint ({e.strerror}); check that it exists and is readable",
            path=str(p),
        ) from None
    if layout is None:
        out = {
            "size": int(size),
            "mtime_ns": int(mtime_ns),
            "mode": mode,
            "algorithm": ALGORITHM,
            "whole": bool(whole),
            "digest": h.hexdigest(),
        }
    if info is not None:
        out["decoding"] = decoding_of(info)
        side = (info.extra or {}).get("sidecar")
        if side:
            out["sidecar"] = os.path.basename(str(side))
    return out


def _size_and_mtime(p: Path) -> tuple[int, int]:
    """``size`` and ``mtime_ns`` of ``p`` as :func:`fingerprint_file` takes them."""
    if not p.is_dir():
        st = p.stat()
        return int(st.st_size), int(st.st_mtime_ns)
    skip = _ZARR_METADATA if _zarr_layout(p) is not None else frozenset()
    files = [(rel, st) for rel, st in _tree_files(p) if rel not in skip]
    size = sum(st.st_size for _, st in files)
    return int(size), int(max((st.st_mtime_ns for _, st in files), default=p.stat().st_mtime_ns))


BYTE_FIELDS = ("size", "mtime_ns", "mode", "algorithm", "whole", "digest")
"""The fields of a fingerprint that describe the file's bytes (what :func:`changed_since`
needs of a planned fingerprint, without its decoding)."""


def changed_since(path: str | os.PathLike[str], planned: Mapping[str, Any] | None,
                  spec: Any = None) -> str | None:
    """How the input at ``path`` changed since its fingerprint ``planned`` was taken, or
    ``None`` when it did not: a run checks this before marking outputs complete, so that an
    input rewritten while the run read it (a recorder still writing it, an earlier job's
    rerun) does not leave an output marked complete that mixes old and new samples.

    Cheap when nothing changed (a ``stat``, or a walk of a folder's files): the bytes are
    fingerprinted again only when the size is the same and the modification time is not,
    and then compared by :func:`fingerprint_changed`'s rules (so a ``touch`` of a file whose
    digest covers every byte is no change).

    A file that decodes through a sidecar (``sidecar`` in ``planned``) changes also with it:
    given the run's ``spec`` (:class:`~twinpass.io.readers.base.ReaderSpec`), the file is
    opened as its sidecar reads now (:meth:`~twinpass.io.readers.base.ReaderSpec.as_found`)
    and how it decodes is compared with ``planned["decoding"]``, the fields that differ named.
    """
    if not planned or "size" not in planned or "mtime_ns" not in planned:
        return None
    how = _bytes_changed(Path(path), planned)
    if how is None and spec is not None and planned.get("sidecar") and isinstance(planned.get("decoding"), Mapping):
        how = _sidecar_changed(spec, planned)
    return how


def _bytes_changed(p: Path, planned: Mapping[str, Any]) -> str | None:
    """How the bytes of ``p`` changed since ``planned`` (see :func:`changed_since`), or ``None``."""
    try:
        size, mtime_ns = _size_and_mtime(p)
    except OSError as e:
        return f"it can no longer be read ({e.strerror or e})"
    if size != planned["size"]:
        return f"its size is now {size:,} bytes, against {int(planned['size']):,} when the run planned it"
    if mtime_ns == planned["mtime_ns"]:
        return None
    try:
        now = fingerprint_file(p, str(planned.get("mode", "fast")))
    except InputError as e:
        return str(e)
    changed, why = fingerprint_changed({k: planned[k] for k in BYTE_FIELDS if k in planned},
                                       {k: now[k] for k in BYTE_FIELDS if k in now})
    return why if changed else None


def _sidecar_changed(spec: Any, planned: Mapping[str, Any]) -> str | None:
    """How the decoding of the file of ``spec``, opened as its sidecar reads now, differs from
    ``planned["decoding"]`` (the sidecar named), or ``None``."""
    side = planned["sidecar"]
    try:
        with spec.as_found().open() as rec:
            info = rec.info
    except TwinpassError as e:
        return f"its sidecar {side} no longer reads as when the run planned the file: {e}"
    bytes_alike = {k: planned[k] for k in BYTE_FIELDS if k in planned}
    changed, why = fingerprint_changed({**bytes_alike, "decoding": planned["decoding"], "sidecar": side},
                                       {**bytes_alike, "decoding": decoding_of(info), "sidecar": side})
    return why if changed else None


def design_digest(design: Any, edge: str, edge_samples: int | str, package_version: str) -> str:
    """Digest of everything that shapes a file's output besides its input.

    Parameters
    ----------
    design : twinpass.core.types.Design
        The per-pass design (coefficients, sample rate in Hz, tolerance, effective length).
    edge : str
        End extension at segment ends (odd | even | constant | none).
    edge_samples : int or "auto"
        Length of the end extension, samples.
    package_version : str
        twinpass version that computes the output.

    Returns
    -------
    str
        SHA-256 hex digest; equal inputs give equal digests across runs and machines.
    """
    extra: Mapping[str, Any] = {"edge": edge, "edge_samples": edge_samples, "version": package_version}
    return str(design.digest(dict(extra)))
