"""Memory follows the block window, not the file: a file many times the memory budget is
filtered in a subprocess whose peak resident set size is measured (not timed).

Peak RSS is the kernel's own account of the process running the job: ``VmHWM`` ("peak
resident set size", kB) in ``/proc/self/status``, per proc(5); unlike ``ru_maxrss`` it starts
afresh at exec, so it does not inherit the parent's size. With the threads scheduler the
driver and every worker live in that one process.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from conftest import PYTHON, cli_env, write_config

FS = 1000.0
CHANNELS = 4
FRAMES = 10_500_000  # 4 channels of float32: 168 MB, 10.5x the budget below
BUDGET_MIB = 16.0
WORKERS = 2

_MEASURE = """
import json, re, sys
from twinpass.config import load_config
from twinpass.job import run_job
res = run_job(load_config(sys.argv[1]))
status = open("/proc/self/status").read()
print(json.dumps({"ok": res.ok, "blocks_run": res.counts()["blocks_run"],
                  "peak_kib": int(re.search(r"VmHWM:\\s+(\\d+) kB", status).group(1))}))
"""

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc/self/status (Linux)")


def _write_big_npy(path, frames: int) -> None:
    """A float32 (frames, CHANNELS) NPY written piece by piece through a memory map."""
    path.parent.mkdir(parents=True, exist_ok=True)
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(frames, CHANNELS))
    rng = np.random.default_rng(5)
    step = 1_000_000
    for a in range(0, frames, step):
        b = min(frames, a + step)
        t = np.arange(a, b)[:, None] / FS
        out[a:b] = (0.5 * np.sin(2 * np.pi * 5.0 * t) + 0.1 * rng.standard_normal((b - a, CHANNELS)))
        out.flush()
    del out


def _measure(cfg) -> dict:
    proc = subprocess.run([PYTHON, "-c", _MEASURE, str(cfg)], env=cli_env(), capture_output=True, text=True,
                          timeout=600)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_peak_memory_follows_the_budget_not_the_file(tmp_path):
    response = {"kind": "lowpass", "family": "butterworth", "order": 4, "cutoff_hz": [40.0]}
    common = dict(response=response, fs=FS, engine={"workers": WORKERS},
                  output={"dtype": "float32", "compression": "none"}, checks={"every": 0})
    big, small = tmp_path / "big", tmp_path / "small"
    _write_big_npy(big / "archive" / "sensor" / "sensor_20260301T000000.npy", FRAMES)
    _write_big_npy(small / "archive" / "sensor" / "sensor_20260301T000000.npy", 100_000)
    processing = {"memory_budget_mib": BUDGET_MIB, "block_seconds": None}
    cfg_big = write_config(big, processing=processing, **common)
    cfg_small = write_config(small, processing=processing, **common)

    base = _measure(cfg_small)  # imports, Dask, Zarr and a couple of blocks
    run = _measure(cfg_big)
    assert base["ok"] and run["ok"]
    assert run["blocks_run"] >= 100  # the file really went through in many blocks

    file_mib = FRAMES * CHANNELS * 4 / 2**20
    peak_mib, base_mib = run["peak_kib"] / 1024, base["peak_kib"] / 1024
    # Each worker holds one block's working set, which the layout keeps within the budget
    # (window + output, float64); allow twice that per worker for the reader's buffer, the
    # checks and the float32 copy written, plus 48 MiB for the driver's tables and futures.
    bound = base_mib + WORKERS * BUDGET_MIB * 2 + 48
    print(f"peak {peak_mib:.0f} MiB, baseline {base_mib:.0f} MiB, bound {bound:.0f} MiB, file {file_mib:.0f} MiB")
    assert peak_mib < bound, (peak_mib, base_mib, bound)
    assert peak_mib - base_mib < file_mib / 4, (peak_mib, base_mib, file_mib)
