"""The written WMH probability map is exactly 0 outside the intracranial mask, the model's own
values inside it.

Oracles: the tiny test model's fixed outputs (tests/model_fixtures.py: WMH
sigmoid(12 (x - 1.4)), intracranial sigmoid(12 (x - 0.3)) of foreground-normalised intensity;
a logistic sigmoid is never exactly 0 or 1 in float32 for |argument| < 17, so every tissue voxel
keeps a probability above 0), on a phantom whose model grid equals its series grid, so the
intracranial mask is the phantom's head; files read back with nibabel and SimpleITK.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import SimpleITK as sitk

from flairwatch.cli import main
from tests.series_fixtures import SeriesSpec, phantom_array, write_series


def test_probability_is_zero_outside_the_head_and_positive_inside(
    tmp_path: Path, tiny_model_manifest: Path
) -> None:
    spec = SeriesSpec()
    write_series(tmp_path / "in", spec)
    out = tmp_path / "out"
    args = ["process", str(tmp_path / "in"), "--results", str(out)]
    assert main([*args, "--model", str(tiny_model_manifest)]) == 0
    (vdir,) = sorted(p.parent for p in out.rglob("summary.json"))
    prob = np.asarray(nib.load(vdir / "wmh_probability.nii.gz").dataobj)  # type: ignore[attr-defined]
    head = phantom_array(spec) > 0
    assert prob.dtype == np.float32 and prob.shape == head.shape
    assert np.all(prob[~head] == 0.0)
    assert np.all(prob[head] > 0.0) and float(prob.max()) <= 1.0
    # lesions (600 = 2 x tissue) are far above one half, plain tissue far below
    lesion = phantom_array(spec) == 600
    assert np.all(prob[lesion] > 0.5) and np.all(prob[head & ~lesion] < 0.5)
    # a second, independent reader (SimpleITK) sees the same values
    via_sitk = sitk.GetArrayFromImage(sitk.ReadImage(str(vdir / "wmh_probability.nii.gz")))
    np.testing.assert_array_equal(via_sitk.transpose(2, 1, 0), prob)
