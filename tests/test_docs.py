"""DEVELOPERS.md against the code it describes.

Reference: the files under ``src/twinpass`` are what the source tree holds; the document
must name each of them.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


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
