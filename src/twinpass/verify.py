"""Verify an output store's samples against the levels recorded when they were written.

Every block records, when it is written, the RMS and the largest magnitude of its output's
finite samples per channel (the ``rms_out`` and ``peak_out`` figures of its block table,
computed in float64 before the cast to the output type). Reading the stored samples back and
taking the same two figures tells whether the chunk files still hold what the run wrote: a
chunk overwritten, swapped with another, truncated or damaged (a decoding error, or bits
flipped in an uncompressed chunk that change a sample beyond the output type's rounding)
shows as a mismatch, named by block, frames and channel. Each chunk file is checked too:
its CRC-32C checksum, which outputs carry in every chunk file (the ``crc32c`` codec; not in
outputs written by versions before it), sees any change of its bytes after it was written;
an uncompressed chunk must hold exactly its values' bytes, a compressed one the size its
compression header gives (a chunk truncated or extended since can still decode, into wrong
samples of the same RMS and peak). A block whose chunk files are named so is not compared
again. Chunk files that are missing are
reported by ``twinpass status`` already (:meth:`twinpass.io.store.OutputStore.absent_chunks`)
and are not read again here.

The comparison allows for the cast: a float32 output's samples are the float64 results
rounded to 24 significant bits, so its RMS and peak may differ from the recorded ones by a
relative ``2**-24`` (:data:`FLOAT32_RTOL` allows four times that); float64 outputs allow
:data:`FLOAT64_RTOL` for the order of summation. What it cannot see without checksums: a change within that
rounding (a flipped low mantissa bit of a float32 sample), a chunk replaced by a valid one
of the same size whose samples have the same RMS and peak on every channel (samples changed
in sign or order), or a channel of a block with clipped samples (stored as infinity: that
channel's levels are not compared); with checksums, only a chunk file swapped with or copied
from another one holding the same RMS and peak on every channel (each file's checksum is its
own), or a change whose checksum was computed again. Reads only; the store is opened read-only.
"""

from __future__ import annotations

import struct
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .core.checks import PASS, WARN
from .core.loops import channel_stats
from .errors import StoreError
from .io.store import CHECKSUM_BYTES, OutputStore, checksum_body

FLOAT32_RTOL: float = 4.0 * 2.0**-24
"""Relative difference allowed between a float32 output's stored and recorded RMS or peak."""
FLOAT64_RTOL: float = 1e-9
"""The same for float64 outputs (summation order only)."""
SHOWN_PER_FILE: int = 3
"""Mismatching blocks named per file in :attr:`Verification.damaged`; the count says the rest."""


@dataclass
class Verification:
    """What :func:`verify_store` found."""

    files: int = 0
    """Outputs read (complete ones with every chunk file present)."""
    blocks: int = 0
    """Blocks compared."""
    frames: int = 0
    """Frames read (samples per channel, summed over the outputs)."""
    values: int = 0
    """Values read: frames x channels."""
    damaged: dict[str, list[str]] = field(default_factory=dict)
    """Per output array, one line per mismatching block (at most :data:`SHOWN_PER_FILE`,
    then a line with the count of the rest)."""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready."""
        return {"files": self.files, "blocks": self.blocks, "frames": self.frames, "values": self.values,
                "damaged": {k: list(v) for k, v in self.damaged.items()}}


def _levels(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(RMS, peak |value|) of the finite samples per channel of a time-major array, by the
    pass the blocks' own figures use (:func:`twinpass.core.loops.channel_stats`); NaN where a
    channel has none."""
    bad, sum_squares, peak = channel_stats(a)
    n = a.shape[0] - bad
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):  # a damaged sample may be huge
        rms = np.sqrt(sum_squares / n)
    return np.where(n > 0, rms, np.nan), np.where(n > 0, peak, np.nan)


def _mismatch(stored: np.ndarray, recorded: np.ndarray, rtol: float, skip: np.ndarray) -> int | None:
    """The first channel whose stored figure differs from the recorded one beyond ``rtol``
    (NaN on one side only counts as a difference), or None."""
    for c in range(recorded.shape[0]):
        s, r = float(stored[c]), float(recorded[c])
        if skip[c] or (np.isnan(s) and np.isnan(r)):
            continue
        if np.isnan(s) != np.isnan(r) or abs(s - r) > rtol * max(abs(r), abs(s)) + 1e-300:
            return c
    return None


BLOSC_HEADER_BYTES: int = 16
"""Length of the header a Blosc (version 1 format) chunk begins with: version, codec version,
flags and type size (a byte each), then the decoded size, block size and compressed size
(little-endian 32-bit each)."""


def _chunk_file_problem(path: Path, decoded: int, compressed: bool, checksummed: bool) -> str | None:
    """What is wrong with one chunk file (None when nothing is, or it is missing: ``twinpass
    status`` reports missing chunk files itself). With a checksum (the ``crc32c`` codec), its
    last four bytes must be the CRC-32C of the bytes before them. Uncompressed, its values must
    take ``decoded`` bytes; compressed, its Blosc header must say ``decoded`` bytes decoded and
    the compressed size the file holds (a truncated or extended file can still decode, wrongly)."""
    try:
        raw = path.read_bytes() if checksummed else None
        size = path.stat().st_size if raw is None else len(raw)
        if raw is None:
            with open(path, "rb") as fh:
                head = fh.read(BLOSC_HEADER_BYTES)
        else:
            head = raw[:BLOSC_HEADER_BYTES]
    except OSError:
        return None
    if size == 0:
        return None
    if raw is not None:
        try:
            checksum_body(raw, str(path))
        except StoreError:
            return "does not match its CRC-32C checksum: changed since it was written (damaged, truncated or edited)"
        size -= CHECKSUM_BYTES
    if not compressed:
        return None if size == decoded else f"holds {size:,} bytes of values, where its values take {decoded:,}"
    if len(head) < BLOSC_HEADER_BYTES:
        return f"holds {size:,} bytes, fewer than its compression header's {BLOSC_HEADER_BYTES}"
    nbytes, _blocksize, cbytes = struct.unpack("<III", head[4:16])
    if cbytes != size:
        return f"holds {size:,} compressed bytes, where its compression header says {cbytes:,} (truncated or extended since)"
    if nbytes != decoded:
        return f"its compression header says {nbytes:,} bytes decoded, where its values take {decoded:,}"
    return None


def verify_file(store: OutputStore, name: str) -> tuple[int, int, int, list[str]]:
    """Compare each done block of output ``name`` with its recorded levels.

    Returns
    -------
    (blocks, frames, values, lines)
        Blocks compared, frames read (samples per channel), values read (frames x
        channels), and one line per mismatching block naming its frames, the channel and
        both figures (or the error reading it).
    """
    table = store.read_block_table(name, figures=True, seams=False)
    if table.figures is None:
        return 0, 0, 0, []
    columns = list(table.columns)
    try:
        rms_col, peak_col, clip_col = (columns.index(k) for k in ("rms_out", "peak_out", "clipped"))
    except ValueError:  # a table without level figures: nothing to compare with
        return 0, 0, 0, []
    blocks = frames = values = 0
    lines: list[str] = []
    files = store.chunk_files(name)
    bad_spans: list[tuple[int, int]] = []
    if files is not None:
        compressed, checksummed = store.chunk_format(name)
        for a, b, path, decoded in files:
            problem = _chunk_file_problem(path, decoded, compressed, checksummed)
            if problem is not None:
                lines.append(f"chunk file {'/'.join(path.parts[-3:])} (frames {a:,}-{b - 1:,}): {problem}")
                bad_spans.append((a, b))
    for i, (status, (a, b)) in enumerate(zip(table.status.tolist(), table.span.tolist())):
        if int(status) not in (PASS, WARN) or any(a < y and x < b for x, y in bad_spans):
            continue  # not done, or its chunk files named already
        where = f"block {i} (frames {int(a):,}-{int(b) - 1:,})"
        try:
            data = store.read(name, int(a), int(b))
        except Exception as e:  # a chunk that does not decode: the file is damaged there
            lines.append(f"{where}: cannot be read ({type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''})")
            continue
        blocks += 1
        frames += int(data.shape[0])
        values += int(data.size)
        rtol = FLOAT32_RTOL if data.dtype == np.float32 else FLOAT64_RTOL
        fig = np.asarray(table.figures[i], dtype=np.float64)
        rms, peak = _levels(data)
        skip = np.nan_to_num(fig[:, clip_col]) > 0  # values beyond the output type: stored as inf
        for label, stored, col in (("RMS", rms, rms_col), ("peak", peak, peak_col)):
            # The recorded figure as the output type holds it: a float32 output stores 0 where
            # the float64 result was below float32's smallest value.
            with np.errstate(over="ignore", under="ignore"):
                recorded = fig[:, col].astype(data.dtype).astype(np.float64)
            c = _mismatch(stored, recorded, rtol, skip)
            if c is not None:
                lines.append(f"{where}: stored samples' {label} {stored[c]:.9g} on channel {c}, recorded "
                             f"{fig[c, col]:.9g} when written")
                break
    return blocks, frames, values, lines


def verify_store(store: OutputStore, files: Iterable[dict[str, Any]],
                 progress: Callable[[str], None] | None = None) -> Verification:
    """Verify the complete outputs among ``files`` (entries of
    :func:`twinpass.status.collect_status`: ``name``, ``complete``); ``progress`` is called
    with each name before it is read."""
    out = Verification()
    for f in files:
        if not f.get("complete"):
            continue  # not complete: status says why already
        name = str(f["name"])
        if progress is not None:
            progress(name)
        try:
            blocks, frames, values, lines = verify_file(store, name)
        except StoreError as e:
            blocks, frames, values, lines = 0, 0, 0, [f"its block table cannot be read: {e}"]
        out.files += 1
        out.blocks += blocks
        out.frames += frames
        out.values += values
        if lines:
            shown = lines[:SHOWN_PER_FILE]
            if len(lines) > SHOWN_PER_FILE:
                shown.append(f"and {len(lines) - SHOWN_PER_FILE} more block(s)")
            out.damaged[name] = shown
    return out


REMEDY: str = ("these outputs' chunk files no longer hold what the run wrote (changed, swapped or damaged since): "
               "restore the store from a copy, or delete each such output's folder in the store (<store>/<array "
               "name>) and run again, which filters those files anew")
"""What to do about outputs whose stored samples do not match their records."""

__all__ = ["Verification", "verify_file", "verify_store", "FLOAT32_RTOL", "FLOAT64_RTOL", "REMEDY"]
