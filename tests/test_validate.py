"""`flairwatch validate` end to end: case folders on disk, the tiny ONNX model, the output folder.

The tiny model marks voxels brighter than 1.4 x tissue, which in the test series are exactly the
two written lesion blobs (tests/series_fixtures.py), so its segmentation is known voxel by voxel
and every Dice below can be worked by hand.
"""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from PIL import Image
from scipy import ndimage

from flairwatch.cli import main
from flairwatch.errors import ConfigInvalid, InputRejected
from flairwatch.research import metrics
from flairwatch.research.cases import LabelMap, case_facts, parse_label_map, read_case
from flairwatch.volume import Volume
from tests.series_fixtures import SeriesSpec, phantom_array, write_series

SPEC = SeriesSpec()


def spec_affine_ras(spec: SeriesSpec) -> np.ndarray:
    """Voxel (i, j, k) -> RAS mm of a SeriesSpec stack, worked from DICOM PS3.3 C.7.6.2.1.1.

    Equation C.7.6.2.1-1: column i steps along the row direction cosine times the column spacing
    (Pixel Spacing[1]), row j along the column cosine times the row spacing (Pixel Spacing[0]),
    slice k along the normal times the slice spacing, from Image Position (Patient) (LPS). NIfTI
    is RAS (nifti1.h): negate the first two rows.
    """
    row, col = np.array(spec.orientation[:3]), np.array(spec.orientation[3:])
    lps = np.eye(4)
    lps[:3, 0] = row * spec.pixel_spacing[1]
    lps[:3, 1] = col * spec.pixel_spacing[0]
    lps[:3, 2] = np.cross(row, col) * spec.slice_spacing
    lps[:3, 3] = spec.origin
    return np.diag([-1.0, -1.0, 1.0, 1.0]) @ lps


def write_nifti(path: Path, data: np.ndarray, affine_ras: np.ndarray) -> None:
    img = nib.Nifti1Image(data, affine_ras)
    img.set_qform(affine_ras, code=1)
    img.set_sform(affine_ras, code=1)
    nib.save(img, path)


def dicom_case(root: Path, name: str, reference: np.ndarray, *, icv: bool = False) -> Path:
    case = root / name
    write_series(case / "image", SPEC)
    write_nifti(case / "wmh_reference.nii.gz", reference.astype(np.uint8), spec_affine_ras(SPEC))
    if icv:
        head = (phantom_array(SPEC) > 0).astype(np.uint8)
        write_nifti(case / "intracranial_mask.nii.gz", head, spec_affine_ras(SPEC))
    return case


# Hand count of the blobs in SPEC: a voxel is in a blob when di^2 + dj^2 + 4 dk^2 <= r^2.
# Blob 1 (r = 3): dk = 0 gives the 29 lattice points of a disc of radius 3 in 7 rows (dj = -3..3),
# dk = +-1 gives 21 points (di^2 + dj^2 <= 5) in 5 rows each: 71 voxels in 17 rows.
# Blob 2 (r = 2): dk = 0 gives 13 points in 5 rows, dk = +-1 one point each: 15 voxels in 7 rows.
BLOB1_VOXELS, BLOB2_VOXELS, ROWS_ALONG_I = 71, 15, 17 + 7
VOXEL_MM3 = 1.0 * 1.0 * 3.0


def blob_labels() -> np.ndarray:
    """0 outside, 1 in blob 1, 2 in blob 2 (which blob is which: by the centre given in SPEC)."""
    truth = phantom_array(SPEC) == 600
    labels, n = ndimage.label(truth)
    assert n == 2
    first = labels[SPEC.lesions[0][0], SPEC.lesions[0][1], SPEC.lesions[0][2]]
    return np.where(labels == first, 1, np.where(labels > 0, 2, 0)).astype(np.uint8)


@pytest.fixture
def cases(tmp_path: Path) -> Path:
    root = tmp_path / "cases"
    blobs = blob_labels()
    truth = blobs > 0
    assert truth.sum() == BLOB1_VOXELS + BLOB2_VOXELS  # the hand count above
    exact = dicom_case(root, "a-exact", truth, icv=True)
    (exact / "case.json").write_text(
        json.dumps({"params": {"acquisition": {"kind": "2d_axial", "field_strength_t": 3.0}}}),
        encoding="utf-8",
    )
    # reference moved one voxel along i: each row of a blob loses one voxel of overlap
    dicom_case(root, "b-shifted", np.roll(truth, 1, axis=0))
    # blob 2 in the exclusion mask: the model's voxels there must not count at all
    ignore = dicom_case(root, "c-ignore", blobs == 1)
    write_nifti(
        ignore / "exclude_mask.nii.gz", (blobs == 2).astype(np.uint8), spec_affine_ras(SPEC)
    )
    # a NIfTI image on a 1 x 1 x 2 mm grid
    nifti = root / "d-nifti"
    nifti.mkdir(parents=True)
    affine = np.diag([-1.0, -1.0, 2.0, 1.0])
    write_nifti(nifti / "image.nii.gz", phantom_array(SPEC).astype(np.float32), affine)
    write_nifti(nifti / "wmh_reference.nii.gz", truth.astype(np.uint8), affine)
    return root


def test_validate_scores_cases_and_writes_report(
    cases: Path, tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "report"
    rc = main(
        ["validate", "--cases", str(cases), "--out", str(out), "--model", str(tiny_model_manifest)]
    )
    printed = capsys.readouterr().out
    assert rc == 0, printed
    assert "[1/4] a-exact" in printed and "[4/4] d-nifti" in printed

    with open(out / "cases.csv", encoding="utf-8", newline="") as fh:
        rows = {r["case"]: r for r in csv.DictReader(fh)}
    assert sorted(rows) == ["a-exact", "b-shifted", "c-ignore", "d-nifti"]

    exact = rows["a-exact"]
    assert float(exact["dice"]) == 1.0
    assert float(exact["hd95_mm"]) == 0.0
    assert float(exact["intracranial_dice"]) == 1.0
    assert exact["acquisition"] == "2d_axial" and float(exact["field_strength_t"]) == 3.0
    # mL by hand: 86 voxels x 3 mm^3 / 1000
    assert float(exact["reference_ml"]) == pytest.approx(86 * VOXEL_MM3 / 1000, abs=1e-4)
    # both blobs (213 and 45 mm^3) are at least 30 mm^3
    assert int(exact["reference_lesions_30mm3"]) == 2 and float(exact["lesion_recall_30mm3"]) == 1

    # Dice = 2 |A and B| / (|A| + |B|) (2019 IEEE TMI WMH challenge definition): a one-voxel
    # shift along i keeps all but one voxel of each row: 86 - 24 = 62 shared voxels.
    shared = BLOB1_VOXELS + BLOB2_VOXELS - ROWS_ALONG_I
    hand = 2 * shared / (2 * (BLOB1_VOXELS + BLOB2_VOXELS))
    assert hand == pytest.approx(124 / 172)
    assert float(rows["b-shifted"]["dice"]) == pytest.approx(hand, abs=1e-4)
    assert rows["b-shifted"]["intracranial_dice"] == ""  # the case has no intracranial mask

    ignore = rows["c-ignore"]
    assert float(ignore["dice"]) == 1.0
    assert int(ignore["reference_lesions"]) == 1
    assert float(ignore["segmented_ml"]) == pytest.approx(BLOB1_VOXELS * VOXEL_MM3 / 1000, abs=1e-4)
    assert float(ignore["false_positive_ml"]) == 0.0

    nifti = rows["d-nifti"]
    assert float(nifti["dice"]) == 1.0
    assert float(nifti["reference_ml"]) == pytest.approx(86 * 2.0 / 1000, abs=1e-4)

    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["cases_scored"] == 4 and summary["cases_failed"] == 0
    assert summary["model"]["name"] == "tiny-threshold"
    assert "RESEARCH USE ONLY" in summary["notice"]
    assert summary["overall"]["median_dice"] == 1.0
    # every load bin is listed; the empty ones carry null, never NaN (not valid JSON)
    assert summary["by_load_bin"]["0"]["cases"] == 0
    assert summary["by_load_bin"]["0"]["median_dice"] is None
    assert summary["by_load_bin"]["<1"]["cases"] == 4
    assert set(summary["by_acquisition"]) == {"2d_axial", "unknown"}
    assert "NaN" not in (out / "summary.json").read_text(encoding="utf-8")

    report = (out / "report.md").read_text(encoding="utf-8")
    assert "RESEARCH USE ONLY" in report and "| <1 | 4 |" in report
    assert "| b-shifted | – | <1 | 0.26 | 0.26 | 0.721 | 1.0 | 2/2 | – |" in report
    for png in ("dice_vs_volume.png", "dice_by_load_bin.png"):
        with Image.open(out / png) as img:
            assert img.format == "PNG" and img.size[0] > 300
    assert "RESEARCH USE ONLY" in (out / "RESEARCH_ONLY.txt").read_text(encoding="utf-8")
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".report")]


def test_broken_case_exits_1_others_scored(
    cases: Path, tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    two = dicom_case(cases, "e-two-series", blob_labels() > 0)
    write_series(two / "image" / "more", SPEC)
    (cases / "f-no-reference" / "image").mkdir(parents=True)
    write_series(cases / "f-no-reference" / "image", SPEC)

    rc = main(["validate", "--cases", str(cases), "--model", str(tiny_model_manifest)])
    captured = capsys.readouterr()
    assert rc == 1
    errors = [line for line in captured.err.splitlines() if "failed" in line]
    assert len(errors) == 2 and "Traceback" not in captured.err
    assert "holds 2 DICOM series" in errors[0] and "e-two-series" in errors[0]
    assert "no wmh_reference.nii.gz" in errors[1]

    out = tmp_path / "validation-tiny-threshold-0.0.1"  # default: beside the cases folder
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["cases_scored"] == 4 and summary["cases_failed"] == 2
    assert [f["case"] for f in summary["failures"]] == ["e-two-series", "f-no-reference"]
    assert "e-two-series" in (out / "report.md").read_text(encoding="utf-8")

    # a second run replaces the earlier output in place
    shutil.rmtree(cases / "e-two-series")
    shutil.rmtree(cases / "f-no-reference")
    assert main(["validate", "--cases", str(cases), "--model", str(tiny_model_manifest)]) == 0
    assert json.loads((out / "summary.json").read_text(encoding="utf-8"))["cases_failed"] == 0


def test_refuses_unrelated_out_folder_and_missing_cases(
    cases: Path, tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "keep.txt").write_text("mine", encoding="utf-8")
    model = ["--model", str(tiny_model_manifest)]
    assert main(["validate", "--cases", str(cases), "--out", str(precious), *model]) == 2
    assert (precious / "keep.txt").read_text(encoding="utf-8") == "mine"
    assert main(["validate", "--cases", str(cases), "--out", str(cases / "r"), *model]) == 2
    assert main(["validate", "--cases", str(tmp_path / "none"), *model]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 3 and "exists and is not" in err[0] and "inside --cases" in err[1]


def test_reference_on_another_grid_or_with_odd_labels_is_refused(cases: Path) -> None:
    case = cases / "b-shifted"
    bad = np.zeros((64, 64, 12), dtype=np.uint8)
    bad[0, 0, 0] = 3
    write_nifti(case / "wmh_reference.nii.gz", bad, spec_affine_ras(SPEC))
    with pytest.raises(InputRejected, match=r"label\(s\) \[3\] that the label map does not name"):
        read_case(case)
    write_nifti(case / "wmh_reference.nii.gz", bad[:, :, :10], spec_affine_ras(SPEC))
    with pytest.raises(InputRejected, match="does not lie on the image grid"):
        read_case(case)


def test_case_facts_found_at_any_depth() -> None:
    assert case_facts({"kind": "3d_sagittal", "field_strength_t": 1.5}) == ("3d_sagittal", 1.5)
    assert case_facts({"acquisition": {"kind": "2d_axial", "field_strength_t": 3}}) == (
        "2d_axial",
        3.0,
    )
    assert case_facts({"note": "no facts"}) == (None, None)


# ---------------------------------------------------------------- the quality benchmark's pieces


def _bench() -> object:
    """The benchmark's in-distribution pieces (scripts/bench_quality.py is a thin entry point)."""
    from flairwatch.research import quality_heldout

    return quality_heldout


def test_bench_strata_cover_every_bin_acquisition_and_field() -> None:
    bench: Any = _bench()
    strata = {bench.stratum(n) for n in range(36)}
    # issue 3 item 6: both acquisition types, both field strengths, all load bins
    assert {s[0] for s in strata} == set(metrics.LOAD_BIN_NAMES)
    assert strata == {
        (b, k, f) for b in metrics.LOAD_BIN_NAMES for k in bench.KINDS for f in bench.FIELDS_T
    }


def test_bench_baseline_marks_voxels_above_k_times_brain_median() -> None:
    bench: Any = _bench()
    data = phantom_array(SPEC).astype(np.float32)
    head = data > 0
    volume = Volume(data, np.diag([1.0, 1.0, 3.0, 1.0]))
    # worked by hand: the brain median is the tissue level 300 (blobs are 86 of the head's
    # voxels), so blobs sit at 2.0 x the median: above k = 1.5, below k = 2.5
    mask = bench.baseline_mask(volume, head, 1.5, min_lesion_mm3=10.0, connectivity=26)
    assert np.array_equal(mask.astype(bool), data == 600)
    assert not bench.baseline_mask(volume, head, 2.5, min_lesion_mm3=10.0, connectivity=26).any()
    # the minimum size rule: blob 2 is 45 mm^3, dropped when the minimum is 50 mm^3
    small = bench.baseline_mask(volume, head, 1.5, min_lesion_mm3=50.0, connectivity=26)
    assert small.sum() == BLOB1_VOXELS


# ---- label layouts: our own (0/1 files) and others read through --label-map


def test_older_multi_label_layout_is_refused_with_the_map_to_use(cases: Path) -> None:
    legacy = dicom_case(cases, "e-legacy", blob_labels())  # 0, 1 WMH, 2 not scored, one file
    with pytest.raises(InputRejected, match="--label-map wmh=1,exclude=2"):
        read_case(legacy)


def test_label_map_reads_the_older_layout_like_our_own(cases: Path) -> None:
    legacy = dicom_case(cases, "e-legacy", blob_labels())
    old = read_case(legacy, parse_label_map("wmh=1,exclude=2"))
    own = read_case(cases / "c-ignore")
    assert np.array_equal(old.reference, own.reference)
    assert old.exclude is not None and own.exclude is not None
    assert np.array_equal(old.exclude, own.exclude)
    assert old.ventricles is None and own.ventricles is None


def test_label_map_file_roles_and_separate_files(cases: Path) -> None:
    blobs = blob_labels()
    case = dicom_case(cases, "f-labels", np.zeros_like(blobs))
    labels = np.where(blobs == 1, 3, np.where(blobs == 2, 4, 0)).astype(np.uint8)
    write_nifti(case / "labels.nii.gz", labels, spec_affine_ras(SPEC))
    read = read_case(case, parse_label_map("file=labels.nii.gz,wmh=1+3,ventricles=4"))
    assert np.array_equal(read.reference, blobs == 1)
    assert read.ventricles is not None and np.array_equal(read.ventricles, blobs == 2)
    assert read.exclude is None
    # a separate exclusion file still counts, joined with the map's role
    first_slice = np.zeros_like(blobs)
    first_slice[:, :, 0] = 1
    write_nifti(case / "exclude_mask.nii.gz", first_slice, spec_affine_ras(SPEC))
    read = read_case(case, parse_label_map("file=labels.nii.gz,wmh=3,exclude=4"))
    assert read.exclude is not None
    assert np.array_equal(read.exclude, (blobs == 2) | (first_slice == 1))
    with pytest.raises(InputRejected, match=r"does not name.*now file=labels\.nii\.gz,wmh=3"):
        read_case(case, parse_label_map("file=labels.nii.gz,wmh=3"))


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("wmh=1,exclude=2", LabelMap(labels={"wmh": frozenset({1}), "exclude": frozenset({2})})),
        (
            " WMH = 1+3 , ventricles=4 ",
            LabelMap(labels={"wmh": frozenset({1, 3}), "ventricles": frozenset({4})}),
        ),
        ("file=x.nii.gz,wmh=5", LabelMap("x.nii.gz", {"wmh": frozenset({5})})),
    ],
)
def test_label_map_syntax(text: str, expected: LabelMap) -> None:
    got = parse_label_map(text)
    assert got == expected
    assert parse_label_map(got.describe()) == got  # describe() writes the same syntax back


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("exclude=2", "must say which labels are WMH"),
        ("wmh=1,lesion=2", "role 'lesion' is unknown"),
        ("wmh=1,exclude=1", "label 1 to both wmh and exclude"),
        ("wmh=0", "label 0 is always background"),
        ("wmh=1,wmh=2", "names wmh twice"),
        ("wmh=one", "whole numbers joined by +"),
        ("wmh", "is not ROLE=LABELS"),
        ("wmh=1,file=../x.nii.gz", "give a file name inside each case"),
    ],
)
def test_bad_label_maps_are_one_line_errors(text: str, message: str) -> None:
    with pytest.raises(ConfigInvalid, match=message) as err:
        parse_label_map(text)
    assert "\n" not in str(err.value)


def test_validate_label_map_option(
    cases: Path, tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    legacy = tmp_path / "legacy"
    dicom_case(legacy, "c-ignore", blob_labels())
    model = ["--model", str(tiny_model_manifest)]
    out = tmp_path / "report"
    argv = ["validate", "--cases", str(legacy), "--out", str(out), *model]
    assert main([*argv, "--label-map", "wmh=1,exclude=2"]) == 0
    with open(out / "cases.csv", encoding="utf-8", newline="") as fh:
        (row,) = list(csv.DictReader(fh))
    assert float(row["dice"]) == 1.0 and int(row["reference_lesions"]) == 1
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["label_map"] == "wmh=1,exclude=2"
    capsys.readouterr()
    assert main([*argv, "--label-map", "wmh=1,exclude=x"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [
        "flairwatch: error: --label-map exclude=x: labels are whole numbers joined by +, e.g. exclude=1+3"
    ]


def test_ventricle_dice_is_scored_when_the_model_gives_ventricles(tmp_path: Path) -> None:
    # A series with a dark box standing in for the ventricles, the fixture model with a ventricle
    # output, and the box as the case's ventricle reference. The expected Dice is computed here
    # with numpy from the engine's own ventricle mask: Dice = 2 |A and B| / (|A| + |B|) (the 2019
    # IEEE TMI WMH challenge definition).
    from flairwatch.config import Config
    from flairwatch.engine.pipeline import Engine
    from tests.model_fixtures import make_tiny_model

    spec = SeriesSpec(ventricles=((26, 38, 22, 42, 3, 9),))
    manifest = make_tiny_model(tmp_path / "model", ventricles=True)
    case = tmp_path / "cases" / "a"
    write_series(case / "image", spec)
    box = phantom_array(spec) == 150
    write_nifti(case / "wmh_reference.nii.gz", (phantom_array(spec) == 600).astype(np.uint8),
                spec_affine_ras(spec))  # fmt: skip
    write_nifti(case / "ventricles_reference.nii.gz", box.astype(np.uint8), spec_affine_ras(spec))
    model_vent = Engine(Config(model=manifest, threads=1)).analyse(read_case(case).image).ventricles
    assert model_vent is not None
    a = model_vent.astype(bool)
    expected = 2 * int((a & box).sum()) / (int(a.sum()) + int(box.sum()))
    assert expected > 0.5  # the fixture model finds most of the box
    out = tmp_path / "report"
    rc = main(["validate", "--cases", str(tmp_path / "cases"), "--out", str(out),
               "--model", str(manifest)])  # fmt: skip
    assert rc == 0
    with open(out / "cases.csv", encoding="utf-8", newline="") as fh:
        (row,) = csv.DictReader(fh)
    assert float(row["ventricles_dice"]) == pytest.approx(expected, abs=1e-4)
