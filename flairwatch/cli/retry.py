"""``flairwatch retry``: queue failed (or refused) series again, by series key or since a date.

The daemon picks the jobs up at its next dispatch; their attempts start from zero. Works while
the daemon runs (the ledger takes short write transactions).
"""

from __future__ import annotations

import argparse
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

from flairwatch.errors import ConfigInvalid

DESCRIPTION = (
    "Queue failed series again (after the cause is fixed: disk space, memory, a model file), "
    "by series key, or every series that failed since a date. Refused series (unusable input) "
    "are queued again only by key or with --refused; put their files back into the inbox first "
    "if they were moved to quarantine."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = DESCRIPTION
    p.add_argument("keys", nargs="*", metavar="SERIES_KEY", help="series keys (see 'status')")
    p.add_argument(
        "--failed-since",
        metavar="DATE",
        help="every series that failed since DATE (YYYY-MM-DD or ISO time; UTC unless given)",
    )
    p.add_argument("--refused", action="store_true", help="with --failed-since: refused series too")
    p.add_argument("--config", type=Path, help="YAML config file (its 'state' key is used)")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.set_defaults(func=run)


def parse_date(text: str) -> float:
    """Seconds since the epoch of an ISO date or time; UTC when it names no zone."""
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise ConfigInvalid(
            f"--failed-since {text!r}: use YYYY-MM-DD or YYYY-MM-DDTHH:MM"
        ) from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.timestamp()


def run(args: argparse.Namespace) -> int:
    from flairwatch.config import load_config
    from flairwatch.ledger.store import LEDGER_FILE, Ledger

    if not args.keys and args.failed_since is None:
        raise ConfigInvalid("name series keys, or give --failed-since DATE")
    since = None if args.failed_since is None else parse_date(args.failed_since)
    state = args.state or load_config(args.config).state
    if state is None:
        raise ConfigInvalid("give --state DIR or --config FILE with a 'state' key")
    if not (Path(state) / LEDGER_FILE).is_file():
        raise ConfigInvalid(f"no ledger in {state}; check 'state' or run 'watch' first")
    with Ledger.open(Path(state)) as ledger:
        queued = ledger.retry_ended(
            time.time(), series_keys=args.keys, failed_since=since, refused=args.refused
        )
    for key, old, error in queued:
        print(f"queued again: series {key} (was {old}: {error or 'no reason recorded'})")
    missing = sorted(set(args.keys) - {key for key, _old, _error in queued})
    for key in missing:
        print(f"not queued: series {key} is not failed or refused (or unknown)", file=sys.stderr)
    if not queued:
        print("nothing queued; 'flairwatch status' lists the last errors", file=sys.stderr)
        return 1
    print(f"{len(queued)} series queued; the running daemon takes them next", file=sys.stderr)
    return 1 if missing else 0
