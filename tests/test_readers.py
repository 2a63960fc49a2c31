"""Input readers against outside references.

References: scipy.io.wavfile and Python's ``wave`` module (WAV writers/readers), numpy's
``np.save``/``np.load`` and ``numpy.lib.format`` (NPY), zarr-python (Zarr), the Microsoft
document "Multiple channel audio data and WAVE files" (WAVE_FORMAT_EXTENSIBLE), EBU Tech 3306
(RF64), EBU Tech 3285 (bext). The scaling convention (integer PCM / 2**(bits-1), 8-bit
unsigned offset by 128) is common practice (it is what e.g. soundfile/libsndfile return for
float reads).
"""

from __future__ import annotations

import datetime as dt
import io
import json
import os
import pickle
import shutil
import stat
import struct
import subprocess
import sys
import tempfile
import textwrap
import tracemalloc
import wave
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
import zarr

from twinpass.errors import ConfigError, CorruptInputError, InputError, UnsupportedFormatError
from twinpass.io.readers import (
    ENTRY_POINT_GROUP,
    ReaderPluginWarning,
    ReaderSpec,
    WavReader,
    available_readers,
    get_reader,
    open_recording,
    reader_for,
    register_reader,
    reload_readers,
)
from wavtools import (
    ADPCM,
    ALAW,
    EXTENSIBLE,
    IEEE_FLOAT,
    MULAW,
    PCM,
    bext_chunk,
    chunk,
    data_offset,
    fmt_chunk,
    pack_int24,
    rf64,
    riff,
    sha256,
)

RNG = np.random.default_rng(20240501)
UTC = dt.timezone.utc


def _ints(dtype: str, shape: tuple[int, ...]) -> np.ndarray:
    info = np.iinfo(dtype)
    x = RNG.integers(info.min, info.max, size=shape, endpoint=True, dtype=np.int64).astype(dtype)
    x.flat[0], x.flat[-1] = info.min, info.max  # both extremes of full scale
    return x


def _scaled(x: np.ndarray) -> np.ndarray:
    """Common-practice full-scale scaling of a numpy sample array."""
    if x.dtype.kind == "f":
        return x.astype(np.float64)
    bits = 8 * x.dtype.itemsize
    half = 2.0 ** (bits - 1)
    if x.dtype.kind == "u":
        return (x.astype(np.float64) - half) / half
    return x.astype(np.float64) / half


def _windows(n: int) -> list[tuple[int, int]]:
    return [(0, n), (7, n - 2), (333, 334), (n - 3, n), (5, 5), (1, 2)]


def _write(path: Path, blob: bytes) -> Path:
    path.write_bytes(blob)
    return path


# ----------------------------------------------------------------------------- WAV


@pytest.mark.parametrize("dtype", ["uint8", "int16", "int32", "float32", "float64"])
def test_wav_written_by_scipy_round_trips(tmp_path, dtype):
    # Reference: scipy.io.wavfile.write/read (8-bit unsigned, 16/32-bit PCM, IEEE float 32/64).
    n, ch = 1001, 3
    x = _ints(dtype, (n, ch)) if dtype[0] in "iu" else RNG.normal(0, 0.7, (n, ch)).astype(dtype)
    path = tmp_path / f"s_{dtype}.wav"
    wavfile.write(path, 8000, x)
    rate_ref, ref = wavfile.read(path)
    assert np.array_equal(ref, x)
    with open_recording(path) as rec:
        assert rec.info.format == "wav"
        assert (rec.info.frames, rec.info.channels, rec.info.sample_rate_hz) == (n, ch, float(rate_ref))
        assert rec.info.full_scale == (None if dtype.startswith("float") else 1.0)
        for a, b in _windows(n):
            y = rec.read(a, b)
            assert y.dtype == np.float64 and y.shape == (b - a, ch)
            assert np.array_equal(y, _scaled(ref[a:b]))
    if dtype == "uint8":  # 8-bit WAV is unsigned with 128 as zero (Microsoft WAVE format)
        assert rec.info.sample_format == "pcm8"


@pytest.mark.parametrize("sampwidth", [2, 3])
def test_wav_written_by_python_wave_module_round_trips(tmp_path, sampwidth):
    # Reference: Python's wave module writes 16- and 24-bit PCM (little-endian two's complement).
    n, ch, bits = 777, 2, 8 * sampwidth
    lo, hi = -(2 ** (bits - 1)), 2 ** (bits - 1) - 1
    x = RNG.integers(lo, hi, size=(n, ch), endpoint=True)
    x[0, 0], x[1, 1] = lo, hi
    frames = x.astype("<i2").tobytes() if sampwidth == 2 else pack_int24(x)
    path = tmp_path / f"w{bits}.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(ch)
        w.setsampwidth(sampwidth)
        w.setframerate(44100)
        w.writeframes(frames)
    with wave.open(str(path), "rb") as w:
        ref_params = (w.getnframes(), w.getnchannels(), float(w.getframerate()))
        assert w.readframes(n) == frames
    with open_recording(path) as rec:
        assert (rec.info.frames, rec.info.channels, rec.info.sample_rate_hz) == ref_params
        assert rec.info.sample_format == f"pcm{bits}"
        for a, b in _windows(n):
            assert np.array_equal(rec.read(a, b), x[a:b] / 2.0 ** (bits - 1))


@pytest.mark.parametrize("riff_id", [b"RF64", b"BW64"])
def test_rf64_and_bw64_with_ds64_chunk(tmp_path, riff_id):
    # Layout per EBU Tech 3306 (RF64; BW64 of ITU-R BS.2088 shares it): RIFF and data sizes
    # are 0xFFFFFFFF and the 64-bit sizes sit in the ds64 chunk right after 'WAVE'.
    x = _ints("int16", (500, 2))
    after = [chunk(b"LIST", b"INFOISFT" + struct.pack("<I", 5) + b"demo\0")]
    blob = rf64([fmt_chunk(PCM, 2, 2000, 16)], x.astype("<i2").tobytes(), after, riff_id=riff_id, frames=500)
    path = _write(tmp_path / "r.wav", blob)
    with open_recording(path) as rec:
        assert rec.info.extra["container"] == riff_id.decode()
        assert (rec.info.frames, rec.info.channels) == (500, 2)
        assert np.array_equal(rec.read(3, 499), x[3:499] / 32768.0)
        assert rec.info.warnings == ()
    if riff_id == b"RF64":  # scipy.io.wavfile reads RF64 as a second opinion
        assert np.array_equal(wavfile.read(path)[1], x)


def test_rf64_data_beyond_4_gib(tmp_path):
    # EBU Tech 3306: the 64-bit dataSize of ds64 describes data chunks past 4 GiB. The file is
    # written sparse (header, then truncate), with known samples at the very end.
    ch, frames = 2, (2**32 + 40_000) // 4
    blob = rf64([fmt_chunk(PCM, ch, 48000, 16)], b"", data_size=frames * 4, frames=frames)
    path = tmp_path / "big.rf64"
    tail = _ints("int16", (100, ch))
    with open(path, "wb") as f:
        f.write(blob)
        f.truncate(len(blob) + frames * 4)
        f.seek(len(blob) + (frames - 100) * 4)
        f.write(tail.astype("<i2").tobytes())
    with open_recording(path, format="wav") as rec:
        assert rec.info.frames == frames
        assert np.array_equal(rec.read(frames - 100, frames), tail / 32768.0)
        assert not rec.read(2**30, 2**30 + 10).any()


def _wrapped_riff(path: Path, ch: int = 2, extra_frames: int = 10_000) -> tuple[int, np.ndarray, np.ndarray]:
    """A plain RIFF file over 4 GiB written the way a writer without RF64 leaves it: its RIFF and
    data sizes wrapped modulo 2**32. Sparse (header, truncate), known samples at both ends.
    Returns the real frame count, the first 100 and the last 100 frames."""
    frames = (2**32 + extra_frames * 2 * ch) // (2 * ch)
    nbytes = frames * 2 * ch
    fmt = fmt_chunk(PCM, ch, 48000, 16)
    header = riff([fmt, chunk(b"data", b"", size=nbytes % 2**32)], riff_size=(4 + len(fmt) + 8 + nbytes) % 2**32)
    head, tail = _ints("int16", (100, ch)), _ints("int16", (100, ch))
    with open(path, "wb") as f:
        f.write(header + head.astype("<i2").tobytes())
        f.truncate(len(header) + nbytes)
        f.seek(len(header) + (frames - 100) * 2 * ch)
        f.write(tail.astype("<i2").tobytes())
    return frames, head, tail


def test_plain_riff_over_4_gib_with_wrapped_sizes_is_refused(tmp_path):
    path = tmp_path / "wrapped.wav"
    frames, _head, _tail = _wrapped_riff(path)
    with pytest.raises(CorruptInputError) as e:
        open_recording(path, format="wav")
    msg = str(e.value)
    for text in ("plain RIFF WAVE file of", "over 4 GiB", "data chunk at byte 36 is the last chunk but declares",
                 "= 10000 frames", "wrapped at 4 GiB", f"lose most of the {frames} frames",
                 "Rewrite the file as RF64 (or W64)", 'wrapped_sizes="read"'):
        assert text in msg, (text, msg)


def test_plain_riff_over_4_gib_read_to_its_end_when_asked(tmp_path):
    path = tmp_path / "wrapped.wav"
    frames, head, tail = _wrapped_riff(path)
    with open_recording(path, format="wav", options={"wrapped_sizes": "read"}) as rec:
        assert rec.info.frames == frames
        assert np.array_equal(rec.read(0, 100), head / 32768.0)
        assert np.array_equal(rec.read(frames - 100, frames), tail / 32768.0)
        (warning,) = rec.info.warnings
        assert f"read all {frames} whole frames up to the end of the file" in warning
    with pytest.raises(ConfigError, match="wrapped_sizes='yes'"):
        open_recording(path, format="wav", options={"wrapped_sizes": "yes"})


def test_plain_riff_under_4_gib_with_trailing_bytes_is_only_a_warning(tmp_path):
    x = _ints("int16", (300, 2))
    blob = riff([fmt_chunk(PCM, 2, 8000, 16), chunk(b"data", x.astype("<i2").tobytes())]) + bytes(1000)
    with open_recording(_write(tmp_path / "tail.wav", blob)) as rec:
        assert rec.info.frames == 300 and "1000 bytes after the end of the RIFF chunk" in rec.info.warnings[0]


def test_extensible_pcm16_matches_scipy(tmp_path):
    # Microsoft "Multiple channel audio data and WAVE files": WAVEFORMATEXTENSIBLE, cbSize 22,
    # dwChannelMask (0x33 = FL|FR|BL|BR), SubFormat KSDATAFORMAT_SUBTYPE_PCM.
    x = _ints("int16", (300, 4))
    blob = riff([fmt_chunk(EXTENSIBLE, 4, 16000, 16, channel_mask=0x33), chunk(b"data", x.astype("<i2").tobytes())])
    path = _write(tmp_path / "ext16.wav", blob)
    ref = wavfile.read(path)[1]  # scipy.io.wavfile understands EXTENSIBLE
    assert np.array_equal(ref, x)
    with open_recording(path) as rec:
        assert rec.info.extra["channel_mask"] == 0x33
        assert np.array_equal(rec.read(11, 299), ref[11:299] / 32768.0)


def test_extensible_float32_subformat(tmp_path):
    # Same document: SubFormat KSDATAFORMAT_SUBTYPE_IEEE_FLOAT = {00000003-0000-0010-8000-00AA00389B71}.
    x = RNG.normal(0, 2, (256, 3)).astype("<f4")
    blob = riff([fmt_chunk(EXTENSIBLE, 3, 1000, 32, sub_tag=IEEE_FLOAT), chunk(b"data", x.tobytes())])
    with open_recording(_write(tmp_path / "extf.wav", blob)) as rec:
        assert rec.info.sample_format == "float32" and rec.info.full_scale is None
        assert np.array_equal(rec.read(0, 256), x.astype(np.float64))


def test_extensible_24_valid_bits_in_32_bit_container(tmp_path):
    # Same document: wValidBitsPerSample < wBitsPerSample; the valid bits are the most
    # significant ones and the rest are zero (from memory), so v32 / 2**31 == v24 / 2**23.
    v = RNG.integers(-(2**23), 2**23, size=(400, 2))
    stored = (v << 8).astype("<i4")
    blob = riff([fmt_chunk(EXTENSIBLE, 2, 96000, 32, valid_bits=24), chunk(b"data", stored.tobytes())])
    with open_recording(_write(tmp_path / "v24in32.wav", blob)) as rec:
        assert rec.info.sample_format == "pcm24in32"
        assert rec.info.extra["valid_bits"] == 24
        assert np.array_equal(rec.read(1, 399), v[1:399] / 2.0**23)


def test_extensible_24_bit_packed(tmp_path):
    v = RNG.integers(-(2**23), 2**23, size=(123, 5))
    blob = riff([fmt_chunk(EXTENSIBLE, 5, 48000, 24), chunk(b"data", pack_int24(v))])
    with open_recording(_write(tmp_path / "e24.wav", blob)) as rec:
        assert np.array_equal(rec.read(17, 122), v[17:122] / 2.0**23)


def test_extensible_unknown_subformat_and_bad_valid_bits(tmp_path):
    guid_blob = riff([fmt_chunk(EXTENSIBLE, 1, 8000, 16, sub_tag=MULAW), chunk(b"data", b"\0\0" * 4)])
    with pytest.raises(UnsupportedFormatError, match=r"0x0007 \(mu-law\)"):
        open_recording(_write(tmp_path / "extmu.wav", guid_blob))
    other = bytearray(riff([fmt_chunk(EXTENSIBLE, 1, 8000, 16), chunk(b"data", b"\0\0" * 4)]))
    other[20 + 8 + 24 + 2 : 20 + 8 + 40] = bytes(14)  # not the KSDATAFORMAT GUID family
    with pytest.raises(UnsupportedFormatError, match="GUID"):
        open_recording(_write(tmp_path / "extguid.wav", bytes(other)))
    bad = riff([fmt_chunk(EXTENSIBLE, 1, 8000, 16, valid_bits=20), chunk(b"data", b"\0\0" * 4)])
    with pytest.raises(CorruptInputError, match="valid bits"):
        open_recording(_write(tmp_path / "extvb.wav", bad))


@pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")
def test_extra_chunks_and_odd_sizes_are_skipped(tmp_path):
    # RIFF rule (Microsoft RIFF/WAVE): an odd-sized chunk is followed by one pad byte.
    # scipy.io.wavfile reads the same file as a second opinion.
    x = RNG.integers(0, 256, size=(301, 1)).astype(np.uint8)  # odd data size as well
    blob = riff(
        [
            chunk(b"JUNK", b"abc"),
            chunk(b"LIST", b"INFOISFT" + struct.pack("<I", 9) + b"demo-app\0" + b"\0"),
            fmt_chunk(PCM, 1, 8000, 8),
            chunk(b"cue ", struct.pack("<I", 0)),
            chunk(b"data", x.tobytes()),
            chunk(b"LIST", b"INFOICMT" + struct.pack("<I", 3) + b"ab\0"),
        ]
    )
    path = _write(tmp_path / "chunks.wav", blob)
    assert np.array_equal(wavfile.read(path)[1], x[:, 0])
    with open_recording(path) as rec:
        assert rec.info.frames == 301 and rec.info.warnings == ()
        assert np.array_equal(rec.read(0, 301), (x.astype(np.float64) - 128) / 128)


def _truncated_wav(tmp_path: Path) -> tuple[Path, np.ndarray]:
    x = _ints("int16", (1000, 2))
    buf = io.BytesIO()
    wavfile.write(buf, 1000, x)
    blob = buf.getvalue()
    cut = data_offset(blob) + 500 * 4 + 3  # 500 whole frames and 3 stray bytes
    return _write(tmp_path / "cut.wav", blob[:cut]), x


def test_truncated_data_chunk_is_an_error_by_default(tmp_path):
    path, _ = _truncated_wav(tmp_path)
    with pytest.raises(CorruptInputError) as err:
        open_recording(path)
    msg = str(err.value)
    assert str(path) in msg and "1000 frames" in msg and "500 whole frames" in msg
    assert 'truncated="warn"' in msg
    assert err.value.path == str(path)


def test_truncated_data_chunk_with_warn_reads_whole_frames(tmp_path):
    path, x = _truncated_wav(tmp_path)
    with open_recording(path, options={"truncated": "warn"}) as rec:
        assert rec.info.frames == 500
        assert any("last whole frame" in w for w in rec.info.warnings)
        assert np.array_equal(rec.read(0, 500), x[:500] / 32768.0)
        with pytest.raises(InputError):
            rec.read(0, 501)


def test_samples_past_a_data_size_declared_too_small_are_counted_in_the_note(tmp_path):
    # RIFF (Microsoft "Multiple channel audio data and WAVE files"): the data chunk's size
    # field at byte 4 of the chunk bounds its samples, so a reader takes the declared 1000
    # frames (scipy.io.wavfile reads the same); the 1000 frames after them are no chunk.
    x = _ints("int16", (2000, 2))
    fmt = fmt_chunk(PCM, 2, 1000, 16)
    blob = riff([fmt, chunk(b"data", x.tobytes(), size=1000 * 4)])
    path = _write(tmp_path / "short_size.wav", blob)
    with pytest.warns(wavfile.WavFileWarning):  # scipy stops at the unknown "chunk" as well
        assert np.array_equal(wavfile.read(path)[1], x[:1000])
    at = 12 + len(fmt)  # the data chunk
    with open_recording(path) as rec:
        assert rec.info.frames == 1000
        assert np.array_equal(rec.read(0, 1000), x[:1000] / 32768.0)
        (note,) = rec.info.warnings
    assert f"invalid chunk id {x[1000:1002].tobytes()[:4]!r} at byte {at + 8 + 4000}" in note
    assert note.endswith(
        f"the rest of the file, 4000 bytes from byte {at + 8 + 4000} to byte {len(blob)}, was ignored: it follows "
        f"the data chunk and holds 1000 whole frames of 4 bytes, left out if they are samples (the data chunk's "
        f"size field at byte {at + 4} says 4000 bytes; 8000 would take them in)"
    ), note


def test_zero_data_size_followed_by_frames_names_the_sizes_to_write(tmp_path):
    # A recorder writes its header with sizes 0 and fills them in when it closes the file; one
    # that stopped first leaves 0 in the data chunk's size field (Microsoft "Multiple channel
    # audio data and WAVE files": ckSize at byte 4 of a chunk; RIFF size = file size - 8).
    x = _ints("int16", (1000, 2))
    fmt = fmt_chunk(PCM, 2, 1000, 16)
    samples = x.astype("<i2").tobytes()
    good = riff([fmt, chunk(b"data", samples)])
    path = _write(tmp_path / "open.wav", riff([fmt, chunk(b"data", b"", size=0)]) + samples + b"\1\2")
    with pytest.raises(CorruptInputError) as err:
        open_recording(path, options={"truncated": "warn"})
    msg = str(err.value)
    at = 12 + len(fmt) + 4  # the data chunk's size field
    assert f"declares 0 bytes (its size field at byte {at})" in msg, msg
    assert "4002 bytes = 1000 whole frames of 4 bytes follow it to the end of the file" in msg, msg
    assert "the size field looks wrong" in msg and "recording is empty" not in msg, msg
    riff_size = struct.unpack("<I", good[4:8])[0]
    assert f"data size 4000 at byte {at}, RIFF size {riff_size} at byte 4, and cut the last 2 bytes" in msg, msg
    # with the sizes written as the message says, the file reads in full
    fixed = bytearray(path.read_bytes()[:-2])
    fixed[at:at + 4], fixed[4:8] = struct.pack("<I", 4000), struct.pack("<I", riff_size)
    with open_recording(_write(tmp_path / "fixed.wav", bytes(fixed))) as rec:
        assert np.array_equal(rec.read(0, 1000), x / 32768.0)


@pytest.mark.parametrize("data_size", [0, 4000])
def test_zero_riff_size_names_the_sizes_to_write(tmp_path, data_size):
    # A recorder that stopped before closing the file may leave the RIFF size at 0 as well
    # (Microsoft "Multiple channel audio data and WAVE files": RIFF size = file size - 8).
    x = _ints("int16", (1000, 2))
    fmt = fmt_chunk(PCM, 2, 1000, 16)
    samples = x.astype("<i2").tobytes()
    good = riff([fmt, chunk(b"data", samples)])
    blob = bytearray(riff([fmt, chunk(b"data", b"", size=data_size)]) + samples)
    blob[4:8] = struct.pack("<I", 0)
    with pytest.raises(CorruptInputError) as err:
        open_recording(_write(tmp_path / "open.wav", bytes(blob)))
    msg = str(err.value)
    riff_size = struct.unpack("<I", good[4:8])[0]
    assert "rewrite its header with the real sizes" in msg and f"RIFF size {riff_size} at byte 4" in msg, msg
    assert "recorder that stopped" in msg and "the header is damaged" not in msg, msg


def test_zero_data_size_followed_by_a_chunk_is_an_empty_recording(tmp_path):
    # A data chunk that really is empty, with a LIST chunk after it: no sizes to rewrite.
    path = _write(tmp_path / "empty.wav", riff([fmt_chunk(PCM, 2, 1000, 16), chunk(b"data", b""),
                                                chunk(b"LIST", b"INFOISFT" + struct.pack("<I", 4) + b"abc\0")]))
    with pytest.raises(CorruptInputError, match="holds no whole frame .*the recording is empty"):
        open_recording(path)


@pytest.mark.parametrize(
    ("tag", "label"), [(MULAW, r"0x0007 \(mu-law\)"), (ALAW, r"0x0006 \(A-law\)"), (ADPCM, r"0x0002 .*ADPCM")]
)
def test_compressed_encodings_are_refused_by_tag(tmp_path, tag, label):
    # Non-PCM fmt chunks carry cbSize and a fact chunk (Microsoft RIFF/WAVE); scipy.io.wavfile
    # refuses these encodings too.
    blob = riff([fmt_chunk(tag, 1, 8000, 8), chunk(b"fact", struct.pack("<I", 8)), chunk(b"data", bytes(8))])
    path = _write(tmp_path / "enc.wav", blob)
    with pytest.raises(ValueError):
        wavfile.read(path)
    with pytest.raises(UnsupportedFormatError, match=label) as err:
        open_recording(path)
    assert str(path) in str(err.value)


def test_zero_frames_refused(tmp_path):
    path = tmp_path / "empty.wav"
    wavfile.write(path, 8000, np.zeros((0, 2), np.int16))  # a valid but empty file (scipy)
    with pytest.raises(CorruptInputError, match="no whole frame"):
        open_recording(path)


def _pcm16(n: int = 10, ch: int = 1) -> bytes:
    return bytes(2 * n * ch)


@pytest.mark.parametrize(
    ("blob", "pattern"),
    [
        (riff([fmt_chunk(PCM, 2, 8000, 16, block_align=3), chunk(b"data", _pcm16(4, 2))]), r"block_align 3 at byte 32"),
        (riff([chunk(b"data", _pcm16())]), r"no 'fmt ' chunk"),
        (riff([fmt_chunk(PCM, 1, 8000, 16)]), r"no 'data' chunk"),
        (riff([fmt_chunk(PCM, 1, 8000, 16), chunk(b"data", _pcm16())], riff_size=30), r"RIFF size at byte 4"),
        (riff([fmt_chunk(PCM, 1, 8000, 16), chunk(b"data", _pcm16())], riff_size=2), r"RIFF size at byte 4 is 2"),
        (riff([fmt_chunk(PCM, 0, 8000, 16, block_align=0), chunk(b"data", _pcm16())]), r"0 channels at byte 22"),
        (riff([fmt_chunk(PCM, 1, 0, 16), chunk(b"data", _pcm16())]), r"sample rate 0 at byte 24"),
        (riff([chunk(b"fmt ", bytes(12)), chunk(b"data", _pcm16())]), r"fmt chunk at byte 12 is 12 bytes"),
        (riff([chunk(b"LIST", b"x" * 8, size=1000), fmt_chunk(PCM, 1, 8000, 16)]), r"'LIST' at byte 12 claims 1000"),
        (b"RF64" + b"\xff" * 4 + b"WAVE" + fmt_chunk(PCM, 1, 8000, 16), r"'ds64' chunk at byte 12"),
    ],
    ids=["block_align", "no-fmt", "no-data", "riff-too-small", "riff-size-2", "channels-0", "rate-0",
         "short-fmt", "chunk-past-end", "rf64-no-ds64"],
)
def test_damaged_headers_name_file_and_byte(tmp_path, blob, pattern):
    # Field offsets of the canonical 44-byte header (Microsoft RIFF/WAVE): fmt body at 20,
    # nChannels 22, nSamplesPerSec 24, nBlockAlign 32.
    path = _write(tmp_path / "bad.wav", blob)
    with pytest.raises(CorruptInputError, match=pattern) as err:
        open_recording(path)
    assert str(path) in str(err.value)


def test_not_a_wave_file(tmp_path):
    path = _write(tmp_path / "text.wav", b"hello, this is not audio at all")
    with pytest.raises(UnsupportedFormatError, match="not a WAVE file"):
        open_recording(path)
    path = _write(tmp_path / "avi.wav", b"RIFF" + struct.pack("<I", 4) + b"AVI ")
    with pytest.raises(UnsupportedFormatError, match="'AVI '"):
        open_recording(path)


@pytest.mark.parametrize(
    ("date", "time", "tref", "expected"),
    [
        # EBU Tech 3285: TimeReference = samples since midnight (here 1 h 0.5 s at 8 kHz).
        ("2021-03-04", "09:10:11", 3600 * 8000 + 4000, dt.datetime(2021, 3, 4, 1, 0, 0, 500000, tzinfo=UTC)),
        # TimeReference 0: OriginationDate + OriginationTime.
        ("2021:03:04", "12:34:56", 0, dt.datetime(2021, 3, 4, 12, 34, 56, tzinfo=UTC)),
    ],
)
def test_bext_start_time(tmp_path, date, time, tref, expected):
    blob = riff([bext_chunk(date, time, tref), fmt_chunk(PCM, 1, 8000, 16), chunk(b"data", _pcm16())])
    with open_recording(_write(tmp_path / "bwf.wav", blob)) as rec:
        assert rec.info.start_time == expected


def test_bad_bext_date_warns_and_leaves_start_unknown(tmp_path):
    blob = riff([bext_chunk("2021-13-45", "99:99:99", 0), fmt_chunk(PCM, 1, 8000, 16), chunk(b"data", _pcm16())])
    with open_recording(_write(tmp_path / "bwf.wav", blob)) as rec:
        assert rec.info.start_time is None
        assert any("bext" in w for w in rec.info.warnings)


def test_plain_wav_has_no_start_time(tmp_path):
    path = tmp_path / "plain.wav"
    wavfile.write(path, 100, np.zeros(10, np.int16))
    assert open_recording(path).info.start_time is None


def test_windows_out_of_range_name_file_and_range(tmp_path):
    path = tmp_path / "w.wav"
    wavfile.write(path, 100, np.zeros((10, 2), np.int16))
    with open_recording(path) as rec:
        for a, b in [(-1, 3), (0, 11), (5, 4), (11, 11)]:
            with pytest.raises(InputError, match=rf"\[{a}, {b}\)") as err:
                rec.read(a, b)
            assert str(path) in str(err.value)
        with pytest.raises(InputError):
            rec.read(0.5, 2)  # type: ignore[arg-type]
        assert rec.read(np.int64(2), np.int64(4)).shape == (2, 2)
    with pytest.raises(InputError, match="closed"):
        rec.read(0, 1)


def test_concurrent_windows_from_threads(tmp_path):
    # Reads use positional I/O, so threads sharing one recording never see each other's
    # file position. Reference: scipy.io.wavfile.read of the same file.
    from concurrent.futures import ThreadPoolExecutor

    path = tmp_path / "t.wav"
    wavfile.write(path, 1000, _ints("int32", (20_000, 3)))
    ref = wavfile.read(path)[1] / 2.0**31
    starts = RNG.integers(0, 19_000, 64)
    with open_recording(path) as rec, ThreadPoolExecutor(8) as pool:
        blocks = list(pool.map(lambda a: rec.read(int(a), int(a) + 997), starts))
    for a, y in zip(starts, blocks):
        assert np.array_equal(y, ref[a : a + 997])


def test_wav_options_checked(tmp_path):
    path = tmp_path / "w.wav"
    wavfile.write(path, 100, np.zeros((10, 2), np.int16))
    with pytest.raises(ConfigError, match="'array'"):
        open_recording(path, options={"array": "x"})
    with pytest.raises(ConfigError, match="truncated"):
        open_recording(path, options={"truncated": "maybe"})
    with pytest.raises(ConfigError, match="100 Hz .* 200 Hz"):
        open_recording(path, options={"sample_rate_hz": 200})
    assert open_recording(path, options={"sample_rate_hz": 100.0}).info.sample_rate_hz == 100.0


# ----------------------------------------------------------------------------- memory


def _peak_bytes(fn):
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        result = fn()
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_window_of_large_24_bit_wav_allocates_about_the_window(tmp_path):
    ch, frames = 2, 200 * 2**20 // 6  # ~200 MiB of packed 24-bit stereo, written sparse
    fmt = fmt_chunk(PCM, ch, 48000, 24)
    header = riff([fmt, b"data" + struct.pack("<I", frames * 6)], riff_size=4 + len(fmt) + 8 + frames * 6)
    path = tmp_path / "big24.wav"
    start, n = 12_345_677, 100_000
    v = RNG.integers(-(2**23), 2**23, size=(n, ch))
    with open(path, "wb") as f:
        f.write(header)
        f.truncate(len(header) + frames * 6)
        f.seek(len(header) + start * 6)
        f.write(pack_int24(v))
    size = path.stat().st_size

    def work():
        with open_recording(path) as rec:
            return rec.read(start, start + n)

    y, peak = _peak_bytes(work)
    assert np.array_equal(y, v / 2.0**23)
    window_out = n * ch * 8  # the float64 result itself
    assert peak < 3 * window_out and peak < size / 50, (peak, size)


def test_window_of_large_npy_allocates_about_the_window(tmp_path):
    path = tmp_path / "big.npy"
    frames, ch = 200 * 2**20 // 8, 4  # ~200 MiB of int16
    mm = np.lib.format.open_memmap(path, mode="w+", dtype="<i2", shape=(frames, ch))
    start, n = 20_000_001, 50_000
    v = _ints("int16", (n, ch))
    mm[start : start + n] = v
    mm.flush()
    del mm
    size = path.stat().st_size

    def work():
        with open_recording(path) as rec:
            return rec.read(start, start + n)

    y, peak = _peak_bytes(work)
    assert np.array_equal(y, v / 32768.0)
    window_out = n * ch * 8  # the float64 result itself
    assert peak < 3 * window_out and peak < size / 50, (peak, size)


# ----------------------------------------------------------------------------- NPY


@pytest.mark.parametrize(
    "make",
    [
        lambda: _ints("int16", (1000, 3)),
        lambda: _ints("uint8", (1000,)),
        lambda: _ints("int32", (1000, 2)).astype(">i4"),
        lambda: RNG.normal(0, 3, (1000, 2)).astype("float32"),
        lambda: RNG.normal(0, 3, (1000, 4)),
        lambda: np.asfortranarray(_ints("int16", (1000, 3))),
        lambda: RNG.normal(0, 1, (1000, 2)).astype("float16"),
    ],
    ids=["int16-2d", "uint8-1d", "int32-bigendian", "float32", "float64", "fortran-order", "float16"],
)
def test_npy_round_trips(tmp_path, make):
    # Reference: np.save writes, np.load reads; scaling is the documented common practice.
    x = make()
    path = tmp_path / "a.npy"
    np.save(path, x)
    ref = np.load(path)
    ref2 = ref.reshape(len(ref), -1)
    with open_recording(path, options={"sample_rate_hz": 250.0}) as rec:
        assert (rec.info.frames, rec.info.channels) == ref2.shape
        assert rec.info.sample_rate_hz == 250.0
        assert rec.info.sample_format == ref.dtype.name
        for a, b in _windows(len(ref)):
            assert np.array_equal(rec.read(a, b), _scaled(ref2[a:b]))


def test_npy_rate_unknown_without_option_and_shapes_refused(tmp_path):
    np.save(tmp_path / "a.npy", np.zeros((5, 2), np.int16))
    assert open_recording(tmp_path / "a.npy").info.sample_rate_hz is None
    np.save(tmp_path / "b.npy", np.zeros((5, 2, 2), np.int16))
    with pytest.raises(UnsupportedFormatError, match=r"shape \(5, 2, 2\)"):
        open_recording(tmp_path / "b.npy")
    np.save(tmp_path / "c.npy", np.zeros(4, np.complex64))
    with pytest.raises(UnsupportedFormatError, match="not supported"):
        open_recording(tmp_path / "c.npy")
    np.save(tmp_path / "d.npy", np.zeros((0, 3), np.float32))
    with pytest.raises(CorruptInputError, match="no frames"):
        open_recording(tmp_path / "d.npy")


def test_npy_truncated(tmp_path):
    x = _ints("int16", (100, 2))
    buf = io.BytesIO()
    np.save(buf, x)
    blob = buf.getvalue()
    path = _write(tmp_path / "t.npy", blob[: len(blob) - 4 * 30 - 1])
    with pytest.raises(CorruptInputError, match='claims 100 frames.*truncated="warn"'):
        open_recording(path)
    with open_recording(path, options={"truncated": "warn"}) as rec:
        assert rec.info.frames == 69 and rec.info.warnings
        assert np.array_equal(rec.read(0, 69), x[:69] / 32768.0)


@pytest.mark.parametrize(("old", "new", "said"), [
    (b"{'descr'", b"{garbage", "is damaged at byte 11: 'garbage' is not a literal value; it must be the Python dict "
                               "literal numpy writes"),
    (b"(100, 2)", b"f(100,2)", "is damaged at byte {at}: 'f(100,2)' is not a literal value"),
    (b"'descr'", b"'dxscr'", "is damaged: Header does not contain the correct keys"),
])
def test_a_damaged_npy_header_names_the_byte_and_the_fault(tmp_path, old, new, said):
    # NPY format (numpy.lib.format, version 1.0): 6 magic bytes, 2 version bytes, the header
    # length as little-endian uint16 at byte 8, then the header text from byte 10: a Python
    # dict literal of 'descr', 'fortran_order' and 'shape' (np.save writes it).
    buf = io.BytesIO()
    np.save(buf, _ints("int16", (100, 2)))
    blob = buf.getvalue()
    assert blob[6:8] == b"\x01\x00" and len(old) == len(new)
    n = int.from_bytes(blob[8:10], "little")
    path = _write(tmp_path / "h.npy", blob.replace(old, new, 1))
    with pytest.raises(CorruptInputError) as err:
        open_recording(path, options={"sample_rate_hz": 1.0})
    msg = str(err.value)
    assert msg.startswith(f"{path}: the NPY header ({n} bytes of text from byte 10) ")
    assert said.format(at=blob.find(old)) in msg and "<ast." not in msg, msg


def test_an_npy_header_cut_short_says_where_the_file_ends(tmp_path):
    buf = io.BytesIO()
    np.save(buf, _ints("int16", (100, 2)))
    blob = buf.getvalue()
    n = int.from_bytes(blob[8:10], "little")  # header length, numpy.lib.format version 1.0
    path = _write(tmp_path / "cut.npy", blob[:40])
    with pytest.raises(CorruptInputError) as err:
        open_recording(path, options={"sample_rate_hz": 1.0})
    assert str(err.value) == f"{path}: the NPY header ({n} bytes of text from byte 10) is cut short: the file ends at byte 40"


class _CyclicWithFinalizer:
    """Garbage whose collection runs Python code (a finalizer), where threads can switch."""

    def __del__(self) -> None:
        total = 0
        for i in range(50):
            total += i


def test_npy_headers_parsed_on_many_threads_at_once(tmp_path):
    # The archive scan and the block reads open NPY files on several threads. numpy parses
    # the header with ast.literal_eval, and CPython 3.11's AST constructor shares its
    # recursion-depth count between threads: concurrent parses can fail with "SystemError:
    # AST constructor recursion depth mismatch" (python/cpython#106905), which made a sound
    # file look damaged. Threads switching as often as possible and garbage whose collection
    # runs Python code make the parses interleave. Reference: np.load of the same file.
    import threading

    from twinpass.io.readers import npy

    x = RNG.normal(0, 1, (50, 3)).astype("float32")
    path = tmp_path / "h.npy"
    np.save(path, x)
    ref = np.load(path)
    errors: list[str] = []
    wrong: list[int] = []

    def opener() -> None:
        for _ in range(1500):
            junk: list = [_CyclicWithFinalizer() for _ in range(3)]
            junk.append(junk)
            del junk
            npy._parse_header.cache_clear()  # numpy parses the header at every open
            try:
                with open_recording(path, options={"sample_rate_hz": 100.0}) as rec:
                    if not np.array_equal(rec.read(0, 50), ref):
                        wrong.append(1)
            except Exception as exc:
                errors.append(f"{type(exc).__name__}: {exc}")

    before = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        threads = [threading.Thread(target=opener) for _ in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        sys.setswitchinterval(before)
    assert errors == [] and wrong == [], errors[:3]


def test_npy_header_parse_tried_again_after_the_spurious_ast_error(tmp_path, monkeypatch):
    # Another library's thread may still use the AST constructor during a parse; the
    # reader tries again (injected fault: the first parse raises CPython's message).
    # Reference: np.load of the same file.
    import numpy.lib.format as npformat

    from twinpass.io.readers import npy

    path = tmp_path / "r.npy"
    np.save(path, _ints("int16", (40, 2)))
    npy._parse_header.cache_clear()  # parsed headers are kept by their bytes
    real = npformat.read_array_header_1_0
    calls: list[int] = []

    def flaky(fh, *args, **kwargs):
        calls.append(1)
        if len(calls) == 1:
            fh.read(5)  # a partial read before the failure: the retry must start over
            raise SystemError("AST constructor recursion depth mismatch (before=24, after=21)")
        return real(fh, *args, **kwargs)

    monkeypatch.setattr(npformat, "read_array_header_1_0", flaky)
    with open_recording(path) as rec:
        assert np.array_equal(rec.read(0, 40), np.load(path) / 32768.0)
    assert len(calls) == 2

    def always(fh, *args, **kwargs):  # injected fault: another SystemError is not retried
        calls.append(1)
        raise SystemError("something else")

    monkeypatch.setattr(npformat, "read_array_header_1_0", always)
    npy._parse_header.cache_clear()
    calls.clear()
    with pytest.raises(CorruptInputError, match="NPY header .*is damaged: something else"):
        open_recording(path)
    assert len(calls) == 1


def test_npy_files_with_equal_headers_are_parsed_once(tmp_path, monkeypatch):
    # Files of one archive mostly share their header (same shape and dtype); it is parsed
    # once by its bytes, and each file still reads its own samples. A header differing in
    # one byte (another length) is parsed anew. Reference: np.load of each file.
    import numpy.lib.format as npformat

    from twinpass.io.readers import npy

    real = npformat.read_array_header_1_0
    parses: list[int] = []

    def counted(fh, *args, **kwargs):  # a spy: numpy's own parse, counted
        parses.append(1)
        return real(fh, *args, **kwargs)

    monkeypatch.setattr(npformat, "read_array_header_1_0", counted)
    npy._parse_header.cache_clear()
    paths = []
    for i in range(6):
        paths.append(tmp_path / f"f{i}.npy")
        np.save(paths[-1], RNG.normal(0, 1, (30 if i < 5 else 31, 2)).astype("float32"))
    for path in paths + paths:
        with open_recording(path) as rec:
            assert np.array_equal(rec.read(0, rec.info.frames), np.load(path))
    assert len(parses) == 2


# ----------------------------------------------------------------------------- raw


def _raw_case(tmp_path: Path, data: bytes, sidecar: dict, name: str = "rec.bin", fmt: str = "toml") -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    side = Path(str(path) + "." + fmt)
    if fmt == "json":
        side.write_text(json.dumps(sidecar))
    else:
        side.write_text("".join(f"{k} = {json.dumps(v)}\n" for k, v in sidecar.items()))
    return path


@pytest.mark.parametrize("byte_order", ["little", "big"])
@pytest.mark.parametrize("dtype", ["int16", "int24", "int32", "uint16", "float32", "float64"])
def test_raw_round_trips(tmp_path, byte_order, dtype):
    # Reference: numpy's byte-order conversion (astype('<i2'/'>i2')...) and a byte-by-byte
    # packing of 24-bit values; y = x_scaled * gain + offset.
    n, ch, header, gain, offset = 400, 3, 17, 2.5, -0.25
    if dtype == "int24":
        x = RNG.integers(-(2**23), 2**23, size=(n, ch))
        payload, scaled = pack_int24(x, byte_order), x / 2.0**23
    else:
        x = _ints(dtype, (n, ch)) if dtype[0] in "iu" else RNG.normal(0, 1, (n, ch)).astype(dtype)
        payload, scaled = x.astype(np.dtype(dtype).newbyteorder("<" if byte_order == "little" else ">")).tobytes(), _scaled(x)
    side = {
        "dtype": dtype, "byte_order": byte_order, "channels": ch, "sample_rate_hz": 512.0,
        "header_bytes": header, "gain": gain, "offset": offset, "frames": n,
        "start_time": "2023-06-01T10:00:00+02:00",
    }
    path = _raw_case(tmp_path, os.urandom(header) + payload, side, fmt="json" if byte_order == "big" else "toml")
    with open_recording(path) as rec:
        assert (rec.info.frames, rec.info.channels, rec.info.sample_rate_hz) == (n, ch, 512.0)
        assert rec.info.start_time == dt.datetime(2023, 6, 1, 8, 0, tzinfo=UTC)
        assert rec.info.sample_format == dtype
        for a, b in _windows(n):
            assert np.allclose(rec.read(a, b), scaled[a:b] * gain + offset, rtol=0, atol=1e-12)


def test_raw_gain_applies_to_full_scale_not_to_counts_as_the_readme_works_it(tmp_path):
    # The README's worked example: int16 counts of 0.5 mV each need gain = 0.0005 * 32768 =
    # 16.384 (the reader scales counts to full scale, count / 2**15, before the gain).
    counts = _ints("int16", (200, 2))
    path = _raw_case(tmp_path, counts.astype("<i2").tobytes(),
                     {"dtype": "int16", "channels": 2, "sample_rate_hz": 100.0, "gain": 0.0005 * 32768})
    with open_recording(path) as rec:
        np.testing.assert_allclose(rec.read(0, 200), counts * 0.0005, rtol=1e-15, atol=0)


def test_raw_sidecar_with_suffix_replaced_and_explicit(tmp_path):
    x = _ints("int16", (50, 2))
    (tmp_path / "r.dat").write_bytes(x.astype("<i2").tobytes())
    (tmp_path / "r.json").write_text(json.dumps({"dtype": "int16", "channels": 2}))
    with open_recording(tmp_path / "r.dat", options={"sample_rate_hz": 10}) as rec:
        assert rec.info.sample_rate_hz == 10.0 and rec.info.extra["sidecar"] == str(tmp_path / "r.json")
        assert np.array_equal(rec.read(0, 50), x / 32768.0)
    other = tmp_path / "elsewhere.toml"
    other.write_text('dtype = "int16"\nchannels = 1\n')
    with open_recording(tmp_path / "r.dat", options={"sidecar": str(other)}) as rec:
        assert rec.info.channels == 1 and rec.info.frames == 100


@pytest.mark.parametrize(
    ("data_len", "side", "pattern"),
    [
        (40, {"dtype": "int16", "channels": 2, "colour": "red"}, r"unknown key\(s\) 'colour'"),
        (42, {"dtype": "int16", "channels": 4}, r"42 data bytes .* not a whole number of 8-byte frames"),
        (40, {"dtype": "int16", "channels": 2, "frames": 11}, r"declares frames = 11 .* holds 10 frames"),
        (40, {"dtype": "int16", "channels": 2, "header_bytes": 41}, r"fewer than header_bytes = 41"),
        (40, {"dtype": "int16"}, r"channels is missing"),
        (40, {"dtype": "int12", "channels": 1}, r"not a numpy dtype name"),
        (40, {"dtype": "<i2", "channels": 1, "byte_order": "big"}, r"little-endian but byte_order is 'big'"),
        (40, {"dtype": "int16", "channels": 1, "byte_order": "middle"}, r"byte_order must be"),
        (40, {"dtype": "int16", "channels": 1, "start_time": "yesterday"}, r"ISO 8601"),
        (40, {"dtype": "int16", "channels": 1, "sample_rate_hz": -5}, r"positive"),
        (0, {"dtype": "int16", "channels": 1}, r"no frames"),
    ],
)
def test_raw_sidecar_problems_name_both_files(tmp_path, data_len, side, pattern):
    path = _raw_case(tmp_path, bytes(data_len), side)
    with pytest.raises(CorruptInputError, match=pattern) as err:
        open_recording(path)
    assert str(path) in str(err.value) and err.value.path == str(path)
    if "unknown" in pattern or "frames" in pattern:
        assert str(path) + ".toml" in str(err.value)
    if pattern != "no frames":  # the fix is in the sidecar: the remedy, the message's last clause, names it
        assert f"its sidecar {path}.toml" in err.value.remedy and str(err.value).endswith(f"; {err.value.remedy}")


@pytest.mark.parametrize(("start", "said"), [
    ("0001-01-01T00:00:00+05:00", "is before year 1 in UTC"),
    ("9999-12-31T23:00:00-05:00", "is after year 9999 in UTC"),
    ("0000-01-01T00:00:00", "is in year 0"),
])
def test_a_start_time_outside_years_1_to_9999_is_refused_as_out_of_range(tmp_path, start, said):
    # Python's datetime holds the years datetime.MINYEAR = 1 to MAXYEAR = 9999; midnight of
    # 1 January of year 1 at +05:00 is 19:00 of 31 December of year 0 in UTC (ISO 8601 offsets).
    assert (dt.MINYEAR, dt.MAXYEAR) == (1, 9999)
    x = _ints("int16", (20, 1)).astype("<i2").tobytes()
    path = _raw_case(tmp_path, x, {"dtype": "int16", "channels": 1, "sample_rate_hz": 10.0, "start_time": start})
    arr = zarr.create_array(store=str(tmp_path / "a.zarr"), shape=(20,), dtype="int16")
    arr.attrs.update(sample_rate_hz=10.0, start_time=start)
    for p in (path, tmp_path / "a.zarr"):
        with pytest.raises(CorruptInputError) as err:
            open_recording(p)
        assert f"start_time {start!r} {said}, outside the times twinpass can hold (years 1 to 9999)" in str(err.value)
        assert "ISO 8601" not in str(err.value)


@pytest.mark.parametrize("fmt", ["toml", "json"])
def test_raw_sidecar_starting_with_a_byte_order_mark_is_read(tmp_path, fmt):
    # Some editors start UTF-8 text with the byte-order mark EF BB BF (U+FEFF, the Unicode
    # standard's "UTF-8 signature"); Python's "utf-8-sig" codec skips it, and so does the reader.
    x = _ints("int16", (50, 2))
    path = _raw_case(tmp_path, x.astype("<i2").tobytes(), {"dtype": "int16", "channels": 2, "sample_rate_hz": 10.0},
                     fmt=fmt)
    side = Path(f"{path}.{fmt}")
    side.write_bytes(b"\xef\xbb\xbf" + side.read_bytes())
    with open_recording(path) as rec:
        assert (rec.info.channels, rec.info.frames, rec.info.sample_rate_hz) == (2, 50, 10.0)
        assert np.array_equal(rec.read(0, 50), x / 32768.0)


def test_raw_missing_or_ambiguous_sidecar(tmp_path):
    path = tmp_path / "lone.raw"
    path.write_bytes(bytes(8))
    with pytest.raises(CorruptInputError) as err:
        open_recording(path)
    assert str(path) in str(err.value) and str(path) + ".toml" in str(err.value)
    assert "\n" not in str(err.value)  # one line, as status lines and logs show it
    assert err.value.remedy == (f'write its sidecar {path}.toml, one key per line, e.g. dtype = "int16", '
                                "channels = 2, sample_rate_hz = 1000.0")
    (tmp_path / "lone.raw.toml").write_text('dtype = "int16"\nchannels = 1\n')
    (tmp_path / "lone.json").write_text('{"dtype": "int16", "channels": 1}')
    with pytest.raises(CorruptInputError, match="several sidecars"):
        open_recording(path)
    (tmp_path / "lone.json").write_text("{not json")
    (tmp_path / "lone.raw.toml").unlink()
    with pytest.raises(CorruptInputError, match="cannot be parsed"):
        open_recording(path)


# ----------------------------------------------------------------------------- Zarr


def test_zarr_2d_with_attributes(tmp_path):
    # Reference: zarr-python writes the array; reads are compared with what it stores.
    x = _ints("int16", (1000, 3))
    store = tmp_path / "in.zarr"
    a = zarr.create_array(store, shape=x.shape, chunks=(128, 3), dtype="int16")
    a[:] = x
    a.attrs.update({"sample_rate_hz": 200.0, "start_time": "2022-01-02T03:04:05Z"})
    with open_recording(store) as rec:
        assert (rec.info.frames, rec.info.channels, rec.info.sample_rate_hz) == (1000, 3, 200.0)
        assert rec.info.start_time == dt.datetime(2022, 1, 2, 3, 4, 5, tzinfo=UTC)
        for a_, b_ in _windows(1000):
            assert np.array_equal(rec.read(a_, b_), x[a_:b_] / 32768.0)


def test_damaged_zarr_chunks_are_named_by_key_and_frames(tmp_path):
    # Chunk keys as zarr-python stores them: format 3 "c/<row>/<col>" (default chunk key
    # encoding), format 2 "<row>" for a 1-D array. A chunk file overwritten with bytes that no
    # codec decodes must be named, not the whole window read.
    x = RNG.normal(0, 0.3, (12000, 2)).astype("float32")
    store = tmp_path / "v3.zarr"
    zarr.create_array(store, shape=x.shape, chunks=(1000, 1), dtype="float32", zarr_format=3)[:] = x
    for key in ("c/5/1", "c/7/0"):
        (store / key).write_bytes(b"not a zstd frame")
    with open_recording(store, options={"sample_rate_hz": 100}) as rec:
        assert np.array_equal(rec.read(0, 5000), x[:5000].astype(np.float64))  # the rest reads
        with pytest.raises(CorruptInputError) as err:
            rec.read(2500, 12000)
    msg = str(err.value)
    assert f"{store}: frames [2500, 12000) cannot be read: chunks c/5/1 (frames 5000-6000), " in msg, msg
    assert "c/7/0 (frames 7000-8000) of the store are damaged" in msg and "c/6/" not in msg, msg

    v2 = tmp_path / "v2.zarr"
    zarr.create_array(v2, shape=(3000,), chunks=(999,), dtype="int16", zarr_format=2)[:] = np.arange(3000)
    (v2 / "1").write_bytes(b"garbage")
    with open_recording(v2, options={"sample_rate_hz": 100}) as rec, pytest.raises(CorruptInputError) as err:
        rec.read(0, 3000)
    assert "frames [0, 3000) cannot be read: chunk 1 (frames 999-1998) of the store is damaged (" in str(err.value)


def test_zarr_array_inside_group(tmp_path):
    x = RNG.normal(0, 1, 500).astype("float32")
    store = tmp_path / "g.zarr"
    g = zarr.open_group(store, mode="w")
    arr = g.create_array("site/ch1", shape=x.shape, chunks=(64,), dtype="float32")
    arr[:] = x
    g.create_array("other", shape=(4,), chunks=(4,), dtype="int16")
    with open_recording(f"{store}#site/ch1", options={"sample_rate_hz": 50}) as rec:
        assert rec.info.channels == 1 and rec.info.sample_rate_hz == 50.0
        assert np.array_equal(rec.read(3, 470), x[3:470, None].astype(np.float64))
        assert rec.spec.path == str(store) and dict(rec.spec.options)["array"] == "site/ch1"
    with open_recording(store, options={"array": "site/ch1"}) as rec:
        assert rec.info.frames == 500 and rec.info.sample_rate_hz is None
    with pytest.raises(InputError, match="is a group.*site/ch1"):
        open_recording(store)
    with pytest.raises(InputError, match="no Zarr array"):
        open_recording(f"{store}#nothing/here")
    with pytest.raises(InputError, match="no such Zarr store"):
        open_recording(tmp_path / "missing.zarr")


@pytest.mark.parametrize(("fmt", "meta"), [(3, "zarr.json"), (2, ".zarray")])
def test_damaged_zarr_metadata_is_named(tmp_path, fmt, meta):
    # Zarr format 3 keeps an array's metadata in zarr.json, format 2 in .zarray (the Zarr
    # specifications; zarr-python writes them below); JSON text cut short does not parse.
    store = tmp_path / "a.zarr"
    zarr.create_array(store, shape=(20,), dtype="float32", zarr_format=fmt)[:] = 1.0
    blob = (store / meta).read_bytes()
    (store / meta).write_bytes(blob[: len(blob) // 2])
    with pytest.raises(CorruptInputError) as err:
        open_recording(store, options={"sample_rate_hz": 10})
    assert str(err.value).startswith(f"{store}: its metadata file {store / meta} is damaged (JSONDecodeError: ")
    assert err.value.remedy == f"restore {store / meta} from a copy, or re-export the array"
    assert str(err.value).endswith(f"; {err.value.remedy}")


def test_a_zarr_folder_without_metadata_says_so(tmp_path):
    (tmp_path / "empty.zarr").mkdir()
    with pytest.raises(InputError) as err:
        open_recording(tmp_path / "empty.zarr")
    assert str(err.value).endswith(f"; the folder {tmp_path / 'empty.zarr'} holds no zarr.json (nor .zarray, "
                                   "for Zarr format 2)")


# ----------------------------------------------------------------------------- specs, read-only


def _all_formats(folder: Path) -> dict[str, tuple[str, dict, np.ndarray]]:
    """One small recording per built-in format; returns path, options and expected floats."""
    x = _ints("int16", (40, 2))
    expected = x / 32768.0
    wavfile.write(folder / "a.wav", 100, x)
    np.save(folder / "a.npy", x)
    (folder / "a.raw").write_bytes(x.astype(">i2").tobytes())
    (folder / "a.raw.toml").write_text('dtype = "int16"\nbyte_order = "big"\nchannels = 2\n')
    z = zarr.create_array(folder / "a.zarr", shape=x.shape, chunks=(16, 2), dtype="int16")
    z[:] = x
    return {
        "wav": (str(folder / "a.wav"), {}, expected),
        "npy": (str(folder / "a.npy"), {"sample_rate_hz": 100}, expected),
        "raw": (str(folder / "a.raw"), {"sample_rate_hz": 100}, expected),
        "zarr": (str(folder / "a.zarr"), {"sample_rate_hz": 100}, expected),
    }


def test_spec_pickles_and_reopens_in_another_process(tmp_path, monkeypatch):
    data = tmp_path / "data"
    data.mkdir()
    monkeypatch.chdir(data)
    cases = _all_formats(data)
    specs = {}
    for name, (path, opts, expected) in cases.items():
        rec = open_recording(os.path.basename(path), options=opts)  # relative on purpose
        assert rec.spec.format == name and os.path.isabs(rec.spec.path)
        specs[name] = pickle.loads(pickle.dumps(rec.spec))
        again = pickle.loads(pickle.dumps(rec))  # a Recording travels as its spec
        assert np.array_equal(again.read(3, 17), expected[3:17])
    (tmp_path / "specs.pkl").write_bytes(pickle.dumps(specs))
    script = textwrap.dedent(
        """
        import pickle, sys
        import numpy as np
        specs = pickle.load(open(sys.argv[1], "rb"))
        out = {}
        for name, spec in specs.items():
            with spec.open() as rec:
                out[name] = rec.read(3, 17)
        np.savez(sys.argv[2], **out)
        """
    )
    subprocess.run(
        [sys.executable, "-c", script, str(tmp_path / "specs.pkl"), str(tmp_path / "out.npz")],
        cwd="/", check=True, timeout=120,
    )
    out = np.load(tmp_path / "out.npz")
    for name, (_, _, expected) in cases.items():
        assert np.array_equal(out[name], expected[3:17]), name


def _open_fds_for(path: str) -> list[int]:
    fds = []
    for fd in os.listdir("/proc/self/fd"):
        try:
            if os.readlink(f"/proc/self/fd/{fd}") == path:
                fds.append(int(fd))
        except OSError:
            continue
    return fds


_READ_ALL = """
import sys
from twinpass.io.readers import open_recording
for path, opts in {cases!r}:
    with open_recording(path, options=opts) as rec:
        assert rec.read(0, rec.info.frames).shape == (40, 2)
print("ok")
"""


def test_inputs_open_read_only(tmp_path):
    folder = Path(tempfile.mkdtemp(prefix="twinpass-ro-"))
    try:
        cases = _all_formats(folder)
        before = {p: sha256(p) for p in folder.rglob("*") if p.is_file()}
        for p in folder.rglob("*"):
            p.chmod(0o444 if p.is_file() else 0o555)
        folder.chmod(0o555)
        for name, (path, opts, expected) in cases.items():
            with open_recording(path, options=opts) as rec:
                assert np.array_equal(rec.read(0, 40), expected)
                if name != "zarr" and os.path.isdir("/proc/self/fdinfo"):
                    fds = _open_fds_for(path)
                    assert fds, name
                    for fd in fds:  # POSIX open(2) access mode: O_RDONLY == 0
                        flags = int(Path(f"/proc/self/fdinfo/{fd}").read_text().split("flags:")[1].split()[0], 8)
                        assert flags & os.O_ACCMODE == os.O_RDONLY
        if os.geteuid() == 0 and shutil.which("setpriv"):
            # root ignores file modes; drop the capabilities that let it, then read again
            code = _READ_ALL.format(cases=[(p, o) for p, o, _ in cases.values()])
            res = subprocess.run(
                ["setpriv", "--bounding-set", "-dac_override,-dac_read_search", sys.executable, "-c", code],
                capture_output=True, text=True, timeout=120, cwd=folder,
            )
            assert res.returncode == 0 and "ok" in res.stdout, res.stderr[-2000:]
        assert {p: sha256(p) for p in folder.rglob("*") if p.is_file()} == before
    finally:
        for p in [folder, *folder.rglob("*")]:
            if p.is_dir():
                p.chmod(stat.S_IRWXU)
        shutil.rmtree(folder)


# ----------------------------------------------------------------------------- registry


def test_registry_built_ins_and_lookup(tmp_path):
    assert available_readers()[:4] == ["wav", "npy", "raw", "zarr"]
    assert get_reader("WAV").name == "wav"
    assert reader_for("x/y/rec.WAV").name == "wav"
    assert reader_for("rec.npy").name == "npy"
    assert reader_for("rec.bin").name == "raw"
    assert reader_for("store.zarr#a/b").name == "zarr"
    assert reader_for("rec.whatever", hint="raw").name == "raw"
    with pytest.raises(UnsupportedFormatError) as err:
        reader_for("rec.xyz")
    msg = str(err.value)
    assert "rec.xyz" in msg and "wav (.wav" in msg and ENTRY_POINT_GROUP in msg and "format=" in msg
    with pytest.raises(UnsupportedFormatError, match="no reader named 'nope'.*wav"):
        get_reader("nope")
    with pytest.raises(ConfigError, match="already registered"):
        register_reader(WavReader)
    with pytest.raises(ConfigError, match="not a twinpass"):
        register_reader(object())  # type: ignore[arg-type]
    spec = ReaderSpec.create("wav", "/x.wav", {"b": 1, "a": 2})
    assert spec.options == (("a", 2), ("b", 1))


_PLUGIN = '''
import numpy as np
from twinpass.io.readers import Reader, ReaderSpec, RecordingInfo, Recording


class TextRecording(Recording):
    def __init__(self, path, values):
        self.info = RecordingInfo(path=path, format="textcol", frames=len(values), channels=1,
                                  sample_rate_hz=1.0, sample_format="text")
        self.spec = ReaderSpec("textcol", path)
        self._v = values

    def read(self, start, stop):
        return self._v[start:stop, None].copy()


class TextReader(Reader):
    name = "textcol"
    suffixes = (".textcol",)

    def open(self, path, options=None):
        with open(path) as f:
            return TextRecording(path, np.array([float(s) for s in f.read().split()]))


class ClashingReader(TextReader):
    name = "wav"


def not_a_reader():
    return 1
'''


def test_entry_point_plugins_load_and_broken_ones_warn(tmp_path, monkeypatch):
    # A real distribution on sys.path (dist-info with entry_points.txt), as pip would install it.
    site = tmp_path / "site"
    dist = site / "tp_demo_plugins-0.1.dist-info"
    dist.mkdir(parents=True)
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: tp-demo-plugins\nVersion: 0.1\n")
    (dist / "entry_points.txt").write_text(
        f"[{ENTRY_POINT_GROUP}]\n"
        "textcol = tp_demo_textcol:TextReader\n"
        "broken = tp_demo_missing_module:Reader\n"
        "notareader = tp_demo_textcol:not_a_reader\n"
        "clash = tp_demo_textcol:ClashingReader\n"
    )
    (site / "tp_demo_textcol.py").write_text(_PLUGIN)
    monkeypatch.syspath_prepend(str(site))
    reload_readers()
    try:
        with pytest.warns(ReaderPluginWarning) as caught:
            names = available_readers()
        text = " | ".join(str(w.message) for w in caught)
        assert "tp_demo_missing_module" in text and "ModuleNotFoundError" in text
        assert "not_a_reader" in text and "already taken" in text
        assert names == ["wav", "npy", "raw", "zarr", "textcol"]
        (tmp_path / "v.textcol").write_text("1 2 3.5")
        with open_recording(tmp_path / "v.textcol") as rec:
            assert rec.read(1, 3).tolist() == [[2.0], [3.5]]
        assert type(get_reader("wav")) is WavReader  # a plug-in never replaces a built-in
    finally:
        monkeypatch.undo()
        reload_readers()
    assert "textcol" not in available_readers()
