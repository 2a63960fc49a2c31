"""Raw reader: headerless interleaved samples described by a sidecar file.

The sidecar sits next to the data file: ``<file>.toml`` or ``<file>.json`` (e.g.
``run1.bin.toml``), or the same name with the suffix replaced (``run1.toml``); the reader
option ``sidecar`` names one explicitly. Exactly one candidate may exist. It is UTF-8 text (a
byte-order mark at its start is skipped). Keys:

=================  ========  ====================================================
key                required  meaning
=================  ========  ====================================================
``dtype``          yes       numpy dtype name of one sample: ``"int8"``, ``"uint8"``,
                             ``"int16"``, ``"int32"``, ``"float32"``, ``"float64"``...,
                             or ``"int24"`` for packed 3-byte signed samples; a
                             ``"<"``/``">"`` prefix (``">i2"``) sets the byte order
``channels``       yes       interleaved channels per frame (>= 1)
``byte_order``     no        ``"little"`` (default) or ``"big"``
``sample_rate_hz`` no        Hz; else the ``sample_rate_hz`` option, else unknown
``header_bytes``   no        bytes to skip at the start of the file (default 0)
``start_time``     no        ISO 8601 time of the first sample (no zone = UTC)
``gain``           no        ``y = x_scaled * gain + offset`` (default 1; not 0)
``offset``         no        (default 0)
``frames``         no        expected frame count, checked against the file size
``channel_names``  no        one name per channel (distinct, not empty), e.g.
                             ``["vertical", "lateral"]``
``units``          no        one unit for every channel (``"m/s^2"``) or a list,
                             one per channel
=================  ========  ====================================================

``channel_names`` and ``units`` label the outputs (they win over the configuration's
``[archive.channels]``); they do not change how the file decodes, so editing them
refilters nothing, and a mistake in them (a count other than ``channels``, an empty or
repeated name) is a warning: the file is read as usual without the sidecar's labels.

The sidecar is read when the file is opened. The recording's spec keeps the bytes it read
(the option ``sidecar_as_read``, set by the reader: the sidecar's path and bytes), so a file
reopened from its spec, in any process, decodes as when it was first opened even if the
sidecar has been edited since; a spec's ``as_found()`` drops them, and reads the sidecar again.

``x_scaled`` follows the usual convention: signed integers ``v / 2**(bits - 1)``,
unsigned ``(v - 2**(bits - 1)) / 2**(bits - 1)``, floats as stored.
"""

from __future__ import annotations

import json
import math
import os
import tomllib
from typing import Any, BinaryIO

import numpy as np

from ...errors import ConfigError, CorruptInputError, InputError, UnsupportedFormatError
from ._common import (
    READABLE,
    Codec,
    FileReader,
    InterleavedRecording,
    normalize_path,
    option_rate,
    parse_time,
    positive_rate,
    resolve_rate,
)
from .base import ReaderSpec, RecordingInfo

SIDECAR_KEYS = (
    "dtype",
    "channels",
    "byte_order",
    "sample_rate_hz",
    "header_bytes",
    "start_time",
    "gain",
    "offset",
    "frames",
    "channel_names",
    "units",
)
_SIDECAR_MAX_BYTES = 1 << 20
_EXAMPLE = 'dtype = "int16", channels = 2, sample_rate_hz = 1000.0'
"""The keys a sidecar needs, written inline for a one-line message (one key per line in the file)."""


def _fix_sidecar(side: str) -> str:
    """The remedy of a reader error whose fix is in the sidecar ``side``."""
    return f"correct its sidecar {side}"


def sidecar_candidates(path: str) -> list[str]:
    """Where the sidecar of ``path`` may be, in the order they are tried."""
    stem = os.path.splitext(path)[0]
    out: list[str] = []
    for c in (path + ".toml", path + ".json", stem + ".toml", stem + ".json"):
        if c != path and c not in out:
            out.append(c)
    return out


def _find_sidecar(path: str, explicit: Any) -> str:
    if explicit is not None:
        side = normalize_path(os.fspath(explicit))
        if not os.path.isfile(side):
            raise CorruptInputError(
                f"{path}: the sidecar named by the option sidecar, {side}, does not exist", path=path
            )
        return side
    cands = sidecar_candidates(path)
    found = [c for c in cands if os.path.isfile(c)]
    if not found:
        remedy = f"write its sidecar {cands[0]}, one key per line, e.g. {_EXAMPLE}"
        raise CorruptInputError(
            f"{path}: raw data needs a sidecar describing it; none found (looked for "
            f"{', '.join(cands)}); {remedy}",
            path=path,
            remedy=remedy,
        )
    if len(found) > 1:
        remedy = "keep exactly one of its sidecars (delete or rename the others)"
        raise CorruptInputError(
            f"{path}: several sidecars found ({', '.join(found)}); {remedy}", path=path, remedy=remedy
        )
    return found[0]


def _read_sidecar(path: str, side: str) -> bytes:
    """The bytes of the sidecar ``side`` of ``path`` (at most 1 MiB and one byte, to tell a
    larger one)."""
    try:
        with open(side, "rb") as f:
            return f.read(_SIDECAR_MAX_BYTES + 1)
    except PermissionError as exc:
        raise InputError(
            f"{path}: cannot read its sidecar {side} ({exc.strerror or exc}); make the sidecar {READABLE}", path=path
        ) from None
    except OSError as exc:
        raise CorruptInputError(f"{path}: cannot read its sidecar {side} ({exc})", path=path) from None


def _as_read(path: str, value: Any) -> tuple[str, bytes]:
    """The option ``sidecar_as_read``: (the sidecar's path, its bytes)."""
    if (not isinstance(value, (tuple, list)) or len(value) != 2 or not isinstance(value[0], str)
            or not isinstance(value[1], bytes)):
        raise ConfigError(f"{path}: option sidecar_as_read must be (the sidecar's path, its bytes), as the "
                          f"reader sets it in a recording's spec; got {type(value).__name__}")
    return normalize_path(value[0]), value[1]


def _load_sidecar(path: str, side: str, text: bytes) -> dict[str, Any]:
    if len(text) > _SIDECAR_MAX_BYTES:
        raise CorruptInputError(f"{path}: its sidecar {side} is larger than 1 MiB; {_fix_sidecar(side)}", path=path,
                                remedy=_fix_sidecar(side))
    try:  # UTF-8; a byte-order mark that some editors write first is not part of the text
        if side.lower().endswith(".json"):
            doc = json.loads(text.decode("utf-8-sig"))
        else:
            doc = tomllib.loads(text.decode("utf-8-sig"))
    except (ValueError, UnicodeDecodeError, RecursionError) as exc:
        raise CorruptInputError(
            f"{path}: its sidecar {side} cannot be parsed: {exc}; {_fix_sidecar(side)}", path=path,
            remedy=_fix_sidecar(side),
        ) from None
    if not isinstance(doc, dict):
        raise CorruptInputError(
            f"{path}: its sidecar {side} must hold a table/object of keys, not {type(doc).__name__}; "
            f"{_fix_sidecar(side)}",
            path=path,
            remedy=_fix_sidecar(side),
        )
    unknown = sorted(str(k) for k in doc if k not in SIDECAR_KEYS)
    if unknown:
        raise CorruptInputError(
            f"{path}: its sidecar {side} has unknown key(s) {', '.join(map(repr, unknown))}; "
            f"allowed keys: {', '.join(SIDECAR_KEYS)}; {_fix_sidecar(side)}",
            path=path,
            remedy=_fix_sidecar(side),
        )
    return doc


def _int_key(doc: dict[str, Any], key: str, default: int | None, minimum: int, where: str) -> int | None:
    v = doc.get(key, default)
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, int) or v < minimum:
        raise CorruptInputError(f"{where}: {key} must be an integer >= {minimum}, got {v!r}")
    return v


def _float_key(doc: dict[str, Any], key: str, default: float, where: str) -> float:
    v = doc.get(key, default)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        raise CorruptInputError(f"{where}: {key} must be a finite number, got {v!r}")
    return float(v)


def _labels(doc: dict[str, Any], channels: int, where: str) -> dict[str, tuple[str, ...]]:
    """``channel_names`` and ``units`` of a sidecar, one per channel (a single unit repeated),
    as the recording's ``extra`` holds them; only the keys the sidecar gives."""
    out: dict[str, tuple[str, ...]] = {}
    for key, what in (("channel_names", "name"), ("units", "unit")):
        if key not in doc:
            continue
        value = doc[key]
        if key == "units" and isinstance(value, str):
            value = [value] * channels
        shape = ("a list of strings, one name per channel" if key == "channel_names"
                 else "a string (one unit for every channel) or a list of strings, one per channel")
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise CorruptInputError(f"{where}: {key} must be {shape}; got {doc[key]!r}")
        if len(value) != channels:
            raise CorruptInputError(
                f"{where}: {key} lists {len(value)} {what}(s) but channels = {channels}; give one {what} per "
                f"channel (or correct channels)"
            )
        empty = [i for i, v in enumerate(value) if not v.strip()]
        if empty:
            raise CorruptInputError(f"{where}: {key} is empty for channel {empty[0] + 1}; give every channel a {what}")
        if key == "channel_names" and len(set(value)) < len(value):
            twice = next(v for i, v in enumerate(value) if v in value[:i])
            raise CorruptInputError(f"{where}: channel_names gives {twice!r} twice; give each channel its own name")
        out[key] = tuple(value)
    return out


def _codec(doc: dict[str, Any], where: str, path: str) -> Codec:
    order_txt = doc.get("byte_order", "little")
    if order_txt not in ("little", "big"):
        raise CorruptInputError(f"{where}: byte_order must be \"little\" or \"big\", got {order_txt!r}")
    order = "<" if order_txt == "little" else ">"
    name = doc.get("dtype")
    if not isinstance(name, str) or not name:
        raise CorruptInputError(
            f"{where}: dtype must name the sample type, e.g. \"int16\", \"int24\" or \"float32\"; got {name!r}"
        )
    gain = _float_key(doc, "gain", 1.0, where)
    offset = _float_key(doc, "offset", 0.0, where)
    if gain == 0.0:
        raise CorruptInputError(
            f"{where}: gain = 0 makes every sample equal to the offset ({offset:g}), leaving no signal to "
            "filter; set gain to the factor from the stored values to physical units (1 when they need none)"
        )
    if name.strip().lower() == "int24":
        return Codec("i", 3, order, gain, offset)
    try:
        dt = np.dtype(name)
    except Exception as exc:  # numpy raises TypeError/ValueError/SyntaxError for bad strings
        raise CorruptInputError(
            f"{where}: dtype {name!r} is not a numpy dtype name ({type(exc).__name__}); use e.g. \"int16\""
        ) from None
    prefix = name.strip()[:1]  # numpy reports an explicit native order as "=", so read the text
    if prefix in ("<", ">") and "byte_order" not in doc:
        order = prefix
    elif prefix in ("<", ">") and prefix != order and dt.itemsize > 1:
        raise CorruptInputError(
            f"{where}: dtype {name!r} is {'little' if prefix == '<' else 'big'}-endian but "
            f"byte_order is {order_txt!r}; make them agree (or drop the '<'/'>' prefix)"
        )
    try:
        base = Codec.from_dtype(dt, where)
    except UnsupportedFormatError as exc:
        raise UnsupportedFormatError(str(exc), path=path) from None
    return Codec(base.kind, base.itemsize, order, gain, offset)


class RawReader(FileReader):
    """Headerless interleaved samples with a TOML/JSON sidecar."""

    name = "raw"
    suffixes = (".raw", ".bin", ".dat")
    options = ("sample_rate_hz", "sidecar", "sidecar_as_read")
    snapshot_options = ("sidecar_as_read",)

    def _open_file(self, path: str, fh: BinaryIO, size: int, opts: dict[str, Any]) -> InterleavedRecording:
        rate_opt = option_rate(path, opts)
        if opts.get("sidecar_as_read") is not None:  # reopened from a spec: decoded as when first opened
            side, text = _as_read(path, opts["sidecar_as_read"])
        else:
            side = _find_sidecar(path, opts.get("sidecar"))
            if opts.get("sidecar") is not None:
                opts["sidecar"] = side  # absolute, so the spec reopens from any directory
            text = _read_sidecar(path, side)
            opts["sidecar_as_read"] = (side, text)
        doc = _load_sidecar(path, side, text)
        where = f"{path}: sidecar {side}"
        try:
            codec = _codec(doc, where, path)
            channels = _int_key(doc, "channels", None, 1, where)
            if channels is None:
                raise CorruptInputError(f"{where}: the key channels is missing (interleaved channels per frame)")
            header = _int_key(doc, "header_bytes", 0, 0, where) or 0
            expected = _int_key(doc, "frames", None, 1, where)
            rate = positive_rate(doc.get("sample_rate_hz"), where)
            start = parse_time(doc["start_time"], where) if "start_time" in doc else None
            try:  # labels change no sample: a mistake in them leaves the file filtered without them
                labels, label_warnings = _labels(doc, channels, where), ()
            except CorruptInputError as exc:
                labels = {}
                label_warnings = (f"{exc}; the sidecar's channel_names and units are not used until this is "
                                  "corrected (the samples are read as usual)",)
        except InputError as exc:  # a key of the sidecar: the fix is there
            fix = _fix_sidecar(side)
            raise type(exc)(f"{exc}; {fix}", path=path, remedy=fix) from None
        rate = resolve_rate(path, rate, f"sidecar {side}", rate_opt)
        frame = codec.itemsize * channels
        payload = size - header
        if payload < 0:
            fix = f"fix header_bytes in its sidecar {side}"
            raise CorruptInputError(
                f"{path}: the file has {size} bytes, fewer than header_bytes = {header} in its sidecar; {fix}",
                path=path,
                remedy=fix,
            )
        frames, rest = divmod(payload, frame)
        if rest:
            fix = (f"check dtype, channels and header_bytes in its sidecar {side}, or cut the partial frame "
                   "from the data file")
            raise CorruptInputError(
                f"{path}: {payload} data bytes (file size {size} - header_bytes {header}) are not a whole "
                f"number of {frame}-byte frames ({channels} channels x {codec.itemsize} bytes): "
                f"{frames} frames + {rest} bytes; {fix}",
                path=path,
                remedy=fix,
            )
        if expected is not None and expected != frames:
            fix = f"fix frames (or dtype, channels, header_bytes) in its sidecar {side}"
            raise CorruptInputError(
                f"{path}: its sidecar declares frames = {expected} but the file holds {frames} "
                f"frames of {frame} bytes; {fix}",
                path=path,
                remedy=fix,
            )
        if frames == 0:
            raise CorruptInputError(
                f"{path}: the file holds no frames after header_bytes = {header} (sidecar {side})", path=path
            )
        fmt = "int24" if codec.itemsize == 3 else codec.dtype.name
        info = RecordingInfo(
            path=path,
            format=self.name,
            frames=frames,
            channels=channels,
            sample_rate_hz=rate,
            sample_format=fmt,
            start_time=start,
            full_scale=codec.full_scale,
            extra={
                "sidecar": side,
                "header_bytes": header,
                "byte_order": "little" if codec.byteorder == "<" else "big",
                "gain": codec.gain,
                "offset": codec.offset,
                **labels,
            },
            warnings=label_warnings,
        )
        spec = ReaderSpec.create(self.name, path, opts)
        return InterleavedRecording(info, spec, fh, codec, header)
