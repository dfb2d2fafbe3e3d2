"""``flairwatch review``: QC review in the browser (:mod:`flairwatch.review`, the ``review`` extra).

Starts a small web application on 127.0.0.1 (or the config's ``review:`` address and port) and
prints the address to open, with a random token that is new at every start. Stop it with Ctrl-C.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
from dataclasses import replace
from pathlib import Path

from flairwatch.cli.common import config_with_ledger
from flairwatch.errors import ConfigInvalid

INSTALL_HINT = (
    "flairwatch review needs the 'review' extra (Flask): pip install 'flairwatch[review]'"
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Review results in a browser: a queue, a slice viewer with outlines, accept/reject by key. "
        "Decisions go into the ledger as 'qc mark' records them. Research use only."
    )
    p.add_argument("--config", type=Path, required=True, help="YAML config file")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.add_argument("--results", type=Path, help="results folder (overrides the config)")
    p.add_argument("--address", help="address to listen on (default: review.address, 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default: review.port; 0 = a free port)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    try:
        from flairwatch.review.app import Site, run_server
    except ImportError as exc:
        if getattr(exc, "name", "") not in ("flask", "werkzeug"):
            raise
        print(f"flairwatch: error: {INSTALL_HINT}", file=sys.stderr)
        return 2
    from flairwatch.ledger.store import Ledger
    from flairwatch.notice import CAUTION
    from flairwatch.research.gallery import GALLERY_FOLDER
    from flairwatch.review.access import check_serving, new_token

    cfg, state = config_with_ledger(args, "review", "results")
    settings = cfg.review
    if args.address is not None:
        settings = replace(settings, address=args.address)
    if args.port is not None:
        if not 0 <= args.port <= 65535:
            raise ConfigInvalid(f"--port must be 0 to 65535, got {args.port}")
        settings = replace(settings, port=args.port)
    check_serving(settings)
    with Ledger.open_readonly(state):  # refuses a missing or old ledger with what to do
        pass
    gallery = None if cfg.results is None else cfg.results / GALLERY_FOLDER
    site = Site(
        state=state, token=new_token(), settings=settings, gallery=gallery,
        connectivity=cfg.connectivity, longitudinal=cfg.longitudinal,
    )  # fmt: skip
    print(CAUTION, file=sys.stderr)

    def announce(url: str) -> None:
        print(f"review open at {url}\n(the token is new at every start; stop with Ctrl-C)")
        sys.stdout.flush()

    with contextlib.suppress(KeyboardInterrupt):  # Ctrl-C is the way to stop it
        run_server(site, announce=announce)
    return 0
