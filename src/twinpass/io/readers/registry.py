"""Registry of input readers: the built-ins plus plug-ins from the ``twinpass.readers`` group.

A third-party package adds a format by pointing an entry point of the group
``twinpass.readers`` at a :class:`~twinpass.io.readers.base.Reader` subclass, e.g. in its
``pyproject.toml``::

    [project.entry-points."twinpass.readers"]
    myformat = "mypackage.myreader:MyReader"

Plug-ins are loaded on first use. One that fails to import, is not a ``Reader`` or reuses a
taken name is skipped with a :class:`ReaderPluginWarning`, never an exception. Built-ins are
tried first when guessing a file's reader, then plug-ins in name order.
"""

from __future__ import annotations

import importlib.metadata
import os
import threading
import warnings
from collections.abc import Mapping
from typing import Any

from ...errors import ConfigError, UnsupportedFormatError
from ._common import normalize_path
from .base import Reader, Recording
from .npy import NpyReader
from .raw import RawReader
from .wav import WavReader
from .zarr_input import ZarrReader

ENTRY_POINT_GROUP = "twinpass.readers"
"""Entry-point group through which packages add readers."""

BUILTIN_READERS: tuple[type[Reader], ...] = (WavReader, NpyReader, RawReader, ZarrReader)

_HOW_TO_ADD = (
    "To add a format, subclass twinpass.io.readers.Reader and declare it in your package's "
    f'pyproject.toml under [project.entry-points."{ENTRY_POINT_GROUP}"] '
    '(e.g. myformat = "mypackage.myreader:MyReader"), or call '
    "twinpass.io.readers.register_reader(MyReader)."
)


class ReaderPluginWarning(UserWarning):
    """A reader plug-in could not be loaded and was skipped."""


_lock = threading.RLock()
_readers: dict[str, Reader] | None = None
_added: dict[str, Reader] = {}


def _as_reader(obj: Any) -> Reader:
    if isinstance(obj, type) and issubclass(obj, Reader):
        obj = obj()
    if not isinstance(obj, Reader):
        raise TypeError(f"{obj!r} is not a twinpass.io.readers.Reader subclass or instance")
    name = getattr(obj, "name", None)
    if not isinstance(name, str) or not name:
        raise TypeError(f"{type(obj).__name__} has no registry name (class attribute 'name')")
    return obj


def _warn(message: str) -> None:
    warnings.warn(message, ReaderPluginWarning, stacklevel=3)


def _load_plugins(readers: dict[str, Reader]) -> None:
    try:
        eps = sorted(
            {(ep.name, ep.value): ep for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP)}.values(),
            key=lambda ep: (ep.name, ep.value),
        )
    except Exception as exc:  # broken package metadata somewhere on sys.path
        _warn(f"twinpass: reader plug-ins could not be listed ({type(exc).__name__}: {exc}); none loaded")
        return
    for ep in eps:
        dist = getattr(getattr(ep, "dist", None), "name", None)
        origin = f"entry point {ep.name} = {ep.value!r} in group {ENTRY_POINT_GROUP!r}" + (
            f" of package {dist!r}" if dist else ""
        )
        try:
            reader = _as_reader(ep.load())
        except Exception as exc:
            _warn(f"twinpass: reader plug-in skipped: {origin} failed to load ({type(exc).__name__}: {exc})")
            continue
        if reader.name in readers:
            _warn(f"twinpass: reader plug-in skipped: {origin} uses the name {reader.name!r}, already taken")
            continue
        readers[reader.name] = reader


def _registry() -> dict[str, Reader]:
    global _readers
    with _lock:
        if _readers is None:
            readers: dict[str, Reader] = {cls.name: cls() for cls in BUILTIN_READERS}
            readers.update(_added)
            _load_plugins(readers)
            _readers = readers
        return _readers


def reload_readers() -> None:
    """Forget loaded plug-ins; the next lookup scans the entry points again."""
    global _readers
    with _lock:
        _readers = None


def register_reader(reader: type[Reader] | Reader, *, replace: bool = False) -> Reader:
    """Register a reader under its ``name`` for this process.

    Parameters
    ----------
    reader : Reader subclass or instance
        The format plug-in; a class is instantiated without arguments.
    replace : bool
        Replace a reader already registered under the same name.

    Returns
    -------
    Reader
        The registered instance.

    Raises
    ------
    ConfigError
        ``reader`` is not a :class:`Reader`, or its name is taken and ``replace`` is false.
    """
    try:
        inst = _as_reader(reader)
    except TypeError as exc:
        raise ConfigError(f"cannot register reader: {exc}") from None
    with _lock:
        readers = _registry()
        if inst.name in readers and not replace:
            raise ConfigError(
                f"a reader named {inst.name!r} is already registered ({type(readers[inst.name]).__name__}); "
                "pass replace=True to replace it"
            )
        _added[inst.name] = inst
        readers[inst.name] = inst
    return inst


def available_readers() -> list[str]:
    """Names of the installed readers: built-ins first, then plug-ins.

    Returns
    -------
    list of str
        Registry names, e.g. ``["wav", "npy", "raw", "zarr"]``.
    """
    return list(_registry())


def _installed_text() -> str:
    parts = []
    for name, r in _registry().items():
        suffixes = ", ".join(getattr(r, "suffixes", ()) or ()) or "no suffix"
        parts.append(f"{name} ({suffixes})")
    return "; ".join(parts)


def get_reader(name: str) -> Reader:
    """The reader registered as ``name``.

    Parameters
    ----------
    name : str
        Registry name, case-insensitive (``"wav"``, ``"npy"``, ``"raw"``, ``"zarr"``, plug-ins).

    Returns
    -------
    Reader

    Raises
    ------
    UnsupportedFormatError
        No such reader; the message lists the installed ones and how to add one.
    """
    readers = _registry()
    key = str(name).strip().lower()
    if key in readers:
        return readers[key]
    for n, r in readers.items():
        if n.lower() == key:
            return r
    raise UnsupportedFormatError(
        f"no reader named {name!r}; installed readers: {_installed_text()}. {_HOW_TO_ADD}"
    )


def reader_for(path: str | os.PathLike[str], hint: str | None = None) -> Reader:
    """The reader for ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        File (or Zarr store, optionally ``store.zarr#array/path``).
    hint : str, optional
        A reader name; when given it is used as is (no guessing).

    Returns
    -------
    Reader
        ``get_reader(hint)``, else the first reader (built-ins first) whose
        ``guess_can_open`` accepts ``path`` (name suffix, at most the first bytes).

    Raises
    ------
    UnsupportedFormatError
        No reader claims ``path``; the message names the file, the installed readers and
        how to add one.
    """
    if hint:
        return get_reader(hint)
    p = os.fspath(path)
    for name, reader in _registry().items():
        try:
            if reader.guess_can_open(p):
                return reader
        except Exception as exc:  # a faulty plug-in must not stop the others
            _warn(f"twinpass: reader {name!r} failed on guess_can_open({p!r}): {type(exc).__name__}: {exc}")
    suffix = os.path.splitext(p.rstrip("/\\"))[1] or "(none)"
    raise UnsupportedFormatError(
        f"{p}: no reader recognises this file (suffix {suffix}); installed readers: {_installed_text()}. "
        "Leave it out of the job ([archive] include / exclude), name the reader from Python "
        f"(format=<name>), or rename a file of a known format to its suffix. {_HOW_TO_ADD}",
        path=p,
    )


def open_recording(
    path: str | os.PathLike[str], format: str | None = None, options: Mapping[str, Any] | None = None
) -> Recording:
    """Open a recording read-only, lazily.

    Parameters
    ----------
    path : str or os.PathLike
        The input. Local paths are made absolute so that ``Recording.spec`` reopens the
        same file from any process and working directory.
    format : str, optional
        Reader name; guessed from ``path`` when omitted (see :func:`reader_for`).
    options : mapping, optional
        Reader options; each reader lists the keys it accepts in ``Reader.options``
        (e.g. ``sample_rate_hz`` in Hz, ``truncated``, ``sidecar``, ``array``).

    Returns
    -------
    Recording
        ``.info`` (frames, channels, sample_rate_hz...), ``.spec``, and
        ``read(start, stop)`` -> float64 array of shape (stop - start, channels).

    Raises
    ------
    InputError
        Subclasses :class:`UnsupportedFormatError` / :class:`CorruptInputError` name the
        file and what to do; :class:`ConfigError` for invalid options.
    """
    p = os.fspath(path)
    reader = reader_for(p, format)
    return reader.open(normalize_path(p), dict(options or {}))
