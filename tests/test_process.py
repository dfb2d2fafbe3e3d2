"""`flairwatch process` end to end: real DICOM files, the tiny ONNX model, real result folders."""

from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk

from flairwatch.cli import main
from flairwatch.notice import CAUTION
from tests.series_fixtures import SeriesSpec, phantom_array, write_series


def _tree_digest(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _version_dirs(results: Path) -> list[Path]:
    return sorted(p.parent for p in results.rglob("summary.json"))


def test_flair_processed_other_series_skipped_junk_ignored(
    tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    inbox = tmp_path / "inbox"
    spec = SeriesSpec()
    write_series(inbox / "mixed", spec)
    write_series(
        inbox / "mixed",
        SeriesSpec(description="AX T1 SE", scanning_sequence="SE", inversion_time=None),
    )
    (inbox / "notes.txt").write_text("not dicom")
    (inbox / "empty.dcm").write_bytes(b"")
    before = _tree_digest(inbox)

    results = tmp_path / "results"
    rc = main(
        ["process", str(inbox), "--results", str(results), "--model", str(tiny_model_manifest)]
    )
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "skipped" in out and "AX T1 SE" in out
    assert _tree_digest(inbox) == before, "process must never modify its input"

    (vdir,) = _version_dirs(results)
    names = sorted(p.name for p in vdir.iterdir())
    assert names == sorted(
        [
            "wmh_mask.nii.gz",
            "wmh_probability.nii.gz",
            "summary.json",
            "lesions.csv",
            "qc.png",
            "RESEARCH_ONLY.txt",
        ]
    )
    summary = json.loads((vdir / "summary.json").read_text(encoding="utf-8"))
    assert summary["patient_name"] is None and "Participant" not in json.dumps(summary)
    assert "Participant" not in str(vdir) and "FW-0001" not in str(vdir)

    # Geometry oracle: SimpleITK's series reader on the input; the mask must share its grid
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(
        reader.GetGDCMSeriesFileNames(str(inbox / "mixed"), summary["series_instance_uid"])
    )
    ref = reader.Execute()
    mask_img = sitk.ReadImage(str(vdir / "wmh_mask.nii.gz"))
    assert mask_img.GetSize() == ref.GetSize()
    np.testing.assert_allclose(mask_img.GetSpacing(), ref.GetSpacing(), atol=1e-4)
    np.testing.assert_allclose(mask_img.GetOrigin(), ref.GetOrigin(), atol=1e-3)
    np.testing.assert_allclose(mask_img.GetDirection(), ref.GetDirection(), atol=1e-6)

    # The tiny model marks voxels brighter than 1.4 x tissue: exactly the written lesion blobs.
    mask = np.asarray(nib.load(vdir / "wmh_mask.nii.gz").dataobj)
    truth = phantom_array(spec) == 600
    assert mask.dtype == np.uint8
    assert np.array_equal(mask.astype(bool), truth)
    # mL arithmetic, worked by hand: voxels x (1.0 x 1.0 x 3.0 mm^3) / 1000
    assert summary["lesion_volume_ml"] == pytest.approx(truth.sum() * 3.0 / 1000, abs=1e-4)
    assert summary["lesion_count"] == 2
    assert summary["model"]["name"] == "tiny-threshold"
    assert "RESEARCH USE ONLY" in (vdir / "RESEARCH_ONLY.txt").read_text(encoding="utf-8")


def test_second_run_adopts_and_changes_nothing(tmp_path: Path, tiny_model_manifest: Path) -> None:
    write_series(tmp_path / "in", SeriesSpec())
    args = [
        "process",
        str(tmp_path / "in"),
        "--results",
        str(tmp_path / "out"),
        "--model",
        str(tiny_model_manifest),
    ]
    assert main(args) == 0
    before = _tree_digest(tmp_path / "out")
    assert main(args) == 0
    assert _tree_digest(tmp_path / "out") == before


def test_bad_series_fails_with_one_line_and_exit_1(
    tmp_path: Path, tiny_model_manifest: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    paths = write_series(tmp_path / "in", SeriesSpec())
    paths[3].write_bytes(paths[3].read_bytes()[:-500])  # cut inside the pixel data
    rc = main(
        [
            "process",
            str(tmp_path / "in"),
            "--results",
            str(tmp_path / "out"),
            "--model",
            str(tiny_model_manifest),
        ]
    )
    err = capsys.readouterr().err
    assert rc == 1
    assert "failed" in err and "Traceback" not in err
    assert not list((tmp_path / "out").rglob("summary.json"))


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["process", "/no/such/folder", "--results", "{tmp}/out"], "does not exist"),
        (["process", "{tmp}", "--results", "{tmp}/out"], "lies inside input"),
        (
            ["process", "{tmp}", "--results", "{tmp}/../o", "--model", "{tmp}/none.yaml"],
            "cannot read model manifest",
        ),
        (["process", "{tmp}", "--results", "{tmp}/../o", "--threshold", "2"], "threshold"),
    ],
)
def test_usage_errors_exit_2_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    write_series(tmp_path, SeriesSpec())
    rc = main([a.replace("{tmp}", str(tmp_path)) for a in args])
    # the research-only caution is printed first as the command starts; the error is one line
    err = capsys.readouterr().err.strip().replace(CAUTION, "").strip()
    assert rc == 2
    assert message in err and len(err.splitlines()) == 1


def test_head_larger_than_the_model_view_is_warned_about(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    # the tiny model sees 64 x 64 mm; a 96 x 96 mm head is cut off, a 64 x 64 mm field is not
    write_series(tmp_path / "big", SeriesSpec(rows=96, columns=96, lesions=()))
    write_series(tmp_path / "small", SeriesSpec(lesions=()))
    for name, expect in (("big", True), ("small", False)):
        out = tmp_path / f"out-{name}"
        args = ["process", str(tmp_path / name), "--results", str(out)]
        assert main([*args, "--model", str(tiny_model_manifest)]) == 0
        (vdir,) = _version_dirs(out)
        warnings = json.loads((vdir / "summary.json").read_text(encoding="utf-8"))["warnings"]
        assert any("edge of the model" in w for w in warnings) is expect, warnings


# A ventricle box near lesion 2, half-way from lesion 1, and a third lesion far from it.
VENTRICLE_SPEC = SeriesSpec(
    ventricles=((28, 36, 26, 38, 4, 8),),
    lesions=((20, 24, 5, 3), (40, 36, 7, 2), (50, 12, 6, 2)),
)


def _split_oracle(vdir: Path, distance_mm: float) -> tuple[float, float, dict[int, float]]:
    """Periventricular and deep mL, and each lesion's periventricular share keyed by its voxel
    count, from the written masks with scipy's exact Euclidean distance transform (sampling =
    the NIfTI voxel sizes) and scipy's 26-connected labelling: the outside oracle."""
    from scipy import ndimage

    wmh_img = nib.load(vdir / "wmh_mask.nii.gz")
    wmh = np.asarray(wmh_img.dataobj) != 0
    vent = np.asarray(nib.load(vdir / "ventricle_mask.nii.gz").dataobj) != 0
    zooms = wmh_img.header.get_zooms()[:3]
    dist = ndimage.distance_transform_edt(~vent, sampling=zooms)
    near = wmh & (dist <= distance_mm)
    voxel_ml = float(np.prod(zooms)) / 1000
    labels, n = ndimage.label(wmh, structure=np.ones((3, 3, 3)))
    shares = {
        int((labels == i).sum()): float(near[labels == i].sum() / (labels == i).sum())
        for i in range(1, n + 1)
    }
    return near.sum() * voxel_ml, (wmh & ~near).sum() * voxel_ml, shares


@pytest.mark.parametrize("distance_mm", [10.0, 4.0])
def test_ventricle_output_splits_wmh_into_periventricular_and_deep(
    tmp_path: Path, distance_mm: float
) -> None:
    from tests.model_fixtures import make_tiny_model

    manifest = make_tiny_model(tmp_path / "model3", ventricles=True)
    write_series(tmp_path / "in", VENTRICLE_SPEC)
    out = tmp_path / "out"
    args = ["process", str(tmp_path / "in"), "--results", str(out), "--model", str(manifest)]
    assert main([*args, "--periventricular-mm", str(distance_mm)]) == 0
    (vdir,) = _version_dirs(out)
    summary = json.loads((vdir / "summary.json").read_text(encoding="utf-8"))
    # the ventricle mask is exactly the dark box (the model grid equals the series grid here)
    vent = np.asarray(nib.load(vdir / "ventricle_mask.nii.gz").dataobj)
    assert np.array_equal(vent.astype(bool), phantom_array(VENTRICLE_SPEC) == 150)
    assert summary["ventricle_volume_ml"] == pytest.approx(8 * 12 * 4 * 3.0 / 1000, abs=0.01)
    assert summary["periventricular_mm"] == distance_mm
    peri, deep, shares = _split_oracle(vdir, distance_mm)
    assert summary["periventricular_volume_ml"] == pytest.approx(peri, abs=1e-4)
    assert summary["deep_volume_ml"] == pytest.approx(deep, abs=1e-4)
    total = summary["periventricular_volume_ml"] + summary["deep_volume_ml"]
    assert total == pytest.approx(summary["lesion_volume_ml"], abs=2e-4)
    assert peri > 0 and deep > 0  # the layout puts lesions on both sides of the line
    with open(vdir / "lesions.csv", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 3
    for row in rows:
        share = shares[int(row["voxels"])]
        assert float(row["periventricular_fraction"]) == pytest.approx(share, abs=1e-4)
        assert row["location"] == ("periventricular" if share >= 0.5 else "deep")


def test_two_output_model_leaves_the_split_empty(tmp_path: Path, tiny_model_manifest: Path) -> None:
    write_series(tmp_path / "in", VENTRICLE_SPEC)
    out = tmp_path / "out"
    args = ["process", str(tmp_path / "in"), "--results", str(out)]
    assert main([*args, "--model", str(tiny_model_manifest)]) == 0
    (vdir,) = _version_dirs(out)
    summary = json.loads((vdir / "summary.json").read_text(encoding="utf-8"))
    for key in (
        "ventricle_volume_ml",
        "periventricular_volume_ml",
        "deep_volume_ml",
        "periventricular_mm",
    ):
        assert summary[key] is None
    assert not (vdir / "ventricle_mask.nii.gz").exists()
    with open(vdir / "lesions.csv", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 3
    assert all(r["location"] == "" and r["periventricular_fraction"] == "" for r in rows)
