"""``flairwatch demo``: a small invented inbox, the main job run on it, and where to look.

The scenario is invented: three participants of a made-up ageing study at a made-up site, each
with one synthetic FLAIR series (different scanners, acquisitions and lesion loads), and one
participant also with a T1-weighted series that the selection rules must skip. Their truth masks
are kept beside the inbox, so the demo can also show how the model did.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from flairwatch.config import Config
from flairwatch.errors import ConfigInvalid

DEFAULT_FOLDER = Path("demo")
STUDY_NAME = "Harbourview Ageing Study (invented)"


@dataclass(frozen=True)
class DemoParticipant:
    patient_id: str
    patient_name: str
    seed: int
    kind: str
    field_strength_t: float
    load_ml: float
    with_t1: bool = False


PARTICIPANTS = (
    DemoParticipant("HVA-0101", "Demo^Alder", 7101, "2d_axial", 3.0, 6.0, with_t1=True),
    DemoParticipant("HVA-0102", "Demo^Birch", 7102, "3d_sagittal", 1.5, 1.5),
    DemoParticipant("HVA-0103", "Demo^Cedar", 7103, "2d_axial", 1.5, 24.0),
)


def build_inbox(folder: Path, *, say: Callable[[str], None] = print) -> tuple[Path, Path]:
    """Write the demo case folders (with truth) and an inbox of their DICOM files, mixed.

    Returns (inbox, cases). Existing complete cases are kept, so a rerun is quick.
    """
    from flairwatch.phantom import generate, make_other_contrast, sample_params, write_case
    from flairwatch.phantom import write_series as write_dicom_series
    from flairwatch.phantom.dicom_writer import uid_from

    cases = folder / "cases"
    inbox = folder / "inbox"
    for n, p in enumerate(PARTICIPANTS, start=1):
        case_dir = cases / p.patient_id
        if not (case_dir / "case.json").is_file():
            say(
                f"[{n}/{len(PARTICIPANTS)}] making a synthetic {p.kind.replace('_', ' ')} FLAIR "
                f"at {p.field_strength_t:g} T for invented participant {p.patient_id}"
            )
            params = sample_params(
                p.seed, kind=p.kind, field_strength_t=p.field_strength_t, load_ml=p.load_ml
            )
            case = generate(params)
            study_uid = uid_from("flairwatch-demo", p.patient_id, "study")
            write_case(
                case,
                case_dir,
                patient_id=p.patient_id,
                patient_name=p.patient_name,
                study_uid=study_uid,
            )
            if p.with_t1:
                t1 = make_other_contrast(case, "t1")
                write_dicom_series(
                    t1,
                    case_dir / "other" / "t1",
                    header={
                        "PatientID": p.patient_id,
                        "PatientName": p.patient_name,
                        "StudyInstanceUID": study_uid,
                        "SeriesInstanceUID": uid_from("flairwatch-demo", p.patient_id, "t1"),
                        "SeriesDescription": "AX T1 SE",
                        "ScanningSequence": "SE",
                        "SeriesNumber": 2,
                    },
                )
        # the inbox gets every DICOM file of the participant, under one folder, names as sent
        target = inbox / p.patient_id
        if not target.is_dir():
            tmp = inbox / f".{p.patient_id}.copying"
            shutil.rmtree(tmp, ignore_errors=True)
            tmp.mkdir(parents=True)
            for src in sorted(case_dir.glob("image/*")) + sorted(case_dir.glob("other/*/*")):
                shutil.copy2(src, tmp / f"{src.parent.name}-{src.name}")
            tmp.rename(target)
    return inbox, cases


def run_demo(folder: Path, cfg: Config, *, say: Callable[[str], None] = print) -> int:
    from flairwatch.process import run_process

    start = time.perf_counter()
    say(f"flairwatch demo: {STUDY_NAME}; every participant and scan here is invented.")
    inbox, cases = build_inbox(folder, say=say)
    results = folder / "results"
    say(f"\nrunning the main job on {inbox} ...")
    rc = run_process([inbox], results, cfg, say=say, warn=lambda s: print(s, file=sys.stderr))
    say(f"\nfinished in {time.perf_counter() - start:.0f} s. Results: {results.resolve()}")
    for qc in sorted(results.rglob("qc.png")):
        say(f"  QC picture: {qc.resolve()}")
    say(
        "Look at the qc.png files (lesion outlines in red), summary.json for the numbers, and\n"
        f"lesions.csv for each lesion. Truth masks for these synthetic scans are in {cases.resolve()}.\n"
        "RESEARCH USE ONLY: not for diagnosis; the model was trained on synthetic images only."
    )
    return rc


def add_parser(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    from flairwatch.cli import add_model_options

    p = subparsers.add_parser(
        "demo",
        help="make a demo inbox of invented participants and run the main job on it",
        description="Make synthetic FLAIR scans of invented participants and segment them.",
    )
    p.add_argument("--out", type=Path, default=DEFAULT_FOLDER, help="demo folder (default ./demo)")
    add_model_options(p)
    p.set_defaults(func=_run)


def _run(args: argparse.Namespace) -> int:
    from flairwatch.cli import config_from_args

    cfg = config_from_args(args)
    if args.out.exists() and not args.out.is_dir():
        raise ConfigInvalid(f"--out {args.out} is a file; choose a folder")
    return run_demo(args.out, cfg, say=lambda s: print(s, flush=True))
