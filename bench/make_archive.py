"""Write a synthetic benchmark archive and the twinpass configurations that filter it.

Usage::

    python bench/make_archive.py FOLDER [--size 2GiB] [--channels 8] [--rate 1000]
                                        [--file-seconds 3600] [--seed 11]
    python bench/make_archive.py FOLDER --small-files 1000 [--small-samples 1000]

The large archive holds four streams of contiguous files, two of 24-bit PCM WAV and two
of float32 NPY, named ``{stream}/{stream}_{YYYYmmddTHHMMSS}.wav|.npy`` so that
``[archive] name_pattern`` joins the files of a stream into one segment. Files are
written in chunks of ``CHUNK_SECONDS``, so no file is ever held in memory whole and any
``--size`` works.

Conventions: arrays are time-major, shape (samples, channels); sample values are in units
of full scale (24-bit full scale = 1.0); frequencies in Hz; times UTC.

Written under FOLDER::

    archive/...             the input files
    bp4.toml                Butterworth band-pass, order 4 per pass (4 sections), 0.5-40 Hz
    ell8.toml               elliptic band-pass, order 8 per pass (8 sections), 10-200 Hz
    archive-info.json       what was written (parameters, files, frames, bytes)

With ``--small-files N`` the folder gets instead ``N`` small NPY files (``archive/``),
``small.toml`` (the Butterworth design, response checks off) and ``archive-info.json``.

Everything is invented: the signal is a sum of tones, a slow drift and noise.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import re
import sys
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from twinpass.demo import _wav_header, encode_pcm24

CHUNK_SECONDS = 60
"""Length of one write (seconds of signal)."""
START = _dt.datetime(2031, 5, 1, tzinfo=_dt.timezone.utc)
"""Time of every stream's first sample."""
WAV_STREAMS = ("rig-w1", "rig-w2")
NPY_STREAMS = ("rig-n1", "rig-n2")
TONES_HZ = (0.02, 2.3, 7.5, 25.0, 60.0, 150.0, 320.0)
"""Tones of the synthetic signal (Hz): a slow drift, in-band tones of both designs, and
tones in their stopbands."""
NOISE_RMS = 0.01
"""Broadband noise level (full scale)."""

PATTERN = "{stream}/{stream}_{start:%Y%m%dT%H%M%S}"

DESIGNS: dict[str, dict[str, Any]] = {
    # 4 second-order sections per pass: Butterworth band-pass, prototype order 4.
    "bp4": {"kind": "bandpass", "family": "butterworth", "order": 4, "cutoff_hz": [0.5, 40.0]},
    # 8 second-order sections per pass: elliptic band-pass, prototype order 8.
    "ell8": {"kind": "bandpass", "family": "elliptic", "order": 8, "cutoff_hz": [10.0, 200.0],
             "passband_ripple_db": 0.5, "stopband_attenuation_db": 60.0},
}
"""The ``[response]`` table of each design (overall response; fixed order per pass)."""


def toml_text(tables: dict[str, dict[str, Any]], comment: str = "") -> str:
    """TOML for tables of strings, numbers and lists of them (JSON literals are valid TOML there)."""
    lines = [f"# {comment}", ""] if comment else []
    for name, table in tables.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in table.items()]
        lines.append("")
    return "\n".join(lines)


@dataclass(frozen=True)
class ArchiveInfo:
    """What :func:`write_archive` wrote."""

    folder: str
    size_requested: int
    """Requested total size (bytes)."""
    channels: int
    rate_hz: float
    file_seconds: float
    seed: int
    files: int
    frames: int
    """Frames (samples per channel) over all files."""
    samples: int
    """frames x channels over all files."""
    bytes: int
    """Bytes on disk over all files."""
    configs: dict[str, str]
    """Design name -> configuration path."""
    kind: str = "large"


def parse_size(text: str) -> int:
    """``"2GiB"``, ``"200MB"``, ``"1.5G"``, ``"123456"`` -> bytes (K/M/G/T: powers of 1024 or 1000 with B)."""
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([kKmMgGtT]?)(i?)([bB]?)\s*", text)
    if not m:
        raise ValueError(f"size {text!r}: write a number with an optional unit, e.g. 2GiB, 200MB, 500M")
    value, unit, binary, b = m.groups()
    power = " KMGT".index(unit.upper()) if unit else 0
    base = 1000 if (b and not binary) else 1024
    return int(float(value) * base**power)


def tone_matrix(channels: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel tone amplitudes (len(TONES_HZ), channels) and phases (len(TONES_HZ),)."""
    rng = np.random.default_rng([seed, 0])
    amps = rng.uniform(0.01, 0.08, (len(TONES_HZ), channels))
    amps[0] *= 2.0  # the drift is the largest component
    return amps, rng.uniform(0.0, 2 * np.pi, len(TONES_HZ))


class Synth:
    """The signal of one stream: tones (functions of the absolute sample index), drift, noise.

    Tones for frames ``[n0, n0 + k)`` use the angle-sum identity with a precomputed
    table of ``cos``/``sin`` of ``2 pi f k / rate`` for ``k < chunk``, so a chunk costs a
    few multiply-adds per sample instead of a sine per tone and sample.
    """

    def __init__(self, channels: int, rate_hz: float, chunk: int, seed: int, stream: int) -> None:
        self.amps, self.phases = tone_matrix(channels, seed)
        self.w = 2 * np.pi * np.asarray(TONES_HZ) / rate_hz
        k = np.arange(chunk, dtype=np.float64)[:, None] * self.w
        self.cos_k, self.sin_k = np.cos(k), np.sin(k)
        self.rng = np.random.default_rng([seed, 1, stream])
        self.rate_hz = float(rate_hz)

    def frames(self, n0: int, frames: int) -> np.ndarray:
        """Frames [n0, n0 + frames) (frames <= chunk), float64 (frames, channels), |x| < 1."""
        a = self.w * n0 + self.phases
        tones = self.sin_k[:frames] * np.cos(a) + self.cos_k[:frames] * np.sin(a)
        x = tones @ self.amps
        x += self.rng.standard_normal(x.shape, dtype=np.float32) * np.float32(NOISE_RMS)
        return x


def _file_frames(total_frames: int, per_file: int) -> list[int]:
    out = [per_file] * (total_frames // per_file)
    if total_frames % per_file:
        out.append(total_frames % per_file)
    return out


def write_file(path: Path, frames: int, n0: int, sig: Synth) -> int:
    """Write frames [n0, n0 + frames) of ``sig`` as 24-bit WAV (``.wav``) or float32 NPY; returns bytes."""
    channels = sig.amps.shape[1]
    step = sig.cos_k.shape[0]
    wav = path.suffix == ".wav"
    with open(path, "wb") as fh:
        if wav:
            fh.write(_wav_header(frames, channels, int(round(sig.rate_hz))))
        else:
            np.lib.format.write_array_header_1_0(
                fh, {"descr": "<f4", "fortran_order": False, "shape": (frames, channels)})
        for a in range(0, frames, step):
            x = sig.frames(n0 + a, min(step, frames - a))
            fh.write(encode_pcm24(x) if wav else x.astype("<f4").tobytes())
        if wav and (frames * channels * 3) & 1:
            fh.write(b"\x00")
    return path.stat().st_size


def write_config(folder: Path, name: str, *, design: str, store: str, rate: float, every: int = 1,
                 root: str = "archive") -> Path:
    """Write ``folder/{name}.toml`` for one design; returns its path."""
    tables = {
        "response": DESIGNS[design],
        "processing": {"tolerance": 1e-9, "edge": "odd"},
        "archive": {"root": root, "include": ["**/*.wav", "**/*.npy"], "name_pattern": PATTERN,
                    "sample_rate_hz": float(rate)},
        "output": {"store": store, "dtype": "float32", "compression": "lz4"},
        "engine": {"scheduler": "threads", "workers": 2},
        "checks": {"every": int(every)},
    }
    path = folder / f"{name}.toml"
    path.write_text(toml_text(tables, f"twinpass benchmark job: design {design} (written by bench/make_archive.py)"),
                    encoding="utf-8")
    return path


def _stream_files(folder: Path, stream: str, suffix: str, frames: list[int], rate: int) -> list[tuple[Path, int, int]]:
    out, n0 = [], 0
    for f in frames:
        start = START + _dt.timedelta(seconds=n0 / rate)
        path = folder / "archive" / stream / f"{stream}_{start:%Y%m%dT%H%M%S}{suffix}"
        out.append((path, f, n0))
        n0 += f
    return out


def write_archive(folder: Path | str, size: int, *, channels: int = 8, rate: int = 1000,
                  file_seconds: float = 3600, seed: int = 11, log=print) -> ArchiveInfo:
    """Write the large synthetic archive and its two configurations.

    Parameters
    ----------
    folder : path
        Output folder (created; an existing ``archive/`` inside is replaced).
    size : int
        Approximate total size of the input files (bytes), split evenly over the four
        streams.
    channels : int
        Channels per file.
    rate : int
        Sample rate (Hz). A whole number of samples per second keeps file names exact.
    file_seconds : float
        Length of a full file (s); each stream's last file may be shorter.
    seed : int
        Seed of the noise and tone phases.
    """
    folder = Path(folder).resolve()
    archive = folder / "archive"
    if archive.exists():
        for p in sorted(archive.rglob("*"), reverse=True):
            p.unlink() if p.is_file() else p.rmdir()
    per_stream = size / (len(WAV_STREAMS) + len(NPY_STREAMS))
    per_file = int(round(file_seconds * rate))
    if per_file < 1:
        raise ValueError("file_seconds * rate must be at least one sample")
    total_files = total_frames = total_bytes = 0
    for k, stream in enumerate(WAV_STREAMS + NPY_STREAMS):
        wav = stream in WAV_STREAMS
        frames = max(1, int(per_stream // (channels * (3 if wav else 4))))
        (archive / stream).mkdir(parents=True, exist_ok=True)
        sig = Synth(channels, rate, CHUNK_SECONDS * rate, seed, k)
        for path, n, n0 in _stream_files(folder, stream, ".wav" if wav else ".npy", _file_frames(frames, per_file), rate):
            total_bytes += write_file(path, n, n0, sig)
            total_files += 1
            total_frames += n
        log(f"  {stream}: {frames} frames ({frames / rate / 3600:.2f} h) in {-(-frames // per_file)} file(s)")
    configs = {d: str(write_config(folder, d, design=d, store=f"out-{d}.zarr", rate=rate)) for d in DESIGNS}
    info = ArchiveInfo(str(folder), int(size), channels, float(rate), float(file_seconds), seed, total_files,
                       total_frames, total_frames * channels, total_bytes, configs)
    (folder / "archive-info.json").write_text(json.dumps(asdict(info), indent=2), encoding="utf-8")
    return info


def write_small_archive(folder: Path | str, *, files: int = 1000, samples: int = 1000, channels: int = 8,
                        rate: int = 1000, streams: int = 10, seed: int = 12) -> ArchiveInfo:
    """Write ``files`` small float32 NPY files of ``samples`` frames, in ``streams`` contiguous streams.

    The configuration ``small.toml`` uses the Butterworth design (``bp4``) with the response
    checks off (``every = 0``): this archive serves to time reruns, not filtering.
    """
    folder = Path(folder).resolve()
    archive = folder / "archive"
    if archive.exists():
        for p in sorted(archive.rglob("*"), reverse=True):
            p.unlink() if p.is_file() else p.rmdir()
    total_bytes = 0
    per_stream = -(-files // streams)
    written = 0
    for s in range(streams):
        stream = f"node-{s:02d}"
        n = min(per_stream, files - written)
        if n <= 0:
            break
        (archive / stream).mkdir(parents=True, exist_ok=True)
        sig = Synth(channels, rate, samples, seed, s)
        for path, f, n0 in _stream_files(folder, stream, ".npy", [samples] * n, rate):
            total_bytes += write_file(path, f, n0, sig)
        written += n
    cfg = write_config(folder, "small", design="bp4", store="out-small.zarr", rate=rate, every=0)
    info = ArchiveInfo(str(folder), total_bytes, channels, float(rate), samples / rate, seed, written,
                       written * samples, written * samples * channels, total_bytes, {"bp4": str(cfg)},
                       kind="small")
    (folder / "archive-info.json").write_text(json.dumps(asdict(info), indent=2), encoding="utf-8")
    return info


def perturb_file(path: Path | str, seconds: float = 10.0, delta: float = 1e-3) -> None:
    """Change the first ``seconds`` of one archive file in place (adds ``delta`` full scale).

    Size stays the same; content and modification time change.
    """
    from twinpass.io.readers.registry import open_recording

    path = Path(path)
    with open_recording(path) as rec:
        n = min(rec.info.frames, int(seconds * (rec.info.sample_rate_hz or 1000.0)))
    if path.suffix == ".npy":
        x = np.load(path, mmap_mode="r+")
        x[:n] += np.float32(delta)
        x.flush()
        del x
        return
    with open_recording(path) as rec:
        head = rec.read(0, n)
    with open(path, "r+b") as fh:
        fh.seek(len(_wav_header(1, head.shape[1], 1)))
        fh.write(encode_pcm24(head + delta))


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("folder")
    p.add_argument("--size", default="2GiB", help="total size of the input files (default 2GiB)")
    p.add_argument("--channels", type=int, default=8)
    p.add_argument("--rate", type=int, default=1000, help="sample rate, Hz")
    p.add_argument("--file-seconds", type=float, default=3600.0, help="length of a full file, s")
    p.add_argument("--seed", type=int, default=11)
    p.add_argument("--small-files", type=int, default=0, help="write N small NPY files instead")
    p.add_argument("--small-samples", type=int, default=1000, help="frames per small file")
    a = p.parse_args(argv)
    if a.small_files:
        info = write_small_archive(a.folder, files=a.small_files, samples=a.small_samples, channels=a.channels,
                                   rate=a.rate)
    else:
        info = write_archive(a.folder, parse_size(a.size), channels=a.channels, rate=a.rate,
                             file_seconds=a.file_seconds, seed=a.seed)
    print(f"{info.files} files, {info.bytes / 2**30:.3f} GiB, {info.samples / 1e6:.1f} Msamples; "
          f"configs: {', '.join(info.configs.values())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
