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

import ast
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
    pread,
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


_LITERAL_NODES = (ast.Expression, ast.Dict, ast.Tuple, ast.List, ast.Constant, ast.UnaryOp, ast.USub, ast.UAdd,
                  ast.Load)
"""The syntax of a header numpy writes: a dict of quoted strings, numbers, booleans and tuples."""


def header_damage(fh: BinaryIO, version: tuple[int, int], exc: Exception) -> str:
    """What is wrong with the header numpy refused (``exc``), after "the NPY header": where its
    text lies and, when that text is not the dict literal numpy writes, the byte of the first
    fault and what it is (numpy's own message then shows parser objects, not places), else
    numpy's message."""
    start = 10 if version == (1, 0) else 12  # magic (6), version (2), header length (2 or 4 bytes)
    raw = pread(fh, 8, start - 8)
    n = int.from_bytes(raw, "little") if len(raw) == start - 8 else -1
    if not 0 <= n <= _HEADER_BYTES_MAX:
        return f"is damaged ({exc})"
    blob = pread(fh, start, n)
    head = f"({n} bytes of text from byte {start})"
    if len(blob) < n:
        return f"{head} is cut short: the file ends at byte {start + len(blob)}"
    try:
        with _HEADER_LOCK:  # Python's parser, as numpy's: one thread at a time (see _HEADER_LOCK)
            fault = _literal_fault(blob.decode("latin-1"))
    except Exception:  # pragma: no cover - the account is a courtesy; numpy's message stays
        fault = None
    if fault is None:
        return f"{head} is damaged: {exc}"
    at, why = fault
    return (f"{head} is damaged at byte {start + at}: {why}; it must be the Python dict literal numpy writes, "
            "of quoted strings, numbers, True/False and tuples")


def _literal_fault(text: str) -> tuple[int, str] | None:
    """(character offset, what is wrong) of the first fault that keeps ``text`` from being a
    literal of the kinds numpy writes in a header, or ``None`` when it is one."""
    starts = [0]
    for line in text.splitlines(keepends=True):
        starts.append(starts[-1] + len(line))

    def offset(lineno: int, col: int) -> int:  # col: UTF-8 bytes into the line, as ast counts
        line = text[starts[lineno - 1]:starts[lineno]] if lineno <= len(starts) - 1 else ""
        return starts[lineno - 1] + len(line.encode("utf-8")[:col].decode("utf-8", "ignore"))

    try:
        tree = ast.parse(text, mode="eval")
    except SyntaxError as e:
        line = max(1, e.lineno or 1)
        return starts[min(line, len(starts)) - 1] + max(0, (e.offset or 1) - 1), f"invalid syntax ({e.msg})"
    odd = [node for node in ast.walk(tree) if not isinstance(node, _LITERAL_NODES)]
    if not odd:
        return None
    node = min(odd, key=lambda nd: (nd.lineno, nd.col_offset))
    what = ast.get_source_segment(text, node) or type(node).__name__
    return offset(node.lineno, node.col_offset), f"{what!r} is not a literal value"


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
            raise CorruptInputError(
                f"{path}: the NPY header {header_damage(fh, version, exc)}", path=path
            ) from None
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
