"""Carry mode against halo mode across ratios of effective length to block length.

Usage::

    python bench/bench_carry.py [--folder DIR] [--ratios 0.05 0.1 0.3 1 3 10]
                                [--channels 8] [--blocks 32] [--block-samples 65536]

One invented archive (float32 NPY, ``--channels`` channels at 1024 Hz, four contiguous
files of ``--blocks / 4`` blocks each) is filtered once per ratio and mode with a
2nd-order Butterworth high-pass per pass whose cutoff is chosen so that its effective
length (the halo, for tolerance 1e-9) is ``ratio`` times the block length. Both modes use
the same blocks (``block_seconds``), float32 output with lz4, integrity and seam checks but
no response checks unless ``--checks-every`` says so (they cost the same in both modes
and hide the difference), and the
threaded Dask client with 2 workers. Carry mode runs twice: recomputing each block's
forward output in the output step (``recompute``) and reading it back from a scratch array
written in step 3 (``scratch``).

Prints a table of throughput (input frames per second of wall time and Msamples/s over all
channels) and the crossover ratio above which carry mode is faster, and writes
``bench/results/carry.json``. Timings are of one run each on a shared machine: compare
within one table. As a sanity check the table shows the largest |carry - halo| of the
outputs (full-scale units; the input peaks near 0.65).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import math
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from twinpass.config import load_config
from twinpass.core.design import design_filter
from twinpass.core.types import ResponseSpec
from twinpass.engine import dask_client, run_segment
from twinpass.engine_carry import run_segment_carry
from twinpass.io.store import OutputStore
from twinpass.job import prepare

FS = 1024.0
START = _dt.datetime(2031, 5, 1, tzinfo=_dt.timezone.utc)
PATTERN = "{stream}/{stream}_{start:%Y%m%dT%H%M%S}"
RESULTS = Path(__file__).resolve().parent / "results" / "carry.json"



def config_text(cutoff: float, mode: str, block_seconds: float, root: Path, store: Path, checks_every: int) -> str:
    """The TOML job configuration of one run."""
    tables = {
        "response": {"kind": "highpass", "family": "butterworth", "order": 2, "cutoff_hz": [cutoff],
                     "cutoff_means": "per-pass"},
        "processing": {"tolerance": 1e-9, "edge": "odd", "mode": mode, "block_seconds": block_seconds},
        "archive": {"root": root.as_posix(), "include": ["**/*.npy"], "name_pattern": PATTERN, "sample_rate_hz": FS},
        "output": {"store": store.as_posix(), "dtype": "float32", "compression": "lz4"},
        "engine": {"scheduler": "threads", "workers": 2},
        "checks": {"every": checks_every},
    }
    return "\n".join(f"[{name}]\n" + "".join(f"{k} = {json.dumps(v)}\n" for k, v in table.items())
                     for name, table in tables.items())


def write_archive(root: Path, channels: int, file_frames: int, files: int, seed: int = 3) -> None:
    """Four contiguous float32 NPY files: a slow drift, tones and noise (invented)."""
    rng = np.random.default_rng(seed)
    for i in range(files):
        t = (np.arange(file_frames) + i * file_frames)[:, None] / FS
        ch = np.arange(channels)[None, :]
        x = (0.3 + 0.2 * np.sin(2 * np.pi * 0.001 * t + ch) + 0.1 * np.sin(2 * np.pi * (3.0 + ch) * t)
             + 0.05 * rng.standard_normal((file_frames, channels)))
        name = f"rig/rig_{START + _dt.timedelta(seconds=i * file_frames / FS):%Y%m%dT%H%M%S}.npy"
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        np.save(root / name, x.astype(np.float32))


def cutoff_for(length: int) -> tuple[float, int]:
    """Cutoff (Hz) of the 2nd-order high-pass whose effective length is about ``length`` samples."""
    f = 1.0
    for _ in range(4):  # effective length ~ 1 / cutoff: a few proportional corrections
        spec = ResponseSpec(kind="highpass", family="butterworth", order=2, cutoff_hz=(f,), cutoff_means="per-pass")
        got = design_filter(spec, FS, 1e-9).effective_length
        if abs(got - length) <= 0.01 * length:
            break
        f *= got / length
    return f, got


def run_once(folder: Path, archive: Path, cutoff: float, mode: str, block_seconds: float, client,
             forward_output: str = "recompute", checks_every: int = 0) -> tuple[float, Path, int]:
    """Filter the archive once; return (seconds, store path, effective length)."""
    folder.mkdir(parents=True, exist_ok=True)
    store_path = folder / "out.zarr"
    if store_path.exists():
        shutil.rmtree(store_path)
    (folder / "job.toml").write_text(config_text(cutoff, "halo" if mode == "halo" else "carry", block_seconds,
                                                 archive, store_path, checks_every))
    cfg = load_config(folder / "job.toml")
    store = OutputStore.open(cfg.store_location, mode="a")
    prep = prepare(cfg, store)
    (work,) = prep.work
    design = prep.designs[work.sample_rate_hz]
    t0 = time.perf_counter()
    if mode == "halo":
        outcomes = run_segment(work, design, cfg, store, client)
    else:
        outcomes = run_segment_carry(work, design, cfg, store, client, forward_output=forward_output)
    seconds = time.perf_counter() - t0
    bad = [o.relpath for o in outcomes if o.status != "complete"]
    if bad:
        print(f"warning: {mode} at cutoff {cutoff:.4g} Hz left files incomplete: {bad}", file=sys.stderr)
    return seconds, store_path, design.effective_length


def read_all(store_path: Path) -> np.ndarray:
    store = OutputStore.open(str(store_path), mode="r")
    return np.concatenate([store.read(a) for a in store.list_arrays()]).astype(np.float64)


def crossover(rows: list[dict], carry_key: str = "carry_seconds") -> float | None:
    """Ratio above which carry mode stays faster than halo mode, interpolated in log ratio.

    None when halo mode is faster at the largest ratio; the smallest ratio when carry mode
    is faster at every ratio.
    """
    gains = [(r["ratio"], math.log(r["halo_seconds"] / r[carry_key])) for r in rows]
    slower = [i for i, (_, g) in enumerate(gains) if g < 0]
    if not slower:
        return gains[0][0] if gains else None
    i = slower[-1]
    if i == len(gains) - 1:
        return None
    (r0, g0), (r1, g1) = gains[i], gains[i + 1]
    w = g0 / (g0 - g1)
    return float(math.exp(math.log(r0) + w * (math.log(r1) - math.log(r0))))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--folder", type=Path, default=None)
    ap.add_argument("--ratios", type=float, nargs="+", default=[0.05, 0.1, 0.3, 1.0, 3.0, 10.0])
    ap.add_argument("--channels", type=int, default=8)
    ap.add_argument("--blocks", type=int, default=32)
    ap.add_argument("--block-samples", type=int, default=65536)
    ap.add_argument("--checks-every", type=int, default=0,
                    help="[checks] every: 0 (default) leaves out the response checks, which cost the same in "
                         "both modes; integrity and seam checks always run")
    args = ap.parse_args()
    folder = args.folder or Path(tempfile.mkdtemp(prefix="twinpass-bench-carry-"))
    archive = folder / "archive"
    block = args.block_samples
    files = 4
    file_frames = block * args.blocks // files
    if file_frames % int(FS):
        sys.exit("--block-samples * --blocks / 4 must be whole seconds at 1024 Hz")
    if not archive.exists():
        write_archive(archive, args.channels, file_frames, files)
    frames = file_frames * files
    block_seconds = block / FS
    rows = []
    with dask_client("threads", 2) as client:
        for ratio in args.ratios:
            cutoff, length = cutoff_for(int(ratio * block))
            row: dict = {"ratio": ratio, "cutoff_hz": cutoff, "effective_length": length}
            stores = {}
            for mode, fo in (("halo", ""), ("carry", "recompute"), ("carry", "scratch")):
                label = mode if mode == "halo" else f"carry_{fo}"
                sec, path, _ = run_once(folder / f"r{ratio:g}-{label}", archive, cutoff, mode, block_seconds, client,
                                        fo or "recompute", args.checks_every)
                row[f"{label}_seconds"] = sec
                stores[label] = path
            row["carry_seconds"] = min(row["carry_recompute_seconds"], row["carry_scratch_seconds"])
            y_h, y_c = read_all(stores["halo"]), read_all(stores["carry_recompute"])
            row["max_abs_difference"] = float(np.abs(y_h - y_c).max())
            rows.append(row)
            print(f"ratio {ratio:g}: halo {row['halo_seconds']:.2f} s, carry recompute "
                  f"{row['carry_recompute_seconds']:.2f} s, carry scratch {row['carry_scratch_seconds']:.2f} s",
                  flush=True)
    msamples = frames * args.channels / 1e6
    print()
    print(f"{frames} frames x {args.channels} channels, blocks of {block} samples ({args.blocks} blocks), "
          "2 threads; throughput in input frames/s (Msamples/s over all channels)")
    head = f"{'ratio':>6} {'halo L':>9} {'halo':>18} {'carry recompute':>18} {'carry scratch':>18} {'|c-h|':>8}"
    print(head)
    for r in rows:
        cells = [f"{frames / r[k]:>9.0f} ({msamples / r[k]:5.1f})" for k in
                 ("halo_seconds", "carry_recompute_seconds", "carry_scratch_seconds")]
        print(f"{r['ratio']:>6g} {r['effective_length']:>9d} {cells[0]:>18} {cells[1]:>18} {cells[2]:>18} "
              f"{r['max_abs_difference']:8.1e}")
    cross = crossover(rows)
    cross_recompute = crossover(rows, "carry_recompute_seconds")
    scratch_wins = sum(r["carry_scratch_seconds"] < r["carry_recompute_seconds"] for r in rows)
    print(f"crossover ratio (carry faster above): {cross if cross is None else round(cross, 3)} "
          f"(recompute only: {cross_recompute if cross_recompute is None else round(cross_recompute, 3)})")
    print(f"scratch faster than recompute in {scratch_wins} of {len(rows)} runs; total recompute "
          f"{sum(r['carry_recompute_seconds'] for r in rows):.1f} s, scratch "
          f"{sum(r['carry_scratch_seconds'] for r in rows):.1f} s")
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    RESULTS.write_text(json.dumps({
        "when": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "machine": {"python": platform.python_version(), "processor": platform.processor() or platform.machine()},
        "frames": frames, "channels": args.channels, "block_samples": block, "sample_rate_hz": FS,
        "checks_every": args.checks_every, "rows": rows, "crossover_ratio": cross,
        "crossover_ratio_recompute": cross_recompute,
        "forward_output": {"scratch_faster_runs": scratch_wins, "runs": len(rows)},
    }, indent=2) + "\n")
    print(f"wrote {RESULTS}")
    if args.folder is None:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
