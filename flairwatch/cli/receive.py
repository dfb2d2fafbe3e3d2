"""``flairwatch receive``: the network process (:mod:`flairwatch.network.service`).

Receives scans over DICOM into the inbox (``receive:`` in the config) and sends results to the
DICOM nodes of ``send:``; one process, one service unit, so the daemon needs no network.
"""

from __future__ import annotations

import argparse
import logging
import signal
import threading
from pathlib import Path
from types import FrameType

from flairwatch.cli.common import CAUTION_EPILOG

DESCRIPTION = (
    "Receive DICOM scans over the network into the inbox (Store SCP, 'receive:' in the config) "
    "and send results to the DICOM nodes listed under 'send:'. Runs until SIGTERM or Ctrl-C."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = DESCRIPTION
    p.epilog = CAUTION_EPILOG
    p.add_argument("--config", type=Path, required=True, help="YAML config file")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from flairwatch.config import load_config
    from flairwatch.errors import ConfigInvalid

    try:
        from flairwatch.network.service import check, serve
    except ImportError as exc:
        raise ConfigInvalid(
            f"'receive' needs the network extra ({exc.name} is missing): "
            "pip install 'flairwatch[network]'"
        ) from None
    cfg = load_config(args.config)
    check(cfg)
    if not args.debug:  # pynetdicom logs every PDU at INFO; ours is one line per association
        logging.getLogger("pynetdicom").setLevel(logging.WARNING)
    stop = threading.Event()

    def on_signal(_signum: int, _frame: FrameType | None) -> None:
        stop.set()

    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, on_signal)
    return serve(cfg, stop)
