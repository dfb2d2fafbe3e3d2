#!/usr/bin/env python3
"""Make the self-check's phantom series and the expected result of each shipped model.

Writes ``flairwatch/data/canary/``:

- ``series.tar.xz``: a small synthetic 2D axial FLAIR series (128 x 128 pixels of 1.8 mm, 24
  slices of 5 mm with 1 mm gaps), made by the phantom generator with a fixed seed; written only
  when missing or with ``--new-series`` (a new series invalidates every expectation, so they are
  all made again);
- ``expected.json`` and ``expected-<sha256 prefix>.nii.gz``: per model file hash, the mask and
  WMH volume the model gives on the series through the full pipeline
  (:func:`flairwatch.research.canary.measure`, the same run the daemon's self-check makes).

Run it again after a shipped model changes (the default model, or any other given with
``--model``)::

    .venv/bin/python scripts/make_canary.py [--model NAME_OR_MANIFEST ...] [--new-series]

The series is an invented phantom (participant "CANARY-0001"), for software checks only;
research use only, not for diagnosis.
"""

from __future__ import annotations

import argparse
import dataclasses
import io
import json
import tarfile
import tempfile
import time
from pathlib import Path

from flairwatch.config import Config
from flairwatch.engine.models import find_models
from flairwatch.phantom.casefolder import IMAGE_DIR, write_case
from flairwatch.phantom.dicom_writer import uid_from
from flairwatch.phantom.generator import generate
from flairwatch.phantom.params import PhantomParams, sample_params
from flairwatch.research.canary import (
    CANARY_DATA,
    EXPECTED_FILE,
    SERIES_ARCHIVE,
    expectation_entry,
    mask_bytes,
    measure,
)

SEED = 20260
LOAD_ML = 8.0


def canary_params() -> PhantomParams:
    """The fixed phantom: a 3 T 2D axial FLAIR with about 8 mL of WMH, small and quick."""
    p = sample_params(SEED, kind="2d_axial", field_strength_t=3.0, load_ml=LOAD_ML)
    acq = dataclasses.replace(
        p.acquisition,
        matrix=(128, 128),
        inplane_mm=1.8,
        slice_mm=5.0,
        gap_mm=1.0,
        n_slices=24,
        tilt_deg=0.0,
    )
    return dataclasses.replace(p, acquisition=acq, template_mm=2, ghosting=0.0)


def write_series_archive(target: Path) -> int:
    """Generate the phantom and pack its DICOM files (sorted, no time stamps); return bytes."""
    case = generate(canary_params(), with_ventricles=False)
    with tempfile.TemporaryDirectory() as tmp:
        case_dir = Path(tmp) / "case"
        study = uid_from("flairwatch-canary", SEED, "study")
        write_case(case, case_dir, patient_id="CANARY-0001", patient_name="Canary^Phantom",
                   study_uid=study)  # fmt: skip
        buf = io.BytesIO()
        with tarfile.open(fileobj=buf, mode="w:xz", preset=9) as tar:
            for path in sorted((case_dir / IMAGE_DIR).iterdir()):
                info = tarfile.TarInfo(path.name)
                data = path.read_bytes()
                info.size, info.mtime, info.mode = len(data), 0, 0o644
                tar.addfile(info, io.BytesIO(data))
    target.write_bytes(buf.getvalue())
    return len(buf.getvalue())


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--model", action="append", help="model name or manifest (repeatable; "
                        "default: every model shipped in the package)")  # fmt: skip
    parser.add_argument("--new-series", action="store_true", help="make the series again")
    parser.add_argument("--out", type=Path, default=CANARY_DATA, help=argparse.SUPPRESS)
    args = parser.parse_args()
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    expected_path = out / EXPECTED_FILE
    expected = {}
    if args.new_series or not (out / SERIES_ARCHIVE).is_file():
        size = write_series_archive(out / SERIES_ARCHIVE)
        print(f"series: {out / SERIES_ARCHIVE} ({size / 1024:.0f} kB)")
        for old in out.glob("expected-*.nii.gz"):
            old.unlink()
    elif expected_path.is_file():
        expected = json.loads(expected_path.read_text(encoding="utf-8"))
    models = args.model or [str(m.manifest) for m in find_models() if m.source == "package"]
    for ref in models:
        m = measure(Config(model=Path(ref)), data=out)
        mask_name = f"expected-{m.model_sha256[:16]}.nii.gz"
        (out / mask_name).write_bytes(mask_bytes(m.mask, m.affine))
        expected[m.model_sha256] = expectation_entry(m, mask_name, time.time())
        print(f"{m.model_name} {m.model_version} (sha256 {m.model_sha256[:12]}): "
              f"WMH {m.volume_ml:.3f} mL, {int(m.mask.sum())} voxels -> {mask_name}")  # fmt: skip
    expected_path.write_text(json.dumps(expected, indent=1, sort_keys=True) + "\n",
                             encoding="utf-8")  # fmt: skip
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
