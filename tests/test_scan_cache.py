"""The scan cache: NaN/Inf findings of float files kept in the output store and reused.

References:
* Float and integer WAV files are written and read back with scipy.io.wavfile.
* Which values are non-finite: IEEE 754 (``numpy.isfinite``); runs of a channel are found by
  a plain loop over ``math.isfinite`` (test_nonfinite.py's reference) and checked there.
* Linear interpolation between the finite neighbours: ``numpy.interp``.
* Whole-signal two-pass reference: ``scipy.signal.sosfiltfilt`` (odd extension, padlen = the
  design's effective length).
* That an unchanged file is not read again, and what makes an entry stale (fingerprint, frame
  and channel counts, [processing] nonfinite and max_fill_samples) are twinpass rules.
"""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from scipy import signal

from twinpass import cli
from twinpass.config import JobConfig
from twinpass.errors import StoreError
from twinpass.io import archive as archive_mod
from twinpass.io.archive import Discovery, discover
from twinpass.io.readers._common import WindowRecording
from twinpass.io.store import OutputStore
from twinpass.job import prepare
from test_bad_inputs import PATTERN, RATE, load, noise, pcm16, run, stem, write_wav

BUOY = stem("buoy") + ".wav"  # float, NaN/Inf runs inside
MAST = stem("mast") + ".wav"  # float, all finite
PIER = stem("pier") + ".wav"  # int16: never scanned
FLOATS = (BUOY, MAST)


def _buoy_samples(shift: int = 0) -> np.ndarray:
    x = noise(2000, 2, seed=11).astype(np.float32)
    x[700 + shift: 730 + shift, 0] = np.nan
    x[710 + shift: 715 + shift, 1] = np.inf
    x[1500, 1] = -np.inf
    return x


def _archive(tmp_path: Path) -> Path:
    root = tmp_path / "archive"
    write_wav(root, BUOY, _buoy_samples())
    write_wav(root, MAST, noise(1500, 1, seed=12).astype(np.float32))
    write_wav(root, PIER, pcm16(1200, 1, seed=13))
    return root


def _cfg(tmp_path: Path, **processing: Any) -> JobConfig:
    proc: dict[str, Any] = {"nonfinite": "interpolate", "max_fill_samples": 40}
    proc.update(processing)
    return load(tmp_path, archive={"name_pattern": PATTERN}, processing=proc)


@pytest.fixture
def reads(monkeypatch) -> Counter:
    """Counts the sample reads of every file-backed recording, by file name (a counting wrapper)."""
    counts: Counter = Counter()
    real = WindowRecording.read

    def counting(self, start, stop):
        counts[Path(self.info.path).name] += 1
        return real(self, start, stop)

    monkeypatch.setattr(WindowRecording, "read", counting)
    return counts


@pytest.fixture
def scans(monkeypatch) -> list[str]:
    """Paths handed to the streaming NaN/Inf scan (a counting wrapper around the real scan)."""
    seen: list[str] = []
    real = archive_mod.scan_channel_runs

    def counting(recording, *args, **kw):
        seen.append(Path(recording.info.path).name)
        return real(recording, *args, **kw)

    monkeypatch.setattr(archive_mod, "scan_channel_runs", counting)
    return seen


def _findings(disc: Discovery) -> dict[str, Any]:
    """Everything discovery says about non-finite samples, per file."""
    return {
        "files": {f.relpath: (f.nonfinite_runs, f.nonfinite_fill, f.holes, f.filled_spans, f.fingerprint)
                  for f in disc.files},
        "invalid": [(b.path, b.reason, b.remedy) for b in disc.invalid],
        "warnings": list(disc.warnings),
    }


def _store(cfg: JobConfig, mode: str = "a") -> OutputStore:
    return OutputStore.open(cfg.store_location, mode=mode, archive_root=cfg.archive_root)


# -- the store's side ---------------------------------------------------------------------


def test_store_keeps_the_cache_whole_and_reads_it_read_only(tmp_path):
    loc = str(tmp_path / "out.zarr")
    store = OutputStore.open(loc, mode="a")
    assert store.read_scan_cache() == {}
    entries = {"a/x.wav": {"runs": [[0, 1, 2]], "fills": [[0, 1, 2, 0.1, -2.5e-7]]}, "b.wav": {"runs": []}}
    store.write_scan_cache(entries)
    ro = OutputStore.open(loc, mode="r")
    assert ro.read_scan_cache() == entries  # floats survive the JSON round trip exactly
    with pytest.raises(StoreError, match="read-only"):
        ro.write_scan_cache({})
    store.write_scan_cache({"b.wav": {"runs": []}})  # a rewrite replaces the whole cache
    assert OutputStore.open(loc, mode="r").read_scan_cache() == {"b.wav": {"runs": []}}
    assert store.list_arrays() == []  # hidden: not an output array
    meta = json.loads((tmp_path / "out.zarr" / "_twinpass" / "scan" / "zarr.json").read_text())
    assert meta["attributes"]["layout"] == 1


def test_store_ignores_a_cache_of_another_layout(tmp_path):
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="a")
    store.write_scan_cache({"b.wav": {"runs": []}})
    store._root["_twinpass/scan"].attrs.put({"layout": 99, "files": {"b.wav": {"runs": []}}})
    assert store.read_scan_cache() == {}


# -- discovery with a cache -----------------------------------------------------------------


def test_second_discovery_reads_no_samples_and_finds_the_same(tmp_path, reads):
    _archive(tmp_path)
    cfg = _cfg(tmp_path)
    first = discover(cfg)
    assert sorted(first.scanned) == sorted(FLOATS) and sorted(first.scans) == sorted(FLOATS)
    assert reads[Path(BUOY).name] > 0 and reads[Path(PIER).name] == 0  # integers are never read
    store = _store(cfg)
    store.write_scan_cache(first.scans)
    cached = _store(cfg, "r").read_scan_cache()
    assert cached == first.scans

    reads.clear()
    second = discover(cfg, scan_cache=cached)
    assert sum(reads.values()) == 0 and second.scanned == ()
    assert _findings(second) == _findings(first)
    assert second.scans == first.scans
    # the kept fills still hold the samples next to each run (scipy.io.wavfile read-back)
    _rate, ref = wavfile.read(tmp_path / "archive" / BUOY)
    (buoy,) = [f for f in second.files if f.relpath == BUOY]
    assert buoy.filled_spans == ((700, 730), (1500, 1501))
    for f in buoy.nonfinite_fill:
        assert not np.isfinite(ref[f.start:f.stop, f.channel]).any()
        assert f.left == float(ref[f.start - 1, f.channel]) and f.right == float(ref[f.stop, f.channel])


def test_prepare_keeps_the_cache_and_plans_alike(tmp_path, reads):
    _archive(tmp_path)
    cfg = _cfg(tmp_path)
    store = _store(cfg)
    first = prepare(cfg, store)
    assert _store(cfg, "r").read_scan_cache() == dict(first.discovery.scans)
    reads.clear()
    second = prepare(cfg, _store(cfg))
    assert sum(reads.values()) == 0 and second.discovery.scanned == ()
    assert second.plan.to_json() == first.plan.to_json()
    assert [s.holes for s in second.plan.segments] == [s.holes for s in first.plan.segments]
    assert _findings(second.discovery) == _findings(first.discovery)


def test_a_changed_file_is_read_again(tmp_path, reads):
    root = _archive(tmp_path)
    cfg = _cfg(tmp_path)
    cache = discover(cfg).scans
    path = root / BUOY
    old = os.stat(path)
    write_wav(root, BUOY, _buoy_samples(shift=100))  # same size, runs moved
    os.utime(path, ns=(old.st_atime_ns, old.st_mtime_ns + 5_000_000_000))
    reads.clear()
    disc = discover(cfg, scan_cache=cache)
    assert disc.scanned == (BUOY,) and reads[Path(MAST).name] == 0
    (buoy,) = [f for f in disc.files if f.relpath == BUOY]
    assert buoy.filled_spans == ((800, 830), (1500, 1501))
    assert disc.scans[BUOY]["runs"] == [[0, 800, 830], [1, 810, 815], [1, 1500, 1501]]
    assert disc.scans[MAST] == cache[MAST]


@pytest.mark.parametrize("change", [{"nonfinite": "split"}, {"max_fill_samples": 35}])
def test_other_nonfinite_settings_read_again(tmp_path, change):
    _archive(tmp_path)
    cache = discover(_cfg(tmp_path)).scans
    cfg = _cfg(tmp_path, **change)
    disc = discover(cfg, scan_cache=cache)
    assert sorted(disc.scanned) == sorted(FLOATS)
    assert _findings(disc) == _findings(discover(cfg))  # as if there had been no cache
    assert all(e["policy"] == cfg.processing.nonfinite and e["max_fill_samples"] == cfg.processing.max_fill_samples
               for e in disc.scans.values())


@pytest.mark.parametrize("policy, max_fill", [("fail", 0), ("interpolate", 20)])
def test_a_file_left_out_is_left_out_again_from_the_cache(tmp_path, reads, policy, max_fill):
    _archive(tmp_path)
    cfg = _cfg(tmp_path, nonfinite=policy, max_fill_samples=max_fill)
    first = discover(cfg)
    assert [b.path for b in first.invalid] == [BUOY]
    reads.clear()
    second = discover(cfg, scan_cache=first.scans)
    assert sum(reads.values()) == 0
    assert _findings(second) == _findings(first)


@pytest.mark.parametrize(
    "damage",
    [
        lambda e: e.update(runs=[[0, 700, 730]]),                    # a run missing: no longer maximal/complete
        lambda e: e.update(runs=[[5, 700, 730]] + e["runs"][1:]),     # channel out of range
        lambda e: e.update(fills=e["fills"][:1]),                    # a fill missing
        lambda e: e.update(fills=[[0, 700, 730, None, 1.0]] + e["fills"][1:]),  # a value that is not a number
        lambda e: e.update(frames=1999),                             # another frame count
        lambda e: e.pop("fingerprint"),
        lambda e: e.update(runs="garbage"),
    ],
)
def test_an_entry_that_does_not_fit_is_ignored(tmp_path, damage):
    _archive(tmp_path)
    cfg = _cfg(tmp_path)
    first = discover(cfg)
    cache = json.loads(json.dumps(first.scans))
    damage(cache[BUOY])
    disc = discover(cfg, scan_cache=cache)
    assert disc.scanned == (BUOY,)
    assert _findings(disc) == _findings(first)


def test_unfingerprinted_discovery_neither_uses_nor_makes_entries(tmp_path):
    _archive(tmp_path)
    cfg = _cfg(tmp_path)
    cache = discover(cfg).scans
    disc = discover(cfg, fingerprints=False, scan_cache=cache)
    assert sorted(disc.scanned) == sorted(FLOATS) and disc.scans == {}


def test_plan_does_not_write_and_removed_files_drop_out(tmp_path, scans, capsys):
    root = _archive(tmp_path)
    cfg = _cfg(tmp_path)
    cfg_path = tmp_path / "job.toml"
    assert cli.main(["plan", str(cfg_path), "--json"]) == 0  # no store yet: the stand-in
    assert sorted(scans) == sorted(Path(p).name for p in FLOATS)
    assert not Path(cfg.store_location).exists()
    prepare(cfg, _store(cfg))
    kept = _store(cfg, "r").read_scan_cache()
    (root / MAST).unlink()
    scans.clear()
    assert cli.main(["plan", str(cfg_path), "--json"]) == 0  # store opened read-only
    capsys.readouterr()
    assert scans == []
    assert _store(cfg, "r").read_scan_cache() == kept  # not written by planning
    prepare(cfg, _store(cfg))
    assert sorted(_store(cfg, "r").read_scan_cache()) == [BUOY]


# -- end to end ---------------------------------------------------------------------------


def test_two_runs_give_the_same_output_and_the_second_scans_nothing(tmp_path, scans, reads):
    root = tmp_path / "archive"
    x = _buoy_samples()
    write_wav(root, BUOY, x)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, output={"dtype": "float64"},
               processing={"nonfinite": "interpolate", "max_fill_samples": 40})
    name = BUOY[:-4]
    first = run(cfg)
    assert [(o.relpath, o.status) for o in first.outcomes] == [(BUOY, "complete")]
    assert scans == [Path(BUOY).name]
    store = _store(cfg, "r")
    y1, attrs1 = store.read(name), store.array_attrs(name)
    # anchor: linear fill per channel (numpy.interp), then scipy.signal.sosfiltfilt
    xf = x.astype(np.float64)
    idx = np.arange(len(xf))
    for c in range(xf.shape[1]):
        ok = np.isfinite(xf[:, c])
        xf[~ok, c] = np.interp(idx[~ok], idx[ok], xf[ok, c])
    design = first.designs[float(RATE)]
    ref = signal.sosfiltfilt(design.sos, xf, axis=0, padtype="odd", padlen=design.effective_length)
    assert np.max(np.abs(y1 - ref)) <= 1e-9 * np.max(np.abs(xf))

    scans.clear()
    reads.clear()
    second = run(cfg)
    assert scans == [] and sum(reads.values()) == 0
    assert [(o.relpath, o.status) for o in second.outcomes] == [(BUOY, "skipped")]
    store = _store(cfg, "r")
    assert np.array_equal(store.read(name), y1)
    assert store.array_attrs(name) == attrs1
    assert attrs1["filled_spans"] == [[700, 730], [1500, 1501]]
