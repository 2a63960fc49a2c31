"""Fault injection for tests: real failures inside the real engine.

Set the environment variable ``TWINPASS_FAULTS`` to a JSON list of rules::

    [{"action": "raise-once", "file": "deck-north/*", "block": 1},
     {"action": "raise", "file": "*_20260301T020000*", "block": "*"},
     {"action": "kill-once", "file": "*", "block": 0},
     {"action": "halo0", "file": "*", "block": 2},
     {"action": "perturb", "file": "*", "block": 2},
     {"action": "sleep", "file": "*", "block": "*", "seconds": 0.2}]

Actions: ``raise`` (always), ``raise-once`` (first attempt only), ``kill`` / ``kill-once``
(the worker process exits abruptly, as if killed), ``halo0`` (the block is filtered with
no halo: a wrong result the seam check must catch), ``perturb`` (the coefficients are
changed by 5 %: a wrong response the response check must catch), ``sleep``.
"-once" rules record that they fired as marker files in ``TWINPASS_FAULTS_STATE`` (a
folder; required for -once rules) so the rule holds across processes.

Nothing happens when ``TWINPASS_FAULTS`` is unset.
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import os
import time
from dataclasses import dataclass

from .errors import InjectedFault

ENV = "TWINPASS_FAULTS"
ENV_STATE = "TWINPASS_FAULTS_STATE"


@dataclass(frozen=True)
class FaultRule:
    action: str
    file: str = "*"
    block: int | str = "*"
    seconds: float = 0.0

    def matches(self, name: str, block: int) -> bool:
        return fnmatch.fnmatch(name, self.file) and (self.block == "*" or int(self.block) == block)


_ACTIONS = {"raise", "raise-once", "kill", "kill-once", "halo0", "perturb", "sleep"}


def load_rules() -> list[FaultRule]:
    raw = os.environ.get(ENV)
    if not raw:
        return []
    rules = []
    for item in json.loads(raw):
        rule = FaultRule(**item)
        if rule.action not in _ACTIONS:
            raise ValueError(f"{ENV}: unknown action {rule.action!r}; use one of {sorted(_ACTIONS)}")
        rules.append(rule)
    return rules


def _first_time(rule: FaultRule, name: str, block: int) -> bool:
    state = os.environ.get(ENV_STATE)
    if not state:
        raise ValueError(f"{ENV_STATE} must name a folder for '-once' fault rules")
    os.makedirs(state, exist_ok=True)
    key = hashlib.sha256(f"{rule}|{name}|{block}".encode()).hexdigest()[:24]
    try:
        fd = os.open(os.path.join(state, key), os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return False
    os.close(fd)
    return True


def apply(name: str, block: int) -> set[str]:
    """Fire the rules matching (array ``name``, ``block``); return numeric tamper flags."""
    flags: set[str] = set()
    for rule in load_rules():
        if not rule.matches(name, block):
            continue
        act = rule.action
        if act == "sleep":
            time.sleep(rule.seconds)
        elif act in ("halo0", "perturb"):
            flags.add(act)
        elif act.endswith("-once") and not _first_time(rule, name, block):
            continue
        elif act.startswith("raise"):
            raise InjectedFault(f"injected fault in {name} block {block}")
        elif act.startswith("kill"):
            os._exit(137)
    return flags
