"""The Zarr v3 output store: layout, chunk-aligned writes, block tables, locking, safety.

Every test builds a real Zarr store (in ``tmp_path`` or fsspec's in-memory file system)
and reads it back, often through ``zarr.json`` with the standard ``json`` module.
"""

from __future__ import annotations

import datetime as dt
import errno
import json
import logging
import os
import socket
import subprocess
import sys
import uuid
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import google_crc32c  # CRC-32C reference implementation (Zarr's own dependency)
import numpy as np
import pytest
import zarr
from zarr.storage import LocalStore

from twinpass.errors import RunStoppedError, StoreError, StoreLockedError, UnsafePathError
from twinpass.io.store import (
    BlockRecord,
    BlockStatus,
    OutputStore,
    array_name,
    json_safe,
    write_block_data,
)
from twinpass.io import store as store_module
from twinpass.io import store_lock
from twinpass.io.store import RUNS_IN_ROOT, _chunk_encoder

SOURCE = "deck-north/deck-north_20260301T000000.wav"
NAME = "deck-north/deck-north_20260301T000000"
COLUMNS = ["passband_db", "phase_deg"]


def _strict_json(text: str) -> object:
    """Parse JSON as RFC 8259 defines it: NaN and Infinity are not JSON values."""

    def refuse(token: str) -> object:
        raise ValueError(f"non-JSON constant {token}")

    return json.loads(text, parse_constant=refuse)


def _attrs(source: str = SOURCE, **extra: object) -> dict:
    return {
        "sample_rate_hz": np.float64(1000.0),
        "source": source,
        "source_fingerprint": {"size": np.int64(1234), "digest": "ab12"},
        "stream": "deck-north",
        "segment": "deck-north#0",
        "start_time": dt.datetime(2026, 3, 1, 0, 0, tzinfo=dt.timezone.utc),
        "edge_zone_samples": (np.int32(30), 30),
        "filter": {"family": "butterworth", "order": 4, "sos": np.ones((2, 6)), "tolerance": np.float32(1e-9)},
        "design_digest": "d1",
        "checks": {"worst_db": np.nan, "peak": np.inf},
        **extra,
    }


def _prepare(store: OutputStore, name: str = NAME, *, frames: int = 100, channels: int = 3,
             chunk: int = 20, spans=((0, 40), (40, 80), (80, 100)), keep_done: bool = True,
             compression: str = "lz4", dtype: str = "float32", source: str = SOURCE, seam: int = 4):
    return store.prepare_file(
        name, frames=frames, channels=channels, dtype=dtype, chunk_samples=chunk,
        compression=compression, attrs=_attrs(source), spans=list(spans),
        n_figures_columns=COLUMNS, seam_samples=seam, keep_done=keep_done,
    )


def _finish_block(store: OutputStore, i: int, status: BlockStatus = BlockStatus.PASS,
                  name: str = NAME, channels: int = 3, seam: int = 4) -> np.ndarray:
    """Write block i's data (value i + 1) then record it, as the engine does."""
    a, b = store.read_block_table(name, figures=False, seams=False).span[i]
    data = np.full((b - a, channels), i + 1.0)
    write_block_data(store.location, name, int(a), data)
    figures = np.arange(channels * len(COLUMNS), dtype=float).reshape(channels, len(COLUMNS)) + i
    seams = np.full((4, seam, channels), float(i))
    store.record_block(name, i, status, figures, seams, None)
    return data


@pytest.fixture
def store(tmp_path: Path) -> OutputStore:
    return OutputStore.open(str(tmp_path / "out.zarr"))


# -- layout ----------------------------------------------------------------------


@pytest.mark.parametrize("compression, cname, clevel", [("none", None, None), ("lz4", "lz4", 5), ("zstd", "zstd", 1)])
def test_layout_matches_zarr_v3_metadata(tmp_path: Path, compression: str, cname: str | None, clevel: int | None):
    root = tmp_path / "out.zarr"
    store = OutputStore.open(str(root))
    _prepare(store, compression=compression)
    # Zarr v3 core specification, "Array metadata": zarr.json holds zarr_format, node_type,
    # shape, data_type, chunk_grid (regular, chunk_shape), fill_value, codecs, attributes
    # and the optional dimension_names.
    meta = _strict_json((root / NAME / "zarr.json").read_text())
    assert meta["zarr_format"] == 3 and meta["node_type"] == "array"
    assert meta["shape"] == [100, 3]
    assert meta["data_type"] == "float32"
    assert meta["chunk_grid"] == {"name": "regular", "configuration": {"chunk_shape": [20, 3]}}
    # Frames no block wrote read as NaN; the v3 specification's "fill_value" section writes
    # a floating-point NaN as the JSON string "NaN".
    assert meta["fill_value"] == "NaN"
    assert meta["dimension_names"] == ["time", "channel"]
    blosc = [c for c in meta["codecs"] if c["name"] == "blosc"]
    if cname is None:
        assert blosc == []
    else:
        # Zarr v3 blosc codec specification: configuration cname, clevel, shuffle, typesize, blocksize.
        assert len(blosc) == 1
        cfg = blosc[0]["configuration"]
        assert (cfg["cname"], cfg["clevel"], cfg["shuffle"]) == (cname, clevel, "bitshuffle")
    # Zarr v3 crc32c codec specification: the last codec, four bytes of CRC-32C at the end of
    # each chunk, little-endian, over the bytes before them.
    assert meta["codecs"][-1] == {"name": "crc32c"}
    data = _finish_block(store, 0)
    for key in ("0", "1"):
        raw = (root / NAME / "c" / key / "0").read_bytes()
        assert raw[-4:] == google_crc32c.value(raw[:-4]).to_bytes(4, "little")
    np.testing.assert_array_equal(zarr.open_array(str(root), path=NAME, mode="r")[0:40], data)  # Zarr checks them
    group_meta = _strict_json((root / "zarr.json").read_text())
    assert group_meta["zarr_format"] == 3 and group_meta["node_type"] == "group"

    attrs = meta["attributes"]
    assert attrs["complete"] is False
    assert attrs["sample_rate_hz"] == 1000.0
    assert attrs["edge_zone_samples"] == [30, 30]
    assert attrs["checks"] == {"worst_db": None, "peak": None}  # RFC 8259: no NaN/Infinity in JSON
    assert attrs["filter"]["sos"] == [[1.0] * 6] * 2
    # ISO 8601 extended format with UTC offset
    assert dt.datetime.fromisoformat(attrs["start_time"]) == dt.datetime(2026, 3, 1, tzinfo=dt.timezone.utc)
    assert attrs["blocks"] == {"count": 3, "block_samples": 40, "chunk_samples": 20}

    # block tables, hidden under _twinpass/blocks/<array name>/
    tables = root / "_twinpass" / "blocks" / NAME
    status = _strict_json((tables / "status" / "zarr.json").read_text())
    assert (status["shape"], status["data_type"]) == ([3], "int8")
    span = _strict_json((tables / "span" / "zarr.json").read_text())
    assert (span["shape"], span["data_type"]) == ([3, 2], "int64")
    figures = json.loads((tables / "figures" / "zarr.json").read_text())  # fill_value "NaN" is the v3 encoding
    assert figures["shape"] == [3, 3, 2]
    assert figures["chunk_grid"]["configuration"]["chunk_shape"] == [1, 3, 2]
    assert figures["attributes"]["columns"] == COLUMNS
    seams = json.loads((tables / "seams" / "zarr.json").read_text())
    assert seams["shape"] == [3, 4, 4, 3]
    assert seams["chunk_grid"]["configuration"]["chunk_shape"] == [1, 4, 4, 3]
    assert store.list_arrays() == [NAME]


def test_block_table_documents_are_the_ones_zarr_writes_node_by_node(tmp_path: Path):
    # Reference: zarr-python creating the group and each array with its own calls. The
    # store writes a table's five documents in one call; they must not differ.
    store = OutputStore.open(str(tmp_path / "out.zarr"))
    _prepare(store)
    ref = zarr.open_group(LocalStore(tmp_path / "ref.zarr"), mode="w", zarr_format=3)
    group = ref.create_group("t", attributes={"errors": {}})
    nan = float("nan")
    group.create_array("status", shape=(3,), dtype="int8", chunks=(3,), fill_value=0, compressors=None)
    group.create_array("span", shape=(3, 2), dtype="int64", chunks=(3, 2), fill_value=-1, compressors=None)
    group.create_array("figures", shape=(3, 3, 2), dtype="float64", chunks=(1, 3, 2), fill_value=nan,
                       compressors=None, attributes={"columns": COLUMNS})
    group.create_array("seams", shape=(3, 4, 4, 3), dtype="float64", chunks=(1, 4, 4, 3), fill_value=nan,
                       compressors=None)
    ours = tmp_path / "out.zarr" / "_twinpass" / "blocks" / NAME
    for key in ("", "status", "span", "figures", "seams"):
        assert json.loads((ours / key / "zarr.json").read_text()) == \
            json.loads((tmp_path / "ref.zarr" / "t" / key / "zarr.json").read_text()), key


@pytest.mark.parametrize("compression", ["none", "lz4", "zstd"])
def test_output_array_and_attribute_documents_are_the_ones_zarr_writes(tmp_path: Path, compression: str):
    # Reference: zarr-python creating the array, replacing and merging its attributes with
    # its own calls. In a local store twinpass writes these documents itself.
    store = OutputStore.open(str(tmp_path / "out.zarr"))
    _prepare(store, compression=compression)
    ref = zarr.open_group(LocalStore(tmp_path / "ref.zarr"), mode="w", zarr_format=3)
    ours = tmp_path / "out.zarr" / NAME / "zarr.json"
    theirs = tmp_path / "ref.zarr" / NAME / "zarr.json"
    attrs = json.loads(ours.read_text())["attributes"]
    arr = ref.create_array(NAME, shape=(100, 3), dtype="float32", chunks=(20, 3),
                           compressors=store_module._compressors(compression), fill_value=float("nan"),
                           dimension_names=("time", "channel"), attributes=attrs)
    assert json.loads(ours.read_text()) == json.loads(theirs.read_text())
    # the parent group made on the way, as Zarr makes it
    assert json.loads((ours.parent.parent / "zarr.json").read_text()) == \
        json.loads((theirs.parent.parent / "zarr.json").read_text())
    for i in range(3):
        _finish_block(store, i)
    store.set_complete(NAME, True, {"worst": 0.5})
    store.update_attrs(NAME, segment="deck-north#1")
    arr.update_attributes({"complete": True, "checks": {"worst": 0.5}})
    arr.update_attributes({"segment": "deck-north#1"})
    assert json.loads(ours.read_text()) == json.loads(theirs.read_text())
    # and Zarr reads what twinpass wrote, attributes and data
    back = zarr.open_array(LocalStore(tmp_path / "out.zarr"), path=NAME, mode="r")
    assert back.attrs["complete"] is True and back.attrs["segment"] == "deck-north#1"
    assert back[45, 0] == 2.0


def test_attributes_already_held_are_not_written_again(store: OutputStore, tmp_path: Path):
    # An unchanged file's placement is confirmed on every run that touches its segment: the
    # same values leave its metadata document alone (not even renamed over); a changed one,
    # or the same number of another JSON type, is written.
    _prepare(store)
    doc = tmp_path / "out.zarr" / NAME / "zarr.json"
    store.update_attrs(NAME, segment="deck-north#1", joins=[None, "b.wav"], edge_zone_samples=12)
    before = doc.stat().st_ino, doc.stat().st_mtime_ns
    store.update_attrs(NAME, segment="deck-north#1", joins=(None, "b.wav"), edge_zone_samples=np.int64(12))
    assert (doc.stat().st_ino, doc.stat().st_mtime_ns) == before
    store.update_attrs(NAME, edge_zone_samples=12.0)
    assert json.loads(doc.read_text())["attributes"]["edge_zone_samples"] == 12.0
    store.update_attrs(NAME, segment="deck-north#2")
    assert json.loads(doc.read_text())["attributes"]["segment"] == "deck-north#2"


def test_block_table_reads_equal_zarrs_own_reads(store: OutputStore, tmp_path: Path):
    # Reference: zarr-python reading the same arrays. Local block tables are read by
    # twinpass from their chunk files: missing chunks (blocks not recorded) must read as
    # the fill value, and a status column longer than one chunk must come back whole.
    n = store_module._TABLE_CHUNK + 3
    spans = [(i * 20, i * 20 + 20) for i in range(n)]
    _prepare(store, frames=20 * n, spans=spans)
    for i in (0, 2, n - 1):
        _finish_block(store, i, BlockStatus.WARN if i == 2 else BlockStatus.PASS)
    store.record_block(NAME, 1, BlockStatus.ERROR, None, None, "reader failed")
    table = store.read_block_table(NAME)
    group = zarr.open_group(LocalStore(tmp_path / "out.zarr"), path=f"_twinpass/blocks/{NAME}", mode="r")
    for key in ("status", "span", "figures", "seams"):
        np.testing.assert_array_equal(getattr(table, key), group[key][:], err_msg=key)
    assert table.status[: 3].tolist() == [1, 4, 2] and table.status[-1] == 1
    assert np.isnan(table.figures[3]).all() and table.errors == {1: "reader failed"}


@pytest.mark.parametrize("compression", ["none", "lz4"])
def test_rows_written_by_the_store_are_byte_for_byte_zarrs(tmp_path: Path, compression: str):
    # Reference: zarr-python writing the same rows into an array of the same metadata,
    # including the array's last, partial chunk (filled with the fill value by Zarr).
    root = zarr.open_group(LocalStore(tmp_path / "s.zarr"), mode="w", zarr_format=3)
    values = np.arange(23 * 4, dtype=np.float64).reshape(23, 4)
    ours, theirs = (root.create_array(k, shape=(23, 4), chunks=(5, 4), dtype="float64", fill_value=np.nan,
                                      compressors=store_module._compressors(compression)) for k in ("a", "b"))
    store_module.write_rows(ours, 0, values)
    theirs[:] = values
    files = sorted(p.relative_to(tmp_path / "s.zarr" / "b") for p in (tmp_path / "s.zarr" / "b").rglob("c/*/*"))
    assert len(files) == 5
    for f in files:
        assert (tmp_path / "s.zarr" / "a" / f).read_bytes() == (tmp_path / "s.zarr" / "b" / f).read_bytes(), f
    np.testing.assert_array_equal(zarr.open_array(LocalStore(tmp_path / "s.zarr"), path="a", mode="r")[:], values)
    with pytest.raises(StoreError, match="whole 5-row chunks"):
        store_module.write_rows(ours, 3, values[:4])


def test_arrays_for_block_writes_are_made_from_their_documents(store: OutputStore, tmp_path: Path):
    # Reference: zarr-python opening the array itself.
    _prepare(store)
    ours = store_module._writable_array(store.location, NAME)
    theirs = zarr.open_array(LocalStore(tmp_path / "out.zarr"), path=NAME, mode="r+")
    assert repr(ours.metadata) == repr(theirs.metadata)  # by value: the NaN fill value is unequal to itself
    assert ours.path == theirs.path and ours.chunks == theirs.chunks
    with pytest.raises(StoreError, match="not found"):
        write_block_data(store.location, "deck-north", 0, np.zeros((20, 3)))  # a group, not an array


def test_json_safe_converts_numpy_nan_tuples_and_datetimes():
    out = json_safe({
        "a": np.float32(0.5), "b": np.int16(-3), "c": (1, np.nan), "d": np.array([[np.inf, 2.0]]),
        "e": dt.date(2026, 3, 1), "f": np.bool_(True), 7: Path("x/y"), "g": np.datetime64("2026-03-01T00:00"),
    })
    # RFC 8259 forbids NaN/Infinity: they become null
    assert json.dumps(out, allow_nan=False)
    assert out == {"a": 0.5, "b": -3, "c": [1, None], "d": [[None, 2.0]], "e": "2026-03-01", "f": True,
                   "7": "x/y", "g": "2026-03-01T00:00"}
    with pytest.raises(StoreError, match="object"):
        json_safe({"bad": object()})


# -- data writes -----------------------------------------------------------------


def test_chunk_aligned_writes_from_threads_land_exactly(store: OutputStore, tmp_path: Path):
    frames, chunk = 1010, 50  # last block ends mid-chunk at the array end
    spans = [(a, min(a + 100, frames)) for a in range(0, frames, 100)]
    _prepare(store, frames=frames, chunk=chunk, spans=spans, channels=4)
    rng = np.random.default_rng(7)
    expected = rng.standard_normal((frames, 4)).astype(np.float32)
    expected[200:300] = 0.0  # an all-fill block must still be stored
    with ThreadPoolExecutor(4) as pool:
        list(pool.map(lambda s: write_block_data(store.location, NAME, s[0], expected[s[0]:s[1]]), spans))
    # reference: the same values assembled in memory, bit for bit
    np.testing.assert_array_equal(store.read(NAME), expected)
    np.testing.assert_array_equal(store.read(NAME, 990, 1010), expected[990:1010])
    chunk_dir = tmp_path / "out.zarr" / NAME / "c"
    assert sorted(int(p.name) for p in chunk_dir.iterdir()) == list(range(21))  # ceil(1010 / 50) chunk rows


@pytest.mark.parametrize("compression", ["lz4", "zstd", "none"])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_block_chunks_are_the_bytes_zarr_writes(tmp_path: Path, compression: str, dtype: str):
    # Reference: zarr-python writing the same values through its own codec pipeline. Block
    # writes to a local store encode and write chunk files themselves; the files must be
    # byte for byte Zarr's, including the edge chunk completed with the fill value.
    frames, chunk = 1010, 300
    spans = [(0, 600), (600, 900), (900, 1010)]
    rng = np.random.default_rng(11)
    values = rng.standard_normal((frames, 3))
    ours = OutputStore.open(str(tmp_path / "ours.zarr"))
    _prepare(ours, frames=frames, chunk=chunk, spans=spans, compression=compression, dtype=dtype)
    theirs = OutputStore.open(str(tmp_path / "theirs.zarr"))
    _prepare(theirs, frames=frames, chunk=chunk, spans=spans, compression=compression, dtype=dtype)
    for a, b in spans:
        write_block_data(ours.location, NAME, a, values[a:b])
    ref = zarr.open_array(LocalStore(tmp_path / "theirs.zarr"), path=NAME, mode="r+")
    assert _chunk_encoder(ref) is not None  # the arrays twinpass creates take the direct path
    ref[:, :] = values.astype(dtype)
    for i in range(4):
        key = Path(NAME, "c", str(i), "0")
        assert (tmp_path / "ours.zarr" / key).read_bytes() == (tmp_path / "theirs.zarr" / key).read_bytes()
    np.testing.assert_array_equal(ours.read(NAME), values.astype(dtype))
    assert not list((tmp_path / "ours.zarr" / NAME).rglob("*.partial"))  # no temporary file left


def test_rewritten_blocks_overwrite_their_chunk_files_and_never_write_through_links(tmp_path: Path):
    # Reference: zarr-python reading the array back through its own codec pipeline. A rerun
    # writes a block's chunk files over the previous run's in place (no new file), whether the
    # new compressed chunk is longer or shorter; a chunk file that is a symbolic link, or that
    # a hard-linked snapshot of the store shares, is replaced instead, leaving the other file
    # as it was.
    frames, chunk = 900, 300
    spans = [(0, 300), (300, 600), (600, 900)]
    store = OutputStore.open(str(tmp_path / "out.zarr"))
    _prepare(store, frames=frames, chunk=chunk, spans=spans)
    keys = [tmp_path / "out.zarr" / NAME / "c" / str(i) / "0" for i in range(3)]
    noise = np.random.default_rng(5).standard_normal((frames, 3))
    for a, b in spans:  # first run: noise compresses little
        write_block_data(store.location, NAME, a, noise[a:b])
    inodes = [k.stat().st_ino for k in keys]
    snapshot = tmp_path / "snapshot-chunk"
    os.link(keys[1], snapshot)  # a hard-linked snapshot shares chunk 1
    before = snapshot.read_bytes()
    outside = tmp_path / "outside-chunk"
    outside.write_bytes(b"not twinpass's")
    keys[2].unlink()
    keys[2].symlink_to(outside)  # chunk 2 is a link out of the store
    smooth = np.full((frames, 3), 0.25)  # compresses well
    for a, b in spans:
        write_block_data(store.location, NAME, a, smooth[a:b])
    ref = zarr.open_array(LocalStore(tmp_path / "out.zarr"), path=NAME, mode="r")
    np.testing.assert_array_equal(ref[:], smooth.astype(np.float32))
    assert keys[0].stat().st_ino == inodes[0]  # overwritten in place, shorter than before
    assert keys[0].stat().st_size < len(before)
    assert snapshot.read_bytes() == before and keys[1].stat().st_ino != inodes[1]
    assert outside.read_bytes() == b"not twinpass's" and not keys[2].is_symlink()
    for a, b in spans:  # and back to the longer chunks, still in place
        write_block_data(store.location, NAME, a, noise[a:b])
    np.testing.assert_array_equal(ref[:], noise.astype(np.float32))
    assert keys[0].stat().st_ino == inodes[0]
    assert not list((tmp_path / "out.zarr" / NAME).rglob("*.partial"))


def test_block_writes_to_fsspec_stores_go_through_zarr():
    store = OutputStore.open(f"memory://blocks-{uuid.uuid4().hex}.zarr")
    _prepare(store)
    values = np.arange(300.0).reshape(100, 3)
    for a, b in ((0, 40), (40, 80), (80, 100)):
        write_block_data(store.location, NAME, a, values[a:b])
    np.testing.assert_array_equal(store.read(NAME), values.astype(np.float32))


def test_misaligned_writes_are_refused(store: OutputStore):
    _prepare(store)
    with pytest.raises(StoreError, match="not aligned"):
        write_block_data(store.location, NAME, 10, np.zeros((30, 3)))  # starts mid-chunk
    with pytest.raises(StoreError, match="not aligned"):
        write_block_data(store.location, NAME, 0, np.zeros((30, 3)))  # ends mid-chunk, not at the end
    with pytest.raises(StoreError, match="outside"):
        write_block_data(store.location, NAME, 80, np.zeros((40, 3)))
    with pytest.raises(StoreError, match="shape"):
        write_block_data(store.location, NAME, 0, np.zeros((40, 2)))
    with pytest.raises(StoreError, match="not found"):
        write_block_data(store.location, "deck-north/missing", 0, np.zeros((20, 3)))
    np.testing.assert_array_equal(store.read(NAME), np.full((100, 3), np.nan, np.float32))  # unwritten: fill


# -- block tables -----------------------------------------------------------------


def test_block_table_round_trip(store: OutputStore):
    table = _prepare(store)
    assert table.status.tolist() == [0, 0, 0]
    assert table.span.tolist() == [[0, 40], [40, 80], [80, 100]]
    _finish_block(store, 0)
    _finish_block(store, 1, BlockStatus.WARN)
    write_block_data(store.location, NAME, 80, np.ones((20, 3)))
    store.record_block(NAME, 2, BlockStatus.ERROR, None, None, "ValueError: boom")
    t = store.read_block_table(NAME)
    assert t.status.tolist() == [BlockStatus.PASS, BlockStatus.WARN, BlockStatus.ERROR]
    assert t.columns == tuple(COLUMNS) and t.seam_samples == 4
    assert t.errors == {2: "ValueError: boom"}
    np.testing.assert_array_equal(t.figures[1], np.arange(6.0).reshape(3, 2) + 1)
    assert np.isnan(t.figures[2]).all()
    np.testing.assert_array_equal(t.seams[0], np.zeros((4, 4, 3)))
    np.testing.assert_array_equal(store.read_seams(NAME, [1]), np.ones((1, 4, 4, 3)))
    assert t.counts() == {"pending": 0, "pass": 1, "warn": 1, "fail": 0, "error": 1}
    assert t.todo().tolist() == [2]
    # a later pass clears the block's error message
    _finish_block(store, 2)
    assert store.read_block_table(NAME, figures=False, seams=False).errors == {}
    with pytest.raises(StoreError, match="shape"):
        store.record_block(NAME, 0, BlockStatus.PASS, np.zeros((2, 2)), None, None)


def test_pass_needs_written_data(store: OutputStore):
    _prepare(store)
    with pytest.raises(StoreError, match="missing"):
        store.record_block(NAME, 1, BlockStatus.PASS, None, None, None)
    assert store.read_block_table(NAME).status.tolist() == [0, 0, 0]


def test_resume_keeps_done_blocks_only_when_nothing_changed(store: OutputStore):
    _prepare(store)
    data0 = _finish_block(store, 0)
    assert _prepare(store, keep_done=True).status.tolist() == [1, 0, 0]
    np.testing.assert_array_equal(store.read(NAME, 0, 40), data0)
    assert _prepare(store, keep_done=False).status.tolist() == [0, 0, 0]

    _finish_block(store, 0)
    # other spans: statuses reset, data kept (same array layout)
    assert _prepare(store, spans=[(0, 60), (60, 100)]).status.tolist() == [0, 0]
    np.testing.assert_array_equal(store.read(NAME, 0, 40), data0)
    # other chunking: the array is recreated, old data gone
    _prepare(store, chunk=10, spans=[(0, 60), (60, 100)])
    np.testing.assert_array_equal(store.read(NAME), np.full((100, 3), np.nan, np.float32))  # unwritten: fill


def test_chunk_checksum_is_crc32c_and_a_changed_chunk_is_refused_on_reading(store: OutputStore):
    # CRC-32C (Castagnoli) check value: the checksum of the ASCII digits "123456789" is
    # 0xE3069283 (RFC 3720, iSCSI, appendix B.4; from memory).
    assert store_module.crc32c(b"123456789") == (0xE3069283).to_bytes(4, "little")
    _prepare(store)
    _finish_block(store, 0)
    chunk = Path(store.location) / NAME / "c" / "1" / "0"
    raw = bytearray(chunk.read_bytes())
    raw[20] ^= 0x01
    chunk.write_bytes(bytes(raw))
    with pytest.raises(ValueError, match="checksum"):  # Zarr's own reader refuses it
        zarr.open_array(store.location, path=NAME, mode="r")[20:40]
    arr = zarr.open_array(store.location, path=NAME, mode="r")
    with pytest.raises(StoreError, match=f"a chunk of {NAME} does not match its CRC-32C checksum"):
        store_module._chunk_codec(arr)[1](bytes(raw))  # and so does twinpass's


def test_arrays_compressed_with_byte_shuffle_are_kept(store: OutputStore):
    # Arrays written with lz4 and byte shuffle and without chunk checksums (before bit
    # shuffle and the crc32c codec became the default) still match "lz4": a resume keeps
    # their finished blocks and data.
    from zarr.codecs import BloscCodec, BloscShuffle

    _prepare(store)
    data0 = _finish_block(store, 0)
    group = zarr.open_group(store.location, mode="r+")
    old = group[NAME]
    byte_shuffled = group.create_array(
        NAME + "-copy", shape=old.shape, chunks=old.chunks, dtype=old.dtype,
        compressors=[BloscCodec(cname="lz4", clevel=5, shuffle=BloscShuffle.shuffle)],
    )
    byte_shuffled[...] = old[...]
    byte_shuffled.attrs.update(old.attrs.asdict())
    del group[NAME]
    Path(store.location, NAME + "-copy").rename(Path(store.location, NAME))
    store = OutputStore.open(store.location)  # as a later command opens it
    assert _prepare(store, keep_done=True).status.tolist() == [1, 0, 0]
    np.testing.assert_array_equal(store.read(NAME, 0, 40), data0)
    # blocks written into it now are written as its codecs say: Zarr reads them
    assert store.chunk_format(NAME) == (True, False)
    data1 = _finish_block(store, 1)
    np.testing.assert_array_equal(zarr.open_array(store.location, path=NAME, mode="r")[40:80], data1)
    # a different codec is not "lz4": the array is recreated
    assert _prepare(store, compression="zstd").status.tolist() == [0, 0, 0]


def test_invalidate_and_set_complete(store: OutputStore, tmp_path: Path):
    _prepare(store)
    for i in range(3):
        _finish_block(store, i)
    store.set_complete(NAME, True, {"worst_passband_db": np.float64(0.1), "nan": np.nan})
    attrs = _strict_json((tmp_path / "out.zarr" / NAME / "zarr.json").read_text())["attributes"]
    assert attrs["complete"] is True and attrs["checks"] == {"worst_passband_db": 0.1, "nan": None}
    rec = store.file_records()[SOURCE]
    assert rec.complete and rec.segment is not None
    # the planner orders a segment's old members by these (see test_plan)
    assert dt.datetime.fromisoformat(rec.start_time) == dt.datetime(2026, 3, 1, tzinfo=dt.timezone.utc)

    store.invalidate_blocks(NAME, [1])
    t = store.read_block_table(NAME)
    assert t.status.tolist() == [1, 0, 1] and np.isnan(t.figures[1]).all()
    assert store.array_attrs(NAME)["complete"] is False
    with pytest.raises(StoreError, match="pending 1"):
        store.set_complete(NAME, True, None)

    _finish_block(store, 1, BlockStatus.FAIL)
    with pytest.raises(StoreError, match="fail 1"):
        store.set_complete(NAME, True, None)
    assert store.array_attrs(NAME)["complete"] is False
    with pytest.raises(StoreError, match="set_complete"):
        store.update_attrs(NAME, complete=True)

    # preparing again marks a complete array incomplete before anything else
    _finish_block(store, 1)
    store.set_complete(NAME, True, None)
    _prepare(store)
    assert store.array_attrs(NAME)["complete"] is False


def test_file_records_root_info_and_removal(store: OutputStore):
    _prepare(store)
    other = array_name("deck-south/b.wav")
    _prepare(store, other, source="deck-south/b.wav")
    zarr.open_group(store.local_root, mode="r+").create_array("foreign", shape=(4,), dtype="f4")
    records = store.file_records()
    assert set(records) == {SOURCE, "deck-south/b.wav"}
    rec = records[SOURCE]
    assert (rec.array_name, rec.frames, rec.design_digest, rec.complete, rec.segment) == (NAME, 100, "d1", False, "deck-north#0")
    assert rec.source_fingerprint == {"size": 1234, "digest": "ab12"}

    store.set_root_info({"response": {"kind": "bandpass"}}, {"zarr": zarr.__version__})
    store.append_run({"run_id": "r1", "start": dt.datetime(2026, 3, 2), "end": None, "counts": {"pass": 3},
                      "config_digest": "c"})
    store.append_run({"run_id": "r2"})
    info = OutputStore.open(store.location, "r").read_root_info()
    assert info["spec"] == {"response": {"kind": "bandpass"}}
    assert [r["run_id"] for r in info["runs"]] == ["r1", "r2"]
    assert info["runs"][0]["start"] == "2026-03-02T00:00:00"
    assert info["runs_total"] == 2

    assert store.force_reset([other]) == 1
    assert store.list_arrays() == [NAME, "foreign"]
    with pytest.raises(StoreError, match="block table"):
        store.read_block_table(other)


def _run(i: int) -> dict:
    return {"run_id": f"run{i:04d}", "start": f"2026-03-{1 + i // 100:02d}T{(i // 4) % 24:02d}:{(i % 4) * 15:02d}:00",
            "end": None, "counts": {"complete": i}, "config_digest": "c", "failed": [f"f{i}.wav"] * (i % 3)}


def test_run_history_keeps_the_root_bounded_and_every_run_in_its_own_group(store: OutputStore):
    # A scheduled archive accumulates runs: the root attributes, read at every open of the
    # store, keep only the latest RUNS_IN_ROOT, and each run is recorded once in its group.
    n = RUNS_IN_ROOT + 12
    sizes = []
    for i in range(n):
        store.append_run(_run(i))
        sizes.append((Path(store.location) / "zarr.json").stat().st_size)
    ro = OutputStore.open(store.location, "r")
    info = ro.read_root_info()
    assert [r["run_id"] for r in info["runs"]] == [f"run{i:04d}" for i in range(n - RUNS_IN_ROOT, n)]
    assert info["runs_total"] == n
    assert [r["run_id"] for r in ro.read_runs()] == [f"run{i:04d}" for i in range(n)]
    assert ro.read_runs()[7] == json.loads(json.dumps(_run(7)))
    # the root stops growing once it holds RUNS_IN_ROOT entries (entries differ by a few bytes)
    assert max(sizes[RUNS_IN_ROOT:]) - min(sizes[RUNS_IN_ROOT:]) < 200
    with pytest.raises(StoreError, match="read-only"):
        ro.append_run(_run(n))


def test_run_history_of_an_older_store_is_kept_when_the_root_list_is_trimmed(store: OutputStore):
    # A store written before run groups existed holds its whole history in the root list;
    # the entries that leave it get their groups first, so none is lost.
    legacy = [_run(i) for i in range(RUNS_IN_ROOT + 5)]
    zarr.open_group(store.local_root, mode="r+").update_attributes({"twinpass": {"layout": 1, "runs": legacy}})
    assert [r["run_id"] for r in store.read_runs()] == [r["run_id"] for r in legacy]
    store.append_run(_run(999))
    info = store.read_root_info()
    assert len(info["runs"]) == RUNS_IN_ROOT and info["runs"][-1]["run_id"] == "run0999"
    assert info["runs_total"] == len(legacy) + 1
    assert [r["run_id"] for r in store.read_runs()] == [r["run_id"] for r in legacy] + ["run0999"]


@pytest.mark.parametrize("run_id", ["", "a/b", "..", "x" * 129, None])
def test_run_entry_needs_an_id_that_can_name_its_group(store: OutputStore, run_id):
    with pytest.raises(StoreError, match="run_id"):
        store.append_run({"run_id": run_id})
    assert store.read_runs() == []


# -- locking and clean-up -----------------------------------------------------------


def test_second_lock_is_refused_naming_the_holder(store: OutputStore, tmp_path: Path):
    # The lock file is created with open(2) O_CREAT | O_EXCL (POSIX: fails if the file exists).
    lock_path = tmp_path / "out.zarr" / ".twinpass-lock"
    with store.lock("run-one"):
        holder = json.loads(lock_path.read_text())
        assert holder["run_id"] == "run-one" and holder["host"] == socket.gethostname()
        with pytest.raises(StoreLockedError) as err:
            with OutputStore.open(store.location).lock("run-two"):
                pass
        msg = str(err.value)
        assert "run-one" in msg and str(holder["pid"]) in msg and "delete" in msg and str(lock_path) in msg
    assert not lock_path.exists()
    with store.lock("run-two"):
        assert store.list_arrays() == []  # the lock file is not taken for an array


def test_stale_lock_is_recovered_with_a_warning(store: OutputStore, tmp_path: Path, caplog):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock_path = tmp_path / "out.zarr" / ".twinpass-lock"
    lock_path.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "run_id": "old",
                                     "started": "2026-03-01T00:00:00+00:00"}))
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        with store.lock("new"):
            assert json.loads(lock_path.read_text())["run_id"] == "new"
    assert "stale" in caplog.text and "old" in caplog.text
    # a lock from another host cannot be judged: refused
    lock_path.write_text(json.dumps({"pid": dead.pid, "host": "elsewhere-" + uuid.uuid4().hex, "run_id": "far",
                                     "started": "2026-03-01T00:00:00+00:00"}))
    with pytest.raises(StoreLockedError, match="far"):
        with store.lock("new"):
            pass


def test_the_flow_run_noted_beside_the_lock_outlives_a_dead_holder_and_goes_with_a_release(
        store: OutputStore, tmp_path: Path):
    # A run notes its flow run beside the lock it holds; a run that died leaves the note for the
    # run recovering its lock, which reads it under the dead run's id only; a release removes it.
    note_path = tmp_path / "out.zarr" / ".twinpass-lock.flow-run"
    with pytest.raises(StoreError, match="holding the lock"):
        store.note_flow_run("f-0", "http://127.0.0.1:1/api")
    with store.lock("run-one"):
        store.note_flow_run("f-1", "http://127.0.0.1:1/api")
        assert store.noted_flow_run("run-one") == {"flow_run_id": "f-1", "api_url": "http://127.0.0.1:1/api"}
        assert store.noted_flow_run("run-two") is None
        assert store.list_arrays() == []  # the note is not taken for an array
    assert not note_path.exists()

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / "out.zarr" / ".twinpass-lock").write_text(json.dumps(
        {"pid": dead.pid, "host": socket.gethostname(), "run_id": "old", "started": "2026-03-01T00:00:00+00:00"}))
    note_path.write_text(json.dumps({"run_id": "old", "flow_run_id": "f-old", "api_url": "http://127.0.0.1:1/api"}))
    with store.lock("new"):
        assert [gone.run_id for gone in store.stale_locks_recovered] == ["old"]
        assert store.noted_flow_run("old") == {"flow_run_id": "f-old", "api_url": "http://127.0.0.1:1/api"}
        store.note_flow_run("f-new", "http://127.0.0.1:1/api")
        assert store.noted_flow_run("old") is None and store.noted_flow_run("new")["flow_run_id"] == "f-new"
    assert not note_path.exists()
    note_path.write_text("{not json")
    assert store.noted_flow_run("old") is None


@pytest.mark.parametrize("where", ["local", "memory"])
def test_a_block_fenced_by_a_lock_another_run_took_writes_nothing(tmp_path: Path, where: str):
    # A block task still running for a command that was killed (on a cluster of its own)
    # carries the token of the lock that command held. Once a later run has taken the lock
    # over, the old task's write is refused and the later run's data is left as it is.
    location = str(tmp_path / "out.zarr") if where == "local" else f"memory://fence-{uuid.uuid4().hex}.zarr"
    store = OutputStore.open(location)
    _prepare(store)
    with store.lock("old") as old:
        assert store.lock_token == old.token
        write_block_data(location, NAME, 0, np.full((40, 3), 1.0), fence=old.token)  # its own lock: written
    assert store.lock_token == ""
    with store.lock("new") as new:
        write_block_data(location, NAME, 0, np.full((40, 3), 2.0), fence=new.token)
        with pytest.raises(RunStoppedError, match=r"block \[0, 40\) not written.*held by run new"):
            write_block_data(location, NAME, 0, np.full((40, 3), 9.0), fence=old.token)
    with pytest.raises(RunStoppedError, match="it is not held"):
        write_block_data(location, NAME, 40, np.full((40, 3), 9.0), fence=old.token)
    data = store.read(NAME)
    np.testing.assert_array_equal(data[:40], 2.0)
    assert not np.any(data[40:] == 9.0)


def test_partial_files_are_cleaned(store: OutputStore, tmp_path: Path):
    _prepare(store)
    _finish_block(store, 0)
    chunk_dir = tmp_path / "out.zarr" / NAME / "c"
    (chunk_dir / f"3.{uuid.uuid4().hex}.partial").write_bytes(b"junk")
    (tmp_path / "out.zarr" / NAME / f"zarr.json.{uuid.uuid4().hex}.partial").write_bytes(b"{")
    assert store.clean_partials() == 2
    assert not list((tmp_path / "out.zarr").rglob("*.partial"))
    assert store.clean_partials() == 0
    assert store.read(NAME, 0, 40).tolist() == np.ones((40, 3)).tolist()


# -- names and paths ---------------------------------------------------------------


@pytest.mark.parametrize("relpath", ["../x.wav", "/abs.wav", "a/../../b.wav", "_twinpass/x.wav",
                                     "C:/x.wav", "a\\b.wav", "a//b.wav", "a/", "./a.wav", ".hidden/x.wav",
                                     "zarr.json.wav", ""])
def test_array_name_rejects_escaping_or_reserved_paths(relpath: str):
    with pytest.raises(UnsafePathError, match="cannot name an output array"):
        array_name(relpath)


def test_array_name_normalises():
    assert array_name("we ird#name.wav") == "we_ird_name"
    assert array_name("deck north/a.b.wav") == "deck_north/a.b"
    assert array_name("café/x") == "caf_/x"
    assert array_name(SOURCE) == NAME


def test_colliding_names_are_refused(store: OutputStore):
    _prepare(store, "deck/a", source="deck/a.wav")
    with pytest.raises(UnsafePathError, match="both map"):
        _prepare(store, "deck/a", source="deck/a.npy")
    with pytest.raises(UnsafePathError, match="inside the output array"):
        _prepare(store, "deck/a/b", source="deck/a/b.wav")
    with pytest.raises(UnsafePathError, match="group"):
        _prepare(store, "deck", source="deck.wav")


def test_store_overlapping_the_archive_is_refused(tmp_path: Path):
    archive = tmp_path / "archive"
    archive.mkdir()
    with pytest.raises(UnsafePathError, match="inside the archive root"):
        OutputStore.open(str(archive / "out.zarr"), archive_root=archive)
    with pytest.raises(UnsafePathError, match="is the archive root"):
        OutputStore.open(f"file://{archive}", archive_root=archive)
    with pytest.raises(UnsafePathError, match="inside the output store"):
        OutputStore.open(str(tmp_path), archive_root=archive)
    assert OutputStore.open(str(tmp_path / "out.zarr"), archive_root=archive).list_arrays() == []


def test_missing_or_foreign_store_is_refused(tmp_path: Path):
    with pytest.raises(StoreError, match="not found"):
        OutputStore.open(str(tmp_path / "none.zarr"), "r")
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "notes.txt").write_text("keep me")
    with pytest.raises(StoreError, match="not a Zarr store"):
        OutputStore.open(str(tmp_path / "docs"))
    OutputStore.open(str(tmp_path / "s.zarr"))
    ro = OutputStore.open(str(tmp_path / "s.zarr"), "r")
    with pytest.raises(StoreError, match="read-only"):
        _prepare(ro)


def test_force_reset_does_not_follow_links_out_of_the_store(store: OutputStore, tmp_path: Path):
    outside = tmp_path / "outside.zarr"
    zarr.create_array(LocalStore(outside), name="victim", shape=(4,), dtype="f4", fill_value=1)
    (tmp_path / "out.zarr" / "link").symlink_to(outside, target_is_directory=True)
    with pytest.raises(UnsafePathError, match="not inside the output store"):
        store.force_reset(["link/victim"])
    assert (outside / "victim" / "zarr.json").exists()


# -- other file systems and faults ----------------------------------------------------


def test_fsspec_memory_store():
    url = f"memory://twinpass-test-{uuid.uuid4().hex}/out.zarr"
    store = OutputStore.open(url)
    assert store.local_root is None
    _prepare(store)
    with store.lock("mem-run"):
        with pytest.raises(StoreLockedError, match="mem-run"):
            with OutputStore.open(url).lock("other"):
                pass
        expected = [_finish_block(store, i) for i in range(3)]
        store.set_complete(NAME, True, {"ok": True})
    reread = OutputStore.open(url, "r")
    np.testing.assert_array_equal(reread.read(NAME), np.concatenate(expected).astype(np.float32))
    assert reread.file_records()[SOURCE].complete
    with OutputStore.open(url).lock("after"):
        pass  # the first lock was released
    with pytest.raises(StoreError, match="not found"):
        OutputStore.open(f"memory://twinpass-test-{uuid.uuid4().hex}/none.zarr", "r")


def test_no_space_left_gives_store_error_and_nothing_complete(store: OutputStore, monkeypatch):
    _prepare(store)
    _finish_block(store, 0)

    async def full_disk(self, key, value):  # injected fault: POSIX errno ENOSPC, "No space left on device"
        raise OSError(errno.ENOSPC, "No space left on device")

    def full_disk_file(path, payload, **_):  # the same fault where block tasks write chunk files themselves
        raise OSError(errno.ENOSPC, "No space left on device")

    with monkeypatch.context() as m:
        m.setattr(LocalStore, "set", full_disk)
        m.setattr(store_module, "_put_file", full_disk_file)
        m.setattr(store_module, "_overwrite_file", full_disk_file)
        with pytest.raises(StoreError, match="no space left on device while writing .*block") as err:
            write_block_data(store.location, NAME, 40, np.ones((40, 3)))
        assert "finished blocks are kept" in str(err.value)
        with pytest.raises(StoreError, match="no space left"):
            store.record_block(NAME, 0, BlockStatus.PASS, np.zeros((3, 2)), None, None)
    with pytest.raises(StoreError, match="missing"):
        store.record_block(NAME, 1, BlockStatus.PASS, None, None, None)
    with pytest.raises(StoreError, match="not done"):
        store.set_complete(NAME, True, None)
    assert store.array_attrs(NAME)["complete"] is False
    assert store.read_block_table(NAME).status.tolist() == [1, 0, 0]  # the finished block is kept


def test_a_status_write_that_fails_leaves_no_trace_in_later_records(store: OutputStore, monkeypatch):
    # The driver keeps a copy of the status column to write whole status chunks; a record
    # whose status chunk could not be written must not reach the store with a later record.
    _prepare(store)
    for a in (0, 40):
        write_block_data(store.location, NAME, a, np.ones((40, 3)))
    real_put = store_module._put_file

    def no_space_for_statuses(path, payload):  # injected fault: ENOSPC on the status chunk only
        if "status" in Path(path).parts:
            raise OSError(errno.ENOSPC, "No space left on device")
        real_put(path, payload)

    with monkeypatch.context() as m:
        m.setattr(store_module, "_put_file", no_space_for_statuses)
        with pytest.raises(StoreError, match="no space left"):
            store.record_block(NAME, 0, BlockStatus.PASS, np.zeros((3, 2)), None, None)
    store.record_block(NAME, 1, BlockStatus.PASS, np.ones((3, 2)), None, None)
    assert store.read_block_table(NAME).status.tolist() == [0, 1, 0]


def test_a_flag_write_that_fails_is_not_taken_as_written(store: OutputStore, monkeypatch):
    # The store keeps the arrays it has opened, and Zarr updates an opened array's
    # attributes in memory before writing them. After a failed write the store must read
    # the array again, or a later "mark incomplete" would think it already done and leave
    # the completion flag of changed data standing on the disk.
    _prepare(store)
    for i in range(3):
        _finish_block(store, i)
    store.set_complete(NAME, True, None)

    async def io_error(self, key, value):  # injected fault: POSIX errno EIO on metadata writes
        raise OSError(errno.EIO, "Input/output error")

    real_put = store_module._put_file

    def io_error_on_documents(path, payload):  # the store writes local metadata documents itself
        if Path(path).name == "zarr.json":
            raise OSError(errno.EIO, "Input/output error")
        real_put(path, payload)

    with monkeypatch.context() as m:
        m.setattr(LocalStore, "set", io_error)
        m.setattr(store_module, "_put_file", io_error_on_documents)
        with pytest.raises(StoreError, match="Input/output error"):
            store.invalidate_blocks(NAME, [1])
    assert OutputStore.open(store.location, "r").array_attrs(NAME)["complete"] is True  # nothing written
    store.invalidate_blocks(NAME, [1])
    reread = OutputStore.open(store.location, "r")
    assert reread.array_attrs(NAME)["complete"] is False
    assert reread.read_block_table(NAME).status.tolist() == [1, 0, 1]


def test_each_node_is_opened_once_per_store_object(store: OutputStore, monkeypatch):
    # Opening an array reads and parses its metadata document; the driver records, reads
    # and checks each file's block table many times, from the arrays it opened first.
    _prepare(store)
    driver = OutputStore.open(store.location)  # a new store object: nothing opened yet
    opened: list[str] = []
    real_getitem = zarr.Group.__getitem__

    def counting(self, path):
        opened.append(path)
        return real_getitem(self, path)

    monkeypatch.setattr(zarr.Group, "__getitem__", counting)
    for i in range(3):
        _finish_block(driver, i)
        driver.read_block_table(NAME)
    driver.set_complete(NAME, True, None)
    assert NAME in opened and len(opened) == len(set(opened)), opened
    assert OutputStore.open(store.location, "r").file_records()[SOURCE].complete


def test_kept_nodes_are_bounded_and_evicted_ones_are_opened_again(store: OutputStore, monkeypatch):
    # However many files an archive has, the store keeps a bounded number of opened nodes;
    # a file whose nodes were dropped meanwhile is simply opened again.
    monkeypatch.setattr(store_module, "_NODES_KEPT", 4)
    names = [array_name(f"deck-north/f{i}.wav") for i in range(3)]
    for n in names:
        _prepare(store, n, source=f"deck-north/{n}.wav")
        assert len(store._nodes) <= 4
    for n in names:
        for i in range(3):
            _finish_block(store, i, name=n)
        store.set_complete(n, True, None)
        assert len(store._nodes) <= 4
    records = OutputStore.open(store.location, "r").file_records()
    assert sorted(r.array_name for r in records.values() if r.complete) == sorted(names)


def test_forgetting_a_path_drops_what_is_kept_under_it_and_nothing_else(store: OutputStore, monkeypatch):
    # Deleting a file's block table must drop its four kept arrays and its record handles
    # (the next record opens the new table), and leave every other file's nodes alone.
    names = [array_name(f"deck-north/f{i}.wav") for i in range(3)]
    for n in names:
        _prepare(store, n, source=f"deck-north/{n}.wav")
        _finish_block(store, 0, name=n)
    table = store_module._table_path(names[1])
    assert {f"{table}/{k}" for k in ("status", "span", "figures", "seams")} <= set(store._nodes)
    kept_before = set(store._nodes)
    store._forget(table)
    assert not {k for k in store._nodes if k == table or k.startswith(table + "/")}
    assert names[1] not in store._handles and names[0] in store._handles
    assert set(store._nodes) == {k for k in kept_before if k != table and not k.startswith(table + "/")}
    assert all(paths and all(p in store._nodes for p in paths) for paths in store._below.values())
    _finish_block(store, 1, name=names[1])  # reopened from the store
    assert store.read_block_table(names[1]).status.tolist()[:2] == [1, 1]
    # evictions keep the index in step with what is kept
    monkeypatch.setattr(store_module, "_NODES_KEPT", 3)
    _prepare(store, array_name("deck-north/g.wav"), source="deck-north/g.wav")
    assert len(store._nodes) <= 3
    assert {p for paths in store._below.values() for p in paths} <= set(store._nodes)
    store._forget()
    assert not store._nodes and not store._below and not store._handles


def test_a_batch_of_records_equals_the_same_records_one_by_one(tmp_path: Path):
    spans = [(a, a + 20) for a in range(0, 100, 20)]
    tables = []
    for kind in ("single", "batch"):
        store = OutputStore.open(str(tmp_path / f"{kind}.zarr"))
        _prepare(store, spans=spans)
        for a, b in spans[:4]:
            write_block_data(store.location, NAME, a, np.ones((b - a, 3)))
        store.record_block(NAME, 4, BlockStatus.ERROR, None, None, "OSError: earlier")
        figs = [np.full((3, 2), float(i)) for i in range(5)]
        seams = [np.full((4, 4, 3), -float(i)) for i in range(5)]
        records = [BlockRecord(0, BlockStatus.PASS, figs[0], seams[0]),
                   BlockRecord(2, BlockStatus.FAIL, figs[2], None),
                   BlockRecord(3, BlockStatus.WARN, figs[3], seams[3]),
                   BlockRecord(4, BlockStatus.ERROR, None, None, "ValueError: again"),
                   BlockRecord(1, BlockStatus.ERROR, None, None, "first try"),
                   BlockRecord(1, BlockStatus.PASS, figs[1], seams[1])]  # listed twice: the last counts
        if kind == "single":
            for r in records:
                store.record_block(NAME, r.index, r.status, r.figures, r.seams, r.error)
        else:
            store.record_blocks(NAME, records)
        tables.append(store.read_block_table(NAME))
    one, batch = tables
    assert batch.status.tolist() == one.status.tolist() == [1, 1, 3, 2, 4]
    assert batch.errors == one.errors == {4: "ValueError: again"}
    np.testing.assert_array_equal(batch.figures, one.figures)
    np.testing.assert_array_equal(batch.seams, one.seams)


@pytest.mark.parametrize("status_chunk", [4096, 2])  # 2: the status column spans two chunks, the last partial
def test_block_table_chunks_are_the_bytes_zarr_writes(tmp_path: Path, monkeypatch, status_chunk: int):
    # Reference: zarr-python writing the same figures, seams and statuses through its own
    # codec pipeline. Records in a local store encode and rename the table's chunk files
    # themselves; the files must be byte for byte Zarr's (the status chunk stored whole,
    # completed with the fill value, as Zarr stores an edge chunk).
    monkeypatch.setattr(store_module, "_TABLE_CHUNK", status_chunk)
    ours = OutputStore.open(str(tmp_path / "ours.zarr"))
    _prepare(ours)
    theirs = OutputStore.open(str(tmp_path / "theirs.zarr"))
    _prepare(theirs)
    figures = [np.arange(6.0).reshape(3, 2) * (i + 1) for i in range(3)]
    seams = [np.linspace(-1.0, 1.0, 48).reshape(4, 4, 3) * (i + 1) for i in range(3)]
    write_block_data(ours.location, NAME, 0, np.ones((80, 3)))
    ours.record_blocks(NAME, [BlockRecord(0, BlockStatus.PASS, figures[0], seams[0]),
                              BlockRecord(2, BlockStatus.ERROR, figures[2], seams[2], "OSError: disk")])
    ours.record_blocks(NAME, [BlockRecord(1, BlockStatus.WARN, figures[1], seams[1])])
    ref = zarr.open_group(LocalStore(tmp_path / "theirs.zarr"), path=f"_twinpass/blocks/{NAME}", mode="r+")
    ref = {k: ref[k].with_config({"write_empty_chunks": True}) for k in ("status", "figures", "seams")}
    ref["status"][:] = np.array([BlockStatus.PASS, BlockStatus.WARN, BlockStatus.ERROR], dtype=np.int8)
    for i in range(3):
        ref["figures"][i] = figures[i]
        ref["seams"][i] = seams[i]
    table_dir = Path("_twinpass", "blocks", NAME)
    status_keys = [Path("status", "c", str(c)) for c in range(-(-3 // min(3, status_chunk)))]
    row_keys = [Path(k, "c", str(i), *["0"] * n) for k, n in (("figures", 2), ("seams", 3)) for i in range(3)]
    keys = status_keys + row_keys
    for key in keys:
        assert (tmp_path / "ours.zarr" / table_dir / key).read_bytes() == \
            (tmp_path / "theirs.zarr" / table_dir / key).read_bytes(), key
    t = ours.read_block_table(NAME)
    assert t.status.tolist() == [1, 2, 4] and t.errors == {2: "OSError: disk"}
    np.testing.assert_array_equal(t.figures, np.stack(figures))
    np.testing.assert_array_equal(t.seams, np.stack(seams))
    assert not list((tmp_path / "ours.zarr" / table_dir).rglob("*.partial"))


def test_a_forced_reset_of_a_matching_table_equals_a_new_table(tmp_path: Path):
    # Preparing a file again without keeping its blocks (a forced or changed file) resets a
    # table whose spans, columns and seam shape match in place; the result must read exactly
    # as a newly created table (reference: a store that never had the file).
    store = OutputStore.open(str(tmp_path / "out.zarr"))
    _prepare(store)
    for i in range(3):
        _finish_block(store, i)
    store.record_block(NAME, 1, BlockStatus.ERROR, None, None, "ValueError: boom")
    status_meta = tmp_path / "out.zarr" / "_twinpass" / "blocks" / NAME / "status" / "zarr.json"
    inode = status_meta.stat().st_ino
    reset = _prepare(store, keep_done=False)
    assert status_meta.stat().st_ino == inode  # reset in place, not recreated
    new = OutputStore.open(str(tmp_path / "new.zarr"))
    fresh = _prepare(new)
    a, b = store.read_block_table(NAME), new.read_block_table(NAME)
    assert reset.status.tolist() == fresh.status.tolist() == a.status.tolist() == [0, 0, 0]
    assert a.errors == b.errors == {}
    np.testing.assert_array_equal(a.span, b.span)
    np.testing.assert_array_equal(a.figures, b.figures)  # all NaN
    np.testing.assert_array_equal(a.seams, b.seams)
    assert (a.columns, a.seam_samples) == (b.columns, b.seam_samples) == (reset.columns, reset.seam_samples)
    np.testing.assert_array_equal(reset.span, a.span)  # the returned table is what the store holds
    # the reset table records as a new one does
    _finish_block(store, 2)
    assert store.read_block_table(NAME).status.tolist() == [0, 0, 1]


def test_a_batch_with_a_refused_record_records_nothing(store: OutputStore):
    _prepare(store)
    write_block_data(store.location, NAME, 0, np.ones((40, 3)))
    with pytest.raises(StoreError, match="block 1 .* data chunk 2 is missing"):
        store.record_blocks(NAME, [BlockRecord(0, BlockStatus.PASS, np.zeros((3, 2))),
                                   BlockRecord(1, BlockStatus.PASS, np.zeros((3, 2)))])
    t = store.read_block_table(NAME)
    assert t.status.tolist() == [0, 0, 0] and np.isnan(t.figures).all()


def test_the_drivers_batch_records_all_results_and_only_a_refused_one_becomes_an_error(store: OutputStore):
    # The driver records the results that finished together in one batch; the store refuses
    # block 1 (its data chunk was never written), which alone must be recorded as an error.
    from twinpass.engine import ERROR, BlockResult, _BatchRecorder

    _prepare(store)
    write_block_data(store.location, NAME, 0, np.ones((40, 3)))
    write_block_data(store.location, NAME, 80, np.ones((20, 3)))
    seen = []
    rec = _BatchRecorder(store, seen.append)
    figs = np.zeros((3, 2))
    for i in (0, 1, 2):
        rec.add(BlockResult(NAME, i, BlockStatus.PASS, figs, np.zeros((4, 4, 3))))
    assert seen == []  # nothing is recorded before the flush
    rec.flush()
    assert [(r.block_index, r.status) for r in seen] == [(0, BlockStatus.PASS), (1, ERROR), (2, BlockStatus.PASS)]
    assert "data chunk 2 is missing" in seen[1].error
    t = store.read_block_table(NAME)
    assert t.status.tolist() == [BlockStatus.PASS, ERROR, BlockStatus.PASS]
    assert list(t.errors) == [1]


def test_records_after_invalidation_and_re_preparation_see_the_current_table(store: OutputStore):
    # record_block keeps the block table open between calls; invalidating blocks or
    # preparing the file again must not let an old view resurrect errors or spans.
    _prepare(store)
    store.record_block(NAME, 1, BlockStatus.ERROR, None, None, "disk full")
    _finish_block(store, 0)
    assert store.read_block_table(NAME).errors == {1: "disk full"}
    store.invalidate_blocks(NAME, [1])
    _finish_block(store, 2)
    table = store.read_block_table(NAME)
    assert table.errors == {} and table.status.tolist() == [1, 0, 1]
    # new chunking and spans: the array and table are recreated (and block writes, which
    # keep the array open while its metadata document is unchanged, must see the new chunks)
    _prepare(store, chunk=10, spans=[(0, 50), (50, 100)])
    _finish_block(store, 1)
    assert store.read_block_table(NAME).status.tolist() == [0, 1]
    with pytest.raises(StoreError, match="missing"):
        store.record_block(NAME, 0, BlockStatus.PASS, None, None, None)


def test_a_deletion_outside_the_store_is_refused_even_when_nothing_is_there(store: OutputStore, tmp_path: Path):
    # The safety check comes before the shortcut for paths with nothing there.
    assert not (tmp_path / "elsewhere").exists()
    with pytest.raises(UnsafePathError, match="not inside the output store"):
        store._delete("../elsewhere")
    store._delete("deck-north/never-written")  # inside the store and absent: nothing to do


def test_a_stale_lock_is_removed_by_one_run_at_a_time(store: OutputStore, tmp_path: Path, caplog):
    # Two runs may find one stale lock together. Removing it is done under a takeover guard
    # created as exclusively as the lock itself, so that one run cannot remove the lock the
    # other has just taken: while a live process holds the guard, the stale lock stays.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock_path = tmp_path / "out.zarr" / ".twinpass-lock"
    guard_path = tmp_path / "out.zarr" / ".twinpass-lock.takeover"
    stale = json.dumps({"pid": dead.pid, "host": socket.gethostname(), "run_id": "old",
                        "started": "2026-03-01T00:00:00+00:00"})
    lock_path.write_text(stale)
    guard_path.write_bytes(store_lock.LockInfo.new("taking over").to_bytes())  # held by this live process
    with pytest.raises(StoreLockedError, match="taking it over") as err:
        with store.lock("new"):
            pass
    assert str(guard_path) in str(err.value) and lock_path.read_text() == stale and guard_path.exists()
    # A guard whose creator is gone is cleared with a warning; the stale lock is then recovered.
    guard_path.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "run_id": "taker",
                                      "started": "2026-03-01T00:00:00+00:00"}))
    with caplog.at_level(logging.WARNING, logger="twinpass.store"):
        with store.lock("new"):
            assert json.loads(lock_path.read_text())["run_id"] == "new"
    assert "clearing" in caplog.text and "taker" in caplog.text and "recovering a stale lock" in caplog.text
    assert not guard_path.exists() and not lock_path.exists()


@pytest.mark.parametrize("linked", ["hard link", "symbolic link", "none"])
def test_a_synced_chunk_write_reaches_the_disk_however_the_file_is_linked(tmp_path: Path, monkeypatch, linked: str):
    # A chunk file shared with a snapshot (another hard link) or reached through a symbolic
    # link is replaced rather than written through; asked to sync, it is synced all the same.
    # (The syncs are counted around the store's own helper; the writes are real.)
    synced: list[int] = []
    real = store_module._data_sync
    monkeypatch.setattr(store_module, "_data_sync", lambda fd: (synced.append(fd), real(fd)))
    chunk = tmp_path / "c" / "0"
    chunk.parent.mkdir()
    if linked == "symbolic link":
        target = tmp_path / "elsewhere"
        target.write_bytes(b"old")
        chunk.symlink_to(target)
    else:
        chunk.write_bytes(b"old")
        if linked == "hard link":
            os.link(chunk, tmp_path / "snapshot")
    store_module._overwrite_file(chunk, b"new", sync=True)
    assert chunk.read_bytes() == b"new" and len(synced) == 1
    if linked == "hard link":
        assert (tmp_path / "snapshot").read_bytes() == b"old"  # the snapshot keeps its data
    if linked == "symbolic link":
        assert not chunk.is_symlink() and (tmp_path / "elsewhere").read_bytes() == b"old"
