"""Pieces shared by the built-in readers.

* :class:`Codec` turns stored samples into float64 full-scale units (integer PCM divided by
  ``2**(bits - 1)``, unsigned integers offset by ``2**(bits - 1)`` first, floats as is, then
  ``y = x * gain + offset``);
* positional reads (``os.preadv``) of one byte range into a fresh buffer, so memory follows
  the window, never the file, and concurrent reads from threads do not race on a file position;
* option and time-stamp checks with messages that name the file and the remedy.
"""

from __future__ import annotations

import abc
import datetime as _dt
import math
import operator
import os
import re
import stat
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, BinaryIO

import numpy as np

from ...core.loops import int24_to_float
from ...errors import ConfigError, CorruptInputError, InputError, UnsupportedFormatError
from .base import Reader, ReaderSpec, Recording, RecordingInfo

UTC = _dt.timezone.utc

TRUNCATED_MODES = ("error", "warn")

_KINDS = (
    (stat.S_ISFIFO, "a named pipe (FIFO)"),
    (stat.S_ISSOCK, "a socket"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISDIR, "a folder"),
)


def file_kind(mode: int) -> str | None:
    """What a file of ``st_mode`` ``mode`` is when it is not a regular file (``"a named pipe
    (FIFO)"``, ``"a folder"``...); ``None`` for a regular file, the only kind readers open."""
    if stat.S_ISREG(mode):
        return None
    return next((name for test, name in _KINDS if test(mode)), "not a regular file")

TRUNCATED_HINT = 'to read up to the last whole frame set the reader option truncated="warn"'
"""The last clause of a reader's error for a file cut short (after "; "); discovery
(:mod:`twinpass.io.archive`) gives the configuration key in its remedy instead."""


WRAPPED_HINT = 'to read every whole frame up to the end of the file set the reader option wrapped_sizes="read"'
"""The last clause of the WAV reader's error for a plain RIFF file over 4 GiB whose 32-bit sizes
wrapped (after "; "); discovery gives the configuration key in its remedy instead."""
WRAPPED_MODES = ("error", "read")
CONFIG_TRUNCATED = '[archive] truncated = "warn"'
CONFIG_WRAPPED = '[archive] wrapped_sizes = "read"'
"""The configuration settings that set those reader options for a job."""
CONFIG_HINTS = {
    TRUNCATED_HINT: f"to read up to the last whole frame set {CONFIG_TRUNCATED}",
    WRAPPED_HINT: f"to read every whole frame up to the end of the file set {CONFIG_WRAPPED}",
}
"""Each reader-option hint above as the configuration key a job sets it with."""


def with_config_keys(text: str) -> str:
    """``text`` (a reader's error) with its reader-option hints naming the configuration keys."""
    for hint, key in CONFIG_HINTS.items():
        text = text.replace(hint, key)
    return text


SHORT_READ_HINT = "was it truncated or modified after opening? Reopen it"
"""The last clause of a reader's error for a file that ended before bytes it was reading (after
"; "); a run that planned the file says instead that it changed while the run used it."""
HEADER_REWRITE = "rewrite its header with the real sizes"
"""The start of the WAV reader's remedy for a data chunk whose size field says 0 while frames
follow it (after "; "); discovery makes it the remedy."""
WRAPPED_REWRITE = "Rewrite the file as RF64 (or W64)"


TIME_MAJOR = "store it time-major, shape (samples, channels): transpose it"
"""What to do with a 2-D array stored channel-major, (channels, samples): the remedy that
discovery gives for an array with more channels than ``[archive] max_channels`` and than samples."""


def channel_major_note(shape: tuple[int, ...]) -> str | None:
    """The note for a 2-D array of ``shape`` with more channels than samples, or ``None``.

    Arrays are time-major, shape (samples, channels): one with more channels than samples
    was most likely stored channel-major by mistake. A short file of a stream (one frame of
    eight channels) is that shape too, so this is a note, not an error.
    """
    if len(shape) != 2 or int(shape[1]) <= int(shape[0]):
        return None
    return (
        f"shape {tuple(int(d) for d in shape)} has more channels than samples; arrays must be time-major "
        "(samples, channels): transpose it if it is channel-major"
    )


READABLE = "readable by the user running twinpass"
"""The end of a reader's error for a file it may not read, after "; make ...": the remedy
(discovery gives it as such)."""


def is_url(path: str) -> bool:
    """True for ``scheme://...`` locations, which are passed through untouched."""
    return "://" in path


def normalize_path(path: str | os.PathLike[str]) -> str:
    """Absolute local path (URLs unchanged)."""
    p = os.fspath(path)
    return p if is_url(p) else os.path.abspath(p)


# --------------------------------------------------------------------------- options


def check_options(reader: Reader, path: str, options: Mapping[str, Any] | None) -> dict[str, Any]:
    """Return ``options`` as a dict; unknown keys raise :class:`ConfigError`."""
    opts = dict(options or {})
    unknown = sorted(set(opts) - set(reader.options))
    if unknown:
        internal = reader.snapshot_options  # set by the reader itself, not by users
        raise ConfigError(
            f"{path}: reader {reader.name!r} does not accept the option(s) {', '.join(map(repr, unknown))}; "
            f"accepted options: {', '.join(o for o in reader.options if o not in internal) or '(none)'}"
        )
    return opts


def choice_option(path: str, options: Mapping[str, Any], name: str, choices: tuple[str, ...]) -> str:
    """Reader option ``name``: one of ``choices``, the first by default."""
    mode = options.get(name, choices[0])
    if mode not in choices:
        raise ConfigError(f"{path}: option {name}={mode!r} is not one of {', '.join(map(repr, choices))}")
    return str(mode)


def truncated_mode(path: str, options: Mapping[str, Any]) -> str:
    """The ``truncated`` option: ``"error"`` (default) or ``"warn"``."""
    return choice_option(path, options, "truncated", TRUNCATED_MODES)


def positive_rate(value: Any, where: str) -> float | None:
    """A sample rate in Hz as float, or ``None``; ``where`` names its origin in errors."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise CorruptInputError(f"{where}: sample_rate_hz must be a number of Hz, got {value!r}")
    rate = float(value)
    if not math.isfinite(rate) or rate <= 0:
        raise CorruptInputError(f"{where}: sample_rate_hz must be a positive number of Hz, got {value!r}")
    return rate


def option_rate(path: str, options: Mapping[str, Any]) -> float | None:
    """The ``sample_rate_hz`` option (Hz), validated."""
    try:
        return positive_rate(options.get("sample_rate_hz"), f"{path}: option")
    except CorruptInputError as exc:
        raise ConfigError(str(exc)) from None


def resolve_rate(path: str, stored: float | None, source: str, option: float | None) -> float | None:
    """Combine the rate stored with the data and the ``sample_rate_hz`` option (Hz).

    Either one alone wins; both must agree (to 1e-9 relative), else :class:`ConfigError`.
    """
    if stored is None:
        return option
    if option is not None and abs(stored - option) > 1e-9 * max(stored, option):
        raise ConfigError(
            f"{path}: the {source} says {stored:g} Hz but the option sample_rate_hz is {option:g} Hz; "
            "remove the option for this input or correct the file"
        )
    return stored


_YEAR_ZERO = re.compile(r"year 0 is out of range")
"""How :meth:`datetime.datetime.fromisoformat` refuses a well-formed time of year 0."""


def parse_time(value: Any, where: str) -> _dt.datetime:
    """ISO 8601 text (or a datetime/date) as a timezone-aware UTC datetime.

    Times without a zone are taken as UTC. A time that is well formed but outside the years
    1 to 9999 in UTC (:class:`datetime.datetime`'s range) is refused as out of range.
    """

    def out_of_range(side: str) -> CorruptInputError:
        return CorruptInputError(
            f"{where}: start_time {value!r} is {side}, outside the times twinpass can hold (years 1 to 9999)"
        )

    try:
        if isinstance(value, _dt.datetime):
            t = value
        elif isinstance(value, _dt.date):
            t = _dt.datetime(value.year, value.month, value.day)
        elif isinstance(value, str):
            t = _dt.datetime.fromisoformat(value.strip())
        else:
            raise TypeError(f"expected ISO 8601 text, got {type(value).__name__}")
    except (TypeError, ValueError) as exc:
        if _YEAR_ZERO.fullmatch(str(exc)):
            raise out_of_range("in year 0") from None
        raise CorruptInputError(
            f"{where}: start_time {value!r} is not an ISO 8601 time such as "
            f"'2024-05-01T12:00:00Z' ({exc})"
        ) from None
    try:
        return t.replace(tzinfo=UTC) if t.tzinfo is None else t.astimezone(UTC)
    except OverflowError:  # its offset takes it past year 1 or year 9999
        raise out_of_range("before year 1 in UTC" if t.year < 5000 else "after year 9999 in UTC") from None


# --------------------------------------------------------------------------- samples


@dataclass(frozen=True)
class Codec:
    """How one stored sample maps to float64.

    ``kind`` is ``"i"`` (signed integer), ``"u"`` (unsigned integer) or ``"f"`` (IEEE
    float); ``itemsize`` the bytes per sample (3 = packed 24-bit signed);
    ``byteorder`` ``"<"`` or ``">"``. Integers become ``v / 2**(bits - 1)`` (unsigned:
    ``(v - 2**(bits - 1)) / 2**(bits - 1)``), floats stay as they are, then
    ``y = x * gain + offset``.
    """

    kind: str
    itemsize: int
    byteorder: str = "<"
    gain: float = 1.0
    offset: float = 0.0

    @classmethod
    def from_dtype(cls, dtype: np.dtype[Any], where: str) -> "Codec":
        """Codec for a numpy dtype; unsupported dtypes raise :class:`UnsupportedFormatError`."""
        dtype = np.dtype(dtype)
        ok = (dtype.kind in "iu" and dtype.itemsize in (1, 2, 4, 8)) or (
            dtype.kind == "f" and dtype.itemsize in (2, 4, 8)
        )
        if not ok or dtype.fields is not None or dtype.subdtype is not None:
            raise UnsupportedFormatError(
                f"{where}: sample type {dtype.str!r} is not supported; use signed/unsigned integers "
                "of 8-64 bits or float16/32/64 samples",
                path=where,
            )
        order = dtype.byteorder
        if order in "=|":
            order = "<" if np.little_endian else ">"
        return cls(dtype.kind, dtype.itemsize, order)

    @property
    def bits(self) -> int:
        return 8 * self.itemsize

    @property
    def dtype(self) -> np.dtype[Any]:
        """The numpy dtype of one stored sample (int32 for packed 24-bit, after decoding)."""
        if self.itemsize == 3:
            return np.dtype("<i4")
        return np.dtype(f"{self.byteorder}{self.kind}{self.itemsize}")

    @property
    def full_scale(self) -> float | None:
        """Magnitude of full scale after scaling; ``None`` for float data."""
        return None if self.kind == "f" else abs(self.gain)

    def to_float(self, values: np.ndarray) -> np.ndarray:
        """Scale typed samples (any shape) to a new float64 array."""
        out = values.astype(np.float64)
        if self.kind != "f":
            half = 2.0 ** (self.bits - 1)
            if self.kind == "u":
                out -= half
            out *= 1.0 / half
        return self._gain_offset(out)

    def _gain_offset(self, out: np.ndarray) -> np.ndarray:
        if self.gain != 1.0:
            out *= self.gain
        if self.offset != 0.0:
            out += self.offset
        return out

    def decode(self, raw: np.ndarray, channels: int) -> np.ndarray:
        """Interleaved sample bytes (``uint8``) as float64, shape (frames, channels).

        ``raw`` must be a buffer the caller owns: native float64 samples are scaled in it
        and returned as a view of it, without a copy."""
        if self.itemsize == 3:  # packed 24-bit: decoded and scaled in one pass
            out = int24_to_float(raw, 2.0**-23, big_endian=self.byteorder == ">")
            return self._gain_offset(out).reshape(-1, channels)
        if self.dtype == np.dtype(np.float64) and self.dtype.isnative:
            # Native float64: the bytes just read are the samples; scale them in place.
            return self._gain_offset(raw.view(np.float64)).reshape(-1, channels)
        return self.to_float(raw.view(self.dtype)).reshape(-1, channels)


# --------------------------------------------------------------------------- files


_SEEK_LOCK = threading.Lock()


def pread(fh: BinaryIO, offset: int, nbytes: int) -> bytes:
    """Up to ``nbytes`` bytes at ``offset`` (fewer at the end of the file)."""
    if hasattr(os, "pread"):
        return os.pread(fh.fileno(), nbytes, offset)
    with _SEEK_LOCK:  # pragma: no cover - platforms without pread
        fh.seek(offset)
        return fh.read(nbytes)


def read_exact(fh: BinaryIO, path: str, offset: int, nbytes: int) -> np.ndarray:
    """Exactly ``nbytes`` bytes at byte ``offset`` as a new ``uint8`` array.

    Memory is the window only. A short read (the file shrank) raises
    :class:`CorruptInputError` naming the byte offset.
    """
    buf = np.empty(nbytes, dtype=np.uint8)
    view = memoryview(buf)
    got = 0
    while got < nbytes:
        if hasattr(os, "preadv"):
            n = os.preadv(fh.fileno(), [view[got:]], offset + got)
        else:  # pragma: no cover - platforms without preadv
            with _SEEK_LOCK:
                fh.seek(offset + got)
                n = fh.readinto(view[got:]) or 0
        if n <= 0:
            raise CorruptInputError(
                f"{path}: the file ends at byte {offset + got} but bytes up to {offset + nbytes} "
                f"were expected; {SHORT_READ_HINT}",
                path=path,
            )
        got += n
    return buf


def open_binary(path: str) -> tuple[BinaryIO, int]:
    """Open ``path`` read-only (``'rb'``, unbuffered); return the handle and its size in bytes.

    Only regular files are opened: a named pipe, socket or device raises
    :class:`~twinpass.errors.InputError` (opened non-blocking, so a pipe without a writer
    does not hang).
    """
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    except FileNotFoundError:
        raise InputError(f"{path}: no such file", path=path) from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a directory, not a file", path=path) from None
    except PermissionError as exc:
        raise InputError(
            f"{path}: cannot be opened for reading ({exc.strerror or exc}); make the file {READABLE}", path=path
        ) from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be opened for reading ({exc.strerror or exc})", path=path) from None
    try:
        st = os.fstat(fd)
        kind = file_kind(st.st_mode)
        if kind is not None:
            raise InputError(f"{path}: is {kind}; only regular files can be read", path=path)
        if hasattr(os, "set_blocking"):
            os.set_blocking(fd, True)
        fh = os.fdopen(fd, "rb", buffering=0)
    except OSError as exc:  # pragma: no cover - fstat on an open file rarely fails
        os.close(fd)
        raise InputError(f"{path}: cannot stat ({exc})", path=path) from None
    except BaseException:
        os.close(fd)
        raise
    return fh, st.st_size  # type: ignore[return-value]


# --------------------------------------------------------------------------- recordings


def check_window(info: RecordingInfo, start: Any, stop: Any) -> tuple[int, int]:
    """Validate a frame window [start, stop) against ``info.frames``."""
    try:
        a, b = operator.index(start), operator.index(stop)
    except TypeError:
        raise InputError(
            f"{info.path}: frame window [{start!r}, {stop!r}) must be given as integers", path=info.path
        ) from None
    if not 0 <= a <= b <= info.frames:
        raise InputError(
            f"{info.path}: frame window [{a}, {b}) is outside the recording's frames [0, {info.frames})",
            path=info.path,
        )
    return a, b


class WindowRecording(Recording):
    """A recording that checks windows, then asks :meth:`_read` for [start, stop)."""

    def __init__(self, info: RecordingInfo, spec: ReaderSpec) -> None:
        self.info = info
        self.spec = spec
        self._closed = False

    def read(self, start: int, stop: int) -> np.ndarray:
        a, b = check_window(self.info, start, stop)
        if self._closed:
            raise InputError(
                f"{self.info.path}: the recording was closed; reopen it with its spec.open()",
                path=self.info.path,
            )
        if a == b:
            return np.empty((0, self.info.channels), dtype=np.float64)
        return self._read(a, b)

    @abc.abstractmethod
    def _read(self, start: int, stop: int) -> np.ndarray:
        """Frames [start, stop), already validated and non-empty."""

    def close(self) -> None:
        self._closed = True

    def __repr__(self) -> str:
        i = self.info
        return (
            f"<{type(self).__name__} {i.path!r} {i.frames} frames x {i.channels} ch, "
            f"{i.sample_format}, {i.sample_rate_hz} Hz>"
        )


class FileRecording(WindowRecording):
    """A recording backed by one read-only file handle."""

    def __init__(self, info: RecordingInfo, spec: ReaderSpec, fh: BinaryIO) -> None:
        super().__init__(info, spec)
        self._fh = fh

    def read_bytes(self, offset: int, nbytes: int) -> np.ndarray:
        return read_exact(self._fh, self.info.path, offset, nbytes)

    def close(self) -> None:
        super().close()
        self._fh.close()

    def __del__(self) -> None:
        fh = getattr(self, "_fh", None)
        if fh is not None:
            fh.close()


class InterleavedRecording(FileRecording):
    """Frames stored one after the other from byte ``offset``, channels interleaved."""

    def __init__(self, info: RecordingInfo, spec: ReaderSpec, fh: BinaryIO, codec: Codec, offset: int) -> None:
        super().__init__(info, spec, fh)
        self.codec = codec
        self.offset = offset
        self.frame_bytes = codec.itemsize * info.channels

    def _read(self, start: int, stop: int) -> np.ndarray:
        raw = self.read_bytes(self.offset + start * self.frame_bytes, (stop - start) * self.frame_bytes)
        return self.codec.decode(raw, self.info.channels)


class FileReader(Reader):
    """A reader of one local file: checks options, opens it read-only, closes it on errors."""

    def open(self, path: str, options: dict[str, Any] | None = None) -> FileRecording:
        path = normalize_path(path)
        opts = check_options(self, path, options)
        fh, size = open_binary(path)
        try:
            return self._open_file(path, fh, size, opts)
        except BaseException:
            fh.close()
            raise

    @abc.abstractmethod
    def _open_file(self, path: str, fh: BinaryIO, size: int, options: dict[str, Any]) -> FileRecording:
        """Parse the open file (``size`` bytes) and return its recording."""
