"""Carry mode end to end: real archives on disk, real Zarr stores, a real Dask client.

Filters here have poles at radius 0.99999, so their effective length (about 2.4 million
samples for a 1e-9 tolerance) is 10 to 100 times the block length. The blockwise result
must equal two-pass filtering of the whole segment with ``scipy.signal.sosfiltfilt`` (the
reference library), and a rerun after a failure must write the same bytes.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import math
import shutil
import threading
from pathlib import Path
from typing import Any

import zarr

import numpy as np
import pytest
import scipy.signal

from conftest import BANDPASS, make_signal, read_output, write_config, write_file, write_stream
from test_carry import EXTENDED, extended_precision_filtfilt
from test_resume import Crash, CrashingStore, _assert_no_complete_file_misses_a_block
from twinpass import faults
from twinpass.config import load_config
from twinpass.core.checks import FIGURE_INDEX, SEAM_FACTOR
from twinpass.core.effective import dominant_pole_radius
from twinpass.engine import dask_client
from twinpass.engine_carry import CarryRecord, carry_layout, run_segment_carry, use_carry, zarr_store_like
from twinpass.errors import ConfigError
from twinpass.io.store import OutputStore
from twinpass.job import prepare

FS = 200.0
R = 0.99999
# First-order bilinear high-pass: pole (1 - t) / (1 + t) with t = tan(pi f / fs)
# (bilinear transform, e.g. Oppenheim & Schafer, Discrete-Time Signal Processing).
F1 = FS / math.pi * math.atan((1 - R) / (1 + R))
# A 2nd-order Butterworth high-pass at a small cutoff w (rad/sample) has poles of radius
# about 1 - w / sqrt(2) (its analog poles lie at 45 degrees): cutoff sqrt(2) F1 gives ~R.
HIGHPASS_1 = {"kind": "highpass", "family": "butterworth", "order": 1, "cutoff_hz": [F1], "cutoff_means": "per-pass"}
HIGHPASS_2 = {"kind": "highpass", "family": "butterworth", "order": 2, "cutoff_hz": [math.sqrt(2) * F1],
              "cutoff_means": "per-pass"}
FILES = [130000, 110000, 120000]
BLOCK_SECONDS = 200.0  # 40000 samples: 10 to 100 times shorter than the effective length


@pytest.fixture(scope="module")
def client():
    with dask_client("threads", 2) as c:
        yield c


def _signal(channels: int, seed: int) -> np.ndarray:
    x = make_signal(sum(FILES), channels, FS, seed=seed)
    x += 0.5 + 0.3 * np.arange(x.shape[0])[:, None] / x.shape[0]  # offset and drift for the high-pass
    return x


def _run(folder: Path, client, *, collect: list | None = None, store_wrapper=None) -> tuple[list, Path]:
    """Plan the job of ``folder/twinpass.toml`` and run every busy segment in carry mode.

    ``store_wrapper``, when given, wraps the opened output store (injected faults).
    """
    cfg = load_config(folder / "twinpass.toml")
    store = OutputStore.open(cfg.store_location, mode="a")
    if store_wrapper is not None:
        store = store_wrapper(store)
    prep = prepare(cfg, store)
    outcomes = []
    for work in prep.work:
        if work.has_work:
            design = prep.designs[work.sample_rate_hz]
            cb = None if collect is None else (lambda d, t, r: collect.append(r))
            outcomes += run_segment_carry(work, design, cfg, store, client, on_block=cb)
    return outcomes, Path(cfg.store_location)


def _setup(tmp_path: Path, response: dict, channels: int = 2, seed: int = 1, **processing) -> tuple:
    x = _signal(channels, seed)
    files = write_stream(tmp_path / "archive", "deck", x, FS, FILES)
    write_config(tmp_path, response=response, processing={"block_seconds": BLOCK_SECONDS, "mode": "carry",
                                                          **processing})
    return files


@pytest.mark.parametrize(
    "response, edge, edge_samples, channels",
    [
        (HIGHPASS_1, "odd", "auto", 2),       # extension of the whole segment, in pieces
        (HIGHPASS_2, "even", 50000, 3),
        (HIGHPASS_2, "constant", "auto", 1),
        (HIGHPASS_1, "none", "auto", 2),
    ],
)
def test_carry_mode_equals_whole_segment_two_pass(tmp_path, client, response, edge, edge_samples, channels):
    if response is HIGHPASS_2 and not EXTENDED:
        pytest.skip("numpy.longdouble is float64 here: poles this close to 1 lose accuracy")
    files = _setup(tmp_path, response, channels, seed=channels, edge=edge, edge_samples=edge_samples)
    results: list = []
    outcomes, store = _run(tmp_path, client, collect=results)
    assert [o.status for o in outcomes] == ["complete"] * 3, (  # say which file is missing, should it be
        [(o.relpath, o.status) for o in outcomes],
        sorted(str(p.relative_to(tmp_path)) for p in (tmp_path / "archive").rglob("*")))
    out = OutputStore.open(str(store), mode="r")
    attrs = out.array_attrs(files.arrays[0])
    filt = attrs["filter"]
    sos = np.asarray(filt["sos"])
    block = attrs["blocks"]["block_samples"]
    assert attrs["blocks"]["halo_samples"] == 0 and attrs["blocks"]["mode"] == "carry"
    # The filters of interest: a pole at radius 0.99999 and a halo 10 to 100 blocks long.
    assert dominant_pole_radius(sos) == pytest.approx(R, abs=2e-7)
    assert 10 * block <= filt["effective_length_samples"] <= 100 * block
    # Every output block task held one block (plus the seam samples before it), never a halo.
    assert len(results) == sum(-(-f // block) for f in FILES)
    assert max(r.window_samples for r in results) <= block + 8

    x = files.concat
    y = np.concatenate(read_output(store, files.arrays))
    padtype = None if edge == "none" else edge
    n = int(filt["edge_samples"])
    # "auto" extends by the effective length, capped at the segment length - 1 (sosfiltfilt
    # needs padlen < len(x)): here the whole segment is mirrored.
    assert n == {"none": 0, 50000: 50000}.get(edge if edge == "none" else edge_samples, sum(FILES) - 1)
    # Reference: scipy.signal.sosfiltfilt on the whole segment with the stored coefficients.
    ref = scipy.signal.sosfiltfilt(sos, x, axis=0, padtype=padtype, padlen=n)
    scale = np.abs(x).max()
    # sosfiltfilt's own float64 rounding for poles this close to 1 (measured against its
    # steps in extended precision) is part of the bound, as in tests/test_carry.py.
    own = float(np.abs(ref - extended_precision_filtfilt(sos, x, edge, n)).max())
    assert np.abs(y - ref).max() <= filt["tolerance"] * scale + 2 * own

    # Seams were computed across every join (file joins included) and agree to rounding.
    for a in files.arrays:
        table = out.read_block_table(a)
        assert set(np.asarray(table.status).tolist()) <= {1, 2}
        seam = table.figures[..., FIGURE_INDEX["seam_mismatch"]]
        assert np.isfinite(seam).all()
        assert seam.max() <= SEAM_FACTOR * filt["tolerance"]


def test_carry_pieces_no_longer_than_the_seam_samples_inside_a_segment(tmp_path, client):
    """A 1-sample last block of a file, and files of 1, 3 and 8 samples (at most [checks]
    seam_samples = 8) between longer ones: the seam state of such a piece is its carried
    start state. Reference: scipy.signal.sosfiltfilt on the whole segment."""
    lengths = [2001, 1, 3, 8, 900]
    x = make_signal(sum(lengths), 2, FS, seed=7)
    (tmp_path / "archive" / "deck").mkdir(parents=True)
    rows, offset, arrays = ["path,stream,start_time"], 0, []
    for i, n in enumerate(lengths):  # contiguous files whose starts are not whole seconds: a manifest
        np.save(tmp_path / "archive" / "deck" / f"deck_{i}.npy", x[offset: offset + n])
        start = dt.datetime(2024, 5, 1, tzinfo=dt.timezone.utc) + dt.timedelta(seconds=offset / FS)
        rows.append(f"deck/deck_{i}.npy,deck,{start.isoformat()}")
        arrays.append(f"deck/deck_{i}")
        offset += n
    (tmp_path / "archive" / "manifest.csv").write_text("\n".join(rows) + "\n")
    write_config(tmp_path, processing={"block_seconds": 5.0, "mode": "carry"},  # blocks of 1000 samples
                 archive={"manifest": "archive/manifest.csv"})
    outcomes, store = _run(tmp_path, client)
    assert [o.status for o in outcomes] == ["complete"] * len(lengths), [(o.relpath, o.errors) for o in outcomes]
    out = OutputStore.open(str(store), mode="r")
    filt = out.array_attrs(arrays[0])["filter"]
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype="odd", padlen=int(filt["edge_samples"]))
    y = np.concatenate(read_output(store, arrays))
    assert np.abs(y - ref).max() <= filt["tolerance"] * np.abs(x).max()
    for a in arrays:  # the seams across the short pieces were compared, and agree
        seam = out.read_block_table(a).figures[..., FIGURE_INDEX["seam_mismatch"]]
        assert seam.max() <= SEAM_FACTOR * filt["tolerance"]


def _cfg(mode: str, threshold: float = 1.0, response: dict | None = None, tmp_path: Path | None = None):
    folder = tmp_path
    write_config(folder, response=response or HIGHPASS_1, processing={"mode": mode, "carry_threshold": threshold})
    return load_config(folder / "twinpass.toml")


def test_use_carry_decisions(tmp_path):
    from twinpass.core.design import design_filter

    iir_cfg = _cfg("auto", tmp_path=tmp_path)
    iir = design_filter(iir_cfg.response, FS, 1e-9)
    fir = design_filter(_cfg("auto", response={"kind": "lowpass", "family": "fir", "passband_hz": [20.0],
                                               "stopband_hz": [40.0], "passband_ripple_db": 1.0,
                                               "stopband_attenuation_db": 40.0}, tmp_path=tmp_path).response,
                        FS, 1e-9)
    length = iir.effective_length
    auto = iir_cfg
    assert use_carry(iir, length - 1, auto)              # halo longer than the block
    assert not use_carry(iir, length, auto)              # not longer: the halo mode
    loose = dataclasses.replace(auto, processing=dataclasses.replace(auto.processing, carry_threshold=0.25))
    assert use_carry(iir, 4 * length - 1, loose) and not use_carry(iir, 4 * length, loose)
    assert not use_carry(fir, 1, auto)                   # FIR never carries in auto mode
    halo = dataclasses.replace(auto, processing=dataclasses.replace(auto.processing, mode="halo"))
    assert not use_carry(iir, 1, halo)
    carry = dataclasses.replace(auto, processing=dataclasses.replace(auto.processing, mode="carry"))
    assert use_carry(iir, 10 * length, carry)            # forced, whatever the lengths
    with pytest.raises(ConfigError, match=r"mode = \"carry\".*FIR"):
        use_carry(fir, 1, carry)


def test_fir_design_is_refused(tmp_path, client):
    write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, FS), FS, 2)
    write_config(tmp_path, response={"kind": "lowpass", "family": "fir", "passband_hz": [20.0],
                                     "stopband_hz": [40.0], "passband_ripple_db": 1.0,
                                     "stopband_attenuation_db": 40.0})
    with pytest.raises(ConfigError, match="IIR"):
        _run(tmp_path, client)


def _set_faults(monkeypatch, tmp_path: Path, rules: list[dict]) -> None:
    monkeypatch.setenv(faults.ENV, json.dumps(rules))
    monkeypatch.setenv(faults.ENV_STATE, str(tmp_path / "fault-state"))


def _bytes(store: Path, arrays) -> list[bytes]:
    return [a.tobytes() for a in read_output(store, arrays)]


def _clean_and_faulty(tmp_path: Path, client, seed: int) -> tuple[Any, list[bytes], Path]:
    """The same archive twice: ``clean/`` run undisturbed (its output bytes returned) and
    ``faulty/`` not run yet."""
    clean_dir, faulty_dir = tmp_path / "clean", tmp_path / "faulty"
    clean_dir.mkdir()
    faulty_dir.mkdir()
    files = _setup(clean_dir, HIGHPASS_1, 2, seed=seed)
    _setup(faulty_dir, HIGHPASS_1, 2, seed=seed)
    outcomes, clean_store = _run(clean_dir, client)
    assert all(o.status == "complete" for o in outcomes)
    return files, _bytes(clean_store, files.arrays), faulty_dir


def test_failures_resume_to_identical_bytes(tmp_path, client, monkeypatch, caplog):
    files, clean, faulty_dir = _clean_and_faulty(tmp_path, client, seed=5)

    # A block that always raises: its state cannot be carried, so no block of the segment
    # is written; the steps of the other pieces are kept.
    _set_faults(monkeypatch, tmp_path, [{"action": "raise", "file": files.arrays[1], "block": 1}])
    outcomes, store = _run(faulty_dir, client)
    assert [o.status for o in outcomes] == ["failed"] * 3
    assert "could not be carried" in outcomes[0].errors[0]
    # Those blocks never ran, so their lines name no attempts (a file's further blocks failing
    # alike are counted in a line of their own).
    lines = [r.getMessage() for r in caplog.records if r.name == "twinpass.engine.carry" and r.levelname == "ERROR"]
    blocks = [m for m in lines if m.startswith("block ")]
    assert blocks and all(" failed: carry mode: the filter state could not be carried" in m for m in blocks), lines
    assert all(m in blocks or " failed with the same error: block" in m for m in lines), lines
    carry_groups = [d for d in (store / "_twinpass" / "carry").iterdir() if d.is_dir()]
    assert len(carry_groups) == 1
    record = zarr.open_group(str(carry_groups[0]), mode="r")
    assert np.count_nonzero(record["fwd_done"][:] == 0) >= 1  # the failing piece
    assert np.count_nonzero(record["fwd_done"][:]) > 1        # the others are kept

    # A one-off failure is retried inside the task; a perturbed block fails its checks.
    _set_faults(monkeypatch, tmp_path, [{"action": "raise-once", "file": files.arrays[1], "block": 1},
                                        {"action": "perturb", "file": files.arrays[2], "block": 0}])
    outcomes, store = _run(faulty_dir, client)
    assert outcomes[2].status == "failed" and outcomes[0].status == "complete"
    out = OutputStore.open(str(store), mode="r")
    statuses = [np.asarray(out.read_block_table(a, figures=False, seams=False).status) for a in files.arrays]
    assert statuses[2][0] == 3  # the perturbed block fails (and its seam neighbours with it)
    not_done = sum(int(np.count_nonzero(~np.isin(s, [1, 2]))) for s in statuses)

    # Without faults the rerun redoes only those blocks, from the recorded carries, and
    # writes the clean bytes.
    monkeypatch.delenv(faults.ENV)
    outcomes, store = _run(faulty_dir, client)
    assert [o.status for o in outcomes] == ["skipped", "complete", "complete"]
    assert sum(o.blocks_run for o in outcomes) == not_done
    assert _bytes(store, files.arrays) == clean


def test_lost_carried_state_fails_the_seam_check(tmp_path, client, monkeypatch):
    # "halo0" makes a block start from steady states instead of its carried ones (what a
    # block would do with no history): the seam check must catch it.
    files = _setup(tmp_path, HIGHPASS_1, 1, seed=7)
    _set_faults(monkeypatch, tmp_path, [{"action": "halo0", "file": files.arrays[1], "block": 1}])
    outcomes, store = _run(tmp_path, client)
    assert outcomes[1].status == "failed"
    table = OutputStore.open(str(store), mode="r").read_block_table(files.arrays[1])
    seam = table.figures[:, 0, FIGURE_INDEX["seam_mismatch"]]
    tol = 1e-9
    assert seam[1] > SEAM_FACTOR * tol
    assert table.status[1] == 3  # fail


def test_carry_layout_has_no_halo(tmp_path):
    cfg = _cfg("carry", tmp_path=tmp_path)
    from twinpass.engine import SegmentWork

    seg = SegmentWork("s", "deck", FS, 4, 10**6, ())
    layout = carry_layout(seg, cfg)
    assert layout.halo == 0 and layout.block_samples == int(cfg.processing.block_seconds * FS)


# ----------------------------------------------------------- crashes between driver writes
def _blocks(store: Path, arrays, block: int) -> list[list[bytes]]:
    """The output bytes of every block, per file."""
    return [[y[i : i + block].tobytes() for i in range(0, len(y), block)] for y in read_output(store, arrays)]


def _copy_run(template: Path, folder: Path, client, crash_at: int | None) -> CrashingStore:
    """Run a copy of ``template`` with the store of ``tests/test_resume.py`` that raises
    :class:`Crash` instead of its ``crash_at``-th write (an injected fault: the process dies
    just then); return that store wrapper, whose ``writes`` list what the run wrote."""
    shutil.copytree(template, folder)
    made: list[CrashingStore] = []

    def wrap(store):
        made.append(CrashingStore(store, crash_at))
        return made[-1]

    try:
        outcomes, _ = _run(folder, client, store_wrapper=wrap)
    except Crash:
        assert crash_at is not None
    else:
        assert crash_at is None or crash_at > len(made[0].writes)
        assert [o.status for o in outcomes] == ["complete"] * 3
    return made[0]


def test_a_carry_run_dying_between_any_two_driver_writes_resumes_correctly(tmp_path, client):
    """A changed middle file; the run dies before each preparation write and near the end.

    In carry mode every block's output depends on the whole segment, so a block the plan
    recomputes although the change does not reach it differs from the kept one by rounding
    (the plan recomputes a whole file whose output is incomplete). Each block of a resumed
    run must therefore be bit-identical to the uninterrupted run of the change or to a run
    from scratch over the changed input, and every block the change reaches to both.
    """
    # Three files of 2000 samples, blocks of 1000: the 2-40 Hz band-pass's effective length
    # (several hundred samples) reaches one block into each neighbour of the middle file.
    frames, block = [2000, 2000, 2000], 1000
    x = make_signal(sum(frames), 2, FS, seed=12)
    template = tmp_path / "template"
    files = write_stream(template / "archive", "deck", x, FS, frames)
    write_config(template, response=BANDPASS, processing={"block_seconds": block / FS, "mode": "carry"})
    scratch = tmp_path / "scratch"  # the same archive, run from scratch after the change
    shutil.copytree(template, scratch)
    outcomes, _ = _run(template, client)
    assert [o.status for o in outcomes] == ["complete"] * 3
    x[2000:4000] = make_signal(2000, 2, FS, seed=13)
    for folder in (template, scratch):
        write_file(folder / "archive" / files.relpaths[1], x[2000:4000], FS, "npy")
    _run(scratch, client)
    fresh = _blocks(scratch / "out.zarr", files.arrays, block)

    # The uninterrupted rerun of the change: its writes and its blocks are the reference.
    writes = _copy_run(template, tmp_path / "clean", client, None).writes
    clean_store = tmp_path / "clean" / "out.zarr"
    clean = _blocks(clean_store, files.arrays, block)
    filt = OutputStore.open(str(clean_store), mode="r").array_attrs(files.arrays[0])["filter"]
    reach = filt["effective_length_samples"]
    assert filt["edge_samples"] == reach < block
    # Reference: scipy.signal.sosfiltfilt of the whole new segment with the stored coefficients.
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                   padlen=filt["edge_samples"])
    y = np.concatenate(read_output(clean_store, files.arrays))
    assert np.abs(y - ref).max() <= filt["tolerance"] * np.abs(x).max()
    # Blocks whose samples lie within the effective length of the changed samples [2000, 4000).
    reached = [[off + i * block < 4000 + reach and 2000 - reach < off + (i + 1) * block for i in range(n // block)]
               for off, n in zip(np.cumsum([0, *frames[:-1]]), frames)]
    assert reached == [[False, True], [True, True], [True, False]]
    for f in range(3):
        for i in range(2):
            assert (clean[f][i] == fresh[f][i]) or not reached[f][i], (f, i)
    # Preparation: the neighbours' edge blocks go pending before any file is prepared.
    first_record = next(i for i, (name, _) in enumerate(writes) if name == "record_block")
    first_prepare = next(i for i, (name, _) in enumerate(writes) if name == "prepare_file")
    assert {a for name, a in writes[:first_prepare] if name == "invalidate_blocks"} == {files.arrays[0],
                                                                                         files.arrays[2]}

    # Die before each preparation write (no block task is running yet) and before each of the
    # last two writes (every task has finished).
    for crash_at in sorted({*range(1, first_record + 1), len(writes) - 1, len(writes)}):
        where = (crash_at, writes[crash_at - 1])
        folder = tmp_path / f"crash{crash_at}"
        crashed = _copy_run(template, folder, client, crash_at)
        assert len(crashed.writes) == crash_at, where
        store = folder / "out.zarr"
        _assert_no_complete_file_misses_a_block(store)
        # No file is left complete with stale blocks: a file whose output is not yet the
        # uninterrupted run's is still work for the next plan.
        plan = prepare(load_config(folder / "twinpass.toml"), OutputStore.open(str(store), mode="r"))
        actions = {f.array_name: f.action for w in plan.work for f in w.files}
        for a, now, want in zip(files.arrays, _blocks(store, files.arrays, block), clean):
            assert now == want or actions[a] != "skip", (where, a)

        outcomes, _ = _run(folder, client)  # the rerun after the crash
        assert all(o.status in ("complete", "skipped") for o in outcomes), where
        assert _assert_no_complete_file_misses_a_block(store) == 3, where
        resumed = _blocks(store, files.arrays, block)
        for f in range(3):
            for i in range(2):
                assert resumed[f][i] in (clean[f][i], fresh[f][i]), (where, f, i)
                assert resumed[f][i] == clean[f][i] or not reached[f][i], (where, f, i)


def test_zarr_store_like_names_the_stores_the_output_store_uses(tmp_path):
    # file:// URLs name local folders (RFC 8089); other fsspec URLs are passed to Zarr as they are.
    assert zarr_store_like(f"file://{tmp_path}/a/../out.zarr") == str(tmp_path / "out.zarr")
    assert zarr_store_like(str(tmp_path / "out.zarr")) == str(tmp_path / "out.zarr")
    assert zarr_store_like("memory://carry/out.zarr") == "memory://carry/out.zarr"
    # Zarr opens what it returns as the very store the output store writes.
    for location in (f"file://{tmp_path}/out.zarr", "memory://carry/out.zarr"):
        OutputStore.open(location, mode="a").set_root_info({"stream": "deck"}, versions={})
        assert zarr.open_group(zarr_store_like(location), mode="r").attrs["twinpass"]["spec"] == {"stream": "deck"}


@pytest.mark.parametrize("where", ["local", "memory"])
def test_carry_record_resumes_its_steps_and_starts_afresh_for_another_key(tmp_path, where):
    # Reference for what is on the store: zarr-python reading the record's group back.
    location = str(tmp_path / "out.zarr") if where == "local" else f"memory://record-{tmp_path.name}/out.zarr"
    OutputStore.open(location, mode="a")
    rec = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    assert np.isnan(rec.values["fwd_final"]).all() and not rec.done("fwd_done").any()
    assert not rec.scanned("forward")
    rec.put("fwd_done", 1, fwd_first=np.array([1.0, 2.0]), fwd_final=np.full((2, 2, 2), 0.5))
    rec.flush()
    rec.store_scan("forward", {0: np.ones((2, 2, 2)), 2: np.zeros((2, 2, 2))})
    assert rec.scanned("forward")
    again = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    # the step results are kept; the scan is stored but computed again by whoever resumes
    assert again.done("fwd_done").tolist() == [False, True, False] and not again.scanned("forward")
    np.testing.assert_array_equal(again.values["fwd_final"][1], np.full((2, 2, 2), 0.5))
    np.testing.assert_array_equal(again.values["fwd_state"][0], np.ones((2, 2, 2)))
    group = zarr.open_group(zarr_store_like(location), path=again.path, mode="r")
    assert group.attrs["key"] == "key-1"
    for name, values in again.values.items():
        np.testing.assert_array_equal(group[name][...], values, err_msg=name)
    other = CarryRecord(location, "deck-0", "key-2", pieces=3, sections=2, channels=2)  # another design or files
    assert not other.done("fwd_done").any() and not other.scanned("forward")
    assert np.isnan(other.values["fwd_first"]).all()
    assert zarr.open_group(zarr_store_like(location), path=other.path, mode="r").attrs["key"] == "key-2"


def test_a_record_flag_without_its_values_or_with_a_cut_chunk_is_not_trusted(tmp_path):
    # After a crash of the operating system a flag may be on the disk without the values
    # written before it (they read as NaN, the fill value), or a chunk file may be cut short.
    location = str(tmp_path / "out.zarr")
    OutputStore.open(location, mode="a")
    rec = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    rec.put("fwd_done", 0, fwd_first=np.array([1.0, 2.0]), fwd_final=np.full((2, 2, 2), 0.5))
    rec.put("fwd_done", 1, fwd_first=np.array([1.0, 2.0]), fwd_final=np.full((2, 2, 2), 0.5))
    rec.put("bwd_done", 2, bwd_last=np.array([3.0, 4.0]), bwd_final=np.full((2, 2, 2), 0.25))
    rec.flush()
    group = zarr.open_group(location, path=rec.path, mode="r+")
    again = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    assert again.done("fwd_done").tolist() == [True, True, False]
    final = group["fwd_final"][...]
    final[1, 0, 1, 0] = np.nan  # piece 1's values lost (the fill value), its flag kept
    group["fwd_final"][...] = final
    first = group["fwd_first"][...]
    first[0] = 0.0  # piece 0's values read as zeros, as some file systems show lost data
    group["fwd_first"][...] = first
    again = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    assert again.done("fwd_done").tolist() == [False, False, False]
    assert again.done("bwd_done").tolist() == [False, False, True]
    # a chunk file cut short: the record cannot be read and starts afresh
    chunk = next(p for p in (Path(location) / rec.path / "bwd_final").rglob("*") if p.is_file()
                 and p.name != "zarr.json")
    chunk.write_bytes(chunk.read_bytes()[:10])
    fresh = CarryRecord(location, "deck-0", "key-1", pieces=3, sections=2, channels=2)
    assert not fresh.done("fwd_done").any() and not fresh.done("bwd_done").any()
    assert np.isnan(fresh.values["bwd_final"]).all()
    reread = zarr.open_group(location, path=rec.path, mode="r")
    assert np.isnan(reread["bwd_final"][...]).all() and not reread["fwd_done"][...].any()


@pytest.mark.parametrize("damage", ["scan-states", "step-values", "zeroed-values", "cut-chunk"])
def test_a_damaged_carry_record_resumes_to_identical_bytes(tmp_path, client, monkeypatch, damage):
    # Reference: the bytes of an undisturbed run (itself equal to scipy.signal.sosfiltfilt,
    # see test_carry_mode_equals_whole_segment_two_pass).
    files, clean, faulty_dir = _clean_and_faulty(tmp_path, client, seed=9)
    # A perturbed block fails its checks, so the next run resumes from the record.
    _set_faults(monkeypatch, tmp_path, [{"action": "perturb", "file": files.arrays[2], "block": 1}])
    outcomes, store = _run(faulty_dir, client)
    assert outcomes[2].status == "failed"
    monkeypatch.delenv(faults.ENV)
    (record_dir,) = [d for d in (store / "_twinpass" / "carry").iterdir() if d.is_dir()]
    record = zarr.open_group(str(record_dir), mode="r+")
    assert record["bwd_done"][...][-1] and record["fwd_done"][...][0]  # the steps are recorded
    if damage == "scan-states":  # finite but wrong carried states, the scan marked stored
        record["fwd_state"][...] = np.zeros(record["fwd_state"].shape)
        record["bwd_state"][...] = np.zeros(record["bwd_state"].shape)
        assert record.attrs["forward_scan"] and record.attrs["backward_scan"]
    elif damage in ("step-values", "zeroed-values"):  # a flag on the disk without its values
        final = record["bwd_final"][...]
        # a core piece's (step 3 does not run for the start extension's): lost values read
        # as the fill value (NaN) or, on some file systems, as zeros
        final[-2] = np.nan if damage == "step-values" else 0.0
        record["bwd_final"][...] = final
        record.attrs["backward_scan"] = False  # lost before the scan was stored
    else:  # a chunk file cut short
        chunk = next(p for p in (record_dir / "fwd_final").rglob("*") if p.is_file() and p.name != "zarr.json")
        chunk.write_bytes(b"")
    outcomes, store = _run(faulty_dir, client)
    assert [o.status for o in outcomes] == ["skipped", "skipped", "complete"]
    assert _bytes(store, files.arrays) == clean


def test_short_pieces_share_dask_tasks_and_whole_blocks_run_alone():
    from types import SimpleNamespace

    from twinpass.engine_carry import _BATCH_PIECES, _MIN_BATCHES, _batches

    def calls(*lengths):
        return [(SimpleNamespace(piece=SimpleNamespace(index=i, length=n)),) for i, n in enumerate(lengths)]

    block = 1000
    # blocks of a long file: one task each
    assert [len(b) for b in _batches(calls(1000, 1000, 1000), block)] == [1, 1, 1]
    # 100 one-tenth-block files: ten to a task (the samples of a block), in order
    tasks = _batches(calls(*[100] * 100), block)
    assert [len(b) for b in tasks] == [10] * 10
    assert [a[0].piece.index for b in tasks for a in b] == list(range(100))
    # tiny pieces: at most _BATCH_PIECES to a task; few pieces: spread over _MIN_BATCHES tasks
    assert max(len(b) for b in _batches(calls(*[1] * 200), block)) == _BATCH_PIECES
    assert len(_batches(calls(*[1] * 8), block)) == _MIN_BATCHES
    # a whole block after short pieces starts a task of its own
    assert [len(b) for b in _batches(calls(*[300] * 6, 1000, 300), block)] == [2, 2, 2, 1, 1]


def test_segments_starting_together_on_a_new_store_create_their_records(tmp_path):
    # Several segment drivers create their first carry record at the same moment; the
    # group that holds all records must not make one of them fail ("a group exists").
    for attempt in range(10):
        location = str(tmp_path / f"out-{attempt}.zarr")
        OutputStore.open(location, mode="a")
        barrier = threading.Barrier(8)
        errors: list[BaseException] = []

        def make(i: int) -> None:
            barrier.wait()
            try:
                CarryRecord(location, f"seg-{i}", "key", pieces=3, sections=2, channels=2)
            except BaseException as exc:  # noqa: BLE001 (reported below)
                errors.append(exc)

        threads = [threading.Thread(target=make, args=(i,)) for i in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert not errors, errors
        group = zarr.open_group(location, path="_twinpass/carry", mode="r")
        assert sorted(name for name, _ in group.groups()) == [f"seg-{i}" for i in range(8)]


class _CancellingClient:
    """The Dask client as a driver sees it, keeping every future it hands out so that a test
    can cancel them all, as stopping a run does."""

    def __init__(self, client) -> None:
        self._client = client
        self.futures: list = []

    def submit(self, *args, **kwargs):
        fut = self._client.submit(*args, **kwargs)
        self.futures.append(fut)
        return fut

    def __getattr__(self, name):
        return getattr(self._client, name)


def test_a_stopped_carry_run_records_its_cancelled_blocks_as_such_and_resumes(tmp_path, client, monkeypatch,
                                                                             caplog):
    # Stopping a run cancels its Dask tasks. The blocks are recorded not done, with a text
    # saying they were cancelled, logged in one line rather than one error line per block,
    # and the next run writes the same bytes as an undisturbed run.
    import logging
    import threading

    files, clean, faulty_dir = _clean_and_faulty(tmp_path, client, seed=7)
    _set_faults(monkeypatch, tmp_path, [{"action": "sleep", "file": "*", "block": "*", "seconds": 0.3}])
    cfg = load_config(faulty_dir / "twinpass.toml")
    store = OutputStore.open(cfg.store_location, mode="a")
    prep = prepare(cfg, store)
    (work,) = [w for w in prep.work if w.has_work]
    proxy = _CancellingClient(client)
    caplog.set_level(logging.INFO, logger="twinpass")
    result: list = []
    driver = threading.Thread(target=lambda: result.extend(
        run_segment_carry(work, prep.designs[work.sample_rate_hz], cfg, store, proxy)))
    driver.start()
    while not proxy.futures:
        driver.join(0.05)
    while driver.is_alive():
        client.cancel(list(proxy.futures))
        driver.join(0.1)
    assert [o.status for o in result] == ["failed"] * 3
    errors = [e for a in files.arrays
              for e in store.read_block_table(a, figures=False, seams=False).errors.values()]
    assert errors and all(e.startswith("cancelled: the run was stopped") for e in errors), errors
    logged = [r for r in caplog.records if r.name.startswith("twinpass.engine")]
    assert not [r.getMessage() for r in logged if r.levelno >= logging.ERROR]
    assert len([r for r in logged if "cancelled before they finished" in r.getMessage()]) == 1

    monkeypatch.delenv(faults.ENV)
    outcomes, out = _run(faulty_dir, client)
    assert all(o.status == "complete" for o in outcomes)
    # Reference: the undisturbed run's bytes (checked against scipy.signal.sosfiltfilt in
    # test_carry_mode_equals_whole_segment_two_pass).
    assert _bytes(out, files.arrays) == clean
