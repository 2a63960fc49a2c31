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


def _edit_sidecar_when_block_starts(monkeypatch, root: Path, block: int, **keys: object) -> list[int]:
    """Fault injection: rewrite the sidecar (``keys``) as block ``block`` of the file starts, once,
    at the engine's fault hook (blocks run in this process's threads). Returns the blocks seen."""
    from twinpass import faults

    seen: list[int] = []
    real = faults.apply

    def apply(name: str, index: int) -> set[str]:
        if index == block and block not in seen:
            _sidecar(root, **keys)
        seen.append(index)
        return real(name, index)

    monkeypatch.setattr(faults, "apply", apply)
    return seen


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_a_sidecar_edited_while_a_run_reads_the_file_leaves_it_not_complete(tmp_path, monkeypatch, mode):
    root = tmp_path / "archive"
    codes = pcm16(6000, 2, seed=7)
    put(root, RAW, codes.astype("<i2").tobytes())
    _sidecar(root, gain=1.0)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, output={"dtype": "float64"},
               processing={"block_seconds": 10.0, "mode": mode})
    seen = _edit_sidecar_when_block_starts(monkeypatch, root, 2, gain=2.5)
    first = run(cfg)
    assert 2 in seen and max(seen) >= 3  # the edit came with blocks still to read the file
    (out,) = first.outcomes
    assert out.status == "failed", out
    said = " ".join(out.errors.values())
    assert f"its sidecar {Path(SIDECAR).name} changed" in said and "gain 1.0 -> 2.5" in said
    assert "not marked complete" in said
    store = OutputStore.open(cfg.store_location, mode="r")
    assert [r.complete for r in store.file_records().values()] == [False]
    # Every block decoded the file as the run planned it (gain 1), before and after the edit.
    x = codes.astype(np.float64) / 2**15
    y = store.read(RAW[: -len(".bin")])
    assert np.max(np.abs(y - _reference(first.designs[float(RATE)], x))) <= 1e-9 * np.max(np.abs(x))

    monkeypatch.undo()
    second = run(cfg)
    assert [o.status for o in second.outcomes] == ["complete"]
    y = OutputStore.open(cfg.store_location, mode="r").read(RAW[: -len(".bin")])
    ref = _reference(second.designs[float(RATE)], 2.5 * x)  # the gain the sidecar gives now
    assert np.max(np.abs(y - ref)) <= 1e-9 * np.max(np.abs(2.5 * x))


def test_a_label_edit_of_the_sidecar_while_a_run_reads_the_file_changes_no_verdict(tmp_path, monkeypatch):
    # Channel names change no sample (twinpass rule): the output is complete as filtered.
    root = tmp_path / "archive"
    codes = pcm16(6000, 2, seed=8)
    put(root, RAW, codes.astype("<i2").tobytes())
    _sidecar(root)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, output={"dtype": "float64"},
               processing={"block_seconds": 10.0})
    seen = _edit_sidecar_when_block_starts(monkeypatch, root, 2, channel_names=["north", "south"])
    res = run(cfg)
    assert 2 in seen
    assert [o.status for o in res.outcomes] == ["complete"]


def test_a_raw_files_spec_decodes_as_when_it_was_opened(tmp_path):
    # Decoding by hand (numpy frombuffer, / 2**15, times the gain), as in the module notes.
    import pickle

    from twinpass.io.readers import open_recording

    root = tmp_path / "archive"
    codes = pcm16(500, 2, seed=3)
    data = put(root, RAW, codes.astype("<i2").tobytes())
    _sidecar(root, gain=1.0)
    with open_recording(data) as rec:
        spec = rec.spec
    _sidecar(root, gain=4.0)
    x = codes.astype(np.float64) / 2**15
    for again in (spec, pickle.loads(pickle.dumps(spec))):  # in this process or another
        with again.open() as rec:
            assert rec.info.extra["gain"] == 1.0
            np.testing.assert_array_equal(rec.read(0, 500), x)
    with spec.as_found().open() as rec:  # the sidecar as it reads now
        assert rec.info.extra["gain"] == 4.0
        np.testing.assert_array_equal(rec.read(0, 500), 4.0 * x)
