"""Discovery of archive files, name patterns, manifests, bad input and fingerprints.

References:
* WAV inputs are written with scipy.io.wavfile; NPY inputs with numpy.save; Zarr inputs
  with zarr-python.
* Start times in names are checked against Python's datetime.strptime / fromisoformat.
* Fingerprint digests are checked against hashlib.blake2b (digest_size=32) computed here.
* Broadcast WAVE ``bext`` layout (OriginationDate at byte 320, OriginationTime at 330,
  TimeReference at 338; 602 bytes before CodingHistory): EBU Tech 3285, from memory.
* Everything else (which source of stream and time wins, what is reported invalid) is a
  twinpass rule.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import os
import struct
from pathlib import Path

import numpy as np
import pytest
from scipy.io import wavfile

from twinpass.config import ArchiveConfig, JobConfig, OutputConfig
from twinpass.core.plan import make_plan
from twinpass.core.types import Design, FileRecord, ResponseSpec
from twinpass.errors import ArchiveError, ConfigError
from twinpass.io.archive import NamePattern, compile_glob, discover, list_archive
from twinpass.io.fingerprint import design_digest, fingerprint_changed, fingerprint_file

UTC = dt.timezone.utc
MIB = 1 << 20


def job(tmp_path: Path, **archive) -> JobConfig:
    archive.setdefault("root", "archive")
    store = archive.pop("store", "out/filtered.zarr")
    return JobConfig(response=ResponseSpec(), archive=ArchiveConfig(**archive), output=OutputConfig(store=store),
                     base_dir=tmp_path)


def npy(root: Path, rel: str, frames: int, channels: int = 1, seed: int = 0) -> Path:
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    x = np.random.default_rng(seed).standard_normal((frames, channels)).astype(np.float32)
    np.save(p, x)
    return p


def wav(root: Path, rel: str, frames: int, rate: int = 8000, channels: int = 1) -> Path:
    p = root / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    x = (np.random.default_rng(1).standard_normal((frames, channels)) * 1000).astype(np.int16)
    wavfile.write(p, rate, x)
    return p


def add_bext(path: Path, date: str, time: str) -> None:
    """Insert a Broadcast WAVE bext chunk (EBU Tech 3285) before the data chunk."""
    blob = path.read_bytes()
    pos = blob.index(b"data")
    body = bytearray(602)
    body[320:330] = date.encode()
    body[330:338] = time.encode()
    chunk = b"bext" + struct.pack("<I", len(body)) + bytes(body)
    out = blob[:pos] + chunk + blob[pos:]
    out = out[:4] + struct.pack("<I", len(out) - 8) + out[8:]
    path.write_bytes(out)


def by_path(disc) -> dict:
    return {e.relpath: e for e in disc.files}


def reasons(disc) -> dict[str, str]:
    return {i.path: f"{i.reason} | {i.remedy}" for i in disc.invalid}


# -- discovery with a name pattern --------------------------------------------------


def hourly(root: Path, streams=("north", "south"), hours=3, fs=1.0) -> None:
    for s in streams:
        for h in range(hours):
            npy(root, f"{s}/{s}_20240501T{h:02d}0000.npy", int(3600 * fs), seed=h)


def test_pattern_hourly_files_of_two_streams(tmp_path):
    root = tmp_path / "archive"
    hourly(root)
    cfg = job(tmp_path, include=("**/*.npy",), name_pattern="{stream}/{stream}_{start:%Y%m%dT%H%M%S}",
              sample_rate_hz=1.0)
    disc = discover(cfg)
    assert disc.invalid == ()
    rels = [e.relpath for e in disc.files]
    assert rels == sorted(rels) and len(rels) == 6
    e = by_path(disc)["south/south_20240501T020000.npy"]
    assert e.stream == "south"
    # reference: datetime.strptime of the name's time text, taken as UTC
    assert e.start_time == dt.datetime.strptime("20240501T020000", "%Y%m%dT%H%M%S").replace(tzinfo=UTC)
    assert (e.info.frames, e.info.sample_rate_hz, e.spec.format) == (3600, 1.0, "npy")
    assert e.fingerprint is not None and e.fingerprint["mode"] == "fast"
    segs, bad = disc.segments()
    assert bad == [] and [(s.stream, len(s.files), s.frames) for s in segs] == [("north", 3, 10800), ("south", 3, 10800)]
    assert segs[0].id == "north@2024-05-01T00:00:00+00:00"
    # deterministic: a second discovery gives the same files and fingerprints
    again = discover(cfg)
    assert [(e.relpath, e.fingerprint) for e in again.files] == [(e.relpath, e.fingerprint) for e in disc.files]


def test_pattern_fields():
    p = NamePattern("{**}/{stream}/{stream}_{start:%Y%m%dT%H%M%S%z}_{*}")
    got = p.match("deep/er/a1/a1_20240501T120000+0200_v2")
    # reference: datetime.strptime with %z, converted to UTC
    ref = dt.datetime.strptime("20240501T120000+0200", "%Y%m%dT%H%M%S%z").astimezone(UTC)
    assert got == ("a1", ref) and ref.hour == 10
    assert p.match("deep/a1/b1_20240501T120000+0200_v2") is None  # repeated {stream} must agree
    assert p.match("a1/a1_20240501T120000+0200_v2") is None  # {**}/ needs a folder
    assert NamePattern("{{x}}_{start:%Y-%j}").match("{x}_2024-122") == (None, dt.datetime(2024, 5, 1, tzinfo=UTC))
    with pytest.raises(ValueError):
        NamePattern("{stream}_{start:%Y%m%d}").match("s_20241301")  # month 13 fits the shape only
    for bad in ("{station}_{start:%Y}", "{start:%Y%Q}", "{stream", "{start:%Y}{start:%m}"):
        with pytest.raises(ConfigError, match="name_pattern"):
            NamePattern(bad)


@pytest.mark.parametrize("archive, names", [
    ({"name_pattern": "{stream}/{start:%Q}"}, "[archive] name_pattern"),
    ({"include": ("/",)}, "[archive] glob pattern"),
    ({"include": ("**/*.npy",), "exclude": ("./",)}, "[archive] glob pattern"),
])
def test_malformed_patterns_name_the_configuration_file(tmp_path, archive, names):
    npy(tmp_path / "archive", "s/a.npy", 100)
    cfg = dataclasses.replace(job(tmp_path, **archive), source=str(tmp_path / "job.toml"))
    with pytest.raises(ConfigError) as e:
        discover(cfg)
    assert str(e.value).startswith(f"{tmp_path / 'job.toml'}: {names}")


def test_pattern_without_stream_uses_parent_folder(tmp_path):
    root = tmp_path / "archive"
    npy(root, "east/20240501T00.npy", 3600)
    npy(root, "20240501T00.npy", 3600)
    disc = discover(job(tmp_path, include=("**/*.npy",), name_pattern="{**}{start:%Y%m%dT%H}", sample_rate_hz=1.0))
    assert {e.relpath: e.stream for e in disc.files} == {"east/20240501T00.npy": "east", "20240501T00.npy": "archive"}


# -- manifest and metadata --------------------------------------------------------


def test_manifest_csv(tmp_path):
    root = tmp_path / "archive"
    npy(root, "x/rec1.npy", 100)
    npy(root, "x/rec2.npy", 100)
    npy(root, "unlisted.npy", 100)
    npy(root, "badtime.npy", 100)
    man = root / "manifest.csv"
    man.write_text(
        "path,stream,start_time\n"
        "x/rec1.npy,buoy,2024-05-01T12:00:00+02:00\n"
        "./x/rec2.npy,buoy,2024-05-01T10:00:01\n"
        "badtime.npy,buoy,yesterday noon\n"
        "lost.npy,buoy,2024-05-01T11:00:00Z\n"
    )
    disc = discover(job(tmp_path, include=("**/*",), manifest="archive/manifest.csv", sample_rate_hz=100.0))
    got = by_path(disc)
    assert set(got) == {"x/rec1.npy", "x/rec2.npy"}  # the manifest itself is never an input
    # reference: datetime.fromisoformat, offsets converted to UTC, no offset = UTC
    assert got["x/rec1.npy"].start_time == dt.datetime.fromisoformat("2024-05-01T12:00:00+02:00")
    assert got["x/rec1.npy"].start_time.utcoffset() == dt.timedelta(0)
    assert got["x/rec2.npy"].start_time == dt.datetime(2024, 5, 1, 10, 0, 1, tzinfo=UTC)
    bad = reasons(disc)
    assert "not listed in the manifest" in bad["unlisted.npy"]
    assert "line 4" in bad["badtime.npy"] and "ISO 8601" in bad["badtime.npy"]
    assert "not found" in bad["lost.npy"] and "line 5" in bad["lost.npy"]
    segs, _ = disc.segments()  # rec1 starts at 10:00:00 UTC and lasts 1 s: rec2 continues it
    assert [s.relpaths for s in segs] == [("x/rec1.npy", "x/rec2.npy")]


def test_manifest_rows_that_disagree_are_reported(tmp_path):
    root = tmp_path / "archive"
    npy(root, "a.npy", 10)
    npy(root, "b.npy", 10)
    (tmp_path / "m.csv").write_text(
        "path,stream,start_time\na.npy,s,2024-05-01T00:00:00Z\nb.npy,s,\na.npy,t,2024-05-01T00:00:00Z\n"
        "a.npy,u,2024-05-01T00:00:00Z\n"
    )
    disc = discover(job(tmp_path, manifest="m.csv", sample_rate_hz=1.0))
    assert [(e.relpath, e.stream, e.start_time) for e in disc.files] == [("b.npy", "s", None)]
    assert [i.path for i in disc.invalid] == ["a.npy"] and "lines 2 and 4" in disc.invalid[0].reason


def test_manifest_without_a_column_raises(tmp_path):
    root = tmp_path / "archive"
    npy(root, "a.npy", 10)
    (tmp_path / "m.csv").write_text("path,stream\na.npy,s\n")
    with pytest.raises(ArchiveError, match="start_time"):
        discover(job(tmp_path, manifest="m.csv"))


def test_no_pattern_uses_format_start_time_or_own_stream(tmp_path):
    import zarr

    root = tmp_path / "archive"
    for name, start in (("a.zarr", "2024-05-01T00:00:00Z"), ("b.zarr", "2024-05-01T00:00:02Z")):
        arr = zarr.create_array(store=str(root / "site" / name), shape=(200,), dtype="float32", chunks=(100,))
        arr[:] = np.arange(200, dtype="float32")
        arr.attrs.update({"sample_rate_hz": 100.0, "start_time": start})
    wav(root, "loose.wav", 400)
    wav(root, "field/bw.wav", 400)
    add_bext(root / "field/bw.wav", "2024-05-02", "06:30:00")
    npy(root, "plain.npy", 50)
    disc = discover(job(tmp_path, include=("**/*.zarr", "**/*.wav", "**/*.npy"), sample_rate_hz=10.0))
    assert disc.invalid == ()
    got = by_path(disc)
    assert got["site/a.zarr"].stream == "site" and got["site/a.zarr"].info.format == "zarr"
    assert got["field/bw.wav"].stream == "field"
    assert got["field/bw.wav"].start_time == dt.datetime(2024, 5, 2, 6, 30, tzinfo=UTC)
    # reference: scipy.io.wavfile wrote 8000 Hz, 400 frames
    assert (got["loose.wav"].info.sample_rate_hz, got["loose.wav"].frames) == (8000.0, 400)
    assert (got["loose.wav"].stream, got["loose.wav"].start_time) == ("loose.wav", None)
    assert (got["plain.npy"].stream, got["plain.npy"].start_time) == ("plain.npy", None)
    segs, bad = disc.segments()
    assert bad == [] and ("site/a.zarr", "site/b.zarr") in [s.relpaths for s in segs]


def test_files_with_no_start_time_to_order_them_by_are_noted_once(tmp_path):
    # Three contiguous-looking files with neither a name pattern, a manifest nor a start
    # time of their own: each is a stream and segment of its own (rule 4 of discovery), and
    # one note (not one per file) names them and the settings that would join them. A file
    # with a stored start time (a Broadcast WAVE bext chunk, EBU Tech 3285) is not in it.
    root = tmp_path / "archive"
    for k in range(3):
        npy(root, f"deck/part{k}.npy", 50, seed=k)
    wav(root, "field/bw.wav", 400)
    add_bext(root / "field/bw.wav", "2024-05-02", "06:30:00")
    disc = discover(job(tmp_path, include=("**/*.npy", "**/*.wav"), sample_rate_hz=10.0))
    assert {e.stream for e in disc.files} == {"deck/part0.npy", "deck/part1.npy", "deck/part2.npy", "field"}
    notes = [w for w in disc.warnings if "no start time" in w]
    assert len(notes) == 1, disc.warnings
    assert notes[0].startswith("3 files have no start time (deck/part0.npy, deck/part1.npy, deck/part2.npy)")
    assert "field/bw.wav" not in notes[0]
    assert "[archive] name_pattern" in notes[0] and "[archive] manifest" in notes[0]
    assert "a stream and a segment of its own" in notes[0]
    # one such file alone, or a name pattern configured (it names the streams): no note
    alone = discover(job(tmp_path, include=("deck/part0.npy", "**/*.wav"), sample_rate_hz=10.0))
    assert not [w for w in alone.warnings if "no start time" in w], alone.warnings
    named = discover(job(tmp_path, include=("**/*.npy",), name_pattern="{stream}/part{*}", sample_rate_hz=10.0))
    assert not [w for w in named.warnings if "no start time" in w], named.warnings


# -- include / exclude and the output store --------------------------------------------


def test_include_exclude_and_store_fenced(tmp_path):
    root = tmp_path / "archive"
    for rel in ("a.npy", "d1/b.npy", "d1/d2/c.npy", "tmp/x.npy", "d1/c_bad.npy", "d1/notes.txt"):
        npy(root, rel, 10) if rel.endswith(".npy") else (root / rel).write_text("x")
    npy(root, "results/leftover.npy", 10)  # an output store inside the archive
    outside = tmp_path / "elsewhere.zarr"
    npy(outside, "data.npy", 10)
    os.symlink(outside, root / "d1" / "link")  # a link into an output store elsewhere
    cfg = job(tmp_path, include=("**/*.npy",), exclude=("tmp/**", "**/*_bad.npy"), store="archive/results")
    assert list_archive(cfg) == ["a.npy", "d1/b.npy", "d1/d2/c.npy", "d1/link/data.npy"]
    cfg = job(tmp_path, include=("**/*.npy",), exclude=("tmp/**", "**/*_bad.npy"), store="elsewhere.zarr")
    assert "d1/link/data.npy" not in list_archive(cfg)
    assert "results/leftover.npy" in list_archive(cfg)  # not the store of this job
    assert list_archive(job(tmp_path, include=("d1/*.npy",))) == ["d1/b.npy", "d1/c_bad.npy"]


def test_glob_translation():
    # common practice (shell/pathlib glob): ** spans folders, * stays within one
    rx = compile_glob("**/*.wav")
    assert rx.match("a.wav") and rx.match("x/y/a.wav") and not rx.match("a.wavx")
    assert compile_glob("d?/[!x]*.npy").match("d1/a.npy") and not compile_glob("d?/[!x]*.npy").match("d1/xa.npy")
    assert not compile_glob("*.npy").match("d/a.npy")


def test_missing_root_raises(tmp_path):
    with pytest.raises(ArchiveError, match="not a folder"):
        discover(job(tmp_path, root="nowhere"))


# -- bad input is reported, the rest discovered ----------------------------------------


def test_bad_inputs_are_reported_with_path_and_remedy(tmp_path):
    root = tmp_path / "archive"
    pat = "{stream}_{start:%Y%m%dT%H%M%S}{*}"
    good = [npy(root, "s1_20240501T000000.npy", 100), npy(root, "s1_20240501T000100.npy", 100)]
    (root / "s1_20240501T000200.npy").write_bytes(b"not an array at all")
    np.save(root / "s1_20240501T000300.npy", np.zeros((0, 1), np.float32))
    npy(root, "s1_20241301T000000.npy", 10)  # month 13
    npy(root, "readme_notes.npy", 10)
    npy(root, "s1_20240501T000000b.npy", 10)  # same stream and start as the first good file
    w = wav(root, "s2_20240501T000000.wav", 1000)
    w.write_bytes(w.read_bytes()[:-7])  # data chunk shorter than the header claims
    (root / "s3_20240501T000000.npy").write_bytes(b"")
    disc = discover(job(tmp_path, include=("*.npy", "*.wav"), name_pattern=pat, sample_rate_hz=1.0))
    assert [e.relpath for e in disc.files] == [p.name for p in good]
    bad = reasons(disc)
    assert set(bad) == {
        "s1_20240501T000200.npy", "s1_20240501T000300.npy", "s1_20241301T000000.npy", "readme_notes.npy",
        "s1_20240501T000000b.npy", "s2_20240501T000000.wav", "s3_20240501T000000.npy",
    }
    assert "not an NPY file" in bad["s1_20240501T000200.npy"] and "exclude" in bad["s1_20240501T000200.npy"]
    assert "no frames" in bad["s1_20240501T000300.npy"]
    assert "does not parse" in bad["s1_20241301T000000.npy"] and "name_pattern" in bad["s1_20241301T000000.npy"]
    assert "does not match" in bad["readme_notes.npy"]
    assert "s1_20240501T000000.npy" in bad["s1_20240501T000000b.npy"]
    assert "truncated" in bad["s2_20240501T000000.wav"]
    # the same truncated WAV is accepted (whole frames) with a warning when asked to
    disc = discover(job(tmp_path, include=("*.wav",), name_pattern=pat, truncated="warn"))
    assert [e.frames for e in disc.files] == [996] and "s2_20240501T000000.wav" in disc.warnings[0]
    # an NPY without [archive] sample_rate_hz
    disc = discover(job(tmp_path, include=("s1_20240501T0001*.npy",), name_pattern=pat))
    assert disc.files == () and "[archive] sample_rate_hz" in reasons(disc)["s1_20240501T000100.npy"]


# -- fingerprints ---------------------------------------------------------------------


def _blake(data: bytes) -> str:
    return hashlib.blake2b(data, digest_size=32).hexdigest()


def test_fingerprint_fast_and_full(tmp_path):
    p = tmp_path / "big.bin"
    data = bytearray(np.random.default_rng(3).integers(0, 256, 5 * MIB, dtype=np.uint8).tobytes())
    p.write_bytes(data)
    fast, full = fingerprint_file(p, "fast"), fingerprint_file(p, "full")
    # reference: hashlib.blake2b over the first and last MiB (fast) or every byte (full)
    assert fast["digest"] == _blake(bytes(data[:MIB] + data[-MIB:])) and not fast["whole"]
    assert full["digest"] == _blake(bytes(data)) and full["whole"] and full["size"] == 5 * MIB
    assert fingerprint_file(p, "fast") == fast  # stable across runs
    # a change in the middle, same size and modification time: only full sees it
    stat = p.stat()
    data[2 * MIB + 123] ^= 0xFF
    p.write_bytes(data)
    os.utime(p, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    assert not fingerprint_changed(fast, fingerprint_file(p, "fast"))[0]
    changed, why = fingerprint_changed(full, fingerprint_file(p, "full"))
    assert changed and "digest" in why
    # a new modification time: fast sees it, full compares content only
    os.utime(p, ns=(stat.st_atime_ns, stat.st_mtime_ns + 10**9))
    changed, why = fingerprint_changed(fast, fingerprint_file(p, "fast"))
    assert changed and why.startswith("modification time changed, same first and last MiB"), why
    again = fingerprint_file(p, "full")
    assert not fingerprint_changed(again | {"mtime_ns": 0}, again)[0]
    # a new size: both see it
    p.write_bytes(bytes(data) + b"x")
    assert "size" in fingerprint_changed(fast, fingerprint_file(p, "fast"))[1]


def test_small_files_are_hashed_whole_in_both_modes(tmp_path):
    p = tmp_path / "small.bin"
    p.write_bytes(b"abc" * 1000)
    fast, full = fingerprint_file(p, "fast"), fingerprint_file(p, "full")
    assert fast["digest"] == full["digest"] == _blake(b"abc" * 1000) and fast["whole"]
    assert not fingerprint_changed(fast, full)[0]  # whole digests compare across modes
    with pytest.raises(ConfigError):
        fingerprint_file(p, "quick")


def test_folder_fingerprint_sees_a_changed_chunk(tmp_path):
    d = tmp_path / "rec.zarr"
    (d / "c").mkdir(parents=True)
    (d / "zarr.json").write_text("{}")
    (d / "c" / "0").write_bytes(b"\x00" * 100)
    before = fingerprint_file(d, "full")
    (d / "c" / "0").write_bytes(b"\x00" * 99 + b"\x01")
    assert fingerprint_changed(before, fingerprint_file(d, "full"))[0]
    assert fingerprint_file(d, "full")["size"] == 102


def test_design_digest_is_stable_and_sensitive():
    from scipy import signal

    sos = signal.butter(4, 10.0, fs=100.0, output="sos")
    d = Design(ResponseSpec(kind="lowpass"), "butterworth", 100.0, 4, sos, None, 120, 1e-9)
    a = design_digest(d, "odd", "auto", "0.1.0")
    assert a == design_digest(d, "odd", "auto", "0.1.0") and len(a) == 64
    assert a != design_digest(d, "even", "auto", "0.1.0")
    assert a != design_digest(d, "odd", 50, "0.1.0")
    assert a != design_digest(d, "odd", "auto", "0.2.0")


def test_design_digest_kept_per_extra_equals_a_fresh_computation():
    # The digest is kept on the design per `extra`; each value is still the SHA-256 of the
    # canonical JSON payload (hashlib and json of the standard library computed here), so
    # stores written before keep matching.
    import hashlib
    import json

    from scipy import signal

    sos = signal.butter(4, 10.0, fs=100.0, output="sos")
    d = Design(ResponseSpec(kind="lowpass"), "butterworth", 100.0, 4, sos, None, 120, 1e-9)

    def fresh(extra):
        payload = {"family": "butterworth", "sample_rate_hz": 100.0, "tolerance": 1e-9, "effective_length": 120,
                   "sos": sos.tolist(), "extra": extra}
        return hashlib.sha256(json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()).hexdigest()

    one, two = {"edge": "odd", "version": "1"}, {"version": "1", "edge": "even"}
    for _ in range(2):
        assert d.digest(one) == fresh(one) and d.digest(two) == fresh(two) and d.digest() == fresh({})
    assert d.digest({"version": "1", "edge": "odd"}) == fresh(one)  # key order does not matter


# -- discovery into a plan -----------------------------------------------------------


def test_appending_an_hour_replans_the_previous_hour(tmp_path):
    root = tmp_path / "archive"
    hourly(root, streams=("north",), hours=2)
    cfg = job(tmp_path, include=("**/*.npy",), name_pattern="{stream}/{stream}_{start:%Y%m%dT%H%M%S}",
              sample_rate_hz=1.0)
    segs, bad = discover(cfg).segments()
    records = {
        f.relpath: FileRecord(f.relpath, f.fingerprint, "x", True, f.frames, s.id) for s in segs for f in s.files
    }
    npy(root, "north/north_20240501T020000.npy", 3600, seed=9)
    segs, bad = discover(cfg).segments()
    plan = make_plan(segs, bad, records, {1.0: "x"}, {1.0: 60})
    assert [(f.status, f.redo) for f in plan.files] == [
        ("unchanged", None), ("neighbour", ((3540, 3600),)), ("new", "all"),
    ]


# -- times outside datetime's range, unforeseen errors ------------------------------------


def test_a_time_outside_years_1_to_9999_in_utc_makes_only_that_file_invalid(tmp_path):
    root = tmp_path / "archive"
    npy(root, "good.npy", 100)
    npy(root, "early.npy", 100)
    npy(root, "late.npy", 100)
    (root / "m.csv").write_text(
        "path,stream,start_time\n"
        "good.npy,buoy,2024-05-01T12:00:00Z\n"
        "early.npy,buoy,0001-01-01T00:00:00+01:00\n"  # 0000-12-31T23:00Z: no such year
        "late.npy,buoy,9999-12-31T23:30:00-01:00\n"  # 10000-01-01T00:30Z
    )
    disc = discover(job(tmp_path, include=("*.npy",), manifest="archive/m.csv", sample_rate_hz=100.0))
    assert [e.relpath for e in disc.files] == ["good.npy"]
    bad = {b.path: b for b in disc.invalid}
    assert set(bad) == {"early.npy", "late.npy"}
    assert "line 3" in bad["early.npy"].reason and "'0001-01-01T00:00:00+01:00'" in bad["early.npy"].reason
    assert "before year 1 in UTC" in bad["early.npy"].reason
    assert "line 4" in bad["late.npy"].reason and "after year 9999 in UTC" in bad["late.npy"].reason
    assert all("correct the start_time in the manifest" in b.remedy for b in bad.values())


def test_a_name_time_outside_years_1_to_9999_in_utc_makes_only_that_file_invalid(tmp_path):
    root = tmp_path / "archive"
    npy(root, "s/s_20240501T000000+0000.npy", 100)
    npy(root, "s/s_00010101T000000+0100.npy", 100)
    disc = discover(job(tmp_path, include=("**/*.npy",), name_pattern="{stream}/{stream}_{start:%Y%m%dT%H%M%S%z}",
                        sample_rate_hz=100.0))
    assert [e.relpath for e in disc.files] == ["s/s_20240501T000000+0000.npy"]
    (bad,) = disc.invalid
    assert bad.path == "s/s_00010101T000000+0100.npy"
    assert "{start:%Y%m%dT%H%M%S%z}" in bad.reason and "before year 1 in UTC" in bad.reason
    assert "rename the file" in bad.remedy


def test_an_unforeseen_error_examining_one_file_makes_only_that_file_invalid(tmp_path, monkeypatch):
    import twinpass.io.archive as archive_mod

    root = tmp_path / "archive"
    npy(root, "a.npy", 100)
    npy(root, "b.npy", 100)
    real = archive_mod._identify

    def failing(cfg, rel, *args):  # an injected fault: a bug met while examining b.npy only
        if rel == "b.npy":
            raise KeyError("surprise")
        return real(cfg, rel, *args)

    monkeypatch.setattr(archive_mod, "_identify", failing)
    disc = discover(job(tmp_path, include=("*.npy",), sample_rate_hz=100.0))
    assert [e.relpath for e in disc.files] == ["a.npy"]
    (bad,) = disc.invalid
    assert bad.path == "b.npy" and "failed unexpectedly: KeyError: 'surprise'" in bad.reason
    assert "[archive] exclude" in bad.remedy and "report" in bad.remedy


# -- paths that are not regular files ------------------------------------------------------


def _discover_within(cfg: JobConfig, seconds: float = 30.0):
    """discover(cfg) on a daemon thread; fail (instead of hanging the suite) if it blocks."""
    import threading

    out: dict = {}
    t = threading.Thread(target=lambda: out.setdefault("disc", discover(cfg)), daemon=True)
    t.start()
    t.join(seconds)
    assert not t.is_alive(), f"discovery still running after {seconds} s (blocked opening a file?)"
    return out["disc"]


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need POSIX")
def test_a_named_pipe_is_reported_not_opened(tmp_path):
    root = tmp_path / "archive"
    npy(root, "a.npy", 100)
    os.mkfifo(root / "pipe.npy")
    os.symlink(root / "pipe.npy", root / "to_pipe.npy")
    disc = _discover_within(job(tmp_path, include=("*.npy",), sample_rate_hz=100.0))
    assert [e.relpath for e in disc.files] == ["a.npy"]
    bad = {b.path: b for b in disc.invalid}
    assert set(bad) == {"pipe.npy", "to_pipe.npy"}
    assert "is a named pipe (FIFO), not a regular file" in bad["pipe.npy"].reason
    assert "reached through a symbolic link" in bad["to_pipe.npy"].reason
    assert "only regular files" in bad["pipe.npy"].remedy and "[archive] exclude" in bad["pipe.npy"].remedy


def test_a_broken_link_names_its_missing_target(tmp_path):
    root = tmp_path / "archive"
    npy(root, "a.npy", 100)
    os.symlink(root / "gone.npy", root / "link.npy")
    disc = discover(job(tmp_path, include=("*.npy",), sample_rate_hz=100.0))
    assert [e.relpath for e in disc.files] == ["a.npy"]
    (bad,) = disc.invalid
    assert bad.path == "link.npy"
    assert f"a symbolic link whose target {root / 'gone.npy'} does not exist" in bad.reason
    assert "restore the target" in bad.remedy


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need POSIX")
def test_a_reader_refuses_a_named_pipe_without_blocking(tmp_path):
    import threading

    from twinpass.errors import InputError
    from twinpass.io.readers import open_recording

    os.mkfifo(tmp_path / "pipe.wav")
    got: dict = {}

    def attempt():
        try:
            open_recording(tmp_path / "pipe.wav")
        except InputError as e:
            got["error"] = str(e)

    t = threading.Thread(target=attempt, daemon=True)
    t.start()
    t.join(30)
    assert not t.is_alive(), "opening a named pipe blocked"
    assert "is a named pipe (FIFO); only regular files can be read" in got["error"]


def test_a_touched_file_is_unchanged_when_its_digest_covers_every_byte(tmp_path):
    # Same bytes, new modification time (touch): a file hashed whole (under 2 MiB in fast
    # mode) is unchanged and nothing is refiltered; new bytes are "content changed", even
    # though the modification time changed too. A file hashed in part (fast mode, 2 MiB or
    # more) still counts a new modification time as a change.
    from test_bad_inputs import PATTERN, load, pcm16, run, stem, write_wav

    from twinpass.io.store import OutputStore
    from twinpass.job import prepare

    root = tmp_path / "archive"
    small = [stem("s", dt.datetime(2026, 3, 1, 0, 0, 10 * i)) + ".wav" for i in range(3)]
    for i, rel in enumerate(small):
        write_wav(root, rel, pcm16(1000, seed=i))  # 10 s each at 100 Hz: one segment
    big = stem("b") + ".wav"
    write_wav(root, big, pcm16(1_100_000, seed=9))  # 2.2 MB: hashed in part in fast mode
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    assert {o.status for o in run(cfg).outcomes} == {"complete"}

    def plan():
        return prepare(cfg, OutputStore.open(cfg.store_location, mode="r")).plan

    def touch(rel):
        st = (root / rel).stat()
        os.utime(root / rel, ns=(st.st_atime_ns, st.st_mtime_ns + 5 * 10**9))

    touch(small[1])
    touch(big)
    got = {f.relpath: (f.status, f.reason) for f in plan().files}
    assert {rel: got[rel][0] for rel in small} == dict.fromkeys(small, "unchanged"), got
    assert got[big][0] == "changed" and got[big][1].startswith("modification time changed, same first and last"), got
    data = bytearray((root / small[1]).read_bytes())
    data[-1] ^= 0x01
    (root / small[1]).write_bytes(bytes(data))
    touch(small[1])
    fp = plan().file(small[1])
    assert (fp.status, fp.reason) == ("changed", "content changed (digest differs)")


# -- files this user may not read ---------------------------------------------------------

_DISCOVER_INVALID = """
import json, sys
from twinpass.config import load_config
from twinpass.io.archive import discover
print(json.dumps({b.path: [b.reason, b.remedy] for b in discover(load_config(sys.argv[1])).invalid}))
"""


def test_files_without_read_permission_are_told_to_be_made_readable(tmp_path):
    # A file, a raw file's sidecar and a Zarr store's metadata with mode 000: nothing in them
    # is damaged, so the remedy is permission, not repair. Discovery runs in a process that
    # file modes apply to (root ignores them: drop the capabilities that let it).
    import json
    import shutil
    import subprocess
    import sys

    import zarr
    from test_bad_inputs import pcm16, write_config, write_wav

    from twinpass.config import load_config

    root = tmp_path / "archive"
    write_wav(root, "a.wav", pcm16(1000))
    write_wav(root, "ok.wav", pcm16(1000, seed=1))
    (root / "r.bin").write_bytes(pcm16(1000).tobytes())
    (root / "r.bin.toml").write_text('dtype = "int16"\nchannels = 1\nsample_rate_hz = 100.0\n')
    zarr.create_array(str(root / "z.zarr"), shape=(1000,), chunks=(500,), dtype="int16", zarr_format=3,
                      attributes={"sample_rate_hz": 100.0})[:] = pcm16(1000)[:, 0]
    config = write_config(tmp_path, archive={"include": ["**/*.wav", "**/*.bin", "**/*.zarr"]})
    found = discover(load_config(config))
    assert not found.invalid and len(found.files) == 4
    locked = [root / "a.wav", root / "r.bin.toml", root / "z.zarr" / "zarr.json"]
    prefix: list[str] = []
    if os.geteuid() == 0:
        if not shutil.which("setpriv"):
            pytest.skip("running as root without setpriv: file modes cannot be made to apply")
        prefix = ["setpriv", "--bounding-set", "-dac_override,-dac_read_search"]
    for p in locked:
        p.chmod(0)
    try:
        res = subprocess.run([*prefix, sys.executable, "-c", _DISCOVER_INVALID, str(config)],
                             capture_output=True, text=True, timeout=300)
    finally:
        for p in locked:
            p.chmod(0o644)
    assert res.returncode == 0, res.stderr[-2000:]
    invalid = json.loads(res.stdout.strip().splitlines()[-1])
    assert sorted(invalid) == ["a.wav", "r.bin", "z.zarr"], invalid
    for path, what in (("a.wav", "file"), ("r.bin", "sidecar"), ("z.zarr", "store")):
        reason, remedy = invalid[path]
        assert "Permission denied" in reason and "repair" not in remedy + reason, (path, reason, remedy)
        assert remedy == (f"make the {what} readable by the user running twinpass, or leave it out with "
                          "[archive] exclude"), (path, remedy)
    assert invalid["a.wav"][0] == "cannot be opened for reading (Permission denied)"
    assert str(root / "r.bin.toml") in invalid["r.bin"][0] and "zarr.json" in invalid["z.zarr"][0]


# -- folders that cannot be listed --------------------------------------------------------


def _unlistable(monkeypatch, folder: Path) -> None:
    """An injected fault: os.scandir of ``folder`` fails as for a folder without read permission
    (the tests run as root, who may list any folder)."""
    real = os.scandir

    def scandir(path="."):
        if os.path.realpath(os.fspath(path)) == os.path.realpath(folder):
            raise PermissionError(13, "Permission denied", os.fspath(path))
        return real(path)

    monkeypatch.setattr(os, "scandir", scandir)


def test_a_folder_that_cannot_be_listed_is_reported_and_its_outputs_are_kept(tmp_path, monkeypatch):
    from test_bad_inputs import PATTERN, load, pcm16, run, stem, write_wav

    from twinpass.io.store import OutputStore
    from twinpass.job import prepare

    root = tmp_path / "archive"
    a, b = stem("a") + ".wav", stem("b") + ".wav"
    write_wav(root, a, pcm16(1000))
    write_wav(root, b, pcm16(1000, seed=1))
    cfg = load(tmp_path, archive={"name_pattern": PATTERN})
    assert {o.relpath: o.status for o in run(cfg).outcomes} == {a: "complete", b: "complete"}
    before = OutputStore.open(cfg.store_location, mode="r").read("b/b_20260301T000000")

    _unlistable(monkeypatch, root / "b")
    disc = discover(cfg)
    assert [e.relpath for e in disc.files] == [a]
    (folder,) = disc.invalid
    assert folder.path == "b/" and "this folder cannot be listed (Permission denied)" in folder.reason
    assert "make the folder readable" in folder.remedy and '[archive] exclude = ["b/**"]' in folder.remedy

    plan = prepare(cfg, OutputStore.open(cfg.store_location, mode="r")).plan
    assert plan.removed == ()
    gone = plan.file(b)
    assert gone.status == "invalid" and "its folder b/ cannot be listed" in gone.reason
    assert "its output is kept" in gone.reason and gone.remedy == folder.remedy
    assert plan.file(a).status == "unchanged"

    res = run(cfg)
    assert {o.relpath: o.status for o in res.outcomes if o.status != "skipped"} == {}
    assert {p.relpath for p in res.invalid} == {"b/", b}
    after = OutputStore.open(cfg.store_location, mode="r")
    np.testing.assert_array_equal(after.read("b/b_20260301T000000"), before)
    assert b in after.file_records()


def test_an_unlistable_folder_left_out_by_exclude_is_not_reported(tmp_path, monkeypatch):
    root = tmp_path / "archive"
    npy(root, "a/x.npy", 100)
    npy(root, "private/y.npy", 100)
    _unlistable(monkeypatch, root / "private")
    cfg = job(tmp_path, include=("**/*.npy",), exclude=("private/**",), sample_rate_hz=100.0)
    disc = discover(cfg)
    assert [e.relpath for e in disc.files] == ["a/x.npy"] and disc.invalid == ()
    assert discover(job(tmp_path, include=("**/*.npy",), sample_rate_hz=100.0)).invalid[0].path == "private/"


def test_an_archive_root_that_cannot_be_listed_raises(tmp_path, monkeypatch):
    root = tmp_path / "archive"
    npy(root, "x.npy", 100)
    _unlistable(monkeypatch, root)
    with pytest.raises(ArchiveError, match="cannot be listed \\(Permission denied\\)"):
        discover(job(tmp_path, include=("*.npy",), sample_rate_hz=100.0))


# -- names that are not UTF-8 ---------------------------------------------------------------


@pytest.mark.skipif(os.name == "nt", reason="Windows file names are always Unicode")
def test_a_name_that_is_not_utf8_is_reported_with_a_rename_remedy(tmp_path, capsys):
    from test_bad_inputs import write_config

    from twinpass import cli
    from twinpass.config import load_config
    from twinpass.job import run_job

    root = tmp_path / "archive"
    npy(root, "good/x.npy", 100)
    folder = os.fsdecode(os.path.join(os.fsencode(root), b"s\xff"))  # a Latin-1 name, surrogate-escaped
    npy(Path(folder), "x.npy", 100)
    npy(root, "good/" + os.fsdecode(b"caf\xe9.npy"), 100)
    cfg = job(tmp_path, include=("**/*.npy",), sample_rate_hz=100.0)
    disc = discover(cfg)
    assert [e.relpath for e in disc.files] == ["good/x.npy"]
    bad = {b.path: b for b in disc.invalid}
    assert set(bad) == {"s\\xff/x.npy", "good/caf\\xe9.npy"}
    assert "the folder name 's\\xff' is not valid UTF-8" in bad["s\\xff/x.npy"].reason
    assert bad["s\\xff/x.npy"].remedy.startswith("rename the folder to a UTF-8 name")
    assert "the file name 'caf\\xe9.npy' is not valid UTF-8" in bad["good/caf\\xe9.npy"].reason
    for b in bad.values():
        b.message().encode("utf-8")  # printable and storable

    # a plan and a run (carry mode too) go through and name the files
    for mode in ("halo", "carry"):
        config = write_config(tmp_path, name=f"{mode}.toml", archive={"include": ["**/*.npy"], "sample_rate_hz": 100.0},
                              output={"store": f"out/{mode}.zarr"}, processing={"mode": mode})
        assert cli.main(["plan", str(config), "--json"]) == cli.EXIT_LEFT_OUT  # as the run ends
        assert "s\\\\xff/x.npy" in capsys.readouterr().out  # JSON escapes the backslash
        res = run_job(load_config(config), scheduler="threads", workers=1)
        assert {o.relpath: o.status for o in res.outcomes} == {"good/x.npy": "complete"}
        assert {p.relpath for p in res.invalid} == set(bad)


def test_name_clashes_match_their_definition_on_random_paths():
    # Two files clash when their output array names are equal or one name is a folder of
    # the other. Kept files must be clash-free and every refused file must clash with a
    # kept one (a brute-force check of that definition, over all pairs).
    import random
    from types import SimpleNamespace

    from twinpass.io.archive import _split_name_clashes
    from twinpass.io.store_util import array_name

    def clash(a: str, b: str) -> bool:
        return a == b or a.startswith(b + "/") or b.startswith(a + "/")

    rng = random.Random(7)
    parts = ["a", "b", "a b", "a_b", "c"]
    for _ in range(200):
        paths = sorted({"/".join(rng.choice(parts) for _ in range(rng.randint(1, 3))) + rng.choice([".wav", ".npy"])
                        for _ in range(rng.randint(2, 12))})
        keep, bad = _split_name_clashes([SimpleNamespace(relpath=p, output_name=None, stream="s") for p in paths])
        kept = [array_name(e.relpath) for e in keep]
        assert not any(clash(x, y) for i, x in enumerate(kept) for y in kept[i + 1:]), paths
        assert all(any(clash(array_name(b.path), k) for k in kept) for b in bad), paths
        assert len(keep) + len(bad) == len(paths)


def test_files_selected_but_for_the_letter_case_are_noted(tmp_path):
    # Field recorders often name files A001.WAV; "**/*.wav" matches case exactly, so such
    # files are not selected, and discovery says so rather than leaving them out silently.
    root = tmp_path / "archive"
    wav(root, "s1/s1_20240501T000000.wav", 800)
    wav(root, "s1/s1_20240501T000010.WAV", 800)
    wav(root, "s2/skip/x.WAV", 800)
    disc = discover(job(tmp_path, include=("**/*.wav",), exclude=("s2/skip/**",), sample_rate_hz=8000.0))
    assert [f.relpath for f in disc.files] == ["s1/s1_20240501T000000.wav"]
    (note,) = [w for w in disc.warnings if "letter case" in w]
    assert note.startswith("1 file(s) match [archive] include but for the letter case") and "s1_20240501T000010.WAV" in note
    assert "x.WAV" not in note  # excluded anyway
    disc = discover(job(tmp_path, include=("**/*.wav", "**/*.WAV"), exclude=("s2/skip/**",)))
    assert len(disc.files) == 2 and not [w for w in disc.warnings if "letter case" in w]


@pytest.mark.parametrize("mode", ["fast", "full"])
def test_a_zarr_input_rewritten_in_one_chunk_changes_in_those_samples_only(tmp_path, mode):
    # Written and rewritten with zarr-python (chunks of 100 samples along time); which samples
    # count as changed is a twinpass rule: the rows of chunks whose files changed.
    import zarr

    from twinpass.core.plan import changed_spans

    path = tmp_path / "a.zarr"
    arr = zarr.create_array(store=str(path), shape=(450, 2), dtype="float32", chunks=(100, 2))
    arr[:] = np.random.default_rng(0).standard_normal((450, 2)).astype(np.float32)
    arr.attrs.update(sample_rate_hz=10.0, complete=True)
    for f in path.rglob("*"):  # written a minute ago: a rewrite now has another modification time
        os.utime(f, ns=(f.stat().st_atime_ns, f.stat().st_mtime_ns - 60 * 10**9))
    before = fingerprint_file(path, mode)
    arr.attrs.update(complete=False, checks={"worst": 1.0})  # attributes are no samples
    assert not fingerprint_changed(before, fingerprint_file(path, mode))[0]
    arr[250:260] = 0.5
    arr[420:] = -0.5
    after = fingerprint_file(path, mode)
    assert fingerprint_changed(before, after)[0]
    assert changed_spans(before, after, 450) == ((200, 300), (400, 450))
    arr[:] = 1.0
    assert changed_spans(before, fingerprint_file(path, mode), 450) == ((0, 450),)
    # another shape: the rows cannot be compared
    zarr.create_array(store=str(path), shape=(450, 2), dtype="float32", chunks=(50, 2), overwrite=True)
    assert changed_spans(before, fingerprint_file(path, mode), 450) is None


def test_the_letter_case_note_suggests_globs_for_the_suffixes_found(tmp_path):
    # Globs match case exactly (as POSIX fnmatch(3) without FNM_CASEFOLD, from memory): NPY
    # files named *.NPY need a "**/*.NPY" pattern, not the WAV example of a field recorder.
    root = tmp_path / "archive"
    npy(root, "s1/s1_20240501T000000.npy", 800)
    for rel in ("s1/s1_20240501T000010.NPY", "s2/s2_20240501T000000.Npy"):
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        with open(root / rel, "wb") as fh:  # numpy.save adds ".npy" to a name ending otherwise
            np.save(fh, np.zeros((800, 1), dtype=np.float32))
    disc = discover(job(tmp_path, include=("**/*.npy",), sample_rate_hz=8000.0))
    (note,) = [w for w in disc.warnings if "letter case" in w]
    assert '(e.g. "**/*.NPY", "**/*.Npy")' in note and "WAV" not in note
    disc = discover(job(tmp_path, include=("**/*.npy", "**/*.NPY", "**/*.Npy"), sample_rate_hz=8000.0))
    assert len(disc.files) == 3 and not [w for w in disc.warnings if "letter case" in w]


def test_absent_chunks_of_a_zarr_input_are_noted(tmp_path):
    # Zarr reads an absent chunk as the fill value (what zarr-python itself returns below);
    # that is how Zarr stores chunks equal to it, but also what a chunk lost in a copy gives,
    # so discovery notes it.
    import shutil

    import zarr

    root = tmp_path / "archive"
    arr = zarr.create_array(store=str(root / "site" / "a.zarr"), shape=(400, 2), dtype="float32", chunks=(100, 2))
    arr[:] = np.ones((400, 2), dtype="float32")
    arr.attrs.update({"sample_rate_hz": 100.0, "start_time": "2024-05-01T00:00:00Z"})
    disc = discover(job(tmp_path, include=("**/*.zarr",)))
    assert [f.relpath for f in disc.files] == ["site/a.zarr"] and disc.warnings == ()
    shutil.rmtree(root / "site" / "a.zarr" / "c" / "2")  # the third chunk's files
    assert np.all(zarr.open_array(str(root / "site" / "a.zarr"), mode="r")[200:300] == 0.0)
    disc = discover(job(tmp_path, include=("**/*.zarr",)))
    assert [f.relpath for f in disc.files] == ["site/a.zarr"]
    (note,) = disc.warnings
    assert note.startswith("site/a.zarr: 1 of its 4 chunks are absent and read as the fill value 0.0"), note


def test_channel_major_arrays_are_left_out_above_the_channel_limit(tmp_path):
    # Arrays are time-major, (samples, channels) (numpy.save and zarr-python store the shape
    # given); one saved transposed, (2, 2000), would be 2000 channels of 2 samples, filtered
    # along the wrong axis. 1024 channels is the documented default of [archive] max_channels.
    import zarr

    root = tmp_path / "archive"
    x = np.random.default_rng(0).standard_normal((2000, 2)).astype(np.float32)
    (root / "s").mkdir(parents=True)
    np.save(root / "s" / "cm.npy", x.T.copy())
    arr = zarr.create_array(store=str(root / "z" / "cm.zarr"), shape=(2, 2000), dtype="float32", chunks=(2, 500))
    arr[:] = x.T
    arr.attrs.update(sample_rate_hz=100.0)
    disc = discover(job(tmp_path, include=("**/*.npy", "**/*.zarr"), sample_rate_hz=100.0))
    assert disc.files == ()
    bad = reasons(disc)
    assert set(bad) == {"s/cm.npy", "z/cm.zarr"}
    for rel in bad:
        assert bad[rel].startswith("2000 channels, more than its 2 samples and than [archive] max_channels = "
                                   "1024: it looks stored channel-major"), bad[rel]
        assert "store it time-major, shape (samples, channels): transpose it" in bad[rel]
        assert "raise [archive] max_channels to 2000" in bad[rel]
    # a limit raised for such a file lets it through, with the reader's note (NPY and Zarr alike)
    disc = discover(job(tmp_path, include=("**/*.npy", "**/*.zarr"), sample_rate_hz=100.0, max_channels=2000))
    assert sorted(f.relpath for f in disc.files) == ["s/cm.npy", "z/cm.zarr"]
    for rel in ("s/cm.npy", "z/cm.zarr"):
        assert f"{rel}: shape (2, 2000) has more channels than samples; arrays must be time-major " \
               "(samples, channels): transpose it if it is channel-major" in disc.warnings


def test_a_short_file_of_more_channels_than_samples_within_the_limit_is_filtered(tmp_path):
    # The last file of a stream may hold one frame of 8 channels: more channels than samples,
    # but a plausible channel count, so it is read (with a note), and joins its stream.
    root = tmp_path / "archive"
    npy(root, "s1/s1_20240501T000000.npy", 100, channels=8)
    npy(root, "s1/s1_20240501T000010.npy", 1, channels=8, seed=1)  # 100 frames at 10 Hz = 10 s before
    disc = discover(job(tmp_path, name_pattern="{stream}/{stream}_{start:%Y%m%dT%H%M%S}", sample_rate_hz=10.0))
    assert disc.invalid == ()
    assert [f.channels for f in disc.files] == [8, 8]
    assert any(w.startswith("s1/s1_20240501T000010.npy: shape (1, 8) has more channels than samples")
               for w in disc.warnings)
    segments, bad = disc.segments()
    assert bad == [] and [s.frames for s in segments] == [101]


def test_a_file_of_more_samples_than_channels_is_read_whatever_its_channel_count(tmp_path):
    # Many-channel recordings (sensor arrays of thousands of channels) are time-major with
    # more samples than channels: the channel limit does not apply to them.
    root = tmp_path / "archive"
    npy(root, "wide.npy", 20, channels=12)
    npy(root, "tall.npy", 10, channels=12, seed=1)
    disc = discover(job(tmp_path, sample_rate_hz=10.0, max_channels=8))
    assert [f.relpath for f in disc.files] == ["wide.npy"]
    assert reasons(disc)["tall.npy"].startswith("12 channels, more than its 10 samples and than [archive] "
                                                "max_channels = 8")


def test_an_overlap_names_where_the_start_times_were_read(tmp_path):
    # Broadcast WAVE bext (EBU Tech 3285): OriginationDate/OriginationTime give the start; two
    # files of one folder (one stream) 400 frames at 8000 Hz (50 ms) long, the second starting
    # 20 ms into the first, a third at the very start of the second. Which source is named is a
    # twinpass rule: where each start time was read.
    root = tmp_path / "archive"
    for rel in ("field/a.wav", "field/b.wav", "field/c.wav"):
        wav(root, rel, 400)
    add_bext(root / "field/a.wav", "2024-05-02", "06:30:00")
    for rel in ("field/b.wav", "field/c.wav"):  # TimeReference: samples since midnight (at 8000 Hz)
        add_bext(root / rel, "2024-05-02", "00:00:00")
        blob = bytearray((root / rel).read_bytes())
        at = blob.index(b"bext") + 8 + 338
        blob[at:at + 8] = struct.pack("<Q", (6 * 3600 + 30 * 60) * 8000 + 160)
        (root / rel).write_bytes(bytes(blob))
    disc = discover(job(tmp_path))
    assert by_path(disc)["field/a.wav"].start_source == "the file's bext chunk"
    assert reasons(disc)["field/c.wav"].startswith("same stream 'field' and start time")
    _, bad = disc.segments()
    (over,) = [b for b in bad if b.path == "field/b.wav"]
    assert over.reason.startswith("overlaps field/a.wav of stream 'field' by 240.0 samples")
    assert over.remedy.startswith("correct the start time of one of the two files (in the file's bext chunk), ")
    # the same files named by a manifest: the manifest is where to correct them
    (tmp_path / "m.csv").write_text("path,stream,start_time\n"
                                    "field/a.wav,f,2024-05-02T06:30:00Z\nfield/b.wav,f,2024-05-02T06:30:00.02Z\n")
    disc = discover(job(tmp_path, manifest="m.csv", exclude=("field/c.wav",)))
    _, bad = disc.segments()
    (over,) = bad
    assert over.remedy.startswith(f"correct the start time of one of the two files (in the manifest {tmp_path / 'm.csv'}), ")


def test_files_selected_but_for_a_suffix_their_reader_accepts_are_noted(tmp_path):
    # The WAV reader opens .wav, .wave, .bwf (Broadcast WAVE, EBU Tech 3285) and .rf64 (EBU
    # Tech 3306) files; "**/*.wav" selects only the first, so discovery notes the others, as
    # it notes A.WAV, rather than leaving them out silently.
    root = tmp_path / "archive"
    wav(root, "s1/a.wav", 800)
    for rel in ("s1/b.bwf", "s1/c.rf64", "s1/d.wave", "skip/e.bwf", "s1/notes.txt"):
        wav(root, rel, 800)
    disc = discover(job(tmp_path, include=("**/*.wav",), exclude=("skip/**",)))
    assert [f.relpath for f in disc.files] == ["s1/a.wav"]
    (note,) = [w for w in disc.warnings if "suffix" in w]
    assert note.startswith("3 file(s) have a suffix that their reader accepts as well as the one [archive] include "
                           "selects, but were not selected: s1/b.bwf, s1/c.rf64, s1/d.wave; add patterns for them "
                           '(e.g. "**/*.bwf", "**/*.rf64", "**/*.wave")'), note
    disc = discover(job(tmp_path, include=("**/*.wav", "**/*.bwf", "**/*.rf64", "**/*.wave"), exclude=("skip/**",)))
    assert len(disc.files) == 4 and not [w for w in disc.warnings if "suffix" in w]


def test_an_empty_folder_named_like_a_recording_is_noted(tmp_path):
    root = tmp_path / "archive"
    wav(root, "s1/a.wav", 800)
    (root / "s1" / "b.wav").mkdir()  # a folder, not a recording
    wav(root, "s2/c.wav/inner.wav", 800)  # a folder named like one, holding one: read, not noted
    (root / "s3" / "plain").mkdir(parents=True)  # no recording's name: not noted
    disc = discover(job(tmp_path, include=("**/*.wav",)))
    assert sorted(f.relpath for f in disc.files) == ["s1/a.wav", "s2/c.wav/inner.wav"] and disc.invalid == ()
    (note,) = [w for w in disc.warnings if "folder" in w]
    assert note.startswith("1 folder(s) named like recordings match [archive] include but hold no file it selects: "
                           "s1/b.wav/; a recording is a file"), note
    disc = discover(job(tmp_path, include=("**/*.wav",), exclude=("s1/b.wav",)))
    assert not [w for w in disc.warnings if "folder" in w]
