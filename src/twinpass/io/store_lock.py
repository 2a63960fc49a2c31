"""The run lock of an output store: one writing run at a time.

Local stores get ``<store>/.twinpass-lock``, created atomically with ``O_CREAT | O_EXCL`` and
holding JSON ``{pid, host, run_id, started, token}``. A lock whose holder ran on this host
and is no longer alive is stale: it is removed with a warning and taken over. Only one
process at a time may remove a stale lock: it first creates ``<lock>.takeover`` the same
exclusive way (itself judged stale, and cleared, when its creator is gone), so that two runs
that found one stale lock cannot remove each other's new lock.

Stores behind other fsspec file systems get the same object, created with
``pipe_file(mode="create")``: back ends with conditional writes make this atomic; on the
others it is best effort (check, write, read back and compare the token).

A run of the Prefect flow notes its flow run beside the lock (``<lock>.flow-run``,
:func:`note_flow_run`), so that a run recovering the lock of a run whose process died can
tell the Prefect server that flow run crashed.
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import os
import socket
import time
import uuid
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Protocol

import psutil

from ..errors import StoreError, StoreLockedError
from .store_util import write_errors

LOCK_NAME = ".twinpass-lock"
TAKEOVER_SUFFIX = ".takeover"
"""Suffix of the guard object a process holds while it removes a stale lock."""
ATTEMPTS = 5
"""Attempts to take a lock that is released, or found stale, meanwhile."""
log = logging.getLogger("twinpass.store")


@dataclass(frozen=True)
class LockInfo:
    """Who holds a store lock."""

    pid: int
    host: str
    run_id: str
    started: str
    """ISO 8601 time (UTC) the lock was taken."""
    token: str
    """Random identifier of this acquisition."""

    @classmethod
    def new(cls, run_id: str) -> LockInfo:
        return cls(
            pid=os.getpid(),
            host=socket.gethostname(),
            run_id=str(run_id),
            started=_dt.datetime.now(_dt.timezone.utc).isoformat(),
            token=uuid.uuid4().hex,
        )

    def to_bytes(self) -> bytes:
        return json.dumps(asdict(self), sort_keys=True).encode()

    @classmethod
    def parse(cls, raw: bytes) -> LockInfo | None:
        try:
            d: Any = json.loads(raw.decode())
            return cls(
                pid=int(d["pid"]), host=str(d["host"]), run_id=str(d["run_id"]),
                started=str(d["started"]), token=str(d.get("token", "")),
            )
        except (ValueError, KeyError, TypeError, UnicodeDecodeError):
            return None

    def describe(self) -> str:
        return f"run {self.run_id} (pid {self.pid} on host {self.host}, started {self.started})"

    def is_stale(self) -> bool:
        """True when the holder ran on this host and its process is gone (or the pid was reused)."""
        if self.host != socket.gethostname():
            return False
        if not psutil.pid_exists(self.pid):
            return True
        try:
            created = psutil.Process(self.pid).create_time()
            started = _dt.datetime.fromisoformat(self.started).timestamp()
        except (psutil.Error, ValueError):
            return False
        return created > started + 1.0  # a process younger than the lock reuses the pid


class LockFile(Protocol):
    """Exclusive creation, reading and removal of one lock object."""

    where: str

    def create(self, data: bytes) -> bool: ...
    def read(self) -> bytes | None: ...
    def remove(self) -> None: ...
    def sibling(self, suffix: str) -> LockFile:
        """The lock object whose name is this one's with ``suffix`` appended."""
        ...


class LocalLockFile:
    """``<store>/.twinpass-lock`` on a local file system."""

    def __init__(self, root: Path, name: str = LOCK_NAME) -> None:
        self.root, self.path = root, root / name
        self.where = str(self.path)

    def sibling(self, suffix: str) -> LocalLockFile:
        return LocalLockFile(self.root, self.path.name + suffix)

    def create(self, data: bytes) -> bool:
        with write_errors(f"the lock file {self.path}"):  # a read-only file system: a StoreError
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                return False
        try:
            with write_errors(f"the lock file {self.path}"):
                with os.fdopen(fd, "wb") as f:
                    f.write(data)
                    f.flush()
                    os.fsync(f.fileno())
        except StoreError:
            self.path.unlink(missing_ok=True)
            raise
        return True

    def read(self) -> bytes | None:
        try:
            return self.path.read_bytes()
        except FileNotFoundError:
            return None

    def remove(self) -> None:
        self.path.unlink(missing_ok=True)


class FsspecLockFile:
    """The lock object in a store behind an fsspec file system."""

    def __init__(self, fs: Any, root: str, location: str, name: str = LOCK_NAME) -> None:
        self.fs, self.root, self.location, self.name = fs, root, location, name
        self.path = root.rstrip("/") + "/" + name
        self.where = location.rstrip("/") + "/" + name

    def sibling(self, suffix: str) -> FsspecLockFile:
        return FsspecLockFile(self.fs, self.root, self.location, self.name + suffix)

    def create(self, data: bytes) -> bool:
        with write_errors(f"the lock object {self.where}"):
            try:
                self.fs.pipe_file(self.path, data, mode="create")
            except FileExistsError:
                return False
        # Best effort where "create" is check-then-write: keep the lock only if it is still ours.
        return self.read() == data

    def read(self) -> bytes | None:
        try:
            return bytes(self.fs.cat_file(self.path))
        except FileNotFoundError:
            return None

    def remove(self) -> None:
        try:
            self.fs.rm_file(self.path)
        except FileNotFoundError:
            pass


def acquire(lock: LockFile, run_id: str, recovered: list[LockInfo] | None = None) -> LockInfo:
    """Take the lock for ``run_id``; recover a stale one; else raise :class:`StoreLockedError`.

    The holders of stale locks removed on the way are appended to ``recovered`` (when given),
    so that the caller can say so where its user looks (a flow run's log)."""
    info = LockInfo.new(run_id)
    for _ in range(ATTEMPTS):
        if lock.create(info.to_bytes()):
            return info
        raw = lock.read()
        if raw is None:
            continue  # released meanwhile: try again
        holder = LockInfo.parse(raw)
        if holder is None:
            raise StoreLockedError(
                f"output store is locked: {lock.where} exists but cannot be read (a writer may have been "
                f"killed while taking it); if no run is using the store, delete {lock.where} and rerun"
            )
        if not holder.is_stale():
            try:
                flow_run = noted_flow_run(lock, holder.run_id)
            except Exception:  # a note that cannot be read only leaves the flow run unnamed
                flow_run = None
            raise StoreLockedError(locked_message(holder, lock.where, flow_run))
        if _remove_stale(lock, raw, holder) and recovered is not None:
            recovered.append(holder)
    raise StoreLockedError(
        f"output store lock {lock.where} keeps changing hands, or another run is taking it over "
        f"({lock.where}{TAKEOVER_SUFFIX}): retry later; if no other run is starting, delete both and rerun"
    )


def locked_message(holder: LockInfo, where: str, flow_run: dict[str, str] | None = None) -> str:
    """Why a run is refused while ``holder`` holds the lock ``where``, and what to do;
    ``flow_run``, the holder's note of its Prefect flow run (:func:`noted_flow_run`), names it.

    Only a holder on this host can be judged: once its process has ended, the next run here
    recovers its lock automatically. A lock taken on another host is left alone, since this
    one cannot see that host's processes; a run started there recovers it, so deleting it
    by hand is only for a host that is gone.
    """
    on = (f" (Prefect flow run {flow_run['flow_run_id']}" + (f" on {flow_run['api_url']})" if flow_run["api_url"]
                                                             else ")")) if flow_run else ""
    said = f"output store is locked by {holder.describe()}{on}: {where}; wait for that run to finish"
    if holder.host == socket.gethostname():
        return (f"{said}. Its lock is recovered automatically by the next run once that process is no longer "
                "running: there is no need to delete it")
    return (f"{said}. The lock was taken on another host, whose processes this one cannot check: a run "
            f"started on {holder.host} recovers it automatically once that process is no longer running. "
            f"Delete {where} by hand only if {holder.host} is gone for good and the run died with it")


def _remove_stale(lock: LockFile, raw: bytes, holder: LockInfo) -> bool:
    """Remove the lock judged stale (``raw``, held by ``holder``) if it is still that one;
    whether this call removed it.

    The check and the removal happen while holding the takeover guard: without it, a run
    that judged the same stale lock could check, let another remove it and take the lock,
    and then remove that live lock. A guard held by a live process makes this call wait a
    moment and return (the caller tries again); one left by a process that is gone is cleared.
    """
    guard = lock.sibling(TAKEOVER_SUFFIX)
    if not guard.create(LockInfo.new(f"taking over {lock.where}").to_bytes()):
        taken = guard.read()
        taker = None if taken is None else LockInfo.parse(taken)
        if taken is not None and taker is not None and taker.is_stale() and guard.read() == taken:
            log.warning("clearing %s, left by %s while it took over a stale lock", guard.where, taker.describe())
            guard.remove()
        else:
            time.sleep(0.05)  # another run is taking the lock over (or is writing the guard)
        return False
    try:
        if lock.read() == raw:
            log.warning(
                "recovering a stale lock on the output store: %s is no longer running; removing %s",
                holder.describe(), lock.where,
            )
            lock.remove()
            return True
        return False
    finally:
        guard.remove()


FLOW_RUN_SUFFIX = ".flow-run"
"""Suffix of the object, beside the lock, naming the Prefect flow run of the run holding it."""


def note_flow_run(lock: LockFile, run_id: str, flow_run_id: str, api_url: str) -> None:
    """Record, beside the lock held by ``run_id``, its Prefect flow run and the API URL of that
    flow run's server (JSON ``{run_id, flow_run_id, api_url}``), replacing an older note.

    Call it holding the lock: only the lock's holder writes the note. A run recovering the
    lock of a run that died (:func:`acquire`) finds there which flow run was left running.
    """
    note = lock.sibling(FLOW_RUN_SUFFIX)
    note.remove()
    note.create(json.dumps({"run_id": str(run_id), "flow_run_id": str(flow_run_id), "api_url": str(api_url)},
                           sort_keys=True).encode())


def noted_flow_run(lock: LockFile, run_id: str) -> dict[str, str] | None:
    """The note :func:`note_flow_run` wrote for ``run_id`` (``flow_run_id``, ``api_url``), or
    None when the note is missing, unreadable or another run's."""
    raw = lock.sibling(FLOW_RUN_SUFFIX).read()
    try:
        d: Any = json.loads(raw.decode()) if raw is not None else None
        if d is None or str(d["run_id"]) != str(run_id):
            return None
        return {"flow_run_id": str(d["flow_run_id"]), "api_url": str(d["api_url"])}
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        return None


def release(lock: LockFile, info: LockInfo) -> None:
    """Remove the lock if it is still held by ``info`` (and the note of its flow run); warn
    otherwise. Never raises.

    A lock that cannot be read or removed (the store's file system gone read-only, an I/O
    error) is left behind with a warning naming it: the run's own outcome, or the error that
    ended it, is what the caller reports. Once this process has ended, the next run on this
    host finds that lock stale and recovers it (:func:`acquire`).
    """
    try:
        raw = lock.read()
        holder = None if raw is None else LockInfo.parse(raw)
        if holder is None or holder.token != info.token:
            log.warning(
                "output store lock %s was no longer held by %s at the end of the run; left as found",
                lock.where, info.describe(),
            )
            return
        if noted_flow_run(lock, info.run_id) is not None:  # the run ended: its flow run is no one's concern
            lock.sibling(FLOW_RUN_SUFFIX).remove()
        lock.remove()
    except Exception as e:  # any back end's error: the release must not replace the run's outcome
        log.warning(
            "could not remove the output store lock %s (%s: %s); it is left behind, and the next run "
            "on host %s recovers it automatically once this process (pid %d) has ended",
            lock.where, type(e).__name__, e, info.host, info.pid,
        )
