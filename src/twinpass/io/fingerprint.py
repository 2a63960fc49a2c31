"""Content fingerprints of input files and the digest of a filter design.

A fingerprint says whether an input file changed since its output was written:

* ``fast`` (default): size, modification time (ns) and a BLAKE2b digest of the first and
  the last MiB;
* ``full``: size and a BLAKE2b digest of every byte (read in 1 MiB chunks).

Files under 2 MiB are hashed whole in both modes (``whole`` is then true). Folders that
hold one recording (Zarr arrays) are fingerprinted by their file list (fast) or by every
byte of every file (full). The comparison rules live in
:func:`twinpass.core.plan.fingerprint_changed` (re-exported here).
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Any, BinaryIO, Mapping

from twinpass.core.plan import fingerprint_changed
from twinpass.errors import ConfigError, InputError

__all__ = ["CHUNK_BYTES", "ALGORITHM", "fingerprint_file", "fingerprint_changed", "design_digest"]

CHUNK_BYTES = 1 << 20
"""Read size and the length of the head and tail hashed in fast mode (1 MiB)."""
ALGORITHM = "blake2b-256"
_WHOLE_BELOW = 2 * CHUNK_BYTES


def _hash_file(fh: BinaryIO, size: int, whole: bool, h: Any) -> None:
    if whole:
        while chunk := fh.read(CHUNK_BYTES):
            h.update(chunk)
    else:
        h.update(fh.read(CHUNK_BYTES))
        fh.seek(size - CHUNK_BYTES)
        h.update(fh.read(CHUNK_BYTES))


def _tree_files(root: Path) -> list[tuple[str, os.stat_result]]:
    out = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames.sort()
        for name in sorted(filenames):
            full = os.path.join(dirpath, name)
            out.append((Path(full).relative_to(root).as_posix(), os.stat(full)))
    return sorted(out)


def fingerprint_file(path: str | os.PathLike[str], mode: str = "fast") -> dict[str, Any]:
    """Fingerprint one file (or a folder holding one recording, e.g. a Zarr array).

    Parameters
    ----------
    path : path-like
        The file (opened read-only).
    mode : {"fast", "full"}
        ``fast`` hashes the first and last MiB, ``full`` every byte (in 1 MiB chunks);
        files under 2 MiB are hashed whole either way. For a folder, ``fast`` hashes the
        list of its files with their sizes (the newest modification time is compared
        separately) and ``full`` the names and every byte of its files.

    Returns
    -------
    dict
        ``size`` (bytes; for a folder the sum over its files), ``mtime_ns`` (for a folder
        the newest of its files), ``mode``, ``algorithm``, ``whole`` (the digest covers
        every byte) and ``digest`` (hex). JSON-serialisable.

    Raises
    ------
    ConfigError
        For an unknown ``mode``.
    InputError
        When the file cannot be read.
    """
    if mode not in ("fast", "full"):
        raise ConfigError(f"fingerprint mode {mode!r} is not one of: fast, full ([archive] fingerprint)")
    p = Path(path)
    h = hashlib.blake2b(digest_size=32)
    try:
        if p.is_dir():
            files = _tree_files(p)
            size = sum(st.st_size for _, st in files)
            mtime_ns = max((st.st_mtime_ns for _, st in files), default=p.stat().st_mtime_ns)
            whole = mode == "full"
            for rel, st in files:
                h.update(f"{rel}\0{st.st_size}\0".encode())
                if whole:
                    with open(p / rel, "rb") as fh:
                        _hash_file(fh, st.st_size, True, h)
        else:
            with open(p, "rb") as fh:
                st = os.fstat(fh.fileno())
                size, mtime_ns = st.st_size, st.st_mtime_ns
                whole = mode == "full" or size < _WHOLE_BELOW
                _hash_file(fh, size, whole, h)
    except OSError as e:
        raise InputError(
            f"{p}: cannot read it to take its fingerprint ({e.strerror}); check that it exists and is readable",
            path=str(p),
        ) from None
    return {
        "size": int(size),
        "mtime_ns": int(mtime_ns),
        "mode": mode,
        "algorithm": ALGORITHM,
        "whole": bool(whole),
        "digest": h.hexdigest(),
    }


def design_digest(design: Any, edge: str, edge_samples: int | str, package_version: str) -> str:
    """Digest of everything that shapes a file's output besides its input.

    Parameters
    ----------
    design : twinpass.core.types.Design
        The per-pass design (coefficients, sample rate in Hz, tolerance, effective length).
    edge : str
        End extension at segment ends (odd | even | constant | none).
    edge_samples : int or "auto"
        Length of the end extension, samples.
    package_version : str
        twinpass version that computes the output.

    Returns
    -------
    str
        SHA-256 hex digest; equal inputs give equal digests across runs and machines.
    """
    extra: Mapping[str, Any] = {"edge": edge, "edge_samples": edge_samples, "version": package_version}
    return str(design.digest(dict(extra)))
