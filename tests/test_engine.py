"""The engine end to end: real archives on disk, real Zarr stores, real Dask schedulers.

The blockwise result of a segment of several files must equal filtering the whole
segment at once with ``scipy.signal.sosfiltfilt`` / ``scipy.signal.filtfilt`` (the
reference library for whole-signal two-pass results), and must not depend on how the
blocks are scheduled.
"""

from __future__ import annotations

import logging
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile
import scipy.signal

from conftest import (
    BANDPASS,
    LOWPASS_FIR,
    chunk_files,
    make_signal,
    open_store,
    read_output,
    run_cli,
    write_config,
    write_stream,
)
from twinpass.config import load_config
from twinpass.errors import ConfigError
from twinpass.job import run_job

FS = 200.0


def _reference(x: np.ndarray, filt: dict) -> np.ndarray:
    """Whole-segment two-pass result from scipy.signal with the stored coefficients and edge."""
    edge = filt["edge"]
    padtype = None if edge == "none" else edge
    n = int(filt["edge_samples"])
    if "sos" in filt:
        return scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=padtype, padlen=n)
    return scipy.signal.filtfilt(np.asarray(filt["taps"]), [1.0], x, axis=0, padtype=padtype, padlen=n)


def _wav_full_scale(path: Path) -> np.ndarray:
    """A PCM WAV file read by scipy.io.wavfile, in full-scale units (24-bit arrives left-justified in int32)."""
    _, data = scipy.io.wavfile.read(path)
    data = data.reshape(data.shape[0], -1)
    scale = {np.dtype("int16"): 2.0**15, np.dtype("int32"): 2.0**31}[data.dtype]
    return data.astype(np.float64) / scale


CASES = [
    # fmt, channels, edge, edge_samples, block_seconds, response
    ("npy", 1, "odd", "auto", 2.0, BANDPASS),      # blocks (400) shorter than the halo (670)
    ("wav24", 3, "even", "auto", 5.0, BANDPASS),
    ("npy", 2, "constant", 50, 3.0, BANDPASS),
    ("wav24", 1, "none", "auto", 7.0, BANDPASS),
    ("wav16", 2, "odd", "auto", 2.0, LOWPASS_FIR),  # FIR: halo = taps - 1 (16), blocks of 400
]


@pytest.mark.parametrize("fmt,channels,edge,edge_samples,block_seconds,response", CASES)
def test_segment_equals_whole_signal_two_pass(tmp_path, fmt, channels, edge, edge_samples, block_seconds,
                                              response):
    x = make_signal(36000, channels, FS, seed=channels)
    files = write_stream(tmp_path / "archive", "deck", x, FS, [12000, 10000, 14000], fmt=fmt)
    cfg = write_config(tmp_path, response=response,
                       processing={"edge": edge, "edge_samples": edge_samples, "block_seconds": block_seconds})
    res = run_job(load_config(cfg))
    assert res.ok and res.counts()["complete"] == 3

    g = open_store(tmp_path / "out.zarr")
    filt = g[files.arrays[0]].attrs["filter"]
    assert all(g[a].attrs["filter"] == filt for a in files.arrays)  # one design for the segment
    assert filt["edge"] == edge
    # The input as a reference reader sees it: numpy for NPY, scipy.io.wavfile for WAV.
    if fmt == "npy":
        x_in = np.concatenate([np.load(p).reshape(-1, channels) for p in files.paths])
    else:
        x_in = np.concatenate([_wav_full_scale(p) for p in files.paths])
    np.testing.assert_array_equal(x_in, files.concat)
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    assert y.dtype == np.float64 and y.shape == x_in.shape
    ref = _reference(x_in, filt)
    err = np.max(np.abs(y - ref))
    # The product's promise: |blockwise - whole segment| <= tolerance * max|input|.
    assert err <= filt["tolerance"] * np.max(np.abs(x_in)), err
    # Several blocks per file, and the layout recorded in the attributes is the one used.
    blocks = g[files.arrays[0]].attrs["blocks"]
    assert blocks["block_samples"] == int(block_seconds * FS)
    assert blocks["halo_samples"] == filt["effective_length_samples"]


@pytest.mark.parametrize("away", [2, 1], ids=["last-file", "middle-file"])
def test_a_file_back_after_a_run_without_it_is_joined_again(tmp_path, away):
    # A run without one file of a stream (excluded here; moved away or invalid for a while
    # alike) refilters its neighbours' ends as segment ends; once it is back, unchanged, the
    # next run must join it again. Reference: scipy.signal.sosfiltfilt on the whole segment.
    x = make_signal(36000, 2, FS, seed=5)
    files = write_stream(tmp_path / "archive", "deck", x, FS, [12000, 12000, 12000])
    rel = files.paths[away].relative_to(tmp_path / "archive").as_posix()
    cfg = write_config(tmp_path)
    assert run_job(load_config(cfg)).ok
    write_config(tmp_path, archive={"exclude": [rel]})
    without = run_job(load_config(cfg))
    assert without.ok and without.counts()["complete"] >= 1
    write_config(tmp_path)
    back = run_job(load_config(cfg))
    assert back.ok and back.counts()["skipped"] >= 1  # the file back is filtered next to the same files
    g = open_store(tmp_path / "out.zarr")
    assert all(g[a].attrs["complete"] is True for a in files.arrays)
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    filt = g[files.arrays[0]].attrs["filter"]
    assert np.max(np.abs(y - _reference(files.concat, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_a_corrected_manifest_updates_the_outputs_without_refiltering(tmp_path):
    # A recorder clock found an hour off, and the stream renamed, in the manifest: the
    # outputs' attributes follow, no block runs, and the values stay those of scipy.
    x = make_signal(24000, 1, FS, seed=9)
    (tmp_path / "archive").mkdir()
    for i in range(2):
        np.save(tmp_path / "archive" / f"f{i}.npy", x[12000 * i: 12000 * (i + 1)])

    def manifest(stream: str, hour: int) -> None:
        (tmp_path / "archive" / "manifest.csv").write_text(
            f"path,stream,start_time\nf0.npy,{stream},2026-03-01T{hour:02d}:00:00Z\n"
            f"f1.npy,{stream},2026-03-01T{hour:02d}:01:00Z\n")

    manifest("pier", 12)
    cfg = write_config(tmp_path, archive={"manifest": "archive/manifest.csv"})
    assert run_job(load_config(cfg)).counts()["complete"] == 2
    before = read_output(tmp_path / "out.zarr", ["f0", "f1"])
    manifest("pier-east", 13)
    again = run_job(load_config(cfg))
    assert again.ok and again.counts()["blocks_run"] == 0
    g = open_store(tmp_path / "out.zarr")
    assert [g[a].attrs["start_time"] for a in ("f0", "f1")] == ["2026-03-01T13:00:00+00:00",
                                                                "2026-03-01T13:01:00+00:00"]
    assert {g[a].attrs["stream"] for a in ("f0", "f1")} == {"pier-east"}
    assert {g[a].attrs["segment"] for a in ("f0", "f1")} == {"pier-east@2026-03-01T13:00:00+00:00"}
    for old, new in zip(before, read_output(tmp_path / "out.zarr", ["f0", "f1"])):
        np.testing.assert_array_equal(old, new)
    filt = g["f0"].attrs["filter"]
    y = np.concatenate(before)
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_a_partial_rerun_keeps_the_blocks_a_file_was_written_in(tmp_path, mode):
    # block_seconds (and chunk_seconds, compression) apply to files written whole from then
    # on: after a change, a new file next to an old one reruns only the old file's blocks its
    # halo reaches, in the old blocks and chunks, and a lost chunk of an old file reruns its
    # own block alone. Reference: scipy.signal.sosfiltfilt on the whole segment.
    x = make_signal(36000, 2, FS, seed=13)
    files = write_stream(tmp_path / "archive", "deck", x, FS, [12000, 12000, 12000])
    last = files.paths[2].relative_to(tmp_path / "archive").as_posix()
    cfg = write_config(tmp_path, processing={"block_seconds": 10.0, "mode": mode},  # blocks of 2000
                       archive={"exclude": [last]})
    assert run_job(load_config(cfg)).ok
    write_config(tmp_path, processing={"block_seconds": 25.0, "mode": mode},  # blocks of 5000
                 output={"compression": "zstd"})
    appended = run_job(load_config(cfg))
    assert appended.ok
    runs = {o.array_name: o.blocks_run for o in appended.outcomes}
    g = open_store(tmp_path / "out.zarr")
    a0, a1, a2 = files.arrays
    assert runs.get(a0, 0) == 0 and 1 <= runs[a1] <= 2  # the halo (670) reaches 1 block of 2000
    assert g[a1].chunks == (2000, 2) and g[a1].attrs["blocks"]["block_samples"] == 2000
    assert g[a2].chunks == (5000, 2)
    shutil.rmtree(tmp_path / "out.zarr" / a0 / "c" / "3")  # one chunk of the old file lost
    repaired = run_job(load_config(cfg))
    assert repaired.ok and {o.array_name: o.blocks_run for o in repaired.outcomes if o.blocks_run} == {a0: 1}
    g = open_store(tmp_path / "out.zarr")
    assert all(g[a].attrs["complete"] is True for a in files.arrays)
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    filt = g[a0].attrs["filter"]
    assert np.max(np.abs(y - _reference(files.concat, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_default_checks_pass_and_figures_are_recorded(tmp_path):
    x = make_signal(24000, 2, FS, seed=3)
    files = write_stream(tmp_path / "archive", "pier", x, FS, 2)
    cfg = write_config(tmp_path)
    res = run_job(load_config(cfg))
    assert res.ok
    g = open_store(tmp_path / "out.zarr")
    for a in files.arrays:
        st = np.asarray(g[f"_twinpass/blocks/{a}/status"][:])
        assert set(st.tolist()) <= {1, 2} and len(st) == 12000 // 1000
        checks = g[a].attrs["checks"]
        assert checks["blocks_measured"] == len(st)  # the response was measured on every block
        assert checks["seam_mismatch"] is not None and checks["seam_mismatch"] < 10 * 1e-9
        assert g[a].attrs["complete"] is True


def _archive_for_schedulers(root: Path) -> list[str]:
    x = make_signal(30000, 3, FS, seed=11)
    return list(write_stream(root, "deck", x, FS, [10000, 12000, 8000], fmt="wav24").arrays)


def _variant(tmp_path: Path, name: str, archive: Path) -> Path:
    folder = tmp_path / name
    folder.mkdir()
    return write_config(folder, archive={"root": str(archive)},
                        processing={"block_seconds": 3.0},
                        output={"dtype": "float32", "compression": "lz4"})


def test_identical_bytes_for_every_scheduler_and_worker_count(tmp_path, process_cluster):
    archive = tmp_path / "archive"
    arrays = _archive_for_schedulers(archive)
    runs = {}
    for scheduler, workers in (("threads", 1), ("threads", 2), ("processes", 2),
                               (process_cluster.scheduler_address, 2)):
        name = "address" if "://" in scheduler else scheduler
        cfg = _variant(tmp_path, f"{name}{workers}", archive)
        assert run_job(load_config(cfg), scheduler=scheduler, workers=workers).ok
        runs[(name, workers)] = cfg.parent / "out.zarr"

    # The same inputs give the same bytes whatever runs the blocks, in whatever order.
    first = runs[("threads", 1)]
    ref_arrays = read_output(first, arrays)
    ref_chunks = chunk_files(first)
    assert len(ref_chunks) == sum(-(-n // 600) for n in (10000, 12000, 8000))  # one chunk per 600-sample block
    for key, store in runs.items():
        for a, b in zip(ref_arrays, read_output(store, arrays)):
            assert np.array_equal(a, b), key
        assert chunk_files(store) == ref_chunks, key


def test_ctrl_c_ends_the_command_even_when_a_block_never_returns(tmp_path):
    """A block stuck in a read that never returns (a stalled network mount; here the "hold"
    fault with no file to wait for): Ctrl-C must still end the command, with exit status 130
    and a line saying it ended without that block, instead of waiting for it forever (at
    exit Python waits for every thread of its thread pools). Nothing is marked complete that
    is not, and the next run finishes the job: scipy.signal.sosfiltfilt over the whole segment."""
    import json

    from conftest import cli_env, interrupt_cli
    from twinpass.io.store import OutputStore

    x = make_signal(16000, 1, FS, seed=8)
    files = write_stream(tmp_path / "archive", "deck", x, FS, 2)
    cfg = write_config(tmp_path, processing={"block_seconds": 10.0, "mode": "halo"})
    env = cli_env(TWINPASS_FAULTS=json.dumps([{"action": "hold", "file": files.arrays[1], "block": 0,
                                               "path": str(tmp_path / "never")}]))
    code, text, out = interrupt_cli(["run", str(cfg), "--no-flow", "--no-report"], env, tmp_path / "run.err",
                                    "blocks ", timeout=90)
    assert code == 130 and "twinpass: interrupted" in text, text + out
    assert "did not stop within" in text and "recorded as not done" in text, text
    records = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").file_records()
    assert records[f"{files.arrays[1]}.npy"].complete is False, records

    assert run_job(load_config(cfg)).ok
    g = open_store(tmp_path / "out.zarr")
    filt = g[files.arrays[0]].attrs["filter"]
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    # Reference: scipy.signal.sosfiltfilt on the whole segment (see _reference).
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_ctrl_c_stops_the_engine_command_and_the_next_run_finishes(tmp_path):
    """SIGINT while `twinpass run --no-flow` filters (each block delayed 0.5 s): the command
    stops its blocks instead of running the rest, exits 130 saying so, logs the stopped
    blocks in one line per segment, and marks no file complete with a block not done; the
    next run finishes the job, and the result equals scipy.signal.sosfiltfilt over the
    whole segment."""
    import json

    from conftest import cli_env, interrupt_cli, stopped_run_counts
    from twinpass.io.store import OutputStore
    from twinpass.io.store_util import array_name

    x = make_signal(16000, 1, FS, seed=8)
    files = write_stream(tmp_path / "archive", "deck", x, FS, 2)
    cfg = write_config(tmp_path)
    env = cli_env(TWINPASS_FAULTS=json.dumps([{"action": "sleep", "file": "*", "block": "*", "seconds": 0.5}]),
                  TWINPASS_FAULTS_STATE=str(tmp_path / "fault-state"))
    # Ctrl-C once the first block is recorded (its progress line).
    code, text, out = interrupt_cli(["run", str(cfg), "--no-flow", "--no-report"], env, tmp_path / "run.err",
                                    "blocks ")
    assert code == 130 and "twinpass: interrupted" in text, text + out
    assert "cancelled before they finished (the run was stopped)" in text and "failed after" not in text, text
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    records = store.file_records()
    todo = {rel: store.read_block_table(array_name(rel), figures=False, seams=False).todo().size for rel in records}
    assert sum(todo.values()) > 0, todo  # stopped: blocks were left, not run to the end
    assert all(todo[rel] == 0 for rel, rec in records.items() if rec.complete), (records, todo)
    # The status shows the stopped blocks as cancelled, not as failures of their checks.
    from twinpass.status import all_passed, collect_status, format_status

    status = collect_status(store)
    t = status["totals"]
    assert t["blocks_cancelled"] > 0 and t["blocks_failed"] == 0 and t["checks_failed"] == 0, t
    assert all(f["checks"] != "fail" and not f["errors"] for f in status["files"]), status["files"]
    assert "cancelled (a run was stopped; the next run does them)" in format_status(status)
    assert not all_passed(status)
    # The stopped run's record counts what it did, as the store shows it (a block was recorded
    # before the stop); the status and the report's provenance table say so.
    from twinpass.report_data import provenance

    c = stopped_run_counts(tmp_path / "out.zarr", files=2)
    assert c["blocks_run"] >= 1
    said = (f"complete {c['complete']}, failed 0, skipped 0, invalid 0, unfinished {c['unfinished']}, "
            f"blocks_run {c['blocks_run']}")
    assert said in format_status(status), format_status(status)
    assert said in dict(provenance(store, [array_name(rel) for rel in records]))["Last run"]

    assert run_job(load_config(cfg)).ok
    g = open_store(tmp_path / "out.zarr")
    filt = g[files.arrays[0]].attrs["filter"]
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    # Reference: scipy.signal.sosfiltfilt on the whole segment (see _reference).
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_cli_run_no_flow_prints_progress_and_summary(tmp_path):
    x = make_signal(16000, 1, FS, seed=5)
    write_stream(tmp_path / "archive", "deck", x, FS, 2)
    cfg = write_config(tmp_path)
    proc = run_cli(["run", str(cfg), "--no-flow", "--no-report"])
    assert "blocks 16/16" in proc.stderr
    assert "complete 2, skipped (unchanged) 0, failed 0" in proc.stdout
    assert "blocks run 16" in proc.stdout
    # Library log chatter (Dask scheduler and worker start-up) stays out of the terminal.
    assert "distributed." not in proc.stderr, proc.stderr


def test_no_whole_file_array_enters_the_task_graph(tmp_path, monkeypatch):
    """Every block task's arguments pickle to a few kB, whatever the file size."""
    import pickle

    from twinpass import engine

    sizes = []
    real_submit = None

    class Spy:
        def __init__(self, client):
            self.client = client

        def submit(self, fn, *args, **kw):
            sizes.append(len(pickle.dumps(args)))
            return real_submit(fn, *args, **kw)

        def __getattr__(self, name):
            return getattr(self.client, name)

    x = make_signal(60000, 4, FS, seed=2)
    write_stream(tmp_path / "archive", "deck", x, FS, 2)
    cfg = load_config(write_config(tmp_path, processing={"block_seconds": 10.0}))
    original = engine.run_segment

    def spying_run_segment(seg, design, cfg_, store, client, **kw):
        nonlocal real_submit
        real_submit = client.submit
        return original(seg, design, cfg_, store, Spy(client), **kw)

    monkeypatch.setattr("twinpass.job.run_segment", spying_run_segment)
    assert run_job(cfg).ok
    assert len(sizes) == 2 * 30000 // 2000
    # One file is 30000 x 4 float64 = 960 kB; a task carries coefficients and paths only.
    assert max(sizes) < 20_000, max(sizes)


def test_auto_mode_carries_states_when_the_halo_exceeds_the_block(tmp_path):
    """Blocks of 300 samples against a 670-sample halo: run_job hands the segment to carry mode,
    whose result also equals scipy.signal.sosfiltfilt over the whole segment."""
    x = make_signal(9000, 2, FS, seed=8)
    files = write_stream(tmp_path / "archive", "deck", x, FS, 3)
    cfg = write_config(tmp_path, processing={"mode": "auto", "block_seconds": 1.5})
    assert run_job(load_config(cfg)).ok
    g = open_store(tmp_path / "out.zarr")
    assert g[files.arrays[0]].attrs["blocks"]["mode"] == "carry"
    filt = g[files.arrays[0]].attrs["filter"]
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_auto_mode_carries_states_for_files_shorter_than_the_halo(tmp_path):
    """Twenty files of 400 samples, no block length set: the layout's blocks would be far
    longer than the 670-sample halo, but no block can be longer than its file, so run_job
    carries the states instead of reading several neighbouring files for every block; the
    result equals scipy.signal.sosfiltfilt over the whole segment."""
    x = make_signal(8000, 2, FS, seed=9)
    files = write_stream(tmp_path / "archive", "deck", x, FS, 20)
    cfg = write_config(tmp_path, processing={"mode": "auto"})
    assert run_job(load_config(cfg)).ok
    g = open_store(tmp_path / "out.zarr")
    assert {g[a].attrs["blocks"]["mode"] for a in files.arrays} == {"carry"}
    filt = g[files.arrays[0]].attrs["filter"]
    assert filt["effective_length_samples"] > 400
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    # Reference: scipy.signal.sosfiltfilt on the whole segment (see _reference).
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_end_extension_longer_than_the_halo_reads_across_several_files(tmp_path):
    """With 2500 edge samples (more than halo + block) the blocks at each segment end read
    windows spanning three of these 1000-sample files."""
    x = make_signal(5000, 1, FS, seed=6)
    files = write_stream(tmp_path / "archive", "deck", x, FS, 5)
    cfg = write_config(tmp_path, processing={"edge_samples": 2500, "block_seconds": 2.0})
    assert run_job(load_config(cfg)).ok
    filt = open_store(tmp_path / "out.zarr")[files.arrays[0]].attrs["filter"]
    assert filt["edge_samples"] == 2500 and filt["effective_length_samples"] < 1000
    y = np.concatenate(read_output(tmp_path / "out.zarr", files.arrays))
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))


def test_a_local_clusters_closing_heartbeat_race_is_not_logged(caplog):
    # distributed's local workers may log "Failed to communicate with scheduler during
    # heartbeat" with a traceback when the cluster closes under them (a known race of
    # distributed's LocalCluster shutdown): not logged while twinpass closes its cluster;
    # other worker errors are, and the message is again once the cluster is closed.
    from twinpass.engine import _quiet_worker_heartbeats

    worker = logging.getLogger("distributed.worker")
    with caplog.at_level(logging.ERROR, logger="distributed.worker"):
        with _quiet_worker_heartbeats():
            worker.error("Failed to communicate with scheduler during heartbeat.")
            worker.error("Compute Failed")
        worker.error("Failed to communicate with scheduler during heartbeat.")
    assert [r.getMessage() for r in caplog.records] == [
        "Compute Failed", "Failed to communicate with scheduler during heartbeat."]


def test_local_clusters_poll_their_monitors_rarely():
    # The local cluster twinpass starts for "threads" runs without a dashboard, Dask's
    # profiler and disk monitor, and polls memory and the host each second or two.
    from twinpass.engine import dask_client

    with dask_client("threads", 1) as client:
        worker = next(iter(client.cluster.workers.values()))
        scheduler = client.cluster.scheduler
        assert worker.periodic_callbacks["memory_monitor"].callback_time == 1000  # ms
        assert worker.periodic_callbacks["monitor"].callback_time == 2000
        assert scheduler.periodic_callbacks["monitor"].callback_time == 2000
        assert "profile" not in worker.periodic_callbacks
        assert not worker.monitor.monitor_disk_io


def test_a_client_started_on_its_own_thread_serves_and_closes():
    # ClientStart enters dask_client on a thread of its own; the client it hands over is a
    # working distributed.Client (reference: distributed's Client.submit/result), and
    # closing it closes its local cluster too. A bad scheduler name surfaces from client().
    from twinpass.engine import ClientStart

    start = ClientStart("threads", 2)
    client = start.client()
    assert client.submit(sum, [1, 2, 3]).result() == 6
    cluster = client.cluster
    start.close()
    start.close()  # safe to repeat
    assert client.status == "closed" and cluster.status.name == "closed"
    with pytest.raises(RuntimeError, match="closed"):
        start.client()

    bad = ClientStart("thread", 2)
    with pytest.raises(ConfigError, match="scheduler 'thread'"):
        bad.client()
    bad.close()  # nothing to close after a failed start


def test_local_worker_processes_keep_the_allocator_defaults():
    # Local worker processes run with one thread per numeric library, as Dask sets them up,
    # but without Dask's MALLOC_TRIM_THRESHOLD_ (it makes every block array page-fault in
    # afresh: about 50 % more worker CPU on the bench archive). Checked in a fresh process
    # as the command line runs: Dask's nanny writes its variables into its own process's
    # environment, so a cluster started earlier in this test process would leak them.
    import json
    import os
    import subprocess
    import sys

    script = (
        "import json, os\n"
        "from twinpass.engine import dask_client\n"
        "keys = ('MALLOC_TRIM_THRESHOLD_', 'OMP_NUM_THREADS', 'OPENBLAS_NUM_THREADS')\n"
        "with dask_client('processes', 1) as client:\n"
        "    env = client.run(lambda: {k: os.environ.get(k) for k in keys})\n"
        "print(json.dumps(next(iter(env.values()))))\n"
    )
    clean = {k: v for k, v in os.environ.items() if not k.startswith(("MALLOC_", "OMP_", "MKL_", "OPENBLAS_"))}
    out = subprocess.run([sys.executable, "-c", script], env=clean, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
    env = json.loads(out.stdout.strip().splitlines()[-1])
    assert env == {"MALLOC_TRIM_THRESHOLD_": None, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}


def test_a_slow_first_load_of_the_compiled_loops_is_announced(monkeypatch, caplog):
    # On a machine's first run numba compiles the loops for tens of seconds before the first
    # block; the driver loads them first and says so when that takes long.
    from twinpass.core import loops
    from twinpass.engine import COMPILE_NOTICE, warm_compiled_loops

    real = loops.jit_enabled
    in_use = real()  # loaded (or compiled) once in this process before timing anything

    def slow() -> bool:  # injected delay: numba compiling on a first run
        time.sleep(0.5)
        return real()

    # Loaded from two threads at once (a flow command's preload and its cluster's start):
    # both get the answer, the notice is said once.
    import threading

    got = []
    with monkeypatch.context() as m, caplog.at_level(logging.WARNING, logger="twinpass.engine"):
        m.setattr(loops, "jit_enabled", slow)
        other = threading.Thread(target=lambda: got.append(warm_compiled_loops(notice_after_s=0.05)))
        other.start()
        assert warm_compiled_loops(notice_after_s=0.05) is in_use
        other.join(30)
    assert got == [in_use]
    assert caplog.text.count(COMPILE_NOTICE) == 1, caplog.text
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="twinpass.engine"):
        assert warm_compiled_loops(notice_after_s=5.0) is in_use  # already loaded: quick, no notice
    time.sleep(0.1)
    assert COMPILE_NOTICE not in caplog.text


def test_files_failed_alike_by_the_configuration_are_said_once_with_what_to_fix(tmp_path, capsys):
    # block_seconds = 0.0001 at 200 Hz makes blocks of 1 sample, below the shortest block
    # the checks need (4 Welch segments of 64 samples: common practice), so every file of
    # both streams fails with one configuration error. The run's summary, the status and
    # the report say it once, naming the files, without the exception's class name, and
    # say that rerunning alone does not help.
    from twinpass import cli
    from twinpass.io.store import OutputStore
    from twinpass.report_data import attention_lists
    from twinpass.status import collect_status, format_status

    deck = write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, FS, seed=1), FS, 2)
    pier = write_stream(tmp_path / "archive", "pier", make_signal(4000, 1, FS, seed=2), FS, 2)
    res = run_job(load_config(write_config(tmp_path, processing={"block_seconds": 0.0001})))
    reasons = res.failure_reasons()
    assert sorted(reasons) == sorted(deck.relpaths + pier.relpaths) and len(set(reasons.values())) == 1, reasons
    reason = next(iter(reasons.values()))
    assert "ConfigError" not in reason and "[processing] block_seconds = 0.0001" in reason, reason
    from twinpass.errors import CONFIG_FAILED  # what the reason ends with: rerunning alone fails alike

    assert reason.endswith(f"({CONFIG_FAILED})"), reason
    cli._print_result(res)
    failed = [line for line in capsys.readouterr().out.splitlines() if line.startswith("failed: ")]
    assert failed == [f"failed: {', '.join(sorted(reasons)[:3])} and 1 more (4 files): {reason}"], failed
    status = collect_status(OutputStore.open(str(tmp_path / "out.zarr"), mode="r"))
    text = format_status(status)
    assert text.count(reason) == 1 and f"  4 inputs, all for the same reason: {reason}" in text, text
    assert all(f"\n    {path}\n" in text + "\n" for path in reasons), text
    assert "once the configuration is fixed): 4" in text, text
    (title, entries), = [(t, e) for t, e in attention_lists(status) if t.startswith("Inputs that failed")]
    assert entries == [f"{', '.join(sorted(reasons))} (4 inputs): {reason}"], entries
    # twinpass's own errors say what and where in their message; another keeps its type's name
    from twinpass.errors import InputError, failure_text

    assert failure_text(InputError("a.wav: unreadable")) == "a.wav: unreadable"
    assert failure_text(KeyError("x")) == "KeyError: 'x'"


def test_blocks_set_by_hand_beyond_the_memory_budget_fail_their_segment_with_a_remedy(tmp_path):
    # block_seconds is used as given, but a window that cannot fit [processing]
    # memory_budget_mib is refused before anything is written, naming both settings; the
    # other stream (another channel count, small enough) still runs.
    write_stream(tmp_path / "archive", "deck", make_signal(36000, 4, FS, seed=1), FS, 2)
    write_stream(tmp_path / "archive", "pier", make_signal(36000, 1, FS, seed=2), FS, 2)
    # 4 channels: (20 s x 200 Hz + 2 halos) x 4 ch x 40 B > 0.6 MiB; 1 channel fits
    cfg = write_config(tmp_path, processing={"block_seconds": 20.0, "memory_budget_mib": 0.6})
    res = run_job(load_config(cfg))
    status = {o.relpath.split("/")[0]: o.status for o in res.outcomes}
    assert set(status.values()) == {"failed", "complete"} and status["pier"] == "complete", status
    failed = [o for o in res.outcomes if o.status == "failed"]
    assert failed and all(o.relpath.startswith("deck/") for o in failed)
    message = " ".join(str(e) for o in failed for e in o.errors.values())
    assert "block_seconds = 20" in message and "memory_budget_mib = 0.6" in message
    assert "lower block_seconds" in message
    g = open_store(tmp_path / "out.zarr")
    for o in failed:  # nothing of the refused segment is marked complete
        assert o.array_name not in g or g[o.array_name].attrs.get("complete") is not True


@pytest.mark.parametrize("processing, named, remedy", [
    # 0.0001 s at 200 Hz rounds to 1 sample; with response checks blocks need at least
    # 4 x 64 = 256 samples (1.28 s at 200 Hz), in halo and carry mode alike.
    ({"block_seconds": 0.0001}, "[processing] block_seconds = 0.0001", "at least 1.28 s (256 samples)"),
    ({"block_seconds": 0.0001, "mode": "carry"}, "[processing] block_seconds = 0.0001",
     "at least 1.28 s (256 samples)"),
    # 0.001 MiB fits 1048 B / (2 ch x 40 B) = 13 samples without halos: not even a carried block
    # of 256 samples, which needs 256 x 80 B = 0.01953 MiB.
    ({"block_seconds": None, "memory_budget_mib": 0.001, "mode": "auto"}, "[processing] memory_budget_mib = 0.001",
     "raise memory_budget_mib to at least 0.01954 MiB"),
])
def test_blocks_shorter_than_the_checks_need_are_refused_before_any_block_runs(tmp_path, processing, named,
                                                                               remedy):
    # Such settings would make blocks of one sample or a few, and a run that never ends;
    # the segment is refused instead, naming the configuration file, the key and the value
    # that works, and nothing of it is written.
    x = make_signal(6000, 2, FS, seed=12)
    write_stream(tmp_path / "archive", "deck", x, FS, 2)
    cfg = write_config(tmp_path, processing=processing)
    res = run_job(load_config(cfg))
    assert not res.ok and {o.status for o in res.outcomes} == {"failed"}
    assert all(o.blocks_run == 0 for o in res.outcomes)
    for o in res.outcomes:
        message = " ".join(o.errors.values())
        assert f"{cfg}: {named} " in message and remedy in message, message


def test_halos_beyond_the_memory_budget_are_carried_in_auto_mode_and_refused_in_halo_mode(tmp_path):
    # 2 channels and the 670-sample halo of BANDPASS: the halos alone need
    # 2 x 670 x 2 x 40 B = 107200 B, above 0.1 MiB (104858 B), so no block with halos fits.
    # mode = "auto" carries the segment (no halos; blocks of 0.1 MiB / 80 B = 1310 samples),
    # and the result still equals scipy.signal.sosfiltfilt over the whole segment; mode =
    # "halo" refuses the segment, naming the budget and carry mode as the remedy.
    x = make_signal(6000, 2, FS, seed=12)
    budget = {"block_seconds": None, "memory_budget_mib": 0.1}
    auto, halo = tmp_path / "auto", tmp_path / "halo"
    files = write_stream(auto / "archive", "deck", x, FS, 2)
    write_stream(halo / "archive", "deck", x, FS, 2)
    assert run_job(load_config(write_config(auto, processing={**budget, "mode": "auto"}))).ok
    g = open_store(auto / "out.zarr")
    assert {g[a].attrs["blocks"]["mode"] for a in files.arrays} == {"carry"}
    filt = g[files.arrays[0]].attrs["filter"]
    assert 2 * filt["effective_length_samples"] * 2 * 40 > 0.1 * 2**20  # the case meant
    y = np.concatenate(read_output(auto / "out.zarr", files.arrays))
    # Reference: scipy.signal.sosfiltfilt on the whole segment (see _reference).
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))

    res = run_job(load_config(write_config(halo, processing={**budget, "mode": "halo"})))
    assert not res.ok and {o.status for o in res.outcomes} == {"failed"}
    message = " ".join(str(e) for o in res.outcomes for e in o.errors.values())
    assert "memory_budget_mib = 0.1" in message and 'mode = "carry"' in message


def test_block_error_lines_name_attempts_only_where_counted(caplog):
    # A block task counts its attempts; a block whose task was lost, or that never ran
    # because an earlier step failed, has none counted, and its line claims none.
    from twinpass.engine import ERROR, BlockErrorLog, BlockResult

    errors = BlockErrorLog("north-0", logging.getLogger("twinpass.test-block-errors"))
    with caplog.at_level(logging.ERROR, logger="twinpass.test-block-errors"):
        errors.block(BlockResult("a", 3, ERROR, error="OSError: disk full\nmore", attempts=3))
        errors.block(BlockResult("a", 4, ERROR, error="worker lost"))
        errors.close()
    assert [r.getMessage() for r in caplog.records] == [
        "block 3 of a failed after 3 attempt(s): OSError: disk full",
        "block 4 of a failed: worker lost",
    ]


def test_blocks_failing_alike_are_logged_once_per_file(caplog):
    # The same error in many blocks of a file (a file that cannot be read) is one line and a
    # count; another file, or another error, still has its own line.
    from twinpass.engine import ERROR, BlockErrorLog, BlockResult

    errors = BlockErrorLog("north-0", logging.getLogger("twinpass.test-block-errors"))
    with caplog.at_level(logging.ERROR, logger="twinpass.test-block-errors"):
        for i in (0, 1, 2, 5, 6, 9):
            errors.block(BlockResult("a", i, ERROR, error="InputError: a.wav: unreadable\ntrace", attempts=1))
        errors.block(BlockResult("a", 7, ERROR, error="OSError: disk full", attempts=1))
        errors.block(BlockResult("b", 3, ERROR, error="InputError: a.wav: unreadable", attempts=1))
        errors.close()
    assert [r.getMessage() for r in caplog.records] == [
        "block 0 of a failed after 1 attempt(s): InputError: a.wav: unreadable",
        "block 7 of a failed after 1 attempt(s): OSError: disk full",
        "block 3 of b failed after 1 attempt(s): InputError: a.wav: unreadable",
        "5 more block(s) of a failed with the same error: blocks 1-2, 5-6, 9",
    ]


def test_run_job_says_which_outputs_lost_their_input(tmp_path):
    # An output whose input left the archive is out of date; the run says so, as the flow does.
    from conftest import make_signal, write_config, write_stream

    files = write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, 200.0, seed=4), 200.0, [2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    files.paths[1].unlink()
    lines: list[str] = []
    assert run_job(cfg, log_fn=lines.append).ok
    assert f"{files.relpaths[1]}: no longer in the archive; its output is out of date" in lines, lines


def test_a_file_rewritten_with_another_shape_during_a_run_is_named(tmp_path):
    # Blocks reopen their files; one rewritten since the run planned it (here with a third
    # channel) fails its blocks with a message naming it, rather than a bare shape error.
    from twinpass.engine import SourceSlice, read_segment_window
    from twinpass.errors import InputError
    from twinpass.io.readers.base import ReaderSpec

    path = tmp_path / "deck_20260301T000000.npy"
    np.save(path, np.zeros((1000, 2)))
    sources = (SourceSlice(ReaderSpec.create("npy", str(path), {"sample_rate_hz": 200.0}), 0, 1000),)
    assert read_segment_window(sources, 0, 100, 2).shape == (100, 2)
    np.save(path, np.zeros((1000, 3)))
    with pytest.raises(InputError, match="changed while this run used it") as err:
        read_segment_window(sources, 0, 100, 2)
    assert str(path) in str(err.value) and "1000 frames x 3 channel(s)" in str(err.value)


def test_a_file_cut_short_while_a_block_reads_it_says_it_changed_during_the_run(tmp_path, monkeypatch):
    # An injected fault: the file is cut short right after a block opened it, so the reader's
    # read comes up short. The error says the file changed during the run, not "reopen it".
    from twinpass.engine import SourceSlice, read_segment_window
    from twinpass.errors import CorruptInputError
    from twinpass.io.readers.base import ReaderSpec
    from twinpass.io.readers.registry import open_recording

    path = tmp_path / "a.wav"
    scipy.io.wavfile.write(path, 200, (np.random.default_rng(4).standard_normal((4000, 2)) * 8000).astype(np.int16))
    with open_recording(str(path)) as rec:
        spec = rec.spec
    opened = ReaderSpec.open

    def open_then_cut(self):  # type: ignore[no-untyped-def]
        rec = opened(self)
        with open(path, "r+b") as f:
            f.truncate(44 + 4 * 1000)
        return rec

    monkeypatch.setattr(ReaderSpec, "open", open_then_cut)
    with pytest.raises(CorruptInputError) as err:
        read_segment_window((SourceSlice(spec, 0, 4000),), 0, 4000, 2)
    msg = str(err.value)
    assert msg.startswith(f"{path}: the file changed while this run used it: the file ends at byte "), msg
    assert msg.endswith("; its blocks are recorded as not done: rerun to filter it afresh"), msg
    assert "Reopen it" not in msg, msg


def test_a_file_cut_short_during_a_run_names_the_setting_and_is_said_once(tmp_path, caplog):
    # Blocks reopen their files; a WAV cut short after the run planned it fails each of its
    # blocks alike. The error names the configuration key that reads such a file, and the
    # log and the status say it once for the file, with the blocks it stands for.
    from conftest import write_config
    from twinpass.engine import dask_client, run_segment
    from twinpass.io.store import OutputStore
    from twinpass.job import prepare
    from twinpass.status import collect_status, format_status

    name = "deck/deck_20260301T000000"
    path = tmp_path / "archive" / f"{name}.wav"
    path.parent.mkdir(parents=True)
    x = (np.random.default_rng(3).standard_normal((4000, 2)) * 8000).astype(np.int16)
    scipy.io.wavfile.write(path, 200, x)  # 20 s at 200 Hz: 10 blocks of 2 s
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")},
                                   processing={"block_seconds": 2.0, "mode": "halo"}, engine={"retries": 0},
                                   checks={"seam_samples": 0}))
    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    prep = prepare(cfg, store)
    (seg,) = prep.work
    with open(path, "r+b") as f:
        f.truncate(44 + 4 * 1000)  # 1000 of the 4000 frames left
    with dask_client("threads", 1) as client, caplog.at_level(logging.ERROR, logger="twinpass.engine"):
        (outcome,) = run_segment(seg, prep.designs[200.0], cfg, store, client)
    assert outcome.status == "failed" and outcome.blocks_failed == 10
    for error in outcome.errors.values():
        assert f"{name}.wav: the file changed while this run used it" in error, error
        assert '[archive] truncated = "warn"' in error and "reader option" not in error, error
    lines = [r.getMessage() for r in caplog.records if "deck" in r.getMessage()]
    assert len(lines) == 2, lines
    assert "failed after 1 attempt(s)" in lines[0] and '[archive] truncated = "warn"' in lines[0], lines
    shown = int(lines[0].split()[1])  # the block logged first; the others are counted
    rest = sorted(set(range(10)) - {shown})
    assert lines[1].startswith(f"9 more block(s) of {name} failed with the same error: blocks "), lines
    assert [int(b) for part in lines[1].rpartition("blocks ")[2].split(", ")
            for b in (range(int(part.split("-")[0]), int(part.split("-")[-1]) + 1))] == rest, lines
    text = format_status(collect_status(OutputStore.open(cfg.store_location, mode="r")))
    errors = [line for line in text.splitlines() if line.startswith("  error ")]
    assert len(errors) == 1 and errors[0].startswith(f"  error {name} blocks 0-9: "), errors


def test_status_names_the_inputs_the_last_run_left_out_or_found_gone(tmp_path):
    # Outputs made earlier are kept as they were; the status says which of them the last
    # run could not check against their input (invalid now, or gone), and which files it
    # left out without any output.
    from conftest import make_signal, write_config, write_stream
    from twinpass.io.store import OutputStore
    from twinpass.status import collect_status, format_status

    files = write_stream(tmp_path / "archive", "deck", make_signal(6000, 1, 200.0, seed=5), 200.0,
                         [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}))
    assert run_job(cfg).ok
    files.paths[0].write_bytes(b"not a recording")  # damaged since
    files.paths[2].unlink()                          # removed since
    never = tmp_path / "archive" / "deck" / "deck_20260301T010000.npy"
    never.write_bytes(b"\x93NUMPY garbage")          # never readable
    assert run_job(cfg).ok
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    by_source = {f["source"]: f for f in status["files"]}
    assert by_source[files.relpaths[0]]["input"].startswith("left out at the last run: ")
    assert by_source[files.relpaths[1]]["input"] is None
    assert by_source[files.relpaths[2]]["input"] == "no longer in the archive"
    assert set(status["left_out"]) == {files.relpaths[0], "deck/deck_20260301T010000.npy"}
    assert status["gone"] == [files.relpaths[2]]
    text = format_status(status)
    assert "left out by the last run (invalid input; an output made earlier is kept as it was): 2" in text
    assert f"  {files.relpaths[2]}" in text


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_a_segment_stopped_by_its_callback_leaves_no_blocks_running(tmp_path, mode):
    # When the caller's block callback raises, the segment ends with that error, and its
    # blocks not yet run are cancelled: a retry must not run them beside these.
    import json as _json
    import os

    from conftest import make_signal, write_config, write_stream
    from twinpass.engine import dask_client, run_segment
    from twinpass.io.store import OutputStore
    from twinpass.job import prepare

    write_stream(tmp_path / "archive", "deck", make_signal(12000, 1, 200.0, seed=6), 200.0, [2000] * 6)
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")},
                                   processing={"block_seconds": 2.0, "mode": mode}))
    os.environ["TWINPASS_FAULTS"] = _json.dumps([{"action": "sleep", "file": "*", "block": "*", "seconds": 0.2}])
    try:
        store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
        prep = prepare(cfg, store)
        (seg,) = [w for w in prep.work if w.has_work]
        with dask_client("threads", 2) as client:
            def refuse(done, total, res):
                raise RuntimeError("callback refused")

            with pytest.raises(RuntimeError, match="callback refused"):
                run_segment(seg, prep.designs[seg.sample_rate_hz], cfg, store, client, on_block=refuse)
            def active(dask_scheduler):
                return sum(ts.state in ("waiting", "queued", "no-worker", "processing")
                           for ts in dask_scheduler.tasks.values())

            deadline = time.monotonic() + 60.0  # let whatever still runs finish
            while client.run_on_scheduler(active) and time.monotonic() < deadline:
                time.sleep(0.05)
        # Blocks written: those finished before the stop and the two running then, not all 30.
        chunks = [f for f in Path(cfg.store_location).glob("deck/*/c/**/*") if f.is_file()]
        assert len(chunks) <= 6, len(chunks)
    finally:
        os.environ.pop("TWINPASS_FAULTS", None)


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_blocks_of_a_run_whose_lock_was_taken_over_write_nothing(tmp_path, mode):
    # A later run has taken the store's run lock over (it judged this run's command dead, as
    # after kill -9 with workers on a cluster of their own). Each block writes only while
    # the lock holds its run's token: the blocks after the takeover write nothing, are
    # recorded as not done with the holder named, and are not retried.
    import json as _json
    import os
    import socket

    from conftest import make_signal, write_config, write_stream
    from twinpass.engine import dask_client, run_segment
    from twinpass.io.store import BlockStatus, OutputStore
    from twinpass.job import prepare

    write_stream(tmp_path / "archive", "deck", make_signal(12000, 1, 200.0, seed=6), 200.0, [2000] * 6)
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")},
                                   processing={"block_seconds": 2.0, "mode": mode}, engine={"retries": 2}))
    lock_path = Path(cfg.store_location) / ".twinpass-lock"
    os.environ["TWINPASS_FAULTS"] = _json.dumps([{"action": "sleep", "file": "*", "block": "*", "seconds": 0.1}])
    try:
        store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
        with store.lock("first") as first:
            prep = prepare(cfg, store)
            (seg,) = [w for w in prep.work if w.has_work]

            def take_over(done, total, res):
                if done == 2:
                    lock_path.write_text(_json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                                                      "run_id": "later", "started": first.started,
                                                      "token": "later-token"}))

            with dask_client("threads", 2) as client:
                outcomes = run_segment(seg, prep.designs[seg.sample_rate_hz], cfg, store, client,
                                       on_block=take_over)
        assert _json.loads(lock_path.read_text())["run_id"] == "later"  # left as found
    finally:
        os.environ.pop("TWINPASS_FAULTS", None)
    assert all(o.status == "failed" for o in outcomes)
    refused = {}
    for o in outcomes:
        table = store.read_block_table(o.array_name, figures=False, seams=False)
        for i, err in table.errors.items():
            if "not written" in err:
                refused[(o.array_name, i)] = err
    assert refused, "no block came after the takeover"
    assert all("held by run later" in e and "Traceback" not in e for e in refused.values())
    written = {(o.array_name, i) for o in outcomes
               for i, st in enumerate(store.read_block_table(o.array_name, figures=False, seams=False).status)
               if st == BlockStatus.PASS}
    assert written, "no block was written before the takeover"
    blocks = sum(o.blocks for o in outcomes)
    assert len(written) + len(refused) == blocks, (len(written), len(refused), blocks)  # nothing else happened
    chunk = {o.array_name: Path(cfg.store_location) / o.array_name / "c" for o in outcomes}
    assert all((chunk[name] / str(i) / "0").is_file() for name, i in written)  # one 400-frame chunk a block
    assert not any((chunk[name] / str(i) / "0").exists() for name, i in refused)  # nothing written for these


def test_failed_files_and_interrupted_runs_are_recorded_for_status(tmp_path):
    # The store keeps why each file of the last run failed, and a run stopped before its
    # end (Ctrl-C) is recorded as such, so that `twinpass status` never shows the run
    # before it as the last one.
    import json as _json
    import os

    from conftest import make_signal, write_config, write_stream
    from twinpass.io.store import OutputStore
    from twinpass.status import collect_status, format_status, shortfalls

    files = write_stream(tmp_path / "archive", "deck", make_signal(12000, 1, 200.0, seed=6), 200.0, [4000] * 3)
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")},
                                   processing={"block_seconds": 2.0}, engine={"retries": 0}))
    os.environ["TWINPASS_FAULTS"] = _json.dumps([{"action": "raise", "file": files.arrays[1], "block": 3}])
    try:
        res = run_job(cfg)
    finally:
        os.environ.pop("TWINPASS_FAULTS", None)
    assert res.failed == [files.relpaths[1]] and res.exit_status() == 1
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert list(status["failed_inputs"]) == [files.relpaths[1]]
    assert "InjectedFault" in status["failed_inputs"][files.relpaths[1]]
    text = format_status(status)
    assert "failed at the last run (the next run tries them again): 1" in text and "InjectedFault" in text
    assert f"1 input(s) failed at the last run ({files.relpaths[1]})" in shortfalls(status)

    def stop(segment_id, done, total, res):
        if done == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_job(cfg, force=True, on_block=stop)
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert status["runs_total"] == 2 and status["last_run"]["interrupted"] is True
    assert "(stopped before its end; the next run does the rest)" in format_status(status)
    assert run_job(cfg).ok
    assert "interrupted" not in collect_status(OutputStore.open(cfg.store_location, mode="r"))["last_run"]


def test_changing_the_output_sample_type_refilters_the_files(tmp_path):
    # [output] dtype decides the values written; a rerun after changing it rewrites every
    # file in the new type (compared with the float64 run's own values rounded to float32).
    from conftest import make_signal, write_config, write_stream
    from twinpass.io.store import OutputStore

    files = write_stream(tmp_path / "archive", "deck", make_signal(4000, 1, 200.0, seed=8), 200.0, [2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}, output={"dtype": "float64"}))
    assert run_job(cfg).ok
    wide = {a: OutputStore.open(cfg.store_location, mode="r").read(a, 0, 2000) for a in files.arrays}
    cfg32 = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")}, output={"dtype": "float32"}))
    res = run_job(cfg32)
    assert res.ok and [o.status for o in res.outcomes] == ["complete", "complete"]
    store = OutputStore.open(cfg.store_location, mode="r")
    for a in files.arrays:
        narrow = store.read(a, 0, 2000)
        assert narrow.dtype == np.float32 and np.array_equal(narrow, wide[a].astype(np.float32))
    assert all(r.complete and r.dtype == "float32" for r in store.file_records().values())


def test_a_block_lost_with_its_workers_is_recorded_with_a_remedy():
    # distributed raises KilledWorker for a task whose workers died more often than it
    # allows (often killed for lack of memory); the recorded text says what to do.
    from distributed.scheduler import KilledWorker

    from twinpass.engine import lost_task_error

    from types import SimpleNamespace

    text = lost_task_error(KilledWorker("twinpass-block-x-0-1", SimpleNamespace(address="tcp://127.0.0.1:1"), 3))
    assert text.startswith("KilledWorker: ") and "memory_budget_mib" in text and "rerun" in text
    assert lost_task_error(ValueError("odd")) == "ValueError: odd"


def test_a_block_whose_scheduler_went_away_is_recorded_failed_not_cancelled():
    # distributed's client cancels every future when it loses its scheduler, with a
    # FutureCancelledError of reason "scheduler-connection-lost" (distributed.client,
    # Client._reconnect; "scheduler-restart" after Client.restart). Such a block failed:
    # it is not one the run cancelled itself when stopped, and its text says what to check.
    import concurrent.futures

    from distributed.client import FutureCancelledError

    from twinpass.core.checks import was_cancelled
    from twinpass.engine import lost_task_error

    for reason in ("scheduler-connection-lost", "scheduler-restart"):
        text = lost_task_error(FutureCancelledError("twinpass-block-x-0-1", reason, "lost"))
        assert not was_cancelled(text) and text.startswith("SchedulerLost:") and "--scheduler" in text, text
    assert was_cancelled(lost_task_error(FutureCancelledError("twinpass-block-x-0-1", None)))  # the run's own
    assert was_cancelled(lost_task_error(concurrent.futures.CancelledError()))


def test_a_tls_scheduler_address_without_tls_settings_is_a_configuration_error():
    # distributed refuses a tls:// address when no TLS settings are configured; the command
    # says what to set instead of showing that library's TypeError.
    from twinpass.engine import dask_client

    with pytest.raises(ConfigError, match="distributed.comm.tls") as err:
        with dask_client("tls://127.0.0.1:1"):
            pass
    assert "tls://127.0.0.1:1" in str(err.value) and "--scheduler" in str(err.value)


def _int16_zarr_stream(root: Path, name: str, x: np.ndarray) -> Path:
    """An int16 Zarr array input of chunks of 500 frames (zarr-python, format 3: chunk keys c/<row>/<col>)."""
    import zarr

    path = root / f"{name}.zarr"
    path.parent.mkdir(parents=True, exist_ok=True)
    a = zarr.create_array(path, shape=x.shape, chunks=(500, x.shape[1]), dtype="int16", zarr_format=3)
    a[:] = x
    a.attrs["sample_rate_hz"] = 200.0
    return path


def test_a_damaged_chunk_of_an_unchanged_input_is_reported_as_damage_and_not_retried(tmp_path, caplog):
    # An integer input is not read end to end when the run plans it: a chunk whose bytes no
    # codec decodes is met by the blocks. The input has not changed, so this is damage: named by
    # chunk and frames, with the remedy, tried once per block, and said alike by the next run.
    # The other file of the archive completes (whole-signal reference scipy.signal.sosfiltfilt).
    rng = np.random.default_rng(6)
    damaged = _int16_zarr_stream(tmp_path / "archive" / "deck", "deck_20260301T000000",
                                 (rng.standard_normal((2000, 2)) * 3000).astype(np.int16))
    (damaged / "c" / "2" / "0").write_bytes(b"\x00garbage" * 10)  # frames 1000-1500
    good = write_stream(tmp_path / "archive", "mast", make_signal(2000, 2, 200.0, seed=2), 200.0, 1)
    cfg = load_config(write_config(tmp_path, include=["**/*.npy", "**/*.zarr"],
                                   engine={"retries": 2, "retry_backoff_seconds": 0.0}))
    for _ in range(2):
        caplog.clear()
        with caplog.at_level(logging.ERROR, logger="twinpass.engine"):
            res = run_job(cfg)
        outcomes = {o.relpath: o for o in res.outcomes}
        bad = outcomes["deck/deck_20260301T000000.zarr"]
        assert bad.status == "failed"
        for error in bad.errors.values():
            assert error.startswith(f"DamagedInputError: {damaged}: frames "), error
            assert "chunk c/2/0 (frames 1000-1500) of the store is damaged" in error, error
            assert "has not changed since the run planned it" in error and "[archive] exclude" in error, error
            assert "changed while this run" not in error, error
        logged = [r.getMessage() for r in caplog.records if "deck" in r.getMessage()]
        assert logged and all("after 1 attempt(s)" in m for m in logged if "attempt" in m), logged
        assert outcomes[good.relpaths[0]].status in ("complete", "skipped")
    y = read_output(tmp_path / "out.zarr", good.arrays)[0]
    filt = open_store(tmp_path / "out.zarr")[good.arrays[0]].attrs["filter"]
    x = np.load(good.paths[0])
    ref = scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                   padlen=int(filt["edge_samples"]))
    assert np.max(np.abs(y - ref)) <= 1e-8 * np.max(np.abs(x))


def test_a_chunk_damaged_after_the_run_planned_the_input_says_the_input_changed(tmp_path):
    # The same damage made after the run planned the input: its chunk file is new since, so
    # the input changed while the run used it, and the blocks say so (a rerun reads it afresh).
    from twinpass.engine import dask_client, run_segment
    from twinpass.io.store import OutputStore
    from twinpass.job import prepare

    rng = np.random.default_rng(6)
    path = _int16_zarr_stream(tmp_path / "archive" / "deck", "deck_20260301T000000",
                              (rng.standard_normal((2000, 2)) * 3000).astype(np.int16))
    cfg = load_config(write_config(tmp_path, include=["**/*.zarr"], engine={"retries": 0}))
    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    prep = prepare(cfg, store)
    (seg,) = prep.work
    (path / "c" / "2" / "0").write_bytes(b"\x00garbage" * 10)
    with dask_client("threads", 1) as client:
        (outcome,) = run_segment(seg, prep.designs[200.0], cfg, store, client)
    assert outcome.status == "failed"
    for error in outcome.errors.values():
        assert f"{path}: the file changed while this run used it: " in error, error
        assert "chunk c/2/0 (frames 1000-1500)" in error and "DamagedInputError" not in error, error


def test_retries_are_kept_for_errors_a_retry_may_clear_and_not_for_damage():
    # Transient read errors are retried; damage that decodes no better when read again is not.
    from twinpass.engine import with_retries
    from twinpass.errors import CorruptInputError, DamagedInputError

    for error, attempts in ((CorruptInputError("x: cannot be read"), 3), (DamagedInputError("x: damaged"), 1)):
        calls: list[int] = []

        def work() -> None:
            calls.append(1)
            raise error

        result, message, tried = with_retries(work, 2, 0.0)
        assert result is None and tried == attempts == len(calls)
        assert message is not None and message.startswith(type(error).__name__), message
