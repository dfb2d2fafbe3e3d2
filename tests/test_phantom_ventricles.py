"""Phantom ventricle mask, tissue labels and the case-folder reference layout.

References outside the project: nibabel reads the written NIfTI files back; ventricle sizes are
adult values from memory (lateral ventricles roughly 10-50 mL in healthy adults, more with
atrophy); CSF is dark on FLAIR because the inversion time nulls it (common practice).
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from flairwatch.phantom import PhantomCase, generate, write_case
from flairwatch.phantom.generator import TISSUE_CLASSES
from tests.test_phantom import small_params


@pytest.fixture(scope="module")
def case() -> PhantomCase:
    return generate(small_params(11), with_tissue=True)


def test_extra_maps_leave_the_image_unchanged(case: PhantomCase) -> None:
    plain = generate(small_params(11), with_ventricles=False)
    assert plain.ventricles is None and plain.tissue is None
    np.testing.assert_array_equal(plain.image.data, case.image.data)
    np.testing.assert_array_equal(plain.wmh.data, case.wmh.data)


def test_ventricles_are_plausible(case: PhantomCase) -> None:
    assert case.ventricles is not None and case.ventricle_volume_ml is not None
    vent = case.ventricles.data.astype(bool)
    icv = case.intracranial.data.astype(bool)
    assert not (vent & ~icv).any()  # inside the skull
    assert not (vent & case.wmh.data.astype(bool)).any()  # lesions are tissue, not fluid
    assert 5.0 < case.ventricle_volume_ml < 80.0  # adult range, from memory (see docstring)
    img = case.image.data
    # suppressed fluid: ventricles darker than the typical intracranial voxel
    assert np.median(img[vent]) < 0.7 * np.median(img[icv & ~vent])


def test_atrophy_enlarges_the_ventricles() -> None:
    young = dataclasses.replace(small_params(11), atrophy=0.0)
    old = dataclasses.replace(small_params(11), atrophy=1.0)
    v_young = generate(young).ventricle_volume_ml
    v_old = generate(old).ventricle_volume_ml
    assert v_young is not None and v_old is not None
    assert v_old > 1.3 * v_young


def test_tissue_labels_agree_with_the_masks(case: PhantomCase) -> None:
    assert case.tissue is not None and case.ventricles is not None
    tissue = case.tissue.data
    assert tissue.shape == case.image.shape
    assert set(np.unique(tissue)) <= set(range(len(TISSUE_CLASSES)))
    icv = case.intracranial.data.astype(bool)
    assert np.all(tissue[~icv] == TISSUE_CLASSES.index("outside"))
    np.testing.assert_array_equal(tissue == TISSUE_CLASSES.index("wmh"), case.wmh.data.astype(bool))
    vent = case.ventricles.data.astype(bool)
    # the ventricle mask is "fraction >= 0.5", the label the dominant class: nearly the same
    agree = np.mean(tissue[vent] == TISSUE_CLASSES.index("ventricle"))
    assert agree > 0.9


def test_case_folder_uses_the_flat_reference_layout(tmp_path: Path, case: PhantomCase) -> None:
    folder = tmp_path / "c"
    write_case(case, folder, patient_id="INV-011", patient_name="Invented^Eleven")
    wmh: nib.Nifti1Image = nib.load(str(folder / "wmh_reference.nii.gz"))  # type: ignore[assignment]
    vent: nib.Nifti1Image = nib.load(str(folder / "ventricles_reference.nii.gz"))  # type: ignore[assignment]
    assert set(np.unique(np.asarray(wmh.dataobj))) <= {0, 1}  # 0/1 only: no "2" labels
    assert case.ventricles is not None
    np.testing.assert_array_equal(np.asarray(vent.dataobj), case.ventricles.data)
    np.testing.assert_allclose(vent.affine, wmh.affine)  # same (image) grid
    assert not (folder / "exclude_mask.nii.gz").exists()  # optional; phantoms exclude nothing
    facts = json.loads((folder / "case.json").read_text(encoding="utf-8"))
    assert facts["files"]["ventricles_reference"] == "ventricles_reference.nii.gz"
    assert facts["truth"]["ventricle_volume_ml"] == pytest.approx(
        case.ventricle_volume_ml, abs=0.01
    )
    assert facts["n_files"] == case.image.shape[2]
