"""``flairwatch process``: segment the FLAIR series in folders or files once (no ledger)."""

from __future__ import annotations

import argparse
from pathlib import Path

from flairwatch.cli.common import (
    CAUTION_EPILOG,
    add_model_options,
    config_from_args,
    say,
    show_caution,
    warn,
)
from flairwatch.errors import ConfigInvalid


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Segment every FLAIR series found in INPUT folders/files and write result folders."
    )
    p.epilog = CAUTION_EPILOG
    p.add_argument(
        "inputs", nargs="+", type=Path, metavar="INPUT", help="folder or file (DICOM, NIfTI)"
    )
    p.add_argument("--results", type=Path, help="results folder")
    p.add_argument("--state", type=Path, help="folder for the installation secret")
    p.add_argument(
        "--all-series", action="store_true", help="process every usable series, FLAIR or not"
    )
    add_model_options(p)
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    show_caution()
    cfg = config_from_args(args, "results", "state")
    if cfg.results is None:
        raise ConfigInvalid("process needs --results DIR (or 'results' in the config file)")
    from flairwatch.engine.process import run_process

    return run_process(
        args.inputs, cfg.results, cfg, all_series=args.all_series, say=say, warn=warn
    )
