"""Data-safety guarantees: inputs untouched, one writer per store, names fenced in, full disks.

References:
* Input checksums: hashlib.sha256 (tests/wavtools.py); a read-only file system is a tmpfs
  remounted read-only (Linux mount(8)); POSIX open(2) flags say whether an open can write.
* Output values after recovery: scipy.signal.sosfiltfilt over the whole file.
* ENOSPC is the POSIX "no space left on device" errno.
* Which run may write, which names are allowed and what is kept after a failure are twinpass
  rules.
"""

from __future__ import annotations

import builtins
import contextlib
import dataclasses
import errno
import io
import logging
import os
import socket
import stat
import subprocess
import sys
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pytest
import zarr
from scipy import signal
from zarr.storage import LocalStore

from twinpass import cli
from twinpass.config import load_config
from twinpass.core.design import design_filter
from twinpass.errors import StoreError
from twinpass.io.readers import open_recording
from twinpass.io import store as store_module
from twinpass.io.store import OutputStore
from twinpass.io.store_lock import LOCK_NAME, LockInfo
from conftest import run_cli
from test_bad_inputs import PATTERN, load, noise, pcm16, put, run, stem, write_config, write_npy, write_wav
from wavtools import sha256

INCLUDE = ["**/*.wav", "**/*.npy", "**/*.bin", "**/*.zarr"]
ARCHIVE = {"name_pattern": PATTERN, "include": INCLUDE, "sample_rate_hz": 100.0}
"""Archive settings for :func:`_archive` (NPY files store no rate)."""


def _archive(root: Path) -> list[str]:
    """One input of each built-in format; returns their relative paths."""
    rels = [stem("wav") + ".wav", stem("npy") + ".npy", stem("raw") + ".bin", stem("zin") + ".zarr"]
    write_wav(root, rels[0], pcm16(1500, 2))
    write_npy(root, rels[1], noise(1500, 2, seed=1).astype(np.float32))
    put(root, rels[2], pcm16(1500, 2, seed=2).tobytes())
    put(root, rels[2] + ".toml", b'dtype = "int16"\nchannels = 2\nsample_rate_hz = 100.0\n')
    z = zarr.create_array(str(root / rels[3]), shape=(1500, 2), chunks=(500, 2), dtype="float64")
    z[:] = noise(1500, 2, seed=3)
    z.attrs.update({"sample_rate_hz": 100.0})
    return rels


def _snapshot(folder: Path) -> dict[str, tuple[str, int, int]]:
    """(sha256, mtime_ns, mode) of every file and folder under ``folder``."""
    out = {}
    for dirpath, dirnames, files in os.walk(folder):
        for name in dirnames + files:
            p = Path(dirpath, name)
            st_ = p.lstat()
            digest = sha256(p) if stat.S_ISREG(st_.st_mode) else ""
            out[str(p.relative_to(folder))] = (digest, st_.st_mtime_ns if digest else 0, st_.st_mode)
    return out


def _chmod_tree(folder: Path, dirs: int, files: int) -> None:
    for dirpath, dirnames, filenames in os.walk(folder):
        for f in filenames:
            os.chmod(Path(dirpath, f), files)
        os.chmod(dirpath, dirs)


def _complete(res) -> dict[str, str]:
    return {o.relpath: o.status for o in res.outcomes}


# -- inputs -------------------------------------------------------------------------------


def test_inputs_in_a_read_only_folder_are_processed_and_unchanged(tmp_path):
    root = tmp_path / "archive"
    rels = _archive(root)
    _chmod_tree(root, 0o555, 0o444)
    try:
        before = _snapshot(root)
        cfg = load(tmp_path, archive={**ARCHIVE, "fingerprint": "full"})
        res = run(cfg)
        assert _complete(res) == {r: "complete" for r in rels}
        assert _snapshot(root) == before  # same bytes, times, modes; nothing added
    finally:
        _chmod_tree(root, 0o755, 0o644)


_WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_APPEND


def test_every_open_of_an_input_is_read_only(tmp_path, monkeypatch):
    """Record each open(2) of a path inside the archive during a whole run (threads)."""
    root = tmp_path / "archive"
    rels = _archive(root)
    inside = str(root.resolve()) + os.sep
    seen: list[tuple[str, Any]] = []
    real_open, real_os_open = builtins.open, os.open

    def spy_open(file, mode="r", *a, **k):
        if isinstance(file, (str, os.PathLike)) and os.path.abspath(os.fspath(file)).startswith(inside):
            seen.append((os.fspath(file), mode))
        return real_open(file, mode, *a, **k)

    def spy_os_open(path, flags, *a, **k):
        if os.path.abspath(os.fspath(path)).startswith(inside):
            seen.append((os.fspath(path), flags))
        return real_os_open(path, flags, *a, **k)

    monkeypatch.setattr(builtins, "open", spy_open)
    monkeypatch.setattr(io, "open", spy_open)
    monkeypatch.setattr(os, "open", spy_os_open)
    cfg = load(tmp_path, archive=ARCHIVE)
    res = run(cfg)
    monkeypatch.undo()
    assert _complete(res) == {r: "complete" for r in rels}
    opened = {Path(p).name for p, _ in seen}
    assert {Path(r).name for r in rels[:3]} <= opened  # the spy saw the readers
    for path, how in seen:
        if isinstance(how, str):
            assert not set(how) & set("wax+"), f"{path} opened with mode {how!r}"
        else:
            assert how & _WRITE_FLAGS == 0, f"{path} opened with flags {how:#o}"


def _mount(*args: str) -> None:
    subprocess.run(["mount", *args], check=True, capture_output=True, timeout=30)


@contextlib.contextmanager
def tmpfs(folder: Path, size: str) -> Iterator[Path]:
    """A tmpfs of ``size`` mounted on ``folder`` for the ``with`` block (root only; else skip)."""
    folder.mkdir()
    try:
        _mount("-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder))
    except (OSError, subprocess.SubprocessError):
        pytest.skip("cannot mount a tmpfs here (needs root)")
    try:
        yield folder
    finally:
        subprocess.run(["umount", str(folder)], capture_output=True, timeout=30)


def test_inputs_on_a_read_only_file_system(tmp_path):
    with tmpfs(tmp_path / "ro", "8m") as mnt:
        rels = _archive(mnt / "archive")
        _mount("-o", "remount,ro", str(mnt))
        with pytest.raises(OSError) as e:  # not even root can write there now
            (mnt / "archive" / "probe").write_bytes(b"x")
        assert e.value.errno == errno.EROFS
        cfg = load(tmp_path, archive={**ARCHIVE, "root": str(mnt / "archive")})
        res = run(cfg)
        assert _complete(res) == {r: "complete" for r in rels}


def test_a_run_on_a_store_on_a_read_only_file_system_is_a_clear_error(tmp_path):
    # An existing store on a file system mounted read-only (a tmpfs remounted so): the run
    # cannot take its lock and says so in one line, exit 2, with the remedy, as for a new
    # store in a read-only folder; status still reads the store.
    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    with tmpfs(tmp_path / "disk", "8m") as disk:
        config = write_config(tmp_path, output={"store": str(disk / "out.zarr")})
        assert run_cli(["run", str(config), "--no-flow", "--no-report"]).returncode == 0
        _mount("-o", "remount,ro", str(disk))
        for args in (["--no-flow", "--no-report"], ["--no-flow", "--no-report", "--force"]):
            proc = run_cli(["run", str(config), *args], check=False)
            assert proc.returncode == 2, proc.stdout + proc.stderr
            assert "Traceback" not in proc.stderr and "OSError" not in proc.stderr, proc.stderr
            assert proc.stderr.strip().splitlines()[-1] == (
                f"twinpass: error: cannot write the lock file {disk / 'out.zarr' / LOCK_NAME}: Read-only file "
                "system; check that the store location is writable"), proc.stderr
        assert run_cli(["status", str(config), "--require-complete"]).returncode == 0


# -- one writer per store -----------------------------------------------------------------


def test_second_run_on_a_locked_store_is_refused(tmp_path):
    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    config = write_config(tmp_path)
    cfg = load_config(config)
    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    with store.lock("holder-run") as held:
        proc = run_cli(["run", str(config), "--no-flow", "--no-report"], check=False)
        assert (Path(cfg.store_location) / LOCK_NAME).is_file()
    assert proc.returncode == 2, proc.stderr
    last = [ln for ln in proc.stderr.splitlines() if ln.startswith("twinpass: error:")]
    assert len(last) == 1
    msg = last[0]
    assert f"output store is locked by run holder-run (pid {held.pid} on host {held.host}" in msg
    assert "wait for that run to finish" in msg and LOCK_NAME in msg
    assert OutputStore.open(cfg.store_location, mode="r").file_records() == {}  # nothing written
    assert not (Path(cfg.store_location) / LOCK_NAME).exists()  # released by its holder


def test_a_lock_that_cannot_be_removed_is_a_warning_and_the_run_stands(tmp_path, monkeypatch, capsys, caplog):
    """Removing the lock raises EROFS (an injected fault): the run's own outcome stands, and the
    warning names the lock file and says the next run recovers it."""
    from twinpass.io import store_lock

    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    config = write_config(tmp_path)
    lock = Path(load_config(config).store_location) / LOCK_NAME

    def read_only(self):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(self.path))

    monkeypatch.setattr(store_lock.LocalLockFile, "remove", read_only)
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 0
    out = capsys.readouterr().out
    assert "complete 1," in out, out
    err = "\n".join(r.getMessage() for r in caplog.records if r.name == "twinpass.store")
    assert f"could not remove the output store lock {lock}" in err and "Read-only file system" in err, err
    assert "the next run" in err and "recovers it automatically" in err, err
    assert lock.is_file()  # left behind, as said


def test_locked_store_message_says_the_lock_is_recovered_and_when_to_delete_it(tmp_path):
    from twinpass.errors import StoreLockedError

    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    cfg = load(tmp_path)
    store = OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    lock = Path(cfg.store_location) / LOCK_NAME
    with store.lock("holder-run"):  # held by this live process, on this host
        with pytest.raises(StoreLockedError) as e:
            run(cfg)
        # the holder noted its Prefect flow run beside the lock: the refusal names it
        store.note_flow_run("4a7b2c1d-0000-4000-8000-000000000001", "http://127.0.0.1:4200/api")
        with pytest.raises(StoreLockedError) as named:
            run(cfg)
    msg = str(e.value)
    assert "Prefect flow run" not in msg, msg
    assert ("(Prefect flow run 4a7b2c1d-0000-4000-8000-000000000001 on http://127.0.0.1:4200/api)"
            in str(named.value)), str(named.value)
    assert "recovered automatically" in msg and "no longer running" in msg, msg
    assert "delete" not in msg.replace("no need to delete it", ""), msg  # no advice to delete it by hand
    far = dataclasses.replace(LockInfo.new("far-run"), host="another-host.invalid")
    lock.write_bytes(far.to_bytes())
    with pytest.raises(StoreLockedError) as e:
        run(cfg)
    msg = str(e.value)
    assert "far-run" in msg and "another host" in msg and "another-host.invalid" in msg, msg
    assert f"Delete {lock} by hand only if another-host.invalid is gone" in msg, msg
    assert lock.read_bytes() == far.to_bytes()  # a lock from another host is never taken over


def test_a_run_record_and_lock_that_cannot_be_written_end_the_run_with_the_stores_error(
        tmp_path, monkeypatch, capsys, caplog):
    """Injected faults: writing the run's record raises the store's own error, and removing
    the lock raises EROFS. The command prints the run's summary, then that error (exit 2); the
    lock is a warning."""
    from twinpass.io import store_lock

    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    config = write_config(tmp_path)
    store_path = Path(load_config(config).store_location)

    def unwritable_record(self, entry, details=None):
        raise StoreError(f"cannot write the run record of {self.location}: Read-only file system; "
                         "check that the store location is writable")

    def read_only(self):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(self.path))

    monkeypatch.setattr(OutputStore, "append_run", unwritable_record)
    monkeypatch.setattr(store_lock.LocalLockFile, "remove", read_only)
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 2
    out, err = capsys.readouterr()
    assert "complete 1, skipped (unchanged) 0, failed 0" in out and f"store: {store_path}" in out, out
    assert err.strip().splitlines()[-1] == (f"twinpass: error: cannot write the run record of {store_path}: "
                                            "Read-only file system; check that the store location is writable"), err
    assert "Traceback" not in err and "OSError" not in err, err
    assert any(f"could not remove the output store lock {store_path / LOCK_NAME}" in r.getMessage()
               for r in caplog.records)


def test_a_store_gone_read_only_during_the_run_ends_with_its_summary_and_the_stores_error(
        tmp_path, monkeypatch, capsys, caplog):
    """A real read-only file system (a tmpfs remounted read-only once the run has begun, before
    its blocks are written): the files fail naming it, the run's record and the lock's removal
    fail too, and the command ends with the summary and the store's clear error, not the lock's."""
    from twinpass import job

    with tmpfs(tmp_path / "disk", "8m") as disk:
        root = tmp_path / "archive"
        write_wav(root, "a.wav", pcm16(500))
        config = write_config(tmp_path, output={"store": str(disk / "out.zarr")})
        real_begin = job.begin_run

        def begin_then_read_only(store, prep):
            real_begin(store, prep)
            _mount("-o", "remount,ro", str(disk))

        monkeypatch.setattr(job, "begin_run", begin_then_read_only)
        try:
            with caplog.at_level(logging.WARNING, logger="twinpass.store"):
                assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 2
        finally:
            _mount("-o", "remount,rw", str(disk))
        out, err = capsys.readouterr()
        assert "complete 0, skipped (unchanged) 0, failed 1" in out, out
        assert "failed: a.wav: " in out and "Read-only file system" in out, out
        last = err.strip().splitlines()[-1]
        assert last.startswith("twinpass: error: cannot write") and "Read-only file system" in last, err
        assert "writable" in last and "twinpass-lock" not in last and "Traceback" not in err, err
        lock = disk / "out.zarr" / LOCK_NAME
        assert any(f"could not remove the output store lock {lock}" in r.getMessage()
                   and "recovers it" in r.getMessage() for r in caplog.records)
        assert lock.is_file()
        records = OutputStore.open(str(disk / "out.zarr"), mode="r").file_records()
        assert not any(r.complete for r in records.values())  # nothing marked complete


def test_stale_lock_of_a_dead_process_is_recovered(tmp_path, caplog):
    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    cfg = load(tmp_path)
    OutputStore.open(cfg.store_location, mode="a", archive_root=cfg.archive_root)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    info = LockInfo(pid=dead.pid, host=socket.gethostname(), run_id="crashed-run",
                    started="2026-03-01T00:00:00+00:00", token="t")
    lock = Path(cfg.store_location) / LOCK_NAME
    lock.write_bytes(info.to_bytes())
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        res = run(cfg)
    assert _complete(res) == {"a.wav": "complete"}
    assert any("recovering a stale lock" in r.getMessage() and "crashed-run" in r.getMessage()
               for r in caplog.records)
    assert not lock.exists()


def test_status_names_a_run_that_died_holding_the_lock_and_one_still_writing(tmp_path):
    # A run killed mid-way (kill -9, a machine going down) leaves its lock and no run record:
    # `twinpass status` must say so (the last recorded run is an earlier one), and
    # `--require-complete` must not pass while a run holds the lock, dead or alive.
    import json

    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(500))
    cfg = load(tmp_path)
    assert _complete(run(cfg)) == {"a.wav": "complete"}
    config = cfg.source
    lock = Path(cfg.store_location) / LOCK_NAME
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock.write_bytes(LockInfo(pid=dead.pid, host=socket.gethostname(), run_id="killed-run",
                              started="2026-03-01T00:00:00+00:00", token="t").to_bytes())
    out = run_cli(["status", str(config)]).stdout
    assert "run killed-run (pid" in out and "stopped without ending" in out, out
    r = run_cli(["status", str(config), "--require-complete"], check=False)
    assert r.returncode == 1 and "left the store's lock" in r.stderr, r.stderr
    held = json.loads(run_cli(["status", str(config), "--json"]).stdout)["lock"]
    assert held["run_id"] == "killed-run" and held["state"] == "gone"

    lock.write_bytes(LockInfo.new("live-run").to_bytes())  # this test's own process: alive
    out = run_cli(["status", str(config)]).stdout
    assert "run live-run (pid" in out and "is writing to the store now" in out, out
    lock.write_bytes(dataclasses.replace(LockInfo.new("far-run"), host="another-host").to_bytes())
    out = run_cli(["status", str(config)]).stdout
    assert "holds the store's lock from another host" in out, out
    assert "recovers the lock automatically" in out and "only if that host is gone for good" in out, out
    lock.unlink()
    r = run_cli(["status", str(config), "--require-complete"], check=False)
    assert r.returncode == 0 and "store's lock" not in r.stdout and "writing" not in r.stdout, r.stdout + r.stderr


# -- names stay inside the store -----------------------------------------------------------


def _files_outside(tmp_path: Path, store: Path) -> set[str]:
    return {str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*")
            if not p.resolve().is_relative_to(store.resolve())}


def test_odd_names_links_and_dotdot_stay_inside_the_store(tmp_path):
    root = tmp_path / "archive"
    outside = tmp_path / "elsewhere"
    write_wav(root, "deck #1/rec (1)é.wav", pcm16(400))
    write_wav(outside, "far.wav", pcm16(400, seed=1))
    write_wav(outside, "sub/linked.wav", pcm16(400, seed=2))
    (root / "link.wav").symlink_to(outside / "far.wav")
    (root / "linkdir").symlink_to(outside / "sub", target_is_directory=True)
    (root / "manifest.csv").write_text(
        "path,stream,start_time\n../elsewhere/far.wav,x,\ndeck #1/rec (1)é.wav,deck,\nlink.wav,l,\n"
        "linkdir/linked.wav,ld,\n"
    )
    cfg = load(tmp_path, archive={"manifest": "archive/manifest.csv"}, output={"store": "out/store.zarr"})
    store_path = Path(cfg.store_location)
    (tmp_path / "out").mkdir()
    (root / "into-store").symlink_to(tmp_path / "out", target_is_directory=True)  # never an input
    before = _files_outside(tmp_path, store_path)
    res = run(cfg)
    assert _complete(res) == {"deck #1/rec (1)é.wav": "complete", "link.wav": "complete",
                              "linkdir/linked.wav": "complete"}
    (bad,) = res.invalid
    assert bad.relpath == "../elsewhere/far.wav" and "outside the archive root" in bad.reason
    names = OutputStore.open(cfg.store_location, mode="r").list_arrays()
    assert names == ["deck__1/rec__1__", "link", "linkdir/linked"]
    for n in names:
        assert (store_path / n / "zarr.json").is_file()
    after = _files_outside(tmp_path, store_path)
    assert after - before == set() and before - after == set()


@pytest.mark.parametrize(
    "store, message",
    [
        ("archive", "is the archive root"),
        ("archive/filtered.zarr", "is inside the archive root"),
        (".", "is inside the output store"),
    ],
)
def test_store_may_not_overlap_the_archive(tmp_path, capsys, store, message):
    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(300))
    config = write_config(tmp_path, output={"store": store})
    before = _snapshot(tmp_path)
    assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("twinpass: error: ") and message in err and err.count("\n") == 0
    assert _snapshot(tmp_path) == before  # nothing created or touched


@pytest.mark.parametrize("archive, said", [({"root": "missing"}, "is not a folder"),
                                           ({"manifest": "archive/missing.csv"}, "manifest")])
def test_a_run_that_cannot_begin_creates_no_store(tmp_path, capsys, archive, said):
    write_wav(tmp_path / "archive", "a.wav", pcm16(300))
    config = write_config(tmp_path, archive=archive)
    before = _snapshot(tmp_path)
    assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("twinpass: error: ") and said in err and err.count("\n") == 0, err
    assert not Path(load_config(config).store_location).exists()
    assert _snapshot(tmp_path) == before  # nothing created or touched


def test_plan_refuses_a_store_inside_the_archive(tmp_path, capsys):
    write_wav(tmp_path / "archive", "a.wav", pcm16(300))
    config = write_config(tmp_path, output={"store": "archive/filtered.zarr"})
    assert cli.main(["plan", str(config)]) == 2
    assert "is inside the archive root" in capsys.readouterr().err


def test_force_deletes_nothing_outside_the_store(tmp_path, capsys):
    root = tmp_path / "archive"
    rels = [stem("s") + ".wav", stem("t") + ".npy"]
    write_wav(root, rels[0], pcm16(800))
    put(root, "notes/sentinel.txt", b"keep me")
    write_npy(root, rels[1], noise(800, 1).astype(np.float32))
    config = write_config(tmp_path, archive=ARCHIVE)
    store_path = Path(load_config(config).store_location)
    assert cli.main(["run", str(config), "--no-flow", "--no-report"]) == 0
    put(tmp_path, "out/sentinel.txt", b"beside the store")
    before = {p: v for p, v in _snapshot(tmp_path).items() if not (tmp_path / p).resolve().is_relative_to(store_path)}
    assert cli.main(["run", str(config), "--no-flow", "--no-report", "--force"]) == 0
    out = capsys.readouterr().out
    assert "complete 2," in out
    after = {p: v for p, v in _snapshot(tmp_path).items() if not (tmp_path / p).resolve().is_relative_to(store_path)}
    assert after == before


# -- a full disk ----------------------------------------------------------------------------


def _reference(path: Path, design) -> tuple[np.ndarray, float]:
    """Whole-file two-pass output (scipy.signal.sosfiltfilt) and the input's peak."""
    with open_recording(path) as rec:
        x = rec.read(0, rec.info.frames)
    pad = min(design.effective_length, len(x) - 1)
    return signal.sosfiltfilt(design.sos, x, axis=0, padtype="odd", padlen=pad), float(np.max(np.abs(x)))


def _check_outputs(store: OutputStore, root: Path, rels: list[str], design) -> None:
    for r in rels:
        ref, peak = _reference(root / r, design)
        assert np.max(np.abs(store.read(r[:-4]) - ref)) <= 1e-9 * peak


def test_disk_full_during_block_writes_then_rerun_completes(tmp_path, monkeypatch):
    """Chunk writes of the output data raise ENOSPC (an injected fault); metadata still fits."""
    root = tmp_path / "archive"
    rels = ["a.wav", "b.wav"]
    for k, r in enumerate(rels):
        write_wav(root, r, pcm16(3000, 2, seed=k))
    cfg = load(tmp_path, output={"dtype": "float64"}, processing={"block_seconds": 10.0})
    real_set = LocalStore.set

    async def full_disk(self, key, value):
        if not key.startswith("_twinpass") and "/c/" in key:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), key)
        return await real_set(self, key, value)

    def full_disk_file(path, payload, **_):  # the chunk files block tasks write themselves
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    real_put = store_module._put_file

    def full_disk_chunk(path, payload):  # chunk files the store writes; its metadata documents fit
        if Path(path).name == "zarr.json":
            return real_put(path, payload)
        full_disk_file(path, payload)

    monkeypatch.setattr(LocalStore, "set", full_disk)
    monkeypatch.setattr(store_module, "_put_file", full_disk_chunk)
    monkeypatch.setattr(store_module, "_overwrite_file", full_disk_file)
    res = run(cfg)
    monkeypatch.undo()
    assert _complete(res) == {r: "failed" for r in rels}
    errors = [e for o in res.outcomes for e in o.errors.values()]
    assert errors and all("no space left on device" in e and "free space and rerun" in e for e in errors)
    store = OutputStore.open(cfg.store_location, mode="r")
    assert {k: r.complete for k, r in store.file_records().items()} == {r: False for r in rels}

    res = run(cfg)  # space freed
    assert _complete(res) == {r: "complete" for r in rels}
    _check_outputs(OutputStore.open(cfg.store_location, mode="r"), root, rels, res.designs[100.0])


def test_disk_full_on_a_small_tmpfs_then_rerun_completes(tmp_path):
    with tmpfs(tmp_path / "disk", "2m") as disk:
        root = tmp_path / "archive"
        rels = ["a.wav", "b.wav"]
        for k, r in enumerate(rels):
            write_wav(root, r, pcm16(100_000, 2, seed=k))  # 1.6 MB of float64 output each
        cfg = load(tmp_path, output={"store": str(disk / "filtered.zarr"), "dtype": "float64",
                                     "compression": "none"})
        try:
            res = run(cfg)
            errors = [e for o in res.outcomes for e in o.errors.values()]
            assert any("no space left on device" in e for e in errors)
        except StoreError as e:  # the disk filled while the driver wrote a block table or attribute
            assert "no space left on device" in str(e) and "free space and rerun" in str(e)
        store = OutputStore.open(cfg.store_location, mode="r")
        done = [r for r in store.file_records().values() if r.complete]
        assert len(done) < len(rels)
        design = design_filter(cfg.response, 100.0, cfg.processing.tolerance)
        _check_outputs(store, root, [r.source for r in done], design)  # whatever is marked complete is right
        _mount("-o", "remount,size=64m", str(disk))
        res = run(cfg)
        assert set(_complete(res).values()) <= {"complete", "skipped"}
        store = OutputStore.open(cfg.store_location, mode="r")
        assert {k: r.complete for k, r in store.file_records().items()} == {r: True for r in rels}
        _check_outputs(store, root, rels, design)

