"""README.md and DEVELOPERS.md against the code they describe.

References: the configuration dataclasses (``twinpass.config``), the command line's argparse
parser (``twinpass.cli.build_parser``) and the files under ``src/twinpass`` are what a
configuration, a command and the source tree accept and hold; the documents must name
each of them, with the defaults the code uses.
"""

from __future__ import annotations

import argparse
import dataclasses
import re
import tomllib
from pathlib import Path
from typing import Any

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
