"""``flairwatch qc``: review results recorded in the ledger (:mod:`flairwatch.research.qc_marks`)."""

from __future__ import annotations

import argparse
import getpass
import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

from flairwatch.cli.common import config_with_ledger
from flairwatch.errors import ConfigInvalid
from flairwatch.ledger.queries import QC_MARKS

if TYPE_CHECKING:
    from flairwatch.config import Config


def reviewer_name() -> str:
    """Login name of whoever runs the command (for marks)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return os.environ.get("USER", "unknown")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", type=Path, required=True, help="YAML config file")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.add_argument("--results", type=Path, help="results folder (overrides the config)")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = "Quality review of results recorded in the ledger."
    sub = p.add_subparsers(dest="qc_command", metavar="ACTION")
    sub.required = True

    m = sub.add_parser("mark", help="mark a series' result accepted or rejected")
    _common(m)
    m.add_argument("series_key", metavar="SERIES-KEY", help="series key (folder name)")
    m.add_argument("mark", choices=QC_MARKS)
    m.add_argument("--note", help="free text kept with the mark")
    m.add_argument("--by", default=reviewer_name(), help="reviewer (default: login name)")
    m.add_argument("--model-version", help="mark this model version's result, not the current")
    m.set_defaults(func=run_mark)

    c = sub.add_parser("correct", help="attach a corrected mask (NIfTI on the series grid)")
    _common(c)
    c.add_argument("series_key", metavar="SERIES-KEY", help="series key (folder name)")
    c.add_argument("--mask", type=Path, required=True, help="corrected mask, .nii or .nii.gz")
    c.add_argument("--note", help="free text kept with the correction")
    c.add_argument("--model-version", help="attach to this model version's result")
    c.set_defaults(func=run_correct)

    g = sub.add_parser("gallery", help="write the static QC pages (no server needed)")
    _common(g)
    g.add_argument("--out", type=Path, help="output folder (default: <results>/gallery)")
    g.set_defaults(func=run_gallery)

    k = sub.add_parser(
        "cases", help="corrected masks as case folders (image + reference) for validate/training"
    )
    _common(k)
    k.add_argument("--out", type=Path, required=True, help="folder for the case folders")
    k.set_defaults(func=run_cases)


def _state(args: argparse.Namespace) -> tuple[Config, Path]:
    return config_with_ledger(args, "qc", "results")


def run_mark(args: argparse.Namespace) -> int:
    from flairwatch.ledger.store import Ledger
    from flairwatch.research.qc_marks import mark_result

    _, state = _state(args)
    with Ledger.open(state) as ledger:
        rec = mark_result(
            ledger, args.series_key, args.mark, args.note or "", by=args.by,
            now=time.time(), model_version=args.model_version,
        )  # fmt: skip
    print(f"{rec.series_key}: {args.mark} ({rec.model_name} {rec.model_version})")
    return 0


def run_correct(args: argparse.Namespace) -> int:
    from flairwatch.ledger.store import Ledger
    from flairwatch.research.qc_marks import attach_correction

    cfg, state = _state(args)
    with Ledger.open(state) as ledger:
        target, m = attach_correction(
            ledger, args.series_key, args.mask, args.note or "", now=time.time(),
            connectivity=cfg.connectivity, model_version=args.model_version,
        )  # fmt: skip
    print(
        f"{args.series_key}: corrected mask stored as {target} "
        f"({m.lesion_volume_ml:.2f} mL, {m.lesion_count} lesions); it is now the reported result"
    )
    return 0


def run_gallery(args: argparse.Namespace) -> int:
    from flairwatch.ledger.store import Ledger
    from flairwatch.research.gallery import GALLERY_FOLDER, write_gallery

    cfg, state = _state(args)
    if cfg.results is None:
        raise ConfigInvalid("qc gallery needs 'results' in the config file (or --results DIR)")
    out = args.out or cfg.results / GALLERY_FOLDER
    with Ledger.open_readonly(state) as ledger:
        pages = write_gallery(ledger, out, connectivity=cfg.connectivity,
                              longitudinal=cfg.longitudinal, now=time.time())  # fmt: skip
    print(f"gallery written to {out / 'index.html'} ({len(pages)} pages)")
    return 0


def run_cases(args: argparse.Namespace) -> int:
    from flairwatch.ledger.store import Ledger
    from flairwatch.research.qc_cases import export_cases

    _, state = _state(args)
    with Ledger.open_readonly(state) as ledger:
        written, problems = export_cases(ledger, args.out)
    print(f"{len(written)} case folder(s) written to {args.out}; {len(problems)} problem(s)")
    for line in problems:
        print(f"  {line}", file=sys.stderr)
    return 1 if problems else 0
