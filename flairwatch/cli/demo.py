"""``flairwatch demo``: a small invented inbox, the main job run on it, and where to look.

The scenario is invented: three participants of a made-up ageing study at a made-up site, each
with one synthetic FLAIR series (different scanners, acquisitions and lesion loads), and one
participant also with a T1-weighted series that the selection rules must skip. Their truth masks
are kept beside the inbox, so the demo can also show how the model did.
"""

from __future__ import annotations

import argparse
import csv
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from flairwatch.errors import ConfigInvalid

DEFAULT_FOLDER = Path("demo")
STUDY_NAME = "Example Ageing Study (invented for this demo)"


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
    DemoParticipant("EXA-0101", "Demo^Alder", 7101, "2d_axial", 3.0, 6.0, with_t1=True),
    DemoParticipant("EXA-0102", "Demo^Birch", 7102, "3d_sagittal", 1.5, 1.5),
    DemoParticipant("EXA-0103", "Demo^Cedar", 7103, "2d_axial", 1.5, 24.0),
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


def write_demo_config(folder: Path, model: Path | None) -> Path:
    """The demo's own config file, so ``status``, ``export`` and ``qc`` work on it afterwards."""
    lines = [
        "# flairwatch demo settings (see config.example.yaml for every key)",
        "inbox: inbox",
        "results: results",
        "state: state",
        "settle_seconds: 2",
        "rescan_seconds: 5",
    ]
    if model is not None:
        lines.append(f"model: {model.resolve()}")
    path = folder / "flairwatch.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def truth_by_series(cases: Path) -> dict[str, float]:
    """Series Instance UID -> truth lesion volume (mL) of each demo case."""
    from flairwatch.intake.discover import read_record
    from flairwatch.intake.load import load_nifti

    truth = {}
    for case_dir in sorted(p for p in cases.iterdir() if p.is_dir()):
        first = next(iter(sorted((case_dir / "image").iterdir())))
        header = read_record(first).header
        ref = load_nifti(case_dir / "wmh_reference.nii.gz")
        if header is not None:
            truth[header.series_uid] = float((ref.data == 1).sum()) * ref.voxel_volume_mm3 / 1000
    return truth


def run_demo(folder: Path, model: Path | None, *, say: Callable[[str], None] = print) -> int:
    """Make the inbox, run the daemon once over it, then the gallery and the table."""
    from flairwatch.cli import main as cli

    start = time.perf_counter()
    say(f"flairwatch demo: {STUDY_NAME}; every participant and scan here is invented.")
    folder.mkdir(parents=True, exist_ok=True)
    inbox, cases = build_inbox(folder, say=say)
    config = write_demo_config(folder, model)
    say(f"\nwatching {inbox} once: every FLAIR series that has settled is processed ...")
    rc = cli(["watch", "--config", str(config), "--once"])
    cli(["--quiet", "qc", "gallery", "--config", str(config)])
    table = folder / "wmh_table.csv"
    cli(["--quiet", "export", "--config", str(config), "--out", str(table)])
    truth = truth_by_series(cases)
    say(f"\nfinished in {time.perf_counter() - start:.0f} s (exit code {rc}).\n")
    say(f"{'participant key':<16} {'series':<14} {'WMH mL':>8} {'truth mL':>9} {'lesions':>8}")
    with open(table, newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            t = truth.get(row.get("series_instance_uid", ""))
            say(
                f"{row['subject_key']:<16} {row['series_description'][:14]:<14} "
                f"{float(row['lesion_volume_ml']):>8.2f} "
                f"{'' if t is None else f'{t:.2f}':>9} {row['lesion_count']:>8}"
            )
    results = folder / "results"
    say(
        f"\nWhere to look:\n"
        f"  QC gallery (open in a browser): {(results / 'gallery' / 'index.html').resolve()}\n"
        f"  one table for statistics:       {table.resolve()}\n"
        f"  result folders:                 {results.resolve()}\n"
        "  mask over the scan in a DICOM viewer: import a result folder's segmentation.dcm\n"
        "                                  (DICOM SEG) and measurements.dcm (SR) with the scan\n"
        f"  truth masks of these scans:     {cases.resolve()}\n"
        f"  ledger: flairwatch status --config {config}\n"
        "RESEARCH USE ONLY: not for diagnosis; the model was trained on synthetic images only."
    )
    return rc


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.description = "Make synthetic FLAIR scans of invented participants and segment them."
    p.add_argument("--out", type=Path, default=DEFAULT_FOLDER, help="demo folder (default ./demo)")
    p.add_argument(
        "--model",
        type=Path,
        help="model manifest or installed model name (default: the default model)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    if args.out.exists() and not args.out.is_dir():
        raise ConfigInvalid(f"--out {args.out} is a file; choose a folder")
    from flairwatch.engine.models import manifest_path

    model = manifest_path(args.model)  # a name or path; None = the default model
    if not model.is_file():
        raise ConfigInvalid(f"--model {model} does not exist; pass a model manifest (.yaml)")
    return run_demo(args.out, model, say=lambda s: print(s, flush=True))
