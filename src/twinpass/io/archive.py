"""Discovery: find the input files of an archive and say which stream and time each holds.

Files
-----
Every file under ``cfg.archive_root`` whose path relative to the root (POSIX separators)
matches one of ``[archive] include`` and none of ``[archive] exclude`` is a candidate.
Glob syntax: ``*`` (any text without ``/``), ``?`` (one character but ``/``), ``[abc]``
/ ``[!abc]`` (character classes), and ``**`` as a whole path component (any number of
folders, none included). A folder that is one recording (named ``*.zarr`` or holding
Zarr metadata) is a candidate like a file and is not searched further. Symbolic links to
folders are followed once (no loops). The output store, the manifest and anything reached
through a link into the output store are never taken as input. Globs match letter case
exactly; files that one would select but for the case (``A.WAV`` against ``**/*.wav``) are
noted, not selected, and so are files that one would select but for a suffix their reader
accepts too (``a.bwf`` against ``**/*.wav``) and folders named like a recording that the globs
select but that hold none (an empty folder ``x.wav``). A folder that cannot be
listed is reported (as ``FOLDER/``), and the files recorded under it are not taken as
removed. Only regular files (after
following symbolic links) are opened: a named pipe, socket, device or broken link that the
globs select is reported invalid without being opened, and so is a path that is not valid
UTF-8 (it could not name an output array). Paths are sorted, so discovery is
deterministic.

Each candidate is opened read-only with the reader the registry picks for it, to learn
frames, channels, sample rate (Hz) and sample format without reading samples.

An output store as input
------------------------
A folder that is the output store of an earlier twinpass job (its root group has the
``twinpass`` attribute, :mod:`twinpass.io.store_input`) holds one recording per output
array, so a later job can filter that output again (one configuration is one overall
response: a band-pass, then a mains notch, is two jobs). When the root is such a store,
each array ``<stream>/<file stem>`` is a candidate under that path (``include = ["**"]``
takes them all: the names have no suffix; a note says so when no glob selects any). A store
found below the root gives candidates ``<store>#<stream>/<file stem>``
(``stage1/band.zarr#s1/s1_0``), selected when an include glob matches the store's path or
the identifier and no exclude glob matches either. The ``_twinpass`` group is never an
input. An array's sample rate, start time and stream are its attributes (a manifest row
naming the identifier overrides stream and start time; ``name_pattern`` does not apply),
so the earlier job's streams and contiguous files are this job's streams and segments. An
array whose ``complete`` attribute is not true is reported invalid, naming the array, until
the earlier job finishes it. An array marked ``input_gone`` (the kept output of an input the
earlier job no longer has: deleted, renamed, moved to another stream or excluded there) is no
recording of that job's archive: it is left out without being reported invalid, with one
note per store naming such arrays, so this job's plan finds its input gone (its neighbours
are refiltered as segment ends, and an output made of it earlier is kept and marked alike).
The output array keeps the array's path (below the root, prefixed with the store's own
output name: its path without ``.zarr``). The store is only
read; the output store of this job may not be it (:func:`~twinpass.io.store_util.check_outside_archive`).
Zarr arrays are fingerprinted row by row of chunks (:mod:`twinpass.io.fingerprint`), so
after the earlier job reruns, the planner refilters what it rewrote (with a halo), not more.

Stream and start time
---------------------
Taken from the first source that applies, per file:

1. the manifest CSV (``[archive] manifest``; columns ``path``, ``stream``,
   ``start_time``; paths relative to the archive root; times ISO 8601, UTC when no
   offset is given, an empty ``start_time`` meaning "unknown");
2. ``[archive] name_pattern`` matched against the relative path without its suffix
   (when a manifest is configured too, files it does not list use the pattern);
3. when neither is configured: the start time stored in the file (e.g. a Broadcast WAVE
   ``bext`` chunk); the stream is then the parent folder's relative path, or the file
   name for files at the root;
4. otherwise the file is a stream and a segment of its own, with no start time.

A file a configured manifest does not list (and no pattern names) is reported invalid.

Name patterns
-------------
Literal text plus these fields:

``{stream}``
    one or more characters except ``/``; when repeated, every occurrence must match the
    same text.
``{start:FORMAT}``
    a time written with a ``strftime``/``strptime`` FORMAT (``%Y %m %d %H %M %S %f %j %y
    %b %B %a %A %p %I %z %Z %U %W %w %G %V %u %%``); numeric fields have their fixed
    width (``%f`` 1 to 6 digits). Times are UTC unless the FORMAT carries an offset (``%z``).
    At most one per pattern.
``{*}``
    any text without ``/`` (possibly empty).
``{**}``
    any text (possibly empty, may cross folders).

``{{`` and ``}}`` stand for literal braces. The whole relative path without its last
suffix must match. Without a ``{stream}`` field the stream is the parent folder's
relative path (the archive root's own name for files at the root). Example:
``"{stream}/{stream}_{start:%Y%m%dT%H%M%S}"`` matches ``"sensor-a/sensor-a_20240501T120000"``.
Patterns are compiled to one regular expression once per discovery.

Bad input
---------
Problems of single files never stop discovery: an unreadable or unknown file, a damaged
header, zero frames, a missing sample rate, more channels than samples and than ``[archive] max_channels``
(most likely a 2-D array stored channel-major), an unparsable start time or one outside the
years 1 to 9999 once taken to UTC, a path the pattern
does not match, a second file with the same (stream, start time), a path that cannot name
an output array (a hidden ``.name`` component, the reserved ``_twinpass`` prefix) or whose
array name clashes with another file's (``a b.wav`` and ``a_b.wav`` both give ``a_b``;
``a.wav`` and ``a/b.wav`` would nest one array in the other: the file the output store
already records as the array's source is kept, else the first by path), and a manifest row naming a
path outside the root becomes an :class:`~twinpass.core.segments.InvalidFile` (path,
reason, remedy) and is left out. So does a file whose examination fails in a way not
foreseen here (the reason names the error). Problems of the configuration itself (unreadable
manifest, bad pattern) raise.

Non-finite samples
------------------
Files with floating-point samples (float WAV, float NPY/raw/Zarr) are read once from end to
end, window by window, for NaN and infinite values (integer formats cannot hold them and are
not read). What happens to a file holding some depends on ``[processing] nonfinite``:

``"fail"`` (default)
    The file is invalid: the reason names the first run (samples and channel), how many
    runs there are and the longest; the remedy names the other policies.
``"split"``
    The file is valid; :attr:`FileEntry.nonfinite_runs` lists the runs and the segment
    treats them as holes (see :mod:`twinpass.core.segments`); a warning says so.
``"interpolate"``
    Each channel's runs are filled linearly between their finite neighbours
    (:attr:`FileEntry.nonfinite_fill`, neighbour values read here, so every block fills
    alike). A run longer than ``[processing] max_fill_samples`` or touching the file's first
    or last sample makes the file invalid, naming the run.

A file that cannot be read to its end during the scan is invalid too.

Scan cache
----------
A scan's findings (the runs of each channel and, for ``"interpolate"``, the fills) can be
handed back to the next discovery (``scan_cache``, kept in the output store by the run). A
file is then not read again while its fingerprint has not changed
(:func:`~twinpass.core.plan.fingerprint_changed`), its frame and channel counts are the
same and ``[processing] nonfinite`` and ``max_fill_samples`` are those of the scan; the
verdict (left out, split, filled) is drawn again from the kept runs, so messages do not
change. An entry that is malformed or does not fit the file is ignored and the file is
read. Files with more than :data:`SCAN_CACHE_MAX_RUNS` runs are not kept.
"""

from __future__ import annotations

import csv
import json
import datetime as _dt
import functools
import os
import re
import math
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path, PurePosixPath
from typing import Any, Callable, NamedTuple, TypeVar

from twinpass.config import JobConfig
from twinpass.core.nonfinite import (
    ChannelRun,
    FillSpan,
    describe_run,
    fill_problem,
    join_channel_runs,
    union_runs,
)
from twinpass.core.blocks import samples_text
from twinpass.core.segments import FileEntry, InvalidFile, Segment, build_segments
from twinpass.core.text import named_list
from twinpass.errors import ArchiveError, ConfigError, InputError, TwinpassError
from twinpass.io.channels import LabelMismatch, labels_for
from twinpass.io.fingerprint import fingerprint_changed, fingerprint_file
from twinpass.io.readers._common import (
    CONFIG_TRUNCATED,
    CONFIG_WRAPPED,
    HEADER_REWRITE,
    READABLE,
    TIME_MAJOR,
    TRUNCATED_HINT,
    WRAPPED_HINT,
    WRAPPED_REWRITE,
    file_kind,
)
from twinpass.io.readers.registry import available_readers, get_reader, open_recording, reader_for
from twinpass.io.scan import fill_spans_for, holds_floats, scan_channel_runs
from twinpass.io.store_input import (
    INPUT_GONE,
    absent_chunk_frames,
    array_attributes,
    gone_since,
    is_output_store,
    output_arrays,
)
from twinpass.io.store_lock import LOCK_NAME, LockInfo
from twinpass.io.store_util import array_name, check_name

_T = TypeVar("_T")

__all__ = [
    "Discovery",
    "NamePattern",
    "SCAN_CACHE_MAX_RUNS",
    "compile_glob",
    "discover",
    "list_archive",
    "output_name",
    "walk_archive",
    "ArchiveListing",
    "read_manifest",
]

UTC = _dt.timezone.utc

_REMEDY_EXCLUDE = "repair or re-export the file, or leave it out with [archive] exclude"
_DRIVE = re.compile(r"^[A-Za-z]:")

SCAN_CACHE_MAX_RUNS = 10_000
"""Most channel runs of NaN/Inf samples a file may have for its scan to be kept in the cache
(the whole cache is one JSON document, rewritten when it changes)."""


# -- globbing ----------------------------------------------------------------


def _glob_component(part: str) -> str:
    out, i = [], 0
    while i < len(part):
        c = part[i]
        if c == "*":
            while i + 1 < len(part) and part[i + 1] == "*":
                i += 1
            out.append("[^/]*")
        elif c == "?":
            out.append("[^/]")
        elif c == "[":
            j = part.find("]", i + 2 if part[i + 1: i + 2] in ("!", "]") else i + 1)
            if j < 0:
                out.append(re.escape(c))
            else:
                body = part[i + 1: j]
                neg = body.startswith("!")
                body = body[1:] if neg else body
                out.append("[" + ("^" if neg else "") + body.replace("\\", "\\\\") + "]")
                i = j
        else:
            out.append(re.escape(c))
        i += 1
    return "".join(out)


def compile_glob(pattern: str) -> re.Pattern[str]:
    """Regular expression matching relative POSIX paths against a glob ``pattern``.

    ``**`` as a whole component matches any number of folders (including none).
    """
    parts = [p for p in pattern.strip().lstrip("/").split("/") if p not in ("", ".")]
    if not parts:
        raise ConfigError(f"[archive] glob pattern {pattern!r} is empty; use e.g. \"**/*.wav\"")
    rx = ""
    for k, part in enumerate(parts):
        last = k == len(parts) - 1
        if part == "**":
            rx += ".*" if last else "(?:[^/]+/)*"
        else:
            rx += _glob_component(part) + ("" if last else "/")
    return re.compile(rx + r"\Z", re.DOTALL)


def _inside(path: str, folder: str) -> bool:
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


_STORE_MARKERS = ("zarr.json", ".zarray", ".zgroup")


def _is_array_store(path: str) -> bool:
    """A folder that is one recording: named ``*.zarr`` or holding Zarr metadata."""
    return path.lower().endswith(".zarr") or any(os.path.isfile(os.path.join(path, m)) for m in _STORE_MARKERS)


def _selected(rel: str, include: list[re.Pattern[str]], exclude: list[re.Pattern[str]]) -> bool:
    return _selected_any([rel], include, exclude)


def _selected_any(paths: list[str], include: list[re.Pattern[str]], exclude: list[re.Pattern[str]]) -> bool:
    """An include glob matches one of ``paths`` and no exclude glob matches any."""
    return any(rx.match(p) for p in paths for rx in include) and not any(rx.match(p) for p in paths for rx in exclude)


_REMEDY_NOT_REGULAR = (
    "only regular files (or links to them) are read: put the recording there as a regular file, "
    "or leave the path out with [archive] exclude"
)


def _not_regular(path: str, rel: str) -> InvalidFile | None:
    """Why the candidate at ``path`` cannot be opened as a regular file, or ``None`` when it can.

    Checked before any open: opening a named pipe blocks until something writes to it.
    """
    try:
        st = os.stat(path)  # follows symbolic links
    except FileNotFoundError:
        if os.path.islink(path):
            try:
                target = os.readlink(path)
            except OSError:
                target = "?"
            return InvalidFile(
                rel,
                f"a symbolic link whose target {target} does not exist",
                "restore the target, correct or remove the link, or leave it out with [archive] exclude",
            )
        return InvalidFile(rel, "vanished while the archive was listed", "run again once the archive is settled")
    except OSError as e:
        what = "a symbolic link that cannot be followed" if os.path.islink(path) else "cannot be examined"
        return InvalidFile(rel, f"{what} ({e.strerror or e})", _REMEDY_EXCLUDE)
    kind = file_kind(st.st_mode)
    if kind is None:
        return None
    link = " (reached through a symbolic link)" if os.path.islink(path) else ""
    return InvalidFile(rel, f"is {kind}{link}, not a regular file", _REMEDY_NOT_REGULAR)


def _shown(rel: str) -> str:
    """``rel`` as printable text: bytes of a name that are not UTF-8 written as ``\\xNN``."""
    return rel.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def _not_utf8(rel: str) -> InvalidFile | None:
    """Why a path whose name is not UTF-8 (surrogate-escaped by the OS layer) is refused, or ``None``."""
    if _encodes(rel):
        return None
    parts = rel.split("/")
    k = next(i for i, p in enumerate(parts) if not _encodes(p))
    what = "file" if k == len(parts) - 1 else "folder"
    return InvalidFile(
        _shown(rel),
        f"the {what} name '{_shown(parts[k])}' is not valid UTF-8 (the bytes shown as \\xNN); output "
        "array names, the store's records and reports need UTF-8 text",
        f"rename the {what} to a UTF-8 name (e.g. with convmv), or leave it out with [archive] exclude",
    )


def _encodes(text: str) -> bool:
    try:
        text.encode("utf-8")
        return True
    except UnicodeEncodeError:
        return False


def list_archive(cfg: JobConfig) -> list[str]:
    """Relative POSIX paths of the candidate input files of ``cfg``'s archive, sorted.

    Candidates that are not regular files (named pipes, sockets, devices, broken links) are
    left out; :func:`walk_archive` reports them.

    Raises :class:`ArchiveError` when the archive root is not a readable folder.
    """
    return walk_archive(cfg).found


class ArchiveListing(NamedTuple):
    """What :func:`walk_archive` found."""

    found: list[str]
    """Candidate input files (relative POSIX paths, sorted)."""
    refused: list[InvalidFile]
    """Paths the globs select that cannot be taken as input, each with the reason."""
    case_only: list[str]
    """Paths an include glob would select but for the letter case (``A.WAV`` against
    ``**/*.wav``), sorted: not selected, and worth a note."""
    arrays: Mapping[str, tuple[str, str]] = {}
    """The candidates that are arrays of an earlier job's output store: identifier ->
    (the store's folder, the array's path in it). See "An output store as input"."""
    notes: tuple[str, ...] = ()
    """Findings worth a note (an output store whose arrays no include glob selects)."""


def _from_config(cfg: JobConfig, compile_setting: Callable[[str], _T], setting: str) -> _T:
    """``compile_setting(setting)``; a :class:`ConfigError` names the configuration file first."""
    try:
        return compile_setting(setting)
    except ConfigError as e:
        raise ConfigError(f"{cfg.source}: {e}") from None


def check_archive_root(cfg: JobConfig) -> None:
    """Raise :class:`ArchiveError` unless ``cfg``'s archive root is a folder (the first thing
    a run needs, checked before it creates or locks anything), or its manifest, when one is
    configured, a file."""
    root = cfg.archive_root
    if not root.is_dir():
        raise ArchiveError(
            f"archive root {root} is not a folder ([archive] root = {cfg.archive.root!r} in {cfg.source}); "
            "point it at the folder holding the recordings",
            path=str(root),
        )
    manifest = cfg.manifest_path
    if manifest is not None and not manifest.is_file():
        raise ArchiveError(
            f"manifest {manifest}: not found or not a file ([archive] manifest = {cfg.archive.manifest!r} in "
            f"{cfg.source}); point it at the CSV file listing the recordings",
            path=str(manifest),
        )


def walk_archive(cfg: JobConfig) -> ArchiveListing:
    """The candidate input files of ``cfg``'s archive (relative POSIX paths, sorted), the
    paths matching the globs that cannot be taken as input, each with the reason, and the
    paths that the globs would select but for the letter case (see :class:`ArchiveListing`).

    Only regular files (after following symbolic links) and folders holding one recording
    are candidates, and the arrays of an earlier job's output store (see "An output store as
    input" in the module documentation; :attr:`ArchiveListing.arrays`); a named pipe, socket, device or broken link that the globs select is
    reported instead, without being opened, and so is a path whose name is not UTF-8 (shown
    with its odd bytes as ``\\xNN``). A folder that cannot be listed (permissions, an
    I/O error) is reported as one entry whose path is the folder's with a trailing ``/``
    (unless ``[archive] exclude`` leaves out everything below it); the planner keeps the
    outputs of files recorded under it instead of calling them removed.

    Raises :class:`ArchiveError` when the archive root is not a readable folder or cannot be
    listed.
    """
    check_archive_root(cfg)
    root = cfg.archive_root
    include = [_from_config(cfg, compile_glob, p) for p in cfg.archive.include]
    exclude = [_from_config(cfg, compile_glob, p) for p in cfg.archive.exclude]
    include_any_case = [re.compile(rx.pattern, rx.flags | re.IGNORECASE) for rx in include]
    store = cfg.store_location
    fenced = [] if "://" in store else [os.path.realpath(store)]
    manifest = cfg.manifest_path
    skip_files = {os.path.realpath(manifest)} if manifest is not None else set()

    found: list[str] = []
    refused: list[InvalidFile] = []
    case_only: list[str] = []
    suffix_only: list[str] = []
    folders: list[str] = []  # folders named like a recording that the globs select
    aliases = _suffix_aliases()
    seen_dirs: set[str] = set()
    arrays: dict[str, tuple[str, str]] = {}
    notes: list[str] = []

    def by_case_only(rel: str) -> None:
        """Note ``rel`` if an include glob selects it but for the letter case (and no exclude does)."""
        if any(rx.match(rel) for rx in include_any_case) and not any(rx.match(rel) for rx in exclude):
            case_only.append(_shown(rel))

    def by_suffix_only(rel: str) -> None:
        """Note ``rel`` if an include glob selects it but for its suffix, another that its reader
        accepts too (``a.bwf`` against ``**/*.wav``), and no exclude glob leaves it out."""
        sfx = PurePosixPath(rel).suffix
        probes = [rel[: len(rel) - len(sfx)] + alt for alt in aliases.get(sfx.lower(), ())]
        if _selected_any(probes, include, []) and not any(rx.match(rel) for rx in exclude):
            suffix_only.append(_shown(rel))

    def take_store(folder: str, rel: str | None) -> None:
        """The arrays of the output store at ``folder`` as candidates; ``rel`` is the store's
        path (``None``: the store is the root). Globs select an array by its identifier or,
        below the root, the whole store by its path."""
        names = output_arrays(folder)
        paths = [] if rel is None else [rel]
        picked = held = 0
        orphans: list[str] = []
        writing = _writing_run(folder)
        for name in names:
            ident = name if rel is None else f"{rel}#{name}"
            if not _selected_any([ident, *paths], include, exclude):
                by_case_only(ident)
            elif writing is not None:  # it may rewrite any array while this job reads it
                held += 1
                refused.append(InvalidFile(
                    ident,
                    f"the output store {folder} is being written by {writing} of the earlier job, which may "
                    "rewrite this array while this job reads it",
                    "run this job again once that run has ended (`twinpass status` on that store names a run "
                    "holding it; a lock whose run is no longer running on this host does not hold this job back); "
                    f"delete {os.path.join(folder, LOCK_NAME)} by hand only if it was taken on another host that "
                    "is gone for good, or it cannot be read and no run is using that store",
                ))
            elif gone_since(array_attributes(os.path.join(folder, name))) is not None:
                orphans.append(ident)
            else:
                found.append(ident)
                arrays[ident] = (folder, name)
                picked += 1
        if orphans:
            shown = named_list(orphans, 3)
            notes.append(
                f"{len(orphans)} array(s) of the output store {folder} are kept outputs of inputs the earlier job "
                f"no longer has (attribute {INPUT_GONE}: deleted, renamed, moved or excluded there), so they are not "
                f"recordings of it and are not read: {shown}; "
                "outputs this job made of them are kept and reported as no longer in the archive"
            )
        if picked and os.path.exists(os.path.join(folder, LOCK_NAME)):
            notes.append(
                f"the output store {folder} holds the lock of a run of the earlier job that is no longer running "
                f"({LOCK_NAME}; its next run recovers it): arrays that run left unfinished are left out"
            )
        if rel is None and names and not picked and not held and not orphans:
            notes.append(
                f"the archive root {root} is the output store of an earlier twinpass job, but [archive] include "
                f"selects none of its {len(names)} arrays (named <stream>/<file stem>, without a suffix, e.g. "
                f'{names[0]}): set include = ["**"] to read them all'
            )

    if is_output_store(root) and not any(_inside(os.path.realpath(root), f) for f in fenced):
        take_store(str(root), None)
        return ArchiveListing(sorted(found), refused, sorted(case_only), arrays, tuple(notes))

    def unlisted(err: OSError) -> None:
        """A folder os.walk cannot list: reported (its files are unknown, not gone)."""
        folder = str(err.filename) if err.filename is not None else str(root)
        real = os.path.realpath(folder)
        if real == os.path.realpath(root):
            raise ArchiveError(
                f"archive root {root} cannot be listed ({err.strerror or err}); make it readable by the "
                "user running twinpass",
                path=str(root),
            )
        if any(_inside(real, f) for f in fenced):
            return
        try:
            rel = Path(folder).relative_to(root).as_posix()
        except ValueError:
            rel = folder
        # a NUL cannot be in a file name: only patterns excluding everything below match these
        if all(any(rx.match(probe) for rx in exclude) for probe in (f"{rel}/\0", f"{rel}/\0/\0")):
            return
        refused.append(
            InvalidFile(
                rel + "/",
                f"this folder cannot be listed ({err.strerror or err}): the files in it were not examined, "
                "and outputs of files recorded there are kept as they are",
                f'make the folder readable (and searchable) for the user running twinpass, or leave it out '
                f'with [archive] exclude = ["{rel}/**"]',
            )
        )

    for dirpath, dirnames, filenames in os.walk(root, onerror=unlisted, followlinks=True):
        real = os.path.realpath(dirpath)
        if real in seen_dirs or any(_inside(real, f) for f in fenced):
            dirnames[:] = []
            continue
        seen_dirs.add(real)
        rel_dir = Path(dirpath).relative_to(root).as_posix()
        keep = []
        for name in sorted(dirnames):
            rel = name if rel_dir == "." else f"{rel_dir}/{name}"
            if _is_array_store(os.path.join(dirpath, name)):
                # a folder holding one recording (e.g. a Zarr array): a candidate, never descended;
                # an earlier job's output store holds one recording per array
                real_dir = os.path.realpath(os.path.join(dirpath, name))
                if is_output_store(real_dir) and not any(_inside(real_dir, f) for f in fenced):
                    bad = _not_utf8(rel)
                    if bad is None:
                        take_store(os.path.join(dirpath, name), rel)
                    elif _selected(rel, include, exclude):
                        refused.append(bad)
                elif _selected(rel, include, exclude) and not any(_inside(real_dir, f) for f in fenced):
                    bad = _not_utf8(rel)
                    if bad is not None:
                        refused.append(bad)
                    else:
                        found.append(rel)
                elif not any(_inside(real_dir, f) for f in fenced):
                    by_case_only(rel)
                continue
            if PurePosixPath(name).suffix.lower() in aliases and _selected(rel, include, exclude):
                folders.append(rel)  # named like a recording (x.wav): noted unless it holds one
            keep.append(name)
        dirnames[:] = keep
        for name in sorted(filenames):
            rel = name if rel_dir == "." else f"{rel_dir}/{name}"
            if not _selected(rel, include, exclude):
                noted = len(case_only)
                by_case_only(rel)
                if len(case_only) == noted:
                    by_suffix_only(rel)
                continue
            real_file = os.path.realpath(os.path.join(dirpath, name))
            if real_file in skip_files or any(_inside(real_file, f) for f in fenced):
                continue
            bad = _not_utf8(rel) or _not_regular(os.path.join(dirpath, name), rel)
            if bad is not None:
                refused.append(bad)
                continue
            found.append(rel)
    if suffix_only:
        notes.append(_suffix_note(sorted(suffix_only)))
    taken = [*found, *(b.path for b in refused)]
    empty = [_shown(d) for d in folders if not any(p.startswith(f"{d}/") for p in taken)]
    if empty:
        shown = named_list([f"{d}/" for d in empty], 5)
        notes.append(
            f"{len(empty)} folder(s) named like recordings match [archive] include but hold no file it selects: "
            f"{shown}; a recording is a file (only a Zarr array is a folder), so they were not read: put the "
            "recording there as a file, or leave them out with [archive] exclude"
        )
    return ArchiveListing(sorted(found), sorted(refused, key=lambda b: b.path), sorted(case_only), arrays,
                          tuple(notes))


def _suffix_aliases() -> dict[str, tuple[str, ...]]:
    """For each file suffix a reader claims (lower case), the other suffixes of that reader
    (``".bwf"``: ``".wav"``, ``".wave"``, ``".rf64"``)."""
    out: dict[str, tuple[str, ...]] = {}
    for name in available_readers():
        suffixes = tuple(str(x).lower() for x in getattr(get_reader(name), "suffixes", ()) or ())
        for sfx in suffixes:
            out.setdefault(sfx, tuple(x for x in suffixes if x != sfx))
    return out


def _suffix_note(names: list[str]) -> str:
    """The note for files that [archive] include selects but for a suffix their reader accepts too."""
    shown = named_list(names, 5)
    return (
        f"{len(names)} file(s) have a suffix that their reader accepts as well as the one [archive] include "
        f"selects, but were not selected: {shown}; add patterns for them (e.g. {_case_globs(names)}) to include them"
    )


# -- name patterns -----------------------------------------------------------


class _OutOfRange(ValueError):
    """A time whose UTC equivalent falls outside the years 1 to 9999 (:class:`datetime.datetime`'s range)."""


def _to_utc(t: _dt.datetime) -> _dt.datetime:
    """``t`` in UTC (naive times are UTC); :class:`_OutOfRange` when UTC leaves years 1-9999."""
    if t.tzinfo is None:
        return t.replace(tzinfo=UTC)
    try:
        return t.astimezone(UTC)
    except OverflowError:
        raise _OutOfRange(
            f"{t.isoformat()} is {'before year 1' if t.year < 5000 else 'after year 9999'} in UTC, "
            "outside the times twinpass can hold (years 1 to 9999)"
        ) from None

_STRPTIME: dict[str, str] = {
    "Y": r"\d{4}", "G": r"\d{4}", "y": r"\d{2}", "m": r"\d{2}", "d": r"\d{2}", "H": r"\d{2}",
    "I": r"\d{2}", "M": r"\d{2}", "S": r"\d{2}", "f": r"\d{1,6}", "j": r"\d{3}", "U": r"\d{2}",
    "W": r"\d{2}", "V": r"\d{2}", "w": r"\d", "u": r"\d", "p": r"(?:[AaPp][Mm])",
    "b": r"[A-Za-z]{3}", "a": r"[A-Za-z]{3}", "B": r"[A-Za-z]+", "A": r"[A-Za-z]+",
    "z": r"(?:Z|[+-]\d{2}:?\d{2}(?::?\d{2}(?:\.\d{1,6})?)?)", "Z": r"(?:UTC|GMT)", "%": "%",
}


def _strptime_regex(fmt: str, pattern: str) -> str:
    out, i = [], 0
    while i < len(fmt):
        c = fmt[i]
        if c != "%":
            out.append(re.escape(c))
            i += 1
            continue
        d = fmt[i + 1: i + 2]
        if d not in _STRPTIME:
            raise ConfigError(
                f"[archive] name_pattern {pattern!r}: time directive %{d} in {{start:{fmt}}} is not supported; "
                f"use {' '.join('%' + k for k in _STRPTIME)}"
            )
        out.append(_STRPTIME[d])
        i += 2
    return "".join(out)


_TOKEN = re.compile(r"\{\{|\}\}|\{([^{}]*)\}|[{}]")


class NamePattern:
    """A compiled ``[archive] name_pattern`` (syntax in the module documentation)."""

    def __init__(self, pattern: str) -> None:
        self.pattern = pattern
        rx: list[str] = []
        pos = 0
        self.has_stream = False
        self.time_format: str | None = None
        for m in _TOKEN.finditer(pattern):
            rx.append(re.escape(pattern[pos: m.start()]))
            pos = m.end()
            tok, name = m.group(0), m.group(1)
            if tok in ("{{", "}}"):
                rx.append(re.escape(tok[0]))
            elif name is None:
                raise ConfigError(
                    f"[archive] name_pattern {pattern!r}: lone {tok!r} at character {m.start()}; "
                    "write {{ or }} for a literal brace"
                )
            elif name == "stream":
                rx.append("(?P=stream)" if self.has_stream else "(?P<stream>[^/]+)")
                self.has_stream = True
            elif name == "*":
                rx.append("[^/]*")
            elif name == "**":
                rx.append(".*")
            elif name.startswith("start:") and name[6:]:
                if self.time_format is not None:
                    raise ConfigError(f"[archive] name_pattern {pattern!r}: more than one {{start:...}} field")
                self.time_format = name[6:]
                rx.append(f"(?P<start>{_strptime_regex(self.time_format, pattern)})")
            else:
                raise ConfigError(
                    f"[archive] name_pattern {pattern!r}: unknown field {tok}; "
                    "fields are {stream}, {start:FORMAT}, {*} and {**}"
                )
        rx.append(re.escape(pattern[pos:]))
        self.regex = re.compile("".join(rx) + r"\Z", re.DOTALL)

    def match(self, stem: str) -> tuple[str | None, _dt.datetime | None] | None:
        """Stream and start time (UTC) of a relative path without suffix, or ``None``.

        Raises :class:`ValueError` when the time text matches the shape but is not a
        valid time (e.g. month 13) or falls outside years 1 to 9999 once taken to UTC.
        """
        m = self.regex.match(stem)
        if m is None:
            return None
        stream = m.group("stream") if self.has_stream else None
        start = None
        if self.time_format is not None:
            t = _dt.datetime.strptime(m.group("start"), self.time_format)
            start = _to_utc(t)
        return stream, start


# -- manifest ----------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Row:
    line: int
    stream: str
    start: str


def _norm_rel(p: str) -> str:
    p = p.strip().replace("\\", "/")
    while p.startswith("./"):
        p = p[2:]
    return str(PurePosixPath(p)) if p else p


def read_manifest(path: Path) -> tuple[dict[str, _Row], list[InvalidFile]]:
    """Rows of the manifest CSV keyed by relative path, plus rows that contradict each other.

    Raises :class:`ArchiveError` when the file cannot be read or lacks a column.
    """
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.DictReader(fh)
            cols = {(c or "").strip().lower(): c for c in (reader.fieldnames or [])}
            missing = [c for c in ("path", "stream", "start_time") if c not in cols]
            if missing:
                raise ArchiveError(
                    f"manifest {path}: missing column(s) {', '.join(missing)}; the first line must name "
                    "the columns path, stream, start_time",
                    path=str(path),
                )
            rows: dict[str, _Row] = {}
            bad: list[InvalidFile] = []
            for raw in reader:
                line = reader.line_num
                rel = _norm_rel(raw.get(cols["path"]) or "")
                row = _Row(line, (raw.get(cols["stream"]) or "").strip(), (raw.get(cols["start_time"]) or "").strip())
                if not rel:
                    continue
                old = rows.get(rel)
                if old is not None and (old.stream, old.start) != (row.stream, row.start):
                    if any(b.path == rel for b in bad):
                        continue
                    bad.append(
                        InvalidFile(
                            rel,
                            f"manifest {path} lines {old.line} and {line} give different stream/start_time",
                            "keep one row per file in the manifest",
                        )
                    )
                    continue
                rows.setdefault(rel, row)
    except OSError as e:
        raise ArchiveError(
            f"manifest {path}: cannot be read ({e.strerror}); check [archive] manifest", path=str(path)
        ) from None
    except (csv.Error, UnicodeDecodeError) as e:
        raise ArchiveError(f"manifest {path}: not a readable UTF-8 CSV file ({e})", path=str(path)) from None
    conflicted = {b.path for b in bad}
    return {k: v for k, v in rows.items() if k not in conflicted}, bad


def _parse_iso(text: str) -> _dt.datetime:
    """An ISO 8601 time as UTC; :class:`ValueError` when it does not parse or leaves years 1-9999."""
    return _to_utc(_dt.datetime.fromisoformat(text))


# -- discovery ---------------------------------------------------------------


@dataclass(frozen=True)
class Discovery:
    """What :func:`discover` found."""

    root: Path
    """The archive root (absolute)."""
    files: tuple[FileEntry, ...]
    """Valid files, sorted by relative path."""
    invalid: tuple[InvalidFile, ...]
    """Files left out, each with the reason and what to do."""
    warnings: tuple[str, ...] = ()
    """Non-fatal findings of the readers, prefixed with the relative path."""
    scans: Mapping[str, dict[str, Any]] = field(default_factory=dict)
    """Scan cache entries (plain JSON) of the float files scanned or reused, by relative path:
    ``fingerprint``, ``policy``, ``max_fill_samples``, ``frames``, ``channels``, ``runs``
    (``[channel, start, stop]`` lists, samples) and ``fills`` (``[channel, start, stop, left,
    right]`` lists, the :class:`FillSpan` fields). Hand it to the next :func:`discover`."""
    scanned: tuple[str, ...] = ()
    """Relative paths of the files whose samples were read for NaN/Inf this time."""

    def segments(self) -> tuple[list[Segment], list[InvalidFile]]:
        """Group :attr:`files` into segments; invalid files of discovery and grouping together."""
        segs, bad = build_segments(self.files)
        return segs, [*self.invalid, *bad]


class _Bad(Exception):
    def __init__(self, reason: str, remedy: str) -> None:
        super().__init__(reason)
        self.reason, self.remedy = reason, remedy


def _strip_path(message: str, abspath: str) -> str:
    for prefix in (abspath + ": ", abspath + " "):
        if message.startswith(prefix):
            return message[len(prefix):]
    return message


def _open_info(cfg: JobConfig, abspath: str, fmt: str | None = None) -> tuple[Any, Any]:
    """RecordingInfo and ReaderSpec of one file (read by the reader named ``fmt``, else the
    one the registry picks), or :class:`_Bad`."""
    try:
        reader = reader_for(abspath, fmt)
        accepted = tuple(getattr(reader, "options", ()))
        opts: dict[str, Any] = {}
        if "truncated" in accepted:
            opts["truncated"] = cfg.archive.truncated
        if "wrapped_sizes" in accepted and cfg.archive.wrapped_sizes != "error":
            opts["wrapped_sizes"] = cfg.archive.wrapped_sizes
        with open_recording(abspath, format=reader.name, options=opts) as rec:
            info, spec, found = rec.info, rec.spec, rec.survey()
        if info.sample_rate_hz is None and cfg.archive.sample_rate_hz is not None and "sample_rate_hz" in accepted:
            opts["sample_rate_hz"] = cfg.archive.sample_rate_hz
            with open_recording(abspath, format=reader.name, options=opts) as rec:
                info, spec = rec.info, rec.spec
        if found:
            info = replace(info, warnings=(*info.warnings, *found))
    except (TwinpassError, OSError) as e:
        text = _strip_path(str(e), abspath)
        remedy = _REMEDY_EXCLUDE
        own = getattr(e, "remedy", None)
        if own and text.endswith(f"; {own}"):
            # the reader knows the fix (in a sidecar, say): that is the remedy
            text = text[: -len(own) - 2]
            remedy = f"{own}, or leave the file out with [archive] exclude"
        if TRUNCATED_HINT in text:
            # the reader's hint names its own option; the remedy names the configuration key
            text = text.replace(f"; {TRUNCATED_HINT}", "")
            remedy = f"set {CONFIG_TRUNCATED} to filter the whole frames that are present, or " + remedy
        if WRAPPED_HINT in text:
            text = text.replace(f". {WRAPPED_REWRITE}; {WRAPPED_HINT}", "")
            remedy = (
                f"rewrite the file as RF64 (or W64), or set {CONFIG_WRAPPED} to read every "
                "whole frame up to the end of the file, or " + _REMEDY_EXCLUDE
            )
        if f"; {HEADER_REWRITE}" in text:
            # the reader names the sizes to write: that is the remedy
            text, _, sizes = text.partition(f"; {HEADER_REWRITE}")
            remedy = f"{HEADER_REWRITE}{sizes}, or leave it out with [archive] exclude"
        if text.endswith(READABLE) and "; make " in text:
            # a file, sidecar or store this user may not read: nothing to repair in it
            text, _, whom = text.rpartition("; make ")
            remedy = f"make {whom}, or leave it out with [archive] exclude"
        raise _Bad(text if text.startswith("cannot be opened") else f"cannot be opened: {text}", remedy) from None
    if info.frames <= 0:
        raise _Bad("holds no samples (0 frames)", "remove it or leave it out with [archive] exclude")
    if info.sample_rate_hz is None:
        raise _Bad(
            f"the {info.format} format stores no sample rate",
            "set [archive] sample_rate_hz (Hz) in the configuration",
        )
    if not info.sample_rate_hz > 0:
        raise _Bad(f"sample rate {info.sample_rate_hz!r} Hz is not positive", _REMEDY_EXCLUDE)
    if info.channels > cfg.archive.max_channels and info.channels > info.frames:
        raise _Bad(*_channel_major(info, cfg.archive.max_channels))
    return info, spec


def _channel_major(info: Any, limit: int) -> tuple[str, str]:
    """Reason and remedy for a recording of more channels than samples and than ``[archive]
    max_channels``: most likely a 2-D array stored channel-major."""
    n, frames = int(info.channels), int(info.frames)
    return (
        f"{n} channels, more than its {frames} samples and than [archive] max_channels = {limit}: it looks "
        "stored channel-major, (channels, samples), and would be filtered along the wrong axis",
        f"{TIME_MAJOR}; or raise [archive] max_channels to {n} or more if it really holds {n} channels; or "
        "leave it out with [archive] exclude",
    )


def _runs_summary(runs: list[ChannelRun]) -> str:
    union = union_runs(runs)
    longest = max(b - a for _c, a, b in runs)
    first = min(runs, key=lambda r: (r[1], r[0]))
    if len(runs) == 1:
        return f"NaN/Inf at {describe_run(first)}"
    return (
        f"NaN/Inf at {describe_run(first)} and in {len(runs) - 1} more run(s) "
        f"({len(union)} span(s) of samples, {samples_text(sum(b - a for a, b in union))} in all; "
        f"the longest run of one channel is {samples_text(longest)})"
    )


def _refused(runs: list[ChannelRun], frames: int, max_fill: int) -> list[tuple[ChannelRun, str]]:
    """Channel runs that linear interpolation cannot fill, each with the reason."""
    return [(r, why) for r in runs if (why := fill_problem(r, frames, max_fill)) is not None]


def _read_scan(cfg: JobConfig, info: Any, spec: Any) -> tuple[list[ChannelRun], tuple[FillSpan, ...]]:
    """Read a float file to its end for NaN/Inf runs (and, to fill them, their neighbours).

    Fills are taken only under ``nonfinite = "interpolate"`` when every run can be filled.
    Raises :class:`_Bad` when the file cannot be read.
    """
    try:
        with spec.open() as rec:
            runs = scan_channel_runs(rec)
            fills: tuple[FillSpan, ...] = ()
            if (
                runs
                and cfg.processing.nonfinite == "interpolate"
                and not _refused(runs, info.frames, cfg.processing.max_fill_samples)
            ):
                fills = fill_spans_for(rec, runs)
    except (TwinpassError, OSError) as e:
        raise _Bad(
            f"cannot be read to the end while looking for NaN/Inf samples: {_strip_path(str(e), info.path)}",
            _REMEDY_EXCLUDE,
        ) from None
    return runs, fills


def _scan_entry(
    cfg: JobConfig, info: Any, fp: Mapping[str, Any] | None, runs: list[ChannelRun], fills: tuple[FillSpan, ...]
) -> dict[str, Any] | None:
    """The scan cache entry of one file (plain JSON), or ``None`` when it is not to be kept."""
    if fp is None or len(runs) > SCAN_CACHE_MAX_RUNS:
        return None
    return {
        "fingerprint": dict(fp),
        "policy": cfg.processing.nonfinite,
        "max_fill_samples": int(cfg.processing.max_fill_samples),
        "frames": int(info.frames),
        "channels": int(info.channels),
        "runs": [[int(c), int(a), int(b)] for c, a, b in runs],
        "fills": [[f.channel, f.start, f.stop, float(f.left), float(f.right)] for f in fills],
    }


def _cached_scan(
    cfg: JobConfig, info: Any, fp: Mapping[str, Any] | None, entry: Any
) -> tuple[list[ChannelRun], tuple[FillSpan, ...]] | None:
    """The runs and fills of a scan cache entry that still holds for the file, else ``None``."""
    if fp is None or not isinstance(entry, Mapping) or not isinstance(entry.get("fingerprint"), Mapping):
        return None
    policy, max_fill = cfg.processing.nonfinite, cfg.processing.max_fill_samples
    if (entry.get("policy"), entry.get("max_fill_samples")) != (policy, max_fill):
        return None
    if (entry.get("frames"), entry.get("channels")) != (info.frames, info.channels):
        return None
    if fingerprint_changed(entry["fingerprint"], fp)[0]:
        return None
    try:
        runs = [(int(c), int(a), int(b)) for c, a, b in entry["runs"]]
        fills = tuple(FillSpan(int(c), int(a), int(b), float(lo), float(hi)) for c, a, b, lo, hi in entry["fills"])
    except (KeyError, TypeError, ValueError):
        return None
    if any(not (0 <= c < info.channels and 0 <= a < b <= info.frames) for c, a, b in runs):
        return None
    if runs != join_channel_runs(runs):  # sorted and maximal, as a scan gives them
        return None
    wanted = runs if runs and policy == "interpolate" and not _refused(runs, info.frames, max_fill) else []
    if [(f.channel, f.start, f.stop) for f in fills] != wanted:
        return None
    if not all(math.isfinite(f.left) and math.isfinite(f.right) for f in fills):
        return None
    return runs, fills


def _judge_nonfinite(
    cfg: JobConfig, info: Any, runs: list[ChannelRun], fills: tuple[FillSpan, ...]
) -> tuple[tuple[tuple[int, int], ...], tuple[FillSpan, ...], str | None]:
    """What ``[processing] nonfinite`` makes of a file's runs, or :class:`_Bad`.

    Returns the runs (union over channels), the fills (``"interpolate"``) and a warning.
    """
    if not runs:
        return (), (), None
    policy = cfg.processing.nonfinite
    union = tuple(union_runs(runs))
    summary = _runs_summary(runs)
    longest = max(b - a for _c, a, b in runs)
    if policy == "fail":
        split = ('set [processing] nonfinite = "split" (the finite pieces are filtered separately and '
                 "the output is NaN there)")
        if any(a <= 0 or b >= info.frames for _c, a, b in runs):  # no finite sample on one side to fill from
            raise _Bad(summary, f"{split}, or trim or repair the file (\"interpolate\" cannot fill a run that "
                                "reaches the file's first or last sample)")
        raise _Bad(summary, f'{split} or "interpolate" with max_fill_samples >= {longest} (linear fill), '
                            "or repair the file")
    if policy == "split":
        return union, (), (
            f"{summary}: the samples on either side are filtered as separate pieces; "
            "the output is NaN at those samples"
        )
    refused = _refused(runs, info.frames, cfg.processing.max_fill_samples)
    if refused:
        refused.sort(key=lambda rw: (rw[0][1], rw[0][0]))
        (c, a, b), why = refused[0]
        more = f" (and {len(refused) - 1} more run(s) that cannot be filled)" if len(refused) > 1 else ""
        at_end = a <= 0 or b >= info.frames
        remedy = (
            'set [processing] nonfinite = "split", or trim or repair the file'
            if at_end
            else f"raise [processing] max_fill_samples to {max(r[2] - r[1] for r, _ in refused)} or "
            'more, set nonfinite = "split", or repair the file'
        )
        raise _Bad(why + more, remedy)
    return union, fills, f"{summary}: filled by linear interpolation (filled_spans in the output attributes)"


def _identify(
    cfg: JobConfig,
    rel: str,
    info: Any,
    manifest: dict[str, _Row] | None,
    pattern: NamePattern | None,
) -> tuple[str, _dt.datetime | None]:
    """Stream and start time of one file (rules in the module documentation), or :class:`_Bad`."""
    if manifest is not None and rel in manifest:
        row = manifest[rel]
        where = f"manifest {cfg.manifest_path} line {row.line}"
        if not row.stream:
            raise _Bad(f"{where}: the stream is empty", "name the file's stream in the manifest")
        if not row.start:
            return row.stream, None
        try:
            return row.stream, _parse_iso(row.start)
        except _OutOfRange as e:
            raise _Bad(
                f"{where}: start_time {row.start!r}: {e}",
                "correct the start_time in the manifest (or leave it empty for an unknown time)",
            ) from None
        except ValueError:
            raise _Bad(
                f"{where}: start_time {row.start!r} is not an ISO 8601 time",
                "write it like 2024-05-01T12:00:00Z (UTC when no offset is given)",
            ) from None
    if pattern is not None:
        stem = _stem(rel)
        try:
            got = pattern.match(stem)
        except _OutOfRange as e:
            raise _Bad(
                f"the start time in the name, read with {{start:{pattern.time_format}}}: {e}",
                "rename the file so its name carries the right time, or correct [archive] name_pattern",
            ) from None
        except ValueError as e:
            raise _Bad(
                f"the start time in the name does not parse with {{start:{pattern.time_format}}} ({e})",
                "rename the file or correct [archive] name_pattern",
            ) from None
        if got is None:
            raise _Bad(
                f"{stem!r} does not match [archive] name_pattern {pattern.pattern!r}",
                "rename the file, correct the pattern, or leave it out with [archive] exclude",
            )
        stream, start = got
        return (_folder_stream(cfg, rel) if stream is None else stream), start
    if manifest is not None:
        raise _Bad(
            f"not listed in the manifest {cfg.manifest_path}",
            "add a row (path, stream, start_time) for it, or leave it out with [archive] exclude",
        )
    start = _stored_start(
        info, "the start time stored in the file",
        "correct the time in the file's header (or sidecar), name the start time with [archive] "
        "name_pattern or a manifest, or leave the file out with [archive] exclude",
    )
    if start is not None:
        parent = PurePosixPath(rel).parent.as_posix()
        return (PurePosixPath(rel).name if parent == "." else parent), start
    return rel, None


def _stem(rel: str) -> str:
    """A relative path without its last suffix, as a name pattern is matched against it."""
    return str(PurePosixPath(rel).with_suffix("")) if PurePosixPath(rel).suffix else rel


def _folder_stream(cfg: JobConfig, rel: str) -> str:
    """The stream of a file whose name pattern has no ``{stream}`` field: its parent folder's
    relative path (the archive root's own name for files at the root)."""
    parent = PurePosixPath(rel).parent.as_posix()
    return cfg.archive_root.name if parent == "." else parent


def _named_stream(cfg: JobConfig, rel: str, manifest: dict[str, _Row] | None,
                  pattern: NamePattern | None) -> str | None:
    """The stream a file's manifest row or name gives (rules of :func:`_identify`), without
    opening the file, for a file refused before it was identified; None when neither names
    one (or the name does not match the pattern)."""
    if manifest is not None and rel in manifest:
        return manifest[rel].stream or None
    m = pattern.regex.match(_stem(rel)) if pattern is not None else None
    if pattern is None or m is None:
        return None
    return m.group("stream") if pattern.has_stream else _folder_stream(cfg, rel)


def _stored_start(info: Any, what: str, remedy: str) -> _dt.datetime | None:
    """The start time the reader found in the file, in UTC (``None`` when it found none), or
    :class:`_Bad` (``what``: where the time was read) when UTC leaves the years 1 to 9999."""
    if info.start_time is None:
        return None
    try:
        return _to_utc(info.start_time)
    except _OutOfRange as e:
        raise _Bad(f"{what}: {e}", remedy) from None


def _check_end_time(start: _dt.datetime | None, info: Any) -> None:
    """:class:`_Bad` when the file's end (``start + frames / sample rate``) leaves the years
    1 to 9999: a sample rate far too low for the file (its header, sidecar or
    ``[archive] sample_rate_hz``)."""
    rate, frames = info.sample_rate_hz, int(info.frames)
    if start is None or not rate or rate <= 0:
        return
    try:
        start + _dt.timedelta(seconds=frames / float(rate))
    except OverflowError:
        raise _Bad(
            f"{frames} frames at {float(rate):g} Hz from {start.isoformat()} would end after year 9999",
            "check the sample rate (the file's header or sidecar, or [archive] sample_rate_hz)",
        ) from None


UNORDERED_NAMED = 3
"""Files the note of :func:`_unordered_note` names (the rest are counted)."""


def _unordered_note(entries: Sequence[FileEntry]) -> list[str]:
    """One note when several files are each a stream and a segment of their own for want of
    a start time (rule 4 of "Stream and start time": no name pattern, no manifest, none
    stored in the file); none otherwise."""
    alone = [e.relpath for e in entries if e.start_time is None and e.stream == e.relpath]
    if len(alone) < 2:
        return []
    named = named_list(alone, UNORDERED_NAMED)
    return [f"{len(alone)} files have no start time ({named}): [archive] name_pattern and manifest are not set and "
            "the files store none, so each is a stream and a segment of its own, filtered alone with edge zones at "
            "both of its ends; to join files that follow each other without a gap into one segment, set [archive] "
            "name_pattern (e.g. \"{stream}/{stream}_{start:%Y%m%dT%H%M%S}\") or [archive] manifest so that each "
            "file's stream and start time are known"]


def _split_duplicates(entries: list[FileEntry]) -> tuple[list[FileEntry], list[InvalidFile]]:
    """Keep the first file (by path) of each (stream, start time); report the others."""
    first: dict[tuple[str, _dt.datetime], str] = {}
    keep: list[FileEntry] = []
    dups: list[InvalidFile] = []
    for e in entries:
        key = (e.stream, e.start_time)
        if e.start_time is not None and key in first:
            dups.append(
                InvalidFile(
                    e.relpath,
                    f"same stream {e.stream!r} and start time {e.start_time.isoformat()} as {first[key]}",
                    "keep one of the two files (or correct its name or manifest row), or exclude one with "
                    "[archive] exclude", e.stream,
                )
            )
            continue
        if e.start_time is not None:
            first[key] = e.relpath  # type: ignore[index]
        keep.append(e)
    return keep, dups


_REMEDY_RENAME = "rename the file (or its folder), or leave it out with [archive] exclude"


def _output_name(rel: str) -> str:
    """The output array name of ``rel``, or :class:`_Bad` when none can be made safely."""
    try:
        return array_name(rel)
    except TwinpassError as e:
        raise _Bad(f"cannot name its output: {e}", _REMEDY_RENAME) from None


_REMEDY_FINISH = (
    "run the earlier job again until `twinpass status` shows the array complete, then run this one; "
    "or leave it out with [archive] exclude"
)


def _stage_output_name(rel: str, array: str) -> str:
    """The output array name of the array ``array`` of an earlier job's output store whose
    identifier is ``rel``: the array's path as it is when the store is the archive root, else
    the store's own output name (its path without ``.zarr``) followed by the array's path.
    :class:`_Bad` when none can be made safely."""
    try:
        return check_name(array if rel == array else f"{array_name(rel[: -len(array) - 1])}/{array}")
    except TwinpassError as e:
        raise _Bad(f"cannot name its output: {e}", _REMEDY_RENAME) from None


def _finished_array_attrs(where: tuple[str, str]) -> dict[str, Any]:
    """The attributes of an array of an earlier job's output store, or :class:`_Bad` when the
    earlier job has not finished it (its ``complete`` attribute is not true)."""
    folder, array = where
    attrs = array_attributes(os.path.join(folder, array))
    if attrs.get("complete") is not True:
        held = "absent" if "complete" not in attrs else json.dumps(attrs["complete"])
        raise _Bad(
            f"array {array} of the output store {folder} is not complete (its attribute complete is {held}): "
            "the earlier job has not finished it (blocks pending or failed, or a run cut short), so its "
            "samples are not final",
            _REMEDY_FINISH,
        )
    lost = absent_chunk_frames(os.path.join(folder, array))
    if lost:
        shown = named_list([f"[{a}, {b})" for a, b in lost], 5)
        raise _Bad(
            f"array {array} of the output store {folder} is marked complete but the chunk files of frames {shown} "
            "are missing or empty (deleted or lost since the earlier job wrote them): they would read as its fill "
            "value, not as samples",
            "run the earlier job again (it writes the missing blocks again; `twinpass status` on its store lists "
            "them), then this one",
        )
    return attrs


def _identify_stage_array(
    cfg: JobConfig, rel: str, info: Any, attrs: Mapping[str, Any], manifest: dict[str, _Row] | None
) -> tuple[str, _dt.datetime | None]:
    """Stream and start time of an array of an earlier job's output store: a manifest row
    when one lists it, else the array's ``stream`` attribute and its start time (attribute
    ``start_time``, read by the Zarr reader); :class:`_Bad` when they cannot be used."""
    if manifest is not None and rel in manifest:
        return _identify(cfg, rel, info, manifest, None)
    stream = attrs.get("stream")
    if not isinstance(stream, str) or not stream:
        raise _Bad(
            "its attribute stream is missing or not a name",
            "name its stream and start time in a manifest ([archive] manifest), or leave it out with "
            "[archive] exclude",
        )
    return stream, _stored_start(
        info, "its attribute start_time", "name its start time in a manifest, or leave it out with [archive] exclude"
    )


def _start_source(
    cfg: JobConfig, rel: str, info: Any, start: _dt.datetime | None, manifest: dict[str, _Row] | None,
    pattern: NamePattern | None, stage: bool,
) -> str | None:
    """Where the start time ``start`` that :func:`_identify` (``stage``: :func:`_identify_stage_array`)
    gave ``rel`` was read, for messages (:attr:`FileEntry.start_source`); ``None`` without one."""
    if start is None:
        return None
    if manifest is not None and rel in manifest:
        return f"the manifest {cfg.manifest_path}"
    if pattern is not None and not stage:
        return "the file name, read with [archive] name_pattern"
    return _stored_where(info)


def _stored_where(info: Any) -> str:
    """Where a reader found the start time stored with a recording, for messages."""
    if info.format == "wav":
        return "the file's bext chunk"
    if info.extra.get("sidecar"):
        return "the file's sidecar (start_time)"
    if info.format == "zarr":
        return "the array's attribute start_time"
    return "the time stored in the file"


def output_name(entry: FileEntry) -> str:
    """The output array name of a discovered file: :attr:`FileEntry.output_name` when
    discovery set one (an array of an earlier job's output store), else
    :func:`~twinpass.io.store_util.array_name` of its relative path."""
    return entry.output_name or array_name(entry.relpath)


def _split_name_clashes(
    entries: list[FileEntry], owners: Mapping[str, str] | None = None
) -> tuple[list[FileEntry], list[InvalidFile]]:
    """Keep one file of each output array name; report the others.

    Two files clash when they map to the same array name (characters outside
    ``[A-Za-z0-9._-/]`` become ``_`` and the suffix is dropped) or when one name is a folder
    of the other (``a.wav`` and ``a/b.wav``): the second would overwrite or break the first.
    A file that ``owners`` (output array name -> the input path the store records as its
    source) names as the source of its own array is kept first; then files go by path.
    """
    owners = owners or {}

    def owns(e: FileEntry) -> bool:
        return owners.get(output_name(e)) == e.relpath

    taken: dict[str, str] = {}  # array name -> its file
    below: dict[str, str] = {}  # folder of taken array names -> the array name first taken below it
    keep: list[FileEntry] = []
    bad: list[InvalidFile] = []
    for e in sorted(entries, key=lambda e: (not owns(e), e.relpath)):
        name = output_name(e)
        parts = name.split("/")
        parents = ["/".join(parts[:i]) for i in range(1, len(parts))]
        other_name = name if name in taken else next((p for p in parents if p in taken), None) or below.get(name)
        if other_name is not None:
            other = taken[other_name]
            held = (
                f", which the output store already records as the source of {other_name!r}"
                if owners.get(other_name) == other
                else ""
            )
            bad.append(
                InvalidFile(
                    e.relpath,
                    f"its output array name {name!r} clashes with that of {other} ({other_name!r}){held}: "
                    "suffixes are dropped and characters outside A-Z a-z 0-9 . _ - become _",
                    _REMEDY_RENAME, e.stream,
                )
            )
            continue
        taken[name] = e.relpath
        for p in parents:
            below.setdefault(p, name)
        keep.append(e)
    order = {e.relpath: i for i, e in enumerate(entries)}
    return sorted(keep, key=lambda e: order[e.relpath]), bad


_EXAMINE_THREADS = 4
"""Most threads that open, fingerprint and scan input files at once."""


def _examine_threads(n_files: int) -> int:
    return max(1, min(_EXAMINE_THREADS, os.cpu_count() or 1, n_files))


_Examined = tuple[FileEntry | InvalidFile, list[str], dict[str, Any] | None, bool]


def _contained(examine: Callable[..., _Examined]) -> Callable[..., _Examined]:
    """``examine(cfg, root, rel, ...)`` with its unforeseen exceptions turned into the file's
    :class:`InvalidFile`: one file's failure must not stop discovery of the others."""

    @functools.wraps(examine)
    def contained(cfg: JobConfig, root: Path, rel: str, *rest: Any) -> _Examined:
        try:
            return examine(cfg, root, rel, *rest)
        except Exception as e:
            return (
                InvalidFile(
                    rel,
                    f"examining it failed unexpectedly: {type(e).__name__}: {_strip_path(str(e), str(root / rel))}",
                    f"{_REMEDY_EXCLUDE}; please report this error to the twinpass developers",
                ),
                [], None, False,
            )

    return contained


@_contained
def _examine(
    cfg: JobConfig,
    root: Path,
    rel: str,
    manifest: dict[str, _Row] | None,
    pattern: NamePattern | None,
    fingerprints: bool,
    cache: Mapping[str, Mapping[str, Any]],
    where: tuple[str, str] | None = None,
) -> _Examined:
    """Open, identify, fingerprint and (float files) scan one input file.

    ``where`` is (the store's folder, the array's path) for an array of an earlier job's
    output store (:attr:`ArchiveListing.arrays`). Returns the file's entry (or the
    :class:`InvalidFile` that says why it is refused), its warnings, its scan cache entry (or
    ``None``) and whether it was read for the scan.
    """
    abspath = str(root / rel) if where is None else os.path.join(*where)
    scan_entry = None
    was_scanned = False
    out_name = None
    try:
        attrs = None
        if where is None:
            _output_name(rel)
            info, spec = _open_info(cfg, abspath)
            stream, start = _identify(cfg, rel, info, manifest, pattern)
        else:
            out_name = _stage_output_name(rel, where[1])
            attrs = _finished_array_attrs(where)
            info, spec = _open_info(cfg, abspath, "zarr")
            stream, start = _identify_stage_array(cfg, rel, info, attrs, manifest)
        source = _start_source(cfg, rel, info, start, manifest, pattern, where is not None)
        # Labels change no sample: a list that does not fit leaves that label off the
        # output (a note says so), and the file is filtered as usual.
        mismatched: list[LabelMismatch] = []
        labels = labels_for(cfg, stream, info.channels, own=info.extra, carried=attrs, problems=mismatched)
        label_notes = [f"{e.reason}: its output gets no channel {e.what} "
                       f"until this is corrected (the samples are filtered as usual); {e.remedy}" for e in mismatched]
        _check_end_time(start, info)
        fp = None
        if fingerprints:
            try:
                fp = fingerprint_file(abspath, cfg.archive.fingerprint, info=info)
            except InputError as e:
                raise _Bad(f"cannot be fingerprinted: {_strip_path(str(e), abspath)}", _REMEDY_EXCLUDE) from None
        runs: list[ChannelRun] = []
        fills: tuple[FillSpan, ...] = ()
        if holds_floats(info):
            got = _cached_scan(cfg, info, fp, cache.get(rel))
            if got is None:
                was_scanned = True
                got = _read_scan(cfg, info, spec)
            runs, fills = got
            scan_entry = _scan_entry(cfg, info, fp, runs, fills)
        union, fills, note = _judge_nonfinite(cfg, info, runs, fills)
    except _Bad as bad:
        stream = _named_stream(cfg, rel, manifest, pattern) if where is None else None
        return InvalidFile(rel, bad.reason, bad.remedy, stream), [], scan_entry, was_scanned
    notes = [f"{rel}: {_strip_path(w, abspath)}" for w in info.warnings]
    if note:
        notes.append(f"{rel}: {note}")
    notes += [f"{rel}: {n}" for n in label_notes]
    entry = FileEntry(rel, spec, info, stream, start, fp, nonfinite_runs=union, nonfinite_fill=fills,
                      output_name=out_name, channel_names=labels.names, units=labels.units, start_source=source)
    return entry, notes, scan_entry, was_scanned


def _writing_run(folder: str) -> str | None:
    """The run of an earlier job holding the lock of the output store at ``folder`` (its
    description), or ``None`` when no lock is there or its holder is gone (stale). A lock
    that cannot be read, or whose holder is on another host, counts as held."""
    try:
        with open(os.path.join(folder, LOCK_NAME), "rb") as fh:
            raw = fh.read()
    except FileNotFoundError:
        return None
    except OSError as e:
        return f"a run whose lock cannot be read ({e.strerror or e})"
    holder = LockInfo.parse(raw)
    if holder is None:
        return "a run whose lock cannot be read (it may be being written)"
    return None if holder.is_stale() else holder.describe()


def _exists(root: Path, rel: str) -> bool:
    """Whether the path ``rel`` (relative to ``root``) names a file, or an array of an output
    store (``store.zarr#stream/stem``)."""
    if (root / rel).exists():
        return True
    store, _, array = rel.partition("#")
    return bool(array) and is_output_store(root / store) and array in output_arrays(root / store)


def _case_globs(names: list[str]) -> str:
    """Example include globs for files selected but for the letter case: one per suffix
    found (``"**/*.NPY"``), at most three; a file's own path when none has a suffix."""
    suffixes = sorted({PurePosixPath(n).suffix for n in names} - {""})
    return ", ".join(f'"**/*{sfx}"' for sfx in suffixes[:3]) if suffixes else f'"{names[0]}"'


def discover(
    cfg: JobConfig,
    *,
    fingerprints: bool = True,
    scan_cache: Mapping[str, Mapping[str, Any]] | None = None,
    owners: Mapping[str, str] | None = None,
) -> Discovery:
    """Find the archive's input files, open each read-only and assign stream and start time.

    Parameters
    ----------
    cfg : JobConfig
        Uses ``cfg.archive_root``, ``[archive]`` (include, exclude, name_pattern, manifest,
        sample_rate_hz, truncated, fingerprint), ``[processing]`` nonfinite and
        max_fill_samples, and the output store location.
    fingerprints : bool
        Fingerprint every valid file (mode ``[archive] fingerprint``); ``False`` leaves
        :attr:`FileEntry.fingerprint` as ``None`` (and the scan cache unused).
    scan_cache : mapping, optional
        :attr:`Discovery.scans` of an earlier discovery, by relative path: a float file whose
        entry still holds (see "Scan cache" in the module documentation) is not read again.
    owners : mapping, optional
        Output array name -> the input path the output store records as its source. When
        two files would write one array, the one that already owns it is kept (otherwise the
        first by path), so a new file cannot evict an existing output.

    Returns
    -------
    Discovery
        Valid files and invalid ones (with reasons); per-file problems never raise.
        :attr:`Discovery.scans` holds the scan cache entries to keep.

    Raises
    ------
    ArchiveError
        The archive root is not a folder, or the manifest cannot be read.
    ConfigError
        The name pattern or a glob pattern is malformed.
    """
    root = cfg.archive_root
    pattern = _from_config(cfg, NamePattern, cfg.archive.name_pattern) if cfg.archive.name_pattern else None
    manifest: dict[str, _Row] | None = None
    invalid: list[InvalidFile] = []
    if cfg.manifest_path is not None:
        manifest, conflicts = read_manifest(cfg.manifest_path)
        invalid.extend(conflicts)
    listing = walk_archive(cfg)
    rels, refused, case_only = listing.found, listing.refused, listing.case_only
    invalid.extend(b for b in refused if b.path not in {i.path for i in invalid})
    entries: list[FileEntry] = []
    warnings: list[str] = list(listing.notes)
    if case_only:
        shown = named_list(case_only, 5)
        warnings.append(
            f"{len(case_only)} file(s) match [archive] include but for the letter case and were not selected: "
            f"{shown}; globs match case exactly: add patterns for them (e.g. {_case_globs(case_only)}) to "
            "include them"
        )
    cache = scan_cache or {}
    scans: dict[str, dict[str, Any]] = {}
    scanned: list[str] = []
    reported = {b.path for b in invalid}
    todo = [rel for rel in rels if rel not in reported]
    # Opening, fingerprinting and scanning are reads and hashes that release the GIL:
    # a few threads overlap them (results are taken in listing order).
    with ThreadPoolExecutor(max_workers=_examine_threads(len(todo))) as pool:
        looked = list(pool.map(
            lambda rel: _examine(cfg, root, rel, manifest, pattern, fingerprints, cache, listing.arrays.get(rel)),
            todo,
        ))
    for rel, (entry, notes, scan_entry, was_scanned) in zip(todo, looked):
        if was_scanned:
            scanned.append(rel)
        if scan_entry is not None:  # kept for refused files too: they need not be read again
            scans[rel] = scan_entry
        if isinstance(entry, InvalidFile):
            invalid.append(entry)
            continue
        warnings.extend(notes)
        entries.append(entry)
    if pattern is None and manifest is None:
        warnings += _unordered_note(entries)
    valid, dups = _split_duplicates(entries)
    invalid.extend(dups)
    valid, clashes = _split_name_clashes(valid, owners)
    invalid.extend(clashes)
    if manifest is not None:
        listed = set(rels) | {b.path for b in invalid}
        for rel, row in sorted(manifest.items()):
            if rel in listed:
                continue
            parts = PurePosixPath(rel).parts
            if PurePosixPath(rel).is_absolute() or ".." in parts or _DRIVE.match(rel):
                invalid.append(
                    InvalidFile(
                        rel,
                        f"the manifest {cfg.manifest_path} (line {row.line}) names a path outside the archive "
                        f"root {root}; inputs are read only from under the root",
                        "give paths relative to [archive] root, without '..', or move the file under the root",
                    )
                )
            elif not _exists(root, rel):
                invalid.append(
                    InvalidFile(
                        rel,
                        f"listed in the manifest {cfg.manifest_path} (line {row.line}) but not found under {root}",
                        "restore the file or remove its row from the manifest",
                    )
                )
    invalid.sort(key=lambda i: i.path)
    return Discovery(
        root=root, files=tuple(valid), invalid=tuple(invalid), warnings=tuple(warnings), scans=scans,
        scanned=tuple(scanned),
    )
