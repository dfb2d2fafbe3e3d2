"""Periventricular/deep split: distances to the ventricles checked against outside oracles.

Oracles: hand-made geometry with distances worked by hand (Pythagoras on the voxel spacing),
scipy's exact Euclidean distance transform (``ndimage.distance_transform_edt`` with
``sampling``) and SimpleITK's ``SignedMaurerDistanceMap`` (image spacing, outside positive),
which for voxels outside the mask both give the distance to the nearest mask voxel centre. The
10 mm rule itself is common practice in WMH research.
"""

from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk
from scipy import ndimage

from flairwatch.engine.regions import distance_to_mask_mm, split_by_ventricles, surface_voxels


def test_hand_made_plane_gives_distances_in_mm_on_anisotropic_voxels() -> None:
    # ventricle: the plane i = 10 on 0.5 x 1.0 x 3.0 mm voxels; voxel i = 10 + n lies n x 0.5 mm
    # away (worked by hand), along k the slice thickness does not enter
    spacing = (0.5, 1.0, 3.0)
    vent = np.zeros((40, 6, 5), dtype=bool)
    vent[10] = True
    points = np.array([[10, 2, 2], [11, 2, 2], [30, 3, 1], [31, 0, 4], [0, 5, 0]])
    got = distance_to_mask_mm(points, vent, spacing)
    np.testing.assert_allclose(got, [0.0, 0.5, 10.0, 10.5, 5.0])


def test_hand_made_single_voxel_uses_pythagoras_across_axes() -> None:
    # one ventricle voxel at the origin; (6, 8, 0) on 1 mm voxels is 10 mm away (6-8-10
    # triangle), (0, 0, 4) on 3 mm slices 12 mm, (3, 4, 1) sqrt(9 + 16 + 9) mm
    vent = np.zeros((10, 10, 6), dtype=bool)
    vent[0, 0, 0] = True
    points = np.array([[6, 8, 0], [0, 0, 4], [3, 4, 1]])
    got = distance_to_mask_mm(points, vent, (1.0, 1.0, 3.0))
    np.testing.assert_allclose(got, [10.0, 12.0, np.sqrt(34.0)])


def test_split_counts_the_voxel_exactly_at_the_distance_as_periventricular() -> None:
    # plane at i = 0, 1 mm voxels; a lesion along i = 5..14 lies 5..14 mm away: 6 of its 10
    # voxels (5..10 mm) are within 10 mm, so its share is 0.6 and it is periventricular; a
    # second lesion at i = 20..21 (20, 21 mm) is deep
    labels = np.zeros((30, 3, 3), dtype=np.int32)
    labels[5:15, 1, 1] = 1
    labels[20:22, 1, 1] = 2
    vent = np.zeros(labels.shape, dtype=bool)
    vent[0] = True
    split = split_by_ventricles(labels, 2, vent, (1.0, 1.0, 1.0), distance_mm=10.0)
    np.testing.assert_allclose(split.fraction, [0.6, 0.0])
    assert split.periventricular_volume_ml == pytest.approx(6 / 1000)
    assert split.deep_volume_ml == pytest.approx(6 / 1000)
    assert split.ventricle_volume_ml == pytest.approx(vent.sum() / 1000)
    nearer = split_by_ventricles(labels, 2, vent, (1.0, 1.0, 1.0), distance_mm=4.9)
    np.testing.assert_allclose(nearer.fraction, [0.0, 0.0])


def test_no_ventricle_voxel_makes_every_lesion_deep() -> None:
    labels = np.zeros((8, 8, 4), dtype=np.int32)
    labels[2:4, 2:4, 1] = 1
    split = split_by_ventricles(labels, 1, np.zeros(labels.shape), (1.0, 1.0, 3.0))
    assert split.periventricular_volume_ml == 0.0
    assert split.deep_volume_ml == pytest.approx(4 * 3.0 / 1000)
    np.testing.assert_allclose(split.fraction, [0.0])


def test_distances_agree_with_scipy_edt_and_simpleitk_maurer_on_random_shapes() -> None:
    rng = np.random.default_rng(5)
    spacing = (0.9, 1.1, 3.0)
    vent = ndimage.gaussian_filter(rng.random((40, 36, 14)), 2.0) > 0.53
    assert 50 < vent.sum() < vent.size // 2
    points = np.argwhere(np.ones(vent.shape, dtype=bool))
    ours = distance_to_mask_mm(points, vent, spacing).reshape(vent.shape)
    edt = ndimage.distance_transform_edt(~vent, sampling=spacing)
    np.testing.assert_allclose(ours, edt, rtol=1e-12, atol=1e-12)
    img = sitk.GetImageFromArray(vent.transpose(2, 1, 0).astype(np.uint8))
    img.SetSpacing(spacing)
    maurer = sitk.SignedMaurerDistanceMap(
        img, insideIsPositive=False, squaredDistance=False, useImageSpacing=True
    )
    itk = sitk.GetArrayFromImage(maurer).transpose(2, 1, 0)
    outside = ~vent
    np.testing.assert_allclose(ours[outside], itk[outside], rtol=1e-5, atol=1e-5)  # float32


def test_limit_returns_inf_beyond_it_and_exact_values_within() -> None:
    vent = np.zeros((30, 4, 4), dtype=bool)
    vent[0] = True
    points = np.array([[3, 0, 0], [12, 0, 0]])
    got = distance_to_mask_mm(points, vent, (1.0, 1.0, 1.0), limit_mm=10.0)
    assert got[0] == 3.0 and np.isinf(got[1])


def test_surface_voxels_are_those_with_a_face_neighbour_outside() -> None:
    cube = np.zeros((7, 7, 7), dtype=bool)
    cube[1:6, 1:6, 1:6] = True
    surface = surface_voxels(cube)
    # a 5^3 cube has 5^3 - 3^3 = 98 surface voxels (counted by hand)
    assert surface.shape == (98, 3)
    assert not any((s == 3).all() for s in surface)


def test_no_lesion_gives_zero_volumes_and_an_empty_share_list() -> None:
    vent = np.zeros((6, 6, 3), dtype=bool)
    vent[2:4, 2:4, 1] = True
    split = split_by_ventricles(np.zeros(vent.shape, dtype=np.int32), 0, vent, (1.0, 1.0, 2.0))
    assert split.periventricular_volume_ml == 0.0 and split.deep_volume_ml == 0.0
    assert split.fraction.shape == (0,)
    assert split.ventricle_volume_ml == pytest.approx(4 * 2.0 / 1000)
