"""Multi-stage filtering: a later job reads an earlier job's output store as its archive.

Stage 1 band-passes an invented archive (two streams of contiguous NPY files), stage 2
notches the mains frequency out of stage 1's output store, both with the real engine
(threads, real Zarr stores on disk).

References:
* Whole-signal result of the cascade: scipy.signal.sosfiltfilt(notch_sos,
  scipy.signal.sosfiltfilt(bandpass_sos, x)) on each whole concatenated stream, with the
  second-order sections, odd end extension and its length (``edge_samples``) that each
  stage records in its outputs' ``filter`` attribute (README "How the response is
  specified" / "Halos and the tolerance": a segment is end extended by point reflection).
* Error bound: each stage is within its configured tolerance (1e-9) of its segment's
  peak; stage 1's error reaches stage 2's output through the notch with a gain of at most
  the l1 norm of the notch's two-pass impulse response (a linear filter's peak gain,
  common practice), computed here with scipy.signal.sosfilt. The bound allows ten times
  the sum.
* Which arrays are inputs, what is left out and what a rerun recomputes are twinpass rules
  (README "Input formats and scaling", the planner's statuses).
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np
import pytest
import scipy.signal
import zarr

from conftest import cli_env, make_signal, read_output, run_cli, write_config, write_stream
from twinpass.config import load_config
from twinpass.errors import UnsafePathError
from twinpass.io.archive import discover
from twinpass.io.store import OutputStore
from twinpass.io.store_lock import LockInfo
from twinpass.job import prepare, run_job
from twinpass.status import collect_status, format_status

FS = 200.0
FILE_FRAMES = 4000
"""20 s files: four 5 s blocks each, longer than either stage's halo."""
STREAMS = {"s1": 1, "s2": 2}
"""Stream name -> channels."""
NOTCH = {"kind": "notch", "notch_hz": 50.0, "notch_width_hz": 2.0}
TOLERANCE = 1e-9


def _write_archive(root: Path) -> dict[str, list[str]]:
    """Three contiguous files per stream; returns the stage-1 output array names per stream."""
    names = {}
    for seed, (stream, ch) in enumerate(STREAMS.items()):
        x = make_signal(3 * FILE_FRAMES, ch, FS, seed=seed)
        x += 0.1 * np.sin(2 * np.pi * 50.0 * np.arange(x.shape[0]) / FS)[:, None]  # mains hum
        names[stream] = list(write_stream(root, stream, x, FS, 3).arrays)
    return names


def _stage1(folder: Path) -> Path:
    return write_config(folder, output={"store": "band.zarr"})


def _stage2(folder: Path, root: str = "band.zarr", **archive) -> Path:
    """Stage 2 reads ``root`` (stage 1's store, relative to ``folder``) and writes notch.zarr."""
    return write_config(folder, response=NOTCH, archive={"root": root, "include": ["**"], "name_pattern": None,
                                                         **archive},
                        output={"store": "notch.zarr"})


def _run(config: Path):
    res = run_job(load_config(config), scheduler="threads", workers=2)
    assert not res.failed, res.failure_reasons()
    return res


def _tree(folder: Path) -> dict[str, tuple[int, int]]:
    """Every file under ``folder`` with its size and modification time (ns)."""
    return {p.relative_to(folder).as_posix(): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def staged(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, list[str]]]:
    """An archive filtered by stage 1 (band.zarr), read by nothing yet (copy it to change it)."""
    folder = tmp_path_factory.mktemp("stages")
    names = _write_archive(folder / "archive")
    _run(_stage1(folder))
    return folder, names


@pytest.fixture
def work(staged, tmp_path: Path) -> tuple[Path, dict[str, list[str]]]:
    folder, names = staged
    shutil.copytree(folder, tmp_path / "w", symlinks=True)
    return tmp_path / "w", names


def _two_pass(filt: dict, x: np.ndarray) -> np.ndarray:
    """scipy.signal.sosfiltfilt of the whole stream with a stage's recorded coefficients and end extension."""
    return scipy.signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype="odd", padlen=int(filt["edge_samples"]))


def _bound(second: dict, x: np.ndarray) -> float:
    """Ten times the tolerance of the two stages, the first one's passed on with the peak gain
    (l1 norm of the two-pass impulse response) of the second, relative to the input's peak."""
    impulse = np.zeros(4 * int(second["effective_length_samples"]) + 1)
    impulse[impulse.size // 2] = 1.0
    gain = float(np.sum(np.abs(scipy.signal.sosfiltfilt(np.asarray(second["sos"]), impulse, padtype=None))))
    return 10 * TOLERANCE * (1 + gain) * float(np.max(np.abs(x)))


def _check_cascade(folder: Path, names: dict[str, list[str]], first: str = "band.zarr",
                   second: str = "notch.zarr") -> dict[str, np.ndarray]:
    """Each stream of store ``second`` equals the whole-stream cascade of scipy.signal.sosfiltfilt
    by the filter of store ``first``, then that of ``second``; returns the outputs per stream."""
    out = {}
    for stream, arrays in names.items():
        x = np.concatenate([np.load(folder / "archive" / f"{a}.npy") for a in arrays])
        one = zarr.open_group(str(folder / first), mode="r")[arrays[0]].attrs["filter"]
        attrs = zarr.open_group(str(folder / second), mode="r")[arrays[0]].attrs.asdict()
        # reference: two-pass filtering of the whole stream by each stage in turn, each with the
        # coefficients and end extension its outputs record
        ref = _two_pass(attrs["filter"], _two_pass(one, x))
        y = np.concatenate(read_output(folder / second, arrays))
        err = float(np.max(np.abs(y - ref)))
        assert err <= _bound(attrs["filter"], x), (stream, err)
        # stage 1's streams, start times and joins carry over: one segment per stream
        assert attrs["stream"] == stream and attrs["segment"].startswith(f"{stream}@")
        assert attrs["joins"] == {"previous": None, "next": arrays[1]}
        assert attrs["source"] == arrays[0]
        out[stream] = y
    return out


def test_a_second_stage_reads_the_first_stage_store_and_equals_the_cascade(work):
    folder, names = work
    before = _tree(folder / "band.zarr")
    res = _run(_stage2(folder))
    assert res.invalid == [] and sorted(o.relpath for o in res.outcomes) == sorted(sum(names.values(), []))
    assert {o.status for o in res.outcomes} == {"complete"}
    _check_cascade(folder, names)
    # stage 2's arrays keep stage 1's names; the bookkeeping group was no input
    assert sorted(OutputStore.open(str(folder / "notch.zarr"), mode="r").list_arrays()) == sorted(
        sum(names.values(), []))
    # the input store was only read
    assert _tree(folder / "band.zarr") == before


def test_a_first_stage_array_with_a_lost_chunk_file_is_left_out_until_the_first_stage_rewrites_it(work):
    # A chunk file of a complete stage-1 array deleted (lost since written): read, its frames
    # would be the fill value (NaN), which "interpolate" would even fill with a straight
    # line. It is left out naming the frames and the remedy; after stage 1 runs again (it
    # rewrites lost chunks, as `twinpass status` says), stage 2 equals the whole-stream cascade.
    folder, names = work
    middle = names["s1"][1]
    chunks = sorted((folder / "band.zarr" / middle / "c").rglob("*"))
    lost = next(p for p in chunks if p.is_file())
    lost.unlink()
    cfg = load_config(_stage2(folder))
    disc = discover(cfg)
    (bad,) = disc.invalid
    assert bad.path == middle and "chunk files of frames [" in bad.reason and "missing or empty" in bad.reason
    assert "run the earlier job again" in bad.remedy
    assert sorted(e.relpath for e in disc.files) == sorted(a for a in sum(names.values(), []) if a != middle)
    _run(_stage1(folder))
    assert lost.exists()
    _run(_stage2(folder))
    _check_cascade(folder, names)


def test_an_incomplete_first_stage_array_is_left_out_naming_it_and_the_remedy(work):
    folder, names = work
    last = names["s2"][-1]
    # what a stage-1 run cut short leaves: the array marked incomplete before its blocks are written
    zarr.open_array(str(folder / "band.zarr" / last), mode="r+").attrs["complete"] = False
    res = run_job(load_config(_stage2(folder)), scheduler="threads", workers=2)
    assert [b.relpath for b in res.invalid] == [last]
    why = res.invalid[0].explained
    assert f"array {last} of the output store" in why and "not complete" in why
    assert "run the earlier job again" in why
    assert last not in OutputStore.open(str(folder / "notch.zarr"), mode="r").list_arrays()


def test_a_first_stage_rerun_reruns_only_what_it_rewrote(work):
    folder, names = work
    _run(_stage2(folder))
    # change the middle file of s1 (same length): stage 1 refilters it and its joins
    middle = folder / "archive" / f"{names['s1'][1]}.npy"
    np.save(middle, np.load(middle)[::-1].copy())
    plan1 = prepare(load_config(_stage1(folder)), OutputStore.open(str(folder / "band.zarr"), mode="r")).plan
    _run(_stage1(folder))
    cfg2 = load_config(_stage2(folder))
    plan2 = prepare(cfg2, OutputStore.open(str(folder / "notch.zarr"), mode="r")).plan
    by = {fp.relpath: fp for fp in plan2.files}
    first, mid, last = names["s1"]
    halo1 = plan1.halos[FS]
    halo2 = plan2.halos[FS]
    block = 1000  # 5 s blocks at 200 Hz: stage 1 rewrote the blocks its halo reaches
    assert plan1.file(f"{first}.npy").redo == ((FILE_FRAMES - halo1, FILE_FRAMES),)
    assert by[mid].status == "changed" and by[mid].redo == "all"
    # the neighbours changed only in stage 1's last / first block: those samples and stage 2's halo
    assert by[first].status == "changed" and by[first].redo == ((FILE_FRAMES - block - halo2, FILE_FRAMES),)
    assert by[last].status == "changed" and by[last].redo == ((0, block + halo2),)
    assert {fp.status for fp in plan2.files if fp.stream == "s2"} == {"unchanged"}
    assert plan2.removed == () and plan2.invalid == ()
    res = _run(_stage2(folder))
    ran = {o.relpath: o.blocks_run for o in res.outcomes}
    assert ran[mid] == 4 and 0 < ran[first] < 4 and 0 < ran[last] < 4
    assert all(ran[a] == 0 for a in names["s2"])
    _check_cascade(folder, names)
    # nothing changed since: nothing to do
    again = prepare(cfg2, OutputStore.open(str(folder / "notch.zarr"), mode="r")).plan
    assert {fp.status for fp in again.files} == {"unchanged"}


def test_a_store_below_the_root_is_read_array_by_array_and_a_manifest_may_place_them(work):
    folder, names = work
    (folder / "stage1").mkdir()
    (folder / "band.zarr").rename(folder / "stage1" / "band.zarr")
    ident = f"band.zarr#{names['s2'][0]}"
    (folder / "places.csv").write_text(f"path,stream,start_time\n{ident},s2-notched,2030-01-01T00:00:00Z\n")
    cfg = load_config(_stage2(folder, root="stage1", include=["*.zarr"], manifest="places.csv"))
    disc = discover(cfg)
    got = {e.relpath: e for e in disc.files}
    assert disc.invalid == ()
    assert sorted(got) == sorted(f"band.zarr#{a}" for a in sum(names.values(), []))
    assert got[f"band.zarr#{names['s1'][1]}"].stream == "s1"
    assert got[f"band.zarr#{names['s1'][1]}"].output_name == f"band/{names['s1'][1]}"
    assert got[ident].stream == "s2-notched" and got[ident].start_time.year == 2030
    # an exclude glob over the identifiers leaves arrays out
    cfg = load_config(_stage2(folder, root="stage1", include=["*.zarr"], exclude=["band.zarr#s2/**"]))
    assert all(e.stream == "s1" for e in discover(cfg).files)


def test_no_glob_taking_the_arrays_is_noted_and_a_running_earlier_job_leaves_its_arrays_out(work):
    folder, names = work
    plain = write_config(folder, response=NOTCH, archive={"root": "band.zarr", "name_pattern": None},
                         output={"store": "notch.zarr"})  # include: the default "**/*.npy", "**/*.wav"
    disc = discover(load_config(plain))
    assert disc.files == () and any('set include = ["**"]' in w for w in disc.warnings), disc.warnings
    # A run of the first job holding its store (this process stands for it, on this host):
    # every array is left out, naming the run, since any may be rewritten while read.
    lock = folder / "band.zarr" / ".twinpass-lock"
    lock.write_text(LockInfo.new("stage1-live").to_bytes().decode())
    disc = discover(load_config(_stage2(folder)))
    assert disc.files == () and len(disc.invalid) == 6, (disc.files, disc.invalid)
    assert all("being written by run stage1-live" in b.reason and "once that run has ended" in b.remedy
               for b in disc.invalid), disc.invalid
    assert not any("include" in w for w in disc.warnings), disc.warnings  # the globs did select them
    # A lock whose holder is gone (kill -9): arrays the earlier job completed are read, with a note.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "run_id": "killed",
                                "started": "2026-03-01T00:00:00+00:00"}))
    disc = discover(load_config(_stage2(folder)))
    assert len(disc.files) == 6 and any("no longer running" in w for w in disc.warnings), disc.warnings
    # A lock that cannot be parsed (being written) counts as held.
    lock.write_text("{")
    assert discover(load_config(_stage2(folder))).files == ()


def test_the_order_of_the_two_stages_does_not_change_the_result(work):
    folder, names = work
    _run(_stage2(folder))
    forward = _check_cascade(folder, names)
    # notch first on the raw archive, then the band-pass on the notch job's store
    rev = folder / "rev"
    rev.mkdir()
    _run(write_config(rev, response=NOTCH, archive={"root": "../archive"}, output={"store": "notch.zarr"}))
    _run(write_config(rev, archive={"root": "notch.zarr", "include": ["**"], "name_pattern": None},
                      output={"store": "band.zarr"}))
    (rev / "archive").symlink_to(folder / "archive")
    backward = _check_cascade(rev, names, first="notch.zarr", second="band.zarr")
    for stream, arrays in names.items():
        x = np.concatenate([np.load(folder / "archive" / f"{a}.npy") for a in arrays])
        band = zarr.open_group(str(folder / "band.zarr"), mode="r")[arrays[0]].attrs["filter"]
        notch = zarr.open_group(str(folder / "notch.zarr"), mode="r")[arrays[0]].attrs["filter"]
        # LTI filters commute; with an odd end extension (point symmetry about the end sample,
        # which a zero-phase filter keeps) the edge zones agree too: scipy's two orders agree ...
        assert np.max(np.abs(_two_pass(notch, _two_pass(band, x)) - _two_pass(band, _two_pass(notch, x)))) <= (
            _bound(notch, x))
        # ... and so do the two orders of the jobs, edge zones included
        assert np.max(np.abs(forward[stream] - backward[stream])) <= 2 * _bound(notch, x)


def test_the_prefect_flow_runs_the_second_stage_alike(work):
    # the command's default path: the Prefect flow on a temporary local server
    folder, names = work
    env = cli_env(PREFECT_HOME=str(folder / "prefect-home"))
    proc = run_cli(["run", str(_stage2(folder)), "--no-report"], env=env)
    assert "complete 6, skipped (unchanged) 0, failed 0, invalid 0" in proc.stdout, proc.stdout
    _check_cascade(folder, names)


def test_the_second_stage_store_may_not_be_the_first_stage_store(work):
    # guard: passes before and after store inputs existed (the store would be its own archive)
    folder, _ = work
    config = write_config(folder, response=NOTCH, archive={"root": "band.zarr", "include": ["**"]},
                          output={"store": "band.zarr"})
    with pytest.raises(UnsafePathError, match="is the archive root"):
        run_job(load_config(config), scheduler="threads", workers=1)


def _start_of(rel: str) -> dt.datetime:
    """The start time an archive path names (conftest's NAME_PATTERN, UTC)."""
    stamp = PurePosixPath(rel).stem.rsplit("_", 1)[1]
    return dt.datetime.strptime(stamp, "%Y%m%dT%H%M%S").replace(tzinfo=dt.timezone.utc)


def _streams_now(archive: Path, left_out: tuple[str, ...] = ()) -> list[list[str]]:
    """The archive's segments as they are now, found here independently of twinpass: per stream
    folder, the files in time order (but those ``left_out``, array names), a new segment
    wherever a file does not start where the one before it ends (every file holds FILE_FRAMES
    samples at FS); array names."""
    out = []
    for folder in sorted(p for p in archive.iterdir() if p.is_dir()):
        rels = sorted((p.relative_to(archive).as_posix() for p in folder.glob("*.npy")
                       if p.relative_to(archive).as_posix()[:-len(".npy")] not in left_out), key=_start_of)
        run: list[str] = []
        for rel in rels:
            if run and _start_of(rel) != _start_of(run[-1] + ".npy") + dt.timedelta(seconds=FILE_FRAMES / FS):
                out.append(run)
                run = []
            run.append(rel[:-len(".npy")])
        out.append(run)
    return out


def _check_cascade_now(folder: Path, left_out: tuple[str, ...] = ()) -> None:
    """Every present input's stage-2 output (but those ``left_out``) equals scipy.signal.sosfiltfilt
    by stage 2's filter of scipy.signal.sosfiltfilt by stage 1's filter of its whole segment as
    the archive now holds it (filters and end extensions as the stores' ``filter`` attributes
    record them)."""
    one, two = (zarr.open_group(str(folder / s), mode="r") for s in ("band.zarr", "notch.zarr"))
    for arrays in _streams_now(folder / "archive", left_out):
        x = np.concatenate([np.load(folder / "archive" / f"{a}.npy") for a in arrays])
        second = two[arrays[0]].attrs["filter"]
        ref = _two_pass(second, _two_pass(one[arrays[0]].attrs["filter"], x))
        err = float(np.max(np.abs(np.concatenate(read_output(folder / "notch.zarr", arrays)) - ref)))
        assert err <= _bound(second, x), (arrays, err)
        assert all(two[a].attrs["complete"] is True and "input_gone" not in two[a].attrs for a in arrays)


def _gone(store: Path, array: str) -> Any:
    return zarr.open_array(str(store / array), mode="r").attrs.get("input_gone")


@pytest.mark.parametrize("change", ["delete", "rename", "move"])
def test_a_first_stage_input_gone_is_marked_and_left_out_of_the_second_stage(work, change):
    # A stage-1 input deleted, renamed (to a later start: the same samples now follow the
    # stream's last file) or moved to a stream of its own: stage 1 keeps its old output but
    # marks it, stage 2 no longer joins those samples into the stream, and every present
    # input's stage-2 output equals the whole-stream cascade (reference: scipy.signal.sosfiltfilt
    # twice, module notes). Which outputs are kept and reported is a twinpass rule (README
    # "Filtering in stages").
    folder, names = work
    _run(_stage2(folder))
    first, mid, last = names["s1"]
    src = folder / "archive" / f"{mid}.npy"
    if change == "delete":
        src.unlink()
    elif change == "rename":  # 60 s later: right after the last file
        later = _start_of(f"{last}.npy") + dt.timedelta(seconds=FILE_FRAMES / FS)
        src.rename(src.with_name(f"s1_{later:%Y%m%dT%H%M%S}.npy"))
    else:
        (folder / "archive" / "s3").mkdir()
        src.rename(folder / "archive" / "s3" / src.name.replace("s1_", "s3_"))
    one = _run(_stage1(folder))
    assert [r.relpath for r in one.removed] == [f"{mid}.npy"]
    gone = _gone(folder / "band.zarr", mid)
    assert gone is not None and gone["since"] and f"{mid}.npy" in gone["reason"]
    assert zarr.open_array(str(folder / "band.zarr" / mid), mode="r").attrs["complete"] is True  # kept
    status = format_status(collect_status(OutputStore.open(str(folder / "band.zarr"), mode="r")))
    assert f"{mid}.npy (since {gone['since']})" in status and "input gone" in status
    two = run_job(load_config(_stage2(folder)), scheduler="threads", workers=2)
    # nothing is wrong with the marked array: no input left out, exit status 0; one note names it
    assert two.invalid == [] and not two.failed and two.exit_status() == 0
    assert [r.relpath for r in two.removed] == [mid]
    assert sum(mid in n and "input_gone" in n for n in two.notes) == 1
    assert _gone(folder / "notch.zarr", mid) is not None  # stage 2's own output of it: kept, marked
    _check_cascade_now(folder)


def test_a_first_stage_input_left_out_as_damaged_is_marked_until_it_is_repaired(work):
    # The middle file damaged since stage 1 filtered it (not a NumPy file any more): stage 1
    # leaves it out (exit status 3) and refilters its neighbours as segment ends, keeping its
    # old output, which it marks as it marks the outputs of inputs gone; stage 2 leaves the
    # marked array out, so it does not join samples stage 1 no longer places in any stream.
    # Repaired, both stages read it again. Reference: the whole-stream cascade (module notes).
    folder, names = work
    _run(_stage2(folder))
    mid = names["s1"][1]
    src = folder / "archive" / f"{mid}.npy"
    good = src.read_bytes()
    src.write_bytes(b"not a numpy file")
    one = run_job(load_config(_stage1(folder)), scheduler="threads", workers=2)
    assert [b.relpath for b in one.invalid] == [f"{mid}.npy"] and one.exit_status() == 3
    gone = _gone(folder / "band.zarr", mid)
    assert gone is not None and "left out of this run" in gone["reason"], gone
    two = run_job(load_config(_stage2(folder)), scheduler="threads", workers=2)
    assert two.invalid == [] and not two.failed and [r.relpath for r in two.removed] == [mid]
    _check_cascade_now(folder, left_out=(mid,))
    src.write_bytes(good)
    _run(_stage1(folder))
    assert _gone(folder / "band.zarr", mid) is None
    _run(_stage2(folder))
    assert _gone(folder / "notch.zarr", mid) is None
    _check_cascade(folder, names)


def test_a_first_stage_input_back_unchanged_is_unmarked_and_joined_again(work):
    # The middle file moved away for a while, then back as it was: stage 1 skips it (its
    # samples are current) and only unmarks it; stage 2 reads it again, and both stages join it
    # to its neighbours as before (reference: the whole-stream cascade, module notes).
    folder, names = work
    _run(_stage2(folder))
    mid = names["s1"][1]
    src = folder / "archive" / f"{mid}.npy"
    src.rename(folder / "aside.npy")
    _run(_stage1(folder))
    _run(_stage2(folder))
    assert _gone(folder / "band.zarr", mid) is not None and _gone(folder / "notch.zarr", mid) is not None
    _check_cascade_now(folder)
    (folder / "aside.npy").rename(src)
    back = _run(_stage1(folder))
    assert {o.relpath: o.status for o in back.outcomes}[f"{mid}.npy"] == "skipped"
    assert _gone(folder / "band.zarr", mid) is None
    again = _run(_stage2(folder))
    assert again.removed == [] and again.invalid == []
    assert _gone(folder / "notch.zarr", mid) is None
    _check_cascade_now(folder)
    _check_cascade(folder, names)
