"""``flairwatch canary``: run the self-check once and print the comparison.

See :mod:`flairwatch.research.canary`. Exit 0 when it passed (or recorded a first baseline),
1 when the numbers drifted or the run failed.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from flairwatch.cli.common import CAUTION_EPILOG, config_with_ledger, say, show_caution


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Run the shipped phantom series through the full pipeline with the configured model and "
        "compare the mask and WMH volume with the expected result of that model file (Dice and "
        "volume limits from 'canary:' in the config). A model without a shipped expectation gets "
        "a baseline in the state folder on its first run. Recorded in the ledger; never in results."
    )
    p.epilog = CAUTION_EPILOG
    p.add_argument("--config", type=Path, required=True, help="YAML config file")
    p.add_argument("--state", type=Path, help="ledger folder (overrides the config)")
    p.add_argument("--model", type=Path, help="model name or manifest path (overrides the config)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    show_caution()
    from flairwatch.ledger.store import Ledger
    from flairwatch.research.canary import run_canary

    cfg, state = config_with_ledger(args, "canary")
    with Ledger.open(state) as ledger:
        started = time.monotonic()
        verdict, measured = run_canary(cfg, ledger, reason="command")
    if measured is not None:
        say(f"model:    {measured.model_name} {measured.model_version} "
            f"(sha256 {measured.model_sha256[:12]})")  # fmt: skip
    if verdict.dice is not None:
        say(f"Dice:     {verdict.dice:.4f} (at least {cfg.canary.min_dice})")
    if verdict.volume_ml is not None:
        expected = "" if verdict.expected_volume_ml is None else (
            f" (expected {verdict.expected_volume_ml:.3f} mL, within "
            f"{cfg.canary.max_volume_change_percent} %)"
        )  # fmt: skip
        say(f"volume:   {verdict.volume_ml:.3f} mL{expected}")
    say(f"outcome:  {verdict.outcome.upper()}: {verdict.detail}")
    say(f"time:     {time.monotonic() - started:.1f} s")
    return 0 if verdict.ok else 1
