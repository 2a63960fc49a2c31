"""The temporary local Prefect server that the command line starts itself.

Real components throughout: Prefect's own server application under uvicorn, Prefect's client
and a real flow in a separate process. The reference for what was recorded is the server's
REST API itself, read with Prefect's client (``prefect.get_client``); the reference for the
server being Prefect's is its ``/api/admin/version`` answer against the installed package.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import urllib.request
from pathlib import Path

import pytest

from twinpass import prefect_server
from twinpass.errors import PrefectServerError
from twinpass.prefect_server import LocalPrefectServer, early_start

SRC = str(Path(__file__).resolve().parents[1] / "src")

PROBE = textwrap.dedent('''
    import json, sys, time
    from twinpass.prefect_server import early_start, prefect_api

    server = early_start()  # as the command line does, before prefect is imported
    process = server.process
    from prefect import flow, get_client, get_run_logger, task
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId, LogFilter, LogFilterFlowRunId
    from prefect.settings import get_current_settings

    seen = {}

    @task
    def double(x):
        return 2 * x

    @flow(name="tp-server-probe")
    def probe(x):
        get_run_logger().info("probe says hello")
        seen["heartbeat_in_flow"] = get_current_settings().flows.heartbeat_frequency
        seen["csrf_in_flow"] = get_current_settings().client.csrf_support_enabled
        return double(x)

    order = []
    out = {"early_url": server.api_url}
    with prefect_api(while_starting=lambda: order.append("while_starting")) as url:
        order.append("body")
        state = probe(21, return_state=True)
        out.update(url=url, result=state.result())
        run_id = state.state_details.flow_run_id
        with get_client(sync_client=True) as client:
            run = client.read_flow_run(run_id)
            out.update(flow=client.read_flow(run.flow_id).name, state=run.state.type.value)
            # task run states and logs reach the server asynchronously (events, log batches)
            deadline = time.monotonic() + 60
            while True:
                trs = client.read_task_runs(flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[run_id])))
                logs = client.read_logs(log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[run_id])))
                done = trs and all(t.state is not None and t.state.is_final() for t in trs)
                if done and any("probe says hello" in l.message for l in logs) or time.monotonic() > deadline:
                    break
                time.sleep(0.25)
            out["task_runs"] = sorted((t.task_key.split("-")[0], t.state.type.value if t.state else None)
                                      for t in trs)
            out["logs"] = [l.message for l in logs]
    out.update(seen, heartbeat_after=get_current_settings().flows.heartbeat_frequency, order=order,
               csrf_after=get_current_settings().client.csrf_support_enabled)
    out["server_exit_code"] = process.poll()
    out["server_modules_here"] = sorted(m for m in sys.modules if m.startswith("prefect.server"))
    print("PROBE " + json.dumps(out))
''')


def _clean_env(home: Path) -> dict[str, str]:
    """This process's environment without Prefect settings, with the Prefect home ``home``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    env.update(PREFECT_HOME=str(home), PYTHONPATH=SRC + os.pathsep + env.get("PYTHONPATH", ""))
    return env


@pytest.fixture(scope="module")
def shared_home(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One Prefect home for this module: creating its database (all migrations) is the slow part."""
    return tmp_path_factory.mktemp("prefect-home")


@pytest.fixture
def server_env(shared_home: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Servers spawned from this process (they inherit its environment) use ``shared_home``."""
    for key in [k for k in os.environ if k.startswith("PREFECT_")]:
        monkeypatch.delenv(key)
    monkeypatch.setenv("PREFECT_HOME", str(shared_home))
    monkeypatch.setenv("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    return shared_home


def test_server_answers_health_and_is_prefects_own(server_env: Path) -> None:
    import prefect

    server = LocalPrefectServer()
    server.start()
    try:
        url = server.wait_ready()
        assert url == f"http://127.0.0.1:{server.port}/api"
        with urllib.request.urlopen(f"{url}/health", timeout=30) as resp:
            assert resp.status == 200
            assert json.loads(resp.read()) is True
        with urllib.request.urlopen(f"{url}/admin/version", timeout=30) as resp:
            assert json.loads(resp.read()) == prefect.__version__  # the installed package's server
        process = server.process
        assert process is not None
    finally:
        server.stop()
    assert process.poll() is not None  # stopped and reaped
    assert server.process is None
    server.stop()  # stopping twice is harmless


def test_flow_runs_against_the_early_server_and_is_recorded_there(shared_home: Path, tmp_path: Path) -> None:
    script = tmp_path / "probe.py"
    script.write_text(PROBE, encoding="utf-8")
    proc = subprocess.run([sys.executable, str(script)], env=_clean_env(shared_home), cwd=tmp_path,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    (line,) = [x for x in proc.stdout.splitlines() if x.startswith("PROBE ")]
    out = json.loads(line[len("PROBE "):])
    assert out["url"] == out["early_url"]  # the server spawned first was the one used
    assert out["result"] == 42
    assert (out["flow"], out["state"]) == ("tp-server-probe", "COMPLETED")
    assert out["task_runs"] == [["double", "COMPLETED"]]
    assert any("probe says hello" in m for m in out["logs"]), out["logs"]
    # No heartbeats to a server that ends with the run; the caller's setting comes back after
    # (180 s: the default of Prefect's flows.heartbeat_frequency setting, in
    # prefect.settings.models.flows).
    assert (out["heartbeat_in_flow"], out["heartbeat_after"]) == (None, 180)
    # The server hands out no CSRF tokens (server.api.csrf_protection_enabled defaults to
    # False, prefect.settings.models.server.api), so the client asks for none; the client's
    # default (True, prefect.settings.models.client) comes back after.
    assert (out["csrf_in_flow"], out["csrf_after"]) == (False, True)
    assert out["order"] == ["while_starting", "body"]  # the work while the server starts ran once, first
    assert out["server_exit_code"] is not None  # the server process is gone after the context
    assert out["server_modules_here"] == []  # the client process never imported the server code
    assert "Traceback" not in proc.stderr, proc.stderr


def test_server_application_is_the_one_its_own_clients_get(shared_home: Path, tmp_path: Path) -> None:
    # Prefect's server code builds in-process clients with ``create_app()`` (no arguments),
    # which returns the application cached for those arguments; Prefect's own temporary
    # server (``SubprocessASGIServer`` in prefect.server.api.server) is made ephemeral through
    # the environment for that reason. The application twinpass serves must be that one, or
    # the server builds a second one at its first requests.
    code = ("import os\n"
            "from twinpass.prefect_server import app\n"
            "served = app()\n"
            "from prefect.server.api.server import create_app\n"
            "print('APP', create_app() is served, os.environ.get('PREFECT__SERVER_EPHEMERAL'))\n")
    proc = subprocess.run([sys.executable, "-c", code], env=_clean_env(shared_home), cwd=tmp_path,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "APP True 1" in proc.stdout.splitlines(), proc.stdout


def test_save_without_an_api_keeps_the_block_in_the_local_database(shared_home: Path, tmp_path: Path) -> None:
    # `twinpass save` with no PREFECT_API_URL writes through a temporary server into the
    # database under PREFECT_HOME; a later temporary server over that database finds it.
    cfg = tmp_path / "job.toml"
    cfg.write_text('[response]\nkind = "lowpass"\nfamily = "butterworth"\norder = 4\ncutoff_hz = [10.0]\n'
                   '[archive]\nroot = "archive"\n[output]\nstore = "out.zarr"\n', encoding="utf-8")
    env = _clean_env(shared_home)
    saved = subprocess.run([sys.executable, "-m", "twinpass.cli", "save", str(cfg), "--name", "tp-local-save"],
                           env=env, cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert saved.returncode == 0, saved.stdout + saved.stderr
    assert "saved configuration" in saved.stdout
    load = ("from twinpass.prefect_server import prefect_api\n"
            "with prefect_api():\n"
            "    from twinpass.prefect_blocks import TwinpassJob\n"
            "    print('CUTOFF', TwinpassJob.load('tp-local-save').to_job_config().response.cutoff_hz)\n")
    loaded = subprocess.run([sys.executable, "-c", load], env=env, cwd=tmp_path, capture_output=True, text=True,
                            timeout=300)
    assert loaded.returncode == 0, loaded.stdout + loaded.stderr
    assert "CUTOFF (10.0,)" in loaded.stdout, loaded.stdout


def test_no_server_when_an_api_url_is_configured(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:9/api")
    assert early_start() is None
    assert prefect_server._early is None
    from prefect.settings import PREFECT_API_URL, temporary_settings

    calls = []
    # Prefect reads its settings once per context: set the API there too (prefect may be imported already).
    with temporary_settings(updates={PREFECT_API_URL: "http://127.0.0.1:9/api"}):
        with prefect_server.prefect_api(while_starting=lambda: calls.append(1)) as url:
            assert url == "http://127.0.0.1:9/api"
    assert calls == []  # no temporary server, nothing to do while one starts


EARLY = textwrap.dedent('''
    import sys
    from twinpass.prefect_server import early_start

    server = early_start()
    print("EARLY", server is not None, "prefect" in sys.modules)
    if server is not None:
        server.stop()
''')


@pytest.mark.parametrize(("profiles", "spawned"), [
    (None, True),  # no profiles file: Prefect's default profile, no API
    ('active = "mine"\n[profiles.mine]\nPREFECT_API_URL = "http://127.0.0.1:9/api"\n', False),
    ('active = "mine"\n[profiles.mine]\nPREFECT_LOGGING_LEVEL = "DEBUG"\n', True),
], ids=["no-profiles-file", "profile-names-an-api", "profile-without-api"])
def test_early_start_reads_the_active_profile_without_importing_prefect(tmp_path: Path, profiles: str | None,
                                                                         spawned: bool) -> None:
    home = tmp_path / "prefect-home"
    home.mkdir()
    if profiles is not None:
        (home / "profiles.toml").write_text(profiles, encoding="utf-8")
    proc = subprocess.run([sys.executable, "-c", EARLY], env=_clean_env(home), cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert f"EARLY {spawned} False" in proc.stdout, proc.stdout + proc.stderr


def test_a_server_that_cannot_start_is_a_config_error_with_its_output(server_env: Path, tmp_path: Path,
                                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    # Injected fault: a database in a folder that cannot be created (under a regular file).
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("", encoding="utf-8")
    monkeypatch.setenv("PREFECT_SERVER_DATABASE_CONNECTION_URL", f"sqlite+aiosqlite:///{blocker}/sub/prefect.db")
    server = LocalPrefectServer()
    server.start()
    process = server.process
    with pytest.raises(PrefectServerError) as info:
        server.wait_ready()
    message = str(info.value)
    assert "exited with status" in message
    assert "unable to open database file" in message  # the server's own output, passed on
    assert "PREFECT_API_URL" in message and "--no-flow" in message
    assert process is not None and process.poll() is not None
    assert server.process is None


@pytest.mark.parametrize("given, expected", [(None, "1"), ("0", "0")])
def test_twinpass_processes_ask_prefect_to_send_no_usage_data(given: str | None, expected: str) -> None:
    # DO_NOT_TRACK (the cross-tool "Console Do Not Track" convention) turns Prefect's client
    # usage data off: prefect._internal.analytics.enabled.is_telemetry_enabled reads it.
    # twinpass sets it unless the user has, as it does Prefect's server analytics setting.
    env = {k: v for k, v in os.environ.items() if k not in ("DO_NOT_TRACK", "CI", "GITHUB_ACTIONS")}
    if given is not None:
        env["DO_NOT_TRACK"] = given
    code = ("import os, twinpass.flows\n"
            "from prefect._internal.analytics.enabled import is_telemetry_enabled\n"
            "print(os.environ['DO_NOT_TRACK'], os.environ['PREFECT_SERVER_ANALYTICS_ENABLED'], "
            "is_telemetry_enabled())")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    dnt, server, enabled = out.stdout.split()
    assert dnt == expected and server == "false"
    if expected == "1":
        assert enabled == "False"
