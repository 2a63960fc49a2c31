"""Zarr input reader: one array of a Zarr store (format 2 or 3), opened read-only.

Location: ``store.zarr`` (the store root is the array), ``store.zarr#path/in/store`` or the
reader option ``array``. The array is 1-D (one channel) or 2-D time-major
(samples, channels). Windows are read lazily: only the chunks they touch are loaded.

Attributes used when present: ``sample_rate_hz`` (Hz; else the ``sample_rate_hz`` option,
else unknown) and ``start_time`` (ISO 8601; no zone = UTC). Integer arrays are scaled by
``2**(bits - 1)`` (unsigned ones offset by ``2**(bits - 1)`` first), float arrays taken as is.
"""

from __future__ import annotations

import json
import os
from typing import Any

import numpy as np

from ...errors import ConfigError, CorruptInputError, DamagedInputError, InputError, UnsupportedFormatError
from ._common import (
    READABLE,
    Codec,
    WindowRecording,
    channel_major_note,
    check_options,
    is_url,
    normalize_path,
    option_rate,
    parse_time,
    positive_rate,
    resolve_rate,
)
from .base import Reader, ReaderSpec, RecordingInfo

_MARKERS = ("zarr.json", ".zarray", ".zgroup")
_METADATA = ("zarr.json", ".zarray", ".zattrs")
"""An array's metadata files: ``zarr.json`` (Zarr format 3), ``.zarray`` and ``.zattrs`` (format 2)."""
_NAMED = 5
"""Damaged chunks named in an error (the rest are counted)."""


def split_location(path: str) -> tuple[str, str]:
    """Split ``"store.zarr#array/path"`` into ``("store.zarr", "array/path")``.

    Only a ``#`` right after a name ending in ``.zarr`` separates; otherwise the array path
    is empty (the store root).
    """
    i = path.find("#")
    while i >= 0:
        head = path[:i].rstrip("/\\")
        if head.lower().endswith(".zarr"):
            return head, path[i + 1 :].strip("/")
        i = path.find("#", i + 1)
    return path, ""


class ZarrRecording(WindowRecording):
    """An open Zarr array."""

    def __init__(self, info: RecordingInfo, spec: ReaderSpec, array: Any, codec: Codec) -> None:
        super().__init__(info, spec)
        self._array = array
        self._codec = codec

    def _read(self, start: int, stop: int) -> np.ndarray:
        try:
            block = np.asarray(self._array[start:stop])
        except Exception as exc:  # a damaged chunk: codec and store errors vary (a missing chunk reads
            # as the array's fill value: Zarr writes none for chunks that equal it)
            raise self._damage(start, stop, exc) from exc
        return self._codec.to_float(block).reshape(stop - start, self.info.channels)

    def _damage(self, start: int, stop: int, exc: Exception) -> CorruptInputError:
        """The error for frames [start, stop) that failed with ``exc``, naming the chunks (store
        key and frames; shards, in a sharded array) that fail when read one at a time: a
        :class:`DamagedInputError` when some do, and none of them for an I/O error."""
        a = self._array
        grid = tuple(int(n) for n in (getattr(a, "shards", None) or a.chunks))
        cols = -(-int(a.shape[1]) // grid[1]) if len(grid) == 2 else 1
        bad: list[str] = []
        first: Exception = exc
        io_error = False
        for row in range(start // grid[0], -(-stop // grid[0])):
            lo, hi = row * grid[0], min((row + 1) * grid[0], self.info.frames)
            for col in range(cols):
                at = (row,) if len(grid) == 1 else (row, col)
                try:
                    a[tuple(slice(c * n, (c + 1) * n) for c, n in zip(at, grid))]
                except Exception as one:
                    first = first if bad else one
                    io_error = io_error or isinstance(one, OSError)
                    bad.append(f"{a.metadata.encode_chunk_key(at)} (frames {lo}-{hi})")
        if not bad:
            what = "a chunk of the store is damaged"
        else:
            more = f" and {len(bad) - _NAMED} more" if len(bad) > _NAMED else ""
            what = (f"chunk {bad[0]} of the store is damaged" if len(bad) == 1
                    else f"chunks {', '.join(bad[:_NAMED])}{more} of the store are damaged")
        damaged = bool(bad) and not io_error  # chunks that fail again alone, in decoding, not in I/O
        return (DamagedInputError if damaged else CorruptInputError)(
            f"{self.info.path}: frames [{start}, {stop}) cannot be read: {what} ({type(first).__name__}: {first})",
            path=self.info.path,
        )

    def survey(self) -> tuple[str, ...]:
        """A note when chunks of the array are absent: they read as its fill value, which is
        how Zarr stores chunks that equal it, but also what a lost or uncopied chunk gives."""
        total, present = int(self._array.nchunks), int(self._array.nchunks_initialized)
        if present >= total:
            return ()
        fill = np.asarray(self._array.fill_value).item()
        return (f"{total - present} of its {total} chunks are absent and read as the fill value "
                f"{fill!r}; if the array was written in full, check that it was copied whole",)


class ZarrReader(Reader):
    """One array of a Zarr store, read-only and lazy."""

    name = "zarr"
    suffixes = (".zarr",)
    options = ("array", "sample_rate_hz")

    def guess_can_open(self, path: str) -> bool:
        store, _ = split_location(path)
        store = store.rstrip("/\\")
        if store.lower().endswith(".zarr"):
            return True
        return not is_url(store) and any(os.path.isfile(os.path.join(store, m)) for m in _MARKERS)

    def open(self, path: str, options: dict[str, Any] | None = None) -> ZarrRecording:
        import zarr  # imported here: only Zarr inputs pay for it

        store, frag = split_location(os.fspath(path))
        store = normalize_path(store.rstrip("/\\") or store)
        opts = check_options(self, store, options)
        arr_opt = opts.get("array")
        if arr_opt is not None and not isinstance(arr_opt, str):
            raise ConfigError(f"{store}: option array must be a path inside the store, got {arr_opt!r}")
        arr_opt = (arr_opt or "").strip("/")
        if frag and arr_opt and frag != arr_opt:
            raise ConfigError(
                f"{store}: the location names array {frag!r} but the option array is {arr_opt!r}; keep one"
            )
        arr_path = frag or arr_opt
        shown = f"{store}#{arr_path}" if arr_path else store
        rate_opt = option_rate(shown, opts)
        if not is_url(store) and not os.path.exists(store):
            raise InputError(f"{store}: no such Zarr store", path=store)
        try:
            array = zarr.open_array(store=store, path=arr_path, mode="r")
        except Exception as exc:  # zarr raises many types: not found, wrong node type, bad metadata
            raise self._open_error(zarr, store, arr_path, exc) from exc
        try:
            dtype = np.dtype(array.dtype)
        except TypeError:
            raise UnsupportedFormatError(
                f"{shown}: array dtype {array.dtype!r} is not a numeric sample type", path=store
            ) from None
        codec = Codec.from_dtype(dtype, shown)
        shape = tuple(int(s) for s in array.shape)
        if len(shape) not in (1, 2):
            raise UnsupportedFormatError(
                f"{shown}: array of shape {shape} is not supported; store 1-D (samples,) or 2-D "
                "time-major (samples, channels) arrays",
                path=store,
            )
        frames = shape[0]
        channels = shape[1] if len(shape) == 2 else 1
        if frames == 0 or channels == 0:
            raise CorruptInputError(f"{shown}: array of shape {shape} holds no samples", path=store)
        attrs = dict(array.attrs)
        where = f"{shown}: attribute"
        try:
            rate = positive_rate(attrs.get("sample_rate_hz"), where)
            start = parse_time(attrs["start_time"], where) if attrs.get("start_time") is not None else None
        except CorruptInputError as exc:
            exc.path = store
            raise
        rate = resolve_rate(shown, rate, "attribute sample_rate_hz", rate_opt)
        spec_opts = {k: v for k, v in opts.items() if k != "array"}
        if arr_path:
            spec_opts["array"] = arr_path
        info = RecordingInfo(
            path=shown,
            format=self.name,
            frames=frames,
            channels=channels,
            sample_rate_hz=rate,
            sample_format=dtype.name,
            start_time=start,
            full_scale=codec.full_scale,
            warnings=tuple(n for n in (channel_major_note(shape),) if n is not None),
            extra={"store": store, "array": arr_path, "chunks": tuple(int(c) for c in array.chunks)},
        )
        return ZarrRecording(info, ReaderSpec.create(self.name, store, spec_opts), array, codec)

    @staticmethod
    def _open_error(zarr: Any, store: str, arr_path: str, exc: Exception) -> InputError:
        shown = f"{store}#{arr_path}" if arr_path else store
        if isinstance(exc, PermissionError):
            return InputError(
                f"{shown}: {exc.filename or 'a file of the store'} cannot be opened for reading "
                f"({exc.strerror or exc}); make the store {READABLE}",
                path=store,
            )
        try:
            group = zarr.open_group(store=store, path=arr_path or None, mode="r")
            names = [k for k, v in group.members(max_depth=None) if isinstance(v, zarr.Array)]
        except Exception:
            names = []
        if names:
            listed = ", ".join(names[:20]) + (" ..." if len(names) > 20 else "")
            prefix = f"{arr_path}/" if arr_path else ""
            return InputError(
                f"{shown} is a group, not an array; name one of its arrays as {store}#{prefix}<name> "
                f"or with the option array: {listed}",
                path=store,
            )
        folder = os.path.join(store, *arr_path.split("/")) if arr_path else store
        local = not is_url(store)
        present = [os.path.join(folder, m) for m in _METADATA if local and os.path.isfile(os.path.join(folder, m))]
        missing = (FileNotFoundError, getattr(zarr.errors, "NodeNotFoundError", FileNotFoundError))
        if isinstance(exc, missing):
            none = (f"; the folder {folder} holds no zarr.json (nor .zarray, for Zarr format 2)"
                    if local and not present and os.path.isdir(folder) else "")
            return InputError(f"{shown}: no Zarr array at this location ({exc}){none}", path=store)
        for meta in present:
            try:
                with open(meta, "rb") as fh:
                    json.loads(fh.read())
            except (OSError, ValueError) as bad:
                fix = f"restore {meta} from a copy, or re-export the array"
                return CorruptInputError(
                    f"{shown}: its metadata file {meta} is damaged ({type(bad).__name__}: {bad}); {fix}",
                    path=store,
                    remedy=fix,
                )
        what = f": its metadata file {present[0]} was refused" if present else ""
        return CorruptInputError(
            f"{shown}: cannot be opened as a Zarr array{what} ({type(exc).__name__}: {exc})", path=store
        )
