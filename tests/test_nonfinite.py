"""Non-finite input (NaN, +-Inf): runs, linear fills, streaming scans, holes, and the policies.

References:
* Which values are non-finite: IEEE 754 (checked with Python's ``math.isfinite``).
* Linear interpolation between the finite neighbours: ``numpy.interp``.
* Filtering the pieces between holes: ``scipy.signal.sosfiltfilt`` / ``scipy.signal.filtfilt``
  run on each piece separately (``padtype``/``padlen`` as configured).
* Float WAV files with NaN/Inf are written and read back with scipy.io.wavfile.
* What each policy does with a file (left out, split, filled) is a twinpass rule.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from twinpass.core import nonfinite as nf
from twinpass.core.effective import effective_length
from twinpass.core.segments import FileEntry, build_segments
from twinpass.errors import InputError
from twinpass.io.archive import discover
from twinpass.io.readers import ReaderSpec, RecordingInfo, open_recording
from twinpass.io.scan import holds_floats, scan_channel_runs, scan_nonfinite
from twinpass.io.store import OutputStore
from test_bad_inputs import PATTERN, RATE, T0, load, noise, pcm16, run, stem, write_wav

SPECIALS = [math.nan, math.inf, -math.inf]


def _reference_runs(x: np.ndarray) -> list[tuple[int, int]]:
    """Maximal spans where any channel is non-finite, by a plain loop over math.isfinite."""
    runs, start = [], None
    for i, row in enumerate(x.tolist()):
        bad = any(not math.isfinite(v) for v in row)
        if bad and start is None:
            start = i
        if not bad and start is not None:
            runs.append((start, i))
            start = None
    if start is not None:
        runs.append((start, len(x)))
    return runs


def _interp_reference(x: np.ndarray) -> np.ndarray:
    """Each channel's non-finite samples replaced by numpy.interp over its finite samples."""
    out = np.array(x, dtype=np.float64)
    idx = np.arange(len(x))
    for c in range(out.shape[1]):
        ok = np.isfinite(out[:, c])
        out[~ok, c] = np.interp(idx[~ok], idx[ok], out[ok, c])
    return out


@st.composite
def _signals(draw, max_frames: int = 60):
    frames = draw(st.integers(1, max_frames))
    channels = draw(st.integers(1, 3))
    x = np.random.default_rng(draw(st.integers(0, 2**16))).standard_normal((frames, channels))
    for _ in range(draw(st.integers(0, 6))):
        a = draw(st.integers(0, frames - 1))
        b = draw(st.integers(a + 1, min(frames, a + 8)))
        x[a:b, draw(st.integers(0, channels - 1))] = draw(st.sampled_from(SPECIALS))
    return x


@settings(max_examples=150, deadline=None)
@given(_signals())
def test_find_runs_matches_a_plain_loop(x):
    assert nf.find_runs(x) == _reference_runs(x)
    per_channel = nf.channel_runs(x)
    assert nf.union_runs(per_channel) == _reference_runs(x)
    for c, a, b in per_channel:  # each channel run is maximal and all non-finite
        assert not np.isfinite(x[a:b, c]).any()
        assert a == 0 or np.isfinite(x[a - 1, c])
        assert b == len(x) or np.isfinite(x[b, c])


@settings(max_examples=150, deadline=None)
@given(_signals())
def test_fill_matches_numpy_interp_or_refuses(x):
    runs = nf.find_runs(x)
    edge = any(a == 0 or b == len(x) for _c, a, b in nf.channel_runs(x))
    if edge:
        with pytest.raises(InputError, match="reaches the (first|last) sample"):
            nf.fill_runs(x, runs, max_fill=len(x))
        return
    filled, spans = nf.fill_runs(x, runs, max_fill=len(x))
    np.testing.assert_allclose(filled, _interp_reference(x), rtol=0, atol=1e-12)
    assert spans == runs
    fin = np.isfinite(x)
    assert np.array_equal(filled[fin], x[fin])  # finite samples never change


def test_fill_refusals_name_samples_and_channel():
    x = np.zeros((100, 2))
    x[10:30, 1] = np.nan
    with pytest.raises(InputError) as e:
        nf.fill_runs(x, nf.find_runs(x), max_fill=19)
    assert str(e.value) == (
        "NaN/Inf at samples 10-29 (20 samples) of channel 1 is longer than "
        "[processing] max_fill_samples = 19"
    )
    filled, spans = nf.fill_runs(x, nf.find_runs(x), max_fill=20)
    assert spans == [(10, 30)] and np.all(filled == 0.0)
    x[99, 0] = np.inf
    with pytest.raises(InputError, match="sample 99 of channel 0 reaches the last sample"):
        nf.fill_runs(x, nf.find_runs(x), max_fill=50)


@settings(max_examples=80, deadline=None)
@given(_signals(), st.data())
def test_apply_fill_is_the_same_in_any_window(x, data):
    x[0] = 1.0
    x[-1] = 2.0  # finite ends: every run can be filled
    fills = nf.fill_spans(x, max_fill=len(x))
    whole = _interp_reference(x)
    a = data.draw(st.integers(0, len(x) - 1))
    b = data.draw(st.integers(a + 1, len(x)))
    window = x[a:b].copy()
    nf.apply_fill(window, a, fills)
    np.testing.assert_allclose(window, whole[a:b], rtol=0, atol=1e-12)


def _float_wav(root: Path, rel: str, x: np.ndarray) -> Path:
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    wavfile.write(p, RATE, x.astype(np.float32))
    return p


@pytest.mark.parametrize("chunk", [1, 7, 64, None])
def test_scan_streams_and_joins_runs_across_reads(tmp_path, chunk):
    x = noise(500, 3, seed=4).astype(np.float32)
    x[60:75, 0] = np.nan  # crosses the 64-sample read boundary
    x[62:70, 2] = np.inf
    x[127:129, 1] = -np.inf
    x[499, 1] = np.nan
    p = _float_wav(tmp_path, "f.wav", x)
    _rate, ref = wavfile.read(p)
    with open_recording(p) as rec:
        assert holds_floats(rec.info)
        reads: list[int] = []
        real = rec.read
        rec.read = lambda a, b: (reads.append(b - a), real(a, b))[1]  # count what each read asks for
        assert scan_nonfinite(rec, chunk_frames=chunk) == _reference_runs(ref)
        assert scan_channel_runs(rec, chunk_frames=chunk) == nf.channel_runs(ref)
    assert max(reads) == (500 if chunk is None else chunk)


def test_scan_skips_integer_formats_without_reading(tmp_path):
    p = write_wav(tmp_path, "i.wav", pcm16(300))
    with open_recording(p) as rec:
        assert not holds_floats(rec.info)
        rec.read = lambda a, b: pytest.fail("an integer recording was read")
        assert scan_nonfinite(rec) == []


# -- holes ("split") ---------------------------------------------------------------------


def _piecewise_reference(x, holes, edge_samples, *, sos=None, taps=None):
    out = np.full(x.shape, np.nan)
    for a, b in nf.pieces(len(x), holes):
        pad = min(edge_samples, b - a - 1)
        if sos is not None:
            out[a:b] = signal.sosfiltfilt(sos, x[a:b], axis=0, padtype="odd", padlen=pad)
        else:
            out[a:b] = signal.filtfilt(taps, [1.0], x[a:b], axis=0, padtype="odd", padlen=pad)
    return out


@pytest.mark.parametrize("kind", ["sos", "fir"])
def test_filter_with_holes_equals_filtering_each_piece(kind):
    fs = 100.0
    sos = signal.butter(4, 10.0, fs=fs, output="sos") if kind == "sos" else None
    taps = signal.firwin(31, 10.0, fs=fs) if kind == "fir" else None
    # The design's own halo (twinpass.core.effective, the tolerance asserted below), so a
    # halo too short for the pieces between holes would show in the comparison.
    halo, edge_samples = effective_length(sos=sos, taps=taps, tolerance=1e-9), 60
    x = noise(3000, 2, seed=8)
    # a long hole, two holes one sample apart, a one-sample piece, holes at both ends
    holes = [(0, 5), (500, 620), (1000, 1001), (1002, 1010), (2990, 3000)]
    xin = x.copy()
    for a, b in holes:
        xin[a:b] = np.nan

    def read(a, b):
        return xin[a:b].copy()

    ref = _piecewise_reference(x, holes, edge_samples, sos=sos, taps=taps)
    outs, ins = [], []
    for s in range(0, 3000, 350):  # blockwise, cores cut across holes and pieces
        e = min(3000, s + 350)
        xs, ys, _n = nf.filter_with_holes(read, s, e, 3000, holes, halo=halo, edge="odd",
                                          edge_samples=edge_samples, channels=2, sos=sos, taps=taps)
        outs.append(ys)
        ins.append(xs)
    y = np.concatenate(outs)
    assert np.array_equal(np.isnan(y), np.isnan(ref))
    assert np.all(np.isnan(y[nf.hole_mask(0, 3000, holes)]))
    assert np.nanmax(np.abs(y - ref)) <= 1e-9 * np.max(np.abs(x))
    np.testing.assert_array_equal(np.concatenate(ins), xin)


def _entry(rel: str, frames: int, start: dt.datetime, runs=(), fills=()) -> FileEntry:
    info = RecordingInfo(path="/x/" + rel, format="wav", frames=frames, channels=1, sample_rate_hz=100.0,
                         sample_format="float32")
    return FileEntry(rel, ReaderSpec.create("wav", "/x/" + rel), info, "s", start, None,
                     nonfinite_runs=tuple(runs), nonfinite_fill=tuple(fills))


def test_segment_holes_in_segment_coordinates_merge_across_joins():
    a = _entry("a.wav", 1000, T0, runs=[(100, 120), (990, 1000)])
    b = _entry("b.wav", 500, T0 + dt.timedelta(seconds=10), runs=[(0, 5), (200, 201)])
    c = _entry("c.wav", 500, T0 + dt.timedelta(seconds=15), runs=[(10, 20)],
               fills=[nf.FillSpan(0, 10, 20, 1.0, 2.0)])  # filled: not a hole
    (seg,), bad = build_segments([a, b, c])
    assert not bad and seg.relpaths == ("a.wav", "b.wav", "c.wav")
    assert seg.holes == ((100, 120), (990, 1005), (1200, 1201))
    assert seg.pieces() == [(0, 100), (120, 990), (1005, 1200), (1201, 2000)]
    assert c.filled_spans == ((10, 20),) and c.holes == () and b.filled_spans == ()
    # the runs do not take part in equality: a rescan does not make a file "different"
    assert dataclasses.replace(a, nonfinite_runs=()) == a


# -- discovery under each policy ----------------------------------------------------------


def _nan_archive(tmp_path: Path) -> tuple[str, np.ndarray]:
    x = noise(2000, 2, seed=5).astype(np.float32)
    x[700:740, 0] = np.nan
    x[720:730, 1] = np.inf
    x[1500, 1] = -np.inf
    rel = stem("buoy") + ".wav"
    _float_wav(tmp_path / "archive", rel, x)
    return rel, x


def test_policy_fail_leaves_the_file_out_naming_the_run(tmp_path):
    rel, _x = _nan_archive(tmp_path)
    disc = discover(load(tmp_path, archive={"name_pattern": PATTERN}))
    assert not disc.files
    (bad,) = disc.invalid
    assert bad.path == rel
    assert bad.reason.startswith("NaN/Inf at samples 700-739 (40 samples) of channel 0 and in 2 more run(s)")
    assert 'nonfinite = "split"' in bad.remedy and "max_fill_samples >= 40" in bad.remedy


@pytest.mark.parametrize("at", [slice(0, 3), slice(1995, 2000)])
def test_policy_fail_does_not_offer_interpolation_for_a_run_at_an_end_of_the_file(tmp_path, at):
    # "interpolate" refuses a run reaching the file's first or last sample (no finite
    # neighbour on that side; test_policy_interpolate_refuses_long_or_end_runs), so the
    # remedy of "fail" for such a file offers only what would work.
    rel, x = _nan_archive(tmp_path)
    x[at, 1] = np.nan
    _float_wav(tmp_path / "archive", rel, x)
    (bad,) = discover(load(tmp_path, archive={"name_pattern": PATTERN})).invalid
    assert 'nonfinite = "split"' in bad.remedy and "trim or repair the file" in bad.remedy, bad.remedy
    assert "max_fill_samples" not in bad.remedy, bad.remedy
    # ...and what it offers works: "split" keeps the file.
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, processing={"nonfinite": "split"})
    assert [e.relpath for e in discover(cfg).files] == [rel]


def test_policy_split_keeps_the_file_with_its_runs(tmp_path):
    rel, _x = _nan_archive(tmp_path)
    disc = discover(load(tmp_path, archive={"name_pattern": PATTERN}, processing={"nonfinite": "split"}))
    (entry,) = disc.files
    assert entry.nonfinite_runs == ((700, 740), (1500, 1501)) and entry.nonfinite_fill == ()
    assert entry.holes == entry.nonfinite_runs
    ((seg,), _bad) = disc.segments()
    assert seg.holes == ((700, 740), (1500, 1501))
    assert any(w.startswith(f"{rel}: NaN/Inf") and "separate pieces" in w for w in disc.warnings)


def test_policy_interpolate_keeps_neighbour_values(tmp_path):
    rel, x = _nan_archive(tmp_path)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN},
               processing={"nonfinite": "interpolate", "max_fill_samples": 40})
    (entry,) = discover(cfg).files
    _rate, ref = wavfile.read(tmp_path / "archive" / rel)
    assert [(f.channel, f.start, f.stop) for f in entry.nonfinite_fill] == nf.channel_runs(ref)
    for f in entry.nonfinite_fill:
        assert f.left == float(ref[f.start - 1, f.channel]) and f.right == float(ref[f.stop, f.channel])
    assert entry.holes == () and entry.filled_spans == ((700, 740), (1500, 1501))


@pytest.mark.parametrize(
    "max_fill, edit, reason, remedy",
    [
        (39, None, "samples 700-739 (40 samples) of channel 0 is longer than [processing] max_fill_samples = 39",
         "raise [processing] max_fill_samples to 40 or more"),
        (100, (slice(0, 3), 1), "samples 0-2 (3 samples) of channel 1 reaches the first sample",
         'set [processing] nonfinite = "split"'),
        (100, (slice(1990, 2000), 0), "samples 1990-1999 (10 samples) of channel 0 reaches the last sample",
         'set [processing] nonfinite = "split"'),
    ],
)
def test_policy_interpolate_refuses_long_or_end_runs(tmp_path, max_fill, edit, reason, remedy):
    rel, x = _nan_archive(tmp_path)
    if edit is not None:
        x[edit] = np.nan
        _float_wav(tmp_path / "archive", rel, x)
    cfg = load(tmp_path, archive={"name_pattern": PATTERN},
               processing={"nonfinite": "interpolate", "max_fill_samples": max_fill})
    disc = discover(cfg)
    (bad,) = disc.invalid
    assert bad.path == rel and not disc.files
    assert bad.reason.startswith("NaN/Inf at " + reason)
    assert remedy in bad.remedy


# -- end to end (needs the engine's hooks for holes and fills) ---------------------------

@pytest.mark.parametrize("policy", ["split", "interpolate"])
def test_policy_end_to_end_matches_scipy(tmp_path, policy):
    """Two contiguous float files filtered as one segment, in blocks of 600 samples.

    Runs lie inside a block, across a block edge and (split) across the file join.
    """
    root = tmp_path / "archive"
    a, b = stem("buoy") + ".wav", stem("buoy", T0 + dt.timedelta(seconds=20)) + ".wav"
    x = noise(4000, 2, seed=6).astype(np.float32).astype(np.float64)
    x[550:640, 0] = np.nan  # crosses the block edge at 600
    x[1200:1203] = np.inf
    if policy == "split":
        x[1990:2010, 1] = np.nan  # crosses the file join at 2000
    else:
        x[2100:2150, 1] = -np.inf
    _float_wav(root, a, x[:2000])
    _float_wav(root, b, x[2000:])
    cfg = load(tmp_path, archive={"name_pattern": PATTERN}, output={"dtype": "float64"},
               processing={"nonfinite": policy, "max_fill_samples": 100, "block_seconds": 6.0})
    res = run(cfg)
    assert {o.relpath: o.status for o in res.outcomes} == {a: "complete", b: "complete"}
    design = res.designs[float(RATE)]
    store = OutputStore.open(cfg.store_location, mode="r")
    y = np.concatenate([store.read(a[:-4]), store.read(b[:-4])])
    pad = design.effective_length
    if policy == "split":
        ref = _piecewise_reference(x, nf.find_runs(x), pad, sos=design.sos)
        assert store.array_attrs(a[:-4])["nan_spans"] == [[550, 640], [1200, 1203], [1990, 2000]]
        assert store.array_attrs(b[:-4])["nan_spans"] == [[0, 10]]
    else:
        ref = signal.sosfiltfilt(design.sos, _interp_reference(x), axis=0, padtype="odd", padlen=pad)
        assert store.array_attrs(a[:-4])["filled_spans"] == [[550, 640], [1200, 1203]]
        assert store.array_attrs(b[:-4])["filled_spans"] == [[100, 150]]
    assert np.array_equal(np.isnan(y), np.isnan(ref))
    assert np.nanmax(np.abs(y - ref)) <= 1e-9 * np.max(np.abs(x[np.isfinite(x)]))
