"""The layering rules of the package: the numeric core does no I/O and imports no
workflow, storage or scheduling library."""

from __future__ import annotations

import subprocess
import sys

CORE = ["twinpass.core.design", "twinpass.core.kernel", "twinpass.core.effective", "twinpass.core.carry",
        "twinpass.core.blocks", "twinpass.core.segments", "twinpass.core.plan", "twinpass.core.checks",
        "twinpass.core.types", "twinpass.core.failures"]


def _loaded_after_import(modules: list[str]) -> set[str]:
    code = ("import sys; " + "; ".join(f"import {m}" for m in modules)
            + "; print(' '.join(sorted({n.split('.')[0] for n in sys.modules})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return set(out.stdout.split())


def test_core_imports_neither_prefect_nor_zarr_nor_dask() -> None:
    loaded = _loaded_after_import(CORE)
    assert not loaded & {"prefect", "zarr", "dask", "distributed", "fsspec"}, loaded


def test_io_layer_does_not_import_prefect() -> None:
    loaded = _loaded_after_import(["twinpass.io.store", "twinpass.io.archive", "twinpass.io.readers",
                                   "twinpass.engine", "twinpass.job", "twinpass.headstart"])
    assert "prefect" not in loaded
