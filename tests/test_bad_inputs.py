"""A catalogue of bad inputs: each test builds the bad file and checks what a run makes of it.

Every bad file must be reported by discovery (and so by ``twinpass plan`` and a run) with its
path, the place of the problem (byte offset, header field, sample, other file) and what to do,
while the rest of the archive is processed.

References:
* WAV byte layouts: Microsoft "Multiple channel audio data and WAVE files" (RIFF size at
  byte 4 = file size - 8; ``fmt `` format tags 0x0001 PCM, 0x0002 Microsoft ADPCM, 0x0003 IEEE
  float, 0x0007 mu-law); good WAV files are written with scipy.io.wavfile, bad ones by hand
  (tests/wavtools.py) starting from scipy's bytes.
* NPY layout: numpy.lib.format (written with numpy.save).
* Integer full scale: common practice, integer PCM / 2**(bits - 1) (8-bit unsigned offset by
  128); the stored integers are read back with scipy.io.wavfile and Python's wave module.
* Whole-signal two-pass reference: scipy.signal.sosfiltfilt.
* Everything about which file is left out and what the message says is a twinpass rule.
"""

from __future__ import annotations

import datetime as dt
import json
import struct
import wave
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from scipy import signal

from twinpass import cli
from twinpass.config import JobConfig, load_config, parse_config
from twinpass.core.checks import FAIL, FIGURES
from twinpass.errors import ConfigError
from twinpass.io.archive import discover
from twinpass.io.readers import open_recording
from twinpass.io.store import OutputStore
from twinpass.job import RunResult, run_job
from conftest import config_text, run_cli
from wavtools import ADPCM, EXTENSIBLE, MULAW, PCM, chunk, data_offset, fmt_chunk, pack_int24, riff

UTC = dt.timezone.utc
T0 = dt.datetime(2026, 3, 1, tzinfo=UTC)
RATE = 100
PATTERN = "{stream}/{stream}_{start:%Y%m%dT%H%M%S}"
RESPONSE: dict[str, Any] = {
    "kind": "lowpass",
    "passband_hz": [10.0],
    "stopband_hz": [20.0],
    "passband_ripple_db": 1.0,
    "stopband_attenuation_db": 40.0,
}


# -- helpers shared with test_safety.py and test_nonfinite.py ---------------------------


def write_config(folder: Path, *, name: str = "job.toml", **tables: dict[str, Any]) -> Path:
    """Write a job configuration into ``folder``; tables given override the defaults.

    Defaults: the low-pass RESPONSE, archive root ``archive`` (all built-in suffixes), store
    ``out/filtered.zarr``, one thread and no retries.
    """
    body: dict[str, dict[str, Any]] = {
        "response": dict(RESPONSE),
        "archive": {"root": "archive"},
        "output": {"store": "out/filtered.zarr"},
        "engine": {"scheduler": "threads", "workers": 1, "retries": 0, "retry_backoff_seconds": 0.0},
    }
    for table, values in tables.items():
        body.setdefault(table, {}).update(values)
    path = folder / name
    path.write_text(config_text(body))
    return path


def load(folder: Path, **tables: dict[str, Any]) -> JobConfig:
    return load_config(write_config(folder, **tables))


def stem(stream: str, start: dt.datetime = T0) -> str:
    """Relative path without suffix that PATTERN names ``stream`` starting at ``start``."""
    return f"{stream}/{stream}_{start:%Y%m%dT%H%M%S}"


def noise(frames: int, channels: int = 1, seed: int = 0, scale: float = 0.3) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal((frames, channels)) * scale


def put(root: Path, rel: str, blob: bytes) -> Path:
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_bytes(blob)
    return p


def write_wav(root: Path, rel: str, data: np.ndarray, rate: int = RATE) -> Path:
    """A WAV file written by scipy.io.wavfile (int16/int32 PCM or IEEE float by dtype)."""
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    wavfile.write(p, rate, data)
    return p


def write_npy(root: Path, rel: str, data: np.ndarray) -> Path:
    """An NPY file written by numpy.save."""
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    np.save(p, data)
    return p


def pcm16(frames: int, channels: int = 1, seed: int = 0) -> np.ndarray:
    return (noise(frames, channels, seed) * 8000).astype(np.int16)


def run(cfg: JobConfig, **kw: Any) -> RunResult:
    """One run without Prefect on one local thread."""
    return run_job(cfg, scheduler="threads", workers=1, **kw)


def invalid_by_path(cfg: JobConfig) -> dict[str, Any]:
    return {b.path: b for b in discover(cfg).invalid}


# -- the catalogue ----------------------------------------------------------------------
# Each builder writes one bad file (or a pair) under ``root`` and returns
# {relpath: (text expected in the reason, text expected in the remedy)}.

Expect = dict[str, tuple[list[str], list[str]]]
REMEDY_EXCLUDE = "[archive] exclude"


def bad_truncated_mid_frame(root: Path) -> Expect:
    rel = stem("trunc") + ".wav"
    p = write_wav(root, rel, pcm16(1000, 2))
    blob = p.read_bytes()
    p.write_bytes(blob[:-3])  # the last frame loses 3 of its 4 bytes
    at = data_offset(blob) - 8
    return {rel: ([f"data chunk at byte {at}", "claims 4000 bytes = 1000 frames", "3997 bytes",
                   "999 whole frames"], ['[archive] truncated = "warn"', REMEDY_EXCLUDE])}


def bad_header_claims_more(root: Path) -> Expect:
    rel = stem("claims") + ".wav"
    p = write_wav(root, rel, pcm16(1000))
    blob = bytearray(p.read_bytes())
    at = data_offset(bytes(blob)) - 8
    blob[at + 4: at + 8] = struct.pack("<I", 4000)  # 2000 frames claimed, 1000 present
    blob[4:8] = struct.pack("<I", len(blob) - 8 + 2000)
    p.write_bytes(bytes(blob))
    return {rel: ([f"data chunk at byte {at}", "claims 4000 bytes = 2000 frames", "1000 whole frames"],
                  ['[archive] truncated = "warn"'])}


def bad_npy_shape_claims_more(root: Path) -> Expect:
    rel = stem("npyshort") + ".npy"
    p = write_npy(root, rel, noise(1000, 2).astype(np.float32))
    p.write_bytes(p.read_bytes()[:-800])  # 100 frames of 8 bytes gone
    return {rel: (["NPY header claims 1000 frames"], ['[archive] truncated = "warn"'])}


def bad_riff_size_too_small(root: Path) -> Expect:
    rel = stem("riffsmall") + ".wav"
    p = write_wav(root, rel, pcm16(500))
    blob = bytearray(p.read_bytes())
    blob[4:8] = struct.pack("<I", 28)  # RIFF chunk ends right after the fmt chunk
    p.write_bytes(bytes(blob))
    return {rel: (["no 'data' chunk", "RIFF size at byte 4 (28)", "file size minus 8"], [REMEDY_EXCLUDE])}


def bad_mulaw(root: Path) -> Expect:
    rel = stem("mulaw") + ".wav"
    put(root, rel, riff([fmt_chunk(MULAW, 1, 8000, 8), chunk(b"data", bytes(range(200)))]))
    return {rel: (["format tag 0x0007 (mu-law)", "fmt chunk at byte 12", "convert the file to PCM or IEEE float"],
                  [REMEDY_EXCLUDE])}


def bad_adpcm(root: Path) -> Expect:
    rel = stem("adpcm") + ".wav"
    put(root, rel, riff([fmt_chunk(ADPCM, 1, 8000, 4, block_align=256), chunk(b"data", bytes(512))]))
    return {rel: (["format tag 0x0002 (Microsoft ADPCM)", "convert the file to PCM or IEEE float"], [REMEDY_EXCLUDE])}


def bad_extensible_mulaw(root: Path) -> Expect:
    rel = stem("extmulaw") + ".wav"
    put(root, rel, riff([fmt_chunk(EXTENSIBLE, 1, 8000, 8, sub_tag=MULAW), chunk(b"data", bytes(100))]))
    return {rel: (["sub-format 0x0007 (mu-law)", "fmt chunk at byte 12", "is not supported"], [REMEDY_EXCLUDE])}


def bad_zero_byte_wav(root: Path) -> Expect:
    rel = stem("emptywav") + ".wav"
    put(root, rel, b"")
    return {rel: (["0 bytes"], [REMEDY_EXCLUDE])}


def bad_zero_byte_npy(root: Path) -> Expect:
    rel = stem("emptynpy") + ".npy"
    put(root, rel, b"")
    return {rel: (["not an NPY file"], [REMEDY_EXCLUDE])}


def bad_empty_data_chunk(root: Path) -> Expect:
    rel = stem("nodata") + ".wav"
    put(root, rel, riff([fmt_chunk(PCM, 1, RATE, 16), chunk(b"data", b"")]))
    return {rel: (["holds no whole frame", "the recording is empty"], [REMEDY_EXCLUDE])}


def bad_zero_data_size_before_samples(root: Path) -> Expect:
    # A recording whose header was never finished: data size 0, the samples after it.
    rel = stem("unfinished") + ".wav"
    fmt = fmt_chunk(PCM, 1, RATE, 16)
    put(root, rel, riff([fmt, chunk(b"data", b"", size=0)]) + pcm16(400).tobytes())
    at = 12 + len(fmt) + 4
    return {rel: ([f"declares 0 bytes (its size field at byte {at})", "800 bytes = 400 whole frames",
                   "the size field looks wrong"],
                  [f"rewrite its header with the real sizes (data size 800 at byte {at}, RIFF size {at + 4 + 800 - 8} "
                   "at byte 4)", REMEDY_EXCLUDE])}


def bad_zero_byte_raw(root: Path) -> Expect:
    rel = stem("emptyraw") + ".bin"
    put(root, rel, b"")
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = 1\nsample_rate_hz = 100.0\n')
    return {rel: (["holds no frames"], [REMEDY_EXCLUDE])}


def bad_raw_without_sidecar(root: Path) -> Expect:
    rel = stem("nosidecar") + ".bin"
    put(root, rel, pcm16(400).tobytes())
    return {rel: (["needs a sidecar", f"{rel}.toml"],
                  [f"write its sidecar {root / rel}.toml", 'dtype = "int16", channels = 2', REMEDY_EXCLUDE])}


def bad_sidecar_frames_contradict_size(root: Path) -> Expect:
    rel = stem("sidecarframes") + ".bin"
    put(root, rel, pcm16(400).tobytes())
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = 1\nsample_rate_hz = 100.0\nframes = 500\n')
    return {rel: (["declares frames = 500", "holds 400 frames of 2 bytes"],
                  [f"fix frames (or dtype, channels, header_bytes) in its sidecar {root / rel}.toml", REMEDY_EXCLUDE])}


def bad_sidecar_dtype_contradicts_size(root: Path) -> Expect:
    rel = stem("sidecarsize") + ".bin"
    put(root, rel, bytes(801))  # 801 bytes cannot be whole 2-byte frames
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = 1\nsample_rate_hz = 100.0\n')
    return {rel: (["801 data bytes", "not a whole number of 2-byte frames", "400 frames + 1 bytes"],
                  [f"check dtype, channels and header_bytes in its sidecar {root / rel}.toml", REMEDY_EXCLUDE])}


def bad_sidecar_key(root: Path) -> Expect:
    rel = stem("sidecarkey") + ".bin"
    put(root, rel, pcm16(400).tobytes())
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = "1"\nsample_rate_hz = 100.0\n')
    return {rel: (["channels must be an integer >= 1, got '1'"], [f"correct its sidecar {root / rel}.toml",
                                                                  REMEDY_EXCLUDE])}


def bad_sidecar_rate_far_too_low(root: Path) -> Expect:
    # 400 frames at 1e-30 Hz would last 4e32 s: past year 9999, where Python's datetime ends.
    rel = stem("sidecarrate") + ".bin"
    put(root, rel, pcm16(400).tobytes())
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = 1\nsample_rate_hz = 1e-30\n')
    return {rel: (["400 frames at 1e-30 Hz", "would end after year 9999"], ["check the sample rate"])}


def bad_sidecar_gain_zero(root: Path) -> Expect:
    # y = x * gain + offset with gain 0 is the offset alone: no signal left (twinpass rule: refused)
    rel = stem("sidecargain") + ".bin"
    put(root, rel, pcm16(400).tobytes())
    put(root, rel + ".toml", b'dtype = "int16"\nchannels = 1\nsample_rate_hz = 100.0\ngain = 0.0\n')
    return {rel: ([f"{rel}.toml: gain = 0", "set gain to"], [REMEDY_EXCLUDE])}


def bad_nan_run_fail_policy(root: Path) -> Expect:
    rel = stem("nanfail") + ".wav"
    x = noise(1000, 2).astype(np.float32)
    x[300:350, 1] = np.nan
    x[600, 0] = np.inf
    write_wav(root, rel, x)
    return {rel: (["NaN/Inf at samples 300-349 (50 samples) of channel 1", "and in 1 more run(s)",
                   "the longest run of one channel is 50 samples"],
                  ['nonfinite = "split"', '"interpolate" with max_fill_samples >= 50', "repair the file"])}


def bad_overlap(root: Path) -> Expect:
    first, second = stem("ovl") + ".wav", stem("ovl", T0 + dt.timedelta(seconds=5)) + ".wav"
    write_wav(root, first, pcm16(1000))  # 10 s at 100 Hz
    write_wav(root, second, pcm16(1000, seed=1))  # starts 5 s into the first
    return {second: ([f"overlaps {first}", "by 500.0 samples"], ["correct the start time", REMEDY_EXCLUDE])}


def bad_hidden_output_name(root: Path) -> Expect:
    rel = "hid/.hid_20260301T000000.wav"
    write_wav(root, rel, pcm16(300))
    return {rel: (["cannot name its output", "starts with '.'"], ["rename the file"])}


def bad_output_name_clash(root: Path) -> Expect:
    keep, clash = stem("cl ash") + ".wav", stem("cl_ash") + ".wav"  # different streams, one output name
    write_wav(root, keep, pcm16(300))
    write_wav(root, clash, pcm16(300, seed=3))
    return {clash: ([f"output array name {stem('cl_ash')!r} clashes with that of {keep}"],
                    ["rename the file"])}


CATALOGUE: list[Callable[[Path], Expect]] = [
    bad_truncated_mid_frame,
    bad_header_claims_more,
    bad_npy_shape_claims_more,
    bad_riff_size_too_small,
    bad_mulaw,
    bad_adpcm,
    bad_extensible_mulaw,
    bad_zero_byte_wav,
    bad_zero_byte_npy,
    bad_empty_data_chunk,
    bad_zero_data_size_before_samples,
    bad_zero_byte_raw,
    bad_raw_without_sidecar,
    bad_sidecar_frames_contradict_size,
    bad_sidecar_dtype_contradicts_size,
    bad_sidecar_key,
    bad_sidecar_rate_far_too_low,
    bad_sidecar_gain_zero,
    bad_nan_run_fail_policy,
    bad_overlap,
    bad_hidden_output_name,
    bad_output_name_clash,
]


def _check_reported(invalid: dict[str, Any], expect: Expect) -> None:
    for rel, (in_reason, in_remedy) in expect.items():
        assert rel in invalid, f"{rel} not reported; reported: {sorted(invalid)}"
        bad = invalid[rel]
        reason, remedy = (bad["reason"], bad["remedy"]) if isinstance(bad, dict) else (bad.reason, bad.remedy)
        for text in in_reason:
            assert text in reason, f"{rel}: {text!r} not in reason {reason!r}"
        for text in in_remedy:
            assert text in remedy, f"{rel}: {text!r} not in remedy {remedy!r}"
            assert (reason + remedy).count(text) == 1, f"{rel}: {text!r} said twice in {reason!r} / {remedy!r}"


def _good_files(root: Path) -> list[str]:
    """Two contiguous files of one stream and a float NPY-free stream: all must complete."""
    a, b = stem("good") + ".wav", stem("good", T0 + dt.timedelta(seconds=20)) + ".wav"
    write_wav(root, a, pcm16(2000, 2, seed=10))
    write_wav(root, b, pcm16(2000, 2, seed=11))
    return [a, b]


@pytest.mark.parametrize("build", CATALOGUE, ids=lambda f: f.__name__)
def test_discovery_reports_bad_file_with_place_and_remedy(tmp_path, build):
    root = tmp_path / "archive"
    expect = build(root)
    good = _good_files(root)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    segments, invalid = discover(cfg).segments()
    _check_reported({b.path: b for b in invalid}, expect)
    valid = {f for s in segments for f in s.relpaths}
    assert set(good) <= valid
    assert not set(expect) & valid


def test_whole_catalogue_in_one_run_processes_the_rest(tmp_path, capsys):
    """plan --json and a run: every bad file reported once; the good files complete."""
    root = tmp_path / "archive"
    expect: Expect = {}
    for build in CATALOGUE:
        expect.update(build(root))
    good = _good_files(root)
    kept = [stem("ovl") + ".wav", stem("cl ash") + ".wav"]  # first of a clashing pair
    config = write_config(tmp_path, archive={"name_pattern": PATTERN})

    assert cli.main(["plan", str(config), "--json"]) == cli.EXIT_LEFT_OUT  # the bad files are left out
    planned = json.loads(capsys.readouterr().out)
    rows = {f["path"]: f for f in planned["files"]}
    _check_reported({p: r for p, r in rows.items() if r["status"] == "invalid"}, expect)
    assert {rows[p]["status"] for p in good + kept} == {"new"}
    assert planned["totals"]["files"]["invalid"] == len(expect)

    res = run(load_config(config))
    _check_reported({b.relpath: b for b in res.invalid}, expect)
    done = {o.relpath: o.status for o in res.outcomes}
    assert done == {p: "complete" for p in good + kept}
    store = OutputStore.open(load_config(config).store_location, mode="r")
    assert set(store.file_records()) == set(good + kept)


def test_truncated_file_is_read_to_its_last_whole_frame_when_asked(tmp_path):
    root = tmp_path / "archive"
    (rel,) = bad_truncated_mid_frame(root)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN, "truncated": "warn"})
    disc = discover(cfg)
    assert [f.relpath for f in disc.files] == [rel] and disc.files[0].frames == 999
    assert any(w.startswith(rel + ": ") and "999" in w for w in disc.warnings)
    # The finding reaches the user: in the plan, in the run's lines and in the status.
    from twinpass.job import prepare
    from twinpass.status import collect_status, format_status

    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    assert any(n.startswith(rel + ": ") and "999" in n for n in prepare(cfg, store).plan.notes)
    lines: list[str] = []
    res = run_job(cfg, log_fn=lines.append)
    assert [o.status for o in res.outcomes] == ["complete"]
    assert any(line.startswith(f"note: {rel}: ") and "999" in line for line in lines), lines
    text = format_status(collect_status(OutputStore.open(cfg.store_location, mode="r")))
    assert "notes of the last run: 1" in text and rel in text.split("notes of the last run: 1")[1]


def test_riff_size_larger_than_the_file_is_a_warning_only(tmp_path):
    root = tmp_path / "archive"
    rel = stem("rifflarge") + ".wav"
    p = write_wav(root, rel, pcm16(500))
    blob = bytearray(p.read_bytes())
    blob[4:8] = struct.pack("<I", len(blob) + 1000)
    p.write_bytes(bytes(blob))
    disc = discover(load(tmp_path, archive={"name_pattern": PATTERN}))
    assert [f.relpath for f in disc.files] == [rel] and disc.files[0].frames == 500
    assert any(w.startswith(rel + ": ") and "RIFF size at byte 4" in w for w in disc.warnings)


def test_rate_change_within_a_stream_starts_a_segment_and_is_noted(tmp_path, capsys):
    root = tmp_path / "archive"
    a, b = stem("mixed") + ".wav", stem("mixed", T0 + dt.timedelta(seconds=10)) + ".wav"
    write_wav(root, a, pcm16(1000), rate=100)  # 10 s
    write_wav(root, b, pcm16(2000, seed=2), rate=200)  # follows without a gap, at 200 Hz
    config = write_config(tmp_path, archive={"name_pattern": PATTERN})
    assert cli.main(["plan", str(config), "--json"]) == 0
    planned = json.loads(capsys.readouterr().out)
    (note,) = planned["notes"]
    for text in ("sample rate 100 Hz -> 200 Hz", a, b, "different streams"):
        assert text in note
    rows = {f["path"]: f for f in planned["files"]}
    assert rows[a]["segment"] != rows[b]["segment"] and {rows[a]["status"], rows[b]["status"]} == {"new"}


# -- integer full scale ----------------------------------------------------------------


def _extremes(dtype: type, frames: int = 1200) -> np.ndarray:
    """Runs of the most negative and most positive code, with a full-scale square wave."""
    info = np.iinfo(dtype)
    x = np.empty((frames, 2), dtype=dtype)
    x[:, 0] = np.where((np.arange(frames) // 37) % 2, info.max, info.min)
    x[:, 1] = info.max
    x[frames // 2 :, 1] = info.min
    return x


def _wav24(root: Path, rel: str, codes: np.ndarray) -> Path:
    """A 24-bit PCM WAV (2 channels) built from integer codes."""
    data = pack_int24(codes.reshape(-1))
    return put(root, rel, riff([fmt_chunk(PCM, 2, RATE, 24), chunk(b"data", data)]))


def test_integer_extremes_read_exactly(tmp_path):
    root = tmp_path / "archive"
    cases = {}
    for dtype in (np.int16, np.int32):
        rel = stem(f"full{np.dtype(dtype).itemsize * 8}") + ".wav"
        write_wav(root, rel, _extremes(dtype))
        cases[rel] = np.dtype(dtype).itemsize * 8
    codes24 = np.array([[-(2**23), 2**23 - 1], [2**23 - 1, -(2**23)]] * 600, dtype=np.int64)
    rel24 = stem("full24") + ".wav"
    _wav24(root, rel24, codes24)
    for rel, bits in cases.items():
        _rate, ref = wavfile.read(root / rel)  # scipy.io.wavfile as the reference decoder
        with open_recording(root / rel) as rec:
            x = rec.read(0, rec.info.frames)
        np.testing.assert_array_equal(x, ref / 2.0 ** (bits - 1))
        assert x.min() == -1.0 and x.max() == (2 ** (bits - 1) - 1) / 2 ** (bits - 1)
    with wave.open(str(root / rel24), "rb") as w:  # Python's wave module: raw little-endian frames
        raw = w.readframes(w.getnframes())
    ref24 = np.array([int.from_bytes(raw[i: i + 3], "little", signed=True) for i in range(0, len(raw), 3)])
    with open_recording(root / rel24) as rec:
        x24 = rec.read(0, rec.info.frames)
    np.testing.assert_array_equal(x24.reshape(-1), ref24 / 2.0**23)
    assert x24.min() == -1.0 and x24.max() == (2**23 - 1) / 2**23


def test_integer_extremes_filter_to_finite_output_without_clipping(tmp_path):
    root = tmp_path / "archive"
    rels = {}
    for dtype in (np.int16, np.int32):
        rel = f"full{np.dtype(dtype).itemsize * 8}.wav"
        write_wav(root, rel, _extremes(dtype))
        rels[rel] = np.dtype(dtype).itemsize * 8
    _wav24(root, "full24.wav", np.array([[-(2**23), 2**23 - 1]] * 600 + [[2**23 - 1, -(2**23)]] * 600))
    rels["full24.wav"] = 24
    cfg = load(tmp_path, output={"dtype": "float64"})
    res = run(cfg)
    assert {o.relpath: o.status for o in res.outcomes} == {r: "complete" for r in rels}
    store = OutputStore.open(cfg.store_location, mode="r")
    design = res.designs[float(RATE)]
    clipped = list(FIGURES).index("clipped")
    for rel in rels:
        name = rel[:-4]
        with open_recording(root / rel) as rec:
            x = rec.read(0, rec.info.frames)
        y = store.read(name)
        assert y.dtype == np.float64 and np.all(np.isfinite(y))
        # whole-signal reference: scipy.signal.sosfiltfilt with the run's end extension
        pad = min(design.effective_length, x.shape[0] - 1)
        ref = signal.sosfiltfilt(design.sos, x, axis=0, padtype="odd", padlen=pad)
        assert np.max(np.abs(y - ref)) <= 1e-9 * np.max(np.abs(x))
        assert np.max(np.abs(y)) > 1.0  # overshoot beyond full scale is kept, not clipped
        table = store.read_block_table(name)
        assert np.all(table.figures[..., clipped] == 0)
        assert set(table.counts()) >= {"pass"} and table.counts()["warn"] == 0


def test_output_beyond_the_float32_range_fails_its_blocks_without_a_python_warning(tmp_path, recwarn):
    # float64 input near 1e40 (float32's largest finite value is 3.4e38, IEEE 754 binary32):
    # a float32 output stores inf there, counted in the clipped figure. An infinity is not the
    # filtered value (twinpass rule): those blocks fail, the file is not marked complete and
    # the outcome names the setting that holds the values; the cast says nothing on the
    # terminal (no RuntimeWarning "overflow in cast").
    from conftest import make_signal, write_config, write_stream

    x = make_signal(4000, 1, 200.0, seed=4) * 1e40
    write_stream(tmp_path / "archive", "hot", x, 200.0, 1)
    cfg = load_config(write_config(tmp_path, output={"dtype": "float32", "compression": "none"}))
    res = run_job(cfg)
    (out,) = res.outcomes
    assert out.status == "failed" and res.counts()["complete"] == 0
    name = "hot/hot_20260301T000000"
    table = OutputStore.open(cfg.store_location, mode="r").read_block_table(name)
    clipped = table.figures[..., list(FIGURES).index("clipped")]
    assert np.sum(clipped) > 0
    failed = np.flatnonzero(np.asarray(table.status) == FAIL)
    assert failed.size and set(failed) == set(np.flatnonzero(np.sum(clipped, axis=-1) > 0))
    said = out.check_failures.summary
    assert "output sample(s) beyond the output type's range" in said
    assert 'What to do: set [output] dtype = "float64"' in said
    assert [r.complete for r in OutputStore.open(cfg.store_location, mode="r").file_records().values()] == [False]
    assert not [w for w in recwarn.list if "overflow encountered in cast" in str(w.message)]

    # The remedy: a float64 output holds the values; whole-signal reference scipy.signal.sosfiltfilt.
    cfg = load_config(write_config(tmp_path, output={"dtype": "float64", "compression": "none"}))
    res = run_job(cfg)
    assert [o.status for o in res.outcomes] == ["complete"]
    y = OutputStore.open(cfg.store_location, mode="r").read(name)
    design = res.designs[200.0]
    ref = signal.sosfiltfilt(design.sos, x, axis=0, padtype="odd", padlen=min(design.effective_length, len(x) - 1))
    assert y.dtype == np.float64 and np.all(np.isfinite(y))
    assert np.max(np.abs(y - ref)) <= 1e-8 * np.max(np.abs(x))


# -- configuration errors --------------------------------------------------------------

_BASE = '[response]\nkind = "lowpass"\npassband_hz = [10.0]\nstopband_hz = [20.0]\n' \
        "passband_ripple_db = 1.0\nstopband_attenuation_db = 40.0\n"


@pytest.mark.parametrize(
    "extra, expected",
    [
        ("[processing]\nnonfinit = \"split\"\n", ["unknown key(s) nonfinit in [processing]", "nonfinite"]),
        ("[outputs]\nstore = \"x.zarr\"\n", ["unknown table(s) [outputs]", "[output]"]),
        ("[processing]\nmax_fill_samples = \"ten\"\n", ["[processing] max_fill_samples", "whole number", "'ten'"]),
        ("[processing]\nmax_fill_samples = 2.5\n", ["[processing] max_fill_samples", "whole number"]),
        ("[processing]\nnonfinite = \"zero\"\n", ["[processing] nonfinite = 'zero'", "fail, split, interpolate"]),
        ("[archive]\ninclude = 3\n", ["[archive] include", "expected a string or a list of strings, got 3"]),
        ("[archive]\nexclude = [\"a\", 1]\n", ["[archive] exclude[1]", "expected a string"]),
        ("[engine]\nworkers = 0\n", ["[engine] workers must be >= 1"]),
        ("[processing]\ntolerance = 0.5\n", ["[processing] tolerance", "(0, 0.1)"]),
        ("[processing\n", ["not valid TOML"]),
    ],
)
def test_config_errors_name_table_and_key(extra, expected):
    with pytest.raises(ConfigError) as e:
        parse_config(_BASE + extra, source="job.toml")
    msg = str(e.value)
    assert msg.startswith("job.toml: ") and "\n" not in msg
    for text in expected:
        assert text in msg


@pytest.mark.parametrize("text, expected", [
    (_BASE.replace("[10.0]", '"10"'), "[response] passband_hz: expected a number (Hz) or a list of numbers (Hz), "
                                       "got '10'"),
    (_BASE.replace("[20.0]", "true"), "[response] stopband_hz: expected a number (Hz) or a list of numbers (Hz), "
                                       "got True"),
    ('[response]\nkind = "lowpass"\norder = 4\ncutoff_hz = "10"\n',
     "[response] cutoff_hz: expected a number (Hz) or a list of numbers (Hz), got '10'"),
])
def test_config_keys_taking_a_value_or_a_list_say_both(text, expected):
    """A key that takes one value or a list of them (a band edge in Hz) names both forms
    and the unit when given neither."""
    with pytest.raises(ConfigError) as e:
        parse_config(text, source="job.toml")
    assert str(e.value) == f"job.toml: {expected}"


@pytest.mark.parametrize("one, listed", [
    ('[response]\nkind = "lowpass"\norder = 4\ncutoff_hz = 10.0\n',
     '[response]\nkind = "lowpass"\norder = 4\ncutoff_hz = [10.0]\n'),
    (_BASE.replace("[10.0]", "10.0").replace("[20.0]", "20"), _BASE),
    (_BASE + '[archive]\ninclude = "**/*.wav"\n', _BASE + '[archive]\ninclude = ["**/*.wav"]\n'),
])
def test_config_single_value_is_a_list_of_one(one, listed):
    """A single band edge (``cutoff_hz = 10.0`` for a low-pass) or a single glob reads as the
    list of one it means, with the same settings digest (no rerun for the spelling)."""
    a, b = parse_config(one, source="job.toml"), parse_config(listed, source="job.toml")
    assert a.to_dict() == b.to_dict() and a.digest() == b.digest()


def test_config_single_edge_for_a_band_names_the_two_edges():
    text = _BASE.replace('kind = "lowpass"', 'kind = "bandpass"').replace("[10.0]", "10.0")
    with pytest.raises(ConfigError, match=r"job.toml: \[response\] passband_hz.*needs 2"):
        parse_config(text, source="job.toml")


def test_config_error_for_inconsistent_response():
    text = _BASE.replace("passband_hz = [10.0]", "passband_hz = [30.0]")  # passband above the stopband
    with pytest.raises(ConfigError, match="passband"):
        parse_config(text, source="job.toml")


def test_config_error_for_negative_fill_length():
    with pytest.raises(ConfigError, match="max_fill_samples"):
        parse_config(_BASE + "[processing]\nmax_fill_samples = -3\n", source="job.toml")


# Every number of the configuration is a finite quantity (the docstrings of the settings in
# twinpass.config: times in seconds, sizes in MiB, levels in dB, ratios). TOML 1.0 spells NaN
# and infinity as nan and inf; they are refused naming the table and the key.
NONFINITE_SETTINGS = [
    ("processing", "block_seconds", "nan"),
    ("processing", "block_seconds", "inf"),
    ("processing", "memory_budget_mib", "nan"),
    ("processing", "memory_budget_mib", "inf"),
    ("processing", "tolerance", "nan"),
    ("processing", "carry_threshold", "nan"),
    ("processing", "carry_threshold", "inf"),
    ("output", "chunk_seconds", "nan"),
    ("output", "chunk_seconds", "inf"),
    ("engine", "retry_backoff_seconds", "nan"),
    ("engine", "retry_backoff_seconds", "inf"),
    ("flow", "retry_delay_seconds", "nan"),
    ("flow", "retry_delay_seconds", "inf"),
    ("checks", "passband_warn_db", "nan"),
    ("checks", "passband_fail_db", "nan"),
    ("checks", "phase_warn_deg", "nan"),
    ("checks", "phase_fail_deg", "-inf"),
    ("checks", "stopband_margin_db", "nan"),
    ("checks", "coherence_min", "nan"),
    ("archive", "sample_rate_hz", "inf"),
]


@pytest.mark.parametrize("table, key, value", NONFINITE_SETTINGS)
def test_config_refuses_nan_and_infinite_numbers(table, key, value):
    with pytest.raises(ConfigError) as e:
        parse_config(_BASE + f"[{table}]\n{key} = {value}\n", source="job.toml")
    msg = str(e.value)
    assert msg.startswith(f"job.toml: [{table}] {key} = ") and "not a finite number" in msg, msg


# Valid ranges as the settings' docstrings in twinpass.config and README "Checks, status and
# report" state them: seam_samples in [0, 4096] (0 = seam check off), coherence_min in [0, 1], the
# passband and phase thresholds >= 0 with warn <= fail (grade() warns above the first and fails
# above the second), stopband_margin_db >= 0, retries and retry delays >= 0, carry_threshold > 0,
# max_channels >= 1.
OUT_OF_RANGE = [
    ("checks", "seam_samples = -3", "seam_samples = -3", "0 turns the seam check off"),
    ("checks", "seam_samples = 4097", "seam_samples = 4097", "[0, 4096]"),
    ("checks", "coherence_min = 2.0", "coherence_min = 2.0", "[0, 1]"),
    ("checks", "coherence_min = -0.1", "coherence_min = -0.1", "[0, 1]"),
    ("checks", "passband_fail_db = -1.0", "passband_fail_db = -1.0", ">= 0"),
    ("checks", "passband_warn_db = -1.0", "passband_warn_db = -1.0", ">= 0"),
    ("checks", "phase_fail_deg = -20.0", "phase_fail_deg = -20.0", ">= 0"),
    ("checks", "passband_warn_db = 4.0", "passband_warn_db = 4.0", "must not exceed passband_fail_db = 1.0"),
    ("checks", "phase_warn_deg = 30.0", "phase_warn_deg = 30.0", "must not exceed phase_fail_deg = 20.0"),
    ("checks", "phase_warn_deg = -5.0", "phase_warn_deg = -5.0", ">= 0"),
    ("checks", "stopband_margin_db = -1.0", "stopband_margin_db = -1.0", ">= 0"),
    ("flow", "retries = -1", "retries = -1", ">= 0"),
    ("flow", "retry_delay_seconds = -5.0", "retry_delay_seconds = -5.0", ">= 0"),
    ("engine", "retry_backoff_seconds = -0.5", "retry_backoff_seconds = -0.5", ">= 0"),
    ("processing", "carry_threshold = 0.0", "carry_threshold = 0.0", 'set mode = "carry" or "halo"'),
    ("processing", "carry_threshold = -1.0", "carry_threshold = -1.0", "> 0"),
    ("archive", "sample_rate_hz = 0.0", "sample_rate_hz = 0.0", "> 0"),
    ("archive", "max_channels = 0", "max_channels = 0", ">= 1"),
]


@pytest.mark.parametrize("table, lines, named, rule", OUT_OF_RANGE)
def test_config_refuses_values_out_of_their_documented_range(table, lines, named, rule):
    with pytest.raises(ConfigError) as e:
        parse_config(_BASE + f"[{table}]\n{lines}\n", source="job.toml")
    msg = str(e.value)
    assert msg.startswith(f"job.toml: [{table}] {named} ") and rule in msg and "\n" not in msg, msg


@pytest.mark.parametrize("table, lines", [
    ("checks", "seam_samples = 0"),
    ("checks", "seam_samples = 4096"),
    ("checks", "coherence_min = 0.0"),
    ("checks", "coherence_min = 1.0"),
    ("checks", "passband_warn_db = 0.0\npassband_fail_db = 0.0"),
    ("checks", "phase_warn_deg = 20.0"),
    ("checks", "stopband_margin_db = 0.0"),
    ("flow", "retries = 0\nretry_delay_seconds = 0.0"),
    ("engine", "retry_backoff_seconds = 0.0"),
    ("processing", "carry_threshold = 0.01"),
    ("archive", "max_channels = 1"),
])
def test_config_accepts_the_ends_of_the_documented_ranges(table, lines):
    parse_config(_BASE + f"[{table}]\n{lines}\n", source="job.toml")


def test_cli_config_error_is_one_line_and_exit_status_2(tmp_path):
    config = tmp_path / "job.toml"
    config.write_text(_BASE + "[archive]\nroot = \"archive\"\nglob = \"*.wav\"\n")
    proc = run_cli(["plan", str(config)], check=False)
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith(f"twinpass: error: {config}: unknown key(s) glob in [archive]")
    assert proc.stdout == ""


@pytest.mark.parametrize("command", ["plan", "run"])
def test_cli_missing_config_and_bad_value_exit_2(tmp_path, capsys, command):
    args = [command, str(tmp_path / "nope.toml")] + (["--no-flow"] if command == "run" else [])
    assert cli.main(args) == 2
    assert capsys.readouterr().err.strip() == f"twinpass: error: {tmp_path / 'nope.toml'}: configuration file not found"
    config = write_config(tmp_path, output={"dtype": "float16"})
    args[1] = str(config)
    assert cli.main(args) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "[output] dtype = 'float16' is not one of: float32, float64" in err


def test_plain_riff_over_4_gib_with_wrapped_sizes_is_left_out_unless_asked(tmp_path):
    from test_readers import _wrapped_riff

    root = tmp_path / "archive"
    rel = stem("huge") + ".wav"
    (root / rel).parent.mkdir(parents=True)
    frames, _head, _tail = _wrapped_riff(root / rel)  # sparse: no 4 GiB written
    expect = {rel: (["over 4 GiB", "declares", "wrapped at 4 GiB", f"lose most of the {frames} frames"],
                    ["rewrite the file as RF64", '[archive] wrapped_sizes = "read"', REMEDY_EXCLUDE])}
    _check_reported(invalid_by_path(load(tmp_path, archive={"name_pattern": PATTERN})), expect)
    assert "reader option" not in invalid_by_path(load(tmp_path, archive={"name_pattern": PATTERN}))[rel].reason
    disc = discover(load(tmp_path, archive={"name_pattern": PATTERN, "wrapped_sizes": "read"}))
    assert [(f.relpath, f.frames) for f in disc.files] == [(rel, frames)]
    assert any(w.startswith(rel + ": ") and f"read all {frames} whole frames" in w for w in disc.warnings)


def test_a_name_clash_keeps_the_file_that_already_owns_the_output(tmp_path):
    root = tmp_path / "archive"
    owner, newcomer = stem("cl_ash") + ".wav", stem("cl ash") + ".wav"  # "cl ash" sorts first
    write_wav(root, owner, pcm16(300))
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    assert {o.relpath: o.status for o in run(cfg).outcomes} == {owner: "complete"}
    name = stem("cl_ash")
    before = OutputStore.open(cfg.store_location, mode="r").read(name)

    write_wav(root, newcomer, pcm16(300, seed=3))
    res = run(cfg)
    assert {o.relpath: o.status for o in res.outcomes} == {owner: "skipped"}
    (bad,) = res.invalid
    assert bad.relpath == newcomer
    assert f"output array name {name!r} clashes with that of {owner}" in bad.reason
    assert "which the output store already records as the source" in bad.reason and "rename the file" in bad.remedy
    store = OutputStore.open(cfg.store_location, mode="r")
    np.testing.assert_array_equal(store.read(name), before)
    assert store.file_records()[owner].array_name == name and newcomer not in store.file_records()
    # without a store's records the first by path is kept, as before
    assert {b.path for b in discover(cfg).invalid} == {owner}
