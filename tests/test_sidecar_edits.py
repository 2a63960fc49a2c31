"""Edits of how a file decodes (a raw file's sidecar) count as changes of the file.

A raw file's samples are fixed by its bytes *and* its sidecar (dtype, byte order, gain,
offset, header bytes, rate, start time). Editing only the sidecar must make the file
"changed" (refiltered, NaN scan redone), with a reason naming the sidecar and the field.

References:
* Raw samples decoded by hand with numpy (``frombuffer`` of the stated dtype, divided by
  2**15 for int16, times the gain): the reader's documented convention.
* Whole-signal two-pass reference: ``scipy.signal.sosfiltfilt`` (odd extension, padlen = the
  design's effective length), as in test_bad_inputs.py.
* Which edits count, the reason's wording and how older records are treated are twinpass rules.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from twinpass.core.plan import fingerprint_changed
from twinpass.io.archive import discover
from twinpass.io.store import OutputStore
from twinpass.job import prepare
from test_bad_inputs import PATTERN, RATE, load, pcm16, put, run, stem, write_wav

RAW = stem("raw") + ".bin"
SIDECAR = RAW + ".toml"


def _sidecar(root: Path, **keys: object) -> None:
    body = {"dtype": '"int16"', "channels": "2", "sample_rate_hz": f"{float(RATE)}"}
    body.update({k: (f'"{v}"' if isinstance(v, str) else repr(v)) for k, v in keys.items()})
    put(root, SIDECAR, "".join(f"{k} = {v}\n" for k, v in body.items()).encode())


def _reference(design, x: np.ndarray) -> np.ndarray:
    pad = min(design.effective_length, x.shape[0] - 1)
    return signal.sosfiltfilt(design.sos, x, axis=0, padtype="odd", padlen=pad)


def test_editing_the_sidecar_gain_refilters_the_file(tmp_path):
    root = tmp_path / "archive"
    codes = pcm16(3000, 2, seed=5)
    data = put(root, RAW, codes.astype("<i2").tobytes())
    _sidecar(root, gain=1.0)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, output={"dtype": "float64"})
    first = run(cfg)
    assert {o.relpath: o.status for o in first.outcomes} == {RAW: "complete"}
    before = os.stat(data).st_mtime_ns

    _sidecar(root, gain=2.5)  # the data file is not touched
    assert os.stat(data).st_mtime_ns == before
    store = OutputStore.open(cfg.store_location, mode="r")
    planned = prepare(cfg, store).plan.file(RAW)
    assert planned.status == "changed" and planned.redo == "all"
    assert f"its sidecar {Path(SIDECAR).name} changed" in planned.reason
    assert "gain 1.0 -> 2.5" in planned.reason

    second = run(cfg)
    assert {o.relpath: o.status for o in second.outcomes} == {RAW: "complete"}
    y = OutputStore.open(cfg.store_location, mode="r").read(RAW[: -len(".bin")])
    x = codes.astype(np.float64) / 2**15 * 2.5
    ref = _reference(second.designs[float(RATE)], x)
    assert np.max(np.abs(y - ref)) <= 1e-9 * np.max(np.abs(x))

    third = prepare(cfg, OutputStore.open(cfg.store_location, mode="r")).plan.file(RAW)
    assert third.status == "unchanged", third.reason


@pytest.mark.parametrize(
    "edit, field",
    [
        ({"offset": 0.25}, "offset"),
        ({"byte_order": "big"}, "byte_order"),
        ({"dtype": "uint16"}, "sample_format"),
        ({"start_time": "2026-03-01T00:00:00Z"}, "start_time"),
        ({"sample_rate_hz": 2.0 * RATE}, "sample_rate_hz"),
    ],
)
def test_every_decoding_field_of_the_sidecar_counts(tmp_path, edit, field):
    root = tmp_path / "archive"
    put(root, RAW, pcm16(1000, 2).astype("<i2").tobytes())
    _sidecar(root)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    (old,) = discover(cfg).files
    _sidecar(root, **edit)
    (new,) = discover(cfg).files
    changed, why = fingerprint_changed(old.fingerprint, new.fingerprint)
    assert changed and f"its sidecar {Path(SIDECAR).name} changed" in why and field in why


def test_header_bytes_edit_counts(tmp_path):
    root = tmp_path / "archive"
    put(root, RAW, bytes(8) + pcm16(1000, 2).astype("<i2").tobytes())
    _sidecar(root, header_bytes=4)  # 1001 frames of 4 bytes (the last 4 header bytes taken as one)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    (old,) = discover(cfg).files
    _sidecar(root, header_bytes=8)
    (new,) = discover(cfg).files
    assert old.frames == new.frames + 1
    changed, why = fingerprint_changed(old.fingerprint, new.fingerprint)
    assert changed and "header_bytes 4 -> 8" in why


def test_a_sidecar_comment_is_not_a_change(tmp_path):
    root = tmp_path / "archive"
    put(root, RAW, pcm16(1000, 2).astype("<i2").tobytes())
    _sidecar(root)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    (old,) = discover(cfg).files
    side = root / SIDECAR
    side.write_text("# calibrated 2026-03-02\n" + side.read_text())
    (new,) = discover(cfg).files
    assert fingerprint_changed(old.fingerprint, new.fingerprint) == (False, "same size and digest (of every byte)")


def test_records_without_decoding_are_compatible(tmp_path):
    """Records written before fingerprints held ``decoding``: only sidecar files count as changed."""
    root = tmp_path / "archive"
    put(root, RAW, pcm16(1000, 2).astype("<i2").tobytes())
    _sidecar(root)
    write_wav(root, stem("wav") + ".wav", pcm16(500))
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    files = {f.relpath: f.fingerprint for f in discover(cfg).files}
    for rel, fp in files.items():
        legacy = {k: v for k, v in fp.items() if k not in ("decoding", "sidecar")}
        changed, why = fingerprint_changed(legacy, fp)
        if rel == RAW:
            assert changed and f"did not record the content of its sidecar {Path(SIDECAR).name}" in why
        else:
            assert not changed, why


def test_a_cached_nan_scan_is_not_reused_after_a_sidecar_edit(tmp_path):
    """float32 samples: a NaN as little-endian bytes is a tiny number big-endian, and back."""
    root = tmp_path / "archive"
    x = np.full((1000, 2), 0.5, dtype="<f4")  # bytes 00 00 00 3f: finite either way
    x[100, 0] = np.nan  # bytes 00 00 c0 7f: big-endian, a denormal
    blob = bytearray(x.tobytes())
    at = (300 * 2 + 1) * 4
    blob[at: at + 4] = bytes([0x7F, 0xC0, 0x00, 0x00])  # NaN big-endian, a denormal little-endian
    put(root, RAW, bytes(blob))
    _sidecar(root, dtype="float32")
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, processing={"nonfinite": "split"})
    first = discover(cfg)
    assert first.scanned == (RAW,) and first.files[0].nonfinite_runs == ((100, 101),)
    _sidecar(root, dtype="float32", byte_order="big")
    second = discover(cfg, scan_cache=first.scans)
    assert second.scanned == (RAW,)
    assert second.files[0].nonfinite_runs == ((300, 301),)
