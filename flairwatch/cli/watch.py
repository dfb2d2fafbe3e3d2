"""``flairwatch watch``: command-line half of the daemon (:mod:`flairwatch.daemon.watch`)."""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

from flairwatch.cli.common import (
    CAUTION_EPILOG,
    add_model_options,
    config_from_args,
    show_caution,
)
from flairwatch.errors import ConfigInvalid
from flairwatch.notice import CAUTION

log = logging.getLogger("flairwatch.daemon.watch")

DESCRIPTION = (
    "Watch the inbox folder, wait until each series is complete, process the FLAIR series and "
    "record everything in the ledger. First SIGTERM/Ctrl-C finishes the running series and "
    "exits; a second stops at once."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = DESCRIPTION
    p.epilog = CAUTION_EPILOG
    p.add_argument("--inbox", type=Path, help="folder where DICOM files arrive")
    p.add_argument("--results", type=Path, help="results folder")
    p.add_argument("--state", type=Path, help="ledger folder (local disk)")
    p.add_argument("--quarantine", type=Path, help="move refused series here (default: leave)")
    p.add_argument("--workers", type=int, help="worker processes (default 1)")
    p.add_argument(
        "--once", action="store_true", help="process what is in the inbox now, then exit"
    )
    add_model_options(p)
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    show_caution()
    cfg = config_from_args(args, "inbox", "results", "state", "quarantine", "workers")
    for name in ("inbox", "results", "state"):
        if getattr(cfg, name) is None:
            raise ConfigInvalid(f"watch needs --{name} DIR (or '{name}' in the config file)")
    assert cfg.inbox is not None
    if not cfg.inbox.is_dir():
        raise ConfigInvalid(f"inbox {cfg.inbox} is not a folder; create it or fix 'inbox'")
    from flairwatch.daemon.watch import serve

    log.info(CAUTION)  # the daemon's log carries the caution too, for whoever reads only the log
    return serve(cfg, once=args.once)
