"""The ``phantoms`` subcommand: write a bank of synthetic FLAIR case folders."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from flairwatch.phantom.bank import make_bank


def add_parser(subparsers: Any) -> None:
    """Register ``phantoms`` on an ``argparse`` subparsers object."""
    p = subparsers.add_parser(
        "phantoms",
        help="write synthetic FLAIR phantoms with known WMH masks (research and testing only)",
        description=(
            "Write synthetic FLAIR case folders (DICOM series, WMH reference mask, intracranial "
            "mask, case.json). Phantoms are for research and software testing only."
        ),
    )
    p.add_argument("--out", type=Path, required=True, help="folder that receives the case folders")
    p.add_argument("--count", type=int, default=10, help="number of phantoms (default 10)")
    p.add_argument(
        "--first-seed", type=int, default=1, help="seed of the first phantom (default 1)"
    )
    p.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Build the phantoms and print one case folder per line; returns the exit code."""
    if args.count < 0 or args.workers < 1:
        print("--count must be >= 0 and --workers >= 1")
        return 2
    seeds = range(args.first_seed, args.first_seed + args.count)
    for path in make_bank(args.out, seeds, workers=args.workers, progress=True):
        print(path)
    return 0
