"""Channel names and units: from the configuration, a raw file's sidecar, or an earlier stage,
to the output arrays' attributes ``channel_names`` and ``units``.

Real runs (the engine on threads, no Prefect) over invented archives, into real Zarr stores.

References: every expected name and unit is the one the test itself gives (in the
configuration it writes, or in a sidecar); which one applies is the precedence twinpass
documents (README "Configuration reference", ``[archive] channels``: a file's sidecar, then
its stream's table, then ``"*"``, then an earlier stage's attributes). Blocks run and
attributes read back are what the store records. The filtered samples are compared with
scipy.signal.sosfiltfilt where a test says so.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.signal
import zarr

import test_bad_inputs
from conftest import START, make_signal, run_cli, write_config, write_stream
from twinpass.config import load_config
from twinpass.job import run_job

FS = 200.0
FRAMES = 4000
"""20 s files at 200 Hz: four 5 s blocks each, longer than the halo of the test band-pass."""


def _run(config: Path) -> Any:
    return run_job(load_config(config), scheduler="threads", workers=2)


def _attrs(store: Path, array: str) -> dict[str, Any]:
    return zarr.open_group(str(store), mode="r")[array].attrs.asdict()


def _channels_toml(tables: dict[str, dict[str, Any]]) -> str:
    out = []
    for stream, keys in tables.items():
        out.append(f"[archive.channels.{json.dumps(stream)}]")
        out += [f"{k} = {json.dumps(v)}" for k, v in keys.items()]  # JSON strings and lists are TOML too
    return "\n".join(out) + "\n"


def _config(folder: Path, tables: dict[str, dict[str, Any]] | None = None, **overrides: Any) -> Path:
    """``folder/twinpass.toml`` for ``folder/archive`` (NPY and raw files) with ``tables`` as
    ``[archive.channels]``."""
    path = write_config(folder, fs=FS, include=("**/*.npy", "**/*.bin"), **overrides)
    if tables:
        path.write_text(path.read_text(encoding="utf-8") + _channels_toml(tables), encoding="utf-8")
    return path


def _raw(root: Path, stream: str, x: np.ndarray, **sidecar: Any) -> str:
    """One float32 raw file starting at START with its TOML sidecar; returns its array name."""
    rel = f"{stream}/{stream}_{START:%Y%m%dT%H%M%S}"
    (root / rel).parent.mkdir(parents=True, exist_ok=True)
    np.asarray(x, dtype="<f4").tofile(root / f"{rel}.bin")
    keys = {"dtype": "float32", "channels": x.shape[1], "sample_rate_hz": FS, **sidecar}
    (root / f"{rel}.toml").write_text("".join(f"{k} = {json.dumps(v)}\n" for k, v in keys.items()), encoding="utf-8")
    return rel


def _blocks_run(res: Any) -> int:
    return res.counts()["blocks_run"]


# -- configuration ----------------------------------------------------------------------


@pytest.fixture(scope="module")
def three_streams(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, list[str]]]:
    """Streams deck-north (3 channels), pier (2) and mast (1), two files each."""
    folder = tmp_path_factory.mktemp("channels")
    arrays = {}
    for seed, (stream, ch) in enumerate({"deck-north": 3, "pier": 2, "mast": 1}.items()):
        arrays[stream] = list(write_stream(folder / "archive", stream, make_signal(2 * FRAMES, ch, FS, seed=seed),
                                           FS, 2).arrays)
    return folder, arrays


@pytest.fixture
def work(three_streams, tmp_path: Path) -> tuple[Path, dict[str, list[str]]]:
    folder, arrays = three_streams
    shutil.copytree(folder, tmp_path / "w")
    return tmp_path / "w", arrays


TABLES = {
    "deck-north": {"names": ["vertical", "lateral", "longitudinal"], "units": "m/s^2"},
    "pier": {"names": ["north", "east"]},
    "*": {"units": "V"},
}


@pytest.mark.parametrize("mode", ["halo", "carry"])
def test_names_and_units_reach_the_attributes_a_streams_table_winning_over_the_star(work, mode):
    folder, arrays = work
    res = _run(_config(folder, TABLES, processing={"mode": mode}))
    assert res.counts()["complete"] == 6 and res.exit_status() == 0
    store = folder / "out.zarr"
    for array in arrays["deck-north"]:
        a = _attrs(store, array)
        # the stream's own table (TABLES["deck-north"]): its names, its one unit for every channel
        assert a["channel_names"] == ["vertical", "lateral", "longitudinal"]
        assert a["units"] == ["m/s^2"] * 3
    for array in arrays["pier"]:
        a = _attrs(store, array)
        # names from the stream's table, units (which it does not give) from "*"
        assert a["channel_names"] == ["north", "east"] and a["units"] == ["V", "V"]
    for array in arrays["mast"]:
        a = _attrs(store, array)
        # no table of its own: "*" gives units only, so no channel_names attribute at all
        assert a["units"] == ["V"] and "channel_names" not in a


def test_without_channel_tables_the_outputs_have_no_label_attributes(work):
    folder, arrays = work
    _run(_config(folder))
    a = _attrs(folder / "out.zarr", arrays["pier"][0])
    assert "channel_names" not in a and "units" not in a


def test_a_name_list_of_the_wrong_length_labels_nothing_and_filters_every_file(work):
    # A labelling mistake changes no sample: the stream's files are filtered as usual (equal
    # to scipy.signal.sosfiltfilt of the whole stream, the stored sections and padding), their
    # outputs get no names, and a note of the plan names the stream, the counts and the key.
    folder, arrays = work
    tables = {**TABLES, "pier": {"names": ["north", "east", "up"]}}  # pier has 2 channels, not 3
    res = _run(_config(folder, tables))
    assert res.exit_status() == 0 and res.counts()["complete"] == 6 and not res.invalid
    notes = [n for n in res.notes if "stream 'pier' has 2 channel(s)" in n]
    assert sorted(n.split(":")[0] for n in notes) == sorted(f"{a}.npy" for a in arrays["pier"])
    for text in ('[archive.channels."pier"] names', "lists 3", "list 2 name(s)", "no channel names until this is corrected"):
        assert text in notes[0], notes[0]
    store = zarr.open_group(str(folder / "out.zarr"), mode="r")
    pier = [store[a] for a in arrays["pier"]]
    assert all(a.attrs["complete"] is True and "channel_names" not in a.attrs for a in pier)
    assert pier[0].attrs["units"] == ["V", "V"]  # the "*" units still fit
    f = pier[0].attrs["filter"]
    x = make_signal(2 * FRAMES, 2, FS, seed=1)
    ref = scipy.signal.sosfiltfilt(np.asarray(f["sos"]), x, axis=0, padtype=f["edge"], padlen=f["edge_samples"])
    y = np.concatenate([np.asarray(a[:]) for a in pier])
    assert np.max(np.abs(y - ref)) <= f["tolerance"] * np.max(np.abs(x))


def test_the_command_line_says_the_mismatch_in_a_note_and_exits_0(work):
    folder, arrays = work
    config = _config(folder, {"deck-north": {"names": ["vertical", "lateral"]}})  # 3 channels, 2 names
    proc = run_cli(["run", str(config), "--no-flow"], check=False)
    # README "Exit statuses of `twinpass run`": 0 = every file complete; the labels are a note
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout + proc.stderr
    assert "note: " in out and "stream 'deck-north' has 3 channel(s)" in out
    assert '[archive.channels."deck-north"] names' in out
    assert _attrs(folder / "out.zarr", arrays["deck-north"][0])["complete"] is True


def test_a_star_unit_list_of_the_wrong_length_names_the_star_and_a_table_of_its_own(work):
    folder, arrays = work
    res = _run(_config(folder, {"*": {"units": ["V", "V"]}}))  # fits pier (2 channels) only
    assert res.exit_status() == 0 and res.counts()["complete"] == 6
    note = next(n for n in res.notes if n.startswith(f"{arrays['mast'][0]}.npy: "))
    for text in ("stream 'mast' has 1 channel(s)", '[archive.channels."*"] units', "lists 2",
                 '[archive.channels."mast"]'):
        assert text in note, note
    assert _attrs(folder / "out.zarr", arrays["pier"][0])["units"] == ["V", "V"]
    assert "units" not in _attrs(folder / "out.zarr", arrays["mast"][0])


def test_changing_names_and_units_alone_reruns_no_block_and_updates_the_attributes(work):
    folder, arrays = work
    first = _run(_config(folder, TABLES))
    assert _blocks_run(first) > 0
    store = folder / "out.zarr"
    before = {a: _attrs(store, a) for names in arrays.values() for a in names}
    data = {a: np.asarray(zarr.open_group(str(store), mode="r")[a][:]) for a in before}
    tables = {"deck-north": {"names": ["z", "y", "x"], "units": ["m/s^2", "m/s^2", "mV"]},  # both changed
              "*": {"units": "mV"}}  # pier's names given no more; every other unit now mV
    res = _run(_config(folder, tables))
    assert _blocks_run(res) == 0 and res.counts()["skipped"] == 6 and res.exit_status() == 0
    # every file's labels changed (deck-north's names and units, pier's names, all units): one note
    assert [n for n in res.notes if n.startswith("channel names or units changed for 6 unchanged file(s)")]
    for array in arrays["deck-north"]:
        a = _attrs(store, array)
        assert a["channel_names"] == ["z", "y", "x"] and a["units"] == ["m/s^2", "m/s^2", "mV"]
    for array in arrays["pier"]:
        a = _attrs(store, array)
        assert "channel_names" not in a and a["units"] == ["mV", "mV"]
    for array, was in before.items():
        a = _attrs(store, array)
        # nothing else changed: the samples, the fingerprint, the design digest, complete
        for key in ("source_fingerprint", "design_digest", "complete", "filter", "segment", "joins"):
            assert a[key] == was[key], (array, key)
        np.testing.assert_array_equal(np.asarray(zarr.open_group(str(store), mode="r")[array][:]), data[array])
    again = _run(_config(folder, tables))  # and the run after that changes nothing either
    assert _blocks_run(again) == 0 and not [n for n in again.notes if n.startswith("channel names")]


# -- raw files and their sidecars ---------------------------------------------------------


def _sidecar_archive(folder: Path, **sidecar: Any) -> dict[str, str]:
    """Stream rig-a: one raw file of 2 channels with ``sidecar`` keys; stream rig-b: one
    without labels. Returns the array names."""
    root = folder / "archive"
    return {"rig-a": _raw(root, "rig-a", make_signal(FRAMES, 2, FS, seed=1), **sidecar),
            "rig-b": _raw(root, "rig-b", make_signal(FRAMES, 2, FS, seed=2))}


RIG_TABLES = {"*": {"names": ["left", "right"], "units": "V"}}


def test_a_sidecars_names_and_units_win_over_the_configuration(tmp_path):
    arrays = _sidecar_archive(tmp_path, channel_names=["strain-1", "strain-2"], units="ustrain")
    res = _run(_config(tmp_path, RIG_TABLES))
    assert res.counts()["complete"] == 2
    a = _attrs(tmp_path / "out.zarr", arrays["rig-a"])
    assert a["channel_names"] == ["strain-1", "strain-2"] and a["units"] == ["ustrain", "ustrain"]  # the sidecar's
    b = _attrs(tmp_path / "out.zarr", arrays["rig-b"])
    assert b["channel_names"] == ["left", "right"] and b["units"] == ["V", "V"]  # RIG_TABLES "*"


def test_a_sidecar_unit_list_wins_and_names_fall_back_to_the_configuration(tmp_path):
    arrays = _sidecar_archive(tmp_path, units=["ustrain", "degC"])
    _run(_config(tmp_path, RIG_TABLES))
    a = _attrs(tmp_path / "out.zarr", arrays["rig-a"])
    assert a["units"] == ["ustrain", "degC"] and a["channel_names"] == ["left", "right"]


@pytest.mark.parametrize("key, value, counted", [
    ("channel_names", ["a", "b", "c"], "channel_names lists 3 name(s) but channels = 2"),
    ("units", ["V"], "units lists 1 unit(s) but channels = 2"),
])
def test_a_sidecar_count_that_differs_from_channels_is_a_note_and_the_configuration_applies(
        tmp_path, key, value, counted):
    # The sidecar's labels are not used; the stream's table (RIG_TABLES) labels the file, and
    # its samples are filtered as usual.
    arrays = _sidecar_archive(tmp_path, **{key: value})
    res = _run(_config(tmp_path, RIG_TABLES))
    assert res.exit_status() == 0 and res.counts()["complete"] == 2 and not res.invalid
    note = next(n for n in res.notes if n.startswith(f"{arrays['rig-a']}.bin: "))
    assert counted in note and f"{arrays['rig-a']}.toml" in note and "not used until" in note, note
    a = _attrs(tmp_path / "out.zarr", arrays["rig-a"])
    assert (a["channel_names"], a["units"]) == (["left", "right"], ["V", "V"])  # RIG_TABLES["*"]


def test_editing_a_sidecars_labels_refilters_nothing(tmp_path):
    arrays = _sidecar_archive(tmp_path, channel_names=["strain-1", "strain-2"], units="ustrain")
    config = _config(tmp_path, RIG_TABLES)
    assert _blocks_run(_run(config)) > 0
    side = tmp_path / "archive" / f"{arrays['rig-a']}.toml"
    side.write_text(side.read_text().replace('"ustrain"', '["ustrain", "mV"]'))
    res = _run(config)
    assert _blocks_run(res) == 0 and res.counts()["skipped"] == 2
    assert _attrs(tmp_path / "out.zarr", arrays["rig-a"])["units"] == ["ustrain", "mV"]  # the edited sidecar's


# -- filtering in stages ----------------------------------------------------------------

NOTCH = {"kind": "notch", "notch_hz": 50.0, "notch_width_hz": 2.0}


def _stage2(folder: Path, tables: dict[str, dict[str, Any]] | None = None) -> Path:
    path = write_config(folder, response=NOTCH, archive={"root": "out.zarr", "include": ["**"], "name_pattern": None},
                        output={"store": "notch.zarr"})
    if tables:
        path.write_text(path.read_text(encoding="utf-8") + _channels_toml(tables), encoding="utf-8")
    return path


def test_a_second_stage_carries_the_names_and_units_over(work):
    folder, arrays = work
    _run(_config(folder, TABLES))
    second = folder / "notch.zarr"
    res = _run(_stage2(folder))
    assert res.counts()["complete"] == 6
    for stream, names in arrays.items():
        for array in names:
            # stage 1's attributes, from TABLES
            one, two = _attrs(folder / "out.zarr", array), _attrs(second, array)
            assert two.get("channel_names") == one.get("channel_names") and two["units"] == one["units"]
    # the cascade itself is right: scipy.signal.sosfiltfilt by each stage's recorded sections in turn
    x = np.concatenate([np.load(folder / "archive" / f"{a}.npy") for a in arrays["pier"]])
    f1, f2 = (_attrs(s, arrays["pier"][0])["filter"] for s in (folder / "out.zarr", second))
    ref = scipy.signal.sosfiltfilt(np.asarray(f2["sos"]), scipy.signal.sosfiltfilt(
        np.asarray(f1["sos"]), x, axis=0, padlen=f1["edge_samples"]), axis=0, padlen=f2["edge_samples"])
    y = np.concatenate([np.asarray(zarr.open_group(str(second), mode="r")[a][:]) for a in arrays["pier"]])
    assert np.max(np.abs(y - ref)) <= 1e-6 * np.max(np.abs(x))  # well above both stages' 1e-9 tolerance


def test_a_second_stage_configuration_wins_and_stage_one_relabels_follow_without_refiltering(work):
    folder, arrays = work
    _run(_config(folder, TABLES))
    second = folder / "notch.zarr"
    _run(_stage2(folder, {"pier": {"units": ["Pa", "Pa"]}}))
    a = _attrs(second, arrays["pier"][0])
    assert a["units"] == ["Pa", "Pa"]  # stage 2's own table
    assert a["channel_names"] == ["north", "east"]  # not given there: stage 1's (TABLES["pier"])
    # stage 1 relabelled: neither stage refilters, and stage 2's outputs follow at its next run
    assert _blocks_run(_run(_config(folder, {**TABLES, "deck-north": {"names": ["z", "y", "x"]}}))) == 0
    res = _run(_stage2(folder, {"pier": {"units": ["Pa", "Pa"]}}))
    assert _blocks_run(res) == 0 and res.counts()["skipped"] == 6
    d = _attrs(second, arrays["deck-north"][0])
    assert d["channel_names"] == ["z", "y", "x"] and d["units"] == ["V"] * 3  # now "*" of TABLES in stage 1


# -- configuration errors ---------------------------------------------------------------

@pytest.mark.parametrize("extra, expected", [
    ('[archive]\nchannels = 3\n', ["[archive] channels must be a table of streams", '"*"']),
    ('[archive.channels.pier]\nname = ["a"]\n', ['[archive.channels."pier"]: unknown key(s) name', "names, units"]),
    ('[archive.channels.pier]\nnames = ["a", "a"]\n', ['[archive.channels."pier"] names', "'a' is given twice",
                                                      "its own name"]),
    ('[archive.channels.pier]\nnames = ["a", " "]\n', ['[archive.channels."pier"] names[1] is empty',
                                                      "give channel 2 a name"]),
    ('[archive.channels.pier]\nnames = ["a", 2]\n', ['[archive.channels."pier"] names[1]', "expected a string"]),
    ('[archive.channels.pier]\nnames = "a"\n', ['[archive.channels."pier"] names', "list of strings"]),
    ('[archive.channels.pier]\nnames = []\n', ['[archive.channels."pier"] names is an empty list']),
    ('[archive.channels.pier]\nunits = 1.0\n', ['[archive.channels."pier"] units', "a string", "list of strings"]),
    ('[archive.channels.pier]\nunits = ""\n', ['[archive.channels."pier"] units is empty']),
    ('[archive.channels.pier]\nunits = ["V", ""]\n', ['[archive.channels."pier"] units[1] is empty']),
    ('[archive.channels.pier]\n', ['[archive.channels."pier"] gives neither names nor units']),
    ('[archive.channels]\npier = "V"\n', ['[archive.channels."pier"] must be a table']),
    ('[archive.channels." "]\nunits = "V"\n', ["the stream name is empty"]),
])
def test_config_errors_name_the_stream_table_and_key(extra, expected):
    # one line starting with the file's name, holding each expected text (as every other key's)
    test_bad_inputs.test_config_errors_name_table_and_key(extra, expected)


def test_status_shows_each_streams_labels_and_lists_them_per_file(work):
    # The labels are those this test's configuration gives (TABLES); `twinpass status` says
    # them on each stream's line and under channel_names / units per file in --json.
    folder, arrays = work
    config = _config(folder, TABLES)
    _run(config)
    text = run_cli(["status", str(config)]).stdout
    assert "stream deck-north: vertical (m/s^2), lateral (m/s^2), longitudinal (m/s^2)" in text
    assert "stream pier: north (V), east (V)" in text and "stream mast: channel 0 (V)" in text
    files = {f["name"]: f for f in json.loads(run_cli(["status", str(config), "--json"]).stdout)["files"]}
    assert files[arrays["pier"][0]]["channel_names"] == ["north", "east"]
    assert files[arrays["mast"][0]]["units"] == ["V"] and files[arrays["mast"][0]]["channel_names"] is None
