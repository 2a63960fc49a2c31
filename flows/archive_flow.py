"""Deployable entry point of the twinpass archive run.

Deploy it to a work pool::

    prefect deploy flows/archive_flow.py:archive_run --name nightly --pool POOL \
        --cron "30 2 * * *" --timezone Europe/Berlin \
        --params '{"config_path": "/data/job/twinpass.toml"}'

or serve it from this process (needs a Prefect server: ``PREFECT_API_URL``)::

    python flows/archive_flow.py /data/job/twinpass.toml --cron "30 2 * * *" --timezone Europe/Berlin

Flow parameters: ``config_path`` (a twinpass TOML file) or ``config_block`` (the name of a
saved TwinpassJob block), ``force``, ``scheduler``, ``workers``, ``report``.
"""

from __future__ import annotations

import argparse
import sys
from typing import Sequence

from twinpass.flows import archive_run, build_deployment, serve_deployment

__all__ = ["archive_run", "main"]


def main(argv: Sequence[str] | None = None) -> int:
    """Serve a scheduled deployment of :func:`archive_run` until interrupted."""
    p = argparse.ArgumentParser(description="Serve the twinpass archive run on a cron schedule.")
    p.add_argument("config", nargs="?", help="twinpass TOML configuration")
    p.add_argument("--block", help="name of a saved TwinpassJob block (instead of CONFIG)")
    p.add_argument("--cron", required=True, help='cron expression, e.g. "30 2 * * *"')
    p.add_argument("--timezone", default=None, help="IANA time zone of the cron expression (default UTC)")
    p.add_argument("--name", default="nightly", help="deployment name")
    args = p.parse_args(argv)
    serve_deployment(build_deployment(args.config, cron=args.cron, timezone=args.timezone, name=args.name,
                                      config_block=args.block))
    return 0


if __name__ == "__main__":
    sys.exit(main())
