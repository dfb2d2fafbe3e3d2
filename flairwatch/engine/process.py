"""``flairwatch process``: the stages called once over the inputs given; no ledger.

Folders are searched recursively for DICOM files (any names, any order, several series mixed,
other files among them). NIfTI images are processed when named as inputs; NIfTI files found
inside folders are left alone, since case folders keep reference masks there too.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import partial
from pathlib import Path

from flairwatch import keys
from flairwatch.config import Config
from flairwatch.engine.pipeline import Engine, Outcome, source_of_series
from flairwatch.errors import ConfigInvalid, InputRejected, StageFailed
from flairwatch.intake.assemble import group_series
from flairwatch.intake.discover import is_nifti_path, iter_candidate_files, read_record
from flairwatch.intake.select import select_series
from flairwatch.records import Series

log = logging.getLogger(__name__)

SECRET_FOLDER = ".flairwatch"


@dataclass(frozen=True)
class Plan:
    """What ``process`` found: series to run, series skipped (with the reason), NIfTI files."""

    selected: tuple[Series, ...]
    skipped: tuple[tuple[Series, str], ...]
    nifti: tuple[Path, ...]
    unusable: int
    nifti_in_folders: int


def _check_paths(inputs: Sequence[Path], results_root: Path) -> None:
    res = results_root.resolve()
    for p in inputs:
        if not p.exists():
            raise ConfigInvalid(f"input {p} does not exist; check the path")
        rp = p.resolve()
        if rp == res or rp in res.parents:
            raise ConfigInvalid(
                f"--results {results_root} lies inside input {p}; choose a results folder elsewhere"
            )


def plan_inputs(inputs: Sequence[Path], cfg: Config, *, all_series: bool) -> Plan:
    """Find, group and select the series under ``inputs`` (header reads only)."""
    nifti = [p for p in inputs if p.is_file() and is_nifti_path(p)]
    dicom_roots = [p for p in inputs if p not in nifti]
    records = []
    in_folders = 0
    for path in iter_candidate_files(dicom_roots):
        if is_nifti_path(path):
            in_folders += 1
            continue
        records.append(read_record(path))
    series, unusable = group_series(records)
    selected: list[Series] = []
    skipped: list[tuple[Series, str]] = []
    for s in series:
        if all_series:
            selected.append(s)
            continue
        decision = select_series(s.header, cfg.select)
        if decision.selected:
            selected.append(s)
        else:
            skipped.append((s, f"rule {decision.rule}: {decision.reason}"))
    return Plan(tuple(selected), tuple(skipped), tuple(nifti), len(unusable), in_folders)


def run_process(
    inputs: Sequence[Path],
    results_root: Path,
    cfg: Config,
    *,
    all_series: bool = False,
    say: Callable[[str], None] = print,
    warn: Callable[[str], None] = print,
) -> int:
    """Process every selected series; return 0 if all succeeded, 1 otherwise."""
    _check_paths(inputs, results_root)
    plan = plan_inputs(inputs, cfg, all_series=all_series)
    for s, why in plan.skipped:
        say(f"skipped  {source_of_series(s).label}: {why}")
    if plan.unusable:
        say(f"ignored  {plan.unusable} file(s) that are not usable DICOM images")
    if plan.nifti_in_folders:
        say(
            f"ignored  {plan.nifti_in_folders} NIfTI file(s) inside folders; "
            "name a NIfTI image as an input to process it"
        )
    total = len(plan.selected) + len(plan.nifti)
    if total == 0:
        warn("no FLAIR series found; use --all-series to process every usable series")
        return 1
    engine = Engine(cfg)
    results_root.mkdir(parents=True, exist_ok=True)
    secret = keys.load_or_create_secret(cfg.state or results_root / SECRET_FOLDER)
    failures = 0
    jobs: list[tuple[str, Callable[[], Outcome]]] = [
        (source_of_series(s).label, partial(engine.process, s, results_root, secret=secret))
        for s in plan.selected
    ]
    jobs += [
        (f"file {p.name}", partial(engine.process_nifti, p, results_root, secret=secret))
        for p in plan.nifti
    ]
    for n, (label, job) in enumerate(jobs, start=1):
        say(f"[{n}/{total}] {label}: processing")
        try:
            outcome = job()
        except (InputRejected, StageFailed) as exc:
            failures += 1
            warn(f"failed   {label}: {exc}")
            continue
        summary = outcome.summary
        state = "found" if outcome.adopted else "done"
        say(
            f"{state:<8} {outcome.result_dir}  "
            f"WMH {summary['lesion_volume_ml']:.2f} mL, {summary['lesion_count']} lesions"
        )
    return 1 if failures else 0
