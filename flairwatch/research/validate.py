"""``flairwatch validate``: run a model on case folders and score it against their references.

Case folders and label maps: :mod:`flairwatch.research.cases`; the scores:
:mod:`flairwatch.research.scoring`; the output folder: :mod:`flairwatch.research.validate_report`.
This module joins them: read each case once, run the segmenters, score, write the report.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from functools import partial
from pathlib import Path

from flairwatch.engine.pipeline import Engine
from flairwatch.errors import ConfigInvalid, FlairwatchError
from flairwatch.research.cases import OWN_LAYOUT, CaseInput, LabelMap, find_case_folders, read_case
from flairwatch.research.scoring import (
    CaseFailure,
    CaseResult,
    Segment,
    Segmentation,
    score_segmentation,
)
from flairwatch.research.validate_report import (
    REPORT_MD,
    check_output_folder,
    publish_folder,
    validation_document,
    write_report_files,
)
from flairwatch.volume import Volume


def model_segment(engine: Engine) -> Segment:
    """A :data:`Segment` that runs the engine's model and post-processing (``analyse``).

    The ventricle mask comes along when the model gives one, so ventricle Dice is scored too.
    """

    def run(volume: Volume) -> Segmentation:
        start = time.perf_counter()
        a = engine.analyse(volume)
        return Segmentation(
            a.lesions.mask,
            a.intracranial,
            time.perf_counter() - start,
            a.warnings,
            ventricles=a.ventricles,
        )

    return run


def score_folders(
    case_dirs: Sequence[Path],
    segmenters: Mapping[str, Segment],
    *,
    connectivity: int = 26,
    say: Callable[[str], None] = print,
    warn: Callable[[str], None] = print,
    read: Callable[[Path], CaseInput] = read_case,
) -> tuple[dict[str, list[CaseResult]], list[CaseFailure]]:
    """Read each case once, run every named segmenter on it and score the results.

    A case that cannot be read or segmented becomes a :class:`CaseFailure` (one-line message)
    and the others carry on. Returns results per segmenter name, in case order, and failures.
    """
    results: dict[str, list[CaseResult]] = {name: [] for name in segmenters}
    failures: list[CaseFailure] = []
    total = len(case_dirs)
    for n, case_dir in enumerate(case_dirs, start=1):
        name = case_dir.name
        try:
            case = read(case_dir)
            scored = {
                key: score_segmentation(case, seg(case.image), connectivity=connectivity)
                for key, seg in segmenters.items()
            }
        except (FlairwatchError, OSError, ValueError) as exc:
            message = " ".join(str(exc).split()) or type(exc).__name__
            failures.append(CaseFailure(name, message))
            warn(f"[{n}/{total}] {name}: failed: {message}")
            continue
        for key, r in scored.items():
            results[key].append(r)
        parts = [
            f"{key} Dice {r.scores.dice:.3f}, {r.scores.segmentation_ml:.2f} mL"
            for key, r in scored.items()
        ]
        first = next(iter(scored.values()))
        say(
            f"[{n}/{total}] {name}: reference {first.scores.reference_ml:.2f} mL; "
            + "; ".join(parts)
            + f" ({sum(r.seconds for r in scored.values()):.1f} s)"
        )
    return results, failures


def run_validate(
    cases_root: Path,
    out: Path | None,
    engine: Engine,
    *,
    say: Callable[[str], None] = print,
    warn: Callable[[str], None] = print,
    label_map: LabelMap = OWN_LAYOUT,
) -> int:
    """Score every case folder under ``cases_root``; write the report; 0 if all scored, else 1.

    ``label_map`` says how the reference files are read (our 0/1 layout by default).
    """
    case_dirs = find_case_folders(cases_root)
    if not case_dirs:
        raise ConfigInvalid(
            f"no case folders under {cases_root}: each case needs CASE/image/ (DICOM) or "
            "CASE/image.nii.gz, and CASE/wmh_reference.nii.gz"
        )
    if out is None:
        out = cases_root.resolve().parent / f"validation-{engine.manifest.label}"
    check_output_folder(out, cases_root)
    say(f"validating {engine.manifest.label} on {len(case_dirs)} case folder(s) in {cases_root}")
    per_model, failures = score_folders(
        case_dirs,
        {"model": model_segment(engine)},
        connectivity=engine.cfg.connectivity,
        say=say,
        warn=warn,
        read=partial(read_case, label_map=label_map),
    )
    results = per_model["model"]
    document = validation_document(engine, results, failures, cases_root)
    document["label_map"] = label_map.describe()  # how the references were read
    publish_folder(out, lambda tmp: write_report_files(tmp, results, failures, document))
    overall = document["overall"]
    say(
        f"scored {len(results)} of {len(case_dirs)} case(s): median Dice "
        f"{overall['median_dice']:.3f}; report in {out / REPORT_MD}"
    )
    return 1 if failures else 0
