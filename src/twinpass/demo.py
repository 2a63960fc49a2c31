"""An invented demonstration archive: footbridge vibration monitoring.

:func:`write_demo_archive` writes a small archive of 24-bit PCM WAV files plus a job
configuration that band-passes it. Everything is invented: the bridge, the sensors and
the recordings are synthesised here from a fixed random seed.

Conventions: arrays are time-major, shape (samples, channels); sample values are in
units of full scale (24-bit PCM full scale = 1.0); frequencies in Hz; times are UTC.

Layout written under ``folder``::

    folder/twinpass.toml                                  the job configuration
    folder/archive/{stream}/{stream}_{YYYYmmddTHHMMSS}.wav
    folder/filtered.zarr                                  (written by a run)

Streams ``deck-north``, ``deck-south`` and ``pier-east`` hold one file per hour. The
``pier-east`` logger loses power at 00:30 and restarts at 00:40: its first hour is split
into two files with a ten-minute gap between them, so that stream has two segments. The
``abutment-west`` stream holds a single file whose data chunk ends, mid-frame, long
before the length its header declares (a logger that lost power while writing).
"""

from __future__ import annotations

import datetime as _dt
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import signal

from .errors import ArchiveError, ConfigError

__all__ = [
    "DEMO_SCENARIO",
    "SITE_NAME",
    "SAMPLE_RATE_HZ",
    "CHANNELS",
    "STREAMS",
    "TRUNCATED_STREAM",
    "DEMO_TRUNCATED_FILE",
    "START_TIME",
    "MODE_VERTICAL_HZ",
    "MODE_LATERAL_HZ",
    "MAINS_HZ",
    "DemoFile",
    "demo_plan",
    "demo_signal",
    "demo_config_text",
    "encode_pcm24",
    "write_wav_pcm24",
    "write_demo_archive",
]

SITE_NAME = "Larkspur Footbridge"
SAMPLE_RATE_HZ = 200
"""Samples per second of every demo stream."""
CHANNELS: tuple[str, ...] = ("x", "y", "z")
"""Channel order: x = along the deck, y = lateral, z = vertical."""
STREAMS: tuple[str, ...] = ("deck-north", "deck-south", "pier-east")
"""The complete streams (one file per hour, ``pier-east`` with a gap)."""
TRUNCATED_STREAM = "abutment-west"
"""The stream holding the single truncated file."""
START_TIME = _dt.datetime(2026, 3, 1, tzinfo=_dt.timezone.utc)
"""Time of the first sample of the archive."""
DEMO_TRUNCATED_FILE = f"{TRUNCATED_STREAM}/{TRUNCATED_STREAM}_{START_TIME:%Y%m%dT%H%M%S}.wav"
"""Archive path of the truncated file, which every demo run leaves out on purpose."""
MODE_VERTICAL_HZ = 2.3
"""First vertical bending mode of the deck, Hz (channel z)."""
MODE_LATERAL_HZ = 3.1
"""First lateral mode of the deck, Hz (channel y)."""
MAINS_HZ = 50.0
"""Mains frequency of the invented site's grid, Hz."""

DEMO_SCENARIO = (
    f"Vibration monitoring of the {SITE_NAME}, an invented 80 m steel footbridge. "
    f"Three 3-axis accelerometers (deck-north, deck-south, pier-east) record at "
    f"{SAMPLE_RATE_HZ} Hz into hourly 24-bit WAV files (channels x = along the deck, "
    f"y = lateral, z = vertical). The deck sways in two modes, {MODE_VERTICAL_HZ} Hz vertical "
    f"and {MODE_LATERAL_HZ} Hz lateral, whose amplitude wanders slowly; groups of pedestrians "
    "add bursts of footfall impulses at about 2 steps per second. The sensors also pick up a "
    f"slow thermal drift (periods of hours) and {MAINS_HZ:g} Hz mains hum, on top of broadband "
    "noise. The job keeps 0.5-30 Hz and removes the drift and the hum. The pier-east logger "
    "lost power for ten minutes (a real gap, so its record is two segments), and a fourth "
    "logger, abutment-west, left one file cut short mid-frame: the run reports that file "
    "as an error and completes everything else."
)

_FILE_SECONDS = 3600
_FRAMES_PER_HOUR = _FILE_SECONDS * SAMPLE_RATE_HZ
_SAMPLE_BYTES = 3
_FULL_SCALE = 2**23
_PIER_POWER_LOSS_S = 30 * 60
"""pier-east stops recording at 00:30 ..."""
_PIER_RESTART_S = 40 * 60
"""... and starts a new file at 00:40, then resumes hourly files on the hour."""
_GAIN = 1.75
"""Overall gain: brings the busiest files to a peak of about 0.3 of full scale."""
_TRUNCATED_WHOLE_FRAMES = 446_913
"""Whole frames actually present in the truncated file (about 37 minutes)."""
_TRUNCATED_EXTRA_BYTES = 5
"""Bytes of one further, incomplete frame at the end of the truncated file."""

# Per stream: position along the deck (0 = north end, 1 = south end), sensitivity to the
# deck modes (mode shape at the sensor) and to footfall, mains pickup level (full scale).
_STREAM_PROPS: dict[str, dict[str, float]] = {
    "deck-north": {"pos": 0.3, "mode": 1.0, "foot": 1.0, "mains": 0.012},
    "deck-south": {"pos": 0.7, "mode": 0.9, "foot": 1.0, "mains": 0.018},
    "pier-east": {"pos": 0.5, "mode": 0.35, "foot": 0.4, "mains": 0.025},
    "abutment-west": {"pos": 0.0, "mode": 0.15, "foot": 0.5, "mains": 0.010},
}


@dataclass(frozen=True)
class DemoFile:
    """One file of the demo archive."""

    stream: str
    start: _dt.datetime
    """Time of the first sample (UTC)."""
    frames: int
    """Whole frames present in the file (samples per channel)."""
    declared_frames: int
    """Frames the WAV header declares (larger than ``frames`` only for a truncated file)."""
    extra_bytes: int = 0
    """Bytes of an incomplete last frame after the whole frames (truncated file only)."""

    @property
    def relpath(self) -> str:
        """Path relative to the archive root, POSIX separators."""
        return f"{self.stream}/{self.stream}_{self.start:%Y%m%dT%H%M%S}.wav"

    @property
    def truncated(self) -> bool:
        return self.frames < self.declared_frames


def demo_plan(hours: int = 3) -> tuple[DemoFile, ...]:
    """The files :func:`write_demo_archive` writes for ``hours`` hours of recording.

    Parameters
    ----------
    hours : int
        Length of the record in hours (>= 1).

    Returns
    -------
    tuple of DemoFile
        Sorted by stream, then start time.
    """
    if isinstance(hours, bool) or not isinstance(hours, int) or hours < 1:
        raise ConfigError(f"demo archive: hours must be a whole number >= 1, got {hours!r}")
    files: list[DemoFile] = []
    hour = _dt.timedelta(hours=1)
    for stream in STREAMS:
        for h in range(hours):
            start = START_TIME + h * hour
            if stream == "pier-east" and h == 0:
                files.append(_full(stream, start, _PIER_POWER_LOSS_S * SAMPLE_RATE_HZ))
                restart = start + _dt.timedelta(seconds=_PIER_RESTART_S)
                files.append(_full(stream, restart, (_FILE_SECONDS - _PIER_RESTART_S) * SAMPLE_RATE_HZ))
            else:
                files.append(_full(stream, start, _FRAMES_PER_HOUR))
    files.append(
        DemoFile(
            TRUNCATED_STREAM,
            START_TIME,
            frames=_TRUNCATED_WHOLE_FRAMES,
            declared_frames=_FRAMES_PER_HOUR,
            extra_bytes=_TRUNCATED_EXTRA_BYTES,
        )
    )
    return tuple(sorted(files, key=lambda f: (f.stream, f.start)))


def _full(stream: str, start: _dt.datetime, frames: int) -> DemoFile:
    return DemoFile(stream, start, frames=frames, declared_frames=frames)


# ---------------------------------------------------------------------------------------
# The synthetic signal
# ---------------------------------------------------------------------------------------


def _stream_index(stream: str) -> int:
    try:
        return list(_STREAM_PROPS).index(stream)
    except ValueError:
        raise ConfigError(
            f"demo archive: unknown stream {stream!r}; the demo streams are {', '.join(_STREAM_PROPS)}"
        ) from None


def _footfall_kernel(rate_hz: float) -> np.ndarray:
    """Response of the deck to one footstep, shape (3 s of samples, 3), z peak about 1."""
    t = np.arange(int(3 * rate_hz)) / rate_hz
    two_pi_t = 2 * np.pi * t
    x = 0.30 * np.exp(-t / 0.10) * np.sin(two_pi_t * 11.0)
    y = 0.15 * np.exp(-t / 0.10) * np.sin(two_pi_t * 6.4) + 0.10 * np.exp(-t / 1.5) * np.sin(
        two_pi_t * MODE_LATERAL_HZ
    )
    z = np.exp(-t / 0.12) * np.sin(two_pi_t * 8.7) + 0.40 * np.exp(-t / 1.2) * np.sin(
        two_pi_t * MODE_VERTICAL_HZ
    )
    return np.stack([x, y, z], axis=1)


def _footfalls(rng: np.random.Generator, frames: int, props: dict[str, float]) -> np.ndarray:
    """Bursts of footstep responses (groups crossing the bridge), shape (frames, 3)."""
    duration_s = frames / SAMPLE_RATE_HZ
    kernel = _footfall_kernel(SAMPLE_RATE_HZ)
    kernel_s = kernel.shape[0] / SAMPLE_RATE_HZ
    n_bursts = rng.poisson(8.0 * duration_s / 3600.0)
    train = np.zeros(frames)
    for _ in range(n_bursts):
        crossing_s = rng.uniform(45.0, 100.0)
        room = duration_s - crossing_s - kernel_s
        if room <= 0:
            continue
        t0 = rng.uniform(0.0, room)
        step_hz = rng.uniform(1.7, 2.1)
        level = rng.uniform(0.03, 0.08)
        steps = np.arange(0.0, crossing_s, 1.0 / step_hz)
        steps = steps + rng.normal(0.0, 0.01, steps.size)
        steps = steps[(steps >= 0.0) & (steps < crossing_s)]
        # The walkers approach the sensor, pass it and walk away.
        envelope = np.exp(-(((steps / crossing_s) - props["pos"]) / 0.2) ** 2)
        amps = level * envelope * rng.uniform(0.7, 1.0, steps.size)
        idx = np.rint((t0 + steps) * SAMPLE_RATE_HZ).astype(np.int64)
        np.add.at(train, idx, amps)
    if not train.any():
        return np.zeros((frames, 3))
    return signal.oaconvolve(train[:, None], kernel, axes=0)[:frames] * props["foot"]


def demo_signal(stream: str, start: _dt.datetime, frames: int, *, seed: int = 7) -> np.ndarray:
    """The synthetic accelerations of one demo file, in units of full scale.

    Deterministic parts (modes, drift, mains hum) are functions of absolute time, so
    files that follow one another join without a step; footfall bursts and sensor noise
    come from a generator seeded by ``(seed, stream, start)``.

    Parameters
    ----------
    stream : str
        One of :data:`STREAMS` or :data:`TRUNCATED_STREAM`.
    start : datetime
        Time of the first sample (timezone-aware, UTC; a whole number of seconds after
        :data:`START_TIME`).
    frames : int
        Number of samples per channel.
    seed : int
        Seed of the random parts.

    Returns
    -------
    ndarray, shape (frames, 3), float64
        Channels x (along the deck), y (lateral), z (vertical); peak about 0.3 of full scale.
    """
    k = _stream_index(stream)
    props = _STREAM_PROPS[stream]
    offset_s = (start - START_TIME).total_seconds()
    if offset_s != int(offset_s):
        raise ConfigError(f"demo archive: start {start.isoformat()} is not a whole second")
    n0 = int(offset_s) * SAMPLE_RATE_HZ
    t = (n0 + np.arange(frames)) / SAMPLE_RATE_HZ
    two_pi_t = 2 * np.pi * t

    fixed = np.random.default_rng([seed, k])  # the stream's constant phases and offsets
    ph = fixed.uniform(0.0, 2 * np.pi, 8)
    offsets = fixed.uniform(-0.02, 0.02, 3)
    x = np.empty((frames, 3))

    # Thermal drift: periods of 5 to 7 hours, plus a small constant offset per channel.
    x[:, 0] = 0.030 * np.sin(two_pi_t / (7 * 3600) + ph[0])
    x[:, 1] = 0.025 * np.sin(two_pi_t / (6 * 3600) + ph[1])
    x[:, 2] = 0.060 * np.sin(two_pi_t / (5 * 3600) + ph[2])
    x += offsets

    # Structural modes with slowly wandering amplitude (periods 23 and 37 minutes).
    vertical = 0.045 * props["mode"] * (0.65 + 0.35 * np.sin(two_pi_t / (23 * 60) + ph[3]))
    vertical *= np.sin(two_pi_t * MODE_VERTICAL_HZ + ph[4])
    lateral = 0.035 * props["mode"] * (0.65 + 0.35 * np.sin(two_pi_t / (37 * 60) + ph[5]))
    lateral *= np.sin(two_pi_t * MODE_LATERAL_HZ + ph[6])
    x[:, 2] += vertical
    x[:, 1] += lateral
    x[:, 0] += 0.1 * lateral + 0.05 * vertical

    # Mains hum picked up by the cabling.
    hum = props["mains"] * np.sin(two_pi_t * MAINS_HZ + ph[7])
    x += hum[:, None] * np.array([0.8, 0.9, 1.0])

    rng = np.random.default_rng([seed, k, int(offset_s)])
    x += _footfalls(rng, frames, props)
    x += rng.normal(0.0, 0.002, (frames, 3))
    x *= _GAIN
    return x


# ---------------------------------------------------------------------------------------
# 24-bit PCM WAV writing
# ---------------------------------------------------------------------------------------


def encode_pcm24(x: np.ndarray) -> bytes:
    """Samples in units of full scale -> interleaved 24-bit little-endian PCM bytes.

    Parameters
    ----------
    x : ndarray, shape (frames, channels)
        Values in full-scale units; ``round(x * 2**23)`` is clipped to
        [-2**23, 2**23 - 1].

    Returns
    -------
    bytes
        ``frames * channels * 3`` bytes, frame by frame (channels interleaved).
    """
    q = np.clip(np.rint(np.asarray(x, dtype=np.float64) * _FULL_SCALE), -_FULL_SCALE, _FULL_SCALE - 1)
    q = np.ascontiguousarray(q.astype("<i4"))
    return q.view(np.uint8).reshape(-1, 4)[:, :3].tobytes()


def _wav_header(frames: int, channels: int, sample_rate_hz: int) -> bytes:
    """RIFF/WAVE header (PCM format tag 1, 24 bits) declaring ``frames`` frames."""
    block_align = channels * _SAMPLE_BYTES
    data_bytes = frames * block_align
    pad = data_bytes & 1
    fmt = struct.pack(
        "<HHIIHH", 1, channels, sample_rate_hz, sample_rate_hz * block_align, block_align, 8 * _SAMPLE_BYTES
    )
    riff_size = 4 + (8 + len(fmt)) + (8 + data_bytes + pad)
    return (
        b"RIFF" + struct.pack("<I", riff_size) + b"WAVE"
        + b"fmt " + struct.pack("<I", len(fmt)) + fmt
        + b"data" + struct.pack("<I", data_bytes)
    )


def write_wav_pcm24(
    path: Path | str,
    x: np.ndarray,
    sample_rate_hz: int,
    *,
    declared_frames: int | None = None,
    keep_bytes: int | None = None,
) -> int:
    """Write a 24-bit PCM WAV file.

    Parameters
    ----------
    path : Path or str
        File to write (replaced if present).
    x : ndarray, shape (frames, channels)
        Samples in units of full scale (see :func:`encode_pcm24`).
    sample_rate_hz : int
        Samples per second per channel.
    declared_frames : int, optional
        Frames the header declares; default ``frames``. A larger value, together with
        ``keep_bytes``, writes a deliberately truncated file.
    keep_bytes : int, optional
        Write only the first ``keep_bytes`` bytes of sample data (may end mid-frame);
        default all of them, followed by the RIFF pad byte when the data length is odd.

    Returns
    -------
    int
        Bytes of sample data written.
    """
    x = np.asarray(x)
    if x.ndim != 2:
        raise ConfigError(f"{path}: samples must have shape (frames, channels), got {x.shape}")
    frames, channels = x.shape
    declared = frames if declared_frames is None else int(declared_frames)
    payload = encode_pcm24(x)
    complete = keep_bytes is None
    if not complete:
        payload = payload[: int(keep_bytes)]
    blob = _wav_header(declared, channels, int(sample_rate_hz)) + payload
    if complete and len(payload) & 1:
        blob += b"\x00"
    _write_if_changed(Path(path), blob)
    return len(payload)


def _write_if_changed(path: Path, blob: bytes) -> None:
    """Write ``blob`` unless the file already holds exactly it (its modification time is then
    kept, so a rerun of the demo sees unchanged inputs)."""
    try:
        if path.stat().st_size == len(blob) and path.read_bytes() == blob:
            return
    except FileNotFoundError:
        pass
    path.write_bytes(blob)


# ---------------------------------------------------------------------------------------
# The configuration
# ---------------------------------------------------------------------------------------

_CONFIG_TEMPLATE = """\
# twinpass job: {site} vibration monitoring (invented demo data).
#
# `twinpass demo FOLDER` writes the archive and its own copy of this file as
# FOLDER/twinpass.toml. Relative paths below are relative to this file's folder.
# Three 3-axis accelerometers record at 200 Hz, one 24-bit WAV file per hour.
# Wanted: the deck's vibration (modes at 2.3 Hz vertical and 3.1 Hz lateral, footfall
# response up to about 20 Hz). Unwanted: slow thermal drift (periods of hours) and
# 50 Hz mains hum.

[response]
# All figures are for the OVERALL response, after the forward and the backward pass.
kind = "bandpass"
# Let twinpass choose the filter family that meets the figures below at the lowest order.
family = "auto"
# Kept, within the ripple below: 0.5 Hz to 30 Hz. The modes and the footfall response
# lie well inside; the drift lies far below 0.5 Hz.
passband_hz = [0.5, 30.0]
# Removed, by at least the attenuation below: under 0.1 Hz (the drift) and over 45 Hz,
# which takes in the 50 Hz mains hum with room to spare.
stopband_hz = [0.1, 45.0]
# The kept band may rise or fall by at most 1 dB (about 12 % in amplitude).
passband_ripple_db = 1.0
# Drift and hum come out at least 60 dB down: a thousandth of their amplitude.
stopband_attenuation_db = 60.0

[processing]
# Each block is filtered with enough extra signal on both sides (the halo) that it
# matches filtering the whole recording at once to within 1e-9 of the segment's peak:
# far finer than the 24-bit input resolution (2**-23, about 1.2e-7 of full scale).
tolerance = 1e-9
# At the ends of a recording (its start, its end, and both sides of the pier-east gap)
# the signal is extended by point reflection. That keeps the level and slope continuous
# at the edge, so the filter does not ring at the start of each segment.
edge = "odd"

[archive]
root = "{archive_root}"
# Every WAV file under the root is an input.
include = ["**/*.wav"]
# Folder = stream name; file name = stream name and the time of the first sample.
# Files of one stream that follow each other without a gap form one segment and are
# filtered as one continuous signal; a gap starts a new segment.
name_pattern = "{{stream}}/{{stream}}_{{start:%Y%m%dT%H%M%S}}"
# A file whose data ends before its header says it should is reported as an error and
# left out, rather than filtered short without notice ("warn" would filter the whole
# frames that are there).
truncated = "error"

[output]
store = "{store}"
# float32 keeps about 7 significant digits: more than the 24-bit input carries, at half
# the size of float64.
dtype = "float32"
# lz4 is quick to write and read; vibration data compresses only a little anyway.
compression = "lz4"
# Each block's output is on the disk before the block counts as done, so a power cut
# cannot leave a block recorded done without its data. false is faster, for copies that
# can simply be made again.
sync = true

[engine]
# Threads suit this job: the filtering runs in numpy and scipy, which release Python's
# lock while they compute, and threads start instantly.
scheduler = "threads"
workers = 2

[checks]
# The archive is small: check the measured response of every block.
every = 1
"""


def demo_config_text(*, archive_root: str = "archive", store: str = "filtered.zarr") -> str:
    """The demo job configuration (TOML with comments).

    Parameters
    ----------
    archive_root : str
        ``[archive] root``, relative to the configuration file's folder.
    store : str
        ``[output] store``, relative to the configuration file's folder.
    """
    return _CONFIG_TEMPLATE.format(site=SITE_NAME, archive_root=archive_root, store=store)


# ---------------------------------------------------------------------------------------
# The archive
# ---------------------------------------------------------------------------------------


def write_demo_archive(folder: Path, *, hours: int = 3, seed: int = 7) -> Path:
    """Write the invented footbridge archive and its job configuration.

    Parameters
    ----------
    folder : Path
        Where to write: ``folder/archive`` (the WAV files) and ``folder/twinpass.toml``.
        A run writes ``folder/filtered.zarr``. Demo files already present are replaced
        (files whose bytes would not change are left untouched);
        any other file under ``folder/archive`` is an error (it would join the run).
    hours : int
        Hours of recording per complete stream (>= 1). Each complete stream gets
        ``hours`` hourly files of 720 000 frames (pier-east: one more, its first hour
        split by a gap); the truncated stream gets one file.
    seed : int
        Seed of the random parts (footfall bursts, sensor noise).

    Returns
    -------
    Path
        The configuration file, ``folder/twinpass.toml``.

    Raises
    ------
    ConfigError
        ``hours`` is not a whole number >= 1.
    ArchiveError
        ``folder/archive`` holds a file that is not part of the demo.
    """
    folder = Path(folder)
    plan = demo_plan(hours)
    archive = folder / "archive"
    wanted = {f.relpath for f in plan}
    if archive.is_dir():
        for p in sorted(archive.rglob("*")):
            rel = p.relative_to(archive).as_posix()
            if p.is_file() and rel not in wanted:
                raise ArchiveError(
                    f"{p}: this file is not part of the demo archive and would be filtered with it; "
                    "choose an empty folder for the demo or remove the file",
                    path=str(p),
                )
    for f in plan:
        path = archive / f.relpath
        path.parent.mkdir(parents=True, exist_ok=True)
        if f.truncated:
            x = demo_signal(f.stream, f.start, f.frames + 1, seed=seed)
            keep = f.frames * len(CHANNELS) * _SAMPLE_BYTES + f.extra_bytes
            write_wav_pcm24(path, x, SAMPLE_RATE_HZ, declared_frames=f.declared_frames, keep_bytes=keep)
        else:
            write_wav_pcm24(path, demo_signal(f.stream, f.start, f.frames, seed=seed), SAMPLE_RATE_HZ)
    config = folder / "twinpass.toml"
    _write_if_changed(config, demo_config_text().encode("utf-8"))
    return config
