"""Training data: case folders in the flat reference layout and the older label-2 layout.

Files are written with nibabel (the reference NIfTI library); the expected arrays follow from the
layout's definition: 0/1 WMH, a separate 0/1 exclusion mask (or label 2 in older folders), an
optional 0/1 ventricle mask.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.training.data import NO_LABEL, cache_case, load_cached

GRID = GridSpec(spacing_mm=(1.0, 1.0), shape=(224, 224), through_plane="keep")
AFFINE = np.diag([1.0, 1.0, 3.0, 1.0])  # RAS, 1 x 1 mm pixels, 3 mm slices


def _save(data: np.ndarray, path: Path) -> None:
    nib.save(nib.Nifti1Image(data, AFFINE), str(path))


def _masks() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    shape = (224, 224, 6)
    image = np.zeros(shape, np.float32)
    image[40:180, 40:180] = 100.0
    wmh = np.zeros(shape, np.uint8)
    wmh[60:70, 60:70, 2:4] = 1
    exclude = np.zeros(shape, np.uint8)
    exclude[100:110, 100:110, 1:3] = 1
    vent = np.zeros(shape, np.uint8)
    vent[120:140, 80:90, :] = 1
    return image, wmh, exclude, vent


def _cache(folder: Path, tmp_path: Path) -> dict[str, np.ndarray]:
    out = tmp_path / f"{folder.name}.npz"
    cache_case(folder, out, GRID, Normalisation())
    with np.load(out) as z:
        return {k: z[k] for k in z.files}


def test_flat_layout_and_old_label_two_layout_give_the_same_arrays(tmp_path: Path) -> None:
    image, wmh, exclude, vent = _masks()
    new = tmp_path / "new"
    new.mkdir()
    _save(image, new / "image.nii.gz")
    _save(wmh, new / "wmh_reference.nii.gz")
    _save(exclude, new / "exclude_mask.nii.gz")
    _save(vent, new / "ventricles_reference.nii.gz")
    old = tmp_path / "old"
    old.mkdir()
    _save(image, old / "image.nii.gz")
    _save(np.where(exclude > 0, 2, wmh).astype(np.uint8), old / "wmh_reference.nii.gz")

    a, b = _cache(new, tmp_path), _cache(old, tmp_path)
    np.testing.assert_array_equal(a["wmh"], b["wmh"])
    assert set(np.unique(a["wmh"])) == {0, 1, 2}
    assert int((a["wmh"] == 1).sum()) == int(wmh.sum())  # 1 mm grid: voxel for voxel
    assert int((a["wmh"] == 2).sum()) == int(exclude.sum())
    assert int((a["vent"] == 1).sum()) == int(vent.sum())
    assert (b["vent"] == NO_LABEL).all()  # no ventricle file: that output is not trained
    assert (a["icv"] == NO_LABEL).all()
    assert float(a["slice_mm"]) == pytest.approx(3.0)
    case = load_cached(tmp_path / "new.npz")
    assert case.vent is not None and case.slice_mm == pytest.approx(3.0)
    assert load_cached(tmp_path / "old.npz").vent is None
    assert list(case.lesion_slices) == [2, 3]


def test_threshold_seeds_are_validation_seeds_only_and_never_held_out() -> None:
    # no leakage (common practice: a threshold is chosen on data the network was not trained
    # on, and the test data stay untouched): every seed obeys the split rule of
    # flairwatch.training.cache, none is one of the generator's held-out seeds
    from flairwatch.phantom.bank import HELD_OUT_SEEDS
    from flairwatch.training.cache import is_validation
    from flairwatch.training.heldout import THRESHOLD_CASES, threshold_seeds

    cached = [150, 10, 130, 7, 900010]  # 7: a training seed; 900010: held out
    seeds = threshold_seeds(cached)
    assert len(seeds) == len(set(seeds)) == THRESHOLD_CASES
    assert seeds[:3] == [10, 130, 150]  # the cached validation phantoms first
    assert all(is_validation("", s) for s in seeds)
    assert not set(seeds) & set(HELD_OUT_SEEDS) and 7 not in seeds
    assert threshold_seeds(list(range(0, 1000, 10)), 4) == [0, 10, 20, 30]
