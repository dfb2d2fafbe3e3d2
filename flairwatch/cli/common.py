"""Options and helpers that several commands share.

Only the standard library and light flairwatch modules are imported here at module level: this
module is loaded for every command's ``--help``.
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from flairwatch.errors import ConfigInvalid
from flairwatch.notice import CAUTION

if TYPE_CHECKING:
    from flairwatch.config import Config

log = logging.getLogger("flairwatch")

CAUTION_EPILOG = (
    "Research use only: not for diagnosis or treatment. Validate any model on your own scans "
    "(flairwatch validate) and follow local rules for identifiable data."
)
"""Added to the help text of every command that makes or ships results."""


def add_model_options(p: argparse.ArgumentParser) -> None:
    """Options every command that runs the model shares; they override the config file."""
    p.add_argument("--config", type=Path, help="YAML config file (see config.example.yaml)")
    p.add_argument(
        "--model",
        type=Path,
        help="model: a manifest path (.yaml next to the .onnx) or the name of an installed model "
        "(see 'flairwatch models')",
    )
    p.add_argument(
        "--threshold", type=float, help="WMH probability threshold (default: the manifest's)"
    )
    p.add_argument("--min-lesion-mm3", type=float, help="drop lesions smaller than this, in mm^3")
    p.add_argument("--connectivity", type=int, choices=(6, 18, 26), help="lesion neighbourhood")
    p.add_argument(
        "--periventricular-mm",
        type=float,
        help="lesion voxels this near the ventricles count as periventricular, in mm (default 10; "
        "models with a ventricle output only)",
    )
    p.add_argument("--threads", type=int, help="ONNX Runtime threads (default: CPUs available)")


def config_from_args(args: argparse.Namespace, *extra: str) -> Config:
    """Load ``--config`` and apply every flag of the same name that was given.

    For commands with the model options, the ``model`` setting (a name, a path or empty) is
    resolved here to its manifest path, so a wrong name fails at once with one line, and every
    worker process uses the same manifest.
    """
    from dataclasses import replace

    from flairwatch.config import load_config, with_overrides

    cfg = load_config(getattr(args, "config", None))
    names = (
        "model",
        "threshold",
        "min_lesion_mm3",
        "connectivity",
        "periventricular_mm",
        "threads",
        *extra,
    )
    cfg = with_overrides(cfg, **{n: getattr(args, n, None) for n in names})
    if hasattr(args, "model"):
        from flairwatch.engine.models import manifest_path

        cfg = replace(cfg, model=manifest_path(cfg.model))
    return cfg


def config_with_ledger(args: argparse.Namespace, command: str, *extra: str) -> tuple[Config, Path]:
    """:func:`config_from_args` for a command that reads the ledger; also its state folder.

    Raises ConfigInvalid (one line, what to do) when no ``state`` folder is configured.
    """
    cfg = config_from_args(args, "state", *extra)
    if cfg.state is None:
        raise ConfigInvalid(f"{command} needs the ledger: give --config FILE with a 'state' key")
    return cfg, cfg.state


def say(text: str) -> None:
    """One line of progress on stdout."""
    print(text, flush=True)


def warn(text: str) -> None:
    """One line of warning on stderr."""
    print(text, file=sys.stderr, flush=True)


def show_caution() -> None:
    """Print the research-only caution on stderr (and to the log) as a command starts."""
    warn(CAUTION)
