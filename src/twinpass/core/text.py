"""Wording shared by messages, notes and summaries (no I/O)."""

from __future__ import annotations

from collections.abc import Sequence


def named_list(items: Sequence[str], shown: int, noun: str = "") -> str:
    """The first ``shown`` of ``items`` and a count of the rest: ``"a, b, c and 5 more"``
    (``noun``, e.g. ``" file(s)"``, follows the count)."""
    more = len(items) - shown
    return ", ".join(items[:shown]) + (f" and {more} more{noun}" if more > 0 else "")


__all__ = ["named_list"]
