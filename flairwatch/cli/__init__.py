"""The ``flairwatch`` console script: one entry point, one subcommand per job.

Exit codes: 0 success, 1 a series failed (or the daemon is unhealthy), 2 bad usage or config,
130 a one-shot command interrupted by Ctrl-C. Errors meant for the user are one line on stderr;
``--debug`` shows the traceback.

Start-up is kept short: the table :data:`COMMANDS` names each command, its one-line help and the
module that holds its options and run function. ``main`` finds the command in ``argv`` first and
imports only that command's module, so ``flairwatch --help`` imports no command module at all, and
a command's own module imports heavy libraries (numpy, SimpleITK, ONNX Runtime...) only inside the
function that runs it.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from flairwatch import __version__
from flairwatch.errors import ConfigInvalid, FlairwatchError, ModelInvalid

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


@dataclass(frozen=True)
class Command:
    """One subcommand: its name, one-line help and where its options are added.

    ``target`` is ``"module"`` or ``"module:function"``; the function (default ``add_arguments``)
    takes the subcommand's ``argparse`` parser, adds its options and sets ``func``, the function
    that runs the command and returns the exit code.
    """

    name: str
    help: str
    target: str


COMMANDS: tuple[Command, ...] = (
    Command(
        "process",
        "segment the FLAIR series in folders or files once (no ledger)",
        "flairwatch.cli.process",
    ),
    Command(
        "watch",
        "watch an inbox and process every FLAIR series that arrives (keeps the ledger)",
        "flairwatch.cli.watch",
    ),
    Command(
        "status",
        "daemon health, job counts, last errors, throughput (exit 1 when unhealthy)",
        "flairwatch.cli.status:add_status_arguments",
    ),
    Command(
        "backup",
        "copy the ledger safely while the daemon runs (SQLite backup API)",
        "flairwatch.cli.status:add_backup_arguments",
    ),
    Command(
        "retry",
        "queue failed (or refused) series again, by series key or since a date",
        "flairwatch.cli.retry",
    ),
    Command(
        "reprocess",
        "re-run done series with another model version and report what changed",
        "flairwatch.cli.reprocess",
    ),
    Command(
        "validate",
        "score a model against reference masks in case folders",
        "flairwatch.cli.validate",
    ),
    Command(
        "export",
        "one table of every series' result (CSV or JSON) for statistics",
        "flairwatch.cli.export",
    ),
    Command(
        "canary",
        "run the self-check once: the shipped phantom through the pipeline, compared (exit 1 on drift)",
        "flairwatch.cli.canary",
    ),
    Command(
        "qc",
        "review results: mark accepted/rejected, attach corrected masks, build the gallery",
        "flairwatch.cli.qc",
    ),
    Command(
        "review",
        "review results in a browser: queue, slice viewer, accept/reject by key (review extra)",
        "flairwatch.cli.review",
    ),
    Command(
        "models",
        "list the models flairwatch can find: name, version, file hash, where, intended use",
        "flairwatch.cli.models",
    ),
    Command(
        "demo",
        "make a demo inbox of invented participants and run the main job on it",
        "flairwatch.cli.demo",
    ),
    Command(
        "receive",
        "receive scans over DICOM into the inbox and send results to DICOM nodes (network unit)",
        "flairwatch.cli.receive",
    ),
    Command(
        "phantoms",
        "write synthetic FLAIR phantoms with known WMH masks (research and testing only)",
        "flairwatch.cli.phantoms",
    ),
)

_BY_NAME = {c.name: c for c in COMMANDS}

# global options that take no value: skipped while looking for the command's name
_GLOBAL_FLAGS = frozenset({"--debug", "--quiet", "--version", "-h", "--help"})


def _requested(argv: Sequence[str]) -> str | None:
    """The command named in ``argv`` (the first word that is not a global option), if known."""
    for word in argv:
        if word in _GLOBAL_FLAGS:
            continue
        return word if word in _BY_NAME else None
    return None


def _adder(command: Command) -> Callable[[argparse.ArgumentParser], None]:
    module_name, _, function = command.target.partition(":")
    module = importlib.import_module(module_name)
    adder: Callable[[argparse.ArgumentParser], None] = getattr(module, function or "add_arguments")
    return adder


def build_parser(load: Sequence[str] = ()) -> argparse.ArgumentParser:
    """The argument parser; only the commands named in ``load`` get their options (and modules).

    ``build_parser(load=[c.name for c in COMMANDS])`` builds the whole parser (documentation,
    tests); ``main`` loads only the command it runs.
    """
    parser = argparse.ArgumentParser(
        prog="flairwatch",
        description=(
            "White-matter hyperintensity masks and volumes from FLAIR MRI. "
            "Research use only: not for diagnosis or treatment."
        ),
        epilog="'flairwatch COMMAND --help' shows a command's options.",
    )
    parser.add_argument("--version", action="version", version=f"flairwatch {__version__}")
    parser.add_argument("--debug", action="store_true", help="debug logs and tracebacks")
    parser.add_argument("--quiet", action="store_true", help="warnings and errors only")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for command in COMMANDS:
        p = sub.add_parser(command.name, help=command.help, description=command.help)
        if command.name in load:
            _adder(command)(p)
    return parser


def _configure_logging(debug: bool, quiet: bool) -> None:
    level = logging.DEBUG if debug else logging.WARNING if quiet else logging.INFO
    logging.basicConfig(
        level=level, stream=sys.stderr, format="%(levelname)s %(name)s: %(message)s"
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command named in ``argv`` (default ``sys.argv[1:]``); returns the exit code."""
    words = list(sys.argv[1:] if argv is None else argv)
    requested = _requested(words)
    parser = build_parser(load=() if requested is None else (requested,))
    args = parser.parse_args(words)
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
    except (FlairwatchError, OSError) as exc:
        if args.debug:
            raise
        print(f"flairwatch: error: {exc}", file=sys.stderr)
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
