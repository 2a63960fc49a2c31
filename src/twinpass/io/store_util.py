"""Helpers of the Zarr output store: array names, JSON-safe attributes, locations, write errors.

Array names are POSIX paths inside the store built from input paths relative to the archive
root; they never leave the store and never collide with the store's own bookkeeping
(``_twinpass``, hidden names, ``zarr.json``, ``*.partial``).
"""

from __future__ import annotations

import ctypes
import datetime as _dt
import errno
import math
import os
import platform
import sys
import posixpath
import re
from contextlib import contextmanager
from functools import lru_cache
from importlib import metadata
from pathlib import Path, PurePath
from typing import Any, Iterator
from urllib.parse import unquote, urlparse

import numpy as np

from ..errors import StoreError, UnsafePathError

RESERVED_PREFIX = "_twinpass"
"""Top-level name of the hidden group holding the block tables."""

_OUTSIDE_ALLOWED = re.compile(r"[^A-Za-z0-9._\-/]")
_DRIVE = re.compile(r"^[A-Za-z]:")
_MAX_COMPONENT = 255


# -- array names ------------------------------------------------------------------


def _reject(path: str, why: str) -> UnsafePathError:
    return UnsafePathError(f"input path {path!r} cannot name an output array: {why}")


def _check_raw(path: str) -> list[str]:
    """Reject escapes (absolute, drive letter, backslash, '..', '.', empty components)."""
    if not isinstance(path, str) or not path:
        raise _reject(str(path), "the path is empty")
    if "\\" in path:
        raise _reject(path, "it contains a backslash; give paths relative to the archive root with '/' separators")
    if path.startswith("/"):
        raise _reject(path, "it is absolute; give paths relative to the archive root")
    if _DRIVE.match(path):
        raise _reject(path, "it starts with a drive letter; give paths relative to the archive root")
    parts = path.split("/")
    for p in parts:
        if p == "":
            raise _reject(path, "it has an empty component (a doubled or trailing '/')")
        if p == "..":
            raise _reject(path, "it contains '..', which would leave the store")
        if p == ".":
            raise _reject(path, "it contains a '.' component; give a normalised relative path")
    return parts


def _check_components(path: str, parts: list[str]) -> None:
    """Reject names that clash with the store's own keys."""
    if parts[0].startswith(RESERVED_PREFIX):
        raise _reject(path, f"names starting with {RESERVED_PREFIX!r} are reserved for the block tables; rename the file")
    for p in parts:
        if p.startswith("."):
            raise _reject(path, f"component {p!r} starts with '.', which is reserved for hidden store files; rename it")
        if p == "zarr.json" or p.endswith(".partial"):
            raise _reject(path, f"component {p!r} clashes with the store's own file names; rename it")
        if len(p.encode()) > _MAX_COMPONENT:
            raise _reject(path, f"component {p[:40]!r}... is longer than {_MAX_COMPONENT} bytes")


def array_name(relpath: str) -> str:
    """Name of the output array for an input file.

    Parameters
    ----------
    relpath : str
        Input path relative to the archive root, POSIX separators (``deck/a.wav``).

    Returns
    -------
    str
        The path without its last suffix; characters outside ``[A-Za-z0-9._-/]`` become
        ``_`` (so ``"we ird#name.wav"`` gives ``"we_ird_name"``).

    Raises
    ------
    UnsafePathError
        For absolute paths, drive letters, backslashes, ``..``/``.`` or empty components,
        and names reserved by the store (``_twinpass...``, hidden names, ``zarr.json``).
    """
    parts = _check_raw(relpath)
    parts[-1] = posixpath.splitext(parts[-1])[0]
    parts = [_OUTSIDE_ALLOWED.sub("_", p) for p in parts]
    _check_components(relpath, parts)
    return "/".join(parts)


def check_name(name: str) -> str:
    """Validate an array name used inside the store (as made by :func:`array_name`); return it."""
    parts = _check_raw(name)
    bad = _OUTSIDE_ALLOWED.search(name)
    if bad:
        raise _reject(name, f"character {bad.group()!r} is outside [A-Za-z0-9._-/]; use array_name() to derive names")
    _check_components(name, parts)
    return name


# -- JSON-safe attributes ---------------------------------------------------------


def json_safe(obj: Any, _where: str = "attributes") -> Any:
    """Convert ``obj`` into plain JSON values for Zarr attributes.

    numpy scalars and arrays become Python numbers and lists; NaN and +-inf become ``None``
    (JSON has neither); tuples and sets become lists; datetimes and dates become ISO 8601
    strings; paths become POSIX strings; mapping keys become strings.

    Raises
    ------
    StoreError
        For values with no JSON form, naming where in ``obj`` they are.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, np.ndarray):
        return json_safe(obj.tolist(), _where)
    if isinstance(obj, np.datetime64):
        return None if np.isnat(obj) else str(obj)
    if isinstance(obj, (_dt.datetime, _dt.date, _dt.time)):
        return obj.isoformat()
    if isinstance(obj, PurePath):
        return obj.as_posix()
    if isinstance(obj, dict):
        return {str(k): json_safe(v, f"{_where}[{k!r}]") for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v, f"{_where}[{i}]") for i, v in enumerate(obj)]
    if isinstance(obj, (set, frozenset)):
        return [json_safe(v, _where) for v in sorted(obj, key=repr)]
    raise StoreError(f"{_where}: a value of type {type(obj).__name__} cannot be stored as a JSON attribute")


# -- locations --------------------------------------------------------------------


def local_path(location: str) -> Path | None:
    """The absolute local folder of a store location, or None for a non-local fsspec URL.

    Plain paths and ``file://`` URLs are local (they get a :class:`zarr.storage.LocalStore`,
    atomic chunk writes and an exclusive lock file).
    """
    if "://" not in location:
        return Path(location).expanduser().resolve()
    url = urlparse(location)
    if url.scheme == "file":
        return Path(unquote(url.netloc + url.path)).resolve()
    return None


def check_outside_archive(store: Path, archive_root: Path | str) -> None:
    """Refuse a local store that is, contains or lies inside the archive root."""
    s = store.resolve()
    a = Path(archive_root).expanduser().resolve()
    if s == a:
        raise UnsafePathError(
            f"output store {s} is the archive root: choose an [output] store outside {a}"
        )
    if s.is_relative_to(a):
        raise UnsafePathError(
            f"output store {s} is inside the archive root {a}: its files would be taken for inputs; "
            "choose an [output] store outside the archive"
        )
    if a.is_relative_to(s):
        raise UnsafePathError(
            f"archive root {a} is inside the output store {s}: resetting the store could delete inputs; "
            "choose an [output] store outside the archive"
        )


# -- write errors -----------------------------------------------------------------


@contextmanager
def write_errors(what: str) -> Iterator[None]:
    """Turn OS errors raised while writing ``what`` into :class:`StoreError` with advice."""
    try:
        yield
    except StoreError:
        raise
    except OSError as e:
        reason = e.strerror or str(e)
        if e.errno == errno.ENOSPC:
            msg = f"no space left on device while writing {what}; free space and rerun: finished blocks are kept"
        elif e.errno == getattr(errno, "EDQUOT", -1):
            msg = f"disk quota exceeded while writing {what}; free space and rerun: finished blocks are kept"
        elif e.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            msg = f"cannot write {what}: {reason}; check that the store location is writable"
        else:
            msg = f"cannot write {what}: {reason}; check the store location and rerun: finished blocks are kept"
        raise StoreError(msg) from e


def sync_file_system(path: Path) -> None:
    """Make everything written to the file system holding ``path`` durable (renames included).

    Linux: ``syncfs(2)`` on that file system alone; other POSIX systems: ``sync(2)``;
    elsewhere nothing. Raises :class:`OSError` when the system reports a write error.
    """
    if sys.platform.startswith("linux"):
        libc = ctypes.CDLL(None, use_errno=True)
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
        try:
            if libc.syncfs(fd) != 0:
                err = ctypes.get_errno()
                raise OSError(err, os.strerror(err), str(path))
        finally:
            os.close(fd)
    elif hasattr(os, "sync"):
        os.sync()


def library_versions() -> dict[str, str | None]:
    """Versions of twinpass, Python and the libraries that shape its output or its formats
    (None for one not installed), read once per process from the installed packages'
    metadata (nothing is imported)."""
    return dict(_library_versions())


@lru_cache(maxsize=1)
def _library_versions() -> tuple[tuple[str, str | None], ...]:
    from .. import __version__

    out: dict[str, str | None] = {"twinpass": __version__, "python": platform.python_version()}
    for dist in ("numpy", "scipy", "numba", "dask", "zarr", "prefect"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = None
    return tuple(out.items())
