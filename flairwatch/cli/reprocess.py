"""``flairwatch reprocess``: re-run the archive with another model version, then report changes.

How the queue works is told in :mod:`flairwatch.research.reprocess`; the batch run, report and
pruning are :mod:`flairwatch.research.rerun`.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from flairwatch.cli.common import (
    CAUTION_EPILOG,
    add_model_options,
    config_from_args,
    show_caution,
)
from flairwatch.errors import ConfigInvalid

EXIT_OK = 0

# shown in --help without importing the change report (numpy); tests check they equal Limits()
FLAG_DEFAULTS = {"volume_ml": 1.0, "percent": 30.0, "dice": 0.6}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Queue every done series whose current result comes from another model, run the "
        "re-runs below new arrivals' priority, then write a change report."
    )
    p.epilog = CAUTION_EPILOG
    add_model_options(p)
    p.add_argument("--results", type=Path, help="results folder (overrides the config)")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.add_argument("--since", help="only series that arrived on or after this date (YYYY-MM-DD)")
    p.add_argument(
        "--only-outdated", action="store_true", help="only results of an older model version"
    )
    p.add_argument(
        "--queue-only", action="store_true", help="queue the jobs and leave them to the daemon"
    )
    p.add_argument("--report-only", action="store_true", help="only write the change report")
    p.add_argument(
        "--cluster",
        metavar="ADDRESS",
        help="run on a Dask scheduler at ADDRESS, or local:N for N local worker processes",
    )
    p.add_argument("--flag-volume-ml", type=float, default=FLAG_DEFAULTS["volume_ml"],
                   help="flag a volume change above this, mL (default %(default)s)")  # fmt: skip
    p.add_argument("--flag-percent", type=float, default=FLAG_DEFAULTS["percent"],
                   help="flag a relative change above this, %% (default %(default)s)")  # fmt: skip
    p.add_argument("--flag-dice", type=float, default=FLAG_DEFAULTS["dice"],
                   help="flag a Dice between old and new below this (default %(default)s)")  # fmt: skip
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    show_caution()
    from flairwatch.engine.manifest import load_manifest
    from flairwatch.engine.models import manifest_path
    from flairwatch.ledger.store import Ledger
    from flairwatch.research import rerun
    from flairwatch.research.change_report import Limits
    from flairwatch.research.reprocess import (
        parse_since,
        queue_reruns,
        requeue_orphans,
    )

    cfg = config_from_args(args, "results", "state")
    if cfg.state is None or cfg.results is None:
        raise ConfigInvalid("reprocess needs 'state' and 'results' in the config file")
    manifest = load_manifest(manifest_path(cfg.model))
    name, version = manifest.name, manifest.version
    limits = Limits(volume_ml=args.flag_volume_ml, percent=args.flag_percent, dice=args.flag_dice)
    since = parse_since(args.since) if args.since else None
    with Ledger.open(cfg.state) as ledger:
        if args.report_only:
            ids = [int(r[0]) for r in ledger.query(
                "SELECT DISTINCT series_id FROM results WHERE model_name = ? AND model_version = ?",
                (name, version))]  # fmt: skip
            return rerun.report(ledger, cfg, ids, name, version, limits)
        now = time.time()
        back = requeue_orphans(ledger, name, version, now)
        added, pending = queue_reruns(
            ledger, name, version, now=now, since=since, only_outdated=args.only_outdated
        )
        print(f"queued {added} series for {name} {version} ({pending + back} already waiting)",
              file=sys.stderr)  # fmt: skip
        if args.queue_only:
            return EXIT_OK
        if args.cluster:
            return rerun.run_cluster(ledger, cfg, args.cluster, name, version, limits)
        return rerun.run_all(ledger, cfg, manifest, name, version, limits)
