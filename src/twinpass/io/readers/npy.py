"""NPY reader: numpy ``.npy`` files, 1-D (one channel) or 2-D time-major (samples, channels).

The header is parsed with :mod:`numpy.lib.format` (the same parser ``np.load`` uses) and
each window is read with one positional read of its bytes (one per channel for
Fortran-order arrays), so memory follows the window. Unlike ``np.load(mmap_mode="r")``
no whole-file mapping stays resident as a long-lived recording is read window after window.

Scaling: signed integers ``v / 2**(bits - 1)``; unsigned integers
``(v - 2**(bits - 1)) / 2**(bits - 1)`` (``uint8``: ``(v - 128) / 128``); float16/32/64 as
stored. ``sample_format`` is the numpy dtype name (``"int16"``, ``"float32"``...).

Reader options
--------------
``sample_rate_hz``: the file holds no rate; without this option ``sample_rate_hz`` is ``None``.
``truncated``: ``"error"`` (default) or ``"warn"``: a C-order file shorter than its header
claims is an error, or with ``"warn"`` ends at the last whole frame (with a warning).
"""

from __future__ import annotations

import functools
import io
import threading
from typing import Any, BinaryIO

import numpy as np
import numpy.lib.format as npformat

from ...errors import CorruptInputError, UnsupportedFormatError
from ._common import (
    TRUNCATED_HINT,
    Codec,
    FileReader,
    InterleavedRecording,
    channel_major_note,
    option_rate,
    truncated_mode,
)
from .base import ReaderSpec, RecordingInfo

_HEADER_LOCK = threading.Lock()
"""Held while numpy parses a header. numpy evaluates the header's dict with
``ast.literal_eval``, and CPython 3.11's AST constructor keeps its recursion depth in state
that all threads share: two threads parsing at once can fail with ``SystemError: AST
constructor recursion depth mismatch`` (python/cpython#106905), which would make a sound file
look damaged. The archive scan and the block reads open files on several threads."""
_HEADER_ATTEMPTS = 3
"""Parses tried when that error still comes (another library's thread using the AST meanwhile)."""
_HEADER_BYTES_MAX = 1 << 16
"""Longer headers are left to numpy to read and refuse (it allows 10,000 characters)."""
_HEADERS_KEPT = 1024
"""Parsed headers kept, by their bytes (files of one archive mostly share a few)."""


def read_header(fh: BinaryIO, version: tuple[int, int]) -> tuple[tuple[int, ...], bool, np.dtype[Any]]:
    """(shape, fortran_order, dtype) from the header after the magic string, as numpy reads it.

    ``fh`` is positioned just after :func:`numpy.lib.format.read_magic`; it is left at the
    first data byte. The header's bytes are read first: one parsed before (the same length,
    shape and dtype: every file of an archive of equal files, every block read of a file)
    is not parsed again. numpy parses the others, one at a time in this process (see
    :data:`_HEADER_LOCK`).
    """
    start = fh.tell()
    size_bytes = 2 if version == (1, 0) else 4  # the header length: uint16 in 1.0, uint32 after
    length = fh.read(size_bytes)
    if len(length) == size_bytes and (n := int.from_bytes(length, "little")) <= _HEADER_BYTES_MAX:
        header = fh.read(n)
        if len(header) == n:
            return _parse_header(version, length + header)
    fh.seek(start)  # short or oversized: numpy reads it again and says what is wrong
    return _parse_header_from(fh, version)


@functools.lru_cache(maxsize=_HEADERS_KEPT)
def _parse_header(version: tuple[int, int], blob: bytes) -> tuple[tuple[int, ...], bool, np.dtype[Any]]:
    """numpy's parse of a header's bytes (length field included); kept for the next file."""
    return _parse_header_from(io.BytesIO(blob), version)


def _parse_header_from(fh: BinaryIO, version: tuple[int, int]) -> tuple[tuple[int, ...], bool, np.dtype[Any]]:
    """numpy's parse of the header at ``fh``, under :data:`_HEADER_LOCK`; tried again after
    CPython's spurious recursion-depth ``SystemError``."""
    start = fh.tell()
    for attempt in range(_HEADER_ATTEMPTS):
        try:
            with _HEADER_LOCK:
                if version == (1, 0):
                    return npformat.read_array_header_1_0(fh)
                # 2.0 and 3.0 share the layout; plain numeric dtypes keep 3.0 headers ASCII.
                return npformat.read_array_header_2_0(fh)
        except SystemError as exc:
            if "recursion depth mismatch" not in str(exc) or attempt == _HEADER_ATTEMPTS - 1:
                raise
            fh.seek(start)
    raise AssertionError("unreachable")  # pragma: no cover


class NpyRecording(InterleavedRecording):
    """An open ``.npy`` file; Fortran-order arrays are read one channel column at a time."""

    def __init__(
        self, info: RecordingInfo, spec: ReaderSpec, fh: BinaryIO, codec: Codec, offset: int, stored_frames: int
    ) -> None:
        super().__init__(info, spec, fh, codec, offset)
        self._stored_frames = stored_frames

    def _read(self, start: int, stop: int) -> np.ndarray:
        if not self.info.extra["fortran_order"]:
            return super()._read(start, stop)
        size, n = self.codec.itemsize, stop - start
        out = np.empty((n, self.info.channels), dtype=np.float64)
        for c in range(self.info.channels):  # each channel is one contiguous column
            raw = self.read_bytes(self.offset + (c * self._stored_frames + start) * size, n * size)
            out[:, c] = self.codec.decode(raw, 1)[:, 0]
        return out


class NpyReader(FileReader):
    """numpy ``.npy`` arrays, time-major."""

    name = "npy"
    suffixes = (".npy",)
    options = ("sample_rate_hz", "truncated")

    def _open_file(self, path: str, fh: BinaryIO, size: int, opts: dict[str, Any]) -> NpyRecording:
        mode = truncated_mode(path, opts)
        rate = option_rate(path, opts)
        try:
            version = npformat.read_magic(fh)
        except ValueError as exc:
            raise UnsupportedFormatError(f"{path}: not an NPY file ({exc})", path=path) from None
        try:
            shape, fortran, dtype = read_header(fh, version)
        except Exception as exc:  # numpy's parser leaks ValueError, SyntaxError, tokenize.TokenError...
            raise CorruptInputError(f"{path}: the NPY header is damaged ({exc})", path=path) from None
        offset = fh.tell()
        if dtype.hasobject:
            raise UnsupportedFormatError(f"{path}: NPY arrays of Python objects are not supported", path=path)
        codec = Codec.from_dtype(dtype, path)
        if len(shape) not in (1, 2):
            raise UnsupportedFormatError(
                f"{path}: array of shape {shape} is not supported; store 1-D (samples,) or 2-D "
                "time-major (samples, channels) arrays",
                path=path,
            )
        if any(int(d) < 0 for d in shape):
            raise CorruptInputError(f"{path}: the NPY header gives a negative shape {shape}", path=path)
        stored = int(shape[0])
        channels = int(shape[1]) if len(shape) == 2 else 1
        fortran = bool(fortran) and len(shape) == 2 and channels > 1
        warnings: list[str] = []
        if channels == 0:
            raise CorruptInputError(f"{path}: array of shape {shape} has no channels", path=path)
        frame_bytes = channels * codec.itemsize
        claimed = offset + stored * frame_bytes
        frames = stored
        if size < claimed:
            present = max(0, size - offset) // frame_bytes
            what = (
                f"the NPY header claims {stored} frames (shape {shape}, {claimed} bytes) but the file "
                f"has {size} bytes"
            )
            if fortran or mode == "error":
                hint = "re-export it" if fortran else TRUNCATED_HINT
                raise CorruptInputError(f"{path}: {what}; the file is truncated; {hint}", path=path)
            frames = present
            warnings.append(f"{what}; read up to the last whole frame ({present})")
        if frames == 0:
            raise CorruptInputError(f"{path}: array of shape {shape} holds no frames", path=path)
        if (note := channel_major_note(shape)) is not None:
            warnings.append(note)
        info = RecordingInfo(
            path=path,
            format=self.name,
            frames=frames,
            channels=channels,
            sample_rate_hz=rate,
            sample_format=np.dtype(dtype).name,
            full_scale=codec.full_scale,
            warnings=tuple(warnings),
            extra={"data_offset": offset, "fortran_order": fortran, "dtype": np.dtype(dtype).str},
        )
        spec = ReaderSpec.create(self.name, path, opts)
        return NpyRecording(info, spec, fh, codec, offset, stored)
