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
    p.add_argument(
        "--label-map",
        metavar="MAP",
        help="read references of another layout: ROLE=LABELS items, e.g. 'wmh=1,exclude=2' for "
        "the older multi-label convention; roles wmh, exclude, ventricles; labels joined by +; "
        "'file=NAME' names the labelled file (default: wmh_reference.nii.gz holding 0/1, with "
        "optional exclude_mask.nii.gz and ventricles_reference.nii.gz)",
    )
    add_model_options(p)
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from flairwatch.engine.pipeline import Engine
    from flairwatch.research.cases import OWN_LAYOUT, parse_label_map
    from flairwatch.research.validate import run_validate

    label_map = parse_label_map(args.label_map) if args.label_map else OWN_LAYOUT
    cfg = config_from_args(args)
    engine = Engine(cfg)
    return run_validate(args.cases, args.out, engine, say=say, warn=warn, label_map=label_map)
