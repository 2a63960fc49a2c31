"""Block layout: how a file of a segment is cut into blocks aligned to output chunks.

Every block writes whole chunks of one output array and no chunk is shared by two blocks,
so blocks can be written concurrently without locks. Lengths are in samples.
"""

from __future__ import annotations

from dataclasses import dataclass

from twinpass.errors import ConfigError

MIN_BLOCK_SAMPLES = 65536
"""Smallest automatic block core (samples), where the memory budget allows it."""
HALOS_PER_BLOCK = 24
"""Automatic blocks are at least this many halos long where the memory budget allows it:
halo overhead 2/24 (8.3 %) or less,
before the balancing of :meth:`Layout.block_for` (which keeps it below 2/12 in the worst case
of a file just over one block, and near 2/24 for files of several blocks)."""
CARRY_REMEDY = 'use [processing] mode = "carry" (IIR designs; it needs no halos)'
"""The remedy named when the halos alone exceed the memory budget."""
BYTES_PER_WINDOW_SAMPLE = 8 * 5
"""float64 working copies per window sample and channel: input, extension, forward,
backward and output (a conservative count used for the memory budget)."""


@dataclass(frozen=True)
class Layout:
    """Block and chunk lengths for one sample rate and channel count (samples)."""

    block_samples: int
    """Longest block core (samples)."""
    chunk_samples: int
    halo: int
    balanced: bool = False
    """Cut each file into blocks of equal length (at most ``block_samples``) instead of full
    blocks and a short remainder, whose halos would cost as much as a full block's."""

    def block_for(self, frames: int) -> int:
        """Block core length (samples) used for a file of ``frames`` samples."""
        if not self.balanced or frames <= self.block_samples:
            return self.block_samples
        n = -(-frames // self.block_samples)
        b = -(-frames // n)
        if self.chunk_samples < self.block_samples:  # whole chunks per block
            b = -(-b // self.chunk_samples) * self.chunk_samples
        return min(b, self.block_samples)

    def spans(self, frames: int) -> list[tuple[int, int]]:
        """Block cores [start, stop) covering a file of ``frames`` samples."""
        b = self.block_for(frames)
        return [(s, min(s + b, frames)) for s in range(0, frames, b)]

    def chunk_for(self, frames: int) -> int:
        """Chunk length of a file's output array (never longer than the file)."""
        chunk = self.block_for(frames) if self.chunk_samples == self.block_samples else self.chunk_samples
        return max(1, min(chunk, frames))


def choose_layout(
    *,
    sample_rate_hz: float,
    channels: int,
    halo: int,
    block_seconds: float | None,
    chunk_seconds: float | None,
    memory_budget_mib: float,
    carry: bool = True,
) -> Layout:
    """Pick block and chunk lengths.

    Parameters
    ----------
    sample_rate_hz : float
        Samples per second (Hz).
    channels : int
        Channels per sample.
    halo : int
        Halo per side in samples (the design's effective length), or 0 in carry mode.
    block_seconds : float or None
        Requested block core length in seconds (s), used as given if its window fits the
        memory budget; None chooses ``max(24 * halo, 65536)`` samples, capped by the memory
        budget, and balances the blocks of each file (see :meth:`Layout.block_for`).
    chunk_seconds : float or None
        Output chunk length in seconds (s); None makes one chunk per block. Blocks are a whole
        number of chunks: rounded up, or down where rounding up would exceed the memory
        budget (never below one chunk).
    memory_budget_mib : float
        Budget for one block's working memory (MiB); the window (block + 2 halos, samples)
        times channels times ``BYTES_PER_WINDOW_SAMPLE`` must fit. The returned layout
        always fits.
    carry : bool
        Whether the state-carrying mode, which needs no halos, could filter this signal (an
        IIR design, no pieces left out): the error for halos that do not fit names it.

    Returns
    -------
    Layout

    Raises
    ------
    ConfigError
        No block fits the memory budget: ``block_seconds`` asks for blocks whose window does
        not fit, one chunk of ``chunk_seconds`` with its halos does not fit, or the halos
        alone do not fit.
    """
    budget = memory_budget_mib * 2**20
    per_sample = channels * BYTES_PER_WINDOW_SAMPLE  # bytes per window sample, all channels
    cap = int(budget // per_sample) - 2 * halo  # longest block core (samples) whose window fits

    halos = (f"with halos of {halo} samples on each side and {channels} channels" if halo
             else f"with {channels} channels")

    def too_long(setting: str, value: float, samples: int, made: str) -> ConfigError:
        """The error for a setting whose shortest block (``samples``) does not fit."""
        remedies = ([f"lower {setting.split()[-1]} (at most {cap / sample_rate_hz:.3g} s here)"] if cap > 0
                    else [CARRY_REMEDY] if carry else [])
        need = (samples + 2 * halo) * per_sample / 2**20
        return ConfigError(
            f"{setting} = {value:g} makes {made}; {halos} one block needs about {need:.3g} MiB, above "
            f"[processing] memory_budget_mib = {memory_budget_mib:g}: "
            + " or ".join([*remedies, "raise memory_budget_mib"])
        )

    if block_seconds is not None:
        block = max(1, int(round(block_seconds * sample_rate_hz)))
        if block > cap:
            raise too_long("[processing] block_seconds", block_seconds, block, f"blocks of {block} samples")
    elif cap <= 0:
        raise ConfigError(
            f"{halos}, the halos alone need about {2 * halo * per_sample / 2**20:.3g} MiB, above [processing] "
            f"memory_budget_mib = {memory_budget_mib:g}, so no block fits: raise memory_budget_mib"
            + (f" or {CARRY_REMEDY}" if carry else "")
        )
    else:
        block = min(max(HALOS_PER_BLOCK * halo, MIN_BLOCK_SAMPLES), cap)
    if chunk_seconds is None:
        return Layout(block_samples=block, chunk_samples=block, halo=halo, balanced=block_seconds is None)
    chunk = max(1, int(round(chunk_seconds * sample_rate_hz)))
    if chunk > cap:  # blocks are whole chunks
        raise too_long("[output] chunk_seconds", chunk_seconds, chunk,
                       f"chunks of {chunk} samples, and blocks of whole chunks")
    up = -(-block // chunk) * chunk
    block = up if up <= cap else cap // chunk * chunk
    return Layout(block_samples=block, chunk_samples=chunk, halo=halo, balanced=block_seconds is None)


def blocks_touching(spans: list[tuple[int, int]], redo: tuple[tuple[int, int], ...]) -> list[int]:
    """Indices of blocks whose core overlaps any of the ``redo`` spans (file frames)."""
    out = []
    for i, (s, e) in enumerate(spans):
        if any(s < b and a < e for a, b in redo):
            out.append(i)
    return out
