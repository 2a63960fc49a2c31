"""Flow-run heartbeats that stop the moment the flow body ends.

A Prefect server marks a flow run whose process died as crashed by noticing that the run's
heartbeat events (``prefect.flow-run.heartbeat``, every ``flows.heartbeat_frequency``
seconds, 180 by default) have stopped. Prefect's own heartbeat thread sleeps in one-second
steps and a synchronous flow run waits for it when the run ends: 0 to 1 s added to every
command, 0.5 s on average, which is several per cent of a short run.

:func:`prompt_heartbeats` wraps a flow call made by the command line: it turns Prefect's
heartbeat thread off for that call and hands the same frequency to :func:`flow_heartbeats`,
which the flow body enters. That sends the same event, for the same resources (the flow
run, its flow, its deployment, its tags), with the interval as its payload
(``interval_seconds``), from a thread that waits on an event and so ends at once. Flow
runs started any other way (a deployment served by a runner, a library call) keep
Prefect's own heartbeats and :func:`flow_heartbeats` does nothing.

Prefect is imported only inside the functions.
"""

from __future__ import annotations

import contextlib
import contextvars
import logging
import threading
from typing import Any, Iterator

log = logging.getLogger(__name__)

HEARTBEAT_EVENT = "prefect.flow-run.heartbeat"
"""The event a Prefect server watches to tell a running flow run from one whose process died."""
MINIMUM_INTERVAL_S = 30
"""Shortest interval between heartbeats, s (the lower bound of Prefect's setting)."""

_interval: contextvars.ContextVar[int | None] = contextvars.ContextVar("twinpass_heartbeat_s", default=None)


@contextlib.contextmanager
def prompt_heartbeats() -> Iterator[int | None]:
    """Around a flow call: Prefect's heartbeat thread off, :func:`flow_heartbeats` on instead.

    Yields the interval in seconds that the flow body's heartbeats will use, or None when
    heartbeats are off in Prefect's settings (``flows.heartbeat_frequency`` unset), in which
    case nothing changes.
    """
    from prefect.settings import get_current_settings, temporary_settings

    seconds = get_current_settings().flows.heartbeat_frequency
    if seconds is None:
        yield None
        return
    seconds = max(int(seconds), MINIMUM_INTERVAL_S)
    token = _interval.set(seconds)
    try:
        with temporary_settings(updates={"flows.heartbeat_frequency": None}):
            yield seconds
    finally:
        _interval.reset(token)


@contextlib.contextmanager
def flow_heartbeats() -> Iterator[None]:
    """Inside a flow body: send the flow run's heartbeats while the body runs.

    Does nothing unless the flow call was made inside :func:`prompt_heartbeats` (Prefect
    then sends none itself) and a flow run is current. The first heartbeat goes at once,
    then one every interval; the thread ends as soon as the body exits.
    """
    seconds = _interval.get()
    if seconds is None:
        yield
        return
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    if ctx is None or ctx.flow_run is None:
        yield
        return
    resource, related = _event_resources(ctx)
    stop = threading.Event()

    def beat() -> None:
        from prefect.events import emit_event

        while True:
            try:
                emit_event(event=HEARTBEAT_EVENT, resource=resource, related=related,
                           payload={"interval_seconds": seconds})
            except Exception:  # a lost heartbeat must never fail the run
                log.debug("could not send a flow-run heartbeat", exc_info=True)
            if stop.wait(seconds):
                return

    # The thread runs in a copy of this context, so that it sees the same Prefect settings
    # (the API URL of the server the flow run belongs to).
    thread = threading.Thread(target=contextvars.copy_context().run, args=(beat,),
                              name="twinpass-flow-heartbeat", daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join(timeout=5.0)


def _event_resources(ctx: Any) -> tuple[dict[str, str], list[Any]]:
    """The heartbeat's resource (the flow run) and related resources (flow, deployment, tags)."""
    import prefect
    from prefect.events.related import tags_as_related_resources
    from prefect.events.schemas.events import RelatedResource

    run = ctx.flow_run
    resource = {"prefect.resource.id": f"prefect.flow-run.{run.id}",
                "prefect.resource.name": run.name or "",
                "prefect.version": prefect.__version__}
    related: list[Any] = []
    if run.flow_id:
        related.append(RelatedResource({"prefect.resource.id": f"prefect.flow.{run.flow_id}",
                                        "prefect.resource.role": "flow",
                                        "prefect.resource.name": ctx.flow.name if ctx.flow else ""}))
    if run.deployment_id:
        related.append(RelatedResource({"prefect.resource.id": f"prefect.deployment.{run.deployment_id}",
                                        "prefect.resource.role": "deployment"}))
    related += tags_as_related_resources(set(run.tags or []))
    return resource, related
