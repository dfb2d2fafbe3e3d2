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
from scipy import ndimage as ndi

from flairwatch.phantom import PhantomCase, generate, write_case
from flairwatch.phantom.anatomy import lateral_zone, load_template
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


def test_ventricle_truth_is_the_two_lateral_ventricles() -> None:
    """The lateral ventricles lie either side of the midline, split by the septum pellucidum;
    the third ventricle is a narrow midline cavity below them (anatomy, from memory). The
    ICBM152 2009a *symmetric* template (its name says so) gives two mirror-image pieces."""
    tpl = load_template(2)
    lateral = tpl.vent & lateral_zone(2)
    x = tpl.affine_lps[0, 0] * np.arange(tpl.shape[0]) + tpl.affine_lps[0, 3]
    labels, n = ndi.label(lateral)
    assert n == 2
    sides = [float(np.mean(x[np.argwhere(labels == i)[:, 0]])) for i in (1, 2)]
    assert min(sides) < -5.0 and max(sides) > 5.0  # one piece each side of the midline
    sizes = np.bincount(labels.ravel())[1:]
    # mirror images (the 2 mm grid averages 2x2x2 blocks, so it is off-centre by half a voxel)
    assert abs(int(sizes[0]) - int(sizes[1])) <= 0.1 * sizes.max()
    midline = tpl.vent & (np.abs(x) < 1.5)[:, None, None]
    assert midline.any() and not (lateral & midline).any()  # third ventricle left out
    ml = lateral.sum() * tpl.voxel_mm**3 / 1000.0
    assert 7.0 < ml < 40.0  # young adult lateral ventricles, from memory


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
