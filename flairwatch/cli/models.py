"""``flairwatch models``: list the models flairwatch can find (:mod:`flairwatch.engine.models`)."""

from __future__ import annotations

import argparse
import json
from dataclasses import asdict


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "List the models found in the search path: each folder of $FLAIRWATCH_MODELS, then the "
        "models shipped with flairwatch. The 'model' setting (or --model) takes a manifest path "
        "or one of these names."
    )
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from flairwatch.engine.models import find_models, render

    found = find_models()
    if args.json:
        rows = [asdict(m) | {"manifest": str(m.manifest)} for m in found]
        print(json.dumps(rows, indent=2))
    else:
        print(render(found))
    return 0 if found else 1
