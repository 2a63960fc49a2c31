"""Interrupted runs resume exactly; reruns compute only what changed.

A run of ``python -m twinpass.cli run CONFIG --no-flow`` is killed with SIGKILL at
several points (blocks slowed down by an injected ``sleep`` fault); the rerun must write
output bit-identical to an uninterrupted run. Whole-segment references come from
``scipy.signal.sosfiltfilt``.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import zarr

from conftest import (
    PYTHON,
    START,
    chunk_files,
    cli_env,
    file_name,
    make_signal,
    open_store,
    read_output,
    write_config,
    write_file,
    write_stream,
)
from twinpass.config import load_config
from twinpass.engine import DONE
from twinpass.job import run_job

FS = 200.0


def _config(tmp_path: Path, name: str, archive: Path, **overrides) -> Path:
    folder = tmp_path / name
    folder.mkdir()
    return write_config(folder, archive={"root": str(archive)}, **overrides)


def _statuses(store: Path) -> dict[str, np.ndarray]:
    """Block statuses per output array, read while a run may be writing; arrays not there yet are left out."""
    out = {}
    tables = store / "_twinpass" / "blocks"
    for path in sorted(tables.rglob("status/zarr.json")) if tables.is_dir() else []:
        name = path.parent.parent.relative_to(tables).as_posix()
        try:
            out[name] = np.asarray(zarr.open_array(str(store), mode="r", path=f"_twinpass/blocks/{name}/status")[:])
        except Exception:  # caught mid-creation by the running job: not there yet
            continue
    return out


def _done(store: Path) -> int:
    return sum(int(np.isin(s, DONE).sum()) for s in _statuses(store).values())


def _assert_no_complete_file_misses_a_block(store: Path) -> int:
    """Every array marked complete has every block done and every chunk on disk; return how many are complete."""
    g = open_store(store)
    complete = 0
    for name, status in _statuses(store).items():
        arr = g[name]
        if arr.attrs.get("complete") is not True:
            continue
        complete += 1
        assert np.all(np.isin(status, DONE)), name
        chunks = math.ceil(arr.shape[0] / arr.chunks[0])
        for c in range(chunks):
            assert (store / name / "c" / str(c) / "0").is_file(), (name, c)
    return complete


def _kill_when(proc: subprocess.Popen, store: Path, blocks_done: int, timeout: float = 120.0) -> None:
    """SIGKILL ``proc`` as soon as ``blocks_done`` blocks are recorded done in ``store``."""
    t0 = time.monotonic()
    while _done(store) < blocks_done:
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"the run ended before {blocks_done} blocks were done:\n{out}\n{err}")
        if time.monotonic() - t0 > timeout:
            proc.kill()
            raise AssertionError(f"{blocks_done} blocks were not done within {timeout} s")
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.communicate()
    assert proc.returncode == -signal.SIGKILL


@pytest.fixture(scope="module")
def killed_archive(tmp_path_factory):
    """A three-file 24-bit WAV stream, its uninterrupted output and block count."""
    root = tmp_path_factory.mktemp("resume")
    files = write_stream(root / "archive", "deck", make_signal(24000, 2, FS, seed=9), FS, 3, fmt="wav24")
    cfg = _config(root, "uninterrupted", root / "archive", processing={"block_seconds": 2.0})
    res = run_job(load_config(cfg))
    assert res.ok
    total = res.counts()["blocks_run"]
    assert total == 3 * 8000 // 400
    return root, files, cfg.parent / "out.zarr", total


@pytest.mark.parametrize("fraction", [0.05, 0.5, 1.0])
def test_a_killed_run_resumes_to_identical_output(tmp_path, killed_archive, fraction):
    root, files, reference, total = killed_archive
    cfg = _config(tmp_path, "killed", root / "archive", processing={"block_seconds": 2.0})
    store = cfg.parent / "out.zarr"
    rules = [{"action": "sleep", "file": "*", "block": "*", "seconds": 0.05}]
    env = cli_env(TWINPASS_FAULTS=json.dumps(rules))
    proc = subprocess.Popen([PYTHON, "-m", "twinpass.cli", "run", str(cfg), "--no-flow", "--no-report"],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _kill_when(proc, store, max(1, int(fraction * total)))

    # After the kill: no file claims to be complete while missing a block.
    _assert_no_complete_file_misses_a_block(store)
    done_at_kill = _done(store)
    # A writer killed mid-chunk leaves "<chunk>.<id>.partial"; plant one as such a leftover.
    stray = store / files.arrays[0] / "c" / "0" / "0.3f2a9c.partial"
    stray.parent.mkdir(parents=True, exist_ok=True)
    stray.write_bytes(b"half a chunk")

    res = run_job(load_config(cfg))
    assert res.ok and res.counts()["complete"] + res.counts()["skipped"] == 3
    assert res.counts()["blocks_run"] == total - done_at_kill  # only the blocks not done before the kill
    assert not list(store.rglob("*.partial"))
    assert _assert_no_complete_file_misses_a_block(store) == 3
    for a, b in zip(read_output(reference, files.arrays), read_output(store, files.arrays)):
        assert np.array_equal(a, b)
    assert chunk_files(store) == chunk_files(reference)


def _blocks_run(res) -> dict[str, int]:
    return {o.array_name: o.blocks_run for o in res.outcomes}


def _reaching(frames: list[int], changed: tuple[int, int], halo: int, block: int) -> list[int]:
    """Blocks per file whose core overlaps [x0 - halo, x1 + halo) around the segment span ``changed``."""
    lo, hi = changed[0] - halo, changed[1] + halo
    counts, offset = [], 0
    for n in frames:
        a, b = max(lo, offset) - offset, min(hi, offset + n) - offset
        counts.append(0 if a >= b else (b - 1) // block - a // block + 1)
        offset += n
    return counts


def _reference(x: np.ndarray, filt: dict) -> np.ndarray:
    return scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype=filt["edge"],
                                    padlen=filt["edge_samples"])


def test_reruns_compute_only_what_changed(tmp_path):
    # A file shorter than the halo (400 < 670 samples) lets a change reach two files back.
    frames = [6000, 400, 6000, 6000]
    x = make_signal(sum(frames), 1, FS, seed=4)
    files = write_stream(tmp_path / "archive", "deck", x, FS, frames)
    cfg = load_config(write_config(tmp_path, processing={"block_seconds": 2.0}))
    first = run_job(cfg)
    assert first.ok and first.counts()["blocks_run"] == sum(math.ceil(n / 400) for n in frames)
    g = open_store(cfg.store_location)
    halo = g[files.arrays[0]].attrs["filter"]["effective_length_samples"]
    block = g[files.arrays[0]].attrs["blocks"]["block_samples"]
    assert (halo, block) == (670, 400)  # halo longer than a block

    # Nothing changed: nothing runs.
    again = run_job(cfg)
    assert again.ok and again.counts()["blocks_run"] == 0 and again.counts()["skipped"] == 4

    # Rewrite the third file with other samples: it, and the blocks its halo reaches, rerun.
    x2 = x.copy()
    x2[6400:12400] = make_signal(6000, 1, FS, seed=99)
    write_file(files.paths[2], x2[6400:12400], FS, "npy")
    res = run_job(cfg)
    assert res.ok
    expected = _reaching(frames, (6400, 12400), halo, block)
    assert expected == [1, 1, 15, 2]
    assert [_blocks_run(res)[a] for a in files.arrays] == expected
    y = np.concatenate(read_output(cfg.store_location, files.arrays))
    filt = g[files.arrays[0]].attrs["filter"]
    assert np.max(np.abs(y - _reference(x2, filt))) <= filt["tolerance"] * np.max(np.abs(x2))

    # Append a fifth file: the old last file's end was edge-extended, so its end is recomputed.
    extra = make_signal(4000, 1, FS, seed=7)
    new_rel = file_name("deck", START + dt.timedelta(seconds=sum(frames) / FS), "npy")
    write_file(tmp_path / "archive" / new_rel, extra, FS, "npy")
    res = run_job(cfg)
    assert res.ok
    runs = _blocks_run(res)
    new_array = new_rel.rsplit(".", 1)[0]
    last_frames = frames[-1]
    assert runs[new_array] == 10
    assert runs[files.arrays[3]] == _reaching([last_frames], (last_frames, last_frames), halo, block)[0] == 2
    assert all(runs[a] == 0 for a in files.arrays[:3])
    x3 = np.concatenate([x2, extra])
    y = np.concatenate(read_output(cfg.store_location, [*files.arrays, new_array]))
    assert np.max(np.abs(y - _reference(x3, filt))) <= filt["tolerance"] * np.max(np.abs(x3))


# ----------------------------------------------------------- crashes between driver writes
class Crash(BaseException):
    """Stands for the process dying (a BaseException, so that nothing in the run catches it)."""


_WRITES = ("prepare_file", "update_attrs", "invalidate_blocks", "record_block", "record_blocks", "set_complete",
           "remove_file")


class CrashingStore:
    """The real output store, except that its ``crash_at``-th write raises :class:`Crash` instead
    of happening (an injected fault: the run dies just before that write)."""

    def __init__(self, store, crash_at: int | None) -> None:
        self._store, self.crash_at, self.writes, self.crashed = store, crash_at, [], False

    def __getattr__(self, name):
        attr = getattr(self._store, name)
        if name not in _WRITES:
            return attr

        def write(*args, **kwargs):
            self.writes.append((name, args[0] if args else None))
            if len(self.writes) == self.crash_at:
                self.crashed = True
                raise Crash(f"killed before {name}{args[:2]}")
            return attr(*args, **kwargs)

        return write


def _run_crashing(monkeypatch, cfg, crash_at):
    """run_job with the store wrapped in CrashingStore; returns the wrapper."""
    from twinpass import job
    from twinpass.io.store import OutputStore

    made = []

    class Opener:
        @staticmethod
        def open(*args, **kwargs):
            made.append(CrashingStore(OutputStore.open(*args, **kwargs), crash_at))
            return made[-1]

    monkeypatch.setattr(job, "OutputStore", Opener)
    try:
        run_job(cfg)
    except Crash:
        pass
    finally:
        monkeypatch.undo()
    return made[0]


@pytest.fixture(scope="module")
def changed_middle_file(tmp_path_factory):
    """A complete three-file store whose middle input has since been rewritten."""
    import shutil

    root = tmp_path_factory.mktemp("crash")
    frames = [2000, 2000, 2000]
    x = make_signal(sum(frames), 1, FS, seed=12)
    files = write_stream(root / "archive", "deck", x, FS, frames)
    cfg = write_config(root, processing={"block_seconds": 5.0})
    assert run_job(load_config(cfg)).ok
    x[2000:4000] = make_signal(2000, 1, FS, seed=13)
    write_file(files.paths[1], x[2000:4000], FS, "npy")
    return root, files, x, shutil


def test_outputs_name_the_runs_and_library_versions_that_wrote_them(tmp_path):
    # Provenance per output: ``written_by`` lists the runs that wrote its blocks since it
    # was last written whole, each with the library versions it ran with (as the installed
    # packages' metadata gives them, importlib.metadata), and each run's record names them too.
    from importlib import metadata

    frames = [4000, 4000, 4000]
    x = make_signal(sum(frames), 1, FS, seed=5)
    files = write_stream(tmp_path / "archive", "deck", x, FS, frames)
    cfg = load_config(write_config(tmp_path, processing={"block_seconds": 2.0}))
    first = run_job(cfg)
    assert first.ok
    g = open_store(cfg.store_location)
    for a in files.arrays:
        (entry,) = g[a].attrs["written_by"]
        assert entry["run_id"] == first.run_id
        assert entry["versions"]["scipy"] == metadata.version("scipy")
        assert entry["versions"]["numba"] == metadata.version("numba")
    record = g[f"_twinpass/runs/{first.run_id}"].attrs["run"]
    assert record["versions"]["numpy"] == metadata.version("numpy")

    # The last file rewritten: it is written whole by the new run; the middle file's blocks
    # its halo reaches are rewritten, so it names both runs; the first file neither.
    write_file(files.paths[2], make_signal(4000, 1, FS, seed=6), FS, "npy")
    second = run_job(cfg)
    assert second.ok and second.run_id != first.run_id
    g = open_store(cfg.store_location)
    runs = {a: [e["run_id"] for e in g[a].attrs["written_by"]] for a in files.arrays}
    assert runs == {files.arrays[0]: [first.run_id], files.arrays[1]: [first.run_id, second.run_id],
                    files.arrays[2]: [second.run_id]}


def test_a_run_dying_between_any_two_driver_writes_resumes_correctly(tmp_path, monkeypatch, changed_middle_file):
    template, files, x, shutil = changed_middle_file
    # Count the driver's writes in an uninterrupted rerun of the change.
    probe = tmp_path / "probe"
    shutil.copytree(template, probe)
    writes = _run_crashing(monkeypatch, load_config(probe / "twinpass.toml"), None).writes
    first_record = next(i for i, (name, _) in enumerate(writes) if name in ("record_block", "record_blocks"))
    # Every write before the first block is recorded (preparation), then a few later ones.
    points = sorted({*range(1, first_record + 2), len(writes) - 4, len(writes) - 1, len(writes)})
    for crash_at in points:
        folder = tmp_path / f"crash{crash_at}"
        shutil.copytree(template, folder)
        cfg = load_config(folder / "twinpass.toml")
        crashed = _run_crashing(monkeypatch, cfg, crash_at)
        # Block records are written in batches of whatever has finished when the driver looks,
        # so a run may need a write more or less than the probe: near the end the crash point
        # may lie past this run's last write, and the run then simply completes.
        if crashed.crashed:
            assert len(crashed.writes) == crash_at
        else:
            assert len(crashed.writes) < crash_at, (crash_at, crashed.writes)
        _assert_no_complete_file_misses_a_block(folder / "out.zarr")
        res = run_job(cfg)  # the rerun after the crash
        assert res.ok, (crash_at, writes[crash_at - 1])
        assert _assert_no_complete_file_misses_a_block(folder / "out.zarr") == 3
        filt = open_store(folder / "out.zarr")[files.arrays[0]].attrs["filter"]
        y = np.concatenate(read_output(folder / "out.zarr", files.arrays))
        err = np.max(np.abs(y - _reference(x, filt)))
        assert err <= filt["tolerance"] * np.max(np.abs(x)), (crash_at, writes[crash_at - 1], err)


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_output_chunk_files_lost_since_they_were_written_are_rewritten(tmp_path, mode):
    # Every chunk of an output array is written, so a chunk file missing (or emptied) later
    # would read as zeros. The planner reruns only the blocks whose chunks are gone, status
    # shows the file as not complete meanwhile, and the rerun restores the chunk files
    # byte for byte. Reference for the values: the first run's own chunk files, which
    # equal scipy.signal.sosfiltfilt of the whole segment within the tolerance.
    from twinpass.io.store import OutputStore
    from twinpass.job import prepare
    from twinpass.status import all_passed, collect_status

    frames = [4000, 4000, 4000]
    x = make_signal(sum(frames), 2, FS, seed=12)
    files = write_stream(tmp_path / "archive", "deck", x, FS, frames)
    cfg = load_config(write_config(tmp_path, processing={"block_seconds": 2.0, "mode": mode}))
    assert run_job(cfg).ok
    g = open_store(cfg.store_location)
    filt = g[files.arrays[0]].attrs["filter"]
    y = np.concatenate(read_output(cfg.store_location, files.arrays))
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))
    before = chunk_files(cfg.store_location)
    root = Path(cfg.store_location)
    gone = [f"{files.arrays[1]}/c/3/0", f"{files.arrays[1]}/c/4/0", f"{files.arrays[2]}/c/0/0"]
    assert all(rel in before for rel in gone)
    (root / gone[0]).unlink()
    (root / gone[1]).unlink()
    (root / gone[2]).write_bytes(b"")  # emptied

    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert not all_passed(status)
    lost = {f["name"]: f["chunks_missing"] for f in status["files"] if f["chunks_missing"]}
    assert lost == {files.arrays[1]: [[1200, 2000]], files.arrays[2]: [[0, 400]]}
    plan = {fp.relpath: fp for fp in prepare(cfg, OutputStore.open(cfg.store_location, mode="r")).plan.files}
    assert [plan[r].status for r in files.relpaths] == ["unchanged", "incomplete", "incomplete"]
    assert plan[files.relpaths[1]].redo == ((1200, 2000),) and "chunk files missing" in plan[files.relpaths[1]].reason

    res = run_job(cfg)
    assert res.ok and _blocks_run(res) == {files.arrays[0]: 0, files.arrays[1]: 2, files.arrays[2]: 1}
    assert chunk_files(cfg.store_location) == before
    assert all_passed(collect_status(OutputStore.open(cfg.store_location, mode="r")))

    # A file left incomplete by a stopped run resumes; a chunk of a block it had recorded
    # done but lost since is rewritten too.
    store = OutputStore.open(cfg.store_location)
    store.invalidate_blocks(files.arrays[0], [9])
    (root / f"{files.arrays[0]}/c/2/0").unlink()
    res = run_job(cfg)
    assert res.ok and _blocks_run(res)[files.arrays[0]] == 2
    assert chunk_files(cfg.store_location) == before


def test_a_file_rerun_after_a_block_length_change_is_seam_checked_against_its_neighbours_own_blocks(tmp_path):
    # block_seconds applies to files written from then on (README): unchanged neighbours keep
    # the blocks they were written in, and the seam checks of a file rerun under the new
    # length compare with those blocks (here the rerun comes from a lost chunk file). Before,
    # the neighbours were numbered with the new length and failed seams they did not have.
    # Reference: scipy.signal.sosfiltfilt of the whole segment.
    from twinpass.io.store import OutputStore
    from twinpass.status import collect_status, shortfalls

    frames = [4000, 4000, 4000]
    x = make_signal(sum(frames), 1, FS, seed=21)
    files = write_stream(tmp_path / "archive", "deck", x, FS, frames)
    cfg_path = write_config(tmp_path, processing={"block_seconds": 2.0})
    assert run_job(load_config(cfg_path)).ok
    cfg_path.write_text(cfg_path.read_text().replace("block_seconds = 2.0", "block_seconds = 6.0"))
    cfg = load_config(cfg_path)
    (Path(cfg.store_location) / files.arrays[1] / "c" / "2" / "0").unlink()
    res = run_job(cfg)
    assert res.ok and res.exit_status() == 0, res.failure_reasons()
    assert _blocks_run(res)[files.arrays[0]] == 0 and _blocks_run(res)[files.arrays[2]] == 0
    assert not shortfalls(collect_status(OutputStore.open(cfg.store_location, mode="r")))
    g = open_store(cfg.store_location)
    filt = g[files.arrays[0]].attrs["filter"]
    y = np.concatenate(read_output(cfg.store_location, files.arrays))
    assert np.max(np.abs(y - _reference(x, filt))) <= filt["tolerance"] * np.max(np.abs(x))
