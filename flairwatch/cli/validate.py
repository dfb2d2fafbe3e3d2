"""``flairwatch validate``: score a model against reference masks (:mod:`flairwatch.research.validate`)."""

from __future__ import annotations

import argparse
from pathlib import Path

from flairwatch.cli.common import (
    CAUTION_EPILOG,
    add_model_options,
    config_from_args,
    say,
    warn,
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Run the model on every case folder under --cases and compare with its reference "
        "mask (Dice, HD95, volume difference, lesion recall and F1, by lesion load)."
    )
    p.epilog = CAUTION_EPILOG
    p.add_argument("--cases", type=Path, required=True, help="folder of case folders")
    p.add_argument(
        "--out",
        type=Path,
        help="output folder (default: validation-<model> beside the cases folder)",
    )
    add_model_options(p)
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from flairwatch.engine.pipeline import Engine
    from flairwatch.research.validate import run_validate

    cfg = config_from_args(args)
    return run_validate(args.cases, args.out, Engine(cfg), say=say, warn=warn)
