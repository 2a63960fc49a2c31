"""The Zarr v3 output store.

Layout (zarr_format 3)::

    <store>/                          group; attributes {"twinpass": {layout, spec, versions, runs,
                                      runs_total}}: runs = the latest RUNS_IN_ROOT run entries
      <stream>/<file stem>            one array per input file, shape (samples, channels),
                                      chunks (chunk_samples, channels), dimension_names
                                      ["time", "channel"], fill_value NaN (0 in stores
                                      written before: frames no block wrote read so);
                                      codecs bytes, Blosc (unless "none"), crc32c
      _twinpass/blocks/<array name>/  block table of that file (group; attribute "errors")
        status   int8    (n_blocks,)                         0 pending 1 pass 2 warn 3 fail 4 error
        span     int64   (n_blocks, 2)                       [start, stop) in file frames
        figures  float64 (n_blocks, channels, n_columns)     attribute "columns"; one block per chunk
        seams    float64 (n_blocks, 4, seam_samples, channels) one block per chunk; see SEAM_*
      _twinpass/runs/<run id>         every run's entry (group; attribute "run"), written once
      _twinpass/scan/                 scan cache (group; attributes {"layout", "files"}): per input
                                      path, what discovery learnt about its NaN/Inf samples
      .twinpass-lock                  present while a run writes (local stores)
      .twinpass-lock.flow-run         beside it, the Prefect flow run of the run writing (JSON)

Array attributes are plain JSON (see :func:`json_safe`); ``complete`` is True only once every
block is written and has passed. ``input_gone`` (:data:`~twinpass.io.store_input.INPUT_GONE`)
marks a kept output whose input is no longer in the archive, until the input is back. One
process (the driver) writes attributes and block tables; block tasks write data regions only, through :func:`write_block_data`, in whole chunks.
"""

from __future__ import annotations

import collections
import contextlib
import copy
import dataclasses
import enum
import json
import os
import re
import shutil
import socket
import threading
import warnings
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, Callable, Literal

import fsspec
import numpy as np
import zarr
from zarr.codecs import BloscCodec, BloscShuffle, Crc32cCodec
from zarr.core.array import AsyncArray
from zarr.core.buffer import default_buffer_prototype
from zarr.core.group import AsyncGroup, GroupMetadata
from zarr.core.metadata.v3 import ArrayV3Metadata
from zarr.storage import FsspecStore, LocalStore, MemoryStore, StorePath

from ..core.types import FileRecord
from ..errors import RunStoppedError, StoreError, UnsafePathError
from . import store_lock
from .store_input import absent_chunk_spans, gone_since
from .store_lock import LockInfo
from .store_util import (
    RESERVED_PREFIX,
    array_name,
    check_name,
    check_outside_archive,
    json_safe,
    library_versions,
    local_path,
    sync_file_system,
    write_errors,
)

__all__ = [
    "BlockRecord",
    "BlockStatus",
    "BlockTable",
    "COMPRESSIONS",
    "LockInfo",
    "OutputStore",
    "SEAM_AFTER",
    "SEAM_BEFORE",
    "SEAM_HEAD",
    "SEAM_TAIL",
    "array_name",
    "json_safe",
    "library_versions",
    "array_metadata",
    "write_block_data",
    "write_rows",
]

STORE_LAYOUT = 1
"""Version of this layout, stored as ``twinpass.layout`` in the root attributes."""
COMPRESSIONS: tuple[str, ...] = ("none", "lz4", "zstd")
DIMENSION_NAMES = ("time", "channel")
REQUIRED_ATTRS = ("source", "source_fingerprint", "design_digest")
"""Array attributes that mark an array as twinpass output (see :meth:`OutputStore.file_records`)."""

SEAM_HEAD, SEAM_TAIL, SEAM_BEFORE, SEAM_AFTER = 0, 1, 2, 3
"""Rows of a block's seams: its first and last ``seam_samples`` outputs, and the
``seam_samples`` it computed before its start and after its end."""

SCAN_CACHE_LAYOUT = 1
"""Version of the scan cache's layout (``layout`` attribute of ``_twinpass/scan``)."""

_MAX_ERROR_CHARS = 2000
_TABLE_CHUNK = 4096


class BlockStatus(enum.IntEnum):
    """State of one block in the block table."""

    PENDING = 0
    PASS = 1
    WARN = 2
    FAIL = 3
    """Written, but its checks failed."""
    ERROR = 4
    """Processing raised an exception."""


_DONE = (BlockStatus.PASS, BlockStatus.WARN)


@dataclass(frozen=True, eq=False)
class BlockTable:
    """The block table of one output array (arrays are read-only views).

    ``status`` (n_blocks,) int8 :class:`BlockStatus` codes; ``span`` (n_blocks, 2) [start, stop)
    in file frames; ``figures`` (n_blocks, channels, len(columns)) or None when not read;
    ``seams`` (n_blocks, 4, seam_samples, channels) or None when not read; ``errors`` maps a
    block index to its last error message.
    """

    name: str
    status: np.ndarray
    span: np.ndarray
    columns: tuple[str, ...]
    seam_samples: int
    errors: dict[int, str]
    figures: np.ndarray | None = field(default=None, repr=False)
    seams: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_blocks(self) -> int:
        return int(self.status.shape[0])

    def counts(self) -> dict[str, int]:
        """Number of blocks per status name (``pending``, ``pass``, ``warn``, ``fail``, ``error``)."""
        return {s.name.lower(): int(np.count_nonzero(self.status == s)) for s in BlockStatus}

    def todo(self) -> np.ndarray:
        """Indices of blocks that are neither passed nor warned."""
        return np.flatnonzero(~np.isin(self.status, [int(s) for s in _DONE]))


def _compressors(compression: str) -> list[BloscCodec | Crc32cCodec]:
    """Codecs of new output arrays after the bytes: Blosc (unless ``"none"``), then a CRC-32C
    checksum of each chunk's stored bytes (Zarr v3's ``crc32c`` codec: four bytes at the end
    of every chunk file), which any Zarr v3 reader checks when it reads the chunk, and
    ``twinpass status --verify`` checks for every chunk. Bit shuffle: filtered float32 samples
    keep little redundancy beyond their exponent and top mantissa bits, which bit shuffle
    groups together; on filtered noise it compresses better than byte shuffle (about 1.17
    against 1.09 with lz4) and faster."""
    if compression == "none":
        return [Crc32cCodec()]
    if compression == "lz4":
        return [BloscCodec(cname="lz4", clevel=5, shuffle=BloscShuffle.bitshuffle), Crc32cCodec()]
    if compression == "zstd":
        return [BloscCodec(cname="zstd", clevel=1, shuffle=BloscShuffle.bitshuffle), Crc32cCodec()]
    raise StoreError(f"compression {compression!r} is not one of: {', '.join(COMPRESSIONS)} ([output] compression)")


def _compression_of(arr: zarr.Array) -> str:
    """The ``[output] compression`` an existing array matches; arrays written with byte
    shuffle or without checksums (earlier versions) count as their codec's name, so they
    are not rewritten."""
    comp = tuple(c for c in arr.compressors if not isinstance(c, Crc32cCodec))
    if not comp:
        return "none"
    shuffles = (BloscShuffle.shuffle, BloscShuffle.bitshuffle)
    if len(comp) == 1 and isinstance(comp[0], BloscCodec) and comp[0].shuffle in shuffles:
        c = comp[0]
        if (c.cname.value, c.clevel) == ("lz4", 5):
            return "lz4"
        if (c.cname.value, c.clevel) == ("zstd", 1):
            return "zstd"
    return "other"


def _url_fs(location: str) -> tuple[Any, str]:
    """The (synchronous) fsspec file system and root path of a store URL (cached by fsspec)."""
    try:
        return fsspec.core.url_to_fs(location)
    except (ImportError, ValueError) as e:
        raise StoreError(f"output store {location}: cannot open this URL: {e}") from e


def _open_zarr_store(location: str, *, read_only: bool) -> LocalStore | FsspecStore:
    path = local_path(location)
    if path is not None:
        return LocalStore(path, read_only=read_only)
    try:
        return FsspecStore.from_url(location, read_only=read_only)
    except (ImportError, ValueError) as e:
        raise StoreError(f"output store {location}: cannot open this URL: {e}") from e


@dataclass
class _TableHandles:
    """A block table's open arrays and what :meth:`OutputStore.record_block` needs of its array.

    ``codes`` is the status column as recorded (the driver is the table's only writer, and
    any other change to the table drops these handles). ``folder`` is set for a table in a
    local store whose chunks :meth:`OutputStore.record_blocks` encodes and writes itself
    (``encoders``, one per column array), as it does for data chunks: byte for byte what
    Zarr writes, without a round trip through Zarr's event loop per block.
    """

    group: zarr.Group
    status: zarr.Array
    span: np.ndarray
    figures: zarr.Array
    seams: zarr.Array
    chunk: int
    chunk_key: Callable[[tuple[int, ...]], str]
    codes: np.ndarray
    folder: Path | None = None
    encoders: dict[str, Callable[[np.ndarray], Any]] = field(default_factory=dict)


@dataclass(frozen=True)
class BlockRecord:
    """One block's outcome, for :meth:`OutputStore.record_blocks`."""

    index: int
    status: BlockStatus | int
    figures: np.ndarray | None = None
    """(channels, n_columns) float64, or None to keep what is recorded."""
    seams: np.ndarray | None = None
    """(4, seam_samples, channels) float64, or None to keep what is recorded."""
    error: str | None = None


WRITTEN_BY_KEPT = 20
"""Runs an output's ``written_by`` attribute names at most (the latest)."""


def _written_by(kept: Any, run_id: str) -> list[dict[str, Any]]:
    """An output's ``written_by`` attribute: the runs that wrote its blocks since it was last
    written whole, oldest first, each ``{"run_id", "versions"}`` (:func:`library_versions`),
    ending with ``run_id``; ``kept`` is the attribute as it was (None when the output is
    written whole now)."""
    earlier = [e for e in kept if isinstance(e, dict) and e.get("run_id") != run_id] if isinstance(kept, list) else []
    return [*earlier, {"run_id": run_id, "versions": library_versions()}][-WRITTEN_BY_KEPT:]


def _same_json(a: Any, b: Any) -> bool:
    """Whether two JSON values are the same document (``True`` is not ``1``, ``1`` not ``1.0``)."""
    return json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def _contiguous(rows: list[int]) -> bool:
    return rows[-1] - rows[0] + 1 == len(rows)


_TABLES_PREFIX = f"{RESERVED_PREFIX}/blocks/"


def _table_path(name: str) -> str:
    return f"{_TABLES_PREFIX}{name}"


def _ancestors(path: str) -> list[str]:
    """The paths of the groups above ``path``: ``"a/b/c"`` -> ``["a", "a/b"]``."""
    parts = path.split("/")
    return ["/".join(parts[:i]) for i in range(1, len(parts))]


_SCAN_PATH = f"{RESERVED_PREFIX}/scan"
_NODES_KEPT = 8192
"""Opened arrays and groups an :class:`OutputStore` keeps: about six per file in hand, some 3 kB
each (about 23 MiB in all at most)."""
_RUNS_PATH = f"{RESERVED_PREFIX}/runs"
_RUN_ID = re.compile(r"[A-Za-z0-9._-]{1,128}")
RUNS_IN_ROOT = 50
"""Run entries kept in the root attributes (the latest). Every entry also has its own group
under ``_twinpass/runs``, so the root's metadata, read by every open of the store, stays the
same size however many runs a scheduled archive accumulates."""


def _members(group: zarr.Group) -> list[tuple[str, Any]]:
    with warnings.catch_warnings():
        # Lock files and in-flight "*.partial" files are not Zarr nodes.
        warnings.filterwarnings("ignore", message=r"Object at .* is not recognized")
        return list(group.members())


def write_block_data(location: str, name: str, start: int, data: np.ndarray, *, sync: bool = True,
                     fence: str = "") -> None:
    """Write one block's output into its array (safe from worker threads and processes).

    Parameters
    ----------
    location : str
        The store location (local path or fsspec URL).
    name : str
        Array name inside the store.
    start : int
        First frame (sample index) of the region; a multiple of the chunk length.
    data : numpy.ndarray
        Shape (samples, channels), time-major; cast to the array's dtype. The region must
        cover whole chunks or end at the array's end, so no two blocks share a chunk.
    sync : bool
        In a local store, return only once the chunks are on the disk (see
        :func:`_overwrite_file`).
    fence : str
        The token of the run lock the writing run holds (:attr:`OutputStore.lock_token`);
        when given, nothing is written unless the store's lock still holds it. A block task
        left running on a cluster of its own after its command was killed then cannot
        overwrite what a later run, which took the lock over, has written.

    Raises
    ------
    StoreError
        Missing array, wrong shape, a region off the chunk grid, or a failed write
        (e.g. no space left on device).
    RunStoppedError
        ``fence`` is given and the store's lock no longer holds it.
    """
    check_name(name)
    data = np.asarray(data)
    try:
        arr = _writable_array(location, name)
    except (FileNotFoundError, NotADirectoryError, KeyError, zarr.errors.BaseZarrError) as e:
        raise StoreError(f"output array {name} not found in {location}; prepare the file before writing blocks") from e
    except (ValueError, TypeError) as e:  # a metadata document that is not JSON, or not an array's
        raise StoreError(f"output array {name} in {location}: its zarr.json cannot be read ({e}); the store is "
                         "damaged: rerun with --force to rewrite the file") from e
    frames, channels = arr.shape
    chunk = arr.chunks[0]
    if data.ndim != 2 or data.shape[1] != channels:
        raise StoreError(
            f"{name}: block data at frame {start} has shape {data.shape}; expected (samples, {channels})"
        )
    stop = start + data.shape[0]
    if data.shape[0] == 0 or start < 0 or stop > frames:
        raise StoreError(f"{name}: block region [{start}, {stop}) is empty or outside the array's {frames} frames")
    if start % chunk or (stop % chunk and stop != frames):
        raise StoreError(
            f"{name}: block region [{start}, {stop}) is not aligned to the {chunk}-sample chunks; "
            "blocks must write whole chunks (or end at the array's end) so that no two blocks share a chunk"
        )
    if fence:
        _check_fence(location, fence, f"{name} block [{start}, {stop})")
    with write_errors(f"{name} block [{start}, {stop}) in {location}"):
        root = local_path(location)
        encode = _chunk_encoder(arr) if root is not None else None
        if encode is None:
            arr[start:stop, :] = data.astype(arr.dtype, copy=False)
        else:
            _write_local_chunks(root / name, arr, encode, start, data, in_place=True, sync=sync)


def _lock_file_at(location: str) -> store_lock.LockFile:
    """The run lock object of the store at ``location``."""
    root = local_path(location)
    if root is not None:
        return store_lock.LocalLockFile(root)
    fs, fs_root = _url_fs(location)
    return store_lock.FsspecLockFile(fs, fs_root, location)


def _check_fence(location: str, token: str, what: str) -> None:
    """Raise :class:`RunStoppedError` unless the store's run lock holds ``token``."""
    raw = _lock_file_at(location).read()
    holder = store_lock.LockInfo.parse(raw) if raw is not None else None
    if holder is None or holder.token != token:
        now = f"it is held by {holder.describe()}" if holder is not None else "it is not held"
        raise RunStoppedError(
            f"{what} not written: the run lock of {location} is no longer this run's ({now}); another run "
            "took the store over (this run's command was judged dead, or the lock was removed by hand). "
            "Nothing was written; the run holding the lock does this block")


def sync_block_data(location: str, name: str, start: int, stop: int) -> None:
    """Make the chunks of output region [start, stop) durable (``fdatasync``), in a local store.

    For blocks written with ``write_block_data(..., sync=False)`` by another thread or
    process of this machine: the chunk files' data reach the disk before this returns, as
    they would have with ``sync=True``, but the wait is the caller's (the driver, while the
    workers compute the next blocks) instead of a worker's. A non-local store does nothing
    here (its writes are complete when they return).

    Parameters
    ----------
    location : str
        The store location.
    name : str
        Array name inside the store.
    start, stop : int
        The region written, frames; ``start`` a multiple of the chunk length.

    Raises
    ------
    StoreError
        A chunk file is missing or the disk reports an error while syncing it (the data may
        not be on the disk: the block must not count as done).
    """
    root = local_path(location)
    if root is None:
        return
    check_name(name)
    with write_errors(f"{name} block [{start}, {stop}) in {location} (syncing it to disk)"):
        arr = _writable_array(location, name)
        chunk = arr.chunks[0]
        flags = (os.O_RDONLY if os.name == "posix" else os.O_RDWR) | getattr(os, "O_CLOEXEC", 0)
        for c0 in range(start - start % chunk, stop, chunk):
            try:
                fd = os.open(_chunk_file(root / name, arr, c0), flags)
            except FileNotFoundError:
                raise StoreError(f"{name}: block [{start}, {stop}) was written but its data chunk {c0 // chunk} "
                                 "is missing; the block is run again on the next run") from None
            try:
                _data_sync(fd)
            finally:
                os.close(fd)


_OPENED: dict[str, tuple[bytes, zarr.Array]] = {}
_OPENED_LOCK = threading.Lock()


def _writable_array(location: str, name: str) -> zarr.Array:
    """The output array ``name`` opened for block writes (``write_empty_chunks`` on).

    In a local store the array is made from its metadata document (``zarr.json``), read
    once per block as one small file, parsed by Zarr itself and kept per process for as long
    as the document reads the same, byte for byte: no round trip through Zarr's event loop,
    which cost a block task about as much as writing a one-second block. Other stores open
    it through Zarr every time.

    Raises
    ------
    FileNotFoundError, KeyError
        No array ``name`` (KeyError: a group is there).
    """
    root = local_path(location)
    if root is None:
        arr = zarr.open_array(_open_zarr_store(location, read_only=False), path=name, mode="r+")
        return arr.with_config({"write_empty_chunks": True})
    meta_path = root / name / "zarr.json"
    doc = meta_path.read_bytes()
    key = str(meta_path)
    with _OPENED_LOCK:
        hit = _OPENED.get(key)
    if hit is not None and hit[0] == doc:
        return hit[1]
    data = json.loads(doc)
    if not isinstance(data, dict) or data.get("zarr_format") != 3 or data.get("node_type") != "array":
        raise KeyError(f"{name} is not a Zarr v3 array")
    async_arr = AsyncArray.from_dict(StorePath(LocalStore(root), name), data)
    arr = zarr.Array(async_arr).with_config({"write_empty_chunks": True})
    with _OPENED_LOCK:
        if len(_OPENED) >= 1024:
            _OPENED.clear()
        _OPENED[key] = (doc, arr)
    return arr


_CODECS: dict[int, tuple[Any, Any]] = {}
"""Codecs made by :func:`_chunk_codec`, by the id of the metadata they were made for (kept with it)."""


def _chunk_codec(arr: zarr.Array) -> tuple[Callable[[np.ndarray], Any], Callable[[bytes], np.ndarray]] | None:
    """:func:`_make_chunk_codec` for ``arr``, made once per metadata object (block tables are
    read and written many times per file)."""
    meta = arr.metadata
    hit = _CODECS.get(id(meta))
    if hit is not None and hit[0] is meta:
        return hit[1]
    codec = _make_chunk_codec(arr)
    if len(_CODECS) >= _NODES_KEPT:  # bounded like the kept nodes (each entry keeps its metadata alive)
        _CODECS.clear()
    _CODECS[id(meta)] = (meta, codec)
    return codec


def _make_chunk_codec(arr: zarr.Array) -> tuple[Callable[[np.ndarray], Any], Callable[[bytes], np.ndarray]] | None:
    """Encoder and decoder of one whole chunk as the array's codecs store it, for the codec
    chains twinpass creates (little-endian bytes, then optionally Blosc, then optionally a
    CRC-32C checksum) with Zarr's default chunk keys; ``None`` for any other chain (Zarr reads
    and writes those itself).

    The encoder takes a whole chunk's values and returns its bytes (with a checksum, a tuple
    of the bytes and the checksum: :func:`checksummed`); the decoder takes the
    bytes of a chunk file and returns the chunk, shape ``arr.chunks``, and raises
    :class:`~twinpass.errors.StoreError` when the chunk's checksum does not match its bytes.
    The Blosc step is numcodecs' ``Blosc`` with the codec's own settings, which is what Zarr
    itself runs for this codec; run here, it runs in the calling thread. The checksum is
    Zarr's: CRC-32C of the bytes before it, little-endian.
    """
    from zarr.codecs import BytesCodec
    from zarr.core.metadata.v3 import ArrayV3Metadata

    meta = arr.metadata
    if not isinstance(meta, ArrayV3Metadata) or meta.chunk_key_encoding.name != "default":
        return None
    codecs = list(meta.codecs)
    endian = getattr(codecs[0], "endian", None) if codecs else None
    if not codecs or not isinstance(codecs[0], BytesCodec) or getattr(endian, "value", endian) not in (None, "little"):
        return None
    summed = isinstance(codecs[-1], Crc32cCodec)
    if summed:
        codecs.pop()
    dtype = np.dtype(arr.dtype).newbyteorder("<")
    shape = tuple(arr.chunks)

    def values(raw: Any) -> np.ndarray:
        out = np.frombuffer(raw, dtype=dtype)
        if out.size != int(np.prod(shape)):
            raise StoreError(f"a chunk of {arr.path} holds {out.size} values, not the {int(np.prod(shape))} of "
                             f"its {shape} chunks; the store is damaged: rerun with --force")
        return out.reshape(shape).astype(arr.dtype, copy=False)

    if len(codecs) == 1:
        encode, decode = (lambda a: np.ascontiguousarray(a, dtype=dtype).tobytes()), values
    elif len(codecs) == 2 and isinstance(codecs[1], BloscCodec):
        import numcodecs

        c = codecs[1]
        shuffle = {BloscShuffle.noshuffle: numcodecs.Blosc.NOSHUFFLE, BloscShuffle.shuffle: numcodecs.Blosc.SHUFFLE,
                   BloscShuffle.bitshuffle: numcodecs.Blosc.BITSHUFFLE}[c.shuffle]
        blosc = numcodecs.Blosc(cname=c.cname.value, clevel=c.clevel, shuffle=shuffle, blocksize=c.blocksize,
                                typesize=c.typesize)
        encode, decode = (lambda a: blosc.encode(np.ascontiguousarray(a, dtype=dtype))), (lambda b: values(blosc.decode(b)))
    else:
        return None
    if not summed:
        return encode, decode
    return (lambda a: checksummed(encode(a))), (lambda b: decode(checksum_body(b, arr.path)))


_DAMAGED_CHUNK_REMEDY = ("`twinpass status --verify` names every such chunk; restore the store from a copy, or "
                         "delete that output's folder in the store and run again")

CHECKSUM_BYTES: int = 4
"""Bytes of the CRC-32C checksum at the end of each chunk file of arrays with the ``crc32c`` codec."""


def crc32c(data: Any) -> bytes:
    """CRC-32C (Castagnoli) of ``data`` (bytes-like) as the ``crc32c`` codec stores it: four
    bytes, little-endian (the Zarr v3 specification's ``crc32c`` codec)."""
    import google_crc32c  # Zarr's own dependency for this codec

    # a numpy view: the extension takes bytes and arrays, not memoryviews
    return int(google_crc32c.value(np.frombuffer(data, dtype=np.uint8))).to_bytes(CHECKSUM_BYTES, "little")


def checksummed(payload: Any) -> tuple[Any, bytes]:
    """``payload`` (bytes-like) and its CRC-32C checksum, the parts of a chunk file in their
    order (written one after the other: joining them would copy every chunk once more)."""
    return payload, crc32c(payload)


def _write_parts(f: Any, payload: Any) -> None:
    """Write ``payload`` to the open file ``f``: bytes-like, or a tuple of bytes-like parts."""
    for part in payload if isinstance(payload, tuple) else (payload,):
        f.write(part)


def checksum_body(raw: Any, where: str) -> memoryview:
    """The bytes of a chunk file before its checksum, once the checksum matches them.

    Raises
    ------
    StoreError
        The file is shorter than a checksum, or its checksum does not match its bytes: the
        chunk file changed after it was written (damaged, truncated or edited).
    """
    view = memoryview(raw).cast("B")
    if len(view) < CHECKSUM_BYTES or crc32c(view[:-CHECKSUM_BYTES]) != bytes(view[-CHECKSUM_BYTES:]):
        raise StoreError(f"a chunk of {where} does not match its CRC-32C checksum: the chunk file changed after it "
                         f"was written (damaged, truncated or edited). {_DAMAGED_CHUNK_REMEDY}")
    return view[:-CHECKSUM_BYTES]


def _chunk_encoder(arr: zarr.Array) -> Callable[[np.ndarray], Any] | None:
    """The encoder of :func:`_chunk_codec`, or None."""
    codec = _chunk_codec(arr)
    return None if codec is None else codec[0]


def _read_local_chunks(folder: Path, arr: zarr.Array) -> np.ndarray | None:
    """The whole of ``arr`` read from its chunk files under ``folder``, or None if twinpass
    cannot decode them itself (see :func:`_chunk_codec`) or the array is not chunked along its
    first axis only; Zarr reads it then.

    For the small arrays of block tables, read many times per file: byte for byte what Zarr
    reads, without a round trip through Zarr's event loop per array. A missing chunk reads as
    the fill value, as in Zarr.
    """
    codec = _chunk_codec(arr)
    if codec is None or tuple(arr.chunks[1:]) != tuple(arr.shape[1:]):
        return None
    decode = codec[1]
    out = np.full(arr.shape, arr.fill_value, dtype=arr.dtype)
    chunk = arr.chunks[0]
    for c0 in range(0, arr.shape[0], chunk):
        try:
            raw = _chunk_file(folder, arr, c0).read_bytes()
        except FileNotFoundError:
            continue
        part = out[c0 : c0 + chunk]
        part[...] = decode(raw)[: part.shape[0]]
    return out


def _write_local_chunks(folder: Path, arr: zarr.Array, encode: Callable[[np.ndarray], Any], start: int,
                        data: np.ndarray, *, in_place: bool = False, sync: bool = True) -> None:
    """Encode and write the whole chunks ``data`` covers, from row ``start`` (a chunk boundary).

    ``arr`` is chunked along its first axis only (a chunk spans every other axis whole: the
    output arrays, one row per chunk of a block table's figures and seams, its status
    column); ``data`` holds rows of ``arr``. A chunk that runs past the array's end is
    completed with the fill value, as Zarr stores edge chunks.

    By default each chunk file is written to a temporary name and renamed into place, as
    Zarr's local store does, so a reader never sees half a chunk: block tables are written so.
    ``in_place`` overwrites an existing chunk file instead (:func:`_overwrite_file`, synced
    unless ``sync`` is False), for the output arrays' blocks, whose chunks only count once
    their block is recorded done.
    """
    chunk = arr.chunks[0]
    for c0 in range(start, start + data.shape[0], chunk):
        part = data[c0 - start : c0 - start + chunk]
        if part.shape[0] < chunk:  # the array's last, partial chunk
            full = np.full((chunk, *arr.shape[1:]), arr.fill_value, dtype=arr.dtype)
            full[: part.shape[0]] = part
            part = full
        path, payload = _chunk_file(folder, arr, c0), encode(part)
        if in_place:
            _overwrite_file(path, payload, sync=sync)
        else:
            _put_file(path, payload)


def write_rows(arr: zarr.Array, start: int, data: np.ndarray) -> None:
    """Write ``data`` as rows [start, start + len(data)) of ``arr``, in whole chunks.

    For the small bookkeeping arrays of a store (block tables, carried filter states): in a
    local store whose codecs twinpass encodes itself (:func:`_chunk_codec`) and an array
    chunked along its first axis only, each chunk is encoded here and renamed into place
    (:func:`_write_local_chunks`), byte for byte what Zarr writes, without a round trip
    through Zarr's event loop; Zarr writes it otherwise.

    Parameters
    ----------
    arr : zarr.Array
    start : int
        First row; a multiple of the chunk length.
    data : numpy.ndarray
        Rows of ``arr`` (shape ``(rows, *arr.shape[1:])``), ending on a chunk boundary or at
        the array's end.
    """
    stop = start + data.shape[0]
    chunk = arr.chunks[0]
    if start % chunk or (stop % chunk and stop != arr.shape[0]):
        raise StoreError(f"{arr.path}: rows [{start}, {stop}) are not whole {chunk}-row chunks")
    encode = _chunk_encoder(arr) if isinstance(arr.store, LocalStore) else None
    if encode is None or tuple(arr.chunks[1:]) != tuple(arr.shape[1:]):
        arr[start:stop] = data
        return
    _write_local_chunks(Path(arr.store.root) / arr.path, arr, encode, start, np.asarray(data))


def _chunk_file(folder: Path, arr: zarr.Array, row: int) -> Path:
    """The file of the chunk of ``arr`` (chunked along its first axis only) that starts at ``row``."""
    return folder / arr.metadata.encode_chunk_key((row // arr.chunks[0], *(0,) * (arr.ndim - 1)))


def _data_sync(fd: int) -> None:
    """Flush an open file's data to the disk (``fdatasync``, else ``fsync``)."""
    (os.fdatasync if hasattr(os, "fdatasync") else os.fsync)(fd)


def _put_file(path: Path, payload: Any, *, sync: bool = False) -> None:
    """Write ``payload`` (bytes-like, or a tuple of parts) to a temporary file beside ``path``, then rename it
    into place.

    With ``sync``, the data reach the disk before the rename (``fdatasync``), and the folder
    is synced after it (where the system allows), so that the new file's name is durable too.
    """
    import uuid

    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{path.name}.{uuid.uuid4().hex}.partial")
    try:
        with open(tmp, "wb") as f:
            _write_parts(f, payload)
            if sync:
                f.flush()
                _data_sync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    if sync and hasattr(os, "O_DIRECTORY"):
        fd = os.open(path.parent, os.O_RDONLY | os.O_DIRECTORY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _overwrite_file(path: Path, payload: Any, *, sync: bool = True) -> None:
    """Write ``payload`` (bytes-like, or a tuple of parts) over the file at ``path`` in place (created if
    missing).

    For the chunks of a block being computed: its status in the block table is pending and
    its file is marked incomplete while it is written, and it is recorded done only after
    this returns, so a half-written chunk (the writing process killed) is never taken for a
    result; the next run writes it again. Written in place with ``sync``, the data is on the
    disk (``fdatasync``) before this returns, so a block recorded done keeps its data through
    a power cut or a crash of the operating system. A chunk file created here also needs its
    name to be durable: journalling file systems such as ext4 (``data=ordered``) and XFS
    commit a new file's directory entry with the data ``fdatasync`` flushes; POSIX alone asks
    for an ``fsync`` of the folder as well, which twinpass does not make.

    Replacing the file instead (a temporary file renamed over it, as Zarr's local store does)
    frees the old file's disk blocks and, on ext4, makes the next journal commit write the
    new data out first: on a virtual disk mounted with ``discard`` a forced rerun spent about
    4 ms per 2.4 MB chunk that way and stalled every writer every few seconds (300 such
    chunks: 1.2-1.8 s replaced, one call taking up to 0.5 s; 0.9 s overwritten and synced).

    A file that is a symbolic link or has other hard links (a snapshot of the store made with
    hard links shares it) is replaced as :func:`_put_file` does, never written through (and
    synced there, with ``sync``).
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    flags = os.O_WRONLY | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags, 0o666)
    except OSError:  # a symbolic link (ELOOP), or not a file
        _put_file(path, payload, sync=sync)
        return
    with os.fdopen(fd, "wb") as f:
        if os.fstat(fd).st_nlink == 1:
            _write_parts(f, payload)
            f.truncate()  # a shorter chunk than the file held
            if sync:  # durable before the block is recorded
                f.flush()
                _data_sync(fd)
            return
    _put_file(path, payload, sync=sync)


def _metadata_files(meta: ArrayV3Metadata | GroupMetadata) -> dict[str, bytes]:
    """A node's metadata documents (``zarr.json``) as Zarr itself serialises them."""
    return {key: buf.to_bytes() for key, buf in meta.to_buffer_dict(default_buffer_prototype()).items()}


def array_metadata(**spec: Any) -> ArrayV3Metadata:
    """The Zarr v3 metadata of an array made with ``create_array(**spec)``, made by Zarr itself
    (in memory), so that documents written from it are the ones Zarr would write."""
    return zarr.create_array(MemoryStore(), zarr_format=3, **spec).metadata


@lru_cache(maxsize=64)
def _array_metadata(frames: int, channels: int, dtype: str, chunk_samples: int, compression: str) -> ArrayV3Metadata:
    """Zarr metadata of an output array with no attributes; kept, since the files of an
    archive mostly share it."""
    return array_metadata(shape=(frames, channels), dtype=dtype, chunks=(chunk_samples, channels),
                          compressors=_compressors(compression), fill_value=float("nan"),
                          dimension_names=DIMENSION_NAMES)


@lru_cache(maxsize=64)
def _table_metadata(n: int, channels: int, columns: tuple[str, ...], seam_samples: int,
                    table_chunk: int) -> dict[str, Any]:
    """Zarr metadata of a block table's arrays (status, span, figures, seams) for ``n`` blocks.

    Made by Zarr itself (:func:`array_metadata`); kept, since the files of an archive mostly
    share them.
    """
    tab_chunk = (max(1, min(n, table_chunk)),)
    specs: dict[str, dict[str, Any]] = {
        "status": dict(shape=(n,), dtype="int8", chunks=tab_chunk, fill_value=0),
        "span": dict(shape=(n, 2), dtype="int64", chunks=tab_chunk + (2,), fill_value=-1),
        "figures": dict(shape=(n, channels, len(columns)), dtype="float64",
                        chunks=(1, channels, max(1, len(columns))), fill_value=float("nan"),
                        attributes={"columns": list(columns)}),
        "seams": dict(shape=(n, 4, seam_samples, channels), dtype="float64",
                      chunks=(1, 4, max(1, seam_samples), channels), fill_value=float("nan")),
    }
    return {key: array_metadata(compressors=None, **spec) for key, spec in specs.items()}


@lru_cache(maxsize=64)
def _table_documents(n: int, channels: int, columns: tuple[str, ...], seam_samples: int,
                     table_chunk: int) -> dict[str, dict[str, bytes]]:
    """The metadata documents of a new block table (see :func:`_table_metadata`), by key under
    the table's path ("" for its group, whose ``errors`` are empty)."""
    docs = {"": _metadata_files(GroupMetadata(attributes={"errors": {}}))}
    docs.update({key: _metadata_files(meta)
                 for key, meta in _table_metadata(n, channels, columns, seam_samples, table_chunk).items()})
    return docs


class OutputStore:
    """A twinpass output store (Zarr v3 group). Open it with :meth:`OutputStore.open`.

    Methods that change attributes or block tables are for the driver process only; they are
    serialised by an internal lock so the driver may call them from several threads.
    """

    def __init__(self, location: str, store: LocalStore | FsspecStore, root: zarr.Group, read_only: bool) -> None:
        self.location = location
        self.local_root: Path | None = local_path(location)
        self.read_only = read_only
        self._store = store
        self._root = root
        self._mutex = threading.RLock()
        self.lock_token = ""
        """Token of the run lock this object holds (:meth:`lock`), else empty; block tasks
        pass it to :func:`write_block_data` as their fence."""
        self.lock_run_id = ""
        """Id of the run holding the lock through this object, else empty; outputs prepared
        meanwhile name it in their ``written_by`` attribute."""
        self.stale_locks_recovered: list[LockInfo] = []
        """Holders of stale locks (their runs gone without releasing them) that :meth:`lock`
        removed, for the run to say so in its own log."""
        self._handles: collections.OrderedDict[str, _TableHandles] = collections.OrderedDict()
        """Open block-table arrays per output array, for :meth:`record_block` (driver only), the
        :data:`_NODES_KEPT` most recently used; dropped by every method that rewrites a table
        or deletes nodes."""
        self._nodes: collections.OrderedDict[str, zarr.Array | zarr.Group] = collections.OrderedDict()
        """Arrays and groups opened lately, by path, least recently used first (see :meth:`_node`)."""
        self._below: dict[str, set[str]] = {}
        """Kept paths under each path that has some (so that forgetting a path and what lies
        under it does not scan every kept node)."""

    # -- opening --------------------------------------------------------------

    @classmethod
    def open(
        cls, location: str, mode: Literal["a", "r"] = "a", *, archive_root: Path | str | None = None
    ) -> OutputStore:
        """Open (mode ``"a"``: create if missing) or read (mode ``"r"``) the store at ``location``.

        Parameters
        ----------
        location : str
            Local folder, ``file://`` URL or another fsspec URL (e.g. ``memory://out.zarr``).
        mode : {"a", "r"}
        archive_root : Path, optional
            The input archive; a local store that is, contains or lies inside it is refused.

        Raises
        ------
        UnsafePathError
            The store overlaps the archive.
        StoreError
            Missing store in mode ``"r"``, a folder that is not a Zarr v3 group, an unknown mode.
        """
        if mode not in ("a", "r"):
            raise StoreError(f"output store {location}: mode {mode!r} is not 'a' or 'r'")
        path = local_path(location)
        if path is not None and archive_root is not None:
            check_outside_archive(path, archive_root)
        if path is not None:
            if path.exists() and not path.is_dir():
                raise StoreError(f"output store {path} is a file, not a folder; choose another [output] store")
            exists = (path / "zarr.json").is_file()
            if not exists and mode == "a" and path.is_dir() and any(path.iterdir()):
                raise StoreError(
                    f"output store {path} is a non-empty folder that is not a Zarr store; "
                    "choose a new or empty folder for [output] store"
                )
        else:
            fs, root = _url_fs(location)
            exists = fs.exists(root.rstrip("/") + "/zarr.json")
        if mode == "r" and not exists:
            raise StoreError(f"output store {location} not found: run the job first, or check [output] store")
        store = _open_zarr_store(location, read_only=(mode == "r"))
        try:
            with write_errors(f"the output store {location}"):
                root_group = zarr.open_group(store, mode=mode, zarr_format=3)
        except StoreError:
            raise
        except Exception as e:
            raise StoreError(f"output store {location} is not a Zarr v3 group: {e}") from e
        return cls(location, store, root_group, read_only=(mode == "r"))

    def __repr__(self) -> str:
        return f"OutputStore({self.location!r}, read_only={self.read_only})"

    def _writable(self) -> None:
        if self.read_only:
            raise StoreError(f"output store {self.location} was opened read-only; open it with mode 'a' to write")

    # -- locking and clean-up -------------------------------------------------

    def _lock_file(self) -> store_lock.LockFile:
        return _lock_file_at(self.location)

    def lock_holder(self) -> dict[str, Any] | None:
        """Who holds the store's run lock now, or None (a read; works on a read-only store).

        ``{"run_id", "pid", "host", "started", "state"}`` with ``state`` ``"running"`` (its
        process is alive on this host), ``"gone"`` (its process on this host has ended
        without releasing the lock: killed, or crashed), ``"elsewhere"`` (held from another
        host: this one cannot tell), or ``"unreadable"`` (the lock file cannot be parsed;
        the other fields are None).
        """
        lock = self._lock_file()
        raw = lock.read()
        if raw is None:
            return None
        holder = LockInfo.parse(raw)
        if holder is None:
            return {"run_id": None, "pid": None, "host": None, "started": None, "state": "unreadable",
                    "where": lock.where}
        state = ("elsewhere" if holder.host != socket.gethostname()
                 else "gone" if holder.is_stale() else "running")
        return {"run_id": holder.run_id, "pid": holder.pid, "host": holder.host, "started": holder.started,
                "state": state, "where": lock.where}

    @contextlib.contextmanager
    def lock(self, run_id: str) -> Iterator[LockInfo]:
        """Hold the store's run lock for the ``with`` block.

        Raises
        ------
        StoreLockedError
            Another live run holds it; the message names the holder and how to clear it.
        """
        self._writable()
        lock_file = self._lock_file()
        self.stale_locks_recovered = []
        info = store_lock.acquire(lock_file, run_id, self.stale_locks_recovered)
        self.lock_token, self.lock_run_id = info.token, run_id
        try:
            yield info
        finally:
            self.lock_token = self.lock_run_id = ""
            store_lock.release(lock_file, info)

    def note_flow_run(self, flow_run_id: str, api_url: str) -> None:
        """Note, beside the run lock this store holds, the Prefect flow run of the run holding
        it and its server's API URL (see :func:`store_lock.note_flow_run`)."""
        if not self.lock_run_id:
            raise StoreError(f"output store {self.location}: a flow run is noted only by the run holding the lock")
        store_lock.note_flow_run(self._lock_file(), self.lock_run_id, flow_run_id, api_url)

    def noted_flow_run(self, run_id: str) -> dict[str, str] | None:
        """The flow run noted for ``run_id`` (``flow_run_id``, ``api_url``), if that run noted one
        and it is still there (a run that died holding the lock leaves it)."""
        return store_lock.noted_flow_run(self._lock_file(), run_id)

    def clean_partials(self) -> int:
        """Delete ``*.partial`` files left by killed writers (local stores); return how many.

        Call it while holding the lock: in-flight writes of a live run also use such files.
        """
        self._writable()
        if self.local_root is None:
            return 0
        count = 0
        for dirpath, _dirs, files in os.walk(self.local_root):
            for f in files:
                if f.endswith(".partial"):
                    Path(dirpath, f).unlink(missing_ok=True)
                    count += 1
        return count

    # -- nodes ----------------------------------------------------------------

    def _node(self, path: str) -> zarr.Array | zarr.Group | None:
        """The array or group at ``path``, or None.

        Opening a node reads and parses its metadata document, a few milliseconds, and the
        driver needs each file's array and block-table arrays dozens of times: nodes are
        kept once opened. This is safe because every metadata change of this store goes
        through this object while it holds the run lock (Zarr updates an opened node's
        attributes in place), deletions and creations replace the kept nodes
        (:meth:`_forget`), and any failed operation drops them all (:meth:`_writing`), so
        that a write that did not reach the disk is never taken as done. Chunk data are read
        from the store every time. A missing node is not kept.
        """
        hit = self._nodes.get(path)
        if hit is not None:
            self._nodes.move_to_end(path)
            return hit
        if self._missing_locally(path):
            return None
        try:
            node = self._root[path]
        except KeyError:
            return None
        self._keep(path, node)
        return node

    def _keep(self, path: str, node: zarr.Array | zarr.Group) -> None:
        """Keep a node just opened, created or rewritten through ``node`` (see :meth:`_node`).

        At most :data:`_NODES_KEPT` nodes are kept, the most recently used: enough for the
        files the segment drivers have in hand, and bounded however many files the archive has.
        """
        if path not in self._nodes:
            for parent in _ancestors(path):
                self._below.setdefault(parent, set()).add(path)
        self._nodes[path] = node
        self._nodes.move_to_end(path)
        while len(self._nodes) > _NODES_KEPT:
            self._unindex(self._nodes.popitem(last=False)[0])

    def _unindex(self, path: str) -> None:
        for parent in _ancestors(path):
            below = self._below.get(parent)
            if below is not None:
                below.discard(path)
                if not below:
                    del self._below[parent]

    def _put_group(self, path: str, attrs: dict[str, Any]) -> None:
        """Create the group at ``path`` if missing, replace its attributes, and keep it."""
        group = self._root.require_group(path)
        group.attrs.put(attrs)
        self._keep(path, group)

    def _create_nodes(self, nodes: Mapping[str, ArrayV3Metadata | GroupMetadata],
                      documents: Mapping[str, Mapping[str, bytes]] | None = None) -> None:
        """Create the groups and arrays ``nodes`` (paths where nothing is) and keep them.

        ``documents`` may hold the serialised metadata of some of them (by path), when the
        caller has them already.

        In a local store their metadata documents are written here, each renamed into place,
        with any missing parent group, as Zarr writes them (:func:`_metadata_files`): a
        round trip through Zarr's event loop per document cost a file of a first run more
        than its samples did. Other stores use ``zarr.create_hierarchy``. Each node must
        have attributes of its own: Zarr updates an opened node's attributes in place.

        Raises
        ------
        StoreError
            Something is already at one of the paths, or a parent is an array.
        """
        if self.local_root is None:
            for node_path, node in zarr.create_hierarchy(store=self._store, nodes=nodes, overwrite=False):
                if node_path in nodes:
                    self._keep(node_path, node)
            return
        for parent in sorted({a for path in nodes for a in _ancestors(path)} - set(nodes)):
            if self._missing_locally(parent):
                self._write_documents(parent, _metadata_files(GroupMetadata()))
            elif self._node_type(parent) != "group":
                raise StoreError(f"{self.location}: cannot create {sorted(nodes)[0]} inside {parent}, "
                                 "which is not a group; remove it or choose another store")
        for path in nodes:
            if not self._missing_locally(path):
                raise StoreError(f"{self.location}: {path} exists already; rerun to replace it")
        for path, meta in nodes.items():
            self._write_documents(path, (documents or {}).get(path) or _metadata_files(meta))
            where = StorePath(self._store, path)
            if isinstance(meta, GroupMetadata):
                self._keep(path, zarr.Group(AsyncGroup(metadata=meta, store_path=where)))
            else:
                self._keep(path, zarr.Array(AsyncArray(metadata=meta, store_path=where)))

    def _write_documents(self, path: str, documents: Mapping[str, bytes]) -> None:
        """Write a node's metadata documents (local stores), each renamed into place."""
        for key, payload in documents.items():
            _put_file(self.local_root / path / key, payload)

    def _node_type(self, path: str) -> str | None:
        """``"array"`` or ``"group"``: what the metadata document at ``path`` describes (local stores)."""
        node = self._nodes.get(path)
        if node is not None:
            return "group" if isinstance(node, zarr.Group) else "array"
        try:
            return str(json.loads((self.local_root / path / "zarr.json").read_bytes()).get("node_type"))
        except (OSError, ValueError, AttributeError):
            return None

    def _set_attributes(self, path: str, node: zarr.Array | zarr.Group, attrs: Mapping[str, Any], *,
                        replace: bool = False) -> None:
        """Merge ``attrs`` into the attributes of ``node`` (the kept node at ``path``), or with
        ``replace`` make them its attributes, and write its metadata document.

        In a local store the document is written here, renamed into place, as Zarr serialises
        it; the node in hand changes only once it is written. Other stores go through Zarr.
        """
        if self.local_root is None:
            if replace:
                node.attrs.put(dict(attrs))
            else:
                node.update_attributes(dict(attrs))
            return
        new = dict(attrs) if replace else {**node.metadata.attributes, **attrs}
        self._write_documents(path, _metadata_files(dataclasses.replace(node.metadata, attributes=new)))
        node.metadata.attributes.clear()
        node.metadata.attributes.update(new)

    def _forget(self, path: str | None = None) -> None:
        """Drop kept nodes: ``path`` and everything under it, or all of them (None)."""
        if path is None:
            self._handles.clear()
            self._nodes.clear()
            self._below.clear()
            return
        for key in [path, *self._below.get(path, ())]:
            if self._nodes.pop(key, None) is not None:
                self._unindex(key)
        # the handles of the output arrays at or under path, or whose block tables are
        if path.startswith(_TABLES_PREFIX):
            name = path[len(_TABLES_PREFIX):]
        else:
            name = "" if _TABLES_PREFIX.startswith(path + "/") else path
        for key in [k for k in self._handles if not name or k == name or k.startswith(name + "/")]:
            del self._handles[key]

    @contextlib.contextmanager
    def _writing(self, what: str) -> Iterator[None]:
        """Hold the store's lock while writing ``what``; on any error forget every kept node.

        OS errors become :class:`StoreError` (:func:`write_errors`). After a failure an
        opened node may hold attributes that never reached the disk, so nodes are opened
        afresh from then on.
        """
        with self._mutex:
            try:
                with write_errors(what):
                    yield
            except BaseException:
                self._forget()
                raise

    def _array(self, name: str) -> zarr.Array:
        node = self._node(check_name(name))
        if not isinstance(node, zarr.Array):
            raise StoreError(f"output array {name} not found in {self.location}")
        return node

    def _table(self, name: str) -> zarr.Group:
        node = self._node(_table_path(check_name(name)))
        if not isinstance(node, zarr.Group):
            raise StoreError(f"no block table for {name} in {self.location}; prepare the file first")
        return node

    def _table_array(self, name: str, key: str) -> zarr.Array:
        """One array of the block table of ``name``: status, span, figures or seams."""
        node = self._node(f"{_table_path(check_name(name))}/{key}")
        if not isinstance(node, zarr.Array):
            raise StoreError(f"the block table of {name} in {self.location} has no {key} array; "
                             "rerun with --force to rebuild it")
        return node

    def _table_values(self, name: str, key: str, arr: zarr.Array | None = None) -> np.ndarray:
        """The whole of one block-table array of ``name`` (a new array): from its chunk files
        in a local store (:func:`_read_local_chunks`), through Zarr otherwise."""
        arr = self._table_array(name, key) if arr is None else arr
        if self.local_root is not None:
            values = _read_local_chunks(self.local_root / _table_path(name) / key, arr)
            if values is not None:
                return values
        return np.asarray(arr[:])

    def _table_handles(self, name: str) -> _TableHandles:
        h = self._handles.get(name)
        if h is None:
            group = self._table(name)
            arr = self._array(name)
            status, figures, seams = (self._table_array(name, k) for k in ("status", "figures", "seams"))
            h = _TableHandles(
                group, status, self._table_values(name, "span"), figures, seams,
                int(arr.chunks[0]), arr.metadata.encode_chunk_key,
                self._table_values(name, "status", status).astype(np.int8, copy=False),
            )
            if self.local_root is not None:
                encoders = {"status": _chunk_encoder(status), "figures": _chunk_encoder(figures),
                            "seams": _chunk_encoder(seams)}
                one_row = all(a.chunks == (1,) + a.shape[1:] for a in (figures, seams))
                if one_row and all(e is not None for e in encoders.values()):
                    h.folder = self.local_root / _table_path(name)
                    h.encoders = {k: e for k, e in encoders.items() if e is not None}
            self._handles[name] = h
            while len(self._handles) > _NODES_KEPT:
                self._handles.popitem(last=False)
        else:
            self._handles.move_to_end(name)
        return h

    def _missing_locally(self, path: str) -> bool:
        """Whether a local store has no node at ``path`` (no metadata document there): one
        ``stat`` instead of a round trip through Zarr's event loop, for the paths of new files."""
        return self.local_root is not None and not (self.local_root / path / "zarr.json").exists()

    def _delete(self, path: str) -> None:
        self._forget(path)
        if self.local_root is not None:
            target = (self.local_root / path).resolve()
            root = self.local_root.resolve()
            if target == root or not target.is_relative_to(root):
                raise UnsafePathError(f"refusing to delete {target}: it is not inside the output store {root}")
            if not target.exists():
                return  # nothing there: one stat instead of a round trip through Zarr's event loop
        with write_errors(f"{path} (deleting)"):
            del self._root[path]

    def _mark_incomplete(self, name: str) -> None:
        arr = self._array(name)
        if arr.attrs.get("complete") is not False:
            self._set_attributes(name, arr, {"complete": False})

    def _check_parents(self, name: str) -> None:
        parts = name.split("/")
        for i in range(1, len(parts)):
            parent = "/".join(parts[:i])
            if isinstance(self._node(parent), zarr.Array):
                raise UnsafePathError(
                    f"output array {name} would lie inside the output array {parent}: two input paths "
                    f"collide ({parent}.* and {name}.*); rename one of them"
                )

    # -- per-file arrays ------------------------------------------------------

    def prepare_file(
        self,
        name: str,
        *,
        frames: int,
        channels: int,
        dtype: str,
        chunk_samples: int,
        compression: str,
        attrs: dict[str, Any],
        spans: list[tuple[int, int]],
        n_figures_columns: list[str],
        seam_samples: int,
        keep_done: bool,
    ) -> BlockTable:
        """Create (or reuse) the output array of one file and reset or resume its block table.

        The array is marked incomplete before anything else. It is recreated (old data and block
        table deleted) when shape, dtype, chunks or compression differ. ``attrs`` replace the
        array's attributes (``complete`` is set False). With ``keep_done`` and an unchanged
        array, spans, columns and seam shape, the block statuses are kept (resume); otherwise
        every block becomes pending.

        Parameters
        ----------
        name : str
            Array name (from :func:`array_name`).
        frames, channels : int
            Array shape (samples, channels).
        dtype : str
            ``"float32"`` or ``"float64"``.
        chunk_samples : int
            Chunk length in samples; every span starts on a chunk boundary.
        compression : str
            ``"none"``, ``"lz4"`` or ``"zstd"`` (Blosc with bit shuffle).
        attrs : dict
            Must hold ``source``, ``source_fingerprint`` and ``design_digest``; converted with
            :func:`json_safe`. ``blocks`` is filled in when absent.
        spans : list of (int, int)
            Block regions [start, stop) in frames, in order, covering [0, frames) exactly.
        n_figures_columns : list of str
            Names of the per-channel check figures recorded for each block.
        seam_samples : int
            Samples kept at each block edge for seam checks.
        keep_done : bool
            Resume: keep existing statuses if nothing that matters changed.

        Returns
        -------
        BlockTable
            Statuses and spans (``figures`` and ``seams`` not read).
        """
        self._writable()
        check_name(name)
        span_arr = self._check_prepare_args(name, frames, channels, dtype, chunk_samples, compression, spans, seam_samples)
        meta = json_safe(dict(attrs), f"{name} attributes")
        missing = [k for k in REQUIRED_ATTRS if k not in meta]
        if missing:
            raise StoreError(f"{name}: attributes lack {', '.join(missing)}; the planner needs them to resume")
        meta.setdefault(
            "blocks",
            {
                "count": len(spans),
                "block_samples": int(max((b - a for a, b in spans), default=0)),
                "chunk_samples": int(chunk_samples),
            },
        )
        meta["complete"] = False
        columns = [str(c) for c in n_figures_columns]
        with self._writing(f"{name} (preparing the output array)"):
            self._handles.pop(name, None)
            self._check_parents(name)
            node = self._node(name)
            if isinstance(node, zarr.Group):
                raise UnsafePathError(
                    f"output array {name} would replace a group of other arrays: two input paths collide; rename one"
                )
            if node is not None:
                old_source = node.attrs.get("source")
                if old_source is None:
                    raise StoreError(
                        f"{self.location}: array {name} was not written by twinpass; remove it or choose another store"
                    )
                if old_source != meta["source"]:
                    raise UnsafePathError(
                        f"input {meta['source']!r} and input {old_source!r} both map to the output array {name}; "
                        "rename one of them, or remove the array of the old one"
                    )
            same = node is not None and (
                node.shape == (frames, channels)
                and node.dtype == np.dtype(dtype)
                and node.chunks == (chunk_samples, channels)
                and _compression_of(node) == compression
            )
            table = self._matching_table(name, span_arr, columns, seam_samples, channels) if same else None
            if self.lock_run_id:
                kept = node.attrs.get("written_by") if table is not None and keep_done else None
                meta["written_by"] = _written_by(kept, self.lock_run_id)
            if same:
                self._set_attributes(name, node, meta, replace=True)  # first: one write, complete = False
            else:
                if node is not None:
                    self._mark_incomplete(name)  # first: a deletion cut short never leaves a complete array
                    self._delete(name)
                self._delete(_table_path(name))
                self._create_nodes({name: dataclasses.replace(
                    _array_metadata(frames, channels, dtype, chunk_samples, compression), attributes=meta)})
            if table is not None and keep_done:
                return self.read_block_table(name, figures=False, seams=False)
            if table is None or not self._reset_table(name, table):
                self._create_table(name, span_arr, columns, seam_samples, channels)
            status = np.zeros(span_arr.shape[0], dtype=np.int8)  # all pending, as just written
            span_arr = span_arr.copy()
            for a in (status, span_arr):
                a.setflags(write=False)
            return BlockTable(name=name, status=status, span=span_arr, columns=tuple(columns),
                              seam_samples=int(seam_samples), errors={})

    @staticmethod
    def _check_prepare_args(
        name: str, frames: int, channels: int, dtype: str, chunk_samples: int, compression: str,
        spans: list[tuple[int, int]], seam_samples: int,
    ) -> np.ndarray:
        if dtype not in ("float32", "float64"):
            raise StoreError(f"{name}: output dtype {dtype!r} is not float32 or float64 ([output] dtype)")
        _compressors(compression)
        if frames < 0 or channels < 1 or chunk_samples < 1 or seam_samples < 0:
            raise StoreError(
                f"{name}: invalid layout frames={frames}, channels={channels}, chunk_samples={chunk_samples}, "
                f"seam_samples={seam_samples}"
            )
        span_arr = np.asarray(spans, dtype=np.int64).reshape(len(spans), 2)
        expected_start = 0
        for i, (a, b) in enumerate(span_arr.tolist()):
            if a != expected_start or b <= a or a % chunk_samples or (b % chunk_samples and b != frames):
                raise StoreError(
                    f"{name}: block {i} span [{a}, {b}) does not continue at frame {expected_start} on the "
                    f"{chunk_samples}-sample chunk grid; spans must tile [0, {frames}) in whole chunks"
                )
            expected_start = b
        if expected_start != frames:
            raise StoreError(f"{name}: block spans end at frame {expected_start}, not at the file's {frames} frames")
        return span_arr

    def _matching_table(self, name: str, span: np.ndarray, columns: list[str], seam_samples: int,
                        channels: int) -> zarr.Group | None:
        """The block table of ``name`` if it has these spans, columns and seam shape, else None."""
        node = self._node(_table_path(name))
        if not isinstance(node, zarr.Group):
            return None
        path = _table_path(name)
        st, sp, fig, sm = (self._node(f"{path}/{k}") for k in ("status", "span", "figures", "seams"))
        if not all(isinstance(a, zarr.Array) for a in (st, sp, fig, sm)):
            return None
        n = span.shape[0]
        same = (
            st.shape == (n,)
            and sp.shape == (n, 2)
            and np.array_equal(self._table_values(name, "span", sp), span)
            and fig.shape == (n, channels, len(columns))
            and list(fig.attrs.get("columns", [])) == columns
            and sm.shape == (n, 4, seam_samples, channels)
        )
        return node if same else None

    def _reset_table(self, name: str, group: zarr.Group) -> bool:
        """Reset a matching block table in place, as :meth:`_create_table` would leave it.

        Every status becomes pending first (an interrupted reset never looks resumable), then
        the figure and seam chunks are deleted (they read as NaN, the fill value) and the
        errors cleared. Local stores with Zarr's default chunk keys only (False: nothing done).
        """
        arrays = [self._table_array(name, k) for k in ("status", "figures", "seams")]
        keys = [a.metadata.chunk_key_encoding for a in arrays]
        if self.local_root is None or any(k.name != "default" or getattr(k, "separator", "/") != "/" for k in keys):
            return False
        self._handles.pop(name, None)
        st = arrays[0]
        st[:] = np.full(st.shape, BlockStatus.PENDING, dtype=np.int8)
        folder = self.local_root / _table_path(name)
        for key in ("figures", "seams"):
            chunks = folder / key / "c"  # default chunk keys: "c/i/j/..."
            if chunks.exists():
                shutil.rmtree(chunks)
        if group.attrs.get("errors"):
            self._set_attributes(_table_path(name), group, {"errors": {}})
        return True

    def _create_table(self, name: str, span: np.ndarray, columns: list[str], seam_samples: int, channels: int) -> None:
        path = _table_path(name)
        self._delete(path)
        # The group and its four arrays are written side by side (a first run pays for them
        # for every file). Their statuses read as pending (the fill value) until written, so
        # the order of the documents does not matter.
        shape = (int(span.shape[0]), int(channels), tuple(str(c) for c in columns), int(seam_samples), _TABLE_CHUNK)
        metas = _table_metadata(*shape)
        nodes: dict[str, Any] = {path: GroupMetadata(attributes={"errors": {}})}
        # each node its own attributes: Zarr updates an opened node's attributes in place
        nodes.update({f"{path}/{key}": dataclasses.replace(meta, attributes=copy.deepcopy(meta.attributes))
                      for key, meta in metas.items()})
        docs = _table_documents(*shape)  # the same for every table of this shape
        self._create_nodes(nodes, {f"{path}/{key}" if key else path: doc for key, doc in docs.items()})
        if span.shape[0]:
            write_rows(self._table_array(name, "span"), 0, span)

    # -- block tables ---------------------------------------------------------

    def stored_layout(self, name: str) -> tuple[int, str] | None:
        """Chunk length (samples) and ``[output] compression`` of the existing output array
        ``name``, or None when there is none (or it is not an array)."""
        node = self._node(check_name(name))
        if not isinstance(node, zarr.Array) or len(node.chunks) != 2:
            return None
        return int(node.chunks[0]), _compression_of(node)

    def read_block_table(self, name: str, *, figures: bool = True, seams: bool = True) -> BlockTable:
        """The block table of ``name``; ``figures``/``seams`` False skip reading those arrays."""
        with self._mutex:
            group = self._table(name)
            fig = self._table_array(name, "figures")
            sm = self._table_array(name, "seams")
            errors = {int(k): str(v) for k, v in dict(group.attrs.get("errors") or {}).items()}
            arrays = {
                "status": self._table_values(name, "status").astype(np.int8, copy=False),
                "span": self._table_values(name, "span").astype(np.int64, copy=False),
                "figures": self._table_values(name, "figures", fig) if figures else None,
                "seams": self._table_values(name, "seams", sm) if seams else None,
            }
        for a in arrays.values():
            if a is not None:
                a.setflags(write=False)
        return BlockTable(
            name=name,
            columns=tuple(fig.attrs.get("columns", [])),
            seam_samples=int(sm.shape[2]),
            errors=errors,
            **arrays,
        )

    def read_seams(self, name: str, indices: Iterable[int]) -> np.ndarray:
        """Seams of some blocks, shape (len(indices), 4, seam_samples, channels); rows as SEAM_*."""
        idx = [int(i) for i in indices]
        with self._mutex:
            sm = self._table_array(name, "seams")
            return np.asarray(sm.get_orthogonal_selection((idx, slice(None), slice(None), slice(None))))

    def _chunk_exists(self, arr: zarr.Array, name: str, chunk_index: int) -> bool:
        return self._chunk_key_exists(f"{name}/{arr.metadata.encode_chunk_key((chunk_index, 0))}")

    def _chunk_key_exists(self, key: str) -> bool:
        if self.local_root is not None:
            return (self.local_root / key).is_file()
        fs, root = _url_fs(self.location)
        return bool(fs.exists(root.rstrip("/") + "/" + key))

    def record_block(
        self,
        name: str,
        index: int,
        status: BlockStatus | int,
        figures: np.ndarray | None,
        seams: np.ndarray | None,
        error: str | None,
    ) -> None:
        """Record a block's outcome (driver only; call after its data are written).

        Figures, seams and error are written before the status, so a passed status always has
        them. ``figures`` has shape (channels, n_columns), ``seams`` (4, seam_samples, channels).
        A pass or warn status is refused unless every data chunk of the block exists.
        """
        self.record_blocks(name, [BlockRecord(index, status, figures, seams, error)])

    def record_blocks(self, name: str, records: Sequence[BlockRecord]) -> None:
        """Record the outcomes of several blocks of one array, as :meth:`record_block` each.

        Every record is checked before anything is written (a refused record raises
        :class:`StoreError` and none is recorded); then all figures, all seams, the errors
        and last all statuses are written, one write each, so a passed status always has
        its figures. A block listed twice keeps its last record.
        """
        self._writable()
        latest = {int(r.index): r for r in records}
        if not latest:
            return
        where = f"{name} block {next(iter(latest))}" if len(latest) == 1 else f"{name} blocks {sorted(latest)}"
        with self._writing(f"{where} (block table)"):
            h = self._table_handles(name)
            group, st = h.group, h.status
            n = st.shape[0]
            rows = sorted(latest)
            statuses = {i: BlockStatus(int(latest[i].status)) for i in rows}
            values: dict[str, tuple[list[int], list[np.ndarray]]] = {"figures": ([], []), "seams": ([], [])}
            for i in rows:
                if not 0 <= i < n:
                    raise StoreError(f"{name}: block index {i} is outside 0..{n - 1}")
                if statuses[i] in _DONE:
                    a, b = (int(v) for v in h.span[i])
                    chunk = h.chunk
                    for c in range(a // chunk, -(-b // chunk)):
                        if not self._chunk_key_exists(f"{name}/{h.chunk_key((c, 0))}"):
                            raise StoreError(
                                f"{name}: block {i} [{a}, {b}) recorded as {statuses[i].name.lower()} but its data "
                                f"chunk {c} is missing; write the block's data first"
                            )
                for key, target, value in (("figures", h.figures, latest[i].figures),
                                           ("seams", h.seams, latest[i].seams)):
                    if value is not None:
                        value = np.asarray(value, dtype=np.float64)
                        if value.shape != target.shape[1:]:
                            raise StoreError(
                                f"{name}: block {i} {key} have shape {value.shape}; expected {target.shape[1:]}"
                            )
                        values[key][0].append(i)
                        values[key][1].append(value)
            if any(v not in _DONE for v in statuses.values()):
                self._mark_incomplete(name)
            for key, target in (("figures", h.figures), ("seams", h.seams)):
                idx, vals = values[key]
                if h.folder is not None:  # one block per chunk: each value is one whole chunk
                    for i, v in zip(idx, vals):
                        _write_local_chunks(h.folder / key, target, h.encoders[key], i, v[np.newaxis])
                elif len(idx) == 1:
                    target[idx[0]] = vals[0]
                elif idx:
                    target.oindex[np.asarray(idx)] = np.stack(vals)
            errors = dict(group.attrs.get("errors") or {})
            before = dict(errors)
            for i in rows:
                if latest[i].error is not None:
                    errors[str(i)] = str(latest[i].error)[:_MAX_ERROR_CHARS]
                else:
                    errors.pop(str(i), None)
            if errors != before:
                self._set_attributes(_table_path(name), group, {"errors": errors})
            codes = np.asarray([int(statuses[i]) for i in rows], dtype=np.int8)
            if h.folder is not None:  # whole status chunks from the recorded column, written last
                recorded = h.codes.copy()
                recorded[rows] = codes
                size = int(st.chunks[0])
                try:
                    for c0 in sorted({i // size * size for i in rows}):
                        _write_local_chunks(h.folder / "status", st, h.encoders["status"], c0,
                                            recorded[c0 : c0 + size])
                except BaseException:
                    self._handles.pop(name, None)  # the next record reads the column back from the store
                    raise
                h.codes = recorded
                return
            if _contiguous(rows):
                st[rows[0] : rows[-1] + 1] = codes
            else:
                st.oindex[np.asarray(rows)] = codes
            h.codes[rows] = codes

    def invalidate_blocks(self, name: str, block_indices: Iterable[int]) -> None:
        """Set blocks pending (figures, seams and errors cleared) and the array incomplete."""
        self._writable()
        idx = sorted({int(i) for i in block_indices})
        with self._writing(f"{name} (invalidating blocks)"):
            self._handles.pop(name, None)
            self._mark_incomplete(name)
            group = self._table(name)
            st = self._table_array(name, "status")
            for i in idx:
                if not 0 <= i < st.shape[0]:
                    raise StoreError(f"{name}: block index {i} is outside 0..{st.shape[0] - 1}")
            if not idx:
                return
            status = st[:]
            status[idx] = BlockStatus.PENDING
            st[:] = status
            for key in ("figures", "seams"):
                arr = self._table_array(name, key)
                for i in idx:
                    arr[i] = np.nan
            errors = {k: v for k, v in dict(group.attrs.get("errors") or {}).items() if int(k) not in idx}
            self._set_attributes(_table_path(name), group, {"errors": errors})

    def sync_records(self) -> None:
        """Make the block tables and attributes written so far durable (a local store).

        Block tables and attributes are replaced by renaming new files into place, which is
        atomic but reaches the disk later; call this before marking files complete, so that
        a power cut can never keep a completion flag while losing the records behind it.
        One ``syncfs`` for the store's file system (``sync`` off Linux); a non-local store
        does nothing (its writes are complete when they return).

        Raises
        ------
        StoreError
            The disk reports an error (the files must not be marked complete).
        """
        if self.local_root is None:
            return
        with write_errors(f"the block records of {self.location} (syncing them to disk)"):
            sync_file_system(self.local_root)

    def set_complete(self, name: str, complete: bool, checks_summary: dict[str, Any] | None = None) -> None:
        """Set the ``complete`` attribute (and ``checks``); True needs every block passed or warned."""
        self._writable()
        with self._writing(f"{name} (completion flag)"):
            arr = self._array(name)
            if complete:
                table = self.read_block_table(name, figures=False, seams=False)
                todo = table.todo()
                if todo.size:
                    counts = {k: v for k, v in table.counts().items() if k not in ("pass", "warn") and v}
                    raise StoreError(
                        f"cannot mark {name} complete: {todo.size} of {table.n_blocks} blocks are not done "
                        f"({', '.join(f'{k} {v}' for k, v in counts.items())}; first: {todo[:5].tolist()}); "
                        "rerun to process them"
                    )
            update: dict[str, Any] = {"complete": bool(complete)}
            if checks_summary is not None:
                update["checks"] = json_safe(checks_summary, f"{name} checks")
            self._set_attributes(name, arr, update)

    # -- whole files ----------------------------------------------------------

    def _walk(self, group: zarr.Group, prefix: str = "") -> Iterator[tuple[str, zarr.Array]]:
        for key, node in sorted(_members(group), key=lambda kv: kv[0]):
            if not prefix and key == RESERVED_PREFIX:
                continue
            if isinstance(node, zarr.Array):
                yield prefix + key, node
            else:
                yield from self._walk(node, prefix + key + "/")

    def list_arrays(self) -> list[str]:
        """Names of all output arrays (the block tables excluded), sorted."""
        return [name for name, _ in self._walk(self._root)]

    def file_records(self) -> dict[str, FileRecord]:
        """What the store holds per input file, keyed by source path; foreign arrays are ignored."""
        out: dict[str, FileRecord] = {}
        for name, arr in self._walk(self._root):
            a = arr.attrs.asdict()
            if not all(k in a for k in REQUIRED_ATTRS):
                continue
            complete = a.get("complete") is True
            out[str(a["source"])] = FileRecord(
                source=str(a["source"]),
                source_fingerprint=dict(a["source_fingerprint"] or {}),
                design_digest=str(a["design_digest"]),
                complete=complete,
                frames=int(arr.shape[0]),
                segment=None if a.get("segment") is None else str(a["segment"]),
                array_name=name,
                start_time=None if a.get("start_time") is None else str(a["start_time"]),
                dtype=str(arr.dtype),
                absent=self._absent_chunks(name, arr) if complete else (),
                stream=a["stream"] if isinstance(a.get("stream"), str) else None,
                joins=_joins(a.get("joins")),
                gone_since=gone_since(a),
                channel_names=_labels(a.get("channel_names")),
                units=_labels(a.get("units")),
                checks=a["checks"] if isinstance(a.get("checks"), dict) else None,
            )
        return out

    def absent_chunks(self, name: str) -> tuple[tuple[int, int], ...]:
        """Frame spans [start, stop) of output array ``name`` whose chunk files are missing or
        empty (local stores; elsewhere nothing is checked and the result is empty)."""
        arr = self._node(name)
        return self._absent_chunks(name, arr) if isinstance(arr, zarr.Array) else ()

    def _absent_chunks(self, name: str, arr: zarr.Array) -> tuple[tuple[int, int], ...]:
        # Every chunk of an output array is written (write_empty_chunks), so a chunk file
        # that is missing or empty was lost after it was written: reading it would give the
        # fill value without a word. One stat per chunk.
        if self.local_root is None or len(arr.shape) != 2 or arr.chunks[1] != arr.shape[1]:
            return ()
        return tuple(absent_chunk_spans(self.local_root / name, int(arr.shape[0]), int(arr.chunks[0]),
                                        lambda i: arr.metadata.encode_chunk_key((i, 0))))

    def chunk_files(self, name: str) -> list[tuple[int, int, Path, int]] | None:
        """The chunk files of output array ``name`` in a local store, in time order: (first
        frame, stop frame, path, the bytes its values take decoded) for each; None when the
        store is not local or the array is not chunked along time only."""
        arr = self._node(name)
        if self.local_root is None or not isinstance(arr, zarr.Array) or len(arr.shape) != 2 \
                or arr.chunks[1] != arr.shape[1]:
            return None
        rows, frames = int(arr.chunks[0]), int(arr.shape[0])
        decoded = rows * int(arr.shape[1]) * np.dtype(arr.dtype).itemsize
        folder = self.local_root / name
        return [(i * rows, min(frames, (i + 1) * rows),
                 folder.joinpath(*arr.metadata.encode_chunk_key((i, 0)).split("/")), decoded)
                for i in range(-(-frames // rows))]

    def chunk_format(self, name: str) -> tuple[bool, bool]:
        """``(compressed, checksummed)``: whether output array ``name``'s chunks are compressed
        (a Blosc codec after the bytes) and end with a CRC-32C checksum (the ``crc32c`` codec;
        outputs written by earlier versions have none)."""
        codecs = tuple(self._array(name).metadata.codecs)
        return any(isinstance(c, BloscCodec) for c in codecs), isinstance(codecs[-1], Crc32cCodec)

    def clear_unwritten(self, name: str) -> list[tuple[int, int]]:
        """Delete the data chunks of the blocks of ``name`` that are pending or in error, so
        that their frames read as the fill value (NaN) instead of what an earlier run, or an
        interrupted write, left there; return their frame spans [start, stop).

        For an output that stays incomplete: a block refiltered with another design, or
        after a neighbour changed, that then failed would otherwise keep the old values,
        which a reader of the array cannot tell from results. Blocks that passed, or that
        failed only their checks (their values are this run's), keep their data.
        """
        self._writable()
        table = self.read_block_table(name, figures=False, seams=False)
        arr = self._array(name)
        chunk = int(arr.chunks[0])
        keep = [int(s) for s in (*_DONE, BlockStatus.FAIL)]
        spans = [(int(a), int(b)) for st, (a, b) in zip(table.status, table.span) if int(st) not in keep]
        keys = [f"{name}/{arr.metadata.encode_chunk_key((c, 0))}"
                for a, b in spans for c in range(a // chunk, -(-b // chunk))]
        if not keys:
            return spans
        with self._writing(f"{name} (clearing {len(spans)} block(s) not written)"):
            if self.local_root is not None:
                for key in keys:
                    (self.local_root / key).unlink(missing_ok=True)
            else:
                fs, root = _url_fs(self.location)
                for key in keys:
                    path = root.rstrip("/") + "/" + key
                    if fs.exists(path):
                        fs.rm(path)
        return spans

    def remove_file(self, name: str) -> bool:
        """Delete an output array and its block table; return whether the array existed."""
        self._writable()
        check_name(name)
        with self._writing(f"{name} (removing)"):
            node = self._node(name)
            if isinstance(node, zarr.Group):
                raise StoreError(f"{name} in {self.location} is a group, not an output array; not removed")
            if isinstance(node, zarr.Array):
                self._mark_incomplete(name)
                self._delete(name)
            self._delete(_table_path(name))
        return node is not None

    def force_reset(self, names: Iterable[str]) -> int:
        """Delete the given output arrays and their block tables (inside the store only).

        Returns the number of arrays deleted.
        """
        return sum(self.remove_file(n) for n in list(names))

    def update_attrs(self, name: str, **attrs: Any) -> None:
        """Merge JSON-safe ``attrs`` into an array's attributes (not ``complete=True``: see set_complete).

        Nothing is written when every attribute already has its value (an unchanged file's
        placement, confirmed on each run that touches its segment).
        """
        self._writable()
        if attrs.get("complete"):
            raise StoreError(f"{name}: set complete only with set_complete(), which checks the block table")
        node = self._array(name)
        new = json_safe(attrs, f"{name} attributes")
        held = node.metadata.attributes
        if all(key in held and _same_json(held[key], value) for key, value in new.items()):
            return
        with self._writing(f"{name} (attributes)"):
            self._set_attributes(name, node, new)

    def drop_attrs(self, name: str, *keys: str) -> None:
        """Remove the attributes ``keys`` of an output array (nothing is written when it holds
        none of them); ``complete`` cannot be removed."""
        self._writable()
        if "complete" in keys:
            raise StoreError(f"{name}: the complete attribute is set with set_complete(), not removed")
        node = self._array(name)
        held = node.metadata.attributes
        if not any(key in held for key in keys):
            return
        with self._writing(f"{name} (attributes)"):
            self._set_attributes(name, node, {k: v for k, v in held.items() if k not in keys}, replace=True)

    def read(self, name: str, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Frames [start, stop) of an output array, shape (samples, channels)."""
        arr = self._array(name)
        n = arr.shape[0]
        stop = n if stop is None else stop
        if not 0 <= start <= stop <= n:
            raise StoreError(f"{name}: cannot read frames [{start}, {stop}) of {n}")
        try:
            return np.asarray(arr[start:stop, :])
        except ValueError as e:
            if "checksum" not in str(e):  # Zarr's crc32c codec: "Stored and computed checksum do not match"
                raise
            raise StoreError(f"{name}: frames [{start}, {stop}) cannot be read: a chunk file does not match its "
                             f"CRC-32C checksum (changed since it was written). {_DAMAGED_CHUNK_REMEDY}") from e

    def array_attrs(self, name: str) -> dict[str, Any]:
        """The attributes of an output array."""
        return self._array(name).attrs.asdict()

    # -- scan cache -----------------------------------------------------------

    def read_scan_cache(self) -> dict[str, dict[str, Any]]:
        """The scan cache: one JSON object per input path (relative to the archive root).

        Works on a read-only store. Returns ``{}`` when there is no cache, or one written with
        another layout; entries that are not JSON objects are dropped. The entries' contents
        are checked by their user (:func:`twinpass.io.archive.discover`).
        """
        with self._mutex:
            try:  # read afresh: read once per run, and possibly written by another process
                node = self._root[_SCAN_PATH]
            except KeyError:
                return {}
            if not isinstance(node, zarr.Group):
                return {}
            attrs = node.attrs.asdict()
        files = attrs.get("files")
        if attrs.get("layout") != SCAN_CACHE_LAYOUT or not isinstance(files, dict):
            return {}
        return {str(k): dict(v) for k, v in files.items() if isinstance(v, dict)}

    def write_scan_cache(self, entries: Mapping[str, Mapping[str, Any]]) -> None:
        """Replace the whole scan cache with ``entries`` (driver only).

        Paths not in ``entries`` drop out. Values are converted with :func:`json_safe`.

        Raises
        ------
        StoreError
            Read-only store, a value with no JSON form, or a failed write.
        """
        self._writable()
        doc = {
            "layout": SCAN_CACHE_LAYOUT,
            "files": json_safe({str(k): dict(v) for k, v in entries.items()}, "scan cache"),
        }
        with self._writing(f"the scan cache of {self.location}"):
            self._put_group(_SCAN_PATH, doc)

    # -- root information -----------------------------------------------------

    def _fresh_root(self) -> zarr.Group:
        return zarr.open_group(self._store, mode="r" if self.read_only else "r+", zarr_format=3)

    def read_root_info(self) -> dict[str, Any]:
        """The root ``twinpass`` attribute: {layout, spec, versions, runs} (empty if never set)."""
        return dict(self._fresh_root().attrs.get("twinpass") or {})

    def _write_root_info(self, info: dict[str, Any]) -> None:
        with write_errors(f"the root attributes of {self.location}"):
            self._fresh_root().update_attributes({"twinpass": json_safe(info, "twinpass root attributes")})

    def set_root_info(self, spec: dict[str, Any], versions: dict[str, Any] | None = None) -> None:
        """Record the job's specification and library versions (run history kept)."""
        self._writable()
        with self._mutex:
            info = self.read_root_info()
            info.update(
                layout=STORE_LAYOUT,
                spec=spec,
                versions=library_versions() if versions is None else versions,
                runs=info.get("runs", []),
            )
            self._write_root_info(info)

    def append_run(self, entry: dict[str, Any], details: dict[str, Any] | None = None) -> None:
        """Record a run: ``entry`` = {run_id, start, end, counts, config_digest, ...}.

        The entry gets its own group ``_twinpass/runs/<run_id>`` (attribute ``run``); the root
        attributes keep the latest :data:`RUNS_IN_ROOT` entries and ``runs_total``. Entries of
        stores written before run groups existed get their group before they leave the root
        list, so no entry is lost (:meth:`read_runs`). ``details`` (lists that grow with the
        archive, such as the files left out) go to the run's group alone, as its attribute
        ``details`` (:meth:`read_run_details`).

        Raises
        ------
        StoreError
            Read-only store, an entry without a ``run_id`` usable as a name, or a failed write.
        """
        self._writable()
        entry = json_safe(dict(entry), "run entry")
        with self._mutex:
            info = self.read_root_info()
            runs = [*info.get("runs", []), entry]
            total = int(info.get("runs_total", len(runs) - 1)) + 1
            for old in runs[:-RUNS_IN_ROOT]:
                self._write_run_group(old, replace=False)
            self._write_run_group(entry, replace=True,
                                  details=None if details is None else json_safe(dict(details), "run details"))
            info.setdefault("layout", STORE_LAYOUT)
            info["runs"] = runs[-RUNS_IN_ROOT:]
            info["runs_total"] = total
            self._write_root_info(info)

    def _write_run_group(self, entry: dict[str, Any], *, replace: bool, details: dict[str, Any] | None = None) -> None:
        run_id = str(entry.get("run_id") or "")
        if not _RUN_ID.fullmatch(run_id) or set(run_id) == {"."}:
            raise StoreError(f"run entry has run_id {run_id!r}, which cannot name a group in "
                             f"{self.location}; give each run an id of letters, digits, '.', '_' or '-'")
        path = f"{_RUNS_PATH}/{run_id}"
        with self._writing(f"the run record {path} of {self.location}"):
            if not replace and isinstance(self._node(path), zarr.Group):
                return
            self._put_group(path, {"run": entry} if details is None else {"run": entry, "details": details})

    def read_run_details(self, run_id: str) -> dict[str, Any]:
        """The ``details`` recorded with run ``run_id`` (empty when none). Works read-only."""
        with self._mutex:
            node = self._node(f"{_RUNS_PATH}/{run_id}") if _RUN_ID.fullmatch(str(run_id)) else None
            details = node.attrs.get("details") if isinstance(node, zarr.Group) else None
        return dict(details) if isinstance(details, dict) else {}

    def read_runs(self) -> list[dict[str, Any]]:
        """Every run's entry, oldest first (by ``start``, then ``run_id``). Works read-only."""
        with self._mutex:
            found: dict[str, dict[str, Any]] = {}
            node = self._node(_RUNS_PATH)
            if isinstance(node, zarr.Group):
                for _name, child in node.groups():
                    run = child.attrs.get("run")
                    if isinstance(run, dict) and run.get("run_id"):
                        found[str(run["run_id"])] = dict(run)
            for run in self.read_root_info().get("runs", []):  # written before run groups existed
                if isinstance(run, dict) and run.get("run_id"):
                    found.setdefault(str(run["run_id"]), dict(run))
        return sorted(found.values(), key=lambda r: (str(r.get("start") or ""), str(r["run_id"])))


def _labels(value: Any) -> tuple[str, ...] | None:
    """An array's ``channel_names`` or ``units`` attribute as a tuple, None when absent or not a list of strings."""
    if isinstance(value, list) and all(isinstance(v, str) for v in value):
        return tuple(value)
    return None


def _joins(value: Any) -> tuple[str | None, str | None] | None:
    """The recorded ``joins`` attribute (``{"previous": ..., "next": ...}``) as a pair, or
    None when absent or malformed (the planner then judges joins by the segment ids)."""
    if not isinstance(value, dict) or not {"previous", "next"} <= set(value):
        return None
    prev, nxt = value["previous"], value["next"]
    if not all(v is None or isinstance(v, str) for v in (prev, nxt)):
        return None
    return prev, nxt
