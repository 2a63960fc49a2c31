"""Cancelling, from the Prefect server, a flow run that the command line runs in its own process.

A flow run started by a Prefect runner (``twinpass serve``) is cancelled by that runner:
the server moves it to state Cancelling and the runner ends its process. A flow run that
``twinpass run`` makes in its own process has no runner: nothing there acts on the
server's Cancelling state, and the server refuses every final state but Cancelled for it.

:func:`server_cancels` wraps a flow call made by the command line against a Prefect server
it did not start (one a dashboard or ``prefect flow-run cancel`` can reach); the flow body
enters :func:`cancel_watch`, which reads the flow run's state every :data:`POLL_S` seconds
(one request each) on a thread of its own. Once the server has the flow run Cancelling
(or Cancelled), the watch calls the body's stop hook once, on that thread, and the body
stops the run as Ctrl-C would, then ends the flow run Cancelled. Flow runs started any
other way (a deployment served by a runner, a library call) are not watched.

Prefect is imported only inside the functions.
"""

from __future__ import annotations

import contextlib
import contextvars
import logging
import threading
from typing import Any, Callable, Iterator

log = logging.getLogger(__name__)

POLL_S = 3.0
"""Seconds between two readings of the flow run's state (each is one request to the server)."""
READ_TIMEOUT_S = 10.0
"""Seconds a reading waits for the server's answer; it is not retried (the next poll asks
again), so that a server that stopped answering holds up no one for Prefect's retries."""

_enabled: contextvars.ContextVar[bool] = contextvars.ContextVar("twinpass_server_cancels", default=False)


@contextlib.contextmanager
def server_cancels() -> Iterator[None]:
    """Around a flow call: the flow body watches its flow run for a cancel from the server."""
    token = _enabled.set(True)
    try:
        yield
    finally:
        _enabled.reset(token)


class CancelWatch:
    """The flow run's watch (see :func:`cancel_watch`); an idle one never sees a cancel."""

    def __init__(self, flow_run_id: Any = None) -> None:
        self.flow_run_id = flow_run_id
        self._cancelled = threading.Event()

    @property
    def cancelled(self) -> bool:
        """Whether the watch has seen the flow run Cancelling or Cancelled on the server."""
        return self._cancelled.is_set()

    def read_now(self) -> bool:
        """Read the flow run's state now (one request; none for an idle watch); whether it is
        being cancelled. A read that fails counts as no cancel (the next poll asks again)."""
        if self.flow_run_id is not None and not self._cancelled.is_set() and self._read():
            self._cancelled.set()
        return self._cancelled.is_set()

    def _read(self) -> bool:
        from prefect import get_client
        from prefect.settings import temporary_settings

        try:
            with temporary_settings(updates={"client.max_retries": 0}), \
                    get_client(sync_client=True, httpx_settings={"timeout": READ_TIMEOUT_S}) as client:
                state = client.read_flow_run(self.flow_run_id).state
        except Exception:  # an unanswered poll must never fail the run
            log.debug("could not read the state of flow run %s", self.flow_run_id, exc_info=True)
            return False
        return state is not None and (state.is_cancelling() or state.is_cancelled())


@contextlib.contextmanager
def cancel_watch(on_cancel: Callable[[], None]) -> Iterator[CancelWatch]:
    """Inside a flow body: watch the flow run's state on the server while the body runs.

    Does nothing (yields an idle watch) unless the flow call was made inside
    :func:`server_cancels` and a flow run is current. Otherwise a thread reads the flow
    run's state every :data:`POLL_S` seconds; the first time it is Cancelling or Cancelled,
    ``on_cancel()`` is called on that thread, once, and the watch ends. The thread ends
    with the body (a reading in progress is not waited for).

    Parameters
    ----------
    on_cancel : callable
        Stops the run (it may block until the run's blocks have stopped); an exception it
        raises is logged, not raised.
    """
    if not _enabled.get():
        yield CancelWatch()
        return
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    if ctx is None or ctx.flow_run is None:
        yield CancelWatch()
        return
    watch = CancelWatch(ctx.flow_run.id)
    done = threading.Event()

    def poll() -> None:
        while not done.wait(POLL_S):
            if watch.read_now():
                if not done.is_set():
                    try:
                        on_cancel()
                    except Exception:
                        log.warning("stopping the run cancelled from the Prefect server failed", exc_info=True)
                return

    # The thread runs in a copy of this context: the same Prefect settings (the server's URL).
    thread = threading.Thread(target=contextvars.copy_context().run, args=(poll,),
                              name="twinpass-cancel-watch", daemon=True)
    thread.start()
    try:
        yield watch
    finally:
        done.set()


__all__ = ["POLL_S", "READ_TIMEOUT_S", "CancelWatch", "cancel_watch", "server_cancels"]
