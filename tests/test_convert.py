"""The converter between series grid and model grid, checked against SimpleITK and nibabel."""

from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk
from nibabel.orientations import aff2axcodes, inv_ornt_aff

from flairwatch.engine import convert
from flairwatch.engine.manifest import GridSpec, Normalisation
from flairwatch.volume import Volume, lps_to_ras


def _sitk_image(vol: Volume) -> sitk.Image:
    """Our (i, j, k) array + LPS affine as a SimpleITK image (ITK works in LPS too)."""
    img = sitk.GetImageFromArray(np.ascontiguousarray(vol.data.transpose(2, 1, 0)))
    spacing = np.array(vol.spacing)
    img.SetSpacing(spacing.tolist())
    img.SetOrigin(vol.affine_lps[:3, 3].tolist())
    img.SetDirection((vol.affine_lps[:3, :3] / spacing).flatten().tolist())
    return img


def _smooth(shape: tuple[int, int, int], seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    from scipy import ndimage

    return ndimage.gaussian_filter(rng.random(shape), 6).astype(np.float32) * 100 + 10


# (columns of the 3x3 direction, which voxel axis ends up as L, P, S)
ORIENTATIONS = {
    "axial_lps": np.eye(3),
    "axial_ras": np.diag([-1.0, -1.0, 1.0]),
    "sagittal": np.array([[0, 0, 1.0], [1.0, 0, 0], [0, -1.0, 0]]),
    "coronal": np.array([[1.0, 0, 0], [0, 0, -1.0], [0, 1.0, 0]]),
}


@pytest.mark.parametrize("name", sorted(ORIENTATIONS))
def test_reorientation_matches_simpleitk_dicomorient(name: str) -> None:
    # Oracle: SimpleITK DICOMOrient(img, "LPS") permutes/flips axes so they run to L, P, S.
    direction = ORIENTATIONS[name]
    affine = np.eye(4)
    affine[:3, :3] = direction * np.array([0.9, 1.1, 3.0])
    affine[:3, 3] = [-90.0, 20.0, -40.0]
    vol = Volume(_smooth((20, 24, 12)), affine)
    gmap = convert.plan(vol, GridSpec((1.0, 1.0), (32, 32)))
    ours = convert._reorient(vol.data, gmap)
    oriented = sitk.DICOMOrient(_sitk_image(vol), "LPS")
    theirs = sitk.GetArrayFromImage(oriented).transpose(2, 1, 0)
    np.testing.assert_array_equal(ours, theirs)
    assert gmap.reoriented_spacing_mm == pytest.approx(oriented.GetSpacing())
    # nibabel: the reoriented grid's RAS affine has axis codes L, P, S
    reoriented = vol.affine_lps @ inv_ornt_aff(gmap.ornt, vol.shape)
    assert aff2axcodes(lps_to_ras(reoriented)) == ("L", "P", "S")


def test_inplane_resampling_matches_simpleitk_resample() -> None:
    # Oracle: SimpleITK ResampleImageFilter, linear interpolation, onto the model grid expressed
    # as an ITK image geometry (upsampling 1.5 mm -> 1.0 mm, so no anti-aliasing filter applies).
    affine = np.diag([1.5, 1.5, 4.0, 1.0])
    affine[:3, 3] = [-30.0, -40.0, 10.0]
    vol = Volume(_smooth((40, 44, 6), seed=3), affine)
    grid = GridSpec((1.0, 1.0), (64, 70))
    gmap = convert.plan(vol, grid)
    ours = convert.resample_to_model(vol.data, gmap)  # (K, H, W)

    _, offset = convert._inplane_params(gmap, forward=True)
    ref = sitk.Image(64, 70, 6, sitk.sitkFloat32)
    ref.SetSpacing((1.0, 1.0, 4.0))
    ref.SetOrigin((-30.0 + offset[0] * 1.5, -40.0 + offset[1] * 1.5, 10.0))
    theirs = sitk.Resample(_sitk_image(vol), ref, sitk.Transform(), sitk.sitkLinear, 0.0)
    expected = sitk.GetArrayFromImage(theirs)  # (K, J, I) = (K, H, W)
    # ITK interpolates up to half a voxel past the last sample, scipy stops at it: compare where
    # both sampled the image, which must be nearly all of ITK's footprint.
    inside = (expected != 0) & (ours != 0)
    assert inside.sum() > 0.9 * (expected != 0).sum()
    np.testing.assert_allclose(ours[inside], expected[inside], rtol=1e-4, atol=1e-3)


def test_round_trip_is_exact_when_spacing_matches_the_grid() -> None:
    # Same spacing as the model grid: the way back must return the input voxel for voxel
    # (docs/architecture.md: exact where the model grid keeps the series' slice stack).
    affine = np.eye(4)
    affine[:3, :3] = ORIENTATIONS["sagittal"]
    vol = Volume(_smooth((33, 41, 27)), affine)
    gmap = convert.plan(vol, GridSpec((1.0, 1.0), (64, 64)))
    back = convert.resample_to_series(convert.resample_to_model(vol.data, gmap), gmap)
    np.testing.assert_array_equal(back, vol.data)


def test_round_trip_of_smooth_image_is_close_after_resampling() -> None:
    affine = np.diag([0.5, 0.5, 5.0, 1.0])
    data = _smooth((160, 160, 8), seed=5)
    vol = Volume(data, affine)
    gmap = convert.plan(vol, GridSpec((1.0, 1.0), (96, 96)))
    back = convert.resample_to_series(convert.resample_to_model(data, gmap), gmap)
    core = (slice(10, -10), slice(10, -10), slice(None))
    assert np.max(np.abs(back[core] - data[core])) < 0.05 * np.ptp(data)


def test_stack_channels_repeats_edges() -> None:
    slices = np.arange(4, dtype=np.float32)[:, None, None] * np.ones((4, 2, 2), np.float32)
    stacked = convert.stack_channels(slices, 3)
    assert stacked.shape == (4, 3, 2, 2)
    assert stacked[0, :, 0, 0].tolist() == [0, 0, 1]
    assert stacked[3, :, 0, 0].tolist() == [2, 3, 3]


def test_normalisation_puts_tissue_near_one() -> None:
    data = np.zeros((50, 50, 10), np.float32)
    data[10:40, 10:40] = 300.0
    data[20:22, 20:22] = 600.0
    out = convert.normalise(data, Normalisation())
    assert out[25, 25, 5] == pytest.approx(1.0)
    assert out[21, 21, 5] == pytest.approx(2.0)
    assert out[0, 0, 0] == 0.0


def _scipy_inplane(data: np.ndarray, gmap: convert.GridMap, forward: bool) -> np.ndarray:
    """The reference: ``ndimage.affine_transform`` (linear, constant mode) on the whole (I, J, K)
    volume with the converter's scale and shift, as the converter did before it used taps."""
    from scipy import ndimage

    matrix, offset = convert._inplane_params(gmap, forward=forward)
    shape = (*gmap.grid.shape, gmap.n_slices) if forward else gmap.reoriented_shape
    return ndimage.affine_transform(
        data,
        matrix,
        offset=offset,
        output_shape=shape,
        order=1,
        mode="constant",
        cval=0.0,
        prefilter=False,
    )


@pytest.mark.parametrize(
    ("shape", "spacing", "grid"),
    [
        ((256, 256, 6), (0.9, 0.9, 3.0), GridSpec((1.0, 1.0), (224, 224))),  # the benchmark case
        ((60, 52, 4), (0.45, 0.5, 5.0), GridSpec((1.0, 1.0), (32, 30))),  # shrink, anti-aliased
        ((30, 34, 5), (1.3, 1.2, 1.2), GridSpec((1.0, 1.0), (48, 40))),  # enlarge, head cut off
        ((40, 40, 3), (1.0, 1.0, 2.0), GridSpec((1.0, 1.0), (40, 40))),  # same spacing
    ],
)
def test_resampling_is_bit_identical_to_scipy_affine_transform(
    shape: tuple[int, int, int], spacing: tuple[float, float, float], grid: GridSpec
) -> None:
    # Oracle: scipy.ndimage.affine_transform, order 1: the converter's taps must give the very
    # same float32 values both ways (same weights, same summation order), not merely close ones.
    affine = np.diag([*spacing, 1.0])
    vol = Volume(_smooth(shape, seed=len(shape) + shape[0]), affine)
    gmap = convert.plan(vol, grid)
    from scipy import ndimage

    reoriented = convert._reorient(vol.data, gmap)
    matrix, _ = convert._inplane_params(gmap, forward=True)
    # the filter as documented, sigma = (factor - 1) / 2, never skipped: a one-tap kernel that the
    # converter skips must change nothing
    sigma = [max(0.0, (float(f) - 1) / 2) for f in matrix[:2]] + [0.0]
    if max(sigma) > 0:
        reoriented = ndimage.gaussian_filter(reoriented, sigma=sigma, mode="nearest")
    expected = _scipy_inplane(reoriented, gmap, True).transpose(2, 1, 0)
    ours = convert.resample_to_model(vol.data, gmap)
    np.testing.assert_array_equal(ours, expected)
    model = np.random.default_rng(2).random(ours.shape).astype(np.float32)
    back = _scipy_inplane(model.transpose(2, 1, 0), gmap, False)
    np.testing.assert_array_equal(convert.resample_to_series(model, gmap), back)
    # slices shared among threads: the same values
    np.testing.assert_array_equal(convert.resample_to_model(vol.data, gmap, threads=2), expected)
    np.testing.assert_array_equal(convert.resample_to_series(model, gmap, threads=3), back)


def test_identity_sized_antialias_filter_is_skipped_only_when_scipy_would_not_filter() -> None:
    # scipy's Gaussian kernel radius is int(truncate x sigma + 0.5) with truncate 4 (scipy's
    # gaussian_filter1d source, from memory): below sigma 0.125 it is one tap
    assert convert._antialias_sigma(1.11) == 0.0  # 0.9 mm -> 1.0 mm: sigma 0.055, one tap
    assert convert._antialias_sigma(1.5) == pytest.approx(0.25)
    assert convert._antialias_sigma(0.8) == 0.0  # enlarging: no filter


@pytest.mark.parametrize("level", [0.5, 0.3, 0.0])
def test_mask_resampling_equals_thresholding_the_resampled_map(level: float) -> None:
    # Oracle: the full linear resampling (itself bit-identical to scipy's affine_transform above),
    # then the threshold; values exactly at the level, a field of view that cuts the head off,
    # and threads included.
    from scipy import ndimage

    rng = np.random.default_rng(11)
    affine = np.diag([0.9, 0.85, 3.0, 1.0])
    vol = Volume(np.zeros((70, 76, 9), dtype=np.float32), affine)
    gmap = convert.plan(vol, GridSpec((1.0, 1.0), (56, 60)))
    model = ndimage.gaussian_filter(rng.random((9, 60, 56)), (0, 3, 3))
    model = ((model - model.min()) / np.ptp(model)).astype(np.float32)
    model[:, 20:30, 20:30] = np.float32(level)
    model[2] = 1.0  # a slice wholly above
    expected = convert.resample_to_series(model, gmap) >= level
    for threads in (1, 2):
        got = convert.resample_mask_to_series(model, gmap, level, threads=threads)
        assert got.dtype == bool
        np.testing.assert_array_equal(got, expected)
