"""README.md and DEVELOPERS.md against the code they describe.

References: the configuration dataclasses (``twinpass.config``), the command line's argparse
parser (``twinpass.cli.build_parser``) and the files under ``src/twinpass`` are what a
configuration, a command and the source tree accept and hold; the documents must name
each of them, with the defaults the code uses. The README's Python recipes are run as
written against a store a real run wrote.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import re
import tomllib
import types
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from conftest import START, make_signal, write_config, write_stream
from twinpass.cli import build_parser
from twinpass.config import _SECTIONS

ROOT = Path(__file__).resolve().parents[1]


def _section(doc: str, title: str) -> str:
    """The text of the ``## title`` section of ``doc`` (up to the next ``## `` heading)."""
    m = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## |\Z)", doc, re.S | re.M)
    assert m, f"no '## {title}' section"
    return m.group(1)


def _rows(text: str) -> list[list[str]]:
    """The cells of every markdown table row in ``text`` (header and rule rows left out)."""
    rows = []
    for line in text.splitlines():
        if line.startswith("|") and not re.fullmatch(r"\|[-:| ]+\|", line):
            rows.append([c.strip() for c in re.split(r"(?<!\\)\|", line.strip().strip("|"))])
    return [r for r in rows if r[0] not in ("key", "command")]


def _reference_tables() -> dict[str, dict[str, list[str]]]:
    """README "Configuration reference": {TOML table: {key: [default, unit, meaning]}}."""
    ref = _section((ROOT / "README.md").read_text(encoding="utf-8"), "Configuration reference")
    tables: dict[str, dict[str, list[str]]] = {}
    for m in re.finditer(r"^### `\[(\w+)\]`\n(.*?)(?=^### |\Z)", ref, re.S | re.M):
        tables[m.group(1)] = {r[0].strip("`"): r[1:] for r in _rows(m.group(2))}
    return tables


def _default(f: dataclasses.Field[Any]) -> Any:
    value = f.default_factory() if f.default is dataclasses.MISSING else f.default  # type: ignore[misc]
    return list(value) if isinstance(value, tuple) else value


def test_every_configuration_key_is_in_the_reference_with_its_default() -> None:
    # Source: the dataclasses twinpass.config validates a TOML file into (every key they
    # accept, and the value a key left out takes).
    tables = _reference_tables()
    assert set(tables) == set(_SECTIONS), "one table per TOML table in README 'Configuration reference'"
    for table, cls in _SECTIONS.items():
        keys = {f.name: f for f in dataclasses.fields(cls)}
        documented = tables[table]
        assert set(documented) == set(keys), (
            f"[{table}]: undocumented {sorted(set(keys) - set(documented))}, "
            f"documented but unknown {sorted(set(documented) - set(keys))}"
        )
        for key, f in keys.items():
            default, cell = _default(f), documented[key][0].replace("`", "")
            if default is None:
                continue  # "none" or what the code does instead, in words
            assert tomllib.loads(f"v = {cell}")["v"] == default, f"[{table}] {key}: README default {cell!r}"


def test_the_readme_says_how_npy_files_are_read() -> None:
    # Source: src/twinpass/io/readers/npy.py reads each window with positional reads
    # (twinpass.io.readers._common.read_exact, os.preadv) and maps no file into memory.
    code = (ROOT / "src" / "twinpass" / "io" / "readers" / "npy.py").read_text(encoding="utf-8")
    assert "memmap(" not in code and "import mmap" not in code and "InterleavedRecording" in code
    (row,) = [r for r in _rows(_section((ROOT / "README.md").read_text(encoding="utf-8"), "Input formats and scaling"))
              if r[0] == "NumPy"]
    assert "memory-mapped" not in row[2] and "positional reads" in row[2], row


def _options(parser: argparse.ArgumentParser) -> set[str]:
    return {o for a in parser._actions for o in a.option_strings if o not in ("-h", "--help")}


def test_every_command_line_option_is_in_the_command_reference() -> None:
    # Source: the argparse parser of the `twinpass` command (every option it accepts).
    ref = _section((ROOT / "README.md").read_text(encoding="utf-8"), "Command reference")
    rows = {re.match(r"`twinpass(?: (\w+))?", r[0]).group(1) or "": " ".join(r[1:]) for r in _rows(ref)}
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    commands = {"": parser, **sub.choices}
    assert set(rows) == set(commands), f"commands in the reference: {sorted(rows)}; in the parser: {sorted(commands)}"
    for name, p in commands.items():
        missing = sorted(o for o in _options(p) if not re.search(rf"`{re.escape(o)}\b", rows[name]))
        assert not missing, f"twinpass {name}: options missing from README 'Command reference': {missing}"
        for a in p._actions:  # each default the parser takes (and its --help shows) is in the row too
            if a.default not in (None, False, argparse.SUPPRESS) and not isinstance(a, argparse._SubParsersAction):
                assert str(a.default) in rows[name], f"twinpass {name}: {a.dest} default {a.default!r} not in README"
    # What --require-complete requires (twinpass.status.shortfalls): the lock and --verify's findings too.
    assert "lock" in rows["status"] and "`--verify`" in rows["status"].split("--require-complete", 1)[1]
    assert "temporary server" in rows["serve"] and "temporary server" in rows["save"]


def _layout_entries() -> tuple[set[str], set[str]]:
    """DEVELOPERS.md "Layout": (modules listed, leaf folders listed), paths from the repository root."""
    dev = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    block = re.search(r"## Layout\n\n```\n(.*?)```", dev, re.S)
    assert block, "no Layout block in DEVELOPERS.md"
    stack: list[str] = []
    files, folders = set(), set()
    for line in block.group(1).splitlines():
        m = re.match(r"( *)((?:[\w./]+\.py|[\w./]+/)(?:, [\w.]+\.py)*)(?:  |$)", line)
        if not m:
            continue  # a description carried on from the line before
        depth = len(m.group(1)) // 2
        del stack[depth:]
        for name in m.group(2).split(", "):
            if name.endswith("/"):
                stack.append(name)
                folders.add("".join(stack))
            else:
                files.add("".join(stack) + name)
    leaves = {f for f in folders if not any(o != f and o.startswith(f) for o in folders | files)}
    return files, leaves


def test_developers_layout_lists_every_module() -> None:
    # Source: the Python files under src/twinpass (what the package holds).
    files, leaves = _layout_entries()
    modules = {p.relative_to(ROOT).as_posix() for p in (ROOT / "src/twinpass").rglob("*.py")
               if p.name != "__init__.py"}
    unlisted = sorted(m for m in modules if m not in files and not any(m.startswith(f) for f in leaves))
    assert not unlisted, f"modules missing from DEVELOPERS.md Layout: {unlisted}"
    gone = sorted(f for f in files if f.startswith("src/") and f not in modules)
    assert not gone, f"DEVELOPERS.md Layout lists modules that do not exist: {gone}"


def test_readme_states_the_passband_limits_the_grading_uses(tmp_path: Path) -> None:
    # Source: twinpass.core.checks.grading_limits, the rule a block's passband deviation is
    # graded by (half the overall ripple + the estimator allowance + the [checks] figure),
    # taken for the demo's own configuration at its rate; the README's worked example and its
    # [checks] reference must give the same figures (0.5 + 0.3 + 0.5 = 1.3 dB and
    # 0.5 + 0.3 + 1.0 = 1.8 dB for the demo's 1 dB ripple and the default [checks]).
    from twinpass.config import load_config
    from twinpass.core.checks import ESTIMATOR_ERROR_DB, grading_limits
    from twinpass.core.design import design_filter
    from twinpass.demo import SAMPLE_RATE_HZ, demo_config_text

    path = tmp_path / "twinpass.toml"
    path.write_text(demo_config_text(), encoding="utf-8")
    cfg = load_config(path)
    design = design_filter(cfg.response, SAMPLE_RATE_HZ, cfg.processing.tolerance)
    limit = grading_limits(design, cfg.checks, cfg.processing.tolerance)["passband_dev_db"]
    warn, fail = round(float(limit.warn), 9), round(float(limit.fail), 9)
    assert (warn, fail) == (1.3, 1.8)
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    checks = " ".join(_section(readme, "Checks, status and report").split())
    assert f"±{warn:g} dB" in checks and f"±{fail:g} dB" in checks
    assert f"{ESTIMATOR_ERROR_DB:g} dB" in checks and "half the overall `passband_ripple_db`" in checks
    table = _reference_tables()["checks"]
    assert f"±{warn:g} dB" in table["passband_warn_db"][2] and f"±{fail:g} dB" in table["passband_fail_db"][2]
    for cell in (table["passband_warn_db"][2], table["passband_fail_db"][2]):
        assert f"{ESTIMATOR_ERROR_DB:g} dB" in cell and "half the overall" in cell
    assert "beyond the designed ripple" not in readme


# ----------------------------------------------------------------------- README: reading the output
def _readme_python(containing: str) -> str:
    """The README's ```python block that contains ``containing``."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"^```python\n(.*?)^```", readme, re.S | re.M)
    found = [b for b in blocks if containing in b]
    assert len(found) == 1, f"README: {len(found)} python blocks contain {containing!r}"
    return found[0]


HOUR_FRAMES = 12_000
"""Frames of each file of the recipe's store: one minute at 200 Hz."""


@pytest.fixture(scope="module")
def recipe_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder holding ``demo-out/filtered.zarr`` as the README's recipe names it: a real run's
    output of two one-minute 3-channel files of stream ``deck-north``, the second starting an
    hour after the first (two segments), both named by the times of their first samples."""
    from twinpass.config import load_config
    from twinpass.job import run_job

    folder = tmp_path_factory.mktemp("recipe")
    root = folder / "demo-out" / "archive"
    x = make_signal(2 * HOUR_FRAMES, 3, 200.0, seed=3)
    write_stream(root, "deck-north", x[:HOUR_FRAMES], 200.0, 1, fmt="wav24", start=START)
    write_stream(root, "deck-north", x[HOUR_FRAMES:], 200.0, 1, fmt="wav24", start=START + dt.timedelta(hours=1))
    cfg = write_config(folder / "demo-out", output={"store": "filtered.zarr"})
    assert run_job(load_config(cfg)).ok
    return folder


def _run_recipe(folder: Path, monkeypatch: pytest.MonkeyPatch) -> dict[str, Any]:
    monkeypatch.chdir(folder)
    namespace: dict[str, Any] = {}
    exec(compile(_readme_python("def time_axis"), "README.md", "exec"), namespace)
    return namespace


def test_readme_recipe_gives_each_output_its_own_time_axis(recipe_folder: Path,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: each file's start time as written here (the times of their first samples, in
    # their names) and the sample period 1 / 200 Hz = 5 ms: sample i of a file is at its own
    # start + i * 5 ms, so the first samples of the two files are an hour apart although both
    # are index 0.
    ns = _run_recipe(recipe_folder, monkeypatch)
    a, t, x = ns["a"], ns["t"], ns["x"]
    assert a.shape == (HOUR_FRAMES, 3) and x.shape == (HOUR_FRAMES, 3)
    assert t.dtype == np.dtype("datetime64[ns]") and t.shape == (HOUR_FRAMES,)
    assert t[0] == np.datetime64(START.replace(tzinfo=None), "ns")
    assert np.all(np.diff(t) == np.timedelta64(5_000_000, "ns"))
    later = ns["time_axis"](ns["g"]["deck-north/deck-north_20260301T010000"])
    assert later[0] == np.datetime64(START.replace(tzinfo=None) + dt.timedelta(hours=1), "ns")
    assert later[7] - t[7] == np.timedelta64(3600, "s")


def test_readme_time_axis_converts_to_utc_and_rounds_to_the_nanosecond(recipe_folder: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: ISO 8601 offsets (12:00+02:00 is 10:00 UTC) and the sample period 1 / 48 kHz
    # = 20833.33 ns: sample n is at round(n * 1e9 / 48000) ns, and sample 48000 exactly 1 s on.
    time_axis = _run_recipe(recipe_folder, monkeypatch)["time_axis"]
    a = types.SimpleNamespace(attrs={"start_time": "2026-03-01T12:00:00+02:00", "sample_rate_hz": 48000.0},
                              shape=(48001, 2))
    t = time_axis(a)
    assert t[0] == np.datetime64("2026-03-01T10:00:00", "ns")
    assert t[1] - t[0] == np.timedelta64(20833, "ns") and t[2] - t[0] == np.timedelta64(41667, "ns")
    assert t[-1] == np.datetime64("2026-03-01T10:00:01", "ns")


def test_readme_xarray_recipe_times_each_variable_from_its_own_file(recipe_folder: Path,
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the second file's start time as written here (an hour after the first); xarray
    # gives the group's two files one shared dimension name "time" without times.
    pytest.importorskip("xarray", reason="xarray is optional (the README's recipe says so)")
    ns = _run_recipe(recipe_folder, monkeypatch)
    exec(compile(_readme_python("xr.open_zarr"), "README.md", "exec"), ns)
    ds, second = ns["ds"], ns["second_hour"]
    assert set(ds.data_vars) == {"deck-north_20260301T000000", "deck-north_20260301T010000"}
    assert "time" not in ds.coords
    assert second.dims == ("time", "channel") and second.shape == (HOUR_FRAMES, 3)
    assert second["time"].values[0] == np.datetime64(START.replace(tzinfo=None) + dt.timedelta(hours=1), "ns")
    np.testing.assert_array_equal(second.values, ns["g"]["deck-north/deck-north_20260301T010000"][:])


def test_readme_channel_labels_example_is_a_configuration_for_a_stream_not_in_the_demo(tmp_path: Path) -> None:
    # Source: twinpass.config (what the example parses into) and twinpass.demo (its streams,
    # whose WAV files hold full-scale values in the channel order x, y, z, and carry no labels):
    # the example labels a stream of its own, so it cannot be read as the demo's channels.
    from twinpass.config import load_config
    from twinpass.demo import STREAMS, TRUNCATED_STREAM

    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    block = next(b for b in re.findall(r"^```toml\n(.*?)^```", readme, re.S | re.M) if "[archive.channels." in b)
    path = tmp_path / "twinpass.toml"
    path.write_text('[response]\nkind = "lowpass"\norder = 2\ncutoff_hz = 10.0\n\n' + block, encoding="utf-8")
    channels = {c.stream: c for c in load_config(path).archive.channels or ()}
    named = set(channels) - {"*"}
    assert named and not named & {*STREAMS, TRUNCATED_STREAM}
    for stream in named:
        assert channels[stream].names and len(set(channels[stream].names)) == len(channels[stream].names)


def test_readme_floor_of_the_design_report_and_its_notch_figure() -> None:
    # Source: twinpass.core.design (REPORT_FLOOR_DB, and the notch of
    # configs/hydrophone-mains-notch.toml designed at 48 kHz: its exact zero at 50 Hz computes
    # to -378.9 dB overall), which the README's design-report paragraph quotes.
    from twinpass.config import load_config
    from twinpass.core.design import REPORT_FLOOR_DB, design_filter

    cfg = load_config(ROOT / "configs" / "hydrophone-mains-notch.toml")
    design = design_filter(cfg.response, 48000.0, cfg.processing.tolerance)
    notch = next(e for e in design.report["edges"] if e["edge"] == "notch")
    text = " ".join(_section((ROOT / "README.md").read_text(encoding="utf-8"),
                             "How the response is specified").split())
    assert f"`< {REPORT_FLOOR_DB:g}`" in text and f"below −{-REPORT_FLOOR_DB:g} dB" in text
    assert f"−{-notch['overall_db']:.1f} dB overall for `configs/hydrophone-mains-notch.toml`" in text
    assert "**second-order sections** (biquads" in text
