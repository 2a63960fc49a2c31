"""Block layout: how a file of a segment is cut into blocks aligned to output chunks.

Every block writes whole chunks of one output array and no chunk is shared by two blocks,
so blocks can be written concurrently without locks. Lengths are in samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from twinpass.core.checks import MIN_SEGMENTS, MIN_USABLE_NPERSEG
from twinpass.errors import ConfigError

MIN_BLOCK_SAMPLES = 65536
"""Smallest automatic block core (samples), where the memory budget allows it."""
BLOCK_FLOOR_SAMPLES = 64
"""No layout has block cores shorter than this (samples): each block costs a task, a table
row and chunk files, so shorter blocks make a run that never ends rather than a copy."""
CHUNK_FLOOR_SAMPLES = BLOCK_FLOOR_SAMPLES
"""No ``[output] chunk_seconds`` makes chunks shorter than this (samples): every chunk is a
file of the store, so a hundredth of a sample per chunk second would mean millions of files."""
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


def shortest_block(seam_samples: int = 0, response_checks: bool = False) -> tuple[int, str]:
    """The shortest block core a layout may have (samples), and what sets it (for messages).

    The largest of :data:`BLOCK_FLOOR_SAMPLES`; twice ``seam_samples`` (the seam samples a
    block compares at each of its edges lie inside it); and, when the response is checked,
    ``MIN_SEGMENTS * MIN_USABLE_NPERSEG`` (the Welch estimate of
    :func:`twinpass.core.checks.segment_length` measures nothing in shorter blocks).
    """
    needs = [(BLOCK_FLOOR_SAMPLES, f"the floor of {BLOCK_FLOOR_SAMPLES} samples"),
             (2 * int(seam_samples), f"twice [checks] seam_samples = {int(seam_samples)}")]
    if response_checks:
        welch = MIN_SEGMENTS * MIN_USABLE_NPERSEG
        needs.append((welch, f"the response check's {MIN_SEGMENTS} Welch segments of {MIN_USABLE_NPERSEG} "
                             "samples, [checks] every > 0"))
    return max(needs, key=lambda need: need[0])


def samples_text(n: int) -> str:
    """``n`` samples in words, singular for one: ``"1 sample"``, ``"400 samples"``."""
    return f"{n} sample" if abs(n) == 1 else f"{n} samples"


def _rounded(value: float, up: bool = True) -> str:
    """``value`` (> 0) rounded up (or down) to 4 significant digits, as text: a lower (upper)
    limit stated this way is one that works."""
    step = 10.0 ** (math.floor(math.log10(value)) - 3)
    digits = math.ceil(value / step - 1e-9) if up else math.floor(value / step + 1e-9)
    return f"{digits * step:.4g}"


def choose_layout(
    *,
    sample_rate_hz: float,
    channels: int,
    halo: int,
    block_seconds: float | None,
    chunk_seconds: float | None,
    memory_budget_mib: float,
    carry: bool = True,
    seam_samples: int = 0,
    response_checks: bool = False,
    source: str = "",
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
    seam_samples : int
        ``[checks] seam_samples`` (samples); blocks are at least twice as long.
    response_checks : bool
        Whether blocks are response-checked (``[checks] every > 0``); blocks are then long
        enough for the Welch estimate. See :func:`shortest_block`.
    source : str
        The configuration file, named at the start of the errors ("" names none).

    Returns
    -------
    Layout
        Blocks of at least :func:`shortest_block` samples (a file shorter than that, or the
        remainder at a file's end, still makes a shorter block).

    Raises
    ------
    ConfigError
        No block fits the memory budget: ``block_seconds`` asks for blocks whose window does
        not fit, one chunk of ``chunk_seconds`` with its halos does not fit, the halos alone
        do not fit, or not even a block of :func:`shortest_block` samples fits. Or
        ``block_seconds`` asks for blocks shorter than :func:`shortest_block` at this rate,
        or ``chunk_seconds`` for chunks shorter than :data:`CHUNK_FLOOR_SAMPLES`.
    """
    budget = memory_budget_mib * 2**20
    per_sample = channels * BYTES_PER_WINDOW_SAMPLE  # bytes per window sample, all channels
    cap = int(budget // per_sample) - 2 * halo  # longest block core (samples) whose window fits
    floor, floor_why = shortest_block(seam_samples, response_checks)
    chunk = None if chunk_seconds is None else max(1, int(round(chunk_seconds * sample_rate_hz)))
    whole = -(-floor // (chunk or 1)) * (chunk or 1)  # the shortest block of whole chunks (samples)
    at = f"{source}: " if source else ""

    halos = (f"with halos of {halo} samples on each side and {channels} channels" if halo
             else f"with {channels} channels")

    def budget_for(samples: int) -> str:
        """The smallest memory_budget_mib (MiB) whose window fits a block core of ``samples``."""
        return _rounded((samples + 2 * halo) * per_sample / 2**20)

    def too_long(setting: str, value: float, samples: int, made: str) -> ConfigError:
        """The error for a setting whose shortest block (``samples``) does not fit."""
        remedies = ([f"lower {setting.split()[-1]} (at most {cap / sample_rate_hz:.3g} s here)"] if cap >= floor
                    else [CARRY_REMEDY] if carry and halo else [])
        need = (samples + 2 * halo) * per_sample / 2**20
        return ConfigError(
            f"{at}{setting} = {value:g} makes {made}; {halos} one block needs about {need:.3g} MiB, above "
            f"[processing] memory_budget_mib = {memory_budget_mib:g}: "
            + " or ".join([*remedies, f"raise memory_budget_mib (to at least {budget_for(max(samples, whole))} MiB)"])
        )

    def budget_too_small(longest: int, made: str = "", remedy: str = "") -> ConfigError:
        """The error for a budget whose longest block core (``longest`` samples) is below the
        floor; ``remedy`` is one more remedy."""
        return ConfigError(
            f"{at}[processing] memory_budget_mib = {memory_budget_mib:g} fits blocks of at most "
            f"{samples_text(longest)}{made} {halos}, below the shortest block of {floor} samples at "
            f"{sample_rate_hz:g} Hz ({floor_why}): raise memory_budget_mib to at least {budget_for(whole)} MiB"
            + (f" or {CARRY_REMEDY}" if carry and halo else "") + remedy
        )

    if chunk is not None and chunk < CHUNK_FLOOR_SAMPLES:
        raise ConfigError(
            f"{at}[output] chunk_seconds = {chunk_seconds:g} makes chunks of {samples_text(chunk)} at "
            f"{sample_rate_hz:g} Hz, below the shortest chunk of {CHUNK_FLOOR_SAMPLES} samples (each chunk is a file "
            f"of its own): set chunk_seconds to at least {_rounded(CHUNK_FLOOR_SAMPLES / sample_rate_hz)} s, or leave it out "
            "for one chunk per block"
        )
    if block_seconds is not None:
        block = max(1, int(round(block_seconds * sample_rate_hz)))
        if block < floor:
            raise ConfigError(
                f"{at}[processing] block_seconds = {block_seconds:g} makes blocks of {samples_text(block)} at "
                f"{sample_rate_hz:g} Hz, below the shortest block of {floor} samples ({floor_why}): set "
                f"block_seconds to at least {_rounded(floor / sample_rate_hz)} s ({floor} samples), "
                "or leave it out for automatic blocks"
            )
        if block > cap:
            raise too_long("[processing] block_seconds", block_seconds, block, f"blocks of {samples_text(block)}")
    elif cap <= 0 and halo:
        raise ConfigError(
            f"{at}{halos}, the halos alone need about {2 * halo * per_sample / 2**20:.3g} MiB, above [processing] "
            f"memory_budget_mib = {memory_budget_mib:g}, so no block fits: raise memory_budget_mib (to at least "
            f"{budget_for(whole)} MiB)" + (f" or {CARRY_REMEDY}" if carry else "")
        )
    elif cap < floor:
        raise budget_too_small(max(cap, 0))
    else:
        block = min(max(HALOS_PER_BLOCK * halo, MIN_BLOCK_SAMPLES), cap)
    if chunk is None:
        return Layout(block_samples=block, chunk_samples=block, halo=halo, balanced=block_seconds is None)
    if chunk > cap:  # blocks are whole chunks
        raise too_long("[output] chunk_seconds", chunk_seconds, chunk,
                       f"chunks of {samples_text(chunk)}, and blocks of whole chunks")
    up = -(-block // chunk) * chunk
    block = up if up <= cap else cap // chunk * chunk
    if block < floor:  # rounded down to whole chunks of [output] chunk_seconds; cap >= floor here
        # a chunk of floor to cap samples makes blocks of at least one chunk within the budget
        raise budget_too_small(
            block, f" in whole chunks of {samples_text(chunk)} ([output] chunk_seconds = {chunk_seconds:g})",
            f" or set chunk_seconds from {_rounded(floor / sample_rate_hz)} to "
            f"{_rounded(cap / sample_rate_hz, up=False)} s",
        )
    return Layout(block_samples=block, chunk_samples=chunk, halo=halo, balanced=block_seconds is None)


def blocks_touching(spans: list[tuple[int, int]], redo: tuple[tuple[int, int], ...]) -> list[int]:
    """Indices of blocks whose core overlaps any of the ``redo`` spans (file frames)."""
    out = []
    for i, (s, e) in enumerate(spans):
        if any(s < b and a < e for a, b in redo):
            out.append(i)
    return out


def block_list(indices: list[int]) -> str:
    """Block indices for a message: ``"block 4"``, ``"blocks 0-9"``, ``"blocks 1-3, 7"``."""
    runs: list[list[int]] = []
    for i in sorted(set(indices)):
        if runs and i == runs[-1][1] + 1:
            runs[-1][1] = i
        else:
            runs.append([i, i])
    text = ", ".join(str(a) if a == b else f"{a}-{b}" for a, b in runs)
    return f"block {text}" if len(runs) == 1 and runs[0][0] == runs[0][1] else f"blocks {text}"
