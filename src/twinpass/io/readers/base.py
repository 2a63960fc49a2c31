"""The reader interface.

A reader opens one recording lazily and reads any window [a, b) of frames as float64,
shape (b - a, channels), scaled to physical/full-scale units:

* integer PCM: divided by 2**(bits - 1) (8-bit unsigned WAV is offset by 128 first), so
  full scale is +-1;
* float data: taken as is;
* a sidecar ``gain``/``offset`` applies after that: ``y = x * gain + offset``.

Readers never load a whole file and open inputs read-only. A :class:`ReaderSpec` is a
small picklable description (format name, absolute path, options) from which any worker
process can reopen the recording.
"""

from __future__ import annotations

import abc
import datetime as _dt
from dataclasses import dataclass, field
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np


@dataclass(frozen=True)
class RecordingInfo:
    """What a reader knows of one recording without reading its samples."""

    path: str
    """Absolute path (or URL) of the file."""
    format: str
    """Registry name of the reader, e.g. ``"wav"``, ``"npy"``, ``"raw"``, ``"zarr"``."""
    frames: int
    """Number of samples per channel."""
    channels: int
    sample_rate_hz: float | None
    """Samples per second; ``None`` when the format does not say (config must supply it)."""
    sample_format: str
    """Encoding as stored, e.g. ``"pcm16"``, ``"pcm24"``, ``"float32"``, ``"uint8"``."""
    start_time: _dt.datetime | None = None
    """Time of the first sample (timezone-aware UTC where known), else ``None``."""
    full_scale: float | None = None
    """Magnitude of full scale after scaling (1.0 for integer PCM), ``None`` for float data."""
    warnings: tuple[str, ...] = ()
    """Non-fatal findings, e.g. a truncated data chunk read up to the last whole frame."""
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class ReaderSpec:
    """Picklable description from which a recording can be reopened anywhere."""

    format: str
    path: str
    options: tuple[tuple[str, Any], ...] = ()

    @classmethod
    def create(
        cls, format: str, path: str, options: Mapping[str, Any] | None = None
    ) -> "ReaderSpec":
        """Build a spec with ``options`` frozen as key-sorted ``(key, value)`` pairs."""
        return cls(format, path, tuple(sorted((options or {}).items())))

    def open(self) -> "Recording":
        from .registry import get_reader

        return get_reader(self.format).open(self.path, dict(self.options))

    def as_found(self) -> "ReaderSpec":
        """This spec without the options in which its reader kept what it read beside the file
        when it first opened it (:attr:`Reader.snapshot_options`, e.g. a raw file's sidecar):
        it opens the file as the files read now, to tell whether they changed since."""
        from .registry import get_reader

        kept = frozenset(get_reader(self.format).snapshot_options)
        return ReaderSpec(self.format, self.path, tuple((k, v) for k, v in self.options if k not in kept))


def _reopen(spec: ReaderSpec) -> "Recording":
    return spec.open()


class Recording(abc.ABC):
    """An open recording. Use as a context manager or call :meth:`close`."""

    info: RecordingInfo
    spec: ReaderSpec

    @abc.abstractmethod
    def read(self, start: int, stop: int) -> np.ndarray:
        """Frames [start, stop) as float64, shape (stop - start, channels), scaled.

        Raises :class:`~twinpass.errors.InputError` (naming the file and the frame range)
        when the range is outside [0, frames] or the data cannot be read.
        """

    def survey(self) -> tuple[str, ...]:
        """Findings worth a note that opening does not look for, because they cost more than
        reading a header (e.g. chunks of a Zarr array that are absent). Asked once per file
        when an archive is examined, not at every block; none by default."""
        return ()

    def close(self) -> None:  # pragma: no cover - default no-op
        """Release file handles."""

    def __enter__(self) -> "Recording":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __reduce__(self) -> tuple[Any, ...]:
        # A pickled recording travels as its spec and is reopened on arrival.
        return (_reopen, (self.spec,))


class Reader(abc.ABC):
    """A format plug-in. Subclasses are registered by name in :mod:`.registry`.

    Third-party readers register through the ``twinpass.readers`` entry-point group,
    whose value points at a :class:`Reader` subclass.
    """

    name: ClassVar[str]
    """Registry name, e.g. ``"wav"``."""
    suffixes: ClassVar[tuple[str, ...]] = ()
    """File name endings this reader claims, lower case with the dot, e.g. ``(".wav",)``."""
    options: ClassVar[tuple[str, ...]] = ()
    """Option keys :meth:`open` accepts; any other key raises :class:`~twinpass.errors.ConfigError`."""
    snapshot_options: ClassVar[tuple[str, ...]] = ()
    """Options among :attr:`options` in which :meth:`open` keeps, in the recording's spec, what
    it read beside the file (a raw file's sidecar), so that every reopening from the spec
    decodes the file as the first opening did (:meth:`ReaderSpec.as_found` drops them)."""

    def guess_can_open(self, path: str) -> bool:
        """Cheap test on the name (and at most the first bytes) of ``path``."""
        return path.lower().endswith(self.suffixes)

    @abc.abstractmethod
    def open(self, path: str, options: dict[str, Any] | None = None) -> Recording:
        """Open ``path`` read-only. Raise :class:`~twinpass.errors.InputError` subclasses."""
