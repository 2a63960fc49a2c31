"""Prefect settings twinpass needs before prefect is imported.

* Server analytics off: on a fresh home the temporary server's telemetry insert races
  the first flow run and logs a "database is locked" traceback; offline it logs errors.
* Client usage data off too (``DO_NOT_TRACK=1``, the cross-tool convention Prefect's client
  honours): twinpass's processes send nothing anywhere on their own, which matters on the
  isolated networks monitoring systems often run on.
* A longer start-up timeout for the temporary local server on slow machines (read by
  :mod:`twinpass.prefect_server`, which starts that server, and by Prefect).

Users' own settings win: only unset variables are given a value.
"""

from __future__ import annotations

import os

DEFAULTS = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
}


def apply() -> None:
    for key, value in DEFAULTS.items():
        os.environ.setdefault(key, value)


apply()
