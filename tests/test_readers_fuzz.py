"""Fuzzing the readers: damaged headers and sidecars raise only twinpass errors, never hang.

Seeds are valid files from scipy.io.wavfile / np.save and hand-built ones following the
Microsoft WAVE/EXTENSIBLE documents and EBU Tech 3306 (RF64); hypothesis mutates sizes,
format tags, channel counts, bit depths and lengths. Opening and reading may succeed or raise
a :class:`twinpass.errors.TwinpassError` subclass: any other exception, or a run longer than
the time guard, fails.
"""

from __future__ import annotations

import datetime as dt
import io
import json
import math
import struct

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from twinpass.errors import TwinpassError
from twinpass.io.readers import NpyReader, RawReader, Reader, WavReader
from twinpass.io.readers.raw import SIDECAR_KEYS
from wavtools import EXTENSIBLE, IEEE_FLOAT, PCM, bext_chunk, chunk, fmt_chunk, pack_int24, rf64, riff, time_limit

FUZZ = settings(
    max_examples=200,
    deadline=dt.timedelta(seconds=10),
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    database=None,
)
GUARD_SECONDS = 20


def _scipy_wav(x: np.ndarray, rate: int = 1000) -> bytes:
    buf = io.BytesIO()
    wavfile.write(buf, rate, x)
    return buf.getvalue()


_rng = np.random.default_rng(7)
WAV_SEEDS = [
    _scipy_wav(_rng.integers(-3000, 3000, (40, 2)).astype(np.int16)),
    _scipy_wav(_rng.integers(0, 255, 33).astype(np.uint8)),
    _scipy_wav(_rng.normal(0, 1, (20, 3)).astype(np.float32)),
    _scipy_wav(_rng.normal(0, 1, (10, 1))),
    riff([bext_chunk("2020-01-02", "03:04:05", 1234), fmt_chunk(PCM, 2, 48000, 24),
          chunk(b"data", pack_int24(_rng.integers(-(2**23), 2**23, (15, 2)))),
          chunk(b"LIST", b"INFOICMT" + struct.pack("<I", 3) + b"ab\0")]),
    riff([fmt_chunk(EXTENSIBLE, 2, 8000, 32, valid_bits=24, channel_mask=3), chunk(b"data", bytes(8 * 12))]),
    riff([fmt_chunk(EXTENSIBLE, 1, 8000, 64, sub_tag=IEEE_FLOAT), chunk(b"data", bytes(8 * 9))]),
    rf64([fmt_chunk(PCM, 1, 8000, 16)], bytes(2 * 25), [chunk(b"JUNK", b"xyz")], frames=25),
]


def _put(blob: bytearray, off: int, value: int, width: int) -> None:
    if 0 <= off and off + width <= len(blob):
        blob[off : off + width] = (value % (1 << (8 * width))).to_bytes(width, "little")


@st.composite
def mutated(draw: st.DrawFn, seeds: list[bytes], header_span: int, fmt_fields: bool) -> bytes:
    blob = bytearray(draw(st.sampled_from(seeds)))
    for _ in range(draw(st.integers(0, 3))):
        kind = draw(st.sampled_from(["u32", "u16", "byte", "truncate", "field"] if fmt_fields else ["u32", "u16", "byte", "truncate"]))
        if kind == "truncate":
            del blob[draw(st.integers(0, len(blob))) :]
            continue
        if not blob:
            break
        n = len(blob)
        if kind == "field":  # a named fmt field: tag, channels, rate, block_align, bits, cbSize, valid bits, sub-format
            i = blob.find(b"fmt ")
            if i < 0:
                continue
            off, width = draw(st.sampled_from([(0, 2), (2, 2), (4, 4), (12, 2), (14, 2), (16, 2), (18, 2), (24, 2)]))
            interesting = st.sampled_from([0, 1, 2, 3, 6, 7, 8, 12, 16, 24, 32, 48, 64, 0xFFFE, 0xFFFF])
            _put(blob, i + 8 + off, draw(interesting | st.integers(0, 2 ** (8 * width) - 1)), width)
        elif kind in ("u32", "u16"):
            width = 4 if kind == "u32" else 2
            off = draw(st.integers(0, max(0, min(n, header_span) - width)))
            sizes = st.sampled_from([0, 1, 4, 7, n, n - 8, n + 1, n - 44, 0x7FFFFFFF, 0xFFFFFFFF])
            _put(blob, off, draw(sizes | st.integers(0, 2**32 - 1)), width)
        else:
            _put(blob, draw(st.integers(0, min(n, header_span) - 1)), draw(st.integers(0, 255)), 1)
    return bytes(blob)


def _exercise(reader: Reader, path: str, options: dict) -> None:
    """Open and read a few windows; only TwinpassError may escape."""
    with time_limit(GUARD_SECONDS):
        try:
            rec = reader.open(path, options)
        except TwinpassError as exc:
            event(f"refused: {type(exc).__name__}")
            return
        event("opened")
        with rec:
            n, ch = rec.info.frames, rec.info.channels
            assert n > 0 and ch > 0
            for a, b in [(0, min(n, 64)), (max(0, n - 64), n), (n // 2, min(n, n // 2 + 3))]:
                try:
                    y = rec.read(a, b)
                except TwinpassError:
                    continue
                assert y.dtype == np.float64 and y.shape == (b - a, ch)


@pytest.fixture(scope="module")
def fuzz_dir(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


@FUZZ
@given(blob=mutated(WAV_SEEDS, 128, True), mode=st.sampled_from(["error", "warn"]))
def test_mutated_wav_headers_raise_only_twinpass_errors(fuzz_dir, blob, mode):
    path = fuzz_dir / "m.wav"
    path.write_bytes(blob)
    _exercise(WavReader(), str(path), {"truncated": mode})


NPY_SEEDS = []
for _arr in (np.arange(60, dtype=np.int16).reshape(20, 3), np.linspace(-1, 1, 17).astype(">f4"),
             np.asfortranarray(np.ones((9, 2), np.uint8))):
    _buf = io.BytesIO()
    np.save(_buf, _arr)
    NPY_SEEDS.append(_buf.getvalue())


@st.composite
def npy_headers(draw: st.DrawFn) -> bytes:
    """NPY version 1.0 files (numpy.lib.format layout) with arbitrary header dictionaries."""
    descr = draw(st.sampled_from(["<i2", ">i4", "|u1", "<f4", ">f8", "<f2", "|O", "<c8", "|b1", "<i8",
                                  "<u8", "<U3", "xx", "|V4", "<M8[s]"]))
    shape = tuple(draw(st.lists(st.integers(1, 40), min_size=1, max_size=2)
                       | st.lists(st.integers(-2, 40) | st.just(2**40), max_size=3)))
    header = repr({"descr": descr, "fortran_order": draw(st.booleans()), "shape": shape})
    pad = -(10 + len(header) + 1) % 64
    head = header.encode("latin1") + b" " * pad + b"\n"
    fitting = math.prod(shape) * int(descr[-1]) if descr[-1].isdigit() and 0 <= math.prod(shape) <= 400 else 0
    data = draw(st.binary(max_size=400) | st.just(bytes(fitting)))
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(head)) + head + data


@FUZZ
@given(blob=mutated(NPY_SEEDS, 128, False) | npy_headers(), mode=st.sampled_from(["error", "warn"]))
def test_mutated_npy_headers_raise_only_twinpass_errors(fuzz_dir, blob, mode):
    path = fuzz_dir / "m.npy"
    path.write_bytes(blob)
    _exercise(NpyReader(), str(path), {"truncated": mode})


_values = st.one_of(
    st.integers(-(2**70), 2**70),
    st.integers(-2, 9),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.booleans(),
    st.none(),
    st.lists(st.integers(-3, 3), max_size=3),
    st.sampled_from(["int16", "int24", "float32", "uint8", ">i2", "<f8", "int64", "S3", "V8", "O", "c8",
                     "M8[s]", "i2,i2", "(2,)i2", "little", "big", "2024-01-01T00:00:00Z", "2024-13-01"]),
)


def _toml_value(v: object) -> str | None:
    if v is None:
        return None
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float) and not math.isfinite(v):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, list):
        return "[" + ", ".join(json.dumps(i) if isinstance(i, str) else str(i) for i in v) + "]"
    return json.dumps(v) if isinstance(v, str) else repr(v)


_plausible = {
    "dtype": st.sampled_from(["int8", "uint8", "int16", "uint16", "int24", "int32", "float32", "float64", ">i2"]),
    "channels": st.integers(1, 4),
    "byte_order": st.sampled_from(["little", "big"]),
    "sample_rate_hz": st.floats(1, 1e5),
    "header_bytes": st.sampled_from([0, 24, 48]),
    "start_time": st.sampled_from(["2024-01-01T00:00:00Z", "2024-01-01 12:00", "2024-06-30T23:59:59.5+05:30"]),
    "gain": st.floats(-10, 10),
    "offset": st.floats(-10, 10),
    "frames": st.integers(1, 32),
    "channel_names": st.lists(st.sampled_from(["a", "b", "c", "", " "]), max_size=4),
    "units": st.sampled_from(["V", "m/s^2", ""]) | st.lists(st.sampled_from(["V", "mV", ""]), max_size=4),
}
_sidecar_changes = st.fixed_dictionaries(
    {},  # mostly plausible values, so that some sidecars open and their data is read
    optional={k: st.sampled_from(range(6)).flatmap(lambda i, k=k: _values if i == 3 else _plausible[k])
              for k in SIDECAR_KEYS},
)


@FUZZ
@given(
    changes=_sidecar_changes,
    drop=st.sampled_from([(), (), (), (), ("dtype",), ("channels",), ("dtype", "channels")]),
    junk_key=st.sampled_from([None] * 10 + ["colour", ""]),
    data=st.binary(max_size=96) | st.integers(0, 8).flatmap(lambda k: st.binary(min_size=24 * k, max_size=24 * k)),
    as_json=st.booleans(),
    fit=st.booleans(),
)
def test_random_sidecars_raise_only_twinpass_errors(fuzz_dir, changes, drop, junk_key, data, as_json, fit):
    side = {"dtype": "int16", "channels": 2}
    side.update(changes)
    if junk_key is not None:
        side[junk_key] = 1
    for k in drop:
        side.pop(k, None)
    if fit:  # size the data to the sidecar where it is readable at all, so reads happen too
        try:
            dtype, ch, head = side["dtype"], side["channels"], side.get("header_bytes", 0)
            size = 3 if dtype == "int24" else np.dtype(dtype).itemsize
            frames = side.get("frames", 1 + len(data) % 7)
            data = bytes(head) + (data * (1 + size * ch * frames))[: size * ch * frames]
        except Exception:
            pass
    path = fuzz_dir / "r.bin"
    path.write_bytes(data)
    for stale in (fuzz_dir / "r.bin.json", fuzz_dir / "r.bin.toml"):
        stale.unlink(missing_ok=True)
    if as_json:
        (fuzz_dir / "r.bin.json").write_text(json.dumps(side))
    else:
        lines = [f"{json.dumps(k)} = {tv}" for k, v in side.items() if (tv := _toml_value(v)) is not None]
        (fuzz_dir / "r.bin.toml").write_text("\n".join(lines) + "\n")
    _exercise(RawReader(), str(path), {})
