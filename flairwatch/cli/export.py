"""``flairwatch export``: one table of every series' result (see :mod:`flairwatch.research.export`)."""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from flairwatch.cli.common import CAUTION_EPILOG, config_with_ledger, show_caution

log = logging.getLogger("flairwatch.research.export")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Write one row per series: identifiers as configured, acquisition facts, model, "
        "lesion volume and count (from a corrected mask when there is one), QC status, "
        "primary-FLAIR flag."
    )
    p.epilog = CAUTION_EPILOG
    p.add_argument("--config", type=Path, required=True, help="YAML config file")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.add_argument("--format", choices=("csv", "json"), default="csv", help="default: csv")
    p.add_argument("--model-version", help="export this model version's results, not the current")
    p.add_argument("--out", type=Path, help="output file, written atomically (default: stdout)")
    p.add_argument(
        "--longitudinal",
        action="store_true",
        help="one row per participant and study in date order (primary FLAIR): volume, change "
        "since the previous scan, mL per year, flags (drop, rejected, model changed)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    show_caution()
    from flairwatch import keys
    from flairwatch.engine import results
    from flairwatch.ledger.store import Ledger
    from flairwatch.notice import BANNER, NOTICE_TEXT
    from flairwatch.research.export import EXPORT_COLUMNS, gather_rows
    from flairwatch.research.tables import csv_bytes, json_bytes

    cfg, state = config_with_ledger(args, "export")
    with Ledger.open_readonly(state) as ledger:
        rows = gather_rows(
            ledger,
            ids=cfg.identifiers,
            secret=lambda: keys.load_or_create_secret(state),
            connectivity=cfg.connectivity,
            model_version=args.model_version,
        )
    if args.longitudinal:
        from flairwatch.research import longitudinal

        rows = longitudinal.longitudinal_rows(rows, cfg.longitudinal)
        columns = longitudinal.LONGITUDINAL_COLUMNS
    else:
        columns = EXPORT_COLUMNS
    data = (json_bytes if args.format == "json" else csv_bytes)(rows, columns)
    if args.out is None:
        print(data.decode("utf-8"), end="")
    else:
        results.write_atomic(args.out, data)
        # the table stays tidy (one header row); its caution travels beside it
        notice = args.out.with_name(args.out.name + ".RESEARCH_ONLY.txt")
        results.write_atomic(notice, NOTICE_TEXT.encode("utf-8"))
        log.info("%d %s written to %s", len(rows),
                 "scans" if args.longitudinal else "series", args.out)  # fmt: skip
    print(BANNER, file=sys.stderr)
    if not rows:
        log.warning("no results to export%s",
                    f" for model version {args.model_version}" if args.model_version else "")  # fmt: skip
    return 0
