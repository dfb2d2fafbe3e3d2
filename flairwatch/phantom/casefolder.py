"""Write a phantom as a case folder (docs/architecture.md "Case folders").

```
<case_dir>/image/*.dcm                   DICOM series (one file per slice)
<case_dir>/wmh_reference.nii.gz          uint8 0/1 WMH truth on the series grid (RAS affine)
<case_dir>/ventricles_reference.nii.gz   uint8 0/1 lateral ventricles on the series grid
<case_dir>/intracranial_mask.nii.gz      uint8 0/1 on the series grid
<case_dir>/case.json                     acquisition facts, generator parameters; written last
```
The reference layout is flairwatch's own: the WMH file holds only 0 and 1; voxels that must not
be scored go into a separate optional ``exclude_mask.nii.gz`` (0/1), which phantoms never need.
NIfTI affines are the RAS form of the series' LPS grid, so a mask lies voxel for voxel on the
image that SimpleITK's series reader builds from the DICOM files.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from flairwatch.phantom.dicom_writer import MANUFACTURER, MODEL_NAME, uid_from, write_series
from flairwatch.phantom.generator import PhantomCase, make_other_contrast
from flairwatch.phantom.params import GENERATOR_VERSION
from flairwatch.phantom.render import other_sequence
from flairwatch.volume import Volume, lps_to_ras

CASE_JSON = "case.json"
IMAGE_DIR = "image"
WMH_FILE = "wmh_reference.nii.gz"
ICV_FILE = "intracranial_mask.nii.gz"
VENTRICLES_FILE = "ventricles_reference.nii.gz"
EXCLUDE_FILE = "exclude_mask.nii.gz"  # optional in case folders; phantoms have nothing to exclude
CAUTION = (
    "Synthetic phantom for research and software testing only; not a patient scan, "
    "not for diagnosis. Anatomy derived from the ICBM152 2009 template: see NOTICE-ICBM152.txt."
)
_DESCRIPTIONS = {
    ("flair", "2d_axial"): "AX T2 FLAIR",
    ("flair", "3d_sagittal"): "SAG 3D FLAIR",
    ("t1", "2d_axial"): "AX T1 SE",
    ("t1", "3d_sagittal"): "SAG T1 SE",
    ("t2", "2d_axial"): "AX T2 SE",
    ("t2", "3d_sagittal"): "SAG T2 SE",
}
_SERIES_NUMBERS = {"flair": 4, "t1": 2, "t2": 3}


def write_nifti(volume: Volume, path: Path) -> None:
    """Save a volume as NIfTI-1 with the RAS affine as both sform and qform (code 1, scanner)."""
    affine = lps_to_ras(volume.affine_lps)
    img = nib.Nifti1Image(np.asarray(volume.data), affine)
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    nib.save(img, str(path))


def series_header(
    case: PhantomCase,
    *,
    contrast: str,
    patient_id: str,
    patient_name: str,
    study_uid: str,
    series_uid: str,
) -> dict[str, Any]:
    """DICOM attributes of the phantom's series for ``contrast`` "flair", "t1" or "t2"."""
    acq = case.params.acquisition
    date = (dt.date(2026, 1, 5) + dt.timedelta(days=case.params.seed % 360)).strftime("%Y%m%d")
    header: dict[str, Any] = {
        "PatientID": patient_id,
        "PatientName": patient_name,
        "PatientSex": "O",
        "PatientBirthDate": "",
        "StudyInstanceUID": study_uid,
        "SeriesInstanceUID": series_uid,
        "FrameOfReferenceUID": uid_from(study_uid, "frame"),
        "StudyID": "1",
        "AccessionNumber": "",
        "ReferringPhysicianName": "",
        "StudyDate": date,
        "SeriesDate": date,
        "AcquisitionDate": date,
        "ContentDate": date,
        "StudyTime": "090000",
        "SeriesTime": "091500",
        "StudyDescription": "HEAD RESEARCH PHANTOM",
        "SeriesDescription": _DESCRIPTIONS[(contrast, acq.kind)],
        "SeriesNumber": _SERIES_NUMBERS[contrast],
        "BodyPartExamined": "HEAD",
        "MRAcquisitionType": "2D" if acq.kind == "2d_axial" else "3D",
        "MagneticFieldStrength": format(acq.field_strength_t, ".1f"),
        "ImagingFrequency": format(42.577478 * acq.field_strength_t, ".6f"),
        "ImagedNucleus": "1H",
        "InstitutionName": "Example Research Site",
        "StationName": "FW-SIM",
        # Phase encoding along the rows' direction j (the ghost axis of the generator).
        "InPlanePhaseEncodingDirection": "COL",
        "NumberOfAverages": "1",
    }
    if contrast == "flair":
        header.update(
            ScanningSequence="IR",
            SequenceVariant=["SK", "SP"],
            ScanOptions="IR",
            RepetitionTime=format(acq.tr_ms, ".1f"),
            EchoTime=format(acq.te_ms, ".1f"),
            InversionTime=format(acq.ti_ms, ".1f"),
            EchoTrainLength=16 if acq.kind == "2d_axial" else 160,
            FlipAngle="90",
        )
    else:
        seq = other_sequence(contrast, acq.field_strength_t)
        header.update(
            ScanningSequence="SE",
            SequenceVariant=["SK", "SP"],
            RepetitionTime=format(seq.tr_ms, ".1f"),
            EchoTime=format(seq.te_ms, ".1f"),
            FlipAngle="90",
        )
    return header


def _write_json_last(path: Path, payload: dict[str, Any]) -> None:
    tmp = path.with_name(path.name + ".tmp")
    with tmp.open("w", encoding="utf-8") as fh:
        json.dump(payload, fh, indent=2, sort_keys=True)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def write_case(
    case: PhantomCase,
    case_dir: Path,
    *,
    patient_id: str,
    patient_name: str,
    study_uid: str | None = None,
    contrast: str = "flair",
) -> None:
    """Write ``case`` as a case folder; ``case.json`` is written last (marks it complete).

    Parameters
    ----------
    patient_id, patient_name : str
        Invented identifiers to put in the DICOM headers.
    study_uid : str, optional
        Study Instance UID; derived from the seed when omitted.
    contrast : str
        "flair" writes the phantom's FLAIR image; "t1" or "t2" writes a spin-echo series of
        the same head on the same grid instead (for series that must be skipped).
    """
    seed = case.params.seed
    study_uid = study_uid or uid_from("flairwatch-phantom", GENERATOR_VERSION, seed, "study")
    series_uid = uid_from(study_uid, seed, contrast, "series")
    image = case.image if contrast == "flair" else make_other_contrast(case, contrast)
    header = series_header(
        case,
        contrast=contrast,
        patient_id=patient_id,
        patient_name=patient_name,
        study_uid=study_uid,
        series_uid=series_uid,
    )
    case_dir.mkdir(parents=True, exist_ok=True)
    files = write_series(
        image,
        case_dir / IMAGE_DIR,
        header=header,
        slice_thickness_mm=case.params.acquisition.slice_mm,
    )
    write_nifti(case.wmh, case_dir / WMH_FILE)
    write_nifti(case.intracranial, case_dir / ICV_FILE)
    names = {"image": IMAGE_DIR, "wmh_reference": WMH_FILE, "intracranial_mask": ICV_FILE}
    if case.ventricles is not None:
        write_nifti(case.ventricles, case_dir / VENTRICLES_FILE)
        names["ventricles_reference"] = VENTRICLES_FILE
    acq = case.params.acquisition
    payload: dict[str, Any] = {
        "generator_version": GENERATOR_VERSION,
        "caution": CAUTION,
        "contrast": contrast,
        "manufacturer": MANUFACTURER,
        "model_name": MODEL_NAME,
        "series_description": header["SeriesDescription"],
        "study_instance_uid": study_uid,
        "series_instance_uid": series_uid,
        "n_files": len(files),
        "acquisition": {
            **dataclasses.asdict(acq),
            "slice_spacing_mm": acq.slice_spacing_mm,
            "shape_ijk": list(image.shape),
            "voxel_volume_mm3": image.voxel_volume_mm3,
        },
        "truth": {
            "lesion_volume_ml": round(case.lesion_volume_ml, 4),
            "intracranial_volume_ml": round(case.intracranial_volume_ml, 2),
            "lesion_voxels": int(case.wmh.data.sum()),
            **(
                {"ventricle_volume_ml": round(case.ventricle_volume_ml, 2)}
                if case.ventricle_volume_ml is not None
                else {}
            ),
        },
        "params": dataclasses.asdict(case.params),
        "files": names,
    }
    _write_json_last(case_dir / CASE_JSON, payload)
