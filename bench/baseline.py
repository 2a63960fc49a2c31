"""The hand-written baseline: per file, load it whole, ``scipy.signal.sosfiltfilt``, save ``.npy``.

Usage::

    python bench/baseline.py SOS.npy ARCHIVE_ROOT OUT_FOLDER

What a user would script without twinpass: every file is filtered on its own (no
continuity across file joins), whole in memory. 24-bit WAV is read whole with twinpass's
WAV reader (``scipy.io.wavfile`` cannot read packed 24-bit PCM); NPY with ``np.load``.
The output is saved as float32 ``.npy`` (the dtype twinpass writes). Prints one JSON line:
files, frames, samples (frames x channels) and seconds spent reading, filtering, saving.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy import signal


def load_whole(path: Path) -> np.ndarray:
    """The whole file as an array of shape (frames, channels)."""
    if path.suffix == ".npy":
        return np.load(path)
    from twinpass.io.readers.registry import open_recording

    with open_recording(path) as rec:
        return rec.read(0, rec.info.frames)


def run(sos: np.ndarray, root: Path, out: Path) -> dict[str, float]:
    t = {"read_s": 0.0, "filter_s": 0.0, "save_s": 0.0}
    files = frames = samples = 0
    for path in sorted(p for p in root.rglob("*") if p.suffix in (".wav", ".npy")):
        t0 = time.perf_counter()
        x = load_whole(path)
        t1 = time.perf_counter()
        y = signal.sosfiltfilt(sos, x, axis=0)
        t2 = time.perf_counter()
        dest = out / path.relative_to(root).with_suffix(".npy")
        dest.parent.mkdir(parents=True, exist_ok=True)
        np.save(dest, y.astype(np.float32))
        t3 = time.perf_counter()
        t["read_s"] += t1 - t0
        t["filter_s"] += t2 - t1
        t["save_s"] += t3 - t2
        files += 1
        frames += x.shape[0]
        samples += x.size
        del x, y
    return {"files": files, "frames": frames, "samples": samples, **t}


def main(argv: list[str]) -> int:
    sos_path, root, out = argv
    t0 = time.perf_counter()
    res = run(np.load(sos_path), Path(root), Path(out))
    res["total_s"] = time.perf_counter() - t0
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
