"""Injected faults inside the real engine: retries, lost workers and wrong blocks.

Faults are the only thing simulated (``twinpass.faults``); archives, stores and Dask
schedulers are real. Whole-signal references come from ``scipy.signal.sosfiltfilt``.
"""

from __future__ import annotations

import re
import time

import numpy as np
import pytest
import scipy.signal

import conftest
from conftest import block_status, make_signal, open_store, read_output, write_config, write_stream
from twinpass import faults
from twinpass.config import load_config
from twinpass.core.checks import ESTIMATOR_ERROR_DB, SEAM_FACTOR
from twinpass.core.failures import SHOWN
from twinpass.engine import ERROR, FAIL, PASS, WARN, retry_delays
from twinpass.errors import ConfigError
from twinpass.io.store import OutputStore
from twinpass.job import run_job
from twinpass.report_data import attention_lists
from twinpass.status import collect_status, format_status

FS = 200.0
FRAMES = [8000, 6000, 8000]  # blocks of 1000 samples: 8 + 6 + 8


def _archive(tmp_path, name="run", *, seed=21, **overrides):
    """One three-file stream (shared by every run of a test) and a config for the store ``name``."""
    archive = tmp_path / "archive"
    if not archive.exists():
        write_stream(archive, "deck", make_signal(sum(FRAMES), 2, FS, seed=seed), FS, FRAMES)
    folder = tmp_path / name
    folder.mkdir()
    return load_config(write_config(folder, archive={"root": str(archive)}, **overrides))


ARRAYS = [f"deck/deck_20260301T{t}" for t in ("000000", "000040", "000110")]


def _results(cfg, **kw):
    seen = []
    res = run_job(cfg, on_block=lambda sid, d, t, r: seen.append(r), **kw)
    return res, {(r.array_name, r.block_index): r for r in seen}


def test_retry_delays_back_off_exponentially():
    # Exponential backoff (common practice): each wait doubles the previous one.
    assert retry_delays(3, 0.5) == [0.5, 1.0, 2.0]
    assert retry_delays(0, 0.5) == []


def test_a_block_failing_once_is_retried_and_the_output_is_unchanged(tmp_path, inject):
    clean = _archive(tmp_path, "clean")
    assert run_job(clean).ok
    state = inject([{"action": "raise-once", "file": ARRAYS[1], "block": 2}])
    res, blocks = _results(_archive(tmp_path, "faulty"))
    assert res.ok and res.counts()["complete"] == 3
    assert blocks[(ARRAYS[1], 2)].attempts == 2 and blocks[(ARRAYS[1], 2)].status in (PASS, WARN)
    assert all(r.attempts == 1 for key, r in blocks.items() if key != (ARRAYS[1], 2))
    assert len(faults.fired(state)) == 1
    for a, b in zip(read_output(clean.store_location, ARRAYS), read_output(tmp_path / "faulty" / "out.zarr", ARRAYS)):
        assert np.array_equal(a, b)


def test_a_block_that_keeps_failing_fails_only_its_file(tmp_path, inject):
    inject([{"action": "raise", "file": ARRAYS[1], "block": 3}])
    cfg = _archive(tmp_path, engine={"retries": 2, "retry_backoff_seconds": 0.01})
    res, blocks = _results(cfg)
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    assert blocks[(ARRAYS[1], 3)].attempts == 3 and blocks[(ARRAYS[1], 3)].status == ERROR
    g = open_store(cfg.store_location)
    st = block_status(cfg.store_location, ARRAYS[1])
    assert st[3] == ERROR and np.all(np.isin(np.delete(st, 3), (PASS, WARN)))
    errors = g[f"_twinpass/blocks/{ARRAYS[1]}"].attrs["errors"]
    assert list(errors) == ["3"] and "InjectedFault: injected fault in deck/deck_20260301T000040 block 3" in errors["3"]
    assert g[ARRAYS[1]].attrs["complete"] is False
    assert g[ARRAYS[0]].attrs["complete"] is True and g[ARRAYS[2]].attrs["complete"] is True
    outcome = {o.array_name: o for o in res.outcomes}[ARRAYS[1]]
    assert outcome.status == "failed" and outcome.blocks_failed == 1 and "injected fault" in outcome.errors[3]

    # Without the fault a rerun runs that block alone and completes the file; the seam
    # check covers its two joins again.
    inject([])
    res2, blocks2 = _results(cfg)
    assert res2.ok and list(blocks2) == [(ARRAYS[1], 3)]
    assert open_store(cfg.store_location)[ARRAYS[1]].attrs["complete"] is True


def test_a_block_failing_after_a_design_change_reads_as_nan_not_as_the_old_design(tmp_path, inject):
    # A design change refilters every file in the blocks it was written in. A block that
    # then fails must not keep the old design's values (which read like results): its
    # frames read as NaN; the file's other blocks equal scipy.signal.sosfiltfilt with the
    # new design over the whole stream (the reference), and the file is not complete.
    cfg = _archive(tmp_path, engine={"retries": 0})
    assert run_job(cfg).ok
    old = read_output(cfg.store_location, ARRAYS)[1]
    narrower = {**conftest.BANDPASS, "cutoff_hz": [3.0, 30.0]}
    cfg2 = load_config(write_config(tmp_path / "run", archive={"root": str(tmp_path / "archive")},
                                    response=narrower, engine={"retries": 0}))
    inject([{"action": "raise", "file": ARRAYS[1], "block": 3}])
    res = run_job(cfg2)
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    g = open_store(cfg2.store_location)
    assert g[ARRAYS[1]].attrs["complete"] is False
    filt = g[ARRAYS[1]].attrs["filter"]
    x = make_signal(sum(FRAMES), 2, FS, seed=21)
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                   padlen=filt["edge_samples"])[FRAMES[0] : FRAMES[0] + FRAMES[1]]
    y = read_output(cfg2.store_location, ARRAYS)[1]
    assert np.all(np.isnan(y[3000:4000])) and not np.isnan(old[3000:4000]).any()
    kept = np.r_[0:3000, 4000:FRAMES[1]]
    assert np.max(np.abs(y[kept] - ref[kept])) <= filt["tolerance"] * np.max(np.abs(x))
    # the next run writes the block and completes the file
    inject([])
    assert run_job(cfg2).ok
    y = read_output(cfg2.store_location, ARRAYS)[1]
    assert np.max(np.abs(y - ref)) <= filt["tolerance"] * np.max(np.abs(x))


@pytest.mark.parametrize("change", ["same size", "appended"])
def test_an_input_rewritten_while_the_run_reads_it_leaves_no_file_of_its_segment_complete(tmp_path, inject, change):
    # A recorder still writing a file, or an earlier job rerunning: after the run planned
    # the segment (fingerprints taken), the middle file is rewritten while a block of the
    # first file is held (the "hold" fault). Its neighbours read it across the joins, so no
    # file of the segment may be marked complete; each says the input changed. The next run
    # filters the new contents: scipy.signal.sosfiltfilt of the whole new stream (reference).
    import os
    import threading

    go = tmp_path / "go"
    cfg = _archive(tmp_path, engine={"retries": 0})
    inject([{"action": "hold", "file": ARRAYS[0], "block": 0, "path": str(go), "seconds": 120}])
    done: list = []
    runner = threading.Thread(target=lambda: done.append(run_job(cfg)), daemon=True)
    runner.start()
    middle = tmp_path / "archive" / f"{ARRAYS[1]}.npy"
    store_array = tmp_path / "run" / "out.zarr" / ARRAYS[2] / "zarr.json"
    deadline = time.monotonic() + 120
    while not store_array.exists() and time.monotonic() < deadline:  # planned: its outputs are made
        time.sleep(0.05)
    assert store_array.exists()
    x = make_signal(sum(FRAMES), 2, FS, seed=21)
    new = x[FRAMES[0]:FRAMES[0] + FRAMES[1]] * 0.5
    if change == "appended":
        new = np.concatenate([new, new[:10]])
    before = middle.stat().st_mtime_ns
    np.save(middle, new.astype(np.load(middle).dtype))
    os.utime(middle, ns=(before + 1_000_000_000, before + 1_000_000_000))  # a new time even on coarse clocks
    go.touch()
    runner.join(300)
    (res,) = done
    assert sorted(res.failed) == sorted(f"{a}.npy" for a in ARRAYS), res.failed
    reasons = res.failure_reasons()
    # Each says an input changed: its blocks that read the new contents, else the file itself.
    assert all("changed while this run" in reasons[f"{a}.npy"] for a in ARRAYS), reasons
    if change == "same size":  # no block can see it: the check at the end names the file
        assert "the file changed while this run read it" in reasons[f"{ARRAYS[1]}.npy"], reasons
        assert "input(s) of its segment changed while this run read them" in reasons[f"{ARRAYS[0]}.npy"], reasons
    assert all(open_store(cfg.store_location)[a].attrs["complete"] is False for a in ARRAYS)

    inject([])
    res2 = run_job(cfg)
    assert not res2.failed, res2.failure_reasons()
    x[FRAMES[0]:FRAMES[0] + FRAMES[1]] *= 0.5
    if change == "appended":  # 10 samples longer, it now overlaps the third file, which is left out
        x = np.concatenate([x[:FRAMES[0] + FRAMES[1]], x[FRAMES[0]:FRAMES[0] + 10]])
        assert [b.relpath for b in res2.invalid] == [f"{ARRAYS[2]}.npy"] and "overlaps" in res2.invalid[0].reason
    kept = ARRAYS if change == "same size" else ARRAYS[:2]
    g = open_store(cfg.store_location)
    assert all(g[a].attrs["complete"] is True for a in kept)
    filt = g[ARRAYS[0]].attrs["filter"]
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"], padlen=filt["edge_samples"])
    y = np.concatenate(read_output(cfg.store_location, kept))
    assert y.shape == ref.shape and np.max(np.abs(y - ref)) <= filt["tolerance"] * np.max(np.abs(x))


def test_a_block_whose_chunk_never_lands_is_an_error_and_the_others_are_recorded(tmp_path, monkeypatch):
    # Injected fault: one block's chunk file silently never reaches the disk. The store must
    # refuse to record that block as passed; every other block keeps its own status.
    from twinpass.io import store as store_module

    real_put = store_module._overwrite_file  # block tasks write their data chunks with it
    lost = f"{ARRAYS[1]}/c/3/0"

    def lossy_put(path, payload, **kwargs):
        if not str(path).endswith(lost):
            real_put(path, payload, **kwargs)

    monkeypatch.setattr(store_module, "_overwrite_file", lossy_put)
    res, blocks = _results(_archive(tmp_path, engine={"retries": 0}))
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    assert blocks[(ARRAYS[1], 3)].status == ERROR and "data chunk 3 is missing" in blocks[(ARRAYS[1], 3)].error
    st = block_status(tmp_path / "run" / "out.zarr", ARRAYS[1])
    assert st[3] == ERROR and np.all(np.isin(np.delete(st, 3), (PASS, WARN)))
    assert all(r.status in (PASS, WARN) for key, r in blocks.items() if key != (ARRAYS[1], 3))


def _failing_sync(chunk: str):
    """An ``os.fdatasync`` that reports an I/O error (POSIX errno EIO) for one chunk file."""
    import errno
    import os

    if not hasattr(os, "fdatasync") or not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs fdatasync and /proc/self/fd (Linux)")
    real_sync = os.fdatasync

    def failing_sync(fd):
        if os.readlink(f"/proc/self/fd/{fd}").endswith(chunk):
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real_sync(fd)

    return failing_sync


def test_a_block_whose_chunk_cannot_be_synced_is_an_error_and_the_rerun_completes(tmp_path, monkeypatch):
    # Injected fault: the disk reports an I/O error when one block's chunk is synced. The
    # block must not be recorded done (its data may not be on the disk); the other blocks
    # keep their own statuses, and a rerun without the fault completes the file.
    import os

    cfg = _archive(tmp_path, engine={"retries": 0})
    with monkeypatch.context() as m:
        m.setattr(os, "fdatasync", _failing_sync(f"{ARRAYS[1]}/c/3/0"))
        res, blocks = _results(cfg)
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    assert blocks[(ARRAYS[1], 3)].status == ERROR and "input/output error" in blocks[(ARRAYS[1], 3)].error.lower()
    st = block_status(tmp_path / "run" / "out.zarr", ARRAYS[1])
    assert st[3] == ERROR and np.all(np.isin(np.delete(st, 3), (PASS, WARN)))
    assert run_job(cfg).ok  # the fault gone, the rerun writes the block again


def test_without_sync_no_block_waits_on_the_disk(tmp_path, monkeypatch):
    # [output] sync = false: the same injected sync error goes unnoticed (nothing is synced),
    # every block completes, and the output is the synced run's, byte for byte.
    import os

    synced = _archive(tmp_path, "synced")
    assert run_job(synced).ok
    cfg = _archive(tmp_path, output={"sync": False}, engine={"retries": 0})
    with monkeypatch.context() as m:
        m.setattr(os, "fdatasync", _failing_sync(f"{ARRAYS[1]}/c/3/0"))
        res, _ = _results(cfg)
    assert res.ok
    for a in ARRAYS:
        np.testing.assert_array_equal(open_store(tmp_path / "run" / "out.zarr")[a][:],
                                      open_store(tmp_path / "synced" / "out.zarr")[a][:])


def test_with_local_workers_the_driver_syncs_each_block_before_recording_it(tmp_path, monkeypatch):
    # Local worker threads leave syncing to the driver, which waits on the disk while they
    # compute. Every block recorded done must have had its chunk file synced first, and no
    # Dask worker thread may wait in fdatasync for an output chunk.
    import os
    import threading


    if not hasattr(os, "fdatasync") or not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs fdatasync and /proc/self/fd (Linux)")
    events: list[tuple[str, ...]] = []
    real_sync, real_record = os.fdatasync, OutputStore.record_blocks

    def watched_sync(fd):
        events.append(("sync", os.readlink(f"/proc/self/fd/{fd}"), threading.current_thread().name))
        return real_sync(fd)

    def watched_record(self, name, records):
        events.extend(("record", f"{name}/c/{r.index}/0") for r in records if r.status in (PASS, WARN))
        return real_record(self, name, records)

    cfg = _archive(tmp_path, engine={"scheduler": "threads", "workers": 2})
    monkeypatch.setattr(os, "fdatasync", watched_sync)
    monkeypatch.setattr(OutputStore, "record_blocks", watched_record)
    res, blocks = _results(cfg)
    assert res.ok and len(blocks) == sum(FRAMES) // 1000
    output_syncs = [e for e in events if e[0] == "sync" and any(f"/{a}/c/" in e[1] for a in ARRAYS)]
    assert output_syncs and not [e for e in output_syncs if "Dask" in e[2]], output_syncs  # Dask worker threads
    recorded = [e[1] for e in events if e[0] == "record"]
    assert set(recorded) == {f"{name}/c/{i}/0" for name, i in blocks}  # (the seam checks record some again)
    for chunk in set(recorded):
        first_record = events.index(("record", chunk))
        assert any(e[0] == "sync" and e[1].endswith(chunk) for e in events[:first_record]), chunk


def test_block_records_are_synced_before_any_file_is_marked_complete(tmp_path, monkeypatch):
    # Tables and attributes are replaced by rename, durable only once synced: every
    # completion flag must follow a sync of the file system that came after the file's
    # last block record, so that a power cut cannot keep the flag and lose the records.

    events: list[tuple[str, str]] = []
    real_sync, real_record, real_complete = OutputStore.sync_records, OutputStore.record_blocks, OutputStore.set_complete

    def watched_sync(self):
        events.append(("sync", ""))
        return real_sync(self)

    def watched_record(self, name, records):
        events.append(("record", name))
        return real_record(self, name, records)

    def watched_complete(self, name, complete, checks_summary=None):
        events.append(("complete" if complete else "incomplete", name))
        return real_complete(self, name, complete, checks_summary)

    monkeypatch.setattr(OutputStore, "sync_records", watched_sync)
    monkeypatch.setattr(OutputStore, "record_blocks", watched_record)
    monkeypatch.setattr(OutputStore, "set_complete", watched_complete)
    res, _ = _results(_archive(tmp_path))
    assert res.ok
    completed = [i for i, e in enumerate(events) if e[0] == "complete"]
    assert [events[i][1] for i in completed] == ARRAYS
    for i in completed:
        last_record = max(j for j, e in enumerate(events[:i]) if e == ("record", events[i][1]))
        assert ("sync", "") in events[last_record:i], events

    events.clear()  # [output] sync = false: nothing is synced
    res, _ = _results(_archive(tmp_path, "unsynced", output={"sync": False}))
    assert res.ok and ("sync", "") not in events and [e[1] for e in events if e[0] == "complete"] == ARRAYS


def test_files_whose_records_cannot_be_synced_are_not_marked_complete(tmp_path, monkeypatch):
    # Injected fault: the disk reports an I/O error (POSIX errno EIO) when the records are
    # synced. No file of the segment may be marked complete; a rerun without the fault
    # completes them.
    import errno

    from twinpass.io import store as store_module

    def failing(path):
        raise OSError(errno.EIO, "Input/output error", str(path))

    cfg = _archive(tmp_path)
    with monkeypatch.context() as m:
        m.setattr(store_module, "sync_file_system", failing)
        res = run_job(cfg)
    assert not res.ok and res.counts()["complete"] == 0
    assert all("input/output error" in " ".join(o.errors.values()).lower() for o in res.outcomes), res.outcomes
    assert not any(open_store(cfg.store_location)[a].attrs.get("complete") for a in ARRAYS)
    assert run_job(cfg).ok


def test_syncing_a_file_system_reports_errors(tmp_path):
    from twinpass.io.store_util import sync_file_system

    import sys

    sync_file_system(tmp_path)  # the real system call
    if sys.platform.startswith("linux"):  # syncfs(2) needs the file system's folder; sync(2) takes none
        with pytest.raises(OSError):
            sync_file_system(tmp_path / "missing")


def test_only_workers_of_a_local_cluster_leave_syncing_to_the_driver(process_cluster):
    from distributed import Client

    from twinpass.engine import dask_client, shares_this_machine

    with dask_client("threads", 1) as client:
        assert shares_this_machine(client)
    with Client(process_cluster.scheduler_address) as client:  # workers anywhere: they sync their own
        assert not shares_this_machine(client)


def test_a_worker_killed_mid_block_is_replaced_and_the_output_is_unchanged(tmp_path, inject, process_cluster):
    clean = _archive(tmp_path, "clean")
    assert run_job(clean).ok
    state = inject([{"action": "kill-once", "file": ARRAYS[0], "block": 4}])
    cfg = _archive(tmp_path, "killed")
    res = run_job(cfg, scheduler=process_cluster.scheduler_address)
    assert res.ok and res.counts()["complete"] == 3
    assert [line.split()[:4] for line in faults.fired(state)] == [["kill-once", ARRAYS[0], "block", "4"]]
    for a, b in zip(read_output(clean.store_location, ARRAYS), read_output(cfg.store_location, ARRAYS)):
        assert np.array_equal(a, b)


def test_a_block_filtered_without_halo_fails_the_seam_check(tmp_path, inject):
    inject([{"action": "halo0", "file": ARRAYS[1], "block": 2}])
    cfg = _archive(tmp_path, processing={"block_seconds": 5.0, "mode": "halo"})
    res = run_job(cfg)
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    g = open_store(cfg.store_location)
    st = block_status(cfg.store_location, ARRAYS[1])
    # The block itself and both neighbours sharing a seam with it fail; nothing else.
    assert st.tolist() == [PASS, FAIL, FAIL, FAIL, PASS, PASS]
    table = g[f"_twinpass/blocks/{ARRAYS[1]}"]
    columns = list(table["figures"].attrs["columns"])
    seam = np.asarray(table["figures"][:])[:, :, columns.index("seam_mismatch")]
    assert np.all(seam[1:4] > SEAM_FACTOR * 1e-9) and np.all(seam[[0, 4]] <= SEAM_FACTOR * 1e-9)
    assert g[ARRAYS[1]].attrs["complete"] is False
    assert g[ARRAYS[0]].attrs["complete"] is True and g[ARRAYS[2]].attrs["complete"] is True


def test_a_block_with_a_wrong_response_fails_the_response_check(tmp_path, inject):
    inject([{"action": "perturb", "file": ARRAYS[2], "block": 3}])
    cfg = _archive(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    res = run_job(cfg)
    assert res.failed == ["deck/deck_20260301T000110.npy"]
    table = open_store(cfg.store_location)[f"_twinpass/blocks/{ARRAYS[2]}"]
    columns = list(table["figures"].attrs["columns"])
    figures = np.asarray(table["figures"][:])
    dev = figures[:, :, columns.index("passband_dev_db")]
    # Each pass gains sqrt(2) in amplitude: 2x overall, 20*log10(2) = 6.02 dB (definition of the dB).
    np.testing.assert_allclose(dev[3], 20 * np.log10(2.0), atol=0.5)
    assert np.all(np.abs(np.delete(dev, 3, axis=0)) < 0.5)
    st = block_status(cfg.store_location, ARRAYS[2])
    assert st[3] == FAIL
    # The failed block keeps the output this run computed, for comparison with its input (the
    # README's output layout): with each pass's gain sqrt(2) it is twice the whole-stream
    # scipy.signal.sosfiltfilt (linearity), where a block that raised would read NaN.
    filt = open_store(cfg.store_location)[ARRAYS[2]].attrs["filter"]
    x = make_signal(sum(FRAMES), 2, FS, seed=21)
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                   padlen=filt["edge_samples"])[FRAMES[0] + FRAMES[1]:]
    y = read_output(cfg.store_location, ARRAYS)[2]
    np.testing.assert_allclose(y[6000:8000], 2.0 * ref[6000:8000], rtol=0, atol=1e-6 * np.max(np.abs(x)))


NARROW_BANDPASS = {"kind": "bandpass", "family": "butterworth", "order": 2, "cutoff_hz": [48.0, 52.0]}
"""Overall -3 dB at 48 and 52 Hz, 2nd order per pass: a band a few Welch bins wide at first sight."""


def test_a_narrow_band_pass_with_a_wrong_response_on_every_block_is_not_complete(tmp_path, inject):
    # Every block of every file filtered with the first section's numerator times sqrt(2)
    # (+6 dB overall, the "perturb" fault): neighbouring blocks agree at their seams, so only
    # the response check can tell. Its passband bins measure 20*log10(2) = 6.02 dB too much
    # (definition of the dB), every block fails, no file is complete and
    # `status --require-complete` exits 1.
    inject([{"action": "perturb", "file": "*", "block": "*"}])
    cfg = _archive(tmp_path, response=NARROW_BANDPASS, processing={"block_seconds": 20.0, "mode": "halo"})
    res = run_job(cfg)
    assert sorted(res.failed) == sorted(f"{a}.npy" for a in ARRAYS)
    g = open_store(cfg.store_location)
    for name in ARRAYS:
        assert g[name].attrs["complete"] is False
        assert np.all(block_status(cfg.store_location, name) == FAIL)
        table = g[f"_twinpass/blocks/{name}"]
        columns = list(table["figures"].attrs["columns"])
        dev = np.asarray(table["figures"][:])[:, :, columns.index("passband_dev_db")]
        np.testing.assert_allclose(dev, 20 * np.log10(2.0), atol=0.5)
    status = conftest.run_cli(["status", str(tmp_path / "run" / "twinpass.toml"), "--require-complete"],
                              check=False)
    assert status.returncode == 1, status.stdout + status.stderr


@pytest.mark.parametrize("db", [-2.0, 2.0])
def test_a_passband_gain_error_of_two_db_on_every_block_fails_either_way(tmp_path, inject, db):
    # Every block filtered with the first section's numerator times 10**(db/40): db/2 dB per
    # pass, db dB overall (definition of the dB), a processing fault as gross as a wrong
    # calibration. The passband estimate measures it within its 0.3 dB allowance, beyond the
    # default fail limit (a Butterworth has no ripple: 0.3 + [checks] passband_fail_db 1.0 dB,
    # the README's configuration reference), too low or too high alike: no file is complete
    # and `status --require-complete` exits 1.
    inject([{"action": "perturb", "file": "*", "block": "*", "db": db}])
    cfg = _archive(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    res = run_job(cfg)
    assert sorted(res.failed) == sorted(f"{a}.npy" for a in ARRAYS)
    g = open_store(cfg.store_location)
    for name in ARRAYS:
        table = g[f"_twinpass/blocks/{name}"]
        columns = list(table["figures"].attrs["columns"])
        dev = np.asarray(table["figures"][:])[:, :, columns.index("passband_dev_db")]
        np.testing.assert_allclose(dev, db, atol=0.3)
    assert all(f"passband deviation {db:+.2g}" in r for r in res.failure_reasons().values())
    status = conftest.run_cli(["status", str(tmp_path / "run" / "twinpass.toml"), "--require-complete"],
                              check=False)
    assert status.returncode == 1, status.stdout + status.stderr


def test_blocks_graded_warn_are_named_by_the_run_and_counted_by_status(tmp_path, inject):
    # A gain error of -1.05 dB overall (10**(-1.05/40) per pass, definition of the dB) lies
    # between the default warn limit, 0.3 + [checks] passband_warn_db 0.5 = 0.8 dB, and the
    # fail limit, 0.3 + passband_fail_db 1.0 = 1.3 dB (the README's configuration reference;
    # a Butterworth has no ripple): every block warns, every file is complete, and the
    # run's summary, `twinpass status` and `--require-complete` all say so.
    inject([{"action": "perturb", "file": "*", "block": "*", "db": -1.05}])
    cfg = _archive(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    toml = str(tmp_path / "run" / "twinpass.toml")
    run = conftest.run_cli(["run", toml, "--no-flow", "--no-report"])
    for name in ARRAYS:
        assert np.all(block_status(cfg.store_location, name) == WARN)
        line = next(x for x in run.stdout.splitlines() if x.startswith(f"warned: {name}.npy: "))
        worst = re.search(r"block\(s\) graded warn \(worst of the file: passband deviation (\S+) dB", line)
        assert worst and abs(float(worst.group(1)) + 1.05) <= ESTIMATOR_ERROR_DB, line
    assert run.stdout.startswith("complete 3, skipped (unchanged) 0, failed 0")
    status = conftest.run_cli(["status", toml, "--require-complete"])
    assert "files with blocks graded warn (complete, see CHECKS): 3" in status.stdout
    assert "complete, with 3 file(s) whose blocks were graded warn" in status.stderr
    quiet = conftest.run_cli(["run", toml, "--no-flow", "--no-report"])  # nothing run: nothing said
    assert "warned:" not in quiet.stdout


def test_fault_rules_are_checked():
    with pytest.raises(ConfigError, match="unknown action 'explode'"):
        faults.parse_rules('[{"action": "explode"}]')
    with pytest.raises(ConfigError, match="unknown key"):
        faults.parse_rules('[{"action": "raise", "blocks": 3}]')
    with pytest.raises(ConfigError, match="not valid JSON"):
        faults.parse_rules("[{")
    assert faults.parse_rules('[{"action": "sleep", "seconds": 0.1, "block": 2}]')[0].matches("x", 2)
    with pytest.raises(ConfigError, match="only a \"perturb\" rule takes \"db\""):
        faults.parse_rules('[{"action": "raise", "db": 3}]')
    with pytest.raises(ConfigError, match="db = 'loud'"):
        faults.parse_rules('[{"action": "perturb", "db": "loud"}]')
    # 10**(db/40) per pass: 20*log10 of its square is db (definition of the dB).
    assert 40 * np.log10(faults.perturb_factor({"perturb:-2.5"})) == pytest.approx(-2.5)
    assert faults.perturb_factor({"perturb"}) == pytest.approx(np.sqrt(2.0))
    assert faults.perturb_factor({"halo0"}) is None


def test_a_hold_rule_keeps_its_block_waiting_until_its_file_exists_or_its_seconds_pass(tmp_path, inject):
    # The "hold" fault lets a test act while blocks wait (stop a server, press Ctrl-C): the
    # block must not go on before the file appears, must go on once it does, and with
    # "seconds" must not wait past them.
    import threading

    go = tmp_path / "go"
    inject([{"action": "hold", "file": "deck/x", "block": 1, "path": str(go)}])
    assert faults.apply("deck/x", 0) == set()  # another block is not held
    released = threading.Event()
    waiter = threading.Thread(target=lambda: (faults.apply("deck/x", 1), released.set()), daemon=True)
    waiter.start()
    assert not released.wait(0.5)  # still held: no file yet
    go.touch()
    assert released.wait(30)  # the file lets it go on
    waiter.join(30)
    go.unlink()
    inject([{"action": "hold", "file": "*", "block": "*", "path": str(go), "seconds": 0.2}])
    bounded = threading.Thread(target=faults.apply, args=("deck/x", 3), daemon=True)
    bounded.start()
    bounded.join(30)
    assert not bounded.is_alive() and not go.exists()  # gave up waiting after its seconds
    with pytest.raises(ConfigError, match=r"needs a \"path\""):
        faults.parse_rules('[{"action": "hold", "block": 1}]')


def test_reference_check_of_the_faulty_run_uses_scipy(tmp_path, inject):
    """After a retried fault the segment still equals scipy.signal.sosfiltfilt over the whole segment."""
    inject([{"action": "raise-once", "file": "*", "block": 1}])
    cfg = _archive(tmp_path)
    assert run_job(cfg).ok
    g = open_store(cfg.store_location)
    filt = g[ARRAYS[0]].attrs["filter"]
    x = make_signal(sum(FRAMES), 2, FS, seed=21)
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                   padlen=filt["edge_samples"])
    y = np.concatenate(read_output(cfg.store_location, ARRAYS))
    assert np.max(np.abs(y - ref)) <= filt["tolerance"] * np.max(np.abs(x))


def test_an_unchanged_neighbour_failing_a_seam_is_reported_and_rerun(tmp_path, inject):
    inject([{"action": "raise", "file": ARRAYS[1], "block": 0}])
    cfg = _archive(tmp_path)
    res = run_job(cfg)
    assert res.failed == ["deck/deck_20260301T000040.npy"]
    # Second run: the first file is complete and unchanged; the second resumes its block 0,
    # now filtered without halo, so the join of the two files fails its seam check.
    inject([{"action": "halo0", "file": ARRAYS[1], "block": 0}])
    res, blocks = _results(cfg)
    assert list(blocks) == [(ARRAYS[1], 0)]
    outcome = {o.array_name: o for o in res.outcomes}
    assert outcome[ARRAYS[0]].status == "failed" and outcome[ARRAYS[1]].status == "failed"
    assert outcome[ARRAYS[2]].status == "skipped"
    assert block_status(cfg.store_location, ARRAYS[0]).tolist() == [PASS] * 7 + [FAIL]
    assert block_status(cfg.store_location, ARRAYS[1]).tolist() == [FAIL, FAIL] + [PASS] * 4
    assert open_store(cfg.store_location)[ARRAYS[0]].attrs["complete"] is False
    # Third run, no faults: the blocks on both sides of the failed seams are recomputed and
    # everything completes.
    inject([])
    res, blocks = _results(cfg)
    assert res.ok and sorted(blocks) == [(ARRAYS[0], 7), (ARRAYS[1], 0), (ARRAYS[1], 1)]


def _deck_and_pier_with_full_disk(tmp_path, monkeypatch, refused):
    """Two streams of two files each; the store refuses to prepare the arrays ``refused``
    accepts (injected fault: no space left on device). Returns the job configuration."""
    from twinpass.errors import StoreError

    archive = tmp_path / "archive"
    write_stream(archive, "deck", make_signal(8000, 1, FS, seed=1), FS, 2)
    write_stream(archive, "pier", make_signal(8000, 1, FS, seed=2), FS, 2)
    real = OutputStore.prepare_file

    def full_disk(self, name, **kw):
        if refused(name):
            raise StoreError(f"{name}: no space left on device (injected)")
        return real(self, name, **kw)

    monkeypatch.setattr(OutputStore, "prepare_file", full_disk)
    return load_config(write_config(tmp_path))


def test_a_segment_that_cannot_be_prepared_does_not_stop_the_others(tmp_path, monkeypatch):
    cfg = _deck_and_pier_with_full_disk(tmp_path, monkeypatch, lambda name: name.startswith("pier/"))
    messages = []
    res = run_job(cfg, log_fn=messages.append)
    status = {o.relpath: o.status for o in res.outcomes}
    assert status == {"deck/deck_20260301T000000.npy": "complete", "deck/deck_20260301T000020.npy": "complete",
                      "pier/pier_20260301T000000.npy": "failed", "pier/pier_20260301T000020.npy": "failed"}
    failed = [o for o in res.outcomes if o.status == "failed"]
    assert all("no space left on device" in o.errors[-1] for o in failed)
    assert any(m.startswith("segment pier@") and "no space left" in m for m in messages)


def test_a_later_file_that_cannot_be_prepared_leaves_the_earlier_ones_unrecorded(tmp_path, monkeypatch):
    # A segment submits each file's blocks as soon as the file is prepared. When a later
    # file of the segment cannot be prepared, the blocks already submitted are cancelled
    # and none is recorded as done: the segment fails whole, the other segment completes.
    cfg = _deck_and_pier_with_full_disk(
        tmp_path, monkeypatch, lambda name: name.startswith("pier/") and name.endswith("000020"))
    res = run_job(cfg, log_fn=lambda m: None)
    status = {o.relpath: o.status for o in res.outcomes}
    assert status == {"deck/deck_20260301T000000.npy": "complete", "deck/deck_20260301T000020.npy": "complete",
                      "pier/pier_20260301T000000.npy": "failed", "pier/pier_20260301T000020.npy": "failed"}
    first_pier = "pier/pier_20260301T000000"
    assert open_store(cfg.store_location)[first_pier].attrs["complete"] is False
    assert not np.isin(block_status(cfg.store_location, first_pier), [PASS, WARN]).any()


def test_a_file_failing_its_checks_is_reported_with_blocks_figures_limits_and_remedy(tmp_path, inject):
    inject([{"action": "perturb", "file": ARRAYS[2], "block": 0}])
    cfg = _archive(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    res = run_job(cfg)
    reasons = res.failure_reasons()
    bad = "deck/deck_20260301T000110.npy"
    reason = reasons[bad]
    assert "\n" not in reason  # one line per file in the command's output
    # Blocks of 2000 frames (10 s at 200 Hz): block 0 is frames 0-1999, 0-10 s into the file,
    # which starts at 2026-03-01T00:01:10Z (its name), so 00:01:10-00:01:20 UTC.
    assert ("block 0 (frames 0-1,999, 0:00:00-0:00:10 into the file, 2026-03-01 00:01:10-00:01:20 UTC): "
            "passband deviation +6.0") in reason
    # Each pass gains sqrt(2) in amplitude: 2x overall, 20*log10(2) = 6.02 dB (definition of the dB);
    # the limit is [checks] passband_fail_db plus the estimator allowance (a Butterworth has no ripple).
    assert f"limit {cfg.checks.passband_fail_db + ESTIMATOR_ERROR_DB:.3g} dB either way" in reason
    # Its neighbour shares a seam with it: its failure is said to follow from block 0's.
    assert "block 1 (frames 2,000-3,999" in reason and "seam mismatch" in reason
    assert "following from the failed response check of block 0" in reason
    assert "compare input and output at those frames and rerun" in reason
    assert "checks failed (see its block table)" not in reason
    # The previous file's last block shares a seam with it too, across the join.
    assert "block 2 (frames 4,000-5,999, 0:00:20-0:00:30 into the file, 2026-03-01 00:01:00-00:01:10 UTC): " \
        "seam mismatch" in (
        reasons["deck/deck_20260301T000040.npy"])
    assert "following from the failed response check of block 0 of deck/deck_20260301T000110.npy" in (
        reasons["deck/deck_20260301T000040.npy"])
    # `twinpass status` shows the reason recorded with the run.
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert status["failed_inputs"][bad] == reason
    assert [line.split(":")[0] for line in status["failed_blocks"][bad]["blocks"]] == [
        "block 0 (frames 0-1,999, 0", "block 1 (frames 2,000-3,999, 0"]
    assert f"  {bad}: {reason}" in format_status(status)
    # The HTML report's list of failed blocks names them with their figures too.
    failed_blocks = dict(attention_lists(status))["Blocks that failed (the next run tries them again)"]
    assert any(line.startswith(f"{bad} block 0 (frames 0-1,999") and "passband deviation +6.0" in line
               for line in failed_blocks)


def test_seam_failures_next_to_a_block_graded_warn_name_that_block_as_their_cause(tmp_path, inject):
    # One block filtered -1.05 dB overall (10**(-1.05/40) per pass, definition of the dB):
    # its response only warns (between 0.8 and 1.3 dB, the README's defaults), but its
    # output differs from its neighbours' by about 11 % at the seams they share, far beyond
    # the seam limit: the block, its next block and the previous file's last block fail on
    # their seams, and each says the warned block is the cause, not a halo too short.
    inject([{"action": "perturb", "file": ARRAYS[2], "block": 0, "db": -1.05}])
    cfg = _archive(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    reasons = run_job(cfg).failure_reasons()
    own = reasons["deck/deck_20260301T000110.npy"]
    assert "block 0 (frames 0-1,999" in own and "its response check graded warn: passband deviation -1." in own
    assert "following from the response check of block 0, graded warn" in own
    assert ("following from the response check of block 0 of deck/deck_20260301T000110.npy, graded warn"
            in reasons["deck/deck_20260301T000040.npy"])
    assert all("means the halo is too short" not in r for r in reasons.values()), reasons
    assert "passes once that block's output is right" in reasons["deck/deck_20260301T000040.npy"]


def test_block_times_are_given_in_utc_across_midnight_and_to_the_millisecond():
    # Reference: Python's datetime arithmetic (timedelta added to an aware datetime, then
    # astimezone(UTC)); a start given at +01:00 is shown in UTC.
    import datetime as dt

    from twinpass.core import failures

    start = dt.datetime(2026, 3, 1, 23, 59, 50, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    assert failures._wall(start, 0.0, 10.0) == "2026-03-01 22:59:50-23:00:00 UTC"
    late = dt.datetime(2026, 3, 1, 23, 59, 50, tzinfo=dt.timezone.utc)
    assert failures._wall(late, 5.25, 20.0) == "2026-03-01 23:59:55.250 to 2026-03-02 00:00:10 UTC"


def test_the_one_line_reason_names_a_few_blocks_and_status_lists_them_all(tmp_path, inject):
    inject([{"action": "halo0", "file": ARRAYS[1], "block": "*"}])
    cfg = _archive(tmp_path, processing={"block_seconds": 5.0, "mode": "halo"})
    res = run_job(cfg)
    middle = "deck/deck_20260301T000040.npy"
    reason = res.failure_reasons()[middle]
    # Six blocks of 1000 frames, each filtered without its halo: every seam of the file fails.
    assert reason.startswith("6 of 6 block(s) failed their checks: block 0 (frames 0-999, 0:00:00-0:00:05 ")
    assert reason.count(": seam mismatch") == SHOWN and f"and {6 - SHOWN} more" in reason
    assert "a seam mismatch that stays means the halo is too short" in reason
    text = format_status(collect_status(OutputStore.open(cfg.store_location, mode="r")))
    for i in range(6):
        assert f"\n    block {i} (frames {1000 * i:,}-{1000 * i + 999:,}" in text


def test_blocks_done_only_after_a_retry_are_counted_and_said_not_failed(tmp_path, inject):
    # Every block raises on its first attempt (injected) and passes on the retry within its
    # task ([engine] retries = 2): every file completes and the run exits 0, but the retries
    # are not silent: the run's summary says how many blocks succeeded only after a retry,
    # the run's record counts them and `twinpass status` says it, as a warning, not a failure.
    inject([{"action": "raise-once", "file": "*", "block": "*"}])
    cfg = _archive(tmp_path, processing={"block_seconds": 5.0, "mode": "halo"})
    blocks = sum(FRAMES) // 1000  # 5 s at 200 Hz: 1000-sample blocks, 8 + 6 + 8
    toml = str(tmp_path / "run" / "twinpass.toml")
    run = conftest.run_cli(["run", toml, "--no-flow", "--no-report"])
    assert run.stdout.startswith("complete 3, skipped (unchanged) 0, failed 0"), run.stdout
    said = [x for x in run.stdout.splitlines() if x.startswith("retried: ")]
    assert said == [f"retried: {blocks} block(s) succeeded only after a retry: their input may be on a flaky "
                    f"mount (in {', '.join(a + '.npy' for a in ARRAYS)})"], run.stdout
    assert all(np.all(block_status(cfg.store_location, a) == PASS) for a in ARRAYS)

    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert status["last_run"]["counts"]["blocks_retried"] == blocks
    assert status["retried"] == {a + ".npy": n for a, n in zip(ARRAYS, (8, 6, 8))}
    shown = conftest.run_cli(["status", toml, "--require-complete"])  # not a failure: exit 0
    assert f"{blocks} block(s) succeeded only after a retry: their input may be on a flaky mount" in shown.stdout

    quiet = conftest.run_cli(["run", toml, "--no-flow", "--no-report"])  # nothing run: nothing said
    assert "retried:" not in quiet.stdout
    assert "succeeded only after a retry" not in conftest.run_cli(["status", toml]).stdout
