"""Channel names and units of an output array.

For each key (names, units) of a file, the first that gives one wins:

1. the file's own description: a raw file's sidecar (``channel_names``, ``units``; the
   reader checks them against ``channels``);
2. the configuration's table of the file's stream, ``[archive.channels."<stream>"]``;
3. the configuration's ``[archive.channels."*"]``;
4. for an array of an earlier job's output store read as input, that array's attributes
   ``channel_names`` and ``units`` (a later stage keeps the first stage's labels).

Units given as one string apply to every channel. The result is one name and one unit per
channel (time-major outputs of shape (samples, channels): entry ``k`` labels column ``k``),
or nothing for a key no source gives. Labels change no sample: they stay out of the
fingerprints and the design digest, and a changed label only rewrites the attributes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

from ..config import CHANNELS_ANY_STREAM, JobConfig, StreamChannels

LABEL_ATTRS = ("channel_names", "units")
"""The output array attributes (and the sidecar keys) holding the labels."""


@dataclass(frozen=True)
class ChannelLabels:
    """One name and one unit per channel, each None when not given."""

    names: tuple[str, ...] | None = None
    units: tuple[str, ...] | None = None

    def attrs(self) -> dict[str, list[str]]:
        """The output array attributes: ``channel_names`` and ``units`` as lists, given ones only."""
        out = {}
        if self.names is not None:
            out["channel_names"] = list(self.names)
        if self.units is not None:
            out["units"] = list(self.units)
        return out


class LabelMismatch(Exception):
    """Labels that do not fit the file's channels: which (``what``: ``"names"`` or
    ``"units"``), why (``reason``) and what to do (``remedy``)."""

    def __init__(self, reason: str, remedy: str, what: str = "names") -> None:
        super().__init__(reason)
        self.reason, self.remedy, self.what = reason, remedy, what


def _from_config(cfg: JobConfig, table: StreamChannels, key: str, stream: str, channels: int) -> tuple[str, ...]:
    value = table.names if key == "names" else table.units
    if isinstance(value, str):
        return (value,) * channels
    assert value is not None
    if len(value) != channels:
        what = "name" if key == "names" else "unit"
        shared = (f', or give the stream a table of its own, [archive.channels."{stream}"]'
                  if table.stream == CHANNELS_ANY_STREAM else "")
        one = ' (or one string for every channel, units = "m/s^2")' if key == "units" else ""
        raise LabelMismatch(
            f"stream {stream!r} has {channels} channel(s), but {table.table} {key} in {cfg.source} lists "
            f"{len(value)}",
            f"list {channels} {what}(s) in {table.table} {key}, one per channel in the recordings' order{one}{shared}",
            key,
        )
    return tuple(value)


def _carried(attrs: Mapping[str, Any], key: str, stream: str, channels: int) -> tuple[str, ...] | None:
    """An earlier job's array attribute ``key`` (``channel_names`` or ``units``), or None."""
    value = attrs.get(key)
    if value is None:
        return None
    if key == "units" and isinstance(value, str):
        value = [value] * channels
    table = f'[archive.channels."{stream}"] {"names" if key == "channel_names" else "units"}'
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value) or len(value) != channels:
        held = f"lists {len(value)}" if isinstance(value, list) else f"is {value!r}"
        raise LabelMismatch(
            f"its attribute {key} {held}, not one string per channel of its {channels} channel(s)",
            f"give the stream's {'names' if key == 'channel_names' else 'units'} in {table} (they take the "
            "place of the attribute), or leave the array out with [archive] exclude",
            "names" if key == "channel_names" else "units",
        )
    return tuple(value)


def labels_for(cfg: JobConfig, stream: str, channels: int, own: Mapping[str, Any] | None = None,
               carried: Mapping[str, Any] | None = None,
               problems: list[LabelMismatch] | None = None) -> ChannelLabels:
    """The channel names and units of a file of ``stream`` with ``channels`` channels.

    Parameters
    ----------
    cfg : JobConfig
        Its ``[archive] channels`` tables.
    stream : str
        The file's stream.
    channels : int
        The file's channel count.
    own : mapping, optional
        The labels the file describes itself with (``RecordingInfo.extra``: ``channel_names``
        and ``units``, one per channel, checked by its reader).
    carried : mapping, optional
        The attributes of an earlier job's output array read as this input.
    problems : list, optional
        When given, a key whose labels do not fit is left None and its
        :class:`LabelMismatch` appended here instead of raised (the other key still applies).

    Returns
    -------
    ChannelLabels

    Raises
    ------
    LabelMismatch
        When the labels that apply list more or fewer entries than ``channels``.
    """
    own = own or {}
    stream_table, any_table = cfg.archive.channels_for(stream)
    found: dict[str, tuple[str, ...] | None] = {}
    for key, attr in (("names", "channel_names"), ("units", "units")):
        given = own.get(attr)
        if given is not None:
            found[key] = tuple(given)
            continue
        table = next((t for t in (stream_table, any_table)
                      if t is not None and getattr(t, key) is not None), None)
        try:
            if table is not None:
                found[key] = _from_config(cfg, table, key, stream, channels)
            else:
                found[key] = None if carried is None else _carried(carried, attr, stream, channels)
        except LabelMismatch as e:
            if problems is None:
                raise
            problems.append(e)
            found[key] = None
    return ChannelLabels(found["names"], found["units"])


__all__ = ["LABEL_ATTRS", "ChannelLabels", "LabelMismatch", "labels_for"]
