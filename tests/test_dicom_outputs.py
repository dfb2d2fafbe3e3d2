"""DICOM SEG and SR of ``flairwatch process``: checked with dciodvfy, pydicom and highdicom.

Outside references, named beside each check:
- ``dciodvfy`` from Debian's dicom3tools validates each object against its IOD (PS3.3 A.51
  Segmentation, PS3.3 A.35.13 Comprehensive 3D SR); errors fail, warnings are printed.
- pydicom and highdicom read the files back (``highdicom.seg.segread``, ``highdicom.sr.srread``);
  highdicom decodes the SEG's frames, which must equal the NIfTI mask (read by nibabel) voxel for
  voxel on the series grid.
- Codes and units: DICOM PS3.16 (CID 7150, 7151, 7140, 7021, 7181 / UCUM), as listed in
  docs/sources.md, "DICOM SEG and SR".
"""

from __future__ import annotations

import json
import logging
import shutil
import subprocess
from pathlib import Path
from typing import Any

import highdicom as hd
import nibabel as nib
import numpy as np
import pydicom
import pytest
import yaml
from pydicom.dataset import Dataset

from flairwatch.cli import main
from flairwatch.config import Identifiers, config_from_mapping
from flairwatch.engine.dicom_seg import build_segmentation
from flairwatch.engine.outputs import DICOM_SKIP_ERRORS
from flairwatch.errors import ConfigInvalid
from flairwatch.intake.load import volume_from_datasets
from flairwatch.ledger.queries import ResultRecord
from flairwatch.research.export import build_row
from tests.dicom_fixtures import oblique_orientation, read_mprage
from tests.model_fixtures import make_tiny_model
from tests.series_fixtures import SeriesSpec, write_series

FOR_UID = "1.2.826.0.1.3680043.8.498.4242"
# 2D oblique: a fixed random rotation; 3D sagittal: rows along +y (posterior), columns along -z
OBLIQUE = SeriesSpec(
    rows=48,
    columns=44,
    slices=8,
    orientation=oblique_orientation(11),
    origin=(-22.0, -24.0, -12.0),
    ventricles=((18, 26, 18, 28, 3, 6),),
    lesions=((12, 16, 4, 3), (32, 30, 5, 2)),
)
SAGITTAL = SeriesSpec(
    rows=40,
    columns=44,
    slices=12,
    slice_spacing=1.0,
    orientation=(0.0, 1.0, 0.0, 0.0, 0.0, -1.0),
    origin=(6.0, -22.0, 20.0),
    description="SAG 3D FLAIR",
    lesions=((14, 16, 5, 3), (30, 24, 7, 2)),
)


def _series(folder: Path, spec: SeriesSpec, *, three_d: bool = False) -> Path:
    """A phantom series as a scanner writes it: one Frame of Reference UID (PS3.3 C.7.4.1)."""
    for path in write_series(folder, spec):
        ds = pydicom.dcmread(path)
        ds.FrameOfReferenceUID = FOR_UID
        ds.PositionReferenceIndicator = ""
        ds.MRAcquisitionType = "3D" if three_d else "2D"
        ds.save_as(path, enforce_file_format=True)
    return folder


def _process(inbox: Path, out: Path, model: Path, config: dict[str, Any] | None = None) -> Path:
    args = ["process", str(inbox), "--results", str(out), "--model", str(model), "--all-series"]
    if config is not None:
        out.parent.mkdir(parents=True, exist_ok=True)
        cfg = out.parent / "config.yaml"
        cfg.write_text(yaml.safe_dump(config))
        args += ["--config", str(cfg)]
    assert main(args) == 0
    (summary,) = out.rglob("summary.json")
    return summary.parent


def _dciodvfy(path: Path) -> None:
    """No errors from dciodvfy (dicom3tools); warnings are printed for the log."""
    if shutil.which("dciodvfy") is None:
        pytest.skip("dciodvfy missing: apt-get install dicom3tools (.ci/run installs it)")
    run = subprocess.run(["dciodvfy", str(path)], capture_output=True, text=True, check=False)
    lines = (run.stdout + run.stderr).splitlines()
    warnings = [line for line in lines if line.startswith("Warning")]
    if warnings:
        print(f"dciodvfy warnings for {path.name}:", *warnings, sep="\n  ")
    errors = [line for line in lines if line.startswith("Error")]
    assert not errors, "\n".join(errors)


def _nifti_lps(path: Path) -> tuple[np.ndarray, np.ndarray]:
    """A NIfTI mask and its affine in LPS mm (nibabel gives RAS; PS3.3 C.7.6.2.1.1 is LPS)."""
    img = nib.load(path)
    return np.asarray(img.dataobj), np.diag([-1.0, -1.0, 1.0, 1.0]) @ img.affine


def _by_source_instance(seg: hd.seg.Segmentation, sources: list[Dataset], nifti: Path) -> None:
    """Each source image's SEG frame equals the NIfTI mask's slice through that image."""
    mask, affine = _nifti_lps(nifti)
    uids = [str(ds.SOPInstanceUID) for ds in sources]
    frames = seg.get_pixels_by_source_instance(
        uids, segment_numbers=[1], assert_missing_frames_are_empty=True
    )
    inverse = np.linalg.inv(affine)
    for ds, frame in zip(sources, frames, strict=True):
        ijk = inverse @ [*map(float, ds.ImagePositionPatient), 1.0]
        k = round(float(ijk[2]))
        assert np.allclose(ijk[:3], [0, 0, k], atol=1e-3)
        # pixel rows run along j, columns along i (PS3.3 C.7.6.2.1.1)
        assert np.array_equal(frame[:, :, 0], mask[:, :, k].T), ds.SOPInstanceUID


def _by_volume(seg: hd.seg.Segmentation, segment: int, nifti: Path) -> None:
    """highdicom's decoded volume and the NIfTI mask mark the same voxels (mapped through the
    two affines, which must agree on a whole-voxel grid)."""
    mask, affine = _nifti_lps(nifti)
    vol = seg.get_volume(segment_numbers=[segment], combine_segments=True)
    to_ours = np.linalg.inv(affine) @ vol.affine
    assert np.allclose(to_ours, np.round(to_ours), atol=1e-3)
    hit = np.argwhere(vol.array != 0)
    ours = np.round(to_ours[:3, :3] @ hit.T + to_ours[:3, 3:4]).astype(int).T
    want = np.argwhere(mask != 0)
    assert len(want) > 0
    assert sorted(map(tuple, ours)) == sorted(map(tuple, want))


def _sr_items(ds: Dataset) -> list[Dataset]:
    """Every content item of an SR tree, depth first (PS3.3 C.17.3)."""
    out = []
    for item in ds.get("ContentSequence", []):
        out.append(item)
        out.extend(_sr_items(item))
    return out


def _sr_numbers(sr: Dataset) -> dict[tuple[str, int], tuple[float, str]]:
    """(concept code, segment number) -> (value, UCUM unit) of each NUM item of a TID 1411 group."""
    found = {}
    for group in _sr_items(sr):
        if group.ValueType != "CONTAINER":
            continue
        children = list(group.get("ContentSequence", []))
        refs = [c for c in children if "ReferencedSOPSequence" in c and c.ValueType == "IMAGE"]
        segs = [r.ReferencedSOPSequence[0] for r in refs]
        segs = [r for r in segs if "ReferencedSegmentNumber" in r]
        for c in children:
            if c.ValueType == "NUM" and segs:
                mv = c.MeasuredValueSequence[0]
                key = (c.ConceptNameCodeSequence[0].CodeValue, int(segs[0].ReferencedSegmentNumber))
                found[key] = (float(mv.NumericValue), mv.MeasurementUnitsCodeSequence[0].CodeValue)
    return found


def test_oblique_2d_with_ventricles_and_intracranial(tmp_path: Path) -> None:
    inbox = _series(tmp_path / "in", OBLIQUE)
    model = make_tiny_model(tmp_path / "model", ventricles=True)
    vdir = _process(inbox, tmp_path / "out", model)
    summary = json.loads((vdir / "summary.json").read_text())
    assert summary["files"]["segmentation"] == "segmentation.dcm"
    assert summary["files"]["measurements"] == "measurements.dcm"
    assert summary["dicom"]["segmentation"] == "written"
    for name in ("segmentation.dcm", "measurements.dcm"):
        _dciodvfy(vdir / name)

    sources = [pydicom.dcmread(p) for p in sorted(inbox.iterdir())]
    seg = hd.seg.segread(vdir / "segmentation.dcm")
    # PS3.3 C.8.20.2: binary type; PS3.3 C.7.4.1: the source's Frame of Reference
    assert seg.SegmentationType == "BINARY"
    assert seg.FrameOfReferenceUID == FOR_UID
    assert seg.StudyInstanceUID == sources[0].StudyInstanceUID
    assert "research" in seg.SeriesDescription.lower() and "RESEARCH" in seg.ContentLabel
    # the scan's patient data is copied by default (README: identifiable data)
    assert seg.PatientID == "FW-0001" and str(seg.PatientName) == "Demo^Participant"
    # PS3.16: CID 7150 categories, CID 7140 / 7151 types
    codes = [
        (s.SegmentLabel, s.SegmentedPropertyCategoryCodeSequence[0].CodeValue,
         s.SegmentedPropertyTypeCodeSequence[0].CodeValue)
        for s in seg.SegmentSequence
    ]  # fmt: skip
    assert codes == [
        ("WMH", "49755003", "110702"),
        ("Intracranial", "91723000", "1101003"),
        ("Ventricles", "91723000", "35764002"),
    ]
    alg = seg.SegmentSequence[0].SegmentationAlgorithmIdentificationSequence[0]
    assert (alg.AlgorithmName, alg.AlgorithmVersion) == ("tiny-threshold", "0.0.1")
    # PS3.3 C.7.6.16.2.6: per-frame Derivation Image references to the source instances
    referenced = {
        ref.ReferencedSOPInstanceUID
        for fg in seg.PerFrameFunctionalGroupsSequence
        for ref in fg.DerivationImageSequence[0].SourceImageSequence
    }
    assert referenced <= {str(ds.SOPInstanceUID) for ds in sources} and referenced
    _by_source_instance(seg, sources, vdir / "wmh_mask.nii.gz")
    _by_volume(seg, 1, vdir / "wmh_mask.nii.gz")
    _by_volume(seg, 3, vdir / "ventricle_mask.nii.gz")

    sr = hd.sr.srread(vdir / "measurements.dcm")
    # PS3.16 TID 1500 title DCM 126000; research notice in the document and series description
    assert sr.ConceptNameCodeSequence[0].CodeValue == "126000"
    assert "not for diagnosis" in sr.SeriesDescription
    texts = [i.TextValue for i in _sr_items(sr) if i.ValueType == "TEXT"]
    assert any("RESEARCH USE ONLY" in t for t in texts)
    got = _sr_numbers(sr)
    # SCT 118565006 Volume (UCUM ml), SCT 246206008 Number of lesions ({lesions})
    assert got[("118565006", 1)] == (pytest.approx(summary["lesion_volume_ml"], abs=1e-4), "ml")
    assert got[("246206008", 1)] == (summary["lesion_count"], "{lesions}")
    icv = summary["intracranial_volume_ml"]
    assert got[("118565006", 2)] == (pytest.approx(icv, abs=0.01), "ml")
    pct = 100 * summary["lesion_volume_ml"] / icv
    assert got[("WMH-ICV-PCT", 1)] == (pytest.approx(pct, rel=1e-3), "%")
    pv, deep = summary["periventricular_volume_ml"], summary["deep_volume_ml"]
    assert got[("WMH-PV-VOL", 1)] == (pytest.approx(pv, abs=1e-4), "ml")
    assert got[("WMH-DEEP-VOL", 1)] == (pytest.approx(deep, abs=1e-4), "ml")
    # every measurement group points at this SEG instance
    seg_refs = {
        i.ReferencedSOPSequence[0].ReferencedSOPInstanceUID
        for i in _sr_items(sr)
        if i.ValueType == "IMAGE" and "ReferencedSegmentNumber" in i.ReferencedSOPSequence[0]
    }
    assert seg_refs == {seg.SOPInstanceUID}
    # PS3.3 C.17.2.3: the evidence lists every instance the content tree references: the SEG
    evidence = [
        ref.ReferencedSOPInstanceUID
        for study in sr.CurrentRequestedProcedureEvidenceSequence
        for series in study.ReferencedSeriesSequence
        for ref in series.ReferencedSOPSequence
    ]
    assert evidence == [seg.SOPInstanceUID]


def test_sagittal_3d_with_a_wmh_only_model(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    inbox = _series(tmp_path / "in", SAGITTAL, three_d=True)
    with caplog.at_level(logging.INFO):
        vdir = _process(
            inbox, tmp_path / "out", make_tiny_model(tmp_path / "model", intracranial=False)
        )
    # highdicom's INFO chatter (one line per copied module) stays out of flairwatch's log
    assert not [r for r in caplog.records if r.name.startswith("highdicom") and r.levelno < 30]
    summary = json.loads((vdir / "summary.json").read_text())
    for name in ("segmentation.dcm", "measurements.dcm"):
        _dciodvfy(vdir / name)
    seg = hd.seg.segread(vdir / "segmentation.dcm")
    assert [s.SegmentLabel for s in seg.SegmentSequence] == ["WMH"]
    sources = [pydicom.dcmread(p) for p in sorted(inbox.iterdir())]
    _by_source_instance(seg, sources, vdir / "wmh_mask.nii.gz")
    _by_volume(seg, 1, vdir / "wmh_mask.nii.gz")
    got = _sr_numbers(hd.sr.srread(vdir / "measurements.dcm"))
    # without intracranial and ventricle outputs: volume and count only
    assert set(got) == {("118565006", 1), ("246206008", 1)}
    assert got[("246206008", 1)][0] == summary["lesion_count"] > 0


def test_outputs_off_and_identifiers_followed(tmp_path: Path) -> None:
    inbox = _series(tmp_path / "in", OBLIQUE)
    model = make_tiny_model(tmp_path / "model")
    off = _process(inbox, tmp_path / "a" / "out", model, {"outputs": {"segmentation": False,
                                                                      "measurements": False}})  # fmt: skip
    assert not list(off.glob("*.dcm"))
    assert json.loads((off / "summary.json").read_text())["dicom"]["segmentation"] == "off"
    config = {
        "outputs": {"measurements": False, "identifiers": "follow"},
        "identifiers": {"patient_id": "pseudonymise", "patient_name": "drop", "dates": "drop"},
    }
    seg_only = _process(inbox, tmp_path / "b" / "out", model, config)
    assert sorted(p.name for p in seg_only.glob("*.dcm")) == ["segmentation.dcm"]
    summary = json.loads((seg_only / "summary.json").read_text())
    seg = pydicom.dcmread(seg_only / "segmentation.dcm")
    assert seg.PatientID == summary["patient_id"] != "FW-0001"
    assert str(seg.PatientName) == "" and seg.StudyDate == ""
    _dciodvfy(seg_only / "segmentation.dcm")
    # the export's path columns name exactly the DICOM files the folder holds
    for folder in (off, seg_only):
        facts = json.loads((folder / "summary.json").read_text())
        rec = ResultRecord(1, 1, "1.2", "1.3", 1, None, None, None, "tiny-threshold", "0.0.1",
                           str(folder), None, None, True, 0.0, None, None, None)  # fmt: skip
        row = build_row(rec, facts, None, Identifiers(), lambda: b"key")
        paths = [row["segmentation_path"], row["measurements_path"]]
        assert sorted(Path(p).name for p in paths if p) == sorted(
            p.name for p in folder.glob("*.dcm")
        )


def test_nifti_input_and_a_source_without_frame_of_reference_are_skipped(tmp_path: Path) -> None:
    model = make_tiny_model(tmp_path / "model")
    write_series(tmp_path / "plain", SeriesSpec(slices=6))  # no Frame of Reference UID
    vdir = _process(tmp_path / "plain", tmp_path / "out1", model)
    facts = json.loads((vdir / "summary.json").read_text())["dicom"]
    assert facts["segmentation"] == "skipped" and "Frame of Reference" in facts["skipped_reason"]
    nifti = tmp_path / "image.nii.gz"
    nib.save(nib.Nifti1Image(np.full((32, 32, 4), 300, np.float32), np.eye(4)), nifti)
    vdir = _process(nifti, tmp_path / "out2", model)
    facts = json.loads((vdir / "summary.json").read_text())["dicom"]
    assert facts["measurements"] == "skipped" and "NIfTI" in facts["skipped_reason"]
    assert not list(vdir.glob("*.dcm"))


@pytest.mark.parametrize(
    ("outputs", "words"),
    [
        ({"segmentation": False}, "needs 'outputs.segmentation'"),
        ({"segmentation": "yes"}, "true or false"),
        ({"send": True}, "mapping of"),
        ({"identifiers": "keep"}, "copy or follow"),
    ],
)
def test_bad_outputs_settings_are_one_line_errors(outputs: dict[str, Any], words: str) -> None:
    with pytest.raises(ConfigInvalid) as err:
        config_from_mapping({"outputs": outputs})
    assert words in str(err.value) and "\n" not in str(err.value)
    assert config_from_mapping({"outputs": {"measurements": False}}).outputs.segmentation


def test_lax_headers_still_give_a_valid_seg_and_are_left_as_they_were(tmp_path: Path) -> None:
    """Type 2 attributes left out (PS3.3 C.7.1.1 Patient, C.7.2.1 General Study, C.7.6.2 Slice
    Thickness) are filled in the SEG only; dciodvfy still finds no error."""
    inbox = _series(tmp_path / "in", SeriesSpec(rows=16, columns=16, slices=4, lesions=()))
    headers = [pydicom.dcmread(p) for p in sorted(inbox.iterdir())]
    for ds in headers:
        for keyword in ("SliceThickness", "PatientBirthDate", "PatientSex", "StudyTime"):
            if keyword in ds:
                delattr(ds, keyword)
    before = [ds.to_json() for ds in headers]
    volume = volume_from_datasets(headers, "lax")
    mask = np.zeros(volume.shape, np.uint8)
    mask[4:8, 5:9, 1:3] = 1
    seg = build_segmentation(headers, {"wmh": mask}, volume.affine_lps, algorithm_name="m",
                             algorithm_version="1", software_version="0", device_serial="x")  # fmt: skip
    seg.save_as(tmp_path / "seg.dcm")
    _dciodvfy(tmp_path / "seg.dcm")
    assert [ds.to_json() for ds in headers] == before
    # the grid's slice spacing (3 mm, SeriesSpec) stands in for the missing thickness
    shared = seg.SharedFunctionalGroupsSequence[0].PixelMeasuresSequence[0]
    assert float(shared.SliceThickness) == pytest.approx(3.0)


def test_an_enhanced_source_highdicom_cannot_take_is_skipped_not_failed() -> None:
    """nibabel's enhanced MR (PS3.3 A.36.2) keeps Pixel Measures per frame; highdicom wants them
    shared, so building the SEG raises one of the errors write_dicom turns into a skip."""
    ds = read_mprage()
    volume = volume_from_datasets([ds], "enhanced")
    with pytest.raises(DICOM_SKIP_ERRORS):
        build_segmentation([ds], {"wmh": np.zeros(volume.shape, np.uint8)}, volume.affine_lps,
                           algorithm_name="m", algorithm_version="1", software_version="0",
                           device_serial="x")  # fmt: skip


def test_remembered_iod_lookups_answer_as_highdicom_does() -> None:
    # flairwatch.engine.dicom_seg caches highdicom's IOD-table lookups (a pure function of its
    # arguments); the cached answers must equal highdicom's own scan of the standard's tables.
    import highdicom._standard_utils as tables

    cached: Any = tables.is_attribute_in_iod
    scan = cached.__wrapped__
    mr, seg = "1.2.840.10008.5.1.4.1.1.4", "1.2.840.10008.5.1.4.1.1.66.4"  # PS3.4 B.5
    for attribute in ("PixelData", "NumberOfFrames", "ContentDate", "SegmentSequence"):
        for uid in (mr, seg):
            for exclude in (None, ["IconImageSequence"]):
                assert cached(attribute, uid, exclude) == scan(attribute, uid, exclude)
    assert cached("NumberOfFrames", seg) and not cached("NumberOfFrames", mr)
    assert cached.cache_info().hits > 0
