"""The Prefect flow against a real temporary Prefect server.

Every run's task states and artifacts are read back through Prefect's own client. Output
is checked against scipy.signal.sosfiltfilt on the whole segment (the whole-signal
two-pass reference; see :func:`prefect_fixtures.check_against_sosfiltfilt`). Faults are
real failures inside the real engine, switched on through ``TWINPASS_FAULTS``.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import re
import signal
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path
from types import SimpleNamespace
from typing import Iterator
from urllib.parse import urlparse
from urllib.request import url2pathname

import numpy as np
import pytest

pytest.register_assert_rewrite("prefect_fixtures")  # helpers with asserts, loaded as a plug-in too
from conftest import interrupt_cli, stopped_run_counts
from prefect_fixtures import (
    FILE_FRAMES,
    FILES_PER_STREAM,
    PREFECT_HOME,
    STREAMS,
    artifacts,
    check_against_sosfiltfilt,
    file_relpath,
    final_task_runs,
    flow_env,
    flow_run_id,
    poll,
    runs_of,
    table_rows,
    write_archive,
    write_file,
    write_job,
)
from twinpass import cli, flows
from twinpass.core.blocks import blocks_touching
from twinpass.config import load_config
from twinpass.core.checks import CANCELLED
from twinpass.errors import ConfigError, RunStoppedError, StoreLockedError
from twinpass.headstart import HeadStart, offer, withdraw
from twinpass.io.store import BlockStatus, OutputStore
from twinpass.io.store_util import array_name

# The Prefect fixtures (one temporary server for the whole session) come from this plug-in.
pytest_plugins = ("prefect_fixtures",)

ROOT = Path(__file__).resolve().parents[1]
ALL_FILES = [file_relpath(s, k) for s in STREAMS for k in range(FILES_PER_STREAM)]
BLOCKS_PER_FILE = 4  # 4000 frames in 1000-sample blocks (block_seconds 10 at 100 Hz)


def _artifacts_by_key(client, run_id, keys: set[str], progress: int) -> list:
    """The run's artifacts once the keyed ones and ``progress`` progress artifacts at 100 % are in."""
    return poll(lambda: artifacts(client, run_id),
                lambda arts: keys <= {a.key for a in arts}
                and sum(a.type == "progress" and float(a.data) == 100.0 for a in arts) >= progress,
                f"artifacts {sorted(keys)} and {progress} progress artifact(s) at 100 of flow run {run_id}")


def _one(arts: list, key: str):
    found = [a for a in arts if a.key == key]
    assert len(found) == 1, f"{len(found)} artifacts with key {key}"
    return found[0]


# ------------------------------------------------------------------ full runs
@pytest.fixture(scope="module")
def first_run(prefect_server, tmp_path_factory):
    """A first run over its own copy of the archive (later tests change a file)."""
    folder = tmp_path_factory.mktemp("incremental")
    archive = write_archive(folder / "archive")
    cfg = write_job(folder, archive)
    state = flows.archive_run(config_path=str(cfg), return_state=True)
    return SimpleNamespace(folder=folder, archive=archive, cfg=cfg, state=state, store=str(folder / "out.zarr"))


def test_first_run_completes_with_tasks_and_artifacts(first_run, prefect_client):
    state = first_run.state
    assert state.is_completed(), state.message
    summary = state.result()
    assert summary["counts"]["complete"] == 6 and summary["counts"]["blocks_run"] == 6 * BLOCKS_PER_FILE
    assert summary["warned"] == {}  # no block graded warn: the command prints no `warned:` line

    run_id = flow_run_id(state)
    runs = final_task_runs(prefect_client, run_id, expected=5)
    assert all(t.state.is_completed() for t in runs), [(t.name, t.state.name) for t in runs]
    assert len(runs_of(runs, flows.design_task)) == 1
    assert len(runs_of(runs, flows.filter_segment)) == 2  # one task per segment (one segment per stream)
    assert len(runs_of(runs, flows.finalize_task)) == 1
    assert len(runs_of(runs, flows.report_task)) == 1
    assert runs_of(runs, flows.skip_unchanged) == []

    arts = _artifacts_by_key(prefect_client, run_id, {flows.ARTIFACT_DESIGN, flows.ARTIFACT_FILES,
                                                      flows.ARTIFACT_REPORT}, progress=2)
    design = _one(arts, flows.ARTIFACT_DESIGN)
    assert design.type == "markdown" and "## 100 Hz" in design.data
    files = _one(arts, flows.ARTIFACT_FILES)
    rows = table_rows(files)
    assert sorted(r["file"] for r in rows) == sorted(ALL_FILES)  # one row per file
    assert all(r["status"] == "complete" and r["blocks"] == BLOCKS_PER_FILE for r in rows)
    assert sum(a.type == "progress" for a in arts) == 2  # one per segment task, each at 100 (polled above)
    link = _one(arts, flows.ARTIFACT_REPORT)
    # Prefect stores a link artifact as markdown: [link text](URL).
    match = re.fullmatch(r"\[twinpass report\]\((file://\S+)\)", link.data)
    assert match, link.data
    report = Path(url2pathname(urlparse(match.group(1)).path))
    assert report.is_file() and report == Path(summary["report"]).resolve()

    for stream in STREAMS:
        check_against_sosfiltfilt(first_run.store, first_run.archive, stream)


def test_rerun_skips_unchanged_and_a_touched_file_reruns_its_halo_neighbours(first_run, prefect_client):
    assert first_run.state.is_completed()
    cfg = str(first_run.cfg)

    # Nothing changed: one skip-unchanged task run in state "Skipped" lists every file.
    state = flows.archive_run(config_path=cfg, report=False, return_state=True)
    assert state.is_completed(), state.message
    assert state.result()["counts"]["skipped"] == 6 and state.result()["counts"]["blocks_run"] == 0
    runs = final_task_runs(prefect_client, flow_run_id(state), expected=3)
    assert runs_of(runs, flows.filter_segment) == []
    (skip,) = runs_of(runs, flows.skip_unchanged)
    assert skip.state.name == "Skipped"
    assert all(rel in skip.state.message for rel in ALL_FILES), skip.state.message

    # Rewrite the middle file of "north" with new samples.
    write_file(first_run.archive, "north", 1, seed=999)
    state = flows.archive_run(config_path=cfg, report=False, return_state=True)
    assert state.is_completed(), state.message
    run_id = flow_run_id(state)
    runs = final_task_runs(prefect_client, run_id, expected=4)
    assert len(runs_of(runs, flows.filter_segment)) == 1  # only the north segment has work
    (skip,) = runs_of(runs, flows.skip_unchanged)
    assert skip.state.name == "Skipped"
    assert all(file_relpath("south", k) in skip.state.message for k in range(FILES_PER_STREAM))
    assert "north" not in skip.state.message

    # A two-pass filter's output depends on input within its effective length (the halo)
    # on either side (common practice: the halo is where the impulse response has decayed
    # below the tolerance), so only neighbour blocks within the halo of the rewritten file rerun.
    store = OutputStore.open(first_run.store, mode="r")
    attrs = store.array_attrs(array_name(file_relpath("north", 0)))
    halo = int(attrs["filter"]["effective_length_samples"])
    block = int(attrs["blocks"]["block_samples"])
    spans = [(s, min(s + block, FILE_FRAMES)) for s in range(0, FILE_FRAMES, block)]
    expected = {
        file_relpath("north", 0): len(blocks_touching(spans, ((FILE_FRAMES - halo, FILE_FRAMES),))),
        file_relpath("north", 1): len(spans),
        file_relpath("north", 2): len(blocks_touching(spans, ((0, halo),))),
    }
    assert halo < block and expected[file_relpath("north", 0)] == 1  # the test archive's premise
    arts = _artifacts_by_key(prefect_client, run_id, {flows.ARTIFACT_FILES}, progress=1)
    rows = {r["file"]: r for r in table_rows(_one(arts, flows.ARTIFACT_FILES))}
    for rel, n in expected.items():
        assert rows[rel]["status"] == "complete" and rows[rel]["blocks run"] == n, rows[rel]
    for k in range(FILES_PER_STREAM):  # unchanged: its blocks and figures as recorded when it was made complete
        row = rows[file_relpath("south", k)]
        assert row["status"] == "skipped" and row["blocks run"] == 0, row
        assert (row["blocks"], row["blocks done"], row["blocks not done"]) == (BLOCKS_PER_FILE, BLOCKS_PER_FILE, 0)
        assert all(row[column] is not None for column in flows.FIGURE_COLUMNS), row
    assert state.result()["counts"]["blocks_run"] == sum(expected.values())
    for stream in STREAMS:
        check_against_sosfiltfilt(first_run.store, first_run.archive, stream)


# ---------------------------------------------------------------------- faults
def _engine_block_lines(caplog) -> list[str]:
    """The engine's own lines about failed or cancelled blocks (a flow task logs those itself)."""
    return [r.getMessage() for r in caplog.records if r.name == "twinpass.engine"
            and ("failed after" in r.getMessage() or "cancelled before" in r.getMessage())]


def test_block_failing_once_is_retried_by_the_segment_task(prefect_client, npy_archive, tmp_path, monkeypatch,
                                                           caplog):
    cfg = write_job(tmp_path, npy_archive, engine_retries=0, flow_retries=1)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise-once", "file": "north/*", "block": 1}]))
    monkeypatch.setenv("TWINPASS_FAULTS_STATE", str(tmp_path / "fault-state"))
    caplog.set_level(logging.INFO, logger="twinpass")
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_completed(), state.message
    assert _engine_block_lines(caplog) == []  # the task's run logger has them, once
    assert len(os.listdir(tmp_path / "fault-state")) == FILES_PER_STREAM  # block 1 of each north file failed once

    runs = final_task_runs(prefect_client, flow_run_id(state), expected=4)
    segs = {t.name: t for t in runs_of(runs, flows.filter_segment)}
    north = next(t for n, t in segs.items() if "north" in n)
    south = next(t for n, t in segs.items() if "south" in n)
    assert north.state.is_completed() and north.run_count == 2
    assert south.state.is_completed() and south.run_count == 1
    history = [s.name for s in prefect_client.read_task_run_states(north.id)]
    assert "Retrying" in history, history
    # The retry resumes: it reruns only the failed blocks, one per north file; the run's
    # count holds each block once (every block of both streams), and the retried ones apart.
    summary = state.result()
    assert summary["counts"]["blocks_run"] == 2 * FILES_PER_STREAM * BLOCKS_PER_FILE
    assert summary["counts"]["blocks_retried"] == FILES_PER_STREAM
    check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, "north")


def _flow_run_of(client, cfg: Path):
    """The (single) flow run whose config_path parameter is ``cfg``, once it is final."""
    runs = poll(lambda: [r for r in client.read_flow_runs(limit=200)
                         if r.parameters.get("config_path") == str(cfg.resolve())],
                lambda rs: len(rs) == 1 and rs[0].state is not None and rs[0].state.is_final(),
                f"the flow run of {cfg}")
    return runs[0]


def test_file_failing_always_fails_the_flow_naming_it(prefect_client, npy_archive, tmp_path, monkeypatch, capsys):
    bad = file_relpath("south", 1)
    cfg = write_job(tmp_path, npy_archive, engine_retries=0, flow_retries=1)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise", "file": array_name(bad), "block": 2}]))
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    assert cli.main(["run", str(cfg), "--no-report"]) == 1
    out = capsys.readouterr().out
    assert f"failed: {bad}" in out and "complete 5, skipped (unchanged) 0, failed 1" in out, out
    # Blocks run, the failed segment's too: 3 files x 4 blocks per stream, each once (the
    # retry reran the one block not done, which failed again).
    assert f"blocks run {2 * FILES_PER_STREAM * BLOCKS_PER_FILE}" in out, out

    run = _flow_run_of(prefect_client, cfg)
    assert run.state.is_failed()
    assert bad in run.state.message and "1 file(s) failed" in run.state.message, run.state.message

    runs = final_task_runs(prefect_client, run.id, expected=4)  # every future resolved
    segs = runs_of(runs, flows.filter_segment)
    assert sorted(t.state.name for t in segs) == ["Completed", "Failed"]
    failed = next(t for t in segs if t.state.is_failed())
    assert "south" in failed.name and failed.run_count == 2 and bad in failed.state.message
    assert runs_of(runs, flows.finalize_task)[0].state.is_completed()

    records = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").file_records()
    assert {rel: rec.complete for rel, rec in records.items()} == {rel: rel != bad for rel in ALL_FILES}
    # The north segment's progress at 100 %; the south segment's shows its share done (not 100 %), failed.
    arts = _artifacts_by_key(prefect_client, run.id, {flows.ARTIFACT_FILES}, progress=1)
    rows = {r["file"]: r for r in table_rows(_one(arts, flows.ARTIFACT_FILES))}
    assert rows[bad]["status"] == "failed" and rows[bad]["blocks not done"] == 1
    check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, "north")


def _block_counts(store: str, name: str) -> tuple[int, int]:
    """(blocks, blocks passed or warned) of ``name``'s block table in ``store``."""
    c = OutputStore.open(store, mode="r").read_block_table(name, figures=False, seams=False).counts()
    return sum(c.values()), c["pass"] + c["warn"]


def test_the_per_file_table_and_progress_say_what_the_store_holds(prefect_client, npy_archive, tmp_path,
                                                                   monkeypatch):
    # One new file cut short (an NPY file's data must follow its header in full: numpy's NPY
    # format specification, version 1.0) is left out; block 2 of a south file fails on every
    # attempt (injected), so the south segment's task fails, is retried (reruns that block)
    # and fails again. The table gives each failed and left-out file its reason in one line,
    # as `twinpass status` says it, and no seam figure for the file left out; every complete
    # file its figures, the retried segment's too; and the blocks of each file as its block
    # table counts them, a block run again by the retry counted once. The south segment's
    # progress shows the share of its blocks done, saying failed.
    import shutil

    from twinpass.status import collect_status

    archive = Path(shutil.copytree(npy_archive, tmp_path / "archive"))
    cut = file_relpath("north", FILES_PER_STREAM)
    path = write_file(archive, "north", FILES_PER_STREAM, seed=77)
    path.write_bytes(path.read_bytes()[:5000])
    bad = file_relpath("south", 1)
    cfg = write_job(tmp_path, archive, engine_retries=0, flow_retries=1)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise", "file": array_name(bad), "block": 2}]))
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_failed() and bad in state.message, state.message
    run_id = flow_run_id(state)
    store = str(tmp_path / "out.zarr")
    status = collect_status(OutputStore.open(store, mode="r"))

    arts = _artifacts_by_key(prefect_client, run_id, {flows.ARTIFACT_FILES}, progress=1)
    rows = {r["file"]: r for r in table_rows(_one(arts, flows.ARTIFACT_FILES))}
    assert sorted(rows) == sorted(ALL_FILES + [cut])
    left = rows[cut]
    assert left["status"] == "invalid" and left["reason"] == status["left_out"][cut], left
    assert "NPY header claims" in left["reason"] and left["seam mismatch"] is None
    failed = rows[bad]
    assert failed["status"] == "failed" and failed["reason"] == status["failed_inputs"][bad], failed
    assert "injected fault" in failed["reason"] and "\n" not in failed["reason"]
    assert (failed["blocks"], failed["blocks done"], failed["blocks not done"]) == (BLOCKS_PER_FILE,
                                                                                   BLOCKS_PER_FILE - 1, 1)
    assert failed["blocks run"] == BLOCKS_PER_FILE and failed["blocks retried"] == 0, failed
    # the run's record counts the blocks as the table does: the block the retry ran again once
    assert status["last_run"]["counts"]["blocks_run"] == sum(r["blocks run"] for r in rows.values()), rows
    for rel in ALL_FILES:
        row = rows[rel]
        blocks, done = _block_counts(store, array_name(rel))
        assert (row["blocks"], row["blocks done"], row["blocks not done"]) == (blocks, done, blocks - done), row
        assert row["blocks run"] <= row["blocks"], row
        if rel != bad:
            assert row["status"] == "complete" and row["reason"] is None, row
            # The worst figures of the file's blocks, as `twinpass status` reads them from its block table.
            worst = next(f["worst"] for f in status["files"] if f["source"] == rel)
            for column, key in flows.FIGURE_COLUMNS.items():
                assert row[column] is not None and row[column] == pytest.approx(worst[key]), (rel, column, row)

    def progress_of(stream: str) -> list:
        return [a for a in artifacts(prefect_client, run_id) if a.type == "progress" and stream in a.description]

    (north,) = progress_of("north")
    assert float(north.data) == 100.0 and "failed" not in north.description
    south = poll(lambda: progress_of("south"), lambda arts: len(arts) == 2 and all("failed" in a.description
                                                                                   for a in arts),
                 "the south segment's two progress artifacts saying failed")
    first = next(a for a in south if "retry" not in a.description)
    retry = next(a for a in south if "retry" in a.description)
    n = FILES_PER_STREAM * BLOCKS_PER_FILE
    assert float(first.data) == pytest.approx(100.0 * (n - 1) / n), first  # all blocks but the failed one
    assert f"failed, {n - 1} of {n} done" in first.description, first.description
    assert float(retry.data) == 0.0 and "failed, 0 of 1 done" in retry.description, retry.description


def test_blocks_done_only_after_a_retry_are_said_by_the_flow_run(prefect_client, npy_archive, tmp_path, monkeypatch,
                                                                capsys):
    # Every block raises on its first attempt (injected) and passes on the retry within its
    # task ([engine] retries = 1): the run completes and exits 0, and its summary, the flow
    # run's log, the per-file table and the run's record say how many blocks succeeded only
    # after a retry.
    from prefect.client.schemas.filters import LogFilter, LogFilterFlowRunId

    from twinpass.status import collect_status, format_status

    cfg = write_job(tmp_path, npy_archive, engine_retries=1, flow_retries=0)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise-once", "file": "*", "block": "*"}]))
    monkeypatch.setenv("TWINPASS_FAULTS_STATE", str(tmp_path / "fault-state"))
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    assert cli.main(["run", str(cfg), "--no-report"]) == 0
    out = capsys.readouterr().out
    n = len(ALL_FILES) * BLOCKS_PER_FILE
    line = f"{n} block(s) succeeded only after a retry: their input may be on a flaky mount"
    said = [x for x in out.splitlines() if x.startswith("retried: ")]
    assert len(said) == 1 and said[0].startswith(f"retried: {line} (in "), out

    run = _flow_run_of(prefect_client, cfg)
    assert run.state.is_completed() and run.state.name == "Completed", run.state
    logs = poll(lambda: prefect_client.read_logs(log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[run.id]))),
                lambda logs: any(line in x.message for x in logs), "the flow run's line on retried blocks")
    assert sum(line in x.message for x in logs) == 1
    arts = _artifacts_by_key(prefect_client, run.id, {flows.ARTIFACT_FILES}, progress=2)
    rows = table_rows(_one(arts, flows.ARTIFACT_FILES))
    assert all(r["blocks retried"] == BLOCKS_PER_FILE and r["blocks run"] == BLOCKS_PER_FILE for r in rows), rows

    status = collect_status(OutputStore.open(str(tmp_path / "out.zarr"), mode="r"))
    assert status["last_run"]["counts"]["blocks_retried"] == n and not status["failed_inputs"]
    assert line in format_status(status)


def test_inputs_left_out_end_the_flow_run_in_a_completed_state_of_its_own_naming_them(prefect_client, npy_archive,
                                                                                    tmp_path):
    # Four new files of one stream cut short (an NPY file's header gives the array's shape, and
    # its data must follow in full: numpy's NPY format specification, version 1.0), so they
    # are left out and the rest is filtered: the flow run does not end in the plain
    # "Completed" of a clean run (a served deployment has no exit status to tell them apart)
    # but in a COMPLETED-type state of its own name, as Prefect's state model allows, whose
    # message names how many were left out and the first three with their reasons.
    import shutil

    from prefect.client.schemas.objects import StateType

    archive = Path(shutil.copytree(npy_archive, tmp_path / "archive"))
    cut = [file_relpath("north", k) for k in range(FILES_PER_STREAM, FILES_PER_STREAM + 4)]
    for k, rel in enumerate(cut, start=FILES_PER_STREAM):
        path = write_file(archive, "north", k, seed=90 + k)
        path.write_bytes(path.read_bytes()[:5000])
    cfg = write_job(tmp_path, archive)
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.type == StateType.COMPLETED and state.name == flows.STATE_LEFT_OUT, (state.name, state.message)
    summary = state.result()
    assert sorted(summary["invalid"]) == cut and summary["counts"]["complete"] == len(ALL_FILES), summary

    run = poll(lambda: prefect_client.read_flow_run(flow_run_id(state)),
               lambda r: r.state is not None and r.state.is_final(), "the final state of the flow run")
    assert run.state.type == StateType.COMPLETED and run.state.name == "LeftOut", run.state
    message = run.state.message
    assert message.startswith("4 input(s) left out"), message
    assert sum(rel in message for rel in cut) == 3 and "and 1 more" in message, message
    assert message.count("NPY header claims") == 3, message  # each named with its reason
    assert f"twinpass status {tmp_path / 'out.zarr'}" in message, message


def test_a_report_that_cannot_be_written_after_the_flow_run_keeps_the_runs_outcome(prefect_client, npy_archive,
                                                                                  tmp_path, monkeypatch, capsys):
    # The report's path is taken by a folder (POSIX rename(2): a file cannot replace a
    # directory), found after every block is filtered and the run recorded: the command
    # exits 0 as documented for a run whose files are all done (not 2, "stopped before it
    # began"), prints the summary and then one error line naming the report; the flow run
    # ends Completed, its message naming the report, and the write-report task run Failed.
    cfg = write_job(tmp_path, npy_archive)
    report = tmp_path / "out.report.html"  # the report's default path beside out.zarr
    report.mkdir()
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    assert cli.main(["run", str(cfg)]) == 0
    captured = capsys.readouterr()
    assert f"complete {len(ALL_FILES)}, skipped (unchanged) 0, failed 0, invalid 0" in captured.out, captured.out
    last = captured.err.strip().splitlines()[-1]
    assert last.startswith(f"twinpass: error: {report}: cannot write the report") and "twinpass report" in last, \
        captured.err

    run = _flow_run_of(prefect_client, cfg)
    assert run.state.is_completed() and "the report was not written" in run.state.message, run.state
    assert str(report) in run.state.message, run.state.message
    runs = final_task_runs(prefect_client, run.id, expected=5)
    assert runs_of(runs, flows.finalize_task)[0].state.is_completed()
    assert runs_of(runs, flows.report_task)[0].state.is_failed()
    assert all(_file_records_honest(str(tmp_path / "out.zarr")).values())


def test_a_report_that_cannot_be_written_after_a_run_with_a_failed_file_is_said_once(prefect_client, npy_archive,
                                                                                    tmp_path, monkeypatch, capsys):
    # A file fails (injected fault, no retries) and the report's path is taken by a folder:
    # the command exits 1 (a file failed), its "run ended" line names the failed file, and
    # the report's failure is said once, in the last line, not also in the line before.
    bad = file_relpath("north", 0)
    cfg = write_job(tmp_path, npy_archive, engine_retries=0, flow_retries=0)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise", "file": array_name(bad), "block": 1}]))
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    report = tmp_path / "out.report.html"
    report.mkdir()
    assert cli.main(["run", str(cfg)]) == 1
    captured = capsys.readouterr()
    ended = [line for line in captured.out.splitlines() if line.startswith("run ended Failed")]
    assert len(ended) == 1 and bad in ended[0] and "report" not in ended[0], captured.out
    said = (captured.out + captured.err).count(f"{report}: cannot write the report")
    assert said == 1 and captured.err.strip().splitlines()[-1].startswith("twinpass: error:"), captured


def test_the_demo_whose_report_cannot_be_written_still_ends_as_a_demo(prefect_client, tmp_path, monkeypatch, capsys):
    # `twinpass demo` with its report's path taken by a folder: the run stands, so the demo
    # still prints its closing lines (time, exit status, what to try next) and exits 0 (its
    # one truncated file is left out on purpose), then says in its last line that the report
    # was not written.
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    folder = tmp_path / "demo"
    report = folder / "filtered.report.html"
    report.mkdir(parents=True)
    assert cli.main(["demo", str(folder), "--hours", "1"]) == 0
    captured = capsys.readouterr()
    assert "demo finished in" in captured.out and "(exit status 0;" in captured.out, captured.out
    assert "next: run the same command again" in captured.out, captured.out
    last = captured.err.strip().splitlines()[-1]
    assert last.startswith(f"twinpass: error: {report}: cannot write the report"), captured.err


def test_a_per_file_table_the_dashboard_refuses_leaves_the_recorded_run_completed(prefect_client, npy_archive,
                                                                                 tmp_path, monkeypatch, caplog):
    # Injected fault: the API call that publishes the per-file table artifact fails (the
    # server went away) after the run is recorded in the store. The flow run still ends
    # Completed, a warning names the table, and the store holds every file complete.
    def refused(*args, **kwargs):
        raise ConnectionError("injected: the Prefect API did not answer")

    monkeypatch.setattr(flows, "create_table_artifact", refused)
    caplog.set_level(logging.WARNING)
    cfg = write_job(tmp_path, npy_archive)
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_completed() and state.name == "Completed", (state.name, state.message)
    warned = [r.getMessage() for r in caplog.records if "could not show the per-file table" in r.getMessage()]
    assert len(warned) == 1 and "injected: the Prefect API did not answer" in warned[0], warned
    assert all(_file_records_honest(str(tmp_path / "out.zarr")).values())


def test_a_segment_whose_blocks_do_not_fit_the_memory_budget_is_not_retried(prefect_client, npy_archive, tmp_path):
    # Blocks set by hand (block_seconds) whose window exceeds [processing] memory_budget_mib
    # fail their segment with a message naming both settings; running it again cannot help,
    # so the task ends Failed after one run although a retry is configured.
    cfg = write_job(tmp_path, npy_archive, flow_retries=1)
    text = cfg.read_text(encoding="utf-8").replace("block_seconds = 10.0", "block_seconds = 1000.0\nmemory_budget_mib = 1.0")
    cfg.write_text(text, encoding="utf-8")
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_failed(), state.message
    runs = final_task_runs(prefect_client, flow_run_id(state), expected=3)
    segs = runs_of(runs, flows.filter_segment)
    assert len(segs) == 2 and all(t.state.is_failed() and t.run_count == 1 for t in segs), \
        [(t.name, t.state.name, t.run_count) for t in segs]
    assert all("block_seconds = 1000" in t.state.message and "memory_budget_mib = 1" in t.state.message
               for t in segs)
    records = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").file_records()
    assert not any(rec.complete for rec in records.values())


def test_a_segment_whose_checks_fail_is_not_retried(prefect_client, npy_archive, tmp_path, monkeypatch):
    # Injected fault: block 2 of one file is filtered with its first section's numerator
    # scaled by sqrt(2) (+6 dB overall), so its response check fails; running the block
    # again gives the same figures, so the segment task ends Failed after one run even
    # with a retry configured, and the other stream's segment completes.
    bad = file_relpath("south", 1)
    cfg = write_job(tmp_path, npy_archive, engine_retries=0, flow_retries=1)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "perturb", "file": array_name(bad), "block": 2}]))
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_failed() and bad in state.message, state.message

    runs = final_task_runs(prefect_client, flow_run_id(state), expected=4)
    segs = runs_of(runs, flows.filter_segment)
    failed = next(t for t in segs if t.state.is_failed())
    assert "south" in failed.name and failed.run_count == 1, (failed.name, failed.run_count)
    assert "failed their checks" in failed.state.message and "not retried" in failed.state.message
    # The message says which block failed and on what figure (+6.02 dB = 20 log10 2, the injected gain).
    assert "block 2 (frames" in failed.state.message and "passband deviation +6" in failed.state.message
    assert [s.name for s in prefect_client.read_task_run_states(failed.id)].count("Retrying") == 0
    north = next(t for t in segs if "north" in t.name)
    assert north.state.is_completed()
    table = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_block_table(array_name(bad))
    assert table.status[2] == BlockStatus.FAIL and not table.errors


def test_a_segment_whose_input_is_damaged_is_not_retried(prefect_client, tmp_path):
    # An int16 Zarr input (zarr-python, format 3) one of whose chunk files no codec decodes,
    # unchanged since the plan: its blocks fail once each, naming the chunk, and the segment
    # task ends Failed after one run although a retry is configured (a retry reads the same).
    import zarr

    archive = tmp_path / "archive"
    path = archive / "south" / "south_20260301T000000.zarr"
    a = zarr.create_array(path, shape=(FILE_FRAMES, 2), chunks=(500, 2), dtype="int16", zarr_format=3)
    a[:] = (np.random.default_rng(5).standard_normal((FILE_FRAMES, 2)) * 3000).astype(np.int16)
    (path / "c" / "3" / "0").write_bytes(b"\x00garbage" * 10)  # frames 1500-2000
    cfg = write_job(tmp_path, archive, engine_retries=2, flow_retries=1)
    cfg.write_text(cfg.read_text(encoding="utf-8").replace('include = ["**/*.npy"]', 'include = ["**/*.zarr"]'),
                   encoding="utf-8")
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_failed(), state.message
    (seg,) = runs_of(final_task_runs(prefect_client, flow_run_id(state), expected=3), flows.filter_segment)
    assert seg.state.is_failed() and seg.run_count == 1, (seg.state.name, seg.run_count)
    assert "not retried (its input is damaged" in seg.state.message, seg.state.message
    assert "chunk c/3/0 (frames 1500-2000) of the store is damaged" in seg.state.message, seg.state.message
    table = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_block_table("south/south_20260301T000000")
    assert table.errors and all(e.startswith("DamagedInputError: ") for e in table.errors.values()), table.errors
    assert not any(rec.complete for rec in OutputStore.open(str(tmp_path / "out.zarr"), mode="r").file_records().values())


def test_locked_store_exits_2_naming_the_lock(prefect_server, npy_archive, tmp_path, monkeypatch, capsys):
    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="a", archive_root=npy_archive)
    with store.lock("another-run"):
        assert cli.main(["run", str(cfg), "--no-report"]) == 2
    err = capsys.readouterr().err
    assert "twinpass: error:" in err and "another-run" in err, err


def test_a_run_that_cannot_be_recorded_ends_with_its_summary_and_the_stores_error(prefect_client, npy_archive,
                                                                                  tmp_path, monkeypatch, capsys,
                                                                                  caplog):
    # Injected faults: the store refuses the run's record (its own error, as on a file system
    # gone read-only) and the lock's removal raises EROFS. The flow run ends Failed naming the
    # store's error; the command prints the run's summary, then that error (exit 2).
    import errno

    from twinpass.errors import StoreError
    from twinpass.io import store_lock

    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")
    store_path = tmp_path / "out.zarr"
    said = (f"cannot write the run record of {store_path}: Read-only file system; "
            "check that the store location is writable")

    def unwritable_record(self, entry, details=None):
        raise StoreError(said)

    def read_only(self):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(self.path))

    monkeypatch.setattr(OutputStore, "append_run", unwritable_record)
    monkeypatch.setattr(store_lock.LocalLockFile, "remove", read_only)
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        assert cli.main(["run", str(cfg), "--no-report"]) == 2
    out, err = capsys.readouterr()
    assert f"complete {len(ALL_FILES)}, skipped (unchanged) 0, failed 0" in out and f"store: {store_path}" in out, out
    assert err.strip().splitlines()[-1] == f"twinpass: error: {said}", err
    assert "Traceback" not in err and "OSError" not in out + err, err
    assert any(f"could not remove the output store lock {store_path / '.twinpass-lock'}" in r.getMessage()
               for r in caplog.records)
    run = _flow_run_of(prefect_client, cfg)
    assert run.state.is_failed() and run.state.message == flows.RUN_UNRECORDED + said, run.state.message


def test_a_store_gone_read_only_mid_run_ends_the_flow_command_with_the_stores_error(prefect_client, npy_archive,
                                                                                   tmp_path, monkeypatch, capsys):
    # A real read-only file system (Linux mount(8): a tmpfs remounted read-only once the run
    # has begun, before its blocks are written; root only): the command ends with the run's
    # summary and the store's clear error, not with the lock's removal failing.
    from test_safety import _mount, tmpfs
    from twinpass import headstart

    with tmpfs(tmp_path / "disk", "16m") as disk:
        cfg = write_job(tmp_path, npy_archive, store=(disk / "out.zarr").as_posix())
        monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")
        for module in (flows, headstart):
            real = module.begin_run

            def begin_then_read_only(store, prep, real=real):
                real(store, prep)
                _mount("-o", "remount,ro", str(disk))

            monkeypatch.setattr(module, "begin_run", begin_then_read_only)
        try:
            assert cli.main(["run", str(cfg), "--no-report"]) == 2
        finally:
            _mount("-o", "remount,rw", str(disk))
        out, err = capsys.readouterr()
        assert f"complete 0, skipped (unchanged) 0, failed {len(ALL_FILES)}" in out, out
        assert "Read-only file system" in out and f"store: {disk / 'out.zarr'}" in out, out
        last = err.strip().splitlines()[-1]
        assert last.startswith("twinpass: error: cannot write") and "Read-only file system" in last, err
        assert "writable" in last and "twinpass-lock" not in last and "OSError" not in last, err
        assert (disk / "out.zarr" / ".twinpass-lock").is_file()  # left for the next run to recover
        run = _flow_run_of(prefect_client, cfg)
        assert run.state.is_failed() and run.state.message.startswith(flows.RUN_UNRECORDED), run.state.message
        records = OutputStore.open(str(disk / "out.zarr"), mode="r").file_records()
        assert not any(r.complete for r in records.values())  # nothing marked complete


def test_a_stale_lock_recovered_by_the_command_is_said_in_the_flow_runs_log(prefect_client, npy_archive, tmp_path,
                                                                           monkeypatch):
    # A run killed without releasing the store's lock (kill -9, a machine going down) leaves
    # it behind; the next run recovers it. The dashboard is where a scheduled run is watched,
    # so the flow run's own log says so, naming the run that left it, as the terminal does.
    import socket

    from prefect.client.schemas.filters import LogFilter, LogFilterFlowRunId

    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")
    OutputStore.open(str(tmp_path / "out.zarr"), mode="a", archive_root=npy_archive)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / "out.zarr" / ".twinpass-lock").write_text(json.dumps(
        {"pid": dead.pid, "host": socket.gethostname(), "run_id": "killed-run", "started": "2026-03-01T00:00:00+00:00"}))
    assert cli.main(["run", str(cfg), "--no-report"]) == 0
    run = _flow_run_of(prefect_client, cfg)
    logs = poll(lambda: [lg.message for lg in prefect_client.read_logs(
                    log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[run.id])))],
                lambda msgs: any("stale lock" in m for m in msgs), "the flow run's stale-lock line")
    line = next(m for m in logs if "stale lock" in m)
    assert "killed-run" in line and "no longer running" in line, line
    assert not (tmp_path / "out.zarr" / ".twinpass-lock").exists()
    check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, "north")


# ------------------------------------------------------------------ execution
def test_distributed_scheduler_address_from_inside_the_task(prefect_client, npy_archive, tmp_path):
    from distributed import Client, LocalCluster

    cfg = write_job(tmp_path, npy_archive)
    with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as cluster:
        state = flows.archive_run(config_path=str(cfg), scheduler=cluster.scheduler_address, report=False,
                                  return_state=True)
        with Client(cluster) as client:
            executed = client.run(lambda dask_worker: dask_worker.state.executed_count)
            pids = client.run(os.getpid)
    assert state.is_completed(), state.message
    assert len(pids) == 2 and os.getpid() not in pids.values()
    # Every block ran on the cluster's worker processes (the only tasks they ran).
    assert sum(executed.values()) == 6 * BLOCKS_PER_FILE, executed
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)


def test_a_cluster_started_before_the_flow_call_runs_its_blocks(prefect_client, npy_archive, tmp_path):
    # The command line starts the local cluster while Prefect's temporary server starts
    # (start_client_early); the flow run takes it, runs every block on it and closes it.
    # A run with nothing to filter closes it unused. Output: scipy.signal.sosfiltfilt.
    cfg = write_job(tmp_path, npy_archive)
    flows.start_client_early("threads", 2)
    early = flows._EARLY
    worker = next(iter(early.client().cluster.workers.values()))
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_completed(), state.message
    assert flows._EARLY is None
    with pytest.raises(RuntimeError, match="closed"):
        early.client()
    assert worker.state.executed_count == 6 * BLOCKS_PER_FILE
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)

    flows.start_client_early("threads", 2)
    unused = flows._EARLY
    worker = next(iter(unused.client().cluster.workers.values()))
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_completed() and state.result()["counts"]["skipped"] == 6
    assert flows._EARLY is None and worker.state.executed_count == 0
    with pytest.raises(RuntimeError, match="closed"):
        unused.client()


# ----------------------------------------------------------------- head starts
def _file_records_honest(store_location: str) -> dict[str, bool]:
    """Each file's ``complete`` flag, checked against its block table (complete: every block passed or warned)."""
    store = OutputStore.open(store_location, mode="r")
    records = store.file_records()
    for rel, rec in records.items():
        if rec.complete:
            table = store.read_block_table(array_name(rel), figures=False, seams=False)
            assert table.todo().size == 0, (rel, table.status)
    return {rel: rec.complete for rel, rec in records.items()}


def _job_done(store_location: str, archive: Path) -> None:
    """Every file is complete, and each stream's output is scipy.signal.sosfiltfilt of the
    whole segment (:func:`prefect_fixtures.check_against_sosfiltfilt`)."""
    assert all(_file_records_honest(store_location).values())
    for stream in STREAMS:
        check_against_sosfiltfilt(store_location, archive, stream)


def _next_run_finishes(cfg: Path, archive: Path, store: Path | None = None) -> None:
    """The next run of ``cfg`` (it takes the store's lock; store ``out.zarr`` beside it
    unless given) completes the job (:func:`_job_done`)."""
    state = flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert state.is_completed(), state.message
    _job_done(str(store if store is not None else cfg.parent / "out.zarr"), archive)


def test_a_run_begun_before_its_flow_run_is_taken_over_by_it(prefect_client, npy_archive, tmp_path, monkeypatch):
    # The command line begins the run (lock, preparation, cluster, segment drivers) before
    # the flow run exists; the flow run takes it over: same run id, every block run once on
    # the head start's cluster, one task per segment with its progress artifact, the lock
    # released at the end. The terminal's progress bar sees each block once, as the drivers
    # record it, not again when the tasks follow them. Output: scipy.signal.sosfiltfilt of
    # the whole segment.
    cfg_path = write_job(tmp_path, npy_archive)
    watched: list[tuple[str, int, int, str]] = []
    again: list[tuple[str, int, int]] = []
    monkeypatch.setattr(flows, "TERMINAL_PROGRESS", lambda seg, done, total, res: again.append((seg, done, total)))
    head = HeadStart.begin(load_config(cfg_path), watch=lambda seg, done, total, res: watched.append(
        (seg, done, total, threading.current_thread().name)))
    assert sorted(head.segments) and head.client_start is not None
    worker = next(iter(head.client_start.client().cluster.workers.values()))
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="a", archive_root=npy_archive)
    with pytest.raises(StoreLockedError, match=head.run_id):
        with store.lock("another-run"):
            pass
    offer(head)
    state = flows.archive_run(config_path=str(cfg_path), report=False, return_state=True)
    assert state.is_completed(), state.message
    summary = state.result()
    assert summary["run_id"] == head.run_id and summary["counts"]["blocks_run"] == 6 * BLOCKS_PER_FILE
    assert worker.state.executed_count == 6 * BLOCKS_PER_FILE  # each block once, on the head start's cluster
    assert head.segments == {}  # every driver followed by its task
    by_segment: dict[str, list[tuple[int, int]]] = {}
    for seg, done, total, thread in watched:
        assert thread.startswith("twinpass-early-"), thread
        by_segment.setdefault(seg, []).append((done, total))
    assert len(by_segment) == len(STREAMS)
    assert sum(ev[-1][1] for ev in by_segment.values()) == 6 * BLOCKS_PER_FILE
    assert all([d for d, _ in ev] == list(range(1, ev[-1][1] + 1)) for ev in by_segment.values()), by_segment
    assert again == []

    run_id = flow_run_id(state)
    runs = final_task_runs(prefect_client, run_id, expected=4)
    segs = runs_of(runs, flows.filter_segment)
    assert len(segs) == 2 and all(t.state.is_completed() and t.run_count == 1 for t in segs)
    _artifacts_by_key(prefect_client, run_id, {flows.ARTIFACT_FILES}, progress=2)
    assert [r["run_id"] for r in OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_runs()] == [head.run_id]
    with store.lock("the-next-run"):  # released
        pass
    assert all(_file_records_honest(str(tmp_path / "out.zarr")).values())
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)


def test_the_command_begins_the_run_on_worker_processes_and_the_flow_run_finishes_it(prefect_client, npy_archive,
                                                                                    tmp_path, monkeypatch, capsys):
    # `twinpass run` begins the run before the flow call, here on two local worker
    # processes; the flow run takes it over (its run id is the one in the store's record).
    # Output: scipy.signal.sosfiltfilt of the whole segment.
    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")
    begun: list[HeadStart] = []
    real_begin = HeadStart.begin.__func__

    def spy(cls, *args, **kwargs):  # records the head start; no behaviour changed
        begun.append(real_begin(cls, *args, **kwargs))
        return begun[-1]

    monkeypatch.setattr(HeadStart, "begin", classmethod(spy))
    assert cli.main(["run", str(cfg), "--no-report", "--scheduler", "processes", "--workers", "2"]) == 0
    out = capsys.readouterr()
    assert "complete 6, skipped (unchanged) 0, failed 0" in out.out
    n = 6 * BLOCKS_PER_FILE
    assert out.err.count(f"blocks {n}/{n}") == 1, out.err  # the progress bar saw each block once
    assert len(begun) == 1 and begun[0].scheduler == "processes" and begun[0].segments == {}
    run = _flow_run_of(prefect_client, cfg)
    assert run.state.is_completed()
    records = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_runs()
    assert [r["run_id"] for r in records] == [begun[0].run_id]
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)


def test_a_segment_begun_before_the_flow_run_is_retried_by_its_task(prefect_client, npy_archive, tmp_path,
                                                                   monkeypatch, caplog):
    # Block 1 of each north file fails once while the head start's driver runs it; the
    # task following that driver fails, and its retry (a normal attempt) resumes: it runs
    # only the failed blocks, because the followed driver's blocks marked the segment prepared.
    # Output: scipy.signal.sosfiltfilt of the whole segment.
    cfg_path = write_job(tmp_path, npy_archive, engine_retries=0, flow_retries=1)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "raise-once", "file": "north/*", "block": 1}]))
    monkeypatch.setenv("TWINPASS_FAULTS_STATE", str(tmp_path / "fault-state"))
    caplog.set_level(logging.INFO, logger="twinpass")
    offer(HeadStart.begin(load_config(cfg_path)))
    state = flows.archive_run(config_path=str(cfg_path), report=False, return_state=True)
    assert state.is_completed(), state.message
    assert _engine_block_lines(caplog) == []  # the following task's run logger has them, once
    runs = final_task_runs(prefect_client, flow_run_id(state), expected=3)
    north = next(t for t in runs_of(runs, flows.filter_segment) if "north" in t.name)
    assert north.run_count == 2
    # Every block of both streams once; the failed ones, done by the retry, counted apart.
    counts = state.result()["counts"]
    assert counts["blocks_run"] == 2 * FILES_PER_STREAM * BLOCKS_PER_FILE
    assert counts["blocks_retried"] == FILES_PER_STREAM
    check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, "north")


def test_a_run_begun_but_not_taken_over_stops_without_marking_anything_complete(prefect_client, npy_archive,
                                                                              tmp_path, monkeypatch, caplog):
    # As when the temporary server never answers: the head start is withdrawn while its
    # blocks run (each delayed 0.2 s). Its cluster stops, the lock is released, no file is
    # marked complete unless every block of it is done, and the next run finishes the job.
    # The cancelled blocks are recorded as cancelled and logged in one line per segment, not
    # as failures. Output: scipy.signal.sosfiltfilt of the whole segment.
    cfg_path = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "sleep", "file": "*", "block": "*",
                                                       "seconds": 0.2}]))
    caplog.set_level(logging.INFO, logger="twinpass")
    head = HeadStart.begin(load_config(cfg_path))
    segment_ids = sorted(head.segments)
    offer(head)
    withdraw()
    for seg_id in segment_ids:  # a task coming after the stop must not start its segment again
        with pytest.raises(RunStoppedError, match="stopped before this segment started"):
            head.take_segment(seg_id)
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    errors = [e for rel in records for e in store.read_block_table(array_name(rel), figures=False,
                                                                   seams=False).errors.values()]
    assert errors and all(e.startswith("cancelled: the run was stopped") for e in errors), errors
    stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))  # its counts: what the store shows done
    engine_logs = [r for r in caplog.records if r.name == "twinpass.engine"]
    assert not [r for r in engine_logs if r.levelno >= logging.ERROR], [r.getMessage() for r in engine_logs]
    summaries = [r.getMessage() for r in engine_logs if "cancelled before they finished" in r.getMessage()]
    assert 1 <= len(summaries) <= len(STREAMS), summaries
    assert sum(int(m.split(": ")[1].split()[0]) for m in summaries) == len(errors)
    monkeypatch.delenv("TWINPASS_FAULTS")
    _next_run_finishes(cfg_path, npy_archive, tmp_path / "out.zarr")


def test_a_run_begun_for_other_settings_is_stopped_and_the_flow_run_starts_afresh(prefect_client, npy_archive,
                                                                                 tmp_path):
    # A flow call with other settings (here force) than the offered head start drops it and
    # runs from the start. Output: scipy.signal.sosfiltfilt of the whole segment.
    cfg_path = write_job(tmp_path, npy_archive)
    head = HeadStart.begin(load_config(cfg_path))
    offer(head)
    state = flows.archive_run(config_path=str(cfg_path), force=True, report=False, return_state=True)
    assert state.is_completed(), state.message
    summary = state.result()
    assert summary["run_id"] != head.run_id
    assert all(_file_records_honest(str(tmp_path / "out.zarr")).values())
    for stream in STREAMS:
        check_against_sosfiltfilt(str(tmp_path / "out.zarr"), npy_archive, stream)


def test_a_wait_for_a_driver_cut_short_by_ctrl_c_does_not_take_it_for_ended(npy_archive, tmp_path, monkeypatch):
    # On Python 3.11, a Thread.join that Ctrl-C interrupts can mark the thread stopped while
    # it still runs (CPython issue 90882, from memory); a stopping run that took such a
    # driver for ended would release the store's lock under it. Every block is held until a
    # file exists; Ctrl-C (SIGINT to this thread) comes while the test waits for the driver.
    gate = tmp_path / "go"
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "hold", "file": "*", "block": "*",
                                                       "path": str(gate), "seconds": 120}]))
    head = HeadStart.begin(load_config(write_job(tmp_path, npy_archive)))
    try:
        driver = head.segments[next(iter(head.segments))]
        timer = threading.Timer(0.3, signal.pthread_kill, (threading.main_thread().ident, signal.SIGINT))
        timer.start()
        with pytest.raises(KeyboardInterrupt):
            driver.join()  # held: only the interrupt ends this wait
        timer.join()
        assert not driver.join(0), "a driver whose blocks are held was taken for ended"
    finally:
        gate.touch()
        offer(head)
        withdraw()  # the drivers end once their blocks are let go; the lock is released
    assert driver.join(0)


@pytest.mark.parametrize("scheme", ["memory", "file"])
def test_output_to_an_fsspec_url(prefect_client, npy_archive, tmp_path, monkeypatch, scheme):
    monkeypatch.chdir(tmp_path)  # a report of a non-local store goes to the working folder
    url = (f"memory://twinpass-flow-tests/{uuid.uuid4().hex}/out.zarr" if scheme == "memory"
           else (tmp_path / "out.zarr").as_uri())
    cfg = write_job(tmp_path, npy_archive, store=url)
    state = flows.archive_run(config_path=str(cfg), report=scheme == "memory", return_state=True)
    assert state.is_completed(), state.message
    summary = state.result()
    assert summary["store"] == url
    if scheme == "memory":
        assert Path(summary["report"]) == tmp_path / "out.report.html" and Path(summary["report"]).is_file()
    if scheme == "file":
        assert (tmp_path / "out.zarr" / "zarr.json").is_file()
    for stream in STREAMS:
        check_against_sosfiltfilt(url, npy_archive, stream)


# ----------------------------------------------------------------- deployments
def test_bad_schedule_is_a_config_error(npy_archive, tmp_path):
    cfg = write_job(tmp_path, npy_archive)
    with pytest.raises(ConfigError, match="Invalid cron"):
        flows.build_deployment(str(cfg), cron="30 2 * *")
    with pytest.raises(ConfigError, match="Mars/Olympus"):
        flows.build_deployment(str(cfg), cron="30 2 * * *", timezone="Mars/Olympus")
    with pytest.raises(ConfigError, match="not found"):
        flows.build_deployment(str(tmp_path / "missing.toml"), cron="30 2 * * *")


def test_deployment_of_a_saved_block_applies(prefect_server, prefect_client):
    dep = flows.build_deployment(config_block="tp-nightly-job", cron="0 3 * * *", timezone="America/New_York",
                                 name="tp-block-deployment")
    dep_id = dep.apply()
    stored = prefect_client.read_deployment(dep_id)
    assert stored.parameters == {"config_block": "tp-nightly-job"}
    assert stored.entrypoint == "twinpass.flows.archive_run"
    (sched,) = stored.schedules
    assert (sched.schedule.cron, sched.schedule.timezone) == ("0 3 * * *", "America/New_York")
    assert prefect_client.read_flow(stored.flow_id).name == flows.FLOW_NAME


def test_deployable_module_exposes_the_flow():
    from prefect.flows import load_flow_from_entrypoint

    # What `prefect deploy flows/archive_flow.py:archive_run` loads.
    loaded = load_flow_from_entrypoint(f"{ROOT / 'flows' / 'archive_flow.py'}:archive_run")
    assert loaded.name == flows.FLOW_NAME
    assert set(loaded.parameters.properties) >= {"config_path", "config_block", "force", "scheduler", "workers"}


@pytest.mark.parametrize("source", ["file", "block"])
def test_cli_serve_creates_the_scheduled_deployment(prefect_server, prefect_client, npy_archive, tmp_path, source):
    from prefect.client.schemas.filters import DeploymentFilter, DeploymentFilterName

    cfg = write_job(tmp_path, npy_archive)
    name = f"tp-weekday-mornings-{source}"
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": prefect_server})
    if source == "block":  # a configuration saved on the server, read by each scheduled run
        block = f"tp-served-{uuid.uuid4().hex[:8]}"
        saved = subprocess.run([sys.executable, "-m", "twinpass.cli", "save", str(cfg), "--name", block],
                               env=env, cwd=tmp_path, capture_output=True, text=True, timeout=600)
        assert saved.returncode == 0, saved.stdout + saved.stderr
        what, expected = ["--block", block], {"config_block": block}
    else:
        what, expected = [str(cfg)], {"config_path": str(cfg.resolve())}
    with open(tmp_path / "serve.log", "w") as log:
        proc = subprocess.Popen([sys.executable, "-m", "twinpass.cli", "serve", *what, "--cron", "30 2 * * 1-5",
                                 "--timezone", "Europe/Berlin", "--name", name],
                                env=env, cwd=tmp_path, stdout=log, stderr=subprocess.STDOUT)
    try:
        deps = poll(lambda: prefect_client.read_deployments(
                        deployment_filter=DeploymentFilter(name=DeploymentFilterName(any_=[name]))),
                    lambda d: len(d) == 1 or proc.poll() is not None, f"deployment {name}")
        assert proc.poll() is None, (tmp_path / "serve.log").read_text()
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    (dep,) = deps
    (sched,) = dep.schedules
    assert (sched.schedule.cron, sched.schedule.timezone) == ("30 2 * * 1-5", "Europe/Berlin")
    assert dep.parameters == expected
    assert prefect_client.read_flow(dep.flow_id).name == flows.FLOW_NAME


def test_saved_block_mistakes_are_configuration_errors(prefect_server, npy_archive, tmp_path):
    # Prefect's rule for block names (lower case letters, digits and dashes) is checked
    # before saving, and a run of a block name nobody saved stops before any flow run:
    # both exit 2 with one line saying what to do, no traceback.
    cfg = write_job(tmp_path, npy_archive)
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": prefect_server})

    def cli_run(*args):
        return subprocess.run([sys.executable, "-m", "twinpass.cli", *args], env=env, cwd=tmp_path,
                              capture_output=True, text=True, timeout=600)

    r = cli_run("save", str(cfg), "--name", "Bad Name")
    assert r.returncode == 2 and "lower case letters, digits and dashes" in r.stderr, r.stderr
    assert "Traceback" not in r.stderr
    name = f"never-saved-{uuid.uuid4().hex[:8]}"
    r = cli_run("run", "--block", name, "--no-report")
    assert r.returncode == 2, r.stdout + r.stderr
    assert f"no TwinpassJob block named '{name}'" in r.stderr and "twinpass save" in r.stderr, r.stderr
    assert "Traceback" not in r.stderr + r.stdout and "Beginning flow run" not in r.stderr + r.stdout
    # Serving a block nobody saved stops at once, not at its first scheduled run; so does
    # serving both a file and a block, or neither.
    for args in (["--block", name], [str(cfg), "--block", name], []):
        r = cli_run("serve", *args, "--cron", "30 2 * * *")
        assert r.returncode == 2, (args, r.stdout + r.stderr)
        assert "Traceback" not in r.stderr + r.stdout, r.stderr
        assert (f"no TwinpassJob block named '{name}'" if len(args) == 2
                else "either a configuration file or --block NAME") in r.stderr, (args, r.stderr)


def test_a_setup_mistake_through_the_flow_is_one_line_without_a_traceback(prefect_server, npy_archive, tmp_path):
    # A misspelt archive root, and a store inside the archive: through the flow, as without
    # it, the command exits 2 with one line naming the key and the remedy; Prefect's own log
    # lines about the failed flow run stay (the dashboard shows them), without a traceback.
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": prefect_server})
    cfg = write_job(tmp_path, npy_archive)
    bad_root = tmp_path / "bad-root.toml"
    bad_root.write_text(cfg.read_text().replace(npy_archive.as_posix(), npy_archive.as_posix() + "-typo"))
    inside = write_job(tmp_path, npy_archive, store=(npy_archive / "out.zarr").as_posix(), name="inside.toml")
    for path, said in ((bad_root, "is not a folder"), (inside, "inside")):
        r = subprocess.run([sys.executable, "-m", "twinpass.cli", "run", str(path), "--no-report"], env=env,
                           cwd=tmp_path, capture_output=True, text=True, timeout=600)
        assert r.returncode == 2, r.stdout + r.stderr
        assert "Traceback" not in r.stdout + r.stderr, r.stderr
        ours = [line for line in r.stderr.splitlines() if line.startswith("twinpass: error:")]
        assert len(ours) == 1 and said in ours[0], r.stderr
    assert not (tmp_path / "out.zarr").exists()  # the run could not begin: no store was created


# ------------------------------------------------------------------------- CLI
def test_cli_run_through_the_flow_on_a_fresh_prefect_home(npy_archive, tmp_path):
    """`twinpass run` with no server configured starts Prefect's temporary local server."""
    cfg = write_job(tmp_path, npy_archive)
    env = flow_env({"PREFECT_HOME": str(tmp_path / "fresh-prefect-home")})  # analytics left to twinpass
    proc = subprocess.run([sys.executable, "-m", "twinpass.cli", "run", str(cfg)], env=env, cwd=tmp_path,
                          capture_output=True, text=True, timeout=600)
    out = proc.stdout + proc.stderr
    assert proc.returncode == 0, out
    assert "database is locked" not in out
    assert "Traceback" not in out
    assert "complete 6, skipped (unchanged) 0, failed 0" in proc.stdout, out


def test_ctrl_c_during_a_flow_command_keeps_finished_blocks_and_marks_nothing_complete_falsely(
        prefect_server, prefect_client, npy_archive, tmp_path):
    # Ctrl-C (SIGINT) while `twinpass run` filters (each block delayed 2 s, so that
    # blocks are still running when the flow run begins, even on a loaded machine): the command
    # ends with status 130 and says so; the store's lock is released, no file is marked
    # complete with a block not done, the stopped blocks are logged in one line per
    # segment, not one error line each, and the next run finishes the job.
    # Output: scipy.signal.sosfiltfilt of the whole segment.
    cfg = write_job(tmp_path, npy_archive)
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": prefect_server,
                    "TWINPASS_FAULTS": json.dumps([{"action": "sleep", "file": "*", "block": "*", "seconds": 2.0}]),
                    "TWINPASS_FAULTS_STATE": str(tmp_path / "fault-state")})
    code, text, out = interrupt_cli(["run", str(cfg), "--no-report"], env, tmp_path / "run.err",
                                    "file(s) to filter", cwd=tmp_path)  # a segment task has begun
    assert code == 130, text + out
    assert "twinpass: interrupted; finished blocks are kept, rerun to resume" in text
    # Stopped blocks are neither failures nor retried; no traceback, no final block count.
    assert "failed after" not in text and "Traceback" not in text, text
    stopped = [line for line in text.splitlines() if "cancelled before they finished (the run was stopped)" in line]
    assert stopped, text
    segments = [line.split("segment ", 1)[1].split(": ", 1)[0] for line in stopped]
    assert len(segments) == len(set(segments)), text  # once per segment: by its task, or the engine's if none took it
    assert "ended with CancelledError" not in text, text  # distributed's line for each cancelled block
    assert "Retries are exhausted" not in text, text
    assert f"blocks {6 * BLOCKS_PER_FILE}/{6 * BLOCKS_PER_FILE}" not in text, text
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    root = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_root_info()
    assert root["runs"][-1].get("interrupted") is True, root["runs"]  # the stopped run is the last recorded
    stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))  # its counts: what the store shows done
    _next_run_finishes(cfg, npy_archive, tmp_path / "out.zarr")


@contextlib.contextmanager
def _command_running(cfg: Path, server: str, fault: dict, folder: Path) -> Iterator[tuple[subprocess.Popen, Path]]:
    """`twinpass run CFG --no-report` against the Prefect ``server``, with the injected
    ``fault``, from once a segment task has begun (in its stderr, kept in the file yielded
    with the process); the process is killed on the way out if it still runs."""
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": server, "TWINPASS_FAULTS": json.dumps([fault])})
    err_path = folder / "run.err"
    with open(err_path, "w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "twinpass.cli", "run", str(cfg), "--no-report"], env=env,
                                cwd=folder, stdout=subprocess.PIPE, stderr=err, text=True)
    try:
        poll(lambda: err_path.read_text(), lambda text: "file(s) to filter" in text or proc.poll() is not None,
             "a segment task's start")
        assert proc.poll() is None, err_path.read_text()
        yield proc, err_path
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_a_flow_run_of_the_command_cancelled_from_the_server_stops_the_run_and_ends_cancelled(
        prefect_server, prefect_client, npy_archive, tmp_path):
    # `twinpass run` against a Prefect server it did not start (its flow run has no runner),
    # each block delayed 2 s (an injected fault) so that blocks still run or wait when the
    # flow run begins, even on a loaded machine. Its flow run is cancelled through Prefect's
    # client as the dashboard's Cancel and `prefect flow-run cancel` do it (state Cancelling,
    # Prefect's cancellation protocol). The run stops as for Ctrl-C: the flow run ends
    # Cancelled (not stuck in Cancelling), the command says it was cancelled from the server
    # and exits 130, the lock is released, nothing is marked complete that is not, the run is
    # recorded as stopped before its end, and the next run finishes the job. Output:
    # scipy.signal.sosfiltfilt of the whole segment.
    from prefect.states import Cancelling

    from twinpass.io.store_lock import LOCK_NAME

    cfg = write_job(tmp_path, npy_archive)
    sleep = {"action": "sleep", "file": "*", "block": "*", "seconds": 2.0}
    with _command_running(cfg, prefect_server, sleep, tmp_path) as (proc, err_path):
        (run,) = poll(lambda: [r for r in prefect_client.read_flow_runs(limit=200)
                               if r.parameters.get("config_path") == str(cfg.resolve())],
                      lambda rs: len(rs) == 1, f"the flow run of {cfg}")
        prefect_client.set_flow_run_state(run.id, Cancelling(message="cancelled from the dashboard"))
        final = poll(lambda: prefect_client.read_flow_run(run.id).state, lambda st: st is not None and st.is_final(),
                     f"the end of flow run {run.id}")
        out, _ = proc.communicate(timeout=240)
    text = err_path.read_text()
    assert final.is_cancelled(), (final.name, final.message)
    assert final.message.startswith(flows.CANCELLED_FROM_SERVER), final.message
    assert proc.returncode == 130, out + text
    assert "twinpass: the flow run was cancelled from the Prefect server; finished blocks are kept" in text, text
    assert "Traceback" not in out + text and "run ended" not in out, out + text
    assert not (tmp_path / "out.zarr" / LOCK_NAME).exists()  # released, not left for a later run to recover
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))  # recorded as stopped, counts as the store shows
    segs = runs_of(final_task_runs(prefect_client, run.id, expected=3), flows.filter_segment)
    assert segs and all(t.state.is_cancelled() for t in segs), [(t.name, t.state.name) for t in segs]
    _next_run_finishes(cfg, npy_archive, tmp_path / "out.zarr")


def test_a_flow_run_cancelled_from_the_server_once_its_run_is_recorded_keeps_the_runs_outcome(
        prefect_client, npy_archive, tmp_path, monkeypatch):
    # A flow run watched for a cancel from the server (as `twinpass run` watches its own) is
    # cancelled once its run is recorded, just before the report is written (the cancel is
    # the injected fault, through Prefect's client, as the dashboard's Cancel does it). The
    # server accepts no final state but Cancelled for it (Prefect's cancellation protocol):
    # the flow run ends Cancelled (not stuck in Cancelling), its message saying the run's
    # outcome stands, with the run's summary as its data; the run is recorded as finished,
    # every file complete. Output: scipy.signal.sosfiltfilt of the whole segment.
    from prefect.runtime import flow_run as flow_run_runtime
    from prefect.states import Cancelling

    from twinpass.server_cancel import server_cancels

    cfg = write_job(tmp_path, npy_archive)
    write_report = flows._write_report

    def cancelled_first(job):
        prefect_client.set_flow_run_state(flow_run_runtime.id, Cancelling(message="cancelled from the dashboard"))
        return write_report(job)

    monkeypatch.setattr(flows, "_write_report", cancelled_first)
    with server_cancels():
        state = flows.archive_run(config_path=str(cfg), return_state=True)
    assert state.is_cancelled(), (state.name, state.message)
    assert state.message.startswith(f"{flows.CANCELLED_FROM_SERVER} after the run was recorded"), state.message
    final = poll(lambda: prefect_client.read_flow_run(flow_run_id(state)).state, lambda st: st.is_final(),
                 "the flow run's end")
    assert final.is_cancelled(), (final.name, final.message)
    summary = state.result(raise_on_failure=False)
    assert summary["counts"]["complete"] == len(ALL_FILES) and summary["failed"] == [], summary
    (run,) = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_runs()
    assert not run.get("interrupted") and run["counts"]["complete"] == len(ALL_FILES), run
    _job_done(str(tmp_path / "out.zarr"), npy_archive)


def test_the_flow_run_of_a_killed_run_is_set_crashed_by_the_run_that_recovers_its_lock(
        prefect_server, prefect_client, npy_archive, tmp_path):
    # `twinpass run` against a Prefect server it did not start, its blocks held (an injected
    # fault), is killed (SIGKILL: no clean-up) once a segment task has begun: its flow run is
    # left Running on the server. The next run of the same configuration, on the same server,
    # recovers the dead run's stale lock and sets that flow run to Crashed, its message naming
    # the recovery; it then finishes the job. Output: scipy.signal.sosfiltfilt of the whole
    # segment.
    from twinpass.io.store_lock import FLOW_RUN_SUFFIX, LOCK_NAME

    cfg = write_job(tmp_path, npy_archive)
    go = tmp_path / "go"
    hold = {"action": "hold", "file": "*", "block": "*", "path": str(go), "seconds": 120}
    try:
        with _command_running(cfg, prefect_server, hold, tmp_path) as (proc, _):
            proc.kill()
            proc.communicate(timeout=60)
    finally:
        go.touch()
    (dead,) = [r for r in prefect_client.read_flow_runs(limit=200)
               if r.parameters.get("config_path") == str(cfg.resolve())]
    assert dead.state.is_running(), dead.state  # nothing ended it
    store = tmp_path / "out.zarr"
    assert (store / LOCK_NAME).exists() and (store / (LOCK_NAME + FLOW_RUN_SUFFIX)).exists()

    _next_run_finishes(cfg, npy_archive, store)
    crashed = prefect_client.read_flow_run(dead.id).state
    assert crashed.is_crashed(), (crashed.name, crashed.message)
    assert "recovered its stale lock on the output store" in crashed.message, crashed.message
    assert not (store / LOCK_NAME).exists() and not (store / (LOCK_NAME + FLOW_RUN_SUFFIX)).exists()


def _job_in_short_blocks(folder: Path, archive: Path) -> Path:
    """A job for the test archive in 3 s blocks (14 per file, each delayed by the tests that
    stop it; 300 samples, above the shortest block the response check allows), so that a run
    stopped early has most of its blocks submitted and not run."""
    cfg = write_job(folder, archive, flow_retries=1)
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("block_seconds = 10.0", "block_seconds = 3.0"),
                   encoding="utf-8")
    return cfg


def _flow_run_of_block(client, block: str):
    """The (single) flow run whose config_block parameter is ``block``, once it is final."""
    runs = poll(lambda: [r for r in client.read_flow_runs(limit=200) if r.parameters.get("config_block") == block],
                lambda rs: len(rs) == 1 and rs[0].state is not None and rs[0].state.is_final(),
                f"the flow run of block {block}")
    return runs[0]


def test_ctrl_c_during_a_flow_run_without_a_head_start_cancels_its_blocks_before_the_cluster_closes(
        prefect_server, prefect_client, npy_archive, tmp_path, monkeypatch):
    # `twinpass run --block NAME` runs the flow body from the start (no run begun before the
    # flow run): its segment tasks drive their blocks on the cluster the body starts. Ctrl-C
    # (SIGINT) once the first block is recorded, each block delayed 0.2 s so that most are
    # still to run: the blocks not finished are cancelled before the cluster closes, so each
    # is recorded as cancelled (not failed), no segment task is retried, the command ends
    # with status 130, no file is marked complete with a block not done, and the next run
    # finishes the job. Output: scipy.signal.sosfiltfilt of the whole segment.
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    cfg = _job_in_short_blocks(tmp_path, npy_archive)
    block = f"tp-stop-{uuid.uuid4().hex[:8]}"
    assert cli.main(["save", str(cfg), "--name", block]) == 0
    env = flow_env({"PREFECT_HOME": PREFECT_HOME, "PREFECT_API_URL": prefect_server,
                    "TWINPASS_FAULTS": json.dumps([{"action": "sleep", "file": "*", "block": "*", "seconds": 0.2}])})
    code, text, out = interrupt_cli(["run", "--block", block, "--no-report"], env, tmp_path / "run.err",
                                    "blocks 1/", cwd=tmp_path)  # a segment's first block is recorded
    assert code == 130, text + out
    assert "twinpass: interrupted; finished blocks are kept, rerun to resume" in text
    assert "failed after" not in text and "Traceback" not in text, text
    assert "Retrying" not in text and "Retries are exhausted" not in text, text
    assert "IOLoop is closed" not in text, text

    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    errors = [e for rel in records for e in store.read_block_table(array_name(rel), figures=False,
                                                                   seams=False).errors.values()]
    assert all(e.startswith(CANCELLED) for e in errors), errors
    assert store.read_root_info()["runs"][-1].get("interrupted") is True
    # Its counts are what the store shows done (a block was recorded before the stop).
    assert stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))["blocks_run"] >= 1

    run = _flow_run_of_block(prefect_client, block)
    segs = runs_of(final_task_runs(prefect_client, run.id, expected=3), flows.filter_segment)
    assert segs and all(t.run_count == 1 for t in segs), [(t.name, t.state.name, t.run_count) for t in segs]
    assert all(t.state.is_completed() or "stopped" in (t.state.message or "") for t in segs), \
        [(t.name, t.state.name, t.state.message) for t in segs]

    _next_run_finishes(cfg, npy_archive, tmp_path / "out.zarr")


def test_ctrl_c_in_a_flow_run_without_a_head_start_stops_its_segments_before_the_cluster_closes(
        prefect_client, npy_archive, tmp_path, monkeypatch, caplog):
    # A flow run called from Python runs its body from the start (no run begun before the
    # flow run). Ctrl-C (SIGINT to the main thread, where the flow body waits on its segment
    # tasks) comes as the first block is recorded, and that segment's driver is slow to go
    # on (held in the progress callback until its cluster has closed, at most a few
    # seconds): the run cancels its blocks until every segment's driver has returned, and
    # only then closes the cluster. So the blocks not finished are recorded as cancelled,
    # not failed, no segment task is retried, nothing is marked complete falsely, and the
    # next run finishes the job. Output: scipy.signal.sosfiltfilt of the whole segment.
    import distributed

    cfg = _job_in_short_blocks(tmp_path, npy_archive)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "sleep", "file": "*", "block": "*",
                                                       "seconds": 0.2}]))
    first = threading.Event()

    def slow_first_block(segment: str, done: int, total: int, result: object) -> None:
        if first.is_set():
            return
        first.set()
        client = distributed.default_client()
        signal.pthread_kill(threading.main_thread().ident, signal.SIGINT)  # Ctrl-C
        loop = client.loop.asyncio_loop
        for _ in range(50):  # a slow driver: until the cluster is gone, or 5 s
            if client.status == "closed" and loop.is_closed():
                break
            time.sleep(0.1)

    monkeypatch.setattr(flows, "TERMINAL_PROGRESS", slow_first_block)
    caplog.set_level(logging.INFO)
    with pytest.raises(KeyboardInterrupt):
        flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    assert first.is_set()
    failures = [r.getMessage() for r in caplog.records if re.match(r"block \d+ of .* failed", r.getMessage())]
    assert failures == [], failures  # cancelled blocks are not failures (one line per segment counts them)
    stopped = [r.getMessage() for r in caplog.records if "cancelled before they finished" in r.getMessage()]
    assert 1 <= len(stopped) <= len(STREAMS), stopped

    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    errors = [e for rel in records for e in store.read_block_table(array_name(rel), figures=False,
                                                                   seams=False).errors.values()]
    assert errors and all(e.startswith(CANCELLED) for e in errors), sorted(set(errors))
    assert store.read_root_info()["runs"][-1].get("interrupted") is True
    # Its counts are what the store shows done (a block was recorded before the stop).
    assert stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))["blocks_run"] >= 1
    run = _flow_run_of(prefect_client, cfg)
    segs = runs_of(final_task_runs(prefect_client, run.id, expected=3), flows.filter_segment)
    assert len(segs) == len(STREAMS), [(t.name, t.state.name) for t in segs]
    assert all(t.run_count == 1 for t in segs), [(t.name, t.state.name, t.run_count) for t in segs]
    # A segment the stop cut short shows Cancelled on the dashboard, not Failed (Prefect's
    # state types: CANCELLED is the type for runs stopped on purpose), saying what is undone.
    assert all(t.state.is_completed() or (t.state.is_cancelled() and "stopped" in (t.state.message or ""))
               for t in segs), [(t.name, t.state.name, t.state.message) for t in segs]
    assert any(t.state.is_cancelled() for t in segs), [(t.name, t.state.name) for t in segs]

    monkeypatch.delenv("TWINPASS_FAULTS")
    monkeypatch.setattr(flows, "TERMINAL_PROGRESS", None)
    _next_run_finishes(cfg, npy_archive, tmp_path / "out.zarr")


def test_ctrl_c_in_a_flow_run_that_took_over_a_head_start_records_what_the_run_did(
        prefect_client, npy_archive, tmp_path, monkeypatch):
    # The run is begun before its flow run (as the command does) and the flow run takes it
    # over; Ctrl-C (SIGINT to the main thread, where the flow body waits on its segment
    # tasks) comes as a task follows the first recorded block, each block delayed 0.2 s so
    # that most are still to run. The stopped run's record counts the blocks it ran and
    # the files it completed and left unfinished, as the store's block tables and completion
    # flags show them; the next run finishes the job (output: scipy.signal.sosfiltfilt of
    # the whole segment).
    cfg = _job_in_short_blocks(tmp_path, npy_archive)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "sleep", "file": "*", "block": "*",
                                                       "seconds": 0.2}]))
    first = threading.Event()

    def stop_at_first_block(segment: str, done: int, total: int, result: object) -> None:
        if not first.is_set():
            first.set()
            signal.pthread_kill(threading.main_thread().ident, signal.SIGINT)  # Ctrl-C

    monkeypatch.setattr(flows, "TERMINAL_PROGRESS", stop_at_first_block)  # a follower shows its blocks here
    offer(HeadStart.begin(load_config(cfg)))
    try:
        with pytest.raises(KeyboardInterrupt):
            flows.archive_run(config_path=str(cfg), report=False, return_state=True)
    finally:
        withdraw()  # a head start the flow run did not take (none, if it went as intended)
    assert first.is_set()
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    assert stopped_run_counts(tmp_path / "out.zarr", len(ALL_FILES))["blocks_run"] >= 1

    monkeypatch.delenv("TWINPASS_FAULTS")
    monkeypatch.setattr(flows, "TERMINAL_PROGRESS", None)
    _next_run_finishes(cfg, npy_archive, tmp_path / "out.zarr")


def test_ctrl_c_while_the_command_waits_for_its_cluster_ends_it_with_the_run_recorded_as_stopped(
        prefect_client, npy_archive, tmp_path, monkeypatch, capsys):
    # Ctrl-C (SIGINT to the main thread) while `twinpass run`, beginning the run before its
    # flow run, waits for its local Dask cluster to start: the start is held (an injected
    # fault: a slow start) until the interrupt has reached the waiting command, so the run
    # is stopped while the start still goes on. The command ends with status 130 and says
    # so, as on any other Ctrl-C (README, "Running, scheduling and the dashboard"): no flow
    # run starts, the store records the run as stopped before its end, the cluster whose
    # start was under way is closed once started, and the lock is released, so the next
    # run does the whole job. Output: scipy.signal.sosfiltfilt of the whole segment.
    from twinpass import engine

    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    main_thread = threading.main_thread().ident
    real_local_cluster = engine._local_cluster
    clusters: list = []
    interrupted_while_waiting: list[bool] = []

    def waiting_for_cluster() -> bool:
        """Whether the command's main thread is in ClientStart.client, waiting for the start."""
        frame = sys._current_frames().get(main_thread)
        while frame is not None and frame.f_code is not engine.ClientStart.client.__code__:
            frame = frame.f_back
        return frame is not None

    def slow_start(workers, processes):  # the first start: held until Ctrl-C has reached the waiting command
        if not interrupted_while_waiting:
            deadline = time.monotonic() + 60
            while not waiting_for_cluster() and time.monotonic() < deadline:
                time.sleep(0.01)
            interrupted_while_waiting.append(waiting_for_cluster())
            signal.pthread_kill(main_thread, signal.SIGINT)  # Ctrl-C
            while waiting_for_cluster() and time.monotonic() < deadline:
                time.sleep(0.01)
        clusters.append(real_local_cluster(workers, processes))
        return clusters[-1]

    monkeypatch.setattr(engine, "_local_cluster", slow_start)
    code = cli.main(["run", str(cfg), "--no-report"])
    err = capsys.readouterr().err
    assert interrupted_while_waiting == [True]
    assert code == 130, err
    assert "twinpass: interrupted; finished blocks are kept, rerun to resume" in err, err
    assert [r for r in prefect_client.read_flow_runs(limit=200)
            if r.parameters.get("config_path") == str(cfg.resolve())] == []  # no flow run began
    assert clusters and all(c.status.name == "closed" for c in clusters)
    runs = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_runs()
    assert len(runs) == 1 and runs[0].get("interrupted") is True, runs
    assert runs[0]["counts"]["blocks_run"] == 0 and not any(_file_records_honest(str(tmp_path / "out.zarr")).values())

    monkeypatch.setattr(engine, "_local_cluster", real_local_cluster)
    _next_run_finishes(cfg, npy_archive)


def test_an_unexpected_error_beginning_the_run_is_a_warning_and_the_flow_run_does_the_job(
        prefect_client, npy_archive, tmp_path, monkeypatch, caplog):
    # The local Dask cluster of the run the command begins before its flow run fails to
    # start (an injected fault, an error that is not twinpass's own); the flow run starts
    # the run afresh on a cluster of its own, and the command says on the terminal, as a
    # warning naming the error, that it did. Output: scipy.signal.sosfiltfilt of the whole segment.
    from twinpass import engine

    cfg = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("PREFECT_LOGGING_LEVEL", "INFO")  # main() sets it when unset; keep the env as it was
    real_local_cluster = engine._local_cluster
    failed: list[bool] = []

    def failing_first_start(workers, processes):
        if not failed:
            failed.append(True)
            raise RuntimeError("injected: no cluster today")
        return real_local_cluster(workers, processes)

    monkeypatch.setattr(engine, "_local_cluster", failing_first_start)
    caplog.set_level(logging.WARNING, logger="twinpass.cli")
    assert cli.main(["run", str(cfg), "--no-report"]) == 0
    warned = [r for r in caplog.records if r.name == "twinpass.cli" and r.levelno == logging.WARNING]
    assert len(warned) == 1 and "RuntimeError: injected: no cluster today" in warned[0].getMessage(), warned
    assert "starts it afresh" in warned[0].getMessage()
    assert failed == [True] and _flow_run_of(prefect_client, cfg).state.is_completed()
    _job_done(str(tmp_path / "out.zarr"), npy_archive)


def test_a_prefect_server_lost_mid_run_leaves_the_run_its_own_exit_status_and_report(npy_archive, tmp_path,
                                                                                  monkeypatch):
    # `twinpass run` against a configured Prefect server (a real one, Prefect's own
    # application) that is killed once the flow body runs (a segment task has begun), while
    # every block waits (an injected fault holds them until the server is gone). The blocks
    # then finish and the store records the run; the flow run's end cannot reach the server.
    # The run goes on without the dashboard, saying so; the command exits with the status the
    # run earned (0: every file done, README "Exit statuses"), prints the run's counts and
    # writes the HTML report, says in one line that the server stopped answering, and prints
    # no traceback. Output: scipy.signal.sosfiltfilt of the whole segment.
    from twinpass.prefect_server import LocalPrefectServer

    home = tmp_path / "prefect-home"
    monkeypatch.setenv("PREFECT_HOME", str(home))  # the server's own database, not the session server's
    server = LocalPrefectServer()
    server.start()
    go = tmp_path / "go"
    cfg = write_job(tmp_path, npy_archive)
    try:
        url = server.wait_ready()
        env = flow_env({"PREFECT_HOME": str(home), "PREFECT_API_URL": url,
                        "PREFECT_CLIENT_MAX_RETRIES": "0",  # Prefect's retries of a lost server: about a minute
                        "TWINPASS_FAULTS": json.dumps([{"action": "hold", "file": "*", "block": "*",
                                                        "path": str(go), "seconds": 120}])})
        err_path = tmp_path / "run.err"
        with open(err_path, "w") as err:
            proc = subprocess.Popen([sys.executable, "-m", "twinpass.cli", "run", str(cfg)], env=env, cwd=tmp_path,
                                    stdout=subprocess.PIPE, stderr=err, text=True)
        try:
            poll(lambda: err_path.read_text(), lambda text: "file(s) to filter" in text or proc.poll() is not None,
                 "a segment task's start")
            server.process.kill()  # the server is lost, abruptly
            server.process.wait()
            go.touch()  # the blocks go on
            out, _ = proc.communicate(timeout=300)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    finally:
        go.touch()
        server.stop()
    text = err_path.read_text()
    assert proc.returncode == 0, out + text
    assert "Traceback" not in out + text, out + text
    lost = [line for line in text.splitlines() if "stopped answering" in line]
    assert len(lost) == 1 and url in lost[0] and "dashboard" in lost[0], text
    assert re.search(r"could not show .* on the dashboard: the Prefect server does not answer", text), text
    assert "complete 6, skipped (unchanged) 0, failed 0, invalid 0" in out, out
    report = tmp_path / "out.report.html"
    assert f"report: {report}" in out and report.is_file(), out
    (run,) = OutputStore.open(str(tmp_path / "out.zarr"), mode="r").read_runs()
    assert not run.get("interrupted") and run["counts"]["complete"] == 6, run
    _job_done(str(tmp_path / "out.zarr"), npy_archive)


@pytest.mark.parametrize(("scheduler", "loops_loaded"), [("threads", True), ("processes", False)])
def test_preload_loads_what_the_first_flow_call_and_block_would(tmp_path, scheduler, loops_loaded):
    # In a fresh interpreter: Prefect's flow engine and the encoders its parameter
    # serialisation uses are loaded by preload() alone, so is Dask's distributed (but no
    # cluster is started), and the engine's compiled loops too when blocks run in this
    # process's threads (worker processes load their own).
    code = ("import sys\n"
            "from twinpass import flows\n"
            "from twinpass.core import loops\n"
            "names = ('prefect.flow_engine', 'fastapi.encoders', 'distributed')\n"
            "before = (*(n in sys.modules for n in names), bool(loops._impl))\n"
            f"flows.preload({scheduler!r})\n"
            "after = (*(n in sys.modules for n in names), bool(loops._impl))\n"
            "import distributed\n"
            "print('LOADED', before, after, 'clusters', len(distributed.LocalCluster._instances))\n")
    proc = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=300,
                          env={**os.environ, "PREFECT_HOME": str(tmp_path / "home")})
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert f"LOADED (False, False, False, False) (True, True, True, {loops_loaded}) clusters 0" in proc.stdout, \
        proc.stdout


# ------------------------------------------------------------------ heartbeats
def _run_events(client, run_id) -> list:
    """The flow run's heartbeat and Completed events (at most 50, the API's page size)."""
    from prefect.events.filters import EventFilter, EventNameFilter, EventResourceFilter

    flt = EventFilter(resource=EventResourceFilter(id=[f"prefect.flow-run.{run_id}"]),
                      event=EventNameFilter(name=["prefect.flow-run.heartbeat", "prefect.flow-run.Completed"]))
    return client.read_events(filter=flt, limit=50).events


def _heartbeats_once_final(client, run_id) -> list:
    """The run's heartbeat events, read once the server holds its final state's event.

    A heartbeat is sent when the flow body starts, long before the run's final state, so
    every heartbeat of the run is stored by the time that state's event is.
    """
    from prefect.events.worker import EventsWorker

    EventsWorker.drain_all(timeout=30)
    events = poll(lambda: _run_events(client, run_id),
                  lambda evs: any(e.event == "prefect.flow-run.Completed" for e in evs)
                  and any(e.event == "prefect.flow-run.heartbeat" for e in evs),
                  f"the Completed and heartbeat events of flow run {run_id}")
    return [e for e in events if e.event == "prefect.flow-run.heartbeat"]


def _latest_flow_run(client):
    from prefect.client.schemas.sorting import FlowRunSort

    return client.read_flow_runs(sort=FlowRunSort.START_TIME_DESC, limit=1)[0]


def test_the_command_sends_its_flow_runs_heartbeats_itself_once(first_run, prefect_client, tmp_path):
    """`twinpass run` turns Prefect's heartbeat thread off and sends the heartbeats itself.

    Reference: Prefect's own flow-run heartbeat (the event name, resource and related flow
    that Prefect's flow engine sends), seen on the first_run fixture's run, which was called
    without prompt_heartbeats.
    """
    import threading

    from prefect.settings import get_current_settings

    from twinpass.heartbeats import HEARTBEAT_EVENT, prompt_heartbeats

    assert first_run.state.is_completed()
    own = _heartbeats_once_final(prefect_client, flow_run_id(first_run.state))
    assert own, "Prefect's own heartbeat was not sent"

    configured = get_current_settings().flows.heartbeat_frequency
    assert configured is not None  # Prefect sends heartbeats by default
    with prompt_heartbeats() as seconds:
        assert seconds == max(configured, 30)
        assert get_current_settings().flows.heartbeat_frequency is None  # Prefect's thread off
    assert get_current_settings().flows.heartbeat_frequency == configured

    # `twinpass run` against the configured server makes its flow call inside prompt_heartbeats.
    cfg = write_job(tmp_path, first_run.archive)
    assert cli.main(["run", str(cfg), "--no-report"]) == 0
    assert not [t for t in threading.enumerate() if t.name == "twinpass-flow-heartbeat"]
    run_id = _latest_flow_run(prefect_client).id
    beats = _heartbeats_once_final(prefect_client, run_id)
    # One heartbeat: twinpass's (it carries its interval), at the body's start (a run this
    # short sends no second one); Prefect's thread, had it run too, would have sent another.
    assert len(beats) == 1, beats
    beat, ref = beats[0], own[0]
    assert beat.payload == {"interval_seconds": max(configured, 30)} and not ref.payload
    assert beat.event == ref.event == HEARTBEAT_EVENT
    assert beat.resource.id == f"prefect.flow-run.{run_id}"
    assert beat.resource.get("prefect.resource.name") == prefect_client.read_flow_run(run_id).name
    assert sorted((r.role, r.id) for r in beat.related if r.role == "flow") == \
        sorted((r.role, r.id) for r in ref.related if r.role == "flow")


def test_a_follower_whose_progress_callback_fails_waits_for_its_driver(npy_archive, tmp_path, monkeypatch):
    # A segment task follows a driver begun before the flow run. When its callback fails
    # (the dashboard refusing a progress update, say), the task fails only once the driver
    # has ended: a retry must not run the segment beside a driver still writing it.
    cfg_path = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "sleep", "file": "*", "block": "*",
                                                       "seconds": 0.05}]))
    head = HeadStart.begin(load_config(cfg_path))
    with head.held():
        seg_id = sorted(head.segments)[0]
        early = head.take_segment(seg_id)

        def refuse(done, total, res):
            raise RuntimeError("progress update refused")

        with pytest.raises(RuntimeError, match="progress update refused"):
            early.follow(refuse)
        assert early.join(0)  # the driver had ended when the error came
        for other in sorted(head.segments):
            head.take_segment(other).follow()
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="r")
    tables = [store.read_block_table(a, figures=False, seams=False) for a in store.list_arrays()]
    assert tables and all(t.counts().get("pending", 0) == 0 for t in tables)  # every block recorded


def test_a_head_start_whose_second_driver_cannot_start_stops_the_first(npy_archive, tmp_path, monkeypatch):
    # Injected fault: the second segment's driver fails to start (as when no thread can be
    # started). begin() raises, and before it returns the first driver has ended and the
    # lock is released: no block is left running on a closed cluster, none is left pending
    # as if still running, and no file is marked complete unless it is.
    import twinpass.headstart as headstart_module

    cfg_path = write_job(tmp_path, npy_archive)
    monkeypatch.setenv("TWINPASS_FAULTS", json.dumps([{"action": "sleep", "file": "*", "block": "*",
                                                       "seconds": 0.1}]))
    made: list = []

    class FailingSecond(headstart_module.EarlySegment):
        def __init__(self, *args, **kwargs):
            if made:
                raise RuntimeError("can't start new thread")
            super().__init__(*args, **kwargs)
            made.append(self)

    monkeypatch.setattr(headstart_module, "EarlySegment", FailingSecond)
    with pytest.raises(RuntimeError, match="can't start new thread"):
        HeadStart.begin(load_config(cfg_path))
    assert len(made) == 1 and made[0].join(0), "the first driver still runs after begin() raised"
    store = OutputStore.open(str(tmp_path / "out.zarr"), mode="a")
    with store.lock("next-run"):  # released: the next run can take it
        pass
    records = _file_records_honest(str(tmp_path / "out.zarr"))
    assert not all(records.values()), records
    tables = [store.read_block_table(a, figures=False, seams=False) for a in store.list_arrays()]
    assert tables and all(t.counts()["pending"] == 0 for t in tables), [t.counts() for t in tables]


def test_dashboard_progress_never_holds_up_the_blocks(monkeypatch, caplog):
    # Injected fault: the Prefect API hangs on a progress update (as Prefect's client does,
    # retrying for about a minute, when the server went away). show() returns at once while
    # the sender waits; the sender then passes on only the latest percentage; a failing
    # update is logged once and the rest are dropped; close() after a failure returns.
    release = threading.Event()
    sent: list[float] = []

    def hanging_update(artifact_id, percent, description=None):
        if not sent:
            release.wait(60)
        sent.append(percent)

    monkeypatch.setattr(flows, "update_progress_artifact", hanging_update)
    progress = flows.DashboardProgress("artifact", logging.getLogger("twinpass.test"))
    progress.show(10.0)
    poll(lambda: progress._latest, lambda latest: latest is None, "the sender taking the first update")
    progress.show(20.0)  # both while the first update hangs
    progress.show(30.0)
    release.set()
    poll(lambda: list(sent), lambda s: len(s) == 2, "the latest update sent")
    progress.close(100.0)
    assert sent == [10.0, 30.0, 100.0]

    def failing_update(artifact_id, percent, description=None):
        sent.append(percent)
        raise RuntimeError("server gone")

    sent.clear()
    monkeypatch.setattr(flows, "update_progress_artifact", failing_update)
    caplog.set_level(logging.WARNING, logger="twinpass.test")
    progress = flows.DashboardProgress("artifact", logging.getLogger("twinpass.test"))
    progress.show(50.0)
    poll(lambda: list(sent), lambda s: len(s) == 1, "the failing update")
    progress.show(60.0)
    progress.close(100.0)
    assert sent == [50.0] and not progress._thread.is_alive()
    assert len([r for r in caplog.records if "could not update the progress" in r.getMessage()]) == 1


def test_a_segment_stopped_or_failed_shows_the_share_of_its_blocks_done():
    # What a segment's progress artifact shows at the end of its task's attempt: 12 blocks
    # to run. All done: 100 %, description unchanged. Three of them cancelled by a stop
    # (their errors say so) or while the run is stopping: 75 %, "stopped". A block that
    # raised, or a seam check failing a block after all ran: the share done, "failed". The
    # attempt raised before any outcome: the blocks recorded done so far, failed or stopped.
    from twinpass.engine import FileOutcome

    def outcome(status: str, not_done: int = 0, error: str = "") -> FileOutcome:
        errors = {k: error for k in range(not_done)} if error else {}
        return FileOutcome("a.npy", "a", 12, 12, 12 - not_done, not_done, status, errors=errors)

    shown = "blocks of segment s"
    assert flows.progress_at_end(shown, 12, 12, [outcome("complete")], False) == (100.0, None)
    assert flows.progress_at_end(shown, 0, 0, [outcome("complete")], False) == (100.0, None)
    cancelled = outcome("failed", 3, f"{CANCELLED}: the run was stopped")
    pct, text = flows.progress_at_end(shown, 9, 12, [cancelled], False)
    assert pct == 75.0 and text == f"{shown}: stopped, 9 of 12 done (the next run does the rest)"
    assert flows.progress_at_end(shown, 9, 12, [outcome("failed", 3, "OSError: gone")], True)[1].startswith(
        f"{shown}: stopped")
    pct, text = flows.progress_at_end(shown, 11, 12, [outcome("failed", 1, "OSError: gone")], False)
    assert pct == 100.0 * 11 / 12 and text == f"{shown}: failed, 11 of 12 done"
    pct, text = flows.progress_at_end(shown, 12, 12, [outcome("failed", 2)], False)  # seams failed two blocks
    assert pct == 100.0 * 10 / 12 and text == f"{shown}: failed, 10 of 12 done"
    assert flows.progress_at_end(shown, 4, 12, None, False) == (100.0 * 4 / 12, f"{shown}: failed, 4 of 12 done")
    assert flows.progress_at_end(shown, 4, 12, None, True)[1].startswith(f"{shown}: stopped, 4 of 12 done")
