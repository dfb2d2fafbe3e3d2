"""The ``flairwatch`` console script: one entry point, one subcommand per job.

Exit codes: 0 success, 1 a series failed (or the daemon is unhealthy), 2 bad usage or config,
130 a one-shot command interrupted by Ctrl-C. Errors meant for the user are one line on stderr;
``--debug`` shows the traceback.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys
from collections.abc import Sequence
from pathlib import Path

from flairwatch import __version__
from flairwatch.config import Config, load_config, with_overrides
from flairwatch.errors import ConfigInvalid, FlairwatchError, ModelInvalid

log = logging.getLogger(__name__)

# Modules that register further subcommands through ``add_parser(subparsers)``.
_COMMAND_MODULES = (
    "flairwatch.cli.demo",
    "flairwatch.phantom.cli",
    "flairwatch.daemon.watch",
    "flairwatch.daemon.status",
    "flairwatch.research.validate",
    "flairwatch.research.export",
    "flairwatch.research.qc_marks",
    "flairwatch.research.reprocess",
)

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


def add_model_options(p: argparse.ArgumentParser) -> None:
    """Options every command that runs the model shares; they override the config file."""
    p.add_argument("--config", type=Path, help="YAML config file (see config.example.yaml)")
    p.add_argument("--model", type=Path, help="model manifest (.yaml next to the .onnx)")
    p.add_argument(
        "--threshold", type=float, help="WMH probability threshold (default: the manifest's)"
    )
    p.add_argument("--min-lesion-mm3", type=float, help="drop lesions smaller than this, in mm^3")
    p.add_argument("--connectivity", type=int, choices=(6, 18, 26), help="lesion neighbourhood")
    p.add_argument("--threads", type=int, help="ONNX Runtime threads (default: CPUs available)")


def config_from_args(args: argparse.Namespace, *extra: str) -> Config:
    """Load ``--config`` and apply every flag of the same name that was given."""
    cfg = load_config(getattr(args, "config", None))
    names = ("model", "threshold", "min_lesion_mm3", "connectivity", "threads", *extra)
    return with_overrides(cfg, **{n: getattr(args, n, None) for n in names})


def _run_process(args: argparse.Namespace) -> int:
    from flairwatch.engine.process import run_process

    cfg = config_from_args(args, "results", "state")
    if cfg.results is None:
        raise ConfigInvalid("process needs --results DIR (or 'results' in the config file)")
    return run_process(
        args.inputs,
        cfg.results,
        cfg,
        all_series=args.all_series,
        say=lambda s: print(s, flush=True),
        warn=lambda s: print(s, file=sys.stderr, flush=True),
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="flairwatch",
        description=(
            "White-matter hyperintensity masks and volumes from FLAIR MRI. "
            "Research use only: not for diagnosis or treatment."
        ),
    )
    parser.add_argument("--version", action="version", version=f"flairwatch {__version__}")
    parser.add_argument("--debug", action="store_true", help="debug logs and tracebacks")
    parser.add_argument("--quiet", action="store_true", help="warnings and errors only")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "process",
        help="segment the FLAIR series in folders or files once (no ledger)",
        description="Segment every FLAIR series found in INPUT folders/files and write result folders.",
    )
    p.add_argument(
        "inputs", nargs="+", type=Path, metavar="INPUT", help="folder or file (DICOM, NIfTI)"
    )
    p.add_argument("--results", type=Path, help="results folder")
    p.add_argument("--state", type=Path, help="folder for the installation secret")
    p.add_argument(
        "--all-series", action="store_true", help="process every usable series, FLAIR or not"
    )
    add_model_options(p)
    p.set_defaults(func=_run_process)

    for name in _COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name != name:
                raise
            continue
        module.add_parser(sub)
    return parser


def _configure_logging(debug: bool, quiet: bool) -> None:
    level = logging.DEBUG if debug else logging.WARNING if quiet else logging.INFO
    logging.basicConfig(
        level=level, stream=sys.stderr, format="%(levelname)s %(name)s: %(message)s"
    )


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _configure_logging(args.debug, args.quiet)
    try:
        return int(args.func(args))
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (ConfigInvalid, ModelInvalid) as exc:
        if args.debug:
            raise
        print(f"flairwatch: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except FlairwatchError as exc:
        if args.debug:
            raise
        print(f"flairwatch: error: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except OSError as exc:
        if args.debug:
            raise
        print(f"flairwatch: error: {exc}", file=sys.stderr)
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
