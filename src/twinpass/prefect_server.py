"""A temporary local Prefect server that the command line starts itself, early.

When no Prefect API is configured, Prefect starts a temporary server of its own at the first
API call: it imports its server code in the calling process first and only then spawns the
server, which imports the same code again, so the first flow call waits for both in a row.
The command line instead spawns the server at its very start (:func:`early_start`), so that
the server's start-up overlaps the command's own imports and preparation, and points this
process's Prefect client at it for the flow call (:func:`prefect_api`). The calling process
never imports ``prefect.server``.

The server is Prefect's own application (``prefect.server.api.server.create_app``, made
ephemeral as Prefect makes its own temporary server: no UI, only the services a temporary
server needs) under uvicorn, on 127.0.0.1 and a free port, with the same Prefect home and
so the same database as any other Prefect process of the user. It lives in its own process
group, so that Ctrl-C reaches the command alone and the run's final state can still be
recorded; the command stops it on exit, and the server stops itself when the command's
process is gone.

Importing this module is cheap (standard library only); prefect is imported only by
:func:`prefect_api` and, in the server process, by :func:`app`.
"""

from __future__ import annotations

import atexit
import collections
import contextlib
import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any, Callable, Iterator

from .errors import PrefectServerError

log = logging.getLogger(__name__)

HOST = "127.0.0.1"
PARENT_PID_ENV = "TWINPASS_PREFECT_SERVER_PARENT"
"""Environment variable naming the process the server belongs to (the server exits when it is gone)."""
STARTUP_TIMEOUT_ENV = "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"
EPHEMERAL_ENV = "PREFECT__SERVER_EPHEMERAL"
FINAL_ENV = "PREFECT__SERVER_FINAL"
"""Prefect's switches for its server application: temporary (no UI, only the services a
temporary server needs) and the only application of its process."""
DEFAULT_STARTUP_TIMEOUT_S = 90.0
STOP_WAIT_S = 5.0
"""Seconds :meth:`LocalPrefectServer.stop` waits after asking the server to stop, before killing it."""
DRAIN_TIMEOUT_S = 10.0
"""Seconds to wait for queued Prefect events and logs to reach the server before stopping it."""
OUTPUT_LINES = 40
"""Lines of the server's output kept for error messages."""
MAX_PORT_RETRIES = 5

_early: LocalPrefectServer | None = None


# ----------------------------------------------------------------- server process
def app() -> Any:
    """The uvicorn application factory run in the server process.

    Returns Prefect's server application as for Prefect's own temporary server: no UI, and
    only the background services a temporary server needs (``PREFECT__SERVER_EPHEMERAL``).
    """
    parent = os.environ.get(PARENT_PID_ENV, "")
    if os.name == "posix" and parent.isdigit():
        threading.Thread(target=_exit_with_parent, args=(int(parent),), name="twinpass-parent-watch",
                         daemon=True).start()
    from .startup import start_up_imports

    # Ephemeral and final through the environment, with no arguments to create_app, as
    # Prefect's own temporary server does: create_app caches the application by its
    # arguments, and the server's own clients (its event actions, for one) call it with none,
    # so they find this application instead of building a second one at the first requests.
    os.environ[EPHEMERAL_ENV] = os.environ[FINAL_ENV] = "1"
    # The server's start-up is almost all imports and route building. This process is the
    # server's own, so what they build is also frozen.
    with start_up_imports(freeze=True):
        from prefect.server.api.server import create_app

        return create_app()


def _exit_with_parent(parent_pid: int, interval_s: float = 1.0) -> None:
    """Stop this server once its parent is gone (it is re-parented then); SIGTERM lets uvicorn end cleanly."""
    while os.getppid() == parent_pid:
        time.sleep(interval_s)
    os.kill(os.getpid(), signal.SIGTERM)


# ----------------------------------------------------------------- client side
class LocalPrefectServer:
    """A temporary Prefect server in a child process, on 127.0.0.1 and a free port.

    :meth:`start` spawns it and returns at once; :meth:`wait_ready` waits until it answers;
    :meth:`stop` (also run at interpreter exit) ends it. Its output is kept while it starts
    (and shown in the error if it fails) and copied to this process's stderr once it is up.
    """

    def __init__(self) -> None:
        self.port: int | None = None
        self.process: subprocess.Popen[str] | None = None
        self._output: collections.deque[str] = collections.deque(maxlen=OUTPUT_LINES)
        self._relay = False
        self._lock = threading.Lock()
        self._pump: threading.Thread | None = None
        self._ready = False
        self._at_exit = False

    @property
    def api_url(self) -> str:
        """The server's API URL, ``http://127.0.0.1:PORT/api``."""
        return f"http://{HOST}:{self.port}/api"

    def start(self) -> None:
        """Spawn the server process (once) and return without waiting for it."""
        if self.process is None:
            self._spawn()
        if not self._at_exit:
            atexit.register(self.stop)
            self._at_exit = True

    def _spawn(self) -> None:
        cmd = [sys.executable, "-m", "uvicorn", "--app-dir", str(Path(__file__).resolve().parent.parent),
               "--factory", f"{__name__}:app", "--log-level", "error", "--lifespan", "on"]
        env = {**os.environ, "PREFECT_UI_ENABLED": "0", PARENT_PID_ENV: str(os.getpid())}
        kwargs: dict[str, Any] = {}
        sock = None
        if os.name == "posix":
            # Hand uvicorn a socket already bound to a free port: no other process can take the
            # port meanwhile. It is not listening yet, so connections are refused until the
            # server is up and serving.
            sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            sock.bind((HOST, 0))
            sock.set_inheritable(True)
            cmd += ["--fd", str(sock.fileno())]
            kwargs.update(pass_fds=(sock.fileno(),), start_new_session=True)
            self.port = sock.getsockname()[1]
        else:  # pragma: no cover - Windows: a free port now, retried in wait_ready on a clash
            self.port = _free_port()
            cmd += ["--host", HOST, "--port", str(self.port)]
            kwargs.update(creationflags=getattr(subprocess, "CREATE_NEW_PROCESS_GROUP", 0))
        try:
            self.process = subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                            stderr=subprocess.STDOUT, text=True, errors="replace", **kwargs)
        finally:
            if sock is not None:
                sock.close()  # the server holds its own copy
        self._output.clear()
        self._pump = threading.Thread(target=self._read_output, args=(self.process,),
                                      name="twinpass-prefect-server-output", daemon=True)
        self._pump.start()
        log.info("starting a temporary Prefect server on %s", self.api_url)

    def _read_output(self, process: subprocess.Popen[str]) -> None:
        assert process.stdout is not None
        for line in process.stdout:
            with self._lock:
                self._output.append(line)
                relay = self._relay
            if relay:
                sys.stderr.write(line)
                sys.stderr.flush()

    def _output_tail(self, *, ended: bool) -> str:
        if ended and self._pump is not None:
            self._pump.join(timeout=2.0)  # the rest of the output of a process that has ended
        with self._lock:
            return "".join(self._output).strip()

    def wait_ready(self, timeout: float | None = None) -> str:
        """Wait until the server answers ``GET /api/health``; return its API URL.

        Parameters
        ----------
        timeout : float, optional
            Seconds to wait; default ``PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS`` from the
            environment, else 90 s.

        Raises
        ------
        PrefectServerError
            If the server process ends or does not answer in time (it is stopped then); the
            message holds the end of its output.
        """
        self.start()
        if self._ready:
            return self.api_url
        if timeout is None:
            timeout = _startup_timeout()
        opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # loopback: never a proxy
        deadline = time.monotonic() + timeout
        retries = 0
        while True:
            assert self.process is not None
            code = self.process.poll()
            if code is not None:
                tail = self._output_tail(ended=True)
                if "attempting to bind" in tail and retries < MAX_PORT_RETRIES:  # port taken meanwhile
                    retries += 1
                    self._spawn()
                    continue
                self.stop()
                raise PrefectServerError(
                    f"the temporary Prefect server (for the database under PREFECT_HOME) exited with status "
                    f"{code} while starting; its output ends:\n{tail or '(nothing)'}\n"
                    "Fix the Prefect settings named there, set PREFECT_API_URL to a running Prefect server, "
                    "or run with --no-flow")
            try:
                with opener.open(f"{self.api_url}/health", timeout=5.0) as resp:
                    if resp.status == 200:
                        break
            except (urllib.error.URLError, OSError):
                pass
            if time.monotonic() > deadline:
                tail = self._output_tail(ended=False)
                self.stop()
                raise PrefectServerError(
                    f"the temporary Prefect server on {self.api_url} did not answer within {timeout:g} s; "
                    f"its output ends:\n{tail or '(nothing)'}\nRaise {STARTUP_TIMEOUT_ENV}, set PREFECT_API_URL "
                    "to a running Prefect server, or run with --no-flow")
            time.sleep(0.1)
        with self._lock:
            self._ready = self._relay = True
            pending = "".join(self._output)
        if pending:
            sys.stderr.write(pending)
            sys.stderr.flush()
        return self.api_url

    def stop(self) -> None:
        """Stop the server: ask it to end (SIGTERM), wait up to 5 s, then kill it. Safe to repeat.

        A server that has not been seen answering is killed at once: it has served nothing, and
        uvicorn would otherwise finish its whole start-up before honouring the request to stop.
        """
        proc, self.process = self.process, None
        ready, self._ready = self._ready, False
        if proc is not None:
            if proc.poll() is None:
                if ready:
                    proc.terminate()
                    try:
                        proc.wait(timeout=STOP_WAIT_S)
                    except subprocess.TimeoutExpired:
                        proc.kill()
                else:
                    proc.kill()
                proc.wait()
            log.info("stopped the temporary Prefect server on %s", self.api_url)
        if self._pump is not None:
            self._pump.join(timeout=2.0)
            self._pump = None
        if self._at_exit:
            atexit.unregister(self.stop)
            self._at_exit = False


def configured_api() -> str | None:
    """The Prefect API URL the user configured (environment, profile or settings file), or None."""
    from . import _prefect_env  # noqa: F401  (must precede the prefect import)

    return _configured_api_url()


def check_api_reachable(url: str, timeout: float = 5.0) -> None:
    """Raise :class:`PrefectServerError` unless the Prefect API at ``url`` answers at all.

    Any HTTP answer counts (an API asking for credentials answers too); no answer within
    ``timeout`` seconds, a refused connection or an unknown host does not. Checked before a
    run begins, so that a server that is down stops the command at once with what to do,
    instead of after the run's blocks have started.
    """
    host = urllib.parse.urlsplit(url).hostname or ""
    loopback = host in ("localhost", "::1") or host.startswith("127.")
    opener = urllib.request.build_opener(*([urllib.request.ProxyHandler({})] if loopback else []))
    try:
        with opener.open(url.rstrip("/") + "/health", timeout=timeout):
            return
    except urllib.error.HTTPError:
        return  # it answered
    except (urllib.error.URLError, OSError, ValueError) as e:
        reason = getattr(e, "reason", e)
        raise PrefectServerError(
            f"the Prefect API at {url} (PREFECT_API_URL) does not answer ({reason}); start that server "
            "(prefect server start), correct PREFECT_API_URL (or unset it for a temporary local server), or run "
            "the engine alone with --no-flow") from None


def _free_port() -> int:  # pragma: no cover - used where sockets cannot be handed over (Windows)
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


def _startup_timeout() -> float:
    try:
        return float(os.environ.get(STARTUP_TIMEOUT_ENV, DEFAULT_STARTUP_TIMEOUT_S))
    except ValueError:
        return DEFAULT_STARTUP_TIMEOUT_S


# ----------------------------------------------------------------- configuration
def _no_server_needed_cheaply() -> bool:
    """Whether a Prefect API is configured, or may be, judged without importing prefect.

    True when ``PREFECT_API_URL`` is in the environment, when prefect is imported already and
    names an API, when the active profile of ``profiles.toml`` names one, or when a settings
    file in the working folder (``prefect.toml``, ``.env``, ``pyproject.toml`` with
    ``[tool.prefect]``) might: :func:`prefect_api` decides for sure later.
    """
    if os.environ.get("PREFECT_API_URL"):
        return True
    if "prefect.settings" in sys.modules:  # already imported (a test, or a library caller)
        return _configured_api_url() is not None or not _ephemeral_allowed()
    for flag in ("PREFECT_SERVER_EPHEMERAL_ENABLED", "PREFECT_SERVER_ALLOW_EPHEMERAL_MODE"):
        if os.environ.get(flag, "").strip().lower() in ("0", "false", "no", "off"):
            return True
    cwd = Path.cwd()
    if (cwd / "prefect.toml").is_file() or (cwd / ".env").is_file():
        return True
    try:
        if "[tool.prefect" in (cwd / "pyproject.toml").read_text(encoding="utf-8", errors="replace"):
            return True
    except OSError:
        pass
    return _profile_names_api()


def _profile_names_api() -> bool:
    """Whether the active profile of the user's ``profiles.toml`` sets ``PREFECT_API_URL``."""
    import tomllib

    if os.environ.get("PREFECT_PROFILES_PATH"):
        path = Path(os.environ["PREFECT_PROFILES_PATH"]).expanduser()
    else:
        home = Path(os.environ.get("PREFECT_HOME") or Path.home() / ".prefect").expanduser()
        path = home / "profiles.toml"
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        data = {}
    except (OSError, tomllib.TOMLDecodeError):
        return True  # unreadable: let prefect decide
    active = os.environ.get("PREFECT_PROFILE") or data.get("active") or "ephemeral"
    profile = data.get("profiles", {}).get(active)
    if profile is None:
        return active != "ephemeral"  # one of Prefect's built-in profiles other than the default
    return bool(profile.get("PREFECT_API_URL"))


def _configured_api_url() -> str | None:
    from prefect.settings import PREFECT_API_URL

    return PREFECT_API_URL.value() or None


def _ephemeral_allowed() -> bool:
    from prefect.settings import get_current_settings

    return bool(get_current_settings().server.ephemeral.enabled)


def _drain_prefect_workers(timeout: float = DRAIN_TIMEOUT_S) -> None:
    """Send the events and logs Prefect still queues to the server, waiting up to ``timeout`` s each."""
    from prefect.events.worker import EventsWorker
    from prefect.logging.handlers import APILogWorker

    for worker in (APILogWorker, EventsWorker):
        try:
            worker.drain_all(timeout=timeout)
        except Exception as e:  # never let bookkeeping hide the run's own outcome
            log.warning("could not flush Prefect %s before stopping the temporary server: %s", worker.__name__, e)


# ----------------------------------------------------------------- entry points
def early_start() -> LocalPrefectServer | None:
    """Spawn the temporary server now, unless a Prefect API is (or may be) configured.

    Call it first thing in a command that will call a flow, before importing prefect; it
    returns at once. :func:`prefect_api` then uses this server, or stops it if Prefect's
    settings turn out to name an API.
    """
    global _early
    from . import _prefect_env  # noqa: F401  (the server inherits twinpass's Prefect defaults)

    if _early is None and not _no_server_needed_cheaply():
        server = LocalPrefectServer()
        server.start()
        _early = server
    return _early


@contextlib.contextmanager
def prefect_api(while_starting: Callable[[], object] | None = None) -> Iterator[str | None]:
    """Run the body against a Prefect API: the configured one, else a temporary local server.

    Yields the API URL, or None when Prefect will use neither (no API configured and its
    temporary server turned off: Prefect reports that itself). With no API configured, the
    body runs with ``PREFECT_API_URL`` pointing at the server from :func:`early_start` (or one
    started now); on exit, queued events and logs are sent and the server is stopped.

    Parameters
    ----------
    while_starting : callable, optional
        Work to do while the temporary server starts, before waiting for it to answer
        (called only when a temporary server is used): work the body would otherwise do
        after the server is up, such as loading what the first flow call loads.

    Raises
    ------
    PrefectServerError
        If the temporary server cannot be started.
    """
    global _early
    from . import _prefect_env  # noqa: F401  (must precede the prefect import)

    server, _early = _early, None
    url = _configured_api_url()
    if url is not None or not _ephemeral_allowed():
        if server is not None:
            server.stop()
        yield url
        return
    from prefect.settings import PREFECT_API_URL, PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS, PREFECT_UI_URL
    from prefect.settings import get_current_settings, temporary_settings

    updates: dict[Any, Any] = {}
    if not PREFECT_UI_URL.value():
        updates[PREFECT_UI_URL] = ""  # no "View at" links: this server has no UI and ends with the command
    # No flow-run heartbeats: they let a lasting server notice a run whose process died, and
    # this server dies with the process. Prefect's heartbeat thread sleeps in 1 s steps, and
    # the end of every flow run waits for it (0.5 s on average).
    updates["flows.heartbeat_frequency"] = None
    if not get_current_settings().server.api.csrf_protection_enabled:
        # This server inherits the setting: it hands out no CSRF tokens, so asking for one
        # (once per Prefect client) is a request for nothing.
        updates["client.csrf_support_enabled"] = False
    server = server or LocalPrefectServer()
    try:
        server.start()
        if while_starting is not None:
            while_starting()
        api = server.wait_ready(float(PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS.value()))
        updates[PREFECT_API_URL] = api
        with temporary_settings(updates=updates):
            try:
                yield api
            finally:
                _drain_prefect_workers()
    finally:
        server.stop()
