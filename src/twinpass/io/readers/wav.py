"""WAV reader: RIFF, RF64 (EBU Tech 3306) and BW64 (ITU-R BS.2088) WAVE files.

The chunk list is walked here (no whole-file load, no whole-file memory map): ``ds64`` gives
the 64-bit sizes of RF64/BW64 files, ``fmt `` the encoding, ``data`` the sample bytes, and
``bext`` (Broadcast WAVE) an optional start time; every other chunk (``LIST``, ``JUNK``,
``cue ``...) is skipped, honouring the pad byte after odd-sized chunks.

Supported encodings (``WAVE_FORMAT_PCM``, ``WAVE_FORMAT_IEEE_FLOAT`` and
``WAVE_FORMAT_EXTENSIBLE`` with the PCM or IEEE-float sub-format GUID):

==========================  =================  =====================================
stored                      ``sample_format``  scaling to float64
==========================  =================  =====================================
8-bit PCM (unsigned)        ``pcm8``           ``(v - 128) / 128``
16/24/32-bit PCM            ``pcm16`` ...      ``v / 2**(bits - 1)``
PCM, fewer valid bits       ``pcm24in32`` ...  ``v / 2**(container_bits - 1)`` (valid
(EXTENSIBLE)                                   bits are the high bits of the container)
32/64-bit IEEE float        ``float32/64``     as stored
==========================  =================  =====================================

Other format tags (mu-law, A-law, ADPCM, MPEG...) raise
:class:`~twinpass.errors.UnsupportedFormatError` naming the tag.

Reader options
--------------
``truncated``: ``"error"`` (default) or ``"warn"``. A data chunk holding fewer bytes than its
header claims (or not a whole number of frames) is an error by default; with ``"warn"`` the
recording ends at the last whole frame and ``RecordingInfo.warnings`` says so.
``sample_rate_hz``: optional; must agree with the header's rate.
``wrapped_sizes``: ``"error"`` (default) or ``"read"``. A plain RIFF file (not RF64/BW64) larger
than 4 GiB whose ``data`` chunk is the last chunk and ends, by its 32-bit size, before the end of
the file most likely had its sizes wrapped at 4 GiB by a writer that did not switch to RF64:
reading the declared size would lose most samples, so this is an error by default; with
``"read"`` the data runs to the end of the file (its whole frames) and a warning says so.

A ``data`` chunk whose size field says 0 while whole frames, not a chunk, follow it to the end
of the file is the header of a recorder that stopped before it wrote the real sizes: an error
naming the sizes to write, whatever the options (``truncated`` is for data shorter than its
size, ``wrapped_sizes`` for files over 4 GiB).

Start time
----------
From a ``bext`` chunk (EBU Tech 3285) when present: ``TimeReference`` counts samples since
midnight of ``OriginationDate``, so a non-zero ``TimeReference`` gives
``OriginationDate 00:00 + TimeReference / sample_rate``; with ``TimeReference == 0`` it is
``OriginationDate OriginationTime``. ``bext`` carries no time zone: the time is taken as UTC.
Without a usable ``bext`` chunk ``start_time`` is ``None``.
"""

from __future__ import annotations

import datetime as _dt
import re
import struct
import uuid
from dataclasses import dataclass, field
from typing import Any, BinaryIO

from ...errors import CorruptInputError, UnsupportedFormatError
from ._common import (
    HEADER_REWRITE,
    TRUNCATED_HINT,
    UTC,
    WRAPPED_HINT,
    WRAPPED_MODES,
    choice_option,
    WRAPPED_REWRITE,
    Codec,
    FileReader,
    InterleavedRecording,
    option_rate,
    pread,
    resolve_rate,
    truncated_mode,
)
from .base import ReaderSpec, RecordingInfo

WAVE_FORMAT_PCM = 0x0001
WAVE_FORMAT_IEEE_FLOAT = 0x0003
WAVE_FORMAT_EXTENSIBLE = 0xFFFE

_TAG_NAMES = {
    0x0001: "PCM",
    0x0002: "Microsoft ADPCM",
    0x0003: "IEEE float",
    0x0006: "A-law",
    0x0007: "mu-law",
    0x0011: "IMA ADPCM",
    0x0055: "MPEG Layer 3",
    0xFFFE: "EXTENSIBLE",
}

# KSDATAFORMAT_SUBTYPE_* GUIDs are {tag-0000-0010-8000-00AA00389B71}; bytes 2..16 as stored.
_SUBFORMAT_TAIL = bytes.fromhex("000000001000800000aa00389b71")
_U32_MAX = 0xFFFFFFFF
_MAX_CHUNKS = 100_000
_BEXT_MIN = 346  # up to and including TimeReference
_SEP = r"[-_:. /]"


@dataclass
class _Layout:
    container: str
    fmt_offset: int = -1
    tag: int = 0
    channels: int = 0
    rate: int = 0
    block_align: int = 0
    bits: int = 0
    valid_bits: int = 0
    channel_mask: int | None = None
    sub_tag: int = 0
    data_chunk: int = -1
    data_offset: int = -1
    data_size: int = 0
    data_size_at: int = -1
    bext: bytes | None = None
    warnings: list[str] = field(default_factory=list)


def _tag_text(tag: int) -> str:
    return f"0x{tag:04X} ({_TAG_NAMES.get(tag, 'unknown')})"


def _printable(cid: bytes) -> bool:
    return len(cid) == 4 and all(0x20 <= c <= 0x7E for c in cid)


def _walk(path: str, fh: BinaryIO, size: int, wrapped: str = "error") -> _Layout:
    """Walk the RIFF/RF64/BW64 chunks; return where fmt, data and bext are.

    ``wrapped``: what to do with a plain RIFF file over 4 GiB whose sizes wrapped (module
    documentation, option ``wrapped_sizes``).
    """
    head = pread(fh, 0, 12)
    if len(head) < 12:
        if head[:4] in (b"RIFF", b"RF64", b"BW64"):
            raise CorruptInputError(
                f"{path}: the file is {size} bytes, shorter than the 12-byte RIFF header (byte 0)", path=path
            )
        raise UnsupportedFormatError(f"{path}: not a WAVE file ({size} bytes, no RIFF header)", path=path)
    rid, riff_size, form = head[:4], struct.unpack("<I", head[4:8])[0], head[8:12]
    if rid == b"RIFX":
        raise UnsupportedFormatError(f"{path}: big-endian RIFX WAVE files are not supported", path=path)
    if rid not in (b"RIFF", b"RF64", b"BW64"):
        raise UnsupportedFormatError(
            f"{path}: not a WAVE file (byte 0 holds {rid!r}, expected 'RIFF', 'RF64' or 'BW64')", path=path
        )
    if form != b"WAVE":
        raise UnsupportedFormatError(
            f"{path}: the {rid.decode()} form type at byte 8 is {form!r}, not 'WAVE'", path=path
        )
    lay = _Layout(container=rid.decode())
    pos = 12
    ds64_data: int | None = None
    table: dict[bytes, int] = {}
    if rid != b"RIFF":
        hdr = pread(fh, 12, 8)
        if len(hdr) < 8 or hdr[:4] != b"ds64":
            raise CorruptInputError(
                f"{path}: an {lay.container} file needs a 'ds64' chunk at byte 12 (EBU Tech 3306), "
                f"found {hdr[:4]!r}; the header is damaged",
                path=path,
            )
        ds_size = struct.unpack("<I", hdr[4:])[0]
        if ds_size < 28:
            raise CorruptInputError(
                f"{path}: the ds64 chunk at byte 12 is {ds_size} bytes, fewer than the 28 it needs", path=path
            )
        body = pread(fh, 20, 28)
        if len(body) < 28:
            raise CorruptInputError(f"{path}: the file ends inside the ds64 chunk at byte 12", path=path)
        riff64, ds64_data, _samples, n_table = struct.unpack("<QQQI", body)
        n_table = min(n_table, (ds_size - 28) // 12, 1024)
        raw_table = pread(fh, 48, 12 * n_table)
        for k in range(len(raw_table) // 12):
            cid, csize = struct.unpack("<4sQ", raw_table[12 * k : 12 * k + 12])
            table[cid] = csize
        if riff_size == _U32_MAX:
            riff_size = riff64
        pos = 20 + ds_size + (ds_size & 1)
    # A RIFF size of 0: left unwritten, like the data size, by a recorder that stopped before
    # it closed the file. The chunks are walked to the end of the file, and the sizes to write
    # are named below.
    riff_unwritten = rid == b"RIFF" and riff_size == 0
    if riff_size < 4 and not riff_unwritten:
        raise CorruptInputError(
            f"{path}: the RIFF size at byte 4 is {riff_size}; the header is damaged "
            "(it should be the file size minus 8)",
            path=path,
        )
    riff_end = size if riff_unwritten else 8 + riff_size
    walk_end = min(riff_end, size)

    for _ in range(_MAX_CHUNKS):
        if pos + 8 > walk_end:
            break
        hdr = pread(fh, pos, 8)
        cid, csize = hdr[:4], struct.unpack("<I", hdr[4:])[0]
        found_both = lay.fmt_offset >= 0 and lay.data_offset >= 0
        if not _printable(cid):
            msg = (
                f"{path}: invalid chunk id {cid!r} at byte {pos}; the chunk list is damaged "
                "(a chunk size is wrong or an odd-sized chunk lacks its pad byte)"
            )
            if found_both:
                lay.warnings.append(f"{msg}; {_rest_ignored(lay, pos, walk_end)}")
                break
            raise CorruptInputError(msg, path=path)
        in_ds64 = rid != b"RIFF" and csize == _U32_MAX
        if in_ds64:
            csize = ds64_data if cid == b"data" and ds64_data is not None else table.get(cid, csize)
        body = pos + 8
        end = body + csize
        if cid == b"data":
            if lay.data_offset < 0:
                lay.data_chunk, lay.data_offset, lay.data_size = pos, body, csize
                lay.data_size_at = 28 if in_ds64 else pos + 4  # ds64: RIFF size, then data size
                if end > size:
                    break  # truncated data: judged once fmt is known
                if end > riff_end:
                    raise CorruptInputError(
                        f"{path}: the RIFF size at byte 4 says the file ends at byte {riff_end}, but the "
                        f"data chunk at byte {pos} ends at byte {end}; the header is damaged "
                        f"(the RIFF size should be the file size minus 8)",
                        path=path,
                    )
            else:
                lay.warnings.append(f"second data chunk at byte {pos} ignored")
        elif end > walk_end:
            msg = (
                f"{path}: chunk {cid.decode()!r} at byte {pos} claims {csize} bytes, past the end of the "
                f"{'RIFF chunk' if walk_end == riff_end else 'file'} at byte {walk_end}"
            )
            if found_both:
                lay.warnings.append(msg + "; it was ignored")
                break
            raise CorruptInputError(msg + "; the header is damaged", path=path)
        elif cid == b"fmt ":
            if lay.fmt_offset < 0:
                _parse_fmt(path, lay, pos, pread(fh, body, min(csize, 40)), csize)
            else:
                lay.warnings.append(f"second fmt chunk at byte {pos} ignored")
        elif cid == b"bext" and lay.bext is None and csize >= _BEXT_MIN:
            lay.bext = pread(fh, body, _BEXT_MIN)
        pos = end + (csize & 1)
    else:
        if not (lay.fmt_offset >= 0 and lay.data_offset >= 0):
            raise CorruptInputError(f"{path}: more than {_MAX_CHUNKS} chunks before fmt/data", path=path)

    for found, cid in ((lay.fmt_offset, "fmt "), (lay.data_offset, "data")):
        if found < 0:
            hint = (
                f"; the RIFF size at byte 4 ({riff_size}) ends the RIFF chunk at byte {riff_end} of "
                f"{size}: it is probably wrong (it should be the file size minus 8)"
                if riff_end < size
                else ""
            )
            raise CorruptInputError(
                f"{path}: no {cid!r} chunk between byte 12 and byte {walk_end}; the file is damaged{hint}",
                path=path,
            )
    data_end = lay.data_offset + lay.data_size
    trailing = size - (data_end + (lay.data_size & 1))
    if rid == b"RIFF" and size > _U32_MAX and trailing > 0 and data_end + (lay.data_size & 1) + 8 > walk_end:
        _wrapped_sizes(path, lay, size, riff_size, trailing, wrapped)
    elif riff_end > size and data_end <= size:
        lay.warnings.append(
            f"the RIFF size at byte 4 says {riff_end} bytes but the file has {size}; "
            "the data chunk is complete"
        )
    elif riff_end < size - 1:
        lay.warnings.append(f"{size - riff_end} bytes after the end of the RIFF chunk (byte {riff_end}) ignored")
    if lay.data_size == 0:
        _zero_data_size(path, fh, lay, size)
    if riff_unwritten and lay.data_size:
        raise CorruptInputError(
            f"{path}: the RIFF size at byte 4 is 0 while the data chunk at byte {lay.data_chunk} declares "
            f"{lay.data_size} bytes: the size field looks left unwritten (a recorder that stopped before "
            f"writing the real sizes leaves 0 there); {HEADER_REWRITE} (RIFF size {size - 8} at byte 4)",
            path=path,
        )
    return lay


def _rest_ignored(lay: _Layout, pos: int, end: int) -> str:
    """What a walk stopped at byte ``pos`` by an invalid chunk id leaves out, up to byte ``end``
    (the end of the RIFF chunk or of the file). Right after the data chunk, bytes that are no
    chunk are most likely samples its size field leaves out: said in whole frames."""
    rest = end - pos
    text = f"the rest of the file, {rest} bytes from byte {pos} to byte {end}, was ignored"
    data_end = lay.data_offset + lay.data_size
    align = max(lay.block_align, 1)
    frames = (end - data_end) // align
    if pos in (data_end, data_end + (lay.data_size & 1)) and frames > 0:
        field_ = "size in the ds64 chunk" if lay.data_size_at == 28 else "size field"
        text += (
            f": it follows the data chunk and holds {frames} whole frames of {align} bytes, left out if they are "
            f"samples (the data chunk's {field_} at byte {lay.data_size_at} says {lay.data_size} bytes; "
            f"{lay.data_size + frames * align} would take them in)"
        )
    return text


def _zero_data_size(path: str, fh: BinaryIO, lay: _Layout, size: int) -> None:
    """A data chunk declaring 0 bytes, followed by whole frames up to the end of the file
    rather than by another chunk: the sizes a recorder writes before it starts and fills in
    when it closes the file, left as they were (it stopped first). Raises, naming the sizes to
    write; a data chunk that is really empty (nothing after it, or a chunk) is left to the
    caller, which reports an empty recording."""
    align = max(lay.block_align, 1)
    follow = size - lay.data_offset
    frames = follow // align
    if frames == 0:
        return
    nxt = pread(fh, lay.data_offset, 8)
    if _printable(nxt[:4]) and lay.data_offset + 8 + struct.unpack("<I", nxt[4:])[0] <= size:
        return  # a chunk follows the empty data chunk
    data = frames * align
    rest = follow - data
    riff = lay.data_offset + data + (data & 1) - 8
    where = "its size in the ds64 chunk" if lay.data_size_at == 28 else "its size field"
    riff_at = "at byte 4" if lay.container == "RIFF" else "in the ds64 chunk at byte 20"
    raise CorruptInputError(
        f"{path}: the data chunk at byte {lay.data_chunk} declares 0 bytes ({where} at byte "
        f"{lay.data_size_at}), but {follow} bytes = {frames} whole frames of {align} bytes follow it to the "
        "end of the file: the size field looks wrong (a recorder that stopped before writing the real sizes "
        f"leaves 0 there); {HEADER_REWRITE} (data size {data} at byte {lay.data_size_at}, "
        f"RIFF size {riff} {riff_at}"
        + (f", and cut the last {rest} bytes, less than a frame" if rest else "")
        + ")",
        path=path,
    )


def _wrapped_sizes(path: str, lay: _Layout, size: int, riff_size: int, trailing: int, mode: str) -> None:
    """A plain RIFF file over 4 GiB whose last chunk, data, ends before the file: raise, or
    (``mode == "read"``) let the data run to the end of the file."""
    align = max(lay.block_align, 1)
    whole = (size - lay.data_offset) // align
    declared = lay.data_size // align
    wraps = (size - lay.data_offset - lay.data_size) % (1 << 32) in (0, 1)
    why = (
        "consistent with 32-bit sizes that wrapped at 4 GiB (a writer that did not switch to RF64)"
        if wraps
        else "most likely its 32-bit sizes could not hold the real ones (a plain RIFF file cannot describe more "
        "than 4 GiB)"
    )
    what = (
        f"a plain RIFF WAVE file of {size} bytes (over 4 GiB), whose data chunk at byte {lay.data_chunk} is the "
        f"last chunk but declares {lay.data_size} bytes = {declared} frames (RIFF size {riff_size} at byte 4): "
        f"{trailing} bytes follow its declared end, {why}"
    )
    if mode == "error":
        raise CorruptInputError(
            f"{path}: {what}; reading the declared size would lose most of the {whole} frames in the file. "
            f"{WRAPPED_REWRITE}; {WRAPPED_HINT}",
            path=path,
        )
    lay.data_size = whole * align
    rest = (size - lay.data_offset) % align
    lay.warnings.append(
        f"{what}; read all {whole} whole frames up to the end of the file"
        + (f" (the last {rest} bytes, less than a frame, ignored)" if rest else "")
    )


def _parse_fmt(path: str, lay: _Layout, pos: int, body: bytes, csize: int) -> None:
    if csize < 16 or len(body) < 16:
        raise CorruptInputError(
            f"{path}: the fmt chunk at byte {pos} is {csize} bytes, fewer than the 16 it needs", path=path
        )
    tag, ch, rate, _avg, align, bits = struct.unpack("<HHIIHH", body[:16])
    lay.fmt_offset, lay.tag, lay.channels, lay.rate = pos, tag, ch, rate
    lay.block_align, lay.bits, lay.valid_bits, lay.sub_tag = align, bits, bits, tag
    b = pos + 8  # byte offset of the fmt body
    if tag == WAVE_FORMAT_EXTENSIBLE:
        if csize < 40 or len(body) < 40:
            raise CorruptInputError(
                f"{path}: the WAVE_FORMAT_EXTENSIBLE fmt chunk at byte {pos} is {csize} bytes, "
                "fewer than the 40 it needs",
                path=path,
            )
        cb, valid, mask = struct.unpack("<HHI", body[16:24])
        guid = body[24:40]
        if cb < 22:
            raise CorruptInputError(
                f"{path}: cbSize at byte {b + 16} is {cb}; WAVE_FORMAT_EXTENSIBLE needs 22", path=path
            )
        if guid[2:] != _SUBFORMAT_TAIL:
            raise UnsupportedFormatError(
                f"{path}: WAVE_FORMAT_EXTENSIBLE sub-format GUID {uuid.UUID(bytes_le=guid)} at byte "
                f"{b + 24} is not supported (only PCM and IEEE float)",
                path=path,
            )
        lay.sub_tag = struct.unpack("<H", guid[:2])[0]
        lay.channel_mask = mask
        lay.valid_bits = valid or bits
        if lay.valid_bits > bits:
            raise CorruptInputError(
                f"{path}: {valid} valid bits at byte {b + 18} exceed the {bits}-bit container", path=path
            )
    sub = lay.sub_tag
    where = "sub-format" if tag == WAVE_FORMAT_EXTENSIBLE else "format tag"
    if sub == WAVE_FORMAT_PCM:
        if bits not in (8, 16, 24, 32):
            raise UnsupportedFormatError(
                f"{path}: {bits}-bit PCM (fmt chunk at byte {pos}) is not supported; "
                "use 8, 16, 24 or 32 bits",
                path=path,
            )
    elif sub == WAVE_FORMAT_IEEE_FLOAT:
        if bits not in (32, 64):
            raise UnsupportedFormatError(
                f"{path}: {bits}-bit IEEE float (fmt chunk at byte {pos}) is not supported; "
                "use 32 or 64 bits",
                path=path,
            )
    else:
        raise UnsupportedFormatError(
            f"{path}: WAVE {where} {_tag_text(sub)} (fmt chunk at byte {pos}) is not supported; "
            "convert the file to PCM or IEEE float",
            path=path,
        )
    if ch == 0:
        raise CorruptInputError(f"{path}: 0 channels at byte {b + 2} (fmt chunk)", path=path)
    if rate == 0:
        raise CorruptInputError(f"{path}: sample rate 0 at byte {b + 4} (fmt chunk)", path=path)
    if align != ch * bits // 8:
        raise CorruptInputError(
            f"{path}: block_align {align} at byte {b + 12} disagrees with {ch} channels x {bits} bits "
            f"(expected {ch * bits // 8}); the fmt chunk is damaged",
            path=path,
        )


def _bext_start(lay: _Layout) -> tuple[_dt.datetime | None, str | None]:
    """Start time from a bext chunk (EBU Tech 3285), or (None, reason)."""
    raw = lay.bext
    if raw is None:
        return None, None
    date_txt = raw[320:330].decode("ascii", "replace").strip("\x00 ")
    time_txt = raw[330:338].decode("ascii", "replace").strip("\x00 ")
    (time_ref,) = struct.unpack("<Q", raw[338:346])
    if not date_txt:
        return None, None
    md = re.fullmatch(rf"(\d{{4}}){_SEP}(\d{{2}}){_SEP}(\d{{2}})", date_txt)
    mt = re.fullmatch(rf"(\d{{2}}){_SEP}(\d{{2}}){_SEP}(\d{{2}})", time_txt) if time_txt else None
    try:
        if md is None:
            raise ValueError("bad date")
        day = _dt.datetime(int(md[1]), int(md[2]), int(md[3]), tzinfo=UTC)
        if time_ref:
            return day + _dt.timedelta(seconds=time_ref / lay.rate), None
        if mt is not None:
            return day.replace(hour=int(mt[1]), minute=int(mt[2]), second=int(mt[3])), None
        return day, None
    except (ValueError, OverflowError):
        return None, (
            f"bext OriginationDate {date_txt!r} / OriginationTime {time_txt!r} / TimeReference "
            f"{time_ref} do not give a valid time; start_time left unknown"
        )


class WavReader(FileReader):
    """RIFF / RF64 / BW64 WAVE files (PCM 8-32 bit, IEEE float 32/64, EXTENSIBLE)."""

    name = "wav"
    suffixes = (".wav", ".wave", ".bwf", ".rf64")
    options = ("truncated", "sample_rate_hz", "wrapped_sizes")

    def _open_file(self, path: str, fh: BinaryIO, size: int, options: dict[str, Any]) -> InterleavedRecording:
        mode = truncated_mode(path, options)
        rate_opt = option_rate(path, options)
        lay = _walk(path, fh, size, choice_option(path, options, "wrapped_sizes", WRAPPED_MODES))
        info, codec = _describe(path, lay, size, mode, rate_opt)
        spec = ReaderSpec.create(self.name, path, options)
        return InterleavedRecording(info, spec, fh, codec, lay.data_offset)


def _describe(path: str, lay: _Layout, size: int, mode: str, rate_opt: float | None) -> tuple[RecordingInfo, Codec]:
    align = lay.block_align
    claimed = lay.data_size
    present = min(claimed, max(0, size - lay.data_offset))
    frames = present // align
    if present < claimed or claimed % align:
        what = (
            f"the data chunk at byte {lay.data_chunk} claims {claimed} bytes = {claimed / align:g} frames "
            f"of {align} bytes, but {present} bytes are present = {frames} whole frames"
        )
        if mode == "error":
            raise CorruptInputError(
                f"{path}: {what}. The file is truncated or its data size is wrong; {TRUNCATED_HINT}",
                path=path,
            )
        lay.warnings.append(f"{what}; read up to the last whole frame ({frames})")
    if frames == 0:
        raise CorruptInputError(
            f"{path}: the data chunk at byte {lay.data_chunk} holds no whole frame ({present} bytes, "
            f"{align} bytes per frame); the recording is empty",
            path=path,
        )
    if lay.sub_tag == WAVE_FORMAT_IEEE_FLOAT:
        codec = Codec("f", lay.bits // 8)
        fmt_name = f"float{lay.bits}"
    else:
        codec = Codec("u" if lay.bits == 8 else "i", lay.bits // 8)
        fmt_name = f"pcm{lay.bits}" if lay.valid_bits == lay.bits else f"pcm{lay.valid_bits}in{lay.bits}"
    start, why = _bext_start(lay)
    if why:
        lay.warnings.append(why)
    rate = resolve_rate(path, float(lay.rate), "WAV header", rate_opt)
    info = RecordingInfo(
        path=path,
        format="wav",
        frames=frames,
        channels=lay.channels,
        sample_rate_hz=rate,
        sample_format=fmt_name,
        start_time=start,
        full_scale=codec.full_scale,
        warnings=tuple(lay.warnings),
        extra={
            "container": lay.container,
            "format_tag": lay.tag,
            "data_offset": lay.data_offset,
            "block_align": align,
            "bits_per_sample": lay.bits,
            "valid_bits": lay.valid_bits,
            "channel_mask": lay.channel_mask,
        },
    )
    return info, codec
