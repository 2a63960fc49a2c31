"""Segments (contiguity, gaps, overlaps, rate changes, window mapping) and the work plan.

References:
* scipy.signal.filtfilt with an M-tap FIR filter (``padtype=None``) is the reference for
  the whole-segment two-pass output: the plan's redo spans must be exactly the samples
  whose output changes when the archive changes (random input, so every reachable
  sample changes). An M-tap FIR filter run twice reaches M - 1 samples to each side
  (convolution length: M taps span M - 1 neighbours), so the halo is M - 1; the cutoff
  0.23 keeps the end taps non-zero so that the reach is exactly M - 1.
* numpy.concatenate is the reference for mapping a segment window to file windows.
* Joining files that start within half a sample period of the previous end is common
  practice (time stamps rounded to the nearest sample); the rest are twinpass rules.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from twinpass.core.plan import STATUSES, fingerprint_changed, format_plan, make_plan
from twinpass.core.segments import FileEntry, InvalidFile, Segment, build_segments
from twinpass.core.types import RESETTING_DIGEST, FileRecord
from twinpass.errors import ArchiveError
from twinpass.io.readers.base import ReaderSpec, RecordingInfo

FS = 100.0
T0 = dt.datetime(2024, 5, 1, tzinfo=dt.timezone.utc)
TAPS = signal.firwin(31, 0.23)
HALO = len(TAPS) - 1  # exact reach of an M-tap FIR (convolution length)
DIGEST = "d" * 64


def _fp(tag: str, size: int = 1000, mtime: int = 1, mode: str = "fast") -> dict:
    return {"size": size, "mtime_ns": mtime, "mode": mode, "algorithm": "blake2b-256", "whole": True, "digest": tag}


def entry(
    rel: str,
    start_s: float | None,
    frames: int,
    *,
    stream: str = "s1",
    fs: float = FS,
    channels: int = 1,
    fmt: str = "float64",
    tag: str | None = None,
) -> FileEntry:
    start = None if start_s is None else T0 + dt.timedelta(seconds=start_s)
    info = RecordingInfo(f"/archive/{rel}", "npy", frames, channels, fs, fmt, start)
    return FileEntry(rel, ReaderSpec("npy", f"/archive/{rel}"), info, stream, start, _fp(tag or rel))


def chain(names_frames: list[tuple[str, int]], *, start_s: float = 0.0, stream: str = "s1") -> list[FileEntry]:
    """Contiguous files: each starts where the previous one ends."""
    out, t = [], start_s
    for name, n in names_frames:
        out.append(entry(name, t, n, stream=stream))
        t += n / FS
    return out


def records_for(segments: list[Segment], *, complete: bool = True, times: bool = True,
                joins: bool = True) -> dict[str, FileRecord]:
    """Records as a finished run over ``segments`` would leave them (``joins`` False: as stores
    written before records kept the files each was filtered next to; ``times`` False: before
    they kept their files' start times)."""
    def neighbours(seg: Segment, k: int) -> tuple[str | None, str | None] | None:
        if not joins:
            return None
        return (seg.files[k - 1].relpath if k else None,
                seg.files[k + 1].relpath if k + 1 < len(seg.files) else None)

    return {
        f.relpath: FileRecord(f.relpath, dict(f.fingerprint or {}), DIGEST, complete, f.frames, seg.id,
                              start_time=f.start_time.isoformat() if times and f.start_time else None,
                              joins=neighbours(seg, k))
        for seg in segments
        for k, f in enumerate(seg.files)
    }


RECORD_KINDS = pytest.mark.parametrize("times, joins", [(True, True), (True, False), (False, False)],
                                       ids=["records-with-joins", "records-with-times", "records-without"])
"""Records as the store writes them now, and as stores written before kept them."""


def plan_for(entries: list[FileEntry], records: dict[str, FileRecord], **kw):
    segs, bad = build_segments(entries)
    return make_plan(segs, bad, records, {FS: DIGEST}, {FS: HALO}, **kw), segs


# -- the scipy reference ---------------------------------------------------------


def outputs(segments: list[Segment], data: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Per-file output of filtering each whole segment with scipy.signal.filtfilt."""
    out = {}
    for seg in segments:
        x = np.concatenate([data[f.relpath] for f in seg.files])
        y = signal.filtfilt(TAPS, [1.0], x, padtype=None)
        for f, off in zip(seg.files, seg.offsets):
            out[f.relpath] = y[off: off + f.frames]
    return out


def assert_plan_covers(plan, old_segs, new_segs, old_data, new_data):
    """The redo spans of each file not redone whole are exactly its samples whose scipy output changed."""
    assert_redo_exact(plan, outputs(old_segs, old_data), outputs(new_segs, new_data))


def assert_redo_exact(plan, before: dict[str, np.ndarray], after: dict[str, np.ndarray]) -> None:
    """The redo spans of each file not redone whole are exactly its samples whose output
    ``before`` (as stored) differs from ``after`` (as it must be now)."""
    assert TAPS[0] != 0.0  # reach exactly M - 1
    for fp in plan.files:
        if fp.relpath not in before or fp.redo == "all":
            continue
        changed = np.abs(after[fp.relpath] - before[fp.relpath]) > 1e-12
        mask = np.zeros(fp.frames, bool)
        for a, b in fp.redo or ():
            mask[a:b] = True
        assert np.array_equal(mask, changed), (fp.relpath, fp.redo, np.flatnonzero(changed ^ mask)[:5])


def signals(entries: list[FileEntry], seed: int = 0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {e.relpath: rng.standard_normal(e.frames) for e in entries}


# -- segments --------------------------------------------------------------------


@pytest.mark.parametrize("shift_samples, joined", [(0.4, True), (-0.4, True), (0.0, True), (0.6, False)])
def test_contiguity_within_half_a_sample(shift_samples, joined):
    # common practice: a file starting within half a sample period of the previous end continues it
    a = entry("a.npy", 0.0, 1000)
    b = entry("b.npy", 10.0 + shift_samples / FS, 500)
    segs, bad = build_segments([b, a])
    assert bad == []
    if joined:
        assert [s.relpaths for s in segs] == [("a.npy", "b.npy")]
        assert segs[0].offsets == (0, 1000) and segs[0].frames == 1500
    else:
        assert [s.relpaths for s in segs] == [("a.npy",), ("b.npy",)]
        assert "gap" in segs[1].break_reason and "a.npy" in segs[1].break_reason


@pytest.mark.parametrize("fs, shift_us, joined, noted", [
    (1e6, 1, True, True),      # one sample at 1 MHz: within the 1 us resolution of start times
    (1e6, 0, True, False),
    (2e6, 1, True, True),      # two samples at 2 MHz
    (2e6, 3, False, False),    # beyond the resolution: a gap
    (4e5, 2, False, False),    # 0.4 MHz: 2 us is 0.8 samples, beyond half a sample: a gap
    (4e5, 1, True, False),     # 0.4 samples: within half a sample, no note
])
def test_joins_above_500_khz_within_the_start_times_resolution_are_named(fs, shift_us, joined, noted):
    # Start times are datetimes, resolved to 1 us (Python's datetime); above 500 kHz a sample
    # is shorter than that, so a join is made within 1 us, and each join made more than half a
    # sample from contiguous is named in a note of the plan.
    frames = int(fs * 0.01)  # 10 ms
    start_b = 0.01 + shift_us * 1e-6
    a = entry("a.npy", 0.0, frames, fs=fs)
    b = entry("b.npy", start_b, frames, fs=fs)
    segs, bad = build_segments([a, b])
    assert bad == []
    assert (len(segs) == 1) == joined, [s.relpaths for s in segs]
    notes = [n for s in segs for n in s.join_notes]
    assert bool(notes) == noted, notes
    if noted:
        assert "b.npy joined to a.npy" in notes[0] and "resolution (1 us)" in notes[0], notes
        plan = make_plan(segs, bad, {}, {fs: DIGEST}, {fs: HALO})
        assert any("b.npy joined to a.npy" in n for n in plan.notes), plan.notes


def test_gap_starts_new_segment_and_ids_are_stable():
    # twinpass rule: a gap starts a new segment; id = stream@ISO start of its first file
    files = chain([("a.npy", 1000), ("b.npy", 1000)]) + [entry("c.npy", 30.0, 1000)]
    segs, bad = build_segments(files)
    assert bad == []
    assert [s.relpaths for s in segs] == [("a.npy", "b.npy"), ("c.npy",)]
    assert segs[0].id == "s1@2024-05-01T00:00:00+00:00"
    assert segs[1].id == "s1@2024-05-01T00:00:30+00:00"
    assert segs[0].break_reason is None
    assert "10 s" in segs[1].break_reason  # 30 s - (10 s + 10 s)
    segs2, _ = build_segments(list(reversed(files)))
    assert [s.id for s in segs2] == [s.id for s in segs]


def test_overlap_reports_later_file_naming_both_and_stream_continues():
    # twinpass rule: the later of two overlapping files is left out; the stream goes on
    a, b = chain([("a.npy", 1000), ("b.npy", 1000)])
    dup = entry("a_copy.npy", 5.0, 1000)  # starts inside a.npy
    segs, bad = build_segments([a, b, dup])
    assert [s.relpaths for s in segs] == [("a.npy", "b.npy")]
    assert len(bad) == 1 and bad[0].path == "a_copy.npy"
    assert "a.npy" in bad[0].reason and "overlaps" in bad[0].reason
    assert "exclude" in bad[0].remedy
    # an overlap beyond half a sample is reported; within half a sample it is a join
    c = entry("c.npy", 20.0 - 0.6 / FS, 100)
    _, bad = build_segments([a, b, c])
    assert [x.path for x in bad] == ["c.npy"] and "b.npy" in bad[0].reason


@pytest.mark.parametrize(
    "change, words",
    [({"fs": 200.0}, "sample rate 100 Hz -> 200 Hz"), ({"channels": 2}, "channels 1 -> 2"),
     ({"fmt": "int16"}, "sample format float64 -> int16")],
)
def test_rate_channel_or_format_change_starts_segment_and_is_reported(change, words):
    # DESIGN: a change of rate or channels starts a new segment; reported with both paths and a remedy
    a = entry("a.npy", 0.0, 1000)
    b = entry("b.npy", 10.0, 1000, **change)
    segs, bad = build_segments([a, b])
    assert bad == [] and len(segs) == 2
    why = segs[1].break_reason
    assert words in why and "a.npy" in why and "b.npy" in why and "stream" in why
    rates = {s.sample_rate_hz: DIGEST for s in segs}
    plan = make_plan(segs, bad, {}, rates, {r: HALO for r in rates})
    assert any("b.npy" in n for n in plan.notes)
    assert "note:" in format_plan(plan)


def test_files_without_start_time_are_single_segments():
    # twinpass rule: no start time -> a segment of its own, id = relative path
    segs, bad = build_segments([entry("x/a.npy", None, 10, stream="x/a.npy"), entry("b.npy", None, 10, stream="b.npy")])
    assert bad == [] and sorted(s.id for s in segs) == ["b.npy", "x/a.npy"]
    assert all(len(s.files) == 1 for s in segs)


def test_streams_are_kept_apart():
    files = chain([("a1", 100), ("a2", 100)], stream="a") + chain([("b1", 100), ("b2", 100)], stream="b")
    segs, bad = build_segments(files)
    assert bad == [] and [(s.stream, s.relpaths) for s in segs] == [("a", ("a1", "a2")), ("b", ("b1", "b2"))]


# -- Segment.locate --------------------------------------------------------------


def test_locate_across_file_joins():
    seg = build_segments(chain([("a", 100), ("b", 50), ("c", 200)]))[0][0]
    assert seg.locate(90, 160) == [(0, 90, 100), (1, 0, 50), (2, 0, 10)]
    assert seg.locate(100, 150) == [(1, 0, 50)]
    assert seg.locate(0, 350) == [(0, 0, 100), (1, 0, 50), (2, 0, 200)]
    assert seg.locate(150, 150) == []
    with pytest.raises(ArchiveError, match=r"\[340, 351\)"):
        seg.locate(340, 351)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(1, 40), min_size=1, max_size=6), st.data())
def test_locate_matches_concatenation(lengths, data):
    # reference: numpy.concatenate of the files, sliced
    seg = build_segments(chain([(f"f{i}", n) for i, n in enumerate(lengths)]))[0][0]
    a = data.draw(st.integers(0, seg.frames))
    b = data.draw(st.integers(a, seg.frames))
    arrays = [np.arange(off, off + f.frames) for f, off in zip(seg.files, seg.offsets)]
    whole = np.concatenate(arrays)[a:b]
    parts = [arrays[k][fa:fb] for k, fa, fb in seg.locate(a, b)]
    got = np.concatenate(parts) if parts else np.array([], dtype=whole.dtype)
    np.testing.assert_array_equal(got, whole)


# -- the plan ----------------------------------------------------------------------


def test_first_run_new_then_unchanged():
    files = chain([("a", 1000), ("b", 1000)])
    plan, segs = plan_for(files, {})
    assert [(f.status, f.redo) for f in plan.files] == [("new", "all"), ("new", "all")]
    t = plan.totals()
    assert t["files"]["new"] == 2 and t["samples"] == 2000
    # One run over the joined segment; its halos would lie beyond the segment's ends, where
    # there is nothing to read.
    assert t["block_work_samples"] == 2000
    plan2, _ = plan_for(files, records_for(segs))
    assert [(f.status, f.redo) for f in plan2.files] == [("unchanged", None)] * 2
    assert plan2.totals()["samples"] == 0 and plan2.segments_with_work() == ()


@RECORD_KINDS
def test_append_recomputes_end_of_previous_file(times, joins):
    # DESIGN: appending tomorrow's file recomputes the end of today's (edge-extended before)
    old = chain([("day1", 1000), ("day2", 1000)])
    new = chain([("day1", 1000), ("day2", 1000), ("day3", 800)])
    old_segs, _ = build_segments(old)
    plan, new_segs = plan_for(new, records_for(old_segs, times=times, joins=joins))
    by = {f.relpath: f for f in plan.files}
    assert by["day1"].status == "unchanged" and by["day1"].redo is None
    assert by["day2"].status == "neighbour" and by["day2"].redo == ((1000 - HALO, 1000),)
    assert "day3" in by["day2"].reason
    assert by["day3"].status == "new" and by["day3"].redo == "all"
    assert plan.totals()["samples"] == HALO + 800
    assert plan.totals()["block_work_samples"] == HALO + 800 + HALO  # a halo before; none past the end
    data = signals(new)
    assert_plan_covers(plan, old_segs, new_segs, data, data)


def test_changed_middle_file_gives_both_neighbours_spans():
    files = chain([("a", 1000), ("b", 600), ("c", 1000)])
    segs, _ = build_segments(files)
    recs = records_for(segs)
    edited = chain([("a", 1000), ("b", 600), ("c", 1000)])
    edited[1] = entry("b", 10.0, 600, tag="edited")
    plan, new_segs = plan_for(edited, recs)
    by = {f.relpath: f for f in plan.files}
    assert by["b"].status == "changed" and "digest" in by["b"].reason and by["b"].redo == "all"
    assert by["a"].status == "neighbour" and by["a"].redo == ((1000 - HALO, 1000),)
    assert by["c"].status == "neighbour" and by["c"].redo == ((0, HALO),)
    assert "next file b" in by["a"].reason and "previous file b" in by["c"].reason
    old_data = signals(files)
    new_data = dict(old_data, b=np.random.default_rng(7).standard_normal(600))
    assert_plan_covers(plan, segs, new_segs, old_data, new_data)


def test_change_reaches_past_a_file_shorter_than_the_halo():
    files = chain([("a", 300), ("b", 20), ("c", 300)])
    segs, _ = build_segments(files)
    edited = list(files)
    edited[2] = entry("c", 3.2, 300, tag="edited")
    plan, new_segs = plan_for(edited, records_for(segs))
    by = {f.relpath: f for f in plan.files}
    assert by["b"].redo == ((0, 20),)
    assert by["a"].redo == ((300 - (HALO - 20), 300),)
    assert "later file c" in by["a"].reason
    old_data = signals(files)
    new_data = dict(old_data, c=old_data["c"] + 1.0)
    assert_plan_covers(plan, segs, new_segs, old_data, new_data)


@RECORD_KINDS
def test_prepended_file_touches_only_the_next_start(times, joins):
    old = chain([("b", 1000), ("c", 1000)], start_s=10.0)
    new = chain([("a", 1000), ("b", 1000), ("c", 1000)])
    old_segs, _ = build_segments(old)
    plan, new_segs = plan_for(new, records_for(old_segs, times=times, joins=joins))
    by = {f.relpath: f for f in plan.files}
    assert (by["a"].status, by["b"].status, by["c"].status) == ("new", "neighbour", "unchanged")
    assert by["b"].redo == ((0, HALO),)
    data = signals(new)
    assert_plan_covers(plan, old_segs, new_segs, data, data)


@RECORD_KINDS
def test_removed_middle_file_changes_ends_of_both_neighbours(times, joins):
    old = chain([("a", 1000), ("b", 500), ("c", 1000)])
    old_segs, _ = build_segments(old)
    new = [old[0], old[2]]
    plan, new_segs = plan_for(new, records_for(old_segs, times=times, joins=joins))
    assert [s.relpaths for s in new_segs] == [("a",), ("c",)]
    by = {f.relpath: f for f in plan.all_files()}
    assert by["b"].status == "removed" and by["b"] in plan.removed
    assert by["a"].status == "neighbour" and by["a"].redo == ((1000 - HALO, 1000),)
    assert by["c"].status == "neighbour" and by["c"].redo == ((0, HALO),)
    assert "ends after a" in by["a"].reason
    assert ("with b after it" if joins else "no longer in it: b") in by["a"].reason
    data = signals(old)
    assert_plan_covers(plan, old_segs, new_segs, data, data)


@RECORD_KINDS
def test_removed_last_file_changes_end_of_previous(times, joins):
    old = chain([("a", 1000), ("b", 500)])
    old_segs, _ = build_segments(old)
    plan, new_segs = plan_for([old[0]], records_for(old_segs, times=times, joins=joins))
    assert plan.file("a").redo == ((1000 - HALO, 1000),)
    assert plan.file("b").status == "removed"
    data = signals(old)
    assert_plan_covers(plan, old_segs, new_segs, data, data)


@RECORD_KINDS
def test_files_joined_by_a_corrected_start_time(times, joins):
    # same contents; a corrected start time closes the gap between a and c
    old = [entry("a", 0.0, 1000), entry("c", 15.0, 1000)]
    old_segs, _ = build_segments(old)
    new = [old[0], entry("c", 10.0, 1000)]
    plan, new_segs = plan_for(new, records_for(old_segs, times=times, joins=joins))
    assert [s.relpaths for s in new_segs] == [("a", "c")]
    assert plan.file("a").redo == ((1000 - HALO, 1000),) and plan.file("c").redo == ((0, HALO),)
    assert ("c is now preceded by a" if joins else "a and c are now joined") in plan.file("c").reason
    data = signals(old)
    assert_plan_covers(plan, old_segs, new_segs, data, data)


@pytest.mark.parametrize("away", ["c", "b"])
def test_a_file_back_after_a_run_without_it_has_its_joins_refiltered(away):
    # Run 1 filters a, b, c joined; run 2 runs without one of them (excluded, moved away,
    # invalid for a while) and refilters its neighbours' ends as segment ends; it comes back
    # unchanged, its record still that of run 1. Reference: scipy.signal.filtfilt on the
    # segments of each run: the redo spans are exactly the samples whose output differs
    # from what the store holds after run 2.
    files = chain([("a", 1000), ("b", 500), ("c", 1000)])
    segs1, _ = build_segments(files)
    segs2, _ = build_segments([f for f in files if f.relpath != away])
    records = {**records_for(segs1), **records_for(segs2)}
    plan, segs3 = plan_for(files, records)
    assert [s.relpaths for s in segs3] == [("a", "b", "c")]
    data = signals(files)
    stored = {**outputs(segs1, data), **outputs(segs2, data)}
    assert_redo_exact(plan, stored, outputs(segs3, data))
    # The file back was filtered next to the same files as now: its output stands.
    by = {f.relpath: f for f in plan.files}
    if away == "c":
        assert [by[x].redo for x in "abc"] == [None, ((500 - HALO, 500),), None]
        assert by["b"].reason == "b is now followed by c (it was filtered as the segment's end)"
    else:
        assert [by[x].redo for x in "abc"] == [((1000 - HALO, 1000),), None, ((0, HALO),)]
        assert by["c"].reason == "c is now preceded by b (it was filtered as the segment's start)"
    assert all(f.status in ("unchanged", "neighbour") for f in plan.files)


def test_a_corrected_clock_or_stream_name_is_noted_and_nothing_refiltered():
    # The whole stream an hour later, or renamed: the same samples next to the same files.
    old = chain([("a", 1000), ("b", 500)])
    old_segs, _ = build_segments(old)
    for new in (chain([("a", 1000), ("b", 500)], start_s=3600.0), chain([("a", 1000), ("b", 500)], stream="s2")):
        records = {k: dataclasses.replace(r, stream="s1") for k, r in records_for(old_segs).items()}
        plan, _ = plan_for(new, records)
        assert [(f.status, f.redo) for f in plan.files] == [("unchanged", None)] * 2
        moved = "start time changed" if new[0].stream == "s1" else "stream changed (s1 -> s2)"
        assert all(moved in f.reason and "its attributes are updated" in f.reason for f in plan.files)


def test_start_times_drifting_along_a_segment_leave_an_unchanged_archive_unchanged():
    # Each file starts 0.4 sample after the previous one's end: joined (within half a sample,
    # common practice), so the drift adds up along the segment, while its offsets are the
    # sums of the frames. Nothing changed, so nothing is planned; appending a file then
    # recomputes only the end of the last one (reference: scipy.signal.filtfilt, as above).
    files, t = [], 0.0
    for name in ("f0", "f1", "f2", "f3", "f4"):
        files.append(entry(name, t, 1000))
        t += (1000 + 0.4) / FS
    segs, _ = build_segments(files)
    assert [s.relpaths for s in segs] == [("f0", "f1", "f2", "f3", "f4")]
    plan, _ = plan_for(files, records_for(segs))
    assert [(f.status, f.redo) for f in plan.files] == [("unchanged", None)] * 5, [f.reason for f in plan.files]
    new = files + [entry("f5", t, 700)]
    plan, new_segs = plan_for(new, records_for(segs))
    assert [f.status for f in plan.files] == ["unchanged"] * 4 + ["neighbour", "new"]
    assert plan.file("f4").redo == ((1000 - HALO, 1000),)
    data = signals(new)
    assert_plan_covers(plan, segs, new_segs, data, data)


def test_incomplete_file_next_to_a_change_is_redone_whole():
    old = chain([("a", 1000)])
    old_segs, _ = build_segments(old)
    recs = records_for(old_segs, complete=False)
    plan, _ = plan_for(chain([("a", 1000), ("b", 100)]), recs)
    a = plan.file("a")
    assert (a.status, a.redo, a.resume) == ("incomplete", "all", False) and "b is new" in a.reason


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.tuples(st.integers(5, 120), st.sampled_from(["keep", "keep", "change", "remove"])), min_size=1, max_size=6),
    st.integers(0, 80),
    st.integers(0, 2**31 - 1),
)
def test_plan_matches_scipy_for_random_edits(files, appended, seed):
    # reference: scipy.signal.filtfilt on the whole segments before and after the edit; the
    # redo spans of every file not redone whole must be exactly its changed output samples
    old = chain([(f"f{i}", n) for i, (n, _) in enumerate(files)])
    old_segs, _ = build_segments(old)
    old_data = signals(old, seed)
    new_data = dict(old_data)
    new = []
    for e, (_, op) in zip(old, files):
        if op == "remove":
            continue
        if op == "change":
            e = entry(e.relpath, (e.start_time - T0).total_seconds(), e.frames, tag="edited")
            new_data[e.relpath] = old_data[e.relpath] + 1.0
        new.append(e)
    if appended:
        extra = entry("z", sum(n for n, _ in files) / FS, appended)
        new.append(extra)
        new_data["z"] = np.random.default_rng(seed + 1).standard_normal(appended)
    plan, new_segs = plan_for(new, records_for(old_segs))
    assert_plan_covers(plan, old_segs, new_segs, old_data, new_data)
    assert {f.relpath for f in plan.removed} == {e.relpath for e, (_, op) in zip(old, files) if op == "remove"}


def test_force_makes_every_valid_file_changed():
    files = chain([("a", 100), ("b", 100)])
    segs, _ = build_segments(files)
    plan, _ = plan_for(files, records_for(segs), force=True)
    assert [(f.status, f.reason, f.redo) for f in plan.files] == [("changed", "forced", "all")] * 2


def test_incomplete_is_resumed():
    files = chain([("a", 100), ("b", 100)])
    segs, _ = build_segments(files)
    recs = records_for(segs)
    recs["b"] = FileRecord("b", recs["b"].source_fingerprint, DIGEST, False, 100, segs[0].id)
    plan, _ = plan_for(files, recs)
    b = plan.file("b")
    assert (b.status, b.redo, b.resume) == ("incomplete", "all", True)
    assert plan.file("a").status == "unchanged"
    # the whole file is counted, an upper bound the table says it is
    assert plan.totals()["resumed"] == 1 and plan.totals()["samples"] == 100
    assert "samples to compute: 100 per channel (at most: 1 resumed file(s) keep the blocks already done)" \
        in format_plan(plan)


def test_a_rewrite_cut_short_is_planned_whole_and_said_so():
    # An output being written anew carries the resetting digest until its table is reset
    # (twinpass.engine, module notes): planned whole again, not as a design change.
    files = chain([("a", 100), ("b", 100)])
    segs, _ = build_segments(files)
    recs = records_for(segs)
    recs["b"] = dataclasses.replace(recs["b"], design_digest=RESETTING_DIGEST, complete=False)
    plan, _ = plan_for(files, recs)
    assert (plan.file("b").status, plan.file("b").redo) == ("changed", "all")
    assert plan.file("b").reason == "a run stopped while writing its output anew: written whole again"


def test_design_digest_and_frame_changes_make_files_changed():
    files = chain([("a", 100), ("b", 100)])
    segs, _ = build_segments(files)
    recs = records_for(segs)
    plan = make_plan(segs, [], recs, {FS: "e" * 64}, {FS: HALO})
    assert {f.status for f in plan.files} == {"changed"} and "design" in plan.files[0].reason
    recs["a"] = FileRecord("a", recs["a"].source_fingerprint, DIGEST, True, 99, segs[0].id)
    plan, _ = plan_for(files, recs)
    assert plan.file("a").status == "changed" and "99 -> 100" in plan.file("a").reason


def test_invalid_and_removed_in_json_and_table():
    files = chain([("a", 100)])
    segs, _ = build_segments(files)
    recs = records_for(segs)
    recs["gone"] = FileRecord("gone", _fp("gone"), DIGEST, True, 50, "s1@old")
    recs["broken"] = FileRecord("broken", _fp("broken"), DIGEST, True, 50, "s1@old")
    bad = [InvalidFile("broken", "the NPY header is damaged", "repair or re-export the file")]
    plan = make_plan(segs, bad, recs, {FS: DIGEST}, {FS: HALO})
    rows = {r["path"]: r for r in json.loads(json.dumps(plan.to_json()))}
    assert rows["gone"]["status"] == "removed"
    assert rows["broken"]["status"] == "invalid" and rows["broken"]["remedy"] == "repair or re-export the file"
    assert rows["a"]["status"] == "unchanged" and rows["a"]["redo"] is None
    for r in rows.values():
        assert {"path", "stream", "segment", "status", "reason", "redo"} <= set(r) and r["status"] in STATUSES
    text = format_plan(plan)
    assert "the NPY header is damaged; repair or re-export the file" in text
    assert "removed 1" in text and "invalid 1" in text and "unchanged 1" in text


def test_spans_in_json_and_table():
    old = chain([("a", 1000)])
    old_segs, _ = build_segments(old)
    plan, _ = plan_for(chain([("a", 1000), ("b", 10)]), records_for(old_segs))
    rows = {r["path"]: r for r in plan.to_json()}
    assert rows["a"]["redo"] == [[1000 - HALO, 1000]]
    assert f"[{1000 - HALO}, 1000)" in format_plan(plan)


def test_missing_design_for_a_rate_names_it():
    segs, _ = build_segments([entry("a", 0.0, 10, fs=250.0)])
    with pytest.raises(ArchiveError, match="250 Hz"):
        make_plan(segs, [], {}, {FS: DIGEST}, {FS: HALO})


# -- fingerprint comparison rules ----------------------------------------------------


def test_fingerprint_comparison_rules():
    # twinpass rules: fast compares size, mtime and digest; full ignores mtime
    fast = _fp("x", mode="fast") | {"whole": False}
    assert fingerprint_changed(fast, dict(fast)) == (False, "same size, modification time and digest")
    assert fingerprint_changed(fast, fast | {"mtime_ns": 2})[0]
    assert "size" in fingerprint_changed(fast, fast | {"size": 1001})[1]
    full = _fp("x", mode="full") | {"whole": True}
    assert not fingerprint_changed(full, full | {"mtime_ns": 2})[0]
    assert fingerprint_changed(full, full | {"digest": "y"})[0]
    # a digest of every byte decides alone: a new modification time with it is no change,
    # and new bytes are named as such whatever the modification time
    small = _fp("x", mode="fast")  # whole: True
    assert fingerprint_changed(small, small | {"mtime_ns": 2}) == (False, "same size and digest (of every byte)")
    assert fingerprint_changed(small, small | {"mtime_ns": 2, "digest": "y"}) == (
        True, "content changed (digest differs)")
    assert fingerprint_changed(fast, fast | {"mtime_ns": 2, "digest": "y"}) == (True, "content changed (digest differs)")
    # across modes: only whole-file digests compare
    assert fingerprint_changed(fast, full)[0]
    assert not fingerprint_changed(_fp("x", mode="fast"), _fp("x", mode="full"))[0]
    assert fingerprint_changed(None, full) == (True, "no fingerprint to compare with")


# -- the estimate against what a run reads ----------------------------------------


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_the_plans_block_work_is_what_the_runs_blocks_read(tmp_path, mode):
    # Reference: the windows the engine's block tasks report reading (BlockResult.window_samples,
    # the same count bench/run_bench.py's halo section makes from block_reach), summed over a
    # real run on Dask with a real Zarr store. Halo mode reads a halo each side of every block
    # (clipped at the segment's ends); carry mode reads no halo, only the seam samples before
    # each block but the first.
    from conftest import make_signal, write_config, write_stream
    from twinpass.config import load_config
    from twinpass.engine import segment_reads
    from twinpass.job import prepare, run_job

    x = make_signal(6000, 2, 200.0, seed=7)
    write_stream(tmp_path / "archive", "deck", x, 200.0, [2000, 2000, 2000])
    cfg = load_config(write_config(tmp_path, archive={"root": str(tmp_path / "archive")},
                                   processing={"mode": mode, "block_seconds": 4.0}))

    class NoRecords:
        def file_records(self):
            return {}

    prep = prepare(cfg, NoRecords())
    reads = {w.segment_id: segment_reads(w, prep.designs[w.sample_rate_hz], cfg) for w in prep.work}
    assert [r.mode for r in reads.values()] == [mode]
    estimate = prep.plan.totals(reads)
    read: list[int] = []
    assert run_job(cfg, on_block=lambda _seg, _done, _total, res: read.append(res.window_samples)).ok
    blocks = sum(len(spans) for r in reads.values() for spans in r.spans.values())
    assert len(read) == blocks > 3  # every block ran, several per file
    assert estimate["block_work_samples"] == sum(read)
    assert estimate["carry_segments"] == (mode == "carry")
    if mode == "carry":
        assert sum(read) == 6000 + (blocks - 1) * cfg.checks.seam_samples  # no halo at all
