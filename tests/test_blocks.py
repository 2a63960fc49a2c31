"""Block layout: the memory budget, chunk alignment, exact tiling and balance of the blocks.

References:
* The memory budget is the documented account of ``choose_layout``: one block's window
  (core + 2 halos, samples) x channels x ``BYTES_PER_WINDOW_SAMPLE`` bytes must not exceed
  ``memory_budget_mib`` x 2**20 bytes; the tests recompute it from those figures.
* Tiling and balance are integer facts checked with Python's own arithmetic: the spans of a
  file cover ``range(frames)`` once, in order, and the fewest blocks of at most
  ``block_samples`` that cover ``frames`` samples number ``ceil(frames / block_samples)``.
* The shortest block is the documented rule of ``shortest_block``: the largest of 64 samples,
  twice ``[checks] seam_samples`` and, with response checks, 4 Welch segments of 64 samples
  (256); the remedies a refusal states are fed back into ``choose_layout`` and must work.
"""

from __future__ import annotations

import itertools
import math
import re

import pytest

from twinpass.core.blocks import (
    BYTES_PER_WINDOW_SAMPLE,
    CHUNK_FLOOR_SAMPLES,
    HALOS_PER_BLOCK,
    MIN_BLOCK_SAMPLES,
    Layout,
    choose_layout,
    shortest_block,
)
from twinpass.errors import ConfigError

FS = 1000.0
FRAMES = [1, 999, 60_000, 65_537, 200_001, 1_234_567]


def _window_bytes(layout: Layout, channels: int) -> int:
    """Bytes of one block's working copies, as the budget counts them."""
    return (layout.block_samples + 2 * layout.halo) * channels * BYTES_PER_WINDOW_SAMPLE


def _samples(n: int) -> str:
    """``n`` samples as English says them (singular for one)."""
    return f"{n} sample" if n == 1 else f"{n} samples"


def _layout_or_error(**kw) -> Layout | None:
    try:
        return choose_layout(sample_rate_hz=FS, **kw)
    except ConfigError:
        return None


def test_reported_case_fails_instead_of_overrunning_the_budget():
    # 8 channels, halos of 1000, blocks of 20 s rounded up to one 60 s chunk: (60000 + 2000)
    # x 8 x 40 B = 18.9 MiB > 16 MiB. Not even one chunk fits, so the layout is refused,
    # naming both settings and the remedy.
    with pytest.raises(ConfigError) as err:
        choose_layout(sample_rate_hz=FS, channels=8, halo=1000, block_seconds=20.0, chunk_seconds=60.0,
                      memory_budget_mib=16.0)
    message = str(err.value)
    assert "chunk_seconds = 60" in message and "memory_budget_mib = 16" in message
    assert "lower chunk_seconds" in message and "raise memory_budget_mib" in message
    # the largest chunk that fits: 16 MiB / (8 x 40 B) - 2000 = 50428 samples = 50.4 s
    assert "at most 50.4 s" in message


@pytest.mark.parametrize("block_seconds", [None, 20.0])
def test_halos_alone_over_the_budget_are_refused_with_carry_mode_as_remedy(block_seconds):
    # (2 x 1e6) x 8 x 40 B = 610 MiB of halos against 16 MiB: no block fits at all.
    with pytest.raises(ConfigError) as err:
        choose_layout(sample_rate_hz=FS, channels=8, halo=1_000_000, block_seconds=block_seconds,
                      chunk_seconds=None, memory_budget_mib=16.0)
    message = str(err.value)
    assert "memory_budget_mib = 16" in message and 'mode = "carry"' in message
    # carry mode has no halos, and the same budget then gives blocks
    carry = choose_layout(sample_rate_hz=FS, channels=8, halo=0, block_seconds=block_seconds,
                          chunk_seconds=None, memory_budget_mib=16.0)
    assert _window_bytes(carry, 8) <= 16 * 2**20
    # where carrying is no option (an FIR design, or pieces between holes), it is not offered
    with pytest.raises(ConfigError) as err:
        choose_layout(sample_rate_hz=FS, channels=8, halo=1_000_000, block_seconds=block_seconds,
                      chunk_seconds=None, memory_budget_mib=16.0, carry=False)
    assert "raise memory_budget_mib" in str(err.value) and "carry" not in str(err.value)


GRID = list(itertools.product(
    [1, 8],                          # channels
    [0, 100, 3000, 40_000],          # halo (samples)
    [None, 0.1, 0.5, 20.0, 70.0],    # block_seconds
    [None, 0.3, 7.0, 60.0],          # chunk_seconds
    [0.01, 1.0, 16.0, 256.0],        # memory_budget_mib
    [False, True],                   # response checks (with 8 seam samples)
))


@pytest.mark.parametrize("channels,halo,block_seconds,chunk_seconds,budget,checks", GRID)
def test_layout_fits_the_budget_in_whole_chunks(channels, halo, block_seconds, chunk_seconds, budget, checks):
    kw = dict(channels=channels, halo=halo, block_seconds=block_seconds, chunk_seconds=chunk_seconds,
              memory_budget_mib=budget, seam_samples=8 if checks else 0, response_checks=checks)
    layout = _layout_or_error(**kw)
    fits_per_sample = int(budget * 2**20 // (channels * BYTES_PER_WINDOW_SAMPLE))
    chunk = None if chunk_seconds is None else round(chunk_seconds * FS)
    floor = 256 if checks else 64
    if layout is None:
        # Refused only when no block fits: the halos alone, one chunk with its halos, or the
        # hand-set block (before rounding) with its halos exceed the budget; or no block of
        # whole chunks at least the shortest block long fits; or the hand-set block is shorter.
        smallest = chunk or 1
        hand = round(block_seconds * FS) if block_seconds is not None else 0
        longest = (fits_per_sample - 2 * halo) // smallest * smallest  # longest whole-chunk block that fits
        assert 2 * halo + max(smallest, hand) > fits_per_sample or longest < floor or 0 < hand < floor, kw
        return
    assert _window_bytes(layout, channels) <= budget * 2**20, kw
    assert layout.halo == halo and layout.block_samples >= floor
    assert layout.balanced == (block_seconds is None)
    if chunk is None:
        assert layout.chunk_samples == layout.block_samples
    else:
        assert layout.chunk_samples == chunk and layout.block_samples % chunk == 0, kw
    if block_seconds is not None:
        # as asked, rounded to whole chunks: up where that fits, else down
        asked = round(block_seconds * FS)
        if chunk is None:
            assert layout.block_samples == asked
        elif math.ceil(asked / chunk) * chunk + 2 * halo <= fits_per_sample:
            assert layout.block_samples == math.ceil(asked / chunk) * chunk
        else:
            assert layout.block_samples == asked // chunk * chunk >= chunk, kw
    else:
        target = max(HALOS_PER_BLOCK * halo, MIN_BLOCK_SAMPLES)
        step = chunk or 1
        longest = (fits_per_sample - 2 * halo) // step * step  # longest whole-chunk block that fits
        assert layout.block_samples == min(math.ceil(target / step) * step, longest), kw


def _layouts():
    for block, chunk, balanced in [(1000, 1000, False), (1000, 1000, True), (65_536, 65_536, True),
                                   (6000, 1500, True), (6000, 1500, False), (7, 7, True), (1, 1, True)]:
        yield Layout(block_samples=block, chunk_samples=chunk, halo=50, balanced=balanced)


@pytest.mark.parametrize("layout", list(_layouts()), ids=repr)
@pytest.mark.parametrize("frames", FRAMES + [5999, 6000, 6001, 12_000, 13_501])
def test_spans_tile_each_file_exactly_in_whole_chunks(layout, frames):
    spans = layout.spans(frames)
    assert spans[0][0] == 0 and spans[-1][1] == frames
    assert all(a < b for a, b in spans)
    assert all(b == a2 for (_, b), (a2, _) in zip(spans, spans[1:]))  # contiguous, no overlap
    assert sum(b - a for a, b in spans) == frames
    assert max(b - a for a, b in spans) <= layout.block_samples
    # every block but a file's last writes whole chunks of the file's array, so no chunk
    # is shared by two blocks
    chunk = layout.chunk_for(frames)
    assert 1 <= chunk <= frames
    assert all(a % chunk == 0 for a, _ in spans)
    assert all((b - a) % chunk == 0 for a, b in spans[:-1])


@pytest.mark.parametrize("layout", [lay for lay in _layouts() if lay.balanced], ids=repr)
@pytest.mark.parametrize("frames", FRAMES + [6001, 12_001, 13_501])
def test_balanced_blocks_are_the_fewest_and_nearly_equal(layout, frames):
    spans = layout.spans(frames)
    lengths = [b - a for a, b in spans]
    n = math.ceil(frames / layout.block_samples)  # fewest blocks of at most block_samples
    assert len(spans) == n
    # all blocks but the last have one length b = ceil(frames / n) rounded up to whole chunks
    # (when chunks are shorter than blocks); the last falls short of it by less than n chunks
    step = layout.chunk_samples if layout.chunk_samples < layout.block_samples else 1
    b = min(math.ceil(math.ceil(frames / n) / step) * step, layout.block_samples)
    assert set(lengths[:-1]) <= {b}
    assert b - n * step < lengths[-1] <= b


def test_unbalanced_blocks_are_full_with_a_remainder():
    layout = Layout(block_samples=1000, chunk_samples=1000, halo=10, balanced=False)
    assert [b - a for a, b in layout.spans(2001)] == [1000, 1000, 1]
    balanced = Layout(block_samples=1000, chunk_samples=1000, halo=10, balanced=True)
    assert [b - a for a, b in balanced.spans(2001)] == [667, 667, 667]


# -- the shortest block -------------------------------------------------------------------


@pytest.mark.parametrize("seam_samples, checks, floor", [(0, False, 64), (8, False, 64), (8, True, 256),
                                                         (200, True, 400), (500, False, 1000)])
def test_shortest_block_is_the_largest_need(seam_samples, checks, floor):
    assert shortest_block(seam_samples, checks)[0] == floor


@pytest.mark.parametrize("rate", [200.0, 44_100.0])
@pytest.mark.parametrize("block_seconds", [1e-4, 0.001])
@pytest.mark.parametrize("seam_samples, checks", [(8, True), (8, False), (300, False)])
@pytest.mark.parametrize("halo", [0, 670])
def test_blocks_set_by_hand_below_the_shortest_block_are_refused_with_the_shortest_that_works(
        rate, block_seconds, seam_samples, checks, halo):
    floor = max(64, 2 * seam_samples, 256 if checks else 0)
    kw = dict(sample_rate_hz=rate, channels=2, halo=halo, chunk_seconds=None, memory_budget_mib=256.0,
              seam_samples=seam_samples, response_checks=checks, source="job.toml")
    if round(block_seconds * rate) >= floor:
        assert choose_layout(block_seconds=block_seconds, **kw).block_samples == round(block_seconds * rate)
        return
    with pytest.raises(ConfigError) as err:
        choose_layout(block_seconds=block_seconds, **kw)
    message = str(err.value)
    assert message.startswith(f"job.toml: [processing] block_seconds = {block_seconds:g} makes blocks of "
                              f"{_samples(max(1, round(block_seconds * rate)))} at"), message
    found = re.search(r"set block_seconds to at least ([0-9.e+-]+) s \((\d+) samples\)", message)
    assert found and int(found[2]) == floor, message
    # the value named (rounded up to 4 significant digits) works; one sample less does not
    shortest = float(found[1])
    assert choose_layout(block_seconds=shortest, **kw).block_samples == floor
    with pytest.raises(ConfigError):
        choose_layout(block_seconds=(floor - 1) / rate, **kw)


@pytest.mark.parametrize("rate", [100.0, 44_100.0])
@pytest.mark.parametrize("chunk_seconds", [1e-5, 0.001, 0.25])
@pytest.mark.parametrize("block_seconds", [None, 60.0])
def test_chunks_below_the_shortest_chunk_are_refused_with_the_shortest_that_works(rate, chunk_seconds, block_seconds):
    kw = dict(sample_rate_hz=rate, channels=2, halo=100, block_seconds=block_seconds, memory_budget_mib=256.0,
              source="job.toml")
    chunk = max(1, round(chunk_seconds * rate))
    if chunk >= CHUNK_FLOOR_SAMPLES:
        assert choose_layout(chunk_seconds=chunk_seconds, **kw).chunk_samples == chunk
        return
    with pytest.raises(ConfigError) as err:
        choose_layout(chunk_seconds=chunk_seconds, **kw)
    message = str(err.value)
    assert message.startswith(f"job.toml: [output] chunk_seconds = {chunk_seconds:g} makes chunks of "
                              f"{_samples(chunk)} at"), message
    shortest = float(re.search(r"set chunk_seconds to at least ([0-9.e+-]+) s", message)[1])
    assert choose_layout(chunk_seconds=shortest, **kw).chunk_samples >= CHUNK_FLOOR_SAMPLES
    with pytest.raises(ConfigError):
        choose_layout(chunk_seconds=(CHUNK_FLOOR_SAMPLES - 1) / rate, **kw)


@pytest.mark.parametrize("budget", [0.001, 0.01])
@pytest.mark.parametrize("halo, carry", [(0, True), (30, True), (30, False)])
@pytest.mark.parametrize("chunk_seconds", [None, 0.9])
def test_a_budget_below_the_shortest_block_is_refused_with_the_budget_that_works(budget, halo, carry, chunk_seconds):
    # 2 channels at 1 kHz with response checks: blocks of at least 256 samples; 0.01 MiB fits
    # 10485 / 80 - 2 halos = 131 or 71 samples, 0.001 MiB 13 or none.
    kw = dict(sample_rate_hz=FS, channels=2, halo=halo, block_seconds=None, chunk_seconds=chunk_seconds,
              carry=carry, seam_samples=8, response_checks=True, source="job.toml")
    with pytest.raises(ConfigError) as err:
        choose_layout(memory_budget_mib=budget, **kw)
    message = str(err.value)
    assert message.startswith("job.toml: ") and f"[processing] memory_budget_mib = {budget:g}" in message, message
    assert ('mode = "carry"' in message) == (carry and halo > 0), message
    found = re.search(r"raise memory_budget_mib (?:\()?to at least ([0-9.e+-]+) MiB", message)
    assert found, message
    found_budget = float(found[1])
    layout = choose_layout(memory_budget_mib=found_budget, **kw)
    assert layout.block_samples >= 256 and _window_bytes(layout, 2) <= found_budget * 2**20


def test_chunks_that_round_blocks_below_the_shortest_block_are_refused_with_chunks_that_work():
    # 2 channels, halos of 10: 0.025 MiB fits 327 - 20 = 307 samples, one chunk of 200; two
    # do not fit, so blocks would be 200 samples, below 256 (response checks).
    kw = dict(sample_rate_hz=200.0, channels=2, halo=10, block_seconds=None, memory_budget_mib=0.025,
              seam_samples=8, response_checks=True)
    with pytest.raises(ConfigError) as err:
        choose_layout(chunk_seconds=1.0, **kw)
    message = str(err.value)
    assert "memory_budget_mib = 0.025" in message and "chunk_seconds = 1" in message, message
    found = re.search(r"set chunk_seconds from ([0-9.]+) to ([0-9.]+) s", message)
    assert found, message
    for chunk_seconds in (float(found[1]), float(found[2])):
        layout = choose_layout(chunk_seconds=chunk_seconds, **kw)
        assert layout.block_samples >= 256 and _window_bytes(layout, 2) <= 0.025 * 2**20


@pytest.mark.parametrize("block_seconds, chunk_seconds, said", [
    (0.001, None, "makes blocks of 1 sample at 1000 Hz"),   # 0.001 s x 1000 Hz = 1 sample
    (0.002, None, "makes blocks of 2 samples at 1000 Hz"),
    (None, 0.001, "makes chunks of 1 sample at 1000 Hz"),
])
def test_a_refused_length_of_one_sample_is_said_in_the_singular(block_seconds, chunk_seconds, said):
    with pytest.raises(ConfigError) as err:
        choose_layout(sample_rate_hz=FS, channels=1, halo=0, block_seconds=block_seconds,
                      chunk_seconds=chunk_seconds, memory_budget_mib=16.0)
    assert said in str(err.value) and " 1 samples" not in str(err.value), str(err.value)
