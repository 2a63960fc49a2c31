"""Segments with holes (``[processing] nonfinite = "split"``) inside the real engine: the
response check of blocks with holes, and how such segments run when carry mode is asked.

Archives, stores and Dask are real; only the wrong response is injected (``twinpass.faults``,
action ``perturb``). References: ``scipy.signal.sosfiltfilt`` on each finite piece on its own
(odd extension of ``min(effective length, piece - 1)`` samples, as the README states) and
``scipy.signal.sosfreqz`` for the designed and the perturbed |H|^2.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from conftest import block_status, make_signal, open_store, read_output, write_config, write_stream
from twinpass.config import load_config
from twinpass.core import checks
from twinpass.core.checks import FIGURE_INDEX
from twinpass.core.nonfinite import pieces
from twinpass.engine import FAIL, PASS, WARN
from twinpass.io.store import OutputStore
from twinpass.job import run_job
from twinpass.status import collect_status, format_status

FS = 200.0
ARRAY = "deck/deck_20260301T000000"


def _one_block(tmp_path, x, name="run", **overrides):
    """One file of ``x`` (one block: 60 s blocks) and a config for the store ``name``."""
    archive = tmp_path / "archive"
    if not archive.exists():
        write_stream(archive, "deck", x, FS, 1)
    folder = tmp_path / name
    folder.mkdir()
    processing = {"nonfinite": "split", "block_seconds": 60.0, **overrides.pop("processing", {})}
    return load_config(write_config(folder, archive={"root": str(archive)}, processing=processing, **overrides))


def _piecewise(x, sos, pad):
    holes = [(a, a + 1) for a in np.flatnonzero(~np.all(np.isfinite(x), axis=1))]
    out = np.full(x.shape, np.nan)
    for a, b in pieces(len(x), holes):
        out[a:b] = signal.sosfiltfilt(sos, x[a:b], axis=0, padtype="odd", padlen=min(pad, b - a - 1))
    return out


def test_a_correct_block_with_a_nan_passes_on_measured_figures(tmp_path):
    x = make_signal(12000, 2, FS, seed=5)
    x[9000, 1] = np.nan
    cfg = _one_block(tmp_path, x)
    res = run_job(cfg)
    assert res.ok and block_status(cfg.store_location, ARRAY).tolist() == [PASS]
    design = res.designs[FS]
    (y,) = read_output(cfg.store_location, [ARRAY])
    ref = _piecewise(x, design.sos, design.effective_length)
    assert np.array_equal(np.isnan(y), np.isnan(ref))
    assert np.nanmax(np.abs(y - ref)) <= 1e-9 * np.nanmax(np.abs(x))  # README: blockwise tolerance
    figs = np.asarray(open_store(cfg.store_location)[f"_twinpass/blocks/{ARRAY}/figures"][:])[0]
    assert np.all(np.isfinite(figs[:, FIGURE_INDEX["passband_dev_db"]]))  # measured, not skipped


def test_a_perturbed_block_with_a_nan_fails(tmp_path, inject):
    # One block, so no seam check: only the response check can see the +6 dB.
    x = make_signal(12000, 2, FS, seed=5)
    x[9000, 1] = np.nan
    inject([{"action": "perturb", "file": "*", "block": "*"}])
    cfg = _one_block(tmp_path, x)
    res = run_job(cfg)
    assert block_status(cfg.store_location, ARRAY).tolist() == [FAIL]
    assert res.failed == ["deck/deck_20260301T000000.npy"]
    assert open_store(cfg.store_location)[ARRAY].attrs["complete"] is False
    design = res.designs[FS]
    wrong = np.array(design.sos)
    wrong[0, :3] *= math.sqrt(2.0)
    _, h = signal.sosfreqz(design.sos, [10.0], fs=FS)
    _, hw = signal.sosfreqz(wrong, [10.0], fs=FS)
    figs = np.asarray(open_store(cfg.store_location)[f"_twinpass/blocks/{ARRAY}/figures"][:])[0]
    assert figs[:, FIGURE_INDEX["passband_dev_db"]] == pytest.approx(
        20 * math.log10(abs(hw[0]) ** 2 / abs(h[0]) ** 2), abs=0.5)


def test_a_block_of_pieces_too_short_to_measure_warns_and_says_why(tmp_path):
    # Block 0 (2000 samples) holds a NaN every 200 samples: pieces of 199, fewer than the
    # SPLIT_MIN_PIECE samples of four Welch segments of 64 (common practice: at least four
    # averaged segments). Block 1 is clean. A correct block 0 is not passed on no evidence.
    x = make_signal(4000, 2, FS, seed=6)
    x[199:2000:200, 0] = np.nan
    cfg = _one_block(tmp_path, x, processing={"block_seconds": 10.0})
    res = run_job(cfg)
    assert block_status(cfg.store_location, ARRAY).tolist() == [WARN, PASS]
    assert checks.SPLIT_MIN_PIECE > 199
    note = [n for n in res.notes if "response not checked" in n]
    assert len(note) == 1 and "block 0 " in note[0] and 'nonfinite = "split"' in note[0]
    status = collect_status(OutputStore.open(cfg.store_location, mode="r"))
    assert any("response not checked in block 0" in n for n in status["notes"])
    assert "response not checked in block 0" in format_status(status)


CARRY_FILTER = {"kind": "highpass", "family": "butterworth", "order": 3, "cutoff_hz": [0.05]}
"""Effective length about 36,000 samples at 200 Hz: halos of 8 channels need about 22 MiB."""


def test_carry_mode_with_holes_names_the_cause_when_halos_do_not_fit(tmp_path):
    x = 0.3 + 0.05 * make_signal(40000, 8, FS, seed=7)
    x[20000, 3] = np.nan
    cfg = _one_block(tmp_path, x, response=CARRY_FILTER,
                     processing={"mode": "carry", "memory_budget_mib": 16, "block_seconds": None})
    res = run_job(cfg)
    (msg,) = res.outcomes[0].errors.values()
    assert 'NaN/Inf runs (nonfinite = "split"), which carry mode does not handle, so it runs with halos' in msg
    assert 'nonfinite = "interpolate"' in msg and "memory_budget_mib" in msg and "repair the file" in msg


def test_carry_mode_with_holes_says_it_runs_with_halos(tmp_path):
    x = 0.3 + 0.05 * make_signal(40000, 2, FS, seed=8)
    x[20000, 1] = np.nan
    cfg = _one_block(tmp_path, x, response=CARRY_FILTER, processing={"mode": "carry", "block_seconds": None})
    res = run_job(cfg)
    assert res.ok
    assert any('mode = "carry" asked for carry mode, but this segment holds NaN/Inf runs' in n for n in res.notes)
    assert open_store(cfg.store_location)[ARRAY].attrs["blocks"]["halo_samples"] == res.designs[FS].effective_length
    design = res.designs[FS]
    (y,) = read_output(cfg.store_location, [ARRAY])
    ref = _piecewise(x, design.sos, design.effective_length)
    assert np.nanmax(np.abs(y - ref)) <= 1e-9 * np.nanmax(np.abs(x))  # README: blockwise tolerance
