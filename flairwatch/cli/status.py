"""``flairwatch status`` and ``flairwatch backup``: command-line half of
:mod:`flairwatch.daemon.status`."""

from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import asdict
from pathlib import Path

from flairwatch.daemon.status import (
    DEFAULT_FAILURE_RUN,
    DEFAULT_STALE_SECONDS,
    DEFAULT_STUCK_SECONDS,
    gather,
    render,
)
from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.store import Ledger


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", type=Path, help="YAML config file (its 'state' key is used)")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")


def add_status_arguments(p: argparse.ArgumentParser) -> None:
    p.description = "Summarise the ledger; exit 0 when the daemon is healthy, 1 when not."
    _common(p)
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.add_argument(
        "--stale-after",
        type=float,
        default=DEFAULT_STALE_SECONDS,
        help="seconds without a heartbeat before the daemon counts as down (default %(default)s)",
    )
    p.add_argument(
        "--stuck-after",
        type=float,
        default=DEFAULT_STUCK_SECONDS,
        help="seconds a ready job may wait with no progress (default %(default)s)",
    )
    p.add_argument(
        "--failure-run",
        type=int,
        default=DEFAULT_FAILURE_RUN,
        help="this many failures in a row is unhealthy (default %(default)s)",
    )
    p.set_defaults(func=run_status)


def add_backup_arguments(p: argparse.ArgumentParser) -> None:
    p.description = "Copy the ledger to FILE (or a dated file in a folder), atomically."
    _common(p)
    p.add_argument("--to", required=True, type=Path, help="target file or folder")
    p.set_defaults(func=run_backup)


def _state_dir(args: argparse.Namespace) -> Path:
    from flairwatch.config import load_config

    state = args.state or load_config(args.config).state
    if state is None:
        raise ConfigInvalid("give --state DIR or --config FILE with a 'state' key")
    return Path(state)


def run_status(args: argparse.Namespace) -> int:
    from flairwatch.config import load_config

    cfg = load_config(args.config)  # overdue_seconds, overdue_factor
    with Ledger.open_readonly(_state_dir(args)) as ledger:
        report = gather(
            ledger,
            time.time(),
            stale_s=args.stale_after,
            stuck_s=args.stuck_after,
            failure_run=args.failure_run,
            overdue_s=cfg.overdue_seconds,
            overdue_factor=cfg.overdue_factor,
        )
        outbox = ledger.outbox_counts()  # results sent to DICOM nodes (flairwatch receive)
    if args.json:
        extra = {"healthy": report.healthy, "outbox": [asdict(c) for c in outbox]}
        print(json.dumps(asdict(report) | extra, indent=2, default=str))
    else:
        from flairwatch.network.plan import outbox_lines

        print(render(report, outbox_lines(outbox)))
    return 0 if report.healthy else 1


def run_backup(args: argparse.Namespace) -> int:
    target = Path(args.to)
    if target.is_dir():
        target = target / time.strftime("ledger-%Y%m%d-%H%M%S.sqlite3")
    with Ledger.open_readonly(_state_dir(args)) as ledger:  # never creates an empty ledger
        ledger.backup_to(target)
    print(f"ledger copied to {target}", file=sys.stderr)
    return 0
