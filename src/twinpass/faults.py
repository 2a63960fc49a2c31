"""Fault injection for tests: real failures inside the real engine.

Rules are a JSON list, given in the environment variable ``TWINPASS_FAULTS`` or in the
file named by ``TWINPASS_FAULTS_FILE`` (read again before every block, so rules can be
changed while workers run; a missing or empty file means no rules)::

    [{"action": "raise-once", "file": "deck-north/*", "block": 1},
     {"action": "raise", "file": "*_20260301T020000*", "block": "*"},
     {"action": "kill-once", "file": "*", "block": 0},
     {"action": "halo0", "file": "*", "block": 2},
     {"action": "perturb", "file": "*", "block": 2},
     {"action": "perturb", "file": "*", "block": "*", "db": -2.0},
     {"action": "sleep", "file": "*", "block": "*", "seconds": 0.2},
     {"action": "hold", "file": "*", "block": "*", "path": "/tmp/go", "seconds": 120}]

``file`` is a shell-style pattern matched against the output array name (the input's
path relative to the archive root, without its suffix); ``block`` is a block index of
that file or ``"*"``.

Actions: ``raise`` (every attempt raises :class:`~twinpass.errors.InjectedFault`),
``raise-once`` (the first attempt only), ``kill`` / ``kill-once`` (the process running
the block is killed with SIGKILL, as by the kernel's out-of-memory killer or an
operator), ``halo0`` (the block is filtered with no halo: a wrong result near its edges
that the seam check must catch), ``perturb`` (the first section's numerator, or the FIR
taps, times sqrt(2): +3 dB per pass, +6 dB overall, a wrong response the response check
must catch; with ``db``, times ``10 ** (db / 40)``: a gain error of ``db`` dB overall), ``sleep`` (``seconds`` of delay before the block runs), ``hold`` (the block
waits until a file exists at ``path``, at most ``seconds`` if given: a test lets the blocks
go on once it has done what it must do while they wait).

"-once" rules record that they fired as marker files in ``TWINPASS_FAULTS_STATE`` (a
folder; required for -once rules), so a rule fires once across threads, processes and
runs. Nothing happens when neither variable is set.
"""

from __future__ import annotations

import dataclasses
import fnmatch
import hashlib
import json
import math
import os
import signal
import time
from dataclasses import dataclass

from .errors import ConfigError, InjectedFault

ENV = "TWINPASS_FAULTS"
ENV_FILE = "TWINPASS_FAULTS_FILE"
ENV_STATE = "TWINPASS_FAULTS_STATE"

ACTIONS = ("raise", "raise-once", "kill", "kill-once", "halo0", "perturb", "sleep", "hold")


@dataclass(frozen=True)
class FaultRule:
    """One fault rule (see the module notes)."""

    action: str
    file: str = "*"
    block: int | str = "*"
    seconds: float = 0.0
    path: str = ""
    db: float | None = None

    def matches(self, name: str, block: int) -> bool:
        return fnmatch.fnmatch(name, self.file) and (self.block == "*" or int(self.block) == block)


_FIELDS = tuple(f.name for f in dataclasses.fields(FaultRule))


def parse_rules(text: str, where: str = ENV) -> list[FaultRule]:
    """Rules from JSON text.

    Raises
    ------
    ConfigError
        Not a JSON list of objects, an unknown key or action, or a bad block index.
    """
    if not text.strip():
        return []
    try:
        items = json.loads(text)
    except json.JSONDecodeError as e:
        raise ConfigError(f"{where}: fault rules are not valid JSON ({e})") from None
    if not isinstance(items, list):
        raise ConfigError(f"{where}: fault rules must be a JSON list of objects")
    rules = []
    for n, item in enumerate(items):
        if not isinstance(item, dict) or "action" not in item:
            raise ConfigError(f"{where}: rule {n} must be an object with an \"action\"")
        unknown = sorted(set(item) - set(_FIELDS))
        if unknown:
            raise ConfigError(f"{where}: rule {n} has unknown key(s) {', '.join(unknown)}; "
                              f"known keys: {', '.join(_FIELDS)}")
        rule = FaultRule(**item)
        if rule.action not in ACTIONS:
            raise ConfigError(f"{where}: rule {n} has unknown action {rule.action!r}; use one of {', '.join(ACTIONS)}")
        if rule.block != "*" and not (isinstance(rule.block, int) and not isinstance(rule.block, bool)):
            raise ConfigError(f"{where}: rule {n} block = {rule.block!r}: use a block index or \"*\"")
        if rule.db is not None and (rule.action != "perturb" or isinstance(rule.db, bool)
                                    or not isinstance(rule.db, (int, float)) or not math.isfinite(rule.db)):
            raise ConfigError(f"{where}: rule {n} db = {rule.db!r}: only a \"perturb\" rule takes \"db\", "
                              "a finite number (the overall gain error, dB)")
        if rule.action == "hold" and not rule.path:
            raise ConfigError(f"{where}: rule {n} (hold) needs a \"path\", the file whose existence lets "
                              "the block go on")
        rules.append(rule)
    return rules


def load_rules() -> list[FaultRule]:
    """The rules now in force (``TWINPASS_FAULTS`` and ``TWINPASS_FAULTS_FILE`` together)."""
    rules = parse_rules(os.environ.get(ENV, ""), ENV)
    path = os.environ.get(ENV_FILE)
    if path:
        try:
            with open(path, encoding="utf-8") as fh:
                text = fh.read()
        except FileNotFoundError:
            text = ""
        rules += parse_rules(text, path)
    return rules


def _first_time(rule: FaultRule, name: str, block: int) -> bool:
    state = os.environ.get(ENV_STATE)
    if not state:
        raise ConfigError(f"{ENV_STATE} must name a folder for '-once' fault rules")
    os.makedirs(state, exist_ok=True)
    key = hashlib.sha256(f"{rule}|{name}|{block}".encode()).hexdigest()[:24]
    try:
        fd = os.open(os.path.join(state, key), os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return False
    os.write(fd, f"{rule.action} {name} block {block} pid {os.getpid()}\n".encode())
    os.close(fd)
    return True


def fired(state_dir: str | os.PathLike[str]) -> list[str]:
    """What the "-once" rules recorded in ``state_dir``: lines "ACTION NAME block I pid P"."""
    try:
        names = sorted(os.listdir(state_dir))
    except FileNotFoundError:
        return []
    out = []
    for n in names:
        with open(os.path.join(state_dir, n), encoding="utf-8") as fh:
            out.append(fh.read().strip())
    return out


def _kill_self() -> None:
    if hasattr(signal, "SIGKILL"):
        os.kill(os.getpid(), signal.SIGKILL)
    os._exit(137)  # pragma: no cover - platforms without SIGKILL


def _hold(rule: FaultRule, poll_s: float = 0.05) -> None:
    """Wait until a file exists at ``rule.path`` (at most ``rule.seconds`` when positive)."""
    deadline = time.monotonic() + rule.seconds if rule.seconds > 0 else None
    while not os.path.exists(rule.path) and (deadline is None or time.monotonic() < deadline):
        time.sleep(poll_s)


def perturb_factor(flags: set[str]) -> float | None:
    """The factor a ``perturb`` rule among ``flags`` (from :func:`apply`) puts on the first
    section's numerator (or the FIR taps), once per pass: sqrt(2) (+6.02 dB overall), or
    ``10 ** (db / 40)`` for a rule with ``db``; None when no such rule fired."""
    for flag in flags:
        if flag == "perturb":
            return math.sqrt(2.0)
        if flag.startswith("perturb:"):
            return 10.0 ** (float(flag.split(":", 1)[1]) / 40.0)
    return None


def apply(name: str, block: int) -> set[str]:
    """Fire the rules matching (array ``name``, ``block``); return numeric tamper flags."""
    flags: set[str] = set()
    for rule in load_rules():
        if not rule.matches(name, block):
            continue
        act = rule.action
        if act == "sleep":
            time.sleep(rule.seconds)
        elif act == "hold":
            _hold(rule)
        elif act == "perturb" and rule.db is not None:
            flags.add(f"perturb:{float(rule.db)!r}")
        elif act in ("halo0", "perturb"):
            flags.add(act)
        elif act.endswith("-once") and not _first_time(rule, name, block):
            continue
        elif act.startswith("raise"):
            raise InjectedFault(f"injected fault in {name} block {block}")
        elif act.startswith("kill"):
            _kill_self()
    return flags
