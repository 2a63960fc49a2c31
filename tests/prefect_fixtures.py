"""Prefect test fixtures: a throw-away PREFECT_HOME, a real temporary Prefect server, and a
small NPY archive with its job configuration.

Importing this module points ``PREFECT_HOME`` at a fresh temporary folder and turns the
server's analytics off, so that a process that imports prefect afterwards never touches
the user's own Prefect home (database, result cache under ``storage``, profiles). The
session fixture :func:`prefect_server` also applies those settings explicitly, in case
prefect was imported earlier in the process.

Test modules load this file as a pytest plug-in, so that session fixtures exist once per
session (one server) however many modules use them, and import the helpers by name::

    pytest_plugins = ("prefect_fixtures",)
    from prefect_fixtures import write_job, poll

References used by the helpers: ``scipy.signal.sosfiltfilt`` on a whole segment is the
whole-signal two-pass result (padtype "odd", padlen = the stored end-extension length).
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np
import pytest
from scipy import signal

PREFECT_HOME = tempfile.mkdtemp(prefix="twinpass-prefect-home-")
os.environ["PREFECT_HOME"] = PREFECT_HOME
os.environ["PREFECT_SERVER_ANALYTICS_ENABLED"] = "false"
os.environ.pop("PREFECT_API_URL", None)  # never run the tests against a configured server

FS_HZ = 100.0
"""Sample rate of the test archive (NPY files hold no rate; the configuration gives it)."""
FILE_FRAMES = 4000
"""Frames per file: 40 s at 100 Hz, so each stream's files join without a gap."""
CHANNELS = 2
STREAMS = ("north", "south")
FILES_PER_STREAM = 3
BLOCK_SECONDS = 10.0
"""Block core: 1000 samples, four blocks per file."""
T0 = dt.datetime(2024, 5, 1, tzinfo=dt.timezone.utc)
POLL_SECONDS = 90.0
"""How long to wait for states and artifacts that the server records asynchronously."""

JOB_TEMPLATE = """\
[response]
kind = "lowpass"
family = "butterworth"
passband_hz = [10.0]
stopband_hz = [25.0]
passband_ripple_db = 1.0
stopband_attenuation_db = 40.0

[processing]
tolerance = 1e-6
block_seconds = {block_seconds}

[archive]
root = "{archive}"
include = ["**/*.npy"]
name_pattern = "{{stream}}/{{stream}}_{{start:%Y%m%dT%H%M%S}}"
sample_rate_hz = {fs}

[output]
store = "{store}"

[engine]
scheduler = "threads"
workers = 2
retries = {engine_retries}
retry_backoff_seconds = 0.0

[flow]
retries = {flow_retries}
retry_delay_seconds = 0.0
"""


# --------------------------------------------------------------------- archive
def file_relpath(stream: str, k: int) -> str:
    """Relative path of the ``k``-th file of ``stream`` (files follow one another)."""
    start = T0 + dt.timedelta(seconds=k * FILE_FRAMES / FS_HZ)
    return f"{stream}/{stream}_{start:%Y%m%dT%H%M%S}.npy"


def write_file(root: Path, stream: str, k: int, seed: int) -> Path:
    """Random float32 samples with a per-channel offset (so the end extension matters)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(FILE_FRAMES, CHANNELS)) + np.array([0.5, -0.25])
    path = root / file_relpath(stream, k)
    path.parent.mkdir(parents=True, exist_ok=True)
    np.save(path, x.astype(np.float32))
    return path


def write_archive(root: Path, seed: int = 1) -> Path:
    """Two streams of three contiguous NPY files each (4000 x 2, float32)."""
    for i, stream in enumerate(STREAMS):
        for k in range(FILES_PER_STREAM):
            write_file(root, stream, k, seed=seed * 100 + i * 10 + k)
    return root


def write_job(folder: Path, archive: Path, store: str = "out.zarr", *, engine_retries: int = 0,
              flow_retries: int = 1, name: str = "twinpass.toml") -> Path:
    """A job configuration for :func:`write_archive`'s archive; returns its path."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(JOB_TEMPLATE.format(archive=archive.as_posix(), store=store, fs=FS_HZ,
                                        block_seconds=BLOCK_SECONDS, engine_retries=engine_retries,
                                        flow_retries=flow_retries), encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def npy_archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The shared, read-only test archive (tests that change files copy it first)."""
    return write_archive(tmp_path_factory.mktemp("archive") / "archive")


# ------------------------------------------------------------------- reference
def check_against_sosfiltfilt(store_location: str, archive: Path, stream: str) -> None:
    """The stream's output equals scipy.signal.sosfiltfilt of the whole segment.

    Reference: scipy.signal.sosfiltfilt (whole-signal two-pass result) with the stored
    second-order sections, odd end extension of the stored length. Bound: the design's
    blockwise tolerance (1e-6 of the segment's peak) plus float32 output rounding
    (2**-24 relative, from the IEEE 754 binary32 format) of values up to the peak.
    """
    from twinpass.io.store import OutputStore
    from twinpass.io.store_util import array_name

    store = OutputStore.open(store_location, mode="r")
    rels = [file_relpath(stream, k) for k in range(FILES_PER_STREAM)]
    x = np.concatenate([np.load(archive / r).astype(np.float64) for r in rels])
    y = np.concatenate([store.read(array_name(r)).astype(np.float64) for r in rels])
    filt = store.array_attrs(array_name(rels[0]))["filter"]
    ref = signal.sosfiltfilt(np.asarray(filt["sos"]), x, axis=0, padtype="odd", padlen=int(filt["edge_samples"]))
    peak = float(np.max(np.abs(x)))
    err = float(np.max(np.abs(y - ref)))
    assert err <= (1e-6 + 2.0**-23) * peak, f"{stream}: max |output - sosfiltfilt| = {err:.3g} (peak {peak:.3g})"


# --------------------------------------------------------------------- server
@pytest.fixture(scope="session")
def prefect_server() -> Iterator[str]:
    """A real temporary Prefect server for the whole session; yields its API URL."""
    from prefect.settings import PREFECT_HOME as HOME_SETTING
    from prefect.settings import PREFECT_API_URL, PREFECT_SERVER_ANALYTICS_ENABLED, temporary_settings
    from prefect.testing.utilities import prefect_test_harness

    with temporary_settings(updates={HOME_SETTING: PREFECT_HOME, PREFECT_SERVER_ANALYTICS_ENABLED: False}):
        with prefect_test_harness(server_startup_timeout=90):
            yield str(PREFECT_API_URL.value())
    shutil.rmtree(PREFECT_HOME, ignore_errors=True)


@pytest.fixture(scope="session")
def prefect_client(prefect_server: str) -> Iterator[Any]:
    """A synchronous Prefect client of the test server."""
    from prefect import get_client

    with get_client(sync_client=True) as client:
        yield client


def poll(fetch: Callable[[], Any], ready: Callable[[Any], bool], what: str, timeout: float = POLL_SECONDS) -> Any:
    """Call ``fetch`` until ``ready(value)``; states and artifacts reach the server late."""
    deadline = time.monotonic() + timeout
    while True:
        value = fetch()
        if ready(value):
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}; last seen: {value!r}")
        time.sleep(0.25)


def flow_run_id(state: Any) -> Any:
    return state.state_details.flow_run_id


def task_runs(client: Any, run_id: Any) -> list[Any]:
    """Task runs of one flow run (at most 200, the API's page size)."""
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    return client.read_task_runs(flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[run_id])), limit=200)


def artifacts(client: Any, run_id: Any) -> list[Any]:
    """Artifacts of one flow run (at most 200)."""
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterFlowRunId

    return client.read_artifacts(artifact_filter=ArtifactFilter(flow_run_id=ArtifactFilterFlowRunId(any_=[run_id])),
                                 limit=200)


def final_task_runs(client: Any, run_id: Any, expected: int) -> list[Any]:
    """The flow run's task runs once ``expected`` of them are in a final state."""
    return poll(lambda: task_runs(client, run_id),
                lambda trs: len(trs) >= expected and all(t.state is not None and t.state.is_final() for t in trs),
                f"{expected} finished task runs of flow run {run_id}")


def runs_of(runs: list[Any], task: Any) -> list[Any]:
    """The task runs of ``task`` (a Prefect task object) among ``runs``."""
    return [t for t in runs if t.task_key == task.task_key]


def table_rows(artifact: Any) -> list[dict[str, Any]]:
    data = artifact.data
    return json.loads(data) if isinstance(data, str) else list(data)


def flow_env(extra: dict[str, str] | None = None) -> dict[str, str]:
    """This process's environment without Prefect or fault settings, plus ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PREFECT_", "TWINPASS_FAULTS"))}
    env.update(extra or {})
    return env
