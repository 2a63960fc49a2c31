"""The invented demo archive (24-bit WAV files) and the example configurations.

References: Python's ``wave`` module and ``scipy.io.wavfile`` read the files back (the WAV
format's RIFF layout: Microsoft/IBM "Multimedia Programming Interface and Data
Specifications 1.0", 1991, from memory); ``scipy.signal.welch`` is the reference periodogram;
``twinpass.config.load_config`` validates the configurations.
"""

from __future__ import annotations

import datetime as dt
import re
import struct
import wave
from pathlib import Path

import numpy as np
import pytest
from scipy import signal
from scipy.io import wavfile

from twinpass.config import load_config
from twinpass.demo import (
    DEMO_SCENARIO,
    demo_config_text,
    demo_signal,
    write_demo_archive,
)
from twinpass.errors import ArchiveError, ConfigError

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
RATE = 200
HOUR = 3600 * RATE

# Written by hours=2: relative path -> whole frames in the file.
EXPECTED_2H = {
    "deck-north/deck-north_20260301T000000.wav": HOUR,
    "deck-north/deck-north_20260301T010000.wav": HOUR,
    "deck-south/deck-south_20260301T000000.wav": HOUR,
    "deck-south/deck-south_20260301T010000.wav": HOUR,
    "pier-east/pier-east_20260301T000000.wav": 30 * 60 * RATE,
    "pier-east/pier-east_20260301T004000.wav": 20 * 60 * RATE,
    "pier-east/pier-east_20260301T010000.wav": HOUR,
}
TRUNCATED = "abutment-west/abutment-west_20260301T000000.wav"
NAME = re.compile(r"^(?P<stream>[a-z-]+)/(?P=stream)_(?P<start>\d{8}T\d{6})\.wav$")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("demo")
    return folder, write_demo_archive(folder, hours=2, seed=7)


def _files(archive: Path) -> set[str]:
    return {p.relative_to(archive).as_posix() for p in archive.rglob("*") if p.is_file()}


def _start(rel: str) -> dt.datetime:
    m = NAME.match(rel)
    assert m is not None, rel
    return dt.datetime.strptime(m["start"], "%Y%m%dT%H%M%S").replace(tzinfo=dt.timezone.utc)


def _decode24(raw: bytes, channels: int) -> np.ndarray:
    """Little-endian two's-complement 24-bit PCM -> integers, shape (frames, channels)."""
    b = np.frombuffer(raw, dtype=np.uint8).reshape(-1, 3).astype(np.int64)
    v = b[:, 0] + (b[:, 1] << 8) + (b[:, 2] << 16)
    v = np.where(v >= 1 << 23, v - (1 << 24), v)
    return v.reshape(-1, channels)


def _read_wave(path: Path) -> tuple[wave._wave_params, np.ndarray]:
    """Parameters and full-scale samples via Python's wave module."""
    with wave.open(str(path), "rb") as w:
        params = w.getparams()
        raw = w.readframes(params.nframes)
    return params, _decode24(raw, params.nchannels) / 2.0**23


def test_generator_writes_expected_files_and_config(demo: tuple[Path, Path]) -> None:
    folder, config = demo
    assert config == folder / "twinpass.toml"
    assert _files(folder / "archive") == set(EXPECTED_2H) | {TRUNCATED}
    cfg = load_config(config)
    assert cfg.archive_root == (folder / "archive").resolve()
    assert Path(cfg.store_location) == (folder / "filtered.zarr").resolve()
    r = cfg.response
    assert (r.kind, r.family) == ("bandpass", "auto")
    assert r.passband_hz == (0.5, 30.0) and r.stopband_hz == (0.1, 45.0)
    assert (r.passband_ripple_db, r.stopband_attenuation_db) == (1.0, 60.0)
    assert (cfg.processing.tolerance, cfg.processing.edge) == (1e-9, "odd")
    assert cfg.archive.include == ("**/*.wav",)
    assert cfg.archive.name_pattern == "{stream}/{stream}_{start:%Y%m%dT%H%M%S}"
    assert cfg.archive.truncated == "error"
    assert (cfg.output.dtype, cfg.output.compression) == ("float32", "lz4")
    assert (cfg.engine.scheduler, cfg.engine.workers, cfg.checks.every) == ("threads", 2, 1)


def test_one_hour_archive(tmp_path: Path) -> None:
    write_demo_archive(tmp_path, hours=1)
    assert _files(tmp_path / "archive") == {
        "deck-north/deck-north_20260301T000000.wav",
        "deck-south/deck-south_20260301T000000.wav",
        "pier-east/pier-east_20260301T000000.wav",
        "pier-east/pier-east_20260301T004000.wav",
        TRUNCATED,
    }


def test_wav_files_read_back_with_reference_libraries(demo: tuple[Path, Path]) -> None:
    folder, _ = demo
    for rel, frames in EXPECTED_2H.items():
        path = folder / "archive" / rel
        params, x = _read_wave(path)
        # Python's wave module: header fields of 3-channel 24-bit PCM at 200 Hz.
        assert (params.nchannels, params.sampwidth, params.framerate) == (3, 3, RATE), rel
        assert params.nframes == frames and x.shape == (frames, 3), rel
        # Quantisation to 24 bits rounds to the nearest step 2**-23: error <= 2**-24.
        stream = rel.split("/")[0]
        expected = demo_signal(stream, _start(rel), frames, seed=7)
        assert np.max(np.abs(x - expected)) <= 2.0**-24 * (1 + 1e-9), rel
        # No sample at the clipping limits: about 0.3 of full scale at most.
        assert 0.05 < np.max(np.abs(x)) < 0.5, rel
        # scipy.io.wavfile.read documentation: 24-bit PCM comes back left-justified in int32.
        rate, data = wavfile.read(path)
        assert rate == RATE and data.dtype == np.int32
        np.testing.assert_array_equal(data.astype(np.int64) >> 8, np.rint(x * 2.0**23).astype(np.int64))
    peak = max(np.max(np.abs(_read_wave(folder / "archive" / rel)[1])) for rel in EXPECTED_2H if "deck" in rel)
    assert 0.2 < peak < 0.45  # the generator's headroom target: peak about 0.3 of full scale


def test_truncated_file_is_shorter_than_its_header(demo: tuple[Path, Path]) -> None:
    folder, _ = demo
    path = folder / "archive" / TRUNCATED
    blob = path.read_bytes()
    # RIFF layout: "RIFF" size "WAVE", then chunks of (4-byte id, 4-byte little-endian size).
    assert blob[:4] == b"RIFF" and blob[8:12] == b"WAVE"
    pos, chunks = 12, {}
    while pos + 8 <= len(blob):
        cid, size = blob[pos : pos + 4], struct.unpack("<I", blob[pos + 4 : pos + 8])[0]
        chunks[cid] = (pos + 8, size)
        if cid == b"data":
            break
        pos += 8 + size + (size & 1)
    fmt_at, _ = chunks[b"fmt "]
    tag, channels, rate, _, align, bits = struct.unpack("<HHIIHH", blob[fmt_at : fmt_at + 16])
    assert (tag, channels, rate, align, bits) == (1, 3, RATE, 9, 24)
    data_at, declared = chunks[b"data"]
    present = len(blob) - data_at
    assert declared == HOUR * 9  # the header declares a full hour
    assert 0 < present < declared
    assert present % align != 0  # the file ends inside a frame
    # The reference reader sees the same: the header claims more frames than it can read.
    with wave.open(str(path), "rb") as w:
        assert w.getnframes() == HOUR
        assert len(w.readframes(HOUR)) == present


def test_gap_is_a_real_time_gap(demo: tuple[Path, Path]) -> None:
    folder, _ = demo
    by_stream: dict[str, list[tuple[dt.datetime, dt.datetime]]] = {}
    for rel in sorted(EXPECTED_2H):
        with wave.open(str(folder / "archive" / rel), "rb") as w:
            seconds = w.getnframes() / w.getframerate()
        start = _start(rel)
        by_stream.setdefault(rel.split("/")[0], []).append((start, start + dt.timedelta(seconds=seconds)))
    gaps = {
        s: [(b[0] - a[1]).total_seconds() for a, b in zip(spans, spans[1:])] for s, spans in by_stream.items()
    }
    assert gaps == {"deck-north": [0.0], "deck-south": [0.0], "pier-east": [600.0, 0.0]}


def _peak(f: np.ndarray, p: np.ndarray, f0: float) -> tuple[float, float]:
    """Frequency of the largest PSD value within 0.3 Hz of f0, and its level in dB above
    the median PSD within 5 Hz of f0."""
    near = np.abs(f - f0) <= 0.3
    i = np.flatnonzero(near)[np.argmax(p[near])]
    around = np.abs(f - f0) <= 5.0
    return float(f[i]), float(10 * np.log10(p[i] / np.median(p[around])))


def test_modes_and_mains_in_periodogram(demo: tuple[Path, Path]) -> None:
    folder, _ = demo
    _, x = _read_wave(folder / "archive" / "deck-north/deck-north_20260301T000000.wav")
    f, p = signal.welch(x, fs=RATE, nperseg=8192, axis=0)
    df = f[1] - f[0]
    checks = [(2, 2.3), (1, 3.1), (0, 50.0), (1, 50.0), (2, 50.0)]  # (channel z=2 / y=1 / x=0, Hz)
    for ch, f0 in checks:
        fpk, level_db = _peak(f, p[:, ch], f0)
        assert abs(fpk - f0) <= df, (ch, f0, fpk)
        assert level_db > 20.0, (ch, f0, level_db)  # the demo's own criterion: a clear line above the floor


def test_signal_is_reproducible_by_seed() -> None:
    start = dt.datetime(2026, 3, 1, 1, tzinfo=dt.timezone.utc)
    a = demo_signal("deck-south", start, 4000, seed=7)
    np.testing.assert_array_equal(a, demo_signal("deck-south", start, 4000, seed=7))
    assert not np.array_equal(a, demo_signal("deck-south", start, 4000, seed=8))


def test_refuses_bad_hours_and_foreign_files(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="hours"):
        write_demo_archive(tmp_path, hours=0)
    stray = tmp_path / "archive" / "deck-north" / "notes.wav"
    stray.parent.mkdir(parents=True)
    stray.write_bytes(b"")
    with pytest.raises(ArchiveError, match="notes.wav"):
        write_demo_archive(tmp_path, hours=1)
    assert not (tmp_path / "twinpass.toml").exists()


def test_scenario_text_names_the_streams() -> None:
    for name in ("deck-north", "deck-south", "pier-east", "abutment-west", "50 Hz", "200 Hz"):
        assert name in DEMO_SCENARIO


@pytest.mark.parametrize(
    "name",
    ["footbridge-vibration", "hydrophone-band", "hydrophone-mains-notch", "lab-drift-highpass"],
)
def test_example_configs_parse(name: str) -> None:
    cfg = load_config(CONFIGS / f"{name}.toml")
    assert cfg.source.endswith(f"{name}.toml")


def test_no_unchecked_example_configs() -> None:
    assert {p.stem for p in CONFIGS.glob("*.toml")} == {
        "footbridge-vibration",
        "hydrophone-band",
        "hydrophone-mains-notch",
        "lab-drift-highpass",
    }


def test_example_configs_fit_their_scenarios() -> None:
    path = CONFIGS / "footbridge-vibration.toml"
    text = path.read_text(encoding="utf-8")
    assert text.endswith(demo_config_text(archive_root="../demo-out/archive", store="../demo-out/filtered.zarr"))
    foot = load_config(path).response
    # 50 Hz mains lies in the upper stopband, below the 100 Hz Nyquist frequency of 200 Hz data.
    assert foot.stopband_hz is not None and foot.stopband_hz[1] < 50.0 < RATE / 2

    band = load_config(CONFIGS / "hydrophone-band.toml").response
    assert band.kind == "bandpass" and band.passband_hz == (5.0, 20000.0)
    assert band.stopband_hz is not None and band.stopband_hz[1] < 48000 / 2
    notch = load_config(CONFIGS / "hydrophone-mains-notch.toml").response
    assert (notch.kind, notch.notch_hz, notch.notch_width_hz) == ("notch", 50.0, 2.0)
    # twinpass rule: the notch stage reads the band stage's output store, so one store ends up
    # both band-passed and notched (its arrays have no suffix: include takes every path)
    notch_job = load_config(CONFIGS / "hydrophone-mains-notch.toml")
    band_store = Path(load_config(CONFIGS / "hydrophone-band.toml").store_location)
    assert notch_job.archive_root.resolve() == band_store.resolve()
    assert notch_job.archive.include == ("**",)

    lab = load_config(CONFIGS / "lab-drift-highpass.toml")
    assert (lab.response.kind, lab.response.cutoff_hz) == ("highpass", (0.1,))
    assert lab.processing.mode == "auto"
    assert lab.archive.include == ("**/*.npy",) and lab.archive.sample_rate_hz == 10000.0


@pytest.mark.parametrize(
    ("name", "sample_rate_hz"),
    [
        ("footbridge-vibration", 200.0),
        ("hydrophone-band", 48000.0),
        ("hydrophone-mains-notch", 48000.0),
        ("lab-drift-highpass", 10000.0),
    ],
)
def test_example_configs_can_be_designed(name: str, sample_rate_hz: float) -> None:
    from twinpass.core.design import design_filter

    cfg = load_config(CONFIGS / f"{name}.toml")
    design = design_filter(cfg.response, sample_rate_hz, cfg.processing.tolerance)
    assert design.effective_length > 0
    # A shipped example promises only what float64 can keep: no rounding caution in its report.
    assert design.report["rounding_estimate"] <= cfg.processing.tolerance, design.report["statement"]
    if name == "lab-drift-highpass":
        # The comments promise a halo longer than one block, so "auto" carries filter state.
        assert cfg.processing.block_seconds is not None
        assert design.effective_length > cfg.processing.carry_threshold * cfg.processing.block_seconds * sample_rate_hz
