"""``flairwatch phantoms``: write a bank of synthetic FLAIR case folders (:mod:`flairwatch.phantom`)."""

from __future__ import annotations

import argparse
from pathlib import Path

from flairwatch.errors import ConfigInvalid


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Write synthetic FLAIR case folders (DICOM series, WMH reference mask, intracranial "
        "mask, case.json). Phantoms are for research and software testing only."
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
    if args.count < 0:
        raise ConfigInvalid(f"--count {args.count}: give 0 or more phantoms")
    if args.workers < 1:
        raise ConfigInvalid(f"--workers {args.workers}: give 1 or more worker processes")
    from flairwatch.phantom.bank import make_bank

    seeds = range(args.first_seed, args.first_seed + args.count)
    for path in make_bank(args.out, seeds, workers=args.workers, progress=True):
        print(path)
    return 0
