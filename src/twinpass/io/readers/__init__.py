"""Lazy, read-only input readers and their registry.

``open_recording(path)`` picks a reader by file name (or ``format=``), opens the file
read-only without loading it, and returns a :class:`Recording` whose ``read(start, stop)``
gives frames [start, stop) as float64, shape (stop - start, channels), in full-scale units.
``Recording.spec`` reopens the same recording in another process.

Built-in readers: ``wav`` (RIFF/RF64/BW64), ``npy``, ``raw`` (with a TOML/JSON sidecar),
``zarr``. Packages add more through the ``twinpass.readers`` entry-point group.
"""

from .base import Reader, ReaderSpec, Recording, RecordingInfo
from .npy import NpyReader
from .raw import RawReader
from .registry import (
    BUILTIN_READERS,
    ENTRY_POINT_GROUP,
    ReaderPluginWarning,
    available_readers,
    get_reader,
    open_recording,
    reader_for,
    register_reader,
    reload_readers,
)
from .wav import WavReader
from .zarr_input import ZarrReader

__all__ = [
    "BUILTIN_READERS",
    "ENTRY_POINT_GROUP",
    "NpyReader",
    "RawReader",
    "Reader",
    "ReaderPluginWarning",
    "ReaderSpec",
    "Recording",
    "RecordingInfo",
    "WavReader",
    "ZarrReader",
    "available_readers",
    "get_reader",
    "open_recording",
    "reader_for",
    "register_reader",
    "reload_readers",
]
