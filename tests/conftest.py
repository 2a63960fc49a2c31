"""Shared fixtures: small archives on disk, job configurations, reading outputs back.

Archives are real files (NPY, 16-bit or 24-bit PCM WAV) named hourly-style,
``<stream>/<stream>_<YYYYmmddTHHMMSS>.<ext>``, where each name carries the time of the
file's first sample, so consecutive files of a stream are contiguous and form one segment.
Signals are time-major, shape (samples, channels), in full-scale units.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
import shutil
import subprocess
import sys
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.io.wavfile
import zarr

from twinpass import faults
from twinpass.demo import write_wav_pcm24

START = dt.datetime(2026, 3, 1, tzinfo=dt.timezone.utc)
NAME_PATTERN = "{stream}/{stream}_{start:%Y%m%dT%H%M%S}"
PYTHON = sys.executable
SRC = str(Path(__file__).resolve().parents[1] / "src")

BANDPASS = {"kind": "bandpass", "family": "butterworth", "order": 2, "cutoff_hz": [2.0, 40.0]}
"""Overall -3 dB band 2-40 Hz, 2nd order per pass: at 200 Hz a halo of several hundred samples."""
LOWPASS_FIR = {"kind": "lowpass", "family": "fir", "passband_hz": [20.0], "stopband_hz": [40.0],
               "passband_ripple_db": 1.0, "stopband_attenuation_db": 40.0}
"""Overall FIR low-pass: passband to 20 Hz, 40 dB down from 40 Hz."""


# ----------------------------------------------------------------------- signals
def make_signal(frames: int, channels: int = 1, fs: float = 200.0, *, seed: int = 0,
                amplitude: float = 0.4) -> np.ndarray:
    """A broadband test signal, shape (frames, channels), peak about ``amplitude`` of full scale.

    Tones inside and outside a 2-40 Hz band, a slow drift, an offset and white noise, with
    a different mix per channel, so filters see energy in passband and stopband.
    """
    rng = np.random.default_rng(seed)
    t = np.arange(frames)[:, None] / fs
    ch = np.arange(channels)[None, :]
    x = (0.3 * np.sin(2 * np.pi * (5.0 + ch) * t + ch)
         + 0.2 * np.sin(2 * np.pi * min(0.45 * fs, 70.0) * t)
         + 0.2 * np.sin(2 * np.pi * 0.05 * t + 0.5 * ch)
         + 0.1 * (ch + 1) / channels
         + 0.3 * rng.standard_normal((frames, channels)))
    return (amplitude * x / np.max(np.abs(x))).astype(np.float64)



@dataclass(frozen=True)
class StreamFiles:
    """Files written for one stream, in time order."""

    stream: str
    paths: tuple[Path, ...]
    relpaths: tuple[str, ...]
    """Paths relative to the archive root (POSIX)."""
    arrays: tuple[str, ...]
    """Output array names in the store (relative path without suffix)."""
    data: tuple[np.ndarray, ...]
    """What each file holds in full-scale units, float64 (after quantisation for WAV)."""

    @property
    def concat(self) -> np.ndarray:
        return np.concatenate(self.data, axis=0)


def file_name(stream: str, start: dt.datetime, ext: str) -> str:
    """Relative path of a file of ``stream`` whose first sample is at ``start``."""
    return f"{stream}/{stream}_{start:%Y%m%dT%H%M%S}.{ext}"


def write_file(path: Path, x: np.ndarray, fs: float, fmt: str) -> np.ndarray:
    """Write one recording; return what it holds in full-scale units (float64).

    ``fmt``: ``npy`` (float64), ``npy32`` (float32), ``wav16`` or ``wav24`` (PCM, full
    scale 2**15 / 2**23 per the WAV format's integer PCM convention).
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "npy":
        np.save(path, np.asarray(x, dtype=np.float64))
        return np.asarray(x, dtype=np.float64)
    if fmt == "npy32":
        np.save(path, np.asarray(x, dtype=np.float32))
        return np.asarray(x, dtype=np.float32).astype(np.float64)
    if fmt == "wav16":
        q = np.clip(np.rint(x * 2**15), -(2**15), 2**15 - 1).astype("<i2")
        scipy.io.wavfile.write(path, int(fs), q)
        return q.astype(np.float64) / 2**15
    if fmt == "wav24":
        write_wav_pcm24(path, x, int(fs))
        q = np.clip(np.rint(np.asarray(x, dtype=np.float64) * 2**23), -(2**23), 2**23 - 1)
        return q / 2**23
    raise ValueError(f"unknown test file format {fmt!r}")


def write_stream(root: Path, stream: str, x: np.ndarray, fs: float, files: int | Sequence[int], *,
                 fmt: str = "npy", start: dt.datetime = START) -> StreamFiles:
    """Split ``x`` into contiguous files of one stream under the archive ``root``.

    Parameters
    ----------
    root : Path
        Archive root folder.
    stream : str
        Stream name (folder and file-name prefix).
    x : ndarray, shape (samples, channels)
        The whole stream's samples, full-scale units.
    fs : float
        Sample rate (Hz); file lengths in samples must be whole seconds so the
        second-resolution names stay contiguous.
    files : int or sequence of int
        Number of equal files, or the frame count of each file.
    fmt : {"npy", "npy32", "wav16", "wav24"}
    start : datetime
        Time of the first sample.
    """
    x = np.asarray(x)
    if x.ndim == 1:
        x = x[:, None]
    counts = [x.shape[0] // files] * files if isinstance(files, int) else list(files)
    if sum(counts) != x.shape[0]:
        raise ValueError(f"file lengths {counts} do not add up to {x.shape[0]} samples")
    ext = "npy" if fmt.startswith("npy") else "wav"
    paths, rels, names, data = [], [], [], []
    offset = 0
    for n in counts:
        if (offset / fs) % 1:
            raise ValueError(f"file start {offset / fs} s is not a whole second; choose other lengths")
        rel = file_name(stream, start + dt.timedelta(seconds=offset / fs), ext)
        p = root / rel
        data.append(write_file(p, x[offset:offset + n], fs, fmt))
        paths.append(p)
        rels.append(rel)
        names.append(rel.rsplit(".", 1)[0])
        offset += n
    return StreamFiles(stream, tuple(paths), tuple(rels), tuple(names), tuple(data))


# ----------------------------------------------------------------- configuration
def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(e) for e in v) + "]"
    raise TypeError(f"cannot write {v!r} as TOML")


def config_text(sections: Mapping[str, Mapping[str, Any]]) -> str:
    """TOML text of ``{table: {key: value}}`` (None values are left out)."""
    lines = []
    for name, table in sections.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in table.items() if v is not None]
        lines.append("")
    return "\n".join(lines)


def write_config(folder: Path, *, response: Mapping[str, Any] | None = None, fs: float = 200.0,
                 include: Sequence[str] = ("**/*.npy", "**/*.wav"), **overrides: Mapping[str, Any]) -> Path:
    """Write ``folder/twinpass.toml`` for the archive ``folder/archive``; return its path.

    Defaults: the :data:`BANDPASS` response, hourly-style name pattern, NPY rate ``fs``,
    halo mode, float64 output without compression into ``folder/out.zarr``, threads with 2 workers,
    quick retries. ``overrides`` are tables merged key by key, e.g.
    ``processing={"block_seconds": 2.0}``.
    """
    sections: dict[str, dict[str, Any]] = {
        "response": dict(response or BANDPASS),
        "processing": {"tolerance": 1e-9, "edge": "odd", "block_seconds": 5.0, "mode": "halo"},
        "archive": {"root": "archive", "include": list(include), "name_pattern": NAME_PATTERN,
                    "sample_rate_hz": float(fs)},
        "output": {"store": "out.zarr", "dtype": "float64", "compression": "none"},
        "engine": {"scheduler": "threads", "workers": 2, "retries": 2, "retry_backoff_seconds": 0.01},
        "checks": {},
    }
    for name, table in overrides.items():
        sections.setdefault(name, {}).update(table)
    path = Path(folder) / "twinpass.toml"
    path.write_text(config_text(sections), encoding="utf-8")
    return path


# ------------------------------------------------------------------- reading back
def open_store(path: Path | str) -> zarr.Group:
    return zarr.open_group(str(path), mode="r")


def read_output(store: Path | str, arrays: Sequence[str]) -> list[np.ndarray]:
    """The output arrays named ``arrays`` as numpy arrays."""
    g = open_store(store)
    return [np.asarray(g[a][:]) for a in arrays]


def block_status(store: Path | str, array: str) -> np.ndarray:
    """The block status codes of one output array (0 pending, 1 pass, 2 warn, 3 fail, 4 error)."""
    return np.asarray(open_store(store)[f"_twinpass/blocks/{array}/status"][:])


def chunk_files(store: Path | str) -> dict[str, bytes]:
    """Every chunk file of the output arrays (block tables left out), by relative path."""
    root = Path(store)
    out = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        if p.is_file() and "/c/" in f"/{rel}" and not rel.startswith("_twinpass/"):
            out[rel] = p.read_bytes()
    return out


def stopped_run_counts(store: Path | str, files: int) -> dict[str, int]:
    """The counts of the store's last run, a run stopped before its end into a store no run
    wrote before, checked against what the store itself shows done (``twinpass status``'s
    totals, read from the block tables and completion flags): blocks run = blocks done
    (no block failed in these runs), files complete alike, and the other ``files`` of the
    archive unfinished, none failed."""
    from twinpass.io.store import OutputStore
    from twinpass.status import collect_status

    status = collect_status(OutputStore.open(str(store), mode="r"))
    run, totals = status["last_run"], status["totals"]
    assert run.get("interrupted") is True, run
    counts = run["counts"]
    assert totals["blocks_failed"] == 0, totals
    assert counts["blocks_run"] == totals["blocks_done"], (counts, totals)
    assert counts["complete"] == totals["complete"], (counts, totals)
    assert counts["unfinished"] == files - totals["complete"] and counts["failed"] == 0, (counts, totals)
    return counts


# ------------------------------------------------------------------ subprocesses
def cli_env(**extra: str) -> dict[str, str]:
    """Environment for running ``python -m twinpass.cli`` in a subprocess."""
    env = dict(os.environ)
    env["PYTHONPATH"] = SRC + os.pathsep + env.get("PYTHONPATH", "")
    env.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    env.update(extra)
    return env


def run_cli(args: Sequence[str], *, env: Mapping[str, str] | None = None, timeout: float = 240,
            check: bool = True) -> subprocess.CompletedProcess[str]:
    """Run ``python -m twinpass.cli ARGS`` to the end; raise with its output if it fails."""
    proc = subprocess.run([PYTHON, "-m", "twinpass.cli", *args], env=dict(env or cli_env()),
                          capture_output=True, text=True, timeout=timeout)
    if check and proc.returncode != 0:
        raise AssertionError(f"twinpass {' '.join(args)} exited {proc.returncode}\n"
                             f"stdout:\n{proc.stdout}\nstderr:\n{proc.stderr}")
    return proc


def interrupt_cli(args: Sequence[str], env: Mapping[str, str], err_path: Path, when: str, *,
                  cwd: Path | None = None, timeout: float = 120) -> tuple[int, str, str]:
    """Start ``python -m twinpass.cli ARGS``, send it SIGINT (Ctrl-C) once ``when`` appears in
    its stderr (kept in ``err_path``), and return (exit status, stderr, stdout)."""
    import signal
    import time

    with open(err_path, "w") as err:
        proc = subprocess.Popen([PYTHON, "-m", "twinpass.cli", *args], env=dict(env), cwd=cwd,
                                stdout=subprocess.PIPE, stderr=err, text=True)
    try:
        deadline = time.monotonic() + timeout
        while when not in err_path.read_text() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.1)
        assert proc.poll() is None, f"the command ended before {when!r}:\n{err_path.read_text()}"
        proc.send_signal(signal.SIGINT)
        out, _ = proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return proc.returncode, err_path.read_text(), out


# ----------------------------------------------------------------------- fixtures
@pytest.fixture(scope="session")
def _fault_channel(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, Path]]:
    """A fault-rules file and a state folder, named in this process's environment for the session.

    Worker processes started afterwards inherit the variables and read the file before
    every block, so tests can change rules while a cluster runs. The file holds ``[]``
    (no faults) outside tests that inject some.
    """
    folder = tmp_path_factory.mktemp("faults")
    rules, state = folder / "rules.json", folder / "state"
    rules.write_text("[]", encoding="utf-8")
    saved = {k: os.environ.get(k) for k in (faults.ENV_FILE, faults.ENV_STATE)}
    os.environ[faults.ENV_FILE] = str(rules)
    os.environ[faults.ENV_STATE] = str(state)
    yield rules, state
    for k, v in saved.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v


@pytest.fixture
def inject(_fault_channel: tuple[Path, Path]) -> Iterator[Callable[[list[dict[str, Any]]], Path]]:
    """``inject([{"action": ..., "file": ..., "block": ...}, ...])`` sets fault rules for this test.

    Returns the folder where "-once" rules record that they fired; rules and records are
    cleared when the test ends.
    """
    rules, state = _fault_channel
    shutil.rmtree(state, ignore_errors=True)

    def set_rules(items: list[dict[str, Any]]) -> Path:
        faults.parse_rules(json.dumps(items))  # fail early on a typo
        tmp = rules.with_suffix(".tmp")
        tmp.write_text(json.dumps(items), encoding="utf-8")
        tmp.replace(rules)  # atomic: a worker never reads half a file
        return state

    yield set_rules
    rules.write_text("[]", encoding="utf-8")
    shutil.rmtree(state, ignore_errors=True)


@pytest.fixture(scope="session")
def process_cluster(_fault_channel: tuple[Path, Path]) -> Iterator[Any]:
    """A distributed LocalCluster of two single-thread worker processes (pass its address as scheduler)."""
    from distributed import LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                           scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"},
                           silence_logs=logging.ERROR)
    yield cluster
    cluster.close()
