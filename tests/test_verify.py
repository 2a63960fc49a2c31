"""`twinpass status --verify`: stored samples read back against the levels recorded when written.

Reference for the figures: the definitions of RMS (square root of the mean square) and peak
(largest magnitude), computed here with numpy on the stored samples.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

import conftest
from conftest import make_signal, write_config, write_stream
from twinpass.config import load_config
from twinpass.io.store import OutputStore
from twinpass.job import run_job
from twinpass.status import collect_status, format_status, shortfalls
from twinpass.verify import FLOAT32_RTOL, verify_store

FS = 200.0
FRAMES = [6000, 6000]  # blocks and chunks of 2000 frames: three per file
ARRAYS = [f"deck/deck_20260301T{t}" for t in ("000000", "000030")]


def _filtered(tmp_path, **output):
    archive = tmp_path / "archive"
    write_stream(archive, "deck", make_signal(sum(FRAMES), 2, FS, seed=5), FS, FRAMES)
    cfg = load_config(write_config(tmp_path, processing={"block_seconds": 10.0},
                                   output={"chunk_seconds": 10.0, **output}))
    assert run_job(cfg).ok
    return cfg


def _without_checksums(folder):
    """Make the output in ``folder`` as versions before chunk checksums wrote it: the
    ``crc32c`` codec gone from its metadata and the four checksum bytes from the end of each
    chunk file."""
    meta_file = folder / "zarr.json"
    meta = json.loads(meta_file.read_text())
    assert meta["codecs"][-1]["name"] == "crc32c"  # written with checksums (Zarr v3 codec name)
    meta["codecs"].pop()
    meta_file.write_text(json.dumps(meta))
    for chunk in (folder / "c").rglob("*"):
        if chunk.is_file():
            chunk.write_bytes(chunk.read_bytes()[:-4])


def _status(cfg):
    store = OutputStore.open(cfg.store_location, mode="r")
    st = collect_status(store)
    st["verified"] = verify_store(store, st["files"]).to_dict()
    return st


@pytest.mark.parametrize("output", [{"dtype": "float64", "compression": "none"},
                                    {"dtype": "float32", "compression": "lz4"}])
def test_an_untouched_store_verifies_without_a_false_alarm(tmp_path, output):
    # float32 outputs are the float64 results rounded to 24 bits: their RMS and peak differ
    # from the recorded ones by at most a relative 2**-24, inside FLOAT32_RTOL.
    cfg = _filtered(tmp_path, **output)
    st = _status(cfg)
    # frames are samples per channel; values count every channel's (2 here)
    assert st["verified"] == {"files": 2, "blocks": 6, "frames": sum(FRAMES), "values": 2 * sum(FRAMES),
                              "damaged": {}}
    assert f"{sum(FRAMES):,} frames ({2 * sum(FRAMES):,} values over all channels) read back" in format_status(st)
    assert not shortfalls(st)
    assert FLOAT32_RTOL < 1e-6


def test_swapped_chunk_files_are_named_by_block_with_both_figures(tmp_path):
    cfg = _filtered(tmp_path)
    folder = tmp_path / "out.zarr" / ARRAYS[0] / "c"
    before = np.asarray(conftest.read_output(cfg.store_location, ARRAYS)[0])
    a, b = folder / "0" / "0", folder / "2" / "0"
    tmp = folder / "swap"
    shutil.move(a, tmp)
    shutil.move(b, a)
    shutil.move(tmp, b)
    st = _status(cfg)
    lines = st["verified"]["damaged"][ARRAYS[0]]
    assert [line.split(":")[0] for line in lines] == ["block 0 (frames 0-1,999)", "block 2 (frames 4,000-5,999)"]
    # The stored block 0 now holds what block 2 held: its RMS (definition) is reported.
    rms0 = float(np.sqrt(np.mean(before[4000:6000, 0] ** 2)))
    assert f"stored samples' RMS {rms0:.9g} on channel 0" in lines[0]
    assert ARRAYS[1] not in st["verified"]["damaged"]
    assert "1 output(s) whose stored samples no longer match what the run recorded" in shortfalls(st)


@pytest.mark.parametrize("checksums", [True, False])
def test_a_flipped_exponent_bit_in_an_uncompressed_chunk_is_found(tmp_path, checksums):
    # With chunk checksums (CRC-32C, the Zarr v3 crc32c codec) the chunk file is named;
    # without them (outputs of earlier versions) its block's levels no longer match.
    cfg = _filtered(tmp_path)
    if not checksums:
        _without_checksums(tmp_path / "out.zarr" / ARRAYS[1])
    chunk = tmp_path / "out.zarr" / ARRAYS[1] / "c" / "1" / "0"
    raw = bytearray(chunk.read_bytes())
    # float64 little-endian: byte 7 of a sample holds the sign and the exponent's high bits;
    # flipping its bit 6 scales the sample by 2**+-512 (IEEE 754 binary64 layout).
    raw[8 * 123 + 7] ^= 0x40
    chunk.write_bytes(bytes(raw))
    lines = _status(cfg)["verified"]["damaged"][ARRAYS[1]]
    if checksums:
        assert lines == ["chunk file c/1/0 (frames 2,000-3,999): does not match its CRC-32C checksum: changed "
                         "since it was written (damaged, truncated or edited)"]
    else:
        assert len(lines) == 1 and lines[0].startswith("block 1 (frames 2,000-3,999): stored samples'")


def test_a_flip_within_float32_rounding_is_seen_only_through_the_checksum(tmp_path):
    # The lowest mantissa bit of one float32 sample changes it by a relative 2**-23 at most
    # (IEEE 754 binary32 layout), within what the levels allow for the cast; the chunk's
    # CRC-32C sees it (a CRC detects every single-bit error: Castagnoli, Braeuer & Herrmann,
    # IEEE Trans. Commun. 41(6), 1993, from memory).
    cfg = _filtered(tmp_path, dtype="float32", compression="none")
    chunk = tmp_path / "out.zarr" / ARRAYS[0] / "c" / "2" / "0"
    raw = bytearray(chunk.read_bytes())
    raw[4 * 77] ^= 0x01
    chunk.write_bytes(bytes(raw))
    lines = _status(cfg)["verified"]["damaged"][ARRAYS[0]]
    assert len(lines) == 1 and "chunk file c/2/0 (frames 4,000-5,999): does not match its CRC-32C" in lines[0]
    _without_checksums(tmp_path / "out.zarr" / ARRAYS[0])
    assert _status(cfg)["verified"]["damaged"] == {}  # the levels alone cannot see it


@pytest.mark.parametrize("checksums", [True, False])
def test_a_compressed_chunk_that_no_longer_decodes_is_named_and_the_command_fails(tmp_path, checksums):
    cfg = _filtered(tmp_path, dtype="float32", compression="lz4")
    if not checksums:
        _without_checksums(tmp_path / "out.zarr" / ARRAYS[0])
    chunk = tmp_path / "out.zarr" / ARRAYS[0] / "c" / "1" / "0"
    raw = bytearray(chunk.read_bytes())
    raw[len(raw) // 2 :] = b"\xff" * (len(raw) - len(raw) // 2)
    chunk.write_bytes(bytes(raw))
    toml = str(tmp_path / "twinpass.toml")
    plain = conftest.run_cli(["status", toml, "--require-complete"])  # without --verify: not read
    assert "verified:" not in plain.stdout
    proc = conftest.run_cli(["status", toml, "--require-complete", "--verify"], check=False)
    assert proc.returncode == 1, proc.stdout + proc.stderr
    assert "verified: 2 complete output(s), 5 block(s)" in proc.stdout and "1 output(s) do not match" in proc.stdout
    if checksums:  # the chunk file is named; its block is not read again
        assert f"  {ARRAYS[0]}: chunk file c/1/0 (frames 2,000-3,999): does not match its CRC-32C" in proc.stdout
        assert "cannot be read" not in proc.stdout
    else:
        assert f"  {ARRAYS[0]}: block 1 (frames 2,000-3,999): cannot be read" in proc.stdout
    assert "delete each such output's folder in the store" in proc.stdout
    assert "whose stored samples no longer match" in proc.stderr
    as_json = json.loads(conftest.run_cli(["status", toml, "--json", "--verify"]).stdout)
    assert list(as_json["verified"]["damaged"]) == [ARRAYS[0]]


def test_deleting_a_damaged_output_and_running_again_restores_it(tmp_path):
    # The remedy the verification gives: the run filters a file whose output is gone anew.
    cfg = _filtered(tmp_path)
    good = conftest.read_output(cfg.store_location, ARRAYS)
    chunk = tmp_path / "out.zarr" / ARRAYS[1] / "c" / "0" / "0"
    chunk.write_bytes(chunk.read_bytes()[::-1])
    assert ARRAYS[1] in _status(cfg)["verified"]["damaged"]
    shutil.rmtree(tmp_path / "out.zarr" / ARRAYS[1])
    assert run_job(cfg).ok
    assert _status(cfg)["verified"]["damaged"] == {}
    np.testing.assert_array_equal(conftest.read_output(cfg.store_location, ARRAYS)[1], good[1])


@pytest.mark.parametrize("checksums", [True, False])
def test_a_truncated_or_extended_chunk_file_is_named_by_its_size(tmp_path, checksums):
    # A chunk cut short can still decode, into wrong samples whose RMS and peak may not
    # change. Its checksum (CRC-32C of the bytes before the last four) no longer matches; in
    # an output without checksums its size no longer matches its Blosc header's compressed
    # size (bytes 12-16 of the Blosc version-1 header), or for an uncompressed chunk its
    # values' bytes (2000 frames x 2 channels x 8 bytes = 32,000 for float64).
    def damaged(cfg, folder, name, cut):
        if not checksums:
            _without_checksums(folder / "out.zarr" / name)
        raw = chunk_of(folder, name).read_bytes()
        chunk_of(folder, name).write_bytes(cut(raw))
        return _status(cfg)["verified"]["damaged"][name], len(raw)

    def chunk_of(folder, name):
        return folder / "out.zarr" / name / "c" / ("1" if name == ARRAYS[1] else "2") / "0"

    crc = "does not match its CRC-32C checksum: changed since it was written (damaged, truncated or edited)"
    cfg = _filtered(tmp_path, dtype="float32", compression="lz4")
    lines, size = damaged(cfg, tmp_path, ARRAYS[1], lambda raw: raw[:-100])
    assert lines == ["chunk file c/1/0 (frames 2,000-3,999): " + (crc if checksums else (
        f"holds {size - 100:,} compressed bytes, where its compression header says {size:,} (truncated or "
        "extended since)"))]
    plain = tmp_path / "plain"
    plain.mkdir()
    cfg2 = _filtered(plain)
    lines, _ = damaged(cfg2, plain, ARRAYS[0], lambda raw: raw + b"\0" * 8)
    assert lines == ["chunk file c/2/0 (frames 4,000-5,999): " + (
        crc if checksums else "holds 32,008 bytes of values, where its values take 32,000")]


def test_levels_below_the_float32_range_stored_as_zero_are_no_false_alarm(tmp_path):
    # Carry mode continues a burst's decaying response into blocks of exact zeros: about
    # 0.85**t for this 5 Hz low-pass at 200 Hz, far below float32's smallest value (1.4e-45,
    # IEEE 754 binary32) after a few hundred samples, so a float32 output stores 0 there
    # while the block recorded its float64 level.
    archive = tmp_path / "archive"
    x = np.zeros((20000, 1))
    x[100:400, 0] = np.random.default_rng(3).standard_normal(300)
    write_stream(archive, "q", x, FS, [20000])
    cfg = load_config(write_config(tmp_path, response={"kind": "lowpass", "family": "butterworth", "order": 4,
                                                       "cutoff_hz": 5.0},
                                   processing={"block_seconds": 10.0, "mode": "carry"},
                                   output={"dtype": "float32", "compression": "lz4"}))
    assert run_job(cfg).ok
    table = OutputStore.open(cfg.store_location, mode="r").read_block_table("q/q_20260301T000000")
    peaks = np.asarray(table.figures)[:, 0, list(table.columns).index("peak_out")]
    assert np.any((peaks > 0) & (peaks < 1e-45))  # such blocks exist in this run
    assert _status(cfg)["verified"]["damaged"] == {}


def test_a_chunk_failing_its_checksum_is_a_store_error_and_the_report_is_still_written(tmp_path):
    # Zarr's crc32c codec refuses the chunk; the store says which frames and what to do, and
    # the report, which reads outputs for its before/after plot, passes over that output.
    from twinpass.errors import StoreError

    cfg = _filtered(tmp_path, compression="none")
    for name in ARRAYS:
        for chunk in (tmp_path / "out.zarr" / name / "c").rglob("*"):
            if chunk.is_file():
                raw = bytearray(chunk.read_bytes())
                raw[9] ^= 0x10
                chunk.write_bytes(bytes(raw))
    store = OutputStore.open(cfg.store_location, mode="r")
    with pytest.raises(StoreError, match=r"frames \[0, 2000\) cannot be read: a chunk file does not match its "
                                         r"CRC-32C checksum .*twinpass status --verify"):
        store.read(ARRAYS[0], 0, 2000)
    out = tmp_path / "r.html"
    proc = conftest.run_cli(["report", str(tmp_path / "twinpass.toml"), "--output", str(out)], check=False)
    assert proc.returncode == 0 and "Traceback" not in proc.stderr, proc.stdout + proc.stderr
    assert out.stat().st_size > 0
