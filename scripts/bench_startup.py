"""Start-up time of the ``flairwatch`` command against a bare Python start.

Usage, from the repository root::

    .venv/bin/python scripts/bench_startup.py            # best of 9 runs each
    .venv/bin/python scripts/bench_startup.py --runs 15

Times, each the best of ``--runs`` fresh processes (the best, because other work on the machine
only ever adds time):

- ``python -c pass``: the interpreter alone;
- ``flairwatch --help``: the console script next to this Python (``python -m flairwatch.cli``
  when there is none), which must import no command module;
- ``flairwatch process --help``: one command's options, which must import no heavy library.

The target (issue 11): ``flairwatch --help`` at most ``python -c pass`` + 0.1 s. The sgemm unit
(:mod:`flairwatch.speed`) is measured in the same run and every time is also given in its units.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from flairwatch.speed import sgemm_unit

TARGET_EXTRA_S = 0.1


def best_of(command: list[str], runs: int) -> float:
    """Seconds of the fastest of ``runs`` runs of ``command`` (output discarded)."""
    best = float("inf")
    for _ in range(runs):
        start = time.perf_counter()
        subprocess.run(command, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        best = min(best, time.perf_counter() - start)
    return best


def in_units(seconds: float, unit_s: float) -> str:
    """Milliseconds matter here: three decimals (flairwatch.speed.in_units rounds to two)."""
    return f"{seconds:.3f} s = {seconds / unit_s:.4f} sgemm units"


def flairwatch_command() -> list[str]:
    """The installed console script beside this interpreter, else the module form."""
    script = Path(sys.executable).parent / "flairwatch"
    return [str(script)] if script.is_file() else [sys.executable, "-m", "flairwatch.cli"]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=9, help="runs of each command (default 9)")
    args = ap.parse_args(argv)

    fw = flairwatch_command()
    bare = best_of([sys.executable, "-c", "pass"], args.runs)
    top = best_of([*fw, "--help"], args.runs)
    process = best_of([*fw, "process", "--help"], args.runs)
    unit = sgemm_unit()
    extra = top - bare
    print(f"command: {' '.join(fw)}  (best of {args.runs} runs each)")
    print(f"sgemm unit (flairwatch.speed):   {unit:.3f} s")
    print(f"python -c pass:                  {in_units(bare, unit)}")
    print(f"flairwatch --help:               {in_units(top, unit)}")
    print(f"flairwatch process --help:       {in_units(process, unit)}")
    print(
        f"--help minus python -c pass:     {extra:.3f} s "
        f"(target <= {TARGET_EXTRA_S:.1f} s: {'met' if extra <= TARGET_EXTRA_S else 'NOT met'})"
    )
    return 0 if extra <= TARGET_EXTRA_S else 1


if __name__ == "__main__":
    sys.exit(main())
