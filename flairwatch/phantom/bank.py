"""Build a bank of phantom case folders on disk, resumably, optionally in worker processes.

A case folder counts as complete when its ``case.json`` exists (written last); incomplete
folders left by an interrupted run are cleared and rebuilt.
"""

from __future__ import annotations

import logging
import shutil
import sys
import time
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

from flairwatch.phantom.casefolder import CASE_JSON, write_case
from flairwatch.phantom.dicom_writer import uid_from
from flairwatch.phantom.generator import generate
from flairwatch.phantom.params import GENERATOR_VERSION, PhantomParams, sample_params

logger = logging.getLogger(__name__)

# Seeds kept out of every training bank (for held-out quality measurements). Frozen.
HELD_OUT_SEEDS: tuple[int, ...] = tuple(range(900000, 900040))
# Training seeds must stay below this.
TRAINING_SEED_LIMIT = 100000


def case_name(seed: int) -> str:
    """Folder name of the phantom with this seed."""
    return f"case-{seed:05d}"


def build_case(
    out_dir: Path, seed: int, params_fn: Callable[[int], PhantomParams] = sample_params
) -> Path:
    """Generate and write the phantom ``seed`` under ``out_dir`` unless already complete."""
    case_dir = out_dir / case_name(seed)
    if (case_dir / CASE_JSON).is_file():
        return case_dir
    if case_dir.exists():
        shutil.rmtree(case_dir)  # a folder without case.json is a leftover of an interrupted run
    case = generate(params_fn(seed))
    write_case(
        case,
        case_dir,
        patient_id=f"PHANTOM-{seed:06d}",
        patient_name=f"Phantom^{seed:06d}",
        study_uid=uid_from("flairwatch-phantom", GENERATOR_VERSION, seed, "study"),
    )
    return case_dir


def make_bank(
    out_dir: Path,
    seeds: Iterable[int],
    *,
    workers: int = 1,
    progress: bool = True,
    params_fn: Callable[[int], PhantomParams] = sample_params,
) -> list[Path]:
    """Write case folders ``case-<seed:05d>`` for ``seeds`` under ``out_dir``.

    Complete folders are kept (a bank build can be resumed); ``workers`` > 1 uses that many
    processes, each loading the template once. ``params_fn`` maps a seed to parameters (a
    module-level function when ``workers`` > 1). Returns the case folders in seed order.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    seeds = list(seeds)
    start = time.monotonic()
    done: list[Path] = []

    def report(i: int, path: Path) -> None:
        if progress:
            elapsed = time.monotonic() - start
            print(f"[{i}/{len(seeds)}] {path} ({elapsed:.0f} s)", file=sys.stderr, flush=True)

    if workers <= 1:
        for i, seed in enumerate(seeds, 1):
            path = build_case(out_dir, seed, params_fn)
            done.append(path)
            report(i, path)
        return done
    with ProcessPoolExecutor(max_workers=workers) as pool:
        for i, path in enumerate(
            pool.map(build_case, [out_dir] * len(seeds), seeds, [params_fn] * len(seeds)), 1
        ):
            done.append(path)
            report(i, path)
    return done
