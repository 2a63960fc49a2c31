"""Block layout: how a file of a segment is cut into blocks aligned to output chunks.

Every block writes whole chunks of one output array and no chunk is shared by two blocks,
so blocks can be written concurrently without locks. Lengths are in samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

MIN_BLOCK_SAMPLES = 65536
"""Smallest automatic block core (samples)."""
HALOS_PER_BLOCK = 20
"""Automatic blocks are at least this many halos long: halo overhead 2/20 = 10 % or less."""
BYTES_PER_WINDOW_SAMPLE = 8 * 5
"""float64 working copies per window sample and channel: input, extension, forward,
backward and output (a conservative count used for the memory budget)."""


@dataclass(frozen=True)
class Layout:
    """Block and chunk lengths for one sample rate and channel count (samples)."""

    block_samples: int
    chunk_samples: int
    halo: int

    def spans(self, frames: int) -> list[tuple[int, int]]:
        """Block cores [start, stop) covering a file of ``frames`` samples."""
        return [(s, min(s + self.block_samples, frames)) for s in range(0, frames, self.block_samples)]

    def chunk_for(self, frames: int) -> int:
        """Chunk length of a file's output array (never longer than the file)."""
        return max(1, min(self.chunk_samples, frames))


def choose_layout(
    *,
    sample_rate_hz: float,
    channels: int,
    halo: int,
    block_seconds: float | None,
    chunk_seconds: float | None,
    memory_budget_mib: float,
) -> Layout:
    """Pick block and chunk lengths.

    Parameters
    ----------
    sample_rate_hz : float
        Samples per second.
    channels : int
        Channels per sample.
    halo : int
        Halo per side in samples (the design's effective length), or 0 in carry mode.
    block_seconds : float or None
        Requested block core length in seconds; None chooses ``max(20 * halo, 65536)``
        samples, capped by the memory budget.
    chunk_seconds : float or None
        Output chunk length in seconds; None makes one chunk per block. Blocks are rounded
        up to a whole number of chunks.
    memory_budget_mib : float
        Budget for one block's working memory; the window (block + 2 halos) times
        channels times ``BYTES_PER_WINDOW_SAMPLE`` must fit.
    """
    budget = memory_budget_mib * 2**20
    cap = int(budget // (channels * BYTES_PER_WINDOW_SAMPLE)) - 2 * halo
    if block_seconds is not None:
        block = max(1, int(round(block_seconds * sample_rate_hz)))
    else:
        block = max(HALOS_PER_BLOCK * halo, MIN_BLOCK_SAMPLES)
        if cap > 0:
            block = min(block, max(cap, 4096))
    if chunk_seconds is not None:
        chunk = max(1, int(round(chunk_seconds * sample_rate_hz)))
        block = int(math.ceil(block / chunk)) * chunk
    else:
        chunk = block
    return Layout(block_samples=block, chunk_samples=chunk, halo=halo)


def blocks_touching(spans: list[tuple[int, int]], redo: tuple[tuple[int, int], ...]) -> list[int]:
    """Indices of blocks whose core overlaps any of the ``redo`` spans (file frames)."""
    out = []
    for i, (s, e) in enumerate(spans):
        if any(s < b and a < e for a, b in redo):
            out.append(i)
    return out
