"""Test helpers: hand-built WAV files, packed 24-bit samples, checksums, time guards.

The byte layouts follow the published formats:

* RIFF/WAVE with ``WAVEFORMATEX`` / ``WAVEFORMATEXTENSIBLE`` -- Microsoft, "Multiple channel
  audio data and WAVE files" (the EXTENSIBLE sub-format GUIDs are
  ``{tag-0000-0010-8000-00AA00389B71}``);
* RF64 with the ``ds64`` chunk -- EBU Tech 3306 "MBWF / RF64: an extended File Format for
  audio"; BW64 (ITU-R BS.2088) uses the same ``ds64`` layout;
* ``bext`` -- EBU Tech 3285 (Broadcast Wave Format), field layout from memory:
  Description 256, Originator 32, OriginatorReference 32, OriginationDate 10,
  OriginationTime 8, TimeReference uint64, Version, UMID 64, loudness 10, reserved 180.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import signal
import struct
from collections.abc import Iterator, Sequence

import numpy as np

PCM, IEEE_FLOAT, ALAW, MULAW, ADPCM, EXTENSIBLE = 0x0001, 0x0003, 0x0006, 0x0007, 0x0002, 0xFFFE
GUID_TAIL = bytes.fromhex("000000001000800000aa00389b71")


def chunk(cid: bytes, payload: bytes, size: int | None = None) -> bytes:
    """One RIFF chunk, with the pad byte after an odd-sized payload."""
    n = len(payload) if size is None else size
    return cid + struct.pack("<I", n) + payload + (b"\0" if len(payload) % 2 else b"")


def subformat_guid(tag: int) -> bytes:
    return struct.pack("<H", tag) + GUID_TAIL


def fmt_chunk(
    tag: int,
    channels: int,
    rate: int,
    bits: int,
    *,
    block_align: int | None = None,
    sub_tag: int | None = None,
    valid_bits: int | None = None,
    channel_mask: int = 0,
) -> bytes:
    """A ``fmt `` chunk: 16 bytes for PCM, 18 (cbSize=0) for other tags, 40 for EXTENSIBLE."""
    align = channels * bits // 8 if block_align is None else block_align
    body = struct.pack("<HHIIHH", tag, channels, rate, rate * align, align, bits)
    if tag == EXTENSIBLE:
        body += struct.pack("<HHI", 22, bits if valid_bits is None else valid_bits, channel_mask)
        body += subformat_guid(PCM if sub_tag is None else sub_tag)
    elif tag != PCM:
        body += struct.pack("<H", 0)
    return chunk(b"fmt ", body)


def riff(chunks: Sequence[bytes], *, riff_size: int | None = None) -> bytes:
    body = b"WAVE" + b"".join(chunks)
    return b"RIFF" + struct.pack("<I", len(body) if riff_size is None else riff_size) + body


def rf64(
    before_data: Sequence[bytes], data: bytes, after_data: Sequence[bytes] = (), *, riff_id: bytes = b"RF64",
    frames: int = 0, data_size: int | None = None,
) -> bytes:
    """An RF64 (EBU Tech 3306) or BW64 file: RIFF and data sizes are -1, real sizes in ds64."""
    dsize = len(data) if data_size is None else data_size
    data_chunk = b"data" + struct.pack("<I", 0xFFFFFFFF) + data + (b"\0" if len(data) % 2 else b"")
    rest = b"".join(before_data) + data_chunk + b"".join(after_data)
    ds64_len = 8 + 28
    riff_size = 4 + ds64_len + len(rest) + (dsize - len(data))
    ds64 = chunk(b"ds64", struct.pack("<QQQI", riff_size, dsize, frames, 0))
    return riff_id + struct.pack("<I", 0xFFFFFFFF) + b"WAVE" + ds64 + rest


def bext_chunk(date: str, time: str, time_reference: int) -> bytes:
    body = bytearray(602)
    body[320:330] = date.encode("ascii").ljust(10, b"\0")
    body[330:338] = time.encode("ascii").ljust(8, b"\0")
    body[338:346] = struct.pack("<Q", time_reference)
    body[346:348] = struct.pack("<H", 1)
    return chunk(b"bext", bytes(body))


def pack_int24(values: np.ndarray, byteorder: str = "little") -> bytes:
    """Packed 3-byte two's-complement samples, built byte by byte."""
    v = np.asarray(values, dtype=np.int64).reshape(-1) & 0xFFFFFF
    b = np.stack([(v >> 0) & 0xFF, (v >> 8) & 0xFF, (v >> 16) & 0xFF], axis=1).astype(np.uint8)
    if byteorder == "big":
        b = b[:, ::-1]
    return b.tobytes()


def data_offset(blob: bytes) -> int:
    """Byte offset of the first ``data`` chunk's payload in a RIFF file."""
    pos = 12
    while pos + 8 <= len(blob):
        cid, size = blob[pos : pos + 4], struct.unpack("<I", blob[pos + 4 : pos + 8])[0]
        if cid == b"data":
            return pos + 8
        pos += 8 + size + (size & 1)
    raise ValueError("no data chunk")


def sha256(path: str | os.PathLike[str]) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


@contextlib.contextmanager
def time_limit(seconds: float) -> Iterator[None]:
    """Raise TimeoutError if the body runs longer than ``seconds`` (main thread, POSIX)."""
    if not hasattr(signal, "setitimer"):  # pragma: no cover
        yield
        return

    def _alarm(signum: int, frame: object) -> None:
        raise TimeoutError(f"still running after {seconds} s: a hang")

    old = signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)
